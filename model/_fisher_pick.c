/* Robinson's f of a message's tokens and the ones Fisher's method uses, in one pass: the
 * compiled form of fisher.python_pick (RobinsonFisher._checked_f, then _selected), which
 * stays as the fallback and the specification the tests hold this to.
 *
 * In numpy those are about twenty whole-array calls for a message's two or three hundred
 * tokens (the rates, their check, f in three steps, the sort keys, the usable ones, a
 * partition and a sort), each with its own allocation and dispatch; here it is one loop.
 *
 * The same floating-point operations in the same order as the numpy code, element by
 * element, so f comes out bit for bit the same (IEEE division, product and sum are exactly
 * rounded either way; setup.py turns off contracting a product and a sum into one).  The
 * choice is the same too: a stable sort of the usable tokens by -|f - 0.5|, the first cap.
 *
 * The arrays come through the buffer protocol (no numpy headers): the counts as C-contiguous
 * int64 of shape (n, 2), and two outputs of n slots, float64 and int64.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <math.h>
#include <stdint.h>

#include "_typed_buffer.h"

/* Writes f of every token to ``f``; returns 0, or -1 when a count is negative or above its
 * class count (read as unsigned and divided, as the numpy code checks, a rate above 1). */
static int robinson_f(const int64_t *counts, Py_ssize_t n, double ham_total, double spam_total,
                      double strength, double assumed, double *f) {
    const double prior = strength * assumed;
    for (Py_ssize_t i = 0; i < n; i++) {
        double ham = (double)(uint64_t)counts[2 * i];
        double spam = (double)(uint64_t)counts[2 * i + 1];
        double ham_rate = ham / ham_total, spam_rate = spam / spam_total;
        if (ham_rate > 1.0 || spam_rate > 1.0) return -1;
        double rate_total = ham_rate + spam_rate;
        if (!(rate_total >= 5e-324)) rate_total = 5e-324; /* np.maximum with the least double */
        double p = spam_rate / rate_total;
        double seen = ham + spam;
        double value = seen * p;
        value += prior;
        value /= strength + seen;
        f[i] = value;
    }
    return 0;
}

/* Usable tokens in index order, or with a cap the first ``cap`` of them by (key, index):
 * key = -|f - 0.5| as copysign(f - 0.5, -1) gives it.  ``keys`` has room for min(cap, n).
 * Returns how many were chosen, written to ``chosen``. */
static Py_ssize_t choose(const double *f, Py_ssize_t n, double min_deviation, Py_ssize_t cap,
                         double *keys, int64_t *chosen) {
    const double bound = -min_deviation;
    Py_ssize_t kept = 0;
    for (Py_ssize_t i = 0; i < n; i++) {
        double key = copysign(f[i] - 0.5, -1.0);
        int usable = min_deviation > 0 ? key <= bound : key < 0.0; /* NaN never is */
        if (!usable) continue;
        if (cap < 0) {
            chosen[kept++] = i;
            continue;
        }
        /* A later token with an equal key sorts after the ones kept: it must be smaller. */
        if (kept == cap && !(key < keys[kept - 1])) continue;
        Py_ssize_t at = kept < cap ? kept : cap - 1;
        while (at > 0 && key < keys[at - 1]) {
            keys[at] = keys[at - 1];
            chosen[at] = chosen[at - 1];
            at--;
        }
        keys[at] = key;
        chosen[at] = i;
        if (kept < cap) kept++;
    }
    return kept;
}

PyDoc_STRVAR(pick_doc,
"pick(counts, ham_total, spam_total, strength, assumed, min_deviation, cap, out_f, out_chosen)\n"
"-> count\n\n"
"counts: int64 of shape (n, 2), (ham, spam) per token; the class totals positive and below\n"
"2**52.  Writes Robinson's f of every token to out_f (n slots) and the tokens used to\n"
"out_chosen: with cap -1 every usable one in index order, else the cap most extreme, most\n"
"extreme first.  Returns how many were chosen, or -1 when a count is negative or above its\n"
"class count.");

static PyObject *pick(PyObject *Py_UNUSED(module), PyObject *const *args, Py_ssize_t nargs) {
    if (nargs != 9) {
        PyErr_SetString(PyExc_TypeError, "pick(counts, ham_total, spam_total, strength, "
                                         "assumed, min_deviation, cap, out_f, out_chosen)");
        return NULL;
    }
    long long ham_total = PyLong_AsLongLong(args[1]);
    long long spam_total = PyLong_AsLongLong(args[2]);
    double strength = PyFloat_AsDouble(args[3]);
    double assumed = PyFloat_AsDouble(args[4]);
    double min_deviation = PyFloat_AsDouble(args[5]);
    Py_ssize_t cap = PyLong_AsSsize_t(args[6]);
    if (PyErr_Occurred()) return NULL;
    if (ham_total <= 0 || spam_total <= 0 || ham_total >= (1LL << 52) ||
        spam_total >= (1LL << 52) || cap < -1) {
        PyErr_SetString(PyExc_ValueError, "pick: class totals must be in [1, 2**52), cap >= -1");
        return NULL;
    }
    Py_buffer counts, out_f, out_chosen;
    if (int64_buffer(args[0], &counts, 0, "counts") < 0) return NULL;
    PyObject *result = NULL;
    double *keys = NULL;
    if (float64_buffer(args[7], &out_f, 1, "out_f") < 0) goto release_counts;
    if (int64_buffer(args[8], &out_chosen, 1, "out_chosen") < 0) goto release_f;
    Py_ssize_t n = counts.len / 16;
    if (counts.len % 16 || out_f.len < n * 8 || out_chosen.len < n * 8) {
        PyErr_SetString(PyExc_ValueError, "pick: counts must be (n, 2), outputs n long");
        goto release_all;
    }
    Py_ssize_t room = cap < 0 || cap > n ? n : cap;
    keys = PyMem_Malloc((room ? room : 1) * sizeof(double));
    if (keys == NULL) {
        PyErr_NoMemory();
        goto release_all;
    }
    Py_ssize_t kept = -1;
    if (robinson_f(counts.buf, n, (double)ham_total, (double)spam_total, strength, assumed,
                   out_f.buf) == 0)
        kept = cap == 0 ? 0 : choose(out_f.buf, n, min_deviation, cap, keys, out_chosen.buf);
    result = PyLong_FromSsize_t(kept);
    PyMem_Free(keys);
release_all:
    PyBuffer_Release(&out_chosen);
release_f:
    PyBuffer_Release(&out_f);
release_counts:
    PyBuffer_Release(&counts);
    return result;
}

static PyMethodDef methods[] = {
    {"pick", (PyCFunction)(void (*)(void))pick, METH_FASTCALL, pick_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "_fisher_pick",
    "Robinson's f and Fisher's choice of tokens in one loop (fisher.python_pick in C).", -1,
    methods,
};

PyMODINIT_FUNC PyInit__fisher_pick(void) { return PyModule_Create(&module); }
