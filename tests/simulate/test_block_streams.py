"""Block-stream normal deviates: the same numbers for any number of threads, workers or calls order."""

import numpy as np
import pytest

from cmbtools._core import sht as _sht
from cmbtools.simulate import random_streams as _streams
from cmbtools.simulate import NoiseModel, gaussian_alm, gaussian_sky, noise_map, simulation_rng

B = _streams.BLOCK_SIZE


@pytest.mark.parametrize("n", [1, B - 1, B, B + 1, 5 * B + 17])
def test_each_block_is_its_own_spawned_stream(n):
    # the contract, written out with numpy's documented SeedSequence/PCG64 only
    out = _streams.block_normals(simulation_rng(11, 4), n, nthreads=1)
    child = np.random.SeedSequence(11, spawn_key=(4, 0))  # first child of the simulation's seed sequence
    want = []
    for k in range(-(-n // B)):
        seq = np.random.SeedSequence(child.entropy, spawn_key=child.spawn_key + (k,))
        want.append(np.random.Generator(np.random.PCG64(seq)).standard_normal(min(B, n - k * B)))
    np.testing.assert_array_equal(out, np.concatenate(want))


@pytest.mark.parametrize("nthreads", [2, 3, 8])
def test_same_numbers_for_any_number_of_threads(nthreads):
    n = 7 * B + 5
    one = _streams.block_normals(simulation_rng(3, 0), n, nthreads=1)
    many = _streams.block_normals(simulation_rng(3, 0), n, nthreads=nthreads)
    np.testing.assert_array_equal(one, many)


def test_transform_sees_every_block_once_in_place():
    n = 3 * B + 10
    seen = []

    def double(start, stop, values):
        seen.append((start, stop))
        values *= 2.0

    plain = _streams.block_normals(5, n)
    scaled = _streams.block_normals(5, n, transform=double, nthreads=2)
    np.testing.assert_array_equal(scaled, 2.0 * plain)
    assert sorted(seen) == [(0, B), (B, 2 * B), (2 * B, 3 * B), (3 * B, n)]


def test_successive_draws_differ_and_an_int_seed_repeats():
    rng = simulation_rng(8, 1)
    a = _streams.block_normals(rng, 100)
    b = _streams.block_normals(rng, 100)
    assert not np.array_equal(a, b)  # the second draw takes the second child
    np.testing.assert_array_equal(_streams.block_normals(42, 100), _streams.block_normals(42, 100))
    # the generator's own stream is left alone
    np.testing.assert_array_equal(rng.standard_normal(3), simulation_rng(8, 1).standard_normal(3))


def test_normal_statistics():
    # mean 0, variance 1, and no correlation across a block boundary (common practice: sample moments)
    x = _streams.block_normals(2026, 40 * B, nthreads=2)
    assert abs(x.mean()) < 5 / np.sqrt(x.size)
    assert abs(x.var() - 1.0) < 5 * np.sqrt(2.0 / x.size)
    first, second = x[B - 1000:B], x[B:B + 1000]
    assert abs(np.corrcoef(first, second)[0, 1]) < 0.15


def test_generator_without_seed_sequence_is_accepted():
    state = np.random.default_rng(1).bit_generator.state
    bitgen = np.random.PCG64()
    bitgen.state = state
    x = _streams.block_normals(np.random.Generator(bitgen), 10)
    assert x.shape == (10,) and np.all(np.isfinite(x))


def test_bad_out_array():
    with pytest.raises(ValueError, match="C-contiguous float64"):
        _streams.block_normals(1, 10, out=np.empty(10, dtype=np.float32))


def test_skies_and_noise_do_not_depend_on_threads():
    nside, lmax = 32, 95
    cl = 1e-10 / (np.arange(lmax + 1) + 10.0) ** 2
    np.testing.assert_array_equal(
        gaussian_alm(cl, lmax, rng=simulation_rng(1, 2), nthreads=1),
        gaussian_alm(cl, lmax, rng=simulation_rng(1, 2), nthreads=2),
    )
    hits = np.random.default_rng(0).uniform(0.5, 2.0, 12 * nside**2)
    model = NoiseModel(20.0, hits=hits, ell_knee=30.0, alpha=1.5)
    np.testing.assert_array_equal(
        noise_map(model, nside, rng=simulation_rng(1, 3), nthreads=1),
        noise_map(model, nside, rng=simulation_rng(1, 3), nthreads=2),
    )
    a = gaussian_sky(cl, nside, beam=60.0, rng=simulation_rng(1, 4), nthreads=1)
    b = gaussian_sky(cl, nside, beam=60.0, rng=simulation_rng(1, 4), nthreads=2)
    np.testing.assert_allclose(a, b, rtol=0, atol=1e-14 * np.abs(a).max())  # transforms round differently


def test_sky_coefficients_are_the_block_draws_scaled():
    # a_lm = z * sqrt(C_l / 2) per part; m = 0: real z * sqrt(C_l), its imaginary draw unused
    lmax = 40
    cl = np.linspace(1.0, 2.0, lmax + 1)
    alm = gaussian_alm(cl, lmax, rng=simulation_rng(9, 0))
    z = _streams.block_normals(simulation_rng(9, 0), 2 * alm.size).reshape(-1, 2)
    ell = _sht.alm_ell(lmax)
    np.testing.assert_allclose(alm.real[lmax + 1:], z[lmax + 1:, 0] * np.sqrt(cl[ell[lmax + 1:]] / 2), rtol=1e-15)
    np.testing.assert_allclose(alm.imag[lmax + 1:], z[lmax + 1:, 1] * np.sqrt(cl[ell[lmax + 1:]] / 2), rtol=1e-15)
    np.testing.assert_allclose(alm.real[: lmax + 1], z[: lmax + 1, 0] * np.sqrt(cl), rtol=1e-15)
    assert np.all(alm.imag[: lmax + 1] == 0)
