"""Gas accretion onto black holes: Bondi-Hoyle-Lyttleton rates, the Eddington limit,
radiative efficiency, spin evolution, and closed-form growth over a substep.

All quantities are float64 arrays in the internal units of :mod:`bhgrow.constants`:
masses in Msun, gas density ``rho`` in Msun/kpc^3, sound speed and velocities in km/s, time
in Gyr and rates in Msun/Gyr.

Conventions
-----------
``Mdot`` is the rate at which gas is taken from the reservoir (the *accretion rate*). A
fraction ``eps`` (the radiative efficiency) is radiated as ``L = eps Mdot c^2``; the black hole
grows by ``(1 - eps) Mdot`` (DESIGN §6). The Eddington-limited accretion rate is
``Mdot_Edd = f_max L_Edd / (eps c^2) = f_max M / (eps t_Edd)`` with the Eddington (Salpeter)
time ``t_Edd = sigma_T c / (4 pi G m_p)`` (:data:`bhgrow.constants.T_EDD_GYR`, ~0.45 Gyr).

Spins are dimensionless, ``a = c J / (G M^2)`` in [-1, 1], signed with respect to the angular
momentum of the accretion disc: ``a < 0`` means the disc orbits retrograde.

References
----------
.. [B52] Bondi H., 1952, MNRAS, 112, 195
.. [HL39] Hoyle F., Lyttleton R. A., 1939, Proc. Camb. Phil. Soc., 35, 405
.. [E04] Edgar R., 2004, New Astron. Rev., 48, 843
.. [SDH05] Springel V., Di Matteo T., Hernquist L., 2005, MNRAS, 361, 776
.. [DM05] Di Matteo T., Springel V., Hernquist L., 2005, Nature, 433, 604
.. [BS09] Booth C. M., Schaye J., 2009, MNRAS, 398, 53
.. [Ba70] Bardeen J. M., 1970, Nature, 226, 64
.. [BPT72] Bardeen J. M., Press W. H., Teukolsky S. A., 1972, ApJ, 178, 347
.. [NT73] Novikov I. D., Thorne K. S., 1973, in Black Holes (Les Houches), 343
.. [T74] Thorne K. S., 1974, ApJ, 191, 507
.. [S82] Soltan A., 1982, MNRAS, 200, 115
.. [YT02] Yu Q., Tremaine S., 2002, MNRAS, 335, 965
.. [KLOP05] King A. R., Lubow S. H., Ogilvie G. I., Pringle J. E., 2005, MNRAS, 363, 49
.. [KPH08] King A. R., Pringle J. E., Hofmann J. A., 2008, MNRAS, 385, 1621

Journal references are from memory.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import ClassVar, NamedTuple

import numpy as np

from .. import _validate
from ..constants import G_KPC_KMS2_MSUN, KPC_CM, KPC_PER_KMS_GYR, M_P_G, MSUN_G, T_EDD_GYR

__all__ = [
    "DEFAULT_BONDI_BOOST",
    "DEFAULT_BS09_N_H_STAR_CM3",
    "DEFAULT_BS09_BETA",
    "DEFAULT_HYDROGEN_FRACTION",
    "DEFAULT_F_MAX",
    "DEFAULT_EFFICIENCY",
    "DEFAULT_A_MAX",
    "BondiHoyle",
    "BoothSchaye",
    "ACCRETION_LAWS",
    "bondi_lambda",
    "EddingtonLimit",
    "eddington_ratio",
    "RadiativeEfficiency",
    "r_isco",
    "spin_from_r_isco",
    "SpinEvolution",
    "GrowthStep",
    "grow_frozen",
]

# --- defaults (every one is a config key; unit and source beside each) --------------------
#: Bondi boost alpha [dimensionless]: 100, as in Springel, Di Matteo & Hernquist 2005 and
#: Di Matteo, Springel & Hernquist 2005 (memory); compensates for unresolved dense gas
DEFAULT_BONDI_BOOST: float = 100.0
#: Booth & Schaye (2009) density threshold n_H* [cm^-3]: 0.1 (their star-formation threshold)
DEFAULT_BS09_N_H_STAR_CM3: float = 0.1
#: Booth & Schaye (2009) boost slope beta [dimensionless]: 2 (their fiducial model)
DEFAULT_BS09_BETA: float = 2.0
#: hydrogen mass fraction X [dimensionless]: 0.76, primordial (memory; used by BS09 for n_H)
DEFAULT_HYDROGEN_FRACTION: float = 0.76
#: maximum Eddington ratio f_max [dimensionless]: 1 (Eddington-limited accretion)
DEFAULT_F_MAX: float = 1.0
#: constant radiative efficiency [dimensionless]: 0.1 (Soltan 1982 argument; Yu & Tremaine
#: 2002 find eps >~ 0.1; memory)
DEFAULT_EFFICIENCY: float = 0.1
#: maximum spin reached by disc accretion [dimensionless]: 0.998, capture of disc photons
#: by the hole (Thorne 1974)
DEFAULT_A_MAX: float = 0.998

_FOUR_PI = 4.0 * math.pi
#: G^2 in kpc^2 (km/s)^4 / Msun^2
_G2 = G_KPC_KMS2_MSUN * G_KPC_KMS2_MSUN
#: Msun/kpc^3 -> g/cm^3
_RHO_CGS_PER_INTERNAL = MSUN_G / KPC_CM**3


# --- Bondi-Hoyle-Lyttleton ------------------------------------------------------------------
def _bondi_coefficient(alpha, rho, cs, v_rel) -> np.ndarray:
    """``4 pi alpha G^2 rho / (cs^2 + v^2)^(3/2)`` in 1/(Msun Gyr)."""
    rho = np.asarray(rho, dtype=np.float64)
    cs = np.asarray(cs, dtype=np.float64)
    v = np.asarray(v_rel, dtype=np.float64)
    # Mdot = 4 pi alpha G^2 M^2 rho / (c_s^2 + v^2)^(3/2)  (Bondi 1952 interpolation with the
    # 4 pi normalisation of Springel, Di Matteo & Hernquist 2005, MNRAS 361, 776);
    # G^2 rho / v^3 is in (km/s)/(kpc Msun); dividing by kpc/(km/s) in Gyr gives 1/(Msun Gyr)
    return (_FOUR_PI * _G2 / KPC_PER_KMS_GYR) * alpha * rho / (cs * cs + v * v) ** 1.5


@dataclass(frozen=True)
class BondiHoyle:
    """Bondi-Hoyle-Lyttleton accretion with a constant boost factor.

    ``Mdot = 4 pi alpha G^2 M^2 rho / (c_s^2 + v^2)^(3/2)`` ([B52]_, [HL39]_, [E04]_), with
    the constant boost ``alpha`` of [SDH05]_ and [DM05]_.

    Parameters
    ----------
    boost : float, optional
        Boost factor ``alpha`` > 0 (default :data:`DEFAULT_BONDI_BOOST` = 100).

    Notes
    -----
    Bondi's eigenvalue ``lambda(gamma)`` (:func:`bondi_lambda`; 1.12 for isothermal gas,
    0.25 for gamma = 5/3) is **not** included: as in [SDH05]_ the normalisation is
    ``4 pi`` and any ``lambda`` is absorbed into ``boost``. For Bondi's adiabatic solution
    without boost use ``boost = bondi_lambda(gamma)`` and ``v_rel = 0``.

    Raises
    ------
    bhgrow.errors.ParameterError
        ``` `boost` of BondiHoyle must be > 0; got -3 ```
    """

    boost: float = DEFAULT_BONDI_BOOST
    #: ``coefficient`` is proportional to ``rho`` (the engine then computes it once per
    #: interval per unit gas)
    linear_in_density: ClassVar[bool] = True

    def __post_init__(self) -> None:
        object.__setattr__(self, "boost", _validate.positive(type(self).__name__, "boost",
                                                             self.boost))

    def coefficient(self, rho, cs, v_rel=0.0) -> np.ndarray:
        """Coefficient ``A`` with ``Mdot = A M^2``, in 1/(Msun Gyr).

        Parameters
        ----------
        rho : array_like
            Gas density around the black hole, Msun/kpc^3 (>= 0).
        cs : array_like
            Sound speed of that gas, km/s.
        v_rel : array_like, optional
            Speed of the black hole relative to the gas, km/s (default 0).
            ``cs^2 + v_rel^2`` must be > 0.

        Returns
        -------
        numpy.ndarray
            ``A = 4 pi alpha G^2 rho / (cs^2 + v_rel^2)^(3/2)``, float64, broadcast shape.
        """
        return _bondi_coefficient(self.boost, rho, cs, v_rel)

    def rate(self, m_bh, rho, cs, v_rel=0.0) -> np.ndarray:
        """Bondi-Hoyle-Lyttleton accretion rate, Msun/Gyr.

        Parameters
        ----------
        m_bh : array_like
            Black-hole mass, Msun.
        rho, cs, v_rel : array_like
            As in :meth:`coefficient`.

        Returns
        -------
        numpy.ndarray
            ``Mdot = A m_bh^2`` in Msun/Gyr (gas taken from the reservoir; not capped).
        """
        m = np.asarray(m_bh, dtype=np.float64)
        return self.coefficient(rho, cs, v_rel) * m * m


@dataclass(frozen=True)
class BoothSchaye:
    """Bondi-Hoyle-Lyttleton accretion with the density-dependent boost of Booth & Schaye.

    ``alpha = max(1, (n_H / n_H*)^beta)`` with ``n_H = X rho / m_p`` ([BS09]_, memory):
    unboosted Bondi accretion in gas that could be resolved as a single phase, boosted where
    the density exceeds the threshold at which a cold phase is expected.

    Parameters
    ----------
    n_h_star_cm3 : float, optional
        Threshold hydrogen number density ``n_H*`` > 0, cm^-3 (default 0.1).
    beta : float, optional
        Slope ``beta`` >= 0 (default 2; ``beta = 0`` gives unboosted Bondi accretion).
    hydrogen_fraction : float, optional
        Hydrogen mass fraction ``X`` in (0, 1] used for ``n_H`` (default 0.76).

    Notes
    -----
    As in :class:`BondiHoyle` the normalisation is ``4 pi`` without Bondi's ``lambda``.
    """

    n_h_star_cm3: float = DEFAULT_BS09_N_H_STAR_CM3
    beta: float = DEFAULT_BS09_BETA
    hydrogen_fraction: float = DEFAULT_HYDROGEN_FRACTION
    #: the boost depends on density: the engine re-evaluates the coefficient every substep
    linear_in_density: ClassVar[bool] = False

    def __post_init__(self) -> None:
        owner = type(self).__name__
        object.__setattr__(self, "n_h_star_cm3",
                           _validate.positive(owner, "n_h_star_cm3", self.n_h_star_cm3))
        object.__setattr__(self, "beta", _validate.non_negative(owner, "beta", self.beta))
        object.__setattr__(self, "hydrogen_fraction",
                           _validate.in_range(owner, "hydrogen_fraction",
                                              self.hydrogen_fraction, 0.0, 1.0, lo_open=True))

    def n_h_cm3(self, rho) -> np.ndarray:
        """Hydrogen number density ``n_H = X rho / m_p`` in cm^-3 for ``rho`` in Msun/kpc^3."""
        rho = np.asarray(rho, dtype=np.float64)
        return self.hydrogen_fraction * rho * (_RHO_CGS_PER_INTERNAL / M_P_G)

    def boost_factor(self, rho) -> np.ndarray:
        """Boost ``alpha = max(1, (n_H / n_H*)^beta)`` (Booth & Schaye 2009), dimensionless."""
        # alpha = (n_H/n_H*)^beta above n_H*, else 1 (Booth & Schaye 2009, MNRAS 398, 53)
        return np.maximum(1.0, (self.n_h_cm3(rho) / self.n_h_star_cm3) ** self.beta)

    def coefficient(self, rho, cs, v_rel=0.0) -> np.ndarray:
        """Coefficient ``A`` with ``Mdot = A M^2``, in 1/(Msun Gyr); see
        :meth:`BondiHoyle.coefficient`, with ``alpha`` from :meth:`boost_factor`."""
        return _bondi_coefficient(self.boost_factor(rho), rho, cs, v_rel)

    def rate(self, m_bh, rho, cs, v_rel=0.0) -> np.ndarray:
        """Accretion rate ``A m_bh^2`` in Msun/Gyr; see :meth:`BondiHoyle.rate`."""
        m = np.asarray(m_bh, dtype=np.float64)
        return self.coefficient(rho, cs, v_rel) * m * m


#: accretion laws selectable by name (config name -> class)
ACCRETION_LAWS = {
    "bondi_hoyle": BondiHoyle,
    "booth_schaye": BoothSchaye,
}


def bondi_lambda(gamma):
    """Bondi's accretion eigenvalue ``lambda(gamma)`` for a polytrope, dimensionless.

    Parameters
    ----------
    gamma : array_like
        Polytropic index in [1, 5/3].

    Returns
    -------
    numpy.ndarray
        ``lambda = (1/4) [2 / (5 - 3 gamma)]^((5 - 3 gamma) / (2 (gamma - 1)))`` ([B52]_),
        with the limits ``e^(3/2)/4 = 1.120`` at ``gamma = 1`` and ``1/4`` at ``gamma = 5/3``;
        ``lambda(4/3) = 2^(-1/2) = 0.707``.

    Raises
    ------
    bhgrow.errors.ParameterError
        If any ``gamma`` lies outside [1, 5/3].
    """
    from scipy.special import xlogy

    g = np.asarray(gamma, dtype=np.float64)
    bad = ~((g >= 1.0) & (g <= 5.0 / 3.0))
    if np.any(bad):
        _validate.in_range("bondi_lambda", "gamma", float(g[bad].flat[0]), 1.0, 5.0 / 3.0)
    t = 5.0 - 3.0 * g
    d = g - 1.0
    iso = d == 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        # ln(4 lambda) = t/(2(g-1)) * ln(2/t), written with xlogy so t = 0 (gamma = 5/3) gives 0
        # (Bondi 1952, MNRAS 112, 195: critical eigenvalue lambda_c of the polytropic solution)
        log4l = (t * math.log(2.0) - xlogy(t, t)) / (2.0 * np.where(iso, 1.0, d))
    # isothermal limit gamma -> 1: lambda = e^(3/2)/4 (Bondi 1952)
    log4l = np.where(iso, 1.5, log4l)
    return 0.25 * np.exp(log4l)


# --- Eddington limit ------------------------------------------------------------------------
@dataclass(frozen=True)
class EddingtonLimit:
    """Cap on the accretion rate at a multiple of the Eddington rate.

    ``Mdot_max = f_max L_Edd / (eps c^2) = f_max M / (eps t_Edd)`` with
    ``L_Edd = 4 pi G M m_p c / sigma_T`` and ``t_Edd = sigma_T c / (4 pi G m_p)``.

    Parameters
    ----------
    f_max : float, optional
        Maximum Eddington ratio ``L / L_Edd`` > 0 (default 1).
    """

    f_max: float = DEFAULT_F_MAX

    def __post_init__(self) -> None:
        object.__setattr__(self, "f_max", _validate.positive(type(self).__name__, "f_max",
                                                             self.f_max))

    def coefficient(self, efficiency) -> np.ndarray:
        """``1/tau = f_max / (eps t_Edd)`` in 1/Gyr, so that ``Mdot_max = M / tau``.

        This is the ``edd_coeff`` argument of :func:`grow_frozen`.
        """
        eps = np.asarray(efficiency, dtype=np.float64)
        # Mdot_Edd = L_Edd/(eps c^2) = M/(eps t_Edd), t_Edd = sigma_T c/(4 pi G m_p)
        # (Eddington 1926 luminosity; Salpeter 1964 time-scale)
        return self.f_max / (eps * T_EDD_GYR)

    def rate(self, m_bh, efficiency) -> np.ndarray:
        """Maximum accretion rate ``f_max L_Edd / (eps c^2)`` in Msun/Gyr.

        Parameters
        ----------
        m_bh : array_like
            Black-hole mass, Msun.
        efficiency : array_like
            Radiative efficiency ``eps`` in (0, 1).

        Returns
        -------
        numpy.ndarray
            ``f_max m_bh / (eps T_EDD_GYR)`` in Msun/Gyr, broadcast shape.
        """
        return np.asarray(m_bh, dtype=np.float64) * self.coefficient(efficiency)


def eddington_ratio(mdot, m_bh, efficiency) -> np.ndarray:
    """Eddington ratio ``L / L_Edd = eps Mdot t_Edd / M`` (dimensionless).

    Parameters
    ----------
    mdot : array_like
        Accretion rate (gas taken from the reservoir), Msun/Gyr; e.g. the mean rate
        ``GrowthStep.accreted / dt`` of :func:`grow_frozen`.
    m_bh : array_like
        Black-hole mass, Msun (> 0).
    efficiency : array_like
        Radiative efficiency.
    """
    mdot = np.asarray(mdot, dtype=np.float64)
    # L = eps Mdot c^2, L_Edd = M c^2 / t_Edd  (Eddington 1926; Salpeter 1964)
    return np.asarray(efficiency, dtype=np.float64) * mdot * T_EDD_GYR / np.asarray(
        m_bh, dtype=np.float64)


# --- radiative efficiency and spin ----------------------------------------------------------
def r_isco(spin) -> np.ndarray:
    """Radius of the innermost stable circular orbit in units of ``G M / c^2``.

    Parameters
    ----------
    spin : array_like
        Dimensionless spin in [-1, 1], signed with respect to the orbit (negative =
        retrograde).

    Returns
    -------
    numpy.ndarray
        ``r_isco``: 6 for ``a = 0``, 1 for ``a = 1``, 9 for ``a = -1`` ([BPT72]_ eq. 2.21).
    """
    a = np.asarray(spin, dtype=np.float64)
    # Z1 = 1 + (1-a^2)^(1/3) [(1+a)^(1/3) + (1-a)^(1/3)], Z2 = (3a^2 + Z1^2)^(1/2),
    # r = 3 + Z2 - sign(a) [(3-Z1)(3+Z1+2Z2)]^(1/2)  (Bardeen, Press & Teukolsky 1972, eq. 2.21)
    z1 = 1.0 + np.cbrt(1.0 - a * a) * (np.cbrt(1.0 + a) + np.cbrt(1.0 - a))
    z2 = np.sqrt(3.0 * a * a + z1 * z1)
    return 3.0 + z2 - np.sign(a) * np.sqrt(np.maximum(3.0 - z1, 0.0) * (3.0 + z1 + 2.0 * z2))


def spin_from_r_isco(r) -> np.ndarray:
    """Spin whose ISCO lies at ``r`` (in ``G M / c^2``); inverse of :func:`r_isco`.

    Parameters
    ----------
    r : array_like
        ISCO radius in [1, 9].

    Returns
    -------
    numpy.ndarray
        ``a = r^(1/2) [4 - (3 r - 2)^(1/2)] / 3`` (Bardeen 1970, Nature 226, 64, with
        ``M / M_i = (r_i / r)^(1/2)``), signed (``r > 6`` gives ``a < 0``).
    """
    r = np.asarray(r, dtype=np.float64)
    # a = (r^(1/2)/3) [4 - (3r - 2)^(1/2)]  (Bardeen 1970, Nature 226, 64)
    return np.sqrt(r) * (4.0 - np.sqrt(3.0 * r - 2.0)) / 3.0


@dataclass(frozen=True)
class RadiativeEfficiency:
    """Radiative efficiency of the accretion flow.

    Parameters
    ----------
    mode : {"constant", "spin"}, optional
        ``"constant"``: ``eps = constant``. ``"spin"``: thin-disc efficiency
        ``eps = 1 - E_isco = 1 - (1 - 2 / (3 r_isco(a)))^(1/2)`` ([BPT72]_, [NT73]_); 0.057 for
        ``a = 0``, 0.32 for ``a = 0.998``, 0.038 for ``a = -1``.
    constant : float, optional
        Efficiency in (0, 1) for ``mode = "constant"`` (default 0.1, [S82]_, [YT02]_).
    """

    mode: str = "constant"
    constant: float = DEFAULT_EFFICIENCY

    def __post_init__(self) -> None:
        owner = type(self).__name__
        _validate.one_of(owner, "mode", self.mode, ("constant", "spin"))
        object.__setattr__(self, "constant",
                           _validate.in_range(owner, "constant", self.constant, 0.0, 1.0,
                                              lo_open=True, hi_open=True))

    def efficiency(self, spin) -> np.ndarray:
        """Radiative efficiency for black holes of spin ``spin``.

        Parameters
        ----------
        spin : array_like
            Spin in [-1, 1] relative to the accretion disc (ignored by ``"constant"`` except
            for its shape).

        Returns
        -------
        numpy.ndarray
            ``eps``, float64, same shape as ``spin``.
        """
        a = np.asarray(spin, dtype=np.float64)
        if self.mode == "constant":
            return np.full(a.shape, self.constant)
        # eps = 1 - E_isco, E_isco = (1 - 2/(3 r_isco))^(1/2)  (Bardeen, Press & Teukolsky 1972,
        # ApJ 178, 347, eq. 2.21; Novikov & Thorne 1973)
        return 1.0 - np.sqrt(1.0 - 2.0 / (3.0 * r_isco(a)))


@dataclass(frozen=True)
class SpinEvolution:
    """Evolution of the black-hole spin by disc accretion.

    Parameters
    ----------
    mode : {"none", "coherent", "chaotic"}, optional
        ``"none"``: spins do not change. ``"coherent"``: every episode feeds a disc whose
        angular momentum is that of the previous ones; the spin follows Bardeen's (1970)
        exact relation for accretion from the ISCO, ``M^2 r_isco(a) = const``, so a hole with
        ``a = 0`` reaches ``a = 1`` after growing by ``sqrt(6)``; retrograde holes spin down
        through 0 and then up ([Ba70]_, [BPT72]_). ``"chaotic"``: each call of :meth:`update`
        is one accretion episode whose disc is prograde (``u < 1/2``) or retrograde
        (``u >= 1/2``) with respect to the hole's spin with equal probability; the spin is then
        advanced as in ``"coherent"`` relative to that disc. This is the small-disc limit
        (disc angular momentum << hole's) of the King et al. (2005, 2008) alignment criterion
        for isotropically oriented episodes ([KLOP05]_, [KPH08]_).
    a_max : float, optional
        Largest spin reached by accretion, in (0, 1] (default 0.998, [T74]_).

    Notes
    -----
    Stored spins are signed with respect to the last disc. In ``"chaotic"`` mode the
    outcome depends on how many episodes (calls) a growth interval is split into; the
    caller defines an episode (e.g. one per snapshot step). The efficiency of an episode
    should use :meth:`episode_spin` with the same ``u``.
    """

    mode: str = "none"
    a_max: float = DEFAULT_A_MAX

    def __post_init__(self) -> None:
        owner = type(self).__name__
        _validate.one_of(owner, "mode", self.mode, ("none", "coherent", "chaotic"))
        object.__setattr__(self, "a_max",
                           _validate.in_range(owner, "a_max", self.a_max, 0.0, 1.0,
                                              lo_open=True))

    def episode_spin(self, spin, u=None) -> np.ndarray:
        """Spin relative to the disc of the coming episode, in [-1, 1].

        ``"none"`` and ``"coherent"``: ``spin`` itself. ``"chaotic"``: ``+|spin|`` where
        ``u < 1/2`` (prograde disc), ``-|spin|`` elsewhere (retrograde disc).
        """
        a = np.array(spin, dtype=np.float64)
        if self.mode != "chaotic":
            return a
        if u is None:
            raise ValueError("SpinEvolution(mode='chaotic') needs uniforms `u`, one per BH")
        u = np.asarray(u, dtype=np.float64)
        return np.where(u < 0.5, np.abs(a), -np.abs(a))

    def update(self, spin, m_old, m_new, u=None) -> np.ndarray:
        """Spin after disc accretion grew the black hole from ``m_old`` to ``m_new``.

        Parameters
        ----------
        spin : array_like
            Spin before the episode, in [-1, 1].
        m_old, m_new : array_like
            Black-hole mass before and after, Msun (``m_new >= m_old > 0``).
        u : array_like, optional
            Uniforms in [0, 1), one per black hole (required for ``"chaotic"``), e.g. from
            :func:`bhgrow.rng.uniform`.

        Returns
        -------
        numpy.ndarray
            New spin, float64, broadcast shape, at most ``a_max``.
        """
        a = self.episode_spin(spin, u)
        if self.mode == "none":
            return np.broadcast_to(a, np.broadcast_shapes(
                a.shape, np.shape(m_old), np.shape(m_new))).copy()
        ratio = np.asarray(m_old, dtype=np.float64) / np.asarray(m_new, dtype=np.float64)
        # M^2 r_isco(a) is conserved by accretion from the ISCO (Bardeen 1970, Nature 226, 64);
        # r_isco = 1 (a = 1) is reached at M/M_i = (r_i)^(1/2)
        r_new = np.clip(r_isco(a) * ratio * ratio, 1.0, 9.0)
        return np.minimum(spin_from_r_isco(r_new), self.a_max)


# --- closed-form growth over a substep ------------------------------------------------------
class GrowthStep(NamedTuple):
    """Result of :func:`grow_frozen` (unpacks as ``m1, accreted``).

    Attributes
    ----------
    m1 : numpy.ndarray
        Black-hole mass at the end of the substep, Msun.
    accreted : numpy.ndarray
        Gas taken from the reservoir, Msun (``(m1 - m0) / (1 - eps)``).
    """

    m1: np.ndarray
    accreted: np.ndarray

    def mean_rate(self, dt) -> np.ndarray:
        """Mean accretion rate ``accreted / dt`` over the substep, Msun/Gyr (0 where dt = 0)."""
        dt = np.asarray(dt, dtype=np.float64)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(dt > 0.0, self.accreted / np.where(dt > 0.0, dt, 1.0), 0.0)


def grow_frozen(m0, bondi_coeff, edd_coeff, eps, dt, gas_available) -> GrowthStep:
    """Grow black holes over ``dt`` with the environment frozen, in closed form.

    The black hole grows as ``dM/dt = (1 - eps) min(A M^2, M / tau)``, with the Bondi
    coefficient ``A`` and the Eddington-limited rate ``M / tau``; the accretion rate (gas
    taken from the reservoir) is ``min(A M^2, M / tau)``. With ``k = 1 - eps`` and
    ``M_x = 1 / (A tau)`` the solution is piecewise analytic:

    * Bondi phase (``M < M_x``): ``1/M(t) = 1/M0 - k A t``, until ``M = M_x`` at
      ``t_x = [1/M0 - 1/M_x] / (k A)``;
    * Eddington phase (``M >= M_x``): ``M(t) = M_x exp[k (t - t_x) / tau]`` (``t_x = 0`` and
      ``M_x -> M0`` if ``M0 >= M_x``).

    The Bondi solution diverges at ``1 / (k A M0) > t_x``, so it always crosses ``M_x``
    first. Finally the gas taken, ``(m1 - m0) / k``, is capped at ``gas_available``; where
    the cap binds, ``accreted = gas_available`` and ``m1 = m0 + k gas_available``.

    Parameters
    ----------
    m0 : array_like
        Black-hole mass at the start, Msun (> 0; non-positive masses do not grow).
    bondi_coeff : array_like
        ``A`` in 1/(Msun Gyr) (:meth:`BondiHoyle.coefficient`), >= 0; ``A = 0`` means no
        accretion, ``A = inf`` Eddington-limited accretion throughout.
    edd_coeff : array_like
        ``1 / tau = f_max / (eps t_Edd)`` in 1/Gyr (:meth:`EddingtonLimit.coefficient`), >= 0.
    eps : array_like
        Radiative efficiency in [0, 1).
    dt : array_like
        Substep length, Gyr (>= 0).
    gas_available : array_like
        Gas the black hole may take, Msun (negative values count as 0; ``inf`` = no cap).

    Returns
    -------
    GrowthStep
        ``(m1, accreted)``, float64 arrays of the broadcast shape of the inputs. The mean
        accretion rate is ``GrowthStep.mean_rate(dt)`` (Msun/Gyr). ``m1`` is never NaN; it
        can be ``inf`` only if ``gas_available`` is.
    """
    m0, a, inv_tau, eps, dt, gas = np.broadcast_arrays(
        *(np.asarray(x, dtype=np.float64) for x in
          (m0, bondi_coeff, edd_coeff, eps, dt, gas_available)))
    k = 1.0 - eps
    grows = (m0 > 0.0) & (a > 0.0) & (inv_tau > 0.0) & (dt > 0.0)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        # 1/M_x = A tau: the mass where the Bondi rate A M^2 equals the Eddington rate M/tau
        inv_mx = np.where(grows, a / np.where(grows, inv_tau, 1.0), 1.0)
        inv_m0 = 1.0 / np.where(grows, m0, 1.0)
        bondi_start = inv_m0 > inv_mx
        # time to reach M_x on the Bondi branch: 1/M0 - 1/M_x = k A t_x (Bondi 1952 growth,
        # dM/dt = k A M^2 integrated in closed form)
        t_x = np.where(bondi_start, (inv_m0 - inv_mx) / (k * a), 0.0)
        in_bondi = bondi_start & (dt <= t_x)
        # Bondi phase: M = M0 / (1 - k A M0 t) (closed form of dM/dt = k A M^2)
        m_bondi = m0 / (1.0 - k * a * m0 * dt)
        # Eddington phase: M = M_start exp(k (t - t_x) / tau) (Salpeter 1964 e-folding)
        m_start = np.where(bondi_start, 1.0 / inv_mx, m0)
        m_edd = m_start * np.exp(k * inv_tau * (dt - t_x))
        m1 = np.where(grows, np.where(in_bondi, m_bondi, m_edd), m0)
        m1 = np.maximum(m1, m0)  # round-off guard: growth is never negative
        accreted = np.where(grows, (m1 - m0) / k, 0.0)
    # never more than the reservoir holds (DESIGN §6)
    gas = np.maximum(gas, 0.0)
    capped = accreted > gas
    accreted = np.where(capped, gas, accreted)
    m1 = np.where(capped, m0 + k * gas, m1)
    return GrowthStep(m1, accreted)
