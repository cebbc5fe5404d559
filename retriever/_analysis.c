/* Indexing's hot loop in C: texts -> term ids through the analyzer's word table.
 *
 * Written by hand because profiling a 100k-article build showed this loop (lower-casing,
 * splitting, one dict lookup per word) taking about 40% of the build in Python. It must give
 * exactly what retriever.analyzer.Analyzer.term_ids gives with the default token pattern:
 * for an ASCII text the words are the runs of [A-Za-z0-9_] of two or more characters of
 * text.lower() (text as it is without case folding); any other text goes through the
 * `words` callable (the analyzer's own normalization and pattern). Each word is looked up in
 * `table`, a dict subclass whose __missing__ adds a new word (stop-word check, stemming) in
 * Python, in the order the words appear, so term ids are assigned as the Python loop assigns
 * them. A per-call memo of the words already looked up skips the str and the dict lookup for
 * repeated words (the loop cost 0.69 s of CPU per 20k articles without it, 0.51 s with it,
 * 1.11 s in Python). tests/retriever/test_counting_kernel.py compares the two on random texts.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <stdint.h>
#include <string.h>

typedef struct {
    int64_t *data;
    Py_ssize_t len, cap;
} IdBuf;

static int buf_push(IdBuf *b, int64_t v) {
    if (b->len == b->cap) {
        Py_ssize_t cap = b->cap ? b->cap * 2 : 4096;
        int64_t *d = PyMem_Realloc(b->data, (size_t)cap * sizeof(int64_t));
        if (!d) {
            PyErr_NoMemory();
            return -1;
        }
        b->data = d;
        b->cap = cap;
    }
    b->data[b->len++] = v;
    return 0;
}

/* A new word's id, added to `table` as retriever.analyzer.TermTable.__missing__ adds it
 * (the same steps, in C: about a quarter of its cost for the ~350k distinct words of a
 * 100k-article corpus). NULL for a table of another kind (its own __missing__ runs). */
typedef struct {
    PyObject *stop, *stem, *ids, *terms; /* set of stop words, stemmer or None, dict, list */
} Miss;

static PyObject *miss_id(PyObject *table, const Miss *m, PyObject *word) {
    const int stop = PySequence_Contains(m->stop, word);
    if (stop < 0) return NULL;
    PyObject *id;
    if (stop) {
        id = PyLong_FromLong(-1);
    } else {
        PyObject *term = m->stem == Py_None ? Py_NewRef(word) : PyObject_CallOneArg(m->stem, word);
        if (!term) return NULL;
        id = PyDict_GetItemWithError(m->ids, term); /* borrowed */
        if (id) {
            Py_INCREF(id);
        } else if (!PyErr_Occurred()) {
            id = PyLong_FromSsize_t(PyList_GET_SIZE(m->terms));
            if (id && (PyDict_SetItem(m->ids, term, id) < 0 || PyList_Append(m->terms, term) < 0))
                Py_CLEAR(id);
        }
        Py_DECREF(term);
    }
    if (id && PyDict_SetItem(table, word, id) < 0) Py_CLEAR(id);
    return id;
}

/* The id `table` gives `word` (stealing the reference to `word`) into *out; -1 on error.
 * `miss`: the table's parts when it is a plain TermTable (NULL: call its __missing__). */
static int table_id(PyObject *table, const Miss *miss, PyObject *word, long long *out) {
    if (!word) return -1;
    PyObject *id = PyDict_GetItemWithError(table, word); /* borrowed */
    int owned = 0;
    if (!id) {
        if (PyErr_Occurred()) {
            Py_DECREF(word);
            return -1;
        }
        /* runs the table's __missing__, or its steps in C */
        id = miss ? miss_id(table, miss, word) : PyObject_GetItem(table, word);
        owned = 1;
    }
    Py_DECREF(word);
    if (!id) return -1;
    *out = PyLong_AsLongLong(id);
    if (owned) Py_DECREF(id);
    return (*out == -1 && PyErr_Occurred()) ? -1 : 0;
}

/* Push `v` unless it is negative (a stop word). */
static int push_id(IdBuf *b, long long v) { return v < 0 ? 0 : buf_push(b, (int64_t)v); }

/* Look `word` up in `table` (stealing the reference) and push its id. 0, or -1 on error. */
static int lookup(PyObject *table, const Miss *miss, PyObject *word, IdBuf *out) {
    long long v;
    if (table_id(table, miss, word, &v) < 0) return -1;
    return push_id(out, v);
}

