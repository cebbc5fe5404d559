/* overlap(): which of a clue's terms each of a few articles holds (article-major term
 * lists, binary search through include/hunchwise.h's hw_overlap). Included once by
 * _kernels.c, whose module exports it.
 */

PyDoc_STRVAR(overlap_doc,
"overlap(indptr, terms, rows, tids, weights, out_count, out_weight)\n"
"\n"
"For each row, how many of `tids` its term list holds and the sum of their `weights`.\n"
"\n"
"indptr (int64, n_rows + 1) and terms (int32): article-major term lists, each sorted and\n"
"    distinct. rows (int64): the articles asked about. tids (int64, sorted, distinct) and\n"
"    weights (float64): the clue's terms. out_count and out_weight (float64, one per row)\n"
"    receive the results; weights are added in increasing term order. Returns None.");

static PyObject *overlap(PyObject *self, PyObject *args) {
    PyObject *o_indptr, *o_terms, *o_rows, *o_tids, *o_weights, *o_count, *o_weight;
    (void)self;
    if (!PyArg_ParseTuple(args, "OOOOOOO", &o_indptr, &o_terms, &o_rows, &o_tids, &o_weights,
                          &o_count, &o_weight))
        return NULL;
    PyObject *const objs[7] = {o_indptr, o_terms, o_rows, o_tids, o_weights, o_count, o_weight};
    Py_buffer v[7] = {{0}}; /* in the order of objs */
    PyObject *result = NULL;
    if (hw_buffers(objs, v, 7,
                   "indptr:int64 terms:int32 rows:int64 tids:int64 weights:float64 "
                   "+out_count:float64 +out_weight:float64") < 0)
        goto done;
    {
        const int64_t *ip = v[0].buf, *rw = v[2].buf, *td = v[3].buf;
        const int32_t *tm = v[1].buf;
        const double *wt = v[4].buf;
        double *oc = v[5].buf, *ow = v[6].buf;
        const Py_ssize_t n_docs = v[0].len / 8 - 1, n_terms = v[1].len / 4;
        const Py_ssize_t n = v[2].len / 8, m = v[3].len / 8;
        if (v[4].len / 8 != m || v[5].len / 8 != n || v[6].len / 8 != n) {
            PyErr_SetString(PyExc_ValueError, "overlap: array lengths do not match");
            goto done;
        }
        for (Py_ssize_t i = 0; i < n; i++) {
            if (rw[i] < 0 || rw[i] >= n_docs || ip[rw[i]] < 0 || ip[rw[i]] > ip[rw[i] + 1] ||
                ip[rw[i] + 1] > n_terms) {
                PyErr_SetString(PyExc_ValueError, "overlap: a row lies outside the term lists");
                goto done;
            }
        }
        for (Py_ssize_t j = 1; j < m; j++) {
            if (td[j - 1] >= td[j]) {
                PyErr_SetString(PyExc_ValueError, "overlap: tids must be sorted and distinct");
                goto done;
            }
        }
        for (Py_ssize_t i = 0; i < n; i++) { /* microseconds of work: the GIL is kept */
            hw_overlap(tm, ip[rw[i]], ip[rw[i] + 1], td, wt, m, &oc[i], &ow[i]);
        }
    }
    result = Py_None;
    Py_INCREF(result);
done:;
    hw_release(v, 7);
    return result;
}
