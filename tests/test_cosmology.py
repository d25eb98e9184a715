"""Tests for bhgrow.cosmology.

References used below
---------------------
* astropy.cosmology, Astropy Collaboration 2022 (ApJ 935, 167): the reference for every
  table (its own quadrature, called directly).
* colossus, Diemer 2018 (ApJS 239, 35): independent cosmology code, for a second opinion on
  times and distances and for the sigma8 / n_s of the published parameter sets.
* Planck Collaboration 2020, A&A 641, A6 (Planck 2018 VI), Table 2: age and sigma8, n_s.
* PDG "Astrophysical constants and parameters" (Workman et al. 2022): rho_crit,0.
* Hubble's law (Hubble 1929): the closed-form z -> 0 limits.
"""

from __future__ import annotations

import json
import math
import pickle

import astropy.units as u
import numpy as np
import pytest
from astropy.cosmology import FlatLambdaCDM, LambdaCDM, Planck18, realizations, z_at_value
from hypothesis import given, settings
from hypothesis import strategies as st

from bhgrow.constants import GYR_S
from bhgrow.cosmology import Cosmology
from bhgrow.errors import BhgrowInputError, ParameterError

RTOL = 1e-6  # the module's accuracy contract
_PLANCK_SHARED = Cosmology()  # for the hypothesis test (fixtures do not mix with @given)

# ------------------------------------------------------------------------- fixtures


def _open_lcdm():
    # non-flat (open, Omega_k ~ +0.05) custom Lambda-CDM with radiation
    return LambdaCDM(H0=70.0, Om0=0.30, Ode0=0.65, Tcmb0=2.7255, Ob0=0.045, name="open")


def _closed_lcdm():
    # non-flat (closed, Omega_k ~ -0.10) custom Lambda-CDM with radiation
    return LambdaCDM(H0=65.0, Om0=0.35, Ode0=0.75, Tcmb0=2.7255, Ob0=0.05, name="closed")


COSMOLOGIES = {
    "Planck18": lambda: Cosmology(),
    "open": lambda: Cosmology(_open_lcdm(), sigma8=0.8, n_s=0.96),
    "closed": lambda: Cosmology(_closed_lcdm(), sigma8=0.8, n_s=0.96),
}


@pytest.fixture(scope="module", params=list(COSMOLOGIES))
def cosmo(request):
    return COSMOLOGIES[request.param]()


@pytest.fixture(scope="module")
def planck():
    return Cosmology()


@pytest.fixture(scope="module")
def z_random():
    # ~2000 random redshifts over the contract range [1e-4, 30] (seeded)
    return np.random.default_rng(20240607).uniform(1e-4, 30.0, 2000)


# bhgrow method -> the astropy.cosmology (Astropy Collaboration 2022) reference, plain floats
REFERENCE = {
    "age_gyr": lambda a, z: a.age(z).to_value(u.Gyr),
    "lookback_gyr": lambda a, z: a.lookback_time(z).to_value(u.Gyr),
    "comoving_dist_mpc": lambda a, z: a.comoving_distance(z).to_value(u.Mpc),
    "lum_dist_mpc": lambda a, z: a.luminosity_distance(z).to_value(u.Mpc),
    # full sky: 4 pi sr times astropy's per-steradian element
    "dvc_dz_mpc3": lambda a, z: 4 * math.pi * a.differential_comoving_volume(z).to_value(
        u.Mpc**3 / u.sr),
    "efunc": lambda a, z: a.efunc(z),
    "hubble_kms_mpc": lambda a, z: a.H(z).to_value(u.km / u.s / u.Mpc),
    "omega_m": lambda a, z: a.Om(z),
    "rho_crit_msun_kpc3": lambda a, z: a.critical_density(z).to_value(u.Msun / u.kpc**3),
}


# ------------------------------------------------------------------------- accuracy vs astropy


_REFERENCE_CACHE: dict = {}


def _reference(cosmo, method, z):
    """astropy values, computed once per (cosmology, method) for the shared random sample."""
    key = (id(cosmo), method, z.size)
    if key not in _REFERENCE_CACHE:
        _REFERENCE_CACHE[key] = REFERENCE[method](cosmo.astropy, z)
    return _REFERENCE_CACHE[key]


@pytest.mark.parametrize("method", list(REFERENCE))
def test_tables_match_astropy_on_random_redshifts(cosmo, z_random, method):
    """Every table within 1e-6 relative of astropy.cosmology (Astropy Collaboration 2022)."""
    got = getattr(cosmo, method)(z_random)
    want = _reference(cosmo, method, z_random)
    assert got.shape == z_random.shape and got.dtype == np.float64
    np.testing.assert_allclose(got, want, rtol=RTOL, atol=0)


