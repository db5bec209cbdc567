"""Tests of the fast vectorized distances and times (cmbtools.physics.DistanceTable)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from astropy import units as u
from astropy.constants import c as speed_of_light
from astropy.cosmology import FlatLambdaCDM, LambdaCDM, Planck18, w0waCDM, wCDM
from astropy.cosmology import units as cu
from scipy import integrate

from cmbtools import physics
from cmbtools.exceptions import InvalidInputError

# Several expansion histories: flat, open and closed LambdaCDM, massive neutrinos, w0-wa and constant-w
# dark energy, and a flat model without radiation (astropy then uses elliptic integrals).
COSMOLOGIES = {
    "planck18": Planck18,
    "open": LambdaCDM(H0=70.0, Om0=0.3, Ode0=0.6, Tcmb0=2.7255, Ob0=0.05),
    "closed": LambdaCDM(H0=70.0, Om0=0.35, Ode0=0.75, Tcmb0=2.7255, Ob0=0.05),
    "massive_nu": FlatLambdaCDM(H0=68.0, Om0=0.31, Tcmb0=2.7255, m_nu=[0.05, 0.1, 0.2] * u.eV, Ob0=0.05),
    "w0wa": w0waCDM(H0=70.0, Om0=0.3, Ode0=0.7, w0=-0.9, wa=0.3, Tcmb0=2.7255, m_nu=[0.0, 0.0, 0.06] * u.eV),
    "wcdm": wCDM(H0=65.0, Om0=0.28, Ode0=0.74, w0=-1.1, Tcmb0=2.7255),
    "no_radiation": FlatLambdaCDM(H0=70.0, Om0=0.3),
}

REDSHIFTS = np.concatenate([[0.0, 1e-8, 1100.0], np.random.default_rng(1100).uniform(0.0, 1100.0, 200)])


@pytest.fixture(scope="module", params=list(COSMOLOGIES))
def case(request):
    cosmo = COSMOLOGIES[request.param]
    return cosmo, physics.DistanceTable(cosmo)


def _reference_integral(cosmo, z, *, kind):
    """int of 1/E (kind 'age': / (1 + z)) from z to infinity, in a = 1/(1+z) (scipy quad)."""
    a_z = 1.0 / (1.0 + z)
    if kind == "age":
        f = lambda a: cosmo.inv_efunc(1.0 / a - 1.0) / a  # noqa: E731
    else:
        f = lambda a: cosmo.inv_efunc(1.0 / a - 1.0) / a**2  # noqa: E731
    value, _ = integrate.quad(f, 0.0, a_z, epsabs=0.0, epsrel=1e-13, limit=400)
    return value


def test_distances_match_astropy(case):
    cosmo, table = case
    # astropy.cosmology's own integration (scipy quad; elliptic integrals for the model without
    # radiation, which lose about 1e-7 relative at z = 1e-8): agreement to 2e-7 or better.
    for name in ["comoving_distance", "angular_diameter_distance", "luminosity_distance"]:
        expected = getattr(cosmo, name)(REDSHIFTS).to_value(u.Mpc)
        np.testing.assert_allclose(getattr(table, name)(REDSHIFTS), expected, rtol=2e-7, atol=0.0, err_msg=name)
    expected = cosmo.comoving_transverse_distance(REDSHIFTS).to_value(u.Mpc)
    np.testing.assert_allclose(table.transverse_comoving_distance(REDSHIFTS), expected, rtol=2e-7, atol=0.0)
    expected = cosmo.lookback_time(REDSHIFTS).to_value(u.Gyr)
    np.testing.assert_allclose(table.lookback_time(REDSHIFTS), expected, rtol=2e-7, atol=0.0)
    # astropy's age(z) integrates in z from z to infinity with quad, which is only good to a few
    # 1e-6 at z ~ 500-1000 (measured against the a-integral of the next test: up to 3.9e-6), hence
    # 5e-6 here; astropy's age(0) - lookback_time(z) avoids that and agrees to 5e-7 (the absolute
    # error of age(0) divided by a small age).
    expected = cosmo.age(REDSHIFTS).to_value(u.Gyr)
    np.testing.assert_allclose(table.age(REDSHIFTS), expected, rtol=5e-6, atol=0.0)
    expected = (cosmo.age(0) - cosmo.lookback_time(REDSHIFTS)).to_value(u.Gyr)
    np.testing.assert_allclose(table.age(REDSHIFTS), expected, rtol=5e-7, atol=0.0)
    assert table.error_estimate < 1e-8


def test_times_match_direct_quadrature(case):
    # Age and conformal time against scipy quad in the scale factor (epsrel 1e-13).
    cosmo, table = case
    z = np.concatenate([[0.0, 1e-8, 0.5, 1100.0, 5000.0, 1e4], REDSHIFTS[3:15]])
    th = cosmo.hubble_time.to_value(u.Gyr)
    dh = cosmo.hubble_distance.to_value(u.Mpc)
    age_ref = np.array([th * _reference_integral(cosmo, zi, kind="age") for zi in z])
    eta_ref = np.array([_reference_integral(cosmo, zi, kind="conformal") for zi in z])
    np.testing.assert_allclose(table.age(z), age_ref, rtol=1e-8)
    np.testing.assert_allclose(table.conformal_time(z), th * eta_ref, rtol=1e-8)
    np.testing.assert_allclose(table.particle_horizon(z), dh * eta_ref, rtol=1e-8)
    # The comoving distance is the difference of two particle horizons.
    dc_ref = dh * (eta_ref[0] - eta_ref)
    nz = z > 0.1
    np.testing.assert_allclose(table.comoving_distance(z[nz]), dc_ref[nz], rtol=1e-8)


def test_high_redshift_distances(case):
    # Beyond recombination, up to the table's z_max = 1e4, against astropy's quad (distances).
    cosmo, table = case
    z = np.array([2000.0, 5000.0, 9999.0, 1e4])
    expected = cosmo.comoving_distance(z).to_value(u.Mpc)
    np.testing.assert_allclose(table.comoving_distance(z), expected, rtol=1e-8)


def test_derived_distances_are_consistent(case):
    cosmo, table = case
    z = REDSHIFTS
    dm = table.transverse_comoving_distance(z)
    np.testing.assert_allclose(table.angular_diameter_distance(z) * (1 + z) ** 2, table.luminosity_distance(z), rtol=1e-14)
    np.testing.assert_allclose(table.proper_distance_at_emission(z) * (1 + z), table.comoving_distance(z), rtol=1e-14)
    if cosmo.Ok0 == 0:
        np.testing.assert_allclose(table.proper_distance_at_emission(z), table.angular_diameter_distance(z), rtol=1e-14)
    else:
        # Curved: D_M = D_H sinn(sqrt|Ok| D_C / D_H) / sqrt|Ok| differs from D_C.
        assert not np.allclose(dm[1:], table.comoving_distance(z)[1:], rtol=1e-6)
    # c * eta: the particle horizon in Mpc is c times the conformal time in Gyr.
    c_mpc_per_gyr = (1.0 * u.Gyr * speed_of_light).to_value(u.Mpc)
    np.testing.assert_allclose(table.particle_horizon(z), c_mpc_per_gyr * table.conformal_time(z), rtol=1e-12)
    # Exact values at z = 0.
    assert table.comoving_distance(0.0) == 0.0
    assert table.lookback_time(0.0) == 0.0
    assert table.age(0.0) == pytest.approx(cosmo.age(0).to_value(u.Gyr), rel=1e-9)


def test_planck18_reference_values():
    table = physics.DistanceTable()
    assert table.cosmo is Planck18
    # Planck 2018 results VI (A&A 641, A6, 2020), table 2: age 13.787 +- 0.020 Gyr.
    assert table.age(0.0) == pytest.approx(13.787, abs=0.020)
    # From memory: the comoving distance to last scattering (z ~ 1090) is about 13.9 Gpc, and the
    # particle horizon today about 14.2 Gpc.
    assert table.comoving_distance(1090.0) == pytest.approx(13870.0, rel=0.01)
    assert table.particle_horizon(0.0) == pytest.approx(14200.0, rel=0.01)
    # From memory: the universe was about 370 thousand years old at last scattering.
    assert table.age(1090.0) * 1e6 == pytest.approx(372.0, rel=0.03)


def test_shapes_types_and_quantities():
    table = physics.DistanceTable(z_max=10.0)
    assert isinstance(table.comoving_distance(1.0), float)
    grid = np.linspace(0.0, 10.0, 12).reshape(3, 4)
    assert table.luminosity_distance(grid).shape == (3, 4)
    assert table.comoving_distance([]).shape == (0,)
    assert table.comoving_distance(2.0 * cu.redshift) == table.comoving_distance(2.0)
    assert table.age(2.0 * u.dimensionless_unscaled) == table.age(2.0)
    with pytest.raises(InvalidInputError, match="dimensionless"):
        table.age(2.0 * u.m)


def test_one_call_functions_match_table():
    z = np.linspace(0.0, 1100.0, 50)
    table = physics.DistanceTable()
    for name in [
        "comoving_distance", "transverse_comoving_distance", "angular_diameter_distance", "luminosity_distance",
        "lookback_time", "age", "conformal_time", "particle_horizon", "proper_distance_at_emission",
    ]:  # fmt: skip
        # Different grids (the one-call table stops at max(z)): agreement within the interpolation error.
        np.testing.assert_allclose(getattr(physics, name)(z), getattr(table, name)(z), rtol=1e-8, atol=0.0, err_msg=name)
    assert physics.age(0.0, COSMOLOGIES["open"]) == pytest.approx(COSMOLOGIES["open"].age(0).to_value(u.Gyr), rel=1e-9)


def test_table_is_immutable_and_described():
    table = physics.DistanceTable(z_max=100.0, n_nodes=500)
    assert table.n_nodes == 500 and table.z_max == 100.0
    assert table.hubble_distance_mpc == pytest.approx(Planck18.hubble_distance.to_value(u.Mpc), rel=1e-15)
    with pytest.raises(AttributeError, match="immutable"):
        table.z_max = 5.0
    with pytest.raises(AttributeError):
        table._h = 1.0
    assert "Planck18" in repr(table)


def test_closed_universe_beyond_antipode():
    # A strongly closed model: sqrt(-Ok0) D_C / D_H reaches pi near z = 10.
    cosmo = LambdaCDM(H0=70.0, Om0=0.3, Ode0=1.5)
    table = physics.DistanceTable(cosmo, z_max=100.0)
    z_anti = table.antipode_redshift
    assert z_anti is not None and 5.0 < z_anti < 20.0
    k = math.sqrt(-cosmo.Ok0)
    assert k * table.comoving_distance(z_anti) / table.hubble_distance_mpc == pytest.approx(math.pi, rel=1e-10)
    # Below the antipode, astropy agrees.
    z = np.array([1.0, 0.5 * z_anti])
    np.testing.assert_allclose(
        table.transverse_comoving_distance(z), cosmo.comoving_transverse_distance(z).to_value(u.Mpc), rtol=1e-7
    )
    for method in ["transverse_comoving_distance", "angular_diameter_distance", "luminosity_distance"]:
        with pytest.raises(InvalidInputError, match="antipode"):
            getattr(table, method)([1.0, 1.01 * z_anti])
    # The radial quantities stay defined.
    assert table.comoving_distance(1.01 * z_anti) > 0


def test_invalid_cosmologies_and_inputs():
    with pytest.raises(InvalidInputError, match="negative"):
        physics.DistanceTable(LambdaCDM(H0=70.0, Om0=0.3, Ode0=-0.2))
    with pytest.raises(InvalidInputError, match="FLRW"):
        physics.DistanceTable("Planck18")
    # Om0 = 0.3, Ode0 = 2: E(z)^2 turns negative near z = 0.55 (a bounce, no big bang).
    with pytest.raises(InvalidInputError, match="not positive"):
        physics.DistanceTable(LambdaCDM(H0=70.0, Om0=0.3, Ode0=2.0))
    for bad in [0.0, -1.0, np.inf, 1e11, "high"]:
        with pytest.raises(InvalidInputError, match="'z_max'"):
            physics.DistanceTable(z_max=bad)
    with pytest.raises(InvalidInputError, match="'n_nodes'"):
        physics.DistanceTable(n_nodes=3)
    table = physics.DistanceTable(z_max=10.0)
    with pytest.raises(InvalidInputError, match=r"larger z_max"):
        table.comoving_distance([1.0, 11.0])
    with pytest.raises(InvalidInputError, match=r"\[0, 10\]"):
        table.age(-0.5)
    with pytest.raises(InvalidInputError, match="NaN"):
        table.lookback_time([1.0, np.nan])
    with pytest.raises(InvalidInputError, match="NaN"):
        physics.comoving_distance(np.nan)
