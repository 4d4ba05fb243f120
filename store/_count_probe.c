/* The count cache's lookup for a message's token hashes, in one pass: the compiled form of
 * cache.CountCache.python_get (its home buckets, row scan and onward search in numpy and
 * Python), which stays as the fallback and the specification the tests hold this to.
 *
 * The table is cache.py's: int64 rows of 16, eight keys then their counts, each (ham, spam)
 * pair the two int32 halves of one int64.  A hash's home bucket is the top 32 bits of
 * hash * 0x9E3779B97F4A7C15 scaled to the bucket count; a miss in a bucket something passed
 * over (spilled) goes on to the next bucket, until one nothing passed over.  Every slot of a
 * row is compared: an empty slot holds a key whose home is the next bucket, which no search
 * reading this bucket looks for.
 *
 * put_few does CountCache._put_few's walk for the handful of entries a message brings
 * (CountCache.python_put_few spells it out): in Python each took a few microseconds of
 * list and array indexing.
 *
 * The arrays come through the buffer protocol (no numpy headers).  The caller holds the
 * store's lock.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <stdint.h>
#include <string.h>

#define BUCKET 8
#define ROW (2 * BUCKET)
#define MIX 0x9E3779B97F4A7C15ULL

/* A C-contiguous buffer whose items are `size` bytes of one of the given struct formats. */
static int typed_buffer(PyObject *array, Py_buffer *view, int writable, Py_ssize_t size,
                        const char *formats, const char *name) {
    int flags = PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | (writable ? PyBUF_WRITABLE : 0);
    if (PyObject_GetBuffer(array, view, flags) < 0) return -1;
    const char *format = view->format == NULL ? "B" : view->format;
    if (format[0] == '<' || format[0] == '=' || format[0] == '@') format++;
    if (view->itemsize != size || strlen(format) != 1 || strchr(formats, format[0]) == NULL) {
        PyErr_Format(PyExc_TypeError, "%s has the wrong item type", name);
        PyBuffer_Release(view);
        return -1;
    }
    return 0;
}

/* The top 32 bits of hash * MIX, scaled to the bucket count. */
static inline uint64_t home_bucket(int64_t key, uint64_t buckets) {
    uint64_t top = ((uint64_t)key * MIX) >> 32;
    return (top * buckets) >> 32;
}

PyDoc_STRVAR(get_doc,
"get(hashes, table, spilled, out_counts, out_found)\n\n"
"For each int64 hash: out_counts[i] = its (ham, spam) counts as int64, out_found[i] =\n"
"whether the table holds it ((0, 0) and False where not).  table: int64 (buckets, 16);\n"
"spilled: bool (buckets,); out_counts: int64 (n, 2); out_found: bool (n,).");

static PyObject *get(PyObject *Py_UNUSED(module), PyObject *const *args, Py_ssize_t nargs) {
    if (nargs != 5) {
        PyErr_SetString(PyExc_TypeError,
                        "get(hashes, table, spilled, out_counts, out_found)");
        return NULL;
    }
    Py_buffer hashes, table, spilled, counts, found;
    PyObject *result = NULL;
    if (typed_buffer(args[0], &hashes, 0, 8, "ql", "hashes") < 0) return NULL;
    if (typed_buffer(args[1], &table, 0, 8, "ql", "table") < 0) goto release_hashes;
    if (typed_buffer(args[2], &spilled, 0, 1, "?", "spilled") < 0) goto release_table;
    if (typed_buffer(args[3], &counts, 1, 8, "ql", "out_counts") < 0) goto release_spilled;
    if (typed_buffer(args[4], &found, 1, 1, "?", "out_found") < 0) goto release_counts;

    Py_ssize_t count = hashes.len / 8;
    uint64_t buckets = (uint64_t)spilled.len;
    if (buckets == 0 || table.len != (Py_ssize_t)(buckets * ROW * 8) ||
        counts.len < count * 16 || found.len < count) {
        PyErr_SetString(PyExc_ValueError,
                        "get: table and spilled disagree in buckets, or outputs too short");
        goto release_all;
    }
    const int64_t *keys = hashes.buf, *rows = table.buf;
    const char *passed = spilled.buf;
    int64_t *out = counts.buf;
    char *held = found.buf;
    /* Ask for every home row first, so the memory reads for a message's few hundred
     * hashes overlap instead of each waiting in turn in the loop below (the table is tens
     * of MB, and other work on the core evicts it between messages). */
    for (Py_ssize_t i = 0; i < count; i++) {
        const int64_t *row = rows + home_bucket(keys[i], buckets) * ROW;
        __builtin_prefetch(row);
        __builtin_prefetch(row + BUCKET);
    }
    for (Py_ssize_t i = 0; i < count; i++) {
        int64_t key = keys[i];
        uint64_t bucket = home_bucket(key, buckets);
        int way = BUCKET;
        for (uint64_t looked = 0; looked < buckets; looked++) {
            const int64_t *row = rows + bucket * ROW;
            for (way = 0; way < BUCKET && row[way] != key; way++) {}
            if (way < BUCKET || !passed[bucket]) break;
            bucket = (bucket + 1) % buckets;
        }
        int32_t pair[2] = {0, 0};
        if (way < BUCKET) memcpy(pair, rows + bucket * ROW + BUCKET + way, sizeof pair);
        out[2 * i] = pair[0];
        out[2 * i + 1] = pair[1];
        held[i] = way < BUCKET;
    }
    result = Py_NewRef(Py_None);

release_all:
    PyBuffer_Release(&found);
release_counts:
    PyBuffer_Release(&counts);
release_spilled:
    PyBuffer_Release(&spilled);
release_table:
    PyBuffer_Release(&table);
release_hashes:
    PyBuffer_Release(&hashes);
    return result;
}

