"""Chunk planning, worker processes, Dask, checkpoint and resume (bhgrow/parallel.py).

Every run here must give the same black holes, mergers, pending pairs and histories, bit for
bit, whatever the chunk plan, worker count or backend: random draws are keyed by (seed,
node / black-hole id) and substeps are chosen per halo, and the merged tables are sorted by
id and time. Runs use ``max_substeps = 4`` to stay fast; the property does not depend on it.
"""

from __future__ import annotations

import json
import os
import signal
import sys
import time
from functools import partial
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from run_compare import assert_same

from bhgrow import engine
from bhgrow.cli import main
from bhgrow.config import from_table
from bhgrow.errors import BhgrowInputError
from bhgrow.parallel import Checkpoint, plan_chunks
from bhgrow.pipeline import demo_trees_path, run_model
from bhgrow.trees import load_forest, write_hdf5

FAST = {"max_substeps": 4}


@pytest.fixture(scope="module")
def sub():
    f = load_forest(demo_trees_path())
    return f.select_forests(f.forest_ids[::20])


@pytest.fixture(scope="module")
def reference(sub):
    """One chunk, this process."""
    r = run_model(sub, from_table({"run": {**FAST, "chunk_nodes": 10**9}}), workers=1)
    assert r.provenance["n_chunks"] == 1
    return r


# ------------------------------------------------------------------ planning
def test_plan_giant_forest_alone_and_first():
    cost = np.array([5, 3, 1000, 4, 2, 6, 1, 7])
    plan = plan_chunks(cost, max_nodes=20, n_workers=1, forest_ids=np.arange(8) + 100)
    assert [c.tolist() for c in plan[:1]] == [[102]]
    loads = [int(cost[c - 100].sum()) for c in plan]
    assert loads == sorted(loads, reverse=True)
    assert all(load <= 20 for load in loads[1:])
    assert sorted(np.concatenate(plan).tolist()) == list(range(100, 108))


def test_plan_one_chunk_per_worker_when_everything_fits():
    cost = np.arange(1, 41)
    assert len(plan_chunks(cost, 10**6, 1)) == 1
    plan = plan_chunks(cost, 10**6, 4)
    loads = sorted(int(cost[c].sum()) for c in plan)
    assert len(plan) == 4
    # longest-processing-time bound (Graham 1969): max load <= mean + largest job
    assert loads[-1] <= cost.sum() / 4 + cost.max()
    assert loads[-1] - loads[0] <= cost.max()


def test_plan_chunk_count_is_a_multiple_of_the_workers():
    # ten equal forests, at most 40 nodes a chunk: 3 chunks would leave one of two workers
    # idle for the third; the plan makes 4 of equal load instead (one worker: 3)
    cost = np.full(10, 10)
    assert len(plan_chunks(cost, 40, 1)) == 3
    plan = plan_chunks(cost, 40, 2)
    loads = [int(cost[c].sum()) for c in plan]
    assert len(plan) == 4 and max(loads) - min(loads) <= 10 and max(loads) <= 40
    assert len(plan_chunks(cost, 40, 3)) == 3                  # already a multiple


@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(0, 500), min_size=1, max_size=80), st.integers(1, 900),
       st.integers(1, 6))
def test_plan_properties(costs, max_nodes, n_workers):
    cost = np.array(costs)
    ids = np.arange(cost.size) * 7 + 3
    plan = plan_chunks(cost, max_nodes, n_workers, forest_ids=ids)
    again = plan_chunks(cost, max_nodes, n_workers, forest_ids=ids)
    assert len(again) == len(plan) and all(np.array_equal(a, b) for a, b in zip(plan, again))
    flat = np.concatenate(plan)
    assert np.array_equal(np.sort(flat), ids)                 # every forest exactly once
    pos = {int(f): i for i, f in enumerate(ids)}
    loads = [int(sum(cost[pos[int(f)]] for f in c)) for c in plan]
    assert loads == sorted(loads, reverse=True)               # largest first
    for c, load in zip(plan, loads):
        assert np.all(np.diff(c) > 0)
        assert load <= max_nodes or c.size == 1               # only a giant exceeds the cap


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 500), st.floats(0.01, 100.0)), min_size=1,
                max_size=80), st.integers(1, 900), st.integers(1, 6), st.booleans())
def test_weighted_plan_properties(forests, max_nodes, n_workers, contiguous):
    nodes = np.array([f[0] for f in forests])
    w = np.array([f[1] for f in forests])
    plan = plan_chunks(nodes, max_nodes, n_workers, weights=w, contiguous=contiguous)
    assert np.array_equal(np.sort(np.concatenate(plan)), np.arange(nodes.size))
    loads = [float((nodes[c] * w[c]).sum()) for c in plan]
    assert loads == sorted(loads, reverse=True)               # largest first
    for c in plan:
        assert nodes[c].sum() <= max_nodes or c.size == 1     # only a giant exceeds the cap


