/* Every fused built-in feature of one candidate set in one call (see reranker/fused.py,
 * which calls it, reranker/builtin.py, which holds the definitions, and
 * reranker/rowtables.py, which fills the per-row tables read here).
 *
 * Written by hand for speed: for the 20 or so candidates of a clue the features are a few
 * thousand operations (the term overlap is most of them), while computing them with numpy
 * and Python sets costs tens of microseconds of interpreter overhead per clue, several
 * times the arithmetic. The feature functions in builtin.py remain the definitions, and
 * what runs where this module is not built; tests check this module against them.
 *
 * The column orders below (the output, the row table, the name spans) are each written once,
 * as an X-macro list giving both the enum and the exported names. The module exports them as
 * COLUMNS, ROW_VALUES and SPANS; fused.py refuses a build whose lists differ from its
 * FUSED_NAMES and rowtables' ROW_VALUES and SPANS (a stale build after an edit).
 *
 * Only the buffer protocol is used (no numpy headers, see include/hunchwise.h).
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include "hunchwise.h" /* hw_buffer, hw_overlap: shared with retriever/_kernels.c */

/* The output columns: fused.FUSED_NAMES. */
#define COLUMN_LIST(X)                                                                       \
    X(BM25_SCORE, "bm25_score")                                                              \
    X(BM25_RANK, "bm25_rank")                                                                \
    X(INVERSE_RANK, "inverse_rank")                                                          \
    X(GAP_TO_NEXT, "gap_to_next")                                                            \
    X(GAP_TO_BEST_RIVAL, "gap_to_best_rival")                                                \
    X(SCORE_RATIO_TO_TOP, "score_ratio_to_top")                                              \
    X(SCORE_ZSCORE, "score_zscore")                                                          \
    X(SCORE_SOFTMAX, "score_softmax")                                                        \
    X(CLUE_WORDS, "clue_words")                                                              \
    X(LOG_CLUE_WORDS, "log_clue_words")                                                      \
    X(SCORE_X_CLUE_WORDS, "score_x_clue_words")                                              \
    X(SOFTMAX_X_LOG_WORDS, "softmax_x_log_words")                                            \
    X(INLINKS, "inlinks")                                                                    \
    X(LOG_INLINKS, "log_inlinks")                                                            \
    X(LOG_INLINKS_VS_BEST, "log_inlinks_vs_best")                                            \
    X(LOG_POPULARITY, "log_popularity")                                                      \
    X(POPULARITY_MISSING, "popularity_missing")                                              \
    X(HAS_QUALIFIER, "has_qualifier")                                                        \
    X(QUALIFIER_IN_CLUE, "qualifier_in_clue")                                                \
    X(QUALIFIER_OVERLAP, "qualifier_overlap")                                                \
    X(TITLE_OVERLAP, "title_overlap")                                                        \
    X(ALIAS_OVERLAP, "alias_overlap")                                                        \
    X(MATCHED_TERMS, "matched_terms")                                                        \
    X(MATCHED_FRACTION, "matched_fraction")                                                  \
    X(MATCHED_RARITY, "matched_rarity")                                                      \
    X(LOG_DOC_LENGTH, "log_doc_length")                                                      \
    X(QUALIFIER_FREQUENCY, "qualifier_frequency")

/* The row table's columns: rowtables.ROW_VALUES. */
#define ROW_VALUE_LIST(X)                                                                    \
    X(RV_INLINKS, "inlinks")                                                                 \
    X(RV_LOG_INLINKS, "log_inlinks")                                                         \
    X(RV_LOG_POPULARITY, "log_popularity")                                                   \
    X(RV_POPULARITY_MISSING, "popularity_missing")                                           \
    X(RV_LOG_DOC_LENGTH, "log_doc_length")                                                   \
    X(RV_HAS_QUALIFIER, "has_qualifier")                                                     \
    X(RV_QUALIFIER_FREQUENCY, "qualifier_frequency")                                         \
    X(RV_FILLED, "(filled)")

/* The name spans' columns: rowtables.SPANS. */
#define SPAN_LIST(X)                                                                         \
    X(SP_READY, "ready")                                                                     \
    X(SP_START, "start")                                                                     \
    X(SP_BASE, "base")                                                                       \
    X(SP_QUALIFIER, "qualifier")                                                             \
    X(SP_ALIAS, "alias")

