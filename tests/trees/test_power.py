"""Tests of bhgrow.trees.power against sources outside the project.

Each check names its source beside it: a closed form (author year), a published value
((memory) where written from memory), an independent numerical solution (scipy quadrature /
ODE solver of the textbook equation), or the reference library colossus (Diemer 2018,
ApJS 239, 35; version 1.4, installed as a test dependency).

Colossus settings used for every comparison (stated once here):

* ``setCosmology(..., params=dict(flat=True, H0=67.66, Om0=0.30966, Ob0=0.04897,
  sigma8=0.8102, ns=0.9665, Tcmb0=2.7255, relspecies=False, interpolation=False),
  persistence="")`` and ``accuracy_sigma = 1e-7``: the Planck 2018 background as shipped
  with astropy's Planck18 (Om0 = CDM + baryons, the cold matter bhgrow uses), without
  radiation in E(z) (colossus ``relspecies=False``; bhgrow side: astropy ``FlatLambdaCDM``
  with ``Tcmb0 = 0`` and ``LinearPower(tcmb_k=2.7255)`` so that the EH98 fit sees the same
  CMB temperature as colossus). ``interpolation=False`` makes colossus integrate sigma and
  the growth factor directly instead of reading its own interpolation tables (which are
  accurate to ~1e-4 only), and ``accuracy_sigma`` tightens its quadrature from 3e-3.
* power spectrum models ``ps_args={"model": "eisenstein98"}`` (full EH98) and
  ``"eisenstein98_zb"`` (EH98 no-wiggle form), top-hat filter.
* colossus units are Msun/h and comoving Mpc/h; every comparison converts with h.
"""

from __future__ import annotations

import math
import pickle

import astropy.units as u
import numpy as np
import pytest
from astropy.cosmology import FlatLambdaCDM, LambdaCDM
from colossus.cosmology import cosmology as colossus_cosmology
from colossus.cosmology import power_spectrum as colossus_ps
from colossus.lss import peaks as colossus_peaks
from scipy import integrate

from bhgrow.cosmology import Cosmology
from bhgrow.errors import BhgrowInputError, ParameterError
from bhgrow.trees.power import DELTA_CRIT_EDS, LinearPower, tophat_window

# Planck 2018 (TT,TE,EE+lowE+lensing+BAO) numbers as shipped with astropy's Planck18
PLANCK = dict(H0=67.66, Om0=0.30966, Ob0=0.04897)
SIGMA8, N_S, TCMB = 0.8102, 0.9665, 2.7255
MASSES = np.logspace(9.0, 15.0, 7)          # Msun (physical)
REDSHIFTS = [0.0, 1.0, 3.0, 6.0]
COLOSSUS_MODEL = {"eh98": "eisenstein98", "eh98_nowiggle": "eisenstein98_zb"}


@pytest.fixture(scope="module")
def cosmo():
    """Planck-2018 flat LCDM, radiation off in E(z) (matches colossus relspecies=False)."""
    return Cosmology(FlatLambdaCDM(Tcmb0=0.0, **PLANCK), sigma8=SIGMA8, n_s=N_S,
                     name="planck18_no_radiation")


@pytest.fixture(scope="module")
def lp(cosmo):
    return LinearPower(cosmo, tcmb_k=TCMB)


@pytest.fixture(scope="module")
def lp_nw(cosmo):
    return LinearPower(cosmo, transfer="eh98_nowiggle", tcmb_k=TCMB)


def _set_colossus(name, **extra):
    params = dict(flat=True, relspecies=False, Tcmb0=TCMB, sigma8=SIGMA8, ns=N_S,
                  interpolation=False, **PLANCK)
    params.update(extra)
    col = colossus_cosmology.setCosmology(name, params=params, persistence="")
    col.accuracy_sigma = 1e-7
    return col


