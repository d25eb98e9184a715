"""Full-model black-hole growth of sample halos against a high-accuracy ODE reference.

The engine advances a halo's reservoir and its black hole over a snapshot interval in
operator-split substeps, each with a closed form (exact reservoir step, then Bondi /
Eddington growth with the zone density frozen). The reference below integrates the *same*
equations in continuous time with scipy's ``solve_ivp`` (LSODA, rtol 1e-10; Virtanen et al.
2020, Nature Methods 17, 261; LSODA: Petzold 1983, SIAM J. Sci. Stat. Comput. 4, 136;
journal references from memory), with every rate taken from the model's own components,
so any difference is the engine's discretisation (or a bug), not the physics. Requirement
(issue): final black-hole mass to 0.5%.

Per snapshot interval ``[t_i, t_i+1]`` the halo properties are frozen at the interval's start
node, as the engine does (``r_vir, V_c, T_vir, v_esc`` from ``model.halo``, ``t_dyn`` from
``dynamical_time_gyr(f_r r_vir, V_c)``), the inflow is ``I = f_b,eff (M_i+1 - M_i) / dt``
and ``y = (M_gas, M_*, M_Z, M_BH)`` obeys

    dM_gas/dt = I - (1 - R + eta) eps_* M_gas / t_dyn - Mdot (1 + f_out)
    dM_*/dt   = (1 - R) eps_* M_gas / t_dyn
    dM_Z/dt   = y (1 - R) eps_* M_gas / t_dyn - (1 - R + eta) eps_* M_Z / t_dyn
                - (M_Z / M_gas) Mdot (1 + f_out)
    dM_BH/dt  = (1 - eps_r) Mdot,   Mdot = min(A(rho(M_gas), c_s) M_BH^2, M_BH / tau_Edd)

(star formation, supernova loading and recycling: Cole et al. 2000, Tinsley 1980; Bondi 1952
with Eddington cap; feedback outflow ``f_out`` per unit accreted mass from the model's
feedback component, Silk & Rees 1998 / King 2003), with the gas floored at 0. At each node
the gas above ``f_b M_desc`` is removed as in the engine.

The halos are single-branch chains (one node per snapshot, no mergers) following the smooth
mass history ``M(z) = M_0 exp(-alpha z)`` (the form of Wechsler et al. 2002, ApJ 568, 52, memory;
the ``alpha`` values are chosen for the test, not fitted).
"""

from __future__ import annotations

import functools

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from bhgrow.config import from_table
from bhgrow.cosmology import Cosmology
from bhgrow.physics.gas import dynamical_time_gyr
from bhgrow.pipeline import run_model
from bhgrow.trees.forest import Forest

N_SNAP = 30
Z_START = 12.0
# snapshots evenly spaced in ln(1 + z) from z = 12 to 0
Z_SNAP = np.expm1(np.linspace(np.log1p(Z_START), 0.0, N_SNAP))
Z_SNAP[-1] = 0.0
# (M_0 at z = 0 [Msun], alpha): halos of 1e11, 1e12, 1e13 Msun today, 7e7-2e8 Msun at z = 12
HALOS = ((1e11, 0.60), (1e12, 0.75), (1e13, 0.90))
SEED_MSUN = 1e5
RTOL_ISSUE = 5e-3   # required agreement of the final black-hole mass (issue)
# what the coupled closed-form solver achieves at the default substep (measured ~1e-4)
RTOL_ENGINE = 1e-3


def _mass_histories() -> np.ndarray:
    """Halo masses, shape (n_halos, N_SNAP), Msun."""
    return np.array([m0 * np.exp(-alpha * Z_SNAP) for m0, alpha in HALOS])


def _chains() -> Forest:
    """One single-branch forest per halo of :data:`HALOS`."""
    m = _mass_histories()
    cols = {k: [] for k in ("node_id", "desc_id", "forest_id", "snap", "mass_msun")}
    for f in range(len(HALOS)):
        ids = 1000 * f + np.arange(N_SNAP)
        cols["node_id"].append(ids)
        cols["desc_id"].append(np.r_[ids[1:], -1])
        cols["forest_id"].append(np.full(N_SNAP, f))
        cols["snap"].append(np.arange(N_SNAP))
        cols["mass_msun"].append(m[f])
    cols = {k: np.concatenate(v) for k, v in cols.items()}
    return Forest.from_columns(cols, np.arange(N_SNAP), Z_SNAP, source="chains")