def test_plan_rejects_bad_arguments():
    with pytest.raises(BhgrowInputError):
        plan_chunks([1, 2], 0)
    with pytest.raises(BhgrowInputError):
        plan_chunks([1, 2], 10, n_workers=0)
    with pytest.raises(BhgrowInputError):
        plan_chunks([1, 2], 10, forest_ids=[1])
    assert plan_chunks([], 10) == []


def test_plan_weights_balance_cost_and_cap_nodes():
    # forests 0-9 cost 4x per node what forests 10-19 do: a node-count plan gives one
    # chunk all the dear forests; the weighted plan balances the cost, and max_nodes
    # still caps the nodes of every chunk
    nodes = np.full(20, 100)
    w = np.r_[np.full(10, 4.0), np.ones(10)]
    for contiguous in (False, True):
        plan = plan_chunks(nodes, 1500, 2, weights=w, contiguous=contiguous)
        cost = [float((nodes[c] * w[c]).sum()) for c in plan]
        assert len(plan) == 2 and np.array_equal(np.sort(np.concatenate(plan)),
                                                 np.arange(20))
        # list-scheduling bound (Graham 1969): max load <= mean + largest job
        assert max(cost) <= sum(cost) / 2 + 400
        assert all(nodes[c].sum() <= 1500 for c in plan)
        tight = plan_chunks(nodes, 1000, 2, weights=w, contiguous=contiguous)
        assert all(nodes[c].sum() <= 1000 for c in tight)
        naive = plan_chunks(nodes, 1000, 2, contiguous=True)
        assert max(float((nodes[c] * w[c]).sum()) for c in naive) == 4000   # all dear ones
    # unit weights give the node-count plan; n_chunks sets the count
    assert all(np.array_equal(a, b) for a, b in zip(plan_chunks(nodes, 1000, 2),
                                                    plan_chunks(nodes, 1000, 2,
                                                                weights=np.ones(20))))
    assert len(plan_chunks(nodes, 1000, 2, n_chunks=6)) == 6
    with pytest.raises(BhgrowInputError, match="weights"):
        plan_chunks(nodes, 1000, 2, weights=np.zeros(20))
    with pytest.raises(BhgrowInputError, match="n_chunks"):
        plan_chunks(nodes, 1000, 2, n_chunks=0)


def _refiner(nodes):
    from bhgrow.parallel import CostRefiner

    ids = np.arange(nodes.size)

    def planner(sel, weights_of=None, n_chunks=None):
        return plan_chunks(nodes[sel], 10**9, 2, forest_ids=sel,
                           weights=None if weights_of is None else weights_of(sel),
                           n_chunks=n_chunks)

    return CostRefiner(lambda sel: nodes[np.asarray(sel)], planner), ids


def test_cost_refiner_recovers_rates_of_a_consistent_system():
    # closed-form check: chunk times made exactly from two class rates (forests of 10 and
    # of 1500 nodes: size classes 3 and 10); with chunks of independent composition the
    # non-negative least-squares fit is the exact solution
    nodes = np.r_[np.full(30, 10), np.full(6, 1500)]
    ref, _ = _refiner(nodes)
    rate = {3: 2.0e-6, 10: 5.0e-7}
    for chunk in ([0, 1, 2, 30], [3, 4, 31, 32, 33], list(range(5, 25)) + [34],
                  list(range(25, 30))):
        n = nodes[chunk]
        t = sum(rate[int(k)] * m for k, m in zip(ref.size_class(n), n))
        ref.add(chunk, t)
    r = ref.rates()
    assert r[3] == pytest.approx(2.0e-6, rel=1e-3) and r[10] == pytest.approx(5.0e-7,
                                                                               rel=1e-3)
    w = ref.weights([0, 35])
    assert w[0] / w[1] == pytest.approx(4.0, rel=1e-3)


def test_cost_refiner_one_chunk_keeps_the_node_count_plan():
    nodes = np.r_[np.full(30, 10), np.full(6, 1500)]
    ref, ids = _refiner(nodes)
    assert ref.rates() is None and np.all(ref.weights(ids) == 1.0)
    ref.add([0, 1, 30], 0.01)
    assert np.allclose(ref.rates(), 0.01 / 1520)              # the mean rate everywhere
    plan = plan_chunks(nodes, 10**9, 2, n_chunks=4)
    again = [c.copy() for c in plan]
    assert ref.replan(again, [0, 1, 2, 3])
    assert all(np.array_equal(a, b) for a, b in zip(plan, again))


