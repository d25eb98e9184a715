"""Reading and writing merger trees.

bhgrow's own HDF5 layout (schema version 1)
-------------------------------------------
::

    /                       attrs: format = "bhgrow-forest", schema_version = 1,
                                   box_mpc (comoving Mpc; absent for weighted forests),
                                   meta_json (provenance: cosmology, generator, source h)
    /nodes/<column>         one 1-D dataset per node column (bhgrow names, DESIGN §5),
                            gzip-compressed with byte shuffle
    /snapshots/snap         snapshot numbers (int64)
    /snapshots/z            their redshifts (float64)
    /forests/forest_id      (optional) per-forest table ...
    /forests/weight_mpc3    ... comoving number density each forest represents [Mpc^-3]
    /forest_rows/forest_id  (optional) sorted forest ids, and the row range of each:
    /forest_rows/offset     rows offset[i]:offset[i+1] of /nodes hold forest i (written by
                            write_hdf5, whose node rows are grouped by forest; files
                            without it are indexed by reading forest_id)

:func:`read_hdf5` reads a whole file; :func:`open_forests` reads an index and then chunks of
whole forests on demand (:class:`HDF5Forests`), for files larger than memory.

Tables (CSV, or Parquet when pyarrow is installed)
--------------------------------------------------
Any descendant-pointer catalogue with one row per halo can be read with a column map
``{"node_id": "ID", "desc_id": "DescID", ...}`` from bhgrow names to the file's names. The
snapshot table comes from a ``z`` column (one redshift per row, constant within a snapshot)
or from a separate two-column table (``snap``, ``z``). With ``h`` given, masses in Msun/h,
lengths in (k)pc/h and weights in (Mpc/h)^-3 are converted to bhgrow's h-free units.

All writers are atomic: they write ``<name>.tmp-<pid>`` and rename it into place.
"""

from __future__ import annotations

import json
import os
from functools import partial
from pathlib import Path
from typing import NamedTuple

import numpy as np

from ..errors import BhgrowInputError
from ..output import file_sha256
from .forest import Forest, SnapshotTable, _align_forest_weights, volume_weights
from .validate import (OPTIONAL_COLUMNS, REQUIRED_COLUMNS, ChunkedCheck, _coerce_int,
                       layout_problems, merge_problems, raise_problems)

FORMAT_NAME = "bhgrow-forest"
SCHEMA_VERSION = 1
_KNOWN = list(REQUIRED_COLUMNS) + list(OPTIONAL_COLUMNS)
# how each column scales with h when the source uses h-units (value_phys = value * h**p)
_H_POWER = {"mass_msun": -1, "gas_msun": -1, "rvir_kpc": -1, "weight_mpc3": 3}


#: lossless gzip with byte shuffling: node ids and snapshots compress several-fold
_COMPRESS = {"compression": "gzip", "compression_opts": 4, "shuffle": True}


def _tmp_path(path: Path) -> Path:
    return path.with_name(f"{path.name}.tmp-{os.getpid()}")


def atomic_replace(tmp: Path, path: Path) -> None:
    """Move a finished temporary file into place (same filesystem, atomic on POSIX)."""
    os.replace(tmp, path)


# ====================================================================== HDF5
def write_hdf5(forest: Forest, path, *, overwrite: bool = False) -> Path:
    """Write a forest in bhgrow's HDF5 layout (atomically).

    Node rows are stored grouped by forest (forest id, then snapshot, then node id), with
    the row range of every forest in ``/forest_rows``, so :func:`open_forests` can read any
    set of forests without reading the rest of the file.

    Parameters
    ----------
    forest : Forest
    path : str or Path
    overwrite : bool
        Replace an existing file. Without it an existing file is an error.
    """
    import h5py

    path = Path(path)
    if path.exists() and not overwrite:
        raise BhgrowInputError(f"{path}: file exists; refusing to overwrite it",
                               source=str(path), rule="exists")
    tmp = _tmp_path(path)
    order = np.lexsort((forest.node_id, forest.snap, forest.forest_id))
    counts = forest.nodes_per_forest()
    offset = np.zeros(forest.n_forests + 1, dtype=np.int64)
    np.cumsum(counts, out=offset[1:])
    try:
        with h5py.File(tmp, "w") as h5:
            h5.attrs["format"] = FORMAT_NAME
            h5.attrs["schema_version"] = SCHEMA_VERSION
            if forest.box_mpc is not None:
                h5.attrs["box_mpc"] = float(forest.box_mpc)
            h5.attrs["meta_json"] = json.dumps(forest.meta, sort_keys=True, default=str)
            g = h5.create_group("nodes")
            for name in ("node_id", "desc_id", "forest_id", "snap", "mass_msun"):
                g.create_dataset(name, data=getattr(forest, name)[order], **_COMPRESS)
            for name, arr in forest.extra.items():
                g.create_dataset(name, data=arr[order], **_COMPRESS)
            s = h5.create_group("snapshots")
            s.create_dataset("snap", data=forest.snapshots.snap)
            s.create_dataset("z", data=forest.snapshots.z)
            if forest.forest_weight is not None:
                f = h5.create_group("forests")
                f.create_dataset("forest_id", data=forest.forest_ids)
                f.create_dataset("weight_mpc3", data=forest.forest_weight)
            r = h5.create_group(INDEX_GROUP)
            r.create_dataset("forest_id", data=forest.forest_ids, **_COMPRESS)
            r.create_dataset("offset", data=offset, **_COMPRESS)
        atomic_replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return path


def _dataset(h5, name: str, source: str):
    """The 1-D numeric dataset ``name`` (checked from its header; nothing is read)."""
    ds = h5[name]
    if not hasattr(ds, "shape"):
        raise BhgrowInputError(f"{source}: `{name}` is a group, expected a 1-D dataset",
                               source=source, rule="wrong_layout")
    if ds.ndim != 1:
        raise BhgrowInputError(f"{source}: dataset `{name}` must be 1-D; has shape {ds.shape}",
                               source=source, rule="wrong_layout")
    if ds.dtype.kind not in "iufb":
        raise BhgrowInputError(f"{source}: [wrong_dtype] dataset `{name}` must be numeric; "
                               f"has dtype {ds.dtype}", source=source, rule="wrong_dtype")
    return ds


def _read_dataset(h5, name: str, source: str):
    return _dataset(h5, name, source)[()]


def _open_h5(path):
    """Open a bhgrow forest file and check its header; ``(h5py.File, source)``."""
    import h5py

    path = Path(path)
    source = str(path)
    _require_file(path)
    try:
        h5 = h5py.File(path, "r")
    except OSError as exc:
        raise BhgrowInputError(f"{source}: not a readable HDF5 file ({exc})", source=source,
                               rule="not_hdf5") from None
    try:
        _check_header(h5, source)
    except BaseException:
        h5.close()
        raise
    return h5, source


