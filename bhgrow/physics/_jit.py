"""The compiled kernels (numba), loaded once at first use.

Two parts of the engine's inner loop have a compiled kernel beside their array code: the
coupled gas-hole solver (:func:`bhgrow.physics.coupled.advance`,
:mod:`bhgrow.physics._coupled_jit`) and the reservoir step of halos without a black hole
(:meth:`bhgrow.physics.gas.StarFormation.step`, :mod:`bhgrow.physics._gas_jit`). Each kernel
follows its array code formula by formula; the array code is the reference the kernels are
tested against, and runs instead where numba cannot be imported or the environment sets
``BHGROW_JIT=0``.

Loading takes ~0.3-0.5 s (numba's import and the cached machine code); compiling afresh,
once per installation, ~5-10 s (cached beside the modules, or in numba's user cache
directory where that is read-only). It happens at the first growth step, so commands that
never grow a black hole do not pay for it.
"""

from __future__ import annotations

import os
from typing import Callable, NamedTuple

__all__ = ["Kernels", "kernels"]


class Kernels(NamedTuple):
    """The compiled kernels (see the module notes)."""

    #: :func:`bhgrow.physics._coupled_jit.advance_halos`
    advance_halos: Callable
    #: :func:`bhgrow.physics._gas_jit.quiet_step`
    quiet_step: Callable


#: the kernels once loaded; False: not tried yet; None: not available
_KERNELS: Kernels | None | bool = False


def kernels() -> Kernels | None:
    """The compiled kernels, or None where the array code runs (numba missing, or
    ``BHGROW_JIT`` set to 0, false, no or off)."""
    global _KERNELS
    if _KERNELS is False:
        _KERNELS = None
        if os.environ.get("BHGROW_JIT", "1").strip().lower() not in ("0", "false", "no",
                                                                      "off"):
            try:
                from ._coupled_jit import advance_halos
                from ._gas_jit import quiet_step
            except ImportError:
                pass
            else:
                _KERNELS = Kernels(advance_halos, quiet_step)
    return _KERNELS
