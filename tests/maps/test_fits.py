"""FITS input/output of HEALPix maps and masks (cmbtools.maps.read_sky_map / write_sky_map / read_mask)."""

from __future__ import annotations

import healpy as hp
import numpy as np
import pytest
from astropy.io import fits

from cmbtools import __version__
from cmbtools.exceptions import CmbtoolsWarning, InputFileError, InvalidInputError, OutputExistsError
from cmbtools.maps import (
    UNSEEN,
    MapInfo,
    missing_pixels,
    read_sky_map,
    read_mask,
    unit_scale,
    write_sky_map,
    write_mask,
)

NSIDE = 16
NPIX = 12 * NSIDE**2


@pytest.fixture
def sky(rng):
    """A map of ~100 uK fluctuations in K_CMB."""
    return 1e-4 * rng.standard_normal(NPIX)


def _write_raw(path, columns, header=None, ordering="RING", nside=NSIDE, primary=True):
    """Write a HEALPix-like table with astropy directly (to craft files our writer would refuse)."""
    hdu = fits.BinTableHDU.from_columns(columns)
    if ordering is not None:
        hdu.header["ORDERING"] = ordering
    if nside is not None:
        hdu.header["NSIDE"] = nside
    hdu.header["PIXTYPE"] = "HEALPIX"
    for k, v in (header or {}).items():
        hdu.header[k] = v
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path)
    return path


# ---------------------------------------------------------------- round trips

@pytest.mark.parametrize("nest", [False, True], ids=["RING", "NESTED"])
@pytest.mark.parametrize("dtype", ["float32", "float64"])
def test_round_trip_ordering_and_dtype(tmp_path, sky, nest, dtype):
    path = write_sky_map(tmp_path / "m.fits", sky, nested=nest, dtype=dtype, coordinates="G")
    m, info = read_sky_map(path)
    # float32 keeps ~7 significant digits (IEEE 754 single precision; common practice)
    rtol = 1e-7 if dtype == "float32" else 0.0
    np.testing.assert_allclose(m, sky, rtol=rtol, atol=0)
    assert m.dtype == np.float64
    assert info == MapInfo(
        path=str(path), nside=NSIDE, ordering_in_file="NESTED" if nest else "RING", unit_in_file="K_CMB",
        coord="G", dtype_in_file=dtype, n_missing=0, is_partial=False, sha256=info.sha256,
    )
    assert len(info.sha256) == 64
    # healpy (reference reader) sees the same map, in the stored ordering
    ref = hp.read_map(path, nest=False, dtype=np.float64)
    np.testing.assert_allclose(ref, sky, rtol=rtol, atol=0)


def test_nested_file_from_healpy_is_reordered(tmp_path, sky):
    # healpy writes the NESTED ordering of the same sky; we must return the RING map
    p = tmp_path / "nest.fits"
    hp.write_map(p, hp.reorder(sky, r2n=True), nest=True, column_units="K_CMB", dtype=np.float64)
    m, info = read_sky_map(p)
    assert info.ordering_in_file == "NESTED"
    np.testing.assert_array_equal(m, sky)


@pytest.mark.parametrize(
    "unit, scale",
    [("K", 1.0), ("mK", 1e-3), ("uK", 1e-6), ("K_CMB", 1.0), ("mK_CMB", 1e-3), ("uK_CMB", 1e-6)],
)
def test_round_trip_units(tmp_path, sky, unit, scale):
    path = write_sky_map(tmp_path / "u.fits", sky, unit=unit)
    with fits.open(path) as hdul:
        stored = np.asarray(hdul[1].data.field(0), dtype=np.float64)
        assert hdul[1].header["TUNIT1"] == unit
    # the file holds the values in the stated unit; reading converts back to K_CMB
    np.testing.assert_allclose(stored, sky / scale, rtol=1e-15)
    m, info = read_sky_map(path)
    assert info.unit_in_file == unit
    np.testing.assert_allclose(m, sky, rtol=1e-15)


