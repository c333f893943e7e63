"""The random streams: every draw's source, one per image (or online item) and purpose.

Each stream is `Generator(PCG64(SeedSequence(seed, spawn_key=key)))`, spawned, never offset,
from the spec seed; the key says whose stream it is (STREAMS lists the domains), so image i
is the same whatever else is drawn, however the work is cut into shards or spread over
workers.

Making one such generator costs about 20 microseconds, more than the rest of drawing an
image's parameters. `first_doubles` gives the first k draws of `random()` of many streams at
once, bit for bit those of numpy's own generators, by running SeedSequence's hash mixing and
PCG64's seeding and steps on numpy arrays, one element per stream (a test compares it with
numpy on random keys; numpy's implementation is the reference).
"""

from __future__ import annotations

import numpy as np

# THE registry of seed-stream domains. Purposes (last spawn-key item): the transform
# parameters, and everything the renderer draws (background, distractors).
PARAMS, RENDER = 0, 1
# Domain tags, first spawn-key item of streams that are not a generated image's: the online
# sampler's (ONLINE, split, epoch, index, purpose) and the albumentations transforms' per-item
# (PLUGIN, split, epoch, item). Their keys have lengths no image key (split, index, purpose)
# has, so no two domains ever share a stream.
ONLINE = 0x6F6E6C6E
PLUGIN = 0x616C6275
STREAMS = {"image": "(split_index, index, purpose)", "online": "(ONLINE, split_index, epoch, index, purpose)",
           "plugin": "(PLUGIN, split_index, epoch, item)"}


def stream(seed: int, *key: int) -> np.random.Generator:
    """The generator spawned from `seed` by `key`."""
    ss = np.random.SeedSequence(int(seed), spawn_key=tuple(int(k) for k in key))
    return np.random.Generator(np.random.PCG64(ss))


def image_rng(seed: int, split_index: int, image_index: int, purpose: int = PARAMS) -> np.random.Generator:
    """The stream of one image for one purpose."""
    return stream(seed, split_index, image_index, purpose)


def online_rng(seed: int, split_index: int, epoch: int, index: int, purpose: int) -> np.random.Generator:
    """The stream of one online item: (ONLINE, split, epoch, index, purpose)."""
    return stream(seed, ONLINE, split_index, epoch, index, purpose)


def plugin_rng(seed: int, split_index: int, epoch: int, item: int) -> np.random.Generator:
    """The stream of one item an albumentations transform places: (PLUGIN, split, epoch, item)."""
    return stream(seed, PLUGIN, split_index, epoch, item)


def image_uniforms(seed: int, split_index: int, indices, k: int) -> np.ndarray:
    """(N, k) uniforms in [0, 1): row i is the first k draws of image indices[i]'s PARAMS stream."""
    idx = np.asarray(indices, dtype=np.int64).ravel()
    return first_doubles(seed, (split_index,), idx, (PARAMS,), k)


class LazyStream:
    """A numpy Generator made on first use, standing in for one: the draws are those of the
    generator itself, but a render that draws nothing (a solid background, no distractors)
    never pays for seeding it."""

    __slots__ = ("_make", "_gen")

    def __init__(self, make):
        self._make = make
        self._gen = None

    def __getattr__(self, name: str):
        if self._gen is None:
            self._gen = self._make()
        return getattr(self._gen, name)


def lazy_image_rng(seed: int, split_index: int, image_index: int, purpose: int = RENDER) -> LazyStream:
    """`image_rng(...)`, seeded only when something is drawn from it."""
    return LazyStream(lambda: image_rng(seed, split_index, image_index, purpose))


# ---- many streams at once --------------------------------------------------------------------
# SeedSequence (numpy/random/bit_generator.pyx) and PCG64 (numpy/random/src/pcg64), restated on
# arrays. Every constant below is numpy's; the comparison test is what vouches for them.

_M32 = 0xFFFFFFFF
_POOL = 4
_INIT_A, _MULT_A = 0x43B0D7E5, 0x931E8875
_INIT_B, _MULT_B = 0x8B51F9DD, 0x58F38DED
_MIX_L, _MIX_R = 0xCA01F9DD, 0x4973F715
_PCG_MULT = 0x2360ED051FC65DA44385DF649FCCF645  # PCG's default 128-bit LCG multiplier
_U32, _U64 = np.uint32, np.uint64


def _words(n: int) -> list[int]:
    """A non-negative int as SeedSequence reads it: 32-bit words, least significant first."""
    n = int(n)
    if n < 0:
        raise ValueError(f"stream keys are non-negative, got {n}")
    out = [n & _M32]
    n >>= 32
    while n:
        out.append(n & _M32)
        n >>= 32
    return out


