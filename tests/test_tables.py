"""bhgrow.tables: binned rate / mass-function / relation tables, files and run rebuilds.

Expected numbers come from outside the estimators under test: cosmic time and the comoving
volume element from astropy.cosmology (Astropy Collaboration 2022) with Planck18 (Planck
Collaboration 2020), numpy's weighted percentiles (numpy.percentile, method "inverted_cdf",
Hyndman & Fan 1996 definition 1), closed-form sums over hand-built catalogues, and the
Poisson variance of a count (Var N = N).
"""

from __future__ import annotations

import math

import h5py
import numpy as np
import pandas as pd
import pytest
from astropy.table import Table

from bhgrow.cosmology import Cosmology
from bhgrow.errors import BhgrowInputError, ParameterError
from bhgrow.pipeline import demo_trees_path, run
from bhgrow.tables import (TABLE_NAMES, Binning, build_tables, tables_from_run,
                           weighted_percentile, write_tables)
from bhgrow.trees import load_forest, write_hdf5


# ------------------------------------------------------------------------------------------
# hand-built catalogues
def bh_table(mass, host_mass, w, *, status=None, channel=None, final_z=None, ids=None):
    n = len(mass)
    t = Table()
    t["bh_id"] = np.arange(1, n + 1, dtype=np.int64) if ids is None else np.asarray(ids)
    t["seed_channel"] = np.asarray(channel if channel is not None else ["light"] * n, "U12")
    t["final_mass_msun"] = np.asarray(mass, float)
    t["status"] = np.asarray(status if status is not None else ["central"] * n, "U16")
    t["final_z"] = np.asarray(final_z if final_z is not None else np.zeros(n), float)
    t["host_mass_msun"] = np.asarray(host_mass, float)
    t["weight_mpc3"] = np.asarray(w, float)
    return t


def merger_table(z, mc, w, *, q=None, c1=None, c2=None):
    n = len(z)
    t = Table()
    t["z"] = np.asarray(z, float)
    t["q"] = np.asarray(q if q is not None else np.full(n, 0.5), float)
    t["chirp_mass_msun"] = np.asarray(mc, float)
    t["weight_mpc3"] = np.asarray(w, float)
    t["seed_channel_1"] = np.asarray(c1 if c1 is not None else ["light"] * n, "U12")
    t["seed_channel_2"] = np.asarray(c2 if c2 is not None else ["light"] * n, "U12")
    return t


@pytest.fixture(scope="module")
def cosmo():
    return Cosmology()   # Planck18


@pytest.fixture(scope="module")
def planck18():
    from astropy.cosmology import Planck18

    return Planck18


def empty_bh():
    return bh_table([1e6], [1e12], [1e-3])


# ------------------------------------------------------------------------------------------
# Binning
def test_binning_defaults_and_validation():
    b = Binning()
    assert b.z_edges[0] == 0.0 and b.log_mc_edges == tuple(float(v) for v in range(2, 12))
    assert b.log_mbh_edges[1] - b.log_mbh_edges[0] == 0.5
    assert Binning(z_edges=[0, 1, 2]).z_edges == (0.0, 1.0, 2.0)   # lists become tuples
    with pytest.raises(ParameterError,
                       match=r"`z_edges` of Binning must be strictly increasing; got"):
        Binning(z_edges=(0, 2, 1))
    with pytest.raises(ParameterError, match=r"`z_edges\[0\]` of Binning must be in"):
        Binning(z_edges=(-1, 1))
    with pytest.raises(ParameterError, match=r"`log_q_edges\[1\]` of Binning"):
        Binning(log_q_edges=(-1, 0.5))
    with pytest.raises(ParameterError, match="at least two bin edges"):
        Binning(log_mc_edges=(3,))
    with pytest.raises(ParameterError, match="repeated"):
        Binning(mass_function_z=(0, 0))
    with pytest.raises(ParameterError, match="a sequence of numbers"):
        Binning(log_edd_edges="0,1")
    with pytest.raises(ParameterError, match="finite"):
        Binning(log_mhalo_edges=(9, float("nan")))


