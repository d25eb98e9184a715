"""Chunks of whole forests: planning, local worker processes, Dask, checkpoints.

The engine (:func:`bhgrow.engine.run_forest`) runs on any set of whole forests and its
results do not depend on which forests share a chunk (random draws are keyed by seed and
node / black-hole id; substeps are chosen per halo). A run is therefore a list of
independent chunks:

1. :func:`plan_chunks` cuts the forests into chunks by estimated cost (node count,
   optionally times a weight per node), largest first (longest-processing-time-first
   scheduling, Graham 1969, SIAM J. Appl. Math. 17, 416): a forest at least as large as
   the target chunk size runs alone, the rest are packed so chunks come out of similar
   cost, and chunks are handed out largest first so a giant forest never waits behind a
   queue of small ones. During a run with several workers, :class:`CostRefiner` refines the
   estimate by the time per node measured on the finished chunks (by forest size) and the
   chunks not yet started are re-planned with it.
2. :func:`run_chunks` runs the chunks in this process, on ``N`` local workers (this
   process and ``N - 1`` forked ones, a :class:`concurrent.futures.ProcessPoolExecutor`;
   each forked worker holds the forest once and receives only forest ids), or on a
   ``dask.distributed`` cluster (each task receives its sub-forest); results come back in
   plan order, whatever order they finish in. The trees
   are an in-memory :class:`~bhgrow.trees.forest.Forest` or a lazily read HDF5 file
   (:class:`~bhgrow.trees.io.HDF5Forests`): then each worker process opens the file itself
   and reads only the forests of its chunk, and for Dask the parent reads one chunk per
   task in flight, so memory depends on the chunk size, not on the file.
3. :class:`Checkpoint` writes every finished chunk at once and atomically into
   ``<run dir>.partial/`` (a local worker process writes the chunks it ran itself); a
   resumed run reuses the finished chunks and runs the rest, so an interrupted run loses
   at most the chunks in flight. A chunk file is written under a hidden name, flushed to
   disk on a background thread and only then renamed into place (:class:`_DiskFlush`), so
   the next chunk does not wait for the disk.

The caller (:func:`bhgrow.pipeline.run_model`) merges the chunk results and sorts every
table by id / time, so the products are the same, bit for bit, for any plan and any number
of workers.

Cost model
----------
The engine's cost is ~linear in nodes plus a fixed part per chunk (the per-snapshot
substep loop runs as often as the stiffest halo of the chunk needs), so more chunks than
workers only adds overhead: with ``n_workers`` workers and fewer than ``n_workers *
max_nodes`` nodes, the plan makes about ``n_workers`` chunks of equal node count. Node
count is the first estimate; the time per node differs by forest size (on the toy
balance set ~0.25 µs per node of a 1e6-node cluster forest against ~0.5-0.8 µs for
forests of 1e2-1e3 nodes), which :class:`CostRefiner` learns from the chunks as they
finish. A re-plan keeps the number of chunks (the fixed part stays the same).
"""

from __future__ import annotations

import hashlib
import heapq
import json
import math
import os
import pickle
import shutil
import sys
import threading
import time
from dataclasses import replace
from functools import partial
from pathlib import Path

import numpy as np

from . import __version__, engine
from ._alloc import release_free_memory
from .errors import BhgrowInputError
from .trees.forest import Forest

# run-settings keys that choose how a run executes, not what it computes (left out of the
# checkpoint's config hash, so a run may resume with another chunk size, worker count or
# backend)
EXECUTION_KEYS = ("workers", "dask_scheduler", "chunk_nodes")
CHECKPOINT_FORMAT = "bhgrow-checkpoint"
#: layout of the pickled chunk results (2: black-hole tables carry their stream keys; 3:
#: baryon totals per forest)
CHECKPOINT_SCHEMA = 3
DASK_HINT = "pip install -e '.[dask]'"


