"""From a config and a tree file to a finished run directory (what `bhgrow run` does)."""

from __future__ import annotations

import math
import os
import shutil
import tempfile
import time
import weakref
from collections.abc import Mapping
from dataclasses import dataclass
from functools import partial
from pathlib import Path

import numpy as np

from . import __version__
from .config import Config, load_config, write_toml
from .cosmology import Cosmology
from .engine import (CHANNEL_NAMES, EJECTED, EJECTED_TRIPLE, SINKING, STATUS_NAMES,
                     BlackHoles)
from .errors import BhgrowInputError
from .output import (HISTORY_COLUMNS, DiskTable, EcsvFile, HistoryStore, RunDirectory,
                     _remove_tree, file_sha256, write_histories, write_json)
from .trees.forest import Forest
from .trees.io import HDF5Forests, is_hdf5_path, load_forest, open_forests

DEMO_TREES = Path(__file__).resolve().parents[1] / "trees_demo" / "tarn_hollow.h5"


def demo_trees_path() -> Path:
    """The bundled demo forests (needs the source checkout, e.g. `pip install -e .`)."""
    if not DEMO_TREES.exists():
        raise BhgrowInputError(f"demo forests not found at {DEMO_TREES}; install bhgrow from "
                               f"its source tree (pip install -e .) or pass --trees FILE",
                               rule="no_file")
    return DEMO_TREES


@dataclass
class RunResult:
    """Everything a run produced. With several chunks, the histories, black holes and
    mergers are kept on disk (:class:`bhgrow.output.HistoryStore`,
    :class:`bhgrow.output.DiskTable`: ``len()``, ``colnames``, ``t[name]`` a column,
    ``t.to_table()`` an astropy Table), so memory does not grow with the trees."""

    black_holes: "object"        # astropy Table, or a DiskTable (several chunks)
    histories: Mapping           # column arrays (dict), or a HistoryStore on disk
    ledger: dict
    baryons: dict
    n_seeds: dict
    provenance: dict
    forest: "Forest | HDF5Forests"  # the trees (a lazily read file: its index only)
    mergers: "object" = None     # one row per coalescence: astropy Table or DiskTable
    pending: "object" = None     # astropy Table, pairs still sinking at the end
    summary: dict | None = None  # headline numbers (when products were written)
    #: the histories file being written in a forked process (run_model's
    #: ``histories_early``), for write_run; None: write_run writes it
    histories_early: "_EarlyHistories | None" = None


class _EarlyHistories:
    """The histories file, written by a forked process (:class:`bhgrow.parallel.ForkedJob`)
    into the scratch directory ``directory`` until :meth:`collect` moves it into place;
    stopped and removed if never collected. :meth:`start` returns None (and removes the
    directory) where the process cannot be forked: the file is then written by
    :func:`write_run` as usual."""

    def __init__(self, histories, directory):
        from .parallel import ForkedJob

        self.directory = Path(directory)
        self.path = self.directory / "histories.h5"
        self.job = ForkedJob(partial(write_histories, histories, self.path))
        self._pid = os.getpid()
        weakref.finalize(self, _drop_job, self.job, str(self.directory), self._pid)

    @classmethod
    def start(cls, histories, directory) -> "_EarlyHistories | None":
        try:
            return cls(histories, directory)
        except OSError:         # no fork (out of memory, process limit): a speed-up only
            shutil.rmtree(directory, ignore_errors=True)
            return None

    def collect(self, dest) -> bool:
        """Wait for the file and move it to ``dest``; False (nothing moved) if its process
        failed or the file cannot be moved there."""
        ok = self.job.wait() and self.path.is_file()
        if ok:
            try:
                shutil.move(self.path, dest)      # a copy where dest is on another disk
            except OSError:
                Path(dest).unlink(missing_ok=True)
                ok = False
        self.cancel()
        return ok

    def cancel(self) -> None:
        """Stop the process if it still runs and remove the scratch directory."""
        _drop_job(self.job, str(self.directory), self._pid)


def _drop_job(job, directory: str, pid: int) -> None:
    if os.getpid() == pid:          # not in a forked copy
        job.cancel()
        shutil.rmtree(directory, ignore_errors=True)


