"""Counter-based sample values: each depends only on (seed, frame, pixel, sample index, dimension).

No state is carried from one sample to the next, so any split of a pixel's samples over batches
and machines draws exactly the same numbers (docs/design.md, invariant 1).

Two modes:
  * SOBOL (0): Owen-scrambled Sobol points with hash-based nested uniform scrambling and index
    shuffling, padded in groups of four dimensions (Burley 2020, "Practical Hash-based Owen
    Scrambling", JCGT 9(4)). Dimension `dim` belongs to group g = dim // 4; each (pixel, group)
    gets its own seed. The sample index is shuffled by a nested uniform scramble keyed on that
    seed, the shuffled index picks a point of the 4-D Sobol sequence, and coordinate dim % 4 of
    it is Owen scrambled with a seed derived from the group seed and dim % 4.
  * RANDOM (1): an independent uniform value hashed from all five keys (the baseline the
    benchmarks compare Sobol against).

Owen scrambling keeps every (t, m, s)-net property of the unscrambled points (Owen 1995), and a
nested uniform scramble of the index maps every aligned block of 2^k indices onto another aligned
block, so the samples [j 2^k, (j + 1) 2^k) of a pixel are stratified like the first 2^k Sobol
points: one point per 1/2^k stratum in each dimension, and dimensions (4g, 4g + 1) form a
(0, k, 2)-net. Other pairs of a group are weaker (t = 1 or 2 for small k; see the tests), so a
caller's best 2-D pair is (4g, 4g + 1).

Sample indices run over [0, 2^63): each block of 2^32 indices is a separately scrambled sequence
(the index's high word is folded into the group seed).

All integer work is done in uint64 holding 32-bit values, masked after every multiply: numba
types uint32 arithmetic inconsistently, and mixing signed and unsigned operands gives float64.
"""

from __future__ import annotations

import numpy as np
from numba import njit

SOBOL = 0
RANDOM = 1

_M32 = np.uint64(0xFFFFFFFF)
_TO_UNIT = 1.0 / 4294967296.0  # 2^-32: a 32-bit value k maps to k / 2^32 in [0, 1)
_KEY_SALT = 0x6C616D70  # any constant; keeps key (0, 0, 0) away from hash_u32's fixed point at 0

# Primitive polynomials and initial direction numbers m_k of Sobol dimensions 2..4 from Joe & Kuo,
# file new-joe-kuo-6.21201 (s = degree, a = the polynomial's inner coefficients as bits,
# m = m_1..m_s). Dimension 1 is van der Corput (v_k = 2^(32-k)). Values from memory, checked
# bit-for-bit against scipy.stats.qmc.Sobol in the tests.
_JOE_KUO = ((1, 0, (1,)), (2, 1, (1, 3)), (3, 1, (1, 3, 1)))


def _direction_vectors() -> np.ndarray:
    """Direction numbers v[d, k] (4, 32) uint32 of Sobol dimensions 1..4, bit k = 0 first.

    Recurrence of Bratley & Fox (1988) as written by Joe & Kuo (2003):
    v_k = a_1 v_(k-1) ^ ... ^ a_(s-1) v_(k-s+1) ^ v_(k-s) ^ (v_(k-s) >> s).
    """
    v = np.zeros((4, 32), dtype=np.uint32)
    v[0] = [1 << (31 - k) for k in range(32)]
    for d, (s, a, m) in enumerate(_JOE_KUO, start=1):
        col = [0] * 32
        for k in range(s):
            col[k] = m[k] << (31 - k)
        for k in range(s, 32):
            x = col[k - s] ^ (col[k - s] >> s)
            for i in range(1, s):
                if (a >> (s - 1 - i)) & 1:
                    x ^= col[k - i]
            col[k] = x
        v[d] = col
    return v


def _byte_tables(v: np.ndarray) -> np.ndarray:
    """t[d, b, j] (4, 4, 256) uint32: XOR of the direction numbers v[d, 8b + i] over the set bits
    i of byte value j, so a point is four lookups instead of a loop over 32 bits."""
    t = np.zeros((4, 4, 256), dtype=np.uint32)
    for j in range(256):
        for i in range(8):
            if (j >> i) & 1:
                t[:, :, j] ^= v[:, i::8]  # v[d, 8b + i] for b = 0..3
    return t


# true constants (numba freezes them into the compiled code)
SOBOL_DIRECTIONS = _direction_vectors()  # (4, 32) uint32
_SOBOL_BYTES = _byte_tables(SOBOL_DIRECTIONS)  # (4, 4, 256) uint32