#define AS_ENUM(id, name) id,
#define AS_NAME(id, name) name,
enum { COLUMN_LIST(AS_ENUM) N_COLUMNS };
enum { ROW_VALUE_LIST(AS_ENUM) N_ROW_VALUES };
enum { SPAN_LIST(AS_ENUM) N_SPANS };
static const char *const column_names[] = {COLUMN_LIST(AS_NAME) NULL};
static const char *const row_value_names[] = {ROW_VALUE_LIST(AS_NAME) NULL};
static const char *const span_names[] = {SPAN_LIST(AS_NAME) NULL};

#include "_clueterms.h" /* read_terms, holds, in_clue */

/* The within-clue score features and the clue length of all n candidates (stride N_COLUMNS). */
static void within_clue(const double *s, const int64_t *rank, Py_ssize_t n, Py_ssize_t words,
                        double *f) {
    Py_ssize_t lead = 0;
    double sum = 0;
    for (Py_ssize_t i = 0; i < n; i++) {
        if (s[i] > s[lead]) lead = i; /* the first best, as a stable sort would put it */
        sum += s[i];
    }
    const double best = s[lead], mean = sum / (double)n;
    double second = -HUGE_VAL, total = 0, squares = 0;
    for (Py_ssize_t i = 0; i < n; i++) {
        double *row = f + i * N_COLUMNS;
        if (i != lead && s[i] > second) second = s[i];
        row[SCORE_SOFTMAX] = exp(s[i] - best);
        total += row[SCORE_SOFTMAX];
        const double c = s[i] - mean;
        squares += c * c;
    }
    const double sd = sqrt(squares / (double)n);
    const double lw = log1p((double)words), w = (double)words;
    for (Py_ssize_t i = 0; i < n; i++) {
        double *row = f + i * N_COLUMNS;
        const double c = s[i] - mean, r = (double)rank[i];
        row[SCORE_SOFTMAX] /= total;
        row[BM25_SCORE] = s[i];
        row[BM25_RANK] = r;
        row[INVERSE_RANK] = 1.0 / r;
        row[GAP_TO_NEXT] = i + 1 < n ? s[i] - s[i + 1] : 0.0;
        /* everyone's best rival is the leader, except the leader's */
        row[GAP_TO_BEST_RIVAL] = i == lead ? (n > 1 ? best - second : 0.0) : s[i] - best;
        row[SCORE_RATIO_TO_TOP] = best > 0 ? s[i] / best : 0.0;
        row[SCORE_ZSCORE] = sd > 0 ? c / sd : 0.0;
        row[CLUE_WORDS] = w;
        row[LOG_CLUE_WORDS] = lw;
        row[SCORE_X_CLUE_WORDS] = s[i] * w;
        row[SOFTMAX_X_LOG_WORDS] = row[SCORE_SOFTMAX] * lw;
    }
}

PyDoc_STRVAR(candidates_doc,
"candidates(out, scores, ranks, rows, words, table, spans, arena, clue_names, indptr, terms,\n"
"           clue_terms) -> bool\n"
"\n"
"Fill out (float64, n x len(COLUMNS)) with the COLUMNS features of n >= 1 candidates.\n"
"\n"
"scores (float64), ranks and rows (int64): the candidates. words: words of the clue seen.\n"
"table (float64, n_docs x ROW_VALUES) and spans (int64, n_docs x SPANS): per-row values and\n"
"    name-token spans into arena (int32), see reranker/rowtables.py. clue_names: name-token\n"
"    ids of the clue (ints). indptr (int64, n_docs + 1) and terms (int32): article-major term\n"
"    lists, sorted within a row. clue_terms: (term id, log(N/df)) of the clue's distinct\n"
"    known body terms. Returns False, writing nothing, when a row is not in the tables yet.");

