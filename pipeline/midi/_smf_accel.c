/* Compiled fast path of pipeline.midi: the per-track event loop of ``midi.track.read_track`` (and, at
 * the end, the per-file analyses of pipeline.analysis on the decoded note table).
 *
 * Same semantics as the pure-Python loop (running status kept across meta and sysex events,
 * 4-byte delta-time limit, same-key note stacking, zero-length drop counting, hanging notes
 * closed at the track's last tick, program at note-on reset per track, tempo / meter / key /
 * track-name / first-text extraction, the other channel events as CONTROL_DTYPE records and the
 * text-like metas, unknown-meta and event counting). It builds no error
 * messages: on anything the Python loop raises for, ``read_track`` returns None and the caller
 * re-runs the pure-Python loop on that track, which raises the exact DecodeError.
 *
 * Plain CPython C API, no dependency beyond the interpreter.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <math.h>
#include <stdint.h>
#include <string.h>

#define N_KEYS 2048 /* channel << 7 | pitch */

#if defined(_MSC_VER)
#include <intrin.h>
static int ctz64(uint64_t x) {
    unsigned long i;
    _BitScanForward64(&i, x);
    return (int)i;
}
#else
#define ctz64(x) __builtin_ctzll(x)
#endif

/* Open notes of one key: the first (tick, info) pair inline, further stacked ones on the heap. */
typedef struct {
    int64_t tick0, info0;
    int64_t *more; /* pairs 2..n as (tick, info), capacity ``cap`` pairs */
    int64_t n, cap; /* 64-bit: a damaged file may stack millions of notes on one key */
} OpenKey;

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
        if (k->tick0 != tick) return vec_push(cols, k->tick0, tick, k->info0, 3);
        (*zero)++;
        return 0;
    }
    for (int64_t j = 0; j < n; j++) {
        int64_t s = key_tick(k, j), info = key_info(k, j);
        if (s != tick) {
            if (vec_push(cols, s, tick, info, 3) < 0) return -1;
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

/* midi.piece.CONTROL_DTYPE, packed: tick int64, track int16, channel, kind, data1, data2 uint8 */
#define CONTROL_SIZE 14

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
                if (key_push(k, tick, (int64_t)key | ((int64_t)v << 11) | (progs[st & 0x0F] << 18)) < 0)
                    return -1;
            } else if (k->n) {
                if (key_close(k, tick, &r->cols, &r->zero) < 0) return -1;
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
                int64_t s = key_tick(k, j);
                if (s != tick) {
                    if (vec_push(&r->cols, s, tick, key_info(k, j), 3) < 0) return -1;
                    r->hanging++;
                } else {
                    r->zero++;
                }
            }
        }
    }
    return 0;
}

PyDoc_STRVAR(read_track_doc,
"read_track(data: bytes, start: int, length: int, track: int = 0) -> tuple | None\n\n"
"Parse the MTrk body data[start:start+length] like pipeline.midi.track.read_track. Returns\n"
"(last tick, saw end-of-track, track name or None, first text, events, zero-length notes\n"
"dropped, hanging notes closed, unknown metas, notes, tempos, meters, keys, controls, texts),\n"
"where notes is bytes of native int64 (start, end, info) triples, controls bytes of\n"
"midi.piece.CONTROL_DTYPE records (track = ``track``), tempos/meters/keys lists of (tick, ...)\n"
"tuples and texts a list of (tick, meta type, payload bytes); or None where the pure-Python\n"
"loop would raise a DecodeError.");

static PyObject *read_track(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
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
    int64_t start, end, info;
    int64_t k2; /* pitch << 20 | track << 4 | channel: the keys after start */
    Py_ssize_t idx;
} Row;

static inline int row_less(const Row *a, const Row *b) {
    if (a->start != b->start) return a->start < b->start;
    if (a->k2 != b->k2) return a->k2 < b->k2;
    if (a->end != b->end) return a->end < b->end;
    return a->idx < b->idx;
}

/* A stable merge sort of T by LESS (insertion sort on runs of 16, then bottom-up merges into
 * tmp, a buffer of n elements), defined once per element type. */
