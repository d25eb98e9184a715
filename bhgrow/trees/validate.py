"""Vectorized validation of merger-tree columns (DESIGN §5).

:func:`find_problems` checks every rule at once and returns a list of :class:`Problem`;
:func:`validate` raises one :class:`~bhgrow.errors.BhgrowInputError` that lists them all,
naming the file, the rule and the first offending node ids. No Python loop over nodes:
every check is a numpy expression, and the cycle check uses pointer doubling
(O(N log N)).

Rules
-----
============================ ==========================================================
``missing_columns``          a required column is absent
``empty``                    no rows at all
``wrong_layout``             a column is not a 1-D array
``wrong_dtype``              ids/snap not integers, mass not numeric, NaN in an id column
``negative_ids``             a ``node_id`` below 0 (``-1`` is the root marker of ``desc_id``)
``duplicate_ids``            a ``node_id`` occurs more than once
``bad_mass``                 a mass that is NaN, infinite, zero or negative
``bad_snapshot_table``       snapshot numbers repeated, redshifts non-finite/negative, or
                             redshift not strictly decreasing with snapshot number
``unknown_snapshots``        a node's ``snap`` is not in the snapshot table
``missing_descendants``      ``desc_id`` is not -1 and names no node
``descendant_not_later``     the descendant is not at a later snapshot (lower redshift)
``cycles``                   following descendants never reaches a root
``cross_forest_links``       a node and its descendant carry different ``forest_id``
``bad_weights``              ``weight_mpc3`` non-finite, negative, or not constant in a forest
``bad_optional_values``      an optional column (gas, metallicity, ...) non-finite or < 0
============================ ==========================================================
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

from ..errors import BhgrowInputError

#: required node columns and the dtype kind each must have ("i" integer, "f" number)
REQUIRED_COLUMNS: dict[str, str] = {
    "node_id": "i",
    "desc_id": "i",
    "forest_id": "i",
    "snap": "i",
    "mass_msun": "f",
}
#: optional node columns (all physical quantities >= 0); see DESIGN §5
OPTIONAL_COLUMNS: dict[str, str] = {
    "weight_mpc3": "comoving number density each forest represents [Mpc^-3]",
    "vmax_kms": "maximum circular velocity [km/s]",
    "rvir_kpc": "virial radius, physical [kpc]",
    "gas_msun": "gas mass [Msun]",
    "metallicity": "gas metallicity, mass fraction (not solar units)",
    "j_lw": "Lyman-Werner intensity [1e-21 erg/s/cm^2/Hz/sr]",
}

#: how many offending ids a message shows per rule
MAX_SHOWN = 10


@dataclass(frozen=True)
class Problem:
    """One broken rule: its name, a sentence, and the first offending ids (or rows)."""

    rule: str
    message: str
    ids: tuple = ()
    count: int = 0

    def format(self) -> str:
        shown = ", ".join(str(i) for i in self.ids[:MAX_SHOWN])
        more = f" (and {self.count - MAX_SHOWN} more)" if self.count > MAX_SHOWN else ""
        tail = f": {shown}{more}" if shown else ""
        return f"[{self.rule}] {self.message}{tail}"


def _ids(values, mask) -> tuple:
    sel = np.asarray(values)[mask][:MAX_SHOWN]
    return tuple(v.item() if hasattr(v, "item") else v for v in sel)


def _coerce_int(name: str, values, problems: list[Problem], row_numbers=None):
    """Return an int64 array, or None (with a ``wrong_dtype`` problem) if not integral.

    ``row_numbers`` (optional) are the file rows of ``values``, used in messages.
    """
    arr = np.asarray(values)
    file_rows = np.arange(arr.size) if row_numbers is None else np.asarray(row_numbers)
    if arr.dtype.kind == "u" and arr.size and arr.max() > np.iinfo(np.int64).max:
        rows = file_rows[arr > np.iinfo(np.int64).max]
        problems.append(Problem("wrong_dtype", f"column `{name}` holds values beyond the "
                                f"int64 range at rows", _ids(rows, slice(None)), rows.size))
        return None
    if arr.dtype.kind in "iu":
        return arr.astype(np.int64, copy=False)
    if arr.dtype.kind == "b":
        problems.append(Problem("wrong_dtype", f"column `{name}` must hold integers; got booleans"))
        return None
    if arr.dtype.kind == "f":
        bad = ~np.isfinite(arr) | (arr != np.round(arr)) | (np.abs(arr) > 2.0**53)
        if bad.any():
            rows = file_rows[bad]
            problems.append(Problem(
                "wrong_dtype",
                f"column `{name}` must hold integers; non-integer or missing values at rows",
                _ids(rows, slice(None)), int(bad.sum())))
            return None
        return arr.astype(np.int64)
    problems.append(Problem("wrong_dtype",
                            f"column `{name}` must hold integers; got dtype {arr.dtype}"))
    return None


def _coerce_float(name: str, values, problems: list[Problem]):
    arr = np.asarray(values)
    if arr.dtype.kind in "iuf":
        return arr.astype(np.float64, copy=False)
    problems.append(Problem("wrong_dtype",
                            f"column `{name}` must hold numbers; got dtype {arr.dtype}"))
    return None


def check_snapshot_table(snap_nums, snap_z) -> list[Problem]:
    """Rules on the snapshot table alone (see module docstring)."""
    problems: list[Problem] = []
    if np.size(snap_nums) == 0 and np.size(snap_z) == 0:  # e.g. a header-only CSV (dtype object)
        return [Problem("bad_snapshot_table", "the snapshot table is empty")]
    s = _coerce_int("snapshots/snap", snap_nums, problems)
    z = _coerce_float("snapshots/z", snap_z, problems)
    if s is None or z is None:
        return problems
    if s.shape != z.shape or s.ndim != 1:
        return [Problem("bad_snapshot_table", "snapshot numbers and redshifts differ in length")]
    if s.size == 0:
        return [Problem("bad_snapshot_table", "the snapshot table is empty")]
    order = np.argsort(s, kind="stable")
    s, z = s[order], z[order]
    dup = np.r_[False, s[1:] == s[:-1]]
    if dup.any():
        problems.append(Problem("bad_snapshot_table", "snapshot numbers repeated",
                                _ids(s, dup), int(dup.sum())))
    bad_z = ~np.isfinite(z) | (z < 0)
    if bad_z.any():
        problems.append(Problem("bad_snapshot_table",
                                "snapshot redshifts must be finite and >= 0; bad at snaps",
                                _ids(s, bad_z), int(bad_z.sum())))
    elif not dup.any():
        non_dec = np.r_[False, z[1:] >= z[:-1]]
        if non_dec.any():
            problems.append(Problem(
                "bad_snapshot_table",
                "redshift must decrease strictly as the snapshot number grows; fails at snaps",
                _ids(s, non_dec), int(non_dec.sum())))
    return problems


def layout_problems(shapes: dict) -> list[Problem]:
    """Rules on the column set and shapes alone (no data needed).

    Parameters
    ----------
    shapes : dict of str -> tuple
        Shape of each node column (bhgrow names), e.g. from HDF5 datasets.

    Returns
    -------
    list of Problem
        ``missing_columns``, ``wrong_layout``, unequal lengths (``wrong_dtype``) or
        ``empty``; at most one, as the other rules cannot be checked without it.
    """
    missing = [c for c in REQUIRED_COLUMNS if c not in shapes]
    if missing:
        return [Problem("missing_columns",
                        "required columns absent: " + ", ".join(f"`{c}`" for c in missing)
                        + "; present: " + ", ".join(f"`{c}`" for c in shapes))]
    not_1d = [c for c in shapes if len(shapes[c]) != 1]
    if not_1d:
        return [Problem("wrong_layout", "columns must be 1-D arrays; not 1-D: "
                        + ", ".join(f"`{c}` (shape {tuple(shapes[c])})" for c in not_1d))]
    lengths = {int(shapes[c][0]) for c in shapes}
    if len(lengths) != 1:
        return [Problem("wrong_dtype", "columns differ in length: "
                        + ", ".join(f"`{c}`={int(shapes[c][0])}" for c in shapes))]
    if lengths.pop() == 0:
        return [Problem("empty", "the file holds no tree nodes")]
    return []


def find_problems(columns: dict, snap_nums, snap_z, *, row_numbers=None,
                  check_snapshots: bool = True, links: dict | None = None) -> list[Problem]:
    """Check node columns against every rule of DESIGN §5.

    Parameters
    ----------
    columns : dict of str -> array_like
        Node columns (bhgrow names). Must hold the :data:`REQUIRED_COLUMNS`.
    snap_nums, snap_z : array_like
        The snapshot table: snapshot numbers and their redshifts.
    row_numbers : array_like of int, optional
        File row of each node (messages that name rows use them); default ``0 .. n-1``.
        Used when the columns are one chunk of a larger file.
    check_snapshots : bool
        Also check the snapshot table itself (a chunked check does it once).
    links : dict, optional
        Filled with ``node_id``, ``desc_id``, ``snap`` and ``row`` of the nodes whose
        descendant is not among these columns (each an int64 array), so a chunked check can
        look them up in the rest of the file (:class:`ChunkedCheck`).

    Returns
    -------
    list of Problem
        Empty when the forest is valid.
    """
    problems = layout_problems({c: np.shape(columns[c]) for c in columns})
    if problems:
        return problems
    file_rows = (np.arange(len(np.atleast_1d(columns["node_id"]))) if row_numbers is None
                 else np.asarray(row_numbers))
    node = _coerce_int("node_id", columns["node_id"], problems, file_rows)
    desc = _coerce_int("desc_id", columns["desc_id"], problems, file_rows)
    forest = _coerce_int("forest_id", columns["forest_id"], problems, file_rows)
    snap = _coerce_int("snap", columns["snap"], problems, file_rows)
    mass = _coerce_float("mass_msun", columns["mass_msun"], problems)
    if check_snapshots:
        problems += check_snapshot_table(snap_nums, snap_z)
    if mass is not None:
        bad = ~np.isfinite(mass) | (mass <= 0)
        if bad.any() and node is not None:
            problems.append(Problem("bad_mass", "halo masses must be finite and > 0; bad at nodes",
                                    _ids(node, bad), int(bad.sum())))
        elif bad.any():
            problems.append(Problem("bad_mass", "halo masses must be finite and > 0; bad at rows",
                                    _ids(file_rows, bad), int(bad.sum())))
    for name in OPTIONAL_COLUMNS:
        if name not in columns:
            continue
        arr = _coerce_float(name, columns[name], problems)
        if arr is None:
            continue
        bad = ~np.isfinite(arr) | (arr < 0)
        if bad.any():
            rule = "bad_weights" if name == "weight_mpc3" else "bad_optional_values"
            who = node if node is not None else file_rows
            problems.append(Problem(rule, f"`{name}` must be finite and >= 0; bad at nodes",
                                    _ids(who, bad), int(bad.sum())))
        elif name == "weight_mpc3" and forest is not None:
            problems += _check_weights(forest, arr)
    if node is None or desc is None or forest is None or snap is None:
        return problems

    # --- ids -------------------------------------------------------------------------------
    neg = node < 0
    if neg.any():
        problems.append(Problem("negative_ids", "node ids must be >= 0; negative ids",
                                _ids(node, neg), int(neg.sum())))
    # ids dense and unique (the usual case): rows by a look-up table; else sort and search
    table = id_table(node)
    if table is None:
        order = np.argsort(node, kind="stable")
        sorted_ids = node[order]
        dup = np.r_[False, sorted_ids[1:] == sorted_ids[:-1]]
        if dup.any():
            dup_ids = np.unique(sorted_ids[dup])
            problems.append(Problem("duplicate_ids", "node ids occur more than once",
                                    _ids(dup_ids, slice(None)), dup_ids.size))

    # --- snapshots -------------------------------------------------------------------------
    snaps_known = np.asarray(snap_nums).astype(np.int64, copy=False) if np.asarray(
        snap_nums).dtype.kind in "iuf" else np.zeros(0, np.int64)
    known_sorted = np.unique(snaps_known)
    unknown = ~np.isin(snap, known_sorted)
    if unknown.any():
        problems.append(Problem("unknown_snapshots",
                                "nodes sit at snapshots absent from the snapshot table; nodes",
                                _ids(node, unknown), int(unknown.sum())))

    # --- descendants -----------------------------------------------------------------------
    has_desc = desc != -1
    if table is None:
        pos = np.searchsorted(sorted_ids, desc)
        pos_c = np.minimum(pos, sorted_ids.size - 1)
        found = has_desc & (sorted_ids[pos_c] == desc)
        desc_idx = np.where(found, order[pos_c], -1)
    else:
        desc_idx = np.where(has_desc, rows_of_ids(table, desc), -1)
        found = desc_idx >= 0
    missing_desc = has_desc & ~found
    if links is not None:
        links.update(node_id=node[missing_desc], desc_id=desc[missing_desc],
                     snap=snap[missing_desc], row=file_rows[missing_desc])
    if missing_desc.any():
        problems.append(Problem(
            "missing_descendants", "descendant ids name no node in the file; nodes",
            _ids(node, missing_desc), int(missing_desc.sum())))

    linked = desc_idx >= 0
    self_link = linked & (desc == node)
    earlier = linked & (snap[np.maximum(desc_idx, 0)] <= snap)   # descendant not later
    if not unknown.any():
        not_later = earlier & ~self_link
        if not_later.any():
            problems.append(Problem(
                "descendant_not_later",
                "descendant is not at a later snapshot than its progenitor; nodes",
                _ids(node, not_later), int(not_later.sum())))
    # every link going to a later snapshot: chains end, no cycle (nor self link) is possible
    cyc = (_nodes_on_cycles(desc_idx) | self_link) if earlier.any() else \
        np.zeros(node.size, dtype=bool)
    if cyc.any():
        problems.append(Problem("cycles",
                                "following descendants loops back and never reaches a root; nodes",
                                _ids(node, cyc), int(cyc.sum())))
    cross = linked & (forest[np.maximum(desc_idx, 0)] != forest)
    if cross.any():
        problems.append(Problem("cross_forest_links",
                                "node and descendant carry different forest_id; nodes",
                                _ids(node, cross), int(cross.sum())))
    return problems


def _check_weights(forest: np.ndarray, weight: np.ndarray) -> list[Problem]:
    order = np.argsort(forest, kind="stable")
    f, w = forest[order], weight[order]
    start = np.r_[True, f[1:] != f[:-1]]
    first_w = w[np.flatnonzero(start)[np.cumsum(start) - 1]]
    differs = w != first_w
    if differs.any():
        bad_forests = np.unique(f[differs])
        return [Problem("bad_weights", "`weight_mpc3` must be the same for every node of a "
                        "forest; differs in forests", _ids(bad_forests, slice(None)),
                        bad_forests.size)]
    return []


def _nodes_on_cycles(desc_idx: np.ndarray) -> np.ndarray:
    """Mask of nodes whose descendant chain never ends (on or leading into a cycle).

    Pointer doubling: after k rounds ``nxt`` is the 2^k-th successor (or -1 once the
    chain has reached a root). With 2^k >= N every finite chain has ended.
    """
    n = desc_idx.size
    nxt = desc_idx.copy()
    rounds = max(1, int(np.ceil(np.log2(max(n, 2)))) + 1)
    # only the rows still alive are updated: a chain that has ended stays at -1, so the
    # rows shrink every round (short trees: most end in the first few rounds)
    alive = np.flatnonzero(nxt >= 0)
    for _ in range(rounds):
        if not alive.size:
            break
        nxt[alive] = nxt[nxt[alive]]
        alive = alive[nxt[alive] >= 0]
    return nxt >= 0


#: an id -> row look-up table is used when the ids span at most this many times as many
#: values as there are rows (plus :data:`ID_TABLE_MIN`): a table of int32 rows of at most 64
#: bytes per node (8x the id column); sparser ids are sorted and searched. 16 since
#: 2026-12-03 (was 8): a chunk of a file whose ids are numbered across forests (each
#: chunk's 2e6 ids spread over 2.15e7 values) was searched, at 1.4 s per chunk checked and
#: 1.8 s per chunk read, against 0.47 and 0.74 s with the table (traced peak of a check
#: task 232 -> 252 MB)
ID_TABLE_SPAN = 16
ID_TABLE_MIN = 1 << 16
#: unique ids spanning more values than that, up to this many per row, are looked up by
#: rank instead (:class:`_RankTable`: one bit per id value and a count per 64 values,
#: ~span/4 bytes per node: 64 at 256). Measured 2026-12-03 on a 5.4e7-node file numbered
#: across forests (27 values per id in each 2e6-node chunk): the check took 23.8 s with
#: one worker, 10.5 s of it in binary searches of the sorted ids
RANK_TABLE_SPAN = 256


class _RankTable:
    """Rows of unique ids by rank: a bitmap of the ids' span (bit ``i - lo`` set for each
    id ``i``), the number of set bits before each 64-bit word, and the rows in id order.
    The row of an id is ``order[rank]``, ``rank`` the number of ids below it; an id whose
    bit is clear has no row. Needs numpy's ``bitwise_count`` (numpy >= 2.0)."""

    def __init__(self, ids: np.ndarray, lo: int, hi: int):
        self.lo, self.hi = lo, hi
        k = ids - np.int64(lo)                          # 0 .. hi - lo: no overflow
        self.order = np.argsort(k, kind="stable")
        ks = k[self.order]
        self.unique = not (ks.size > 1 and bool(np.any(ks[1:] == ks[:-1])))
        if not self.unique:
            return
        n_words = ((hi - lo) >> 6) + 1
        self.words = np.zeros(n_words, dtype=np.uint64)
        w = ks >> 6
        bits = np.left_shift(np.uint64(1), (ks & 63).astype(np.uint64))
        first = np.flatnonzero(np.r_[True, w[1:] != w[:-1]])   # ids sorted: one OR per word
        self.words[w[first]] = np.bitwise_or.reduceat(bits, first)
        self.before = np.zeros(n_words, dtype=np.int64)
        np.cumsum(np.bitwise_count(self.words[:-1]), out=self.before[1:])

    def rows(self, wanted: np.ndarray) -> np.ndarray:
        inside = (wanted >= self.lo) & (wanted <= self.hi)
        # clipped before the subtraction: ids far outside would overflow int64
        q = np.clip(wanted, self.lo, self.hi) - np.int64(self.lo)
        w = q >> 6
        b = (q & 63).astype(np.uint64)
        word = self.words[w]
        present = ((word >> b) & np.uint64(1)).astype(bool)
        rank = self.before[w] + np.bitwise_count(word & ((np.uint64(1) << b) - np.uint64(1)))
        rank = np.minimum(rank, self.order.size - 1)   # any row where absent (masked below)
        return np.where(inside & present, self.order[rank], np.int64(-1))


