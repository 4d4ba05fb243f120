/* A message's distinct word-pair hashes in order of first occurrence, in one pass: the
 * compiled form of pairs.python_first_pairs (pairs.osb_pair_hashes of each part, then
 * tokenize.first_occurrences), which stays as the fallback and the specification the
 * tests hold this to.
 *
 * In numpy that is about twenty whole-array calls for a 4 KB message's four or five hundred
 * pairs (the mix's shifts and products, a sort, a reduceat, a search), each with its own
 * allocation; here it is one loop: each pair mixed, then looked for in a small open-address
 * set of the pairs already kept, and kept if new, until the caller's room is full.
 *
 * The mix is pairs.py's: mix64(mix64(earlier + (k + 1) * GOLDEN) ^ later) on the words'
 * hashes read as unsigned, mix64 being the output step of Vigna's splitmix64.
 *
 * The arrays come through the buffer protocol (no numpy headers): each part's word hashes
 * as C-contiguous int64, and three int64 outputs of at least ``room`` slots.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include "_typed_buffer.h"

#define GOLDEN 0x9E3779B97F4A7C15ULL
#define MIX1 0xBF58476D1CE4E5B9ULL
#define MIX2 0x94D049BB133111EBULL
#define MAX_WINDOW 16

static inline uint64_t mix64(uint64_t z) {
    z = (z ^ (z >> 30)) * MIX1;
    z = (z ^ (z >> 27)) * MIX2;
    return z ^ (z >> 31);
}

/* The set: slots hold 1 + the output position of a kept pair, 0 when empty; the hash itself
 * is read from the output, so a slot is four bytes and no hash value needs to mean "empty". */
typedef struct {
    uint32_t *slots;
    uint64_t mask;
    const int64_t *kept;
} pair_set;

/* Keep ``hash`` unless already kept; returns 1 when it was new. */
static inline int keep_new(pair_set *set, int64_t *kept, Py_ssize_t count, int64_t hash) {
    /* The hash is already well mixed: its low bits pick the slot. */
    uint64_t slot = (uint64_t)hash & set->mask;
    while (set->slots[slot]) {
        if (kept[set->slots[slot] - 1] == hash) return 0;
        slot = (slot + 1) & set->mask;
    }
    set->slots[slot] = (uint32_t)(count + 1);
    kept[count] = hash;
    return 1;
}

PyDoc_STRVAR(first_pairs_doc,
"first_pairs(parts, window, room, per_part, out_hashes, out_part, out_at) -> count\n\n"
"parts: each text part's word hashes in order.  Over each part's first per_part pairs in\n"
"words.osb_pairs order (each later word with the window - 1 words before it, nearest first),\n"
"parts in turn, writes the first room distinct pair hashes: out_hashes[i] the hash,\n"
"out_part[i] its part, out_at[i] its place among that part's pairs.  Returns how many.");

