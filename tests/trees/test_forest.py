"""Forest indexing: sub-forests of whole forests (closed-form check: a fresh index)."""

import numpy as np
import pytest

from bhgrow.trees import Forest


@pytest.mark.parametrize("frac", [0.05, 0.5, 1.0])
def test_selected_forests_index_equals_a_fresh_index(frac):
    # select_forests renumbers the parent's index instead of sorting again: the arrays
    # must equal those Forest._index builds from scratch for the same rows
    from bhgrow.trees.toy import toy_forest

    f = toy_forest(200, seed=5, n_snap=25, box_mpc=40.0)
    ids = f.forest_ids[np.random.default_rng(2).random(f.n_forests) < frac]
    sub = f.select_forests(ids)
    fresh = Forest(node_id=sub.node_id, desc_id=sub.desc_id, forest_id=sub.forest_id,
                   snap=sub.snap, mass_msun=sub.mass_msun, snapshots=sub.snapshots,
                   extra=sub.extra, forest_ids=sub.forest_ids,
                   forest_weight=sub.forest_weight, box_mpc=sub.box_mpc, meta=sub.meta)
    fresh._index()
    for name in ("desc_index", "prog_index", "prog_offsets", "main_prog", "snap_offsets",
                 "forest_index"):
        a, b = getattr(sub, name), getattr(fresh, name)
        assert a.dtype == b.dtype, name
        np.testing.assert_array_equal(a, b, err_msg=name)
