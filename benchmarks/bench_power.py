"""Speed of bhgrow.trees.power / massfunction tables (prints numbers; no pass/fail gate).

Run from the repository root::

    python benchmarks/bench_power.py            # 1e6 masses, Planck18
    python benchmarks/bench_power.py -n 100000

Prints the table build times (first call on a fresh ``LinearPower``) and the best-of-5
wall time of each vectorized method on ``n`` random masses in [1e3, 1e18] Msun and random
redshifts in [0, 30], together with the largest relative difference of the sigma table from a
direct Gauss-Legendre quadrature on 20 masses (accuracy, for information).
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

from bhgrow.cosmology import Cosmology  # noqa: E402
from bhgrow.trees.massfunction import number_density, press_schechter, sheth_tormen  # noqa: E402
from bhgrow.trees.power import LinearPower, tophat_window  # noqa: E402


def best_of(func, repeats=5):
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        func()
        times.append(time.perf_counter() - t0)
    return min(times)


def sigma_direct(lp, m):
    r = lp.lagrangian_radius_mpc(m)
    nodes, weights = np.polynomial.legendre.leggauss(24)
    edges = np.linspace(math.log(1e-6 / r), math.log(1e3 / r), 401)
    half = 0.5 * np.diff(edges)
    k = np.exp(((edges[:-1] + half)[:, None] + half[:, None] * nodes[None, :]).ravel())
    w, _ = tophat_window(k * r)
    f = (k**3 * lp.power_mpc3(k) * w * w).reshape(half.size, nodes.size)
    return math.sqrt(float(np.sum((f @ weights) * half)) / (2 * math.pi**2))


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("-n", type=int, default=1_000_000, help="number of masses")
    args = parser.parse_args()
    cosmo = Cosmology()
    cosmo.age_gyr(0.0)  # build the cosmology's own tables outside the timings

    for transfer in ("eh98", "eh98_nowiggle"):
        lp = LinearPower(cosmo, transfer=transfer)
        t0 = time.perf_counter()
        lp.sigma(1e12)
        t1 = time.perf_counter()
        lp.growth(1.0)
        t2 = time.perf_counter()
        print(f"{transfer:14s} build: sigma table {1e3 * (t1 - t0):6.1f} ms, "
              f"growth/delta_c table {1e3 * (t2 - t1):6.1f} ms")

    lp = LinearPower(cosmo)
    rng = np.random.default_rng(1)
    m = 10.0 ** rng.uniform(3.0, 18.0, args.n)
    z = rng.uniform(0.0, 30.0, args.n)
    s0 = lp.sigma(m)
    w = lp.delta_c(z)
    cases = [
        ("sigma(m)", lambda: lp.sigma(m)),
        ("sigma(m, z)", lambda: lp.sigma(m, z)),
        ("dlnsigma_dlnm(m)", lambda: lp.dlnsigma_dlnm(m)),
        ("mass_of_sigma(s)", lambda: lp.mass_of_sigma(s0)),
        ("growth(z)", lambda: lp.growth(z)),
        ("delta_c(z)", lambda: lp.delta_c(z)),
        ("z_of_delta_c(w)", lambda: lp.z_of_delta_c(w)),
        ("press_schechter(m, z)", lambda: press_schechter(m, z, lp)),
        ("sheth_tormen(m, z)", lambda: sheth_tormen(m, z, lp)),
    ]
    print(f"\n{args.n} elements, best of 5:")
    for name, func in cases:
        t = best_of(func)
        print(f"  {name:24s} {1e3 * t:8.2f} ms   {1e9 * t / args.n:7.1f} ns/element")
    t = best_of(lambda: number_density(1e8, 1e15, 3.0, lp))
    print(f"  {'number_density (1 call)':24s} {1e3 * t:8.2f} ms")

    masses = np.logspace(3.0, 18.0, 20)
    err = max(abs(lp.sigma(mm) / sigma_direct(lp, mm) - 1.0) for mm in masses)
    print(f"\nsigma table vs direct quadrature, 20 masses 1e3..1e18 Msun: max |rel| = {err:.2e}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
