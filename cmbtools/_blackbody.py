"""Blackbody radiation and CMB temperature: Planck's law, photon densities, unit conversions, motion.

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

The kinematic dipole
--------------------
An observer moving with speed v = beta c through the CMB sees the exact
Doppler pattern T(theta) = T0 / (gamma (1 - beta cos theta)), theta measured
from the direction of motion.  Its Legendre coefficients
a_l = (2l+1)/2 * integral T P_l d(cos theta) are, in closed form,

    a_l = T0 (2l+1) sqrt(pi) l! beta^l / (gamma Gamma(l + 3/2) 2^(l+1))
          * 2F1((l+1)/2, (l+2)/2; l+3/2; beta^2),

from Neumann's integral of P_l / (x - mu) (the Legendre function of the
second kind).  The dipole amplitude is a_1 = T0 beta (1 + beta^2/10 + ...),
i.e. Delta T / T0 = v / c to first order; it is exactly the amplitude ``|d|``
of a full-sky fit m = m0 + d . n.  The kinematic quadrupole is
a_2 = (2/3) T0 beta^2 (1 + ...), the coefficient of P_2(cos theta); the
coefficient of cos^2(theta) in the expansion of T is T0 beta^2.
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
    "Bandpass",
    "read_bandpass",
    "bandpass_conversion_factor",
    "dipole_from_velocity",
    "quadrupole_from_velocity",
    "velocity_from_dipole",
    "ObserverMotion",
]

import functools
import math
from dataclasses import dataclass, field

import numpy as np
import scipy.constants as const
from astropy import units as u
from scipy import optimize, special
from scipy.integrate import trapezoid

from ._io import check_input_file
from .exceptions import InputFileError, InvalidInputError

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


def _check_bandpass(freq, trans):
    """Return the problem with a bandpass table, or None."""
    if freq.ndim != 1 or trans.ndim != 1 or freq.size != trans.size:
        return f"frequencies and transmission must be two 1-d columns of equal length; got shapes {freq.shape} and {trans.shape}"
    if freq.size < 2:
        return f"a bandpass needs at least 2 rows; got {freq.size}"
    for label, col in (("frequency", freq), ("transmission", trans)):
        bad = ~np.isfinite(col)
        if np.any(bad):
            return f"row {int(np.argmax(bad)) + 1}: the {label} is not a finite number ({col[bad][0]!r})"
    if np.any(freq <= 0):
        i = int(np.argmax(freq <= 0))
        return f"row {i + 1}: frequencies must be > 0 GHz; got {freq[i]!r}"
    if np.any(trans < 0):
        i = int(np.argmax(trans < 0))
        return f"row {i + 1}: transmission must be >= 0; got {trans[i]!r}"
    step = np.diff(freq)
    if np.any(step <= 0):
        i = int(np.argmax(step <= 0)) + 1
        kind = "repeats" if step[i - 1] == 0 else "is below"
        return (
            f"row {i + 1}: frequencies must be strictly increasing; {freq[i]!r} GHz {kind} "
            f"the previous row's {freq[i - 1]!r} GHz"
        )
    with np.errstate(over="ignore", invalid="ignore"):
        area = trapezoid(trans, freq)
        first_moment = trapezoid(freq * trans, freq)
    if not (np.isfinite(area) and np.isfinite(first_moment)):
        return ("the band integrals overflow double precision: the frequencies or the transmission are far too "
                "large (the transmission may be rescaled freely)")
    if area <= 0:
        return "the transmission is zero everywhere (no band-integrated response)"
    return None


@dataclass(frozen=True, eq=False)
class Bandpass:
    """The spectral response of a detector: transmission tabulated against frequency.

    Parameters
    ----------
    frequencies_ghz : array_like of shape (n,)
        Strictly increasing frequencies in GHz (> 0), n >= 2.
    transmission : array_like of shape (n,)
        Relative response to specific intensity (>= 0, any normalisation, not all zero).
    origin : str, default="arrays"
        Where the table came from (the file path for :func:`read_bandpass`).

    Attributes
    ----------
    mean_frequency_ghz : float
        Transmission-weighted mean frequency, integral(nu tau) / integral(tau), in GHz.

    Raises
    ------
    InvalidInputError
        If the table is not two finite columns, has fewer than 2 rows, negative
        transmission, or frequencies that are not strictly increasing.

    See Also
    --------
    read_bandpass : read the table from a text or CSV file.
    bandpass_conversion_factor : band-averaged unit conversions.
    """

    frequencies_ghz: np.ndarray
    transmission: np.ndarray
    origin: str = field(default="arrays")

    def __post_init__(self):
        try:
            freq = np.array(self.frequencies_ghz, dtype=np.float64)
            trans = np.array(self.transmission, dtype=np.float64)
        except (TypeError, ValueError):
            raise InvalidInputError("The bandpass must be two columns of numbers (frequency in GHz, transmission).") from None
        problem = _check_bandpass(freq, trans)
        if problem is not None:
            raise InvalidInputError(f"Invalid bandpass: {problem}.")
        freq.flags.writeable = False
        trans.flags.writeable = False
        object.__setattr__(self, "frequencies_ghz", freq)
        object.__setattr__(self, "transmission", trans)

    @functools.cached_property
    def mean_frequency_ghz(self) -> float:
        f, t = self.frequencies_ghz, self.transmission
        return float(trapezoid(f * t, f) / trapezoid(t, f))

    def conversion_factor(self, source, target, *, t0_k=None, reference_ghz=None, spectral_index=-1.0) -> float:
        """Band-averaged conversion factor; see :func:`bandpass_conversion_factor`."""
        return bandpass_conversion_factor(
            self, source, target, t0_k=t0_k, reference_ghz=reference_ghz, spectral_index=spectral_index
        )


def read_bandpass(path) -> Bandpass:
    """Read a bandpass table: two columns, frequency in GHz and transmission.

    Columns are separated by a comma or by white space.  Blank lines and lines
    starting with ``#`` are skipped; the first remaining line may be a header
    made only of non-numeric labels (e.g. ``frequency_ghz,transmission``).

    Parameters
    ----------
    path : str or path-like
        The text or CSV file.

    Returns
    -------
    Bandpass

    Raises
    ------
    InputFileError
        If the file is missing or unreadable, a row does not have exactly two
        numbers, or the table fails the checks of :class:`Bandpass`.
    """
    p = check_input_file(path)
    try:
        text = p.read_text(encoding="utf-8-sig")  # -sig: skip a byte-order mark
    except UnicodeDecodeError:
        raise InputFileError(p, "not a text file (cannot decode as UTF-8)") from None
    rows = []
    header_allowed = True
    for number, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        fields = [f.strip() for f in line.split(",")] if "," in line else line.split()
        values = []
        for item in fields:
            try:
                values.append(float(item))
            except ValueError:
                values.append(None)
        if header_allowed and all(v is None for v in values):
            header_allowed = False
            continue
        header_allowed = False
        if len(fields) != 2:
            raise InputFileError(p, f"line {number}: expected 2 columns (frequency in GHz, transmission), found {len(fields)}")
        for item, v in zip(fields, values):
            if v is None:
                raise InputFileError(p, f"line {number}: {item!r} is not a number")
        rows.append(values)
    freq = np.array([r[0] for r in rows], dtype=np.float64)
    trans = np.array([r[1] for r in rows], dtype=np.float64)
    problem = _check_bandpass(freq, trans)
    if problem is not None:
        raise InputFileError(p, f"invalid bandpass: {problem}")
    return Bandpass(freq, trans, origin=str(p))


def _as_bandpass(bandpass) -> Bandpass:
    if isinstance(bandpass, Bandpass):
        return bandpass
    if isinstance(bandpass, (str, bytes)) or hasattr(bandpass, "__fspath__"):
        return read_bandpass(bandpass)
    try:
        freq, trans = bandpass
    except (TypeError, ValueError):
        try:
            table = np.asarray(bandpass, dtype=np.float64)
        except (TypeError, ValueError):
            table = None
        if table is None or table.ndim != 2 or table.shape[1] != 2:
            raise InvalidInputError(
                "The 'bandpass' parameter must be a Bandpass, a file path, a pair (frequencies_ghz, "
                "transmission) or an array of shape (n, 2)."
            ) from None
        freq, trans = table[:, 0], table[:, 1]
    return Bandpass(freq, trans)


def bandpass_conversion_factor(bandpass, source, target, *, t0_k=None, reference_ghz=None, spectral_index=-1.0) -> float:
    """Band-averaged factor turning a small signal in unit ``source`` into unit ``target``.

    F = integral(tau S_source dnu) / integral(tau S_target dnu) with the
    spectral shapes S of the module notes, integrated with the trapezoidal
    rule on the bandpass table.  Only conversions to or from an intensity unit
    depend on ``reference_ghz`` and ``spectral_index``.

    Parameters
    ----------
    bandpass : Bandpass, path, (frequencies_ghz, transmission) or array of shape (n, 2)
        The detector's response.
    source, target : str
        One of :data:`SIGNAL_UNITS`.
    t0_k : float or Quantity, optional
        Temperature the K_CMB unit refers to (default T0).
    reference_ghz : float or Quantity, optional
        Reference frequency of the intensity unit (default: the band's
        transmission-weighted mean frequency).
    spectral_index : float, default=-1.0
        alpha in I_nu proportional to nu^alpha for the intensity unit; -1 is
        the IRAS convention (nu I_nu constant).

    Returns
    -------
    float

    Raises
    ------
    InvalidInputError, InputFileError
        For a bad bandpass table, unit name or reference frequency.
    """
    band = _as_bandpass(bandpass)
    shape_a, scale_a = _parse_unit(source, "source")
    shape_b, scale_b = _parse_unit(target, "target")
    t0 = _scalar_temperature(t0_k)
    ref = band.mean_frequency_ghz if reference_ghz is None else _values(reference_ghz, "reference_ghz", u.GHz, equivalencies=u.spectral())
    ref = np.asarray(ref, dtype=np.float64)
    if ref.ndim != 0:
        raise InvalidInputError(f"The 'reference_ghz' parameter must be a single frequency. Got shape {ref.shape} instead.")
    try:
        alpha = float(spectral_index)
    except (TypeError, ValueError):
        raise InvalidInputError(f"The 'spectral_index' parameter must be a number. Got {spectral_index!r} instead.") from None
    if not np.isfinite(alpha):
        raise InvalidInputError(f"The 'spectral_index' parameter must be finite. Got {spectral_index!r} instead.")
    nu = band.frequencies_ghz * 1e9
    tau = band.transmission
    ia = trapezoid(tau * _shape_values(shape_a, nu, t0, float(ref) * 1e9, alpha), nu)
    ib = trapezoid(tau * _shape_values(shape_b, nu, t0, float(ref) * 1e9, alpha), nu)
    if not (ia > 0 and ib > 0):
        raise InvalidInputError(
            "The band-integrated response underflows to zero for this bandpass and temperature; "
            "check the frequencies (GHz) and t0_k."
        )
    return float(scale_a * ia / (scale_b * ib))


# --------------------------------------------------------------------------- the kinematic dipole


def _legendre_coefficient(ell: int, beta):
    """a_l / T0 of the exact Doppler pattern T0 / (gamma (1 - beta mu)), for 0 <= beta < 1."""
    beta = np.asarray(beta, dtype=np.float64)
    norm = (2 * ell + 1) * math.sqrt(math.pi) * math.factorial(ell) / (special.gamma(ell + 1.5) * 2.0 ** (ell + 1))
    b2 = beta * beta
    hyp = special.hyp2f1((ell + 1) / 2.0, (ell + 2) / 2.0, ell + 1.5, b2)
    return norm * beta**ell * np.sqrt(1.0 - b2) * hyp


@functools.lru_cache(maxsize=1)
def _dipole_peak():
    """(beta, a_1/T0) at the maximum of the dipole coefficient over 0 < beta < 1."""
    res = optimize.minimize_scalar(lambda b: -float(_legendre_coefficient(1, b)), bounds=(0.5, 0.99), method="bounded", options={"xatol": 1e-12})
    return float(res.x), float(-res.fun)


def _beta(v_km_s):
    v = _values(v_km_s, "v_km_s", u.km / u.s, minimum=0.0, allow_equal=True)
    beta = v * 1e3 / _C
    if np.any(beta >= 1):
        raise InvalidInputError(f"The 'v_km_s' parameter must be below the speed of light ({_C / 1e3:.0f} km/s). Got {float(np.max(v))!r} instead.")
    return beta


def dipole_from_velocity(v_km_s, *, t0_k=None):
    """Kinematic dipole amplitude seen by an observer moving at speed v through the CMB.

    The l = 1 Legendre coefficient of the exact Doppler pattern
    T0 / (gamma (1 - beta cos theta)): a_1 = T0 beta (1 + beta^2 / 10 + ...).

    Parameters
    ----------
    v_km_s : float, array_like or Quantity
        Speed in km/s, 0 <= v < c.
    t0_k : float or Quantity, optional
        Present-day temperature in K (default T0).

    Returns
    -------
    float or ndarray
        Dipole amplitude in K.

    Examples
    --------
    >>> round(dipole_from_velocity(369.82) * 1e3, 4)
    3.3621
    """
    t0 = _scalar_temperature(t0_k)
    return _out(t0 * _legendre_coefficient(1, _beta(v_km_s)))


def quadrupole_from_velocity(v_km_s, *, t0_k=None):
    """Kinematic quadrupole: the P_2(cos theta) coefficient of the exact Doppler pattern.

    a_2 = (2/3) T0 beta^2 (1 + ...), theta measured from the direction of
    motion; the coefficient of cos^2(theta) in T(theta) is 1.5 a_2 = T0 beta^2.

    Parameters
    ----------
    v_km_s : float, array_like or Quantity
        Speed in km/s, 0 <= v < c.
    t0_k : float or Quantity, optional
        Present-day temperature in K (default T0).

    Returns
    -------
    float or ndarray
        Quadrupole coefficient in K.
    """
    t0 = _scalar_temperature(t0_k)
    return _out(t0 * _legendre_coefficient(2, _beta(v_km_s)))


def velocity_from_dipole(amplitude_k, *, t0_k=None):
    """Observer speed from a measured dipole amplitude (inverse of :func:`dipole_from_velocity`).

    Solves a_1(beta) = amplitude exactly (to first order v = c amplitude / T0;
    the exact solution is smaller by the relative amount beta^2 / 10).

    Parameters
    ----------
    amplitude_k : float, array_like or Quantity
        Dipole amplitude in K (>= 0), e.g. ``|d|`` of a full-sky fit m0 + d . n.
    t0_k : float or Quantity, optional
        Present-day temperature in K (default T0).

    Returns
    -------
    float or ndarray
        Speed in km/s.

    Raises
    ------
    InvalidInputError
        If the amplitude exceeds the largest dipole any speed produces (about 0.93 T0).

    Examples
    --------
    >>> round(velocity_from_dipole(3.36208e-3), 1)
    369.8
    """
    t0 = _scalar_temperature(t0_k)
    amp = _values(amplitude_k, "amplitude_k", u.K, minimum=0.0, allow_equal=True)
    ratio = amp / t0
    beta_peak, ratio_peak = _dipole_peak()
    if np.any(ratio >= ratio_peak):
        raise InvalidInputError(
            f"The 'amplitude_k' parameter must be below {ratio_peak:.4f} T0 = {ratio_peak * t0:.4g} K, the largest "
            f"kinematic dipole of any speed. Got {float(np.max(amp))!r} instead."
        )

    def solve(r):
        if r == 0.0:
            return 0.0
        return optimize.brentq(lambda b: float(_legendre_coefficient(1, b)) - r, 0.0, beta_peak, xtol=1e-300, rtol=4 * np.finfo(float).eps, maxiter=200)

    beta = np.vectorize(solve, otypes=[np.float64])(ratio)
    return _out(beta * _C / 1e3)


@dataclass(frozen=True)
class ObserverMotion:
    """The observer's velocity with respect to the CMB rest frame.

    Directions are longitude/latitude in degrees in the frame of the map the
    dipole was fitted in (usually galactic).

    Parameters
    ----------
    speed_km_s : float
        Speed in km/s, 0 <= v < c.
    lon_deg, lat_deg : float
        Direction of motion (the dipole maximum), in degrees; lat in [-90, 90].
    t0_k : float, optional
        Present-day temperature in K (default :data:`DEFAULT_CMB_TEMPERATURE_K`).

    Attributes
    ----------
    beta, gamma : float
        v / c and the Lorentz factor.
    direction : ndarray of shape (3,)
        Unit vector of the direction of motion.
    velocity_km_s : ndarray of shape (3,)
        Velocity vector in km/s.
    dipole_amplitude_k, quadrupole_amplitude_k : float
        Kinematic dipole and quadrupole coefficients in K.

    Examples
    --------
    >>> m = ObserverMotion.from_dipole(3.36208e-3, 264.021, 48.253)
    >>> round(m.speed_km_s, 1), round(m.lon_deg, 3)
    (369.8, 264.021)
    """

    speed_km_s: float
    lon_deg: float
    lat_deg: float
    t0_k: float = DEFAULT_CMB_TEMPERATURE_K

    def __post_init__(self):
        beta = _beta(self.speed_km_s)
        if beta.ndim != 0:
            raise InvalidInputError(f"The 'speed_km_s' parameter must be a single number. Got shape {beta.shape} instead.")
        lon = _values(self.lon_deg, "lon_deg", u.deg, minimum=None)
        lat = _values(self.lat_deg, "lat_deg", u.deg, minimum=None)
        if lon.ndim or lat.ndim:
            raise InvalidInputError("The 'lon_deg' and 'lat_deg' parameters must be single numbers.")
        if abs(float(lat)) > 90:
            raise InvalidInputError(f"The 'lat_deg' parameter must be in [-90, 90]. Got {float(lat)!r} instead.")
        object.__setattr__(self, "speed_km_s", float(_values(self.speed_km_s, "speed_km_s", u.km / u.s, minimum=None)))
        object.__setattr__(self, "lon_deg", float(lon) % 360.0)
        object.__setattr__(self, "lat_deg", float(lat))
        object.__setattr__(self, "t0_k", _scalar_temperature(self.t0_k))

    @classmethod
    def from_dipole(cls, amplitude_k, lon_deg, lat_deg, *, t0_k=None) -> "ObserverMotion":
        """Motion from a fitted dipole given as amplitude (K) and direction (degrees)."""
        t0 = _scalar_temperature(t0_k)
        amp = _values(amplitude_k, "amplitude_k", u.K, minimum=0.0, allow_equal=True)
        if amp.ndim != 0:
            raise InvalidInputError(f"The 'amplitude_k' parameter must be a single number. Got shape {amp.shape} instead.")
        return cls(velocity_from_dipole(float(amp), t0_k=t0), lon_deg, lat_deg, t0)

    @classmethod
    def from_dipole_vector(cls, vector_k, *, t0_k=None) -> "ObserverMotion":
        """Motion from a fitted dipole vector d (K) of m = m0 + d . n (Cartesian, the map's frame)."""
        d = _values(vector_k, "vector_k", u.K, minimum=None)
        if d.shape != (3,):
            raise InvalidInputError(f"The 'vector_k' parameter must have shape (3,). Got shape {d.shape} instead.")
        amp = float(np.linalg.norm(d))
        if amp == 0:
            return cls(0.0, 0.0, 90.0, _scalar_temperature(t0_k))
        lon = math.degrees(math.atan2(d[1], d[0]))
        lat = math.degrees(math.asin(max(-1.0, min(1.0, d[2] / amp))))
        return cls.from_dipole(amp, lon, lat, t0_k=t0_k)

    @property
    def beta(self) -> float:
        return self.speed_km_s * 1e3 / _C

    @property
    def gamma(self) -> float:
        return 1.0 / math.sqrt(1.0 - self.beta**2)

    @property
    def direction(self) -> np.ndarray:
        lon, lat = math.radians(self.lon_deg), math.radians(self.lat_deg)
        return np.array([math.cos(lat) * math.cos(lon), math.cos(lat) * math.sin(lon), math.sin(lat)])

    @property
    def velocity_km_s(self) -> np.ndarray:
        return self.speed_km_s * self.direction

    @property
    def dipole_amplitude_k(self) -> float:
        return float(self.t0_k * _legendre_coefficient(1, self.beta))

    @property
    def quadrupole_amplitude_k(self) -> float:
        return float(self.t0_k * _legendre_coefficient(2, self.beta))

    def sky_temperature(self, lon_deg, lat_deg):
        """Exact Doppler-shifted CMB temperature T0 / (gamma (1 - beta cos theta)) towards (lon, lat).

        Parameters
        ----------
        lon_deg, lat_deg : float or array_like
            Directions in degrees (broadcast together).

        Returns
        -------
        float or ndarray
            Temperature in K.
        """
        lon, lat = _broadcast(
            np.radians(_values(lon_deg, "lon_deg", u.deg, minimum=None)),
            np.radians(_values(lat_deg, "lat_deg", u.deg, minimum=None)),
            "lon_deg",
            "lat_deg",
        )
        if np.any(np.abs(lat) > np.pi / 2 * (1 + 1e-12)):
            raise InvalidInputError("The 'lat_deg' parameter must be in [-90, 90].")
        n = np.stack([np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)], axis=-1)
        mu = n @ self.direction
        return _out(self.t0_k / (self.gamma * (1.0 - self.beta * mu)))