class _ChunkCatalogues:
    """The chunks' black-hole and merger columns, given up by each chunk's result as it
    arrives (:meth:`add`) and read back concatenated, in arrival order, one column at a
    time (:meth:`bh`, :meth:`merger`).

    With a ``directory`` (a run of several chunks) each part is saved there, one ``.npy``
    per column, so the chunks' catalogues never all sit in memory; without, they stay in
    memory (one chunk: its arrays are returned as they are). The directory is removed by
    :meth:`close`, or when the object is garbage-collected.
    """

    def __init__(self, directory=None):
        self.directory = None if directory is None else Path(directory)
        self._bh: list = []
        self._mergers: list = []
        self.n_black_holes = self.n_mergers = 0
        if self.directory is not None:
            self.directory.mkdir(parents=True, exist_ok=True)
            weakref.finalize(self, _remove_tree, str(self.directory), os.getpid())

    def add(self, result) -> None:
        bh = result.black_holes
        cols = {k: np.asarray(getattr(bh, k)) for k in BlackHoles.__dataclass_fields__}
        self._bh.append(self._keep(cols, "bh"))
        self.n_black_holes += len(bh)
        if result.mergers:
            self._mergers.append(self._keep(dict(result.mergers), "mergers"))
            self.n_mergers += int(np.asarray(result.mergers["z"]).size)
        result.black_holes, result.mergers = BlackHoles(), {}      # given up

    def _keep(self, cols: dict, kind: str):
        if self.directory is None:
            return cols
        part = self.directory / f"{kind}-{len(self._bh if kind == 'bh' else self._mergers):05d}"
        part.mkdir()
        for name, arr in cols.items():
            np.save(part / f"{name}.npy", arr, allow_pickle=False)
        return part

    @staticmethod
    def _column(parts: list, name: str) -> np.ndarray:
        arrs = [p[name] if isinstance(p, dict) else
                np.load(p / f"{name}.npy", allow_pickle=False) for p in parts]
        return arrs[0] if len(arrs) == 1 else np.concatenate(arrs)

    def bh(self, field: str) -> np.ndarray:
        """Field ``field`` of :class:`bhgrow.engine.BlackHoles` over every chunk."""
        if not self._bh:
            return getattr(BlackHoles(), field)
        return self._column(self._bh, field)

    def merger(self, name: str) -> np.ndarray:
        """Column ``name`` of the chunks' merger records (at least one merger)."""
        return self._column(self._mergers, name)

    def close(self) -> None:
        if self.directory is not None:
            shutil.rmtree(self.directory, ignore_errors=True)


def _put(table, values, name: str, unit=None, description=None) -> None:
    """Add a column to an astropy Table (sharing ``values``) or a DiskTable."""
    if isinstance(table, DiskTable):
        table.add_column(values, name, unit=unit, description=description)
        return
    table.add_column(values, name=name, copy=False)
    if unit:
        table[name].unit = unit
    if description:
        table[name].description = description


def _names(codes, names, dtype) -> np.ndarray:
    """``names[code]`` of each code (``names``: a sequence, or a mapping of codes) as a
    fixed-width string array, by one look-up table (no Python string per row, which a
    catalogue of millions of rows would hold while it is made)."""
    lookup = names if isinstance(names, Mapping) else dict(enumerate(names))
    table = np.zeros(max(lookup) + 1, dtype=dtype)
    for code, name in lookup.items():
        table[code] = name
    return table[np.asarray(codes, dtype=np.intp)]


def _take_history(result) -> list:
    """The columns of a chunk result's histories (sorted by bh_id, t_gyr); the result gives
    them up."""
    from .engine import History

    hist, result.history = result.history, History()
    # one part of whole columns: a compacted chunk (per-snapshot parts hold scalars)
    single = len(hist.parts) == 1 and np.ndim(hist.parts[0][1]) == 1
    return list(hist.parts[0] if single else hist.columns().values())


def _merge_histories(results: list) -> dict:
    """The chunks' histories as one set of columns sorted by (bh_id, t_gyr).

    Column by column, releasing each chunk's part once it is copied, so the merge holds
    little more than the merged columns (the chunks' results give up their histories).
    """
    from .engine import History

    parts = [_take_history(r) for r in results]
    names = list(History().columns())
    order = np.lexsort((np.concatenate([p[1] for p in parts]),
                        np.concatenate([p[0] for p in parts])))
    out = {}
    for i, name in enumerate(names):
        col = np.concatenate([p[i] for p in parts])
        for p in parts:
            p[i] = None
        out[name] = col[order]
        del col
    return out


