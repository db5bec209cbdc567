"""The result of a polarized spectrum measurement: TT, TE, TB, EE, EB, BB bandpowers, errors, covariance.

:class:`PolarizedBandpowers` is a frozen value object.  Its table has one row per spectrum and bin, with
the columns ``spectrum,ell_min,ell_max,ell_eff,cl,cl_err,dl,dl_err`` (``spectrum`` is one of TT, TE, TB,
EE, EB, BB, in that order), after ``# key: value`` comment lines recording the inputs; it is written by
the project's one text-table writer (:func:`cmbtools._core.tables.write_text_table`) or as a FITS binary
table (same columns; the covariance of the ``cl`` values, spectrum-major, in a ``COVARIANCE``
extension).  :meth:`PolarizedBandpowers.read_csv` reads a table back; indexing by a spectrum name gives a
temperature-style :class:`~cmbtools.spectrum.Bandpowers` of that spectrum.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np

from cmbtools._core import files as _io
from cmbtools._core.checks import check_cl
from cmbtools._core.binned_tables import POLARIZED_BANDPOWER_COLUMNS, POLARIZED_BANDPOWER_SPECTRA, write_binned_table
from cmbtools._core.tables import metadata_comments, power_unit_scale
from cmbtools.exceptions import InputFileError, InvalidInputError
from cmbtools.spectrum.bandpowers import clean_metadata, write_bandpower_fits

__all__ = ["SPECTRA", "POLARIZED_COLUMNS", "PolarizedBandpowers"]

#: The six spectra, in the order of every table and array.
SPECTRA = POLARIZED_BANDPOWER_SPECTRA
#: The columns of a polarized bandpower table.
POLARIZED_COLUMNS = POLARIZED_BANDPOWER_COLUMNS
_VALUES = ("cl", "cl_err", "dl", "dl_err")


@dataclasses.dataclass(frozen=True, eq=False)
class PolarizedBandpowers:
    """TT, TE, TB, EE, EB, BB bandpowers with errors, covariance and a record of the inputs.

    Parameters
    ----------
    ell_min, ell_max : ndarray of int, shape (n_bins,)
        Bin limits (inclusive), the same for the six spectra.
    ell_eff : ndarray of shape (n_bins,)
        Mean multipole of each bin.
    cl, cl_err, dl, dl_err : ndarray of shape (6, n_bins)
        Bandpowers and 1-sigma errors of ``C_l`` and ``D_l`` (K^2), rows in the order of :data:`SPECTRA`.
    covariance : ndarray of shape (6 n_bins, 6 n_bins) or None
        Covariance of the ``cl`` values (K^4), spectrum-major (TT bins first).
    metadata : dict of str to str, int or float
        The inputs (masks' hashes, nside, lmax, bins, beams, pixel windows, purification, version, ...).
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
        lo = np.array(self.ell_min, dtype=np.int64)
        n = lo.size
        for name in ("ell_min", "ell_max", "ell_eff"):
            a = np.array(getattr(self, name), dtype=np.int64 if name != "ell_eff" else np.float64)
            if a.shape != (n,):
                raise InvalidInputError(f"PolarizedBandpowers.{name} must have shape ({n},). Got {a.shape} instead.")
            a.setflags(write=False)
            object.__setattr__(self, name, a)
        for name in _VALUES:
            a = np.array(getattr(self, name), dtype=np.float64)
            if a.shape != (len(SPECTRA), n):
                raise InvalidInputError(
                    f"PolarizedBandpowers.{name} must have shape ({len(SPECTRA)}, {n}). Got {a.shape} instead."
                )
            a.setflags(write=False)
            object.__setattr__(self, name, a)
        if self.covariance is not None:
            c = np.array(self.covariance, dtype=np.float64)
            if c.shape != (len(SPECTRA) * n, len(SPECTRA) * n):
                raise InvalidInputError(f"PolarizedBandpowers.covariance must have shape ({6 * n}, {6 * n}).")
            c.setflags(write=False)
            object.__setattr__(self, "covariance", c)
        meta = clean_metadata("PolarizedBandpowers", self.metadata)
        object.__setattr__(self, "metadata", meta)

    @classmethod
    def from_arrays(cls, binning, cl, covariance, metadata):
        """Bandpowers from ``cl`` of shape (6, n_bins) and their covariance (errors = its diagonal's root).

        Parameters
        ----------
        binning : Binning
            The bins.
        cl : ndarray of shape (6, n_bins)
            ``C_l`` bandpowers, K^2.
        covariance : ndarray of shape (6 n_bins, 6 n_bins)
            Their covariance, K^4.
        metadata : dict
            The record of the inputs.

        Returns
        -------
        PolarizedBandpowers
        """
        cl = np.asarray(cl, dtype=np.float64)
        err = np.sqrt(np.clip(np.diag(covariance), 0.0, None)).reshape(cl.shape)
        f = binning.dl_factor
        return cls(binning.ell_min, binning.ell_max, binning.ell_eff, cl, err, cl * f, err * f, covariance, metadata)

    @property
    def n_bins(self) -> int:
        """Number of bins per spectrum."""
        return int(self.ell_min.size)

    def __getitem__(self, spectrum):
        """The bandpowers of one spectrum ('TT', ..., 'BB') as a :class:`~cmbtools.spectrum.Bandpowers`."""
        from cmbtools.spectrum.bandpowers import Bandpowers

        if spectrum not in SPECTRA:
            raise InvalidInputError(f"Unknown spectrum {spectrum!r}; use one of {', '.join(SPECTRA)}.")
        i = SPECTRA.index(spectrum)
        nb = self.n_bins
        cov = None if self.covariance is None else self.covariance[i * nb:(i + 1) * nb, i * nb:(i + 1) * nb]
        meta = dict(self.metadata)
        meta["spectrum"] = spectrum
        return Bandpowers(self.ell_min, self.ell_max, self.ell_eff, self.cl[i], self.cl_err[i], self.dl[i],
                          self.dl_err[i], cov, meta)

    # ------------------------------------------------------------------ tables
    def write_csv(self, path, *, overwrite=False, unit="uK") -> Path:
        """Write the table as CSV: ``# key: value`` lines, the column names, one row per spectrum and bin.

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
        return write_binned_table(path, _VALUES, self.ell_min, self.ell_max, self.ell_eff,
                                  [getattr(self, c) * scale for c in _VALUES], spectra=SPECTRA,
                                  comments=metadata_comments("cmbtools polarized bandpowers", unit, self.metadata),
                                  overwrite=overwrite)

    @classmethod
    def read_csv(cls, path) -> "PolarizedBandpowers":
        """Read a table written by :meth:`write_csv` (values converted back to K^2; no covariance).

        Parameters
        ----------
        path : str or path-like
            The table.

        Returns
        -------
        PolarizedBandpowers

        Raises
        ------
        InputFileError
            Missing file, wrong columns, a cell that is not a number, spectra or bins that do not repeat
            the same bins for TT, TE, TB, EE, EB, BB in that order, or an unknown unit.
        """
        from cmbtools._core.binned_tables import read_polarized_bandpower_table

        p, cols, meta = read_polarized_bandpower_table(path)
        try:
            return cls(cols["ell_min"], cols["ell_max"], cols["ell_eff"], cols["cl"], cols["cl_err"], cols["dl"],
                       cols["dl_err"], None, meta)
        except InvalidInputError as exc:
            raise InputFileError(p, str(exc)) from None

    def write_fits(self, path, *, overwrite=False, unit="uK") -> Path:
        """Write the table as a FITS binary table (metadata in ``HIERARCH CMBTOOLS`` cards, covariance extension).

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
        nb = self.n_bins
        keys = [
            ("spectrum", "2A", np.repeat(np.array(SPECTRA), nb)),
            ("ell_min", "K", np.tile(self.ell_min, len(SPECTRA))),
            ("ell_max", "K", np.tile(self.ell_max, len(SPECTRA))),
            ("ell_eff", "D", np.tile(self.ell_eff, len(SPECTRA))),
        ]
        values = {c: getattr(self, c).ravel() for c in _VALUES}
        return write_bandpower_fits(path, keys, values, self.metadata, self.covariance, unit=unit, overwrite=overwrite)

    # ------------------------------------------------------------------ figure
    def plot(self, path, *, theory=None, overwrite=False, title=None) -> Path:
        """Draw one panel per spectrum (D_l with errors); with ``theory``, the binned theory and residuals.

        Parameters
        ----------
        path : str or path-like
            ``.png`` or ``.pdf``, written atomically.
        theory : dict, optional
            Sky spectra ``C_l`` (K^2, from ell = 0) under keys of :data:`SPECTRA` (missing ones are zero),
            drawn as curves and averaged over the bins like the bandpowers.
        overwrite : bool, default=False
            Replace an existing file.
        title : str, optional
            Figure title (default: the spectrum kind and lmax from the metadata).

        Returns
        -------
        Path
        """
        from cmbtools._core.figures import ACCENT, DL_LABEL, ELL_LABEL, INK, SOFT, check_figure_path, style_axes
        from cmbtools._version import __version__
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        out, fmt = check_figure_path(path, overwrite)
        lmax_b = int(self.ell_max[-1])
        th = None
        if theory is not None:
            if not isinstance(theory, dict) or set(theory) - set(SPECTRA):
                raise InvalidInputError(f"The 'theory' parameter must be a dict keyed by {', '.join(SPECTRA)}.")
            th = {s: check_cl(v, f"theory[{s!r}]", lmax=lmax_b, allow_negative=True) for s, v in theory.items()}
        uk2 = 1.0e12
        fig = Figure(figsize=(12.0, 7.6 if th is not None else 6.0), dpi=120)
        FigureCanvasAgg(fig)
        outer = fig.add_gridspec(2, 3, hspace=0.32, wspace=0.28)
        x = self.ell_eff
        half = 0.5 * (self.ell_max - self.ell_min + 1)
        binning = self[SPECTRA[0]].binning()
        for i, s in enumerate(SPECTRA):
            if th is not None and s in th:
                g = outer[i // 3, i % 3].subgridspec(2, 1, height_ratios=(3, 1.2), hspace=0.05)
                ax = fig.add_subplot(g[0])
                rax = fig.add_subplot(g[1], sharex=ax)
            else:
                ax, rax = fig.add_subplot(outer[i // 3, i % 3]), None
            if rax is not None:
                cl = th[s]
                ell = np.arange(2, min(cl.size, lmax_b + 1))
                ax.plot(ell, ell * (ell + 1) * cl[ell] / (2 * np.pi) * uk2, color=SOFT, lw=1.0, zorder=1)
                binned = binning.bin_spectrum(cl) * binning.dl_factor
                rax.errorbar(x, (self.dl[i] - binned) * uk2, yerr=self.dl_err[i] * uk2, xerr=half, fmt="o", ms=2.5,
                             color=ACCENT, ecolor=ACCENT, elinewidth=0.8, capsize=0)
                rax.axhline(0.0, color=SOFT, lw=0.8)
                rax.set_xlabel(ELL_LABEL, fontsize=8)
                rax.tick_params(labelsize=7)
                for lab in ax.get_xticklabels():
                    lab.set_visible(False)
            else:
                ax.set_xlabel(ELL_LABEL, fontsize=8)
            ax.errorbar(x, self.dl[i] * uk2, yerr=self.dl_err[i] * uk2, xerr=half, fmt="o", ms=3, color=INK,
                        ecolor=INK, elinewidth=0.9, capsize=0, zorder=3)
            ax.axhline(0.0, color=SOFT, lw=0.6, zorder=0)
            ax.set_title(s, fontsize=10, loc="left", color=INK)
            ax.tick_params(labelsize=7)
            if i % 3 == 0:
                ax.set_ylabel(DL_LABEL, fontsize=8)
            style_axes(ax, rax)
        if title is None:
            title = (f"{self.metadata.get('spectrum', 'polarized')} spectra, {self.n_bins} bandpowers each, "
                     f"lmax {self.metadata.get('lmax', lmax_b)}")
        fig.suptitle(title, fontsize=11, x=0.01, ha="left", color=INK)
        fig.text(0.99, 0.005, f"cmbtools {__version__}", ha="right", va="bottom", fontsize=6, color=SOFT)
        with _io.atomic_output(out, overwrite=overwrite) as tmp:
            fig.savefig(tmp, format=fmt, bbox_inches="tight")
        return out

    def __repr__(self):
        return (f"PolarizedBandpowers(n_bins={self.n_bins}, ell {int(self.ell_min[0])}..{int(self.ell_max[-1])}, "
                f"spectrum={self.metadata.get('spectrum', '?')!r})")

