"""Fast paths of reading and checking forests give exactly the old algorithms' results.

* ``Forest._index``: descendant rows from an id look-up table (dense, unique ids) or, as
  before, a sort and a binary search; progenitor lists ordered per pair by a comparison.
  Every derived array must equal, bit for bit and dtype for dtype, that of the previous
  implementation (copied below as :func:`old_index`), for valid forests and for arrays
  no validation would pass (repeated or negative ids, descendants naming no node, NaN
  masses, equal masses, huge or sparse ids, an empty forest).
* ``find_problems``: the look-up table path reports exactly what the sort-and-search path
  (the previous code, still used for sparse or repeated ids) reports.
* ``HDF5Forests.check``: repeated node ids found from the flags of the chunk pass (the
  chunks' ids handed over as flag bits or as ids), or by reading the file's ``node_id``
  again (one pass for a file within the budget, two above) give the same verdict and
  message; with dense unique ids the ``node_id`` column is read once.
"""

from __future__ import annotations

import importlib

import h5py
import numpy as np
import pytest

from bhgrow.errors import BhgrowInputError
from bhgrow.trees import Forest, write_hdf5
from bhgrow.trees import io as tio
from bhgrow.trees.forest import SnapshotTable, _search_runs
from bhgrow.trees.io import HDF5Forests, _SeenIds, open_forests
from bhgrow.trees.toy import toy_forest
from bhgrow.trees.validate import (ID_TABLE_MIN, ID_TABLE_SPAN, RANK_TABLE_SPAN,
                                   _nodes_on_cycles,
                                   find_problems, id_table, rows_of_ids)

# the module (``bhgrow.trees.validate`` the name is also the function the package exports)
tval = importlib.import_module("bhgrow.trees.validate")

INDEX_NAMES = ("desc_index", "prog_index", "prog_offsets", "main_prog", "snap_offsets",
               "forest_index")


# ================================================================ the previous algorithms
def old_index(f: Forest) -> dict:
    """``Forest._index`` and ``Forest._progenitor_order`` as they were (verbatim)."""
    n = f.node_id.size
    id_order = np.argsort(f.node_id, kind="stable")
    pos = np.searchsorted(f.node_id[id_order], f.desc_id)
    pos = np.minimum(pos, n - 1)
    desc_index = np.where(f.desc_id >= 0, id_order[pos], -1).astype(np.int64)

    has = desc_index >= 0
    rows = np.flatnonzero(has)
    d = desc_index[rows]
    o = np.argsort(d, kind="stable")
    ds = d[o]
    same = ds[1:] == ds[:-1]
    multi = np.flatnonzero(np.r_[same, False] | np.r_[False, same])
    if multi.size:
        sub = o[multi]
        r = rows[sub]
        o[multi] = sub[np.lexsort((f.node_id[r], -f.mass_msun[r], d[sub]))]
    prog_index = rows[o]
    counts = np.bincount(desc_index[rows], minlength=n)
    prog_offsets = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(counts, out=prog_offsets[1:])
    main_prog = np.full(n, -1, dtype=np.int64)
    with_prog = counts > 0
    main_prog[with_prog] = prog_index[prog_offsets[:-1][with_prog]]

    snap_pos = np.searchsorted(f.snapshots.snap, f.snap)
    snap_offsets = np.searchsorted(snap_pos, np.arange(len(f.snapshots) + 1))
    forest_index = np.searchsorted(f.forest_ids, f.forest_id)
    return dict(desc_index=desc_index, prog_index=prog_index, prog_offsets=prog_offsets,
                main_prog=main_prog, snap_offsets=snap_offsets, forest_index=forest_index)


def old_nodes_on_cycles(desc_idx: np.ndarray) -> np.ndarray:
    """``validate._nodes_on_cycles`` as it was (verbatim)."""
    n = desc_idx.size
    nxt = desc_idx.copy()
    rounds = max(1, int(np.ceil(np.log2(max(n, 2)))) + 1)
    for _ in range(rounds):
        alive = nxt >= 0
        if not alive.any():
            break
        nxt[alive] = nxt[nxt[alive]]
    return nxt >= 0