# ------------------------------------------------------------------------------------------
# planning
# ------------------------------------------------------------------------------------------
def plan_chunks(nodes_per_forest, max_nodes: int, n_workers: int = 1, *,
                forest_ids=None, contiguous: bool = False, weights=None,
                n_chunks: int | None = None) -> list:
    """Cut forests into chunks of whole forests by cost, largest chunk first.

    Parameters
    ----------
    nodes_per_forest : array_like of int
        Node count of each forest, aligned with ``forest_ids``: the cost estimate (times
        ``weights`` if given) and what ``max_nodes`` caps.
    max_nodes : int
        Largest chunk, in nodes (>= 1); a single forest above it forms a chunk of its own.
    n_workers : int
        Workers that will run the chunks in parallel (>= 1). With several, the number of
        chunks aimed at is a multiple of ``n_workers`` (at least ``total / max_nodes``) and
        the target chunk cost is the total divided by it, so every worker gets a share and
        chunks of equal cost end together.
    forest_ids : array_like of int, optional
        Forest ids; default ``0 .. n-1`` (positions).
    contiguous : bool
        Pack the forests below the target size into runs of consecutive forests in the
        order given (for a file read chunk by chunk, its row order: each chunk is then read
        from one stretch of the file), cut where the running cost passes multiples of the
        mean chunk load.
    weights : array_like of float, optional
        Cost per node of each forest (> 0; e.g. measured seconds per node,
        :class:`CostRefiner`): a forest costs ``nodes * weight``. Default: every node
        costs the same.
    n_chunks : int, optional
        Chunks to aim for, instead of the count derived from ``max_nodes`` and
        ``n_workers`` (more are made only where ``max_nodes`` forces it).

    Returns
    -------
    list of ndarray of int64
        Forest ids of each chunk (sorted within a chunk); chunks in order of decreasing
        cost (ties: smallest forest id first). Every forest appears exactly once.

    Notes
    -----
    Forests with at least the target cost (or ``max_nodes`` nodes) run alone. The others
    are taken in order of decreasing cost and each goes to the least-loaded open chunk if
    its nodes fit under ``max_nodes``, else opens a new chunk ("worst fit decreasing"; the
    list-scheduling rule of Graham 1969, SIAM J. Appl. Math. 17, 416). With ``contiguous``
    they are cut into the same number of runs instead (more if a run would exceed
    ``max_nodes``); a run exceeds the mean load by less than its largest forest, the bound
    the list rule also gives. The plan depends only on the inputs.
    """
    nodes = np.asarray(nodes_per_forest, dtype=np.int64)
    if nodes.ndim != 1:
        raise BhgrowInputError("`nodes_per_forest` of plan_chunks must be one-dimensional")
    ids = (np.arange(nodes.size, dtype=np.int64) if forest_ids is None
           else np.asarray(forest_ids, dtype=np.int64))
    if ids.shape != nodes.shape:
        raise BhgrowInputError(f"plan_chunks: {ids.size} forest ids for {nodes.size} costs")
    if isinstance(max_nodes, bool) or int(max_nodes) != max_nodes or max_nodes < 1:
        raise BhgrowInputError(f"`max_nodes` of plan_chunks must be an integer >= 1; got "
                               f"{max_nodes!r}")
    if isinstance(n_workers, bool) or int(n_workers) != n_workers or n_workers < 1:
        raise BhgrowInputError(f"`n_workers` of plan_chunks must be an integer >= 1; got "
                               f"{n_workers!r}")
    if n_chunks is not None and (isinstance(n_chunks, bool) or int(n_chunks) != n_chunks
                                 or n_chunks < 1):
        raise BhgrowInputError(f"`n_chunks` of plan_chunks must be an integer >= 1; got "
                               f"{n_chunks!r}")
    if nodes.size == 0:
        return []
    if np.any(nodes < 0):
        raise BhgrowInputError("`nodes_per_forest` of plan_chunks must be >= 0")
    if weights is None:
        cost = nodes.astype(np.float64)
    else:
        w = np.asarray(weights, dtype=np.float64)
        if w.shape != nodes.shape or not np.all(np.isfinite(w) & (w > 0)):
            raise BhgrowInputError(f"`weights` of plan_chunks must be {nodes.size} finite "
                                   f"values > 0")
        cost = nodes * w
    max_nodes = int(max_nodes)
    total_nodes = int(nodes.sum())
    total = float(cost.sum())
    if n_chunks is None:
        n_chunks = _chunk_count(total_nodes, max_nodes, int(n_workers))
    # cost at and above which a forest runs alone (for integer costs, >= total / n is
    # >= its ceiling); one chunk: only a forest holding all the cost, or above max_nodes
    target = total if n_chunks == 1 else total / n_chunks
    # largest first; equal costs in id order (deterministic)
    order = np.lexsort((ids, -cost))
    big = (nodes[order] >= max_nodes) | ((cost[order] >= target) & (cost[order] > 0))
    alone, rest = order[big], order[~big]
    chunks = [[int(i)] for i in alone]
    loads = [float(cost[i]) for i in alone]
    if rest.size and contiguous:
        for run in _contiguous_runs(cost, nodes, np.sort(rest), max_nodes,
                                    int(n_chunks) - len(alone)):
            chunks.append(run.tolist())
            loads.append(float(cost[run].sum()))
    elif rest.size:
        k = max(math.ceil(int(nodes[rest].sum()) / max_nodes), int(n_chunks) - len(alone), 1)
        k = min(k, int(rest.size))
        bins: list = [[] for _ in range(k)]
        node_load = [0] * k
        heap = [(0.0, b) for b in range(k)]        # (load, bin): least loaded, then lowest bin
        for i in rest:
            c, n = float(cost[i]), int(nodes[i])
            load, b = heap[0]
            if node_load[b] + n > max_nodes and node_load[b] > 0:   # open a new chunk
                b = len(bins)
                bins.append([])
                node_load.append(0)
                heapq.heappush(heap, (c, b))
            else:
                heapq.heapreplace(heap, (load + c, b))
            bins[b].append(int(i))
            node_load[b] += n
        final = {b: load for load, b in heap}
        for b, members in enumerate(bins):
            if members:
                chunks.append(members)
                loads.append(final[b])
    out = [np.sort(ids[np.asarray(m, dtype=np.int64)]) for m in chunks]
    rank = sorted(range(len(out)), key=lambda j: (-loads[j], int(out[j][0])))
    return [out[j] for j in rank]


def _chunk_count(total: int, max_nodes: int, n_workers: int) -> int:
    """Chunks to aim for: enough for ``max_nodes`` each, at least one per worker, and with
    several workers a multiple of their number, so that chunks of equal cost end together
    (five equal chunks on two workers leave one worker idle for the fifth)."""
    if n_workers == 1:
        return 1
    n = max(math.ceil(total / max_nodes), n_workers)
    return math.ceil(n / n_workers) * n_workers


def _contiguous_runs(cost, nodes, members, max_nodes: int, min_runs: int) -> list:
    """Cut ``members`` (positions, in order) into runs of about equal cost, none above
    ``max_nodes`` nodes (each member has fewer than ``max_nodes``)."""
    cum = np.cumsum(cost[members])
    n = nodes[members]
    k = min(max(math.ceil(int(n.sum()) / max_nodes), min_runs, 1), members.size)
    cuts = np.searchsorted(cum, np.arange(1, k) * (float(cum[-1]) / k), side="right")
    bounds = np.unique(np.r_[0, cuts, members.size])
    runs = []
    for a, b in zip(bounds[:-1], bounds[1:]):
        while b - a > 1 and int(n[a:b].sum()) > max_nodes:   # rare: split off a full run
            stop = a + max(1, int(np.searchsorted(np.cumsum(n[a:b]), max_nodes,
                                                  side="right")))
            runs.append(members[a:stop])
            a = stop
        runs.append(members[a:b])
    return runs