@pytest.mark.parametrize(
    "text, scale",
    [
        ("K", 1.0), ("Kelvin", 1.0), ("KCMB", 1.0), ("K_CMB", 1.0), ("K (CMB)", 1.0), ("Kcmb", 1.0),
        ("K_thermo", 1.0), ("mK", 1e-3), ("mK_CMB", 1e-3), ("mK (CMB)", 1e-3),
        ("uK", 1e-6), ("\u00b5K", 1e-6), ("\u03bcK_CMB", 1e-6), ("muK", 1e-6), ("microK", 1e-6),
        ("uK_CMB", 1e-6), ("UK_CMB", 1e-6), ("nK", 1e-9),
    ],
)
def test_unit_names(text, scale):
    # SI prefixes m = 1e-3, u (micro) = 1e-6, n = 1e-9 (BIPM SI brochure)
    assert unit_scale(text) == scale


@pytest.mark.parametrize(
    "text, match",
    [("K_RJ", "Rayleigh-Jeans"), ("uK_RJ", "Rayleigh-Jeans"), ("K (antenna)", "Rayleigh-Jeans"),
     ("MJy/sr", "surface brightness"), ("Jy/sr", "surface brightness"), ("furlong", "not a recognised")],
)
def test_unit_names_refused(text, match):
    with pytest.raises(InvalidInputError, match=match):
        unit_scale(text)


@pytest.mark.parametrize("unit, factor", [("mK", 1e-3), ("muK", 1e-6), ("K (CMB)", 1.0), ("KCMB", 1.0)])
def test_units_of_healpy_written_files(tmp_path, sky, unit, factor):
    p = tmp_path / "h.fits"
    hp.write_map(p, sky / factor, column_units=unit, dtype=np.float64)
    m, info = read_sky_map(p)
    assert info.unit_in_file == unit
    np.testing.assert_allclose(m, sky, rtol=1e-14)


def test_foreign_unit_is_an_error_unless_overridden(tmp_path, sky):
    p = tmp_path / "rj.fits"
    hp.write_map(p, sky * 1e6, column_units="uK_RJ", dtype=np.float64)
    with pytest.raises(InputFileError, match=r"rj\.fits: .*Rayleigh-Jeans.*pass unit="):
        read_sky_map(p)
    m, info = read_sky_map(p, unit="uK_CMB")
    np.testing.assert_allclose(m, sky, rtol=1e-14)
    assert info.unit_in_file == "uK_RJ"
    p2 = tmp_path / "mjy.fits"
    hp.write_map(p2, sky, column_units="MJy/sr", dtype=np.float64)
    with pytest.raises(InputFileError, match="surface brightness"):
        read_sky_map(p2)


def test_antenna_temperature_type_is_refused(tmp_path, sky):
    p = _write_raw(tmp_path / "a.fits", [fits.Column(name="T", format="D", unit="K", array=sky)],
                   header={"TEMPTYPE": "ANTENNA"})
    with pytest.raises(InputFileError, match="TEMPTYPE='ANTENNA'"):
        read_sky_map(p)


def test_missing_unit_warns_and_assumes_kcmb(tmp_path, sky):
    p = tmp_path / "nounit.fits"
    hp.write_map(p, sky, dtype=np.float64)
    with pytest.warns(CmbtoolsWarning, match="states no unit; assuming K_CMB"):
        m, info = read_sky_map(p)
    assert info.unit_in_file is None
    np.testing.assert_array_equal(m, sky)


def test_unit_from_header_keyword(tmp_path, sky):
    p = _write_raw(tmp_path / "b.fits", [fits.Column(name="T", format="D", array=sky * 1e3)], header={"BUNIT": "mK"})
    m, info = read_sky_map(p)
    assert info.unit_in_file == "mK"
    np.testing.assert_allclose(m, sky, rtol=1e-15)


@pytest.mark.parametrize("field", [0, 1, 2])
def test_fields(tmp_path, rng, field):
    maps3 = [1e-5 * (k + 1) * rng.standard_normal(NPIX) for k in range(3)]
    p = tmp_path / "three.fits"
    hp.write_map(p, maps3, column_units=["K_CMB", "mK", "uK"], dtype=np.float64)
    m, info = read_sky_map(p, column=field)
    np.testing.assert_allclose(m, maps3[field] * [1.0, 1e-3, 1e-6][field], rtol=1e-15)
    assert info.unit_in_file == ["K_CMB", "mK", "uK"][field]


