"""Cosmological parameters that astropy's cosmology objects do not carry.

An :mod:`astropy.cosmology` instance fixes the expansion history (H0, matter,
baryons, curvature, dark energy, photons, neutrinos).  Recombination also needs
the primordial helium abundance and the fudge factor of the three-level atom;
simulated skies need the amplitude and tilt of the primordial scalar spectrum.
:class:`CosmologyExtras` holds these, immutable and validated.

The defaults are those of the base-LCDM fit that astropy's bundled ``Planck18``
realization describes (Planck Collaboration 2020, A&A 641, A6, Table 2,
"TT,TE,EE+lowE+lensing+BAO" column), so that the default cosmology and the
default extras belong together.
"""

from __future__ import annotations

import dataclasses
import math
import numbers
import warnings
from dataclasses import dataclass

import numpy as np
from scipy import constants as _sc

from cmbtools.exceptions import InvalidInputError

__all__ = ["CosmologyExtras", "default_cosmology"]

#: Mass of the helium-4 atom over that of the hydrogen atom (CODATA, via scipy):
#: (m_alpha + 2 m_e) / (m_p + m_e); atomic binding energies (< 1e-8 of the masses) are neglected.
_HELIUM_TO_HYDROGEN_MASS = (
    _sc.physical_constants["alpha particle mass"][0] + 2.0 * _sc.m_e
) / (_sc.m_p + _sc.m_e)


def _check_number(value, name, low, high, *, low_open=False, high_open=False, unit=""):
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise InvalidInputError(f"The {name!r} parameter must be a real number. Got {value!r} instead.")
    v = float(value)
    too_low = v <= low if low_open else v < low
    too_high = v >= high if high_open else v > high
    if not math.isfinite(v) or too_low or too_high:
        lo = "(" if low_open else "["
        hi = ")" if high_open else "]"
        raise InvalidInputError(
            f"The {name!r} parameter must be a finite number in {lo}{low:g}, {high:g}{hi}{unit}. Got {value!r} instead."
        )
    return v


@dataclass(frozen=True)
class CosmologyExtras:
    """Parameters of a cosmological model beyond astropy's expansion history.

    Parameters
    ----------
    helium_fraction : float, default=0.2454
        Primordial helium-4 mass fraction Y_p, in [0, 0.5).  Default: the
        BBN-consistent value of Planck Collaboration 2020 (A&A 641, A6), base
        LCDM (from memory).
    peebles_fudge : float, default=1.14
        Factor multiplying the case-B recombination coefficient (and hence the
        photo-ionization rate) in the Peebles three-level atom, in (0, 3].  The
        value 1.14 of Seager, Sasselov & Scott (1999, ApJ 523, L1; 2000, ApJS
        128, 407) makes the simple atom mimic their multi-level calculation.
    amplitude_scalar : float, default=2.105e-9
        Amplitude A_s of the primordial curvature power spectrum at the pivot
        scale, in (0, 1e-6).  Default: ln(1e10 A_s) = 3.047 (Planck 2020, A&A
        641, A6, Table 2, TT,TE,EE+lowE+lensing+BAO; from memory).
    tilt_scalar : float, default=0.9665
        Scalar spectral index n_s, in (0.5, 1.5).  Same source (astropy's
        ``Planck18.meta['n']`` holds the same value).
    pivot_wavenumber_mpc : float, default=0.05
        Pivot wavenumber k_0 of A_s and n_s in Mpc^-1, in (0, 10].  The value
        0.05 Mpc^-1 is the one of the Planck papers (common practice).
    reionization_optical_depth : float, default=0.0561
        Thomson optical depth tau through the reionized universe, in [0, 0.5).
        Same source as A_s (astropy's ``Planck18.meta['tau']``).
    reionization_width : float, default=0.5
        Redshift width Delta z of the tanh reionization step, in (0, 5].

    Notes
    -----
    Instances are immutable; :meth:`replace` returns a changed copy.  Every
    field is checked on construction and a value outside its range raises
    :class:`~cmbtools.exceptions.InvalidInputError`.

    Examples
    --------
    >>> extras = CosmologyExtras()
    >>> extras.replace(helium_fraction=0.24).helium_fraction
    0.24
    """

    helium_fraction: float = 0.2454
    peebles_fudge: float = 1.14
    amplitude_scalar: float = 2.105e-9
    tilt_scalar: float = 0.9665
    pivot_wavenumber_mpc: float = 0.05
    reionization_optical_depth: float = 0.0561
    reionization_width: float = 0.5

    def __post_init__(self):
        checks = {
            "helium_fraction": dict(low=0.0, high=0.5, high_open=True),
            "peebles_fudge": dict(low=0.0, high=3.0, low_open=True),
            "amplitude_scalar": dict(low=0.0, high=1e-6, low_open=True, high_open=True),
            "tilt_scalar": dict(low=0.5, high=1.5, low_open=True, high_open=True),
            "pivot_wavenumber_mpc": dict(low=0.0, high=10.0, low_open=True, unit=" Mpc^-1"),
            "reionization_optical_depth": dict(low=0.0, high=0.5, high_open=True),
            "reionization_width": dict(low=0.0, high=5.0, low_open=True),
        }
        for name, kw in checks.items():
            object.__setattr__(self, name, _check_number(getattr(self, name), name, **kw))

    def replace(self, **changes) -> "CosmologyExtras":
        """Return a copy with some fields changed (validated like the original).

        Parameters
        ----------
        **changes
            New values of fields, by name.

        Returns
        -------
        CosmologyExtras
            The copy.
        """
        unknown = set(changes) - {f.name for f in dataclasses.fields(self)}
        if unknown:
            raise InvalidInputError(
                f"CosmologyExtras has no field(s) {sorted(unknown)}; "
                f"the fields are {[f.name for f in dataclasses.fields(self)]}."
            )
        return dataclasses.replace(self, **changes)

    def to_dict(self) -> dict:
        """The fields as a plain dict of floats.

        Returns
        -------
        dict
            Field name to float.
        """
        return dataclasses.asdict(self)

    @property
    def helium_to_hydrogen(self) -> float:
        """Number ratio n_He / n_H of helium nuclei to hydrogen nuclei.

        Uses the CODATA masses of the helium-4 atom (alpha particle plus two
        electrons) and of the hydrogen atom (proton plus electron).
        """
        y = self.helium_fraction
        return y / (_HELIUM_TO_HYDROGEN_MASS * (1.0 - y))


