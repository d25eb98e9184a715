"""Reservoir and black hole together over a snapshot interval: the coupled gas-hole solver.

Over a node's interval every coefficient is fixed (halo properties are those of the node);
only the reservoir gas ``g``, its metals ``Z`` and the black-hole mass ``M`` change:

``dg/dt = I - a g - P m``,   ``dM/dt = k m``,   ``m = min(B g M^2, e M)``

with the inflow ``I`` (Msun/Gyr), the star-formation + wind loss rate ``a`` (1/Gyr,
:meth:`bhgrow.physics.gas.StarFormation.loss_rate`), the Bondi-Hoyle coefficient per unit
reservoir gas ``B`` (1/(Msun^2 Gyr); the zone density is linear in the gas, so
``A = B g`` for a constant-boost law), the Eddington coefficient ``e = 1/tau`` (1/Gyr),
``k = 1 - eps`` and the gas removed per unit accreted ``P = 1 + f_out`` (feedback; the hole
and the outflow it drives draw on the same reservoir, King 2003).

The system is solved *piecewise in closed form* (:func:`advance`), not by small steps:

* **Eddington phase** (``B g M >= e``): ``M(t) = M_0 exp(b t)`` with ``b = k e``
  (Salpeter 1964), and the gas equation is linear with exponential forcing, so
  ``g(t) = g_0 e^{-at} + I t phi1(a t) - P e M_0 t e^{bt} phi1((a + b) t)`` exactly. The
  phase ends where ``B g(t) M(t)`` falls to ``e`` (the reservoir can no longer feed the
  Eddington rate; found by safeguarded Newton iteration) or at the end of the step.
* **Bondi phase** (``B g M < e``): with the hole's mass frozen at ``Mbar`` in the drain,
  the gas equation is linear, ``dg/dt = I - (a + P B Mbar^2) g``, and solved exactly; the
  hole takes ``B Mbar^2 int g dt``. ``Mbar`` is the geometric mean of the masses at the
  start and end of the phase (predictor-corrector): for a reservoir in equilibrium this is
  exact, because ``1/M`` falls linearly in Bondi growth (Bondi 1952) and then
  ``int M^2 dt = M_0 M_1 t``. The predictor is the hole growing at the rate of its
  previous step (or, in the first step of an interval, of its previous interval, where the
  caller gives it), corrected once; without such a rate, or in steps that may reach the
  Eddington rate, the hole frozen at its starting mass, corrected twice. The phase ends
  where the gas (rising towards its equilibrium) or the hole's mass (growing) makes the
  Bondi rate reach the Eddington rate, or at the end.

:func:`advance` runs this loop in C, one halo at a time, where bhgrow's compiled kernels are
built (:mod:`bhgrow._kernels`); the array code here (``_advance``) is the reference
the kernel follows formula by formula and is tested against, and runs where the kernels are
missing or switched off (``BHGROW_KERNELS=0``).

Only the frozen ``Mbar`` of Bondi phases is an approximation, so the step limit
(:func:`substeps`) bounds the change of ``ln M`` over a Bondi phase; Eddington-limited
growth and reservoir exchanges of any speed (``a dt >> 1``) need no substeps. Star
formation, supernova outflow and metals (instantaneous recycling; Tinsley 1980) follow
from ``int g dt`` as in :class:`bhgrow.physics.gas.StarFormation`; accreted and blown-out
gas carry the metallicity of the reservoir, so ``d(Z/g)/dt = p - (Z/g) I/g`` whatever the
hole does: exact in Bondi phases and for a closed box, with the inflow's dilution taken at
the phase-mean gas in Eddington phases (and never above the closed-box metallicity or the
metals there were plus those made). The gas ledger
``g_1 = g_0 + I dt - a int g dt - P accreted`` holds to round-off in every phase. Phase
switches are placed within a band of :data:`_EDD_TOL` (1e-3) of the Eddington rate, so the
accretion rate can exceed Eddington by at most that fraction.

References
----------
.. [B52] Bondi H., 1952, MNRAS, 112, 195
.. [S64] Salpeter E. E., 1964, ApJ, 140, 796
.. [K03] King A., 2003, ApJ, 596, L27
.. [T80] Tinsley B. M., 1980, Fund. Cosmic Phys., 5, 287
.. [HO10] Hochbruck M., Ostermann A., 2010, Acta Numerica, 19, 209 (phi-functions)
.. [P07] Press W. H., Teukolsky S. A., Vetterling W. T., Flannery B. P., 2007, Numerical
   Recipes, 3rd edn, Cambridge Univ. Press, sect. 9.4 (safeguarded Newton, rtsafe)

Journal references from memory.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from .. import _kernels

__all__ = ["Coefficients", "IntervalResult", "advance", "substeps"]

#: phases per halo, beyond two per Bondi step, before the remaining time is taken in one
#: Bondi phase regardless of further switches (capped at Eddington-limited growth)
_MAX_PHASES = 6
#: most safeguarded Newton iterations for a phase switch (after :func:`_polish` usually
#: 1-3 suffice; each bisection fallback halves the bracket)
_ROOT_ITERS = 60
#: Newton steps on a root's cheap closed form before the safeguarded iteration (:func:`_polish`)
_POLISH_STEPS = 3
_SERIES_X = 0.05
#: a reservoir feeding at least (1 - _EDD_TOL) of the Eddington rate counts as Eddington-fed:
#: the phase switches, which are found by root finding, then land on the right side
_EDD_TOL = 1e-3
#: e^(-tol) and e^(+tol): the band's edges as factors (ln(B g M / e) against -+tol)
_EXP_M_TOL, _EXP_P_TOL = np.exp(-_EDD_TOL), np.exp(_EDD_TOL)
#: rise of the hole's share of the reservoir's loss rate per step, per unit max_dlnm
_DRAIN_SHARE = 0.1
#: a Bondi step may grow where its actual growth stayed below this share of the bounds
_STEP_SAFETY = 0.8
#: a later Bondi step ending within this factor of the Eddington rate takes the full
#: predictor-corrector path (its runaway test needs the predictor at the starting mass)
_RUNAWAY_MARGIN = float(np.exp(-0.05))


class Coefficients(NamedTuple):
    """Per-halo coefficients, fixed over the interval (float64 arrays, one entry per halo).

    Attributes
    ----------
    inflow : numpy.ndarray
        ``I``, pristine inflow, Msun/Gyr (>= 0).
    loss : numpy.ndarray
        ``a``, gas loss rate to star formation and winds, 1/Gyr (>= 0).
    lock : numpy.ndarray
        Part of ``a`` locked into long-lived stars, ``(1 - R) eps_* / t_dyn``, 1/Gyr.
    metal_rate : numpy.ndarray
        New metals per unit gas, ``y (1 - R) eps_* / t_dyn``, 1/Gyr.
    bondi_per_gas : numpy.ndarray
        ``B``: Bondi-Hoyle coefficient per Msun of reservoir gas, 1/(Msun^2 Gyr) (>= 0).
    edd : numpy.ndarray
        ``e = 1/tau``, Eddington coefficient, 1/Gyr (> 0).
    keep : numpy.ndarray
        ``k = 1 - eps``, fraction of accreted gas added to the hole.
    per_unit : numpy.ndarray
        ``P``, reservoir gas removed per unit accreted (1 + feedback outflow), >= 1.
    """

    inflow: np.ndarray
    loss: np.ndarray
    lock: np.ndarray
    metal_rate: np.ndarray
    bondi_per_gas: np.ndarray
    edd: np.ndarray
    keep: np.ndarray
    per_unit: np.ndarray

    def take(self, i) -> "Coefficients":
        return Coefficients(*(c[i] for c in self))


class IntervalResult(NamedTuple):
    """State after :func:`advance` and what left the reservoir (Msun, float64 arrays)."""

    gas: np.ndarray
    metals: np.ndarray
    m_bh: np.ndarray
    accreted: np.ndarray
    stars_formed: np.ndarray
    wind: np.ndarray
    feedback: np.ndarray
    #: time integral of the reservoir gas over the step, Msun Gyr
    gas_integral: np.ndarray


# The helpers below run inside ``advance``/``substeps``, which silence floating-point
# warnings once (0/0 at x = 0 is replaced; exp overflow only where the result is unused).
def _small(x, out, series):
    """Replace ``out`` by ``series(x)`` where ``|x| <`` :data:`_SERIES_X`."""
    small = np.abs(x) < _SERIES_X
    if small.any():
        out[small] = series(x[small])
    return out


# Above x = 0.05 the forms with exp() lose at most ~1e-13 to cancellation; below it the
# 7-term Taylor series is exact to < 1e-15. (numpy's expm1 is ~20x slower than exp.)
def _series_phi1(v):
    return 1.0 + v * (-1.0 / 2 + v * (1.0 / 6 + v * (-1.0 / 24 + v * (1.0 / 120 + v * (
        -1.0 / 720 + v / 5040)))))


def _series_phi2(v):
    return 0.5 + v * (-1.0 / 6 + v * (1.0 / 24 + v * (-1.0 / 120 + v * (1.0 / 720 + v * (
        -1.0 / 5040 + v / 40320)))))


def _phi1(x, e=None):
    """``(1 - e^-x) / x`` (1 at 0; ``e``: ``e^-x`` if already known)."""
    e = np.exp(-x) if e is None else e
    return _small(x, (1.0 - e) / x, _series_phi1)


def _phi2(x, e=None):
    """``(x - 1 + e^-x) / x^2`` (1/2 at 0; ``e``: ``e^-x`` if already known)."""
    e = np.exp(-x) if e is None else e
    return _small(x, (x - 1.0 + e) / (x * x), _series_phi2)


def _exp_phi12(x):
    """``e^-x``, ``phi1(x)`` and ``phi2(x)`` from one exponential (``x >= 0``).

    ``phi2 = (1 - phi1) / x`` loses ~1e-13 to cancellation at ``x = 0.05``, as the direct
    form does; below that both phi-functions take their series.
    """
    e = np.exp(-x)
    f1 = (1.0 - e) / x
    f2 = (1.0 - f1) / x
    small = np.abs(x) < _SERIES_X
    if small.any():
        xs = x[small]
        f1[small] = _series_phi1(xs)
        f2[small] = _series_phi2(xs)
    return e, f1, f2


def _series_psi(v):
    return 0.5 + v * (-1.0 / 3 + v * (1.0 / 8 + v * (-1.0 / 30 + v * (1.0 / 144 + v * (
        -1.0 / 840 + v / 5760)))))


def _psi(x, e=None):
    """``(1 - (1 + x) e^-x) / x^2`` (1/2 at 0): sum_k (-1)^k (k + 1) x^k / (k + 2)!
    (``e``: ``e^-x`` if already known)."""
    e = np.exp(-x) if e is None else e
    return _small(x, (1.0 - (1.0 + x) * e) / (x * x), _series_psi)


def _metals(z0, g0, inflow, rate, p, t, e=None):
    """Metals after ``t`` with production ``p g`` and total loss ``rate Z`` when the gas
    follows ``g(u) = g0 e^{-rate u} + I u phi1(rate u)`` (variation of constants;
    ``e``: ``e^{-rate t}`` if already known)."""
    x = rate * t
    e = np.exp(-x) if e is None else e
    return z0 * e + p * (g0 * t * e + inflow * t * t * _psi(x, e))


def _eddington_gas_at(g0, m0, inflow, a, b, pe, t):
    """Gas after ``t`` of an Eddington phase (exact), ``e^{bt}``, ``phi1(a t)`` and
    ``e^{-at}`` (``a``: loss rate, ``b = k e``, ``pe = P e``)."""
    at, bt = a * t, b * t
    e_at = np.exp(-at)
    f1a = _small(at, (1.0 - e_at) / at, _series_phi1)
    ebt = np.exp(bt)
    # variation of constants for dg/dt = I - a g - P e M_0 e^{bt}: the forcing integrates
    # to t e^{bt} phi1((a + b) t), whose exponential is e^{-at} / e^{bt}
    g = g0 * e_at + inflow * t * f1a - pe * m0 * t * ebt * _phi1(at + bt, e_at / ebt)
    return g, ebt, f1a, e_at


def _eddington_state(g0, m0, c: Coefficients, t):
    """Gas and hole mass after ``t`` of an Eddington phase (exact), and ``phi1(a t)``."""
    g, ebt, f1a, _ = _eddington_gas_at(g0, m0, c.inflow, c.loss, c.keep * c.edd,
                                       c.per_unit * c.edd, t)
    return g, m0 * ebt, f1a


def _eddington_gas(g0, m0, c: Coefficients, t):
    """Gas, its time integral and the hole mass after ``t`` of an Eddington phase (exact)."""
    a, b = c.loss, c.keep * c.edd
    g, ebt, f1a, e_at = _eddington_gas_at(g0, m0, c.inflow, a, b, c.per_unit * c.edd, t)
    f2a = _phi2(a * t, e_at)
    gi = (g0 * t * f1a + c.inflow * t * t * f2a
          - c.per_unit * c.edd * m0 * _drain_integral(a, b, t, ebt, f2a))
    return g, gi, m0 * ebt


def _drain_integral(a, b, t, ebt=None, f2a=None):
    """``int_0^t (e^{bu} - e^{-au}) / (a + b) du`` for a >= 0, b > 0 (no cancellation).

    Equals ``t^2 [b q(bt) + a phi2(at)] / (a + b)`` with ``q(x) = (e^x - 1 - x) / x^2``
    (``ebt``, ``f2a``: ``e^{bt}`` and ``phi2(at)`` if already known).
    """
    bt = b * t
    ebt = np.exp(bt) if ebt is None else ebt
    f2a = _phi2(a * t) if f2a is None else f2a
    # q(x) = (e^x - 1 - x) / x^2 = sum_k x^k / (k + 2)!
    q = _small(bt, (ebt - 1.0 - bt) / (bt * bt), lambda v: 0.5 + v * (1.0 / 6 + v * (
        1.0 / 24 + v * (1.0 / 120 + v * (1.0 / 720 + v * (1.0 / 5040 + v / 40320))))))
    return t * t * (b * q + a * f2a) / (a + b)


def _bondi_phase(g0, m0, c: Coefficients, t, mbar, lam=None):
    """Gas, its integral and the gas accreted over ``t`` with the hole frozen at ``mbar``,
    the gas's loss rate ``lam`` (1/Gyr; given if already known) and ``e^{-lam t}``."""
    cc = c.bondi_per_gas * mbar * mbar
    lam = c.loss + c.per_unit * cc if lam is None else lam
    e, f1, f2 = _exp_phi12(lam * t)
    g = g0 * e + c.inflow * t * f1
    gi = g0 * t * f1 + c.inflow * t * t * f2
    return g, gi, cc * gi, lam, e


