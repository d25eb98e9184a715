"""Benchmark: a whole ``bhgrow run`` as a user starts it, with 1 and with 2 local workers.

``bench_balance.py`` times the chunk runs alone (:func:`bhgrow.parallel.run_chunks`). A user
times the command: start-up (imports), opening and checking the HDF5 forest file, the chunk
runs (each worker reads its chunks from the file and makes their mergers' LISA SNRs),
merging the chunk results into the catalogues, and writing the run directory (catalogues,
histories, tables, figures, summary). The chunk runs, the file check and the writing of the
run directory are shared among the workers; the rest runs in one process, so the speed-up
of the command is that of the shared stages diluted by the rest (Amdahl's law: with a
serial share
``s`` of the one-worker time, two workers give at most ``1 / (s + (1 - s) / 2)``).

Cases, each in a new process, alternated in ``--repeat`` rounds (the development machine's
vCPUs change speed by 10-30% over minutes, so the two worker counts are compared within a
round and the median of the per-round ratios is reported; on a virtual machine each
command's CPU time taken by the host, ``steal`` in ``/proc/stat``, is printed too, and the
median of the rounds where it stayed below 3% of the machine's CPU time for both
commands):

1. **command** -- ``bhgrow run --trees FILE -o DIR --workers N --no-progress``: wall time
   and the CPU time of the process and its children (``os.wait4``-style ``resource``
   accounting of the finished child);
2. **stages** -- the same steps through the Python API in a new process, each timed:
   imports, ``open_forests`` (reads the index and checks the whole file, while this
   process sets up the cosmology and hashes the file), ``run_model`` (chunks kept in
   ``DIR.partial`` as by the command) split into the chunk runs (with the LISA SNRs) and
   the rest (merging, catalogues; with several workers a forked process starts the
   histories file meanwhile), and ``write_run`` (catalogues, histories, tables, summary
   and figures: with several workers one task list shared by them, the catalogues in parts
   of rows) with the removal of ``DIR.partial``. The file check and the writing also use
   the workers.

The forest file: ``--trees FILE`` (a bhgrow HDF5 file), or by default the forest set of
``bench_balance.py`` built with ``--seed 11`` (17,000 toy forests + one 1e15 Msun cluster
forest: 7.8e6 nodes, the cluster forest 1.09e6 of them; ``bench_balance.py``'s own default
seed gives 8.4e6 nodes with a 1.69e6-node cluster), built once and written to a temporary
HDF5 file by this bhgrow's writer.

    python benchmarks/bench_cli.py [--trees FILE] [--repeat 3] [--workers 2]
        [--forests 17000] [--cluster-resolution 3e5]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

_STAGES = r"""
import json, sys, time
t0 = time.perf_counter()
from bhgrow import parallel, pipeline
from bhgrow.config import load_config
from bhgrow.trees.io import open_forests
t = {"imports": time.perf_counter() - t0}
trees, out, workers = sys.argv[1], sys.argv[2], int(sys.argv[3])
cfg = load_config(None)
s = time.perf_counter()
# as bhgrow.pipeline.run: the cosmology is set up and the file hashed while the other
# workers check
from bhgrow.cosmology import Cosmology
lazy = open_forests(trees, check=False)
forest = lazy.check(cfg.run.chunk_nodes, workers,
                    meanwhile=lambda: (Cosmology.from_name(cfg.run.cosmology), lazy.sha256()))
t["open_and_check"] = time.perf_counter() - s
inner = {}
def timed(name, fn):
    def wrapper(*a, **k):
        s = time.perf_counter()
        try:
            return fn(*a, **k)
        finally:
            inner[name] = inner.get(name, 0.0) + time.perf_counter() - s
    return wrapper
parallel.run_chunks = timed("chunks", parallel.run_chunks)
s = time.perf_counter()
# as bhgrow.pipeline.run: chunks kept in <out>.partial, the histories file started by a
# forked process while the catalogues are merged
import shutil
from bhgrow.parallel import Checkpoint
partial = Checkpoint.directory_for(out)
res = pipeline.run_model(forest, cfg, workers=workers, trees_path=trees,
                         checkpoint_dir=partial, histories_early=True)
