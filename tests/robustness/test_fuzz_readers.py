"""Property-based tests of the file readers: any input loads correctly or raises a CmbtoolsError.

Covered: ``maps.read_sky_map`` and ``maps.read_mask`` (random bytes, truncated and
corrupted real FITS files, FITS tables with random shapes, column types and
header keywords), ``maps.read_positions_csv`` and ``physics.read_bandpass``
(random and structured text).  For every input the reader either returns a
valid result (right length, finite where it must be, the documented value
ranges) or raises a :class:`~cmbtools.exceptions.CmbtoolsError` subclass; any
other exception type is a failure, and so is an example that runs longer than
a few seconds (a SIGALRM guard turns a hang into an error).

The examples are derandomized so that CI is reproducible; set
``CMBTOOLS_FUZZ_EXAMPLES=2000`` (for instance) to explore many more inputs
with fresh randomness.
"""

from __future__ import annotations

import io
import itertools
import math
import tempfile
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits
from hypothesis import assume, given
from hypothesis import strategies as st

from _fuzzing import Hang, attempt, fuzz_settings, only_our_warnings, time_limit
from cmbtools import maps, physics
from cmbtools._core.checks import UNSEEN
from cmbtools.exceptions import CmbtoolsError, InputFileError

_WORKDIR = Path(tempfile.mkdtemp(prefix="cmbtools-fuzz-readers-"))
_COUNTER = itertools.count()


def new_path(suffix):
    return _WORKDIR / f"case{next(_COUNTER)}{suffix}"


def check_loaded_map(m, info):
    assert isinstance(m, np.ndarray) and m.dtype == np.float64 and m.ndim == 1
    nside = info.nside
    assert nside >= 1 and nside & (nside - 1) == 0
    assert m.size == 12 * nside**2 == info.npix
    # every missing pixel is the one sentinel; nothing else is non-finite
    assert np.all(np.isfinite(m))
    assert info.n_missing == int(np.count_nonzero(m == UNSEEN)) == int(maps.missing_pixels(m).sum())
    assert info.ordering_in_file in ("RING", "NESTED")
    assert len(info.sha256) == 64


def check_loaded_mask(w):
    assert isinstance(w, np.ndarray) and w.dtype == np.float64 and w.ndim == 1
    nside = int(round(math.sqrt(w.size / 12)))
    assert 12 * nside**2 == w.size and nside & (nside - 1) == 0
    assert np.all(np.isfinite(w)) and w.min() >= 0.0 and w.max() <= 1.0 and w.max() > 0


def read_both(path, **kwargs):
    """Run read_sky_map and read_mask on one file and check whatever they return."""
    result, err, caught = attempt(maps.read_sky_map, path, **kwargs)
    only_our_warnings(caught)
    if err is None:
        check_loaded_map(*result)
    mask, mask_err, caught = attempt(maps.read_mask, path, **kwargs)
    only_our_warnings(caught)
    if mask_err is None:
        check_loaded_mask(mask)
    return result, err, mask, mask_err


# ---------------------------------------------------------------- random and damaged bytes

_FITS_CARD = b"SIMPLE  =                    T"


@fuzz_settings(60)
@given(st.one_of(st.binary(max_size=6000), st.binary(max_size=3000).map(lambda b: _FITS_CARD.ljust(80) + b)))
def test_random_bytes_never_crash_the_map_readers(data):
    path = new_path(".fits")
    path.write_bytes(data)
    result, err, mask, mask_err = read_both(path)
    # random bytes are (almost surely) not a HEALPix file; if they were, the checks above hold
    if err is not None:
        assert isinstance(err, InputFileError) and err.path == str(path)


def _reference_file(nside=4, nest=False, partial=False):
    """A small valid HEALPix file written by cmbtools, its map, and where its table data end."""
    rng = np.random.default_rng(nside + 2 * nest + 4 * partial)
    m = rng.normal(0.0, 1e-4, 12 * nside**2)
    if partial:
        m[rng.random(m.size) < 0.5] = UNSEEN
    path = new_path(".fits")
    maps.write_sky_map(path, m, unit="K_CMB", nested=nest, observed_only=partial, coordinates="G")
    with fits.open(path) as hdul:
        data_end = hdul[1].fileinfo()["datLoc"] + hdul[1].data.nbytes
    return path.read_bytes(), m, data_end


_REFERENCES = {key: _reference_file(4, *key) for key in ((False, False), (True, False), (False, True))}