def test_binning_from_mapping_did_you_mean():
    assert Binning.from_mapping({"z_edges": [0, 3]}).z_edges == (0.0, 3.0)
    with pytest.raises(BhgrowInputError, match="did you mean `z_edges`"):
        Binning.from_mapping({"z_edge": [0, 3]}, source="my.toml [tables]")


# ------------------------------------------------------------------------------------------
# merger-rate density and observed rate
def test_rate_density_closed_form(cosmo, planck18):
    # three mergers with known weights: two in (z 1-2, log Mc 6-7), one in (z 0-0.5, 8-9)
    w = np.array([2e-4, 3e-4, 5e-5])
    m = merger_table([1.2, 1.7, 0.3], [10**6.2, 10**6.9, 10**8.5], w)
    b = Binning(z_edges=(0, 0.5, 1, 2), log_mc_edges=(6, 7, 8, 9))
    t = build_tables(empty_bh(), m, None, cosmo, b)["merger_rate_density"]
    assert len(t) == 3 * 3
    assert str(t["rate_mpc3_gyr"].unit) == "1 / (Gyr Mpc3)"

    def row(z_lo, mc_lo):
        return t[(t["z_lo"] == z_lo) & (t["log_mc_lo"] == mc_lo)][0]

    # R = sum w / (t(z_lo) - t(z_hi)) with cosmic time from astropy Planck18
    dt_12 = (planck18.age(1.0) - planck18.age(2.0)).to_value("Gyr")
    dt_0 = (planck18.age(0.0) - planck18.age(0.5)).to_value("Gyr")
    r = row(1.0, 6.0)
    assert r["n_mergers"] == 2
    assert r["rate_mpc3_gyr"] == pytest.approx((2e-4 + 3e-4) / dt_12, rel=1e-6)
    assert r["rate_mpc3_gyr_err"] == pytest.approx(math.sqrt(2e-4**2 + 3e-4**2) / dt_12,
                                                    rel=1e-6)
    assert row(0.0, 8.0)["rate_mpc3_gyr"] == pytest.approx(5e-5 / dt_0, rel=1e-6)
    others = (t["n_mergers"] == 0)
    assert others.sum() == 7 and np.all(t["rate_mpc3_gyr"][others] == 0)


def test_unit_weight_errors_are_sqrt_n(cosmo):
    # Poisson: Var N = N, so with unit weights sqrt(sum w^2) = sqrt(N)
    rng = np.random.default_rng(3)
    z = rng.uniform(0, 6, 400)
    mc = 10 ** rng.uniform(4, 9, 400)
    m = merger_table(z, mc, np.ones(400))
    tabs = build_tables(empty_bh(), m, None, cosmo)
    t = tabs["merger_rate_density"]
    assert np.allclose(t["rate_mpc3_gyr_err"] * t["dt_gyr"], np.sqrt(t["n_mergers"]),
                       rtol=1e-12)
    assert np.allclose(t["rate_mpc3_gyr"] * t["dt_gyr"], t["n_mergers"], rtol=1e-12)
    o = tabs["observed_merger_rate"]
    has = o["n_mergers"] > 0
    assert np.allclose(o["rate_per_yr_err"][has] / o["rate_per_yr"][has],
                       1 / np.sqrt(o["n_mergers"][has]), rtol=1e-12)
    c = tabs["chirp_mass_distribution"]
    width = c["log_mc_hi"] - c["log_mc_lo"]
    assert np.allclose(c["density_mpc3_dex_err"] * width, np.sqrt(c["n_mergers"]))


