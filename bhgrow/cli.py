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
    return parser


def _load(args):
    from .trees.io import load_forest, parse_column_map

    return load_forest(args.file, columns=parse_column_map(args.columns), h=args.h,
                       snapshots=args.snapshots, box_mpc=args.box_mpc)


def _cmd_trees_check(args) -> int:
    forest = _load(args)
    print(f"{args.file}: OK — {forest.n_forests} forests, {forest.n_nodes} nodes, "
          f"{len(forest.snapshots)} snapshots")
    return EXIT_OK


def _cmd_trees_info(args) -> int:
    import numpy as np

    from .trees.summary import format_summary, summarize

    forest = _load(args)
    info = summarize(forest)
    if args.json:
        def _plain(o):
            if isinstance(o, np.ndarray):
                return [None if not np.isfinite(v) else float(v) for v in o]
            raise TypeError(type(o))
        print(json.dumps(info, indent=2, default=_plain))
    else:
        print(format_summary(info, args.file))
    return EXIT_OK


_COMMANDS = {("trees", "check"): _cmd_trees_check, ("trees", "info"): _cmd_trees_info}


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    key = (args.command, getattr(args, "trees_command", None))
    try:
        return _COMMANDS[key](args)
    except BhgrowInputError as exc:
        print(f"bhgrow: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("bhgrow: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # noqa: BLE001 - last line of defence: no traceback for users
        if os.environ.get("BHGROW_DEBUG"):
            raise
        print(f"bhgrow: internal error: {type(exc).__name__}: {exc}\n"
              f"(this is a bug in bhgrow; rerun with BHGROW_DEBUG=1 for a traceback)",
              file=sys.stderr)
        return EXIT_FAIL


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
