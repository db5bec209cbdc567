"""Every per-bin table cmbtools writes (bandpowers, transfer functions, validation tables; temperature and
polarized, all through _core.binned_tables.write_binned_table) is read back by every reader of its kind, to the
digits its writer keeps, and refused with one clear InputFileError by the readers of the other kinds."""

from __future__ import annotations

import numpy as np
import pytest

from cmbtools._core.binned_tables import write_binned_table
from cmbtools._core.spectrum_tables import read_noise_spectrum_table, read_polarized_spectrum_table, read_spectrum_table
from cmbtools.exceptions import InputFileError
from cmbtools.simulate import PolarizedValidationResult, ValidationResult
from cmbtools.spectrum import Bandpowers, BandpowerTransfer, PolarizedBandpowers, PolarizedBandpowerTransfer

SPECTRA = ("TT", "TE", "TB", "EE", "EB", "BB")
LO, HI = np.array([2, 10, 20, 33]), np.array([9, 19, 32, 50])  # contiguous: a bandpower table is also a spectrum
EFF = np.array([5.507092974820154, 14.77027821779556, 25.78649576763178, 41.769189668282344])


def test_the_layout_of_a_binned_table(tmp_path):
    path = write_binned_table(tmp_path / "t.csv", ("a", "b"), [2, 10], [9, 19], [5.5, 14.25],
                              [np.array([[1.0, 2.0], [3.0, np.nan]]), np.array([[0.1, 0.2], [0.3, 0.4]])],
                              spectra=("TT", "EE"), comments=["title", "k: v"])
    assert path.read_text().splitlines() == [
        "# title", "# k: v", "spectrum,ell_min,ell_max,ell_eff,a,b",
        "TT,2,9,5.5,1.0,0.1", "TT,10,19,14.25,2.0,0.2", "EE,2,9,5.5,3.0,0.3", "EE,10,19,14.25,nan,0.4"]
    path = write_binned_table(tmp_path / "u.csv", ("a",), [2], [9], [5.5], [[1 / 3]],
                              number=lambda v: f"{v:.4g}", ell_eff_number=lambda v: f"{v:.1f}")
    assert path.read_text() == "ell_min,ell_max,ell_eff,a\n2,9,5.5,0.3333\n"


def _bandpowers(rng):
    cl = rng.uniform(1e-15, 1e-10, 4)
    return Bandpowers(LO, HI, EFF, cl, 0.1 * cl, 3 * cl, 0.3 * cl, metadata={"note": "x", "n": 3})


def _polarized_bandpowers(rng):
    cl = rng.uniform(1e-15, 1e-10, (6, 4))
    return PolarizedBandpowers(LO, HI, EFF, cl, 0.1 * cl, 3 * cl, 0.3 * cl, metadata={"note": "x"})


def _validation(rng):
    samples = rng.normal(1e-12, 1e-13, (5, 4))
    errors = np.abs(rng.normal(1e-13, 1e-14, (5, 4)))
    return ValidationResult.from_samples(samples, errors, np.full(4, 1e-12), ell_min=LO, ell_max=HI, ell_eff=EFF,
                                         metadata={"note": "two\nlines"})


def _polarized_validation(rng):
    samples = rng.normal(1e-12, 1e-13, (5, 6, 4))
    errors = np.abs(rng.normal(1e-13, 1e-14, (5, 6, 4)))
    expected = np.full((6, 4), 1e-12)
    expected[[2, 4]] = 0.0  # TB, EB of a parity-even sky: no transfer measured
    return PolarizedValidationResult.from_samples(samples, errors, expected, ell_min=LO, ell_max=HI, ell_eff=EFF,
                                                  metadata={"note": "two\nlines"})


def _binned_spectrum(cb):
    out = np.zeros(HI[-1] + 1)
    for a, b, v in zip(LO, HI, cb):
        out[a:b + 1] = v
    return out


# kind -> the readers of that kind
READERS = {
    "bandpowers": ("Bandpowers.read_csv", "read_spectrum_table", "read_noise_spectrum_table"),
    "polarized bandpowers": ("PolarizedBandpowers.read_csv", "read_polarized_spectrum_table", "read_spectrum_table",
                             "read_noise_spectrum_table"),
    "transfer": ("BandpowerTransfer.read_csv",),
    "polarized transfer": ("PolarizedBandpowerTransfer.read_csv",),
}
READ = {
    "Bandpowers.read_csv": Bandpowers.read_csv, "PolarizedBandpowers.read_csv": PolarizedBandpowers.read_csv,
    "BandpowerTransfer.read_csv": BandpowerTransfer.read_csv,
    "PolarizedBandpowerTransfer.read_csv": PolarizedBandpowerTransfer.read_csv,
    "read_spectrum_table": read_spectrum_table, "read_polarized_spectrum_table": read_polarized_spectrum_table,
    "read_noise_spectrum_table": read_noise_spectrum_table,
}


