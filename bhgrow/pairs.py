"""Black-hole pairs in the engine: merger clocks, coalescences, triples, pending pairs.

Bookkeeping only: the delay and remnant formulas live in :mod:`bhgrow.physics.dynamics`
and :mod:`bhgrow.physics.remnants`.

Rules (documented here once)
----------------------------
* **Clock start.** When a halo merges into a descendant of which it is not the main
  progenitor, its central black hole starts *sinking*: its coalescence time is
  ``t_c = t_merge + t_df + t_hard + t_gw`` (cosmic time, Gyr), with the dynamical-friction time
  from the satellite and descendant halo masses and the descendant's r_vir and V_c, and the
  hardening and GW times from the two black-hole masses at that moment (the partner being the
  descendant's central, or the incoming black hole itself if there is none yet).
  Wandering black holes a satellite carried (already sinking in it) keep their clocks.
* **Further halo mergers.** A sinking black hole whose host halo merges again keeps its clock
  (its orbit decays inside the new host from where it was; re-starting the clock would count
  the decay twice); its target becomes the central of the new host.
* **Coalescence.** At the first snapshot at or after ``t_c`` the sinking black hole merges
  with its host's central black hole (the event carries the exact ``t_c`` and z(t_c)); the
  more massive keeps its id as the remnant, the other is marked ``merged``. Several
  coalescences in one host are applied in clock order. A sinking black hole whose host has no
  central becomes the central.
* **Triples.** If a second sinking black hole finishes its dynamical friction (reaches the
  nucleus) while the host's first pair is still hardening (before that pair's ``t_c``), the
  lightest of the three is ejected by the three-body slingshot (status ``ejected_triple``;
  Hoffman & Loeb 2007 find ejection of the lightest in most such encounters, memory); the
  remaining two coalesce at the first pair's ``t_c``.
* **Recoil.** A remnant whose kick exceeds its host's central escape speed is ejected (status
  ``ejected``, removed from the host, counted separately in the ledger).
* **Pending.** Black holes still sinking at the final snapshot are reported as pending pairs
  with their expected coalescence time.
"""

from __future__ import annotations

import numpy as np

from . import rng

# purposes of the random draws keyed by black-hole id (engine uses 11)
_P_DELAY = 21       # uses purposes 21..26 (friction orbit, inspiral eccentricity)
_P_SPINS = 31       # uses purposes 31..40 (spin magnitudes/orientations)


def delay_uniforms(seed: int, bh_ids: np.ndarray, k: int, n: int = 3) -> np.ndarray:
    """(len(bh_ids), n) uniforms for the merger clock of these black holes at snapshot k."""
    keys = rng.stream_keys(seed, bh_ids)
    return np.stack([rng.uniform(keys, k, _P_DELAY + j) for j in range(n)], axis=1)


def spin_uniforms(seed: int, bh_ids: np.ndarray, k: int, n: int = 6) -> np.ndarray:
    """(len(bh_ids), n) uniforms for spin orientations at a coalescence."""
    keys = rng.stream_keys(seed, bh_ids)
    return np.stack([rng.uniform(keys, k, _P_SPINS + j) for j in range(n)], axis=1)


def rank_within(groups: np.ndarray, order_key: np.ndarray):
    """Sort events by (group, key); return the order and each event's rank in its group."""
    order = np.lexsort((order_key, groups))
    g = groups[order]
    start = np.r_[True, g[1:] != g[:-1]]
    first = np.flatnonzero(start)
    rank = np.arange(g.size) - np.repeat(first, np.diff(np.r_[first, g.size]))
    return order, rank


# ------------------------------------------------------------------------------------------
def start_clocks(bh, idx, new_host, old_host, t_merge, model, run, cosmo, mass_h, z_new,
                 partner_mass, k):
    """Start the merger clocks of black holes ``idx`` that just became satellites.

    Parameters
    ----------
    bh : BlackHoles
    idx : int array
        Table rows of the black holes starting to sink.
    new_host, old_host : int arrays
        Node rows of the descendant and of the satellite halo.
    t_merge : float array
        Cosmic time of the halo merger (the descendant's time), Gyr.
    partner_mass : float array
        Mass of the black hole each will pair with (the descendant's central), Msun.
    """
    if idx.size == 0:
        return
    r_vir, v_c, _ = model.halo.virial(mass_h[new_host], z_new, cosmo)
    u = delay_uniforms(run.seed, bh.bh_id[idx], k)
    parts = model.clock.delay_gyr(mass_h[new_host], mass_h[old_host],
                                  np.asarray(r_vir, dtype=float),
                                  np.asarray(v_c, dtype=float),
                                  np.maximum(partner_mass, bh.mass[idx]),
                                  np.minimum(partner_mass, bh.mass[idx]), u)
    bh.t_hmerge[idx] = t_merge
    bh.t_df_end[idx] = t_merge + np.asarray(parts.t_df, dtype=float)
    bh.t_c[idx] = t_merge + np.asarray(parts.total, dtype=float)


