"""Angular power spectra of masked HEALPix maps: pseudo-Cl with the MASTER mode-coupling correction.

The workflow is: choose bins (:class:`Binning`), build a
:class:`SpectrumEstimator` from the mask, the bins, the beam(s) and the other
settings (this computes the mode-coupling matrix once), then apply it to any
number of maps with :meth:`SpectrumEstimator.estimate`, which returns
:class:`Bandpowers` (``cl``/``dl`` with Knox errors, optional covariance, and
a record of the inputs that the CSV/FITS writers put in their headers).
:func:`estimate_spectrum` does both steps in one call.

Beams and the pixel window are re-exported here: :func:`gaussian_beam`,
:func:`read_beam`, :func:`write_beam` and :func:`pixel_window` (computed by
cmbtools itself; nothing is downloaded).

Examples
--------
>>> import numpy as np
>>> from cmbtools import _sht
>>> from cmbtools.spectrum import Binning, SpectrumEstimator
>>> nside, lmax = 16, 47
>>> rng = np.random.default_rng(7)
>>> ell = np.arange(lmax + 1)
>>> cl = np.where(ell >= 2, 1e-10 * 10.0 / (ell + 10.0), 0.0)         # K^2
>>> alm = rng.standard_normal(_sht.alm_size(lmax)) + 1j * rng.standard_normal(_sht.alm_size(lmax))
>>> alm *= np.sqrt(cl[_sht.alm_ell(lmax)] / 2); alm[: lmax + 1] = alm[: lmax + 1].real * np.sqrt(2)
>>> sky = _sht.alm2map(alm, nside, lmax, nthreads=1)
>>> mask = np.ones(sky.size); mask[: sky.size // 3] = 0.0              # keep two thirds of the sky
>>> est = SpectrumEstimator(mask, Binning.uniform(lmin=2, lmax=lmax, width=8),
...                         pixel_window=False, nthreads=1)
>>> bp = est.estimate(sky)
>>> bp.ell_min.tolist()
[2, 10, 18, 26, 34, 42]
>>> bool(np.all(np.abs(bp.cl - est.expected_bandpowers(cl)) < 4 * bp.cl_err))
True
"""

from __future__ import annotations

from ._bandpowers import Bandpowers
from ._beams import gaussian_beam, read_beam, write_beam
from ._binning import Binning
from ._estimator import MAX_CONDITION_NUMBER, SpectrumEstimator, estimate_spectrum
from ._pixwin import pixel_window

__all__ = [
    "Binning",
    "SpectrumEstimator",
    "Bandpowers",
    "estimate_spectrum",
    "MAX_CONDITION_NUMBER",
    "gaussian_beam",
    "read_beam",
    "write_beam",
    "pixel_window",
]
