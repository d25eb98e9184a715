"""Weighted samples of Monte Carlo forests: what `bhgrow trees make` builds.

Volume weights
--------------
Root masses are drawn by *stratified sampling in log M*: the range ``[m_lo, m_hi]`` is cut
into ``n_forests`` strata of equal width in ``log10 M`` and one root is drawn uniformly in
``log M`` inside each. Forest ``i`` gets the weight

    weight_mpc3[i] = ∫_{stratum i} (dn/dln M) dln M        [comoving Mpc^-3]

of the chosen halo mass function at the final redshift. So the weights of the forests in
any union of strata add up to the mass function's comoving number density of halos in that
mass range, exactly (to quadrature accuracy), whatever the random draw; any later count
(black holes, mergers per Gyr) summed with these weights is "per comoving Mpc^3". Halos
outside ``[m_lo, m_hi]`` are not represented: rates are those of black holes in halos whose
final mass lies in that range.

Per-forest resolution
---------------------
A single absolute resolution makes cluster trees enormous. With ``resolution_frac`` the
resolution of forest ``i`` is ``max(resolution_msun, resolution_frac * M_root,i)``, rounded
down to a 0.05-dex grid so that forests share a generator call per grid value (a loop over
at most a few dozen resolution values, never over halos). Progenitors below a forest's
resolution are smooth accretion.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .. import _validate
from ..cosmology import Cosmology
from ..errors import BhgrowInputError
from .forest import Forest
from .generate import PCHTreeGenerator, snapshot_grid
from .massfunction import MASS_FUNCTIONS
from .power import LinearPower

_OWNER = "trees make"

# ------------------------------------------------------------------------------------------
# Defaults of `bhgrow trees make` (one place; units and sources beside each)
# ------------------------------------------------------------------------------------------
DEFAULT_N_FORESTS = 200                  # forests per file
DEFAULT_MASS_RANGE_MSUN = (1e10, 1e14)   # root (final) halo masses [Msun]
DEFAULT_Z_FINAL = 0.0                    # redshift of the roots
DEFAULT_Z_START = 20.0                   # earliest snapshot; minihalo seeding starts z~20-30
DEFAULT_N_SNAPSHOTS = 64                 # evenly spaced in log(1+z)
DEFAULT_RESOLUTION_MSUN = 1e8            # absolute mass resolution [Msun]
DEFAULT_RESOLUTION_FRAC = 1e-3           # per-forest max(abs, frac * M_root); 0 = off
DEFAULT_MASS_FUNCTION = "sheth_tormen"   # Sheth & Tormen (1999, MNRAS 308, 119)
_RES_GRID_DEX = 0.05                     # grouping grid for per-forest resolutions
_QUAD_PER_STRATUM = 16                   # Gauss-Legendre nodes per stratum


@dataclass(frozen=True)
class ForestSample:
    """Root masses and their comoving number-density weights."""

    root_mass_msun: np.ndarray
    weight_mpc3: np.ndarray
    edges_msun: np.ndarray


def sample_roots(n_forests: int, m_lo: float, m_hi: float, z: float, power: LinearPower, *,
                 mass_function: str = DEFAULT_MASS_FUNCTION, seed: int) -> ForestSample:
    """Stratified root masses in log M with mass-function weights (see module notes).

    Parameters
    ----------
    n_forests : int
    m_lo, m_hi : float
        Root-mass range [Msun], 0 < m_lo < m_hi.
    z : float
        Redshift of the roots.
    power : LinearPower
    mass_function : {"sheth_tormen", "press_schechter"}
    seed : int

    Returns
    -------
    ForestSample
    """
    n = _validate.integer(_OWNER, "n_forests", n_forests, minimum=1)
    m_lo = _validate.positive(_OWNER, "m_lo", m_lo)
    m_hi = _validate.positive(_OWNER, "m_hi", m_hi)
    if not m_hi > m_lo:
        raise BhgrowInputError(f"`mass_range` of {_OWNER} must have HI > LO; got "
                               f"{m_lo:g} {m_hi:g}", source=_OWNER, rule="mass_range")
    _validate.one_of(_OWNER, "mass_function", mass_function, MASS_FUNCTIONS)
    edges = np.linspace(np.log(m_lo), np.log(m_hi), n + 1)
    # ordered per-stratum uniform draws from one seeded stream: a stratum's position does
    # not depend on how the file is later chunked
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 0x5EED]))
    u = rng.random(n)
    lnm = edges[:-1] + u * np.diff(edges)
    # weight: integral of dn/dlnM over each stratum (Gauss-Legendre, vectorized)
    x, wq = np.polynomial.legendre.leggauss(_QUAD_PER_STRATUM)
    half = 0.5 * np.diff(edges)
    mid = 0.5 * (edges[1:] + edges[:-1])
    nodes = mid[:, None] + half[:, None] * x[None, :]
    dndlnm = MASS_FUNCTIONS[mass_function](np.exp(nodes).ravel(), z, power).reshape(nodes.shape)
    weight = (dndlnm * wq[None, :]).sum(axis=1) * half
    return ForestSample(np.exp(lnm), weight, np.exp(edges))


def make_forests(n_forests: int = DEFAULT_N_FORESTS, *,
                 mass_range_msun=DEFAULT_MASS_RANGE_MSUN, z_final: float = DEFAULT_Z_FINAL,
                 z_start: float = DEFAULT_Z_START, n_snapshots: int = DEFAULT_N_SNAPSHOTS,
                 snapshot_z=None, resolution_msun: float = DEFAULT_RESOLUTION_MSUN,
                 resolution_frac: float = DEFAULT_RESOLUTION_FRAC,
                 cosmology: Cosmology | str | None = None,
                 mass_function: str = DEFAULT_MASS_FUNCTION, seed: int = 1,
                 generator: PCHTreeGenerator | None = None, progress: bool = False,
                 meta: dict | None = None) -> Forest:
    """Generate a weighted sample of Parkinson, Cole & Helly (2008) merger trees.

    Parameters
    ----------
    n_forests : int
        Number of forests (one root each).
    mass_range_msun : (float, float)
        Root-mass range [Msun] at ``z_final``.
    z_final, z_start : float
        Redshift of the roots and of the earliest snapshot.
    n_snapshots : int
        Snapshots evenly spaced in log(1+z) from ``z_start`` to ``z_final``; ignored when
        ``snapshot_z`` is given.
    snapshot_z : array_like, optional
        Explicit snapshot redshifts (must include ``z_final`` as the lowest).
    resolution_msun, resolution_frac : float
        Absolute resolution [Msun] and optional fraction of the root mass (see module notes).
    cosmology : Cosmology or str, optional
        Default Planck 2018.
    mass_function : str
        Mass function for the weights.
    seed : int
        Same seed and arguments give a bit-identical forest.
    generator : PCHTreeGenerator, optional
        Generator parameters (its ``resolution_msun`` is replaced per forest group).
    progress : bool
        Show a progress bar over resolution groups.

    Returns
    -------
    Forest
        With per-forest ``weight_mpc3`` [comoving Mpc^-3] and provenance in ``meta``.
    """
    from dataclasses import replace

    if cosmology is None or isinstance(cosmology, str):
        cosmology = Cosmology.from_name(cosmology or "Planck18")
    z_final = _validate.non_negative(_OWNER, "z_final", z_final)
    if snapshot_z is None:
        z_start = _validate.positive(_OWNER, "z_start", z_start)
        if not z_start > z_final:
            raise BhgrowInputError(f"`z_start` of {_OWNER} must be > z_final ({z_final:g}); "
                                   f"got {z_start:g}", source=_OWNER, rule="z_start")
        n_snap = _validate.integer(_OWNER, "n_snapshots", n_snapshots, minimum=2)
        snapshot_z = snapshot_grid(n_snap, z_start, z_final)
    snapshot_z = np.sort(np.asarray(snapshot_z, dtype=np.float64))[::-1]
    if snapshot_z.size < 2 or not np.isclose(snapshot_z[-1], z_final):
        raise BhgrowInputError(f"snapshot redshifts of {_OWNER} need at least two values and "
                               f"must end at z_final = {z_final:g}", source=_OWNER,
                               rule="snapshots")
    if snapshot_z[0] > cosmology.z_max:
        raise BhgrowInputError(f"`z_start` of {_OWNER} must be <= {cosmology.z_max:g} (the "
                               f"cosmology table range); got {snapshot_z[0]:g}",
                               source=_OWNER, rule="z_start")
    res_abs = _validate.positive(_OWNER, "resolution_msun", resolution_msun)
    res_frac = _validate.in_range(_OWNER, "resolution_frac", resolution_frac, 0.0, 0.5)
    lo, hi = mass_range_msun
    if not float(lo) > res_abs:
        raise BhgrowInputError(f"`mass_range` of {_OWNER} must start above the resolution "
                               f"({res_abs:g} Msun); got LO = {float(lo):g}", source=_OWNER,
                               rule="mass_range")
    power = LinearPower(cosmology)
    sample = sample_roots(n_forests, lo, hi, z_final, power, mass_function=mass_function,
                          seed=seed)
    gen = generator or PCHTreeGenerator(resolution_msun=res_abs)

    roots = sample.root_mass_msun
    res = np.full(roots.size, res_abs)
    if res_frac > 0:
        res = np.maximum(res_abs, res_frac * roots)
        res = 10.0 ** (np.floor(np.log10(res) / _RES_GRID_DEX + 1e-9) * _RES_GRID_DEX)
        res = np.maximum(res, res_abs)
    fids = np.arange(roots.size, dtype=np.int64)
    groups = np.unique(res)
    parts = []
    next_id = 0
    from tqdm.auto import tqdm

    for r in tqdm(groups, desc="trees", unit="group", disable=not progress or groups.size < 2):
        sel = res == r
        trees = replace(gen, resolution_msun=float(r)).grow(
            roots[sel], snapshot_z, power, seed=seed, forest_ids=fids[sel],
            first_node_id=next_id)
        next_id += trees.n_nodes
        parts.append(trees)
    cols = {k: np.concatenate([p.columns()[k] for p in parts]) for k in parts[0].columns()}
    info = dict(parts[0].meta)
    info.pop("resolution_msun", None)
    info.update({
        "resolution_msun": res_abs, "resolution_frac": res_frac,
        "mass_range_msun": [float(lo), float(hi)], "z_final": z_final,
        "mass_function": mass_function, "n_forests": int(roots.size),
        "cosmology": cosmology.to_dict(),
        "n_bound_violations": int(sum(p.meta.get("n_bound_violations", 0) for p in parts)),
    })
    info.update(meta or {})
    snaps = np.arange(snapshot_z.size, dtype=np.int64)
    weights = {"forest_id": fids, "weight_mpc3": sample.weight_mpc3}
    return Forest.from_columns(cols, snaps, snapshot_z, forest_weight=weights, meta=info,
                               source=_OWNER)