@pytest.fixture(scope="module")
def colossus_ref():
    """Reference values from colossus, computed once (settings in the module docstring)."""
    col = _set_colossus("bhgrow_power_test")
    h = col.h
    ref = {"h": h}
    r_h = colossus_peaks.lagrangianR(MASSES * h)  # Mpc/h
    for name, model in COLOSSUS_MODEL.items():
        ref[("sigma0", name)] = col.sigma(r_h, 0.0, ps_args={"model": model})
        k_h = np.logspace(-4.0, 2.0, 61)
        ref[("pk", name)] = (k_h, col.matterPowerSpectrum(k_h, 0.0, model=model))
    z = np.array([0.1, 0.5, 1.0, 2.0, 3.0, 6.0, 10.0, 20.0, 30.0])
    ref["growth"] = (z, col.growthFactor(z))
    ref["dc_corr"] = (z, np.array([colossus_peaks.collapseOverdensity(corrections=True, z=zi)
                                   for zi in z]))
    return ref


# ------------------------------------------------------------------ transfer function
@pytest.mark.parametrize("transfer", ["eh98", "eh98_nowiggle"])
def test_transfer_matches_colossus(cosmo, transfer):
    # colossus (Diemer 2018) implementation of Eisenstein & Hu 1998, k in h/Mpc there
    lp = LinearPower(cosmo, transfer=transfer, tcmb_k=TCMB)
    k_h = np.logspace(-5.0, 3.0, 300)
    ref = colossus_ps.powerSpectrum(k_h, COLOSSUS_MODEL[transfer], _set_colossus("t_" + transfer),
                                    output="tf")
    mine = lp.transfer_function(k_h * cosmo.h)
    np.testing.assert_allclose(mine, ref, rtol=1e-10)


@pytest.mark.parametrize("transfer", ["eh98", "eh98_nowiggle"])
def test_transfer_large_scale_limit(lp, lp_nw, transfer):
    # Eisenstein & Hu 1998: T(k -> 0) -> 1 (super-horizon modes are not processed)
    p = lp if transfer == "eh98" else lp_nw
    assert p.transfer_function(0.0) == 1.0
    t = p.transfer_function(np.array([1e-9, 1e-8, 1e-7]))
    np.testing.assert_allclose(t, 1.0, atol=1e-5)
    assert np.all(np.diff(p.transfer_function(np.logspace(-7, -3, 20))) < 0)


def test_nowiggle_close_to_full_away_from_bao(lp, lp_nw, cosmo):
    # Eisenstein & Hu 1998 sect. 4.2: the no-wiggle form follows the full form's shape and
    # leaves out only the acoustic oscillations, so outside the BAO range (k < 0.005 h/Mpc,
    # k > 1 h/Mpc) the two agree within a few per cent (2% asserted; measured 1.3%)
    h = cosmo.h
    k = np.concatenate([np.logspace(-5, np.log10(0.005), 50), np.logspace(0, 3, 50)]) * h
    ratio = lp_nw.transfer_function(k) / lp.transfer_function(k)
    assert np.max(np.abs(ratio - 1.0)) < 0.02
    # ... while inside it the full form oscillates about the smooth one (wiggles present)
    kb = np.linspace(0.02, 0.3, 400) * h
    rb = lp.transfer_function(kb) / lp_nw.transfer_function(kb) - 1.0
    assert rb.max() > 0.01 and rb.min() < -0.01
    assert np.count_nonzero(np.diff(np.sign(rb))) >= 6


def test_sound_horizon_fit_close_to_exact_form(lp):
    # Eisenstein & Hu 1998: the approximate sound horizon (eq. 26) reproduces the drag-epoch
    # value of eq. 6 within ~2% (memory); Planck-like r_drag ~ 150 Mpc (Planck 2018, memory)
    p = lp.eh98_scalars
    assert abs(p.s_nw / p.s - 1.0) < 0.02
    assert 140.0 < p.s < 160.0


# ------------------------------------------------------------------ normalisation, sigma
def _sigma_direct(lp, r_mpc):
    """sigma(R) from 1/(2 pi^2) int k^3 P W^2 dln k (Peebles 1980, memory).

    Composite Gauss-Legendre quadrature (400 panels x 24 nodes in ln k, kR from 1e-6 to
    1e3), independent of the table's trapezoid sums, FFT correlation and splines.
    """
    nodes, weights = np.polynomial.legendre.leggauss(24)
    edges = np.linspace(math.log(1e-6 / r_mpc), math.log(1e3 / r_mpc), 401)
    half = 0.5 * np.diff(edges)
    lnk = ((edges[:-1] + half)[:, None] + half[:, None] * nodes[None, :]).ravel()
    k = np.exp(lnk)
    w, _ = tophat_window(k * r_mpc)
    f = (k**3 * lp.power_mpc3(k) * w * w).reshape(half.size, nodes.size)
    return math.sqrt(float(np.sum((f @ weights) * half)) / (2 * math.pi**2))


