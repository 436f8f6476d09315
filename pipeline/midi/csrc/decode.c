/* The per-track event loop of ``midi.track.read_track`` and the file's note table
 * (``note_table``), for pipeline.midi.decode.
 *
 * Same semantics as the pure-Python loop (running status kept across meta and sysex events,
 * 4-byte delta-time limit, same-key note stacking, zero-length drop counting, hanging notes
 * closed at the track's last tick, program at note-on reset per track, tempo / meter / key /
 * track-name / first-text extraction, the other channel events as CONTROL_DTYPE records and the
 * text-like metas, unknown-meta and event counting). It builds no error
 * messages: on anything the Python loop raises for, ``read_track`` returns None and the caller
 * re-runs the pure-Python loop on that track, which raises the exact DecodeError.
 */
#include "accel.h"

#define N_KEYS 2048 /* channel << 7 | pitch */

/* Open notes of one key: the first (tick, info) pair inline, further stacked ones on the heap. */
typedef struct {
    int64_t tick0, info0;
    int64_t *more; /* pairs 2..n as (tick, info), capacity ``cap`` pairs */
    int64_t n, cap; /* 64-bit: a damaged file may stack millions of notes on one key */
    int64_t off1;   /* 1 + the tick of the key's last note-off in this track, 0: none */
} OpenKey;

/* track.OFF_FIRST: an open note's key had a note-off at the note-on's own tick; such a note
 * still open at the end of its track is a zero-length note written note-off first (dropped). */
#define OFF_FIRST ((int64_t)1 << 25)

typedef struct {
    int64_t *v;
    Py_ssize_t n, cap; /* in int64 values */
} Vec;

static int vec_push(Vec *a, int64_t x, int64_t y, int64_t z, int width) {
    if (a->n + width > a->cap) {
        Py_ssize_t cap = a->cap ? a->cap * 2 : 96;
        while (cap < a->n + width) cap *= 2;
        int64_t *v = (int64_t *)PyMem_Realloc(a->v, (size_t)cap * sizeof(int64_t));
        if (!v) return -1;
        a->v = v;
        a->cap = cap;
    }
    a->v[a->n++] = x;
    a->v[a->n++] = y;
    if (width == 3) a->v[a->n++] = z;
    return 0;
}

static inline int64_t key_tick(const OpenKey *k, int64_t j) { return j ? k->more[2 * (j - 1)] : k->tick0; }
static inline int64_t key_info(const OpenKey *k, int64_t j) { return j ? k->more[2 * (j - 1) + 1] : k->info0; }

static int key_push(OpenKey *k, int64_t tick, int64_t info) {
    if (k->n == 0) {
        k->tick0 = tick;
        k->info0 = info;
        k->n = 1;
        return 0;
    }
    int64_t j = k->n - 1; /* index into ``more`` */
    if (j >= k->cap) {
        int64_t cap = k->cap ? k->cap * 2 : 4;
        int64_t *m = (int64_t *)PyMem_Realloc(k->more, (size_t)cap * 2 * sizeof(int64_t));
        if (!m) return -1;
        k->more = m;
        k->cap = cap;
    }
    k->more[2 * j] = tick;
    k->more[2 * j + 1] = info;
    k->n++;
    return 0;
}

/* A note-off for key ``k`` at ``tick``: close every open note that started earlier; notes that
 * started at ``tick`` stay open if another note was closed, else they are zero-length (dropped). */
static int key_close(OpenKey *k, int64_t tick, Vec *cols, int64_t *zero) {
    int64_t n = k->n, kept = 0;
    if (n == 1) {
        k->n = 0;
        if (k->tick0 != tick) return vec_push(cols, k->tick0, tick, k->info0 & ~OFF_FIRST, 3);
        (*zero)++;
        return 0;
    }
    for (int64_t j = 0; j < n; j++) {
        int64_t s = key_tick(k, j), info = key_info(k, j);
        if (s != tick) {
            if (vec_push(cols, s, tick, info & ~OFF_FIRST, 3) < 0) return -1;
        } else {
            /* compact kept pairs to the front, in order (j >= kept, so no overwrite ahead) */
            if (kept == 0) {
                k->tick0 = s;
                k->info0 = info;
            } else {
                k->more[2 * (kept - 1)] = s;
                k->more[2 * (kept - 1) + 1] = info;
            }
            kept++;
        }
    }
    if (kept && kept == n) {
        *zero += kept;
        kept = 0;
    }
    k->n = kept;
    return 0;
}

