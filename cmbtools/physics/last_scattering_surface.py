"""The geometry of last scattering: sound horizon, fitting formulas, and the summary :class:`LastScattering`.

The sound horizon r_s(z) = int_z^inf c_s dz' / H(z'), c_s = c / sqrt(3 (1 + R)),
uses the cosmology's own H(z); z*, the tau = 1 redshift and z_drag come from
the ionization history of :mod:`cmbtools.physics.recombination` (without
reionization).
"""

import dataclasses
import math
import warnings
from dataclasses import dataclass

import numpy as np
from scipy import special
from scipy.interpolate import CubicSpline

from cmbtools.physics.parameters import CosmologyExtras, resolve_cosmology, resolve_extras
from cmbtools.exceptions import InvalidInputError
from cmbtools.physics import recombination as _recombination
from cmbtools.physics.ionization_history import IonizationHistory
from cmbtools.physics.recombination import (
    _C,
    _HBAR,
    _K,
    _MPC,
    _as_redshift,
    _background,
    _cosmo_key,
    _remember,
)

__all__ = [
    "LastScattering",
    "eisenstein_hu_drag_redshift",
    "hu_sugiyama_last_scattering_redshift",
    "last_scattering",
    "sound_horizon",
]


# ---------------------------------------------------------------- sound horizon


def _sound_horizon_spline(bg):
    """Comoving sound horizon r_s as a function of ln(1 + z), in metres."""
    s = np.linspace(0.0, bg._s_max, 6001)
    zp1 = np.exp(s)
    cs = _C / np.sqrt(3.0 * (1.0 + bg.r_coeff / zp1))
    integrand = cs * zp1 / bg.hubble(zp1 - 1.0)  # dr/ds = c_s (1 + z) / H
    # beyond the grid the universe is radiation dominated: H ~ (1+z)^2, R -> 0, so the
    # rest of the integral is the integrand at the top (it falls as e^{-s})
    tail = integrand[-1]
    antiderivative = CubicSpline(s, integrand).antiderivative()
    top = float(antiderivative(s[-1]))
    return lambda x: tail + top - antiderivative(x)


def _sound_horizon_m(bg, z):
    key = (_cosmo_key(bg.cosmo), "sound")
    spline = _remember(_recombination._background_cache, key, lambda: _sound_horizon_spline(bg))
    return spline(np.log1p(z))


def sound_horizon(z, cosmo=None):
    """Comoving sound horizon of the photon-baryon fluid, r_s(z), in Mpc.

    r_s(z) = int_z^inf c_s(z') dz' / H(z') with c_s = c / sqrt(3 (1 + R)) and
    R = 3 rho_b / (4 rho_gamma) = (3 Ob0 / 4 Ogamma0) / (1 + z), using the
    cosmology's own H(z) (photons, neutrinos and any dark energy included).

    Parameters
    ----------
    z : float or array_like
        Redshift(s), 0 <= z <= 1e10.
    cosmo : astropy.cosmology.FLRW, optional
        Default: astropy's ``Planck18``.

    Returns
    -------
    r_s : float or ndarray
        In Mpc, same shape as ``z``.

    Examples
    --------
    >>> 140 < sound_horizon(1090.0) < 150
    True
    """
    zz = _as_redshift(z)
    if np.any(zz > 1e10):
        raise InvalidInputError(f"The 'z' parameter must be <= 1e10. Got {np.max(zz):g} instead.")
    bg = _background(resolve_cosmology(cosmo), CosmologyExtras())
    r = _sound_horizon_m(bg, zz) / _MPC
    return float(r) if np.ndim(r) == 0 else r


# ---------------------------------------------------------------- fitting formulas


def _omega_h2(cosmo):
    h2 = (float(cosmo.H0.to_value("km/(s Mpc)")) / 100.0) ** 2
    om = cosmo.Om0 + (cosmo.Onu0 if cosmo.has_massive_nu else 0.0)
    return cosmo.Ob0 * h2, om * h2


