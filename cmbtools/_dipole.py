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

from ._validation import UNSEEN, as_map, check_mask, check_same_nside, missing_pixels
from .exceptions import IllConditionedError, InvalidInputError

__all__ = ["DipoleFit", "fit_monopole_dipole", "remove_monopole_dipole"]

#: Normal matrices with a larger 2-norm condition number are refused: the
#: smallest singular value of the weighted design matrix is then below 1e-6 of
#: the largest, i.e. some combination of monopole and dipole changes the model
#: by less than a millionth of its size and the data cannot pin it down.
MAX_CONDITION = 1e12

_CHUNK = 1 << 20


def _pixel_vectors(nside, pix):
    import healpy as hp

    return np.stack(hp.pix2vec(nside, pix), axis=-1)


@dataclass(frozen=True, eq=False)
class DipoleFit:
    """Monopole and dipole of a map, from :func:`fit_monopole_dipole`.

    Attributes
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
        """The fitted ``monopole + d . n`` as a RING map of ``nside``."""
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
    # the normal matrix of the model (1, n) per unit weight, to judge how well it is constrained
    normal = np.empty((4, 4))
    normal[0, 0] = 1.0
    normal[0, 1:] = normal[1:, 0] = mean_n
    normal[1:, 1:] = cov + np.outer(mean_n, mean_n)
    cond = float(np.linalg.cond(normal))
    if not np.isfinite(cond) or cond > MAX_CONDITION:
        raise IllConditionedError(
            f"The unmasked sky ({used.size} pixels) cannot separate the monopole from the dipole: "
            f"the normal matrix has condition number {cond:.3g} (limit {MAX_CONDITION:.0e}). "
            f"Use a larger sky area or fit the monopole alone.",
            cond,
        )
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
