/* The query kernel's inputs and its k best: one field's postings as the kernel reads them,
 * and the heap that keeps the best (score, row) pairs with the index's tie rule. Included
 * once by _kernels.c, before the scoring paths (_exhaustive.h, _daat.h).
 */

typedef struct { /* one field's term-major postings */
    const int64_t *indptr; /* term t's postings are [indptr[t], indptr[t + 1]) */
    const int32_t *docs;   /* their rows */
    const void *weight;    /* their BM25 weights, float32 or float64 as the buffer */
    double scale;          /* the field's weight in the sum */
    Py_ssize_t n_terms, n_post;
} Field;

/* A min-heap of the k best (score, row) pairs seen so far; the root is the worst of them.
 * "Better" means a higher score, or the same score and a lower row (ties go to the lower
 * row, as the numpy path's stable order does). */
typedef struct {
    double *score;
    int64_t *row;
    Py_ssize_t size, cap;
} Heap;

static int worse(double sa, int64_t ra, double sb, int64_t rb) {
    return sa < sb || (sa == sb && ra > rb);
}

static void sift_down(Heap *h, Py_ssize_t i) {
    for (;;) {
        Py_ssize_t l = 2 * i + 1, r = l + 1, m = i;
        if (l < h->size && worse(h->score[l], h->row[l], h->score[m], h->row[m])) m = l;
        if (r < h->size && worse(h->score[r], h->row[r], h->score[m], h->row[m])) m = r;
        if (m == i) return;
        double s = h->score[i]; h->score[i] = h->score[m]; h->score[m] = s;
        int64_t w = h->row[i]; h->row[i] = h->row[m]; h->row[m] = w;
        i = m;
    }
}

static void sift_up(Heap *h, Py_ssize_t i) {
    while (i > 0) {
        Py_ssize_t p = (i - 1) / 2;
        if (!worse(h->score[i], h->row[i], h->score[p], h->row[p])) return;
        double s = h->score[i]; h->score[i] = h->score[p]; h->score[p] = s;
        int64_t w = h->row[i]; h->row[i] = h->row[p]; h->row[p] = w;
        i = p;
    }
}

static void offer(Heap *h, double s, int64_t row) {
    if (h->size < h->cap) {
        h->score[h->size] = s;
        h->row[h->size] = row;
        sift_up(h, h->size++);
    } else if (h->cap > 0 && worse(h->score[0], h->row[0], s, row)) {
        h->score[0] = s;
        h->row[0] = row;
        sift_down(h, 0);
    }
}

/* Empty the heap into out_rows/out_scores, best first; returns how many. */
static Py_ssize_t drain(Heap *h, int64_t *out_rows, double *out_scores) {
    Py_ssize_t n = h->size;
    while (h->size > 0) {
        Py_ssize_t last = --h->size;
        out_rows[last] = h->row[0];
        out_scores[last] = h->score[0];
        h->score[0] = h->score[last];
        h->row[0] = h->row[last];
        sift_down(h, 0);
    }
    return n;
}
