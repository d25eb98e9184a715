"""Weighted forest samples and `bhgrow trees make`.

The weights are checked against an independent adaptive quadrature (scipy.integrate.quad) of
the mass function; the mass functions themselves are checked against colossus (Diemer 2018)
in test_massfunction.py.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import quad

from bhgrow.cli import main
from bhgrow.cosmology import Cosmology
from bhgrow.trees import LinearPower, load_forest, make_forests, sample_roots
from bhgrow.trees.massfunction import press_schechter, sheth_tormen


@pytest.fixture(scope="module")
def power():
    return LinearPower(Cosmology())


@pytest.mark.parametrize("model,func", [("sheth_tormen", sheth_tormen),
                                        ("press_schechter", press_schechter)])
@pytest.mark.parametrize("z", [0.0, 2.0])
def test_weights_reproduce_number_density_per_bin(power, model, func, z):
    s = sample_roots(40, 1e10, 1e15, z, power, mass_function=model, seed=7)
    # each root lies inside its own stratum
    assert np.all(s.root_mass_msun >= s.edges_msun[:-1])
    assert np.all(s.root_mass_msun <= s.edges_msun[1:])
    # summed weights of any group of strata = integral of dn/dlnM over it (scipy quad)
    for i, j in [(0, 1), (0, 10), (10, 25), (25, 40), (0, 40)]:
        ref = quad(lambda lnm: func(np.exp(lnm), z, power), np.log(s.edges_msun[i]),
                   np.log(s.edges_msun[j]), epsrel=1e-10, limit=200)[0]
        assert s.weight_mpc3[i:j].sum() == pytest.approx(ref, rel=1e-7)


def test_weights_do_not_depend_on_the_draw(power):
    a = sample_roots(30, 1e11, 1e13, 0.0, power, seed=1)
    b = sample_roots(30, 1e11, 1e13, 0.0, power, seed=2)
    np.testing.assert_array_equal(a.weight_mpc3, b.weight_mpc3)
    assert not np.array_equal(a.root_mass_msun, b.root_mass_msun)


def test_make_forests_roots_and_weights():
    f = make_forests(12, mass_range_msun=(1e10, 1e12), z_start=8.0, n_snapshots=12,
                     resolution_msun=1e8, resolution_frac=0.01, seed=5)
    assert f.n_forests == 12 and len(f.snapshots) == 12
    assert f.snapshots.z[0] == pytest.approx(8.0) and f.snapshots.z[-1] == 0.0
    roots = f.roots
    assert np.all(f.snap[roots] == f.snapshots.snap[-1])
    # per-forest resolution: no node below max(1e8, 1% root) on the 0.05-dex grid (floor)
    root_mass = np.zeros(f.n_forests)
    root_mass[f.forest_index[roots]] = f.mass_msun[roots]
    floor = np.maximum(1e8, 0.01 * root_mass) / 10**0.05
    assert np.all(f.mass_msun >= floor[f.forest_index] * (1 - 1e-12))
    assert f.meta["mass_function"] == "sheth_tormen"


def test_make_rejects_bad_ranges():
    from bhgrow.errors import BhgrowInputError

    with pytest.raises(BhgrowInputError, match="HI > LO"):
        make_forests(3, mass_range_msun=(1e12, 1e11), seed=1)
    with pytest.raises(BhgrowInputError, match="above the resolution"):
        make_forests(3, mass_range_msun=(1e7, 1e11), resolution_msun=1e8, seed=1)
    with pytest.raises(BhgrowInputError, match="z_start"):
        make_forests(3, z_final=2.0, z_start=1.0, seed=1)


ARGS = ["--n-forests", "4", "--mass-range", "1e10", "3e11", "--z-start", "6",
        "--snapshots", "10", "--resolution", "3e8", "--no-progress"]


@pytest.mark.parametrize("seed", [0, 1, 2, 3, 12345])
def test_make_then_check_passes_for_any_seed(tmp_path, capsys, seed):
    out = tmp_path / f"s{seed}.h5"
    assert main(["trees", "make", "-o", str(out), "--seed", str(seed), *ARGS]) == 0
    assert main(["trees", "check", str(out)]) == 0
    f = load_forest(out)
    assert f.n_forests == 4 and f.forest_weight is not None


def test_make_same_seed_same_bytes(tmp_path, capsys):
    a, b, c = tmp_path / "a.h5", tmp_path / "b.h5", tmp_path / "c.h5"
    assert main(["trees", "make", "-o", str(a), "--seed", "9", *ARGS]) == 0
    assert main(["trees", "make", "-o", str(b), "--seed", "9", *ARGS]) == 0
    assert main(["trees", "make", "-o", str(c), "--seed", "10", *ARGS]) == 0
    assert a.read_bytes() == b.read_bytes()
    assert a.read_bytes() != c.read_bytes()


def test_make_snapshot_list_and_refusals(tmp_path, capsys):
    out = tmp_path / "z.h5"
    args = [a for a in ARGS if a not in ("--snapshots", "10")]
    assert main(["trees", "make", "-o", str(out), "--snapshots", "5,3,1.5,0.5,0", *args]) == 0
    assert load_forest(out).snapshots.z.tolist() == [5.0, 3.0, 1.5, 0.5, 0.0]
    # existing file: refused with exit 2 and no traceback
    assert main(["trees", "make", "-o", str(out), *ARGS]) == 2
    err = capsys.readouterr().err
    assert "exists" in err and "Traceback" not in err
    assert main(["trees", "make", "-o", str(tmp_path / "x.h5"), "--snapshots", "ten",
                 *args]) == 2
    assert main(["trees", "make", "-o", str(tmp_path / "x.h5"), "--mass-range", "1e12",
                 "1e11", "--no-progress"]) == 2
    assert not (tmp_path / "x.h5").exists()