def test_observed_rate_against_astropy_volume(cosmo, planck18):
    from scipy.integrate import quad

    w = np.array([1e-4, 2e-4, 4e-4, 1e-5])
    z = np.array([0.2, 0.8, 1.5, 1.9])
    b = Binning(z_edges=(0, 1, 2))
    t = build_tables(empty_bh(), merger_table(z, np.full(4, 1e6), w), None, cosmo,
                     b)["observed_merger_rate"]
    assert str(t["rate_per_yr"].unit) == "1 / yr"
    # dN/dt_obs = R int dV_c/dz / (1+z) dz, R constant in the bin; astropy's
    # differential_comoving_volume is per steradian, times 4 pi for the full sky
    def dvdz(zz):
        return 4 * math.pi * planck18.differential_comoving_volume(zz).to_value("Mpc3 / sr")

    for j, (lo, hi) in enumerate([(0, 1), (1, 2)]):
        sel = (z >= lo) & (z < hi)
        dt_yr = (planck18.age(lo) - planck18.age(hi)).to_value("yr")
        vol = quad(lambda zz: dvdz(zz) / (1 + zz), lo, hi, epsrel=1e-10)[0]
        assert t["rate_per_yr"][j] == pytest.approx(w[sel].sum() / dt_yr * vol, rel=1e-6)
        assert t["rate_per_yr_err"][j] == pytest.approx(
            math.sqrt(np.sum(w[sel] ** 2)) / dt_yr * vol, rel=1e-6)
        assert t["rate_density_mpc3_gyr"][j] == pytest.approx(
            w[sel].sum() / (dt_yr * 1e-9), rel=1e-6)
    assert t["cumulative_per_yr"][1] == pytest.approx(t["rate_per_yr"].sum(), rel=1e-14)
    assert t["cumulative_per_yr_err"][1] == pytest.approx(
        math.hypot(*t["rate_per_yr_err"]), rel=1e-14)


def test_distributions_integrate_to_weighted_counts(cosmo):
    rng = np.random.default_rng(5)
    n = 300
    z = rng.uniform(0, 25, n)           # some beyond z_edges[-1] = 20
    mc = 10 ** rng.uniform(1, 12, n)    # some outside log_mc_edges
    q = 10 ** rng.uniform(-7, 0, n)     # some below log_q_edges[0] = -6
    w = rng.uniform(1e-5, 1e-3, n)
    tabs = build_tables(empty_bh(), merger_table(z, mc, w, q=q), None, cosmo)
    inz = z <= 20
    c = tabs["chirp_mass_distribution"]
    width = c["log_mc_hi"] - c["log_mc_lo"]
    inside = inz & (np.log10(mc) >= 2) & (np.log10(mc) <= 11)
    assert np.sum(c["density_mpc3_dex"] * width) == pytest.approx(w[inside].sum(), rel=1e-12)
    assert c.meta["n_outside"] == int(inz.sum() - inside.sum())
    qd = tabs["mass_ratio_distribution"]
    qin = inz & (np.log10(q) >= -6)
    assert np.sum(qd["density_mpc3_dex"] * (qd["log_q_hi"] - qd["log_q_lo"])) == \
        pytest.approx(w[qin].sum(), rel=1e-12)
    # the observed rate per chirp-mass bin adds up to the observed rate of those mergers
    o = build_tables(empty_bh(), merger_table(z[inside], mc[inside], w[inside]), None,
                     cosmo)["observed_merger_rate"]
    assert np.sum(c["obs_rate_per_yr_dex"] * width) == \
        pytest.approx(o["cumulative_per_yr"][-1], rel=1e-12)


# ------------------------------------------------------------------------------------------
# mass function, Eddington ratios, M_BH-M_halo, seed channels
def histories_two_snapshots():
    # black holes 1-4 at z = 0, black holes 1-3 at z = 1.02 (nearest snapshot to z = 1)
    return {"bh_id": np.array([1, 1, 2, 2, 3, 3, 4]),
            "z": np.array([1.02, 0.0, 1.02, 0.0, 1.02, 0.0, 0.0]),
            "mass_msun": np.array([1e5, 2e6, 3e5, 4e7, 1e4, 1e12, 5e8]),
            "eddington_ratio": np.array([0.5, 0.01, 0.0, 2e-3, 0.3, 0.1, 1e-7])}


