"""Products of a run: tables, GW observables, figures and the summary.

:func:`make_products` turns a finished run (in memory) into ``tables/``, ``figures/``,
``summary.md`` and ``summary.json`` inside a run directory; :func:`products_from_run` does the
same from the files of a finished run (``bhgrow tables RUN_DIR``), without rerunning.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from . import __version__, _validate
from . import gw as gwmod
from . import plots
from .errors import BhgrowInputError
from .output import HistoryFile, OnDiskHistories
from .physics.seeding import CHANNEL_CODES
from .tables import _name_codes, build_tables, history_rows, write_tables

#: measured nHz background amplitude at f = 1/yr reported by NANOGrav from its 15-year data
#: set (Agazie et al. 2023, ApJL 951, L8): 2.4e-15 (memory; median for a -2/3 spectrum)
PTA_2023_HC_1YR = 2.4e-15


@dataclass(frozen=True)
class GWSettings:
    """Gravitational-wave products.

    Parameters
    ----------
    mission_yr : float
        LISA mission length in years (0.5, 1, 2 or 4 with galactic confusion noise; Robson,
        Cornish & Liu 2019, Table 1).
    confusion : bool
        Include the galactic confusion noise (Robson, Cornish & Liu 2019, eq. 14).
    snr_threshold : float
        Sky-averaged SNR above which a merger counts as a LISA detection (8 is customary).
    waveform : str
        "phenom_a" (inspiral-merger-ringdown amplitude, Ajith et al. 2008) or "inspiral"
        (Newtonian inspiral to the ISCO).
    """

    mission_yr: float = 4.0
    confusion: bool = True
    snr_threshold: float = 8.0
    waveform: str = "phenom_a"

    def __post_init__(self):
        _validate.positive("gw", "mission_yr", self.mission_yr)
        _validate.positive("gw", "snr_threshold", self.snr_threshold)
        _validate.one_of("gw", "waveform", self.waveform, ("phenom_a", "inspiral"))
        if not isinstance(self.confusion, bool):
            _validate._fail("gw", "confusion", "true or false", self.confusion)
        gwmod.LISANoise(mission_yr=self.mission_yr, confusion=self.confusion)

    def noise(self) -> "gwmod.LISANoise":
        return gwmod.LISANoise(mission_yr=self.mission_yr, confusion=self.confusion)


def merger_snr(mergers, cosmo, settings: GWSettings) -> np.ndarray:
    """Sky-averaged LISA SNR of every merger in the catalogue."""
    if len(mergers) == 0:
        return np.zeros(0)
    m1 = np.asarray(mergers["m1_msun"], dtype=float)
    m2 = np.asarray(mergers["m2_msun"], dtype=float)
    z = np.maximum(np.asarray(mergers["z"], dtype=float), 1e-4)   # D_L > 0
    noise = settings.noise()
    if settings.waveform == "phenom_a":
        return np.asarray(gwmod.imr_snr(m1, m2, z, cosmo, noise), dtype=float)
    return np.asarray(gwmod.inspiral_snr(m1, m2, z, cosmo, noise), dtype=float)


def gw_summary(mergers, cosmo, settings: GWSettings, z_edges) -> dict:
    """Observed merger rate, LISA detections and the nHz background of a catalogue."""
    out = {"observed_merger_rate_per_yr": 0.0, "lisa_detections_per_yr": 0.0,
           "n_lisa_detected": 0, "hc_1yr": 0.0, "background": None}
    if len(mergers) == 0:
        return out
    z = np.asarray(mergers["z"], dtype=float)
    w = np.asarray(mergers["weight_mpc3"], dtype=float)
    snr = np.asarray(mergers["lisa_snr"], dtype=float)
    edges = np.asarray(z_edges, dtype=float)
    out["observed_merger_rate_per_yr"] = float(gwmod.observed_rate_per_yr(z, w, edges,
                                                                          cosmo)[1])
    out["lisa_detections_per_yr"] = float(gwmod.detection_rate_per_yr(
        z, w, snr, settings.snr_threshold, edges, cosmo))
    out["n_lisa_detected"] = int(np.sum(gwmod.detections(snr, settings.snr_threshold)))
    mc = np.asarray(mergers["chirp_mass_msun"], dtype=float)
    mt = np.asarray(mergers["m1_msun"], dtype=float) + np.asarray(mergers["m2_msun"],
                                                                  dtype=float)
    bg = gwmod.background_table(mc, z, w, m_total_msun=mt)
    out["background"] = bg
    out["hc_1yr"] = float(bg.meta.get("h_c_1yr", gwmod.hc_at_1yr(mc, z, w, m_total_msun=mt)))
    return out


def _summary(provenance: dict, n_seeds: dict, ledger: dict, baryons: dict, gws: dict,
             settings: GWSettings) -> dict:
    hc = gws["hc_1yr"]
    return {
        "bhgrow_version": __version__,
        "n_black_holes": int(provenance.get("n_black_holes", 0)),
        "black_holes_per_channel": {k: int(v) for k, v in n_seeds.items()},
        "n_mergers": int(provenance.get("n_mergers", 0)),
        "n_pending_pairs": int(provenance.get("n_pending_pairs", 0)),
        "n_ejected": int(provenance.get("n_ejected", 0)),
        "observed_merger_rate_per_yr": gws["observed_merger_rate_per_yr"],
        "lisa_detections_per_yr": gws["lisa_detections_per_yr"],
        "lisa_snr_threshold": settings.snr_threshold,
        "lisa_mission_yr": settings.mission_yr,
        "hc_1yr": hc,
        "hc_1yr_over_pta_2023": hc / PTA_2023_HC_1YR if hc else 0.0,
        "ledger_ok": bool(ledger.get("ok")),
        "ledger_max_relative_residual": float(ledger.get("max_relative_residual", 0.0)),
        "baryons_ok": bool(baryons.get("ok")),
    }


def _summary_md(s: dict, name: str) -> str:
    ch = ", ".join(f"{k} {v}" for k, v in s["black_holes_per_channel"].items())
    lines = [
        f"# bhgrow run summary ({name})", "",
        "| quantity | value |", "|---|---|",
        f"| black holes formed | {s['n_black_holes']} ({ch}) |",
        f"| mergers (coalescences) | {s['n_mergers']} |",
        f"| pairs still pending at the end | {s['n_pending_pairs']} |",
        f"| remnants ejected (recoil or triple) | {s['n_ejected']} |",
        f"| observed merger rate, full sky | {s['observed_merger_rate_per_yr']:.4g} per yr |",
        f"| LISA detections (SNR > {s['lisa_snr_threshold']:g}, {s['lisa_mission_yr']:g}-yr "
        f"mission) | {s['lisa_detections_per_yr']:.4g} per yr |",
        f"| nHz background h_c at f = 1/yr | {s['hc_1yr']:.3e} |",
        f"| ratio to the 2023 PTA amplitude 2.4e-15 (NANOGrav 15-yr) | "
        f"{s['hc_1yr_over_pta_2023']:.3g} (a comparison, not a fit) |",
        f"| mass ledger | {'balanced' if s['ledger_ok'] else 'FAILED'} (max relative "
        f"residual {s['ledger_max_relative_residual']:.1e}) |",
        f"| baryon check | {'ok' if s['baryons_ok'] else 'FAILED'} |",
        "", "Rates are per comoving volume as represented by the forest weights (or box); the "
        "observed rate integrates R(z)/(1+z) dV_c/dz over the table's redshift bins.",
        "Tables are in `tables/`, figures in `figures/`.",
    ]
    return "\n".join(lines) + "\n"


def make_figures(tables: dict, mergers, histories, black_holes, gws: dict, settings,
                 fig_dir: Path, *, table_free: bool = True) -> list:
    """Every figure of a run (PNG); with ``table_free=False`` only those drawn from the
    tables (:func:`table_free_figures` draws the others)."""
    fig_dir.mkdir(exist_ok=True)
    out = table_free_figures(histories, black_holes, mergers, settings, fig_dir) \
        if table_free else []
    # merger rate vs z per seed channel of the pair (both the same channel, or "mixed")
    t = tables["observed_merger_rate"]
    rates = {"all": (np.asarray(t["rate_density_mpc3_gyr"]),
                     np.asarray(t["rate_density_mpc3_gyr_err"]))}
    if len(mergers):
        c1 = np.asarray(mergers["seed_channel_1"])
        c2 = np.asarray(mergers["seed_channel_2"])
        # pair classes as small codes: c1's channel where both agree, else "mixed" (-1),
        # in name order; no string array of every merger's pair (catalogues can be large)
        names = list(CHANNEL_CODES)
        same = c1 == c2
        pair = np.where(same, _name_codes(c1, names), -1)
        classes = sorted([(names[i], int(i)) for i in np.unique(pair[same])]
                         + ([("mixed", -1)] if not same.all() else []))
        del c1, c2, same
        z = np.asarray(mergers["z"], dtype=float)
        w = np.asarray(mergers["weight_mpc3"], dtype=float)
        edges = np.r_[np.asarray(t["z_lo"]), np.asarray(t["z_hi"])[-1:]]
        dtg = _bin_gyr(tables)
        for name, i in classes:
            sel = pair == i
            s, _ = np.histogram(z[sel], edges, weights=w[sel])
            s2, _ = np.histogram(z[sel], edges, weights=w[sel] ** 2)
            rates[name] = (s / dtg, np.sqrt(s2) / dtg)
    out.append(plots.merger_rate_vs_z(t["z_lo"], t["z_hi"], rates,
                                      fig_dir / "merger_rate_vs_z.png",
                                      ylabel=r"merger rate density [Mpc$^{-3}$ Gyr$^{-1}$]",
                                      title="black-hole mergers by seed channel of the pair"))
    c = tables["chirp_mass_distribution"]
    out.append(plots.histogram(c["log_mc_lo"], c["log_mc_hi"],
                               {"mergers": c["density_mpc3_dex"]},
                               fig_dir / "chirp_mass_distribution.png",
                               xlabel=r"log$_{10}$ chirp mass M$_c$ [M$_\odot$] (source frame)",
                               ylabel=r"mergers [Mpc$^{-3}$ dex$^{-1}$]",
                               title="chirp-mass distribution of all mergers"))
    mf = tables.get("bh_mass_function")
    if mf is not None and len(mf):
        curves = {}
        for zq in np.unique(np.asarray(mf["z"])):
            s = np.asarray(mf["z"]) == zq
            x = 0.5 * (np.asarray(mf["log_m_lo"])[s] + np.asarray(mf["log_m_hi"])[s])
            curves[f"z = {zq:g}"] = (x, np.asarray(mf["phi_mpc3_dex"])[s],
                                     np.asarray(mf["phi_mpc3_dex_err"])[s])
        out.append(plots.mass_function(curves, fig_dir / "bh_mass_function.png"))
    r = tables["mbh_mhalo"]
    x = 0.5 * (np.asarray(r["log_mhalo_lo"]) + np.asarray(r["log_mhalo_hi"]))
    out.append(plots.mbh_mhalo(x, r["median_log_mbh"], r["p16_log_mbh"], r["p84_log_mbh"],
                               fig_dir / "mbh_mhalo.png"))
    if gws.get("background") is not None:
        bg = gws["background"]
        out.append(plots.gw_background(np.asarray(bg["f_hz"]), np.asarray(bg["h_c"]),
                                       fig_dir / "gw_background.png"))
    return out


def table_free_figures(histories, black_holes, mergers, settings, fig_dir: Path) -> list:
    """The figures drawn from the catalogues alone, not from the tables: the mass histories
    of the most massive black holes (none without ``histories``) and the LISA SNRs of the
    mergers. Their paths."""
    fig_dir.mkdir(exist_ok=True)
    out = []
    if isinstance(histories, OnDiskHistories):
        # on disk: read back only the rows of the black holes the figure shows
        histories = histories.most_massive(plots.N_HISTORIES)
    if histories is not None and len(histories.get("bh_id", [])):
        # the channels of the black holes in these histories only (not a dict of all)
        ids = np.asarray(black_holes["bh_id"])
        shown = np.isin(ids, np.unique(np.asarray(histories["bh_id"])))
        chans = dict(zip(ids[shown].tolist(),
                         np.asarray(black_holes["seed_channel"])[shown].tolist()))
        out.append(plots.mass_histories(histories, fig_dir / "mass_histories.png",
                                        n=plots.N_HISTORIES, seed_channels=chans))
    if len(mergers):
        snr = np.asarray(mergers["lisa_snr"], dtype=float)
        lo = np.arange(-3, 6.5, 0.25)
        cnt, _ = np.histogram(np.log10(np.maximum(snr, 1e-3)), np.r_[lo, 6.5])
        out.append(plots.histogram(lo, lo + 0.25, {"mergers": cnt}, fig_dir /
                                   "lisa_snr.png", xlabel=r"log$_{10}$ sky-averaged LISA SNR",
                                   ylabel="number of mergers in the sample",
                                   vline=float(np.log10(settings.snr_threshold)),
                                   vlabel=f"threshold SNR = {settings.snr_threshold:g}",
                                   title=f"LISA SNR ({settings.mission_yr:g}-yr mission)"))
    return out


def _bin_gyr(tables) -> np.ndarray:
    """Cosmic-time width of each redshift bin, read back from the rate-density table."""
    n = tables["merger_rate_density"]
    zl = np.asarray(n["z_lo"])
    first = np.r_[True, zl[1:] != zl[:-1]]
    return np.asarray(n["dt_gyr"], dtype=float)[first]


def make_products(result, config, cosmo, run_dir: Path, *, name: str | None = None,
                  workers: int = 1, also=()) -> dict:
    """Write tables/, figures/, summary.md and summary.json into ``run_dir``.

    ``also``: other tasks writing files of the run directory (functions of no argument,
    largest first), run with these. With ``workers`` > 1 where workers are forked (Linux),
    the tasks are shared by that many local workers (:func:`bhgrow.parallel.run_tasks`):
    the products' own task (tables, summary, then the figures drawn from them: ~1 s + ~1.5
    s at 2e7 nodes, the largest) goes first to a forked process, the figures drawn from the
    catalogues alone (:func:`table_free_figures`, ~0.5 s) second, the other tasks to
    whichever worker is free; the files are the same either way. (Until 2026-12-03 the
    tables were built here before the tasks, while the other worker waited; until the
    fourteenth session every figure was in the products' task, the longest at 8e6 nodes,
    while the other worker had finished its parts.)
    """
    from .output import write_ecsv, write_json
    from .parallel import run_tasks

    run_dir = Path(run_dir)
    settings = config.gw
    hist = result.histories if config.run.histories else None

    def products():
        hist_rows = hist
        if isinstance(hist, OnDiskHistories):
            # on disk: only the rows of the snapshots the tables use are read back
            hist_rows = history_rows(hist, config.binning)
        tables = build_tables(result.black_holes, result.mergers, hist_rows, cosmo,
                              config.binning, meta={"made_by": f"bhgrow {__version__}"})
        gws = gw_summary(result.mergers, cosmo, settings, config.binning.z_edges)
        tdir = run_dir / "tables"
        tdir.mkdir(exist_ok=True)
        write_tables(tables, tdir)
        if gws["background"] is not None:
            write_ecsv(gws["background"], tdir / "gw_background.ecsv")
        summary = _summary(result.provenance, result.n_seeds, result.ledger, result.baryons,
                           gws, settings)
        write_json(summary, run_dir / "summary.json")
        (run_dir / "summary.md").write_text(_summary_md(summary, name or run_dir.name))
        make_figures(tables, result.mergers, hist, result.black_holes, gws, settings,
                     run_dir / "figures", table_free=not split)
        return summary

    # with several workers the figures that need no table are a task of their own
    split = workers > 1

    def other_figures():
        table_free_figures(hist, result.black_holes, result.mergers, settings,
                           run_dir / "figures")

    tasks = [products, *([other_figures] if split else []), *also]
    return run_tasks(tasks, workers, what="writing the run directory")[0]


def products_from_run(run_dir, config=None) -> dict:
    """Rebuild tables, figures and the summary of a finished run (no rerun)."""
    from types import SimpleNamespace

    from astropy.table import Table

    from .config import load_config
    from .cosmology import Cosmology

    run_dir = Path(run_dir)
    if not (run_dir / "run.json").exists():
        raise BhgrowInputError(f"{run_dir}: not a bhgrow run directory (no run.json)",
                               source=str(run_dir), rule="no_run")
    cfg = load_config(config if config is not None else run_dir / "config.toml")
    prov = json.loads((run_dir / "run.json").read_text())
    for name in ("black_holes.ecsv", "mergers.ecsv"):
        if not (run_dir / name).exists():
            raise BhgrowInputError(f"{run_dir / name}: missing", source=str(run_dir / name),
                                   rule="no_file")
    bh = Table.read(run_dir / "black_holes.ecsv")
    mergers = Table.read(run_dir / "mergers.ecsv")
    # read in blocks: only the rows the tables and the figure use are held in memory
    hist = HistoryFile(run_dir / "histories.h5") if cfg.run.histories else {}
    cosmo = Cosmology.from_name(cfg.run.cosmology)
    n_seeds = prov.get("seeds_per_channel", {})
    res = SimpleNamespace(black_holes=bh, mergers=mergers, histories=hist, provenance=prov,
                          n_seeds=n_seeds, ledger=prov.get("ledger", {}),
                          baryons=prov.get("baryons", {}))
    return make_products(res, cfg, cosmo, run_dir)


_COMPARE_KEYS = ("n_black_holes", "n_mergers", "n_pending_pairs", "n_ejected",
                 "observed_merger_rate_per_yr", "lisa_detections_per_yr", "hc_1yr",
                 "hc_1yr_over_pta_2023", "ledger_ok")


def compare_runs(run_dirs, out, *, overwrite: bool = False) -> Path:
    """Side-by-side headline numbers and overlaid figures of several runs, written to ``out``.

    Each run directory needs ``summary.json`` and ``tables/`` (written by `bhgrow run`,
    `bhgrow demo`, or rebuilt by `bhgrow tables`).
    """
    from astropy.table import Table

    from .output import RunDirectory

    runs = [Path(r) for r in run_dirs]
    if len(runs) < 2:
        raise BhgrowInputError("compare needs at least two run directories", rule="bad_option")
    names = [r.name for r in runs]
    if len(set(names)) != len(names):
        names = [str(r) for r in runs]
    data = []
    for r in runs:
        need = [r / "summary.json", r / "tables" / "observed_merger_rate.ecsv",
                r / "tables" / "chirp_mass_distribution.ecsv"]
        for p in need:
            if not p.exists():
                raise BhgrowInputError(f"{p}: missing (is {r} a finished bhgrow run? "
                                       f"`bhgrow tables {r}` rebuilds the products)",
                                       source=str(p), rule="no_file")
        summ = json.loads((r / "summary.json").read_text())
        tabs = {p.stem: Table.read(p) for p in (r / "tables").glob("*.ecsv")}
        data.append((summ, tabs))
    with RunDirectory(out, overwrite=overwrite) as tmp:
        lines = ["# bhgrow comparison", "", "| quantity | " + " | ".join(names) + " |",
                 "|---|" + "---|" * len(names)]
        for key in _COMPARE_KEYS:
            vals = []
            for summ, _ in data:
                v = summ.get(key, "")
                vals.append(f"{v:.4g}" if isinstance(v, float) else str(v))
            lines.append(f"| {key} | " + " | ".join(vals) + " |")
        chans = sorted({c for summ, _ in data for c in summ.get("black_holes_per_channel", {})})
        for c in chans:
            lines.append(f"| seeds: {c} | " + " | ".join(
                str(summ.get("black_holes_per_channel", {}).get(c, 0)) for summ, _ in data)
                + " |")
        (tmp / "comparison.md").write_text("\n".join(lines) + "\n")
        from .output import write_json

        write_json({n: summ for n, (summ, _) in zip(names, data)}, tmp / "comparison.json")
        t0 = data[0][1]["observed_merger_rate"]
        plots.merger_rate_vs_z(
            t0["z_lo"], t0["z_hi"],
            {n: (np.asarray(t["observed_merger_rate"]["rate_density_mpc3_gyr"]),
                 np.asarray(t["observed_merger_rate"]["rate_density_mpc3_gyr_err"]))
             for n, (_, t) in zip(names, data)},
            tmp / "merger_rate_vs_z.png",
            ylabel=r"merger rate density [Mpc$^{-3}$ Gyr$^{-1}$]", title="merger rate")
        c0 = data[0][1]["chirp_mass_distribution"]
        plots.histogram(c0["log_mc_lo"], c0["log_mc_hi"],
                        {n: t["chirp_mass_distribution"]["density_mpc3_dex"]
                         for n, (_, t) in zip(names, data)}, tmp / "chirp_mass_distribution.png",
                        xlabel=r"log$_{10}$ chirp mass M$_c$ [M$_\odot$]",
                        ylabel=r"mergers [Mpc$^{-3}$ dex$^{-1}$]",
                        title="chirp-mass distribution")
        curves = {}
        for n, (_, t) in zip(names, data):
            mf = t.get("bh_mass_function")
            if mf is None or not len(mf):
                continue
            z0 = float(np.min(np.asarray(mf["z"])))
            s = np.asarray(mf["z"]) == z0
            x = 0.5 * (np.asarray(mf["log_m_lo"])[s] + np.asarray(mf["log_m_hi"])[s])
            curves[f"{n} (z = {z0:g})"] = (x, np.asarray(mf["phi_mpc3_dex"])[s],
                                          np.asarray(mf["phi_mpc3_dex_err"])[s])
        if curves:
            plots.mass_function(curves, tmp / "bh_mass_function.png")
    return Path(out)