static PyObject *candidates(PyObject *self, PyObject *args) {
    PyObject *o_out, *o_scores, *o_ranks, *o_rows, *o_table, *o_spans, *o_arena, *o_names;
    PyObject *o_indptr, *o_terms, *o_clue_terms;
    Py_ssize_t words;
    (void)self;
    if (!PyArg_ParseTuple(args, "OOOOnOOOOOOO", &o_out, &o_scores, &o_ranks, &o_rows, &words,
                          &o_table, &o_spans, &o_arena, &o_names, &o_indptr, &o_terms,
                          &o_clue_terms))
        return NULL;
    Py_buffer views[9] = {{0}};
    Py_buffer *const out = &views[0], *const sv = &views[1], *const rk = &views[2];
    Py_buffer *const rw = &views[3], *const tb = &views[4], *const sp = &views[5];
    Py_buffer *const ar = &views[6], *const ip = &views[7], *const tm = &views[8];
    int64_t *names = NULL, *clue = NULL;
    double *rarities = NULL;
    PyObject *result = NULL;
    PyObject *const objs[9] = {o_out, o_scores, o_ranks, o_rows, o_table, o_spans, o_arena,
                               o_indptr, o_terms};
    if (hw_buffers(objs, views, 9,
                   "+out:float64 scores:float64 ranks:int64 rows:int64 table:float64 "
                   "spans:int64 arena:int32 indptr:int64 terms:int32") < 0)
        goto done;
    const Py_ssize_t n = sv->len / 8, n_docs = ip->len / 8 - 1;
    if (n < 1 || rk->len / 8 != n || rw->len / 8 != n || out->len / 8 != n * N_COLUMNS) {
        PyErr_SetString(PyExc_ValueError,
                        "candidates: need n >= 1 scores, ranks and rows, and n x COLUMNS out");
        goto done;
    }
    if (n_docs < 0 || tb->len / 8 != n_docs * N_ROW_VALUES || sp->len / 8 != n_docs * N_SPANS) {
        PyErr_SetString(PyExc_ValueError, "candidates: row tables do not match the term lists");
        goto done;
    }
    const double *s = sv->buf, *table = tb->buf;
    const int64_t *rank = rk->buf, *row = rw->buf, *spans = sp->buf, *indptr = ip->buf;
    const int32_t *arena = ar->buf, *terms = tm->buf;
    const int64_t n_arena = ar->len / 4, n_terms = tm->len / 4;
    /* The candidates' rows are scattered over large tables that the query has just pushed
     * out of the CPU caches: ask for all of them at once, so the misses overlap instead of
     * queueing one after another in the loops below. */
    for (Py_ssize_t i = 0; i < n; i++) {
        const int64_t r = row[i];
        if (r >= 0 && r < n_docs) {
            __builtin_prefetch(table + r * N_ROW_VALUES);
            __builtin_prefetch(spans + r * N_SPANS);
            __builtin_prefetch(indptr + r);
        }
    }
    for (Py_ssize_t i = 0; i < n; i++) {
        const int64_t r = row[i];
        if (r >= 0 && r < n_docs && indptr[r] >= 0 && indptr[r] < n_terms)
            __builtin_prefetch(terms + indptr[r]);
    }
    for (Py_ssize_t i = 0; i < n; i++) { /* every index used below is checked first */
        const int64_t r = row[i];
        if (r < 0 || r >= n_docs) {
            PyErr_Format(PyExc_ValueError, "candidates: row %lld outside the index", (long long)r);
            goto done;
        }
        const int64_t *span = spans + r * N_SPANS;
        if (table[r * N_ROW_VALUES + RV_FILLED] == 0 || span[SP_READY] == 0) {
            result = Py_False; /* the caller fills the tables and calls again */
            Py_INCREF(result);
            goto done;
        }
        if (span[SP_START] < 0 || span[SP_BASE] < 0 || span[SP_QUALIFIER] < 0 ||
            span[SP_ALIAS] < 0 ||
            span[SP_START] + span[SP_BASE] + span[SP_QUALIFIER] + span[SP_ALIAS] > n_arena ||
            indptr[r] < 0 || indptr[r] > indptr[r + 1] || indptr[r + 1] > n_terms) {
            PyErr_Format(PyExc_ValueError, "candidates: the tables of row %lld are damaged",
                         (long long)r);
            goto done;
        }
    }
    const Py_ssize_t m_names = read_terms(o_names, &names, NULL, "clue_names");
    if (m_names < 0) goto done;
    const Py_ssize_t m = read_terms(o_clue_terms, &clue, &rarities, "clue_terms");
    if (m < 0) goto done;
    /* matched_fraction divides by the clue's known terms, as given (pairs are distinct) */
    const Py_ssize_t known = PyObject_Length(o_clue_terms);
    double *f = out->buf;
    within_clue(s, rank, n, words, f);
    double best_log_inlinks = -HUGE_VAL;
    for (Py_ssize_t i = 0; i < n; i++) {
        const double *v = table + row[i] * N_ROW_VALUES;
        if (v[RV_LOG_INLINKS] > best_log_inlinks) best_log_inlinks = v[RV_LOG_INLINKS];
    }
    for (Py_ssize_t i = 0; i < n; i++) {
        const int64_t r = row[i];
        const double *v = table + r * N_ROW_VALUES;
        const int64_t *span = spans + r * N_SPANS;
        double *o = f + i * N_COLUMNS;
        o[INLINKS] = v[RV_INLINKS];
        o[LOG_INLINKS] = v[RV_LOG_INLINKS];
        o[LOG_INLINKS_VS_BEST] = v[RV_LOG_INLINKS] - best_log_inlinks;
        o[LOG_POPULARITY] = v[RV_LOG_POPULARITY];
        o[POPULARITY_MISSING] = v[RV_POPULARITY_MISSING];
        o[LOG_DOC_LENGTH] = v[RV_LOG_DOC_LENGTH];
        o[HAS_QUALIFIER] = v[RV_HAS_QUALIFIER];
        o[QUALIFIER_FREQUENCY] = v[RV_QUALIFIER_FREQUENCY];
        /* name tokens in the clue: base, then qualifier, then alias ids, distinct in each */
        const int32_t *base = arena + span[SP_START];
        const int64_t nb = span[SP_BASE], nq = span[SP_QUALIFIER], na = span[SP_ALIAS];
        const double in_base = in_clue(base, nb, names, m_names);
        const double in_qual = in_clue(base + nb, nq, names, m_names);
        const double in_alias = in_clue(base + nb + nq, na, names, m_names);
        o[QUALIFIER_IN_CLUE] = in_qual > 0 ? 1.0 : 0.0;
        o[QUALIFIER_OVERLAP] = nq ? in_qual / (double)nq : 0.0;
        o[TITLE_OVERLAP] = nb ? in_base / (double)nb : 0.0;
        o[ALIAS_OVERLAP] = na ? in_alias / (double)na : 0.0;
        /* clue terms in the article; rarities are added in increasing term order, as
         * scoring.overlap does */
        double count, rarity;
        hw_overlap(terms, indptr[r], indptr[r + 1], clue, rarities, m, &count, &rarity);
        o[MATCHED_TERMS] = count;
        o[MATCHED_FRACTION] = count / (double)(known ? known : 1);
        o[MATCHED_RARITY] = rarity;
    }
    result = Py_True;
    Py_INCREF(result);
done:;
    PyMem_Free(names);
    PyMem_Free(clue);
    hw_release(views, 9);
    return result;
}

