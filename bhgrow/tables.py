"""Binned tables from a finished run: merger rates, chirp-mass and mass-ratio distributions,
black-hole mass functions, the M_BH-M_halo relation, Eddington ratios and seed channels.

Every quantity is a comoving number (or mass) density: each black hole and each merger counts
with the ``weight_mpc3`` of its forest, the comoving number density [Mpc^-3] the forest
stands for (per-forest weights of Monte Carlo trees, ``1/box^3`` for simulation trees).

Estimators
----------
* A weighted count in a bin is ``S = sum_i w_i``; its counting (Poisson) error is
  ``sqrt(sum_i w_i^2)``, which is ``sqrt(N)`` for unit weights (the variance of a compound
  Poisson sum; e.g. Cowan 1998, Statistical Data Analysis (memory)). Every density
  below is ``S`` divided by a bin width, and its error is divided by the same width.
* Comoving merger-rate density in a redshift bin ``[z_lo, z_hi)``:
  ``R = sum_i w_i / (t(z_lo) - t(z_hi))`` [Mpc^-3 Gyr^-1], with ``t(z)`` the cosmic time of the
  run's cosmology (Hogg 1999, eq. 30).
* Observed (full-sky) merger rate ``dN/dt_obs = int R(z)/(1+z) dV_c/dz dz`` [yr^-1] per
  redshift bin, from :func:`bhgrow.gw.observed_rate_per_yr`; cumulative = running sum from
  the lowest redshift bin.
* Weighted percentiles use the inverted empirical distribution function with weights
  (Hyndman & Fan 1996, definition 1; numpy ``method="inverted_cdf"``): the smallest value
  whose cumulative weight fraction reaches the level.

Bins follow :func:`numpy.histogram`: ``[lo, hi)`` except the last, ``[lo, hi]``. Objects
outside the binning are left out of a table and counted in its description.

Files
-----
:func:`write_tables` writes one comma-delimited ECSV file per table (``<name>.ecsv``; astropy
units and a description in the header; ``pandas.read_csv(path, comment="#")`` reads it).
:func:`tables_from_run` rebuilds all tables from a run directory without rerunning the model.

References
----------
.. [Hogg99] Hogg D. W., 1999, arXiv:astro-ph/9905116, "Distance measures in cosmology"
.. [HF96] Hyndman R. J., Fan Y., 1996, The American Statistician, 50, 361
.. [Kish65] Kish L., 1965, Survey Sampling (Wiley), effective sample size (memory)
"""

from __future__ import annotations

import difflib
import json
import math
import os
from dataclasses import dataclass, fields
from pathlib import Path

import numpy as np

from . import __version__, _validate
from .errors import BhgrowInputError, ParameterError

__all__ = ["Binning", "TABLE_NAMES", "build_tables", "write_tables", "tables_from_run",
           "weighted_percentile"]

#: names of the tables :func:`build_tables` returns (and the file stems :func:`write_tables`
#: writes)
TABLE_NAMES = ("merger_rate_density", "observed_merger_rate", "chirp_mass_distribution",
               "mass_ratio_distribution", "bh_mass_function", "mbh_mhalo",
               "eddington_ratio_distribution", "seed_channels")

#: percentile levels of the M_BH-M_halo relation (median and the 1-sigma equivalent band)
PERCENTILES = (16.0, 50.0, 84.0)

#: black-hole statuses counted as present in a galaxy at the final snapshot
_LIVE = ("central", "sinking")

_OWNER = "Binning"

# columns each input must carry
_BH_COLUMNS = ("bh_id", "seed_channel", "final_mass_msun", "status", "final_z",
               "host_mass_msun", "weight_mpc3")
_MERGER_COLUMNS = ("z", "q", "chirp_mass_msun", "weight_mpc3", "seed_channel_1",
                   "seed_channel_2")
_HISTORY_COLUMNS = ("bh_id", "z", "mass_msun", "eddington_ratio")

_RATE_UNIT = "Mpc-3 Gyr-1"
_DEX_UNIT = "Mpc-3 dex-1"


def _steps(lo: float, hi: float, step: float) -> tuple:
    n = int(round((hi - lo) / step))
    return tuple(float(round(lo + i * step, 10)) for i in range(n + 1))


# ------------------------------------------------------------------------------------------
# binning
def _fail(name: str, rule: str, value) -> None:
    raise ParameterError(f"`{name}` of {_OWNER} must be {rule}; got {value!r}",
                         source=_OWNER, rule=name)


def _numbers(name: str, value, lo: float | None, hi: float | None) -> tuple:
    if isinstance(value, (str, bytes)) or not hasattr(value, "__iter__"):
        _fail(name, "a sequence of numbers", value)
    out = []
    for i, v in enumerate(value):
        label = f"{name}[{i}]"
        if lo is not None and hi is not None:
            out.append(_validate.in_range(_OWNER, label, v, lo, hi))
        elif lo is not None:
            out.append(_validate.in_range(_OWNER, label, v, lo, math.inf, hi_open=True))
        elif hi is not None:
            out.append(_validate.in_range(_OWNER, label, v, -math.inf, hi, lo_open=True))
        else:
            out.append(_validate.in_range(_OWNER, label, v, -math.inf, math.inf,
                                          lo_open=True, hi_open=True))
    return tuple(out)


def _edges(name: str, value, lo: float | None = None, hi: float | None = None) -> tuple:
    """Bin edges: at least two finite numbers, strictly increasing, within [lo, hi]."""
    out = _numbers(name, value, lo, hi)
    if len(out) < 2:
        _fail(name, "at least two bin edges", value)
    if not all(b > a for a, b in zip(out[:-1], out[1:])):
        _fail(name, "strictly increasing", value)
    return out


def _points(name: str, value, lo: float | None = None) -> tuple:
    """Chosen values (e.g. redshifts): at least one finite number, no repeats."""
    out = _numbers(name, value, lo, None)
    if not out:
        _fail(name, "a non-empty sequence", value)
    if len(set(out)) != len(out):
        _fail(name, "free of repeated values", value)
    return out