/* strip " \t\r\n\0" from both ends of [*a, *b) (latin-1 maps bytes 1:1 to code points) */
static void strip_ws(const unsigned char *t, Py_ssize_t *a, Py_ssize_t *b) {
    while (*a < *b && (t[*a] == ' ' || t[*a] == '\t' || t[*a] == '\r' || t[*a] == '\n' || t[*a] == 0)) (*a)++;
    while (*b > *a && (t[*b - 1] == ' ' || t[*b - 1] == '\t' || t[*b - 1] == '\r' || t[*b - 1] == '\n' || t[*b - 1] == 0)) (*b)--;
}

static PyObject *pairs_list(const Vec *a, int width) {
    Py_ssize_t k = a->n / width;
    PyObject *list = PyList_New(k);
    if (!list) return NULL;
    for (Py_ssize_t i = 0; i < k; i++) {
        PyObject *tup = width == 2
            ? Py_BuildValue("(LL)", (long long)a->v[2 * i], (long long)a->v[2 * i + 1])
            : Py_BuildValue("(LLL)", (long long)a->v[3 * i], (long long)a->v[3 * i + 1], (long long)a->v[3 * i + 2]);
        if (!tup) {
            Py_DECREF(list);
            return NULL;
        }
        PyList_SET_ITEM(list, i, tup);
    }
    return list;
}

/* Result codes of the loop: 0 ok, 1 the Python loop would raise (re-run it), -1 MemoryError. */
#define FAIL_DECODE 1

typedef struct {
    int64_t tick, n_events, zero, hanging, unknown_meta;
    int eot;
    Py_ssize_t name_a, name_b; /* first track-name meta, name_a < 0: none */
    Py_ssize_t text_a, text_b; /* first non-empty text meta, stripped; text_a < 0: none */
    Vec cols, tempos, meters, keys;
    Vec ctls;  /* other channel events: (tick, status << 16 | data1 << 8 | data2) */
    Vec texts; /* text-like metas: (tick, type << 40 | payload offset, payload length) */
} Track;

/* meta types kept as Piece.texts (midi.piece.TEXT_METAS): text, copyright, lyric, marker, cue */
static int text_meta(unsigned int mt) {
    return mt == 0x01 || mt == 0x02 || mt == 0x05 || mt == 0x06 || mt == 0x07;
}

static int known_meta(int mt) {
    return mt <= 0x0F || mt == 0x20 || mt == 0x21 || mt == 0x2F || mt == 0x51 || mt == 0x54 ||
           mt == 0x58 || mt == 0x59 || mt == 0x7F;
}

/* The open-note table: 2048 keys, with a bitmap of the keys that received a note-on in this
 * track (the hanging sweep walks it in key order, and the reset clears only those keys). One
 * table is kept for reuse between calls; a re-entrant call gets a fresh one. */
typedef struct {
    OpenKey key[N_KEYS];
    uint64_t touched[N_KEYS / 64];
} OpenTable;

static OpenTable *cached_table = NULL;
static int cached_busy = 0;

static void table_reset(OpenTable *o) {
    for (int w = 0; w < N_KEYS / 64; w++) {
        uint64_t bits = o->touched[w];
        while (bits) {
            int key = w * 64 + ctz64(bits);
            bits &= bits - 1;
            OpenKey *k = &o->key[key];
            k->n = 0;
            k->off1 = 0;
            if (k->cap > 64) { /* do not keep a huge stack from one damaged file */
                PyMem_Free(k->more);
                k->more = NULL;
                k->cap = 0;
            }
        }
        o->touched[w] = 0;
    }
}

static void table_free(OpenTable *o) {
    for (int key = 0; key < N_KEYS; key++) PyMem_Free(o->key[key].more);
    PyMem_Free(o);
}

