/* The one helper the model's C modules share (_digest_probe.c, _pair_hashes.c): an array
 * through the buffer protocol (no numpy headers), checked to be C-contiguous int64. */
#ifndef MAILWEIR_INT64_BUFFER_H
#define MAILWEIR_INT64_BUFFER_H

#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <string.h>

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

#endif
