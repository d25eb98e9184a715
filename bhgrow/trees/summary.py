"""What `bhgrow trees info` reports about a forest."""

from __future__ import annotations

import numpy as np

from .forest import Forest


def main_branch_history(forest: Forest) -> dict:
    """Median main-branch mass history of the final-snapshot roots.

    Returns
    -------
    dict
        ``z`` (redshift per snapshot), ``median_frac`` (median over roots of
        M_main(z)/M_root, counting roots whose main branch has not yet begun as 0 so the
        median stays honest at high z), ``frac_present`` (share of roots with a main-branch
        node at that snapshot), ``n_roots``.
    """
    n_snap = len(forest.snapshots)
    last = forest.snapshot_slice(n_snap - 1)
    roots = np.arange(last.start, last.stop)
    roots = roots[forest.desc_index[roots] < 0]
    out = {"z": forest.snapshots.z, "median_frac": np.full(n_snap, np.nan),
           "frac_present": np.zeros(n_snap), "n_roots": int(roots.size)}
    if roots.size == 0:
        return out
    mb_root = forest.main_branch_root()
    root_pos = np.full(forest.n_nodes, -1, dtype=np.int64)
    root_pos[roots] = np.arange(roots.size)
    on = mb_root >= 0
    on[on] = root_pos[mb_root[on]] >= 0
    rows = np.flatnonzero(on)
    k = np.searchsorted(forest.snapshots.snap, forest.snap[rows])
    frac = np.zeros((n_snap, roots.size))
    frac[k, root_pos[mb_root[rows]]] = forest.mass_msun[rows] / forest.mass_msun[mb_root[rows]]
    present = np.zeros((n_snap, roots.size), dtype=bool)
    present[k, root_pos[mb_root[rows]]] = True
    out["median_frac"] = np.median(frac, axis=1)
    out["frac_present"] = present.mean(axis=1)
    return out


def summarize(forest: Forest) -> dict:
    """Headline facts of a forest as a plain dict (JSON-friendly)."""
    nodes = forest.nodes_per_forest()
    info = {
        "n_forests": forest.n_forests,
        "n_nodes": forest.n_nodes,
        "n_snapshots": len(forest.snapshots),
        "z_range": [float(forest.snapshots.z.min()), float(forest.snapshots.z.max())],
        "mass_range_msun": [float(forest.mass_msun.min()), float(forest.mass_msun.max())],
        "nodes_per_forest": {"min": int(nodes.min()), "median": float(np.median(nodes)),
                             "max": int(nodes.max())},
        "n_roots": int((forest.desc_index < 0).sum()),
        "box_mpc": forest.box_mpc,
        "extra_columns": sorted(forest.extra),
    }
    last = forest.snapshot_slice(len(forest.snapshots) - 1)
    final_mass = forest.mass_msun[last]
    if final_mass.size:
        info["final_mass_range_msun"] = [float(final_mass.min()), float(final_mass.max())]
    if forest.forest_weight is not None:
        w = forest.forest_weight
        info["weights_mpc3"] = {"total": float(w.sum()), "min": float(w.min()),
                                "max": float(w.max())}
    elif forest.box_mpc is not None:
        info["volume_mpc3"] = float(forest.box_mpc) ** 3
    info["main_branch"] = main_branch_history(forest)
    return info


def format_summary(info: dict, source: str, max_rows: int = 25) -> str:
    """Human-readable text for `bhgrow trees info`."""
    lines = [f"forest file      {source}",
             f"forests          {info['n_forests']}",
             f"nodes            {info['n_nodes']}  (per forest: min {info['nodes_per_forest']['min']}, "
             f"median {info['nodes_per_forest']['median']:g}, max {info['nodes_per_forest']['max']})",
             f"snapshots        {info['n_snapshots']}  (z from {info['z_range'][1]:.3g} to "
             f"{info['z_range'][0]:.3g})",
             f"halo mass        {info['mass_range_msun'][0]:.3e} .. "
             f"{info['mass_range_msun'][1]:.3e} Msun"]
    if "final_mass_range_msun" in info:
        lo, hi = info["final_mass_range_msun"]
        lines.append(f"final-snap mass  {lo:.3e} .. {hi:.3e} Msun")
    lines.append(f"roots            {info['n_roots']}")
    if "weights_mpc3" in info:
        w = info["weights_mpc3"]
        lines.append(f"forest weights   total {w['total']:.4g} Mpc^-3 (min {w['min']:.3g}, "
                     f"max {w['max']:.3g})")
    elif "volume_mpc3" in info:
        lines.append(f"box              {info['box_mpc']:g} Mpc comoving "
                     f"({info['volume_mpc3']:.4g} Mpc^3)")
    else:
        lines.append("volume           none given (no box size, no forest weights)")
    if info["extra_columns"]:
        lines.append(f"extra columns    {', '.join(info['extra_columns'])}")
    mb = info["main_branch"]
    lines.append("")
    lines.append(f"median main-branch mass history of {mb['n_roots']} final-snapshot roots")
    lines.append("   snap-index      z    M/M_final   share present")
    n = len(mb["z"])
    step = max(1, int(np.ceil(n / max_rows)))
    idx = list(range(n - 1, -1, -step))
    for k in idx:
        lines.append(f"   {k:10d} {mb['z'][k]:8.3f} {mb['median_frac'][k]:12.4g} "
                     f"{mb['frac_present'][k]:12.2f}")
    return "\n".join(lines)