def run_model(forest: "Forest | HDF5Forests", config: Config | None = None, *,
              progress: bool = False, trees_path=None, workers: int | None = None, dask=None,
              checkpoint_dir=None, resume: bool = False,
              histories_early: bool = False) -> RunResult:
    """Run the engine over a forest (in chunks of whole forests) and collect the results.

    Chunks are planned by cost, largest first (:func:`bhgrow.parallel.plan_chunks`) and run
    here, in local worker processes or on Dask; with several workers the chunks not yet
    started are re-planned by the time per node measured on the finished ones
    (:class:`bhgrow.parallel.CostRefiner`; ``plan_refinements`` in the provenance). The
    results are the same, bit for bit, for any plan, worker count and backend, and for trees
    in memory or read chunk by chunk. With several chunks, the histories are moved to disk
    chunk by chunk (``histories`` of the result is then a
    :class:`bhgrow.output.HistoryStore`: a mapping of column name to array, read back on
    access); with one chunk they are a dict of arrays.

    Parameters
    ----------
    forest : Forest or HDF5Forests
        Trees in memory, or an HDF5 file opened with :func:`bhgrow.trees.io.open_forests`
        (read one chunk at a time; checked as a whole first if not yet checked).
    config : Config, optional
        Default config when None.
    progress : bool
        Show a progress bar over chunks.
    trees_path : path, optional
        Recorded in the provenance (with its SHA-256).
    workers : int, optional
        Local worker processes (0 = one per CPU core); default ``config.run.workers``.
    dask : str or dask.distributed.Client, optional
        Scheduler address (or a client) to run the chunks on; default
        ``config.run.dask_scheduler`` (empty: no Dask).
    checkpoint_dir : path, optional
        Keep every finished chunk here (:class:`bhgrow.parallel.Checkpoint`).
    resume : bool
        Reuse the finished chunks in ``checkpoint_dir`` (same config and trees).
    histories_early : bool
        With several local (forked) workers and a ``checkpoint_dir``: start writing the
        histories file in a forked process as soon as the chunks are done, while this
        process merges the catalogues (measured: the other core is otherwise idle for
        ~0.8 s of a 2e7-node run); :func:`write_run` moves it into the run directory
        (``histories_early`` of the result).
    """
    from astropy.table import Table

    from . import parallel as par

    config = config or load_config(None)
    cosmo = Cosmology.from_name(config.run.cosmology)
    t0 = time.perf_counter()
    workers = config.run.workers if workers is None else workers
    if isinstance(forest, HDF5Forests) and not forest.checked:
        forest.check(config.run.chunk_nodes, workers)      # local workers, even with Dask
    dask = dask if dask is not None else (config.run.dask_scheduler or None)
    client, owned = par.connect_dask(dask) if dask else (None, False)
    try:
        slots = par.dask_slots(client) if client is not None else par.n_local_workers(workers)
        npf = forest.nodes_per_forest()

        # a file whose rows are grouped by forest: chunks of neighbouring forests, so each
        # chunk is read from one stretch of the file
        contiguous = isinstance(forest, HDF5Forests) and forest.grouped

        def nodes_of(ids):
            return npf[np.searchsorted(forest.forest_ids, ids)]

        def planner(ids, weights_of=None, n_chunks=None):
            if contiguous:
                ids = forest.in_file_order(ids)
            return par.plan_chunks(nodes_of(ids), config.run.chunk_nodes, slots,
                                   forest_ids=ids, contiguous=contiguous,
                                   weights=None if weights_of is None else weights_of(ids),
                                   n_chunks=n_chunks)

        plan = planner(forest.forest_ids)
        ckpt = None
        if checkpoint_dir is not None:
            ckpt = par.Checkpoint.open(checkpoint_dir, plan,
                                       config_sha256=par.config_sha256(config),
                                       trees_sha256=par.forest_sha256(forest), resume=resume,
                                       replan=planner)
            plan = ckpt.plan
        # chunks not yet started are re-planned by the time per node measured on the
        # finished ones (the first plan goes by node count)
        refiner = par.CostRefiner(nodes_of, planner) if slots > 1 else None
        # with several chunks, each chunk's histories go to disk as soon as it is done
        # (HistoryStore), so they are never all in memory; one chunk keeps them in memory
        # (beside the checkpoint, on the output's file system: a temporary directory may be
        # in memory; not inside it: the result outlives the checkpoint)
        # the catalogues (black holes, mergers) likewise, then the run's catalogues are
        # built on disk column by column (DiskTable)
        where = Path(checkpoint_dir) if checkpoint_dir is not None else None

        def scratch(kind):
            # the pid in the name lets a later run remove what a killed one left behind
            # (_sweep_scratch)
            return tempfile.mkdtemp(prefix=f".{where.name}-{kind}-{os.getpid()}-" if where
                                    else f"bhgrow-{kind}-", dir=where.parent if where else None)

        several = len(plan) > 1
        store = HistoryStore(scratch("histories")) if config.run.histories and several \
            else None
        cat = _ChunkCatalogues(scratch("chunk-catalogues") if several else None)

        def spill(i, r):
            if store is not None:
                store.add(dict(zip(HISTORY_COLUMNS, _take_history(r))))
            cat.add(r)
            return r

        # each merger's LISA SNR is made where its chunk runs (in parallel; it depends on
        # the event alone, so it is the same for any plan)
        results = par.run_chunks(forest, plan, config.model, config.run, cosmo,
                                 workers=workers, client=client, checkpoint=ckpt,
                                 progress=progress, refiner=refiner, on_result=spill,
                                 finish=partial(chunk_lisa_snr, config.gw))
    finally:
        if owned:
            client.close()
    hist = store if store is not None else _merge_histories(results)
    # the histories file may be written while the catalogues are merged (run() asks for
    # it when it writes a run directory with several local workers; write_run collects it)
    early = (_EarlyHistories.start(hist, scratch("histories-file"))
             if histories_early and config.run.histories and where is not None
             and client is None and slots > 1 and par.default_start_method() == "fork"
             else None)
    try:
        weights = forest.volume_weight() if (forest.forest_weight is not None
                                             or forest.box_mpc is not None) else None

        def weights_of(forest_ids):
            return (weights[np.searchsorted(forest.forest_ids, forest_ids)] if weights is not None
                    else np.full(forest_ids.size, np.nan))

        # several chunks: the catalogues on disk (only one column at a time in memory)
        on_disk = several and cat.n_black_holes > 0
        table = DiskTable(scratch("black_holes")) if on_disk else Table()
        order = _black_hole_catalogue(cat, weights_of, table)
        wall = time.perf_counter() - t0
        ledger = _combine_ledger([r.ledger for r in results], plan, cat)
        # exactly rounded sums of every forest's total (each summed in an order that does not
        # depend on the chunk): the same, bit for bit, for any plan
        baryons = {"max_relative_excess": max(r.baryons["max_relative_excess"] for r in results),
                   **{f"{k}_msun": math.fsum(np.concatenate(
                       [r.baryons[f"{k}_per_forest"] for r in results])) for k in
                      ("stripped", "outflow")}}
        baryons["tolerance"] = 1e-6
        baryons["ok"] = bool(baryons["max_relative_excess"] <= baryons["tolerance"])
        n_seeds = {k: sum(r.n_seeds[k] for r in results) for k in results[0].n_seeds}
        mergers = _merger_table(cat, weights_of, DiskTable(scratch("mergers"))
                                if several and cat.n_mergers else None,
                                snr_description=f"sky-averaged LISA SNR ({config.gw.waveform}, "
                                                f"{config.gw.mission_yr:g}-yr mission)")
        status = cat.bh("status")
        pending = _pending_table(cat, order[status[order] == SINKING], weights_of, cosmo)
        n_ejected = int(np.isin(status, (EJECTED, EJECTED_TRIPLE)).sum())
        del status
        cat.close()
        prov = {"bhgrow_version": __version__, "seed": config.run.seed,
                "cosmology": cosmo.to_dict(), "trees": str(trees_path) if trees_path else None,
                "trees_sha256": _trees_sha256(forest, trees_path),
                "n_forests": forest.n_forests, "n_nodes": forest.n_nodes,
                "n_chunks": len(plan), "backend": ("dask" if client is not None else
                                                     "processes" if slots > 1 else "serial"),
                "workers": slots, "n_chunks_resumed": ckpt.n_reused if ckpt else 0,
                "plan_refinements": refiner.n_replans if refiner is not None else 0,
                "wall_time_s": wall,
                "nodes_per_s": forest.n_nodes / wall if wall > 0 else None,
                "n_black_holes": len(table), "seeds_per_channel": n_seeds,
                "n_mergers": len(mergers), "n_pending_pairs": len(pending),
                "n_ejected": n_ejected,
                "ledger": {k: v for k, v in ledger.items() if k != "per_forest_residual"},
                "baryons": baryons}
        return RunResult(black_holes=table, histories=hist, ledger=ledger, baryons=baryons,
                         n_seeds=n_seeds, provenance=prov, forest=forest, mergers=mergers,
                         pending=pending, histories_early=early)
    except BaseException:
        if early is not None:
            early.cancel()
        raise


