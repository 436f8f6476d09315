/* The similarity kernels of pipeline.similarity: MinHash signatures (``minhash32``), exact
 * overlap counts of many set pairs (``overlap_counts``) and the LSH band pairs
 * (``band_pair_codes``). Integer arithmetic only, so any order of the work gives the values of
 * the numpy formulations, which stay the specification (tests/test_smf_accel.py). */
#include "accel.h"

const char accel_minhash32_doc[] = PyDoc_STR(
"minhash32(shingles, a, b) -> bytes\n\n"
"similarity.minhash of a non-empty uint64 shingle array with the uint32 permutations a, b:\n"
"for each permutation j the least (a[j] * fmix32(fold32(s)) + b[j]) mod 2**32 over the\n"
"shingles s, as uint32 native bytes. (Offered to similarity.minhash; integer arithmetic, so\n"
"any order of the work gives the same values.)");

PyObject *accel_minhash32(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 3) {
        PyErr_SetString(PyExc_TypeError, "minhash32 takes shingles, a, b");
        return NULL;
    }
    Py_buffer sv, av, bv;
    if (PyObject_GetBuffer(args[0], &sv, PyBUF_C_CONTIGUOUS) < 0) return NULL;
    if (PyObject_GetBuffer(args[1], &av, PyBUF_C_CONTIGUOUS) < 0) {
        PyBuffer_Release(&sv);
        return NULL;
    }
    if (PyObject_GetBuffer(args[2], &bv, PyBUF_C_CONTIGUOUS) < 0) {
        PyBuffer_Release(&sv);
        PyBuffer_Release(&av);
        return NULL;
    }
    PyObject *out = NULL;
    Py_ssize_t n = sv.len / 8, k = av.len / 4;
    uint32_t *h = NULL;
    if (sv.len % 8 || av.len % 4 || bv.len != av.len) {
        PyErr_SetString(PyExc_ValueError, "minhash32: uint64 shingles and equal uint32 a, b");
        goto done;
    }
    h = (uint32_t *)PyMem_Malloc((size_t)(n ? n : 1) * sizeof(uint32_t));
    out = PyBytes_FromStringAndSize(NULL, k * 4);
    if (!h || !out) {
        Py_CLEAR(out);
        if (!h) PyErr_NoMemory();
        goto done;
    }
    const uint64_t *sh = (const uint64_t *)sv.buf;
    for (Py_ssize_t i = 0; i < n; i++) {
        uint32_t x = (uint32_t)(sh[i] ^ (sh[i] >> 32)); /* fold32 */
        x ^= x >> 16;                                   /* fmix32 */
        x *= 0x85EBCA6Bu;
        x ^= x >> 13;
        x *= 0xC2B2AE35u;
        x ^= x >> 16;
        h[i] = x;
    }
    const uint32_t *a = (const uint32_t *)av.buf, *b = (const uint32_t *)bv.buf;
    uint32_t *sig = (uint32_t *)PyBytes_AS_STRING(out);
    for (Py_ssize_t j = 0; j < k; j++) {
        uint32_t m = 0xFFFFFFFFu, aj = a[j], bj = b[j];
        for (Py_ssize_t i = 0; i < n; i++) {
            uint32_t v = h[i] * aj + bj;
            m = v < m ? v : m;
        }
        sig[j] = m;
    }
done:
    PyMem_Free(h);
    PyBuffer_Release(&sv);
    PyBuffer_Release(&av);
    PyBuffer_Release(&bv);
    return out;
}

const char accel_overlap_counts_doc[] = PyDoc_STR(
"overlap_counts(sets, i, j, cap) -> bytes\n\n"
"similarity.overlap_counts for many pairs: sets is a list of sorted unique uint64 arrays,\n"
"i and j int64 indexes into it (one pair per position). For each pair (a, b) = (sets[i[k]],\n"
"sets[j[k]]), with both cut to their common hash range when either holds cap or more values,\n"
"the intersection size and the two (cut) sizes, as 3 int64 per pair in native bytes.\n"
"(Offered to similarity.pair_similarities; counting only, so exactly the values of the\n"
"numpy formulation.)");

/* number of values <= limit in the sorted array a[0..n) */
static Py_ssize_t upper_bound_u64(const uint64_t *a, Py_ssize_t n, uint64_t limit) {
    Py_ssize_t lo = 0, hi = n;
    while (lo < hi) {
        Py_ssize_t mid = lo + (hi - lo) / 2;
        if (a[mid] <= limit) lo = mid + 1; else hi = mid;
    }
    return lo;
}

static int set_view(PyObject *sets, Py_ssize_t n_sets, long long k, Py_buffer *view) {
    if (k < 0 || k >= n_sets) {
        PyErr_Format(PyExc_IndexError, "overlap_counts: set index %lld outside 0..%zd", k, n_sets - 1);
        return -1;
    }
    if (PyObject_GetBuffer(PyList_GET_ITEM(sets, k), view, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) < 0)
        return -1;
    const char *f = view->format ? view->format : "B";
    char code = f[0] ? f[strlen(f) - 1] : 'B';
    if (view->itemsize != 8 || (code != 'L' && code != 'Q') || view->len % 8) {
        PyBuffer_Release(view);
        PyErr_Format(PyExc_ValueError, "overlap_counts: set %lld is not a uint64 array", k);
        return -1;
    }
    return 0;
}

