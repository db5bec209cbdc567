"""Tests of blackbody quantities, unit conversions and the kinematic dipole (cmbtools.physics)."""

from __future__ import annotations

import math

import healpy as hp
import numpy as np
import pytest
import scipy.constants as const
import sympy
from astropy import units as u
from astropy.cosmology import Planck18
from astropy.modeling.physical_models import BlackBody
from scipy import integrate, optimize, special

from cmbtools import physics
from cmbtools.exceptions import InputFileError, InvalidInputError

T0 = physics.DEFAULT_CMB_TEMPERATURE_K
RADIANCE_SI = u.W / (u.m**2 * u.Hz * u.sr)
RADIANCE_WAVELENGTH_SI = u.W / (u.m**2 * u.m * u.sr)


# --------------------------------------------------------------------------- temperature


def test_default_temperature_matches_firas():
    # Fixsen 2009 (ApJ 707, 916): T0 = 2.72548 +- 0.00057 K.
    assert abs(T0 - 2.72548) < 0.00057
    # The default is astropy's Planck18.Tcmb0.
    assert T0 == Planck18.Tcmb0.to_value(u.K)


def test_temperature_scales_with_redshift_and_inverts():
    z = np.array([0.0, 1.0, 1089.92, 1.0e4])
    t = physics.cmb_temperature(z)
    np.testing.assert_allclose(t, T0 * (1.0 + z), rtol=1e-15)
    # z* = 1089.92 (Planck 2018 results VI, A&A 641, A6, 2020, table 2) -> about 2973 K.
    assert physics.cmb_temperature(1089.92) == pytest.approx(2973.3, abs=0.1)
    np.testing.assert_allclose(physics.redshift_at_temperature(t), z, rtol=1e-14, atol=1e-14)
    # Quantities at the edges, plain floats out.
    assert physics.cmb_temperature(1.0, t0_k=3.0 * u.K) == pytest.approx(6.0, rel=1e-15)
    assert isinstance(physics.redshift_at_temperature(3000.0 * u.K), float)
    with pytest.raises(InvalidInputError, match="'z'"):
        physics.cmb_temperature(-1.5)
    with pytest.raises(InvalidInputError, match="'t_k'"):
        physics.redshift_at_temperature(-3.0)


def test_anisotropies_are_one_part_in_a_hundred_thousand():
    # Common practice: CMB temperature anisotropies are about 1e-5 of T0 (a ~27 uK rms).
    assert 0.9e-5 < 27e-6 / T0 < 1.1e-5


# --------------------------------------------------------------------------- photons


def _integrate_planck(weight, t_k):
    """int_0^inf weight(nu) B_nu dnu, in x = h nu / k T (scipy quad)."""
    scale = const.k * t_k / const.h

    def f(x):
        nu = x * scale
        return weight(nu) * physics.planck_radiance(nu * 1e-9, t_k) * scale

    value, _ = integrate.quad(f, 0.0, np.inf, epsabs=0.0, epsrel=1e-13, limit=200)
    return value


@pytest.mark.parametrize("t_k", [T0, 10.0, 3000.0])
def test_energy_density_is_integral_of_planck_law(t_k):
    # Stefan-Boltzmann law from Planck's law: u = (4 pi / c) int B_nu dnu = a T^4.
    u_num = 4.0 * math.pi / const.c * _integrate_planck(lambda nu: 1.0, t_k)
    assert physics.photon_energy_density(t_k) == pytest.approx(u_num, rel=1e-8)
    # a = 4 sigma / c with the CODATA Stefan-Boltzmann constant (scipy.constants).
    assert physics.RADIATION_CONSTANT == pytest.approx(4.0 * const.sigma / const.c, rel=1e-12)


@pytest.mark.parametrize("t_k", [T0, 10.0, 3000.0])
def test_number_density_is_integral_of_planck_law(t_k):
    # n = (4 pi / c) int B_nu / (h nu) dnu.
    n_num = 4.0 * math.pi / const.c * _integrate_planck(lambda nu: 1.0 / (const.h * nu), t_k)
    assert physics.photon_number_density(t_k) == pytest.approx(n_num, rel=1e-8)
    mean = physics.mean_photon_energy(t_k)
    assert mean == pytest.approx(physics.photon_energy_density(t_k) / n_num, rel=1e-8)
    # From memory: the mean photon energy is 2.701 k T.
    assert mean / (const.k * t_k) == pytest.approx(2.701, abs=5e-4)


