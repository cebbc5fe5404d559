/* Exact top-k with dynamic pruning (MaxScore over term-at-a-time partial sums, with
 * block maxima when probing), included once by _kernels.c.
 *
 * Written by hand: no library computes an exact BM25 top-k from these stored weights with
 * this index's summation order and tie rule (score, then lower row), and the result must
 * equal the exhaustive kernel's bit for bit.
 *
 * Each (field, term) pair of a query is a list with an upper bound ub (the term's largest
 * stored weight times the query factor, rounded as a posting's product is, so it bounds
 * every product of the list). Weights must be non-negative (float32 indexes: see
 * retriever/postings.py weight_dtype). Steps for one query:
 *   1. Lists by decreasing ub are added into `buf` (partial sums, any order) until the
 *      bounds of the lists left, R, fall below theta, a lower bound on the final k-th best
 *      score (the k-th best partial, deflated by a rounding margin): an article none of the
 *      added lists holds cannot then reach the top k.
 *   2. The touched articles whose partial + R can still reach theta are candidates; each
 *      list left is probed for them (galloping over blocks of 64 postings: a block whose
 *      maximum cannot lift the candidate to theta is not searched), and candidates that
 *      cannot reach theta are dropped after each list.
 *   3. The survivors are scored exactly: every list in plan order, products in the weight
 *      type, added as the exhaustive kernel adds them, then the same heap and tie rule.
 * The survivors always include the true top k (bounds are inflated and theta deflated by
 * a margin covering the rounding of sums in any order), so the result is the exhaustive
 * one. When a step would cost more than scoring everything (few candidates pruned), the
 * query is scored exhaustively instead; out_work counts the postings read either way.
 */

#define PRUNE_BLOCK 64 /* postings per block maximum (global blocks: posting p is in p / 64) */

typedef struct {
    const int32_t *docs;
    const void *w;        /* the field's weights (T) */
    const void *bmax;     /* the field's block maxima (T) */
    int64_t lo, hi;       /* the list's postings */
    double x;             /* the query factor, as the exhaustive kernel rounds it to T */
    double ub;            /* bound of one product of the list */
} PList;

typedef struct { /* scratch reused across a batch's queries */
    PList *lists;
    int *order;
    double *rest; /* rest[j]: sum of ub of order[j+1..] */
    int32_t *cand;
    double *part;
    double *sel; /* quickselect scratch */
    void *exact; /* T per candidate */
    Py_ssize_t cap_lists, cap_cand;
} PruneScratch;

static void prune_scratch_free(PruneScratch *s) {
    free(s->lists); free(s->order); free(s->rest); free(s->cand); free(s->part); free(s->sel);
    free(s->exact);
    memset(s, 0, sizeof(*s));
}

static int prune_reserve(PruneScratch *s, Py_ssize_t n_lists, Py_ssize_t n_cand) {
    if (n_lists > s->cap_lists) {
        free(s->lists); free(s->order); free(s->rest);
        s->lists = malloc(n_lists * sizeof(PList));
        s->order = malloc(n_lists * sizeof(int));
        s->rest = malloc(n_lists * sizeof(double));
        s->cap_lists = (s->lists && s->order && s->rest) ? n_lists : 0;
        if (!s->cap_lists) return -1;
    }
    if (n_cand > s->cap_cand) {
        free(s->cand); free(s->part); free(s->sel); free(s->exact);
        s->cand = malloc(n_cand * sizeof(int32_t));
        s->part = malloc(n_cand * sizeof(double));
        s->sel = malloc(n_cand * sizeof(double));
        s->exact = malloc(n_cand * sizeof(double));
        s->cap_cand = (s->cand && s->part && s->sel && s->exact) ? n_cand : 0;
        if (!s->cap_cand) return -1;
    }
    return 0;
}