def test_rows_of_1024_values(tmp_path, sky):
    # the common HEALPix layout of 1024 values per table row (common practice, HEALPix FITS files)
    p = _write_raw(tmp_path / "rows.fits",
                   [fits.Column(name="TEMPERATURE", format="1024D", unit="K", array=sky.reshape(-1, 1024))])
    m, _ = read_sky_map(p)
    np.testing.assert_array_equal(m, sky)


# ---------------------------------------------------------------- partial sky and missing pixels

@pytest.mark.parametrize("nest", [False, True], ids=["RING", "NESTED"])
def test_partial_round_trip(tmp_path, sky, nest):
    m = sky.copy()
    m[100:2000] = UNSEEN
    m[2500] = np.nan
    m[2600] = np.inf
    path = write_sky_map(tmp_path / "part.fits", m, observed_only=True, nested=nest, unit="uK_CMB")
    with fits.open(path) as hdul:
        h = hdul[1].header
        assert (h["OBJECT"], h["INDXSCHM"], h["NSIDE"]) == ("PARTIAL", "EXPLICIT", NSIDE)
        assert hdul[1].data.field("PIXEL").size == NPIX - 1902
    back, info = read_sky_map(path)
    assert info.is_partial and info.n_missing == 1902
    bad = missing_pixels(back)
    np.testing.assert_array_equal(bad, missing_pixels(m))
    assert np.all(back[bad] == UNSEEN)
    np.testing.assert_allclose(back[~bad], m[~bad], rtol=1e-15)
    # healpy's own partial-file reader agrees (reference)
    ref = hp.read_map(path, partial=True, nest=False, dtype=np.float64)
    np.testing.assert_allclose(ref[~bad] * 1e-6, m[~bad], rtol=1e-15)


def test_partial_file_written_by_healpy(tmp_path, sky):
    m = sky.copy()
    m[:1000] = UNSEEN
    p = tmp_path / "hpart.fits"
    hp.write_map(p, m, partial=True, column_units="K_CMB", dtype=np.float64)
    back, info = read_sky_map(p)
    assert info.is_partial and info.n_missing == 1000
    np.testing.assert_array_equal(back, m)


@pytest.mark.parametrize("bad_value", [UNSEEN, np.nan, np.inf, -np.inf], ids=["UNSEEN", "NaN", "inf", "-inf"])
@pytest.mark.parametrize("dtype", ["E", "D"], ids=["float32", "float64"])
def test_missing_pixel_kinds_in_file(tmp_path, sky, bad_value, dtype):
    m = sky.copy()
    holes = np.array([0, 7, 1500, NPIX - 1])
    m[holes] = bad_value
    p = _write_raw(tmp_path / "holes.fits", [fits.Column(name="T", format=dtype, unit="K", array=m)])
    back, info = read_sky_map(p)
    assert info.n_missing == holes.size
    np.testing.assert_array_equal(np.flatnonzero(missing_pixels(back)), holes)
    assert np.all(back[holes] == UNSEEN)  # every kind becomes the one sentinel


def test_writer_stores_every_missing_kind_as_unseen(tmp_path, sky):
    m = sky.copy()
    m[[1, 2, 3]] = [np.nan, np.inf, UNSEEN]
    path = write_sky_map(tmp_path / "w.fits", m)
    with fits.open(path) as hdul:
        stored = hdul[1].data.field(0)[[1, 2, 3]]
    np.testing.assert_array_equal(stored, [UNSEEN] * 3)


# ---------------------------------------------------------------- headers and overwrite policy

def test_header_keywords(tmp_path, sky):
    path = write_sky_map(tmp_path / "h.fits", sky, unit="uK_CMB", coordinates="C", header={"SURVEY": "Tern Sky Survey"})
    with fits.open(path) as hdul:
        h = hdul[1].header
        assert h["PIXTYPE"] == "HEALPIX" and h["ORDERING"] == "RING" and h["NSIDE"] == NSIDE
        assert h["INDXSCHM"] == "IMPLICIT" and h["COORDSYS"] == "C" and h["TUNIT1"] == "uK_CMB"
        assert h["FIRSTPIX"] == 0 and h["LASTPIX"] == NPIX - 1
        assert h["CREATOR"] == f"cmbtools {__version__}" and h["SURVEY"] == "Tern Sky Survey"
    _, info = read_sky_map(path)
    assert info.coord == "C"


