"""Angular power spectra of masked HEALPix maps: pseudo-Cl with the MASTER mode-coupling correction.

The data flow: map -> mask -> harmonic coefficients -> pseudo-Cl -> coupling ->
bandpowers.  The workflow is: choose bins (:class:`Binning`), build a
:class:`SpectrumEstimator` from the mask, the bins, the beam(s) and the other
settings (this computes the mode-coupling matrix once), then apply it to any
number of maps with :meth:`SpectrumEstimator.estimate`, which returns
:class:`Bandpowers` (``cl``/``dl`` with Knox errors, optional covariance, and
a record of the inputs that the CSV/FITS writers put in their headers).
:func:`estimate_spectrum` does both steps in one call.  Bandpowers of maps
that went through a processing step the estimator does not model (a filter)
are corrected with the per-bin transfer function a validation run measured:
:class:`BandpowerTransfer` (``BandpowerTransfer.read_csv(path).apply(bp)``).

Beams and the pixel window are re-exported here: :func:`gaussian_beam`,
:func:`read_beam`, :func:`write_beam` and :func:`pixel_window` (computed by
cmbtools itself; nothing is downloaded).

Examples
--------
>>> import numpy as np
>>> from cmbtools.simulate import gaussian_sky
>>> from cmbtools.spectrum import Binning, SpectrumEstimator
>>> nside, lmax = 16, 47
>>> ell = np.arange(lmax + 1)
>>> cl = np.where(ell >= 2, 1e-10 * 10.0 / (ell + 10.0), 0.0)         # K^2
>>> sky = gaussian_sky(cl, nside, lmax=lmax, pixel_window=False, rng=7, nthreads=1)
>>> mask = np.ones(sky.size); mask[: sky.size // 3] = 0.0              # keep two thirds of the sky
>>> est = SpectrumEstimator(mask, Binning.uniform(lmin=2, lmax=lmax, width=8),
...                         pixel_window=False, nthreads=1)
>>> bp = est.estimate(sky)
>>> bp.ell_min.tolist()
[2, 10, 18, 26, 34, 42]
>>> bool(np.all(np.abs(bp.cl - est.expected_bandpowers(cl)) < 4 * bp.cl_err))
True
"""

from cmbtools.spectrum.bandpowers import Bandpowers
from cmbtools.spectrum.beams import GaussianBeam, gaussian_beam, gaussian_polarized_beam, read_beam, write_beam
from cmbtools.spectrum.binning import Binning
from cmbtools.spectrum.bandpower_covariance import (
    BandpowerCovariance,
    hartlap_factor,
    read_covariance,
    simulated_covariance,
    write_covariance,
)
from cmbtools.spectrum.covariance import GaussianCovariance
from cmbtools.spectrum.estimator import MAX_CONDITION_NUMBER, SpectrumEstimator
from cmbtools.spectrum.one_call import estimate_polarized_spectra, estimate_spectrum
from cmbtools.spectrum.pixel_noise import PixelNoise
from cmbtools.spectrum.pixel_windows import pixel_window, polarization_pixel_window
from cmbtools.spectrum.polarization import PolarizedSpectrumEstimator
from cmbtools.spectrum.polarized_bandpowers import SPECTRA, PolarizedBandpowers
from cmbtools.spectrum.sampling import default_binning, default_bins_lmax
from cmbtools.spectrum.transfer import BandpowerTransfer, PolarizedBandpowerTransfer

__all__ = [
    "Binning",
    "default_binning",
    "default_bins_lmax",
    "SpectrumEstimator",
    "Bandpowers",
    "estimate_spectrum",
    "MAX_CONDITION_NUMBER",
    "GaussianBeam",
    "gaussian_beam",
    "read_beam",
    "write_beam",
    "pixel_window",
    "polarization_pixel_window",
    "gaussian_polarized_beam",
    "PixelNoise",
    "GaussianCovariance",
    "BandpowerCovariance",
    "simulated_covariance",
    "hartlap_factor",
    "write_covariance",
    "read_covariance",
    "PolarizedSpectrumEstimator",
    "PolarizedBandpowers",
    "estimate_polarized_spectra",
    "SPECTRA",
    "BandpowerTransfer",
    "PolarizedBandpowerTransfer",
]