def first_doubles(seed: int, head: tuple, varying: np.ndarray, tail: tuple, k: int) -> np.ndarray:
    """(N, k): row i holds the first k values of `stream(seed, *head, varying[i], *tail).random()`.
    `varying`: integers of any size (an integer array, or Python ints beyond 64 bits)."""
    varying = np.asarray(varying).ravel()
    python_ints = varying.dtype.kind == "O" and all(isinstance(v, int) for v in varying)
    if varying.dtype.kind not in "iu" and not python_ints:
        raise TypeError(f"stream keys are integers, got {varying.dtype}")  # as SeedSequence refuses floats
    out = np.empty((len(varying), k), dtype=float)
    if not len(varying):
        return out
    if int(varying.min()) < 0:
        raise ValueError(f"stream keys are non-negative, got {int(varying.min())}")
    small = np.array([v <= _M32 for v in varying], bool) if python_ints else varying <= _M32
    # one 32-bit word each: a single entropy layout for the lot; beyond 2**32 images, numpy
    # itself, one stream at a time
    for row in np.flatnonzero(~small):
        out[row] = stream(seed, *head, int(varying[row]), *tail).random(k)
    rows = np.flatnonzero(small)
    run = _words(seed)
    if len(run) < _POOL:
        run += [0] * (_POOL - len(run))
    before = run + [w for h in head for w in _words(h)]
    after = [w for t in tail for w in _words(t)]
    n = len(rows)
    entropy = ([np.full(n, w, _U32) for w in before] + [varying[rows].astype(_U32)]
               + [np.full(n, w, _U32) for w in after])
    out[rows] = _pcg64_doubles(_generate_state(_mix_entropy(entropy)), k)
    return out


class _Hash:
    """SeedSequence's hashmix (mix_entropy's, with the A constants; generate_state's, with the
    B constants): the running constant depends only on how often it was called."""

    def __init__(self, init: int, mult: int):
        self.const, self.mult = init, mult

    def __call__(self, value: np.ndarray) -> np.ndarray:
        value = value ^ _U32(self.const)
        self.const = (self.const * self.mult) & _M32
        value = value * _U32(self.const)
        return value ^ (value >> _U32(16))


def _mix(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    r = x * _U32(_MIX_L) - y * _U32(_MIX_R)
    return r ^ (r >> _U32(16))


def _mix_entropy(entropy: list[np.ndarray]) -> list[np.ndarray]:
    """SeedSequence.mix_entropy: the pool of 4 words per stream."""
    hashmix = _Hash(_INIT_A, _MULT_A)
    zero = np.zeros_like(entropy[0])
    pool = [hashmix(entropy[i] if i < len(entropy) else zero) for i in range(_POOL)]
    for src in range(_POOL):
        for dst in range(_POOL):
            if src != dst:
                pool[dst] = _mix(pool[dst], hashmix(pool[src]))
    for src in range(_POOL, len(entropy)):
        for dst in range(_POOL):
            pool[dst] = _mix(pool[dst], hashmix(entropy[src]))
    return pool


def _generate_state(pool: list[np.ndarray]) -> list[np.ndarray]:
    """SeedSequence.generate_state(4, uint64): 8 hashed words cycling over the pool, paired
    little-endian into 4 uint64."""
    hashmix = _Hash(_INIT_B, _MULT_B)
    words = [hashmix(pool[i % _POOL]).astype(_U64) for i in range(8)]
    return [words[2 * j] | (words[2 * j + 1] << _U64(32)) for j in range(4)]


def _mulhi(a: np.ndarray, b: int) -> np.ndarray:
    """High 64 bits of the 128-bit product of uint64 `a` and the constant `b`."""
    a0, a1 = a & _U64(_M32), a >> _U64(32)
    b0, b1 = _U64(b & _M32), _U64(b >> 32)
    p00, p01, p10, p11 = a0 * b0, a0 * b1, a1 * b0, a1 * b1
    mid = (p00 >> _U64(32)) + (p01 & _U64(_M32)) + (p10 & _U64(_M32))
    return p11 + (p01 >> _U64(32)) + (p10 >> _U64(32)) + (mid >> _U64(32))


def _add128(ah, al, bh, bl):
    lo = al + bl
    return ah + bh + (lo < al).astype(_U64), lo


def _step(hi, lo, inc_hi, inc_lo):
    """state * multiplier + increment, modulo 2**128."""
    m_hi, m_lo = _PCG_MULT >> 64, _PCG_MULT & ((1 << 64) - 1)
    p_lo = lo * _U64(m_lo)
    p_hi = hi * _U64(m_lo) + lo * _U64(m_hi) + _mulhi(lo, m_lo)
    return _add128(p_hi, p_lo, inc_hi, inc_lo)


def _pcg64_doubles(state: list[np.ndarray], k: int) -> np.ndarray:
    """PCG64 seeded from SeedSequence words (seed = w0:w1, sequence = w2:w3), then k of
    Generator.random(): XSL-RR output, top 53 bits times 2**-53."""
    s_hi, s_lo, q_hi, q_lo = state
    inc_hi = (q_hi << _U64(1)) | (q_lo >> _U64(63))
    inc_lo = (q_lo << _U64(1)) | _U64(1)
    hi, lo = inc_hi, inc_lo  # state 0, one step
    hi, lo = _add128(hi, lo, s_hi, s_lo)
    hi, lo = _step(hi, lo, inc_hi, inc_lo)
    out = np.empty((len(hi), k), dtype=float)
    for j in range(k):
        hi, lo = _step(hi, lo, inc_hi, inc_lo)
        x = hi ^ lo
        rot = hi >> _U64(58)
        x = (x >> rot) | (x << ((_U64(64) - rot) & _U64(63)))
        out[:, j] = (x >> _U64(11)).astype(float) * (1.0 / 9007199254740992.0)
    return out