class CostRefiner:
    """Seconds per node by forest size, measured on the finished chunks of a run.

    Node count is only an estimate of a forest's cost: on the toy balance set a node of
    the 1e6-node cluster forest cost ~0.25 µs of engine time and a node of a 1e3-node
    forest ~0.8 µs (DEVELOPERS.md). Forests fall into size classes, one per factor of two
    in node count; every finished chunk gives one equation ``t_c = sum_k N_ck r_k`` (its
    measured seconds, :attr:`EngineResult.chunk_s`, and its nodes per class), and the
    rates ``r_k >= 0`` are the non-negative least-squares fit, found by multiplicative
    updates (ISRA, Daube-Witherspoon & Muehllehner 1986, IEEE Trans. Med. Imaging 5, 61;
    written from memory) started from the mean rate. With one chunk, or chunks of equal
    composition, every class keeps the mean rate and a plan made with these weights is the
    node-count plan.

    Parameters
    ----------
    nodes_of : callable
        ``nodes_of(forest_ids) -> node counts`` (int array, same order).
    planner : callable
        ``planner(forest_ids, weights_of, n_chunks) -> plan``: re-plans forests with
        per-forest weights ``weights_of(forest_ids)`` into ``n_chunks`` chunks
        (:func:`plan_chunks` with ``weights`` and ``n_chunks``).
    """

    N_CLASSES = 64
    N_ITER = 300

    def __init__(self, nodes_of, planner):
        self.nodes_of = nodes_of
        self.planner = planner
        self._rows: list = []
        self._seconds: list = []
        self._used = 0                 # measurements in the last re-plan
        self.n_replans = 0

    @classmethod
    def size_class(cls, nodes) -> np.ndarray:
        """Class of forests with ``nodes`` nodes: ``floor(log2(nodes))`` (0 for <= 1)."""
        n = np.maximum(np.asarray(nodes, dtype=np.float64), 1.0)
        return np.minimum(np.floor(np.log2(n)).astype(np.int64), cls.N_CLASSES - 1)

    def add(self, forest_ids, seconds: float) -> None:
        """Record a finished chunk: its forests and its measured time [s]."""
        n = np.asarray(self.nodes_of(forest_ids), dtype=np.float64)
        row = np.bincount(self.size_class(n), weights=n, minlength=self.N_CLASSES)
        if seconds > 0 and row.sum() > 0:
            self._rows.append(row)
            self._seconds.append(float(seconds))

    def rates(self) -> np.ndarray | None:
        """Seconds per node of each size class (None before any chunk is measured)."""
        if not self._rows:
            return None
        a = np.array(self._rows)
        t = np.array(self._seconds)
        mean = t.sum() / a.sum()
        r = np.full(self.N_CLASSES, mean)
        seen = a.sum(axis=0) > 0
        a = a[:, seen]
        x = r[seen].copy()
        at_t = a.T @ t
        for _ in range(self.N_ITER):
            x *= at_t / (a.T @ (a @ x))
        # a class the fit drives to zero still costs something
        r[seen] = np.maximum(x, 1e-3 * mean)
        return r

    def weights(self, forest_ids) -> np.ndarray:
        """Measured seconds per node of each forest (by its size class)."""
        r = self.rates()
        n = self.nodes_of(forest_ids)
        return np.ones(len(n)) if r is None else r[self.size_class(n)]

    def replan(self, plan: list, order: list) -> bool:
        """Re-plan the chunks ``plan[i]`` for ``i`` in ``order`` (not yet started, in
        hand-out order) by the measured costs, in place; True if anything was re-planned.

        Runs when at least two are left and the number of measured chunks has doubled
        since the last re-plan (1, 2, 4, ...: a re-plan costs about as much as the first
        plan, so a run of K chunks makes at most log2(K) + 1 of them).
        """
        if len(order) < 2 or len(self._rows) < max(1, 2 * self._used):
            return False
        self._used = len(self._rows)
        ids = np.sort(np.concatenate([plan[i] for i in order]))
        new = self.planner(ids, self.weights, len(order))
        if len(new) != len(order):       # max_nodes forced another count: keep the plan
            return False
        for i, chunk in zip(order, new):
            plan[i] = chunk
        self.n_replans += 1
        return True


def n_local_workers(workers: int) -> int:
    """Worker processes for ``workers`` (0 = one per CPU core)."""
    if workers == 0:
        return max(1, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity")
                   else (os.cpu_count() or 1))
    return int(workers)


# ------------------------------------------------------------------------------------------
# digests (what a checkpoint must match)
# ------------------------------------------------------------------------------------------
def forest_sha256(forest) -> str:
    """SHA-256 of a forest's content (node columns, snapshots, weights, box), any format.

    For a lazily read file (:class:`~bhgrow.trees.io.HDF5Forests`) it is the SHA-256 of the
    file's bytes (read in blocks), with its box, so the forest never needs to be in memory.
    """
    if not isinstance(forest, Forest):
        text = f"file:{forest.sha256()}:box_mpc:{forest.box_mpc!r}"
        return hashlib.sha256(text.encode()).hexdigest()
    h = hashlib.sha256()

    def add(name, arr):
        a = np.ascontiguousarray(arr)
        h.update(f"{name}:{a.dtype.str}:{a.shape}".encode())
        h.update(a.tobytes())

    for name in ("node_id", "desc_id", "forest_id", "snap", "mass_msun", "forest_ids"):
        add(name, getattr(forest, name))
    add("snapshots.snap", forest.snapshots.snap)
    add("snapshots.z", forest.snapshots.z)
    for name in sorted(forest.extra):
        add(f"extra.{name}", forest.extra[name])
    if forest.forest_weight is not None:
        add("forest_weight", forest.forest_weight)
    h.update(f"box_mpc:{forest.box_mpc!r}".encode())
    return h.hexdigest()


def config_sha256(config) -> str:
    """SHA-256 of the resolved config without the execution keys, plus the bhgrow version."""
    table = dict(config.table)
    table["run"] = {k: v for k, v in table.get("run", {}).items() if k not in EXECUTION_KEYS}
    text = json.dumps(table, sort_keys=True, default=str)
    return hashlib.sha256(f"bhgrow {__version__}\n{text}".encode()).hexdigest()


def code_sha256() -> str:
    """SHA-256 of bhgrow's own source files (a resumed run must run the same code)."""
    h = hashlib.sha256()
    root = Path(__file__).resolve().parent
    for path in sorted(root.rglob("*.py")):
        h.update(path.relative_to(root).as_posix().encode())
        h.update(path.read_bytes())
    return h.hexdigest()


