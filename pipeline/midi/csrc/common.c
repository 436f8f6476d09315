/* What several units of the extension share: the stable sort of Row records (note_table,
 * the group tracks, shift_sort) and the view of a NOTE_DTYPE table (the analyses, the group
 * tracks of a table). */
#include "accel.h"

/* the order of midi.piece.sort_notes on note_table's rows: start, then k2, then end, then the
 * row index (so the sort is total) */
static inline int row_less(const Row *a, const Row *b) {
    if (a->start != b->start) return a->start < b->start;
    if (a->k2 != b->k2) return a->k2 < b->k2;
    if (a->end != b->end) return a->end < b->end;
    return a->idx < b->idx;
}

DEFINE_STABLE_SORT(accel_sort_rows, Row, row_less)

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

void accel_notes_release(Notes *t) {
    if (t->ok) PyBuffer_Release(&t->view);
    t->ok = 0;
}

/* notes_get, releasing what it took when it fails */
int accel_notes_open(PyObject *obj, Notes *t) {
    if (notes_get(obj, t) < 0) {
        accel_notes_release(t);
        return -1;
    }
    return 0;
}
