"""The snapshot loop: walks forests oldest to newest, all halos of a snapshot at once.

The engine owns no physics formulas: it calls the model's components (see
:class:`bhgrow.config.Model` for the calling order) on the float arrays of one snapshot
slice, and moves state down the trees.

Time intervals
--------------
A node owns the interval from its own time to its descendant's, ``dt = t(desc) - t(node)``
(roots: none). Over it the node's reservoir receives the smooth growth of the descendant,
``f_b,eff * max(M_desc - sum M_progenitors(desc), 0)``, spread evenly, if the node is the
descendant's main progenitor; other progenitors get no inflow (their halo is being
accreted). A halo without progenitors starts with ``f_b,eff * M`` of pristine gas.

Per snapshot slice
------------------
1. halo properties (escape speeds only where black holes are); new halos get their
   initial gas;
2. seeding (halos without a central black hole; channels in config order);
3. reservoir and black holes over ``dt``: halos without a central black hole take one exact
   closed-form reservoir step (:meth:`bhgrow.physics.gas.StarFormation.step`); halos with
   one are solved with their hole, piecewise in closed form
   (:func:`bhgrow.physics.coupled.advance`: exact Eddington phases, Bondi phases with the
   hole frozen at its geometric-mean mass, at most ``dt / n_i`` long with ``n_i`` from
   :func:`bhgrow.physics.coupled.substeps`); the spin is updated once per interval;
4. state passes to descendants: gas, stars and metals add up (``np.add.at``), the
   "polluted" flag (a progenitor formed stars or held a black hole) propagates with a
   maximum; gas above the descendant's baryon share is removed and recorded.

Node state lives only while it can still be read: in a window of rows from the current
slice to its furthest descendant (:class:`_NodeState`), so memory follows a few snapshots'
halos, not the chunk's. The baryon check of the final roots is made slice by slice.

Black holes
-----------
A struct-of-arrays table (:class:`BlackHoles`) with a host row per black hole. When a host
passes to its descendant, its black holes follow. The central black hole of the main
progenitor stays central; central black holes of other progenitors start *sinking* on a
merger clock (:mod:`bhgrow.pairs`: dynamical friction, hardening, GW inspiral) and coalesce
with the host's central when it expires — unless the descendant receives no central from
its main progenitor, in which case the most massive incoming central becomes its central.
Sinking black holes do not accrete. Black holes of halos that end before the final snapshot
(a root at an earlier snapshot) stop with status ``host_ended``.

Ledger
------
Per black hole: seed mass, accreted growth (after the radiated fraction) and mass radiated
in gravitational waves at its coalescences. Per forest, to round-off:
``sum final mass (live) + sum ejected mass = sum seed mass + sum growth - sum radiated``.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import numpy as np

from . import pairs, rng
from ._alloc import keep_freed_memory
from .config import Model, RunSettings
from .cosmology import Cosmology
from . import _kernels
from .physics import accretion as acc
from .physics import coupled as cp
from .physics import seeding as sd
from .physics.gas import StarFormation, dynamical_time_gyr
from .trees.forest import Forest

STATUS_NAMES = ("central", "sinking", "host_ended", "merged", "ejected", "ejected_triple")
CENTRAL, SINKING, HOST_ENDED, MERGED, EJECTED, EJECTED_TRIPLE = range(6)
#: accretion laws nonlinear in the gas: a step's effective gas is solved to this in ln g
#: (:func:`_nonlinear_step`), in at most this many solver calls
_NONLINEAR_TOL = 1e-3
_NONLINEAR_ITERS = 8
CHANNEL_NAMES = {code: name for name, code in sd.CHANNEL_CODES.items()}
# purposes of the engine's random draws (seeding uses its own, documented in seeding.py)
_P_SPIN = 11
_GYR_PER_YR = 1e-9
#: rows per block of straight-line per-halo work (its temporaries fit the CPU cache)
_BLOCK = 32768
#: most holes per call of _grow (set-up and coupled solver): the solver's ~60 temporaries
#: then stay in the CPU's last-level cache (measured: 10-15% faster than one call on
#: 1-2e5 holes; blocks of 16k were slower, the solver's fixed cost per phase iteration
#: being paid per block)
_SOLVER_BLOCK = 65536


@dataclass
class BlackHoles:
    """Struct-of-arrays black-hole table (grows as seeds form)."""

    bh_id: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    forest_id: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    host: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    mass: np.ndarray = field(default_factory=lambda: np.zeros(0))
    spin: np.ndarray = field(default_factory=lambda: np.zeros(0))
    channel: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int8))
    seed_z: np.ndarray = field(default_factory=lambda: np.zeros(0))
    seed_mass: np.ndarray = field(default_factory=lambda: np.zeros(0))
    growth: np.ndarray = field(default_factory=lambda: np.zeros(0))
    status: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int8))
    last_mdot: np.ndarray = field(default_factory=lambda: np.zeros(0))
    end_z: np.ndarray = field(default_factory=lambda: np.zeros(0))
    host_mass: np.ndarray = field(default_factory=lambda: np.zeros(0))
    t_hmerge: np.ndarray = field(default_factory=lambda: np.zeros(0))   # halo merger, Gyr
    t_df_end: np.ndarray = field(default_factory=lambda: np.zeros(0))   # reaches nucleus, Gyr
    t_c: np.ndarray = field(default_factory=lambda: np.zeros(0))        # coalescence, Gyr
    radiated: np.ndarray = field(default_factory=lambda: np.zeros(0))   # lost to GWs, Msun
    #: random-stream key, ``rng.stream_keys(seed, bh_id)`` (the seeding node's key)
    stream_key: np.ndarray = field(default_factory=lambda: np.zeros(0, np.uint64))

    def __len__(self) -> int:
        return int(self.bh_id.size)

    def append(self, **cols) -> None:
        """Append rows (every column given). Columns are views of buffers that grow by
        doubling, so appending a few rows per snapshot does not copy the whole table."""
        n = len(self)
        add = {name: np.asarray(arr, dtype=getattr(self, name).dtype)
               for name, arr in cols.items()}
        k = next(iter(add.values())).size if add else 0
        bufs = self.__dict__.setdefault("_buffers", {})
        for name, arr in add.items():
            cur = getattr(self, name)
            buf = bufs.get(name)
            if buf is None or buf.size < n + k or cur.base is not buf:
                # a column set from outside, or a full buffer: start a new one
                buf = np.empty(max(2 * (n + k), 64), dtype=cur.dtype)
                buf[:n] = cur
                bufs[name] = buf
            buf[n:n + k] = arr
            setattr(self, name, buf[:n + k])

    def trimmed(self) -> "BlackHoles":
        """A copy holding exactly its rows (none of the growth buffers' spare capacity,
        which can double the table's memory while a finished chunk waits to be merged)."""
        return BlackHoles(**{k: np.array(getattr(self, k)) for k in self.__dataclass_fields__})

    def __getstate__(self):
        # pickle the columns only, not their spare capacity
        return {k: (np.array(v) if isinstance(v, np.ndarray) else v)
                for k, v in self.__dict__.items() if k != "_buffers"}


@dataclass
class History:
    """Per-black-hole records, one per snapshot a black hole is alive at."""

    parts: list = field(default_factory=list)

    def record(self, bh_id, t, z, mass, mdot, edd_ratio, gas):
        # t and z are one value per snapshot: kept as floats until columns() (2/7 less
        # memory while the run lasts)
        self.parts.append((bh_id.copy(), float(t), float(z), mass.copy(), mdot.copy(),
                           edd_ratio.copy(), gas.copy()))

    def columns(self) -> dict:
        names = ("bh_id", "t_gyr", "z", "mass_msun", "mdot_msun_yr", "eddington_ratio",
                 "host_gas_msun")
        if not self.parts:
            return {n: np.zeros(0) for n in names}
        cols = {n: np.concatenate([np.full(p[0].size, p[i]) if np.ndim(p[i]) == 0 else p[i]
                                   for p in self.parts]) for i, n in enumerate(names)}
        order = np.lexsort((cols["t_gyr"], cols["bh_id"]))
        return {n: v[order] for n, v in cols.items()}


@dataclass
class EngineResult:
    """What one engine pass over a forest (or chunk) produces."""

    black_holes: BlackHoles
    history: History
    forest: Forest
    ledger: dict
    baryons: dict
    n_seeds: dict
    wall_s: float
    mergers: dict = field(default_factory=dict)
    #: whole chunk in its worker: reading/selecting the forests, engine, packing (s)
    chunk_s: float = 0.0


def run_forest(forest: Forest, model: Model, run: RunSettings,
               cosmo: Cosmology) -> EngineResult:
    """Grow black holes through every forest of ``forest``.

    Parameters
    ----------
    forest : Forest
    model : Model
    run : RunSettings
    cosmo : Cosmology

    Returns
    -------
    EngineResult

    Notes
    -----
    The first call sets glibc's allocator to reuse freed temporaries instead of mapping
    fresh pages for each (:func:`bhgrow._alloc.keep_freed_memory`; the environment variable
    ``BHGROW_SYSTEM_MALLOC=1`` opts out).
    """
    t_start = time.perf_counter()
    keep_freed_memory()
    t_snap = cosmo.age_gyr(forest.snapshots.z)
    # cosmic time by snapshot number (a look-up is cheaper than a search per node)
    nums = np.asarray(forest.snapshots.snap)
    t_by_num = None
    if nums.size and nums.min() >= 0 and nums.max() < 10 * nums.size + 1000:
        t_by_num = np.zeros(int(nums.max()) + 1)
        t_by_num[nums] = t_snap
    # per-node state only; the per-node set-up is done per snapshot slice, in a function
    # whose temporaries are freed before the next slice's are made: fresh memory is the
    # dearest part of a big run on a virtual machine whose host backs pages on first use
    w = _Walk(forest=forest, model=model, run=run, cosmo=cosmo, t_snap=t_snap,
              z_snap=np.asarray(forest.snapshots.z, dtype=float), t_by_num=t_by_num,
              state=_NodeState.for_forest(forest), bh=BlackHoles(), hist=History(),
              n_seeds={name: 0 for name in sd.CHANNEL_CODES},
              channels=[c for _, c in model.seeding],
              stripped=np.zeros(forest.n_forests), outflow=np.zeros(forest.n_forests))
    for k in range(len(forest.snapshots)):
        _snapshot(w, k)
    bh, events = w.bh, w.events

    # --- end: ledger and baryon check ---------------------------------------------------------
    ledger = _ledger(bh, forest)
    excess = w.max_excess if np.isfinite(w.max_excess) else 0.0      # 0: no roots
    baryon = {"max_relative_excess": excess, "ok": bool(excess <= 1e-6)}
    # per forest, each summed in the same order whatever the chunk (np.add.at adds row by
    # row); the totals are exactly rounded sums of those, so a run of several chunks gets
    # the same totals, bit for bit, from all its chunks' forests (pipeline.run_model)
    baryon["stripped_msun"] = math.fsum(w.stripped)
    baryon["outflow_msun"] = math.fsum(w.outflow)
    baryon["stripped_per_forest"] = w.stripped
    baryon["outflow_per_forest"] = w.outflow
    mergers = {key: np.concatenate([e[key] for e in events]) for key in events[0]} \
        if events else {}
    return EngineResult(black_holes=bh, history=w.hist, forest=forest, ledger=ledger,
                        baryons=baryon, n_seeds=w.n_seeds, wall_s=time.perf_counter() - t_start,
                        mergers=mergers)


class _NodeState:
    """Gas, stars and metals (Msun) and the "polluted" flag of the live node rows (other
    per-node float and flag arrays by name: ``floats``, ``flags``).

    A node's state is written by its progenitors' snapshots and read at its own, so only
    rows from the current snapshot's first row to the furthest descendant row are live.
    They sit in arrays indexed by ``row - base``; when the window would pass the arrays'
    end it is moved to their front (and the arrays doubled if it would fill more than
    half). Memory is a few snapshots' rows, not the whole chunk's: a big run touches less
    fresh memory, the dearest kind on a virtual machine whose host backs pages on first
    use.
    """

    def __init__(self, capacity: int, floats=("gas", "stars", "metals"), flags=("polluted",)):
        capacity = max(int(capacity), 1)
        self.base = 0            # row of element 0
        self.top = 0             # rows >= top were never in the window (their state is 0)
        self._names = tuple(floats) + tuple(flags)
        for name in floats:
            setattr(self, name, np.zeros(capacity))
        for name in flags:
            setattr(self, name, np.zeros(capacity, dtype=bool))

    @classmethod
    def for_forest(cls, forest: Forest, **names) -> "_NodeState":
        """A window with room for a few of ``forest``'s widest snapshots (it grows if a
        walk needs more)."""
        n = forest.n_nodes
        widest = int(np.diff(forest.snap_offsets).max()) if n else 0
        return cls(min(n, 4 * widest + 1024), **names)

    def cover(self, start: int, stop: int) -> None:
        """Make rows ``[start, stop)`` addressable; rows before ``start`` are dropped.

        ``start`` never decreases from call to call (snapshots are walked in order).
        """
        cap = getattr(self, self._names[0]).size
        if stop - self.base > cap:
            live = max(self.top - start, 0)              # rows [start, top) keep their state
            need = max(stop, self.top) - start
            old = start - self.base
            used = self.top - self.base
            if 2 * need > cap:
                new_cap = max(2 * need, 2 * cap)
                for name in self._names:
                    arr = getattr(self, name)
                    new = np.zeros(new_cap, dtype=arr.dtype)
                    new[:live] = arr[old:old + live]
                    setattr(self, name, new)
            else:
                for arr in (getattr(self, name) for name in self._names):
                    arr[:live] = arr[old:old + live]
                    arr[live:used] = 0
            self.base = start
        self.top = max(self.top, stop)


@dataclass
class _Walk:
    """What the snapshot loop carries from one snapshot to the next."""

    forest: Forest
    model: Model
    run: RunSettings
    cosmo: Cosmology
    t_snap: np.ndarray          # cosmic time of each snapshot, Gyr
    z_snap: np.ndarray
    t_by_num: np.ndarray | None  # cosmic time by snapshot number, Gyr (None: search)
    state: _NodeState
    bh: BlackHoles
    hist: History
    n_seeds: dict
    channels: list
    events: list = field(default_factory=list)
    # gas removed by the baryon cap at halo mergers and by SN + AGN outflows, per forest
    # (aligned with forest.forest_ids)
    stripped: np.ndarray | None = None
    outflow: np.ndarray | None = None
    #: largest relative excess of gas + stars + black holes over f_b M at the roots so far
    max_excess: float = -np.inf


def _snapshot(w: _Walk, k: int) -> None:
    """Steps 1-4 of the module notes for the halos of snapshot ``k``."""
    forest, model, run, cosmo = w.forest, w.model, w.run, w.cosmo
    bh = w.bh
    t_snap, t_by_num, fb = w.t_snap, w.t_by_num, cosmo.fb
    desc, mass_h = forest.desc_index, forest.mass_msun
    prog_offsets, prog_index = forest.prog_offsets, forest.prog_index
    offsets, main_prog = forest.snap_offsets, forest.main_prog
    sl = forest.snapshot_slice(k)
    if sl.stop == sl.start:
        return
    # node state: rows from this slice's first to its furthest descendant, addressed as
    # ``row - base``; the slice's own rows as views
    d_sl = desc[sl]
    st = w.state
    st.cover(sl.start, max(sl.stop, int(d_sl.max()) + 1))
    base = st.base
    gas, stars, metals, polluted = st.gas, st.stars, st.metals, st.polluted
    ls = slice(sl.start - base, sl.stop - base)
    gas_sl, stars_sl, metals_sl = gas[ls], stars[ls], metals[ls]
    rows = np.arange(sl.start, sl.stop)
    z = float(forest.snapshots.z[k])
    m = mass_h[sl]
    r_vir, v_c, t_vir, fb_eff, t_dyn = _halo_properties(model, cosmo, m, z)
    # escape speeds (coalescence kicks, feedback) only where black holes are
    v_esc = np.zeros(rows.size)
    if len(bh):
        _escape_speeds(model, m, v_c, z, cosmo, v_esc, bh.host[(bh.host >= sl.start)
                                                          & (bh.host < sl.stop)] - sl.start)
    new = prog_offsets[sl.start + 1:sl.stop + 1] == prog_offsets[sl.start:sl.stop]
    # interval to the descendant, and the descendant's smooth growth (its mass beyond
    # its progenitors', which may sit in earlier snapshots too), credited to its main
    # progenitor; descendants of this slice lie in rows [lo, lo + span)
    has_desc = d_sl >= 0
    go = rows[has_desc]
    d = d_sl[has_desc]
    d0 = np.where(has_desc, d_sl, rows)
    dts = (t_by_num[forest.snap[d0]] if t_by_num is not None else
           t_snap[np.searchsorted(offsets, d0, side="right") - 1]) - t_snap[k]
    smooth = np.zeros(rows.size)
    if d.size:
        lo = int(d.min())
        span = int(d.max()) - lo + 1
        compiled = _kernels.kernels()
        fast = None if compiled is None else compiled.smooth_growth(forest, sl.start, sl.stop)
        if fast is not None:            # the same sums in the same order, in C
            smooth = fast
        else:
            progs = prog_index[prog_offsets[lo]:prog_offsets[lo + span]]
            prog_sum = np.bincount(desc[progs] - lo, weights=mass_h[progs], minlength=span)
            mains = np.flatnonzero(main_prog[d] == go)
            dm = d[mains]
            smooth[go[mains] - sl.start] = np.maximum(mass_h[dm] - prog_sum[dm - lo], 0.0)
    np.copyto(gas_sl, fb_eff * m, where=new)

    # --- coalescences due by now --------------------------------------------------------
    if len(bh):
        w.events += pairs.coalesce(bh, sl, float(t_snap[k]), k, gas_sl, stars_sl, v_esc,
                                   mass_h, model, run, cosmo)

    # --- black holes hosted in this slice ----------------------------------------------
    in_slice = (bh.host >= sl.start) & (bh.host < sl.stop) if len(bh) else np.zeros(0, bool)
    central = in_slice & (bh.status == CENTRAL)
    has_central = np.zeros(rows.size, dtype=bool)
    has_central[bh.host[central] - sl.start] = True

    # --- seeding ------------------------------------------------------------------------
    fire = _seed(w, sl, z, m, t_vir, r_vir, gas_sl, metals_sl, polluted[ls], has_central) \
        if w.channels else None
    if fire is not None and fire.size:
        has_central[fire] = True
        _escape_speeds(model, m, v_c, z, cosmo, v_esc, fire)
        in_slice = np.r_[in_slice, np.ones(fire.size, bool)]
        central = np.r_[central, np.ones(fire.size, bool)]

    # --- history at this snapshot (state on arrival, rate over the previous step) -------
    alive = np.flatnonzero(in_slice)
    if run.histories and alive.size:
        eps_a = model.efficiency.efficiency(bh.spin[alive])
        w.hist.record(bh.bh_id[alive], float(t_snap[k]), z, bh.mass[alive],
                      bh.last_mdot[alive] * _GYR_PER_YR,
                      acc.eddington_ratio(bh.last_mdot[alive], bh.mass[alive], eps_a),
                      gas_sl[bh.host[alive] - sl.start])
    bh.end_z[alive] = z
    bh.host_mass[alive] = mass_h[bh.host[alive]]

    # --- reservoir + accretion over dt ----------------------------------------------------
    inflow = fb_eff * smooth / np.where(dts > 0, dts, 1.0)
    step_rows = dts > 0
    quiet = step_rows & ~has_central
    blown = np.zeros(rows.size)           # gas blown out of each halo over its interval
    if quiet.any():
        _reservoir_step(model, quiet, gas_sl, stars_sl, metals_sl, inflow, t_dyn, v_c, dts,
                        blown)
    cbh = np.flatnonzero(central)
    cbh = cbh[step_rows[bh.host[cbh] - sl.start]] if cbh.size else cbh
    # in near-equal blocks of at most _SOLVER_BLOCK holes: the solver's ~60 temporaries
    # then stay in the CPU's last-level cache; each hole's result depends on its own halo
    for blk in _blocks(cbh.size, _SOLVER_BLOCK):
        _grow(model, run, bh, cbh[blk], sl, gas_sl, stars_sl, metals_sl, blown, inflow,
              t_dyn, v_c, v_esc, r_vir, t_vir, dts, k)
    np.add.at(w.outflow, forest.forest_index[sl], blown)

    # --- pass state down the trees ----------------------------------------------------------
    hosted = np.zeros(rows.size, dtype=bool)
    if len(bh):
        hosted[bh.host[in_slice] - sl.start] = True
    if d.size:
        # progenitors add to their descendant in row order (np.add.at: unbuffered)
        db = d - base
        for arr, arr_sl in ((gas, gas_sl), (stars, stars_sl), (metals, metals_sl)):
            np.add.at(arr, db, arr_sl[has_desc])
        polluted[db[polluted[ls][has_desc] | (stars_sl[has_desc] > 0) | hosted[has_desc]]] = True
    roots = np.flatnonzero(~has_desc)
    moved = _move_black_holes(bh, in_slice, desc, forest, k, len(t_snap), t_snap, w.z_snap,
                              mass_h, model, run, cosmo)
    if roots.size:
        _baryon_check(w, sl, roots, gas_sl, stars_sl, m, in_slice)
    # baryon cap on the receiving descendants: gas above f_b M_desc is stripped (applied
    # at every arrival, so a descendant fed from several snapshots is capped each time);
    # on the descendants' row range [lo, lo + span) as slices, the receiving rows masked
    if d.size:
        w0 = lo - base
        g_sp = gas[w0:w0 + span]
        excess = g_sp + stars[w0:w0 + span]
        if moved.size:
            excess += np.bincount(bh.host[moved] - lo, weights=bh.mass[moved], minlength=span)
        excess -= fb * mass_h[lo:lo + span]
        receives = np.zeros(span, dtype=bool)
        receives[d - lo] = True
        # only where there is something to strip (or no gas left to hold metals)
        sel = np.flatnonzero(receives & ((excess > 0.0) | (g_sp <= 0.0)))
        if sel.size:
            us, gs = w0 + sel, g_sp[sel]
            cut = np.clip(excess[sel], 0.0, gs)
            metals[us] *= np.divide(gs - cut, gs, out=np.zeros(sel.size),
                                    where=gs > 0)    # stripped gas takes its metals
            gas[us] = gs - cut
            np.add.at(w.stripped, forest.forest_index[lo + sel], cut)


def _halo_properties(model, cosmo, m, z: float):
    """Step 1 of the module notes: virial radius (kpc), circular velocity (km/s), virial
    temperature (K), effective baryon fraction and the zone's dynamical time (Gyr) of the
    halos of mass ``m`` (Msun) at redshift ``z``; in blocks of :data:`_BLOCK` halos, whose
    temporaries stay in the CPU cache (measured: ~25% faster than whole-slice arrays)."""
    out = tuple(np.empty(m.size) for _ in range(5))
    for b in _blocks(m.size, _BLOCK):
        r_vir, v_c, t_vir = model.halo.virial(m[b], z, cosmo)
        fb_eff = model.reionization.baryon_fraction(m[b], z, cosmo.fb)
        t_dyn = dynamical_time_gyr(model.gas_zone.radius_frac * np.asarray(r_vir), v_c)
        for dst, src in zip(out, (r_vir, v_c, t_vir, fb_eff, t_dyn)):
            dst[b] = src
    return out


def _reservoir_step(model, quiet, gas, stars, metals, inflow, t_dyn, v_c, dts,
                    blown) -> None:
    """Step 3 for the halos without a central black hole (mask ``quiet`` of the slice): the
    closed-form step of :meth:`StarFormation.step`, without its argument checks (all made
    by the engine) and the metal-flow integrals (not used). Updates the slice's ``gas``,
    ``stars`` and ``metals`` in place, and ``blown`` (the gas blown out, Msun) at the quiet
    rows.

    Most halos of a slice are quiet, so the step runs on the whole slice (no gathers) and
    only the quiet rows are kept; in blocks of :data:`_BLOCK` rows, whose ~20 temporaries
    stay in the CPU cache (measured: half the time of whole-slice arrays of 5e5 rows).
    Where the compiled kernels are built (:mod:`bhgrow._kernels`) and the model's
    star formation is :class:`StarFormation` itself, the same step runs in C, one halo at a
    time, on the quiet rows only (25 instead of ~50 ns per halo; equal to round-off).
    """
    sf = model.star_formation
    compiled = _kernels.kernels() if type(sf) is StarFormation else None
    if compiled is not None:        # the same step, one halo at a time (bhgrow._kernels)
        compiled.quiet_step(sf, inflow, t_dyn, v_c, dts, quiet, gas, stars, metals, blown)
        return
    for b in _blocks(quiet.size, _BLOCK):
        res = model.star_formation._evolve(gas[b], stars[b], metals[b], inflow[b], t_dyn[b],
                                           v_c[b], dts[b], metal_flows=False)
        q = quiet[b]
        np.copyto(gas[b], res.gas, where=q)
        np.copyto(stars[b], res.stars, where=q)
        np.copyto(metals[b], res.metals, where=q)
        np.copyto(blown[b], res.outflow_msun, where=q)

def _seed(w: _Walk, sl: slice, z: float, m, t_vir, r_vir, gas_sl, metals_sl, polluted_sl,
          has_central) -> np.ndarray:
    """Step 2 of the module notes: the seeding channels on the halos of slice ``sl``; new
    black holes are appended to ``w.bh``. Returns the local rows that seeded."""
    forest, model, run = w.forest, w.model, w.run
    n = sl.stop - sl.start
    node_id = forest.node_id[sl]
    j_lw = forest.extra["j_lw"][sl] if "j_lw" in forest.extra else None
    code = np.zeros(n, dtype=np.int8)
    seed_mass = np.zeros(n)
    # in blocks of _BLOCK halos (the inputs and the channels' masks stay in the CPU cache);
    # every halo's result depends on its own inputs and stream key alone
    for b in _blocks(n, _BLOCK):
        nb = b.stop - b.start
        g = gas_sl[b]
        inp = sd.SeedingInputs(
            m_halo_msun=m[b], z=np.full(nb, z), t_vir_k=t_vir[b], pristine=~polluted_sl[b],
            metallicity=np.divide(metals_sl[b], g, out=np.zeros(nb), where=g > 0),
            n_h_cm3=np.asarray(model.gas_zone.hydrogen_density(g, r_vir[b]), dtype=float),
            gas_msun=g, j_lw=np.full(nb, np.nan) if j_lw is None else j_lw[b],
            has_bh=has_central[b], keys=rng.stream_keys(run.seed, node_id[b]))
        code[b], seed_mass[b] = sd.apply_channels(w.channels, inp)
    fire = np.flatnonzero(code > 0)
    if fire.size:
        # a halo seeds at most once, so the seeding node's id names the black hole
        # whatever the chunking
        seed_mass = seed_mass[fire]
        w.bh.append(bh_id=node_id[fire], forest_id=forest.forest_id[sl][fire],
                    host=sl.start + fire, mass=seed_mass, spin=np.zeros(fire.size),
                    channel=code[fire], seed_z=np.full(fire.size, z), seed_mass=seed_mass,
                    growth=np.zeros(fire.size), status=np.full(fire.size, CENTRAL),
                    last_mdot=np.zeros(fire.size), end_z=np.full(fire.size, z),
                    host_mass=m[fire], t_hmerge=np.full(fire.size, np.nan),
                    t_df_end=np.full(fire.size, np.nan), t_c=np.full(fire.size, np.nan),
                    radiated=np.zeros(fire.size),
                    stream_key=rng.stream_keys(run.seed, node_id[fire]))
        for c, cnt in zip(*np.unique(code[fire], return_counts=True)):
            w.n_seeds[CHANNEL_NAMES[int(c)]] += int(cnt)
    return fire


def _blocks(n: int, size: int) -> list:
    """Slices of ``range(n)`` in near-equal blocks of at most ``size``."""
    nb = max(1, -(-n // size))
    edges = np.linspace(0, n, nb + 1).astype(int) if n else [0, 0]
    return [slice(a, b) for a, b in zip(edges[:-1], edges[1:]) if b > a]

def _escape_speeds(model, m, v_c, z, cosmo, v_esc, loc) -> None:
    """Fill ``v_esc`` (km/s) at the local rows ``loc`` (repeats allowed)."""
    if loc.size:
        need = np.zeros(v_esc.size, dtype=bool)
        need[loc] = True
        at = np.flatnonzero(need)
        v_esc[at] = model.halo.escape_speed_kms(m[at], z, cosmo, v_c[at])


def _grow(model, run, bh, cbh, sl, gas, stars, metals, blown, inflow, t_dyn,
          v_c, v_esc, r_vir, t_vir, dts, k):
    """Reservoir, accretion and feedback over the interval for halos with a central hole.

    Solved together, piecewise in closed form (:func:`bhgrow.physics.coupled.advance`), in
    ``n_i`` substeps per halo (:func:`bhgrow.physics.coupled.substeps`, from that halo
    alone, so results never depend on which other halos share its snapshot or chunk).
    """
    # gas, stars, metals: of the slice; hl: each BH's host in it (one central each)
    hl = bh.host[cbh] - sl.start
    h_total = dts[hl]

    # one accretion episode per interval: its disc orientation (chaotic mode) and hence the
    # radiative efficiency are fixed over the interval; the spin is updated once at its end
    # (Bardeen's coherent invariant makes that exact for any number of substeps)
    u = rng.uniform(bh.stream_key[cbh], k, _P_SPIN)
    eps = np.asarray(model.efficiency.efficiency(model.spin.episode_spin(bh.spin[cbh], u)),
                     dtype=float)
    loss, lock, metal_rate = model.star_formation.rates(t_dyn[hl], v_c[hl])
    rv, tv = r_vir[hl], t_vir[hl]
    rho_1, cs, _ = model.gas_zone.state(1.0, rv, tv)          # zone density per Msun of gas
    linear = getattr(model.accretion, "linear_in_density", False)
    g0 = gas[hl]
    I = inflow[hl]
    # the gas a drained reservoir refills to (for a nonlinear law's first coefficient)
    g_ref = np.maximum(g0, np.minimum(I * h_total, np.divide(I, loss, out=I * h_total,
                                                             where=loss > 0)))
    g_ref = np.where(g_ref > 0, g_ref, 1.0)
    bondi = np.asarray(model.accretion.coefficient(rho_1 * g_ref, cs, 0.0), dtype=float) / g_ref
    edd = np.asarray(model.eddington.coefficient(eps), dtype=float)        # 1/Gyr
    per_unit = 1.0 + np.asarray(model.feedback.gas_removed(np.ones(cbh.size), eps,
                                                           v_esc[hl]), dtype=float)
    coef = cp.Coefficients(inflow=I, loss=loss, lock=lock, metal_rate=metal_rate,
                           bondi_per_gas=bondi, edd=edd, keep=1.0 - eps, per_unit=per_unit)
    m_start = bh.mass[cbh]

    if linear:
        # the hole's ln-growth rate over its previous interval predicts its mean mass in
        # the first Bondi step (as the previous step's does in later steps)
        prior = coef.keep * bh.last_mdot[cbh] / m_start
        n_sub = cp.substeps(g0, m_start, coef, h_total, run.substep_dlnm, run.max_substeps)
        r = cp.advance(g0, metals[hl], m_start, coef, h_total, n_sub, run.substep_dlnm, prior)
        g, z, m, taken, formed = r.gas, r.metals, r.m_bh, r.accreted, r.stars_formed
        out = r.wind + r.feedback
    else:
        n_sub = cp.substeps(g0, m_start, coef, h_total, run.substep_dlnm, run.max_substeps)
        # the coefficient depends on the gas: re-evaluated at every step's start, with steps
        # that also bound its change over the interval (estimated from the gas the
        # reservoir moves to without the hole)
        zero = np.zeros(cbh.size)
        g_end = model.star_formation.step(g0, zero, zero, I, t_dyn[hl], v_c[hl], h_total).gas
        ge = np.where(g_end > 0, g_end, g_ref)
        b_end = np.asarray(model.accretion.coefficient(rho_1 * ge, cs, 0.0), dtype=float) / ge
        with np.errstate(divide="ignore", invalid="ignore"):
            dlnb = np.abs(np.log(b_end / bondi))
        dlnb = np.where(np.isfinite(dlnb), dlnb, 0.0)
        n_sub = np.clip(np.maximum(n_sub, np.ceil(dlnb / run.substep_dlnm)), 1,
                        run.max_substeps)
        g, z, m = g0.copy(), metals[hl].copy(), m_start.copy()
        taken, formed, out = np.zeros(cbh.size), np.zeros(cbh.size), np.zeros(cbh.size)
        h = h_total / n_sub
        # ln(effective gas / starting gas) of each halo's last step: the next step starts
        # its search there
        shift = np.zeros(cbh.size)
        for j in range(int(n_sub.max()) if n_sub.size else 0):
            live = np.flatnonzero(n_sub > j)
            r, shift[live] = _nonlinear_step(model, coef.take(live), g[live], z[live],
                                             m[live], h[live], rho_1[live], cs[live],
                                             shift[live])
            g[live], z[live], m[live] = r.gas, r.metals, r.m_bh
            taken[live] += r.accreted
            formed[live] += r.stars_formed
            out[live] += r.wind + r.feedback
    grown = m - m_start
    bh.spin[cbh] = model.spin.update(bh.spin[cbh], m_start, m, u)
    bh.growth[cbh] += grown
    bh.mass[cbh] = m_start + grown
    bh.last_mdot[cbh] = np.divide(taken, h_total, out=np.zeros(cbh.size), where=h_total > 0)
    gas[hl], metals[hl] = g, z
    stars[hl] += formed
    blown[hl] = out                 # one central per halo


def _nonlinear_step(model, c, g, z, m, h, rho_1, cs, shift):
    """One step of :func:`bhgrow.physics.coupled.advance` for an accretion law whose
    coefficient per unit gas depends on the gas (e.g. Booth & Schaye 2009, ``B ~ g^beta``);
    returns its :class:`~bhgrow.physics.coupled.IntervalResult` and each halo's
    ``ln(g_e / g)``, from which the next step of the interval starts (``shift``: this
    step's start, 0 for the first).

    The step freezes ``B``; it is taken at an effective gas ``g_e`` equal to the step's
    own mean gas, ``int g dt / h``, with ``B = A(g_e) / g_e``, so ``B int g dt = A(g_e) h``
    (the midpoint rule for ``int A(g) dt``). ``g_e`` solves ``ln g_e = ln mean(g_e)``: a
    fixed-point step from the starting gas, then secant steps (kept within the span of the
    last two points widened by the same again: the fixed-point map oscillates where the
    hole's drain dominates), each halo until it is within :data:`_NONLINEAR_TOL` in
    ``ln g_e`` or after :data:`_NONLINEAR_ITERS` solver calls (the search starts at
    ``ln g + shift``; the first iteration's fixed-point step goes from there); one solver
    call per iteration on the halos not yet converged. Taking ``B`` at the starting gas,
    as before, is an explicit step on that stiff loop (low gas -> small ``B`` -> the gas
    overshoots in the step -> large ``B``): on toy forests 1% of central black holes
    ended > 40% away from a run at ``substep_dlnm = 0.0125`` at the default 0.5 (1.2%
    with this scheme), though the total converged.
    """
    out = None
    x_prev = f_prev = None
    x_start = np.log(np.where(g > 0, g, 1.0))
    # (the last step's shift within a factor e^5; e^x always finite)
    x = np.clip(x_start + np.where(g > 0, np.clip(shift, -5.0, 5.0), 0.0), 0.0, 700.0)
    x_end = x.copy()
    todo = np.arange(g.size)
    for it in range(_NONLINEAR_ITERS):
        ge = np.exp(x)
        bpg = np.asarray(model.accretion.coefficient(rho_1[todo] * ge, cs[todo], 0.0),
                         dtype=float) / ge
        r = cp.advance(g[todo], z[todo], m[todo], c.take(todo)._replace(bondi_per_gas=bpg),
                       h[todo])
        if out is None:
            out = r
        else:           # each halo keeps the step at its latest effective gas
            for full, part in zip(out, r):
                full[todo] = part
        x_end[todo] = x
        ht = h[todo]
        mean = np.divide(r.gas_integral, ht, out=np.zeros(todo.size), where=ht > 0)
        f = x - np.log(np.maximum(mean, 1.0))
        go = (np.abs(f) > _NONLINEAR_TOL) & (ht > 0) & (mean > 0)
        if not go.any() or it == _NONLINEAR_ITERS - 1:
            break
        if x_prev is None:
            x_new = x - f                      # the fixed-point step: ln of the mean gas
        else:
            x_new = x - f * (x - x_prev) / (f - f_prev)
            lo, hi = np.minimum(x, x_prev), np.maximum(x, x_prev)
            span = hi - lo
            x_new = np.where(np.isfinite(x_new), np.clip(x_new, lo - span, hi + span),
                             x - f)
        # (the effective gas kept within [1 Msun, e^700]: the coefficient per unit gas of
        # a drained reservoir is taken at 1 Msun, as at zero gas)
        todo, x_prev, f_prev, x = todo[go], x[go], f[go], np.clip(x_new[go], 0.0, 700.0)
    return out, x_end - x_start


def _move_black_holes(bh: BlackHoles, in_slice, desc, forest: Forest, k: int,
                      n_snap: int, t_snap, z_snap, mass_h, model, run,
                      cosmo) -> np.ndarray:
    """Black holes of this slice follow their hosts to the descendants (see module notes).

    Returns the table indices of the black holes that moved.
    """
    idx = np.flatnonzero(in_slice)
    if idx.size == 0:
        return idx
    d = desc[bh.host[idx]]
    ends = d < 0
    if k < n_snap - 1:
        bh.status[idx[ends]] = HOST_ENDED       # host left the tree before the final snapshot
    moving = idx[~ends]
    if moving.size == 0:
        return moving
    old = bh.host[moving]
    new = desc[old]
    from_main = forest.main_prog[new] == old
    cen = bh.status[moving] == CENTRAL
    demote = cen & ~from_main                    # centrals of other progenitors wander ...
    lo = int(new.min())                          # descendants' row range (no O(n) arrays)
    span = int(new.max()) - lo + 1
    gets_central = np.zeros(span, dtype=bool)
    gets_central[new[cen & from_main] - lo] = True
    cand = np.flatnonzero(demote & ~gets_central[new - lo])
    promote = np.zeros(moving.size, dtype=bool)  # ... unless the descendant has no central
    if cand.size:
        order = np.lexsort((bh.bh_id[moving[cand]], -bh.mass[moving[cand]], new[cand]))
        c_sorted = cand[order]
        first = np.r_[True, new[c_sorted][1:] != new[c_sorted][:-1]]
        promote[c_sorted[first]] = True
    sink = demote & ~promote
    # partner of each new satellite black hole: the central the descendant receives
    partner = np.zeros(span)
    stay = cen & (from_main | promote)
    partner[new[stay] - lo] = bh.mass[moving[stay]]
    k_new = np.searchsorted(forest.snap_offsets, new[sink], side="right") - 1
    pairs.start_clocks(bh, moving[sink], new[sink], old[sink], t_snap[k_new], model, run,
                       cosmo, mass_h, z_snap[k_new], partner[new[sink] - lo], k)
    bh.status[moving[sink]] = SINKING
    bh.last_mdot[moving[sink]] = 0.0        # sinking black holes do not accrete
    bh.host[moving] = new
    return moving


def _ledger(bh: BlackHoles, forest: Forest) -> dict:
    """Per-forest mass ledger (relative residual).

    sum final mass (central, sinking, host_ended) + sum ejected mass
        = sum seed mass + sum accreted growth - sum mass radiated in GWs
    """
    fi = np.searchsorted(forest.forest_ids, bh.forest_id)
    nf = forest.n_forests
    alive = np.isin(bh.status, (CENTRAL, SINKING, HOST_ENDED))
    ejected = np.isin(bh.status, (EJECTED, EJECTED_TRIPLE))
    final = np.bincount(fi, weights=np.where(alive, bh.mass, 0.0), minlength=nf)
    ej = np.bincount(fi, weights=np.where(ejected, bh.mass, 0.0), minlength=nf)
    seeds = np.bincount(fi, weights=bh.seed_mass, minlength=nf)
    growth = np.bincount(fi, weights=bh.growth, minlength=nf)
    rad = np.bincount(fi, weights=bh.radiated, minlength=nf)
    scale = np.maximum(seeds + growth, 1e-300)
    resid = np.abs(final + ej - (seeds + growth - rad)) / scale
    worst = float(resid.max()) if nf else 0.0
    return {"max_relative_residual": worst, "ok": bool(worst < 1e-10),
            "total_final_msun": float(final.sum()), "total_seed_msun": float(seeds.sum()),
            "total_growth_msun": float(growth.sum()), "total_radiated_msun": float(rad.sum()),
            "total_ejected_msun": float(ej.sum()), "per_forest_residual": resid}


def _baryon_check(w: _Walk, sl: slice, roots, gas_sl, stars_sl, m, in_slice) -> None:
    """Largest relative excess of gas + stars + black holes over f_b M_halo at the roots
    of this slice (local rows ``roots``; their state is final), into ``w.max_excess``."""
    bh = w.bh
    idx = np.flatnonzero(in_slice)
    idx = idx[(bh.host[idx] >= sl.start) & (bh.host[idx] < sl.stop)]     # did not move
    idx = idx[np.isin(bh.status[idx], (CENTRAL, SINKING, HOST_ENDED))]
    bh_mass = np.bincount(bh.host[idx] - sl.start, weights=bh.mass[idx],
                          minlength=gas_sl.size)
    cap = w.cosmo.fb * m[roots]
    total = gas_sl[roots] + stars_sl[roots] + bh_mass[roots]
    w.max_excess = max(w.max_excess, float(np.max((total - cap) / cap)))
