"""The compiled kernels (:mod:`bhgrow._kernels`, C) against the array code they are
written from: the coupled solver (``bhgrow.physics.coupled._advance``), the smooth accretion
of the engine's step 1 and the counter-based random numbers of :mod:`bhgrow.rng` (the last
two bit for bit).

The physics checks of the solver (closed-form limits, solve_ivp; Salpeter 1964, Bondi 1952,
Tinsley 1980) are in ``test_coupled.py`` and run on both implementations. Here the two are
compared halo by halo over a wide random sweep of the regimes, and on a whole engine run:
they follow the same formulas in the same order, so they agree to round-off except where a
phase switch lands elsewhere within its tolerance band (``_EDD_TOL`` = 1e-3 of the Eddington
rate), which moves a hole's mass by far less than that band.
"""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest

from bhgrow.config import load_config
from bhgrow.cosmology import Cosmology
from bhgrow.engine import run_forest
from bhgrow import _kernels
from bhgrow.physics import coupled
from conftest import require_kernels
from bhgrow.physics.coupled import Coefficients, advance, substeps
from bhgrow.trees.toy import toy_forest


def _sweep(n: int, seed: int):
    """Halos drawn log-uniformly across the solver's regimes: drained and empty reservoirs,
    no inflow, no star formation, Bondi- and Eddington-fed holes, strong feedback."""
    rng = np.random.default_rng(seed)

    def lu(lo, hi):
        return 10.0 ** rng.uniform(lo, hi, n)

    gas = lu(4, 11) * (rng.random(n) > 0.05)
    loss = lu(-2, 1.5) * (rng.random(n) > 0.02)
    c = Coefficients(inflow=lu(6, 11) * (rng.random(n) > 0.05), loss=loss, lock=0.5 * loss,
                     metal_rate=lu(-4, -2), bondi_per_gas=lu(-22, -12),
                     edd=22.0 * rng.uniform(0.5, 1.5, n), keep=rng.uniform(0.6, 0.95, n),
                     per_unit=1.0 + lu(-2, 2.5))
    state = dict(gas=gas, metals=gas * lu(-4, -1.5), m_bh=lu(2, 9), dt=rng.uniform(0.01, 1.0, n))
    prior = np.where(rng.random(n) < 0.5, lu(-3, 1), 0.0)
    return state, c, prior


def _both(state, c, **kw):
    """The kernel's and the array code's results for the same halos."""
    args = (state["gas"], state["metals"], state["m_bh"], c, state["dt"])
    compiled = advance(*args, **kw)
    with np.errstate(all="ignore"):
        array = coupled._advance(*args, kw.get("n_steps"), kw.get("max_dlnm"),
                                 kw.get("prior_rate"))
    return compiled, array


def _scaled_errors(state, c, a, b):
    """Differences of the five state fields, each on its own scale (Msun, Msun Gyr)."""
    supply = state["gas"] + c.inflow * state["dt"] + 1.0
    return {
        "gas": np.abs(a.gas - b.gas) / supply,
        "metals": np.abs(a.metals - b.metals) / (state["metals"] + c.metal_rate * supply
                                                 * state["dt"] + 1e-30),
        "m_bh": np.abs(a.m_bh - b.m_bh) / b.m_bh,
        "accreted": np.abs(a.accreted - b.accreted) / (b.m_bh / c.keep),
        "gas_integral": np.abs(a.gas_integral - b.gas_integral) / (supply * state["dt"]),
    }


@pytest.fixture(autouse=True)
def kernels():
    return require_kernels()


@pytest.mark.parametrize("seed", [0, 1])
def test_kernel_matches_the_array_code_across_regimes(seed):
    state, c, prior = _sweep(40_000, seed)
    n_sub = substeps(state["gas"], state["m_bh"], c, state["dt"], 0.5, 100)
    a, b = _both(state, c, n_steps=n_sub, max_dlnm=0.5, prior_rate=prior)
    assert np.all(np.isfinite(a.m_bh)) and np.all(a.m_bh >= state["m_bh"])
    for name, err in _scaled_errors(state, c, a, b).items():
        # round-off almost everywhere; a switch placed elsewhere in the 1e-3 band at most
        assert np.quantile(err, 0.999) < 1e-9, name
        assert err.max() < 1e-3, name
    # the derived fields follow from the same integrals
    np.testing.assert_allclose(a.stars_formed, c.lock * a.gas_integral, rtol=1e-15)
    np.testing.assert_allclose(a.feedback, (c.per_unit - 1.0) * a.accreted, rtol=1e-15)


def test_kernel_matches_without_steps_or_prior():
    """The defaults of :func:`advance`: one Bondi step, no step control, no prior rate."""
    state, c, _ = _sweep(20_000, 2)
    a, b = _both(state, c)
    for name, err in _scaled_errors(state, c, a, b).items():
        assert np.quantile(err, 0.999) < 1e-9, name
        assert err.max() < 1e-3, name


