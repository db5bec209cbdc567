"""The polarized estimator's corrections: the monopole/dipole removal's bias in TT, TE, TB and the power above the bins."""

from __future__ import annotations

import healpy as hp
import numpy as np
import pytest

from cmbtools._core import sht
from cmbtools.spectrum import Binning, PolarizedSpectrumEstimator
from cmbtools.spectrum import polarized_corrections as corrections
from cmbtools.spectrum.deprojection import TemplateDeprojection

NSIDE, LMAX, BIG_L = 8, 16, 23


def _window(nside):
    """A smooth cap (zero slope at its edge) with a tapered hole."""
    vec = np.array(hp.pix2vec(nside, np.arange(12 * nside**2))).T
    x = np.clip((vec @ hp.ang2vec(40.0, 30.0, lonlat=True) - 0.1) / 0.5, 0.0, 1.0)
    w = x * x * (3.0 - 2.0 * x)
    d = np.degrees(np.arccos(np.clip(vec @ hp.ang2vec(40.0, 40.0, lonlat=True), -1.0, 1.0)))
    return w * np.clip((d - 8.0) / 15.0, 0.0, 1.0)


def _spectra(big_l):
    ell = np.arange(big_l + 1.0)
    tt = np.where(ell >= 2, 1e-10 / (ell + 3.0) ** 2, 0.0)
    tt[:2] = 1e-10 / 9.0  # the sky's own monopole and dipole power, removed with the fitted ones
    te = np.where(ell >= 2, 0.4e-10 * np.cos(ell / 4.0) / (ell + 3.0) ** 2, 0.0)
    ee = np.where(ell >= 2, 0.5e-10 / (ell + 3.0) ** 2, 0.0)
    return tt, te, ee


def _unit_modes(big_l):
    """Every real unit mode of the harmonic coefficients to big_l: E[a a*] = 1 summed over them, per (l, m)."""
    n = sht.alm_size(big_l)
    for i in range(n):
        for part in ((1.0,) if i <= big_l else (np.sqrt(0.5), 1j * np.sqrt(0.5))):
            a = np.zeros(n, dtype=np.complex128)
            a[i] = part
            yield a


@pytest.mark.parametrize("pure", [False, True])
def test_one_sided_removal_bias_of_te_and_tb_equals_the_explicit_sum_over_modes(pure):
    # The bias of Elsner, Leistedt & Peiris (2016, MNRAS 456, 2095) for T x E when only T is projected,
    # against brute force: E[T~ E~*] of a Gaussian sky is the sum over the real unit modes z of the
    # coefficients of C_l[T~(sqrt(TT) z), E~(TE/sqrt(TT) z)], the maps projected explicitly (the weighted
    # least-squares removal of the monopole and dipole) and transformed as the estimator does.  Exact to rounding.
    w = _window(NSIDE)
    tt, te, ee = _spectra(BIG_L)
    guess = {"TT": tt, "TE": te, "EE": ee}
    est = PolarizedSpectrumEstimator(w, Binning.uniform(2, LMAX, 5), lmax=LMAX, pixel_window=False, sky_lmax=BIG_L,
                                     guess_cl=guess, purify_b=pure, nthreads=1)
    dep = TemplateDeprojection(w, nthreads=1)
    f = np.stack([dep.template_map(i) for i in range(dep.n_templates)], axis=1)
    proj = np.diag(w) @ (np.eye(w.size) - f @ np.linalg.solve(f.T @ (w[:, None] * f), f.T * w[None, :]))
    plain = np.zeros((2, LMAX + 1))
    removed = np.zeros((2, LMAX + 1))
    amp_t = np.sqrt(tt)
    amp_e = np.where(tt > 0, te / np.where(tt > 0, amp_t, 1.0), 0.0)
    derivs = est._derivs[est._key_of["p1"]] if pure else None
    for z in _unit_modes(BIG_L):
        t = sht.alm2map(sht.almxfl(z, amp_t, BIG_L), NSIDE, BIG_L, nthreads=1)
        q, u = sht.alm2map_spin2(sht.almxfl(z, amp_e, BIG_L), np.zeros_like(z), NSIDE, BIG_L, nthreads=1)
        if pure:
            from cmbtools.spectrum import purification

            e, b = purification.pure_eb_alm(q, u, w, derivs[0], derivs[1], LMAX, nthreads=1)
        else:
            e, b = sht.map2alm_spin2(q * w, u * w, LMAX, nthreads=1)
        for x, out in ((w * t, plain), (proj @ t, removed)):
            a = sht.map2alm(x, LMAX, nthreads=1)
            out[0] += sht.alm2cl(a, e, lmax=LMAX)
            out[1] += sht.alm2cl(a, b, lmax=LMAX)
    brute = removed - plain
    d_te, d_tb = corrections._one_sided_bias(est, "t1", "p1", te, np.zeros(BIG_L + 1))
    scale = np.max(np.abs(plain[0]))
    assert np.max(np.abs(brute[0][2:])) > 0.02 * scale  # a bias worth correcting
    np.testing.assert_allclose(d_te[2:], brute[0][2:], rtol=0, atol=1e-10 * scale)
    np.testing.assert_allclose(d_tb[2:], brute[1][2:], rtol=0, atol=1e-10 * scale)