def test_cost_refiner_replan_schedule_and_invariants():
    nodes = np.r_[np.full(40, 10), np.full(8, 1500)]
    ref, ids = _refiner(nodes)
    plan = plan_chunks(nodes, 10**9, 2, n_chunks=8)
    assert not ref.replan(plan, [2, 3, 4])                    # nothing measured yet
    ref.add(plan[0], 1e-3)
    ref.add(plan[1], 5e-3)
    assert ref.replan(plan, [2, 3, 4])
    assert not ref.replan(plan, [2, 3, 4])                    # no new measurement
    ref.add(plan[2], 1e-3)
    assert not ref.replan(plan, [3, 4])                       # 3 measured: not doubled
    ref.add(plan[3], 1e-3)
    assert not ref.replan(plan, [4])                          # one chunk left
    assert ref.replan(plan, [4, 5])
    assert ref.n_replans == 2
    assert np.array_equal(np.sort(np.concatenate(plan)), ids)  # every forest once
    assert len(plan) == 8


# ------------------------------------------------------------------ local workers
def test_workers_and_chunking_do_not_change_results(sub, reference):
    cfg = from_table({"run": {**FAST, "chunk_nodes": 6000}})
    one = run_model(sub, cfg, workers=1)
    two = run_model(sub, cfg, workers=2)
    assert one.provenance["n_chunks"] > 2 and one.provenance["backend"] == "serial"
    assert two.provenance["backend"] == "processes" and two.provenance["workers"] == 2
    assert_same(reference, one)
    assert_same(reference, two)
    # the config key does the same as the argument
    three = run_model(sub, from_table({"run": {**FAST, "chunk_nodes": 10**9, "workers": 2}}))
    assert three.provenance["n_chunks"] == 2
    assert_same(reference, three)


def test_lisa_snr_made_with_the_chunks_equals_one_call_on_the_catalogue(reference):
    # each chunk adds its mergers' SNRs where it ran; the catalogue's column is what one
    # call on the whole catalogue gives, bit for bit (and, by the test above, for any plan)
    from bhgrow.cosmology import Cosmology
    from bhgrow.products import merger_snr

    cfg = from_table({"run": FAST})
    m = reference.mergers
    assert len(m) > 10 and m.colnames[-1] == "lisa_snr"
    whole = merger_snr(m, Cosmology.from_name(cfg.run.cosmology), cfg.gw)
    np.testing.assert_array_equal(np.asarray(m["lisa_snr"]), whole)
    assert np.all(np.isfinite(whole)) and np.any(whole > 0)


def test_histories_of_several_chunks_are_kept_on_disk(sub, reference, tmp_path):
    # each chunk's histories go to disk when it is done (beside the run's checkpoint); the
    # run directory's histories file equals a one-chunk run's, and the result still reads
    # them after the figures were drawn in a forked process and the checkpoint removed
    import gc

    import h5py

    from bhgrow.output import HistoryStore
    from bhgrow.pipeline import run

    from bhgrow import pipeline

    # who writes the histories file: one forked process, not this one (a file per call,
    # as a forked process's memory is its own)
    real, parent = pipeline.write_histories, os.getpid()
    calls = tmp_path / "calls"
    calls.mkdir()

    def recorded(cols, path, **kw):
        (calls / str(os.getpid())).touch()
        return real(cols, path, **kw)

    pipeline.write_histories = recorded
    try:
        many = run(from_table({"run": {**FAST, "chunk_nodes": 6000}}), trees=sub,
                   out=tmp_path / "many", workers=2)
    finally:
        pipeline.write_histories = real
    writers = [int(p.name) for p in calls.iterdir()]
    assert len(writers) == 1 and writers[0] != parent
    store = many.histories
    assert isinstance(store, HistoryStore) and many.provenance["n_chunks"] > 2
    assert store.directory.parent == tmp_path
    assert store.directory.name.startswith(".many.partial-histories-")
    assert not (tmp_path / "many.partial").exists()
    # the histories file was written by a forked process while the catalogues were merged
    # (histories_early) and moved into place: its scratch directory is gone
    assert not list(tmp_path.glob(".many.partial-histories-file-*"))
    assert many.histories_early is None
    assert_same(reference, many)
    one = run(from_table({"run": {**FAST, "chunk_nodes": 10**9}}), trees=sub,
              out=tmp_path / "one", workers=1)
    assert isinstance(one.histories, dict)
    with h5py.File(tmp_path / "one" / "histories.h5") as a, \
            h5py.File(tmp_path / "many" / "histories.h5") as b:
        for name in ("index/bh_id", "index/offset", *one.histories):
            assert a[name].dtype == b[name].dtype, name
            assert a[name][()].tobytes() == b[name][()].tobytes(), name
    # the tables read only the rows of the snapshots they use from the store: the same
    # files as from the columns in memory
    names = sorted(p.name for p in (tmp_path / "one" / "tables").iterdir())
    assert {"bh_mass_function.ecsv", "eddington_ratio_distribution.ecsv"} <= set(names)
    for name in [f"tables/{n}" for n in names] + ["summary.json"]:
        assert (tmp_path / "one" / name).read_bytes() == \
            (tmp_path / "many" / name).read_bytes(), name
    directory = store.directory
    del many, store
    gc.collect()
    assert not directory.exists()


