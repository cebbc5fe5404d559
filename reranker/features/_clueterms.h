/* A clue's term lists as _fused.c reads them: Python sequences of term ids (or of (id,
 * weight) pairs) into sorted, distinct C arrays, and membership tests against them.
 * Included once by _fused.c.
 */

static int by_key(const void *a, const void *b) {
    const int64_t x = *(const int64_t *)a, y = *(const int64_t *)b;
    return (x > y) - (x < y);
}

/* The items of `seq` sorted by term id, duplicates removed: ints, or (int, float) pairs when
 * `values` is given. Fills *keys (and *values), allocated here; the caller frees *keys only
 * (the values live in the same block). Returns the count, or -1 with an exception set. */
static Py_ssize_t read_terms(PyObject *seq, int64_t **keys, double **values, const char *name) {
    typedef struct {
        int64_t key; /* first: by_key compares it */
        double value;
    } Term;
    PyObject *fast = PySequence_Fast(seq, name);
    if (!fast) return -1;
    const Py_ssize_t m = PySequence_Fast_GET_SIZE(fast);
    const size_t room = (size_t)(m ? m : 1);
    Term *t = PyMem_Malloc(room * sizeof(Term));
    int64_t *k = PyMem_Malloc(room * (sizeof(int64_t) + sizeof(double)));
    if (!t || !k) {
        PyErr_NoMemory();
        goto fail;
    }
    for (Py_ssize_t j = 0; j < m; j++) {
        PyObject *item = PySequence_Fast_GET_ITEM(fast, j);
        if (values) {
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
    double *v = (double *)(k + room);
    Py_ssize_t kept = 0;
    for (Py_ssize_t j = 0; j < m; j++) {
        if (kept == 0 || k[kept - 1] != t[j].key) {
            k[kept] = t[j].key;
            v[kept++] = t[j].value;
        }
    }
    PyMem_Free(t);
    *keys = k;
    if (values) *values = v;
    return kept;
fail:
    Py_DECREF(fast);
    PyMem_Free(t);
    PyMem_Free(k);
    return -1;
}

/* Whether `key` is among the sorted keys[0..m). */
static int holds(const int64_t *keys, Py_ssize_t m, int64_t key) {
    Py_ssize_t a = 0, b = m;
    while (a < b) {
        const Py_ssize_t mid = a + (b - a) / 2;
        if (keys[mid] < key) a = mid + 1;
        else b = mid;
    }
    return a < m && keys[a] == key;
}

/* How many of ids[0..len) are among the clue's name tokens. */
static double in_clue(const int32_t *ids, int64_t len, const int64_t *clue, Py_ssize_t m) {
    double c = 0;
    for (int64_t i = 0; i < len; i++) c += holds(clue, m, ids[i]);
    return c;
}
