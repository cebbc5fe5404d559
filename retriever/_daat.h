/* Exact top-k over windows of rows, document at a time: each window is either added in full
 * (every list, in plan order) or pruned with MaxScore over the window's block maxima.
 *
 * A template: _kernels.c includes it once per weight type, with T (float or double), EPS
 * (T's unit roundoff) and DT(name) (name suffixed with the type) defined; the shared parts
 * are in _window.h.
 *
 * Written by hand: no library computes an exact BM25 top-k from these stored weights with
 * this index's summation order and tie rule (score, then lower row), and the result must
 * equal the exhaustive kernel's bit for bit.
 *
 * Rows are visited in windows [w0, w1) of at most DAAT_WINDOW rows, so the window's sums
 * stay in the CPU's cache (the exhaustive kernel's buffer has one slot per article: 4 MB
 * at a million articles, which two threads then fight over). In each window every list
 * gets a bound: its largest stored weight among the 64-posting blocks holding the window's
 * rows (retriever/bounds.py), times the query factor, rounded as a posting's product is, so
 * it bounds every product of the list there. Weights must be non-negative (float32
 * indexes: retriever/postings.py weight_dtype). theta is the k-th best exact score so far
 * (the heap's root once it is full); rows come in increasing order, so a later row whose
 * score only equals theta loses the tie, and a relative margin m covers the rounding of
 * bounds and partial sums: no row that could enter the top k is ever skipped.
 *   - If the bounds of all lists cannot beat theta, the window is skipped.
 *   - Lists are ordered by bound; the longest prefix of small bounds whose sum cannot beat
 *     theta is "non-essential": a row none of the other ("essential") lists holds cannot
 *     enter the top k. When the essential lists hold few of the window's postings
 *     (MaxScore), only theirs are added; each row they hold is probed in the non-essential
 *     lists (largest bound first) while its partial sum plus the bounds left can beat
 *     theta, and a row that survives is scored exactly: every list in plan order, each
 *     product in T, added as the exhaustive kernel adds it.
 *   - Otherwise every list's postings are added in plan order (the exhaustive kernel's
 *     sums, bit for bit) and the rows that beat theta are offered to the heap.
 */

/* Each list's postings in [w0, w1) and its bound there; the lists holding any go to
 * ord[0..*live). Returns the sum of the bounds; *next: the first row after w1 of any list. */
static double DT(window_bounds)(DList *L, Py_ssize_t n, int64_t w1, int *ord, Py_ssize_t *live,
                                int64_t *next) {
    double sum = 0;
    Py_ssize_t c = 0;
    int64_t nx = INT64_MAX;
    for (Py_ssize_t i = 0; i < n; i++) {
        DList *l = &L[i];
        l->cur = l->pos;
        l->end = l->pos < l->hi && l->docs[l->pos] < w1 ? seek(l->docs, l->pos, l->hi, (int32_t)w1)
                                                        : l->pos;
        l->wub = 0;
        if (l->end > l->pos) {
            l->wub = l->ub;
            if (l->bmax) {
                const T *bm = (const T *)l->bmax;
                T top = 0;
                for (int64_t b = l->pos / PRUNE_BLOCK; b <= (l->end - 1) / PRUNE_BLOCK; b++)
                    top = bm[b] > top ? bm[b] : top;
                const double wb = (double)(T)(top * (T)l->x);
                l->wub = wb < l->ub ? wb : l->ub;
            }
            sum += l->wub;
            ord[c++] = (int)i;
        }
        if (l->end < l->hi && l->docs[l->end] < nx) nx = l->docs[l->end];
    }
    *live = c;
    *next = nx;
    return sum;
}

/* Offer row d's exact score s (rows come in increasing order: a full heap takes only a
 * strictly better score) and keep theta, the worst kept score once the heap is full. */
static inline void DT(take)(Heap *heap, T s, int64_t d, double *theta) {
    if (s != 0 && (heap->size < heap->cap || (double)s > *theta)) {
        offer(heap, (double)s, d);
        if (heap->size == heap->cap) *theta = heap->score[0];
    }
}

/* Every list's postings in the window added in plan order, then the rows that beat theta
 * offered. Returns -1 for a posting outside the window (unsorted: a damaged index), with
 * acc and bits cleared as on success. */
