"""What `bhgrow trees info` reports about a forest."""

from __future__ import annotations

import numpy as np

from .. import rng
from .forest import Forest

#: random-number purpose of the root sample (rng.uniform on the roots' node-id keys)
_SAMPLE_PURPOSE = 1


def _root_fractions(forest: Forest):
    """``M_main(z) / M_root`` of every final-snapshot root's main branch.

    Returns ``(frac, present, root_ids)``: arrays of shape (snapshots, roots) -- 0 and False
    where the main branch has not begun -- and the roots' node ids.
    """
    n_snap = len(forest.snapshots)
    last = forest.snapshot_slice(n_snap - 1)
    roots = np.arange(last.start, last.stop)
    roots = roots[forest.desc_index[roots] < 0]
    frac = np.zeros((n_snap, roots.size))
    present = np.zeros((n_snap, roots.size), dtype=bool)
    if roots.size:
        mb_root = forest.main_branch_root()
        root_pos = np.full(forest.n_nodes, -1, dtype=np.int64)
        root_pos[roots] = np.arange(roots.size)
        on = mb_root >= 0
        on[on] = root_pos[mb_root[on]] >= 0
        rows = np.flatnonzero(on)
        k = np.searchsorted(forest.snapshots.snap, forest.snap[rows])
        col = root_pos[mb_root[rows]]
        frac[k, col] = forest.mass_msun[rows] / forest.mass_msun[mb_root[rows]]
        present[k, col] = True
    return frac, present, forest.node_id[roots]


def _branch_summary(z, frac, present, n_roots: int) -> dict:
    out = {"z": z, "median_frac": np.full(z.size, np.nan), "frac_present": np.zeros(z.size),
           "n_roots": int(n_roots), "n_sampled": int(frac.shape[1])}
    if frac.shape[1]:
        out["median_frac"] = np.median(frac, axis=1)
        out["frac_present"] = present.mean(axis=1)
    return out


def main_branch_history(forest: Forest) -> dict:
    """Median main-branch mass history of the final-snapshot roots.

    Returns
    -------
    dict
        ``z`` (redshift per snapshot), ``median_frac`` (median over roots of
        M_main(z)/M_root, counting roots whose main branch has not yet begun as 0 so the
        median stays honest at high z), ``frac_present`` (share of roots with a main-branch
        node at that snapshot), ``n_roots`` and ``n_sampled`` (roots the medians are over:
        all of them here).
    """
    frac, present, _ = _root_fractions(forest)
    return _branch_summary(forest.snapshots.z, frac, present, frac.shape[1])


def summarize(forest, *, max_nodes: int = 2_000_000, max_roots: int = 200_000) -> dict:
    """Headline facts of a forest as a plain dict (JSON-friendly).

    Parameters
    ----------
    forest : Forest or HDF5Forests
        In memory, or a bhgrow HDF5 file read ``max_nodes`` nodes at a time
        (:meth:`~bhgrow.trees.io.HDF5Forests.chunk_ids`), so memory follows the chunk.
    max_nodes : int
        Chunk size for a file read lazily.
    max_roots : int
        The median main-branch history is over all final-snapshot roots when the forest
        has at most this many forests, else over a random sample of about this many (a
        pure function of the root's node id, so the same file gives the same sample).
    """
    lazy = not isinstance(forest, Forest)
    chunks = ((forest.select_forests(ids) for ids in forest.chunk_ids(max_nodes)) if lazy
              else [forest])
    share = min(1.0, max_roots / max(forest.n_forests, 1))
    n_snap = len(forest.snapshots)
    m_lo = f_lo = np.inf
    m_hi = f_hi = -np.inf
    n_roots = n_final_roots = 0
    extra: set = set()
    fracs, presents = [], []
    for chunk in chunks:
        m = chunk.mass_msun
        m_lo, m_hi = min(m_lo, float(m.min())), max(m_hi, float(m.max()))
        n_roots += int((chunk.desc_index < 0).sum())
        final_mass = m[chunk.snapshot_slice(n_snap - 1)]
        if final_mass.size:
            f_lo, f_hi = min(f_lo, float(final_mass.min())), max(f_hi, float(final_mass.max()))
        extra |= set(chunk.extra)
        frac, present, root_ids = _root_fractions(chunk)
        n_final_roots += root_ids.size
        if share < 1.0:
            keep = rng.uniform(rng.stream_keys(0, root_ids), 0, _SAMPLE_PURPOSE) < share
            frac, present = frac[:, keep], present[:, keep]
        fracs.append(frac)
        presents.append(present)
        del chunk
    nodes = forest.nodes_per_forest()
    z = forest.snapshots.z
    info = {
        "n_forests": forest.n_forests,
        "n_nodes": forest.n_nodes,
        "n_snapshots": n_snap,
        "z_range": [float(z.min()), float(z.max())],
        "mass_range_msun": [m_lo, m_hi],
        "nodes_per_forest": {"min": int(nodes.min()), "median": float(np.median(nodes)),
                             "max": int(nodes.max())},
        "n_roots": n_roots,
        "box_mpc": forest.box_mpc,
        "extra_columns": sorted(extra),
    }
    if np.isfinite(f_lo):
        info["final_mass_range_msun"] = [f_lo, f_hi]
    if forest.forest_weight is not None:
        w = forest.forest_weight
        info["weights_mpc3"] = {"total": float(w.sum()), "min": float(w.min()),
                                "max": float(w.max())}
    elif forest.box_mpc is not None:
        info["volume_mpc3"] = float(forest.box_mpc) ** 3
    info["main_branch"] = _branch_summary(z, np.concatenate(fracs, axis=1),
                                          np.concatenate(presents, axis=1), n_final_roots)
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
    sample = (f" (a random sample of {mb['n_sampled']})"
              if mb.get("n_sampled", mb["n_roots"]) < mb["n_roots"] else "")
    lines.append(f"median main-branch mass history of {mb['n_roots']} final-snapshot roots"
                 f"{sample}")
    lines.append("   snap-index      z    M/M_final   share present")
    n = len(mb["z"])
    step = max(1, int(np.ceil(n / max_rows)))
    idx = list(range(n - 1, -1, -step))
    for k in idx:
        lines.append(f"   {k:10d} {mb['z'][k]:8.3f} {mb['median_frac'][k]:12.4g} "
                     f"{mb['frac_present'][k]:12.2f}")
    return "\n".join(lines)