def test_photon_number_density_today():
    # From memory (common practice): about 410.7 CMB photons per cm^3 at T0 = 2.7255 K.
    assert physics.photon_number_density() * 1e-6 == pytest.approx(410.7, abs=0.1)


def test_photon_density_parameter():
    # From memory: Omega_gamma h^2 = 2.47e-5 for T0 = 2.7255 K.
    value = physics.photon_density_parameter_h2()
    assert value == pytest.approx(2.47e-5, rel=2e-3)
    # astropy's own photon density (Planck18.Ogamma0) times h^2.
    assert value == pytest.approx(Planck18.Ogamma0 * Planck18.h**2, rel=1e-8)
    # Scales as T0^4.
    assert physics.photon_density_parameter_h2(2.0 * T0) == pytest.approx(16.0 * value, rel=1e-14)


# --------------------------------------------------------------------------- Planck's law


@pytest.mark.parametrize("t_k", [T0, 30.0, 300.0, 5772.0])
def test_planck_law_matches_astropy_blackbody(t_k):
    nu_ghz = np.geomspace(0.5, 3000.0, 57)
    expected = BlackBody(temperature=t_k * u.K)(nu_ghz * u.GHz).to_value(RADIANCE_SI)
    np.testing.assert_allclose(physics.planck_radiance(nu_ghz, t_k), expected, rtol=1e-10)
    lam_mm = np.geomspace(0.05, 300.0, 53)
    bb_lam = BlackBody(temperature=t_k * u.K, scale=1.0 * RADIANCE_WAVELENGTH_SI)
    expected_lam = bb_lam(lam_mm * u.mm).to_value(RADIANCE_WAVELENGTH_SI)
    np.testing.assert_allclose(physics.planck_radiance_wavelength(lam_mm, t_k), expected_lam, rtol=1e-10)


def test_planck_law_accepts_quantities_and_wavelengths():
    b = physics.planck_radiance(143.0)
    assert physics.planck_radiance(143.0 * u.GHz, T0 * u.K) == pytest.approx(b, rel=1e-15)
    assert physics.planck_radiance((const.c / 143e9) * u.m) == pytest.approx(b, rel=1e-13)
    # B_lambda = B_nu nu^2 / c (change of variable).
    lam_m = const.c / 143e9
    assert physics.planck_radiance_wavelength(lam_m * 1e3) == pytest.approx(b * (143e9) ** 2 / const.c, rel=1e-13)
    # Far in the Wien tail the exponential underflows to zero without a warning.
    assert physics.planck_radiance(1e6, 1.0) == 0.0
    with pytest.raises(InvalidInputError, match="'nu_ghz'"):
        physics.planck_radiance(-1.0)
    with pytest.raises(InvalidInputError, match="'nu_ghz'"):
        physics.planck_radiance(1.0 * u.kg)
    with pytest.raises(InvalidInputError, match="'t_k'"):
        physics.planck_radiance(100.0, 0.0)
    with pytest.raises(InvalidInputError, match="broadcast"):
        physics.planck_radiance([100.0, 200.0], [3.0, 4.0, 5.0])


def test_wien_roots_and_peaks():
    # Closed forms with the Lambert W function: x = n + W(-n e^-n), n = 3 and 5.
    assert physics.WIEN_FREQUENCY_ROOT == pytest.approx(3.0 + special.lambertw(-3.0 * math.exp(-3.0)).real, rel=1e-14)
    assert physics.WIEN_WAVELENGTH_ROOT == pytest.approx(5.0 + special.lambertw(-5.0 * math.exp(-5.0)).real, rel=1e-14)
    # CODATA Wien displacement constants (scipy.constants).
    b_nu = const.physical_constants["Wien frequency displacement law constant"][0]
    b_lam = const.physical_constants["Wien wavelength displacement law constant"][0]
    assert physics.peak_frequency_ghz(T0) == pytest.approx(b_nu * T0 * 1e-9, rel=1e-9)
    assert physics.peak_wavelength_mm(T0) == pytest.approx(b_lam / T0 * 1e3, rel=1e-9)
    # From memory: the CMB spectrum peaks near 160.2 GHz (B_nu) and 1.063 mm (B_lambda).
    assert physics.peak_frequency_ghz() == pytest.approx(160.2, abs=0.05)
    assert physics.peak_wavelength_mm() == pytest.approx(1.063, abs=5e-4)
    # The maximum of Planck's law found numerically.
    res = optimize.minimize_scalar(lambda nu: -physics.planck_radiance(nu), bounds=(100, 250), method="bounded", options={"xatol": 1e-8})
    assert res.x == pytest.approx(physics.peak_frequency_ghz(), rel=1e-6)


