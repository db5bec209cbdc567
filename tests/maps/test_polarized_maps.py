"""I, Q, U maps: FITS input/output with per-field units and the angle convention, masks, rotation, smoothing.

External references: healpy's FITS writer and reader, ``healpy.anafast(pol=True)`` (full-sky spectra),
``healpy.smoothing(pol=True)`` and ``healpy.Rotator`` (angle of the local frames).
"""

from __future__ import annotations

import numpy as np
import pytest

import healpy as hp
from astropy.io import fits

from cmbtools import maps
from cmbtools._core.checks import UNSEEN
from cmbtools.exceptions import CmbtoolsWarning, InputFileError, InvalidInputError

NSIDE = 16
LMAX = 2 * NSIDE


def _spectra(tt=1.0, ee=0.5, bb=0.2, te=0.3, lmax=LMAX):
    ell = np.arange(lmax + 1)
    shape = np.where(ell >= 2, 1e-10 / np.maximum(ell, 1) ** 1.0, 0.0)
    return [tt * shape, ee * shape, bb * shape, te * shape, 0 * shape, 0 * shape]


def _gaussian(rng, lmax):
    """Complex standard normal coefficients in healpy's layout (m = 0 real with unit variance)."""
    n = hp.Alm.getsize(lmax)
    g = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) / np.sqrt(2.0)
    g[: lmax + 1] = rng.standard_normal(lmax + 1)
    return g


def _iqu_sky(seed=1, nside=NSIDE, lmax=LMAX, **kw):
    """A band-limited I, Q, U sky (healpy synthesis) and its T, E, B coefficients."""
    rng = np.random.default_rng(seed)
    tt, ee, bb, te = _spectra(lmax=lmax, **kw)[:4]
    ell = hp.Alm.getlm(lmax)[0]
    g1, g2, g3 = (_gaussian(rng, lmax) for _ in range(3))
    with np.errstate(invalid="ignore", divide="ignore"):
        a_t = np.sqrt(tt)[ell] * g1
        r = np.where(tt > 0, te / np.where(tt > 0, np.sqrt(tt), 1.0), 0.0)
        a_e = r[ell] * g1 + np.sqrt(np.maximum(ee - r**2, 0.0))[ell] * g2
        a_b = np.sqrt(bb)[ell] * g3
    alm = np.array([a_t, a_e, a_b])
    return hp.alm2map(alm, nside, lmax=lmax, pol=True), alm


def _rotate_polarization(m, angle):
    """Q + iU -> exp(2i angle) (Q + iU): creates TB and EB from TE and EE - BB."""
    p = (m[1] + 1j * m[2]) * np.exp(2j * angle)
    return np.stack([m[0], p.real, p.imag])


# ---------------------------------------------------------------- FITS round trips


@pytest.mark.parametrize("nest", [False, True])
@pytest.mark.parametrize("partial", [False, True])
@pytest.mark.parametrize("convention", ["healpix", "iau"])
def test_iqu_round_trip(tmp_path, nest, partial, convention):
    m, _ = _iqu_sky()
    if partial:
        m[:, :100] = UNSEEN
        m[2, 500:510] = UNSEEN  # a pixel missing in U only stays missing in U only
    path = tmp_path / "iqu.fits"
    maps.write_iqu(path, m, unit="uK_CMB", nested=nest, observed_only=partial, polarization_convention=convention, coordinates="G")
    back, info = maps.read_iqu(path)
    np.testing.assert_allclose(back[~(m == UNSEEN)], m[~(m == UNSEEN)], rtol=1e-14, atol=0)
    assert np.all(back[m == UNSEEN] == UNSEEN)
    assert info.polarization_convention_in_file == convention
    assert info.units_by_field == ("uK_CMB",) * 3
    assert info.ordering_in_file == ("NESTED" if nest else "RING") and info.is_partial == partial
    # the file itself: POLANGLE card, and U in the file's own convention
    with fits.open(path) as hdul:
        h = hdul[1].header
        assert h["POLANGLE"] == convention.upper()
        u_file = np.asarray(hdul[1].data["U"], dtype=float).ravel()
    if not partial and not nest:
        sign = -1.0 if convention == "iau" else 1.0
        np.testing.assert_allclose(u_file * 1e-6, sign * m[2], rtol=1e-14)