def _check_header(h5, source: str) -> None:
    import h5py

    fmt = h5.attrs.get("format")
    if isinstance(fmt, bytes):
        fmt = fmt.decode()
    if not (isinstance(fmt, str) and fmt == FORMAT_NAME):
        raise BhgrowInputError(
            f"{source}: not a bhgrow forest file (attribute format={fmt!r}, expected "
            f"{FORMAT_NAME!r}); tables from other codes load with a column map "
            f"(see `bhgrow trees check --help`)", source=source, rule="wrong_format")
    try:
        version = int(h5.attrs.get("schema_version", -1))
    except (TypeError, ValueError):
        version = -1
    if version != SCHEMA_VERSION:
        raise BhgrowInputError(f"{source}: schema version {version} is not supported "
                               f"(this bhgrow reads version {SCHEMA_VERSION})",
                               source=source, rule="schema_version")
    for grp in ("nodes", "snapshots"):
        if grp not in h5:
            raise BhgrowInputError(f"{source}: group `/{grp}` is missing", source=source,
                                   rule="missing_columns")
    for grp in ("nodes", "snapshots", "forests"):
        if grp in h5 and not isinstance(h5[grp], h5py.Group):
            raise BhgrowInputError(f"{source}: `/{grp}` must be a group of 1-D datasets",
                                   source=source, rule="wrong_layout")
    unknown = sorted(set(h5["nodes"]) - set(_KNOWN))
    if unknown:
        raise BhgrowInputError(f"{source}: unknown node columns {unknown}; bhgrow "
                               f"columns are {_KNOWN}", source=source,
                               rule="unknown_columns", rows=unknown)


def _read_tables(h5, source: str):
    """Snapshot table, forest weight table, box and provenance of an open forest file."""
    for name in ("snap", "z"):
        if name not in h5["snapshots"]:
            raise BhgrowInputError(f"{source}: dataset `/snapshots/{name}` is missing",
                                   source=source, rule="bad_snapshot_table")
    snap = _read_dataset(h5, "snapshots/snap", source)
    z = _read_dataset(h5, "snapshots/z", source)
    weights = None
    if "forests" in h5:
        weights = {k: _read_dataset(h5, f"forests/{k}", source)
                   for k in ("forest_id", "weight_mpc3") if k in h5["forests"]}
        if len(weights) != 2:
            raise BhgrowInputError(f"{source}: `/forests` needs both `forest_id` and "
                                   f"`weight_mpc3`", source=source, rule="bad_weights")
    box = h5.attrs.get("box_mpc")
    try:
        meta = json.loads(h5.attrs.get("meta_json", "{}"))
    except (TypeError, ValueError):
        meta = {}
    if not isinstance(meta, dict):
        meta = {}
    meta.setdefault("source_file", source)
    return snap, z, weights, box, meta


def read_hdf5(path) -> Forest:
    """Read and validate a forest written in bhgrow's HDF5 layout (the whole file at once).

    For files larger than memory use :func:`open_forests`, which reads chunks of forests.
    """
    h5, source = _open_h5(path)
    with h5:
        cols = {name: _read_dataset(h5, f"nodes/{name}", source) for name in h5["nodes"]}
        snap, z, weights, box, meta = _read_tables(h5, source)
    return Forest.from_columns(cols, snap, z, box_mpc=box, forest_weight=weights, meta=meta,
                               source=source)


# ---------------------------------------------------------------- lazy, chunk by chunk
#: rows per read when a column is streamed (bounds the reader's buffers: 8 MB per column)
READ_BLOCK_ROWS = 1 << 20
#: row ranges of wanted forests closer than this are read as one span (and the gap dropped)
GAP_ROWS = 1 << 16
#: group holding the row range of every forest (``forest_id``, ``offset``)
INDEX_GROUP = "forest_rows"


def _read_span(ds, start: int, stop: int, out=None) -> np.ndarray:
    """Rows ``start:stop`` of a 1-D dataset: every read of :class:`HDF5Forests` is one.
    With ``out`` (an array of ``stop - start`` items of the dataset's type, e.g. a slice of
    a chunk's column) they are read into it, without a temporary copy."""
    if out is None:
        return ds[start:stop]
    ds.read_direct(out, source_sel=np.s_[start:stop])
    return out


def _blocks(n: int):
    step = max(1, int(READ_BLOCK_ROWS))
    for a in range(0, n, step):
        yield a, min(n, a + step)