def _bondi_gas_integral(g0, c: Coefficients, t, mbar):
    """The gas integral of :func:`_bondi_phase` alone."""
    lam = c.loss + c.per_unit * (c.bondi_per_gas * mbar * mbar)
    _, f1, f2 = _exp_phi12(lam * t)
    return g0 * t * f1 + c.inflow * t * t * f2


def _bondi_switch_time(g0, c: Coefficients, mbar, t, lam):
    """Time at which gas rising towards its Bondi equilibrium reaches ``e / (B mbar)``
    (``lam``: the gas's loss rate with the hole at ``mbar`` in the drain, 1/Gyr)."""
    g_eq = c.inflow / lam
    g_star = c.edd / (c.bondi_per_gas * mbar)
    rises = (g_eq > g_star) & (g0 < g_star)
    out = t.copy()
    i = np.flatnonzero(rises & (lam > 0))       # usually few: the logarithm only there
    if i.size:
        ts = np.log((g_eq[i] - g0[i]) / (g_eq[i] - g_star[i])) / lam[i]
        out[i] = np.clip(ts, 0.0, t[i])
    # no loss at all: g rises linearly (rare: tested for first)
    flat = lam <= 0
    if flat.any():
        i = np.flatnonzero(flat & (c.inflow > 0) & (g0 < g_star))
        out[i] = np.clip((g_star[i] - g0[i]) / c.inflow[i], 0.0, t[i])
    return out


