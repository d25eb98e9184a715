"""Tests of bhgrow.physics.gas against sources outside the project.

Each check names its source beside it: a closed form (with its author and year), an
independent numerical solution (scipy ``solve_ivp``, Virtanen et al. 2020), a unit
conversion done by astropy (Astropy Collaboration 2022), or a handbook value. Values written
from memory are marked "(memory)".
"""

from __future__ import annotations

import math

import astropy.constants as ac
import astropy.units as u
import numpy as np
import pytest
from scipy.integrate import solve_ivp

from bhgrow.errors import ParameterError
from bhgrow.physics import gas
from bhgrow.physics.gas import (
    GasStep,
    GasZone,
    Reionization,
    StarFormation,
    dynamical_time_gyr,
    gnedin_baryon_fraction,
)

FB = 0.157  # cosmic baryon fraction, Planck 2018 (memory); only a scale here


# --- Reionization: Gnedin (2000) / Okamoto et al. (2008) form ---------------------------------
@pytest.mark.parametrize("alpha", [1.0, 2.0, 3.5])
def test_gnedin_half_at_characteristic_mass(alpha):
    # closed form: at M = M_c, [1 + (2^(a/3) - 1)]^(3/a) = (2^(a/3))^(3/a) = 2, so
    # f_b,eff = f_b / 2 for every alpha (Gnedin 2000 definition of M_c; Okamoto et al. 2008)
    mc = np.array([1e7, 3e8, 1e10])
    np.testing.assert_allclose(gnedin_baryon_fraction(mc, mc, FB, alpha), FB / 2, rtol=1e-14)


@pytest.mark.parametrize("alpha", [1.0, 2.0])
def test_gnedin_limits(alpha):
    mc = 1e9
    k = 2.0 ** (alpha / 3.0) - 1.0
    # M >> M_c: f/f_b = 1 - (3/a) k (M_c/M)^a + O((M_c/M)^(2a))  (Taylor expansion of Gnedin 2000)
    big = np.array([1e12, 1e14])
    f = gnedin_baryon_fraction(big, mc, FB, alpha) / FB
    expect = 1.0 - 3.0 / alpha * k * (mc / big) ** alpha
    np.testing.assert_allclose(1.0 - f, 1.0 - expect, rtol=1e-3 if alpha == 1 else 1e-6)
    assert np.all(f < 1.0)
    # M << M_c: f/f_b -> k^(-3/a) (M/M_c)^3 -> 0  (leading term of Gnedin 2000 form; the
    # next term is relatively (3/a)(M/M_c)^a / k <= 1.2e-4 here)
    small = np.array([1e3, 1e4])
    f = gnedin_baryon_fraction(small, mc, FB, alpha) / FB
    np.testing.assert_allclose(f, k ** (-3.0 / alpha) * (small / mc) ** 3, rtol=2e-4)
    assert np.all(f < 1e-9)


def test_reionization_before_and_after():
    reion = Reionization()
    m = np.array([1e6, 1e8, 1e10, 1e13])
    # before reionization no suppression: f_b,eff == f_b exactly
    np.testing.assert_array_equal(reion.baryon_fraction(m, 12.0, FB), FB)
    np.testing.assert_array_equal(reion.baryon_fraction(m, reion.z_reion + 1e-9, FB), FB)
    # after: monotonic in M, half at M_c(z), M_c = M_c0 (1+z)^(-3/2) (fixed-T_vir scaling,
    # Barkana & Loeb 2001)
    z = np.array([0.0, 2.0, 6.0])
    mc = reion.characteristic_mass_msun(z)
    np.testing.assert_allclose(mc, reion.m_c0_msun * (1.0 + z) ** -1.5, rtol=1e-14)
    np.testing.assert_allclose(reion.baryon_fraction(mc, z, FB), FB / 2, rtol=1e-14)
    f = reion.baryon_fraction(np.logspace(5, 14, 50), 3.0, FB)
    assert np.all(np.diff(f) > 0)
    # default z_reion = 7.7 (Planck 2018 VI, memory); M_c(z=0) = 6.5e9 Msun/h, h = 0.73
    # (Okamoto et al. 2008, memory)
    assert reion.z_reion == 7.7
    assert float(reion.characteristic_mass_msun(0.0)) == pytest.approx(6.5e9 / 0.73)


