"""Run directories: atomic writes, provenance, no silent overwrites.

A run is written into ``<DIR>.tmp-<pid>`` and renamed to ``DIR`` only when every file is
complete, so a crash never leaves a half-written run. An existing ``DIR`` is refused unless
``overwrite=True``; then the old directory is moved aside, the new one renamed into place,
and the old one deleted.

Files
-----
``black_holes.ecsv``  one row per black hole (columns and units in README and the header)
``histories.h5``      per-black-hole histories, one row per (black hole, snapshot), sorted
                      by ``bh_id`` then time; ``/index/bh_id`` + ``/index/offset`` give each
                      black hole's rows
``config.toml``       the resolved config (every key, defaults filled in)
``run.json``          provenance: version, seed, input file and its SHA-256, wall time,
                      ledger and baryon checks, seeds per channel
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import sys
import weakref
from collections.abc import Mapping
from pathlib import Path

import numpy as np

from .errors import BhgrowInputError


def file_sha256(path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


class RunDirectory:
    """Context manager that stages a run directory and renames it into place on success.

    >>> with RunDirectory("out", overwrite=False) as tmp:   # doctest: +SKIP
    ...     (tmp / "run.json").write_text("{}")
    """

    def __init__(self, path, *, overwrite: bool = False):
        self.path = Path(path)
        self.overwrite = overwrite
        self.tmp = self.path.with_name(f"{self.path.name}.tmp-{os.getpid()}")

    def __enter__(self) -> Path:
        if self.path.exists() and not self.overwrite:
            raise BhgrowInputError(f"{self.path}: run directory exists; refusing to overwrite "
                                   f"it (choose another -o or pass --overwrite)",
                                   source=str(self.path), rule="exists")
        if not self.path.parent.exists():
            raise BhgrowInputError(f"{self.path}: parent directory {self.path.parent} does "
                                   f"not exist", source=str(self.path), rule="no_dir")
        if self.tmp.exists():
            shutil.rmtree(self.tmp)
        self.tmp.mkdir()
        return self.tmp

    def __exit__(self, exc_type, exc, tb):
        if exc_type is not None:
            shutil.rmtree(self.tmp, ignore_errors=True)
            return False
        old = None
        if self.path.exists():
            old = self.path.with_name(f"{self.path.name}.old-{os.getpid()}")
            os.replace(self.path, old)
        os.replace(self.tmp, self.path)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
        return False


#: rows formatted at a time by :func:`write_ecsv` (the strings of a slice are held in
#: memory: ~0.14 kB per value)
ECSV_CHUNK_ROWS = 10_000

#: characters that make astropy's ECSV writer quote a string value (Python csv,
#: QUOTE_MINIMAL, comma delimiter); or a value with leading/trailing blanks (stripped)
_ECSV_SPECIAL = re.compile(r'[,"\r\n\x00]|^[ \t]|[ \t]$')


def write_ecsv(table, path: Path, meta: dict | None = None, *,
               chunk_rows: int | None = None) -> None:
    """Write an astropy Table as comma-separated ECSV (readable by pandas with comment='#').

    The file is the same, byte for byte, as ``table.write(path, format="ascii.ecsv",
    delimiter=",")`` (tested): astropy writes the header (from the zero-row table) and the
    rows are formatted here, a column at a time, as astropy's ECSV writer formats them
    (``str`` of each value, comma-joined, one line per row), two to three times faster.
    Tables this fast path does not cover (masked, mixin, multidimensional, object or bytes
    columns, strings that need CSV quoting or lose blanks, objects other than a Table) are
    written by astropy whole. A :class:`DiskTable` is read a slice of rows at a time (the
    same file as its :meth:`DiskTable.to_table`, tested). :class:`EcsvFile` writes the
    same file in parts (by several processes).

    Parameters
    ----------
    table : astropy.table.Table or DiskTable
        Table to write; ``meta`` is merged into ``table.meta`` first.
    path : path-like
        File to write (overwritten).
    meta : dict, optional
        Extra table metadata (written in the header).
    chunk_rows : int, optional
        Rows formatted at a time (bounds memory); default :data:`ECSV_CHUNK_ROWS`.
    """
    EcsvFile(table, path, meta, chunk_rows=chunk_rows).write_part(0)


class EcsvFile:
    """The file :func:`write_ecsv` writes, made as ``parts`` runs of rows that separate
    processes may write at once (:meth:`write_part`), then :meth:`join` ed.

    Part 0 (with the header) goes to ``path`` itself, part ``k`` to a hidden file beside
    it, which :meth:`join` appends to ``path`` and removes. The rows of a part are
    formatted exactly as :func:`write_ecsv` formats them, so the joined file is the same,
    byte for byte. A table the fast path does not cover, or without rows, is one part.
    The table and the formatters are set up here, once, before the parts are handed out
    (forked workers inherit them; a :class:`DiskTable` is read by each part from disk).

    Parameters
    ----------
    table, path, meta, chunk_rows
        As for :func:`write_ecsv`.
    parts : int
        Runs of rows (at most one per row).
    """

    def __init__(self, table, path, meta: dict | None = None, *, parts: int = 1,
                 chunk_rows: int | None = None):
        if meta:
            table.meta.update(meta)
        self.table, self.path = table, Path(path)
        self.step = max(1, int(chunk_rows or ECSV_CHUNK_ROWS))
        self.columns = _ecsv_fast_columns(table)
        n = len(table) if self.columns is not None else 0
        k = max(1, min(int(parts), n))
        self.edges = np.linspace(0, n, k + 1).round().astype(np.int64) if n else \
            np.zeros(2, np.int64)
        self.header = None
        if self.columns is not None:
            import io

            head = io.StringIO(newline="")
            (table.empty() if isinstance(table, DiskTable) else table[:0]).write(
                head, format="ascii.ecsv", delimiter=",")
            self.header = head.getvalue()

    @property
    def n_parts(self) -> int:
        return self.edges.size - 1

    def _part_path(self, k: int) -> Path:
        return self.path if k == 0 else self.path.with_name(f".{self.path.name}.part{k}")

    def write_part(self, k: int) -> None:
        """Write part ``k`` (0 <= k < :attr:`n_parts`)."""
        if self.columns is None:
            table = self.table
            whole = table.to_table() if isinstance(table, DiskTable) else table
            whole.write(self.path, format="ascii.ecsv", delimiter=",", overwrite=True)
            return
        start, stop = int(self.edges[k]), int(self.edges[k + 1])
        # same open() as astropy's writer (locale encoding, no newline translation)
        with open(self._part_path(k), "w", newline="") as fh:
            if k == 0:
                fh.write(self.header)
            for a in range(start, stop, self.step):
                b = min(stop, a + self.step)
                strs = [fmt(arr[a:b]) for arr, fmt in self.columns]
                fh.write(os.linesep.join(map(",".join, zip(*strs))))
                fh.write(os.linesep)

    def join(self) -> None:
        """Append parts 1, 2, ... to ``path`` (after every part is written)."""
        if self.n_parts == 1:
            return
        import shutil

        with open(self.path, "ab") as out:
            for k in range(1, self.n_parts):
                part = self._part_path(k)
                with open(part, "rb") as src:
                    shutil.copyfileobj(src, out, 1 << 22)
                part.unlink()


def _ecsv_fast_columns(table):
    """(array, formatter) per column for :func:`write_ecsv`, or None if astropy must write.

    Each formatter returns the strings astropy's ECSV writer puts in the file for a slice of
    the column (``str(col[i])`` of the numpy scalar, with blanks stripped and CSV quoting;
    only values that need neither are accepted here).
    """
    from astropy.table import MaskedColumn, Table

    on_disk = isinstance(table, DiskTable)
    if not on_disk and (not isinstance(table, Table) or table.masked
                        or table.has_mixin_columns):
        return None
    if not len(table.colnames):
        return None
    # numpy's legacy print modes change str() of float scalars (repr(float) no longer agrees)
    plain_floats = np.get_printoptions().get("legacy", False) in (False, None, sys.maxsize)
    out = []
    for name in table.colnames:
        if on_disk:
            arr = table.lazy(name)           # read a slice at a time
        else:
            col = table[name]
            if isinstance(col, MaskedColumn) or col.ndim != 1:
                return None
            arr = col.view(np.ndarray)
        kind = arr.dtype.kind
        if kind == "f" and arr.dtype == np.float64 and plain_floats:
            out.append((arr, _float64_strs))
        elif kind in "biu":
            out.append((arr, _plain_strs))     # str(np.int64(k)) == str(int(k)), bools too
        elif kind == "f":
            out.append((arr, _scalar_strs))
        elif kind == "U":
            values = set()
            for start in range(0, arr.size, ECSV_CHUNK_ROWS):   # distinct values only
                values.update(arr[start:start + ECSV_CHUNK_ROWS].tolist())
            if any(_ECSV_SPECIAL.search(v) for v in values) or (
                    len(table.colnames) == 1 and "" in values):
                return None                     # needs quoting or stripping: astropy writes
            out.append((arr, _plain_strs))
        else:
            return None
    return out


def _plain_strs(a: np.ndarray) -> list:
    return list(map(str, a.tolist()))


def _scalar_strs(a: np.ndarray) -> list:
    return [str(x) for x in a]      # numpy scalars, as astropy formats them


def _float64_strs(a: np.ndarray) -> list:
    """``str(np.float64(x))`` of each value, computed as ``repr(float(x))``.

    Both are the shortest round-trip text with the same switch to exponent notation
    (checked on random bit patterns and edge values; tested), and the Python float's repr
    is faster. A slice with few distinct values (a constant weight, snapshot redshifts)
    formats each distinct bit pattern once (bits, not values: 0.0 and -0.0 print
    differently, NaN != NaN).
    """
    if a.size > 2048:
        probe = a[:: a.size // 512].view(np.int64)
        if np.unique(probe).size * 4 < probe.size:
            bits, inverse = np.unique(a.view(np.int64), return_inverse=True)
            strs = np.array(list(map(repr, bits.view(np.float64).tolist())), dtype=object)
            return strs[inverse].tolist()
    return list(map(repr, a.tolist()))


#: gzip level of the history datasets: the fastest; on a 2.15e7-node run's histories (shuffled
#: 7,730-row chunks) level 1 of ISA-L's deflater gave 196 MB in 0.8 s and zlib's level 4
#: (h5py's default) 186 MB in 5.4 s (measured 2026-12-03, one core)
HISTORIES_GZIP_LEVEL = 1
#: the history datasets' filters (shuffle, then gzip)
_GZIP = {"compression": "gzip", "compression_opts": HISTORIES_GZIP_LEVEL, "shuffle": True}
#: rows of a history column read back from a HistoryStore at a time (~16 MB of float64)
HISTORY_BLOCK_ROWS = 2_000_000


#: history columns, in file order
HISTORY_COLUMNS = ("bh_id", "t_gyr", "z", "mass_msun", "mdot_msun_yr", "eddington_ratio",
                   "host_gas_msun")


class DiskTable:
    """A catalogue kept on disk, one ``.npy`` file per column: the black holes or mergers
    of a run of several chunks, whose catalogues would otherwise grow with the trees
    (~190 bytes per black hole and ~240 per merger as astropy tables).

    It offers what the products read: ``len(t)``, ``t.colnames``, ``t.meta``, ``t[name]``
    (the whole column read into memory, as the astropy ``Column`` a Table would give, with
    its unit and description) and ``t.rows(start, stop)`` (an
    astropy Table of a slice, with units and descriptions); :func:`write_ecsv` writes it a
    slice of rows at a time. ``t.to_table()`` reads all of it into one astropy Table; any
    other key (a row mask, an index array) selects rows of that table, iterating gives its
    rows, and a copy or pickle of a DiskTable is that table. Read-only: columns are added
    once each (:meth:`add_column`), all of one length; a column read with ``t[name]`` is a
    copy (changing it changes nothing on disk). The directory is removed when
    the object is garbage-collected or the interpreter exits (only by the process that
    made it).

    Parameters
    ----------
    directory : path-like
        An empty or missing directory for the columns (created).
    meta : dict, optional
        Table metadata (written in the ECSV header).
    """

    def __init__(self, directory, meta: dict | None = None):
        self.directory = Path(directory)
        self.directory.mkdir(parents=True, exist_ok=True)
        self.meta = dict(meta or {})
        self.colnames: list = []
        self._units: dict = {}
        self._descriptions: dict = {}
        self._dtypes: dict = {}
        self._len = None
        weakref.finalize(self, _remove_tree, str(self.directory), os.getpid())

    def _path(self, name) -> Path:
        return self.directory / f"{self.colnames.index(name):03d}.npy"

    def add_column(self, values, name: str, *, unit=None, description=None) -> None:
        """Store ``values`` (1-d) as column ``name``; a unit (string) and a description
        as astropy's table would carry them."""
        arr = np.asarray(values)
        if name in self.colnames:
            raise ValueError(f"DiskTable: column {name!r} exists")
        if arr.ndim != 1 or (self._len is not None and arr.size != self._len):
            raise ValueError(f"DiskTable: column {name!r} must be 1-d with {self._len} rows;"
                             f" got shape {arr.shape}")
        self.colnames.append(name)
        np.save(self._path(name), arr, allow_pickle=False)
        self._len = arr.size
        self._dtypes[name] = arr.dtype
        self._units[name] = unit
        self._descriptions[name] = description

    def __len__(self) -> int:
        return int(self._len or 0)

    def __getitem__(self, key):
        if not isinstance(key, str):
            return self.to_table()[key]
        if key not in self.colnames:
            raise KeyError(key)
        return self._column(key, np.load(self._path(key), allow_pickle=False))

    def _column(self, name, data):
        """``data`` as the astropy Column a Table would hold (no copy)."""
        from astropy.table import Column

        return Column(data, name=name, unit=self._units[name],
                      description=self._descriptions[name], copy=False)

    def keys(self) -> list:
        return list(self.colnames)

    def __iter__(self):
        """Rows, as iterating over the astropy Table does (the whole table is read once)."""
        return iter(self.to_table())

    def __reduce__(self):
        # a copy or a pickle is the astropy Table (a second object on the same directory
        # would lose it when this one is collected)
        return _table_of, (self.to_table(),)

    def lazy(self, name) -> "_DiskColumn":
        """Column ``name`` as an array-like read only where it is sliced."""
        return _DiskColumn(self, name)

    def _slice(self, name, start, stop) -> np.ndarray:
        col = np.load(self._path(name), mmap_mode="r", allow_pickle=False)
        out = np.array(col[start:stop])
        del col
        return out

    def _table(self, columns: dict):
        from astropy.table import Table

        t = Table(meta=dict(self.meta))
        for name in self.colnames:
            t.add_column(columns[name], name=name, copy=False)
            if self._units[name]:
                t[name].unit = self._units[name]
            if self._descriptions[name]:
                t[name].description = self._descriptions[name]
        return t

    def empty(self):
        """The astropy Table of no rows (columns, types, units, descriptions, meta)."""
        return self._table({n: np.zeros(0, self._dtypes[n]) for n in self.colnames})

    def rows(self, start: int, stop: int):
        """Rows ``start:stop`` as an astropy Table."""
        return self._table({n: self._slice(n, start, stop) for n in self.colnames})

    def to_table(self):
        """The whole catalogue as one astropy Table (in memory)."""
        return self._table({n: np.load(self._path(n), allow_pickle=False)
                            for n in self.colnames})


