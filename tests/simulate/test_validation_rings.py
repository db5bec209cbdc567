"""A validation simulation draws only what its mask can see, and gets the bandpowers of the full-sky maps."""

import numpy as np
import pytest

from cmbtools import maps, simulate, spectrum
from cmbtools.simulate.validation import _simulate_and_estimate, _ValidationSetup


def _estimator(nside, removal=True):
    mask = maps.apodize_mask(maps.latitude_cut_mask(nside, 25.0), 5.0)  # the equatorial rings are empty
    binning = spectrum.Binning.uniform(2, 3 * nside - 1, 8)
    return spectrum.SpectrumEstimator(mask, binning, pixel_window=False, remove_monopole_dipole=removal, nthreads=1)


@pytest.mark.parametrize("removal", [True, False])
def test_simulation_equals_the_full_sky_pipeline(removal):
    nside = 32
    est = _estimator(nside, removal)
    assert 0 < est._occupied_rings().sum() < est._occupied_rings().size
    lmax = est.lmax
    cl = 1e-10 * 1000.0 / (np.arange(lmax + 1) + 10.0) ** 2
    hits = 1.0 + np.random.default_rng(0).uniform(size=12 * nside**2)
    noise = simulate.NoiseModel(30.0, hits=hits, ell_knee=40.0, alpha=2.0)
    noise_cl = simulate.noise_spectrum(noise, lmax, nside)
    beam = spectrum.gaussian_beam(60.0, lmax)
    setup = _ValidationSetup(
        estimator=est, cl=cl, sky_beam=beam, noise=noise, noise_cl=noise_cl, monopole=2e-3,
        dipole=[1e-3, 0.0, -1e-3], sky_filter=None, record_pseudo=True,
    )
    got = _simulate_and_estimate(7, simulate.simulation_rng(11, 7), setup)
    # the same simulation made by the public functions on the whole sky, measured by a fresh estimator
    rng = simulate.simulation_rng(11, 7)
    sky = simulate.gaussian_sky(cl, nside, lmax=lmax, beam=beam, pixel_window=False, monopole=2e-3,
                                dipole=[1e-3, 0.0, -1e-3], rng=rng, nthreads=1)
    fresh = _estimator(nside, removal)
    pseudo = fresh.pseudo_spectrum(sky)
    full = fresh.estimate(sky + simulate.noise_map(noise, nside, rng=rng, nthreads=1), noise_cl=noise_cl)
    np.testing.assert_allclose(got["pseudo_cl"], pseudo, rtol=1e-9, atol=1e-12 * pseudo.max())
    np.testing.assert_allclose(got["cl"], full.cl, rtol=1e-9, atol=1e-12 * np.abs(full.cl).max())
    np.testing.assert_allclose(got["cl_err"], full.cl_err, rtol=1e-9)


def test_noise_on_chosen_rings_has_the_full_map_values():
    from cmbtools._core import sht as _sht
    from cmbtools.simulate.noise import _noise_map

    nside = 128  # 196608 pixels: several blocks, some wholly on empty rings
    est = _estimator(nside)
    rings = est._occupied_rings()
    model = simulate.NoiseModel(25.0)
    full = simulate.noise_map(model, nside, rng=simulate.simulation_rng(3, 1), nthreads=1)
    part = _noise_map(model, nside, 3 * nside - 1, simulate.simulation_rng(3, 1), 2, rings=rings)
    starts, stops = _sht.ring_pixel_ranges(nside, rings)
    inside = np.zeros(full.size, dtype=bool)
    for a, b in zip(starts, stops):
        inside[a:b] = True
    np.testing.assert_array_equal(part[inside], full[inside])
    assert np.count_nonzero(part[~inside]) < full.size - inside.sum()  # whole blocks were not drawn