def test_mass_function_integrates_to_weighted_count(cosmo):
    w = np.array([1e-3, 2e-3, 4e-3, 8e-3])
    bh = bh_table([2e6, 4e7, 1e12, 5e8], [1e12] * 4, w)
    b = Binning(mass_function_z=(0, 1), eddington_z=(0, 1))
    t = build_tables(bh, merger_table([], [], []), histories_two_snapshots(), cosmo,
                     b)["bh_mass_function"]
    assert str(t["phi_mpc3_dex"].unit) == "1 / (dex Mpc3)"
    width = t["log_m_hi"] - t["log_m_lo"]
    at0 = t["z"] == 0
    at1 = t["z"] == 1
    assert np.all(t["z_snapshot"][at1] == 1.02)
    # z = 0: black hole 3 (1e12 Msun) lies above the last edge (11)
    assert np.sum((t["phi_mpc3_dex"] * width)[at0]) == pytest.approx(w[[0, 1, 3]].sum(),
                                                                       rel=1e-14)
    assert np.sum((t["phi_mpc3_dex"] * width)[at1]) == pytest.approx(w[:3].sum(), rel=1e-14)
    assert t["n_black_holes"][at0].sum() == 3 and t["n_black_holes"][at1].sum() == 3
    # one black hole per occupied bin: err = w / width
    occ = t["n_black_holes"] == 1
    assert np.allclose(t["phi_mpc3_dex_err"][occ], t["phi_mpc3_dex"][occ])


def test_eddington_distribution_fractions(cosmo):
    w = np.array([1e-3, 2e-3, 4e-3, 8e-3])
    bh = bh_table([2e6, 4e7, 1e9, 5e8], [1e12] * 4, w)
    b = Binning(eddington_z=(0,), log_edd_edges=(-4, -2, 0))
    t = build_tables(bh, merger_table([], [], []), histories_two_snapshots(), cosmo,
                     b)["eddington_ratio_distribution"]
    # z = 0: lambda = 0.01 (w1), 2e-3 (w2) in [-4, -2) ... lambda = 0.1 (w3) in [-2, 0];
    # lambda = 1e-7 (w4) below the first edge
    assert t["n_black_holes"].tolist() == [1, 2]
    assert t["phi_mpc3_dex"][0] * 2 == pytest.approx(w[1], rel=1e-14)
    assert t["phi_mpc3_dex"][1] * 2 == pytest.approx(w[0] + w[2], rel=1e-14)
    assert t["fraction"].sum() == pytest.approx(w[:3].sum() / w.sum(), rel=1e-14)


def test_weighted_percentile_matches_numpy():
    rng = np.random.default_rng(11)
    for n in (1, 2, 7, 100):
        x = rng.normal(size=n)
        w = rng.uniform(0.1, 3.0, n)
        got = weighted_percentile(x, w, [0, 16, 50, 84, 100])
        ref = np.percentile(x, [0, 16, 50, 84, 100], weights=w, method="inverted_cdf")
        assert np.array_equal(got, ref)
    # equal weights put the cumulative fraction exactly on the level: the first value
    # whose fraction reaches it is taken (x = 2 for the median of 1..4)
    for n in (4, 100):
        x = rng.permutation(np.arange(1.0, n + 1))
        got = weighted_percentile(x, np.ones(n), [16, 25, 50, 75, 84])
        ref = np.percentile(x, [16, 25, 50, 75, 84], weights=np.ones(n), method="inverted_cdf")
        assert np.array_equal(got, ref)
    assert weighted_percentile([4.0, 1.0, 3.0, 2.0], np.ones(4), 50)[0] == 2.0
    assert np.isnan(weighted_percentile([], [], 50)).all()