def _histories_bytes(path):
    import h5py

    with h5py.File(path) as h5:
        out = {}
        h5.visititems(lambda name, obj: out.__setitem__(name, obj[()].tobytes())
                      if hasattr(obj, "dtype") else None)
    return out


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="fork start method")
def test_histories_file_from_a_failed_forked_writer_is_written_here(sub, tmp_path,
                                                                    monkeypatch, capfd):
    # the forked process writing the histories early fails (as on a full disk): this
    # process writes the file itself, the same file, with nothing printed and nothing left
    from bhgrow import pipeline
    from bhgrow.pipeline import run

    cfg = from_table({"run": {**FAST, "chunk_nodes": 6000}})
    run(cfg, trees=sub, out=tmp_path / "good", workers=2)
    real, parent = pipeline.write_histories, os.getpid()
    writers = []

    def fails_in_a_child(cols, path, **kw):
        if os.getpid() != parent:
            Path(path).write_bytes(b"half a file")      # then the disk is full
            raise OSError(28, "No space left on device")
        writers.append(path)
        return real(cols, path, **kw)

    monkeypatch.setattr(pipeline, "write_histories", fails_in_a_child)
    capfd.readouterr()
    res = run(cfg, trees=sub, out=tmp_path / "bad", workers=2)
    assert res.provenance["n_chunks"] > 2 and len(writers) == 1    # written here, once
    assert capfd.readouterr().err == ""
    assert _histories_bytes(tmp_path / "bad" / "histories.h5") == \
        _histories_bytes(tmp_path / "good" / "histories.h5")
    assert not list(tmp_path.glob(".bad.partial-histories-file-*"))


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="fork start method")
def test_early_histories_writer_stopped_when_the_run_fails(sub, tmp_path, monkeypatch):
    # the merge after the chunks fails: the forked writer is stopped and its scratch
    # directory removed; a result never written leaves nothing behind either
    import gc
    import multiprocessing as mp

    from bhgrow import pipeline

    cfg = from_table({"run": {**FAST, "chunk_nodes": 6000}})
    d = tmp_path / "run.partial"

    def broken(*a, **k):
        raise RuntimeError("merge failed")

    started = []
    real_start = pipeline._EarlyHistories.start

    def start(*a):
        started.append(real_start(*a))          # held here: no finalizer can do the work
        return started[-1]

    monkeypatch.setattr(pipeline._EarlyHistories, "start", start)
    monkeypatch.setattr(pipeline, "_merger_table", broken)
    with pytest.raises(RuntimeError, match="merge failed"):
        run_model(sub, cfg, workers=2, checkpoint_dir=d, histories_early=True)
    assert len(started) == 1 and not started[0].job._proc.is_alive()
    assert not list(tmp_path.glob(".run.partial-histories-file-*"))
    assert not mp.active_children()
    monkeypatch.undo()
    res = run_model(sub, cfg, workers=2, checkpoint_dir=tmp_path / "again.partial",
                    histories_early=True)
    assert res.histories_early is not None
    assert len(list(tmp_path.glob(".again.partial-histories-file-*"))) == 1
    del res
    gc.collect()
    assert not list(tmp_path.glob(".again.partial-histories-file-*"))
    assert not mp.active_children()


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="fork start method")
def test_histories_written_here_where_no_process_can_be_forked(sub, tmp_path, monkeypatch):
    # the early writer is a speed-up only: a failed fork (out of memory, process limit)
    # leaves the histories to write_run, with nothing left behind
    from bhgrow import parallel
    from bhgrow.pipeline import run

    def no_fork(self, fn):
        raise OSError(12, "Cannot allocate memory")

    monkeypatch.setattr(parallel.ForkedJob, "__init__", no_fork)
    cfg = from_table({"run": {**FAST, "chunk_nodes": 6000}})
    res = run(cfg, trees=sub, out=tmp_path / "out", workers=2)
    assert res.provenance["n_chunks"] > 2 and (tmp_path / "out" / "histories.h5").is_file()
    assert not list(tmp_path.glob(".out.partial-histories-file-*"))


