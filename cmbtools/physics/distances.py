"""Fast vectorized distances and times for any astropy cosmology.

:class:`DistanceTable` tabulates the expansion history of an
:mod:`astropy.cosmology` FLRW instance (flat or curved, massive neutrinos,
constant-w or w0-wa dark energy; default astropy's bundled ``Planck18``) once,
then returns distances and times for millions of redshifts by interpolation.

Method
------
With s = ln(1 + z) and E(z) = H(z) / H0 taken from the cosmology itself
(``cosmo.inv_efunc``, vectorized), the four dimensionless integrals

* X(s) = int_0^s e^s' / E ds'    (comoving distance / D_H),
* L(s) = int_0^s 1 / E ds'       (lookback time / t_H),
* A(s) = int_s^inf 1 / E ds'     (age / t_H),
* C(s) = int_s^inf e^s' / E ds'  (conformal time / t_H = particle horizon / D_H)

are computed at evenly spaced nodes in s (spacing 1/256 by default) by
6-point Gauss-Legendre quadrature on every interval, summed upwards (X, L) or
downwards (A, C) so that no value is a difference of two large numbers.  The
part of A and C beyond the last node is integrated in u = sqrt(a) =
(1 + z)^-1/2, where the integrands 2 / (u E) and 2 / (u^3 E) stay finite in
both the radiation and the matter era, on 51 panels that shrink by halves
towards u = 0.  Between nodes the integrals are cubic Hermite polynomials
built from the node values and the exact derivatives (e^s / E, 1 / E), which
makes an evaluation one index computation and four table look-ups.  The
relative interpolation error, measured at every interval midpoint against the
quadrature when the table is built, is stored as
:attr:`DistanceTable.error_estimate`; it is about 1e-9 for the usual
cosmologies (largest at z << 1).  The tests compare distances and lookback
times with astropy's own integration to 2e-7 (astropy's elliptic-integral
shortcut loses about 1e-7 at z = 1e-8), ages with astropy to 5e-6 (astropy's
z-quadrature to infinity is only good to a few 1e-6 near z ~ 1000), and ages
and conformal times with scipy quadrature in the scale factor to 1e-8.

Units
-----
Distances are plain float64 in Mpc and times in Gyr (a Python ``float`` for
a scalar redshift, an ``ndarray`` otherwise); D_H = c / H0 and t_H = 1 / H0
come from the cosmology (``cosmo.hubble_distance``, ``cosmo.hubble_time``).
Redshifts are numbers, arrays or dimensionless/redshift Quantities in
[0, z_max].
"""

from __future__ import annotations

__all__ = ["DistanceTable"]

import math

import numpy as np
from astropy import units as u

from cmbtools.exceptions import InvalidInputError

#: Default node spacing in ln(1 + z).
_STEP = 1.0 / 256.0
#: Gauss-Legendre points per interval between nodes.
_ORDER = 6
#: Panels (halving towards u = 0) and points per panel for the part beyond z_max.
_TAIL_PANELS = 51
_TAIL_ORDER = 16
#: Largest z_max a table accepts.
_Z_MAX_LIMIT = 1.0e10


def _check_cosmology(cosmo):
    """Return an astropy FLRW cosmology (default Planck18) after checking its parameters."""
    from astropy.cosmology import FLRW

    if cosmo is None:
        from astropy.cosmology import Planck18

        return Planck18
    if not isinstance(cosmo, FLRW):
        raise InvalidInputError(
            "The 'cosmo' parameter must be an astropy.cosmology FLRW instance (for example "
            f"astropy.cosmology.Planck18). Got {type(cosmo).__name__} instead."
        )
    h0 = float(cosmo.H0.to_value(u.km / u.s / u.Mpc))
    if not (np.isfinite(h0) and h0 > 0):
        raise InvalidInputError(f"The cosmology's Hubble constant must be > 0 km/s/Mpc. Got H0 = {h0!r} instead.")
    for name in ("Om0", "Ode0", "Ob0", "Ogamma0", "Onu0"):
        value = getattr(cosmo, name, None)
        if value is None:
            continue
        value = float(value)
        if not np.isfinite(value) or value < 0:
            raise InvalidInputError(
                f"The cosmology has a negative or non-finite density parameter {name} = {value!r}; "
                "distances are only tabulated for non-negative densities."
            )
    return cosmo