def old_repeated_ids(path) -> np.ndarray:
    """Node ids occurring more than once in a file, straight from the whole column."""
    with h5py.File(path) as h5:
        ids = np.sort(h5["nodes/node_id"][()].astype(np.int64))
    return np.unique(ids[1:][ids[1:] == ids[:-1]])


# ================================================================ helpers
def raw_forest(node_id, desc_id, forest_id, snap, mass, snaps=None) -> Forest:
    """A Forest of these arrays as they are (no validation, no reordering), not indexed."""
    snaps = np.unique(snap) if snaps is None else snaps
    return Forest(node_id=np.asarray(node_id, np.int64), desc_id=np.asarray(desc_id, np.int64),
                  forest_id=np.asarray(forest_id, np.int64), snap=np.asarray(snap, np.int64),
                  mass_msun=np.asarray(mass, np.float64),
                  snapshots=SnapshotTable(np.asarray(snaps, np.int64),
                                          np.linspace(10.0, 0.0, len(snaps))),
                  forest_ids=np.unique(np.asarray(forest_id, np.int64)))


def assert_index_as_before(f: Forest) -> None:
    want = old_index(f)
    f._index()
    for name in INDEX_NAMES:
        got = getattr(f, name)
        assert got.dtype == want[name].dtype, name
        np.testing.assert_array_equal(got, want[name], err_msg=name)