def hu_sugiyama_last_scattering_redshift(cosmo=None):
    """Redshift of last scattering from the fit of Hu & Sugiyama (1996, ApJ 471, 542, eq. E1).

    z* = 1048 [1 + 0.00124 w_b^-0.738] [1 + g1 w_m^g2] with
    g1 = 0.0783 w_b^-0.238 / (1 + 39.5 w_b^0.763), g2 = 0.560 / (1 + 21.1 w_b^1.81),
    where w_b = Omega_b h^2 and w_m = Omega_m h^2 (massive neutrinos counted as matter).
    The paper quotes an accuracy of about 1 % for 0.0025 < w_b < 0.25.

    Parameters
    ----------
    cosmo : astropy.cosmology.FLRW, optional
        Default ``astropy.cosmology.Planck18``; its Omega_b h^2 and Omega_m h^2 enter the fit.

    Returns
    -------
    float
        The redshift z* of last scattering.
    """
    cosmo = resolve_cosmology(cosmo)
    wb, wm = _omega_h2(cosmo)
    g1 = 0.0783 * wb**-0.238 / (1.0 + 39.5 * wb**0.763)
    g2 = 0.560 / (1.0 + 21.1 * wb**1.81)
    return float(1048.0 * (1.0 + 0.00124 * wb**-0.738) * (1.0 + g1 * wm**g2))


def eisenstein_hu_drag_redshift(cosmo=None):
    """Baryon-drag redshift from the fit of Eisenstein & Hu (1998, ApJ 496, 605, eq. 4).

    z_d = 1291 w_m^0.251 / (1 + 0.659 w_m^0.828) [1 + b1 w_b^b2] with
    b1 = 0.313 w_m^-0.419 [1 + 0.607 w_m^0.674], b2 = 0.238 w_m^0.223.

    Parameters
    ----------
    cosmo : astropy.cosmology.FLRW, optional
        Default ``astropy.cosmology.Planck18``; its Omega_b h^2 and Omega_m h^2 enter the fit.

    Returns
    -------
    float
        The baryon-drag redshift z_d.
    """
    cosmo = resolve_cosmology(cosmo)
    wb, wm = _omega_h2(cosmo)
    b1 = 0.313 * wm**-0.419 * (1.0 + 0.607 * wm**0.674)
    b2 = 0.238 * wm**0.223
    return float(1291.0 * wm**0.251 / (1.0 + 0.659 * wm**0.828) * (1.0 + b1 * wb**b2))


# ---------------------------------------------------------------- last scattering


@dataclass(frozen=True)
class LastScattering:
    """Characteristic numbers of recombination and last scattering for one cosmology.

    Parameters
    ----------
    z_star : float
        Redshift of the peak of the visibility function (recombination only).
    z_tau_unity : float
        Redshift where the Thomson optical depth of recombination reaches 1.
    z_drag : float
        Redshift where the baryon-drag optical depth reaches 1.
    z_star_fit, z_drag_fit : float
        The fits of Hu & Sugiyama (1996) and Eisenstein & Hu (1998).
    r_star_mpc, r_drag_mpc : float
        Comoving sound horizon at z_star and z_drag, Mpc.
    theta_star : float
        Angular size of the sound horizon, r_s(z*) / D_M(z*), radians.
    ell_a : float
        Acoustic multipole pi / theta_star.
    dm_star_mpc, da_star_mpc : float
        Comoving transverse and angular-diameter distances to z_star, Mpc.
    age_gyr : float
        Age of the universe today, Gyr.
    age_star_kyr : float
        Age at z_star, kyr.
    light_travel_gyr : float
        Time the CMB photons have travelled since z_star, Gyr.
    t_star_k : float
        Radiation temperature at z_star, T0 (1 + z*), K.
    t_cmb_k : float
        CMB temperature today, K.
    n_gamma_cm3 : float
        Number density of CMB photons today, cm^-3.
    omega_gamma_h2 : float
        Photon density parameter times h^2.
    visibility_fwhm_z : float
        Full width at half maximum of the visibility function, in redshift.
    z_peebles_start : float
        Redshift where the Peebles equation takes over from Saha equilibrium.
    x_e_residual : float
        Free-electron fraction left at z = 200 (freeze-out).
    z_reionization : float or None
        Mid-point of the tanh reionization step (None if tau_reion = 0).
    tau_reionization : float
        Optical depth of reionization used for it.
    """

    z_star: float
    z_tau_unity: float
    z_drag: float
    z_star_fit: float
    z_drag_fit: float
    r_star_mpc: float
    r_drag_mpc: float
    theta_star: float
    ell_a: float
    dm_star_mpc: float
    da_star_mpc: float
    age_gyr: float
    age_star_kyr: float
    light_travel_gyr: float
    t_star_k: float
    t_cmb_k: float
    n_gamma_cm3: float
    omega_gamma_h2: float
    visibility_fwhm_z: float
    z_peebles_start: float
    x_e_residual: float
    z_reionization: float | None
    tau_reionization: float

    def to_dict(self) -> dict:
        """The fields as a plain dict (JSON-ready: floats and None).

        Returns
        -------
        dict
            Field name to float (or None where a quantity is not defined).
        """
        return {k: (None if v is None else float(v)) for k, v in dataclasses.asdict(self).items()}