def _newton(fdf, lo, hi, args, s0):
    """Root of a decreasing ``f`` bracketed by ``f(lo) >= 0 > f(hi)`` (vectorized).

    ``fdf(s, *args)`` returns ``(f, f', band)`` at ``s`` (``args``: per-element arrays,
    compacted here as elements finish); a point with ``0 <= f <= band`` is accepted.
    Safeguarded Newton (rtsafe, Press et al. 2007, sect. 9.4) from the first point ``s0``
    (inside the bracket); each step is aimed at the middle of the acceptance band, so a
    converging iterate lands inside it rather than just outside on either side; a step
    that leaves the bracket (or a slope that is not negative, near a maximum of ``f``) is
    replaced by bisection of the bracket. Accepted points stay put and leave the iteration, so each
    root depends on its own halo only (results must not depend on which halos share a
    chunk). At most :data:`_ROOT_ITERS` iterations. Returns the accepted points, else the
    last point known to have ``f >= 0``.
    """
    out = lo.copy()
    # iterate, bracket, element index (as float: exact) and the arguments as rows of one
    # array, so dropping accepted elements is one gather instead of one per array (most
    # iterations of a call run on a few elements, where numpy's cost per call dominates)
    rows = np.empty((4 + len(args), lo.size))
    rows[0], rows[1], rows[2], rows[3] = s0, lo, hi, np.arange(lo.size)
    for r, x in zip(rows[4:], args):
        r[...] = x
    for _ in range(_ROOT_ITERS):
        s = rows[0]
        f, df, band = fdf(s, *rows[4:])
        up = f >= 0.0
        ok = up & (f <= band)
        if ok.all():
            out[rows[3].astype(np.intp)] = s
            return out
        if ok.any():
            out[rows[3][ok].astype(np.intp)] = s[ok]
            keep = ~ok
            rows = rows[:, keep]
            f, df, band, up = f[keep], df[keep], band[keep], up[keep]
            s = rows[0]
        lo, hi = rows[1], rows[2]
        nxt = s - (f - 0.5 * band) / df
        np.copyto(lo, s, where=up)
        np.copyto(hi, s, where=~up)
        s[...] = np.where((nxt > lo) & (nxt < hi), nxt, 0.5 * (lo + hi))
    out[rows[3].astype(np.intp)] = rows[1]
    return out


