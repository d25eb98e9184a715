"""Validation of merger trees (DESIGN §5): every broken rule is caught and named.

Three layers:

1. one test per defect, each asserting the ``BhgrowInputError``'s ``.rule``, that the
   message names the source file and lists the offending ids; run through
   ``Forest.from_columns`` and through files (HDF5 written with h5py directly so it can be
   corrupted at will, CSV written with pandas);
2. hypothesis tests that corrupt valid, randomly shaped forests and require either a clean
   load or a ``BhgrowInputError`` -- never another exception -- and compare the verdict with
   an independent, deliberately slow pure-Python checker (:func:`reference_violations`):
   a load succeeds only if the reference finds no violation, and every rule the error
   names is one the reference found ("never a silent wrong load");
3. a hypothesis test that the derived indices of a valid forest (descendant rows, CSR
   progenitor lists, main progenitors, snapshot slices) match a pure-Python reference.

The reference checker is written from the rules in DESIGN §5 and the rule table of
:mod:`bhgrow.trees.validate`, with dicts and loops, sharing no code with the package.
"""

from __future__ import annotations

import math
import re
import tempfile
from collections import defaultdict
from pathlib import Path

import h5py
import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from bhgrow.errors import BhgrowInputError
from bhgrow.trees import Forest, load_forest, read_hdf5, read_table
from bhgrow.trees.validate import find_problems

REQUIRED = ("node_id", "desc_id", "forest_id", "snap", "mass_msun")
OPTIONAL = ("weight_mpc3", "vmax_kms", "rvir_kpc", "gas_msun", "metallicity", "j_lw")
ID_COLUMNS = ("node_id", "desc_id", "forest_id", "snap")

# ======================================================================== the valid forest
# Four snapshots; three forests. Forest 100 has two mergers, forest 200 has two progenitors
# of exactly equal mass (tie rule: lowest node_id is the main progenitor) and a node that
# skips a snapshot; forest 300's root ends before the last snapshot. Rows are deliberately
# not in (snap, forest, node) order.
SNAP_NUMS = np.array([0, 1, 2, 3])
SNAP_Z = np.array([6.0, 3.0, 1.0, 0.0])
ROWS = [  # node_id, desc_id, forest_id, snap, mass_msun
    (7008, 7006, 100, 0, 5.0e10),
    (7012, 7010, 200, 2, 3.0e11),
    (7001, -1, 100, 3, 1.0e12),
    (7021, 7020, 300, 1, 1.5e10),
    (7005, 7002, 100, 1, 1.0e11),
    (7003, 7001, 100, 2, 3.0e11),
    (7010, -1, 200, 3, 5.0e11),
    (7007, 7004, 100, 0, 1.0e11),
    (7002, 7001, 100, 2, 6.0e11),
    (7013, 7011, 200, 0, 1.0e10),
    (7006, 7003, 100, 1, 2.0e11),
    (7020, -1, 300, 2, 2.0e10),
    (7011, 7010, 200, 2, 3.0e11),
    (7004, 7002, 100, 1, 4.0e11),
]
FOREST_100 = [r[0] for r in ROWS if r[2] == 100]


def valid_columns() -> dict:
    """Fresh node columns of the small valid forest (bhgrow names, numpy arrays)."""
    cols = {name: np.array([r[k] for r in ROWS]) for k, name in enumerate(REQUIRED)}
    cols["mass_msun"] = cols["mass_msun"].astype(np.float64)
    return cols


def row_of(cols: dict, node_id: int) -> int:
    return int(np.flatnonzero(np.asarray(cols["node_id"]) == node_id)[0])


def set_value(cols: dict, node_id: int, column: str, value) -> dict:
    """Set ``column`` of the node with ``node_id`` (casting the column if needed)."""
    i = row_of(cols, node_id)
    arr = np.asarray(cols[column])
    arr = arr.astype(np.result_type(arr.dtype, np.asarray(value).dtype))
    arr[i] = value
    cols[column] = arr
    return cols


# ======================================================================== writers
def _h5_safe(arr):
    arr = np.asarray(arr)
    if arr.dtype.kind == "U":
        return arr.astype("S")  # h5py stores bytes, not numpy unicode
    if arr.dtype.kind == "O":
        return arr.astype("S")
    return arr


def write_h5(path: Path, columns: dict, snap_nums=SNAP_NUMS, snap_z=SNAP_Z, *,
             attrs: dict | None = None, forests: dict | None = None, mutate=None) -> Path:
    """Write bhgrow's HDF5 layout by hand with h5py, so any part can be broken."""
    with h5py.File(path, "w") as h5:
        h5.attrs["format"] = "bhgrow-forest"
        h5.attrs["schema_version"] = 1
        h5.attrs["box_mpc"] = 10.0
        for k, v in (attrs or {}).items():
            if v is None:
                del h5.attrs[k]
            else:
                h5.attrs[k] = v
        g = h5.create_group("nodes")
        for name, arr in columns.items():
            g.create_dataset(name, data=_h5_safe(arr))
        s = h5.create_group("snapshots")
        s.create_dataset("snap", data=_h5_safe(snap_nums))
        s.create_dataset("z", data=_h5_safe(snap_z))
        if forests is not None:
            f = h5.create_group("forests")
            for name, arr in forests.items():
                f.create_dataset(name, data=_h5_safe(arr))
        if mutate is not None:
            mutate(h5)
    return path


def write_csv_pair(path: Path, columns: dict, snap_nums=SNAP_NUMS, snap_z=SNAP_Z):
    """A node table plus a separate snapshot table (snap, z); returns both paths."""
    pd.DataFrame({k: np.asarray(v) for k, v in columns.items()}).to_csv(path, index=False)
    snaps = path.with_name(path.stem + "_snaps.csv")
    pd.DataFrame({"snap": np.asarray(snap_nums), "z": np.asarray(snap_z)}).to_csv(
        snaps, index=False)
    return path, snaps


def load_through(channel: str, tmp_path: Path, columns: dict, snap_nums=SNAP_NUMS,
                 snap_z=SNAP_Z):
    """Load the columns through one channel; return (forest, source) or raise."""
    if channel == "memory":
        source = "forest-under-test"
        return Forest.from_columns(columns, snap_nums, snap_z, source=source), source
    if channel == "hdf5":
        path = write_h5(tmp_path / "trees.h5", columns, snap_nums, snap_z)
        return load_forest(path), str(path)
    if channel == "csv":
        path, snaps = write_csv_pair(tmp_path / "trees.csv", columns, snap_nums, snap_z)
        return load_forest(path, snapshots=snaps), str(path)
    raise AssertionError(channel)


def source_of(channel: str, tmp_path: Path) -> str:
    return {"memory": "forest-under-test", "hdf5": str(tmp_path / "trees.h5"),
            "csv": str(tmp_path / "trees.csv")}[channel]


def rule_line(message: str, rule: str) -> str:
    """The message line tagged ``[rule]`` (validation lists one line per broken rule)."""
    lines = [ln for ln in message.splitlines() if f"[{rule}]" in ln]
    return lines[0] if lines else message