static int parse_track(const unsigned char *t, Py_ssize_t nt, Track *r, OpenTable *table) {
    OpenKey *opened = table->key;
    Py_ssize_t p = 0;
    int64_t tick = 0;
    unsigned int status = 0;
    int64_t progs[16] = {0};
    int any_note_on = 0; /* skip the hanging sweep when no note ever opened */

#define NEED(k) do { if (p + (k) > nt) return FAIL_DECODE; } while (0)
    while (p < nt) {
        unsigned int b = t[p++];
        if (b < 0x80) {
            tick += b;
        } else {
            int64_t d = b & 0x7F;
            NEED(1);
            b = t[p++];
            d = (d << 7) | (b & 0x7F);
            if (b > 0x7F) {
                NEED(1);
                b = t[p++];
                d = (d << 7) | (b & 0x7F);
                if (b > 0x7F) {
                    NEED(1);
                    b = t[p++];
                    d = (d << 7) | (b & 0x7F);
                    if (b > 0x7F) return FAIL_DECODE; /* delta longer than 4 bytes */
                }
            }
            tick += d;
        }
        NEED(1);
        unsigned int st = t[p];
        if (st > 0x7F) {
            p++;
            if (st >= 0xF0) {
                if (st == 0xFF) {
                    NEED(2);
                    unsigned int mt = t[p];
                    b = t[p + 1];
                    p += 2;
                    uint64_t ln = b & 0x7F;
                    while (b > 0x7F) {
                        NEED(1);
                        b = t[p++];
                        ln = (ln << 7) | (b & 0x7F);
                        if (ln > (uint64_t)nt) return FAIL_DECODE; /* can only grow */
                    }
                    if ((uint64_t)p + ln > (uint64_t)nt) return FAIL_DECODE;
                    Py_ssize_t L = (Py_ssize_t)ln;
                    if (mt == 0x51) {
                        if (L != 3) return FAIL_DECODE;
                        int64_t tempo = ((int64_t)t[p] << 16) | ((int64_t)t[p + 1] << 8) | t[p + 2];
                        if (tempo == 0) return FAIL_DECODE;
                        if (vec_push(&r->tempos, tick, tempo, 0, 2) < 0) return -1;
                    } else if (mt == 0x2F) {
                        r->eot = 1;
                    } else if (mt == 0x03) {
                        if (r->name_a < 0) {
                            r->name_a = p;
                            r->name_b = p + L;
                        }
                    } else if (mt == 0x58) {
                        if (L != 4) return FAIL_DECODE;
                        unsigned int num = t[p], dd = t[p + 1];
                        if (num == 0 || dd > 6) return FAIL_DECODE;
                        if (vec_push(&r->meters, tick, num, (int64_t)1 << dd, 3) < 0) return -1;
                    } else if (mt == 0x59) {
                        if (L != 2) return FAIL_DECODE;
                        int sf = t[p];
                        unsigned int mi = t[p + 1];
                        if (sf > 127) sf -= 256;
                        if (sf < -7 || sf > 7 || mi > 1) return FAIL_DECODE;
                        if (vec_push(&r->keys, tick, sf, mi, 3) < 0) return -1;
                    } else if (text_meta(mt)) {
                        if (vec_push(&r->texts, tick, ((int64_t)mt << 40) | (int64_t)p, L, 3) < 0)
                            return -1;
                        if (mt == 0x01 && r->text_a < 0) {
                            Py_ssize_t a = p, e = p + L;
                            strip_ws(t, &a, &e);
                            if (e > a) {
                                r->text_a = a;
                                r->text_b = e;
                            }
                        }
                    } else if (!known_meta((int)mt)) {
                        r->unknown_meta++;
                    }
                    p += L;
                } else if (st == 0xF0 || st == 0xF7) {
                    NEED(1);
                    b = t[p++];
                    uint64_t ln = b & 0x7F;
                    while (b > 0x7F) {
                        NEED(1);
                        b = t[p++];
                        ln = (ln << 7) | (b & 0x7F);
                        if (ln > (uint64_t)nt) return FAIL_DECODE;
                    }
                    if ((uint64_t)p + ln > (uint64_t)nt) return FAIL_DECODE;
                    p += (Py_ssize_t)ln;
                } else {
                    return FAIL_DECODE; /* system common / real-time status */
                }
                r->n_events++;
                continue;
            }
            status = st;
        } else if (status) {
            st = status;
        } else {
            return FAIL_DECODE; /* data byte with no running status */
        }
        r->n_events++;
        if (st < 0xA0) { /* note-off 0x8n or note-on 0x9n */
            NEED(2);
            unsigned int a = t[p], v = t[p + 1];
            p += 2;
            if ((a | v) > 0x7F) return FAIL_DECODE;
            unsigned int key = ((st & 0x0F) << 7) | a;
            OpenKey *k = &opened[key];
            if (v && st > 0x8F) {
                /* info packs pitch | channel << 7 | velocity << 11 | program << 18 */
                any_note_on = 1;
                table->touched[key >> 6] |= (uint64_t)1 << (key & 63);
                int64_t info = (int64_t)key | ((int64_t)v << 11) | (progs[st & 0x0F] << 18);
                if (k->off1 == tick + 1) info |= OFF_FIRST;
                if (key_push(k, tick, info) < 0) return -1;
            } else {
                table->touched[key >> 6] |= (uint64_t)1 << (key & 63); /* the reset clears off1 */
                k->off1 = tick + 1;
                if (k->n && key_close(k, tick, &r->cols, &r->zero) < 0) return -1;
            }
            continue;
        }
        unsigned int hi = st & 0xF0;
        if (hi == 0xC0) {
            NEED(1);
            unsigned int a = t[p++];
            if (a > 0x7F) return FAIL_DECODE;
            progs[st & 0x0F] = a;
            if (vec_push(&r->ctls, tick, ((int64_t)st << 16) | ((int64_t)a << 8), 0, 2) < 0) return -1;
        } else if (hi == 0xD0) {
            NEED(1);
            unsigned int a = t[p++];
            if (a > 0x7F) return FAIL_DECODE;
            if (vec_push(&r->ctls, tick, ((int64_t)st << 16) | ((int64_t)a << 8), 0, 2) < 0) return -1;
        } else {
            NEED(2);
            unsigned int a = t[p], v = t[p + 1];
            p += 2;
            if ((a | v) > 0x7F) return FAIL_DECODE;
            if (vec_push(&r->ctls, tick, ((int64_t)st << 16) | ((int64_t)a << 8) | v, 0, 2) < 0)
                return -1;
        }
    }
#undef NEED
    r->tick = tick;
    if (!any_note_on) return 0;
    for (int w = 0; w < N_KEYS / 64; w++) { /* hanging notes, in key order */
        uint64_t bits = table->touched[w];
        while (bits) {
            OpenKey *k = &opened[w * 64 + ctz64(bits)];
            bits &= bits - 1;
            for (int64_t j = 0; j < k->n; j++) {
                int64_t s = key_tick(k, j), info = key_info(k, j);
                if (s != tick && !(info & OFF_FIRST)) {
                    if (vec_push(&r->cols, s, tick, info, 3) < 0) return -1;
                    r->hanging++;
                } else { /* at the last tick, or its note-off came first: zero-length */
                    r->zero++;
                }
            }
        }
    }
    return 0;
}