# --- StarFormation: exact solution of the linear system -------------------------------------
def _reference(sf: StarFormation, mg0, ms0, mz0, inflow, tdyn, vc, dt):
    """Integrate the step's ODEs with scipy (DOP853, rtol 1e-13) including running totals."""
    eta = (vc / sf.v0_kms) ** (-sf.alpha)    # Cole et al. 2000 mass loading
    r, y, s = sf.recycle, sf.metal_yield, sf.efficiency / tdyn

    def rhs(t, q):
        mg, mz = q[0], q[1]
        return [inflow - (1 - r + eta) * s * mg,                # gas
                y * (1 - r) * s * mg - (1 - r + eta) * s * mz,  # metals in gas
                (1 - r) * s * mg,                                # stars
                eta * s * mg,                                    # outflow
                eta * s * mz,                                    # metals in outflow
                (1 - r) * s * mz]                                # metals locked

    sol = solve_ivp(rhs, (0.0, dt), [mg0, mz0, ms0, 0.0, 0.0, 0.0], method="DOP853",
                    rtol=1e-13, atol=1e-30 + 1e-14 * (mg0 + inflow * dt))
    return sol.y[:, -1]


CASES = [
    # mg0,   ms0,  mz0,    inflow, t_dyn, v_c,   dt      (a dt = x from 4e-7 to 60)
    (1e8, 0.0, 0.0, 10.0, 0.05, 50.0, 0.1),
    (1e8, 3e7, 2e5, 1e9, 0.02, 300.0, 0.5),
    (0.0, 0.0, 0.0, 5e7, 0.1, 120.0, 0.3),
    (2e6, 1e5, 1e3, 0.0, 0.5, 20.0, 0.2),
    (5e9, 0.0, 1e7, 3e9, 1e3, 500.0, 0.01),    # x = 4e-7: near the a -> 0 limit
    (1e8, 0.0, 1e4, 1e9, 1.0, 150.0, 0.5),     # x = 0.06: Taylor-series branch
    (1e7, 0.0, 0.0, 2e8, 0.01, 30.0, 0.05),    # x = 11 (strong outflow)
    (1e7, 1e6, 1e3, 2e8, 0.01, 30.0, 0.27),    # x = 61
]


@pytest.mark.parametrize("case", CASES)
def test_step_matches_solve_ivp(case):
    # independent numerical solution of the same ODEs (scipy solve_ivp, Virtanen et al. 2020)
    sf = StarFormation(efficiency=0.05, v0_kms=200.0, alpha=2.0, recycle=0.43, metal_yield=0.03)
    mg0, ms0, mz0, inflow, tdyn, vc, dt = case
    out = sf.step(np.array([mg0]), np.array([ms0]), np.array([mz0]), np.array([inflow]),
                  np.array([tdyn]), np.array([vc]), dt)
    ref = _reference(sf, *case)
    got = np.array([out.gas[0], out.metals[0], out.stars[0], out.outflow_msun[0],
                    out.metals_outflow_msun[0], out.metals_locked_msun[0]])
    scale = np.maximum(np.abs(ref), 1e-12 * (mg0 + mz0 + inflow * dt + 1.0))
    np.testing.assert_array_less(np.abs(got - ref) / scale, 1e-8)
    assert out.stars_formed_msun[0] == pytest.approx(out.stars[0] - ms0, rel=1e-12, abs=1e-300)


def test_step_vectorized_equals_elementwise():
    # the vectorized call over all cases gives the same numbers as one call per case
    sf = StarFormation()
    cols = [np.array(c) for c in zip(*CASES)]
    allout = sf.step(*cols)
    for i, case in enumerate(CASES):
        one = sf.step(*(np.array([v]) for v in case))
        for a, b in zip(allout, one):
            assert a[i] == b[0]


def test_engine_step_without_metal_flows_is_the_same_step():
    # the engine's unchecked StarFormation._evolve(metal_flows=False) is StarFormation.step
    # (checked above against solve_ivp) minus the two metal-flow fields
    sf = StarFormation()
    cols = [np.array(c, dtype=float) for c in zip(*CASES)]
    full = sf.step(*cols)
    lean = sf._evolve(*cols, metal_flows=False)
    for name in ("gas", "stars", "metals", "outflow_msun", "stars_formed_msun"):
        np.testing.assert_array_equal(getattr(lean, name), getattr(full, name), err_msg=name)
    assert lean.metals_outflow_msun is None and lean.metals_locked_msun is None


