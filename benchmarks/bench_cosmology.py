"""Speed of bhgrow.cosmology's tables against calling astropy.cosmology on the same array.

Run from the repository root::

    python benchmarks/bench_cosmology.py            # 1e5 redshifts, Planck18 (takes ~2 min)
    python benchmarks/bench_cosmology.py --quick    # astropy timed on 5000 points, scaled

For each table method the script times bhgrow and the astropy call that it replaces on the
same random redshifts in [0, 30] (best of several repeats, ``time.perf_counter``), prints the
speed-up and the largest relative difference, and exits with status 1 if any table method is
less than 20 times faster than astropy. Astropy evaluates ``t(z)``, lookback time, distances
and the volume element with one quadrature per element for Planck18 (massive neutrinos), and
``z(t)`` with a root finder per element (``z_at_value``), so ``z_at_age`` is timed on a subset
for astropy and scaled linearly to the full size (marked ``*``).

The expansion-rate methods (``efunc``, ``omega_m``, ...) are listed for information only:
astropy evaluates them in closed form. A second, ungated section shows a flat Lambda-CDM
without radiation, for which astropy also has closed forms for times and distances.

The table build time (first call on a fresh instance) is printed too.
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

import astropy.units as u  # noqa: E402
from astropy.cosmology import FlatLambdaCDM, z_at_value  # noqa: E402

from bhgrow.cosmology import Cosmology  # noqa: E402

REQUIRED_SPEEDUP = 20.0


def best_time(func, repeats: int) -> float:
    """Best wall time of ``repeats`` calls, in seconds."""
    best = math.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        func()
        best = min(best, time.perf_counter() - t0)
    return best


def astropy_calls(astro):
    """bhgrow method -> (astropy call on an array, returning plain floats, is_table)."""
    return {
        "age_gyr": (lambda z: astro.age(z).to_value(u.Gyr), True),
        "lookback_gyr": (lambda z: astro.lookback_time(z).to_value(u.Gyr), True),
        "comoving_dist_mpc": (lambda z: astro.comoving_distance(z).to_value(u.Mpc), True),
        "lum_dist_mpc": (lambda z: astro.luminosity_distance(z).to_value(u.Mpc), True),
        "dvc_dz_mpc3": (lambda z: 4 * np.pi * astro.differential_comoving_volume(z).to_value(
            u.Mpc**3 / u.sr), True),
        "efunc": (lambda z: astro.efunc(z), False),
        "hubble_kms_mpc": (lambda z: astro.H(z).to_value(u.km / u.s / u.Mpc), False),
        "omega_m": (lambda z: astro.Om(z), False),
        "rho_crit_msun_kpc3": (lambda z: astro.critical_density(z).to_value(
            u.Msun / u.kpc**3), False),
    }


def run_section(cosmo: Cosmology, z: np.ndarray, *, repeats: int, astropy_n: int,
                inverse_n: int, gated: bool) -> list[tuple]:
    rows = []
    for method, (ref, is_table) in astropy_calls(cosmo.astropy).items():
        ours = getattr(cosmo, method)
        ours(z)  # tables built before timing
        t_ours = best_time(lambda: ours(z), repeats)
        # closed-form astropy calls are vectorized: always time them on the full array
        n_ref = astropy_n if is_table else z.size
        zs = z[:n_ref]
        want = ref(zs)
        # astropy's quadratures take seconds on 1e5 points: best of at most 3 there
        t_ref = best_time(lambda: ref(zs), min(repeats, 3) if is_table else repeats)
        scaled = n_ref < z.size
        t_ref *= z.size / n_ref
        diff = float(np.max(np.abs(ours(zs) / want - 1.0)))
        rows.append((method, t_ours, t_ref, scaled, diff, gated and is_table))

    # z(t): astropy's root finder works element by element; time a subset and scale
    t = cosmo.age_gyr(z)
    cosmo.z_at_age(t)
    t_ours = best_time(lambda: cosmo.z_at_age(t), repeats)
    ts = t[:inverse_n]
    z_max = cosmo.z_max

    def ref_inverse():
        return np.array([z_at_value(cosmo.astropy.age, ti * u.Gyr, zmin=0.0, zmax=z_max + 1,
                                    ztol=1e-10).value for ti in ts])

    t0 = time.perf_counter()
    want = ref_inverse()
    t_ref = (time.perf_counter() - t0) * z.size / inverse_n
    diff = float(np.max(np.abs(cosmo.z_at_age(ts) / want - 1.0)))
    rows.append(("z_at_age", t_ours, t_ref, True, diff, gated))
    return rows


def print_rows(title: str, rows, n: int) -> None:
    print(f"\n{title}  (n = {n:,} redshifts in [0, 30])")
    head = (f"{'method':<20} {'bhgrow [ms]':>12} {'astropy [ms]':>14} {'speed-up':>10} "
            f"{'max rel diff':>13}  gated")
    print(head)
    print("-" * len(head))
    for method, t_ours, t_ref, scaled, diff, gated in rows:
        mark = "*" if scaled else " "
        print(f"{method:<20} {t_ours * 1e3:12.3f} {t_ref * 1e3:13.1f}{mark} "
              f"{t_ref / t_ours:9.0f}x {diff:13.1e}  {'yes' if gated else 'no'}")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--n", type=int, default=100_000, help="number of redshifts")
    parser.add_argument("--repeats", type=int, default=5, help="repeats (best is kept)")
    parser.add_argument("--quick", action="store_true",
                        help="time astropy's per-element quadratures on 5000 points, scaled")
    parser.add_argument("--inverse-n", type=int, default=100,
                        help="points for astropy's z_at_value (scaled to --n)")
    parser.add_argument("--seed", type=int, default=12345)
    args = parser.parse_args(argv)

    z = np.random.default_rng(args.seed).uniform(0.0, 30.0, args.n)

    # table build time: first call on fresh instances
    builds = []
    for _ in range(args.repeats):
        fresh = Cosmology()
        t0 = time.perf_counter()
        fresh.age_gyr(1.0)
        builds.append(time.perf_counter() - t0)
    print(f"bhgrow.cosmology tables, Planck18: build {min(builds) * 1e3:.1f} ms (best of "
          f"{args.repeats}); numpy {np.__version__}")

    cosmo = Cosmology()
    astropy_n = min(args.n, 5000) if args.quick else args.n
    rows = run_section(cosmo, z, repeats=args.repeats, astropy_n=astropy_n,
                       inverse_n=min(args.inverse_n, args.n), gated=True)
    print_rows("Planck18 (astropy integrates per element: massive neutrinos)", rows, args.n)

    closed = Cosmology(FlatLambdaCDM(H0=70.0, Om0=0.3, Tcmb0=0.0), sigma8=0.8, n_s=0.96)
    rows_closed = run_section(closed, z, repeats=args.repeats, astropy_n=args.n,
                              inverse_n=min(args.inverse_n, args.n), gated=False)
    print_rows("Flat Lambda-CDM, Tcmb0 = 0 (astropy closed forms; information only)",
               rows_closed, args.n)

    print("\n* astropy timed on a subset and scaled linearly (it loops over elements).")
    slow = [(m, r / o) for m, o, r, _, _, g in rows if g and r / o < REQUIRED_SPEEDUP]
    if slow:
        for method, speedup in slow:
            print(f"FAIL: {method} is only {speedup:.1f}x faster than astropy "
                  f"(need {REQUIRED_SPEEDUP:g}x)")
        return 1
    print(f"OK: every table method is at least {REQUIRED_SPEEDUP:g}x faster than astropy.")
    return 0


if __name__ == "__main__":
    sys.exit(main())