# --------------------------------------------------------------------------- unit conversions


def _sympy_reference(nu_ghz, t_k):
    """dB/dT and dB_RJ/dT from Planck's law with sympy (RJ law = the h -> 0 limit)."""
    nu, temp, h, k, c = sympy.symbols("nu T h k c", positive=True)
    planck = 2 * h * nu**3 / c**2 / (sympy.exp(h * nu / (k * temp)) - 1)
    rayleigh_jeans = sympy.limit(planck, h, 0)
    values = {nu: sympy.Float(nu_ghz * 1e9, 30), temp: sympy.Float(t_k, 30), h: sympy.Float(const.h, 30),
              k: sympy.Float(const.k, 30), c: sympy.Float(const.c, 30)}  # fmt: skip
    db_dt = float(sympy.diff(planck, temp).evalf(30, subs=values))
    drj_dt = float(sympy.diff(rayleigh_jeans, temp).evalf(30, subs=values))
    return db_dt, drj_dt


@pytest.mark.parametrize("nu_ghz", [100.0, 143.0, 217.0, 353.0])
def test_conversion_factors_from_planck_law(nu_ghz):
    db_dt, drj_dt = _sympy_reference(nu_ghz, T0)
    assert physics.planck_radiance_derivative(nu_ghz) == pytest.approx(db_dt, rel=1e-12)
    assert physics.conversion_factor(nu_ghz, "K_CMB", "MJy/sr") == pytest.approx(db_dt * 1e20, rel=1e-12)
    assert physics.conversion_factor(nu_ghz, "K_CMB", "K_RJ") == pytest.approx(db_dt / drj_dt, rel=1e-12)
    assert physics.conversion_factor(nu_ghz, "K_RJ", "MJy/sr") == pytest.approx(drj_dt * 1e20, rel=1e-12)
    assert physics.conversion_factor(nu_ghz, "uK_CMB", "K_RJ") == pytest.approx(1e-6 * db_dt / drj_dt, rel=1e-12)
    # astropy's equivalencies: thermodynamic_temperature (K_CMB) and brightness_temperature (K_RJ).
    k_cmb = (1.0 * u.MJy / u.sr).to_value(u.K, equivalencies=u.thermodynamic_temperature(nu_ghz * u.GHz, T0 * u.K))
    k_rj = (1.0 * u.MJy / u.sr).to_value(u.K, equivalencies=u.brightness_temperature(nu_ghz * u.GHz))
    assert physics.conversion_factor(nu_ghz, "MJy/sr", "K_CMB") == pytest.approx(k_cmb, rel=1e-9)
    assert physics.conversion_factor(nu_ghz, "MJy/sr", "K_RJ") == pytest.approx(k_rj, rel=1e-9)


def test_conversion_limits_and_round_trips():
    # Common practice: x^2 e^x / (e^x - 1)^2 -> 1 - x^2/12 at low frequency.
    x = const.h * 1e7 / (const.k * T0)
    assert physics.conversion_factor(0.01, "K_CMB", "K_RJ") == pytest.approx(1.0 - x**2 / 12.0, rel=1e-14)
    nu = np.geomspace(1.0, 2000.0, 40)
    for a, b in [("K_CMB", "K_RJ"), ("K_CMB", "MJy/sr"), ("mK_RJ", "kJy/sr")]:
        np.testing.assert_allclose(physics.conversion_factor(nu, a, b) * physics.conversion_factor(nu, b, a), 1.0, rtol=1e-14)
    # Far in the Wien tail the factor stays finite and positive.
    assert 0.0 < physics.conversion_factor(5000.0, "K_CMB", "K_RJ") < 1e-30
    with pytest.raises(InvalidInputError, match="'target'"):
        physics.conversion_factor(100.0, "K_CMB", "Kelvin")


def _top_hat(lo, hi, n=3001):
    return np.linspace(lo, hi, n), np.ones(n)