def _inv_e(cosmo, z):
    """1 / E(z) from the cosmology, checked positive and finite."""
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        inv = np.asarray(cosmo.inv_efunc(z), dtype=np.float64)
    bad = ~(np.isfinite(inv) & (inv > 0))
    if np.any(bad):
        z_bad = float(np.asarray(z, dtype=np.float64)[bad].min())
        raise InvalidInputError(
            f"The cosmology's expansion rate E(z)^2 = H(z)^2 / H0^2 is not positive at z = {z_bad:.6g}: "
            "this universe does not expand monotonically from a big bang (it bounces or recollapses), "
            "so distances and ages are not defined there."
        )
    return inv


def _hermite_coefficients(y, dy, h):
    """Per-interval coefficients c0..c3 of y(t) = c0 + c1 t + c2 t^2 + c3 t^3, t in [0, 1]."""
    y0, y1 = y[:-1], y[1:]
    m0, m1 = dy[:-1] * h, dy[1:] * h
    coef = np.empty((y.size - 1, 4))
    coef[:, 0] = y0
    coef[:, 1] = m0
    coef[:, 2] = 3.0 * (y1 - y0) - 2.0 * m0 - m1
    coef[:, 3] = 2.0 * (y0 - y1) + m0 + m1
    coef.flags.writeable = False
    return coef


def _evaluate(coef, index, t):
    c = coef[index]
    return c[..., 0] + t * (c[..., 1] + t * (c[..., 2] + t * c[..., 3]))


def _out(a):
    return float(a) if np.ndim(a) == 0 else a