static int DT(window_all)(const DList *L, Py_ssize_t n, int64_t w0, int64_t w1, int64_t posts,
                          T *acc, uint64_t *bits, const uint8_t *allowed, Heap *heap,
                          double *theta) {
    const int64_t width = w1 - w0;
    const int sparse = posts * 4 < width; /* few rows: list them rather than scan */
    int bad = 0;
    for (Py_ssize_t i = 0; i < n && !bad; i++) {
        const int32_t *docs = L[i].docs;
        const T *w = (const T *)L[i].w, x = (T)L[i].x;
        for (int64_t p = L[i].pos; p < L[i].end; p++) {
            const uint32_t o = (uint32_t)(docs[p] - w0);
            bad |= o >= (uint32_t)width;
            if (bad) break;
            if (sparse) bits[o >> 6] |= (uint64_t)1 << (o & 63);
            acc[o] += w[p] * x;
        }
    }
    if (sparse) {
        FOR_EACH_SET(bits, (width + 63) / 64, o, {
            const T s = acc[o];
            acc[o] = 0;
            if (!bad && !(allowed && !allowed[w0 + o])) DT(take)(heap, s, w0 + o, theta);
        })
        return bad ? -1 : 0;
    }
    /* Blocks of 64 sums are tested at once (vector compares); only a block holding one
     * above the floor is looked at one by one. */
    for (int64_t o = 0; o < width && !bad; o += 64) {
        const int64_t span = width - o < 64 ? width - o : 64;
        const T floor = heap->size == heap->cap ? (T)*theta : 0;
        if (span == 64 && !DT(any_above)(acc + o, floor)) continue;
        for (int64_t j = o; j < o + span; j++)
            if (acc[j] > (heap->size == heap->cap ? (T)*theta : 0) &&
                !(allowed && !allowed[w0 + j]))
                DT(take)(heap, acc[j], w0 + j, theta);
    }
    memset(acc, 0, (size_t)width * sizeof(T));
    return bad ? -1 : 0;
}

/* MaxScore in the window: the essential lists ord[e..live) added, their rows probed in the
 * non-essential ones ord[0..e), the survivors scored exactly. Returns -1 as window_all. */
static int DT(window_maxscore)(DList *L, Py_ssize_t n, const int *ord, Py_ssize_t live,
                               Py_ssize_t e, const double *pre, int64_t w0, int64_t w1, T *acc,
                               uint64_t *bits, const uint8_t *allowed, Heap *heap,
                               double *theta, double m, int64_t *read) {
    const int64_t width = w1 - w0;
    int bad = 0;
    for (Py_ssize_t j = e; j < live && !bad; j++) {
        const DList *l = &L[ord[j]];
        const int32_t *docs = l->docs;
        const T *w = (const T *)l->w, x = (T)l->x;
        for (int64_t p = l->pos; p < l->end; p++) {
            const uint32_t o = (uint32_t)(docs[p] - w0);
            bad |= o >= (uint32_t)width;
            if (bad) break;
            bits[o >> 6] |= (uint64_t)1 << (o & 63);
            acc[o] += w[p] * x;
        }
    }
    const double nonsum = pre[e - 1];
    FOR_EACH_SET(bits, (width + 63) / 64, o, {
        double part = (double)acc[o];
        acc[o] = 0;
        const int32_t d = (int32_t)(w0 + o);
        if (bad || (part + nonsum) * m <= *theta || (allowed && !allowed[d])) continue;
        Py_ssize_t j = e;
        for (; j > 0; j--) { /* probes, largest bound first */
            DList *l = &L[ord[j - 1]];
            l->cur = seek(l->docs, l->cur, l->end, d);
            if (l->cur < l->end && l->docs[l->cur] == d) {
                part += (double)(T)(((const T *)l->w)[l->cur] * (T)l->x);
                (*read)++;
            }
            if ((part + (j > 1 ? pre[j - 2] : 0)) * m <= *theta) break;
        }
        if (j > 0) continue;
        T s = 0; /* exact: plan order, as the exhaustive kernel adds */
        for (Py_ssize_t i = 0; i < n; i++) {
            DList *l = &L[i];
            if (l->end == l->pos) continue;
            l->cur = seek(l->docs, l->cur, l->end, d);
            if (l->cur < l->end && l->docs[l->cur] == d) s += ((const T *)l->w)[l->cur] * (T)l->x;
        }
        DT(take)(heap, s, d, theta);
    })
    return bad ? -1 : 0;
}

