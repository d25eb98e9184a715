"""From a config and a tree file to a finished run directory (what `bhgrow run` does)."""

from __future__ import annotations

import math
import shutil
import tempfile
import time
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from . import __version__
from .config import Config, load_config, write_toml
from .cosmology import Cosmology
from .engine import CHANNEL_NAMES, SINKING, STATUS_NAMES, BlackHoles
from .errors import BhgrowInputError
from .output import (HISTORY_COLUMNS, HistoryStore, RunDirectory, file_sha256, write_ecsv,
                     write_histories, write_json)
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
    """Everything a run produced, in memory."""

    black_holes: "object"        # astropy Table
    histories: Mapping           # column arrays (dict), or a HistoryStore on disk
    ledger: dict
    baryons: dict
    n_seeds: dict
    provenance: dict
    forest: "Forest | HDF5Forests"  # the trees (a lazily read file: its index only)
    mergers: "object" = None     # astropy Table, one row per coalescence
    pending: "object" = None     # astropy Table, pairs still sinking at the end
    summary: dict | None = None  # headline numbers (when products were written)


def _merge(parts: list) -> BlackHoles:
    """Concatenate chunk tables, sorted by bh_id (unique), so any chunk plan gives one table.

    Column by column; each part gives up a column once it is copied (the parts are the
    chunks' results, merged once), so the merge holds little more than the merged table.
    """
    out = BlackHoles()
    if not parts:
        return out
    o = np.argsort(np.concatenate([p.bh_id for p in parts]), kind="stable")
    for k in out.__dataclass_fields__:
        dtype = getattr(out, k).dtype
        col = np.concatenate([getattr(p, k) for p in parts]).astype(dtype, copy=False)
        for p in parts:
            setattr(p, k, getattr(p, k)[:0])
        setattr(out, k, col[o])
        del col
    return out


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
              checkpoint_dir=None, resume: bool = False) -> RunResult:
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
        store = None
        if config.run.histories and len(plan) > 1:
            where = Path(checkpoint_dir) if checkpoint_dir is not None else None
            store = HistoryStore(tempfile.mkdtemp(
                prefix=f".{where.name}-histories-" if where else "bhgrow-histories-",
                dir=where.parent if where else None))

        def spill(i, r):
            store.add(dict(zip(HISTORY_COLUMNS, _take_history(r))))
            return r

        results = par.run_chunks(forest, plan, config.model, config.run, cosmo,
                                 workers=workers, client=client, checkpoint=ckpt,
                                 progress=progress, refiner=refiner,
                                 on_result=spill if store is not None else None)
    finally:
        if owned:
            client.close()
    bh = _merge([r.black_holes for r in results])        # sorted by bh_id
    hist = store if store is not None else _merge_histories(results)
    weights = forest.volume_weight() if (forest.forest_weight is not None
                                         or forest.box_mpc is not None) else None
    w = (weights[np.searchsorted(forest.forest_ids, bh.forest_id)] if weights is not None
         else np.full(len(bh), np.nan))
    # the table shares the merged columns (no copies: catalogues grow with the trees)
    table = Table()
    for name, col in (("bh_id", bh.bh_id), ("forest_id", bh.forest_id),
                      ("seed_channel", _names(bh.channel, CHANNEL_NAMES, "U12")),
                      ("seed_z", bh.seed_z), ("seed_mass_msun", bh.seed_mass),
                      ("final_mass_msun", bh.mass), ("accreted_msun", bh.growth),
                      ("final_spin", bh.spin),
                      ("status", _names(bh.status, STATUS_NAMES, "U16")),
                      ("final_z", bh.end_z), ("host_mass_msun", bh.host_mass),
                      ("weight_mpc3", w)):
        table.add_column(col, name=name, copy=False)
    units = {"seed_mass_msun": "solMass", "final_mass_msun": "solMass",
             "accreted_msun": "solMass", "host_mass_msun": "solMass", "weight_mpc3": "Mpc-3"}
    for k, u in units.items():
        table[k].unit = u
    descr = {
        "bh_id": "black-hole id (= node_id of the halo it was seeded in)",
        "forest_id": "forest of the host halo",
        "seed_channel": "seeding channel: light, heavy, halo_mass or dense_gas",
        "seed_z": "redshift at seeding",
        "seed_mass_msun": "seed mass [Msun]",
        "final_mass_msun": "mass at final_z [Msun]",
        "accreted_msun": "mass gained by accretion after radiative losses [Msun]",
        "final_spin": "dimensionless spin at final_z",
        "status": "central; sinking (pending pair, see pending_pairs.ecsv); merged "
                  "(absorbed by bh_id_1 of a merger); ejected (recoil above the escape "
                  "speed); ejected_triple (three-body slingshot); host_ended (host left the "
                  "tree early)",
        "final_z": "redshift of the last snapshot the black hole was followed to",
        "host_mass_msun": "host halo mass at final_z [Msun]",
        "weight_mpc3": "comoving number density the forest represents [Mpc^-3]",
    }
    for k, d in descr.items():
        table[k].description = d
    wall = time.perf_counter() - t0
    ledger = _combine_ledger([r.ledger for r in results], plan, bh)
    # chunk sums: identical for any plan up to round-off in the last digit
    baryons = {"max_relative_excess": max(r.baryons["max_relative_excess"] for r in results),
               "stripped_msun": math.fsum(r.baryons["stripped_msun"] for r in results),
               "outflow_msun": math.fsum(r.baryons["outflow_msun"] for r in results)}
    baryons["tolerance"] = 1e-6
    baryons["ok"] = bool(baryons["max_relative_excess"] <= baryons["tolerance"])
    n_seeds = {k: sum(r.n_seeds[k] for r in results) for k in results[0].n_seeds}
    mergers = _merger_table(results, forest, cosmo)
    from .products import merger_snr

    mergers["lisa_snr"] = merger_snr(mergers, cosmo, config.gw)
    mergers["lisa_snr"].description = (f"sky-averaged LISA SNR ({config.gw.waveform}, "
                                       f"{config.gw.mission_yr:g}-yr mission)")
    pending = _pending_table(bh, forest, cosmo, weights)
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
            "n_black_holes": len(bh), "seeds_per_channel": n_seeds,
            "n_mergers": len(mergers), "n_pending_pairs": len(pending),
            "n_ejected": int(np.isin(bh.status, (4, 5)).sum()),
            "ledger": {k: v for k, v in ledger.items() if k != "per_forest_residual"},
            "baryons": baryons}
    return RunResult(black_holes=table, histories=hist, ledger=ledger, baryons=baryons,
                     n_seeds=n_seeds, provenance=prov, forest=forest, mergers=mergers,
                     pending=pending)


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


