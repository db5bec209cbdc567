"""``cmbtools spectrum`` on I, Q, U files: the six spectra in one table, refused options, temperature unchanged.

The command's wiring is what is checked here; the I, Q, U reader has its own tests in the maps package.
"""

from __future__ import annotations

import healpy as hp
import numpy as np
import pytest

from cmbtools.cli import main
from cmbtools.maps.masks import apodize_mask, cap_mask
from cmbtools.spectrum import SPECTRA, PolarizedBandpowers


@pytest.fixture
def iqu_files(tmp_path):
    nside, lmax = 32, 64
    rng = np.random.default_rng(11)
    ell = np.arange(lmax + 1.0)
    shape = np.where(ell >= 2, 1e-10 / (ell + 5.0) ** 2, 0.0)
    n = hp.Alm.getsize(lmax)
    lidx = hp.Alm.getlm(lmax)[0]
    alm = [np.sqrt(a * shape[lidx]) * (rng.standard_normal(n) + 1j * rng.standard_normal(n)) / np.sqrt(2.0)
           for a in (1.0, 0.3, 0.05)]
    for a in alm:
        a[: lmax + 1] = a[: lmax + 1].real * np.sqrt(2.0)
    sky = hp.alm2map(alm, nside, lmax=lmax, pol=True)
    files = {}
    for k in (1, 2):
        m = sky + rng.standard_normal(sky.shape) * 1e-7
        files[f"half{k}"] = tmp_path / f"half{k}.fits"
        hp.write_map(files[f"half{k}"], m, dtype=np.float64, column_units="K_CMB")
    mask = apodize_mask(cap_mask(nside, 0.0, 60.0, 50.0), 8.0, nthreads=1)
    files["mask"] = tmp_path / "mask.fits"
    hp.write_map(files["mask"], mask, dtype=np.float64)
    return files


def test_iqu_cross_spectra_in_one_table(iqu_files, tmp_path, capsys):
    out, fig = tmp_path / "pol.csv", tmp_path / "pol.png"
    code = main(["spectrum", str(iqu_files["half1"]), str(iqu_files["half2"]), "--mask", str(iqu_files["mask"]),
                 "--bin-width", "8", "--lmax", "64", "--no-pixel-window", "--purify-b", "-o", str(out),
                 "--figure", str(fig), "--threads", "1"])
    assert code == 0
    text = capsys.readouterr().out
    assert "polarized cross-spectra (TT, TE, TB, EE, EB, BB)" in text and "B-mode purification: yes" in text
    bp = PolarizedBandpowers.read_csv(out)
    assert bp.cl.shape[0] == len(SPECTRA) and bp.metadata["b_mode_purification"] == "yes"
    assert np.all(bp.cl[SPECTRA.index("EE")][1:] > 0)
    assert fig.stat().st_size > 10000


def test_iqu_refuses_temperature_only_options(iqu_files, tmp_path, capsys):
    code = main(["spectrum", str(iqu_files["half1"]), "--mask", str(iqu_files["mask"]), "--fast-coupling",
                 "-o", str(tmp_path / "x.csv")])
    assert code == 2
    assert "--fast-coupling applies to temperature maps only" in capsys.readouterr().err
    assert not (tmp_path / "x.csv").exists()


@pytest.mark.parametrize("table, message", [
    ("ell,cl_tt_k2,cl_ee_k2,cl_bb_k2,cl_te_k2\n" + "".join(f"{ell},1e-10,1e-11,0,1e-12\n" for ell in range(30)),
     "stops at ell=29; the bins go to ell=64"),
    ("ell,cl_tt_k2,cl_ee_k2\n0,1e-10,1e-11\n", "TE"),
    ("ell,cl_tt_k2,cl_ee_k2,cl_bb_k2,cl_te_k2\n0,1e-10,-1e-11,0,0\n", "line"),
])
def test_iqu_theory_table_is_checked_before_any_computing(iqu_files, tmp_path, capsys, monkeypatch, table, message):
    import cmbtools.spectrum as sp

    def never(*args, **kwargs):
        raise AssertionError("the estimator was built before the theory table was checked")

    monkeypatch.setattr(sp, "PolarizedSpectrumEstimator", never)
    theory = tmp_path / "theory.csv"
    theory.write_text(table)
    out, fig = tmp_path / "pol.csv", tmp_path / "pol.png"
    code = main(["spectrum", str(iqu_files["half1"]), str(iqu_files["half2"]), "--mask", str(iqu_files["mask"]),
                 "--bin-width", "8", "--lmax", "64", "--theory", str(theory), "-o", str(out), "--figure", str(fig),
                 "--threads", "1"])
    assert code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and message in err[0], err
    assert not out.exists() and not fig.exists()


def test_iqu_purified_with_averaged_pixels_says_so(iqu_files, tmp_path, capsys):
    """--purify-b with the default pixel model (averaged pixels with the HEALPix windows): the table's metadata
    says that the pure B's rows carry the averaged-pixel model."""
    out = tmp_path / "pol.csv"
    code = main(["spectrum", str(iqu_files["half1"]), str(iqu_files["half2"]), "--mask", str(iqu_files["mask"]),
                 "--bin-width", "8", "--lmax", "64", "--purify-b", "-o", str(out), "--threads", "1"])
    assert code == 0
    assert "B-mode purification: yes" in capsys.readouterr().out
    meta = PolarizedBandpowers.read_csv(out).metadata
    assert meta["b_mode_purification"] == "yes"
    assert meta["pixels"] == ("averaged: the pixel shapes' bias corrected with the guess spectra "
                              "(TT, TE, EE, BB, TB, EB; pure B)")