def test_reserved_header_keyword_refused(tmp_path, sky):
    with pytest.raises(InvalidInputError, match="may not set the HEALPix keyword 'NSIDE'"):
        write_sky_map(tmp_path / "x.fits", sky, header={"NSIDE": 4})
    assert not (tmp_path / "x.fits").exists()


def test_spelled_out_coordinate_system(tmp_path, sky):
    p = _write_raw(tmp_path / "c.fits", [fits.Column(name="T", format="D", unit="K", array=sky)],
                   header={"COORDSYS": "GALACTIC"})
    assert read_sky_map(p)[1].coord == "G"


def test_never_overwrites_silently(tmp_path, sky):
    path = write_sky_map(tmp_path / "o.fits", sky)
    before = path.read_bytes()
    with pytest.raises(OutputExistsError, match="output exists"):
        write_sky_map(path, 2 * sky)
    assert path.read_bytes() == before
    write_sky_map(path, 2 * sky, overwrite=True)
    np.testing.assert_array_equal(read_sky_map(path)[0], 2 * sky)
    assert [p.name for p in tmp_path.iterdir()] == ["o.fits"]  # no temporary file left behind


def test_micro_sign_is_written_as_ascii(tmp_path, sky):
    # FITS header values are printable ASCII only (FITS Standard 4.0, section 4.2.1)
    path = write_sky_map(tmp_path / "mu.fits", sky, unit="\u00b5K_CMB")
    with fits.open(path) as hdul:
        assert hdul[1].header["TUNIT1"] == "uK_CMB"
    np.testing.assert_allclose(read_sky_map(path)[0], sky, rtol=1e-15)


def test_write_rejects_bad_maps(tmp_path):
    with pytest.raises(InvalidInputError, match="not 12\\*nside\\*\\*2"):
        write_sky_map(tmp_path / "a.fits", np.zeros(100))
    with pytest.raises(InvalidInputError, match="float32 or float64"):
        write_sky_map(tmp_path / "a.fits", np.zeros(NPIX), dtype="int16")
    with pytest.raises(InvalidInputError, match="no valid pixel"):
        write_sky_map(tmp_path / "a.fits", np.full(NPIX, UNSEEN), observed_only=True)
    with pytest.raises(InvalidInputError, match="Rayleigh-Jeans"):
        write_sky_map(tmp_path / "a.fits", np.zeros(NPIX), unit="K_RJ")
    assert not (tmp_path / "a.fits").exists()


# ---------------------------------------------------------------- masks

def test_mask_round_trip_binary_and_weighted(tmp_path, rng):
    binary = (rng.random(NPIX) > 0.3).astype(float)
    weighted = binary * rng.random(NPIX)
    for name, w in (("b.fits", binary), ("w.fits", weighted)):
        path = write_mask(tmp_path / name, w, nested=True, dtype="float32")
        back = read_mask(path)
        np.testing.assert_allclose(back, w, rtol=1e-7, atol=0)  # float32 rounding (common practice)
        with fits.open(path) as hdul:
            assert "TUNIT1" not in hdul[1].header


