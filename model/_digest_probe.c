/* The token digest cache's lookup for a message's tokens, in one pass: the compiled form of
 * digest_cache.DigestCache.probe's Python steps (keys_of, then get's whole-array steps),
 * which stay as the fallback and the specification the tests hold this to.
 *
 * In Python the lookup is about a dozen numpy calls of a few microseconds each, for some
 * two hundred tokens; here it is one loop: each token's str hash (kept in the str since
 * the tokenizer made it), its set's eight keys compared, the way that holds it read.
 *
 * The arrays come through the buffer protocol (no numpy headers): the tables as
 * digest_cache.py makes them, C-contiguous int64 of shape (sets, 8), and two int64 arrays
 * of one slot per token to fill.  The caller holds the cache's lock.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <stdint.h>
#include <string.h>

#define WAYS 8

/* A C-contiguous buffer of int64 (the formats numpy gives int64 on LP64 systems). */
static int int64_buffer(PyObject *array, Py_buffer *view, int writable, const char *name) {
    int flags = PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | (writable ? PyBUF_WRITABLE : 0);
    if (PyObject_GetBuffer(array, view, flags) < 0) return -1;
    const char *format = view->format == NULL ? "B" : view->format;
    if (format[0] == '<' || format[0] == '=' || format[0] == '@') format++;
    if (view->itemsize != 8 || (strcmp(format, "q") != 0 && strcmp(format, "l") != 0)) {
        PyErr_Format(PyExc_TypeError, "%s must hold int64", name);
        PyBuffer_Release(view);
        return -1;
    }
    return 0;
}

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
    for (Py_ssize_t i = 0; i < count; i++) {
        Py_hash_t key = PyObject_Hash(PyList_GET_ITEM(tokens, i));
        if (key == -1) goto fail;
        const int64_t *set = held + ((int64_t)key & mask) * WAYS;
        int way = 0;
        while (way < WAYS && set[way] != (int64_t)key) way++;
        token_keys[i] = (int64_t)key;
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

static PyMethodDef methods[] = {
    {"probe", (PyCFunction)(void (*)(void))probe, METH_FASTCALL, probe_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "_digest_probe",
    "The token digest cache's lookup for a list of tokens (see digest_cache.py).", -1, methods,
    NULL, NULL, NULL, NULL,
};

PyMODINIT_FUNC PyInit__digest_probe(void) { return PyModule_Create(&module); }
