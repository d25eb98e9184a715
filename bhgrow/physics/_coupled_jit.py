"""Compiled kernel of :func:`bhgrow.physics.coupled.advance`: one halo at a time.

The same piecewise closed-form solution as the array code of :mod:`bhgrow.physics.coupled`
(its ``_advance``, the reference), the same formulas in the same order of operations, and
the same constants, written as a loop over halos and compiled with numba (Lam, Pitrou &
Seibert 2015). Why: the array code runs ~17 phase passes per snapshot, most of them over a
few halos that still take Bondi substeps, and each pass costs a few hundred small numpy
calls whatever its size; here a halo's phases run back to back in registers. Each halo's
result depends on that halo alone, as in the array code.

numpy's ``maximum``, ``minimum`` and ``clip`` pass NaN through; the helpers ``_max``,
``_min`` and ``_clip`` below do the same, so that the branches taken on NaN (drained or
degenerate reservoirs) are those of the array code. The division semantics are numpy's
(``error_model="numpy"``: x/0 gives inf or NaN instead of raising).

References
----------
.. [LPS15] Lam S. K., Pitrou A., Seibert S., 2015, Proc. Second Workshop on the LLVM
   Compiler Infrastructure in HPC, 7 (numba)

Journal reference from memory.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, types

from .coupled import (_DRAIN_SHARE, _EDD_TOL, _EXP_M_TOL, _EXP_P_TOL, _MAX_PHASES,
                      _POLISH_STEPS, _ROOT_ITERS, _RUNAWAY_MARGIN, _SERIES_X, _STEP_SAFETY)

__all__ = ["advance_halos"]

_jit = njit(cache=True, error_model="numpy", nogil=True)

# plain floats, frozen into the compiled code
_TOL = float(_EDD_TOL)
_M_TOL, _P_TOL = float(_EXP_M_TOL), float(_EXP_P_TOL)
_MARGIN = float(_RUNAWAY_MARGIN)
_SX = float(_SERIES_X)
_SHARE, _SAFETY = float(_DRAIN_SHARE), float(_STEP_SAFETY)
_PHASES, _ITERS, _POLISH = float(_MAX_PHASES), int(_ROOT_ITERS), int(_POLISH_STEPS)
_EDD_ROOT, _RUNAWAY_ROOT = 0, 1


@_jit
def _max(x, y):
    """``np.maximum`` of two floats (NaN if either is NaN)."""
    if x != x or y != y:
        return x + y
    return x if x >= y else y


@_jit
def _min(x, y):
    """``np.minimum`` of two floats (NaN if either is NaN)."""
    if x != x or y != y:
        return x + y
    return x if x <= y else y


@_jit
def _clip(x, lo, hi):
    """``np.clip`` of a float (NaN stays NaN)."""
    return _min(_max(x, lo), hi)


@_jit
def _series_phi1(v):
    return 1.0 + v * (-1.0 / 2 + v * (1.0 / 6 + v * (-1.0 / 24 + v * (1.0 / 120 + v * (
        -1.0 / 720 + v / 5040)))))


@_jit
def _series_phi2(v):
    return 0.5 + v * (-1.0 / 6 + v * (1.0 / 24 + v * (-1.0 / 120 + v * (1.0 / 720 + v * (
        -1.0 / 5040 + v / 40320)))))


@_jit
def _series_psi(v):
    return 0.5 + v * (-1.0 / 3 + v * (1.0 / 8 + v * (-1.0 / 30 + v * (1.0 / 144 + v * (
        -1.0 / 840 + v / 5760)))))


@_jit
def _series_q(v):
    return 0.5 + v * (1.0 / 6 + v * (1.0 / 24 + v * (1.0 / 120 + v * (1.0 / 720 + v * (
        1.0 / 5040 + v / 40320)))))


@_jit
def _phi1(x, e):
    if abs(x) < _SX:
        return _series_phi1(x)
    return (1.0 - e) / x


@_jit
def _phi2(x, e):
    if abs(x) < _SX:
        return _series_phi2(x)
    return (x - 1.0 + e) / (x * x)


@_jit
def _exp_phi12(x):
    e = np.exp(-x)
    if abs(x) < _SX:
        return e, _series_phi1(x), _series_phi2(x)
    f1 = (1.0 - e) / x
    return e, f1, (1.0 - f1) / x


@_jit
def _psi(x, e):
    if abs(x) < _SX:
        return _series_psi(x)
    return (1.0 - (1.0 + x) * e) / (x * x)


@_jit
def _eddington_gas_at(g0, m0, inflow, a, b, pe, t):
    at, bt = a * t, b * t
    e_at = np.exp(-at)
    f1a = _phi1(at, e_at)
    ebt = np.exp(bt)
    g = g0 * e_at + inflow * t * f1a - pe * m0 * t * ebt * _phi1(at + bt, e_at / ebt)
    return g, ebt, f1a, e_at


@_jit
def _eddington_gas(g0, m0, inflow, a, k, e, p, t):
    """Gas, its integral and the hole mass after ``t`` of an Eddington phase."""
    b, pe = k * e, p * e
    g, ebt, f1a, e_at = _eddington_gas_at(g0, m0, inflow, a, b, pe, t)
    f2a = _phi2(a * t, e_at)
    bt = b * t
    if abs(bt) < _SX:
        q = _series_q(bt)
    else:
        q = (ebt - 1.0 - bt) / (bt * bt)
    drain = t * t * (b * q + a * f2a) / (a + b)
    gi = g0 * t * f1a + inflow * t * t * f2a - p * e * m0 * drain
    return g, gi, m0 * ebt


@_jit
def _bondi_phase(g0, inflow, a, bpg, p, t, mbar, lam):
    """Gas, its integral, the gas accreted, the loss rate and ``e^{-lam t}`` with the hole
    frozen at ``mbar`` (``lam < 0``: computed here)."""
    cc = bpg * mbar * mbar
    if lam < 0.0:
        lam = a + p * cc
    e, f1, f2 = _exp_phi12(lam * t)
    g = g0 * e + inflow * t * f1
    gi = g0 * t * f1 + inflow * t * t * f2
    return g, gi, cc * gi, lam, e


@_jit
def _bondi_mass(m0, k, bpg, gi):
    d = k * bpg * m0 * gi
    return m0 / _max(1.0 - d, 1e-12)


@_jit
def _cap(x, m, kt):
    """``np.minimum(x, m e^{kt})`` (Bondi growth capped at Eddington growth), with
    ``e^{kt}`` evaluated only where ``x`` may reach it (``m (1 + kt) <= m e^{kt}``)."""
    if x < 0.9999999 * (m * (1.0 + kt)):
        return x
    return _min(x, m * np.exp(kt))


@_jit
def _bondi_switch_time(g0, inflow, bpg, edd, mbar, t, lam):
    g_eq = inflow / lam
    g_star = edd / (bpg * mbar)
    out = t
    if g_eq > g_star and g0 < g_star and lam > 0:
        out = _clip(np.log((g_eq - g0) / (g_eq - g_star)) / lam, 0.0, t)
    if lam <= 0 and inflow > 0 and g0 < g_star:
        out = _clip((g_star - g0) / inflow, 0.0, t)
    return out


@_jit
def _cheap(kind, u, c0, c1, c2, c3, c4, c5, c6):
    """A root's cheap closed form, ``(f, f')`` (:func:`bhgrow.physics.coupled._polish`)."""
    if kind == _EDD_ROOT:         # q, cq, k_q, mid, a, b
        e_a, e_b = np.exp(-c4 * u), np.exp(c5 * u)
        return (c0 + c1 * e_a - c2 * e_b - c3 / e_b,
                -c4 * c1 * e_a - c5 * c2 * e_b + c5 * c3 / e_b)
    # Bondi runaway: g_eq, d, lam, h, inv_m0, kb
    e = np.exp(-c2 * u)
    g = c0 + c1 * e
    return (c3 * (c4 - c5 * (c0 * u + c1 * (1.0 - e) / c2)) - g,
            -c3 * c5 * g + c2 * c1 * e)


@_jit
def _polish(kind, s0, lo, hi, valid, c0, c1, c2, c3, c4, c5, c6):
    s = s0
    for _ in range(_POLISH):
        f, df = _cheap(kind, s, c0, c1, c2, c3, c4, c5, c6)
        if f >= 0.0:
            lo = s
        else:
            hi = s
        nxt = s - f / df
        s = nxt if (nxt >= lo and nxt <= hi) else 0.5 * (lo + hi)
    return s if (valid and math.isfinite(s)) else s0


@_jit
def _fdf(kind, s, c0, c1, c2, c3, c4, c5, c6):
    """A root's exact ``(f, f', band)`` (the ``*_fdf`` functions of the array code)."""
    if kind == _EDD_ROOT:         # g0, m0, inflow, a, b, pe, star
        g, ebt, _, _ = _eddington_gas_at(c0, c1, c2, c3, c4, c5, s)
        gs = c6 / ebt
        return (g - gs, c2 - c3 * g - c5 * c1 * ebt + c4 * gs,
                _TOL / (1.0 - _TOL) * gs)
    # Bondi runaway: g0, inv_m0, inflow, lam, kb, e_b
    e, f1, f2 = _exp_phi12(c3 * s)
    g = c0 * e + c2 * s * f1
    gi = c0 * s * f1 + c2 * s * s * f2
    inv_m = c1 - c4 * gi
    return (c5 * inv_m - g, -c5 * c4 * g - (c2 - c3 * g),
            _TOL / (1.0 + _TOL) * c5 * inv_m)


@_jit
def _newton(kind, lo, hi, s, c0, c1, c2, c3, c4, c5, c6):
    """Safeguarded Newton of :func:`bhgrow.physics.coupled._newton`, one root."""
    for _ in range(_ITERS):
        f, df, band = _fdf(kind, s, c0, c1, c2, c3, c4, c5, c6)
        up = f >= 0.0
        if up and f <= band:
            return s
        nxt = s - (f - 0.5 * band) / df
        if up:
            lo = s
        else:
            hi = s
        s = nxt if (nxt > lo and nxt < hi) else 0.5 * (lo + hi)
    return lo


@_jit
def _eddington_end(g0, m0, inflow, a, k, edd, bpg, p, t):
    star = (1.0 - _TOL) * edd / (bpg * m0)
    b, pe = k * edd, p * edd
    mid = star * (1.0 + 0.5 * _TOL / (1.0 - _TOL))
    drain = pe * m0
    g_eq = (inflow - drain) / a
    nxt = np.log((g0 - g_eq) / (mid - g_eq)) / a
    slope = -drain * b / a
    base = g_eq + drain * b / (a * a)
    ref = np.log((g0 - base) / (mid * np.exp(-b * nxt) - slope * nxt - base)) / a
    if math.isfinite(ref) and ref > 0.0:
        nxt = ref
    newton = -(g0 - mid) / (inflow - a * g0 - drain + b * star)
    if not (math.isfinite(nxt) and nxt > 0.0):
        nxt = newton
    k_q = drain / (a + b)
    q = inflow / a
    cq = g0 - q + k_q
    if cq < 0.0 and a > 0.0:
        w = (q + np.sqrt(q * q - 4.0 * k_q * mid)) / (2.0 * k_q)
        quasi = np.log(w) / b
        if math.isfinite(quasi) and quasi > 0.0:
            nxt = quasi
    s0 = nxt if (nxt > 0.0 and nxt < t) else 0.5 * t
    s0 = _polish(_EDD_ROOT, s0, 0.0, t, a > 0.0, q, cq, k_q, mid, a, b, 0.0)
    return _newton(_EDD_ROOT, 0.0, t, s0, g0, m0, inflow, a, b, pe, star)


@_jit
def _bondi_runaway(g0, m0, inflow, a, k, edd, bpg, p, t, mbar, g_t, gi_t):
    lam = a + p * bpg * mbar * mbar
    e_b = (1.0 + _TOL) * edd / bpg
    inv_m0, kb = 1.0 / m0, k * bpg
    f_lo, f_hi = e_b * inv_m0 - g0, e_b * (inv_m0 - kb * gi_t) - g_t
    s0 = t * _clip(f_lo / (f_lo - f_hi), 0.0, 1.0)
    g_eq = inflow / lam
    d = g0 - g_eq
    h = (1.0 - 0.5 * _TOL / (1.0 + _TOL)) * e_b
    s0 = _polish(_RUNAWAY_ROOT, s0, 0.0, t, lam > 0.0, g_eq, d, lam, h, inv_m0, kb, 0.0)
    return _newton(_RUNAWAY_ROOT, 0.0, t, s0, g0, inv_m0, inflow, lam, kb, e_b, 0.0)


@_jit
def _halo(g, z, m, inflow, a, bpg, edd, k, p, mu_rate, left, steps, max_dlnm, rate):
    """One halo over its interval ``left``: end gas, metals, hole mass, gas accreted and
    the gas integral (the loop of the array code's ``_advance``, one halo)."""
    h_bondi = left / steps
    limit = 2.0 * steps + _PHASES
    count = 0.0
    acc = 0.0
    gint = 0.0
    while left > 0:
        t = left
        last = count >= limit
        if bpg * g * m >= edd and not last:
            # Eddington phase: exact; ends where the reservoir can no longer feed e M
            ge, gie, me = _eddington_gas(g, m, inflow, a, k, edd, p, t)
            te = t
            if bpg * ge * me < _M_TOL * edd:
                te = _eddington_end(g, m, inflow, a, k, edd, bpg, p, t)
                ge, gie, me = _eddington_gas(g, m, inflow, a, k, edd, p, te)
            ge = _max(ge, 0.0)
            acc_e = m * np.expm1(k * edd * te) / k
            me = m + k * acc_e
            mu0 = z / g if g > 0 else 0.0
            x = inflow * te * te / gie if gie > 0 else 0.0
            e_x = np.exp(-x)
            mu1 = mu0 * e_x + mu_rate * te * _phi1(x, e_x)
            z1 = _min(mu1 * ge, z + mu_rate * gie)
            g1, m1, a1, gi1, used = ge, me, acc_e, gie, te
        else:
            # Bondi phase: hole frozen at the geometric mean of its end masses
            lam0 = a + p * (bpg * m * m)
            if last:
                tb = t
            else:
                tb = _bondi_switch_time(g, inflow, bpg, edd, m, _min(t, h_bondi), lam0)
            kt = k * edd * tb
            guess = math.isfinite(rate) and not last
            if guess:
                # (e^{rate tb} <= e^{kt} where rate tb <= kt: the cap then needs no e^{kt})
                m_rate = m * np.exp(rate * tb)
                m_pred = np.sqrt(m * (m_rate if rate * tb <= kt else _cap(m_rate, m, kt)))
                gb, gib, _, _, _ = _bondi_phase(g, inflow, a, bpg, p, tb, m_pred, -1.0)
                m1b = _bondi_mass(m, k, bpg, gib)
                if bpg * gb * m1b > _MARGIN * edd:
                    gb, gib, _, _, _ = _bondi_phase(g, inflow, a, bpg, p, tb, m, -1.0)
                    m1b = _bondi_mass(m, k, bpg, gib)
                    guess = False
            else:
                gb, gib, _, _, _ = _bondi_phase(g, inflow, a, bpg, p, tb, m, lam0)
                m1b = _bondi_mass(m, k, bpg, gib)
            if bpg * gb * m1b > _P_TOL * edd and not last and not guess:
                tb = _bondi_runaway(g, m, inflow, a, k, edd, bpg, p, tb, m, gb, gib)
                kt = k * edd * tb
                gb, gib, _, _, _ = _bondi_phase(g, inflow, a, bpg, p, tb, m, -1.0)
                m1b = _bondi_mass(m, k, bpg, gib)
            mbar = np.sqrt(m * _cap(m1b, m, kt))
            if not guess:
                _, gic, _, _, _ = _bondi_phase(g, inflow, a, bpg, p, tb, mbar, -1.0)
                mbar = np.sqrt(m * _cap(_bondi_mass(m, k, bpg, gic), m, kt))
            gb, gib, accb, lam, e_lam = _bondi_phase(g, inflow, a, bpg, p, tb, mbar, -1.0)
            if last:
                over = _max(accb - m * np.expm1(kt) / k, 0.0)
                accb = accb - over
                gb = gb + p * over
            x = lam * tb
            z1 = z * e_lam + mu_rate * (g * tb * e_lam + inflow * tb * tb * _psi(x, e_lam))
            if t - tb > 1e-12 * t and not last:
                dl = np.log1p(k * accb / m)
                pos = tb > 0
                rate = dl / tb if pos else np.nan
                if max_dlnm > 0 and pos and tb >= h_bondi * (1.0 - 1e-12):
                    # a-posteriori step control on the criteria of substeps()
                    pb0 = p * bpg * m * m
                    m_end = m + k * accb
                    pb1 = p * bpg * m_end * m_end
                    dphi = pb1 / (a + pb1) - pb0 / (a + pb0)
                    r = _max(dl / max_dlnm, dphi / (_SHARE * max_dlnm))
                    grow = _clip(_SAFETY / _max(r, 1e-300), 1.0, 2.0)
                    if math.isfinite(grow):
                        h_bondi = h_bondi * grow
            g1, m1, a1, gi1, used = gb, m + k * accb, accb, gib, tb
        rest = t - used
        rest = rest if (rest > 1e-12 * t and not last) else 0.0
        g, z, m = g1, _max(z1, 0.0), m1
        acc += a1
        gint += gi1
        left = rest
        count += 1.0
    return g, z, m, acc, gint


_IN = types.Array(types.float64, 1, "C", readonly=True)     # also takes writable arrays


@njit(types.void(*[_IN] * 12, types.float64, _IN, types.Array(types.float64, 2, "C")),
      cache=True, error_model="numpy", nogil=True)
def advance_halos(gas, metals, m_bh, inflow, loss, bondi_per_gas, edd, keep, per_unit,
                  metal_rate, dt, steps, max_dlnm, prior_rate, out):
    """Every halo over its interval; fills ``out`` (5 x n: gas, metals, hole mass, gas
    accreted, gas integral). ``max_dlnm <= 0``: no step control; ``prior_rate``: NaN where
    none."""
    for i in range(gas.size):
        pr = prior_rate[i]
        out[0, i], out[1, i], out[2, i], out[3, i], out[4, i] = _halo(
            gas[i], metals[i], m_bh[i], inflow[i], loss[i], bondi_per_gas[i], edd[i],
            keep[i], per_unit[i], metal_rate[i], dt[i], steps[i], max_dlnm,
            pr if pr > 0 else np.nan)
