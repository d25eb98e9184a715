"""Regenerate trees_demo/tarn_hollow.h5, bhgrow's small scripted demo forest.

The scenario is invented: "Tarn Hollow" is a fictional 25 Mpc comoving box holding 60
final halos (1e10-1e14 Msun at z = 0) on 40 snapshots from z = 15. The trees come from
bhgrow's toy builder (:func:`bhgrow.trees.toy.toy_forest`: exponential main-branch growth
after Wechsler et al. 2002 plus random secondary progenitors). They exist so the commands
have something real to run on; statistically correct Monte Carlo trees replace them.

Run from the project root:  python trees_demo/make_demo.py   (bit-for-bit reproducible)
"""

from __future__ import annotations

import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from bhgrow.trees import write_hdf5  # noqa: E402
from bhgrow.trees.toy import toy_forest  # noqa: E402

SEED = 20261201

if __name__ == "__main__":
    out = HERE / "tarn_hollow.h5"
    forest = toy_forest(60, seed=SEED, n_snap=40, z_start=15.0, box_mpc=25.0,
                        meta={"scenario": "Tarn Hollow (invented)",
                              "generator": "trees_demo/make_demo.py", "seed": SEED,
                              "cosmology": "Planck18"})
    write_hdf5(forest, out, overwrite=True)
    print(f"wrote {out}: {forest.n_forests} forests, {forest.n_nodes} nodes")
