/* The shingle hashes of one file (pipeline.analysis.shingles): ``voice_shingles`` (the
 * default kinds of shingle_hashes) and ``content_rows`` (content_hash's row hashes). Integer
 * hashing only; each returns None where the numpy version takes a general path, and the numpy
 * code stays the specification (tests/test_smf_accel.py). */
#include "accel.h"

/* ascending sort of n uint64 (LSD radix, 8 bits a pass; ``tmp`` holds n values); -1 without
 * memory. Equal values are indistinguishable, so any correct sort gives the same bytes. */
static int sort_u64(uint64_t *a, Py_ssize_t n) {
    if (n < 2) return 0;
    uint64_t *tmp = (uint64_t *)PyMem_Malloc((size_t)n * sizeof(uint64_t));
    if (!tmp) return -1;
    uint64_t *src = a, *dst = tmp;
    for (int shift = 0; shift < 64; shift += 8) {
        Py_ssize_t count[257] = {0};
        for (Py_ssize_t i = 0; i < n; i++) count[((src[i] >> shift) & 0xFF) + 1]++;
        if (count[((src[0] >> shift) & 0xFF) + 1] == n) continue; /* one digit value: no move */
        for (int d = 0; d < 256; d++) count[d + 1] += count[d];
        for (Py_ssize_t i = 0; i < n; i++) dst[count[(src[i] >> shift) & 0xFF]++] = src[i];
        uint64_t *sw = src;
        src = dst;
        dst = sw;
    }
    if (src != a) memcpy(a, src, (size_t)n * sizeof(uint64_t));
    PyMem_Free(tmp);
    return 0;
}

/* ---- shingles.shingle_hashes at the default kinds (line, pitch, lead) ------------------- */
typedef struct {
    int64_t voice, q;
    int pitch;
} VNote;

static int cmp_vnote(const void *a, const void *b) {
    const VNote *x = (const VNote *)a, *y = (const VNote *)b;
    if (x->voice != y->voice) return x->voice < y->voice ? -1 : 1;
    if (x->q != y->q) return x->q < y->q ? -1 : 1;
    return (x->pitch > y->pitch) - (x->pitch < y->pitch);
}
static int cmp_int(const void *a, const void *b) {
    int x = *(const int *)a, y = *(const int *)b;
    return (x > y) - (x < y);
}

/* Sort vn[0..m) by (voice, q, pitch), the order qsort with cmp_vnote gives (records with equal
 * keys are equal, so any correct sort gives the same bytes). Speed: decoded notes come in time
 * order, so one stable counting pass by voice (voices are track * 16 + channel, dense) and an
 * insertion sort of each run of equal onsets by pitch do it in linear time; any other input
 * (onsets out of order within a voice, negative or very many voice ids) goes through qsort.
 * Returns -1 without memory. */
static int sort_vnotes(VNote *vn, Py_ssize_t m) {
    if (m < 2) return 0;
    int64_t top = 0;
    int fast = 1;
    for (Py_ssize_t i = 0; i < m && fast; i++) {
        if (vn[i].voice < 0) fast = 0;
        else if (vn[i].voice > top) top = vn[i].voice;
    }
    if (fast && top > 4 * (int64_t)m + 4096) fast = 0;
    if (fast) {
        Py_ssize_t nvoice = (Py_ssize_t)top + 1;
        Py_ssize_t *start = (Py_ssize_t *)PyMem_Calloc((size_t)nvoice + 1, sizeof(Py_ssize_t));
        VNote *tmp = (VNote *)PyMem_Malloc((size_t)m * sizeof(VNote));
        if (!start || !tmp) {
            PyMem_Free(start);
            PyMem_Free(tmp);
            return -1;
        }
        for (Py_ssize_t i = 0; i < m; i++) start[vn[i].voice + 1]++;
        for (Py_ssize_t v = 0; v < nvoice; v++) start[v + 1] += start[v];
        for (Py_ssize_t i = 0; i < m; i++) tmp[start[vn[i].voice]++] = vn[i];
        PyMem_Free(start);
        for (Py_ssize_t i = 1; i < m && fast; i++)
            if (tmp[i].voice == tmp[i - 1].voice && tmp[i].q < tmp[i - 1].q) fast = 0;
        if (fast) {
            for (Py_ssize_t i = 1; i < m; i++) { /* equal onsets of one voice: by pitch */
                VNote x = tmp[i];
                Py_ssize_t j = i;
                while (j > 0 && tmp[j - 1].voice == x.voice && tmp[j - 1].q == x.q
                       && tmp[j - 1].pitch > x.pitch) {
                    tmp[j] = tmp[j - 1];
                    j--;
                }
                tmp[j] = x;
            }
            memcpy(vn, tmp, (size_t)m * sizeof(VNote));
        }
        PyMem_Free(tmp);
        if (fast) return 0;
    }
    qsort(vn, (size_t)m, sizeof(VNote), cmp_vnote);
    return 0;
}