@fuzz_settings(60)
@given(
    kind=st.sampled_from(sorted(_REFERENCES)),
    back=st.one_of(st.just(0), st.integers(min_value=0, max_value=2880), st.integers(min_value=0, max_value=1 << 16)),
)
def test_truncated_real_files_load_in_full_or_not_at_all(kind, back):
    data, m, data_end = _REFERENCES[kind]
    cut = max(0, len(data) - back)  # keep the first ``cut`` bytes
    path = new_path(".fits")
    path.write_bytes(data[:cut])
    result, err, mask, mask_err = read_both(path)
    if err is None:
        # a loaded map is the complete one, never a partial read padded with zeros
        np.testing.assert_array_equal(result[0], m)
    if cut < data_end:
        # some of the table's bytes are gone: the file must be refused
        assert isinstance(err, InputFileError), f"cut at {cut} of {len(data)} bytes (data end at {data_end}) loaded"


@fuzz_settings(60)
@given(
    kind=st.sampled_from(sorted(_REFERENCES)),
    flips=st.lists(st.tuples(st.integers(min_value=0, max_value=1 << 16), st.integers(min_value=0, max_value=255)),
                   min_size=1, max_size=12),
)
def test_corrupted_real_files_never_crash(kind, flips):
    data = bytearray(_REFERENCES[kind][0])
    for where, byte in flips:
        data[where % len(data)] = byte
    path = new_path(".fits")
    path.write_bytes(bytes(data))
    _, err, _, mask_err = read_both(path)
    # either reader loads (checked inside read_both) or raises one of the documented errors
    assert all(e is None or isinstance(e, CmbtoolsError) for e in (err, mask_err))


# ---------------------------------------------------------------- FITS tables with random layouts

_NSIDES = [1, 2, 4, 8]
# the common layouts come up more often than the exotic ones, so that many examples get past
# the first checks and exercise the later ones
_FORMATS = ["D", "D", "E", "E", "J", "K", "I", "B", "L", "A8", "C", "M", "2D", "3E", "1024E", "PD()"]


def often(common, *rare):
    """A strategy that draws ``common`` about four times in five and one of ``rare`` otherwise."""
    return st.one_of(*[st.just(common)] * 4, st.sampled_from(list(rare))) if rare else st.just(common)


