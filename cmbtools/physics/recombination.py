"""Recombination: the equations of the ionization history (Saha, Peebles, reionization) and their solution.

The tabulated history is :class:`cmbtools.physics.IonizationHistory` (:mod:`cmbtools.physics.ionization_history`);
the geometry of last scattering is in :mod:`cmbtools.physics.last_scattering_surface`.

The physics, in the order the code follows it:

* **Saha equilibrium** for hydrogen and for both helium stages
  (He III -> He II near z ~ 6000, He II -> He I near z ~ 2500) with the
  radiation temperature T(z) = T0 (1 + z).  The three Saha equations are
  coupled through the electron density, which is found by bisection (in its
  logarithm, vectorised over redshift).
* **The Peebles three-level atom** for hydrogen (Peebles 1968, ApJ 153, 1) once
  the Saha hydrogen fraction drops below 0.99 (the switch of Seager, Sasselov &
  Scott 1999, ApJ 523, L1).  Its ingredients are the case-B recombination
  coefficient fit of Pequignot, Petitjean & Boisson (1991, A&A 251, 680) in the
  form used by Seager et al. (1999), multiplied by the customary fudge factor
  (:attr:`CosmologyExtras.peebles_fudge`, 1.14); the photo-ionization rate from
  n = 2 from detailed balance at the radiation temperature; the escape of
  Lyman-alpha photons by the cosmological redshift through the Sobolev
  ("Peebles K") factor K = lambda_Lya^3 / (8 pi H); and the 2s -> 1s
  two-photon rate 8.2245809 s^-1 (Goldman 1989, PRA 40, 1185; from memory).
* **The matter temperature** T_m, integrated together with the hydrogen
  fraction: Compton heating/cooling by the CMB against adiabatic cooling.
  Helium stays in Saha equilibrium (it is fully neutral well before hydrogen
  recombines, so its residual electrons are negligible there).
* An optional **reionization** step, a tanh in redshift,
  x_e -> x_e + (1 + f_He - x_e) (1 + tanh((z_re - z) / Delta z)) / 2,
  which ionizes hydrogen and helium once; z_re is chosen so that the extra
  electrons give the Thomson optical depth of
  :attr:`CosmologyExtras.reionization_optical_depth`.  The last-scattering
  quantities (z*, the tau = 1 redshift, z_drag) are computed without it.

From x_e(z) follow the Thomson optical depth tau(z) = int_0^z n_e sigma_T c
dt/dz' dz', the visibility function g = -(dtau/deta) exp(-tau) normalised in
conformal time eta (its integral over eta is 1 - exp(-tau(infinity)); the
version normalised in redshift is also available), its peak z*, the baryon-drag depth tau_d(z) = int_0^z (dtau/dz') / R dz' with
R = 3 rho_b / (4 rho_gamma) and z_drag where tau_d = 1, and the comoving sound
horizon r_s(z) = int_z^inf c_s dz' / H(z'), c_s = c / sqrt(3 (1 + R)), with the
cosmology's own H(z) (radiation and neutrinos included).

All physical constants are CODATA values from :mod:`scipy.constants`; the one
atomic datum CODATA lacks, the first ionization energy of helium, is the NIST
Atomic Spectra Database value (quoted in the code).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
from scipy import constants as sc
from scipy import integrate, optimize, special
from scipy.interpolate import CubicSpline

from cmbtools.physics.parameters import _HELIUM_TO_HYDROGEN_MASS, resolve_cosmology, resolve_extras
from cmbtools.exceptions import InvalidInputError

__all__ = ["saha_ionization"]

# ---------------------------------------------------------------- constants (SI)
_C = sc.c
_K = sc.k
_ME = sc.m_e
_MP = sc.m_p
_HBAR = sc.hbar
_SIGMA_T = sc.physical_constants["Thomson cross section"][0]
_M_ALPHA = sc.physical_constants["alpha particle mass"][0]
_RYDBERG_J = sc.physical_constants["Rydberg constant times hc in J"][0]
_A_RAD = 4.0 * sc.sigma / sc.c  # radiation constant a = 4 sigma_SB / c
_MH = _MP + _ME  # hydrogen atom; its 13.6 eV binding energy (1.4e-8 of the mass) is neglected
_MPC = 1e6 * sc.parsec

#: Ionization energy of hydrogen from its 1s level: the Bohr energy with the reduced mass.
_E_H = _RYDBERG_J / (1.0 + _ME / _MP)
#: Ionization energy of He+ (hydrogen-like, Z = 2, reduced mass of the alpha particle).
_E_HE2 = 4.0 * _RYDBERG_J / (1.0 + _ME / _M_ALPHA)
#: First ionization energy of neutral helium: 198310.66637 cm^-1
#: (NIST Atomic Spectra Database, from memory), converted with CODATA h c.
_E_HE1 = sc.h * sc.c * 198310.66637e2
#: Energy of the Lyman-alpha transition (n = 2 -> 1) and binding energy of n = 2.
_E_LYA = 0.75 * _E_H
_E_2 = 0.25 * _E_H
_LAMBDA_LYA = sc.h * sc.c / _E_LYA
#: 2s -> 1s two-photon decay rate of hydrogen in s^-1 (Goldman 1989, PRA 40, 1185; from memory).
TWO_PHOTON_RATE = 8.2245809
#: Coefficients of the case-B recombination fit of Pequignot, Petitjean & Boisson (1991),
#: alpha_B = 1e-19 a t^b / (1 + c t^d) m^3 s^-1 with t = T / 1e4 K, as in Seager et al. (1999).
_PPB = (4.309, -0.6166, 0.6703, 0.5300)

#: Saha prefactor: (m_e k T / (2 pi hbar^2))^(3/2) = _SAHA * T^(3/2) in m^-3.
_SAHA = (_ME * _K / (2.0 * math.pi * _HBAR**2)) ** 1.5
#: Compton coupling: 8 sigma_T a_R / (3 m_e c) in s^-1 K^-4.
_COMPTON = 8.0 * _SIGMA_T * _A_RAD / (3.0 * _ME * _C)

#: Where the Peebles equation takes over from Saha equilibrium (hydrogen fraction).
_SWITCH_FRACTION = 0.99
#: Redshift range of a tabulated history; above _Z_TOP Saha equilibrium is exact enough.
_Z_TOP = 2.0e4


def _cosmo_key(cosmo):
    """A hashable key of a cosmology's class and parameter values (astropy's are unhashable)."""
    try:
        items = list(cosmo.parameters.items())
    except AttributeError:  # astropy < 6
        items = [(n, getattr(cosmo, n)) for n in type(cosmo).__parameters__]
    parts = [type(cosmo).__qualname__]
    for name, value in items:
        v = getattr(value, "value", value)
        parts.append((name, None if v is None else np.asarray(v, dtype=float).tobytes()))
    return tuple(parts)


class _Background:
    """Scalars and a fast H(z) of one cosmology (internal; trusts checked input)."""

    def __init__(self, cosmo, extras):
        self.cosmo = cosmo
        self.extras = extras
        self.t0 = float(cosmo.Tcmb0.to_value("K"))
        self.h0 = float(cosmo.H0.to_value("1/s"))
        self.h = float(cosmo.H0.to_value("km/(s Mpc)")) / 100.0
        rho_crit0 = float(cosmo.critical_density0.to_value("kg/m3"))
        y = extras.helium_fraction
        self.nh0 = cosmo.Ob0 * rho_crit0 * (1.0 - y) / _MH  # hydrogen nuclei today, m^-3
        self.f_he = y / (_HELIUM_TO_HYDROGEN_MASS * (1.0 - y))  # n_He / n_H
        self.r_coeff = 0.75 * cosmo.Ob0 / cosmo.Ogamma0  # R(z) = r_coeff / (1 + z)
        # ln E as a spline in ln(1 + z): cheap scalar and array evaluation for the ODE
        s = np.linspace(0.0, math.log1p(1e10), 3001)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            e = np.asarray(cosmo.efunc(np.expm1(s)), dtype=float)
        self._s_max = s[-1]
        self._lne = CubicSpline(s, np.log(e))

    def hubble(self, z):
        """H(z) in s^-1 (array)."""
        return self.h0 * np.exp(self._lne(np.log1p(z)))

    def hubble_scalar(self, z):
        return self.h0 * math.exp(float(self._lne(math.log1p(z))))


# ---------------------------------------------------------------- Saha equilibrium


def _saha_log_ratio(energy, temperature, log_ne, degeneracy=1.0):
    """ln of n(i+1) n_e / n(i) / n_e = (S T^1.5 g e^{-E/kT}) / n_e."""
    return math.log(_SAHA * degeneracy) + 1.5 * np.log(temperature) - energy / (_K * temperature) - log_ne


def _helium_electrons(temperature, log_ne):
    """Free electrons per helium nucleus in Saha equilibrium (0, 1 or 2 in the limits)."""
    # He II / He I: statistical weights g(He II) = 2, g(He I) = 1, times 2 for the electron -> 4
    a = _saha_log_ratio(_E_HE1, temperature, log_ne, 4.0)
    # He III / He II: g(He III) = 1, g(He II) = 2, times 2 for the electron -> 1
    b = a + _saha_log_ratio(_E_HE2, temperature, log_ne, 1.0)
    m = np.maximum(0.0, np.maximum(a, b))
    ea, eb = np.exp(a - m), np.exp(b - m)
    return (ea + 2.0 * eb) / (np.exp(-m) + ea + eb)


def _saha_state(z, bg, *, hydrogen_only=False):
    """Saha hydrogen fraction x_p and total x_e = n_e / n_H at T = T0 (1 + z) (arrays)."""
    z = np.asarray(z, dtype=float)
    temperature = bg.t0 * (1.0 + z)
    nh = bg.nh0 * (1.0 + z) ** 3
    if hydrogen_only:
        # x^2 / (1 - x) = A with A = S T^1.5 e^{-E/kT} / n_H; stable root 2 / (1 + sqrt(1 + 4/A))
        log_a = _saha_log_ratio(_E_H, temperature, np.log(nh))
        inv_a = np.exp(-np.minimum(log_a, 700.0))
        xp = 2.0 / (1.0 + np.sqrt(1.0 + 4.0 * inv_a))
        return xp, xp
    f_he = bg.f_he
    lo = np.full(z.shape, -700.0)
    hi = np.full(z.shape, math.log(1.0 + 2.0 * f_he) + 1e-12)
    log_nh = np.log(nh)
    for _ in range(90):  # bisection on ln x_e: charge balance is monotone in n_e
        mid = 0.5 * (lo + hi)
        log_ne = log_nh + mid
        xp = special.expit(_saha_log_ratio(_E_H, temperature, log_ne))
        excess = xp + f_he * _helium_electrons(temperature, log_ne) - np.exp(mid)
        up = excess > 0
        lo = np.where(up, mid, lo)
        hi = np.where(up, hi, mid)
    log_ne = log_nh + 0.5 * (lo + hi)
    xp = special.expit(_saha_log_ratio(_E_H, temperature, log_ne))
    return xp, xp + f_he * _helium_electrons(temperature, log_ne)


def _as_redshift(z, name="z"):
    try:
        a = np.asarray(z, dtype=float)
    except (TypeError, ValueError):
        raise InvalidInputError(f"The {name!r} parameter must be a number or an array of numbers.") from None
    if not np.all(np.isfinite(a)) or np.any(a < 0):
        raise InvalidInputError(f"The {name!r} parameter must hold finite redshifts >= 0. Got {z!r} instead.")
    return a


def saha_ionization(z, cosmo=None, extras=None, *, hydrogen_only=False):
    """Free-electron fraction in Saha equilibrium at the radiation temperature.

    Parameters
    ----------
    z : float or array_like
        Redshift(s), >= 0.
    cosmo : astropy.cosmology.FLRW, optional
        Expansion history and baryon density (default: astropy's ``Planck18``).
    extras : CosmologyExtras, optional
        Helium fraction (default: ``CosmologyExtras()``).
    hydrogen_only : bool, default=False
        If true, return the Saha ionized fraction of hydrogen alone, x^2 / (1 - x) =
        (m_e k T / 2 pi hbar^2)^{3/2} e^{-13.6 eV / kT} / n_H, ignoring helium's electrons.

    Returns
    -------
    x_e : float or ndarray
        n_e / n_H (can reach 1 + 2 n_He / n_H when helium is fully ionized).

    Examples
    --------
    >>> round(float(saha_ionization(1000.0, hydrogen_only=True)), 6) < 1e-3
    True
    """
    zz = _as_redshift(z)
    bg = _background(resolve_cosmology(cosmo), resolve_extras(extras))
    xe = _saha_state(zz, bg, hydrogen_only=hydrogen_only)[1]
    return float(xe) if xe.ndim == 0 else xe


# ---------------------------------------------------------------- Peebles + matter temperature


def _case_b(temperature, fudge):
    t = temperature / 1e4
    a, b, c, d = _PPB
    return fudge * 1e-19 * a * t**b / (1.0 + c * t**d)


def _peebles_rhs_factory(bg):
    f_he = bg.f_he
    fudge = bg.extras.peebles_fudge
    t0, nh0 = bg.t0, bg.nh0
    lya3 = _LAMBDA_LYA**3 / (8.0 * math.pi)
    log_saha = math.log(_SAHA)

    def rhs(z, y):
        xp, tm = float(y[0]), float(y[1])
        zp1 = 1.0 + z
        tr = t0 * zp1
        nh = nh0 * zp1**3
        hub = bg.hubble_scalar(z)
        # helium's electrons (Saha; negligible once hydrogen recombines)
        log_ne = math.log(nh * max(xp, 1e-30))
        a = log_saha + math.log(4.0) + 1.5 * math.log(tr) - _E_HE1 / (_K * tr) - log_ne
        xe = xp + f_he * (1.0 / (1.0 + math.exp(-a)) if a > -700 else 0.0)
        alpha = _case_b(tm, fudge)  # recombination: electrons at the matter temperature
        alpha_r = _case_b(tr, fudge)  # its detailed-balance partner: photons at T_rad
        kt = _K * tr
        # photo-ionization from n = 2 by detailed balance at the radiation temperature
        beta = alpha_r * _SAHA * tr**1.5 * math.exp(-_E_2 / kt)
        n1s = max(1.0 - xp, 0.0) * nh
        k_factor = lya3 / hub
        c_factor = (1.0 + k_factor * TWO_PHOTON_RATE * n1s) / (1.0 + k_factor * (TWO_PHOTON_RATE + beta) * n1s)
        dxdt = c_factor * (beta * max(1.0 - xp, 0.0) * math.exp(-_E_LYA / kt) - alpha * nh * xe * xp)
        dtdt_compton = _COMPTON * tr**4 * xe / (1.0 + f_he + xe) * (tr - tm)
        dzdt = -zp1 * hub
        return [dxdt / dzdt, 2.0 * tm / zp1 + dtdt_compton / dzdt]

    return rhs


def _redshift_grid():
    return np.unique(
        np.concatenate(
            [
                np.linspace(0.0, 60.0, 1201),
                np.linspace(60.0, 400.0, 341),
                np.linspace(400.0, 2600.0, 4401),
                np.geomspace(2600.0, _Z_TOP, 400),
            ]
        )
    )


def _compute_recombination(bg):
    """Tabulate x_p, x_e and T_m on the redshift grid (ascending z)."""
    z = _redshift_grid()
    if not (np.isfinite(bg.nh0) and bg.nh0 > 0):
        raise InvalidInputError(
            f"The cosmology's hydrogen density today is {bg.nh0:g} per m^3 (Ob0 = {bg.cosmo.Ob0:g}): "
            "too small to be represented, so there is no recombination to compute."
        )
    xp_saha, xe_saha = _saha_state(z, bg)
    # start of the Peebles regime: Saha hydrogen fraction = 0.99
    def excess(zz):
        return _saha_state(np.array([zz]), bg)[0][0] - _SWITCH_FRACTION

    try:
        z_switch = optimize.brentq(excess, 100.0, _Z_TOP, xtol=1e-8)
    except ValueError:
        raise InvalidInputError(
            "The cosmology's hydrogen is not 99 % ionized at z = 2e4 or still is at z = 100 in Saha "
            "equilibrium; its baryon density or CMB temperature is far outside the range this model covers."
        ) from None
    y0 = [_saha_state(np.array([z_switch]), bg)[0][0], bg.t0 * (1.0 + z_switch)]
    late = z < z_switch
    z_eval = z[late][::-1]
    sol = integrate.solve_ivp(
        _peebles_rhs_factory(bg),
        (z_switch, 0.0),
        y0,
        method="Radau",
        t_eval=z_eval,
        rtol=1e-7,
        atol=[1e-12, 1e-8],
    )
    if not sol.success:  # pragma: no cover - the ODE is well posed for any validated input
        raise InvalidInputError(f"The recombination equations could not be integrated: {sol.message}")
    xp = xp_saha.copy()
    xe = xe_saha.copy()
    tm = bg.t0 * (1.0 + z)
    xp_late = sol.y[0][::-1]
    tm[late] = sol.y[1][::-1]
    xp[late] = xp_late
    log_ne = np.log(bg.nh0 * (1.0 + z[late]) ** 3 * np.maximum(xp_late, 1e-30))
    tr_late = bg.t0 * (1.0 + z[late])
    xe[late] = xp_late + bg.f_he * special.expit(_saha_log_ratio(_E_HE1, tr_late, log_ne, 4.0))
    return z, xp, xe, tm, z_switch


def _thomson_rate_per_z(z, xe, bg):
    """dtau/dz = n_e sigma_T c / ((1 + z) H)."""
    return xe * bg.nh0 * (1.0 + z) ** 2 * _SIGMA_T * _C / bg.hubble(z)


def _reionization_step(z, z_re, width):
    return 0.5 * (1.0 + np.tanh((z_re - z) / width))


def _solve_reionization_redshift(bg, tau_target, width, z_grid, xe_rec):
    if tau_target == 0.0:
        return None
    full = 1.0 + bg.f_he
    z = z_grid[z_grid <= 200.0]
    base = _thomson_rate_per_z(z, np.ones_like(z), bg)
    xr = np.interp(z, z_grid, xe_rec)

    def tau_extra(z_re):
        extra = np.maximum(full - xr, 0.0) * _reionization_step(z, z_re, width)
        return integrate.trapezoid(base * extra, z) - tau_target

    if tau_extra(150.0) < 0:
        raise InvalidInputError(
            f"The 'reionization_optical_depth' {tau_target:g} would need reionization before z = 150."
        )
    if tau_extra(0.0) > 0:
        raise InvalidInputError(
            f"The free electrons left over from recombination already give an optical depth above "
            f"{tau_target:g} below z = 200, so no reionization redshift matches the "
            f"'reionization_optical_depth' {tau_target:g}; the baryon density or expansion rate of this "
            f"cosmology is far outside the range this model covers."
        )
    return optimize.brentq(tau_extra, 0.0, 150.0, xtol=1e-6)


# ---------------------------------------------------------------- caches

_CACHE_SIZE = 8
_background_cache: dict = {}
_recombination_cache: dict = {}


def _remember(cache, key, make):
    try:
        return cache[key]
    except KeyError:
        pass
    value = make()
    if len(cache) >= _CACHE_SIZE:
        cache.pop(next(iter(cache)))
    cache[key] = value
    return value


def _background(cosmo, extras):
    return _remember(_background_cache, (_cosmo_key(cosmo), extras), lambda: _Background(cosmo, extras))


def _recombination_tables(bg):
    key = (_cosmo_key(bg.cosmo), bg.extras.helium_fraction, bg.extras.peebles_fudge)
    return _remember(_recombination_cache, key, lambda: _compute_recombination(bg))