static PyMethodDef methods[] = {
    {"candidates", candidates, METH_VARARGS, candidates_doc},
    {NULL, NULL, 0, NULL},
};

/* Export the names of a NULL-terminated list as a tuple attribute of the module. */
static int add_names(PyObject *mod, const char *attr, const char *const *names) {
    Py_ssize_t n = 0;
    while (names[n]) n++;
    PyObject *tuple = PyTuple_New(n);
    if (!tuple) return -1;
    for (Py_ssize_t i = 0; i < n; i++) {
        PyObject *name = PyUnicode_FromString(names[i]);
        if (!name) {
            Py_DECREF(tuple);
            return -1;
        }
        PyTuple_SET_ITEM(tuple, i, name);
    }
    if (PyModule_AddObject(mod, attr, tuple) < 0) {
        Py_DECREF(tuple);
        return -1;
    }
    return 0;
}

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "_fused", "Compiled built-in features (see _fused.c).", -1,
    methods, NULL, NULL, NULL, NULL,
};

PyMODINIT_FUNC PyInit__fused(void) {
    PyObject *mod = PyModule_Create(&module);
    if (mod && (add_names(mod, "COLUMNS", column_names) < 0 ||
                add_names(mod, "ROW_VALUES", row_value_names) < 0 ||
                add_names(mod, "SPANS", span_names) < 0)) {
        Py_DECREF(mod);
        return NULL;
    }
    return mod;
}