def _polish(fdf, s0, lo, hi, valid):
    """:data:`_POLISH_STEPS` Newton steps on a cheap closed form of a decreasing ``f``
    (``fdf(s) -> (f, f')``), bracketed by ``lo, hi``, for every element at once (no
    compaction, no acceptance test: :func:`_newton` follows with the exact ``f``, so this
    only improves its first point). Where a step leaves the bracket, bisection; where
    ``valid`` is false, ``s0`` is kept."""
    s, lo, hi = s0.copy(), lo.copy(), hi.copy()
    for _ in range(_POLISH_STEPS):
        f, df = fdf(s)
        up = f >= 0.0
        np.copyto(lo, s, where=up)
        np.copyto(hi, s, where=~up)
        nxt = s - f / df
        # the ends count as inside: a converged point whose step is below round-off
        # stays put (no acceptance test here to stop it)
        s = np.where((nxt >= lo) & (nxt <= hi), nxt, 0.5 * (lo + hi))
    return np.where(valid & np.isfinite(s), s, s0)


def _eddington_end(g0, m0, c: Coefficients, t):
    """End of an Eddington phase that cannot last ``t``: where the gas falls to
    ``(1 - tol) e / (B M)`` (:data:`_EDD_TOL`), i.e. the reservoir no longer feeds ``e M``."""
    star = (1.0 - _EDD_TOL) * c.edd / (c.bondi_per_gas * m0)   # g* at s = 0
    b, pe = c.keep * c.edd, c.per_unit * c.edd
    mid = star * (1.0 + 0.5 * _EDD_TOL / (1.0 - _EDD_TOL))      # middle of the band at s = 0
    lo = np.zeros_like(t)
    # first point: where the gas, relaxing at rate a towards (I - P e M0) / a with the
    # drain frozen at its start, reaches the band (the hole grows little over most such
    # phases), refined once with the drain growing linearly, P e M0 (1 + b s), and g*
    # falling as e^{-bs} at the first estimate: then g(s) = A + B s + (g0 - A) e^{-as}.
    # Measured: 1.7 evaluations per root instead of 4.5 from the start. Where that has
    # no root, the Newton step from the start (f = g0 - g*, f' = I - a g0 - P e M0 + b g*).
    a, drain = c.loss, pe * m0
    g_eq = (c.inflow - drain) / a
    nxt = np.log((g0 - g_eq) / (mid - g_eq)) / a
    slope = -drain * b / a
    base = g_eq + drain * b / (a * a)
    ref = np.log((g0 - base) / (mid * np.exp(-b * nxt) - slope * nxt - base)) / a
    nxt = np.where(np.isfinite(ref) & (ref > 0.0), ref, nxt)
    newton = -(g0 - mid) / (c.inflow - a * g0 - drain + b * star)
    nxt = np.where(np.isfinite(nxt) & (nxt > 0.0), nxt, newton)
    # The gas of the phase is exactly g = I/a + C e^{-as} - K e^{bs} (K = P e M0 / (a + b),
    # C = g0 - I/a + K). Below its quasi-static path (C < 0, the gas still rising towards
    # it while the hole's drain grows as e^{bs}), f = g - g* is concave: start where the
    # quasi-static gas meets the band, I/a - K w - mid / w = 0 (w = e^{bs}, the larger
    # root), which lies beyond the root, so Newton converges from there without
    # overshooting. The guesses above assume a slowly growing drain and were off by up
    # to 5x there (~10 iterations for such a root; measured on the toy forests).
    k_q = drain / (a + b)
    q = c.inflow / a
    cq = g0 - q + k_q
    below = (cq < 0.0) & (a > 0.0)
    if below.any():
        w = (q + np.sqrt(q * q - 4.0 * k_q * mid)) / (2.0 * k_q)
        quasi = np.log(w) / b
        nxt = np.where(below & np.isfinite(quasi) & (quasi > 0.0), quasi, nxt)
    s0 = np.where((nxt > lo) & (nxt < t), nxt, 0.5 * t)

    # then Newton steps on that closed form, aimed at the band's middle, mid e^{-bs} (the
    # exact f, with phi-functions that keep it accurate for small a s, decides after)
    def cheap(u):
        e_a, e_b = np.exp(-a * u), np.exp(b * u)
        return (q + cq * e_a - k_q * e_b - mid / e_b,
                -a * cq * e_a - b * k_q * e_b + b * mid / e_b)

    s0 = _polish(cheap, s0, lo, t, a > 0.0)
    return _newton(_eddington_end_fdf, lo, t.copy(),
                   (g0, m0, c.inflow, c.loss, b, pe, star), s0)


