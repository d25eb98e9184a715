"""Black-hole seeding channels.

Four channels, usable in any combination (DESIGN §6):

``light`` (:class:`LightSeeds`)
    Population III remnants in pristine minihaloes that cross the H2-cooling threshold.
``heavy`` (:class:`HeavySeeds`)
    Direct collapse in pristine atomic-cooling haloes exposed to a Lyman-Werner intensity
    above a critical value drawn per halo.
``halo_mass`` (:class:`HaloMassSeeds`)
    A seed in every halo above a mass threshold without a black hole, as large hydrodynamic
    simulations do.
``dense_gas`` (:class:`DenseGasSeeds`)
    A seed where the reservoir gas is dense, cold and metal-poor.

Each channel is a frozen dataclass with one vectorized method
``seed(inp) -> (mask, mass_msun)`` on the per-halo arrays of :class:`SeedingInputs`. A channel
never fires in a halo that already hosts a black hole. :func:`apply_channels` runs a list of
channels in the given order; the first that fires in a halo wins, so a halo gets at most one
seed per call (one call per snapshot).

Random numbers
--------------
All draws are :func:`bhgrow.rng.uniform` on the per-node stream keys of the inputs at
``step = 0`` with the purpose codes of :data:`SEEDING_PURPOSES` (one per channel and use), so
the same keys give the same seeds whatever the order, chunking or the other channels. The
codes sit in a block far above small purpose numbers: ``rng.hash64`` mixes
``4 step + purpose``, so another user of the same node keys stays clear of them as long as
its ``4 step + purpose`` is below :data:`SEEDING_PURPOSE_BASE`. Normal deviates come from the
inverse normal CDF of one uniform.

Seed masses
-----------
:class:`SeedMass` is a fixed mass or a log-uniform or log-normal distribution, drawn from
uniforms.

References
----------
.. [T97] Tegmark M., Silk J., Rees M. J., Blanchard A., Abel T., Palla F., 1997, ApJ, 474, 1
.. [B01] Bromm V., Ferrara A., Coppi P. S., Larson R. B., 2001, MNRAS, 328, 969
.. [MR01] Madau P., Rees M. J., 2001, ApJ, 551, L27
.. [V10] Volonteri M., 2010, A&ARv, 18, 279
.. [LN06] Lodato G., Natarajan P., 2006, MNRAS, 371, 1813
.. [SBH10] Shang C., Bryan G. L., Haiman Z., 2010, MNRAS, 402, 1249
.. [S14] Sugimura K., Omukai K., Inoue A. K., 2014, MNRAS, 445, 544
.. [D08] Dijkstra M., Haiman Z., Mesinger A., Wyithe J. S. B., 2008, MNRAS, 391, 1961
.. [GB06] Greif T. H., Bromm V., 2006, MNRAS, 373, 128
.. [V13] Vogelsberger M. et al., 2013, MNRAS, 436, 3031
.. [S15] Sijacki D. et al., 2015, MNRAS, 452, 575
.. [TK14] Taylor P., Kobayashi C., 2014, MNRAS, 442, 2751

Values marked "(memory)" were written from memory.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import ClassVar, NamedTuple

import numpy as np

from .. import _validate
from .. import rng
from ..errors import ParameterError
from .gas import DEFAULT_HOT_T_VIR_K, Z_SUN

__all__ = [
    "SeedingInputs",
    "SeedMass",
    "LightSeeds",
    "HeavySeeds",
    "HaloMassSeeds",
    "DenseGasSeeds",
    "SEEDING_CHANNELS",
    "CHANNEL_CODES",
    "SEEDING_PURPOSES",
    "SEEDING_PURPOSE_BASE",
    "apply_channels",
    "j_lw_background",
]

# =============================================================================================
# Defaults (one place; every value has its unit and source)
# =============================================================================================
#: critical metallicity for Pop III / direct-collapse conditions [metal mass fraction]:
#: 10^-3.5 Z_sun (Bromm et al. 2001, MNRAS 328, 969, memory) with Z_sun of bhgrow.physics.gas
DEFAULT_Z_CRIT: float = 10.0**-3.5 * Z_SUN

#: lowest redshift of pristine (Pop III / direct-collapse) seeding: below z ~ 10 the gas
#: around new halos is mostly metal-enriched and photo-heated, and pristine star formation
#: falls steeply (Trenti & Stiavelli 2009, ApJ 694, 879, memory)
DEFAULT_PRISTINE_Z_MIN: float = 10.0

# --- light seeds ---
#: minimum virial temperature for H2 cooling in minihaloes [K]: ~1e3-2e3 K (Tegmark et al.
#: 1997, ApJ 474, 1, memory); T_vir as computed by HaloStructure (mu = 0.59)
DEFAULT_LIGHT_T_VIR_MIN_K: float = 2.0e3
#: upper end of the range [K]: none by default, because a merger tree resolves minihaloes
#: only if its mass resolution is ~1e5-1e6 Msun; in a coarser tree the first resolved
#: pristine halo stands for its unresolved pristine minihalo progenitors (set 1e4 K, the
#: onset of atomic cooling, for trees that resolve minihaloes)
DEFAULT_LIGHT_T_VIR_MAX_K: float = float("inf")
#: Pop III remnant mass [Msun]: ~100 Msun (Madau & Rees 2001; Volonteri 2010 review, memory)
DEFAULT_LIGHT_SEED_MSUN: float = 100.0

# --- heavy seeds ---
#: minimum virial temperature of atomic-cooling haloes [K]
DEFAULT_HEAVY_T_VIR_MIN_K: float = 1.0e4
#: median critical Lyman-Werner intensity [J21]: 30-300 for a 1e4 K (Pop II) spectrum in the
#: three haloes of Shang, Bryan & Haiman 2010; ~1e3 for realistic spectra in Sugimura et al.
#: 2014 (memory); 300 taken
DEFAULT_J_CRIT_MEDIAN: float = 300.0
#: log-normal scatter of J_crit between haloes [dex]: the factor-10 range (30-300) of
#: Shang, Bryan & Haiman 2010 read as +-1 sigma (memory; a choice)
DEFAULT_J_CRIT_SIGMA_DEX: float = 0.5
#: background LW intensity log10 J_bg(z) = A - B z [J21]: J_21 = 10^(2 - z/5)
#: (Greif & Bromm 2006, MNRAS 373, 128, memory)
DEFAULT_J_BG_LOG10_Z0: float = 2.0
DEFAULT_J_BG_DEX_PER_Z: float = 0.2
#: log-normal scatter of the local LW intensity around J_bg [dex]: stands in for the
#: high-J tail from close star-forming neighbours of Dijkstra et al. 2008 (a choice)
DEFAULT_J_LW_SIGMA_DEX: float = 0.5
#: direct-collapse seed mass [Msun]: ~1e5 (range 1e4-1e6; Lodato & Natarajan 2006, memory)
DEFAULT_HEAVY_SEED_MSUN: float = 1.0e5

# --- halo-mass threshold seeds ---
#: Illustris: FoF haloes above 5e10 Msun/h without a BH get a 1e5 Msun/h seed (Vogelsberger
#: et al. 2013; Sijacki et al. 2015), Illustris h = 0.704 (WMAP9; memory). With the TNG /
#: Planck 2015 h = 0.6774 the same numbers read 7.38e10 and 1.48e5 Msun. The threshold was
#: set on FoF masses; bhgrow compares it with the tree's halo mass.
ILLUSTRIS_H: float = 0.704
DEFAULT_HALO_MASS_MIN_MSUN: float = 5.0e10 / ILLUSTRIS_H
DEFAULT_HALO_MASS_SEED_MSUN: float = 1.0e5 / ILLUSTRIS_H

# --- dense-gas seeds ---
#: hydrogen density threshold [cm^-3]: 3 cm^-3, a stated choice in the spirit of gas-based
#: seeding in cosmological simulations (e.g. Taylor & Kobayashi 2014, MNRAS 442, 2751,
#: memory); here applied to the zone mean
DEFAULT_DENSE_N_H_MIN_CM3: float = 3.0
#: metallicity ceiling [metal mass fraction]: 3e-4 (a stated choice; cf. Taylor & Kobayashi
#: 2014, memory)
DEFAULT_DENSE_Z_MAX: float = 3.0e-4
#: "cold": the reservoir must not be hot, T_vir < the GasZone hot threshold [K]
DEFAULT_DENSE_T_VIR_MAX_K: float = DEFAULT_HOT_T_VIR_K
#: seed mass [Msun]: 1e5 (direct-collapse scale, Lodato & Natarajan 2006, memory)
DEFAULT_DENSE_SEED_MSUN: float = 1.0e5

# =============================================================================================
# Random-number purposes (one place): rng.uniform(keys, step=0, purpose=...)
# =============================================================================================
#: first purpose code of the seeding block (0x5EED00 = 6 221 056)
SEEDING_PURPOSE_BASE: int = 0x5EED00
SEEDING_PURPOSES: dict[str, int] = {
    "light.mass": SEEDING_PURPOSE_BASE + 1,
    "heavy.j_crit": SEEDING_PURPOSE_BASE + 2,
    "heavy.j_lw_scatter": SEEDING_PURPOSE_BASE + 3,
    "heavy.mass": SEEDING_PURPOSE_BASE + 4,
    "halo_mass.mass": SEEDING_PURPOSE_BASE + 5,
    "dense_gas.mass": SEEDING_PURPOSE_BASE + 6,
}

_U_MIN = 2.0**-54           # keeps the inverse normal CDF finite at u = 0
_U_MAX = 1.0 - 2.0**-53     # largest double below 1


def _std_normal(u: np.ndarray) -> np.ndarray:
    """Standard normal deviates from uniforms by the inverse CDF (scipy ``ndtri``)."""
    from scipy.special import ndtri

    return ndtri(np.clip(u, _U_MIN, _U_MAX))


# =============================================================================================
# Inputs and seed masses
# =============================================================================================
class SeedingInputs(NamedTuple):
    """Per-halo (node) arrays the seeding channels read; all aligned, one entry per halo.

    Attributes
    ----------
    m_halo_msun : numpy.ndarray
        Halo virial mass, physical Msun.
    z : numpy.ndarray or float
        Redshift (a scalar for one snapshot is broadcast).
    t_vir_k : numpy.ndarray
        Virial temperature, K.
    pristine : numpy.ndarray of bool
        No progenitor ever formed stars or hosted a black hole.
    metallicity : numpy.ndarray
        Metal mass fraction ``Z`` of the reservoir gas.
    n_h_cm3 : numpy.ndarray
        Hydrogen number density of the gas zone, cm^-3.
    gas_msun : numpy.ndarray
        Reservoir gas mass, Msun.
    j_lw : numpy.ndarray
        Lyman-Werner intensity at the halo in J21 (1e-21 erg/s/cm^2/Hz/sr) from the tree, or
        NaN where the tree has none.
    has_bh : numpy.ndarray of bool
        The halo already hosts a black hole.
    keys : numpy.ndarray of uint64
        Stream keys, ``rng.stream_keys(seed, node_id)``.
    """

    m_halo_msun: np.ndarray
    z: np.ndarray
    t_vir_k: np.ndarray
    pristine: np.ndarray
    metallicity: np.ndarray
    n_h_cm3: np.ndarray
    gas_msun: np.ndarray
    j_lw: np.ndarray
    has_bh: np.ndarray
    keys: np.ndarray


def _f64(a, n: int) -> np.ndarray:
    return np.broadcast_to(np.asarray(a, dtype=np.float64), (n,))


def _bool(a, n: int) -> np.ndarray:
    return np.broadcast_to(np.asarray(a, dtype=bool), (n,))


def _n_halos(inp: SeedingInputs) -> int:
    return int(np.asarray(inp.keys).shape[0])


def _draw_uniform(inp: SeedingInputs, purpose: str) -> np.ndarray:
    return rng.uniform(np.asarray(inp.keys, dtype=np.uint64), 0, SEEDING_PURPOSES[purpose])


def _subset(inp: SeedingInputs, idx: np.ndarray) -> SeedingInputs:
    """The inputs of the haloes ``idx`` (scalars stay scalars)."""
    n = _n_halos(inp)
    return SeedingInputs(*(np.asarray(a)[idx] if np.ndim(a) and np.shape(a)[0] == n else a
                           for a in inp))


def _masses_where(mask: np.ndarray, mass: "SeedMass", inp: SeedingInputs, purpose: str):
    """``(mask, seed mass where mask else 0)``; draws are made only where ``mask`` (each
    halo's draw depends on its own key alone, so the result is the same)."""
    out = np.zeros(mask.shape)
    idx = np.flatnonzero(mask)
    if idx.size:
        keys = np.asarray(inp.keys, dtype=np.uint64)[idx]
        out[idx] = mass.draw(rng.uniform(keys, 0, SEEDING_PURPOSES[purpose]))
    return mask, out


_KINDS = ("fixed", "log_uniform", "log_normal")
_KIND_FIELDS = {"fixed": ("value",), "log_uniform": ("lo", "hi"),
                "log_normal": ("median", "sigma_dex")}


@dataclass(frozen=True)
class SeedMass:
    """Seed-mass distribution: fixed, log-uniform or log-normal, drawn from uniforms.

    Parameters
    ----------
    kind : {"fixed", "log_uniform", "log_normal"}
        Distribution.
    value : float
        Mass for ``kind="fixed"``, Msun.
    lo : float
        Lower bound of ``kind="log_uniform"`` (uniform in log10 M on [lo, hi)), Msun.
    hi : float
        Upper bound of ``kind="log_uniform"``, Msun.
    median : float
        Median of ``kind="log_normal"``, Msun.
    sigma_dex : float
        Standard deviation of log10 M for ``kind="log_normal"``, dex.

    Only the parameters of the chosen kind may be given; the others stay None.

    Examples
    --------
    >>> SeedMass("log_uniform", lo=10.0, hi=1000.0).draw(np.array([0.0, 0.5]))
    array([ 10., 100.])
    """

    kind: str = "fixed"
    value: float | None = None
    lo: float | None = None
    hi: float | None = None
    median: float | None = None
    sigma_dex: float | None = None

    def __post_init__(self) -> None:
        owner = type(self).__name__
        _validate.one_of(owner, "kind", self.kind, _KINDS)
        needed = _KIND_FIELDS[self.kind]
        for name in ("value", "lo", "hi", "median", "sigma_dex"):
            v = getattr(self, name)
            if name in needed:
                if v is None:
                    _validate._fail(owner, name, f"given for kind {self.kind!r}", v)
            elif v is not None:
                _validate._fail(owner, name, f"None for kind {self.kind!r}", v)
        if self.kind == "fixed":
            object.__setattr__(self, "value", _validate.positive(owner, "value", self.value))
        elif self.kind == "log_uniform":
            lo = _validate.positive(owner, "lo", self.lo)
            hi = _validate.positive(owner, "hi", self.hi)
            if not hi > lo:
                _validate._fail(owner, "hi", f"> lo ({lo:g})", self.hi)
            object.__setattr__(self, "lo", lo)
            object.__setattr__(self, "hi", hi)
        else:
            object.__setattr__(self, "median", _validate.positive(owner, "median", self.median))
            object.__setattr__(self, "sigma_dex",
                               _validate.non_negative(owner, "sigma_dex", self.sigma_dex))

    def draw(self, u) -> np.ndarray:
        """Seed masses (Msun) from uniforms ``u`` in [0, 1), one per entry.

        Parameters
        ----------
        u : array_like
            Uniform deviates (e.g. :func:`bhgrow.rng.uniform`); ignored for ``"fixed"``.

        Returns
        -------
        numpy.ndarray
            Masses in Msun, float64, shape of ``u``.
        """
        u = np.asarray(u, dtype=np.float64)
        if self.kind == "fixed":
            return np.full(u.shape, self.value)
        if self.kind == "log_uniform":
            l0, l1 = math.log10(self.lo), math.log10(self.hi)
            # log10 M ~ U[log10 lo, log10 hi)  (inverse CDF)
            return 10.0 ** (l0 + (l1 - l0) * u)
        # log10 M ~ N(log10 median, sigma_dex^2)  (inverse normal CDF)
        return self.median * 10.0 ** (self.sigma_dex * _std_normal(u))


def _check_seed_mass(owner: str, value) -> None:
    if not isinstance(value, SeedMass):
        _validate._fail(owner, "mass", "a SeedMass", value)


def _check_bool(owner: str, name: str, value) -> None:
    if not isinstance(value, bool):
        _validate._fail(owner, name, "True or False", value)


# =============================================================================================
# Channels
# =============================================================================================
@dataclass(frozen=True)
class LightSeeds:
    """Population III remnants in pristine minihaloes crossing the H2-cooling threshold.

    A halo is seeded when it has no black hole, is pristine, its gas has
    ``Z < z_crit`` and ``t_vir_min_k <= T_vir < t_vir_max_k``.

    Parameters
    ----------
    t_vir_min_k : float, optional
        H2-cooling threshold, K (default 2e3; Tegmark et al. 1997 find ~1e3-2e3 K, memory).
    t_vir_max_k : float, optional
        Upper end, K (default inf: in trees that do not resolve minihaloes the first resolved
        pristine halo stands for its minihalo progenitors; use 1e4, atomic cooling, for
        trees that do).
    z_min : float, optional
        Lowest seeding redshift (default 10; pristine star formation fades below z ~ 10,
        Trenti & Stiavelli 2009, memory).
    z_crit : float, optional
        Metal mass fraction below which gas is pristine (default 10^-3.5 Z_sun, Bromm et al.
        2001, memory).
    mass : SeedMass, optional
        Seed mass (default fixed 100 Msun; Madau & Rees 2001, Volonteri 2010, memory).
    """

    name: ClassVar[str] = "light"

    t_vir_min_k: float = DEFAULT_LIGHT_T_VIR_MIN_K
    t_vir_max_k: float = DEFAULT_LIGHT_T_VIR_MAX_K
    z_min: float = DEFAULT_PRISTINE_Z_MIN
    z_crit: float = DEFAULT_Z_CRIT
    mass: SeedMass = field(
        default_factory=lambda: SeedMass("fixed", value=DEFAULT_LIGHT_SEED_MSUN))

    def __post_init__(self) -> None:
        owner = type(self).__name__
        lo = _validate.positive(owner, "t_vir_min_k", self.t_vir_min_k)
        hi = float(self.t_vir_max_k) if self.t_vir_max_k == float("inf") else \
            _validate.positive(owner, "t_vir_max_k", self.t_vir_max_k)
        object.__setattr__(self, "z_min", _validate.non_negative(owner, "z_min", self.z_min))
        if not hi > lo:
            _validate._fail(owner, "t_vir_max_k", f"> t_vir_min_k ({lo:g})", self.t_vir_max_k)
        object.__setattr__(self, "t_vir_min_k", lo)
        object.__setattr__(self, "t_vir_max_k", hi)
        object.__setattr__(self, "z_crit", _validate.positive(owner, "z_crit", self.z_crit))
        _check_seed_mass(owner, self.mass)

    def seed(self, inp: SeedingInputs):
        """Which haloes get a light seed, and its mass.

        Returns
        -------
        mask : numpy.ndarray of bool
        mass_msun : numpy.ndarray
            Seed mass where ``mask``, 0 elsewhere.
        """
        n = _n_halos(inp)
        tv = _f64(inp.t_vir_k, n)
        # pristine minihalo cooling by H2: T_min <= T_vir < 1e4 K (Tegmark et al. 1997, ApJ 474, 1)
        # and Z < Z_crit ~ 1e-3.5 Z_sun (Bromm et al. 2001, MNRAS 328, 969)
        mask = (~_bool(inp.has_bh, n) & _bool(inp.pristine, n)
                & (_f64(inp.metallicity, n) < self.z_crit)
                & (tv >= self.t_vir_min_k) & (tv < self.t_vir_max_k)
                & (_f64(inp.z, n) >= self.z_min))
        return _masses_where(mask, self.mass, inp, "light.mass")


def j_lw_background(z, log10_z0=DEFAULT_J_BG_LOG10_Z0, dex_per_z=DEFAULT_J_BG_DEX_PER_Z):
    """Mean Lyman-Werner background in J21, ``10^(log10_z0 - dex_per_z z)``.

    The default is ``J_21 = 10^(2 - z/5)`` (Greif & Bromm 2006, MNRAS 373, 128, memory): 1 at
    z = 10, 0.01 at z = 20.
    """
    z = np.asarray(z, dtype=np.float64)
    # J_21,bg(z) = 10^(2 - z/5)  (Greif & Bromm 2006, MNRAS 373, 128; memory)
    return 10.0 ** (log10_z0 - dex_per_z * z)


@dataclass(frozen=True)
class HeavySeeds:
    """Direct-collapse seeds in pristine atomic-cooling haloes under a strong LW flux.

    A halo is seeded when it has no black hole, is pristine, its gas has ``Z < z_crit``,
    ``T_vir >= t_vir_min_k`` and ``J_LW > J_crit``, where

    * ``J_crit`` is drawn per halo, log-normal: ``log10 J_crit ~ N(log10 j_crit_median,
      j_crit_sigma_dex^2)``;
    * ``J_LW`` is the tree's ``j_lw`` where finite, otherwise the background
      :func:`j_lw_background` times a log-normal factor of median 1 and
      ``j_lw_sigma_dex`` dex (local clustering of sources, Dijkstra et al. 2008).

    With the tree column absent, the seeded fraction of eligible haloes is therefore
    ``Phi[(log10 J_bg - log10 j_crit_median) / sqrt(j_lw_sigma_dex^2 + j_crit_sigma_dex^2)]``.

    Parameters
    ----------
    t_vir_min_k : float, optional
        Atomic-cooling threshold, K (default 1e4).
    z_min : float, optional
        Lowest seeding redshift (default 10; Trenti & Stiavelli 2009, memory).
    z_crit : float, optional
        Metal mass fraction ceiling (default 10^-3.5 Z_sun, Bromm et al. 2001, memory).
    j_crit_median : float, optional
        Median critical intensity, J21 (default 300; Shang, Bryan & Haiman 2010).
    j_crit_sigma_dex : float, optional
        Scatter of log10 J_crit, dex (default 0.5).
    j_bg_log10_z0 : float, optional
        log10 of the LW background at z = 0, J21 (default 2: ``J_bg = 10^(2 - z/5)``, Greif &
        Bromm 2006, memory).
    j_bg_dex_per_z : float, optional
        Decline of log10 J_bg per unit redshift, dex (default 0.2, Greif & Bromm 2006, memory).
    j_lw_sigma_dex : float, optional
        Scatter of the local intensity around the background, dex (default 0.5).
    mass : SeedMass, optional
        Seed mass (default fixed 1e5 Msun; Lodato & Natarajan 2006, memory).
    """

    name: ClassVar[str] = "heavy"

    t_vir_min_k: float = DEFAULT_HEAVY_T_VIR_MIN_K
    z_min: float = DEFAULT_PRISTINE_Z_MIN
    z_crit: float = DEFAULT_Z_CRIT
    j_crit_median: float = DEFAULT_J_CRIT_MEDIAN
    j_crit_sigma_dex: float = DEFAULT_J_CRIT_SIGMA_DEX
    j_bg_log10_z0: float = DEFAULT_J_BG_LOG10_Z0
    j_bg_dex_per_z: float = DEFAULT_J_BG_DEX_PER_Z
    j_lw_sigma_dex: float = DEFAULT_J_LW_SIGMA_DEX
    mass: SeedMass = field(
        default_factory=lambda: SeedMass("fixed", value=DEFAULT_HEAVY_SEED_MSUN))

    def __post_init__(self) -> None:
        owner = type(self).__name__
        for name, check in (("t_vir_min_k", _validate.positive),
                            ("z_min", _validate.non_negative),
                            ("z_crit", _validate.positive),
                            ("j_crit_median", _validate.positive),
                            ("j_crit_sigma_dex", _validate.non_negative),
                            ("j_bg_dex_per_z", _validate.non_negative),
                            ("j_lw_sigma_dex", _validate.non_negative)):
            object.__setattr__(self, name, check(owner, name, getattr(self, name)))
        object.__setattr__(self, "j_bg_log10_z0",
                           _validate.in_range(owner, "j_bg_log10_z0", self.j_bg_log10_z0,
                                              -30.0, 30.0))
        _check_seed_mass(owner, self.mass)

    def j_crit(self, inp: SeedingInputs) -> np.ndarray:
        """Critical LW intensity of each halo, J21 (log-normal per halo)."""
        g = _std_normal(_draw_uniform(inp, "heavy.j_crit"))
        # log10 J_crit ~ N(log10 J_med, sigma^2): halo-to-halo spread of J_crit (Shang et al. 2010)
        return self.j_crit_median * 10.0 ** (self.j_crit_sigma_dex * g)

    def j_lw(self, inp: SeedingInputs) -> np.ndarray:
        """LW intensity at each halo, J21: the tree value if finite, else background x scatter."""
        n = _n_halos(inp)
        g = _std_normal(_draw_uniform(inp, "heavy.j_lw_scatter"))
        bg = j_lw_background(_f64(inp.z, n), self.j_bg_log10_z0, self.j_bg_dex_per_z)
        # J_LW = J_bg(z) 10^(sigma g): log-normal stand-in for the clustering tail of Dijkstra
        # et al. 2008 (MNRAS 391, 1961)
        local = bg * 10.0 ** (self.j_lw_sigma_dex * g)
        tree = _f64(inp.j_lw, n)
        return np.where(np.isfinite(tree), tree, local)

    def seed(self, inp: SeedingInputs):
        """Which haloes get a direct-collapse seed, and its mass.

        Returns
        -------
        mask : numpy.ndarray of bool
        mass_msun : numpy.ndarray
            Seed mass where ``mask``, 0 elsewhere.
        """
        n = _n_halos(inp)
        # pristine atomic-cooling halo with J_LW > J_crit: H2 suppressed, isothermal collapse at
        # ~1e4 K (Shang, Bryan & Haiman 2010, MNRAS 402, 1249; Lodato & Natarajan 2006)
        mask = (~_bool(inp.has_bh, n) & _bool(inp.pristine, n)
                & (_f64(inp.metallicity, n) < self.z_crit)
                & (_f64(inp.t_vir_k, n) >= self.t_vir_min_k)
                & (_f64(inp.z, n) >= self.z_min))
        # the flux test only where the rest holds (per-halo draws: same result)
        idx = np.flatnonzero(mask)
        if idx.size:
            sub = _subset(inp, idx)
            mask[idx] = self.j_lw(sub) > self.j_crit(sub)
        return _masses_where(mask, self.mass, inp, "heavy.mass")


@dataclass(frozen=True)
class HaloMassSeeds:
    """A seed in every halo above a mass threshold that has no black hole.

    No pristine or metallicity requirement (Vogelsberger et al. 2013; Sijacki et al. 2015).

    Parameters
    ----------
    m_halo_min_msun : float, optional
        Halo mass threshold, Msun (default 5e10 Msun/h with Illustris h = 0.704 = 7.10e10;
        memory).
    mass : SeedMass, optional
        Seed mass (default fixed 1e5 Msun/h = 1.42e5 Msun; memory).
    """

    name: ClassVar[str] = "halo_mass"

    m_halo_min_msun: float = DEFAULT_HALO_MASS_MIN_MSUN
    mass: SeedMass = field(
        default_factory=lambda: SeedMass("fixed", value=DEFAULT_HALO_MASS_SEED_MSUN))

    def __post_init__(self) -> None:
        owner = type(self).__name__
        object.__setattr__(self, "m_halo_min_msun",
                           _validate.positive(owner, "m_halo_min_msun", self.m_halo_min_msun))
        _check_seed_mass(owner, self.mass)

    def seed(self, inp: SeedingInputs):
        """Which haloes get a halo-mass seed, and its mass.

        Returns
        -------
        mask : numpy.ndarray of bool
        mass_msun : numpy.ndarray
            Seed mass where ``mask``, 0 elsewhere.
        """
        n = _n_halos(inp)
        # M_h >= M_thr, no BH yet (Vogelsberger et al. 2013, MNRAS 436, 3031; Sijacki et al. 2015)
        mask = ~_bool(inp.has_bh, n) & (_f64(inp.m_halo_msun, n) >= self.m_halo_min_msun)
        return _masses_where(mask, self.mass, inp, "halo_mass.mass")


@dataclass(frozen=True)
class DenseGasSeeds:
    """A seed where the reservoir gas is dense, cold and metal-poor.

    A halo is seeded when it has no black hole, its zone has ``n_H > n_h_min_cm3``,
    ``Z < z_max`` and its reservoir is cold (``T_vir < t_vir_max_k``, the hot-halo threshold
    of :class:`~bhgrow.physics.gas.GasZone`); in the spirit of Taylor & Kobayashi (2014), applied to the
    zone mean density rather than to single gas particles.

    Parameters
    ----------
    n_h_min_cm3 : float, optional
        Hydrogen density threshold, cm^-3 (default 3; a stated choice; cf. Taylor & Kobayashi 2014, memory).
    z_max : float, optional
        Metal mass fraction ceiling (default 3e-4; a stated choice; cf. Taylor & Kobayashi 2014, memory).
    t_vir_max_k : float, optional
        Reservoir counts as cold below this virial temperature, K (default 6e5).
    mass : SeedMass, optional
        Seed mass (default fixed 1e5 Msun).
    """

    name: ClassVar[str] = "dense_gas"

    n_h_min_cm3: float = DEFAULT_DENSE_N_H_MIN_CM3
    z_max: float = DEFAULT_DENSE_Z_MAX
    t_vir_max_k: float = DEFAULT_DENSE_T_VIR_MAX_K
    mass: SeedMass = field(
        default_factory=lambda: SeedMass("fixed", value=DEFAULT_DENSE_SEED_MSUN))

    def __post_init__(self) -> None:
        owner = type(self).__name__
        for name in ("n_h_min_cm3", "z_max", "t_vir_max_k"):
            object.__setattr__(self, name, _validate.positive(owner, name, getattr(self, name)))
        _check_seed_mass(owner, self.mass)

    def seed(self, inp: SeedingInputs):
        """Which haloes get a dense-gas seed, and its mass.

        Returns
        -------
        mask : numpy.ndarray of bool
        mass_msun : numpy.ndarray
            Seed mass where ``mask``, 0 elsewhere.
        """
        n = _n_halos(inp)
        # dense, cold, metal-poor gas: n_H > n_thr, Z < Z_thr (cf. Taylor & Kobayashi 2014, MNRAS 442)
        mask = (~_bool(inp.has_bh, n)
                & (_f64(inp.n_h_cm3, n) > self.n_h_min_cm3)
                & (_f64(inp.metallicity, n) < self.z_max)
                & (_f64(inp.t_vir_k, n) < self.t_vir_max_k))
        return _masses_where(mask, self.mass, inp, "dense_gas.mass")


#: config name -> channel class
SEEDING_CHANNELS = {
    "light": LightSeeds,
    "heavy": HeavySeeds,
    "halo_mass": HaloMassSeeds,
    "dense_gas": DenseGasSeeds,
}
#: config name -> integer code stored in the black-hole table (0 = no seed)
CHANNEL_CODES = {"light": 1, "heavy": 2, "halo_mass": 3, "dense_gas": 4}


def apply_channels(channels, inp: SeedingInputs):
    """Run seeding channels in order; the first that fires in a halo wins.

    Parameters
    ----------
    channels : list
        Channel instances (at most one of each class in :data:`SEEDING_CHANNELS`), in
        calling order.
    inp : SeedingInputs
        Per-halo arrays of one snapshot.

    Returns
    -------
    channel_code : numpy.ndarray of int8
        :data:`CHANNEL_CODES` value of the channel that seeded each halo, 0 for none. Haloes
        with ``has_bh`` are never seeded.
    mass_msun : numpy.ndarray
        Seed mass, Msun (0 where no seed).

    Raises
    ------
    bhgrow.errors.ParameterError
        If a channel is not a registered channel class, or a class appears twice.
    """
    n = _n_halos(inp)
    seen: set[str] = set()
    for ch in channels:
        name = getattr(type(ch), "name", None)
        if name not in SEEDING_CHANNELS or type(ch) is not SEEDING_CHANNELS[name]:
            raise ParameterError(
                f"`channels` of apply_channels must be instances of "
                f"{', '.join(c.__name__ for c in SEEDING_CHANNELS.values())}; got {ch!r}",
                source="apply_channels", rule="channels")
        if name in seen:
            raise ParameterError(
                f"`channels` of apply_channels must name each channel once; got {name!r} twice",
                source="apply_channels", rule="channels")
        seen.add(name)
    for arr_name in ("m_halo_msun", "t_vir_k", "pristine", "metallicity", "n_h_cm3",
                     "gas_msun", "j_lw", "has_bh"):
        shape = np.shape(getattr(inp, arr_name))
        if shape not in ((), (n,)):
            raise ValueError(f"SeedingInputs.{arr_name} has shape {shape}; keys have ({n},)")

    code = np.zeros(n, dtype=np.int8)
    mass = np.zeros(n, dtype=np.float64)
    free = ~_bool(inp.has_bh, n)
    for ch in channels:
        mask, m = ch.seed(inp)
        take = mask & free & (code == 0)
        code[take] = CHANNEL_CODES[ch.name]
        mass[take] = m[take]
    return code, mass