const char accel_read_track_doc[] = PyDoc_STR(
"read_track(data: bytes, start: int, length: int, track: int = 0) -> tuple | None\n\n"
"Parse the MTrk body data[start:start+length] like pipeline.midi.track.read_track. Returns\n"
"(last tick, saw end-of-track, track name or None, first text, events, zero-length notes\n"
"dropped, hanging notes closed, unknown metas, notes, tempos, meters, keys, controls, texts),\n"
"where notes is bytes of native int64 (start, end, info) triples, controls bytes of\n"
"midi.piece.CONTROL_DTYPE records (track = ``track``), tempos/meters/keys lists of (tick, ...)\n"
"tuples and texts a list of (tick, meta type, payload bytes); or None where the pure-Python\n"
"loop would raise a DecodeError.");

PyObject *accel_read_track(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 3 && nargs != 4) {
        PyErr_SetString(PyExc_TypeError, "read_track(data, start, length, track=0) takes 3 or 4 arguments");
        return NULL;
    }
    long track = 0;
    if (nargs == 4) {
        track = PyLong_AsLong(args[3]);
        if (track == -1 && PyErr_Occurred()) return NULL;
        if (track < -32768 || track > 32767) {
            PyErr_SetString(PyExc_ValueError, "read_track: track outside int16");
            return NULL;
        }
    }
    if (!PyBytes_Check(args[0])) {
        PyErr_SetString(PyExc_TypeError, "read_track: data must be bytes");
        return NULL;
    }
    Py_ssize_t start = PyLong_AsSsize_t(args[1]);
    if (start == -1 && PyErr_Occurred()) return NULL;
    Py_ssize_t length = PyLong_AsSsize_t(args[2]);
    if (length == -1 && PyErr_Occurred()) return NULL;
    Py_ssize_t size = PyBytes_GET_SIZE(args[0]);
    if (start < 0 || length < 0 || start > size || length > size - start) {
        PyErr_SetString(PyExc_ValueError, "read_track: start/length outside the data");
        return NULL;
    }
    const unsigned char *t = (const unsigned char *)PyBytes_AS_STRING(args[0]) + start;

    OpenTable *table;
    if (cached_busy || cached_table == NULL) {
        table = (OpenTable *)PyMem_Calloc(1, sizeof(OpenTable));
        if (!table) return PyErr_NoMemory();
        if (!cached_busy) cached_table = table;
    } else {
        table = cached_table;
    }
    int own = table != cached_table;
    if (!own) cached_busy = 1;
    Track r;
    memset(&r, 0, sizeof r);
    r.name_a = r.text_a = -1;
    int rc = parse_track(t, length, &r, table);
    if (own) {
        table_free(table);
    } else {
        table_reset(table);
        cached_busy = 0;
    }

    PyObject *out = NULL;
    if (rc < 0) {
        PyErr_NoMemory();
    } else if (rc == FAIL_DECODE) {
        out = Py_None;
        Py_INCREF(out);
    } else {
        PyObject *name = r.name_a < 0 ? (Py_INCREF(Py_None), Py_None)
            : PyUnicode_DecodeLatin1((const char *)t + r.name_a, r.name_b - r.name_a, NULL);
        PyObject *text = r.text_a < 0 ? PyUnicode_New(0, 0)
            : PyUnicode_DecodeLatin1((const char *)t + r.text_a, r.text_b - r.text_a, NULL);
        PyObject *notes = PyBytes_FromStringAndSize((const char *)r.cols.v,
                                                    r.cols.n * (Py_ssize_t)sizeof(int64_t));
        PyObject *tempos = pairs_list(&r.tempos, 2);
        PyObject *meters = pairs_list(&r.meters, 3);
        PyObject *keys = pairs_list(&r.keys, 3);
        Py_ssize_t n_ctls = r.ctls.n / 2;
        PyObject *ctls = PyBytes_FromStringAndSize(NULL, n_ctls * CONTROL_SIZE);
        if (ctls) {
            unsigned char *o = (unsigned char *)PyBytes_AS_STRING(ctls);
            int16_t tr16 = (int16_t)track;
            for (Py_ssize_t i = 0; i < n_ctls; i++, o += CONTROL_SIZE) {
                int64_t tk = r.ctls.v[2 * i], m = r.ctls.v[2 * i + 1];
                memcpy(o, &tk, 8);
                memcpy(o + 8, &tr16, 2);
                o[10] = (unsigned char)((m >> 16) & 0x0F);
                o[11] = (unsigned char)((m >> 16) & 0xF0);
                o[12] = (unsigned char)((m >> 8) & 0x7F);
                o[13] = (unsigned char)(m & 0x7F);
            }
        }
        Py_ssize_t n_texts = r.texts.n / 3;
        PyObject *texts = PyList_New(n_texts);
        for (Py_ssize_t i = 0; texts && i < n_texts; i++) {
            const int64_t *x = r.texts.v + 3 * i;
            PyObject *tup = Py_BuildValue("(Lly#)", (long long)x[0], (long)(x[1] >> 40),
                                          (const char *)t + (x[1] & (((int64_t)1 << 40) - 1)),
                                          (Py_ssize_t)x[2]);
            if (!tup) {
                Py_CLEAR(texts);
                break;
            }
            PyList_SET_ITEM(texts, i, tup);
        }
        if (name && text && notes && tempos && meters && keys && ctls && texts) {
            out = Py_BuildValue("(LOOOLLLLOOOOOO)", (long long)r.tick, r.eot ? Py_True : Py_False,
                                name, text, (long long)r.n_events, (long long)r.zero,
                                (long long)r.hanging, (long long)r.unknown_meta, notes, tempos,
                                meters, keys, ctls, texts);
        }
        Py_XDECREF(ctls);
        Py_XDECREF(texts);
        Py_XDECREF(name);
        Py_XDECREF(text);
        Py_XDECREF(notes);
        Py_XDECREF(tempos);
        Py_XDECREF(meters);
        Py_XDECREF(keys);
    }
    PyMem_Free(r.cols.v);
    PyMem_Free(r.tempos.v);
    PyMem_Free(r.meters.v);
    PyMem_Free(r.keys.v);
    PyMem_Free(r.ctls.v);
    PyMem_Free(r.texts.v);
    return out;
}