def contains_id(text: str, value) -> bool:
    return re.search(rf"(?<![\w.-]){re.escape(str(value))}(?![\w.])", text) is not None


def check_error(err: BhgrowInputError, rule: str, source: str, ids=(), words=()):
    """The error names the rule, the source file and the offending ids/words."""
    msg = str(err)
    assert err.rule == rule, msg
    assert source in msg, msg
    assert err.source in (None, source)
    assert "Traceback" not in msg
    line = rule_line(msg, rule)
    for i in ids:
        assert contains_id(line, i), f"id {i} not named in: {line}"
    for w in words:
        assert w in line, f"{w!r} not named in: {line}"


CHANNELS = ["memory", "hdf5", "csv"]


# ======================================================================== the valid case
@pytest.mark.parametrize("channel", CHANNELS)
def test_valid_forest_loads_through_every_channel(channel, tmp_path):
    forest, _ = load_through(channel, tmp_path, valid_columns())
    assert forest.n_nodes == len(ROWS)
    assert forest.forest_ids.tolist() == [100, 200, 300]
    got = sorted(zip(forest.node_id.tolist(), forest.desc_id.tolist(),
                     forest.forest_id.tolist(), forest.snap.tolist(),
                     forest.mass_msun.tolist()))
    assert got == sorted(ROWS)
    assert find_problems(valid_columns(), SNAP_NUMS, SNAP_Z) == []


def test_valid_forest_indices_by_hand():
    f = Forest.from_columns(valid_columns(), SNAP_NUMS, SNAP_Z)
    row = {int(n): i for i, n in enumerate(f.node_id)}

    def ids(rows):
        return [int(f.node_id[r]) for r in rows]

    # sorted by (snap, forest, node): the snapshot-0 slice holds 7007, 7008 then 7013
    assert ids(range(*f.snapshot_slice(0).indices(f.n_nodes))) == [7007, 7008, 7013]
    assert ids(f.progenitors(row[7001])) == [7002, 7003]          # most massive first
    assert ids(f.progenitors(row[7002])) == [7004, 7005]
    assert ids(f.progenitors(row[7010])) == [7011, 7012]          # equal mass: lowest id
    assert int(f.node_id[f.main_prog[row[7010]]]) == 7011
    assert ids(f.progenitors(row[7011])) == [7013]                # skips snapshot 1
    assert f.main_prog[row[7013]] == -1
    assert sorted(ids(f.roots)) == [7001, 7010, 7020]
    assert int(f.node_id[f.desc_index[row[7008]]]) == 7006


# ======================================================================== one test per defect
@pytest.mark.parametrize("channel", CHANNELS)
def test_duplicate_ids(channel, tmp_path):
    cols = set_value(valid_columns(), 7012, "node_id", 7011)
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, cols)
    check_error(e.value, "duplicate_ids", source_of(channel, tmp_path), ids=[7011])
    assert 7011 in e.value.rows


@pytest.mark.parametrize("channel", CHANNELS)
def test_missing_descendant(channel, tmp_path):
    cols = set_value(valid_columns(), 7008, "desc_id", 9999)
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, cols)
    check_error(e.value, "missing_descendants", source_of(channel, tmp_path), ids=[7008])


def test_descendant_below_minus_one_is_missing_not_a_root():
    cols = set_value(valid_columns(), 7008, "desc_id", -2)
    with pytest.raises(BhgrowInputError) as e:
        Forest.from_columns(cols, SNAP_NUMS, SNAP_Z, source="mem")
    check_error(e.value, "missing_descendants", "mem", ids=[7008])


@pytest.mark.parametrize("channel", CHANNELS)
@pytest.mark.parametrize("node, desc", [(7005, 7008),   # descendant at an earlier snapshot
                                        (7002, 7003)])  # descendant at the same snapshot
def test_descendant_not_later(channel, node, desc, tmp_path):
    cols = set_value(valid_columns(), node, "desc_id", desc)
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, cols)
    check_error(e.value, "descendant_not_later", source_of(channel, tmp_path), ids=[node])


@pytest.mark.parametrize("channel", CHANNELS)
def test_cycle_self_link(channel, tmp_path):
    cols = set_value(valid_columns(), 7001, "desc_id", 7001)
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, cols)
    check_error(e.value, "cycles", source_of(channel, tmp_path), ids=[7001])


@pytest.mark.parametrize("channel", CHANNELS)
def test_cycle_through_several_nodes(channel, tmp_path):
    # root 7001 points back to 7007: 7001 -> 7007 -> 7004 -> 7002 -> 7001. Any cycle
    # longer than one node also has a link back in time, and that rule is listed first.
    cols = set_value(valid_columns(), 7001, "desc_id", 7007)
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, cols)
    check_error(e.value, "descendant_not_later", source_of(channel, tmp_path), ids=[7001])
    assert "[cycles]" in str(e.value)
    cyc = [p for p in find_problems(cols, SNAP_NUMS, SNAP_Z) if p.rule == "cycles"]
    assert len(cyc) == 1
    # every node of forest 100 lies on the loop or leads into it; no other forest does
    assert sorted(cyc[0].ids) == sorted(FOREST_100)
    assert cyc[0].count == len(FOREST_100)


def test_long_chain_and_long_cycle():
    """Pointer doubling must follow chains as long as the file (no depth limit)."""
    n = 100_000
    snaps = np.arange(n)
    z = np.linspace(30.0, 0.0, n)
    cols = {"node_id": np.arange(n), "desc_id": np.r_[np.arange(1, n), -1],
            "forest_id": np.zeros(n, np.int64), "snap": snaps,
            "mass_msun": np.linspace(1e8, 1e12, n)}
    f = Forest.from_columns(cols, snaps, z)
    assert f.roots.tolist() == [n - 1]
    cols["desc_id"] = np.r_[np.arange(1, n), 0]  # the last node closes the loop
    problems = find_problems(cols, snaps, z)
    cyc = [p for p in problems if p.rule == "cycles"]
    assert cyc and cyc[0].count == n
    assert {p.rule for p in problems} == {"descendant_not_later", "cycles"}
    back = [p for p in problems if p.rule == "descendant_not_later"]
    assert back[0].ids == (n - 1,)


@pytest.mark.parametrize("channel", CHANNELS)
@pytest.mark.parametrize("how", ["other_forest_desc", "other_forest_id"])
def test_cross_forest_links(channel, how, tmp_path):
    if how == "other_forest_desc":   # 7013 (forest 200, snap 0) -> 7004 (forest 100, snap 1)
        cols, bad = set_value(valid_columns(), 7013, "desc_id", 7004), 7013
    else:                            # 7021 relabelled into forest 100; its desc is in 300
        cols, bad = set_value(valid_columns(), 7021, "forest_id", 100), 7021
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, cols)
    check_error(e.value, "cross_forest_links", source_of(channel, tmp_path), ids=[bad])