@njit(cache=True)
def hash_u32(x):
    """lowbias32, an integer hash by C. Wellons ("Prospecting for Hash Functions", 2018):
    xorshift-multiply rounds with constants 0x7feb352d and 0x846ca68b; a bijection of 32-bit
    values with low bias. x: integer (low 32 bits used) -> uint64 in [0, 2^32)."""
    x = np.uint64(x) & _M32
    x ^= x >> np.uint64(16)
    x = (x * np.uint64(0x7FEB352D)) & _M32
    x ^= x >> np.uint64(15)
    x = (x * np.uint64(0x846CA68B)) & _M32
    x ^= x >> np.uint64(16)
    return x


@njit(cache=True)
def hash_combine(h, v):
    """Fold a 64-bit integer v (signed or not) into a 32-bit key h -> uint64 in [0, 2^32)."""
    u = np.uint64(v)
    h = hash_u32(np.uint64(h) ^ (u & _M32))
    return hash_u32(h ^ (u >> np.uint64(32)))


@njit(cache=True)
def reverse_bits32(x):
    """Bit reversal of a 32-bit value (uint64 in [0, 2^32)) by swapping ever larger halves."""
    x = ((x & np.uint64(0xAAAAAAAA)) >> np.uint64(1)) | ((x & np.uint64(0x55555555)) << np.uint64(1))
    x = ((x & np.uint64(0xCCCCCCCC)) >> np.uint64(2)) | ((x & np.uint64(0x33333333)) << np.uint64(2))
    x = ((x & np.uint64(0xF0F0F0F0)) >> np.uint64(4)) | ((x & np.uint64(0x0F0F0F0F)) << np.uint64(4))
    x = ((x & np.uint64(0xFF00FF00)) >> np.uint64(8)) | ((x & np.uint64(0x00FF00FF)) << np.uint64(8))
    return ((x >> np.uint64(16)) | (x << np.uint64(16))) & _M32


@njit(cache=True)
def laine_karras(x, seed):
    """Burley 2020's Laine-Karras-style permutation (his constants) of a 32-bit value.

    Adding the seed and xoring with multiples by even constants change bit b only as a function
    of bits 0..b-1: in bit-reversed order that is exactly an Owen (nested uniform) scramble.
    """
    x = (x + (np.uint64(seed) & _M32)) & _M32
    x ^= (x * np.uint64(0x6C50B47C)) & _M32
    x ^= (x * np.uint64(0xB82F1E52)) & _M32
    x ^= (x * np.uint64(0xC7AFE638)) & _M32
    x ^= (x * np.uint64(0x8D22F6E6)) & _M32
    return x


@njit(cache=True)
def nested_uniform_scramble(x, seed):
    """Owen scramble of a 32-bit value: bit b (from the top) is flipped by a hash of the bits
    above it. x, seed: uint64 in [0, 2^32) -> uint64 in [0, 2^32)."""
    return reverse_bits32(laine_karras(reverse_bits32(x), seed))


@njit(cache=True)
def sobol_u32(index, dim):
    """Unscrambled Sobol coordinate `dim` (0..3) of point `index` (low 32 bits) as a 32-bit
    fraction: the XOR of the direction numbers of index's set bits -> uint64 in [0, 2^32)."""
    i = np.uint64(index) & _M32
    b = np.uint64(0xFF)
    x = np.uint64(_SOBOL_BYTES[dim, 0, i & b]) ^ np.uint64(_SOBOL_BYTES[dim, 1, (i >> np.uint64(8)) & b])
    x ^= np.uint64(_SOBOL_BYTES[dim, 2, (i >> np.uint64(16)) & b])
    return x ^ np.uint64(_SOBOL_BYTES[dim, 3, i >> np.uint64(24)])


@njit(cache=True)
def sobol_unscrambled(index, dim):
    """Unscrambled Sobol point `index`, coordinate `dim` (0..3) -> float64 in [0, 1).

    Points come in index order (scipy's generator emits them in Gray-code order instead)."""
    return float(sobol_u32(index, dim)) * _TO_UNIT


@njit(cache=True)
def pixel_key(seed, frame, pixel):
    """The 32-bit key of one pixel of one frame of a job -> uint64 in [0, 2^32)."""
    return hash_combine(hash_combine(hash_combine(np.uint64(_KEY_SALT), seed), frame), pixel)


@njit(cache=True)
def sample_dim(seed, frame, pixel, index, dim, mode=SOBOL):
    """Sample value of dimension `dim` of sample `index` of `pixel` -> float64 in [0, 1).

    seed, frame, pixel: integers (any 64-bit value); index: 0 <= index < 2^63; dim >= 0;
    mode: SOBOL or RANDOM.
    """
    key = pixel_key(seed, frame, pixel)
    idx = np.uint64(index)
    if mode == RANDOM:
        return float(hash_combine(hash_combine(key, idx), dim)) * _TO_UNIT
    if mode != SOBOL:
        raise ValueError("sampler mode must be SOBOL (0) or RANDOM (1)")
    group_seed = hash_combine(hash_combine(key, dim >> 2), idx >> np.uint64(32))
    shuffled = nested_uniform_scramble(idx & _M32, group_seed)
    d = dim & 3
    x = nested_uniform_scramble(sobol_u32(shuffled, d), hash_combine(group_seed, d + 1))
    return float(x) * _TO_UNIT


