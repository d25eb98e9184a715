"""One-zone gas reservoir of a halo: baryon inflow, star formation, supernova outflow, metals.

Each halo holds one gas zone of radius ``r_zone = f_r r_vir`` (the disc scale of Mo, Mao &
White 1998). Per snapshot step the engine

1. feeds the reservoir with baryons at ``f_b,eff(M, z) dM_h/dt``, where
   :class:`Reionization` lowers the baryon fraction of small haloes after reionization
   (the filtering-mass form of Gnedin 2000 with the exponent of Okamoto et al. 2008);
2. advances gas, stars and metals with :class:`StarFormation` (star formation on a
   dynamical time, supernova mass loading ``eta = (V_c / V_0)^-alpha``, instantaneous
   recycling with yield ``y``), solving the linear equations of the step exactly;
3. reads the zone's density, sound speed and hydrogen number density from
   :class:`GasZone` for the seeding channels and the accretion law.

All quantities use the internal units of :mod:`bhgrow.constants`: Msun, physical kpc, km/s,
Gyr; rates in Msun/Gyr, densities in Msun/kpc^3. Metallicity is the metal *mass fraction*
``Z`` (the solar value :data:`Z_SUN` is kept in one place, here).

References
----------
.. [G00] Gnedin N. Y., 2000, ApJ, 542, 535
.. [OGT08] Okamoto T., Gao L., Theuns T., 2008, MNRAS, 390, 920
.. [P18] Planck Collaboration, 2020, A&A, 641, A6 (Planck 2018 results VI)
.. [BL01] Barkana R., Loeb A., 2001, Phys. Rep., 349, 125
.. [K98] Kennicutt R. C., 1998, ApJ, 498, 541
.. [C06] Croton D. J. et al., 2006, MNRAS, 365, 11
.. [C00] Cole S., Lacey C. G., Baugh C. M., Frenk C. S., 2000, MNRAS, 319, 168
.. [MQT05] Murray N., Quataert E., Thompson T. A., 2005, ApJ, 618, 569
.. [SD15] Somerville R. S., Davé R., 2015, ARA&A, 53, 51
.. [T80] Tinsley B. M., 1980, Fund. Cosmic Phys., 5, 287
.. [SS72] Searle L., Sargent W. L. W., 1972, ApJ, 173, 25
.. [H76] Hartwick F. D. A., 1976, ApJ, 209, 418
.. [L13] Lilly S. J., Carollo C. M., Pipino A., Renzini A., Peng Y., 2013, ApJ, 772, 119
.. [DL04] De Lucia G., Kauffmann G., White S. D. M., 2004, MNRAS, 349, 1101
.. [A09] Asplund M., Grevesse N., Sauval A. J., Scott P., 2009, ARA&A, 47, 481
.. [MMW98] Mo H. J., Mao S., White S. D. M., 1998, MNRAS, 295, 319
.. [DB06] Dekel A., Birnboim Y., 2006, MNRAS, 368, 2
.. [HO10] Hochbruck M., Ostermann A., 2010, Acta Numerica, 19, 209

Values marked "(memory)" were written from memory; the tests check the formulas against
closed forms and an ODE integrator, not these numbers.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from .. import _validate
from ..constants import K_B_CGS, KMS_CMS, KPC_CM, KPC_PER_KMS_GYR, M_P_G, MSUN_G

__all__ = [
    "Z_SUN",
    "X_HYDROGEN",
    "MU_NEUTRAL",
    "MU_IONIZED",
    "Reionization",
    "StarFormation",
    "GasStep",
    "GasZone",
    "ZoneState",
    "gnedin_baryon_fraction",
    "dynamical_time_gyr",
    "sound_speed_kms",
    "hydrogen_density_cm3",
]

# =============================================================================================
# Defaults (one place; every value has its unit and source)
# =============================================================================================
#: solar metal mass fraction Z_sun [dimensionless] (Asplund et al. 2009, ARA&A 47, 481,
#: present-day photosphere, memory)
Z_SUN: float = 0.0134
#: hydrogen mass fraction of primordial gas [dimensionless] (Y_p ~ 0.245, Planck 2018;
#: memory, rounded)
X_HYDROGEN: float = 0.76
#: mean molecular weight of neutral primordial gas, 1 / (X + Y/4) ~ 1.22 [dimensionless]
#: (Barkana & Loeb 2001, memory)
MU_NEUTRAL: float = 1.0 / (X_HYDROGEN + (1.0 - X_HYDROGEN) / 4.0)
#: mean molecular weight of fully ionized primordial gas, 1 / (2X + 3Y/4) ~ 0.59
#: [dimensionless] (Barkana & Loeb 2001, memory)
MU_IONIZED: float = 1.0 / (2.0 * X_HYDROGEN + 3.0 * (1.0 - X_HYDROGEN) / 4.0)

# --- Reionization -------------------------------------------------------------------------------
#: redshift of (instantaneous) reionization [dimensionless]: z_re = 7.7 +- 0.7
#: (Planck 2018 VI, memory)
DEFAULT_Z_REION: float = 7.7
#: exponent of the suppression form [dimensionless]: alpha = 2 (Okamoto et al. 2008; Gnedin
#: 2000 had alpha = 1) (memory)
DEFAULT_REION_ALPHA: float = 2.0
#: characteristic mass at z = 0 [Msun]: 6.5e9 Msun/h (Okamoto et al. 2008, memory) with their
#: h = 0.73 (memory) -> 8.9e9 Msun
DEFAULT_M_C0_MSUN: float = 6.5e9 / 0.73
#: redshift scaling M_c = M_c0 (1 + z)^-slope [dimensionless]: 3/2 is the scaling of the mass
#: of a halo of fixed virial temperature in the matter era, M ~ T_vir^(3/2) (1 + z)^(-3/2)
#: (Barkana & Loeb 2001, eq. 26 with Delta_vir const, memory) -- a documented simple form,
#: not Okamoto et al.'s tabulated M_c(z)
DEFAULT_M_C_Z_SLOPE: float = 1.5

# --- StarFormation ------------------------------------------------------------------------------
#: star-formation efficiency per dynamical time r_zone / V_c [dimensionless]: the
#: "Schmidt law with dynamical time" Sigma_SFR = 0.017 Sigma_gas Omega_gas (Kennicutt 1998,
#: ApJ 498, 541, memory), Omega = V / r
DEFAULT_SF_EFFICIENCY: float = 0.017
#: supernova mass-loading normalisation V_0 [km/s] (Cole et al. 2000, V_hot = 200 km/s, memory)
DEFAULT_V0_KMS: float = 200.0
#: supernova mass-loading slope alpha [dimensionless] (Cole et al. 2000, alpha_hot = 2, memory);
#: 2 is the energy-driven scaling, 1 the momentum-driven one (Murray, Quataert & Thompson
#: 2005); later GALFORM versions use 3.2 (Somerville & Davé 2015 review, memory)
DEFAULT_MASS_LOADING_ALPHA: float = 2.0
#: instantaneous-recycling return fraction R [dimensionless], Chabrier IMF (memory: 0.43, e.g.
#: Somerville & Davé 2015 review)
DEFAULT_RECYCLE: float = 0.43
#: metal yield y [dimensionless]: new metals per unit mass locked into stars (Tinsley 1980
#: definition); 0.03 (De Lucia et al. 2004, memory)
DEFAULT_METAL_YIELD: float = 0.03

# --- GasZone ------------------------------------------------------------------------------------
#: zone radius in units of r_vir [dimensionless]: the exponential disc scale length
#: R_d = lambda r_vir / sqrt(2) (Mo, Mao & White 1998) for spin lambda ~ 0.057; median spins
#: 0.035-0.05 (memory) give 0.025-0.035
DEFAULT_RADIUS_FRAC: float = 0.04
#: temperature of cold (atomic-cooling) reservoir gas [K]: the H I cooling floor
DEFAULT_T_COLD_K: float = 1.0e4
#: virial temperature above which the reservoir is hot (gas at T_vir) [K]: T_vir of a 1e12 Msun
#: halo at z = 0 (5.8e5 K with HaloStructure's mu = 0.59, Planck 2018), the shock-heating mass
#: ~1e12 Msun of Dekel & Birnboim 2006 (memory)
DEFAULT_HOT_T_VIR_K: float = 6.0e5
#: adiabatic index used in the sound speed [dimensionless]: 1 = isothermal gas (the zone is
#: held at T_gas by cooling and heating)
DEFAULT_GAMMA: float = 1.0

# Taylor series of the phi-functions below x < _X_SERIES (truncation 0.05^12/12! ~ 5e-25);
# above it the closed forms lose at most ~1e-16/x^3 ~ 1e-12 to cancellation
_X_SERIES: float = 0.05
_N_SERIES: int = 12


# =============================================================================================
# Reionization
# =============================================================================================
def gnedin_baryon_fraction(m_halo_msun, m_c_msun, fb, alpha=DEFAULT_REION_ALPHA):
    """Baryon fraction of haloes of mass ``M`` suppressed below a characteristic mass ``M_c``.

    Parameters
    ----------
    m_halo_msun : array_like
        Halo mass, Msun (> 0).
    m_c_msun : array_like
        Characteristic mass at which the baryon fraction is halved, Msun (>= 0; 0 means no
        suppression).
    fb : float or array_like
        Cosmic baryon fraction ``Omega_b / Omega_m``.
    alpha : float, optional
        Sharpness of the transition (2 in Okamoto et al. 2008, 1 in Gnedin 2000).

    Returns
    -------
    numpy.ndarray
        ``f_b,eff = f_b / [1 + (2^(alpha/3) - 1) (M_c / M)^alpha]^(3/alpha)``: ``f_b / 2`` at
        ``M = M_c``, ``-> f_b`` for ``M >> M_c`` and ``~ (M / M_c)^3`` for ``M << M_c``.
    """
    m = np.asarray(m_halo_msun, dtype=np.float64)
    mc = np.asarray(m_c_msun, dtype=np.float64)
    # f_b,eff = f_b [1 + (2^(a/3) - 1)(M_c/M)^a]^(-3/a)  (Gnedin 2000, ApJ 542, 535; Okamoto et al.
    # 2008, MNRAS 390, 920, eq. 1)
    base = np.log1p((2.0 ** (alpha / 3.0) - 1.0) * (mc / m) ** alpha)
    return fb * np.exp(-3.0 / alpha * base)


@dataclass(frozen=True)
class Reionization:
    """Suppression of baryon accretion onto small haloes after reionization.

    After ``z_reion`` a halo of mass ``M`` collects only the baryon fraction of
    :func:`gnedin_baryon_fraction` with the characteristic mass
    ``M_c(z) = m_c0_msun (1 + z)^-m_c_z_slope``; before it, the cosmic ``f_b``.

    Parameters
    ----------
    z_reion : float, optional
        Redshift of instantaneous reionization (default 7.7, Planck 2018, memory).
    alpha : float, optional
        Exponent of the suppression form (default 2, Okamoto et al. 2008).
    m_c0_msun : float, optional
        ``M_c`` at ``z = 0``, Msun (default 6.5e9 Msun/h with h = 0.73, Okamoto et al. 2008,
        memory).
    m_c_z_slope : float, optional
        ``M_c`` scales as ``(1 + z)^-m_c_z_slope`` (default 3/2: fixed virial temperature in
        the matter era, Barkana & Loeb 2001).

    Notes
    -----
    The simple ``M_c(z)`` stands in for the simulated characteristic mass of Okamoto et al.
    (2008); it gives ``M_c(z_reion = 7.7) ~ 3.5e8 Msun``, of order the mass of a
    ``T_vir ~ 2e4 K`` halo then (Planck 2018, :class:`~bhgrow.physics.halo.HaloStructure`).
    """

    z_reion: float = DEFAULT_Z_REION
    alpha: float = DEFAULT_REION_ALPHA
    m_c0_msun: float = DEFAULT_M_C0_MSUN
    m_c_z_slope: float = DEFAULT_M_C_Z_SLOPE

    def __post_init__(self) -> None:
        owner = type(self).__name__
        object.__setattr__(self, "z_reion", _validate.non_negative(owner, "z_reion",
                                                                   self.z_reion))
        object.__setattr__(self, "alpha", _validate.positive(owner, "alpha", self.alpha))
        object.__setattr__(self, "m_c0_msun", _validate.positive(owner, "m_c0_msun",
                                                                 self.m_c0_msun))
        object.__setattr__(self, "m_c_z_slope", _validate.non_negative(owner, "m_c_z_slope",
                                                                       self.m_c_z_slope))

    def characteristic_mass_msun(self, z) -> np.ndarray:
        """``M_c(z)`` in Msun; 0 before reionization (``z > z_reion``)."""
        z = np.asarray(z, dtype=np.float64)
        # M_c(z) = M_c0 (1 + z)^(-3/2): fixed-T_vir halo mass, matter era (Barkana & Loeb 2001)
        mc = self.m_c0_msun * (1.0 + z) ** (-self.m_c_z_slope)
        return np.where(z > self.z_reion, 0.0, mc)

    def baryon_fraction(self, m_halo, z, fb) -> np.ndarray:
        """Effective baryon fraction of haloes.

        Parameters
        ----------
        m_halo : array_like
            Halo mass, Msun (> 0).
        z : array_like
            Redshift; broadcast against ``m_halo``.
        fb : float
            Cosmic baryon fraction ``Omega_b / Omega_m`` (e.g. ``Cosmology.fb``).

        Returns
        -------
        numpy.ndarray
            ``f_b,eff`` (float64, shape ``broadcast(m_halo, z)``); equal to ``fb`` for
            ``z > z_reion``.
        """
        m = np.asarray(m_halo, dtype=np.float64)
        mc = self.characteristic_mass_msun(z)
        return gnedin_baryon_fraction(m, mc, float(fb), self.alpha)


# =============================================================================================
# Star formation, outflow and metals
# =============================================================================================
def dynamical_time_gyr(r_zone_kpc, v_c_kms) -> np.ndarray:
    """Dynamical time ``t_dyn = r_zone / V_c`` in Gyr (Croton et al. 2006, MNRAS 365, 11).

    Parameters
    ----------
    r_zone_kpc : array_like
        Zone radius, physical kpc.
    v_c_kms : array_like
        Circular velocity, km/s (the engine passes the halo's ``V_c`` at ``r_vir``).

    Returns
    -------
    numpy.ndarray
        ``t_dyn`` in Gyr (1 kpc / (1 km/s) = 0.978 Gyr).
    """
    r = np.asarray(r_zone_kpc, dtype=np.float64)
    v = np.asarray(v_c_kms, dtype=np.float64)
    # t_dyn = R / V  (Croton et al. 2006, MNRAS 365, 11: t_dyn = R_disc / V_vir)
    return r / v * KPC_PER_KMS_GYR


def _series(x: np.ndarray, coeffs: np.ndarray) -> np.ndarray:
    """Horner evaluation of ``sum_k coeffs[k] x^k``."""
    out = np.full_like(x, coeffs[-1])
    for c in coeffs[-2::-1]:
        out = out * x + c
    return out


def _coeffs(numer, shift: int) -> np.ndarray:
    """``(-1)^k numer(k) / (k + shift)!`` for k = 0 .. _N_SERIES - 1."""
    return np.array([(-1) ** k * numer(k) / math.factorial(k + shift) for k in range(_N_SERIES)])


_C_PHI1 = _coeffs(lambda k: 1.0, 1)        # (1 - e^-x) / x
_C_PHI2 = _coeffs(lambda k: 1.0, 2)        # (x - 1 + e^-x) / x^2
_C_PSI = _coeffs(lambda k: k + 1.0, 2)     # (1 - (1 + x) e^-x) / x^2
_C_CHI = _coeffs(lambda k: k + 1.0, 3)     # (x - 2 + (2 + x) e^-x) / x^3


def _decay_integrals(x: np.ndarray, with_chi: bool = True):
    """Integrals of ``e^-x``-type kernels, stable for ``x -> 0`` (exponential-integrator
    phi-functions, Hochbruck & Ostermann 2010, Acta Numerica 19, 209).

    Returns ``e^-x``, ``phi1 = (1 - e^-x)/x``, ``phi2 = (x - 1 + e^-x)/x^2``,
    ``psi = (1 - (1+x) e^-x)/x^2`` and ``chi = (x - 2 + (2+x) e^-x)/x^3``; their limits at
    ``x = 0`` are 1, 1, 1/2, 1/2, 1/6. Below ``x = 0.05`` a 12-term Taylor series is used.
    ``chi`` is None unless ``with_chi``.
    """
    shape = np.shape(x)
    x = np.atleast_1d(np.asarray(x, dtype=np.float64))
    e = np.exp(-x)
    small = x < _X_SERIES
    with np.errstate(divide="ignore", invalid="ignore"):
        em1 = 1.0 - e                # cancellation <~1e-14 above the series range
        phi1 = em1 / x
        phi2 = (x - em1) / (x * x)
        psi = (em1 - x * e) / (x * x)
        chi = (x - 2.0 + (2.0 + x) * e) / (x * x * x) if with_chi else None
    if np.any(small):
        xs = x[small]
        phi1[small] = _series(xs, _C_PHI1)
        phi2[small] = _series(xs, _C_PHI2)
        psi[small] = _series(xs, _C_PSI)
        if with_chi:
            chi[small] = _series(xs, _C_CHI)
    return tuple(None if f is None else f.reshape(shape) for f in (e, phi1, phi2, psi, chi))


class GasStep(NamedTuple):
    """Reservoir state after one step of :meth:`StarFormation.step` (float64 arrays, Msun).

    Attributes
    ----------
    gas : numpy.ndarray
        Gas mass at the end of the step.
    stars : numpy.ndarray
        Stellar mass at the end (long-lived stars and remnants: formed mass times ``1 - R``).
    metals : numpy.ndarray
        Metal mass in the gas at the end.
    outflow_msun : numpy.ndarray
        Gas mass ejected by supernova-driven winds during the step.
    stars_formed_msun : numpy.ndarray
        Mass locked into stars during the step, ``(1 - R) int SFR dt``.
    metals_outflow_msun : numpy.ndarray
        Metal mass carried by the outflow during the step (at the gas metallicity).
    metals_locked_msun : numpy.ndarray
        Metal mass locked into stars during the step.
    """

    gas: np.ndarray
    stars: np.ndarray
    metals: np.ndarray
    outflow_msun: np.ndarray
    stars_formed_msun: np.ndarray
    metals_outflow_msun: np.ndarray
    metals_locked_msun: np.ndarray


@dataclass(frozen=True)
class StarFormation:
    """Star formation on a dynamical time, supernova outflow and instantaneous-recycling metals.

    With the star-formation rate ``SFR = eps M_g / t_dyn`` and the mass loading
    ``eta = (V_c / V_0)^-alpha``, the reservoir obeys, for a constant inflow ``I`` of
    pristine gas over the step,

    ``dM_g/dt = I - a M_g``, ``a = (1 - R + eta) eps / t_dyn``
    ``dM_Z/dt = y (1 - R) eps M_g / t_dyn - a M_Z``
    ``dM_*/dt = (1 - R) eps M_g / t_dyn``, outflow rate ``eta eps M_g / t_dyn``

    (instantaneous recycling, Tinsley 1980; mass loading, Cole et al. 2000), and
    :meth:`step` returns the exact solution of this linear system over ``dt``.

    Parameters
    ----------
    efficiency : float, optional
        ``eps``: fraction of the gas turned into stars per dynamical time, in (0, 1]
        (default 0.017, Kennicutt 1998).
    v0_kms : float, optional
        ``V_0`` of the mass loading, km/s (default 200, Cole et al. 2000).
    alpha : float, optional
        Slope of the mass loading, >= 0 (default 2, Cole et al. 2000; 0 gives ``eta = 1``).
    recycle : float, optional
        Return fraction ``R`` of instantaneous recycling, in [0, 1) (default 0.43, Chabrier
        IMF).
    metal_yield : float, optional
        Yield ``y`` (new metals per unit mass locked in stars), in [0, 1) (default 0.03).

    Notes
    -----
    The closed forms are written with the phi-functions of exponential integrators
    (Hochbruck & Ostermann 2010), so ``a dt -> 0`` (no star formation, or a short step) is
    exact and stable. With non-negative inputs every output is non-negative, and
    ``gas + stars + outflow = gas0 + stars0 + I dt`` and
    ``metals + metals_locked + metals_outflow = metals0 + y stars_formed`` hold to
    round-off. In equilibrium the gas metallicity is ``y (1 - R) / (1 - R + eta)``
    (Lilly et al. 2013 with pristine inflow).
    """

    efficiency: float = DEFAULT_SF_EFFICIENCY
    v0_kms: float = DEFAULT_V0_KMS
    alpha: float = DEFAULT_MASS_LOADING_ALPHA
    recycle: float = DEFAULT_RECYCLE
    metal_yield: float = DEFAULT_METAL_YIELD

    def __post_init__(self) -> None:
        owner = type(self).__name__
        checks = {
            "efficiency": _validate.in_range(owner, "efficiency", self.efficiency, 0.0, 1.0,
                                             lo_open=True),
            "v0_kms": _validate.positive(owner, "v0_kms", self.v0_kms),
            "alpha": _validate.non_negative(owner, "alpha", self.alpha),
            "recycle": _validate.in_range(owner, "recycle", self.recycle, 0.0, 1.0,
                                          hi_open=True),
            "metal_yield": _validate.in_range(owner, "metal_yield", self.metal_yield, 0.0,
                                              1.0, hi_open=True),
        }
        for name, value in checks.items():
            object.__setattr__(self, name, value)

    def mass_loading(self, v_c_kms) -> np.ndarray:
        """Supernova mass loading ``eta = (V_c / V_0)^-alpha`` (Cole et al. 2000, MNRAS 319, 168).

        Parameters
        ----------
        v_c_kms : array_like
            Circular velocity, km/s (> 0).

        Returns
        -------
        numpy.ndarray
            Outflow rate per unit star-formation rate, dimensionless.
        """
        v = np.asarray(v_c_kms, dtype=np.float64)
        # eta = (V_c / V_hot)^(-alpha_hot)  (Cole et al. 2000, MNRAS 319, 168)
        return (v / self.v0_kms) ** (-self.alpha)

    def loss_rate(self, t_dyn, v_c) -> np.ndarray:
        """Rate at which star formation and winds remove reservoir gas, ``a`` [1/Gyr].

        ``a = (1 - R + eta) eps_* / t_dyn``: the e-folding rate of the reservoir without
        inflow (the coefficient of the linear system solved by :meth:`step`). The engine
        uses it to choose substeps when a black hole competes with star formation for gas.
        """
        eta = self.mass_loading(v_c)
        return (1.0 - self.recycle + eta) * self.efficiency / np.asarray(t_dyn, dtype=np.float64)

    def rates(self, t_dyn, v_c):
        """Per-unit-gas rates of the reservoir equations, 1/Gyr (float64 arrays).

        Returns
        -------
        (numpy.ndarray, numpy.ndarray, numpy.ndarray)
            ``a = (1 - R + eta) eps_* / t_dyn`` (total loss to stars and winds),
            ``(1 - R) eps_* / t_dyn`` (locked into long-lived stars) and
            ``y (1 - R) eps_* / t_dyn`` (new metals), as in :meth:`step`.
        """
        s = self.efficiency / np.asarray(t_dyn, dtype=np.float64)
        eta = self.mass_loading(v_c)
        lock = (1.0 - self.recycle) * s
        # a = (1 - R + eta) eps / t_dyn (Tinsley 1980; Cole et al. 2000)
        return lock + eta * s, lock, self.metal_yield * lock

    def step(self, gas, stars, metals, inflow_rate, t_dyn, v_c, dt) -> GasStep:
        """Advance gas, stars and metals over ``dt`` with constant inflow, exactly.

        Parameters
        ----------
        gas, stars, metals : array_like
            Gas mass, stellar mass and metal mass in the gas at the start, Msun (>= 0).
        inflow_rate : array_like
            Inflow rate of pristine gas ``I``, Msun/Gyr (>= 0), constant over the step.
        t_dyn : array_like
            Dynamical time, Gyr (> 0; ``inf`` switches star formation off), e.g.
            :func:`dynamical_time_gyr`.
        v_c : array_like
            Circular velocity for the mass loading, km/s (> 0).
        dt : array_like
            Step length, Gyr (>= 0).

        Returns
        -------
        GasStep
            Float64 arrays of the broadcast shape of the inputs.

        Raises
        ------
        ValueError
            If ``t_dyn`` or ``v_c`` is not > 0, or a mass, the inflow or ``dt`` is negative
            (NaN included): a caller error, not user input.
        """
        mg0, ms0, mz0, inflow, tdyn, vc, dt = np.broadcast_arrays(
            *(np.asarray(v, dtype=np.float64)
              for v in (gas, stars, metals, inflow_rate, t_dyn, v_c, dt)))
        for name, arr in (("gas", mg0), ("stars", ms0), ("metals", mz0),
                          ("inflow_rate", inflow), ("dt", dt)):
            if not np.all(arr >= 0.0):
                raise ValueError(f"StarFormation.step: `{name}` must be >= 0 everywhere")
        for name, arr in (("t_dyn", tdyn), ("v_c", vc)):
            if not np.all(arr > 0.0):
                raise ValueError(f"StarFormation.step: `{name}` must be > 0 everywhere")

        return self._evolve(mg0, ms0, mz0, inflow, tdyn, vc, dt)

    def _evolve(self, mg0, ms0, mz0, inflow, tdyn, vc, dt, *,
                metal_flows: bool = True) -> GasStep:
        """:meth:`step` on float64 arrays of one shape, without the argument checks (the
        engine's inner loop; its inputs are checked where they are made). Without
        ``metal_flows`` the two metal-flow fields are None."""
        eta = self.mass_loading(vc)
        r = self.recycle
        s = self.efficiency / tdyn                    # star-formation rate per unit gas, 1/Gyr
        # a = (1 - R + eta) eps / t_dyn: gas depletion rate (instantaneous recycling, Tinsley 1980)
        a = (1.0 - r + eta) * s
        x = a * dt
        e, phi1, phi2, psi, chi = _decay_integrals(x, with_chi=metal_flows)
        p = self.metal_yield * (1.0 - r) * s          # metal production per unit gas, 1/Gyr

        # M_g(t) = M_g0 e^-at + I (1 - e^-at) / a  (linear ODE dM_g/dt = I - a M_g)
        mg = mg0 * e + inflow * dt * phi1
        # int_0^dt M_g dt'
        mg_int = mg0 * dt * phi1 + inflow * dt * dt * phi2
        # M_Z(t) = M_Z0 e^-at + p int_0^t e^-a(t-u) M_g(u) du  (variation of constants)
        mz = mz0 * e + p * (mg0 * dt * e + inflow * dt * dt * psi)
        # int_0^dt M_Z dt'
        mz_int = (mz0 * dt * phi1 + p * (mg0 * dt * dt * psi + inflow * dt ** 3 * chi)
                  if metal_flows else None)

        # dM_*/dt = (1 - R) SFR; outflow = eta SFR  (Cole et al. 2000; Tinsley 1980)
        formed = (1.0 - r) * s * mg_int
        outflow = eta * s * mg_int
        return GasStep(
            gas=mg,
            stars=ms0 + formed,
            metals=mz,
            outflow_msun=outflow,
            stars_formed_msun=formed,
            metals_outflow_msun=eta * s * mz_int if metal_flows else None,
            metals_locked_msun=(1.0 - r) * s * mz_int if metal_flows else None,
        )


# =============================================================================================
# Zone density and sound speed
# =============================================================================================
def sound_speed_kms(t_k, mu, gamma=DEFAULT_GAMMA) -> np.ndarray:
    """Sound speed ``c_s = sqrt(gamma k_B T / (mu m_p))`` in km/s.

    Parameters
    ----------
    t_k : array_like
        Gas temperature, K.
    mu : array_like
        Mean molecular weight.
    gamma : float, optional
        Adiabatic index (1 = isothermal sound speed).

    Returns
    -------
    numpy.ndarray
        ``c_s`` in km/s (isothermal, 1e4 K, mu = 1.22: ~8.2 km/s).
    """
    t = np.asarray(t_k, dtype=np.float64)
    # c_s^2 = gamma k_B T / (mu m_p)  (ideal gas; e.g. Barkana & Loeb 2001)
    return np.sqrt(gamma * K_B_CGS * t / (np.asarray(mu, dtype=np.float64) * M_P_G)) / KMS_CMS


#: 1 Msun/kpc^3 in g/cm^3 (~6.77e-32)
_MSUN_KPC3_G_CM3: float = MSUN_G / KPC_CM**3


def hydrogen_density_cm3(rho_msun_kpc3, x_h=X_HYDROGEN) -> np.ndarray:
    """Hydrogen number density ``n_H = X rho / m_p`` in cm^-3 from a gas density in Msun/kpc^3."""
    rho = np.asarray(rho_msun_kpc3, dtype=np.float64)
    # n_H = X rho / m_p  (hydrogen nuclei per volume)
    return x_h * rho * _MSUN_KPC3_G_CM3 / M_P_G


class ZoneState(NamedTuple):
    """Density, sound speed and hydrogen density of the gas zones (float64 arrays)."""

    rho_msun_kpc3: np.ndarray
    cs_kms: np.ndarray
    n_h_cm3: np.ndarray


@dataclass(frozen=True)
class GasZone:
    """Size, density and temperature of a halo's one-zone gas reservoir.

    ``r_zone = radius_frac r_vir`` (disc scale of Mo, Mao & White 1998) and the gas fills the
    zone uniformly: ``rho = M_gas / (4/3 pi r_zone^3)``. The gas temperature is

    * ``T_vir`` in hot haloes, ``T_vir >= hot_t_vir_k`` (quasi-static hot atmosphere above the
      shock-heating scale, Dekel & Birnboim 2006), with ``mu = mu_hot`` (ionized);
    * ``t_cold_k`` (1e4 K) otherwise, with ``mu = mu_cold`` (neutral), except that with
      ``minihalo_gas_at_t_vir`` the gas of haloes with ``T_vir < t_cold_k`` (H2-cooling
      minihaloes, which cannot heat gas to 1e4 K) sits at ``T_vir``.

    Parameters
    ----------
    radius_frac : float, optional
        ``r_zone / r_vir``, in (0, 1] (default 0.04).
    t_cold_k : float, optional
        Temperature of cold reservoir gas, K (default 1e4).
    hot_t_vir_k : float, optional
        Virial temperature from which the reservoir is hot, K (default 6e5).
    mu_cold : float, optional
        Mean molecular weight of cold gas, in (0, 2] (default :data:`MU_NEUTRAL` ~ 1.22,
        neutral primordial).
    mu_hot : float, optional
        Mean molecular weight of hot gas, in (0, 2] (default :data:`MU_IONIZED` ~ 0.59,
        ionized primordial).
    gamma : float, optional
        Adiabatic index in the sound speed, in [1, 5/3] (default 1: isothermal).
    minihalo_gas_at_t_vir : bool, optional
        Cap the cold-gas temperature at ``T_vir`` (default True).
    """

    radius_frac: float = DEFAULT_RADIUS_FRAC
    t_cold_k: float = DEFAULT_T_COLD_K
    hot_t_vir_k: float = DEFAULT_HOT_T_VIR_K
    mu_cold: float = MU_NEUTRAL
    mu_hot: float = MU_IONIZED
    gamma: float = DEFAULT_GAMMA
    minihalo_gas_at_t_vir: bool = True

    def __post_init__(self) -> None:
        owner = type(self).__name__
        checks = {
            "radius_frac": _validate.in_range(owner, "radius_frac", self.radius_frac, 0.0, 1.0,
                                              lo_open=True),
            "t_cold_k": _validate.positive(owner, "t_cold_k", self.t_cold_k),
            "hot_t_vir_k": _validate.positive(owner, "hot_t_vir_k", self.hot_t_vir_k),
            "mu_cold": _validate.in_range(owner, "mu_cold", self.mu_cold, 0.0, 2.0,
                                          lo_open=True),
            "mu_hot": _validate.in_range(owner, "mu_hot", self.mu_hot, 0.0, 2.0, lo_open=True),
            "gamma": _validate.in_range(owner, "gamma", self.gamma, 1.0, 5.0 / 3.0),
        }
        for name, value in checks.items():
            object.__setattr__(self, name, value)
        if self.hot_t_vir_k < self.t_cold_k:
            _validate._fail(owner, "hot_t_vir_k", f">= t_cold_k ({self.t_cold_k:g})",
                            self.hot_t_vir_k)
        if not isinstance(self.minihalo_gas_at_t_vir, bool):
            _validate._fail(owner, "minihalo_gas_at_t_vir", "True or False",
                            self.minihalo_gas_at_t_vir)

    def radius_kpc(self, r_vir_kpc) -> np.ndarray:
        """Zone radius ``r_zone = f_r r_vir``, kpc (Mo, Mao & White 1998 disc scale)."""
        # r_zone = f_r r_vir, f_r ~ lambda / sqrt(2)  (Mo, Mao & White 1998, MNRAS 295, 319)
        return self.radius_frac * np.asarray(r_vir_kpc, dtype=np.float64)

    def temperature_k(self, t_vir_k):
        """Gas temperature (K) and mean molecular weight of the zones.

        Returns
        -------
        (numpy.ndarray, numpy.ndarray)
            ``T_gas`` in K and ``mu``, float64, shape of ``t_vir_k``.
        """
        tv = np.asarray(t_vir_k, dtype=np.float64)
        hot = tv >= self.hot_t_vir_k
        t_cold = np.minimum(self.t_cold_k, tv) if self.minihalo_gas_at_t_vir else self.t_cold_k
        # hot haloes: gas at T_vir above the shock-heating scale (Dekel & Birnboim 2006, MNRAS 368)
        t_gas = np.where(hot, tv, t_cold)
        mu = np.where(hot, self.mu_hot, self.mu_cold)
        return t_gas, mu

    def state(self, gas, r_vir_kpc, t_vir_k) -> ZoneState:
        """Density, sound speed and hydrogen number density of the zones.

        Parameters
        ----------
        gas : array_like
            Gas mass of the reservoir, Msun (>= 0).
        r_vir_kpc : array_like
            Virial radius, physical kpc.
        t_vir_k : array_like
            Virial temperature, K.

        Returns
        -------
        ZoneState
            ``(rho_msun_kpc3, cs_kms, n_h_cm3)``: mean gas density in Msun/kpc^3, sound speed
            in km/s, hydrogen number density in cm^-3 (float64 arrays, broadcast shape).
        """
        rho = self._density(gas, r_vir_kpc)
        t_gas, mu = self.temperature_k(t_vir_k)
        cs = sound_speed_kms(t_gas, mu, self.gamma)
        rho, cs = np.broadcast_arrays(rho, cs)
        return ZoneState(rho_msun_kpc3=np.array(rho), cs_kms=np.array(cs),
                         n_h_cm3=hydrogen_density_cm3(rho))

    def _density(self, gas, r_vir_kpc):
        m = np.asarray(gas, dtype=np.float64)
        r = self.radius_kpc(r_vir_kpc)
        # rho = M_gas / (4/3 pi r_zone^3)  (uniform zone)
        return m / (4.0 / 3.0 * math.pi * r**3)

    def hydrogen_density(self, gas, r_vir_kpc) -> np.ndarray:
        """Hydrogen number density of the zones, cm^-3: the ``n_h_cm3`` of :meth:`state`
        alone (no temperature needed). Arguments as for :meth:`state`."""
        return hydrogen_density_cm3(self._density(gas, r_vir_kpc))
