/* The token digest cache's lookup for a message's tokens, in one pass: the compiled form of
 * digest_cache.DigestCache.probe's Python steps (keys_of, then get's whole-array steps),
 * which stay as the fallback and the specification the tests hold this to.
 *
 * In Python the lookup is about a dozen numpy calls of a few microseconds each, for some
 * two hundred tokens; here it is one loop: each token's str hash (kept in the str since
 * the tokenizer made it), its set's eight keys compared, the way that holds it read.
 *
 * fill then hashes the words the lookup missed and puts them in the table, where Python
 * made a hashlib object and a staging-dict entry for each (DigestCache.python_fill spells
 * it out).  Its BLAKE2b is written from RFC 7693; the tests hold it to hashlib's.
 *
 * The arrays come through the buffer protocol (no numpy headers): the tables as
 * digest_cache.py makes them, C-contiguous int64 of shape (sets, 8), and two int64 arrays
 * of one slot per token to fill.  The caller holds the cache's lock.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <stdint.h>
#include <string.h>

#include "_typed_buffer.h"

#define WAYS 8

static PyObject *pair_prefix; /* "osb:": pairs are mixed from word hashes (pairs.py) */

PyDoc_STRVAR(probe_doc,
"probe(tokens, keys, values, mask, out_keys, out_values) -> missing\n\n"
"For each token of the list: out_keys[i] = hash(token), and out_values[i] = the value held\n"
"beside that key in its set (row key & mask of the (sets, 8) tables), or 0.  Returns the\n"
"positions of the tokens not held, in order.");

static PyObject *probe(PyObject *Py_UNUSED(module), PyObject *const *args, Py_ssize_t nargs) {
    if (nargs != 6 || !PyList_Check(args[0]) || !PyLong_Check(args[3])) {
        PyErr_SetString(PyExc_TypeError,
                        "probe(tokens: list, keys, values, mask: int, out_keys, out_values)");
        return NULL;
    }
    PyObject *tokens = args[0], *missing = NULL;
    int64_t mask = PyLong_AsLongLong(args[3]);
    if (mask == -1 && PyErr_Occurred()) return NULL;
    Py_buffer keys, values, out_keys, out_values;
    if (int64_buffer(args[1], &keys, 0, "keys") < 0) return NULL;
    if (int64_buffer(args[2], &values, 0, "values") < 0) goto release_keys;
    if (int64_buffer(args[4], &out_keys, 1, "out_keys") < 0) goto release_values;
    if (int64_buffer(args[5], &out_values, 1, "out_values") < 0) goto release_out_keys;

    Py_ssize_t count = PyList_GET_SIZE(tokens);
    Py_ssize_t sets = keys.len / (8 * WAYS);
    if (keys.len != values.len || sets == 0 || mask < 0 || mask >= sets ||
        out_keys.len < count * 8 || out_values.len < count * 8) {
        PyErr_SetString(PyExc_ValueError,
                        "probe: tables of unequal size, a mask past them, or outputs too short");
        goto release_all;
    }
    const int64_t *held = keys.buf, *hashes = values.buf;
    int64_t *token_keys = out_keys.buf, *token_values = out_values.buf;
    missing = PyList_New(0);
    if (missing == NULL) goto release_all;
    /* Every token's key first, asking for its set's two lines as it goes, so the memory
     * reads overlap instead of each waiting in turn in the lookup loop below. */
    for (Py_ssize_t i = 0; i < count; i++) {
        Py_hash_t key = PyObject_Hash(PyList_GET_ITEM(tokens, i));
        if (key == -1) goto fail;
        token_keys[i] = (int64_t)key;
        __builtin_prefetch(held + ((int64_t)key & mask) * WAYS);
        __builtin_prefetch(hashes + ((int64_t)key & mask) * WAYS);
    }
    for (Py_ssize_t i = 0; i < count; i++) {
        int64_t key = token_keys[i];
        const int64_t *set = held + (key & mask) * WAYS;
        int way = 0;
        while (way < WAYS && set[way] != key) way++;
        if (way < WAYS) {
            token_values[i] = hashes[(set - held) + way];
            continue;
        }
        token_values[i] = 0;
        PyObject *at = PyLong_FromSsize_t(i);
        if (at == NULL || PyList_Append(missing, at) < 0) {
            Py_XDECREF(at);
            goto fail;
        }
        Py_DECREF(at);
    }
    goto release_all;

fail:
    Py_CLEAR(missing);
release_all:
    PyBuffer_Release(&out_values);
release_out_keys:
    PyBuffer_Release(&out_keys);
release_values:
    PyBuffer_Release(&values);
release_keys:
    PyBuffer_Release(&keys);
    return missing;
}

/* BLAKE2b (RFC 7693) with an 8-byte digest and no key: the token hash hashing.py makes
 * with hashlib, which the tests compare this with.  Written from the RFC's description. */
static const uint64_t blake2b_iv[8] = {
    0x6A09E667F3BCC908ULL, 0xBB67AE8584CAA73BULL, 0x3C6EF372FE94F82BULL, 0xA54FF53A5F1D36F1ULL,
    0x510E527FADE682D1ULL, 0x9B05688C2B3E6C1FULL, 0x1F83D9ABFB41BD6BULL, 0x5BE0CD19137E2179ULL,
};

