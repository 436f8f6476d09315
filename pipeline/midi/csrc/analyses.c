/* Per-file analyses (pipeline.analysis): the same IEEE double operations, in the same order,
 * as the numpy formulations, on the NOTE_DTYPE table of one file. Sums that numpy takes with
 * ``np.add.reduce`` use numpy's pairwise summation (``pairwise_sum`` below); ``np.bincount``
 * sums in index order. Each function returns None where the numpy version takes a general
 * path (notes out of time order, values outside the ranges checked) or would raise: the
 * caller then runs the numpy code, which stays the specification (tests/test_smf_accel.py).
 * The build turns off multiply-add contraction (setup.py), so every product is rounded
 * before it is added, as numpy does.
 */
#include "accel.h"

/* numpy's pairwise summation of n doubles (numpy/_core/src/umath/loops_utils.h.src) */
static double pairwise_sum(const double *a, Py_ssize_t n) {
    if (n < 8) {
        double res = 0.;
        for (Py_ssize_t i = 0; i < n; i++) res += a[i];
        return res;
    }
    if (n <= 128) {
        double r[8], res;
        Py_ssize_t i;
        for (int j = 0; j < 8; j++) r[j] = a[j];
        for (i = 8; i < n - (n % 8); i += 8)
            for (int j = 0; j < 8; j++) r[j] += a[i + j];
        res = ((r[0] + r[1]) + (r[2] + r[3])) + ((r[4] + r[5]) + (r[6] + r[7]));
        for (; i < n; i++) res += a[i];
        return res;
    }
    Py_ssize_t n2 = n / 2;
    n2 -= n2 % 8;
    return pairwise_sum(a, n2) + pairwise_sum(a + n2, n - n2);
}

/* How this process's numpy reduces a long contiguous float64 array: 0 when in one pairwise
 * pass (numpy 2.4), else in chunks of this many values added in order (numpy 2.2 reduces
 * through its 8192-value buffer). Set once by midi.accel.compiled_analyses, which compares
 * add_reduce with np.add.reduce on probe arrays (set_reduce_chunk). */
static Py_ssize_t reduce_chunk = 0;

/* np.add.reduce of a float64 array: the identity 0.0 plus the pairwise sum of each chunk */
static inline double np_sum(const double *a, Py_ssize_t n) {
    double acc = 0.0;
    if (reduce_chunk <= 0 || n <= reduce_chunk) {
        acc += pairwise_sum(a, n);
        return acc;
    }
    for (Py_ssize_t lo = 0; lo < n; lo += reduce_chunk)
        acc += pairwise_sum(a + lo, n - lo < reduce_chunk ? n - lo : reduce_chunk);
    return acc;
}

PyObject *accel_set_reduce_chunk(PyObject *self, PyObject *arg) {
    (void)self;
    Py_ssize_t n = PyLong_AsSsize_t(arg);
    if (n == -1 && PyErr_Occurred()) return NULL;
    if (n < 0) {
        PyErr_SetString(PyExc_ValueError, "set_reduce_chunk takes a count >= 0");
        return NULL;
    }
    reduce_chunk = n;
    Py_RETURN_NONE;
}

PyObject *accel_add_reduce(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 1) {
        PyErr_SetString(PyExc_TypeError, "add_reduce takes one float64 buffer");
        return NULL;
    }
    Py_buffer v;
    if (PyObject_GetBuffer(args[0], &v, PyBUF_C_CONTIGUOUS) < 0) return NULL;
    double s = np_sum((const double *)v.buf, v.len / 8);
    PyBuffer_Release(&v);
    return PyFloat_FromDouble(s);
}

static int cmp_i64(const void *a, const void *b) {
    int64_t x = *(const int64_t *)a, y = *(const int64_t *)b;
    return (x > y) - (x < y);
}

