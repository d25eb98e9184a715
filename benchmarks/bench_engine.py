"""Benchmark: growth-engine throughput (tree nodes per second) and peak memory per node.

Runs the snapshot loop (:func:`bhgrow.engine.run_forest`, one chunk) and the whole
pipeline (:func:`bhgrow.pipeline.run_model`: engine + result tables) with the default
config on a synthetic forest of toy trees (:func:`bhgrow.trees.toy.toy_forest`), with
per-black-hole histories off and on. Times are the best of ``--repeat`` runs. Peak memory
is measured in separate, untimed runs: the peak of traced allocations (``tracemalloc``,
which sees numpy's buffers) above the level before the run, and the growth of the
process's maximum resident set size (``getrusage``; a lower bound, since the forest was
built first). Design target (DESIGN §2): <~ 1 microsecond per tree node per core.

The defaults (2200 forests of 1e10-1e14 Msun, 40 snapshots to z = 15, 100 Mpc box) give
~1.4e6 nodes.

    python benchmarks/bench_engine.py [--forests 2200] [--snaps 40] [--repeat 2] [--profile]
"""

from __future__ import annotations

import argparse
import cProfile
import dataclasses
import gc
import io
import pstats
import resource
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bhgrow.config import load_config  # noqa: E402
from bhgrow.cosmology import Cosmology  # noqa: E402
from bhgrow.engine import run_forest  # noqa: E402
from bhgrow.pipeline import run_model  # noqa: E402
from bhgrow.trees.toy import toy_forest  # noqa: E402


def _maxrss_bytes() -> int:
    # ru_maxrss is in KiB on Linux (bytes on macOS)
    r = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return int(r) if sys.platform == "darwin" else int(r) * 1024


def _best_time(fn, repeat: int) -> tuple[float, object]:
    best, out = float("inf"), None
    for _ in range(repeat):
        out = None
        gc.collect()
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def _peak_traced(fn) -> int:
    gc.collect()
    tracemalloc.start()
    base, _ = tracemalloc.get_traced_memory()
    out = fn()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    del out
    return peak - base


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--forests", type=int, default=2200, help="number of toy forests")
    ap.add_argument("--snaps", type=int, default=40, help="number of snapshots")
    ap.add_argument("--box-mpc", type=float, default=100.0, help="comoving box side [Mpc]")
    ap.add_argument("--repeat", type=int, default=2, help="timed runs per case (best kept)")
    ap.add_argument("--seed", type=int, default=1, help="seed of the toy trees")
    ap.add_argument("--profile", action="store_true",
                    help="also profile one engine run (histories on) and print the top 15")
    args = ap.parse_args()

    t0 = time.perf_counter()
    forest = toy_forest(args.forests, seed=args.seed, n_snap=args.snaps, box_mpc=args.box_mpc)
    t_build = time.perf_counter() - t0
    n = forest.n_nodes
    base = load_config(None)
    cosmo = Cosmology.from_name(base.run.cosmology)
    f_bytes = sum(a.nbytes for a in vars(forest).values() if isinstance(a, np.ndarray))
    print(f"forest: {args.forests} toy forests, {args.snaps} snapshots, {n:,} nodes "
          f"(built in {t_build:.1f} s; its arrays {f_bytes / n:.0f} B/node); default config, "
          f"best of {args.repeat}")

    rows = []
    rss_before = _maxrss_bytes()
    n_bh = 0
    for hist in (False, True):
        run = dataclasses.replace(base.run, histories=hist)
        cfg = dataclasses.replace(base, run=run)
        cases = (("engine", lambda: run_forest(forest, cfg.model, run, cosmo)),
                 ("pipeline", lambda: run_model(forest, cfg)))
        for name, fn in cases:
            wall, out = _best_time(fn, args.repeat)
            n_bh = len(out.black_holes)
            del out
            peak = _peak_traced(fn)
            rows.append((name, "on" if hist else "off", wall, peak))
    rss_growth = _maxrss_bytes() - rss_before
    print(f"black holes: {n_bh:,}")
    print()
    print(f"{'what':<9} {'histories':>9} {'wall s':>8} {'nodes/s':>12} {'us/node':>8} "
          f"{'peak traced B/node':>19}")
    for name, hist, wall, peak in rows:
        print(f"{name:<9} {hist:>9} {wall:8.2f} {n / wall:12,.0f} {1e6 * wall / n:8.2f} "
              f"{peak / n:19.0f}")
    print()
    print(f"process max RSS: {_maxrss_bytes() / 2**20:,.0f} MiB; growth during the runs "
          f"{rss_growth / 2**20:,.0f} MiB = {rss_growth / n:.0f} B/node (lower bound)")

    if args.profile:
        run = dataclasses.replace(base.run, histories=True)
        prof = cProfile.Profile()
        prof.enable()
        run_forest(forest, base.model, run, cosmo)
        prof.disable()
        s = io.StringIO()
        pstats.Stats(prof, stream=s).sort_stats("tottime").print_stats(15)
        print()
        print("cProfile, one engine run with histories, top 15 by own time:")
        print(s.getvalue())
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
