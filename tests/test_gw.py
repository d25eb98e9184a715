"""Tests of bhgrow.gw against sources outside the project.

References used below (values written from memory are marked "(memory)")
-----------------------------------------------------------------------
* Robson T., Cornish N. J., Liu C., 2019, CQG 36, 105011 (RCL19): LISA sensitivity, eqs. 1,
  10-11, 13 and galactic confusion noise eq. 14 with Table 1 -- written out again below,
  independently of the package, with astropy constants (memory).
* Cutler C., Flanagan E. E., 1994, PRD 49, 2658; Peters P. C., 1964, Phys. Rev. 136, B1224:
  Newtonian stationary-phase amplitude and time to coalescence (closed forms).
* Peters P. C., Mathews J., 1963, Phys. Rev. 131, 435: GW luminosity of a circular binary and
  the frequency chirp, used to build dE/d ln f independently of Phinney's closed form.
* Phinney E. S., 2001, astro-ph/0108028: background characteristic strain (closed form).
* Ajith P. et al., 2008, PRD 77, 104017 (+ erratum 2009, PRD 79, 129901): PhenomA amplitude,
  Table I (memory).
* astropy.cosmology (Astropy Collaboration 2022): distances, volume element, ages, H(z);
  scipy.integrate.quad for direct integrals.
"""

from __future__ import annotations

import math

import astropy.constants as ac
import astropy.units as u
import numpy as np
import pytest
from astropy.cosmology import Planck18
from astropy.table import Table
from scipy import integrate

from bhgrow import gw
from bhgrow.cosmology import Cosmology
from bhgrow.errors import BhgrowInputError, ParameterError
from bhgrow.physics import remnants

C_SI = ac.c.to_value(u.m / u.s)
G_SI = ac.G.to_value(u.m**3 / u.kg / u.s**2)
MSUN_KG = ac.M_sun.to_value(u.kg)
MPC_M = (1 * u.Mpc).to_value(u.m)

# RCL19 Table 1 (memory): T_obs [yr] -> alpha, beta, kappa, gamma, f_k
RCL19_TABLE1 = {
    0.5: (0.133, 243.0, 482.0, 917.0, 2.58e-3),
    1.0: (0.171, 292.0, 1020.0, 1680.0, 2.15e-3),
    2.0: (0.165, 299.0, 611.0, 1340.0, 1.73e-3),
    4.0: (0.138, -221.0, 521.0, 1680.0, 1.13e-3),
}
# Ajith et al. 2008 Table I (erratum values; memory): pi M f = a eta^2 + b eta + c
AJITH08 = {
    "merg": (0.29740, 0.044810, 0.095560),
    "ring": (0.59411, 0.089794, 0.19111),
    "sigma": (0.50801, 0.077515, 0.022369),
    "cut": (0.84845, 0.12848, 0.27299),
}


@pytest.fixture(scope="module")
def cosmo():
    return Cosmology()  # Planck18, as astropy.cosmology.Planck18


def rcl19_sn(f, t_obs_yr=4.0, confusion=True):
    """RCL19 sky-averaged S_n(f) [1/Hz], eqs. 1, 10, 11, 13, 14 (memory), SI units."""
    f = np.asarray(f, dtype=float)
    arm = 2.5e9
    fstar = C_SI / (2 * np.pi * arm)  # 19.09 mHz
    p_oms = (1.5e-11) ** 2 * (1 + (2e-3 / f) ** 4)
    p_acc = (3e-15) ** 2 * (1 + (0.4e-3 / f) ** 2) * (1 + (f / 8e-3) ** 4)
    pn = (p_oms + 2 * (1 + np.cos(f / fstar) ** 2) * p_acc / (2 * np.pi * f) ** 4) / arm**2
    sn = 10 / 3 * pn * (1 + 0.6 * (f / fstar) ** 2)
    if confusion:
        a, b, k, g, fk = RCL19_TABLE1[t_obs_yr]
        with np.errstate(over="ignore", invalid="ignore"):
            sc = 9e-45 * f ** (-7 / 3) * np.exp(-(f**a) + b * f * np.sin(k * f)) * (
                1 + np.tanh(g * (fk - f)))
        sn = sn + np.nan_to_num(sc)
    return sn