PyDoc_STRVAR(put_few_doc,
"put_few(hashes, counts, table, spilled, fill, room) -> added, or -1\n\n"
"CountCache._put_few's walk in C: each hash's counts overwritten where its bucket or one after\n"
"holds it, else placed in the first bucket from its home with a free slot (marking each full\n"
"bucket passed over as spilled).  The first of repeated hashes wins, and new hashes go in\n"
"from the last to the first, as python_put_few puts them.  Returns the entries added, or -1\n"
"(nothing written) when the distinct hashes are more than room.  hashes: int64 (n,); counts:\n"
"int64 (n, 2); table: int64 (buckets, 16); spilled: bool (buckets,); fill: uint8 (buckets,).");

static PyObject *put_few(PyObject *Py_UNUSED(module), PyObject *const *args, Py_ssize_t nargs) {
    if (nargs != 6) {
        PyErr_SetString(PyExc_TypeError, "put_few(hashes, counts, table, spilled, fill, room)");
        return NULL;
    }
    Py_ssize_t room = PyLong_AsSsize_t(args[5]);
    if (room == -1 && PyErr_Occurred()) return NULL;
    Py_buffer hashes, counts, table, spilled, fill;
    PyObject *result = NULL;
    if (typed_buffer(args[0], &hashes, 0, 8, "ql", "hashes") < 0) return NULL;
    if (typed_buffer(args[1], &counts, 0, 8, "ql", "counts") < 0) goto release_hashes;
    if (typed_buffer(args[2], &table, 1, 8, "ql", "table") < 0) goto release_counts;
    if (typed_buffer(args[3], &spilled, 1, 1, "?", "spilled") < 0) goto release_table;
    if (typed_buffer(args[4], &fill, 1, 1, "B", "fill") < 0) goto release_spilled;
    Py_ssize_t count = hashes.len / 8;
    uint64_t buckets = (uint64_t)spilled.len;
    if (buckets == 0 || table.len != (Py_ssize_t)(buckets * ROW * 8) ||
        fill.len != spilled.len || counts.len != count * 16) {
        PyErr_SetString(PyExc_ValueError,
                        "put_few: table, spilled and fill disagree in buckets, or counts is not "
                        "(n, 2)");
        goto release_all;
    }
    const int64_t *keys = hashes.buf, *pairs = counts.buf;
    int64_t *rows = table.buf;
    char *passed = spilled.buf;
    unsigned char *used = fill.buf;
    Py_ssize_t distinct = 0;
    for (Py_ssize_t i = 0; i < count; i++) {
        Py_ssize_t j = 0;
        while (j < i && keys[j] != keys[i]) j++;
        distinct += j == i;
    }
    if (distinct > room) {
        result = PyLong_FromLong(-1);
        goto release_all;
    }
    long added = 0;
    for (Py_ssize_t i = count - 1; i >= 0; i--) { /* so the first of repeats is written last */
        int64_t key = keys[i];
        int32_t pair[2] = {(int32_t)pairs[2 * i], (int32_t)pairs[2 * i + 1]};
        uint64_t bucket = home_bucket(key, buckets);
        for (;;) {
            int64_t *row = rows + bucket * ROW;
            int way = 0;
            while (way < used[bucket] && row[way] != key) way++;
            if (way < used[bucket] || used[bucket] < BUCKET) {
                if (way == used[bucket]) { /* not held: the bucket's next free slot */
                    row[way] = key;
                    used[bucket]++;
                    added++;
                }
                memcpy(row + BUCKET + way, pair, sizeof pair);
                break;
            }
            passed[bucket] = 1;
            bucket = (bucket + 1) % buckets;
        }
    }
    result = PyLong_FromLong(added);
release_all:
    PyBuffer_Release(&fill);
release_spilled:
    PyBuffer_Release(&spilled);
release_table:
    PyBuffer_Release(&table);
release_counts:
    PyBuffer_Release(&counts);
release_hashes:
    PyBuffer_Release(&hashes);
    return result;
}

static PyMethodDef methods[] = {
    {"get", (PyCFunction)(void (*)(void))get, METH_FASTCALL, get_doc},
    {"put_few", (PyCFunction)(void (*)(void))put_few, METH_FASTCALL, put_few_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "_count_probe",
    "The count cache's lookup for an array of token hashes, and its put of a few (see\n"
    "cache.py).", -1, methods,
    NULL, NULL, NULL, NULL,
};

PyMODINIT_FUNC PyInit__count_probe(void) { return PyModule_Create(&module); }
