"""Tests of bhgrow.physics.halo against sources outside the project.

Each check names its source beside it: a closed form, a published value (author year; values
written from memory are marked "(memory)"), or the reference library colossus (Diemer 2018,
ApJS 239, 35). Colossus works in Msun/h and physical kpc/h; bhgrow in physical Msun and kpc,
so every comparison converts with h explicitly.
"""

from __future__ import annotations

import dataclasses
import math

import astropy.units as u
import numpy as np
import pytest
from astropy import constants as ac
from astropy.cosmology import FlatLambdaCDM
from colossus.cosmology import cosmology as colossus_cosmology
from colossus.halo import concentration as col_conc
from colossus.halo import mass_so as col_mass_so
from colossus.halo import profile_nfw as col_nfw
from scipy import integrate, optimize

from bhgrow.cosmology import Cosmology
from bhgrow.errors import ParameterError
from bhgrow.physics import halo
from bhgrow.physics.halo import HaloProps, HaloStructure

# Planck 2018 (TT,TE,EE+lowE+lensing+BAO) background parameters as shipped with astropy's
# Planck18, with all three neutrinos massless so that colossus (which has no massive
# neutrinos) and astropy describe the same expansion history, radiation included.
PLANCK_LIKE = dict(H0=67.66, Om0=0.30966, Ob0=0.04897, Tcmb0=2.7255, Neff=3.046)


@pytest.fixture
def cosmo():
    """Planck-like flat LCDM with radiation (massless neutrinos), through bhgrow.Cosmology."""
    return Cosmology(FlatLambdaCDM(m_nu=0 * u.eV, **PLANCK_LIKE), sigma8=0.8102, n_s=0.9665,
                     name="planck_like_massless_nu")


@pytest.fixture
def colossus_planck_like():
    """The same cosmology in colossus (relativistic species on, same Tcmb0 and Neff)."""
    return colossus_cosmology.setCosmology(
        "bhgrow_test_planck_like",
        params=dict(flat=True, relspecies=True, sigma8=0.8102, ns=0.9665, **PLANCK_LIKE),
        persistence="",
    )


@pytest.fixture
def eds():
    """Einstein-de Sitter (Omega_m = 1, no radiation, no Lambda)."""
    return Cosmology(FlatLambdaCDM(H0=70.0, Om0=1.0, Tcmb0=0.0), sigma8=0.8, n_s=1.0,
                     name="eds")


REDSHIFTS = [0.0, 0.5, 1.0, 2.0, 4.0, 6.0, 10.0, 15.0, 20.0, 30.0]
MASSES_MSUN = np.array([1e5, 1e7, 1e9, 1e11, 1e13, 1e15])


# --- Delta_vir ---------------------------------------------------------------------------------
def test_delta_vir_einstein_de_sitter_is_18pi2(eds):
    # closed form: top-hat collapse in an Omega_m = 1 universe gives 18 pi^2 ~ 177.65
    # (Gunn & Gott 1972; Bryan & Norman 1998 fit reduces to it at x = 0)
    assert halo.delta_vir_bryan_norman(1.0) == pytest.approx(18 * math.pi**2, rel=1e-12)
    props = HaloStructure().properties(1e10, np.array([0.0, 3.0, 20.0]), eds)
    np.testing.assert_allclose(props.delta_vir, 18 * math.pi**2, rtol=1e-12)


def test_delta_vir_low_density_memory(cosmo):
    # Bryan & Norman 1998: Delta_c ~ 100-104 at z = 0 for Omega_m ~ 0.3 (memory)
    d0 = float(halo.delta_vir_bryan_norman(cosmo.omega_m(0.0)))
    assert 100.0 <= d0 <= 104.0
    # high z: Lambda is negligible, Delta -> 18 pi^2 (Bryan & Norman 1998 limit); radiation
    # still holds Omega_m(z=20) ~ 0.994, which lowers Delta by ~0.3 %
    d20 = float(halo.delta_vir_bryan_norman(cosmo.omega_m(20.0)))
    assert d20 == pytest.approx(18 * math.pi**2, rel=5e-3)


