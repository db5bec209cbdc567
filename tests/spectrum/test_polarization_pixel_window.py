"""Tests of the polarization pixel window computed from its definition (cmbtools.spectrum.spin2_pixel_window).

healpy.pixwin(nside, pol=True) downloads its tables on first use (checked: it fails without a network), so it
cannot be a reference here.  Outside references used instead:
* a brute-force midpoint rule of the definition: spin-2 harmonics synthesized by ducc0 on healpy sub-pixels
  (NESTED hierarchy), averaged per pixel, Richardson-extrapolated in the sub-pixel size;
* the Wigner small-d function d^l_22(beta) = cos^4(beta/2) P^(0,4)_{l-2}(cos beta), a Jacobi polynomial
  (Varshalovich et al. 1988, Quantum Theory of Angular Momentum, eq. 4.3.1(2); scipy.special.eval_jacobi);
* the limit of small pixels, where the polarization window approaches the temperature one.
"""

from __future__ import annotations

import ducc0
import healpy as hp
import numpy as np
import pytest
from scipy.special import eval_jacobi

from cmbtools._core import sht as _sht
from cmbtools.spectrum import pixel_windows as _pixwin
from cmbtools.spectrum import spin2_pixel_window as _pixwin_pol
from cmbtools.spectrum.spin2_pixel_window import ALGORITHM_VERSION, cache_path, polarization_pixel_window
from cmbtools.exceptions import CmbtoolsWarning, InvalidInputError


@pytest.fixture
def own_cache(tmp_path, monkeypatch):
    d = tmp_path / "cache"
    d.mkdir()
    monkeypatch.setenv("CMBTOOLS_CACHE_DIR", str(d))
    return d


def test_d22_recurrence_matches_jacobi_polynomials():
    beta = np.linspace(0.0, np.pi, 37)
    x = np.cos(beta)
    d = _pixwin_pol.wigner_d22(x, 60)
    for ell in (2, 3, 7, 20, 60):
        ref = np.cos(beta / 2) ** 4 * eval_jacobi(ell - 2, 0, 4, x)
        np.testing.assert_allclose(d[ell], ref, rtol=1e-11, atol=1e-13)
    assert np.all(d[:2] == 0.0)


def _brute_force_window_squared(nside, lmax, k):
    """(1/Npix) sum_p 4pi/(2l+1) sum_m |<2Y_lm>_p|^2 by averaging over the k*k sub-pixel centres of each pixel.

    With the coefficients alm_E = 1, alm_B = -i (or +i) at one (l, m > 0), the synthesized Q + iU is
    -2 2Y_lm (or -2 (-1)^m 2Y_l-m); with alm_E = 1 at m = 0 it is -2Y_l0 (healpy's E/B convention).
    """
    nf = nside * k
    geom = ducc0.healpix.Healpix_Base(nf, "RING").sht_info()
    ring2nest = hp.ring2nest(nf, np.arange(12 * nf * nf))
    npix = 12 * nside * nside
    out = np.zeros(lmax + 1)
    for ell in range(2, lmax + 1):
        total = 0.0
        for m in range(ell + 1):
            choices, half = ((0.0,), 1.0) if m == 0 else ((-1j, 1j), 0.5)
            for bb in choices:
                alm = np.zeros((2, _sht.alm_size(lmax)), dtype=np.complex128)
                i = hp.Alm.getidx(lmax, ell, m)
                alm[0, i], alm[1, i] = 1.0, bb
                q, u = ducc0.sht.experimental.synthesis(alm=alm, lmax=lmax, spin=2, nthreads=1, **geom)
                p = np.empty(q.size, dtype=np.complex128)
                p[ring2nest] = q + 1j * u
                avg = half * p.reshape(npix, k * k).mean(axis=1)
                total += float(np.sum(avg.real**2 + avg.imag**2))
        out[ell] = total / npix * 4.0 * np.pi / (2 * ell + 1)
    return out