@dataclass(frozen=True)
class Binning:
    """Bins of the tables (all configurable; validated on construction).

    Parameters
    ----------
    z_edges : sequence of float
        Redshift bin edges of the merger-rate tables, strictly increasing, >= 0 (and not
        above the cosmology's table range, default 30).
    log_mc_edges : sequence of float
        Edges in log10 of the source-frame chirp mass [Msun], strictly increasing.
    log_q_edges : sequence of float
        Edges in log10 of the mass ratio q = m2/m1 <= 1, strictly increasing, <= 0.
    log_mbh_edges : sequence of float
        Edges in log10 of the black-hole mass [Msun] for the mass function, strictly
        increasing.
    mass_function_z : sequence of float
        Redshifts (>= 0, no repeats) at which the mass function is tabulated; each uses the
        snapshot of the histories nearest in redshift.
    log_mhalo_edges : sequence of float
        Edges in log10 of the host halo mass [Msun] for the M_BH-M_halo relation, strictly
        increasing.
    log_edd_edges : sequence of float
        Edges in log10 of the Eddington ratio L/L_Edd, strictly increasing.
    eddington_z : sequence of float
        Redshifts (>= 0, no repeats) at which the Eddington-ratio distribution is tabulated
        (nearest snapshot of the histories, as for ``mass_function_z``).

    Raises
    ------
    ParameterError
        Message format ``"`z_edges` of Binning must be strictly increasing; got (0, 2, 1)"``.
    """

    z_edges: tuple = (0.0, 0.5, 1.0, 2.0, 3.0, 4.0, 6.0, 8.0, 10.0, 15.0, 20.0)
    log_mc_edges: tuple = _steps(2.0, 11.0, 1.0)
    log_q_edges: tuple = _steps(-6.0, 0.0, 0.5)
    log_mbh_edges: tuple = _steps(2.0, 11.0, 0.5)
    mass_function_z: tuple = (0.0, 1.0, 2.0, 4.0, 6.0)
    log_mhalo_edges: tuple = _steps(9.0, 15.0, 0.5)
    log_edd_edges: tuple = _steps(-6.0, 1.0, 0.25)
    eddington_z: tuple = (0.0, 1.0, 2.0, 4.0, 6.0)

    def __post_init__(self):
        checked = {
            "z_edges": _edges("z_edges", self.z_edges, lo=0.0),
            "log_mc_edges": _edges("log_mc_edges", self.log_mc_edges),
            "log_q_edges": _edges("log_q_edges", self.log_q_edges, hi=0.0),
            "log_mbh_edges": _edges("log_mbh_edges", self.log_mbh_edges),
            "mass_function_z": _points("mass_function_z", self.mass_function_z, lo=0.0),
            "log_mhalo_edges": _edges("log_mhalo_edges", self.log_mhalo_edges),
            "log_edd_edges": _edges("log_edd_edges", self.log_edd_edges),
            "eddington_z": _points("eddington_z", self.eddington_z, lo=0.0),
        }
        for k, v in checked.items():
            object.__setattr__(self, k, v)

    @classmethod
    def from_mapping(cls, mapping: dict, *, source: str = "[tables]") -> "Binning":
        """Binning from a plain mapping (e.g. a TOML table); unknown keys are errors.

        Parameters
        ----------
        mapping : dict
            Field name -> sequence of numbers; missing fields keep their defaults.
        source : str
            Where the mapping came from, for error messages (file and section).

        Raises
        ------
        BhgrowInputError
            For an unknown key (with a did-you-mean suggestion) or a bad value.
        """
        names = [f.name for f in fields(cls)]
        for key in mapping:
            if key not in names:
                hint = difflib.get_close_matches(str(key), names, n=1)
                extra = f" (did you mean `{hint[0]}`?)" if hint else ""
                raise BhgrowInputError(f"{source} unknown key `{key}`{extra}; allowed: "
                                       f"{', '.join(names)}", source=source, rule="unknown_key")
        return cls(**dict(mapping))

    def to_dict(self) -> dict:
        """Plain lists per field (for table headers and provenance)."""
        return {f.name: [float(v) for v in getattr(self, f.name)] for f in fields(self)}


# ------------------------------------------------------------------------------------------
# estimators
def weighted_percentile(x, w, p) -> np.ndarray:
    """Weighted percentiles by the inverted empirical distribution function.

    Parameters
    ----------
    x : array_like
        Values (finite).
    w : array_like
        Non-negative weights, same length as ``x``.
    p : float or array_like
        Percentile levels in [0, 100].

    Returns
    -------
    ndarray
        For each level, the smallest ``x`` whose cumulative weight fraction is >= p/100
        (Hyndman & Fan 1996, definition 1, with weights; the same as
        ``numpy.percentile(x, p, weights=w, method="inverted_cdf")``). NaN when ``x`` is
        empty or the weights sum to zero.
    """
    x = np.asarray(x, dtype=float)
    w = np.asarray(w, dtype=float)
    q = np.atleast_1d(np.asarray(p, dtype=float)) / 100.0
    if x.size == 0 or not np.sum(w) > 0:
        return np.full(q.shape, np.nan)
    order = np.argsort(x)
    xs = x[order]
    cdf = np.cumsum(w[order], dtype=np.float64)
    cdf /= cdf[-1]
    # leading zero weights must not be picked at p = 0 (as numpy does)
    cdf[cdf == 0] = -1.0
    # first i with cdf[i] >= q   (Hyndman & Fan 1996, definition 1)
    i = np.minimum(np.searchsorted(cdf, q, side="left"), xs.size - 1)
    return xs[i]


def _counts(x, w, edges):
    """Raw count, weighted count and its counting error sqrt(sum w^2) per bin."""
    e = np.asarray(edges, dtype=float)
    n = np.histogram(x, bins=e)[0]
    s = np.histogram(x, bins=e, weights=w)[0]
    # Poisson error of a weighted count: sqrt(sum w^2) (compound Poisson variance)
    s2 = np.histogram(x, bins=e, weights=w * w)[0]
    return n, s, np.sqrt(s2)