def id_table(ids: np.ndarray):
    """A look-up table from ids to rows, or None if the ids repeat or are too sparse.

    Parameters
    ----------
    ids : ndarray of int64
        Node ids, one per row.

    Returns
    -------
    object or None
        A table for :func:`rows_of_ids`: ``(lo, table)`` with ``table[i - lo]`` the row of
        id ``i`` (-1 if no row has it) where the ids span at most ``ID_TABLE_SPAN *
        ids.size + ID_TABLE_MIN`` values, else a :class:`_RankTable` up to
        ``RANK_TABLE_SPAN`` values per id (int64 ids, numpy >= 2.0); None if ``ids`` is
        empty, holds an id twice, or spans more.
    """
    n = ids.size
    if n == 0:
        return None
    lo, hi = int(ids.min()), int(ids.max())
    if hi - lo + 1 > ID_TABLE_SPAN * n + ID_TABLE_MIN:   # Python ints: no overflow
        if (hi - lo + 1 > RANK_TABLE_SPAN * n + ID_TABLE_MIN or ids.dtype != np.int64
                or not hasattr(np, "bitwise_count")):
            return None
        table = _RankTable(ids, lo, hi)
        return table if table.unique else None
    # int32 rows where they fit: a smaller table to fill and to read from
    dtype = np.int32 if n < 2**31 else np.int64
    table = np.full(hi - lo + 1, -1, dtype=dtype)
    k = ids - lo
    rows = np.arange(n, dtype=dtype)
    table[k] = rows
    # a repeated id keeps one of its rows only: then not every row reads itself back
    if not np.array_equal(table[k], rows):
        return None
    return lo, table


