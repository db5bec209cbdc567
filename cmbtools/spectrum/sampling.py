"""How well the HEALPix grid samples a beam-convolved sky: the default top of the bins and the narrow-beam warning.

The estimator is exact in expectation for a sky sampled at the pixel centres
and band-limited where the coupling matrix ends.  Real maps differ near the
grid's limit of 3 nside in three ways, measured with ``cmbtools validate`` on
the demo survey's mask (nside 128, 400 simulations, power to 4 nside - 1):

- the mask leaks the much larger power of lower multipoles into the
  multipoles where the beam has suppressed the sky's own.  The mean is
  modelled (the coupling) but the scatter is not: the Gaussian covariance's
  narrow-kernel approximation treats the leaked power as if it were the local
  sky's (the same shortfall against the exact covariance with and without the
  HEALPix grid, nside 16 and 32), so it is too small there, by factors growing with
  ``l / nside`` and with the beam's suppression ``B_l^2`` (scatter / error
  1.02 at 2.5 nside and 1.45 at 2.7 nside for a 60 arcmin beam, 1.09 at
  2 nside and 1.64 at 2.2 nside for 90 arcmin, without noise);
- the power of the sky above 3 nside aliases into the map: a beam narrower
  than about two pixels leaves too much of it;
- averaging the sky over pixels is not exactly the isotropic pixel window: the
  pixels under a mask have their own shapes (-0.4 to -1.2 % from 1 to 2.5 nside
  on the demo's south cap, up to +1 % on an equatorial band; corrected by the
  estimator's ``averaged_pixels``; see the README's Cautions).

The default bins (:func:`default_bins_lmax`) therefore end at
``min(lmax, 2.5 nside, the last l with B_l^2 >= 1e-3)``, and at 2 nside when
the beam is narrower than two pixels (or absent), which
:func:`narrow_beam_message` describes with the fraction of the sky's power
that the beam keeps at 3 nside (a beam of two pixels keeps 1.1e-3 of it).
"""

from __future__ import annotations

import math

import numpy as np

from cmbtools._core.checks import check_nside

__all__ = ["default_bins_lmax", "default_binning", "narrow_beam_message", "pixel_size_arcmin", "GRID_TOP", "BEAM_FLOOR"]

#: The default bins end at this many times nside at most (the grid's quadrature is exact enough below).
GRID_TOP = 2.5
#: ... and where the beam keeps at least this fraction B_l^2 of the sky's power.
BEAM_FLOOR = 1e-3
#: A beam narrower than this many pixels (FWHM) undersamples the sky.
NARROW_BEAM_PIXELS = 2.0
#: ... and then the default bins end at this many times nside.
NARROW_BEAM_TOP = 2.0


def pixel_size_arcmin(nside) -> float:
    """Side of a HEALPix pixel, the square root of its area, in arcmin (27.5 at nside 128)."""
    nside = check_nside(nside)
    return math.degrees(math.sqrt(4.0 * math.pi / (12 * nside * nside))) * 60.0


def _beam_squared(beam, lmax):
    """B_l^2 / B_0^2 for l = 0..lmax from None, a FWHM in arcmin, a GaussianBeam or an array (held at its last value)."""
    from cmbtools.spectrum.beams import GaussianBeam, gaussian_beam

    if beam is None:
        return None
    if isinstance(beam, GaussianBeam):
        beam = beam.fwhm_arcmin
    if np.ndim(beam) == 0:
        return gaussian_beam(float(beam), lmax) ** 2
    b = np.asarray(beam, dtype=np.float64)
    out = np.full(lmax + 1, b[-1] if b.size else 1.0)
    k = min(b.size, lmax + 1)
    out[:k] = b[:k]
    ref = out[0] if out[0] != 0 else (np.max(np.abs(out)) or 1.0)
    return (out / ref) ** 2


def _kept_at_grid_limit(nside, beam):
    """B^2 at l = 3 nside (1 without a beam), and the same for a Gaussian beam of two pixels."""
    from cmbtools.spectrum.beams import gaussian_beam

    l3 = 3 * nside
    two_pixels = float(gaussian_beam(NARROW_BEAM_PIXELS * pixel_size_arcmin(nside), l3)[l3] ** 2)
    b2 = _beam_squared(beam, l3)
    return (1.0 if b2 is None else float(b2[l3])), two_pixels