def _eddington_end_fdf(s, g0, m0, inflow, a, b, pe, star):
    # M = M_0 e^{bs} and g* = star e^{-bs}
    g, ebt, _, _ = _eddington_gas_at(g0, m0, inflow, a, b, pe, s)
    gs = star / ebt
    # dg/dt = I - a g - P e M (Eddington phase); d g*/dt = -b g*; accepted where the rate
    # is within [1 - tol, 1] of Eddington
    return (g - gs, inflow - a * g - pe * m0 * ebt + b * gs,
            _EDD_TOL / (1.0 - _EDD_TOL) * gs)


def _bondi_mass(m0, c: Coefficients, gas_integral):
    """Hole mass after Bondi growth: ``1/M = 1/M_0 - k B int g dt`` (Bondi 1952)."""
    d = c.keep * c.bondi_per_gas * m0 * gas_integral
    return m0 / np.maximum(1.0 - d, 1e-12)


def _mean_mass(m0, c: Coefficients, gas_integral, edd_growth, m1=None):
    """``sqrt(M_0 M_1)`` for Bondi growth, ``M_1`` capped at Eddington growth
    (``edd_growth = e^{k e t}`` over the phase; ``m1``: the Bondi-grown mass
    :func:`_bondi_mass` if already known).

    With the hole frozen at this mass in the drain, the gas it takes, ``B Mbar^2 int g``,
    equals the Bondi growth ``(M_1 - M_0) / k`` exactly.
    """
    m1 = _bondi_mass(m0, c, gas_integral) if m1 is None else m1
    return np.sqrt(m0 * np.minimum(m1, m0 * edd_growth))


def _bondi_runaway(g0, m0, c: Coefficients, t, mbar, g_t, gi_t):
    """Where Bondi growth of the hole lifts ``B g M / e`` to ``1 + tol`` within ``t``
    (``g_t``, ``gi_t``: the gas and its integral after ``t`` with the hole at ``mbar`` in
    the drain)."""
    lam = c.loss + c.per_unit * c.bondi_per_gas * mbar * mbar
    e_b = (1.0 + _EDD_TOL) * c.edd / c.bondi_per_gas
    inv_m0, kb = 1.0 / m0, c.keep * c.bondi_per_gas
    # start at the regula-falsi point of (0, t): f(0) > 0 > f(t) are known (f(t) from the
    # phase the caller computed); measured to save ~35% of the evaluations
    f_lo, f_hi = e_b * inv_m0 - g0, e_b * (inv_m0 - kb * gi_t) - g_t
    s0 = t * np.clip(f_lo / (f_lo - f_hi), 0.0, 1.0)
    # then Newton steps on the closed form of the phase, g = g_eq + D e^{-lam s},
    # int g = g_eq s + D (1 - e^{-lam s}) / lam, aimed at the band's middle
    g_eq = c.inflow / lam
    d = g0 - g_eq
    h = (1.0 - 0.5 * _EDD_TOL / (1.0 + _EDD_TOL)) * e_b

    def cheap(u):
        e = np.exp(-lam * u)
        g = g_eq + d * e
        return (h * (inv_m0 - kb * (g_eq * u + d * (1.0 - e) / lam)) - g,
                -h * kb * g + lam * d * e)

    s0 = _polish(cheap, s0, np.zeros_like(t), t, lam > 0.0)
    return _newton(_bondi_runaway_fdf, np.zeros_like(t), t.copy(),
                   (g0, inv_m0, c.inflow, lam, kb, e_b), s0)


def _bondi_runaway_fdf(s, g0, inv_m0, inflow, lam, kb, e_b):
    # the gas and its integral of _bondi_phase (hole frozen in the drain)
    e, f1, f2 = _exp_phi12(lam * s)
    g = g0 * e + inflow * s * f1
    gi = g0 * s * f1 + inflow * s * s * f2
    # g* = e / (B M) with 1/M = 1/M_0 - k B int g (Bondi 1952): linear in int g, so
    # (g* - g) is smooth; d/dt = -e_b k B g - (I - lam g); accepted where the rate is
    # within [1, 1 + tol] of Eddington
    inv_m = inv_m0 - kb * gi
    return (e_b * inv_m - g, -e_b * kb * g - (inflow - lam * g),
            _EDD_TOL / (1.0 + _EDD_TOL) * e_b * inv_m)