def newtonian_amplitude(f, mc_obs_msun, d_l_mpc):
    """Face-on stationary-phase amplitude sqrt(5/24) pi^(-2/3) (G M)^(5/6) c^(-3/2) f^(-7/6)/D
    [1/Hz] (Cutler & Flanagan 1994), SI."""
    gm = G_SI * mc_obs_msun * MSUN_KG
    return (math.sqrt(5 / 24) * np.pi ** (-2 / 3) * gm ** (5 / 6) / C_SI**1.5
            / (d_l_mpc * MPC_M) * np.asarray(f) ** (-7 / 6))


def mchirp(m1, m2):
    return (m1 * m2) ** 0.6 / (m1 + m2) ** 0.2


# --------------------------------------------------------------------------- LISA noise
@pytest.mark.parametrize("t_obs", [0.5, 1.0, 2.0, 4.0])
@pytest.mark.parametrize("confusion", [True, False])
def test_noise_matches_rcl19_formula(t_obs, confusion):
    # RCL19 eqs. 1, 10-14 and Table 1, written out independently above (memory)
    f = np.array([1e-4, 1e-3, 3e-3, 1e-2, 0.1])
    noise = gw.LISANoise(mission_yr=t_obs, confusion=confusion)
    np.testing.assert_allclose(noise.sensitivity(f), rcl19_sn(f, t_obs, confusion), rtol=1e-12)
    np.testing.assert_allclose(noise.characteristic_noise(f),
                               np.sqrt(f * rcl19_sn(f, t_obs, confusion)), rtol=1e-12)


def test_transfer_frequency():
    # f* = c/(2 pi L) = 19.09 mHz for L = 2.5e9 m (RCL19 Sec. 2, memory)
    assert gw.LISA_F_STAR_HZ == pytest.approx(19.09e-3, abs=0.005e-3)


def test_noise_floor_published_level():
    # the sky-averaged LISA amplitude spectral density bottoms out at ~1e-20 Hz^-1/2 between
    # a few and ~10 mHz (RCL19 Fig. 1; memory)
    f = np.logspace(-5, 0, 4001)
    asd = np.sqrt(gw.LISANoise().sensitivity(f))
    i = int(np.argmin(asd))
    assert 3e-3 < f[i] < 1.2e-2
    assert 0.8e-20 < asd[i] < 1.6e-20


def test_confusion_noise_acts_near_millihertz_only():
    # RCL19 Sec. 3 / Fig. 2 (memory): the galactic foreground raises S_n between ~0.1 and a
    # few mHz; far above the knee f_k it vanishes
    on, off = gw.LISANoise(4.0, True), gw.LISANoise(4.0, False)
    ratio = lambda f: float(on.sensitivity(f) / off.sensitivity(f))  # noqa: E731
    assert ratio(1e-3) > 3.0
    assert ratio(3e-4) > 1.2
    assert ratio(1e-4) < 1.05
    for f in (1e-2, 3e-2, 0.1, 0.5):
        assert ratio(f) - 1.0 < 1e-9
    # a longer mission resolves more binaries: lower foreground above ~2 mHz (RCL19 Table 1)
    f = np.array([2e-3, 3e-3])
    assert np.all(gw.LISANoise(0.5).confusion_noise(f) > gw.LISANoise(4.0).confusion_noise(f))
    assert np.all(gw.LISANoise(4.0, False).confusion_noise(f) == 0.0)