def narrow_beam_message(nside, beam) -> str | None:
    """One line saying that the beam undersamples the grid, with the expected aliasing; None for a wide enough beam.

    Parameters
    ----------
    nside : int
        Resolution of the map.
    beam : float, GaussianBeam, array_like or None
        FWHM in arcmin, a Gaussian beam, or B_l from l = 0 (None: no beam).

    Returns
    -------
    str or None
    """
    nside = check_nside(nside)
    kept, two = _kept_at_grid_limit(nside, beam)
    if kept <= two * (1.0 + 1e-9):  # a beam of exactly two pixels is well sampled
        return None
    what = "no beam" if beam is None else "a beam narrower than two pixels"
    return (
        f"{what} ({pixel_size_arcmin(nside):.1f} arcmin at nside {nside}): the map keeps {kept:.2g} of the sky's "
        f"power at l = 3*nside (a beam of two pixels keeps {two:.1g}), which aliases into the top bins; the default "
        f"bins end at 2*nside = {int(NARROW_BEAM_TOP * nside)}"
    )


def default_bins_lmax(nside, beam=None, lmax=None) -> int:
    """Largest multipole of the default bins: where the grid and the beam keep the estimator exact enough.

    ``min(lmax, floor(2.5 nside), the last l with B_l^2 / B_0^2 >= 1e-3)``;
    ``min(lmax, 2 nside)`` when the beam is narrower than two pixels or absent
    (see the module notes for the measurements behind these numbers).

    Parameters
    ----------
    nside : int
        Resolution of the map.
    beam : float, GaussianBeam, array_like or None
        FWHM in arcmin, a Gaussian beam, or B_l from l = 0 (None: no beam).
    lmax : int, optional
        Largest multipole of the transforms (default ``3 nside - 1``).

    Returns
    -------
    int

    Examples
    --------
    >>> default_bins_lmax(128, 60.0)       # the demo survey: 2.5 nside
    320
    >>> default_bins_lmax(128, 90.0)       # a wide beam: where B_l^2 falls to 1e-3
    235
    >>> default_bins_lmax(128, 25.0)       # narrower than two pixels: 2 nside
    256
    """
    nside = check_nside(nside)
    lmax = 3 * nside - 1 if lmax is None else int(lmax)
    kept, two = _kept_at_grid_limit(nside, beam)
    if kept > two * (1.0 + 1e-9):
        return int(min(lmax, NARROW_BEAM_TOP * nside))
    top = min(lmax, int(math.floor(GRID_TOP * nside)))
    b2 = _beam_squared(beam, top)
    below = np.nonzero(b2[: top + 1] < BEAM_FLOOR)[0]
    if below.size:
        top = max(int(below[0]) - 1, 1)
    return int(top)


def default_binning(nside, beam=None, *, width=16, lmin=2, lmax=None, weighting="dl"):
    """Uniform bins of ``width`` multipoles from ``lmin`` to :func:`default_bins_lmax`, with the narrow-beam warning.

    Parameters
    ----------
    nside : int
        Resolution of the map.
    beam : float, GaussianBeam, array_like or None
        FWHM in arcmin, a Gaussian beam, or B_l from l = 0 (None: no beam).
    width : int, default=16
        Multipoles per bin.
    lmin : int, default=2
        First multipole.
    lmax : int, optional
        Largest multipole of the transforms (default ``3 nside - 1``).
    weighting : {'dl', 'cl'}, default='dl'
        What is averaged in each bin.

    Returns
    -------
    Binning

    Warns
    -----
    CmbtoolsWarning
        When the beam is narrower than two pixels or absent (:func:`narrow_beam_message`).

    Examples
    --------
    >>> b = default_binning(128, 60.0, width=24)
    >>> (b.lmin, b.lmax, b.n_bins)
    (2, 320, 13)
    """
    import warnings

    from cmbtools.exceptions import CmbtoolsWarning
    from cmbtools.spectrum.binning import Binning

    message = narrow_beam_message(nside, beam)
    if message is not None:
        warnings.warn(message, CmbtoolsWarning, stacklevel=2)
    return Binning.uniform(lmin, default_bins_lmax(nside, beam, lmax), width, weighting=weighting)
