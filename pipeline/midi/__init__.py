"""Reading and writing Standard MIDI Files (decode, encode, the note table)."""

#: The version of what the decoder makes of a file's bytes (the note table, repairs and
#: events): part of every stage's fingerprint (``stages.base.options_fingerprint``), so a change
#: of its rules computes every stored result and artifact again. 2: a note still open at the
#: end of its track whose key had a note-off at its own tick is a zero-length note written
#: note-off first, dropped (``track.OFF_FIRST``), not held to the track's end. 3: a file whose
#: chunks end where it ends but hold fewer tracks than its header declares, beside chunks of
#: other names, is ``bad_chunk`` (a damaged 'MTrk' name), not ``truncated``.
DECODER_VERSION = 3
