"""Benchmark: growth-engine throughput (nodes/s per core), peak memory per node, and two ratios.

Part 1 -- a big synthetic forest of toy trees (:func:`bhgrow.trees.toy.toy_forest`;
``--nodes``, default 1e7; the number of forests giving at least that size is found from a
pilot sample). Cases, each with pair dynamics on (the default model) and off:

* ``engine``   -- :func:`bhgrow.engine.run_forest` on the whole forest as one chunk;
* ``pipeline`` -- :func:`bhgrow.pipeline.run_model` (default chunking ``run.chunk_nodes``, one
  worker: engine per chunk + merged tables + LISA SNR of every merger);
* ``floor``    -- the no-physics snapshot walk described below.

"Pairs off" switches off every stage of the merger clock (``[mergers.friction]``,
``[mergers.hardening]`` and ``[mergers.inspiral]`` with ``enabled = false``): a satellite's
black hole coalesces with the central at the first snapshot after the halo merger, so no
black hole stays sinking; coalescences, remnants and recoils are still computed.

Every case runs in a forked child process (Linux) after the forest is built and the lazy
tables are warmed up, so each starts from the same state. Throughput is nodes / wall time
of one process (the engine is single-threaded numpy; the CPU/wall ratio is printed to
show it). Peak memory: growth of the resident set during the call (``VmHWM`` after a reset,
minus ``VmRSS`` at the start), and with ``--traced`` also the peak of allocations traced by
``tracemalloc`` in a separate, untimed run. Design target (DESIGN §2): <~ 1 microsecond per
tree node per core. On a shared machine (CPU/wall well below 1) the nodes per CPU second
are the better per-core figure.

Part 2 -- two ratios on one small forest (``--small-forests`` toy forests on
``--small-snaps`` snapshots; by default 1530 forests on 20 snapshots, 2.0e5 nodes, with
solve_ivp run on a random 5% of them, ``--ivp-sample``, its time scaled up by the node
count), measured in the same run. The engine's fixed cost per snapshot dominates below
~1e5 nodes, so the ratio (a) falls there (~370 at 3.9e4 nodes, ~70 at 1e3):

(a) **per-halo solve_ivp / bhgrow.** The script a researcher would otherwise write: loop over
    forests, walk the forest's snapshots, and for every halo holding a black hole integrate
    ``(M_gas, M_*, M_Z, M_BH)`` over the node's interval with :func:`scipy.integrate.solve_ivp`
    (``--method`` LSODA, ``--rtol`` 1e-6). The equations, the frozen per-interval halo
    properties and every rate are those of ``tests/test_engine_reference.py`` (the
    full-model reference for single-branch chains), taken from the model's own components;
    inflow is the engine's (the descendant's smooth growth, credited to its main
    progenitor); halos without a black hole take the model's closed-form reservoir step
    (:meth:`StarFormation.step`). State passes to descendants with the baryon cap, and the
    black holes arriving in one halo coalesce at once (the main progenitor's black hole, or
    else the most massive, is the central; others merge in seeding order), with the remnant
    mass and spin from the model's ``remnant`` component and spins taken aligned with the
    orbit. **Seeding is not re-implemented: the script seeds the same halos with the same
    masses as bhgrow did, read from bhgrow's result** (``bh_id`` is the seeding halo's
    ``node_id``). To compare like with like, both sides run the default model with pair
    dynamics off (instant coalescence, as above), recoil ``none`` and no histories. LSODA
    is the right method: the reservoir is stiff where star formation is fast, and RK45 at
    rtol 1e-6 had not finished the default small forest after 10 minutes.
    Everything but the ODE integration is vectorised over the halos of one forest and
    snapshot, which favours the solve_ivp script: the ratio is a lower bound of what a fully
    per-halo script costs. Printed: time(solve_ivp script) / time(bhgrow ``run_forest``) and
    the agreement of the total final black-hole mass (and of the per-root masses).
(b) **bhgrow / no-physics floor.** The same snapshot walk as the engine, without physics: for
    each snapshot slice, new halos get ``f_b M`` of gas, seeds (bhgrow's) are added, gas,
    stars, metals and a black-hole mass per node pass to descendants with ``np.add.at`` /
    ``np.bincount``, and black holes move to their hosts' descendants. Node state is kept
    in the engine's window of live rows (:class:`bhgrow.engine._NodeState`), as the engine
    keeps it (since 2026-12-02; before, both used whole-forest arrays): on a virtual
    machine that backs fresh pages slowly, whole-forest arrays cost the floor more than the
    walk itself, and the ratio would reward the engine's memory layout. Ratio =
    time(bhgrow ``run_forest``, default model) / time(floor): the price of the physics.
    Measured on the small and on the big forest; on the big one both from the best runs
    and as the median ratio of ``--pairs-interleaved`` (default 3) engine/floor pairs run
    in turn, which a change of a shared machine's speed during the benchmark affects less;
    the same pairs' ratio is also given in process CPU time (user + system), which leaves
    out the time a virtual machine's host takes from the process (steal).
    The engine sets glibc's allocator to reuse freed memory at its first call
    (:mod:`bhgrow._alloc`); the script applies the same setting before any case runs, so
    the floor runs with it too.

A compact Markdown table for the README closes the output.

Sizes: the default run (1e7 nodes, all cases, ``--traced``) took ~5 min on a shared
2-CPU machine with the engine at ~1e6 nodes/s, and needs ~4 GB of memory; use
``--nodes 1e5`` (or ``--cases engine``, ``--pairs on``) for a quick look.

    python benchmarks/bench_engine.py [--nodes 1e7] [--snaps 40] [--pairs both]
        [--cases engine,pipeline,floor] [--histories on] [--traced] [--repeat 1]
        [--pairs-interleaved 3]
        [--small-forests 1530] [--small-snaps 20] [--ivp-sample 0.05] [--rtol 1e-6]
        [--method LSODA]
        [--no-ratios] [--ratios-only] [--profile]
"""

