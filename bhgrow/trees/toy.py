"""A fast toy merger-tree builder for demos, tests and benchmarks.

Not a statistically correct merger tree (use the Monte Carlo generator for that): each
halo's main progenitor follows an exponential mass-accretion history
M(z) = M0 exp(-alpha z) (the form of Wechsler et al. 2002, ApJ 568, 52) and at each step a
halo splits off a secondary progenitor with probability ``p_split`` carrying 5-45% of the
mass lost. Built backwards in time, vectorized over all live halos of a snapshot.
"""

from __future__ import annotations

import numpy as np

from .forest import Forest


def toy_forest(n_forests: int, *, seed: int, n_snap: int = 40, z_start: float = 15.0,
               log_mass_range=(10.0, 14.0), resolution_msun: float = 1e7,
               p_split: float = 0.3, box_mpc: float | None = None,
               weight_mpc3: float | None = None, meta: dict | None = None) -> Forest:
    """Build ``n_forests`` toy trees on ``n_snap`` snapshots evenly spaced in log(1+z).

    Root masses are uniform in log10 M over ``log_mass_range`` (Msun, at z = 0). Give
    either ``box_mpc`` (comoving Mpc) or ``weight_mpc3`` (same weight for every forest).
    """
    rng = np.random.default_rng(seed)
    z_snap = np.expm1(np.linspace(np.log1p(z_start), 0.0, n_snap))
    z_snap[-1] = 0.0
    log_m0 = np.sort(rng.uniform(*log_mass_range, n_forests))
    alpha = rng.uniform(0.6, 1.4, n_forests)

    ids, descs, forests, snaps, masses = [], [], [], [], []
    cur_mass = 10.0**log_m0
    cur_forest = np.arange(n_forests, dtype=np.int64)
    cur_alpha = alpha
    cur_id = np.arange(n_forests, dtype=np.int64)
    cur_desc = np.full(n_forests, -1, dtype=np.int64)
    next_id = n_forests
    for k in range(n_snap - 1, -1, -1):
        ids.append(cur_id)
        descs.append(cur_desc)
        forests.append(cur_forest)
        snaps.append(np.full(cur_id.size, k, dtype=np.int64))
        masses.append(cur_mass)
        if k == 0:
            break
        dz = z_snap[k - 1] - z_snap[k]
        main = cur_mass * np.exp(-cur_alpha * dz)
        lost = cur_mass - main
        split = rng.random(cur_mass.size) < p_split
        second = np.where(split, lost * rng.uniform(0.05, 0.45, cur_mass.size), 0.0)
        keep_main = main >= resolution_msun
        keep_sec = second >= resolution_msun
        n_new = int(keep_main.sum() + keep_sec.sum())
        cur_desc = np.r_[cur_id[keep_main], cur_id[keep_sec]]
        cur_forest = np.r_[cur_forest[keep_main], cur_forest[keep_sec]]
        cur_alpha = np.r_[cur_alpha[keep_main], cur_alpha[keep_sec]]
        cur_mass = np.r_[main[keep_main], second[keep_sec]]
        cur_id = next_id + np.arange(n_new, dtype=np.int64)
        next_id += n_new
        if n_new == 0:
            break
    cols = {"node_id": np.concatenate(ids), "desc_id": np.concatenate(descs),
            "forest_id": np.concatenate(forests), "snap": np.concatenate(snaps),
            "mass_msun": np.concatenate(masses)}
    weights = None
    if weight_mpc3 is not None:
        weights = {"forest_id": np.arange(n_forests),
                   "weight_mpc3": np.full(n_forests, float(weight_mpc3))}
    return Forest.from_columns(cols, np.arange(n_snap), z_snap, box_mpc=box_mpc,
                               forest_weight=weights, meta=dict(meta or {}), source="toy_forest")