def _table_of(table):
    return table


class _DiskColumn:
    """One column of a :class:`DiskTable`, read a slice at a time (for :func:`write_ecsv`)."""

    ndim = 1

    def __init__(self, table: DiskTable, name: str):
        self.table, self.name = table, name
        self.dtype = table._dtypes[name]
        self.size = len(table)

    def __getitem__(self, key):
        if not isinstance(key, slice) or key.step not in (None, 1):
            raise TypeError("a DiskTable column is read by contiguous slices")
        start, stop, _ = key.indices(self.size)
        return self.table._slice(self.name, start, stop)


def _remove_tree(path: str, pid: int) -> None:
    """Remove ``path`` if this is process ``pid`` (not a forked copy that inherited it)."""
    if os.getpid() == pid:
        shutil.rmtree(path, ignore_errors=True)


class OnDiskHistories(Mapping):
    """Histories on disk, read back in parts (:class:`HistoryStore`, :class:`HistoryFile`).

    As a mapping (column name -> array in the run's order, by ``bh_id`` then time) a column
    is read back whole; the products read only what they use: :meth:`at_redshifts` (the
    tables: the rows of a few snapshots) and :meth:`most_massive` (the figure).
    """

    def snapshot_z(self) -> np.ndarray:
        """The redshifts of the snapshots that have rows (sorted, unique)."""
        raise NotImplementedError

    def at_redshifts(self, z_values, names=HISTORY_COLUMNS) -> dict:
        """Columns ``names`` of the rows whose ``z`` is one of ``z_values`` (snapshot
        redshifts, compared exactly), in the run's order."""
        raise NotImplementedError

    def most_massive(self, n: int) -> dict:
        """The histories (columns in the run's order) of the ``n`` black holes with the
        largest last mass, as :func:`bhgrow.plots.mass_histories` picks them."""
        raise NotImplementedError