const char accel_pc_histogram_doc[] = PyDoc_STR(
"pc_histogram(notes, ticks_per_beat, bass_weight, final_weight, final_beats) -> bytes | None\n\n"
"key.pitch_class_histogram of a NOTE_DTYPE table (12 float64, native bytes); None for notes\n"
"out of time order.");

PyObject *accel_pc_histogram(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 5) {
        PyErr_SetString(PyExc_TypeError, "pc_histogram takes 5 arguments");
        return NULL;
    }
    double tpb = PyFloat_AsDouble(args[1]), bw = PyFloat_AsDouble(args[2]),
           fw = PyFloat_AsDouble(args[3]), fb = PyFloat_AsDouble(args[4]);
    if (PyErr_Occurred()) return NULL;
    Notes t;
    if (accel_notes_open(args[0], &t) < 0) return NULL;
    double hist[12] = {0};
    int ok = 1;
    int64_t last = 0, prev_start = 0;
    int have = 0;
    Py_ssize_t k = 0;
    for (Py_ssize_t i = 0; i < t.n; i++) { /* pitched notes in time order; the last end */
        if (f_i16(&t, i, O_CHANNEL) == DRUM) continue;
        int64_t s = f_i64(&t, i, O_START), e = f_i64(&t, i, O_END);
        if (have && s < prev_start) { ok = 0; break; }
        if (!have || e > last) last = e;
        prev_start = s;
        have = 1;
        k++;
    }
    if (ok && k) {
        double w_bass = 1.0 + bw;
        double final_from = (double)last - fb * tpb;
        int64_t onset = 0;
        int low_pitch = 0;
        Py_ssize_t i = 0;
        while (i < t.n) {
            if (f_i16(&t, i, O_CHANNEL) == DRUM) { i++; continue; }
            onset = f_i64(&t, i, O_START);
            /* the onset's rows: i .. j-1 (pitched ones); its lowest pitch, first on a tie */
            Py_ssize_t j = i, low = -1;
            low_pitch = 0;
            for (; j < t.n; j++) {
                if (f_i16(&t, j, O_CHANNEL) == DRUM) continue;
                if (f_i64(&t, j, O_START) != onset) break;
                int p = f_i16(&t, j, O_PITCH);
                if (low < 0 || p < low_pitch) { low = j; low_pitch = p; }
            }
            for (Py_ssize_t r = i; r < j; r++) {
                if (f_i16(&t, r, O_CHANNEL) == DRUM) continue;
                int64_t s = f_i64(&t, r, O_START), e = f_i64(&t, r, O_END);
                double dur = (double)wrap_sub(e, s) / tpb;
                double w = (bw != 0.0) ? (r == low ? w_bass : 1.0) : 1.0;
                if (fw != 0.0 && (double)e > final_from) w += fw;
                int p = f_i16(&t, r, O_PITCH) % 12;
                if (p < 0) p += 12;
                hist[p] += dur * w;
            }
            i = j;
        }
    }
    accel_notes_release(&t);
    if (!ok) Py_RETURN_NONE;
    return PyBytes_FromStringAndSize((const char *)hist, sizeof hist);
}

const char accel_meter_accents_doc[] = PyDoc_STR(
"meter_accents(notes, ticks_per_beat, lags, common_bar) -> (bytes, list[float], float) | None\n\n"
"meter's accent function (float64 bytes), its normalized autocorrelations at ``lags`` (bins)\n"
"and the median inter-onset interval in beats, for pitched onsets in time order (else None).");