def _job_then_wait(pidfile):
    from bhgrow.parallel import ForkedJob

    job = ForkedJob(partial(time.sleep, 60))
    pidfile.write_text(str(job._proc.pid))
    time.sleep(60)


def _gone(pid: int) -> bool:
    try:
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] in "ZX"    # a zombie is gone
    except OSError:
        return True


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="fork start method")
def test_forked_job_exits_when_its_parent_is_killed(tmp_path):
    import multiprocessing as mp

    pidfile = tmp_path / "job.pid"
    parent = mp.get_context("fork").Process(target=_job_then_wait, args=(pidfile,))
    parent.start()
    for _ in range(200):
        if pidfile.exists() and pidfile.read_text():
            break
        time.sleep(0.05)
    job = int(pidfile.read_text())
    os.kill(parent.pid, signal.SIGKILL)
    parent.join()
    for _ in range(100):
        if _gone(job):
            break
        time.sleep(0.1)
    assert _gone(job)


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="fork start method")
def test_forked_job_reports_success_failure_and_stops(tmp_path, capfd):
    from bhgrow.parallel import ForkedJob

    mark = tmp_path / "done"
    assert ForkedJob(mark.touch).wait() and mark.exists()

    def fail():
        raise ValueError("no")

    assert not ForkedJob(fail).wait()
    assert capfd.readouterr().err == ""         # no traceback from the forked process
    slow = ForkedJob(lambda: time.sleep(60))
    t0 = time.perf_counter()
    slow.cancel()
    assert time.perf_counter() - t0 < 10 and not slow.wait()


def test_worker_chunks_saved_by_the_workers_are_complete(sub, reference, tmp_path):
    # with a checkpoint, each pool process writes the chunks it ran and this process reads
    # them back: every chunk file is there, and the merged results are the same
    cfg = from_table({"run": {**FAST, "chunk_nodes": 6000}})
    d = tmp_path / "run.partial"
    two = run_model(sub, cfg, workers=2, checkpoint_dir=d)
    assert_same(reference, two)
    manifest = json.loads((d / "manifest.json").read_text())
    assert len(list((d / "chunks").glob("chunk-*.pkl"))) == manifest["n_chunks"] > 2
    assert not list((d / "chunks").glob(".*"))                # no temporary files left


def test_chunk_file_takes_its_name_only_once_flushed(tmp_path, monkeypatch):
    # a chunk file is written whole under a hidden name and renamed to its chunk name only
    # after its fsync (on a background thread, so the next chunk need not wait for the
    # disk); meanwhile it can be read back by its writer's pid; once the flushes are
    # waited for, it is in place and the thread is gone (none alive to a fork)
    import threading

    from bhgrow import parallel as par

    flushed = []
    gate = threading.Event()

    def slow_fsync(fd):
        gate.wait(10)
        flushed.append(os.readlink(f"/proc/self/fd/{fd}") if sys.platform == "linux" else fd)

    monkeypatch.setattr(par.os, "fsync", slow_fsync)
    ck = Checkpoint(tmp_path, [np.array([5, 7])] * 4, {})
    (tmp_path / "chunks").mkdir()
    result = {"x": np.arange(10**6)}
    ck.save(3, result)
    path = ck.chunk_path(3)
    assert not flushed and not path.exists()                 # not flushed, not in place
    got = ck.load(3, os.getpid())                            # ... but whole
    np.testing.assert_array_equal(got["x"], result["x"])
    gate.set()
    assert par._disk_flush().wait() == 0
    assert len(flushed) == 1 and path.exists()
    assert not list((tmp_path / "chunks").glob(".*"))        # the hidden file renamed
    if sys.platform == "linux":
        assert flushed[0].endswith(f".chunk-00003.pkl.tmp-{os.getpid()}")
    np.testing.assert_array_equal(ck.load(3, os.getpid())["x"], result["x"])
    assert not [t for t in threading.enumerate() if t.name.startswith("bhgrow-fsync")]


def test_failed_flush_leaves_the_chunk_to_run_again(tmp_path, monkeypatch, capsys):
    # a chunk file whose fsync fails never takes its chunk name (a resumed run runs the
    # chunk again); the run itself goes on, with a warning
    from bhgrow import parallel as par

    def bad_fsync(fd):
        raise OSError(5, "Input/output error")

    monkeypatch.setattr(par.os, "fsync", bad_fsync)
    ck = Checkpoint(tmp_path, [np.array([1])], {})
    (tmp_path / "chunks").mkdir()
    ck.save(0, {"x": 1})
    assert par._disk_flush().wait() == 1
    assert not ck.chunk_path(0).exists()
    assert ck.load(0, os.getpid()) == {"x": 1}               # this run can still read it


