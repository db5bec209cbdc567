"""The result of a spectrum measurement: bandpowers, their errors and a record of the inputs.

:class:`Bandpowers` is a frozen value object.  It writes itself as a CSV table
(a commented header of ``# key: value`` lines, then the columns
``ell_min,ell_max,ell_eff,cl,cl_err,dl,dl_err``), as a FITS binary table
(the same columns, the record in header cards) and as a figure (PNG or PDF).
:meth:`Bandpowers.read_csv` reads a table back.

Units: inside, spectra are in K^2 (K_CMB squared).  The writers take
``unit="uK"`` (default, values in uK^2) or ``unit="K"``; the unit is recorded
in the header and :meth:`Bandpowers.read_csv` converts back to K^2.
"""

from __future__ import annotations

import dataclasses
import numbers
from pathlib import Path

import numpy as np

from cmbtools._core import files as _io
from cmbtools._core.figures import (
    ACCENT,
    DL_LABEL,
    ELL_LABEL,
    INK,
    SOFT,
    UK2,
    check_figure_path,
    new_figure,
    save_figure,
    style_axes,
)
from cmbtools._core.binned_tables import BANDPOWER_COLUMNS, read_bandpower_table, write_binned_table
from cmbtools._core.tables import metadata_comments, power_unit_scale
from cmbtools.spectrum.binning import Binning
from cmbtools._core.checks import check_cl
from cmbtools.exceptions import InputFileError, InvalidInputError

__all__ = ["Bandpowers", "COLUMNS"]

#: The columns of the tables, in order.
COLUMNS = BANDPOWER_COLUMNS
_SPECTRUM_COLUMNS = ("cl", "cl_err", "dl", "dl_err")


def clean_metadata(owner, metadata) -> dict:
    """The metadata of a result (``owner``: its class name, for messages) with checked keys and plain values.

    Keys are non-empty strings without ':' or line breaks; values become str (one line), int or float
    (booleans 'yes'/'no').
    """
    if not isinstance(metadata, dict):
        raise InvalidInputError(f"{owner}.metadata must be a dict of str to str or number.")
    meta = {}
    for key, value in metadata.items():
        if not isinstance(key, str) or not key or any(c in key for c in ":\n\r"):
            raise InvalidInputError(f"{owner}.metadata keys must be non-empty strings without ':'. Got {key!r}.")
        if isinstance(value, (bool, np.bool_)):
            value = "yes" if value else "no"
        elif isinstance(value, numbers.Integral):
            value = int(value)
        elif isinstance(value, numbers.Real):
            value = float(value)
        elif isinstance(value, str):
            value = " ".join(value.splitlines())
        else:
            raise InvalidInputError(
                f"{owner}.metadata[{key!r}] must be a string or a number. Got {type(value).__name__} instead."
            )
        meta[key] = value
    return meta


def write_bandpower_fits(path, columns, values, metadata, covariance, *, unit, overwrite) -> Path:
    """Write a bandpower FITS file: a ``BANDPOWERS`` table and, with a covariance, a ``COVARIANCE`` image.

    ``columns``: the leading (name, FITS format, array) columns (bins, spectrum names); ``values``: the
    spectrum columns (name -> array in K^2), written in ``unit``^2; the metadata go into ``HIERARCH CMBTOOLS
    <KEY>`` cards; the covariance (K^4) is written in ``unit``^4.
    """
    from astropy.io import fits

    scale = power_unit_scale(unit)
    out = _io.check_output_path(path, overwrite=overwrite)
    cols = [fits.Column(name=name, format=form, array=array) for name, form, array in columns]
    for name, array in values.items():
        cols.append(fits.Column(name=name, format="D", unit=f"{unit}^2", array=array * scale))
    table = fits.BinTableHDU.from_columns(cols, name="BANDPOWERS")
    table.header["HIERARCH CMBTOOLS UNIT"] = f"{unit}^2"
    for k, v in metadata.items():
        if k != "unit":
            table.header[f"HIERARCH CMBTOOLS {k.upper()}"] = v
    hdus = [fits.PrimaryHDU(), table]
    if covariance is not None:
        hdus.append(fits.ImageHDU(covariance * scale * scale, name="COVARIANCE"))
        hdus[-1].header["BUNIT"] = f"{unit}^4"
    with _io.atomic_output(out, overwrite=overwrite) as tmp:
        fits.HDUList(hdus).writeto(tmp, overwrite=True)
    return out