@pytest.mark.parametrize("method", ["lookback_gyr", "comoving_dist_mpc", "lum_dist_mpc",
                                    "dvc_dz_mpc3"])
def test_relative_accuracy_holds_below_1e4(planck, method):
    """Tiny numbers near z = 0 keep their relative accuracy (astropy, Astropy Collab. 2022)."""
    z = np.geomspace(1e-9, 1e-4, 40)
    np.testing.assert_allclose(getattr(planck, method)(z),
                               REFERENCE[method](planck.astropy, z), rtol=RTOL, atol=0)


def test_tables_match_tight_quadrature(planck):
    """Beyond astropy's default tolerance: scipy quad at epsrel=1e-13 of the same 1/E(z)
    (Hogg 1999, eqs. 15 and 30). Near z = 18.8 astropy's own default quad is off by 6e-8."""
    from scipy.integrate import quad

    a = planck.astropy
    d_h = a.hubble_distance.to_value(u.Mpc)
    t_h = a.hubble_time.to_value(u.Gyr)
    for z in (0.37, 4.2, 18.811, 29.9):
        dc = d_h * quad(a.inv_efunc, 0.0, z, epsabs=0.0, epsrel=1e-13, limit=200)[0]
        tl = t_h * quad(a.lookback_time_integrand, 0.0, z, epsabs=0.0, epsrel=1e-13,
                        limit=200)[0]
        assert planck.comoving_dist_mpc(z) == pytest.approx(dc, rel=1e-10)
        assert planck.lookback_gyr(z) == pytest.approx(tl, rel=1e-10)


def test_z_at_age_inverts_astropy_age(cosmo, z_random):
    """z(t) recovers z from astropy's t(z) (Astropy Collaboration 2022)."""
    t = _reference(cosmo, "age_gyr", z_random)
    np.testing.assert_allclose(cosmo.z_at_age(t), z_random, rtol=RTOL, atol=0)


def test_z_at_age_matches_astropy_z_at_value(planck):
    """A few points against astropy's own root finder z_at_value (Astropy Collab. 2022)."""
    t = np.array([0.2, 0.9, 3.3, 7.0, 12.5])
    want = np.array([z_at_value(Planck18.age, ti * u.Gyr, zmin=0, zmax=31, ztol=1e-12).value
                     for ti in t])
    np.testing.assert_allclose(planck.z_at_age(t), want, rtol=RTOL)


def test_round_trip_z_at_age_of_age(cosmo, z_random):
    z = np.concatenate([z_random, [0.0, 30.0]])
    back = cosmo.z_at_age(cosmo.age_gyr(z))
    np.testing.assert_allclose(back, z, rtol=1e-9, atol=1e-12)


@settings(max_examples=200, deadline=None)
@given(st.floats(min_value=0.0, max_value=30.0, allow_nan=False))
def test_round_trip_and_time_budget_property(z):
    """t(z) + t_L(z) = t0 (Hogg 1999, eq. 30) and z(t(z)) = z for any z in range."""
    c = _PLANCK_SHARED
    assert c.z_at_age(c.age_gyr(z)) == pytest.approx(z, rel=1e-9, abs=1e-12)
    assert c.age_gyr(z) + c.lookback_gyr(z) == pytest.approx(c.age_gyr(0.0), rel=1e-10)


def test_larger_z_max_extends_tables():
    """z_max=1000 serves the radiation-matter era too (astropy, Astropy Collaboration 2022)."""
    c = Cosmology(z_max=1000.0)
    z = np.array([31.0, 100.0, 500.0, 999.0, 1000.0])
    np.testing.assert_allclose(c.age_gyr(z), Planck18.age(z).to_value(u.Gyr), rtol=RTOL)
    np.testing.assert_allclose(c.lum_dist_mpc(z), Planck18.luminosity_distance(z).to_value(u.Mpc),
                               rtol=RTOL)
    np.testing.assert_allclose(c.z_at_age(c.age_gyr(z)), z, rtol=1e-9)


def test_efunc_outside_table_falls_back_to_astropy(planck):
    z = np.array([-0.5, -0.01, 0.0, 12.0, 45.0, 1.0e4])
    np.testing.assert_allclose(planck.efunc(z), Planck18.efunc(z), rtol=RTOL)
    np.testing.assert_allclose(planck.omega_m(z), Planck18.Om(z), rtol=RTOL)