/* The lower median (sorted[(n - 1) / 2]) of n > 0 pitches; counted when they lie in 0..127
 * (MIDI pitches), else sorted in place. */
static int median_pitch(int *p, Py_ssize_t n) {
    Py_ssize_t hist[128] = {0};
    for (Py_ssize_t i = 0; i < n; i++) {
        if (p[i] < 0 || p[i] > 127) {
            qsort(p, (size_t)n, sizeof(int), cmp_int);
            return p[(n - 1) / 2];
        }
        hist[p[i]]++;
    }
    Py_ssize_t want = (n - 1) / 2, seen = 0;
    for (int k = 0; k < 128; k++) {
        seen += hist[k];
        if (seen > want) return k;
    }
    return 127; /* not reached */
}

/* windows of ``n`` tokens inside one line (``line`` ids), hashed from ``base + n``; those with
 * at most ``limit`` distinct tokens left out when limit >= 1; the hashes are appended to out
 * (fmix and the top bit: ``top`` 1 sets it, 0 clears it). Lead copies (line == lead) go to
 * lead_out the same way from lead_base. Returns the number of windows kept in out. */
static Py_ssize_t vs_windows(const uint64_t *tok, const int64_t *line, Py_ssize_t nt, Py_ssize_t n,
                             int64_t limit, uint64_t base, int64_t lead, uint64_t lead_base,
                             uint64_t *out, Py_ssize_t *nout, uint64_t *lead_out, Py_ssize_t *nlead) {
    Py_ssize_t kept = 0;
    if (nt < n) return 0;
    uint64_t w[64];
    for (Py_ssize_t i = 0; i + n <= nt; i++) {
        if (line[i] != line[i + n - 1]) continue;
        if (limit >= 1) {
            for (Py_ssize_t j = 0; j < n; j++) w[j] = tok[i + j];
            /* insertion sort of n <= 64 values, then count changes */
            for (Py_ssize_t a = 1; a < n; a++) {
                uint64_t v = w[a];
                Py_ssize_t b = a;
                while (b > 0 && (int64_t)w[b - 1] > (int64_t)v) { w[b] = w[b - 1]; b--; }
                w[b] = v;
            }
            int64_t changes = 0;
            for (Py_ssize_t j = 1; j < n; j++) changes += w[j] != w[j - 1];
            if (changes < limit) continue;
        }
        uint64_t x = base + (uint64_t)n, y = lead_base + (uint64_t)n;
        for (Py_ssize_t j = 0; j < n; j++) {
            x = x * ROLL + tok[i + j];
            y = y * ROLL + tok[i + j];
        }
        out[(*nout)++] = fmix64(x) | 0x8000000000000000ULL;
        kept++;
        if (lead >= 0 && line[i] == lead) lead_out[(*nlead)++] = fmix64(y) & 0x7FFFFFFFFFFFFFFFULL;
    }
    return kept;
}

const char accel_voice_shingles_doc[] = PyDoc_STR(
"voice_shingles(notes, tpb, steps, max_interval, max_ratio, bounds, bass_below, ngram,\n"
"               pitch_ngram, min_distinct, lead_monophony, named_tracks, line_base,\n"
"               pitch_base, lead_base, max_shingles) -> bytes | None\n\n"
"shingles.shingle_hashes of a NOTE_DTYPE table at the kinds (line, pitch, lead): sorted unique\n"
"uint64, little-endian bytes. ``bounds``: the ratio class boundaries (float64 bytes);\n"
"``named_tracks``: track indices whose names mark the lead, ascending; the bases: each\n"
"kind's tag times the seed constant, modulo 2**64. None where a window would be too long.");

