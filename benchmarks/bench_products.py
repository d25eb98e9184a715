"""Benchmark: the products stage -- tables, GW products, figures and run files -- per merger,
per black hole and per tree node, with peak memory.

A toy forest (:func:`bhgrow.trees.toy.toy_forest`; ``--nodes``, default 1e6) is run once
through :func:`bhgrow.pipeline.run_model` (timed, for context); then each stage runs on that
in-memory result:

* ``merger_snr``   -- sky-averaged LISA SNR of every merger (:func:`bhgrow.products.merger_snr`;
  ``run_model`` already calls it, timed again here on its own);
* ``build_tables`` -- every product table (:func:`bhgrow.tables.build_tables`);
* ``gw_summary``   -- observed merger rate, LISA detections, nHz background
  (:func:`bhgrow.products.gw_summary`);
* ``make_figures`` -- every PNG (:func:`bhgrow.products.make_figures`);
* ``make_products``-- all of the above plus writing tables, summary.md and summary.json
  (:func:`bhgrow.products.make_products`, what ``bhgrow run`` and ``bhgrow tables`` call);
* ``run files``    -- :func:`bhgrow.pipeline.write_run` without products: black_holes,
  mergers and pending-pair ECSV, histories.h5, config.toml, run.json.

Each stage runs in a forked child process (Linux) after one warm-up pass of
``make_products`` in the parent (matplotlib import and font cache, lazy GW and cosmology
tables), so the times are of a warm process. Peak memory is the growth of the resident set
during the stage (``VmHWM`` after a reset, minus ``VmRSS`` at the start; a lower bound) and,
with ``--traced``, the ``tracemalloc`` peak in a separate untimed run. Output goes to a
temporary directory.

    python benchmarks/bench_products.py [--nodes 1e6] [--snaps 40] [--pairs on]
        [--histories on] [--repeat 3] [--traced]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from _measure import best_of, load_note, measure  # noqa: E402

from bench_engine import config_for, forest_for_nodes  # noqa: E402
from bhgrow.cosmology import Cosmology  # noqa: E402
from bhgrow.pipeline import run_model, write_run  # noqa: E402
from bhgrow.products import gw_summary, make_figures, make_products, merger_snr  # noqa: E402
from bhgrow.tables import build_tables  # noqa: E402


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--nodes", type=float, default=1e6, help="target forest size in nodes")
    ap.add_argument("--forests", type=int, default=None,
                    help="number of toy forests (overrides --nodes)")
    ap.add_argument("--snaps", type=int, default=40, help="number of snapshots")
    ap.add_argument("--box-mpc", type=float, default=100.0, help="comoving box side [Mpc]")
    ap.add_argument("--seed", type=int, default=1, help="seed of the toy trees")
    ap.add_argument("--pairs", choices=("on", "off"), default="on",
                    help="pair dynamics (merger clocks) on (default model) or off")
    ap.add_argument("--histories", choices=("on", "off"), default="on",
                    help="per-black-hole histories (with them: mass-function and "
                         "Eddington-ratio tables and the history figure)")
    ap.add_argument("--repeat", type=int, default=3, help="timed runs per stage (best kept)")
    ap.add_argument("--traced", action="store_true",
                    help="also measure the tracemalloc peak (one extra untimed run per stage)")
    ap.add_argument("--no-isolate", action="store_true",
                    help="run the stages in this process instead of forked children")
    args = ap.parse_args()
    isolate = not args.no_isolate

    t0 = time.perf_counter()
    forest, nf = forest_for_nodes(int(args.nodes), seed=args.seed, n_snap=args.snaps,
                                  box_mpc=args.box_mpc, n_forests=args.forests)
    t_build = time.perf_counter() - t0
    cfg = config_for(args.pairs == "on", args.histories == "on")
    cosmo = Cosmology.from_name(cfg.run.cosmology)
    t0 = time.perf_counter()
    result = run_model(forest, cfg)
    t_run = time.perf_counter() - t0
    n = forest.n_nodes
    n_m = len(result.mergers)
    n_bh = len(result.black_holes)
    n_h = len(result.histories.get("bh_id", []))
    hist = result.histories if cfg.run.histories else None
    print(f"forest: {nf:,} toy forests, {args.snaps} snapshots, {n:,} nodes (built in "
          f"{t_build:.1f} s); run_model {t_run:.1f} s ({n / t_run:,.0f} nodes/s); pairs "
          f"{args.pairs}, histories {args.histories}; {load_note()}")
    print(f"result: {n_bh:,} black holes, {n_m:,} mergers, {len(result.pending):,} pending "
          f"pairs, {n_h:,} history rows")

    tmp = tempfile.TemporaryDirectory(prefix="bhgrow-bench-products-")
    base = Path(tmp.name)
    # warm-up (imports, font cache, lazy tables); its tables and GW summary feed make_figures
    warm = base / "warm"
    warm.mkdir()
    make_products(result, cfg, cosmo, warm)
    tables = build_tables(result.black_holes, result.mergers, hist, cosmo, cfg.binning)
    gws = gw_summary(result.mergers, cosmo, cfg.gw, cfg.binning.z_edges)
    def fresh_dir() -> Path:   # unique also across forked children
        return Path(tempfile.mkdtemp(dir=base, prefix="out"))

    stages = {
        "merger_snr": lambda: len(merger_snr(result.mergers, cosmo, cfg.gw)),
        "build_tables": lambda: len(build_tables(result.black_holes, result.mergers, hist,
                                                 cosmo, cfg.binning)),
        "gw_summary": lambda: gw_summary(result.mergers, cosmo, cfg.gw,
                                         cfg.binning.z_edges)["n_lisa_detected"],
        "make_figures": lambda: len(make_figures(tables, result.mergers, hist,
                                                 result.black_holes, gws, cfg.gw,
                                                 fresh_dir() / "figures")),
        "make_products": lambda: make_products(result, cfg, cosmo, fresh_dir())["n_mergers"],
        "run files (write_run, no products)": lambda: str(write_run(
            result, cfg, fresh_dir() / "run", products=False)),
    }
    rows = []
    for name, fn in stages.items():
        m = best_of(fn, args.repeat, isolate=isolate)
        if args.traced:
            m["traced_peak_bytes"] = measure(fn, traced=True, isolate=isolate)[
                "traced_peak_bytes"]
        rows.append((name, m))
        w = m["wall_s"]
        rss, tr = m["rss_peak_bytes"], m.get("traced_peak_bytes")
        print(f"  {name:<36} {w:8.3f} s  {1e6 * w / max(n_m, 1):9.1f} us/merger "
              f"{n / w:13,.0f} nodes/s  RSS +{'-' if rss is None else f'{rss / 2**20:,.1f}'}"
              f" MiB" + (f"  traced {tr / 2**20:,.1f} MiB" if tr is not None else ""),
              flush=True)
    tmp.cleanup()

    print(f"\nREADME table (products of a run on {n:.2e} toy-forest nodes: {n_m:,} mergers, "
          f"{n_bh:,} black holes, {n_h:,} history rows; best of {args.repeat}):\n")
    print("| stage | wall s | us per merger | nodes/s | mergers/s | peak RSS growth B/node | "
          "peak RSS growth B/merger | peak traced B/node |")
    print("|---|---:|---:|---:|---:|---:|---:|---:|")
    for name, m in rows:
        w, rss, tr = m["wall_s"], m["rss_peak_bytes"], m.get("traced_peak_bytes")
        print(f"| {name} | {w:.3f} | {1e6 * w / max(n_m, 1):,.1f} | {n / w:,.0f} | "
              f"{n_m / w:,.0f} | {'-' if rss is None else f'{rss / n:,.1f}'} | "
              f"{'-' if rss is None or not n_m else f'{rss / n_m:,.0f}'} | "
              f"{'-' if tr is None else f'{tr / n:,.1f}'} |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