def test_mbh_mhalo_percentiles_against_numpy(cosmo):
    rng = np.random.default_rng(7)
    n = 500
    log_mh = rng.uniform(10, 14, n)
    log_mbh = 8 + 1.3 * (log_mh - 12.5) + rng.normal(0, 0.4, n)
    w = 10 ** rng.uniform(-6, -3, n)
    status = np.where(rng.uniform(size=n) < 0.8, "central", "sinking")
    bh = bh_table(10**log_mbh, 10**log_mh, w, status=status)
    b = Binning(log_mhalo_edges=(10, 11, 12, 13, 14))
    t = build_tables(bh, merger_table([], [], []), None, cosmo, b)["mbh_mhalo"]
    cen = status == "central"
    for j in range(4):
        lo, hi = 10 + j, 11 + j
        sel = cen & (log_mh >= lo) & ((log_mh < hi) if j < 3 else (log_mh <= hi))
        ref = np.percentile(np.log10(10**log_mbh[sel]), [16, 50, 84], weights=w[sel],
                            method="inverted_cdf")
        assert [t["p16_log_mbh"][j], t["median_log_mbh"][j], t["p84_log_mbh"][j]] == \
            list(ref)
        assert t["n_black_holes"][j] == sel.sum()
        assert t["density_mpc3_dex"][j] == pytest.approx(w[sel].sum(), rel=1e-12)


def test_median_error_against_monte_carlo(cosmo):
    # the standard error of a sample median, checked against the scatter of medians of many
    # independent normal samples (asymptotic theory: sqrt(pi/2) sigma / sqrt(n); Kendall &
    # Stuart 1977, memory)
    rng = np.random.default_rng(13)
    n = 2001
    bh = bh_table(10 ** rng.normal(8, 0.3, n), np.full(n, 10**12.2), np.ones(n))
    t = build_tables(bh, merger_table([], [], []), None, cosmo,
                     Binning(log_mhalo_edges=(12, 12.5)))["mbh_mhalo"]
    scatter = np.std(np.median(rng.normal(8, 0.3, (2000, n)), axis=1))
    assert t["n_eff"][0] == pytest.approx(n, rel=1e-12)
    assert t["median_log_mbh_err"][0] == pytest.approx(scatter, rel=0.1)


def test_seed_channels_closed_form(cosmo):
    w = np.array([1e-3, 2e-3, 4e-3, 8e-3, 1.6e-2])
    mass = np.array([1e6, 1e7, 1e8, 1e5, 1e9])
    bh = bh_table(mass, [1e12] * 5, w, channel=["light", "heavy", "light", "heavy", "light"],
                  status=["central", "merged", "sinking", "central", "ejected"])
    m = merger_table([1.0, 2.0], [1e6, 1e6], [1e-3, 5e-3], c1=["light", "heavy"],
                     c2=["heavy", "heavy"])
    t = build_tables(bh, m, None, cosmo)["seed_channels"]
    assert str(t["mass_density_msun_mpc3"].unit) == "solMass / Mpc3"
    r = {row["channel"]: row for row in t}
    assert set(r) >= {"light", "heavy", "halo_mass", "dense_gas", "all"}
    assert r["light"]["n_seeded"] == 3
    assert r["light"]["seeded_density_mpc3"] == pytest.approx(w[[0, 2, 4]].sum())
    assert r["light"]["seeded_density_mpc3_err"] == pytest.approx(
        math.sqrt(np.sum(w[[0, 2, 4]] ** 2)))
    # present at the end: central or sinking (not merged, not ejected)
    assert r["light"]["n_final"] == 2
    assert r["light"]["mass_density_msun_mpc3"] == pytest.approx(1e-3 * 1e6 + 4e-3 * 1e8)
    assert r["heavy"]["number_density_mpc3"] == pytest.approx(8e-3)
    assert r["light"]["n_mergers"] == 1 and r["heavy"]["n_mergers"] == 2
    assert r["heavy"]["merger_density_mpc3"] == pytest.approx(6e-3)
    assert r["all"]["n_mergers"] == 2 and r["all"]["n_seeded"] == 5
    assert r["halo_mass"]["n_seeded"] == 0