PyObject *accel_meter_accents(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 4 || !PyTuple_Check(args[2])) {
        PyErr_SetString(PyExc_TypeError, "meter_accents takes notes, tpb, a tuple of lags, common bar");
        return NULL;
    }
    double tpb = PyFloat_AsDouble(args[1]);
    int64_t cb = PyLong_AsLongLong(args[3]);
    if (PyErr_Occurred()) return NULL;
    Py_ssize_t n_lags = PyTuple_GET_SIZE(args[2]);
    if (n_lags > 64 || cb <= 0) Py_RETURN_NONE;
    int64_t lags[64];
    for (Py_ssize_t k = 0; k < n_lags; k++) {
        lags[k] = PyLong_AsLongLong(PyTuple_GET_ITEM(args[2], k));
        if (lags[k] <= 0) {
            if (PyErr_Occurred()) return NULL;
            Py_RETURN_NONE;
        }
    }
    Notes t;
    if (accel_notes_open(args[0], &t) < 0) return NULL;
    PyObject *out = NULL;
    Py_ssize_t cap = t.n ? t.n : 1;
    int64_t *bins = (int64_t *)PyMem_Malloc((size_t)cap * sizeof(int64_t));
    int64_t *gaps = (int64_t *)PyMem_Malloc((size_t)cap * sizeof(int64_t));
    double *dur = (double *)PyMem_Malloc((size_t)cap * sizeof(double));
    int *pi = (int *)PyMem_Malloc((size_t)cap * sizeof(int));
    double *acc = NULL, *a = NULL;
    if (!bins || !gaps || !dur || !pi) {
        PyErr_NoMemory();
        goto done;
    }
    Py_ssize_t m = 0, n_gaps = 0;
    int64_t prev = 0;
    for (Py_ssize_t i = 0; i < t.n; i++) {
        if (f_i16(&t, i, O_CHANNEL) == DRUM) continue;
        int64_t s = f_i64(&t, i, O_START), e = f_i64(&t, i, O_END);
        if (m && s < prev) goto none; /* not in time order: the general path */
        if (m && s != prev) gaps[n_gaps++] = s - prev; /* onset steps for the alla-breve test */
        prev = s;
        double b = nearbyint((double)s / tpb * 12.0);
        if (!(b >= 0.0 && b < 9.0e15)) goto none; /* numpy's bincount refuses negatives */
        bins[m] = (int64_t)b;
        double d = (double)wrap_sub(e, s) / tpb;
        dur[m] = (d <= 2.0 || d != d) ? d : 2.0; /* np.minimum(d, ACCENT_CAP_BEATS) */
        pi[m] = f_i16(&t, i, O_PITCH);
        m++;
    }
    if (m == 0) goto none;
    /* squeeze silences longer than two common bars (``_squeeze_sorted``) */
    {
        int squeeze = bins[0] > 2 * cb;
        for (Py_ssize_t i = 1; i < m && !squeeze; i++) squeeze = bins[i] - bins[i - 1] > 2 * cb;
        if (squeeze) {
            int64_t total = 0, last = 0;
            for (Py_ssize_t i = 0; i < m; i++) {
                int64_t g = i ? bins[i] - last : bins[i];
                last = bins[i];
                if (g > 2 * cb) total += floordiv_pos(g - cb, cb);
                bins[i] = bins[i] - total * cb;
            }
        }
    }
    Py_ssize_t n_acc = (Py_ssize_t)bins[m - 1] + 1;
    acc = (double *)PyMem_Calloc((size_t)n_acc, sizeof(double));
    a = (double *)PyMem_Malloc((size_t)n_acc * sizeof(double));
    double *low = (double *)PyMem_Calloc((size_t)n_acc, sizeof(double));
    if (!acc || !a || !low) {
        PyMem_Free(low);
        PyErr_NoMemory();
        goto done;
    }
    for (Py_ssize_t i = 0; i < m; i++) acc[bins[i]] += dur[i];
    for (Py_ssize_t i = 0; i < m;) { /* the lowest note of each bin (the first on a tie) */
        Py_ssize_t j = i + 1, lo = i;
        for (; j < m && bins[j] == bins[i]; j++)
            if (pi[j] < pi[lo]) lo = j;
        low[bins[i]] += dur[lo];
        i = j;
    }
    for (Py_ssize_t b = 0; b < n_acc; b++) acc[b] += 0.5 * low[b];
    PyMem_Free(low);
    /* normalized autocorrelations (``_autocorrs``) */
    PyObject *r = PyList_New(n_lags);
    if (!r) goto done;
    double mean = np_sum(acc, n_acc) / (double)n_acc;
    for (Py_ssize_t b = 0; b < n_acc; b++) a[b] = acc[b] - mean;
    double *prod = (double *)PyMem_Malloc((size_t)n_acc * sizeof(double));
    if (!prod) {
        Py_DECREF(r);
        PyErr_NoMemory();
        goto done;
    }
    for (Py_ssize_t b = 0; b < n_acc; b++) prod[b] = a[b] * a[b];
    double denom = np_sum(prod, n_acc);
    for (Py_ssize_t k = 0; k < n_lags; k++) {
        double v = 0.0;
        if (denom > 0 && lags[k] < n_acc) {
            Py_ssize_t len = n_acc - (Py_ssize_t)lags[k];
            for (Py_ssize_t b = 0; b < len; b++) prod[b] = a[b] * a[b + lags[k]];
            v = np_sum(prod, len) / denom;
        }
        PyList_SET_ITEM(r, k, PyFloat_FromDouble(v));
    }
    PyMem_Free(prod);
    /* the median gap between distinct onsets, in beats (``_median_ioi``; 0.0 without gaps) */
    double median = 0.0;
    if (n_gaps) {
        qsort(gaps, (size_t)n_gaps, 8, cmp_i64);
        if (n_gaps % 2) median = (double)gaps[n_gaps / 2] / tpb;
        else median = ((double)gaps[n_gaps / 2 - 1] / tpb + (double)gaps[n_gaps / 2] / tpb) / 2;
    }
    PyObject *buf = PyBytes_FromStringAndSize((const char *)acc, n_acc * 8);
    out = buf ? Py_BuildValue("(NNd)", buf, r, median) : NULL;
    if (!buf) Py_DECREF(r);
    goto done;
