/* The extension module pipeline.midi._smf_accel: its method table. The functions live in the
 * other units of this folder (accel.h lists them). */
#include "accel.h"

static PyMethodDef methods[] = {
    {"read_track", (PyCFunction)(void (*)(void))accel_read_track, METH_FASTCALL,
     accel_read_track_doc},
    {"note_table", (PyCFunction)(void (*)(void))accel_note_table, METH_FASTCALL,
     accel_note_table_doc},
    {"group_events", (PyCFunction)(void (*)(void))accel_group_events, METH_FASTCALL,
     accel_group_events_doc},
    {"set_reduce_chunk", (PyCFunction)accel_set_reduce_chunk, METH_O,
     "set_reduce_chunk(n): numpy reduces long arrays in chunks of n values (0: in one pass)."},
    {"add_reduce", (PyCFunction)(void (*)(void))accel_add_reduce, METH_FASTCALL,
     "add_reduce(float64 buffer) -> float: np.add.reduce's pairwise sum (for the tests)."},
    {"content_rows", (PyCFunction)(void (*)(void))accel_content_rows, METH_FASTCALL,
     accel_content_rows_doc},
    {"voice_shingles", (PyCFunction)(void (*)(void))accel_voice_shingles, METH_FASTCALL,
     accel_voice_shingles_doc},
    {"pc_histogram", (PyCFunction)(void (*)(void))accel_pc_histogram, METH_FASTCALL,
     accel_pc_histogram_doc},
    {"meter_accents", (PyCFunction)(void (*)(void))accel_meter_accents, METH_FASTCALL,
     accel_meter_accents_doc},
    {"note_stats", (PyCFunction)accel_note_stats, METH_O, accel_note_stats_doc},
    {"shift_sort", (PyCFunction)(void (*)(void))accel_shift_sort, METH_FASTCALL,
     accel_shift_sort_doc},
    {"grid_count", (PyCFunction)(void (*)(void))accel_grid_count, METH_FASTCALL,
     accel_grid_count_doc},
    {"fold_count", (PyCFunction)(void (*)(void))accel_fold_count, METH_FASTCALL,
     accel_fold_count_doc},
    {"minhash32", (PyCFunction)(void (*)(void))accel_minhash32, METH_FASTCALL, accel_minhash32_doc},
    {"band_pair_codes", (PyCFunction)(void (*)(void))accel_band_pair_codes, METH_FASTCALL,
     accel_band_pair_codes_doc},
    {"overlap_counts", (PyCFunction)(void (*)(void))accel_overlap_counts, METH_FASTCALL,
     accel_overlap_counts_doc},
    {"table_group_events", (PyCFunction)(void (*)(void))accel_table_group_events, METH_FASTCALL,
     accel_table_group_events_doc},
    {"key_features", (PyCFunction)(void (*)(void))accel_key_features, METH_FASTCALL,
     accel_key_features_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "_smf_accel",
    "Compiled fast path of pipeline.midi (see pipeline/midi/csrc/).", -1, methods,
    NULL, NULL, NULL, NULL,
};

PyMODINIT_FUNC PyInit__smf_accel(void) { return PyModule_Create(&module); }
