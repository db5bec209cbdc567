"""One consistent public interface: our own names, one name per thing, writers that say what they wrote."""

from __future__ import annotations

import inspect

import numpy as np
import pytest

import cmbtools
from cmbtools import maps, simulate, spectrum

NSIDE = 8


def test_sky_maps_are_read_and_written_with_names_of_our_own(tmp_path):
    rng = np.random.default_rng(3)
    sky = rng.normal(0.0, 1e-4, 12 * NSIDE**2)
    sky[:5] = maps.UNSEEN
    path = maps.write_sky_map(tmp_path / "m.fits", sky, coordinates="G", nested=True, observed_only=True,
                              header={"SURVEY": "Tern"})
    m, info = maps.read_sky_map(path, column=0)
    np.testing.assert_array_equal(m, sky)
    assert info.ordering_in_file == "NESTED" and info.coord == "G" and info.is_partial
    for name in ("read_sky_map", "read_mask"):
        params = inspect.signature(getattr(maps, name)).parameters
        assert "column" in params and "file_ordering" in params and "field" not in params
    for name in ("write_sky_map", "write_mask"):
        params = inspect.signature(getattr(maps, name)).parameters
        assert {"coordinates", "nested", "header"} <= set(params)
        assert not {"coord", "nest", "extra_header", "partial"} & set(params)
    assert "read_map" not in maps.__all__ and "write_map" not in maps.__all__


def test_the_old_names_and_keywords_still_work_for_one_release(tmp_path):
    sky = np.linspace(-1e-4, 1e-4, 12 * NSIDE**2)
    old = maps.write_map(tmp_path / "old.fits", sky, coord="C", nest=True, extra_header={"A": 1})
    new = maps.write_sky_map(tmp_path / "new.fits", sky, coordinates="C", nested=True, header={"A": 1})
    np.testing.assert_array_equal(maps.read_map(old, field=0)[0], maps.read_sky_map(new, column=0)[0])
    w = np.ones(12 * NSIDE**2)
    mask = maps.write_mask(tmp_path / "w.fits", w, coord="G")  # an old keyword of a kept name
    np.testing.assert_array_equal(maps.read_mask(mask, field=0), w)
    with pytest.raises(cmbtools.exceptions.InvalidInputError, match="not both"):
        maps.write_mask(tmp_path / "w2.fits", w, coord="G", coordinates="G")


def test_every_writer_returns_the_path_it_wrote_and_takes_its_header_as_header(tmp_path):
    cl = simulate.fiducial_cl(20)
    written = [
        simulate.write_spectrum_table(tmp_path / "cl.csv", cl, header={"source": "test"}),
        spectrum.write_beam(tmp_path / "b.csv", spectrum.gaussian_beam(30.0, 20), header="a beam"),
        maps.write_sky_map(tmp_path / "m.fits", np.zeros(12 * NSIDE**2), header={"A": 1}),
        maps.write_mask(tmp_path / "w.fits", np.ones(12 * NSIDE**2), header={"A": 1}),
    ]
    assert written == [tmp_path / "cl.csv", tmp_path / "b.csv", tmp_path / "m.fits", tmp_path / "w.fits"]
    for writer in (simulate.write_spectrum_table, spectrum.write_beam, maps.write_sky_map, maps.write_mask):
        assert "header" in inspect.signature(writer).parameters
    assert "header_comment" not in inspect.signature(spectrum.write_beam).parameters


def test_one_gaussian_beam_and_an_explicit_way_to_give_it():
    assert "gaussian_beam_window" not in maps.__all__
    np.testing.assert_array_equal(maps.gaussian_beam_window(25.0, 100), spectrum.gaussian_beam(25.0, 100))
    mask = maps.cap_mask(16, 0.0, 30.0, 70.0)
    bins = spectrum.Binning.uniform(2, 47, 8)
    explicit = spectrum.SpectrumEstimator(mask, bins, beam=spectrum.GaussianBeam(fwhm_arcmin=25.0))
    bare = spectrum.SpectrumEstimator(mask, bins, beam=25.0)
    assert explicit.cache_key == bare.cache_key
    # FWHM 25 arcmin: B_l = exp(-l(l+1) sigma^2 / 2), sigma = FWHM / sqrt(8 ln 2) (common practice)
    sigma = np.radians(25.0 / 60.0) / np.sqrt(8 * np.log(2))
    ell = np.arange(48)
    np.testing.assert_allclose(explicit.beam, np.exp(-0.5 * ell * (ell + 1) * sigma**2), rtol=1e-12)
    sky1 = simulate.gaussian_sky(simulate.fiducial_cl(47), 16, beam=spectrum.GaussianBeam(25.0), rng=1)
    sky2 = simulate.gaussian_sky(simulate.fiducial_cl(47), 16, beam=25.0, rng=1)
    np.testing.assert_array_equal(sky1, sky2)


def test_fast_coupling_settings_have_plain_names():
    params = inspect.signature(spectrum.SpectrumEstimator.__init__).parameters
    assert {"fast_exact_below", "fast_banded_below", "fast_band_half_width"} <= set(params)
    assert not {"fast_l_exact", "fast_l_toeplitz", "fast_band"} & set(params)
    mask = maps.cap_mask(32, 0.0, 30.0, 70.0)
    bins = spectrum.Binning.uniform(2, 63, 8)
    new = spectrum.SpectrumEstimator(mask, bins, lmax=63, coupling="fast", fast_exact_below=20, fast_banded_below=40,
                                     fast_band_half_width=10)
    old = spectrum.SpectrumEstimator(mask, bins, lmax=63, coupling="fast", fast_l_exact=20, fast_l_toeplitz=40,
                                     fast_band=10)
    assert new.cache_key == old.cache_key


def test_the_estimator_file_uses_plain_keys(tmp_path):
    mask = maps.cap_mask(16, 0.0, 30.0, 70.0)
    est = spectrum.SpectrumEstimator(mask, spectrum.Binning.uniform(2, 47, 8))
    path = est.save(tmp_path / "op.npz")
    with np.load(path, allow_pickle=False) as z:
        assert "pixel_window" in z.files and "pixwin" not in z.files
    assert spectrum.SpectrumEstimator.load(path).cache_key == est.cache_key


def test_one_bound_on_the_number_of_simulations_and_one_name_for_it():
    from cmbtools._core.checks import MAX_SIMULATIONS
    from cmbtools.cli import common
    from cmbtools.simulate import engine, validation

    assert engine.MAX_SIMULATIONS is common.MAX_SIMULATIONS is MAX_SIMULATIONS == 1_000_000
    assert validation.MAX_SIMULATIONS is MAX_SIMULATIONS
    from cmbtools.simulate.validation_result import ValidationResult

    rng = np.random.default_rng(1)
    samples = rng.normal(1.0, 0.1, size=(20, 3))
    result = ValidationResult.from_samples(samples, np.full((20, 3), 0.1), np.ones(3), ell_min=np.array([2, 10, 20]),
                                           ell_max=np.array([9, 19, 29]), ell_eff=np.array([5.5, 14.5, 24.5]))
    summary = result.summary()
    assert summary["n_sims"] == result.n_sims == 20 and "nsims" not in summary


def test_the_public_packages_leak_no_annotations_feature():
    from cmbtools import physics

    for module in (cmbtools, maps, spectrum, simulate, physics):
        assert not hasattr(module, "annotations"), module.__name__
