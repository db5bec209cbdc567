"""Monte Carlo check of the polarized estimator on skies like real maps (slow).

600 IQU skies with power above the analysis lmax, pixelised by averaging a finer map, a large monopole and
dipole in I, inhomogeneous noise (Q, U noise sqrt(2) times the I noise, common practice), a Gaussian beam,
a tapered cap with holes; the cross-spectra of two halves with independent noise, measured with and
without B-mode purification.  Every bin of every spectrum is judged.
"""

from __future__ import annotations

import healpy as hp
import numpy as np
import pytest

from cmbtools._core import sht
from cmbtools.maps.masks import apodize_mask, cap_mask, disc_mask
from cmbtools.spectrum import Binning, PolarizedSpectrumEstimator, SPECTRA
from cmbtools.spectrum.beams import gaussian_beam

NSIDE, FINE, LMAX = 32, 128, 64
FWHM = 150.0  # arcmin: the power above lmax is small but present


def sky_spectra(lmax):
    """Invented smooth spectra (K^2) with TE correlation and BB at 5% of EE."""
    ell = np.arange(lmax + 1.0)
    base = 1e-10 * 100.0 / (ell + 10.0) ** 2
    out = {"TT": base, "EE": 0.2 * base, "BB": 0.01 * base, "TE": 0.25 * base}
    return {k: np.where(ell >= 2, v, 0.0) for k, v in out.items()}


def simulate(rng, cl, fine_lmax, beam_t, beam_p, noise_sigma):
    """One sky at FINE, beam applied, averaged into NSIDE pixels, plus two independent noise draws."""
    n = sht.alm_size(fine_lmax)
    lidx = sht.alm_ell(fine_lmax)

    def gauss():
        z = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) / np.sqrt(2.0)
        z[: fine_lmax + 1] = rng.standard_normal(fine_lmax + 1)
        return z

    tt, ee, bb, te = (cl[k][lidx] for k in ("TT", "EE", "BB", "TE"))
    with np.errstate(divide="ignore", invalid="ignore"):
        c = np.where(tt > 0, te / np.sqrt(tt), 0.0)
        d = np.sqrt(np.clip(ee - c**2, 0.0, None))
    z1, z2, z3 = gauss(), gauss(), gauss()
    a_t = np.sqrt(tt) * z1 * beam_t[lidx]
    a_e = (c * z1 + d * z2) * beam_p[lidx]
    a_b = np.sqrt(bb) * z3 * beam_p[lidx]
    fine = hp.alm2map([a_t, a_e, a_b], FINE, lmax=fine_lmax, pol=True)
    fine[0] += 3e-3 + 2e-4 * hp.pix2vec(FINE, np.arange(fine.shape[1]))[2]  # monopole and dipole (K)
    coarse = hp.ud_grade(fine, NSIDE)  # the mean of the finer pixels
    halves = []
    for _ in range(2):
        noise = rng.standard_normal(coarse.shape) * noise_sigma
        noise[1:] *= np.sqrt(2.0)
        halves.append(coarse + noise)
    return halves