from __future__ import annotations

import argparse
import cProfile
import dataclasses
import io
import math
import pstats
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from _measure import best_of, load_note, measure, n_cpus  # noqa: E402

from bhgrow._alloc import keep_freed_memory  # noqa: E402
from bhgrow.config import from_table  # noqa: E402
from bhgrow.cosmology import Cosmology  # noqa: E402
from bhgrow.engine import CENTRAL, HOST_ENDED, SINKING, _NodeState, run_forest  # noqa: E402
from bhgrow.physics.gas import dynamical_time_gyr  # noqa: E402
from bhgrow.pipeline import run_model  # noqa: E402
from bhgrow.trees.toy import toy_forest  # noqa: E402

#: config table that switches off pair dynamics: every merger-clock stage disabled, so a
#: satellite's black hole coalesces at the first snapshot after its halo merged
NO_PAIRS = {"mergers": {"friction": {"enabled": False}, "hardening": {"enabled": False},
                        "inspiral": {"enabled": False}}}


def config_for(pairs: bool, histories: bool, extra: dict | None = None):
    table = {} if pairs else dict(NO_PAIRS)
    table.update(extra or {})
    cfg = from_table(table, "<bench>")
    return dataclasses.replace(cfg, run=dataclasses.replace(cfg.run, histories=histories))


# ------------------------------------------------------------------------------------------
# forests
# ------------------------------------------------------------------------------------------
def forest_for_nodes(target: int, *, seed: int, n_snap: int, box_mpc: float,
                     n_forests: int | None = None, pilot: int = 1000):
    """A toy forest of at least ``target`` nodes (within a few per cent), or of exactly
    ``n_forests`` forests. Returns the forest and its number of forests.

    The forest count comes from the mean size of a pilot sample (+2%); if the forest falls
    short of ``target``, it is rebuilt with proportionally more forests.
    """
    if n_forests is not None:
        return toy_forest(int(n_forests), seed=seed, n_snap=n_snap, box_mpc=box_mpc), \
            int(n_forests)
    probe = toy_forest(pilot, seed=seed + 7919, n_snap=n_snap, box_mpc=box_mpc)
    nf = max(1, math.ceil(1.02 * target / (probe.n_nodes / pilot)))
    for _ in range(3):
        forest = toy_forest(nf, seed=seed, n_snap=n_snap, box_mpc=box_mpc)
        if forest.n_nodes >= target:
            break
        nf = math.ceil(nf * 1.01 * target / forest.n_nodes)
    return forest, nf


def forest_bytes(forest) -> int:
    arrays = [a for a in vars(forest).values() if isinstance(a, np.ndarray)]
    arrays += list(forest.extra.values())
    return int(sum(a.nbytes for a in arrays))


def seed_rows_of(forest, bh_id: np.ndarray, seed_mass: np.ndarray):
    """Node rows of the seeding halos (``bh_id`` is the seeding node's ``node_id``)."""
    by_id = np.argsort(forest.node_id, kind="stable")
    rows = by_id[np.searchsorted(forest.node_id, bh_id, sorter=by_id)]
    o = np.argsort(rows, kind="stable")
    return rows[o], np.asarray(seed_mass, dtype=float)[o]


