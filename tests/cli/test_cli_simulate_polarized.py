"""`cmbtools simulate --polarized`: I, Q, U maps equal to the library's, polarized tables, usage errors."""

from __future__ import annotations

import numpy as np
import pytest
from astropy.io import fits

from cmbtools.cli import main
from cmbtools.maps import read_iqu
from cmbtools.simulate import (
    NoiseModel,
    gaussian_iqu_sky,
    iqu_noise_map,
    read_polarized_spectrum_table,
    simulation_rng,
    write_spectrum_table,
)


def _spectra(lmax=40):
    ell = np.arange(lmax + 1)
    base = np.where(ell >= 2, 1e-9 / (ell + 10.0) ** 2, 0.0)
    return {"TT": 40 * base, "EE": base, "BB": 0.1 * base, "TE": -3 * base}


def test_polarized_maps_match_the_library(tmp_path, capsys):
    s = _spectra()
    table = tmp_path / "pol.csv"
    write_spectrum_table(table, s)
    out = tmp_path / "sims"
    args = ["simulate", "--polarized", "--spectrum", str(table), "--nside", "16", "--lmax", "40", "--beam-fwhm", "120",
            "--noise-depth", "300", "--seed", "5", "--sims", "2", "--splits", "2", "--threads", "1",
            "--output-dir", str(out), "--write-spectrum", str(tmp_path / "copy.csv")]
    assert main(args) == 0
    assert "I, Q, U map(s)" in capsys.readouterr().out
    model = NoiseModel(300.0)
    for i in range(2):
        rng = simulation_rng(5, i)
        sky = gaussian_iqu_sky(read_polarized_spectrum_table(table), 16, lmax=40, beam=120.0, rng=rng, nthreads=1)
        for k in (1, 2):  # split k: the k-th noise draw after the sky
            expected = sky + iqu_noise_map(model, 16, rng=rng, nthreads=1)
            m, info = read_iqu(out / f"sky_{i:04d}_split{k}.fits")
            np.testing.assert_array_equal(m, expected)  # float64 files: bit for bit
            assert info.polarization_convention_in_file == "healpix"
            header = fits.getheader(out / f"sky_{i:04d}_split{k}.fits", 1)
            assert header["CMBSEED"] == 5 and header["CMBSIMID"] == i and header["CMBSPLIT"] == k
    copy = read_polarized_spectrum_table(tmp_path / "copy.csv")
    for key in ("TT", "EE", "BB", "TE"):
        np.testing.assert_allclose(copy[key], s[key], rtol=1e-10)


@pytest.mark.parametrize(
    "extra, message",
    [
        (["--tensor-ratio", "0.1"], "--tensor-ratio needs --polarized"),
        (["--polarized", "--tensor-ratio", "20"], "--tensor-ratio must be in [0, 10]"),
    ],
)
def test_polarized_usage_errors(tmp_path, extra, message, capsys):
    assert main(["simulate", "--nside", "16", "--lmax", "20", "--sims", "1", "--output-dir", str(tmp_path)] + extra) == 2
    err = capsys.readouterr().err
    assert message in err and len(err.strip().splitlines()) == 1
    assert not list(tmp_path.glob("*.fits"))


def test_temperature_table_is_refused_for_polarized_maps(tmp_path, capsys):
    table = tmp_path / "t.csv"
    write_spectrum_table(table, _spectra()["TT"])
    assert main(["simulate", "--polarized", "--spectrum", str(table), "--nside", "16", "--lmax", "20",
                 "--output-dir", str(tmp_path)]) == 2
    assert "a polarized table needs TT, EE, BB and TE" in capsys.readouterr().err