def _sigma_quad(lp, r_mpc):
    """The same integral by adaptive scipy quad (QUADPACK) on 12 sub-intervals."""
    def integrand(lnk):
        k = math.exp(lnk)
        w, _ = tophat_window(k * r_mpc)
        return k**3 * lp.power_mpc3(k) * float(w) ** 2 / (2 * math.pi**2)

    pts = np.linspace(math.log(1e-6 / r_mpc), math.log(1e3 / r_mpc), 13)
    return math.sqrt(sum(integrate.quad(integrand, a, b, epsabs=1e-11, epsrel=1e-10,
                                        limit=100)[0] for a, b in zip(pts[:-1], pts[1:])))


def test_sigma8_normalisation(lp, cosmo):
    # definition of sigma8: top-hat rms in spheres of 8 Mpc/h at z = 0 (Peebles 1980, memory)
    r8 = 8.0 / cosmo.h
    assert lp.sigma(lp.mass_8_msun) == pytest.approx(SIGMA8, rel=1e-8)
    assert _sigma_direct(lp, r8) == pytest.approx(SIGMA8, rel=1e-8)
    assert _sigma_quad(lp, r8) == pytest.approx(SIGMA8, rel=1e-8)
    assert lp.lagrangian_radius_mpc(lp.mass_8_msun) == pytest.approx(r8, rel=1e-13)


@pytest.mark.parametrize("m", [1e3, 3.7e5, 1e9, 2.2e12, 1e15, 1e18])
def test_sigma_table_vs_direct_quadrature(lp, m):
    # table (trapezoid in ln k + cubic spline in ln M) vs Gauss-Legendre quadrature
    r = lp.lagrangian_radius_mpc(m)
    assert lp.sigma(m) == pytest.approx(_sigma_direct(lp, r), rel=1e-6)
    # slope vs a centred difference of the direct quadrature (step 1e-3 in ln M)
    eps = 1e-3
    s_p = _sigma_direct(lp, r * math.exp(eps / 3.0))
    s_m = _sigma_direct(lp, r * math.exp(-eps / 3.0))
    slope = (math.log(s_p) - math.log(s_m)) / (2 * eps)
    assert lp.dlnsigma_dlnm(m) == pytest.approx(slope, rel=2e-5)


@pytest.mark.parametrize("transfer", ["eh98", "eh98_nowiggle"])
@pytest.mark.parametrize("z", REDSHIFTS)
def test_sigma_matches_colossus(cosmo, colossus_ref, transfer, z):
    # colossus (Diemer 2018) sigma(R, z) = sigma(R, 0) D(z) with the settings of the module
    # docstring; requirement 2%, asserted 1e-4 (measured ~1e-7)
    lp = LinearPower(cosmo, transfer=transfer, tcmb_k=TCMB)
    z_arr, d_ref = colossus_ref["growth"]
    d = 1.0 if z == 0.0 else d_ref[np.flatnonzero(z_arr == z)[0]]
    ref = colossus_ref[("sigma0", transfer)] * d
    np.testing.assert_allclose(lp.sigma(MASSES, z), ref, rtol=1e-4)


@pytest.mark.parametrize("transfer", ["eh98", "eh98_nowiggle"])
def test_power_spectrum_matches_colossus(cosmo, colossus_ref, transfer):
    # colossus matterPowerSpectrum in (Mpc/h)^3 at k in h/Mpc, normalised to the same sigma8
    lp = LinearPower(cosmo, transfer=transfer, tcmb_k=TCMB)
    h = colossus_ref["h"]
    k_h, pk_h = colossus_ref[("pk", transfer)]
    np.testing.assert_allclose(lp.power_mpc3(k_h * h) * h**3, pk_h, rtol=1e-5)