# ------------------------------------------------------------------------- independent checks


def test_age_today_planck18(planck):
    """Planck 2018 VI (Planck Collab. 2020, A&A 641, A6) Table 2: 13.787 +- 0.020 Gyr (memory)."""
    assert abs(planck.age_gyr(0.0) - 13.787) < 0.020


def test_low_redshift_hubble_law(planck):
    """z -> 0: D_C -> c z / H0 and t_L -> z / H0 (Hubble 1929; closed-form limit)."""
    z = 1e-7
    c_kms = 299792.458  # speed of light, km/s (SI definition)
    assert planck.comoving_dist_mpc(z) == pytest.approx(c_kms * z / planck.H0, rel=1e-6)
    hubble_time_gyr = (1 / (planck.H0 * u.km / u.s / u.Mpc)).to_value(u.Gyr)
    assert planck.lookback_gyr(z) == pytest.approx(z * hubble_time_gyr, rel=1e-6)
    # dV_c/dz -> 4 pi (c/H0)^3 z^2 (Hogg 1999, eq. 28 at z -> 0)
    assert planck.dvc_dz_mpc3(z) == pytest.approx(4 * math.pi * (c_kms / planck.H0) ** 3 * z**2,
                                                  rel=1e-6)


def test_zero_redshift_is_exact(planck):
    assert planck.lookback_gyr(0.0) == 0.0
    assert planck.comoving_dist_mpc(0.0) == 0.0
    assert planck.lum_dist_mpc(0.0) == 0.0
    assert planck.dvc_dz_mpc3(0.0) == 0.0
    assert planck.efunc(0.0) == pytest.approx(1.0, abs=1e-12)
    assert abs(planck.z_at_age(planck.age_gyr(0.0))) < 1e-12


def test_against_colossus_flat_lcdm():
    """Second code: colossus (Diemer 2018) with the same radiation content, no massive nu."""
    cc = pytest.importorskip("colossus.cosmology.cosmology")
    from colossus.utils import constants as col_const

    params = dict(flat=True, H0=70.0, Om0=0.3, Ob0=0.045, sigma8=0.8, ns=0.96,
                  Tcmb0=2.7255, Neff=3.046, relspecies=True)
    col = cc.setCosmology("bhgrow_test", params=params, interpolation=False, persistence="")
    ours = Cosmology(FlatLambdaCDM(70.0, 0.3, Tcmb0=2.7255, Ob0=0.045, Neff=3.046),
                     sigma8=0.8, n_s=0.96)
    z = np.array([1e-3, 0.1, 1.0, 3.0, 10.0, 30.0])
    h = 0.7
    # colossus' Gyr uses a 365.2422-day year; ours (astropy) the Julian year
    gyr = col_const.GYR / GYR_S
    np.testing.assert_allclose(ours.age_gyr(z), col.age(z) * gyr, rtol=1e-6)
    np.testing.assert_allclose(ours.lookback_gyr(z), col.lookbackTime(z) * gyr, rtol=1e-6)
    np.testing.assert_allclose(ours.lum_dist_mpc(z), col.luminosityDistance(z) / h, rtol=1e-6)
    np.testing.assert_allclose(ours.comoving_dist_mpc(z),
                               col.comovingDistance(0.0, z, transverse=False) / h, rtol=1e-6)
    np.testing.assert_allclose(ours.omega_m(z), col.Om(z), rtol=1e-6)
    # colossus rho_c in Msun h^2 / kpc^3
    np.testing.assert_allclose(ours.rho_crit_msun_kpc3(z), col.rho_c(z) * h**2, rtol=1e-6)


def test_rho_crit_handbook_value(planck):
    """rho_crit,0 = 2.77537e11 h^2 Msun/Mpc^3 (PDG, Workman et al. 2022; memory)."""
    h2 = planck.h**2
    assert planck.rho_crit_msun_kpc3(0.0) * 1e9 / h2 == pytest.approx(2.77537e11, rel=1e-5)
    assert planck.rho_mean_msun_mpc3_comoving() == pytest.approx(
        planck.Om0 * 2.77537e11 * h2, rel=1e-5)
    # rho_c scales as E(z)^2 = H(z)^2 / H0^2 (Friedmann equation)
    assert planck.rho_crit_msun_kpc3(3.0) / planck.rho_crit_msun_kpc3(0.0) == pytest.approx(
        planck.efunc(3.0) ** 2, rel=1e-12)


# ------------------------------------------------------------------------- constructors