def test_corrections_make_the_expected_bandpowers_of_the_guess_its_bin_averages():
    # With the guess's shape the corrections are exact: the expectation of the estimate of a sky with power to
    # sky_lmax and the removal's bias is the bin average of the sky spectra (``Binning.bin_spectrum``).  The
    # coupled expectation is computed independently here: every kernel to sky_lmax (sympy-checked kernels of
    # the coupling module), plus the removal's bias of TT from the temperature module (tested there against the
    # explicit projection) and of TE from the test above.
    from cmbtools.spectrum import coupling
    from cmbtools.spectrum.deprojection import deprojection_bias

    w = _window(NSIDE)
    tt, te, ee = _spectra(BIG_L)
    bb = 0.1 * ee
    guess = {"TT": tt, "TE": te, "EE": ee, "BB": bb}
    binning = Binning.uniform(2, 14, 4)
    est = PolarizedSpectrumEstimator(w, binning, lmax=LMAX, pixel_window=False, sky_lmax=BIG_L, guess_cl=guess,
                                     nthreads=1)
    wl = sht.map_spectra([w], LMAX + BIG_L, nthreads=1)[0]
    m00, m02, mpp, mmm = coupling.coupling_matrices([("00", wl), ("02", wl), ("+-", wl)], LMAX, nthreads=1,
                                                    lmax_columns=BIG_L)
    dep = TemplateDeprojection(w, nthreads=1)
    d_tt = deprojection_bias(dep, tt, LMAX, nthreads=1)
    d_te, _ = corrections._one_sided_bias(est, "t1", "p1", te, np.zeros(BIG_L + 1))
    pseudo = {"TT": m00 @ tt + d_tt, "TE": m02 @ te + d_te, "EE": mpp @ ee + mmm @ bb, "BB": mmm @ ee + mpp @ bb}
    pair = est._pair("11")
    p = binning.averaging_weights(LMAX)
    vec = np.concatenate([np.add.reduceat(p * pseudo[c], binning.ell_min) if c in pseudo else np.zeros(binning.n_bins)
                          for c in pair.components])
    got = est._reporting_matrix(pair.components) @ (pair.ainv @ vec)
    nb = binning.n_bins
    for i, (name, cl) in enumerate((("TT", tt), ("TE", te), ("TB", None), ("EE", ee), ("EB", None), ("BB", bb))):
        value = got[i * nb:(i + 1) * nb] / binning.dl_factor
        if cl is None:
            assert np.all(value == 0.0)
            continue
        want = binning.bin_spectrum(cl)
        np.testing.assert_allclose(value, want, rtol=1e-9, atol=1e-9 * np.max(np.abs(want)), err_msg=name)
    # without the removal's correction the first TT bin is off; without the power above lmax, the last one
    for kwargs, b in ((dict(correct_deprojection_bias=False, sky_lmax=BIG_L), 0), (dict(), nb - 1)):
        bare = PolarizedSpectrumEstimator(w, binning, lmax=LMAX, pixel_window=False, guess_cl=guess, nthreads=1,
                                          **kwargs)
        pair = bare._pair("11")
        got = bare._reporting_matrix(pair.components) @ (pair.ainv @ vec) / np.tile(binning.dl_factor, 6)
        assert abs(got[b] / binning.bin_spectrum(tt)[b] - 1.0) > 0.01, (kwargs, got[:nb] / binning.bin_spectrum(tt))


def test_in_bin_shape_follows_the_guess_unless_its_bin_average_cancels():
    binning = Binning.uniform(2, 21, 10)
    ell = np.arange(22.0)
    to_cl = np.where(ell >= 2, 2.0 * np.pi / (ell * (ell + 1.0) + (ell < 2)), 0.0)
    # TE as D_l: +1 then -0.9 in the first bin (ell 2-11): an average of 0.05 against 0.95 of its absolute value;
    # (l - 14) / 4 in the second: a sign change with an average of 0.63 against 0.78
    g = {"TT": np.where(ell >= 2, 1.0 / (ell + 1.0), 0.0),
         "TE": to_cl * np.where(ell < 7, 1.0, np.where(ell < 12, -0.9, (ell - 14.0) / 4.0))}
    shapes = corrections.in_bin_shapes(binning, 21, g)
    q = binning.model_weights(21)
    # a one-signed bin: the model reproduces the guess's bin average (P Q diag(shape) = identity on the bins)
    p = binning.averaging_weights(21)
    np.testing.assert_allclose(np.add.reduceat(p * q * shapes["TT"], binning.ell_min), 1.0, rtol=1e-12)
    # TE's first bin is a cancellation: flat there; the second keeps a clear average: its shape
    assert np.all(shapes["TE"][2:12] == 1.0)
    np.testing.assert_allclose(np.add.reduceat(p * q * shapes["TE"], binning.ell_min)[1], 1.0, rtol=1e-12)
    assert np.ptp(shapes["TE"][12:22]) > 0.1
