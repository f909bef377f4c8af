"""xoshiro256** pseudo-random generator for the compiled engine.

State is a uint64[4] array owned by the caller, so a simulation's random stream is explicit,
can be checkpointed, and is reproduced exactly by the C reference in benchmarks/.
Blackman & Vigna, "Scrambled linear pseudorandom number generators", ACM TOMS 47 (2021) 36.
Seeds come from numpy's SeedSequence (see seed_state).
"""

from __future__ import annotations

import numpy as np
from numba import njit

_U7 = np.uint64(7)
_U9 = np.uint64(9)
_U5 = np.uint64(5)
_U17 = np.uint64(17)
_U45 = np.uint64(45)
_U11 = np.uint64(11)
_U64 = np.uint64(64)
_INV53 = 1.0 / 9007199254740992.0


@njit(inline="always", cache=True)
def _rotl(x, k):
    return (x << k) | (x >> (_U64 - k))


@njit(inline="always", cache=True)
def next_u64(s):
    """The next 64-bit output of the xoshiro256** state ``s`` (updated in place)."""
    result = _rotl(s[1] * _U5, _U7) * _U9
    t = s[1] << _U17
    s[2] ^= s[0]
    s[3] ^= s[1]
    s[1] ^= s[2]
    s[0] ^= s[3]
    s[2] ^= t
    s[3] = _rotl(s[3], _U45)
    return result


@njit(inline="always", cache=True)
def uniform(s):
    """A double in [0, 1) with 53 random bits."""
    return float(next_u64(s) >> _U11) * _INV53


@njit(inline="always", cache=True)
def below(s, n):
    """An integer in [0, n)."""
    k = int(uniform(s) * n)
    return k if k < n else n - 1


def seed_state(seed: np.random.SeedSequence | int | list[int]) -> np.ndarray:
    """A fresh xoshiro256** state from a SeedSequence (or anything SeedSequence accepts)."""
    ss = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    state = ss.generate_state(4, dtype=np.uint64)
    if not state.any():  # the all-zero state is the one forbidden state
        state[0] = np.uint64(1)
    return state.astype(np.uint64)