/* A per-call memo of ASCII word bytes -> id (open addressing, FNV-1a): a word seen earlier in
 * the same call costs a hash and a memcmp instead of a new str and a dict lookup. Only
 * remembers what `table` answered, and the table never changes an answer, so the ids are
 * the same as without it. */
typedef struct {
    uint64_t hash;
    long long id;
    Py_ssize_t off, len; /* len 0: empty slot (words have two or more characters) */
} Slot;

typedef struct {
    Slot *slots;
    Py_ssize_t mask, used;
    char *arena;
    Py_ssize_t arena_len, arena_cap;
} Memo;

static uint64_t fnv1a(const char *s, Py_ssize_t n) {
    uint64_t h = 1469598103934665603ULL;
    for (Py_ssize_t i = 0; i < n; i++) h = (h ^ (unsigned char)s[i]) * 1099511628211ULL;
    return h;
}

static Slot *memo_find(Memo *m, const char *s, Py_ssize_t n, uint64_t h) {
    Py_ssize_t i = (Py_ssize_t)(h & (uint64_t)m->mask);
    for (;;) {
        Slot *e = &m->slots[i];
        if (e->len == 0) return e;
        if (e->hash == h && e->len == n && memcmp(m->arena + e->off, s, (size_t)n) == 0) return e;
        i = (i + 1) & m->mask;
    }
}

static int memo_grow(Memo *m) {
    const Py_ssize_t cap = (m->mask + 1) * 2;
    Slot *slots = PyMem_Calloc((size_t)cap, sizeof(Slot));
    if (!slots) {
        PyErr_NoMemory();
        return -1;
    }
    for (Py_ssize_t i = 0; i <= m->mask; i++) {
        Slot *e = &m->slots[i];
        if (e->len == 0) continue;
        Py_ssize_t j = (Py_ssize_t)(e->hash & (uint64_t)(cap - 1));
        while (slots[j].len) j = (j + 1) & (cap - 1);
        slots[j] = *e;
    }
    PyMem_Free(m->slots);
    m->slots = slots;
    m->mask = cap - 1;
    return 0;
}

/* Remember `id` for the n bytes at s in the empty slot `e` found for them. */
static int memo_add(Memo *m, Slot *e, const char *s, Py_ssize_t n, uint64_t h, long long id) {
    if (m->arena_len + n > m->arena_cap) {
        Py_ssize_t cap = m->arena_cap * 2 + n;
        char *a = PyMem_Realloc(m->arena, (size_t)cap);
        if (!a) {
            PyErr_NoMemory();
            return -1;
        }
        m->arena = a;
        m->arena_cap = cap;
    }
    memcpy(m->arena + m->arena_len, s, (size_t)n);
    e->hash = h;
    e->id = id;
    e->off = m->arena_len;
    e->len = n;
    m->arena_len += n;
    m->used++;
    return 2 * m->used > m->mask ? memo_grow(m) : 0;
}

