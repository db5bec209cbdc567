"""Blackbody radiation and CMB temperature: Planck's law, photon densities, unit conversions at one frequency.

Units
-----
Arguments accept an :class:`astropy.units.Quantity` or a plain number in the
unit their name carries (``nu_ghz`` in GHz, ``wavelength_mm`` in mm, ``t_k``
and ``t0_k`` in kelvin, ``v_km_s`` in km/s, ``amplitude_k`` in K).  Frequency
arguments also accept a wavelength ``Quantity`` (converted with
:func:`astropy.units.spectral`).  Results are always plain float64 (a Python
``float`` for scalar input, an ``ndarray`` otherwise) in SI units unless the
function name says otherwise:

=============================== =========================================
quantity                        unit of the result
=============================== =========================================
photon number density           m^-3
photon energy density           J m^-3
mean photon energy              J
Planck's law, frequency form    W m^-2 Hz^-1 sr^-1
Planck's law, wavelength form   W m^-2 m^-1 sr^-1
derivative dB_nu/dT             W m^-2 Hz^-1 sr^-1 K^-1
peak frequency / wavelength     GHz / mm (in the function names)
speeds / temperatures           km/s / K
=============================== =========================================

Every physical constant comes from CODATA through :mod:`scipy.constants`
(and the parsec from :mod:`astropy.units`); zeta(3) from
:func:`scipy.special.zeta`; the two Wien constants are found by root finding
when the module is imported.  The default present-day temperature is astropy's
``Planck18.Tcmb0`` (2.7255 K), consistent with the FIRAS measurement
T0 = 2.72548 +- 0.00057 K (Fixsen 2009, ApJ 707, 916).

Unit conversions
----------------
Three units describe a small sky signal at frequency nu: the thermodynamic
temperature fluctuation ``K_CMB`` (the change of the temperature of a
blackbody at T0), the Rayleigh-Jeans brightness temperature ``K_RJ``
(I_nu = 2 k nu^2 T_RJ / c^2) and the specific intensity ``MJy/sr``
(1 MJy/sr = 1e-20 W m^-2 Hz^-1 sr^-1).  Each unit is a spectral shape S(nu):
one unit of it is the intensity change S(nu),

* K_CMB: S(nu) = dB_nu/dT at T0,
* K_RJ:  S(nu) = 2 k nu^2 / c^2,
* MJy/sr: S(nu) = 1e-20 (nu / nu_ref)^alpha W m^-2 Hz^-1 sr^-1.

A signal of value X in unit A is worth X * F(A -> B) in unit B with
F(A -> B) = S_A / S_B at one frequency and, for a bandpass with transmission
tau(nu), F(A -> B) = integral(tau S_A dnu) / integral(tau S_B dnu): both
descriptions give the same band-integrated detector response.  ``tau`` is the
relative response to specific intensity (the detector output is
proportional to integral(tau I_nu dnu)); the integrals use the trapezoidal
rule on the table's own frequencies.  The intensity unit needs a reference
frequency and a spectral index: the defaults, nu_ref = the
transmission-weighted mean frequency of the band and alpha = -1
(nu I_nu constant), are the IRAS convention.  Prefixed units are accepted:
``K_CMB``, ``mK_CMB``, ``uK_CMB``, the same for ``_RJ``, and ``Jy/sr``,
``kJy/sr``, ``MJy/sr``.

Band-averaged conversions are in :mod:`cmbtools.physics.bandpass`; the
kinematic dipole in :mod:`cmbtools.physics.motion`.
"""

from __future__ import annotations

__all__ = [
    "DEFAULT_CMB_TEMPERATURE_K",
    "RADIATION_CONSTANT",
    "WIEN_FREQUENCY_ROOT",
    "WIEN_WAVELENGTH_ROOT",
    "SIGNAL_UNITS",
    "cmb_temperature",
    "redshift_at_temperature",
    "photon_number_density",
    "photon_energy_density",
    "mean_photon_energy",
    "photon_density_parameter_h2",
    "planck_radiance",
    "planck_radiance_wavelength",
    "planck_radiance_derivative",
    "peak_frequency_ghz",
    "peak_wavelength_mm",
    "conversion_factor",
]

