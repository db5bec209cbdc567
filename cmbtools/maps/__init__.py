"""HEALPix maps and masks: FITS input/output, missing pixels, masks, apodization,
monopole/dipole, coordinate rotation, resolution change and smoothing.

Conventions: maps are float64 RING arrays in K_CMB; missing pixels hold the
UNSEEN sentinel (:data:`UNSEEN`) and every function here
leaves them out of any computation.  Masks are RING arrays of weights in
[0, 1].  Angles given in degrees say so in the argument name.

The implementation lives in one module per job (``fits``: FITS input/output of
maps and masks; ``polarized_fits``: of I, Q, U maps and mask pairs;
``healpix_table``: the HEALPix FITS table under both, units, coordinate names;
``masks``: masks and apodization; ``monopole_dipole``: the monopole/dipole
fit; ``conversions``: rotation, resolution change, smoothing); this package
only re-exports their public names.

Examples
--------
>>> import numpy as np
>>> from cmbtools.maps import cap_mask, mask_moments
>>> w = cap_mask(64, 10.0, 20.0, 60.0)
>>> round(mask_moments(w).f_sky, 2)   # cap area 2 pi (1 - cos 60 deg) / 4 pi = 0.25
0.25
"""

from cmbtools._core.checks import UNSEEN, missing_pixels  # noqa: F401
from cmbtools.maps import conversions as _conversions
from cmbtools.maps import fits as _fits
from cmbtools.maps import healpix_table as _healpix_table
from cmbtools.maps import masks as _masks
from cmbtools.maps import monopole_dipole as _monopole_dipole
from cmbtools.maps import polarized_fits as _polarized_fits
from cmbtools.maps.conversions import *  # noqa: F401,F403
from cmbtools.maps.fits import *  # noqa: F401,F403
from cmbtools.maps.fits import read_map, write_map  # noqa: F401  (deprecated names, kept for one release)
from cmbtools.maps.healpix_table import *  # noqa: F401,F403
from cmbtools.maps.polarized_fits import *  # noqa: F401,F403
from cmbtools.maps.conversions import gaussian_beam_window  # noqa: F401  (deprecated: spectrum.gaussian_beam)
from cmbtools.maps.masks import *  # noqa: F401,F403
from cmbtools.maps.monopole_dipole import *  # noqa: F401,F403

__all__ = [
    "UNSEEN",
    "missing_pixels",
    *_fits.__all__,
    *_healpix_table.__all__,
    *_polarized_fits.__all__,
    *_masks.__all__,
    *_monopole_dipole.__all__,
    *_conversions.__all__,
]