/* a buffer of signed 8-byte integers (numpy int64: format "l" or "q") */
static int is_int64(const Py_buffer *v) {
    const char *f = v->format ? v->format : "B";
    char code = f[0] ? f[strlen(f) - 1] : 'B';
    return v->itemsize == 8 && (code == 'l' || code == 'q') && v->len % 8 == 0;
}

PyObject *accel_overlap_counts(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 4 || !PyList_Check(args[0])) {
        PyErr_SetString(PyExc_TypeError, "overlap_counts takes a list of sets, i, j and cap");
        return NULL;
    }
    long long cap = PyLong_AsLongLong(args[3]);
    if (cap == -1 && PyErr_Occurred()) return NULL;
    PyObject *sets = args[0];
    Py_ssize_t n_sets = PyList_GET_SIZE(sets);
    Py_buffer iv, jv;
    if (PyObject_GetBuffer(args[1], &iv, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) < 0) return NULL;
    if (PyObject_GetBuffer(args[2], &jv, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) < 0) {
        PyBuffer_Release(&iv);
        return NULL;
    }
    PyObject *out = NULL;
    if (!is_int64(&iv) || !is_int64(&jv) || jv.len != iv.len) {
        PyErr_SetString(PyExc_ValueError, "overlap_counts: i and j must be int64 arrays of one length");
        goto done;
    }
    Py_ssize_t m = iv.len / 8;
    out = PyBytes_FromStringAndSize(NULL, m * 24);
    if (!out) goto done;
    const long long *ii = (const long long *)iv.buf, *jj = (const long long *)jv.buf;
    int64_t *res = (int64_t *)PyBytes_AS_STRING(out);
    for (Py_ssize_t k = 0; k < m; k++) {
        Py_buffer av, bv;
        if (set_view(sets, n_sets, ii[k], &av) < 0) { Py_CLEAR(out); goto done; }
        if (set_view(sets, n_sets, jj[k], &bv) < 0) { PyBuffer_Release(&av); Py_CLEAR(out); goto done; }
        const uint64_t *a = (const uint64_t *)av.buf, *b = (const uint64_t *)bv.buf;
        Py_ssize_t la = av.len / 8, lb = bv.len / 8, inter = 0;
        if (la && lb && (la >= cap || lb >= cap)) {
            uint64_t limit = a[la - 1] < b[lb - 1] ? a[la - 1] : b[lb - 1];
            la = upper_bound_u64(a, la, limit);
            lb = upper_bound_u64(b, lb, limit);
        }
        Py_ssize_t x = 0, y = 0;
        while (x < la && y < lb) {  /* merge count, branch-free steps */
            uint64_t va = a[x], vb = b[y];
            inter += va == vb;
            x += va <= vb;
            y += vb <= va;
        }
        res[3 * k] = inter;
        res[3 * k + 1] = la;
        res[3 * k + 2] = lb;
        PyBuffer_Release(&av);
        PyBuffer_Release(&bv);
    }
done:
    PyBuffer_Release(&iv);
    PyBuffer_Release(&jv);
    return out;
}

const char accel_band_pair_codes_doc[] = PyDoc_STR(
"band_pair_codes(sig, bands, band_lo, band_hi, is_new) -> bytes\n\n"
"similarity._band_pairs for the bands band_lo..band_hi-1 at once: sig is a C-contiguous\n"
"(n, num_perm) uint32 signature matrix, is_new n bytes (0 or 1). For each band, the rows\n"
"whose band key (similarity.band_key) equals the key of a new row are bucketed by key, and\n"
"every pair i < j of a bucket with a new member gives the code i * n + j, as int64 native\n"
"bytes, band after band (a pair found in several bands appears once per band; callers merge\n"
"with similarity.sorted_unique). Integer hashing and exact key equality only, so exactly\n"
"the pairs of the numpy formulation.");

typedef struct { uint64_t key; int64_t row; } KeyRow;

static int keyrow_cmp(const void *x, const void *y) {
    const KeyRow *a = (const KeyRow *)x, *b = (const KeyRow *)y;
    if (a->key != b->key) return a->key < b->key ? -1 : 1;
    return (a->row > b->row) - (a->row < b->row);
}

/* similarity.band_key of one row */
static inline uint64_t row_band_key(const uint32_t *row, Py_ssize_t rows, Py_ssize_t band) {
    uint64_t h = (uint64_t)rows;
    const uint32_t *c = row + band * rows;
    for (Py_ssize_t j = 0; j < rows; j++) h = fmix64(h * ROLL + (uint64_t)c[j]);
    return h + (uint64_t)band * ROLL;
}

/* the slot of key k in an open-addressing table of cap = 2**(64 - shift) slots: its own slot
 * if k is there, else the free slot where it would go (the table is never full) */