static const uint8_t blake2b_sigma[12][16] = {
    {0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15},
    {14, 10, 4, 8, 9, 15, 13, 6, 1, 12, 0, 2, 11, 7, 5, 3},
    {11, 8, 12, 0, 5, 2, 15, 13, 10, 14, 3, 6, 7, 1, 9, 4},
    {7, 9, 3, 1, 13, 12, 11, 14, 2, 6, 5, 10, 4, 0, 15, 8},
    {9, 0, 5, 7, 2, 4, 10, 15, 14, 1, 11, 12, 6, 8, 3, 13},
    {2, 12, 6, 10, 0, 11, 8, 3, 4, 13, 7, 5, 15, 14, 1, 9},
    {12, 5, 1, 15, 14, 13, 4, 10, 0, 7, 6, 3, 9, 2, 8, 11},
    {13, 11, 7, 14, 12, 1, 3, 9, 5, 0, 15, 4, 8, 6, 2, 10},
    {6, 15, 14, 9, 11, 3, 0, 8, 12, 2, 13, 7, 1, 4, 10, 5},
    {10, 2, 8, 4, 7, 6, 1, 5, 15, 11, 9, 14, 3, 12, 13, 0},
    {0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15},
    {14, 10, 4, 8, 9, 15, 13, 6, 1, 12, 0, 2, 11, 7, 5, 3},
};

static inline uint64_t rotr64(uint64_t x, int n) { return (x >> n) | (x << (64 - n)); }

static inline uint64_t load64(const unsigned char *p) {
    uint64_t x = 0;
    for (int i = 7; i >= 0; i--) x = (x << 8) | p[i]; /* little-endian on any host */
    return x;
}

#define G(a, b, c, d, x, y)              \
    do {                                 \
        v[a] = v[a] + v[b] + (x);        \
        v[d] = rotr64(v[d] ^ v[a], 32);  \
        v[c] = v[c] + v[d];              \
        v[b] = rotr64(v[b] ^ v[c], 24);  \
        v[a] = v[a] + v[b] + (y);        \
        v[d] = rotr64(v[d] ^ v[a], 16);  \
        v[c] = v[c] + v[d];              \
        v[b] = rotr64(v[b] ^ v[c], 63);  \
    } while (0)

/* The compression function F of one 128-byte block; t: bytes hashed so far, including it. */
static void blake2b_compress(uint64_t h[8], const unsigned char block[128], uint64_t t,
                             int last) {
    uint64_t v[16], m[16];
    for (int i = 0; i < 16; i++) m[i] = load64(block + 8 * i);
    for (int i = 0; i < 8; i++) {
        v[i] = h[i];
        v[i + 8] = blake2b_iv[i];
    }
    v[12] ^= t; /* the counter's high word stays 0: a token is far below 2**64 bytes */
    if (last) v[14] = ~v[14];
    for (int round = 0; round < 12; round++) {
        const uint8_t *s = blake2b_sigma[round];
        G(0, 4, 8, 12, m[s[0]], m[s[1]]);
        G(1, 5, 9, 13, m[s[2]], m[s[3]]);
        G(2, 6, 10, 14, m[s[4]], m[s[5]]);
        G(3, 7, 11, 15, m[s[6]], m[s[7]]);
        G(0, 5, 10, 15, m[s[8]], m[s[9]]);
        G(1, 6, 11, 12, m[s[10]], m[s[11]]);
        G(2, 7, 8, 13, m[s[12]], m[s[13]]);
        G(3, 4, 9, 14, m[s[14]], m[s[15]]);
    }
    for (int i = 0; i < 8; i++) h[i] ^= v[i] ^ v[i + 8];
}

/* The 8-byte digest of data read as a little-endian signed integer (hashing.token_hash). */
static int64_t blake2b_64(const unsigned char *data, size_t size) {
    uint64_t h[8];
    memcpy(h, blake2b_iv, sizeof h);
    h[0] ^= 0x01010000ULL ^ 8; /* fanout 1, depth 1, no key, an 8-byte digest */
    uint64_t done = 0;
    while (size - done > 128) { /* every block but the last */
        blake2b_compress(h, data + done, done + 128, 0);
        done += 128;
    }
    unsigned char last[128] = {0};
    memcpy(last, data + done, size - done);
    blake2b_compress(h, last, size, 1);
    return (int64_t)h[0]; /* the digest is h[0]'s first 8 bytes, little-endian */
}

PyDoc_STRVAR(blake64_doc,
"blake64(data) -> int\n\n"
"BLAKE2b of the bytes with an 8-byte digest, read as a little-endian signed integer.");

static PyObject *blake64(PyObject *Py_UNUSED(module), PyObject *data) {
    Py_buffer view;
    if (PyObject_GetBuffer(data, &view, PyBUF_SIMPLE) < 0) return NULL;
    int64_t digest = blake2b_64(view.buf, (size_t)view.len);
    PyBuffer_Release(&view);
    return PyLong_FromLongLong(digest);
}

