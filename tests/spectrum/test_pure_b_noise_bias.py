"""The noise bias of the purified B auto-spectrum from a noise spectrum (``noise_cl``), checked on noise-only maps.

For white pixel noise the pure B's pseudo-noise is exact on the grid (the addition theorem of spin-weighted
harmonics at zero separation, common practice; see PolarizedSpectrumEstimator._pure_white_noise): the window,
its spin-1 and its spin-2 derivative each carry the noise with no cross terms.  Before, the pure B's response to
the noise above lmax came from a coupling matrix to 2 lmax, and on noise-only maps at nside 32 (cap with holes)
the subtracted bias was 3-6 times the pure B's noise: BB bandpowers of -8.7, -0.48, -2.4, -6.5 times a lensing
BB with 10 nK pixels at lmax 64, and -26000 times in the first bin at lmax 95 (measured).
"""

from __future__ import annotations

import numpy as np
import pytest
from _masks import cap_with_holes

from cmbtools.exceptions import CmbtoolsWarning
from cmbtools.spectrum import Binning, PolarizedSpectrumEstimator, SPECTRA

NSIDE = 32
NPIX = 12 * NSIDE**2
SIGMA_T = 1e-5  # K per pixel in I; Q and U sqrt(2) times (common practice)
N_SIMS = 120


@pytest.mark.parametrize("lmax", [2 * NSIDE, 3 * NSIDE - 1])
def test_noise_only_maps_give_zero_after_the_pure_b_noise_bias_is_subtracted(lmax):
    w, _ = cap_with_holes(NSIDE)
    kw = dict(lmax=lmax, purify_b=True, pixel_window=False, remove_monopole_dipole=False, averaged_pixels=False,
              nthreads=1)
    if lmax > 2 * NSIDE:  # purification above 2 nside leaks the grid's E into B: warned of, but the noise is exact
        with pytest.warns(CmbtoolsWarning, match="purification"):
            est = PolarizedSpectrumEstimator(w, Binning.uniform(2, lmax, 16), **kw)
    else:
        est = PolarizedSpectrumEstimator(w, Binning.uniform(2, lmax, 16), **kw)
    n_t = SIGMA_T**2 * 4.0 * np.pi / NPIX  # white: N_l = sigma^2 Omega_pix (common practice)
    noise_cl = {"TT": np.full(lmax + 1, n_t), "EE": np.full(lmax + 1, 2 * n_t), "BB": np.full(lmax + 1, 2 * n_t)}
    rng = np.random.default_rng(20261204)
    sigma = SIGMA_T * np.array([1.0, np.sqrt(2.0), np.sqrt(2.0)])[:, None]
    runs = np.array([est.estimate(rng.standard_normal((3, NPIX)) * sigma, noise_cl=noise_cl).cl
                     for _ in range(N_SIMS)])
    sem = runs.std(axis=0, ddof=1) / np.sqrt(N_SIMS)
    pull = runs.mean(axis=0) / sem
    # every bin of the six spectra within 4 standard errors of zero (30 values: a false alarm ~2e-3)
    assert np.all(np.abs(pull) < 4.0), {s: np.round(pull[i], 2) for i, s in enumerate(SPECTRA)}