def _quiet_step():
    from conftest import require_kernels

    return require_kernels().quiet_step


@pytest.mark.parametrize("case", CASES)
def test_compiled_quiet_step_matches_solve_ivp(case):
    # the engine's compiled quiet-halo step (bhgrow._kernels) against the same
    # independent solution as above (scipy solve_ivp, Virtanen et al. 2020); only the rows
    # selected are written
    quiet_step = _quiet_step()

    sf = StarFormation(efficiency=0.05, v0_kms=200.0, alpha=2.0, recycle=0.43, metal_yield=0.03)
    mg0, ms0, mz0, inflow, tdyn, vc, dt = case
    gas_, stars, metals, blown = (np.array([v, v]) for v in (mg0, ms0, mz0, -1.0))
    quiet_step(sf, np.full(2, inflow), np.full(2, tdyn), np.full(2, vc), np.full(2, dt),
               np.array([True, False]), gas_, stars, metals, blown)
    ref = _reference(sf, *case)
    got = np.array([gas_[0], metals[0], stars[0], blown[0]])
    scale = np.maximum(np.abs(ref[:4]), 1e-12 * (mg0 + mz0 + inflow * dt + 1.0))
    np.testing.assert_array_less(np.abs(got - ref[:4]) / scale, 1e-8)
    assert (gas_[1], stars[1], metals[1], blown[1]) == (mg0, ms0, mz0, -1.0)


@pytest.mark.parametrize("alpha", [2.0, 0.0, 1.0, 1.5])
def test_compiled_quiet_step_is_the_array_step(alpha):
    # the kernel follows StarFormation._evolve formula by formula: round-off apart, the same
    # numbers over a wide random sweep (a dt from 1e-6 to 1e3, both series branches; the
    # mass-loading slopes the kernel takes as products, and one it takes with pow)
    quiet_step = _quiet_step()
    rng = np.random.default_rng(5)
    n = 50_000
    sf = StarFormation(alpha=alpha)
    cols = [10.0 ** rng.uniform(lo, hi, n) for lo, hi in
            ((4, 11), (3, 11), (0, 8), (5, 11), (-3, 1), (1, 3), (-4, 0.5))]
    cols[0][::17] = 0.0
    ref = sf._evolve(*cols, metal_flows=False)
    gas_, stars, metals = (c.copy() for c in cols[:3])
    blown = np.zeros(n)
    quiet_step(sf, *cols[3:], np.ones(n, dtype=bool), gas_, stars, metals, blown)
    for got, want in ((gas_, ref.gas), (stars, ref.stars), (metals, ref.metals),
                      (blown, ref.outflow_msun)):
        np.testing.assert_allclose(got, want, rtol=1e-13, atol=0.0)


def test_step_steady_state():
    # closed form: for dt >> 1/a, M_g -> I/a and M_Z -> p I / a^2, i.e. the equilibrium
    # metallicity Z_eq = y (1 - R) / (1 - R + eta) of the "bathtub" model with pristine inflow
    # (Lilly et al. 2013, ApJ 772, 119; Davé, Finlator & Oppenheimer 2012)
    sf = StarFormation()
    vc = np.array([30.0, 100.0, 400.0])
    tdyn = np.array([0.01, 0.05, 0.2])
    inflow = np.array([1e7, 1e9, 3e10])
    eta = sf.mass_loading(vc)
    a = (1.0 - sf.recycle + eta) * sf.efficiency / tdyn
    out = sf.step(np.array([1e6, 1e10, 0.0]), 0.0, 0.0, inflow, tdyn, vc, 200.0 / a)
    np.testing.assert_allclose(out.gas, inflow / a, rtol=1e-12)
    z_eq = sf.metal_yield * (1.0 - sf.recycle) / (1.0 - sf.recycle + eta)
    np.testing.assert_allclose(out.metals / out.gas, z_eq, rtol=1e-12)


