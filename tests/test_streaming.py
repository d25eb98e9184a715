"""Lazy, chunk-by-chunk reading of HDF5 forest files (bhgrow/trees/io.py::HDF5Forests).

A run on an HDF5 file reads one chunk of whole forests at a time (in this process, in each
worker process, or in the parent for each Dask task). Checked here:

* the runs equal runs on the whole forest loaded at once (``load_forest``), bit for bit,
  with one or two workers and Dask, for files with the index of ``write_hdf5`` and for
  files in the older layout (rows in snapshot order, no index);
* a malformed file fails with the same ``BhgrowInputError`` text as ``load_forest``'s, with
  file rows, before any engine work and without output, also when the defect spans chunks;
* the reader never holds more than one chunk of rows: every read and every chunk it
  hands out is counted (no memory is measured; see benchmarks/bench_stream_memory.py).
"""

from __future__ import annotations

import json
import re

import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from run_compare import assert_same

from bhgrow import engine
from bhgrow.cli import main
from bhgrow.config import from_table
from bhgrow.errors import BhgrowInputError
from bhgrow.parallel import Checkpoint, forest_sha256
from bhgrow.pipeline import demo_trees_path, run, run_model
from bhgrow.trees import Forest, load_forest, write_hdf5
from bhgrow.trees import io as tio
from bhgrow.trees.io import HDF5Forests, open_forests

FAST = {"max_substeps": 4}


def write_old_layout(forest: Forest, path, *, order=None):
    """bhgrow's HDF5 layout as written before the forest index: rows in the Forest's own
    (snap, forest, node) order (or ``order``), no ``/forest_rows``."""
    rows = np.arange(forest.n_nodes) if order is None else order
    with h5py.File(path, "w") as h5:
        h5.attrs["format"] = "bhgrow-forest"
        h5.attrs["schema_version"] = 1
        if forest.box_mpc is not None:
            h5.attrs["box_mpc"] = forest.box_mpc
        h5.attrs["meta_json"] = json.dumps(forest.meta)
        for name, arr in forest.to_columns().items():
            if name != "weight_mpc3":
                h5.create_dataset(f"nodes/{name}", data=arr[rows])
        h5.create_dataset("snapshots/snap", data=forest.snapshots.snap)
        h5.create_dataset("snapshots/z", data=forest.snapshots.z)
        if forest.forest_weight is not None:
            h5.create_dataset("forests/forest_id", data=forest.forest_ids)
            h5.create_dataset("forests/weight_mpc3", data=forest.forest_weight)
    return path


@pytest.fixture(scope="module")
def demo():
    f = load_forest(demo_trees_path())
    return f.select_forests(f.forest_ids[::40])          # 38 forests, ~1.4e4 nodes


@pytest.fixture(scope="module")
def files(demo, tmp_path_factory):
    d = tmp_path_factory.mktemp("lazy")
    return {"indexed": write_hdf5(demo, d / "indexed.h5"),
            "old": write_old_layout(demo, d / "old.h5")}


@pytest.fixture(scope="module")
def eager(demo):
    return run_model(demo, from_table({"run": {**FAST, "chunk_nodes": 10**9}}), workers=1)


def assert_same_forest(a: Forest, b: Forest):
    for name in ("node_id", "desc_id", "forest_id", "snap", "mass_msun", "forest_ids",
                 "desc_index", "main_prog", "prog_offsets", "prog_index", "snap_offsets",
                 "forest_index"):
        x, y = getattr(a, name), getattr(b, name)
        assert x.dtype == y.dtype and np.array_equal(x, y), name
    assert a.box_mpc == b.box_mpc and a.meta == b.meta
    np.testing.assert_array_equal(a.snapshots.z, b.snapshots.z)
    assert sorted(a.extra) == sorted(b.extra)
    if a.forest_weight is None:
        assert b.forest_weight is None
    else:
        np.testing.assert_array_equal(a.forest_weight, b.forest_weight)