def _sweep_scratch(partial: Path) -> None:
    """Remove the hidden scratch directories (histories, catalogues) that a run of the same
    output left beside it when it was killed (SIGKILL, out of memory: no clean-up ran); those
    of a process still running are kept."""
    for d in partial.parent.glob(f".{partial.name}-*-*-*"):
        parts = d.name[len(partial.name) + 2:].split("-")
        pid = int(parts[-2]) if len(parts) >= 3 and parts[-2].isdigit() else None
        if pid is None or not d.is_dir() or pid == os.getpid():
            continue
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            shutil.rmtree(d, ignore_errors=True)
        except OSError:
            pass                # alive (another user's process): keep


def _trees_sha256(forest, trees_path):
    """SHA-256 of the tree file (computed once for a lazily read file)."""
    if not trees_path:
        return None
    if isinstance(forest, HDF5Forests) and Path(trees_path).resolve() == forest.path.resolve():
        return forest.sha256()
    return file_sha256(trees_path)


_MERGER_COLUMNS = [
    ("forest_id", None, "forest of the host halo"),
    ("weight_mpc3", "Mpc-3", "comoving number density the forest represents"),
    ("z", None, "redshift of coalescence"),
    ("t_gyr", "Gyr", "cosmic time of coalescence"),
    ("m1_msun", "solMass", "primary (heavier) black-hole mass"),
    ("m2_msun", "solMass", "secondary black-hole mass"),
    ("q", None, "mass ratio m2/m1 <= 1"),
    ("chirp_mass_msun", "solMass", "source-frame chirp mass (m1 m2)^(3/5)/(m1+m2)^(1/5)"),
    ("chirp_mass_obs_msun", "solMass", "redshifted chirp mass (1+z) M_c"),
    ("remnant_mass_msun", "solMass", "remnant mass after GW losses"),
    ("remnant_spin", None, "remnant dimensionless spin"),
    ("kick_kms", "km/s", "recoil velocity"),
    ("ejected", None, "kick above the host's central escape speed"),
    ("delay_gyr", "Gyr", "halo merger to coalescence"),
    ("seed_channel_1", None, "seed channel of the primary"),
    ("seed_channel_2", None, "seed channel of the secondary"),
    ("host_mass_msun", "solMass", "host halo mass at coalescence"),
    ("radiated_msun", "solMass", "mass radiated in gravitational waves"),
    ("bh_id_1", None, "primary black-hole id (keeps its id as the remnant)"),
    ("bh_id_2", None, "secondary black-hole id (status merged)"),
]