none:
    out = Py_None;
    Py_INCREF(out);
done:
    PyMem_Free(bins);
    PyMem_Free(gaps);
    PyMem_Free(dur);
    PyMem_Free(pi);
    PyMem_Free(acc);
    PyMem_Free(a);
    accel_notes_release(&t);
    return out;
}

typedef struct {
    int64_t key;
    Py_ssize_t idx;
} Ev;

static inline int ev_less(const Ev *a, const Ev *b) {
    return a->key < b->key || (a->key == b->key && a->idx < b->idx);
}

static DEFINE_STABLE_SORT(sort_events, Ev, ev_less)

static inline int plain_double(double x) { return x == x && !(x == 0.0 && signbit(x)); }

const char accel_note_stats_doc[] = PyDoc_STR(
"note_stats(notes) -> tuple | None\n\n"
"stats.piece_stats of a non-empty NOTE_DTYPE table: (duration_s, drum notes, programs\n"
"(sorted list), max_polyphony, mean_polyphony, pitches, longest_silence_s, tracks,\n"
"longest_note_s); None for values the numpy version treats otherwise (NaN or -0.0 seconds,\n"
"pitches or programs outside 0..127, negative tracks, ticks beyond 2**61).");

PyObject *accel_note_stats(PyObject *self, PyObject *table) {
    (void)self;
    Notes t;
    if (accel_notes_open(table, &t) < 0) return NULL;
    PyObject *out = NULL;
    Py_ssize_t n = t.n;
    Ev *ev = (Ev *)PyMem_Malloc((size_t)(2 * n + 1) * sizeof(Ev));
    Ev *tmp = (Ev *)PyMem_Malloc((size_t)(2 * n + 1) * sizeof(Ev));
    double *secs = (double *)PyMem_Malloc((size_t)(2 * n + 1) * sizeof(double));
    double *buf = (double *)PyMem_Malloc((size_t)(2 * n + 1) * sizeof(double));
    if (!ev || !tmp || !secs || !buf) {
        PyErr_NoMemory();
        goto done;
    }
    if (n == 0) goto none;
    const int64_t LIM = (int64_t)1 << 61;
    unsigned char progs[128] = {0}, pitches[128] = {0};
    int64_t max_track = -1;
    double duration = 0.0, longest = 0.0;
    Py_ssize_t n_drum = 0, np_ = 0;
    for (Py_ssize_t i = 0; i < n; i++) {
        double ss = f_f64(&t, i, O_START_S), es = f_f64(&t, i, O_END_S);
        if (!plain_double(ss) || !plain_double(es)) goto none;
        if (i == 0 || es > duration) duration = es;
        int tr = f_i16(&t, i, O_TRACK);
        if (tr < 0) goto none;
        if (tr > max_track) max_track = tr;
        if (f_i16(&t, i, O_CHANNEL) == DRUM) {
            n_drum++;
            continue;
        }
        int p = f_i16(&t, i, O_PITCH), pr = f_i16(&t, i, O_PROGRAM);
        if (p < 0 || p > 127 || pr < 0 || pr > 127) goto none;
        pitches[p] = 1;
        progs[pr] = 1;
        int64_t s = f_i64(&t, i, O_START), e = f_i64(&t, i, O_END);
        if (!(-LIM < s && s < LIM && -LIM < e && e < LIM)) goto none;
        double len = es - ss;
        if (np_ == 0 || len > longest) longest = len;
        buf[np_] = len;
        np_++;
    }
    int64_t max_poly = 0;
    double mean_poly = 0.0;
    if (np_) {
        double note_seconds = np_sum(buf, np_);
        /* events: ons (2 * start + 1, index k), offs (2 * end, index np_ + k); stable by key */
        Py_ssize_t k = 0;
        for (Py_ssize_t i = 0; i < n; i++) {
            if (f_i16(&t, i, O_CHANNEL) == DRUM) continue;
            ev[k].key = 2 * f_i64(&t, i, O_START) + 1;
            ev[k].idx = k;
            secs[k] = f_f64(&t, i, O_START_S);
            ev[np_ + k].key = 2 * f_i64(&t, i, O_END);
            ev[np_ + k].idx = np_ + k;
            secs[np_ + k] = f_f64(&t, i, O_END_S);
            k++;
        }
        Py_ssize_t m = 2 * np_, n_seg = 0;
        int ons_sorted = 1;
        for (Py_ssize_t j = 1; j < np_ && ons_sorted; j++) ons_sorted = ev[j - 1].key <= ev[j].key;
        if (ons_sorted) { /* note-ons in order (the decoder's): sort the offs, then merge */
            sort_events(ev + np_, tmp, np_);
            Py_ssize_t a = 0, b = np_, k2 = 0;
            while (a < np_ && b < m) tmp[k2++] = ev_less(&ev[b], &ev[a]) ? ev[b++] : ev[a++];
            while (a < np_) tmp[k2++] = ev[a++];
            while (b < m) tmp[k2++] = ev[b++];
            memcpy(ev, tmp, (size_t)m * sizeof(Ev));
        } else {
            sort_events(ev, tmp, m);
        }
        int64_t running = 0;
        for (Py_ssize_t j = 0; j < m; j++) {
            running += ev[j].idx < np_ ? 1 : -1;
            if (running > max_poly || j == 0) max_poly = running;
            if (j + 1 < m && running > 0) buf[n_seg++] = secs[ev[j + 1].idx] - secs[ev[j].idx];
        }
        double sounding = np_sum(buf, n_seg);
        mean_poly = sounding > 0 ? note_seconds / sounding : 0.0;
    }
    /* longest silence over the sounding notes (end > start), leading silence included */
    double silence;
    {
        Py_ssize_t c = 0;
        double covered = 0.0, inner = 0.0, first = 0.0;
        for (Py_ssize_t i = 0; i < n; i++) {
            if (!(f_i64(&t, i, O_END) > f_i64(&t, i, O_START))) continue;
            double ss = f_f64(&t, i, O_START_S), es = f_f64(&t, i, O_END_S);
            if (c == 0) {
                first = ss;
                covered = es;
            } else {
                double gap = ss - covered;
                if (c == 1 || gap > inner) inner = gap;
                if (es > covered) covered = es;
            }
            c++;
        }
        if (c == 0) silence = duration;
        else {
            if (c == 1) inner = 0.0;
            double tail = duration - covered;
            silence = first;
            if (inner > silence) silence = inner;
            if (tail > silence) silence = tail;
            if (0.0 > silence) silence = 0.0;
        }
    }
    Py_ssize_t n_tracks = 0;
    {
        unsigned char *seen = (unsigned char *)PyMem_Calloc((size_t)max_track + 1, 1);
        if (!seen) {
            PyErr_NoMemory();
            goto done;
        }
        for (Py_ssize_t i = 0; i < n; i++) {
            int tr = f_i16(&t, i, O_TRACK);
            if (!seen[tr]) {
                seen[tr] = 1;
                n_tracks++;
            }
        }
        PyMem_Free(seen);
    }
    Py_ssize_t n_pitches = 0;
    for (int p = 0; p < 128; p++) n_pitches += pitches[p];
    PyObject *plist = PyList_New(0);
    for (int p = 0; p < 128 && plist; p++) {
        if (!progs[p]) continue;
        PyObject *v = PyLong_FromLong(p);
        if (!v || PyList_Append(plist, v) < 0) Py_CLEAR(plist);
        Py_XDECREF(v);
    }
    if (!plist) goto done;
    out = Py_BuildValue("(dnNLdndnd)", duration, n_drum, plist, (long long)max_poly, mean_poly,
                        n_pitches, silence, n_tracks, np_ ? longest : 0.0);
    goto done;
none:
    out = Py_None;
    Py_INCREF(out);
done:
    PyMem_Free(ev);
    PyMem_Free(tmp);
    PyMem_Free(secs);
    PyMem_Free(buf);
    accel_notes_release(&t);
    return out;
}

