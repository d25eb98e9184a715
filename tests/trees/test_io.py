"""Round trips through bhgrow's HDF5 layout and CSV tables; h-unit conversion; chunking."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from bhgrow.errors import BhgrowInputError
from bhgrow.trees import Forest, load_forest, read_table, write_csv, write_hdf5


def small_forest(weights=False, box=None, extra=False):
    # forest 7: 3 snaps, a merger at snap 1 -> 2 ; forest 3: a single chain
    cols = {
        "node_id": np.array([10, 11, 12, 13, 14, 20, 21, 22]),
        "desc_id": np.array([12, 12, 14, 14, -1, 21, 22, -1]),
        "forest_id": np.array([7, 7, 7, 7, 7, 3, 3, 3]),
        "snap": np.array([0, 0, 1, 1, 2, 0, 1, 2]),
        "mass_msun": np.array([3e9, 1e9, 5e9, 5e9, 1.2e10, 1e8, 2e8, 4e8]),
    }
    if weights:
        cols["weight_mpc3"] = np.array([1e-3] * 5 + [2e-2] * 3)
    if extra:
        cols["gas_msun"] = np.linspace(1e7, 8e7, 8)
    return Forest.from_columns(cols, [0, 1, 2], [6.0, 2.0, 0.0], box_mpc=box,
                               meta={"note": "unit test"})


def assert_same(a: Forest, b: Forest):
    for name in ("node_id", "desc_id", "forest_id", "snap", "mass_msun", "desc_index",
                 "main_prog", "prog_offsets", "prog_index", "snap_offsets"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
    np.testing.assert_array_equal(a.snapshots.z, b.snapshots.z)
    assert a.box_mpc == b.box_mpc
    assert sorted(a.extra) == sorted(b.extra)
    for k in a.extra:
        np.testing.assert_array_equal(a.extra[k], b.extra[k])
    if a.forest_weight is None:
        assert b.forest_weight is None
    else:
        np.testing.assert_array_equal(a.forest_weight, b.forest_weight)


def test_sorted_by_snapshot_and_indices():
    f = small_forest()
    assert np.all(np.diff(f.snap) >= 0)
    # main progenitor of 14 is 12 or 13 (equal mass 5e9): tie -> lowest node_id = 12
    row14 = int(np.flatnonzero(f.node_id == 14)[0])
    assert f.node_id[f.main_prog[row14]] == 12
    progs = f.node_id[f.progenitors(row14)]
    assert list(progs) == [12, 13]
    row12 = int(np.flatnonzero(f.node_id == 12)[0])
    assert list(f.node_id[f.progenitors(row12)]) == [10, 11]  # most massive first
    for k in range(3):
        sl = f.snapshot_slice(k)
        assert np.all(f.snap[sl] == k)


@pytest.mark.parametrize("weights,box,extra", [(False, 25.0, False), (True, None, True)])
def test_hdf5_round_trip(tmp_path, weights, box, extra):
    f = small_forest(weights=weights, box=box, extra=extra)
    p = write_hdf5(f, tmp_path / "f.h5")
    g = load_forest(p)
    assert_same(f, g)
    assert g.meta["note"] == "unit test"


def test_hdf5_refuses_overwrite(tmp_path):
    f = small_forest(box=10.0)
    write_hdf5(f, tmp_path / "f.h5")
    with pytest.raises(BhgrowInputError, match="exists"):
        write_hdf5(f, tmp_path / "f.h5")
    write_hdf5(f, tmp_path / "f.h5", overwrite=True)
    assert not list(tmp_path.glob("*.tmp-*"))


@pytest.mark.parametrize("weights", [False, True])
def test_csv_round_trip(tmp_path, weights):
    f = small_forest(weights=weights, box=None if weights else 30.0, extra=True)
    p = write_csv(f, tmp_path / "f.csv")
    g = load_forest(p, box_mpc=f.box_mpc)
    assert_same(f, g)


def test_csv_column_map_and_h_conversion(tmp_path):
    f = small_forest(weights=True, extra=True)
    h = 0.7
    df = pd.DataFrame({
        "ID": f.node_id, "DESC": f.desc_id, "TREE": f.forest_id, "SNAP": f.snap,
        "MVIR": f.mass_msun * h,          # Msun/h
        "GAS": f.extra["gas_msun"] * h,   # Msun/h
        "W": f.forest_weight[f.forest_index] / h**3,  # (Mpc/h)^-3
        "REDSHIFT": f.z,
    })
    df.to_csv(tmp_path / "cat.csv", index=False)
    cmap = {"node_id": "ID", "desc_id": "DESC", "forest_id": "TREE", "snap": "SNAP",
            "mass_msun": "MVIR", "gas_msun": "GAS", "weight_mpc3": "W", "z": "REDSHIFT"}
    g = read_table(tmp_path / "cat.csv", columns=cmap, h=h, box_mpc=None)
    np.testing.assert_allclose(g.mass_msun, f.mass_msun, rtol=1e-14)
    np.testing.assert_allclose(g.extra["gas_msun"], f.extra["gas_msun"], rtol=1e-14)
    np.testing.assert_allclose(g.forest_weight, f.forest_weight, rtol=1e-14)
    assert g.meta["source_h"] == h


def test_box_in_mpc_over_h(tmp_path):
    f = small_forest(box=70.0)
    p = write_csv(f, tmp_path / "f.csv")
    g = read_table(p, h=0.7, box_mpc=70.0)
    assert g.box_mpc == pytest.approx(100.0)


def test_separate_snapshot_table(tmp_path):
    f = small_forest(box=10.0)
    cols = f.to_columns()
    pd.DataFrame(cols).to_csv(tmp_path / "nodes.csv", index=False)
    pd.DataFrame({"snap": [0, 1, 2], "z": [6.0, 2.0, 0.0]}).to_csv(tmp_path / "snaps.csv",
                                                                    index=False)
    g = read_table(tmp_path / "nodes.csv", snapshots=tmp_path / "snaps.csv", box_mpc=10.0)
    assert_same(f, g)
    with pytest.raises(BhgrowInputError, match="no snapshot redshifts"):
        read_table(tmp_path / "nodes.csv")


def test_select_and_chunks_keep_whole_forests():
    f = small_forest(weights=True)
    sub = f.select_forests([3])
    assert sub.n_forests == 1 and sub.n_nodes == 3
    assert sub.forest_weight.tolist() == [2e-2]
    assert sub.node_id[sub.main_prog[sub.node_id == 22]][0] == 21
    chunks = list(f.chunks(max_nodes=4))
    assert [c.n_forests for c in chunks] == [1, 1]
    assert sum(c.n_nodes for c in chunks) == f.n_nodes
    assert len(list(f.chunks(max_nodes=100))) == 1
    assert len(list(f.iter_forests())) == 2


def test_main_branch_root():
    f = small_forest()
    mb = f.main_branch_root()
    on = f.node_id[mb >= 0]
    assert set(on.tolist()) == {14, 12, 10, 22, 21, 20}


def test_volume_weight():
    assert small_forest(box=10.0).volume_weight().tolist() == [1e-3, 1e-3]
    assert small_forest(weights=True).volume_weight().tolist() == [2e-2, 1e-3]
    with pytest.raises(BhgrowInputError, match="box size"):
        small_forest().volume_weight()


def test_demo_file_loads():
    from pathlib import Path

    f = load_forest(Path(__file__).resolve().parents[2] / "trees_demo" / "tarn_hollow.h5")
    assert f.n_forests == 1500 and f.box_mpc is None
    assert f.forest_weight.shape == (1500,) and np.all(f.forest_weight > 0)
    assert np.all(f.mass_msun > 0)