# ------------------------------------------------------------------------------------------
# (b) the no-physics floor
# ------------------------------------------------------------------------------------------
def floor_walk(forest, seed_rows: np.ndarray, seed_mass: np.ndarray, fb: float) -> dict:
    """The engine's snapshot walk without physics (see the module notes).

    Node state (gas, stars, metals, black-hole mass) lives in the engine's window of live
    rows (:class:`bhgrow.engine._NodeState`), as in the engine, so that the ratio compares
    the physics and not two memory layouts. ``seed_rows`` must be sorted. Returns the
    final totals (to keep the work honest).
    """
    desc = forest.desc_index
    mass_h = forest.mass_msun
    po = forest.prog_offsets
    st = _NodeState.for_forest(forest, floats=("gas", "stars", "metals", "bh"), flags=())
    host = np.zeros(0, dtype=np.int64)
    mbh = np.zeros(0)
    seed_cut = np.searchsorted(seed_rows, forest.snap_offsets)
    out = {"gas": 0.0, "bh": 0.0}
    for k in range(len(forest.snapshots)):
        a, b = int(forest.snap_offsets[k]), int(forest.snap_offsets[k + 1])
        if a == b:
            continue
        d_sl = desc[a:b]
        st.cover(a, max(b, int(d_sl.max()) + 1))
        ls = slice(a - st.base, b - st.base)
        gas, stars, metals, bh_node = st.gas, st.stars, st.metals, st.bh
        new = po[a + 1:b + 1] == po[a:b]
        gas[ls][new] = fb * mass_h[a:b][new]
        s0, s1 = seed_cut[k], seed_cut[k + 1]
        if s1 > s0:
            host = np.concatenate([host, seed_rows[s0:s1]])
            mbh = np.concatenate([mbh, seed_mass[s0:s1]])
        here = np.flatnonzero((host >= a) & (host < b))
        bh_node[ls] = np.bincount(host[here] - a, weights=mbh[here], minlength=b - a)
        go = d_sl >= 0
        d = d_sl[go] - st.base
        for arr in (gas, stars, metals, bh_node):
            np.add.at(arr, d, arr[ls][go])
        roots = ~go
        out["gas"] += float(gas[ls][roots].sum())
        out["bh"] += float(bh_node[ls][roots].sum())
        host[here] = desc[host[here]]          # -1 where the host ends: never in a slice again
    out["n_bh"] = int(host.size)
    return out