#define DEFINE_STABLE_SORT(NAME, T, LESS)                                                       \
static void NAME(T *a, T *tmp, Py_ssize_t n) {                                                  \
    const Py_ssize_t RUN = 16;                                                                  \
    for (Py_ssize_t lo = 0; lo < n; lo += RUN) {                                                \
        Py_ssize_t hi = lo + RUN < n ? lo + RUN : n;                                            \
        for (Py_ssize_t i = lo + 1; i < hi; i++) {                                              \
            T x = a[i];                                                                         \
            Py_ssize_t j = i;                                                                   \
            while (j > lo && LESS(&x, &a[j - 1])) {                                             \
                a[j] = a[j - 1];                                                                \
                j--;                                                                            \
            }                                                                                   \
            a[j] = x;                                                                           \
        }                                                                                       \
    }                                                                                           \
    T *src = a, *dst = tmp;                                                                     \
    for (Py_ssize_t width = RUN; width < n; width *= 2) {                                       \
        for (Py_ssize_t lo = 0; lo < n; lo += 2 * width) {                                      \
            Py_ssize_t mid = lo + width < n ? lo + width : n;                                   \
            Py_ssize_t hi = lo + 2 * width < n ? lo + 2 * width : n;                            \
            Py_ssize_t i = lo, j = mid, k = lo;                                                 \
            if (mid >= hi || !LESS(&src[mid], &src[mid - 1])) { /* already in order */          \
                memcpy(dst + lo, src + lo, (size_t)(hi - lo) * sizeof(T));                      \
                continue;                                                                       \
            }                                                                                   \
            while (i < mid && j < hi) dst[k++] = LESS(&src[j], &src[i]) ? src[j++] : src[i++];  \
            while (i < mid) dst[k++] = src[i++];                                                \
            while (j < hi) dst[k++] = src[j++];                                                 \
        }                                                                                       \
        T *sw = src;                                                                            \
        src = dst;                                                                              \
        dst = sw;                                                                               \
    }                                                                                           \
    if (src != a) memcpy(a, src, (size_t)n * sizeof(T));                                        \
}

DEFINE_STABLE_SORT(sort_rows, Row, row_less)

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

/* NOTE_DTYPE (pipeline.score): start, end int64; start_s, end_s float64; pitch, velocity,
 * channel, program, track int16; packed, 42 bytes (pipeline.midi.decode checks the layout). */
#define NOTE_SIZE 42

PyDoc_STRVAR(note_table_doc,
"note_table(chunks: list[bytes], tracks: list[int], tempo: bytes | None, ticks_per_beat: int)\n"
"    -> bytearray\n\n"
"NOTE_DTYPE records of the int64 (start, end, info) triples in chunks (chunks[i] from MTrk\n"
"tracks[i]), sorted by (start, pitch, track, channel, end), stable. With tempo (the\n"
"TEMPO_DTYPE map as bytes), start_s/end_s as midi.piece.ticks_to_seconds gives; else 0.");