def test_units_per_field_and_temperature_file_still_works(tmp_path):
    m, _ = _iqu_sky()
    path = tmp_path / "units.fits"
    maps.write_iqu(path, m, unit=("K_CMB", "mK_CMB", "uK"))
    with fits.open(path) as hdul:
        assert [hdul[1].header[f"TUNIT{i}"] for i in (1, 2, 3)] == ["K_CMB", "mK_CMB", "uK"]
        np.testing.assert_allclose(np.asarray(hdul[1].data["Q"], float).ravel(), m[1] * 1e3, rtol=1e-14)
    back, _ = maps.read_iqu(path)
    np.testing.assert_allclose(back, m, rtol=1e-14)
    # read_map still reads the temperature (the first column) of the same file
    t, info = maps.read_sky_map(path)
    np.testing.assert_allclose(t, m[0], rtol=1e-14)
    assert maps.is_iqu_file(path)
    # a temperature-only file: read_map as before, read_iqu refuses with one clear message
    tpath = tmp_path / "t.fits"
    maps.write_sky_map(tpath, m[0])
    assert not maps.is_iqu_file(tpath)
    with pytest.raises(InputFileError, match="holds 1 map column.*needs three"):
        maps.read_iqu(tpath)
    np.testing.assert_allclose(maps.read_sky_map(tpath)[0], m[0], rtol=1e-14)


def test_reads_healpy_written_iqu_files(tmp_path):
    # healpy's writer (external): columns I_STOKES, Q_STOKES, U_STOKES, no convention keyword -> HEALPix
    m, _ = _iqu_sky()
    path = tmp_path / "hp.fits"
    hp.write_map(str(path), m, nest=True, column_units="uK", dtype=np.float64)
    assert maps.is_iqu_file(path)
    back, info = maps.read_iqu(path)
    # healpy writes the array as given and labels it NESTED: cmbtools reorders it to RING
    np.testing.assert_allclose(back, hp.reorder(m, n2r=True) * 1e-6, rtol=1e-12)
    assert info.polarization_convention_in_file is None
    # and healpy reads what cmbtools writes (RING, HEALPix convention)
    out = tmp_path / "ours.fits"
    maps.write_iqu(out, m, unit="K_CMB")
    np.testing.assert_allclose(np.asarray(hp.read_map(str(out), field=(0, 1, 2))), m, rtol=1e-14)


def test_convention_keyword_problems(tmp_path):
    m, _ = _iqu_sky()
    path = tmp_path / "bad.fits"
    maps.write_iqu(path, m, header={"HISTORY": "x"})
    with fits.open(path) as hdul:
        hdul[1].header["POLANGLE"] = "SIDEWAYS"
        hdul.writeto(tmp_path / "bad2.fits")
    with pytest.raises(InputFileError, match="POLANGLE='SIDEWAYS'"):
        maps.read_iqu(tmp_path / "bad2.fits")
    # an explicit convention overrides the damaged keyword
    back, _ = maps.read_iqu(tmp_path / "bad2.fits", polarization_convention="iau")
    np.testing.assert_allclose(back[2], -m[2], rtol=1e-14)
    with pytest.raises(InvalidInputError, match="'polarization_convention' parameter must be 'healpix' or 'iau'"):
        maps.read_iqu(path, polarization_convention="galactic")
    with pytest.raises(InvalidInputError, match="may not set the HEALPix keyword 'POLANGLE'"):
        maps.write_iqu(tmp_path / "x.fits", m, header={"POLANGLE": "IAU"})
    with pytest.raises(InvalidInputError, match=r"shape \(3, 12\*nside\*\*2\)"):
        maps.write_iqu(tmp_path / "y.fits", m[:2])
    assert not (tmp_path / "x.fits").exists() and not (tmp_path / "y.fits").exists()


def test_missing_unit_warns_once(tmp_path):
    m, _ = _iqu_sky()
    path = tmp_path / "nounit.fits"
    maps.write_iqu(path, m, unit=None)
    with pytest.warns(CmbtoolsWarning, match="I, Q, U column.*state no unit"):
        back, _ = maps.read_iqu(path)
    np.testing.assert_allclose(back, m, rtol=1e-14)
    back2, _ = maps.read_iqu(path, unit="uK")
    np.testing.assert_allclose(back2, m * 1e-6, rtol=1e-14)


def test_convention_conversion_flips_u_only():
    m, _ = _iqu_sky()
    m[1, 3] = UNSEEN
    m[2, 4] = UNSEEN
    iau = maps.convert_polarization_convention(m, "healpix", "IAU")
    np.testing.assert_array_equal(iau[:2], m[:2])
    good = m[2] != UNSEEN
    np.testing.assert_array_equal(iau[2, good], -m[2, good])
    assert iau[2, 4] == UNSEEN
    np.testing.assert_array_equal(maps.convert_polarization_convention(iau, "iau", "healpix"), m)
    np.testing.assert_array_equal(maps.convert_polarization_convention(m, "iau", "iau"), m)