@pytest.mark.parametrize("channel", CHANNELS)
@pytest.mark.parametrize("mass", [np.nan, np.inf, -np.inf, 0.0, -1.0])
def test_bad_mass(channel, mass, tmp_path):
    cols = set_value(valid_columns(), 7005, "mass_msun", mass)
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, cols)
    check_error(e.value, "bad_mass", source_of(channel, tmp_path), ids=[7005])


@pytest.mark.parametrize("channel", CHANNELS)
def test_unknown_snapshot_of_a_node(channel, tmp_path):
    cols = set_value(valid_columns(), 7021, "snap", 5)
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, cols)
    check_error(e.value, "unknown_snapshots", source_of(channel, tmp_path), ids=[7021])


@pytest.mark.parametrize("channel", CHANNELS)
def test_snapshot_missing_from_table(channel, tmp_path):
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, valid_columns(), SNAP_NUMS[[0, 2, 3]],
                     SNAP_Z[[0, 2, 3]])
    check_error(e.value, "unknown_snapshots", source_of(channel, tmp_path),
                ids=[7004, 7005, 7006, 7021])
    assert e.value.rows and set(e.value.rows) == {7004, 7005, 7006, 7021}


@pytest.mark.parametrize("channel", CHANNELS)
@pytest.mark.parametrize("column", REQUIRED)
def test_missing_column(channel, column, tmp_path):
    cols = valid_columns()
    del cols[column]
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, cols)
    check_error(e.value, "missing_columns", source_of(channel, tmp_path),
                words=[f"`{column}`"])


@pytest.mark.parametrize("channel", ["memory", "hdf5"])
@pytest.mark.parametrize("column", ID_COLUMNS + ("mass_msun",))
def test_wrong_dtype_strings(channel, column, tmp_path):
    cols = valid_columns()
    cols[column] = np.array([f"h{v}" for v in cols[column]])
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, cols)
    check_error(e.value, "wrong_dtype", source_of(channel, tmp_path), words=[column])


def test_wrong_dtype_strings_in_csv(tmp_path):
    cols = valid_columns()
    cols["desc_id"] = np.array([f"h{v}" for v in cols["desc_id"]])
    with pytest.raises(BhgrowInputError) as e:
        load_through("csv", tmp_path, cols)
    check_error(e.value, "wrong_dtype", source_of("csv", tmp_path), words=["desc_id"])


@pytest.mark.parametrize("channel", CHANNELS)
@pytest.mark.parametrize("column", ID_COLUMNS)
@pytest.mark.parametrize("value", [0.5, np.nan])
def test_wrong_dtype_fraction_or_missing_in_id_column(channel, column, value, tmp_path):
    cols = valid_columns()
    i = row_of(cols, 7008)
    arr = cols[column].astype(np.float64)
    arr[i] = arr[i] + value
    cols[column] = arr
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, cols)
    # a non-integer id cannot be quoted as an id: the message names the row instead
    check_error(e.value, "wrong_dtype", source_of(channel, tmp_path), ids=[i],
                words=[f"`{column}`", "rows"])


@pytest.mark.parametrize("channel", ["memory", "hdf5"])
def test_wrong_dtype_booleans(channel, tmp_path):
    cols = valid_columns()
    cols["snap"] = cols["snap"] > 1
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, cols)
    check_error(e.value, "wrong_dtype", source_of(channel, tmp_path), words=["snap"])


@pytest.mark.parametrize("channel", CHANNELS)
def test_integral_floats_are_accepted_as_ids(channel, tmp_path):
    cols = {k: np.asarray(v, dtype=np.float64) for k, v in valid_columns().items()}
    forest, _ = load_through(channel, tmp_path, cols)
    assert forest.node_id.dtype == np.int64
    assert sorted(forest.node_id.tolist()) == sorted(r[0] for r in ROWS)


def test_ids_beyond_float_precision_are_refused():
    cols = valid_columns()
    cols["node_id"] = cols["node_id"].astype(np.float64)
    cols["node_id"][row_of(cols, 7021)] = 2.0**60  # not exactly representable as an id
    with pytest.raises(BhgrowInputError) as e:
        Forest.from_columns(cols, SNAP_NUMS, SNAP_Z, source="mem")
    check_error(e.value, "wrong_dtype", "mem", words=["node_id"])


def test_columns_of_different_length():
    cols = valid_columns()
    cols["mass_msun"] = cols["mass_msun"][:-1]
    with pytest.raises(BhgrowInputError) as e:
        Forest.from_columns(cols, SNAP_NUMS, SNAP_Z, source="mem")
    check_error(e.value, "wrong_dtype", "mem", words=["`mass_msun`=13", "`node_id`=14"])


@pytest.mark.parametrize("channel", CHANNELS)
def test_empty(channel, tmp_path):
    cols = {k: v[:0] for k, v in valid_columns().items()}
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, cols)
    check_error(e.value, "empty", source_of(channel, tmp_path))


@pytest.mark.parametrize("content", ["", "node_id,desc_id,forest_id,snap,mass_msun,z\n"])
def test_empty_csv_file(content, tmp_path):
    path = tmp_path / "empty.csv"
    path.write_text(content)
    with pytest.raises(BhgrowInputError) as e:
        load_forest(path)
    check_error(e.value, "empty", str(path))


@pytest.mark.parametrize("channel", CHANNELS)
def test_negative_ids(channel, tmp_path):
    cols = set_value(valid_columns(), 7021, "node_id", -21)  # 7021 is a leaf
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, cols)
    check_error(e.value, "negative_ids", source_of(channel, tmp_path), ids=[-21])


@pytest.mark.parametrize("channel", CHANNELS)
@pytest.mark.parametrize("case", ["repeated", "negative_z", "nan_z", "z_increases",
                                  "equal_z", "length", "empty_table"])
def test_bad_snapshot_table(channel, case, tmp_path):
    s, z, ids = SNAP_NUMS.copy(), SNAP_Z.copy(), []
    if case == "repeated":
        s = np.array([0, 1, 1, 2, 3])
        z = np.array([6.0, 3.0, 3.0, 1.0, 0.0])
        ids = [1]
    elif case == "negative_z":
        z[3], ids = -0.5, [3]
    elif case == "nan_z":
        z[2], ids = np.nan, [2]
    elif case == "z_increases":
        z[[1, 2]], ids = z[[2, 1]], [2]
    elif case == "equal_z":
        z[2], ids = z[1], [2]
    elif case == "length":
        if channel == "csv":
            pytest.skip("a two-column CSV table cannot hold columns of unequal length")
        z = z[:-1]
    elif case == "empty_table":
        s, z = s[:0], z[:0].astype(np.float64)
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, valid_columns(), s, z)
    check_error(e.value, "bad_snapshot_table", source_of(channel, tmp_path), ids=ids)


def test_snapshot_table_dataset_missing_from_hdf5(tmp_path):
    path = write_h5(tmp_path / "t.h5", valid_columns(), mutate=lambda h: h.__delitem__(
        "snapshots/z"))
    with pytest.raises(BhgrowInputError) as e:
        read_hdf5(path)
    check_error(e.value, "bad_snapshot_table", str(path), words=["/snapshots/z"])