# ------------------------------------------------------------------------------------------
# (a) the per-halo solve_ivp script
# ------------------------------------------------------------------------------------------
def solve_ivp_forest(forest, config, cosmo, seed_rows, seed_mass, *, rtol: float,
                     method: str) -> dict:
    """Per-halo solve_ivp integration of the engine's equations over a forest.

    See the module notes, (a). Returns final black-hole mass per node (non-zero at roots
    only), timing split and counts.
    """
    from scipy.integrate import solve_ivp

    model = config.model
    if model.spin.mode != "none":
        raise SystemExit("the solve_ivp comparison assumes spin.mode = 'none' (no spin "
                         "evolution by accretion), as tests/test_engine_reference.py does")
    sf = model.star_formation
    rec, eps_star, yld = sf.recycle, sf.efficiency, sf.metal_yield
    fb = cosmo.fb
    n = forest.n_nodes
    desc = forest.desc_index
    main_prog = forest.main_prog
    mass_h = forest.mass_msun
    z_snap = forest.snapshots.z
    t_snap = cosmo.age_gyr(z_snap)
    snap_pos = np.searchsorted(forest.snapshots.snap, forest.snap)
    n_prog = np.diff(forest.prog_offsets)
    # smooth growth of each descendant, credited to its main progenitor (engine convention)
    has_desc = desc >= 0
    prog_sum = np.bincount(desc[has_desc], weights=mass_h[has_desc], minlength=n)
    smooth = np.where(n_prog > 0, np.maximum(mass_h - prog_sum, 0.0), 0.0)
    is_main = np.zeros(n, dtype=bool)
    is_main[main_prog[main_prog >= 0]] = True
    smooth_for_node = np.where(is_main & has_desc, smooth[np.maximum(desc, 0)], 0.0)
    seed_of = dict(zip(seed_rows.tolist(), seed_mass.tolist()))

    gas, stars, metals = np.zeros(n), np.zeros(n), np.zeros(n)
    bh_m = np.zeros(n)                         # central black hole of each node (0: none)
    bh_a = np.zeros(n)                         # its spin magnitude
    bh_key = np.full(n, -1, dtype=np.int64)    # seeding row of its id (merge order)
    atol = np.array([1e-6, 1e-6, 1e-12, 1e-6])   # Msun, as the reference
    t_ivp, n_ivp, n_rhs, n_failed, n_merge, n_seed_skipped = 0.0, 0, 0, 0, 0, 0

    order = np.argsort(forest.forest_index, kind="stable")   # by forest, then snapshot
    bounds = np.searchsorted(forest.forest_index[order], np.arange(forest.n_forests + 1))
    for f in range(forest.n_forests):
        rows_f = order[bounds[f]:bounds[f + 1]]
        cuts = np.flatnonzero(np.diff(snap_pos[rows_f])) + 1
        for rows in np.split(rows_f, cuts):
            k = int(snap_pos[rows[0]])
            z = float(z_snap[k])
            m = mass_h[rows]
            p = model.halo.properties(m, z, cosmo)
            rv, vc, tv, ve = (np.asarray(x, dtype=float) for x in
                              (p.r_vir_kpc, p.v_c_kms, p.t_vir_k, p.v_esc_kms))
            fbe = np.asarray(model.reionization.baryon_fraction(m, z, fb), dtype=float)
            new = n_prog[rows] == 0
            gas[rows[new]] = fbe[new] * m[new]
            for r in rows:                      # seed the halos bhgrow seeded
                s = seed_of.get(int(r))
                if s is not None:
                    if bh_m[r] > 0:
                        n_seed_skipped += 1
                    else:
                        bh_m[r], bh_a[r], bh_key[r] = s, 0.0, r
            d = desc[rows]
            dt = np.where(d >= 0, t_snap[snap_pos[np.maximum(d, 0)]] - t_snap[k], 0.0)
            inflow = fbe * smooth_for_node[rows] / np.where(dt > 0, dt, 1.0)
            t_dyn = np.asarray(dynamical_time_gyr(model.gas_zone.radius_frac * rv, vc), float)
            quiet = (dt > 0) & (bh_m[rows] == 0)
            if quiet.any():
                q = rows[quiet]
                res = sf.step(gas[q], stars[q], metals[q], inflow[quiet], t_dyn[quiet],
                              vc[quiet], dt[quiet])
                gas[q], stars[q], metals[q] = res.gas, res.stars, res.metals
            for j in np.flatnonzero((dt > 0) & (bh_m[rows] > 0)):
                r = rows[j]
                eps = float(model.efficiency.efficiency(np.array([bh_a[r]]))[0])
                inv_tau = float(model.eddington.coefficient(eps))
                per_unit = 1.0 + float(model.feedback.gas_removed(1.0, eps, ve[j]))
                rho_1, cs, _ = model.gas_zone.state(1.0, rv[j], tv[j])   # density per Msun
                rho_1, cs = float(rho_1), float(cs)
                loss_per_gas = float(sf.loss_rate(t_dyn[j], vc[j]))
                formed_per_gas = (1.0 - rec) * eps_star / t_dyn[j]
                inflow_j = float(inflow[j])

                def rhs(_t, s, rho_1=rho_1, cs=cs, inflow_j=inflow_j, eps=eps,
                        inv_tau=inv_tau, per_unit=per_unit, loss_per_gas=loss_per_gas,
                        formed_per_gas=formed_per_gas):
                    mg = s[0] if s[0] > 0.0 else 0.0                 # gas floor
                    mz, mb = s[2], s[3]
                    a_bondi = float(model.accretion.coefficient(rho_1 * mg, cs, 0.0))
                    mdot = min(a_bondi * mb * mb, inv_tau * mb)      # Bondi, Eddington cap
                    drain = mdot * per_unit                          # accreted + blown out
                    formed = formed_per_gas * mg
                    return [inflow_j - loss_per_gas * mg - drain, formed,
                            yld * formed - (loss_per_gas + drain / max(mg, 1e-300)) * mz,
                            (1.0 - eps) * mdot]

                y0 = [gas[r], stars[r], metals[r], bh_m[r]]
                t0 = time.perf_counter()
                sol = solve_ivp(rhs, (0.0, float(dt[j])), y0, method=method, rtol=rtol,
                                atol=atol)
                t_ivp += time.perf_counter() - t0
                n_ivp += 1
                n_rhs += int(sol.nfev)
                n_failed += int(not sol.success)
                g, s_, zm, mb = sol.y[:, -1]
                gas[r], stars[r], metals[r], bh_m[r] = max(g, 0.0), s_, max(zm, 0.0), mb
            # --- to the descendants: baryons, the cap, then the black holes coalesce ------
            go = rows[d >= 0]
            if go.size == 0:
                continue
            dd = desc[go]
            np.add.at(gas, dd, gas[go])
            np.add.at(stars, dd, stars[go])
            np.add.at(metals, dd, metals[go])
            carry = go[bh_m[go] > 0]
            bh_in = np.bincount(desc[carry], weights=bh_m[carry], minlength=n)
            ud = np.unique(dd)
            cut = np.clip(gas[ud] + stars[ud] + bh_in[ud] - fb * mass_h[ud], 0.0, gas[ud])
            metals[ud] *= np.divide(gas[ud] - cut, gas[ud], out=np.zeros(ud.size),
                                    where=gas[ud] > 0)
            gas[ud] -= cut
            for t in np.unique(desc[carry]):
                inc = carry[desc[carry] == t]
                if bh_m[t] > 0:                   # a central arrived earlier
                    cen_m, cen_a, cen_k = bh_m[t], bh_a[t], bh_key[t]
                    others = inc
                else:
                    mp_ = main_prog[t]
                    c = mp_ if mp_ in inc else inc[np.lexsort((bh_key[inc], -bh_m[inc]))[0]]
                    cen_m, cen_a, cen_k = bh_m[c], bh_a[c], bh_key[c]
                    others = inc[inc != c]
                for o in others[np.argsort(bh_key[others], kind="stable")]:
                    chi_c = np.array([[0.0, 0.0, cen_a]])
                    chi_o = np.array([[0.0, 0.0, bh_a[o]]])
                    rem = model.remnant.remnant(np.array([cen_m]), np.array([bh_m[o]]),
                                                chi_c, chi_o)
                    if bh_m[o] > cen_m:
                        cen_k = bh_key[o]
                    cen_m = float(np.asarray(rem.mass_msun)[0])
                    cen_a = float(np.asarray(rem.spin)[0])
                    n_merge += 1
                bh_m[t], bh_a[t], bh_key[t] = cen_m, cen_a, cen_k
    roots = desc < 0
    final = np.where(roots, bh_m, 0.0)
    return {"final_bh_per_node": final, "total_final_msun": float(final.sum()),
            "t_solve_ivp_s": t_ivp, "n_ivp": n_ivp, "n_rhs": n_rhs, "n_failed": n_failed,
            "n_mergers": n_merge, "n_seed_skipped": n_seed_skipped}