def _ids_sha256(ids) -> str:
    return hashlib.sha256(np.ascontiguousarray(ids, dtype=np.int64).tobytes()).hexdigest()


# ------------------------------------------------------------------------------------------
# checkpoints
# ------------------------------------------------------------------------------------------
def _atomic_write(path: Path, data: bytes) -> None:
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    with open(tmp, "wb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


class _DiskFlush:
    """Flushes written chunk files to disk and renames them into place, on a background
    thread of this process.

    A chunk file is written whole under a hidden name; the thread calls ``fsync`` on it and
    only then renames it to its chunk name. So a chunk counts as finished (a resumed run
    reuses it) only once it is on disk: a killed process, Ctrl-C or a machine failure never
    leaves a partial or unflushed file under a chunk name. A flush that fails leaves the
    hidden file (not reused; the chunk runs again on resume) and is counted
    (:meth:`wait`). Measured 2026-12-03 on a 2.15e7-node file: flushing each ~60 MB chunk
    file before the next chunk took 0.1-0.2 s, 1.6 s of a 21 s run of 11 chunks. One per
    process (a forked worker makes its own: threads do not survive a fork); :meth:`wait`
    finishes what is queued and stops the thread, and :func:`_run_pool` calls it before it
    forks, so no thread of it is alive in a process that forks.
    """

    def __init__(self):
        self.pid = os.getpid()
        self.pending: list = []
        self.pool = None

    def later(self, fd: int, tmp: Path, path: Path) -> None:
        """fsync and close ``fd`` (an open descriptor of ``tmp``, owned from now on), then
        rename ``tmp`` to ``path``."""
        from concurrent.futures import ThreadPoolExecutor

        if self.pool is None:
            self.pool = ThreadPoolExecutor(1, thread_name_prefix="bhgrow-fsync")
        self.pending.append(self.pool.submit(_flush_and_rename, fd, tmp, path))

    def wait(self) -> int:
        """Finish the queued flushes and stop the thread; the number that failed."""
        if self.pool is None:
            return 0
        pending, self.pending = self.pending, []
        try:
            return sum(not f.result() for f in pending)
        finally:
            self.pool.shutdown(wait=True)
            self.pool = None


def _flush_and_rename(fd: int, tmp: Path, path: Path) -> bool:
    try:
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, path)
    except OSError:
        return False
    return True


_FLUSH: list = []


def _disk_flush() -> _DiskFlush:
    """This process's :class:`_DiskFlush`."""
    if not _FLUSH or _FLUSH[0].pid != os.getpid():
        _FLUSH[:] = [_DiskFlush()]
    return _FLUSH[0]


def _hidden_name(path: Path, pid: int) -> Path:
    """Where process ``pid`` writes ``path`` before it is flushed and renamed."""
    return path.with_name(f".{path.name}.tmp-{pid}")


def _atomic_pickle(path: Path, obj) -> None:
    """Pickle ``obj`` into ``path``: written to a hidden file (streamed, no in-memory copy
    of the pickle), then flushed to disk and renamed into place in the background
    (:class:`_DiskFlush`). A failed write removes the hidden file and raises
    :class:`~bhgrow.errors.BhgrowInputError` (a full disk is the user's to fix)."""
    tmp = _hidden_name(path, os.getpid())
    try:
        with open(tmp, "wb") as fh:
            pickle.dump(obj, fh, protocol=5)
            fh.flush()
            fd = os.dup(fh.fileno())
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise BhgrowInputError(
            f"{path.parent.parent}: could not write a finished chunk ({exc.strerror or exc}); "
            f"the chunks written so far are kept: free space and rerun with --resume",
            source=str(path), rule="write_failed") from None
    _disk_flush().later(fd, tmp, path)


