"""Merger trees: the columnar forest data model, readers/writers and validation."""

from .forest import Forest, SnapshotTable
from .generate import GeneratedTrees, PCHTreeGenerator, snapshot_grid
from .io import (HDF5Forests, load_forest, open_forests, read_hdf5, read_table, write_csv,
                 write_hdf5)
from .make import make_forests, sample_roots
from .massfunction import MASS_FUNCTIONS, number_density, press_schechter, sheth_tormen
from .power import LinearPower
from .summary import summarize
from .validate import OPTIONAL_COLUMNS, REQUIRED_COLUMNS, Problem, find_problems, validate

__all__ = ["Forest", "SnapshotTable", "HDF5Forests", "open_forests", "load_forest", "read_hdf5", "read_table", "write_csv",
           "write_hdf5", "summarize", "find_problems", "validate", "Problem",
           "REQUIRED_COLUMNS", "OPTIONAL_COLUMNS", "PCHTreeGenerator", "GeneratedTrees",
           "snapshot_grid", "make_forests", "sample_roots", "LinearPower", "MASS_FUNCTIONS",
           "number_density", "press_schechter", "sheth_tormen"]
