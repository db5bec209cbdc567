"""The exact low-multipole covariance block against a brute-force computation (no simulations).

The brute force applies the estimator's own map-to-coefficient step (``PolarizedSpectrumEstimator._fields``:
monopole/dipole removal of I, masks, spin-0/spin-2 transforms, purification) to every sky mode up to the block's
sky band limit and to every pixel of white noise, forms the pseudo-coefficients' covariance and the binned
pseudo-spectra's covariance by Isserlis' theorem; the block must give the same numbers (nside 8, where the
block's grid is the map's own).
"""

from __future__ import annotations

import numpy as np
import pytest

from cmbtools._core import sht
from cmbtools.exceptions import InvalidInputError
from cmbtools.maps.masks import apodize_mask, cap_mask, disc_mask
from cmbtools.spectrum import Binning, PolarizedSpectrumEstimator
from cmbtools.spectrum.low_ell_covariance import (
    _coords, _sky_weights, _to_real, low_ell_block, low_ell_temperature_block, temperature_bins,
)

NSIDE = 8


def _masks():
    cap = cap_mask(NSIDE, 60.0, 30.0, 55.0)
    holes = disc_mask(NSIDE, [(70.0, 40.0)], radius_deg=12.0)
    return apodize_mask(cap * holes, 20.0, nthreads=1), apodize_mask(cap, 20.0, nthreads=1)


def _guess():
    """Power-law guess spectra (the in-bin shapes follow them; no physics computation)."""
    ell = np.arange(17.0)
    base = 1e-10 / (ell + 2.0) ** 2
    return {"TT": base, "TE": 0.1 * base, "EE": 0.02 * base, "BB": 0.001 * base}


def _brute_force(est, amp, sigma2):
    """(6, 6) covariance of the first bin's binned pseudo-spectra TT, TE, TB, EE, EB, BB of one map."""
    blk = low_ell_block(est, "11")
    b = est.binning
    l_lo, l_hi = int(b.ell_min[0]), int(b.ell_max[0])
    l_sky = blk.l_sky
    idx, part, ell = _coords(est.lmax, l_lo, l_hi)
    sidx, spart, sell = _coords(l_sky, 0, l_sky)
    npix = 12 * NSIDE**2

    def outputs(maps):
        return np.concatenate([_to_real(a, idx, part) for a in est._fields(maps, "1", "maps1")])

    cols = {}
    for f in "TEB":
        a_f = []
        for i, p in zip(sidx, spart):
            alm = np.zeros(sht.alm_size(l_sky), dtype=np.complex128)
            alm[i] = 1.0 if p == 0 else (np.sqrt(0.5) if p == 1 else 1j * np.sqrt(0.5))
            m = np.zeros((3, npix))
            if f == "T":
                m[0] = sht.alm2map(alm, NSIDE, l_sky)
            else:
                z = np.zeros_like(alm)
                m[1], m[2] = sht.alm2map_spin2(alm if f == "E" else z, z if f == "E" else alm, NSIDE, l_sky)
            a_f.append(outputs(m))
        cols[f] = np.array(a_f).T  # (3 n, n_sky)
    weights, groups = _sky_weights(est, l_sky)
    g = groups[sell]
    cov = np.zeros((3 * ell.size, 3 * ell.size))
    for s in ("TT", "TE", "TB", "EE", "EB", "BB"):
        d = np.array([amp.get(("s", s, k), 0.0) for k in g]) * weights[s][sell]
        u, v = s
        term = (cols[u] * d) @ cols[v].T
        cov += term if u == v else term + term.T
    # white noise: every pixel of I, Q, U the mask sees (the others do not reach the coefficients)
    seen = np.concatenate([est.masks["t1"] > 0, est.masks["p1"] > 0, est.masks["p1"] > 0])
    k = np.array([outputs(np.eye(1, 3 * npix, j)[0].reshape(3, npix)) for j in np.nonzero(seen)[0]]).T
    cov += (k * np.repeat([sigma2[0], sigma2[1], sigma2[1]], npix)[seen]) @ k.T
    n = ell.size
    c = b.averaging_weights(est.lmax)[ell] / (2.0 * ell + 1.0)
    blocks = {f: slice(i * n, (i + 1) * n) for i, f in enumerate("TEB")}
    out = np.zeros((6, 6))
    specs = ("TT", "TE", "TB", "EE", "EB", "BB")
    for i, (x, y) in enumerate(specs):
        for j, (z, w) in enumerate(specs):
            s = (cov[blocks[x], blocks[z]] * cov[blocks[y], blocks[w]]
                 + cov[blocks[x], blocks[w]] * cov[blocks[y], blocks[z]])
            out[i, j] = c @ s @ c
    return out