static inline size_t key_slot(const uint64_t *table, const unsigned char *used, Py_ssize_t cap,
                              int shift, uint64_t k) {
    size_t s = shift < 64 ? (size_t)((k * ROLL) >> shift) : 0;
    while (used[s] && table[s] != k) s = (s + 1) & (size_t)(cap - 1);
    return s;
}

PyObject *accel_band_pair_codes(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 5) {
        PyErr_SetString(PyExc_TypeError, "band_pair_codes takes sig, bands, band_lo, band_hi, is_new");
        return NULL;
    }
    Py_ssize_t bands = PyLong_AsSsize_t(args[1]), lo = PyLong_AsSsize_t(args[2]),
               hi = PyLong_AsSsize_t(args[3]);
    if (PyErr_Occurred()) return NULL;
    Py_buffer sv, nv;
    if (PyObject_GetBuffer(args[0], &sv, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | PyBUF_ND) < 0) return NULL;
    if (PyObject_GetBuffer(args[4], &nv, PyBUF_C_CONTIGUOUS) < 0) {
        PyBuffer_Release(&sv);
        return NULL;
    }
    PyObject *out = NULL;
    KeyRow *hits = NULL;
    uint64_t *table = NULL;
    unsigned char *used = NULL;
    int64_t *codes = NULL;
    const char *f = sv.format ? sv.format : "B";
    char code = f[0] ? f[strlen(f) - 1] : 'B';
    if (sv.ndim != 2 || sv.itemsize != 4 || (code != 'I' && code != 'L')) {
        PyErr_SetString(PyExc_ValueError, "band_pair_codes: sig must be a 2-d uint32 array");
        goto done;
    }
    Py_ssize_t n = sv.shape[0], perm = sv.shape[1];
    if (bands <= 0 || perm % bands || lo < 0 || hi > bands || lo > hi || nv.len != n) {
        PyErr_SetString(PyExc_ValueError, "band_pair_codes: bands must divide num_perm, "
                        "0 <= band_lo <= band_hi <= bands, and is_new hold one byte per row");
        goto done;
    }
    Py_ssize_t rows = perm / bands;
    const uint32_t *sig = (const uint32_t *)sv.buf;
    const unsigned char *is_new = (const unsigned char *)nv.buf;
    Py_ssize_t n_new = 0;
    for (Py_ssize_t i = 0; i < n; i++) n_new += is_new[i] != 0;
    Py_ssize_t cap = 1;  /* open-addressing set of the new rows' keys, at most half full */
    while (cap < 2 * n_new) cap <<= 1;
    int shift = 64;
    for (Py_ssize_t c = cap; c > 1; c >>= 1) shift--;
    table = (uint64_t *)PyMem_Malloc((size_t)cap * sizeof(uint64_t));
    used = (unsigned char *)PyMem_Malloc((size_t)cap);
    hits = (KeyRow *)PyMem_Malloc((size_t)(n ? n : 1) * sizeof(KeyRow));
    Py_ssize_t n_codes = 0, room = 1024;
    codes = (int64_t *)PyMem_Malloc((size_t)room * sizeof(int64_t));
    if (!table || !used || !hits || !codes) {
        PyErr_NoMemory();
        goto done;
    }
    for (Py_ssize_t band = lo; band < hi && n_new; band++) {
        memset(used, 0, (size_t)cap);
        for (Py_ssize_t i = 0; i < n; i++) {
            if (!is_new[i]) continue;
            uint64_t k = row_band_key(sig + i * perm, rows, band);
            size_t s = key_slot(table, used, cap, shift, k);
            used[s] = 1;
            table[s] = k;
        }
        Py_ssize_t m = 0;
        for (Py_ssize_t i = 0; i < n; i++) {
            uint64_t k = row_band_key(sig + i * perm, rows, band);
            if (used[key_slot(table, used, cap, shift, k)]) {
                hits[m].key = k;
                hits[m].row = (int64_t)i;
                m++;
            }
        }
        qsort(hits, (size_t)m, sizeof(KeyRow), keyrow_cmp);
        for (Py_ssize_t a = 0; a < m;) {
            Py_ssize_t b = a + 1;
            while (b < m && hits[b].key == hits[a].key) b++;
            for (Py_ssize_t x = a; x < b; x++)
                for (Py_ssize_t y = x + 1; y < b; y++) {
                    if (!is_new[hits[x].row] && !is_new[hits[y].row]) continue;
                    if (n_codes == room) {
                        room *= 2;
                        int64_t *grown = (int64_t *)PyMem_Realloc(codes, (size_t)room * sizeof(int64_t));
                        if (!grown) {
                            PyErr_NoMemory();
                            goto done;
                        }
                        codes = grown;
                    }
                    codes[n_codes++] = hits[x].row * (int64_t)n + hits[y].row;
                }
            a = b;
        }
    }
    out = PyBytes_FromStringAndSize((const char *)codes, n_codes * (Py_ssize_t)sizeof(int64_t));
done:
    PyMem_Free(table);
    PyMem_Free(used);
    PyMem_Free(hits);
    PyMem_Free(codes);
    PyBuffer_Release(&sv);
    PyBuffer_Release(&nv);
    return out;
}