/* ---------------------------------------------------------------------------------------------
 * The note table: the (start, end, info) triples of all tracks -> NOTE_DTYPE records in
 * ``midi.piece.sort_notes`` order, with seconds from the tempo map computed as
 * ``midi.piece.ticks_to_seconds`` does (the same IEEE double operations in the same order, so the
 * same doubles: no product feeds an addition directly, so a compiler's multiply-add
 * contraction cannot change a result; the tests compare the bytes).
 */

typedef struct {
    const int64_t *tick; /* tempo map: tick, us per beat pairs (TEMPO_DTYPE bytes) */
    Py_ssize_t n;
    double *start_sec, *us;
    double den; /* 1e6 * ticks_per_beat */
} TempoMap;

/* seconds at ``t`` like midi.piece.ticks_to_seconds (searchsorted right - 1, clipped) */
static inline double seconds_at(const TempoMap *m, int64_t t) {
    Py_ssize_t lo = 0, hi = m->n; /* first index with tick > t */
    while (lo < hi) {
        Py_ssize_t mid = (lo + hi) / 2;
        if (m->tick[2 * mid] <= t) lo = mid + 1; else hi = mid;
    }
    Py_ssize_t i = lo - 1;
    if (i < 0) i = 0;
    double part = (double)(t - m->tick[2 * i]) * m->us[i];
    return m->start_sec[i] + part / m->den;
}