def rows_of_ids(table, wanted: np.ndarray) -> np.ndarray:
    """Rows (int64) of the ids ``wanted`` in a table of :func:`id_table`, -1 where absent."""
    if isinstance(table, _RankTable):
        return table.rows(np.asarray(wanted, dtype=np.int64))
    lo, tab = table
    hi = lo + tab.size - 1
    inside = (wanted >= lo) & (wanted <= hi)
    # clipped before the subtraction: ids far outside would overflow int64
    got = tab[np.clip(wanted, lo, hi) - lo]
    return np.where(inside, got, np.int64(-1))


# ------------------------------------------------------------------------------------------
# checking a file in chunks of whole forests
# ------------------------------------------------------------------------------------------
#: rules on node / descendant ids, checked only when the four id columns are integers
_ID_RULES = ("negative_ids", "duplicate_ids", "unknown_snapshots", "missing_descendants",
             "descendant_not_later", "cycles", "cross_forest_links")


def _column_of(p: Problem) -> str:
    """The first `column` a problem's message names ("" if none)."""
    m = re.search(r"`([^`]+)`", p.message)
    return m.group(1) if m else ""


def _rank(p: Problem) -> int:
    """Position of a problem in :func:`find_problems`'s own reporting order."""
    col = _column_of(p)
    required, optional = list(REQUIRED_COLUMNS), list(OPTIONAL_COLUMNS)
    if p.rule == "wrong_dtype" and col in required:
        return required.index(col)
    if p.rule in ("wrong_dtype", "bad_snapshot_table") and (
            p.rule == "bad_snapshot_table" or col.startswith("snapshots/")):
        return len(required)
    if p.rule == "bad_mass":
        return len(required) + 1
    if col in optional and p.rule in ("wrong_dtype", "bad_weights", "bad_optional_values"):
        return 10 + 2 * optional.index(col) + (p.rule != "wrong_dtype")
    if p.rule in _ID_RULES:
        return 30 + _ID_RULES.index(p.rule)
    return 50


