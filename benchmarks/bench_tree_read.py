"""Benchmark: read + validate a ~1e6-node forest from bhgrow's HDF5 layout.

Prints nodes per second for (a) write, (b) read + validate + index (`load_forest`).
Target (issue "Foundation"): read + validate of 1e6 nodes under 5 s on one core.

    python benchmarks/bench_tree_read.py [--forests 2100]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bhgrow.trees import load_forest, write_hdf5  # noqa: E402
from bhgrow.trees.toy import toy_forest  # noqa: E402


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--forests", type=int, default=2100)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    t0 = time.perf_counter()
    forest = toy_forest(args.forests, seed=1, n_snap=40, box_mpc=100.0)
    t_build = time.perf_counter() - t0
    n = forest.n_nodes
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "bench.h5"
        t0 = time.perf_counter()
        write_hdf5(forest, path)
        t_write = time.perf_counter() - t0
        best = float("inf")
        for _ in range(args.repeat):
            t0 = time.perf_counter()
            load_forest(path)
            best = min(best, time.perf_counter() - t0)
    print(f"nodes                 {n}")
    print(f"toy build             {t_build:8.3f} s  ({n / t_build:,.0f} nodes/s)")
    print(f"write HDF5            {t_write:8.3f} s  ({n / t_write:,.0f} nodes/s)")
    print(f"read+validate+index   {best:8.3f} s  ({n / best:,.0f} nodes/s)  [best of {args.repeat}]")
    per_1e6 = best * 1e6 / n
    print(f"=> {per_1e6:.2f} s per 1e6 nodes (target < 5 s)")
    return 0 if per_1e6 < 5 else 1


if __name__ == "__main__":
    sys.exit(main())