t["run_model"] = time.perf_counter() - s
t["chunks"] = inner["chunks"]
t["merge_and_catalogues"] = t["run_model"] - t["chunks"]
s = time.perf_counter()
pipeline.write_run(res, cfg, out, workers=workers)
shutil.rmtree(partial, ignore_errors=True)
t["write_run"] = time.perf_counter() - s
t["total"] = time.perf_counter() - t0
print(json.dumps(t))
"""


#: a round counts as clean where the host took less than this share of the machine's CPU
#: time (steal) during both of its commands
STOLEN_CLEAN = 0.03


def build_file(args, path: Path) -> int:
    """Write the bench_balance forest set to ``path``; its node count."""
    sys.path.insert(0, str(Path(__file__).parent))
    from bench_balance import build_forest_set

    from bhgrow.trees.io import write_hdf5

    ns = argparse.Namespace(seed=args.seed, snaps=40, z_start=15.0, cluster_log_mass=15.0,
                            cluster_resolution=args.cluster_resolution, cluster_p_split=1.0,
                            box_mpc=100.0, cluster_share=0.2, forests=args.forests)
    forest, _, _ = build_forest_set(ns)
    write_hdf5(forest, path, overwrite=True)
    return forest.n_nodes


def _stolen_s() -> float:
    """CPU seconds the hypervisor has taken from this machine since boot (the ``steal``
    column of ``/proc/stat``; 0 where there is none)."""
    try:
        with open("/proc/stat") as fh:
            fields = fh.readline().split()
        return int(fields[8]) / os.sysconf("SC_CLK_TCK")
    except (OSError, IndexError, ValueError):
        return 0.0


def run_command(trees: Path, out: Path, workers: int) -> dict:
    """``bhgrow run`` in a new process: wall and CPU seconds (process + children; user and
    system apart: system time here is mostly fresh memory faulted in, user time grows where
    two processes at once run slower), and the CPU seconds the host stole from the machine
    meanwhile (a shared virtual machine)."""
    shutil.rmtree(out, ignore_errors=True)
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    stolen = _stolen_s()
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "bhgrow", "run", "--trees", str(trees),
                           "-o", str(out), "--workers", str(workers), "--no-progress"],
                          capture_output=True, text=True)
    wall = time.perf_counter() - t0
    stolen = _stolen_s() - stolen
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if proc.returncode:
        raise SystemExit(f"bhgrow run failed ({proc.returncode}):\n{proc.stderr}")
    user, sys_ = after.ru_utime - before.ru_utime, after.ru_stime - before.ru_stime
    shutil.rmtree(out, ignore_errors=True)
    return {"wall": wall, "cpu": user + sys_, "user": user, "sys": sys_, "stolen": stolen}


def run_stages(trees: Path, out: Path, workers: int) -> dict:
    shutil.rmtree(out, ignore_errors=True)
    proc = subprocess.run([sys.executable, "-c", _STAGES, str(trees), str(out), str(workers)],
                          capture_output=True, text=True)
    if proc.returncode:
        raise SystemExit(f"stage run failed ({proc.returncode}):\n{proc.stderr}")
    shutil.rmtree(out, ignore_errors=True)
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main(argv=None) -> None:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--trees", type=Path, help="bhgrow HDF5 forest file (default: build the "
                   "bench_balance forest set)")
    p.add_argument("--workers", type=int, default=2)
    p.add_argument("--repeat", type=int, default=3)
    p.add_argument("--forests", type=int, default=17000)
    p.add_argument("--cluster-resolution", type=float, default=3e5)
    p.add_argument("--seed", type=int, default=11)
    args = p.parse_args(argv)

    tmp = Path(tempfile.mkdtemp(prefix="bhgrow_bench_cli_"))
    try:
        trees = args.trees
        if trees is None:
            trees = tmp / "forests.h5"
            t = time.perf_counter()
            n = build_file(args, trees)
            print(f"forest file: {n:,} nodes written to {trees} in "
                  f"{time.perf_counter() - t:.1f} s")
        print(f"{os.cpu_count()} CPUs; load average {os.getloadavg()[0]:.2f} "
              f"(parallel timings need an otherwise idle machine)")
        w2 = args.workers
        rows = {1: [], w2: []}
        ratios, clean = [], []
        for r in range(args.repeat):
            order = (1, w2) if r % 2 == 0 else (w2, 1)
            got = {w: run_command(trees, tmp / f"run_{w}", w) for w in order}
            for w in order:
                rows[w].append(got[w])
            ratios.append(got[1]["wall"] / got[w2]["wall"])
            # share of the machine's CPU time the host took during each command
            share = [got[w]["stolen"] / (got[w]["wall"] * (os.cpu_count() or 1))
                     for w in (1, w2)]
            clean.append(max(share) < STOLEN_CLEAN)
            cpu = {w: f"{got[w]['cpu']:.2f} CPU s: {got[w]['user']:.2f} user, "
                      f"{got[w]['sys']:.2f} sys" for w in (1, w2)}
            print(f"round {r + 1}: bhgrow run, 1 worker {got[1]['wall']:.2f} s wall "
                  f"({cpu[1]}), {w2} workers {got[w2]['wall']:.2f} s wall "
                  f"({cpu[w2]}): speed-up {ratios[-1]:.2f}; host took "
                  f"{got[1]['stolen']:.1f} / {got[w2]['stolen']:.1f} CPU s", flush=True)
        med = statistics.median(ratios)
        print(f"\nbhgrow run speed-up with {w2} workers, median of {len(ratios)} rounds: "
              f"{med:.2f} (rounds {', '.join(f'{x:.2f}' for x in ratios)})")
        kept = [x for x, ok in zip(ratios, clean) if ok]
        if kept and len(kept) < len(ratios):
            print(f"median of the {len(kept)} rounds in which the host took less than "
                  f"{STOLEN_CLEAN:.0%} of the machine's CPU time during either command: "
                  f"{statistics.median(kept):.2f}")
        elif not kept:
            print(f"in every round the host took {STOLEN_CLEAN:.0%} or more of the machine's "
                  f"CPU time during a command")

        print("\nstages (Python API, new process each; seconds):")
        keys = ("imports", "open_and_check", "chunks", "merge_and_catalogues",
                "write_run", "total")
        print("| workers | " + " | ".join(keys) + " |")
        print("|---:|" + "---:|" * len(keys))
        stage = {}
        for w in (1, w2):
            stage[w] = run_stages(trees, tmp / f"stages_{w}", w)
            print(f"| {w} | " + " | ".join(f"{stage[w][k]:.2f}" for k in keys) + " |",
                  flush=True)
        s1 = stage[1]
        serial = s1["total"] - s1["chunks"]
        share = serial / s1["total"]
        print(f"\nwith 1 worker, {share:.0%} of the time is outside the chunk runs; the "
              f"chunk runs alone went {s1['chunks'] / stage[w2]['chunks']:.2f}x faster with "
              f"{w2} workers; Amdahl bound for the command if only the chunk runs were "
              f"shared, perfectly: {1.0 / (share + (1.0 - share) / w2):.2f}x")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
