"""`bhgrow trees check` and `bhgrow trees info` (DESIGN §8): exit codes and messages.

Exit codes: 0 ok, 2 bad input (with the broken rule named on stderr and no traceback),
1 an internal failure (still without a traceback). Expected facts about the demo file are
read from the file itself with h5py, not from bhgrow.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pandas as pd
import pytest

from bhgrow.cli import main

REPO = Path(__file__).resolve().parents[1]
DEMO = REPO / "trees_demo" / "tarn_hollow.h5"

# a tiny valid forest: two forests, three snapshots, one merger
SNAPS = np.array([0, 1, 2])
ZS = np.array([4.0, 1.5, 0.0])


def good_columns() -> dict:
    return {"node_id": np.array([10, 11, 12, 13, 20, 21]),
            "desc_id": np.array([-1, 10, 10, 11, -1, 20]),
            "forest_id": np.array([1, 1, 1, 1, 2, 2]),
            "snap": np.array([2, 1, 1, 0, 2, 0]),
            "mass_msun": np.array([1e12, 6e11, 2e11, 1e11, 4e11, 5e10])}


def write_h5(path: Path, cols: dict, snaps=SNAPS, zs=ZS, fmt="bhgrow-forest") -> Path:
    with h5py.File(path, "w") as h5:
        h5.attrs["format"] = fmt
        h5.attrs["schema_version"] = 1
        h5.attrs["box_mpc"] = 20.0
        g = h5.create_group("nodes")
        for k, v in cols.items():
            v = np.asarray(v)
            g.create_dataset(k, data=v.astype("S") if v.dtype.kind == "U" else v)
        s = h5.create_group("snapshots")
        s.create_dataset("snap", data=snaps)
        s.create_dataset("z", data=zs)
    return path


def changed(**edits) -> dict:
    """good_columns() with ``{column: (node_id, value)}`` edits applied."""
    cols = good_columns()
    for col, (node, value) in edits.items():
        i = int(np.flatnonzero(cols["node_id"] == node)[0])
        arr = cols[col].astype(np.result_type(cols[col].dtype, np.asarray(value).dtype))
        arr[i] = value
        cols[col] = arr
    return cols


def _without(col):
    cols = good_columns()
    del cols[col]
    return cols


# name -> (writer(tmp_path) -> path, rule, an id the message must name or None)
BROKEN = {
    "duplicate_ids": (lambda d: write_h5(d / "b.h5", changed(node_id=(12, 11))),
                      "duplicate_ids", 11),
    "missing_descendants": (lambda d: write_h5(d / "b.h5", changed(desc_id=(13, 99))),
                            "missing_descendants", 13),
    "descendant_not_later": (lambda d: write_h5(d / "b.h5", changed(desc_id=(12, 13))),
                             "descendant_not_later", 12),
    "cycles": (lambda d: write_h5(d / "b.h5", changed(desc_id=(10, 10))), "cycles", 10),
    "cross_forest_links": (lambda d: write_h5(d / "b.h5", changed(desc_id=(21, 11))),
                           "cross_forest_links", 21),
    "bad_mass": (lambda d: write_h5(d / "b.h5", changed(mass_msun=(12, np.nan))),
                 "bad_mass", 12),
    "negative_mass": (lambda d: write_h5(d / "b.h5", changed(mass_msun=(12, -1.0))),
                      "bad_mass", 12),
    "unknown_snapshots": (lambda d: write_h5(d / "b.h5", changed(snap=(21, 7))),
                          "unknown_snapshots", 21),
    "missing_columns": (lambda d: write_h5(d / "b.h5", _without("desc_id")),
                        "missing_columns", None),
    "wrong_dtype": (lambda d: write_h5(d / "b.h5", changed(snap=(13, 0.5))),
                    "wrong_dtype", None),
    "string_dtype": (lambda d: write_h5(d / "b.h5", {**good_columns(), "mass_msun": np.array(
        ["big"] * 6)}), "wrong_dtype", None),
    "empty": (lambda d: write_h5(d / "b.h5", {k: v[:0] for k, v in good_columns().items()}),
              "empty", None),
    "negative_ids": (lambda d: write_h5(d / "b.h5", changed(node_id=(13, -13))),
                     "negative_ids", -13),
    "bad_snapshot_table": (lambda d: write_h5(d / "b.h5", good_columns(),
                                              zs=np.array([4.0, 5.0, 0.0])),
                           "bad_snapshot_table", None),
    "unknown_columns": (lambda d: write_h5(d / "b.h5", {**good_columns(),
                                                        "colour": np.zeros(6)}),
                        "unknown_columns", None),
    "wrong_format": (lambda d: write_h5(d / "b.h5", good_columns(), fmt="other"),
                     "wrong_format", None),
    "not_hdf5": (lambda d: (d / "b.h5").write_text("this is text, not HDF5\n") and d / "b.h5",
                 "not_hdf5", None),
    "csv_missing_descendants": (
        lambda d: _csv(d / "b.csv", changed(desc_id=(13, 99))), "missing_descendants", 13),
    "csv_zero_bytes": (lambda d: (d / "b.csv").write_text("") or d / "b.csv", "empty", None),
    "csv_header_only": (lambda d: _csv(d / "b.csv", {k: v[:0] for k, v in
                                                     good_columns().items()}), "empty", None),
}


def _csv(path: Path, cols: dict) -> Path:
    df = pd.DataFrame(cols)
    df["z"] = ZS[np.asarray(cols["snap"], dtype=int)] if len(df) else []
    df.to_csv(path, index=False)
    return path


def run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture(autouse=True)
def _no_debug(monkeypatch):
    monkeypatch.delenv("BHGROW_DEBUG", raising=False)


# ======================================================================== check
def test_check_demo_file(capsys):
    code, out, err = run(capsys, "trees", "check", DEMO)
    assert code == 0, err
    with h5py.File(DEMO, "r") as h5:
        n_nodes = h5["nodes/node_id"].shape[0]
        n_forests = np.unique(h5["nodes/forest_id"][()]).size
        n_snaps = h5["snapshots/snap"].shape[0]
    assert f"{n_forests} forests" in out
    assert f"{n_nodes} nodes" in out
    assert f"{n_snaps} snapshots" in out
    assert err == ""


def test_check_good_small_files(tmp_path, capsys):
    assert run(capsys, "trees", "check", write_h5(tmp_path / "g.h5", good_columns()))[0] == 0
    code, out, _ = run(capsys, "trees", "check", _csv(tmp_path / "g.csv", good_columns()))
    assert code == 0 and "2 forests, 6 nodes, 3 snapshots" in out


@pytest.mark.parametrize("name", sorted(BROKEN))
@pytest.mark.parametrize("command", ["check", "info"])
def test_broken_file_exits_2_with_rule(name, command, tmp_path, capsys):
    writer, rule, bad_id = BROKEN[name]
    path = writer(tmp_path)
    code, out, err = run(capsys, "trees", command, path)
    assert code == 2, (out, err)
    assert f"[{rule}]" in err
    assert str(path) in err
    assert "Traceback" not in err and "Traceback" not in out
    assert "OK" not in out
    if bad_id is not None:
        line = next(ln for ln in err.splitlines() if f"[{rule}]" in ln)
        assert re.search(rf"(?<![\w.-]){bad_id}(?![\w.])", line), line


def test_python_dash_m_exit_code_and_no_traceback(tmp_path):
    bad = write_h5(tmp_path / "loop.h5", changed(desc_id=(10, 10)))
    env = {k: v for k, v in os.environ.items() if k != "BHGROW_DEBUG"}
    env["PYTHONPATH"] = str(REPO) + os.pathsep + env.get("PYTHONPATH", "")
    proc = subprocess.run([sys.executable, "-m", "bhgrow", "trees", "check", str(bad)],
                          cwd=tmp_path, env=env, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2, proc.stderr
    assert "[cycles]" in proc.stderr and str(bad) in proc.stderr
    assert "Traceback" not in proc.stderr
    assert proc.stdout == ""


def test_missing_file_and_directory(tmp_path, capsys):
    for target in (tmp_path / "nowhere.h5", tmp_path / "nowhere.csv", tmp_path):
        code, out, err = run(capsys, "trees", "check", target)
        assert code == 2
        assert "[no_file]" in err and str(target) in err
        assert "Traceback" not in err
    code, _, err = run(capsys, "trees", "info", tmp_path)
    assert code == 2 and "directory" in err


def test_internal_failure_exits_1_without_traceback(tmp_path, capsys, monkeypatch):
    import bhgrow.trees.io as io

    def boom(*a, **k):
        raise RuntimeError("simulated fault")

    monkeypatch.setattr(io, "load_forest", boom)
    monkeypatch.setattr(io, "open_forests", boom)     # HDF5 files are checked lazily
    code, _, err = run(capsys, "trees", "check", DEMO)
    assert code == 1
    assert "simulated fault" in err and "Traceback" not in err


# ======================================================================== info
def test_info_demo_text(capsys):
    code, out, err = run(capsys, "trees", "info", DEMO)
    assert code == 0, err
    with h5py.File(DEMO, "r") as h5:
        n_forests = np.unique(h5["nodes/forest_id"][()]).size
        mass = h5["nodes/mass_msun"][()]
        weights = h5["forests/weight_mpc3"][()]
    assert re.search(rf"^forests\s+{n_forests}$", out, re.M)
    assert f"{mass.min():.3e}" in out and f"{mass.max():.3e}" in out
    assert re.search(rf"^forest weights\s+total {weights.sum():.4g} Mpc\^-3", out, re.M)


def test_info_demo_json(capsys):
    code, out, err = run(capsys, "trees", "info", DEMO, "--json")
    assert code == 0, err
    info = json.loads(out)
    with h5py.File(DEMO, "r") as h5:
        forest_id = h5["nodes/forest_id"][()]
        desc = h5["nodes/desc_id"][()]
        mass = h5["nodes/mass_msun"][()]
        z = h5["snapshots/z"][()]
        weights = h5["forests/weight_mpc3"][()]
    assert info["n_forests"] == np.unique(forest_id).size
    assert info["n_nodes"] == forest_id.size
    assert info["n_snapshots"] == z.size
    assert info["n_roots"] == int((desc == -1).sum())
    assert info["mass_range_msun"] == [float(mass.min()), float(mass.max())]
    assert info["z_range"] == [float(z.min()), float(z.max())]
    assert info["box_mpc"] is None
    assert info["weights_mpc3"]["total"] == pytest.approx(weights.sum(), rel=1e-12)
    assert len(info["main_branch"]["z"]) == z.size


# the CSV of a hypothetical external catalogue: own column names, masses in Msun/h
CSV_MAP = "node_id=halo,desc_id=next_halo,forest_id=tree,snap=step,mass_msun=m_h,z=redshift"


def _foreign_csv(path: Path) -> Path:
    cols = good_columns()
    pd.DataFrame({"halo": cols["node_id"], "next_halo": cols["desc_id"],
                  "tree": cols["forest_id"], "step": cols["snap"],
                  "m_h": cols["mass_msun"], "redshift": ZS[cols["snap"]],
                  "unrelated": np.arange(6)}).to_csv(path, index=False)
    return path


def test_info_csv_with_column_map_and_h(tmp_path, capsys):
    path = _foreign_csv(tmp_path / "catalogue.csv")
    h = 0.7
    m = good_columns()["mass_msun"]
    code, out, err = run(capsys, "trees", "info", path, "--columns", CSV_MAP, "--h", h,
                         "--box-mpc", 70, "--json")
    assert code == 0, err
    info = json.loads(out)
    # M [Msun/h] -> M/h Msun; L [Mpc/h] -> L/h Mpc
    assert info["mass_range_msun"] == pytest.approx([m.min() / h, m.max() / h], rel=1e-14)
    assert info["box_mpc"] == pytest.approx(70 / h, rel=1e-14)
    assert info["n_forests"] == 2 and info["n_nodes"] == 6 and info["n_snapshots"] == 3

    code, out, err = run(capsys, "trees", "info", path, "--columns", CSV_MAP, "--h", h)
    assert code == 0, err
    assert f"{m.min() / h:.3e} .. {m.max() / h:.3e} Msun" in out
    assert f"{m.min():.3e}" not in out  # the unconverted value is not shown

    code, out, err = run(capsys, "trees", "check", path, "--columns", CSV_MAP)
    assert code == 0 and "2 forests, 6 nodes, 3 snapshots" in out


def test_csv_without_column_map_is_refused(tmp_path, capsys):
    path = _foreign_csv(tmp_path / "catalogue.csv")
    code, _, err = run(capsys, "trees", "check", path)
    assert code == 2 and "[missing_columns]" in err and "Traceback" not in err


@pytest.mark.parametrize("args, rule", [
    (["--columns", "node_id"], "bad_column_map"),
    (["--columns", "halo_number=halo"], "bad_column_map"),
    (["--columns", CSV_MAP.replace("m_h", "m_vir")], "missing_columns"),
    (["--columns", CSV_MAP, "--h", "-1"], "bad_h"),
])
def test_bad_options_exit_2(args, rule, tmp_path, capsys):
    path = _foreign_csv(tmp_path / "catalogue.csv")
    code, _, err = run(capsys, "trees", "check", path, *args)
    assert code == 2 and f"[{rule}]" in err and "Traceback" not in err


def test_table_options_on_hdf5_are_refused(capsys):
    code, _, err = run(capsys, "trees", "check", DEMO, "--h", "0.7")
    assert code == 2 and "[bad_option]" in err


# ======================================================================== help
@pytest.mark.parametrize("argv", [["--help"], ["trees", "--help"],
                                  ["trees", "check", "--help"], ["trees", "info", "--help"]])
def test_help_exits_0(argv, capsys):
    with pytest.raises(SystemExit) as e:
        main(argv)
    assert e.value.code == 0
    assert "usage:" in capsys.readouterr().out


@pytest.mark.parametrize("argv", [["trees", "check"], ["trees", "frobnicate"], []])
def test_usage_errors_exit_2(argv, capsys):
    with pytest.raises(SystemExit) as e:
        main(argv)
    assert e.value.code == 2
    assert "Traceback" not in capsys.readouterr().err