PyObject *accel_voice_shingles(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 16) {
        PyErr_SetString(PyExc_TypeError, "voice_shingles takes 16 arguments");
        return NULL;
    }
    int64_t tpb = PyLong_AsLongLong(args[1]), steps = PyLong_AsLongLong(args[2]);
    int64_t max_int = PyLong_AsLongLong(args[3]), max_ratio = PyLong_AsLongLong(args[4]);
    int64_t bass_below = PyLong_AsLongLong(args[6]), ngram = PyLong_AsLongLong(args[7]);
    int64_t pngram = PyLong_AsLongLong(args[8]), min_distinct = PyLong_AsLongLong(args[9]);
    double mono = PyFloat_AsDouble(args[10]);
    uint64_t line_base = PyLong_AsUnsignedLongLong(args[12]);
    uint64_t pitch_base = PyLong_AsUnsignedLongLong(args[13]);
    uint64_t lead_base = PyLong_AsUnsignedLongLong(args[14]);
    int64_t max_sh = PyLong_AsLongLong(args[15]);
    if (PyErr_Occurred()) return NULL;
    if (tpb <= 0 || tpb > ((int64_t)1 << 40) || steps <= 0 || steps > ((int64_t)1 << 20)
        || ngram < 1 || ngram > 64 || pngram < 1 || pngram > 64 || max_sh < 0 || max_int < 0
        || max_int > 1000000 || max_ratio < 0 || max_ratio > 1000)
        Py_RETURN_NONE;
    Py_buffer bv;
    if (PyObject_GetBuffer(args[5], &bv, PyBUF_C_CONTIGUOUS) < 0) return NULL;
    Py_ssize_t nb = bv.len / 8;
    double bounds[2048];
    if (nb != 2 * max_ratio || nb > 2048) {
        PyBuffer_Release(&bv);
        Py_RETURN_NONE;
    }
    memcpy(bounds, bv.buf, (size_t)nb * 8);
    PyBuffer_Release(&bv);
    PyObject *named = args[11];
    if (!PyTuple_Check(named)) {
        PyErr_SetString(PyExc_TypeError, "voice_shingles: named_tracks must be a tuple");
        return NULL;
    }
    Notes t;
    if (accel_notes_open(args[0], &t) < 0) return NULL;
    PyObject *out = NULL;
    Py_ssize_t cap = t.n ? t.n : 1;
    VNote *vn = (VNote *)PyMem_Malloc((size_t)cap * sizeof(VNote));
    int *pbuf = (int *)PyMem_Malloc((size_t)cap * sizeof(int));
    uint64_t *tok = (uint64_t *)PyMem_Malloc((size_t)cap * sizeof(uint64_t));
    uint64_t *ptok = (uint64_t *)PyMem_Malloc((size_t)cap * sizeof(uint64_t));
    int64_t *tline = (int64_t *)PyMem_Malloc((size_t)cap * sizeof(int64_t));
    int64_t *pline = (int64_t *)PyMem_Malloc((size_t)cap * sizeof(int64_t));
    uint64_t *h = (uint64_t *)PyMem_Malloc((size_t)(3 * cap + 1) * sizeof(uint64_t));
    /* per voice: first note, notes, onsets, median, upper */
    int64_t *vid = (int64_t *)PyMem_Malloc((size_t)cap * sizeof(int64_t));
    Py_ssize_t *vfirst = (Py_ssize_t *)PyMem_Malloc((size_t)(cap + 1) * sizeof(Py_ssize_t));
    int64_t *vons = (int64_t *)PyMem_Malloc((size_t)cap * sizeof(int64_t));
    int *vmed = (int *)PyMem_Malloc((size_t)cap * sizeof(int));
    if (!vn || !pbuf || !tok || !ptok || !tline || !pline || !h || !vid || !vfirst || !vons || !vmed) {
        PyErr_NoMemory();
        goto done;
    }
    Py_ssize_t m = 0;
    int64_t mul = 2 * steps, div = 2 * tpb;
    for (Py_ssize_t i = 0; i < t.n; i++) {
        int ch = f_i16(&t, i, O_CHANNEL);
        if (ch == DRUM) continue;
        vn[m].voice = (int64_t)f_i16(&t, i, O_TRACK) * 16 + ch;
        vn[m].q = floordiv_pos(wrap_add(wrap_mul(f_i64(&t, i, O_START), mul), tpb), div);
        vn[m].pitch = f_i16(&t, i, O_PITCH);
        m++;
    }
    if (sort_vnotes(vn, m) < 0) {
        PyErr_NoMemory();
        goto done;
    }
    /* voices */
    Py_ssize_t nv = 0;
    for (Py_ssize_t i = 0; i < m; i++)
        if (i == 0 || vn[i].voice != vn[i - 1].voice) { vid[nv] = vn[i].voice; vfirst[nv++] = i; }
    vfirst[nv] = m;
    for (Py_ssize_t v = 0; v < nv; v++) {
        Py_ssize_t a = vfirst[v], b = vfirst[v + 1];
        int64_t ons = 0;
        for (Py_ssize_t i = a; i < b; i++) {
            pbuf[i - a] = vn[i].pitch;
            ons += (i == a || vn[i].q != vn[i - 1].q);
        }
        vmed[v] = median_pitch(pbuf, b - a);
        vons[v] = ons;
    }
    /* the lead (shingles.lead_voice) */
    int64_t lead = -1;
    {
        int any = 0;
        for (Py_ssize_t v = 0; v < nv; v++) any |= (vmed[v] >= bass_below && vons[v] > ngram);
        if (any) {
            for (Py_ssize_t k = 0; k < PyTuple_GET_SIZE(named) && lead < 0; k++) {
                int64_t tr = PyLong_AsLongLong(PyTuple_GET_ITEM(named, k));
                if (tr == -1 && PyErr_Occurred()) goto done;
                int64_t best = -1;
                for (Py_ssize_t v = 0; v < nv; v++) {
                    if (!(vmed[v] >= bass_below && vons[v] > ngram)) continue;
                    if (floordiv_pos(vid[v], 16) != tr) continue;
                    if (best < 0 || vons[v] > vons[best]) best = v;
                }
                if (best >= 0) lead = vid[best];
            }
            if (lead < 0) {
                int64_t busiest = -1;
                for (Py_ssize_t v = 0; v < nv; v++) {
                    int ok = vmed[v] >= bass_below && vons[v] > ngram
                             && (double)vons[v] >= mono * (double)(vfirst[v + 1] - vfirst[v]);
                    if (ok && vons[v] > busiest) busiest = vons[v];
                }
                int64_t best = -1;
                for (Py_ssize_t v = 0; v < nv && busiest >= 0; v++) {
                    int ok = vmed[v] >= bass_below && vons[v] > ngram
                             && (double)vons[v] >= mono * (double)(vfirst[v + 1] - vfirst[v])
                             && 2 * vons[v] >= busiest;
                    if (!ok) continue;
                    if (best < 0 || vmed[v] > vmed[best] || (vmed[v] == vmed[best] && vons[v] > vons[best]))
                        best = v;
                }
                if (best >= 0) lead = vid[best];
            }
        }
    }
    /* tokens of the upper voices' lines, and their contours */
    Py_ssize_t nt = 0, np_ = 0;
    for (Py_ssize_t v = 0; v < nv; v++) {
        if (vmed[v] < bass_below) continue;
        Py_ssize_t a = vfirst[v], b = vfirst[v + 1];
        int have = 0, first_tok = 1, top_prev = 0, top = vn[a].pitch;
        int64_t q_prev = 0, step_prev = 0;
        for (Py_ssize_t i = a; i <= b; i++) {
            if (i < b && i > a && vn[i].q == vn[i - 1].q) { top = vn[i].pitch; continue; }
            /* the onset group that ended at i - 1 (top: its highest pitch) */
            if (i > a) {
                if (have) {
                    int64_t iv = (int64_t)top - top_prev;
                    if (iv < -max_int) iv = -max_int;
                    if (iv > max_int) iv = max_int;
                    int64_t step = wrap_sub(vn[i - 1].q, q_prev);
                    int64_t rhythm;
                    if (first_tok) rhythm = 64;
                    else {
                        double r = (double)step / (double)step_prev;
                        int64_t c = 0;
                        while (c < nb && bounds[c] <= r) c++;
                        rhythm = c - max_ratio + 16;
                    }
                    first_tok = 0;
                    step_prev = step;
                    tok[nt] = (uint64_t)((iv + 128) * 4096 + rhythm);
                    tline[nt++] = vid[v];
                    if (iv != 0) { ptok[np_] = (uint64_t)(iv + 128); pline[np_++] = vid[v]; }
                }
                have = 1;
                top_prev = top;
                q_prev = vn[i - 1].q;
            }
            if (i < b) top = vn[i].pitch;
        }
    }
    Py_ssize_t nh = 0, nl = 0;
    uint64_t *lead_h = h + 2 * cap + 1;
    int64_t lim1 = min_distinct < ngram - 2 ? min_distinct : ngram - 2;
    int64_t lim2 = min_distinct < pngram - 2 ? min_distinct : pngram - 2;
    Py_ssize_t kept = vs_windows(tok, tline, nt, (Py_ssize_t)ngram, lim1, line_base, lead, lead_base,
                                 h, &nh, lead_h, &nl);
    if (kept == 0 && nt > 0) { /* every line shorter than ngram: one shingle of the first */
        Py_ssize_t k = 0;
        while (k < nt && k < ngram && tline[k] == tline[0]) k++;
        uint64_t x = line_base + (uint64_t)k;
        for (Py_ssize_t j = 0; j < k; j++) x = x * ROLL + tok[j];
        h[nh++] = fmix64(x) | 0x8000000000000000ULL;
    }
    vs_windows(ptok, pline, np_, (Py_ssize_t)pngram, lim2, pitch_base, -1, 0, h, &nh, NULL, NULL);
    memmove(h + nh, lead_h, (size_t)nl * sizeof(uint64_t));
    nh += nl;
    if (sort_u64(h, nh) < 0) {
        PyErr_NoMemory();
        goto done;
    }
    Py_ssize_t u = 0;
    for (Py_ssize_t i = 0; i < nh; i++)
        if (i == 0 || h[i] != h[i - 1]) h[u++] = h[i];
    if (u > max_sh) u = (Py_ssize_t)max_sh;
    out = PyBytes_FromStringAndSize((const char *)h, u * 8);
