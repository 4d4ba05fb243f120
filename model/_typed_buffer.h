/* The helpers the model's C modules share (_digest_probe.c, _pair_hashes.c, _fisher_pick.c):
 * an array through the buffer protocol (no numpy headers), checked to be C-contiguous with
 * 8-byte items of one kind. */
#ifndef MAILWEIR_TYPED_BUFFER_H
#define MAILWEIR_TYPED_BUFFER_H

#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <string.h>

/* A C-contiguous buffer of 8-byte items whose struct format (after a byte-order mark) is one
 * of the letters in ``codes``; ``kind`` names them in the error. */
static inline int typed_buffer(PyObject *array, Py_buffer *view, int writable, const char *name,
                               const char *codes, const char *kind) {
    int flags = PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | (writable ? PyBUF_WRITABLE : 0);
    if (PyObject_GetBuffer(array, view, flags) < 0) return -1;
    const char *format = view->format == NULL ? "B" : view->format;
    if (format[0] == '<' || format[0] == '=' || format[0] == '@') format++;
    if (view->itemsize != 8 || format[0] == '\0' || format[1] != '\0' ||
        strchr(codes, format[0]) == NULL) {
        PyErr_Format(PyExc_TypeError, "%s must hold %s", name, kind);
        PyBuffer_Release(view);
        return -1;
    }
    return 0;
}

/* int64: the formats numpy gives int64 on LP64 systems. */
static inline int int64_buffer(PyObject *array, Py_buffer *view, int writable, const char *name) {
    return typed_buffer(array, view, writable, name, "ql", "int64");
}

static inline int float64_buffer(PyObject *array, Py_buffer *view, int writable,
                                 const char *name) {
    return typed_buffer(array, view, writable, name, "d", "float64");
}

#endif
