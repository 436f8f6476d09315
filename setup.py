"""Build hook for the optional compiled decoder; the package metadata lives in pyproject.toml.

``optional=True``: where no C compiler is available the build of the extension is skipped
with a warning and midisift installs and runs on its pure-Python decoder (pipeline.midi.decode).
"""
import sys

from setuptools import Extension, setup

# The analyses in the extension must round every product before adding it, as numpy does:
# no fused multiply-add contraction (GCC and Clang; MSVC does not contract by default).
_NO_CONTRACT = [] if sys.platform == "win32" else ["-ffp-contract=off"]

# One extension module, pipeline.midi._smf_accel, from the units of pipeline/midi/csrc/; what they
# share is declared in accel.h, listed in ``depends`` so that a change to it rebuilds every unit
# and the sdist and the wheel carry it with the units.
_SRC = "pipeline/midi/csrc/"
_UNITS = ["module.c", "common.c", "decode.c", "encode.c", "analyses.c", "shingles.c", "similarity.c",
          "keyfeat.c"]

setup(ext_modules=[Extension("pipeline.midi._smf_accel", [_SRC + unit for unit in _UNITS], optional=True,
                             depends=[_SRC + "accel.h"], extra_compile_args=_NO_CONTRACT)])
