"""The built-in fiducial temperature spectrum (cmbtools.simulate.fiducial_cl)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from astropy.cosmology import Planck18

from cmbtools.exceptions import InvalidInputError
from cmbtools.physics import CosmologyExtras
from cmbtools.simulate import fiducial_cl, fiducial_dl

LMAX = 2500


@pytest.fixture(scope="module")
def dl_uk2():
    """D_l in uK^2 for the default cosmology (computed once for the module)."""
    return fiducial_dl(LMAX) * 1e12


def _peaks(dl, lo, hi):
    seg = dl[lo:hi]
    i = int(np.argmax(seg))
    return lo + i, float(seg[i])


def test_shape_units_and_low_multipoles():
    cl = fiducial_cl(300)
    assert cl.shape == (301,)
    assert cl[0] == 0.0 and cl[1] == 0.0
    assert np.all(np.isfinite(cl)) and np.all(cl[2:] > 0)
    ell = np.arange(2, 301)
    np.testing.assert_allclose(fiducial_dl(300)[2:], ell * (ell + 1) * cl[2:] / (2 * math.pi), rtol=1e-14)


def test_positive_and_finite_everywhere(dl_uk2):
    assert np.all(np.isfinite(dl_uk2))
    assert np.all(dl_uk2[2:] > 0)


def test_first_acoustic_peak_position_and_height(dl_uk2):
    l1, d1 = _peaks(dl_uk2, 100, 350)
    # common practice: the first peak sits at l ~ 220
    assert 200 <= l1 <= 240
    # Planck 2018 best fit: D_l ~ 5750 uK^2 at the first peak (from memory); the model is within 20 %
    assert 0.8 * 5750 <= d1 <= 1.2 * 5750


def test_second_and_third_peaks(dl_uk2):
    l2, d2 = _peaks(dl_uk2, 450, 650)
    l3, d3 = _peaks(dl_uk2, 700, 950)
    # Planck 2018 best fit (from memory): l ~ 537 and ~ 810, D_l ~ 2600 and ~ 2500 uK^2
    assert 510 <= l2 <= 565
    assert 785 <= l3 <= 850
    assert 0.8 * 2600 <= d2 <= 1.2 * 2600
    assert 0.8 * 2500 <= d3 <= 1.3 * 2500
    # the trough between the first two peaks: baryon loading makes it much lower than both
    lt = 300 + int(np.argmin(dl_uk2[300:500]))
    assert 380 <= lt <= 440
    assert dl_uk2[lt] < 0.35 * _peaks(dl_uk2, 100, 350)[1]


def test_acoustic_scale_matches_last_scattering(dl_uk2):
    # peak spacing ~ l_A = pi / theta* (common practice); l_A from cmbtools' last-scattering physics
    from cmbtools.physics import last_scattering

    ell_a = last_scattering().ell_a
    l2, _ = _peaks(dl_uk2, 450, 650)
    l3, _ = _peaks(dl_uk2, 700, 950)
    assert (l3 - l2) == pytest.approx(ell_a, rel=0.08)


def test_sachs_wolfe_plateau(dl_uk2):
    # Sachs & Wolfe (1967): D_l = T0^2 A_s / 25 for n_s = 1 in matter domination (common practice:
    # Theta + psi = psi / 3, psi = (3/5) zeta), with the tilt (k/k0)^(n_s - 1) at k ~ (l + 1/2) / D_M(z*)
    # and reionization screening, which this model applies partly at l = 10.
    from cmbtools.physics import last_scattering

    ex = CosmologyExtras()
    t0 = Planck18.Tcmb0.to_value("K")
    k10 = 10.5 / last_scattering().dm_star_mpc
    sw = t0**2 * ex.amplitude_scalar / 25.0 * (k10 / ex.pivot_wavenumber_mpc) ** (ex.tilt_scalar - 1.0) * 1e12
    assert dl_uk2[10] == pytest.approx(sw, rel=0.2)
    # flat within 30 % at 2 <= l <= 15 (the model has no late ISW effect, see the module notes,
    # and its acoustic rise starts by l ~ 20)
    plateau = dl_uk2[2:16]
    assert plateau.max() / plateau.min() < 1.3
    # far below the first peak
    assert plateau.max() < 0.2 * _peaks(dl_uk2, 100, 350)[1]


def test_damping_tail(dl_uk2):
    _, d1 = _peaks(dl_uk2, 100, 350)
    # Silk damping (common practice): the power at l = 2000 is a small fraction of the first peak
    assert dl_uk2[2000] / d1 < 0.1
    envelope = [dl_uk2[lo : lo + 500].max() for lo in (500, 1000, 1500, 2000)]
    assert all(a > b for a, b in zip(envelope, envelope[1:]))
    # from the third peak (l ~ 810) to the seventh (l ~ 2100) the envelope falls by more than 6
    assert envelope[-1] < 0.15 * envelope[0]


def test_prefix_and_cache_are_consistent():
    a = fiducial_cl(120)
    b = fiducial_cl(2000)
    np.testing.assert_array_equal(a, b[:121])
    a[5] = -1.0  # the caller's copy, not the cache
    assert fiducial_cl(120)[5] > 0


def test_errors():
    with pytest.raises(InvalidInputError, match="10000"):
        fiducial_cl(10001)
    with pytest.raises(InvalidInputError, match="'lmax'"):
        fiducial_cl(-1)
    with pytest.raises(InvalidInputError, match="FLRW"):
        fiducial_cl(100, cosmo="Planck18")
    with pytest.raises(InvalidInputError, match="CosmologyExtras"):
        fiducial_cl(100, extras={"amplitude_scalar": 2e-9})


@pytest.mark.slow
def test_amplitude_and_tilt_scale_as_the_primordial_spectrum(dl_uk2):
    base = CosmologyExtras()
    doubled = fiducial_dl(600, extras=base.replace(amplitude_scalar=2 * base.amplitude_scalar)) * 1e12
    np.testing.assert_allclose(doubled[2:], 2 * dl_uk2[2:601], rtol=1e-9)  # linear in A_s
    flat = fiducial_dl(600, extras=base.replace(tilt_scalar=1.0)) * 1e12
    # at l = 10 (k ~ 7.6e-4 Mpc^-1) the tilt factor (k/k0)^(n_s - 1) is (7.6e-4/0.05)^-0.0335 ~ 1.15
    from cmbtools.physics import last_scattering

    k10 = 10.5 / last_scattering().dm_star_mpc
    expected = (k10 / base.pivot_wavenumber_mpc) ** (base.tilt_scalar - 1.0)
    assert dl_uk2[10] / flat[10] == pytest.approx(expected, rel=0.03)


@pytest.mark.slow
def test_more_baryons_raise_odd_peaks(dl_uk2):
    # Baryon loading raises the compression (odd) peaks relative to the even ones (common practice;
    # Hu & Sugiyama 1995).
    rich = Planck18.clone(Ob0=1.3 * Planck18.Ob0, Om0=Planck18.Om0 + 0.3 * Planck18.Ob0)
    d = fiducial_dl(700, cosmo=rich) * 1e12
    ratio_base = _peaks(dl_uk2, 100, 350)[1] / _peaks(dl_uk2, 450, 650)[1]
    ratio_rich = _peaks(d, 100, 350)[1] / _peaks(d, 450, 650)[1]
    assert ratio_rich > 1.1 * ratio_base


def test_a_new_process_reads_the_spectrum_from_the_disk_cache(dl_uk2, monkeypatch):
    # The in-memory cache emptied (as in a new process): the spectrum comes back from the cache directory,
    # identical, without solving the model; a damaged file is ignored and the spectrum computed again.
    from cmbtools.physics.parameters import resolve_cosmology, resolve_extras
    from cmbtools.simulate import theory_spectrum as ts

    key = ts._model_for(resolve_cosmology(None), resolve_extras(None), build=False)["disk_key"]
    path = ts._disk_path(key, LMAX)
    # an earlier test may have filled the in-memory cache with a longer spectrum (then nothing was written for
    # this lmax): start from an empty one, so that this call reads the file or computes and writes it
    monkeypatch.setattr(ts, "_cache", {})
    fiducial_dl(LMAX)
    assert path.is_file()
    monkeypatch.setattr(ts, "_cache", {})

    def no_model(*args):
        raise AssertionError("the model was solved although the spectrum is on disk")

    with monkeypatch.context() as m:
        m.setattr(ts, "_compute_dl", no_model)
        np.testing.assert_array_equal(fiducial_dl(LMAX) * 1e12, dl_uk2)
    path.write_bytes(b"not a cache file")
    monkeypatch.setattr(ts, "_cache", {})
    np.testing.assert_allclose(fiducial_dl(LMAX) * 1e12, dl_uk2, rtol=1e-12)
