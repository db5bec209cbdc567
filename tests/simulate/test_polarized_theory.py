"""The built-in polarized fiducial spectra (cmbtools.simulate.fiducial_spectra).

External facts checked (sources beside each check): the Cauchy-Schwarz bound TE^2 <= TT EE of spectra from one
primordial field; the TE anticorrelation at l ~ 50-200 of adiabatic superhorizon modes (Spergel & Zaldarriaga
1997, PRL 79, 2180); the measured EE and TE peak positions (from memory); the tensor BB shape (peak near l ~ 80,
Pritchard & Kamionkowski 2005, Ann. Phys. 318, 2).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from cmbtools import simulate
from cmbtools.exceptions import InvalidInputError


@pytest.fixture(scope="module")
def spectra():
    return simulate.fiducial_spectra(1200, tensor_ratio=0.1)


def _dl(cl):
    ell = np.arange(cl.size)
    return ell * (ell + 1) * cl / (2 * math.pi) * 1e12


def test_temperature_is_the_fiducial_temperature_spectrum(spectra):
    np.testing.assert_array_equal(spectra["TT"], simulate.fiducial_cl(1200))
    assert np.all(spectra["TB"] == 0) and np.all(spectra["EB"] == 0)


def test_te_obeys_cauchy_schwarz_and_has_the_adiabatic_sign_pattern(spectra):
    tt, ee, te = spectra["TT"][2:], spectra["EE"][2:], spectra["TE"][2:]
    assert np.all(te**2 <= tt * ee * (1 + 1e-9))  # one primordial field: |TE| <= sqrt(TT EE)
    d = _dl(spectra["TE"])
    # Spergel & Zaldarriaga 1997: TE < 0 between l ~ 50 and 200; then positive near l ~ 300 (from memory)
    assert d[150] < -20 and d[300] > 50 and d[470] < -50


def test_ee_peak_positions(spectra):
    d = _dl(spectra["EE"])
    # measured EE peaks near l ~ 140, 400, 690, 1000 (from memory); the model's within 6 %
    for lo, hi, expected in ((100, 200, 140), (300, 500, 400), (600, 800, 690), (900, 1150, 1000)):
        peak = lo + int(np.argmax(d[lo:hi]))
        assert abs(peak / expected - 1) < 0.06, (expected, peak)
    assert 10 < d[405] < 40  # about 20 uK^2 measured (from memory)


def test_tensor_b_modes_scale_with_r_and_peak_at_the_recombination_bump(spectra):
    bb = _dl(spectra["BB"])
    peak = int(np.argmax(bb[:400]))
    assert 60 <= peak <= 110
    half = simulate.fiducial_spectra(400, tensor_ratio=0.05)["BB"]
    # C^BB is proportional to r (the tilt n_t = -r/8 changes it by under 1 % here)
    np.testing.assert_allclose(spectra["BB"][2:300] / half[2:300], 2.0, rtol=0.02)
    none = simulate.fiducial_spectra(400)
    assert np.all(none["BB"] == 0)
    with_lensing = simulate.fiducial_spectra(400, lensing_bb=True)
    np.testing.assert_allclose(with_lensing["BB"], simulate.lensing_bb_template(400), rtol=1e-14)
    # (5 uK-arcmin)^2 in K^2 on large scales (common practice, from memory)
    assert simulate.lensing_bb_template(10)[2] == pytest.approx((5e-6 * math.pi / 10800) ** 2, rel=1e-5)
    with pytest.raises(InvalidInputError, match="'tensor_ratio'"):
        simulate.fiducial_spectra(100, tensor_ratio=-1)
    # the spectra are a valid input of the polarized simulations and tables
    simulate.check_spectra(with_lensing)