def test_noise_parameter_validation():
    with pytest.raises(ParameterError, match=r"`mission_yr` of LISANoise must be one of"):
        gw.LISANoise(mission_yr=3.0)
    with pytest.raises(ParameterError, match=r"`mission_yr` of LISANoise must be > 0; got -1"):
        gw.LISANoise(mission_yr=-1)
    assert gw.LISANoise(mission_yr=3.0, confusion=False).mission_yr == 3.0
    with pytest.raises(BhgrowInputError, match="f_hz"):
        gw.LISANoise().sensitivity([1e-3, -1.0])
    with pytest.raises(Exception):
        gw.LISANoise().mission_yr = 1.0  # frozen


# --------------------------------------------------------------------------- SNR
def direct_inspiral_snr(m1, m2, z, t_obs_yr=4.0, noise=(4.0, True)):
    """(16/5) int A^2/S_n df by scipy quad, from T_obs before coalescence (Peters 1964) to
    the Schwarzschild ISCO, all written here with astropy."""
    d_l = Planck18.luminosity_distance(z).to_value(u.Mpc)
    mcz = mchirp(m1, m2) * (1 + z)
    tm = G_SI * mcz * MSUN_KG / C_SI**3
    f_lo = (5 / (256 * t_obs_yr * u.yr.to(u.s))) ** 0.375 * tm ** -0.625 / np.pi
    f_hi = C_SI**3 / (6**1.5 * np.pi * G_SI * (m1 + m2) * (1 + z) * MSUN_KG)
    f_lo, f_hi = max(f_lo, 1e-5), min(f_hi, 1.0)

    def integrand(lnf):
        f = math.exp(lnf)
        return f * newtonian_amplitude(f, mcz, d_l) ** 2 / rcl19_sn(f, *noise)

    val, _ = integrate.quad(integrand, math.log(f_lo), math.log(f_hi), limit=1000,
                            epsrel=1e-11, epsabs=0)
    return math.sqrt(16 / 5 * val)


@pytest.mark.parametrize("m1,m2,z", [(1e5, 5e4, 2.0), (3e6, 1e6, 1.0), (2e4, 2e4, 0.3),
                                     (5e7, 1e7, 4.0)])
def test_inspiral_snr_matches_direct_quadrature(cosmo, m1, m2, z):
    # RCL19 sky-averaged SNR with the Newtonian amplitude (Cutler & Flanagan 1994)
    got = float(gw.inspiral_snr(m1, m2, z, cosmo, gw.LISANoise()))
    assert got == pytest.approx(direct_inspiral_snr(m1, m2, z), rel=1e-6)


def test_inspiral_snr_matches_direct_quadrature_short_mission(cosmo):
    got = float(gw.inspiral_snr(2e5, 1e5, 1.5, cosmo, gw.LISANoise(mission_yr=1.0)))
    assert got == pytest.approx(direct_inspiral_snr(2e5, 1e5, 1.5, 1.0, (1.0, True)), rel=1e-6)


def test_snr_scales_as_inverse_luminosity_distance():
    # rho ~ A ~ 1/D_L at fixed observed-frame masses (Cutler & Flanagan 1994)
    noise = gw.LISANoise()
    m1 = np.array([1e4, 3e5, 2e6, 4e7])
    m2 = 0.3 * m1
    for waveform in ("inspiral", "phenom_a"):
        base = gw.snr_observed_frame(m1, m2, 1e4, noise, waveform=waveform)
        for k in (0.5, 2.0, 7.3):
            np.testing.assert_allclose(
                gw.snr_observed_frame(m1, m2, 1e4 * k, noise, waveform=waveform), base / k,
                rtol=1e-12)


