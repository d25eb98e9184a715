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
import shutil
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


def write_ecsv(table, path: Path, meta: dict | None = None) -> None:
    """Write an astropy Table as comma-separated ECSV (readable by pandas with comment='#')."""
    if meta:
        table.meta.update(meta)
    table.write(path, format="ascii.ecsv", delimiter=",", overwrite=True)


def write_histories(cols: dict, path: Path) -> None:
    """Histories in HDF5: one dataset per column plus a per-black-hole row index."""
    import h5py

    units = {"t_gyr": "Gyr", "z": "", "mass_msun": "Msun", "mdot_msun_yr": "Msun/yr",
             "eddington_ratio": "", "host_gas_msun": "Msun", "bh_id": ""}
    with h5py.File(path, "w") as h5:
        h5.attrs["format"] = "bhgrow-histories"
        h5.attrs["schema_version"] = 1
        for name, arr in cols.items():
            ds = h5.create_dataset(name, data=arr, compression="gzip", shuffle=True)
            ds.attrs["unit"] = units.get(name, "")
        ids = np.asarray(cols["bh_id"])
        uniq, start = np.unique(ids, return_index=True)
        g = h5.create_group("index")
        g.create_dataset("bh_id", data=uniq)
        g.create_dataset("offset", data=np.r_[start, ids.size].astype(np.int64))


def write_json(obj: dict, path: Path) -> None:
    def plain(o):
        if isinstance(o, np.ndarray):
            return o.tolist()
        if isinstance(o, (np.floating, np.integer, np.bool_)):
            return o.item()
        raise TypeError(type(o))

    path.write_text(json.dumps(obj, indent=2, default=plain, sort_keys=False) + "\n")


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
