"""Counter-based uniform random numbers per ion: the same ion gets the same draw in any
order, chunking or thread count.
"""

from __future__ import annotations

import numba
import numpy as np

from ..exceptions import InputError

__all__ = ['ion_uniforms', 'draw_key']

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)


_M1 = np.uint64(0xBF58476D1CE4E5B9)


_M2 = np.uint64(0x94D049BB133111EB)


_STREAM = np.uint64(0x6D65_7461_6C5F_6472)  # a fixed stream constant for the metal draws


_TO_UNIT = np.float64(1.0 / 9007199254740992.0)  # 2**-53


@numba.njit(cache=True, nogil=True, inline="always")
def _mix64(z):
    z = (z ^ (z >> np.uint64(30))) * _M1
    z = (z ^ (z >> np.uint64(27))) * _M2
    return z ^ (z >> np.uint64(31))


@numba.njit(cache=True, nogil=True, inline="always")
def _uniform(key, row):
    # the row-th output of a splitmix64 sequence started at key: a pure function of (key, row)
    h = _mix64(key + (np.uint64(row) + np.uint64(1)) * _GOLDEN)
    return np.float64(np.int64(h >> np.uint64(11))) * _TO_UNIT


@numba.njit(cache=True, nogil=True)
def _uniforms_kernel(key, start, out):
    for i in range(out.size):
        out[i] = _uniform(key, start + i)


def draw_key(seed) -> np.uint64:
    """The 64-bit key of the metal draws for an integer ``seed`` (any Python int)."""
    if isinstance(seed, (bool, np.bool_)) or not isinstance(seed, (int, np.integer)):
        raise InputError(f"seed must be an integer, got {seed!r}")
    s = np.uint64(int(seed) % (1 << 64))
    with np.errstate(over="ignore"):
        return np.uint64(_mix64(s ^ _STREAM))


def ion_uniforms(seed, start: int, n: int) -> np.ndarray:
    """The uniform numbers in [0, 1) of the metal draws of ions ``start .. start + n - 1``.

    Ion ``i`` of a run (its row in the file, or its index in an in-memory ion list) always gets
    the same number for the same ``seed``, whatever the chunking.
    """
    if int(start) < 0 or int(n) < 0:
        raise InputError(f"ion_uniforms: start and n must be >= 0, got {start}, {n}")
    out = np.empty(int(n), np.float64)
    _uniforms_kernel(draw_key(seed), np.int64(start), out)
    return out
