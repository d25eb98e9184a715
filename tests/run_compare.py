"""Shared check for the chunking / worker / streaming tests: two runs give the same results."""

import numpy as np


def assert_same(a, b):
    for name in ("black_holes", "mergers", "pending"):
        ta, tb = getattr(a, name), getattr(b, name)
        assert ta.colnames == tb.colnames and len(ta) == len(tb), name
        for col in ta.colnames:
            np.testing.assert_array_equal(ta[col], tb[col], err_msg=f"{name}.{col}")
    assert a.histories.keys() == b.histories.keys()
    for col in a.histories:
        np.testing.assert_array_equal(a.histories[col], b.histories[col], err_msg=col)
    np.testing.assert_array_equal(a.ledger["per_forest_residual"],
                                  b.ledger["per_forest_residual"])
    for key in ("total_final_msun", "total_seed_msun", "total_growth_msun",
                "total_radiated_msun", "total_ejected_msun"):
        assert a.ledger[key] == b.ledger[key], key
    assert a.n_seeds == b.n_seeds
    # baryon totals: exactly rounded sums of per-forest totals, the same for any plan
    assert a.baryons == b.baryons