def test_other_convention_flips_tb_and_eb(tmp_path):
    # A sky with TB and EB (polarization angle turned by 10 degrees) written in the IAU convention and read
    # as if it were HEALPix.  Negating U alone turns the spin-2 field into a spin -2 one: E and B MIX (that is
    # why the convention matters so much), and the exact statement is about the mirror image of the sky.
    # Read with the other convention and mirrored in longitude (phi -> -phi, the parity image), TB and EB
    # change sign and TT, TE, EE, BB are unchanged (healpy.anafast(pol=True) as the reference spectra;
    # anafast returns TT, EE, BB, TE, EB, TB).
    nside, lmax = 32, 48
    m, _ = _iqu_sky(seed=3, nside=nside, lmax=lmax)
    m = _rotate_polarization(m, np.radians(10.0))
    path = tmp_path / "iau.fits"
    maps.write_iqu(path, m, polarization_convention="iau")
    right, _ = maps.read_iqu(path)
    wrong, _ = maps.read_iqu(path, polarization_convention="healpix")
    theta, phi = hp.pix2ang(nside, np.arange(12 * nside**2))
    mirror = hp.ang2pix(nside, theta, -phi)  # the HEALPix grid is symmetric under phi -> -phi
    cl_right = hp.anafast(right, lmax=lmax, pol=True)
    cl_wrong_mirrored = hp.anafast(wrong[:, mirror], lmax=lmax, pol=True)
    ell = slice(2, lmax + 1)
    for k in (4, 5):  # EB, TB: non-zero, of opposite sign
        assert np.all(np.abs(cl_right[k][ell]) > 0)
        np.testing.assert_allclose(cl_wrong_mirrored[k][ell], -cl_right[k][ell], rtol=1e-9,
                                   atol=1e-9 * np.abs(cl_right[k][ell]).max())
    for k in (0, 1, 2, 3):
        np.testing.assert_allclose(cl_wrong_mirrored[k][ell], cl_right[k][ell], rtol=1e-9,
                                   atol=1e-9 * np.abs(cl_right[k][ell]).max())
    # without the mirror, the wrongly read map has E and B mixed: EE off by more than 20 % at several ell
    cl_wrong = hp.anafast(wrong, lmax=lmax, pol=True)
    assert np.sum(np.abs(cl_wrong[1][ell] / cl_right[1][ell] - 1.0) > 0.2) >= 10
    np.testing.assert_allclose(cl_wrong[0], cl_right[0], rtol=1e-12)


# ---------------------------------------------------------------- masks


def test_mask_pair(tmp_path):
    w = maps.cap_mask(NSIDE, 10.0, 20.0, 60.0)
    wp = maps.cap_mask(NSIDE, 10.0, 20.0, 40.0)
    path = tmp_path / "masks.fits"
    maps.write_mask_pair(path, w, wp)
    a, b = maps.read_mask_pair(path)
    np.testing.assert_array_equal(a, w)
    np.testing.assert_array_equal(b, wp)
    np.testing.assert_array_equal(maps.read_mask(path), w)  # the first column is the temperature mask
    single = tmp_path / "single.fits"
    maps.write_mask(single, w)
    a, b = maps.read_mask_pair(single)
    np.testing.assert_array_equal(b, w)
    other = tmp_path / "pol.fits"
    maps.write_mask(other, wp)
    np.testing.assert_array_equal(maps.read_mask_pair(single, pol_path=other)[1], wp)
    maps.write_mask(tmp_path / "coarse.fits", maps.cap_mask(8, 10.0, 20.0, 40.0))
    with pytest.raises(InputFileError, match="has nside 8 but the temperature mask"):
        maps.read_mask_pair(single, pol_path=tmp_path / "coarse.fits")
    with pytest.raises(InvalidInputError, match="must have values in"):
        maps.write_mask_pair(tmp_path / "bad.fits", w, wp * 2)
    assert not (tmp_path / "bad.fits").exists()


# ---------------------------------------------------------------- rotation and smoothing


def test_rotation_of_a_pure_e_sky_keeps_its_spectra():
    # band-limited pure-E sky; rotating galactic -> equatorial: EE unchanged, BB stays zero (healpy.anafast)
    nside, lmax = 32, 40
    m, _ = _iqu_sky(seed=5, nside=nside, lmax=lmax, bb=0.0)
    rot = maps.rotate_iqu(m, "G", "C", lmax=lmax, nthreads=1)
    cl0 = hp.anafast(m, lmax=lmax, pol=True, iter=3)
    cl1 = hp.anafast(rot, lmax=lmax, pol=True, iter=3)
    ell = slice(2, lmax + 1)
    np.testing.assert_allclose(cl1[1][ell], cl0[1][ell], rtol=1e-6)  # EE
    np.testing.assert_allclose(cl1[0][ell], cl0[0][ell], rtol=1e-6)  # TT
    np.testing.assert_allclose(cl1[3][ell], cl0[3][ell], rtol=1e-5, atol=1e-6 * cl0[0][ell].max())  # TE
    assert np.max(cl1[2][ell] / cl0[1][ell]) < 1e-10  # BB / EE
    assert not np.allclose(rot[1], m[1], atol=0.1 * np.std(m[1]))  # it did rotate
    back = maps.rotate_iqu(rot, "C", "G", lmax=lmax, nthreads=1)
    # identity up to the HEALPix quadrature error of two analyses with 3 refinement steps (~1e-6 here)
    np.testing.assert_allclose(back, m, rtol=0, atol=1e-5 * np.abs(m).max())