class Checkpoint:
    """Finished chunks of a run, kept in ``<run dir>.partial/`` until the run is written.

    Layout: ``manifest.json`` (format, bhgrow version, SHA-256 of the config, of the trees
    and of bhgrow's source, the chunk plan as forest ids per chunk) and
    ``chunks/chunk-00012.pkl`` per finished chunk (a hash of its forest ids and its engine
    result), each written to a temporary file and renamed into place.

    Use :meth:`open`; :attr:`plan` is the plan in force (on resume: the finished chunks
    first, then the remaining forests planned afresh).
    """

    def __init__(self, directory, plan: list, digests: dict):
        self.directory = Path(directory)
        self.plan = plan
        self.digests = dict(digests)
        self.n_reused = 0
        self._finished: dict = {}

    @staticmethod
    def directory_for(out) -> Path:
        """The checkpoint directory of run directory ``out``: ``<out>.partial``."""
        out = Path(out)
        return out.with_name(f"{out.name}.partial")

    @classmethod
    def open(cls, directory, plan: list, *, config_sha256: str, trees_sha256: str,
             resume: bool = False, replan=None) -> "Checkpoint":
        """Start a checkpoint, or (``resume``) continue the one in ``directory``.

        Parameters
        ----------
        directory : path
        plan : list of ndarray
            Chunk plan of a fresh run (forest ids per chunk).
        config_sha256, trees_sha256 : str
            :func:`config_sha256` and :func:`forest_sha256` of this run.
        resume : bool
            Continue an existing checkpoint (else an existing one is refused).
        replan : callable, optional
            On resume, ``replan(forest_ids) -> plan`` for the forests not yet finished, so a
            resumed run may use another chunk size or worker count; default: keep the
            stored plan.

        Raises
        ------
        BhgrowInputError
            ``directory`` exists and ``resume`` is false; or it belongs to a run with another
            config, other trees or other bhgrow code; or its manifest is unreadable.
        """
        directory = Path(directory)
        digests = {"config_sha256": config_sha256, "trees_sha256": trees_sha256,
                   "code_sha256": code_sha256()}
        manifest = directory / "manifest.json"
        if not directory.exists():
            (directory / "chunks").mkdir(parents=True)
            ck = cls(directory, plan, digests)
            ck._write_manifest()
            return ck
        if not resume:
            raise BhgrowInputError(
                f"{directory}: checkpoint of an interrupted run exists; pass --resume to "
                f"continue it, or --overwrite to discard it", source=str(directory),
                rule="checkpoint_exists")
        try:
            info = json.loads(manifest.read_text())
            if info.get("format") != CHECKPOINT_FORMAT:
                raise ValueError("not a bhgrow checkpoint")
            old_plan = [np.asarray(c, dtype=np.int64) for c in info["chunks"]]
        except (OSError, ValueError, KeyError, TypeError) as exc:
            raise BhgrowInputError(f"{manifest}: cannot resume from it ({exc}); pass "
                                   f"--overwrite (without --resume) to start afresh",
                                   source=str(manifest), rule="bad_checkpoint") from None
        changed = [k.removesuffix("_sha256") for k, v in digests.items() if info.get(k) != v]
        if info.get("schema_version") != CHECKPOINT_SCHEMA:
            changed.insert(0, f"chunk-result layout ({info.get('schema_version')}; this bhgrow "
                              f"writes {CHECKPOINT_SCHEMA})")
        if changed:
            raise BhgrowInputError(
                f"{directory}: checkpoint made with different {' and '.join(changed)}; it "
                f"cannot be resumed — pass --overwrite (without --resume) to discard it",
                source=str(directory), rule="checkpoint_mismatch")
        ck = cls(directory, old_plan, digests)
        for p in (directory / "chunks").glob(".*"):
            p.unlink(missing_ok=True)    # never flushed and renamed: not finished chunks
        finished = ck._read_finished()
        if replan is not None:
            keep = sorted(finished)
            done_ids = (np.concatenate([old_plan[i] for i in keep]) if keep
                        else np.zeros(0, np.int64))
            rest = np.setdiff1d(np.concatenate(old_plan), done_ids)
            new_plan = [old_plan[i] for i in keep] + (list(replan(rest)) if rest.size else [])
            ck._renumber(keep, new_plan)
            finished = {j: finished[i] for j, i in enumerate(keep)}
        ck._finished = finished
        ck.n_reused = len(finished)
        return ck

    def write_plan(self) -> None:
        """Rewrite the manifest after the chunks not yet run were re-planned (a chunk file
        whose forest ids then differ from its entry is run again on resume)."""
        self._write_manifest()

    def _write_manifest(self) -> None:
        info = {"format": CHECKPOINT_FORMAT, "schema_version": CHECKPOINT_SCHEMA,
                "bhgrow_version": __version__, **self.digests, "n_chunks": len(self.plan),
                "chunks": [np.asarray(c).tolist() for c in self.plan]}
        _atomic_write(self.directory / "manifest.json", (json.dumps(info) + "\n").encode())

    def _renumber(self, keep: list, new_plan: list) -> None:
        """Move finished chunks ``keep`` (ascending) to positions 0.. of ``new_plan``.

        A crash half-way only costs work: a chunk file whose forest ids do not match the
        manifest is ignored and run again.
        """
        for j, i in enumerate(keep):            # j <= i: never overwrites a chunk still to move
            if i != j:
                os.replace(self.chunk_path(i), self.chunk_path(j))
        for p in (self.directory / "chunks").iterdir():
            stale = p.name.startswith(".") or (p.name.startswith("chunk-") and int(
                p.stem.split("-")[1]) >= len(keep))
            if stale:
                p.unlink()
        self.plan = new_plan
        self._write_manifest()

    def chunk_path(self, index: int) -> Path:
        return self.directory / "chunks" / f"chunk-{index:05d}.pkl"

    def save(self, index: int, result) -> None:
        """Write the result of chunk ``index`` (atomically)."""
        save_chunk(self.directory, index, self.plan[index], result)

    def load(self, index: int, pid: int | None = None):
        """The result of chunk ``index`` as saved (by this process or worker ``pid``: from
        its hidden file while that is being flushed, whichever name it has when opened; the
        rename is atomic, so one of the two exists)."""
        names = [self.chunk_path(index)]
        if pid is not None:
            names.insert(0, _hidden_name(names[0], pid))
        for _ in range(3):
            for name in names:
                try:
                    with open(name, "rb") as fh:
                        return pickle.load(fh)["result"]
                except FileNotFoundError:
                    continue
        raise FileNotFoundError(f"{names[-1]}: chunk file missing")

    def _read_finished(self) -> dict:
        out = {}
        for i in range(len(self.plan)):
            p = self.chunk_path(i)
            if not p.exists():
                continue
            try:
                with open(p, "rb") as fh:
                    blob = pickle.load(fh)
                if blob["forest_ids_sha256"] == _ids_sha256(self.plan[i]):
                    out[i] = blob["result"]
            except Exception:  # noqa: BLE001 - a damaged file only means: run it again
                continue
        return out

    def load_finished(self) -> dict:
        """``{index: result}`` of the intact chunk files that match the plan (read on open).

        A file that cannot be read or does not match its chunk's forest ids is ignored (the
        chunk runs again and the file is replaced).
        """
        return dict(self._finished)

    def remove(self) -> None:
        shutil.rmtree(self.directory, ignore_errors=True)


def save_chunk(directory, index: int, forest_ids, result) -> None:
    """Write chunk ``index``'s result into checkpoint ``directory`` (atomically), with the
    hash of its forest ids (a resumed run reuses it only for the same forests)."""
    blob = {"forest_ids_sha256": _ids_sha256(forest_ids), "result": result}
    _atomic_pickle(Path(directory) / "chunks" / f"chunk-{index:05d}.pkl", blob)


class _Saved:
    """What a pool worker returns for a chunk it saved in the checkpoint itself: the result
    is read back from the file instead of being pickled through a pipe as well (``pid``:
    the worker's, whose hidden file holds the chunk until its flush renames it)."""

    def __init__(self, pid: int | None = None):
        self.pid = os.getpid() if pid is None else pid


# ------------------------------------------------------------------------------------------
# running chunks
# ------------------------------------------------------------------------------------------
def compact_result(result):
    """An EngineResult fit to ship between processes and to wait for merging: no forest,
    history in one part, black holes without spare capacity."""
    cols = result.history.columns()
    history = engine.History(parts=[tuple(cols.values())])
    return replace(result, forest=None, history=history,
                   black_holes=result.black_holes.trimmed())


