"""Per-copy counter-based random streams, compiled.

A vector env must reproduce N single envs step for step. Each copy therefore
owns a 64-bit key and a draw counter, and a draw is a pure function of
(key, counter): word j of copy b is the SplitMix64 finaliser (Steele, Lea &
Flood 2014, "Fast splittable pseudorandom number generators") of
key_b + (counter_b + j) * golden, in wrapping uint64 arithmetic. Copy i of a
batch and a single env with the same key see exactly the same numbers, because
every draw takes the same count of words from every copy.

The draw functions here are numba kernels that the task kernels call copy by
copy (``draw_word``, ``draw_uniform``, ``draw_normals``), inlined where they
are called so that no per-copy call pays reference counting; :class:`CopyStreams`
holds the keys and counters of B copies and offers numpy Generator-like
methods (``random``, ``uniform``, ``standard_normal``, ``integers``) whose
``size`` starts with the batch, built on the same kernels.
"""

from __future__ import annotations

import math

import numpy as np

from needbench.envs.compiled import inline_kernel, kernel

GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)
_S30, _S27, _S31, _S11, _S32 = (np.uint64(s) for s in (30, 27, 31, 11, 32))
_ONE = np.uint64(1)
_LOW32 = np.uint64(0xFFFFFFFF)
_INV53 = 1.0 / 9007199254740992.0
_INV32 = 1.0 / 4294967296.0
_TWO_PI = 2.0 * math.pi


@inline_kernel
def splitmix(x):
    """The SplitMix64 finaliser of one uint64 word."""
    x = x ^ (x >> _S30)
    x = x * _MIX1
    x = x ^ (x >> _S27)
    x = x * _MIX2
    return x ^ (x >> _S31)


@inline_kernel
def draw_word(keys, counters, b):
    """The next random uint64 word of copy ``b`` (advances its counter)."""
    x = splitmix(keys[b] + counters[b] * GOLDEN)
    counters[b] += _ONE
    return x


@inline_kernel
def draw_uniform(keys, counters, b):
    """The next uniform float of copy ``b`` in [0, 1), with 53 random bits."""
    return float(draw_word(keys, counters, b) >> _S11) * _INV53


@kernel
def draw_normals(keys, counters, b, out):
    """Fill ``out`` (n,) with standard normal draws of copy ``b`` (Box-Muller).

    One word gives two 32-bit uniforms (u1 high, u2 low) and each pair gives two
    normals: the cosine branches fill the first ceil(n / 2) entries, the sine
    branches the rest, so a draw of n numbers takes ceil(n / 2) words.
    """
    count = out.shape[0]
    pairs = (count + 1) // 2
    for j in range(pairs):
        word = draw_word(keys, counters, b)
        u1 = float(word >> _S32) * _INV32
        u2 = float(word & _LOW32) * _INV32
        radius = math.sqrt(-2.0 * math.log1p(-u1))  # 1 - u1 in (0, 1]: the log is finite
        # Single-precision trigonometry costs about half of double; 24-bit angles
        # are ample for simulation noise.
        angle = np.float32(_TWO_PI * u2)
        out[j] = radius * math.cos(angle)
        if pairs + j < count:
            out[pairs + j] = radius * math.sin(angle)


@kernel
def _fill_uniform(keys, counters, out):
    for b in range(out.shape[0]):
        for j in range(out.shape[1]):
            out[b, j] = draw_uniform(keys, counters, b)


@kernel
def _fill_normal(keys, counters, out):
    for b in range(out.shape[0]):
        draw_normals(keys, counters, b, out[b])


def _batch_shape(size, batch: int) -> tuple[int, ...]:
    size = (size,) if isinstance(size, (int, np.integer)) else tuple(size)
    if not size or size[0] != batch:
        raise ValueError(f"size {size} must start with the batch size {batch}")
    return size


class CopyStreams:
    """B independent random streams, one per copy.

    Args:
        keys: (B,) unsigned 64-bit keys, one per copy (drawn from each copy's
            ``np_random`` at reset, so Gymnasium seeding decides them).
    """

    def __init__(self, keys: np.ndarray):
        self.keys = np.array(keys, dtype=np.uint64).reshape(-1)
        self.counter = np.zeros(self.keys.shape[0], dtype=np.uint64)

    @property
    def batch(self) -> int:
        return self.keys.shape[0]

    def random(self, size) -> np.ndarray:
        """Uniform floats in [0, 1) with 53 random bits, shape ``size`` (batch first)."""
        size = _batch_shape(size, self.batch)
        out = np.empty((self.batch, math.prod(size[1:])))
        _fill_uniform(self.keys, self.counter, out)
        return out.reshape(size)

    def uniform(self, low=0.0, high=1.0, size=None) -> np.ndarray:
        return low + (np.asarray(high) - low) * self.random(size)

    def standard_normal(self, size) -> np.ndarray:
        """Standard normal draws (see :func:`draw_normals`), shape ``size``."""
        size = _batch_shape(size, self.batch)
        out = np.empty((self.batch, math.prod(size[1:])))
        _fill_normal(self.keys, self.counter, out)
        return out.reshape(size)

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


class EpisodeKeys:
    """The stream keys of B copies' episodes, each copy drawing from its own generator.

    Copy i's keys are exactly the successive :func:`key_from` draws of its
    generator (numpy draws a block of bounded integers as the same sequence
    as one at a time), taken a block at a time so that the autoreset of many
    copies costs no Python call per copy.
    """

    BLOCK = 64

    def __init__(self, generators: list[np.random.Generator]):
        self.generators = generators
        self.buffer = np.empty((len(generators), self.BLOCK), dtype=np.uint64)
        self.used = np.full(len(generators), self.BLOCK, dtype=np.int64)

    def next(self, copies: np.ndarray) -> np.ndarray:
        """The next key of each copy in ``copies`` (indices, ascending)."""
        for i in copies[self.used[copies] >= self.BLOCK]:
            self.buffer[i] = self.generators[i].integers(0, 2**63, size=self.BLOCK,
                                                         dtype=np.int64)
            self.used[i] = 0
        keys = self.buffer[copies, self.used[copies]]
        self.used[copies] += 1
        return keys


def as_streams(rng, batch: int) -> CopyStreams:
    """``rng`` as B copy streams: CopyStreams as they are, a numpy Generator as
    the source of B fresh keys."""
    if isinstance(rng, CopyStreams):
        if rng.batch != batch:
            raise ValueError(f"streams of {rng.batch} copies given for a batch of {batch}")
        return rng
    if isinstance(rng, np.random.Generator):
        return CopyStreams(np.array([key_from(rng) for _ in range(batch)], dtype=np.uint64))
    raise TypeError(f"rng must be CopyStreams or a numpy Generator, not {type(rng).__name__}")