import math

import numpy as np
import scipy.constants as const
from astropy import units as u
from scipy import optimize, special

from cmbtools.exceptions import InvalidInputError

# --------------------------------------------------------------------------- constants

_H = const.h
_HBAR = const.hbar
_K = const.k
_C = const.c
_G = const.G
_ZETA3 = float(special.zeta(3.0))
_MPC_M = float(u.Mpc.to(u.m))
_MJY_SR = float((u.MJy / u.sr).to(u.W / (u.m**2 * u.Hz * u.sr)))  # 1 MJy/sr in W m^-2 Hz^-1 sr^-1


def _default_t0() -> float:
    from astropy.cosmology import Planck18

    return float(Planck18.Tcmb0.to_value(u.K))


#: Default present-day CMB temperature in K: astropy's ``Planck18.Tcmb0`` (2.7255 K).
DEFAULT_CMB_TEMPERATURE_K = _default_t0()

#: Radiation constant a = pi^2 k^4 / (15 hbar^3 c^3) in J m^-3 K^-4 (u = a T^4).
RADIATION_CONSTANT = math.pi**2 * _K**4 / (15.0 * _HBAR**3 * _C**3)


def _wien_root(power: int) -> float:
    # The maximum of x^power / (e^x - 1) solves x = power (1 - e^-x).
    return float(optimize.brentq(lambda x: x + power * np.expm1(-x), 1.0, 2.0 * power, xtol=1e-15, rtol=4 * np.finfo(float).eps))


#: x = h nu / (k T) at the maximum of B_nu (Wien's law, frequency form), about 2.8214.
WIEN_FREQUENCY_ROOT = _wien_root(3)

#: x = h c / (lambda k T) at the maximum of B_lambda (Wien's law, wavelength form), about 4.9651.
WIEN_WAVELENGTH_ROOT = _wien_root(5)

# Signal units: name -> (shape, scale).  The value of one unit is scale * S_shape(nu).
_TEMPERATURE_PREFIXES = {"": 1.0, "m": 1e-3, "u": 1e-6, "µ": 1e-6, "n": 1e-9}
_UNITS: dict[str, tuple[str, float]] = {}
for _prefix, _scale in _TEMPERATURE_PREFIXES.items():
    _UNITS[f"{_prefix}k_cmb"] = ("cmb", _scale)
    _UNITS[f"{_prefix}k_rj"] = ("rj", _scale)
for _prefix, _scale in {"": 1e-6, "k": 1e-3, "m": 1.0}.items():
    _UNITS[f"{_prefix}jy/sr"] = ("intensity", _scale)
del _prefix, _scale

#: The unit names accepted by the conversion functions (case-insensitive; ``u`` or ``µ`` for micro).
SIGNAL_UNITS = (
    "K_CMB", "mK_CMB", "uK_CMB", "nK_CMB",
    "K_RJ", "mK_RJ", "uK_RJ", "nK_RJ",
    "Jy/sr", "kJy/sr", "MJy/sr",
)  # fmt: skip

# --------------------------------------------------------------------------- boundary helpers


def _values(value, name, unit, *, equivalencies=(), minimum=0.0, allow_equal=False, finite=True):
    """Return ``value`` as a float64 array in ``unit`` after checking it is > minimum (or >=)."""
    if isinstance(value, u.Quantity):
        try:
            a = np.asarray(value.to_value(unit, equivalencies=list(equivalencies)), dtype=np.float64)
        except u.UnitConversionError:
            raise InvalidInputError(
                f"The {name!r} parameter must be a quantity convertible to {unit}. Got unit {value.unit} instead."
            ) from None
    else:
        try:
            a = np.asarray(value, dtype=np.float64)
        except (TypeError, ValueError):
            raise InvalidInputError(f"The {name!r} parameter must be a number or an array of numbers. Got {value!r} instead.") from None
    if finite and not np.all(np.isfinite(a)):
        raise InvalidInputError(f"The {name!r} parameter must be finite. Got {value!r} instead.")
    if minimum is not None:
        bad = a < minimum if allow_equal else a <= minimum
        if np.any(bad):
            relation = ">=" if allow_equal else ">"
            first = float(a[bad].flat[0]) if a.ndim else float(a)
            unit_text = "" if unit == u.dimensionless_unscaled else f" {unit}"
            raise InvalidInputError(f"The {name!r} parameter must be {relation} {minimum:g}{unit_text}. Got {first!r} instead.")
    return a