def default_cosmology():
    """The fiducial expansion history: astropy's bundled ``Planck18`` realization.

    Returns
    -------
    astropy.cosmology.FLRW
        ``astropy.cosmology.Planck18``.
    """
    from astropy.cosmology import Planck18

    return Planck18


def resolve_cosmology(cosmo, *, name="cosmo"):
    """Return ``cosmo`` (default ``Planck18``) after checking it can describe recombination.

    Raises :class:`InvalidInputError` if it is not an astropy FLRW cosmology, has no
    (or a non-positive) baryon density, a non-positive CMB temperature, negative
    densities, or an expansion rate that is not real and positive from today to
    well before recombination (e.g. a closed model that re-collapses).
    """
    if cosmo is None:
        return default_cosmology()
    from astropy.cosmology import FLRW

    if not isinstance(cosmo, FLRW):
        raise InvalidInputError(
            f"The {name!r} parameter must be an astropy.cosmology FLRW instance (e.g. Planck18). "
            f"Got {type(cosmo).__name__} instead."
        )
    what = "The cosmology" if name == "cosmo" else f"The {name!r} cosmology"
    ob0 = cosmo.Ob0
    if ob0 is None or not np.isfinite(ob0) or ob0 <= 0:
        raise InvalidInputError(
            f"{what} must have a positive baryon density Ob0. Got {ob0!r} instead."
        )
    t0 = float(cosmo.Tcmb0.to_value("K"))
    if not np.isfinite(t0) or t0 <= 0:
        raise InvalidInputError(
            f"{what} must have a positive CMB temperature Tcmb0. Got {t0!r} K instead."
        )
    h0 = float(cosmo.H0.to_value("km/(s Mpc)"))
    if not np.isfinite(h0) or h0 <= 0:
        raise InvalidInputError(f"{what} must have H0 > 0. Got {h0!r} km/s/Mpc instead.")
    og = float(cosmo.Ogamma0)
    if not np.isfinite(og) or og <= 0:
        raise InvalidInputError(
            f"{what} has a photon density Ogamma0 = {og!r} (Tcmb0 = {t0:g} K, H0 = {h0:g} km/s/Mpc): "
            "too small to be represented, so there is no recombination to compute."
        )
    for label in ("Om0", "Odm0"):
        value = getattr(cosmo, label, None)
        if value is not None and (not np.isfinite(value) or value < 0):
            raise InvalidInputError(f"{what} has a negative density {label} = {value!r}.")
    if cosmo.Om0 < ob0:
        raise InvalidInputError(
            f"{what} has more baryons (Ob0 = {ob0:g}) than matter (Om0 = {cosmo.Om0:g})."
        )
    z = np.concatenate([np.linspace(0.0, 10.0, 201), np.geomspace(10.0, 1e8, 400)])
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        e = np.asarray(cosmo.efunc(z), dtype=np.float64)
    bad = ~np.isfinite(e) | (e <= 0)
    if bad.any():
        raise InvalidInputError(
            f"{what} has no real, positive expansion rate H(z) at z = {z[bad][0]:.4g} "
            f"(Ok0 = {cosmo.Ok0:.4g}, Ode0 = {cosmo.Ode0:.4g}): the model bounces or re-collapses instead of starting from a hot big bang."
        )
    return cosmo


def resolve_extras(extras, *, name="extras") -> CosmologyExtras:
    """Return ``extras`` (default ``CosmologyExtras()``) after checking its type."""
    if extras is None:
        return CosmologyExtras()
    if not isinstance(extras, CosmologyExtras):
        raise InvalidInputError(
            f"The {name!r} parameter must be a CosmologyExtras instance. Got {type(extras).__name__} instead."
        )
    return extras
