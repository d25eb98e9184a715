"""Uniform-grid interpolation helpers (bhgrow._grid) against closed forms.

References used below:
* A not-a-knot cubic spline reproduces any cubic polynomial exactly: the interpolant is
  unique and the cubic itself satisfies the interpolation and not-a-knot conditions
  (de Boor 1978, A Practical Guide to Splines, ch. IV (memory)).
* The interpolation error of a cubic spline with not-a-knot ends on a smooth function is
  O(h^4) in the value and O(h^3) in the first derivative (de Boor 1978, ch. IV (memory)).
* Linear interpolation reproduces a linear function exactly (closed form).
"""

from __future__ import annotations

import numpy as np
import pytest

from bhgrow._grid import UniformCubicSpline, UniformLinearTable


def _cubic(x):
    return 0.7 * x**3 - 1.3 * x**2 + 0.4 * x - 2.1


def _cubic_slope(x):
    return 2.1 * x**2 - 2.6 * x + 0.4


@pytest.mark.parametrize("x0, h, n", [(0.0, 0.25, 9), (-3.0, 0.1, 61), (2.5, 1.0 / 512, 40)])
def test_spline_reproduces_cubic_exactly(x0, h, n):
    # not-a-knot spline of a cubic is the cubic itself (de Boor 1978, ch. IV (memory))
    spl = UniformCubicSpline(x0, h, _cubic(x0 + h * np.arange(n)))
    x = np.linspace(x0, x0 + h * (n - 1), 1001)
    scale = np.max(np.abs(_cubic(x))) + 1.0
    assert np.max(np.abs(spl(x) - _cubic(x))) < 1e-12 * scale
    value, slope = spl.value_and_slope(x)
    np.testing.assert_array_equal(value, spl(x))
    assert np.max(np.abs(slope - _cubic_slope(x))) < 1e-9 * (np.max(np.abs(_cubic_slope(x))) + 1)


def test_spline_keeps_nodes_and_extrapolates_end_cubics():
    x0, h = -1.0, 0.5
    y = _cubic(x0 + h * np.arange(8))
    spl = UniformCubicSpline(x0, h, y)
    np.testing.assert_array_equal(spl.x_nodes, x0 + h * np.arange(8))
    np.testing.assert_array_equal(spl.y_nodes, y)
    np.testing.assert_allclose(spl(spl.x_nodes), y, rtol=0, atol=1e-13)
    # outside the grid the end polynomials continue; for a cubic they are the cubic itself
    out = np.array([x0 - 0.3, x0 + h * 7 + 0.4])
    np.testing.assert_allclose(spl(out), _cubic(out), rtol=1e-12)


def _sin_errors(h):
    n = int(round(np.pi / h)) + 1
    spl = UniformCubicSpline(0.0, h, np.sin(h * np.arange(n)))
    x = np.linspace(0.0, h * (n - 1), 20001)
    value, slope = spl.value_and_slope(x)
    return (np.max(np.abs(spl(x) - np.sin(x))), np.max(np.abs(value - np.sin(x))),
            np.max(np.abs(slope - np.cos(x))))


def test_spline_fourth_order_on_sine():
    # value error O(h^4), slope error O(h^3) (de Boor 1978, ch. IV (memory))
    e1, v1, s1 = _sin_errors(np.pi / 64)
    e2, v2, s2 = _sin_errors(np.pi / 128)
    assert e1 == v1 and e2 == v2
    assert 14.0 < e1 / e2 < 18.0  # halving h: 2^4 = 16
    assert 7.0 < s1 / s2 < 10.0  # halving h: 2^3 = 8
    assert e2 < 1e-8 and s2 < 1e-6


def test_linear_table_exact_on_linear_functions_and_clamps():
    scale, k_lo, n = 8.0, -5, 21  # nodes at k / 8 for k = -5 .. 15
    xk = np.arange(k_lo, k_lo + n) / scale
    a = 3.0 - 0.75 * xk
    b = 1.5 + 2.0 * xk
    tab = UniformLinearTable(k_lo, scale, a, b)
    x = np.linspace(xk[0], xk[-1], 777)
    i, t = tab.locate(x)
    assert np.all((t >= 0.0) & (t <= 1.0))
    # linear interpolation of a linear function is exact (closed form)
    np.testing.assert_allclose(tab.value(0, i, t), 3.0 - 0.75 * x, rtol=0, atol=1e-14)
    np.testing.assert_allclose(tab.value(1, i, t), 1.5 + 2.0 * x, rtol=0, atol=1e-14)
    # at the nodes the table gives the node values
    i, t = tab.locate(xk)
    np.testing.assert_array_equal(tab.value(0, i, t), a)
    # outside the grid: clamped onto the end nodes
    i, t = tab.locate(np.array([xk[0] - 10.0, xk[0] - 1e-3, xk[-1] + 1e-3, xk[-1] + 50.0]))
    np.testing.assert_array_equal(tab.value(0, i, t), [a[0], a[0], a[-1], a[-1]])
    np.testing.assert_array_equal(tab.value(1, i, t), [b[0], b[0], b[-1], b[-1]])