def test_bandpass_factors_against_quadrature():
    freq, trans = _top_hat(125.0, 165.0)
    band = physics.Bandpass(freq, trans)
    assert band.mean_frequency_ghz == pytest.approx(145.0, rel=1e-14)
    db = integrate.quad(lambda f: physics.planck_radiance_derivative(f), 125.0, 165.0, epsrel=1e-13)[0]
    rj = integrate.quad(lambda f: 2 * const.k * (f * 1e9) ** 2 / const.c**2, 125.0, 165.0, epsrel=1e-13)[0]
    # IRAS convention: I_nu proportional to nu^-1, referred to the band centre (here 145 GHz).
    iras = integrate.quad(lambda f: (f / 145.0) ** -1.0, 125.0, 165.0, epsrel=1e-13)[0]
    # Trapezoidal rule with 3001 samples: relative error ~ (step/width)^2 ~ 1e-7.
    assert band.conversion_factor("K_CMB", "K_RJ") == pytest.approx(db / rj, rel=1e-6)
    assert physics.bandpass_conversion_factor(band, "K_CMB", "MJy/sr") == pytest.approx(db / iras * 1e20, rel=1e-6)
    # Flat-spectrum (alpha = 0) reference at 150 GHz.
    flat = physics.bandpass_conversion_factor((freq, trans), "K_CMB", "MJy/sr", reference_ghz=150.0, spectral_index=0.0)
    assert flat == pytest.approx(db / 40.0 * 1e20, rel=1e-6)
    # A narrow band tends to the single-frequency factor.
    narrow = physics.bandpass_conversion_factor(np.column_stack(_top_hat(142.99, 143.01, 11)), "K_CMB", "K_RJ")
    assert narrow == pytest.approx(physics.conversion_factor(143.0, "K_CMB", "K_RJ"), rel=1e-8)
    # Converting there and back is exact.
    assert band.conversion_factor("K_CMB", "MJy/sr") * band.conversion_factor("MJy/sr", "K_CMB") == pytest.approx(1.0, rel=1e-14)


def test_read_bandpass_files(tmp_path):
    freq = np.linspace(120.0, 170.0, 51)
    trans = np.exp(-0.5 * ((freq - 145.0) / 10.0) ** 2)
    csv = tmp_path / "band.csv"
    csv.write_text("# invented band\nfrequency_ghz,transmission\n" + "".join(f"{f:.17g},{t:.17g}\n" for f, t in zip(freq, trans)))
    txt = tmp_path / "band.txt"
    txt.write_text("\n".join(f"{f:.17g}  {t:.17g}" for f, t in zip(freq, trans)) + "\n\n")
    a, b = physics.read_bandpass(csv), physics.read_bandpass(txt)
    np.testing.assert_array_equal(a.frequencies_ghz, freq)
    np.testing.assert_array_equal(b.transmission, trans)
    assert physics.bandpass_conversion_factor(csv, "K_CMB", "K_RJ") == b.conversion_factor("K_CMB", "K_RJ")
    with pytest.raises(ValueError):
        a.frequencies_ghz[0] = 1.0  # read-only


@pytest.mark.parametrize(
    ("text", "problem"),
    [
        ("100,1\n110,x\n", "line 2: 'x' is not a number"),
        ("100,1\n110,-0.1\n120,1\n", "transmission must be >= 0"),
        ("100,1\n120,1\n110,1\n", "strictly increasing"),
        ("100,1\n100,1\n110,1\n", "repeats"),
        ("100,1\n", "at least 2 rows"),
        ("100,1,3\n110,1,3\n", "expected 2 columns"),
        ("100,0\n110,0\n", "zero everywhere"),
        ("100,nan\n110,1\n", "not a finite number"),
        ("-5,1\n110,1\n", "frequencies must be > 0"),
    ],
)
def test_bad_bandpass_files(tmp_path, text, problem):
    path = tmp_path / "bad.csv"
    path.write_text(text)
    with pytest.raises(InputFileError, match=problem) as info:
        physics.read_bandpass(path)
    assert info.value.path == str(path)


def test_bad_bandpass_arrays_and_missing_file(tmp_path):
    with pytest.raises(InvalidInputError, match="strictly increasing"):
        physics.Bandpass([100.0, 90.0], [1.0, 1.0])
    with pytest.raises(InvalidInputError, match="at least 2 rows"):
        physics.Bandpass([100.0], [1.0])
    with pytest.raises(InvalidInputError, match="columns of numbers"):
        physics.Bandpass(["a", "b"], [1.0, 1.0])
    with pytest.raises(InvalidInputError, match="'bandpass'"):
        physics.bandpass_conversion_factor(np.ones((3, 3)), "K_CMB", "K_RJ")
    with pytest.raises(InputFileError, match="no such file"):
        physics.read_bandpass(tmp_path / "missing.csv")


# --------------------------------------------------------------------------- kinematic dipole