@pytest.mark.parametrize("pure", [False, True])
def test_exact_block_equals_the_brute_force_gaussian_covariance(pure):
    mask, pol_mask = _masks()
    binning = Binning.uniform(2, 16, 4)  # lmax 2 nside: purification's range
    est = PolarizedSpectrumEstimator(mask, binning, pol_mask=pol_mask, purify_b=pure, pixel_window=False, nthreads=1,
                                     lmax=16, guess_cl=_guess())
    blk = low_ell_block(est, "11")
    assert blk.nside_c == NSIDE and blk.l_sky == 15
    # amplitudes (D_l bandpowers, K^2) with TE, TB and EB correlations; white noise of 2 and 5 (x 1e-12 K^2)
    amp = {}
    for g in blk.groups:
        for s, v in zip(("TT", "TE", "TB", "EE", "EB", "BB"), (1000.0, 40.0, 5.0, 10.0, 1.0, 0.5)):
            amp[("s", s, g)] = v * 1e-12 * (1.0 + 0.3 * g)
    amp[("n", "a", "T")] = 2e-12
    amp[("n", "a", "P")] = 5e-12
    got = blk.covariance(amp)[:, 0, :, 0]
    want = _brute_force(est, amp, (2e-12, 5e-12))
    scale = np.sqrt(np.outer(np.diag(want), np.diag(want)))
    assert np.all(np.diag(want) > 0)
    # the same sums in another order: rounding only
    np.testing.assert_allclose(got / scale, want / scale, rtol=0, atol=1e-9)


def test_exact_low_bins_replaces_only_the_first_bins_block():
    mask, pol_mask = _masks()
    binning = Binning.uniform(2, 16, 4)
    kw = dict(pol_mask=pol_mask, pixel_window=False, nthreads=1, lmax=16, guess_cl=_guess())
    on = PolarizedSpectrumEstimator(mask, binning, **kw)
    off = PolarizedSpectrumEstimator(mask, binning, exact_low_bins=0, **kw)
    assert on.exact_low_bins == 1 and off.exact_low_bins == 0
    rng = np.random.default_rng(3)
    maps = rng.standard_normal((3, 12 * NSIDE**2)) * 1e-5
    a, b = on.estimate(maps), off.estimate(maps)
    np.testing.assert_array_equal(a.cl, b.cl)
    # the narrow-kernel block differs from the exact one in the first bin, and the rest follows through the
    # inverse coupling, so only compare that the first bin's errors changed and are finite and positive
    assert np.all(np.isfinite(a.cl_err)) and np.all(a.cl_err > 0)
    assert np.max(np.abs(a.cl_err[:, 0] / b.cl_err[:, 0] - 1.0)) > 1e-3
    with pytest.raises(InvalidInputError, match="exact_low_bins"):
        PolarizedSpectrumEstimator(mask, binning, exact_low_bins=9, **kw)


def test_temperature_block_of_two_bins_equals_the_brute_force():
    """The TT-only block reaches one bin further; its numbers are the brute force's (removal, mask, noise)."""
    mask, pol_mask = _masks()
    binning = Binning.uniform(2, 16, 4)
    est = PolarizedSpectrumEstimator(mask, binning, pol_mask=pol_mask, pixel_window=False, nthreads=1, lmax=16,
                                     guess_cl=_guess())
    assert temperature_bins(binning, est.exact_low_bins) == 2 and temperature_bins(binning, 0) == 0
    blk = low_ell_temperature_block(est, "11")
    assert blk.n_exact == 2 and blk.nside_c == NSIDE and blk.l_sky == 16
    amp = {("s", "TT", g): 1e-9 * (1.0 + 0.3 * g) for g in blk.groups}
    amp[("n", "a", "T")] = 2e-12
    got = blk.covariance(amp)[0, :, 0, :]
    # brute force: every sky mode to l_sky and every noise pixel through the estimator's own _fields
    lo, hi, l_sky = 2, 9, blk.l_sky
    idx, part, ell = _coords(est.lmax, lo, hi)
    sidx, spart, sell = _coords(l_sky, 0, l_sky)
    npix = 12 * NSIDE**2

    def outputs(m0):
        return _to_real(est._fields(np.stack([m0, np.zeros(npix), np.zeros(npix)]), "1", "maps1")[0], idx, part)

    cols = []
    for i, p in zip(sidx, spart):
        alm = np.zeros(sht.alm_size(l_sky), dtype=np.complex128)
        alm[i] = 1.0 if p == 0 else (np.sqrt(0.5) if p == 1 else 1j * np.sqrt(0.5))
        cols.append(outputs(sht.alm2map(alm, NSIDE, l_sky)))
    a = np.array(cols).T
    weights, groups = _sky_weights(est, l_sky)
    d = np.array([amp[("s", "TT", k)] for k in groups[sell]]) * weights["TT"][sell]
    seen = np.nonzero(est.masks["t1"] > 0)[0]
    k = np.array([outputs(np.eye(1, npix, j)[0]) for j in seen]).T
    cov = (a * d) @ a.T + 2e-12 * k @ k.T
    c = est.binning.averaging_weights(est.lmax)[ell] / (2.0 * ell + 1.0)
    cb = np.array([np.where(est.binning.bin_index[ell] == b, c, 0.0) for b in range(2)])
    want = 2.0 * cb @ (cov * cov) @ cb.T
    np.testing.assert_allclose(got, want, rtol=1e-9, atol=0)