def test_snapshot_table_order_does_not_matter():
    perm = np.array([2, 0, 3, 1])
    f = Forest.from_columns(valid_columns(), SNAP_NUMS[perm], SNAP_Z[perm])
    assert f.snapshots.snap.tolist() == [0, 1, 2, 3]
    assert f.snapshots.z.tolist() == SNAP_Z.tolist()


# ------------------------------------------------------------------ weights
def with_weights(weights_by_forest: dict) -> dict:
    cols = valid_columns()
    cols["weight_mpc3"] = np.array([weights_by_forest[f] for f in cols["forest_id"]],
                                   dtype=np.float64)
    return cols


@pytest.mark.parametrize("channel", CHANNELS)
def test_good_weights(channel, tmp_path):
    forest, _ = load_through(channel, tmp_path, with_weights({100: 1e-3, 200: 2e-3,
                                                                 300: 0.0}))
    assert forest.forest_weight.tolist() == [1e-3, 2e-3, 0.0]
    assert "weight_mpc3" not in forest.extra


@pytest.mark.parametrize("channel", CHANNELS)
@pytest.mark.parametrize("value", [np.nan, np.inf, -1e-3])
def test_bad_weight_values(channel, value, tmp_path):
    cols = set_value(with_weights({100: 1e-3, 200: 2e-3, 300: 3e-3}), 7013, "weight_mpc3",
                     value)
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, cols)
    check_error(e.value, "bad_weights", source_of(channel, tmp_path), ids=[7013])


@pytest.mark.parametrize("channel", CHANNELS)
def test_weight_not_constant_within_forest(channel, tmp_path):
    cols = set_value(with_weights({100: 1e-3, 200: 2e-3, 300: 3e-3}), 7013, "weight_mpc3",
                     5e-3)
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, cols)
    check_error(e.value, "bad_weights", source_of(channel, tmp_path), ids=[200])


@pytest.mark.parametrize("table, rule, ids", [
    ({"forest_id": [100, 200], "weight_mpc3": [1.0, 2.0]}, "bad_weights", [300]),  # lacks one
    ({"forest_id": [100, 200, 300], "weight_mpc3": [1.0, np.nan, 2.0]}, "bad_weights", [200]),
    ({"forest_id": [100, 200, 300], "weight_mpc3": [1.0, -2.0, 2.0]}, "bad_weights", [200]),
    ({"forest_id": [100, 200, 300, 200], "weight_mpc3": [1.0, 2.0, 3.0, 4.0]}, "bad_weights",
     [200]),                                                              # repeated forest
    ({"forest_id": [100.0, 200.5, 300.0], "weight_mpc3": [1.0, 2.0, 3.0]}, "bad_weights",
     [1]),                                                                # row 1: not an id
    ({"forest_id": [100, 200, 300], "weight_mpc3": [b"a", b"b", b"c"]}, "wrong_dtype", []),
    ({"forest_id": [100, 200, 300]}, "bad_weights", []),                  # no weights at all
])
def test_bad_forest_weight_table_in_hdf5(table, rule, ids, tmp_path):
    path = write_h5(tmp_path / "w.h5", valid_columns(),
                    forests={k: np.asarray(v) for k, v in table.items()})
    with pytest.raises(BhgrowInputError) as e:
        read_hdf5(path)
    check_error(e.value, rule, str(path), ids=ids)


def test_forest_weight_table_in_hdf5_is_aligned_with_forests(tmp_path):
    path = write_h5(tmp_path / "w.h5", valid_columns(),
                    forests={"forest_id": np.array([300, 100, 200, 999]),
                             "weight_mpc3": np.array([3.0, 1.0, 2.0, 9.0])})
    f = read_hdf5(path)
    assert f.forest_ids.tolist() == [100, 200, 300]
    assert f.forest_weight.tolist() == [1.0, 2.0, 3.0]


def test_bad_forest_weight_dict_in_memory():
    with pytest.raises(BhgrowInputError) as e:
        Forest.from_columns(valid_columns(), SNAP_NUMS, SNAP_Z, source="mem",
                            forest_weight={"forest_id": np.array(["a", "b", "c"]),
                                           "weight_mpc3": np.ones(3)})
    check_error(e.value, "bad_weights", "mem", words=["forest_id"])


# ------------------------------------------------------------------ optional columns
@pytest.mark.parametrize("channel", CHANNELS)
@pytest.mark.parametrize("column, value", [("gas_msun", -1.0), ("metallicity", np.nan),
                                           ("vmax_kms", np.inf), ("rvir_kpc", -3.0),
                                           ("j_lw", -np.inf)])
def test_bad_optional_values(channel, column, value, tmp_path):
    cols = valid_columns()
    cols[column] = np.full(len(ROWS), 0.5)
    cols = set_value(cols, 7003, column, value)
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, cols)
    check_error(e.value, "bad_optional_values", source_of(channel, tmp_path), ids=[7003],
                words=[column])


def test_optional_column_with_strings(tmp_path):
    cols = valid_columns()
    cols["gas_msun"] = np.array(["lots"] * len(ROWS))
    with pytest.raises(BhgrowInputError) as e:
        Forest.from_columns(cols, SNAP_NUMS, SNAP_Z, source="mem")
    check_error(e.value, "wrong_dtype", "mem", words=["gas_msun"])


def test_optional_columns_follow_their_nodes():
    cols = valid_columns()
    cols["gas_msun"] = cols["mass_msun"] * 0.1
    f = Forest.from_columns(cols, SNAP_NUMS, SNAP_Z)
    assert np.array_equal(f.extra["gas_msun"], f.mass_msun * 0.1)


# ------------------------------------------------------------------ unknown columns, layout
@pytest.mark.parametrize("channel", ["memory", "hdf5"])
def test_unknown_column(channel, tmp_path):
    cols = valid_columns()
    cols["spin_param"] = np.zeros(len(ROWS))
    with pytest.raises(BhgrowInputError) as e:
        load_through(channel, tmp_path, cols)
    check_error(e.value, "unknown_columns", source_of(channel, tmp_path),
                words=["spin_param"])


def test_csv_ignores_columns_it_was_not_asked_for(tmp_path):
    cols = valid_columns()
    cols["spin_param"] = np.zeros(len(ROWS))
    forest, _ = load_through("csv", tmp_path, cols)
    assert forest.n_nodes == len(ROWS) and forest.extra == {}


def test_not_an_hdf5_file(tmp_path):
    path = tmp_path / "notes.h5"
    path.write_text("node_id,desc_id\n1,-1\n")
    with pytest.raises(BhgrowInputError) as e:
        load_forest(path)
    check_error(e.value, "not_hdf5", str(path))


@pytest.mark.parametrize("fmt", ["some-other-format", None, np.array([1, 2])])
def test_wrong_format_attribute(fmt, tmp_path):
    path = write_h5(tmp_path / "t.h5", valid_columns(), attrs={"format": fmt})
    with pytest.raises(BhgrowInputError) as e:
        load_forest(path)
    check_error(e.value, "wrong_format", str(path), words=["bhgrow-forest"])


