"""Distances and times in one call each: a :class:`~cmbtools.physics.DistanceTable` built for the call.

To evaluate many redshifts of one cosmology, or to call several of these,
build one :class:`~cmbtools.physics.DistanceTable` and use its methods.
"""

from __future__ import annotations

import numpy as np
from astropy import units as u

from cmbtools.exceptions import InvalidInputError
from cmbtools.physics.distances import _Z_MAX_LIMIT, DistanceTable

__all__ = [
    "comoving_distance",
    "transverse_comoving_distance",
    "angular_diameter_distance",
    "luminosity_distance",
    "lookback_time",
    "age",
    "conformal_time",
    "particle_horizon",
    "proper_distance_at_emission",
]


def _one_call(method, z, cosmo):
    if isinstance(z, u.Quantity):
        from astropy.cosmology import units as cu

        try:
            z = z.to_value(u.dimensionless_unscaled, equivalencies=cu.dimensionless_redshift())
        except u.UnitConversionError:
            raise InvalidInputError(f"The 'z' parameter must be a dimensionless redshift. Got unit {z.unit} instead.") from None
    try:
        zz = np.asarray(z, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidInputError(f"The 'z' parameter must be a number or an array of numbers. Got {z!r} instead.") from None
    if zz.size and not np.all(np.isfinite(zz)):
        raise InvalidInputError("The 'z' parameter has NaN or infinite values.")
    top = float(np.max(zz)) if zz.size else 0.0
    if top > _Z_MAX_LIMIT:
        raise InvalidInputError(f"The 'z' parameter must be at most {_Z_MAX_LIMIT:g}. Got {top!r} instead.")
    table = DistanceTable(cosmo, z_max=max(top, 1.0))
    return getattr(table, method)(zz)


def comoving_distance(z, cosmo=None):
    """Line-of-sight comoving distance in Mpc (one call; see :class:`DistanceTable` for reuse).

    Parameters
    ----------
    z : float, array_like or Quantity
        Redshifts >= 0.
    cosmo : astropy.cosmology.FLRW, optional
        Default ``astropy.cosmology.Planck18``.

    Returns
    -------
    float or ndarray
        Mpc, shaped like ``z``.

    See Also
    --------
    DistanceTable.comoving_distance : the same, reusing one table.
    """
    return _one_call("comoving_distance", z, cosmo)


def transverse_comoving_distance(z, cosmo=None):
    """Transverse comoving distance D_M in Mpc (one call; see :class:`DistanceTable`).

    Parameters
    ----------
    z : float, array_like or Quantity
        Redshifts >= 0.
    cosmo : astropy.cosmology.FLRW, optional
        Default ``astropy.cosmology.Planck18``.

    Returns
    -------
    float or ndarray
        Distance in Mpc, shaped like ``z``.

    See Also
    --------
    DistanceTable.transverse_comoving_distance
    """
    return _one_call("transverse_comoving_distance", z, cosmo)


def angular_diameter_distance(z, cosmo=None):
    """Angular-diameter distance D_M / (1 + z) in Mpc (one call; see :class:`DistanceTable`).

    Parameters
    ----------
    z : float, array_like or Quantity
        Redshifts >= 0.
    cosmo : astropy.cosmology.FLRW, optional
        Default ``astropy.cosmology.Planck18``.

    Returns
    -------
    float or ndarray
        Distance in Mpc, shaped like ``z``.

    See Also
    --------
    DistanceTable.angular_diameter_distance
    """
    return _one_call("angular_diameter_distance", z, cosmo)


def luminosity_distance(z, cosmo=None):
    """Luminosity distance (1 + z) D_M in Mpc (one call; see :class:`DistanceTable`).

    Parameters
    ----------
    z : float, array_like or Quantity
        Redshifts >= 0.
    cosmo : astropy.cosmology.FLRW, optional
        Default ``astropy.cosmology.Planck18``.

    Returns
    -------
    float or ndarray
        Distance in Mpc, shaped like ``z``.

    See Also
    --------
    DistanceTable.luminosity_distance
    """
    return _one_call("luminosity_distance", z, cosmo)


def lookback_time(z, cosmo=None):
    """Lookback time in Gyr (one call; see :class:`DistanceTable`).

    Parameters
    ----------
    z : float, array_like or Quantity
        Redshifts >= 0.
    cosmo : astropy.cosmology.FLRW, optional
        Default ``astropy.cosmology.Planck18``.

    Returns
    -------
    float or ndarray
        Time in Gyr, shaped like ``z``.

    See Also
    --------
    DistanceTable.lookback_time
    """
    return _one_call("lookback_time", z, cosmo)


def age(z, cosmo=None):
    """Age of the universe at redshift z in Gyr (one call; see :class:`DistanceTable`).

    Parameters
    ----------
    z : float, array_like or Quantity
        Redshifts >= 0.
    cosmo : astropy.cosmology.FLRW, optional
        Default ``astropy.cosmology.Planck18``.

    Returns
    -------
    float or ndarray
        Age in Gyr, shaped like ``z``.

    See Also
    --------
    DistanceTable.age
    """
    return _one_call("age", z, cosmo)


def conformal_time(z, cosmo=None):
    """Conformal time since the big bang in Gyr (one call; see :class:`DistanceTable`).

    Parameters
    ----------
    z : float, array_like or Quantity
        Redshifts >= 0.
    cosmo : astropy.cosmology.FLRW, optional
        Default ``astropy.cosmology.Planck18``.

    Returns
    -------
    float or ndarray
        Conformal time in Gyr, shaped like ``z``.

    See Also
    --------
    DistanceTable.conformal_time
    """
    return _one_call("conformal_time", z, cosmo)


def particle_horizon(z, cosmo=None):
    """Comoving particle horizon c * conformal time in Mpc (one call; see :class:`DistanceTable`).

    Parameters
    ----------
    z : float, array_like or Quantity
        Redshifts >= 0.
    cosmo : astropy.cosmology.FLRW, optional
        Default ``astropy.cosmology.Planck18``.

    Returns
    -------
    float or ndarray
        Comoving distance in Mpc, shaped like ``z``.

    See Also
    --------
    DistanceTable.particle_horizon
    """
    return _one_call("particle_horizon", z, cosmo)


def proper_distance_at_emission(z, cosmo=None):
    """Proper distance at emission D_C / (1 + z) in Mpc (one call; see :class:`DistanceTable`).

    Parameters
    ----------
    z : float, array_like or Quantity
        Redshifts >= 0.
    cosmo : astropy.cosmology.FLRW, optional
        Default ``astropy.cosmology.Planck18``.

    Returns
    -------
    float or ndarray
        Distance in Mpc, shaped like ``z``.

    See Also
    --------
    DistanceTable.proper_distance_at_emission
    """
    return _one_call("proper_distance_at_emission", z, cosmo)