@st.composite
def fits_tables(draw):
    """A FITS binary table whose layout, types and HEALPix keywords are drawn at random."""
    nside = draw(st.sampled_from(_NSIDES))
    npix = 12 * nside**2
    rows_kind = draw(st.one_of(st.sampled_from(["exact", "partial"]), st.sampled_from(["off_by_some", "random"])))
    fmt = draw(st.one_of(st.sampled_from(["D", "E"]), st.sampled_from(_FORMATS)))
    digits = fmt[: len(fmt) - len(fmt.lstrip("0123456789"))]
    code = fmt[len(digits)]  # the FITS type letter (TFORM: repeat count, then the letter)
    repeat = int(digits) if digits else 1  # for 'A8' the 8 is the string width, after the letter
    if rows_kind == "exact":
        n_values = npix
    elif rows_kind == "off_by_some":
        n_values = max(0, npix + draw(st.sampled_from([-1, 1, -12, 7, npix])))
    elif rows_kind == "random":
        n_values = draw(st.integers(min_value=0, max_value=900))
    else:
        n_values = draw(st.integers(min_value=0, max_value=npix + 3))
    n_rows = max(0, n_values // repeat) if repeat > 1 else n_values
    seed = draw(st.integers(min_value=0, max_value=2**32 - 1))
    rng = np.random.default_rng(seed)
    values = rng.normal(0.0, 1.0, n_rows * repeat)
    special = draw(st.one_of(st.sampled_from(["none", "unit_interval"]),
                             st.sampled_from(["nan", "inf", "unseen", "big", "unit_interval", "all_unseen", "zeros"])))
    if special == "nan":
        values[rng.random(values.size) < 0.2] = np.nan
    elif special == "inf":
        values[rng.random(values.size) < 0.2] = np.inf
    elif special == "unseen":
        values[rng.random(values.size) < 0.3] = UNSEEN
    elif special == "big":
        values *= 1e300  # finite, but overflows float32 columns
    elif special == "unit_interval":
        values = rng.random(values.size)
    elif special == "all_unseen":
        values[:] = UNSEEN
    elif special == "zeros":
        values[:] = 0.0
    unit = draw(often("K_CMB", None, "uK", "mK_CMB", "K_RJ", "Jy/sr", "banana", ""))

    columns = []
    has_pixel = rows_kind == "partial" or draw(st.integers(0, 3)) == 0
    if has_pixel:
        pix_kind = draw(often("valid", "duplicate", "negative", "too_large", "float", "float_int"))
        pix = rng.permutation(npix)[: n_rows] if n_rows <= npix else rng.integers(0, npix, n_rows)
        pix = pix.astype(np.int64)
        if n_rows and pix_kind == "duplicate":
            pix[-1] = pix[0]
        elif n_rows and pix_kind == "negative":
            pix[0] = -1
        elif n_rows and pix_kind == "too_large":
            pix[0] = npix
        if pix_kind == "float":
            columns.append(fits.Column(name="PIXEL", format="D", array=pix + 0.5))
        elif pix_kind == "float_int":
            columns.append(fits.Column(name="PIXEL", format="D", array=pix.astype(np.float64)))
        else:
            columns.append(fits.Column(name="PIXEL", format=draw(st.sampled_from(["J", "K"])), array=pix))
    if code in "DE":
        arr = values.reshape(n_rows, repeat) if repeat > 1 else values
    elif code in "JKIB":
        with np.errstate(all="ignore"):
            arr = np.clip(np.nan_to_num(values * 100, nan=0, posinf=0, neginf=0), -100, 100).astype(np.int64)
        if code == "B":
            arr = np.abs(arr).astype(np.uint8)
    elif code == "L":
        arr = values > 0
    elif code == "A":
        arr = np.array([f"{v:.3g}" for v in values[:n_rows]])
    elif code in "CM":
        with np.errstate(all="ignore"):
            arr = values + 1j * values
    else:  # variable-length arrays
        n_rows = max(n_rows, 1)
        arr = np.empty(n_rows, dtype=object)
        for i in range(n_rows):
            arr[i] = values[i:i + 1 + i % 3] if values.size else np.zeros(1 + i % 3)
    name = draw(st.sampled_from(["TEMPERATURE", "I_STOKES", "T", "pixel"])) if not has_pixel else "SIGNAL"
    with np.errstate(all="ignore"):  # huge values overflow a float32 column: that is part of the test
        columns.append(fits.Column(name=name, format=fmt, array=arr, unit=unit or None))
    if draw(st.booleans()):
        columns.append(fits.Column(name="EXTRA", format="E", array=np.zeros(n_rows, dtype=np.float32)))
    hdu = fits.BinTableHDU.from_columns(columns)
    h = hdu.header
    ordering = draw(st.one_of(*[st.sampled_from(["RING", "NESTED"])] * 4,
                              st.sampled_from([None, "NEST", "ring", "nested ", "HILBERT", "", 3])))
    if ordering is not None:
        h["ORDERING"] = ordering
    nside_kw = draw(st.one_of(*[st.sampled_from(["missing", "right", "right"])] * 4,
                              st.sampled_from(["wrong", "not_power", "negative", "float", "half", "text", "huge",
                                               "largest", "bool"])))
    nside_value = {
        "right": nside, "wrong": nside * 2, "not_power": 3 * nside, "negative": -nside, "float": float(nside),
        "half": nside + 0.5, "text": "sixteen", "huge": 2**40, "largest": 2**29, "bool": True,
    }.get(nside_kw)
    if nside_value is not None:
        h["NSIDE"] = nside_value
    obj = draw(often("PARTIAL" if has_pixel else "FULLSKY", None, "PARTIAL", "FULLSKY", "garbage"))
    if obj is not None:
        h["OBJECT"] = obj
    indx = draw(often("EXPLICIT" if has_pixel else "IMPLICIT", None, "EXPLICIT", "IMPLICIT", "weird"))
    if indx is not None:
        h["INDXSCHM"] = indx
    if draw(st.booleans()):
        h["TEMPTYPE"] = draw(st.sampled_from(["THERMO", "ANTENNA", "x"]))
    if draw(st.booleans()):
        h["COORDSYS"] = draw(st.sampled_from(["G", "C", "E", "Q", "nonsense"]))
    primary = fits.PrimaryHDU()
    hdus = [primary, hdu]
    if draw(st.booleans()):  # an image extension before the table, as some pipelines write
        hdus.insert(1, fits.ImageHDU(np.zeros((2, 3))))
    buffer = io.BytesIO()
    fits.HDUList(hdus).writeto(buffer)
    facts = dict(nside=nside, npix=npix, n_values=n_rows * repeat, fmt=fmt, special=special, unit=unit,
                 ordering=ordering, nside_kw=nside_kw, obj=obj, indx=indx, has_pixel=has_pixel)
    return buffer.getvalue(), facts, values, columns


@fuzz_settings(150)
@given(table=fits_tables(), field=often(0, 1, 2), ordering=often(None, "RING", "NESTED", "bogus"))
def test_random_fits_tables_load_or_raise_the_documented_error(table, field, ordering):
    data, facts, values, columns = table
    path = new_path(".fits")
    path.write_bytes(data)
    result, err, mask, mask_err = read_both(path, field=field, ordering=ordering)
    if err is None:
        m, info = result
        # what a successful read implies about the file
        assert facts["ordering"] is not None or ordering is not None
        if facts["nside_kw"] in ("not_power", "negative", "half", "text", "huge", "bool"):
            raise AssertionError(f"a file with NSIDE keyword of kind {facts['nside_kw']!r} was accepted")


# A valid HEALPix table with 0 to 3 defects from a catalogue.  Each defect is either fatal (the
# reader must refuse the file), harmless (the file must load, and the map must equal what the
# HEALPix FITS convention says it holds) or open (either outcome is fine).  The expected map is
# recomputed independently from the stored column, the ordering and the pixel list.

_UNITS = {"K_CMB": 1.0, "uK": 1e-6, "mK_CMB": 1e-3, None: 1.0}
_FATAL_BOTH = {
    "bad_ordering", "nside_not_power", "nside_negative", "nside_half", "nside_text", "nside_bool", "nside_huge",
    "nside_largest", "explicit_without_pixel", "text_column", "complex_column", "variable_length_column",
    "field_too_big", "ordering_argument_bogus", "duplicate_pixel", "negative_pixel", "pixel_too_large",
    "fractional_pixel",
}
_FATAL_MAP = {"unit_rayleigh_jeans", "unit_surface_brightness", "unit_unknown", "temptype_antenna"}
_OPEN = {"pixel_column_unflagged"}  # may load (as a full-sky map of pixel numbers) or not
_PIXEL_DEFECTS = {"duplicate_pixel", "negative_pixel", "pixel_too_large", "fractional_pixel", "pixel_column_unflagged"}
_DEFECTS = sorted(
    _FATAL_BOTH | _FATAL_MAP | _OPEN
    # weights_out_of_range is judged on the values finally stored (a bool column is in [0, 1] again)
    | {"weights_out_of_range", "no_ordering", "no_ordering_but_argument", "nside_missing", "nside_wrong", "pixel_count", "lowercase_ordering",
       "nest_abbreviated", "no_unit", "int_column", "bool_column", "float32_column", "vector_column",
       "missing_values", "extra_column", "image_first", "junk_cards"}
)


@st.composite
def damaged_tables(draw):
    nside = draw(st.sampled_from([1, 2, 4, 8]))
    npix = 12 * nside**2
    partial = draw(st.booleans())
    nest = draw(st.booleans())
    unit = draw(st.sampled_from(["K_CMB", "uK", "mK_CMB"]))
    defects = set(draw(st.lists(st.sampled_from(_DEFECTS), max_size=3, unique=True)))
    # keep only the defects that apply to this layout
    defects -= {"explicit_without_pixel", "vector_column"} if partial else _PIXEL_DEFECTS
    if "no_ordering_but_argument" in defects:  # the argument says what the missing card would
        defects.discard("no_ordering")
    if {"no_ordering", "no_ordering_but_argument"} & defects:  # no ORDERING card to damage
        defects -= {"bad_ordering", "lowercase_ordering", "nest_abbreviated"}
    if "nside_missing" in defects:  # no NSIDE card to damage
        defects -= {"nside_wrong", "nside_not_power", "nside_negative", "nside_half", "nside_text", "nside_bool",
                    "nside_huge", "nside_largest"}
    rng = np.random.default_rng(draw(st.integers(min_value=0, max_value=2**32 - 1)))

    if partial:
        ring_pix = np.sort(rng.permutation(npix)[: max(1, int(rng.random() * npix))])
        n = ring_pix.size
    else:
        ring_pix, n = None, npix
    values = 0.05 + 0.95 * rng.random(n)  # weights in (0, 1], so the same file is also a valid mask
    if "pixel_count" in defects:
        if partial:
            keep = max(1, n // 2)
            ring_pix, values, n = ring_pix[:keep], values[:keep], keep
        else:
            extra = int(rng.choice([-1, 1, -7, 5]))
            values = np.resize(values, n + extra)
            n = values.size
    if "weights_out_of_range" in defects:
        values = 3.0 * values - 1.5
    if "missing_values" in defects:
        hole = rng.random(n) < 0.3
        values[hole] = np.where(rng.random(int(hole.sum())) < 0.5, np.nan, UNSEEN)

    # the order the file stores (RING or NESTED); for partial files the pixel numbers carry it
    import healpy as hp

    if partial:
        file_pix = hp.ring2nest(nside, ring_pix) if nest else ring_pix.copy()
        order = rng.permutation(n)  # explicit-index files may list pixels in any order
        file_pix, stored = file_pix[order], values[order]
    elif n == npix:
        stored = hp.reorder(values, r2n=True) if nest else values.copy()
        file_pix = None
    else:
        stored, file_pix = values.copy(), None

    fmt = "D"
    if "float32_column" in defects:
        stored, fmt = stored.astype(np.float32), "E"
    if "int_column" in defects:
        stored, fmt = np.where(np.isfinite(stored), np.round(stored), -1).astype(np.int32), "J"
    if "bool_column" in defects:
        stored, fmt = stored > 0.5, "L"
    array = stored
    if "vector_column" in defects and stored.size % 4 == 0 and stored.size:
        fmt = f"4{fmt}"
        array = stored.reshape(-1, 4)
    if "text_column" in defects:
        array, fmt = np.array([f"{v:.3g}" for v in np.asarray(stored, dtype=float)]), "A12"
    if "complex_column" in defects:
        array, fmt = np.asarray(stored, dtype=float) * (1 + 1j), "M"
    if "variable_length_column" in defects:
        array = np.empty(max(len(stored), 1), dtype=object)
        for i in range(array.size):
            array[i] = np.asarray(stored, dtype=float)[i:i + 1] if len(stored) else np.zeros(1)
        fmt = "PD()"

    column_unit = None if "no_unit" in defects else unit
    for defect, text in (("unit_rayleigh_jeans", "K_RJ"), ("unit_surface_brightness", "MJy/sr"), ("unit_unknown", "Tern")):
        if defect in defects:
            column_unit = text
    columns = []
    if partial:
        pix_array, pix_format = np.asarray(file_pix, dtype=np.int64), "K"
        if len(pix_array) and "duplicate_pixel" in defects:
            pix_array = pix_array.copy()
            pix_array[-1] = pix_array[0]
            if len(pix_array) == 1:
                pix_array = np.array([pix_array[0], pix_array[0]])
                array = np.resize(array, 2) if array.ndim == 1 else array
        if "negative_pixel" in defects:
            pix_array = pix_array.copy()
            pix_array[0] = -3
        if "pixel_too_large" in defects:
            pix_array = pix_array.copy()
            pix_array[-1] = npix
        if "fractional_pixel" in defects:
            pix_array, pix_format = pix_array + 0.25, "D"
        columns.append(fits.Column(name="PIXEL", format=pix_format, array=pix_array))
    columns.append(fits.Column(name="SIGNAL", format=fmt, array=array, unit=column_unit))
    if "extra_column" in defects:
        columns.append(fits.Column(name="HITS", format="J", array=np.arange(len(array), dtype=np.int32)))
    hdu = fits.BinTableHDU.from_columns(columns)
    h = hdu.header
    ordering_text = "NESTED" if nest else "RING"
    if "lowercase_ordering" in defects:
        ordering_text = ordering_text.lower()
    if "nest_abbreviated" in defects and nest:
        ordering_text = "NEST"
    if "bad_ordering" in defects:
        ordering_text = rng.choice(["HILBERT", "RINGS", "Z-ORDER"])
    if not ({"no_ordering", "no_ordering_but_argument"} & defects):
        h["ORDERING"] = ordering_text
    nside_card = {
        "nside_wrong": 2 * nside, "nside_not_power": 3 * nside, "nside_negative": -nside, "nside_half": nside + 0.5,
        "nside_text": "eight", "nside_bool": True, "nside_huge": 2**40, "nside_largest": 2**29,
    }
    chosen = [nside_card[d] for d in sorted(defects) if d in nside_card]
    if "nside_missing" not in defects:
        h["NSIDE"] = chosen[0] if chosen else nside
    if partial and "pixel_column_unflagged" not in defects:
        h["OBJECT"], h["INDXSCHM"] = "PARTIAL", "EXPLICIT"
    elif not partial:
        h["OBJECT"], h["INDXSCHM"] = "FULLSKY", "EXPLICIT" if "explicit_without_pixel" in defects else "IMPLICIT"
    if "temptype_antenna" in defects:
        h["TEMPTYPE"] = "ANTENNA"
    if "junk_cards" in defects:
        h["TERNRUN"] = (int(rng.integers(0, 10**6)), "an invented keyword")
        h["HISTORY"] = "written by the fuzz test"
        h["COORDSYS"] = "nonsense"
        if column_unit is not None:
            h["BUNIT"] = "parsecs"  # the column's own unit wins over the header's
    hdus = [fits.PrimaryHDU(), hdu]
    if "image_first" in defects:
        hdus.insert(1, fits.ImageHDU(np.zeros((2, 3))))
    buffer = io.BytesIO()
    fits.HDUList(hdus).writeto(buffer)

    kwargs = {}
    if "no_ordering_but_argument" in defects:
        kwargs["ordering"] = "NESTED" if nest else "RING"
    if "ordering_argument_bogus" in defects:
        kwargs["ordering"] = "SPIRAL"
    if "field_too_big" in defects:
        kwargs["field"] = 2 if "extra_column" in defects else 1

    # what the HEALPix convention says the file holds (None when the file is not a valid map)
    expected_map = expected_mask = None
    fatal_map = bool(defects & (_FATAL_BOTH | _FATAL_MAP))
    fatal_mask = bool(defects & _FATAL_BOTH)
    if "no_ordering" in defects or ("nside_missing" in defects and partial):
        fatal_map = fatal_mask = True
    if not partial and ({"pixel_count", "nside_wrong"} & defects):
        fatal_map = fatal_mask = True
    is_open = bool(defects & _OPEN) or (partial and "nside_wrong" in defects)
    if not (fatal_map and fatal_mask) and not is_open:
        as_float = np.asarray(stored, dtype=np.float64)
        scale = _UNITS[None if "no_unit" in defects else unit]
        ring = np.full(npix, UNSEEN)
        if partial:
            ring[hp.nest2ring(nside, file_pix) if nest else file_pix] = as_float
        else:
            ring = hp.reorder(as_float, n2r=True) if nest else as_float.copy()
        bad = maps.missing_pixels(ring)
        expected_map = np.where(bad, UNSEEN, ring * scale)
        expected_mask = np.where(bad, 0.0, ring)
        if not (np.all(expected_mask >= 0) and np.all(expected_mask <= 1) and expected_mask.max() > 0):
            fatal_mask = True
    return DamagedTable(buffer.getvalue(), kwargs, dict(
        defects=sorted(defects), partial=partial, nest=nest, nside=nside, fatal_map=fatal_map,
        fatal_mask=fatal_mask, is_open=is_open, expected_map=expected_map, expected_mask=expected_mask,
    ))


class DamagedTable:
    """The file's bytes, the reader's arguments and what is expected (short repr for failure reports)."""

    def __init__(self, data, kwargs, facts):
        self.data, self.kwargs, self.facts = data, kwargs, facts

    def __repr__(self):
        f = self.facts
        return (f"DamagedTable(defects={f['defects']}, partial={f['partial']}, nest={f['nest']}, nside={f['nside']}, "
                f"kwargs={self.kwargs})")


@fuzz_settings(200)
@given(damaged_tables())
def test_damaged_tables_are_refused_and_sound_ones_load_exactly(table):
    data, kwargs, facts = table.data, table.kwargs, table.facts
    path = new_path(".fits")
    path.write_bytes(data)
    result, err, mask, mask_err = read_both(path, **kwargs)
    what = f"defects {facts['defects']} (partial={facts['partial']}, nest={facts['nest']}, nside={facts['nside']})"
    if facts["is_open"]:
        return
    if facts["fatal_map"]:
        assert err is not None, f"read_sky_map accepted a file with {what}"
    else:
        assert err is None, f"read_sky_map refused a file with {what}: {err}"
        m, info = result
        assert info.nside == facts["nside"] and info.is_partial == facts["partial"]
        assert info.ordering_in_file == ("NESTED" if facts["nest"] else "RING")
        np.testing.assert_array_equal(m, facts["expected_map"], err_msg=what)
    if facts["fatal_mask"]:
        assert mask_err is not None, f"read_mask accepted a file with {what}"
    else:
        assert mask_err is None, f"read_mask refused a file with {what}: {mask_err}"
        np.testing.assert_array_equal(mask, facts["expected_mask"], err_msg=what)



# ---------------------------------------------------------------- CSV tables of positions

_CELL = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(min_value=-400, max_value=400).map(str),
    st.sampled_from(["", " ", "nan", "inf", "-inf", "abc", "1e400", "1_0", '"12"', "'3'", "90", "-90", "180", "0",
                     "1,5", "\u00b5", "0x10"]),
    st.text(max_size=6),
)
_NUMBER_CELL = st.floats(min_value=-200, max_value=200, allow_nan=False).map(lambda v: f"{v:.5g}")
_COLUMN = st.sampled_from(["lon_deg", "lat_deg", "radius_deg", "name", "LON_DEG", " lat_deg ", "flux", ""])


@st.composite
def csv_texts(draw):
    if draw(st.booleans()):  # the required columns, in some order, with extras
        header = draw(st.permutations(["lon_deg", "lat_deg"] + draw(st.lists(_COLUMN, max_size=2))))
    else:
        header = draw(st.lists(_COLUMN, min_size=0, max_size=5))
    n_rows = draw(st.integers(min_value=0, max_value=6))
    cell = st.one_of(_NUMBER_CELL, _NUMBER_CELL, _NUMBER_CELL, _CELL)
    good_row = st.lists(_NUMBER_CELL, min_size=len(header), max_size=len(header))
    rows = [draw(st.one_of(*[good_row] * 6, st.lists(cell, min_size=0, max_size=len(header) + 1)))
            for _ in range(n_rows)]
    newline = draw(st.sampled_from(["\n", "\r\n", "\r"]))
    lines = [",".join(header)] + [",".join(r) for r in rows]
    if draw(st.booleans()):
        lines.insert(draw(st.integers(0, len(lines))), "# a comment")
    if draw(st.booleans()):
        lines.insert(draw(st.integers(0, len(lines))), "   ")
    text = newline.join(lines) + draw(st.sampled_from(["", newline]))
    if draw(st.booleans()):
        text = "\ufeff" + text  # a byte-order mark, as spreadsheet programs write
    return text


def check_positions(table):
    assert isinstance(table, np.ndarray) and table.dtype == np.float64
    assert table.ndim == 2 and table.shape[1] == 3 and table.shape[0] >= 1
    lon, lat, radius = table.T
    assert np.all(np.isfinite(lon)) and np.all(np.isfinite(lat)) and np.all(np.abs(lat) <= 90)
    given_r = ~np.isnan(radius)
    assert np.all((radius[given_r] > 0) & (radius[given_r] <= 180))


@fuzz_settings(120)
@given(st.one_of(csv_texts(), csv_texts(), st.text(max_size=300)), often("utf-8", "latin-1", "utf-16"))
def test_position_tables_load_or_raise(text, encoding):
    path = new_path(".csv")
    try:
        path.write_bytes(text.encode(encoding))
    except UnicodeEncodeError:
        assume(False)
    table, err, caught = attempt(maps.read_positions_csv, path)
    only_our_warnings(caught)
    if err is None:
        check_positions(table)
    else:
        assert isinstance(err, InputFileError)


@fuzz_settings(60)
@given(
    rows=st.lists(
        st.tuples(
            st.floats(min_value=-720, max_value=720, allow_nan=False),
            st.floats(min_value=-90, max_value=90, allow_nan=False),
            st.one_of(st.none(), st.floats(min_value=1e-3, max_value=180)),
        ),
        min_size=1, max_size=8,
    ),
    order=st.permutations(["name", "lon_deg", "lat_deg", "radius_deg"]),
    bom=st.booleans(),
    newline=st.sampled_from(["\n", "\r\n"]),
)
def test_valid_position_tables_load_exactly(rows, order, bom, newline):
    lines = [",".join(order)]
    for k, (lon, lat, r) in enumerate(rows):
        cells = {"name": f"src{k}", "lon_deg": repr(lon), "lat_deg": repr(lat), "radius_deg": "" if r is None else repr(r)}
        lines.append(",".join(cells[c] for c in order))
    path = new_path(".csv")
    path.write_text(("\ufeff" if bom else "") + newline.join(lines) + newline, encoding="utf-8", newline="")
    table, err, caught = attempt(maps.read_positions_csv, path)
    assert err is None, err
    check_positions(table)
    expected = np.array([(lon, lat, np.nan if r is None else r) for lon, lat, r in rows])
    np.testing.assert_array_equal(table, expected)


# ---------------------------------------------------------------- bandpass tables

_BP_CELL = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.floats(min_value=0, max_value=1000, allow_nan=False).map(lambda v: f"{v:.6g}"),
    st.sampled_from(["", "nan", "-1", "0", "abc", "frequency_ghz", "transmission", "1e400", "GHz"]),
)


