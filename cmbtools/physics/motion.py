"""The observer's motion through the CMB: the kinematic dipole and quadrupole.

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

__all__ = ["dipole_from_velocity", "quadrupole_from_velocity", "velocity_from_dipole", "ObserverMotion"]

import functools
import math
from dataclasses import dataclass

import numpy as np
from astropy import units as u
from scipy import optimize, special

from cmbtools.exceptions import InvalidInputError
from cmbtools.physics.blackbody import DEFAULT_CMB_TEMPERATURE_K, _C, _broadcast, _out, _scalar_temperature, _values


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
        """Motion from a fitted dipole given as amplitude (K) and direction (degrees).

        Parameters
        ----------
        amplitude_k : float
            Dipole amplitude in K (>= 0).
        lon_deg, lat_deg : float
            Direction of the dipole maximum, in degrees; lat in [-90, 90].
        t0_k : float, optional
            Present CMB temperature in K (default :data:`DEFAULT_CMB_TEMPERATURE_K`).

        Returns
        -------
        ObserverMotion
            The motion that produces this dipole.
        """
        t0 = _scalar_temperature(t0_k)
        amp = _values(amplitude_k, "amplitude_k", u.K, minimum=0.0, allow_equal=True)
        if amp.ndim != 0:
            raise InvalidInputError(f"The 'amplitude_k' parameter must be a single number. Got shape {amp.shape} instead.")
        return cls(velocity_from_dipole(float(amp), t0_k=t0), lon_deg, lat_deg, t0)

    @classmethod
    def from_dipole_vector(cls, vector_k, *, t0_k=None) -> "ObserverMotion":
        """Motion from a fitted dipole vector d (K) of m = m0 + d . n (Cartesian, the map's frame).

        Parameters
        ----------
        vector_k : array_like of shape (3,)
            The dipole vector d in K (Cartesian, in the map's frame).
        t0_k : float, optional
            Present CMB temperature in K (default :data:`DEFAULT_CMB_TEMPERATURE_K`).

        Returns
        -------
        ObserverMotion
            The motion that produces this dipole.
        """
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