class HistoryStore(OnDiskHistories):
    """Per-black-hole histories of a run kept on disk, one part per chunk, until written.

    A chunk's histories are moved here as soon as the chunk is done (:meth:`add`), so a
    run holds at most the chunks in flight in memory, not every history row of the run
    (~21 bytes per tree node for the default model; the catalogues go to disk likewise,
    :class:`DiskTable`). Every black hole's rows are in one chunk (chunks hold whole forests),
    so the run's order, by ``bh_id`` then time, is the parts' black holes in ``bh_id``
    order: only the ids, row counts and last masses of the black holes are kept in memory.

    As a mapping (column name -> array in the run's order) it reads the columns back
    whole; :func:`write_histories` reads them block by block instead, and
    :meth:`most_massive` reads only the rows of a few black holes. The directory is
    removed when the store is garbage-collected or the interpreter exits.

    Parameters
    ----------
    directory : path-like
        An empty or missing directory for the parts (created).
    """

    def __init__(self, directory):
        self.directory = Path(directory)
        self.directory.mkdir(parents=True, exist_ok=True)
        self._parts = []              # per part: (directory, n_rows)
        self._ids, self._counts, self._last_mass, self._part = [], [], [], []
        self._z = []                  # per part: its snapshots' redshifts
        self._order = None
        weakref.finalize(self, _remove_tree, str(self.directory), os.getpid())

    def add(self, cols: dict) -> None:
        """Move one chunk's columns (sorted by ``bh_id`` then time) to disk."""
        ids = np.asarray(cols["bh_id"])
        if not ids.size:
            return
        part = self.directory / f"part-{len(self._parts):05d}"
        part.mkdir()
        for name in HISTORY_COLUMNS:
            np.save(part / f"{name}.npy", np.asarray(cols[name]), allow_pickle=False)
        uniq, start = np.unique(ids, return_index=True)
        stop = np.r_[start[1:], ids.size]
        self._ids.append(uniq)
        self._counts.append(stop - start)
        self._last_mass.append(np.asarray(cols["mass_msun"])[stop - 1])
        self._part.append(np.full(uniq.size, len(self._parts), dtype=np.int32))
        self._z.append(np.unique(np.asarray(cols["z"])))
        self._parts.append((part, ids.size))
        self._order = None

    def _index(self):
        """Black holes in the run's order: ids, part, first row in the part, row count."""
        if self._order is None:
            # no rows: float ids, as the columns of an empty run in memory have
            ids = np.concatenate(self._ids) if self._ids else np.zeros(0)
            counts = (np.concatenate(self._counts) if self._counts
                      else np.zeros(0, np.int64))
            starts = np.concatenate([np.r_[0, np.cumsum(c)[:-1]] for c in self._counts]) \
                if self._counts else np.zeros(0, np.int64)
            part = np.concatenate(self._part) if self._part else np.zeros(0, np.int32)
            o = np.argsort(ids, kind="stable")
            self._order = (ids[o], part[o], starts[o], counts[o], o)
        return self._order

    @property
    def n_rows(self) -> int:
        return int(sum(n for _, n in self._parts))

    def index(self):
        """``/index`` of the histories file: every black hole's id and first row, and the
        number of rows at the end."""
        ids, _, _, counts, _ = self._index()
        return ids, np.r_[0, np.cumsum(counts)].astype(np.int64)

    def _rows(self, sel, name):
        """Rows of the black holes at positions ``sel`` (of the run's order) of column
        ``name``, in the run's order."""
        _, part, starts, counts, _ = self._index()
        part, starts, counts = part[sel], starts[sel], counts[sel]
        n = int(counts.sum())
        out = np.empty(n, dtype=self._dtype(name))
        first = np.r_[0, np.cumsum(counts)[:-1]]
        # row of the part for every output row: its black hole's first row + rank
        local = np.repeat(starts - first, counts) + np.arange(n)
        owner = np.repeat(part, counts)
        for p in np.unique(part):
            at = np.flatnonzero(owner == p)
            col = np.load(self._parts[p][0] / f"{name}.npy", mmap_mode="r")
            out[at] = col[local[at]]
            del col
        return out

    def _dtype(self, name):
        return np.load(self._parts[0][0] / f"{name}.npy", mmap_mode="r").dtype \
            if self._parts else np.float64

    def blocks(self, name, max_rows: int):
        """Column ``name`` in the run's order as consecutive arrays of whole black holes,
        each of at most ``max_rows`` rows where a black hole has fewer (memory: one
        block)."""
        _, _, _, counts, _ = self._index()
        ends = np.cumsum(counts)
        lo = 0
        while lo < counts.size:
            base = ends[lo - 1] if lo else 0
            hi = max(lo + 1, int(np.searchsorted(ends, base + max_rows, side="right")))
            yield self._rows(slice(lo, hi), name)
            lo = hi

    def most_massive(self, n: int) -> dict:
        o = self._index()[4]
        last = np.concatenate(self._last_mass)[o] if self._last_mass else np.zeros(0)
        sel = np.sort(np.argsort(last)[::-1][:n])
        return {name: self._rows(sel, name) for name in HISTORY_COLUMNS}

    def snapshot_z(self) -> np.ndarray:
        return np.unique(np.concatenate(self._z)) if self._z else np.zeros(0)

    def at_redshifts(self, z_values, names=HISTORY_COLUMNS) -> dict:
        _, _, _, counts, o = self._index()
        # the run-order position of each part's black holes, and of their first rows
        rank = np.empty(o.size, dtype=np.int64)
        rank[o] = np.arange(o.size)
        first_out = np.r_[0, np.cumsum(counts)[:-1]]
        zs = np.asarray(z_values, dtype=float)
        pos, vals, base = [], {n: [] for n in names}, 0
        for p, (d, _) in enumerate(self._parts):
            n_bh = self._counts[p].size
            z = np.load(d / "z.npy", mmap_mode="r")
            local = np.flatnonzero(np.isin(z, zs))
            del z
            if local.size:
                # each row's black hole within the part, its run-order rank, and its rank
                # among that black hole's rows
                bh = np.repeat(np.arange(n_bh), self._counts[p])[local]
                start_in_part = np.r_[0, np.cumsum(self._counts[p])[:-1]][bh]
                pos.append(first_out[rank[base + bh]] + (local - start_in_part))
                for name in names:
                    col = np.load(d / f"{name}.npy", mmap_mode="r")
                    vals[name].append(np.asarray(col[local]))
                    del col
            base += n_bh
        if not pos:
            return {name: np.zeros(0, self._dtype(name)) for name in names}
        order = np.argsort(np.concatenate(pos), kind="stable")
        return {name: np.concatenate(v)[order] for name, v in vals.items()}

    def __getitem__(self, name):
        if name not in HISTORY_COLUMNS:
            raise KeyError(name)
        if not self._parts:
            return np.zeros(0)
        return self._rows(slice(None), name)

    def __iter__(self):
        return iter(HISTORY_COLUMNS)

    def __len__(self):
        return len(HISTORY_COLUMNS)