def test_missing_weights_and_columns_are_input_errors(cosmo):
    bh = bh_table([1e6], [1e12], [np.nan])
    with pytest.raises(BhgrowInputError, match="weight_mpc3 is missing") as exc:
        build_tables(bh, merger_table([], [], []), None, cosmo)
    assert exc.value.rule == "no_volume"
    m = merger_table([1.0], [1e6], [1e-3])
    m.remove_column("q")
    with pytest.raises(BhgrowInputError, match="mergers: missing column"):
        build_tables(empty_bh(), m, None, cosmo)
    hist = histories_two_snapshots()
    with pytest.raises(BhgrowInputError, match="missing from black_holes"):
        build_tables(empty_bh(), merger_table([], [], []), hist, cosmo)
    with pytest.raises(BhgrowInputError, match="beyond the cosmology table range"):
        build_tables(empty_bh(), merger_table([], [], []), None, cosmo,
                     Binning(z_edges=(0, 40)))


def test_every_table_says_how_it_was_made(cosmo):
    bh = bh_table([2e6, 4e7, 1e9, 5e8], [1e12] * 4, [1e-3] * 4)
    tabs = build_tables(bh, merger_table([0.5], [1e6], [1e-3]), histories_two_snapshots(),
                        cosmo, meta={"seed": 5})
    assert tuple(tabs) == TABLE_NAMES
    for name, t in tabs.items():
        assert len(t.meta["description"]) > 100, name
        assert t.meta["made_by"].startswith("bhgrow ")
        assert t.meta["cosmology"] == "Planck18" and t.meta["seed"] == 5
        assert any(c.endswith("_err") for c in t.colnames), name
        for c in t.colnames:
            assert t[c].description, (name, c)


# ------------------------------------------------------------------------------------------
# files: write_tables, tables_from_run
def test_write_tables_ecsv_readable_by_pandas(tmp_path, cosmo):
    bh = bh_table([2e6, 4e7, 1e9, 5e8], [1e12] * 4, [1e-3] * 4)
    tabs = build_tables(bh, merger_table([0.5, 3.0], [1e6, 1e8], [1e-3, 2e-3]),
                        histories_two_snapshots(), cosmo)
    paths = write_tables(tabs, tmp_path / "tables")
    assert [p.name for p in paths] == [f"{n}.ecsv" for n in TABLE_NAMES]
    assert sorted(p.name for p in (tmp_path / "tables").iterdir()) == sorted(
        p.name for p in paths)                                  # no temporary files left
    for p, (name, t) in zip(paths, tabs.items()):
        text = p.read_text()
        assert text.startswith("# %ECSV") and "# delimiter: ','" in text
        back = Table.read(p)
        assert back.colnames == t.colnames
        assert "description" in back.meta
        for c in t.colnames:
            assert back[c].unit == t[c].unit
        df = pd.read_csv(p, comment="#")
        assert list(df.columns) == t.colnames and len(df) == len(t)
        for c in t.colnames:
            if t[c].dtype.kind == "f":
                assert np.allclose(df[c].to_numpy(float), np.asarray(t[c]), rtol=0,
                                   atol=0, equal_nan=True), (name, c)
    assert "unit: 1 / (Gyr Mpc3)" in paths[0].read_text()


def test_write_tables_failure_leaves_old_files(tmp_path, cosmo):
    tabs = build_tables(empty_bh(), merger_table([0.5], [1e6], [1e-3]), None, cosmo)
    out = tmp_path / "tables"
    write_tables(tabs, out)
    before = (out / "seed_channels.ecsv").read_text()

    class Broken:
        meta: dict = {}

        def write(self, *args, **kwargs):
            raise OSError("disk full")

    with pytest.raises(OSError, match="disk full"):
        write_tables({"seed_channels": Table(), "zz_broken": Broken()}, out)
    assert (out / "seed_channels.ecsv").read_text() == before
    assert not [p for p in out.iterdir() if p.name.startswith(".")]
    with pytest.raises(BhgrowInputError, match="parent directory"):
        write_tables(tabs, tmp_path / "no" / "such")


