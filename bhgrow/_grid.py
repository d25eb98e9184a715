"""Interpolation on uniform grids: index arithmetic instead of a binary search.

Two helpers shared by the cosmology, linear-power and merger-tree tables:

* :class:`UniformCubicSpline` -- cubic spline through values on ``x_k = x0 + k h`` with the
  coefficients of scipy's ``CubicSpline`` (not-a-knot end conditions, [deBoor78]_ ch. IV
  (memory)), evaluated by Horner's rule on the interval found by index arithmetic.
* :class:`UniformLinearTable` -- piecewise-linear interpolation of one or more tabulated
  columns on the lattice ``x_k = k / scale``, clamped at the ends.

Both are internal (not part of the public API). Evaluation of the spline makes few temporary
arrays on purpose: on 1e5-element inputs each new array costs page faults.

References
----------
.. [deBoor78] de Boor C., 1978, A Practical Guide to Splines (Springer)
"""

from __future__ import annotations

import numpy as np

__all__ = ["UniformCubicSpline", "UniformLinearTable"]


class UniformCubicSpline:
    """Cubic spline on a uniform grid, evaluated by index arithmetic and Horner's rule.

    The coefficients are those of scipy's ``CubicSpline`` (not-a-knot); evaluation avoids the
    binary search of ``PPoly.__call__`` because the grid is uniform. Outside the grid the end
    polynomials are extrapolated.

    Parameters
    ----------
    x0 : float
        First node.
    h : float
        Node spacing, > 0.
    y : ndarray
        Values at the nodes ``x0 + h * arange(y.size)`` (at least 4 for not-a-knot).

    Attributes
    ----------
    x_nodes, y_nodes : ndarray
        The nodes and the values the spline goes through.
    """

    __slots__ = ("x0", "h", "inv_h", "last", "c0", "c1", "c2", "c3", "x_nodes", "y_nodes")

    def __init__(self, x0: float, h: float, y: np.ndarray):
        knots = x0 + h * np.arange(y.size)
        from scipy.interpolate import CubicSpline

        coef = CubicSpline(knots, y).c  # shape (4, n-1): highest power first
        self.x0 = float(x0)
        self.h = float(h)
        self.inv_h = 1.0 / self.h
        self.last = coef.shape[1] - 1
        self.c0, self.c1, self.c2, self.c3 = (np.ascontiguousarray(row) for row in coef)
        self.x_nodes = knots
        self.y_nodes = np.asarray(y, dtype=np.float64)

    def _locate(self, x: np.ndarray):
        """Interval index ``i`` (clamped to the grid) and offset ``x - x_i`` of each x."""
        # few temporaries on purpose: each new 1e5-element array costs page faults
        d = x - self.x0
        d *= self.inv_h
        i = d.astype(np.intp)
        np.clip(i, 0, self.last, out=i)
        d -= i
        d *= self.h
        return i, d

    def __call__(self, x: np.ndarray) -> np.ndarray:
        """Spline values at ``x`` (float64 array of the same shape)."""
        i, d = self._locate(x)
        r = np.take(self.c0, i, mode="clip")  # i is already in range; "clip" skips checks
        tmp = np.empty_like(r)
        r *= d
        r += np.take(self.c1, i, out=tmp, mode="clip")
        r *= d
        r += np.take(self.c2, i, out=tmp, mode="clip")
        r *= d
        r += np.take(self.c3, i, out=tmp, mode="clip")
        return r

    def value_and_slope(self, x: np.ndarray):
        """Spline values and first derivatives ``dy/dx`` at ``x``."""
        i, d = self._locate(x)
        a = np.take(self.c0, i, mode="clip")
        b = np.take(self.c1, i, mode="clip")
        c = np.take(self.c2, i, mode="clip")
        slope = (3.0 * a * d + 2.0 * b) * d + c
        value = ((a * d + b) * d + c) * d + np.take(self.c3, i, mode="clip")
        return value, slope


class UniformLinearTable:
    """Piecewise-linear interpolation of tabulated columns on the lattice x_k = k / scale.

    Nodes ``k = k_lo .. k_lo + n - 1``. Index arithmetic instead of a binary search
    (``np.interp``); x outside the grid is clamped onto the end nodes. For x * scale >= 1
    and a power-of-two scale the index and fraction are exact, so a value does not depend on
    where the table starts or ends.

    Parameters
    ----------
    k_lo : int
        Lattice index of the first node.
    scale : float
        Nodes per unit of x.
    *columns : ndarray
        One or more columns of node values, all of the same length ``n >= 2``.
    """

    def __init__(self, k_lo: int, scale: float, *columns: np.ndarray):
        self.k_lo = float(k_lo)
        self.scale = float(scale)
        self.last = columns[0].size - 2  # last interval
        self.k_top = self.k_lo + self.last + 1.0
        self.cols = [np.ascontiguousarray(c, dtype=np.float64) for c in columns]
        self.slopes = [np.diff(c) for c in self.cols]

    def locate(self, x: np.ndarray):
        """Interval index and fraction in [0, 1] of each x (clamped onto the grid)."""
        t = np.multiply(x, self.scale)
        np.clip(t, self.k_lo, self.k_top, out=t)
        k = np.floor(t)
        np.minimum(k, self.k_top - 1.0, out=k)
        t -= k
        k -= self.k_lo
        return k.astype(np.intp), t

    def value(self, c: int, i: np.ndarray, t: np.ndarray) -> np.ndarray:
        """Column ``c`` interpolated at the positions ``(i, t)`` from :meth:`locate`."""
        out = self.slopes[c][i]
        out *= t
        out += self.cols[c][i]
        return out