def test_sigma_redshift_scaling_and_slope(lp):
    # linear theory: sigma(M, z) = sigma(M, 0) D(z); dln sigma/dln M does not depend on z
    m = np.logspace(4, 17, 30)
    z = np.linspace(0.0, 20.0, 30)
    np.testing.assert_allclose(lp.sigma(m, z), lp.sigma(m) * lp.growth(z), rtol=1e-14)
    s = lp.dlnsigma_dlnm(m)
    assert np.all(s < 0) and np.all(np.diff(lp.sigma(m)) < 0)
    # CDM: the slope steepens with mass, from ~ -0.03 at 1e4 Msun towards -(n+3)/6 ~ -0.66
    # (memory) at very large mass
    assert s[0] > -0.1 and s[-1] < -0.3


def test_mass_of_sigma_inverts_table(lp):
    m = np.logspace(3, 18, 301)
    np.testing.assert_allclose(lp.mass_of_sigma(lp.sigma(m)), m, rtol=1e-12)
    s = np.linspace(lp.sigma(1e18), lp.sigma(1e3), 101)
    np.testing.assert_allclose(lp.sigma(lp.mass_of_sigma(s)), s, rtol=1e-12)


# ------------------------------------------------------------------ growth
def test_growth_matches_colossus(lp, colossus_ref):
    # colossus growthFactor (Heath 1977 integral; interpolation off) for the same background
    z, ref = colossus_ref["growth"]
    np.testing.assert_allclose(lp.growth(z), ref, rtol=1e-7)
    assert lp.growth(0.0) == 1.0


def test_growth_einstein_de_sitter():
    # closed form: D = a = 1/(1+z) in Einstein-de Sitter (e.g. Peebles 1980 (memory))
    eds = Cosmology(FlatLambdaCDM(H0=70.0, Om0=1.0, Ob0=0.05, Tcmb0=0.0), sigma8=0.8, n_s=1.0,
                    name="eds")
    lp = LinearPower(eds)
    z = np.linspace(0.0, 30.0, 61)
    np.testing.assert_allclose(lp.growth(z), 1.0 / (1.0 + z), rtol=1e-10)
    # delta_c(z) = 1.686 (1+z) (Lacey & Cole 1993)
    np.testing.assert_allclose(lp.delta_c(z), DELTA_CRIT_EDS * (1.0 + z), rtol=1e-10)


def _heath(astro, z):
    """D ~ E(a) int_0^a da' / (a' E(a'))^3 (Heath 1977; Carroll, Press & Turner 1992)."""
    def one(zz):
        a = 1.0 / (1.0 + zz)
        val = integrate.quad(lambda x: (x * astro.efunc(1.0 / x - 1.0)) ** -3, 0.0, a,
                             epsabs=0.0, epsrel=1e-13, limit=200)[0]
        return astro.efunc(zz) * val
    return np.array([one(zz) for zz in z]) / one(0.0)


@pytest.mark.parametrize("astro", [
    FlatLambdaCDM(H0=70.0, Om0=0.3, Ob0=0.045, Tcmb0=0.0),
    LambdaCDM(H0=70.0, Om0=0.3, Ode0=0.5, Ob0=0.045, Tcmb0=0.0),   # open
    LambdaCDM(H0=70.0, Om0=0.3, Ode0=0.9, Ob0=0.045, Tcmb0=0.0),   # closed
    LambdaCDM(H0=70.0, Om0=0.25, Ode0=0.0, Ob0=0.045, Tcmb0=0.0),  # open, no Lambda
], ids=["flat", "open", "closed", "open_no_lambda"])
def test_growth_heath_integral(astro):
    # Heath 1977 integral, exact for matter + Lambda + curvature (no radiation)
    lp = LinearPower(Cosmology(astro, sigma8=0.8, n_s=0.96))
    z = np.array([0.05, 0.3, 1.0, 2.5, 6.0, 12.0, 30.0])
    np.testing.assert_allclose(lp.growth(z), _heath(astro, z), rtol=1e-8)