def _sub_forest(forest, ids):
    """The Forest of the forests ``ids``: a selection in memory, or read from the file."""
    ids = np.asarray(ids, dtype=np.int64)
    if isinstance(forest, Forest) and ids.size == forest.n_forests:
        return forest
    return forest.select_forests(ids)


def run_one_chunk(forest, ids, model, run, cosmo, finish=None):
    """Run the engine on the forests ``ids`` of ``forest`` (a Forest, or an HDF5Forests
    to read them from); a compact EngineResult, passed through ``finish(result, cosmo)``
    if given (per-chunk products made where the chunk ran, see :func:`run_chunks`)."""
    t0 = time.perf_counter()
    res = compact_result(engine.run_forest(_sub_forest(forest, ids), model, run, cosmo))
    if finish is not None:
        res = finish(res, cosmo)
    return replace(res, chunk_s=time.perf_counter() - t0)


def _plan_chunk(forest, plan, model, run, cosmo, save_dir, finish, index: int, ids=None):
    """Chunk ``index`` of ``plan`` (a task of :func:`_run_pool`; a forked worker is handed
    the chunk's current forest ``ids``, since a re-plan is not seen by its copy of
    ``plan``), saved into checkpoint directory ``save_dir`` if given (by the process that
    ran it: the workers write their chunks in parallel, not one after the other in the
    parent)."""
    ids = plan[index] if ids is None else ids
    r = run_one_chunk(forest, ids, model, run, cosmo, finish)
    if save_dir is not None:
        save_chunk(save_dir, index, ids, r)
    return r


_WORKER: dict = {}


def _as_forked_child() -> None:
    """Set-up of a forked process working for this one (pool worker, :class:`ForkedJob`)."""
    import signal

    # Ctrl-C goes to the parent, which stops the workers itself (no tracebacks from them)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    # drop the free heap inherited from the parent, so the parent's writes to it (its
    # own chunks reuse it) are not copy-on-write copies (bhgrow._alloc)
    release_free_memory()
    threading.Thread(target=_exit_with_parent, args=(os.getppid(),), daemon=True).start()


def _init_worker(task, saved: bool = False) -> None:
    _as_forked_child()
    _WORKER["task"] = task
    _WORKER["saved"] = saved


def _exit_with_parent(ppid: int) -> None:
    """A worker whose parent was killed (SIGKILL, OOM killer) exits instead of lingering."""
    while os.getppid() == ppid:
        time.sleep(1.0)
    os._exit(1)


def _worker_task(index: int, arg=None):
    r = _WORKER["task"](index) if arg is None else _WORKER["task"](index, arg)
    return index, (_Saved() if _WORKER["saved"] else r)


def _dask_chunk(index: int, sub, model, run, cosmo, finish=None):
    return index, run_one_chunk(sub, sub.forest_ids, model, run, cosmo, finish)


def default_start_method() -> str:
    """``fork`` on Linux (workers inherit the forest, nothing to import), else ``spawn``.

    A lazily read file (:class:`~bhgrow.trees.io.HDF5Forests`) holds no open HDF5 handle,
    so forked workers open the file afresh.
    """
    return "fork" if sys.platform.startswith("linux") else "spawn"


def connect_dask(address):
    """A ``dask.distributed.Client`` for a scheduler address (or the client passed in).

    Returns
    -------
    (client, owned) : the client, and whether this call opened it (then close it).
    """
    try:
        from dask.distributed import Client
    except ImportError:
        raise BhgrowInputError(f"the Dask backend needs dask.distributed, which is not "
                               f"installed: {DASK_HINT}", rule="missing_dependency") from None
    if isinstance(address, Client):
        return address, False
    try:
        return Client(str(address), timeout="20s", set_as_default=False), True
    except (OSError, TimeoutError, ValueError) as exc:
        raise BhgrowInputError(f"cannot reach the Dask scheduler at {address!r}: {exc}",
                               source=str(address), rule="dask_unreachable") from None


def dask_slots(client) -> int:
    """Worker threads of a Dask cluster (at least 1)."""
    try:
        return max(1, int(sum(client.nthreads().values())))
    except Exception:  # noqa: BLE001 - informational only
        return 1