def write_histories(cols: dict, path: Path, *, threads: int | None = None) -> None:
    """Histories in HDF5: one dataset per column plus a per-black-hole row index.

    Each column is a chunked dataset with the shuffle and gzip (level
    :data:`HISTORIES_GZIP_LEVEL`) filters, chunk shape chosen by h5py. Compressing was most
    of the time spent here, and HDF5 does it with zlib on one core; so the chunks of 1-d
    numeric columns are shuffled and deflated here (by ISA-L where the ``isal`` package is
    installed, else zlib: :func:`_deflater`), by ``threads`` threads (both release the GIL),
    and stored with ``write_direct_chunk``: the same filters, chunks and values as HDF5
    writing them itself (tested), and with zlib, where it is the library HDF5 uses, the
    same bytes.

    Parameters
    ----------
    cols : dict or HistoryStore
        Column name -> 1-d array, one row per (black hole, snapshot), sorted by ``bh_id``;
        or a :class:`HistoryStore`, read back in blocks (the same file).
    path : path-like
        File to write.
    threads : int, optional
        Compressing threads; default the usable CPU cores (at most 8).
    """
    import h5py

    units = {"t_gyr": "Gyr", "z": "", "mass_msun": "Msun", "mdot_msun_yr": "Msun/yr",
             "eddington_ratio": "", "host_gas_msun": "Msun", "bh_id": ""}
    if threads is None:
        threads = min(8, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity")
                      else (os.cpu_count() or 1))
    pool = None
    try:
        with h5py.File(path, "w") as h5:
            h5.attrs["format"] = "bhgrow-histories"
            h5.attrs["schema_version"] = 1
            if isinstance(cols, HistoryStore):
                _write_store(h5, cols, units, threads)
                return
            for name, arr in cols.items():
                arr = np.asarray(arr)
                if _direct_chunks_ok(arr):
                    ds = h5.create_dataset(name, shape=arr.shape, dtype=arr.dtype,
                                           **_GZIP)
                    if threads > 1 and pool is None:
                        from concurrent.futures import ThreadPoolExecutor

                        pool = ThreadPoolExecutor(threads)
                    _write_deflated_chunks(ds, np.ascontiguousarray(arr), pool, threads)
                else:
                    ds = h5.create_dataset(name, data=arr, **_GZIP)
                ds.attrs["unit"] = units.get(name, "")
            ids = np.asarray(cols["bh_id"])
            uniq, start = np.unique(ids, return_index=True)
            g = h5.create_group("index")
            g.create_dataset("bh_id", data=uniq)
            g.create_dataset("offset", data=np.r_[start, ids.size].astype(np.int64))
    finally:
        if pool is not None:
            pool.shutdown()