def coalesce(bh, sl, t_now, k, gas, stars, v_esc, mass_h, model, run, cosmo):
    """Apply every coalescence due by ``t_now`` in the slice ``sl`` (see module rules).

    ``gas``, ``stars`` and ``v_esc`` are the slice's (indexed by ``row - sl.start``).
    Returns a list of event dicts of arrays (one dict per rank of events within a host).
    """
    from .engine import CENTRAL, EJECTED_TRIPLE, SINKING

    events = []
    live = (bh.host >= sl.start) & (bh.host < sl.stop)
    sink = np.flatnonzero(live & (bh.status == SINKING))
    if sink.size == 0:
        return events
    due = sink[bh.t_c[sink] <= t_now]
    if due.size == 0:
        return events
    order, rank = rank_within(bh.host[due], bh.t_c[due])
    due, rank = due[order], rank
    # the spin draws and redshifts of every due coalescence at once: each depends on its own
    # hole alone, and a hole's t_c does not change before its rank is applied
    u_due = spin_uniforms(run.seed, bh.bh_id[due], k)
    z_due = cosmo_z(cosmo, bh.t_c[due])
    central_of = np.full(sl.stop - sl.start, -1, dtype=np.int64)
    cen = np.flatnonzero(live & (bh.status == CENTRAL))
    central_of[bh.host[cen] - sl.start] = cen
    # candidates for triples: the slice's sinking holes in hosts with a coalescence due
    # (hosts and friction clocks fixed here; statuses change as ranks are applied).
    # Per-host scratch, reset after each rank.
    sink_loc = bh.host[sink] - sl.start
    has_due = np.zeros(sl.stop - sl.start, dtype=bool)
    has_due[bh.host[due] - sl.start] = True
    near = has_due[sink_loc]
    sink, sink_loc = sink[near], sink_loc[near]
    sink_tdf = bh.t_df_end[sink]
    tc_host = np.full(sl.stop - sl.start, np.nan)
    ev_host = np.full(sl.stop - sl.start, -1, dtype=np.int64)
    z_now = None
    for r in range(int(rank.max()) + 1):
        at = np.flatnonzero(rank == r)                # positions in due
        at = at[bh.status[due[at]] == SINKING]        # a triple may have removed some
        if at.size == 0:
            continue
        ev = due[at]
        loc = bh.host[ev] - sl.start
        c = central_of[loc]
        # no central: the sinking black hole settles as the central
        none = c < 0
        if none.any():
            bh.status[ev[none]] = CENTRAL
            central_of[loc[none]] = ev[none]
        ev, loc, c, at = ev[~none], loc[~none], c[~none], at[~none]
        if ev.size == 0:
            continue
        # triples: another sinking black hole reached the nucleus before this pair merged
        tc_host[loc], ev_host[loc] = bh.t_c[ev], ev
        still = bh.status[sink] == SINKING
        others, ol = sink[still], sink_loc[still]
        intr = others[(sink_tdf[still] < tc_host[ol]) & (others != ev_host[ol])]
        tc_host[loc], ev_host[loc] = np.nan, -1
        keep = np.ones(ev.size, dtype=bool)
        if intr.size:
            o2, _ = rank_within(bh.host[intr], bh.t_df_end[intr])
            intr = intr[o2]
            first = np.r_[True, bh.host[intr][1:] != bh.host[intr][:-1]]
            intr = intr[first]                       # earliest intruder per host
            il = bh.host[intr] - sl.start
            e_of = np.searchsorted(loc, il) if np.all(np.diff(loc) > 0) else None
            if e_of is None:
                srt = np.argsort(loc)
                e_of = srt[np.searchsorted(loc[srt], il)]
            trio = np.stack([bh.mass[c[e_of]], bh.mass[ev[e_of]], bh.mass[intr]], axis=1)
            lightest = np.argmin(trio, axis=1)
            out = np.where(lightest == 0, c[e_of], np.where(lightest == 1, ev[e_of], intr))
            bh.status[out] = EJECTED_TRIPLE
            if z_now is None:
                z_now = float(cosmo_z(cosmo, t_now))
            bh.end_z[out] = z_now
            bh.host_mass[out] = mass_h[bh.host[out]]
            bh.host[out] = -1
            # central ejected: the event black hole becomes the central, no coalescence now
            lost_c = lightest == 0
            bh.status[ev[e_of[lost_c]]] = CENTRAL
            central_of[il[lost_c]] = ev[e_of[lost_c]]
            keep[e_of[(lightest == 0) | (lightest == 1)]] = False
        ev, loc, c, at = ev[keep], loc[keep], c[keep], at[keep]
        if ev.size == 0:
            continue
        ev_rec = _merge_pairs(bh, ev, c, loc, sl, gas, stars, v_esc, mass_h, model,
                              u_due[at], z_due[at])
        prim = ev_rec.pop("_primary")
        central_of[loc] = np.where(ev_rec["ejected"], -1, prim)
        events.append(ev_rec)
    return events


