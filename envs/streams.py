"""Per-copy counter-based random streams, drawn for all copies in one array pass.

A vector env must reproduce N single envs step for step, yet draw its random
numbers without a Python loop over copies. Each copy therefore owns a 64-bit
key and a draw counter; a draw is a pure function of (key, counter), computed
with the SplitMix64 finaliser (Steele, Lea & Flood 2014, "Fast splittable
pseudorandom number generators") over uint64 arrays. Copy i of a batch and a
single env with the same key see exactly the same numbers, because every draw
takes the same count of numbers from every copy.

The methods mirror numpy's Generator (``random``, ``uniform``, ``standard_normal``,
``integers``) with ``size`` whose first axis is the batch, so the physiology
core accepts either.
"""

from __future__ import annotations

import math

import numpy as np

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)
_S30, _S27, _S31, _S11, _S32 = (np.uint64(s) for s in (30, 27, 31, 11, 32))
_LOW32 = np.uint64(0xFFFFFFFF)
_INV32 = 1.0 / 4294967296.0
_TWO_PI = 2.0 * np.pi
_OFFSETS: dict[int, np.ndarray] = {}  # per-copy word offsets times the golden step


def _splitmix(x: np.ndarray) -> np.ndarray:
    x = x ^ (x >> _S30)
    x = x * _MIX1
    x = x ^ (x >> _S27)
    x = x * _MIX2
    return x ^ (x >> _S31)


class CopyStreams:
    """B independent random streams, one per copy.

    Args:
        keys: (B,) unsigned 64-bit keys, one per copy (drawn from each copy's
            ``np_random`` at reset, so Gymnasium seeding decides them).
    """

    def __init__(self, keys: np.ndarray):
        self.keys = np.asarray(keys, dtype=np.uint64).reshape(-1)
        self.counter = np.zeros(self.keys.shape[0], dtype=np.uint64)

    @property
    def batch(self) -> int:
        return self.keys.shape[0]

    def _words(self, per_copy: int) -> np.ndarray:
        """(per_copy, B) random words: row j holds word j of every copy.

        Laid out with the batch as the fast axis, because numpy broadcasts a short
        row over a long column many times slower than the other way round.
        """
        steps = _OFFSETS.get(per_copy)
        if steps is None:
            steps = _OFFSETS.setdefault(
                per_copy, (np.arange(per_copy, dtype=np.uint64) * _GOLDEN)[:, None])
        with np.errstate(over="ignore"):
            # Word j of copy b hashes key_b + (counter_b + j) * golden.
            start = self.keys + self.counter * _GOLDEN
            x = _splitmix(start + steps)
        self.counter += np.uint64(per_copy)
        return x

    def _bits(self, size) -> np.ndarray:
        size = (size,) if isinstance(size, (int, np.integer)) else tuple(size)
        if not size or size[0] != self.batch:
            raise ValueError(f"size {size} must start with the batch size {self.batch}")
        return self._words(math.prod(size[1:])).T.reshape(size)

    def random(self, size) -> np.ndarray:
        """Uniform floats in [0, 1) with 53 random bits."""
        return (self._bits(size) >> _S11).astype(np.float64) * (1.0 / 9007199254740992.0)

    def uniform(self, low=0.0, high=1.0, size=None) -> np.ndarray:
        return low + (np.asarray(high) - low) * self.random(size)

    def standard_normal(self, size) -> np.ndarray:
        """Gaussian draws by the Box-Muller transform.

        One 64-bit word gives two 32-bit uniforms, and each pair of uniforms gives
        two normals (cosine and sine branch), so a draw of n numbers per copy
        hashes ceil(n / 2) words.
        """
        size = (size,) if isinstance(size, (int, np.integer)) else tuple(size)
        if not size or size[0] != self.batch:
            raise ValueError(f"size {size} must start with the batch size {self.batch}")
        count = math.prod(size[1:])
        pairs = (count + 1) // 2
        bits = self._words(pairs)  # (pairs, B)
        u1 = (bits >> _S32).astype(np.float64) * _INV32
        u2 = (bits & _LOW32).astype(np.float64) * _INV32
        radius = np.sqrt(-2.0 * np.log1p(-u1))  # 1 - u1 in (0, 1]: the log is finite
        # Single-precision trigonometry runs on numpy's SIMD kernels, several times
        # faster than double; 24-bit angles are ample for simulation noise.
        angle = (_TWO_PI * u2).astype(np.float32)
        normals = np.empty((2 * pairs, self.batch))
        np.multiply(radius, np.cos(angle), out=normals[:pairs])
        np.multiply(radius, np.sin(angle), out=normals[pairs:])
        return normals[:count].T.reshape(size)

    def integers(self, low, high=None, size=None) -> np.ndarray:
        """Integers uniform in [low, high) (numpy's convention)."""
        if high is None:
            low, high = 0, low
        span = np.asarray(high) - np.asarray(low)
        return (np.asarray(low) + np.floor(self.random(size) * span)).astype(np.int64)

    def subset(self, mask: np.ndarray) -> CopyStreams:
        """Streams of the copies where ``mask`` is true (shares nothing; see merge)."""
        sub = CopyStreams(self.keys[mask])
        sub.counter = self.counter[mask].copy()
        return sub

    def merge(self, mask: np.ndarray, sub: CopyStreams) -> None:
        """Write back the counters of a subset after drawing from it."""
        self.keys[mask] = sub.keys
        self.counter[mask] = sub.counter

    def rekey(self, mask: np.ndarray, keys: np.ndarray) -> None:
        """Give the masked copies new keys and restart their counters (a new episode)."""
        self.keys[mask] = np.asarray(keys, dtype=np.uint64)
        self.counter[mask] = 0


def key_from(generator: np.random.Generator) -> np.uint64:
    """Draw a stream key from a copy's Gymnasium ``np_random``."""
    return np.uint64(generator.integers(0, 2**63, dtype=np.int64))
