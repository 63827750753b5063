"""The random generator of the particle filter, bit for bit the one in the generated C.

Uniforms come from the "minimal standard" Lehmer generator with multiplier 48271 (Park, Miller &
Stockmeyer, Comm. ACM 36(7), 1993): ``x[k+1] = 48271 x[k] mod (2^31 - 1)``, a public-domain
recurrence with 31 bits of state in one 32-bit word. On a Cortex-M0+ it is one 32x32->64
multiply and a few adds (no division: ``2^31 = 1`` modulo the prime, so the product folds).

Gaussian draws use Marsaglia's polar method (Marsaglia & Bray, SIAM Review 6(3), 1964): two
uniforms on (-1, 1), accepted inside the unit disc, give two independent standard normals with
one logarithm and one square root; the second is kept for the next call. The rejection loop has
a fixed bound (:data:`POLAR_TRIES` pairs; the chance of using them all is 0.2146^32 < 1e-21,
and the draw is then 0).

The C copy in the particle filter template performs the same integer steps and the same double
operations in the same order; the host C library's ``log`` and ``sqrt`` are the ones Python's
``math`` calls, so with the same seed the double C and :class:`Rng` give identical numbers.
"""

from __future__ import annotations

import math
from typing import List, Tuple

import numpy as np

__all__ = ["MODULUS", "MULTIPLIER", "POLAR_TRIES", "Rng", "mix32", "seed_state", "next_state",
           "uniform_double", "uniform_float"]

MODULUS = 2147483647  #: 2^31 - 1, prime
MULTIPLIER = 48271
POLAR_TRIES = 32
_TWO_M31 = 2.0 ** -31


def mix32(h: int) -> int:
    """The 32-bit finalizer of MurmurHash3 (Appleby, public domain; constants from memory):
    spreads small, consecutive seeds over the whole state space."""
    h &= 0xFFFFFFFF
    h ^= h >> 16
    h = (h * 0x85EBCA6B) & 0xFFFFFFFF
    h ^= h >> 13
    h = (h * 0xC2B2AE35) & 0xFFFFFFFF
    h ^= h >> 16
    return h


def seed_state(seed: int) -> int:
    """The generator state for a 32-bit seed: ``1 + mix32(seed) mod (2^31 - 2)``, in [1, 2^31 - 2]."""
    return 1 + mix32(int(seed)) % (MODULUS - 1)


def next_state(x: int) -> int:
    """One Lehmer step without division: ``p = 48271 x``, ``p mod (2^31-1) = (p & (2^31-1)) + (p >> 31)``
    folded once more."""
    p = MULTIPLIER * x
    t = (p & 0x7FFFFFFF) + (p >> 31)
    return t - MODULUS if t >= MODULUS else t


def uniform_double(x: int) -> float:
    """The double uniform of state ``x``: ``x 2^-31``, exact, in (0, 1)."""
    return x * _TWO_M31


def uniform_float(x: int) -> float:
    """The float build's uniform of state ``x``: ``(2 (x >> 8) + 1) 2^-24``, exact in float32, in (0, 1)."""
    return float(np.float32((2 * (x >> 8) + 1) * 2.0 ** -24))


class Rng:
    """The particle filter's generator (double build): uniforms and standard normals."""

    def __init__(self, seed: int = 1) -> None:
        self.state = seed_state(seed)
        self.spare = 0.0
        self.has_spare = False

    def reseed(self, seed: int) -> None:
        """Restart from ``seed`` (what the C's reseed function does; drops a kept normal)."""
        self.state = seed_state(seed)
        self.spare = 0.0
        self.has_spare = False

    def snapshot(self) -> Tuple[int, float, bool]:
        return self.state, self.spare, self.has_spare

    def restore(self, snap: Tuple[int, float, bool]) -> None:
        self.state, self.spare, self.has_spare = snap

    def next_u32(self) -> int:
        """Advance and return the new state (in [1, 2^31 - 2])."""
        self.state = next_state(self.state)
        return self.state

    def uniform(self) -> float:
        """A uniform draw on (0, 1)."""
        return uniform_double(self.next_u32())

    def _pair(self) -> Tuple[float, float]:
        for _ in range(POLAR_TRIES):
            v1 = 2.0 * self.uniform() - 1.0
            v2 = 2.0 * self.uniform() - 1.0
            s = v1 * v1 + v2 * v2
            if 0.0 < s < 1.0:
                f = math.sqrt(-2.0 * math.log(s) / s)
                return v1 * f, v2 * f
        return 0.0, 0.0

    def normal(self) -> float:
        """A standard normal draw."""
        if self.has_spare:
            self.has_spare = False
            return self.spare
        a, b = self._pair()
        self.spare = b
        self.has_spare = True
        return a

    def normals(self, count: int) -> np.ndarray:
        """``count`` standard normals in draw order."""
        out: List[float] = [self.normal() for _ in range(int(count))]
        return np.array(out, dtype=float)
