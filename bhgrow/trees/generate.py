"""Monte Carlo merger trees: the binary-split algorithm of Parkinson, Cole & Helly (2008).

The generator walks every tree backwards in time from its root (a halo of given mass at the
lowest redshift of a snapshot grid). The time variable is the extended Press-Schechter (EPS)
"barrier" ``w = delta_crit / D(z)`` and the mass variable ``S = sigma^2(M)`` at z = 0. Each
halo of mass ``M2`` at ``w`` takes a step ``dw`` in which it

* accretes the fraction ``F`` of its mass held by progenitors below the mass resolution
  ``M_res`` (counted as *smooth accretion*), and
* with probability ``P`` splits off one resolved progenitor ``q M2`` with
  ``M_res / M2 <= q <= 1/2``; the rest ``(1 - F - q) M2`` continues as the other progenitor.

The progenitor rate per unit ``w`` is the EPS one (Lacey & Cole 1993, MNRAS 262, 627,
eq. 2.15 in the limit of a small step) times the correction of Parkinson, Cole & Helly (2008,
MNRAS 383, 557; "PCH08") fitted to the Millennium simulation::

    dN/dq = sqrt(2/pi) * alpha(q) * sigma_1^2 / (q^2 (S_1 - S_2)^(3/2)) * G * dw
    G     = G0 (sigma_1/sigma_2)^gamma1 (w/sigma_2)^gamma2            (PCH08 eq. 4)
    F     = sqrt(2/pi) * J(u_res) * G0 (w/sigma_2)^gamma2 / sigma_2 * dw  (PCH08 Sect. 2.3)
    J(u)  = int_0^u (1 + 1/x^2)^(gamma1/2) dx,   u_res = sigma_2 / sqrt(S_res - S_2)

with ``alpha = -dln sigma/dln M``. ``G0 = 1, gamma1 = gamma2 = 0`` gives the uncorrected EPS
algorithm (Cole et al. 2000, MNRAS 319, 168, Section 3 (memory)).

Splits are drawn by rejection from a power-law bound ``S(q) = A q^(eta - 1) >= dN/dq``
(PCH08 Appendix A (memory); the bound is re-derived in
:meth:`PCHTreeGenerator._split_bound`): ``q`` is drawn
from ``S`` by inverting its integral, then kept with probability ``R(q) = (dN/dq)/S(q) <= 1``.
The step obeys PCH08's two limits: ``dw <= eps1 sqrt(2 (S(M2/2) - S_2))`` keeps the first-
crossing exponential close to 1, and ``P = dw * int S dq <= eps2`` keeps the chance of more
than one split per step small (PCH08 Appendix A, memory). Steps are also cut so that no
branch jumps over a snapshot: a branch that reaches a snapshot emits a tree node there.
Branches at or below ``M_res`` end; their mass is smooth accretion of their descendant.
Halos between ``M_res`` and ``2 M_res`` cannot split into two resolved halos and only lose
the fraction ``F`` per step (as in PCH08); applied deterministically, this slightly
overestimates the mass that leaves the resolved range right at ``M_res`` (for a white-noise
spectrum: 0.9600 instead of 0.9611 of the mass resolved after dw = 1.08), while masses
above ``2 M_res`` follow EPS (see the tests).

Accuracy of the algorithm itself: with ``G = 1`` binary splitting reproduces extended
Press-Schechter exactly only for a white-noise spectrum, where the EPS split rate is
symmetric under ``q -> 1 - q``; for CDM spectra the progenitor mass function departs from
Lacey & Cole (1993) at long look-back times and for the main progenitor (measured numbers in
``tests/trees/test_generate.py``).

Vectorization and random numbers
--------------------------------
All live branches of all forests advance together, one step per iteration of a single Python
loop (no per-halo recursion). Random numbers come from a counter-based hash (SplitMix64
finalizer; Steele, Lea & Flood 2014, OOPSLA "Fast splittable pseudorandom number generators")
of (branch key, step number, purpose); the root key of a forest is a hash of (seed,
forest_id) and a new branch's key is a hash of its parent's key and the step number. A
forest's tree therefore depends only on (seed, forest_id, root mass, parameters, snapshot
grid) -- never on which other forests were generated in the same call, on chunking or on the
number of workers (DESIGN §2.5, §11).

Output
------
Nodes carry the columns of bhgrow's tree schema (``node_id, desc_id, forest_id, snap,
mass_msun``) plus ``smooth_accretion_msun``: the mass a node gained from progenitors below
the resolution between the previous snapshot and its own (zero at the earliest snapshot).
Mass is conserved exactly by construction at every split, so for every node after the
earliest snapshot

    mass_msun = sum(mass_msun of its progenitors) + smooth_accretion_msun   (to round-off).

References
----------
Parkinson H., Cole S., Helly J., 2008, MNRAS 383, 557 (PCH08)
Lacey C., Cole S., 1993, MNRAS 262, 627 (LC93)
Cole S., Lacey C. G., Baugh C. M., Frenk C. S., 2000, MNRAS 319, 168
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .. import _validate
from .._grid import UniformLinearTable
from ..rng import hash64 as _hash
from ..rng import stream_keys as _root_keys
from ..rng import uniform as _uniform
from ..errors import BhgrowInputError
from .forest import Forest

__all__ = ["PCHTreeGenerator", "GeneratedTrees", "snapshot_grid", "j_integral"]

_OWNER = "PCHTreeGenerator"

# --------------------------------------------------------------------------- defaults
# Published parameters of the algorithm: Parkinson, Cole & Helly 2008, MNRAS 383, 557,
# Section 2.3 (G0, gamma1, gamma2 fitted to Millennium-simulation progenitor mass
# functions) and Appendix A (step-size controls eps1, eps2). Values from memory.
DEFAULT_G0 = 0.57
DEFAULT_GAMMA1 = 0.38
DEFAULT_GAMMA2 = -0.01
DEFAULT_EPS1 = 0.1
DEFAULT_EPS2 = 0.1

#: points per e-fold of mass in the internal ln sigma(ln M) and alpha(ln M) tables
_TABLE_PER_EFOLD = 64
#: the J(u) table: ln u = k / _J_SCALE for |k| <= _J_K (ln u from -30 to 30)
_J_SCALE = 128
_J_K = 30 * 128
#: R(q) above 1 by more than this counts as a violated rejection bound (diagnostic)
_BOUND_TOL = 1e-6
_SQRT_2_OVER_PI = math.sqrt(2.0 / math.pi)

_M64 = (1 << 64) - 1
#: purposes of the per-branch random streams (counter = 4 * step + purpose + 1)
_P_SPLIT, _P_Q, _P_ACCEPT, _P_CHILD = 0, 1, 2, 3


# --------------------------------------------------------------------------- helpers
def snapshot_grid(n: int, z_start: float, z_final: float = 0.0) -> np.ndarray:
    """Redshifts of ``n`` snapshots evenly spaced in ln(1+z), earliest first.

    Parameters
    ----------
    n : int
        Number of snapshots, >= 2.
    z_start : float
        Redshift of the earliest snapshot (snapshot 0), > ``z_final``.
    z_final : float, optional
        Redshift of the last snapshot (snapshot ``n - 1``, where the roots sit), >= 0.

    Returns
    -------
    ndarray of float64
        ``z[k] = exp(ln(1+z_start) + k (ln(1+z_final) - ln(1+z_start))/(n-1)) - 1``, strictly
        decreasing, with both ends exact.
    """
    n = _validate.integer("snapshot_grid", "n", n, minimum=2)
    z_final = _validate.non_negative("snapshot_grid", "z_final", z_final)
    z_start = _validate.positive("snapshot_grid", "z_start", z_start)
    if not z_start > z_final:
        raise BhgrowInputError(f"`z_start` of snapshot_grid must be > z_final = {z_final:g}; "
                               f"got {z_start!r}", source="snapshot_grid", rule="z_start")
    z = np.expm1(np.linspace(math.log1p(z_start), math.log1p(z_final), n))
    z[0], z[-1] = z_start, z_final
    return z


def _j_table(gamma1: float):
    """Table of ln J(u) - ln u on a ln u grid, J(u) = int_0^u (1 + 1/x^2)^(gamma1/2) dx.

    Closed form J(u) = u^(1-g1)/(1-g1) 2F1(-g1/2, (1-g1)/2; (3-g1)/2; -u^2) (substituting
    x^2 = s turns the integral into an incomplete beta function, whose hypergeometric form is
    DLMF eq. 8.17.7 (memory)); gamma1 < 1.
    """
    from scipy.special import hyp2f1

    lnu = np.arange(-_J_K, _J_K + 1) / _J_SCALE
    if gamma1 == 0.0:
        return lnu, np.zeros_like(lnu)
    u = np.exp(lnu)
    g = gamma1
    j = u ** (1.0 - g) / (1.0 - g) * hyp2f1(-0.5 * g, 0.5 * (1.0 - g), 0.5 * (3.0 - g), -u * u)
    return lnu, np.log(j) - lnu


def j_integral(u, gamma1: float) -> np.ndarray:
    """J(u) = int_0^u (1 + 1/x^2)^(gamma1/2) dx of PCH08 (their Section 2.3 (memory)).

    Parameters
    ----------
    u : array_like
        Upper limit, > 0.
    gamma1 : float
        Exponent, < 1 (the integral diverges at 0 otherwise).

    Returns
    -------
    ndarray
        J(u), from the tabulated closed form (relative accuracy ~1e-6).
    """
    lnu_t, val_t = _j_table(float(gamma1))
    u = np.asarray(u, dtype=np.float64)
    lnu = np.log(u.reshape(-1))
    tab = UniformLinearTable(-_J_K, _J_SCALE, val_t)
    return np.exp(lnu + tab.value(0, *tab.locate(lnu))).reshape(u.shape)


class _SigmaTable:
    """ln sigma(ln M) and alpha(ln M) = -dln sigma/dln M on a uniform ln M grid (z = 0).

    Linear interpolation of a concave ln sigma(ln M) is again concave, and of an increasing
    alpha again increasing, which the rejection bound relies on (see
    :meth:`PCHTreeGenerator._split_bound`).
    """

    def __init__(self, power, m_lo: float, m_hi: float):
        # nodes on a fixed lattice k / _TABLE_PER_EFOLD in ln M, so that interpolated values
        # do not depend on the range (i.e. on the other roots of a call)
        k_lo = math.floor((math.log(m_lo) - 0.05) * _TABLE_PER_EFOLD)
        k_hi = max(math.ceil((math.log(m_hi) + 0.05) * _TABLE_PER_EFOLD), k_lo + 16)
        x = np.arange(k_lo, k_hi + 1, dtype=np.float64) / _TABLE_PER_EFOLD
        m = np.exp(x)
        sig = np.asarray(power.sigma(m), dtype=np.float64)
        alpha = -np.asarray(power.dlnsigma_dlnm(m), dtype=np.float64)
        if not (np.all(np.isfinite(sig)) and np.all(sig > 0) and np.all(np.isfinite(alpha))):
            raise BhgrowInputError(f"{_OWNER}: the power spectrum gave a non-finite or "
                                   f"non-positive sigma(M) between {m_lo:.3g} and "
                                   f"{m_hi:.3g} Msun", source=_OWNER, rule="sigma")
        if np.any(np.diff(sig) >= 0) or np.any(alpha <= 0):
            raise BhgrowInputError(f"{_OWNER}: sigma(M) must decrease with mass between "
                                   f"{m_lo:.3g} and {m_hi:.3g} Msun", source=_OWNER,
                                   rule="sigma")
        self.grid = UniformLinearTable(k_lo, _TABLE_PER_EFOLD, np.log(sig), alpha)

    def lnsigma(self, lnm: np.ndarray) -> np.ndarray:
        i, t = self.grid.locate(lnm)
        return self.grid.value(0, i, t)

    def lnsigma_alpha(self, lnm: np.ndarray):
        i, t = self.grid.locate(lnm)
        return self.grid.value(0, i, t), self.grid.value(1, i, t)


# --------------------------------------------------------------------------- output
@dataclass(eq=False)
class GeneratedTrees:
    """Node columns of generated merger trees.

    Attributes
    ----------
    node_id, desc_id, forest_id, snap : ndarray of int64
        bhgrow tree schema (DESIGN §5); ``desc_id = -1`` for roots, ``snap`` indexes
        :attr:`snapshot_z` (0 = earliest).
    mass_msun : ndarray of float64
        Halo mass, physical Msun.
    smooth_accretion_msun : ndarray of float64
        Mass the node gained from progenitors below the resolution since the previous
        snapshot [Msun]; 0 at the earliest snapshot (nothing traced before it).
    snapshot_z : ndarray of float64
        Redshift of each snapshot number (strictly decreasing).
    forest_ids : ndarray of int64
        Forest ids in the order of the roots given.
    root_mass_msun : ndarray of float64
        Root masses, aligned with :attr:`forest_ids`.
    meta : dict
        Provenance: generator name and parameters, seed, resolution, cosmology, counters
        (``n_steps`` loop iterations, ``n_bound_violations`` rejection-bound failures,
        which should be 0).
    """

    node_id: np.ndarray
    desc_id: np.ndarray
    forest_id: np.ndarray
    snap: np.ndarray
    mass_msun: np.ndarray
    smooth_accretion_msun: np.ndarray
    snapshot_z: np.ndarray
    forest_ids: np.ndarray
    root_mass_msun: np.ndarray
    meta: dict = field(default_factory=dict)

    @property
    def n_nodes(self) -> int:
        return int(self.node_id.size)

    def columns(self) -> dict:
        """The schema columns (without ``smooth_accretion_msun``) as a dict of arrays."""
        return {"node_id": self.node_id, "desc_id": self.desc_id,
                "forest_id": self.forest_id, "snap": self.snap, "mass_msun": self.mass_msun}

    def to_forest(self, weight_mpc3=None, *, box_mpc=None, meta: dict | None = None) -> Forest:
        """Validate and index the trees as a :class:`~bhgrow.trees.forest.Forest`.

        Parameters
        ----------
        weight_mpc3 : float or array_like, optional
            Comoving number density each forest represents [Mpc^-3]: one value for all, or
            one per forest aligned with :attr:`forest_ids`.
        box_mpc : float, optional
            Comoving box side [Mpc], if the roots sample a box.
        meta : dict, optional
            Extra provenance merged over :attr:`meta`.

        Returns
        -------
        Forest
            ``smooth_accretion_msun`` is not a column of the tree schema and is not carried.
        """
        weights = None
        if weight_mpc3 is not None:
            w = np.broadcast_to(np.asarray(weight_mpc3, dtype=np.float64),
                                self.forest_ids.shape)
            weights = {"forest_id": self.forest_ids, "weight_mpc3": np.array(w)}
        info = dict(self.meta)
        info.update(meta or {})
        snaps = np.arange(self.snapshot_z.size, dtype=np.int64)
        return Forest.from_columns(self.columns(), snaps, self.snapshot_z, box_mpc=box_mpc,
                                   forest_weight=weights, meta=info, source=_OWNER)

    def write_hdf5(self, path, weight_mpc3=None, *, box_mpc=None, meta: dict | None = None,
                   overwrite: bool = False):
        """Validate (see :meth:`to_forest`) and write in bhgrow's HDF5 layout, atomically.

        Returns
        -------
        pathlib.Path
            The file written (:func:`bhgrow.trees.io.write_hdf5`).
        """
        from .io import write_hdf5

        forest = self.to_forest(weight_mpc3, box_mpc=box_mpc, meta=meta)
        return write_hdf5(forest, path, overwrite=overwrite)


# --------------------------------------------------------------------------- generator
@dataclass(frozen=True)
class PCHTreeGenerator:
    """Monte Carlo merger trees by the Parkinson, Cole & Helly (2008) binary-split algorithm.

    Parameters
    ----------
    resolution_msun : float
        Mass resolution M_res [Msun], > 0: progenitors below it are not followed and count
        as smooth accretion.
    g0, gamma1, gamma2 : float
        Correction ``G = g0 (sigma1/sigma2)^gamma1 (w/sigma2)^gamma2`` to the EPS progenitor
        rate (PCH08 eq. 4). Defaults 0.57, 0.38, -0.01 (PCH08 Section 2.3, memory).
        ``g0 = 1, gamma1 = gamma2 = 0`` is plain EPS. Allowed: ``g0 > 0``,
        ``-5 <= gamma1 < 1`` (J(u) diverges for gamma1 >= 1), ``-5 <= gamma2 <= 5``.
    eps1, eps2 : float
        Step controls in (0, 1] (PCH08 Appendix A, memory; both 0.1):
        ``dw <= eps1 sqrt(2 (S(M/2) - S(M)))`` and split probability per step ``<= eps2``.

    Examples
    --------
    >>> gen = PCHTreeGenerator(resolution_msun=1e9)               # doctest: +SKIP
    >>> trees = gen.grow([1e12, 1e13], snapshot_grid(40, 10.0), power, seed=1)  # +SKIP
    >>> forest = trees.to_forest(weight_mpc3=1e-3)                 # doctest: +SKIP
    """

    resolution_msun: float
    g0: float = DEFAULT_G0
    gamma1: float = DEFAULT_GAMMA1
    gamma2: float = DEFAULT_GAMMA2
    eps1: float = DEFAULT_EPS1
    eps2: float = DEFAULT_EPS2

    def __post_init__(self):
        set_ = object.__setattr__
        set_(self, "resolution_msun", _validate.positive(_OWNER, "resolution_msun",
                                                         self.resolution_msun))
        set_(self, "g0", _validate.positive(_OWNER, "g0", self.g0))
        set_(self, "gamma1", _validate.in_range(_OWNER, "gamma1", self.gamma1, -5.0, 1.0,
                                                hi_open=True))
        set_(self, "gamma2", _validate.in_range(_OWNER, "gamma2", self.gamma2, -5.0, 5.0))
        set_(self, "eps1", _validate.in_range(_OWNER, "eps1", self.eps1, 0.0, 1.0,
                                              lo_open=True))
        set_(self, "eps2", _validate.in_range(_OWNER, "eps2", self.eps2, 0.0, 1.0,
                                              lo_open=True))

    # ------------------------------------------------------------------ main method
    def grow(self, root_mass_msun, snapshot_z, power, *, seed: int, forest_ids=None,
             first_node_id: int = 0, progress: bool = False) -> GeneratedTrees:
        """Grow one merger tree per root mass, backwards in time, on a snapshot grid.

        Parameters
        ----------
        root_mass_msun : array_like
            Root halo masses [Msun] at the lowest redshift of ``snapshot_z``; each
            > ``resolution_msun``.
        snapshot_z : array_like
            Distinct redshifts >= 0 of the output snapshots, in any order (see
            :func:`snapshot_grid`). Snapshot numbers are assigned earliest first, so the
            roots sit at snapshot ``len(snapshot_z) - 1``.
        power : LinearPower
            Provides ``sigma(m_msun)`` and ``dlnsigma_dlnm(m_msun)`` at z = 0 and
            ``delta_c(z) = delta_crit / D(z)`` (:mod:`bhgrow.trees.power`).
        seed : int
            Run seed, 0 <= seed < 2**64. Same seed, forest id, root mass, parameters and
            grid give a bit-identical tree.
        forest_ids : array_like of int, optional
            Unique ids >= 0, one per root (default ``0 .. n-1``). They key the random
            streams: a forest's tree does not depend on the other forests of the call.
        first_node_id : int, optional
            Node ids are ``first_node_id + 0, 1, ...``, grouped by forest in the order of
            the roots (give disjoint ranges when generating chunks separately).
        progress : bool, optional
            Show a tqdm progress bar (snapshots passed by the slowest branch).

        Returns
        -------
        GeneratedTrees

        Raises
        ------
        BhgrowInputError
            For root masses below the resolution or not finite, bad snapshot redshifts,
            bad forest ids or seed.
        """
        roots = np.atleast_1d(np.asarray(root_mass_msun, dtype=np.float64))
        if roots.ndim != 1 or roots.size == 0:
            raise BhgrowInputError(f"{_OWNER}: root masses must be a non-empty 1-D array",
                                   source=_OWNER, rule="root_mass_msun")
        bad = ~np.isfinite(roots) | (roots <= self.resolution_msun)
        if bad.any():
            raise BhgrowInputError(
                f"{_OWNER}: root masses must be finite and > resolution_msun = "
                f"{self.resolution_msun:.4g} Msun; bad at positions "
                f"{np.flatnonzero(bad)[:10].tolist()}", source=_OWNER, rule="root_mass_msun",
                rows=np.flatnonzero(bad)[:10].tolist())
        z_sorted = self._check_grid(snapshot_z)
        if forest_ids is None:
            fids = np.arange(roots.size, dtype=np.int64)
        else:
            fids = np.asarray(forest_ids)
            if fids.shape != roots.shape or fids.dtype.kind not in "iu":
                raise BhgrowInputError(f"{_OWNER}: forest_ids must be integers, one per root",
                                       source=_OWNER, rule="forest_ids")
            fids = fids.astype(np.int64)
            if (fids < 0).any() or np.unique(fids).size != fids.size:
                raise BhgrowInputError(f"{_OWNER}: forest_ids must be unique and >= 0",
                                       source=_OWNER, rule="forest_ids")
        seed = _validate.integer(_OWNER, "seed", seed, minimum=0)
        if seed > _M64:
            raise BhgrowInputError(f"`seed` of {_OWNER} must be < 2**64; got {seed}",
                                   source=_OWNER, rule="seed")
        first_node_id = _validate.integer(_OWNER, "first_node_id", first_node_id, minimum=0)

        # w of each snapshot, latest (roots) first: the walk goes backwards in time
        w_snap = np.asarray(power.delta_c(z_sorted[::-1]), dtype=np.float64)
        if not (np.all(np.isfinite(w_snap)) and np.all(np.diff(w_snap) > 0)):
            raise BhgrowInputError(f"{_OWNER}: delta_c(z) of the power spectrum must be "
                                   f"finite and increase with z", source=_OWNER, rule="delta_c")
        table = _SigmaTable(power, 0.5 * self.resolution_msun, float(roots.max()))
        cols, counters = self._walk(roots, fids, w_snap, table, seed, progress)
        n_snap = z_sorted.size
        mass, jback, desc_local, frow, smooth = cols

        # Node ids: grouped by forest (order of the roots), then in emission order.
        order = np.argsort(frow, kind="stable")
        local_to_id = np.empty(order.size, dtype=np.int64)
        local_to_id[order] = first_node_id + np.arange(order.size, dtype=np.int64)
        desc = np.where(desc_local >= 0, local_to_id[np.maximum(desc_local, 0)], -1)
        meta = {
            "generator": "Parkinson, Cole & Helly (2008) binary merger tree",
            "g0": self.g0, "gamma1": self.gamma1, "gamma2": self.gamma2,
            "eps1": self.eps1, "eps2": self.eps2, "resolution_msun": self.resolution_msun,
            "seed": seed, "cosmology": _cosmology_name(power), **counters,
        }
        return GeneratedTrees(
            node_id=local_to_id[order], desc_id=desc[order], forest_id=fids[frow[order]],
            snap=(n_snap - 1 - jback[order]).astype(np.int64), mass_msun=mass[order],
            smooth_accretion_msun=smooth[order], snapshot_z=z_sorted, forest_ids=fids,
            root_mass_msun=roots, meta=meta)

    # ------------------------------------------------------------------ internals
    @staticmethod
    def _check_grid(snapshot_z) -> np.ndarray:
        z = np.atleast_1d(np.asarray(snapshot_z, dtype=np.float64))
        if z.ndim != 1 or z.size == 0 or not np.all(np.isfinite(z)) or (z < 0).any():
            raise BhgrowInputError(f"{_OWNER}: snapshot redshifts must be a non-empty 1-D "
                                   f"array of finite values >= 0", source=_OWNER,
                                   rule="snapshot_z")
        z_sorted = np.sort(z)[::-1].copy()  # earliest (highest z) first
        if np.any(np.diff(z_sorted) >= 0):
            raise BhgrowInputError(f"{_OWNER}: snapshot redshifts must be distinct",
                                   source=_OWNER, rule="snapshot_z")
        return z_sorted

    def _split_bound(self, s2, s_h, a_h, big_l, w, s_res2: float):
        """Power-law bound S(q) = A q^(eta-1) of the split rate dN/dq per unit w.

        Write the rate as ``sqrt(2/pi) G0 (w/s2)^gamma2 s2^-gamma1 alpha(q) sigma1^gamma1
        V(q) / q^2`` with ``V = S1 / (S1 - S2)^(3/2)``. For q in [q_res, 1/2]
        (q_res = M_res/M2; subscript h: at M2/2, res: at M_res), with ln sigma(ln M)
        concave and alpha increasing with M (CDM spectra; also true of the linear
        interpolant used here), each factor has a power-law bound that touches it at an end
        of the interval (the construction of PCH08 Appendix A, re-derived here):

        * alpha(q) <= alpha_h;
        * V(q) <= V_h (2q)^nu with nu = ln(V_h/V_res) / L, L = ln(1/(2 q_res)): ln V is a
          convex function of ln q, so it lies below its chord;
        * sigma1^gamma1 <= sigma_h^gamma1 (2q)^(-mu gamma1), with mu = alpha_h (tangent at
          q = 1/2, above the concave ln sigma) for gamma1 >= 0 and
          mu = ln(sigma_res/sigma_h)/L (chord, below it) for gamma1 < 0.

        Hence eta = nu - mu gamma1 - 1 and
        A = sqrt(2/pi) G0 (w/s2)^gamma2 (s_h/s2)^gamma1 alpha_h V_h 2^(nu - mu gamma1).

        Returns
        -------
        tuple
            A, eta, nu, mu, V_h and the integral of S(q) over [q_res, 1/2].
        """
        ln2 = math.log(2.0)
        S2 = s2 * s2
        S_h = s_h * s_h
        v_h = S_h * (S_h - S2) ** -1.5
        v_res = s_res2 * (s_res2 - S2) ** -1.5
        nu = np.log(v_h / v_res) / big_l
        if self.gamma1 >= 0:
            mu = a_h
        else:
            mu = 0.5 * np.log(s_res2 / S_h) / big_l
        eta = nu - mu * self.gamma1 - 1.0
        amp = _SQRT_2_OVER_PI * self.g0 * a_h * v_h * np.exp((eta + 1.0) * ln2)
        if self.gamma1 != 0.0:
            amp *= (s_h / s2) ** self.gamma1
        if self.gamma2 != 0.0:
            amp *= (w / s2) ** self.gamma2
        # int_{q_res}^{1/2} q^(eta-1) dq = q_res^eta (exp(eta L) - 1)/eta  (-> L as eta -> 0)
        integral = amp * np.exp(-eta * (big_l + ln2)) * _expm1_ratio(eta, big_l)
        return amp, eta, nu, mu, v_h, integral

    def _walk(self, roots, fids, w_snap, table: _SigmaTable, seed: int,
              progress: bool = False):
        """Advance all branches of all forests together until they die or reach the end.

        Returns the emitted nodes (mass, back index of the snapshot -- 0 at the roots --,
        local index of the descendant, forest row, smooth accretion) and counters.
        """
        ln2 = math.log(2.0)
        n_snap = w_snap.size
        m_res = self.resolution_msun
        ln_res = math.log(m_res)
        s_res2 = float(np.exp(2.0 * table.lnsigma(np.array([ln_res]))[0]))
        lnu_t, jv_t = _j_table(self.gamma1)
        jtab = UniformLinearTable(-_J_K, _J_SCALE, jv_t)
        g1, g2 = self.gamma1, self.gamma2
        f_coef = _SQRT_2_OVER_PI * self.g0

        n_roots = roots.size
        # emitted nodes; a node's local index is its position in the concatenated lists
        em_mass = [roots.copy()]
        em_j = [np.zeros(n_roots, dtype=np.int64)]
        em_desc = [np.full(n_roots, -1, dtype=np.int64)]
        em_row = [np.arange(n_roots, dtype=np.int64)]
        n_nodes = n_roots
        dump_node: list = []  # smooth accretion owed to nodes: (local index, mass) pairs
        dump_mass: list = []

        # live branches (struct of arrays)
        key = _root_keys(seed, fids)
        m = roots.copy()
        w = np.full(n_roots, w_snap[0])
        jn = np.ones(n_roots, dtype=np.int64)  # back index of the next snapshot to reach
        last = np.arange(n_roots, dtype=np.int64)  # local index of the last emitted node
        row = np.arange(n_roots, dtype=np.int64)  # forest row
        acc = np.zeros(n_roots)  # smooth accretion owed to node `last` so far
        if n_snap == 1:
            m = m[:0]
        step = n_violations = n_splits = n_tries = 0
        bar = None
        if progress:
            from tqdm import tqdm

            bar = tqdm(total=n_snap - 1, desc="merger trees", unit="snapshot")
            done = 0
        while m.size:
            if bar is not None and step % 64 == 0:
                reached = int(jn.min()) - 1
                bar.update(reached - done)
                done = reached
            lnm = np.log(m)
            ln_h = lnm - ln2
            s2 = np.exp(table.lnsigma(lnm))
            S2 = s2 * s2
            s_h, a_h = table.lnsigma_alpha(ln_h)
            np.exp(s_h, out=s_h)
            big_l = ln_h - ln_res  # ln(1/(2 q_res)); > 0 where a resolved split can happen
            # step limit 1 (PCH08 App. A): dw <= eps1 sqrt(2 (S(M_lim) - S2)) with
            # M_lim = M2/2; halos below 2 M_res can only accrete and use M_lim = M_res
            can_split = big_l > 1e-9
            s_lim2 = np.where(can_split, s_h * s_h, s_res2)
            gap_res = s_res2 - S2
            alive = gap_res > 0.0  # False only for masses at the resolution (round-off)
            dw = self.eps1 * np.sqrt(2.0 * np.maximum(s_lim2 - S2, 0.0))
            idx = np.flatnonzero(can_split & alive)
            rate = np.zeros_like(m)
            if idx.size:
                bound = self._split_bound(s2[idx], s_h[idx], a_h[idx], big_l[idx], w[idx],
                                          s_res2)
                rate[idx] = bound[-1]
                # step limit 2 (PCH08 App. A): split probability dw * int S dq <= eps2
                dw[idx] = np.minimum(dw[idx], self.eps2 / bound[-1])
            # never jump over the next snapshot
            dw_snap = w_snap[jn] - w
            hit = dw_snap <= dw
            dw = np.where(hit, dw_snap, dw)

            # smooth accretion: mass fraction in progenitors below M_res (PCH08 Sec. 2.3):
            # F = sqrt(2/pi) J(u_res) G0/sigma2 (w/sigma2)^gamma2 dw,
            # u_res = sigma2 / sqrt(S_res - S2)
            lnu = np.log(s2) - 0.5 * np.log(np.where(alive, gap_res, 1.0))
            i_u, t_u = jtab.locate(lnu)
            f_acc = np.exp(lnu + jtab.value(0, i_u, t_u))
            f_acc *= dw
            f_acc *= f_coef / s2
            if g2 != 0.0:
                f_acc *= (w / s2) ** g2
            np.minimum(f_acc, 1.0, out=f_acc)
            f_acc[~alive] = 1.0

            # binary split: try with probability P = dw int S dq, draw q from S(q),
            # keep it with probability R(q) = (dN/dq) / S(q)
            u1 = _uniform(key, step, _P_SPLIT)
            tri = np.flatnonzero(u1 < dw * rate)
            par = None
            if tri.size:
                n_tries += tri.size
                pos = np.searchsorted(idx, tri)
                amp, eta, nu, mu, v_h = (b[pos] for b in bound[:-1])
                bl = big_l[tri]
                u2 = _uniform(key[tri], step, _P_Q)
                # inverse of the integral of q^(eta-1) from q_res: ln q - ln q_res =
                # ln(1 + u (exp(eta L) - 1)) / eta  (-> u L as eta -> 0)
                el = eta * bl
                small = np.abs(el) < 1e-10
                lnq = np.where(small, u2 * bl,
                               np.log1p(u2 * np.expm1(el)) / np.where(small, 1.0, eta))
                lnq -= bl + ln2
                ln1 = lnm[tri] + lnq
                ls1, a1 = table.lnsigma_alpha(ln1)
                S1 = np.exp(2.0 * ls1)
                ln2q = lnq + ln2
                # R(q) = rate / bound, factor by factor (see _split_bound)
                r = (a1 / a_h[tri]) * (S1 * (S1 - S2[tri]) ** -1.5) / (v_h * np.exp(nu * ln2q))
                if g1 != 0.0:
                    r *= np.exp(g1 * (0.5 * np.log(S1) - np.log(s_h[tri]) + mu * ln2q))
                n_violations += int(np.count_nonzero(r > 1.0 + _BOUND_TOL))
                ok = _uniform(key[tri], step, _P_ACCEPT) < r
                if ok.any():
                    par = tri[ok]
                    child_m = m[par] * np.exp(lnq[ok])
                    child_key = _hash(key[par], step, _P_CHILD)
                    n_splits += par.size
            acc += f_acc * m
            m *= 1.0 - f_acc
            w += dw
            w[hit] = w_snap[jn[hit]]
            if par is not None:
                m[par] = np.maximum(m[par] - child_m, 0.0)
                key = np.concatenate((key, child_key))
                m = np.concatenate((m, child_m))
                w = np.concatenate((w, w[par]))
                jn = np.concatenate((jn, jn[par]))
                last = np.concatenate((last, last[par]))
                row = np.concatenate((row, row[par]))
                acc = np.concatenate((acc, np.zeros(par.size)))
                hit = np.concatenate((hit, hit[par]))

            # branches at or below the resolution end; their mass is smooth accretion
            # of the node they descend into
            dead = m <= m_res
            # branches at a snapshot emit a node there
            emit = np.flatnonzero(hit & ~dead)
            if emit.size:
                em_mass.append(m[emit])
                em_j.append(jn[emit])
                em_desc.append(last[emit])
                em_row.append(row[emit])
                dump_node.append(last[emit])
                dump_mass.append(acc[emit])
                acc[emit] = 0.0
                last[emit] = n_nodes + np.arange(emit.size, dtype=np.int64)
                n_nodes += emit.size
                jn[emit] += 1
            stop = dead | (jn >= n_snap)
            if stop.any():
                gone = np.flatnonzero(stop)
                dump_node.append(last[gone])
                dump_mass.append(acc[gone] + np.where(dead[gone], m[gone], 0.0))
                keep = ~stop
                key, m, w, jn, last, row, acc = (a[keep] for a in (key, m, w, jn, last,
                                                                   row, acc))
            step += 1
        if bar is not None:
            bar.update(n_snap - 1 - done)
            bar.close()

        smooth = np.bincount(np.concatenate(dump_node or [np.zeros(0, np.int64)]),
                             weights=np.concatenate(dump_mass or [np.zeros(0)]),
                             minlength=n_nodes)
        cols = (np.concatenate(em_mass), np.concatenate(em_j), np.concatenate(em_desc),
                np.concatenate(em_row), smooth)
        counters = {"n_steps": step, "n_split_tries": int(n_tries), "n_splits": int(n_splits),
                    "n_bound_violations": int(n_violations)}
        return cols, counters


def _expm1_ratio(eta: np.ndarray, big_l: np.ndarray) -> np.ndarray:
    """(exp(eta L) - 1) / eta, with the limit L at eta -> 0."""
    el = eta * big_l
    small = np.abs(el) < 1e-10
    return np.where(small, big_l, np.expm1(el) / np.where(small, 1.0, eta))


def _cosmology_name(power) -> str:
    cosmo = getattr(power, "cosmo", None) or getattr(power, "cosmology", None)
    name = getattr(cosmo, "name", None)
    return str(name) if name is not None else "unknown"