def _write_store(h5, store: HistoryStore, units: dict, threads: int) -> None:
    """The datasets of :func:`write_histories` from a :class:`HistoryStore`, column by
    column in blocks of whole HDF5 chunks (the same file as from the columns in memory)."""
    n = store.n_rows
    pool = None
    try:
        for name in HISTORY_COLUMNS:
            dtype = store._dtype(name)
            if not n:
                ds = h5.create_dataset(name, data=np.zeros(0, dtype), **_GZIP)
                ds.attrs["unit"] = units.get(name, "")
                continue
            ds = h5.create_dataset(name, shape=(n,), dtype=dtype, **_GZIP)
            if threads > 1 and pool is None:
                from concurrent.futures import ThreadPoolExecutor

                pool = ThreadPoolExecutor(threads)
            size = ds.chunks[0]
            # blocks of whole black holes are cut at whole HDF5 chunks; the rows after the
            # last whole chunk wait for the next block
            carry = np.zeros(0, dtype)
            written = 0
            for block in store.blocks(name, max(size, HISTORY_BLOCK_ROWS)):
                arr = np.concatenate([carry, block]) if carry.size else block
                whole = arr.size - arr.size % size
                if whole:
                    _write_deflated_chunks(ds, arr[:whole], pool, threads, offset=written)
                    written += whole
                carry = arr[whole:]
            if carry.size:
                _write_deflated_chunks(ds, carry, pool, threads, offset=written)
            ds.attrs["unit"] = units.get(name, "")
        ids, offset = store.index()
        g = h5.create_group("index")
        g.create_dataset("bh_id", data=ids)
        g.create_dataset("offset", data=offset)
    finally:
        if pool is not None:
            pool.shutdown()