def advance(gas, metals, m_bh, c: Coefficients, dt, n_steps=None,
            max_dlnm=None, prior_rate=None) -> IntervalResult:
    """Advance reservoir and black hole over ``dt`` (piecewise closed form).

    Parameters
    ----------
    gas : numpy.ndarray
        Reservoir gas at the start, Msun (>= 0).
    metals : numpy.ndarray
        Metal mass in the reservoir gas, Msun (>= 0).
    m_bh : numpy.ndarray
        Black-hole mass, Msun (> 0).
    c : Coefficients
        Fixed coefficients of each halo.
    dt : numpy.ndarray
        Interval length, Gyr (>= 0).
    n_steps : numpy.ndarray, optional
        Per halo: Bondi phases last at most ``dt / n_steps`` (:func:`substeps`; default 1).
        Eddington phases are exact and are never cut.
    max_dlnm : float, optional
        The step criterion of :func:`substeps`. If given, a full Bondi step whose actual
        growth ``ln(M_1/M_0)`` and drain-share rise stayed within 0.8 of their bounds lets
        the halo's next Bondi step grow by that margin (at most doubled; never below
        ``dt / n_steps``): the step count from :func:`substeps` rests on upper bounds of
        the growth, which can be loose.
    prior_rate : numpy.ndarray, optional
        Per halo: the hole's ln-growth rate ``d ln M / dt`` over its previous interval,
        1/Gyr; where > 0 it predicts the hole's mean mass in the first Bondi step (one
        phase evaluation fewer). Measured on the 1e7-node toy forest against
        ``substep_dlnm = 0.05``: p99.9 of surviving centrals 4.8e-3 -> 2.5e-3, worst
        1.4% -> 0.9%, total within 2.2e-5 either way.

    Returns
    -------
    IntervalResult
        Gas, metals and hole mass at the end; gas accreted by the hole, locked into stars,
        blown out by supernova winds and by feedback over the step (Msun); the time
        integral of the gas (Msun Gyr). The hole grows
        by ``k accreted``; ``gas_end = gas + I dt - accreted - stars - wind - feedback``.
    """
    compiled = _kernels.kernels()
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        if compiled is None:
            return _advance(gas, metals, m_bh, c, dt, n_steps, max_dlnm, prior_rate)
        return _advance_compiled(compiled, gas, metals, m_bh, c, dt, n_steps, max_dlnm,
                                 prior_rate)


def _advance_compiled(compiled, gas, metals, m_bh, c: Coefficients, dt, n_steps, max_dlnm,
                      prior_rate) -> IntervalResult:
    """:func:`advance` by the compiled kernel (:mod:`bhgrow._kernels`; same arguments
    and results as ``_advance``, the array code it follows)."""
    shape = np.shape(gas)

    def flat(x):
        return np.broadcast_to(np.asarray(x, dtype=np.float64), shape).ravel()

    cf = Coefficients(*(flat(x) for x in c))
    steps = np.ones(cf.inflow.size) if n_steps is None else flat(n_steps)
    prior = np.full(cf.inflow.size, np.nan) if prior_rate is None else flat(prior_rate)
    out = compiled.advance_halos(flat(gas), flat(metals), flat(m_bh), cf, flat(dt), steps,
                                 max_dlnm, prior)
    g, z, m, acc, gint = (o.reshape(shape) for o in out)
    lock, loss, per_unit = (x.reshape(shape) for x in (cf.lock, cf.loss, cf.per_unit))
    return IntervalResult(gas=g, metals=z, m_bh=m, accreted=acc, stars_formed=lock * gint,
                          wind=(loss - lock) * gint, feedback=(per_unit - 1.0) * acc,
                          gas_integral=gint)


