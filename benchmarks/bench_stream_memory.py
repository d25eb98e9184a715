"""Benchmark: peak memory of `bhgrow run` on a large HDF5 tree file read chunk by chunk.

Writes a synthetic forest file of at least ``--nodes`` nodes (toy trees,
``bhgrow.trees.toy.toy_forest`` with 40 snapshots: ~640 nodes per forest on average, so
1e7 nodes take ~16 700 forests) into a temporary directory, then runs the command line
``python -m bhgrow run --trees FILE`` on it in a subprocess with the default chunking
(``run.chunk_nodes`` = 2e6 nodes) for each ``--workers`` value, and prints

* the peak resident memory of the run: the largest single process
  (``getrusage(RUSAGE_CHILDREN).ru_maxrss`` of a small wrapper whose only child is the
  command; with worker processes it is the largest of them or the parent) and the peak of
  the summed RSS of the command's whole process tree (sampled from /proc every 0.2 s;
  Linux only), in GB and in bytes per tree node;
* wall time and nodes per second of the whole command (check, run, products) and of the
  engine part (``run.json``).

With ``--compare-load`` it also measures reading the file whole (``load_forest``) against
opening and checking it chunk by chunk (``open_forests``), each in its own subprocess.

Target (issue "Scale"): under 1.5 GB peak for 1e7 nodes with default chunking. The engine
sets the run time; try ``--nodes 1e6`` first.

    python benchmarks/bench_stream_memory.py --nodes 1e6 --workers 1 2 --compare-load
    python benchmarks/bench_stream_memory.py --nodes 1e7 --workers 1
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

#: toy forests (40 snapshots, roots 1e10-1e14 Msun, resolution 1e7 Msun) hold ~640 nodes
#: each on average; asking for nodes / 600 forests gives at least ``nodes`` nodes
NODES_PER_FOREST_LOW = 600


def make_file(path: Path, nodes: int, seed: int = 1) -> tuple[int, int, float]:
    """Write toy forests of >= ``nodes`` nodes; (n_nodes, n_forests, seconds)."""
    from bhgrow.trees import write_hdf5
    from bhgrow.trees.toy import toy_forest

    t0 = time.perf_counter()
    n_forests = max(1, math.ceil(nodes / NODES_PER_FOREST_LOW))
    forest = toy_forest(n_forests, seed=seed, box_mpc=200.0)
    write_hdf5(forest, path)
    return forest.n_nodes, forest.n_forests, time.perf_counter() - t0


def _tree_rss_bytes(pid: int) -> int:
    """Summed VmRSS of ``pid`` and all its descendants (0 if gone)."""
    total, todo = 0, [pid]
    while todo:
        p = todo.pop()
        try:
            with open(f"/proc/{p}/status") as fh:
                for line in fh:
                    if line.startswith("VmRSS:"):
                        total += int(line.split()[1]) * 1024
                        break
            for task in os.listdir(f"/proc/{p}/task"):
                with open(f"/proc/{p}/task/{task}/children") as fh:
                    todo += [int(c) for c in fh.read().split()]
        except (OSError, ValueError):
            continue
    return total


# Runs the command as its only child and reports getrusage(RUSAGE_CHILDREN): the largest
# RSS of the command and its waited-for descendants. (A small wrapper, because a child
# started from this large process would inherit its high-water RSS across exec.)
_WRAPPER = """
import json, resource, subprocess, sys
with open(sys.argv[1], "wb") as log:
    code = subprocess.call(sys.argv[2:], stdout=log, stderr=subprocess.STDOUT)