static PyObject *note_table(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
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
    sort_rows(rows, rows + n, n);
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

/* ---------------------------------------------------------------------------------------------
 * The encoder's group tracks: ``encode._all_group_events`` in one pass. Notes sorted by
 * (group, start, pitch); per group, the program changes and note-ons in that order are merged
 * with the note-offs sorted by (end, pitch), note-offs first at equal ticks; deltas as VLQs,
 * a status byte only where it changes. Byte for byte what the numpy version gives.
 */

typedef struct {
    Py_buffer view;
    const int64_t *v;
    int ok;
} Column;

static int column_get(PyObject *obj, Column *c, Py_ssize_t *n) {
    c->ok = 0;
    if (PyObject_GetBuffer(obj, &c->view, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) < 0) return -1;
    c->ok = 1;
    const char *f = c->view.format ? c->view.format : "B";
    if (*f == '<' || *f == '=' || *f == '@') f++;
    if (c->view.itemsize != 8 || c->view.ndim != 1 || !(f[0] == 'q' || f[0] == 'l') || f[1]) {
        PyErr_SetString(PyExc_TypeError, "group_events: columns must be 1-d contiguous int64 arrays");
        return -1;
    }
    Py_ssize_t k = c->view.shape ? c->view.shape[0] : c->view.len / 8;
    if (*n >= 0 && k != *n) {
        PyErr_SetString(PyExc_ValueError, "group_events: columns must have the same length");
        return -1;
    }
    *n = k;
    c->v = (const int64_t *)c->view.buf;
    return 0;
}

static inline unsigned char *put_event(unsigned char *o, int64_t delta, unsigned int status,
                                       unsigned int *run, int64_t d1, int64_t d2, int has_d2) {
    if (delta >= (1 << 21)) *o++ = (unsigned char)(((delta >> 21) & 0x7F) | 0x80);
    if (delta >= (1 << 14)) *o++ = (unsigned char)(((delta >> 14) & 0x7F) | 0x80);
    if (delta >= (1 << 7)) *o++ = (unsigned char)(((delta >> 7) & 0x7F) | 0x80);
    *o++ = (unsigned char)(delta & 0x7F);
    if (status != *run) {
        *o++ = (unsigned char)status;
        *run = status;
    }
    *o++ = (unsigned char)d1;
    if (has_d2) *o++ = (unsigned char)d2;
    return o;
}

PyDoc_STRVAR(group_events_doc,
"group_events(group, start, end, pitch, velocity, program[, cgroup, ctick, cmsg])\n"
"    -> list[tuple[int, bytes]]\n\n"
"encode._all_group_events on 1-d int64 arrays: (group, event bytes) in ascending group order;\n"
"the optional other channel events come in (group, tick, file) order. Raises ValueError when\n"
"a delta falls outside 0..0x0FFFFFFF, as the numpy version does.");

/* The two sorts of group_events for a table of few groups (at most 64): the rows are first
 * put into their group's block (stably), then each block is sorted on its own. The sort
 * order is total (the note index breaks ties), so this is the permutation of the one-pass
 * sort; it is faster because a canonical note table is already in order within a group.
 * Returns 0 (nothing done) for more groups; on[n..2n) and off[n..2n) are scratch space. */
static int sort_by_group(Row *on, Row *off, Py_ssize_t n) {
    enum { MAX_GROUPS = 64 };
    int64_t gv[MAX_GROUPS];
    Py_ssize_t count[MAX_GROUPS + 1];
    int g_n = 0, last = 0;
    unsigned char *gi = (unsigned char *)PyMem_Malloc((size_t)n);
    if (!gi) return 0;
    for (Py_ssize_t i = 0; i < n; i++) {
        int64_t g = on[i].start;
        if (g_n && gv[last] == g) {
            gi[i] = (unsigned char)last;
            continue;
        }
        int k = 0;
        while (k < g_n && gv[k] != g) k++;
        if (k == g_n) {
            if (g_n == MAX_GROUPS) {
                PyMem_Free(gi);
                return 0;
            }
            gv[g_n++] = g;
        }
        gi[i] = (unsigned char)k;
        last = k;
    }
    int rank[MAX_GROUPS], order[MAX_GROUPS];
    for (int k = 0; k < g_n; k++) order[k] = k;
    for (int k = 1; k < g_n; k++) { /* groups in ascending value */
        int x = order[k], j = k;
        while (j > 0 && gv[order[j - 1]] > gv[x]) {
            order[j] = order[j - 1];
            j--;
        }
        order[j] = x;
    }
    for (int k = 0; k < g_n; k++) rank[order[k]] = k;
    memset(count, 0, sizeof count);
    for (Py_ssize_t i = 0; i < n; i++) count[rank[gi[i]] + 1]++;
    for (int k = 0; k < g_n; k++) count[k + 1] += count[k];
    Py_ssize_t pos[MAX_GROUPS];
    Row *on_b = on + n, *off_b = off + n;
    memcpy(pos, count, sizeof pos);
    for (Py_ssize_t i = 0; i < n; i++) on_b[pos[rank[gi[i]]]++] = on[i];
    memcpy(pos, count, sizeof pos);
    for (Py_ssize_t i = 0; i < n; i++) off_b[pos[rank[gi[i]]]++] = off[i];
    PyMem_Free(gi);
    memcpy(on, on_b, (size_t)n * sizeof(Row));
    memcpy(off, off_b, (size_t)n * sizeof(Row));
    for (int k = 0; k < g_n; k++) {
        Py_ssize_t lo = count[k], len = count[k + 1] - count[k];
        sort_rows(on + lo, on_b + lo, len);
        sort_rows(off + lo, off_b + lo, len);
    }
    return 1;
}

/* the group tracks of n notes given as int64 columns (group = track * 16 + channel) and of nc
 * other channel events (cg group, ct tick, cm = status << 16 | data1 << 8 | data2), these in
 * (group, tick, file) order */
static PyObject *group_events_of(Py_ssize_t n, const int64_t *grp, const int64_t *st,
                                 const int64_t *en, const int64_t *pi, const int64_t *ve,
                                 const int64_t *pr, Py_ssize_t nc, const int64_t *cg,
                                 const int64_t *ct, const int64_t *cm) {
    PyObject *out = NULL;
    Row *on = NULL, *off = NULL;
    unsigned char *buf = NULL;
    if (n == 0 && nc == 0) {
        out = PyList_New(0);
        goto done;
    }
    on = (Row *)PyMem_Malloc((size_t)(4 * n + 1) * sizeof(Row));
    buf = (unsigned char *)PyMem_Malloc((size_t)(21 * n + 7 * nc + 1));
    if (!on || !buf) {
        PyErr_NoMemory();
        goto done;
    }
    off = on + 2 * n;
    for (Py_ssize_t i = 0; i < n; i++) {
        on[i].start = grp[i];
        on[i].k2 = st[i];
        on[i].end = pi[i];
        on[i].idx = i;
        off[i].start = grp[i];
        off[i].k2 = en[i];
        off[i].end = pi[i];
        off[i].idx = i;
    }
    /* Row reused as sort keys: start = group, k2 = tick, end = pitch, idx = note index;
     * on[0..n) with scratch on[n..2n), off = on[2n..3n) with scratch on[3n..4n) */
    if (n && !sort_by_group(on, off, n)) {
        sort_rows(on, on + n, n);   /* (group, start, pitch, index) */
        sort_rows(off, off + n, n); /* (group, end, pitch, index) */
    }
    out = PyList_New(0);
    if (!out) goto done;
    unsigned char *o = buf;
    int bad = 0;
    for (Py_ssize_t a = 0, b = 0, c = 0; (a < n || c < nc) && !bad;) {
        int64_t g = a < n ? on[a].start : cg[c];
        if (c < nc && cg[c] < g) g = cg[c];
        Py_ssize_t a_end = a, b_end = b, c_end = c;
        while (a_end < n && on[a_end].start == g) a_end++;
        while (b_end < n && off[b_end].start == g) b_end++;
        while (c_end < nc && cg[c_end] == g) c_end++;
        unsigned char *g0 = o;
        unsigned int run = 0x100; /* no status yet: the first event writes one */
        unsigned int ch = (unsigned int)(g & 0x0F);
        int64_t last = 0, prog = 0;
        int has_prog = 0; /* a program change was written in this track */
        /* at one tick: note-offs, then the other events, then note-ons */
        while (a < a_end || b < b_end || c < c_end) {
            int64_t tick;
            if (b < b_end && (a >= a_end || off[b].k2 <= on[a].k2) && (c >= c_end || off[b].k2 <= ct[c])) {
                tick = off[b].k2;
                if (tick - last < 0 || tick - last > 0x0FFFFFFF) { bad = 1; break; }
                o = put_event(o, tick - last, 0x90 | ch, &run, off[b].end, 0, 1);
                b++;
            } else if (c < c_end && (a >= a_end || ct[c] <= on[a].k2)) {
                tick = ct[c];
                if (tick - last < 0 || tick - last > 0x0FFFFFFF) { bad = 1; break; }
                unsigned int status = (unsigned int)((cm[c] >> 16) & 0xFF);
                int64_t d1 = (cm[c] >> 8) & 0xFF;
                if ((status & 0xF0) == 0xC0) {
                    prog = d1;
                    has_prog = 1;
                }
                o = put_event(o, tick - last, status, &run, d1, cm[c] & 0xFF, (status & 0xE0) != 0xC0);
                c++;
            } else {
                Py_ssize_t i = on[a].idx;
                tick = on[a].k2;
                if (tick - last < 0 || tick - last > 0x0FFFFFFF) { bad = 1; break; }
                if (!has_prog || pr[i] != prog) { /* the note's program, right before it */
                    o = put_event(o, tick - last, 0xC0 | ch, &run, pr[i], 0, 0);
                    last = tick;
                }
                o = put_event(o, tick - last, 0x90 | ch, &run, pi[i], ve[i], 1);
                prog = pr[i];
                has_prog = 1;
                a++;
            }
            last = tick;
        }
        if (bad) break;
        PyObject *body = PyBytes_FromStringAndSize((const char *)g0, o - g0);
        PyObject *item = body ? Py_BuildValue("(LN)", (long long)g, body) : NULL;
        if (!item || PyList_Append(out, item) < 0) {
            Py_XDECREF(item);
            Py_CLEAR(out);
            goto done;
        }
        Py_DECREF(item);
    }
    if (bad) {
        Py_CLEAR(out);
        PyErr_SetString(PyExc_ValueError,
                        "note times must be 0..0x0FFFFFFF ticks apart and not negative");
    }
done:
    PyMem_Free(on);
    PyMem_Free(buf);
    return out;
}

static PyObject *group_events(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 6 && nargs != 9) {
        PyErr_SetString(PyExc_TypeError, "group_events takes 6 note columns and optionally 3 "
                        "columns of other events");
        return NULL;
    }
    Column col[9];
    Py_ssize_t n = -1, nc = nargs == 9 ? -1 : 0;
    PyObject *out = NULL;
    int c;
    for (c = 0; c < 9; c++) col[c].ok = 0;
    for (c = 0; c < 6; c++)
        if (column_get(args[c], &col[c], &n) < 0) goto done;
    for (c = 6; c < nargs; c++)
        if (column_get(args[c], &col[c], &nc) < 0) goto done;
    out = group_events_of(n, col[0].v, col[1].v, col[2].v, col[3].v, col[4].v, col[5].v, nc,
                          nargs == 9 ? col[6].v : NULL, nargs == 9 ? col[7].v : NULL,
                          nargs == 9 ? col[8].v : NULL);
done:
    for (c = 0; c < 9; c++)
        if (col[c].ok) PyBuffer_Release(&col[c].view);
    return out;
}

