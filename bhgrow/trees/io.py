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
from pathlib import Path

import numpy as np

from ..errors import BhgrowInputError
from .forest import Forest
from .validate import OPTIONAL_COLUMNS, REQUIRED_COLUMNS

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
    try:
        with h5py.File(tmp, "w") as h5:
            h5.attrs["format"] = FORMAT_NAME
            h5.attrs["schema_version"] = SCHEMA_VERSION
            if forest.box_mpc is not None:
                h5.attrs["box_mpc"] = float(forest.box_mpc)
            h5.attrs["meta_json"] = json.dumps(forest.meta, sort_keys=True, default=str)
            g = h5.create_group("nodes")
            for name in ("node_id", "desc_id", "forest_id", "snap", "mass_msun"):
                g.create_dataset(name, data=getattr(forest, name), **_COMPRESS)
            for name, arr in forest.extra.items():
                g.create_dataset(name, data=arr, **_COMPRESS)
            s = h5.create_group("snapshots")
            s.create_dataset("snap", data=forest.snapshots.snap)
            s.create_dataset("z", data=forest.snapshots.z)
            if forest.forest_weight is not None:
                f = h5.create_group("forests")
                f.create_dataset("forest_id", data=forest.forest_ids)
                f.create_dataset("weight_mpc3", data=forest.forest_weight)
        atomic_replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return path


def _read_dataset(h5, name: str, source: str):
    ds = h5[name]
    if not hasattr(ds, "shape"):
        raise BhgrowInputError(f"{source}: `{name}` is a group, expected a 1-D dataset",
                               source=source, rule="wrong_layout")
    if ds.ndim != 1:
        raise BhgrowInputError(f"{source}: dataset `{name}` must be 1-D; has shape {ds.shape}",
                               source=source, rule="wrong_layout")
    arr = ds[()]
    if arr.dtype.kind not in "iufb":
        raise BhgrowInputError(f"{source}: [wrong_dtype] dataset `{name}` must be numeric; "
                               f"has dtype {arr.dtype}", source=source, rule="wrong_dtype")
    return arr


def read_hdf5(path) -> Forest:
    """Read and validate a forest written in bhgrow's HDF5 layout."""
    import h5py

    path = Path(path)
    source = str(path)
    _require_file(path)
    try:
        h5 = h5py.File(path, "r")
    except OSError as exc:
        raise BhgrowInputError(f"{source}: not a readable HDF5 file ({exc})", source=source,
                               rule="not_hdf5") from None
    with h5:
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
        cols = {name: _read_dataset(h5, f"nodes/{name}", source) for name in h5["nodes"]}
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
    return Forest.from_columns(cols, snap, z, box_mpc=box, forest_weight=weights, meta=meta,
                               source=source)


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
    if path.suffix.lower() in (".h5", ".hdf5", ".hdf"):
        if columns or h is not None or snapshots is not None:
            raise BhgrowInputError(f"{path}: column maps, --h and --snapshots apply to tables "
                                   f"(CSV/Parquet), not to bhgrow HDF5 files", source=str(path),
                                   rule="bad_option")
        forest = read_hdf5(path)
        if box_mpc is not None:
            forest.box_mpc = float(box_mpc)
        return forest
    return read_table(path, columns=columns, h=h, snapshots=snapshots, box_mpc=box_mpc)