def _outside(x, edges) -> int:
    return int(np.count_nonzero(~((x >= edges[0]) & (x <= edges[-1]))))


def _log10(v) -> np.ndarray:
    v = np.asarray(v, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(v > 0, np.log10(np.where(v > 0, v, 1.0)), -np.inf)


# ------------------------------------------------------------------------------------------
# inputs
def _require(table, columns, source: str) -> None:
    names = table.colnames if hasattr(table, "colnames") else list(table)
    missing = [c for c in columns if c not in names]
    if missing:
        raise BhgrowInputError(f"{source}: missing column(s) {', '.join(missing)}",
                               source=source, rule="missing_columns")


def _weights(col, ids, source: str) -> np.ndarray:
    w = np.asarray(col, dtype=float)
    bad = ~(np.isfinite(w) & (w >= 0))
    if bad.any():
        rows = np.asarray(ids)[bad][:10].tolist()
        raise BhgrowInputError(
            f"{source}: weight_mpc3 is missing (NaN) or negative in {int(bad.sum())} rows "
            f"(first ids {rows}); the trees carried neither per-forest weights nor a box "
            f"size, so no table per comoving volume can be made", source=source,
            rule="no_volume", rows=rows)
    return w


def _strings(col) -> np.ndarray:
    """The column as a unicode array (no copy if it is one already: catalogues can be
    large)."""
    arr = np.asarray(col)
    return arr if arr.dtype.kind == "U" else arr.astype(str)


def _name_codes(col, names: list) -> np.ndarray:
    """Position in ``names`` of each row's string (int16); names not yet in the list are
    appended, sorted. ``names`` is extended in place."""
    arr = _strings(col)
    codes = np.full(arr.size, -1, dtype=np.int16)
    for k, name in enumerate(names):
        codes[arr == name] = k
    rest = codes < 0
    if rest.any():
        extra, inv = np.unique(arr[rest], return_inverse=True)
        codes[rest] = len(names) + inv
        names.extend(str(n) for n in extra)
    return codes


def history_redshifts(z_snap, binning: Binning) -> np.ndarray:
    """The snapshot redshifts (of ``z_snap``) whose history rows :func:`build_tables` uses:
    those nearest each redshift of ``binning.mass_function_z`` and ``eddington_z``."""
    z_snap = np.unique(np.asarray(z_snap, dtype=float))
    near = _nearest_snapshots(z_snap, list(binning.mass_function_z)
                              + list(binning.eddington_z))
    return np.unique([z for z in near if not math.isnan(z)])


def history_rows(histories, binning: Binning) -> dict:
    """The rows of histories on disk (:class:`bhgrow.output.OnDiskHistories`) that
    :func:`build_tables` uses: its columns at the snapshots of :func:`history_redshifts`
    (the tables are the same as from all rows)."""
    return histories.at_redshifts(history_redshifts(histories.snapshot_z(), binning),
                                  _HISTORY_COLUMNS)


def _nearest_snapshots(z_snap: np.ndarray, wanted) -> list:
    """For each wanted redshift, the nearest snapshot redshift (NaN when there is none)."""
    if z_snap.size == 0:
        return [math.nan for _ in wanted]
    return [float(z_snap[np.argmin(np.abs(z_snap - zw))]) for zw in wanted]


# ------------------------------------------------------------------------------------------
# table assembly
def _table(columns: list, description: str, meta: dict):
    """Astropy Table from (name, values, unit, description) with a description header."""
    from astropy.table import Table

    t = Table()
    for name, values, unit, text in columns:
        t[name] = np.asarray(values)
        if unit:
            t[name].unit = unit
        t[name].description = text
    t.meta.update(meta)
    t.meta["description"] = description
    return t


def _merger_rate_density(zm, lmc, wm, cosmo, b: Binning, meta: dict):
    ze = np.asarray(b.z_edges)
    me = np.asarray(b.log_mc_edges)
    n = np.histogram2d(zm, lmc, bins=[ze, me])[0]
    s = np.histogram2d(zm, lmc, bins=[ze, me], weights=wm)[0]
    s2 = np.histogram2d(zm, lmc, bins=[ze, me], weights=wm * wm)[0]
    # Delta t = t(z_lo) - t(z_hi), cosmic time of the run's cosmology (Hogg 1999, eq. 30)
    dt = np.asarray(cosmo.age_gyr(ze[:-1])) - np.asarray(cosmo.age_gyr(ze[1:]))
    rate = s / dt[:, None]
    err = np.sqrt(s2) / dt[:, None]
    nz, nm = ze.size - 1, me.size - 1
    out = int(np.count_nonzero(~((zm >= ze[0]) & (zm <= ze[-1]) & (lmc >= me[0])
                                 & (lmc <= me[-1]))))
    desc = (f"Comoving merger-rate density of black-hole coalescences in redshift x "
            f"log10(source-frame chirp mass) bins, from mergers.ecsv. Estimator: "
            f"R = sum_i w_i / (t(z_lo) - t(z_hi)) [Mpc^-3 Gyr^-1], w_i = weight_mpc3 of the "
            f"merger's forest, t(z) cosmic time of the {cosmo.name} cosmology (Hogg 1999). "
            f"Error: Poisson, sqrt(sum_i w_i^2) / (t(z_lo) - t(z_hi)). Bins [lo, hi), last "
            f"closed; {nz} x {nm} bins (z_edges, log_mc_edges in the header). "
            f"{out} of {zm.size} mergers fall outside the binning and are not counted.")
    cols = [
        ("z_lo", np.repeat(ze[:-1], nm), None, "lower redshift edge"),
        ("z_hi", np.repeat(ze[1:], nm), None, "upper redshift edge"),
        ("log_mc_lo", np.tile(me[:-1], nz), None,
         "lower edge, log10 source-frame chirp mass [Msun]"),
        ("log_mc_hi", np.tile(me[1:], nz), None,
         "upper edge, log10 source-frame chirp mass [Msun]"),
        ("n_mergers", n.ravel().astype(np.int64), None, "mergers in the bin (unweighted)"),
        ("dt_gyr", np.repeat(dt, nm), "Gyr", "cosmic time spanned by the redshift bin"),
        ("rate_mpc3_gyr", rate.ravel(), _RATE_UNIT, "comoving merger-rate density"),
        ("rate_mpc3_gyr_err", err.ravel(), _RATE_UNIT, "Poisson error, sqrt(sum w^2)/dt"),
    ]
    return _table(cols, desc, {**meta, "n_outside": out,
                               "z_edges": list(map(float, ze)),
                               "log_mc_edges": list(map(float, me))})


def _observed(zm, wm, ze, cosmo):
    """Observed rate per redshift bin and its Poisson error (bhgrow.gw)."""
    from .gw import observed_rate_per_yr

    per_bin, _total, err = observed_rate_per_yr(zm, wm, ze, cosmo, with_error=True)
    return np.asarray(per_bin, dtype=float), np.asarray(err, dtype=float)


def _observed_merger_rate(zm, wm, cosmo, b: Binning, meta: dict):
    ze = np.asarray(b.z_edges)
    n, s, e = _counts(zm, wm, ze)
    dt = np.asarray(cosmo.age_gyr(ze[:-1])) - np.asarray(cosmo.age_gyr(ze[1:]))
    per_bin, err = _observed(zm, wm, ze, cosmo)
    cum = np.cumsum(per_bin)
    # independent bins: errors add in quadrature
    cum_err = np.sqrt(np.cumsum(err * err))
    out = _outside(zm, ze)
    desc = (f"Observed merger rate over the full sky, dN/dt_obs = int R(z)/(1+z) dV_c/dz dz "
            f"[yr^-1] per redshift bin (bhgrow.gw.observed_rate_per_yr), with R(z) the "
            f"comoving merger-rate density from mergers.ecsv (sum of weight_mpc3 over the "
            f"bin's cosmic time), dV_c/dz the full-sky comoving volume element of the "
            f"{cosmo.name} cosmology (Hogg 1999, eq. 28 times 4 pi) and 1/(1+z) the cosmological "
            f"time dilation; R is constant within a bin; all chirp masses. cumulative_per_yr: "
            f"running sum from z = {ze[0]:g} to z_hi. Errors: Poisson, sqrt(sum w^2)/dt times "
            f"the same volume integral per bin, added in quadrature for the cumulative "
            f"column. Bins [lo, hi), last closed; {out} of {zm.size} mergers lie outside z_edges and are not counted.")
    cols = [
        ("z_lo", ze[:-1], None, "lower redshift edge"),
        ("z_hi", ze[1:], None, "upper redshift edge"),
        ("n_mergers", n.astype(np.int64), None, "mergers in the bin (unweighted)"),
        ("rate_density_mpc3_gyr", s / dt, _RATE_UNIT,
         "comoving merger-rate density R, all chirp masses"),
        ("rate_density_mpc3_gyr_err", e / dt, _RATE_UNIT, "Poisson error of R"),
        ("rate_per_yr", per_bin, "yr-1", "observed merger rate from the bin, full sky"),
        ("rate_per_yr_err", err, "yr-1", "Poisson error of rate_per_yr"),
        ("cumulative_per_yr", cum, "yr-1", "observed rate from z_edges[0] to z_hi"),
        ("cumulative_per_yr_err", cum_err, "yr-1", "Poisson error of cumulative_per_yr"),
    ]
    return _table(cols, desc, {**meta, "n_outside": out, "z_edges": list(map(float, ze))})


def _distribution(x, zm, wm, edges, cosmo, b: Binning, meta: dict, *, what: str,
                  lo_name: str, hi_name: str, edge_text: str, edges_key: str):
    """Comoving number of mergers per dex of x and the observed rate per dex."""
    ze = np.asarray(b.z_edges)
    e = np.asarray(edges)
    inz = (zm >= ze[0]) & (zm <= ze[-1])
    n, s, err = _counts(x[inz], wm[inz], e)
    width = np.diff(e)
    # observed rate per bin of x: the same integral on the mergers of that bin
    k = np.searchsorted(e, x, side="right") - 1
    k[x == e[-1]] = e.size - 2
    obs = np.zeros(e.size - 1)
    obs_err = np.zeros(e.size - 1)
    for j in range(e.size - 1):   # loop over bins (a handful), not over objects
        sel = inz & (k == j)
        if sel.any():
            per_bin, per_err = _observed(zm[sel], wm[sel], ze, cosmo)
            obs[j] = per_bin.sum()
            obs_err[j] = math.sqrt(float(np.sum(per_err**2)))
    out = _outside(x[inz], e)
    desc = (f"{what.capitalize()} distribution of black-hole coalescences with "
            f"{ze[0]:g} <= z <= {ze[-1]:g}, from mergers.ecsv. density_mpc3_dex = sum_i w_i / "
            f"width [Mpc^-3 dex^-1]: comoving number of coalescences over that redshift range "
            f"per dex of {what}; obs_rate_per_yr_dex: observed full-sky rate "
            f"int R(z)/(1+z) dV_c/dz dz of the mergers in the bin (bhgrow.gw."
            f"observed_rate_per_yr over z_edges) per dex [yr^-1 dex^-1]; {cosmo.name} "
            f"cosmology. Errors: Poisson, sqrt(sum_i w_i^2) / width (scaled alike for the "
            f"observed rate). Bins [lo, hi), last closed ({edges_key} in the header); "
            f"{out} of {int(inz.sum())} mergers in the redshift range fall outside and are "
            f"not counted.")
    cols = [
        (lo_name, e[:-1], None, f"lower edge, {edge_text}"),
        (hi_name, e[1:], None, f"upper edge, {edge_text}"),
        ("n_mergers", n.astype(np.int64), None, "mergers in the bin (unweighted)"),
        ("density_mpc3_dex", s / width, _DEX_UNIT, "comoving number of coalescences per dex"),
        ("density_mpc3_dex_err", err / width, _DEX_UNIT, "Poisson error"),
        ("obs_rate_per_yr_dex", obs / width, "yr-1 dex-1",
         "observed full-sky merger rate per dex"),
        ("obs_rate_per_yr_dex_err", obs_err / width, "yr-1 dex-1", "Poisson error"),
    ]
    return _table(cols, desc, {**meta, "n_outside": out, edges_key: list(map(float, e)),
                               "z_edges": list(map(float, ze))})


def _snapshot_tables(hz, values, wh, wanted, edges, *, fraction: bool):
    """Rows of per-snapshot densities per dex: one block of bins per wanted redshift."""
    e = np.asarray(edges)
    width = np.diff(e)
    snaps = np.unique(hz)
    rows = {k: [] for k in ("z", "z_snapshot", "lo", "hi", "n", "phi", "err", "frac",
                            "frac_err")}
    notes = []
    for zw, zs in zip(wanted, _nearest_snapshots(snaps, wanted)):  # a few redshifts
        sel = np.flatnonzero(hz == zs)     # gathered once: v and w are used again below
        v, w = values[sel], wh[sel]
        n, s, err = _counts(v, w, e)
        total = float(w.sum())
        rows["z"].append(np.full(width.size, zw))
        rows["z_snapshot"].append(np.full(width.size, zs))
        rows["lo"].append(e[:-1])
        rows["hi"].append(e[1:])
        rows["n"].append(n.astype(np.int64))
        rows["phi"].append(s / width)
        rows["err"].append(err / width)
        rows["frac"].append(s / total if total > 0 else np.zeros(width.size))
        rows["frac_err"].append(err / total if total > 0 else np.zeros(width.size))
        off = ~((v >= e[0]) & (v <= e[-1]))
        n_out = int(off.sum())
        w_out = float(w[off].sum())
        notes.append(f"z = {zw:g} (snapshot z = {zs:.4g}): {sel.size} black holes, "
                     f"{n_out} outside the bins ({w_out:.4g} Mpc^-3)")
    rows = {k: np.concatenate(v) if v else np.zeros(0) for k, v in rows.items()}
    if not fraction:
        rows.pop("frac")
        rows.pop("frac_err")
    return rows, notes


def _bh_mass_function(hz, hm, wh, b: Binning, meta: dict):
    rows, notes = _snapshot_tables(hz, _log10(hm), wh, b.mass_function_z, b.log_mbh_edges,
                                   fraction=False)
    desc = ("Black-hole mass function phi = sum_i w_i / dlog10 M [Mpc^-3 dex^-1] at chosen "
            "redshifts, from histories.h5 at the snapshot nearest each redshift (every black "
            "hole recorded there: central and sinking), each counted with the weight_mpc3 of "
            "its forest (black_holes.ecsv, via bh_id). Error: Poisson, sqrt(sum w^2)/dlog10 M. "
            "Bins [lo, hi), last closed (log_mbh_edges in the header). " + "; ".join(notes)
            + ".")
    cols = [
        ("z", rows["z"], None, "requested redshift"),
        ("z_snapshot", rows["z_snapshot"], None, "redshift of the snapshot used"),
        ("log_m_lo", rows["lo"], None, "lower edge, log10 black-hole mass [Msun]"),
        ("log_m_hi", rows["hi"], None, "upper edge, log10 black-hole mass [Msun]"),
        ("n_black_holes", rows["n"], None, "black holes in the bin (unweighted)"),
        ("phi_mpc3_dex", rows["phi"], _DEX_UNIT, "comoving number density per dex"),
        ("phi_mpc3_dex_err", rows["err"], _DEX_UNIT, "Poisson error"),
    ]
    return _table(cols, desc, {**meta, "log_mbh_edges": list(b.log_mbh_edges),
                               "mass_function_z": list(b.mass_function_z)})


def _eddington(hz, he, wh, b: Binning, meta: dict):
    rows, notes = _snapshot_tables(hz, _log10(he), wh, b.eddington_z, b.log_edd_edges,
                                   fraction=True)
    desc = ("Eddington-ratio distribution phi = sum_i w_i / dlog10 lambda [Mpc^-3 dex^-1], "
            "lambda = L/L_Edd from the mean accretion rate over the interval before the "
            "snapshot, from histories.h5 at the snapshot nearest each chosen redshift (every "
            "black hole recorded there), weights weight_mpc3 from black_holes.ecsv. fraction: "
            "share of the weighted population at that snapshot in the bin (black holes with "
            "lambda = 0 or outside the bins make up the rest). Error: Poisson, "
            "sqrt(sum w^2)/dlog10 lambda (and /sum w for the fraction). Bins [lo, hi), last "
            "closed (log_edd_edges in the header). " + "; ".join(notes) + ".")
    cols = [
        ("z", rows["z"], None, "requested redshift"),
        ("z_snapshot", rows["z_snapshot"], None, "redshift of the snapshot used"),
        ("log_edd_lo", rows["lo"], None, "lower edge, log10 Eddington ratio"),
        ("log_edd_hi", rows["hi"], None, "upper edge, log10 Eddington ratio"),
        ("n_black_holes", rows["n"], None, "black holes in the bin (unweighted)"),
        ("phi_mpc3_dex", rows["phi"], _DEX_UNIT, "comoving number density per dex"),
        ("phi_mpc3_dex_err", rows["err"], _DEX_UNIT, "Poisson error"),
        ("fraction", rows["frac"], None, "weighted share of all black holes at the snapshot"),
        ("fraction_err", rows["frac_err"], None, "Poisson error of the bin over the total"),
    ]
    return _table(cols, desc, {**meta, "log_edd_edges": list(b.log_edd_edges),
                               "eddington_z": list(b.eddington_z)})


def _mbh_mhalo(bh, wb, b: Binning, meta: dict):
    central = _strings(bh["status"]) == "central"
    x = _log10(bh["host_mass_msun"])[central]
    y = _log10(bh["final_mass_msun"])[central]
    w = wb[central]
    z_end = float(np.min(np.asarray(bh["final_z"], float)[central])) if central.any() \
        else math.nan
    e = np.asarray(b.log_mhalo_edges)
    width = np.diff(e)
    n, s, err = _counts(x, w, e)
    k = np.searchsorted(e, x, side="right") - 1
    k[x == e[-1]] = e.size - 2
    pct = np.full((e.size - 1, len(PERCENTILES)), np.nan)
    n_eff = np.zeros(e.size - 1)
    for j in range(e.size - 1):   # loop over halo-mass bins (a handful), not over halos
        sel = k == j
        if sel.any():
            pct[j] = weighted_percentile(y[sel], w[sel], PERCENTILES)
            ws = w[sel]
            # effective number of a weighted sample, (sum w)^2 / sum w^2 (Kish 1965, memory)
            n_eff[j] = ws.sum() ** 2 / np.sum(ws * ws) if np.sum(ws * ws) > 0 else 0.0
    sigma = 0.5 * (pct[:, 2] - pct[:, 0])
    # standard error of a median, sqrt(pi/2) sigma / sqrt(n) for a normal parent
    # (asymptotic variance 1/(4 n f(m)^2); Kendall & Stuart 1977, vol. 1, memory)
    med_err = np.divide(math.sqrt(math.pi / 2.0) * sigma, np.sqrt(n_eff),
                        out=np.full(e.size - 1, np.nan), where=n_eff > 0)
    out = _outside(x, e)
    desc = (f"M_BH-M_halo relation of central black holes at the final snapshot (z = "
            f"{z_end:.4g}), from black_holes.ecsv (status central; final_mass_msun against "
            f"host_mass_msun). Per log10 M_halo bin: weighted 16th, 50th and 84th percentiles "
            f"of log10 M_BH (inverted empirical CDF with weights weight_mpc3, Hyndman & Fan "
            f"1996 def. 1), density of such halos per dex with Poisson error "
            f"sqrt(sum w^2)/width, and the median's error sqrt(pi/2) (p84 - p16)/2 / "
            f"sqrt(n_eff), n_eff = (sum w)^2/sum w^2 (normal-parent approximation). Bins "
            f"[lo, hi), last closed (log_mhalo_edges in the header); {out} of {x.size} "
            f"central black holes fall outside.")
    cols = [
        ("log_mhalo_lo", e[:-1], None, "lower edge, log10 host halo mass [Msun]"),
        ("log_mhalo_hi", e[1:], None, "upper edge, log10 host halo mass [Msun]"),
        ("n_black_holes", n.astype(np.int64), None, "central black holes (unweighted)"),
        ("n_eff", n_eff, None, "effective sample size (sum w)^2 / sum w^2"),
        ("density_mpc3_dex", s / width, _DEX_UNIT,
         "comoving density of halos with a central black hole, per dex of halo mass"),
        ("density_mpc3_dex_err", err / width, _DEX_UNIT, "Poisson error"),
        ("p16_log_mbh", pct[:, 0], None, "16th percentile of log10 M_BH [Msun]"),
        ("median_log_mbh", pct[:, 1], None, "median of log10 M_BH [Msun]"),
        ("p84_log_mbh", pct[:, 2], None, "84th percentile of log10 M_BH [Msun]"),
        ("median_log_mbh_err", med_err, None, "standard error of the median (dex)"),
    ]
    return _table(cols, desc, {**meta, "z": z_end,
                               "log_mhalo_edges": list(b.log_mhalo_edges)})


def _seed_channels(bh, wb, mergers, wm, meta: dict):
    from .physics.seeding import CHANNEL_CODES

    live = np.isin(_strings(bh["status"]), _LIVE)
    mass = np.asarray(bh["final_mass_msun"], dtype=float)
    # channels as small codes (bhgrow's own first, then any other names of a foreign
    # catalogue, sorted), so no string column of every row is held through the loop
    names = list(CHANNEL_CODES)
    chan = _name_codes(bh["seed_channel"], names)
    # (names found only among the mergers get codes past the table's rows, as before)
    c1 = _name_codes(mergers["seed_channel_1"], list(names))
    c2 = _name_codes(mergers["seed_channel_2"], list(names))
    z_end = float(np.min(np.asarray(bh["final_z"], float)[live])) if live.any() else math.nan
    rows = []
    for k, name in enumerate(names + ["all"]):   # loop over channels (a handful)
        sel = np.ones(chan.size, bool) if name == "all" else chan == k
        msel = np.ones(c1.size, bool) if name == "all" else (c1 == k) | (c2 == k)
        ls = sel & live
        rows.append((
            name, int(sel.sum()), wb[sel].sum(), math.sqrt(np.sum(wb[sel] ** 2)),
            int(ls.sum()), wb[ls].sum(), math.sqrt(np.sum(wb[ls] ** 2)),
            np.sum(wb[ls] * mass[ls]), math.sqrt(np.sum((wb[ls] * mass[ls]) ** 2)),
            int(msel.sum()), wm[msel].sum(), math.sqrt(np.sum(wm[msel] ** 2)),
        ))
    r = list(zip(*rows))
    desc = (f"Seed-channel breakdown from black_holes.ecsv and mergers.ecsv. Per channel: "
            f"black holes seeded and their comoving number density (sum of weight_mpc3); "
            f"those present in a galaxy at the final snapshot z = {z_end:.4g} (status central "
            f"or sinking; merged, ejected and host-ended ones excluded) with their number "
            f"density and mass density sum w M (a remnant keeps the channel of its primary); "
            f"coalescences with at least one black hole of the channel and their comoving "
            f"number density. Row 'all' sums every channel (a merger counts once). Errors: "
            f"Poisson, sqrt(sum w^2) (sqrt(sum (w M)^2) for the mass density).")
    cols = [
        ("channel", np.asarray(r[0], dtype=str), None, "seed channel"),
        ("n_seeded", np.asarray(r[1], np.int64), None, "black holes seeded (unweighted)"),
        ("seeded_density_mpc3", np.asarray(r[2]), "Mpc-3",
         "comoving number density of black holes seeded"),
        ("seeded_density_mpc3_err", np.asarray(r[3]), "Mpc-3", "Poisson error"),
        ("n_final", np.asarray(r[4], np.int64), None,
         "black holes in galaxies at the final snapshot (unweighted)"),
        ("number_density_mpc3", np.asarray(r[5]), "Mpc-3",
         "comoving number density at the final snapshot"),
        ("number_density_mpc3_err", np.asarray(r[6]), "Mpc-3", "Poisson error"),
        ("mass_density_msun_mpc3", np.asarray(r[7]), "solMass Mpc-3",
         "comoving black-hole mass density at the final snapshot"),
        ("mass_density_msun_mpc3_err", np.asarray(r[8]), "solMass Mpc-3", "Poisson error"),
        ("n_mergers", np.asarray(r[9], np.int64), None,
         "coalescences involving the channel (unweighted)"),
        ("merger_density_mpc3", np.asarray(r[10]), "Mpc-3",
         "comoving number density of those coalescences"),
        ("merger_density_mpc3_err", np.asarray(r[11]), "Mpc-3", "Poisson error"),
    ]
    return _table(cols, desc, {**meta, "z": z_end})


def build_tables(black_holes, mergers, histories, cosmo=None, binning: Binning | None = None,
                 meta: dict | None = None) -> dict:
    """All tables of a run, as astropy Tables with units and a description.

    Parameters
    ----------
    black_holes : astropy.table.Table
        One row per black hole (``black_holes.ecsv`` columns; needs ``bh_id``,
        ``seed_channel``, ``final_mass_msun``, ``status``, ``final_z``, ``host_mass_msun``,
        ``weight_mpc3``).
    mergers : astropy.table.Table
        One row per coalescence (``mergers.ecsv``; needs ``z``, ``q``, ``chirp_mass_msun``,
        ``weight_mpc3``, ``seed_channel_1``, ``seed_channel_2``).
    histories : dict of arrays or None
        Per-black-hole histories (``bh_id``, ``z``, ``mass_msun``, ``eddington_ratio``).
        None (a run without histories) leaves out ``bh_mass_function`` and
        ``eddington_ratio_distribution``.
    cosmo : bhgrow.Cosmology, optional
        Cosmology of the run (cosmic time, volume element). Default Planck18.
    binning : Binning, optional
        Bins; default :class:`Binning()`.
    meta : dict, optional
        Added to every table's header (e.g. run directory, seed).

    Returns
    -------
    dict of str -> astropy.table.Table
        Keyed by the names in :data:`TABLE_NAMES` (in that order). Every table's ``meta``
        holds ``description`` (inputs, estimator, units, binning), ``made_by``,
        ``cosmology`` and the bin edges it used; each column has a unit (if any) and a
        description.

    Raises
    ------
    BhgrowInputError
        For missing columns, missing or negative ``weight_mpc3`` (trees without a volume
        normalisation), black holes in the histories absent from ``black_holes``, or
        redshift edges beyond the cosmology's table range.
    """
    from .cosmology import Cosmology

    b = binning if binning is not None else Binning()
    if not isinstance(b, Binning):
        raise BhgrowInputError(f"binning must be a bhgrow.tables.Binning; got "
                               f"{type(b).__name__}", source="tables", rule="binning")
    cosmo = cosmo if cosmo is not None else Cosmology()
    if b.z_edges[-1] > cosmo.z_max:
        raise BhgrowInputError(f"`z_edges` of Binning reach z = {b.z_edges[-1]:g}, beyond the "
                               f"cosmology table range z <= {cosmo.z_max:g}",
                               source=_OWNER, rule="z_edges")
    _require(black_holes, _BH_COLUMNS, "black_holes")
    _require(mergers, _MERGER_COLUMNS, "mergers")
    wb = _weights(black_holes["weight_mpc3"], black_holes["bh_id"], "black_holes")
    mid = np.arange(len(mergers))
    wm = _weights(mergers["weight_mpc3"], mid, "mergers")
    zm = np.asarray(mergers["z"], dtype=float)
    lmc = _log10(mergers["chirp_mass_msun"])
    lq = _log10(mergers["q"])
    base = {"made_by": f"bhgrow {__version__} (bhgrow.tables)", "cosmology": cosmo.name}
    base.update(meta or {})

    out = {
        "merger_rate_density": _merger_rate_density(zm, lmc, wm, cosmo, b, base),
        "observed_merger_rate": _observed_merger_rate(zm, wm, cosmo, b, base),
        "chirp_mass_distribution": _distribution(
            lmc, zm, wm, b.log_mc_edges, cosmo, b, base, what="source-frame chirp mass",
            lo_name="log_mc_lo", hi_name="log_mc_hi",
            edge_text="log10 source-frame chirp mass [Msun]", edges_key="log_mc_edges"),
        "mass_ratio_distribution": _distribution(
            lq, zm, wm, b.log_q_edges, cosmo, b, base, what="mass ratio q = m2/m1",
            lo_name="log_q_lo", hi_name="log_q_hi", edge_text="log10 q",
            edges_key="log_q_edges"),
    }
    if histories is not None:
        _require(histories, _HISTORY_COLUMNS, "histories")
        hid = np.asarray(histories["bh_id"])
        ids = np.asarray(black_holes["bh_id"])
        order = np.argsort(ids, kind="stable")
        pos = np.searchsorted(ids[order], hid)
        pos_c = np.minimum(pos, max(ids.size - 1, 0))
        found = (pos < ids.size) & (ids[order][pos_c] == hid) if ids.size else \
            np.zeros(hid.size, bool)
        if not found.all():
            miss = np.unique(hid[~found])[:10].tolist()
            raise BhgrowInputError(f"histories: {int((~found).sum())} rows belong to black "
                                   f"holes missing from black_holes (first ids {miss})",
                                   source="histories", rule="unknown_bh_id", rows=miss)
        wh = wb[order][pos_c] if ids.size else np.zeros(0)
        hz = np.asarray(histories["z"], dtype=float)
        out["bh_mass_function"] = _bh_mass_function(
            hz, np.asarray(histories["mass_msun"], float), wh, b, base)
    out["mbh_mhalo"] = _mbh_mhalo(black_holes, wb, b, base)
    if histories is not None:
        out["eddington_ratio_distribution"] = _eddington(
            hz, np.asarray(histories["eddington_ratio"], float), wh, b, base)
    out["seed_channels"] = _seed_channels(black_holes, wb, mergers, wm, base)
    return out


# ------------------------------------------------------------------------------------------
# files
def write_tables(tables: dict, directory) -> list:
    """Write each table as comma-delimited ECSV ``<directory>/<name>.ecsv``, atomically.

    Every file is written to a temporary name in ``directory`` first; only when all are
    complete are they renamed into place (``os.replace``), so a failure leaves the previous
    tables untouched. ``directory`` is created if missing (its parent must exist).

    Parameters
    ----------
    tables : dict of str -> astropy.table.Table
        E.g. the result of :func:`build_tables`.
    directory : str or Path

    Returns
    -------
    list of Path
        The files written, in the order of ``tables``.
    """
    from .output import write_ecsv

    directory = Path(directory)
    if not directory.parent.exists():
        raise BhgrowInputError(f"{directory}: parent directory {directory.parent} does not "
                               f"exist", source=str(directory), rule="no_dir")
    for name in tables:
        if not name or Path(name).name != name or name.startswith("."):
            raise BhgrowInputError(f"table name {name!r} is not a plain file stem",
                                   source="tables", rule="bad_name")
    directory.mkdir(exist_ok=True)
    staged = []
    try:
        for name, table in tables.items():
            tmp = directory / f".{name}.ecsv.tmp-{os.getpid()}"
            staged.append((tmp, directory / f"{name}.ecsv"))
            write_ecsv(table, tmp)
        for tmp, final in staged:
            os.replace(tmp, final)
    except BaseException:
        for tmp, _ in staged:
            tmp.unlink(missing_ok=True)
        raise
    return [final for _, final in staged]


def _read_ecsv(path: Path, columns) -> object:
    from astropy.table import Table

    if not path.is_file():
        raise BhgrowInputError(f"{path}: missing from the run directory", source=str(path),
                               rule="no_file")
    try:
        table = Table.read(path, format="ascii.ecsv")
    except Exception as exc:   # astropy raises several types for malformed files
        raise BhgrowInputError(f"{path}: not a readable ECSV table ({exc})", source=str(path),
                               rule="bad_file") from None
    _require(table, columns, str(path))
    return table


def _read_histories(path: Path, binning: Binning) -> dict:
    """The rows of ``histories.h5`` that :func:`build_tables` uses (the snapshots nearest the
    binning's redshifts), read in blocks."""
    from .output import HistoryFile

    return history_rows(HistoryFile(path, required=_HISTORY_COLUMNS), binning)


def tables_from_run(run_dir, binning: Binning | None = None) -> dict:
    """Rebuild all tables from a finished run directory (no rerun of the model).

    Reads ``black_holes.ecsv``, ``mergers.ecsv``, ``histories.h5`` (optional only when the
    run's config says ``histories = false``), the cosmology name from ``config.toml``
    (``[run] cosmology``; ``run.json`` when there is no config) and the seed from
    ``run.json``. This is what ``bhgrow tables RUN_DIR`` does before :func:`write_tables`.

    Parameters
    ----------
    run_dir : str or Path
        A directory written by ``bhgrow run``.
    binning : Binning, optional
        Bins; default :class:`Binning()`.

    Returns
    -------
    dict of str -> astropy.table.Table
        As :func:`build_tables`.

    Raises
    ------
    BhgrowInputError
        Naming the file, when the directory or a needed file is missing or unreadable.
    """
    from .config import load_config
    from .cosmology import Cosmology

    run_dir = Path(run_dir)
    if not run_dir.is_dir():
        raise BhgrowInputError(f"{run_dir}: no such run directory", source=str(run_dir),
                               rule="no_dir")
    provenance = {}
    run_json = run_dir / "run.json"
    if run_json.is_file():
        try:
            provenance = json.loads(run_json.read_text(encoding="utf-8"))
        except (json.JSONDecodeError, UnicodeDecodeError, OSError) as exc:
            raise BhgrowInputError(f"{run_json}: not readable JSON ({exc})",
                                   source=str(run_json), rule="bad_file") from None
    cfg_path = run_dir / "config.toml"
    config = load_config(cfg_path) if cfg_path.is_file() else None
    if config is not None:
        cosmo_name = config.run.cosmology
    elif isinstance(provenance.get("cosmology"), dict) and provenance["cosmology"].get("name"):
        cosmo_name = provenance["cosmology"]["name"]
    else:
        raise BhgrowInputError(f"{cfg_path}: missing from the run directory (and {run_json} "
                               f"names no cosmology), so the run's cosmology is unknown",
                               source=str(cfg_path), rule="no_file")
    cosmo = Cosmology.from_name(cosmo_name)
    black_holes = _read_ecsv(run_dir / "black_holes.ecsv", _BH_COLUMNS)
    mergers = _read_ecsv(run_dir / "mergers.ecsv", _MERGER_COLUMNS)
    hist_path = run_dir / "histories.h5"
    if hist_path.is_file():
        histories = _read_histories(hist_path, binning or Binning())
    elif config is not None and not config.run.histories:
        histories = None
    else:
        raise BhgrowInputError(f"{hist_path}: missing from the run directory (the run's "
                               f"config asks for histories)", source=str(hist_path),
                               rule="no_file")
    meta = {"run_dir": str(run_dir.resolve()), "seed": provenance.get("seed"),
            "run_bhgrow_version": provenance.get("bhgrow_version")}
    return build_tables(black_holes, mergers, histories, cosmo, binning, meta=meta)
