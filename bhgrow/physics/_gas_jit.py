"""Compiled kernel of the engine's quiet-halo reservoir step (:meth:`StarFormation.step`).

The closed-form step of :meth:`bhgrow.physics.gas.StarFormation._evolve` without the
metal-flow integrals, written as a loop over halos and compiled with numba (Lam, Pitrou &
Seibert 2015): the same formulas in the same order, with the same 12-term series of the
phi-functions below ``a dt = 0.05`` (Hochbruck & Ostermann 2010). The array code stays as
the reference it is tested against (``tests/physics/test_gas.py``). Why: most halos of a
snapshot hold no black hole, and the array form of this step makes ~20 temporaries per
block of halos; here each halo's step runs in registers and only the rows selected are
written.

References
----------
.. [LPS15] Lam S. K., Pitrou A., Seibert S., 2015, Proc. Second Workshop on the LLVM
   Compiler Infrastructure in HPC, 7 (numba)
.. [HO10] Hochbruck M., Ostermann A., 2010, Acta Numerica, 19, 209

Journal references from memory.
"""

from __future__ import annotations

import numpy as np
from numba import njit, types

from .gas import _C_PHI1, _C_PHI2, _C_PSI, _X_SERIES

__all__ = ["quiet_step"]

_SX = float(_X_SERIES)
# the series as tuples of floats, frozen into the compiled code
_P1 = tuple(float(c) for c in _C_PHI1)
_P2 = tuple(float(c) for c in _C_PHI2)
_PS = tuple(float(c) for c in _C_PSI)
_N = len(_P1)

_IN = types.Array(types.float64, 1, "C", readonly=True)      # also takes writable arrays
_OUT = types.Array(types.float64, 1, "C")


@njit(cache=True, error_model="numpy", nogil=True)
def _horner(x, c):
    out = c[_N - 1]
    for k in range(_N - 2, -1, -1):
        out = out * x + c[k]
    return out


@njit(types.void(types.float64, types.float64, types.float64, types.float64, types.float64,
                 _IN, _IN, _IN, _IN, types.Array(types.boolean, 1, "C", readonly=True),
                 _OUT, _OUT, _OUT, _OUT),
      cache=True, error_model="numpy", nogil=True)
def quiet_step(efficiency, v0_kms, alpha, recycle, metal_yield, inflow, t_dyn, v_c, dt_gyr,
               where, gas, stars, metals, blown):
    """One reservoir step for the rows where ``where`` is true, in place: ``gas``,
    ``stars``, ``metals`` (Msun) and the gas blown out over the step, ``blown`` (Msun).

    The first five arguments are the :class:`~bhgrow.physics.gas.StarFormation` parameters;
    ``inflow`` (Msun/Gyr), ``t_dyn`` (Gyr), ``v_c`` (km/s) and ``dt_gyr`` are per row.
    """
    r = recycle
    for i in range(gas.size):
        if not where[i]:
            continue
        dt = dt_gyr[i]
        eta = (v_c[i] / v0_kms) ** (-alpha)
        s = efficiency / t_dyn[i]
        a = (1.0 - r + eta) * s
        x = a * dt
        e = np.exp(-x)
        if x < _SX:
            phi1, phi2, psi = _horner(x, _P1), _horner(x, _P2), _horner(x, _PS)
        else:
            em1 = 1.0 - e
            phi1 = em1 / x
            phi2 = (x - em1) / (x * x)
            psi = (em1 - x * e) / (x * x)
        p = metal_yield * (1.0 - r) * s
        mg0, inf = gas[i], inflow[i]
        mg_int = mg0 * dt * phi1 + inf * dt * dt * phi2
        gas[i] = mg0 * e + inf * dt * phi1
        metals[i] = metals[i] * e + p * (mg0 * dt * e + inf * dt * dt * psi)
        stars[i] = stars[i] + (1.0 - r) * s * mg_int
        blown[i] = eta * s * mg_int
