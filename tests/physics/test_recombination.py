"""Recombination, the ionization history and last-scattering geometry (cmbtools.physics).

The reference numbers come from outside the project: the Planck 2018
cosmological-parameters paper, the fitting-formula papers, the Saha equation
with CODATA constants (scipy.constants), and astropy's own distances, ages and
expansion rate.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from astropy.cosmology import FlatLambdaCDM, LambdaCDM, Planck18, w0waCDM
from scipy import constants as sc
from scipy import integrate, optimize, special

from cmbtools.exceptions import InvalidInputError
from cmbtools.physics import (
    CosmologyExtras,
    IonizationHistory,
    LastScattering,
    eisenstein_hu_drag_redshift,
    free_electron_fraction,
    hu_sugiyama_last_scattering_redshift,
    last_scattering,
    saha_ionization,
    sound_horizon,
)

MPC = 1e6 * sc.parsec


@pytest.fixture(scope="module")
def fiducial():
    return last_scattering()


@pytest.fixture(scope="module")
def history():
    return IonizationHistory(with_reionization=False)


# ---------------------------------------------------------------- Planck 2018 comparison
#
# astropy's Planck18 is the base-LCDM fit of Planck Collaboration 2020 (A&A 641, A6),
# Table 2, column "TT,TE,EE+lowE+lensing+BAO" (its meta says so, checked below).  Derived
# values of that column (from memory): z* = 1089.80 +- 0.21, r* = 144.57 +- 0.22 Mpc,
# 100 theta* = 1.04119 +- 0.00029, z_drag = 1060.01 +- 0.29, r_drag = 147.21 +- 0.23 Mpc,
# age = 13.787 +- 0.020 Gyr.  (The TT,TE,EE+lowE+lensing column without BAO has
# z* = 1089.92, r* = 144.43, 100 theta* = 1.04110, z_drag = 1059.94, r_drag = 147.09,
# for a slightly different cosmology.)  Tolerances reflect our simplified recombination
# (three-level hydrogen with the 1.14 fudge, helium in Saha equilibrium) against the
# multi-level calculation behind the paper: z* and z_drag within 0.2 %, r_s within
# 0.3 %, theta* within 0.2 %, the age within 0.1 %.

PLANCK18_BAO = dict(z_star=1089.80, r_star=144.57, theta100=1.04119, z_drag=1060.01, r_drag=147.21, age=13.787)


def test_default_cosmology_is_the_planck_bao_column():
    # astropy's own record of where Planck18's parameters come from
    assert "TT, TE, EE + lowE + lensing + BAO" in Planck18.meta["reference"]
    assert "A&A, 641, A6" in Planck18.meta["reference"]


def test_redshift_of_last_scattering_matches_planck(fiducial):
    # Planck 2020 (A&A 641, A6) Table 2; the paper defines z* by tau(z*) = 1 (from memory);
    # the visibility peak agrees with it to about 1 in redshift
    assert fiducial.z_tau_unity == pytest.approx(PLANCK18_BAO["z_star"], rel=2e-3)
    assert fiducial.z_star == pytest.approx(PLANCK18_BAO["z_star"], rel=2e-3)


def test_sound_horizon_and_angle_match_planck(fiducial):
    # Planck 2020 (A&A 641, A6) Table 2, TT,TE,EE+lowE+lensing+BAO (from memory)
    assert fiducial.r_star_mpc == pytest.approx(PLANCK18_BAO["r_star"], rel=3e-3)
    assert 100 * fiducial.theta_star == pytest.approx(PLANCK18_BAO["theta100"], rel=2e-3)
    assert fiducial.r_drag_mpc == pytest.approx(PLANCK18_BAO["r_drag"], rel=3e-3)


def test_drag_redshift_matches_planck(fiducial):
    # Planck 2020 (A&A 641, A6) Table 2 (from memory)
    assert fiducial.z_drag == pytest.approx(PLANCK18_BAO["z_drag"], rel=2e-3)
    # drag ends after last scattering because R < 1 at z* (common practice)
    assert fiducial.z_drag < fiducial.z_star


def test_age_matches_planck_and_astropy(fiducial):
    # Planck 2020 (A&A 641, A6) Table 2; also astropy's Planck18.meta['t0']
    assert fiducial.age_gyr == pytest.approx(PLANCK18_BAO["age"], rel=1e-3)
    assert fiducial.age_gyr == pytest.approx(Planck18.meta["t0"].to_value("Gyr"), rel=1e-3)


def test_universe_expanded_about_1100_times_since_last_scattering(fiducial):
    # common practice: 1 + z* ~ 1090
    assert 1 + fiducial.z_star == pytest.approx(1090.0, rel=0.01)
    # and the CMB was at ~3000 K then (common practice: T* ~ 0.26 eV ~ 3000 K)
    assert fiducial.t_star_k == pytest.approx(2970.0, rel=0.01)
    assert fiducial.t_star_k == pytest.approx(Planck18.Tcmb0.to_value("K") * (1 + fiducial.z_star), rel=1e-12)


def test_ages_and_distances_agree_with_astropy(fiducial):
    z = fiducial.z_star
    # astropy's own distances and ages (reference library)
    assert fiducial.dm_star_mpc == pytest.approx(Planck18.comoving_transverse_distance(z).to_value("Mpc"), rel=1e-9)
    assert fiducial.da_star_mpc == pytest.approx(Planck18.angular_diameter_distance(z).to_value("Mpc"), rel=1e-9)
    assert fiducial.light_travel_gyr == pytest.approx(Planck18.lookback_time(z).to_value("Gyr"), rel=1e-6)
    # age at last scattering ~ 380 000 years (common practice)
    assert fiducial.age_star_kyr == pytest.approx(Planck18.age(z).to_value("kyr"), rel=1e-9)
    assert 360 < fiducial.age_star_kyr < 390
    assert fiducial.ell_a == pytest.approx(math.pi / fiducial.theta_star, rel=1e-14)
    # the acoustic scale l_A ~ 301-302 for Planck cosmologies (from memory)
    assert 300 < fiducial.ell_a < 303


def test_photon_numbers_from_codata(fiducial):
    t0 = Planck18.Tcmb0.to_value("K")
    # blackbody photon density n = 2 zeta(3)/pi^2 (kT/hbar c)^3 with CODATA (common practice),
    # 410.7 cm^-3 at 2.7255 K (from memory)
    n = 2 * special.zeta(3) / math.pi**2 * (sc.k * t0 / (sc.hbar * sc.c)) ** 3 * 1e-6
    assert fiducial.n_gamma_cm3 == pytest.approx(n, rel=1e-12)
    assert fiducial.n_gamma_cm3 == pytest.approx(410.7, abs=0.1)
    # Omega_gamma h^2 = a T^4 / c^2 / (3 (100 km/s/Mpc)^2 / 8 pi G), CODATA via scipy;
    # 2.47e-5 (from memory)
    rho_gamma = 4 * sc.sigma / sc.c * t0**4 / sc.c**2
    rho_crit_100 = 3 * (1e5 / MPC) ** 2 / (8 * math.pi * sc.G)
    assert fiducial.omega_gamma_h2 == pytest.approx(rho_gamma / rho_crit_100, rel=1e-4)
    assert fiducial.omega_gamma_h2 == pytest.approx(2.473e-5, rel=1e-3)


# ---------------------------------------------------------------- fitting formulas


def test_hu_sugiyama_fit_agrees_with_the_integration(fiducial):
    # Hu & Sugiyama 1996 (ApJ 471, 542, eq. E1) quote ~1 % accuracy
    fit = hu_sugiyama_last_scattering_redshift()
    assert fit == pytest.approx(fiducial.z_star, rel=0.01)
    assert fit == pytest.approx(PLANCK18_BAO["z_star"], rel=0.01)  # Planck 2020, Table 2
    assert fiducial.z_star_fit == fit


def test_hu_sugiyama_fit_for_another_cosmology():
    # a high-baryon, low-matter model: the fit still holds to its quoted ~1 % (HS96, eq. E1)
    cosmo = FlatLambdaCDM(H0=70.0, Om0=0.2 / 0.49, Ob0=0.03 / 0.49, Tcmb0=2.7255, Neff=3.046)
    ls = last_scattering(cosmo)
    assert hu_sugiyama_last_scattering_redshift(cosmo) == pytest.approx(ls.z_tau_unity, rel=0.01)


def test_eisenstein_hu_drag_fit(fiducial):
    # Eisenstein & Hu 1998 (ApJ 496, 605, eq. 4).  For Planck-like parameters the fit gives
    # z_d ~ 1020, about 4 % below the drag redshift of a full recombination calculation
    # (from memory: the well-known offset of that fit's drag epoch, which is why its
    # sound horizon comes out ~2 % larger than r_drag ~ 147 Mpc)
    fit = eisenstein_hu_drag_redshift()
    assert fit == pytest.approx(1020.8, abs=1.0)  # eq. 4 evaluated by hand for w_m=0.1424, w_b=0.02242
    assert 0.95 < fit / fiducial.z_drag < 0.98
    assert sound_horizon(fit) == pytest.approx(150.0, rel=0.01)


# ---------------------------------------------------------------- Saha equilibrium


def _saha_hydrogen_reference(z):
    """The Saha equation for pure hydrogen, written out with CODATA constants (common practice)."""
    t = Planck18.Tcmb0.to_value("K") * (1 + z)
    n_h = Planck18.Ob0 * Planck18.critical_density0.to_value("kg/m3") * (1 - 0.2454) / (sc.m_p + sc.m_e) * (1 + z) ** 3
    e_ion = sc.physical_constants["Rydberg constant times hc in J"][0] * sc.m_p / (sc.m_p + sc.m_e)
    a = (sc.m_e * sc.k * t / (2 * math.pi * sc.hbar**2)) ** 1.5 * math.exp(-e_ion / (sc.k * t)) / n_h
    return (-a + math.sqrt(a * a + 4 * a)) / 2  # root of x^2 / (1 - x) = a


@pytest.mark.parametrize("z", [1200.0, 1300.0, 1400.0, 1600.0])
def test_saha_hydrogen_matches_the_textbook_equation(z):
    assert saha_ionization(z, hydrogen_only=True) == pytest.approx(_saha_hydrogen_reference(z), rel=1e-9)


def test_saha_recombination_happens_at_z_1380():
    # common practice (from memory): in Saha equilibrium hydrogen is half ionized at
    # z ~ 1380, T ~ 0.32 eV, far below the 13.6 eV binding energy because photons outnumber baryons
    z_half = optimize.brentq(lambda z: saha_ionization(z, hydrogen_only=True) - 0.5, 1000.0, 2000.0)
    assert z_half == pytest.approx(1380.0, rel=0.015)
    t_ev = sc.k * Planck18.Tcmb0.to_value("K") * (1 + z_half) / sc.eV
    assert t_ev == pytest.approx(0.32, abs=0.01)


def test_saha_helium_stages():
    f_he = CosmologyExtras().helium_to_hydrogen
    # helium/hydrogen number ratio Y / (m_He/m_H (1 - Y)), m_He/m_H = 3.9715 (from memory)
    assert f_he == pytest.approx(0.2454 / (3.9715 * (1 - 0.2454)), rel=1e-4)
    xe = saha_ionization([20000.0, 4000.0, 2000.0])
    # z = 2e4: everything ionized, 1 + 2 f_He electrons per H; z = 4000: He+ only;
    # z = 2000: helium neutral (common practice: He III -> II at z ~ 6000, He II -> I at z ~ 2500)
    assert xe[0] == pytest.approx(1 + 2 * f_he, rel=1e-3)
    assert xe[1] == pytest.approx(1 + f_he, rel=1e-3)
    assert xe[2] == pytest.approx(1.0, abs=2e-3)
    # half-way points of the two helium recombinations in Saha equilibrium: z ~ 6000 for
    # He III -> He II and z ~ 2500 for He II -> He I (common practice, from memory)
    z_he2 = optimize.brentq(lambda z: saha_ionization(z) - (1 + 1.5 * f_he), 4000.0, 10000.0)
    z_he1 = optimize.brentq(lambda z: saha_ionization(z) - (1 + 0.5 * f_he), 1800.0, 4000.0)
    assert z_he2 == pytest.approx(6000.0, rel=0.03)
    assert z_he1 == pytest.approx(2500.0, rel=0.02)
    # helium recombines earlier than hydrogen: monotone fall with z
    z = np.linspace(1500.0, 9000.0, 200)
    assert np.all(np.diff(saha_ionization(z)) >= 0)


# ---------------------------------------------------------------- Peebles three-level atom


def test_peebles_lags_saha(history):
    # the bottleneck of the n = 2 level keeps hydrogen more ionized than Saha predicts
    # (Peebles 1968, ApJ 153, 1); by z = 1200 Saha has x ~ 0.05 while x ~ 0.3 really (from memory)
    x_peebles = history.hydrogen_ionized_fraction(1200.0)
    x_saha = saha_ionization(1200.0, hydrogen_only=True)
    assert x_peebles > 3 * x_saha
    assert 0.2 < x_peebles < 0.5
    # at the switch the two agree (continuity, 0.99 by construction; table interpolation 1e-5)
    z0 = history.z_peebles_start
    assert history.hydrogen_ionized_fraction(z0) == pytest.approx(0.99, abs=1e-5)
    assert 1450 < z0 < 1700


def test_freeze_out_leaves_a_residual_ionization(history):
    # from memory: x_e ~ 2-4e-4 after freeze-out for Planck-like parameters
    x200 = history.free_electron_fraction(200.0)
    assert 1e-4 < x200 < 1e-3
    assert 2e-4 < x200 < 4e-4
    # frozen: x_e changes by less than a factor 2 between z = 200 and z = 30
    assert history.free_electron_fraction(30.0) == pytest.approx(x200, rel=0.5)
    # x_e falls monotonically through recombination
    z = np.linspace(30.0, 2500.0, 500)
    assert np.all(np.diff(history.free_electron_fraction(z)) > 0)


def test_fudge_factor_speeds_recombination():
    # a larger recombination rate (Seager et al. 1999's fudge) lowers x_e at fixed z
    slow = free_electron_fraction(1000.0, extras=CosmologyExtras(peebles_fudge=1.0), with_reionization=False)
    fast = free_electron_fraction(1000.0, extras=CosmologyExtras(peebles_fudge=1.14), with_reionization=False)
    assert fast < slow
    assert fast / slow == pytest.approx(1 / math.sqrt(1.14), rel=0.1)  # x_e ~ (alpha)^-1/2 near freeze-out


def test_matter_temperature(history):
    t0 = Planck18.Tcmb0.to_value("K")
    # tightly coupled to the CMB by Compton scattering at recombination (common practice)
    assert history.matter_temperature(1000.0) == pytest.approx(t0 * 1001.0, rel=1e-4)
    # decouples near z ~ 150 and then cools adiabatically, T_m ~ (1 + z)^2 (common practice)
    assert history.matter_temperature(50.0) < 0.7 * t0 * 51.0
    ratio = history.matter_temperature(10.0) / history.matter_temperature(20.0)
    assert ratio == pytest.approx((11.0 / 21.0) ** 2, rel=0.03)


# ---------------------------------------------------------------- optical depth and visibility


def test_visibility_integrates_to_one(history):
    # g is normalised in conformal time: int g d(eta) = 1 - exp(-tau(z_max)); d(eta) = c dz / H(z)
    # with astropy's H(z) as the reference expansion rate
    z = np.linspace(0.0, 3000.0, 60001)
    c_over_h = (sc.c / 1e3) / Planck18.H(z).to_value("km/(s Mpc)")  # Mpc
    total = integrate.trapezoid(history.visibility(z) * c_over_h, z)
    assert total == pytest.approx(1 - math.exp(-history.optical_depth(3000.0)), abs=1e-4)
    assert total == pytest.approx(1.0, abs=1e-4)
    # and the redshift-normalised version integrates to the same
    assert integrate.trapezoid(history.visibility_per_redshift(z), z) == pytest.approx(1.0, abs=1e-4)


def test_optical_depth_is_about_one_at_the_visibility_peak(history, fiducial):
    # g peaks where tau'' = tau'^2, i.e. close to tau = 1 (common practice)
    assert history.optical_depth(fiducial.z_star) == pytest.approx(1.0, abs=0.05)
    assert history.optical_depth(fiducial.z_tau_unity) == pytest.approx(1.0, abs=2e-5)  # interpolation
    # the last-scattering shell is thin: FWHM ~ 200 in z (from memory, sigma_z ~ 80)
    assert 150 < fiducial.visibility_fwhm_z < 250


def test_optical_depth_matches_its_integral(history):
    # tau(z) = int n_e sigma_T c dt, recomputed with scipy quad and astropy's H(z)
    n_h0 = Planck18.Ob0 * Planck18.critical_density0.to_value("kg/m3") * (1 - 0.2454) / (sc.m_p + sc.m_e)
    h0 = Planck18.H0.to_value("1/s")
    sigma_t = sc.physical_constants["Thomson cross section"][0]

    def rate(z):
        return history.free_electron_fraction(z) * n_h0 * (1 + z) ** 2 * sigma_t * sc.c / (h0 * Planck18.efunc(z))

    tau = integrate.quad(rate, 0.0, 1100.0, points=[800.0, 1000.0], limit=200)[0]
    assert history.optical_depth(1100.0) == pytest.approx(tau, rel=1e-4)


def test_reionization_sets_the_optical_depth_and_leaves_z_star(history):
    extras = CosmologyExtras()
    reion = IonizationHistory(extras=extras)
    # the reionized electrons add the requested depth
    extra = reion.optical_depth(40.0) - history.optical_depth(40.0)
    assert extra == pytest.approx(extras.reionization_optical_depth, rel=1e-3)
    # Planck 2020 (A&A 641, A6) midpoint z_re = 7.82 for tau = 0.0561 (astropy's Planck18.meta);
    # their tanh is in (1+z)^1.5 and includes helium's second reionization, ours is in z
    assert reion.z_reionization == pytest.approx(Planck18.meta["z_reion"].value, abs=0.5)
    # fully ionized today, hydrogen and singly ionized helium
    assert reion.free_electron_fraction(0.0) == pytest.approx(1 + extras.helium_to_hydrogen, rel=1e-6)
    # the peak of the visibility is unchanged
    assert reion.visibility_peak() == pytest.approx(history.visibility_peak(), abs=1e-6)
    # no reionization requested -> none
    none = IonizationHistory(extras=extras.replace(reionization_optical_depth=0.0))
    assert none.z_reionization is None
    assert none.free_electron_fraction(5.0) == pytest.approx(history.free_electron_fraction(5.0), rel=1e-12)


def test_drag_depth(history, fiducial):
    assert history.drag_optical_depth(fiducial.z_drag) == pytest.approx(1.0, abs=2e-5)  # interpolation
    # tau_d = int tau' / R dz with R = 3 rho_b / 4 rho_gamma = (3 Ob0 / 4 Ogamma0) / (1 + z),
    # astropy's Ogamma0 as reference
    r_coeff = 0.75 * Planck18.Ob0 / Planck18.Ogamma0
    z = np.linspace(0.0, 1200.0, 24001)
    td = integrate.trapezoid(history.optical_depth_derivative(z) * (1 + z) / r_coeff, z)
    assert history.drag_optical_depth(1200.0) == pytest.approx(td, rel=1e-4)


# ---------------------------------------------------------------- sound horizon


def test_sound_horizon_against_quadrature():
    # r_s(z) = int_z^inf c / sqrt(3 (1 + R)) dz / H, astropy's H(z), scipy quad
    r_coeff = 0.75 * Planck18.Ob0 / Planck18.Ogamma0
    h0 = Planck18.H0.to_value("1/s")

    def integrand(z):
        return sc.c / math.sqrt(3 * (1 + r_coeff / (1 + z))) / (h0 * Planck18.efunc(z))

    for z in (0.0, 1060.0, 1090.0, 5000.0):
        ref = (integrate.quad(integrand, z, 1e5, limit=400, epsrel=1e-11)[0]
               + integrate.quad(integrand, 1e5, np.inf, limit=400, epsrel=1e-11)[0]) / MPC
        assert sound_horizon(z) == pytest.approx(ref, rel=1e-8)
    zs = np.array([1000.0, 1100.0])
    assert sound_horizon(zs).shape == (2,)
    # radiation era: r_s -> c t / sqrt(3) (1+z) comoving, i.e. r_s (1 + z) -> constant (common practice)
    assert sound_horizon(1e7) * 1e7 == pytest.approx(sound_horizon(1e8) * 1e8, rel=1e-3)


# ---------------------------------------------------------------- other cosmologies


def test_curvature_changes_the_angle_not_the_horizon(fiducial):
    # same early universe, open geometry: r* identical, theta* scales as 1/D_M (astropy)
    open_ = LambdaCDM(H0=67.66, Om0=Planck18.Om0, Ob0=Planck18.Ob0, Ode0=Planck18.Ode0 - 0.01,
                      Tcmb0=2.7255, Neff=3.046, m_nu=[0.0, 0.0, 0.06])
    ls = last_scattering(open_)
    assert ls.r_star_mpc == pytest.approx(fiducial.r_star_mpc, rel=1e-4)
    dm_ratio = open_.comoving_transverse_distance(ls.z_star) / Planck18.comoving_transverse_distance(fiducial.z_star)
    assert ls.theta_star / fiducial.theta_star == pytest.approx(1 / float(dm_ratio), rel=1e-4)
    assert ls.ell_a > fiducial.ell_a  # open universe: features at higher l (common practice)


def test_dynamical_dark_energy_runs():
    cosmo = w0waCDM(H0=67.66, Om0=0.31, Ode0=0.69, w0=-0.9, wa=-0.3, Ob0=0.049, Tcmb0=2.7255, Neff=3.046)
    ls = last_scattering(cosmo)
    assert ls.z_star == pytest.approx(1089.2, rel=2e-3)
    assert ls.dm_star_mpc == pytest.approx(cosmo.comoving_transverse_distance(ls.z_star).to_value("Mpc"), rel=1e-9)


# ---------------------------------------------------------------- result object and validation


def test_result_object(fiducial):
    assert isinstance(fiducial, LastScattering)
    d = fiducial.to_dict()
    for key in ("z_star", "z_drag", "r_star_mpc", "theta_star", "ell_a", "dm_star_mpc", "da_star_mpc",
                "age_gyr", "age_star_kyr", "t_star_k", "n_gamma_cm3", "omega_gamma_h2"):
        assert isinstance(d[key], float)
    with pytest.raises(dataclasses.FrozenInstanceError):
        fiducial.z_star = 0.0
    assert last_scattering(Planck18, CosmologyExtras()) == fiducial  # deterministic


def test_extras_defaults_and_replace():
    e = CosmologyExtras()
    # defaults consistent with astropy's Planck18 (Planck 2020, A&A 641, A6, Table 2, +BAO)
    assert e.tilt_scalar == Planck18.meta["n"]
    assert e.reionization_optical_depth == Planck18.meta["tau"]
    assert math.log(1e10 * e.amplitude_scalar) == pytest.approx(3.047, abs=1e-3)  # Planck 2020 (from memory)
    assert e.peebles_fudge == 1.14  # Seager, Sasselov & Scott 1999
    e2 = e.replace(helium_fraction=0.24)
    assert e2.helium_fraction == 0.24 and e.helium_fraction == 0.2454
    assert e2.to_dict()["helium_fraction"] == 0.24
    with pytest.raises(dataclasses.FrozenInstanceError):
        e.helium_fraction = 0.3


@pytest.mark.parametrize(
    "changes, match",
    [
        (dict(helium_fraction=0.6), "helium_fraction"),
        (dict(helium_fraction=-0.1), "helium_fraction"),
        (dict(peebles_fudge=0.0), "peebles_fudge"),
        (dict(amplitude_scalar=-2e-9), "amplitude_scalar"),
        (dict(tilt_scalar=float("nan")), "tilt_scalar"),
        (dict(reionization_optical_depth=0.7), "reionization_optical_depth"),
        (dict(helium_fraction="0.24"), "real number"),
        (dict(tilt_scalar=True), "real number"),
    ],
)
def test_extras_validation(changes, match):
    with pytest.raises(InvalidInputError, match=match):
        CosmologyExtras(**changes)


def test_extras_replace_rejects_unknown_fields():
    with pytest.raises(InvalidInputError, match="no field"):
        CosmologyExtras().replace(omega_b=0.02)


@pytest.mark.parametrize(
    "cosmo, match",
    [
        (FlatLambdaCDM(H0=70.0, Om0=0.3, Tcmb0=2.7255), "baryon density"),
        (FlatLambdaCDM(H0=70.0, Om0=0.3, Ob0=0.05), "CMB temperature"),
        (LambdaCDM(H0=70.0, Om0=0.3, Ode0=2.0, Ob0=0.05, Tcmb0=2.7255), "expansion rate"),
        (LambdaCDM(H0=70.0, Om0=3.0, Ode0=3.0, Ob0=0.05, Tcmb0=2.7255), "antipode"),
        ("Planck18", "FLRW"),
    ],
)
def test_bad_cosmologies(cosmo, match):
    with pytest.raises(InvalidInputError, match=match):
        last_scattering(cosmo)


def test_bad_arguments():
    with pytest.raises(InvalidInputError, match="CosmologyExtras"):
        last_scattering(extras={"helium_fraction": 0.24})
    with pytest.raises(InvalidInputError, match="redshift"):
        free_electron_fraction(-1.0)
    with pytest.raises(InvalidInputError, match="<= 20000"):
        IonizationHistory().free_electron_fraction(3e4)
    with pytest.raises(InvalidInputError, match="1e10"):
        sound_horizon(1e11)
