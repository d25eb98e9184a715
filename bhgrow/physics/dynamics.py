"""Merger delays of black holes: dynamical friction, binary hardening, gravitational waves.

When a satellite halo merges into a host, its black hole starts a clock of three stages
(DESIGN §6), each a frozen dataclass that can be switched off (``enabled = False``), scaled
(``scale``) or replaced (any object with the same methods, see :class:`MergerClock`):

1. :class:`DynamicalFriction` -- the satellite sinks to the centre of the host on the
   merging time of the Boylan-Kolchin, Ma & Quataert (2008) fit [BK08]_, with the orbital
   circularity and energy drawn per pair from stated distributions;
2. :class:`Hardening` -- the bound binary shrinks from the hardening radius ``a_h`` to the
   separation ``a_gw`` where gravitational-wave emission takes over, either in a constant time
   or by scattering stars at the constant hardening rate ``H`` of Quinlan (1996) [Q96]_, with
   the stellar density and dispersion taken at the influence radius as in Sesana & Khan
   (2015) [SK15]_;
3. :class:`GWInspiral` -- coalescence by gravitational-wave emission from ``a_gw`` with
   eccentricity ``e0``: the exact solution of the orbit-averaged equations of Peters (1964)
   [P64]_ (his reduction of the coupled ``da/dt``, ``de/dt`` to one quadrature), tabulated once
   and interpolated to a relative accuracy of ~1e-9.

All quantities are float64 arrays in the internal units of :mod:`bhgrow.constants`: masses in
Msun, lengths (including binary separations) in physical kpc, velocities in km/s, densities in
Msun/kpc^3 and times in Gyr. Every method broadcasts its array arguments.

Random numbers
--------------
A merging pair needs :data:`N_UNIFORMS` = 3 uniforms in [0, 1) (columns of ``u`` in
:meth:`MergerClock.delay_gyr`): :data:`U_CIRCULARITY`, :data:`U_ORBIT_ENERGY` and
:data:`U_ECCENTRICITY`. :func:`draw_uniforms` draws them with :func:`bhgrow.rng.uniform` from
the pair's stream keys with the purpose codes of :data:`DYNAMICS_PURPOSES`, a block at
:data:`DYNAMICS_PURPOSE_BASE` far from other users' codes (``rng.hash64`` mixes
``4 step + purpose``).

References
----------
.. [BK08] Boylan-Kolchin M., Ma C.-P., Quataert E., 2008, MNRAS, 383, 93
.. [Q96] Quinlan G. D., 1996, New Astron., 1, 35
.. [SK15] Sesana A., Khan F. M., 2015, MNRAS, 454, L66
.. [MM05] Merritt D., Milosavljević M., 2005, Living Rev. Relativ., 8, 8
.. [SHM06] Sesana A., Haardt F., Madau P., 2006, ApJ, 651, 392
.. [P64] Peters P. C., 1964, Phys. Rev., 136, B1224
.. [M21] Mandel I., 2021, RNAAS, 5, 223
.. [BT08] Binney J., Tremaine S., 2008, Galactic Dynamics, 2nd ed., Princeton Univ. Press

Journal references, equation numbers and fit coefficients are from memory ("(memory)").
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import lru_cache
from typing import NamedTuple

import numpy as np
from numpy.polynomial import chebyshev as _cheb

from .. import _validate
from .. import rng
from ..constants import C_KMS, G_KPC_KMS2_MSUN, KPC_PER_KMS_GYR

__all__ = [
    "BK08_A",
    "BK08_B",
    "BK08_C",
    "BK08_D",
    "DEFAULT_DF_MODE",
    "DEFAULT_DF_CONSTANT_GYR",
    "DEFAULT_ETA_MIN",
    "DEFAULT_ETA_MAX",
    "DEFAULT_RC_MIN",
    "DEFAULT_RC_MAX",
    "DEFAULT_HARDENING_MODE",
    "DEFAULT_HARDENING_RATE",
    "DEFAULT_HARDENING_CONSTANT_GYR",
    "DEFAULT_E0_MIN",
    "DEFAULT_E0_MAX",
    "DEFAULT_SIGMA_OVER_VC",
    "DF_MODES",
    "HARDENING_MODES",
    "N_UNIFORMS",
    "U_CIRCULARITY",
    "U_ORBIT_ENERGY",
    "U_ECCENTRICITY",
    "DYNAMICS_PURPOSE_BASE",
    "DYNAMICS_PURPOSES",
    "draw_uniforms",
    "bk08_time_ratio",
    "DynamicalFriction",
    "hardening_radius_kpc",
    "influence_radius_kpc",
    "sis_density_msun_kpc3",
    "Hardening",
    "peters_rates",
    "peters_enhancement",
    "peters_circular_time_gyr",
    "peters_time_gyr",
    "GWInspiral",
    "DelayParts",
    "MergerClock",
]

# =============================================================================================
# Defaults (every DEFAULT_* is a config key; unit and source beside each)
# =============================================================================================
# --- dynamical friction: Boylan-Kolchin, Ma & Quataert 2008, MNRAS 383, 93, eq. 5 (memory) --
#: BK08 fit coefficient A [dimensionless]: 0.216 (memory); a property of the fit, not a key
BK08_A: float = 0.216
#: BK08 mass-ratio exponent b [dimensionless]: 1.3 (memory)
BK08_B: float = 1.3
#: BK08 circularity coefficient c [dimensionless]: 1.9 (memory)
BK08_C: float = 1.9
#: BK08 orbital-energy exponent d [dimensionless]: 1.0 (memory)
BK08_D: float = 1.0
#: dynamical-friction model: "bk08" (the fit) or "constant"
DEFAULT_DF_MODE: str = "bk08"
#: dynamical-friction time of the "constant" model [Gyr]: 1 (a simple stated choice, no source)
DEFAULT_DF_CONSTANT_GYR: float = 1.0
#: circularity eta = j / j_circ(E) uniform in [eta_min, eta_max] [dimensionless]: [0, 1], a
#: simple stated choice with mean 0.5, near the peak of the circularities of infalling
#: satellites in cosmological simulations (Zentner et al. 2005; Khochfar & Burkert 2006; memory)
DEFAULT_ETA_MIN: float = 0.0
DEFAULT_ETA_MAX: float = 1.0
#: r_c(E) / r_vir (radius of the circular orbit of the same energy) uniform in
#: [rc_min, rc_max] [dimensionless]: [0.4, 1.0], a simple stated choice (no fitted source)
DEFAULT_RC_MIN: float = 0.4
DEFAULT_RC_MAX: float = 1.0

# --- binary hardening -----------------------------------------------------------------------
#: hardening model: "stellar" (Quinlan 1996 rate at the influence radius, Sesana & Khan 2015)
#: or "constant"
DEFAULT_HARDENING_MODE: str = "stellar"
#: dimensionless hardening rate H [dimensionless]: 15; hard binaries in scattering experiments
#: have H ~ 15-16 (Quinlan 1996) and 15-20 (Sesana, Haardt & Madau 2006) (memory)
DEFAULT_HARDENING_RATE: float = 15.0
#: hardening time of the "constant" model [Gyr]: 0.1 (a simple stated choice, no source)
DEFAULT_HARDENING_CONSTANT_GYR: float = 0.1
#: nuclear velocity dispersion over the host's circular velocity [dimensionless]: 1/sqrt(2),
#: exact for a singular isothermal sphere, V_c^2 = 2 sigma^2 (Binney & Tremaine 2008, §4.3.3b;
#: memory)
DEFAULT_SIGMA_OVER_VC: float = 1.0 / math.sqrt(2.0)

# --- gravitational-wave inspiral ------------------------------------------------------------
#: eccentricity e0 of the binary when GW emission takes over, uniform in [e0_min, e0_max]
#: [dimensionless]: [0, 0.9], a simple stated choice (no source); e0_min = e0_max fixes it
DEFAULT_E0_MIN: float = 0.0
DEFAULT_E0_MAX: float = 0.9

DF_MODES = ("bk08", "constant")
HARDENING_MODES = ("stellar", "constant")

# =============================================================================================
# Random-number columns and purposes
# =============================================================================================
#: number of uniforms per merging pair (columns of ``u``)
N_UNIFORMS: int = 3
#: column of ``u`` that sets the orbital circularity eta
U_CIRCULARITY: int = 0
#: column of ``u`` that sets the orbital energy r_c(E) / r_vir
U_ORBIT_ENERGY: int = 1
#: column of ``u`` that sets the binary eccentricity e0
U_ECCENTRICITY: int = 2
#: first purpose code of the dynamics block (0xD1A000 = 13 737 984)
DYNAMICS_PURPOSE_BASE: int = 0xD1A000
DYNAMICS_PURPOSES: dict[str, int] = {
    "circularity": DYNAMICS_PURPOSE_BASE + 1,
    "orbit_energy": DYNAMICS_PURPOSE_BASE + 2,
    "eccentricity": DYNAMICS_PURPOSE_BASE + 3,
}
_COLUMN_PURPOSES = ("circularity", "orbit_energy", "eccentricity")  # in column order

_G = G_KPC_KMS2_MSUN
#: Peters (1964) beta / (m1 m2 M) = 64 G^3 / (5 c^5), in kpc^3 (km/s) / Msun^3
_BETA_COEF = 64.0 / 5.0 * _G**3 / C_KMS**5


def draw_uniforms(keys, step: int = 0) -> np.ndarray:
    """The ``(n, N_UNIFORMS)`` uniforms of ``n`` merging pairs from their stream keys.

    Parameters
    ----------
    keys : array_like of uint64
        Stream keys of the pairs, e.g. ``rng.stream_keys(seed, bh_id)`` of the satellite's
        black hole (one key per pair).
    step : int, optional
        Counter distinguishing several merger events of the same key (default 0).

    Returns
    -------
    numpy.ndarray
        Shape ``(n, 3)``; column ``j`` is ``rng.uniform(keys, step, purpose_j)`` with the
        purposes of :data:`DYNAMICS_PURPOSES` in the order circularity, orbit energy,
        eccentricity.
    """
    k = np.asarray(keys, dtype=np.uint64).reshape(-1)
    return np.stack([rng.uniform(k, step, DYNAMICS_PURPOSES[p]) for p in _COLUMN_PURPOSES],
                    axis=1)


def _f64(*arrays):
    return np.broadcast_arrays(*(np.asarray(a, dtype=np.float64) for a in arrays))


def _check_bool(owner: str, name: str, value) -> None:
    if not isinstance(value, bool):
        _validate._fail(owner, name, "True or False", value)


def _check_range_pair(owner: str, lo_name: str, hi_name: str, lo, hi, lo_bound: float,
                      hi_bound: float, *, lo_open: bool = False, hi_open: bool = False):
    """Validate ``lo_bound <= lo <= hi <= hi_bound``; returns the floats."""
    lo = _validate.in_range(owner, lo_name, lo, lo_bound, hi_bound, lo_open=lo_open,
                            hi_open=hi_open)
    hi = _validate.in_range(owner, hi_name, hi, lo_bound, hi_bound, lo_open=lo_open,
                            hi_open=hi_open)
    if hi < lo:
        _validate._fail(owner, hi_name, f">= {lo_name} ({lo:g})", hi)
    return lo, hi


# =============================================================================================
# Stage 1: dynamical friction (Boylan-Kolchin, Ma & Quataert 2008)
# =============================================================================================
def bk08_time_ratio(mass_ratio, eta, rc_over_rvir) -> np.ndarray:
    """Merging time over the host's dynamical time, the fit of [BK08]_ eq. 5.

    Parameters
    ----------
    mass_ratio : array_like
        ``M_host / M_sat`` of the halo masses at infall (> 0; the fit was calibrated for
        ``0.025 <= M_sat/M_host <= 0.3``, memory, and is extrapolated outside).
    eta : array_like
        Orbital circularity ``j / j_circ(E)`` in [0, 1].
    rc_over_rvir : array_like
        ``r_c(E) / r_vir``, radius of the circular orbit with the satellite's orbital energy
        over the host's virial radius.

    Returns
    -------
    numpy.ndarray
        ``t_merge / tau_dyn``, float64, broadcast shape.
    """
    x, eta, rc = _f64(mass_ratio, eta, rc_over_rvir)
    # t/tau_dyn = A x^b / ln(1 + x) exp(c eta) (r_c/r_vir)^d, x = M_host/M_sat
    # (Boylan-Kolchin, Ma & Quataert 2008, MNRAS 383, 93, eq. 5; memory)
    return BK08_A * x**BK08_B / np.log1p(x) * np.exp(BK08_C * eta) * rc**BK08_D


@dataclass(frozen=True)
class DynamicalFriction:
    """Dynamical-friction time of a satellite sinking into its host halo.

    ``mode = "bk08"``: ``t_df = scale * tau_dyn * A (M_h/M_s)^b / ln(1 + M_h/M_s)
    * exp(c eta) * (r_c/r_vir)^d`` with ``A = 0.216, b = 1.3, c = 1.9, d = 1.0`` ([BK08]_
    eq. 5, memory; :func:`bk08_time_ratio`) and ``tau_dyn = r_vir / V_c(r_vir)`` of the host
    (BK08 write ``r_vir / V_vir``, memory). The circularity ``eta`` and ``r_c(E)/r_vir`` are
    drawn per pair, uniform in ``[eta_min, eta_max]`` and ``[rc_min, rc_max]``.
    ``mode = "constant"``: ``t_df = scale * constant_gyr``.

    Parameters
    ----------
    mode : {"bk08", "constant"}
        Friction model: the Boylan-Kolchin, Ma & Quataert (2008) fit, or a constant time.
    constant_gyr : float
        Dynamical-friction time of the "constant" model, Gyr (>= 0; default 1, a stated choice).
    eta_min : float
        Lowest orbital circularity j/j_circ(E) drawn (uniform), in [0, 1] (default 0).
    eta_max : float
        Highest orbital circularity drawn, in [eta_min, 1] (default 1; eta_min = eta_max fixes it).
    rc_min : float
        Lowest r_c(E)/r_vir drawn (uniform), > 0 (default 0.4, a stated choice).
    rc_max : float
        Highest r_c(E)/r_vir drawn, >= rc_min (default 1.0; rc_min = rc_max fixes it).
    scale : float
        Factor multiplying the dynamical-friction time, >= 0 (default 1).
    enabled : bool
        False switches the stage off (time 0).

    Raises
    ------
    bhgrow.errors.ParameterError
        ``` `scale` of DynamicalFriction must be >= 0; got -1 ```
    """

    mode: str = DEFAULT_DF_MODE
    constant_gyr: float = DEFAULT_DF_CONSTANT_GYR
    eta_min: float = DEFAULT_ETA_MIN
    eta_max: float = DEFAULT_ETA_MAX
    rc_min: float = DEFAULT_RC_MIN
    rc_max: float = DEFAULT_RC_MAX
    scale: float = 1.0
    enabled: bool = True

    def __post_init__(self) -> None:
        owner = type(self).__name__
        _validate.one_of(owner, "mode", self.mode, DF_MODES)
        set_ = object.__setattr__
        set_(self, "constant_gyr", _validate.non_negative(owner, "constant_gyr",
                                                          self.constant_gyr))
        lo, hi = _check_range_pair(owner, "eta_min", "eta_max", self.eta_min, self.eta_max,
                                   0.0, 1.0)
        set_(self, "eta_min", lo)
        set_(self, "eta_max", hi)
        lo = _validate.positive(owner, "rc_min", self.rc_min)
        hi = _validate.positive(owner, "rc_max", self.rc_max)
        if hi < lo:
            _validate._fail(owner, "rc_max", f">= rc_min ({lo:g})", self.rc_max)
        set_(self, "rc_min", lo)
        set_(self, "rc_max", hi)
        set_(self, "scale", _validate.non_negative(owner, "scale", self.scale))
        _check_bool(owner, "enabled", self.enabled)

    def circularity(self, u) -> np.ndarray:
        """Circularity ``eta = eta_min + (eta_max - eta_min) u`` from uniforms ``u``."""
        return self.eta_min + (self.eta_max - self.eta_min) * np.asarray(u, dtype=np.float64)

    def orbit_energy(self, u) -> np.ndarray:
        """``r_c(E)/r_vir = rc_min + (rc_max - rc_min) u`` from uniforms ``u``."""
        return self.rc_min + (self.rc_max - self.rc_min) * np.asarray(u, dtype=np.float64)

    def time_gyr(self, m_host, m_sat, r_vir_kpc, v_c_kms, u1, u2) -> np.ndarray:
        """Dynamical-friction time of each merging pair, Gyr.

        Parameters
        ----------
        m_host : array_like
            Host halo mass at infall, Msun (> 0).
        m_sat : array_like
            Satellite halo mass at infall, Msun (> 0).
        r_vir_kpc : array_like
            Host virial radius, physical kpc.
        v_c_kms : array_like
            Host circular velocity at ``r_vir``, km/s.
        u1 : array_like
            Uniforms in [0, 1) setting the circularity (:meth:`circularity`).
        u2 : array_like
            Uniforms in [0, 1) setting ``r_c(E)/r_vir`` (:meth:`orbit_energy`).

        Returns
        -------
        numpy.ndarray
            ``t_df`` in Gyr, float64, broadcast shape; 0 if the stage is disabled.
        """
        m_host, m_sat, r_vir, v_c, u1, u2 = _f64(m_host, m_sat, r_vir_kpc, v_c_kms, u1, u2)
        if not self.enabled:
            return np.zeros(m_host.shape)
        if self.mode == "constant":
            return np.full(m_host.shape, self.scale * self.constant_gyr)
        # tau_dyn = r_vir / V_c(r_vir)  (Boylan-Kolchin, Ma & Quataert 2008, §2; memory)
        tau_dyn = r_vir / v_c * KPC_PER_KMS_GYR
        ratio = bk08_time_ratio(m_host / m_sat, self.circularity(u1), self.orbit_energy(u2))
        return self.scale * tau_dyn * ratio


# =============================================================================================
# Stage 2: binary hardening
# =============================================================================================
def hardening_radius_kpc(m1, m2, sigma_kms) -> np.ndarray:
    """Hardening radius ``a_h = G mu / (4 sigma^2)`` with ``mu = m1 m2 / (m1 + m2)``, kpc.

    The separation below which the binary is hard and shrinks by scattering stars
    ([MM05]_, with ``mu`` the reduced mass; memory).
    """
    m1, m2, s = _f64(m1, m2, sigma_kms)
    # a_h = G mu / (4 sigma^2)  (Merritt & Milosavljevic 2005, Living Rev. Relativ. 8, 8; memory)
    return _G * (m1 * m2 / (m1 + m2)) / (4.0 * s * s)


def influence_radius_kpc(m_bh, sigma_kms) -> np.ndarray:
    """Influence radius ``r_inf = G M / sigma^2`` of a (binary) black hole of mass ``M``, kpc.

    For a singular isothermal sphere this is also the radius enclosing a stellar mass ``2 M``,
    the definition used by [SK15]_ (memory).
    """
    m, s = _f64(m_bh, sigma_kms)
    # r_inf = G M / sigma^2  (Peebles 1972, ApJ 178, 371; Merritt & Milosavljevic 2005; memory)
    return _G * m / (s * s)


def sis_density_msun_kpc3(r_kpc, sigma_kms) -> np.ndarray:
    """Density ``rho = sigma^2 / (2 pi G r^2)`` of a singular isothermal sphere, Msun/kpc^3."""
    r, s = _f64(r_kpc, sigma_kms)
    # rho(r) = sigma^2 / (2 pi G r^2)  (singular isothermal sphere, Binney & Tremaine 2008 §4.3.3)
    return s * s / (2.0 * math.pi * _G * r * r)


def _ecc_factor(e) -> np.ndarray:
    """Peters (1964) enhancement of the orbit-averaged GW energy loss, ``F(e)``."""
    e2 = e * e
    # F(e) = (1 + 73/24 e^2 + 37/96 e^4) / (1 - e^2)^(7/2)  (Peters 1964, Phys. Rev. 136, B1224)
    return (1.0 + 73.0 / 24.0 * e2 + 37.0 / 96.0 * e2 * e2) / ((1.0 - e) * (1.0 + e)) ** 3.5


@dataclass(frozen=True)
class Hardening:
    """Hardening of the bound binary from ``a_h`` to the start of the GW-driven inspiral.

    ``mode = "stellar"``: the binary shrinks by three-body scattering of stars at the
    constant dimensionless rate ``H`` of [Q96]_, ``d(1/a)/dt = H G rho / sigma``, with
    ``rho`` and ``sigma`` of the stars at the binary's influence radius, as in [SK15]_. The
    stage starts at the hardening radius ``a_h = G mu / (4 sigma^2)`` ([MM05]_) and ends at
    ``a_gw`` where the Peters (1964) GW shrinking rate equals the stellar one
    (:meth:`transition_separation_kpc`), so

    ``t_hard = scale * sigma / (H G rho) * (1/a_gw - 1/a_h)``  (0 if ``a_gw >= a_h``).

    Without a stellar density the nucleus is a singular isothermal sphere of dispersion
    ``sigma``: ``r_inf = G M / sigma^2`` and ``rho = sigma^2 / (2 pi G r_inf^2)``. The
    eccentricity is held at the ``e`` passed in (the ``e0`` of the inspiral).
    ``mode = "constant"``: ``t_hard = scale * constant_gyr``; the inspiral still starts at
    ``a_gw``.

    Parameters
    ----------
    mode : {"stellar", "constant"}
        Hardening model: stellar scattering (Quinlan 1996; Sesana & Khan 2015) or a constant time.
    hardening_rate : float
        Dimensionless stellar hardening rate H > 0 (default 15; Quinlan 1996, memory).
    constant_gyr : float
        Hardening time of the "constant" model, Gyr (>= 0; default 0.1, a stated choice).
    scale : float
        Factor multiplying the hardening time, >= 0 (default 1).
    enabled : bool
        False switches the stage off (time 0; the inspiral still starts at a_gw).

    Notes
    -----
    Splitting the shrinking into a purely stellar and a purely GW stage overestimates the
    time of the joint evolution ``da/dt = -H G rho a^2 / sigma - beta F(e) / a^3``: for a
    circular binary with ``a_h >> a_gw`` the two stages take ``(1 + 1/4) sigma / (H G rho
    a_gw)``, the joint equation ``pi / (5 sin(4 pi / 5)) = 1.069`` times ``sigma / (H G rho
    a_gw)``: the split is 17 % longer.

    Raises
    ------
    bhgrow.errors.ParameterError
        ``` `hardening_rate` of Hardening must be > 0; got 0 ```
    """

    mode: str = DEFAULT_HARDENING_MODE
    hardening_rate: float = DEFAULT_HARDENING_RATE
    constant_gyr: float = DEFAULT_HARDENING_CONSTANT_GYR
    scale: float = 1.0
    enabled: bool = True

    def __post_init__(self) -> None:
        owner = type(self).__name__
        _validate.one_of(owner, "mode", self.mode, HARDENING_MODES)
        set_ = object.__setattr__
        set_(self, "hardening_rate", _validate.positive(owner, "hardening_rate",
                                                        self.hardening_rate))
        set_(self, "constant_gyr", _validate.non_negative(owner, "constant_gyr",
                                                          self.constant_gyr))
        set_(self, "scale", _validate.non_negative(owner, "scale", self.scale))
        _check_bool(owner, "enabled", self.enabled)

    @staticmethod
    def _density(m1, m2, sigma, rho_star):
        if rho_star is None:
            return sis_density_msun_kpc3(influence_radius_kpc(m1 + m2, sigma), sigma)
        return np.asarray(rho_star, dtype=np.float64)

    def transition_separation_kpc(self, m1, m2, sigma_kms, rho_star_msun_kpc3=None,
                                  e=0.0) -> np.ndarray:
        """Separation where GW emission takes over from stellar hardening, kpc.

        ``a_gw = min(a_*/gw, a_h)`` with ``a_*/gw`` where ``H G rho a^2 / sigma`` ([Q96]_)
        equals the Peters (1964) rate ``(64/5) G^3 m1 m2 M F(e) / (c^5 a^3)``:

        ``a_*/gw^5 = 64 G^2 sigma m1 m2 M F(e) / (5 c^5 H rho)``  ([SK15]_, memory).

        Used in both modes (it does not depend on ``scale`` or ``enabled``).

        Parameters
        ----------
        m1 : array_like
            Mass of one black hole, Msun (> 0).
        m2 : array_like
            Mass of the other, Msun (> 0).
        sigma_kms : array_like
            Stellar velocity dispersion of the nucleus, km/s.
        rho_star_msun_kpc3 : array_like, optional
            Stellar density at the influence radius, Msun/kpc^3 (default: singular
            isothermal sphere, :func:`sis_density_msun_kpc3` at :func:`influence_radius_kpc`).
        e : array_like, optional
            Binary eccentricity in [0, 1) (default 0).

        Returns
        -------
        numpy.ndarray
            ``a_gw`` in kpc, float64, broadcast shape.
        """
        m1, m2, s, e = _f64(m1, m2, sigma_kms, e)
        rho = self._density(m1, m2, s, rho_star_msun_kpc3)
        mtot = m1 + m2
        # a^5 = 64 G^2 sigma m1 m2 M F(e) / (5 c^5 H rho): Quinlan (1996) stellar rate equal to
        # the Peters (1964) GW rate (Sesana & Khan 2015, MNRAS 454, L66; memory)
        a5 = (64.0 / 5.0) * _G**2 * s * m1 * m2 * mtot * _ecc_factor(e) / (
            C_KMS**5 * self.hardening_rate * rho)
        return np.minimum(a5**0.2, hardening_radius_kpc(m1, m2, s))

    def time_gyr(self, m1, m2, sigma_kms, rho_star_msun_kpc3=None, e=0.0) -> np.ndarray:
        """Hardening time of each binary, Gyr.

        Parameters
        ----------
        m1, m2, sigma_kms, rho_star_msun_kpc3, e
            As in :meth:`transition_separation_kpc`.

        Returns
        -------
        numpy.ndarray
            ``t_hard`` in Gyr, float64, broadcast shape; 0 if the stage is disabled.
        """
        m1, m2, s, e = _f64(m1, m2, sigma_kms, e)
        if not self.enabled:
            return np.zeros(m1.shape)
        if self.mode == "constant":
            return np.full(m1.shape, self.scale * self.constant_gyr)
        rho = self._density(m1, m2, s, rho_star_msun_kpc3)
        a_h = hardening_radius_kpc(m1, m2, s)
        a_gw = self.transition_separation_kpc(m1, m2, s, rho, e)
        # d(1/a)/dt = H G rho / sigma  (Quinlan 1996, New Astron. 1, 35; memory), integrated
        # from a_h to a_gw at constant rho, sigma, H
        t = s / (self.hardening_rate * _G * rho) * (1.0 / a_gw - 1.0 / a_h)
        return self.scale * np.maximum(t, 0.0) * KPC_PER_KMS_GYR


# =============================================================================================
# Stage 3: gravitational-wave inspiral (Peters 1964)
# =============================================================================================
def peters_rates(a_kpc, e, m1, m2):
    """Orbit-averaged ``da/dt`` (kpc/Gyr) and ``de/dt`` (1/Gyr) by GW emission ([P64]_).

    Parameters
    ----------
    a_kpc : array_like
        Semi-major axis, kpc.
    e : array_like
        Eccentricity in [0, 1).
    m1, m2 : array_like
        Masses, Msun.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        ``da/dt`` and ``de/dt`` (both <= 0), broadcast shape.
    """
    a, e, m1, m2 = _f64(a_kpc, e, m1, m2)
    beta = _BETA_COEF * m1 * m2 * (m1 + m2)  # kpc^3 km/s
    e2 = e * e
    omy2 = (1.0 - e) * (1.0 + e)
    # da/dt = -(64/5) G^3 m1 m2 M / (c^5 a^3 (1-e^2)^(7/2)) (1 + 73/24 e^2 + 37/96 e^4)
    # (Peters 1964, Phys. Rev. 136, B1224, eq. 5.6)
    dadt = -beta * _ecc_factor(e) / a**3 / KPC_PER_KMS_GYR
    # de/dt = -(304/15) e G^3 m1 m2 M / (c^5 a^4 (1-e^2)^(5/2)) (1 + 121/304 e^2)  (eq. 5.7)
    dedt = -(19.0 / 12.0) * beta * e * (1.0 + 121.0 / 304.0 * e2) / (
        a**4 * omy2**2.5) / KPC_PER_KMS_GYR
    return dadt, dedt


def _enhancement_exact(y0: float) -> float:
    """``T(a0, e0) / (T_c(a0) (1 - e0^2)^(7/2))`` at ``y0 = sqrt(1 - e0^2)`` by quadrature.

    Peters (1964) eqs. 5.11-5.14: along the orbit ``a(e) = c0 e^(12/19) / (1 - e^2)
    (1 + 121/304 e^2)^(870/2299)`` and ``T = (12/19) c0^4 / beta * I(e0)`` with
    ``I = int_0^e0 e^(29/19) (1 + 121/304 e^2)^(1181/2299) / (1 - e^2)^(3/2) de``; with
    ``T_c = a0^4 / (4 beta)`` the ratio is ``(48/19) y0 e0^(-48/19) g(e0)^(-3480/2299) I``.
    """
    e0 = math.sqrt((1.0 - y0) * (1.0 + y0))
    def phi(e):
        return (1.0 + 121.0 / 304.0 * e * e) ** (1181.0 / 2299.0) / ((1.0 - e) * (1.0 + e)) ** 1.5
    from scipy import integrate

    # I(e0) with the algebraic weight e^(29/19) handled exactly by QUADPACK (QAWS)
    val, _ = integrate.quad(phi, 0.0, e0, weight="alg", wvar=(29.0 / 19.0, 0.0), epsabs=0.0,
                            epsrel=1e-11, limit=500)
    g0 = 1.0 + 121.0 / 304.0 * e0 * e0
    return 48.0 / 19.0 * y0 * e0 ** (-48.0 / 19.0) * g0 ** (-3480.0 / 2299.0) * val


_N_CHEB = 32


@lru_cache(maxsize=1)
def _enhancement_coefficients() -> np.ndarray:
    """Chebyshev coefficients (in ``x = 2 y - 1``) of the enhancement on ``y`` in [0, 1].

    The enhancement is analytic in ``y = sqrt(1 - e^2)`` on [0, 1] (a power series in ``e^2``
    near ``e = 0``, and ``y I(e)`` regular as ``y -> 0``), so 32 Chebyshev nodes give a
    relative accuracy of ~1e-9, limited by the quadrature. Built once, on first use.
    """
    k = np.arange(_N_CHEB)
    x = np.cos(math.pi * (k + 0.5) / _N_CHEB)  # Chebyshev-Gauss nodes, endpoints excluded
    f = np.array([_enhancement_exact(0.5 * (xi + 1.0)) for xi in x])
    return _cheb.chebfit(x, f, _N_CHEB - 1)


def peters_enhancement(e0) -> np.ndarray:
    """Ratio ``T(a0, e0) / (T_c(a0) (1 - e0^2)^(7/2))`` of the Peters (1964) coalescence time.

    1 at ``e0 = 0``; it rises to ``768/425`` as ``e0 -> 1`` ([P64]_ eq. 5.14 limit; the table
    is not forced to it). Exact quadrature of Peters' equations interpolated in
    ``sqrt(1 - e0^2)`` (relative accuracy ~1e-9).

    Parameters
    ----------
    e0 : array_like
        Initial eccentricity in [0, 1].

    Returns
    -------
    numpy.ndarray
        The enhancement, float64, shape of ``e0``.
    """
    e0 = np.asarray(e0, dtype=np.float64)
    y = np.sqrt(np.clip((1.0 - e0) * (1.0 + e0), 0.0, 1.0))
    return _cheb.chebval(2.0 * y - 1.0, _enhancement_coefficients())


def peters_circular_time_gyr(a_kpc, m1, m2) -> np.ndarray:
    """Coalescence time of a circular binary by GW emission, Gyr.

    ``T_c = 5 c^5 a^4 / (256 G^3 m1 m2 (m1 + m2))`` ([P64]_ eq. 5.10).

    Parameters
    ----------
    a_kpc : array_like
        Initial separation, kpc.
    m1, m2 : array_like
        Masses, Msun.

    Returns
    -------
    numpy.ndarray
        ``T_c`` in Gyr, float64, broadcast shape.
    """
    a, m1, m2 = _f64(a_kpc, m1, m2)
    # T_c = a^4 / (4 beta), beta = (64/5) G^3 m1 m2 M / c^5  (Peters 1964, eq. 5.9-5.10)
    return a**4 / (4.0 * _BETA_COEF * m1 * m2 * (m1 + m2)) * KPC_PER_KMS_GYR


def peters_time_gyr(a0_kpc, e0, m1, m2) -> np.ndarray:
    """Coalescence time of an eccentric binary by GW emission ([P64]_), Gyr.

    ``T = T_c(a0) (1 - e0^2)^(7/2) * peters_enhancement(e0)``: the exact solution of the
    orbit-averaged coupled equations for ``a`` and ``e`` (:func:`peters_enhancement`).

    Parameters
    ----------
    a0_kpc : array_like
        Initial semi-major axis, kpc.
    e0 : array_like
        Initial eccentricity in [0, 1].
    m1, m2 : array_like
        Masses, Msun.

    Returns
    -------
    numpy.ndarray
        ``T`` in Gyr, float64, broadcast shape.
    """
    a, e, m1, m2 = _f64(a0_kpc, e0, m1, m2)
    omy2 = np.clip((1.0 - e) * (1.0 + e), 0.0, 1.0)
    return peters_circular_time_gyr(a, m1, m2) * omy2**3.5 * peters_enhancement(e)


@dataclass(frozen=True)
class GWInspiral:
    """Coalescence of the binary by gravitational-wave emission (Peters 1964).

    ``t_gw = scale * T(a0, e0)`` from :func:`peters_time_gyr`, the exact solution of the
    orbit-averaged coupled ``da/dt``, ``de/dt`` of [P64]_ (Peters' quadrature, tabulated once);
    the published fit of [M21]_ agrees with it to ~2 % for ``e0 <= 0.999``. The eccentricity
    when GW emission takes over is drawn per pair, uniform in ``[e0_min, e0_max]``.

    Parameters
    ----------
    e0_min : float
        Lowest binary eccentricity drawn (uniform), in [0, 1) (default 0).
    e0_max : float
        Highest binary eccentricity drawn, in [e0_min, 1) (default 0.9; e0_min = e0_max fixes it).
    scale : float
        Factor multiplying the GW coalescence time, >= 0 (default 1).
    enabled : bool
        False switches the stage off (time 0).

    Raises
    ------
    bhgrow.errors.ParameterError
        ``` `e0_max` of GWInspiral must be in [0, 1); got 1.0 ```
    """

    e0_min: float = DEFAULT_E0_MIN
    e0_max: float = DEFAULT_E0_MAX
    scale: float = 1.0
    enabled: bool = True

    def __post_init__(self) -> None:
        owner = type(self).__name__
        lo, hi = _check_range_pair(owner, "e0_min", "e0_max", self.e0_min, self.e0_max, 0.0,
                                   1.0, hi_open=True)
        object.__setattr__(self, "e0_min", lo)
        object.__setattr__(self, "e0_max", hi)
        object.__setattr__(self, "scale", _validate.non_negative(owner, "scale", self.scale))
        _check_bool(owner, "enabled", self.enabled)

    def eccentricity(self, u) -> np.ndarray:
        """Eccentricity ``e0 = e0_min + (e0_max - e0_min) u`` from uniforms ``u``."""
        return self.e0_min + (self.e0_max - self.e0_min) * np.asarray(u, dtype=np.float64)

    def time_gyr(self, a0_kpc, e0, m1, m2) -> np.ndarray:
        """GW coalescence time of each binary, Gyr.

        Parameters
        ----------
        a0_kpc : array_like
            Semi-major axis when GW emission takes over, kpc.
        e0 : array_like
            Eccentricity then, in [0, 1] (e.g. :meth:`eccentricity` of uniforms).
        m1, m2 : array_like
            Black-hole masses, Msun (> 0).

        Returns
        -------
        numpy.ndarray
            ``t_gw`` in Gyr, float64, broadcast shape; 0 if the stage is disabled.
        """
        a, e, m1, m2 = _f64(a0_kpc, e0, m1, m2)
        if not self.enabled:
            return np.zeros(a.shape)
        return self.scale * peters_time_gyr(a, e, m1, m2)


# =============================================================================================
# The clock
# =============================================================================================
class DelayParts(NamedTuple):
    """Delay of each merging pair by stage, Gyr, and the state the inspiral starts from.

    Attributes
    ----------
    t_df : numpy.ndarray
        Dynamical-friction time, Gyr.
    t_hard : numpy.ndarray
        Binary hardening time, Gyr.
    t_gw : numpy.ndarray
        GW coalescence time, Gyr.
    total : numpy.ndarray
        ``t_df + t_hard + t_gw``, Gyr.
    e0 : numpy.ndarray
        Eccentricity of the binary when GW emission takes over.
    a_gw_kpc : numpy.ndarray
        Separation when GW emission takes over, kpc.
    """

    t_df: np.ndarray
    t_hard: np.ndarray
    t_gw: np.ndarray
    total: np.ndarray
    e0: np.ndarray
    a_gw_kpc: np.ndarray


@dataclass(frozen=True)
class MergerClock:
    """Delay between a halo merger and the coalescence of the two black holes.

    ``total = t_df + t_hard + t_gw``: dynamical friction of the satellite in the host halo
    (:class:`DynamicalFriction`), then hardening of the bound binary (:class:`Hardening`) in a
    nucleus of dispersion ``sigma = sigma_over_vc * V_c`` (host halo), then the Peters (1964)
    inspiral (:class:`GWInspiral`) from ``a_gw`` (``Hardening.transition_separation_kpc``)
    with eccentricity ``e0``. A stage is replaced by giving any object with the same methods:
    ``friction.time_gyr``; ``hardening.time_gyr`` and ``hardening.transition_separation_kpc``;
    ``inspiral.time_gyr`` and ``inspiral.eccentricity``.

    Parameters
    ----------
    friction : DynamicalFriction
        Dynamical-friction stage (Boylan-Kolchin, Ma & Quataert 2008).
    hardening : Hardening
        Binary-hardening stage (Quinlan 1996 rate at the influence radius, or a constant).
    inspiral : GWInspiral
        Gravitational-wave stage (Peters 1964 with eccentricity).
    sigma_over_vc : float
        Nuclear velocity dispersion over the host halo's V_c, > 0 (default 1/sqrt(2), SIS).

    Raises
    ------
    bhgrow.errors.ParameterError
        ``` `sigma_over_vc` of MergerClock must be > 0; got 0 ```
    """

    friction: DynamicalFriction = field(default_factory=DynamicalFriction)
    hardening: Hardening = field(default_factory=Hardening)
    inspiral: GWInspiral = field(default_factory=GWInspiral)
    sigma_over_vc: float = DEFAULT_SIGMA_OVER_VC

    def __post_init__(self) -> None:
        owner = type(self).__name__
        for name, methods in (("friction", ("time_gyr",)),
                              ("hardening", ("time_gyr", "transition_separation_kpc")),
                              ("inspiral", ("time_gyr", "eccentricity"))):
            obj = getattr(self, name)
            if not all(callable(getattr(obj, m, None)) for m in methods):
                _validate._fail(owner, name, "an object with " + " and ".join(methods), obj)
        object.__setattr__(self, "sigma_over_vc",
                           _validate.positive(owner, "sigma_over_vc", self.sigma_over_vc))

    def delay_gyr(self, m_host_halo, m_sat_halo, r_vir_kpc, v_c_kms, m_bh1, m_bh2,
                  u) -> DelayParts:
        """Delays of ``n`` merging pairs, by stage.

        Parameters
        ----------
        m_host_halo : array_like, shape (n,)
            Host halo mass at infall, Msun.
        m_sat_halo : array_like, shape (n,)
            Satellite halo mass at infall, Msun.
        r_vir_kpc : array_like, shape (n,)
            Host virial radius, physical kpc.
        v_c_kms : array_like, shape (n,)
            Host circular velocity at ``r_vir``, km/s.
        m_bh1 : array_like, shape (n,)
            Mass of the host's black hole, Msun (> 0).
        m_bh2 : array_like, shape (n,)
            Mass of the satellite's black hole, Msun (> 0).
        u : array_like, shape (n, 3)
            Uniforms in [0, 1) (e.g. :func:`draw_uniforms`): column :data:`U_CIRCULARITY` (0)
            sets the circularity, :data:`U_ORBIT_ENERGY` (1) ``r_c(E)/r_vir`` and
            :data:`U_ECCENTRICITY` (2) the binary eccentricity ``e0``.

        Returns
        -------
        DelayParts
            ``t_df, t_hard, t_gw, total`` in Gyr, ``e0`` and ``a_gw_kpc``, each shape (n,).
        """
        u = np.asarray(u, dtype=np.float64)
        if u.ndim != 2 or u.shape[1] != N_UNIFORMS:
            raise ValueError(f"u must have shape (n, {N_UNIFORMS}); got {u.shape}")
        m_host, m_sat, r_vir, v_c, m1, m2 = _f64(m_host_halo, m_sat_halo, r_vir_kpc, v_c_kms,
                                                 m_bh1, m_bh2)
        n = u.shape[0]
        m_host, m_sat, r_vir, v_c, m1, m2 = (np.broadcast_to(a, (n,)) for a in
                                             (m_host, m_sat, r_vir, v_c, m1, m2))
        t_df = np.asarray(self.friction.time_gyr(m_host, m_sat, r_vir, v_c,
                                                 u[:, U_CIRCULARITY], u[:, U_ORBIT_ENERGY]),
                          dtype=np.float64)
        # sigma = V_c / sqrt(2) for a singular isothermal sphere (Binney & Tremaine 2008; memory)
        sigma = self.sigma_over_vc * v_c
        e0 = np.asarray(self.inspiral.eccentricity(u[:, U_ECCENTRICITY]), dtype=np.float64)
        t_hard = np.asarray(self.hardening.time_gyr(m1, m2, sigma, None, e0), dtype=np.float64)
        a_gw = np.asarray(self.hardening.transition_separation_kpc(m1, m2, sigma, None, e0),
                          dtype=np.float64)
        t_gw = np.asarray(self.inspiral.time_gyr(a_gw, e0, m1, m2), dtype=np.float64)
        return DelayParts(t_df, t_hard, t_gw, t_df + t_hard + t_gw, e0, a_gw)
