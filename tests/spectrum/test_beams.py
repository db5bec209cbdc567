"""Tests of beam transfer functions (cmbtools.spectrum.beams).

Outside references: healpy.gauss_beam (a general-purpose HEALPix library; it
does not download anything), scipy's Legendre polynomials, and the definition
of the full width at half maximum (common practice).
"""

from __future__ import annotations

import healpy as hp
import numpy as np
import pytest
from astropy.io import fits
from scipy.special import eval_legendre

from cmbtools.spectrum.beams import gaussian_beam, read_beam, write_beam
from cmbtools.exceptions import CmbtoolsWarning, InputFileError, InvalidInputError, OutputExistsError


# --------------------------------------------------------------------------- Gaussian beam


@pytest.mark.parametrize("fwhm_arcmin,lmax", [(5.0, 4000), (25.0, 1500), (180.0, 300)])
def test_gaussian_beam_matches_healpy(fwhm_arcmin, lmax):
    b = gaussian_beam(fwhm_arcmin, lmax)
    ref = hp.gauss_beam(np.radians(fwhm_arcmin / 60.0), lmax=lmax)  # healpy reference
    assert b.shape == (lmax + 1,) and b.dtype == np.float64
    np.testing.assert_allclose(b, ref, rtol=1e-12, atol=1e-300)


def test_gaussian_beam_has_half_power_at_half_the_fwhm():
    # Back in real space, b(theta) = sum_l (2l+1)/(4 pi) B_l P_l(cos theta) is a Gaussian
    # whose value at theta = FWHM/2 is half the peak (definition of FWHM, common practice);
    # curvature corrections are of order sigma^2 ~ 1e-5 for a 1-degree beam.
    fwhm = 60.0
    b = gaussian_beam(fwhm, 3000)
    ell = np.arange(b.size)
    theta = np.radians(fwhm / 60.0) / 2.0
    profile = lambda t: np.sum((2 * ell + 1) / (4 * np.pi) * b * eval_legendre(ell, np.cos(t)))  # noqa: E731
    assert profile(theta) / profile(0.0) == pytest.approx(0.5, abs=2e-4)


def test_gaussian_beam_of_zero_width_is_one():
    np.testing.assert_array_equal(gaussian_beam(0.0, 10), np.ones(11))


@pytest.mark.parametrize("fwhm", [-1.0, float("nan"), float("inf"), "wide"])
def test_gaussian_beam_rejects_bad_width(fwhm):
    with pytest.raises(InvalidInputError, match="'fwhm_arcmin'"):
        gaussian_beam(fwhm, 10)


@pytest.mark.parametrize("lmax", [-1, 2.5, None])
def test_gaussian_beam_rejects_bad_lmax(lmax):
    with pytest.raises(InvalidInputError, match="'lmax'"):
        gaussian_beam(10.0, lmax)


# --------------------------------------------------------------------------- text tables


def test_round_trip_is_exact(tmp_path):
    b = gaussian_beam(25.0, 1200)
    path = write_beam(tmp_path / "tern_beam.csv", b, header="Tern Sky Survey, 145 GHz\nGaussian, 25 arcmin")
    text = path.read_text()
    assert text.startswith("# Tern Sky Survey, 145 GHz\n# Gaussian, 25 arcmin\n")
    assert "\nell,b_ell\n0,1.0\n" in text
    back = read_beam(path)
    np.testing.assert_array_equal(back, b)
    np.testing.assert_array_equal(read_beam(path, lmax=100), b[:101])


def test_write_does_not_overwrite_unless_asked(tmp_path):
    path = write_beam(tmp_path / "b.csv", [1.0, 0.5])
    with pytest.raises(OutputExistsError):
        write_beam(path, [1.0, 0.25])
    np.testing.assert_array_equal(read_beam(path), [1.0, 0.5])
    write_beam(path, [1.0, 0.25], overwrite=True)
    np.testing.assert_array_equal(read_beam(path), [1.0, 0.25])


@pytest.mark.parametrize("bad", [[1.0, -0.1], [1.0, np.nan], [[1.0, 0.5]], [], "abc"])
def test_write_rejects_bad_values(tmp_path, bad):
    with pytest.raises(InvalidInputError, match="'b_ell'"):
        write_beam(tmp_path / "b.csv", bad)
    assert not (tmp_path / "b.csv").exists()


def test_whitespace_table_with_comments_and_extra_columns(tmp_path):
    path = tmp_path / "beam.txt"
    path.write_text(
        "# measured beam of an invented instrument\n"
        "\n"
        "ELL   B_ELL   error\n"
        "0  1.0   0.0   # the monopole\n"
        "1  0.98  0.01\n"
        "2  0.95  0.01\n"
    )
    np.testing.assert_array_equal(read_beam(path), [1.0, 0.98, 0.95])


def _table(tmp_path, body, name="beam.csv"):
    path = tmp_path / name
    path.write_text(body)
    return path