@dataclasses.dataclass(frozen=True, eq=False)
class Bandpowers:
    """Binned angular power spectrum with errors and a record of how it was measured.

    Parameters
    ----------
    ell_min, ell_max : ndarray of int, shape (n_bins,)
        Bin limits (inclusive).
    ell_eff : ndarray of shape (n_bins,)
        Mean multipole of each bin.
    cl, cl_err : ndarray of shape (n_bins,)
        Bandpowers of ``C_l`` and their 1-sigma errors, K^2.
    dl, dl_err : ndarray of shape (n_bins,)
        The same for ``D_l = l(l+1) C_l / 2 pi`` at ``ell_eff``, K^2.
    covariance : ndarray of shape (n_bins, n_bins) or None
        Covariance of ``cl`` (K^4), when it was computed.
    metadata : dict of str to str, int or float
        The inputs: files and hashes, nside, lmax, bins, beams, pixel window,
        coupling mode, version, ...
    """

    ell_min: np.ndarray
    ell_max: np.ndarray
    ell_eff: np.ndarray
    cl: np.ndarray
    cl_err: np.ndarray
    dl: np.ndarray
    dl_err: np.ndarray
    covariance: np.ndarray | None = None
    metadata: dict = dataclasses.field(default_factory=dict)

    def __post_init__(self):
        n = None
        for name in COLUMNS:
            kind = np.int64 if name in ("ell_min", "ell_max") else np.float64
            try:
                a = np.array(getattr(self, name), dtype=kind)
            except (TypeError, ValueError):
                raise InvalidInputError(f"Bandpowers.{name} must be an array of numbers.") from None
            if a.ndim != 1:
                raise InvalidInputError(f"Bandpowers.{name} must be 1-d. Got shape {a.shape} instead.")
            if n is None:
                n = a.size
            elif a.size != n:
                raise InvalidInputError(f"Bandpowers.{name} has {a.size} values, expected {n} (one per bin).")
            a.setflags(write=False)
            object.__setattr__(self, name, a)
        if self.covariance is not None:
            c = np.array(self.covariance, dtype=np.float64)
            if c.shape != (n, n):
                raise InvalidInputError(f"Bandpowers.covariance must have shape ({n}, {n}). Got {c.shape} instead.")
            c.setflags(write=False)
            object.__setattr__(self, "covariance", c)
        meta = clean_metadata("Bandpowers", self.metadata)
        object.__setattr__(self, "metadata", meta)

    @property
    def n_bins(self) -> int:
        return int(self.cl.size)

    def with_metadata(self, **items) -> "Bandpowers":
        """A copy with ``items`` added to (or replacing entries of) the metadata.

        Parameters
        ----------
        **items
            Metadata entries (str or number values).

        Returns
        -------
        Bandpowers
            The copy.
        """
        meta = dict(self.metadata)
        meta.update(items)
        return dataclasses.replace(self, metadata=meta)

    def binning(self) -> Binning:
        """The :class:`Binning` of these bandpowers (weighting from the metadata, default 'dl').

        Returns
        -------
        Binning
            The bins.
        """
        return Binning(self.ell_min, self.ell_max, str(self.metadata.get("bins_weighting", "dl")))

    # ------------------------------------------------------------------ CSV
    def write_csv(self, path, *, overwrite=False, unit="uK") -> Path:
        """Write the table as CSV: ``# key: value`` header lines, then the columns.

        Parameters
        ----------
        path : str or path-like
            Output file, written atomically.
        overwrite : bool, default=False
            Replace an existing file.
        unit : {'uK', 'K'}, default='uK'
            Spectra in uK^2 or K^2.

        Returns
        -------
        Path
        """
        scale = power_unit_scale(unit)
        return write_binned_table(path, _SPECTRUM_COLUMNS, self.ell_min, self.ell_max, self.ell_eff,
                                  [getattr(self, c) * scale for c in _SPECTRUM_COLUMNS],
                                  comments=metadata_comments("cmbtools bandpowers", unit, self.metadata),
                                  overwrite=overwrite)

    @classmethod
    def read_csv(cls, path) -> "Bandpowers":
        """Read a table written by :meth:`write_csv` (values converted back to K^2).

        Parameters
        ----------
        path : str or path-like
            The CSV table.

        Returns
        -------
        Bandpowers
            The bandpowers (no covariance: the CSV table does not hold it).

        Raises
        ------
        InputFileError
            Missing file, wrong columns, a cell that is not a number, a bin
            limit that is not a whole number, or an unknown unit.
        """
        p, cols, meta = read_bandpower_table(path)
        try:
            return cls(
                ell_min=cols["ell_min"],
                ell_max=cols["ell_max"],
                ell_eff=cols["ell_eff"],
                cl=cols["cl"],
                cl_err=cols["cl_err"],
                dl=cols["dl"],
                dl_err=cols["dl_err"],
                covariance=None,
                metadata=meta,
            )
        except InvalidInputError as exc:
            raise InputFileError(p, str(exc)) from None

    # ------------------------------------------------------------------ FITS
    def write_fits(self, path, *, overwrite=False, unit="uK") -> Path:
        """Write the table as a FITS binary table; the metadata go into header cards.

        Header cards are ``HIERARCH CMBTOOLS <KEY>`` (long values continue on
        CONTINUE cards).  When a covariance is present it is written as a
        second extension named ``COVARIANCE`` (in ``unit``^4).

        Parameters
        ----------
        path : str or path-like
            Output file, written atomically.
        overwrite : bool, default=False
            Replace an existing file.
        unit : {'uK', 'K'}, default='uK'
            Spectra in uK^2 or K^2 (the covariance in that unit squared).

        Returns
        -------
        Path
        """
        bins = [("ell_min", "K", self.ell_min), ("ell_max", "K", self.ell_max), ("ell_eff", "D", self.ell_eff)]
        values = {c: getattr(self, c) for c in _SPECTRUM_COLUMNS}
        return write_bandpower_fits(path, bins, values, self.metadata, self.covariance, unit=unit, overwrite=overwrite)

    # ------------------------------------------------------------------ figure
    def plot(self, path, *, theory_cl=None, overwrite=False, title=None) -> Path:
        """Draw ``D_l`` with error bars; with ``theory_cl``, the binned theory and a residual panel.

        Parameters
        ----------
        path : str or path-like
            ``.png`` or ``.pdf`` (format from the suffix), written atomically.
        theory_cl : array_like, optional
            Sky ``C_l`` in K^2 from ell = 0, covering the bins; drawn as a
            curve and averaged over the bins the same way as the bandpowers
            (flat bin average, no bandpower windows).
        overwrite : bool, default=False
            Replace an existing file.
        title : str, optional
            Figure title (default: the ``spectrum`` kind and lmax from the metadata).

        Returns
        -------
        Path
        """
        out, fmt = check_figure_path(path, overwrite)
        theory = None
        if theory_cl is not None:
            theory = check_cl(theory_cl, "theory_cl", lmax=int(self.ell_max[-1]), allow_negative=True)

        if theory is not None:
            fig, ax, rax = new_figure(5.6, height_ratios=(3, 1.2), hspace=0.06)
        else:
            fig, ax, rax = new_figure(4.4)
        x = self.ell_eff
        half = 0.5 * (self.ell_max - self.ell_min + 1)
        if theory is not None:
            ell = np.arange(1, min(theory.size, int(self.ell_max[-1]) + 1 + int(half[-1])))
            ax.plot(ell, ell * (ell + 1) * theory[ell] / (2 * np.pi) * UK2, color=SOFT, lw=1.2, label="theory", zorder=1)
            binned_dl = self.binning().bin_spectrum(theory) * self.binning().dl_factor
            ax.plot(x, binned_dl * UK2, ls="none", marker="s", ms=5, mfc="white", mec=SOFT, mew=1.2,
                    label="theory, bin average", zorder=2)
        ax.errorbar(x, self.dl * UK2, yerr=self.dl_err * UK2, xerr=half, fmt="o", ms=4, color=INK,
                    ecolor=INK, elinewidth=1.0, capsize=0, label="measured", zorder=3)
        ax.axhline(0.0, color=SOFT, lw=0.6, zorder=0)
        ax.set_ylabel(DL_LABEL)
        style_axes(ax, rax)
        if theory is not None:
            ax.legend(frameon=False, fontsize=8, loc="best")
            rax.errorbar(x, (self.dl - binned_dl) * UK2, yerr=self.dl_err * UK2, xerr=half, fmt="o", ms=3.5,
                         color=ACCENT, ecolor=ACCENT, elinewidth=1.0, capsize=0)
            rax.axhline(0.0, color=SOFT, lw=0.9)
            rax.set_ylabel(r"$\Delta D_\ell$ [$\mu$K$^2$]")
            rax.set_xlabel(ELL_LABEL)
        else:
            ax.set_xlabel(ELL_LABEL)
        if title is None:
            kind = self.metadata.get("spectrum", "auto")
            title = f"{kind}-spectrum, {self.n_bins} bandpowers, lmax {self.metadata.get('lmax', int(self.ell_max[-1]))}"
        return save_figure(fig, ax, rax, title, out, fmt, overwrite=overwrite)

    def __repr__(self):
        return (
            f"Bandpowers(n_bins={self.n_bins}, ell {int(self.ell_min[0])}..{int(self.ell_max[-1])}, "
            f"spectrum={self.metadata.get('spectrum', '?')!r})"
        )
