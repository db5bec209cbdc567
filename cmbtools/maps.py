"""HEALPix maps and masks: FITS input/output, missing pixels, masks, apodization,
monopole/dipole, coordinate rotation, resolution change and smoothing.

Conventions: maps are float64 RING arrays in K_CMB; missing pixels hold the
UNSEEN sentinel (``cmbtools._validation.UNSEEN``) and every function here
leaves them out of any computation.  Masks are RING arrays of weights in
[0, 1].  Angles given in degrees say so in the argument name.

The implementation lives in private modules (``_mapio``, ``_masks``,
``_dipole``, ``_maptools``); this module only re-exports their public names.

Examples
--------
>>> import numpy as np
>>> from cmbtools.maps import cap_mask, mask_moments
>>> w = cap_mask(64, 10.0, 20.0, 60.0)
>>> round(mask_moments(w).f_sky, 2)   # cap area 2 pi (1 - cos 60 deg) / 4 pi = 0.25
0.25
"""

from __future__ import annotations

from . import _dipole, _mapio, _maptools, _masks
from ._dipole import *  # noqa: F401,F403
from ._mapio import *  # noqa: F401,F403
from ._maptools import *  # noqa: F401,F403
from ._masks import *  # noqa: F401,F403
from ._validation import UNSEEN, missing_pixels  # noqa: F401

__all__ = [
    "UNSEEN",
    "missing_pixels",
    *_mapio.__all__,
    *_masks.__all__,
    *_dipole.__all__,
    *_maptools.__all__,
]