static inline int is_word(unsigned char c) {
    return (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || (c >= '0' && c <= '9') || c == '_';
}

static PyObject *term_ids_many(PyObject *self, PyObject *args) {
    PyObject *texts, *table, *words, *parts = Py_None;
    int casefold;
    if (!PyArg_ParseTuple(args, "O!O!pO|O:term_ids_many", &PyList_Type, &texts, &PyDict_Type,
                          &table, &casefold, &words, &parts))
        return NULL;
    Miss miss_parts, *miss = NULL;
    if (parts != Py_None) {
        if (!PyArg_ParseTuple(parts, "OOO!O!:term_ids_many parts", &miss_parts.stop,
                              &miss_parts.stem, &PyDict_Type, &miss_parts.ids, &PyList_Type,
                              &miss_parts.terms))
            return NULL;
        miss = &miss_parts;
    }
    const Py_ssize_t n = PyList_GET_SIZE(texts);
    IdBuf ids = {NULL, 0, 0};
    PyObject *lens = PyBytes_FromStringAndSize(NULL, n * (Py_ssize_t)sizeof(int64_t));
    char *scratch = NULL;
    Py_ssize_t scratch_cap = 0;
    Memo memo = {PyMem_Calloc(1 << 14, sizeof(Slot)), (1 << 14) - 1, 0, NULL, 0, 0};
    if (!lens || !memo.slots) {
        Py_XDECREF(lens);
        PyMem_Free(memo.slots);
        return PyErr_NoMemory();
    }
    int64_t *lens_out = (int64_t *)PyBytes_AS_STRING(lens);
    for (Py_ssize_t i = 0; i < n; i++) {
        PyObject *text = PyList_GET_ITEM(texts, i);
        if (!PyUnicode_Check(text)) {
            PyErr_Format(PyExc_TypeError, "text %zd is not a str", i);
            goto fail;
        }
        const Py_ssize_t before = ids.len;
        if (PyUnicode_IS_ASCII(text)) {
            const unsigned char *s = PyUnicode_1BYTE_DATA(text);
            const Py_ssize_t len = PyUnicode_GET_LENGTH(text);
            if (len > scratch_cap) {
                char *p = PyMem_Realloc(scratch, (size_t)len);
                if (!p) {
                    PyErr_NoMemory();
                    goto fail;
                }
                scratch = p;
                scratch_cap = len;
            }
            Py_ssize_t j = 0;
            while (j < len) {
                while (j < len && !is_word(s[j])) j++;
                const Py_ssize_t start = j;
                while (j < len && is_word(s[j])) {
                    unsigned char c = s[j];
                    scratch[j - start] = (casefold && c >= 'A' && c <= 'Z') ? (char)(c + 32) : (char)c;
                    j++;
                }
                const Py_ssize_t wlen = j - start;
                if (wlen < 2) continue;
                const uint64_t h = fnv1a(scratch, wlen);
                Slot *e = memo_find(&memo, scratch, wlen, h);
                long long v = e->id;
                if (e->len == 0) {
                    PyObject *w = PyUnicode_New(wlen, 127);
                    if (w) memcpy(PyUnicode_1BYTE_DATA(w), scratch, (size_t)wlen);
                    if (table_id(table, miss, w, &v) < 0) goto fail;
                    if (memo_add(&memo, e, scratch, wlen, h, v) < 0) goto fail;
                }
                if (push_id(&ids, v) < 0) goto fail;
            }
        } else {
            PyObject *list = PyObject_CallOneArg(words, text);
            if (!list) goto fail;
            if (!PyList_Check(list)) {
                Py_DECREF(list);
                PyErr_SetString(PyExc_TypeError, "words() must return a list");
                goto fail;
            }
            for (Py_ssize_t k = 0; k < PyList_GET_SIZE(list); k++) {
                PyObject *w = PyList_GET_ITEM(list, k);
                Py_INCREF(w);
                if (lookup(table, miss, w, &ids) < 0) {
                    Py_DECREF(list);
                    goto fail;
                }
            }
            Py_DECREF(list);
        }
        lens_out[i] = ids.len - before;
    }
    PyMem_Free(scratch);
    PyMem_Free(memo.slots);
    PyMem_Free(memo.arena);
    PyObject *flat = PyBytes_FromStringAndSize((const char *)ids.data,
                                               ids.len * (Py_ssize_t)sizeof(int64_t));
    PyMem_Free(ids.data);
    if (!flat) {
        Py_DECREF(lens);
        return NULL;
    }
    return Py_BuildValue("(NN)", flat, lens);
fail:
    PyMem_Free(scratch);
    PyMem_Free(memo.slots);
    PyMem_Free(memo.arena);
    PyMem_Free(ids.data);
    Py_DECREF(lens);
    return NULL;
}

/* Sort a few int32 ascending: insertion sort for the short runs of one text's distinct
 * terms (tens), qsort beyond. */
static int cmp_i32(const void *a, const void *b) {
    const int32_t x = *(const int32_t *)a, y = *(const int32_t *)b;
    return (x > y) - (x < y);
}

static void sort_i32(int32_t *v, Py_ssize_t n) {
    if (n > 48) {
        qsort(v, (size_t)n, sizeof(int32_t), cmp_i32);
        return;
    }
    for (Py_ssize_t i = 1; i < n; i++) {
        const int32_t x = v[i];
        Py_ssize_t j = i;
        while (j > 0 && v[j - 1] > x) {
            v[j] = v[j - 1];
            j--;
        }
        v[j] = x;
    }
}

/* Per-text term counts from term_ids_many's output, as CSR parts: for each text its
 * distinct term ids ascending and how often each occurs. What numpy's unique over
 * (text, term) keys gives (counting.count_texts's definition), with one counter per term
 * and the few distinct ids of a text sorted instead of a sort of every occurrence. */
static PyObject *count_rows(PyObject *self, PyObject *args) {
    Py_buffer ids_b, lens_b;
    if (!PyArg_ParseTuple(args, "y*y*:count_rows", &ids_b, &lens_b)) return NULL;
    PyObject *result = NULL, *indptr_o = NULL, *cols_o = NULL, *counts_o = NULL;
    int32_t *count = NULL, *touched = NULL, *cols = NULL, *counts = NULL;
    const int64_t *ids = (const int64_t *)ids_b.buf;
    const int64_t *lens = (const int64_t *)lens_b.buf;
    const Py_ssize_t n_ids = ids_b.len / (Py_ssize_t)sizeof(int64_t);
    const Py_ssize_t n = lens_b.len / (Py_ssize_t)sizeof(int64_t);
    int64_t width = 0, total = 0, longest = 0;
    for (Py_ssize_t i = 0; i < n; i++) {
        if (lens[i] < 0) {
            PyErr_SetString(PyExc_ValueError, "count_rows: a negative length");
            goto done;
        }
        total += lens[i];
        if (lens[i] > longest) longest = lens[i];
    }
    if (total != n_ids) {
        PyErr_SetString(PyExc_ValueError, "count_rows: the lengths do not add up to the ids");
        goto done;
    }
    for (Py_ssize_t j = 0; j < n_ids; j++) {
        if (ids[j] < 0 || ids[j] >= INT32_MAX) {
            PyErr_SetString(PyExc_ValueError, "count_rows: a term id out of range");
            goto done;
        }
        if (ids[j] + 1 > width) width = ids[j] + 1;
    }
    indptr_o = PyBytes_FromStringAndSize(NULL, (n + 1) * (Py_ssize_t)sizeof(int64_t));
    count = PyMem_Calloc((size_t)(width ? width : 1), sizeof(int32_t));
    touched = PyMem_Malloc((size_t)(longest ? longest : 1) * sizeof(int32_t));
    cols = PyMem_Malloc((size_t)(n_ids ? n_ids : 1) * sizeof(int32_t));
    counts = PyMem_Malloc((size_t)(n_ids ? n_ids : 1) * sizeof(int32_t));
    if (!indptr_o || !count || !touched || !cols || !counts) {
        PyErr_NoMemory();
        goto done;
    }
    int64_t *indptr = (int64_t *)PyBytes_AS_STRING(indptr_o);
    Py_ssize_t pos = 0, out = 0;
    indptr[0] = 0;
    for (Py_ssize_t i = 0; i < n; i++) {
        Py_ssize_t k = 0;
        for (const Py_ssize_t end = pos + (Py_ssize_t)lens[i]; pos < end; pos++) {
            const int32_t id = (int32_t)ids[pos];
            if (count[id]++ == 0) touched[k++] = id;
        }
        sort_i32(touched, k);
        for (Py_ssize_t t = 0; t < k; t++) {
            cols[out] = touched[t];
            counts[out] = count[touched[t]];
            count[touched[t]] = 0;
            out++;
        }
        indptr[i + 1] = out;
    }
    cols_o = PyBytes_FromStringAndSize((const char *)cols, out * (Py_ssize_t)sizeof(int32_t));
    counts_o = PyBytes_FromStringAndSize((const char *)counts, out * (Py_ssize_t)sizeof(int32_t));
    if (cols_o && counts_o) result = PyTuple_Pack(3, indptr_o, cols_o, counts_o);
done:
    Py_XDECREF(indptr_o);
    Py_XDECREF(cols_o);
    Py_XDECREF(counts_o);
    PyMem_Free(count);
    PyMem_Free(touched);
    PyMem_Free(cols);
    PyMem_Free(counts);
    PyBuffer_Release(&ids_b);
    PyBuffer_Release(&lens_b);
    return result;
}

static PyMethodDef methods[] = {
    {"term_ids_many", term_ids_many, METH_VARARGS,
     "term_ids_many(texts, table, casefold, words, parts=None) -> (ids, lens): int64 bytes of "
     "the kept term ids of every text, concatenated, and of how many each text has. parts: "
     "a TermTable's (stop words, stemmer or None, ids, terms), to add new words in C."},
    {"count_rows", count_rows, METH_VARARGS,
     "count_rows(ids, lens) -> (indptr, cols, counts): int64, int32 and int32 bytes of the "
     "per-text term counts (CSR parts, each text's terms ascending) of term_ids_many's output."},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "_analysis",
    "Texts to term ids for indexing (see _analysis.c).", -1, methods, NULL, NULL, NULL, NULL,
};

PyMODINIT_FUNC PyInit__analysis(void) { return PyModule_Create(&module); }
