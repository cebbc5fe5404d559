/* What both compiled modules need (retriever/_kernels.c, reranker/features/_fused.c):
 * reading arrays through the buffer protocol with their item types checked, and the term
 * overlap of one article (binary search over its sorted term ids).
 *
 * Header-only: each module is one translation unit, and these are small static functions
 * the compiler inlines where it pays. Only the buffer protocol is used (no numpy headers),
 * so building needs only a C compiler and Python's headers. setup.py lists this file as a
 * dependency of both modules, so editing it rebuilds both.
 */
#ifndef HUNCHWISE_H
#define HUNCHWISE_H

#ifndef PY_SSIZE_T_CLEAN
#define PY_SSIZE_T_CLEAN
#endif
#include <Python.h>
#include <stdint.h>
#include <stdio.h>
#include <string.h>

/* Get a C-contiguous buffer of `obj` (writable if asked) whose items are `type`: "float64",
 * "float32", "float32|float64", "int64", "int32" or "bool". On a mismatch, raise TypeError naming
 * the argument (`name`), release the buffer and return -1; 0 when it fits. */
static int hw_buffer(PyObject *obj, Py_buffer *view, const char *type, int writable,
                     const char *name) {
    if (PyObject_GetBuffer(obj, view,
                           PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | (writable ? PyBUF_WRITABLE : 0)) <
        0)
        return -1;
    const char *got = view->format ? view->format : "B";
    if (got[0] == '<' || got[0] == '=' || got[0] == '@') got++;
    const Py_ssize_t size = view->itemsize;
    const int f32 = strcmp(got, "f") == 0 && size == 4, f64 = strcmp(got, "d") == 0 && size == 8;
    /* 'l' is int64 on LP64 systems and int32 on Windows; 'q' is always int64 */
    const int is_int = strcmp(got, "q") == 0 || strcmp(got, "l") == 0 || strcmp(got, "i") == 0;
    int ok = 0;
    if (strcmp(type, "float64") == 0) ok = f64;
    else if (strcmp(type, "float32") == 0) ok = f32;
    else if (strcmp(type, "float32|float64") == 0) ok = f32 || f64;
    else if (strcmp(type, "int64") == 0) ok = is_int && size == 8;
    else if (strcmp(type, "int32") == 0) ok = is_int && size == 4;
    else if (strcmp(type, "bool") == 0) ok = strcmp(got, "?") == 0 && size == 1;
    if (!ok) {
        PyErr_Format(PyExc_TypeError, "%s: expected a %s array, got format '%s'", name, type, got);
        PyBuffer_Release(view);
        return -1;
    }
    return 0;
}

/* Get the buffers of objs[0..n) into views[0..n), as hw_buffer does, from a spec of n
 * space-separated "name:type" words ("+name:type" for a writable one), e.g.
 * "indptr:int64 +out:float64". On a mismatch every buffer already got is released and -1
 * returned (views must start zeroed). */
static int hw_buffers(PyObject *const *objs, Py_buffer *views, Py_ssize_t n, const char *spec) {
    for (Py_ssize_t i = 0; i < n; i++) {
        char name[32], type[32];
        int writable = 0, used = 0;
        while (*spec == ' ') spec++;
        if (*spec == '+') {
            writable = 1;
            spec++;
        }
        if (sscanf(spec, "%31[^:]:%31s%n", name, type, &used) != 2) {
            PyErr_SetString(PyExc_SystemError, "hw_buffers: a malformed spec");
            used = -1;
        }
        if (used < 0 || hw_buffer(objs[i], &views[i], type, writable, name) < 0) {
            for (Py_ssize_t j = 0; j < i; j++) PyBuffer_Release(&views[j]);
            return -1;
        }
        spec += used;
    }
    return 0;
}

/* Release the views of views[0..n) that are held. */
static inline void hw_release(Py_buffer *views, Py_ssize_t n) {
    for (Py_ssize_t i = 0; i < n; i++)
        if (views[i].obj) PyBuffer_Release(&views[i]);
}

/* How many of the clue's terms tids[0..m) (sorted, distinct) the article's term list
 * terms[lo..hi) (sorted) holds, into *count, and the sum of their weights[], added in
 * increasing term order, into *weight. Each clue term is looked up by binary search in the
 * article's list, starting where the previous (smaller) term was found. */
static inline void hw_overlap(const int32_t *terms, int64_t lo, int64_t hi, const int64_t *tids,
                              const double *weights, Py_ssize_t m, double *count,
                              double *weight) {
    double c = 0, w = 0;
    for (Py_ssize_t j = 0; j < m && lo < hi; j++) {
        int64_t a = lo, b = hi;
        while (a < b) {
            const int64_t mid = a + (b - a) / 2;
            if (terms[mid] < tids[j]) a = mid + 1;
            else b = mid;
        }
        if (a < hi && terms[a] == tids[j]) {
            c += 1;
            w += weights[j];
            a++;
        }
        lo = a;
    }
    *count = c;
    *weight = w;
}

#endif /* HUNCHWISE_H */
