"""`bhgrow trees info` facts (bhgrow/trees/summary.py): a file read chunk by chunk gives the
same facts as the file in memory, and the root sample of big files is reproducible."""

from pathlib import Path

import numpy as np
import pytest

from bhgrow.trees.io import load_forest, open_forests
from bhgrow.trees.summary import format_summary, main_branch_history, summarize

DEMO = Path(__file__).resolve().parents[2] / "trees_demo" / "tarn_hollow.h5"


def _same(a, b):
    assert a.keys() == b.keys()
    for k in a:
        if isinstance(a[k], dict):
            _same(a[k], b[k])
        elif isinstance(a[k], np.ndarray):
            np.testing.assert_array_equal(a[k], b[k])
        else:
            assert a[k] == b[k], k


@pytest.fixture(scope="module")
def demo():
    return load_forest(DEMO)


def test_chunked_file_gives_the_same_facts(demo):
    lazy = open_forests(DEMO)
    chunks = list(lazy.chunk_ids(20_000))
    assert len(chunks) > 5                     # really read in pieces
    assert sum(c.size for c in chunks) == demo.n_forests
    _same(summarize(lazy, max_nodes=20_000), summarize(demo))


def test_facts_against_the_arrays(demo):
    info = summarize(demo)
    last = demo.snapshot_slice(len(demo.snapshots) - 1)
    final_roots = int((demo.desc_index[last] < 0).sum())
    assert info["n_roots"] == int((demo.desc_index < 0).sum())
    assert info["final_mass_range_msun"] == [float(demo.mass_msun[last].min()),
                                             float(demo.mass_msun[last].max())]
    mb = info["main_branch"]
    assert mb["n_roots"] == mb["n_sampled"] == final_roots
    # every main branch is present at its root's snapshot, and is the root itself there
    assert mb["frac_present"][-1] == 1.0 and mb["median_frac"][-1] == 1.0
    # main branches only grow: the median mass fraction never falls towards z = 0
    assert np.all(np.diff(mb["median_frac"]) >= 0)
    _same(mb, main_branch_history(demo))


def test_root_sample_is_reproducible_and_said(demo):
    lazy = open_forests(DEMO)
    small = summarize(demo, max_roots=100)
    mb = small["main_branch"]
    assert mb["n_roots"] == summarize(demo)["main_branch"]["n_roots"]
    # a Bernoulli sample with p = 100 / forests (demo: about one final root per forest)
    assert 50 < mb["n_sampled"] < 160
    # the same roots whatever the chunking
    _same(summarize(lazy, max_nodes=20_000, max_roots=100), small)
    text = format_summary(small, "demo")
    assert f"(a random sample of {mb['n_sampled']})" in text
    assert "random sample" not in format_summary(summarize(demo), "demo")