def _frequency_hz(nu_ghz, name="nu_ghz"):
    return _values(nu_ghz, name, u.GHz, equivalencies=u.spectral()) * 1e9


def _temperature(t_k, name="t_k"):
    if t_k is None:
        return np.float64(DEFAULT_CMB_TEMPERATURE_K)
    return _values(t_k, name, u.K, equivalencies=u.temperature())


def _scalar_temperature(t_k, name="t0_k") -> float:
    t = _temperature(t_k, name)
    if t.ndim != 0:
        raise InvalidInputError(f"The {name!r} parameter must be a single temperature. Got shape {t.shape} instead.")
    return float(t)


def _broadcast(a, b, name_a, name_b):
    try:
        return np.broadcast_arrays(a, b)
    except ValueError:
        raise InvalidInputError(
            f"The {name_a!r} and {name_b!r} parameters must broadcast together. Got shapes {np.shape(a)} and {np.shape(b)} instead."
        ) from None


def _out(a):
    a = np.asarray(a, dtype=np.float64)
    return float(a) if a.ndim == 0 else a


# --------------------------------------------------------------------------- temperature and photons


def cmb_temperature(z, *, t0_k=None):
    """CMB temperature at redshift z, T(z) = T0 (1 + z).

    Parameters
    ----------
    z : float or array_like
        Redshift, > -1.
    t0_k : float or Quantity, optional
        Present-day temperature in K (default :data:`DEFAULT_CMB_TEMPERATURE_K`).

    Returns
    -------
    float or ndarray
        Temperature in K, shaped like ``z``.

    Examples
    --------
    >>> round(cmb_temperature(1089.0), 2)
    2970.79
    """
    t0 = _scalar_temperature(t0_k)
    zz = _values(z, "z", u.dimensionless_unscaled, minimum=-1.0)
    return _out(t0 * (1.0 + zz))


def redshift_at_temperature(t_k, *, t0_k=None):
    """Redshift at which the CMB had temperature ``t_k``: z = T / T0 - 1.

    Parameters
    ----------
    t_k : float, array_like or Quantity
        Temperature in K, > 0.
    t0_k : float or Quantity, optional
        Present-day temperature in K (default :data:`DEFAULT_CMB_TEMPERATURE_K`).

    Returns
    -------
    float or ndarray
        Redshift, shaped like ``t_k``.
    """
    t0 = _scalar_temperature(t0_k)
    t = _values(t_k, "t_k", u.K, equivalencies=u.temperature())
    return _out(t / t0 - 1.0)


def photon_number_density(t_k=None):
    """Number density of blackbody photons, n = 2 zeta(3) / pi^2 (k T / (hbar c))^3.

    Parameters
    ----------
    t_k : float, array_like or Quantity, optional
        Temperature in K (default :data:`DEFAULT_CMB_TEMPERATURE_K`).

    Returns
    -------
    float or ndarray
        Photons per m^3 (about 4.107e8 m^-3, i.e. 410.7 cm^-3, at 2.7255 K).
    """
    t = _temperature(t_k)
    return _out(2.0 * _ZETA3 / math.pi**2 * (_K * t / (_HBAR * _C)) ** 3)


def photon_energy_density(t_k=None):
    """Energy density of blackbody radiation, u = a T^4 with a = pi^2 k^4 / (15 hbar^3 c^3).

    Parameters
    ----------
    t_k : float, array_like or Quantity, optional
        Temperature in K (default :data:`DEFAULT_CMB_TEMPERATURE_K`).

    Returns
    -------
    float or ndarray
        Energy density in J m^-3.
    """
    t = _temperature(t_k)
    return _out(RADIATION_CONSTANT * t**4)