/* ---------------------------------------------------------------------------------------------
 * Per-file analyses (pipeline.analysis): the same IEEE double operations, in the same order,
 * as the numpy formulations, on the NOTE_DTYPE table of one file. Sums that numpy takes with
 * ``np.add.reduce`` use numpy's pairwise summation (``pairwise_sum`` below); ``np.bincount``
 * sums in index order. Each function returns None where the numpy version takes a general
 * path (notes out of time order, values outside the ranges checked) or would raise: the
 * caller then runs the numpy code, which stays the specification (tests/test_smf_accel.py).
 * The build turns off multiply-add contraction (setup.py), so every product is rounded
 * before it is added, as numpy does.
 */

typedef struct {
    Py_buffer view;
    const unsigned char *b;
    Py_ssize_t n;
    int ok;
} Notes;

static int notes_get(PyObject *obj, Notes *t) {
    t->ok = 0;
    if (PyObject_GetBuffer(obj, &t->view, PyBUF_C_CONTIGUOUS) < 0) return -1;
    t->ok = 1;
    if (t->view.len % NOTE_SIZE) {
        PyErr_SetString(PyExc_ValueError, "a NOTE_DTYPE table is expected");
        return -1;
    }
    t->b = (const unsigned char *)t->view.buf;
    t->n = t->view.len / NOTE_SIZE;
    return 0;
}

