"""Polarized spectrum tables: read_polarized_spectrum_table / write_spectrum_table with a dict."""

from __future__ import annotations

import math

import numpy as np
import pytest
from astropy import units as u

from cmbtools.exceptions import InputFileError, InvalidInputError
from cmbtools.simulate import read_spectrum_table, write_spectrum_table

UK2 = (1.0 * u.K**2).to_value(u.uK**2)


# ---------------------------------------------------------------- polarized tables


def _pol_spectra(n=40):
    ell = np.arange(n)
    base = np.where(ell >= 2, 1e-10 / (ell + 1.0) ** 2, 0.0)
    return {"TT": 30 * base, "EE": base, "BB": 0.1 * base, "TE": -2 * base}


def test_polarized_table_round_trip_and_tt_for_temperature_readers(tmp_path):
    from cmbtools.simulate import read_polarized_spectrum_table

    s = _pol_spectra()
    path = tmp_path / "pol.csv"
    write_spectrum_table(path, s, header={"source": "test"})
    text = path.read_text().splitlines()
    assert "ell,cl_tt_k2,cl_ee_k2,cl_bb_k2,cl_te_k2,dl_tt_uk2,dl_ee_uk2,dl_bb_uk2,dl_te_uk2" in text
    got = read_polarized_spectrum_table(path)
    for k in ("TT", "EE", "BB", "TE"):
        np.testing.assert_allclose(got[k], s[k], rtol=1e-10)
    assert np.all(got["TB"] == 0) and np.all(got["EB"] == 0)
    # a temperature reader takes the TT column of a polarized table
    np.testing.assert_allclose(read_spectrum_table(path), s["TT"], rtol=1e-10)
    # TB and EB are written when non-zero
    s2 = dict(s, TB=0.1 * s["TE"], EB=0.01 * s["EE"])
    write_spectrum_table(tmp_path / "pol6.csv", s2)
    got6 = read_polarized_spectrum_table(tmp_path / "pol6.csv")
    np.testing.assert_allclose(got6["TB"], s2["TB"], rtol=1e-10)
    np.testing.assert_allclose(got6["EB"], s2["EB"], rtol=1e-10)


def test_polarized_table_from_dl_columns_with_a_unit_comment(tmp_path):
    from cmbtools.simulate import read_polarized_spectrum_table

    path = tmp_path / "dl.txt"
    path.write_text("# unit: uK^2\nell dl_tt dl_te dl_ee dl_bb\n2 1000 -30 2 0.01\n3 900 -20 3 0.02\n")
    got = read_polarized_spectrum_table(path)
    f = 2 * math.pi / 6 / UK2  # uK^2 -> K^2 (astropy units)
    assert got["TT"][2] == pytest.approx(1000 * f, rel=1e-14)
    assert got["TE"][2] == pytest.approx(-30 * f, rel=1e-14)
    assert got["BB"][3] == pytest.approx(0.02 * 2 * math.pi / 12 / UK2, rel=1e-14)


@pytest.mark.parametrize(
    "content, problem",
    [
        ("ell,cl\n2,1e-10\n", "no TT column: a polarized table needs TT, EE, BB and TE"),
        ("ell,cl_tt,cl_ee,cl_bb,cl_te\n2,1e-10,-1e-12,0,0\n", "line 2: negative power cl_ee"),
        ("ell,cl_tt,cl_tt_k2,cl_ee,cl_bb,cl_te\n2,1,1,1,1,1\n", "more than one TT column"),
        ("ell,cl_tt,cl_ee,cl_bb,dl_te\n2,1,1,1,1\n", "the 'dl_te' column has no unit"),
        ("ell,cl_tt,cl_ee,cl_bb,cl_te\n2,1e-10,1e-12,0,x\n", "line 2: cl_te value 'x' is not a number"),
    ],
)
def test_bad_polarized_tables(tmp_path, content, problem):
    from cmbtools.simulate import read_polarized_spectrum_table

    path = tmp_path / "bad.csv"
    path.write_text(content)
    with pytest.raises(InputFileError) as err:
        read_polarized_spectrum_table(path)
    assert problem in str(err.value) and str(path) in str(err.value)


def test_polarized_write_validation(tmp_path):
    s = _pol_spectra()
    with pytest.raises(InvalidInputError, match="keys TT, EE, BB, TE"):
        write_spectrum_table(tmp_path / "a.csv", {k: v for k, v in s.items() if k != "TE"})
    with pytest.raises(InvalidInputError, match="negative"):
        write_spectrum_table(tmp_path / "a.csv", dict(s, EE=-s["EE"]))
    with pytest.raises(InvalidInputError, match="one length"):
        write_spectrum_table(tmp_path / "a.csv", dict(s, TT=s["TT"][:10]))
    assert not (tmp_path / "a.csv").exists()
