"""The sampler against scipy's Sobol generator, the net properties of Owen-scrambled points
(Owen 1995: scrambling keeps a (t, m, s)-net a (t, m, s)-net), and statistics of independence
and uniformity (tolerances from the standard errors of the statistics)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.stats import qmc

from lampyr.engine import sampler as S


def t_value(points: np.ndarray, m: int) -> int:
    """Smallest t for which 2^m points in [0, 1)² are a (t, m, 2)-net in base 2: every
    elementary interval [a 2^-i, (a+1) 2^-i) × [b 2^-j, (b+1) 2^-j) with i + j = m − t holds
    exactly 2^t points (Niederreiter 1992, definition 4.1)."""
    assert len(points) == 2**m
    for t in range(m + 1):
        k = m - t
        cells = [(np.floor(points[:, 0] * 2**i).astype(np.int64) << (k - i))
                 + np.floor(points[:, 1] * 2 ** (k - i)).astype(np.int64) for i in range(k + 1)]
        if all(np.array_equal(np.bincount(c, minlength=2**k), np.full(2**k, 2**t)) for c in cells):
            return t
    raise AssertionError("points outside [0, 1)²")


def scrambled(pixel=12345, first=0, count=256, dims=8, mode=S.SOBOL, seed=7, frame=3):
    return S.samples(seed, frame, pixel, first, count, dims, mode=mode)


# -- the unscrambled sequence: scipy as the reference for the direction numbers ----------------

@pytest.mark.parametrize("dim", range(4))
def test_unscrambled_points_equal_scipy_sobol(dim):
    # scipy (Joe & Kuo new-joe-kuo-6.21201 direction numbers) emits the points in Gray-code
    # order (Antonov & Saleev 1979): its row i is Sobol point i ^ (i >> 1); row 0 is 0.
    ref = qmc.Sobol(d=4, scramble=False).random(1024)[:, dim]
    ours = np.array([S.sobol_unscrambled(i ^ (i >> 1), dim) for i in range(1024)])
    assert ours[0] == 0.0
    np.testing.assert_array_equal(ours, ref)


@pytest.mark.parametrize("dim", range(4))
def test_byte_table_sobol_equals_bit_loop_reference(dim):
    rng = np.random.default_rng(1)
    for index in rng.integers(0, 2**32, 200).tolist() + [0, 1, 2**31, 2**32 - 1]:
        assert S.sobol_u32(index, dim) == S.reference_sobol_u32(index, dim)


# -- the kernels against the readable reference ------------------------------------------------

def test_hash_equals_reference():
    rng = np.random.default_rng(2)
    for x in rng.integers(0, 2**32, 200).tolist() + [0, 1, 2**32 - 1]:
        assert S.hash_u32(x) == S.reference_hash_u32(x)


def test_hash_is_inverted_by_undoing_its_steps():
    # lowbias32 is a bijection: xorshifts by 15 and 16 and odd multipliers are each invertible
    # (an xorshift by 15 is undone by y ^ y >> 15 ^ y >> 30; an odd c by c^-1 mod 2^32)
    def inverse(y):
        y ^= y >> 16
        y = (y * pow(0x846CA68B, -1, 2**32)) % 2**32
        y ^= (y >> 15) ^ (y >> 30)
        y = (y * pow(0x7FEB352D, -1, 2**32)) % 2**32
        return y ^ (y >> 16)

    rng = np.random.default_rng(5)
    for x in rng.integers(0, 2**32, 200).tolist():
        assert inverse(S.hash_u32(x)) == x


@pytest.mark.parametrize("mode", [S.SOBOL, S.RANDOM])
def test_sample_dim_equals_python_reference(mode):
    rng = np.random.default_rng(3)
    for _ in range(300):
        seed = int(rng.integers(-2**40, 2**40))
        frame = int(rng.integers(-3, 2000))
        pixel = int(rng.integers(0, 1 << 24))
        index = int(rng.integers(0, 2**36))  # above 2^32 too: the high word keys the scramble
        dim = int(rng.integers(0, 80))
        got = S.sample_dim(seed, frame, pixel, index, dim, mode)
        assert got == S.reference_sample_dim(seed, frame, pixel, index, dim, mode)


@pytest.mark.parametrize("bit", [0, 1, 7, 16, 30, 31])
def test_scramble_flips_each_bit_by_the_bits_above_it_only(bit):
    # The defining property of a nested uniform (Owen) scramble in base 2 (Owen 1995): digit b
    # is permuted by a function of the digits before it, so toggling bit b of the input toggles
    # bit b of the output and leaves every more significant output bit alone.
    rng = np.random.default_rng(4)
    for x, seed in rng.integers(0, 2**32, (100, 2)).tolist():
        diff = S.nested_uniform_scramble(x, seed) ^ S.nested_uniform_scramble(x ^ (1 << bit), seed)
        assert diff >> bit == 1


def test_unknown_mode_is_refused():
    with pytest.raises(ValueError):
        S.sample_dim(1, 1, 1, 0, 0, 7)


# -- stratification of the scrambled points ----------------------------------------------------

@pytest.mark.parametrize("first", [0, 256, 3 * 256])  # any aligned batch of 2^k samples
@pytest.mark.parametrize("dim", range(8))  # two padding groups
def test_each_dimension_has_one_point_per_stratum(dim, first):
    x = scrambled(first=first)[:, dim]
    counts = np.bincount(np.floor(x * 256).astype(np.int64), minlength=256)
    np.testing.assert_array_equal(counts, np.ones(256))


@pytest.mark.parametrize("dims", [(0, 1), (4, 5)])
@pytest.mark.parametrize("pixel", [0, 1, 98765])
def test_first_pair_of_each_group_is_a_0_m_2_net(dims, pixel):
    # Sobol dimensions 1 and 2 form a (0, 2)-sequence (Sobol 1967): every elementary interval of
    # area 1/256 holds exactly one of 256 points, after scrambling too.
    assert t_value(scrambled(pixel=pixel)[:, list(dims)], 8) == 0


@pytest.mark.parametrize("dims", [(2, 3), (6, 7)])
def test_second_pair_keeps_the_t_value_of_unscrambled_sobol(dims):
    # Sobol dimensions 3 and 4 are NOT a (0, m, 2)-net: scipy's own first 256 points of them are
    # a (1, 8, 2)-net. Scrambling and shuffling must keep exactly that quality.
    unscrambled = qmc.Sobol(d=4, scramble=False).random(256)[:, [2, 3]]
    assert t_value(unscrambled, 8) == 1
    assert t_value(scrambled()[:, list(dims)], 8) == 1


def test_indices_past_two_to_the_32_are_stratified_and_new():
    low = scrambled(first=0)[:, 0]
    high = scrambled(first=2**32)[:, 0]
    np.testing.assert_array_equal(np.sort(np.floor(high * 256)), np.arange(256))
    assert not np.array_equal(np.sort(low), np.sort(high))


def test_scrambling_changes_the_points():
    ours = scrambled(count=64)[:, :4]
    plain = np.array([[S.sobol_unscrambled(i, d) for d in range(4)] for i in range(64)])
    assert not np.any(np.all(ours == plain, axis=1))


# -- determinism and independence --------------------------------------------------------------

@pytest.mark.parametrize("mode", [S.SOBOL, S.RANDOM])
def test_values_do_not_depend_on_how_the_samples_are_split(mode):
    whole = scrambled(first=0, count=128, mode=mode)
    later_half_first = [scrambled(first=64, count=64, mode=mode), scrambled(first=0, count=64, mode=mode)]
    np.testing.assert_array_equal(whole, np.vstack(later_half_first[::-1]))
    assert S.sample_dim(7, 3, 12345, 100, 5, mode) == whole[100, 5]


@pytest.mark.parametrize("key", ["seed", "frame", "pixel"])
def test_every_key_changes_the_values(key):
    base = dict(seed=7, frame=3, pixel=12345)
    other = dict(base, **{key: base[key] + 1})
    assert not np.array_equal(scrambled(**base)[:, :4], scrambled(**other)[:, :4])


N_CORR = 4096


@pytest.mark.parametrize("mode", [S.SOBOL, S.RANDOM])
@pytest.mark.parametrize("pixels", [(0, 1), (500, 500 + 640), (7, 1 << 20)])
@pytest.mark.parametrize("dim", [0, 3, 9])
def test_different_pixels_are_uncorrelated(mode, pixels, dim):
    # Pearson's r of independent samples has standard error ≈ 1/√n (Fisher 1915): 4 σ bound
    a = scrambled(pixel=pixels[0], count=N_CORR, dims=dim + 1, mode=mode)[:, dim]
    b = scrambled(pixel=pixels[1], count=N_CORR, dims=dim + 1, mode=mode)[:, dim]
    r = stats.pearsonr(a, b).statistic
    assert abs(r) < 4 / np.sqrt(N_CORR), r


@pytest.mark.parametrize("mode", [S.SOBOL, S.RANDOM])
@pytest.mark.parametrize("dims", [(0, 4), (1, 9), (3, 40)])
def test_dimension_groups_are_uncorrelated(mode, dims):
    # padding: each group of four dimensions is scrambled and shuffled with its own seed
    x = scrambled(count=N_CORR, dims=dims[1] + 1, mode=mode)
    r = stats.pearsonr(x[:, dims[0]], x[:, dims[1]]).statistic
    assert abs(r) < 4 / np.sqrt(N_CORR), r


def _random_values(varying: str) -> np.ndarray:
    n = 4096
    if varying == "index":
        return S.samples(5, 1, 77, 0, n, 1, first_dim=6, mode=S.RANDOM)[:, 0]
    if varying == "pixel":
        return np.array([S.sample_dim(5, 1, p, 9, 6, S.RANDOM) for p in range(n)])
    return S.samples(5, 1, 77, 9, 1, n, mode=S.RANDOM)[0]  # dimension


@pytest.mark.parametrize("varying", ["index", "pixel", "dim"])
def test_independent_mode_is_uniform(varying):
    # Kolmogorov-Smirnov against U[0, 1) (scipy.stats.kstest); reject below p = 0.001
    x = _random_values(varying)
    assert x.min() >= 0.0 and x.max() < 1.0
    assert stats.kstest(x, "uniform").pvalue > 1e-3


@pytest.mark.parametrize("mode", [S.SOBOL, S.RANDOM])
def test_values_drawn_by_group_are_sample_dims_values(mode):
    """The renderer draws four dimensions from one group state (group_state, group_value);
    sample_dim, which scrambles each dimension from scratch, is the reference, to the bit."""
    from numba import njit

    group_state, group_value, pixel_key, sample_dim = S.group_state, S.group_value, S.pixel_key, S.sample_dim

    @njit
    def both(seed, frame, pixel, index, dims, mode, out):
        key = pixel_key(seed, frame, pixel)
        for d in range(dims):
            out[d, 0] = group_value(group_state(key, index, d >> 2, mode), d, mode)
            out[d, 1] = sample_dim(seed, frame, pixel, index, d, mode)

    out = np.empty((40, 2))
    for seed, frame, pixel, index in [(1, 12, 0, 0), (7, 1, 4095, 3), (3, 48, 36863, 1000),
                                      (0, 0, 2**40, 2**32 + 5), (-1, -2, 17, 2**62)]:
        both(seed, frame, pixel, index, 40, mode, out)
        np.testing.assert_array_equal(out[:, 0], out[:, 1])
        assert len(np.unique(out[:, 1])) == 40  # distinct values: the comparison is not vacuous