static void notes_release(Notes *t) {
    if (t->ok) PyBuffer_Release(&t->view);
    t->ok = 0;
}

/* notes_get, releasing what it took when it fails */
static int notes_open(PyObject *obj, Notes *t) {
    if (notes_get(obj, t) < 0) {
        notes_release(t);
        return -1;
    }
    return 0;
}

static inline int64_t f_i64(const Notes *t, Py_ssize_t i, int off) {
    int64_t v;
    memcpy(&v, t->b + i * NOTE_SIZE + off, 8);
    return v;
}
static inline double f_f64(const Notes *t, Py_ssize_t i, int off) {
    double v;
    memcpy(&v, t->b + i * NOTE_SIZE + off, 8);
    return v;
}
static inline int f_i16(const Notes *t, Py_ssize_t i, int off) {
    int16_t v;
    memcpy(&v, t->b + i * NOTE_SIZE + off, 2);
    return v;
}
#define O_START 0
#define O_END 8
#define O_START_S 16
#define O_END_S 24
#define O_PITCH 32
#define O_VELOCITY 34
#define O_CHANNEL 36
#define O_PROGRAM 38
#define O_TRACK 40
#define DRUM 9

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

static PyObject *set_reduce_chunk(PyObject *self, PyObject *arg) {
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

static PyObject *py_sum(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
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

/* numpy's floor division of int64 by a positive divisor */
static inline int64_t floordiv_pos(int64_t a, int64_t b) {
    int64_t q = a / b;
    if ((a % b) != 0 && a < 0) q--;
    return q;
}
/* int64 arithmetic that wraps modulo 2**64, as numpy's integer arrays do */
static inline int64_t wrap_mul(int64_t a, int64_t b) { return (int64_t)((uint64_t)a * (uint64_t)b); }
static inline int64_t wrap_add(int64_t a, int64_t b) { return (int64_t)((uint64_t)a + (uint64_t)b); }
static inline int64_t wrap_sub(int64_t a, int64_t b) { return (int64_t)((uint64_t)a - (uint64_t)b); }

static inline uint64_t fmix64(uint64_t x) {
    x ^= x >> 33;
    x *= 0xFF51AFD7ED558CCDULL;
    x ^= x >> 33;
    x *= 0xC4CEB9FE1A85EC53ULL;
    x ^= x >> 33;
    return x;
}
#define ROLL 0x9E3779B97F4A7C15ULL

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
static int cmp_i64(const void *a, const void *b) {
    int64_t x = *(const int64_t *)a, y = *(const int64_t *)b;
    return (x > y) - (x < y);
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

PyDoc_STRVAR(voice_shingles_doc,
"voice_shingles(notes, tpb, steps, max_interval, max_ratio, bounds, bass_below, ngram,\n"
"               pitch_ngram, min_distinct, lead_monophony, named_tracks, line_base,\n"
"               pitch_base, lead_base, max_shingles) -> bytes | None\n\n"
"shingles.shingle_hashes of a NOTE_DTYPE table at the kinds (line, pitch, lead): sorted unique\n"
"uint64, little-endian bytes. ``bounds``: the ratio class boundaries (float64 bytes);\n"
"``named_tracks``: track indices whose names mark the lead, ascending; the bases: each\n"
"kind's tag times the seed constant, modulo 2**64. None where a window would be too long.");

static PyObject *voice_shingles(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
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
    if (notes_open(args[0], &t) < 0) return NULL;
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
    notes_release(&t);
    return out;
}

PyDoc_STRVAR(content_rows_doc,
"content_rows(notes, ticks_per_beat, steps_per_beat) -> bytes\n\n"
"shingles.content_hash's sorted uint64 row hashes (little-endian bytes) of a NOTE_DTYPE table.");

static PyObject *content_rows(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 3) {
        PyErr_SetString(PyExc_TypeError, "content_rows takes 3 arguments");
        return NULL;
    }
    int64_t tpb = PyLong_AsLongLong(args[1]), steps = PyLong_AsLongLong(args[2]);
    if (PyErr_Occurred()) return NULL;
    if (tpb <= 0 || tpb > ((int64_t)1 << 40) || steps <= 0 || steps > ((int64_t)1 << 20)) Py_RETURN_NONE;
    Notes t;
    if (notes_open(args[0], &t) < 0) return NULL;
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
    notes_release(&t);
    return out;
}

PyDoc_STRVAR(pc_histogram_doc,
"pc_histogram(notes, ticks_per_beat, bass_weight, final_weight, final_beats) -> bytes | None\n\n"
"key.pitch_class_histogram of a NOTE_DTYPE table (12 float64, native bytes); None for notes\n"
"out of time order.");

static PyObject *pc_histogram(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 5) {
        PyErr_SetString(PyExc_TypeError, "pc_histogram takes 5 arguments");
        return NULL;
    }
    double tpb = PyFloat_AsDouble(args[1]), bw = PyFloat_AsDouble(args[2]),
           fw = PyFloat_AsDouble(args[3]), fb = PyFloat_AsDouble(args[4]);
    if (PyErr_Occurred()) return NULL;
    Notes t;
    if (notes_open(args[0], &t) < 0) return NULL;
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
    notes_release(&t);
    if (!ok) Py_RETURN_NONE;
    return PyBytes_FromStringAndSize((const char *)hist, sizeof hist);
}

PyDoc_STRVAR(meter_accents_doc,
"meter_accents(notes, ticks_per_beat, lags, common_bar) -> (bytes, list[float], float) | None\n\n"
"meter's accent function (float64 bytes), its normalized autocorrelations at ``lags`` (bins)\n"
"and the median inter-onset interval in beats, for pitched onsets in time order (else None).");

static PyObject *meter_accents(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
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
    if (notes_open(args[0], &t) < 0) return NULL;
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
    notes_release(&t);
    return out;
}

typedef struct {
    int64_t key;
    Py_ssize_t idx;
} Ev;

static inline int ev_less(const Ev *a, const Ev *b) {
    return a->key < b->key || (a->key == b->key && a->idx < b->idx);
}

DEFINE_STABLE_SORT(sort_events, Ev, ev_less)

static inline int plain_double(double x) { return x == x && !(x == 0.0 && signbit(x)); }

PyDoc_STRVAR(note_stats_doc,
"note_stats(notes) -> tuple | None\n\n"
"stats.piece_stats of a non-empty NOTE_DTYPE table: (duration_s, drum notes, programs\n"
"(sorted list), max_polyphony, mean_polyphony, pitches, longest_silence_s, tracks,\n"
"longest_note_s); None for values the numpy version treats otherwise (NaN or -0.0 seconds,\n"
"pitches or programs outside 0..127, negative tracks, ticks beyond 2**61).");

static PyObject *note_stats(PyObject *self, PyObject *table) {
    (void)self;
    Notes t;
    if (notes_open(table, &t) < 0) return NULL;
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
    notes_release(&t);
    return out;
}


PyDoc_STRVAR(shift_sort_doc,
"shift_sort(notes, semitones) -> (bytearray, int) | None\n\n"
"sort_notes(shift_notes(notes, semitones)[0]) as NOTE_DTYPE bytes, and the number of notes\n"
"folded back into 0..127; None for tracks or channels outside 0..65535 / 0..15.");

static PyObject *shift_sort(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 2) {
        PyErr_SetString(PyExc_TypeError, "shift_sort takes a note table and a shift");
        return NULL;
    }
    long long s = PyLong_AsLongLong(args[1]);
    if (s == -1 && PyErr_Occurred()) return NULL;
    if (s < -(1LL << 40) || s > (1LL << 40)) Py_RETURN_NONE;
    Notes t;
    if (notes_open(args[0], &t) < 0) return NULL;
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
    sort_rows(rows, tmp, n);
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
    notes_release(&t);
    return out;
}