@pytest.mark.parametrize("version", [2, "one", None])
def test_unsupported_schema_version(version, tmp_path):
    path = write_h5(tmp_path / "t.h5", valid_columns(), attrs={"schema_version": version})
    with pytest.raises(BhgrowInputError) as e:
        load_forest(path)
    check_error(e.value, "schema_version", str(path))


@pytest.mark.parametrize("box", [-1.0, np.nan, "big", np.array([1.0, 2.0])])
def test_bad_box_attribute(box, tmp_path):
    path = write_h5(tmp_path / "t.h5", valid_columns(), attrs={"box_mpc": box})
    with pytest.raises(BhgrowInputError) as e:
        load_forest(path)
    check_error(e.value, "bad_box", str(path))


def test_meta_that_is_not_a_json_object_is_ignored(tmp_path):
    path = write_h5(tmp_path / "t.h5", valid_columns(), attrs={"meta_json": "[1, 2]"})
    assert load_forest(path).meta["source_file"] == str(path)


def test_two_dimensional_dataset(tmp_path):
    cols = valid_columns()
    cols["mass_msun"] = np.stack([cols["mass_msun"], cols["mass_msun"]], axis=1)
    path = write_h5(tmp_path / "t.h5", cols)
    with pytest.raises(BhgrowInputError) as e:
        load_forest(path)
    check_error(e.value, "wrong_layout", str(path), words=["mass_msun", "(14, 2)"])


@pytest.mark.parametrize("shape", ["2d", "scalar"])
def test_column_not_one_dimensional_in_memory(shape):
    cols = valid_columns()
    if shape == "2d":
        cols["mass_msun"] = np.stack([cols["mass_msun"]] * 2, axis=1)
    else:
        cols = {k: v[:1] for k, v in cols.items()}
        cols["mass_msun"] = np.float64(1e10)
    with pytest.raises(BhgrowInputError) as e:
        Forest.from_columns(cols, SNAP_NUMS, SNAP_Z, source="mem")
    check_error(e.value, "wrong_layout", "mem", words=["mass_msun"])


@pytest.mark.parametrize("group", ["nodes", "snapshots", "forests"])
def test_group_replaced_by_a_dataset(group, tmp_path):
    def mutate(h5):
        if group in h5:
            del h5[group]
        h5[group] = np.int64(3)

    path = write_h5(tmp_path / "t.h5", valid_columns(), mutate=mutate)
    with pytest.raises(BhgrowInputError) as e:
        load_forest(path)
    check_error(e.value, "wrong_layout", str(path), words=[f"/{group}"])


def test_missing_group(tmp_path):
    path = write_h5(tmp_path / "t.h5", valid_columns(),
                    mutate=lambda h: h.__delitem__("nodes"))
    with pytest.raises(BhgrowInputError) as e:
        load_forest(path)
    check_error(e.value, "missing_columns", str(path), words=["/nodes"])


def test_dataset_of_strings_in_hdf5(tmp_path):
    def mutate(h5):
        del h5["nodes/mass_msun"]
        h5.create_dataset("nodes/mass_msun", data=np.array(["x"] * len(ROWS), dtype=object),
                          dtype=h5py.string_dtype())

    path = write_h5(tmp_path / "t.h5", valid_columns(), mutate=mutate)
    with pytest.raises(BhgrowInputError) as e:
        load_forest(path)
    check_error(e.value, "wrong_dtype", str(path), words=["mass_msun"])


# ------------------------------------------------------------------ CSV specifics
def test_csv_with_per_node_redshift_column(tmp_path):
    cols = valid_columns()
    cols["z"] = SNAP_Z[cols["snap"]]
    path = tmp_path / "z.csv"
    pd.DataFrame(cols).to_csv(path, index=False)
    f = read_table(path)
    assert f.snapshots.snap.tolist() == [0, 1, 2, 3]
    assert f.snapshots.z.tolist() == SNAP_Z.tolist()


def test_csv_redshift_column_disagreeing_within_a_snapshot(tmp_path):
    cols = valid_columns()
    cols["z"] = SNAP_Z[cols["snap"]]
    cols["z"][row_of(cols, 7005)] = 2.5  # snapshot 1 has z = 3 elsewhere
    path = tmp_path / "z.csv"
    pd.DataFrame(cols).to_csv(path, index=False)
    with pytest.raises(BhgrowInputError) as e:
        read_table(path)
    check_error(e.value, "bad_snapshot_table", str(path), ids=[1])


def test_csv_column_map_to_absent_column(tmp_path):
    path, snaps = write_csv_pair(tmp_path / "t.csv", valid_columns())
    with pytest.raises(BhgrowInputError) as e:
        read_table(path, columns={"mass_msun": "MVIR"}, snapshots=snaps)
    check_error(e.value, "missing_columns", str(path), words=["mass_msun=MVIR"])


def test_csv_that_cannot_be_parsed(tmp_path):
    path = tmp_path / "bad.csv"
    path.write_text("node_id,desc_id,forest_id,snap,mass_msun,z\n1,-1,0,1,1e10,0\n"
                    "2,1,0,0,5e9,1,7,8\n")
    with pytest.raises(BhgrowInputError) as e:
        read_table(path)
    check_error(e.value, "unparsable", str(path))


def test_h_conversion_of_table(tmp_path):
    cols = with_weights({100: 1e-3, 200: 2e-3, 300: 3e-3})
    cols["rvir_kpc"] = np.full(len(ROWS), 70.0)
    cols["vmax_kms"] = np.full(len(ROWS), 100.0)
    path, snaps = write_csv_pair(tmp_path / "t.csv", cols)
    h = 0.7
    f = read_table(path, snapshots=snaps, h=h, box_mpc=70.0)
    plain = Forest.from_columns(valid_columns(), SNAP_NUMS, SNAP_Z)
    # X [Msun/h] = X/h Msun; L [kpc/h] = L/h kpc; n [(Mpc/h)^-3] = n h^3 Mpc^-3
    np.testing.assert_allclose(f.mass_msun, plain.mass_msun / h, rtol=1e-15)
    np.testing.assert_allclose(f.extra["rvir_kpc"], 70.0 / h, rtol=1e-15)
    np.testing.assert_allclose(f.extra["vmax_kms"], 100.0, rtol=0)  # velocities: no h
    np.testing.assert_allclose(f.forest_weight, np.array([1e-3, 2e-3, 3e-3]) * h**3,
                               rtol=1e-15)
    assert f.box_mpc == pytest.approx(100.0, rel=1e-15)
    assert f.meta["source_h"] == h


# ======================================================================== reference checker
def _ref_ints(values):
    """Python ints of an id column, or None if the column cannot hold ids."""
    arr = np.asarray(values)
    if arr.dtype.kind in "iu":
        return [int(v) for v in arr.tolist()]
    if arr.dtype.kind != "f":
        return None  # strings, booleans, objects, ...
    out = []
    for v in arr.tolist():
        if not math.isfinite(v) or v != math.floor(v) or abs(v) > 2.0**53:
            return None
        out.append(int(v))
    return out


