"""Gravitational waves from black-hole coalescences: LISA noise and SNR, observed and
detection rates, and the nHz background.

Contents (DESIGN §7)
--------------------
chirp mass
    :func:`chirp_mass_obs` gives the redshifted (observed-frame) chirp mass
    ``(1 + z) M_c``; the source-frame chirp mass is
    :func:`bhgrow.physics.remnants.chirp_mass`, re-exported here as :func:`chirp_mass`.
LISA noise
    :class:`LISANoise`: the sky-averaged sensitivity ``S_n(f)`` of Robson, Cornish & Liu
    (2019) [RCL19]_ (their analytic fit, eq. 13, with the noise budget of eqs. 10-11) plus,
    optionally, the galactic confusion noise of their eq. 14 with the Table 1 coefficients
    for a mission of 0.5, 1, 2 or 4 years.
SNR
    :func:`inspiral_snr` (Newtonian inspiral up to the Schwarzschild ISCO, default) and
    :func:`imr_snr` (the phenomenological inspiral-merger-ringdown amplitude "PhenomA" of
    Ajith et al. 2008 [A08]_, Table I coefficients as corrected in the erratum
    [A08e]_), both sky-, polarisation- and inclination-averaged in the observer frame
    (redshifted masses, luminosity distance). :func:`snr_observed_frame` is the same
    calculation for given observed-frame masses and luminosity distance.
rates
    :func:`observed_rate_per_yr` turns a weighted merger catalogue into the observed
    (detector-frame, full-sky) rate ``dN/dt_obs = int R(z)/(1+z) dV_c/dz dz`` per redshift
    bin; :func:`detection_rate_per_yr` restricts it to events above an SNR threshold.
nHz background
    :func:`background_hc` and :func:`hc_at_1yr`: characteristic strain of the background
    from circular, GW-driven binaries (Phinney 2001 [P01]_); :func:`background_table` puts
    it in a table with columns ``f_hz`` and ``h_c``, the content of
    ``tables/gw_background.ecsv``.

Conventions and derivations
---------------------------
Sky-averaged SNR. For a source at luminosity distance ``D_L`` with redshifted chirp mass
``M_cz = (1+z) M_c`` the leading-order (stationary-phase) Fourier amplitude of the ``+``
polarisation of a face-on binary is ([CF94]_, [RCL19]_ eq. 20 (memory))::

    A(f) = sqrt(5/24) pi^(-2/3) (G M_cz)^(5/6) / (c^(3/2) D_L) f^(-7/6)

with ``h_+ = A (1 + cos^2 i)/2`` and ``h_x = A cos i``. The sensitivity of [RCL19]_ already
contains the average of the detector response over sky position and polarisation angle,
``S_n = P_n / R`` with ``R ~ 3/10`` at low frequency (two Michelson channels). Averaging
``|h_+|^2 + |h_x|^2`` over the inclination gives ``(7/15 + 1/3) A^2 = (4/5) A^2``, so::

    rho^2 = 4 int |h|^2 / S_n df = (16/5) int A(f)^2 / S_n(f) df        ([RCL19]_, memory)

For the inspiral this is ``(2/3) pi^(-4/3) (G M_cz)^(5/3) / (c^3 D_L^2) int f^(-7/3)/S_n df``:
the mass and distance factor out, and the noise integral is tabulated once per noise model
(cumulative integrals of ``f^(-7/3)/S_n`` and ``f^(-4/3)/S_n`` on a fine log-frequency grid),
so the SNR of any number of events costs one spline evaluation each. The PhenomA amplitude
has the same Newtonian inspiral branch (``C (f/f_merg)^(-7/6) = A(f)``), an ``f^(-2/3)``
merger branch (tabulated the same way) and a Lorentzian ringdown, integrated per event with
Gauss-Legendre quadrature.

Frequency range. The band is [:data:`F_MIN_HZ`, :data:`F_MAX_HZ`] = [1e-5, 1] Hz (the range of
the RCL19 fit in their figures; below it the acceleration noise grows as ``f^-6``, above it
the arm response as ``f^2``, so the SNR integrand is negligible outside). By default an event
is observed from ``T_obs`` (the mission length) before coalescence, at the Newtonian
frequency ``f = (1/pi) (5/(256 T_obs))^(3/8) (G M_cz/c^3)^(-5/8)`` (Peters 1964 [P64]_), up
to the GW frequency of the Schwarzschild ISCO ``f_ISCO = c^3 / (6^(3/2) pi G M_z)``
(inspiral) or the PhenomA cut-off frequency (IMR). Events are taken to coalesce during the
mission; an event at ``z = 0`` has ``D_L = 0`` and infinite SNR.

Observed rate. Every merger in the catalogue carries the comoving number density
``weight_mpc3`` [Mpc^-3] of forests that its forest stands for; each forest history happens
once, so the event stands for ``weight_mpc3`` coalescences per comoving Mpc^3 over all of
cosmic time. In a redshift bin [z_lo, z_hi] the comoving rate density is
``R = sum(w) / (t(z_lo) - t(z_hi))`` [Mpc^-3 Gyr^-1] (cosmic time ``t``); taking ``R``
constant in the bin, the observed rate is ``R int dV_c/dz / (1+z) dz`` (the ``1/(1+z)`` is
the time dilation of the observer's clock), full sky. The volume integral is done with
Gauss-Legendre nodes in ``ln(1+z)`` (``dz/(1+z) = d ln(1+z)``).

Background. Phinney (2001) [P01]_ eq. 5 (memory): the energy density of the background today
equals the sum over sources of the energy they radiated, redshifted,
``h_c^2(f) = 4 G / (pi c^2 f^2) int dz N(z) / (1+z) (dE/d ln f_r)`` at ``f_r = f (1+z)``,
with ``N(z) dz`` the comoving number density of coalescences in ``dz``. For a catalogue,
``N(z) dz -> sum_i w_i delta(z - z_i)`` (same weight argument as above), and circular
GW-driven binaries radiate ``dE/d ln f_r = (pi G)^(2/3) M_c^(5/3) f_r^(2/3) / 3``
([P01]_ eq. 7, memory; source-frame chirp mass), so::

    h_c^2(f) = 4 G^(5/3) / (3 pi^(1/3) c^2) f^(-4/3) sum_i w_i M_c,i^(5/3) (1 + z_i)^(-1/3)

i.e. ``h_c = A_yr (f yr)^(-2/3)``. With total masses given, each binary stops contributing
above its redshifted ISCO frequency.

Units at the boundary: inputs and outputs are plain float64 arrays with the units in the
argument names (Msun, Mpc, Hz, yr); internally cgs from :mod:`bhgrow.constants`, except the
LISA noise budget, written in SI as published.

References
----------
.. [RCL19] Robson T., Cornish N. J., Liu C., 2019, Class. Quantum Grav., 36, 105011
   (arXiv:1803.01944), "The construction and use of LISA sensitivity curves"
.. [A08] Ajith P. et al., 2008, Phys. Rev. D, 77, 104017 (arXiv:0710.2335)
.. [A08e] Ajith P. et al., 2009, Phys. Rev. D, 79, 129901 (erratum to [A08]_)
.. [CF94] Cutler C., Flanagan E. E., 1994, Phys. Rev. D, 49, 2658
.. [P64] Peters P. C., 1964, Phys. Rev., 136, B1224
.. [P01] Phinney E. S., 2001, arXiv:astro-ph/0108028, "A practical theorem on gravitational
   wave backgrounds"
.. [Hogg99] Hogg D. W., 1999, arXiv:astro-ph/9905116

Equation numbers and coefficient tables were written from memory, marked "(memory)".
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np

from . import _validate
from .constants import C_CGS, G_CGS, GYR_S, KPC_CM, MPC_KPC, MSUN_G, YR_S
from .errors import BhgrowInputError, ParameterError
from .physics.remnants import chirp_mass

__all__ = [
    "F_MIN_HZ",
    "F_MAX_HZ",
    "F_1YR_HZ",
    "LISA_ARM_M",
    "LISA_F_STAR_HZ",
    "CONFUSION_COEFFICIENTS",
    "PHENOM_A_COEFFICIENTS",
    "DEFAULT_SNR_THRESHOLD",
    "DEFAULT_BACKGROUND_F_HZ",
    "chirp_mass",
    "chirp_mass_obs",
    "LISANoise",
    "f_isco_hz",
    "f_at_time_to_merger_hz",
    "phenom_a_frequencies_hz",
    "phenom_a_amplitude",
    "snr_observed_frame",
    "inspiral_snr",
    "imr_snr",
    "detections",
    "rate_density_per_mpc3_gyr",
    "observed_rate_per_yr",
    "detection_rate_per_yr",
    "background_hc",
    "hc_at_1yr",
    "background_table",
]

# =============================================================================================
# Constants of the module (published values; unit and source beside each)
# =============================================================================================
#: lower and upper ends of the LISA band used for SNR integrals [Hz]
F_MIN_HZ: float = 1.0e-5
F_MAX_HZ: float = 1.0
#: the frequency 1/yr (Julian year) [Hz], where PTA amplitudes are quoted
F_1YR_HZ: float = 1.0 / YR_S
#: LISA arm length [m]: 2.5e9 ([RCL19]_ Sec. 2, memory)
LISA_ARM_M: float = 2.5e9
_C_SI: float = C_CGS * 1.0e-2
#: transfer frequency f* = c / (2 pi L) [Hz] (~19.09 mHz; [RCL19]_ Sec. 2)
LISA_F_STAR_HZ: float = _C_SI / (2.0 * math.pi * LISA_ARM_M)
#: single-link optical-metrology noise amplitude [m / sqrt(Hz)] ([RCL19]_ eq. 10, memory)
_OMS_M: float = 1.5e-11
#: single test-mass acceleration noise amplitude [m s^-2 / sqrt(Hz)] ([RCL19]_ eq. 11, memory)
_ACC_M_S2: float = 3.0e-15
#: amplitude A of the galactic confusion noise [Hz^(4/3)] ([RCL19]_ eq. 14, memory)
_CONFUSION_A: float = 9.0e-45
#: galactic confusion noise coefficients (alpha, beta [1/Hz], kappa [1/Hz], gamma [1/Hz],
#: f_k [Hz]) by mission length in years ([RCL19]_ Table 1, memory)
CONFUSION_COEFFICIENTS: dict[float, tuple[float, float, float, float, float]] = {
    0.5: (0.133, 243.0, 482.0, 917.0, 2.58e-3),
    1.0: (0.171, 292.0, 1020.0, 1680.0, 2.15e-3),
    2.0: (0.165, 299.0, 611.0, 1340.0, 1.73e-3),
    4.0: (0.138, -221.0, 521.0, 1680.0, 1.13e-3),
}
#: PhenomA frequencies pi M f_k = a eta^2 + b eta + c for k = merger, ringdown, ringdown
#: width sigma, cut-off (M total mass in seconds): (a, b, c) ([A08]_ Table I as corrected in
#: [A08e]_, memory)
PHENOM_A_COEFFICIENTS: dict[str, tuple[float, float, float]] = {
    "f_merg": (2.9740e-1, 4.4810e-2, 9.5560e-2),
    "f_ring": (5.9411e-1, 8.9794e-2, 1.9111e-1),
    "sigma": (5.0801e-1, 7.7515e-2, 2.2369e-2),
    "f_cut": (8.4845e-1, 1.2848e-1, 2.7299e-1),
}
#: SNR threshold for a detection: 8, the customary LISA choice (e.g. Klein et al. 2016,
#: PRD 93, 024003, memory)
DEFAULT_SNR_THRESHOLD: float = 8.0
#: frequencies of the nHz background table [Hz]: 1e-9 to 1e-7, the PTA band
DEFAULT_BACKGROUND_F_HZ: np.ndarray = np.logspace(-9.0, -7.0, 41)

_MPC_CM: float = MPC_KPC * KPC_CM
_GYR_PER_YR: float = YR_S / GYR_S
#: log-frequency grid of the tabulated noise integrals: intervals and Gauss points each
_N_KERNEL = 4096
_N_GAUSS_KERNEL = 4
#: Gauss-Legendre points for the PhenomA ringdown segment of one event
_N_GAUSS_RINGDOWN = 48
#: events per chunk in the per-event ringdown quadrature (bounds memory to a few MB)
_CHUNK = 8192
#: redshift quadrature: sub-intervals of at most this width in ln(1+z), 8 Gauss points each
_DX_RATE = 0.02
_N_GAUSS_RATE = 8
_OWNER_NOISE = "LISANoise"


# =============================================================================================
# Input checks for arrays (the _validate helpers are for scalar parameters)
# =============================================================================================
def _array(values, name: str, *, minimum: float | None = 0.0, positive: bool = False,
           owner: str = "gw") -> np.ndarray:
    arr = np.asarray(values, dtype=np.float64)
    if arr.size:
        bad = ~np.isfinite(arr)
        if minimum is not None:
            bad |= (arr <= minimum) if positive else (arr < minimum)
        if bad.any():
            idx = np.flatnonzero(bad.ravel())[:5]
            rule = f"> {minimum:g}" if positive else f">= {minimum:g}"
            rule = "finite" + (f" and {rule}" if minimum is not None else "")
            raise BhgrowInputError(
                f"`{name}` of {owner} must be {rule}; got {arr.ravel()[idx].tolist()!r} "
                f"at positions {idx.tolist()}", source=owner, rule=name, rows=idx.tolist())
    return arr


def chirp_mass_obs(m1_msun, m2_msun, z) -> np.ndarray:
    """Redshifted (observed-frame) chirp mass ``(1 + z) M_c``, in Msun.

    Parameters
    ----------
    m1_msun, m2_msun : array_like
        Source-frame component masses [Msun].
    z : array_like
        Redshift of the source.

    Returns
    -------
    numpy.ndarray
        ``(1 + z) (m1 m2)^(3/5) / (m1 + m2)^(1/5)`` [Msun], broadcast shape.
    """
    z = _array(z, "z", owner="chirp_mass_obs")
    # detector-frame mass = (1 + z) source-frame mass (e.g. Cutler & Flanagan 1994, PRD 49, 2658)
    return (1.0 + z) * chirp_mass(m1_msun, m2_msun)


# =============================================================================================
# LISA noise
# =============================================================================================
@dataclass(frozen=True)
class LISANoise:
    """Sky-averaged LISA sensitivity of Robson, Cornish & Liu (2019).

    Parameters
    ----------
    mission_yr : float, optional
        Mission (observation) length in years, > 0 (default 4). Sets the galactic confusion
        noise (one of 0.5, 1, 2, 4 when ``confusion`` is on: the durations of [RCL19]_
        Table 1) and the default observing time of :func:`inspiral_snr`.
    confusion : bool, optional
        Add the unresolved galactic-binary confusion noise ([RCL19]_ eq. 14; default True).

    Notes
    -----
    ``S_n(f) = 10/(3 L^2) [P_OMS + 2 (1 + cos^2(f/f*)) P_acc / (2 pi f)^4]
    (1 + 6/10 (f/f*)^2) + S_c(f)`` ([RCL19]_ eqs. 1, 13), with ``L = 2.5e9 m``,
    ``f* = c/(2 pi L)``, ``P_OMS = (1.5e-11 m)^2 (1 + (2 mHz/f)^4) / Hz`` (eq. 10),
    ``P_acc = (3e-15 m/s^2)^2 (1 + (0.4 mHz/f)^2) (1 + (f/8 mHz)^4) / Hz`` (eq. 11) and
    ``S_c = A f^(-7/3) exp(-f^alpha + beta f sin(kappa f)) [1 + tanh(gamma (f_k - f))]``,
    ``A = 9e-45`` (eq. 14, Table 1). (memory)
    """

    mission_yr: float = 4.0
    confusion: bool = True

    def __post_init__(self):
        t = _validate.positive(_OWNER_NOISE, "mission_yr", self.mission_yr)
        if not isinstance(self.confusion, (bool, np.bool_)):
            raise ParameterError(
                f"`confusion` of {_OWNER_NOISE} must be True or False; got {self.confusion!r}",
                source=_OWNER_NOISE, rule="confusion")
        if self.confusion and t not in CONFUSION_COEFFICIENTS:
            raise ParameterError(
                f"`mission_yr` of {_OWNER_NOISE} must be one of 0.5, 1, 2, 4 when `confusion` "
                f"is on (the durations of the Robson, Cornish & Liu 2019 confusion-noise "
                f"fits); got {self.mission_yr!r}", source=_OWNER_NOISE, rule="mission_yr")
        object.__setattr__(self, "mission_yr", t)
        object.__setattr__(self, "confusion", bool(self.confusion))

    @staticmethod
    def _frequency(f_hz) -> np.ndarray:
        return _array(f_hz, "f_hz", positive=True, owner=_OWNER_NOISE)

    def instrument_noise(self, f_hz) -> np.ndarray:
        """Instrument part of the sky-averaged sensitivity, S_n without confusion [1/Hz]."""
        f = self._frequency(f_hz)
        # optical metrology noise P_OMS [m^2/Hz] (Robson, Cornish & Liu 2019, CQG 36, eq. 10)
        p_oms = _OMS_M**2 * (1.0 + (2.0e-3 / f) ** 4)
        # acceleration noise P_acc [m^2 s^-4/Hz] (Robson, Cornish & Liu 2019, eq. 11)
        p_acc = _ACC_M_S2**2 * (1.0 + (0.4e-3 / f) ** 2) * (1.0 + (f / 8.0e-3) ** 4)
        x = f / LISA_F_STAR_HZ
        # S_n = 10/(3L^2) (P_OMS + 2(1+cos^2(f/f*)) P_acc/(2 pi f)^4) (1 + 0.6 (f/f*)^2)
        # (Robson, Cornish & Liu 2019, eqs. 1 and 13)
        return (10.0 / (3.0 * LISA_ARM_M**2)
                * (p_oms + 2.0 * (1.0 + np.cos(x) ** 2) * p_acc / (2.0 * math.pi * f) ** 4)
                * (1.0 + 0.6 * x * x))

    def confusion_noise(self, f_hz) -> np.ndarray:
        """Galactic confusion noise S_c(f) [1/Hz] for this mission length (0 if switched off)."""
        f = self._frequency(f_hz)
        if not self.confusion:
            return np.zeros_like(f)
        alpha, beta, kappa, gamma, f_k = CONFUSION_COEFFICIENTS[self.mission_yr]
        # S_c = A f^(-7/3) exp(-f^a + b f sin(k f)) [1 + tanh(g (f_k - f))]
        # (Robson, Cornish & Liu 2019, eq. 14, Table 1); 1 + tanh(y) = 2 / (1 + e^(-2y)),
        # taken in logs so that the exponentials never overflow
        y = gamma * (f_k - f)
        ln_s = (math.log(_CONFUSION_A) - (7.0 / 3.0) * np.log(f) - f**alpha
                + beta * f * np.sin(kappa * f) + math.log(2.0) - np.logaddexp(0.0, -2.0 * y))
        return np.exp(ln_s)

    def sensitivity(self, f_hz) -> np.ndarray:
        """Sky-averaged strain sensitivity S_n(f), including confusion noise if on.

        Parameters
        ----------
        f_hz : array_like
            Frequency [Hz], > 0.

        Returns
        -------
        numpy.ndarray
            S_n(f) [1/Hz] ([RCL19]_ eqs. 1, 13, 14).
        """
        s = self.instrument_noise(f_hz)
        if self.confusion:
            s = s + self.confusion_noise(f_hz)
        return s

    def characteristic_noise(self, f_hz) -> np.ndarray:
        """Characteristic noise strain ``h_n = sqrt(f S_n(f))`` (dimensionless)."""
        f = self._frequency(f_hz)
        # h_n^2 = f S_n (Robson, Cornish & Liu 2019, Sec. 5, memory)
        return np.sqrt(f * self.sensitivity(f))


class _Kernels:
    """Cumulative noise integrals ``int f^(p+1)/S_n d ln f`` for p = -7/3, -4/3."""

    __slots__ = ("inspiral", "merger", "x_min", "x_max")

    def __init__(self, noise: LISANoise):
        self.x_min = math.log(F_MIN_HZ)
        self.x_max = math.log(F_MAX_HZ)
        x = np.linspace(self.x_min, self.x_max, _N_KERNEL + 1)
        h = x[1] - x[0]
        t, w = np.polynomial.legendre.leggauss(_N_GAUSS_KERNEL)
        fq = np.exp(x[:-1, None] + 0.5 * h * (t + 1.0)[None, :])
        s_q = noise.sensitivity(fq)
        f_n = np.exp(x)
        s_n = noise.sensitivity(f_n)
        from scipy.interpolate import CubicHermiteSpline

        splines = []
        for p in (-7.0 / 3.0, -4.0 / 3.0):
            part = (fq ** (p + 1.0) / s_q) @ w * (0.5 * h)
            cum = np.concatenate(([0.0], np.cumsum(part)))
            # cubic Hermite: exact values and slopes at the nodes
            splines.append(CubicHermiteSpline(x, cum, f_n ** (p + 1.0) / s_n))
        self.inspiral, self.merger = splines

    def between(self, which: str, f_lo, f_hi) -> np.ndarray:
        """``int_{f_lo}^{f_hi} f^p / S_n df`` restricted to the band; 0 where f_hi <= f_lo."""
        spline = self.inspiral if which == "inspiral" else self.merger
        with np.errstate(divide="ignore", invalid="ignore"):
            a = np.clip(np.log(f_lo), self.x_min, self.x_max)
            b = np.clip(np.log(f_hi), self.x_min, self.x_max)
        a = np.where(np.isnan(a), self.x_max, a)
        b = np.where(np.isnan(b), self.x_min, b)
        return np.where(b > a, spline(b) - spline(np.minimum(a, b)), 0.0)


@functools.lru_cache(maxsize=16)
def _kernels(noise: LISANoise) -> _Kernels:
    return _Kernels(noise)


# =============================================================================================
# Waveform frequencies and amplitudes
# =============================================================================================
def f_isco_hz(m_total_obs_msun) -> np.ndarray:
    """GW frequency at the Schwarzschild ISCO, ``c^3 / (6^(3/2) pi G M)`` [Hz].

    Parameters
    ----------
    m_total_obs_msun : array_like
        Total mass [Msun]; the redshifted mass gives the observed frequency.
    """
    m = _array(m_total_obs_msun, "m_total_obs_msun", owner="f_isco_hz")
    with np.errstate(divide="ignore"):
        # f_GW = 2 f_orb at r = 6GM/c^2 (Schwarzschild ISCO; Bardeen, Press & Teukolsky 1972)
        return C_CGS**3 / (6.0**1.5 * math.pi * G_CGS * m * MSUN_G)


def f_at_time_to_merger_hz(chirp_mass_obs_msun, t_yr) -> np.ndarray:
    """GW frequency a time ``t_yr`` (observer frame) before coalescence, Newtonian order.

    Parameters
    ----------
    chirp_mass_obs_msun : array_like
        Redshifted chirp mass [Msun].
    t_yr : float or array_like
        Observed time to coalescence [yr], > 0.

    Returns
    -------
    numpy.ndarray
        ``f = (1/pi) (5 / (256 t))^(3/8) (G M_cz / c^3)^(-5/8)`` [Hz] ([P64]_; [CF94]_).
    """
    mc = _array(chirp_mass_obs_msun, "chirp_mass_obs_msun", owner="f_at_time_to_merger_hz")
    t = _array(t_yr, "t_yr", positive=True, owner="f_at_time_to_merger_hz") * YR_S
    tm = G_CGS * mc * MSUN_G / C_CGS**3
    with np.errstate(divide="ignore"):
        # t_c = (5/256) (G M_c/c^3)^(-5/3) (pi f)^(-8/3) (Peters 1964; Cutler & Flanagan 1994)
        return (5.0 / (256.0 * t)) ** 0.375 * tm ** -0.625 / math.pi


def phenom_a_frequencies_hz(m_total_obs_msun, eta) -> tuple[np.ndarray, ...]:
    """PhenomA transition frequencies ``f_merg, f_ring, sigma, f_cut`` [Hz].

    ``pi M f_k = a_k eta^2 + b_k eta + c_k`` with ``M = G M_total / c^3`` in seconds
    ([A08]_ eq. 4.19 and Table I, corrected in [A08e]_; coefficients in
    :data:`PHENOM_A_COEFFICIENTS`, memory).
    """
    m = _array(m_total_obs_msun, "m_total_obs_msun", owner="phenom_a_frequencies_hz")
    eta = _array(eta, "eta", owner="phenom_a_frequencies_hz")
    m_s = G_CGS * m * MSUN_G / C_CGS**3
    out = []
    with np.errstate(divide="ignore"):
        for key in ("f_merg", "f_ring", "sigma", "f_cut"):
            a, b, c = PHENOM_A_COEFFICIENTS[key]
            # pi M f = a eta^2 + b eta + c (Ajith et al. 2008, PRD 77, 104017, Table I)
            out.append((a * eta * eta + b * eta + c) / (math.pi * m_s))
    return tuple(out)


def _amplitude_prefactor(m_total_obs_msun, eta, d_l_mpc):
    """Newtonian amplitude factor sqrt(5 eta/24) pi^(-2/3) M^(5/6) / D [s^(-1/6)]: A(f) f^(7/6)."""
    m_s = G_CGS * m_total_obs_msun * MSUN_G / C_CGS**3
    d_s = d_l_mpc * _MPC_CM / C_CGS
    with np.errstate(divide="ignore", invalid="ignore"):
        # A f^(7/6) = sqrt(5/24) pi^(-2/3) M_c^(5/6)/D, M_c^(5/6) = eta^(1/2) M^(5/6) (G = c = 1)
        # (Cutler & Flanagan 1994; Ajith et al. 2008, eq. 4.13)
        return np.sqrt(5.0 * eta / 24.0) * math.pi ** (-2.0 / 3.0) * m_s ** (5.0 / 6.0) / d_s


def phenom_a_amplitude(f_hz, m1_obs_msun, m2_obs_msun, d_l_mpc) -> np.ndarray:
    """PhenomA Fourier amplitude ``A_eff(f)`` of a face-on binary [1/Hz].

    Parameters
    ----------
    f_hz : array_like
        Observed frequency [Hz].
    m1_obs_msun, m2_obs_msun : array_like
        Redshifted component masses [Msun].
    d_l_mpc : array_like
        Luminosity distance [Mpc].

    Returns
    -------
    numpy.ndarray
        ``C (f/f_merg)^(-7/6)`` below ``f_merg``, ``C (f/f_merg)^(-2/3)`` up to ``f_ring``,
        ``C w L(f)`` up to ``f_cut`` and 0 above, with
        ``C = sqrt(5 eta/24) pi^(-2/3) M^(5/6) f_merg^(-7/6) / D``,
        ``w = (pi sigma/2) (f_ring/f_merg)^(-2/3)`` and the Lorentzian
        ``L = sigma / (2 pi ((f - f_ring)^2 + sigma^2/4))`` ([A08]_ eqs. 4.13-4.16, memory).
        The inspiral branch is the Newtonian amplitude ``A(f)`` of the module notes.
    """
    f = _array(f_hz, "f_hz", positive=True, owner="phenom_a_amplitude")
    m1 = _array(m1_obs_msun, "m1_obs_msun", owner="phenom_a_amplitude")
    m2 = _array(m2_obs_msun, "m2_obs_msun", owner="phenom_a_amplitude")
    d = _array(d_l_mpc, "d_l_mpc", owner="phenom_a_amplitude")
    mt = m1 + m2
    with np.errstate(divide="ignore", invalid="ignore"):
        eta = np.where(mt > 0, m1 * m2 / np.where(mt > 0, mt, 1.0) ** 2, 0.0)
        f_merg, f_ring, sigma, f_cut = phenom_a_frequencies_hz(mt, eta)
        c = _amplitude_prefactor(mt, eta, d) * f_merg ** (-7.0 / 6.0)
        # piecewise PhenomA amplitude (Ajith et al. 2008, PRD 77, 104017, eq. 4.13)
        w = 0.5 * math.pi * sigma * (f_ring / f_merg) ** (-2.0 / 3.0)
        lor = sigma / (2.0 * math.pi * ((f - f_ring) ** 2 + 0.25 * sigma * sigma))
        return np.where(f < f_merg, c * (f / f_merg) ** (-7.0 / 6.0),
                        np.where(f < f_ring, c * (f / f_merg) ** (-2.0 / 3.0),
                                 np.where(f < f_cut, c * w * lor, 0.0)))


# =============================================================================================
# SNR
# =============================================================================================
def snr_observed_frame(m1_obs_msun, m2_obs_msun, d_l_mpc, noise: LISANoise, *,
                       waveform: str = "inspiral", f_low_hz=None, t_obs_yr=None,
                       f_high_hz="isco") -> np.ndarray:
    """Sky-, polarisation- and inclination-averaged LISA SNR from observed-frame quantities.

    Parameters
    ----------
    m1_obs_msun, m2_obs_msun : array_like
        Redshifted component masses ``(1+z) m`` [Msun], >= 0.
    d_l_mpc : array_like
        Luminosity distance [Mpc], >= 0 (0 gives infinite SNR).
    noise : LISANoise
        Sensitivity model.
    waveform : {"inspiral", "phenom_a"}, optional
        Newtonian inspiral up to ``f_high_hz`` (default), or the PhenomA
        inspiral-merger-ringdown amplitude of [A08]_ up to its cut-off frequency.
    f_low_hz : float or array_like, optional
        Frequency where the observation starts [Hz]. Default: the frequency ``t_obs_yr``
        before coalescence (:func:`f_at_time_to_merger_hz`).
    t_obs_yr : float, optional
        Observing time before coalescence [yr] when ``f_low_hz`` is not given; default
        ``noise.mission_yr``.
    f_high_hz : "isco" or float or array_like, optional
        End of the inspiral [Hz] (``waveform="inspiral"`` only); "isco" (default) is the GW
        frequency of the Schwarzschild ISCO of the total mass (:func:`f_isco_hz`).

    Returns
    -------
    numpy.ndarray
        SNR, ``rho^2 = (16/5) int A^2/S_n df`` over [f_low, f_high] within
        [:data:`F_MIN_HZ`, :data:`F_MAX_HZ`] (module notes; [RCL19]_).
    """
    if not isinstance(noise, LISANoise):
        raise BhgrowInputError(f"`noise` must be a LISANoise; got {type(noise).__name__}",
                               source="snr", rule="noise")
    _validate.one_of("snr", "waveform", waveform, ("inspiral", "phenom_a"))
    m1 = _array(m1_obs_msun, "m1_obs_msun", owner="snr")
    m2 = _array(m2_obs_msun, "m2_obs_msun", owner="snr")
    d = _array(d_l_mpc, "d_l_mpc", owner="snr")
    m1, m2, d = np.broadcast_arrays(m1, m2, d)
    mt = m1 + m2
    with np.errstate(divide="ignore", invalid="ignore"):
        eta = np.where(mt > 0, m1 * m2 / np.where(mt > 0, mt, 1.0) ** 2, 0.0)
    mc = chirp_mass(m1, m2)
    if f_low_hz is None:
        t_obs = noise.mission_yr if t_obs_yr is None else _validate.positive(
            "snr", "t_obs_yr", t_obs_yr)
        f_lo = f_at_time_to_merger_hz(mc, t_obs)
    else:
        f_lo = np.broadcast_to(_array(f_low_hz, "f_low_hz", positive=True, owner="snr"),
                               mt.shape)
    kern = _kernels(noise)
    pref = _amplitude_prefactor(mt, eta, d)  # A(f) f^(7/6)
    with np.errstate(invalid="ignore", over="ignore"):
        pref2 = pref * pref
    if waveform == "inspiral":
        if isinstance(f_high_hz, str):
            _validate.one_of("snr", "f_high_hz", f_high_hz, ("isco",))
            f_hi = f_isco_hz(mt)
        else:
            f_hi = np.broadcast_to(_array(f_high_hz, "f_high_hz", positive=True, owner="snr"),
                                   mt.shape)
        integral = kern.between("inspiral", f_lo, f_hi)
        with np.errstate(invalid="ignore"):
            rho2 = (16.0 / 5.0) * np.where(integral > 0, pref2 * integral, 0.0)
        return np.sqrt(rho2)

    # PhenomA: inspiral and merger branches from the tables, ringdown per event
    with np.errstate(divide="ignore", invalid="ignore"):
        f_merg, f_ring, sigma, f_cut = phenom_a_frequencies_hz(mt, eta)
        ins = kern.between("inspiral", f_lo, f_merg)
        mer = kern.between("merger", np.maximum(f_lo, f_merg), f_ring) / f_merg
    # |A|^2 = pref^2 f^(-7/3) (inspiral); C^2 (f/f_merg)^(-4/3) = pref^2 f^(-4/3) / f_merg
    # (merger), with C = pref f_merg^(-7/6)
    ring = np.zeros(mt.shape)
    t, wg = np.polynomial.legendre.leggauss(_N_GAUSS_RINGDOWN)
    flat = [np.ravel(a) for a in (f_lo, f_merg, f_ring, sigma, f_cut)]
    ring_flat = ring.reshape(-1)
    for start in range(0, ring_flat.size, _CHUNK):
        sl = slice(start, start + _CHUNK)
        lo_, fm, fr, sg, fc = (a[sl] for a in flat)
        with np.errstate(invalid="ignore"):
            a = np.clip(np.maximum(fr, lo_), F_MIN_HZ, F_MAX_HZ)
            b = np.clip(fc, F_MIN_HZ, F_MAX_HZ)
        ok = np.isfinite(a) & np.isfinite(b) & (b > a)
        if not ok.any():
            continue
        a, b, fm, fr, sg = a[ok], b[ok], fm[ok], fr[ok], sg[ok]
        half = 0.5 * (b - a)
        fq = (0.5 * (a + b))[:, None] + half[:, None] * t[None, :]
        # ringdown branch |A/C|^2 = w^2 L(f)^2 (Ajith et al. 2008, PRD 77, 104017, eq. 4.13)
        w = 0.5 * math.pi * sg * (fr / fm) ** (-2.0 / 3.0)
        lor = sg[:, None] / (2.0 * math.pi * ((fq - fr[:, None]) ** 2 + 0.25 * (sg * sg)[:, None]))
        integrand = (w[:, None] * lor) ** 2 / noise.sensitivity(fq)
        # C^2 = pref^2 f_merg^(-7/3); the nodes summed in a fixed order (a matrix product's
        # order depends on the batch, so one event's SNR would depend on the others')
        quad = integrand[:, 0] * wg[0]
        for j in range(1, wg.size):
            quad += integrand[:, j] * wg[j]
        ring_flat[np.flatnonzero(ok) + start] = quad * half * fm ** (-7.0 / 3.0)
    with np.errstate(invalid="ignore"):
        total = ins + mer + ring
        rho2 = (16.0 / 5.0) * np.where(total > 0, pref2 * total, 0.0)
    return np.sqrt(rho2)


def _observed(m1_msun, m2_msun, z, cosmo, owner: str):
    z = _array(z, "z", owner=owner)
    m1 = _array(m1_msun, "m1_msun", owner=owner)
    m2 = _array(m2_msun, "m2_msun", owner=owner)
    m1, m2, z = np.broadcast_arrays(m1, m2, z)
    d_l = np.asarray(cosmo.lum_dist_mpc(z), dtype=np.float64)
    return (1.0 + z) * m1, (1.0 + z) * m2, d_l


def inspiral_snr(m1_msun, m2_msun, z, cosmo, noise: LISANoise, *, f_low_hz=None,
                 t_obs_yr=None, f_high_hz="isco") -> np.ndarray:
    """Sky-averaged LISA SNR of the Newtonian inspiral, by default up to the ISCO.

    Parameters
    ----------
    m1_msun, m2_msun : array_like
        Source-frame component masses [Msun].
    z : array_like
        Redshift of coalescence (> 0 for a finite SNR).
    cosmo : bhgrow.cosmology.Cosmology
        Gives the luminosity distance.
    noise : LISANoise
        Sensitivity model.
    f_low_hz, t_obs_yr, f_high_hz
        As in :func:`snr_observed_frame` (observed-frame frequencies; by default from
        ``noise.mission_yr`` before coalescence to the redshifted ISCO frequency).

    Returns
    -------
    numpy.ndarray
        SNR per event (redshifted masses, luminosity distance; module notes).
    """
    m1z, m2z, d_l = _observed(m1_msun, m2_msun, z, cosmo, "inspiral_snr")
    return snr_observed_frame(m1z, m2z, d_l, noise, waveform="inspiral", f_low_hz=f_low_hz,
                              t_obs_yr=t_obs_yr, f_high_hz=f_high_hz)


def imr_snr(m1_msun, m2_msun, z, cosmo, noise: LISANoise, *, f_low_hz=None,
            t_obs_yr=None) -> np.ndarray:
    """Sky-averaged LISA SNR with the PhenomA inspiral-merger-ringdown amplitude.

    Same arguments as :func:`inspiral_snr` (no ``f_high_hz``: the waveform ends at its
    cut-off frequency). Non-spinning, circular binaries ([A08]_).
    """
    m1z, m2z, d_l = _observed(m1_msun, m2_msun, z, cosmo, "imr_snr")
    return snr_observed_frame(m1z, m2z, d_l, noise, waveform="phenom_a", f_low_hz=f_low_hz,
                              t_obs_yr=t_obs_yr)


def detections(snr, threshold: float = DEFAULT_SNR_THRESHOLD) -> np.ndarray:
    """Boolean mask of events with ``snr >= threshold`` (threshold > 0, default 8)."""
    threshold = _validate.positive("detections", "threshold", threshold)
    snr = np.asarray(snr, dtype=np.float64)
    if np.isnan(snr).any():
        raise BhgrowInputError("`snr` of detections must not contain NaN",
                               source="detections", rule="snr")
    return snr >= threshold


# =============================================================================================
# Rates
# =============================================================================================
def _edges(z_edges) -> np.ndarray:
    e = _array(z_edges, "z_edges", owner="observed_rate_per_yr")
    if e.ndim != 1 or e.size < 2 or not np.all(np.diff(e) > 0):
        raise BhgrowInputError(
            f"`z_edges` of observed_rate_per_yr must be a 1-d array of at least 2 strictly "
            f"increasing redshifts; got {e.tolist()!r}", source="observed_rate_per_yr",
            rule="z_edges")
    return e


def _bin_sums(z, weight_mpc3, edges, owner: str):
    z = _array(z, "z", owner=owner).ravel()
    w = _array(weight_mpc3, "weight_mpc3", owner=owner).ravel()
    if w.shape != z.shape:
        raise BhgrowInputError(f"`z` and `weight_mpc3` of {owner} must have the same length; "
                               f"got {z.size} and {w.size}", source=owner, rule="shape")
    idx = np.searchsorted(edges, z, side="right") - 1
    idx[z == edges[-1]] = edges.size - 2  # the last bin is closed on the right
    inside = (idx >= 0) & (idx < edges.size - 1)
    nb = edges.size - 1
    s1 = np.bincount(idx[inside], weights=w[inside], minlength=nb)
    s2 = np.bincount(idx[inside], weights=w[inside] ** 2, minlength=nb)
    return s1, s2


def _bin_time_gyr(edges, cosmo) -> np.ndarray:
    age = np.asarray(cosmo.age_gyr(edges), dtype=np.float64)
    return age[:-1] - age[1:]


def _volume_over_1pz_mpc3(edges, cosmo) -> np.ndarray:
    """``int_{z_lo}^{z_hi} dV_c/dz / (1+z) dz`` per bin [comoving Mpc^3], full sky."""
    x = np.log1p(edges)
    n_sub = np.maximum(np.ceil((x[1:] - x[:-1]) / _DX_RATE).astype(np.intp), 1)
    bin_of = np.repeat(np.arange(x.size - 1), n_sub)
    first = np.concatenate(([0], np.cumsum(n_sub)[:-1]))
    k = np.arange(bin_of.size) - first[bin_of]
    h = ((x[1:] - x[:-1]) / n_sub)[bin_of]
    x0 = x[:-1][bin_of] + k * h
    t, wg = np.polynomial.legendre.leggauss(_N_GAUSS_RATE)
    xq = x0[:, None] + 0.5 * h[:, None] * (t + 1.0)[None, :]
    # dz / (1+z) = d ln(1+z); dV_c/dz full sky (Hogg 1999, eq. 28 times 4 pi)
    vals = np.asarray(cosmo.dvc_dz_mpc3(np.expm1(xq)), dtype=np.float64)
    per_sub = (vals @ wg) * 0.5 * h
    return np.bincount(bin_of, weights=per_sub, minlength=x.size - 1)


def rate_density_per_mpc3_gyr(z, weight_mpc3, z_edges, cosmo) -> np.ndarray:
    """Comoving merger-rate density per redshift bin [Mpc^-3 Gyr^-1].

    Parameters
    ----------
    z : array_like
        Redshifts of the coalescences.
    weight_mpc3 : array_like
        Comoving number density [Mpc^-3] each event stands for (catalogue column
        ``weight_mpc3``), finite and >= 0.
    z_edges : array_like
        Strictly increasing bin edges in redshift (>= 0, within the cosmology tables).
        Events outside [z_edges[0], z_edges[-1]] are left out.
    cosmo : bhgrow.cosmology.Cosmology

    Returns
    -------
    numpy.ndarray
        ``R_j = sum_{i in j} w_i / (t(z_lo) - t(z_hi))`` (module notes).
    """
    edges = _edges(z_edges)
    s1, _ = _bin_sums(z, weight_mpc3, edges, "rate_density_per_mpc3_gyr")
    return s1 / _bin_time_gyr(edges, cosmo)


def observed_rate_per_yr(z, weight_mpc3, z_edges, cosmo, *, with_error: bool = False):
    """Observed (detector-frame, full-sky) coalescence rate per redshift bin.

    Parameters
    ----------
    z, weight_mpc3, z_edges, cosmo
        As in :func:`rate_density_per_mpc3_gyr`.
    with_error : bool, optional
        Also return the weighted-counting (Poisson) error per bin,
        ``sqrt(sum w_i^2) / dt_bin * V_bin``.

    Returns
    -------
    per_bin : numpy.ndarray
        ``dN/dt_obs`` of each bin [yr^-1]: ``R_j int_bin dV_c/dz / (1+z) dz``.
    total : float
        Sum over bins [yr^-1].
    error : numpy.ndarray
        Only with ``with_error``: the error of ``per_bin`` [yr^-1].
    """
    edges = _edges(z_edges)
    s1, s2 = _bin_sums(z, weight_mpc3, edges, "observed_rate_per_yr")
    dt = _bin_time_gyr(edges, cosmo)
    vol = _volume_over_1pz_mpc3(edges, cosmo)
    # dN/dt_obs = int R(z)/(1+z) dV_c/dz dz (e.g. Sesana et al. 2007, MNRAS 377, 1711; memory)
    per_bin = s1 / dt * vol * _GYR_PER_YR
    total = float(per_bin.sum())
    if with_error:
        return per_bin, total, np.sqrt(s2) / dt * vol * _GYR_PER_YR
    return per_bin, total


def detection_rate_per_yr(z, weight_mpc3, snr, threshold, z_edges, cosmo) -> float:
    """Observed rate [yr^-1, full sky] of events with ``snr >= threshold``.

    :func:`observed_rate_per_yr` summed over bins, for the detected events only.
    """
    z = np.asarray(z, dtype=np.float64).ravel()
    w = np.asarray(weight_mpc3, dtype=np.float64).ravel()
    det = detections(np.asarray(snr, dtype=np.float64).ravel(), threshold)
    if not (det.size == z.size == w.size):
        raise BhgrowInputError(f"`z`, `weight_mpc3` and `snr` of detection_rate_per_yr must "
                               f"have the same length; got {z.size}, {w.size}, {det.size}",
                               source="detection_rate_per_yr", rule="shape")
    return observed_rate_per_yr(z[det], w[det], z_edges, cosmo)[1]


# =============================================================================================
# nHz background
# =============================================================================================
def background_hc(f_hz, chirp_mass_msun, z, weight_mpc3, *, m_total_msun=None) -> np.ndarray:
    """Characteristic strain of the background from circular, GW-driven binaries.

    Parameters
    ----------
    f_hz : array_like
        Observed frequency [Hz], > 0.
    chirp_mass_msun : array_like
        Source-frame chirp masses [Msun] (catalogue column ``chirp_mass_msun``).
    z : array_like
        Redshifts of coalescence.
    weight_mpc3 : array_like
        Comoving number density [Mpc^-3] each event stands for.
    m_total_msun : array_like, optional
        Source-frame total masses [Msun]; if given, a binary contributes only below its
        redshifted ISCO frequency. Default: every binary at every frequency (pure power law).

    Returns
    -------
    numpy.ndarray
        ``h_c(f)`` (dimensionless), shape of ``f_hz``:
        ``h_c^2 = 4 G^(5/3) / (3 pi^(1/3) c^2) f^(-4/3) sum w M_c^(5/3) (1+z)^(-1/3)``
        (Phinney 2001; module notes).
    """
    owner = "background_hc"
    f = _array(f_hz, "f_hz", positive=True, owner=owner)
    mc = _array(chirp_mass_msun, "chirp_mass_msun", owner=owner).ravel()
    z = _array(z, "z", owner=owner).ravel()
    w = _array(weight_mpc3, "weight_mpc3", owner=owner).ravel()
    if not (mc.size == z.size == w.size):
        raise BhgrowInputError(f"`chirp_mass_msun`, `z` and `weight_mpc3` of {owner} must have "
                               f"the same length; got {mc.size}, {z.size}, {w.size}",
                               source=owner, rule="shape")
    # per-event term w M_c^(5/3) (1+z)^(-1/3) in cgs: cm^-3 g^(5/3)
    term = (w / _MPC_CM**3) * (mc * MSUN_G) ** (5.0 / 3.0) * (1.0 + z) ** (-1.0 / 3.0)
    if m_total_msun is None:
        s = np.full(f.shape, term.sum())
    else:
        mt = _array(m_total_msun, "m_total_msun", owner=owner).ravel()
        if mt.size != mc.size:
            raise BhgrowInputError(f"`m_total_msun` of {owner} must have the length of "
                                   f"`chirp_mass_msun`; got {mt.size} and {mc.size}",
                                   source=owner, rule="shape")
        f_stop = f_isco_hz(mt * (1.0 + z))
        order = np.argsort(f_stop)
        f_sorted = f_stop[order]
        # sum of the terms of binaries still emitting at f (f < f_stop)
        tail = np.concatenate((np.cumsum(term[order][::-1])[::-1], [0.0]))
        s = tail[np.searchsorted(f_sorted, f, side="right")]
    # h_c^2 = 4G/(pi c^2 f^2) sum w/(1+z) (pi G)^(2/3) M_c^(5/3) f_r^(2/3)/3, f_r = f(1+z)
    # (Phinney 2001, astro-ph/0108028, eqs. 5 and 7; memory)
    pref = 4.0 * G_CGS ** (5.0 / 3.0) / (3.0 * math.pi ** (1.0 / 3.0) * C_CGS**2)
    return np.sqrt(pref * f ** (-4.0 / 3.0) * s)


def hc_at_1yr(chirp_mass_msun, z, weight_mpc3, *, m_total_msun=None) -> float:
    """Background amplitude ``h_c(f = 1/yr)`` (:func:`background_hc` at :data:`F_1YR_HZ`)."""
    return float(background_hc(F_1YR_HZ, chirp_mass_msun, z, weight_mpc3,
                               m_total_msun=m_total_msun))


def background_table(chirp_mass_msun, z, weight_mpc3, *, f_hz=None, m_total_msun=None):
    """The nHz background as a table: columns ``f_hz`` [Hz] and ``h_c``.

    Parameters
    ----------
    chirp_mass_msun, z, weight_mpc3, m_total_msun
        As in :func:`background_hc`.
    f_hz : array_like, optional
        Frequencies [Hz]; default :data:`DEFAULT_BACKGROUND_F_HZ` (1e-9 to 1e-7 Hz).

    Returns
    -------
    astropy.table.Table
        Columns ``f_hz`` (unit Hz) and ``h_c`` (dimensionless); ``meta`` holds ``h_c_1yr``
        (amplitude at 1/yr), ``f_1yr_hz`` and the reference. The run writes it as
        ``tables/gw_background.ecsv``.
    """
    from astropy.table import Table

    f = DEFAULT_BACKGROUND_F_HZ if f_hz is None else _array(f_hz, "f_hz", positive=True,
                                                               owner="background_table")
    f = np.atleast_1d(np.asarray(f, dtype=np.float64))
    hc = background_hc(f, chirp_mass_msun, z, weight_mpc3, m_total_msun=m_total_msun)
    t = Table()
    t["f_hz"] = f
    t["f_hz"].unit = "Hz"
    t["f_hz"].description = "observed gravitational-wave frequency"
    t["h_c"] = hc
    t["h_c"].description = ("characteristic strain of the background of circular GW-driven "
                            "binaries (Phinney 2001)")
    t.meta["h_c_1yr"] = hc_at_1yr(chirp_mass_msun, z, weight_mpc3, m_total_msun=m_total_msun)
    t.meta["f_1yr_hz"] = F_1YR_HZ
    t.meta["reference"] = "Phinney E. S., 2001, arXiv:astro-ph/0108028"
    return t
