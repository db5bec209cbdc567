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

from . import _io
from ._binning import Binning
from ._validation import check_cl
from ._version import __version__
from .exceptions import InputFileError, InvalidInputError

__all__ = ["Bandpowers", "COLUMNS"]

#: The columns of the tables, in order.
COLUMNS = ("ell_min", "ell_max", "ell_eff", "cl", "cl_err", "dl", "dl_err")

_UNITS = {"uK": 1.0e12, "K": 1.0}
_SPECTRUM_COLUMNS = ("cl", "cl_err", "dl", "dl_err")


def _unit_scale(unit):
    if unit not in _UNITS:
        raise InvalidInputError(f"The 'unit' parameter must be 'uK' or 'K'. Got {unit!r} instead.")
    return _UNITS[unit]


def _clean_value(key, value):
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, numbers.Integral):
        return int(value)
    if isinstance(value, numbers.Real):
        return float(value)
    if isinstance(value, str):
        return " ".join(value.splitlines())
    raise InvalidInputError(
        f"Bandpowers.metadata[{key!r}] must be a string or a number. Got {type(value).__name__} instead."
    )


def _parse_value(text):
    t = text.strip()
    try:
        return int(t)
    except ValueError:
        pass
    try:
        return float(t)
    except ValueError:
        return t