def test_default_is_planck18_with_published_sigma8_ns(planck):
    """Planck 2018 VI Table 2 (TT,TE,EE+lowE+lensing+BAO): sigma8 0.8102, n_s 0.9665 (memory)."""
    assert planck.astropy is Planck18
    assert planck.name == "Planck18"
    assert planck.sigma8 == pytest.approx(0.8102)
    assert planck.n_s == pytest.approx(0.9665)


@pytest.mark.parametrize("ours, theirs", [("Planck18", "planck18"), ("Planck15", "planck15"),
                                          ("Planck13", "planck13"), ("WMAP9", "WMAP9")])
def test_from_name_sigma8_ns_match_colossus(ours, theirs):
    """Same paper and table in colossus' parameter sets (Diemer 2018)."""
    cc = pytest.importorskip("colossus.cosmology.cosmology")
    c = Cosmology.from_name(ours)
    assert c.name == ours
    assert c.sigma8 == pytest.approx(cc.cosmologies[theirs]["sigma8"], abs=1e-4)
    assert c.n_s == pytest.approx(cc.cosmologies[theirs]["ns"], abs=1e-4)
    assert c.H0 == pytest.approx(cc.cosmologies[theirs]["H0"], abs=1e-2)


def test_from_name_is_case_insensitive_and_overrides():
    c = Cosmology.from_name("wmap9", sigma8=0.7, n_s=0.95)
    assert c.astropy is realizations.WMAP9
    assert (c.sigma8, c.n_s) == (0.7, 0.95)


def test_unknown_name_lists_allowed_names():
    with pytest.raises(BhgrowInputError) as err:
        Cosmology.from_name("Planck2018")
    msg = str(err.value)
    assert "unknown cosmology name 'Planck2018'" in msg
    for name in realizations.available:
        assert name in msg
    assert "did you mean 'Planck18'" in msg


def test_from_parameters_flat_lcdm_matches_astropy():
    c = Cosmology.from_parameters(70.0, 0.3, 0.045, sigma8=0.81, n_s=0.965)
    ref = FlatLambdaCDM(H0=70.0, Om0=0.3, Ob0=0.045, Tcmb0=2.7255)
    z = np.array([0.5, 2.0, 9.0])
    np.testing.assert_allclose(c.age_gyr(z), ref.age(z).to_value(u.Gyr), rtol=RTOL)
    assert (c.h, c.H0, c.Om0, c.Ob0, c.name) == (0.7, 70.0, 0.3, 0.045, "custom")
    assert c.fb == pytest.approx(0.045 / 0.3)
    assert c.Ode0 == pytest.approx(ref.Ode0)


@pytest.mark.parametrize("kwargs, message", [
    (dict(H0=-3), "`H0` of Cosmology must be in (0, 200]; got -3"),
    (dict(H0=250.0), "`H0` of Cosmology must be in (0, 200]; got 250.0"),
    (dict(Om0=0.0), "`Om0` of Cosmology must be in (0, 1]; got 0.0"),
    (dict(Om0=1.5), "`Om0` of Cosmology must be in (0, 1]; got 1.5"),
    (dict(Ob0=0.5), "`Ob0` of Cosmology must be in [0, 0.3]; got 0.5"),
    (dict(Ob0=-0.01), "`Ob0` of Cosmology must be in [0, 0.3]; got -0.01"),
    (dict(sigma8=0.0), "`sigma8` of Cosmology must be > 0; got 0.0"),
    (dict(n_s=-1), "`n_s` of Cosmology must be > 0; got -1"),
    (dict(H0=float("nan")), "`H0` of Cosmology must be finite; got nan"),
    (dict(Tcmb0=-1.0), "`Tcmb0` of Cosmology must be >= 0; got -1.0"),
])
def test_from_parameters_validation_messages(kwargs, message):
    args = dict(H0=70.0, Om0=0.3, Ob0=0.045, sigma8=0.8, n_s=0.96) | kwargs
    with pytest.raises(ParameterError) as err:
        Cosmology.from_parameters(**args)
    assert str(err.value) == message
    assert isinstance(err.value, BhgrowInputError)


def test_custom_astropy_without_sigma8_needs_them():
    with pytest.raises(BhgrowInputError, match="needs sigma8 and n_s"):
        Cosmology(_open_lcdm())
    with pytest.raises(BhgrowInputError, match="needs n_s"):
        Cosmology(_open_lcdm(), sigma8=0.8)
    with pytest.raises(ParameterError, match="`z_max` of Cosmology must be > 0"):
        Cosmology(z_max=-1.0)
    with pytest.raises(BhgrowInputError, match="astropy FLRW cosmology"):
        Cosmology(42)


