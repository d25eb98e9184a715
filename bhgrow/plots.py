"""Figures (matplotlib, PNG): one function per figure, each writing one file.

Every function takes plain tables/arrays (units in the column names) and a path, draws on a
fresh figure with labelled axes and units, saves atomically and closes the figure. The
non-interactive Agg backend is used, so no display is needed.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

#: PNG resolution; 150 dpi at 6.4 x 4.4 in stays readable in print
DPI = 150
_FIGSIZE = (6.4, 4.4)
NANOGRAV_HC_1YR = 2.4e-15   # NANOGrav 15-yr (Agazie et al. 2023, ApJL 951, L8), memory


def _plt():
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    plt.rcParams.update({"font.size": 11, "axes.labelsize": 12, "legend.fontsize": 9,
                         "axes.grid": True, "grid.alpha": 0.3})
    return plt


def preload() -> None:
    """Import matplotlib (Agg) with bhgrow's settings now (~0.4 s): in a process that will
    fork the ones drawing figures, which then inherit it instead of importing it each."""
    _plt()


def _subplots():
    """A fresh figure and axes, made at the saving resolution :data:`DPI`.

    At the saving dpi, the layout pass (``tight_layout``) and ``savefig`` draw with one
    renderer, so every label is measured and mathtext-parsed once, not once per dpi (the
    text caches are keyed by renderer and dpi); the PNG is the same size.
    """
    return _plt().subplots(figsize=_FIGSIZE, dpi=DPI)


#: (renderer class, its mathtext parser) shared by the figures of this process
_MATHTEXT: list = []
if hasattr(os, "register_at_fork"):
    # a parser holds FreeType fonts, whose open files a forked process would share with
    # this one (their read offsets too: drawing in both at once garbles glyphs, "too many
    # hints"); matplotlib empties its own font cache in a forked child for the same reason
    os.register_at_fork(after_in_child=_MATHTEXT.clear)


def _shared_mathtext(fig) -> None:
    """Let the figure's renderer use one mathtext parser shared by every figure.

    Each Agg renderer has its own parser, whose cache of parsed strings dies with it, and
    parsing (pyparsing) is a large part of drawing a figure; the log-axis tick labels
    (``$\\mathdefault{10^{-4}}$``) and axis labels recur from figure to figure. A parse
    depends only on the string, dpi, font and flags (the cache key), so sharing it changes
    no pixel.
    """
    renderer = fig.canvas.get_renderer()
    parser = getattr(renderer, "mathtext_parser", None)
    if parser is None:
        return
    for kind, shared in _MATHTEXT:     # the first parser of this kind of renderer
        if kind is type(renderer):
            renderer.mathtext_parser = shared
            return
    _MATHTEXT.append((type(renderer), parser))


def _save(fig, path) -> Path:
    path = Path(path)
    tmp = path.with_name(f".{path.stem}.tmp-{os.getpid()}.png")
    _shared_mathtext(fig)
    fig.tight_layout()
    fig.savefig(tmp, dpi=DPI)
    os.replace(tmp, path)
    import matplotlib.pyplot as plt

    plt.close(fig)
    return path


#: black holes in the mass-history figure
N_HISTORIES = 24


def mass_histories(hist: dict, path, *, n: int = N_HISTORIES, seed_channels: dict | None = None,
                   title: str = "") -> Path:
    """Mass against redshift for up to ``n`` black holes (the most massive at the end)."""
    fig, ax = _subplots()
    ids = np.asarray(hist["bh_id"])
    if ids.size:
        uniq, start = np.unique(ids, return_index=True)
        stop = np.r_[start[1:], ids.size]
        last_mass = np.asarray(hist["mass_msun"])[stop - 1]
        pick = np.argsort(last_mass)[::-1][:n]
        colors = {"light": "C0", "heavy": "C3", "halo_mass": "C2", "dense_gas": "C4"}
        seen = set()
        for j in pick:
            sl = slice(start[j], stop[j])
            ch = (seed_channels or {}).get(int(uniq[j]), "")
            label = ch if ch and ch not in seen else None
            seen.add(ch)
            ax.plot(1 + np.asarray(hist["z"])[sl], np.asarray(hist["mass_msun"])[sl],
                    color=colors.get(ch, "0.4"), lw=1, alpha=0.8, label=label)
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.invert_xaxis()
        if seen - {""}:
            ax.legend(title="seed channel")
    ax.set_xlabel("1 + z")
    ax.set_ylabel(r"black-hole mass [M$_\odot$]")
    ax.set_title(title or f"mass histories of the {n} most massive black holes")
    return _save(fig, path)


def merger_rate_vs_z(z_lo, z_hi, rates: dict, path, *, ylabel: str, title: str = "") -> Path:
    """Step plot of rates per redshift bin, one line per label in ``rates``."""
    fig, ax = _subplots()
    edges = np.r_[np.asarray(z_lo), np.asarray(z_hi)[-1:]]
    lowest = np.inf
    for k, (label, (val, err)) in enumerate(rates.items()):
        val = np.asarray(val, dtype=float)
        ax.stairs(np.where(val > 0, val, np.nan), edges, label=label, color=f"C{k}", lw=1.5)
        mid = 0.5 * (np.asarray(z_lo) + np.asarray(z_hi))
        ok = val > 0
        if ok.any():
            lowest = min(lowest, float(val[ok].min()))
            err = np.asarray(err, dtype=float)[ok]
            # log axis: draw the lower bar to at most 90% below the value
            ax.errorbar(mid[ok], val[ok], yerr=[np.minimum(err, 0.9 * val[ok]), err],
                        fmt="none", color=f"C{k}", lw=0.8)
    ax.set_yscale("log")
    if np.isfinite(lowest):
        ax.set_ylim(bottom=lowest / 10)
    ax.set_xlabel("redshift z")
    ax.set_ylabel(ylabel)
    ax.legend()
    ax.set_title(title)
    return _save(fig, path)


def histogram(lo, hi, values: dict, path, *, xlabel: str, ylabel: str, logy: bool = True,
              title: str = "", vline: float | None = None, vlabel: str = "") -> Path:
    """Step histogram(s) from bin edges and per-bin values (one line per label)."""
    fig, ax = _subplots()
    edges = np.r_[np.asarray(lo), np.asarray(hi)[-1:]]
    for k, (label, val) in enumerate(values.items()):
        val = np.asarray(val, dtype=float)
        ax.stairs(np.where(val > 0, val, np.nan) if logy else val, edges, label=label,
                  color=f"C{k}", lw=1.5)
    if vline is not None:
        ax.axvline(vline, color="k", ls="--", lw=1, label=vlabel or None)
    if logy:
        ax.set_yscale("log")
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    if len(values) > 1 or vline is not None:
        ax.legend()
    ax.set_title(title)
    return _save(fig, path)


def mass_function(curves: dict, path, *, title: str = "") -> Path:
    """Black-hole mass function: ``curves[label] = (log_m_mid, phi, err)``."""
    fig, ax = _subplots()
    for k, (label, (x, phi, err)) in enumerate(curves.items()):
        phi = np.asarray(phi, dtype=float)
        ok = phi > 0
        ax.errorbar(np.asarray(x)[ok], phi[ok], yerr=np.asarray(err)[ok], color=f"C{k}",
                    marker="o", ms=3, lw=1.2, label=label)
    ax.set_yscale("log")
    ax.set_xlabel(r"log$_{10}$ M$_{\rm BH}$ [M$_\odot$]")
    ax.set_ylabel(r"$\Phi$ [Mpc$^{-3}$ dex$^{-1}$]")
    ax.legend()
    ax.set_title(title or "black-hole mass function")
    return _save(fig, path)


def mbh_mhalo(x, median, p16, p84, path, *, title: str = "") -> Path:
    """Median and 16/84 percentiles of log M_BH against log M_halo."""
    fig, ax = _subplots()
    x, med = np.asarray(x, dtype=float), np.asarray(median, dtype=float)
    ok = np.isfinite(med)
    ax.fill_between(x[ok], np.asarray(p16)[ok], np.asarray(p84)[ok], alpha=0.3, color="C0",
                    label="16-84%")
    ax.plot(x[ok], med[ok], "o-", color="C0", label="median")
    ax.set_xlabel(r"log$_{10}$ M$_{\rm halo}$ [M$_\odot$]")
    ax.set_ylabel(r"log$_{10}$ M$_{\rm BH}$ [M$_\odot$]")
    ax.legend()
    ax.set_title(title or "central black holes at the final snapshot")
    return _save(fig, path)


def gw_background(f_hz, h_c, path, *, title: str = "", others: dict | None = None) -> Path:
    """Characteristic strain of the nHz background with the 2023 PTA amplitude marked."""
    fig, ax = _subplots()
    ax.loglog(f_hz, h_c, color="C0", lw=1.8, label="this run")
    for k, (label, (f, h)) in enumerate((others or {}).items(), start=1):
        ax.loglog(f, h, color=f"C{k}", lw=1.5, label=label)
    f_yr = 1.0 / (365.25 * 86400.0)
    ax.plot([f_yr], [NANOGRAV_HC_1YR], "k*", ms=11,
            label=r"PTA 2023: $2.4\times10^{-15}$ at 1/yr")
    ax.set_xlabel("frequency f [Hz]")
    ax.set_ylabel(r"characteristic strain $h_c$")
    ax.legend()
    ax.set_title(title or "nHz gravitational-wave background")
    return _save(fig, path)