static PyObject *first_pairs(PyObject *Py_UNUSED(module), PyObject *const *args,
                             Py_ssize_t nargs) {
    if (nargs != 7 || !PyList_Check(args[0])) {
        PyErr_SetString(PyExc_TypeError, "first_pairs(parts: list, window: int, room: int, "
                                         "per_part: int, out_hashes, out_part, out_at)");
        return NULL;
    }
    PyObject *parts = args[0];
    Py_ssize_t window = PyLong_AsSsize_t(args[1]);
    Py_ssize_t room = PyLong_AsSsize_t(args[2]);
    Py_ssize_t per_part = PyLong_AsSsize_t(args[3]);
    if (PyErr_Occurred()) return NULL;
    if (window < 2 || window > MAX_WINDOW || room < 0 || per_part < 0) {
        PyErr_SetString(PyExc_ValueError, "first_pairs: window must be 2..16, room and "
                                          "per_part at least 0");
        return NULL;
    }
    Py_ssize_t n_parts = PyList_GET_SIZE(parts);
    PyObject *result = NULL;
    Py_buffer out_hashes, out_part, out_at;
    if (int64_buffer(args[4], &out_hashes, 1, "out_hashes") < 0) return NULL;
    if (int64_buffer(args[5], &out_part, 1, "out_part") < 0) goto release_hashes;
    if (int64_buffer(args[6], &out_at, 1, "out_at") < 0) goto release_part;
    Py_buffer *words = NULL;
    Py_ssize_t opened = 0;
    pair_set set = {NULL, 0, NULL};
    if (out_hashes.len < room * 8 || out_part.len < room * 8 || out_at.len < room * 8) {
        PyErr_SetString(PyExc_ValueError, "first_pairs: outputs shorter than room");
        goto release_all;
    }
    words = PyMem_Calloc(n_parts ? n_parts : 1, sizeof(Py_buffer));
    if (words == NULL) {
        PyErr_NoMemory();
        goto release_all;
    }
    /* Every pair the parts can give, to size the set at most half full. */
    Py_ssize_t total = 0;
    for (; opened < n_parts; opened++) {
        if (int64_buffer(PyList_GET_ITEM(parts, opened), &words[opened], 0, "parts") < 0)
            goto release_all;
        Py_ssize_t length = words[opened].len / 8;
        Py_ssize_t span = window - 1, made = 0;
        if (length > 1) /* pairs with a later word among the first N - 1, then N - 1 each */
            made = length - 1 <= span ? (length - 1) * length / 2
                                      : span * (span - 1) / 2 + (length - span) * span;
        total += made < per_part ? made : per_part;
    }
    Py_ssize_t wanted = total < room ? total : room;
    if (wanted >= UINT32_MAX) {
        PyErr_SetString(PyExc_ValueError, "first_pairs: too many pairs");
        goto release_all;
    }
    uint64_t size = 16;
    while (size < 2 * (uint64_t)total + 2) size *= 2;
    set.mask = size - 1;
    set.slots = PyMem_Calloc(size, sizeof(uint32_t));
    if (set.slots == NULL) {
        PyErr_NoMemory();
        goto release_all;
    }
    int64_t *kept = out_hashes.buf, *kept_part = out_part.buf, *kept_at = out_at.buf;
    Py_ssize_t count = 0;
    for (Py_ssize_t p = 0; p < n_parts && count < wanted; p++) {
        const uint64_t *hashes = words[p].buf;
        Py_ssize_t length = words[p].len / 8, at = 0;
        for (Py_ssize_t later = 1; later < length && at < per_part && count < wanted; later++) {
            for (Py_ssize_t k = 0; k < window - 1 && k < later; k++, at++) {
                if (at >= per_part || count >= wanted) break;
                uint64_t inner = mix64(hashes[later - 1 - k] + (uint64_t)(k + 1) * GOLDEN);
                int64_t hash = (int64_t)mix64(inner ^ hashes[later]);
                if (keep_new(&set, kept, count, hash)) {
                    kept_part[count] = p;
                    kept_at[count] = at;
                    count++;
                }
            }
        }
    }
    result = PyLong_FromSsize_t(count);

release_all:
    PyMem_Free(set.slots);
    for (Py_ssize_t p = 0; p < opened; p++) PyBuffer_Release(&words[p]);
    PyMem_Free(words);
    PyBuffer_Release(&out_at);
release_part:
    PyBuffer_Release(&out_part);
release_hashes:
    PyBuffer_Release(&out_hashes);
    return result;
}

static PyMethodDef methods[] = {
    {"first_pairs", (PyCFunction)(void (*)(void))first_pairs, METH_FASTCALL, first_pairs_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "_pair_hashes",
    "A message's distinct word-pair hashes in order of first occurrence (see pairs.py).", -1,
    methods, NULL, NULL, NULL, NULL,
};

PyMODINIT_FUNC PyInit__pair_hashes(void) { return PyModule_Create(&module); }
