"""Linear structure: transfer function, power spectrum, sigma(M), growth factor, delta_c(z).

:class:`LinearPower` holds everything the extended Press-Schechter machinery (merger-tree
generator, halo mass functions) needs from linear theory, for one :class:`~bhgrow.cosmology.
Cosmology`:

* the Eisenstein & Hu (1998) transfer function, with baryon acoustic features ("eh98",
  [EH98]_ eqs. 2-24) or its no-wiggle form ("eh98_nowiggle", [EH98]_ eqs. 26-31);
* the linear power spectrum ``P(k) = A k^n_s T(k)^2 D(z)^2`` normalised so that the top-hat
  rms in spheres of 8 Mpc/h is ``cosmo.sigma8`` at z = 0;
* the top-hat ``sigma(M)`` and ``dln sigma / dln M`` on interpolation tables in ``ln M``;
* the linear growth factor ``D(z)`` from the growth equation for the cosmology;
* the collapse threshold extrapolated to today, ``delta_c(z) = delta_crit(z) / D(z)``, the
  "time" variable of extended Press-Schechter ([LC93]_), and its inverse.

Choices (and why)
-----------------
Matter density.  Everything here uses *cold* matter, CDM + baryons: ``cosmo.Om0`` (astropy's
``Om0``, which leaves out massive neutrinos; Planck18: 0.30966 rather than the 0.3111 that
includes a 0.06 eV neutrino). Neutrinos of that mass free-stream out of halo-scale
perturbations, and halo abundances follow the cold-matter field and density ([Cas14]_). This is
also what ``Cosmology.rho_mean_msun_mpc3_comoving()`` and ``Cosmology.omega_m(z)`` use, so the
mass-radius relation ``M = 4/3 pi rho_mean R^3`` (comoving ``R``, physical Msun), the mass
function prefactor ``rho_mean / M``, the transfer function's ``Omega_0 h^2`` and the growth
equation's source term are one consistent set. Neutrinos (and radiation) enter only through
the expansion rate ``E(z)`` of the wrapped astropy cosmology.

Growth factor.  ``D`` solves the linear growth equation for cold matter
``d/dt (a^2 dD/dt) = 4 pi G rho_cb a^2 D`` ([Pee80]_ sect. 10 (memory)), written as
``d/dln a (a^3 E dD/da) = 3/2 Omega_cb0 D / (a E)``, with ``E(z)`` taken from the wrapped astropy
cosmology, so Lambda, any dark-energy law, curvature, radiation and massive neutrinos (as a
smooth background) are all included. It is integrated with a fixed-step 4th-order Runge-Kutta
scheme in ``ln a`` (step 1/256) from ``a = 1e-6`` (radiation era, growing-mode start of
[Mes74]_) to today and normalised to ``D(0) = 1``. For matter + Lambda + curvature without
radiation this reproduces the closed integral of [Hea77]_ / [CPT92]_ to ~1e-11 (tested at 1e-8).
For astropy's Planck18 (radiation and a 0.06 eV neutrino in E(z), neither clustering) D(z)
is below colossus' (Diemer 2018, radiation treated as a constant, no massive neutrinos) by
0.07% at z = 1 and 0.4% at z = 6; with massless neutrinos the difference is < 0.07%.

Collapse threshold.  ``delta_crit = 3/20 (12 pi)^(2/3) = 1.68647``, the spherical top-hat value
for Einstein-de Sitter. With ``delta_c_omega_dependence=True`` it gets the weak dependence
``Omega_m(z)^0.0055`` (flat) or ``Omega_m(z)^0.0185`` (no dark energy) of [NFW97]_ (appendix,
(memory)), equivalent to the fit of [KS96]_; other cosmologies (curved *and* with dark energy)
are rejected with that flag.

Tables and accuracy
-------------------
sigma(M): ``sigma^2(R) = 1/(2 pi^2) int k^3 P(k) W^2(kR) dln k`` with the top-hat window
``W(x) = 3 (sin x - x cos x) / x^3``, evaluated by the trapezoid rule in ``ln k`` (step 1/256,
``k R`` from 1e-4 to 400 for every radius; for a smooth integrand that vanishes at both ends
this is accurate to ~1e-9). The ``ln R`` nodes are spaced by 4 ``ln k`` steps, so the window
is one 1-D array and all radii come from a single FFT correlation. Nodes are uniform in
``ln M`` (step 3/64 ~ 0.047) over ``[m_min_msun, m_max_msun]`` (default 1e3 - 1e18 Msun) and
cubic splines (scipy ``CubicSpline`` coefficients, evaluated by index arithmetic on the uniform
grid) interpolate ``ln sigma`` and ``dln sigma/dln M`` (itself from the quadrature of
``d sigma^2/dln R``, not from differentiating the spline). Against direct Gauss-Legendre
quadrature (independent of the trapezoid sums, FFT and splines) the tables agree to ~2e-9
over 1e3 - 1e18 Msun (tested at 1e-6). Building all tables takes ~10-30 ms; ``sigma`` on
1e6 masses takes ~20 ms (benchmarks/bench_power.py).

Growth / delta_c: uniform grid in ``x = ln(1+z)`` (step 1/256) over ``[0, cosmo.z_max]``;
cubic splines of ``ln D`` and ``ln delta_c``. Inverses (``mass_of_sigma``, ``z_of_delta_c``)
are splines on uniform grids of the dependent variable, followed by one Newton step on the
forward spline, so they invert the forward tables to round-off.

Inputs outside the table ranges raise :class:`~bhgrow.errors.BhgrowInputError` naming the
range (build with other ``m_min_msun``/``m_max_msun`` or a Cosmology with a larger ``z_max``).
Scalars in give floats out; arrays give arrays (the convention of ``Cosmology``).

References
----------
.. [EH98] Eisenstein D. J., Hu W., 1998, ApJ, 496, 605 (equation numbers from memory)
.. [LC93] Lacey C., Cole S., 1993, MNRAS, 262, 627
.. [Hea77] Heath D. J., 1977, MNRAS, 179, 351
.. [CPT92] Carroll S. M., Press W. H., Turner E. L., 1992, ARA&A, 30, 499
.. [Mes74] Meszaros P., 1974, A&A, 37, 225
.. [Pee80] Peebles P. J. E., 1980, The Large-Scale Structure of the Universe (Princeton)
.. [NFW97] Navarro J. F., Frenk C. S., White S. D. M., 1997, ApJ, 490, 493
.. [KS96] Kitayama T., Suto Y., 1996, ApJ, 469, 480
.. [Cas14] Castorina E., Sefusatti E., Sheth R. K., Villaescusa-Navarro F., Viel M., 2014,
   JCAP, 02, 049
.. [GG72] Gunn J. E., Gott J. R., 1972, ApJ, 176, 1
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .. import _validate
from .._grid import UniformCubicSpline
from ..cosmology import Cosmology
from ..errors import BhgrowInputError, ParameterError

__all__ = ["LinearPower", "TRANSFER_MODELS", "DEFAULT_TRANSFER", "DELTA_CRIT_EDS",
           "tophat_window"]

# ------------------------------------------------------------------------------------------
# Defaults (each with its source)
# ------------------------------------------------------------------------------------------
#: transfer-function forms: Eisenstein & Hu 1998 (ApJ 496, 605) with baryon acoustic
#: features (sect. 3) and its no-wiggle "zero-baryon-oscillation" form (sect. 4.2)
TRANSFER_MODELS = ("eh98", "eh98_nowiggle")
#: default: the full form with baryon features (Eisenstein & Hu 1998)
DEFAULT_TRANSFER = "eh98"
#: linear overdensity at collapse of a spherical top hat in Einstein-de Sitter,
#: 3/20 (12 pi)^(2/3) = 1.68647 (Gunn & Gott 1972, ApJ 176, 1; e.g. Peebles 1980 (memory))
DELTA_CRIT_EDS = 3.0 / 20.0 * (12.0 * math.pi) ** (2.0 / 3.0)
#: exponents of the weak Omega_m(z) dependence of delta_crit: flat with Lambda / no dark
#: energy (Navarro, Frenk & White 1997, ApJ 490, 493, appendix (memory); cf. Kitayama & Suto
#: 1996, ApJ 469, 480)
DELTA_CRIT_OMEGA_EXPONENT_FLAT = 0.0055
DELTA_CRIT_OMEGA_EXPONENT_OPEN = 0.0185
#: CMB temperature used by the transfer function when the cosmology has none (Tcmb0 = 0,
#: radiation switched off in E(z)): 2.7255 K (Fixsen 2009, ApJ 707, 916 (memory))
TCMB_FALLBACK_K = 2.7255
#: default sigma(M) table range in physical Msun
M_MIN_MSUN = 1.0e3
M_MAX_MSUN = 1.0e18
#: sigma8 is defined in spheres of radius 8 Mpc/h (e.g. Peebles 1980 (memory))
R8_MPC_H = 8.0

# --- numerical settings (see module docstring) ---------------------------------------------
_LNK_STEP = 1.0 / 256.0       # trapezoid step in ln k
_LNR_STRIDE = 4               # ln R step = 4 ln k steps -> ln M step = 3/64
_X_LO = 1.0e-4                # smallest k R kept for every radius
_X_HI = 400.0                 # largest k R kept for every radius (tail < 1e-10)
_PAD = 4                      # spline nodes beyond each end of a served range
_GROWTH_STEP = 1.0 / 256.0    # RK4 step in ln a; also the table step in ln(1+z)
_GROWTH_A_START = 1.0e-6      # start of the growth integration (radiation era)
_TOL = 1e-9                   # inputs this close outside a range are clipped onto it

_OWNER = "LinearPower"


# ------------------------------------------------------------------------------------------
# Interpolation helpers
# ------------------------------------------------------------------------------------------
class _Inverse:
    """Inverse of a strictly monotonic :class:`~bhgrow._grid.UniformCubicSpline`.

    Itself a spline on a uniform grid of the forward values, plus one Newton step.
    """

    __slots__ = ("fwd", "inv", "y_lo", "y_hi")

    def __init__(self, fwd: UniformCubicSpline, x_lo: float, x_hi: float):
        self.fwd = fwd
        ya, yb = (float(v) for v in fwd(np.array([x_lo, x_hi])))
        self.y_lo, self.y_hi = min(ya, yb), max(ya, yb)
        n = fwd.x_nodes.size
        hy = (self.y_hi - self.y_lo) / (n - 1 - 2 * _PAD)
        y = self.y_lo + hy * (np.arange(n) - _PAD)
        xs_nodes, ys_nodes = fwd.x_nodes, fwd.y_nodes
        order = np.argsort(ys_nodes)
        from scipy.interpolate import CubicSpline

        x = CubicSpline(ys_nodes[order], xs_nodes[order])(y)
        for _ in range(3):  # Newton polish on the forward spline
            val, slope = fwd.value_and_slope(x)
            x = x - (val - y) / slope
        self.inv = UniformCubicSpline(float(y[0]), hy, x)

    def __call__(self, y: np.ndarray) -> np.ndarray:
        x = self.inv(y)
        val, slope = self.fwd.value_and_slope(x)
        x -= (val - y) / slope  # one Newton step: exact inverse of the forward table
        return x


def _as_array(values):
    arr = np.asarray(values, dtype=np.float64)
    if arr.ndim == 0:
        return arr.reshape(1), True
    return arr, False


def _out(result: np.ndarray, scalar: bool):
    return float(result.reshape(-1)[0]) if scalar else result


def _check_range(arr: np.ndarray, lo: float, hi: float, what: str, unit: str, hint: str,
                 rule: str, *, rel: bool) -> np.ndarray:
    """Raise unless lo <= arr <= hi (with round-off tolerance); clip tolerated excursions."""
    if not arr.size:
        return arr
    amin, amax = float(arr.min()), float(arr.max())
    tol_lo = _TOL * (abs(lo) if rel else 1.0)
    tol_hi = _TOL * (abs(hi) if rel else 1.0)
    if not (amin >= lo - tol_lo and amax <= hi + tol_hi):  # also catches NaN
        raise BhgrowInputError(
            f"{what} for {_OWNER} must be finite and in [{lo:.6g}, {hi:.6g}]{unit} ({hint}); "
            f"got values from {amin!r} to {amax!r}", source=_OWNER, rule=rule)
    if amin < lo or amax > hi:
        arr = np.clip(arr, lo, hi)
    return arr


# ------------------------------------------------------------------------------------------
# Top-hat window
# ------------------------------------------------------------------------------------------
def tophat_window(x):
    """Fourier transform of a real-space top hat and its log-derivative factor.

    Parameters
    ----------
    x : array_like
        ``k R`` (dimensionless), >= 0.

    Returns
    -------
    w : ndarray
        ``W(x) = 3 (sin x - x cos x) / x^3`` (e.g. Peebles 1980, (memory)); 1 at x = 0.
    x_dw_dx : ndarray
        ``x dW/dx = 3 (sin x / x - W)``; the series ``-x^2/5 + x^4/70 - x^6/1890`` below
        x = 0.1 avoids cancellation.
    """
    x = np.asarray(x, dtype=np.float64)
    small = x < 0.1
    xs = np.where(small, 1.0, x)
    sin, cos = np.sin(xs), np.cos(xs)
    # W = 3 (sin x - x cos x) / x^3 (top hat in Fourier space; Peebles 1980, memory)
    w = 3.0 * (sin - xs * cos) / xs**3
    # x dW/dx = 3 (sin x / x - W) (derivative of the line above)
    xdw = 3.0 * (sin / xs - w)
    x2 = x * x
    # Taylor series of the same two expressions
    w_series = 1.0 - x2 / 10.0 + x2 * x2 / 280.0 - x2**3 / 15120.0
    xdw_series = -x2 / 5.0 + x2 * x2 / 70.0 - x2**3 / 1890.0
    return np.where(small, w_series, w), np.where(small, xdw_series, xdw)


# ------------------------------------------------------------------------------------------
# Eisenstein & Hu (1998) transfer functions
# ------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _EH98Scalars:
    """k-independent quantities of the Eisenstein & Hu (1998) fits (lengths in Mpc)."""

    f_b: float
    f_c: float
    k_eq: float
    s: float
    k_silk: float
    alpha_c: float
    beta_c: float
    alpha_b: float
    beta_b: float
    beta_node: float
    # no-wiggle form
    s_nw: float
    alpha_gamma: float
    omh2: float
    theta: float


def _eh98_scalars(omh2: float, obh2: float, theta: float) -> _EH98Scalars:
    f_b = obh2 / omh2
    f_c = 1.0 - f_b
    # matter-radiation equality (EH98 eqs. 2, 3); k_eq in 1/Mpc
    z_eq = 2.50e4 * omh2 * theta**-4
    k_eq = 7.46e-2 * omh2 * theta**-2
    # drag epoch (EH98 eq. 4)
    b1 = 0.313 * omh2**-0.419 * (1.0 + 0.607 * omh2**0.674)
    b2 = 0.238 * omh2**0.223
    z_d = 1291.0 * omh2**0.251 / (1.0 + 0.659 * omh2**0.828) * (1.0 + b1 * obh2**b2)
    if obh2 > 0.0:
        # baryon-to-photon momentum ratio R = 31.5 omega_b Theta^-4 (z/1e3)^-1 (EH98 eq. 5)
        r_d = 31.5 * obh2 * theta**-4 / (z_d / 1.0e3)
        r_eq = 31.5 * obh2 * theta**-4 / (z_eq / 1.0e3)
        # sound horizon at the drag epoch (EH98 eq. 6)
        s = (2.0 / (3.0 * k_eq) * math.sqrt(6.0 / r_eq)
             * math.log((math.sqrt(1.0 + r_d) + math.sqrt(r_d + r_eq)) / (1.0 + math.sqrt(r_eq))))
        # Silk damping scale (EH98 eq. 7)
        k_silk = 1.6 * obh2**0.52 * omh2**0.73 * (1.0 + (10.4 * omh2) ** -0.95)
        # baryon suppression amplitude alpha_b = 2.07 k_eq s (1+R_d)^-3/4 G(y) (EH98 eqs. 14, 15)
        y = (1.0 + z_eq) / (1.0 + z_d)
        sq = math.sqrt(1.0 + y)
        g_y = y * (-6.0 * sq + (2.0 + 3.0 * y) * math.log((sq + 1.0) / (sq - 1.0)))
        alpha_b = 2.07 * k_eq * s * (1.0 + r_d) ** -0.75 * g_y
    else:
        s = k_silk = alpha_b = float("nan")
    # CDM suppression and log shift (EH98 eqs. 11, 12)
    a1 = (46.9 * omh2) ** 0.670 * (1.0 + (32.1 * omh2) ** -0.532)
    a2 = (12.0 * omh2) ** 0.424 * (1.0 + (45.0 * omh2) ** -0.582)
    alpha_c = a1**-f_b * a2 ** -(f_b**3)
    bb1 = 0.944 / (1.0 + (458.0 * omh2) ** -0.708)
    bb2 = (0.395 * omh2) ** -0.0266
    beta_c = 1.0 / (1.0 + bb1 * (f_c**bb2 - 1.0))
    # baryon velocity term and node shift (EH98 eqs. 24, 23)
    beta_b = 0.5 + f_b + (3.0 - 2.0 * f_b) * math.sqrt((17.2 * omh2) ** 2 + 1.0)
    beta_node = 8.41 * omh2**0.435
    # no-wiggle form: approximate sound horizon and shape suppression (EH98 eqs. 26, 31)
    s_nw = 44.5 * math.log(9.83 / omh2) / math.sqrt(1.0 + 10.0 * obh2**0.75)
    alpha_gamma = (1.0 - 0.328 * math.log(431.0 * omh2) * f_b
                   + 0.38 * math.log(22.3 * omh2) * f_b**2)
    return _EH98Scalars(f_b=f_b, f_c=f_c, k_eq=k_eq, s=s, k_silk=k_silk, alpha_c=alpha_c,
                        beta_c=beta_c, alpha_b=alpha_b, beta_b=beta_b, beta_node=beta_node,
                        s_nw=s_nw, alpha_gamma=alpha_gamma, omh2=omh2, theta=theta)


def _t0_tilde(q: np.ndarray, alpha_c: float, beta_c: float) -> np.ndarray:
    # T0(k, alpha_c, beta_c) = L / (L + C q^2), L = ln(e + 1.8 beta_c q) (EH98 eq. 19)
    ell = np.log(math.e + 1.8 * beta_c * q)
    # C = 14.2 / alpha_c + 386 / (1 + 69.9 q^1.08) (EH98 eq. 20)
    c = 14.2 / alpha_c + 386.0 / (1.0 + 69.9 * q**1.08)
    return ell / (ell + c * q * q)


def _eh98_wiggle(k: np.ndarray, p: _EH98Scalars) -> np.ndarray:
    """Full EH98 transfer function (k in 1/Mpc, k > 0)."""
    q = k / (13.41 * p.k_eq)  # EH98 eq. 10
    ks = k * p.s
    with np.errstate(over="ignore", divide="ignore"):
        # CDM part: T_c = f T0(k,1,beta_c) + (1-f) T0(k,alpha_c,beta_c), f = 1/(1+(ks/5.4)^4)
        # (EH98 eqs. 17, 18)
        f = 1.0 / (1.0 + (ks / 5.4) ** 4)
        t_c = f * _t0_tilde(q, 1.0, p.beta_c) + (1.0 - f) * _t0_tilde(q, p.alpha_c, p.beta_c)
        # shifted node positions s~ = s / (1 + (beta_node / ks)^3)^(1/3) (EH98 eq. 22)
        s_tilde = p.s / np.cbrt(1.0 + (p.beta_node / ks) ** 3)
        # baryon part (EH98 eq. 21); j0 = sin(x)/x
        t_b = (_t0_tilde(q, 1.0, 1.0) / (1.0 + (ks / 5.2) ** 2)
               + p.alpha_b / (1.0 + (p.beta_b / ks) ** 3) * np.exp(-((k / p.k_silk) ** 1.4)))
        t_b = t_b * np.sinc(k * s_tilde / math.pi)
    # T = f_b T_b + f_c T_c (EH98 eq. 16)
    return p.f_b * t_b + p.f_c * t_c


def _eh98_nowiggle(k: np.ndarray, p: _EH98Scalars) -> np.ndarray:
    """EH98 no-wiggle transfer function (k in 1/Mpc, k >= 0)."""
    # Gamma_eff h = Omega_0 h^2 [alpha_G + (1 - alpha_G) / (1 + (0.43 k s)^4)] (EH98 eq. 30)
    gamma_h = p.omh2 * (p.alpha_gamma + (1.0 - p.alpha_gamma) / (1.0 + (0.43 * k * p.s_nw) ** 4))
    # q = (k / h Mpc^-1) Theta^2 / Gamma_eff (EH98 eq. 28), with k in 1/Mpc
    q = k * p.theta**2 / gamma_h
    # T0 = L0 / (L0 + C0 q^2), L0 = ln(2e + 1.8 q), C0 = 14.2 + 731/(1 + 62.5 q) (EH98 eq. 29)
    ell = np.log(2.0 * math.e + 1.8 * q)
    c = 14.2 + 731.0 / (1.0 + 62.5 * q)
    return ell / (ell + c * q * q)


# ------------------------------------------------------------------------------------------
# Tables
# ------------------------------------------------------------------------------------------
class _SigmaTables:
    __slots__ = ("amplitude", "ln_sigma", "slope", "inverse", "lnm_lo", "lnm_hi",
                 "sigma_lo", "sigma_hi")


class _GrowthTables:
    __slots__ = ("ln_d", "ln_dc", "inverse", "x_max", "dc_lo", "dc_hi")


def _growth_nodes(astro, om0: float, x_top: float) -> tuple[np.ndarray, np.ndarray]:
    """Growing mode D on the nodes x = ln(1+z) = k h, k = -_PAD .. n_top (unnormalised).

    Integrates d/du (a^3 E dD/da) = 3/2 Om0 D / (a E), dD/du = P / (a^2 E), u = ln a,
    (linear growth equation for cold matter, e.g. Peebles 1980 sect. 10 (memory)) by RK4.
    """
    h = _GROWTH_STEP
    n_top = int(math.ceil(x_top / h)) + _PAD
    n_start = int(math.ceil(-math.log(_GROWTH_A_START) / h))
    n_start = max(n_start, n_top + 8)
    # u = ln a runs from -n_start h up to +_PAD h in steps of h; E at steps and midpoints
    u_half = (-n_start + 0.5 * np.arange(2 * (n_start + _PAD) + 1)) * h
    z_half = np.expm1(-u_half)
    inv_e = np.asarray(astro.inv_efunc(z_half), dtype=np.float64)
    a_half = np.exp(u_half)
    # dD/du = P / (a^2 E), dP/du = 1.5 Om0 D / (a E)
    c_d = inv_e / a_half**2
    c_p = 1.5 * om0 * inv_e / a_half
    # Growing-mode start (Meszaros 1974): D = 1 + 3y/2 with y = a/a_eq = Om/(1-Om); divided
    # by 3y/2 so that Om -> 1 (no radiation) gives D = 1, dD/dln a = 1 (D ~ a).
    om_start = om0 * c_d[0] * inv_e[0] / a_half[0]  # Om0 a^-3 / E^2
    d = 1.0 + 2.0 / 3.0 * (1.0 - om_start) / om_start
    dd_du = 1.0
    pp = dd_du / c_d[0]
    n_steps = n_start + _PAD
    out = np.empty(n_steps + 1)
    out[0] = d
    for j in range(n_steps):  # a loop over time steps, not over halos
        i = 2 * j
        k1d, k1p = c_d[i] * pp, c_p[i] * d
        k2d, k2p = c_d[i + 1] * (pp + 0.5 * h * k1p), c_p[i + 1] * (d + 0.5 * h * k1d)
        k3d, k3p = c_d[i + 1] * (pp + 0.5 * h * k2p), c_p[i + 1] * (d + 0.5 * h * k2d)
        k4d, k4p = c_d[i + 2] * (pp + h * k3p), c_p[i + 2] * (d + h * k3d)
        # classical 4th-order Runge-Kutta step (e.g. Press et al. 2007, Numerical Recipes)
        d += h / 6.0 * (k1d + 2.0 * k2d + 2.0 * k3d + k4d)
        pp += h / 6.0 * (k1p + 2.0 * k2p + 2.0 * k3p + k4p)
        out[j + 1] = d
    # out[j] is at u = (-n_start + j) h, i.e. x = (n_start - j) h; return x ascending
    d_nodes = out[::-1][: n_top + _PAD + 1]
    x_nodes = (np.arange(d_nodes.size) - _PAD) * h
    return x_nodes, d_nodes


# ------------------------------------------------------------------------------------------
# LinearPower
# ------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class LinearPower:
    """Linear power spectrum, sigma(M), growth factor and collapse threshold of a cosmology.

    Parameters
    ----------
    cosmo : Cosmology
        Background cosmology; uses ``h``, ``Om0`` (cold matter, see module notes), ``Ob0``,
        ``sigma8``, ``n_s``, ``Tcmb0``, ``z_max`` and the astropy ``E(z)``.
    transfer : {"eh98", "eh98_nowiggle"}
        Transfer function: Eisenstein & Hu (1998) with baryon features, or its no-wiggle form.
    delta_c_omega_dependence : bool
        If True, ``delta_crit(z) = 1.68647 Omega_m(z)^0.0055`` (flat) or ``^0.0185`` (no dark
        energy), Navarro, Frenk & White 1997 (memory); default False: constant 1.68647.
    tcmb_k : float, optional
        CMB temperature [K] used by the transfer function. Default: ``cosmo.Tcmb0``, or
        2.7255 K if the cosmology has radiation switched off (``Tcmb0 = 0``).
    m_min_msun, m_max_msun : float
        Range of the sigma(M) table in physical Msun (default 1e3 .. 1e18).

    Notes
    -----
    Tables are built lazily on first use (~10-30 ms) and kept on the instance. Masses are
    physical Msun; a mass M corresponds to the comoving Lagrangian radius
    ``R = (3 M / (4 pi rho_mean))^(1/3)`` with ``rho_mean = cosmo.rho_mean_msun_mpc3_comoving()``.

    Examples
    --------
    >>> from bhgrow.cosmology import Cosmology
    >>> lp = LinearPower(Cosmology())
    >>> round(lp.sigma(lp.mass_8_msun), 4)
    0.8102
    >>> round(lp.delta_c(0.0), 5)
    1.68647
    """

    cosmo: Cosmology
    transfer: str = DEFAULT_TRANSFER
    delta_c_omega_dependence: bool = False
    tcmb_k: float | None = None
    m_min_msun: float = M_MIN_MSUN
    m_max_msun: float = M_MAX_MSUN
    _cache: dict = field(default_factory=dict, init=False, repr=False, compare=False)

    def __post_init__(self):
        if not isinstance(self.cosmo, Cosmology):
            raise ParameterError(
                f"`cosmo` of {_OWNER} must be a bhgrow Cosmology; got "
                f"{type(self.cosmo).__name__}", source=_OWNER, rule="cosmo")
        _validate.one_of(_OWNER, "transfer", self.transfer, TRANSFER_MODELS)
        if not isinstance(self.delta_c_omega_dependence, (bool, np.bool_)):
            raise ParameterError(
                f"`delta_c_omega_dependence` of {_OWNER} must be True or False; got "
                f"{self.delta_c_omega_dependence!r}", source=_OWNER,
                rule="delta_c_omega_dependence")
        if self.tcmb_k is not None:
            object.__setattr__(self, "tcmb_k", _validate.positive(_OWNER, "tcmb_k", self.tcmb_k))
        lo = _validate.positive(_OWNER, "m_min_msun", self.m_min_msun)
        hi = _validate.positive(_OWNER, "m_max_msun", self.m_max_msun)
        if not hi > lo * 1.01:
            raise ParameterError(f"`m_max_msun` of {_OWNER} must be > 1.01 m_min_msun "
                                 f"({lo:g}); got {hi!r}", source=_OWNER, rule="m_max_msun")
        object.__setattr__(self, "m_min_msun", lo)
        object.__setattr__(self, "m_max_msun", hi)
        if self.transfer == "eh98" and not self.cosmo.Ob0 > 0.0:
            raise ParameterError(
                f"`transfer` of {_OWNER} must be 'eh98_nowiggle' for a cosmology without "
                f"baryons (Ob0 = 0); got 'eh98'", source=_OWNER, rule="transfer")
        if not self.cosmo.Ob0 < self.cosmo.Om0:
            raise ParameterError(f"`cosmo` of {_OWNER} must have Ob0 < Om0; got Ob0 = "
                                 f"{self.cosmo.Ob0!r}, Om0 = {self.cosmo.Om0!r}",
                                 source=_OWNER, rule="cosmo")
        if self.delta_c_omega_dependence:
            flat = abs(self.cosmo.Ok0) < 1e-12
            no_de = self.cosmo.Ode0 == 0.0
            if not (flat or no_de):
                raise ParameterError(
                    f"`delta_c_omega_dependence` of {_OWNER} must be False for a curved "
                    f"cosmology with dark energy (fits exist for flat or Lambda-free "
                    f"cosmologies only); got True", source=_OWNER,
                    rule="delta_c_omega_dependence")

    def __getstate__(self):
        state = self.__dict__.copy()
        state["_cache"] = {}  # rebuilt lazily in the receiving process
        return state

    def __setstate__(self, state):
        self.__dict__.update(state)

    # -------------------------------------------------------------- plain properties
    @property
    def omega_m0(self) -> float:
        """Matter density parameter used here: cold matter (CDM + baryons), ``cosmo.Om0``."""
        return self.cosmo.Om0

    @property
    def rho_mean_msun_mpc3(self) -> float:
        """Comoving mean cold-matter density, Msun per comoving Mpc^3."""
        return self.cosmo.rho_mean_msun_mpc3_comoving()

    @property
    def tcmb_used_k(self) -> float:
        """CMB temperature [K] entering the transfer function."""
        if self.tcmb_k is not None:
            return self.tcmb_k
        return self.cosmo.Tcmb0 if self.cosmo.Tcmb0 > 0.0 else TCMB_FALLBACK_K

    @property
    def mass_8_msun(self) -> float:
        """Mass in a comoving sphere of 8 Mpc/h, in Msun (where sigma = sigma8 at z = 0)."""
        r8 = R8_MPC_H / self.cosmo.h
        return 4.0 / 3.0 * math.pi * self.rho_mean_msun_mpc3 * r8**3

    @property
    def eh98_scalars(self) -> _EH98Scalars:
        """k-independent quantities of the EH98 fit (sound horizon ``s`` in Mpc, ...)."""
        p = self._cache.get("eh98")
        if p is None:
            h2 = self.cosmo.h**2
            p = _eh98_scalars(self.omega_m0 * h2, self.cosmo.Ob0 * h2, self.tcmb_used_k / 2.7)
            self._cache["eh98"] = p
        return p

    def lagrangian_radius_mpc(self, m_msun):
        """Comoving radius of a sphere holding mass M at the mean cold-matter density.

        Parameters
        ----------
        m_msun : float or array_like
            Mass in physical Msun, > 0.

        Returns
        -------
        float or ndarray
            ``R = (3 M / (4 pi rho_mean))^(1/3)`` in comoving Mpc.
        """
        m, scalar = _as_array(m_msun)
        return _out(np.cbrt(3.0 * m / (4.0 * math.pi * self.rho_mean_msun_mpc3)), scalar)

    # -------------------------------------------------------------- transfer and P(k)
    def _transfer(self, k: np.ndarray) -> np.ndarray:
        p = self.eh98_scalars
        if self.transfer == "eh98_nowiggle":
            return _eh98_nowiggle(k, p)
        pos = k > 0.0
        if pos.all():
            return _eh98_wiggle(k, p)
        out = np.ones_like(k)  # T(k -> 0) = 1
        out[pos] = _eh98_wiggle(k[pos], p)
        return out

    def transfer_function(self, k_mpc):
        """Eisenstein & Hu (1998) matter transfer function.

        Parameters
        ----------
        k_mpc : float or array_like
            Comoving wavenumber in 1/Mpc (not h/Mpc), >= 0.

        Returns
        -------
        float or ndarray
            T(k), dimensionless, -> 1 as k -> 0 (exactly 1 at k = 0).

        Raises
        ------
        BhgrowInputError
            For negative or non-finite k.
        """
        k, scalar = _as_array(k_mpc)
        _check_range(k, 0.0, np.inf, "wavenumber k", " 1/Mpc", "comoving", "k_range",
                     rel=False)
        if k.size and not np.isfinite(k).all():
            raise BhgrowInputError(f"wavenumber k for {_OWNER} must be finite",
                                   source=_OWNER, rule="k_range")
        return _out(self._transfer(k), scalar)

    def _k_grid(self, ln_r_lo: float, ln_r_hi: float):
        """ln k nodes covering k R in [_X_LO, _X_HI] for all R in the given range."""
        lnk0 = math.log(_X_LO) - ln_r_hi
        n_k = int(math.ceil((math.log(_X_HI) - ln_r_lo - lnk0) / _LNK_STEP)) + 1
        return lnk0 + _LNK_STEP * np.arange(n_k)

    def _unnormalised_k3p(self, k: np.ndarray) -> np.ndarray:
        # P(k) ~ k^n_s T(k)^2 (primordial power law times transfer; e.g. EH98 sect. 1)
        return k ** (3.0 + self.cosmo.n_s) * self._transfer(k) ** 2

    def _amplitude(self) -> float:
        amp = self._cache.get("amplitude")
        if amp is None:
            r8 = R8_MPC_H / self.cosmo.h
            ln_r8 = math.log(r8)
            lnk = self._k_grid(ln_r8, ln_r8)
            k = np.exp(lnk)
            w, _ = tophat_window(k * r8)
            # sigma^2(R) = 1/(2 pi^2) int k^3 P W^2 dln k (e.g. Peebles 1980 (memory)),
            # trapezoid rule in ln k
            sig2 = float(np.sum(self._unnormalised_k3p(k) * w * w)) * _LNK_STEP / (2 * math.pi**2)
            amp = self.cosmo.sigma8**2 / sig2
            self._cache["amplitude"] = amp
        return amp

    def power_mpc3(self, k_mpc, z=0.0):
        """Linear matter (cold) power spectrum.

        Parameters
        ----------
        k_mpc : float or array_like
            Comoving wavenumber in 1/Mpc, >= 0.
        z : float or array_like, optional
            Redshift in [0, cosmo.z_max]; broadcast against ``k_mpc``.

        Returns
        -------
        float or ndarray
            ``P(k, z) = A k^n_s T(k)^2 D(z)^2`` in comoving Mpc^3, with A set so that the
            top-hat rms in 8 Mpc/h spheres is ``cosmo.sigma8`` at z = 0.
        """
        k, k_scalar = _as_array(k_mpc)
        t = np.asarray(self.transfer_function(k))
        p = self._amplitude() * k**self.cosmo.n_s * t * t
        z_arr, z_scalar = _as_array(z)
        if not (z_scalar and z_arr[0] == 0.0):
            d = np.asarray(self.growth(z_arr))
            p = p * (d * d if not z_scalar else d[0] ** 2)
        return _out(p, k_scalar and z_scalar)

    # -------------------------------------------------------------- sigma(M)
    def _sigma_tables(self) -> _SigmaTables:
        tab = self._cache.get("sigma")
        if tab is not None:
            return tab
        rho = self.rho_mean_msun_mpc3
        h_m = 3.0 * _LNR_STRIDE * _LNK_STEP
        lnm_lo, lnm_hi = math.log(self.m_min_msun), math.log(self.m_max_msun)
        n_in = int(math.ceil((lnm_hi - lnm_lo) / h_m))
        lnm = lnm_lo + h_m * (np.arange(n_in + 1 + 2 * _PAD) - _PAD)
        # M = 4/3 pi rho R^3 (Lagrangian radius)
        ln_r = (lnm - math.log(4.0 / 3.0 * math.pi * rho)) / 3.0
        lnk = self._k_grid(float(ln_r[0]), float(ln_r[-1]))
        k = np.exp(lnk)
        weight = self._amplitude() * self._unnormalised_k3p(k) * _LNK_STEP / (2.0 * math.pi**2)
        # window on the 1-D grid ln x = ln k_0 + ln R_0 + s * step, s = j + stride * i
        n_x = lnk.size + _LNR_STRIDE * (ln_r.size - 1)
        x = np.exp(lnk[0] + ln_r[0] + _LNK_STEP * np.arange(n_x))
        w, xdw = tophat_window(x)
        # sigma^2(R_i) = sum_j weight_j W^2(k_j R_i) (trapezoid in ln k; Peebles 1980, memory)
        # imported here: scipy.signal takes ~0.4 s to import, and only tree generation
        # needs it (not every `bhgrow run`)
        from scipy.signal import fftconvolve

        sig2 = fftconvolve(w * w, weight[::-1], mode="valid")[::_LNR_STRIDE]
        # d sigma^2 / dln R = sum_j weight_j 2 W x W'(x) (derivative of the line above)
        dsig2 = fftconvolve(2.0 * w * xdw, weight[::-1], mode="valid")[::_LNR_STRIDE]
        # dln sigma / dln M = (1/6) dln sigma^2 / dln R (M ~ R^3)
        slope = dsig2 / sig2 / 6.0
        tab = _SigmaTables()
        tab.amplitude = self._amplitude()
        tab.ln_sigma = UniformCubicSpline(float(lnm[0]), h_m, 0.5 * np.log(sig2))
        tab.slope = UniformCubicSpline(float(lnm[0]), h_m, slope)
        tab.lnm_lo, tab.lnm_hi = lnm_lo, lnm_hi
        tab.inverse = _Inverse(tab.ln_sigma, lnm_lo, lnm_hi)
        tab.sigma_lo = math.exp(tab.inverse.y_lo)  # sigma(m_max)
        tab.sigma_hi = math.exp(tab.inverse.y_hi)  # sigma(m_min)
        self._cache["sigma"] = tab
        return tab

    def _lnm(self, m_msun, what: str):
        m, scalar = _as_array(m_msun)
        m = _check_range(m, self.m_min_msun, self.m_max_msun, f"halo mass for {what}",
                         " Msun", "the sigma(M) table range; set m_min_msun/m_max_msun",
                         "m_range", rel=True)
        return np.log(m), scalar

    def sigma(self, m_msun, z=0.0):
        """rms linear overdensity in top hats of mass M, at redshift z.

        Parameters
        ----------
        m_msun : float or array_like
            Mass in physical Msun, within [m_min_msun, m_max_msun].
        z : float or array_like, optional
            Redshift in [0, cosmo.z_max]; broadcast against ``m_msun``.

        Returns
        -------
        float or ndarray
            ``sigma(M, z) = sigma(M, 0) D(z)``, top-hat of comoving radius
            ``(3 M / (4 pi rho_mean))^(1/3)``; ``sigma(M_8, 0) = sigma8``.
        """
        lnm, m_scalar = self._lnm(m_msun, "sigma")
        s = np.exp(self._sigma_tables().ln_sigma(lnm))
        z_arr, z_scalar = _as_array(z)
        if not (z_scalar and z_arr[0] == 0.0):
            d = np.asarray(self.growth(z_arr))
            s = s * (d[0] if z_scalar else d)
        return _out(s, m_scalar and z_scalar)

    def dlnsigma_dlnm(self, m_msun):
        """Logarithmic slope of sigma(M) (independent of redshift).

        Parameters
        ----------
        m_msun : float or array_like
            Mass in physical Msun, within [m_min_msun, m_max_msun].

        Returns
        -------
        float or ndarray
            ``dln sigma / dln M`` (negative), tabulated from the quadrature of
            ``d sigma^2 / dln R`` (not by differencing the sigma table).
        """
        lnm, scalar = self._lnm(m_msun, "dlnsigma_dlnm")
        return _out(self._sigma_tables().slope(lnm), scalar)

    def mass_of_sigma(self, sigma0):
        """Mass whose z = 0 top-hat rms is ``sigma0`` (inverse of ``sigma(m, z=0)``).

        Parameters
        ----------
        sigma0 : float or array_like
            sigma at z = 0, within [sigma(m_max_msun), sigma(m_min_msun)].

        Returns
        -------
        float or ndarray
            Mass in physical Msun; ``sigma(mass_of_sigma(s)) == s`` to round-off.
        """
        s, scalar = _as_array(sigma0)
        tab = self._sigma_tables()
        s = _check_range(s, tab.sigma_lo, tab.sigma_hi, "sigma0 for mass_of_sigma", "",
                         "sigma(M, z=0) over the mass table", "sigma_range", rel=True)
        lnm = tab.inverse(np.log(s))
        np.clip(lnm, tab.lnm_lo, tab.lnm_hi, out=lnm)
        return _out(np.exp(lnm), scalar)

    # -------------------------------------------------------------- growth, delta_c
    def _growth_tables(self) -> _GrowthTables:
        tab = self._cache.get("growth")
        if tab is not None:
            return tab
        z_max = self.cosmo.z_max
        x_max = math.log1p(z_max)
        x, d = _growth_nodes(self.cosmo.astropy, self.omega_m0, x_max)
        ln_d = np.log(d) - math.log(d[_PAD])  # D(0) = 1
        dcrit = np.full_like(x, DELTA_CRIT_EDS)
        if self.delta_c_omega_dependence:
            om = np.asarray(self.cosmo.omega_m(np.expm1(x)), dtype=np.float64)
            flat = abs(self.cosmo.Ok0) < 1e-12
            expo = DELTA_CRIT_OMEGA_EXPONENT_FLAT if flat else DELTA_CRIT_OMEGA_EXPONENT_OPEN
            # delta_crit = 1.68647 Omega_m(z)^0.0055 (flat) / ^0.0185 (open) (NFW97, memory)
            dcrit = dcrit * om**expo
        tab = _GrowthTables()
        tab.x_max = x_max
        x0 = float(x[0])
        tab.ln_d = UniformCubicSpline(x0, _GROWTH_STEP, ln_d)
        # delta_c(z) = delta_crit(z) / D(z) (Lacey & Cole 1993)
        tab.ln_dc = UniformCubicSpline(x0, _GROWTH_STEP, np.log(dcrit) - ln_d)
        tab.inverse = _Inverse(tab.ln_dc, 0.0, x_max)
        tab.dc_lo = math.exp(tab.inverse.y_lo)
        tab.dc_hi = math.exp(tab.inverse.y_hi)
        self._cache["growth"] = tab
        return tab

    def _x(self, z, what: str):
        zz, scalar = _as_array(z)
        zz = _check_range(zz, 0.0, self.cosmo.z_max, f"redshift for {what}", "",
                          "the growth table range; build the Cosmology with a larger z_max",
                          "z_range", rel=False)
        return np.log1p(zz), scalar

    def growth(self, z):
        """Linear growth factor of cold matter, normalised to D(0) = 1.

        Parameters
        ----------
        z : float or array_like
            Redshift in [0, cosmo.z_max].

        Returns
        -------
        float or ndarray
            D(z) from the growth equation with the cosmology's E(z) (Lambda / dark energy,
            curvature, radiation, neutrinos as background; see module notes). In
            Einstein-de Sitter D = 1/(1+z).
        """
        x, scalar = self._x(z, "growth")
        return _out(np.exp(self._growth_tables().ln_d(x)), scalar)

    def delta_c(self, z):
        """Collapse threshold extrapolated to today, delta_crit(z) / D(z).

        Parameters
        ----------
        z : float or array_like
            Redshift in [0, cosmo.z_max].

        Returns
        -------
        float or ndarray
            ``delta_crit(z) / D(z)`` (Lacey & Cole 1993 "time" variable of extended
            Press-Schechter); 1.68647 at z = 0 unless ``delta_c_omega_dependence``.
        """
        x, scalar = self._x(z, "delta_c")
        return _out(np.exp(self._growth_tables().ln_dc(x)), scalar)

    def z_of_delta_c(self, w):
        """Redshift at which ``delta_c(z) = w`` (inverse of :meth:`delta_c`).

        Parameters
        ----------
        w : float or array_like
            Threshold, within [delta_c(0), delta_c(cosmo.z_max)].

        Returns
        -------
        float or ndarray
            z, inverse of the delta_c table to round-off.
        """
        ww, scalar = _as_array(w)
        tab = self._growth_tables()
        ww = _check_range(ww, tab.dc_lo, tab.dc_hi, "threshold w for z_of_delta_c", "",
                          "delta_c(z) for 0 <= z <= z_max", "delta_c_range", rel=True)
        x = tab.inverse(np.log(ww))
        np.clip(x, 0.0, tab.x_max, out=x)
        return _out(np.expm1(x), scalar)