@st.composite
def bandpass_texts(draw):
    n_rows = draw(st.integers(min_value=0, max_value=8))
    number = st.floats(min_value=0.1, max_value=500, allow_nan=False).map(lambda v: f"{v:.6g}")
    cell = st.one_of(number, number, number, _BP_CELL)
    sep = draw(often(",", " ", "\t", " , ", ";"))
    good_row = st.lists(number, min_size=2, max_size=2)
    rows = [draw(st.one_of(*[good_row] * 6, st.lists(cell, min_size=1, max_size=3))) for _ in range(n_rows)]
    if draw(st.booleans()):  # increasing frequencies, as real tables have
        rows.sort(key=lambda r: _as_number(r[0]))
    lines = [sep.join(r) for r in rows]
    if draw(st.booleans()):
        lines.insert(0, sep.join(["frequency_ghz", "transmission"]))
    if draw(st.booleans()):
        lines.insert(draw(st.integers(0, len(lines))), "# response of the Tern camera, 145 GHz band")
    text = "\n".join(lines)
    if draw(st.booleans()):
        text = "\ufeff" + text
    return text


def _as_number(text):
    try:
        return float(text)
    except ValueError:
        return 0.0


def check_bandpass(bp):
    f, t = bp.frequencies_ghz, bp.transmission
    assert f.ndim == t.ndim == 1 and f.size == t.size >= 2
    assert np.all(np.isfinite(f)) and np.all(np.isfinite(t))
    assert np.all(f > 0) and np.all(np.diff(f) > 0) and np.all(t >= 0) and np.any(t > 0)
    # the transmission-weighted mean lies inside the band, up to rounding
    assert f[0] * (1 - 1e-12) <= bp.mean_frequency_ghz <= f[-1] * (1 + 1e-12)