def test_step_conserves_mass_and_metals():
    # bookkeeping identities of the equations: gas + stars + outflow = initial + I dt, and
    # metals in gas + locked + ejected = initial + y * (mass locked in stars)  (Tinsley 1980)
    sf = StarFormation()
    g = np.random.default_rng(12345)
    n = 2000
    mg0 = 10 ** g.uniform(0, 11, n)
    ms0 = 10 ** g.uniform(0, 11, n)
    mz0 = mg0 * 10 ** g.uniform(-8, -1.5, n)
    inflow = 10 ** g.uniform(-2, 11, n)
    tdyn = 10 ** g.uniform(-3, 1, n)
    vc = 10 ** g.uniform(0, 3, n)
    dt = 10 ** g.uniform(-5, 0.5, n)
    out = sf.step(mg0, ms0, mz0, inflow, tdyn, vc, dt)
    before = mg0 + ms0 + inflow * dt
    after = out.gas + out.stars + out.outflow_msun
    np.testing.assert_allclose(after, before, rtol=1e-13)
    z_before = mz0 + sf.metal_yield * out.stars_formed_msun
    z_after = out.metals + out.metals_locked_msun + out.metals_outflow_msun
    np.testing.assert_allclose(z_after, z_before, rtol=1e-12)
    for arr in out:
        assert np.all(arr >= 0.0) and np.all(np.isfinite(arr))


def test_step_no_star_formation_limit():
    # a -> 0 (t_dyn -> inf): gas grows linearly, nothing else changes (closed form)
    sf = StarFormation()
    out = sf.step(np.array([5.0, 1e9]), np.array([1.0, 2.0]), np.array([0.1, 3.0]),
                  np.array([2.0, 1e8]), np.inf, np.array([50.0, 50.0]), 0.7)
    np.testing.assert_array_equal(out.gas, [5.0 + 1.4, 1e9 + 0.7e8])
    np.testing.assert_array_equal(out.stars, [1.0, 2.0])
    np.testing.assert_array_equal(out.metals, [0.1, 3.0])
    np.testing.assert_array_equal(out.outflow_msun, 0.0)
    # dt = 0: nothing changes
    out = sf.step(1e8, 1e7, 1e5, 1e9, 0.05, 100.0, 0.0)
    assert (float(out.gas), float(out.stars), float(out.metals)) == (1e8, 1e7, 1e5)


def test_series_branch_is_continuous():
    # the Taylor-series branch (a dt < 0.5) and the exp branch agree across the switch to
    # round-off: the phi-functions are smooth (Hochbruck & Ostermann 2010)
    x = np.array([0.5 * (1 - 1e-12), 0.5 * (1 + 1e-12), 1e-9, 0.0, 1e-300])
    e, phi1, phi2, psi, chi = gas._decay_integrals(x)
    for f in (phi1, phi2, psi, chi):
        assert f[0] == pytest.approx(f[1], rel=1e-11)
    # limits at x -> 0: 1, 1/2, 1/2, 1/6 (Taylor coefficients)
    for f, lim in ((phi1, 1.0), (phi2, 0.5), (psi, 0.5), (chi, 1.0 / 6.0)):
        assert f[3] == lim and f[4] == lim
        assert f[2] == pytest.approx(lim, rel=1e-8)


def test_closed_box_simple_model():
    # closed box (I = 0, eta = 0, Z0 = 0): Z = -y ln(mu), mu = M_g / (M_g + M_*), with the
    # yield defined per unit mass locked in stars and instantaneous recycling
    # (Searle & Sargent 1972, ApJ 173, 25; Tinsley 1980, Fund. Cosmic Phys. 5, 287)
    # eta = (V_c / V_0)^-1 = 1e-20: zero to double precision beside 1 - R
    sf = StarFormation(efficiency=0.1, alpha=1.0, v0_kms=1e-10)
    vc = np.array([1e10])
    mg0 = 1e9
    dts = np.array([0.01, 0.1, 1.0, 5.0])
    out = sf.step(mg0, 0.0, 0.0, 0.0, 0.05, vc, dts)
    mu = out.gas / (out.gas + out.stars)
    np.testing.assert_allclose(out.metals / out.gas, -sf.metal_yield * np.log(mu), rtol=1e-9)


def test_leaky_box_effective_yield():
    # outflow proportional to the SFR (I = 0): Z = y (1 - R)/(1 - R + eta) ln(M_g0 / M_g),
    # the leaky-box model (Hartwick 1976, ApJ 209, 418)
    sf = StarFormation()
    vc = np.array([40.0, 150.0, 600.0])
    eta = sf.mass_loading(vc)
    out = sf.step(1e9, 0.0, 0.0, 0.0, 0.05, vc, 2.0)
    y_eff = sf.metal_yield * (1 - sf.recycle) / (1 - sf.recycle + eta)
    np.testing.assert_allclose(out.metals / out.gas, y_eff * np.log(1e9 / out.gas), rtol=1e-10)


