"""Benchmark: load balance of local worker processes on a forest set with one dominant forest.

The forest set: toy forests of 1e10-1e13 Msun (:func:`bhgrow.trees.toy.toy_forest`) plus one
"cluster" forest built with a much larger root mass and a split at every step
(``--cluster-log-mass 15``, ``--cluster-p-split 1``, ``--cluster-resolution 1e6``: 8.5e5 nodes
on 40 snapshots), which alone holds ``--cluster-share`` (default 30%) of all nodes: the number
of small forests is chosen for that share (defaults: ~5100 forests, 2.9e6 nodes in all;
``--cluster-resolution 1e7`` gives 7.6e5 nodes in all, for a quick look). The cluster forest
gets the highest forest id, as a late-added forest would.

Runs, each through :func:`bhgrow.parallel.run_chunks` with the default model:

1. **1 worker** -- the plan :func:`bhgrow.parallel.plan_chunks` makes for one worker, run in
   this process: the serial wall time;
2. **2 workers, bhgrow plan** -- ``plan_chunks(..., n_workers=2)`` (cost-based, largest first),
   run twice: *static* (the plan as made, by node count) and *refined* as ``bhgrow run``
   does it (:class:`bhgrow.parallel.CostRefiner`: the chunks not yet started are re-planned
   by the time per node measured on the finished ones);
3. **2 workers, bhgrow plan with small chunks** -- ``plan_chunks`` with ``chunk_nodes`` =
   nodes / (``--fine-factor`` x workers), so chunks outnumber workers and the hand-out
   (largest first, each to the next free worker) can absorb errors of the cost estimate;
   static and refined;
4. **2 workers, naive plan** -- as many chunks as in run 2, forests dealt in id order into
   chunks of equal forest count (``numpy.array_split`` of the sorted ids).

Each plan of runs 2-4 (a refined one as it stood at the end of the run of the median
speed-up) is also run chunk after chunk in this process, and each chunk's CPU
time alone is taken (CPU time is little affected by other processes on the machine). From
those: the plan's **balance** = sum / (workers x makespan of a greedy hand-out in plan order,
each chunk to the first free worker), the plan's **engine CPU vs serial** (the engine's cost
is not additive over chunks: every chunk pays a fixed part per snapshot), and the **ideal
speed-up** = serial CPU time / that makespan -- what the plan gives on an idle machine.

For each: wall time (including the worker pool's start-up and the return of the results),
utilisation ``U = sum(busy) / (wall x workers)`` with ``busy`` = ``EngineResult.chunk_s`` of
each chunk (the whole task in its worker: selecting or reading the forests, the engine,
packing the result; starting the pool and shipping results back count as idle), and the
speed-up over run 1. Runs are interleaved: in each of ``--repeat`` rounds every 2-worker
plan runs right after a serial run of its own, and its speed-up is the median over rounds
of that serial wall time over its 2-worker wall time (the vCPUs of the development
machine change speed by 10-30% over minutes, so the best serial and best parallel runs of
a session may come from different speeds; and a forked worker's first chunk costs more
right after a serial run, so every plan gets the same position). Last, the serial and the
2-worker bhgrow plan (static, and refined as in ``bhgrow run``) run again, each in a new
process (the forest set loaded from a pickle, untimed; ``--fresh-only``: only these), as a
user's ``bhgrow run`` starts: in-process serial rounds reuse memory their earlier rounds
made, while a forked worker's first chunk must fault its memory in. The
cluster forest alone is also run (``run_forest`` on it, CPU time), to show its cost share
against its node share. Target: U >= 85% with 2 workers. Parallel timings need an otherwise idle
machine: the load average is printed first.

    python benchmarks/bench_balance.py [--cluster-share 0.3] [--cluster-log-mass 15]
        [--cluster-resolution 1e7] [--cluster-p-split 1] [--snaps 40] [--workers 2]
        [--chunk-nodes N] [--fine-factor 4] [--repeat 1]
"""

from __future__ import annotations

import argparse
import dataclasses
import heapq
import pickle
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from _measure import load_note, n_cpus  # noqa: E402