PyDoc_STRVAR(table_group_events_doc,
"table_group_events(notes[, controls]) -> list[tuple[int, bytes]] | None\n\n"
"group_events on the columns of a NOTE_DTYPE table (group = track * 16 + channel) and of an\n"
"optional CONTROL_DTYPE table (stably sorted by group and tick, as encode does), for a\n"
"table whose every note ends after it starts; None otherwise (encode then filters or\n"
"refuses the table itself).");

static PyObject *table_group_events(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 1 && nargs != 2) {
        PyErr_SetString(PyExc_TypeError, "table_group_events takes a note table and optionally "
                        "a control table");
        return NULL;
    }
    Py_buffer cv;
    int c_ok = 0;
    Py_ssize_t nc = 0;
    int64_t *cc = NULL;
    Row *crow = NULL;
    if (nargs == 2) {
        if (PyObject_GetBuffer(args[1], &cv, PyBUF_C_CONTIGUOUS) < 0) return NULL;
        c_ok = 1;
        if (cv.len % CONTROL_SIZE) {
            PyBuffer_Release(&cv);
            PyErr_SetString(PyExc_ValueError, "a CONTROL_DTYPE table is expected");
            return NULL;
        }
        nc = cv.len / CONTROL_SIZE;
    }
    Notes t;
    if (notes_open(args[0], &t) < 0) {
        if (c_ok) PyBuffer_Release(&cv);
        return NULL;
    }
    PyObject *out = NULL;
    if (nc) { /* (group, tick, message) columns, stably sorted by (group, tick) */
        const unsigned char *b = (const unsigned char *)cv.buf;
        cc = (int64_t *)PyMem_Malloc((size_t)(3 * nc) * sizeof(int64_t));
        crow = (Row *)PyMem_Malloc((size_t)(2 * nc) * sizeof(Row));
        if (!cc || !crow) {
            PyErr_NoMemory();
            PyMem_Free(cc);
            PyMem_Free(crow);
            PyBuffer_Release(&cv);
            notes_release(&t);
            return NULL;
        }
        for (Py_ssize_t i = 0; i < nc; i++, b += CONTROL_SIZE) {
            int64_t tk;
            int16_t tr;
            memcpy(&tk, b, 8);
            memcpy(&tr, b + 8, 2);
            crow[i].start = (int64_t)tr * 16 + b[10];
            crow[i].k2 = tk;
            crow[i].end = 0;
            crow[i].info = ((int64_t)(b[11] | b[10]) << 16) | ((int64_t)b[12] << 8) | b[13];
            crow[i].idx = i;
        }
        sort_rows(crow, crow + nc, nc);
        for (Py_ssize_t i = 0; i < nc; i++) {
            cc[i] = crow[i].start;
            cc[nc + i] = crow[i].k2;
            cc[2 * nc + i] = crow[i].info;
        }
        PyMem_Free(crow);
        PyBuffer_Release(&cv);
        c_ok = 0;
    }
    Py_ssize_t n = t.n;
    int64_t *c = (int64_t *)PyMem_Malloc((size_t)(6 * (n ? n : 1)) * sizeof(int64_t));
    if (!c) {
        PyErr_NoMemory();
        goto done;
    }
    for (Py_ssize_t i = 0; i < n; i++) {
        int64_t s = f_i64(&t, i, O_START), e = f_i64(&t, i, O_END);
        if (!(e > s)) {
            out = Py_None;
            Py_INCREF(out);
            goto done;
        }
        c[i] = (int64_t)f_i16(&t, i, O_TRACK) * 16 + f_i16(&t, i, O_CHANNEL);
        c[n + i] = s;
        c[2 * n + i] = e;
        c[3 * n + i] = f_i16(&t, i, O_PITCH);
        c[4 * n + i] = f_i16(&t, i, O_VELOCITY);
        c[5 * n + i] = f_i16(&t, i, O_PROGRAM);
    }
    out = group_events_of(n, c, c + n, c + 2 * n, c + 3 * n, c + 4 * n, c + 5 * n, nc,
                          cc, nc ? cc + nc : NULL, nc ? cc + 2 * nc : NULL);