def bhgrow_final_per_node(result, n: int) -> np.ndarray:
    bh = result.black_holes
    alive = np.isin(bh.status, (CENTRAL, SINKING, HOST_ENDED)) & (bh.host >= 0)
    return np.bincount(bh.host[alive], weights=bh.mass[alive], minlength=n)


def _timed(fn, repeat: int):
    best, out = float("inf"), None
    for _ in range(max(1, repeat)):
        out = None
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def ratios(args, histories: bool) -> dict:
    """Part 2 on the small forest; prints as it goes and returns the numbers."""
    small = toy_forest(args.small_forests, seed=args.seed, n_snap=args.small_snaps,
                       box_mpc=args.box_mpc)
    n = small.n_nodes
    full_small = small
    cmp_cfg = config_for(False, False, {"remnant": {"recoil": "none"}})
    def_cfg = config_for(True, histories)
    cosmo = Cosmology.from_name(def_cfg.run.cosmology)
    print(f"\nsmall forest: {args.small_forests} toy forests, {args.small_snaps} snapshots, "
          f"{n:,} nodes")
    run_forest(small, cmp_cfg.model, cmp_cfg.run, cosmo)           # warm-up
    t_cmp, res_cmp = _timed(lambda: run_forest(small, cmp_cfg.model, cmp_cfg.run, cosmo),
                            args.small_repeat)
    t_def, res_def = _timed(lambda: run_forest(small, def_cfg.model, def_cfg.run, cosmo),
                            args.small_repeat)
    ivp_forest, res_ivp_b, scale = small, res_cmp, 1.0
    if args.ivp_sample < 1.0:
        # solve_ivp on a random sample of whole forests; its time is scaled by the node count
        pick = np.random.default_rng(args.seed).random(small.n_forests) < args.ivp_sample
        pick[np.argmax(small.nodes_per_forest())] |= not pick.any()
        ivp_forest = small.select_forests(small.forest_ids[pick])
        res_ivp_b = run_forest(ivp_forest, cmp_cfg.model, cmp_cfg.run, cosmo)
        scale = n / ivp_forest.n_nodes
        print(f"    solve_ivp on a random {ivp_forest.n_forests} of {small.n_forests} forests "
              f"({ivp_forest.n_nodes:,} nodes); its time is scaled by {scale:.1f} "
              f"(node count)")
    bh = res_ivp_b.black_holes
    rows, smass = seed_rows_of(ivp_forest, bh.bh_id, bh.seed_mass)
    t0 = time.perf_counter()
    ref = solve_ivp_forest(ivp_forest, cmp_cfg, cosmo, rows, smass, rtol=args.rtol,
                           method=args.method)
    t_ivp = (time.perf_counter() - t0) * scale
    small, res_cmp = ivp_forest, res_ivp_b          # accuracy on the solve_ivp forests
    n = small.n_nodes
    m_bhgrow = bhgrow_final_per_node(res_cmp, n)
    tot_b, tot_r = res_cmp.ledger["total_final_msun"], ref["total_final_msun"]
    both = (m_bhgrow > 0) & (ref["final_bh_per_node"] > 0)
    rel = ref["final_bh_per_node"][both] / m_bhgrow[both] - 1.0
    only = int(np.sum((m_bhgrow > 0) != (ref["final_bh_per_node"] > 0)))
    print(f"(a) comparison model (pairs off, recoil none, no histories): "
          f"{len(bh):,} black holes, {len(res_cmp.mergers.get('z', [])):,} coalescences")
    print(f"    bhgrow run_forest        {t_cmp:9.4f} s  (best of {args.small_repeat})")
    print(f"    per-halo solve_ivp       {t_ivp:9.2f} s  ({ref['n_ivp']:,} integrations, "
          f"{ref['n_rhs']:,} rhs calls, {ref['t_solve_ivp_s']:.2f} s inside solve_ivp; "
          f"{args.method}, rtol {args.rtol:g}; {ref['n_failed']} failed; "
          f"{ref['n_mergers']} coalescences)")
    print(f"    ratio solve_ivp / bhgrow {t_ivp / t_cmp:9.0f}"
          + ("  (solve_ivp time extrapolated from the sample)" if scale > 1 else ""))
    print(f"    total final BH mass: bhgrow {tot_b:.6e}, solve_ivp {tot_r:.6e} Msun "
          f"(solve_ivp/bhgrow - 1 = {tot_r / tot_b - 1:+.2e})")
    if rel.size:
        worst = np.flatnonzero(both)[np.argmax(np.abs(rel))]
        print(f"    per root ({rel.size} roots with a black hole in both): median "
              f"|diff| {np.median(np.abs(rel)):.2e}, max {np.max(np.abs(rel)):.2e} (forest "
              f"{small.forest_id[worst]}, root halo {small.mass_msun[worst]:.3e} Msun: bhgrow "
              f"{m_bhgrow[worst]:.4e}, solve_ivp {ref['final_bh_per_node'][worst]:.4e} Msun); "
              f"roots with a black hole in one only: {only}")
    # (b) floor on the small forest: same seeds as the default-model run
    small, n = full_small, full_small.n_nodes
    rows_d, smass_d = seed_rows_of(small, res_def.black_holes.bh_id,
                                   res_def.black_holes.seed_mass)
    t_floor, _ = _timed(lambda: floor_walk(small, rows_d, smass_d, cosmo.fb),
                        args.small_repeat)
    print(f"(b) default model ({'with' if histories else 'no'} histories): bhgrow run_forest "
          f"{t_def:.4f} s, no-physics floor {t_floor:.5f} s -> ratio "
          f"{t_def / t_floor:.0f}")
    return {"n": n, "t_cmp": t_cmp, "t_ivp": t_ivp, "tot_b": tot_b, "tot_r": tot_r,
            "t_def": t_def, "t_floor": t_floor, "n_ivp": ref["n_ivp"],
            "root_med": float(np.median(np.abs(rel))) if rel.size else float("nan")}


