/* Compiled kernels of the retrieval core:
 * search(): add the postings of one or many queries into a score buffer and select each
 * query's k best articles; overlap(): which of a clue's terms each of a few articles holds.
 *
 * Written by hand because this loop is the product's hot path and no library offers it in
 * this shape: scipy's sparse products score every article and leave the top-k selection to
 * numpy (a pass over the whole corpus per query), and the Python code around several numpy
 * calls costs more than the arithmetic for a 20-term clue. Here one call does a query's
 * postings, the selection over just the articles the postings touched, and the clean-up;
 * a batch is one call per thread. retriever/scoring.py holds the numpy path that gives the
 * same scores, bit for bit, where this module is not built, and tests compare the two.
 *
 * Arithmetic: each posting adds weight x (the query factor rounded to the weight type) in
 * the weight type, in plan order, as the numpy path does; build with -ffp-contract=off so
 * the compiler does not fuse the multiply and add, which would change the last bit.
 *
 * Only the buffer protocol is used (no numpy headers, see include/hunchwise.h), so building
 * needs only a C compiler and Python's headers.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <stdint.h>
#include <stdlib.h>
#include <math.h>
#include <string.h>

#include "hunchwise.h" /* hw_buffer, hw_overlap: shared with reranker/features/_fused.c */

/* Calls adding more postings than this (about 2 ms of work), or batches of this many
 * queries (a pruned query reads few postings, but a batch still takes milliseconds),
 * release the GIL. */
#define GIL_RELEASE_POSTINGS 2000000
#define GIL_RELEASE_QUERIES 16

#include "_topk.h"       /* Field, Heap: the inputs and the k best */
#include "_exhaustive.h" /* query_float, query_double: every posting, one buffer */

#include "_window.h"
#define DT(name) name##_float
#define T float
#define EPS 5.9604644775390625e-08
#include "_daat.h" /* daat_float: exact top-k over windows of rows, skipping postings */
#undef DT
#undef T
#undef EPS
#define DT(name) name##_double
#define T double
#define EPS 1.1102230246251565e-16
#include "_daat.h"
#undef DT
#undef T
#undef EPS

PyDoc_STRVAR(search_doc,
"search(buf, touched, k, fields, qptr, tids, qtf, out_rows, out_scores, out_counts,\n"
"       prune=0, out_work=None, allowed=None)\n"
"\n"
"Score a batch of queries and write each one's k best rows and scores, best first, ties\n"
"by row; only articles with a non-zero score are returned.\n"
"\n"
"buf: zeroed scores, one per article (float32 or float64, the weights' type); zero again\n"
"    on return. touched: int32 scratch, one slot per article.\n"
"fields: tuple of (indptr int64, docs int32, weight, scale float[, term_max, block_max]),\n"
"    the term-major postings of each scored field and its weight in the sum; term_max\n"
"    (one per term) and block_max (one per 64 postings) are the weights' maxima, which\n"
"    prune=1 needs in every field (weights must then be non-negative).\n"
"qptr (int64, n_queries + 1): query q owns terms qptr[q]:qptr[q+1] of tids (int64 term\n"
"    ids, distinct within a query, in the order they are added) and qtf (float64, how\n"
"    often each occurs in the query).\n"
"out_rows (int64) and out_scores (float64): n_queries * k slots, query q from q * k;\n"
"    out_counts (int64): how many of query q's slots were filled. out_work (int64, one per\n"
"    query): postings read, for tests and benchmarks. prune=1: the windowed path\n"
"    (_daat.h), which skips postings that cannot change the top k (same result).\n"
"    allowed (bool, one per article; with prune=1 only): rank only the rows it keeps.\n"
"    Returns None.");

typedef struct {
    Py_buffer indptr_view, docs_view, weight_view, tmax_view, bmax_view;
} FieldViews;

