/* What the units of the optional extension pipeline.midi._smf_accel share (setup.py builds
 * the .c files of this folder into that one module):
 *
 *   decode.c      read_track (the per-track event loop) and note_table
 *   encode.c      group_events and table_group_events (the encoder's group tracks)
 *   analyses.c    the per-file analyses on a note table (pc_histogram, meter_accents,
 *                 note_stats, shift_sort, grid_count, fold_count) and numpy's pairwise sum
 *                 (add_reduce, set_reduce_chunk)
 *   shingles.c    voice_shingles and content_rows
 *   similarity.c  minhash32, overlap_counts and band_pair_codes
 *   keyfeat.c     key_features (the learned key method's sums and the windowed key path)
 *   common.c      the stable row sort and the note-table view used by several units
 *   module.c      the method table and PyInit__smf_accel
 *
 * Functions and data shared between units carry the ``accel_`` prefix and are declared here;
 * the small helpers below are ``static inline``; everything else stays ``static`` in its unit.
 * Plain CPython C API, no dependency beyond the interpreter. Include this header first.
 */
#ifndef MIDISIFT_SMF_ACCEL_H
#define MIDISIFT_SMF_ACCEL_H

#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <math.h>
#include <stdint.h>
#include <string.h>

#if defined(_MSC_VER)
#include <intrin.h>
static inline int ctz64(uint64_t x) {
    unsigned long i;
    _BitScanForward64(&i, x);
    return (int)i;
}
#else
#define ctz64(x) __builtin_ctzll(x)
#endif

/* midi.piece.CONTROL_DTYPE, packed: tick int64, track int16, channel, kind, data1, data2 uint8 */
#define CONTROL_SIZE 14

/* NOTE_DTYPE (pipeline.score): start, end int64; start_s, end_s float64; pitch, velocity,
 * channel, program, track int16; packed, 42 bytes (pipeline.midi.decode checks the layout). */
#define NOTE_SIZE 42

/* One row of a sort: note_table's notes, and the sort keys of the group tracks and of
 * shift_sort (accel_sort_rows orders by start, k2, end, idx). */
typedef struct {
    int64_t start, end, info;
    int64_t k2; /* pitch << 20 | track << 4 | channel: the keys after start */
    Py_ssize_t idx;
} Row;

/* A stable merge sort of T by LESS (insertion sort on runs of 16, then bottom-up merges into
 * tmp, a buffer of n elements), defined once per element type; ``static DEFINE_STABLE_SORT(...)``
 * for a sort of one unit. */
#define DEFINE_STABLE_SORT(NAME, T, LESS)                                                       \
void NAME(T *a, T *tmp, Py_ssize_t n) {                                                         \
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

/* stable sort of n rows by (start, k2, end, idx); tmp: scratch space for n rows (common.c) */
void accel_sort_rows(Row *a, Row *tmp, Py_ssize_t n);

/* A NOTE_DTYPE table seen through the buffer protocol (common.c): accel_notes_open fails with
 * ValueError on a length that is not a multiple of NOTE_SIZE; release it with
 * accel_notes_release. */
typedef struct {
    Py_buffer view;
    const unsigned char *b;
    Py_ssize_t n;
    int ok;
} Notes;

int accel_notes_open(PyObject *obj, Notes *t);
void accel_notes_release(Notes *t);

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

/* The module's functions (module.c's method table), with their docstrings. */
/* decode.c */
extern const char accel_read_track_doc[], accel_note_table_doc[];
PyObject *accel_read_track(PyObject *self, PyObject *const *args, Py_ssize_t nargs);
PyObject *accel_note_table(PyObject *self, PyObject *const *args, Py_ssize_t nargs);
/* encode.c */
extern const char accel_group_events_doc[], accel_table_group_events_doc[];
PyObject *accel_group_events(PyObject *self, PyObject *const *args, Py_ssize_t nargs);
PyObject *accel_table_group_events(PyObject *self, PyObject *const *args, Py_ssize_t nargs);
/* analyses.c */
extern const char accel_pc_histogram_doc[], accel_meter_accents_doc[], accel_note_stats_doc[],
    accel_shift_sort_doc[], accel_grid_count_doc[], accel_fold_count_doc[];
PyObject *accel_set_reduce_chunk(PyObject *self, PyObject *arg);
PyObject *accel_add_reduce(PyObject *self, PyObject *const *args, Py_ssize_t nargs);
PyObject *accel_pc_histogram(PyObject *self, PyObject *const *args, Py_ssize_t nargs);
PyObject *accel_meter_accents(PyObject *self, PyObject *const *args, Py_ssize_t nargs);
PyObject *accel_note_stats(PyObject *self, PyObject *table);
PyObject *accel_shift_sort(PyObject *self, PyObject *const *args, Py_ssize_t nargs);
PyObject *accel_grid_count(PyObject *self, PyObject *const *args, Py_ssize_t nargs);
PyObject *accel_fold_count(PyObject *self, PyObject *const *args, Py_ssize_t nargs);
/* shingles.c */
extern const char accel_voice_shingles_doc[], accel_content_rows_doc[];
PyObject *accel_voice_shingles(PyObject *self, PyObject *const *args, Py_ssize_t nargs);
PyObject *accel_content_rows(PyObject *self, PyObject *const *args, Py_ssize_t nargs);
/* similarity.c */
extern const char accel_minhash32_doc[], accel_overlap_counts_doc[], accel_band_pair_codes_doc[];
PyObject *accel_minhash32(PyObject *self, PyObject *const *args, Py_ssize_t nargs);
PyObject *accel_overlap_counts(PyObject *self, PyObject *const *args, Py_ssize_t nargs);
PyObject *accel_band_pair_codes(PyObject *self, PyObject *const *args, Py_ssize_t nargs);
/* keyfeat.c */
extern const char accel_key_features_doc[];
PyObject *accel_key_features(PyObject *self, PyObject *const *args, Py_ssize_t nargs);

#endif /* MIDISIFT_SMF_ACCEL_H */