def test_delta_vir_matches_colossus(cosmo, colossus_planck_like):
    # colossus mass_so.deltaVir (Diemer 2018), Bryan & Norman 1998 fit
    z = np.array(REDSHIFTS)
    ours = halo.delta_vir_bryan_norman(cosmo.omega_m(z))
    ref = col_mass_so.deltaVir(z)
    np.testing.assert_allclose(ours, ref, rtol=1e-3)


# --- r_vir, V_c, V_max ---------------------------------------------------------------------------
@pytest.mark.parametrize("z", REDSHIFTS)
def test_r_vir_matches_colossus(cosmo, colossus_planck_like, z):
    # colossus mass_so.M_to_R(M [Msun/h], z, 'vir') -> physical kpc/h (Diemer 2018)
    h = cosmo.h
    ours = halo.virial_radius_kpc(MASSES_MSUN, z, cosmo)
    ref = col_mass_so.M_to_R(MASSES_MSUN * h, z, "vir") / h
    np.testing.assert_allclose(ours, ref, rtol=1e-3)
    props = HaloStructure().properties(MASSES_MSUN, z, cosmo)
    np.testing.assert_allclose(props.r_vir_kpc, ref, rtol=1e-3)


@pytest.mark.parametrize("z", [0.0, 6.0])
def test_virial_and_escape_speed_equal_the_fields_of_properties(cosmo, z):
    # the engine takes these parts alone; they must be the same numbers as the full set
    # (whose physics the colossus and numeric-potential checks in this file cover)
    hs = HaloStructure()
    props = hs.properties(MASSES_MSUN, z, cosmo)
    r_vir, v_c, t_vir = hs.virial(MASSES_MSUN, z, cosmo)
    np.testing.assert_array_equal(r_vir, props.r_vir_kpc)
    np.testing.assert_array_equal(v_c, props.v_c_kms)
    np.testing.assert_array_equal(t_vir, props.t_vir_k)
    v_esc = hs.escape_speed_kms(MASSES_MSUN, z, cosmo)
    np.testing.assert_array_equal(v_esc, props.v_esc_kms)
    np.testing.assert_array_equal(hs.escape_speed_kms(MASSES_MSUN[1:2], z, cosmo), v_esc[1:2])
    np.testing.assert_array_equal(hs.escape_speed_kms(MASSES_MSUN, z, cosmo, v_c), v_esc)


@pytest.mark.parametrize("z", [0.0, 2.0, 10.0])
def test_r_200c_with_explicit_delta_matches_colossus(cosmo, colossus_planck_like, z):
    # colossus mass_so.M_to_R(M, z, '200c') (Diemer 2018): overdensity 200 x rho_crit(z)
    h = cosmo.h
    ours = halo.virial_radius_kpc(MASSES_MSUN, z, cosmo, delta=200.0)
    ref = col_mass_so.M_to_R(MASSES_MSUN * h, z, "200c") / h
    np.testing.assert_allclose(ours, ref, rtol=1e-3)


@pytest.mark.parametrize("m_msun,z", [(1e6, 20.0), (1e8, 10.0), (1e11, 2.0), (1e12, 0.0),
                                      (1e14, 0.5)])
def test_v_c_and_v_max_match_colossus_nfw_profile(cosmo, colossus_planck_like, m_msun, z):
    # colossus NFWProfile(M, c, z, 'vir'): circularVelocity(R_vir) and Vmax() (Diemer 2018)
    h = cosmo.h
    props = HaloStructure().properties(m_msun, z, cosmo)
    c = float(props.conc)
    prof = col_nfw.NFWProfile(M=m_msun * h, c=c, z=z, mdef="vir")
    r_vir_h = col_mass_so.M_to_R(m_msun * h, z, "vir")
    assert float(props.v_c_kms) == pytest.approx(float(prof.circularVelocity(r_vir_h)),
                                                 rel=1e-3)
    assert float(props.v_max_kms) == pytest.approx(prof.Vmax()[0], rel=1e-3)