done:
    PyMem_Free(c);
    PyMem_Free(cc);
    notes_release(&t);
    return out;
}


PyDoc_STRVAR(grid_count_doc,
"grid_count(notes, flags: bytes) -> int | None\n\n"
"How many notes start on a tick whose flags[start % len(flags)] is set (meter.grid_fraction);\n"
"None when a start is negative or not below 2**53 (numpy then takes its float path).");

static PyObject *grid_count(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 2 || !PyBytes_Check(args[1]) || PyBytes_GET_SIZE(args[1]) == 0) {
        PyErr_SetString(PyExc_TypeError, "grid_count takes a note table and non-empty flag bytes");
        return NULL;
    }
    const unsigned char *flags = (const unsigned char *)PyBytes_AS_STRING(args[1]);
    int64_t len = (int64_t)PyBytes_GET_SIZE(args[1]);
    Notes t;
    if (notes_open(args[0], &t) < 0) return NULL;
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
    notes_release(&t);
    if (!ok) Py_RETURN_NONE;
    return PyLong_FromSsize_t(count);
}


PyDoc_STRVAR(fold_count_doc,
"fold_count(notes, semitones) -> int\n\n"
"transpose.fold_count: pitched notes whose pitch plus semitones falls outside 0..127.");

static PyObject *fold_count(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
    (void)self;
    if (nargs != 2) {
        PyErr_SetString(PyExc_TypeError, "fold_count takes a note table and a shift");
        return NULL;
    }
    long long s = PyLong_AsLongLong(args[1]);
    if (s == -1 && PyErr_Occurred()) return NULL;
    if (s < -(1LL << 40) || s > (1LL << 40)) Py_RETURN_NONE;
    Notes t;
    if (notes_open(args[0], &t) < 0) return NULL;
    Py_ssize_t count = 0;
    if (s != 0)
        for (Py_ssize_t i = 0; i < t.n; i++) {
            if (f_i16(&t, i, O_CHANNEL) == DRUM) continue;
            long long p = f_i16(&t, i, O_PITCH) + s;
            count += p > 127 || p < 0;
        }
    notes_release(&t);
    return PyLong_FromSsize_t(count);
}


