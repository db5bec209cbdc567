"""Simulations: Gaussian skies, instrument noise, the built-in fiducial spectrum, spectrum tables, Monte Carlo.

* :func:`gaussian_alm`, :func:`gaussian_sky` - Gaussian CMB skies with beam,
  pixel window (computed by cmbtools, no download), monopole and dipole
  (:class:`Dipole` or a Cartesian vector);
* :class:`NoiseModel`, :func:`noise_map`, :func:`white_noise_map`,
  :func:`noise_spectrum` - white, inhomogeneous (hits map) and correlated
  (1/f knee) noise;
* :func:`simulation_rng` - the random stream of simulation ``i`` of a seeded
  set, independent of the number of workers and of the order of the work;
* :func:`fiducial_cl` - the built-in fiducial temperature spectrum, computed
  from an astropy cosmology and :class:`~cmbtools.physics.CosmologyExtras`;
* :func:`read_spectrum_table`, :func:`write_spectrum_table` - plain-text
  spectrum tables;
* :func:`run_simulations`, :func:`validate_estimator`, ... - the Monte Carlo engine.

The implementation lives in private modules; this module only re-exports
their public names.

Examples
--------
>>> import numpy as np
>>> from cmbtools.simulate import gaussian_sky, simulation_rng
>>> cl = np.zeros(48); cl[2:] = 1e-10
>>> m = gaussian_sky(cl, 16, pixel_window=False, rng=simulation_rng(7, 0), nthreads=1)
>>> m.shape
(3072,)
"""

from __future__ import annotations

from . import _fiducial, _montecarlo, _skies, _spectrum_table
from ._fiducial import *  # noqa: F401,F403
from ._montecarlo import *  # noqa: F401,F403
from ._skies import *  # noqa: F401,F403
from ._spectrum_table import *  # noqa: F401,F403

__all__ = [*_skies.__all__, *_fiducial.__all__, *_spectrum_table.__all__, *_montecarlo.__all__]
