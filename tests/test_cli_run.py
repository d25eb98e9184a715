"""`bhgrow run`: the run directory, its files, refusals and atomicity."""

from __future__ import annotations

import json

import h5py
import numpy as np
import pandas as pd
import pytest
from astropy.table import Table

from bhgrow.cli import main
from bhgrow.pipeline import demo_trees_path
from bhgrow.trees import load_forest, write_hdf5


@pytest.fixture(scope="module")
def small_trees(tmp_path_factory):
    f = load_forest(demo_trees_path())
    sub = f.select_forests(f.forest_ids[::25])
    path = tmp_path_factory.mktemp("trees") / "small.h5"
    write_hdf5(sub, path)
    return path


def test_run_writes_every_file(tmp_path, small_trees, capsys):
    out = tmp_path / "run"
    assert main(["run", "--trees", str(small_trees), "-o", str(out), "--no-progress"]) == 0
    assert sorted(p.name for p in out.iterdir()) == [
        "black_holes.ecsv", "config.toml", "histories.h5", "mergers.ecsv",
        "pending_pairs.ecsv", "run.json"]
    m = Table.read(out / "mergers.ecsv")
    for col in ("forest_id", "weight_mpc3", "z", "t_gyr", "m1_msun", "m2_msun", "q",
                "chirp_mass_msun", "chirp_mass_obs_msun", "remnant_mass_msun",
                "remnant_spin", "kick_kms", "ejected", "delay_gyr", "seed_channel_1",
                "seed_channel_2", "host_mass_msun"):
        assert col in m.colnames, col
    assert str(m["kick_kms"].unit) == "km / s"
    assert "coalescence_t_gyr" in Table.read(out / "pending_pairs.ecsv").colnames
    t = Table.read(out / "black_holes.ecsv")
    for col in ("bh_id", "forest_id", "seed_channel", "seed_z", "seed_mass_msun",
                "final_mass_msun", "status", "host_mass_msun", "weight_mpc3"):
        assert col in t.colnames
    assert str(t["final_mass_msun"].unit) == "solMass"
    assert str(t["weight_mpc3"].unit) == "1 / Mpc3"
    df = pd.read_csv(out / "black_holes.ecsv", comment="#")   # CSV-readable
    assert len(df) == len(t)
    run = json.loads((out / "run.json").read_text())
    for key in ("bhgrow_version", "seed", "trees_sha256", "wall_time_s", "ledger", "baryons"):
        assert key in run
    assert run["ledger"]["ok"] and run["baryons"]["ok"]
    with h5py.File(out / "histories.h5") as h5:
        ids = h5["bh_id"][()]
        off = h5["index/offset"][()]
        assert off[-1] == ids.size
        assert set(np.unique(ids)) == set(np.asarray(t["bh_id"]))
        assert h5["mass_msun"].attrs["unit"] == "Msun"
    assert not list(tmp_path.glob("*.tmp-*"))


def test_run_refuses_existing_dir_and_overwrites_when_told(tmp_path, small_trees, capsys):
    out = tmp_path / "run"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    assert main(["run", "--trees", str(small_trees), "-o", str(out), "--no-progress"]) == 2
    err = capsys.readouterr().err
    assert "exists" in err and "Traceback" not in err
    assert (out / "keep.txt").read_text() == "mine"
    assert main(["run", "--trees", str(small_trees), "-o", str(out), "--overwrite",
                 "--no-progress"]) == 0
    assert not (out / "keep.txt").exists() and (out / "run.json").exists()


def test_run_with_config_and_bad_inputs(tmp_path, small_trees, capsys):
    cfg = tmp_path / "c.toml"
    cfg.write_text('[seeding]\nchannels = ["halo_mass"]\n[feedback]\nmode = "momentum"\n')
    out = tmp_path / "r1"
    assert main(["run", str(cfg), "--trees", str(small_trees), "-o", str(out),
                 "--no-progress"]) == 0
    t = Table.read(out / "black_holes.ecsv")
    assert set(np.unique(t["seed_channel"])) == {"halo_mass"}
    assert 'mode = "momentum"' in (out / "config.toml").read_text()
    bad = tmp_path / "bad.toml"
    bad.write_text("[feedback]\nmode = \"energetic\"\n")
    assert main(["run", str(bad), "--trees", str(small_trees), "-o", str(tmp_path / "r2"),
                 "--no-progress"]) == 2
    err = capsys.readouterr().err
    assert "energetic" in err and "Traceback" not in err
    assert not (tmp_path / "r2").exists()
    assert main(["run", "--trees", str(tmp_path / "nope.h5"), "-o", str(tmp_path / "r3"),
                 "--no-progress"]) == 2
    assert not (tmp_path / "r3").exists()