def run_chunks(forest, plan: list, model, run, cosmo, *, workers: int = 1, client=None,
               checkpoint: Checkpoint | None = None, progress: bool = False,
               start_method: str | None = None, refiner: CostRefiner | None = None,
               on_result=None, finish=None) -> list:
    """Run every chunk of ``plan``; the EngineResults in plan order.

    Parameters
    ----------
    forest : Forest or HDF5Forests
        The trees in memory, or a file read chunk by chunk (workers open it themselves;
        with Dask the parent reads each task's chunk).
    plan : list of ndarray
        Forest ids per chunk (:func:`plan_chunks`), in the order they are handed out.
    model, run, cosmo
        As for :func:`bhgrow.engine.run_forest`.
    workers : int
        Local workers: this process and ``workers - 1`` forked ones (0 = one per CPU
        core). Ignored with ``client``.
    client : dask.distributed.Client, optional
        Send chunks to this Dask cluster.
    checkpoint : Checkpoint, optional
        Reuse its finished chunks; save each new one as soon as it is done (local workers
        save their own chunks; this process reads them back).
    progress : bool
        tqdm progress bar over chunks.
    start_method : str, optional
        multiprocessing start method for local workers (default
        :func:`default_start_method`).
    refiner : CostRefiner, optional
        With several local workers or Dask: each finished chunk's time is recorded, and
        before a chunk is handed out the chunks not yet started are re-planned by the
        measured time per node (``plan`` is changed in place, and the checkpoint's
        manifest rewritten). Results do not depend on the plan.
    on_result : callable, optional
        ``on_result(i, result) -> result`` for each chunk as it arrives (also for those
        reused from the checkpoint), in this process; what it returns is kept (the
        pipeline moves the chunk's histories to disk there).
    finish : callable, optional
        ``finish(result, cosmo) -> result``, run on each chunk's result where the chunk
        ran (in the worker; with Dask on the cluster, so it must be picklable there), before
        it is saved or sent: per-event products that depend on the event alone (the
        pipeline's LISA SNR of each merger), made in parallel.

    Returns
    -------
    list of EngineResult
        Compact results (``forest`` is None), aligned with ``plan``.

    Raises
    ------
    BhgrowInputError
        A worker process died (killed, out of memory); finished chunks stay in the
        checkpoint for ``--resume``.
    """
    from tqdm.auto import tqdm

    results: list = [None] * len(plan)
    if checkpoint is not None:
        for i, r in checkpoint.load_finished().items():
            results[i] = r if on_result is None else on_result(i, r)
    todo = [i for i in range(len(plan)) if results[i] is None]
    n_proc = min(n_local_workers(workers), len(todo))
    bars = []

    def open_bar():   # after local workers are forked (no tqdm monitor thread in them)
        if not bars:
            bars.append(tqdm(total=len(plan), initial=len(plan) - len(todo), desc="forests",
                             unit="chunk", disable=not progress or len(plan) < 2))

    def done(i, r, saved=False):
        if isinstance(r, _Saved):
            r = checkpoint.load(i, r.pid)
        elif checkpoint is not None and not saved:
            checkpoint.save(i, r)
        results[i] = r if on_result is None else on_result(i, r)
        if refiner is not None:
            refiner.add(plan[i], r.chunk_s)
        open_bar()
        bars[0].update(1)

    def refresh(order):
        """Before a hand-out: re-plan the chunks not started (``order``) by measured cost."""
        if refiner is not None and refiner.replan(plan, order) and checkpoint is not None:
            checkpoint.write_plan()

    interrupted = False
    try:
        if not todo:
            pass
        elif client is not None:
            open_bar()
            _run_dask(client, forest, plan, todo, model, run, cosmo, done, refresh, finish)
        elif n_proc <= 1:
            open_bar()
            for i in todo:
                done(i, run_one_chunk(forest, plan[i], model, run, cosmo, finish))
        else:
            kept = (f"; finished chunks are kept in {checkpoint.directory}: rerun with "
                    f"--resume" if checkpoint is not None else "")
            save_dir = checkpoint.directory if checkpoint is not None else None
            _run_pool(n_proc, partial(_plan_chunk, forest, plan, model, run, cosmo, save_dir,
                                      finish),
                      todo, partial(done, saved=save_dir is not None), open_bar,
                      start_method or default_start_method(),
                      f"running chunks of whole forests{kept}", saved=save_dir is not None,
                      refresh=refresh, payload=plan.__getitem__)
    except KeyboardInterrupt:
        interrupted = True
        raise
    finally:
        for bar in bars:
            bar.close()
        # this process's chunk files on disk and in place before it goes on (a failed
        # flush only leaves its chunk to be run again by a resumed run)
        failed = _disk_flush().wait()
        if interrupted and checkpoint is not None and progress:
            n = sum(r is not None for r in results) - failed
            print(f"bhgrow: {n} of {len(plan)} chunks kept in {checkpoint.directory}; "
                  f"continue with --resume", file=sys.stderr)
    if failed:
        print(f"bhgrow: warning: {failed} finished chunk file(s) could not be flushed to "
              f"disk in {checkpoint.directory}; a resumed run would run them again",
              file=sys.stderr)
    return results


def _terminate(pool) -> None:
    """Stop the pool's own worker processes now (their chunks are lost anyway)."""
    for p in list((getattr(pool, "_processes", None) or {}).values()):
        try:
            p.terminate()
        except Exception:  # noqa: BLE001 - already gone
            pass
    pool.shutdown(wait=False, cancel_futures=True)


def map_tasks(task, n_tasks: int, workers: int, *, what: str, done=None,
              start_method: str | None = None, meanwhile=None) -> list | None:
    """``[task(0), ..., task(n_tasks - 1)]`` on ``workers`` local workers (this process and
    ``workers - 1`` forked ones, as for the chunk runs), taken in index order.

    ``task`` must be picklable where workers are not forked (``functools.partial`` of a
    module-level function); only indices and results travel between processes. ``what``
    completes the message raised if a worker dies ("... while {what}"). With ``done``,
    ``done(i, result)`` is called in index order as results arrive (a result is held only
    until the ones before it are in) and None is returned. ``meanwhile()``, if given, runs
    in this process once the other workers have their first tasks, before this process
    takes any (work of the caller's that would otherwise wait for the tasks to end).
    """
    out: dict = {}
    nxt = [0]
    n_proc = min(n_local_workers(workers), n_tasks)

    def got(i, r):
        out[i] = r
        while done is not None and nxt[0] in out:
            done(nxt[0], out.pop(nxt[0]))
            nxt[0] += 1

    if n_proc <= 1:
        if meanwhile is not None:
            meanwhile()
        for i in range(n_tasks):
            got(i, task(i))
    else:
        _run_pool(n_proc, task, list(range(n_tasks)), got, meanwhile or (lambda: None),
                  start_method or default_start_method(), what)
    return None if done is not None else [out[i] for i in range(n_tasks)]


def run_tasks(tasks: list, workers: int, *, what: str) -> list:
    """Call each of ``tasks`` (functions of no argument) once; their results, in order.

    Where workers are forked (Linux) and ``workers`` > 1, on that many local workers
    (:func:`map_tasks`: this process and forked ones, which inherit the tasks, so closures
    are fine; only the results travel), handed out in list order, so put the largest first.
    Otherwise here, in order. ``what`` completes the message if a worker dies.
    """
    if workers > 1 and len(tasks) > 1 and default_start_method() == "fork":
        return map_tasks(lambda i: tasks[i](), len(tasks), workers, what=what)
    return [t() for t in tasks]