#: merger columns that are not float64 (as the engine's merger records and the names give)
_MERGER_DTYPES = {"forest_id": np.int64, "bh_id_1": np.int64, "bh_id_2": np.int64,
                  "ejected": np.bool_, "seed_channel_1": "U12", "seed_channel_2": "U12"}

#: black-hole catalogue: column, its :class:`bhgrow.engine.BlackHoles` field (None: the
#: forest's weight), unit, description
_BH_COLUMNS = [
    ("bh_id", "bh_id", None, "black-hole id (= node_id of the halo it was seeded in)"),
    ("forest_id", "forest_id", None, "forest of the host halo"),
    ("seed_channel", "channel", None, "seeding channel: light, heavy, halo_mass or dense_gas"),
    ("seed_z", "seed_z", None, "redshift at seeding"),
    ("seed_mass_msun", "seed_mass", "solMass", "seed mass [Msun]"),
    ("final_mass_msun", "mass", "solMass", "mass at final_z [Msun]"),
    ("accreted_msun", "growth", "solMass",
     "mass gained by accretion after radiative losses [Msun]"),
    ("final_spin", "spin", None, "dimensionless spin at final_z"),
    ("status", "status", None,
     "central; sinking (pending pair, see pending_pairs.ecsv); merged (absorbed by bh_id_1 "
     "of a merger); ejected (recoil above the escape speed); ejected_triple (three-body "
     "slingshot); host_ended (host left the tree early)"),
    ("final_z", "end_z", None, "redshift of the last snapshot the black hole was followed to"),
    ("host_mass_msun", "host_mass", "solMass", "host halo mass at final_z [Msun]"),
    ("weight_mpc3", None, "Mpc-3", "comoving number density the forest represents [Mpc^-3]"),
]


