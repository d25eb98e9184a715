"""Command-line front end (argparse). No physics here: parse, call the API, report.

Exit codes: 0 success, 1 failure inside bhgrow, 2 bad input (file, option or config).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from pathlib import Path

from . import __version__
from .errors import BhgrowInputError

EXIT_OK, EXIT_FAIL, EXIT_BAD_INPUT = 0, 1, 2


class _Parser(argparse.ArgumentParser):
    """argparse exits with 2 on bad options already; keep its message, drop nothing."""


def _add_tree_input(p: argparse.ArgumentParser) -> None:
    p.add_argument("file", help="merger-tree file: bhgrow HDF5 (.h5) or a table (.csv, "
                   ".parquet) with one row per halo")
    p.add_argument("--columns", metavar="MAP", default=None,
                   help="for tables: map bhgrow names to the file's columns, e.g. "
                   "'node_id=ID,desc_id=DESC,forest_id=TREE,snap=SNAP,mass_msun=MVIR,z=REDSHIFT'")
    p.add_argument("--h", type=float, default=None, metavar="H",
                   help="for tables: the file uses Msun/h and Mpc/h with this h; convert")
    p.add_argument("--snapshots", metavar="FILE", default=None,
                   help="for tables without a z column: CSV with columns snap,z")
    p.add_argument("--box-mpc", type=float, default=None, metavar="L",
                   help="comoving box side in Mpc (Mpc/h with --h) for simulation trees")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="bhgrow", description="Supermassive black-hole seeding, growth and "
                     "mergers on dark-matter halo merger trees.")
    parser.add_argument("--version", action="version", version=f"bhgrow {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    trees = sub.add_parser("trees", help="inspect and check merger-tree files",
                           description="Inspect and check merger-tree files.")
    tsub = trees.add_subparsers(dest="trees_command", metavar="ACTION")
    tsub.required = True
    check = tsub.add_parser("check", help="validate a tree file; exit 2 with the broken rules",
                            description="Validate a merger-tree file against every rule "
                            "(duplicate ids, missing descendants, descendants not later in "
                            "time, cycles, cross-forest links, bad masses, unknown snapshots, "
                            "missing columns, wrong dtypes, empty file).")
    _add_tree_input(check)
    info = tsub.add_parser("info", help="describe a tree file",
                           description="Forests, nodes, snapshots and redshifts, halo-mass "
                           "range, volume or weights, and the median main-branch mass history.")
    _add_tree_input(info)
    info.add_argument("--json", action="store_true", help="print the facts as JSON")
    _add_trees_make(tsub)

    runp = sub.add_parser("run", help="grow black holes on merger trees; write a run directory",
                          description="Seed, grow and follow black holes through merger trees "
                          "and write black_holes.ecsv, histories.h5, config.toml and run.json "
                          "into a new run directory.")
    runp.add_argument("config", nargs="?", default=None, metavar="CONFIG.toml",
                      help="config file (default: all defaults; see `bhgrow config`)")
    runp.add_argument("--trees", default=None, metavar="FILE",
                      help="bhgrow HDF5 forest file (default: the demo forests)")
    runp.add_argument("-o", "--output", required=True, metavar="DIR",
                      help="run directory to create")
    runp.add_argument("--overwrite", action="store_true",
                      help="replace an existing run directory")
    runp.add_argument("--no-progress", action="store_true", help="no progress bar")
    _add_execution(runp)

    demo = sub.add_parser("demo", help="run the whole pipeline on the demo forests",
                          description="Trees -> model -> products on the bundled demo forests "
                          "with the default config: black holes, mergers, tables, figures, "
                          "summary.md and summary.json.")
    demo.add_argument("-o", "--output", default="bhgrow_demo", metavar="DIR",
                      help="run directory to create (default: bhgrow_demo)")
    demo.add_argument("--overwrite", action="store_true",
                      help="replace an existing run directory")
    demo.add_argument("--no-progress", action="store_true", help="no progress bar")
    _add_execution(demo)

    tab = sub.add_parser("tables", help="rebuild tables, figures and summary of a finished run",
                         description="Rebuild tables/, figures/, summary.md and summary.json "
                         "of a finished run from its files, without rerunning the model; a "
                         "config file may change the binning ([tables]) and GW settings ([gw]).")
    tab.add_argument("run_dir", metavar="RUN_DIR")
    tab.add_argument("--config", default=None, metavar="CONFIG.toml",
                     help="config for binning/GW settings (default: the run's config.toml)")

    cmp_ = sub.add_parser("compare", help="compare several runs side by side",
                          description="Side-by-side headline numbers (comparison.md, "
                          "comparison.json) and overlaid figures of two or more runs.")
    cmp_.add_argument("runs", nargs="+", metavar="RUN_DIR")
    cmp_.add_argument("-o", "--output", required=True, metavar="DIR",
                      help="directory to create for the comparison")
    cmp_.add_argument("--overwrite", action="store_true",
                      help="replace an existing directory")

    sub.add_parser("config", help="print the default config with comments",
                   description="Print the full default configuration as TOML, with the "
                   "meaning, unit and source of every key.")
    return parser


def _add_execution(p: argparse.ArgumentParser) -> None:
    """How a run executes: worker processes, Dask, resume (results never depend on them)."""
    p.add_argument("--workers", type=int, default=None, metavar="N",
                   help="local worker processes running chunks of whole forests in parallel "
                   "(0 = one per CPU core; default: run.workers of the config, 1)")
    p.add_argument("--dask", default=None, metavar="SCHEDULER_ADDRESS",
                   help="run the chunks on a dask.distributed cluster, e.g. "
                   "tcp://10.0.0.5:8786 (needs pip install -e '.[dask]')")
    p.add_argument("--resume", action="store_true",
                   help="continue an interrupted run: reuse the finished chunks kept in "
                   "DIR.partial/ (same config and trees) and run the rest")


def _add_trees_make(tsub) -> None:
    from .trees import make as mk

    p = tsub.add_parser(
        "make", help="generate weighted Monte Carlo merger trees (Parkinson, Cole & Helly 2008)",
        description="Generate a weighted sample of Monte Carlo merger trees with the "
        "Parkinson, Cole & Helly (2008) algorithm. Root masses are stratified in log M and "
        "each forest carries weight_mpc3, the comoving number density of halos it stands "
        "for under the chosen mass function, so rates come out per comoving Mpc^3.")
    p.add_argument("-o", "--output", required=True, metavar="FILE",
                   help="output HDF5 file (refuses to overwrite without --overwrite)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing FILE")
    p.add_argument("--n-forests", type=int, default=mk.DEFAULT_N_FORESTS, metavar="N",
                   help=f"number of forests (default {mk.DEFAULT_N_FORESTS})")
    lo, hi = mk.DEFAULT_MASS_RANGE_MSUN
    p.add_argument("--mass-range", type=float, nargs=2, default=[lo, hi],
                   metavar=("LO", "HI"), help=f"root halo-mass range in Msun at --z-final "
                   f"(default {lo:g} {hi:g})")
    p.add_argument("--z-final", type=float, default=mk.DEFAULT_Z_FINAL, metavar="Z",
                   help=f"redshift of the roots (default {mk.DEFAULT_Z_FINAL:g})")
    p.add_argument("--z-start", type=float, default=mk.DEFAULT_Z_START, metavar="Z",
                   help=f"redshift of the earliest snapshot (default {mk.DEFAULT_Z_START:g})")
    p.add_argument("--snapshots", default=str(mk.DEFAULT_N_SNAPSHOTS), metavar="N|Z1,Z2,...",
                   help="number of snapshots evenly spaced in log(1+z) from --z-start to "
                   f"--z-final (default {mk.DEFAULT_N_SNAPSHOTS}), or a comma-separated list "
                   "of redshifts")
    p.add_argument("--resolution", type=float, default=mk.DEFAULT_RESOLUTION_MSUN,
                   metavar="MSUN", help="mass resolution in Msun; smaller progenitors count "
                   f"as smooth accretion (default {mk.DEFAULT_RESOLUTION_MSUN:g})")
    p.add_argument("--resolution-frac", type=float, default=mk.DEFAULT_RESOLUTION_FRAC,
                   metavar="F", help="per-forest resolution max(--resolution, F x root mass); "
                   "keeps cluster trees small; 0 = off (default %(default)g)")
    p.add_argument("--cosmology", default="Planck18", metavar="NAME",
                   help="astropy cosmology realization (default Planck18)")
    p.add_argument("--mass-function", default=mk.DEFAULT_MASS_FUNCTION,
                   choices=["sheth_tormen", "press_schechter"],
                   help=f"mass function for the weights (default {mk.DEFAULT_MASS_FUNCTION})")
    p.add_argument("--seed", type=int, default=1, help="random seed (default 1); same seed, "
                   "same file")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")


def _load(args):
    from .trees.io import load_forest, parse_column_map

    return load_forest(args.file, columns=parse_column_map(args.columns), h=args.h,
                       snapshots=args.snapshots, box_mpc=args.box_mpc)


def _load_checked(args):
    """The checked trees: a bhgrow HDF5 file is opened lazily and checked chunk by chunk
    (memory follows the chunk, not the file); other inputs are loaded whole."""
    from .trees.io import is_hdf5_path, open_forests

    if is_hdf5_path(args.file) and not args.columns and args.h is None \
            and args.snapshots is None:
        return open_forests(args.file, box_mpc=args.box_mpc, check=False).check()
    return _load(args)


def _cmd_trees_check(args) -> int:
    forest = _load_checked(args)
    print(f"{args.file}: OK — {forest.n_forests} forests, {forest.n_nodes} nodes, "
          f"{len(forest.snapshots)} snapshots")
    return EXIT_OK


def _cmd_trees_info(args) -> int:
    import numpy as np

    from .trees.summary import format_summary, summarize

    info = summarize(_load_checked(args))
    if args.json:
        def _plain(o):
            if isinstance(o, np.ndarray):
                return [None if not np.isfinite(v) else float(v) for v in o]
            raise TypeError(type(o))
        print(json.dumps(info, indent=2, default=_plain))
    else:
        print(format_summary(info, args.file))
    return EXIT_OK


def _parse_snapshots(text: str):
    """`--snapshots`: an integer count, or a comma-separated list of redshifts."""
    text = text.strip()
    try:
        if "," not in text:
            return int(text), None
        return None, [float(v) for v in text.split(",") if v.strip()]
    except ValueError:
        raise BhgrowInputError(f"--snapshots must be an integer count or a comma-separated "
                               f"list of redshifts; got {text!r}", rule="bad_option") from None


def _cmd_trees_make(args) -> int:
    import time

    from .trees.io import write_hdf5
    from .trees.make import make_forests

    out = Path(args.output)
    if out.exists() and not args.overwrite:
        raise BhgrowInputError(f"{out}: file exists; refusing to overwrite it (use "
                               f"--overwrite)", source=str(out), rule="exists")
    if not out.parent.exists():
        raise BhgrowInputError(f"{out}: directory {out.parent} does not exist",
                               source=str(out), rule="no_dir")
    n_snap, z_list = _parse_snapshots(args.snapshots)
    t0 = time.perf_counter()
    forest = make_forests(
        args.n_forests, mass_range_msun=tuple(args.mass_range), z_final=args.z_final,
        z_start=args.z_start, n_snapshots=n_snap if n_snap is not None else 2,
        snapshot_z=z_list, resolution_msun=args.resolution,
        resolution_frac=args.resolution_frac, cosmology=args.cosmology,
        mass_function=args.mass_function, seed=args.seed, progress=not args.no_progress)
    write_hdf5(forest, out, overwrite=args.overwrite)
    print(f"wrote {out}: {forest.n_forests} forests, {forest.n_nodes} nodes, "
          f"{len(forest.snapshots)} snapshots, total weight "
          f"{forest.forest_weight.sum():.4g} Mpc^-3 ({time.perf_counter() - t0:.1f} s)")
    return EXIT_OK


def _workers(args):
    if args.workers is not None and args.workers < 0:
        raise BhgrowInputError(f"--workers must be >= 0 (0 = one per CPU core); got "
                               f"{args.workers}", rule="bad_option")
    return args.workers


def _cmd_run(args) -> int:
    from .pipeline import run

    result = run(args.config, trees=args.trees, out=args.output, overwrite=args.overwrite,
                 progress=not args.no_progress, workers=_workers(args), dask=args.dask,
                 resume=args.resume)
    p = result.provenance
    seeds = ", ".join(f"{k} {v}" for k, v in result.n_seeds.items() if v)
    print(f"wrote {args.output}: {p['n_black_holes']} black holes ({seeds or 'none'}) in "
          f"{p['n_forests']} forests, {p['n_nodes']} nodes, {p['wall_time_s']:.1f} s; "
          f"ledger {'ok' if result.ledger['ok'] else 'FAILED'} "
          f"(max residual {result.ledger['max_relative_residual']:.1e})")
    return EXIT_OK if result.ledger["ok"] else EXIT_FAIL


def _cmd_demo(args) -> int:
    from .pipeline import run

    result = run(None, trees=None, out=args.output, overwrite=args.overwrite,
                 progress=not args.no_progress, workers=_workers(args), dask=args.dask,
                 resume=args.resume)
    out = Path(args.output)
    s = result.summary or {}
    print((out / "summary.md").read_text())
    print(f"run directory: {out}/\n  black_holes.ecsv, mergers.ecsv, pending_pairs.ecsv, "
          f"histories.h5, config.toml, run.json\n  tables/   "
          f"{', '.join(sorted(p.name for p in (out / 'tables').iterdir()))}\n  figures/  "
          f"{', '.join(sorted(p.name for p in (out / 'figures').iterdir()))}")
    return EXIT_OK if s.get("ledger_ok", result.ledger["ok"]) else EXIT_FAIL


def _cmd_tables(args) -> int:
    from .products import products_from_run

    summary = products_from_run(args.run_dir, args.config)
    print(f"rebuilt {args.run_dir}/tables, figures, summary.md; hc(1/yr) = "
          f"{summary['hc_1yr']:.3e}, observed merger rate {summary['observed_merger_rate_per_yr']:.4g}/yr")
    return EXIT_OK


def _cmd_compare(args) -> int:
    from .products import compare_runs

    out = compare_runs(args.runs, args.output, overwrite=args.overwrite)
    print((out / "comparison.md").read_text())
    print(f"figures in {out}/")
    return EXIT_OK


def _cmd_config(args) -> int:
    from .config import default_config_text

    sys.stdout.write(default_config_text())
    return EXIT_OK


_COMMANDS = {("trees", "check"): _cmd_trees_check, ("trees", "info"): _cmd_trees_info,
             ("trees", "make"): _cmd_trees_make, ("run", None): _cmd_run,
             ("config", None): _cmd_config, ("demo", None): _cmd_demo,
             ("tables", None): _cmd_tables, ("compare", None): _cmd_compare}


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    key = (args.command, getattr(args, "trees_command", None))
    try:
        return _COMMANDS[key](args)
    except BhgrowInputError as exc:
        tag = f"[{exc.rule}] " if exc.rule and f"[{exc.rule}]" not in str(exc) else ""
        print(f"bhgrow: error: {tag}{exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("bhgrow: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into `head` etc.: not an error
        try:
            sys.stdout = open(os.devnull, "w")
        except OSError:
            pass
        return EXIT_OK
    except Exception as exc:  # noqa: BLE001 - last line of defence: no traceback for users
        if os.environ.get("BHGROW_DEBUG"):
            raise
        print(f"bhgrow: internal error: {type(exc).__name__}: {exc}\n"
              f"(this is a bug in bhgrow; rerun with BHGROW_DEBUG=1 for a traceback)",
              file=sys.stderr)
        return EXIT_FAIL


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