from bhgrow.config import load_config  # noqa: E402
from bhgrow.cosmology import Cosmology  # noqa: E402
from bhgrow.engine import run_forest  # noqa: E402
from bhgrow.parallel import CostRefiner, plan_chunks, run_chunks  # noqa: E402
from bhgrow.trees.forest import Forest  # noqa: E402
from bhgrow.trees.toy import toy_forest  # noqa: E402

COLUMNS = ("node_id", "desc_id", "forest_id", "snap", "mass_msun")


def build_forest_set(args):
    """Small toy forests + one cluster forest holding ~``cluster_share`` of all nodes."""
    cluster = toy_forest(1, seed=args.seed + 1, n_snap=args.snaps, z_start=args.z_start,
                         log_mass_range=(args.cluster_log_mass, args.cluster_log_mass),
                         resolution_msun=args.cluster_resolution,
                         p_split=args.cluster_p_split, box_mpc=args.box_mpc)
    n_c = cluster.n_nodes
    pilot = 300
    probe = toy_forest(pilot, seed=args.seed + 7919, n_snap=args.snaps, z_start=args.z_start,
                       log_mass_range=(10.0, 13.0), box_mpc=args.box_mpc)
    per_forest = probe.n_nodes / pilot
    share = args.cluster_share
    n_small = args.forests or max(1, round(n_c * (1.0 - share) / share / per_forest))
    small = toy_forest(n_small, seed=args.seed, n_snap=args.snaps, z_start=args.z_start,
                       log_mass_range=(10.0, 13.0), box_mpc=args.box_mpc)
    a, b = small.to_columns(), cluster.to_columns()
    offset = int(small.node_id.max()) + 1
    cols = {k: np.concatenate([a[k], b[k]]) for k in COLUMNS}
    nb = b["node_id"].size
    cols["node_id"][-nb:] += offset
    cols["desc_id"][-nb:] = np.where(b["desc_id"] >= 0, b["desc_id"] + offset, -1)
    cols["forest_id"][-nb:] = n_small                  # the highest id
    forest = Forest.from_columns(cols, small.snapshots.snap, small.snapshots.z,
                                 box_mpc=args.box_mpc, source="bench_balance")
    return forest, n_small, n_c


def greedy_makespan(times, workers: int) -> float:
    """Wall time if chunks, in plan order, each go to the first free worker."""
    free = [0.0] * workers
    for t in times:
        heapq.heapreplace(free, free[0] + t)
    return max(free)


def _chunk_nodes(forest, plan) -> list:
    nodes = forest.nodes_per_forest()
    return [int(nodes[np.searchsorted(forest.forest_ids, ids)].sum()) for ids in plan]


def refiner_for(forest, max_nodes: int, workers: int) -> CostRefiner:
    """A CostRefiner as bhgrow.pipeline.run_model makes one (forests in memory)."""
    npf = forest.nodes_per_forest()

    def nodes_of(ids):
        return npf[np.searchsorted(forest.forest_ids, ids)]

    def planner(ids, weights_of=None, n_chunks=None):
        return plan_chunks(nodes_of(ids), max_nodes, workers, forest_ids=ids,
                           weights=None if weights_of is None else weights_of(ids),
                           n_chunks=n_chunks)

    return CostRefiner(nodes_of, planner)


def run_parallel(forest, plan, cfg, cosmo, workers: int, refine_nodes: int = 0) -> dict:
    """All chunks of ``plan`` through run_chunks with ``workers`` processes; with
    ``refine_nodes`` (the plan's chunk_nodes), the chunks not yet started are re-planned by
    measured time per node as in ``bhgrow run`` (on a copy of ``plan``)."""
    plan = list(plan)
    refiner = refiner_for(forest, refine_nodes, workers) if refine_nodes else None
    t0 = time.perf_counter()
    res = run_chunks(forest, plan, cfg.model, cfg.run, cosmo, workers=workers,
                     refiner=refiner)
    wall = time.perf_counter() - t0
    busy = np.array([r.chunk_s or r.wall_s for r in res])
    return {"wall": wall, "busy": busy, "util": float(busy.sum() / (wall * workers)),
            "makespan": greedy_makespan(busy, workers),
            "n_bh": sum(len(r.black_holes) for r in res), "plan": plan,
            "replans": refiner.n_replans if refiner is not None else 0}


