"""The engine's compiled kernels (C extension ``bhgrow._ckernels``), loaded once.

Steps of the engine's inner loop that have a compiled kernel beside their array code, which
stays the reference they are tested against:

* the coupled gas-hole solver, :func:`bhgrow.physics.coupled.advance` (array code:
  ``coupled._advance``);
* the reservoir step of halos without a black hole, :meth:`StarFormation.step` (array code:
  ``StarFormation._evolve``), used by the engine when the model's star formation is
  :class:`~bhgrow.physics.gas.StarFormation` itself;
* the smooth accretion of each snapshot's main progenitors (the engine's step 1) and the
  counter-based random numbers of :mod:`bhgrow.rng` (``stream_keys``, ``uniform``): integer
  and summation work in the array code's order, so bit for bit the same.

Each kernel runs one halo at a time with the array code's formulas in the same order and the
constants taken from the Python modules at every call, so the two agree to round-off (a
solver phase switch may land elsewhere within its 1e-3 tolerance band). Why compiled: the
solver's work per halo is sequential and of unequal length (phases, substeps, root
iterations); as arrays it ran ~17 passes per snapshot, most over a few halos, each a few
hundred small numpy calls. The extension is built at install time (``setup.py``; it needs a
C compiler, and is skipped where there is none); where it is missing, or the environment
sets ``BHGROW_KERNELS=0``, the array code runs.
"""

from __future__ import annotations

import os
import warnings
from types import ModuleType

import numpy as np

__all__ = ["Kernels", "kernels"]


def _f64(x) -> np.ndarray:
    return np.ascontiguousarray(x, dtype=np.float64)


class Kernels:
    """The compiled kernels, with their constants and argument conversions."""

    def __init__(self, ext: ModuleType):
        self._ext = ext

    def advance_halos(self, gas, metals, m_bh, c, dt, steps, max_dlnm, prior_rate):
        """:func:`bhgrow.physics.coupled.advance` on 1-d float arrays of one length ``n``
        (``c``: its :class:`~bhgrow.physics.coupled.Coefficients`; ``steps``, ``prior_rate``:
        arrays; ``max_dlnm``: float, or None for no step control). Returns a ``(5, n)`` array:
        gas, metals, hole mass, gas accreted and the gas integral at the end."""
        from .physics import coupled as cp

        out = np.empty((5, np.size(gas)))
        self._ext.advance_halos(
            _f64(gas), _f64(metals), _f64(m_bh), _f64(c.inflow), _f64(c.loss),
            _f64(c.bondi_per_gas), _f64(c.edd), _f64(c.keep), _f64(c.per_unit),
            _f64(c.metal_rate), _f64(dt), _f64(steps), _f64(prior_rate), out,
            -1.0 if max_dlnm is None else float(max_dlnm),
            (float(cp._EDD_TOL), float(cp._EXP_M_TOL), float(cp._EXP_P_TOL),
             float(cp._RUNAWAY_MARGIN), float(cp._SERIES_X), float(cp._DRAIN_SHARE),
             float(cp._STEP_SAFETY), float(cp._MAX_PHASES), int(cp._ROOT_ITERS),
             int(cp._POLISH_STEPS)))
        return out

    def quiet_step(self, sf, inflow, t_dyn, v_c, dt, where, gas, stars, metals, blown):
        """One :meth:`StarFormation.step` (``sf``) without metal flows for the rows where
        ``where`` is true, in place on ``gas``, ``stars``, ``metals`` (Msun) and ``blown``
        (the gas blown out, Msun); ``inflow`` Msun/Gyr, ``t_dyn`` Gyr, ``v_c`` km/s, ``dt``
        Gyr. All 1-d of one length; the four results float64 and C-contiguous."""
        from .physics import gas as gs

        for name, a in (("gas", gas), ("stars", stars), ("metals", metals), ("blown", blown)):
            if a.dtype != np.float64 or not a.flags.c_contiguous:
                raise ValueError(f"quiet_step: `{name}` must be a C-contiguous float64 array")
        self._ext.quiet_step(
            (float(sf.efficiency), float(sf.v0_kms), float(sf.alpha), float(sf.recycle),
             float(sf.metal_yield), float(gs._X_SERIES)),
            _f64(gs._C_PHI1), _f64(gs._C_PHI2), _f64(gs._C_PSI),
            _f64(inflow), _f64(t_dyn), _f64(v_c), _f64(dt),
            np.ascontiguousarray(where, dtype=np.bool_), gas, stars, metals, blown)

    def smooth_growth(self, forest, start: int, stop: int):
        """For the nodes ``[start, stop)`` of ``forest`` that are their descendant's main
        progenitor, the descendant's mass beyond the sum of its progenitors' (Msun, >= 0);
        0 elsewhere (the engine's smooth accretion, credited to the main progenitor).
        None where the forest's index arrays are not C-contiguous int64 (the caller then
        computes it with numpy)."""
        arrays = (forest.desc_index, forest.main_prog, forest.prog_offsets,
                  forest.prog_index)
        mass = forest.mass_msun
        if not (all(a.dtype == np.int64 and a.flags.c_contiguous for a in arrays)
                and mass.dtype == np.float64 and mass.flags.c_contiguous):
            return None
        out = np.zeros(stop - start)
        self._ext.smooth_growth(start, stop, forest.desc_index, forest.main_prog, mass,
                                forest.prog_offsets, forest.prog_index, out)
        return out

    def stream_keys(self, seed_hash: int, gamma: int, ids: np.ndarray) -> np.ndarray:
        """:func:`bhgrow.rng.stream_keys` of int64 ``ids`` (``seed_hash``: its hash of the
        seed; ``gamma``: the SplitMix64 increment)."""
        out = np.empty(ids.size, dtype=np.uint64)
        self._ext.splitmix(0, seed_hash, gamma, np.ascontiguousarray(ids), out)
        return out

    def uniform(self, offset: int, keys: np.ndarray) -> np.ndarray:
        """:func:`bhgrow.rng.uniform` of uint64 ``keys`` (``offset``: the (step, purpose)
        counter times the SplitMix64 increment)."""
        out = np.empty(keys.size)
        self._ext.splitmix(1, offset, 0, np.ascontiguousarray(keys), out)
        return out


#: the interface version this module calls (``KERNELS_VERSION`` of ``_ckernels.c``)
_VERSION = 3

#: the kernels once loaded; False: not tried yet; None: not available
_KERNELS: Kernels | None | bool = False


def enabled() -> bool:
    """False where the environment sets ``BHGROW_KERNELS`` to 0, false, no or off."""
    return os.environ.get("BHGROW_KERNELS", "1").strip().lower() not in ("0", "false", "no",
                                                                          "off")


def kernels() -> Kernels | None:
    """The compiled kernels, or None where the array code runs (extension not built, or
    switched off by ``BHGROW_KERNELS=0``)."""
    global _KERNELS
    if _KERNELS is False:
        _KERNELS = None
        if enabled():
            try:
                from . import _ckernels
            except ImportError:
                pass
            else:
                if getattr(_ckernels, "VERSION", None) == _VERSION:
                    _KERNELS = Kernels(_ckernels)
                else:       # an old build in a source checkout
                    warnings.warn("bhgrow's compiled kernels are out of date (rebuild with "
                                  "`pip install -e .`); running the array code instead",
                                  RuntimeWarning, stacklevel=2)
    return _KERNELS
