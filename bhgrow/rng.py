"""Counter-based random numbers that do not depend on chunking or worker count.

Every random draw in bhgrow is a pure function of (run seed, an object id such as a forest,
node or black-hole id, a step counter, a purpose code): the SplitMix64 output function
(Steele, Lea & Flood 2014, OOPSLA, "Fast splittable pseudorandom number generators") applied
in uint64 numpy arithmetic. No generator object is shared between forests, so a forest's
results are the same whether it runs alone, in a chunk of others, or on another worker
(DESIGN §2.5, §11). There is no global random state.

Use :func:`stream_keys` once per (seed, ids), then :func:`uniform` / :func:`normal` with a
distinct ``(step, purpose)`` per draw.
"""

from __future__ import annotations

import numpy as np

_M64 = (1 << 64) - 1
_GAMMA = 0x9E3779B97F4A7C15  # golden-ratio increment of SplitMix64
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)
_S30, _S27, _S31, _S11 = (np.uint64(s) for s in (30, 27, 31, 11))


def mix64(x: np.ndarray) -> np.ndarray:
    """SplitMix64 output function on a uint64 array (Steele, Lea & Flood 2014)."""
    x = x ^ (x >> _S30)
    x *= _MIX1
    x ^= x >> _S27
    x *= _MIX2
    x ^= x >> _S31
    return x


def hash64(keys: np.ndarray, step: int, purpose: int) -> np.ndarray:
    """64 random bits per key for (step, purpose): mix64(key + counter * golden gamma)."""
    offset = np.uint64(((4 * step + purpose + 1) * _GAMMA) & _M64)
    return mix64(keys + offset)


def uniform(keys: np.ndarray, step: int, purpose: int) -> np.ndarray:
    """Uniform doubles in [0, 1) from the top 53 bits of :func:`hash64`."""
    compiled = _compiled(keys) if np.asarray(keys).dtype == np.uint64 else None
    if compiled is not None:        # the same bits, in C (bhgrow._kernels)
        return compiled.uniform(((4 * step + purpose + 1) * _GAMMA) & _M64, keys)
    return (hash64(keys, step, purpose) >> _S11).astype(np.float64) * (2.0**-53)


def normal(keys: np.ndarray, step: int, purpose: int) -> np.ndarray:
    """Standard normal deviates by the Box-Muller transform (Box & Muller 1958).

    Uses the draws ``(step, purpose)`` and ``(step, purpose + 2)``; keep purposes used with
    :func:`normal` at least 3 apart from others of the same step.
    """
    u1 = uniform(keys, step, purpose)
    u2 = uniform(keys, step, purpose + 2)
    return np.sqrt(-2.0 * np.log1p(-u1)) * np.cos(2.0 * np.pi * u2)


def stream_keys(seed: int, ids: np.ndarray) -> np.ndarray:
    """Stream key of each id (forest, node or black hole): a hash of (seed, id)."""
    s = mix64(np.array([(int(seed) * _GAMMA + 0x243F6A8885A308D3) & _M64], dtype=np.uint64))
    ids = np.asarray(ids)
    compiled = _compiled(ids) if ids.dtype == np.int64 and ids.ndim == 1 else None
    if compiled is not None:        # the same bits, in C (bhgrow._kernels)
        return compiled.stream_keys(int(s[0]), _GAMMA, ids)
    fid = ids.astype(np.uint64)
    return mix64(mix64(fid ^ s) + np.uint64(_GAMMA))


def _compiled(a: np.ndarray):
    """The compiled kernels for a 1-d array of 64 or more values (smaller ones, and other
    shapes, stay in numpy, where the call costs less than the look-up)."""
    a = np.asarray(a)
    if a.ndim != 1 or a.size < 64:
        return None
    from ._kernels import kernels

    return kernels()