# ------------------------------------------------------------------ reading
@pytest.mark.parametrize("layout", ["indexed", "old", "grouped_no_index"])
def test_chunks_read_lazily_equal_the_eager_selection(layout, demo, files, tmp_path,
                                                      monkeypatch):
    monkeypatch.setattr(tio, "READ_BLOCK_ROWS", 700)   # many small spans and blocks
    monkeypatch.setattr(tio, "GAP_ROWS", 50)
    if layout == "grouped_no_index":
        order = np.lexsort((demo.node_id, demo.forest_id))
        path = write_old_layout(demo, tmp_path / "g.h5", order=order)
    else:
        path = files[layout]
    src = open_forests(path, max_nodes=2000)
    assert src.grouped == (layout != "old") and src.checked
    assert src.n_nodes == demo.n_nodes
    np.testing.assert_array_equal(src.forest_ids, demo.forest_ids)
    np.testing.assert_array_equal(src.nodes_per_forest(), demo.nodes_per_forest())
    np.testing.assert_array_equal(src.volume_weight(), demo.volume_weight())
    whole = load_forest(path)
    for ids in (demo.forest_ids[::5], demo.forest_ids[[3, 4, 30]], demo.forest_ids):
        assert_same_forest(whole.select_forests(ids), src.select_forests(ids))


def test_write_hdf5_groups_rows_by_forest_with_an_index(demo, files):
    with h5py.File(files["indexed"]) as h5:
        fid = h5["nodes/forest_id"][()]
        ids, off = h5["forest_rows/forest_id"][()], h5["forest_rows/offset"][()]
    np.testing.assert_array_equal(ids, demo.forest_ids)
    assert off[0] == 0 and off[-1] == demo.n_nodes
    np.testing.assert_array_equal(fid, np.repeat(ids, np.diff(off)))
    assert_same_forest(demo, load_forest(files["indexed"]))       # still reads whole


def test_reading_one_forest_reads_only_its_rows(demo, files, monkeypatch):
    spans = []
    real = tio._read_span
    monkeypatch.setattr(tio, "_read_span",
                        lambda ds, a, b, **kw: spans.append(b - a) or real(ds, a, b, **kw))
    src = open_forests(files["indexed"], check=False)
    assert spans == []                                   # opening reads the index only
    fid = int(demo.forest_ids[7])
    sub = src.select_forests([fid])
    n_cols = 5
    assert sum(spans) == sub.n_nodes * n_cols == demo.nodes_per_forest()[7] * n_cols


def test_reader_never_holds_more_than_a_chunk(files, demo, monkeypatch):
    """The check and the run read spans of at most a block (+ one forest) and hand out
    chunks of at most ``chunk_nodes`` nodes; the whole file is never read at once. With the
    index, the run reads every row exactly once (chunks of neighbouring forests)."""
    block, chunk = 1000, 2500
    biggest = int(demo.nodes_per_forest().max())
    assert demo.n_nodes > 5 * chunk
    monkeypatch.setattr(tio, "READ_BLOCK_ROWS", block)
    spans, chunks, engine_nodes = [], [], []
    real_span, real_cols, real_engine = tio._read_span, HDF5Forests.read_columns, \
        engine.run_forest

    def read_columns(self, ids, **kw):
        out = real_cols(self, ids, **kw)
        chunks.append(len((out[0] if kw.get("rows") else out)["node_id"]))
        return out

    def run_forest(forest, *a):
        engine_nodes.append(forest.n_nodes)
        return real_engine(forest, *a)

    monkeypatch.setattr(tio, "_read_span", lambda ds, a, b, **kw: spans.append(b - a)
                        or real_span(ds, a, b, **kw))
    monkeypatch.setattr(HDF5Forests, "read_columns", read_columns)
    monkeypatch.setattr(engine, "run_forest", run_forest)
    monkeypatch.setattr(tio, "read_hdf5", lambda *a: pytest.fail("whole file read"))
    cfg = from_table({"run": {**FAST, "chunk_nodes": chunk}})
    for layout in ("indexed", "old"):
        src = open_forests(files[layout], max_nodes=chunk)           # the check
        assert max(spans) <= block + biggest and max(chunks) <= chunk, layout
        for log in (spans, chunks, engine_nodes):
            log.clear()
        r = run_model(src, cfg, workers=1)                             # the run
        assert r.provenance["n_nodes"] == demo.n_nodes and r.provenance["n_chunks"] >= 5
        assert max(spans) <= block + biggest, layout
        assert max(chunks) <= chunk and max(engine_nodes) <= chunk, layout
        assert sum(engine_nodes) == demo.n_nodes
        if layout == "indexed":
            assert sum(spans) == demo.n_nodes * len(src.columns)