def test_each_halo_depends_on_itself_alone():
    """Reordering or splitting the halos changes no result, bit for bit (DESIGN: results
    independent of chunking)."""
    state, c, prior = _sweep(5_000, 3)
    n_sub = substeps(state["gas"], state["m_bh"], c, state["dt"], 0.5, 100)
    whole = advance(state["gas"], state["metals"], state["m_bh"], c, state["dt"], n_sub, 0.5,
                    prior)
    perm = np.random.default_rng(4).permutation(5_000)
    part = advance(state["gas"][perm], state["metals"][perm], state["m_bh"][perm],
                   c.take(perm), state["dt"][perm], n_sub[perm], 0.5, prior[perm])
    for x, y in zip(whole, part):
        assert np.array_equal(x[perm], y, equal_nan=True)


def test_engine_run_agrees_with_the_array_code(monkeypatch):
    # both compiled kernels (the solver and the quiet-halo reservoir step) against the array
    # code, over a whole engine run
    cfg = load_config()
    cosmo = Cosmology.from_name(cfg.run.cosmology)
    forest = toy_forest(300, seed=11, n_snap=25, box_mpc=30.0)
    fast = run_forest(forest, cfg.model, cfg.run, cosmo)
    monkeypatch.setattr(_kernels, "_KERNELS", None)
    ref = run_forest(forest, cfg.model, cfg.run, cosmo)
    assert len(fast.black_holes) == len(ref.black_holes) > 50
    assert np.array_equal(fast.black_holes.bh_id, ref.black_holes.bh_id)
    np.testing.assert_allclose(fast.black_holes.mass, ref.black_holes.mass, rtol=1e-6)
    assert len(fast.mergers["z"]) == len(ref.mergers["z"])


def test_environment_selects_the_array_code():
    code = "from bhgrow import _kernels; print(_kernels.kernels() is None)"
    for value, expect in (("0", "True"), ("1", "False")):
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                             env={**os.environ, "BHGROW_KERNELS": value}, check=True)
        assert out.stdout.strip() == expect


def test_the_built_extension_is_the_one_the_loader_calls():
    from bhgrow import _ckernels

    assert _ckernels.VERSION == _kernels._VERSION


def test_a_stale_build_is_not_used(monkeypatch):
    from bhgrow import _ckernels

    monkeypatch.setattr(_ckernels, "VERSION", _kernels._VERSION + 1)
    monkeypatch.setattr(_kernels, "_KERNELS", False)
    with pytest.warns(RuntimeWarning, match="out of date"):
        assert _kernels.kernels() is None
    monkeypatch.setattr(_kernels, "_KERNELS", False)   # loaded afresh by the next user


def test_random_numbers_are_the_numpy_bits(monkeypatch):
    # bhgrow.rng's counter-based draws (SplitMix64, Steele, Lea & Flood 2014) in C give the
    # numpy code's bits exactly: the streams must not depend on whether the extension is built
    from bhgrow import rng

    ids = np.random.default_rng(8).integers(-2**62, 2**62, 10_000, dtype=np.int64)
    ids[:3] = (0, -1, np.iinfo(np.int64).max)
    fast_keys = rng.stream_keys(12345, ids)
    fast_u = [rng.uniform(fast_keys, step, purpose) for step, purpose in ((0, 0), (7, 3))]
    monkeypatch.setattr(_kernels, "_KERNELS", None)
    keys = rng.stream_keys(12345, ids)
    assert fast_keys.dtype == keys.dtype == np.uint64
    assert np.array_equal(fast_keys, keys)
    for got, (step, purpose) in zip(fast_u, ((0, 0), (7, 3))):
        want = rng.uniform(keys, step, purpose)
        assert np.array_equal(got, want)
        assert got.min() >= 0.0 and got.max() < 1.0


def test_smooth_growth_is_the_numpy_sum():
    # the descendant's mass beyond its progenitors', credited to its main progenitor, in
    # the bincount's order of summation (bit for bit), zero where a node is not a main
    # progenitor or has no descendant
    forest = toy_forest(200, seed=3, n_snap=15, box_mpc=20.0)
    desc, mass = forest.desc_index, forest.mass_msun
    for k in range(forest.snapshots.z.size):
        sl = forest.snapshot_slice(k)
        got = _kernels.kernels().smooth_growth(forest, sl.start, sl.stop)
        want = np.zeros(sl.stop - sl.start)
        rows = np.arange(sl.start, sl.stop)
        has = desc[sl] >= 0
        go, d = rows[has], desc[sl][has]
        if d.size:
            lo, span = int(d.min()), int(d.max() - d.min()) + 1
            progs = forest.prog_index[forest.prog_offsets[lo]:forest.prog_offsets[lo + span]]
            psum = np.bincount(desc[progs] - lo, weights=mass[progs], minlength=span)
            main = forest.main_prog[d] == go
            want[go[main] - sl.start] = np.maximum(mass[d[main]] - psum[d[main] - lo], 0.0)
        assert np.array_equal(got, want)


def test_smooth_growth_refuses_an_index_outside_the_forest():
    forest = toy_forest(5, seed=3, n_snap=6, box_mpc=20.0)
    bad = forest.prog_index.copy()
    bad[0] = forest.n_nodes + 5
    with pytest.raises(ValueError, match="outside the forest"):
        _kernels.kernels()._ext.smooth_growth(0, forest.n_nodes, forest.desc_index,
                                              forest.main_prog, forest.mass_msun,
                                              forest.prog_offsets, bad,
                                              np.zeros(forest.n_nodes))
