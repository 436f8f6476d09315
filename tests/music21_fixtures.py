"""Shared test helpers: music21 corpus works rendered to MIDI bytes and decoded to a ``Piece``.

The rendering, ground truth and disk cache live in ``pipeline.tools.evaluate_key`` and
``pipeline.tools.eval_midi`` (the scripts that reproduce the README figures), so the tests and the figures use the same files.
Reserved music21 folders (``oneills1850``, ``essenFolksong``, ``ryansMammoth``) are never used.
"""
from pipeline.tools.eval_midi import decode, decode_with_mido, strip_meta
from pipeline.tools.evaluate_key import (ABC_EVAL_FILES, MUSIC21_KEY_METHODS, RESERVED, cache_dir,
                                         chorale_paths, chorales, meter_works)
