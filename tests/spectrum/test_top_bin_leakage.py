"""The temperature estimator's top bins for a sky equal to its guess, with power above the bins.

The binned matrix models the multipoles inside the bins (its in-bin model Q is zero above the last bin), and the
power above them (to ``sky_lmax``) joins its rows as the factor ``1 + leak / (M S_guess)``.  That factor was once
measured against the pseudo-power of every column up to lmax, which counts the columns just above the last bin
twice (in ``M S`` and in the leakage): on the demo survey (nside 128, beam 60 arcmin, bins to 2.5 nside) TT's top
bin came out 0.65 % above the binned input for a sky equal to the guess.  Here the expectation is exact: the
pseudo-spectrum of a sky sampled at the pixel centres is the rectangular coupling of its whole spectrum
(:func:`cmbtools.spectrum.deprojection.above_bins_leakage` from l = 0; checked against simulations in
tests/spectrum/test_deprojection.py), and the estimator's linear map of it must give the binned input.
"""

import numpy as np

from _masks import cap_with_holes
from cmbtools.simulate.theory_spectrum import fiducial_cl
from cmbtools.spectrum import SpectrumEstimator
from cmbtools.spectrum import deprojection as dep
from cmbtools.spectrum.beams import gaussian_beam
from cmbtools.spectrum.pixel_windows import pixel_window
from cmbtools.spectrum.sampling import default_binning, pixel_size_arcmin


def test_guess_sky_gives_the_binned_input_in_every_bin():
    nside = 32
    lmax, sky_lmax = 3 * nside - 1, 4 * nside - 1
    mask, _ = cap_with_holes(nside)
    fwhm = 2.2 * pixel_size_arcmin(nside)  # the demo survey's beam in pixels
    bins = default_binning(nside, fwhm)
    cl = fiducial_cl(sky_lmax)
    est = SpectrumEstimator(mask, bins, beam=fwhm, sky_lmax=sky_lmax, guess_cl=cl, averaged_pixels=False,
                            remove_monopole_dipole=False, nthreads=1)
    signal = cl * gaussian_beam(fwhm, sky_lmax) ** 2 * np.asarray(pixel_window(nside, sky_lmax))[: sky_lmax + 1] ** 2
    pseudo = dep.above_bins_leakage(mask, signal, lmax, 0, nthreads=1)  # E[pseudo-spectrum], every column
    _, _, ainv = est._pair(False)
    got = est._to_cl(ainv @ est._bin_pseudo(pseudo))
    ratio = got / bins.bin_spectrum(cl)
    # measured: within 2e-14 of 1 in every bin (before: the top bin, ell 66-80, 1.00044; the one below 0.99999)
    np.testing.assert_allclose(ratio, 1.0, rtol=0, atol=1e-5)