class ChunkedCheck:
    """The rules of :func:`find_problems` for a file read in chunks of whole forests.

    Every chunk is checked with :func:`find_problems` as it is read (:meth:`add_chunk`).
    Two rules reach across forests and are completed over the whole file by the reader:

    * node ids unique across the file: the reader finds the repeated ids (from the ids of
      its chunk pass, or by streaming the ``node_id`` column) and hands them to
      :meth:`set_duplicates`; :meth:`repeats_within_chunks` tells it whether a chunk held
      an id twice;
    * a descendant outside its chunk: :meth:`outside_descendants` lists the ids to look
      up, and :meth:`resolve` takes the ids found in the file with their snapshots; found
      ones are ``cross_forest_links`` (and ``descendant_not_later`` if not later), the rest
      ``missing_descendants``.

    :meth:`problems` then merges the chunks' problems rule by rule (ids in chunk order,
    counts summed), in the order :func:`find_problems` reports them, so a file checked in
    chunks gives the same error lines as the whole file checked at once. Two differences
    remain in files that break several rules at once: descendant chains that loop through
    other forests are reported as cross-forest links (not also as cycles), and a descendant
    id naming several nodes (``duplicate_ids``) is resolved within its chunk, so the rules
    that follow from it may name other nodes.

    Parameters
    ----------
    snap_nums, snap_z : array_like
        The file's snapshot table (checked once, here).
    """

    def __init__(self, snap_nums, snap_z):
        self.snap_nums, self.snap_z = snap_nums, snap_z
        self._chunks: list[list[Problem]] = [check_snapshot_table(snap_nums, snap_z)]
        self._links: list[dict] = [{}]
        self._duplicates: np.ndarray | None = None
        self._found: tuple | None = None
        self._repeats_within = False

    def add_chunk(self, columns: dict, row_numbers=None) -> None:
        """Check one chunk of whole forests (``row_numbers``: their file rows)."""
        self.add_found(*self.check_chunk(columns, self.snap_nums, self.snap_z, row_numbers))

    @staticmethod
    def check_chunk(columns: dict, snap_nums, snap_z, row_numbers=None) -> tuple:
        """The rules on one chunk alone: ``(problems, links)`` for :meth:`add_found` (so
        chunks can be checked in other processes and added here in file order)."""
        links: dict = {}
        found = find_problems(columns, snap_nums, snap_z, row_numbers=row_numbers,
                              check_snapshots=False, links=links)
        return found, links

    def add_found(self, found: list, links: dict) -> None:
        """Add the result of :meth:`check_chunk` for the next chunk."""
        self._repeats_within |= any(p.rule == "duplicate_ids" for p in found)
        self._chunks.append([p for p in found
                             if p.rule not in ("duplicate_ids", "missing_descendants")])
        self._links.append(links)

    def repeats_within_chunks(self) -> bool:
        """Whether a node id occurs twice within one chunk (ids repeated across chunks are
        the reader's to find)."""
        return self._repeats_within

    def id_columns_ok(self) -> bool:
        """False if an id column is not integral (the id rules are then not checked)."""
        ids = ("node_id", "desc_id", "forest_id", "snap")
        return not any(p.rule == "wrong_dtype" and _column_of(p) in ids
                       for ps in self._chunks for p in ps)

    def outside_descendants(self) -> np.ndarray:
        """Sorted unique descendant ids not found in their own chunk (to look up)."""
        parts = [d["desc_id"] for d in self._links if d.get("desc_id") is not None]
        return np.unique(np.concatenate(parts)) if parts else np.zeros(0, np.int64)

    def resolve(self, found_ids, found_snap) -> None:
        """Ids of :meth:`outside_descendants` present in the file, and their snapshots."""
        o = np.argsort(found_ids, kind="stable")
        self._found = (np.asarray(found_ids, np.int64)[o], np.asarray(found_snap, np.int64)[o])

    def set_duplicates(self, ids) -> None:
        """Node ids that occur more than once in the whole file (sorted, unique)."""
        self._duplicates = np.asarray(ids, dtype=np.int64)

    def problems(self) -> list[Problem]:
        """Every broken rule of the file, merged over chunks (empty when valid)."""
        found_ids, found_snap = self._found if self._found is not None else (
            np.zeros(0, np.int64), np.zeros(0, np.int64))
        lists = []
        for chunk, links in zip(self._chunks, self._links):
            extra = []
            if links.get("desc_id") is not None and links["desc_id"].size:
                d, node = links["desc_id"], links["node_id"]
                pos = np.minimum(np.searchsorted(found_ids, d), max(found_ids.size - 1, 0))
                hit = (found_ids[pos] == d) if found_ids.size else np.zeros(d.size, bool)
                if (~hit).any():
                    extra.append(Problem("missing_descendants",
                                         "descendant ids name no node in the file; nodes",
                                         _ids(node, ~hit), int((~hit).sum())))
                if hit.any():
                    late = hit.copy()
                    late[hit] = found_snap[pos[hit]] <= links["snap"][hit]
                    if late.any():
                        extra.append(Problem(
                            "descendant_not_later",
                            "descendant is not at a later snapshot than its progenitor; nodes",
                            _ids(node, late), int(late.sum())))
                    extra.append(Problem("cross_forest_links",
                                         "node and descendant carry different forest_id; nodes",
                                         _ids(node, hit), int(hit.sum())))
            lists.append(chunk + extra)
        if self._duplicates is not None and self._duplicates.size:
            lists.append([Problem("duplicate_ids", "node ids occur more than once",
                                  _ids(self._duplicates, slice(None)),
                                  int(self._duplicates.size))])
        out = merge_problems(lists)
        if any(p.rule == "unknown_snapshots" for p in out):   # as in find_problems
            out = [p for p in out if p.rule != "descendant_not_later"]
        if not self.id_columns_ok():
            out = [p for p in out if p.rule not in _ID_RULES]
        return sorted(out, key=_rank)                           # stable: chunk order kept


def merge_problems(lists) -> list[Problem]:
    """Merge problem lists of consecutive chunks: one problem per (rule, message), its ids
    in chunk order (the first :data:`MAX_SHOWN`) and its count summed."""
    merged: dict = {}
    for problems in lists:
        for p in problems:
            entry = merged.setdefault((p.rule, p.message), [p.rule, p.message, [], 0])
            entry[2].extend(p.ids[:max(0, MAX_SHOWN - len(entry[2]))])
            entry[3] += p.count
    return [Problem(rule, message, tuple(ids), count)
            for rule, message, ids, count in merged.values()]


def validate(columns: dict, snap_nums, snap_z, *, source: str = "<memory>") -> None:
    """Raise :class:`BhgrowInputError` listing every broken rule, or return None."""
    problems = find_problems(columns, snap_nums, snap_z)
    if problems:
        raise_problems(problems, source)


def raise_problems(problems: list[Problem], source: str):
    lines = "\n".join("  " + p.format() for p in problems)
    raise BhgrowInputError(
        f"{source}: invalid merger tree ({len(problems)} rule(s) broken)\n{lines}",
        source=source, rule=problems[0].rule, rows=problems[0].ids)