def _config(feedback: str, law: str = "bondi_hoyle", **run):
    # one seed of 1e5 Msun in the first node of every chain (all are above 1e6 Msun)
    return from_table({
        "run": {"histories": False, **run},
        "seeding": {"channels": ["halo_mass"],
                    "halo_mass": {"m_halo_min_msun": 1e6,
                                  "mass": {"kind": "fixed", "value": SEED_MSUN}}},
        "feedback": {"mode": feedback},
        "accretion": {"law": law},
    })


def reference_final_state(config, rtol: float = 1e-10) -> np.ndarray:
    """Continuous-time integration of the engine's equations for the chains of :data:`HALOS`.

    Returns
    -------
    numpy.ndarray
        Shape (n_halos, 4): gas, stars, metals and black-hole mass at z = 0, Msun.
    """
    model = config.model
    cosmo = Cosmology.from_name(config.run.cosmology)
    assert model.spin.mode == "none"      # constant efficiency over the run (spin stays 0)
    mh = _mass_histories()
    nh = mh.shape[0]
    t = cosmo.age_gyr(Z_SNAP)
    sf = model.star_formation
    r, eps_star, yld = sf.recycle, sf.efficiency, sf.metal_yield
    eps = np.asarray(model.efficiency.efficiency(np.zeros(nh)), dtype=float)
    inv_tau = np.asarray(model.eddington.coefficient(eps), dtype=float)
    fb = cosmo.fb

    fbe0 = np.asarray(model.reionization.baryon_fraction(mh[:, 0], Z_SNAP[0], fb), dtype=float)
    y = np.zeros((nh, 4))
    y[:, 0] = fbe0 * mh[:, 0]           # a new halo starts with f_b,eff M of pristine gas
    y[:, 3] = SEED_MSUN
    for i in range(N_SNAP - 1):
        m, z, dt = mh[:, i], Z_SNAP[i], t[i + 1] - t[i]
        p = model.halo.properties(m, z, cosmo)
        rv, vc, tv, ve = (np.asarray(a, dtype=float) for a in
                          (p.r_vir_kpc, p.v_c_kms, p.t_vir_k, p.v_esc_kms))
        fbe = np.asarray(model.reionization.baryon_fraction(m, z, fb), dtype=float)
        inflow = fbe * (mh[:, i + 1] - m) / dt
        t_dyn = np.asarray(dynamical_time_gyr(model.gas_zone.radius_frac * rv, vc), float)
        sfr_per_gas = eps_star / t_dyn
        loss_per_gas = (1.0 - r + np.asarray(sf.mass_loading(vc), float)) * sfr_per_gas
        per_unit = 1.0 + np.asarray(model.feedback.gas_removed(np.ones(nh), eps, ve), float)
        # zone density per Msun of gas and sound speed (the zone is uniform, so the density
        # is linear in the gas mass: checked here, then used in the right-hand side, which
        # is evaluated ~1e4 times per interval)
        rho_1, cs, _ = model.gas_zone.state(np.ones(nh), rv, tv)
        np.testing.assert_allclose(model.gas_zone.state(np.full(nh, 1e8), rv, tv)[0],
                                   1e8 * rho_1, rtol=1e-14)

        formed_per_gas = (1.0 - r) * sfr_per_gas

        def rhs(_t, s, rho_1=rho_1, cs=cs, inflow=inflow, formed_per_gas=formed_per_gas,
                loss_per_gas=loss_per_gas, per_unit=per_unit):
            s = s.reshape(nh, 4)
            mg = np.maximum(s[:, 0], 0.0)                  # gas floor
            mz, mb = s[:, 2], s[:, 3]
            a_bondi = np.asarray(model.accretion.coefficient(rho_1 * mg, cs, 0.0), dtype=float)
            mdot = np.minimum(a_bondi * mb * mb, inv_tau * mb)   # Bondi, Eddington-capped
            drain = mdot * per_unit                        # accreted + blown out
            d = np.empty((nh, 4))
            d[:, 0] = inflow - loss_per_gas * mg - drain
            d[:, 1] = formed_per_gas * mg
            # metals leave with the gas at its metallicity (drain is 0 where the gas is 0)
            d[:, 2] = yld * d[:, 1] - (loss_per_gas + drain / np.maximum(mg, 1e-300)) * mz
            d[:, 3] = (1.0 - eps) * mdot
            return d.ravel()

        atol = np.tile([1e-6, 1e-6, 1e-12, 1e-6], nh)     # Msun
        sol = solve_ivp(rhs, (0.0, dt), y.ravel(), method="LSODA", rtol=rtol, atol=atol)
        assert sol.success, sol.message
        y = sol.y[:, -1].reshape(nh, 4).copy()
        y[:, 0] = np.maximum(y[:, 0], 0.0)
        # on arrival at the descendant: gas above f_b M_desc is removed (as the engine does)
        cut = np.clip(y[:, 0] + y[:, 1] + y[:, 3] - fb * mh[:, i + 1], 0.0, y[:, 0])
        y[:, 0] -= cut
    return y