# ------------------------------------------------------------------------- interface


def test_scalar_in_scalar_out(planck):
    for method in list(REFERENCE):
        value = getattr(planck, method)(2.0)
        assert type(value) is float, method
    assert type(planck.z_at_age(1.0)) is float
    assert type(planck.age_gyr(np.float64(2.0))) is float
    assert type(planck.rho_mean_msun_mpc3_comoving()) is float


def test_array_shapes_and_inputs(planck):
    z = np.linspace(0.0, 10.0, 12).reshape(3, 4)
    assert planck.age_gyr(z).shape == (3, 4)
    assert planck.dvc_dz_mpc3(list(z.ravel())).shape == (12,)
    assert planck.lum_dist_mpc(np.array([])).shape == (0,)
    assert planck.z_at_age(np.array([])).shape == (0,)
    # astropy Quantities are converted at the boundary
    assert planck.z_at_age(1000.0 * u.Myr) == pytest.approx(planck.z_at_age(1.0), rel=1e-14)
    with pytest.raises(BhgrowInputError, match="expected a quantity in Gyr"):
        planck.z_at_age(1.0 * u.Mpc)


@pytest.mark.parametrize("bad", [30.5, -0.1, float("nan"), [1.0, 40.0], float("inf")])
def test_redshift_outside_table_raises(planck, bad):
    with pytest.raises(BhgrowInputError, match=r"must be finite and in \[0, 30\]") as err:
        planck.lum_dist_mpc(bad)
    assert err.value.rule == "z_range"


def test_round_off_at_the_range_edges_is_clipped(planck):
    assert planck.lookback_gyr(-1e-13) == 0.0
    assert planck.age_gyr(30.0 * (1 + 1e-13)) == pytest.approx(planck.age_gyr(30.0), rel=1e-12)


@pytest.mark.parametrize("bad", [0.01, 14.5, -1.0, 0.0, float("nan")])
def test_z_at_age_outside_table_raises(planck, bad):
    with pytest.raises(BhgrowInputError, match="must be finite and in") as err:
        planck.z_at_age(bad)
    assert "Gyr" in str(err.value) and err.value.rule == "t_range"


def test_to_dict_is_json_and_rebuilds_the_cosmology(planck):
    d = planck.to_dict()
    json.dumps(d)
    assert d["name"] == "Planck18" and d["sigma8"] == 0.8102 and d["n_s"] == 0.9665
    assert d["m_nu_ev"] == pytest.approx([0.0, 0.0, 0.06])
    rebuilt = FlatLambdaCDM(H0=d["H0"], Om0=d["Om0"], Ob0=d["Ob0"], Tcmb0=d["Tcmb0"],
                            Neff=d["Neff"], m_nu=d["m_nu_ev"] * u.eV)
    assert rebuilt.age(5.0).to_value(u.Gyr) == pytest.approx(planck.age_gyr(5.0), rel=1e-9)


def test_pickle_round_trip(planck):
    planck.age_gyr(1.0)  # build tables
    other = pickle.loads(pickle.dumps(planck))
    z = np.array([0.0, 1.0, 29.0])
    np.testing.assert_array_equal(other.lum_dist_mpc(z), planck.lum_dist_mpc(z))
    assert other.to_dict() == planck.to_dict()


def test_scalar_redshift_memo_gives_the_array_values(planck):
    """The last scalar redshift's ln E is kept; alternating scalars (including -0.0 and 0.0,
    whose ln(1+z) differ in sign) give the array path's values bit for bit, and those agree
    with astropy's Om(z) and critical density (Planck18, astropy's own realization)."""
    zs = [3.0, 3.0, 0.0, -0.0, 0.0, 7.25, np.float64(7.25), np.asarray(3.0), 1e-300]
    for z in zs:
        for method in ("omega_m", "rho_crit_msun_kpc3", "efunc", "hubble_kms_mpc"):
            got = getattr(planck, method)(z)
            want = getattr(planck, method)(np.array([float(z)]))[0]
            assert isinstance(got, float)
            assert np.float64(got).tobytes() == np.float64(want).tobytes(), (method, z)
        np.testing.assert_allclose(planck.omega_m(z), Planck18.Om(float(z)), rtol=1e-6)
    again = pickle.loads(pickle.dumps(planck))
    assert again.omega_m(7.25) == planck.omega_m(7.25)
    crit = Planck18.critical_density(2.0).to_value(u.Msun / u.kpc**3)
    assert planck.rho_crit_msun_kpc3(2.0) == pytest.approx(crit, rel=1e-6)
