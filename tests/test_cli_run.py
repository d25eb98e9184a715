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
        "black_holes.ecsv", "config.toml", "figures", "histories.h5", "mergers.ecsv",
        "pending_pairs.ecsv", "run.json", "summary.json", "summary.md", "tables"]
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


def test_products_summary_tables_compare(tmp_path, small_trees, capsys):
    a, b = tmp_path / "a", tmp_path / "b"
    assert main(["run", "--trees", str(small_trees), "-o", str(a), "--no-progress"]) == 0
    cfg = tmp_path / "c.toml"
    cfg.write_text('[seeding]\nchannels = ["halo_mass"]\n[gw]\nsnr_threshold = 20.0\n')
    assert main(["run", str(cfg), "--trees", str(small_trees), "-o", str(b),
                 "--no-progress"]) == 0
    s = json.loads((a / "summary.json").read_text())
    for key in ("n_black_holes", "n_mergers", "observed_merger_rate_per_yr",
                "lisa_detections_per_yr", "hc_1yr", "ledger_ok"):
        assert key in s
    assert s["ledger_ok"] and s["hc_1yr"] > 0
    assert "2.4e-15" in (a / "summary.md").read_text()
    bg = Table.read(a / "tables" / "gw_background.ecsv")
    assert bg.colnames[:2] == ["f_hz", "h_c"]
    # h_c falls as f^(-2/3) below the binaries' ISCO frequencies (Phinney 2001)
    f, hc = np.asarray(bg["f_hz"]), np.asarray(bg["h_c"])
    slope = np.polyfit(np.log(f[:5]), np.log(hc[:5]), 1)[0]
    assert slope == pytest.approx(-2 / 3, abs=1e-3)
    for name in ("merger_rate_vs_z", "chirp_mass_distribution", "bh_mass_function",
                 "mbh_mhalo", "lisa_snr", "gw_background", "mass_histories"):
        assert (a / "figures" / f"{name}.png").stat().st_size > 1000
    # rebuilding the products from the files gives the same headline numbers
    before = json.loads((a / "summary.json").read_text())
    assert main(["tables", str(a)]) == 0
    after = json.loads((a / "summary.json").read_text())
    assert after["hc_1yr"] == pytest.approx(before["hc_1yr"], rel=1e-12)
    assert after["observed_merger_rate_per_yr"] == pytest.approx(
        before["observed_merger_rate_per_yr"], rel=1e-12)
    cmp_dir = tmp_path / "cmp"
    assert main(["compare", str(a), str(b), "-o", str(cmp_dir)]) == 0
    text = (cmp_dir / "comparison.md").read_text()
    assert "| n_mergers |" in text and " a " in text.replace("|", " ")
    assert (cmp_dir / "merger_rate_vs_z.png").exists()
    assert main(["compare", str(a), str(tmp_path / "nope"), "-o", str(tmp_path / "c2")]) == 2


def test_empty_merger_catalogue_has_the_columns_of_a_full_one(tmp_path):
    """A run without coalescences writes mergers.ecsv with the header (types, units,
    descriptions) of one with them, only no rows."""
    from astropy.table import Table

    from bhgrow.config import from_table
    from bhgrow.pipeline import load_forest, demo_trees_path, run, write_run

    demo = load_forest(demo_trees_path())
    forest = demo.select_forests(demo.forest_ids[::60])
    full = run(from_table({"run": {"max_substeps": 4}}), trees=forest)
    none = run(from_table({"run": {"max_substeps": 4}, "seeding": {"channels": []}}),
               trees=forest)
    assert len(full.mergers) > 0 and len(none.mergers) == 0
    a, b = full.mergers, none.mergers
    assert a.colnames == b.colnames
    for c in a.colnames:
        assert (a[c].dtype, a[c].unit, a[c].description) == \
            (b[c].dtype, b[c].unit, b[c].description), c
    cfg = from_table({"run": {"max_substeps": 4}, "seeding": {"channels": []}})
    write_run(none, cfg, tmp_path / "none", products=False)
    back = Table.read(tmp_path / "none" / "mergers.ecsv")
    assert len(back) == 0 and back["bh_id_1"].dtype == np.int64
    assert str(back["m1_msun"].unit) == "solMass"
