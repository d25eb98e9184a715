"""The columnar forest: bhgrow's in-memory merger-tree data model (DESIGN §5, §11).

A :class:`Forest` holds one or many merger trees ("forests": sets of halos linked by
descendant pointers) as aligned node arrays, sorted by ``(snap, forest_id, node_id)`` so
that every snapshot is one contiguous slice. Derived indices are built once:

* ``desc_index`` — row of each node's descendant (-1 for roots);
* progenitors in CSR form: the progenitors of row ``i`` are
  ``prog_index[prog_offsets[i]:prog_offsets[i + 1]]``, most massive first;
* ``main_prog`` — row of the main progenitor (-1 for leaves).

Main progenitor rule: the most massive progenitor; among progenitors of exactly equal
mass, the one with the lowest ``node_id`` (a documented, deterministic tie rule).

Masses are physical Msun; ``box_mpc`` is a comoving side length in Mpc (not Mpc/h);
``weight_mpc3`` is the comoving number density one forest represents, in Mpc^-3.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np

from ..errors import BhgrowInputError
from .validate import (OPTIONAL_COLUMNS, REQUIRED_COLUMNS, _coerce_float, _coerce_int,
                       id_table, rows_of_ids, validate)


def _row_order(snap, forest_id, node_id) -> tuple:
    """Row order by (snapshot, forest, node id): ``lexsort((node_id, forest_id, snap))``.

    Files are usually written in an order that is already by (forest, node id) within
    each snapshot (bhgrow's own, grouped by forest); then a stable sort on the snapshot
    alone gives the same order several times faster. Checked, else the full sort.

    Returns
    -------
    order : ndarray
    in_order : tuple of ndarray or None
        ``(snap, forest_id, node_id)`` already taken in that order (the check needed them),
        or None after the full sort.
    """
    small = snap.size and -2**15 <= snap.min() and snap.max() < 2**15
    o = np.argsort(snap.astype(np.int16) if small else snap, kind="stable")
    s, f, i = snap[o], forest_id[o], node_id[o]
    next_f = (f[1:] > f[:-1]) | ((f[1:] == f[:-1]) & (i[1:] > i[:-1]))
    ok = np.all((s[1:] > s[:-1]) | ((s[1:] == s[:-1]) & next_f))
    if ok:
        return o, (s, f, i)
    return np.lexsort((node_id, forest_id, snap)), None


@dataclass(frozen=True)
class SnapshotTable:
    """Map from snapshot number to redshift, sorted by snapshot number (z decreasing)."""

    snap: np.ndarray
    z: np.ndarray

    def z_of(self, snap) -> np.ndarray:
        """Redshift of the given snapshot numbers (must be in the table)."""
        return self.z[np.searchsorted(self.snap, snap)]

    def __len__(self) -> int:
        return int(self.snap.size)


@dataclass(eq=False)
class Forest:
    """A set of merger trees as aligned, snapshot-sorted node arrays.

    Build one with :meth:`from_columns` (validates) rather than the constructor.

    Attributes
    ----------
    node_id, desc_id, forest_id : ndarray of int64
    snap : ndarray of int64
    mass_msun : ndarray of float64
        Halo virial mass, physical Msun.
    extra : dict of str -> ndarray
        Optional per-node columns (``vmax_kms``, ``gas_msun``, ...), aligned with nodes.
        ``weight_mpc3`` is *not* kept here but per forest in :attr:`forest_weight`.
    snapshots : SnapshotTable
    forest_ids : ndarray of int64
        Sorted unique forest ids.
    forest_weight : ndarray of float64 or None
        Comoving number density [Mpc^-3] each forest represents, aligned with
        :attr:`forest_ids`; None for simulation boxes (use :attr:`box_mpc`).
    box_mpc : float or None
        Comoving box side [Mpc] for simulation trees.
    meta : dict
        Free-form provenance (``h`` of the source, cosmology parameters, source file).
    """

    node_id: np.ndarray
    desc_id: np.ndarray
    forest_id: np.ndarray
    snap: np.ndarray
    mass_msun: np.ndarray
    snapshots: SnapshotTable
    extra: dict = field(default_factory=dict)
    forest_ids: np.ndarray = None
    forest_weight: np.ndarray | None = None
    box_mpc: float | None = None
    meta: dict = field(default_factory=dict)
    # derived (filled by _index)
    desc_index: np.ndarray = None
    prog_offsets: np.ndarray = None
    prog_index: np.ndarray = None
    main_prog: np.ndarray = None
    snap_offsets: np.ndarray = None
    forest_index: np.ndarray = None

    # ------------------------------------------------------------------ construction
    @classmethod
    def from_columns(cls, columns: dict, snap_nums, snap_z, *, box_mpc=None,
                     forest_weight: dict | None = None, meta: dict | None = None,
                     source: str = "<memory>", check: bool = True,
                     consume: bool = False) -> "Forest":
        """Validate node columns and build a forest.

        Parameters
        ----------
        columns : dict of str -> array_like
            Node columns under bhgrow names: ``node_id, desc_id, forest_id, snap,
            mass_msun`` and any of the optional ones (see :mod:`bhgrow.trees.validate`).
            A ``weight_mpc3`` node column is folded into per-forest weights.
        snap_nums, snap_z : array_like
            The snapshot table.
        box_mpc : float, optional
            Comoving box side in Mpc.
        forest_weight : dict, optional
            ``{"forest_id": ids, "weight_mpc3": weights}`` per forest (alternative to a
            node column).
        meta : dict, optional
            Provenance.
        source : str
            File name for error messages.
        check : bool
            Apply the validation rules (default). Only a reader whose file has already
            passed them as a whole (:meth:`bhgrow.trees.io.HDF5Forests.check`) skips this.
        consume : bool
            ``columns`` is a dict the caller gives up (a reader's freshly read columns):
            each column is removed from it once taken in row order, so the columns as read
            and as sorted are not all held at once (a chunk's peak memory while it is read:
            ~60 fewer bytes per node).

        Raises
        ------
        BhgrowInputError
            Listing every broken rule with the offending node ids.
        """
        unknown = sorted(set(columns) - set(REQUIRED_COLUMNS) - set(OPTIONAL_COLUMNS))
        if unknown:
            raise BhgrowInputError(
                f"{source}: unknown node columns {', '.join(map(repr, unknown))}; bhgrow "
                f"columns are {', '.join(list(REQUIRED_COLUMNS) + list(OPTIONAL_COLUMNS))}",
                source=source, rule="unknown_columns", rows=unknown)
        if check:
            validate(columns, snap_nums, snap_z, source=source)
        # no copies here: every column is taken in row order below (new arrays)
        def column(name, dtype):
            return np.asarray(columns[name]).astype(dtype, copy=False)

        node_id = column("node_id", np.int64)
        forest_id = column("forest_id", np.int64)
        snap = column("snap", np.int64)
        s_order = np.argsort(np.asarray(snap_nums).astype(np.int64), kind="stable")
        snaps = SnapshotTable(np.asarray(snap_nums).astype(np.int64)[s_order],
                              np.asarray(snap_z).astype(np.float64)[s_order])
        order, in_order = _row_order(snap, forest_id, node_id)
        fids = np.unique(forest_id[_run_starts(forest_id)])   # rows come in runs of a forest
        weights = None
        if "weight_mpc3" in columns:
            w = np.asarray(columns["weight_mpc3"], dtype=np.float64)
            first = np.unique(forest_id, return_index=True)[1]
            weights = w[first]
        s_o, f_o, i_o = in_order if in_order is not None else (
            snap[order], forest_id[order], node_id[order])
        del node_id, forest_id, snap, in_order

        if consume:
            for name in ("node_id", "forest_id", "snap"):
                del columns[name]
        # the other columns in row order, each given up by `columns` once taken if `consume`
        taken = {}
        for name in ["desc_id", "mass_msun"] + [k for k in columns if k in OPTIONAL_COLUMNS
                                                  and k != "weight_mpc3"]:
            taken[name] = column(name, np.int64 if name == "desc_id" else np.float64)[order]
            if consume:
                del columns[name]
        del order
        desc_o, mass_o = taken.pop("desc_id"), taken.pop("mass_msun")
        extra = taken
        if forest_weight is not None:
            weights = _align_forest_weights(fids, forest_weight, source)
        if box_mpc is not None:
            try:
                box = float(box_mpc)
            except (TypeError, ValueError):
                box = float("nan")  # not a number: reported just below as a bad box size
            if not np.isfinite(box) or box <= 0:
                raise BhgrowInputError(f"{source}: box size must be finite and > 0 Mpc; got "
                                       f"{box_mpc}", source=source, rule="bad_box")
            box_mpc = box
        f = cls(node_id=i_o, desc_id=desc_o, forest_id=f_o,
                snap=s_o, mass_msun=mass_o, snapshots=snaps,
                extra=extra, forest_ids=fids,
                forest_weight=weights, box_mpc=box_mpc, meta=dict(meta or {}))
        f._index()
        return f

    def _index(self) -> None:
        """Build descendant rows, CSR progenitor lists, main progenitors, snapshot slices."""
        n = self.node_id.size
        self.desc_index = _descendant_rows(self.node_id, self.desc_id)

        rows = np.flatnonzero(self.desc_index >= 0)
        counts = np.bincount(self.desc_index[rows], minlength=n)
        self.prog_offsets = np.zeros(n + 1, dtype=np.int64)
        np.cumsum(counts, out=self.prog_offsets[1:])
        # progenitors grouped by descendant, most massive first, ties -> lowest node_id
        self.prog_index = rows[self._progenitor_order(rows, counts)]
        self.main_prog = np.full(n, -1, dtype=np.int64)
        with_prog = counts > 0
        self.main_prog[with_prog] = self.prog_index[self.prog_offsets[:-1][with_prog]]

        snap_pos = _search_runs(self.snapshots.snap, self.snap)
        self.snap_offsets = np.searchsorted(snap_pos, np.arange(len(self.snapshots) + 1))
        self.forest_index = _search_runs(self.forest_ids, self.forest_id)

    def _progenitor_order(self, rows: np.ndarray, counts: np.ndarray) -> np.ndarray:
        """Order of ``rows`` (nodes with a descendant) by descendant, then mass (largest
        first), then node id: ``lexsort((node_id, -mass, desc_index))``.

        ``counts`` is the number of progenitors of every row. Rows are first put in order
        of descendant (a stable sort, so each group is in row order); the two minor keys
        then matter only in groups of several progenitors (a few per cent): a pair is
        compared directly (most groups of several are pairs), larger groups are sorted.
        """
        d = self.desc_index[rows]
        o = np.argsort(d, kind="stable")
        # the group of descendant j fills o[prog_offsets[j]:prog_offsets[j + 1]]
        start = self.prog_offsets[:-1]
        first = start[counts == 2]
        if first.size:
            i, j = o[first], o[first + 1]          # i comes first in row order
            ri, rj = rows[i], rows[j]
            # j goes first if lexsort would put it first: its key -mass is smaller (sort
            # order: NaN last, NaNs equal), or equal and its node id smaller
            mi, mj = -self.mass_msun[ri], -self.mass_msun[rj]
            nan_i, nan_j = np.isnan(mi), np.isnan(mj)
            less = (mj < mi) | (nan_i & ~nan_j)
            equal = (mj == mi) | (nan_i & nan_j)
            swap = less | (equal & (self.node_id[rj] < self.node_id[ri]))
            o[first[swap]], o[first[swap] + 1] = j[swap], i[swap]
        big = counts > 2
        if big.any():
            multi = np.repeat(big, counts)           # positions of o in groups of 3 or more
            sub = o[multi]
            r = rows[sub]
            o[multi] = sub[np.lexsort((self.node_id[r], -self.mass_msun[r], d[sub]))]
        return o

    # ------------------------------------------------------------------ basic facts
    @property
    def n_nodes(self) -> int:
        return int(self.node_id.size)

    @property
    def n_forests(self) -> int:
        return int(self.forest_ids.size)

    @property
    def z(self) -> np.ndarray:
        """Redshift of every node."""
        return self.snapshots.z_of(self.snap)

    def snapshot_slice(self, k: int) -> slice:
        """Rows of the ``k``-th snapshot of the table (0 = earliest)."""
        return slice(int(self.snap_offsets[k]), int(self.snap_offsets[k + 1]))

    def progenitors(self, row: int) -> np.ndarray:
        """Rows of the progenitors of node ``row``, most massive first."""
        return self.prog_index[self.prog_offsets[row]:self.prog_offsets[row + 1]]

    @property
    def roots(self) -> np.ndarray:
        """Rows of nodes without descendant."""
        return np.flatnonzero(self.desc_index < 0)

    def nodes_per_forest(self) -> np.ndarray:
        """Node count of each forest, aligned with :attr:`forest_ids`."""
        return np.bincount(self.forest_index, minlength=self.n_forests)

    # ------------------------------------------------------------------ subsets
    def select_forests(self, ids) -> "Forest":
        """A new forest holding only the given forest ids (whole forests; keeps order)."""
        ids = np.unique(np.asarray(ids, dtype=np.int64))
        keep_f = np.isin(self.forest_ids, ids)
        missing = ids[~np.isin(ids, self.forest_ids)]
        if missing.size:
            raise BhgrowInputError(f"forest ids not present: {missing[:10].tolist()}",
                                   rule="unknown_forests", rows=missing[:10].tolist())
        rows, run_start, run_first = self._rows_of(np.flatnonzero(keep_f))
        sub = Forest(node_id=self.node_id[rows], desc_id=self.desc_id[rows],
                     forest_id=self.forest_id[rows], snap=self.snap[rows],
                     mass_msun=self.mass_msun[rows], snapshots=self.snapshots,
                     extra={k: v[rows] for k, v in self.extra.items()},
                     forest_ids=self.forest_ids[keep_f],
                     forest_weight=None if self.forest_weight is None
                     else self.forest_weight[keep_f],
                     box_mpc=self.box_mpc, meta=dict(self.meta))
        # whole forests keep their (snap, forest, node) order and every link stays inside
        # them, so the index is the parent's, renumbered (no sorting; equals sub._index()).
        # Only arrays of the selection's size, no pass over the parent's rows
        def renumber(r):
            # a kept row's new number: its run's place in the selection plus its offset in
            # the run (a search among the runs, far fewer than the rows)
            j = np.searchsorted(run_start, r, side="right") - 1
            return run_first[j] + (r - run_start[j])

        d = self.desc_index[rows]
        sub.desc_index = np.where(d >= 0, renumber(d), -1).astype(np.int64)
        # progenitor lists: the parent's segments of the kept rows, in row order
        starts, stops = self.prog_offsets[rows], self.prog_offsets[rows + 1]
        counts = stops - starts
        sub.prog_offsets = np.zeros(rows.size + 1, dtype=np.int64)
        np.cumsum(counts, out=sub.prog_offsets[1:])
        take = np.arange(int(sub.prog_offsets[-1]), dtype=np.int64) + np.repeat(
            starts - sub.prog_offsets[:-1], counts)
        sub.prog_index = renumber(self.prog_index[take])
        mp = self.main_prog[rows]
        sub.main_prog = np.where(mp >= 0, renumber(mp), -1).astype(np.int64)
        sub.snap_offsets = np.searchsorted(rows, self.snap_offsets).astype(
            self.snap_offsets.dtype)
        sub.forest_index = (np.cumsum(keep_f) - 1)[self.forest_index[rows]]
        return sub

    def _rows_of(self, fpos: np.ndarray) -> tuple:
        """Rows of the forests at positions ``fpos`` (sorted) of :attr:`forest_ids`, in row
        order, and the first row and place in that list of each run of consecutive rows.

        Rows are sorted by snapshot, then forest, so within each snapshot a forest's rows
        are one run, found by a search: the work is per snapshot and kept forest plus per
        kept row, never per row of the whole table.
        """
        fi = self.forest_index
        starts, stops = [], []
        for k in range(len(self.snap_offsets) - 1):
            a, b = int(self.snap_offsets[k]), int(self.snap_offsets[k + 1])
            seg = fi[a:b]
            starts.append(a + np.searchsorted(seg, fpos, side="left"))
            stops.append(a + np.searchsorted(seg, fpos, side="right"))
        starts, stops = np.concatenate(starts), np.concatenate(stops)
        keep = stops > starts
        starts, counts = starts[keep], (stops - starts)[keep]
        first = np.cumsum(counts) - counts          # position of each run in the result
        rows = np.arange(int(counts.sum()), dtype=np.int64) + np.repeat(starts - first, counts)
        return rows, starts, first

    def chunks(self, max_nodes: int) -> Iterator["Forest"]:
        """Yield sub-forests of whole forests with at most ``max_nodes`` nodes each.

        Forests are packed in id order; a single forest larger than ``max_nodes`` forms a
        chunk of its own.
        """
        if max_nodes < 1:
            raise BhgrowInputError(f"`max_nodes` of Forest.chunks must be >= 1; got {max_nodes}")
        sizes = self.nodes_per_forest()
        start = 0
        while start < sizes.size:
            total = np.cumsum(sizes[start:])
            stop = start + max(1, int(np.searchsorted(total, max_nodes, side="right")))
            yield self.select_forests(self.forest_ids[start:stop])
            start = stop

    def iter_forests(self) -> Iterator["Forest"]:
        """Yield one sub-forest per forest id (convenient; slow for many forests)."""
        for fid in self.forest_ids:
            yield self.select_forests([fid])

    # ------------------------------------------------------------------ trees
    def main_branch_root(self) -> np.ndarray:
        """For each node, the row of the root whose main branch it lies on, else -1.

        A node lies on a root's main branch if every step down to the root goes through
        main progenitors. One vectorized pass per snapshot, newest first.
        """
        out = np.full(self.n_nodes, -1, dtype=np.int64)
        roots = self.desc_index < 0
        out[roots] = np.flatnonzero(roots)
        for k in range(len(self.snapshots) - 1, -1, -1):
            sl = self.snapshot_slice(k)
            rows = np.arange(sl.start, sl.stop)
            d = self.desc_index[rows]
            linked = d >= 0
            rows, d = rows[linked], d[linked]
            is_main = self.main_prog[d] == rows
            out[rows[is_main]] = out[d[is_main]]
        return out

    def to_columns(self) -> dict:
        """Node columns under bhgrow names (weights expanded to a node column if present)."""
        cols = {"node_id": self.node_id, "desc_id": self.desc_id,
                "forest_id": self.forest_id, "snap": self.snap, "mass_msun": self.mass_msun}
        cols.update(self.extra)
        if self.forest_weight is not None:
            cols["weight_mpc3"] = self.forest_weight[self.forest_index]
        return cols

    def volume_weight(self) -> np.ndarray:
        """Comoving number density [Mpc^-3] each forest stands for, aligned with forest_ids.

        Weighted (EPS) forests carry their own weights; simulation trees give every forest
        ``1 / box_mpc**3``. Raises if the forest has neither.
        """
        return volume_weights(self.forest_weight, self.box_mpc, self.n_forests)


def _run_starts(values: np.ndarray) -> np.ndarray:
    """Mask of the rows that start a run of equal values (the first row always)."""
    start = np.ones(values.size, dtype=bool)
    np.not_equal(values[1:], values[:-1], out=start[1:])
    return start


def _search_runs(table: np.ndarray, values: np.ndarray) -> np.ndarray:
    """``np.searchsorted(table, values)``, searching once per run of equal values.

    Rows sorted by snapshot, then forest, hold long runs of one snapshot and of one forest:
    one search per run, spread over its rows, is several times faster than one per row.
    """
    start = np.flatnonzero(_run_starts(values))
    pos = np.searchsorted(table, values[start])
    return np.repeat(pos, np.diff(start, append=values.size))


def _descendant_rows(node_id: np.ndarray, desc_id: np.ndarray) -> np.ndarray:
    """Row of each node's descendant (-1 where ``desc_id`` < 0), as int64.

    Dense unique ids (the usual case) are looked up in a table (:func:`id_table`); sparse
    or repeated ids, or a descendant id that names no node, take a sort of the ids and a
    binary search (the result on such input is whatever that search gives, as always).
    """
    has = desc_id >= 0
    table = id_table(node_id)
    if table is not None:
        rows = rows_of_ids(table, desc_id)
        if not np.any(has & (rows < 0)):
            return np.where(has, rows, np.int64(-1))
    n = node_id.size
    id_order = np.argsort(node_id, kind="stable")
    # binary search on the sorted ids themselves (searchsorted's ``sorter`` reads them
    # out of order, ~2x slower)
    pos = np.searchsorted(node_id[id_order], desc_id)
    pos = np.minimum(pos, n - 1)
    return np.where(has, id_order[pos], -1).astype(np.int64)


def volume_weights(forest_weight, box_mpc, n_forests: int) -> np.ndarray:
    """Per-forest comoving number density [Mpc^-3]: the forests' own weights, else
    ``1 / box_mpc**3`` each; a clear error if there is neither (in-memory and lazily read
    forests share this rule)."""
    if forest_weight is not None:
        return forest_weight
    if box_mpc is not None:
        return np.full(n_forests, 1.0 / box_mpc**3)
    raise BhgrowInputError("the forest has neither per-forest weights nor a box size, so "
                           "no rate per comoving volume can be formed; give a box size "
                           "(--box-mpc) or weight_mpc3", rule="no_volume")


def _align_forest_weights(fids: np.ndarray, forest_weight: dict, source: str) -> np.ndarray:
    problems: list = []
    ids = _coerce_int("forests/forest_id", forest_weight["forest_id"], problems)
    w = _coerce_float("forests/weight_mpc3", forest_weight["weight_mpc3"], problems)
    if problems:
        shown = ", ".join(str(i) for i in problems[0].ids)
        raise BhgrowInputError(f"{source}: [bad_weights] {problems[0].message}"
                               + (f": {shown}" if shown else ""), source=source,
                               rule="bad_weights", rows=problems[0].ids)
    if ids.shape != w.shape or ids.ndim != 1:
        raise BhgrowInputError(f"{source}: forest weight table columns must be 1-D and of "
                               f"equal length", source=source, rule="bad_weights")
    uniq, counts = np.unique(ids, return_counts=True)
    if (counts > 1).any():
        raise BhgrowInputError(f"{source}: [bad_weights] forest ids repeated in the weight "
                               f"table: {uniq[counts > 1][:10].tolist()}", source=source,
                               rule="bad_weights", rows=uniq[counts > 1][:10].tolist())
    bad = ~np.isfinite(w) | (w < 0)
    if bad.any():
        raise BhgrowInputError(f"{source}: [bad_weights] forest weights must be finite and "
                               f">= 0; bad for forests {ids[bad][:10].tolist()}",
                               source=source, rule="bad_weights", rows=ids[bad][:10].tolist())
    order = np.argsort(ids)
    pos = np.searchsorted(ids[order], fids)
    pos = np.minimum(pos, max(ids.size - 1, 0))
    ok = ids.size > 0 and np.all(ids[order][pos] == fids)
    if not ok:
        lacking = fids if ids.size == 0 else fids[ids[order][pos] != fids]
        raise BhgrowInputError(f"{source}: [bad_weights] forests without a weight: "
                               f"{lacking[:10].tolist()}", source=source, rule="bad_weights",
                               rows=lacking[:10].tolist())
    return w[order][pos]