class DistanceTable:
    """Distances and times of one cosmology, tabulated once for fast evaluation at many redshifts.

    The constructor does all the work (a few milliseconds); the object is
    immutable afterwards.  See the module notes for the method and accuracy.

    Parameters
    ----------
    cosmo : astropy.cosmology.FLRW, optional
        Any astropy FLRW cosmology (default ``astropy.cosmology.Planck18``).
        Its density parameters must be non-negative and E(z)^2 positive up to z_max.
    z_max : float, default=1e4
        Largest redshift the table covers (up to 1e10).  Ages and conformal
        times always include the expansion history beyond z_max.
    n_nodes : int, optional
        Number of nodes in ln(1 + z) (at least 16); default one node per
        1/256 in ln(1 + z) (2359 nodes for z_max = 1e4).

    Attributes
    ----------
    cosmo : astropy.cosmology.FLRW
        The cosmology.
    z_max : float
        Largest redshift covered.
    n_nodes : int
        Number of nodes.
    hubble_distance_mpc : float
        D_H = c / H0 in Mpc.
    hubble_time_gyr : float
        t_H = 1 / H0 in Gyr.
    error_estimate : float
        Largest relative interpolation error of the four tabulated integrals,
        measured at every interval midpoint when the table was built.
    antipode_redshift : float or None
        For a closed universe, the redshift at which sqrt(-Ok0) D_C / D_H = pi
        (light from beyond it has passed the antipode), if it is below z_max.

    Raises
    ------
    InvalidInputError
        For a cosmology that is not an astropy FLRW instance, negative
        densities, a non-expanding history below z_max, or bad z_max / n_nodes.

    See Also
    --------
    comoving_distance, luminosity_distance, age : one-call versions.

    Examples
    --------
    >>> from astropy.cosmology import Planck18
    >>> table = DistanceTable(Planck18)
    >>> round(table.comoving_distance(1100.0), 1)
    13886.3
    >>> round(table.age(0.0), 4)
    13.7869
    """

    __slots__ = (
        "_cosmo", "_z_max", "_s_max", "_n", "_h", "_ok", "_sqrt_ok",
        "_dh", "_th", "_cx", "_cl", "_ca", "_cc", "_error", "_antipode", "_ready",
    )  # fmt: skip

    def __init__(self, cosmo=None, *, z_max=1.0e4, n_nodes=None):
        cosmo = _check_cosmology(cosmo)
        try:
            z_max = float(z_max)
        except (TypeError, ValueError):
            raise InvalidInputError(f"The 'z_max' parameter must be a number. Got {z_max!r} instead.") from None
        if not (np.isfinite(z_max) and 0 < z_max <= _Z_MAX_LIMIT):
            raise InvalidInputError(f"The 'z_max' parameter must be in (0, {_Z_MAX_LIMIT:g}]. Got {z_max!r} instead.")
        s_max = math.log1p(z_max)
        if n_nodes is None:
            n = max(16, int(math.ceil(s_max / _STEP)) + 1)
        else:
            if isinstance(n_nodes, bool) or not isinstance(n_nodes, (int, np.integer)) or n_nodes < 16 or n_nodes > 10_000_000:
                raise InvalidInputError(f"The 'n_nodes' parameter must be an int in [16, 10000000]. Got {n_nodes!r} instead.")
            n = int(n_nodes)

        s = np.linspace(0.0, s_max, n)
        h = s[1] - s[0]
        xk, wk = np.polynomial.legendre.leggauss(_ORDER)
        # Quadrature points: full intervals (for the node values) and first halves (for the error check).
        full = s[:-1, None] + 0.5 * h * (1.0 + xk)
        half = s[:-1, None] + 0.25 * h * (1.0 + xk)
        pts = np.concatenate([s, full.ravel(), half.ravel()])
        inv_all = _inv_e(cosmo, np.expm1(pts))
        inv_nodes = inv_all[:n]
        inv_full = inv_all[n : n + full.size].reshape(full.shape)
        inv_half = inv_all[n + full.size :].reshape(half.shape)

        # Interval integrals of 1/E and e^s/E.
        step_l = 0.5 * h * (inv_full @ wk)
        step_x = 0.5 * h * ((np.exp(full) * inv_full) @ wk)
        tail_l, tail_c = self._tail(cosmo, s_max)

        x_nodes = np.concatenate([[0.0], np.cumsum(step_x)])
        l_nodes = np.concatenate([[0.0], np.cumsum(step_l)])
        a_nodes = tail_l + np.concatenate([np.cumsum(step_l[::-1])[::-1], [0.0]])
        c_nodes = tail_c + np.concatenate([np.cumsum(step_x[::-1])[::-1], [0.0]])

        e_s = np.exp(s)
        cx = _hermite_coefficients(x_nodes, e_s * inv_nodes, h)
        cl = _hermite_coefficients(l_nodes, inv_nodes, h)
        ca = _hermite_coefficients(a_nodes, -inv_nodes, h)
        cc = _hermite_coefficients(c_nodes, -e_s * inv_nodes, h)

        # Error estimate: Hermite value at each midpoint against quadrature over the first half interval.
        half_l = 0.25 * h * (inv_half @ wk)
        half_x = 0.25 * h * ((np.exp(half) * inv_half) @ wk)
        idx = np.arange(n - 1)
        error = 0.0
        for coef, exact in (
            (cx, x_nodes[:-1] + half_x),
            (cl, l_nodes[:-1] + half_l),
            (ca, a_nodes[:-1] - half_l),
            (cc, c_nodes[:-1] - half_x),
        ):
            approx = _evaluate(coef, idx, 0.5)
            error = max(error, float(np.max(np.abs(approx - exact) / np.abs(exact))))

        ok = float(cosmo.Ok0)
        antipode = None
        if ok < 0 and math.sqrt(-ok) * x_nodes[-1] > math.pi:
            target = math.pi / math.sqrt(-ok)
            i = int(np.searchsorted(x_nodes, target)) - 1
            # Solve the cubic on interval i for X = target (X is increasing, so bisection is safe).
            lo, hi = 0.0, 1.0
            for _ in range(80):
                t = 0.5 * (lo + hi)
                if _evaluate(cx, i, t) < target:
                    lo = t
                else:
                    hi = t
            antipode = float(np.expm1(s[i] + 0.5 * (lo + hi) * h))

        self._cosmo = cosmo
        self._z_max = z_max
        self._s_max = s_max
        self._n = n
        self._h = h
        self._ok = ok
        self._sqrt_ok = math.sqrt(abs(ok))
        self._dh = float(cosmo.hubble_distance.to_value(u.Mpc))
        self._th = float(cosmo.hubble_time.to_value(u.Gyr))
        self._cx, self._cl, self._ca, self._cc = cx, cl, ca, cc
        self._error = error
        self._antipode = antipode
        self._ready = True

    @staticmethod
    def _tail(cosmo, s_max):
        """int_{s_max}^inf of 1/E and e^s/E ds, in u = e^{-s/2}: integrands 2/(u E) and 2/(u^3 E)."""
        u_max = math.exp(-0.5 * s_max)
        edges = np.concatenate([[0.0], u_max * 2.0 ** -np.arange(_TAIL_PANELS - 1, -1, -1.0)])
        xk, wk = np.polynomial.legendre.leggauss(_TAIL_ORDER)
        lo, hi = edges[:-1, None], edges[1:, None]
        uu = 0.5 * (hi - lo) * (1.0 + xk) + lo
        half_width = 0.5 * (hi - lo)[:, 0]
        inv = _inv_e(cosmo, 1.0 / uu**2 - 1.0)
        tail_l = float(np.sum(half_width * ((2.0 * inv / uu) @ wk)))
        tail_c = float(np.sum(half_width * ((2.0 * inv / uu**3) @ wk)))
        return tail_l, tail_c

    def __setattr__(self, name, value):
        if getattr(self, "_ready", False):
            raise AttributeError("DistanceTable is immutable; build a new one for other settings.")
        object.__setattr__(self, name, value)

    def __delattr__(self, name):
        raise AttributeError("DistanceTable is immutable.")

    def __repr__(self):
        name = getattr(self._cosmo, "name", None) or type(self._cosmo).__name__
        return f"DistanceTable(cosmo={name}, z_max={self._z_max:g}, n_nodes={self._n}, error_estimate={self._error:.1e})"

    # ------------------------------------------------------------------ attributes

    @property
    def cosmo(self):
        return self._cosmo

    @property
    def z_max(self) -> float:
        return self._z_max

    @property
    def n_nodes(self) -> int:
        return self._n

    @property
    def hubble_distance_mpc(self) -> float:
        return self._dh

    @property
    def hubble_time_gyr(self) -> float:
        return self._th

    @property
    def error_estimate(self) -> float:
        return self._error

    @property
    def antipode_redshift(self):
        return self._antipode

    # ------------------------------------------------------------------ evaluation

    def _locate(self, z):
        """Check redshifts; return (interval index, position in interval, z as an array)."""
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
        if zz.size:
            lo, hi = float(np.min(zz)), float(np.max(zz))
            if not (np.isfinite(lo) and np.isfinite(hi)):
                raise InvalidInputError("The 'z' parameter has NaN or infinite values.")
            if lo < 0 or hi > self._z_max:
                bad = lo if lo < 0 else hi
                raise InvalidInputError(
                    f"The 'z' parameter must be in [0, {self._z_max:g}] for this table. Got {bad!r} instead"
                    + (" (build the DistanceTable with a larger z_max)." if bad > 0 else ".")
                )
        pos = np.log1p(zz) / self._h
        index = np.minimum(pos.astype(np.intp), self._n - 2)
        return index, pos - index, zz

    def _x(self, z):
        index, t, zz = self._locate(z)
        return _evaluate(self._cx, index, t), zz

    def _transverse(self, x, zz):
        """D_M / D_H from D_C / D_H."""
        if self._ok == 0:
            return x
        k = self._sqrt_ok
        if self._ok > 0:
            return np.sinh(k * x) / k
        theta = k * x
        if np.size(theta) and float(np.max(theta)) > math.pi:
            z_bad = float(np.max(zz))
            limit = f"z > {self._antipode:.6g}" if self._antipode is not None else "these redshifts"
            raise InvalidInputError(
                f"In this closed universe (Ok0 = {self._ok:.6g}) light from {limit} has passed "
                f"the antipode (sqrt(-Ok0) D_C / D_H > pi), so the transverse comoving distance is not defined. "
                f"Got z up to {z_bad!r}."
            )
        return np.sin(theta) / k

    def comoving_distance(self, z, /):
        """Line-of-sight comoving distance D_C = D_H int_0^z dz' / E(z').

        Parameters
        ----------
        z : float, array_like or Quantity
            Redshifts in [0, z_max].

        Returns
        -------
        float or ndarray
            Distance in Mpc, shaped like ``z``.
        """
        x, _ = self._x(z)
        return _out(self._dh * x)

    def transverse_comoving_distance(self, z, /):
        """Transverse comoving distance D_M (D_C for a flat universe, with sinh or sin for Ok0 > 0 or < 0).

        Parameters
        ----------
        z : float, array_like or Quantity
            Redshifts in [0, z_max].

        Returns
        -------
        float or ndarray
            Distance in Mpc.

        Raises
        ------
        InvalidInputError
            In a closed universe, for redshifts beyond the antipode.
        """
        x, zz = self._x(z)
        return _out(self._dh * self._transverse(x, zz))

    def angular_diameter_distance(self, z, /):
        """Angular-diameter distance D_A = D_M / (1 + z), in Mpc.

        Parameters
        ----------
        z : float, array_like or Quantity
            Redshifts in [0, z_max].

        Returns
        -------
        float or ndarray
            Distance in Mpc, shaped like ``z``.
        """
        x, zz = self._x(z)
        return _out(self._dh * self._transverse(x, zz) / (1.0 + zz))

    def luminosity_distance(self, z, /):
        """Luminosity distance D_L = (1 + z) D_M, in Mpc.

        Parameters
        ----------
        z : float, array_like or Quantity
            Redshifts in [0, z_max].

        Returns
        -------
        float or ndarray
            Distance in Mpc, shaped like ``z``.
        """
        x, zz = self._x(z)
        return _out(self._dh * self._transverse(x, zz) * (1.0 + zz))

    def proper_distance_at_emission(self, z, /):
        """Proper distance to the source at the time the light was emitted, D_C / (1 + z), in Mpc.

        This is the length, measured at the emission time, of the spatial
        geodesic from the source to the observer's world line: the scale factor
        a = 1 / (1 + z) times the comoving radial distance.  In a flat universe it
        equals the angular-diameter distance D_M / (1 + z); in a curved one
        D_A differs from it because D_M != D_C.

        Parameters
        ----------
        z : float, array_like or Quantity
            Redshifts in [0, z_max].

        Returns
        -------
        float or ndarray
            Distance in Mpc, shaped like ``z``.
        """
        x, zz = self._x(z)
        return _out(self._dh * x / (1.0 + zz))

    def lookback_time(self, z, /):
        """Lookback time t_H int_0^z dz' / ((1 + z') E(z')), in Gyr.

        Parameters
        ----------
        z : float, array_like or Quantity
            Redshifts in [0, z_max].

        Returns
        -------
        float or ndarray
            Time in Gyr, shaped like ``z``.
        """
        index, t, _ = self._locate(z)
        return _out(self._th * _evaluate(self._cl, index, t))

    def age(self, z, /):
        """Age of the universe at redshift z, t_H int_z^inf dz' / ((1 + z') E(z')), in Gyr.

        Parameters
        ----------
        z : float, array_like or Quantity
            Redshifts in [0, z_max].

        Returns
        -------
        float or ndarray
            Age in Gyr, shaped like ``z``.
        """
        index, t, _ = self._locate(z)
        return _out(self._th * _evaluate(self._ca, index, t))

    def conformal_time(self, z, /):
        """Conformal time since the big bang, eta = int dt / a = t_H int_z^inf dz' / E(z'), in Gyr.

        Parameters
        ----------
        z : float, array_like or Quantity
            Redshifts in [0, z_max].

        Returns
        -------
        float or ndarray
            Conformal time in Gyr, shaped like ``z``.
        """
        index, t, _ = self._locate(z)
        return _out(self._th * _evaluate(self._cc, index, t))

    def particle_horizon(self, z, /):
        """Comoving particle horizon at redshift z, c eta = D_H int_z^inf dz' / E(z'), in Mpc.

        Parameters
        ----------
        z : float, array_like or Quantity
            Redshifts in [0, z_max].

        Returns
        -------
        float or ndarray
            Comoving distance in Mpc, shaped like ``z``.
        """
        index, t, _ = self._locate(z)
        return _out(self._dh * _evaluate(self._cc, index, t))