def toy_variant(kind: str, seed: int = 3) -> Forest:
    """Sorted rows of a toy forest, with ids and masses changed as ``kind`` says."""
    f = toy_forest(40, seed=seed, n_snap=12, box_mpc=30.0)
    rng = np.random.default_rng(seed)
    node, desc, mass = f.node_id.copy(), f.desc_id.copy(), f.mass_msun.copy()

    def remap(scale, shift):
        has = desc >= 0
        desc[has] = desc[has] * scale + shift
        return node * scale + shift

    if kind == "sparse":                   # ids far apart: the sort-and-search path
        node = remap(10**9, 7)
    elif kind == "spread":                 # 200 id values per node: the rank table
        node = remap(200, -3)
    elif kind == "huge":                   # near the top of int64, dense
        node = remap(1, 2**62)
    elif kind == "negative":               # negative ids (and -1 as a node id)
        node = remap(1, -int(node.max()) // 2)
    elif kind == "ties":                   # many equal masses among progenitors
        mass[rng.random(mass.size) < 0.5] = 1e10
    elif kind == "nan_zero":               # NaN, +0.0 and -0.0 masses
        mass[rng.random(mass.size) < 0.2] = np.nan
        mass[rng.random(mass.size) < 0.2] = 0.0
        mass[rng.random(mass.size) < 0.2] = -0.0
    elif kind == "repeated":               # an id twice: the search path, as before
        node[5] = node[9]
    elif kind == "missing":                # a descendant id naming no node
        desc[np.flatnonzero(desc >= 0)[3]] = int(node.max()) + 12345
    elif kind == "wild":                   # descendants anywhere (cycles, self links)
        pick = rng.random(desc.size) < 0.3
        desc[pick] = node[rng.integers(0, node.size, pick.sum())]
    return raw_forest(node, desc, f.forest_id, f.snap, mass, f.snapshots.snap)


# ================================================================ Forest._index
@pytest.mark.parametrize("kind", ["plain", "sparse", "spread", "huge", "negative", "ties",
                                  "nan_zero", "repeated", "missing", "wild"])
def test_index_equals_the_previous_index(kind):
    f = toy_variant(kind)
    dense = kind not in ("sparse", "repeated")
    assert (id_table(f.node_id) is not None) == dense   # the path the case is meant for
    assert isinstance(id_table(f.node_id), tval._RankTable) == (kind == "spread")
    assert_index_as_before(f)


def test_index_of_many_progenitors_and_shuffled_rows():
    # descendants with 0..12 progenitors of partly equal masses (and, in every other
    # trial, partly equal ids); rows in random order
    rng = np.random.default_rng(1)
    for trial in range(30):
        n_desc = int(rng.integers(1, 40))
        sizes = rng.integers(0, 13, n_desc)
        n = n_desc + int(sizes.sum())
        node = rng.permutation(n) + int(rng.integers(-50, 50))
        if trial % 2 and n > n_desc:   # progenitors sharing ids: ties on every key
            k = rng.integers(n_desc, n, n // 3)
            node[k] = node[rng.integers(n_desc, n, k.size)]
        desc = np.full(n, -1)
        desc[n_desc:] = np.repeat(node[:n_desc], sizes)
        mass = rng.choice([1.0, 2.0, 3.0, np.nan, 0.0, -0.0], n) * 10.0 ** rng.integers(
            0, 2, n)
        snap = np.where(desc >= 0, 0, 1)
        fid = rng.integers(0, 3, n)
        perm = rng.permutation(n)
        f = raw_forest(node[perm], desc[perm], fid[perm], snap[perm], mass[perm], [0, 1])
        assert_index_as_before(f)


@pytest.mark.parametrize("mass", [[5.0, 5.0], [np.nan, np.nan], [0.0, -0.0], [np.nan, 5.0],
                                  [5.0, np.nan], [4.0, 5.0]])
@pytest.mark.parametrize("ids", [[7, 7], [8, 7], [7, 8]])
def test_index_of_a_pair_tied_on_every_key(mass, ids):
    # two progenitors of one descendant (the pair path), equal masses and equal ids
    # included: the row order decides, as in the stable lexsort
    for extra in ([], [9]):                            # a pair; a group of three
        k = len(extra)
        f = raw_forest([1, *ids, *extra], [-1] + [1] * (2 + k), [0] * (3 + k),
                       [1] + [0] * (2 + k), [10.0, *mass, *([5.0] * k)], [0, 1])
        assert_index_as_before(f)


def test_index_of_an_empty_forest():
    f = raw_forest([], [], [], [], [], [0, 1])
    assert_index_as_before(f)
    assert f.desc_index.size == 0 and f.prog_offsets.tolist() == [0]


def test_from_columns_equals_the_previous_index_on_shuffled_columns():
    f = toy_forest(60, seed=2, n_snap=15, box_mpc=30.0)
    perm = np.random.default_rng(0).permutation(f.n_nodes)
    cols = {k: v[perm] for k, v in f.to_columns().items()}
    g = Forest.from_columns(cols, f.snapshots.snap, f.snapshots.z, box_mpc=30.0)
    want = old_index(g)
    for name in INDEX_NAMES:
        np.testing.assert_array_equal(getattr(g, name), want[name], err_msg=name)
        np.testing.assert_array_equal(getattr(g, name), getattr(f, name), err_msg=name)
    for name in ("node_id", "desc_id", "forest_id", "snap", "mass_msun", "forest_ids"):
        np.testing.assert_array_equal(getattr(g, name), getattr(f, name), err_msg=name)


def test_search_runs_equals_searchsorted():
    rng = np.random.default_rng(7)
    table = np.array([-5, 0, 3, 4, 10])
    for values in (np.zeros(0, np.int64), np.array([3]),
                   np.repeat(rng.integers(-8, 14, 50), rng.integers(1, 6, 50)),
                   rng.integers(-8, 14, 200)):
        want = np.searchsorted(table, values)
        got = _search_runs(table, values)
        assert got.dtype == want.dtype
        np.testing.assert_array_equal(got, want)


# ================================================================ the id look-up table
def test_id_table_rows_and_absent_ids():
    ids = np.array([12, 10, 15, 11], dtype=np.int64)
    table = id_table(ids)
    assert table is not None
    wanted = np.array([10, 11, 12, 15, 13, 9, 16, -1, 2**63 - 1, -2**63], dtype=np.int64)
    got = rows_of_ids(table, wanted)
    assert got.dtype == np.int64
    assert got.tolist() == [1, 3, 0, 2, -1, -1, -1, -1, -1, -1]


def test_id_table_falls_back_for_repeated_sparse_or_no_ids():
    assert id_table(np.array([4, 5, 4], dtype=np.int64)) is None          # repeated
    assert id_table(np.zeros(0, np.int64)) is None                        # empty
    n = 10
    edge = ID_TABLE_SPAN * n + ID_TABLE_MIN                               # widest span
    assert id_table(np.r_[np.arange(n - 1), edge - 1].astype(np.int64)) is not None
    assert isinstance(id_table(np.r_[np.arange(n - 1), edge].astype(np.int64)),
                      tval._RankTable)                                   # then by rank
    rank_edge = RANK_TABLE_SPAN * n + ID_TABLE_MIN
    assert id_table(np.r_[np.arange(n - 1), rank_edge - 1].astype(np.int64)) is not None
    assert id_table(np.r_[np.arange(n - 1), rank_edge].astype(np.int64)) is None
    assert id_table(np.r_[np.arange(n - 1), edge, 3].astype(np.int64)) is None   # repeated
    extremes = np.array([-2**63, 2**63 - 1], dtype=np.int64)             # no overflow
    assert id_table(extremes) is None
    top = id_table(np.array([2**63 - 1, 2**63 - 2], dtype=np.int64))
    assert rows_of_ids(top, np.array([2**63 - 2, -2**63, 0])).tolist() == [1, -1, -1]


# ================================================================ find_problems
def _columns(f: Forest) -> dict:
    return {"node_id": f.node_id, "desc_id": f.desc_id, "forest_id": f.forest_id,
            "snap": f.snap, "mass_msun": f.mass_msun}


@pytest.mark.parametrize("kind", ["plain", "spread", "huge", "negative", "nan_zero",
                                  "missing", "wild"])
def test_find_problems_table_path_reports_as_the_search_path(kind, monkeypatch):
    f = toy_variant(kind)
    cols = _columns(f)
    snaps, z = f.snapshots.snap, f.snapshots.z
    links_fast: dict = {}
    fast = find_problems(cols, snaps, z, links=links_fast)
    assert id_table(f.node_id) is not None
    monkeypatch.setattr(tval, "id_table", lambda ids: None)     # the previous code
    links_slow: dict = {}
    slow = find_problems(cols, snaps, z, links=links_slow)
    assert fast == slow
    assert links_fast.keys() == links_slow.keys()
    for k in links_fast:
        np.testing.assert_array_equal(links_fast[k], links_slow[k])
    if kind == "plain":
        assert fast == []


def test_rank_table_rows_equal_numpy_search():
    """Rows by rank against numpy's sort and binary search (the reference), for unique ids
    spread over 17-256 values each, with absent, outside and extreme ids asked."""
    rng = np.random.default_rng(11)
    for n in (2, 63, 64, 65, 1000, 5000):
        for per in (17, 40, 255):
            lo = int(rng.integers(-2**40, 2**40))
            span = per * n + ID_TABLE_MIN
            ids = lo + np.r_[0, span - 1, 1 + rng.choice(span - 2, n - 2, replace=False)]
            ids = rng.permutation(ids).astype(np.int64)
            table = id_table(ids)
            assert isinstance(table, tval._RankTable), (n, per)
            wanted = np.r_[ids, lo + rng.integers(-70, span + 70, 400),
                           [2**63 - 1, -2**63, lo - 1, lo]].astype(np.int64)
            order = np.argsort(ids)
            pos = np.minimum(np.searchsorted(ids[order], wanted), n - 1)
            want = np.where(ids[order][pos] == wanted, order[pos], -1)
            got = rows_of_ids(table, wanted)
            assert got.dtype == np.int64
            np.testing.assert_array_equal(got, want)


def test_find_problems_cycles_skip_only_when_every_link_goes_later(monkeypatch):
    # a cycle across snapshots and a self link are still found; a valid forest never
    # needs the pointer doubling
    f = toy_variant("plain")
    calls = []
    real = tval._nodes_on_cycles
    monkeypatch.setattr(tval, "_nodes_on_cycles", lambda d: calls.append(1) or real(d))
    assert find_problems(_columns(f), f.snapshots.snap, f.snapshots.z) == []
    assert calls == []
    r = int(np.flatnonzero(f.desc_id >= 0)[5])
    d = int(np.flatnonzero(f.node_id == f.desc_id[r])[0])
    for row, target in ((d, f.node_id[r]), (r, f.node_id[r])):   # r -> d -> r; r -> r
        cols = _columns(f)
        cols["desc_id"] = cols["desc_id"].copy()
        cols["desc_id"][row] = target
        calls.clear()
        problems = find_problems(cols, f.snapshots.snap, f.snapshots.z)
        assert "cycles" in {p.rule for p in problems} and calls


def test_nodes_on_cycles_equals_the_previous_doubling():
    rng = np.random.default_rng(3)
    for n in (0, 1, 2, 5, 40, 300):
        for _ in range(10):
            d = rng.integers(-1, max(n, 1), n)
            d[rng.random(n) < 0.3] = -1
            np.testing.assert_array_equal(_nodes_on_cycles(d), old_nodes_on_cycles(d))
        chain = np.r_[np.arange(1, n), -1] if n else np.zeros(0, np.int64)   # one long chain
        np.testing.assert_array_equal(_nodes_on_cycles(chain), old_nodes_on_cycles(chain))


# ================================================================ flags of the chunk pass
def test_seen_ids_records_and_grows():
    rng = np.random.default_rng(0)
    ids = rng.permutation(5000) * 3 - 4000
    for order in ("rising", "falling", "random"):
        parts = np.array_split(np.sort(ids) if order != "random" else ids, 17)
        if order == "falling":
            parts = parts[::-1]
        seen = _SeenIds(10**6)
        for p in parts:
            seen.add(p)
        assert seen.all_unique(), order
        np.testing.assert_array_equal(seen.recorded(), np.sort(ids))
    seen = _SeenIds(10**6)
    seen.add(ids[:100])
    seen.add(np.r_[ids[100:200], ids[50]])                    # an id again, other chunk
    assert not seen.all_unique() and seen.flags is None


@pytest.mark.parametrize("values, unique", [
    (np.array([2**63 - 1, 2**63 - 2]), True),                # top of int64, no overflow
    (np.array([-2**63, -2**63 + 1]), True),
    (np.array([0, 8000]), False),                            # 8001 values: more than 8000 bits
    (np.array([1.0, 2.0]), False),                           # not integers: dropped
    (np.array([1, 2], dtype=np.uint8), True),
])
def test_seen_ids_limits(values, unique):
    seen = _SeenIds(1000)
    seen.add(values)
    seen.add(values[:0])
    assert seen.all_unique() == unique


def test_seen_ids_drop_when_the_range_grows_too_far():
    seen = _SeenIds(125)                                    # flags for 1000 id values
    seen.add(np.arange(0, 600))
    seen.add(np.arange(600, 990))                           # grows within the limit
    assert seen.all_unique()
    seen.add(np.arange(-20, -10))                           # needs 1010 flags
    assert not seen.all_unique() and seen.flags is None


@pytest.mark.parametrize("spread", [1, 3, 9, 50, 100])   # dense chunks .. scattered ones
@pytest.mark.parametrize("handover", ["ids", "mixed"])
def test_seen_ids_bits_against_a_set(spread, handover):
    # the flag bits record exactly the set of ids added, whichever way a chunk is
    # flagged (unpacked bytes for dense chunks, bitwise_or.at for scattered ones) and
    # however the flags grow (down by amounts that are not whole bytes, up, both).
    # "mixed": some chunks handed over as a check's workers make them (_ids_for_flags:
    # flag bits where they take fewer bytes than the int64 ids, i.e. spread below ~64;
    # the ids otherwise), the others as ids
    rng = np.random.default_rng(spread + (100 if handover == "mixed" else 0))
    for trial in range(20):
        n = int(rng.integers(1, 4000))
        ids = rng.choice(n * spread + 17, size=n, replace=False) + int(rng.integers(-999, 999))
        parts = np.array_split(ids if trial % 2 else np.sort(ids)[::-1],
                               int(rng.integers(1, 9)))
        seen = _SeenIds(10**6)
        for k, part in enumerate(parts):
            given = part
            if handover == "mixed" and (k + trial) % 4:
                given = tio._ids_for_flags(part, 8 * 10**6)
                if part.size:
                    lo = int(part.min())
                    dense = (int(part.max()) - (lo - lo % 8)) // 8 + 1 < 8 * part.size
                    assert isinstance(given, tio._IdBits) == dense
                    if dense:
                        assert given.bits.nbytes < part.nbytes and given.base % 8 == 0
            seen.add(given)
        assert seen.all_unique()
        np.testing.assert_array_equal(seen.recorded(), np.sort(ids))
        # one id of an earlier chunk again, among new ones: a repeat in either path
        if len(parts) > 1 and parts[0].size:
            again = np.r_[ids.max() + 1 + np.arange(5) * spread, parts[0][-1]]
            seen.add(again if handover == "ids" else tio._ids_for_flags(again, 8 * 10**6))
            assert not seen.all_unique() and seen.flags is None


def test_ids_for_flags_forms():
    assert isinstance(tio._ids_for_flags(np.arange(100) * 2, 10**6), tio._IdBits)
    # bits while they take fewer bytes than the ids (8 per id)
    assert isinstance(tio._ids_for_flags(np.arange(100) * 63, 10**6), tio._IdBits)
    np.testing.assert_array_equal(tio._ids_for_flags(np.arange(100) * 65, 10**6),
                                  np.arange(100) * 65)         # too sparse for bits
    # the bits of dense ids (a byte per value, packed) and of sparser ones (set in place,
    # in blocks of ids) against numpy's packbits of the flags
    rng = np.random.default_rng(5)
    for spread in (1, 5, 20, 60):
        ids = rng.choice(600_000 * spread, 600_000, replace=False) - 12345
        b = tio._ids_for_flags(ids, 10**9)
        flags = np.zeros(ids.max() - b.base + 1, dtype=bool)
        flags[ids - b.base] = True
        np.testing.assert_array_equal(b.bits, np.packbits(flags, bitorder="little"))
        assert (b.lo, b.hi) == (ids.min(), ids.max()) and b.bits.nbytes < ids.nbytes
    assert tio._ids_for_flags(np.array([0, 10**6]), 10**6) is None       # beyond capacity
    assert tio._ids_for_flags(np.array([1.0, 2.0]), 10**6) is None       # not integers
    assert tio._ids_for_flags(np.array([2**64 - 1], dtype=np.uint64), 10**6) is None
    b = tio._ids_for_flags(np.array([-2**63 + 3, -2**63 + 9]), 10**6)
    assert b.base == -2**63 and b.lo == -2**63 + 3 and b.hi == -2**63 + 9
    seen = _SeenIds(1000)
    seen.add(b)
    np.testing.assert_array_equal(seen.recorded(), [-2**63 + 3, -2**63 + 9])
    seen.add(None)                                              # a chunk flags cannot hold
    assert not seen.all_unique()


def test_seen_ids_capacity_is_eight_ids_per_byte():
    seen = _SeenIds(1000)
    seen.add(np.array([5, 5 + 7999]))                       # 8000 values: fits
    assert seen.all_unique()
    seen.add(np.array([4]))                                 # 8001: does not
    assert not seen.all_unique()
    seen = _SeenIds(1000)                                   # the same with chunk bits
    seen.add(tio._ids_for_flags(np.array([5, 5 + 7999]), 8000))
    assert seen.all_unique() and seen.flags.nbytes <= 1001
    seen.add(tio._ids_for_flags(np.array([4]), 8000))
    assert not seen.all_unique()


def test_id_buckets_fill_evenly():
    # ids in arithmetic progression (a common layout: forest * 10**k + node) spread over
    # the buckets; a repeated id always lands in the same bucket
    for step in (1, 7, 1000, 2**20, 10**10):
        ids = np.arange(200_000, dtype=np.int64) * step + 123
        for n_buckets in (3, 64, 1000):
            counts = np.bincount(tio._id_buckets(ids, n_buckets), minlength=n_buckets)
            assert counts.max() < 1.3 * ids.size / n_buckets, (step, n_buckets)
    assert np.array_equal(tio._id_buckets(np.array([-5, 9, -5]), 7)[[0, 2]],
                          tio._id_buckets(np.array([-5, -5]), 7))


# ================================================================ HDF5Forests.check
def _file(tmp_path, name, *, scale=1, shift=0, repeat=None):
    """A toy forest file with ids ``id * scale + shift`` and optionally ``node_id`` at
    ``repeat[0]`` set to that at ``repeat[1]`` (file rows)."""
    f = toy_forest(30, seed=4, n_snap=10, box_mpc=30.0)
    cols = f.to_columns()
    has = cols["desc_id"] >= 0
    desc = cols["desc_id"].copy()
    desc[has] = desc[has] * scale + shift
    cols.update(node_id=cols["node_id"] * scale + shift, desc_id=desc)
    g = Forest.from_columns(cols, f.snapshots.snap, f.snapshots.z, box_mpc=30.0)
    path = write_hdf5(g, tmp_path / name)
    if repeat is not None:
        with h5py.File(path, "r+") as h5:
            ids = h5["nodes/node_id"][()]
            ids[repeat[0]] = ids[repeat[1]]
            h5["nodes/node_id"][...] = ids
    return path, g


def _verdict(path, max_nodes):
    try:
        open_forests(path, max_nodes=max_nodes)
        return None
    except BhgrowInputError as exc:
        return str(exc), exc.rule, exc.rows


@pytest.mark.parametrize("ids", ["dense", "sparse"])
@pytest.mark.parametrize("repeat", [None, "across", "within"])
def test_check_finds_repeated_ids_as_the_streaming_search(ids, repeat, tmp_path,
                                                          monkeypatch):
    scale = 1 if ids == "dense" else 10**10
    path, g = _file(tmp_path, "a.h5", scale=scale)
    n = g.n_nodes
    if repeat is not None:
        src = open_forests(path, check=False)
        first = np.argsort(src._start)
        rows_0 = np.arange(src._start[first[0]], src._stop[first[0]])
        rows_9 = np.arange(src._start[first[9]], src._stop[first[9]])
        pair = (rows_9[1], rows_0[2]) if repeat == "across" else (rows_0[3], rows_0[1])
        path, _ = _file(tmp_path, "b.h5", scale=scale, repeat=pair)
    max_nodes = max(1, n // 6)
    want_dups = old_repeated_ids(path)
    assert (want_dups.size > 0) == (repeat is not None)

    got_dups = []
    real_set = tval.ChunkedCheck.set_duplicates
    monkeypatch.setattr(tval.ChunkedCheck, "set_duplicates",
                        lambda self, d: got_dups.append(np.asarray(d)) or real_set(self, d))
    # the three ways: flags, the file's ids read again at once, streaming them in buckets
    monkeypatch.setattr(tio, "READ_BLOCK_ROWS", 1 << 20)        # budget >= n: one read
    verdicts = [_verdict(path, max_nodes)]
    monkeypatch.setattr(tio._SeenIds, "all_unique", lambda self: False)
    verdicts.append(_verdict(path, max_nodes))
    monkeypatch.setattr(tio, "READ_BLOCK_ROWS", 64)             # budget < n: streaming
    verdicts.append(_verdict(path, max_nodes))
    assert verdicts[0] == verdicts[1] == verdicts[2]
    assert len(got_dups) == 3
    for d in got_dups:
        np.testing.assert_array_equal(d, want_dups)
    if repeat is None:
        assert verdicts[0] is None
    else:
        assert verdicts[0][1] == "duplicate_ids" or "[duplicate_ids]" in verdicts[0][0]


def test_check_of_dense_unique_ids_reads_node_ids_once(tmp_path, monkeypatch):
    path, g = _file(tmp_path, "a.h5")
    monkeypatch.setattr(tio, "READ_BLOCK_ROWS", 100)            # a file above the budget
    monkeypatch.setattr(HDF5Forests, "_node_blocks",
                        lambda *a, **k: pytest.fail("node_id read a second time"))
    src = open_forests(path, max_nodes=max(1, g.n_nodes // 7))
    assert src.checked


@pytest.mark.parametrize("workers", [1, 2])
def test_check_of_dense_ids_spread_over_every_chunk_reads_node_ids_once(tmp_path,
                                                                         monkeypatch,
                                                                         workers):
    # every chunk's ids span most of the file's (ids numbered across forests, as by
    # snapshot): beyond 8 ids per byte of budget, within the 64 of the flag bits. The
    # chunks' handover once took the byte count for the bit count, and a 2.15e7-node
    # file of unique dense ids was streamed again (3.7 s alone)
    path, g = _file(tmp_path, "a.h5")
    n = g.n_nodes
    with h5py.File(path, "r+") as h5:
        ids, desc = h5["nodes/node_id"][()], h5["nodes/desc_id"][()]
        assert np.array_equal(np.sort(ids), np.arange(n))
        h5["nodes/node_id"][...] = ids * 7919 % n                 # 7919 prime, n = 699
        h5["nodes/desc_id"][...] = np.where(desc >= 0, desc * 7919 % n, desc)
    max_nodes = n // 20
    monkeypatch.setattr(tio, "READ_BLOCK_ROWS", 10)             # budget = max_nodes
    src = open_forests(path, check=False)
    spans = [np.ptp(src.read_columns(c)["node_id"]) + 1 for c in src.chunk_ids(max_nodes)]
    assert 8 * max_nodes < min(spans) and max(spans) <= 64 * max_nodes
    monkeypatch.setattr(HDF5Forests, "_node_blocks",
                        lambda *a, **k: pytest.fail("node_id read a second time"))
    assert src.check(max_nodes, workers).checked


def test_check_of_sparse_ids_above_the_budget_streams_them(tmp_path, monkeypatch):
    path, g = _file(tmp_path, "a.h5", scale=10**10)
    monkeypatch.setattr(tio, "READ_BLOCK_ROWS", 100)
    calls = []
    real = HDF5Forests._node_blocks
    monkeypatch.setattr(HDF5Forests, "_node_blocks",
                        lambda self, *a, **k: calls.append(1) or real(self, *a, **k))
    assert open_forests(path, max_nodes=max(1, g.n_nodes // 7)).checked
    assert calls                                                # the previous search ran


@pytest.mark.parametrize("n_repeats", [0, 1, 40])
def test_streaming_search_reads_node_ids_twice_whatever_the_size(tmp_path, monkeypatch,
                                                                 n_repeats):
    # the search by hash buckets: two passes over node_id (count, then place), however
    # many buckets the budget asks for, and exactly the ids that occur more than once
    path, g = _file(tmp_path, "a.h5", scale=10**10)
    rng = np.random.default_rng(n_repeats)
    with h5py.File(path, "r+") as h5:
        ids = h5["nodes/node_id"][()]
        dst = rng.choice(ids.size, size=n_repeats, replace=False)
        ids[dst] = ids[rng.integers(0, ids.size, n_repeats)]
        h5["nodes/node_id"][...] = ids
    values, counts = np.unique(ids, return_counts=True)
    want = values[counts > 1]                                  # numpy's own count
    monkeypatch.setattr(tio, "READ_BLOCK_ROWS", 50)
    src = open_forests(path, check=False)
    calls = []
    real = HDF5Forests._node_blocks
    monkeypatch.setattr(HDF5Forests, "_node_blocks",
                        lambda self, *a, **k: calls.append(1) or real(self, *a, **k))
    n = ids.size
    for budget in (n // 12, n // 3, n - 1, n):                 # 2n/budget buckets; n: kept
        calls.clear()
        got = src._duplicate_node_ids(budget)
        assert len(calls) == (2 if budget < n else 1), budget
        np.testing.assert_array_equal(got, want)
        assert got.dtype == np.int64
