/* The exhaustive top-k: every posting of a query added into a score buffer with one slot
 * per article, in plan order, then the k best selected over the articles the postings
 * touched (or one vectorized scan when they touch most of the corpus). Included once by
 * _kernels.c, after _topk.h; the windowed path (_daat.h) gives the same results bit for bit.
 */

/* Whether any of 64 scores beats `floor`: a loop without branches, which compilers turn
 * into vector compares (kept out of line: inlined, GCC unrolls it into scalar code). */
#if defined(__GNUC__)
#define NOINLINE __attribute__((noinline))
#else
#define NOINLINE
#endif
#define ANY_ABOVE(T)                                                                         \
    static NOINLINE int any_above_##T(const T *buf, T floor) {                                        \
        int any = 0;                                                                         \
        for (int j = 0; j < 64; j++) any |= buf[j] > floor;                                  \
        return any;                                                                          \
    }
ANY_ABOVE(float)
ANY_ABOVE(double)

/* One query: its distinct terms tids[t0:t1] (each counted qtf[t] times), in every field.
 * `touched` has room for the query's postings; it is used only when they are few next to
 * the corpus. Returns how many (row, score) pairs were written, or -1 for a posting that
 * names a row outside the corpus (a damaged index; the buffer is cleared). */
#define SCORE_QUERY(T)                                                                       \
    static Py_ssize_t query_##T(                                                             \
        T *buf, Py_ssize_t n_docs, const Field *fields, Py_ssize_t n_fields,                 \
        const int64_t *tids, const double *qtf, Py_ssize_t t0, Py_ssize_t t1,                \
        int32_t *touched, Heap *heap, int64_t *out_rows, double *out_scores) {               \
        Py_ssize_t postings = 0, n_touched = 0;                                              \
        for (Py_ssize_t f = 0; f < n_fields; f++)                                            \
            for (Py_ssize_t t = t0; t < t1; t++)                                             \
                postings += fields[f].indptr[tids[t] + 1] - fields[f].indptr[tids[t]];       \
        const int sparse = postings * 2 < n_docs;                                            \
        for (Py_ssize_t f = 0; f < n_fields; f++) {                                          \
            const int32_t *docs = fields[f].docs;                                            \
            const T *w = (const T *)fields[f].weight;                                        \
            for (Py_ssize_t t = t0; t < t1; t++) {                                           \
                const int64_t lo = fields[f].indptr[tids[t]], hi = fields[f].indptr[tids[t] + 1]; \
                const T x = (T)(qtf[t] * fields[f].scale);                                   \
                int bad = 0;                                                                 \
                if (sparse) {                                                                \
                    for (int64_t p = lo; p < hi; p++) {                                      \
                        const int32_t d = docs[p];                                           \
                        bad |= (uint32_t)d >= (uint32_t)n_docs;                              \
                        if (bad) break;                                                      \
                        touched[n_touched] = d; /* branch-free: whether d is new is random */ \
                        n_touched += buf[d] == 0;                                            \
                        buf[d] += w[p] * x;                                                  \
                    }                                                                        \
                } else {                                                                     \
                    for (int64_t p = lo; p < hi; p++) {                                      \
                        const int32_t d = docs[p];                                           \
                        bad |= (uint32_t)d >= (uint32_t)n_docs;                              \
                        if (bad) break;                                                      \
                        buf[d] += w[p] * x;                                                  \
                    }                                                                        \
                }                                                                            \
                if (bad) {                                                                   \
                    memset(buf, 0, (size_t)n_docs * sizeof(T));                              \
                    return -1;                                                               \
                }                                                                            \
            }                                                                                \
        }                                                                                    \
        /* Read each touched article once and clear it; a row listed twice (its sum went     \
         * back to exactly zero and up again) reads zero the second time and is skipped,     \
         * like every article whose score is zero. */                                        \
        if (sparse) {                                                                        \
            for (Py_ssize_t i = 0; i < n_touched; i++) {                                     \
                const int32_t d = touched[i];                                                \
                const double s = (double)buf[d];                                             \
                buf[d] = 0;                                                                  \
                if (s != 0 && (heap->size < heap->cap ||                                     \
                               worse(heap->score[0], heap->row[0], s, d)))                   \
                    offer(heap, s, d);                                                       \
            }                                                                                \
        } else {                                                                             \
            /* Rows come in increasing order, so a score equal to the worst kept one loses   \
             * its tie: only a strictly higher score can enter a full heap. */               \
            Py_ssize_t d = 0;                                                                \
            for (; d < n_docs && !(heap->size == heap->cap && heap->score[0] > 0); d++) {    \
                const double s = (double)buf[d];                                             \
                if (s != 0 && (heap->size < heap->cap || s > heap->score[0]))                \
                    offer(heap, s, d);                                                       \
            }                                                                                \
            /* Once the worst kept score is positive, blocks of articles are tested at once  \
             * (a loop the compiler turns into vector compares) and only a block holding a   \
             * better score is looked at one by one. */                                      \
            T floor = heap->size ? (T)heap->score[0] : 0;                                    \
            for (; d < n_docs && d % 64; d++) {                                              \
                if (buf[d] > floor) {                                                        \
                    offer(heap, (double)buf[d], d);                                          \
                    floor = (T)heap->score[0];                                               \
                }                                                                            \
            }                                                                                \
            for (; d + 64 <= n_docs; d += 64) {                                              \
                if (!any_above_##T(buf + d, floor)) continue;                                \
                for (int j = 0; j < 64; j++) {                                               \
                    if (buf[d + j] > floor) {                                                \
                        offer(heap, (double)buf[d + j], d + j);                              \
                        floor = (T)heap->score[0];                                           \
                    }                                                                        \
                }                                                                            \
            }                                                                                \
            for (; d < n_docs; d++) {                                                        \
                if (buf[d] > floor) {                                                        \
                    offer(heap, (double)buf[d], d);                                          \
                    floor = (T)heap->score[0];                                               \
                }                                                                            \
            }                                                                                \
            memset(buf, 0, (size_t)n_docs * sizeof(T));                                      \
        }                                                                                    \
        return drain(heap, out_rows, out_scores);                                            \
    }

SCORE_QUERY(float)
SCORE_QUERY(double)
