/* What the windowed top-k (retriever/_daat.h) shares across weight types: its lists, its
 * scratch and the search within a list. Included once by _kernels.c, after _heap.h.
 *
 * Each (field, term) pair of a query is a list whose postings ascend by row
 * (retriever/postings.py keeps them sorted); rows are visited in windows [w0, w1), and each
 * list keeps where the current window's postings start and end.
 */

#define PRUNE_BLOCK 64 /* postings per block maximum (global blocks: posting p is in p / 64) */
#ifndef DAAT_WINDOW
#define DAAT_FIRST_WINDOW 1024 /* rows in the first window; it doubles up to DAAT_WINDOW */
#define DAAT_WINDOW 8192 /* (theta is 0 until k rows are scored, so early windows prune little) */
#endif
/* A window is pruned with MaxScore when its essential lists hold under 1 / this share of its
 * postings (else it is added in full, which costs less per posting; 8 measured best of
 * 4, 8 and never at a million articles). */
#ifndef DAAT_MAXSCORE_SHARE
#define DAAT_MAXSCORE_SHARE 8
#endif

typedef struct {
    const int32_t *docs;
    const void *w;    /* the field's weights (T) */
    const void *bmax; /* the field's block maxima (T), or NULL: no bound is used */
    int64_t lo, hi;   /* the list's postings */
    double x;         /* the query factor, as the exhaustive kernel rounds it to T */
    double ub;        /* bound of every product of the list */
    int64_t pos;      /* first posting at or after the window's first row */
    int64_t end;      /* first posting at or after the window's end */
    int64_t cur;      /* probe cursor within [pos, end) */
    double wub;       /* bound of the list's products in the window */
} DList;

typedef struct { /* scratch reused across a batch's queries (one per thread) */
    DList *lists;
    int *order;      /* the window's lists by increasing bound */
    double *pre;     /* pre[j]: sum of the bounds of order[0..j] */
    void *acc;       /* DAAT_WINDOW sums (T), all zero between windows */
    uint64_t *bits;  /* which of acc's slots were added to */
    Py_ssize_t cap_lists;
} DaatScratch;

static void daat_scratch_free(DaatScratch *s) {
    free(s->lists); free(s->order); free(s->pre); free(s->acc); free(s->bits);
    memset(s, 0, sizeof(*s));
}

static int daat_reserve(DaatScratch *s, Py_ssize_t n_lists) {
    if (!s->acc) {
        s->acc = calloc(DAAT_WINDOW, sizeof(double));
        s->bits = calloc(DAAT_WINDOW / 64, sizeof(uint64_t));
        if (!s->acc || !s->bits) return -1;
    }
    if (n_lists > s->cap_lists) {
        free(s->lists); free(s->order); free(s->pre);
        s->lists = malloc((n_lists ? n_lists : 1) * sizeof(DList));
        s->order = malloc((n_lists ? n_lists : 1) * sizeof(int));
        s->pre = malloc((n_lists ? n_lists : 1) * sizeof(double));
        s->cap_lists = (s->lists && s->order && s->pre) ? n_lists : 0;
        if (!s->cap_lists && n_lists) return -1;
    }
    return 0;
}

/* First position in [lo, hi) whose row is >= d (hi if none); rows ascend. Linear for the
 * first few steps (the next row asked for is usually close), then galloping. */
static inline int64_t seek(const int32_t *docs, int64_t lo, int64_t hi, int32_t d) {
    for (int i = 0; i < 4; i++, lo++)
        if (lo >= hi || docs[lo] >= d) return lo;
    int64_t prev = lo - 1, step = 1; /* docs[prev] < d */
    while (prev + step < hi && docs[prev + step] < d) {
        prev += step;
        step <<= 1;
    }
    int64_t a = prev + 1, b = prev + step < hi ? prev + step : hi;
    while (a < b) {
        const int64_t mid = a + (b - a) / 2;
        if (docs[mid] < d) a = mid + 1; else b = mid;
    }
    return a;
}

/* The rows of the window [w0, w0 + 64 * n_words) whose bit is set, in increasing order:
 * `body` runs with `o` (the offset in the window) set, and the bits are cleared. */
#define FOR_EACH_SET(bits, n_words, o, body)                                                 \
    for (int64_t wi_ = 0; wi_ < (n_words); wi_++) {                                          \
        uint64_t b_ = (bits)[wi_];                                                           \
        (bits)[wi_] = 0;                                                                     \
        while (b_) {                                                                         \
            const int64_t o = wi_ * 64 + __builtin_ctzll(b_);                                \
            b_ &= b_ - 1;                                                                    \
            body                                                                             \
        }                                                                                    \
    }