def test_mass_loading_values():
    # eta = (V_c / V_0)^-alpha (Cole et al. 2000, MNRAS 319, 168): 1 at V_0, 4 at V_0/2 (alpha 2)
    sf = StarFormation(v0_kms=200.0, alpha=2.0)
    np.testing.assert_allclose(sf.mass_loading([200.0, 100.0, 400.0]), [1.0, 4.0, 0.25],
                               rtol=1e-15)


def test_step_rejects_bad_arrays():
    sf = StarFormation()
    with pytest.raises(ValueError, match="`t_dyn` must be > 0"):
        sf.step(1.0, 0.0, 0.0, 1.0, np.array([0.1, 0.0]), 100.0, 0.1)
    with pytest.raises(ValueError, match="`inflow_rate` must be >= 0"):
        sf.step(1.0, 0.0, 0.0, -1.0, 0.1, 100.0, 0.1)
    with pytest.raises(ValueError, match="`gas` must be >= 0"):
        sf.step(np.nan, 0.0, 0.0, 1.0, 0.1, 100.0, 0.1)


def test_star_formation_defaults_memory():
    # defaults: R = 0.43 Chabrier (memory), y = 0.03 (De Lucia et al. 2004, memory),
    # V_0 = 200 km/s and alpha = 2 (Cole et al. 2000, memory), eps = 0.017 (Kennicutt 1998,
    # memory)
    sf = StarFormation()
    assert (sf.recycle, sf.metal_yield, sf.v0_kms, sf.alpha, sf.efficiency) == (
        0.43, 0.03, 200.0, 2.0, 0.017)
    assert isinstance(sf.step(1.0, 0.0, 0.0, 1.0, 0.1, 100.0, 0.1), GasStep)


# --- GasZone ----------------------------------------------------------------------------------
def test_dynamical_time_units():
    # 1 kpc / (1 km/s) = 0.9778 Gyr (astropy units)
    ref = (1 * u.kpc / (1 * u.km / u.s)).to_value(u.Gyr)
    assert float(dynamical_time_gyr(1.0, 1.0)) == pytest.approx(ref, rel=1e-14)
    assert ref == pytest.approx(0.9778, rel=1e-4)  # handbook value (memory)
    np.testing.assert_allclose(dynamical_time_gyr([2.0, 10.0], [100.0, 50.0]),
                               [0.02 * ref, 0.2 * ref], rtol=1e-14)


def test_zone_density_and_hydrogen_density():
    zone = GasZone(radius_frac=0.04)
    m_gas = np.array([1e6, 1e9, 0.0])
    r_vir = np.array([2.0, 50.0, 10.0])
    st = zone.state(m_gas, r_vir, np.array([5e3, 2e5, 2e5]))
    r = 0.04 * r_vir
    rho_ref = (m_gas * u.Msun / (4 / 3 * np.pi * (r * u.kpc) ** 3))
    np.testing.assert_allclose(st.rho_msun_kpc3, rho_ref.to_value(u.Msun / u.kpc**3),
                               rtol=1e-14)
    # n_H = X rho / m_p, X = 0.76 (memory), converted by astropy
    n_ref = (0.76 * rho_ref / ac.m_p).to_value(u.cm**-3)
    np.testing.assert_allclose(st.n_h_cm3, n_ref, rtol=1e-12)
    # order of magnitude: 1 Msun/pc^3 ~ 40 hydrogen atoms per cm^3 for X = 0.76 (handbook,
    # 1 Msun/pc^3 = 6.77e-23 g/cm^3, memory)
    n1 = float(gas.hydrogen_density_cm3(1e9))
    assert n1 == pytest.approx(0.76 * 6.77e-23 / 1.6726e-24, rel=2e-3)


def test_sound_speed_handbook():
    # c_s = sqrt(k T / (mu m_p)) at 1e4 K: ~8.2 km/s neutral (mu = 1.22), ~11.8 km/s ionized
    # (mu = 0.59) (handbook values, memory); cross-checked with astropy constants
    for mu, ref in ((1.22, 8.2), (0.59, 11.8)):
        cs = float(gas.sound_speed_kms(1e4, mu))
        exact = np.sqrt(ac.k_B * 1e4 * u.K / (mu * ac.m_p)).to_value(u.km / u.s)
        assert cs == pytest.approx(exact, rel=1e-12)
        assert cs == pytest.approx(ref, abs=0.1)
    # adiabatic gamma = 5/3 multiplies by sqrt(5/3) (ideal gas)
    assert float(gas.sound_speed_kms(1e4, 0.59, 5 / 3)) == pytest.approx(
        np.sqrt(5 / 3) * float(gas.sound_speed_kms(1e4, 0.59)), rel=1e-14)
    # mean molecular weights of primordial gas with X = 0.76: 1.22 neutral, 0.59 ionized
    # (Barkana & Loeb 2001, memory)
    assert gas.MU_NEUTRAL == pytest.approx(1.22, abs=0.005)
    assert gas.MU_IONIZED == pytest.approx(0.59, abs=0.005)