def _black_hole_catalogue(cat: _ChunkCatalogues, weights_of, table) -> np.ndarray:
    """Fill ``table`` (astropy Table or DiskTable) with the black holes sorted by bh_id
    (unique, so any chunk plan gives one table), a column at a time; returns the order
    (positions in the chunks' concatenation)."""
    order = np.argsort(cat.bh("bh_id"), kind="stable")
    for name, field, unit, description in _BH_COLUMNS:
        if field is None:
            col = weights_of(cat.bh("forest_id")[order])
        else:
            col = cat.bh(field)[order]
            if field == "channel":
                col = _names(col, CHANNEL_NAMES, "U12")
            elif field == "status":
                col = _names(col, STATUS_NAMES, "U16")
        _put(table, col, name, unit, description)
        del col
    return order


def _merger_table(cat: _ChunkCatalogues, weights_of, table=None, *, snr_description=""):
    """The mergers sorted by time, then secondary id (unique: a hole is absorbed once), in
    ``table`` (a DiskTable) or a new astropy Table, a column at a time; the LISA SNR
    (made with each chunk, :func:`chunk_lisa_snr`) last."""
    from astropy.table import Table

    columns = _MERGER_COLUMNS + [("lisa_snr", None, snr_description)]
    if not cat.n_mergers:
        # no rows, but the columns, types, units and descriptions of a run with mergers
        t = Table()
        for name, unit, d in columns:
            _put(t, np.zeros(0, dtype=_MERGER_DTYPES.get(name, np.float64)), name, unit, d)
        return t
    t = Table() if table is None else table
    order = np.lexsort((cat.merger("bh_id_2"), cat.merger("t_gyr")))
    for name, unit, d in columns:
        if name == "weight_mpc3":
            col = weights_of(cat.merger("forest_id")[order])
        elif name.startswith("seed_channel"):
            col = _names(cat.merger(name)[order], CHANNEL_NAMES, "U12")
        else:
            col = cat.merger(name)[order]
        _put(t, col, name, unit, d)
        del col
    return t


def chunk_lisa_snr(settings, result, cosmo):
    """Add each merger's sky-averaged LISA SNR (:func:`bhgrow.products.merger_snr`) to a
    chunk's merger records, as ``lisa_snr``: done where the chunk ran
    (:func:`bhgrow.parallel.run_chunks`, ``finish``), in parallel. An event's SNR depends on
    that event alone, so it is the same for any chunk plan (tested)."""
    if result.mergers:
        from .products import merger_snr

        result.mergers["lisa_snr"] = merger_snr(result.mergers, cosmo, settings)
    return result


def _pending_table(cat: _ChunkCatalogues, rows, weights_of, cosmo):
    """Pairs still sinking at the end: the black holes at ``rows`` (positions in the
    chunks' concatenation, in bh_id order; a few per cent of the holes)."""
    from astropy.table import Table

    from .pairs import cosmo_z

    def col(field):
        return cat.bh(field)[rows]

    t0 = float(cosmo.age_gyr(0.0))
    t = Table()
    t["bh_id"] = col("bh_id")
    t["forest_id"] = col("forest_id")
    t["weight_mpc3"] = weights_of(np.asarray(t["forest_id"]))
    t["mass_msun"] = col("mass")
    t["host_mass_msun"] = col("host_mass")
    t["halo_merger_t_gyr"] = col("t_hmerge")
    t["nucleus_t_gyr"] = col("t_df_end")
    tc = col("t_c")
    t["coalescence_t_gyr"] = tc
    t["coalescence_z"] = np.where(tc <= t0, cosmo_z(cosmo, np.minimum(tc, t0)), np.nan)
    t["after_today"] = tc > t0
    for k, u in (("mass_msun", "solMass"), ("host_mass_msun", "solMass"),
                 ("halo_merger_t_gyr", "Gyr"), ("nucleus_t_gyr", "Gyr"),
                 ("coalescence_t_gyr", "Gyr"), ("weight_mpc3", "Mpc-3")):
        t[k].unit = u
    t["coalescence_z"].description = "expected redshift of coalescence (NaN: after today)"
    return t