const char accel_shift_sort_doc[] = PyDoc_STR(
"shift_sort(notes, semitones) -> (bytearray, int) | None\n\n"
"sort_notes(shift_notes(notes, semitones)[0]) as NOTE_DTYPE bytes, and the number of notes\n"
"folded back into 0..127; None for tracks or channels outside 0..65535 / 0..15.");

PyObject *accel_shift_sort(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 2) {
        PyErr_SetString(PyExc_TypeError, "shift_sort takes a note table and a shift");
        return NULL;
    }
    long long s = PyLong_AsLongLong(args[1]);
    if (s == -1 && PyErr_Occurred()) return NULL;
    if (s < -(1LL << 40) || s > (1LL << 40)) Py_RETURN_NONE;
    Notes t;
    if (accel_notes_open(args[0], &t) < 0) return NULL;
    PyObject *out = NULL, *buf = NULL;
    Py_ssize_t n = t.n, folded = 0;
    Row *rows = (Row *)PyMem_Malloc((size_t)(n ? n : 1) * sizeof(Row));
    Row *tmp = (Row *)PyMem_Malloc((size_t)(n ? n : 1) * sizeof(Row));
    if (!rows || !tmp) {
        PyErr_NoMemory();
        goto done;
    }
    for (Py_ssize_t i = 0; i < n; i++) {
        int ch = f_i16(&t, i, O_CHANNEL), tr = f_i16(&t, i, O_TRACK);
        if (ch < 0 || ch > 15 || tr < 0) {
            out = Py_None;
            Py_INCREF(out);
            goto done;
        }
        int64_t p = f_i16(&t, i, O_PITCH);
        if (s != 0) { /* shift_notes: pitched notes moved, then any note folded by octaves */
            if (ch != DRUM) p += s;
            if (p > 127) {
                p -= 12 * floordiv_pos(p - 127 + 11, 12);
                folded++;
            } else if (p < 0) {
                p += 12 * floordiv_pos(-p + 11, 12);
                folded++;
            }
        }
        if (p < 0 || p > 127) { /* s == 0 and a pitch outside 0..127: beyond the packed key */
            out = Py_None;
            Py_INCREF(out);
            goto done;
        }
        rows[i].start = f_i64(&t, i, O_START);
        rows[i].end = f_i64(&t, i, O_END);
        rows[i].info = p;
        rows[i].k2 = (p << 20) | ((int64_t)tr << 4) | ch;
        rows[i].idx = i;
    }
    accel_sort_rows(rows, tmp, n);
    buf = PyByteArray_FromStringAndSize(NULL, n * NOTE_SIZE);
    if (!buf) goto done;
    unsigned char *o = (unsigned char *)PyByteArray_AS_STRING(buf);
    for (Py_ssize_t k = 0; k < n; k++) {
        memcpy(o + k * NOTE_SIZE, t.b + rows[k].idx * NOTE_SIZE, NOTE_SIZE);
        int16_t p = (int16_t)rows[k].info;
        memcpy(o + k * NOTE_SIZE + O_PITCH, &p, 2);
    }
    out = Py_BuildValue("(Nn)", buf, folded);
