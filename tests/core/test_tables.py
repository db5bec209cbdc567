"""Spectrum tables: read_spectrum_table / write_spectrum_table."""

from __future__ import annotations

import math

import numpy as np
import pytest
from astropy import units as u

from cmbtools.exceptions import InputFileError, InvalidInputError, OutputExistsError
from cmbtools.simulate import read_spectrum_table, write_spectrum_table

#: uK^2 per K^2, from astropy.units (the outside reference for the unit conversion)
UK2 = (1.0 * u.K**2).to_value(u.uK**2)


def _cl(lmax=50):
    ell = np.arange(lmax + 1, dtype=float)
    cl = np.zeros(lmax + 1)
    cl[2:] = 2e-9 / (ell[2:] * (ell[2:] + 1.0))
    return cl


def test_round_trip(tmp_path):
    cl = _cl()
    path = tmp_path / "cl.csv"
    write_spectrum_table(path, cl, header={"source": "test", "note": "power law"})
    text = path.read_text()
    assert "ell,cl_k2,dl_uk2" in text and "# source: test" in text
    back = read_spectrum_table(path)
    np.testing.assert_allclose(back, cl, rtol=1e-10, atol=0)
    # the D_l column is l(l+1) C_l / 2 pi in uK^2
    row = text.splitlines()[-1].split(",")
    assert float(row[2]) == pytest.approx(50 * 51 * cl[50] / (2 * math.pi) * UK2, rel=1e-10)
    with pytest.raises(OutputExistsError):
        write_spectrum_table(path, cl)
    write_spectrum_table(path, 2 * cl, overwrite=True)
    np.testing.assert_allclose(read_spectrum_table(path), 2 * cl, rtol=1e-10)


@pytest.mark.parametrize(
    "content",
    [
        "ell,dl_uk2\n{rows_dl}",
        "# unit: uK^2\nell dl\n{rows_dl_ws}",
        "# unit: \u03bcK^2\nell,dl\n{rows_dl}",
        "ell,cl\n{rows_cl}",
        "ell,cl_uk2,err\n{rows_cl_uk2}",
    ],
)
def test_accepted_layouts(tmp_path, content):
    cl = _cl(30)
    ell = np.arange(2, 31)
    dl = ell * (ell + 1) * cl[2:] / (2 * math.pi) * UK2
    rows_dl = "".join(f"{l},{float(d)!r}\n" for l, d in zip(ell, dl))
    rows_dl_ws = "".join(f"{l}   {float(d)!r}\n" for l, d in zip(ell, dl))
    rows_cl = "".join(f"{l},{float(c)!r}\n" for l, c in zip(ell, cl[2:]))
    rows_cl_uk2 = "".join(f"{l},{float(c * UK2)!r},0.5\n" for l, c in zip(ell, cl[2:]))
    path = tmp_path / "t.txt"
    path.write_text(content.format(rows_dl=rows_dl, rows_dl_ws=rows_dl_ws, rows_cl=rows_cl, rows_cl_uk2=rows_cl_uk2))
    got = read_spectrum_table(path)
    assert got.shape == (31,)
    assert got[0] == 0 and got[1] == 0  # ell below the first row are filled with 0
    np.testing.assert_allclose(got, cl, rtol=1e-13)


@pytest.mark.parametrize(
    "content, problem",
    [
        ("cl\n1e-10\n", "no 'ell' column"),
        ("ell,power\n2,1e-10\n", "no spectrum column"),
        ("ell,cl,cl_uk2\n2,1,1\n", "more than one cl column"),
        ("ell,dl\n2,100\n", "has no unit"),
        ("# unit: Jy^2\nell,dl\n2,100\n", "unknown unit"),
        ("# unit: K^2\nell,dl_uk2\n2,100\n", "contradicts"),
        ("ell,cl\n2,1e-10\n3,abc\n", "line 3: cl value 'abc' is not a number"),
        ("ell,cl\n2,1e-10\n3,nan\n", "line 3: cl value 'nan' is not finite"),
        ("ell,cl\n2,1e-10\n3,-1e-12\n", "line 3: negative power"),
        ("ell,cl\n2,1e-10\n4,1e-10\n", "line 3: ell skips from 2 to 4"),
        ("ell,cl\n2,1e-10\n2,1e-10\n", "line 3: ell repeats"),
        ("ell,cl\n2.5,1e-10\n", "line 2: ell '2.5' is not a non-negative integer"),
        ("ell,cl\n2,1e-10,7\n", "line 2: 3 cells"),
        ("ell,dl_uk2\n0,5\n1,0\n", "D_l at ell = 0 must be 0"),
        ("# only comments\n", "no column names"),
        ("ell,cl\n", "no data rows"),
    ],
)
def test_bad_tables_name_file_line_and_problem(tmp_path, content, problem):
    path = tmp_path / "bad.csv"
    path.write_text(content)
    with pytest.raises(InputFileError) as err:
        read_spectrum_table(path)
    assert problem in str(err.value)
    assert str(path) in str(err.value)