def _merger_table(results, forest: Forest, cosmo):
    from astropy.table import Table

    parts = [r.mergers for r in results if r.mergers]
    t = Table()
    if not parts:
        for name, unit, d in _MERGER_COLUMNS:
            t[name] = np.zeros(0, dtype="U12" if name.startswith("seed_channel") else float)
        return t
    order = np.lexsort((np.concatenate([p["bh_id_2"] for p in parts]),
                        np.concatenate([p["t_gyr"] for p in parts])))

    def column(key):
        # each chunk's part gives up the column once it is copied (merged once)
        col = np.concatenate([p[key] for p in parts])
        for p in parts:
            p[key] = p[key][:0]
        return col[order]

    weights = forest.volume_weight() if (forest.forest_weight is not None
                                         or forest.box_mpc is not None) else None
    for name, unit, d in _MERGER_COLUMNS:
        if name == "weight_mpc3":
            col = (weights[np.searchsorted(forest.forest_ids, t["forest_id"])]
                   if weights is not None else np.full(order.size, np.nan))
        elif name.startswith("seed_channel"):
            col = _names(column(name), CHANNEL_NAMES, "U12")
        else:
            col = column(name)
        t.add_column(col, name=name, copy=False)
        if unit:
            t[name].unit = unit
        t[name].description = d
    return t


def _pending_table(bh, forest: Forest, cosmo, weights):
    from astropy.table import Table

    from .engine import SINKING
    from .pairs import cosmo_z

    idx = np.flatnonzero(bh.status == SINKING)
    t0 = float(cosmo.age_gyr(0.0))
    t = Table()
    t["bh_id"] = bh.bh_id[idx]
    t["forest_id"] = bh.forest_id[idx]
    t["weight_mpc3"] = (weights[np.searchsorted(forest.forest_ids, bh.forest_id[idx])]
                        if weights is not None else np.full(idx.size, np.nan))
    t["mass_msun"] = bh.mass[idx]
    t["host_mass_msun"] = bh.host_mass[idx]
    t["halo_merger_t_gyr"] = bh.t_hmerge[idx]
    t["nucleus_t_gyr"] = bh.t_df_end[idx]
    t["coalescence_t_gyr"] = bh.t_c[idx]
    tc = bh.t_c[idx]
    t["coalescence_z"] = np.where(tc <= t0, cosmo_z(cosmo, np.minimum(tc, t0)), np.nan)
    t["after_today"] = tc > t0
    for k, u in (("mass_msun", "solMass"), ("host_mass_msun", "solMass"),
                 ("halo_merger_t_gyr", "Gyr"), ("nucleus_t_gyr", "Gyr"),
                 ("coalescence_t_gyr", "Gyr"), ("weight_mpc3", "Mpc-3")):
        t[k].unit = u
    t["coalescence_z"].description = "expected redshift of coalescence (NaN: after today)"
    return t


