/* The encoder's group tracks (pipeline.midi.encode): ``encode._all_group_events`` in one pass
 * (``group_events`` on int64 columns, ``table_group_events`` on a NOTE_DTYPE table). Notes sorted by
 * (group, start, pitch); per group, the program changes and note-ons in that order are merged
 * with the note-offs sorted by (end, pitch), note-offs first at equal ticks; deltas as VLQs,
 * a status byte only where it changes. Byte for byte what the numpy version gives.
 */
#include "accel.h"

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

const char accel_group_events_doc[] = PyDoc_STR(
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
        accel_sort_rows(on + lo, on_b + lo, len);
        accel_sort_rows(off + lo, off_b + lo, len);
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
        accel_sort_rows(on, on + n, n);   /* (group, start, pitch, index) */
        accel_sort_rows(off, off + n, n); /* (group, end, pitch, index) */
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

PyObject *accel_group_events(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
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

const char accel_table_group_events_doc[] = PyDoc_STR(
"table_group_events(notes[, controls]) -> list[tuple[int, bytes]] | None\n\n"
"group_events on the columns of a NOTE_DTYPE table (group = track * 16 + channel) and of an\n"
"optional CONTROL_DTYPE table (stably sorted by group and tick, as encode does), for a\n"
"table whose every note ends after it starts; None otherwise (encode then filters or\n"
"refuses the table itself).");

PyObject *accel_table_group_events(PyObject *self, PyObject *const *args, Py_ssize_t nargs) {
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
    if (accel_notes_open(args[0], &t) < 0) {
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
            accel_notes_release(&t);
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
        accel_sort_rows(crow, crow + nc, nc);
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
    accel_notes_release(&t);
    return out;
}
