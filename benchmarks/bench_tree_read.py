"""Benchmark: write and read + validate a ~1e6-node forest in bhgrow's HDF5 layout.

Prints nodes per second and peak memory per node for (a) writing (:func:`write_hdf5`) and
(b) reading + validating + indexing (:func:`load_forest`). Each timed call runs in a forked
child process (Linux) so its memory is measured from the same starting point: the growth of
the resident set during the call (``VmHWM`` after a reset, minus ``VmRSS`` at the start), and
with ``--traced`` also the ``tracemalloc`` peak in a separate untimed run. The forest's own
arrays are printed as B/node for comparison (what a loaded forest must hold at least).
Target (issue "Foundation"): read + validate of 1e6 nodes under 5 s on one core.

The defaults (2100 toy forests of 1e10-1e14 Msun, 40 snapshots) give ~1.3e6 nodes.

    python benchmarks/bench_tree_read.py [--forests 2100] [--snaps 40] [--repeat 3] [--traced]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from _measure import best_of, load_note, measure  # noqa: E402

from bhgrow.trees import load_forest, write_hdf5  # noqa: E402
from bhgrow.trees.toy import toy_forest  # noqa: E402


def forest_bytes(forest) -> int:
    arrays = [a for a in vars(forest).values() if isinstance(a, np.ndarray)]
    return int(sum(a.nbytes for a in arrays + list(forest.extra.values())))


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--forests", type=int, default=2100, help="number of toy forests")
    ap.add_argument("--snaps", type=int, default=40, help="number of snapshots")
    ap.add_argument("--repeat", type=int, default=3, help="timed reads (best kept)")
    ap.add_argument("--traced", action="store_true",
                    help="also measure the tracemalloc peak (one extra untimed run each)")
    args = ap.parse_args()
    t0 = time.perf_counter()
    forest = toy_forest(args.forests, seed=1, n_snap=args.snaps, box_mpc=100.0)
    t_build = time.perf_counter() - t0
    n = forest.n_nodes
    print(f"{load_note()}")
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "bench.h5"
        write_hdf5(forest, Path(tmp) / "warm.h5")          # imports, h5py warm-up

        def write_once():
            write_hdf5(forest, path, overwrite=True)
            return path.stat().st_size

        def read_once():
            return load_forest(path).n_nodes

        w = best_of(write_once, 1)
        r = best_of(read_once, args.repeat)
        if args.traced:
            w["traced_peak_bytes"] = measure(write_once, traced=True)["traced_peak_bytes"]
            r["traced_peak_bytes"] = measure(read_once, traced=True)["traced_peak_bytes"]
        size = w["summary"]

    def mem(m) -> str:
        rss, tr = m["rss_peak_bytes"], m.get("traced_peak_bytes")
        out = f"peak RSS +{'-' if rss is None else f'{rss / n:,.0f}'} B/node"
        return out + (f", traced {tr / n:,.0f} B/node" if tr is not None else "")

    print(f"nodes                 {n}  (forest arrays {forest_bytes(forest) / n:.0f} B/node; "
          f"file {size / n:.0f} B/node)")
    print(f"toy build             {t_build:8.3f} s  ({n / t_build:,.0f} nodes/s)")
    print(f"write HDF5            {w['wall_s']:8.3f} s  ({n / w['wall_s']:,.0f} nodes/s)  "
          f"{mem(w)}")
    print(f"read+validate+index   {r['wall_s']:8.3f} s  ({n / r['wall_s']:,.0f} nodes/s)  "
          f"{mem(r)}  [best of {args.repeat}]")
    per_1e6 = r["wall_s"] * 1e6 / n
    print(f"=> {per_1e6:.2f} s per 1e6 nodes (target < 5 s)")
    return 0 if per_1e6 < 5 else 1


if __name__ == "__main__":
    sys.exit(main())