def _ref_floats(values):
    arr = np.asarray(values)
    if arr.dtype.kind in "iuf":
        return [float(v) for v in arr.tolist()]
    return None


def reference_violations(columns: dict, snap_nums, snap_z) -> set:
    """Every rule of DESIGN §5 that the input breaks, decided by loops over nodes.

    Deliberately naive and independent of bhgrow: dicts, lists, explicit chain walks.
    When an id column is unusable the structural rules cannot be judged and are skipped.
    """
    out = set()
    if set(columns) - set(REQUIRED) - set(OPTIONAL):
        out.add("unknown_columns")
    if any(c not in columns for c in REQUIRED):
        out.add("missing_columns")
    if out:  # cannot judge further; a reader may also refuse a non-numeric column first
        if any(np.asarray(v).dtype.kind not in "iuf" for v in columns.values()):
            out.add("wrong_dtype")
        return out
    if any(np.ndim(v) != 1 for v in columns.values()):
        return {"wrong_layout"}
    lengths = {len(v) for v in columns.values()}
    if len(lengths) > 1:
        return {"wrong_dtype"}
    n = lengths.pop()
    if n == 0:
        return {"empty"}

    ids = {c: _ref_ints(columns[c]) for c in ID_COLUMNS}
    if any(v is None for v in ids.values()):
        out.add("wrong_dtype")
    mass = _ref_floats(columns["mass_msun"])
    if mass is None:
        out.add("wrong_dtype")
    elif any(not math.isfinite(m) or m <= 0 for m in mass):
        out.add("bad_mass")
    for name in OPTIONAL:
        if name not in columns:
            continue
        vals = _ref_floats(columns[name])
        rule = "bad_weights" if name == "weight_mpc3" else "bad_optional_values"
        if vals is None:
            out.add("wrong_dtype")
        elif any(not math.isfinite(x) or x < 0 for x in vals):
            out.add(rule)
        elif name == "weight_mpc3" and ids["forest_id"] is not None:
            per_forest = defaultdict(set)
            for f, w in zip(ids["forest_id"], vals):
                per_forest[f].add(w)
            if any(len(ws) > 1 for ws in per_forest.values()):
                out.add("bad_weights")

    # the snapshot table
    tab_s, tab_z = _ref_ints(snap_nums), _ref_floats(snap_z)
    if tab_s is None or tab_z is None:
        out.add("wrong_dtype")
    elif len(tab_s) != len(tab_z) or not tab_s:
        out.add("bad_snapshot_table")
    else:
        if len(set(tab_s)) != len(tab_s):
            out.add("bad_snapshot_table")
        if any(not math.isfinite(z) or z < 0 for z in tab_z):
            out.add("bad_snapshot_table")
        pairs = sorted(zip(tab_s, tab_z))
        for (s0, z0), (s1, z1) in zip(pairs, pairs[1:]):
            if s1 != s0 and not z1 < z0:  # later snapshot must be at lower redshift
                out.add("bad_snapshot_table")
    known_snaps = set(tab_s or [])

    if any(v is None for v in ids.values()):
        return out
    node, desc, forest, snap = (ids[c] for c in ID_COLUMNS)
    rows_of = defaultdict(list)
    for i, x in enumerate(node):
        rows_of[x].append(i)
    if any(x < 0 for x in node):
        out.add("negative_ids")
    if any(len(r) > 1 for r in rows_of.values()):
        out.add("duplicate_ids")
    if any(s not in known_snaps for s in snap):
        out.add("unknown_snapshots")
    for i in range(n):
        d = desc[i]
        if d == -1:
            continue
        if d not in rows_of:
            out.add("missing_descendants")
            continue
        if d == node[i]:
            out.add("cycles")
        for j in rows_of[d]:  # with repeated ids, any reading of the link counts
            if j != i and not snap[j] > snap[i]:
                out.add("descendant_not_later")
            if forest[j] != forest[i]:
                out.add("cross_forest_links")
    for i in range(n):  # walk every chain; a revisited node means it never ends
        seen, cur = {i}, i
        while desc[cur] != -1 and desc[cur] in rows_of:
            cur = rows_of[desc[cur]][0]
            if cur in seen:
                out.add("cycles")
                break
            seen.add(cur)
    return out


def reference_rows(columns: dict) -> list:
    """Sorted (node, desc, forest, snap, mass) tuples of input judged valid."""
    node, desc, forest, snap = (_ref_ints(columns[c]) for c in ID_COLUMNS)
    mass = _ref_floats(columns["mass_msun"])
    return sorted(zip(node, desc, forest, snap, mass))


def forest_rows(f: Forest) -> list:
    return sorted(zip(f.node_id.tolist(), f.desc_id.tolist(), f.forest_id.tolist(),
                      f.snap.tolist(), f.mass_msun.tolist()))


def test_reference_checker_agrees_on_the_hand_made_defects():
    """The reference must itself see each defect the unit tests above plant."""
    good = valid_columns()
    assert reference_violations(good, SNAP_NUMS, SNAP_Z) == set()
    cases = [
        (set_value(valid_columns(), 7012, "node_id", 7011), "duplicate_ids"),
        (set_value(valid_columns(), 7008, "desc_id", 9999), "missing_descendants"),
        (set_value(valid_columns(), 7005, "desc_id", 7008), "descendant_not_later"),
        (set_value(valid_columns(), 7001, "desc_id", 7001), "cycles"),
        (set_value(valid_columns(), 7001, "desc_id", 7007), "cycles"),
        (set_value(valid_columns(), 7013, "desc_id", 7004), "cross_forest_links"),
        (set_value(valid_columns(), 7005, "mass_msun", np.nan), "bad_mass"),
        (set_value(valid_columns(), 7021, "snap", 5), "unknown_snapshots"),
        (set_value(valid_columns(), 7021, "node_id", -21), "negative_ids"),
    ]
    for cols, rule in cases:
        assert rule in reference_violations(cols, SNAP_NUMS, SNAP_Z), rule
        assert rule in {p.rule for p in find_problems(cols, SNAP_NUMS, SNAP_Z)}, rule


# ======================================================================== hypothesis
MASSES = [1e8, 2e8, 5e8, 1e9, 3e9, 1e10]  # few values, so equal-mass ties are common