@dataclasses.dataclass(frozen=True, eq=False)
class Bandpowers:
    """Binned angular power spectrum with errors and a record of how it was measured.

    Attributes
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
        if not isinstance(self.metadata, dict):
            raise InvalidInputError("Bandpowers.metadata must be a dict of str to str or number.")
        meta = {}
        for k, v in self.metadata.items():
            if not isinstance(k, str) or not k or any(c in k for c in ":\n\r"):
                raise InvalidInputError(f"Bandpowers.metadata keys must be non-empty strings without ':'. Got {k!r}.")
            meta[k] = _clean_value(k, v)
        object.__setattr__(self, "metadata", meta)

    @property
    def n_bins(self) -> int:
        return int(self.cl.size)

    def with_metadata(self, **items) -> "Bandpowers":
        """A copy with ``items`` added to (or replacing entries of) the metadata."""
        meta = dict(self.metadata)
        meta.update(items)
        return dataclasses.replace(self, metadata=meta)

    def binning(self) -> Binning:
        """The :class:`Binning` of these bandpowers (weighting from the metadata, default 'dl')."""
        return Binning(self.ell_min, self.ell_max, str(self.metadata.get("bins_weighting", "dl")))

    # ------------------------------------------------------------------ CSV
    def _header_lines(self, unit):
        lines = ["# cmbtools bandpowers", f"# unit: {unit}^2"]
        for k, v in self.metadata.items():
            if k == "unit":
                continue
            lines.append(f"# {k}: {v}")
        return lines

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
        scale = _unit_scale(unit)
        out = _io.check_output_path(path, overwrite=overwrite)
        lines = self._header_lines(unit)
        lines.append(",".join(COLUMNS))
        for i in range(self.n_bins):
            row = [str(int(self.ell_min[i])), str(int(self.ell_max[i])), repr(float(self.ell_eff[i]))]
            row += [repr(float(getattr(self, c)[i] * scale)) for c in _SPECTRUM_COLUMNS]
            lines.append(",".join(row))
        with _io.atomic_output(out, overwrite=overwrite) as tmp:
            tmp.write_text("\n".join(lines) + "\n", encoding="utf-8")
        return out

    @classmethod
    def read_csv(cls, path) -> "Bandpowers":
        """Read a table written by :meth:`write_csv` (values converted back to K^2).

        Raises
        ------
        InputFileError
            Missing file, wrong columns, a cell that is not a number, a bin
            limit that is not a whole number, or an unknown unit.
        """
        p = _io.check_input_file(path)
        try:
            text = p.read_text(encoding="utf-8-sig")  # -sig: a leading byte-order mark is not part of the table
        except UnicodeDecodeError:
            raise InputFileError(p, "is not a UTF-8 text table") from None
        meta = {}
        header = None
        rows = []
        for lineno, raw in enumerate(text.splitlines(), start=1):
            line = raw.strip()
            if not line:
                continue
            if line.startswith("#"):
                body = line[1:].strip()
                if ":" in body:
                    k, v = body.split(":", 1)
                    meta[k.strip()] = _parse_value(v)
                continue
            cells = [c.strip() for c in line.split(",")]
            if header is None:
                if tuple(cells) != COLUMNS:
                    raise InputFileError(p, f"line {lineno}: expected the columns {','.join(COLUMNS)}; found {line!r}")
                header = cells
                continue
            if len(cells) != len(COLUMNS):
                raise InputFileError(p, f"line {lineno}: expected {len(COLUMNS)} values, found {len(cells)}")
            try:
                rows.append([float(c) for c in cells])
            except ValueError:
                raise InputFileError(p, f"line {lineno}: a value is not a number ({line!r})") from None
        if header is None:
            raise InputFileError(p, f"no column header {','.join(COLUMNS)} found")
        if not rows:
            raise InputFileError(p, "the table has no rows")
        unit_text = str(meta.pop("unit", "uK^2"))
        unit = unit_text[:-2] if unit_text.endswith("^2") else unit_text
        if unit not in _UNITS:
            raise InputFileError(p, f"unknown unit {unit_text!r} (expected uK^2 or K^2)")
        scale = _UNITS[unit]
        a = np.array(rows)
        cols = {c: a[:, i] for i, c in enumerate(COLUMNS)}
        for c in ("ell_min", "ell_max"):
            v = cols[c]
            bad = ~np.isfinite(v) | (v != np.round(v)) | (np.abs(v) > 2**62)
            if bad.any():
                j = int(np.argmax(bad))
                raise InputFileError(p, f"data row {j + 1}: {c} = {float(v[j])!r} is not a whole number")
        for c in _SPECTRUM_COLUMNS:
            cols[c] = cols[c] / scale
        try:
            return cls(
                ell_min=cols["ell_min"].astype(np.int64),
                ell_max=cols["ell_max"].astype(np.int64),
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
        unit : {'uK', 'K'}, default='uK'

        Returns
        -------
        Path
        """
        from astropy.io import fits

        scale = _unit_scale(unit)
        out = _io.check_output_path(path, overwrite=overwrite)
        cols = [
            fits.Column(name="ell_min", format="K", array=self.ell_min),
            fits.Column(name="ell_max", format="K", array=self.ell_max),
            fits.Column(name="ell_eff", format="D", array=self.ell_eff),
        ]
        for c in _SPECTRUM_COLUMNS:
            cols.append(fits.Column(name=c, format="D", unit=f"{unit}^2", array=getattr(self, c) * scale))
        table = fits.BinTableHDU.from_columns(cols, name="BANDPOWERS")
        hdr = table.header
        hdr["HIERARCH CMBTOOLS UNIT"] = f"{unit}^2"
        for k, v in self.metadata.items():
            if k == "unit":
                continue
            hdr[f"HIERARCH CMBTOOLS {k.upper()}"] = v
        hdus = [fits.PrimaryHDU(), table]
        if self.covariance is not None:
            hdus.append(fits.ImageHDU(self.covariance * scale * scale, name="COVARIANCE"))
            hdus[-1].header["BUNIT"] = f"{unit}^4"
        with _io.atomic_output(out, overwrite=overwrite) as tmp:
            fits.HDUList(hdus).writeto(tmp, overwrite=True)
        return out

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
        title : str, optional
            Figure title (default: the ``spectrum`` kind and lmax from the metadata).

        Returns
        -------
        Path
        """
        suffix = Path(path).suffix.lower()
        if suffix not in (".png", ".pdf"):
            raise InvalidInputError(f"The figure file must end in .png or .pdf. Got {str(path)!r} instead.")
        out = _io.check_output_path(path, overwrite=overwrite)
        theory = None
        if theory_cl is not None:
            theory = check_cl(theory_cl, "theory_cl", lmax=int(self.ell_max[-1]), allow_negative=True)

        from matplotlib.figure import Figure
        from matplotlib.backends.backend_agg import FigureCanvasAgg

        uk2 = 1.0e12
        ink, accent, soft = "#1b2a41", "#c8553d", "#8d99ae"
        fig = Figure(figsize=(7.5, 5.6 if theory is not None else 4.4), dpi=130)
        FigureCanvasAgg(fig)
        if theory is not None:
            gs = fig.add_gridspec(2, 1, height_ratios=(3, 1.2), hspace=0.06)
            ax = fig.add_subplot(gs[0])
            rax = fig.add_subplot(gs[1], sharex=ax)
        else:
            ax = fig.add_subplot(1, 1, 1)
            rax = None
        x = self.ell_eff
        half = 0.5 * (self.ell_max - self.ell_min + 1)
        if theory is not None:
            ell = np.arange(1, min(theory.size, int(self.ell_max[-1]) + 1 + int(half[-1])))
            ax.plot(ell, ell * (ell + 1) * theory[ell] / (2 * np.pi) * uk2, color=soft, lw=1.2, label="theory", zorder=1)
            binned_dl = self.binning().bin_spectrum(theory) * self.binning().dl_factor
            ax.plot(x, binned_dl * uk2, ls="none", marker="s", ms=5, mfc="white", mec=soft, mew=1.2,
                    label="theory, bin average", zorder=2)
        ax.errorbar(x, self.dl * uk2, yerr=self.dl_err * uk2, xerr=half, fmt="o", ms=4, color=ink,
                    ecolor=ink, elinewidth=1.0, capsize=0, label="measured", zorder=3)
        ax.axhline(0.0, color=soft, lw=0.6, zorder=0)
        ax.set_ylabel(r"$D_\ell = \ell(\ell+1)C_\ell/2\pi$  [$\mu$K$^2$]")
        for a in (ax, rax):
            if a is None:
                continue
            a.grid(True, color="#e5e8ec", lw=0.6)
            a.set_axisbelow(True)
            for side in ("top", "right"):
                a.spines[side].set_visible(False)
        if theory is not None:
            ax.legend(frameon=False, fontsize=8, loc="best")
            rax.errorbar(x, (self.dl - binned_dl) * uk2, yerr=self.dl_err * uk2, xerr=half, fmt="o", ms=3.5,
                         color=accent, ecolor=accent, elinewidth=1.0, capsize=0)
            rax.axhline(0.0, color=soft, lw=0.9)
            rax.set_ylabel(r"$\Delta D_\ell$ [$\mu$K$^2$]")
            rax.set_xlabel(r"multipole $\ell$")
            for lab in ax.get_xticklabels():
                lab.set_visible(False)
        else:
            ax.set_xlabel(r"multipole $\ell$")
        if title is None:
            kind = self.metadata.get("spectrum", "auto")
            title = f"{kind}-spectrum, {self.n_bins} bandpowers, lmax {self.metadata.get('lmax', int(self.ell_max[-1]))}"
        ax.set_title(title, fontsize=10, loc="left", color=ink)
        fig.text(0.99, 0.005, f"cmbtools {__version__}", ha="right", va="bottom", fontsize=6, color=soft)
        with _io.atomic_output(out, overwrite=overwrite) as tmp:
            fig.savefig(tmp, format=suffix[1:], bbox_inches="tight")
        return out

    def __repr__(self):
        return (
            f"Bandpowers(n_bins={self.n_bins}, ell {int(self.ell_min[0])}..{int(self.ell_max[-1])}, "
            f"spectrum={self.metadata.get('spectrum', '?')!r})"
        )