def _combine_ledger(parts: list, plan: list, bh: BlackHoles) -> dict:
    """Ledger of the whole run: totals summed exactly (math.fsum) over the merged black
    holes, per-forest residuals in forest-id order, so no number depends on the plan."""
    from .engine import CENTRAL, EJECTED, EJECTED_TRIPLE, HOST_ENDED

    worst = max(p["max_relative_residual"] for p in parts)
    alive = np.isin(bh.status, (CENTRAL, SINKING, HOST_ENDED))
    ejected = np.isin(bh.status, (EJECTED, EJECTED_TRIPLE))
    ids = np.concatenate(plan)
    resid = np.concatenate([p["per_forest_residual"] for p in parts])
    return {"max_relative_residual": worst, "ok": bool(worst < 1e-10),
            "tolerance": 1e-10,
            "total_final_msun": math.fsum(bh.mass[alive]),
            "total_seed_msun": math.fsum(bh.seed_mass),
            "total_growth_msun": math.fsum(bh.growth),
            "total_radiated_msun": math.fsum(bh.radiated),
            "total_ejected_msun": math.fsum(bh.mass[ejected]),
            "per_forest_residual": resid[np.argsort(ids, kind="stable")]}


#: rows formatted at a time when writing a catalogue (the strings of a slice are held in
#: memory: ~0.14 kB per value, ~28 MB for 10,000 rows of the 21-column merger catalogue)
ECSV_ROWS = 10_000


def _write_ecsv_rows(table, path: Path, meta: dict | None = None) -> None:
    """:func:`bhgrow.output.write_ecsv`, formatting at most :data:`ECSV_ROWS` rows at a time.

    The file is the same, byte for byte, as one written whole by astropy (tested).
    """
    write_ecsv(table, path, meta=meta, chunk_rows=ECSV_ROWS)


def write_run(result: RunResult, config: Config, out, *, overwrite: bool = False,
              products: bool = True, workers: int | None = None) -> Path:
    """Write a run directory atomically (see :mod:`bhgrow.output`).

    With ``workers`` (default ``run.workers``) above 1, the figures are drawn by a forked
    process while this one writes the catalogues, histories and tables
    (:func:`bhgrow.products.make_products`); the files are the same.
    """
    from .parallel import n_local_workers

    workers = config.run.workers if workers is None else workers
    with RunDirectory(out, overwrite=overwrite) as tmp:
        def files():
            _write_ecsv_rows(result.black_holes, tmp / "black_holes.ecsv",
                             meta={"made_by": f"bhgrow {__version__}",
                                   "seed": config.run.seed,
                                   "trees": result.provenance.get("trees")})
            _write_ecsv_rows(result.mergers, tmp / "mergers.ecsv",
                             meta={"made_by": f"bhgrow {__version__}", "seed": config.run.seed})
            _write_ecsv_rows(result.pending, tmp / "pending_pairs.ecsv",
                             meta={"made_by": f"bhgrow {__version__}", "seed": config.run.seed})
            if config.run.histories:
                write_histories(result.histories, tmp / "histories.h5")
            (tmp / "config.toml").write_text(write_toml(config.table))
            write_json(result.provenance, tmp / "run.json")

        if products:
            from .products import make_products

            result.summary = make_products(result, config,
                                           Cosmology.from_name(config.run.cosmology), tmp,
                                           name=Path(out).name,
                                           workers=n_local_workers(workers), also=files)
        else:
            files()
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
            # meanwhile this process sets up the cosmology (astropy's import: ~0.5 s)
            forest = open_forests(path, check=False).check(
                config.run.chunk_nodes, config.run.workers if workers is None else workers,
                meanwhile=lambda: Cosmology.from_name(config.run.cosmology))
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
        if partial.exists() and not resume and overwrite:
            shutil.rmtree(partial)
    result = run_model(forest, config, progress=progress, trees_path=path, workers=workers,
                       dask=dask, checkpoint_dir=partial, resume=resume)
    if out is not None:
        write_run(result, config, out, overwrite=overwrite, workers=workers)
        shutil.rmtree(partial, ignore_errors=True)
    return result
