"""Shared survey set-up of the statistical tests (test_deprojection.py, test_averaged_pixels_default.py,
test_polarized_averaged_pixels.py, test_transfer.py).

* :func:`cos_taper` - a cosine taper from 0 to 1 over ``width`` degrees;
* :func:`cap_with_holes` - a 50-degree cap around galactic (250, -55) with 15 holes of one degree, every edge
  tapered by 3 degrees (like the demo survey's mask), and the pixels' unit vectors.
"""

from __future__ import annotations

import healpy as hp
import numpy as np


def cos_taper(dist_deg, width):
    """0 at distance 0, 1 from ``width`` on (degrees), a half cosine in between."""
    return 0.5 - 0.5 * np.cos(np.pi * np.clip(dist_deg / width, 0.0, 1.0))


def cap_with_holes(nside):
    """(weights, vectors): the tapered cap with 15 tapered one-degree holes (fixed seed), and pix2vec of every pixel."""
    vec = np.array(hp.pix2vec(nside, np.arange(12 * nside**2))).T
    centre = hp.ang2vec(250.0, -55.0, lonlat=True)
    w = cos_taper(50.0 - np.degrees(np.arccos(np.clip(vec @ centre, -1, 1))), 3.0)
    rng = np.random.default_rng(5)
    for _ in range(15):
        while True:
            v = rng.standard_normal(3)
            v /= np.linalg.norm(v)
            if np.degrees(np.arccos(v @ centre)) < 45.0:
                break
        d = np.degrees(np.arccos(np.clip(vec @ v, -1, 1)))
        w *= np.where(d < 1.0, 0.0, cos_taper(d - 1.0, 3.0))
    return w, vec