def test_v_max_radius_against_numeric_maximum():
    # Navarro, Frenk & White 1997: V_c peaks at r ~ 2.163 r_s (memory); numeric maximum of
    # V_c^2(x) ~ m(x)/x as the independent reference
    res = optimize.minimize_scalar(lambda x: -(math.log1p(x) - x / (1 + x)) / x,
                                   bracket=(1.0, 2.0, 5.0), tol=1e-12)
    assert halo.NFW_X_VMAX == pytest.approx(res.x, rel=1e-6)
    assert halo.NFW_X_VMAX == pytest.approx(2.163, abs=1e-3)
    for c in (3.0, 10.0, 25.0):
        # V_max / V_c = max_r V_c(r) / V_c(r_vir) from the NFW mass profile directly
        f = lambda y: -((math.log1p(y) - y / (1 + y)) / y)  # noqa: E731
        vmax2_over_vc2 = (-optimize.minimize_scalar(f, bracket=(1.0, 2.0, 5.0)).fun
                          * c / (math.log1p(c) - c / (1 + c)))
        assert float(halo.nfw_vmax_kms(1.0, c)) == pytest.approx(math.sqrt(vmax2_over_vc2),
                                                                 rel=1e-6)


# --- T_vir ------------------------------------------------------------------------------------
def test_virial_temperature_closed_form_astropy():
    # closed form T = mu m_p V^2 / (2 k_B) evaluated with astropy constants and units
    v = np.array([5.0, 16.5, 100.0, 1000.0])
    for mu in (0.59, 1.22):
        ref = (mu * ac.m_p * (v * u.km / u.s) ** 2 / (2 * ac.k_B)).to_value(u.K)
        np.testing.assert_allclose(halo.virial_temperature_k(v, mu), ref, rtol=1e-10)


def test_atomic_cooling_threshold_memory():
    # T_vir = 1e4 K corresponds to V_c ~ 16.5 km/s for mu ~ 0.6 (memory); ~3 % tolerance
    assert float(halo.virial_temperature_k(16.5, 0.6)) == pytest.approx(1e4, rel=0.03)
    assert float(halo.virial_temperature_k(16.5, 0.59)) == pytest.approx(1e4, rel=0.03)


@pytest.mark.parametrize("z", [6.0, 10.0, 20.0])
@pytest.mark.parametrize("m_h", [1e6, 1e8, 1e10])
def test_barkana_loeb_2001_scalings(cosmo, z, m_h):
    # Barkana & Loeb 2001, Phys. Rep. 349, 125, eqs. 24-26 (memory): with
    # q = [Omega_m Delta_c / (Omega_m^z 18 pi^2)], M8 = M / (1e8 Msun/h), Z = (1+z)/10:
    #   r_vir = 0.784 M8^(1/3) q^(-1/3) Z^-1 kpc/h,  V_c = 23.4 M8^(1/3) q^(1/6) Z^(1/2) km/s,
    #   T_vir = 1.98e4 (mu/0.6) M8^(2/3) q^(1/3) Z K.
    # Their coefficients are rounded to 3 digits, hence 1 %.
    h = cosmo.h
    om0, omz = float(cosmo.omega_m(0.0)), float(cosmo.omega_m(z))
    props = HaloStructure(mu=0.6).properties(m_h / h, z, cosmo)
    q = om0 * float(props.delta_vir) / (omz * 18 * math.pi**2)
    m8, zz = m_h / 1e8, (1 + z) / 10
    assert float(props.r_vir_kpc) == pytest.approx(
        0.784 * m8 ** (1 / 3) * q ** (-1 / 3) / zz / h, rel=1e-2)
    assert float(props.v_c_kms) == pytest.approx(
        23.4 * m8 ** (1 / 3) * q ** (1 / 6) * zz**0.5, rel=1e-2)
    assert float(props.t_vir_k) == pytest.approx(
        1.98e4 * m8 ** (2 / 3) * q ** (1 / 3) * zz, rel=1e-2)


def test_default_mu_is_ionized_primordial_gas():
    # fully ionized H + He with hydrogen mass fraction X = 0.76 (memory, BBN):
    # mu = 1 / (2 X + 3 Y / 4)
    x_h = 0.76
    assert halo.DEFAULT_MU == pytest.approx(1.0 / (2 * x_h + 3 * (1 - x_h) / 4), rel=1e-2)
    assert HaloStructure().mu == halo.DEFAULT_MU