ru = resource.getrusage(resource.RUSAGE_CHILDREN)
print(json.dumps({"exit": code, "maxrss_kb": ru.ru_maxrss}))
"""


def measure(cmd: list, log: Path) -> dict:
    """Run ``cmd``; wall time, exit code, max RSS of one process, peak summed tree RSS."""
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    peak = [0]
    stop = threading.Event()
    t0 = time.perf_counter()
    proc = subprocess.Popen([sys.executable, "-c", _WRAPPER, str(log), *cmd],
                            stdout=subprocess.PIPE, env=env)

    def sample():            # the command's process tree, without the wrapper itself
        while not stop.is_set():
            try:
                with open(f"/proc/{proc.pid}/task/{proc.pid}/children") as fh:
                    kids = [int(c) for c in fh.read().split()]
            except (OSError, ValueError):
                kids = []
            peak[0] = max(peak[0], sum(_tree_rss_bytes(k) for k in kids))
            stop.wait(0.2)

    thread = threading.Thread(target=sample, daemon=True)
    if Path("/proc").is_dir():
        thread.start()
    stdout, _ = proc.communicate()
    wall = time.perf_counter() - t0
    stop.set()
    info = json.loads(stdout.decode().strip().splitlines()[-1])
    return {"wall_s": wall, "exit": info["exit"],
            "max_rss_bytes": info["maxrss_kb"] * 1024,         # Linux: kilobytes
            "tree_rss_bytes": peak[0] or None}


def report(label: str, m: dict, n_nodes: int, extra: str = "") -> None:
    gb = 1e9
    tree = (f"{m['tree_rss_bytes'] / gb:6.2f} GB ({m['tree_rss_bytes'] / n_nodes:6.1f} B/node)"
            if m["tree_rss_bytes"] else "   n/a")
    print(f"{label:<28} exit {m['exit']}  wall {m['wall_s']:7.1f} s  "
          f"{n_nodes / m['wall_s']:9.3g} nodes/s  max RSS one process "
          f"{m['max_rss_bytes'] / gb:6.2f} GB ({m['max_rss_bytes'] / n_nodes:6.1f} B/node)  "
          f"summed tree {tree}{extra}", flush=True)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--nodes", type=float, default=1e7,
                    help="tree nodes in the synthetic file (at least; default 1e7)")
    ap.add_argument("--workers", type=int, nargs="+", default=[1],
                    help="worker counts to run with (default: 1)")
    ap.add_argument("--config", type=Path, default=None,
                    help="config TOML for the runs (default: all defaults, chunk_nodes 2e6)")
    ap.add_argument("--trees", type=Path, default=None,
                    help="use this HDF5 file instead of writing a synthetic one")
    ap.add_argument("--compare-load", action="store_true",
                    help="also measure load_forest (whole file) against open_forests")
    ap.add_argument("--no-run", action="store_true", help="skip the `bhgrow run` part")
    args = ap.parse_args()

    import h5py

    with tempfile.TemporaryDirectory(prefix="bhgrow-bench-") as tmp:
        tmp = Path(tmp)
        if args.trees is None:
            trees = tmp / "trees.h5"
            n_nodes, n_forests, t_make = make_file(trees, int(args.nodes))
            print(f"wrote {n_nodes:.4g} nodes in {n_forests} forests "
                  f"({trees.stat().st_size / 1e6:.0f} MB on disk) in {t_make:.0f} s",
                  flush=True)
        else:
            trees = args.trees
            with h5py.File(trees) as h5:
                n_nodes = int(h5["nodes/node_id"].shape[0])
            print(f"{trees}: {n_nodes:.4g} nodes", flush=True)

        if args.compare_load:
            chunk = "2_000_000"
            if args.config is not None:
                from bhgrow.config import load_config

                chunk = str(load_config(args.config).run.chunk_nodes)
            snippets = {
                "load_forest (whole file)":
                    f"from bhgrow.trees import load_forest; load_forest({str(trees)!r})",
                "open_forests + check":
                    f"from bhgrow.trees.io import open_forests; "
                    f"open_forests({str(trees)!r}, max_nodes={chunk})",
            }
            for label, code in snippets.items():
                m = measure([sys.executable, "-c", code], tmp / "load.log")
                report(label, m, n_nodes)

        if not args.no_run:
            for w in args.workers:
                out = tmp / f"run-w{w}"
                cmd = [sys.executable, "-m", "bhgrow", "run"]
                if args.config is not None:
                    cmd.append(str(args.config))
                cmd += ["--trees", str(trees), "-o", str(out), "--no-progress",
                        "--workers", str(w)]
                log = tmp / f"run-w{w}.log"
                m = measure(cmd, log)
                extra = ""
                if (out / "run.json").exists():
                    info = json.loads((out / "run.json").read_text())
                    extra = (f"  [engine {info['wall_time_s']:.1f} s, "
                             f"{info['nodes_per_s']:.3g} nodes/s, {info['n_chunks']} chunks]")
                report(f"bhgrow run --workers {w}", m, n_nodes, extra)
                if m["exit"] != 0:
                    print(log.read_text()[-2000:], file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
