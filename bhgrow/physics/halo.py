"""Structural properties of dark-matter haloes.

For a halo of virial mass ``M`` (physical Msun) at redshift ``z`` this module gives the virial
overdensity, radius, circular velocity and temperature, an NFW concentration from a published
concentration-mass-redshift relation, the maximum circular velocity and the central escape
speed of the NFW halo. Everything is vectorized over haloes and uses the internal units of
:mod:`bhgrow.constants` (Msun, physical kpc, km/s, K).

The halo mass definition is the virial one: the mean density inside ``r_vir`` is
``Delta_vir(z)`` times the critical density, with ``Delta_vir`` from Bryan & Norman (1998).

The cosmology argument ``cosmo`` is a :class:`bhgrow.cosmology.Cosmology`; only these members
are used, all vectorized over ``z``: ``omega_m(z)`` (matter density parameter at ``z``),
``rho_crit_msun_kpc3(z)`` (physical critical density, Msun/kpc^3) and ``h``.

References
----------
.. [BN98] Bryan G. L., Norman M. L., 1998, ApJ, 495, 80
.. [NFW97] Navarro J. F., Frenk C. S., White S. D. M., 1997, ApJ, 490, 493
.. [LM01] Łokas E. L., Mamon G. A., 2001, MNRAS, 321, 155
.. [BL01] Barkana R., Loeb A., 2001, Phys. Rep., 349, 125
.. [D08] Duffy A. R., Schaye J., Kay S. T., Dalla Vecchia C., 2008, MNRAS, 390, L64
.. [DM14] Dutton A. A., Macciò A. V., 2014, MNRAS, 441, 3359

Equation and table numbers quoted in comments are from memory; the fit coefficients are
checked against colossus (Diemer 2018, ApJS 239, 35) in the tests.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from .. import _validate
from ..constants import G_KPC_KMS2_MSUN, K_B_CGS, KMS_CMS, M_P_G

__all__ = [
    "DEFAULT_MU",
    "DEFAULT_CONCENTRATION",
    "CONCENTRATION_RELATIONS",
    "HaloProps",
    "HaloStructure",
    "delta_vir_bryan_norman",
    "virial_radius_kpc",
    "circular_velocity_kms",
    "virial_temperature_k",
    "concentration_duffy08",
    "concentration_dutton_maccio14",
    "nfw_mass_shape",
    "nfw_escape_speed_central_kms",
    "nfw_vmax_kms",
    "NFW_X_VMAX",
]

# --- defaults ---------------------------------------------------------------------------------
#: mean molecular weight [dimensionless]: fully ionized primordial gas with hydrogen mass
#: fraction X = 0.76 has 1 / (2X + 3(1 - X)/4) = 0.588 (memory: Barkana & Loeb 2001 use 0.59)
DEFAULT_MU: float = 0.59
#: concentration-mass-redshift relation [name]: Duffy et al. 2008, MNRAS 390, L64, virial
DEFAULT_CONCENTRATION: str = "duffy08"
#: upper bound of the allowed ``mu`` [dimensionless]; neutral primordial gas has 1.22 (memory)
MU_MAX: float = 2.0

# --- published fit coefficients -----------------------------------------------------------
#: Duffy et al. (2008, MNRAS 390, L64) Table 1, NFW, full sample, z = 0-2, Delta_vir:
#: c = A (M / M_pivot)^B (1 + z)^C with M in Msun/h (memory; the tests compare with colossus)
DUFFY08_VIR_A: float = 7.85
DUFFY08_VIR_B: float = -0.081
DUFFY08_VIR_C: float = -0.71
DUFFY08_PIVOT_MSUN_H: float = 2.0e12  # Msun/h
#: Dutton & Macciò (2014, MNRAS 441, 3359) NFW fit for Delta_vir (Planck cosmology):
#: log10 c = a + b log10(M / 1e12 Msun/h), a = A_LO + (A_HI - A_LO) exp(-A_RATE z^A_POW),
#: b = B_0 + B_Z z (memory; the tests compare with colossus)
DM14_VIR_A_LO: float = 0.537
DM14_VIR_A_HI: float = 1.025
DM14_VIR_A_RATE: float = 0.718
DM14_VIR_A_POW: float = 1.08
DM14_VIR_B_0: float = -0.097
DM14_VIR_B_Z: float = 0.024
DM14_PIVOT_MSUN_H: float = 1.0e12  # Msun/h
#: highest redshift of the Dutton & Macciò (2014) calibration [z = 0-5]; beyond it the fit's
#: slope turns steeply positive, so the relation is evaluated at min(z, DM14_Z_MAX)
DM14_Z_MAX: float = 5.0

_EIGHTEEN_PI2 = 18.0 * math.pi**2


# --- NFW helpers ----------------------------------------------------------------------------
def nfw_mass_shape(x):
    """Dimensionless enclosed mass of an NFW profile, ``m(x) = ln(1 + x) - x / (1 + x)``.

    ``M(<r) = 4 pi rho_s r_s^3 m(r / r_s)`` ([NFW97]_).

    Parameters
    ----------
    x : array_like
        Radius in units of the scale radius ``r_s`` (> 0).

    Returns
    -------
    numpy.ndarray
        ``m(x)``, float64, same shape as ``x``.
    """
    x = np.asarray(x, dtype=np.float64)
    # enclosed-mass function of the NFW profile (Navarro, Frenk & White 1997, ApJ 490, 493)
    return np.log1p(x) - x / (1.0 + x)


def _nfw_x_vmax() -> float:
    """Radius of the NFW circular-velocity peak in units of ``r_s`` (bisection)."""
    # dV_c^2/dr = 0  <=>  ln(1+x) = x (1 + 2x) / (1 + x)^2  (Navarro, Frenk & White 1997)
    def g(x: float) -> float:
        return math.log1p(x) - x * (1.0 + 2.0 * x) / (1.0 + x) ** 2

    lo, hi = 1.0, 4.0  # g(1) < 0 < g(4)
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if g(mid) < 0.0:
            lo = mid
        else:
            hi = mid
        if hi - lo < 1e-15:
            break
    return 0.5 * (lo + hi)


#: radius of the NFW circular-velocity maximum in units of r_s (~2.163, Navarro, Frenk &
#: White 1997), solved once at import
NFW_X_VMAX: float = _nfw_x_vmax()
_NFW_VMAX2_FACTOR: float = float(nfw_mass_shape(NFW_X_VMAX)) / NFW_X_VMAX  # ~0.2162


# --- plain formulas -------------------------------------------------------------------------
def delta_vir_bryan_norman(omega_m_z):
    """Virial overdensity relative to the critical density, Bryan & Norman (1998).

    Parameters
    ----------
    omega_m_z : array_like
        Matter density parameter at the halo's redshift, ``Omega_m(z)``.

    Returns
    -------
    numpy.ndarray
        ``Delta_vir`` (w.r.t. the critical density at ``z``), float64. Equals
        ``18 pi^2 ~ 178`` for ``Omega_m(z) = 1`` and ``~101`` for ``Omega_m(z) = 0.3``.

    Notes
    -----
    The fit is the one for flat cosmologies with a cosmological constant; [BN98]_ quote 1 %
    accuracy for ``0.1 <= Omega_m(z) <= 1``.
    """
    x = np.asarray(omega_m_z, dtype=np.float64) - 1.0
    # Delta_c = 18pi^2 + 82x - 39x^2, x = Omega_m(z) - 1 (Bryan & Norman 1998, ApJ 495, 80, eq. 6)
    return _EIGHTEEN_PI2 + 82.0 * x - 39.0 * x * x


def virial_radius_kpc(m_msun, z, cosmo, delta=None):
    """Virial radius of a halo, physical kpc.

    Parameters
    ----------
    m_msun : array_like
        Halo mass within ``r_vir``, physical Msun.
    z : array_like
        Redshift; broadcast against ``m_msun``.
    cosmo : bhgrow.cosmology object
        Provides ``omega_m(z)`` and ``rho_crit_msun_kpc3(z)``.
    delta : array_like, optional
        Overdensity with respect to the critical density at ``z``. Default: Bryan & Norman
        (1998) ``Delta_vir(z)`` from :func:`delta_vir_bryan_norman`.

    Returns
    -------
    numpy.ndarray
        ``r_vir`` in physical kpc, float64, shape ``broadcast(m_msun, z)``.
    """
    m = np.asarray(m_msun, dtype=np.float64)
    z = np.asarray(z, dtype=np.float64)
    if delta is None:
        delta = delta_vir_bryan_norman(cosmo.omega_m(z))
    rho = np.asarray(delta, dtype=np.float64) * np.asarray(cosmo.rho_crit_msun_kpc3(z),
                                                           dtype=np.float64)
    # M = (4 pi / 3) Delta rho_crit(z) r^3  (spherical-overdensity definition, Bryan & Norman 1998)
    return np.cbrt(3.0 * m / (4.0 * math.pi * rho))


def circular_velocity_kms(m_msun, r_kpc):
    """Circular velocity ``V_c = sqrt(G M / r)``, km/s.

    Parameters
    ----------
    m_msun : array_like
        Mass enclosed within ``r_kpc``, Msun.
    r_kpc : array_like
        Radius, physical kpc.

    Returns
    -------
    numpy.ndarray
        ``V_c`` in km/s, float64, shape ``broadcast(m_msun, r_kpc)``.
    """
    m = np.asarray(m_msun, dtype=np.float64)
    r = np.asarray(r_kpc, dtype=np.float64)
    # V_c = (G M / r)^(1/2)  (Barkana & Loeb 2001, Phys. Rep. 349, 125, eq. 25, memory)
    return np.sqrt(G_KPC_KMS2_MSUN * m / r)


def virial_temperature_k(v_c_kms, mu=DEFAULT_MU):
    """Virial temperature ``T_vir = mu m_p V_c^2 / (2 k_B)``, K.

    Parameters
    ----------
    v_c_kms : array_like
        Circular velocity at ``r_vir``, km/s.
    mu : float, optional
        Mean molecular weight (default :data:`DEFAULT_MU`; 0.59 for ionized, 1.22 for neutral
        primordial gas).

    Returns
    -------
    numpy.ndarray
        ``T_vir`` in K, float64, same shape as ``v_c_kms``.
    """
    v_cms = np.asarray(v_c_kms, dtype=np.float64) * KMS_CMS
    # T_vir = mu m_p V_c^2 / (2 k_B)  (Barkana & Loeb 2001, Phys. Rep. 349, 125, eq. 26, memory)
    return mu * M_P_G * v_cms * v_cms / (2.0 * K_B_CGS)


def concentration_duffy08(m_msun, z, h):
    """NFW concentration for the virial mass definition, Duffy et al. (2008).

    Parameters
    ----------
    m_msun : array_like
        Virial mass, physical Msun (converted internally to Msun/h).
    z : array_like
        Redshift; broadcast against ``m_msun``.
    h : float
        Dimensionless Hubble parameter, ``H0 / (100 km/s/Mpc)``.

    Returns
    -------
    numpy.ndarray
        ``c_vir = r_vir / r_s``, float64, shape ``broadcast(m_msun, z)``.

    Notes
    -----
    [D08]_ Table 1, NFW fit to the full (relaxed + unrelaxed) sample for ``Delta_vir``:
    ``c = 7.85 (M / 2e12 Msun/h)^-0.081 (1 + z)^-0.71``. Calibrated on a WMAP5 cosmology for
    ``1e11 - 1e15 Msun/h`` and ``z <= 2``; outside that range it is a power-law extrapolation
    (for minihaloes at z ~ 20 it gives c ~ 3).
    """
    m_h = np.asarray(m_msun, dtype=np.float64) * h
    zp1 = 1.0 + np.asarray(z, dtype=np.float64)
    # c_vir = A (M / 2e12 h^-1 Msun)^B (1+z)^C  (Duffy et al. 2008, MNRAS 390, L64, Table 1)
    return (DUFFY08_VIR_A * (m_h / DUFFY08_PIVOT_MSUN_H) ** DUFFY08_VIR_B
            * zp1 ** DUFFY08_VIR_C)


def concentration_dutton_maccio14(m_msun, z, h):
    """NFW concentration for the virial mass definition, Dutton & Macciò (2014).

    Parameters
    ----------
    m_msun : array_like
        Virial mass, physical Msun (converted internally to Msun/h).
    z : array_like
        Redshift; broadcast against ``m_msun``. Values above :data:`DM14_Z_MAX` (= 5, the
        end of the calibrated range) are evaluated at ``DM14_Z_MAX``.
    h : float
        Dimensionless Hubble parameter.

    Returns
    -------
    numpy.ndarray
        ``c_vir``, float64, shape ``broadcast(m_msun, z)``.

    Notes
    -----
    [DM14]_ NFW fit for ``Delta_vir`` in a Planck cosmology, ``z = 0 - 5``:
    ``log10 c = a + b log10(M / 1e12 Msun/h)`` with
    ``a = 0.537 + (1.025 - 0.537) exp(-0.718 z^1.08)`` and ``b = -0.097 + 0.024 z``.
    The slope ``b`` becomes positive above z ~ 4; extrapolated to z ~ 20 it would give
    ``c << 1`` for minihaloes, hence the clamp at ``DM14_Z_MAX``.
    """
    m_h = np.asarray(m_msun, dtype=np.float64) * h
    zc = np.minimum(np.asarray(z, dtype=np.float64), DM14_Z_MAX)
    # a(z), b(z) of the Delta_vir NFW fit (Dutton & Macciò 2014, MNRAS 441, 3359)
    a = DM14_VIR_A_LO + (DM14_VIR_A_HI - DM14_VIR_A_LO) * np.exp(
        -DM14_VIR_A_RATE * zc ** DM14_VIR_A_POW)
    b = DM14_VIR_B_0 + DM14_VIR_B_Z * zc
    # log10 c = a + b log10(M / 1e12 h^-1 Msun)  (Dutton & Macciò 2014, MNRAS 441, 3359)
    return 10.0 ** (a + b * np.log10(m_h / DM14_PIVOT_MSUN_H))


def nfw_escape_speed_central_kms(v_c_kms, conc):
    """Escape speed from the centre of an (untruncated) NFW halo, km/s.

    Parameters
    ----------
    v_c_kms : array_like
        Circular velocity at ``r_vir``, km/s.
    conc : array_like
        Concentration ``c = r_vir / r_s`` (> 0).

    Returns
    -------
    numpy.ndarray
        ``v_esc(0) = sqrt(2 |Phi(0)|) = V_c sqrt(2 c / m(c))`` in km/s, float64, shape
        ``broadcast(v_c_kms, conc)``; ``m`` is :func:`nfw_mass_shape`.

    Notes
    -----
    The NFW potential is ``Phi(r) = -4 pi G rho_s r_s^3 ln(1 + r/r_s) / r`` ([NFW97]_,
    [LM01]_), so ``Phi(0) = -V_c^2 c / m(c)``: the speed needed to reach infinity from the
    centre when the profile is continued beyond ``r_vir``. For ``c = 10``,
    ``v_esc(0) ~ 3.67 V_c``.
    """
    v = np.asarray(v_c_kms, dtype=np.float64)
    c = np.asarray(conc, dtype=np.float64)
    # v_esc(0)^2 = 2|Phi(0)| = 2 V_c^2 c / [ln(1+c) - c/(1+c)] (Łokas & Mamon 2001, MNRAS 321, 155)
    return v * np.sqrt(2.0 * c / nfw_mass_shape(c))


def nfw_vmax_kms(v_c_kms, conc):
    """Maximum circular velocity of an NFW halo, km/s.

    Parameters
    ----------
    v_c_kms : array_like
        Circular velocity at ``r_vir``, km/s.
    conc : array_like
        Concentration ``c = r_vir / r_s`` (> 0).

    Returns
    -------
    numpy.ndarray
        ``V_max = V_c sqrt[(c / x_max) m(x_max) / m(c)]`` with ``x_max`` =
        :data:`NFW_X_VMAX` ~ 2.163 (so ``V_max ~ 0.465 V_c sqrt(c / m(c))``), float64.
        For ``c < x_max`` the peak lies outside ``r_vir`` and the profile is continued.
    """
    v = np.asarray(v_c_kms, dtype=np.float64)
    c = np.asarray(conc, dtype=np.float64)
    # V_max^2 = V_c^2 (c / x_max) m(x_max) / m(c), x_max ~ 2.163  (Navarro, Frenk & White 1997)
    return v * np.sqrt(_NFW_VMAX2_FACTOR * c / nfw_mass_shape(c))


#: concentration relations selectable by name in :class:`HaloStructure`
CONCENTRATION_RELATIONS = {
    "duffy08": concentration_duffy08,
    "dutton_maccio14": concentration_dutton_maccio14,
}


# --- component ------------------------------------------------------------------------------
class HaloProps(NamedTuple):
    """Structural properties of a set of haloes (all float64 arrays of one shape).

    Attributes
    ----------
    delta_vir : numpy.ndarray
        Virial overdensity w.r.t. the critical density at ``z`` (Bryan & Norman 1998).
    r_vir_kpc : numpy.ndarray
        Virial radius, physical kpc.
    v_c_kms : numpy.ndarray
        Circular velocity at ``r_vir``, km/s.
    t_vir_k : numpy.ndarray
        Virial temperature, K.
    conc : numpy.ndarray
        NFW concentration ``r_vir / r_s``.
    v_max_kms : numpy.ndarray
        Maximum circular velocity of the NFW profile, km/s.
    v_esc_kms : numpy.ndarray
        Escape speed from the halo centre (untruncated NFW), km/s.
    """

    delta_vir: np.ndarray
    r_vir_kpc: np.ndarray
    v_c_kms: np.ndarray
    t_vir_k: np.ndarray
    conc: np.ndarray
    v_max_kms: np.ndarray
    v_esc_kms: np.ndarray


@dataclass(frozen=True)
class HaloStructure:
    """Virial and NFW properties of haloes from their virial mass and redshift.

    Parameters
    ----------
    mu : float, optional
        Mean molecular weight used for ``T_vir``, in (0, 2] (default :data:`DEFAULT_MU`).
    concentration : {"duffy08", "dutton_maccio14"}, optional
        Concentration-mass-redshift relation for the virial mass definition:
        Duffy et al. (2008) Table 1 full sample, or Dutton & Macciò (2014).

    Raises
    ------
    bhgrow.errors.ParameterError
        If a parameter is out of range, e.g.
        ``` `mu` of HaloStructure must be in (0, 2]; got -1 ```.

    Examples
    --------
    >>> props = HaloStructure().properties(np.array([1e8, 1e12]), 10.0, cosmo)  # doctest: +SKIP
    >>> props.t_vir_k, props.v_esc_kms  # doctest: +SKIP
    """

    mu: float = DEFAULT_MU
    concentration: str = DEFAULT_CONCENTRATION

    def __post_init__(self) -> None:
        owner = type(self).__name__
        mu = _validate.in_range(owner, "mu", self.mu, 0.0, MU_MAX, lo_open=True)
        object.__setattr__(self, "mu", mu)
        _validate.one_of(owner, "concentration", self.concentration, CONCENTRATION_RELATIONS)

    def properties(self, m_vir_msun, z, cosmo) -> HaloProps:
        """Compute the structural properties of haloes.

        Parameters
        ----------
        m_vir_msun : array_like
            Virial mass (Bryan & Norman 1998 definition), physical Msun, > 0.
        z : array_like
            Redshift, > -1; broadcast against ``m_vir_msun`` (a scalar for one snapshot).
        cosmo : bhgrow.cosmology object
            Provides ``omega_m(z)``, ``rho_crit_msun_kpc3(z)`` and ``h``.

        Returns
        -------
        HaloProps
            Float64 arrays of shape ``broadcast(m_vir_msun, z)``.
        """
        m = np.asarray(m_vir_msun, dtype=np.float64)
        z = np.asarray(z, dtype=np.float64)
        shape = np.broadcast_shapes(m.shape, z.shape)
        delta, r_vir, v_c, t_vir = self._virial(m, z, cosmo)
        conc = CONCENTRATION_RELATIONS[self.concentration](m, z, cosmo.h)
        return HaloProps(
            delta_vir=np.broadcast_to(delta, shape).astype(np.float64),
            r_vir_kpc=r_vir,
            v_c_kms=v_c,
            t_vir_k=t_vir,
            conc=conc,
            v_max_kms=nfw_vmax_kms(v_c, conc),
            v_esc_kms=nfw_escape_speed_central_kms(v_c, conc),
        )

    def _virial(self, m, z, cosmo):
        delta = delta_vir_bryan_norman(cosmo.omega_m(z))
        r_vir = virial_radius_kpc(m, z, cosmo, delta=delta)
        v_c = circular_velocity_kms(m, r_vir)
        return delta, r_vir, v_c, virial_temperature_k(v_c, self.mu)

    def virial(self, m_vir_msun, z, cosmo):
        """Virial radius (kpc), circular velocity (km/s) and virial temperature (K): the
        first fields of :meth:`properties`, without the NFW profile.

        Parameters and units as for :meth:`properties`; returns three float64 arrays.
        """
        m = np.asarray(m_vir_msun, dtype=np.float64)
        z = np.asarray(z, dtype=np.float64)
        return self._virial(m, z, cosmo)[1:]

    def escape_speed_kms(self, m_vir_msun, z, cosmo, v_c_kms=None):
        """Escape speed from the halo centre, km/s: the ``v_esc_kms`` field of
        :meth:`properties` alone (:func:`nfw_escape_speed_central_kms`).

        Parameters and units as for :meth:`properties`; ``v_c_kms``, the circular velocity
        from :meth:`virial` if already known. Returns a float64 array.
        """
        m = np.asarray(m_vir_msun, dtype=np.float64)
        z = np.asarray(z, dtype=np.float64)
        v_c = self._virial(m, z, cosmo)[2] if v_c_kms is None else np.asarray(
            v_c_kms, dtype=np.float64)
        conc = CONCENTRATION_RELATIONS[self.concentration](m, z, cosmo.h)
        return nfw_escape_speed_central_kms(v_c, conc)
