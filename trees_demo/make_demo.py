"""Regenerate trees_demo/tarn_hollow.h5, bhgrow's demo forests.

The scenario is invented: "Tarn Hollow" is a fictional survey volume of a Planck 2018
universe; no survey, simulation or observation is behind it. The file is a weighted sample
of 1500 Monte Carlo merger trees (Parkinson, Cole & Helly 2008 algorithm, published
parameters) whose roots span 1e10-1e15 Msun at z = 0, stratified in log M, each forest
carrying ``weight_mpc3`` from the Sheth & Tormen (1999) mass function, on 80 snapshots
evenly spaced in log(1+z) from z = 20. Mass resolution: 1e8 Msun, or 0.5% of the root mass
for massive roots, so cluster trees stay small.

Run from the project root:  python trees_demo/make_demo.py   (bit-for-bit reproducible;
the same as `bhgrow trees make -o trees_demo/tarn_hollow.h5 --overwrite --n-forests 1500
--mass-range 1e10 1e15 --z-start 20 --snapshots 80 --resolution 1e8 --resolution-frac 0.005
--seed 20261201`)
"""

from __future__ import annotations

import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from bhgrow.trees import make_forests, write_hdf5  # noqa: E402

SEED = 20261201
SETTINGS = dict(mass_range_msun=(1e10, 1e15), z_final=0.0, z_start=20.0, n_snapshots=80,
                resolution_msun=1e8, resolution_frac=0.005, cosmology="Planck18",
                mass_function="sheth_tormen", seed=SEED)

if __name__ == "__main__":
    out = HERE / "tarn_hollow.h5"
    forest = make_forests(1500, **SETTINGS, progress=True,
                          meta={"scenario": "Tarn Hollow (invented)",
                                "generator_script": "trees_demo/make_demo.py"})
    write_hdf5(forest, out, overwrite=True)
    print(f"wrote {out}: {forest.n_forests} forests, {forest.n_nodes} nodes")