def mean_photon_energy(t_k=None):
    """Mean energy of a blackbody photon, u / n = pi^4 / (30 zeta(3)) k T (about 2.701 k T).

    Parameters
    ----------
    t_k : float, array_like or Quantity, optional
        Temperature in K (default :data:`DEFAULT_CMB_TEMPERATURE_K`).

    Returns
    -------
    float or ndarray
        Energy in J.
    """
    t = _temperature(t_k)
    return _out(math.pi**4 / (30.0 * _ZETA3) * _K * t)


def photon_density_parameter_h2(t0_k=None) -> float:
    """Physical photon density today, Omega_gamma h^2 = a T0^4 / (rho_crit,100 c^2).

    ``rho_crit,100 = 3 (100 km/s/Mpc)^2 / (8 pi G)`` is the critical density
    for h = 1, so the result does not depend on the Hubble constant.

    Parameters
    ----------
    t0_k : float or Quantity, optional
        Present-day temperature in K (default :data:`DEFAULT_CMB_TEMPERATURE_K`).

    Returns
    -------
    float
        Omega_gamma h^2 (about 2.47e-5 at 2.7255 K).
    """
    t0 = _scalar_temperature(t0_k)
    h100 = 1.0e5 / _MPC_M  # 100 km/s/Mpc in s^-1
    rho_crit_100 = 3.0 * h100**2 / (8.0 * math.pi * _G)
    return float(RADIATION_CONSTANT * t0**4 / (rho_crit_100 * _C**2))


# --------------------------------------------------------------------------- Planck's law


def planck_radiance(nu_ghz, t_k=None):
    """Planck's law in frequency form, B_nu(T) = 2 h nu^3 / c^2 / (exp(h nu / k T) - 1).

    Parameters
    ----------
    nu_ghz : float, array_like or Quantity
        Frequency in GHz (> 0); a wavelength Quantity is converted.
    t_k : float, array_like or Quantity, optional
        Temperature in K (default :data:`DEFAULT_CMB_TEMPERATURE_K`); broadcast with ``nu_ghz``.

    Returns
    -------
    float or ndarray
        Spectral radiance in W m^-2 Hz^-1 sr^-1.

    Examples
    --------
    >>> f"{planck_radiance(143.0):.4e}"
    '3.7808e-18'
    """
    nu, t = _broadcast(_frequency_hz(nu_ghz), _temperature(t_k), "nu_ghz", "t_k")
    x = _H * nu / (_K * t)
    with np.errstate(over="ignore"):
        return _out(2.0 * _H * nu**3 / _C**2 / np.expm1(x))


def planck_radiance_wavelength(wavelength_mm, t_k=None):
    """Planck's law in wavelength form, B_lambda(T) = 2 h c^2 / lambda^5 / (exp(h c / lambda k T) - 1).

    Parameters
    ----------
    wavelength_mm : float, array_like or Quantity
        Wavelength in mm (> 0); a frequency Quantity is converted.
    t_k : float, array_like or Quantity, optional
        Temperature in K (default :data:`DEFAULT_CMB_TEMPERATURE_K`); broadcast with ``wavelength_mm``.

    Returns
    -------
    float or ndarray
        Spectral radiance in W m^-2 m^-1 sr^-1 (per metre of wavelength).
    """
    lam = _values(wavelength_mm, "wavelength_mm", u.mm, equivalencies=u.spectral()) * 1e-3
    lam, t = _broadcast(lam, _temperature(t_k), "wavelength_mm", "t_k")
    x = _H * _C / (lam * _K * t)
    with np.errstate(over="ignore"):
        return _out(2.0 * _H * _C**2 / lam**5 / np.expm1(x))


def _rj_shape(nu_hz):
    return 2.0 * _K * nu_hz**2 / _C**2


def _cmb_shape(nu_hz, t):
    """dB_nu/dT = 2 k nu^2 / c^2 * x^2 e^x / (e^x - 1)^2, written to stay finite for large x."""
    x = _H * nu_hz / (_K * t)
    with np.errstate(over="ignore", under="ignore"):
        g = x**2 * np.exp(-x) / np.expm1(-x) ** 2
    return _rj_shape(nu_hz) * g