def _deflater():
    """``compress(data, level)`` giving a zlib stream (RFC 1950), which HDF5's gzip filter
    inflates whoever deflated it: ISA-L's (the ``isal`` package, installed with bhgrow where
    it has wheels; ~6x faster than zlib at level 1, its output a few % larger) if it
    imports, else Python's zlib."""
    try:
        from isal import isal_zlib
    except ImportError:
        import zlib

        return zlib.compress
    return isal_zlib.compress


def _direct_chunks_ok(arr: np.ndarray) -> bool:
    """Whether :func:`_write_deflated_chunks` can store ``arr`` (1-d, non-empty, native
    integer or float: types whose HDF5 storage is the array's bytes)."""
    return (arr.ndim == 1 and arr.size > 0 and arr.dtype.kind in "iuf"
            and arr.dtype.isnative)


def _write_deflated_chunks(ds, arr: np.ndarray, pool, threads: int = 1,
                           offset: int = 0) -> None:
    """Fill the 1-d chunked dataset ``ds`` (shuffle + gzip filters) with ``arr``, from row
    ``offset`` (a multiple of the chunk size) on.

    The chunks are compressed in ``pool`` (``threads`` threads; here if None) as HDF5's
    filters would: the last chunk is padded with the fill value 0 to the full chunk size,
    bytes are shuffled (all first bytes of the items, then all second bytes, ...) and
    zlib-compressed. At most four chunks per thread are compressed ahead of the one being
    stored (bounded memory).
    """
    from collections import deque

    compress = _deflater()
    size = ds.chunks[0]
    item = arr.dtype.itemsize

    def deflate(start):
        part = arr[start:start + size]
        if part.size < size:
            part = np.concatenate([part, np.zeros(size - part.size, arr.dtype)])
        shuffled = part.view(np.uint8).reshape(size, item).T.tobytes()
        return compress(shuffled, HISTORIES_GZIP_LEVEL)

    starts = range(0, arr.size, size)
    if pool is None:
        for start in starts:
            ds.id.write_direct_chunk((offset + start,), deflate(start))
        return
    window = 4 * max(1, threads)
    ahead = deque()
    try:
        for start in starts:
            ahead.append((start, pool.submit(deflate, start)))
            if len(ahead) >= window:
                done, fut = ahead.popleft()
                ds.id.write_direct_chunk((offset + done,), fut.result())
        while ahead:
            done, fut = ahead.popleft()
            ds.id.write_direct_chunk((offset + done,), fut.result())
    finally:
        for _, fut in ahead:        # after an error: drop the chunks not yet started
            fut.cancel()