def run_one_by_one(forest, plan, cfg, cosmo) -> dict:
    """Each chunk alone in this process (run_chunks, one worker): wall and CPU seconds."""
    wall, cpu = [], []
    for ids in plan:
        t0, c0 = time.perf_counter(), time.process_time()
        run_chunks(forest, [ids], cfg.model, cfg.run, cosmo, workers=1)
        wall.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
    return {"wall": np.array(wall), "cpu": np.array(cpu)}


def run_fresh(path: Path, workers: int, refine: bool) -> float:
    """Wall time of run_chunks in a new Python process (as ``bhgrow run`` starts), on the
    forest set and plan pickled at ``path``, re-planned by measured time per node if
    ``refine``; loading them is not timed."""
    out = subprocess.run([sys.executable, __file__, "--child", str(path), str(workers),
                          str(int(refine))], capture_output=True, text=True, check=True)
    return float(out.stdout.split()[-1])


def child(path: str, workers: int, refine: bool) -> int:
    with open(path, "rb") as fh:
        forest, plans, cfg = pickle.load(fh)
    cosmo = Cosmology.from_name(cfg.run.cosmology)
    run_forest(toy_forest(3, seed=99, n_snap=len(forest.snapshots), box_mpc=forest.box_mpc),
               cfg.model, cfg.run, cosmo)                        # warm the lazy tables
    refiner = refiner_for(forest, cfg.run.chunk_nodes, workers) if refine else None
    t0 = time.perf_counter()
    run_chunks(forest, list(plans[workers]), cfg.model, cfg.run, cosmo, workers=workers,
               refiner=refiner)
    print(time.perf_counter() - t0)
    return 0


