"""Detector bandpasses: the transmission table, its reader and band-averaged unit conversions.

See :mod:`cmbtools.physics.blackbody` for the spectral shapes of the units;
for a bandpass with transmission tau(nu) the factor is
F(A -> B) = integral(tau S_A dnu) / integral(tau S_B dnu).
"""

from __future__ import annotations

__all__ = ["Bandpass", "read_bandpass", "bandpass_conversion_factor"]

import functools
from dataclasses import dataclass, field

import numpy as np
from astropy import units as u
from scipy.integrate import trapezoid

from cmbtools._core.tables import read_text_table
from cmbtools.exceptions import InputFileError, InvalidInputError
from cmbtools.physics.blackbody import _parse_unit, _scalar_temperature, _shape_values, _values


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
        """Band-averaged conversion factor; see :func:`bandpass_conversion_factor`.

        Parameters
        ----------
        source, target : str
            Units of the signal and of the result (see :data:`SIGNAL_UNITS`).
        t0_k : float, optional
            Present CMB temperature in K (default :data:`DEFAULT_CMB_TEMPERATURE_K`).
        reference_ghz : float, optional
            Reference frequency of an intensity unit (default: the band's transmission-weighted mean).
        spectral_index : float, default=-1.0
            Spectral index of an intensity unit.

        Returns
        -------
        float
            The factor F such that X [source] = X F [target].
        """
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
    table = read_text_table(path, what="a bandpass table", header=False, separator="per-line",
                            undecodable="not a text file (cannot decode as UTF-8)")
    p = table.path
    rows = []
    header_allowed = True
    for number, fields in table.rows:
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