def test_full_disk_is_a_clear_error_and_leaves_no_hidden_file(tmp_path, monkeypatch):
    import pickle as pk

    from bhgrow import parallel as par

    def full(*a, **k):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(par.pickle, "dump", full)
    ck = Checkpoint(tmp_path, [np.array([1])], {})
    (tmp_path / "chunks").mkdir()
    with pytest.raises(BhgrowInputError, match="No space left on device.*--resume") as err:
        ck.save(0, {"x": 1})
    assert err.value.rule == "write_failed"
    assert not list((tmp_path / "chunks").iterdir())
    assert pk.loads(pk.dumps(err.value)).rule == "write_failed"    # travels from a worker


def test_no_flush_thread_outlives_a_run_with_a_checkpoint(sub, reference, tmp_path):
    import threading

    cfg = from_table({"run": {**FAST, "chunk_nodes": 6000}})
    run_model(sub, cfg, workers=2, checkpoint_dir=tmp_path / "run.partial")
    assert not [t for t in threading.enumerate() if t.name.startswith("bhgrow-fsync")]


def test_refined_plan_gives_the_same_results_and_a_matching_checkpoint(sub, reference,
                                                                     tmp_path):
    # with two workers the chunks not yet started are re-planned by measured time per
    # node; results stay the same, and the manifest holds the plan the chunks ran with.
    # chunk_nodes leaves the plan's 8 chunks ~20% below the node cap: a re-plan keeps the
    # chunk count (else it is dropped), which with 3000 (10 chunks at ~95% of the cap)
    # failed in about one run of three
    cfg = from_table({"run": {**FAST, "chunk_nodes": 4500}})
    d = tmp_path / "run.partial"
    two = run_model(sub, cfg, workers=2, checkpoint_dir=d)
    assert two.provenance["plan_refinements"] >= 1
    assert_same(reference, two)
    manifest = json.loads((d / "manifest.json").read_text())
    plan = [np.asarray(c, dtype=np.int64) for c in manifest["chunks"]]
    assert np.array_equal(np.sort(np.concatenate(plan)), np.sort(sub.forest_ids))
    ck = Checkpoint.open(d, plan, config_sha256=manifest["config_sha256"],
                         trees_sha256=manifest["trees_sha256"], resume=True)
    assert ck.n_reused == len(plan)                     # every chunk file matches its entry
    assert run_model(sub, cfg, workers=1).provenance["plan_refinements"] == 0


def test_workers_option_validation(capsys):
    with pytest.raises(BhgrowInputError, match="`workers` of run must be >= 0"):
        from_table({"run": {"workers": -1}})
    assert main(["demo", "-o", "x", "--workers", "-2", "--no-progress"]) == 2
    assert "--workers" in capsys.readouterr().err


# ------------------------------------------------------------------ Dask
def test_dask_missing_says_how_to_install(sub, monkeypatch):
    monkeypatch.setitem(sys.modules, "dask.distributed", None)    # import fails
    with pytest.raises(BhgrowInputError, match=r"pip install -e '\.\[dask\]'"):
        run_model(sub, from_table({"run": FAST}), dask="tcp://127.0.0.1:1")


def test_dask_local_cluster_gives_identical_results(sub, reference):
    distributed = pytest.importorskip("dask.distributed")
    cfg = from_table({"run": {**FAST, "chunk_nodes": 8000}})
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster:
        r = run_model(sub, cfg, dask=cluster.scheduler_address)
    assert r.provenance["backend"] == "dask" and r.provenance["n_chunks"] > 2
    assert_same(reference, r)


# ------------------------------------------------------------------ checkpoint and resume
@pytest.fixture(scope="module")
def small(tmp_path_factory, sub):
    """Trees file, a config with small chunks, and an uninterrupted run directory."""
    d = tmp_path_factory.mktemp("resume")
    trees = d / "trees.h5"
    write_hdf5(sub.select_forests(sub.forest_ids[::2]), trees)
    cfg = d / "c.toml"
    cfg.write_text("[run]\nmax_substeps = 4\nchunk_nodes = 3000\n")
    ref = d / "ref"
    assert main(["run", str(cfg), "--trees", str(trees), "-o", str(ref), "--no-progress"]) == 0
    n_chunks = json.loads((ref / "run.json").read_text())["n_chunks"]
    assert n_chunks >= 4
    return {"trees": trees, "cfg": cfg, "ref": ref, "n_chunks": n_chunks}


PRODUCTS = ("black_holes.ecsv", "mergers.ecsv", "pending_pairs.ecsv")


