"""Allocator setting for the engine's numpy temporaries (glibc on Linux only).

The engine works on whole snapshot slices, so most of its numpy temporaries are 0.1-10 MB.
By default glibc's ``malloc`` serves blocks above 128 kB with ``mmap`` and gives them back
with ``munmap``, and trims the heap as soon as 128 kB lie free at its top, raising those
thresholds only as it sees blocks freed. In a process that has already built or read a
forest, the engine's temporaries therefore keep coming from fresh pages, which the kernel
must fault in and zero each time.

:func:`keep_freed_memory` raises the ``mmap`` threshold to glibc's largest allowed value
(:data:`MMAP_THRESHOLD_BYTES`) and keeps up to :data:`TRIM_THRESHOLD_BYTES` of free heap for
reuse. It changes when the process hands freed memory back to the kernel, not how much it
uses at its peak. Measured with ``benchmarks/bench_engine.py`` on a 1.0e7-node toy forest
(2026-12-02, this project's 2-CPU machine): the engine took 4.75 s instead of 6.19 s, the
peak resident-set growth stayed at 88 B/node, and the no-physics floor was unchanged
(0.43 s against 0.45 s). With a 256 MiB trim threshold the engine took 5.54 s.

:func:`release_free_memory` hands a forked worker's inherited free heap back to the kernel
(``malloc_trim``). After ``fork`` the parent's free heap pages are shared copy-on-write
with the child, so every page the parent then writes again (its engine reuses them for its
own chunks) is copied first: measured on an 8.4e6-node forest set with 2 workers
(2026-12-02), the parent's first chunk took 57-73k page faults and 0.3-0.8 s of system
time, against none when no worker had been forked. Once the child has dropped its
references, the parent's writes find the pages its own again.

Both are no-ops where glibc is not the C library. Set the environment variable
``BHGROW_SYSTEM_MALLOC=1`` to leave the allocator's settings as they are (the trim, which
changes no setting, still runs).

Reference: The GNU C Library Reference Manual, "Malloc Tunable Parameters" (``mallopt``:
``M_MMAP_THRESHOLD`` = -3, ``M_TRIM_THRESHOLD`` = -1; the largest ``M_MMAP_THRESHOLD`` on
64-bit systems is 32 MiB) and "Heap Consistency Checking"/``malloc_trim(3)`` (with pad 0,
every whole free page of every arena is returned, glibc >= 2.8).
"""

from __future__ import annotations

import ctypes
import os
import sys

_M_TRIM_THRESHOLD = -1
_M_MMAP_THRESHOLD = -3
#: blocks above this size are mapped from the kernel one by one, bytes (glibc's maximum,
#: ``4 * 1024 * 1024 * sizeof(long)`` on 64-bit)
MMAP_THRESHOLD_BYTES = 32 * 2**20
#: free memory at the heap top kept for reuse before it goes back to the kernel, bytes
TRIM_THRESHOLD_BYTES = 2**30

_state: dict = {}


def keep_freed_memory() -> bool:
    """Apply the settings above once per process; True where they are in effect."""
    if "ok" not in _state:
        _state["ok"] = _apply()
    return _state["ok"]


def release_free_memory() -> bool:
    """Return this process's free heap pages to the kernel (``malloc_trim(0)``); True where
    glibc released some. For a forked worker, before it starts work (see the module
    notes)."""
    trim = getattr(_libc(), "malloc_trim", None)
    if trim is None:
        return False
    trim.argtypes = (ctypes.c_size_t,)
    return bool(trim(0))


def _libc():
    """glibc, or None (not Linux, or not loadable)."""
    if not sys.platform.startswith("linux"):
        return None
    try:
        return ctypes.CDLL("libc.so.6")
    except OSError:
        return None


def _apply() -> bool:
    if os.environ.get("BHGROW_SYSTEM_MALLOC") == "1":
        return False
    mallopt = getattr(_libc(), "mallopt", None)
    if mallopt is None:
        return False
    mallopt.argtypes = (ctypes.c_int, ctypes.c_int)
    return bool(mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD_BYTES)) and bool(
        mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD_BYTES))