def test_mask_from_integer_and_partial_files(tmp_path):
    w = np.zeros(NPIX, dtype=np.int16)
    w[:NPIX // 2] = 1
    p = _write_raw(tmp_path / "int.fits", [fits.Column(name="M", format="I", array=w)])
    np.testing.assert_array_equal(read_mask(p), w.astype(float))
    part = np.full(NPIX, UNSEEN)
    part[10:20] = 1.0
    path = write_sky_map(tmp_path / "pm.fits", part, unit=None, observed_only=True)
    back = read_mask(path)  # pixels a partial file does not list get weight 0
    assert back.sum() == 10 and np.all(back[10:20] == 1)


@pytest.mark.parametrize("values, match", [(2.0, r"values in \[0, 1\]"), (0.0, "zero everywhere")])
def test_invalid_mask_file(tmp_path, values, match):
    p = _write_raw(tmp_path / "bad.fits", [fits.Column(name="M", format="D", array=np.full(NPIX, values))])
    with pytest.raises(InputFileError, match=r"bad\.fits: is not a valid mask: .*" + match):
        read_mask(p)


# ---------------------------------------------------------------- bad files

def test_nonexistent_file(tmp_path):
    with pytest.raises(InputFileError, match=r"nothere\.fits: no such file"):
        read_sky_map(tmp_path / "nothere.fits")


def test_directory(tmp_path):
    with pytest.raises(InputFileError, match="is a directory"):
        read_sky_map(tmp_path)


def test_not_fits(tmp_path):
    p = tmp_path / "text.fits"
    p.write_text("this is not a FITS file\n" * 20)
    with pytest.raises(InputFileError, match=r"text\.fits: cannot be read as FITS"):
        read_sky_map(p)


def test_truncated(tmp_path, sky):
    path = write_sky_map(tmp_path / "t.fits", sky)
    data = path.read_bytes()
    short = tmp_path / "short.fits"
    short.write_bytes(data[: len(data) // 2])
    with pytest.raises(InputFileError, match=r"short\.fits: .*truncated"):
        read_sky_map(short)


def test_no_table(tmp_path):
    p = tmp_path / "img.fits"
    fits.PrimaryHDU(np.zeros((4, 4))).writeto(p)
    with pytest.raises(InputFileError, match="no binary-table extension"):
        read_sky_map(p)


def test_pixel_count_not_healpix(tmp_path):
    p = _write_raw(tmp_path / "n.fits", [fits.Column(name="T", format="D", unit="K", array=np.zeros(1000))], nside=None)
    with pytest.raises(InputFileError, match="holds 1000 values, which is not 12\\*nside\\*\\*2"):
        read_sky_map(p)


def test_nside_not_power_of_two(tmp_path):
    # 12 * 3**2 = 108 values: a whole-number nside, but not a power of two
    p = _write_raw(tmp_path / "n3.fits", [fits.Column(name="T", format="D", unit="K", array=np.zeros(108))], nside=None)
    with pytest.raises(InputFileError, match="nside 3, which is not a power of two"):
        read_sky_map(p)
    p2 = _write_raw(tmp_path / "h3.fits", [fits.Column(name="T", format="D", unit="K", array=np.zeros(108))], nside=3)
    with pytest.raises(InputFileError, match="NSIDE=3, which is not a power of two"):
        read_sky_map(p2)


def test_nside_keyword_disagrees(tmp_path, sky):
    p = _write_raw(tmp_path / "d.fits", [fits.Column(name="T", format="D", unit="K", array=sky)], nside=32)
    with pytest.raises(InputFileError, match="NSIDE=32 but 3072 pixels"):
        read_sky_map(p)


def test_field_does_not_exist(tmp_path, sky):
    path = write_sky_map(tmp_path / "f.fits", sky)
    with pytest.raises(InputFileError, match=r"f\.fits: has no field 1: it holds 1 map column\(s\) \(TEMPERATURE\)"):
        read_sky_map(path, column=1)


def test_missing_ordering_keyword(tmp_path, sky):
    p = _write_raw(tmp_path / "o.fits", [fits.Column(name="T", format="D", unit="K", array=sky)], ordering=None)
    with pytest.raises(InputFileError, match="no ORDERING keyword"):
        read_sky_map(p)
    m, info = read_sky_map(p, file_ordering="RING")
    np.testing.assert_array_equal(m, sky)


def test_broken_partial_files(tmp_path):
    cols = [fits.Column(name="PIXEL", format="J", array=np.array([1, 2, 5000])),
            fits.Column(name="SIGNAL", format="D", unit="K", array=np.zeros(3))]
    p = _write_raw(tmp_path / "p1.fits", cols, header={"INDXSCHM": "EXPLICIT", "OBJECT": "PARTIAL"})
    with pytest.raises(InputFileError, match=r"pixel numbers outside \[0, 3071\]"):
        read_sky_map(p)
    cols[0] = fits.Column(name="PIXEL", format="J", array=np.array([1, 2, 2]))
    p = _write_raw(tmp_path / "p2.fits", cols, header={"INDXSCHM": "EXPLICIT"})
    with pytest.raises(InputFileError, match="more than once"):
        read_sky_map(p)
    p = _write_raw(tmp_path / "p3.fits", [cols[1]], header={"INDXSCHM": "EXPLICIT"})
    with pytest.raises(InputFileError, match="has no PIXEL column"):
        read_sky_map(p)
    p = _write_raw(tmp_path / "p4.fits", cols, header={"INDXSCHM": "EXPLICIT"}, nside=None)
    with pytest.raises(InputFileError, match="without an NSIDE keyword"):
        read_sky_map(p)
