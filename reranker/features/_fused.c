/* Every fused built-in feature of one candidate set in one call (see fused_builtins in
 * reranker/builtin.py, which holds the plain-Python twin, and reranker/rowtables.py, which
 * fills the per-row tables read here).
 *
 * Written by hand for speed: for the 20 or so candidates of a clue the features are a few
 * thousand operations (the term overlap is most of them), while computing them with numpy
 * and Python sets costs tens of microseconds of interpreter overhead per clue, several
 * times the arithmetic. The feature functions in builtin.py remain the definitions; tests
 * check this module against them and against the Python twin.
 *
 * The output columns are COLUMNS, in that order; builtin.py refuses to use a build whose
 * COLUMNS differ from its FUSED_NAMES (a stale build after an edit).
 *
 * Only the buffer protocol is used (no numpy headers).
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

enum {
    BM25_SCORE, BM25_RANK, INVERSE_RANK, GAP_TO_NEXT, GAP_TO_BEST_RIVAL, SCORE_RATIO_TO_TOP,
    SCORE_ZSCORE, SCORE_SOFTMAX, CLUE_WORDS, LOG_CLUE_WORDS, SCORE_X_CLUE_WORDS,
    SOFTMAX_X_LOG_WORDS, INLINKS, LOG_INLINKS, LOG_INLINKS_VS_BEST, LOG_POPULARITY,
    POPULARITY_MISSING, HAS_QUALIFIER, QUALIFIER_IN_CLUE, QUALIFIER_OVERLAP, TITLE_OVERLAP,
    ALIAS_OVERLAP, MATCHED_TERMS, MATCHED_FRACTION, MATCHED_RARITY, LOG_DOC_LENGTH,
    QUALIFIER_FREQUENCY, N_COLUMNS
};
static const char *const column_names[N_COLUMNS] = {
    "bm25_score", "bm25_rank", "inverse_rank", "gap_to_next", "gap_to_best_rival",
    "score_ratio_to_top", "score_zscore", "score_softmax", "clue_words", "log_clue_words",
    "score_x_clue_words", "softmax_x_log_words", "inlinks", "log_inlinks",
    "log_inlinks_vs_best", "log_popularity", "popularity_missing", "has_qualifier",
    "qualifier_in_clue", "qualifier_overlap", "title_overlap", "alias_overlap",
    "matched_terms", "matched_fraction", "matched_rarity", "log_doc_length",
    "qualifier_frequency",
};

/* The row table's columns (rowtables.ROW_VALUES) and the name spans' (rowtables.SPANS). */
enum { RV_INLINKS, RV_LOG_INLINKS, RV_LOG_POPULARITY, RV_POPULARITY_MISSING, RV_LOG_DOC_LENGTH,
       RV_HAS_QUALIFIER, RV_QUALIFIER_FREQUENCY, RV_FILLED, N_ROW_VALUES };
enum { SP_READY, SP_START, SP_BASE, SP_QUALIFIER, SP_ALIAS, N_SPANS };

static int get(PyObject *obj, Py_buffer *view, char kind, int itemsize, int writable,
               const char *name) {
    if (PyObject_GetBuffer(obj, view,
                           PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | (writable ? PyBUF_WRITABLE : 0)) <
        0)
        return -1;
    const char *f = view->format ? view->format : "B";
    if (f[0] == '<' || f[0] == '=' || f[0] == '@') f++;
    int ok = view->itemsize == itemsize && f[1] == '\0' &&
             (kind == 'f' ? f[0] == 'd' : (f[0] == 'q' || f[0] == 'l' || f[0] == 'i'));
    if (!ok) {
        PyErr_Format(PyExc_TypeError, "%s: expected %s%d array, got format '%s'", name,
                     kind == 'f' ? "float" : "int", itemsize * 8, f);
        PyBuffer_Release(view);
        return -1;
    }
    return 0;
}

typedef struct {
    int64_t key;
    double value;
} Term;

static int by_key(const void *a, const void *b) {
    const int64_t x = ((const Term *)a)->key, y = ((const Term *)b)->key;
    return (x > y) - (x < y);
}

/* The items of `seq` as terms sorted by key, duplicates removed: ints (value 0) or
 * (int, float) pairs. Returns the count, or -1 with an exception set. */
static Py_ssize_t read_terms(PyObject *seq, int pairs, Term **out, const char *name) {
    PyObject *fast = PySequence_Fast(seq, name);
    if (!fast) return -1;
    const Py_ssize_t m = PySequence_Fast_GET_SIZE(fast);
    Term *t = PyMem_Malloc((size_t)(m ? m : 1) * sizeof(Term));
    if (!t) {
        Py_DECREF(fast);
        PyErr_NoMemory();
        return -1;
    }
    for (Py_ssize_t j = 0; j < m; j++) {
        PyObject *item = PySequence_Fast_GET_ITEM(fast, j);
        if (pairs) {
            if (!PyTuple_Check(item) || PyTuple_GET_SIZE(item) != 2) {
                PyErr_Format(PyExc_TypeError, "%s: expected (term id, weight) pairs", name);
                goto fail;
            }
            t[j].key = PyLong_AsLongLong(PyTuple_GET_ITEM(item, 0));
            t[j].value = PyFloat_AsDouble(PyTuple_GET_ITEM(item, 1));
        } else {
            t[j].key = PyLong_AsLongLong(item);
            t[j].value = 0;
        }
        if (PyErr_Occurred()) goto fail;
    }
    Py_DECREF(fast);
    qsort(t, (size_t)m, sizeof(Term), by_key);
    Py_ssize_t kept = 0;
    for (Py_ssize_t j = 0; j < m; j++)
        if (kept == 0 || t[kept - 1].key != t[j].key) t[kept++] = t[j];
    *out = t;
    return kept;
fail:
    Py_DECREF(fast);
    PyMem_Free(t);
    return -1;
}