@pytest.fixture(scope="module")
def small_run(tmp_path_factory):
    f = load_forest(demo_trees_path())
    trees = tmp_path_factory.mktemp("trees") / "small.h5"
    write_hdf5(f.select_forests(f.forest_ids[::50]), trees)
    out = tmp_path_factory.mktemp("runs") / "run"
    return out, run(trees=trees, out=out)


def test_tables_from_run_round_trip(small_run, tmp_path):
    out, result = small_run
    assert len(result.mergers) > 0
    rebuilt = tables_from_run(out)
    direct = build_tables(result.black_holes, result.mergers, result.histories,
                          Cosmology.from_name("Planck18"))
    assert tuple(rebuilt) == TABLE_NAMES
    for name in TABLE_NAMES:
        a, b = rebuilt[name], direct[name]
        assert a.colnames == b.colnames
        for c in a.colnames:
            if a[c].dtype.kind in "fi":
                assert np.array_equal(np.asarray(a[c]), np.asarray(b[c]), equal_nan=True), \
                    (name, c)
            else:
                assert list(a[c]) == list(b[c])
        assert a.meta["run_dir"] == str(out.resolve())
    # the weighted mass function at the final snapshot integrates to the black holes there
    mf = rebuilt["bh_mass_function"]
    at0 = mf["z"] == 0
    h = result.histories
    bh = result.black_holes
    last = h["z"] == mf["z_snapshot"][at0][0]
    w = np.asarray(bh["weight_mpc3"])[np.searchsorted(bh["bh_id"], h["bh_id"][last])]
    width = mf["log_m_hi"] - mf["log_m_lo"]
    assert np.sum((mf["phi_mpc3_dex"] * width)[at0]) == pytest.approx(w.sum(), rel=1e-12)
    # the merger-rate table counts every merger of the run once
    assert rebuilt["merger_rate_density"]["n_mergers"].sum() + \
        rebuilt["merger_rate_density"].meta["n_outside"] == len(result.mergers)
    paths = write_tables(rebuilt, tmp_path / "tables")
    assert len(paths) == len(TABLE_NAMES)


def test_tables_from_bad_run_dir(small_run, tmp_path):
    import shutil

    with pytest.raises(BhgrowInputError, match="no such run directory"):
        tables_from_run(tmp_path / "nothing_here")
    out, _ = small_run
    for missing in ("mergers.ecsv", "black_holes.ecsv", "histories.h5"):
        broken = tmp_path / f"without_{missing}"
        shutil.copytree(out, broken)
        (broken / missing).unlink()
        with pytest.raises(BhgrowInputError, match=missing.replace(".", r"\.")) as exc:
            tables_from_run(broken)
        assert exc.value.rule == "no_file"
    bad = tmp_path / "bad_ecsv"
    shutil.copytree(out, bad)
    (bad / "mergers.ecsv").write_text("this is not a table\n")
    with pytest.raises(BhgrowInputError, match=r"mergers\.ecsv: not a readable ECSV"):
        tables_from_run(bad)
    nohist = tmp_path / "bad_hist"
    shutil.copytree(out, nohist)
    with h5py.File(nohist / "histories.h5", "a") as h5:
        del h5["eddington_ratio"]
    with pytest.raises(BhgrowInputError, match=r"histories\.h5: missing dataset"):
        tables_from_run(nohist)
    nocfg = tmp_path / "no_config"
    shutil.copytree(out, nocfg)
    (nocfg / "config.toml").unlink()
    (nocfg / "run.json").unlink()
    with pytest.raises(BhgrowInputError, match=r"config\.toml: missing"):
        tables_from_run(nocfg)