def _advance(gas, metals, m_bh, c: Coefficients, dt, n_steps, max_dlnm,
             prior_rate=None) -> IntervalResult:
    g = np.array(gas, dtype=np.float64)
    z = np.array(metals, dtype=np.float64)
    m = np.array(m_bh, dtype=np.float64)
    left = np.array(dt, dtype=np.float64)
    n = g.size
    steps = np.ones(n) if n_steps is None else np.asarray(n_steps, dtype=np.float64)
    h_bondi = left / steps         # Bondi step of each halo (grows where max_dlnm allows)
    # phases per halo before the rest is taken without further switches: the Bondi steps
    # plus room for the switches (a phase rarely needs more than two per step)
    limit = 2.0 * steps + _MAX_PHASES
    count = np.zeros(n)
    acc = np.zeros(n)
    gint = np.zeros(n)
    # ln-growth rate of each halo's last Bondi phase, 1/Gyr (NaN: none yet); it predicts
    # the hole's mean mass in the next Bondi step of the same interval
    rate = np.full(n, np.nan)
    if prior_rate is not None:
        pr = np.asarray(prior_rate, dtype=np.float64)
        rate = np.where(pr > 0, pr, rate)
    todo = np.flatnonzero(left > 0)
    while todo.size:
        if todo.size == n:            # usually the first phase: no gathers
            g0, z0, m0, t = g.copy(), z.copy(), m.copy(), left.copy()
            hb, last = h_bondi, count >= limit
            bpg, e_c = c.bondi_per_gas, c.edd
        else:
            g0, z0, m0, t = g[todo], z[todo], m[todo], left[todo]
            hb, last = h_bondi[todo], count[todo] >= limit[todo]
            bpg, e_c = c.bondi_per_gas[todo], c.edd[todo]
        # the regime of each phase from its start (B g M >= e); switches
        # land inside the tolerance band (a phase ending early leaves the rest to the next)
        edd = (bpg * g0 * m0 >= e_c) & ~last

        # --- Eddington phases: exact; end where the reservoir can no longer feed e M -------
        ie = np.flatnonzero(edd)
        every = ie.size == t.size         # one regime for all: no subsets to gather
        if 0 < ie.size < t.size:
            g1, z1, m1, a1, gi1, used = (np.empty_like(g0) for _ in range(6))
        if ie.size:
            ce = c if every and todo.size == n else c.take(ie if todo.size == n else todo[ie])
            ge0, me0, ze0 = (g0, m0, z0) if every else (g0[ie], m0[ie], z0[ie])
            te = t.copy() if every else t[ie]
            ge, gie, me = _eddington_gas(ge0, me0, ce, te)
            j = np.flatnonzero(ce.bondi_per_gas * ge * me < _EXP_M_TOL * ce.edd)
            if j.size:
                cj = ce.take(j)
                gj, mj = ge0[j], me0[j]
                s = _eddington_end(gj, mj, cj, te[j])
                ge[j], gie[j], me[j] = _eddington_gas(gj, mj, cj, s)
                te[j] = s
            ge = np.maximum(ge, 0.0)      # round-off at the switch
            # gas taken, M_0 (e^{k e t} - 1) / k without cancellation, and the hole from it
            acc_e = me0 * np.expm1(ce.keep * ce.edd * te) / ce.keep
            me = me0 + ce.keep * acc_e
            # metals: accretion and outflows remove gas at its metallicity mu = Z/g, so
            # d mu/dt = p - mu I/g whatever the hole does; exact for I = 0 (closed box,
            # Tinsley 1980), with the inflow's dilution at the phase-mean gas otherwise
            mu0 = np.divide(ze0, ge0, out=np.zeros(ie.size), where=ge0 > 0)
            x = np.where(gie > 0, ce.inflow * te * te / gie, 0.0)
            e_x = np.exp(-x)
            mu1 = mu0 * e_x + ce.metal_rate * te * _phi1(x, e_x)
            # never above the two exact bounds: the closed-box metallicity, and the metals
            # there were plus those made
            ze1 = np.minimum(mu1 * ge, ze0 + ce.metal_rate * gie)
            if every:
                g1, z1, m1, a1, gi1, used = ge, ze1, me, acc_e, gie, te
            else:
                z1[ie] = ze1
                g1[ie], m1[ie], a1[ie], gi1[ie], used[ie] = ge, me, acc_e, gie, te

        # --- Bondi phases: hole frozen at the geometric mean of its end masses -----------
        ib = np.flatnonzero(~edd)
        every = ib.size == t.size
        if ib.size:
            cb = c if every and todo.size == n else c.take(ib if todo.size == n else todo[ib])
            gb0, mb0, zb0, lb, tl, hl = (g0, m0, z0, last, t, hb) if every else (
                g0[ib], m0[ib], z0[ib], last[ib], t[ib], hb[ib])
            # at most one Bondi step, ending early where the gas, rising towards its
            # equilibrium, lifts the rate to Eddington; the last phase of a halo takes all
            # that is left
            lam0 = cb.loss + cb.per_unit * (cb.bondi_per_gas * mb0 * mb0)
            tb = _bondi_switch_time(gb0, cb, mb0, np.minimum(tl, hl), lam0)
            if lb.any():
                tb = np.where(lb, tl, tb)
            kt = cb.keep * cb.edd * tb
            ekt = np.exp(kt)
            idx_b = ib if todo.size == n else todo[ib]
            rb = rate[idx_b]
            guess = np.isfinite(rb) & ~lb
            if guess.any():
                # a later Bondi step: the hole's mean mass predicted from the previous step's
                # growth rate, then one correction (two evaluations instead of three)
                m_pred = np.sqrt(mb0 * np.minimum(mb0 * np.exp(np.where(guess, rb, 0.0) * tb),
                                                  mb0 * ekt))
                m_first = np.where(guess, m_pred, mb0)
                gb, gib, _, _, _ = _bondi_phase(gb0, mb0, cb, tb, m_first)
                m1b = _bondi_mass(mb0, cb, gib)
                # near a runaway (within 5% of Eddington at the end), take the full path
                near = guess & (cb.bondi_per_gas * gb * m1b > _RUNAWAY_MARGIN * cb.edd)
                if near.any():
                    q = np.flatnonzero(near)
                    cq = cb.take(q)
                    gb[q], gib[q], _, _, _ = _bondi_phase(gb0[q], mb0[q], cq, tb[q], mb0[q])
                    m1b[q] = _bondi_mass(mb0[q], cq, gib[q])
                    guess = guess & ~near
            else:
                gb, gib, _, _, _ = _bondi_phase(gb0, mb0, cb, tb, mb0, lam0)          # predictor
                m1b = _bondi_mass(mb0, cb, gib)
            # the hole's own growth lifts the rate to Eddington within the phase
            j = np.flatnonzero((cb.bondi_per_gas * gb * m1b > _EXP_P_TOL * cb.edd) & ~lb
                               & ~guess)
            if j.size:
                cj = cb.take(j)
                gj, mj = gb0[j], mb0[j]
                tb[j] = _bondi_runaway(gj, mj, cj, tb[j], mj, gb[j], gib[j])
                kt[j] = cj.keep * cj.edd * tb[j]
                ekt[j] = np.exp(kt[j])
                gb[j], gib[j], _, _, _ = _bondi_phase(gj, mj, cj, tb[j], mj)
                m1b[j] = _bondi_mass(mj, cj, gib[j])
            mbar = _mean_mass(mb0, cb, gib, ekt, m1b)
            # corrector for first steps (for every such phase: where the hole's drain hardly
            # changes, selecting the few phases that need none cost more than it saves)
            op = np.flatnonzero(~guess)
            if op.size == tb.size:
                mbar = _mean_mass(mb0, cb, _bondi_gas_integral(gb0, cb, tb, mbar), ekt)
            elif op.size:
                co = cb.take(op)
                mbar[op] = _mean_mass(mb0[op], co, _bondi_gas_integral(gb0[op], co, tb[op],
                                                                       mbar[op]), ekt[op])
            gb, gib, accb, lam, e_lam = _bondi_phase(gb0, mb0, cb, tb, mbar)
            if lb.any():
                # no more switches: never above the Eddington-limited growth; gas not
                # taken stays in the reservoir
                cap_b = mb0 * np.expm1(kt) / cb.keep
                over = np.where(lb, np.maximum(accb - cap_b, 0.0), 0.0)
                accb = accb - over
                gb = gb + cb.per_unit * over
            zb1 = _metals(zb0, gb0, cb.inflow, lam, cb.metal_rate, tb, e_lam)
            # growth rate (the next step's predictor) and step control only where another
            # phase of the interval follows (most halos finish in this one)
            cont = np.flatnonzero((tl - tb > 1e-12 * tl) & ~lb)
            if cont.size:
                tc, mc, hc = tb[cont], mb0[cont], hl[cont]
                cc = cb.take(cont)
                ac = accb[cont]
                dl = np.log1p(cc.keep * ac / mc)
                pos = tc > 0
                rate[idx_b[cont]] = np.where(pos, dl / np.where(pos, tc, 1.0), np.nan)
                if max_dlnm is not None:
                    # a-posteriori step control on the criteria of substeps(): growth and
                    # the rise of the drain share over this step (the usual rule of adaptive
                    # integrators, e.g. Hairer, Norsett & Wanner 1993, sect. II.4; memory)
                    full = pos & (tc >= hc * (1.0 - 1e-12))
                    if full.any():
                        pb0 = cc.per_unit * cc.bondi_per_gas * mc * mc
                        m_end = mc + cc.keep * ac
                        pb1 = cc.per_unit * cc.bondi_per_gas * m_end * m_end
                        dphi = _drain_share(cc, pb1) - _drain_share(cc, pb0)
                        r = np.maximum(dl / max_dlnm, dphi / (_DRAIN_SHARE * max_dlnm))
                        grow = np.clip(_STEP_SAFETY / np.maximum(r, 1e-300), 1.0, 2.0)
                        h_bondi[idx_b[cont]] = np.where(full & np.isfinite(grow), hc * grow,
                                                        hc)
            if every:
                g1, z1, m1, a1, gi1, used = gb, zb1, mb0 + cb.keep * accb, accb, gib, tb
            else:
                z1[ib] = zb1
                g1[ib], m1[ib], a1[ib], gi1[ib], used[ib] = (gb, mb0 + cb.keep * accb, accb,
                                                            gib, tb)

        rest = t - used
        rest = np.where((rest > 1e-12 * t) & ~last, rest, 0.0)
        if todo.size == n:            # every halo: whole arrays, no scatter
            g, z, m = g1, np.maximum(z1, 0.0), m1
            acc += a1
            gint += gi1
            left = rest
            count += 1.0
            todo = np.flatnonzero(left > 0)
        else:
            g[todo], z[todo], m[todo] = g1, np.maximum(z1, 0.0), m1
            acc[todo] += a1
            gint[todo] += gi1
            left[todo] = rest
            count[todo] += 1.0
            todo = todo[rest > 0]

    stars = c.lock * gint
    wind = (c.loss - c.lock) * gint
    return IntervalResult(gas=g, metals=z, m_bh=m, accreted=acc, stars_formed=stars,
                          wind=wind, feedback=(c.per_unit - 1.0) * acc, gas_integral=gint)