# --- concentration -----------------------------------------------------------------------------
@pytest.mark.parametrize("z", [0.0, 0.5, 1.0, 2.0])
def test_concentration_duffy08_matches_colossus(cosmo, colossus_planck_like, z):
    # colossus concentration(M [Msun/h], 'vir', z, model='duffy08') (Diemer 2018), inside the
    # calibrated range of Duffy et al. 2008 (1e11-1e15 Msun/h, z <= 2)
    h = cosmo.h
    m_h = np.array([1e11, 1e12, 1e13, 1e14, 1e15])
    ours = halo.concentration_duffy08(m_h / h, z, h)
    ref = col_conc.concentration(m_h, "vir", z, model="duffy08")
    np.testing.assert_allclose(ours, ref, rtol=1e-3)


def test_concentration_duffy08_pivot_memory():
    # Duffy et al. 2008, Table 1 (full sample, Delta_vir): A = 7.85 at M = 2e12 Msun/h, z = 0,
    # and c ~ (1+z)^-0.71 (memory)
    h = 0.7
    assert float(halo.concentration_duffy08(2e12 / h, 0.0, h)) == pytest.approx(7.85, rel=1e-12)
    assert float(halo.concentration_duffy08(2e12 / h, 1.0, h)) == pytest.approx(
        7.85 * 2.0**-0.71, rel=1e-12)


@pytest.mark.parametrize("z", [0.0, 0.5, 1.0, 2.0, 3.0, 5.0])
def test_concentration_dutton_maccio14_matches_colossus(cosmo, colossus_planck_like, z):
    # colossus concentration(M, 'vir', z, model='dutton14') (Diemer 2018), inside the
    # calibrated range of Dutton & Macciò 2014 (M > 1e10 Msun/h, z <= 5)
    h = cosmo.h
    m_h = np.array([2e10, 1e12, 1e13, 1e14, 1e15])
    ours = halo.concentration_dutton_maccio14(m_h / h, z, h)
    ref = col_conc.concentration(m_h, "vir", z, model="dutton14")
    np.testing.assert_allclose(ours, ref, rtol=1e-3)


def test_concentration_dutton_maccio14_clamped_above_calibration():
    # documented behaviour: beyond z = 5 (end of the Dutton & Macciò 2014 calibration) the
    # relation is held at z = 5, so minihalo concentrations stay of order a few
    m = np.array([1e5, 1e7, 1e9])
    c20 = halo.concentration_dutton_maccio14(m, 20.0, 0.7)
    np.testing.assert_array_equal(c20, halo.concentration_dutton_maccio14(m, 5.0, 0.7))
    assert np.all((c20 > 1.0) & (c20 < 10.0))


def test_structure_uses_selected_relation(cosmo):
    m = np.array([1e8, 1e12])
    p = HaloStructure(concentration="dutton_maccio14").properties(m, 1.0, cosmo)
    np.testing.assert_array_equal(p.conc, halo.concentration_dutton_maccio14(m, 1.0, cosmo.h))
    p = HaloStructure(concentration="duffy08").properties(m, 1.0, cosmo)
    np.testing.assert_array_equal(p.conc, halo.concentration_duffy08(m, 1.0, cosmo.h))


# --- central escape speed ---------------------------------------------------------------------
def _nfw_central_escape_numeric(v_c, c):
    """sqrt(2 |Phi(0)|) by quadrature of G M(<r) / r^2 from 0 to infinity (NFW, G = 1)."""
    # units: r_vir = 1, G M_vir = v_c^2; M(<r) = M_vir m(c r) / m(c)  (Navarro et al. 1997)
    m_c = math.log1p(c) - c / (1 + c)

    def accel(r):
        y = c * r
        return (math.log1p(y) - y / (1 + y)) / m_c / r**2 if r > 0 else c**2 / (2 * m_c)

    phi0 = (integrate.quad(accel, 0.0, 1.0, epsabs=0, epsrel=1e-12)[0]
            + integrate.quad(accel, 1.0, np.inf, epsabs=0, epsrel=1e-12, limit=200)[0])
    return v_c * math.sqrt(2 * phi0)