def _same_products(a, b):
    for name in PRODUCTS:
        assert (a / name).read_text() == (b / name).read_text(), name


def _counting(monkeypatch, stop_after=None):
    """Wrap engine.run_forest: count calls; raise KeyboardInterrupt after ``stop_after``."""
    real = engine.run_forest
    calls = []

    def wrapped(forest, *args):
        if stop_after is not None and len(calls) >= stop_after:
            raise KeyboardInterrupt
        calls.append(forest.n_forests)
        return real(forest, *args)

    monkeypatch.setattr(engine, "run_forest", wrapped)
    return calls


def test_interrupted_run_resumes_to_identical_products(tmp_path, small, monkeypatch, capsys):
    out = tmp_path / "run"
    partial = Checkpoint.directory_for(out)
    args = ["run", str(small["cfg"]), "--trees", str(small["trees"]), "-o", str(out),
            "--no-progress"]
    _counting(monkeypatch, stop_after=2)                      # Ctrl-C during the 3rd chunk
    assert main(args) == 130
    assert not out.exists()
    files = sorted(p.name for p in (partial / "chunks").iterdir())
    assert files == ["chunk-00000.pkl", "chunk-00001.pkl"]    # no temporary leftovers
    manifest = json.loads((partial / "manifest.json").read_text())
    assert len(manifest["chunks"]) == small["n_chunks"]
    n_total = sum(len(c) for c in manifest["chunks"])
    n_done = sum(len(c) for c in manifest["chunks"][:2])
    # a leftover checkpoint is never silently reused or overwritten
    monkeypatch.undo()
    assert main(args) == 2
    assert "--resume" in capsys.readouterr().err
    # resume: only the forests of unfinished chunks run
    calls = _counting(monkeypatch)
    assert main(args + ["--resume"]) == 0
    assert sum(calls) == n_total - n_done
    assert not partial.exists()
    _same_products(small["ref"], out)
    run = json.loads((out / "run.json").read_text())
    assert run["n_chunks_resumed"] == 2


def test_resume_with_another_chunk_size_runs_only_the_rest(tmp_path, small, monkeypatch):
    out = tmp_path / "run"
    cfg_b = tmp_path / "b.toml"
    cfg_b.write_text(small["cfg"].read_text().replace("chunk_nodes = 3000",
                                                      "chunk_nodes = 100000"))
    args = ["--trees", str(small["trees"]), "-o", str(out), "--no-progress"]
    _counting(monkeypatch, stop_after=3)
    assert main(["run", str(small["cfg"]), *args]) == 130
    manifest = json.loads((Checkpoint.directory_for(out) / "manifest.json").read_text())
    n_total = sum(len(c) for c in manifest["chunks"])
    n_done = sum(len(c) for c in manifest["chunks"][:3])
    monkeypatch.undo()
    calls = _counting(monkeypatch)
    assert main(["run", str(cfg_b), *args, "--resume"]) == 0
    assert len(calls) == 1 and sum(calls) == n_total - n_done
    _same_products(small["ref"], out)
    assert json.loads((out / "run.json").read_text())["n_chunks"] == 4


def test_resume_refuses_a_checkpoint_of_another_config(tmp_path, small, monkeypatch, capsys):
    out = tmp_path / "run"
    args = ["--trees", str(small["trees"]), "-o", str(out), "--no-progress"]
    _counting(monkeypatch, stop_after=1)
    assert main(["run", str(small["cfg"]), *args]) == 130
    monkeypatch.undo()
    other = tmp_path / "other.toml"
    other.write_text(small["cfg"].read_text() + "seed = 7\n")
    assert main(["run", str(other), *args, "--resume"]) == 2
    assert "different config" in capsys.readouterr().err
    # --overwrite (without --resume) discards it and starts afresh; the worker count and
    # backend are not part of the checkpoint's identity
    calls = _counting(monkeypatch)
    assert main(["run", str(small["cfg"]), *args, "--overwrite"]) == 0
    assert len(calls) == small["n_chunks"]
    _same_products(small["ref"], out)