class HDF5Forests:
    """A bhgrow HDF5 forest file read chunk by chunk (open it with :func:`open_forests`).

    On opening, only a small index is read: the forest ids, the node count and row range of
    every forest, the snapshot table, the forest weights, the box and the provenance. Node
    columns are read only by :meth:`select_forests`, for the forests asked for, in spans
    of at most :data:`READ_BLOCK_ROWS` rows, so memory depends on the chunk, not on the
    file.

    Files written by :func:`write_hdf5` store their rows grouped by forest with the row
    range of each forest in ``/forest_rows``: a chunk is read from those ranges. Other
    files (older bhgrow files, or files written by other tools) are indexed by one streaming
    pass over ``forest_id``; if their rows are grouped by forest they are then read the
    same way, else every chunk streams the file and keeps its forests' rows.

    It offers the forest-level part of the :class:`~bhgrow.trees.forest.Forest` interface
    (``forest_ids``, ``nodes_per_forest``, ``forest_weight``, ``box_mpc``,
    ``volume_weight``, ``snapshots``, ``meta``, ``n_forests``, ``n_nodes``) and
    ``select_forests(ids) -> Forest``; it holds no open file (worker processes open the file
    themselves) and can be pickled.

    Attributes
    ----------
    path : Path
    source : str
        File name used in messages.
    grouped : bool
        The file's rows are grouped by forest (read by row ranges).
    checked : bool
        :meth:`check` found the whole file valid.
    """

    def __init__(self, path, *, box_mpc: float | None = None):
        self.path = Path(path)
        h5, source = _open_h5(self.path)
        self.source = source
        with h5:
            names = list(h5["nodes"])
            for name in names:
                _dataset(h5, f"nodes/{name}", source)
            self._snap_raw, self._z_raw, self._weight_table, self._box_raw, self.meta = \
                _read_tables(h5, source)
            problems = layout_problems({name: h5[f"nodes/{name}"].shape for name in names})
            if problems:
                raise_problems(problems, source)
            self.columns = names
            self._dtype = {name: h5[f"nodes/{name}"].dtype for name in names}
            self.n_nodes = int(h5["nodes/node_id"].shape[0])
            if INDEX_GROUP in h5:
                self._read_index(h5)
            else:
                self._scan_index(h5)
        self._box_override = box_mpc
        self._stamp = self._file_stamp()
        self._sha256 = None
        self._weights = None
        self._snapshots = None
        self.checked = False

    # ------------------------------------------------------------ index
    def _bad_index(self, why: str):
        return BhgrowInputError(
            f"{self.source}: [bad_index] the forest index `/{INDEX_GROUP}` does not match "
            f"the node table ({why}); rewrite the file with bhgrow, or delete the group "
            f"`/{INDEX_GROUP}` and the file is indexed by reading `forest_id`",
            source=self.source, rule="bad_index")

    def _read_index(self, h5) -> None:
        g = h5[INDEX_GROUP]
        if not hasattr(g, "keys") or not {"forest_id", "offset"} <= set(g):
            raise self._bad_index("it needs datasets `forest_id` and `offset`")
        try:
            fid = _read_dataset(h5, f"{INDEX_GROUP}/forest_id", self.source)
            off = _read_dataset(h5, f"{INDEX_GROUP}/offset", self.source)
        except BhgrowInputError as exc:
            raise self._bad_index(str(exc).split(": ", 1)[-1]) from None
        if fid.dtype.kind not in "iu" or off.dtype.kind not in "iu":
            raise self._bad_index("its datasets must hold integers")
        fid, off = fid.astype(np.int64), off.astype(np.int64)
        if off.size != fid.size + 1 or fid.size == 0:
            raise self._bad_index(f"{fid.size} forests need {fid.size + 1} offsets; "
                                  f"has {off.size}")
        if off[0] != 0 or off[-1] != self.n_nodes or np.any(np.diff(off) <= 0):
            raise self._bad_index(f"offsets must rise strictly from 0 to {self.n_nodes}")
        if np.any(np.diff(fid) <= 0):
            raise self._bad_index("forest ids must be increasing")
        self.forest_ids = fid
        self._start, self._stop = off[:-1], off[1:]
        self._counts = np.diff(off)
        self.grouped = True

    def _scan_index(self, h5) -> None:
        """Index a file without `/forest_rows`: one streaming pass over ``forest_id``."""
        ds = h5["nodes/forest_id"]
        uniq = np.zeros(0, np.int64)
        counts = np.zeros(0, np.int64)
        run_ids, run_starts, n_runs, last = [], [], 0, None
        grouped = True
        problems: list = []
        for a, b in _blocks(self.n_nodes):
            block_problems: list = []
            fid = _coerce_int("forest_id", _read_span(ds, a, b), block_problems,
                              np.arange(a, b))
            if fid is None:
                problems += block_problems
                continue
            if problems:
                continue
            u, c = np.unique(fid, return_counts=True)
            both = np.concatenate([uniq, u])
            uniq, inv = np.unique(both, return_inverse=True)
            counts = np.bincount(inv, weights=np.concatenate([counts, c]),
                                 minlength=uniq.size).astype(np.int64)
            if grouped:
                starts = np.flatnonzero(np.r_[True, fid[1:] != fid[:-1]])
                ids = fid[starts]
                if last is not None and ids[0] == last:
                    starts, ids = starts[1:], ids[1:]
                run_ids.append(ids)
                run_starts.append(starts + a)
                n_runs += ids.size
                last = fid[-1]
                if n_runs > uniq.size:           # some forest's rows come in two runs
                    grouped, run_ids, run_starts = False, [], []
        if problems:
            raise_problems(merge_problems([problems]), self.source)
        self.forest_ids, self._counts = uniq, counts
        self.grouped = grouped
        if grouped:
            ids, starts = np.concatenate(run_ids), np.concatenate(run_starts)
            o = np.argsort(ids)
            self._start = starts[o]
            self._stop = self._start + counts
        else:
            self._start = self._stop = None

    # ------------------------------------------------------------ forest-level facts
    @property
    def n_forests(self) -> int:
        return int(self.forest_ids.size)

    def nodes_per_forest(self) -> np.ndarray:
        """Node count of each forest, aligned with :attr:`forest_ids`."""
        return self._counts

    @property
    def snapshots(self) -> SnapshotTable:
        if self._snapshots is None:
            s = np.asarray(self._snap_raw).astype(np.int64)
            o = np.argsort(s, kind="stable")
            self._snapshots = SnapshotTable(s[o], np.asarray(self._z_raw).astype(np.float64)[o])
        return self._snapshots

    @property
    def box_mpc(self) -> float | None:
        if self._box_override is not None:
            return float(self._box_override)
        if self._box_raw is None:
            return None
        try:
            box = float(self._box_raw)
        except (TypeError, ValueError):
            box = float("nan")
        if not np.isfinite(box) or box <= 0:
            raise BhgrowInputError(f"{self.source}: box size must be finite and > 0 Mpc; got "
                                   f"{self._box_raw}", source=self.source, rule="bad_box")
        return box

    @property
    def forest_weight(self) -> np.ndarray | None:
        """Per-forest weights [Mpc^-3] aligned with :attr:`forest_ids` (or None)."""
        if self._weights is None:
            if self._weight_table is not None:
                self._weights = _align_forest_weights(self.forest_ids, self._weight_table,
                                                      self.source)
            elif "weight_mpc3" in self.columns:
                self._weights = self._first_weights()
        return self._weights

    def volume_weight(self) -> np.ndarray:
        """Comoving number density [Mpc^-3] each forest stands for (see Forest)."""
        return volume_weights(self.forest_weight, self.box_mpc, self.n_forests)

    def _first_weights(self) -> np.ndarray:
        """Per-forest weights from a ``weight_mpc3`` node column: the forest's first row."""
        w = np.full(self.n_forests, np.nan)
        seen = np.zeros(self.n_forests, dtype=bool)
        with self._h5() as h5:
            f_ds, w_ds = h5["nodes/forest_id"], h5["nodes/weight_mpc3"]
            for a, b in _blocks(self.n_nodes):
                fid = np.asarray(_read_span(f_ds, a, b)).astype(np.int64)
                u, first = np.unique(fid, return_index=True)
                pos = np.searchsorted(self.forest_ids, u)
                new = ~seen[pos]
                w[pos[new]] = np.asarray(_read_span(w_ds, a, b), dtype=np.float64)[first[new]]
                seen[pos[new]] = True
        return w

    def sha256(self) -> str:
        """SHA-256 of the file's bytes (read in 1 MB blocks), for checkpoints."""
        if self._sha256 is None:
            self._sha256 = file_sha256(self.path)
        return self._sha256

    # ------------------------------------------------------------ reading
    def _file_stamp(self):
        st = os.stat(self.path)
        return (st.st_size, st.st_mtime_ns)

    def _h5(self):
        import h5py

        try:
            stamp = self._file_stamp()
        except OSError as exc:
            raise BhgrowInputError(f"{self.source}: cannot read the tree file any more "
                                   f"({exc})", source=self.source, rule="no_file") from None
        if stamp != self._stamp:
            raise BhgrowInputError(f"{self.source}: the tree file changed while it was being "
                                   f"read; run again on a file that stays put",
                                   source=self.source, rule="file_changed")
        return h5py.File(self.path, "r")

    def _positions(self, ids) -> np.ndarray:
        ids = np.unique(np.asarray(ids, dtype=np.int64))
        pos = np.minimum(np.searchsorted(self.forest_ids, ids), max(self.n_forests - 1, 0))
        missing = ids[self.forest_ids[pos] != ids] if self.n_forests else ids
        if missing.size:
            raise BhgrowInputError(f"forest ids not present: {missing[:10].tolist()}",
                                   rule="unknown_forests", rows=missing[:10].tolist())
        return pos

    def read_columns(self, ids, *, rows: bool = False):
        """Node columns (as stored) of the forests ``ids``, in file-row order.

        Parameters
        ----------
        ids : array_like of int
            Forest ids (each must be in the file).
        rows : bool
            Also return the file row of every node.

        Returns
        -------
        dict of str -> ndarray, or (dict, ndarray of int64)
        """
        pos = self._positions(ids)
        with self._h5() as h5:
            dsets = {name: h5[f"nodes/{name}"] for name in self.columns}
            if self.grouped:
                cols, row_parts = self._read_ranges(dsets, pos, rows)
            else:
                parts, row_parts = self._read_scan(dsets, pos, rows)
                cols = {name: (np.concatenate(parts[name]) if parts[name] else
                               np.zeros(0, self._dtype[name])) for name in self.columns}
        if rows:
            return cols, (np.concatenate(row_parts) if row_parts else np.zeros(0, np.int64))
        return cols

    def _read_ranges(self, dsets, pos, want_rows):
        """Rows of whole forests from their row ranges, merged into spans of nearby rows,
        read straight into the chunk's columns where a span has no gap (no copy)."""
        starts, stops = self._start[pos], self._stop[pos]
        o = np.argsort(starts, kind="stable")
        starts, stops, fids = starts[o], stops[o], self.forest_ids[pos][o]
        block = max(1, int(READ_BLOCK_ROWS))
        new = np.r_[True, (starts[1:] - stops[:-1] > GAP_ROWS)
                    | (starts[1:] // block != starts[:-1] // block)]
        first = np.flatnonzero(new)
        ends = np.r_[first[1:], starts.size]
        # room for every range (a bad index's overlapping ranges hold fewer rows)
        out = {name: np.empty(int((stops - starts).sum()), dtype=self._dtype[name])
               for name in dsets}
        row_parts = []
        at = 0
        for i, j in zip(first, ends):
            a, b = int(starts[i]), int(np.max(stops[i:j]))
            keep = None
            if j - i > 1 or stops[i] - starts[i] != b - a:
                mark = np.zeros(b - a + 1, dtype=np.int64)
                np.add.at(mark, starts[i:j] - a, 1)
                np.add.at(mark, stops[i:j] - a, -1)
                keep = np.cumsum(mark[:-1]) > 0
            n = b - a if keep is None else int(keep.sum())
            for name, ds in dsets.items():
                if not n:
                    continue
                if keep is None:
                    _read_span(ds, a, b, out=out[name][at:at + n])
                else:
                    out[name][at:at + n] = _read_span(ds, a, b)[keep]
            got = out["forest_id"][at:at + n]
            want = np.repeat(fids[i:j], stops[i:j] - starts[i:j])
            if got.shape != want.shape or np.any(np.asarray(got) != want):
                raise self._bad_index(f"rows {a}..{b - 1} do not all belong to the forests "
                                      f"the index names")
            at += n
            if want_rows:
                r = np.arange(a, b, dtype=np.int64)
                row_parts.append(r if keep is None else r[keep])
        return {k: v[:at] for k, v in out.items()}, row_parts

    def _read_scan(self, dsets, pos, want_rows):
        """Rows of forests scattered through the file: stream it, keep their rows."""
        member = np.zeros(self.n_forests, dtype=bool)
        member[pos] = True
        parts = {name: [] for name in dsets}
        row_parts = []
        for a, b in _blocks(self.n_nodes):
            fid_raw = _read_span(dsets["forest_id"], a, b)
            keep = member[np.searchsorted(self.forest_ids, np.asarray(fid_raw).astype(np.int64))]
            if not keep.any():
                continue
            for name, ds in dsets.items():
                arr = fid_raw if name == "forest_id" else _read_span(ds, a, b)
                parts[name].append(arr[keep])
            if want_rows:
                row_parts.append(np.arange(a, b, dtype=np.int64)[keep])
        return parts, row_parts

    def select_forests(self, ids) -> Forest:
        """The :class:`Forest` of the forests ``ids`` (whole forests), read from the file.

        The same forest, bit for bit, as ``load_forest(path).select_forests(ids)``. Checked
        by the validation rules unless the whole file has passed :meth:`check`.
        """
        ids = np.unique(np.asarray(ids, dtype=np.int64))
        cols = self.read_columns(ids)
        weights = None
        if self._weight_table is not None:
            weights = {"forest_id": ids,
                       "weight_mpc3": self.forest_weight[self._positions(ids)]}
        return Forest.from_columns(cols, self._snap_raw, self._z_raw, box_mpc=self.box_mpc,
                                   forest_weight=weights, meta=dict(self.meta),
                                   source=self.source, check=not self.checked, consume=True)

    def in_file_order(self, ids) -> np.ndarray:
        """The forest ids ``ids`` in the order their rows come in the file (by id if the
        rows are not grouped by forest)."""
        ids = np.unique(np.asarray(ids, dtype=np.int64))
        if not self.grouped:
            return ids
        return ids[np.argsort(self._start[self._positions(ids)], kind="stable")]

    def chunk_ids(self, max_nodes: int = 2_000_000):
        """Yield the forest ids in file order, in runs of at most ``max_nodes`` nodes (a
        larger forest alone): the chunks a whole-file pass reads one at a time."""
        order = self._file_order()
        total = np.cumsum(self._counts[order])
        start = 0
        while start < order.size:
            done = int(total[start - 1]) if start else 0
            stop = max(start + 1, int(np.searchsorted(total, done + max_nodes, side="right")))
            yield self.forest_ids[order[start:stop]]
            start = stop

    # ------------------------------------------------------------ validation
    def _file_order(self) -> np.ndarray:
        """Forest positions in the order their rows come in the file (ids if scattered)."""
        if self.grouped:
            return np.argsort(self._start, kind="stable")
        return np.arange(self.n_forests)

    def check(self, max_nodes: int = 2_000_000, workers: int = 1, *,
              meanwhile=None, scratch_dir=None) -> "HDF5Forests":
        """Check the whole file against every validation rule, chunk by chunk.

        Forests are read in file order in chunks of at most ``max_nodes`` nodes (a larger
        forest alone) and checked as they are read; repeated node ids and descendants in
        other chunks are then found by streaming the ``node_id`` column
        (:class:`~bhgrow.trees.validate.ChunkedCheck`). Memory: one chunk. While the node
        ids seen so far span at most ``64 * max(max_nodes, READ_BLOCK_ROWS)`` values, one
        flag bit per value (at most as many bytes as a chunk's ids take) records them
        during the chunk pass: ids found unique that way need no second pass over ``node_id``
        (otherwise one for a file of at most ``max(max_nodes, READ_BLOCK_ROWS)`` nodes, two
        above, :meth:`_duplicate_node_ids`).

        With ``workers`` > 1 the chunks are read and checked by that many local processes
        (:func:`bhgrow.parallel.map_tasks`: this one and forked ones), in at least four
        chunks per worker; the results, and so the messages, are the same as with one.
        Memory: one chunk per worker.
        ``meanwhile()``, if given, runs in this process while the other workers check their
        first chunks (the caller's own set-up, :func:`bhgrow.parallel.map_tasks`).
        ``scratch_dir``: where the search for repeated ids, if needed, keeps its scratch
        file (8 bytes per node; default the system's temporary directory, ``TMPDIR``, which
        may be in memory).

        Raises
        ------
        BhgrowInputError
            Listing every broken rule as :func:`load_forest` would, with file rows.
        """
        if isinstance(max_nodes, bool) or int(max_nodes) != max_nodes or max_nodes < 1:
            raise BhgrowInputError(f"`max_nodes` of HDF5Forests.check must be an integer >= 1;"
                                   f" got {max_nodes!r}")
        chk = ChunkedCheck(self._snap_raw, self._z_raw)
        # ids held at once: a chunk, or a read block if more
        budget = max(int(max_nodes), int(READ_BLOCK_ROWS))
        seen = _SeenIds(8 * budget)

        def add(found, links, ids):
            chk.add_found(found, links)
            seen.add(ids)

        chunks = list(self.chunk_ids(max_nodes))
        parallel = workers != 1 and len(chunks) > 1
        if parallel:
            from ..parallel import map_tasks, n_local_workers

            # at least 4 chunks per worker: the last ones end close together, and a
            # process's first chunk (its memory still to fault in) is smaller
            n_tasks = 4 * n_local_workers(workers)
            if len(chunks) < n_tasks:
                chunks = list(self.chunk_ids(max(1, -(-self.n_nodes // n_tasks))))
        # each chunk's ids come back as flag bits where those are smaller (or None where
        # the flags cannot hold them): from a worker, 1/64 of the bytes of dense ids, which
        # the parent (busy with `meanwhile`) would otherwise receive while that worker
        # waited for its next chunk. The flags' capacity is in id values, 8 per byte (the
        # byte count given instead, until 2026-12-03, dropped the flags whenever a chunk's
        # ids spanned more than a budget's worth of bytes: a 2.15e7-node file of unique,
        # dense ids numbered across forests was then searched again for repeats, 3.7 s)
        task = partial(_check_chunk, self, chunks, self._snap_raw, self._z_raw,
                       8 * seen.max_bytes)
        if parallel:
            # results come back in file order, one chunk at a time
            map_tasks(task, len(chunks), workers, what=f"checking {self.source}",
                      done=lambda i, r: add(*r), meanwhile=meanwhile)
        else:
            if meanwhile is not None:
                meanwhile()
            for i in range(len(chunks)):
                add(*task(i))
        if chk.id_columns_ok():
            if seen.all_unique() and not chk.repeats_within_chunks():
                chk.set_duplicates(np.zeros(0, np.int64))
            else:   # repeated ids, or too spread out to flag: found exactly by streaming
                chk.set_duplicates(self._duplicate_node_ids(budget, scratch_dir))
            seen = None                 # freed before the look-ups
            outside = chk.outside_descendants()
            if outside.size:
                chk.resolve(*self._lookup_nodes(outside))
        problems = chk.problems()
        if problems:
            raise_problems(problems, self.source)
        self.forest_weight, self.box_mpc    # noqa: B018 - weight table and box errors now
        self.checked = True
        return self

    def _node_blocks(self, with_snap: bool = False):
        with self._h5() as h5:
            ids_ds, snap_ds = h5["nodes/node_id"], h5["nodes/snap"]
            for a, b in _blocks(self.n_nodes):
                ids = np.asarray(_read_span(ids_ds, a, b)).astype(np.int64)
                snap = (np.asarray(_read_span(snap_ds, a, b)).astype(np.int64) if with_snap
                        else None)
                yield ids, snap

    def _duplicate_node_ids(self, budget: int, scratch_dir=None) -> np.ndarray:
        """Node ids occurring more than once in the file (sorted), holding <= ~budget ids.

        Two passes over ``node_id``, whatever the file's size: the first counts the ids per
        hash bucket, the second writes each id to its bucket's part of a scratch file
        (8 bytes per node, in ``scratch_dir``, default the system's temporary directory);
        each bucket (about ``budget / 2`` ids) is then sorted alone. A repeated id always lands in one bucket. (Until
        2026-12-02 the ids were split into value ranges, each collected by its own pass
        over the column: ~n / budget passes, 8.8 s of a 20 s check at 2.15e7 nodes.)
        """
        import tempfile

        if self.n_nodes <= budget:
            return _repeated_ids(np.concatenate([ids for ids, _ in self._node_blocks()]))
        n_buckets = -(-2 * self.n_nodes // budget)
        counts = np.zeros(n_buckets, dtype=np.int64)
        for ids, _ in self._node_blocks():
            counts += np.bincount(_id_buckets(ids, n_buckets), minlength=n_buckets)
        ends = np.cumsum(counts)
        with tempfile.TemporaryDirectory(prefix=".bhgrow-ids-", dir=scratch_dir) as tmp:
            part = np.memmap(Path(tmp) / "ids", dtype=np.int64, mode="w+",
                             shape=(self.n_nodes,))
            fill = ends - counts                   # next free row of each bucket
            for ids, _ in self._node_blocks():
                b = _id_buckets(ids, n_buckets)
                order = np.argsort(b, kind="stable")
                per = np.bincount(b, minlength=n_buckets)
                # the block's ids of bucket k go to rows fill[k] .. fill[k] + per[k]
                start = np.cumsum(per) - per
                dest = np.repeat(fill - start, per) + np.arange(ids.size)
                part[dest] = ids[order]
                fill += per
            found = [_repeated_ids(np.array(part[a:b]))
                     for a, b in zip(ends - counts, ends) if b - a > 1]
            del part
        return np.unique(np.concatenate(found)) if found else np.zeros(0, np.int64)

    def _lookup_nodes(self, wanted: np.ndarray):
        """Which of the sorted ids ``wanted`` are node ids of the file, and their snaps."""
        got_ids, got_snap = [], []
        for ids, snap in self._node_blocks(with_snap=True):
            pos = np.minimum(np.searchsorted(wanted, ids), wanted.size - 1)
            hit = wanted[pos] == ids
            got_ids.append(ids[hit])
            got_snap.append(snap[hit])
        return np.concatenate(got_ids), np.concatenate(got_snap)


def _id_buckets(ids: np.ndarray, n_buckets: int) -> np.ndarray:
    """Hash bucket of each id (Fibonacci hashing, Knuth 1998, TAOCP vol. 3, sect. 6.4;
    memory): even for ids in arithmetic progression the buckets fill evenly."""
    h = ids.astype(np.int64, copy=False).view(np.uint64) * np.uint64(0x9E3779B97F4A7C15)
    # the product's top 32 bits scaled to [0, n_buckets) (n_buckets < 2**32)
    return (((h >> np.uint64(32)) * np.uint64(n_buckets)) >> np.uint64(32)).astype(np.intp)


def _repeated_ids(ids: np.ndarray) -> np.ndarray:
    """The values occurring more than once in ``ids`` (sorted, unique); sorts ``ids``."""
    ids.sort()
    rep = ids[1:][ids[1:] == ids[:-1]]
    return np.unique(rep)


class _SeenIds:
    """The node ids held by the chunks of a check so far, one flag bit per id value.

    The flags cover the range of the ids added (grown as chunks bring lower or higher
    ids) while it spans at most ``8 * max_bytes`` values; beyond that, or for ids that are
    not integers, the record is dropped and :meth:`all_unique` is False. An id added twice
    in different calls is a repeat (repeats within one call are not seen here). (Bits, not
    bytes, since 2026-12-02: dense ids of a 2.15e7-node file then fit the default budget,
    and the check no longer streams ``node_id`` for them.)

    Parameters
    ----------
    max_bytes : int
        Bytes of flags: ids spanning ``8 * max_bytes`` values are held (in at most
        ``max_bytes + 1`` bytes, the flags starting at a multiple of 8).
    """

    def __init__(self, max_bytes: int):
        self.max_bytes = int(max_bytes)
        self.lo = 0
        #: flag of id ``lo + k``: bit ``k % 8`` of byte ``k // 8`` (numpy's "little" order)
        self.flags: np.ndarray | None = None
        #: smallest and largest id recorded
        self.id_lo = self.id_hi = 0
        self.dropped = False
        self.repeated = False

    def all_unique(self) -> bool:
        """True if every id was recorded and none came in two calls."""
        return not (self.dropped or self.repeated)

    def recorded(self) -> np.ndarray:
        """The ids recorded so far (sorted)."""
        if self.flags is None:
            return np.zeros(0, np.int64)
        return np.flatnonzero(np.unpackbits(self.flags, bitorder="little")) + self.lo

    def add(self, values) -> None:
        """Record the ids of one chunk: as stored in the file, or as returned by
        :func:`_ids_for_flags` (None: ids the flags cannot hold)."""
        if self.dropped or self.repeated:
            return
        if values is None:
            self._drop()
            return
        if isinstance(values, _IdBits):
            self._add_bits(values)
            return
        arr = np.asarray(values)
        if arr.size == 0:
            return
        if arr.dtype.kind not in "iu" or (arr.dtype.kind == "u"
                                           and arr.max() > np.iinfo(np.int64).max):
            self._drop()
            return
        ids = arr.astype(np.int64, copy=False)
        lo, hi = int(ids.min()), int(ids.max())
        if not self._cover(lo, hi):
            self._drop()
            return
        # (python ints: hi - lo may not fit in int64; within the flags it does)
        first = (lo - self.lo) >> 3
        last = ((hi - self.lo) >> 3) + 1
        k = ids - np.int64(self.lo + 8 * first)      # offsets from byte `first`'s bit 0
        if last - first <= 4 * ids.size:
            # the chunk's ids fill their range well: its flags unpacked to one byte each
            bits = np.unpackbits(self.flags[first:last], bitorder="little").view(bool)
            if bits[k].any():
                self._repeat()
                return
            bits[k] = True
            self.flags[first:last] = np.packbits(bits, bitorder="little")
        else:
            byte, bit = _byte_and_bit(k)
            if (self.flags[first + byte] & bit).any():
                self._repeat()
                return
            np.bitwise_or.at(self.flags, first + byte, bit)

    def _add_bits(self, b: "_IdBits") -> None:
        if not self._cover(b.lo, b.hi):
            self._drop()
            return
        at = (b.base - self.lo) >> 3            # both multiples of 8 (see _cover)
        held = self.flags[at:at + b.bits.size]
        if (held & b.bits).any():
            self._repeat()
            return
        held |= b.bits

    def _repeat(self) -> None:
        self.repeated = True           # the exact list comes from the streaming search
        self.flags = None

    def _drop(self) -> None:
        self.dropped, self.flags = True, None

    def _cover(self, lo: int, hi: int) -> bool:
        """Grow the flags to cover ids ``lo..hi``; False if the ids recorded would then
        span more than ``8 * max_bytes`` values.

        The flags start at a multiple of 8, so the bytes of a chunk's :class:`_IdBits`
        line up with theirs, and hold at most ``max_bytes + 1`` bytes.
        """
        cap = 8 * self.max_bytes
        old = self.flags
        s_lo, s_hi = (lo, hi) if old is None else (min(lo, self.id_lo), max(hi, self.id_hi))
        if s_hi - s_lo + 1 > cap:
            return False
        if old is not None:
            cur_lo, cur_hi = self.lo, self.lo + 8 * old.size - 1
            if lo >= cur_lo and hi <= cur_hi:
                self.id_lo, self.id_hi = s_lo, s_hi
                return True
        # the ids' span, with room to spare on the one side that grew (ids often rise chunk
        # by chunk: few copies), within the capacity
        lo2, hi2 = s_lo, s_hi
        if old is not None and lo < cur_lo and hi <= cur_hi:
            lo2 = max(s_lo - (s_hi - s_lo + 1), s_hi - cap + 1, -2**63)
        elif old is not None and hi > cur_hi and lo >= cur_lo:
            hi2 = min(s_hi + (s_hi - s_lo + 1), s_lo + cap - 1, 2**63 - 1)
        base = lo2 - lo2 % 8
        flags = np.zeros((hi2 - base) // 8 + 1, dtype=np.uint8)
        if old is not None:
            # the bytes holding the ids recorded so far (both arrays start at multiples of 8)
            i0, i1 = (self.id_lo - cur_lo) // 8, (self.id_hi - cur_lo) // 8 + 1
            at = (cur_lo - base) // 8
            flags[at + i0:at + i1] = old[i0:i1]
        self.lo, self.flags = base, flags
        self.id_lo, self.id_hi = s_lo, s_hi
        return True


def _check_chunk(forests: HDF5Forests, chunks: list, snap_nums, snap_z, max_bits: int,
                 index: int):
    """Read chunk ``index`` of ``chunks`` and check it alone (a task of
    :meth:`HDF5Forests.check`): ``(problems, links, ids)`` with ``ids`` the chunk's node
    ids for :class:`_SeenIds` of ``max_bits`` flags (:func:`_ids_for_flags`)."""
    cols, rows = forests.read_columns(chunks[index], rows=True)
    found, links = ChunkedCheck.check_chunk(cols, snap_nums, snap_z, rows)
    return found, links, _ids_for_flags(cols["node_id"], max_bits)


class _IdBits(NamedTuple):
    """A chunk's node ids as flag bits: id ``base + k`` is bit ``k % 8`` of byte
    ``bits[k // 8]`` (numpy's "little" order); ``base`` is a multiple of 8, ``lo`` and
    ``hi`` the smallest and largest id."""

    lo: int
    hi: int
    base: int
    bits: np.ndarray


def _ids_for_flags(node_id, max_bits: int):
    """What :meth:`_SeenIds.add` needs of a chunk's ids (as stored in the file): the ids
    as :class:`_IdBits` where those take fewer bytes than the ids (8 per id: a range of
    up to 64 values per id); None where the flags could not hold them anyway (not
    integers, or a range above ``max_bits`` values); else the ids as int64. Repeats within the chunk are not
    kept (:class:`~bhgrow.trees.validate.ChunkedCheck` finds those)."""
    arr = np.asarray(node_id)
    if arr.size == 0:
        return np.zeros(0, np.int64)
    if arr.dtype.kind not in "iu" or (arr.dtype.kind == "u"
                                       and arr.max() > np.iinfo(np.int64).max):
        return None
    ids = arr.astype(np.int64, copy=False)
    lo, hi = int(ids.min()), int(ids.max())
    if hi - lo + 1 > max_bits:
        return None
    base = lo - lo % 8
    n_bytes = (hi - base) // 8 + 1
    if n_bytes >= ids.nbytes:
        return ids
    k = ids - np.int64(base)
    if n_bytes <= ids.size:
        # dense: one byte per id value, at most the ids' own bytes, then packed
        flags = np.zeros(hi - base + 1, dtype=bool)
        flags[k] = True
        return _IdBits(lo, hi, base, np.packbits(flags, bitorder="little"))
    # sparser (up to 64 values per id): the bits set in place, never a byte per value,
    # in blocks of ids (small temporaries)
    bits = np.zeros(n_bytes, dtype=np.uint8)
    for a in range(0, k.size, 1 << 18):
        np.bitwise_or.at(bits, *_byte_and_bit(k[a:a + (1 << 18)]))
    return _IdBits(lo, hi, base, bits)


def _byte_and_bit(k):
    """Byte index and bit mask of flag offsets ``k`` (numpy's "little" bit order)."""
    return k >> 3, np.left_shift(np.uint8(1), (k & 7).astype(np.uint8))


def open_forests(path, *, check: bool = True, max_nodes: int = 2_000_000,
                 box_mpc: float | None = None, workers: int = 1) -> HDF5Forests:
    """Open a bhgrow HDF5 forest file for reading chunk by chunk.

    Parameters
    ----------
    path : str or Path
    check : bool
        Check the whole file now (:meth:`HDF5Forests.check`, in chunks of ``max_nodes``
        nodes): bad input fails here, with the messages of :func:`load_forest`.
    max_nodes : int
        Nodes per chunk of the check (bounds its memory).
    box_mpc : float, optional
        Comoving box side [Mpc] replacing the file's.
    workers : int
        Local processes checking chunks at once (:meth:`HDF5Forests.check`; 0 = one per
        CPU core).

    Returns
    -------
    HDF5Forests
    """
    source = HDF5Forests(path, box_mpc=box_mpc)
    if check:
        source.check(max_nodes, workers)
    return source


def is_hdf5_path(path) -> bool:
    """Whether :func:`load_forest` reads ``path`` as bhgrow HDF5 (by its suffix)."""
    return Path(path).suffix.lower() in (".h5", ".hdf5", ".hdf")


# ====================================================================== tables
def parse_column_map(text: str | None) -> dict:
    """Parse ``"node_id=ID,desc_id=DescID"`` into ``{"node_id": "ID", ...}``."""
    if not text:
        return {}
    out = {}
    for item in text.split(","):
        item = item.strip()
        if not item:
            continue
        if "=" not in item:
            raise BhgrowInputError(f"column map entry {item!r} must look like "
                                   f"bhgrow_name=file_column", rule="bad_column_map")
        key, val = (s.strip() for s in item.split("=", 1))
        if key not in _KNOWN + ["z"]:
            raise BhgrowInputError(f"column map names unknown bhgrow column {key!r}; known: "
                                   f"{', '.join(_KNOWN + ['z'])}", rule="bad_column_map",
                                   rows=[key])
        out[key] = val
    return out


def _read_frame(path: Path):
    import pandas as pd

    source = str(path)
    suffix = path.suffix.lower()
    try:
        if suffix in (".parquet", ".pq"):
            try:
                import pyarrow  # noqa: F401
            except ImportError:
                raise BhgrowInputError(f"{source}: reading Parquet needs the optional package "
                                       f"pyarrow (pip install pyarrow)", source=source,
                                       rule="missing_reader") from None
            return pd.read_parquet(path)
        return pd.read_csv(path, comment="#", skipinitialspace=True)
    except BhgrowInputError:
        raise
    except pd.errors.EmptyDataError:
        raise BhgrowInputError(f"{source}: [empty] the file is empty", source=source,
                               rule="empty") from None
    except (ValueError, OSError, UnicodeDecodeError, pd.errors.ParserError) as exc:
        msg = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise BhgrowInputError(f"{source}: cannot parse as a table ({msg})", source=source,
                               rule="unparsable") from None


def read_table(path, *, columns: dict | None = None, h: float | None = None,
               snapshots=None, box_mpc: float | None = None) -> Forest:
    """Read a per-halo table (CSV or Parquet) into a validated forest.

    Parameters
    ----------
    path : str or Path
    columns : dict, optional
        Map from bhgrow column names to the file's column names. Columns already named as
        bhgrow names need no entry.
    h : float, optional
        Dimensionless Hubble parameter of the source's h-units. When given, ``mass_msun``
        and ``gas_msun`` are read as Msun/h, ``rvir_kpc`` as kpc/h, ``weight_mpc3`` as
        (Mpc/h)^-3 and ``box_mpc`` as Mpc/h, and converted.
    snapshots : str, Path or (snap, z) pair, optional
        Snapshot table, if the node table has no ``z`` column.
    box_mpc : float, optional
        Comoving box side (Mpc, or Mpc/h with ``h``).
    """
    path = Path(path)
    source = str(path)
    _require_file(path)
    if h is not None and not (np.isfinite(h) and 0 < h <= 2):
        raise BhgrowInputError(f"`h` must be in (0, 2]; got {h}", rule="bad_h")
    df = _read_frame(path)
    cmap = dict(columns or {})
    for name in _KNOWN + ["z"]:
        cmap.setdefault(name, name)
    absent = [f"{k}={v}" for k, v in (columns or {}).items() if v not in df.columns]
    if absent:
        raise BhgrowInputError(
            f"{source}: [missing_columns] mapped columns not in the file: {', '.join(absent)}; "
            f"file columns: {', '.join(map(str, df.columns))}", source=source,
            rule="missing_columns", rows=absent)
    cols = {k: df[v].to_numpy() for k, v in cmap.items() if v in df.columns and k != "z"}
    if h is not None:
        for k, p in _H_POWER.items():
            if k in cols and np.asarray(cols[k]).dtype.kind in "iuf":
                cols[k] = np.asarray(cols[k], dtype=np.float64) * h**p
        if box_mpc is not None:
            box_mpc = box_mpc / h
    if cmap["z"] in df.columns and snapshots is None:
        snap_nums, snap_z = _snapshots_from_column(cols, df[cmap["z"]].to_numpy(), source)
    elif snapshots is not None:
        snap_nums, snap_z = _snapshot_table(snapshots)
    else:
        raise BhgrowInputError(
            f"{source}: [missing_columns] no snapshot redshifts: add a `z` column (or map one "
            f"with z=NAME) or give a snapshot table (--snapshots FILE with columns snap,z)",
            source=source, rule="missing_columns")
    meta = {"source_file": source}
    if h is not None:
        meta["source_h"] = float(h)
    return Forest.from_columns(cols, snap_nums, snap_z, box_mpc=box_mpc, meta=meta,
                               source=source)


def _snapshots_from_column(cols: dict, z, source: str):
    """Build the snapshot table from a per-node redshift column (must agree per snap)."""
    if "snap" not in cols:
        return np.zeros(0, np.int64), np.zeros(0)
    snap = np.asarray(cols["snap"])
    z = np.asarray(z)
    if snap.size == 0:  # a header-only table: reported as `empty` by validation
        return np.zeros(0, np.int64), np.zeros(0)
    if snap.dtype.kind not in "iuf" or z.dtype.kind not in "iuf":
        raise BhgrowInputError(f"{source}: [wrong_dtype] `snap` and `z` must be numeric",
                               source=source, rule="wrong_dtype")
    ok = np.isfinite(snap)
    uniq, inv = np.unique(snap[ok], return_inverse=True)
    zmin = np.full(uniq.size, np.inf)
    zmax = np.full(uniq.size, -np.inf)
    np.minimum.at(zmin, inv, z[ok])
    np.maximum.at(zmax, inv, z[ok])
    tol = 1e-6 * np.maximum(1.0, np.abs(zmax))
    bad = ~(zmax - zmin <= tol)
    if bad.any():
        raise BhgrowInputError(
            f"{source}: [bad_snapshot_table] the `z` column differs within snapshots "
            f"{uniq[bad][:10].tolist()}", source=source, rule="bad_snapshot_table",
            rows=uniq[bad][:10].tolist())
    return uniq, zmin


def _snapshot_table(snapshots):
    if isinstance(snapshots, (str, Path)):
        p = Path(snapshots)
        _require_file(p)
        df = _read_frame(p)
        if not {"snap", "z"} <= set(df.columns):
            raise BhgrowInputError(f"{p}: [missing_columns] snapshot table needs columns "
                                   f"`snap` and `z`; has {list(df.columns)}", source=str(p),
                                   rule="missing_columns")
        return df["snap"].to_numpy(), df["z"].to_numpy()
    snap, z = snapshots
    return np.asarray(snap), np.asarray(z)


def write_csv(forest: Forest, path, *, overwrite: bool = False) -> Path:
    """Write the forest as one CSV table with a per-node ``z`` column (atomically).

    Box size and cosmology go in ``#`` comment lines at the top, which :func:`read_table`
    skips; pass ``box_mpc`` again when reading.
    """
    import pandas as pd

    path = Path(path)
    if path.exists() and not overwrite:
        raise BhgrowInputError(f"{path}: file exists; refusing to overwrite it",
                               source=str(path), rule="exists")
    cols = forest.to_columns()
    df = pd.DataFrame(cols)
    df.insert(4, "z", forest.z)
    tmp = _tmp_path(path)
    try:
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(f"# bhgrow forest table; box_mpc={forest.box_mpc}\n")
            df.to_csv(fh, index=False, float_format="%.17g")
        atomic_replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return path


# ====================================================================== dispatch
def _require_file(path: Path) -> None:
    if not path.exists():
        raise BhgrowInputError(f"{path}: no such file", source=str(path), rule="no_file")
    if path.is_dir():
        raise BhgrowInputError(f"{path}: is a directory, expected a tree file",
                               source=str(path), rule="no_file")


def load_forest(path, *, columns: dict | None = None, h: float | None = None,
                snapshots=None, box_mpc: float | None = None) -> Forest:
    """Load and validate a merger-tree file, choosing the reader from its suffix.

    ``.h5``/``.hdf5`` use bhgrow's HDF5 layout; ``.csv``, ``.txt``, ``.parquet`` use
    :func:`read_table` (with the column map, ``h`` conversion and snapshot table).
    """
    path = Path(path)
    if is_hdf5_path(path):
        if columns or h is not None or snapshots is not None:
            raise BhgrowInputError(f"{path}: column maps, --h and --snapshots apply to tables "
                                   f"(CSV/Parquet), not to bhgrow HDF5 files", source=str(path),
                                   rule="bad_option")
        forest = read_hdf5(path)
        if box_mpc is not None:
            forest.box_mpc = float(box_mpc)
        return forest
    return read_table(path, columns=columns, h=h, snapshots=snapshots, box_mpc=box_mpc)