def test_snr_chirp_mass_scaling_inspiral_dominated():
    # fixed band, f_ISCO above 1 Hz (M < ~4400 Msun): rho ~ M_c^(5/6) (Cutler & Flanagan 1994)
    noise = gw.LISANoise()
    m1 = np.array([30.0, 300.0, 1000.0, 60.0])
    m2 = np.array([20.0, 200.0, 1000.0, 6.0])
    assert np.all(gw.f_isco_hz(m1 + m2) > 1.0)
    snr = gw.snr_observed_frame(m1, m2, 100.0, noise, f_low_hz=1e-4)
    mc = mchirp(m1, m2)
    np.testing.assert_allclose(snr / snr[0], (mc / mc[0]) ** (5 / 6), rtol=1e-10)
    # PhenomA has the same inspiral, and its merger lies above the band here (Ajith 2008)
    imr = gw.snr_observed_frame(m1, m2, 100.0, noise, waveform="phenom_a", f_low_hz=1e-4)
    np.testing.assert_allclose(imr, snr, rtol=1e-10)


def test_start_frequency_is_t_obs_before_coalescence():
    # t_c(f) = (5/256) (G M_c/c^3)^(-5/3) (pi f)^(-8/3) (Peters 1964), evaluated with astropy
    mcz = np.array([1e3, 1e5, 3e6])
    for t_obs in (0.5, 4.0):
        f = gw.f_at_time_to_merger_hz(mcz, t_obs)
        tm = G_SI * mcz * MSUN_KG / C_SI**3
        t_c = 5 / 256 * tm ** (-5 / 3) * (np.pi * f) ** (-8 / 3)
        np.testing.assert_allclose(t_c, t_obs * u.yr.to(u.s), rtol=1e-12)
    noise = gw.LISANoise()
    m1, m2, d = 3e5, 1e5, 5e3
    f0 = gw.f_at_time_to_merger_hz(mchirp(m1, m2), 4.0)
    assert float(gw.snr_observed_frame(m1, m2, d, noise)) == pytest.approx(
        float(gw.snr_observed_frame(m1, m2, d, noise, f_low_hz=f0)), rel=1e-12)
    # a longer observation only adds cycles
    assert gw.snr_observed_frame(m1, m2, d, noise, t_obs_yr=1.0) < gw.snr_observed_frame(
        m1, m2, d, noise, t_obs_yr=4.0)


def test_isco_frequency_closed_form():
    # f = c^3/(6^(3/2) pi G M): 4.4 kHz for 1 Msun (Schwarzschild ISCO, twice the orbital)
    expect = (ac.c**3 / (6**1.5 * np.pi * ac.G * 10 * u.Msun)).to_value(u.Hz)
    assert float(gw.f_isco_hz(10.0)) == pytest.approx(expect, rel=1e-12)
    assert float(gw.f_isco_hz(1.0)) == pytest.approx(4.4e3, rel=0.01)


def ajith_amplitude(f, m1, m2, d_l_mpc):
    """PhenomA amplitude written out independently (Ajith et al. 2008, eq. 4.13, Table I;
    memory), SI units."""
    mt = m1 + m2
    eta = m1 * m2 / mt**2
    m_s = G_SI * mt * MSUN_KG / C_SI**3
    fk = {k: (a * eta**2 + b * eta + c) / (np.pi * m_s) for k, (a, b, c) in AJITH08.items()}
    d_s = d_l_mpc * MPC_M / C_SI
    cc = m_s ** (5 / 6) * fk["merg"] ** (-7 / 6) / (np.pi ** (2 / 3) * d_s) * math.sqrt(
        5 * eta / 24)
    w = np.pi * fk["sigma"] / 2 * (fk["ring"] / fk["merg"]) ** (-2 / 3)
    f = np.asarray(f, dtype=float)
    lor = fk["sigma"] / (2 * np.pi) / ((f - fk["ring"]) ** 2 + fk["sigma"] ** 2 / 4)
    amp = np.where(f < fk["merg"], cc * (f / fk["merg"]) ** (-7 / 6),
                   np.where(f < fk["ring"], cc * (f / fk["merg"]) ** (-2 / 3),
                            np.where(f < fk["cut"], cc * w * lor, 0.0)))
    return amp, fk