@pytest.mark.parametrize("nside, ks, tol", [(1, (64, 128), 3e-5), (2, (32, 64), 3e-5)])
def test_matches_a_brute_force_average_of_the_definition(nside, ks, tol):
    lmax = 4 * nside
    coarse, fine = (_brute_force_window_squared(nside, lmax, k) for k in ks)
    ref = (4.0 * fine - coarse) / 3.0  # the midpoint rule's error falls as (sub-pixel size)^2
    mine = _pixwin_pol._compute_window_squared(nside, lmax)
    np.testing.assert_allclose(mine[2:], ref[2:], rtol=tol)
    # the un-extrapolated values are visibly worse, so the check has teeth
    assert np.max(np.abs(mine[2:] / coarse[2:] - 1.0)) > 3 * tol
    assert np.all(mine[:2] == 0.0)


def test_approaches_the_temperature_window_for_small_pixels():
    # The polarization window differs from the temperature one by the turning of the local frames inside a
    # pixel (cos 2 chi ~ 1 - 2 chi^2, chi ~ pixel size x cot(theta)) and by d^l_22 against P_l: both vanish
    # as the pixels shrink (the relative difference falls roughly as nside^-1.7 here).
    diffs = []
    for nside in (16, 64):
        wp = polarization_pixel_window(nside, use_cache=False, nthreads=1)
        wt = _pixwin.pixel_window(nside, use_cache=False, nthreads=1)
        diffs.append(np.max(np.abs(wp[2 : 3 * nside] / wt[2 : 3 * nside] - 1.0)))
    assert diffs[0] < 2e-3 and diffs[1] < 2e-4
    assert diffs[1] < diffs[0] / 8
    # every pixel-averaged spin-2 harmonic is smaller than the harmonic: 0 < w^P_l < 1
    wp = polarization_pixel_window(16, use_cache=False, nthreads=1)
    assert np.all((wp[2:] > 0) & (wp[2:] < 1))


def test_refined_rule_agrees():
    nside = 16
    base = _pixwin_pol._compute_window_squared(nside, 4 * nside)
    fine = _pixwin_pol._compute_window_squared(
        nside, 4 * nside, order=8, bins_per_unit=2 * _pixwin._bins_per_unit(4 * nside, nside), pole_depth=16
    )
    r = np.abs(np.sqrt(base[2:]) / np.sqrt(fine[2:]) - 1.0)
    assert r[: 3 * nside - 1].max() < 1e-7 and r.max() < 2e-6


def test_threads_do_not_change_the_result():
    a = polarization_pixel_window(16, use_cache=False, nthreads=1)
    b = polarization_pixel_window(16, use_cache=False, nthreads=2)
    np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("nside, lmax", [(0, None), (3, None), (8, 65), (8, -1)])
def test_bad_inputs(nside, lmax):
    with pytest.raises(InvalidInputError, match="'nside'|'lmax'"):
        polarization_pixel_window(nside, lmax, use_cache=False)


def test_cache_is_written_read_and_checked(own_cache, monkeypatch):
    first = polarization_pixel_window(8)
    path = cache_path(8)
    assert path == own_cache / f"pixel_window_pol_nside8_v{ALGORITHM_VERSION}.npz"
    with np.load(path, allow_pickle=False) as data:
        assert int(data["nside"]) == 8 and int(data["lmax"]) == 32
        np.testing.assert_array_equal(data["window"], first)

    def forbidden(*args, **kwargs):
        raise AssertionError("recomputed although a valid cache exists")

    with monkeypatch.context() as mp:
        mp.setattr(_pixwin_pol, "_compute_window_squared", forbidden)
        np.testing.assert_array_equal(polarization_pixel_window(8), first)
        np.testing.assert_array_equal(polarization_pixel_window(8, 10), first[:11])
    # a damaged file is recomputed with a warning
    path.write_bytes(b"not a zip file")
    with pytest.warns(CmbtoolsWarning, match="corrupt polarization pixel-window cache"):
        again = polarization_pixel_window(8)
    np.testing.assert_array_equal(again, first)
    # a file whose contents were changed fails its checksum
    with np.load(path, allow_pickle=False) as data:
        items = {k: data[k] for k in data.files}
    items["window"] = items["window"] * 1.01
    with open(path, "wb") as fh:
        np.savez(fh, **items)
    with pytest.warns(CmbtoolsWarning, match="do not match their checksum"):
        np.testing.assert_array_equal(polarization_pixel_window(8), first)
    # the temperature window has its own file
    assert not _pixwin.cache_path(8).exists()
