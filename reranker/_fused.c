/* The within-clue score features of one candidate set in one call (see fused_builtins in
 * reranker/builtin.py, which defines the row order and holds the Python twin).
 *
 * Written by hand for speed: for the 20 or so candidates of a clue, these thirteen rows are
 * a few hundred floating-point operations, and computing them in Python or numpy costs tens
 * of microseconds of interpreter overhead, right after the query has left the CPU caches
 * cold. The feature functions in builtin.py remain the definitions; a test checks this
 * kernel against them and against the Python twin.
 *
 * Only the buffer protocol is used (no numpy headers).
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <math.h>
#include <string.h>

static int get(PyObject *obj, Py_buffer *view, int writable, const char *name) {
    if (PyObject_GetBuffer(obj, view,
                           PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | (writable ? PyBUF_WRITABLE : 0)) <
        0)
        return -1;
    const char *f = view->format ? view->format : "B";
    if (f[0] == '<' || f[0] == '=' || f[0] == '@') f++;
    if (strcmp(f, "d") != 0) {
        PyErr_Format(PyExc_TypeError, "%s: expected a float64 array, got format '%s'", name, f);
        PyBuffer_Release(view);
        return -1;
    }
    return 0;
}

PyDoc_STRVAR(within_clue_doc,
"within_clue(scores, ranks, mean, words, out)\n"
"\n"
"Fill out (float64, 13 * n, rows of n) with, per candidate: softmax of the scores, the\n"
"score, score - mean, score - best rival, score / top, z-score, softmax x log1p(words),\n"
"score x words, rank, 1 / rank, gap to the next score, words, log1p(words). scores and\n"
"ranks are float64 of length n >= 1; mean is the scores' mean as numpy adds them.");

static PyObject *within_clue(PyObject *self, PyObject *args) {
    PyObject *o_scores, *o_ranks, *o_out;
    double mean;
    Py_ssize_t words;
    (void)self;
    if (!PyArg_ParseTuple(args, "OOdnO", &o_scores, &o_ranks, &mean, &words, &o_out))
        return NULL;
    Py_buffer sv = {0}, rv = {0}, ov = {0};
    PyObject *result = NULL;
    if (get(o_scores, &sv, 0, "scores") < 0 || get(o_ranks, &rv, 0, "ranks") < 0 ||
        get(o_out, &ov, 1, "out") < 0)
        goto done;
    const Py_ssize_t n = sv.len / 8;
    if (n < 1 || rv.len / 8 != n || ov.len / 8 != 13 * n) {
        PyErr_SetString(PyExc_ValueError, "within_clue: need n >= 1 scores and ranks, 13n out");
        goto done;
    }
    const double *s = sv.buf, *r = rv.buf;
    double *f = ov.buf;
    Py_ssize_t lead = 0;
    for (Py_ssize_t i = 1; i < n; i++)
        if (s[i] > s[lead]) lead = i; /* the first best, as a stable sort would put it */
    const double best = s[lead];
    double second = -HUGE_VAL, total = 0, squares = 0;
    for (Py_ssize_t i = 0; i < n; i++) {
        if (i != lead && s[i] > second) second = s[i];
        f[i] = exp(s[i] - best);
        total += f[i];
        const double c = s[i] - mean;
        squares += c * c;
    }
    const double sd = sqrt(squares / (double)n);
    const double lw = log1p((double)words), w = (double)words;
    for (Py_ssize_t i = 0; i < n; i++) {
        const double c = s[i] - mean;
        f[i] /= total;
        f[n + i] = s[i];
        f[2 * n + i] = c;
        f[3 * n + i] = s[i] - best; /* everyone's best rival is the leader, except the leader's */
        f[4 * n + i] = best > 0 ? s[i] / best : 0.0;
        f[5 * n + i] = sd > 0 ? c / sd : 0.0;
        f[6 * n + i] = f[i] * lw;
        f[7 * n + i] = s[i] * w;
        f[8 * n + i] = r[i];
        f[9 * n + i] = 1.0 / r[i];
        f[10 * n + i] = i + 1 < n ? s[i] - s[i + 1] : 0.0;
        f[11 * n + i] = w;
        f[12 * n + i] = lw;
    }
    if (n > 1) f[3 * n + lead] = best - second;
    result = Py_None;
    Py_INCREF(result);
done:;
    Py_buffer *all[] = {&sv, &rv, &ov};
    for (int i = 0; i < 3; i++)
        if (all[i]->obj) PyBuffer_Release(all[i]);
    return result;
}

static PyMethodDef methods[] = {
    {"within_clue", within_clue, METH_VARARGS, within_clue_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "_fused", "Compiled within-clue features (see _fused.c).", -1,
    methods, NULL, NULL, NULL, NULL,
};

PyMODINIT_FUNC PyInit__fused(void) { return PyModule_Create(&module); }