def _combine_ledger(parts: list, plan: list, cat: _ChunkCatalogues) -> dict:
    """Ledger of the whole run: totals summed exactly (math.fsum: the order of the black
    holes does not matter) over every chunk's black holes, a column at a time, and the
    per-forest residuals in forest-id order, so no number depends on the plan."""
    from .engine import CENTRAL, EJECTED, EJECTED_TRIPLE, HOST_ENDED

    worst = max(p["max_relative_residual"] for p in parts)
    status = cat.bh("status")
    alive = np.isin(status, (CENTRAL, SINKING, HOST_ENDED))
    ejected = np.isin(status, (EJECTED, EJECTED_TRIPLE))
    del status
    mass = cat.bh("mass")
    final, lost = math.fsum(mass[alive]), math.fsum(mass[ejected])
    del mass
    ids = np.concatenate(plan)
    resid = np.concatenate([p["per_forest_residual"] for p in parts])
    return {"max_relative_residual": worst, "ok": bool(worst < 1e-10),
            "tolerance": 1e-10,
            "total_final_msun": final,
            "total_seed_msun": math.fsum(cat.bh("seed_mass")),
            "total_growth_msun": math.fsum(cat.bh("growth")),
            "total_radiated_msun": math.fsum(cat.bh("radiated")),
            "total_ejected_msun": lost,
            "per_forest_residual": resid[np.argsort(ids, kind="stable")]}


#: rows formatted at a time when writing a catalogue (the strings of a slice are held in
#: memory: ~0.14 kB per value, ~28 MB for 10,000 rows of the 21-column merger catalogue)
ECSV_ROWS = 10_000
#: with several workers, a catalogue is written in parts of about this many rows (at most
#: four per worker), which the workers format at once (:class:`bhgrow.output.EcsvFile`)
ECSV_PART_ROWS = 50_000