def cosmo_z(cosmo, t_gyr):
    """Redshift at cosmic time t (clipped to today's age)."""
    t = np.minimum(np.asarray(t_gyr, dtype=float), cosmo.age_gyr(0.0))
    return cosmo.z_at_age(t)


def _merge_pairs(bh, ev, c, loc, sl, gas, stars, v_esc, mass_h, model, u, z_c):
    """Coalesce sinking ``ev`` with centrals ``c`` (vectorized); return the event record.

    ``u``: the events' spin uniforms (:func:`spin_uniforms`); ``z_c``: the redshifts of
    their coalescence times ``bh.t_c[ev]``."""
    from .engine import CENTRAL, EJECTED, MERGED
    from .physics.remnants import chirp_mass

    m_c, m_e = bh.mass[c], bh.mass[ev]
    primary = np.where(m_c >= m_e, c, ev)
    secondary = np.where(m_c >= m_e, ev, c)
    m1, m2 = bh.mass[primary], bh.mass[secondary]
    rows = sl.start + loc
    g, s = gas[loc], stars[loc]                 # of the slice
    gas_frac = np.divide(g, g + s, out=np.zeros(g.size), where=(g + s) > 0)
    chi1, chi2 = model.spin_draw.draw(np.abs(bh.spin[primary]), np.abs(bh.spin[secondary]),
                                      gas_frac, u)
    rem = model.remnant.remnant(m1, m2, chi1, chi2, u)
    t_c = bh.t_c[ev]
    kick = np.asarray(rem.kick_kms, dtype=float)
    ejected = kick > v_esc[loc]
    radiated = np.asarray(rem.radiated_msun, dtype=float)
    rec = {
        "bh_id_1": bh.bh_id[primary].copy(), "bh_id_2": bh.bh_id[secondary].copy(),
        "forest_id": bh.forest_id[primary].copy(), "z": z_c, "t_gyr": t_c.copy(),
        "m1_msun": m1.copy(), "m2_msun": m2.copy(), "q": m2 / m1,
        "chirp_mass_msun": chirp_mass(m1, m2),
        "remnant_mass_msun": np.asarray(rem.mass_msun, dtype=float),
        "remnant_spin": np.asarray(rem.spin, dtype=float), "kick_kms": kick,
        "ejected": ejected, "delay_gyr": t_c - bh.t_hmerge[ev],
        "seed_channel_1": bh.channel[primary].copy(),
        "seed_channel_2": bh.channel[secondary].copy(),
        "host_mass_msun": mass_h[rows], "radiated_msun": radiated,
        "_primary": primary,
    }
    rec["chirp_mass_obs_msun"] = rec["chirp_mass_msun"] * (1.0 + z_c)
    # the secondary is absorbed; the primary becomes the remnant
    bh.status[secondary] = MERGED
    bh.end_z[secondary] = z_c
    bh.host_mass[secondary] = mass_h[rows]
    bh.host[secondary] = -1
    bh.mass[primary] = rec["remnant_mass_msun"]
    bh.spin[primary] = rec["remnant_spin"]
    bh.radiated[primary] += radiated
    bh.status[primary] = np.where(ejected, EJECTED, CENTRAL)
    bh.t_c[primary] = np.nan
    ej = primary[ejected]
    bh.end_z[ej] = z_c[ejected]
    bh.host_mass[ej] = mass_h[rows[ejected]]
    bh.host[ej] = -1
    return rec