@st.composite
def valid_forests(draw, max_forests: int = 4, max_snaps: int = 6, max_per_snap: int = 3):
    """Random valid forests: any shape, skipped snapshots, early roots, mass ties."""
    n_snap = draw(st.integers(2, max_snaps))
    snap_nums = sorted(draw(st.lists(st.integers(0, 60), min_size=n_snap, max_size=n_snap,
                                     unique=True)))
    zs = sorted(draw(st.lists(st.floats(0.0, 20.0), min_size=n_snap, max_size=n_snap,
                              unique=True)), reverse=True)
    n_forests = draw(st.integers(1, max_forests))
    fids = draw(st.lists(st.integers(0, 10**6), min_size=n_forests, max_size=n_forests,
                         unique=True))
    nodes = []  # (local index, desc local index or -1, forest, snap, mass)
    for fid in fids:
        members = []  # (local index, snapshot position)
        for k in range(n_snap - 1, -1, -1):
            count = draw(st.integers(1 if k == n_snap - 1 else 0, max_per_snap))
            later = [m for m in members if m[1] > k]
            for _ in range(count):
                pick = draw(st.integers(-1, len(later) - 1))
                desc = later[pick][0] if pick >= 0 else -1
                me = len(nodes)
                nodes.append((me, desc, fid, snap_nums[k], draw(st.sampled_from(MASSES))))
                members.append((me, k))
    n = len(nodes)
    node_ids = draw(st.lists(st.integers(0, 2**40), min_size=n, max_size=n, unique=True))
    order = draw(st.permutations(range(n)))
    rows = [nodes[i] for i in order]
    cols = {"node_id": np.array([node_ids[r[0]] for r in rows], dtype=np.int64),
            "desc_id": np.array([node_ids[r[1]] if r[1] >= 0 else -1 for r in rows],
                                dtype=np.int64),
            "forest_id": np.array([r[2] for r in rows], dtype=np.int64),
            "snap": np.array([r[3] for r in rows], dtype=np.int64),
            "mass_msun": np.array([r[4] for r in rows], dtype=np.float64)}
    if draw(st.booleans()):
        w = {f: draw(st.floats(0.0, 1.0)) for f in fids}
        cols["weight_mpc3"] = np.array([w[f] for f in cols["forest_id"]], dtype=np.float64)
    if draw(st.booleans()):
        cols["gas_msun"] = np.array(
            [draw(st.floats(0.0, 1e10)) for _ in range(n)], dtype=np.float64)
    table_order = draw(st.permutations(range(n_snap)))
    return (cols, np.array(snap_nums)[list(table_order)],
            np.array(zs, dtype=np.float64)[list(table_order)])


CORRUPTIONS = ["desc_random", "desc_other_forest", "desc_self", "desc_same_or_earlier",
               "desc_any_node", "dup_id", "neg_id", "mass", "drop_column", "snap_any",
               "forest_change", "dtype_str", "dtype_frac", "dtype_integral_float",
               "nan_in_id", "dtype_bool", "truncate", "shorten_column", "table_dup",
               "table_bad_z", "table_swap", "table_equal_z", "table_drop", "weight_vary",
               "weight_bad",
               "gas_bad", "unknown_column", "none"]


@st.composite
def corrupted_forests(draw, allow_unknown_column: bool = True, max_corruptions: int = 3):
    """A valid forest with random corruptions applied (some of which are harmless)."""
    cols, s, z = draw(valid_forests())
    cols = {k: list(v.tolist()) for k, v in cols.items()}  # lists take any value
    s, z = list(s.tolist()), list(z.tolist())
    kinds = draw(st.lists(st.sampled_from(CORRUPTIONS if allow_unknown_column else
                                          [c for c in CORRUPTIONS if c != "unknown_column"]),
                          min_size=1, max_size=max_corruptions))
    def put(name, value):  # set one cell, if the column still has that row
        if name in cols and row < len(cols[name]):
            cols[name][row] = value

    def plain_int(v):
        return isinstance(v, int) and not isinstance(v, bool)

    for kind in kinds:
        n = len(cols["node_id"]) if "node_id" in cols else 0
        has = all(c in cols and len(cols[c]) == n and all(plain_int(v) for v in cols[c])
                  for c in ID_COLUMNS)
        row = draw(st.integers(0, max(n - 1, 0)))
        if kind == "none" or n == 0:
            continue
        if kind.startswith("desc_") and has:
            node, forest, snap = cols["node_id"], cols["forest_id"], cols["snap"]
            if kind == "desc_random":
                cols["desc_id"][row] = draw(st.integers(-3, 2**40 + 3))
            elif kind == "desc_self":
                cols["desc_id"][row] = node[row]
            elif kind == "desc_any_node":
                cols["desc_id"][row] = node[draw(st.integers(0, n - 1))]
            elif kind == "desc_other_forest":
                other = [i for i in range(n) if forest[i] != forest[row]]
                if other:
                    cols["desc_id"][row] = node[draw(st.sampled_from(other))]
            elif kind == "desc_same_or_earlier":
                cand = [i for i in range(n) if forest[i] == forest[row]
                        and snap[i] <= snap[row]]
                cols["desc_id"][row] = node[draw(st.sampled_from(cand))]
        elif kind == "dup_id" and "node_id" in cols:
            put("node_id", cols["node_id"][draw(st.integers(0, n - 1))])
        elif kind == "neg_id":
            put("node_id", -draw(st.integers(1, 5)))
        elif kind == "mass":
            put("mass_msun", draw(st.sampled_from(
                [math.nan, math.inf, -math.inf, 0.0, -1.0, 1e-30, 1e30])))
        elif kind == "drop_column":
            del cols[draw(st.sampled_from(sorted(cols)))]
        elif kind == "snap_any":
            put("snap", draw(st.integers(-1, 62)))
        elif kind == "forest_change":
            put("forest_id", draw(st.integers(0, 10**6)))
        elif kind in ("dtype_str", "dtype_frac", "dtype_integral_float", "nan_in_id",
                      "dtype_bool"):
            name = draw(st.sampled_from(sorted(cols)))
            col = cols[name]
            if kind == "dtype_str":
                cols[name] = [f"x{v}" for v in col]
            elif kind == "dtype_frac":
                if row < len(col) and isinstance(col[row], (int, float)):
                    put(name, col[row] + 0.5)
            elif kind == "dtype_integral_float":
                if all(plain_int(v) for v in col):
                    cols[name] = [float(v) for v in col]
            elif kind == "nan_in_id":
                put(name, math.nan)
            else:
                cols[name] = [bool(v) if not isinstance(v, str) else v for v in col]
        elif kind == "truncate":
            cols = {k: v[:0] for k, v in cols.items()}
        elif kind == "shorten_column":
            name = draw(st.sampled_from(sorted(cols)))
            cols[name] = cols[name][:-1]
        elif kind == "table_dup":
            i = draw(st.integers(0, len(s) - 1))
            s.append(s[i])
            z.append(z[i])
        elif kind == "table_bad_z":
            z[draw(st.integers(0, len(z) - 1))] = draw(st.sampled_from(
                [math.nan, -0.5, math.inf]))
        elif kind == "table_swap" and len(z) > 1:
            i, j = draw(st.lists(st.integers(0, len(z) - 1), min_size=2, max_size=2,
                                 unique=True))
            z[i], z[j] = z[j], z[i]
        elif kind == "table_equal_z" and len(z) > 1:
            i, j = draw(st.lists(st.integers(0, len(z) - 1), min_size=2, max_size=2,
                                 unique=True))
            z[i] = z[j]
        elif kind == "table_drop" and len(s) > 1:
            i = draw(st.integers(0, len(s) - 1))
            del s[i], z[i]
        elif kind == "weight_vary":
            cols.setdefault("weight_mpc3", [0.5] * n)
            put("weight_mpc3", draw(st.floats(0.0, 1.0)))
        elif kind == "weight_bad" and "weight_mpc3" in cols and cols["weight_mpc3"]:
            cols["weight_mpc3"][row % len(cols["weight_mpc3"])] = draw(
                st.sampled_from([math.nan, -1.0, math.inf]))
        elif kind == "gas_bad" and "gas_msun" in cols and cols["gas_msun"]:
            cols["gas_msun"][row % len(cols["gas_msun"])] = draw(
                st.sampled_from([math.nan, -1.0, -math.inf]))
        elif kind == "unknown_column":
            cols["bh_spin"] = [0.0] * n
    arrays = {k: np.asarray(v) if len(v) else np.zeros(0) for k, v in cols.items()}
    return arrays, np.asarray(s, dtype=np.int64), np.asarray(z, dtype=np.float64), kinds


