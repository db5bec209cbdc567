"""Covariance files with a spectrum axis (the six polarized spectra), the polarized bandpower windows and the
polarized transfer table: round trips, shapes, refusals."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from cmbtools.exceptions import InputFileError, InvalidInputError
from cmbtools.maps.masks import apodize_mask, cap_mask
from cmbtools.spectrum import (
    SPECTRA, BandpowerCovariance, BandpowerTransfer, Binning, PolarizedBandpowers, PolarizedBandpowerTransfer,
    PolarizedSpectrumEstimator, read_covariance, simulated_covariance,
)

BINS = dict(ell_min=[2, 10, 20], ell_max=[9, 19, 29], ell_eff=[5.5, 14.5, 24.5])


def _six(rng, nb=3, lmax=29):
    a = rng.standard_normal((6 * nb, 6 * nb + 4))
    return BandpowerCovariance(BINS["ell_min"], BINS["ell_max"], BINS["ell_eff"], a @ a.T / a.shape[1],
                               rng.random((6 * nb, 6 * (lmax + 1))), kind="gaussian", spectra=SPECTRA,
                               settings={"spectrum": "polarized auto"})


@pytest.mark.parametrize("suffix", [".npz", ".fits"])
def test_six_spectrum_covariance_round_trips(tmp_path, suffix):
    rng = np.random.default_rng(4)
    c = _six(rng)
    back = read_covariance(c.write(tmp_path / f"cov{suffix}"))
    assert back.spectra == SPECTRA and back.n_bins == 3 and back.size == 18
    assert back.matrix.shape == (18, 18) and back.windows.shape == (18, 180)
    np.testing.assert_array_equal(back.matrix, c.matrix)
    np.testing.assert_array_equal(back.windows, c.windows)
    assert back.blocks.shape == (6, 6) and back.blocks.all()
    # spectrum-major: the EE x BB block is rows 9-11, columns 15-17
    np.testing.assert_array_equal(back.block("EE", "BB"), c.matrix[9:12, 15:18])
    np.testing.assert_array_equal(back.errors.reshape(6, 3)[SPECTRA.index("TB")], np.sqrt(np.diag(c.matrix))[6:9])


@pytest.mark.parametrize("suffix", [".npz", ".fits"])
def test_blocks_not_computed_are_marked_and_kept(tmp_path, suffix):
    rng = np.random.default_rng(5)
    m = np.array(_six(rng).matrix)
    blocks = np.ones((6, 6), bool)
    blocks[0, 2] = blocks[2, 0] = False  # TT x TB
    with pytest.raises(InvalidInputError, match="TT x TB is marked as not computed but holds non-zero values"):
        BandpowerCovariance(spectra=SPECTRA, blocks=blocks, matrix=m, **BINS)
    m[0:3, 6:9] = 0.0
    m[6:9, 0:3] = 0.0
    c = BandpowerCovariance(spectra=SPECTRA, blocks=blocks, matrix=m, **BINS)
    back = read_covariance(c.write(tmp_path / f"cov{suffix}"))
    np.testing.assert_array_equal(back.blocks, blocks)
    with pytest.raises(InvalidInputError, match="TT x TB was not computed"):
        back.block("TT", "TB")
    with pytest.raises(InvalidInputError, match="blocks that were not computed"):
        back.inverse()


def test_a_file_without_the_spectrum_axis_is_temperature(tmp_path):
    # the layout before the spectrum axis: no 'spectra' and no 'blocks' arrays
    rng = np.random.default_rng(6)
    a = rng.standard_normal((3, 3))
    c = BandpowerCovariance(matrix=a @ a.T, **BINS)
    path = c.write(tmp_path / "cov.npz")
    with np.load(path) as z:
        kept = {k: z[k] for k in z.files if k not in ("spectra", "blocks")}
    np.savez(tmp_path / "old.npz", **kept)
    back = read_covariance(tmp_path / "old.npz")
    assert back.spectra == ("TT",) and back.blocks.shape == (1, 1)
    np.testing.assert_array_equal(back.matrix, c.matrix)


def test_shapes_and_spectra_are_checked():
    rng = np.random.default_rng(7)
    a = rng.standard_normal((3, 3))
    with pytest.raises(InvalidInputError, match=r"\(18, 18\) array \(6 spectra of 3 bins\)"):
        BandpowerCovariance(matrix=a @ a.T, spectra=SPECTRA, **BINS)
    with pytest.raises(InvalidInputError, match="spectra of a covariance must be"):
        BandpowerCovariance(matrix=a @ a.T, spectra=("EE",), **BINS)
    with pytest.raises(InvalidInputError, match="window functions must have shape"):
        BandpowerCovariance(matrix=np.eye(18), windows=np.ones((18, 31)), spectra=SPECTRA, **BINS)


def test_simulated_six_spectrum_covariance_takes_the_hartlap_factor_of_all_bins():
    rng = np.random.default_rng(8)
    n, p = 60, 18
    x = rng.standard_normal((n, p)) @ (np.eye(p) + 0.3 * rng.standard_normal((p, p)))
    c = simulated_covariance(x, spectra=SPECTRA, **BINS)
    np.testing.assert_allclose(c.matrix, np.cov(x, rowvar=False), rtol=1e-12)
    assert np.allclose(c.matrix, c.matrix.T, rtol=0, atol=0) and np.linalg.eigvalsh(c.matrix).min() > 0
    # Hartlap, Simon & Schneider 2007, A&A 464, 399, eq. 17, with p = 6 spectra x 3 bins = 18
    np.testing.assert_allclose(c.inverse(), np.linalg.inv(np.cov(x, rowvar=False)) * (n - p - 2) / (n - 1),
                               rtol=1e-9)


@pytest.mark.parametrize("cross", [False, True])
def test_polarized_bandpower_windows_give_the_expected_bandpowers(cross):
    nside, lmax = 16, 40
    mask = apodize_mask(cap_mask(nside, 0.0, 90.0, 60.0), 10.0, nthreads=1)
    pol = apodize_mask(cap_mask(nside, 0.0, 90.0, 50.0), 10.0, nthreads=1)
    b = Binning.uniform(2, 40, 8)
    est = PolarizedSpectrumEstimator(mask, b, pol_mask=pol, lmax=lmax, beam=90.0, nthreads=1,
                                     **({"mask2": mask, "pol_mask2": mask} if cross else {}))
    w = est.cross_bandpower_windows if cross else est.bandpower_windows
    assert w.shape == (6 * b.n_bins, 6 * (lmax + 1))
    ell = np.arange(lmax + 1.0)
    shape = np.where(ell >= 2, 1e-10 / (ell + 10.0) ** 2, 0.0)
    spectra = {"TT": shape, "TE": 0.3 * shape, "TB": 0.02 * shape, "EE": 0.2 * shape, "EB": 0.01 * shape,
               "BB": 0.05 * shape}
    expected = est.expected_bandpowers(spectra, cross=cross)
    got = (w @ np.concatenate([spectra[s] for s in SPECTRA])).reshape(6, b.n_bins)
    for i, s in enumerate(SPECTRA):
        np.testing.assert_allclose(got[i], expected[s], rtol=1e-10, atol=1e-12 * np.abs(expected["TT"]).max())
    # each spectrum's own block carries it: TT's bins from a TT-only sky are those of the whole sky
    tt = w[: b.n_bins, : lmax + 1] @ shape
    np.testing.assert_allclose(tt, expected["TT"], rtol=1e-3)


def _transfer(nb=3):
    f = np.array([[0.9, 0.95, 1.0], [np.nan, 1.1, 0.97], [np.nan] * 3, [0.8, 0.85, 0.9], [np.nan] * 3,
                  [0.7, 0.75, 0.8]])
    return PolarizedBandpowerTransfer(BINS["ell_min"], BINS["ell_max"], BINS["ell_eff"], f,
                                      np.where(np.isfinite(f), 0.01, np.nan), {"n_sims": 40})


def test_polarized_transfer_table_round_trip_and_factors(tmp_path):
    t = _transfer()
    back = PolarizedBandpowerTransfer.read_csv(t.write_csv(tmp_path / "transfer.csv"))
    np.testing.assert_array_equal(back.transfer, t.transfer)  # nan where not measured, kept as nan
    np.testing.assert_array_equal(back.ell_min, t.ell_min)
    f = back.factors
    np.testing.assert_allclose(f[1], np.sqrt(f[0] * f[3]), rtol=1e-15)   # TE: sqrt(F_TT F_EE)
    np.testing.assert_allclose(f[2], np.sqrt(f[0] * f[5]), rtol=1e-15)   # TB
    np.testing.assert_allclose(f[4], np.sqrt(f[3] * f[5]), rtol=1e-15)   # EB
    cl = np.arange(1.0, 19.0).reshape(6, 3) * 1e-12
    cov = np.diag(cl.ravel() ** 2)
    bp = PolarizedBandpowers(t.ell_min, t.ell_max, t.ell_eff, cl, cl / 10, cl * 2, cl / 5, cov, {})
    out = back.apply(bp)
    np.testing.assert_allclose(out.cl, cl / f, rtol=1e-15)
    np.testing.assert_allclose(out.covariance, cov / np.outer(f.ravel(), f.ravel()), rtol=1e-15)
    c = BandpowerCovariance(matrix=cov, spectra=SPECTRA, **BINS)
    np.testing.assert_allclose(back.apply_to_covariance(c).matrix, out.covariance, rtol=1e-15)
    with pytest.raises(InvalidInputError, match="applies to a temperature covariance"):
        BandpowerTransfer(t.ell_min, t.ell_max, t.ell_eff, [1.0, 1.0, 1.0]).apply_to_covariance(c)


def test_transfer_tables_of_the_other_kind_are_refused(tmp_path):
    pol = _transfer().write_csv(tmp_path / "pol.csv")
    with pytest.raises(InputFileError, match="has a 'spectrum' column"):
        BandpowerTransfer.read_csv(pol)
    temp = BandpowerTransfer(BINS["ell_min"], BINS["ell_max"], BINS["ell_eff"], [1.0, 0.9, 0.8]).write_csv(
        tmp_path / "t.csv")
    with pytest.raises(InputFileError, match="has no 'spectrum' column: it is a temperature transfer table"):
        PolarizedBandpowerTransfer.read_csv(temp)
    text = pol.read_text().replace("BB,2,9,5.5,0.7,", "BB,2,9,5.5,-0.7,")
    (tmp_path / "neg.csv").write_text(text)
    with pytest.raises(InputFileError, match="BB transfer function is -0.7 in bin 0"):
        PolarizedBandpowerTransfer.read_csv(tmp_path / "neg.csv")


@pytest.mark.parametrize("suffix", [".npz", ".fits"])
@pytest.mark.parametrize("polarized", [False, True])
def test_settings_round_trip_in_both_formats(tmp_path, suffix, polarized):
    # FITS keeps the same settings as npz (the SETTINGS extension holds their JSON): long, multi-line and
    # non-ASCII values, numbers as numbers; the header cards are a shortened ASCII copy for the eye
    rng = np.random.default_rng(8)
    settings = {"bandpower_transfer_key": "0123456789abcdef", "bandpower_transfer_max_relative_error": 0.125,
                "seed": 7, "map": "/data/tern/" + "very_long_directory/" * 6 + "carte_été.fits",
                "note": "two\nlines", "observer": "Zoë"}
    if polarized:
        c = dataclasses.replace(_six(rng), settings=settings, kind="simulation", n_sims=40)
    else:
        a = rng.standard_normal((3, 3))
        c = BandpowerCovariance(matrix=a @ a.T, kind="simulation", n_sims=40, settings=settings, **BINS)
    back = read_covariance(c.write(tmp_path / f"cov{suffix}"))
    assert back.settings == settings and (back.kind, back.n_sims) == ("simulation", 40)
    assert isinstance(back.settings["seed"], int) and isinstance(back.settings["bandpower_transfer_max_relative_error"],
                                                                 float)
    if suffix == ".fits":
        from astropy.io import fits

        header = fits.getheader(tmp_path / f"cov{suffix}")
        assert header["MAP"] == settings["map"][:60] and header["OBSERVER"] == "Zo\\xeb"
        assert header["NOTE"] == "two lines"
        assert header["BANDPOWER_TRANSFER_KEY"] == "0123456789abcdef"


def test_a_fits_file_without_settings_reads_its_kind_and_count(tmp_path):
    # the layout before the SETTINGS extension
    from astropy.io import fits

    rng = np.random.default_rng(9)
    a = rng.standard_normal((3, 3))
    path = BandpowerCovariance(matrix=a @ a.T, kind="simulation", n_sims=12, settings={"seed": 1},
                               **BINS).write(tmp_path / "cov.fits")
    with fits.open(path) as hdul:
        fits.HDUList([h for h in hdul if h.name != "SETTINGS"]).writeto(tmp_path / "old.fits")
    back = read_covariance(tmp_path / "old.fits")
    assert (back.kind, back.n_sims, back.settings) == ("simulation", 12, {})
    np.testing.assert_array_equal(back.matrix, a @ a.T)