def _written(tmp_path, writer):
    """(kind, path, check): the table one writer makes and the check of each of its readers' results."""
    rng = np.random.default_rng(7)
    if writer.startswith("Bandpowers"):
        unit = writer.split()[-1]
        bp = _bandpowers(rng)
        tol = 0.0 if unit == "K" else 1e-15  # repr is exact; uK^2 back to K^2: one rounding each way

        def check(reader, got):
            if reader == "Bandpowers.read_csv":
                for c in ("cl", "cl_err", "dl", "dl_err"):
                    np.testing.assert_allclose(getattr(got, c), getattr(bp, c), rtol=tol, atol=0)
                np.testing.assert_array_equal(got.ell_eff, bp.ell_eff)
                assert got.metadata["note"] == "x" and got.metadata["n"] == 3
            else:  # a spectrum: C_l constant over each bin, zero below the first
                np.testing.assert_allclose(got, _binned_spectrum(bp.cl), rtol=tol, atol=0)
        return "bandpowers", bp.write_csv(tmp_path / "bp.csv", unit=unit), check
    if writer.startswith("PolarizedBandpowers"):
        unit = writer.split()[-1]
        bp = _polarized_bandpowers(rng)
        tol = 0.0 if unit == "K" else 1e-15

        def check(reader, got):
            if reader == "PolarizedBandpowers.read_csv":
                for c in ("cl", "cl_err", "dl", "dl_err"):
                    np.testing.assert_allclose(getattr(got, c), getattr(bp, c), rtol=tol, atol=0)
                np.testing.assert_array_equal(got.ell_eff, bp.ell_eff)
            elif reader == "read_polarized_spectrum_table":
                assert tuple(got) == SPECTRA
                for i, s in enumerate(SPECTRA):
                    np.testing.assert_allclose(got[s], _binned_spectrum(bp.cl[i]), rtol=tol, atol=0)
            else:  # the temperature readers take TT
                np.testing.assert_allclose(got, _binned_spectrum(bp.cl[0]), rtol=tol, atol=0)
        return "polarized bandpowers", bp.write_csv(tmp_path / "pbp.csv", unit=unit), check
    if writer == "BandpowerTransfer":
        t = BandpowerTransfer(LO, HI, EFF, rng.uniform(0.2, 1.1, 4), rng.uniform(0, 0.01, 4),
                              {"note": "two\nlines", "n_sims": 40})

        def check(reader, got):
            for c in ("ell_min", "ell_max", "ell_eff", "transfer", "transfer_error"):
                np.testing.assert_array_equal(getattr(got, c), getattr(t, c))  # repr: exact
            assert got.metadata["note"] == "two lines"
        return "transfer", t.write_csv(tmp_path / "transfer.csv"), check
    if writer == "PolarizedBandpowerTransfer":
        f = rng.uniform(0.2, 1.1, (6, 4))
        f[[2, 4]] = np.nan
        t = PolarizedBandpowerTransfer(LO, HI, EFF, f, np.where(np.isfinite(f), 0.01, np.nan), {"note": "a\nb"})

        def check(reader, got):
            for c in ("ell_min", "ell_max", "ell_eff", "transfer", "transfer_error"):
                np.testing.assert_array_equal(getattr(got, c), getattr(t, c))  # exact, nan kept
        return "polarized transfer", t.write_csv(tmp_path / "pol_transfer.csv"), check
    if writer.startswith("ValidationResult"):
        run = _validation(rng)

        def check(reader, got):
            np.testing.assert_array_equal(got.ell_min, LO)
            np.testing.assert_allclose(got.ell_eff, EFF, rtol=5e-6)  # 6 significant digits
            np.testing.assert_allclose(got.transfer, run.transfer, rtol=5e-10)  # 10 significant digits
            assert np.all(got.transfer_error == 0.0)  # that table has no error column
        return "transfer", run.write_csv(tmp_path / "summary.csv", unit=writer.split()[-1]), check
    run = _polarized_validation(rng)

    def check(reader, got):
        np.testing.assert_array_equal(got.ell_max, HI)
        np.testing.assert_allclose(got.ell_eff, EFF, rtol=5e-6)
        expected = np.array([run[s].transfer for s in SPECTRA])
        assert not np.any(np.isfinite(got.transfer[[2, 4]]))  # mean / 0 of TB and EB: written and read as inf
        np.testing.assert_allclose(got.transfer, expected, rtol=5e-10)
    return "polarized transfer", run.write_csv(tmp_path / "pol_summary.csv", unit=writer.split()[-1]), check


WRITERS = ("Bandpowers uK", "Bandpowers K", "PolarizedBandpowers uK", "PolarizedBandpowers K", "BandpowerTransfer",
           "PolarizedBandpowerTransfer", "ValidationResult uK", "ValidationResult K", "PolarizedValidationResult uK",
           "PolarizedValidationResult K")


@pytest.mark.parametrize("writer", WRITERS)
def test_every_binned_table_is_read_by_every_reader_of_its_kind_only(tmp_path, writer):
    kind, path, check = _written(tmp_path, writer)
    for name, reader in READ.items():
        if name in READERS[kind]:
            check(name, reader(path))
        else:
            with pytest.raises(InputFileError, match=str(path.name)):
                reader(path)
