"""Tests of bhgrow.physics.seeding.

Criteria are checked on crafted haloes, each breaking exactly one rule; distributions are
checked against closed-form moments (uniform and normal distributions, with tolerances of
several standard errors of the sample size used); published thresholds are named beside
the checks, marked "(memory)" where written from memory.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.special import ndtr

from bhgrow import rng
from bhgrow.errors import ParameterError
from bhgrow.physics.gas import Z_SUN
from bhgrow.physics.seeding import (
    CHANNEL_CODES,
    DEFAULT_PRISTINE_Z_MIN,
    SEEDING_CHANNELS,
    SEEDING_PURPOSES,
    DenseGasSeeds,
    HaloMassSeeds,
    HeavySeeds,
    LightSeeds,
    SeedingInputs,
    SeedMass,
    apply_channels,
    j_lw_background,
)

N_DRAWS = 200_000


def make_inputs(n, seed=7, node_ids=None, **over):
    """Per-halo inputs of ``n`` haloes; defaults: a pristine 5e3 K minihalo at z = 20."""
    ids = np.arange(n) if node_ids is None else np.asarray(node_ids)
    base = dict(
        m_halo_msun=np.full(n, 1e6), z=np.full(n, 20.0), t_vir_k=np.full(n, 5e3),
        pristine=np.ones(n, bool), metallicity=np.zeros(n), n_h_cm3=np.full(n, 0.5),
        gas_msun=np.full(n, 1e5), j_lw=np.full(n, np.nan), has_bh=np.zeros(n, bool),
        keys=rng.stream_keys(seed, ids))
    for k, v in over.items():
        base[k] = np.broadcast_to(np.asarray(v, dtype=np.asarray(base[k]).dtype), (n,)).copy()
    return SeedingInputs(**base)


def with_rows(rows, seed=7):
    """Inputs whose row i overrides the defaults with the dict ``rows[i]``."""
    inp = make_inputs(len(rows), seed=seed)
    cols = {k: np.array(v) for k, v in inp._asdict().items()}
    for i, row in enumerate(rows):
        for k, v in row.items():
            cols[k][i] = v
    return SeedingInputs(**cols)


# --- defaults from the literature --------------------------------------------------------------
def test_default_thresholds_memory():
    # Z_crit = 10^-3.5 Z_sun (Bromm et al. 2001, memory) with Z_sun = 0.0134 (Asplund et al.
    # 2009, memory)
    assert Z_SUN == 0.0134
    assert LightSeeds().z_crit == pytest.approx(0.0134 * 10**-3.5, rel=1e-14)
    assert HeavySeeds().z_crit == LightSeeds().z_crit
    # Illustris: 5e10 Msun/h haloes get 1e5 Msun/h seeds, h = 0.704 (Vogelsberger et al. 2013;
    # Sijacki et al. 2015; memory)
    hm = HaloMassSeeds()
    assert hm.m_halo_min_msun == pytest.approx(7.102e10, rel=1e-3)
    assert hm.mass.value == pytest.approx(1.420e5, rel=1e-3)
    # atomic-cooling threshold 1e4 K; direct-collapse seeds 1e5 Msun (Lodato & Natarajan 2006,
    # memory); Pop III remnants 100 Msun (Volonteri 2010 review, memory)
    # light seeds: no upper T_vir by default (coarse trees; see LightSeeds docs)
    assert HeavySeeds().t_vir_min_k == 1e4 and LightSeeds().t_vir_max_k == float("inf")
    assert HeavySeeds().mass.value == 1e5 and LightSeeds().mass.value == 100.0


def test_lw_background_greif_bromm():
    # J_21 = 10^(2 - z/5) (Greif & Bromm 2006, memory): 100 at z = 0, 1 at z = 10, 0.01 at z = 20
    np.testing.assert_allclose(j_lw_background([0.0, 10.0, 20.0]), [100.0, 1.0, 0.01],
                               rtol=1e-13)


# --- channel criteria on crafted haloes ---------------------------------------------------------
def test_light_seed_criteria():
    # a tree that resolves minihaloes: upper end at the onset of atomic cooling, 1e4 K
    ch = LightSeeds(t_vir_max_k=1e4)
    rows = [
        {},                                   # 0 qualifies: pristine minihalo 5e3 K
        {"t_vir_k": 2e3},                     # 1 qualifies: at T_min (inclusive)
        {"t_vir_k": 1999.0},                  # 2 too cold for H2 cooling (Tegmark et al. 1997)
        {"t_vir_k": 1e4},                     # 3 atomic cooling: not a minihalo
        {"pristine": False},                  # 4 a progenitor formed stars / held a BH
        {"metallicity": 1e-5},                # 5 Z > 10^-3.5 Z_sun = 4.2e-6 (Bromm et al. 2001)
        {"metallicity": 4e-6},                # 6 qualifies: just below Z_crit
        {"has_bh": True},                     # 7 already hosts a BH
        {"j_lw": 1e5, "m_halo_msun": 1e14},   # 8 qualifies: LW and mass play no role here
    ]
    mask, m = ch.seed(with_rows(rows))
    np.testing.assert_array_equal(mask, [1, 1, 0, 0, 0, 0, 1, 0, 1])
    np.testing.assert_array_equal(m, np.where(mask, 100.0, 0.0))


def test_heavy_seed_criteria_deterministic_threshold():
    # with zero scatter, J_crit = median exactly: seeds iff J_LW > J_crit
    # z_min = 0: row 6 (z = 0) is about the LW background, not the redshift cut
    ch = HeavySeeds(j_crit_median=300.0, j_crit_sigma_dex=0.0, j_lw_sigma_dex=0.0, z_min=0.0)
    rows = [
        {"t_vir_k": 2e4, "j_lw": 1e3},                          # 0 qualifies
        {"t_vir_k": 2e4, "j_lw": 300.0},                        # 1 J = J_crit: not above
        {"t_vir_k": 9e3, "j_lw": 1e3},                          # 2 not atomic cooling
        {"t_vir_k": 2e4, "j_lw": 1e3, "pristine": False},       # 3 not pristine
        {"t_vir_k": 2e4, "j_lw": 1e3, "metallicity": 1e-5},     # 4 enriched
        {"t_vir_k": 2e4, "j_lw": 1e3, "has_bh": True},          # 5 has a BH
        {"t_vir_k": 2e4, "z": 0.0},                             # 6 no tree J: J_bg(0)=100 < 300
        {"t_vir_k": 2e4, "j_lw": 301.0},                        # 7 qualifies
    ]
    mask, m = ch.seed(with_rows(rows))
    np.testing.assert_array_equal(mask, [1, 0, 0, 0, 0, 0, 0, 1])
    np.testing.assert_array_equal(m, np.where(mask, 1e5, 0.0))
    # background only: J_bg(z) = 10^(2 - z/5) vs J_crit = 50 -> seeds for z < 1.505
    ch = HeavySeeds(j_crit_median=50.0, j_crit_sigma_dex=0.0, j_lw_sigma_dex=0.0, z_min=0.0)
    inp = make_inputs(4, t_vir_k=2e4, z=0.0)
    inp = inp._replace(z=np.array([0.0, 1.4, 1.6, 10.0]))
    np.testing.assert_array_equal(ch.seed(inp)[0], [1, 1, 0, 0])


def test_pristine_z_min_cuts_both_channels():
    # pristine (Pop III / direct-collapse) seeding stops below z_min, default 10 (Trenti &
    # Stiavelli 2009, memory); z >= z_min is inclusive
    assert DEFAULT_PRISTINE_Z_MIN == 10.0
    assert LightSeeds().z_min == 10.0 and HeavySeeds().z_min == 10.0
    below = np.nextafter(10.0, 0.0)
    zs = [below, 10.0, 10.5, 9.5, 0.0, 25.0]
    expect = [0, 1, 1, 0, 0, 1]
    # light: pristine 5e3 K minihaloes; heavy: pristine 2e4 K haloes with tree J_LW far above
    # a fixed J_crit, so the redshift is the only criterion that varies
    light_inp = make_inputs(len(zs))._replace(z=np.array(zs))
    heavy_inp = make_inputs(len(zs), t_vir_k=2e4, j_lw=1e4)._replace(z=np.array(zs))
    heavy = dict(j_crit_median=300.0, j_crit_sigma_dex=0.0)
    for ch, inp, m_seed in ((LightSeeds(), light_inp, 100.0),
                            (HeavySeeds(**heavy), heavy_inp, 1e5)):
        mask, m = ch.seed(inp)
        np.testing.assert_array_equal(mask, expect)
        np.testing.assert_array_equal(m, np.where(mask, m_seed, 0.0))
    # another threshold moves the cut; z_min = 0 lets every redshift through
    for z_min, exp in ((9.5, [1, 1, 1, 1, 0, 1]), (0.0, [1] * 6), (25.0, [0, 0, 0, 0, 0, 1])):
        np.testing.assert_array_equal(LightSeeds(z_min=z_min).seed(light_inp)[0], exp)
        np.testing.assert_array_equal(HeavySeeds(z_min=z_min, **heavy).seed(heavy_inp)[0], exp)
    # apply_channels: nothing pristine is seeded below z_min, whatever the order
    code, _ = apply_channels([HeavySeeds(**heavy), LightSeeds()], heavy_inp)
    np.testing.assert_array_equal(code, np.where(expect, CHANNEL_CODES["heavy"], 0))


def test_light_t_vir_max_default_and_explicit():
    # default: no upper T_vir, so a pristine 1e5 K halo (atomic cooling, above the 1e4 K onset)
    # is seeded, standing for its unresolved minihalo progenitors; with t_vir_max_k = 1e4
    # (atomic-cooling onset) it is not, but a 9999 K halo still is
    assert LightSeeds().t_vir_max_k == float("inf")
    assert LightSeeds(t_vir_max_k=float("inf")) == LightSeeds()
    rows = [
        {"t_vir_k": 1e5},                       # 0 atomic cooling
        {"t_vir_k": 1e4},                       # 1 at the onset of atomic cooling
        {"t_vir_k": 9999.0},                    # 2 minihalo
        {"t_vir_k": 1e7},                       # 3 very hot
        {"t_vir_k": 1e5, "pristine": False},    # 4 not pristine
        {"t_vir_k": 1e5, "metallicity": 1e-5},  # 5 enriched (Z_crit, Bromm et al. 2001)
        {"t_vir_k": 1999.0},                    # 6 below the H2 threshold (Tegmark et al. 1997)
        {"t_vir_k": 1e5, "z": 9.0},             # 7 below z_min
    ]
    inp = with_rows(rows)
    mask, m = LightSeeds().seed(inp)
    np.testing.assert_array_equal(mask, [1, 1, 1, 1, 0, 0, 0, 0])
    np.testing.assert_array_equal(m, np.where(mask, 100.0, 0.0))
    mask, m = LightSeeds(t_vir_max_k=1e4).seed(inp)
    np.testing.assert_array_equal(mask, [0, 0, 1, 0, 0, 0, 0, 0])
    np.testing.assert_array_equal(m, np.where(mask, 100.0, 0.0))
    # with no upper end, a lower threshold above 1e4 K is valid
    assert LightSeeds(t_vir_min_k=2e4).seed(inp)[0].tolist() == [1, 0, 0, 1, 0, 0, 0, 0]


def test_halo_mass_seed_criteria():
    ch = HaloMassSeeds(m_halo_min_msun=1e10)
    rows = [
        {"m_halo_msun": 1e10},                                    # 0 at threshold
        {"m_halo_msun": 9.99e9},                                  # 1 below
        {"m_halo_msun": 1e12, "pristine": False, "metallicity": 0.02, "t_vir_k": 1e6},  # 2 yes
        {"m_halo_msun": 1e12, "has_bh": True},                    # 3 has a BH
    ]
    mask, m = ch.seed(with_rows(rows))
    np.testing.assert_array_equal(mask, [1, 0, 1, 0])
    assert m[0] == pytest.approx(1e5 / 0.704) and m[1] == 0.0


def test_dense_gas_seed_criteria():
    # n_H > 3 cm^-3, Z < 3e-4 (a stated choice; cf. Taylor & Kobayashi 2014, memory), T_vir < 6e5 K (GasZone hot threshold)
    ch = DenseGasSeeds()
    rows = [
        {"n_h_cm3": 10.0},                                  # 0 qualifies
        {"n_h_cm3": 3.0},                                   # 1 n = threshold: not above
        {"n_h_cm3": 10.0, "metallicity": 3e-4},             # 2 Z = ceiling: not below
        {"n_h_cm3": 10.0, "metallicity": 2.9e-4, "pristine": False},  # 3 qualifies
        {"n_h_cm3": 10.0, "t_vir_k": 1e6},                  # 4 hot halo
        {"n_h_cm3": 10.0, "has_bh": True},                  # 5 has a BH
    ]
    mask, _ = ch.seed(with_rows(rows))
    np.testing.assert_array_equal(mask, [1, 0, 0, 1, 0, 0])


# --- combination ---------------------------------------------------------------------------------
def test_apply_channels_order_and_single_seed():
    # a halo that qualifies for several channels gets the first one in the list
    rows = [
        {"t_vir_k": 2e4, "j_lw": 1e4, "n_h_cm3": 10.0, "m_halo_msun": 1e11},  # heavy+dense+mass
        {"n_h_cm3": 10.0},                                          # light + dense
        {"t_vir_k": 2e4, "n_h_cm3": 10.0, "pristine": False},       # dense only
        {"m_halo_msun": 1e11, "t_vir_k": 1e5, "pristine": False, "metallicity": 0.01},  # mass
        {"t_vir_k": 2e4, "j_lw": 1e4, "n_h_cm3": 10.0, "m_halo_msun": 1e11, "has_bh": True},
        {"t_vir_k": 1e3},                                           # nothing
    ]
    inp = with_rows(rows)
    # minihalo light seeds (T_vir < 1e4 K), so that the atomic-cooling row 0 is not a light seed
    light, heavy = LightSeeds(t_vir_max_k=1e4), HeavySeeds(j_crit_sigma_dex=0.0)
    mass_ch, dense = HaloMassSeeds(), DenseGasSeeds(mass=SeedMass("fixed", value=3e4))
    code, m = apply_channels([light, heavy, mass_ch, dense], inp)
    c = CHANNEL_CODES
    np.testing.assert_array_equal(code, [c["heavy"], c["light"], c["dense_gas"], c["halo_mass"],
                                         0, 0])
    np.testing.assert_allclose(m, [1e5, 100.0, 3e4, 1e5 / 0.704, 0.0, 0.0])
    code, m = apply_channels([dense, mass_ch, heavy, light], inp)
    np.testing.assert_array_equal(code, [c["dense_gas"], c["dense_gas"], c["dense_gas"],
                                         c["halo_mass"], 0, 0])
    code, m = apply_channels([mass_ch, heavy], inp)
    np.testing.assert_array_equal(code, [c["halo_mass"], 0, 0, c["halo_mass"], 0, 0])
    code, m = apply_channels([], inp)
    assert not code.any() and not m.any()


def test_apply_channels_never_seeds_a_halo_with_a_bh():
    # property: whatever the inputs, has_bh haloes get code 0 and mass 0; seeded ones mass > 0
    g = np.random.default_rng(3)
    n = 5000
    inp = make_inputs(
        n, t_vir_k=10 ** g.uniform(3, 6, n), pristine=g.random(n) < 0.7,
        metallicity=np.where(g.random(n) < 0.5, 0.0, 10 ** g.uniform(-7, -2, n)),
        n_h_cm3=10 ** g.uniform(-2, 2, n), m_halo_msun=10 ** g.uniform(5, 12, n),
        j_lw=np.where(g.random(n) < 0.5, np.nan, 10 ** g.uniform(0, 4, n)),
        has_bh=g.random(n) < 0.3, z=g.uniform(0, 25, n))
    # light seeds limited to minihaloes (T_vir < 1e4 K): every channel can win somewhere.
    # With the defaults (no upper T_vir) every halo heavy seeds also qualifies for light
    # (same pristine, Z and z_min cuts, 1e4 K >= 2e3 K), so light run first shadows heavy.
    for light, codes in ((LightSeeds(t_vir_max_k=1e4), {0, 1, 2, 3, 4}),
                         (LightSeeds(), {0, 1, 3, 4})):
        chans = [light] + [SEEDING_CHANNELS[k]() for k in ("heavy", "halo_mass", "dense_gas")]
        code, m = apply_channels(chans, inp)
        assert not code[inp.has_bh].any()
        assert np.all((m > 0) == (code > 0))
        assert set(np.unique(code)) == codes
        # first channel wins: each code equals the first channel whose own mask fires
        masks = np.array([ch.seed(inp)[0] for ch in chans])
        first = np.where(masks.any(axis=0), masks.argmax(axis=0) + 1, 0)
        np.testing.assert_array_equal(code, first)
    # ... but heavy still fires with the defaults when it runs before light
    code, _ = apply_channels([HeavySeeds(), LightSeeds()], inp)
    assert set(np.unique(code)) == {0, 1, 2}


def test_apply_channels_rejects_duplicates_and_strangers():
    inp = make_inputs(3)
    with pytest.raises(ParameterError, match="must name each channel once; got 'light' twice"):
        apply_channels([LightSeeds(), LightSeeds(t_vir_min_k=1e3)], inp)
    with pytest.raises(ParameterError, match="`channels` of apply_channels must be instances"):
        apply_channels([object()], inp)


def test_registry_and_codes():
    assert set(SEEDING_CHANNELS) == set(CHANNEL_CODES)
    for name, cls in SEEDING_CHANNELS.items():
        assert cls.name == name
    assert sorted(CHANNEL_CODES.values()) == [1, 2, 3, 4]
    assert len(set(SEEDING_PURPOSES.values())) == len(SEEDING_PURPOSES)


# --- random draws ------------------------------------------------------------------------------
def _keys(n=N_DRAWS, seed=11):
    return rng.stream_keys(seed, np.arange(n))


def test_log_uniform_moments():
    # uniform distribution of log10 M on [a, b): mean (a+b)/2, variance (b-a)^2/12
    sm = SeedMass("log_uniform", lo=10.0, hi=1000.0)
    lm = np.log10(sm.draw(rng.uniform(_keys(), 0, 1)))
    se = 2.0 / math.sqrt(12.0 * N_DRAWS)
    assert abs(lm.mean() - 2.0) < 5 * se
    assert abs(lm.var() - 4.0 / 12.0) < 5 * (4.0 / 12.0) * math.sqrt(0.8 / N_DRAWS)
    assert lm.min() >= 1.0 and lm.max() < 3.0
    # deciles of a uniform distribution (closed form)
    np.testing.assert_allclose(np.quantile(lm, np.linspace(0.1, 0.9, 9)),
                               1.0 + 2.0 * np.linspace(0.1, 0.9, 9), atol=0.01)


def test_log_normal_moments():
    # normal distribution of log10 M: median log10(median), standard deviation sigma_dex, and
    # 84th - 16th percentile = 2 sigma (normal distribution, closed form)
    sm = SeedMass("log_normal", median=1e5, sigma_dex=0.3)
    lm = np.log10(sm.draw(rng.uniform(_keys(), 0, 1)))
    assert abs(np.median(lm) - 5.0) < 5 * 1.2533 * 0.3 / math.sqrt(N_DRAWS)
    assert abs(lm.std() - 0.3) < 5 * 0.3 / math.sqrt(2 * N_DRAWS)
    p16, p84 = np.percentile(lm, [15.865525, 84.134475])
    assert (p84 - p16) / 2 == pytest.approx(0.3, rel=0.01)
    assert np.all(np.isfinite(sm.draw(np.array([0.0, 1.0 - 2.0**-53]))))


def test_fixed_seed_mass():
    np.testing.assert_array_equal(SeedMass("fixed", value=250.0).draw(np.array([0.0, 0.9])),
                                  [250.0, 250.0])


def test_j_crit_lognormal_draws():
    # log10 J_crit ~ N(log10 median, sigma^2): sample median and scatter reproduce the requested
    # values (normal distribution; standard errors 1.2533 sigma/sqrt(n) and sigma/sqrt(2n))
    ch = HeavySeeds(j_crit_median=300.0, j_crit_sigma_dex=0.5)
    inp = make_inputs(N_DRAWS)
    lj = np.log10(ch.j_crit(inp))
    assert abs(np.median(lj) - math.log10(300.0)) < 5 * 1.2533 * 0.5 / math.sqrt(N_DRAWS)
    assert abs(lj.std() - 0.5) < 5 * 0.5 / math.sqrt(2 * N_DRAWS)
    # local LW intensity without a tree value: median J_bg(z), scatter j_lw_sigma_dex
    lw = np.log10(HeavySeeds(j_lw_sigma_dex=0.4).j_lw(inp))
    assert abs(np.median(lw) - math.log10(j_lw_background(20.0))) < 5 * 1.2533 * 0.4 / math.sqrt(
        N_DRAWS)
    assert abs(lw.std() - 0.4) < 5 * 0.4 / math.sqrt(2 * N_DRAWS)
    # J_crit and the J_LW scatter use independent draws (different purposes)
    assert abs(np.corrcoef(lj, lw)[0, 1]) < 5 / math.sqrt(N_DRAWS)


@pytest.mark.parametrize("z, tree_j", [(5.0, np.nan), (0.0, np.nan), (20.0, 100.0)])
def test_heavy_seeded_fraction_closed_form(z, tree_j):
    # fraction of eligible haloes with J_LW > J_crit:
    #   no tree value: Phi[(log J_bg - log J_med) / sqrt(s_lw^2 + s_crit^2)]
    #   tree value J:  Phi[(log J - log J_med) / s_crit]
    # (difference of independent normals; normal CDF from scipy.special.ndtr)
    # z_min = 0: the fraction at z = 0 and 5 tests the LW draws, not the redshift cut
    ch = HeavySeeds(j_crit_median=300.0, j_crit_sigma_dex=0.5, j_lw_sigma_dex=0.6, z_min=0.0)
    inp = make_inputs(N_DRAWS, t_vir_k=2e4, z=z, j_lw=tree_j)
    frac = ch.seed(inp)[0].mean()
    if np.isnan(tree_j):
        p = ndtr((math.log10(j_lw_background(z)) - math.log10(300.0)) / math.hypot(0.5, 0.6))
    else:
        p = ndtr((math.log10(tree_j) - math.log10(300.0)) / 0.5)
    assert 0.0 < p < 1.0
    assert abs(frac - p) < 5 * math.sqrt(p * (1 - p) / N_DRAWS) + 1e-6


def test_determinism_and_independence_of_grouping():
    chans = [LightSeeds(mass=SeedMass("log_uniform", lo=10.0, hi=1000.0)),
             HeavySeeds(mass=SeedMass("log_normal", median=1e5, sigma_dex=0.3)),
             DenseGasSeeds(mass=SeedMass("log_uniform", lo=1e4, hi=1e5))]
    g = np.random.default_rng(5)
    n = 4000
    ids = g.permutation(10 * n)[:n] + 1000
    cols = dict(t_vir_k=10 ** g.uniform(3, 5, n), n_h_cm3=10 ** g.uniform(-1, 2, n),
                j_lw=np.where(g.random(n) < 0.5, np.nan, 10 ** g.uniform(1, 4, n)),
                z=g.uniform(0, 20, n))
    a = apply_channels(chans, make_inputs(n, seed=42, node_ids=ids, **cols))
    b = apply_channels(chans, make_inputs(n, seed=42, node_ids=ids, **cols))
    np.testing.assert_array_equal(a[0], b[0])
    np.testing.assert_array_equal(a[1], b[1])
    assert len(set(a[1][a[0] == 1])) > 100          # log-uniform masses do vary
    # the same node in another order / another chunk gets the same seed (keys are per node)
    perm = g.permutation(n)[: n // 3]
    c = apply_channels(chans, make_inputs(len(perm), seed=42, node_ids=ids[perm],
                                          **{k: v[perm] for k, v in cols.items()}))
    np.testing.assert_array_equal(c[0], a[0][perm])
    np.testing.assert_array_equal(c[1], a[1][perm])
    # another run seed gives other draws
    d = apply_channels(chans, make_inputs(n, seed=43, node_ids=ids, **cols))
    both = (a[0] == 1) & (d[0] == 1)
    assert both.sum() > 100 and np.mean(a[1][both] != d[1][both]) > 0.99


def test_scalar_redshift_broadcasts():
    inp = make_inputs(3)._replace(z=20.0)
    code, _ = apply_channels([HeavySeeds(), LightSeeds()], inp)
    np.testing.assert_array_equal(code, [1, 1, 1])


# --- parameter validation ---------------------------------------------------------------------
@pytest.mark.parametrize("make, message", [
    (lambda: SeedMass("gaussian"),
     "`kind` of SeedMass must be one of 'fixed', 'log_uniform', 'log_normal'; got 'gaussian'"),
    (lambda: SeedMass("fixed"), "`value` of SeedMass must be given for kind 'fixed'; got None"),
    (lambda: SeedMass("fixed", value=10.0, lo=1.0),
     "`lo` of SeedMass must be None for kind 'fixed'; got 1.0"),
    (lambda: SeedMass("fixed", value=-3), "`value` of SeedMass must be > 0; got -3"),
    (lambda: SeedMass("log_uniform", lo=100.0, hi=10.0),
     "`hi` of SeedMass must be > lo (100); got 10.0"),
    (lambda: SeedMass("log_normal", median=1e5, sigma_dex=-0.1),
     "`sigma_dex` of SeedMass must be >= 0; got -0.1"),
    (lambda: LightSeeds(t_vir_min_k=2e4, t_vir_max_k=1e4),
     "`t_vir_max_k` of LightSeeds must be > t_vir_min_k (20000); got 10000.0"),
    (lambda: LightSeeds(z_min=-1.0), "`z_min` of LightSeeds must be >= 0; got -1.0"),
    (lambda: HeavySeeds(z_min=-0.5), "`z_min` of HeavySeeds must be >= 0; got -0.5"),
    (lambda: LightSeeds(z_min=float("nan")), "`z_min` of LightSeeds must be finite; got nan"),
    (lambda: LightSeeds(mass=100.0), "`mass` of LightSeeds must be a SeedMass; got 100.0"),
    (lambda: HeavySeeds(j_crit_median=0.0), "`j_crit_median` of HeavySeeds must be > 0; got 0.0"),
    (lambda: HeavySeeds(j_lw_sigma_dex=float("inf")),
     "`j_lw_sigma_dex` of HeavySeeds must be finite; got inf"),
    (lambda: HaloMassSeeds(m_halo_min_msun=-1e10),
     "`m_halo_min_msun` of HaloMassSeeds must be > 0; got -10000000000.0"),
    (lambda: DenseGasSeeds(n_h_min_cm3="3"),
     "`n_h_min_cm3` of DenseGasSeeds must be a number; got '3'"),
])
def test_parameter_messages(make, message):
    with pytest.raises(ParameterError) as err:
        make()
    assert str(err.value) == message


def test_channels_are_frozen():
    ch = HeavySeeds()
    with pytest.raises(AttributeError):
        ch.j_crit_median = 1.0