/* The k-th largest of a[0..n) (1 <= k <= n); reorders a. */
static double kth_largest(double *a, Py_ssize_t n, Py_ssize_t k) {
    Py_ssize_t lo = 0, hi = n - 1, want = k - 1;
    while (lo < hi) {
        const double pivot = a[lo + (hi - lo) / 2];
        Py_ssize_t i = lo, j = hi;
        while (i <= j) {
            while (a[i] > pivot) i++;
            while (a[j] < pivot) j--;
            if (i <= j) { double t = a[i]; a[i] = a[j]; a[j] = t; i++; j--; }
        }
        if (want <= j) hi = j;
        else if (want >= i) lo = i;
        else return a[want];
    }
    return a[want];
}

/* First position in [lo, hi) whose row is >= d (hi if none); rows ascend. */
static inline int64_t gallop(const int32_t *docs, int64_t lo, int64_t hi, int32_t d) {
    if (lo >= hi || docs[lo] >= d) return lo;
    int64_t prev = lo, step = 1; /* docs[prev] < d */
    while (prev + step < hi && docs[prev + step] < d) {
        prev += step;
        step <<= 1;
    }
    int64_t a = prev + 1, b = prev + step < hi ? prev + step : hi;
    while (a < b) {
        const int64_t m = a + (b - a) / 2;
        if (docs[m] < d) a = m + 1; else b = m;
    }
    return a;
}

/* The first block (at or after the one holding `pos`) of list [pos, hi) whose last row is
 * >= d, or -1 when every row left is below d. */
static inline int64_t gallop_block(const int32_t *docs, int64_t pos, int64_t hi, int32_t d) {
    const int64_t first = pos / PRUNE_BLOCK, last = (hi - 1) / PRUNE_BLOCK;
#define BLOCK_END(c) ((((c) + 1) * PRUNE_BLOCK < hi ? ((c) + 1) * PRUNE_BLOCK : hi) - 1)
    if (pos >= hi || docs[hi - 1] < d) return -1;
    if (docs[BLOCK_END(first)] >= d) return first;
    int64_t prev = first, step = 1;
    while (prev + step < last && docs[BLOCK_END(prev + step)] < d) {
        prev += step;
        step <<= 1;
    }
    int64_t a = prev + 1, b = prev + step < last ? prev + step : last;
    while (a < b) {
        const int64_t m = a + (b - a) / 2;
        if (docs[BLOCK_END(m)] < d) a = m + 1; else b = m;
    }
    return a;
#undef BLOCK_END
}

static int cmp_int32(const void *a, const void *b) {
    const int32_t x = *(const int32_t *)a, y = *(const int32_t *)b;
    return (x > y) - (x < y);
}

/* Exact scores of rows cand[0..c) (ascending, distinct) into ex: every list in plan order,
 * each product rounded to T and added as the exhaustive kernel adds it. */
#define EXACT_SCORES(T)                                                                      \
    static void exact_##T(const PList *L, Py_ssize_t n, const int32_t *cand, Py_ssize_t c,   \
                          T *ex, int64_t *work) {                                            \
        for (Py_ssize_t i = 0; i < c; i++) ex[i] = 0;                                        \
        for (Py_ssize_t li = 0; li < n && c > 0; li++) {                                     \
            const PList *l = &L[li];                                                         \
            const T *w = (const T *)l->w, x = (T)l->x;                                       \
            int64_t cur = l->lo;                                                             \
            for (Py_ssize_t i = 0; i < c && cur < l->hi; i++) {                              \
                cur = gallop(l->docs, cur, l->hi, cand[i]);                                  \
                if (cur < l->hi && l->docs[cur] == cand[i]) {                                \
                    ex[i] += w[cur] * x;                                                     \
                    (*work)++;                                                               \
                }                                                                            \
            }                                                                                \
        }                                                                                    \
    }
EXACT_SCORES(float)
EXACT_SCORES(double)

/* Returns the pairs written, -2 when pruning does not pay for this query (nothing written,
 * buf still zero: the caller scores it exhaustively), -3 when out of memory. */