/* Query tids[t0:t1] in every field. bmaxes/tmaxes: each field's block and term maxima, or
 * NULL (no bounds: every window is added in full). Returns the pairs written, -2 for
 * postings that are not sorted or name rows outside the corpus (nothing written; the
 * exhaustive kernel then reports the damage), -3 when out of memory. */
static Py_ssize_t DT(daat)(Py_ssize_t n_docs, const Field *fields, const void *const *bmaxes,
                           const void *const *tmaxes, Py_ssize_t n_fields, const int64_t *tids,
                           const double *qtf, Py_ssize_t t0, Py_ssize_t t1,
                           const uint8_t *allowed, Heap *heap, DaatScratch *sc,
                           int64_t *out_rows, double *out_scores, int64_t *work) {
    if (daat_reserve(sc, n_fields * (t1 - t0)) < 0) return -3;
    DList *L = sc->lists;
    Py_ssize_t n = 0;
    int64_t first = n_docs;
    for (Py_ssize_t f = 0; f < n_fields; f++) {
        for (Py_ssize_t t = t0; t < t1; t++) {
            const int64_t lo = fields[f].indptr[tids[t]], hi = fields[f].indptr[tids[t] + 1];
            if (lo == hi) continue;
            const int32_t *docs = fields[f].docs;
            if (docs[lo] < 0 || docs[hi - 1] >= n_docs) return -2;
            const T x = (T)(qtf[t] * fields[f].scale);
            DList *l = &L[n++];
            l->docs = docs;
            l->w = fields[f].weight;
            l->bmax = bmaxes ? bmaxes[f] : NULL;
            l->lo = l->pos = lo;
            l->hi = hi;
            l->x = (double)x;
            l->ub = tmaxes ? (double)(T)(((const T *)tmaxes[f])[tids[t]] * x) : HUGE_VAL;
            if (docs[lo] < first) first = docs[lo];
        }
    }
    /* A relative margin covering the rounding of n-term sums in any order. */
    const double m = 1 + 4.0 * (double)(n + 2) * (EPS);
    T *acc = (T *)sc->acc;
    int *ord = sc->order;
    double *pre = sc->pre, theta = 0;
    int64_t read = 0, width = DAAT_FIRST_WINDOW;
    for (int64_t w0 = first; w0 < n_docs;) {
        const int64_t w1 = w0 + width < n_docs ? w0 + width : n_docs;
        Py_ssize_t live = 0;
        int64_t next = 0;
        const double sum = DT(window_bounds)(L, n, w1, ord, &live, &next);
        if (sum * m > theta) {
            for (Py_ssize_t i = 1; i < live; i++) { /* by increasing bound */
                const int o = ord[i];
                Py_ssize_t j = i;
                for (; j > 0 && L[ord[j - 1]].wub > L[o].wub; j--) ord[j] = ord[j - 1];
                ord[j] = o;
            }
            double r = 0;
            int64_t all = 0, ess = 0;
            Py_ssize_t e = 0; /* ord[0..e): non-essential */
            for (Py_ssize_t j = 0; j < live; j++) {
                const DList *l = &L[ord[j]];
                r += l->wub;
                pre[j] = r;
                if (r * m <= theta) e = j + 1;
                else ess += l->end - l->pos;
                all += l->end - l->pos;
            }
            int rc;
            if (e > 0 && ess * DAAT_MAXSCORE_SHARE < all) {
                read += ess;
                rc = DT(window_maxscore)(L, n, ord, live, e, pre, w0, w1, acc, sc->bits,
                                         allowed, heap, &theta, m, &read);
            } else {
                read += all;
                rc = DT(window_all)(L, n, w0, w1, all, acc, sc->bits, allowed, heap, &theta);
            }
            if (rc < 0) return -2;
        }
        for (Py_ssize_t i = 0; i < n; i++) L[i].pos = L[i].end;
        if (width < DAAT_WINDOW) width *= 2;
        w0 = next > w1 ? next : w1; /* rows no list holds are skipped */
    }
    *work += read;
    return drain(heap, out_rows, out_scores);
}