done:
    PyMem_Free(rows);
    PyMem_Free(tmp);
    accel_notes_release(&t);
    return out;
}

const char accel_grid_count_doc[] = PyDoc_STR(
"grid_count(notes, flags: bytes) -> int | None\n\n"
"How many notes start on a tick whose flags[start % len(flags)] is set (meter.grid_fraction);\n"
"None when a start is negative or not below 2**53 (numpy then takes its float path).");

PyObject *accel_grid_count(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 2 || !PyBytes_Check(args[1]) || PyBytes_GET_SIZE(args[1]) == 0) {
        PyErr_SetString(PyExc_TypeError, "grid_count takes a note table and non-empty flag bytes");
        return NULL;
    }
    const unsigned char *flags = (const unsigned char *)PyBytes_AS_STRING(args[1]);
    int64_t len = (int64_t)PyBytes_GET_SIZE(args[1]);
    Notes t;
    if (accel_notes_open(args[0], &t) < 0) return NULL;
    Py_ssize_t count = 0;
    int ok = 1;
    for (Py_ssize_t i = 0; i < t.n; i++) {
        int64_t st = f_i64(&t, i, O_START);
        if (st < 0 || st >= ((int64_t)1 << 53)) {
            ok = 0;
            break;
        }
        count += flags[st % len] != 0;
    }
    accel_notes_release(&t);
    if (!ok) Py_RETURN_NONE;
    return PyLong_FromSsize_t(count);
}

const char accel_fold_count_doc[] = PyDoc_STR(
"fold_count(notes, semitones) -> int\n\n"
"transpose.fold_count: pitched notes whose pitch plus semitones falls outside 0..127.");

PyObject *accel_fold_count(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 2) {
        PyErr_SetString(PyExc_TypeError, "fold_count takes a note table and a shift");
        return NULL;
    }
    long long s = PyLong_AsLongLong(args[1]);
    if (s == -1 && PyErr_Occurred()) return NULL;
    if (s < -(1LL << 40) || s > (1LL << 40)) Py_RETURN_NONE;
    Notes t;
    if (accel_notes_open(args[0], &t) < 0) return NULL;
    Py_ssize_t count = 0;
    if (s != 0)
        for (Py_ssize_t i = 0; i < t.n; i++) {
            if (f_i16(&t, i, O_CHANNEL) == DRUM) continue;
            long long p = f_i16(&t, i, O_PITCH) + s;
            count += p > 127 || p < 0;
        }
    accel_notes_release(&t);
    return PyLong_FromSsize_t(count);
}