def test_resume_refuses_a_checkpoint_of_another_result_layout(tmp_path, small, monkeypatch,
                                                              capsys):
    # chunk results are pickled engine results: a checkpoint written with another layout
    # (an older bhgrow) must not be merged into this one's
    out = tmp_path / "run"
    args = ["run", str(small["cfg"]), "--trees", str(small["trees"]), "-o", str(out),
            "--no-progress"]
    _counting(monkeypatch, stop_after=1)
    assert main(args) == 130
    monkeypatch.undo()
    manifest = Checkpoint.directory_for(out) / "manifest.json"
    info = json.loads(manifest.read_text())
    info["schema_version"] = 1
    manifest.write_text(json.dumps(info))
    assert main(args + ["--resume"]) == 2
    err = capsys.readouterr().err
    assert "chunk-result layout (1" in err and "--overwrite" in err and "Traceback" not in err


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="fork start method")
def test_killed_worker_loses_only_chunks_in_flight(tmp_path, small, monkeypatch, capsys):
    out = tmp_path / "run"
    args = ["run", str(small["cfg"]), "--trees", str(small["trees"]), "-o", str(out),
            "--no-progress", "--workers", "2"]
    real = engine.run_forest
    parent = os.getpid()
    calls = {}

    def killer(forest, *a):
        # the forked worker dies as if killed by the OS when it starts its second chunk;
        # this process (the other worker) is slowed down so the forked one gets there, and
        # finishes the chunk it is running
        pid = os.getpid()
        calls[pid] = calls.get(pid, 0) + 1
        if pid == parent:
            time.sleep(0.5)
        elif calls[pid] == 2:
            os.kill(pid, signal.SIGKILL)
        return real(forest, *a)

    monkeypatch.setattr(engine, "run_forest", killer)          # the forked worker inherits it
    assert main(args) == 2
    err = capsys.readouterr().err
    assert "worker process died" in err and "--resume" in err
    assert not out.exists()
    kept = sorted((Checkpoint.directory_for(out) / "chunks").iterdir())
    # kept: the worker's first chunk and every chunk this process ran; lost: the one in flight
    assert calls[parent] >= 1                    # this process is one of the two workers
    assert calls[parent] + 1 <= len(kept) < small["n_chunks"]
    monkeypatch.undo()
    assert main(args + ["--resume"]) == 0
    assert not Checkpoint.directory_for(out).exists()
    _same_products(small["ref"], out)


# --------------------------------------------------------------------------- map_tasks
def _square_or_fail(bad: int, i: int):
    if i == bad:
        raise BhgrowInputError(f"task {i} refused", rule="test")
    return os.getpid(), i * i


def test_map_tasks_keeps_index_order_and_uses_both_processes():
    from functools import partial

    from bhgrow.parallel import map_tasks

    got = map_tasks(partial(_square_or_fail, -1), 40, 2, what="testing")
    assert [r[1] for r in got] == [i * i for i in range(40)]
    assert os.getpid() in {r[0] for r in got}           # this process works as one worker
    assert map_tasks(partial(_square_or_fail, -1), 3, 1, what="testing") == \
        [(os.getpid(), i * i) for i in range(3)]
    assert map_tasks(partial(_square_or_fail, -1), 0, 2, what="testing") == []


@pytest.mark.parametrize("workers", [1, 2])
def test_map_tasks_runs_meanwhile_once_in_this_process(workers):
    from functools import partial

    from bhgrow.parallel import map_tasks

    ran = []
    got = map_tasks(partial(_square_or_fail, -1), 6, workers, what="testing",
                    meanwhile=lambda: ran.append(os.getpid()))
    assert ran == [os.getpid()]
    assert [r[1] for r in got] == [i * i for i in range(6)]


def test_map_tasks_raises_a_task_error_in_this_process():
    from functools import partial

    from bhgrow.parallel import map_tasks

    with pytest.raises(BhgrowInputError, match="task 7 refused"):
        map_tasks(partial(_square_or_fail, 7), 20, 2, what="testing")


def test_run_directory_written_with_two_workers_is_the_same(reference, tmp_path,
                                                           monkeypatch):
    # two workers share the figures, the histories, the catalogues in parts of rows (here
    # of ~40 rows: several per catalogue) and the rest; no part is left behind
    from bhgrow import pipeline
    from bhgrow.pipeline import write_run

    monkeypatch.setattr(pipeline, "ECSV_PART_ROWS", 40)
    assert len(reference.black_holes) > 3 * 40 and len(reference.mergers) > 3 * 40
    cfg = from_table({"run": {**FAST, "chunk_nodes": 10**9}})
    one = write_run(reference, cfg, tmp_path / "one", workers=1)
    two = write_run(reference, cfg, tmp_path / "two", workers=2)
    files = sorted(p.relative_to(one) for p in one.rglob("*") if p.is_file())
    assert files == sorted(p.relative_to(two) for p in two.rglob("*") if p.is_file())
    assert any(f.suffix == ".png" for f in files) and len(files) > 15
    for f in files:
        a, b = (one / f).read_bytes(), (two / f).read_bytes()
        if f.name == "summary.md":              # its title names the run directory
            a, b = a.replace(b"(one)", b""), b.replace(b"(two)", b"")
        assert a == b, f