def test_phenom_a_amplitude_matches_ajith_2008():
    m1, m2, d = 2e6, 5e5, 1.6e4
    _, fk = ajith_amplitude(1e-3, m1, m2, d)
    f = np.geomspace(fk["merg"] / 30, fk["cut"] * 1.2, 200)
    amp_ref, _ = ajith_amplitude(f, m1, m2, d)
    np.testing.assert_allclose(gw.phenom_a_amplitude(f, m1, m2, d), amp_ref, rtol=1e-12)
    # the inspiral branch is the Newtonian amplitude (Cutler & Flanagan 1994)
    low = f < fk["merg"]
    np.testing.assert_allclose(gw.phenom_a_amplitude(f[low], m1, m2, d),
                               newtonian_amplitude(f[low], mchirp(m1, m2), d), rtol=1e-12)
    # continuity at f_merg and f_ring (the construction of Ajith 2008, eq. 4.13)
    for key in ("merg", "ring"):
        lo, hi = gw.phenom_a_amplitude(fk[key] * np.array([1 - 1e-9, 1 + 1e-9]), m1, m2, d)
        assert lo == pytest.approx(hi, rel=1e-6)
    freqs = gw.phenom_a_frequencies_hz(m1 + m2, m1 * m2 / (m1 + m2) ** 2)
    np.testing.assert_allclose(freqs, [fk["merg"], fk["ring"], fk["sigma"], fk["cut"]],
                               rtol=1e-12)


@pytest.mark.parametrize("m1,m2,z", [(1e6, 1e6, 1.0), (3e7, 3e6, 2.0), (2e5, 2e4, 0.5)])
def test_imr_snr_matches_direct_quadrature(cosmo, m1, m2, z):
    noise = gw.LISANoise()
    d_l = Planck18.luminosity_distance(z).to_value(u.Mpc)
    mz1, mz2 = m1 * (1 + z), m2 * (1 + z)
    _, fk = ajith_amplitude(1e-3, mz1, mz2, d_l)
    tm = G_SI * mchirp(mz1, mz2) * MSUN_KG / C_SI**3
    f_lo = max((5 / (256 * 4 * u.yr.to(u.s))) ** 0.375 * tm ** -0.625 / np.pi, 1e-5)
    f_hi = min(fk["cut"], 1.0)
    pts = sorted({math.log(x) for x in (fk["merg"], fk["ring"]) if f_lo < x < f_hi})

    def integrand(lnf):
        f = math.exp(lnf)
        return f * float(ajith_amplitude(f, mz1, mz2, d_l)[0]) ** 2 / float(rcl19_sn(f))

    val, _ = integrate.quad(integrand, math.log(f_lo), math.log(f_hi), points=pts or None,
                            limit=1000, epsrel=1e-11, epsabs=0)
    got = float(gw.imr_snr(m1, m2, z, cosmo, noise))
    assert got == pytest.approx(math.sqrt(16 / 5 * val), rel=1e-6)
    # merger and ringdown only add signal
    assert got > float(gw.inspiral_snr(m1, m2, z, cosmo, noise))


def test_snr_vectorized_edges(cosmo):
    noise = gw.LISANoise()
    m1 = np.array([[1e5, 1e6], [1e10, 0.0]])
    snr = gw.inspiral_snr(m1, 0.5 * m1, 1.0, cosmo, noise)
    assert snr.shape == (2, 2)
    assert snr[1, 0] == 0.0  # f_ISCO far below the band
    assert snr[1, 1] == 0.0  # no mass, no signal
    np.testing.assert_allclose(snr[0], [float(gw.inspiral_snr(m, 0.5 * m, 1.0, cosmo, noise))
                                        for m in m1[0]], rtol=1e-14)
    imr = gw.imr_snr(m1, 0.5 * m1, 1.0, cosmo, noise)
    assert imr.shape == (2, 2) and imr[1, 1] == 0.0
    with pytest.raises(BhgrowInputError, match="m1_msun"):
        gw.inspiral_snr([1e5, np.nan], 1e5, 1.0, cosmo, noise)
    with pytest.raises(ParameterError, match="`waveform` of snr"):
        gw.snr_observed_frame(1e5, 1e5, 1e3, noise, waveform="phenomD")


