"""Tests of bhgrow.trees.massfunction against sources outside the project.

Each check names its source: closed-form integrals of the multiplicity functions (Press &
Schechter 1974; Bond et al. 1991; Sheth & Tormen 1999), the published Sheth & Tormen
normalisation, or the reference library colossus (Diemer 2018, ApJS 239, 35; version 1.4).

Colossus settings (the same as in test_power.py): ``setCosmology(..., params=dict(flat=True,
H0=67.66, Om0=0.30966, Ob0=0.04897, sigma8=0.8102, ns=0.9665, Tcmb0=2.7255,
relspecies=False, interpolation=False), persistence="")``, ``accuracy_sigma = 1e-7``,
power-spectrum model ``"eisenstein98"``, top-hat filter, mass definition ``"fof"``, models
``"press74"`` and ``"sheth99"``, ``deltac_args={"corrections": False}`` (or True when bhgrow
uses ``delta_c_omega_dependence=True``). bhgrow side: astropy ``FlatLambdaCDM`` with the same
H0, Om0, Ob0 and ``Tcmb0 = 0`` (no radiation in E(z), like ``relspecies=False``), and
``LinearPower(tcmb_k=2.7255)``. With ``interpolation=False`` colossus cannot return
``dln sigma/dln R`` itself, so the reference dn/dlnM is assembled from colossus pieces exactly
as colossus' ``convertMassFunction`` does: ``f(sigma)`` from ``massFunction(q_in="sigma",
q_out="f")``, ``rho_m(0)`` from colossus, and the slope from a centred difference (step 1e-3
in ln R) of colossus' directly integrated ``sigma(R)``. Colossus units (Msun/h, Mpc/h) are
converted with h.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from astropy.cosmology import FlatLambdaCDM
from colossus.cosmology import cosmology as colossus_cosmology
from colossus.lss import mass_function as colossus_mf
from colossus.lss import peaks as colossus_peaks
from scipy import integrate, special

from bhgrow.cosmology import Cosmology
from bhgrow.errors import BhgrowInputError, ParameterError
from bhgrow.trees.massfunction import (MASS_FUNCTIONS, number_density, press_schechter,
                                       ps_multiplicity, sheth_tormen, st_multiplicity,
                                       st_normalisation)
from bhgrow.trees.power import LinearPower

PLANCK = dict(H0=67.66, Om0=0.30966, Ob0=0.04897)
SIGMA8, N_S, TCMB = 0.8102, 0.9665, 2.7255
MASSES = np.logspace(9.0, 15.0, 7)  # Msun (physical)
REDSHIFTS = [0.0, 1.0, 3.0, 6.0]
COLOSSUS_NAME = {"press_schechter": "press74", "sheth_tormen": "sheth99"}


@pytest.fixture(scope="module")
def cosmo():
    return Cosmology(FlatLambdaCDM(Tcmb0=0.0, **PLANCK), sigma8=SIGMA8, n_s=N_S,
                     name="planck18_no_radiation")


@pytest.fixture(scope="module")
def lp(cosmo):
    return LinearPower(cosmo, tcmb_k=TCMB)


@pytest.fixture(scope="module")
def colossus_dndlnm():
    """colossus dn/dlnM [(Mpc/h)^-3] for both models, z in REDSHIFTS, both delta_c options."""
    col = colossus_cosmology.setCosmology(
        "bhgrow_mf_test", params=dict(flat=True, relspecies=False, Tcmb0=TCMB, sigma8=SIGMA8,
                                      ns=N_S, interpolation=False, **PLANCK), persistence="")
    col.accuracy_sigma = 1e-7
    h = col.h
    ps_args = {"model": "eisenstein98"}
    r_h = colossus_peaks.lagrangianR(MASSES * h)
    eps = 1e-3
    s = col.sigma(np.concatenate([r_h, r_h * (1 + eps), r_h * (1 - eps)]), 0.0, ps_args=ps_args)
    n = MASSES.size
    s0, s_p, s_m = s[:n], s[n:2 * n], s[2 * n:]
    dlns_dlnr = (np.log(s_p) - np.log(s_m)) / (math.log1p(eps) - math.log1p(-eps))
    rho_h = col.rho_m(0.0) * 1e9  # Msun/h per (Mpc/h)^3
    out = {"h": h}
    for z in REDSHIFTS:
        sz = s0 * col.growthFactor(z)  # what colossus' sigma(R, z) does
        for ours, theirs in COLOSSUS_NAME.items():
            for corr in (False, True):
                f = colossus_mf.massFunction(sz, z, q_in="sigma", q_out="f", mdef="fof",
                                             model=theirs, deltac_args={"corrections": corr})
                # colossus convertMassFunction: dn/dlnM = -(1/3) f rho / M dln sigma/dln R
                out[(ours, z, corr)] = -f * rho_h / (MASSES * h) * dlns_dlnr / 3.0
    return out


@pytest.mark.parametrize("corr", [False, True], ids=["delta_c_const", "delta_c_omega"])
@pytest.mark.parametrize("model", ["press_schechter", "sheth_tormen"])
@pytest.mark.parametrize("z", REDSHIFTS)
def test_mass_function_matches_colossus(cosmo, colossus_dndlnm, model, z, corr):
    # colossus (Diemer 2018) press74 / sheth99, settings in the module docstring;
    # requirement 2%, asserted 5e-4 (measured <= 7e-5, the ST part being A = 0.3222 in
    # colossus vs the exact normalisation 0.32218 here)
    lp = LinearPower(cosmo, tcmb_k=TCMB, delta_c_omega_dependence=corr)
    h = colossus_dndlnm["h"]
    ref = colossus_dndlnm[(model, z, corr)] * h**3  # (Mpc/h)^-3 -> Mpc^-3
    np.testing.assert_allclose(MASS_FUNCTIONS[model](MASSES, z, lp), ref, rtol=5e-4)


def test_sheth_tormen_published_normalisation():
    # Sheth & Tormen 1999: A = 0.3222 for p = 0.3 (published value, 4 digits)
    assert st_normalisation(0.3) == pytest.approx(0.3222, abs=5e-5)
    # p = 0 gives A = 1/2 (each of the two equal terms is a Press-Schechter integral)
    assert st_normalisation(0.0) == pytest.approx(0.5, rel=1e-14)


@pytest.mark.parametrize("func, kwargs", [
    (ps_multiplicity, {}),
    (st_multiplicity, {}),
    (st_multiplicity, {"a": 0.75, "p": 0.15}),
    (st_multiplicity, {"a": 1.0, "p": 0.45}),
])
def test_multiplicity_integrates_to_one(func, kwargs):
    # all mass in haloes: int_0^inf F(nu) dln nu = int f(nu) dnu = 1 (Press & Schechter
    # 1974 with the factor 2 of Bond et al. 1991; Sheth & Tormen 1999 normalisation)
    def f(nu):
        return float(func(nu, **kwargs)) / nu

    # f ~ nu^-2p at small nu (integrable); QUADPACK extrapolates the end-point singularity
    total = (integrate.quad(f, 0.0, 1.0, epsabs=0.0, epsrel=1e-12, limit=400)[0]
             + integrate.quad(f, 1.0, np.inf, epsabs=0.0, epsrel=1e-12, limit=400)[0])
    assert total == pytest.approx(1.0, rel=1e-9)


def _fraction_ps(nu1, nu2):
    # closed form: int_nu1^nu2 sqrt(2/pi) exp(-nu^2/2) dnu = erf(nu2/sqrt2) - erf(nu1/sqrt2)
    return special.erf(nu2 / math.sqrt(2)) - special.erf(nu1 / math.sqrt(2))


def _fraction_st(nu1, nu2, a=0.707, p=0.3):
    # closed form of int f_ST dnu with t = a nu^2/2: A [P(1/2, t) + 2^-p Gamma(1/2-p)/sqrt(pi)
    # P(1/2 - p, t)], P the regularised lower incomplete gamma function (Sheth & Tormen 1999)
    A = st_normalisation(p)

    def cum(nu):
        t = 0.5 * a * nu * nu
        return A * (special.gammainc(0.5, t) + 2.0**-p * special.gamma(0.5 - p)
                    / math.sqrt(math.pi) * special.gammainc(0.5 - p, t))
    return cum(nu2) - cum(nu1)


@pytest.mark.parametrize("z", [0.0, 3.0, 12.0])
@pytest.mark.parametrize("model", ["press_schechter", "sheth_tormen"])
def test_mass_fraction_between_two_masses_closed_form(lp, model, z):
    # (1/rho) int M dn/dlnM dlnM over [M1, M2] = closed-form integral of f(nu) between
    # nu(M1) and nu(M2): checks the mass function, the sigma table and its slope together
    m1, m2 = 1e6, 1e14
    nu1, nu2 = lp.delta_c(z) / lp.sigma(m1), lp.delta_c(z) / lp.sigma(m2)
    lnm = np.linspace(math.log(m1), math.log(m2), 4001)
    m = np.exp(lnm)
    frac = integrate.simpson(m * MASS_FUNCTIONS[model](m, z, lp), x=lnm) / lp.rho_mean_msun_mpc3
    ref = _fraction_ps(nu1, nu2) if model == "press_schechter" else _fraction_st(nu1, nu2)
    assert frac == pytest.approx(ref, rel=1e-6)


@pytest.mark.parametrize("z", [0.0, 3.0])
@pytest.mark.parametrize("model", ["press_schechter", "sheth_tormen"])
def test_collapsed_mass_below_mean_density(lp, model, z):
    # mass in haloes of 1e3..1e18 Msun cannot exceed the mean matter density; it equals
    # the closed-form fraction between nu(1e3) and nu(1e18), which is < 1
    lnm = np.linspace(math.log(1e3), math.log(1e18), 6001)
    m = np.exp(lnm)
    rho_halo = integrate.simpson(m * MASS_FUNCTIONS[model](m, z, lp), x=lnm)
    nu1, nu2 = lp.delta_c(z) / lp.sigma(1e3), lp.delta_c(z) / lp.sigma(1e18)
    ref = _fraction_ps(nu1, nu2) if model == "press_schechter" else _fraction_st(nu1, nu2)
    assert rho_halo / lp.rho_mean_msun_mpc3 == pytest.approx(ref, rel=1e-6)
    assert rho_halo < lp.rho_mean_msun_mpc3


def test_press_schechter_closed_form_power_law_limit(lp):
    # PS closed form (Press & Schechter 1974): dn/dlnM = rho/M sqrt(2/pi) nu e^{-nu^2/2}
    # |dln sigma/dln M| with nu = delta_c/sigma
    m = np.logspace(8, 15, 8)
    nu = lp.delta_c(2.0) / lp.sigma(m)
    ref = (lp.rho_mean_msun_mpc3 / m * math.sqrt(2 / math.pi) * nu * np.exp(-nu**2 / 2)
           * np.abs(lp.dlnsigma_dlnm(m)))
    np.testing.assert_allclose(press_schechter(m, 2.0, lp), ref, rtol=1e-14)


def test_number_density_matches_quadrature_and_adds_up(lp):
    # number_density = int dn/dlnM dlnM (adaptive scipy quad as the reference)
    for model, func in MASS_FUNCTIONS.items():
        for z, lo, hi in [(0.0, 1e10, 1e12), (6.0, 1e8, 1e11), (3.0, 1e13, 1e15)]:
            ref = integrate.quad(lambda x: func(math.exp(x), z, lp), math.log(lo),
                                 math.log(hi), epsabs=0.0, epsrel=1e-11, limit=200)[0]
            assert number_density(lo, hi, z, lp, model=model) == pytest.approx(ref, rel=1e-9)
    a = number_density(1e9, 1e11, 2.0, lp)
    b = number_density(1e11, 1e13, 2.0, lp)
    assert number_density(1e9, 1e13, 2.0, lp) == pytest.approx(a + b, rel=1e-11)
    assert number_density(1e11, 1e11, 2.0, lp) == 0.0


def test_broadcasting_and_scalars(lp):
    assert isinstance(sheth_tormen(1e12, 0.0, lp), float)
    m = np.logspace(9, 14, 6)
    z = np.array([[0.0], [2.0], [6.0]])
    out = sheth_tormen(m, z, lp)
    assert out.shape == (3, 6)
    np.testing.assert_array_equal(out[1], sheth_tormen(m, 2.0, lp))
    # abundance of massive haloes falls with redshift (hierarchical growth)
    assert np.all(out[0, -2:] > out[1, -2:]) and np.all(out[1, -2:] > out[2, -2:])


def test_bad_inputs_are_rejected(lp):
    with pytest.raises(ParameterError, match=r"`p` of sheth_tormen must be in \[0, 0.5\); "
                                             r"got 0.5"):
        sheth_tormen(1e12, 0.0, lp, p=0.5)
    with pytest.raises(ParameterError, match=r"`a` of sheth_tormen must be > 0; got -1"):
        sheth_tormen(1e12, 0.0, lp, a=-1)
    with pytest.raises(ParameterError, match=r"`model` of number_density must be one of"):
        number_density(1e10, 1e12, 0.0, lp, model="tinker")
    with pytest.raises(BhgrowInputError, match="m_hi"):
        number_density(1e12, 1e10, 0.0, lp)
    with pytest.raises(BhgrowInputError, match="halo mass"):
        press_schechter(1e20, 0.0, lp)
    with pytest.raises(BhgrowInputError, match="LinearPower"):
        press_schechter(1e12, 0.0, "planck")