done:
    PyMem_Free(vn); PyMem_Free(pbuf); PyMem_Free(tok); PyMem_Free(ptok); PyMem_Free(tline);
    PyMem_Free(pline); PyMem_Free(h); PyMem_Free(vid); PyMem_Free(vfirst); PyMem_Free(vons);
    PyMem_Free(vmed);
    accel_notes_release(&t);
    return out;
}

const char accel_content_rows_doc[] = PyDoc_STR(
"content_rows(notes, ticks_per_beat, steps_per_beat) -> bytes\n\n"
"shingles.content_hash's sorted uint64 row hashes (little-endian bytes) of a NOTE_DTYPE table.");

PyObject *accel_content_rows(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 3) {
        PyErr_SetString(PyExc_TypeError, "content_rows takes 3 arguments");
        return NULL;
    }
    int64_t tpb = PyLong_AsLongLong(args[1]), steps = PyLong_AsLongLong(args[2]);
    if (PyErr_Occurred()) return NULL;
    if (tpb <= 0 || tpb > ((int64_t)1 << 40) || steps <= 0 || steps > ((int64_t)1 << 20)) Py_RETURN_NONE;
    Notes t;
    if (accel_notes_open(args[0], &t) < 0) return NULL;
    PyObject *out = PyBytes_FromStringAndSize(NULL, t.n * 8);
    if (out) {
        uint64_t *row = (uint64_t *)PyBytes_AS_STRING(out);
        int64_t mul = 2 * steps, add = tpb, div = 2 * tpb;
        for (Py_ssize_t i = 0; i < t.n; i++) {
            uint64_t s = (uint64_t)floordiv_pos(wrap_add(wrap_mul(f_i64(&t, i, O_START), mul), add), div);
            uint64_t e = (uint64_t)floordiv_pos(wrap_add(wrap_mul(f_i64(&t, i, O_END), mul), add), div);
            uint64_t r = fmix64(s);
            r = r * ROLL + e;
            r = fmix64(r);
            uint64_t code = (uint64_t)(int64_t)f_i16(&t, i, O_PITCH) * 2u
                            + (f_i16(&t, i, O_CHANNEL) == DRUM ? 1u : 0u);
            r = r * ROLL + code;
            row[i] = fmix64(r);
        }
        if (sort_u64(row, t.n) < 0) {
            Py_CLEAR(out);
            PyErr_NoMemory();
        }
    }
    accel_notes_release(&t);
    return out;
}