def _drain_share(c: Coefficients, pb):
    """The hole's share of the reservoir's loss rate, ``phi = P B M^2 / (a + P B M^2)``
    (``pb = P B M^2``, 1/Gyr)."""
    return pb / (c.loss + pb)


def substeps(gas, m_bh, c: Coefficients, dt, max_dlnm: float, cap: int) -> np.ndarray:
    """Number of steps of :func:`advance` per halo over ``dt``.

    Only Bondi phases approximate (the hole's mass is frozen in the drain at a mean), so
    the count bounds the hole's growth, ``ln(M_1 / M_0)``, at ``max_dlnm`` per step, from
    the smallest of three upper bounds: Eddington-limited growth ``k e dt``; the hole taking
    all the gas there is, ``ln(1 + k (g + I dt) / (P M))``; and Bondi growth in the most gas
    the reservoir holds over the interval. A halo whose reservoir feeds the Eddington rate
    throughout takes one step (that phase is exact).
    """
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        return _substeps(gas, m_bh, c, dt, max_dlnm, cap)


def _substeps(gas, m_bh, c: Coefficients, dt, max_dlnm: float, cap: int) -> np.ndarray:
    k, e = c.keep, c.edd
    ke = k * e * dt
    by_gas = np.log1p(k * (gas + c.inflow * dt) / (c.per_unit * m_bh))
    # the most gas the reservoir holds without the hole: g(t) <= min(g + I dt, max(g, I/a))
    g_hi = np.minimum(gas + c.inflow * dt,
                      np.maximum(gas, np.where(c.loss > 0, c.inflow / c.loss, np.inf)))
    q = k * c.bondi_per_gas * g_hi * m_bh * dt
    by_bondi = -np.log(np.clip(1.0 - q, 1e-300, 1.0))
    dlnm = np.minimum(np.minimum(ke, by_gas), by_bondi)
    # where the hole's drain takes over the reservoir within the step (its share
    # phi = P B M^2 / (a + P B M^2) of the gas loss rises), the frozen-mass drain is least
    # accurate: bound the rise of phi per step too, at _DRAIN_SHARE x max_dlnm
    pb = c.per_unit * c.bondi_per_gas * m_bh * m_bh
    grow2 = np.exp(np.minimum(2.0 * dlnm, 700.0))
    dphi = _drain_share(c, pb * grow2) - _drain_share(c, pb)
    dphi = np.where(np.isfinite(dphi), dphi, 1.0)
    n = np.clip(np.ceil(np.maximum(dlnm / max_dlnm, dphi / (_DRAIN_SHARE * max_dlnm))), 1, cap)
    # Eddington-fed over the whole interval: one exact phase (B g M >= e at both ends,
    # within the tolerance band at the end; the end state only where the start is fed)
    i = np.flatnonzero(c.bondi_per_gas * gas * m_bh >= c.edd)
    if i.size:
        ci = c.take(i)
        g1, m1, _ = _eddington_state(gas[i], m_bh[i], ci, dt[i])
        n[i[ci.bondi_per_gas * g1 * m1 >= _EXP_M_TOL * ci.edd]] = 1
    return n