@pytest.mark.parametrize("snr", ["inspiral_snr", "imr_snr"])
def test_snr_of_an_event_does_not_depend_on_the_others_in_the_call(cosmo, snr):
    # the pipeline computes each merger's SNR with its chunk (bhgrow.pipeline.chunk_lisa_snr):
    # the value must be the same, bit for bit, whichever events share the call (the
    # ringdown quadrature was a matrix product, whose summation order follows the batch)
    noise = gw.LISANoise()
    rng = np.random.default_rng(7)
    n = 12_000                                     # above the ringdown's block of 8192
    m1 = 10 ** rng.uniform(3, 9, n)
    m2 = m1 * rng.uniform(0.01, 1.0, n)
    z = rng.uniform(0.01, 15.0, n)
    f = getattr(gw, snr)
    full = f(m1, m2, z, cosmo, noise)
    for size in (1, 7, 1000, 8191, 8193, 11_999):
        idx = np.sort(rng.choice(n, size=size, replace=False))
        np.testing.assert_array_equal(f(m1[idx], m2[idx], z[idx], cosmo, noise), full[idx])


def test_detections_threshold():
    snr = np.array([0.0, 7.99, 8.0, 100.0])
    np.testing.assert_array_equal(gw.detections(snr), [False, False, True, True])
    np.testing.assert_array_equal(gw.detections(snr, threshold=50), [False, False, False, True])
    with pytest.raises(ParameterError, match="`threshold` of detections must be > 0"):
        gw.detections(snr, threshold=0)


def test_chirp_mass_obs():
    # GW150914: 36 + 29 Msun -> M_c = 28.1 Msun (Abbott et al. 2016, PRL 116, 061102)
    assert float(gw.chirp_mass_obs(36.0, 29.0, 0.09)) == pytest.approx(1.09 * 28.1, abs=0.06)
    assert gw.chirp_mass is remnants.chirp_mass  # reused, not duplicated


# --------------------------------------------------------------------------- rates
def astropy_volume_over_1pz(z_lo, z_hi):
    """int 4 pi dV_c/dz/dOmega / (1+z) dz [Mpc^3] with astropy and scipy quad."""
    f = lambda z: 4 * np.pi * Planck18.differential_comoving_volume(z).to_value(  # noqa: E731
        u.Mpc**3 / u.sr) / (1 + z)
    return integrate.quad(f, z_lo, z_hi, epsrel=1e-11, limit=200)[0]


def test_observed_rate_constant_comoving_rate(cosmo):
    # constant R0 [Mpc^-3 Gyr^-1]: dN/dt_obs = R0 int dV_c/dz/(1+z) dz (astropy + quad)
    r0 = 3e-4
    edges = np.array([0.0, 0.5, 1.0, 2.0, 4.0, 8.0, 15.0])
    ages = Planck18.age(edges).to_value(u.Gyr)
    z_ev = 0.5 * (edges[1:] + edges[:-1])
    w = r0 * (ages[:-1] - ages[1:])  # one event per bin carrying R0 * dt_bin
    per_bin, total = gw.observed_rate_per_yr(z_ev, w, edges, cosmo)
    expect = np.array([r0 * astropy_volume_over_1pz(a, b) for a, b in zip(edges[:-1],
                                                                          edges[1:])]) / 1e9
    np.testing.assert_allclose(per_bin, expect, rtol=1e-7)
    assert total == pytest.approx(r0 * astropy_volume_over_1pz(0.0, 15.0) / 1e9, rel=1e-7)
    np.testing.assert_allclose(gw.rate_density_per_mpc3_gyr(z_ev, w, edges, cosmo), r0,
                               rtol=1e-8)


