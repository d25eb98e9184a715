"""Forest indexing: sub-forests of whole forests (closed-form check: a fresh index)."""

import numpy as np
import pytest

from bhgrow.trees import Forest


@pytest.mark.parametrize("frac", [0.0, 0.01, 0.05, 0.5, 1.0])
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
    # the rows are those of a mask over the parent, in the parent's order
    keep = np.isin(f.forest_id, ids)
    for name in ("node_id", "desc_id", "forest_id", "snap", "mass_msun"):
        np.testing.assert_array_equal(getattr(sub, name), getattr(f, name)[keep], err_msg=name)
    for name in ("desc_index", "prog_index", "prog_offsets", "main_prog", "snap_offsets",
                 "forest_index"):
        a, b = getattr(sub, name), getattr(fresh, name)
        assert a.dtype == b.dtype, name
        np.testing.assert_array_equal(a, b, err_msg=name)


def _columns(f, rows):
    return {"node_id": f.node_id[rows], "desc_id": f.desc_id[rows],
            "forest_id": f.forest_id[rows], "snap": f.snap[rows], "mass_msun": f.mass_msun[rows]}


@pytest.mark.parametrize("shuffle", [False, True])
def test_row_order_and_progenitors_equal_full_lexsorts(shuffle):
    # from_columns takes a fast path when rows come by (forest, node id) within each
    # snapshot, and _index sorts the minor keys only for descendants with several
    # progenitors; both must give exactly the orders of the full three-key sorts
    # (numpy.lexsort), also with equal masses among progenitors (ties broken by node id)
    from bhgrow.trees.toy import toy_forest

    f = toy_forest(60, seed=8, n_snap=20, box_mpc=30.0)
    rng = np.random.default_rng(4)
    mass = f.mass_msun.copy()
    mass[rng.random(mass.size) < 0.3] = 1e10           # many equal masses
    rows = rng.permutation(f.n_nodes) if shuffle else \
        np.lexsort((f.node_id, f.snap, f.forest_id))   # bhgrow's file order
    cols = _columns(f, rows)
    cols["mass_msun"] = mass[rows]
    g = Forest.from_columns(cols, f.snapshots.snap, f.snapshots.z)
    order = np.lexsort((cols["node_id"], cols["forest_id"], cols["snap"]))
    np.testing.assert_array_equal(g.node_id, cols["node_id"][order])
    has = np.flatnonzero(g.desc_index >= 0)
    full = has[np.lexsort((g.node_id[has], -g.mass_msun[has], g.desc_index[has]))]
    np.testing.assert_array_equal(g.prog_index, full)
    # and the descendant rows point at the right ids
    np.testing.assert_array_equal(g.node_id[g.desc_index[has]], g.desc_id[has])


@pytest.mark.parametrize("shuffle", [False, True])
def test_from_columns_consuming_its_columns_builds_the_same_forest(shuffle):
    # a reader hands over its freshly read columns (consume=True): each is dropped from the
    # dict once taken in row order, and the forest is the same, array for array, as from
    # columns kept by the caller (both orderings: bhgrow's file order and shuffled rows)
    from bhgrow.trees.toy import toy_forest

    f = toy_forest(60, seed=9, n_snap=15, box_mpc=30.0)
    rows = np.random.default_rng(4).permutation(f.n_nodes) if shuffle else np.arange(f.n_nodes)
    cols = _columns(f, rows)
    cols["j_lw"] = np.linspace(0.0, 50.0, f.n_nodes)[rows]       # an optional column
    keep = Forest.from_columns(dict(cols), f.snapshots.snap, f.snapshots.z, box_mpc=30.0)
    given = dict(cols)
    used = Forest.from_columns(given, f.snapshots.snap, f.snapshots.z, box_mpc=30.0,
                               consume=True)
    assert given == {}                                          # every column taken
    assert list(used.extra) == list(keep.extra) == ["j_lw"]
    for name in ("node_id", "desc_id", "forest_id", "snap", "mass_msun", "desc_index",
                 "prog_index", "prog_offsets", "main_prog", "snap_offsets", "forest_index"):
        a, b = getattr(used, name), getattr(keep, name)
        assert a.dtype == b.dtype, name
        np.testing.assert_array_equal(a, b, err_msg=name)
    np.testing.assert_array_equal(used.extra["j_lw"], keep.extra["j_lw"])
    np.testing.assert_array_equal(cols["node_id"], f.node_id[rows])   # the caller's copy intact