@njit(cache=True)
def group_state(key, index, group, mode=SOBOL):
    """What the four dimensions 4·group .. 4·group + 3 of sample `index` share, for
    `group_value`: (group seed, shuffled index) in SOBOL mode, (the sample's key, 0) in RANDOM
    mode. key: the pixel's `pixel_key`. A path draws its values in groups of four, so this
    spares three of every four group seeds and index shuffles; the values are `sample_dim`'s."""
    idx = np.uint64(index)
    if mode == RANDOM:
        return hash_combine(key, idx), np.uint64(0)
    if mode != SOBOL:
        raise ValueError("sampler mode must be SOBOL (0) or RANDOM (1)")
    group_seed = hash_combine(hash_combine(key, group), idx >> np.uint64(32))
    return group_seed, nested_uniform_scramble(idx & _M32, group_seed)


@njit(cache=True)
def group_value(state, dim, mode=SOBOL):
    """Dimension `dim` of the sample whose group state (for group dim // 4) is `state` ->
    float64 in [0, 1), the same bits as sample_dim."""
    seed, shuffled = state
    if mode == RANDOM:
        return float(hash_combine(seed, dim)) * _TO_UNIT
    d = dim & 3
    return float(nested_uniform_scramble(sobol_u32(shuffled, d), hash_combine(seed, d + 1))) * _TO_UNIT


@njit(cache=True)
def fill_samples(seed, frame, pixel, first, first_dim, mode, out):
    """out[i, j] = sample_dim(seed, frame, pixel, first + i, first_dim + j, mode).

    out: (count, dims) float64, allocated by the caller.
    """
    for i in range(out.shape[0]):
        for j in range(out.shape[1]):
            out[i, j] = sample_dim(seed, frame, pixel, first + i, first_dim + j, mode)


def samples(seed: int, frame: int, pixel: int, first: int, count: int, dims: int,
            first_dim: int = 0, mode: int = SOBOL) -> np.ndarray:
    """(count, dims) float64 sample values of one pixel (tests, benchmarks, plots)."""
    out = np.empty((count, dims), dtype=np.float64)
    fill_samples(seed, frame, pixel, first, first_dim, mode, out)
    return out


# ---------------------------------------------------------------------------------------------
# slow, readable reference in plain Python integers (the tests compare the kernels with it)

_MASK = 0xFFFFFFFF


def reference_hash_u32(x: int) -> int:
    x &= _MASK
    x ^= x >> 16
    x = (x * 0x7FEB352D) & _MASK
    x ^= x >> 15
    x = (x * 0x846CA68B) & _MASK
    return x ^ (x >> 16)


def reference_hash_combine(h: int, v: int) -> int:
    v &= (1 << 64) - 1  # a negative v folds like its two's complement
    return reference_hash_u32(reference_hash_u32(h ^ (v & _MASK)) ^ (v >> 32))


def reference_owen_scramble(x: int, seed: int) -> int:
    """Reverse the 32 bits (as a string), permute with Burley's constants, reverse back."""
    r = int(f"{x:032b}"[::-1], 2)
    r = (r + (seed & _MASK)) & _MASK
    for c in (0x6C50B47C, 0xB82F1E52, 0xC7AFE638, 0x8D22F6E6):
        r ^= (r * c) & _MASK
    return int(f"{r:032b}"[::-1], 2)


def reference_sobol_u32(index: int, dim: int) -> int:
    x = 0
    for k in range(32):
        if (index >> k) & 1:
            x ^= int(SOBOL_DIRECTIONS[dim, k])
    return x


def reference_sample_dim(seed: int, frame: int, pixel: int, index: int, dim: int,
                         mode: int = SOBOL) -> float:
    key = _KEY_SALT
    for v in (seed, frame, pixel):
        key = reference_hash_combine(key, v)
    if mode == RANDOM:
        return reference_hash_combine(reference_hash_combine(key, index), dim) / 2**32
    group_seed = reference_hash_combine(reference_hash_combine(key, dim // 4), index >> 32)
    shuffled = reference_owen_scramble(index & _MASK, group_seed)
    d = dim % 4
    x = reference_owen_scramble(reference_sobol_u32(shuffled, d),
                                reference_hash_combine(group_seed, d + 1))
    return x / 2**32
