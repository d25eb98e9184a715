"""The engine's compiled kernels (C extension ``bhgrow.physics._ckernels``), loaded once.

Two steps of the engine's inner loop have a compiled kernel beside their array code, which
stays the reference they are tested against:

* the coupled gas-hole solver, :func:`bhgrow.physics.coupled.advance` (array code:
  ``coupled._advance``);
* the reservoir step of halos without a black hole, :meth:`StarFormation.step` (array code:
  ``StarFormation._evolve``), used by the engine when the model's star formation is
  :class:`~bhgrow.physics.gas.StarFormation` itself.

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
        from . import coupled as cp

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
        from . import gas as gs

        for name, a in (("gas", gas), ("stars", stars), ("metals", metals), ("blown", blown)):
            if a.dtype != np.float64 or not a.flags.c_contiguous:
                raise ValueError(f"quiet_step: `{name}` must be a C-contiguous float64 array")
        self._ext.quiet_step(
            (float(sf.efficiency), float(sf.v0_kms), float(sf.alpha), float(sf.recycle),
             float(sf.metal_yield), float(gs._X_SERIES)),
            _f64(gs._C_PHI1), _f64(gs._C_PHI2), _f64(gs._C_PSI),
            _f64(inflow), _f64(t_dyn), _f64(v_c), _f64(dt),
            np.ascontiguousarray(where, dtype=np.bool_), gas, stars, metals, blown)


#: the interface version this module calls (``KERNELS_VERSION`` of ``_ckernels.c``)
_VERSION = 1

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
