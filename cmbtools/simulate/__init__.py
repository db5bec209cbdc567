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
* :func:`run_simulations`, :func:`validate_estimator`, ... - the Monte Carlo engine;
  :func:`validate_polarized_estimator` (:class:`PolarizedValidationResult`) checks
  the polarized estimator on I, Q, U skies.

The implementation lives in one module per job (``random_streams``, ``skies``,
``noise``, ``theory_spectrum``, ``engine``, ``run_directory``, ``validation``,
``validation_result``, ``polarized_validation``, ``polarized_validation_result``, ...); this package only re-exports their public names.

Examples
--------
>>> import numpy as np
>>> from cmbtools.simulate import gaussian_sky, simulation_rng
>>> cl = np.zeros(48); cl[2:] = 1e-10
>>> m = gaussian_sky(cl, 16, pixel_window=False, rng=simulation_rng(7, 0), nthreads=1)
>>> m.shape
(3072,)
"""

from cmbtools._core.spectrum_tables import read_polarized_spectrum_table, read_spectrum_table, write_spectrum_table
from cmbtools.simulate.engine import SimulationSet, run_simulations
from cmbtools.simulate.noise import NoiseModel, depth_to_white_noise, noise_map, noise_spectrum, white_noise_map
from cmbtools.simulate.polarized_theory import fiducial_spectra, lensing_bb_template
from cmbtools.simulate.random_streams import simulation_rng, simulation_rngs, simulation_seed_sequence
from cmbtools.simulate.polarized_skies import (
    SPECTRUM_NAMES,
    check_spectra,
    gaussian_iqu_alm,
    gaussian_iqu_sky,
    iqu_noise_map,
    polarized_noise_spectra,
)
from cmbtools.simulate.skies import Dipole, dipole_map, gaussian_alm, gaussian_sky
from cmbtools.simulate.theory_spectrum import FIDUCIAL_LMAX_LIMIT, fiducial_cl, fiducial_dl
from cmbtools.simulate.polarized_validation import validate_polarized_estimator
from cmbtools.simulate.polarized_validation_result import PolarizedValidationResult
from cmbtools.simulate.validation import validate_estimator, validate_pipeline
from cmbtools.simulate.validation_result import ValidationResult
from cmbtools.spectrum.transfer import transfer_from_pseudo_spectrum

__all__ = [
    # random streams
    "simulation_seed_sequence",
    "simulation_rng",
    "simulation_rngs",
    # skies
    "gaussian_alm",
    "gaussian_sky",
    "Dipole",
    "dipole_map",
    # polarized skies and noise
    "SPECTRUM_NAMES",
    "check_spectra",
    "gaussian_iqu_alm",
    "gaussian_iqu_sky",
    "iqu_noise_map",
    "polarized_noise_spectra",
    # noise
    "depth_to_white_noise",
    "NoiseModel",
    "noise_map",
    "white_noise_map",
    "noise_spectrum",
    # theory spectrum
    "fiducial_cl",
    "fiducial_dl",
    "FIDUCIAL_LMAX_LIMIT",
    "fiducial_spectra",
    "lensing_bb_template",
    # spectrum tables
    "read_spectrum_table",
    "write_spectrum_table",
    "read_polarized_spectrum_table",
    # Monte Carlo
    "SimulationSet",
    "run_simulations",
    "ValidationResult",
    "validate_estimator",
    "validate_pipeline",
    "PolarizedValidationResult",
    "validate_polarized_estimator",
    "transfer_from_pseudo_spectrum",
]