def test_growth_with_radiation_and_massive_neutrinos_vs_scipy_ode():
    # Planck18 as astropy ships it (radiation + one 0.06 eV neutrino in E(z)); reference:
    # scipy solve_ivp (DOP853) of the same growth equation in its second-order form,
    # D'' + (2 + dlnE/dlna) D' = 3/2 Omega_cb(a) D  (e.g. Linder & Jenkins 2003 (memory)),
    # started much earlier (a = 1e-8, Meszaros 1974 growing mode)
    c18 = Cosmology()
    lp = LinearPower(c18)
    om0 = c18.Om0

    def rhs(u, y):
        z = math.expm1(-u)
        e = c18.astropy.efunc(z)
        eps = 1e-5
        dlne = (math.log(c18.astropy.efunc(math.expm1(-u - eps)))
                - math.log(c18.astropy.efunc(math.expm1(-u + eps)))) / (2 * eps)
        om = om0 * math.exp(-3 * u) / e**2
        return [y[1], -(2.0 + dlne) * y[1] + 1.5 * om * y[0]]

    u0 = math.log(1e-8)
    om_i = om0 * math.exp(-3 * u0) / c18.astropy.efunc(math.expm1(-u0)) ** 2
    y_i = om_i / (1.0 - om_i)  # a / a_eq
    z_out = np.array([30.0, 20.0, 10.0, 6.0, 3.0, 1.0, 0.5, 0.0])
    sol = integrate.solve_ivp(rhs, (u0, 0.0), [1.0 + 1.5 * y_i, 1.5 * y_i], method="DOP853",
                              rtol=1e-11, atol=1e-14, t_eval=-np.log1p(z_out))
    ref = sol.y[0] / sol.y[0][-1]
    np.testing.assert_allclose(lp.growth(z_out), ref, rtol=2e-7)


def test_growth_with_radiation_close_to_colossus():
    # colossus (relspecies=True) treats radiation at z < 10 as a constant in E(z) inside the
    # Heath integral; bhgrow integrates the growth equation with the full E(z), so the two
    # differ by the radiation correction, < 1e-3 up to z = 30 (measured 7e-4)
    planck_rad = dict(PLANCK, Tcmb0=TCMB, Neff=3.046)
    astro = FlatLambdaCDM(m_nu=0 * u.eV, **planck_rad)
    lp = LinearPower(Cosmology(astro, sigma8=SIGMA8, n_s=N_S))
    col = colossus_cosmology.setCosmology(
        "bhgrow_power_rad", params=dict(flat=True, relspecies=True, sigma8=SIGMA8, ns=N_S,
                                        interpolation=False, **planck_rad), persistence="")
    z = np.array([0.5, 1.0, 3.0, 6.0, 10.0, 20.0, 30.0])
    np.testing.assert_allclose(lp.growth(z), col.growthFactor(z), rtol=1e-3)


# ------------------------------------------------------------------ delta_c
def test_delta_crit_closed_form(lp):
    # spherical top-hat collapse in EdS: delta_crit = 3/20 (12 pi)^(2/3) = 1.68647
    # (Gunn & Gott 1972; value 1.68647 as in colossus' constants)
    assert DELTA_CRIT_EDS == pytest.approx(1.68647, abs=5e-6)
    assert lp.delta_c(0.0) == pytest.approx(DELTA_CRIT_EDS, rel=1e-14)
    z = np.linspace(0.0, 30.0, 31)
    # delta_c(z) = delta_crit / D(z) (Lacey & Cole 1993)
    np.testing.assert_allclose(lp.delta_c(z) * lp.growth(z), DELTA_CRIT_EDS, rtol=1e-13)


def test_delta_c_omega_dependence_matches_colossus(cosmo, colossus_ref):
    # colossus collapseOverdensity(corrections=True): 1.68647 Omega_m(z)^0.0055 for flat
    # cosmologies (Navarro, Frenk & White 1997; Kitayama & Suto 1996)
    lp = LinearPower(cosmo, tcmb_k=TCMB, delta_c_omega_dependence=True)
    z, dc = colossus_ref["dc_corr"]
    _, d = colossus_ref["growth"]
    np.testing.assert_allclose(lp.delta_c(z), dc / d, rtol=1e-6)