def test_observed_rate_delta_population(cosmo):
    # all mergers at z = 1 with comoving density n0: dN/dt_obs = n0 H(z) dV_c/dz
    # (R = n0 delta(t - t1), |dz/dt| = (1+z) H); astropy differential_comoving_volume x 4 pi
    n0 = 2e-3
    z1 = 1.0
    exact = (n0 / u.Mpc**3 * 4 * np.pi * u.sr * Planck18.differential_comoving_volume(z1)
             * Planck18.H(z1)).to_value(1 / u.yr)
    z = np.full(10, z1)
    w = np.full(10, n0 / 10)
    for dz in (1e-2, 1e-3):
        _, total = gw.observed_rate_per_yr(z, w, [z1 - dz, z1 + dz], cosmo)
        assert total == pytest.approx(exact, rel=2 * dz**2)
    # ... and in a coarse binning the event sits in exactly one bin
    per_bin, total = gw.observed_rate_per_yr(z, w, [0.0, 0.9, 1.1, 3.0], cosmo)
    assert per_bin[0] == 0.0 and per_bin[2] == 0.0 and per_bin[1] == total > 0


def test_observed_rate_bins_errors_and_inputs(cosmo):
    edges = [0.0, 1.0, 2.0]
    z = np.array([0.5, 1.0, 2.0, 2.5, 1.5])  # 2.0 closes the last bin; 2.5 is outside
    w = np.array([1e-3, 2e-3, 3e-3, 4e-3, 5e-3])
    per_bin, total, err = gw.observed_rate_per_yr(z, w, edges, cosmo, with_error=True)
    ref, _ = gw.observed_rate_per_yr([0.5, 1.5], [1e-3, 1e-2], edges, cosmo)
    np.testing.assert_allclose(per_bin, ref, rtol=1e-14)
    # weighted Poisson error: sqrt(sum w^2)/sum(w) of the value
    np.testing.assert_allclose(err / per_bin, [1.0, math.sqrt(2e-3**2 + 3e-3**2 + 5e-3**2)
                                               / 1e-2], rtol=1e-12)
    with pytest.raises(BhgrowInputError, match="weight_mpc3"):
        gw.observed_rate_per_yr([1.0], [np.nan], edges, cosmo)
    with pytest.raises(BhgrowInputError, match="z_edges"):
        gw.observed_rate_per_yr([1.0], [1.0], [0.0, 2.0, 1.0], cosmo)
    with pytest.raises(BhgrowInputError, match="same length"):
        gw.observed_rate_per_yr([1.0, 2.0], [1.0], edges, cosmo)


def test_detection_rate_counts_detected_events_only(cosmo):
    z = np.array([0.5, 1.5, 1.6, 3.0])
    w = np.array([1e-3, 2e-3, 3e-3, 4e-3])
    snr = np.array([50.0, 3.0, 9.0, 8.0])
    edges = np.array([0.0, 1.0, 2.0, 4.0])
    got = gw.detection_rate_per_yr(z, w, snr, 8.0, edges, cosmo)
    keep = snr >= 8.0
    assert got == pytest.approx(gw.observed_rate_per_yr(z[keep], w[keep], edges, cosmo)[1],
                                rel=1e-14)
    assert gw.detection_rate_per_yr(z, w, snr, 1000.0, edges, cosmo) == 0.0
    assert gw.detection_rate_per_yr(z, w, snr, 1.0, edges, cosmo) == pytest.approx(
        gw.observed_rate_per_yr(z, w, edges, cosmo)[1], rel=1e-14)