def planck_radiance_derivative(nu_ghz, t_k=None):
    """Temperature derivative of Planck's law, dB_nu/dT = B_nu x e^x / (T (e^x - 1)), x = h nu / k T.

    Parameters
    ----------
    nu_ghz : float, array_like or Quantity
        Frequency in GHz (> 0); a wavelength Quantity is converted.
    t_k : float, array_like or Quantity, optional
        Temperature in K (default :data:`DEFAULT_CMB_TEMPERATURE_K`).

    Returns
    -------
    float or ndarray
        W m^-2 Hz^-1 sr^-1 K^-1.
    """
    nu, t = _broadcast(_frequency_hz(nu_ghz), _temperature(t_k), "nu_ghz", "t_k")
    return _out(_cmb_shape(nu, t))


def peak_frequency_ghz(t_k=None):
    """Frequency of the maximum of B_nu (Wien's law, frequency form): nu = x k T / h, x = 2.8214...

    Parameters
    ----------
    t_k : float, array_like or Quantity, optional
        Temperature in K (default :data:`DEFAULT_CMB_TEMPERATURE_K`).

    Returns
    -------
    float or ndarray
        Frequency in GHz (about 160.2 GHz at 2.7255 K).
    """
    t = _temperature(t_k)
    return _out(WIEN_FREQUENCY_ROOT * _K * t / _H * 1e-9)


def peak_wavelength_mm(t_k=None):
    """Wavelength of the maximum of B_lambda (Wien's law, wavelength form): lambda = h c / (x k T), x = 4.9651...

    Parameters
    ----------
    t_k : float, array_like or Quantity, optional
        Temperature in K (default :data:`DEFAULT_CMB_TEMPERATURE_K`).

    Returns
    -------
    float or ndarray
        Wavelength in mm (about 1.063 mm at 2.7255 K).
    """
    t = _temperature(t_k)
    return _out(_H * _C / (WIEN_WAVELENGTH_ROOT * _K * t) * 1e3)


# --------------------------------------------------------------------------- unit conversions


def _parse_unit(unit, name):
    if not isinstance(unit, str) or unit.strip().lower() not in _UNITS:
        raise InvalidInputError(f"The {name!r} parameter must be one of {', '.join(SIGNAL_UNITS)}. Got {unit!r} instead.")
    return _UNITS[unit.strip().lower()]


def _shape_values(shape, nu_hz, t0, reference_hz, spectral_index):
    if shape == "cmb":
        return _cmb_shape(nu_hz, t0)
    if shape == "rj":
        return _rj_shape(nu_hz)
    return _MJY_SR * (nu_hz / reference_hz) ** spectral_index


def conversion_factor(nu_ghz, source, target, *, t0_k=None):
    """Factor turning a small signal in unit ``source`` into unit ``target`` at one frequency.

    ``value_in_target = value_in_source * conversion_factor(nu_ghz, source, target)``.
    See the module notes for the definition of each unit.

    Parameters
    ----------
    nu_ghz : float, array_like or Quantity
        Frequency in GHz (> 0).
    source, target : str
        One of :data:`SIGNAL_UNITS`, e.g. ``"K_CMB"``, ``"uK_RJ"``, ``"MJy/sr"``.
    t0_k : float or Quantity, optional
        Temperature of the blackbody the K_CMB unit refers to (default T0).

    Returns
    -------
    float or ndarray
        Shaped like ``nu_ghz``.

    Examples
    --------
    >>> round(conversion_factor(143.0, "K_CMB", "MJy/sr"), 2)
    379.93
    >>> round(conversion_factor(143.0, "K_CMB", "K_RJ"), 4)
    0.6047
    """
    shape_a, scale_a = _parse_unit(source, "source")
    shape_b, scale_b = _parse_unit(target, "target")
    nu = _frequency_hz(nu_ghz)
    t0 = _scalar_temperature(t0_k)
    # At a single frequency the intensity unit's reference frequency is nu itself.
    sa = _shape_values(shape_a, nu, t0, nu, 0.0)
    sb = _shape_values(shape_b, nu, t0, nu, 0.0)
    return _out(scale_a * sa / (scale_b * sb))
