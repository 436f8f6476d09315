"""engine/heap.py: the C heap's free pages given back between corpus stages."""
import sys

import pytest

from pipeline.engine import heap


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc's malloc_trim is Linux's")
def test_release_free_memory_reaches_malloc_trim_on_glibc():
    import platform

    if platform.libc_ver()[0] != "glibc":
        pytest.skip("malloc_trim is glibc's (musl has none)")
    # malloc_trim(3) is a glibc function (its manual page: "glibc 2.0"); from memory
    assert heap.release_free_memory() is True


def test_release_free_memory_is_a_no_op_without_the_allocator(monkeypatch):
    monkeypatch.setattr(heap, "_MALLOC_TRIM", None)
    assert heap.release_free_memory() is False