@pytest.mark.parametrize(
    "body,message",
    [
        ("ell,beam\n0,1\n1,0.9\n", r"line 1: .*missing 'b_ell'"),
        ("b_ell\n1\n0.9\n", r"missing 'ell'"),
        ("ell,b_ell\n0,1\n1,abc\n", r"line 3: the b_ell cell 'abc' is not a number"),
        ("ell,b_ell\n0,1\n1,-0.5\n", r"line 3 \(ell=1\): b_ell = -0.5 is negative"),
        ("ell,b_ell\n0,1\n1,nan\n", r"line 3 \(ell=1\): b_ell is nan; values must be finite"),
        ("ell,b_ell\n0,1\n1,0.9\n3,0.8\n", r"line 4: ell = 3 follows ell = 1"),
        ("ell,b_ell\n0,1\n1,0.9\n1,0.9\n", r"line 4: ell = 1 follows ell = 1"),
        ("ell,b_ell\n2,1\n3,0.9\n", r"starts at ell=2; it must start at ell=0"),
        ("ell,b_ell\n0,1\n1.5,0.9\n", r"ell = 1.5 is not a whole number"),
        ("ell,b_ell\n0,1\n1\n", r"line 3: expected 2 columns"),
        ("# only a comment\n", r"is empty"),
        ("ell,b_ell\n", r"no rows"),
    ],
)
def test_bad_text_tables_name_the_problem(tmp_path, body, message):
    path = _table(tmp_path, body)
    with pytest.raises(InputFileError, match=message) as info:
        read_beam(path)
    assert info.value.path == str(path)


def test_lmax_beyond_the_table(tmp_path):
    path = write_beam(tmp_path / "b.csv", gaussian_beam(30.0, 50))
    with pytest.raises(InputFileError, match="ends at ell=50 but lmax=51 was requested"):
        read_beam(path, lmax=51)
    assert read_beam(path, lmax=50).size == 51


def test_missing_file_and_directory(tmp_path):
    with pytest.raises(InputFileError, match="no such file"):
        read_beam(tmp_path / "absent.csv")
    with pytest.raises(InputFileError, match="is a directory"):
        read_beam(tmp_path)


def test_binary_garbage_is_rejected(tmp_path):
    path = tmp_path / "beam.bin"
    path.write_bytes(b"\xff\xfe\x00\x81" * 10)
    with pytest.raises(InputFileError, match="neither a FITS file nor a UTF-8 text table"):
        read_beam(path)


def test_unnormalised_beam_warns_and_is_used_as_given(tmp_path):
    path = _table(tmp_path, "ell,b_ell\n0,0.9\n1,0.8\n")
    with pytest.warns(CmbtoolsWarning, match=r"B_0 = 0.9, not 1; it is used as given"):
        b = read_beam(path)
    np.testing.assert_array_equal(b, [0.9, 0.8])
    # within 1e-3 of 1: no warning (filterwarnings=error would turn one into a failure)
    np.testing.assert_array_equal(read_beam(_table(tmp_path, "ell,b_ell\n0,0.9995\n", "ok.csv")), [0.9995])


# --------------------------------------------------------------------------- FITS tables


def test_fits_table_with_named_columns(tmp_path):
    b = gaussian_beam(10.0, 300)
    path = tmp_path / "beam.fits"
    cols = [fits.Column(name="ELL", format="J", array=np.arange(b.size)), fits.Column(name="B_ELL", format="D", array=b)]
    fits.BinTableHDU.from_columns(cols).writeto(path)
    np.testing.assert_array_equal(read_beam(path), b)
    np.testing.assert_array_equal(read_beam(path, lmax=20), b[:21])


def test_fits_table_with_a_single_column(tmp_path):
    b = gaussian_beam(10.0, 100).astype(np.float32)
    path = tmp_path / "beam.fits"
    fits.BinTableHDU.from_columns([fits.Column(name="TEMPERATURE", format="E", array=b)]).writeto(path)
    np.testing.assert_array_equal(read_beam(path), b.astype(np.float64))


@pytest.mark.parametrize(
    "columns,message",
    [
        ({"A": [1.0, 0.9], "B": [1.0, 0.8]}, r"must have columns ELL and B_ELL, or a single column"),
        ({"B_ELL": [1.0, 0.9], "X": [0, 1]}, r"has a B_ELL column but no ELL column"),
        ({"ELL": [0, 1, 2], "B_ELL": [1.0, -0.2, 0.5]}, r"row 2 \(ell=1\): b_ell = -0.2 is negative"),
        ({"ELL": [0, 2], "B_ELL": [1.0, 0.5]}, r"row 2: ell = 2 follows ell = 0"),
    ],
)
def test_bad_fits_tables(tmp_path, columns, message):
    path = tmp_path / "beam.fits"
    cols = [fits.Column(name=k, format="D", array=np.asarray(v, dtype=float)) for k, v in columns.items()]
    fits.BinTableHDU.from_columns(cols).writeto(path)
    with pytest.raises(InputFileError, match=message):
        read_beam(path)


def test_fits_without_a_table(tmp_path):
    path = tmp_path / "image.fits"
    fits.PrimaryHDU(np.zeros((4, 4))).writeto(path)
    with pytest.raises(InputFileError, match="no binary table"):
        read_beam(path)