PyDoc_STRVAR(minhash32_doc,
"minhash32(shingles, a, b) -> bytes\n\n"
"similarity.minhash of a non-empty uint64 shingle array with the uint32 permutations a, b:\n"
"for each permutation j the least (a[j] * fmix32(fold32(s)) + b[j]) mod 2**32 over the\n"
"shingles s, as uint32 native bytes. (Offered to similarity.minhash; integer arithmetic, so\n"
"any order of the work gives the same values.)");

static PyObject *minhash32(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
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


PyDoc_STRVAR(overlap_counts_doc,
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

static PyObject *overlap_counts(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
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

PyDoc_STRVAR(band_pair_codes_doc,
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

static PyObject *band_pair_codes(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
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


static PyMethodDef methods[] = {
    {"read_track", (PyCFunction)(void (*)(void))read_track, METH_FASTCALL, read_track_doc},
    {"note_table", (PyCFunction)(void (*)(void))note_table, METH_FASTCALL, note_table_doc},
    {"group_events", (PyCFunction)(void (*)(void))group_events, METH_FASTCALL, group_events_doc},
    {"set_reduce_chunk", (PyCFunction)set_reduce_chunk, METH_O,
     "set_reduce_chunk(n): numpy reduces long arrays in chunks of n values (0: in one pass)."},
    {"add_reduce", (PyCFunction)(void (*)(void))py_sum, METH_FASTCALL,
     "add_reduce(float64 buffer) -> float: np.add.reduce's pairwise sum (for the tests)."},
    {"content_rows", (PyCFunction)(void (*)(void))content_rows, METH_FASTCALL, content_rows_doc},
    {"voice_shingles", (PyCFunction)(void (*)(void))voice_shingles, METH_FASTCALL, voice_shingles_doc},
    {"pc_histogram", (PyCFunction)(void (*)(void))pc_histogram, METH_FASTCALL, pc_histogram_doc},
    {"meter_accents", (PyCFunction)(void (*)(void))meter_accents, METH_FASTCALL, meter_accents_doc},
    {"note_stats", (PyCFunction)note_stats, METH_O, note_stats_doc},
    {"shift_sort", (PyCFunction)(void (*)(void))shift_sort, METH_FASTCALL, shift_sort_doc},
    {"grid_count", (PyCFunction)(void (*)(void))grid_count, METH_FASTCALL, grid_count_doc},
    {"fold_count", (PyCFunction)(void (*)(void))fold_count, METH_FASTCALL, fold_count_doc},
    {"minhash32", (PyCFunction)(void (*)(void))minhash32, METH_FASTCALL, minhash32_doc},
    {"band_pair_codes", (PyCFunction)(void (*)(void))band_pair_codes, METH_FASTCALL,
     band_pair_codes_doc},
    {"overlap_counts", (PyCFunction)(void (*)(void))overlap_counts, METH_FASTCALL,
     overlap_counts_doc},
    {"table_group_events", (PyCFunction)(void (*)(void))table_group_events, METH_FASTCALL,
     table_group_events_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "_smf_accel",
    "Compiled fast path of pipeline.midi (see pipeline/midi/_smf_accel.c).", -1, methods,
    NULL, NULL, NULL, NULL,
};

PyMODINIT_FUNC PyInit__smf_accel(void) { return PyModule_Create(&module); }
