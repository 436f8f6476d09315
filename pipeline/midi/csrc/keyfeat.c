/* The learned key method's per-piece sums (analysis.key.key_features before its division by
 * each row's total) and the windowed key path it reads (analysis.modulation.windowed_path:
 * segment numbers, pitch-class sets, Viterbi key path), in one pass over a note table.
 *
 * The numpy code stays the specification; every value here is the same to the last bit
 * (tests/test_smf_accel.py): the duration sums add each note's duration in note order, as
 * np.bincount does; the other rows are counts (exact in any order); the path repeats
 * key_path's float operations one by one. Where the numpy code takes a general path (notes
 * out of time order, an onset's notes out of pitch order, ticks outside 0..2**53, no pitched
 * note) this returns None and the caller runs it. */
#include "accel.h"

#define N_ROWS 21 /* len(key.FEATURES) */
#define MAX_VOICES 64 /* more voices: the numpy code runs */
#define N_KEYS 24
#define N_SETS 4096

/* pitch class of a pitch, as numpy's % (never negative) */
static inline int pclass(int p) {
    int r = p % 12;
    return r < 0 ? r + 12 : r;
}

/* floor(a / b) for b > 0 and |a| <= 2**53 (exact): a float64 quotient corrected by the
 * remainder, cheaper than an int64 division */
static inline int64_t floordiv_small(int64_t a, int64_t b) {
    int64_t q = (int64_t)floor((double)a / (double)b);
    int64_t r = a - q * b;
    while (r < 0) {
        q--;
        r += b;
    }
    while (r >= b) {
        q++;
        r -= b;
    }
    return q;
}

/* the number of values of the sorted array a[0..n) below x (np.searchsorted, side left),
 * knowing that a[0..lo) are below x: a few steps forward (a note ends near where it
 * starts), then a binary search */
static Py_ssize_t below(const int64_t *a, Py_ssize_t n, Py_ssize_t lo, int64_t x) {
    for (int step = 0; step < 4; step++, lo++)
        if (lo == n || a[lo] >= x) return lo;
    Py_ssize_t hi = n;
    while (lo < hi) {
        Py_ssize_t mid = lo + (hi - lo) / 2;
        if (a[mid] < x) lo = mid + 1;
        else hi = mid;
    }
    return lo;
}

/* The blocks of ``len`` ticks (block n: ticks [n * len, (n + 1) * len)) where a note starts,
 * in order, and the set of pitch classes sounding in each as a 12-bit number: a note counts
 * in every such block from its start's to its last tick's (at least its start's). The numpy
 * code's +1/-1 counts per block rank and their running sum. Fills v (each note's start block),
 * blocks (the distinct ones), sets, and first/after/counts (scratch of m, m and (m + 1) * 12);
 * returns the number of blocks. */
static Py_ssize_t blocks(const int64_t *s, const int64_t *e, const int *pc, Py_ssize_t m,
                         int64_t len, int64_t *v, int64_t *blocks_out, int64_t *sets,
                         Py_ssize_t *first, Py_ssize_t *after, int64_t *counts) {
    Py_ssize_t nb = 0;
    for (Py_ssize_t i = 0; i < m; i++) {
        v[i] = floordiv_small(s[i], len);
        if (nb == 0 || v[i] != blocks_out[nb - 1]) blocks_out[nb++] = v[i];
        first[i] = nb - 1;
    }
    for (Py_ssize_t i = 0; i < m; i++) { /* the rank after the note's last block */
        int64_t last = floordiv_small(e[i] - 1, len);
        after[i] = below(blocks_out, nb, first[i] + 1, (last > v[i] ? last : v[i]) + 1);
    }
    memset(counts, 0, (size_t)(nb + 1) * 12 * sizeof(int64_t));
    for (Py_ssize_t i = 0; i < m; i++) {
        counts[first[i] * 12 + pc[i]] += 1;
        counts[after[i] * 12 + pc[i]] -= 1;
    }
    int64_t run[12] = {0};
    for (Py_ssize_t r = 0; r < nb; r++) {
        int64_t bits = 0;
        for (int j = 0; j < 12; j++) {
            run[j] += counts[r * 12 + j];
            if (run[j] > 0) bits |= (int64_t)1 << j;
        }
        sets[r] = bits;
    }
    return nb;
}