@pytest.mark.parametrize("c", [1.0, 4.0, 10.0, 30.0])
def test_escape_speed_against_numeric_potential(c):
    # reference: numeric integral of the NFW potential (Navarro, Frenk & White 1997;
    # Łokas & Mamon 2001), with scipy.integrate.quad
    v_c = 150.0
    ref = _nfw_central_escape_numeric(v_c, c)
    assert float(halo.nfw_escape_speed_central_kms(v_c, c)) == pytest.approx(ref, rel=1e-6)


def test_escape_speed_closed_form_c10():
    # closed form (Łokas & Mamon 2001): v_esc(0)/V_c = sqrt(2 c / [ln(1+c) - c/(1+c)]) ~ 3.665
    c = 10.0
    ref = math.sqrt(2 * c / (math.log(1 + c) - c / (1 + c)))
    assert float(halo.nfw_escape_speed_central_kms(1.0, c)) == pytest.approx(ref, rel=1e-12)
    assert ref == pytest.approx(3.665, abs=1e-3)


# --- vectorization and shapes ------------------------------------------------------------------
def test_properties_vectorized_shapes_and_elementwise(cosmo):
    s = HaloStructure()
    m = np.logspace(6, 14, 4)[:, None]
    z = np.array([0.0, 3.0, 12.0])
    p = s.properties(m, z, cosmo)
    assert isinstance(p, HaloProps)
    for name, arr in p._asdict().items():
        assert isinstance(arr, np.ndarray), name
        assert arr.shape == (4, 3), name
        assert arr.dtype == np.float64, name
        assert np.all(np.isfinite(arr)) and np.all(arr > 0), name
    # element-wise equal to scalar calls
    for i in range(4):
        for j in range(3):
            q = s.properties(float(m[i, 0]), float(z[j]), cosmo)
            for name in HaloProps._fields:
                assert getattr(p, name)[i, j] == pytest.approx(float(getattr(q, name)),
                                                               rel=1e-14), name
    # one snapshot: scalar z with a mass array
    p1 = s.properties(np.array([1e8, 1e9, 1e10]), 8.0, cosmo)
    assert all(a.shape == (3,) for a in p1)
    # scalars in -> 0-d arrays out
    p0 = s.properties(1e10, 1.0, cosmo)
    assert all(np.ndim(a) == 0 for a in p0)


def test_properties_monotonic_in_mass(cosmo):
    # V_c ~ M^(1/3) at fixed z (Barkana & Loeb 2001): heavier haloes are larger, faster, hotter
    p = HaloStructure().properties(np.logspace(5, 15, 11), 5.0, cosmo)
    for arr in (p.r_vir_kpc, p.v_c_kms, p.t_vir_k, p.v_max_kms, p.v_esc_kms):
        assert np.all(np.diff(arr) > 0)
    np.testing.assert_allclose(p.v_c_kms[1:] / p.v_c_kms[:-1], 10 ** (1 / 3), rtol=1e-12)
    assert np.all(np.diff(p.conc) < 0)  # Duffy et al. 2008: B < 0


# --- parameter validation ------------------------------------------------------------------------
@pytest.mark.parametrize("bad,rule", [(-1, "in (0, 2]"), (0.0, "in (0, 2]"), (2.5, "in (0, 2]"),
                                      (float("nan"), "finite"), ("0.6", "a number")])
def test_mu_validation_message(bad, rule):
    with pytest.raises(ParameterError) as info:
        HaloStructure(mu=bad)
    assert str(info.value) == f"`mu` of HaloStructure must be {rule}; got {bad!r}"


def test_concentration_validation_message():
    with pytest.raises(ParameterError) as info:
        HaloStructure(concentration="nfw")
    assert str(info.value) == ("`concentration` of HaloStructure must be one of 'duffy08', "
                               "'dutton_maccio14'; got 'nfw'")


def test_structure_is_frozen_and_normalizes_mu():
    s = HaloStructure(mu=np.float32(1.22), concentration="dutton_maccio14")
    assert type(s.mu) is float and s.mu == pytest.approx(1.22, rel=1e-6)
    assert HaloStructure(mu=2).mu == 2.0
    with pytest.raises(dataclasses.FrozenInstanceError):
        s.mu = 0.6  # type: ignore[misc]