def test_delta_c_omega_dependence_open_matches_colossus():
    # colossus, open cosmology without dark energy: 1.68647 Omega_m(z)^0.0185
    params = dict(H0=70.0, Om0=0.3, Ob0=0.045)
    col = colossus_cosmology.setCosmology(
        "bhgrow_power_open", params=dict(flat=False, Ode0=0.0, relspecies=False, sigma8=0.8,
                                         ns=0.96, interpolation=False, **params),
        persistence="")
    lp = LinearPower(Cosmology(LambdaCDM(Ode0=0.0, Tcmb0=0.0, **params), sigma8=0.8, n_s=0.96),
                     delta_c_omega_dependence=True)
    z = np.array([0.0, 0.5, 2.0, 8.0])
    ref = np.array([colossus_peaks.collapseOverdensity(corrections=True, z=zi) for zi in z])
    np.testing.assert_allclose(lp.delta_c(z), ref / col.growthFactor(z), rtol=1e-6)


def test_z_of_delta_c_inverts_table(lp):
    z = np.linspace(0.0, 30.0, 301)
    np.testing.assert_allclose(lp.z_of_delta_c(lp.delta_c(z)), z, rtol=1e-11, atol=1e-12)
    assert lp.z_of_delta_c(lp.delta_c(3.0)) == pytest.approx(3.0, rel=1e-12)


# ------------------------------------------------------------------ interface
def test_scalars_arrays_and_pickle(lp):
    assert isinstance(lp.sigma(1e12), float)
    assert isinstance(lp.growth(1.0), float)
    assert lp.sigma(np.array([1e12])).shape == (1,)
    assert lp.sigma(np.array([[1e10, 1e12]]), np.array([[0.0], [2.0]])).shape == (2, 2)
    clone = pickle.loads(pickle.dumps(lp))
    assert clone.sigma(1e12) == lp.sigma(1e12)


def test_bad_parameters_are_rejected(cosmo):
    with pytest.raises(ParameterError, match=r"`transfer` of LinearPower must be one of "
                                             r"'eh98', 'eh98_nowiggle'; got 'bbks'"):
        LinearPower(cosmo, transfer="bbks")
    with pytest.raises(ParameterError, match=r"`tcmb_k` of LinearPower must be > 0; got -1"):
        LinearPower(cosmo, tcmb_k=-1.0)
    with pytest.raises(ParameterError, match="delta_c_omega_dependence"):
        LinearPower(cosmo, delta_c_omega_dependence="yes")
    curved = Cosmology(LambdaCDM(H0=70, Om0=0.3, Ode0=0.6, Tcmb0=0, Ob0=0.04), sigma8=0.8,
                       n_s=1.0)
    with pytest.raises(ParameterError, match="curved cosmology with dark energy"):
        LinearPower(curved, delta_c_omega_dependence=True)
    no_baryons = Cosmology(FlatLambdaCDM(H0=70, Om0=0.3, Tcmb0=0), sigma8=0.8, n_s=1.0)
    with pytest.raises(ParameterError, match="eh98_nowiggle"):
        LinearPower(no_baryons)
    assert LinearPower(no_baryons, transfer="eh98_nowiggle").sigma(1e12) > 0


def test_out_of_range_inputs_are_rejected(lp):
    with pytest.raises(BhgrowInputError, match=r"halo mass .* must be finite and in \[1000"):
        lp.sigma(10.0)
    with pytest.raises(BhgrowInputError, match="halo mass"):
        lp.dlnsigma_dlnm(np.array([1e12, np.nan]))
    with pytest.raises(BhgrowInputError, match=r"redshift for growth .* \[0, 30\]"):
        lp.growth(31.0)
    with pytest.raises(BhgrowInputError, match="sigma0"):
        lp.mass_of_sigma(100.0)
    with pytest.raises(BhgrowInputError, match="threshold"):
        lp.z_of_delta_c(1.0)
    with pytest.raises(BhgrowInputError, match="wavenumber"):
        lp.transfer_function(-1.0)
    # round-off outside the range is clipped, not rejected
    assert lp.sigma(1e3 * (1 - 1e-12)) == lp.sigma(1e3)