/* Whether `key` is among the sorted keys t[0..m). */
static int holds(const Term *t, Py_ssize_t m, int64_t key) {
    Py_ssize_t a = 0, b = m;
    while (a < b) {
        const Py_ssize_t mid = a + (b - a) / 2;
        if (t[mid].key < key) a = mid + 1;
        else b = mid;
    }
    return a < m && t[a].key == key;
}

/* How many of ids[0..len) are among the clue's name tokens. */
static double in_clue(const int32_t *ids, int64_t len, const Term *clue, Py_ssize_t m) {
    double c = 0;
    for (int64_t i = 0; i < len; i++) c += holds(clue, m, ids[i]);
    return c;
}

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
"table (float64, n_docs x 8) and spans (int64, n_docs x 5): per-row values and name-token\n"
"    spans into arena (int32), see reranker/rowtables.py. clue_names: name-token ids of\n"
"    the clue (ints). indptr (int64, n_docs + 1) and terms (int32): article-major term\n"
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
    Py_buffer out = {0}, sv = {0}, rk = {0}, rw = {0}, tb = {0}, sp = {0}, ar = {0}, ip = {0};
    Py_buffer tm = {0};
    Term *names = NULL, *clue = NULL;
    PyObject *result = NULL;
    if (get(o_out, &out, 'f', 8, 1, "out") < 0 || get(o_scores, &sv, 'f', 8, 0, "scores") < 0 ||
        get(o_ranks, &rk, 'i', 8, 0, "ranks") < 0 || get(o_rows, &rw, 'i', 8, 0, "rows") < 0 ||
        get(o_table, &tb, 'f', 8, 0, "table") < 0 || get(o_spans, &sp, 'i', 8, 0, "spans") < 0 ||
        get(o_arena, &ar, 'i', 4, 0, "arena") < 0 || get(o_indptr, &ip, 'i', 8, 0, "indptr") < 0 ||
        get(o_terms, &tm, 'i', 4, 0, "terms") < 0)
        goto done;
    const Py_ssize_t n = sv.len / 8, n_docs = ip.len / 8 - 1;
    if (n < 1 || rk.len / 8 != n || rw.len / 8 != n || out.len / 8 != n * N_COLUMNS) {
        PyErr_SetString(PyExc_ValueError,
                        "candidates: need n >= 1 scores, ranks and rows, and n x COLUMNS out");
        goto done;
    }
    if (n_docs < 0 || tb.len / 8 != n_docs * N_ROW_VALUES || sp.len / 8 != n_docs * N_SPANS) {
        PyErr_SetString(PyExc_ValueError, "candidates: row tables do not match the term lists");
        goto done;
    }
    const double *s = sv.buf, *table = tb.buf;
    const int64_t *rank = rk.buf, *row = rw.buf, *spans = sp.buf, *indptr = ip.buf;
    const int32_t *arena = ar.buf, *terms = tm.buf;
    const int64_t n_arena = ar.len / 4, n_terms = tm.len / 4;
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
    const Py_ssize_t m_names = read_terms(o_names, 0, &names, "clue_names");
    if (m_names < 0) goto done;
    const Py_ssize_t m = read_terms(o_clue_terms, 1, &clue, "clue_terms");
    if (m < 0) goto done;
    /* matched_fraction divides by the clue's known terms, as given (pairs are distinct) */
    const Py_ssize_t known = PyObject_Length(o_clue_terms);
    double *f = out.buf;
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
        /* clue terms in the article: each looked up by binary search in the article's sorted
         * list, starting where the previous (smaller) term was found; rarities are added in
         * increasing term order, as scoring.overlap does */
        int64_t lo = indptr[r];
        const int64_t hi = indptr[r + 1];
        double count = 0, rarity = 0;
        for (Py_ssize_t j = 0; j < m && lo < hi; j++) {
            int64_t a = lo, b = hi;
            while (a < b) {
                const int64_t mid = a + (b - a) / 2;
                if (terms[mid] < clue[j].key) a = mid + 1;
                else b = mid;
            }
            if (a < hi && terms[a] == clue[j].key) {
                count += 1;
                rarity += clue[j].value;
                a++;
            }
            lo = a;
        }
        o[MATCHED_TERMS] = count;
        o[MATCHED_FRACTION] = count / (double)(known ? known : 1);
        o[MATCHED_RARITY] = rarity;
    }
    result = Py_True;
    Py_INCREF(result);
done:;
    PyMem_Free(names);
    PyMem_Free(clue);
    Py_buffer *all[] = {&out, &sv, &rk, &rw, &tb, &sp, &ar, &ip, &tm};
    for (size_t i = 0; i < sizeof(all) / sizeof(all[0]); i++)
        if (all[i]->obj) PyBuffer_Release(all[i]);
    return result;
}

static PyMethodDef methods[] = {
    {"candidates", candidates, METH_VARARGS, candidates_doc},
    {NULL, NULL, 0, NULL},
};

static int add_columns(PyObject *mod) {
    PyObject *cols = PyTuple_New(N_COLUMNS);
    if (!cols) return -1;
    for (int i = 0; i < N_COLUMNS; i++) {
        PyObject *name = PyUnicode_FromString(column_names[i]);
        if (!name) {
            Py_DECREF(cols);
            return -1;
        }
        PyTuple_SET_ITEM(cols, i, name);
    }
    if (PyModule_AddObject(mod, "COLUMNS", cols) < 0) {
        Py_DECREF(cols);
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
    if (mod && add_columns(mod) < 0) {
        Py_DECREF(mod);
        return NULL;
    }
    return mod;
}
