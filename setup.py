"""Build hook for the optional compiled decoder; the package metadata lives in pyproject.toml.

``optional=True``: where no C compiler is available the build of the extension is skipped
with a warning and midisift installs and runs on its pure-Python decoder (pipeline.midi.decode).
"""
import sys

from setuptools import Extension, setup

# The analyses in the extension must round every product before adding it, as numpy does:
# no fused multiply-add contraction (GCC and Clang; MSVC does not contract by default).
_NO_CONTRACT = [] if sys.platform == "win32" else ["-ffp-contract=off"]

setup(ext_modules=[Extension("pipeline.midi._smf_accel", ["pipeline/midi/_smf_accel.c"], optional=True,
                             extra_compile_args=_NO_CONTRACT)])
