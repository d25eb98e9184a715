"""bhgrow: supermassive black-hole seeding, growth and mergers on halo merger trees.

Public API
----------
load_forest, Forest, write_hdf5 : merger trees (:mod:`bhgrow.trees`)
Cosmology : fast cosmological tables (:mod:`bhgrow.cosmology`)
load_config, Config, Model : run configuration (:mod:`bhgrow.config`)
run : trees -> black holes -> run directory (:mod:`bhgrow.pipeline`)
BhgrowInputError : raised for any bad user input
"""

__version__ = "0.1.0"

from .cosmology import Cosmology  # noqa: E402
from .errors import BhgrowInputError, ParameterError  # noqa: E402
from .config import Config, Model, load_config  # noqa: E402
from .pipeline import run  # noqa: E402
from .trees import Forest, load_forest, write_hdf5  # noqa: E402

__all__ = ["__version__", "Cosmology", "Config", "Model", "load_config", "run", "BhgrowInputError", "ParameterError", "Forest", "load_forest",
           "write_hdf5"]