/* digest_cache.DigestCache.put of one entry: the way holding the key, else an empty way,
 * else the one picked by bits 32-34 of the key. */
static void put_one(int64_t *held, int64_t *hashes, int64_t mask, int64_t key, int64_t value) {
    int64_t *set = held + (key & mask) * WAYS;
    int way = 0, empty = -1;
    for (; way < WAYS && set[way] != key; way++)
        if (empty < 0 && set[way] == -1) empty = way;
    if (way == WAYS) way = empty >= 0 ? empty : (int)((key >> 32) & (WAYS - 1));
    set[way] = key;
    hashes[(set - held) + way] = value;
}

PyDoc_STRVAR(fill_doc,
"fill(tokens, missing, keys, values, mask, token_keys, token_values) -> left\n\n"
"For each position i of missing whose token is a word (not an \"osb:\" pair, and text that\n"
"encodes as UTF-8): token_values[i] = its BLAKE2b token hash, and that hash is put in the\n"
"tables beside token_keys[i] (as DigestCache.put puts one entry).  Returns the positions\n"
"left to the caller, in order.");

static PyObject *fill(PyObject *Py_UNUSED(module), PyObject *const *args, Py_ssize_t nargs) {
    if (nargs != 7 || !PyList_Check(args[0]) || !PyList_Check(args[1]) ||
        !PyLong_Check(args[4])) {
        PyErr_SetString(PyExc_TypeError,
                        "fill(tokens: list, missing: list, keys, values, mask: int, "
                        "token_keys, token_values)");
        return NULL;
    }
    PyObject *tokens = args[0], *missing = args[1], *left = NULL;
    int64_t mask = PyLong_AsLongLong(args[4]);
    if (mask == -1 && PyErr_Occurred()) return NULL;
    Py_buffer keys, values, token_keys, token_values;
    if (int64_buffer(args[2], &keys, 1, "keys") < 0) return NULL;
    if (int64_buffer(args[3], &values, 1, "values") < 0) goto release_keys;
    if (int64_buffer(args[5], &token_keys, 0, "token_keys") < 0) goto release_values;
    if (int64_buffer(args[6], &token_values, 1, "token_values") < 0) goto release_token_keys;

    Py_ssize_t count = PyList_GET_SIZE(tokens);
    Py_ssize_t sets = keys.len / (8 * WAYS);
    if (keys.len != values.len || sets == 0 || mask < 0 || mask >= sets ||
        token_keys.len < count * 8 || token_values.len < count * 8) {
        PyErr_SetString(PyExc_ValueError,
                        "fill: tables of unequal size, a mask past them, or token arrays too "
                        "short");
        goto release_all;
    }
    left = PyList_New(0);
    if (left == NULL) goto release_all;
    const int64_t *keys_of = token_keys.buf;
    int64_t *hashes_of = token_values.buf;
    for (Py_ssize_t n = 0; n < PyList_GET_SIZE(missing); n++) {
        PyObject *item = PyList_GET_ITEM(missing, n);
        Py_ssize_t at = PyLong_AsSsize_t(item);
        if (at == -1 && PyErr_Occurred()) goto fail;
        if (at < 0 || at >= count) {
            PyErr_SetString(PyExc_IndexError, "fill: a missing position past the tokens");
            goto fail;
        }
        PyObject *token = PyList_GET_ITEM(tokens, at);
        if (!PyUnicode_Check(token)) {
            PyErr_SetString(PyExc_TypeError, "fill: tokens must be str");
            goto fail;
        }
        Py_ssize_t size;
        const char *text = NULL;
        if (PyUnicode_Tailmatch(token, pair_prefix, 0, 4, -1) == 0) {
            text = PyUnicode_AsUTF8AndSize(token, &size);
            if (text == NULL) PyErr_Clear(); /* a lone surrogate: hashlib's way, in Python */
        }
        if (text == NULL) {
            if (PyList_Append(left, item) < 0) goto fail;
            continue;
        }
        int64_t digest = blake2b_64((const unsigned char *)text, (size_t)size);
        hashes_of[at] = digest;
        put_one(keys.buf, values.buf, mask, keys_of[at], digest);
    }
    goto release_all;

fail:
    Py_CLEAR(left);
release_all:
    PyBuffer_Release(&token_values);
release_token_keys:
    PyBuffer_Release(&token_keys);
release_values:
    PyBuffer_Release(&values);
release_keys:
    PyBuffer_Release(&keys);
    return left;
}

static PyMethodDef methods[] = {
    {"probe", (PyCFunction)(void (*)(void))probe, METH_FASTCALL, probe_doc},
    {"fill", (PyCFunction)(void (*)(void))fill, METH_FASTCALL, fill_doc},
    {"blake64", (PyCFunction)blake64, METH_O, blake64_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "_digest_probe",
    "The token digest cache's lookup for a list of tokens (see digest_cache.py).", -1, methods,
    NULL, NULL, NULL, NULL,
};

PyMODINIT_FUNC PyInit__digest_probe(void) {
    pair_prefix = PyUnicode_InternFromString("osb:");
    if (pair_prefix == NULL) return NULL;
    return PyModule_Create(&module);
}