class ForkedJob:
    """``fn()`` in a forked process (Linux), started at once: work this process need not
    wait for, such as the pipeline's histories file, written while the catalogues are
    merged (:func:`bhgrow.pipeline.run_model`).

    The process ignores Ctrl-C (this one stops it, :meth:`cancel`), prints nothing if
    ``fn`` fails (this one redoes the work: :meth:`wait` is then False), is stopped when
    this process exits (a daemon process) and exits by itself within a second if this
    process is killed (as a pool worker does). Raises OSError if the process cannot be
    forked.
    """

    def __init__(self, fn):
        import multiprocessing as mp

        _disk_flush().wait()       # no flush thread of this process alive across the fork
        self._proc = mp.get_context("fork").Process(target=_forked_call, args=(fn,),
                                                     daemon=True)
        self._proc.start()

    def wait(self) -> bool:
        """Wait for the process; True if ``fn`` returned normally."""
        self._proc.join()
        return self._proc.exitcode == 0

    def cancel(self) -> None:
        """Stop the process (if still running) and wait for it."""
        if self._proc.is_alive():
            self._proc.terminate()
        self._proc.join()


def _forked_call(fn) -> None:
    _as_forked_child()
    try:
        fn()
    except BaseException:  # noqa: BLE001 - the parent redoes the work and reports
        os._exit(1)


def _run_pool(n_proc, task, todo, done, started, start_method, what, *,
              saved: bool = False, refresh=None, payload=None) -> None:
    """Run ``task(i)`` for ``i`` in ``todo`` on ``n_proc`` workers: ``n_proc - 1`` forked
    processes and this one; ``done(i, result)`` in this process's threads (under a lock).

    Tasks are taken in the order of ``todo`` (for chunks: largest first) from one queue by
    whichever worker is free. This process runs its tasks in place: its memory is already
    in use (no pages to fault in afresh, as a new process must for every array it writes)
    and its results need no transfer. A feeder thread hands the pool's processes their
    tasks and passes their results on as they arrive; it only waits on the pool, so it
    hardly competes with this process's work. With ``saved``, ``task`` stores its result
    itself and the pool's processes return a :class:`_Saved` marker in its place.
    ``refresh(order)``, if given, is called (under the lock) before each hand-out with the
    tasks not yet handed out, in hand-out order; a pool process then runs
    ``task(i, payload(i))``, so it gets what ``refresh`` may have changed.
    """
    import multiprocessing as mp
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
    from concurrent.futures.process import BrokenProcessPool

    n_pool = n_proc - 1
    _disk_flush().wait()       # no flush thread of this process alive across the fork
    pool = ProcessPoolExecutor(max_workers=n_pool, mp_context=mp.get_context(start_method),
                               initializer=_init_worker, initargs=(task, saved))
    queue = list(reversed(todo))              # pop() gives the largest chunk left
    lock = threading.Lock()
    stop = threading.Event()
    failure: list = []

    def take():
        with lock:
            if not queue or failure:
                return None
            if refresh is not None:
                refresh(queue[::-1])
            return queue.pop()

    def finish(i, r):
        with lock:
            done(i, r)

    def submit_more(live):
        while len(live) < n_pool and (i := take()) is not None:
            live[pool.submit(_worker_task, i, None if payload is None else payload(i))] = i

    def feed(live):
        try:
            while not stop.is_set():
                submit_more(live)
                if not live:
                    return
                finished, _ = wait(list(live), timeout=0.2, return_when=FIRST_COMPLETED)
                got = sorted(finished, key=live.get)
                for fut in got:
                    del live[fut]
                submit_more(live)      # the idle process gets work before results are handled
                for fut in got:
                    finish(*fut.result())
        except BaseException as exc:  # noqa: BLE001 - handed to the main thread
            failure.append(exc)

    try:
        # the first chunks are submitted from this thread, before it reads or runs anything:
        # the pool forks its processes then, so no other thread of this process holds a
        # lock (HDF5's, the allocator's) that the children would inherit locked
        live: dict = {}
        submit_more(live)
        feeder = threading.Thread(target=feed, args=(live,), name="bhgrow-pool-feeder",
                                  daemon=True)
        feeder.start()
        started()
        while (i := take()) is not None:
            finish(i, task(i))
        feeder.join()
        if failure:
            raise failure[0]
    except BrokenProcessPool:
        stop.set()
        _terminate(pool)
        raise BhgrowInputError(f"a worker process died (killed, or out of memory?) while "
                               f"{what}. If memory ran out, use fewer --workers or a smaller "
                               f"run.chunk_nodes", rule="worker_lost") from None
    except BaseException:
        stop.set()
        _terminate(pool)
        raise
    pool.shutdown(wait=True)


def _run_dask(client, forest, plan, todo, model, run, cosmo, done, refresh=None,
              finish=None) -> None:
    from dask.distributed import as_completed

    window = 2 * dask_slots(client)    # sub-forests in flight (bounds the parent's memory)
    queue = list(todo)
    token = hashlib.sha256(os.urandom(16)).hexdigest()[:12]

    def submit(i):
        [sub] = client.scatter([_sub_forest(forest, plan[i])], hash=False)
        return client.submit(_dask_chunk, i, sub, model, run, cosmo, finish, pure=False,
                             key=f"bhgrow-chunk-{i:05d}-{token}")

    def next_index():
        if refresh is not None:
            refresh(queue)
        return queue.pop(0)

    live = {}
    for _ in range(min(window, len(queue))):
        f = submit(next_index())
        live[f.key] = f
    ac = as_completed(list(live.values()), loop=client.loop)
    try:
        for fut in ac:
            i, r = fut.result()
            live.pop(fut.key, None)
            fut.release()
            done(i, r)
            if queue:
                nxt = submit(next_index())
                live[nxt.key] = nxt
                ac.add(nxt)
    except BaseException as exc:
        client.cancel(list(live.values()))
        if type(exc).__name__ == "KilledWorker":
            raise BhgrowInputError(f"Dask workers died (killed, or out of memory?) while "
                                   f"running a chunk: {exc}", rule="worker_lost") from None
        if isinstance(exc, ImportError) and "bhgrow" in str(exc):
            raise BhgrowInputError(f"the Dask workers cannot import bhgrow ({exc}); install "
                                   f"it on every worker (pip install -e .)",
                                   rule="dask_workers") from None
        raise
