"""The allocator setting the engine applies (bhgrow._alloc): once per process, and never
where the user opts out."""

from __future__ import annotations

import platform
import subprocess
import sys

from bhgrow import _alloc


def test_keep_freed_memory_is_applied_once_and_reports_a_bool():
    first = _alloc.keep_freed_memory()
    assert isinstance(first, bool)
    assert _alloc.keep_freed_memory() is first
    if sys.platform.startswith("linux") and platform.libc_ver()[0] == "glibc":
        # glibc accepts both values (32 MiB is its largest mmap threshold on 64-bit)
        assert first


def test_opt_out_leaves_the_allocator_alone():
    code = "from bhgrow import _alloc; print(_alloc.keep_freed_memory())"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         env={"BHGROW_SYSTEM_MALLOC": "1", "PATH": ""}, check=True)
    assert out.stdout.strip() == "False"


def test_release_free_memory_hands_back_free_heap():
    # a freed 64 MB heap block (below the 32 MiB mmap threshold in pieces) is returned
    import numpy as np

    _alloc.keep_freed_memory()
    blocks = [np.ones(2**20) for _ in range(8)]      # 8 x 8 MB from the heap
    del blocks
    released = _alloc.release_free_memory()
    assert isinstance(released, bool)
    if sys.platform.startswith("linux") and platform.libc_ver()[0] == "glibc":
        assert released