def write_run(result: RunResult, config: Config, out, *, overwrite: bool = False,
              products: bool = True, workers: int | None = None) -> Path:
    """Write a run directory atomically (see :mod:`bhgrow.output`).

    With ``workers`` (default ``run.workers``) above 1, the files are written by that many
    local workers at once (:func:`bhgrow.parallel.run_tasks`): the figures, the histories,
    the catalogues in parts of rows (joined here afterwards) and the rest; the files are
    the same, byte for byte, as with one. If ``result.histories_early`` holds a histories
    file being written by a forked process (``run_model(histories_early=True)``), that file
    is moved into the run directory instead (written here if its process failed), and the
    field is reset (a second call writes the histories itself).
    """
    from .parallel import default_start_method, n_local_workers, run_tasks

    n_proc = n_local_workers(config.run.workers if workers is None else workers)
    split = n_proc > 1 and default_start_method() == "fork"
    made = f"bhgrow {__version__}"
    with RunDirectory(out, overwrite=overwrite) as tmp:
        def catalogue(table, name, meta):
            parts = min(4 * n_proc, -(-len(table) // ECSV_PART_ROWS)) if split else 1
            return EcsvFile(table, tmp / name, meta, parts=parts, chunk_rows=ECSV_ROWS)

        cats = [catalogue(result.black_holes, "black_holes.ecsv",
                          {"made_by": made, "seed": config.run.seed,
                           "trees": result.provenance.get("trees")}),
                catalogue(result.mergers, "mergers.ecsv",
                          {"made_by": made, "seed": config.run.seed}),
                catalogue(result.pending, "pending_pairs.ecsv",
                          {"made_by": made, "seed": config.run.seed})]
        tasks = []
        # the histories file, unless run_model started it already (histories_early)
        early, result.histories_early = result.histories_early, None
        if config.run.histories and early is None:
            tasks.append(lambda: write_histories(result.histories, tmp / "histories.h5"))
        # dearest parts first, so the last tasks handed out are short: a merger row has
        # about twice the numbers of a black-hole row
        tasks += [partial(c.write_part, k) for c in (cats[1], cats[0], cats[2])
                  for k in range(c.n_parts)]

        def small():
            (tmp / "config.toml").write_text(write_toml(config.table))
            write_json(result.provenance, tmp / "run.json")

        tasks.append(small)
        try:
            if products:
                from .products import make_products

                result.summary = make_products(result, config,
                                               Cosmology.from_name(config.run.cosmology), tmp,
                                               name=Path(out).name, workers=n_proc,
                                               also=tasks)
            else:
                run_tasks(tasks, n_proc, what="writing the run directory")
            for c in cats:
                c.join()
            if early is not None and config.run.histories and \
                    not early.collect(tmp / "histories.h5"):
                # its process failed: written here (an error then says what went wrong)
                write_histories(result.histories, tmp / "histories.h5")
        finally:
            if early is not None:
                early.cancel()
    return Path(out)


def run(config=None, *, trees=None, out=None, overwrite: bool = False,
        progress: bool = False, workers: int | None = None, dask=None,
        resume: bool = False) -> RunResult:
    """Load trees (default: the demo forests), run the model, and optionally write ``out``.

    Parameters
    ----------
    config : Config, path or None
        A loaded config, a TOML path, or None for all defaults.
    trees : Forest, path or None
        An HDF5 file is read lazily, one chunk of whole forests at a time
        (:func:`bhgrow.trees.io.open_forests`; checked as a whole before the run), so memory
        depends on ``run.chunk_nodes``, not on the file; CSV/Parquet tables are read whole.
    out : path, optional
        Run directory to write (refused if it exists unless ``overwrite``). Finished chunks
        are kept in ``<out>.partial/`` until the run directory is written.
    workers : int, optional
        Local worker processes (0 = one per CPU core); default ``run.workers`` of the config.
    dask : str or dask.distributed.Client, optional
        Dask scheduler address; default ``run.dask_scheduler`` of the config.
    resume : bool
        Continue an interrupted run from ``<out>.partial/`` (same config and trees); without
        it an existing ``<out>.partial/`` is refused, or discarded with ``overwrite``.
    """
    from .parallel import Checkpoint

    if not isinstance(config, Config):
        config = load_config(config)
    if isinstance(trees, Forest):
        forest, path = trees, None
    else:
        path = Path(trees) if trees is not None else demo_trees_path()
        if is_hdf5_path(path):
            # the file is checked before the run, by as many local workers as the run has;
            # meanwhile this process sets up the cosmology (astropy's import: ~1 s) and
            # hashes the file. A search for repeated ids keeps its scratch file beside the
            # output (as the run's other scratch: the temporary directory may be in memory)
            near = Path(out).parent if out is not None and Path(out).parent.is_dir() \
                else None
            scratch = tempfile.mkdtemp(prefix=f".{Checkpoint.directory_for(out).name}-ids-"
                                       f"{os.getpid()}-", dir=near) if near else None

            n_check = config.run.workers if workers is None else workers
            from .parallel import default_start_method, n_local_workers

            # figures drawn by a process forked later (several local workers): matplotlib
            # imported here once, beside the check, not on the writing's longest task
            preload = (out is not None and n_local_workers(n_check) > 1
                       and default_start_method() == "fork")

            def meanwhile():
                Cosmology.from_name(config.run.cosmology)
                # the file's SHA-256 (provenance, checkpoint), kept by the forest: read
                # here, not serially before the chunks (0.2 s for a 2e7-node file)
                lazy.sha256()
                if preload:
                    from .plots import preload as import_matplotlib

                    import_matplotlib()

            try:
                lazy = open_forests(path, check=False)
                forest = lazy.check(config.run.chunk_nodes, n_check, meanwhile=meanwhile,
                                    scratch_dir=scratch)
            finally:
                if scratch is not None:
                    shutil.rmtree(scratch, ignore_errors=True)
        else:
            forest = load_forest(path)
    partial = None
    if out is not None:
        out = Path(out)
        if out.exists() and not overwrite:   # fail before the work, not after
            raise BhgrowInputError(f"{out}: run directory exists; refusing to overwrite it "
                                   f"(choose another -o or pass --overwrite)",
                                   source=str(out), rule="exists")
        if not out.parent.exists():
            raise BhgrowInputError(f"{out}: parent directory {out.parent} does not exist",
                                   source=str(out), rule="no_dir")
        partial = Checkpoint.directory_for(out)
        _sweep_scratch(partial)
        if partial.exists() and not resume and overwrite:
            shutil.rmtree(partial)
    result = run_model(forest, config, progress=progress, trees_path=path, workers=workers,
                       dask=dask, checkpoint_dir=partial, resume=resume,
                       histories_early=out is not None)
    if out is not None:
        write_run(result, config, out, overwrite=overwrite, workers=workers)
        shutil.rmtree(partial, ignore_errors=True)
    return result