def test_missing_file_and_binary(tmp_path):
    with pytest.raises(InputFileError, match="no such file"):
        read_spectrum_table(tmp_path / "nope.csv")
    p = tmp_path / "bin.csv"
    p.write_bytes(b"\xff\xfe\x00\x81")
    with pytest.raises(InputFileError, match="UTF-8"):
        read_spectrum_table(p)


def test_write_validation(tmp_path):
    with pytest.raises(InvalidInputError, match="negative"):
        write_spectrum_table(tmp_path / "a.csv", -np.ones(5))
    with pytest.raises(InvalidInputError, match="unit"):
        write_spectrum_table(tmp_path / "a.csv", np.ones(5), header={"unit": "uK^2"})
    with pytest.raises(InvalidInputError, match="unit"):
        write_spectrum_table(tmp_path / "a.csv", np.ones(5), header="unit: uK^2")
    with pytest.raises(InvalidInputError, match="str or a dict"):
        write_spectrum_table(tmp_path / "a.csv", np.ones(5), header=3)
    assert not (tmp_path / "a.csv").exists()


# ------------------------------------------------------------- one reader for every table of a kind


def test_every_spectrum_table_cmbtools_writes_is_a_valid_noise_spectrum(tmp_path):
    from cmbtools._core.spectrum_tables import read_noise_spectrum_table
    from cmbtools.spectrum import Bandpowers

    cl = _cl()
    written = tmp_path / "noise.csv"
    write_spectrum_table(written, cl)  # ell,cl_k2,dl_uk2
    # the C_l column is read back to the 11 significant digits the writer keeps
    np.testing.assert_allclose(read_noise_spectrum_table(written), cl, rtol=1e-10, atol=0)

    # a bandpower table: C_l constant over each bin, zero below the first bin
    lo = np.array([2, 12, 22])
    cb = np.array([3e-15, 2e-15, 1e-15])  # K^2
    bp = Bandpowers(ell_min=lo, ell_max=lo + 9, ell_eff=lo + 4.5, cl=cb, cl_err=0.1 * cb, dl=cb, dl_err=cb)
    table = tmp_path / "bandpowers.csv"
    bp.write_csv(table)  # in uK^2
    expected = np.zeros(32)
    for a, v in zip(lo, cb):
        expected[a:a + 10] = v
    # written in uK^2 with 17 significant digits, converted back: a few ulp
    np.testing.assert_allclose(read_noise_spectrum_table(table), expected, rtol=1e-14, atol=0)
    np.testing.assert_allclose(read_spectrum_table(table), expected, rtol=1e-14, atol=0)


def test_the_noise_reader_prefers_an_nl_column(tmp_path):
    from cmbtools._core.spectrum_tables import read_noise_spectrum_table

    path = tmp_path / "both.txt"
    path.write_text("# unit: uK^2\nell cl nl\n0 0 0\n1 5 2\n2 7 3\n")
    np.testing.assert_allclose(read_noise_spectrum_table(path), [0.0, 2e-12, 3e-12], rtol=1e-15)
    np.testing.assert_allclose(read_spectrum_table(path), [0.0, 5e-12, 7e-12], rtol=1e-15)
    # a noise table (nl only) is not a sky spectrum
    only_noise = tmp_path / "noise.txt"
    only_noise.write_text("ell,nl\n0,0\n1,1e-16\n")
    np.testing.assert_allclose(read_noise_spectrum_table(only_noise), [0.0, 1e-16], rtol=1e-15)
    with pytest.raises(InputFileError, match="no spectrum column"):
        read_spectrum_table(only_noise)


def test_a_bandpower_table_with_gaps_is_refused_as_a_spectrum(tmp_path):
    from cmbtools.spectrum import Bandpowers

    cb = np.array([1e-15, 1e-15])
    bp = Bandpowers(ell_min=np.array([2, 20]), ell_max=np.array([9, 29]), ell_eff=np.array([5.5, 24.5]),
                    cl=cb, cl_err=cb, dl=cb, dl_err=cb)
    path = tmp_path / "gaps.csv"
    bp.write_csv(path)
    with pytest.raises(InputFileError, match="without gaps"):
        read_spectrum_table(path)