def write_json(obj: dict, path: Path) -> None:
    def plain(o):
        if isinstance(o, np.ndarray):
            return o.tolist()
        if isinstance(o, (np.floating, np.integer, np.bool_)):
            return o.item()
        raise TypeError(type(o))

    path.write_text(json.dumps(obj, indent=2, default=plain, sort_keys=False) + "\n")


class HistoryFile(OnDiskHistories):
    """The histories of a run directory's ``histories.h5``, read in blocks (memory: one
    block of :data:`HISTORY_BLOCK_ROWS` rows, and one value per black hole).

    Parameters
    ----------
    path : path-like
        A file written by :func:`write_histories`.
    required : sequence of str
        Datasets that must be present (checked at once, with their lengths).

    Raises
    ------
    BhgrowInputError
        The file is missing, not HDF5, lacks a required dataset, or its datasets differ in
        length.
    """

    def __init__(self, path, required=HISTORY_COLUMNS):
        import h5py

        self.path = Path(path)
        if not self.path.exists():
            raise BhgrowInputError(f"{self.path}: missing", source=str(self.path),
                                   rule="no_file")
        try:
            with h5py.File(self.path, "r") as h5:
                # the run's column order (HDF5 lists names alphabetically)
                self._names = tuple(sorted(
                    (k for k in h5 if k != "index"),
                    key=lambda k: (HISTORY_COLUMNS.index(k) if k in HISTORY_COLUMNS
                                   else len(HISTORY_COLUMNS), k)))
                missing = [c for c in required if c not in h5]
                sizes = {k: h5[k].shape[0] if h5[k].ndim else 0 for k in self._names}
        except OSError as exc:
            raise BhgrowInputError(f"{self.path}: not a readable HDF5 file ({exc})",
                                   source=str(self.path), rule="not_hdf5") from None
        if missing:
            raise BhgrowInputError(f"{self.path}: missing dataset(s) {', '.join(missing)}",
                                   source=str(self.path), rule="missing_columns")
        if len(set(sizes.values())) > 1:
            raise BhgrowInputError(f"{self.path}: datasets differ in length {sizes}",
                                   source=str(self.path), rule="bad_file")
        self.n_rows = next(iter(sizes.values()), 0)

    def _open(self):
        import h5py

        return h5py.File(self.path, "r")

    def _blocks(self, h5, name):
        ds = h5[name]
        for lo in range(0, self.n_rows, HISTORY_BLOCK_ROWS):
            yield lo, ds[lo:lo + HISTORY_BLOCK_ROWS]

    def snapshot_z(self) -> np.ndarray:
        with self._open() as h5:
            found = [np.unique(z) for _, z in self._blocks(h5, "z")]
        return np.unique(np.concatenate(found)) if found else np.zeros(0)

    def at_redshifts(self, z_values, names=HISTORY_COLUMNS) -> dict:
        zs = np.asarray(z_values, dtype=float)
        with self._open() as h5:
            at = [(lo, np.flatnonzero(np.isin(z, zs))) for lo, z in self._blocks(h5, "z")]
            out = {}
            for name in names:
                ds = h5[name]
                parts = [ds[lo:lo + HISTORY_BLOCK_ROWS][sel] for lo, sel in at if sel.size]
                out[name] = np.concatenate(parts) if parts else np.zeros(0, ds.dtype)
        return out

    def most_massive(self, n: int) -> dict:
        with self._open() as h5:
            if "index" in h5:
                offset = h5["index/offset"][()]
            else:     # a file without the index: the black holes' first rows from bh_id
                ids = h5["bh_id"][()]
                offset = np.r_[np.unique(ids, return_index=True)[1], ids.size]
            last_row = offset[1:] - 1
            last = np.empty(last_row.size)
            for lo, mass in self._blocks(h5, "mass_msun"):     # last_row is sorted
                a, b = np.searchsorted(last_row, (lo, lo + mass.size))
                last[a:b] = mass[last_row[a:b] - lo]
            sel = np.sort(np.argsort(last)[::-1][:n])
            return {name: (np.concatenate([h5[name][offset[j]:offset[j + 1]] for j in sel])
                           if sel.size else np.zeros(0, h5[name].dtype))
                    for name in self._names}

    def __getitem__(self, name):
        if name not in self._names:
            raise KeyError(name)
        with self._open() as h5:
            return h5[name][()]

    def __iter__(self):
        return iter(self._names)

    def __len__(self):
        return len(self._names)


def read_histories(path) -> dict:
    """Histories written by :func:`write_histories` as a dict of column arrays."""
    import h5py

    path = Path(path)
    if not path.exists():
        raise BhgrowInputError(f"{path}: missing", source=str(path), rule="no_file")
    try:
        with h5py.File(path, "r") as h5:
            return {k: h5[k][()] for k in h5 if k != "index"}
    except OSError as exc:
        raise BhgrowInputError(f"{path}: not a readable HDF5 file ({exc})", source=str(path),
                               rule="not_hdf5") from None