def main() -> int:
    if len(sys.argv) == 5 and sys.argv[1] == "--child":
        return child(sys.argv[2], int(sys.argv[3]), sys.argv[4] == "1")
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--cluster-share", type=float, default=0.3,
                    help="target fraction of all nodes in the cluster forest (0-1)")
    ap.add_argument("--cluster-log-mass", type=float, default=15.0,
                    help="log10 root mass of the cluster forest [Msun]")
    ap.add_argument("--cluster-resolution", type=float, default=1e6,
                    help="mass resolution of the cluster forest [Msun] (sets its size)")
    ap.add_argument("--cluster-p-split", type=float, default=1.0,
                    help="split probability per step of the cluster forest")
    ap.add_argument("--forests", type=int, default=None,
                    help="number of small forests (default: from --cluster-share)")
    ap.add_argument("--snaps", type=int, default=40, help="number of snapshots")
    ap.add_argument("--z-start", type=float, default=15.0, help="redshift of snapshot 0")
    ap.add_argument("--box-mpc", type=float, default=100.0, help="comoving box side [Mpc]")
    ap.add_argument("--seed", type=int, default=1, help="seed of the toy trees")
    ap.add_argument("--workers", type=int, default=2, help="worker processes")
    ap.add_argument("--chunk-nodes", type=int, default=None,
                    help="run.chunk_nodes (default: the config's)")
    ap.add_argument("--fine-factor", type=int, default=4,
                    help="also run the bhgrow plan with chunk_nodes = nodes / (this x "
                         "workers), so that chunks outnumber workers (0: skip)")
    ap.add_argument("--repeat", type=int, default=1,
                    help="parallel runs per plan (the fastest kept)")
    ap.add_argument("--fresh-only", action="store_true",
                    help="only the runs in new processes (serial, static, refined)")
    ap.add_argument("--histories", choices=("on", "off"), default="on",
                    help="per-black-hole histories (default on, as the default config)")
    args = ap.parse_args()
    if not 0 < args.cluster_share < 1:
        ap.error("--cluster-share must be in (0, 1)")

    t0 = time.perf_counter()
    forest, n_small, n_c = build_forest_set(args)
    t_build = time.perf_counter() - t0
    cfg = load_config(None)
    run = dataclasses.replace(cfg.run, histories=args.histories == "on",
                              **({"chunk_nodes": args.chunk_nodes} if args.chunk_nodes
                                 else {}))
    cfg = dataclasses.replace(cfg, run=run)
    cosmo = Cosmology.from_name(run.cosmology)
    n = forest.n_nodes
    cid = int(forest.forest_ids[-1])
    w = args.workers
    print(f"forest set: {n_small:,} toy forests of 1e10-1e13 Msun + 1 cluster forest of "
          f"1e{args.cluster_log_mass:g} Msun (resolution {args.cluster_resolution:.3g} Msun, "
          f"p_split {args.cluster_p_split:g}); {args.snaps} snapshots; {n:,} nodes, cluster "
          f"{n_c:,} = {n_c / n:.1%} (built in {t_build:.1f} s); chunk_nodes "
          f"{run.chunk_nodes:,}; {n_cpus()} CPUs; {load_note()}")
    run_forest(toy_forest(3, seed=99, n_snap=args.snaps, box_mpc=args.box_mpc), cfg.model,
               run, cosmo)                                      # warm the lazy tables

    npf = forest.nodes_per_forest()
    ids = forest.forest_ids
    plan1 = plan_chunks(npf, run.chunk_nodes, 1, forest_ids=ids)
    plan_w = plan_chunks(npf, run.chunk_nodes, w, forest_ids=ids)
    naive = [np.asarray(c, dtype=np.int64) for c in np.array_split(ids, len(plan_w))]
    # (name, plan, chunk_nodes to re-plan with by measured time per node, or 0: static)
    variants = [("bhgrow plan (plan_chunks), static", plan_w, 0),
                ("bhgrow plan, refined as in bhgrow run", plan_w, run.chunk_nodes)]
    if args.fine_factor > 0:
        fine_nodes = max(1, n // (args.fine_factor * w))
        fine = plan_chunks(npf, fine_nodes, w, forest_ids=ids)
        variants.append((f"bhgrow plan, chunk_nodes {fine_nodes:,}, static", fine, 0))
        variants.append((f"bhgrow plan, chunk_nodes {fine_nodes:,}, refined", fine,
                         fine_nodes))
    variants.append(("naive even split", naive, 0))

    reps = max(1, args.repeat)
    if not args.fresh_only:
        c0 = time.process_time()
        r_c = run_forest(forest.select_forests([cid]), cfg.model, run, cosmo)
        cpu_cluster = time.process_time() - c0
        # runs interleaved: in each repeat, every 2-worker plan runs right after a serial run of
        # its own, so a speed-up compares runs made at the same machine speed (this machine's
        # vCPU speed drifts by 10-30% over minutes) and every plan starts from the same state
        # of this process (a forked worker's first chunk is dearer right after a serial run);
        # the median over repeats is reported
        pairs = {name: [] for name, _, _ in variants}
        for _ in range(reps):
            for name, plan, refine in variants:
                one = run_parallel(forest, plan1, cfg, cosmo, 1)
                pairs[name].append((one, run_parallel(forest, plan, cfg, cosmo, w, refine)))
        serial_runs = [a for p in pairs.values() for a, _ in p]
        serial = min(serial_runs, key=lambda x: x["wall"])
        serial_cpu = run_one_by_one(forest, plan1, cfg, cosmo)["cpu"].sum()
        print(f"cluster forest alone: {cpu_cluster:.2f} CPU s = {cpu_cluster / serial_cpu:.0%} of "
              f"the serial engine's {serial_cpu:.2f} CPU s, for {n_c / n:.0%} of the nodes "
              f"({len(r_c.black_holes):,} black holes, "
              f"{len(r_c.mergers.get('z', [])):,} coalescences)")
        print(f"1 worker, {len(plan1)} chunk(s): wall {serial['wall']:.2f} s "
              f"({n / serial['wall']:,.0f} nodes/s), of which engine {serial['busy'].sum():.2f} s "
              f"and {serial['wall'] - serial['busy'].sum():.2f} s outside it (sub-forest "
              f"selection, result compaction)")

        out = {}
        for name, _, _ in variants:
            runs = [b for _, b in pairs[name]]
            ups = np.array([a["wall"] / b["wall"] for a, b in pairs[name]])
            r = runs[int(np.argsort(ups)[len(ups) // 2])]        # the run of the median speed-up
            plan = r["plan"]                    # as run (a refined plan changes during the run)
            alone = run_one_by_one(forest, plan, cfg, cosmo)
            r["speedup"], r["ups"] = float(np.median(ups)), ups
            r["chunks"] = len(plan)
            # the plan's own balance and best wall time, from each chunk's CPU time alone
            r["ideal"] = greedy_makespan(alone["cpu"], w)
            r["balance"] = float(alone["cpu"].sum() / (w * r["ideal"]))
            r["overhead"] = float(alone["cpu"].sum() / serial_cpu)
            out[name] = r
            detail = ", ".join(f"{cn / n:.0%} {b:.2f} s ({c:.2f} CPU s alone)" for cn, b, c in
                               zip(_chunk_nodes(forest, plan), r["busy"], alone["cpu"]))
            note = f" ({r['replans']} re-plans in that run)" if r["replans"] else ""
            print(f"{w} workers, {name}{note}: {len(plan)} chunks (node share, busy: "
                  f"{detail}); wall {r['wall']:.2f} s; utilisation {r['util']:.1%}; "
                  f"speed-up over the serial run just before: "
                  f"{', '.join(f'{u:.2f}' for u in ups)}, median {r['speedup']:.2f} "
                  f"(best walls: serial {serial['wall']:.2f} s, {w} workers "
                  f"{min(x['wall'] for x in runs):.2f} s). Chunks alone: "
                  f"{alone['cpu'].sum():.2f} CPU s = {r['overhead']:.2f} x the serial run; "
                  f"greedy hand-out of those gives "
                  f"{r['ideal']:.2f} s, balance {r['balance']:.0%}, ideal speed-up "
                  f"{serial_cpu / r['ideal']:.2f}", flush=True)
        if any(r["n_bh"] != serial["n_bh"] for r in out.values()):
            print("WARNING: black-hole counts differ between plans")

        print(f"\nREADME table (load balance, {n:.2e} nodes; the cluster forest holds "
              f"{n_c / n:.0%} of the nodes and costs {cpu_cluster / serial_cpu:.0%} of the "
              f"serial engine time):\n")
        print("| plan | workers | chunks | wall s | utilisation | speed-up (median) | balance "
              "of the plan | engine CPU vs serial | ideal speed-up |")
        print("|---|---:|---:|---:|---:|---:|---:|---:|---:|")
        print(f"| serial | 1 | {len(plan1)} | {serial['wall']:.2f} | "
              f"{serial['busy'].sum() / serial['wall']:.0%} | 1.00 | - | 1.00 | 1.00 |")
        for name, r in out.items():
            print(f"| {name} | {w} | {r['chunks']} | {r['wall']:.2f} | {r['util']:.0%} | "
                  f"{r['speedup']:.2f} | {r['balance']:.0%} | {r['overhead']:.2f} | "
                  f"{serial_cpu / r['ideal']:.2f} |")
        print("\n(utilisation = sum of chunk busy times / (wall x workers); balance of the plan = "
              "sum / (workers x greedy makespan) of the chunks' CPU times run one at a time (whole "
              "chunk: sub-forest selection, engine, compaction); "
              "engine CPU vs serial = those summed over the serial run's; ideal speed-up = serial "
              "CPU / that makespan)")
    # the same comparison with every run in a new process, as a user's `bhgrow run` is: the
    # in-process serial runs above reuse memory their earlier runs made (warm pages), while a
    # forked worker's first chunk must fault its memory in
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "set.pkl"
        with open(path, "wb") as fh:
            pickle.dump((forest, {1: plan1, w: plan_w}, cfg), fh, protocol=5)
        # serial, static and refined in rotating order, so none always runs first
        cases = [("serial", 1, False), ("static", w, False), ("refined", w, True)]
        fresh = []
        for i in range(reps):
            rot = cases[i % 3:] + cases[:i % 3]
            fresh.append({name: run_fresh(path, k, ref) for name, k, ref in rot})
    for name in ("static", "refined"):
        ups = [f["serial"] / f[name] for f in fresh]
        print(f"\nfresh processes, bhgrow plan {name}: serial / {w} workers per round "
              f"(rotating which runs first): "
              + ", ".join(f"{f['serial']:.2f}/{f[name]:.2f} s = {u:.2f}"
                          for f, u in zip(fresh, ups))
              + f"; median speed-up {np.median(ups):.2f}")

    for name in ("bhgrow plan (plan_chunks), static", "bhgrow plan, refined as in bhgrow run"):
        if args.fresh_only:
            break
        u = out[name]["util"]
        print(f"\nutilisation with the {name} (default chunk_nodes) {u:.1%}: "
              f"{'meets' if u >= 0.85 else 'BELOW'} the 85% target")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