/* which major (bit r) and minor (bit 12 + r) triads on root r a pitch-class set holds */
static int32_t triads_of(int64_t set) {
    int32_t t = 0;
    for (int r = 0; r < 12; r++) {
        if (!(set >> r & 1) || !(set >> ((r + 7) % 12) & 1)) continue;
        if (set >> ((r + 4) % 12) & 1) t |= (int32_t)1 << r;
        if (set >> ((r + 3) % 12) & 1) t |= (int32_t)1 << (12 + r);
    }
    return t;
}

/* triads_of every pitch-class set, filled on the first call */
static int32_t TRIADS[N_SETS];
static int triads_ready = 0;

static void fill_triads(void) {
    for (int64_t set = 0; set < N_SETS; set++) TRIADS[set] = triads_of(set);
    triads_ready = 1;
}

/* modulation.key_path: Viterbi over the segments' sets with the (4096, 24) log-probability
 * table; a key change costs ``cost``; an empty set carries no evidence. */
static int viterbi(const int64_t *sets, Py_ssize_t n, const double *table, double cost,
                   int64_t *path) {
    if (n == 0) return 0;
    unsigned char *stayed = (unsigned char *)PyMem_Malloc((size_t)n * N_KEYS);
    Py_ssize_t *leader = (Py_ssize_t *)PyMem_Malloc((size_t)n * sizeof(Py_ssize_t));
    if (!stayed || !leader) {
        PyMem_Free(stayed);
        PyMem_Free(leader);
        PyErr_NoMemory();
        return -1;
    }
    double score[N_KEYS];
    for (int k = 0; k < N_KEYS; k++) score[k] = sets[0] ? table[sets[0] * N_KEYS + k] : 0.0;
    for (Py_ssize_t i = 1; i < n; i++) {
        int best = 0; /* argmax: the first maximum */
        for (int k = 1; k < N_KEYS; k++)
            if (score[k] > score[best]) best = k;
        double sw = score[best] - cost;
        const double *emit = table + sets[i] * N_KEYS;
        for (int k = 0; k < N_KEYS; k++) {
            int stay = score[k] >= sw; /* staying wins ties */
            stayed[i * N_KEYS + k] = (unsigned char)stay;
            double s = stay ? score[k] : sw; /* np.maximum(score, switch) */
            score[k] = s + (sets[i] ? emit[k] : 0.0);
        }
        leader[i] = best;
    }
    int k = 0;
    for (int j = 1; j < N_KEYS; j++)
        if (score[j] > score[k]) k = j;
    path[n - 1] = k;
    for (Py_ssize_t i = n - 1; i > 0; i--) {
        if (!stayed[i * N_KEYS + k]) k = (int)leader[i];
        path[i - 1] = k;
    }
    PyMem_Free(stayed);
    PyMem_Free(leader);
    return 0;
}

const char accel_key_features_doc[] = PyDoc_STR(
"key_features(notes, ticks_per_beat, final_beats, window_ticks, table, switch_cost,\n"
"             melody_min_share) -> (bytearray, bytearray, bytearray, bytearray) | None\n\n"
"The learned key method's 21 x 12 sums of a NOTE_DTYPE table (float64, key.key_features before\n"
"each row is divided by its total) and the windowed key path (modulation.windowed_path at\n"
"segments of window_ticks ticks, ``table`` its (4096, 24) float64 log-probabilities):\n"
"segment numbers, sets and key path (int64 each). None where the numpy code takes a general\n"
"path (no pitched note, notes out of time order or an onset out of pitch order, ticks outside\n"
"0..2**53, more than 64 voices).");