#define PRUNE_QUERY(T, EPS)                                                                  \
    static Py_ssize_t prune_##T(                                                             \
        T *buf, Py_ssize_t n_docs, const Field *fields, const void *const *bmaxes,           \
        const void *const *tmaxes, Py_ssize_t n_fields, const int64_t *tids,                 \
        const double *qtf, Py_ssize_t t0, Py_ssize_t t1, int32_t *touched, Heap *heap,       \
        PruneScratch *sc, int64_t *out_rows, double *out_scores, int64_t *work) {            \
        Py_ssize_t n = 0;                                                                    \
        int64_t total = 0;                                                                   \
        if (prune_reserve(sc, n_fields * (t1 - t0), 0) < 0) return -3;                       \
        PList *L = sc->lists;                                                                \
        for (Py_ssize_t f = 0; f < n_fields; f++) {                                          \
            const T *tm = (const T *)tmaxes[f];                                              \
            for (Py_ssize_t t = t0; t < t1; t++) {                                           \
                const int64_t lo = fields[f].indptr[tids[t]], hi = fields[f].indptr[tids[t] + 1]; \
                if (lo == hi) continue;                                                      \
                const T x = (T)(qtf[t] * fields[f].scale);                                   \
                PList *l = &L[n++];                                                          \
                l->docs = fields[f].docs; l->w = fields[f].weight; l->bmax = bmaxes[f];      \
                l->lo = lo; l->hi = hi; l->x = (double)x;                                    \
                l->ub = (double)(T)(tm[tids[t]] * x);                                        \
                total += hi - lo;                                                            \
            }                                                                                \
        }                                                                                    \
        if (n < 2 || total < 8 * heap->cap) return -2;                                      \
        /* A relative margin covering the rounding of n-term sums in any order. */          \
        const double m = 4.0 * (double)(n + 2) * (EPS);                                      \
        int *ord = sc->order;                                                                \
        for (Py_ssize_t i = 0; i < n; i++) { /* insertion sort by decreasing ub */          \
            Py_ssize_t j = i;                                                                \
            while (j > 0 && L[ord[j - 1]].ub < L[i].ub) { ord[j] = ord[j - 1]; j--; }      \
            ord[j] = (int)i;                                                                 \
        }                                                                                    \
        double r = 0;                                                                        \
        for (Py_ssize_t j = n - 1; j >= 0; j--) { sc->rest[j] = r; r += L[ord[j]].ub; }      \
        /* Step 1: lists by decreasing bound into buf, until the rest cannot reach theta. */ \
        Py_ssize_t n_touched = 0, j = 0;                                                     \
        int64_t done = 0;                                                                    \
        double theta = 0;                                                                    \
        int64_t probe = 0; /* postings read by probes */                                     \
        int stopped = 0;                                                                     \
        for (; j < n && !stopped; j++) {                                                     \
            const PList *l = &L[ord[j]];                                                     \
            const int64_t len = l->hi - l->lo;                                               \
            /* Too much left unpruned, or the touched list could overflow: score it all. */ \
            if ((total - done) * 3 < total || done + len > n_docs) {                         \
                for (Py_ssize_t i = 0; i < n_touched; i++) buf[touched[i]] = 0;              \
                return -2;                                                                   \
            }                                                                                \
            const int32_t *docs = l->docs;                                                   \
            const T *w = (const T *)l->w, x = (T)l->x;                                       \
            int bad = 0;                                                                     \
            for (int64_t p = l->lo; p < l->hi; p++) {                                        \
                const int32_t d = docs[p];                                                   \
                bad |= (uint32_t)d >= (uint32_t)n_docs;                                      \
                if (bad) break;                                                              \
                touched[n_touched] = d;                                                      \
                n_touched += buf[d] == 0;                                                    \
                buf[d] += w[p] * x;                                                          \
            }                                                                                \
            if (bad) { /* a damaged index: the exhaustive kernel reports it */               \
                for (Py_ssize_t i = 0; i < n_touched; i++) buf[touched[i]] = 0;              \
                return -2;                                                                   \
            }                                                                                \
            done += len;                                                                     \
            const double rest = sc->rest[j] * (1 + m);                                       \
            /* theta: the k-th best exact score of the best partial sums (real scores of   \
             * real articles, so no more than the final k-th best). */                       \
            /* Checked once the bounds left are under half the total: before that, no     \
             * article's score is likely to exceed them. */                                  \
            if (n_touched >= heap->cap && rest >= theta && 2 * rest < r) {                    \
                if (prune_reserve(sc, n, n_touched) < 0) return -3;                          \
                Py_ssize_t c = 0;                                                            \
                for (Py_ssize_t i = 0; i < n_touched; i++)                                   \
                    if (buf[touched[i]] > 0) sc->sel[c++] = (double)buf[touched[i]];         \
                if (c >= heap->cap) {                                                        \
                    const double v = kth_largest(sc->sel, c, heap->cap);                     \
                    Py_ssize_t e = 0;                                                        \
                    for (Py_ssize_t i = 0; i < n_touched && e < 4 * heap->cap; i++)          \
                        if ((double)buf[touched[i]] >= v) sc->cand[e++] = touched[i];         \
                    qsort(sc->cand, e, sizeof(int32_t), cmp_int32);                          \
                    Py_ssize_t u = 0;                                                        \
                    for (Py_ssize_t i = 0; i < e; i++)                                       \
                        if (u == 0 || sc->cand[u - 1] != sc->cand[i]) sc->cand[u++] = sc->cand[i]; \
                    T *ex = (T *)sc->exact;                                                  \
                    exact_##T(L, n, sc->cand, u, ex, &probe);                                \
                    Py_ssize_t g = 0;                                                        \
                    for (Py_ssize_t i = 0; i < u; i++)                                       \
                        if (ex[i] > 0) sc->sel[g++] = (double)ex[i];                         \
                    if (g >= heap->cap) {                                                    \
                        const double th = kth_largest(sc->sel, g, heap->cap);                \
                        if (th > theta) theta = th;                                          \
                    }                                                                        \
                    stopped = rest < theta;                                                  \
                }                                                                            \
            }                                                                                \
        }                                                                                    \
        if (!stopped) {                                                                      \
            for (Py_ssize_t i = 0; i < n_touched; i++) buf[touched[i]] = 0;                  \
            return -2;                                                                       \
        }                                                                                    \
        /* Step 2: candidates, sorted by row; the lists left probed for them. */             \
        Py_ssize_t c = 0;                                                                    \
        const double rest0 = sc->rest[j - 1];                                                \
        for (Py_ssize_t i = 0; i < n_touched; i++) {                                         \
            const double p = (double)buf[touched[i]];                                        \
            if (p > 0 && (p + rest0) * (1 + m) >= theta) sc->cand[c++] = touched[i];         \
        }                                                                                    \
        if ((double)c * (double)(n - j) * 6 > (double)(total - done)) {                      \
            /* Too many candidates to probe for: the lists left are read in full, adding     \
             * only to candidates (the others are zeroed and stay so). */                    \
            for (Py_ssize_t i = 0; i < n_touched; i++) {                                     \
                const double p = (double)buf[touched[i]];                                    \
                if (!(p > 0 && (p + rest0) * (1 + m) >= theta)) buf[touched[i]] = 0;         \
            }                                                                                \
            for (; j < n; j++) {                                                             \
                const PList *l = &L[ord[j]];                                                 \
                const int32_t *docs = l->docs;                                               \
                const T *w = (const T *)l->w, x = (T)l->x;                                   \
                int bad = 0;                                                                 \
                for (int64_t p = l->lo; p < l->hi; p++) {                                    \
                    const int32_t d = docs[p];                                               \
                    bad |= (uint32_t)d >= (uint32_t)n_docs;                                  \
                    if (bad) break;                                                          \
                    if (buf[d] > 0) buf[d] += w[p] * x;                                      \
                }                                                                            \
                if (bad) {                                                                   \
                    for (Py_ssize_t i = 0; i < c; i++) buf[sc->cand[i]] = 0;                 \
                    return -2;                                                               \
                }                                                                            \
                done += l->hi - l->lo;                                                       \
                const double rest = sc->rest[j];                                             \
                Py_ssize_t kept = 0;                                                         \
                for (Py_ssize_t i = 0; i < c; i++) {                                         \
                    const int32_t d = sc->cand[i];                                           \
                    if (((double)buf[d] + rest) * (1 + m) >= theta) sc->cand[kept++] = d;    \
                    else buf[d] = 0;                                                         \
                }                                                                            \
                c = kept;                                                                    \
            }                                                                                \
            for (Py_ssize_t i = 0; i < c; i++) buf[sc->cand[i]] = 0;                         \
            n_touched = 0;                                                                   \
        }                                                                                    \
        qsort(sc->cand, c, sizeof(int32_t), cmp_int32);                                      \
        { /* a row whose sum stayed zero for a while was listed twice */                     \
            Py_ssize_t u = 0;                                                                \
            for (Py_ssize_t i = 0; i < c; i++)                                               \
                if (u == 0 || sc->cand[u - 1] != sc->cand[i]) sc->cand[u++] = sc->cand[i];   \
            c = u;                                                                           \
        }                                                                                    \
        for (Py_ssize_t i = 0; i < c; i++) sc->part[i] = (double)buf[sc->cand[i]];           \
        for (Py_ssize_t i = 0; i < n_touched; i++) buf[touched[i]] = 0;                      \
        for (; j < n && c > 0; j++) {                                                        \
            const PList *l = &L[ord[j]];                                                     \
            const T *w = (const T *)l->w, *bm = (const T *)l->bmax, x = (T)l->x;             \
            const double rest = sc->rest[j];                                                 \
            int64_t cur = l->lo;                                                             \
            Py_ssize_t kept = 0;                                                             \
            for (Py_ssize_t i = 0; i < c; i++) {                                             \
                const int32_t d = sc->cand[i];                                               \
                double p = sc->part[i];                                                      \
                const int64_t b = cur < l->hi ? gallop_block(l->docs, cur, l->hi, d) : -1;   \
                if (b >= 0) {                                                                \
                    const int64_t bs = b * PRUNE_BLOCK > cur ? b * PRUNE_BLOCK : cur;        \
                    cur = bs;                                                                \
                    const double cap = (double)(T)(bm[b] * x);                               \
                    if ((p + (cap < l->ub ? cap : l->ub) + rest) * (1 + m) >= theta) {       \
                        const int64_t be = (b + 1) * PRUNE_BLOCK < l->hi ? (b + 1) * PRUNE_BLOCK : l->hi; \
                        cur = gallop(l->docs, bs, be, d);                                    \
                        if (cur < l->hi && l->docs[cur] == d) {                              \
                            p += (double)(T)(w[cur] * x);                                    \
                            probe++;                                                         \
                        }                                                                    \
                    }                                                                        \
                } else {                                                                     \
                    cur = l->hi;                                                             \
                }                                                                            \
                if ((p + rest) * (1 + m) >= theta) {                                         \
                    sc->cand[kept] = d;                                                      \
                    sc->part[kept++] = p;                                                    \
                }                                                                            \
            }                                                                                \
            c = kept;                                                                        \
            if (c >= heap->cap) {                                                            \
                memcpy(sc->sel, sc->part, c * sizeof(double));                               \
                const double th = kth_largest(sc->sel, c, heap->cap) * (1 - m);              \
                if (th > theta) theta = th;                                                  \
            }                                                                                \
        }                                                                                    \
        /* Step 3: exact scores of the survivors, every list in plan order. */               \
        T *ex = (T *)sc->exact;                                                              \
        exact_##T(L, n, sc->cand, c, ex, &probe);                                            \
        *work += done + probe;                                                                       \
        for (Py_ssize_t i = 0; i < c; i++) {                                                 \
            const double s = (double)ex[i];                                                  \
            if (s != 0 && (heap->size < heap->cap ||                                         \
                           worse(heap->score[0], heap->row[0], s, sc->cand[i])))             \
                offer(heap, s, sc->cand[i]);                                                 \
        }                                                                                    \
        return drain(heap, out_rows, out_scores);                                            \
    }

PRUNE_QUERY(float, 5.9604644775390625e-08)
PRUNE_QUERY(double, 1.1102230246251565e-16)
