"""Benchmark: Monte Carlo merger trees (Parkinson, Cole & Helly 2008) -- nodes per second.

Grows one tree per root on a grid of snapshots evenly spaced in ln(1+z) and prints the
node count, the wall time and nodes per second for the generation alone (building the
power-spectrum tables and validating into a Forest are timed separately), and the peak
memory per node of generation + validation. Generation runs in a forked child process
(Linux) after the power-spectrum tables are built: the peak is the growth of its resident
set (``VmHWM`` after a reset, minus ``VmRSS`` at the start), and with ``--traced`` also the
``tracemalloc`` peak in a separate untimed run.
Target (issue "Monte Carlo merger trees"): 1e6 tree nodes in under 60 s on one core.

The defaults (1000 roots of 1e12-1e13 Msun, resolution 5e9 Msun, 80 snapshots to z = 15)
give ~1.3e6 nodes. The node count grows roughly as root mass / resolution: with a
resolution of 1e8 Msun the same roots give ~5e7 nodes (about 50 roots make 2.4e6).

    python benchmarks/bench_tree_make.py [--roots 1000] [--resolution 5e9] [--snaps 80]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from _measure import load_note, measure  # noqa: E402

from bhgrow.cosmology import Cosmology  # noqa: E402
from bhgrow.trees.generate import PCHTreeGenerator, snapshot_grid  # noqa: E402
from bhgrow.trees.power import LinearPower  # noqa: E402


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--roots", type=int, default=1000, help="number of trees")
    ap.add_argument("--log-mass-min", type=float, default=12.0,
                    help="log10 of the smallest root mass [Msun]")
    ap.add_argument("--log-mass-max", type=float, default=13.0,
                    help="log10 of the largest root mass [Msun]")
    ap.add_argument("--resolution", type=float, default=5e9, help="mass resolution [Msun]")
    ap.add_argument("--snaps", type=int, default=80, help="number of snapshots")
    ap.add_argument("--z-start", type=float, default=15.0, help="redshift of snapshot 0")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--traced", action="store_true",
                    help="also measure the tracemalloc peak (one extra untimed run)")
    args = ap.parse_args()

    t0 = time.perf_counter()
    power = LinearPower(Cosmology())
    power.sigma(1e12)
    power.delta_c(1.0)
    t_tables = time.perf_counter() - t0

    roots = 10.0 ** np.random.default_rng(args.seed).uniform(
        args.log_mass_min, args.log_mass_max, args.roots)
    z = snapshot_grid(args.snaps, args.z_start)
    gen = PCHTreeGenerator(resolution_msun=args.resolution)

    def generate():
        t0 = time.perf_counter()
        trees = gen.grow(roots, z, power, seed=args.seed)
        t_grow = time.perf_counter() - t0
        t0 = time.perf_counter()
        forest = trees.to_forest(weight_mpc3=1.0)
        t_forest = time.perf_counter() - t0
        return {"n": trees.n_nodes, "n_forest": forest.n_nodes, "t_grow": t_grow,
                "t_forest": t_forest, "steps": trees.meta["n_steps"],
                "splits": trees.meta["n_splits"]}

    m = measure(generate)
    s = m["summary"]
    traced = measure(generate, traced=True)["traced_peak_bytes"] if args.traced else None
    n, t_grow = s["n"], s["t_grow"]
    rss = m["rss_peak_bytes"]
    print(load_note())
    print(f"roots: {args.roots} of 10^{args.log_mass_min:g}-10^{args.log_mass_max:g} Msun, "
          f"resolution {args.resolution:.3g} Msun, {args.snaps} snapshots to z = "
          f"{args.z_start:g}")
    print(f"power-spectrum tables: {t_tables:.3f} s")
    print(f"generate: {n} nodes in {t_grow:.2f} s = {n / t_grow:,.0f} nodes/s "
          f"({s['steps']} steps, {s['splits']} splits)")
    print(f"validate + index into a Forest: {s['t_forest']:.2f} s ({s['n_forest']} nodes)")
    print(f"peak memory of generate + validate: RSS +"
          f"{'-' if rss is None else f'{rss / n:,.0f}'} B/node"
          + (f", traced {traced / n:,.0f} B/node" if traced is not None else ""))
    print(f"time for 1e6 nodes at this rate: {1e6 * t_grow / n:.1f} s (target < 60 s)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