def test_rotation_turns_the_polarization_angle_like_the_local_frames():
    # Pixel by pixel: Q + iU at an output pixel equals Q + iU of the input field at the rotated-back position,
    # turned by twice the angle between the two local meridians (healpy.Rotator.angle_ref gives that angle).
    nside, lmax = 64, 12  # a smooth field: values at pixel centres interpolate well
    m, alm = _iqu_sky(seed=7, nside=nside, lmax=lmax)
    out = maps.rotate_iqu(m, "G", "E", lmax=lmax, nthreads=1)
    r = hp.Rotator(coord=["E", "G"])  # output positions -> input positions
    theta, phi = hp.pix2ang(nside, np.arange(0, 12 * nside**2, 97))
    th_in, ph_in = r(theta, phi)
    # the input field evaluated exactly at the rotated-back positions
    qu = _evaluate_spin2(alm[1], alm[2], lmax, th_in, ph_in)
    psi = r.angle_ref(theta, phi)
    p_out = out[1, np.arange(0, 12 * nside**2, 97)] + 1j * out[2, np.arange(0, 12 * nside**2, 97)]
    best = None
    for sign in (1.0, -1.0):
        err = np.abs(p_out - (qu[0] + 1j * qu[1]) * np.exp(2j * sign * psi)).max()
        best = err if best is None else min(best, err)
    assert best < 1e-6 * np.abs(qu[0] + 1j * qu[1]).max()


def _evaluate_spin2(alm_e, alm_b, lmax, theta, phi):
    """Q, U of E/B coefficients at arbitrary points (ducc0's general synthesis; healpy sign convention)."""
    import ducc0

    loc = np.stack([theta, np.mod(phi, 2 * np.pi)], axis=1)
    out = ducc0.sht.experimental.synthesis_general(
        alm=np.stack([alm_e, alm_b]).astype(np.complex128), spin=2, lmax=lmax, loc=loc, epsilon=1e-12, nthreads=1
    )
    return out


def test_smoothing_per_field_matches_healpy():
    nside, lmax = 32, 64
    m, _ = _iqu_sky(seed=9, nside=nside, lmax=lmax)
    out = maps.smooth_iqu(m, fwhm_arcmin=(120.0, 240.0), lmax=lmax, nthreads=1)
    t = hp.smoothing(m, fwhm=np.radians(2.0), lmax=lmax, pol=True, iter=3)
    p = hp.smoothing(m, fwhm=np.radians(4.0), lmax=lmax, pol=True, iter=3)
    scale = np.abs(m).max()
    np.testing.assert_allclose(out[0], t[0], atol=1e-5 * scale)
    np.testing.assert_allclose(out[1:], p[1:], atol=1e-5 * scale)
    from cmbtools.spectrum.beams import gaussian_beam, gaussian_polarized_beam

    b = (gaussian_beam(60.0, lmax), gaussian_polarized_beam(60.0, lmax))
    np.testing.assert_allclose(maps.smooth_iqu(m, beam=b, lmax=lmax, nthreads=1),
                               maps.smooth_iqu(m, fwhm_arcmin=60.0, lmax=lmax, nthreads=1), rtol=1e-12, atol=1e-14 * scale)
    holes = m.copy()
    holes[1, :10] = UNSEEN
    with pytest.raises(InvalidInputError, match="10 missing pixels in Q/U"):
        maps.smooth_iqu(holes, fwhm_arcmin=60.0)
    filled = maps.smooth_iqu(holes, fwhm_arcmin=60.0, fill_missing="zero", nthreads=1)
    assert np.all(filled[1:, :10] == UNSEEN) and np.all(filled[0, :10] != UNSEEN)


def test_polarized_gaussian_beam_matches_healpy():
    # healpy.gauss_beam(pol=True), column 1 (E): the spin-2 Gaussian transfer function
    from cmbtools.spectrum.beams import gaussian_polarized_beam

    for fwhm in (5.0, 25.0, 300.0):
        ours = gaussian_polarized_beam(fwhm, 2000)
        ref = hp.gauss_beam(np.radians(fwhm / 60.0), 2000, pol=True)[:, 1]
        np.testing.assert_allclose(ours[2:], ref[2:], rtol=1e-12, atol=1e-300)
        assert ours[0] == 0.0 and ours[1] == 0.0