@pytest.mark.slow
def test_polarized_bandpowers_unbiased_with_right_errors():
    rng = np.random.default_rng(20261202)
    fine_lmax = 2 * FINE  # the 150' beam leaves nothing above
    cl = sky_spectra(fine_lmax)
    beam_t = gaussian_beam(FWHM, fine_lmax)
    ell = np.arange(fine_lmax + 1.0)
    sigma = np.radians(FWHM / 60.0) / np.sqrt(8.0 * np.log(2.0))
    beam_p = np.where(ell >= 2, np.exp(-0.5 * (ell * (ell + 1.0) - 4.0) * sigma**2), 0.0)  # spin-2 Gaussian
    mask = cap_mask(NSIDE, 60.0, 40.0, 40.0) * disc_mask(NSIDE, [(70.0, 45.0), (50.0, 30.0)], radius_deg=4.0)
    mask = apodize_mask(mask, 10.0, nthreads=1)
    npix = 12 * NSIDE**2
    z = hp.pix2vec(NSIDE, np.arange(npix))[2]
    noise_sigma = 1e-6 * (1.0 + 0.8 * z)  # K per pixel, deeper towards the south
    binning = Binning.uniform(11, 50, 8)  # from ell 11: the monopole/dipole removal biases lower TT (README);
    # up to 50: the purified BB near lmax = 2 nside picks up the quadrature leakage of power above lmax
    kw = dict(lmax=LMAX, beam=FWHM, nthreads=1)
    estimators = {pure: PolarizedSpectrumEstimator(mask, binning, purify_b=pure, **kw) for pure in (False, True)}
    runs = {False: [], True: []}
    errs = {False: [], True: []}
    n_sims = 600  # the error ratio's own Monte Carlo error is then ~3 % per bin (1/sqrt(2n) and the kurtosis)
    for _ in range(n_sims):
        a, b = simulate(rng, cl, fine_lmax, beam_t, beam_p, noise_sigma)
        for pure, est in estimators.items():
            bp = est.estimate(a, b)
            runs[pure].append(bp.cl)
            errs[pure].append(bp.cl_err)
    report = {}
    for pure, est in estimators.items():
        res = np.array(runs[pure])
        mean, scatter = res.mean(axis=0), res.std(axis=0, ddof=1)
        expected = est.expected_bandpowers({k: v[: LMAX + 1] for k, v in cl.items()}, cross=True)
        ratio = np.array(errs[pure]).mean(axis=0) / scatter
        # the standard error of a sample standard deviation, sigma sqrt((kurtosis - 1) / (4 n)) for large n
        # (common practice): the bandpowers of the lowest bins (about 20 modes) are far from Gaussian
        z_all = (res - mean) / scatter
        kurtosis = np.mean(z_all**4, axis=0)
        ratio_err = ratio * np.sqrt((kurtosis - 1.0) / (4.0 * n_sims))
        for i, s in enumerate(SPECTRA):
            z_bias = (mean[i] - expected[s]) / (scatter[i] / np.sqrt(n_sims))
            report[(pure, s)] = (np.abs(z_bias).max(), ratio[i].min(), ratio[i].max(), scatter[i])
            judged = np.ones(z_bias.size, bool)
            if s in ("TT", "TE"):
                # the first bin (ell 11-18) carries the bias of the monopole/dipole removal on the masked sky,
                # which the polarized estimator does not correct (measured: 0.15-0.25 of one simulation's
                # scatter, 5-8 % of TT, low): judged on its own
                judged[0] = False
                rel = mean[i][0] / expected[s][0] - 1.0
                assert -0.1 < rel < 0.0, (pure, s, rel)
            if pure and s == "BB":
                # the top bin of the purified BB picks up the grid's quadrature leakage near lmax = 2 nside
                # (measured: +2-3 %, 4-5 standard errors with 600-1000 simulations): judged on its own
                judged[-1] = False
                rel = mean[i][-1] / expected[s][-1] - 1.0
                assert abs(rel) < 0.06, (pure, s, rel)
            # every other bin near the expected mean (the input through the bandpower windows): 3.5 standard
            # errors, as 120 bins are judged (a 3-sigma bound would fail by chance in ~25 % of seeds)
            assert np.all(np.abs(z_bias[judged]) < 3.5), (pure, s, z_bias)
            # errors: the simulated scatter within 10 % of the reported error in every bin of every spectrum,
            # beyond twice the ratio's own Monte Carlo error (``ratio`` is mean reported error / scatter; measured
            # with this seed: 0.93-1.12, largest in the first bin; the previous model without the leakage gave
            # 0.70 for the purified EB and 1.41 for the standard EB there, with 1000 skies)
            assert np.all(np.abs(ratio[i] - 1.0) < 0.1 + 2.0 * ratio_err[i]), (pure, s, ratio[i], ratio_err[i])
    # purification lowers the BB scatter (the factor is reported in the README)
    factor = report[(False, "BB")][3] / report[(True, "BB")][3]
    assert np.all(factor[:4] > 2.0), factor
    print({f"{'pure' if k[0] else 'standard'} {k[1]}": [round(float(x), 3) for x in v[:3]] for k, v in report.items()})
    print("BB scatter standard / purified per bin:", np.round(factor, 2))