@pytest.fixture(scope="module")
def chains():
    return _chains()


@functools.lru_cache(maxsize=None)
def _reference(feedback: str, rtol: float = 1e-10, law: str = "bondi_hoyle") -> np.ndarray:
    return reference_final_state(_config(feedback, law), rtol=rtol)


@pytest.fixture(scope="module", params=["none", "energy", "momentum"])
def compared(request, chains):
    res = run_model(chains, _config(request.param))
    tab = res.black_holes
    tab.sort("forest_id")
    return request.param, tab, _reference(request.param)


def test_reference_is_converged():
    # the reference must be far more accurate than the 0.5% it checks: loosening its
    # tolerance 100-fold moves the final masses by < 1e-6 (relative)
    fine = _reference("momentum", 1e-10)[:, 3]
    coarse = _reference("momentum", 1e-8)[:, 3]
    np.testing.assert_allclose(coarse, fine, rtol=1e-6)


def test_each_chain_seeds_once_at_the_first_snapshot(compared):
    _mode, tab, _ref = compared
    assert len(tab) == len(HALOS)
    np.testing.assert_array_equal(tab["seed_z"], Z_START)
    np.testing.assert_array_equal(tab["status"], "central")
    np.testing.assert_array_equal(tab["final_z"], 0.0)


def test_final_black_hole_mass_matches_reference(compared):
    # the issue's requirement: engine vs continuous-time solve_ivp reference of the same
    # equations (Virtanen et al. 2020), final black-hole mass within 0.5%
    mode, tab, ref = compared
    m_engine = np.asarray(tab["final_mass_msun"], dtype=float)
    m_ref = ref[:, 3]
    assert np.all(m_ref > 5 * SEED_MSUN)      # the check is about growth, not the seed
    rel = m_engine / m_ref - 1.0
    detail = ", ".join(f"M0={m0:.0e}: engine {me:.4e} ref {mr:.4e} ({d:+.2%})"
                       for (m0, _), me, mr, d in zip(HALOS, m_engine, m_ref, rel))
    assert np.all(np.abs(rel) < RTOL_ISSUE), f"feedback={mode}: {detail}"
    assert np.all(np.abs(rel) < RTOL_ENGINE), f"feedback={mode}: {detail}"


@pytest.mark.parametrize("feedback", ["energy", "momentum"])
def test_booth_schaye_final_mass_matches_reference(chains, feedback):
    # An accretion law nonlinear in the gas, Booth & Schaye (2009): A ~ n_H^beta x Bondi,
    # so the coefficient per unit gas grows as the gas^2 (beta = 2) above n_H* and the
    # hole's drain feeds back on it within a step. The engine freezes it per step at the
    # step's self-consistent mean gas; against the same equations in continuous time
    # (solve_ivp; Virtanen et al. 2020) the final mass must meet the issue's 0.5%.
    # (Frozen at each step's starting gas, as before, the energy-feedback chains were off
    # by 0.42-0.90%, the momentum ones by up to 0.06%; now 0.03-0.16% and 0.02%.)
    cfg = _config(feedback, "booth_schaye")
    res = run_model(chains, cfg)
    tab = res.black_holes
    tab.sort("forest_id")
    ref = _reference(feedback, law="booth_schaye")
    m_engine = np.asarray(tab["final_mass_msun"], dtype=float)
    assert np.all(ref[:, 3] > 5 * SEED_MSUN)
    # the boost acts: the reference differs from the unboosted law's by more than the bar
    assert np.max(np.abs(ref[:, 3] / _reference(feedback)[:, 3] - 1.0)) > RTOL_ISSUE
    rel = m_engine / ref[:, 3] - 1.0
    assert np.all(np.abs(rel) < RTOL_ISSUE), (feedback, rel)
