"""The tabulated ionization and thermal history of one cosmology (:class:`IonizationHistory`).

The equations (Saha equilibrium, the Peebles atom with the matter
temperature, the reionization step) are in :mod:`cmbtools.physics.recombination`;
this module solves them once per cosmology and answers questions about the
result: free-electron fraction, optical depth, visibility, z*, z_drag.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import integrate

from cmbtools.exceptions import InvalidInputError
from cmbtools.physics.parameters import CosmologyExtras, resolve_cosmology, resolve_extras
from cmbtools.physics.recombination import (
    _C,
    _MPC,
    _as_redshift,
    _background,
    _recombination_tables,
    _reionization_step,
    _solve_reionization_redshift,
    _thomson_rate_per_z,
)

__all__ = ["IonizationHistory", "free_electron_fraction"]

class IonizationHistory:
    """The ionization and thermal history of one cosmology, tabulated once.

    The constructor solves Saha equilibrium and the Peebles equation (see the
    module notes) from z = 2e4 to today and keeps the tables; the methods then
    interpolate them for any number of redshifts.  The object is immutable.

    Parameters
    ----------
    cosmo : astropy.cosmology.FLRW, optional
        Expansion history and baryon density (default: astropy's ``Planck18``).
    extras : CosmologyExtras, optional
        Helium fraction, Peebles fudge factor and reionization depth.
    with_reionization : bool, default=True
        Add the tanh reionization step (with optical depth
        ``extras.reionization_optical_depth``).  If false, the history is that of
        recombination alone.

    Attributes
    ----------
    redshift : ndarray of shape (n,)
        The table's redshifts (ascending, 0 to 2e4).
    z_peebles_start : float
        Redshift where the Saha hydrogen fraction falls to 0.99 and the
        Peebles equation takes over.
    z_reionization : float or None
        Mid-point of the reionization step (None without reionization).

    See Also
    --------
    free_electron_fraction : the one-call function.
    last_scattering : z*, z_drag, sound horizon and angles from this history.
    """

    def __init__(self, cosmo=None, extras=None, *, with_reionization=True):
        cosmo = resolve_cosmology(cosmo)
        extras = resolve_extras(extras)
        bg = _background(cosmo, extras)
        rec = _recombination_tables(bg)
        z, xp, xe, tm, z_switch = rec
        self._bg = bg
        self._cosmo = cosmo
        self._extras = extras
        self._with_reionization = bool(with_reionization)
        self.z_peebles_start = float(z_switch)
        self.z_reionization = None
        xe = xe.copy()
        if with_reionization:
            z_re = _solve_reionization_redshift(
                bg, extras.reionization_optical_depth, extras.reionization_width, z, xe
            )
            if z_re is not None:
                self.z_reionization = float(z_re)
                xe = xe + np.maximum(1.0 + bg.f_he - xe, 0.0) * _reionization_step(
                    z, z_re, extras.reionization_width
                )
        dtau = _thomson_rate_per_z(z, xe, bg)
        tau = integrate.cumulative_trapezoid(dtau, z, initial=0.0)
        tau_drag = integrate.cumulative_trapezoid(dtau * (1.0 + z) / bg.r_coeff, z, initial=0.0)
        g_eta = dtau * bg.hubble(z) / _C * _MPC * np.exp(-tau)
        for name, arr in (
            ("redshift", z),
            ("_xp", xp),
            ("_xe", xe),
            ("_tm", tm),
            ("_dtau", dtau),
            ("_tau", tau),
            ("_tau_drag", tau_drag),
            ("_g_eta", g_eta),
        ):
            arr = np.asarray(arr, dtype=float).copy()
            arr.setflags(write=False)
            setattr(self, name, arr)

    # -- properties
    @property
    def cosmology(self):
        """The astropy cosmology of this history."""
        return self._cosmo

    @property
    def extras(self) -> CosmologyExtras:
        """The companion parameters of this history."""
        return self._extras

    @property
    def with_reionization(self) -> bool:
        """Whether the reionization step is included."""
        return self._with_reionization

    # -- lookups
    def _lookup(self, z, table, *, log=True):
        zz = _as_redshift(z)
        if np.any(zz > self.redshift[-1]):
            raise InvalidInputError(
                f"The 'z' parameter must be <= {self.redshift[-1]:g} (the end of the table). Got {np.max(zz):g}."
            )
        if log:
            out = np.exp(np.interp(zz, self.redshift, np.log(np.maximum(table, 1e-300))))
        else:
            out = np.interp(zz, self.redshift, table)
        return float(out) if out.ndim == 0 else out

    def free_electron_fraction(self, z):
        """x_e = n_e / n_H at redshift(s) ``z`` (exceeds 1 while helium is ionized).

        Parameters
        ----------
        z : float or array_like
            Redshift(s) >= 0.

        Returns
        -------
        float or ndarray
            The free-electron fraction n_e / n_H, shaped like ``z``.
        """
        return self._lookup(z, self._xe)

    def hydrogen_ionized_fraction(self, z):
        """Ionized fraction of hydrogen n_p / n_H at redshift(s) ``z`` (without reionization).

        Parameters
        ----------
        z : float or array_like
            Redshift(s) >= 0.

        Returns
        -------
        float or ndarray
            The ionized fraction of hydrogen, in [0, 1], shaped like ``z``.
        """
        return self._lookup(z, self._xp)

    def matter_temperature(self, z):
        """Temperature of baryons and electrons T_m(z) in K.

        Parameters
        ----------
        z : float or array_like
            Redshift(s) >= 0.

        Returns
        -------
        float or ndarray
            The matter temperature in K, shaped like ``z``.
        """
        return self._lookup(z, self._tm)

    def _table_lookup(self, z, table):
        return self._lookup(z, table, log=False)

    def optical_depth(self, z):
        """Thomson optical depth tau(z) from today to redshift(s) ``z``.

        Parameters
        ----------
        z : float or array_like
            Redshift(s) >= 0.

        Returns
        -------
        float or ndarray
            The Thomson optical depth (dimensionless), shaped like ``z``.
        """
        return self._table_lookup(z, self._tau)

    def optical_depth_derivative(self, z):
        """dtau/dz = n_e sigma_T c / ((1 + z) H(z)) at redshift(s) ``z``.

        Parameters
        ----------
        z : float or array_like
            Redshift(s) >= 0.

        Returns
        -------
        float or ndarray
            dtau/dz (dimensionless), shaped like ``z``.
        """
        return self._lookup(z, self._dtau)

    def visibility(self, z):
        """Visibility function in conformal time, g = -(dtau/deta) exp(-tau), in Mpc^-1.

        g(z) = (dtau/dz) (H(z) / c) exp(-tau(z)): the probability density (per Mpc of
        conformal time eta) that a CMB photon last scattered at redshift z.  Its
        integral over eta from the top of the table to today is 1 - exp(-tau(z_top)),
        which is 1 to double precision.  Its maximum is z*.

        Parameters
        ----------
        z : float or array_like
            Redshift(s) >= 0.

        Returns
        -------
        float or ndarray
            The visibility in Mpc^-1, shaped like ``z``.
        """
        return self._table_lookup(z, self._g_eta)

    def visibility_per_redshift(self, z):
        """Visibility function normalised in redshift, (dtau/dz) exp(-tau) (dimensionless).

        Its integral over z from 0 to the top of the table is 1 - exp(-tau(z_top)).
        It peaks about 10 lower in redshift than :meth:`visibility`, because
        d eta / dz = -c / H(z) varies across the last-scattering shell.

        Parameters
        ----------
        z : float or array_like
            Redshift(s) >= 0.

        Returns
        -------
        float or ndarray
            The visibility per unit redshift (dimensionless), shaped like ``z``.
        """
        return self._table_lookup(z, self._dtau * np.exp(-self._tau))

    def drag_optical_depth(self, z):
        """Baryon-drag optical depth tau_d(z) = int_0^z (dtau/dz') / R(z') dz'.

        Parameters
        ----------
        z : float or array_like
            Redshift(s) >= 0.

        Returns
        -------
        float or ndarray
            The baryon-drag optical depth (dimensionless), shaped like ``z``.
        """
        return self._table_lookup(z, self._tau_drag)

    # -- characteristic redshifts
    def visibility_peak(self) -> float:
        """Redshift z* of the maximum of the visibility function (in conformal time).

        Returns
        -------
        float
            The redshift z*.
        """
        g = self._g_eta
        above = self.redshift > 100.0
        j = int(np.argmax(g[above]))
        if j == 0 or j == int(above.sum()) - 1:
            edge = float(self.redshift[above][j])
            raise InvalidInputError(
                f"The visibility function of this cosmology has no maximum between z = 100 and "
                f"z = {float(self.redshift[-1]):g} (it is largest at the edge, z = {edge:g}): there is no "
                f"last-scattering surface; its baryon density or expansion rate is far outside the range "
                f"this model covers."
            )
        i = j + int(np.sum(~above))
        return _parabola_peak(self.redshift[i - 1 : i + 2], g[i - 1 : i + 2])

    def redshift_at_optical_depth(self, value=1.0) -> float:
        """Redshift where the Thomson optical depth reaches ``value`` (default 1).

        Parameters
        ----------
        value : float, default=1.0
            The optical depth to reach (> 0).

        Returns
        -------
        float
            The redshift.
        """
        return _crossing(self.redshift, self._tau, value, "optical depth")

    def drag_redshift(self) -> float:
        """Redshift z_drag where the baryon-drag optical depth reaches 1.

        Returns
        -------
        float
            The redshift z_drag.
        """
        return _crossing(self.redshift, self._tau_drag, 1.0, "baryon-drag optical depth")


def _parabola_peak(x, y):
    (x0, x1, x2), (y0, y1, y2) = x, y
    den = (x0 - x1) * (x0 - x2) * (x1 - x2)
    a = (x2 * (y1 - y0) + x1 * (y0 - y2) + x0 * (y2 - y1)) / den
    b = (x2**2 * (y0 - y1) + x1**2 * (y2 - y0) + x0**2 * (y1 - y2)) / den
    return float(-b / (2.0 * a))


def _crossing(z, depth, value, label):
    i = int(np.searchsorted(depth, value))
    if i == 0 or i >= len(z):
        raise InvalidInputError(f"The {label} never reaches {value:g} below z = {z[-1]:g}.")
    # interpolate linearly in ln(depth), which is smooth across the crossing
    l0, l1 = math.log(depth[i - 1]), math.log(depth[i])
    t = (math.log(value) - l0) / (l1 - l0)
    return float(z[i - 1] + t * (z[i] - z[i - 1]))


def free_electron_fraction(z, cosmo=None, extras=None, *, with_reionization=True):
    """Free-electron fraction x_e = n_e / n_H: Saha, then the Peebles three-level atom.

    Parameters
    ----------
    z : float or array_like
        Redshift(s) in [0, 2e4].
    cosmo : astropy.cosmology.FLRW, optional
        Default: astropy's ``Planck18``.
    extras : CosmologyExtras, optional
        Default: ``CosmologyExtras()``.
    with_reionization : bool, default=True
        Include the tanh reionization step.

    Returns
    -------
    x_e : float or ndarray
        Same shape as ``z``.

    See Also
    --------
    IonizationHistory : the table behind this function, for many look-ups.

    Examples
    --------
    >>> 1e-4 < free_electron_fraction(200.0) < 1e-3
    True
    """
    return IonizationHistory(cosmo, extras, with_reionization=with_reionization).free_electron_fraction(z)