def _fwhm(z, g):
    i = int(np.argmax(g))
    half = 0.5 * g[i]
    lo = i - int(np.argmax(g[i::-1] < half))
    hi = i + int(np.argmax(g[i:] < half))
    z_lo = np.interp(half, [g[lo], g[lo + 1]], [z[lo], z[lo + 1]])
    z_hi = np.interp(half, [g[hi], g[hi - 1]], [z[hi], z[hi - 1]])
    return float(z_hi - z_lo)


def last_scattering(cosmo=None, extras=None) -> LastScattering:
    """Recombination and last-scattering numbers of one cosmology.

    Solves the ionization history (Saha, then the Peebles three-level atom, see
    :class:`IonizationHistory`), then finds the visibility peak z*, the tau = 1
    redshift, the drag redshift, the sound horizon at both, the acoustic angle
    theta* = r_s(z*) / D_M(z*) and multipole l_A = pi / theta*, and the ages and
    temperatures at last scattering.  Distances and ages come from astropy.

    Parameters
    ----------
    cosmo : astropy.cosmology.FLRW, optional
        Any astropy FLRW cosmology with baryons (default: ``Planck18``).
    extras : CosmologyExtras, optional
        Default: ``CosmologyExtras()``.

    Returns
    -------
    LastScattering

    Raises
    ------
    InvalidInputError
        If the cosmology has no baryons, negative densities, an expansion rate
        that is not positive, or a closed geometry in which last scattering lies
        beyond the antipode (D_M(z*) <= 0).

    Examples
    --------
    >>> ls = last_scattering()
    >>> 1080 < ls.z_star < 1100 and 300 < ls.ell_a < 305
    True
    """
    cosmo = resolve_cosmology(cosmo)
    extras = resolve_extras(extras)
    bg = _background(cosmo, extras)
    rec = IonizationHistory(cosmo, extras, with_reionization=False)
    z_star = rec.visibility_peak()
    z_drag = rec.drag_redshift()
    r_star, r_drag = (_sound_horizon_m(bg, np.array([z_star, z_drag])) / _MPC).tolist()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        dm = float(cosmo.comoving_transverse_distance(z_star).to_value("Mpc"))
        age0 = float(cosmo.age(0.0).to_value("Gyr"))
        age_star = float(cosmo.age(z_star).to_value("Gyr"))
    if not np.isfinite(dm) or dm <= 0:
        raise InvalidInputError(
            f"The cosmology's curvature (Ok0 = {cosmo.Ok0:.4g}) puts last scattering beyond the antipode "
            f"(D_M(z*) = {dm:.4g} Mpc); the distance formulas do not apply."
        )
    theta = r_star / dm
    t0 = bg.t0
    n_gamma = 2.0 * special.zeta(3.0) / math.pi**2 * (_K * t0 / (_HBAR * _C)) ** 3 * 1e-6
    if extras.reionization_optical_depth > 0:
        z_re = IonizationHistory(cosmo, extras, with_reionization=True).z_reionization
    else:
        z_re = None
    return LastScattering(
        z_star=z_star,
        z_tau_unity=rec.redshift_at_optical_depth(1.0),
        z_drag=z_drag,
        z_star_fit=hu_sugiyama_last_scattering_redshift(cosmo),
        z_drag_fit=eisenstein_hu_drag_redshift(cosmo),
        r_star_mpc=r_star,
        r_drag_mpc=r_drag,
        theta_star=theta,
        ell_a=math.pi / theta,
        dm_star_mpc=dm,
        da_star_mpc=dm / (1.0 + z_star),
        age_gyr=age0,
        age_star_kyr=age_star * 1e6,
        light_travel_gyr=age0 - age_star,
        t_star_k=t0 * (1.0 + z_star),
        t_cmb_k=t0,
        n_gamma_cm3=float(n_gamma),
        omega_gamma_h2=float(cosmo.Ogamma0 * bg.h**2),
        visibility_fwhm_z=_fwhm(rec.redshift, rec._g_eta),
        z_peebles_start=rec.z_peebles_start,
        x_e_residual=rec.free_electron_fraction(200.0),
        z_reionization=z_re,
        tau_reionization=extras.reionization_optical_depth,
    )
