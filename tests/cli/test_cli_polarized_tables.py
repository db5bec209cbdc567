"""Every polarized table cmbtools writes is accepted wherever a table of that kind is read (the tables of
`simulate --polarized` and of `spectrum` on I, Q, U maps, read by `spectrum`, `simulate` and `validate`), and a
table of the other kind is refused with one line (exit 2).  The covariance and transfer files have their own
tests (test_cli_polarized_covariance.py, test_cli_validate_polarized_transfer.py)."""

from __future__ import annotations

import numpy as np
import pytest

from cmbtools import maps
from cmbtools.cli import main
from cmbtools.exceptions import InputFileError, InvalidInputError
from cmbtools.simulate import read_polarized_spectrum_table, read_spectrum_table
from cmbtools.spectrum import SPECTRA, Binning, PolarizedBandpowers, PolarizedSpectrumEstimator

NSIDE, LMAX = 16, 40


@pytest.fixture(scope="module")
def d(tmp_path_factory):
    d = tmp_path_factory.mktemp("poltables")
    maps.write_mask(d / "mask.fits", maps.apodize_mask(maps.cap_mask(NSIDE, 0.0, 90.0, 70.0), 10.0, nthreads=1))
    mp = pytest.MonkeyPatch()
    mp.setenv("CMBTOOLS_NUM_THREADS", "1")
    try:
        assert main(["simulate", "--nside", str(NSIDE), "--polarized", "--seed", "5", "--beam-fwhm", "90",
                     "--noise-depth", "30", "--output-dir", str(d), "--prefix", "iqu", "--threads", "1",
                     "--write-spectrum", str(d / "spectra.csv"), "--write-noise-spectrum", str(d / "noise.csv")]) == 0
        assert main(_spectrum(d, d / "bandpowers.csv")) == 0
        maps.write_sky_map(d / "temperature.fits", maps.read_iqu(d / "iqu_0000.fits")[0][0])
        assert main(_spectrum(d, d / "t_bandpowers.csv", map_name="temperature.fits")) == 0
    finally:
        mp.undo()
    return d


def _spectrum(d, out, *extra, map_name="iqu_0000.fits"):
    return ["spectrum", str(d / map_name), "--mask", str(d / "mask.fits"), "--lmax", str(LMAX), "--bin-width", "8",
            "--beam-fwhm", "90", "--threads", "1", "-o", str(out), *extra]


def test_a_polarized_bandpower_table_reads_as_a_spectrum_table(d):
    bp = PolarizedBandpowers.read_csv(d / "bandpowers.csv")
    spectra = read_polarized_spectrum_table(d / "bandpowers.csv")
    for i, s in enumerate(SPECTRA):  # each spectrum constant over its bins, zero below the first
        assert spectra[s].size == LMAX + 1
        np.testing.assert_array_equal(spectra[s][:2], 0.0)
        for b, (lo, hi) in enumerate(zip(bp.ell_min, bp.ell_max)):
            np.testing.assert_array_equal(spectra[s][lo: hi + 1], bp.cl[i, b])
    np.testing.assert_array_equal(read_spectrum_table(d / "bandpowers.csv"), spectra["TT"])  # its TT rows
    with pytest.raises(InputFileError, match="a temperature bandpower table"):
        read_polarized_spectrum_table(d / "t_bandpowers.csv")


def test_every_command_reads_the_polarized_spectrum_tables(d, tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "1")
    for table in ("spectra.csv", "bandpowers.csv"):
        # simulate: I, Q, U maps (and a temperature map from the table's TT)
        for extra in (("--polarized",), ()):
            assert main(["simulate", "--nside", str(NSIDE), "--lmax", str(LMAX), "--spectrum", str(d / table),
                         "--seed", "1", "--output-dir", str(tmp_path), "--prefix", f"s{len(extra)}", "--overwrite",
                         "--threads", "1", *extra]) == 0, table
        # spectrum on I, Q, U maps: the theory of the figure
        out = tmp_path / "theory.csv"
        assert main(_spectrum(d, out, "--theory", str(d / table), "--figure", str(tmp_path / "f.png"),
                              "--overwrite")) == 0, table
        assert PolarizedBandpowers.read_csv(out).metadata["theory_file"] == str(d / table)
    # validate --polarized: the input spectra (caught before the simulations run)
    import cmbtools.simulate as simulate

    seen = {}

    def capture(est, spectra, **kwargs):
        seen.update(spectra)
        raise InvalidInputError("captured")

    monkeypatch.setattr(simulate, "validate_polarized_estimator", capture)
    assert main(["validate", str(d / "mask.fits"), "--polarized", "--lmax", str(LMAX), "--bin-width", "8",
                 "--beam-fwhm", "90", "--spectrum", str(d / "bandpowers.csv"), "--sims", "2", "--no-progress",
                 "--run-dir", str(tmp_path / "run")]) == 2
    assert "captured" in capsys.readouterr().err
    expected = read_polarized_spectrum_table(d / "bandpowers.csv")
    for s in ("TT", "TE", "EE", "BB"):  # a table that stops at lmax sets the skies' band limit
        np.testing.assert_array_equal(seen[s], expected[s])


def test_the_polarized_noise_table_of_simulate_is_the_noise_bias_of_spectrum(d, tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "1")
    out = tmp_path / "noise_subtracted.csv"
    assert main(_spectrum(d, out, "--noise-spectrum", str(d / "noise.csv"))) == 0
    assert f"noise bias subtracted: noise spectra of {d / 'noise.csv'}" in capsys.readouterr().out
    got = PolarizedBandpowers.read_csv(out)
    assert got.metadata["noise_spectrum_file"] == str(d / "noise.csv")
    # the library with the same table: the command hands it over unchanged (the table holds 10 digits)
    iqu, _ = maps.read_iqu(d / "iqu_0000.fits")
    mask = maps.read_mask(d / "mask.fits")
    est = PolarizedSpectrumEstimator(mask, Binning.uniform(2, LMAX, 8), lmax=LMAX, beam=90.0, nthreads=1)
    noise = {k: v[: LMAX + 1] for k, v in read_polarized_spectrum_table(d / "noise.csv").items()}
    ref = est.estimate(iqu, noise_cl=noise)
    scale = np.abs(ref.cl).max(axis=1, keepdims=True)
    np.testing.assert_allclose(got.cl / scale, ref.cl / scale, rtol=0, atol=1e-9)
    plain = PolarizedBandpowers.read_csv(d / "bandpowers.csv")
    for s in ("TT", "EE", "BB"):  # the noise bias was subtracted from every auto-spectrum bin
        i = SPECTRA.index(s)
        assert np.all(got.cl[i] < plain.cl[i]), s
    # a temperature noise table is not one of I, Q, U maps: one line, exit 2, nothing written
    (tmp_path / "t_noise.csv").write_text("ell,cl_k2\n" + "".join(f"{ell},1e-15\n" for ell in range(60)))
    refused = tmp_path / "refused.csv"
    assert main(_spectrum(d, refused, "--noise-spectrum", str(tmp_path / "t_noise.csv"))) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no TT column" in err[0], err
    assert not refused.exists()