def test_zone_temperature_phases():
    zone = GasZone()
    tv = np.array([500.0, 5e3, 1e4, 3e5, zone.hot_t_vir_k, 1e7])
    t_gas, mu = zone.temperature_k(tv)
    # minihaloes: gas at T_vir; cold-mode haloes: 1e4 K neutral; hot haloes: T_vir ionized
    # (DESIGN §6 rule; Dekel & Birnboim 2006 for the hot mode)
    np.testing.assert_array_equal(t_gas, [500.0, 5e3, 1e4, 1e4, zone.hot_t_vir_k, 1e7])
    np.testing.assert_array_equal(mu, [gas.MU_NEUTRAL] * 4 + [gas.MU_IONIZED] * 2)
    t_gas, _ = GasZone(minihalo_gas_at_t_vir=False).temperature_k(tv)
    assert t_gas[0] == 1e4
    st = zone.state(1e8, 10.0, tv)
    t_ref = np.array([500.0, 5e3, 1e4, 1e4, zone.hot_t_vir_k, 1e7])
    np.testing.assert_allclose(st.cs_kms, gas.sound_speed_kms(t_ref, mu), rtol=1e-14)


def test_zone_hydrogen_density_alone_equals_state():
    # the engine's seeding needs n_H only; it must be the number state() gives
    zone = GasZone()
    g = np.array([0.0, 1e6, 3e9])
    rv = np.array([1.0, 10.0, 200.0])
    np.testing.assert_array_equal(zone.hydrogen_density(g, rv),
                                  zone.state(g, rv, np.full(3, 1e4)).n_h_cm3)


def test_zone_radius_mo_mao_white():
    # R_d = lambda r_vir / sqrt(2) (Mo, Mao & White 1998); default 0.04 <-> lambda ~ 0.057
    assert GasZone().radius_frac == 0.04
    assert float(GasZone(radius_frac=0.05 / math.sqrt(2)).radius_kpc(100.0)) == pytest.approx(
        100.0 * 0.05 / math.sqrt(2), rel=1e-15)


# --- parameter validation ---------------------------------------------------------------------
@pytest.mark.parametrize("cls, kwargs, message", [
    (Reionization, {"alpha": -1.0}, "`alpha` of Reionization must be > 0; got -1.0"),
    (Reionization, {"z_reion": float("nan")}, "`z_reion` of Reionization must be finite; got nan"),
    (StarFormation, {"efficiency": 1.5},
     "`efficiency` of StarFormation must be in (0, 1]; got 1.5"),
    (StarFormation, {"recycle": 1.0}, "`recycle` of StarFormation must be in [0, 1); got 1.0"),
    (StarFormation, {"v0_kms": 0}, "`v0_kms` of StarFormation must be > 0; got 0"),
    (StarFormation, {"metal_yield": "0.03"},
     "`metal_yield` of StarFormation must be a number; got '0.03'"),
    (GasZone, {"radius_frac": 0.0}, "`radius_frac` of GasZone must be in (0, 1]; got 0.0"),
    (GasZone, {"gamma": 2.0}, "`gamma` of GasZone must be in [1, 1.66667]; got 2.0"),
    (GasZone, {"hot_t_vir_k": 5e3},
     "`hot_t_vir_k` of GasZone must be >= t_cold_k (10000); got 5000.0"),
    (GasZone, {"minihalo_gas_at_t_vir": 1},
     "`minihalo_gas_at_t_vir` of GasZone must be True or False; got 1"),
])
def test_parameter_messages(cls, kwargs, message):
    with pytest.raises(ParameterError) as err:
        cls(**kwargs)
    assert str(err.value) == message


def test_components_are_frozen():
    sf = StarFormation()
    with pytest.raises(AttributeError):
        sf.efficiency = 0.5