const char accel_note_table_doc[] = PyDoc_STR(
"note_table(chunks: list[bytes], tracks: list[int], tempo: bytes | None, ticks_per_beat: int)\n"
"    -> bytearray\n\n"
"NOTE_DTYPE records of the int64 (start, end, info) triples in chunks (chunks[i] from MTrk\n"
"tracks[i]), sorted by (start, pitch, track, channel, end), stable. With tempo (the\n"
"TEMPO_DTYPE map as bytes), start_s/end_s as midi.piece.ticks_to_seconds gives; else 0.");

PyObject *accel_note_table(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 4 || !PyList_Check(args[0]) || !PyList_Check(args[1]) ||
        PyList_GET_SIZE(args[0]) != PyList_GET_SIZE(args[1])) {
        PyErr_SetString(PyExc_TypeError, "note_table(chunks, tracks, tempo, ticks_per_beat): "
                        "two lists of equal length, bytes or None, int");
        return NULL;
    }
    PyObject *chunks = args[0], *tracks = args[1], *tempo = args[2];
    Py_ssize_t n_chunks = PyList_GET_SIZE(chunks), n = 0;
    for (Py_ssize_t c = 0; c < n_chunks; c++) {
        PyObject *b = PyList_GET_ITEM(chunks, c);
        if (!PyBytes_Check(b) || PyBytes_GET_SIZE(b) % 24) {
            PyErr_SetString(PyExc_TypeError, "note_table: chunks must be bytes of int64 triples");
            return NULL;
        }
        n += PyBytes_GET_SIZE(b) / 24;
    }
    long long tpb = PyLong_AsLongLong(args[3]);
    if (tpb == -1 && PyErr_Occurred()) return NULL;
    TempoMap map = {NULL, 0, NULL, NULL, 1e6 * (double)tpb};
    if (tempo != Py_None) {
        if (!PyBytes_Check(tempo) || PyBytes_GET_SIZE(tempo) % 16 || PyBytes_GET_SIZE(tempo) == 0) {
            PyErr_SetString(PyExc_TypeError, "note_table: tempo must be TEMPO_DTYPE bytes or None");
            return NULL;
        }
        map.tick = (const int64_t *)PyBytes_AS_STRING(tempo);
        map.n = PyBytes_GET_SIZE(tempo) / 16;
    }
    PyObject *out = PyByteArray_FromStringAndSize(NULL, n * NOTE_SIZE);
    if (!out || n == 0) return out;
    Row *rows = (Row *)PyMem_Malloc((size_t)(2 * n) * sizeof(Row));
    double *sec = map.n ? (double *)PyMem_Malloc((size_t)(2 * map.n) * sizeof(double)) : NULL;
    if (!rows || (map.n && !sec)) {
        PyMem_Free(rows);
        PyMem_Free(sec);
        Py_DECREF(out);
        return PyErr_NoMemory();
    }
    Py_ssize_t r = 0;
    for (Py_ssize_t c = 0; c < n_chunks; c++) {
        PyObject *b = PyList_GET_ITEM(chunks, c);
        long long ti = PyLong_AsLongLong(PyList_GET_ITEM(tracks, c));
        if (ti == -1 && PyErr_Occurred()) {
            PyMem_Free(rows);
            PyMem_Free(sec);
            Py_DECREF(out);
            return NULL;
        }
        const char *v = PyBytes_AS_STRING(b);
        Py_ssize_t k = PyBytes_GET_SIZE(b) / 24;
        for (Py_ssize_t i = 0; i < k; i++, r++) {
            int64_t tr[3];
            memcpy(tr, v + 24 * i, 24);
            rows[r].start = tr[0];
            rows[r].end = tr[1];
            rows[r].info = tr[2];
            rows[r].k2 = ((tr[2] & 0x7F) << 20) | ((int64_t)ti << 4) | ((tr[2] >> 7) & 0x0F);
            rows[r].idx = r;
        }
    }
    accel_sort_rows(rows, rows + n, n);
    if (map.n) { /* start_sec: 0, then the running sum of whole segments; us as doubles */
        map.start_sec = sec;
        map.us = sec + map.n;
        for (Py_ssize_t i = 0; i < map.n; i++) map.us[i] = (double)map.tick[2 * i + 1];
        map.start_sec[0] = 0.0;
        double acc = 0.0;
        for (Py_ssize_t i = 1; i < map.n; i++) {
            double seg = (double)(map.tick[2 * i] - map.tick[2 * (i - 1)]) * map.us[i - 1];
            acc = acc + seg / map.den;
            map.start_sec[i] = acc;
        }
    }
    char *o = PyByteArray_AS_STRING(out);
    for (Py_ssize_t i = 0; i < n; i++, o += NOTE_SIZE) {
        const Row *w = &rows[i];
        double s0 = 0.0, s1 = 0.0;
        if (map.n) {
            s0 = seconds_at(&map, w->start);
            s1 = seconds_at(&map, w->end);
        }
        int16_t small[5] = {(int16_t)(w->info & 0x7F), (int16_t)((w->info >> 11) & 0x7F),
                            (int16_t)((w->info >> 7) & 0x0F), (int16_t)(w->info >> 18),
                            (int16_t)((w->k2 >> 4) & 0xFFFF)};
        memcpy(o, &w->start, 8);
        memcpy(o + 8, &w->end, 8);
        memcpy(o + 16, &s0, 8);
        memcpy(o + 24, &s1, 8);
        memcpy(o + 32, small, 10);
    }
    PyMem_Free(rows);
    PyMem_Free(sec);
    return out;
}
