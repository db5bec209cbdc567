"""The polarized estimator's couplings by Gauss-Legendre quadrature equal ducc0's coupling kernel reduced the same way.

The kernel itself is checked against sympy's exact 3j sums in test_polarization.py; here the quadrature's
sums (spectrum.spin_quadrature) and the estimator's P-reduced and covariance kernels built on them are
compared with the kernel's matrices, reduced by the definitions, to rounding.
"""

import numpy as np
import pytest

from cmbtools import maps, spectrum
from cmbtools._core import sht
from cmbtools.spectrum import coupling
from cmbtools.spectrum import spin_quadrature as sq
from cmbtools.spectrum.polarized_operator import PARITY_SHARE_SPIN_KERNELS


def _assert_close(ours, ref, rel):
    np.testing.assert_allclose(ours, ref, rtol=0, atol=rel * np.abs(ref).max())


def test_sums_equal_the_kernels_matrices():
    lmax = 37
    rng = np.random.default_rng(5)
    w = np.exp(-np.arange(2 * lmax + 1) / 6.0) * rng.uniform(0.5, 1.5, 2 * lmax + 1)
    m00, m02, mpp, mmm = coupling.coupling_matrices([("00", w), ("02", w), ("+-", w)], lmax, nthreads=1)
    ref = {"00": m00, "02": m02, "++": mpp, "--": mmm, "+-": mpp - mmm}
    q = sq.SpinCouplingQuadrature(lmax, {"w": w})
    u = rng.normal(size=(lmax + 1, 3))
    v = rng.normal(size=(lmax + 1, 2))
    pu, pv = q.project(["P", "20", "22", "2m2"], u), q.project(["P", "20", "22", "2m2"], v)
    inv_cols = 1.0 / (2.0 * np.arange(lmax + 1) + 1.0)
    rows = q.reduced_rows([(k, "w", pu) for k in ref])
    for (kind, m), r in zip(ref.items(), rows):
        _assert_close(q.binned(kind, "w", pu, pv), u.T @ (m * inv_cols[None, :]) @ v, 1e-13)
        _assert_close(r, u.T @ m, 1e-13)


def test_blocks_of_multipoles_give_the_same_tables(monkeypatch):
    x = np.cos(np.linspace(0.05, 3.1, 9))
    whole = next(sq._d_blocks(["P", "20", "22", "2m2"], x, 50))[2]
    parts = {t: [] for t in whole}
    for _, _, tabs in sq._d_blocks(["P", "20", "22", "2m2"], x, 50, block=7):
        for t in tabs:
            parts[t].append(tabs[t])
    for t in whole:
        np.testing.assert_array_equal(np.concatenate(parts[t], axis=0), whole[t])
    # d^l_22 at l = 3 (a closed form, from memory): ((1+x)/2)^2 (3x - 2)
    np.testing.assert_allclose(whole["22"][3], 0.25 * (1 + x) ** 2 * (3 * x - 2), rtol=0, atol=1e-15)


@pytest.mark.parametrize("purify", [False, True])
def test_estimator_kernels_equal_the_reduced_kernel_matrices(purify):
    nside, lmax = 16, 32
    mask = maps.apodize_mask(maps.latitude_cut_mask(nside, 20.0), 15.0)
    binning = spectrum.Binning.uniform(2, lmax, 6)
    est = spectrum.PolarizedSpectrumEstimator(mask, binning, lmax=lmax, purify_b=purify, averaged_pixels=False,
                                              nthreads=1)
    w = est._mask_spectrum(0, 0)
    m00, m02, mpp, mmm = coupling.coupling_matrices([("00", w), ("02", w), ("+-", w)], lmax, nthreads=1)
    ratio = coupling.pure_b_ratio(lmax)
    full = {"00": m00, "02": m02, "++": mpp, "--": mmm, "+-": mpp - mmm, "00R": m00 * ratio,
            "00RR": m00 * ratio**2, "02R": m02 * ratio}
    p = binning.averaging_matrix(lmax)
    keys = [k for k in est._cache if k[0] == "kernel"]
    assert {k[1] for k in keys} >= ({"00R", "00RR", "02R"} if purify else {"00", "02", "++", "--", "+-"})
    for _, kind, i, j in keys:
        _assert_close(est._cache[("kernel", kind, i, j)], p @ full[kind], 1e-12)
    # the covariance kernels: bin sums of r_l M_ll'/(2l'+1) r_l', the spin kind in the first bins
    r = binning.averaging_matrix(lmax)
    r = (r > 0) / np.maximum(binning.n_ell[:, None], 1)
    inv_cols = 1.0 / (2.0 * np.arange(lmax + 1) + 1.0)
    cov_keys = [k for k in est._cache if k[0] == "cov_kernel"]
    assert {k[1] for k in cov_keys} == {"00", "02", "++"}
    checked = 0
    for key in cov_keys:
        kind = key[1]
        if key[2:] != ((("m", 0), ("m", 0)), (("m", 0), ("m", 0))):
            continue  # the products w^2 x w^2 of the one mask
        w2 = est._cache[key]
        ws = sht.map_spectra([mask**2], lmax, nthreads=1)[0]
        a00, a02, app, amm = coupling.coupling_matrices([("00", ws), ("02", ws), ("+-", ws)], lmax, nthreads=1)
        g = r @ (a00 * inv_cols) @ r.T
        if kind != "00":
            share = (r @ amm.sum(axis=1)) / (r @ (app + amm).sum(axis=1))
            above = share > PARITY_SHARE_SPIN_KERNELS
            n_low = int(np.argmin(above)) if not above.all() else above.size
            assert n_low == est._cache[("cov_kernel_spin_bins",) + key[1:]]
            gs = r @ ((a02 if kind == "02" else app) * inv_cols) @ r.T
            g[:n_low], g[:, :n_low] = gs[:n_low], gs[:, :n_low]
        _assert_close(w2, 0.5 * (g + g.T), 1e-12)
        checked += 1
    assert checked == 3
