"""Build hook for the optional compiled decoder; the package metadata lives in pyproject.toml.

``optional=True``: where no C compiler is available the build of the extension is skipped
with a warning and midisift installs and runs on its pure-Python decoder (pipeline.smf).
"""
from setuptools import Extension, setup

setup(ext_modules=[Extension("pipeline._smf_accel", ["pipeline/_smf_accel.c"], optional=True)])