PyObject *accel_key_features(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 7) {
        PyErr_SetString(PyExc_TypeError, "key_features takes 7 arguments");
        return NULL;
    }
    int64_t tpb = PyLong_AsLongLong(args[1]);
    double final_beats = PyFloat_AsDouble(args[2]);
    int64_t window = PyLong_AsLongLong(args[3]);
    double cost = PyFloat_AsDouble(args[5]);
    double min_share = PyFloat_AsDouble(args[6]);
    if (PyErr_Occurred()) return NULL;
    if (tpb <= 0 || window <= 0) Py_RETURN_NONE;
    if (!triads_ready) fill_triads();
    Py_buffer tb;
    if (PyObject_GetBuffer(args[4], &tb, PyBUF_C_CONTIGUOUS) < 0) return NULL;
    if (tb.len != (Py_ssize_t)(N_SETS * N_KEYS * sizeof(double))) {
        PyBuffer_Release(&tb);
        PyErr_SetString(PyExc_ValueError, "key_features: the table must hold 4096 x 24 float64");
        return NULL;
    }
    const double *table = (const double *)tb.buf;
    Notes t;
    if (accel_notes_open(args[0], &t) < 0) {
        PyBuffer_Release(&tb);
        return NULL;
    }
    PyObject *out = NULL, *feat = NULL, *nums = NULL, *sets_b = NULL, *path_b = NULL;
    Py_ssize_t n = t.n ? t.n : 1;
    int64_t *s = (int64_t *)PyMem_Malloc((size_t)n * sizeof(int64_t));
    int64_t *e = (int64_t *)PyMem_Malloc((size_t)n * sizeof(int64_t));
    int *pc = (int *)PyMem_Malloc((size_t)n * sizeof(int));
    int64_t *v = (int64_t *)PyMem_Malloc((size_t)n * sizeof(int64_t));
    int64_t *ranks = (int64_t *)PyMem_Malloc((size_t)n * sizeof(int64_t));
    Py_ssize_t *first = (Py_ssize_t *)PyMem_Malloc((size_t)n * sizeof(Py_ssize_t));
    Py_ssize_t *after = (Py_ssize_t *)PyMem_Malloc((size_t)n * sizeof(Py_ssize_t));
    int64_t *counts = (int64_t *)PyMem_Malloc((size_t)(n + 1) * 12 * sizeof(int64_t));
    int64_t *bsets = (int64_t *)PyMem_Malloc((size_t)n * sizeof(int64_t));
    unsigned char *vi = (unsigned char *)PyMem_Malloc((size_t)n); /* each note's voice slot */
    if (!s || !e || !pc || !v || !ranks || !first || !after || !counts || !bsets || !vi) {
        PyErr_NoMemory();
        goto done;
    }
    /* the pitched notes: in time order, each onset in pitch order, ticks within 0..2**53 */
    const int64_t LIM = (int64_t)1 << 53;
    Py_ssize_t m = 0;
    int prev_pitch = 0;
    /* the voices (track * 16 + channel), their note counts and pitch sums in note order */
    int64_t voice_id[MAX_VOICES], voice_n[MAX_VOICES];
    double voice_sum[MAX_VOICES];
    int n_voices = 0;
    for (Py_ssize_t i = 0; i < t.n; i++) {
        int ch = f_i16(&t, i, O_CHANNEL);
        if (ch == DRUM) continue;
        int64_t si = f_i64(&t, i, O_START), ei = f_i64(&t, i, O_END);
        int p = f_i16(&t, i, O_PITCH);
        if (si < 0 || si > LIM || ei < 0 || ei > LIM) goto none;
        if (m && (si < s[m - 1] || (si == s[m - 1] && p < prev_pitch))) goto none;
        int64_t id = (int64_t)f_i16(&t, i, O_TRACK) * 16 + ch;
        int k = 0;
        while (k < n_voices && voice_id[k] != id) k++;
        if (k == n_voices) {
            if (n_voices == MAX_VOICES) goto none;
            voice_id[k] = id;
            voice_n[k] = 0;
            voice_sum[k] = 0.0;
            n_voices++;
        }
        voice_n[k]++;
        voice_sum[k] += (double)p;
        vi[m] = (unsigned char)k;
        s[m] = si;
        e[m] = ei;
        pc[m] = pclass(p);
        prev_pitch = p;
        m++;
    }
    if (m == 0) goto none;
    /* the melody voice (key.melody_voice): the highest mean pitch among the voices holding at
     * least min_share of the notes, the lowest voice number on a tie or when none does */
    int melody = 0;
    double best_mean = 0.0;
    for (int k = 0; k < n_voices; k++) {
        double mean = (double)voice_n[k] < min_share * (double)m
                          ? -INFINITY : voice_sum[k] / (double)voice_n[k];
        if (k == 0 || mean > best_mean || (mean == best_mean && voice_id[k] < voice_id[melody])) {
            melody = k;
            best_mean = mean;
        }
    }
    feat = PyByteArray_FromStringAndSize(NULL, N_ROWS * 12 * sizeof(double));
    if (!feat) goto done;
    double (*f)[12] = (double (*)[12])PyByteArray_AS_STRING(feat);
    memset(f, 0, N_ROWS * 12 * sizeof(double));
    /* rows 0-5: duration, onsets, bass, top, final, on-beat (in note order, as bincount) */
    int64_t last_end = e[0];
    for (Py_ssize_t i = 1; i < m; i++)
        if (e[i] > last_end) last_end = e[i];
    double tpb_d = (double)tpb, final_from = (double)last_end - final_beats * tpb_d;
    /* the beats where a note starts (v: each note's beat) and their pitch-class sets */
    Py_ssize_t nb = blocks(s, e, pc, m, tpb, v, ranks, bsets, first, after, counts);
    for (Py_ssize_t i = 0; i < m; i++) {
        double dur = (double)(e[i] - s[i]) / tpb_d;
        int c = pc[i];
        f[0][c] += dur;
        f[1][c] += 1.0;
        if (i == 0 || s[i] != s[i - 1]) f[2][c] += dur;     /* the onset's lowest note */
        if (i == m - 1 || s[i + 1] != s[i]) f[3][c] += dur; /* its highest */
        if ((double)e[i] > final_from) f[4][c] += dur;
        if (s[i] == v[i] * tpb) f[5][c] += dur; /* on a beat */
        if (vi[i] == melody) f[19][c] += dur;
    }
    /* rows 6-8: lowest note of the first onset, lowest and highest of the last */
    Py_ssize_t last_onset = m - 1;
    while (last_onset > 0 && s[last_onset - 1] == s[m - 1]) last_onset--;
    f[6][pc[0]] = 1.0;
    f[7][pc[last_onset]] = 1.0;
    f[8][pc[m - 1]] = 1.0;
    /* row 20: the melody's last note (its last onset's highest: its last row here) */
    Py_ssize_t last_melody = m - 1;
    while (vi[last_melody] != melody) last_melody--;
    f[20][pc[last_melody]] = 1.0;
    /* rows 9-16: triads of the beats where a note starts, first and last ones, cadences */
    int64_t prev_triads = -1;
    for (Py_ssize_t r = 0; r < nb; r++) {
        int64_t tri = TRIADS[bsets[r]];
        if (!tri) continue;
        for (int j = 0; j < 24; j++) {
            if (!(tri >> j & 1)) continue;
            f[9 + j / 12][j % 12] += 1.0;
            if (prev_triads < 0) f[11 + j / 12][j % 12] = 1.0;
            /* a V-I cadence: a major triad on the fifth above this root the chord beat before */
            if (prev_triads >= 0 && (prev_triads >> ((j % 12 + 7) % 12) & 1))
                f[15 + j / 12][j % 12] += 1.0;
        }
        prev_triads = tri;
    }
    if (prev_triads >= 0)
        for (int j = 0; j < 24; j++)
            if (prev_triads >> j & 1) f[13 + j / 12][j % 12] = 1.0;
    /* the windowed path: segments where a note starts, their sets, the Viterbi key path */
    Py_ssize_t ns = blocks(s, e, pc, m, window, v, ranks, bsets, first, after, counts);
    nums = PyByteArray_FromStringAndSize((const char *)ranks, ns * (Py_ssize_t)sizeof(int64_t));
    sets_b = PyByteArray_FromStringAndSize((const char *)bsets, ns * (Py_ssize_t)sizeof(int64_t));
    path_b = PyByteArray_FromStringAndSize(NULL, ns * (Py_ssize_t)sizeof(int64_t));
    if (!nums || !sets_b || !path_b) goto done;
    int64_t *seg_sets = (int64_t *)PyByteArray_AS_STRING(sets_b);
    int64_t *path = (int64_t *)PyByteArray_AS_STRING(path_b);
    if (viterbi(seg_sets, ns, table, cost, path) < 0) goto done;
    for (Py_ssize_t i = 0; i < ns; i++) f[17 + path[i] / 12][path[i] % 12] += 1.0;
    out = PyTuple_Pack(4, feat, nums, sets_b, path_b);
    goto done;
none:
    out = Py_None;
    Py_INCREF(out);
done:
    Py_XDECREF(feat);
    Py_XDECREF(nums);
    Py_XDECREF(sets_b);
    Py_XDECREF(path_b);
    PyMem_Free(s);
    PyMem_Free(e);
    PyMem_Free(pc);
    PyMem_Free(v);
    PyMem_Free(ranks);
    PyMem_Free(first);
    PyMem_Free(after);
    PyMem_Free(counts);
    PyMem_Free(bsets);
    PyMem_Free(vi);
    accel_notes_release(&t);
    PyBuffer_Release(&tb);
    return out;
}