static PyObject *search(PyObject *self, PyObject *args) {
    PyObject *o_buf, *o_touched, *o_fields, *o_qptr, *o_tids, *o_qtf, *o_rows, *o_scores;
    PyObject *o_counts, *o_work = Py_None, *o_allowed = Py_None;
    Py_ssize_t k;
    int prune = 0;
    (void)self;
    if (!PyArg_ParseTuple(args, "OOnO!OOOOOO|pOO", &o_buf, &o_touched, &k, &PyTuple_Type,
                          &o_fields, &o_qptr, &o_tids, &o_qtf, &o_rows, &o_scores, &o_counts,
                          &prune, &o_work, &o_allowed))
        return NULL;
    if (k < 1) return PyErr_Format(PyExc_ValueError, "k must be at least 1, got %zd", k);
    const Py_ssize_t n_fields = PyTuple_GET_SIZE(o_fields);
    Field *fields = calloc(n_fields ? n_fields : 1, sizeof(Field));
    FieldViews *views = calloc(n_fields ? n_fields : 1, sizeof(FieldViews));
    Py_buffer buf = {0}, qptr = {0}, tids = {0}, qtf = {0}, rows = {0}, scores = {0};
    Py_buffer counts = {0}, scratch = {0}, workv = {0}, allowv = {0};
    const void **bmaxes = calloc(n_fields ? n_fields : 1, sizeof(void *));
    const void **tmaxes = calloc(n_fields ? n_fields : 1, sizeof(void *));
    DaatScratch psc = {0};
    Py_ssize_t got_fields = 0;
    PyObject *result = NULL;
    Heap heap = {0};
    if (!fields || !views || !bmaxes || !tmaxes) {
        PyErr_NoMemory();
        goto done;
    }
    if (hw_buffer(o_buf, &buf, "float32|float64", 1, "buf") < 0) goto done;
    if (hw_buffer(o_touched, &scratch, "int32", 1, "touched") < 0) goto done;
    if (scratch.len / 4 < buf.len / buf.itemsize) {
        PyErr_SetString(PyExc_ValueError, "touched must have one int32 slot per article");
        goto done;
    }
    const char *wfmt = buf.itemsize == 4 ? "float32" : "float64";
    for (; got_fields < n_fields; got_fields++) {
        PyObject *spec = PyTuple_GET_ITEM(o_fields, got_fields);
        FieldViews *v = &views[got_fields];
        if (!PyTuple_Check(spec) || (PyTuple_GET_SIZE(spec) != 4 && PyTuple_GET_SIZE(spec) != 6)) {
            PyErr_SetString(PyExc_TypeError,
                            "fields must be (indptr, docs, weight, scale[, term_max, block_max])");
            goto done;
        }
        double scale = PyFloat_AsDouble(PyTuple_GET_ITEM(spec, 3));
        if (scale == -1.0 && PyErr_Occurred()) goto done;
        if (hw_buffer(PyTuple_GET_ITEM(spec, 0), &v->indptr_view, "int64", 0, "indptr") < 0 ||
            hw_buffer(PyTuple_GET_ITEM(spec, 1), &v->docs_view, "int32", 0, "docs") < 0 ||
            hw_buffer(PyTuple_GET_ITEM(spec, 2), &v->weight_view, wfmt, 0, "weight") < 0)
            goto done;
        Field *f = &fields[got_fields];
        f->indptr = v->indptr_view.buf;
        f->docs = v->docs_view.buf;
        f->weight = v->weight_view.buf;
        f->scale = scale;
        f->n_terms = v->indptr_view.len / 8 - 1;
        const Py_ssize_t n_post = v->docs_view.len / 4;
        if (f->n_terms < 0 || v->weight_view.len / v->weight_view.itemsize != n_post) {
            PyErr_SetString(PyExc_ValueError, "a field's indptr, docs and weight do not match");
            goto done;
        }
        f->n_post = n_post;
        if (PyTuple_GET_SIZE(spec) == 6) {
            if (hw_buffer(PyTuple_GET_ITEM(spec, 4), &v->tmax_view, wfmt, 0, "term_max") < 0 ||
                hw_buffer(PyTuple_GET_ITEM(spec, 5), &v->bmax_view, wfmt, 0, "block_max") < 0)
                goto done;
            if (v->tmax_view.len / v->tmax_view.itemsize != f->n_terms ||
                v->bmax_view.len / v->bmax_view.itemsize !=
                    (n_post + PRUNE_BLOCK - 1) / PRUNE_BLOCK) {
                PyErr_SetString(PyExc_ValueError,
                                "a field's term_max or block_max does not match its postings");
                goto done;
            }
            tmaxes[got_fields] = v->tmax_view.buf;
            bmaxes[got_fields] = v->bmax_view.buf;
        } else {
            prune = 0; /* every field needs its bounds */
        }
    }
    if (o_work != Py_None && hw_buffer(o_work, &workv, "int64", 1, "out_work") < 0) goto done;
    if (o_allowed != Py_None) { /* only the windowed path takes a row mask */
        if (hw_buffer(o_allowed, &allowv, "bool", 0, "allowed") < 0) goto done;
        if (!prune || allowv.len != buf.len / buf.itemsize) {
            PyErr_SetString(PyExc_ValueError,
                            "allowed needs prune=1, every field's bounds and one flag per article");
            goto done;
        }
    }
    if (hw_buffer(o_qptr, &qptr, "int64", 0, "qptr") < 0) goto done;
    if (hw_buffer(o_tids, &tids, "int64", 0, "tids") < 0) goto done;
    if (hw_buffer(o_qtf, &qtf, "float64", 0, "qtf") < 0) goto done;
    if (hw_buffer(o_rows, &rows, "int64", 1, "out_rows") < 0) goto done;
    if (hw_buffer(o_scores, &scores, "float64", 1, "out_scores") < 0) goto done;
    if (hw_buffer(o_counts, &counts, "int64", 1, "out_counts") < 0) goto done;
    {
        const Py_ssize_t n_docs = buf.len / buf.itemsize, n_tids = tids.len / 8;
        const Py_ssize_t n_queries = qptr.len / 8 - 1;
        const int64_t *qp = qptr.buf, *tid = tids.buf;
        if (qtf.len / 8 != n_tids) {
            PyErr_SetString(PyExc_ValueError, "tids and qtf differ in length");
            goto done;
        }
        if (n_queries < 0 || rows.len / 8 < n_queries * k || scores.len / 8 < n_queries * k ||
            counts.len / 8 < n_queries || (workv.obj && workv.len / 8 < n_queries)) {
            PyErr_SetString(PyExc_ValueError, "output arrays are too small for the queries");
            goto done;
        }
        int64_t work = 0; /* postings in the whole call */
        for (Py_ssize_t q = 0; q < n_queries; q++) {
            if (qp[q] < 0 || qp[q] > qp[q + 1] || qp[q + 1] > n_tids) {
                PyErr_SetString(PyExc_ValueError, "qptr is not a valid offsets array");
                goto done;
            }
            for (int64_t t = qp[q]; t < qp[q + 1]; t++) {
                for (Py_ssize_t f = 0; f < n_fields; f++) {
                    if (tid[t] < 0 || tid[t] >= fields[f].n_terms) {
                        PyErr_SetString(PyExc_ValueError, "a term id lies outside the vocabulary");
                        goto done;
                    }
                    /* Each used term range is checked before the GIL is released, so the
                     * loops below cannot read outside the postings whatever the arrays hold. */
                    const int64_t lo = fields[f].indptr[tid[t]], hi = fields[f].indptr[tid[t] + 1];
                    if (lo < 0 || lo > hi || hi > fields[f].n_post) {
                        PyErr_SetString(PyExc_ValueError,
                                        "a term's postings lie outside the field's arrays");
                        goto done;
                    }
                    work += hi - lo;
                }
            }
        }
        /* `touched` is used only while a query's postings are under half the corpus, so
         * one slot per article is always enough (it is the caller's, reused across calls:
         * no allocation or page faults per query). */
        int32_t *touched = scratch.buf;
        heap.cap = k < n_docs ? k : n_docs;
        heap.score = malloc((heap.cap ? heap.cap : 1) * sizeof(double));
        heap.row = malloc((heap.cap ? heap.cap : 1) * sizeof(int64_t));
        if (!heap.score || !heap.row) {
            PyErr_NoMemory();
            goto done;
        }
        int64_t *out_r = rows.buf, *out_n = counts.buf;
        double *out_s = scores.buf;
        const double *qf = qtf.buf;
        int damaged = 0;
        /* The GIL is released only for calls worth a few milliseconds (big batches, large
         * corpora). For a single clue of a few hundred microseconds, handing the GIL over
         * can cost more than the call: in a server whose other thread is busy, taking it
         * back waits for the interpreter's switch interval (5 ms by default). */
        PyThreadState *saved = work > GIL_RELEASE_POSTINGS || n_queries >= GIL_RELEASE_QUERIES
                                    ? PyEval_SaveThread()
                                    : NULL;
        int64_t *out_w = workv.obj ? workv.buf : NULL;
        const uint8_t *mask = allowv.obj ? allowv.buf : NULL;
        int oom = 0;
        for (Py_ssize_t q = 0; q < n_queries && !damaged && !oom; q++) {
            heap.size = 0;
            int64_t used = 0;
            Py_ssize_t got = -2;
            if (prune) {
                got = buf.itemsize == 4
                    ? daat_float(n_docs, fields, bmaxes, tmaxes, n_fields, tid, qf, qp[q],
                                 qp[q + 1], mask, &heap, &psc, out_r + q * k, out_s + q * k,
                                 &used)
                    : daat_double(n_docs, fields, bmaxes, tmaxes, n_fields, tid, qf, qp[q],
                                  qp[q + 1], mask, &heap, &psc, out_r + q * k, out_s + q * k,
                                  &used);
                oom = got == -3;
                if (mask && got == -2) { /* the exhaustive kernel takes no mask */
                    damaged = 1;
                    break;
                }
            }
            if (got >= 0) {
                out_n[q] = got;
                if (out_w) out_w[q] = used;
                continue;
            }
            heap.size = 0;
            if (out_w) {
                out_w[q] = 0;
                for (Py_ssize_t f = 0; f < n_fields; f++)
                    for (int64_t t = qp[q]; t < qp[q + 1]; t++)
                        out_w[q] += fields[f].indptr[tid[t] + 1] - fields[f].indptr[tid[t]];
            }
            out_n[q] = buf.itemsize == 4
                ? query_float(buf.buf, n_docs, fields, n_fields, tid, qf, qp[q], qp[q + 1],
                              touched, &heap, out_r + q * k, out_s + q * k)
                : query_double(buf.buf, n_docs, fields, n_fields, tid, qf, qp[q], qp[q + 1],
                               touched, &heap, out_r + q * k, out_s + q * k);
            damaged = out_n[q] < 0;
        }
        if (saved) PyEval_RestoreThread(saved);
        if (oom) {
            PyErr_NoMemory();
            goto done;
        }
        if (damaged) {
            PyErr_SetString(PyExc_ValueError,
                            "postings name a row outside the index: it is damaged; rebuild it");
            goto done;
        }
    }
    result = Py_None;
    Py_INCREF(result);
done:
    free(heap.score);
    free(heap.row);
    daat_scratch_free(&psc);
    free(bmaxes);
    free(tmaxes);
    if (views) {
        for (Py_ssize_t f = 0; f < n_fields; f++) {
            Py_buffer *vs[] = {&views[f].indptr_view, &views[f].docs_view, &views[f].weight_view,
                               &views[f].tmax_view, &views[f].bmax_view};
            for (int i = 0; i < 5; i++)
                if (vs[i]->obj) PyBuffer_Release(vs[i]);
        }
    }
    free(views);
    free(fields);
    Py_buffer *all[] = {&buf, &scratch, &qptr, &tids, &qtf, &rows, &scores, &counts, &workv,
                          &allowv};
    for (size_t i = 0; i < sizeof(all) / sizeof(all[0]); i++)
        if (all[i]->obj) PyBuffer_Release(all[i]);
    return result;
}

#include "_overlap.h" /* overlap(): a clue's terms in a few articles */

static PyMethodDef methods[] = {
    {"search", search, METH_VARARGS, search_doc},
    {"overlap", overlap, METH_VARARGS, overlap_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "_kernels", "Compiled kernels of the retrieval core (see _kernels.c).", -1,
    methods, NULL, NULL, NULL, NULL,
};

PyMODINIT_FUNC PyInit__kernels(void) { return PyModule_Create(&module); }
