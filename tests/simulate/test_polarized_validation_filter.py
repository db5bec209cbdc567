"""The harmonic filter and the transfer correction of the polarized validation (MASTER's treatment of
filtering, Hivon et al. 2002, ApJ 567, 2): the filter acts on T and on E, B as the library says, exactly."""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest

from cmbtools import maps
from cmbtools.exceptions import InvalidInputError
from cmbtools.simulate import Dipole, validate_estimator, validate_polarized_estimator
from cmbtools.spectrum import (
    SPECTRA, BandpowerTransfer, Binning, PolarizedBandpowerTransfer, PolarizedSpectrumEstimator,
)

NSIDE, LMAX = 16, 40


@pytest.fixture(scope="module")
def estimator():
    mask = maps.apodize_mask(maps.cap_mask(NSIDE, 0.0, 90.0, 70.0), 10.0, nthreads=1)
    return PolarizedSpectrumEstimator(mask, Binning.uniform(2, LMAX, 8), lmax=LMAX, beam=90.0, nthreads=1)


def _spectra():
    ell = np.arange(LMAX + 1.0)
    base = np.where(ell >= 2, 1e-10 * 100.0 / (ell + 10.0) ** 2, 0.0)
    return {"TT": base, "EE": 0.2 * base, "BB": 0.01 * base, "TE": 0.25 * base}


def _run(est, **extra):
    with ThreadPoolExecutor(1) as pool:  # no noise: the bandpowers are quadratic in the sky alone
        return validate_polarized_estimator(est, _spectra(), n_sims=2, seed=3, executor=pool, progress=False,
                                            monopole=1e-4, dipole=Dipole(3e-3, 60.0, 30.0), **extra)


def test_the_filter_multiplies_t_and_e_b_and_the_transfer_divides_each_spectrum(estimator):
    plain = _run(estimator)
    # a constant filter a on T and b on E, B (monopole and dipole included): TT a^2, TE and TB a b, EE, EB and BB
    # b^2 times the same draws' bandpowers (powers of two: exact in floating point)
    a, b = 0.5, 2.0
    filtered = _run(estimator, harmonic_filter=(np.full(LMAX + 1, a), np.full(LMAX + 1, b)))
    scale = {"TT": a * a, "TE": a * b, "TB": a * b, "EE": b * b, "EB": b * b, "BB": b * b}
    for s in SPECTRA:
        np.testing.assert_array_equal(filtered[s].samples, scale[s] * plain[s].samples)
        np.testing.assert_allclose(filtered[s].transfer, scale[s] * plain[s].transfer, rtol=1e-12)
    assert "T: f_l from 0.5 to 0.5; E, B: from 2 to 2" in filtered.metadata["harmonic_filter"]
    assert plain.metadata["harmonic_filter"] == "none"

    # a transfer table divides TT, EE, BB by their F_b and TE, TB, EB by sqrt(F_XX F_YY); the records keep
    # the measured bandpowers
    rng = np.random.default_rng(1)
    nb = estimator.binning.n_bins
    f = np.full((6, nb), np.nan)
    for s in ("TT", "EE", "BB"):
        f[SPECTRA.index(s)] = rng.uniform(0.5, 1.5, nb)
    b_ = estimator.binning
    table = PolarizedBandpowerTransfer(b_.ell_min, b_.ell_max, b_.ell_eff, f, np.zeros((6, nb)))
    corrected = _run(estimator, bandpower_transfer=table)
    for i, s in enumerate(SPECTRA):
        np.testing.assert_allclose(corrected[s].samples, plain[s].samples / table.factors[i], rtol=1e-12)
        np.testing.assert_allclose(corrected[s].analytic_error, plain[s].analytic_error / table.factors[i],
                                   rtol=1e-12)
    np.testing.assert_allclose(table.factors[SPECTRA.index("TE")], np.sqrt(f[0] * f[3]), rtol=1e-15)
    assert corrected.metadata["bandpower_transfer_key"] == table.key


def test_filter_and_transfer_inputs_are_checked(estimator):
    b = estimator.binning
    with pytest.raises(InvalidInputError, match="PolarizedBandpowerTransfer"):
        _run(estimator, bandpower_transfer=BandpowerTransfer(b.ell_min, b.ell_max, b.ell_eff, np.ones(b.n_bins)))
    other = Binning.uniform(2, LMAX, 10)
    with pytest.raises(InvalidInputError, match="other bins than the estimator"):
        _run(estimator, bandpower_transfer=PolarizedBandpowerTransfer(
            other.ell_min, other.ell_max, other.ell_eff, np.ones((6, other.n_bins)), np.zeros((6, other.n_bins))))
    with pytest.raises(InvalidInputError, match="harmonic_filter"):
        _run(estimator, harmonic_filter=np.ones(LMAX - 5))  # short of the skies' band limit
    # validate_estimator hands both to the polarized validation
    with ThreadPoolExecutor(1) as pool:
        r = validate_estimator(estimator, _spectra(), n_sims=2, seed=3, executor=pool, progress=False,
                               harmonic_filter=np.full(LMAX + 1, 0.5))
    assert "T: f_l from 0.5 to 0.5; E, B: from 0.5 to 0.5" in r.metadata["harmonic_filter"]