def judge(load, columns, snap_nums, snap_z, source, info):
    """Load, and compare the outcome with the reference checker."""
    expected = reference_violations(columns, snap_nums, snap_z)
    try:
        forest = load()
    except BhgrowInputError as err:
        msg = str(err)
        assert expected, f"a valid forest was refused ({info}): {msg}"
        assert err.rule in expected, f"rule {err.rule} not in {expected} ({info}): {msg}"
        tags = set(re.findall(r"\[([a-z_]+)\]", msg))
        assert tags <= expected, f"message names {tags - expected}, not broken ({info})"
        assert source in msg
        event(f"refused: {err.rule}")
        return None
    assert not expected, f"silently loaded a forest that breaks {expected} ({info})"
    event("loaded cleanly")
    assert forest_rows(forest) == reference_rows(columns)
    node = _ref_ints(columns["node_id"])
    if "gas_msun" in columns:
        assert sorted(zip(forest.node_id.tolist(), forest.extra["gas_msun"].tolist())) == \
            sorted(zip(node, _ref_floats(columns["gas_msun"])))
    if "weight_mpc3" in columns:
        w = dict(zip(_ref_ints(columns["forest_id"]), _ref_floats(columns["weight_mpc3"])))
        assert forest.forest_weight.tolist() == [w[k] for k in forest.forest_ids.tolist()]
    return forest


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(corrupted_forests())
def test_random_corruption_in_memory(case):
    cols, s, z, kinds = case
    judge(lambda: Forest.from_columns(cols, s, z, source="random-forest"), cols, s, z,
          "random-forest", kinds)
    if "bh_spin" not in cols and all(c in cols for c in REQUIRED):
        expected = reference_violations(cols, s, z)
        rules = {p.rule for p in find_problems(cols, s, z)}
        assert rules <= expected and bool(rules) == bool(expected), (rules, expected, kinds)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(corrupted_forests(max_corruptions=1))
def test_single_random_corruption_in_memory(case):
    """One defect at a time: the error must name exactly a rule the reference sees."""
    cols, s, z, kinds = case
    judge(lambda: Forest.from_columns(cols, s, z, source="random-forest"), cols, s, z,
          "random-forest", kinds)


@settings(max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(corrupted_forests())
def test_random_corruption_through_hdf5(case):
    cols, s, z, kinds = case
    with tempfile.TemporaryDirectory() as tmp:
        path = write_h5(Path(tmp) / "random.h5", cols, s, z)
        with h5py.File(path, "r") as h5:  # judge what the file holds, as h5py reads it
            stored = {k: h5["nodes"][k][()] for k in h5["nodes"]}
        judge(lambda: load_forest(path), stored, s, z, str(path), kinds)


@settings(max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(corrupted_forests(allow_unknown_column=False))
def test_random_corruption_through_csv(case):
    cols, s, z, kinds = case
    if len({len(v) for v in cols.values()}) > 1:
        cols = {k: v[:min(len(v) for v in cols.values())] for k, v in cols.items()}
    with tempfile.TemporaryDirectory() as tmp:
        path, snaps = write_csv_pair(Path(tmp) / "random.csv", cols, s, z)
        # judge what the file holds, as a table reader parses it
        df = pd.read_csv(path)
        stored = {k: df[k].to_numpy() for k in df.columns}
        tab = pd.read_csv(snaps)
        judge(lambda: load_forest(path, snapshots=snaps), stored, tab["snap"].to_numpy(),
              tab["z"].to_numpy(), str(path), kinds)


# ------------------------------------------------------------------ derived indices
@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(valid_forests())
def test_indices_of_valid_forests(case):
    cols, s, z = case
    f = Forest.from_columns(cols, s, z)
    n = f.n_nodes
    assert forest_rows(f) == reference_rows(cols)
    node, desc, mass = f.node_id.tolist(), f.desc_id.tolist(), f.mass_msun.tolist()
    snap, forest = f.snap.tolist(), f.forest_id.tolist()
    row_of_id = {x: i for i, x in enumerate(node)}

    # rows sorted by (snap, forest, node)
    keys = list(zip(snap, forest, node))
    assert keys == sorted(keys)
    # descendant rows
    for i in range(n):
        assert f.desc_index[i] == (row_of_id[desc[i]] if desc[i] != -1 else -1)
    # CSR progenitors: exactly the nodes pointing here; most massive first, ties by id
    assert f.prog_offsets[0] == 0 and f.prog_offsets[-1] == f.prog_index.size
    assert np.all(np.diff(f.prog_offsets) >= 0)
    for i in range(n):
        progs = f.progenitors(i).tolist()
        expect = sorted((j for j in range(n) if desc[j] == node[i]),
                        key=lambda j: (-mass[j], node[j]))
        assert progs == expect
        assert f.main_prog[i] == (expect[0] if expect else -1)
    # snapshot slices: contiguous, in table order, covering every row once
    table = sorted(zip(s.tolist(), z.tolist()))
    assert f.snapshots.snap.tolist() == [t[0] for t in table]
    assert f.snapshots.z.tolist() == [t[1] for t in table]
    covered = []
    for k, (sn, _) in enumerate(table):
        sl = f.snapshot_slice(k)
        rows = list(range(sl.start, sl.stop))
        assert rows == [i for i in range(n) if snap[i] == sn]
        covered += rows
    assert covered == list(range(n))
    # forests
    assert f.forest_ids.tolist() == sorted(set(forest))
    assert [f.forest_ids[k] for k in f.forest_index] == forest
    if "weight_mpc3" in cols:
        w = dict(zip(cols["forest_id"].tolist(), cols["weight_mpc3"].tolist()))
        assert f.forest_weight.tolist() == [w[k] for k in f.forest_ids.tolist()]
    # main branch: walk down main progenitors from every root
    expect_root = [-1] * n
    for r in range(n):
        if desc[r] == -1:
            cur = r
            while cur != -1:
                expect_root[cur] = r
                cur = int(f.main_prog[cur])
    assert f.main_branch_root().tolist() == expect_root