def test_contiguous_plan():
    from bhgrow.parallel import plan_chunks

    rng = np.random.default_rng(5)
    for _ in range(200):
        cost = rng.integers(0, 60, rng.integers(1, 80))
        cost[rng.random(cost.size) < 0.05] = 500                     # a few giants
        max_nodes, n_workers = int(rng.integers(1, 400)), int(rng.integers(1, 5))
        ids = np.arange(cost.size) * 3 + 1
        plan = plan_chunks(cost, max_nodes, n_workers, forest_ids=ids, contiguous=True)
        assert np.array_equal(np.sort(np.concatenate(plan)), ids)
        loads = [int(cost[(c - 1) // 3].sum()) for c in plan]
        assert loads == sorted(loads, reverse=True)
        total = int(cost.sum())
        # the plan's target chunk size: a multiple of n_workers chunks (bhgrow.parallel)
        n_chunks = 1 if n_workers == 1 else \
            -(-max(-(-total // max_nodes), n_workers) // n_workers) * n_workers
        target = max(1, min(max_nodes, total if n_workers == 1 else -(-total // n_chunks)))
        small = ids[cost < target]
        for c, load in zip(plan, loads):
            assert load <= max_nodes or c.size == 1
            if c.size > 1 or cost[(c[0] - 1) // 3] < target:          # a run of neighbours
                pos = np.searchsorted(small, c)
                assert np.all(np.diff(pos) == 1)


# ------------------------------------------------------------------ runs
@pytest.mark.parametrize("workers", [1, 2])
def test_lazy_run_equals_eager_run(workers, files, eager):
    cfg = from_table({"run": {**FAST, "chunk_nodes": 3000}})
    for layout in ("indexed", "old"):
        r = run(cfg, trees=files[layout], workers=workers)
        assert isinstance(r.forest, HDF5Forests)
        assert r.provenance["n_chunks"] >= 4
        assert r.provenance["backend"] == ("serial" if workers == 1 else "processes")
        assert_same(eager, r)


def test_lazy_run_on_dask_equals_eager_run(files, eager):
    distributed = pytest.importorskip("dask.distributed")
    src = open_forests(files["indexed"], max_nodes=3000)
    # the parent reads every task's chunk from the file and scatters it (threads suffice)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster:
        r = run_model(src, from_table({"run": {**FAST, "chunk_nodes": 3000}}),
                      dask=cluster.scheduler_address)
    assert r.provenance["backend"] == "dask" and r.provenance["n_chunks"] >= 4
    assert_same(eager, r)


def test_run_directories_and_tables_are_identical(files, demo, tmp_path, monkeypatch):
    from bhgrow import products

    monkeypatch.setattr(products, "make_figures", lambda *a, **k: None)   # not compared
    cfg = from_table({"run": {**FAST, "chunk_nodes": 3000}})
    run(cfg, trees=demo, out=tmp_path / "eager")
    run(cfg, trees=files["indexed"], out=tmp_path / "lazy")
    names = ["black_holes.ecsv", "mergers.ecsv", "pending_pairs.ecsv", "summary.json"]
    names += [f"tables/{p.name}" for p in sorted((tmp_path / "eager" / "tables").iterdir())]
    assert len(names) > 5
    for name in names:     # the same bytes, but for the trees file named in the header
        a, b = ((tmp_path / d / name).read_text().replace(f"trees: {files['indexed']}",
                                                          "trees: null")
                for d in ("eager", "lazy"))
        assert a == b, name
    with h5py.File(tmp_path / "eager" / "histories.h5") as a, \
            h5py.File(tmp_path / "lazy" / "histories.h5") as b:
        assert sorted(a) == sorted(b)
        for k in a:
            if hasattr(a[k], "shape"):
                np.testing.assert_array_equal(a[k][()], b[k][()], err_msg=k)


@pytest.mark.parametrize("parts", [1, 2, 5, 10**6])
def test_catalogues_written_in_slices_and_parts_equal_one_write(eager, tmp_path, parts):
    """write_run formats big catalogues a slice of rows at a time (bounded memory), and
    with several workers in parts of rows written at once (EcsvFile): the same bytes."""
    from bhgrow.output import EcsvFile, write_ecsv

    for name in ("black_holes", "mergers", "pending"):
        table = getattr(eager, name)
        assert len(table) > 3 * 37, name
        write_ecsv(table.copy(), tmp_path / "whole.ecsv", meta={"seed": 3})
        f = EcsvFile(table.copy(), tmp_path / "sliced.ecsv", meta={"seed": 3}, parts=parts,
                     chunk_rows=37)
        assert f.n_parts == min(parts, len(table))
        for k in np.random.default_rng(parts).permutation(f.n_parts):   # any order
            f.write_part(int(k))
        f.join()
        assert ((tmp_path / "whole.ecsv").read_bytes()
                == (tmp_path / "sliced.ecsv").read_bytes()), name
        assert sorted(p.name for p in tmp_path.iterdir()) == ["sliced.ecsv", "whole.ecsv"]
        (tmp_path / "sliced.ecsv").unlink()


# ------------------------------------------------------------------ checkpoints
def test_checkpoint_hash_is_the_file_and_resume_refuses_a_changed_file(files, demo,
                                                                      tmp_path, monkeypatch,
                                                                      capsys):
    a = open_forests(files["indexed"], check=False)
    assert forest_sha256(a) == forest_sha256(open_forests(files["indexed"], check=False))
    assert forest_sha256(a) != forest_sha256(open_forests(files["old"], check=False))
    trees = tmp_path / "t.h5"
    write_hdf5(demo, trees)
    cfg = tmp_path / "c.toml"
    cfg.write_text("[run]\nmax_substeps = 4\nchunk_nodes = 3000\n")
    out = tmp_path / "run"
    args = ["run", str(cfg), "--trees", str(trees), "-o", str(out), "--no-progress"]
    real, calls = engine.run_forest, []

    def stop_after_two(forest, *x):
        if len(calls) >= 2:
            raise KeyboardInterrupt
        calls.append(forest.n_forests)
        return real(forest, *x)

    monkeypatch.setattr(engine, "run_forest", stop_after_two)
    assert main(args) == 130
    monkeypatch.undo()
    write_hdf5(demo.select_forests(demo.forest_ids[1:]), trees, overwrite=True)
    assert main(args + ["--resume"]) == 2
    assert "different trees" in capsys.readouterr().err
    assert not out.exists()


def test_file_changed_during_a_run_is_an_error(files, demo, tmp_path):
    path = write_hdf5(demo, tmp_path / "t.h5")
    src = open_forests(path)
    write_hdf5(demo.select_forests(demo.forest_ids[::2]), path, overwrite=True)
    with pytest.raises(BhgrowInputError) as e:
        src.select_forests(demo.forest_ids[:2])
    assert e.value.rule == "file_changed" and str(path) in str(e.value)


# ------------------------------------------------------------------ bad input
def corrupt(path, **changes):
    """Set ``/nodes/<column>[row] = value`` for ``column=[(row, value), ...]``."""
    with h5py.File(path, "r+") as h5:
        for column, edits in changes.items():
            arr = h5[f"nodes/{column}"][()]
            for row, value in edits:
                if np.isnan(value) and arr.dtype.kind != "f":
                    arr = arr.astype(np.float64)
                arr[row] = value
            del h5[f"nodes/{column}"]
            h5.create_dataset(f"nodes/{column}", data=arr)
    return path


def rows_of(path, forest_id):
    with h5py.File(path) as h5:
        return np.flatnonzero(h5["nodes/forest_id"][()] == forest_id)


def first_linked_row(path, forest_id, nth=0):
    with h5py.File(path) as h5:
        desc = h5["nodes/desc_id"][()]
    rows = rows_of(path, forest_id)
    return int(rows[desc[rows] >= 0][nth])


def node_at(path, row, column="node_id"):
    with h5py.File(path) as h5:
        return h5[f"nodes/{column}"][row]


def defects(path, demo):
    """(name, changes) of defects in a valid file written by write_hdf5."""
    f0, f1, f9 = (int(x) for x in demo.forest_ids[[0, 1, 9]])
    # write_hdf5 groups rows by forest, then snapshot: a forest's first row is at its
    # earliest snapshot, its last row is a root at the last snapshot
    r0, r1 = first_linked_row(path, f0), first_linked_row(path, f9)
    early_f1, root_f0, root_f9 = (int(rows_of(path, f)[i]) for f, i in
                                  ((f1, 0), (f0, -1), (f9, -1)))
    with h5py.File(path) as h5:
        ids = h5["nodes/node_id"][()]
    many = [int(rows_of(path, f)[2]) for f in demo.forest_ids[::2]]
    return [
        ("missing_descendant", {"desc_id": [(r1, 10**15)]}),
        ("negative_mass", {"mass_msun": [(r0, -5.0)]}),
        ("two_rules_two_chunks", {"mass_msun": [(r0, 0.0)], "desc_id": [(r1, 10**15)]}),
        ("cross_forest_link", {"desc_id": [(r1, int(ids[root_f0]))]}),
        ("cross_link_to_earlier_snap", {"desc_id": [(root_f9, int(ids[early_f1]))]}),
        ("duplicate_across_forests", {"node_id": [(r1, int(ids[r0]))]}),
        ("unknown_snapshot", {"snap": [(r1, 999)]}),
        ("nan_node_id", {"node_id": [(r1, np.nan)]}),
        ("many_offenders", {"mass_msun": [(r, -1.0) for r in many]}),
    ]


@pytest.mark.parametrize("max_nodes, workers", [(1, 1), (3000, 1), (10**9, 1), (3000, 2)])
def test_bad_files_give_the_eager_message(max_nodes, workers, demo, tmp_path):
    # with 2 workers the chunks are checked in two processes and merged in file order
    base = write_hdf5(demo, tmp_path / "base.h5")
    for name, changes in defects(base, demo):
        path = tmp_path / f"{name}.h5"
        path.write_bytes(base.read_bytes())
        corrupt(path, **changes)
        with pytest.raises(BhgrowInputError) as want:
            load_forest(path)
        with pytest.raises(BhgrowInputError) as got:
            open_forests(path, max_nodes=max_nodes, workers=workers)
        assert str(got.value) == str(want.value), name
        assert got.value.rule == want.value.rule and got.value.rows == want.value.rows
        assert str(path) in str(got.value) and "Traceback" not in str(got.value)
    text = str(got.value)                                   # many_offenders: merged
    assert re.search(r"\[bad_mass\].*\(and 9 more\)", text), text


def test_nan_id_message_names_file_rows(demo, tmp_path):
    path = write_hdf5(demo, tmp_path / "t.h5")
    row = int(rows_of(path, demo.forest_ids[20])[3])
    corrupt(path, node_id=[(row, np.nan)])
    with pytest.raises(BhgrowInputError) as e:
        open_forests(path, max_nodes=1)
    assert e.value.rule == "wrong_dtype" and e.value.rows == [row]


def test_bad_file_through_the_cli_fails_before_any_work(demo, tmp_path, monkeypatch,
                                                       capsys):
    path = write_hdf5(demo, tmp_path / "t.h5")
    row = first_linked_row(path, demo.forest_ids[30])
    node = int(node_at(path, row))
    corrupt(path, desc_id=[(row, 10**15)], mass_msun=[(row + 1, -1.0)])
    monkeypatch.setattr(engine, "run_forest", lambda *a: pytest.fail("engine ran"))
    out = tmp_path / "run"
    cfg = tmp_path / "c.toml"
    cfg.write_text("[run]\nchunk_nodes = 2000\n")
    assert main(["run", str(cfg), "--trees", str(path), "-o", str(out),
                 "--no-progress"]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and str(path) in err
    assert "[missing_descendants]" in err and str(node) in err and "[bad_mass]" in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["c.toml", "t.h5"]   # nothing
    assert not Checkpoint.directory_for(out).exists()


def test_bad_index_is_reported(demo, tmp_path):
    path = write_hdf5(demo, tmp_path / "t.h5")
    with h5py.File(path, "r+") as h5:
        off = h5["forest_rows/offset"][()]
        off[3] += 1
        del h5["forest_rows/offset"]
        h5["forest_rows/offset"] = off
    with pytest.raises(BhgrowInputError) as e:
        open_forests(path)
    assert e.value.rule == "bad_index" and "forest_rows" in str(e.value)
    with h5py.File(path, "r+") as h5:
        del h5["forest_rows"]                   # without the index: one scan of forest_id
    src = open_forests(path)
    assert src.grouped
    assert_same_forest(load_forest(path), src.select_forests(src.forest_ids))


# hypothesis: random defects in a small file with one forest per chunk; the lazy check
# fails exactly when load_forest fails, naming only rules load_forest names (with repeated
# node ids: naming the repetition)
def _tiny() -> Forest:
    from bhgrow.trees.toy import toy_forest

    return toy_forest(5, seed=11, n_snap=6, log_mass_range=(9.0, 10.0), box_mpc=20.0)


TINY = _tiny()


@settings(max_examples=40, deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(st.lists(st.tuples(st.sampled_from(["node_id", "desc_id", "forest_id", "snap",
                                           "mass_msun"]),
                          st.integers(0, TINY.n_nodes - 1),
                          st.sampled_from(["other_node", "missing", "negative", "zero",
                                           "other_forest", "snap_shift"])),
                min_size=1, max_size=3),
       st.sampled_from(["indexed", "old"]))
def test_random_defects_same_verdict(tmp_path_factory, edits, layout):
    d = tmp_path_factory.mktemp("h")
    path = (write_hdf5(TINY, d / "t.h5") if layout == "indexed"
            else write_old_layout(TINY, d / "t.h5"))
    with h5py.File(path) as h5:
        cols = {k: h5[f"nodes/{k}"][()] for k in h5["nodes"]}
    changes: dict = {}
    for column, row, how in edits:
        value = {"other_node": int(cols["node_id"][(row * 7 + 3) % TINY.n_nodes]),
                 "missing": 10**12, "negative": -3, "zero": 0,
                 "other_forest": int(TINY.forest_ids[(row + 1) % TINY.n_forests]),
                 "snap_shift": int(cols["snap"][row]) + 1}[how]
        if column == "forest_id" and how not in ("other_forest",):
            continue                        # forest ids define the chunks; keep them ids
        changes.setdefault(column, []).append((row, value))
    if not changes:
        return
    corrupt(path, **changes)
    if layout == "indexed" and "forest_id" in changes:
        with h5py.File(path, "r+") as h5:   # a relabelled node no longer matches the index
            del h5["forest_rows"]
    try:
        load_forest(path)
        eager_rules = None
    except BhgrowInputError as exc:
        eager_rules = set(re.findall(r"\[(\w+)\]", str(exc)))
    try:
        open_forests(path, max_nodes=1)
        lazy_rules = None
    except BhgrowInputError as exc:
        lazy_rules = set(re.findall(r"\[(\w+)\]", str(exc)))
    assert (eager_rules is None) == (lazy_rules is None), (eager_rules, lazy_rules)
    if eager_rules is None:
        return
    if "duplicate_ids" in eager_rules:
        # a descendant id that names two nodes is resolved within the chunk by the lazy
        # check and to either node by the whole-file check: the follow-on rules may differ
        assert "duplicate_ids" in lazy_rules
    else:
        assert lazy_rules <= eager_rules, (lazy_rules, eager_rules)


# ------------------------------------------------------------------ merging chunk results
def test_merged_catalogues_hold_no_spare_copies(demo, tmp_path):
    """Catalogues grow with the trees, not the chunk: a finished chunk's black holes are
    kept without the growth buffers' spare capacity, each chunk's result gives its
    catalogue columns up as it arrives (to disk when a run has several chunks), the
    catalogue is built from them a column at a time, in memory or on disk alike, and the
    channel and status names come from one look-up table, as the per-row look-up gave
    them."""
    from bhgrow.cosmology import Cosmology
    from bhgrow.parallel import compact_result
    from bhgrow.pipeline import _names

    cfg = from_table({"run": FAST})
    res = engine.run_forest(demo, cfg.model, cfg.run, Cosmology.from_name(cfg.run.cosmology))
    full = res.black_holes
    assert any(getattr(full, k).base is not None
               and getattr(full, k).base.size > len(full) for k in full.__dataclass_fields__)
    small = compact_result(res).black_holes
    for k in small.__dataclass_fields__:
        col = getattr(small, k)
        assert col.base is None or col.base.size == col.size, k
        np.testing.assert_array_equal(col, getattr(full, k), err_msg=k)

    # two parts in reverse id order make the sorted catalogue; the parts give up their
    # columns; on disk (several chunks) the same table as in memory
    from astropy.table import Table

    from bhgrow.output import DiskTable
    from bhgrow.pipeline import _black_hole_catalogue, _ChunkCatalogues

    half = len(small) // 2
    o = np.argsort(small.bh_id, kind="stable")
    tables = []
    for directory in (None, tmp_path / "parts"):
        cat = _ChunkCatalogues(directory)
        for s in (slice(half, None), slice(0, half)):
            r = engine.EngineResult(black_holes=engine.BlackHoles(
                **{k: getattr(small, k)[s].copy() for k in small.__dataclass_fields__}),
                history=None, forest=None, ledger={}, baryons={}, n_seeds={}, wall_s=0.0)
            cat.add(r)
            assert len(r.black_holes) == 0
        for k in small.__dataclass_fields__:
            np.testing.assert_array_equal(np.sort(cat.bh(k)[np.argsort(cat.bh("bh_id"))]),
                                          np.sort(getattr(small, k)[o]), err_msg=k)
        table = Table() if directory is None else DiskTable(tmp_path / "table")
        order = _black_hole_catalogue(cat, lambda f: np.full(f.size, 2.0), table)
        np.testing.assert_array_equal(cat.bh("bh_id")[order], small.bh_id[o])
        tables.append(table)
        cat.close()
    mem, disk = tables
    assert disk.colnames == mem.colnames and len(disk) == len(mem) == len(small)
    for c in mem.colnames:
        np.testing.assert_array_equal(disk[c], mem[c], err_msg=c)
        assert disk.empty()[c].unit == mem[c].unit
        assert disk.empty()[c].description == mem[c].description
    assert not (tmp_path / "parts").exists()

    codes = small.channel
    want = np.array([engine.CHANNEL_NAMES[int(c)] for c in codes], dtype="U12")
    np.testing.assert_array_equal(_names(codes, engine.CHANNEL_NAMES, "U12"), want)
    want = np.array([engine.STATUS_NAMES[int(s)] for s in small.status], dtype="U16")
    np.testing.assert_array_equal(_names(small.status, engine.STATUS_NAMES, "U16"), want)
    assert _names(codes[:0], engine.CHANNEL_NAMES, "U12").dtype == np.dtype("U12")


def test_catalogues_of_several_chunks_are_on_disk_until_dropped(files, eager, tmp_path):
    """With several chunks the black holes and mergers stay on disk (DiskTable), equal to
    a one-chunk run's tables; nothing is left beside the output once the result is gone."""
    import gc

    from bhgrow.output import DiskTable

    cfg = from_table({"run": {**FAST, "chunk_nodes": 3000}})
    r = run(cfg, trees=files["indexed"], out=tmp_path / "out")
    assert r.provenance["n_chunks"] >= 4
    assert isinstance(r.black_holes, DiskTable) and isinstance(r.mergers, DiskTable)
    assert_same(eager, r)
    dirs = [r.black_holes.directory, r.mergers.directory]
    assert all(d.is_dir() and d.parent == tmp_path for d in dirs)
    del r
    gc.collect()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_scratch_left_by_a_killed_run_is_removed_by_the_next(files, tmp_path):
    """A run killed outright (no clean-up) leaves its hidden scratch directories beside the
    output; the next run of that output removes those whose process is gone, and keeps
    those of a live process."""
    import os
    import subprocess
    import sys

    from bhgrow.pipeline import _sweep_scratch

    gone = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True, check=True).stdout.strip()
    partial = Checkpoint.directory_for(tmp_path / "out")
    dead = [tmp_path / f".{partial.name}-{k}-{gone}-ab12" for k in ("histories",
                                                                    "chunk-catalogues")]
    alive = [tmp_path / f".{partial.name}-mergers-{os.getpid()}-cd34",
             tmp_path / f".{partial.name}-histories-1-ef56"]          # pid 1 runs
    other = [tmp_path / ".other.partial-histories-99999999-gh78", tmp_path / "keep-me"]
    for d in dead + alive + other:
        d.mkdir()
        (d / "x.npy").write_bytes(b"x")
    _sweep_scratch(partial)
    assert not any(d.exists() for d in dead)
    assert all(d.exists() for d in alive + other)
    for d in alive:
        d.rename(tmp_path / d.name.replace(str(os.getpid()), gone).replace("-1-", f"-{gone}-"))
    cfg = from_table({"run": {**FAST, "chunk_nodes": 3000}})
    run(cfg, trees=files["indexed"], out=tmp_path / "out")
    import gc
    gc.collect()
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(
        [".other.partial-histories-99999999-gh78", "keep-me", "out"])


def test_repeated_id_search_keeps_its_scratch_beside_the_output(files, tmp_path,
                                                                monkeypatch):
    """Where the check must search the file for repeated ids, its scratch file (8 B per
    node) goes beside the output, under the run's scratch names, not into a temporary
    directory that may be in memory; nothing is left afterwards."""
    monkeypatch.setattr(tio, "READ_BLOCK_ROWS", 500)              # budget below the file
    monkeypatch.setattr(tio._SeenIds, "all_unique", lambda self: False)
    seen = []
    real = HDF5Forests._duplicate_node_ids

    def spy(self, budget, scratch_dir=None):
        seen.append(scratch_dir)
        # (inside the call: the scratch directory and the search's own file exist)
        return real(self, budget, scratch_dir)

    monkeypatch.setattr(HDF5Forests, "_duplicate_node_ids", spy)
    cfg = from_table({"run": {**FAST, "chunk_nodes": 3000}})
    run(cfg, trees=files["indexed"], out=tmp_path / "out")
    assert len(seen) == 1 and seen[0] is not None
    from pathlib import Path
    assert Path(seen[0]).parent == tmp_path
    assert Path(seen[0]).name.startswith(".out.partial-ids-")
    import gc
    gc.collect()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]
