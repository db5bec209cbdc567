"""Fitting and removing the monopole and dipole of a (masked) map.

The model is ``T(n) = a + d . n`` with ``n`` the unit vector of a pixel
centre.  The four parameters come from weighted least squares over the pixels
that have mask weight > 0 and are not missing; the weight of a pixel is its
mask value.  The normal equations are accumulated in chunks of pixels (so
memory stays small at high nside), with the directions centred on their
weighted mean so that small patches keep full precision; the condition
number of the 4x4 normal matrix tells whether the kept sky constrains all
four parameters.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from cmbtools._core.checks import UNSEEN, as_map, check_mask, check_same_nside, missing_pixels
from cmbtools.exceptions import IllConditionedError, InvalidInputError

__all__ = ["DipoleFit", "fit_monopole_dipole", "remove_monopole_dipole"]

#: Normal matrices with a larger 2-norm condition number are refused: the
#: smallest singular value of the weighted design matrix is then below 1e-6 of
#: the largest, i.e. some combination of monopole and dipole changes the model
#: by less than a millionth of its size and the data cannot pin it down.
MAX_CONDITION = 1e12

_CHUNK = 1 << 20
_MODEL_BLOCK = 1 << 22


def _pixel_vectors(nside, pix):
    import healpy as hp

    return np.stack(hp.pix2vec(nside, pix), axis=-1)


@dataclass(frozen=True, eq=False)
class DipoleFit:
    """Monopole and dipole of a map, from :func:`fit_monopole_dipole`.

    Parameters
    ----------
    monopole : float
        The constant term, in the map's unit (K_CMB).
    dipole_vector : ndarray of shape (3,)
        ``d`` in ``T(n) = monopole + d . n`` (Cartesian, in the map's coordinate system).
    amplitude : float
        ``|d|``, the dipole's peak value.
    lon_deg, lat_deg : float
        Direction of ``d`` (longitude in [0, 360), latitude in [-90, 90]) in
        the map's coordinate system; NaN when the amplitude is exactly zero.
    n_pixels_used : int
        Pixels with weight > 0 that are not missing.
    condition_number : float
        2-norm condition number of the 4x4 normal matrix.
    """

    monopole: float
    dipole_vector: np.ndarray
    amplitude: float
    lon_deg: float
    lat_deg: float
    n_pixels_used: int = 0
    condition_number: float = 1.0

    def __post_init__(self):
        v = np.array(self.dipole_vector, dtype=np.float64)
        if v.shape != (3,):
            raise InvalidInputError(f"DipoleFit.dipole_vector must have shape (3,), got {v.shape}")
        v.setflags(write=False)
        object.__setattr__(self, "dipole_vector", v)

    def evaluate(self, nside):
        """The fitted ``monopole + d . n`` as a RING map of ``nside``.

        Parameters
        ----------
        nside : int
            Resolution of the map.

        Returns
        -------
        ndarray of shape (12*nside**2,)
            The model in the map's unit (K_CMB), RING ordering.
        """
        npix = 12 * int(nside) ** 2
        out = np.empty(npix)
        for start in range(0, npix, _CHUNK):
            pix = np.arange(start, min(start + _CHUNK, npix))
            out[pix] = self.monopole + _pixel_vectors(nside, pix) @ self.dipole_vector
        return out


def _used_weights(m, mask):
    """Weights of the pixels that take part in the fit (0 for missing pixels)."""
    if mask is None:
        w = np.ones(m.size)
    else:
        w = check_mask(mask, "mask").copy()
        check_same_nside(m, w, "map", "mask")
    w[missing_pixels(m)] = 0.0
    return w


def _condition_of_fit(mean_n, cov, n_pixels):
    """Condition number of the normal matrix of the model (1, n) per unit weight; refuse it above MAX_CONDITION."""
    normal = np.empty((4, 4))
    normal[0, 0] = 1.0
    normal[0, 1:] = normal[1:, 0] = mean_n
    normal[1:, 1:] = cov + np.outer(mean_n, mean_n)
    cond = float(np.linalg.cond(normal))
    if not np.isfinite(cond) or cond > MAX_CONDITION:
        raise IllConditionedError(
            f"The unmasked sky ({n_pixels} pixels) cannot separate the monopole from the dipole: "
            f"the normal matrix has condition number {cond:.3g} (limit {MAX_CONDITION:.0e}). "
            f"Use a larger sky area or fit the monopole alone.",
            cond,
        )
    return cond


def fit_monopole_dipole(m, mask=None):
    """Weighted least-squares monopole and dipole of a map over its unmasked pixels.

    Parameters
    ----------
    m : array_like of shape (12*nside**2,)
        RING map (K_CMB); missing pixels are left out automatically.
    mask : array_like of shape (12*nside**2,), optional
        Weights in [0, 1]; pixels with weight 0 are left out, the others
        weigh by their value.  Default: every valid pixel with weight 1.

    Returns
    -------
    DipoleFit
        Monopole, dipole vector, amplitude and direction (degrees, in the
        map's coordinate system).

    Raises
    ------
    IllConditionedError
        If fewer than 4 pixels are usable, or the kept sky is too small or
        too degenerate to separate monopole and dipole (condition number of
        the normal matrix above 1e12).
    InvalidInputError, ResolutionMismatchError
        For malformed maps or masks.
    """
    import healpy as hp

    a = as_map(m, "map")
    nside = int(round(np.sqrt(a.size / 12)))
    w = _used_weights(a, mask)
    used = np.flatnonzero(w > 0)
    if used.size < 4:
        raise IllConditionedError(
            f"Only {used.size} pixels are unmasked and valid; a monopole and dipole fit needs at least 4.",
            np.inf,
        )
    # Two passes over the pixels: weighted means first, then centred second moments.  Solving
    # for the dipole with centred directions keeps full precision even on small patches, where
    # the monopole and the dipole component along the patch axis are nearly degenerate.
    total = 0.0
    sum_n = np.zeros(3)
    sum_m = 0.0
    for start in range(0, used.size, _CHUNK):
        pix = used[start:start + _CHUNK]
        total += float(w[pix].sum())
        sum_n += w[pix] @ _pixel_vectors(nside, pix)
        sum_m += float(w[pix] @ a[pix])
    mean_n, mean_m = sum_n / total, sum_m / total
    cov = np.zeros((3, 3))
    cross = np.zeros(3)
    for start in range(0, used.size, _CHUNK):
        pix = used[start:start + _CHUNK]
        dn = _pixel_vectors(nside, pix) - mean_n
        wdn = dn * w[pix, None]
        cov += wdn.T @ dn
        cross += wdn.T @ (a[pix] - mean_m)
    cov /= total
    cross /= total
    cond = _condition_of_fit(mean_n, cov, used.size)
    d = np.linalg.solve(cov, cross)
    sol = np.concatenate([[mean_m - float(d @ mean_n)], d])
    d = sol[1:]
    amp = float(np.linalg.norm(d))
    if amp > 0:
        lon, lat = hp.vec2ang(d / amp, lonlat=True)
        lon, lat = float(lon[0]) % 360.0, float(lat[0])
    else:
        lon = lat = float("nan")
    return DipoleFit(
        monopole=float(sol[0]), dipole_vector=d, amplitude=amp, lon_deg=lon, lat_deg=lat,
        n_pixels_used=int(used.size), condition_number=cond,
    )


def remove_monopole_dipole(m, mask=None):
    """Subtract the fitted monopole and dipole from every valid pixel of a map.

    The fit uses only the unmasked valid pixels (see
    :func:`fit_monopole_dipole`); the subtraction applies to the whole map.
    The input is not modified; missing pixels stay UNSEEN.

    Parameters
    ----------
    m : array_like of shape (12*nside**2,)
        RING map in K_CMB; missing pixels (UNSEEN, NaN, inf) take no part.
    mask : array_like of shape (12*nside**2,), optional
        Weights in [0, 1] of the fit (default: every valid pixel, weight 1).

    Returns
    -------
    clean : ndarray of shape (12*nside**2,)
        A new float64 map.
    fit : DipoleFit
        What was removed.
    """
    a = as_map(m, "map")
    fit = fit_monopole_dipole(a, mask)
    nside = int(round(np.sqrt(a.size / 12)))
    bad = missing_pixels(a)
    clean = a - fit.evaluate(nside)
    clean[bad] = UNSEEN
    return clean, fit


# ----------------------------------------------------------------------------- fast path for full-sky RING maps

# Pixel sums of products of (1, x, y, z) from the adjoint transform at lmax 2, which is exactly
# A_lm = sum_p g_p Y*_lm(n_p) (no quadrature weights).  With healpy's Y_lm conventions:
#   Y00 = 1/sqrt(4 pi); Y10 = sqrt(3/4pi) z; Y11 = -sqrt(3/8pi) (x + iy)
#   Y20 = sqrt(5/16pi) (3z^2 - 1); Y21 = -sqrt(15/8pi) z (x + iy); Y22 = sqrt(15/32pi) (x + iy)^2
_S0 = np.sqrt(4 * np.pi)
_S10 = np.sqrt(4 * np.pi / 3)
_S11 = np.sqrt(8 * np.pi / 3)
_S20 = np.sqrt(16 * np.pi / 5)
_S21 = np.sqrt(8 * np.pi / 15)
_S22 = np.sqrt(32 * np.pi / 15)

#: Smallest eigenvalue of the weighted covariance of pixel directions for the harmonic path.  Below
#: it (caps narrower than about 5 degrees) the harmonic sums would lose more than ~1e-11 of the
#: result to cancellation, and the centred pixel sums of :func:`fit_monopole_dipole` are used.
_SMALL_PATCH_SPREAD = 1e-6


def _harmonic_sums(g, lmax, nthreads, rings=None):
    """Coefficients ``sum_p g_p Y*_lm(n_p)`` up to ``lmax`` (healpy's layout) of a RING map (``rings``: the non-zero ones)."""
    from cmbtools._core import sht as _sht

    return _sht.adjoint_sums(g, lmax, nthreads=nthreads, rings=rings)


def _first_moments(a):
    """``(sum g, sum g x, sum g y, sum g z)`` from the lmax >= 1 sums ``a`` (layout: a00, a10, [a20], a11, ...)."""
    lmax = int(round((np.sqrt(8 * a.size + 1) - 3) / 2))
    a00, a10, a11 = a[0].real, a[1].real, a[lmax + 1]
    return np.array([_S0 * a00, -_S11 * a11.real, _S11 * a11.imag, _S10 * a10])


def _second_moments(a):
    """3x3 ``sum g n n^T`` from the lmax-2 sums ``a`` of a map g."""
    # layout for lmax 2: a00 a10 a20 | a11 a21 | a22
    total = _S0 * a[0].real
    zz = (_S20 * a[2].real + total) / 3.0
    zx, zy = -_S21 * a[4].real, _S21 * a[4].imag
    xx_minus_yy, xy = _S22 * a[5].real, -0.5 * _S22 * a[5].imag
    xx = 0.5 * (total - zz + xx_minus_yy)
    yy = 0.5 * (total - zz - xx_minus_yy)
    return np.array([[xx, xy, zx], [xy, yy, zy], [zx, zy, zz]])


def weight_sums(w, *, nthreads=None, rings=None):
    """The lmax-2 harmonic sums of a weight map that :func:`masked_without_monopole_dipole` needs (reusable).

    ``rings`` (:func:`cmbtools._core.sht.occupied_rings` of ``w``) skips the rings where ``w`` is zero.
    """
    from cmbtools._core.checks import resolve_nthreads

    return _harmonic_sums(np.asarray(w, dtype=np.float64), 2, resolve_nthreads(nthreads), rings)


def _ring_runs(n_rings, rings):
    """``(first, stop)`` of every run of consecutive rings marked in ``rings`` (all rings when None)."""
    if rings is None:
        return [(0, n_rings)]
    marked = np.concatenate([[0], np.asarray(rings, dtype=np.int8), [0]])
    edges = np.flatnonzero(np.diff(marked))
    return list(zip(edges[0::2].tolist(), edges[1::2].tolist()))


def masked_without_monopole_dipole(m, w, *, nthreads=None, sums_of_weights=None, rings=None, by_rings=False):
    """``w * (m - a - d . n)`` for a full RING map ``m`` and weights ``w``, by two harmonic sums.

    The same weighted least-squares fit as :func:`fit_monopole_dipole` with
    weights ``w`` (every pixel of ``m`` must be finite; pixels with ``w = 0``
    do not take part), but the pixel sums of the normal equations come from
    the adjoint spherical-harmonic transform at lmax 2 (which is exactly
    ``sum_p g_p Y*_lm(n_p)``) and the fitted model is synthesized at lmax 1:
    a few passes over the map instead of pixel-centre vectors for every
    pixel.  This is the estimator's path; it returns a new array.
    ``sums_of_weights`` (from :func:`weight_sums` of the same ``w``) saves one
    transform per call; ``rings`` (:func:`cmbtools._core.sht.occupied_rings`
    of ``w``) lets the transforms skip the rings where ``w`` is zero (exact).
    ``by_rings=True`` returns a :class:`cmbtools._core.sht.RingBlocks` instead,
    which makes the same pixels a run of rings at a time (for the split
    transforms of a large map: no second map-sized array).

    Raises
    ------
    IllConditionedError
        Under the same condition as :func:`fit_monopole_dipole`.
    """
    from cmbtools._core import sht as _sht
    from cmbtools._core.checks import resolve_nthreads

    nthreads = resolve_nthreads(nthreads)
    nside = int(round(np.sqrt(m.size / 12)))
    a_w = _harmonic_sums(w, 2, nthreads, rings) if sums_of_weights is None else sums_of_weights
    first = _first_moments(a_w)
    total = first[0]
    mean_n = first[1:] / total if total > 0 else np.zeros(3)
    cov = _second_moments(a_w) / total - np.outer(mean_n, mean_n) if total > 0 else np.zeros((3, 3))
    if not total > 0 or np.linalg.eigvalsh(cov)[0] < _SMALL_PATCH_SPREAD:
        # small patch: the centred sums lose digits to cancellation; take the pixel path
        clean, _ = remove_monopole_dipole(m, w)
        clean *= w
        return clean
    n_used = int(np.count_nonzero(w))
    # centre the map on its weighted mean in pixel space (exact), so that only the fluctuations enter
    # the harmonic sums; the mean is added back to the monopole below
    offset = float(np.dot(w, m)) / total  # (any value near the weighted mean does: it is added back)
    geom = _sht.ring_geometry(nside)
    starts = geom["ringstart"].astype(np.int64)
    n_rings = starts.size
    bounds = np.append(starts, m.size)
    if by_rings:  # the sums of w (m - offset) a run of rings (about _MODEL_BLOCK pixels) at a time
        a_wm = np.zeros(3, dtype=np.complex128)
        for r0, r1 in _model_blocks(bounds, n_rings, rings):
            p0, p1 = int(bounds[r0]), int(bounds[r1])
            seg = m[p0:p1] - offset
            seg *= w[p0:p1]
            a_wm += _ring_sums(seg, nside, r0, r1, nthreads)
    else:
        wm = m - offset
        wm *= w
        a_wm = _harmonic_sums(wm, 1, nthreads, rings)
    sums_m = _first_moments(a_wm)
    mean_m = sums_m[0] / total
    cross = sums_m[1:] / total - mean_n * mean_m
    _condition_of_fit(mean_n, cov, n_used)
    d = np.linalg.solve(cov, cross)
    mono = mean_m - float(d @ mean_n)
    # the model a + d.n as coefficients up to lmax 1 (layout a00, a10, a11)
    alm = np.zeros((1, 3), dtype=np.complex128)
    alm[0, 0] = mono * _S0
    alm[0, 1] = d[2] * _S10
    alm[0, 2] = (-d[0] + 1j * d[1]) * (0.5 * _S11)  # a_11 Y_11 + a_1-1 Y_1-1 = dx x + dy y

    def without_model(seg, r0, r1):  # w (m - offset) on rings r0..r1-1, minus w times the model there
        p0, p1 = int(bounds[r0]), int(bounds[r1])
        block = _sht.synthesis_on_rings(alm, 1, nside, r0, r1, nthreads=nthreads)
        block *= w[p0:p1]
        seg -= block

    if by_rings:
        def values(r0, r1):
            p0, p1 = int(bounds[r0]), int(bounds[r1])
            seg = m[p0:p1] - offset
            seg *= w[p0:p1]
            for c0, c1 in _model_blocks(bounds, r1 - r0, None, r0):
                q0, q1 = int(bounds[c0]) - p0, int(bounds[c1]) - p0
                without_model(seg[q0:q1], c0, c1)
            return seg

        return _sht.RingBlocks(nside, values)
    # synthesize the model ring block by ring block (about 2**22 pixels, 32 MB, each: fewer calls cost
    # less) and subtract it in place, so that no second map-sized array is alive
    for r0, r1 in _model_blocks(bounds, n_rings, rings):  # (wm is 0 on the rings where w is)
        p0, p1 = int(bounds[r0]), int(bounds[r1])
        without_model(wm[p0:p1], r0, r1)
    return wm


def _model_blocks(bounds, n_rings, rings, first_ring=0):
    """Runs of rings ``(r0, r1)`` of about :data:`_MODEL_BLOCK` pixels each over the marked rings."""
    for first, stop in _ring_runs(n_rings, rings):
        r0, stop = first + first_ring, stop + first_ring
        while r0 < stop:
            r1 = int(np.searchsorted(bounds, bounds[r0] + _MODEL_BLOCK, side="right")) - 1
            r1 = min(stop, max(r1, r0 + 1))
            yield r0, r1
            r0 = r1


def _ring_sums(seg, nside, r0, r1, nthreads):
    """Harmonic sums up to lmax 1 (layout a00, a10, a11) of the pixels ``seg`` of rings ``r0 .. r1-1``."""
    import ducc0

    from cmbtools._core import sht as _sht

    geom = _sht.ring_geometry(nside)
    return ducc0.sht.experimental.adjoint_synthesis(
        map=seg.reshape(1, -1), lmax=1, spin=0, nthreads=nthreads, theta=geom["theta"][r0:r1],
        phi0=geom["phi0"][r0:r1], nphi=geom["nphi"][r0:r1],
        ringstart=(geom["ringstart"][r0:r1] - geom["ringstart"][r0]),
    )[0]


# ----------------------------------------------------------------------------- removal in harmonic space
# For an estimator applied to many maps (a Monte Carlo run): the coefficients of w (a + d . n) are
# a A_w + d . A_wn, with A_w, A_wx, A_wy, A_wz the coefficients of the weight map times 1, x, y, z,
# computed once.  The fit's pixel sums sum_p w m (1, x, y, z) are the l <= 1 coefficients of the
# masked map's own transform.  So one transform of w m gives both the fit and, after subtracting
# the fitted combination of the four stored transforms, the coefficients of w (m - a - d . n): no
# low-multipole transforms and no pixel passes per map.  Equal to masked_without_monopole_dipole
# followed by the transform, to rounding.


def removal_coefficients(w, lmax, *, nthreads=None, rings=None) -> np.ndarray:
    """Coefficients (plain quadrature, ``map2alm``) of ``w``, ``w x``, ``w y``, ``w z`` up to ``lmax``.

    Returns an array of shape ``(4, alm_size(lmax))`` (read-only) for
    :func:`subtract_fitted_coefficients`; ``rings`` as in
    :func:`cmbtools._core.sht.map2alm` (those of ``w``).
    """
    from cmbtools._core import sht as _sht
    from cmbtools._core.checks import resolve_nthreads

    nthreads = resolve_nthreads(nthreads)
    w = np.asarray(w, dtype=np.float64)
    nside = int(round(np.sqrt(w.size / 12)))
    out = np.empty((4, _sht.alm_size(lmax)), dtype=np.complex128)
    out[0] = _sht.map2alm(w, lmax, nthreads=nthreads, rings=rings)
    g = np.empty_like(w)
    for k in range(3):
        for start in range(0, w.size, _CHUNK):
            pix = np.arange(start, min(start + _CHUNK, w.size))
            g[pix] = _pixel_vectors(nside, pix)[:, k] * w[pix]
        out[k + 1] = _sht.map2alm(g, lmax, nthreads=nthreads, rings=rings)
    out.setflags(write=False)
    return out


def harmonic_removal_applies(sums_of_weights) -> bool:
    """Whether the weights spread enough over the sphere for the harmonic path (as in masked_without_monopole_dipole)."""
    first = _first_moments(sums_of_weights)
    total = first[0]
    if not total > 0:
        return False
    mean_n = first[1:] / total
    cov = _second_moments(sums_of_weights) / total - np.outer(mean_n, mean_n)
    return bool(np.linalg.eigvalsh(cov)[0] >= _SMALL_PATCH_SPREAD)


def subtract_fitted_coefficients(alm, coefficients, sums_of_weights, n_used, npix) -> np.ndarray:
    """In place: coefficients of ``w m`` (from ``map2alm``) become those of ``w (m - a - d . n)``.

    ``a`` and ``d`` are the weighted least-squares fit of
    :func:`fit_monopole_dipole` (weights ``w``), from the l <= 1 coefficients
    of ``alm`` itself and the lmax-2 sums of the weights (:func:`weight_sums`);
    ``coefficients`` from :func:`removal_coefficients` of the same ``w`` and
    lmax; ``n_used`` the number of pixels with ``w > 0`` (for the error
    message).  Returns ``alm``.

    Raises
    ------
    IllConditionedError
        Under the same condition as :func:`fit_monopole_dipole`.
    """
    scale = 4.0 * np.pi / npix  # map2alm's pixel area: the sums are alm / scale
    first = _first_moments(sums_of_weights)
    total = first[0]
    mean_n = first[1:] / total
    cov = _second_moments(sums_of_weights) / total - np.outer(mean_n, mean_n)
    sums_m = _first_moments(alm) / scale
    mean_m = sums_m[0] / total
    cross = sums_m[1:] / total - mean_n * mean_m
    _condition_of_fit(mean_n, cov, n_used)
    d = np.linalg.solve(cov, cross)
    mono = mean_m - float(d @ mean_n)
    # real factors, applied to the interleaved real and imaginary parts with plain ufuncs (no BLAS: its
    # threads would compete with the other workers of a Monte Carlo pool)
    flat = alm.view(np.float64)
    tmp = np.empty_like(flat)
    for factor, c in zip((mono, d[0], d[1], d[2]), coefficients):
        np.multiply(c.view(np.float64), factor, out=tmp)
        flat -= tmp
    return alm
