"""Shared helpers of the benchmark scripts: wall/CPU time and peak memory of one call.

Each measured call can run in a forked child process (Linux), so that every case starts
from the same memory state (the parent's, with the forest already built) and the peak of one
case is not hidden by an earlier one. Memory is reported two ways:

* **RSS**: the growth of the resident set during the call, ``VmHWM - VmRSS`` at its start,
  with the high-water mark reset first (``/proc/self/clear_refs``, value 5; Linux >= 4.0).
  What the operating system has to provide; includes allocator slack. Free heap memory
  is handed back first (glibc ``malloc_trim``); what the allocator still keeps can hide
  part of the growth, so this is a lower bound.
* **traced**: the peak of memory allocations traced by :mod:`tracemalloc` (numpy reports
  its buffers to it) above the level at the start. Tracing slows allocation-heavy Python
  code, so it runs in a separate, untimed call.

Only a small summary (the return value of the measured function) travels back from the
child, never the big result.
"""

from __future__ import annotations

import gc
import multiprocessing as mp
import os
import re
import sys
import time
import traceback
import tracemalloc

from bhgrow._alloc import release_free_memory  # hands free heap back before a call

_STATUS = "/proc/self/status"


def _status_kib(key: str) -> int | None:
    try:
        with open(_STATUS) as fh:
            m = re.search(rf"^{key}:\s+(\d+)\s+kB", fh.read(), re.M)
        return int(m.group(1)) if m else None
    except OSError:
        return None


def reset_peak_rss() -> bool:
    """Reset the process's RSS high-water mark; False where that is not possible."""
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        return True
    except OSError:
        return False


def rss_bytes() -> int | None:
    """Current resident set size of this process, bytes (Linux), else None."""
    v = _status_kib("VmRSS")
    return None if v is None else v * 1024


def peak_rss_bytes() -> int | None:
    """Peak resident set size since the last reset (Linux), else None."""
    v = _status_kib("VmHWM")
    return None if v is None else v * 1024


def _run(fn, traced: bool) -> dict:
    gc.collect()
    release_free_memory()
    out: dict = {}
    if traced:
        tracemalloc.start()
        base, _ = tracemalloc.get_traced_memory()
        summary = fn()
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        out["traced_peak_bytes"] = peak - base
    else:
        can_reset = reset_peak_rss()
        rss0 = rss_bytes()
        t0, c0 = time.perf_counter(), time.process_time()
        summary = fn()
        out["wall_s"] = time.perf_counter() - t0
        out["cpu_s"] = time.process_time() - c0
        hwm = peak_rss_bytes()
        out["rss_peak_bytes"] = (hwm - rss0) if (can_reset and hwm is not None
                                                 and rss0 is not None) else None
    out["summary"] = summary
    return out


def _child(conn, fn, traced):
    try:
        conn.send(("ok", _run(fn, traced)))
    except BaseException:  # noqa: BLE001 - reported to the parent
        conn.send(("error", traceback.format_exc()))
    finally:
        conn.close()


def measure(fn, *, traced: bool = False, isolate: bool = True) -> dict:
    """Time ``fn()`` (or trace its allocations) and return a dict.

    Keys: ``wall_s``, ``cpu_s`` (this process and its threads; not child processes) and
    ``rss_peak_bytes`` (RSS growth, None where unavailable) -- or, with ``traced``,
    ``traced_peak_bytes`` -- and ``summary``, whatever ``fn`` returned (keep it small: it is
    pickled back from the child).

    ``isolate`` runs ``fn`` in a forked child process (Linux only; elsewhere it runs here).
    """
    if not isolate or not sys.platform.startswith("linux"):
        return _run(fn, traced)
    ctx = mp.get_context("fork")
    recv, send = ctx.Pipe(duplex=False)
    p = ctx.Process(target=_child, args=(send, fn, traced))
    p.start()
    send.close()
    try:
        status, payload = recv.recv()
    except EOFError:
        p.join()
        raise RuntimeError(f"benchmark child process died (exit code {p.exitcode}; out of "
                           f"memory?)") from None
    p.join()
    if status != "ok":
        raise RuntimeError("benchmark child process failed:\n" + payload)
    return payload


def best_of(fn, repeat: int, *, isolate: bool = True) -> dict:
    """:func:`measure` ``repeat`` times; the fastest run (its memory too) is kept, and the
    largest RSS growth seen over all runs is reported as ``rss_peak_bytes``."""
    runs = [measure(fn, isolate=isolate) for _ in range(max(1, repeat))]
    best = min(runs, key=lambda r: r["wall_s"])
    rss = [r["rss_peak_bytes"] for r in runs if r["rss_peak_bytes"] is not None]
    best = dict(best)
    best["rss_peak_bytes"] = max(rss) if rss else None
    best["n_runs"] = len(runs)
    return best


def fmt_bytes_per(value, n) -> str:
    """``value / n`` as an integer string, or "-" if unknown."""
    return "-" if value is None or n <= 0 else f"{value / n:,.0f}"


def n_cpus() -> int:
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (
        os.cpu_count() or 1)


def load_note() -> str:
    """The 1-minute load average against the CPU count, with a warning when busy."""
    try:
        load = os.getloadavg()[0]
    except OSError:
        return ""
    cpus = n_cpus()
    note = f"load average {load:.2f} on {cpus} CPUs"
    if load > 0.5:
        note += " -- other processes are running: timings (above all parallel ones) are noisy"
    return note