# --------------------------------------------------------------------------- background
def phinney_hc(f_hz, mc_msun, z, n_mpc3):
    """h_c for a single population, Phinney 2001 eq. 5 with dE/d ln f built from the
    Peters & Mathews (1963) luminosity and chirp rate (astropy units throughout)."""
    f = np.asarray(f_hz) * u.Hz
    f_r = f * (1 + z)
    mc = mc_msun * u.Msun
    x = (ac.G * mc * np.pi * f_r / ac.c**3).decompose()
    lum = 32 / 5 * ac.c**5 / ac.G * x ** (10 / 3)  # Peters & Mathews 1963
    fdot = 96 / 5 * np.pi ** (8 / 3) * (ac.G * mc / ac.c**3) ** (5 / 3) * f_r ** (11 / 3)
    de_dlnf = f_r * lum / fdot
    hc2 = 4 * ac.G / (np.pi * ac.c**2 * f**2) * (n_mpc3 / u.Mpc**3) / (1 + z) * de_dlnf
    return np.sqrt(hc2.to_value(u.dimensionless_unscaled))


def test_background_single_population_phinney_closed_form():
    # Phinney 2001: h_c ~ f^(-2/3) with the closed-form amplitude
    f = np.array([1e-9, gw.F_1YR_HZ, 1e-8, 1e-7])
    mc, z, n = 10**8.7, 0.4, 3e-5
    hc = gw.background_hc(f, [mc], [z], [n])
    np.testing.assert_allclose(hc, phinney_hc(f, mc, z, n), rtol=1e-10)
    slope = np.diff(np.log(hc)) / np.diff(np.log(f))
    np.testing.assert_allclose(slope, -2 / 3, rtol=1e-12)
    assert gw.hc_at_1yr([mc], [z], [n]) == pytest.approx(float(phinney_hc(gw.F_1YR_HZ, mc, z,
                                                                           n)), rel=1e-10)
    # a population split over many events gives the same answer
    hc_split = gw.background_hc(f, np.full(8, mc), np.full(8, z), np.full(8, n / 8))
    np.testing.assert_allclose(hc_split, hc, rtol=1e-12)


def test_background_populations_add_in_quadrature():
    # energy densities add (Phinney 2001): h_c^2 of the union is the sum
    f = np.geomspace(1e-9, 1e-7, 5)
    a = gw.background_hc(f, [1e8], [0.3], [1e-4])
    b = gw.background_hc(f, [3e9], [2.0], [1e-6])
    ab = gw.background_hc(f, [1e8, 3e9], [0.3, 2.0], [1e-4, 1e-6])
    np.testing.assert_allclose(ab**2, a**2 + b**2, rtol=1e-12)


def test_background_isco_cutoff():
    # a binary radiates only below its (redshifted) ISCO frequency
    mc, mt, z, n = 5e9, 1.2e10, 1.0, 1e-6
    f_stop = float(gw.f_isco_hz(mt * (1 + z)))
    f = np.array([0.1 * f_stop, 0.99 * f_stop, 1.01 * f_stop, 10 * f_stop])
    hc = gw.background_hc(f, [mc], [z], [n], m_total_msun=[mt])
    np.testing.assert_allclose(hc[:2], phinney_hc(f[:2], mc, z, n), rtol=1e-10)
    np.testing.assert_array_equal(hc[2:], 0.0)


def test_background_table(tmp_path):
    t = gw.background_table([1e9, 2e8], [0.5, 1.0], [1e-5, 1e-4])
    assert t.colnames == ["f_hz", "h_c"]
    assert t["f_hz"].unit == u.Hz and len(t) == gw.DEFAULT_BACKGROUND_F_HZ.size
    assert t.meta["h_c_1yr"] == pytest.approx(
        float(phinney_hc(gw.F_1YR_HZ, 1e9, 0.5, 1e-5) ** 2
              + phinney_hc(gw.F_1YR_HZ, 2e8, 1.0, 1e-4) ** 2) ** 0.5, rel=1e-10)
    path = tmp_path / "gw_background.ecsv"
    t.write(path, format="ascii.ecsv", delimiter=",")
    back = Table.read(path, format="ascii.ecsv")
    np.testing.assert_allclose(back["h_c"], t["h_c"], rtol=1e-15)
    with pytest.raises(BhgrowInputError, match="weight_mpc3"):
        gw.background_hc(1e-8, [1e9], [0.5], [-1.0])