@fuzz_settings(120)
@given(st.one_of(bandpass_texts(), bandpass_texts(), st.text(max_size=300)))
def test_bandpass_tables_load_or_raise(text):
    path = new_path(".txt")
    path.write_text(text, encoding="utf-8")
    bp, err, caught = attempt(physics.read_bandpass, path)
    only_our_warnings(caught)
    if err is None:
        check_bandpass(bp)
    else:
        assert isinstance(err, InputFileError)


@fuzz_settings(60)
@given(
    freqs=st.lists(st.floats(min_value=1.0, max_value=1000.0), min_size=2, max_size=12, unique=True),
    seed=st.integers(min_value=0, max_value=2**32 - 1),
    sep=st.sampled_from([",", " ", "\t"]),
    header=st.booleans(),
    bom=st.booleans(),
)
def test_valid_bandpass_tables_load_exactly(freqs, seed, sep, header, bom):
    freqs = sorted(freqs)
    trans = np.random.default_rng(seed).random(len(freqs)) + 0.01
    lines = (["frequency_ghz" + sep + "transmission"] if header else []) + [
        f"{f!r}{sep}{float(t)!r}" for f, t in zip(freqs, trans)
    ]
    path = new_path(".txt")
    path.write_text(("\ufeff" if bom else "") + "\n".join(lines) + "\n", encoding="utf-8")
    bp, err, caught = attempt(physics.read_bandpass, path)
    assert err is None, err
    check_bandpass(bp)
    np.testing.assert_array_equal(bp.frequencies_ghz, freqs)
    np.testing.assert_array_equal(bp.transmission, trans)


# ---------------------------------------------------------------- the guard itself

def test_the_time_limit_turns_a_hang_into_an_error():
    import time

    with pytest.raises(Hang):
        with time_limit(0.05):
            time.sleep(2.0)