def test_solar_dipole_speed():
    # Planck 2018 results I (A&A 641, A1, 2020): dipole amplitude 3362.08 uK (value from memory),
    # corresponding to v = 369.82 km/s (from memory).
    v = physics.velocity_from_dipole(3.36208e-3)
    assert v == pytest.approx(369.82, abs=0.1)
    # First order: Delta T / T0 = v / c; the exact solution is lower by beta^2 / 10.
    beta = v * 1e3 / const.c
    first_order = 3.36208e-3 / T0 * const.c / 1e3
    assert v / first_order - 1.0 == pytest.approx(-(beta**2) / 10.0, rel=1e-3)


def test_velocity_amplitude_round_trip():
    v = np.array([0.0, 1.0, 369.82, 3.0e4, 0.5 * const.c / 1e3, 0.9 * const.c / 1e3])
    amp = physics.dipole_from_velocity(v)
    np.testing.assert_allclose(physics.velocity_from_dipole(amp), v, rtol=1e-13, atol=1e-9)
    assert physics.velocity_from_dipole(3.36208e-3 * u.K) == pytest.approx(physics.velocity_from_dipole(3.36208e-3), rel=1e-15)


@pytest.mark.parametrize("beta", [1.2336e-3, 0.05, 0.5, 0.8])
def test_multipoles_of_exact_doppler_pattern(beta):
    # Legendre coefficients of T0 / (gamma (1 - beta mu)) by Gauss-Legendre projection (numpy).
    # Motion towards the north pole, so theta = 90 deg - latitude.
    motion = physics.ObserverMotion(beta * const.c / 1e3, 0.0, 90.0)
    mu, w = np.polynomial.legendre.leggauss(200)
    temps = motion.sky_temperature(0.0, 90.0 - np.degrees(np.arccos(mu)))
    a1 = 1.5 * np.sum(w * temps * mu)
    a2 = 2.5 * np.sum(w * temps * 0.5 * (3 * mu**2 - 1))
    assert motion.dipole_amplitude_k == pytest.approx(a1, rel=1e-10)
    assert motion.quadrupole_amplitude_k == pytest.approx(a2, rel=1e-7)
    assert physics.quadrupole_from_velocity(motion.speed_km_s) == motion.quadrupole_amplitude_k


def test_kinematic_quadrupole_small_velocity():
    # Second order: T(theta) = T0 (1 + beta cos + beta^2 (cos^2 - 1/2) + ...), so a_2 = (2/3) beta^2 T0.
    beta = 369.82e3 / const.c
    assert physics.quadrupole_from_velocity(369.82) == pytest.approx(2.0 / 3.0 * beta**2 * T0, rel=1e-5)
    # From memory: the kinematic quadrupole is a few uK (about 2.8 uK as a P_2 coefficient).
    assert physics.quadrupole_from_velocity(369.82) == pytest.approx(2.76e-6, abs=0.02e-6)


def test_observer_motion_from_healpy_dipole_fit():
    # Planck 2018 results I (A&A 641, A1, 2020), from memory: (l, b) = (264.021, 48.253) deg.
    truth = physics.ObserverMotion.from_dipole(3.36208e-3, 264.021, 48.253)
    nside = 16
    lon, lat = hp.pix2ang(nside, np.arange(12 * nside**2), lonlat=True)
    sky = truth.sky_temperature(lon, lat)
    # healpy's least-squares monopole + dipole fit of the exact Doppler sky.
    monopole, dipole = hp.fit_dipole(sky)
    fitted = physics.ObserverMotion.from_dipole_vector(dipole)
    assert fitted.speed_km_s == pytest.approx(truth.speed_km_s, rel=1e-8)
    assert fitted.lon_deg == pytest.approx(264.021, abs=1e-6)
    assert fitted.lat_deg == pytest.approx(48.253, abs=1e-6)
    np.testing.assert_allclose(fitted.velocity_km_s, truth.velocity_km_s, rtol=1e-8)
    # The monopole of the Doppler sky is T0 (1 - beta^2 / 6) to second order.
    assert monopole == pytest.approx(T0 * (1.0 - truth.beta**2 / 6.0), rel=1e-10)


def test_dipole_input_errors():
    with pytest.raises(InvalidInputError, match="'amplitude_k'"):
        physics.velocity_from_dipole(-1e-3)
    with pytest.raises(InvalidInputError, match="largest"):
        physics.velocity_from_dipole(0.95 * T0)
    with pytest.raises(InvalidInputError, match="speed of light"):
        physics.dipole_from_velocity(const.c / 1e3)
    with pytest.raises(InvalidInputError, match="'lat_deg'"):
        physics.ObserverMotion(100.0, 0.0, 95.0)
    with pytest.raises(InvalidInputError, match="shape"):
        physics.ObserverMotion.from_dipole_vector([1e-3, 0.0])