# ------------------------------------------------------------------------------------------
def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--nodes", type=float, default=1e7,
                    help="target size of the big forest in nodes (default 1e7)")
    ap.add_argument("--forests", type=int, default=None,
                    help="number of toy forests of the big forest (overrides --nodes)")
    ap.add_argument("--snaps", type=int, default=40, help="snapshots of the big forest")
    ap.add_argument("--box-mpc", type=float, default=100.0, help="comoving box side [Mpc]")
    ap.add_argument("--seed", type=int, default=1, help="seed of the toy trees")
    ap.add_argument("--pairs", choices=("on", "off", "both"), default="both",
                    help="pair dynamics (merger clocks) on, off or both (default)")
    ap.add_argument("--cases", default="engine,pipeline,floor",
                    help="comma-separated subset of engine,pipeline,floor")
    ap.add_argument("--histories", choices=("on", "off"), default="on",
                    help="per-black-hole histories (run.histories; default on, as the "
                         "default config)")
    ap.add_argument("--chunk-nodes", type=int, default=None,
                    help="run.chunk_nodes for the pipeline case (default: the config's)")
    ap.add_argument("--repeat", type=int, default=1, help="timed runs per big case (best kept)")
    ap.add_argument("--pairs-interleaved", type=int, default=3,
                    help="engine (pairs on) and floor runs taken in turn for ratio (b), "
                         "reported as the median of the per-pair ratios (0: skip)")
    ap.add_argument("--traced", action="store_true",
                    help="also measure the tracemalloc peak (one extra untimed run per case)")
    ap.add_argument("--no-isolate", action="store_true",
                    help="run the cases in this process instead of forked children")
    ap.add_argument("--small-forests", type=int, default=1530,
                    help="toy forests of the small forest of the ratios")
    ap.add_argument("--small-snaps", type=int, default=20,
                    help="snapshots of the small forest")
    ap.add_argument("--small-repeat", type=int, default=5,
                    help="timed runs of bhgrow and the floor on the small forest")
    ap.add_argument("--ivp-sample", type=float, default=0.05,
                    help="fraction of the small forest's forests given to solve_ivp (its "
                         "time is scaled up by the node count; for small forests >~1e4 "
                         "nodes, where the full solve_ivp run takes minutes)")
    ap.add_argument("--rtol", type=float, default=1e-6, help="solve_ivp relative tolerance")
    ap.add_argument("--method", default="LSODA", help="solve_ivp method (LSODA, RK45, ...)")
    ap.add_argument("--no-ratios", action="store_true", help="skip part 2")
    ap.add_argument("--ratios-only", action="store_true", help="skip part 1")
    ap.add_argument("--profile", action="store_true",
                    help="also profile one engine run (pairs on) and print the top 20")
    args = ap.parse_args()
    cases = [c.strip() for c in args.cases.split(",") if c.strip()]
    bad = set(cases) - {"engine", "pipeline", "floor"}
    if bad:
        ap.error(f"unknown cases {sorted(bad)}")
    pair_settings = {"on": [True], "off": [False], "both": [True, False]}[args.pairs]
    histories = args.histories == "on"
    isolate = not args.no_isolate

    # the engine sets the allocator to reuse freed temporaries at its first call
    # (bhgrow._alloc); set it here, before the cases fork, so the floor runs with it too
    keep_freed_memory()
    rows_out = []
    big = None
    interleaved = interleaved_cpu = None
    if not args.ratios_only:
        t0 = time.perf_counter()
        forest, nf = forest_for_nodes(int(args.nodes), seed=args.seed, n_snap=args.snaps,
                                      box_mpc=args.box_mpc, n_forests=args.forests)
        t_build = time.perf_counter() - t0
        n = forest.n_nodes
        cfgs = {p: config_for(p, histories) for p in (True, False)}
        if args.chunk_nodes:
            cfgs = {p: dataclasses.replace(c, run=dataclasses.replace(
                c.run, chunk_nodes=args.chunk_nodes)) for p, c in cfgs.items()}
        cosmo = Cosmology.from_name(cfgs[True].run.cosmology)
        # warm the lazy tables (cosmology, halo, GW noise) before forking the cases
        tiny = toy_forest(3, seed=99, n_snap=args.snaps, box_mpc=args.box_mpc)
        for c in cfgs.values():
            run_model(tiny, c)
        print(f"big forest: {nf:,} toy forests of 1e10-1e14 Msun, {args.snaps} snapshots, "
              f"{n:,} nodes (built in {t_build:.1f} s; its arrays {forest_bytes(forest) / n:.0f}"
              f" B/node); histories {'on' if histories else 'off'}; chunk_nodes "
              f"{cfgs[True].run.chunk_nodes:,}; best of {args.repeat}; {n_cpus()} CPUs; "
              f"{load_note()}")
        seeds = None
        for pairs_on in pair_settings:
            cfg = cfgs[pairs_on]
            tag = "on" if pairs_on else "off"
            if "engine" in cases:
                def fn(cfg=cfg):
                    r = run_forest(forest, cfg.model, cfg.run, cosmo)
                    return {"n_bh": len(r.black_holes),
                            "n_mergers": len(r.mergers.get("z", [])),
                            "bh_id": r.black_holes.bh_id.copy(),
                            "seed_mass": r.black_holes.seed_mass.copy()}
                m = best_of(fn, args.repeat, isolate=isolate)
                if args.traced:
                    m["traced_peak_bytes"] = measure(fn, traced=True, isolate=isolate)[
                        "traced_peak_bytes"]
                s = m.pop("summary")
                if seeds is None:
                    seeds = seed_rows_of(forest, s["bh_id"], s["seed_mass"])
                rows_out.append((f"engine run_forest, one chunk, pairs {tag}", n, m,
                                 f"{s['n_bh']:,} BHs, {s['n_mergers']:,} coalescences"))
                _print_row(rows_out[-1])
            if "pipeline" in cases:
                def fn(cfg=cfg):
                    r = run_model(forest, cfg)
                    return {"n_bh": len(r.black_holes), "n_mergers": len(r.mergers),
                            "n_chunks": r.provenance["n_chunks"]}
                m = best_of(fn, args.repeat, isolate=isolate)
                if args.traced:
                    m["traced_peak_bytes"] = measure(fn, traced=True, isolate=isolate)[
                        "traced_peak_bytes"]
                s = m.pop("summary")
                rows_out.append((f"pipeline run_model, {s['n_chunks']} chunks, pairs {tag}",
                                 n, m, f"{s['n_bh']:,} BHs, {s['n_mergers']:,} coalescences"))
                _print_row(rows_out[-1])
        if "floor" in cases:
            if seeds is None:     # no engine case ran: seed every halo of its forest's first
                first = np.r_[True, forest.forest_id[1:] != forest.forest_id[:-1]]
                srows = np.flatnonzero(first)
                seeds = (srows, np.full(srows.size, 1e5))
            def fn():
                return floor_walk(forest, seeds[0], seeds[1], cosmo.fb)
            m = best_of(fn, max(args.repeat, 3), isolate=isolate)
            if args.traced:
                m["traced_peak_bytes"] = measure(fn, traced=True, isolate=isolate)[
                    "traced_peak_bytes"]
            m.pop("summary")
            rows_out.append(("no-physics floor (same snapshot walk)", n, m,
                             f"{seeds[0].size:,} BHs moved"))
            _print_row(rows_out[-1])
        if "engine" in cases and "floor" in cases and True in pair_settings \
                and args.pairs_interleaved > 0:
            # ratio (b) from engine and floor runs taken in turn, so that a change of the
            # machine's speed during the benchmark (shared machines) affects both alike
            cfg = cfgs[True]
            pairs_t, pairs_c = [], []
            for _ in range(args.pairs_interleaved):
                me = measure(lambda: run_forest(forest, cfg.model, cfg.run, cosmo) and None,
                             isolate=isolate)
                mf = measure(lambda: floor_walk(forest, seeds[0], seeds[1], cosmo.fb) and None,
                             isolate=isolate)
                pairs_t.append((me["wall_s"], mf["wall_s"]))
                pairs_c.append((me["cpu_s"], mf["cpu_s"]))
            r_b = sorted(te / tf for te, tf in pairs_t)
            print("  ratio (b) from interleaved runs (engine s / floor s): "
                  + ", ".join(f"{te:.2f}/{tf:.3f}={te / tf:.1f}" for te, tf in pairs_t)
                  + f"; median {float(np.median(r_b)):.1f}")
            # the same pairs in CPU time of the process (user + system): on a virtual
            # machine the time the host takes from it (steal) is not counted
            r_c = sorted(ce / cf for ce, cf in pairs_c)
            print("  same in CPU time (engine CPU s / floor CPU s): "
                  + ", ".join(f"{ce:.2f}/{cf:.3f}={ce / cf:.1f}" for ce, cf in pairs_c)
                  + f"; median {float(np.median(r_c)):.1f}")
            interleaved = float(np.median(r_b))
            interleaved_cpu = float(np.median(r_c))
        if args.profile:
            prof = cProfile.Profile()
            prof.enable()
            run_forest(forest, cfgs[True].model, cfgs[True].run, cosmo)
            prof.disable()
            sio = io.StringIO()
            pstats.Stats(prof, stream=sio).sort_stats("tottime").print_stats(20)
            print("\ncProfile, one engine run (pairs on), top 20 by own time:")
            print(sio.getvalue())
        big = {"n": n, "nf": nf}

    if args.ratios_only:
        print(load_note())
    rat = None if args.no_ratios else ratios(args, histories)

    # --- the README table ------------------------------------------------------------------
    print("\nREADME table (toy forests of 1e10-1e14 Msun; one process per case):\n")
    if rows_out:
        print("| case | nodes | wall s | nodes/s | nodes per CPU s | CPU/wall | peak RSS "
              "growth B/node | peak traced B/node |")
        print("|---|---:|---:|---:|---:|---:|---:|---:|")
        for name, n, m, _note in rows_out:
            tr = m.get("traced_peak_bytes")
            rss = m.get("rss_peak_bytes")
            print(f"| {name} | {n:.2e} | {m['wall_s']:.2f} | {n / m['wall_s']:,.0f} | "
                  f"{n / m['cpu_s']:,.0f} | {m['cpu_s'] / m['wall_s']:.2f} | "
                  f"{'-' if rss is None else f'{rss / n:,.0f}'} | "
                  f"{'-' if tr is None else f'{tr / n:,.0f}'} |")
        print()
    ratio_rows = []
    if rat is not None:
        small = (f"{args.small_forests} toy forests, {args.small_snaps} snapshots, "
                 f"{rat['n']:,} nodes")
        ratio_rows += [
            (f"time(per-halo solve_ivp, {args.method} rtol {args.rtol:g}) / time(bhgrow "
             f"engine)", f"{small} ({rat['n_ivp']:,} integrations)",
             f"{rat['t_ivp'] / rat['t_cmp']:,.0f}"),
            ("total final BH mass, solve_ivp / bhgrow - 1", "same",
             f"{rat['tot_r'] / rat['tot_b'] - 1:+.1e}"),
            ("time(bhgrow engine) / time(no-physics walk)", "same",
             f"{rat['t_def'] / rat['t_floor']:,.0f}")]
    if big is not None:
        eng = [r for r in rows_out if r[0].startswith("engine") and r[0].endswith("pairs on")]
        flo = [r for r in rows_out if r[0].startswith("no-physics")]
        if eng and flo:
            ratio_rows.append(("time(bhgrow engine) / time(no-physics walk), best runs",
                               f"{big['nf']:,} toy forests, {big['n']:.2e} nodes",
                               f"{eng[0][2]['wall_s'] / flo[0][2]['wall_s']:,.1f}"))
        if interleaved is not None:
            ratio_rows.append(("same, median of interleaved engine/floor pairs",
                               f"{big['nf']:,} toy forests, {big['n']:.2e} nodes",
                               f"{interleaved:,.1f}"))
            ratio_rows.append(("same pairs in process CPU time (user + system)",
                               f"{big['nf']:,} toy forests, {big['n']:.2e} nodes",
                               f"{interleaved_cpu:,.1f}"))
    if ratio_rows:
        print("| ratio | forest | value |")
        print("|---|---|---:|")
        for what, where, value in ratio_rows:
            print(f"| {what} | {where} | {value} |")
    return 0


def _print_row(row) -> None:
    name, n, m, note = row
    rss = m.get("rss_peak_bytes")
    tr = m.get("traced_peak_bytes")
    print(f"  {name:<44} {m['wall_s']:9.2f} s {n / m['wall_s']:12,.0f} nodes/s "
          f"{1e6 * m['wall_s'] / n:7.2f} us/node  {n / m['cpu_s']:12,.0f} nodes/CPU s  "
          f"CPU/wall {m['cpu_s'] / m['wall_s']:.2f}  "
          f"RSS +{'-' if rss is None else f'{rss / n:,.0f}'} B/node"
          + (f"  traced {tr / n:,.0f} B/node" if tr is not None else "") + f"  ({note})",
          flush=True)


if __name__ == "__main__":
    raise SystemExit(main())
