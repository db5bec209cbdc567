"""What a Monte Carlo validation of the polarized estimator found, per spectrum and bin
(:class:`PolarizedValidationResult`: one :class:`~cmbtools.simulate.ValidationResult` per spectrum)."""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np

from cmbtools._core.files import atomic_output
from cmbtools._core.tables import key_value_lines
from cmbtools._version import __version__
from cmbtools.exceptions import InvalidInputError
from cmbtools.simulate.validation_result import (
    _TABLE_COLUMNS, ValidationResult, _column_lines, _finite_list, _plain_value, _write_validation_json,
    _write_validation_table,
)

__all__ = ["PolarizedValidationResult", "POLARIZED_SPECTRA"]

#: The six spectra of a polarized validation, in the order of the tables, the JSON and the figure.
POLARIZED_SPECTRA = ("TT", "TE", "TB", "EE", "EB", "BB")



def _finite_or_none(v):
    v = float(v)
    return v if math.isfinite(v) else None


def _headline(biases, ratios, transfers) -> dict:
    """The headline numbers over the finite values of some bins (None where there is none)."""
    def finite(parts):
        a = np.concatenate([np.asarray(p, dtype=np.float64).ravel() for p in parts])
        return a[np.isfinite(a)]

    b, r, t = finite(biases), finite(ratios), finite(transfers)
    return {
        "max_abs_bias_sigma": _finite_or_none(np.max(np.abs(b))) if b.size else None,
        "rms_bias_sigma": _finite_or_none(np.sqrt(np.mean(b**2))) if b.size else None,
        "median_error_ratio": _finite_or_none(np.median(r)) if r.size else None,
        "min_error_ratio": _finite_or_none(np.min(r)) if r.size else None,
        "max_error_ratio": _finite_or_none(np.max(r)) if r.size else None,
        "median_transfer": _finite_or_none(np.median(t)) if t.size else None,
    }


@dataclasses.dataclass(frozen=True, eq=False)
class PolarizedValidationResult:
    """What a Monte Carlo validation of the polarized estimator found, per spectrum and bin.

    Build it with :func:`~cmbtools.simulate.validate_polarized_estimator`, or from bandpowers you
    simulated yourself with :meth:`from_samples`.  ``result['BB']`` is the
    :class:`~cmbtools.simulate.ValidationResult` of one spectrum (C_l bandpowers in K^2; its
    ``transfer`` is not a number where the expectation is zero, as for TB and EB of a parity-even sky).

    Parameters
    ----------
    results : dict
        Spectrum name (TT, TE, TB, EE, EB, BB) to its :class:`~cmbtools.simulate.ValidationResult`,
        all with the same simulations and bins.
    metadata : dict
        Settings of the run (str or number values).
    """

    results: dict
    metadata: dict = dataclasses.field(default_factory=dict)

    def __post_init__(self):
        if not isinstance(self.results, dict) or tuple(self.results) != POLARIZED_SPECTRA:
            raise InvalidInputError(
                f"PolarizedValidationResult.results must be a dict keyed by {', '.join(POLARIZED_SPECTRA)} in that order."
            )
        first = self.results["TT"]
        for name, r in self.results.items():
            if not isinstance(r, ValidationResult):
                raise InvalidInputError(f"PolarizedValidationResult.results[{name!r}] must be a ValidationResult.")
            if (r.n_sims != first.n_sims or not np.array_equal(r.ell_min, first.ell_min)
                    or not np.array_equal(r.ell_max, first.ell_max)):
                raise InvalidInputError(
                    f"PolarizedValidationResult.results[{name!r}] has other simulations or bins than TT's."
                )
        if not isinstance(self.metadata, dict):
            raise InvalidInputError("PolarizedValidationResult.metadata must be a dict of str to str or number.")
        object.__setattr__(self, "results", dict(self.results))
        object.__setattr__(self, "metadata", {str(k): _plain_value(v) for k, v in self.metadata.items()})

    @classmethod
    def from_samples(cls, samples, errors, expected, *, ell_min, ell_max, ell_eff, dl_factor=None, seed=0,
                     metadata=None) -> "PolarizedValidationResult":
        """Compute the statistics of each spectrum from per-simulation bandpowers and their reported errors.

        Parameters
        ----------
        samples, errors : array_like of shape (n_sims, 6, n_bins)
            Recovered bandpowers ``cl`` and reported errors ``cl_err`` of each simulation (K^2), spectra in the
            order TT, TE, TB, EE, EB, BB.
        expected : array_like of shape (6, n_bins)
            The expected bandpowers of each spectrum.
        ell_min, ell_max, ell_eff : array_like of shape (n_bins,)
            First and last multipole of each bin, and its effective multipole.
        dl_factor : array_like of shape (n_bins,), optional
            ``D_l / C_l`` of each bin (default ``ell_eff (ell_eff + 1) / 2 pi``).
        seed : int, default=0
            Master seed of the simulations (recorded).
        metadata : dict, optional
            Settings of the run (str or number values).

        Returns
        -------
        PolarizedValidationResult
        """
        x = np.asarray(samples, dtype=np.float64)
        err = np.asarray(errors, dtype=np.float64)
        exp = np.asarray(expected, dtype=np.float64)
        n6 = len(POLARIZED_SPECTRA)
        if x.ndim != 3 or x.shape[1] != n6:
            raise InvalidInputError(
                f"The 'samples' must have shape (n_sims, {n6}, n_bins). Got shape {x.shape} instead."
            )
        if err.shape != x.shape:
            raise InvalidInputError(f"The 'errors' must have the shape of 'samples' {x.shape}. Got {err.shape} instead.")
        if exp.shape != x.shape[1:]:
            raise InvalidInputError(f"The 'expected' must have shape {x.shape[1:]}. Got {exp.shape} instead.")
        meta = dict(metadata or {})
        results = {
            s: ValidationResult.from_samples(
                x[:, i, :], err[:, i, :], exp[i], ell_min=ell_min, ell_max=ell_max, ell_eff=ell_eff,
                dl_factor=dl_factor, seed=seed, metadata={**meta, "spectrum": s},
            )
            for i, s in enumerate(POLARIZED_SPECTRA)
        }
        return cls(results=results, metadata=meta)

    def __getitem__(self, spectrum) -> ValidationResult:
        """The :class:`~cmbtools.simulate.ValidationResult` of one spectrum ('TT', 'TE', 'TB', 'EE', 'EB', 'BB')."""
        try:
            return self.results[spectrum]
        except (KeyError, TypeError):
            raise InvalidInputError(
                f"No spectrum {spectrum!r}; the spectra are {', '.join(POLARIZED_SPECTRA)}."
            ) from None

    @property
    def n_sims(self) -> int:
        return self.results["TT"].n_sims

    @property
    def n_bins(self) -> int:
        return self.results["TT"].n_bins

    @property
    def seed(self) -> int:
        return self.results["TT"].seed

    @property
    def ell_min(self) -> np.ndarray:
        return self.results["TT"].ell_min

    @property
    def ell_max(self) -> np.ndarray:
        return self.results["TT"].ell_max

    @property
    def ell_eff(self) -> np.ndarray:
        return self.results["TT"].ell_eff

    def worst_bin(self):
        """Where the bias is largest.

        Returns
        -------
        tuple of (str, int) or None
            The spectrum and the bin index of the largest finite ``|bias_sigma|`` (None if no bias is a number).
        """
        best, where = -1.0, None
        for s, r in self.results.items():
            b = np.where(np.isfinite(r.bias_sigma), np.abs(r.bias_sigma), -1.0)
            i = int(np.argmax(b))
            if b[i] > best:
                best, where = float(b[i]), (s, i)
        return where if best >= 0 else None

    def summary(self) -> dict:
        """The headline numbers over all spectra, and per spectrum.

        Keys: ``n_sims``, ``n_bins`` (per spectrum), ``seed``; over every bin of the six spectra:
        ``max_abs_bias_sigma``, ``rms_bias_sigma``, ``median_error_ratio``, ``min_error_ratio``,
        ``max_error_ratio``; ``median_transfer`` over the bins of the spectra with a non-zero expectation;
        and ``spectra``: spectrum name to its own ``max_abs_bias_sigma``, ``rms_bias_sigma``,
        ``median_error_ratio``, ``min_error_ratio``, ``max_error_ratio``, ``median_transfer``
        (None for a number that is not finite, e.g. the transfer of a spectrum expected to be zero).

        With ``6 n_bins`` bins of an unbiased estimator, ``max_abs_bias_sigma`` exceeds 3 with probability
        about ``1 - 0.9973**(6 n_bins)`` (e.g. 23% for 16 bins): judge it with that number in mind.

        Returns
        -------
        dict
        """
        rs = list(self.results.values())
        per = {s: _headline([r.bias_sigma], [r.error_ratio], [r.transfer[np.abs(r.expected) > 0]])
               for s, r in self.results.items()}
        overall = _headline([r.bias_sigma for r in rs], [r.error_ratio for r in rs],
                            [r.transfer[np.abs(r.expected) > 0] for r in rs])
        return {"n_sims": int(self.n_sims), "n_bins": int(self.n_bins), "seed": int(self.seed), **overall,
                "spectra": per}

    def _header_lines(self, unit):
        s = self.summary()
        per = s.pop("spectra")
        return (["cmbtools " + __version__ + ": Monte Carlo validation of the polarized spectrum estimator"]
                + key_value_lines(s.items())
                + key_value_lines((name, ", ".join(f"{k} {v}" for k, v in numbers.items()))
                                  for name, numbers in per.items())
                + key_value_lines(self.metadata.items()) + _column_lines(unit))

    def write_csv(self, path, *, overwrite=False, unit="uK") -> Path:
        """Write the per-bin table of the six spectra as CSV with a commented header (``# key: value`` lines).

        Columns: ``spectrum, ell_min, ell_max, ell_eff, expected, mean, std, analytic_error, bias_sigma,
        error_ratio, transfer``, one row per spectrum and bin (TT's bins first, then TE, TB, EE, EB, BB); the
        power columns in ``unit``^2.  Not-a-number cells (the transfer of TB and EB) are written as ``nan``.

        Parameters
        ----------
        path : str or path-like
            Output file, written atomically.
        overwrite : bool, default=False
            Replace an existing file.
        unit : {'uK', 'K'}, default='uK'
            Power columns in uK^2 or K^2.

        Returns
        -------
        pathlib.Path
            The file written.
        """
        return _write_validation_table(path, list(self.results.values()), self._header_lines(unit),
                                      spectra=tuple(self.results), unit=unit, overwrite=overwrite)

    def write_json(self, path, *, overwrite=False) -> Path:
        """Write :meth:`summary`, the settings and each spectrum's per-bin columns (C_l in K^2) as JSON, atomically.

        Parameters
        ----------
        path : str or path-like
            Output file, written atomically.
        overwrite : bool, default=False
            Replace an existing file.

        Returns
        -------
        pathlib.Path
            The file written.
        """
        columns = {"ell_eff": _finite_list(self.ell_eff),
                   **{s: {name: _finite_list(getattr(r, name)) for name in _TABLE_COLUMNS[3:]}
                      for s, r in self.results.items()}}
        return _write_validation_json(path, self.summary(), self.metadata, self, columns, overwrite=overwrite)

    def plot(self, path, *, overwrite=False, title=None) -> Path:
        """Draw one panel per spectrum: input and mean recovered ``D_l`` with scatter bands, bias and error ratio.

        Each of the six panels has three rows: the expected bandpowers (line), the mean of the recovered ones
        (points with the standard error of the mean) and the +-1, +-2 standard-deviation scatter of one
        simulation (shaded); ``bias_sigma`` per bin with the +-1, +-2, +-3 levels; ``error_ratio`` per bin
        with the band of +-2 of its standard errors ``1/sqrt(2 (n_sims - 1))`` around 1.

        Parameters
        ----------
        path : str or path-like
            ``.png`` or ``.pdf``; written atomically.
        overwrite : bool, default=False
            Replace an existing file.
        title : str, optional
            Figure title (default: the number of simulations and the headline numbers).

        Returns
        -------
        pathlib.Path
            The file written.
        """
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        from cmbtools._core.figures import (
            ACCENT, BAND, DL_LABEL, ELL_LABEL, INK, SOFT, UK2, check_figure_path, style_axes,
        )

        out, fmt = check_figure_path(path, overwrite)
        fig = Figure(figsize=(13.0, 10.5), dpi=110)
        FigureCanvasAgg(fig)
        outer = fig.add_gridspec(2, 3, hspace=0.24, wspace=0.27)
        band = 2.0 / math.sqrt(2.0 * (self.n_sims - 1))
        s_all = self.summary()
        for i, (s, r) in enumerate(self.results.items()):
            g = outer[i // 3, i % 3].subgridspec(3, 1, height_ratios=(3, 1.3, 1.3), hspace=0.07)
            ax = fig.add_subplot(g[0])
            bx = fig.add_subplot(g[1], sharex=ax)
            cx = fig.add_subplot(g[2], sharex=ax)
            x = r.ell_eff
            k = r.dl_factor * UK2
            half = 0.5 * (r.ell_max - r.ell_min + 1)
            for level, alpha in ((2, 0.25), (1, 0.45)):
                ax.fill_between(x, (r.expected - level * r.std) * k, (r.expected + level * r.std) * k, color=BAND,
                                alpha=alpha, lw=0)
            ax.plot(x, r.expected * k, color=INK, lw=1.2)
            ax.errorbar(x, r.mean * k, yerr=r.std / math.sqrt(r.n_sims) * k, xerr=half, fmt="o", ms=2.8,
                        color=ACCENT, ecolor=ACCENT, elinewidth=0.9, capsize=0)
            ax.axhline(0.0, color=SOFT, lw=0.6, zorder=0)
            one = s_all["spectra"][s]

            def num(v, spec):
                return "n/a" if v is None else format(v, spec)

            ax.set_title(f"{s}   max |bias| {num(one['max_abs_bias_sigma'], '.2f')} sigma, error ratio "
                         f"{num(one['min_error_ratio'], '.2f')}-{num(one['max_error_ratio'], '.2f')}",
                         fontsize=8.5, loc="left", color=INK)
            for level, alpha in ((3, 0.10), (2, 0.16), (1, 0.24)):
                bx.axhspan(-level, level, color=BAND, alpha=alpha, lw=0)
            bx.axhline(0.0, color=SOFT, lw=0.8)
            bx.plot(x, r.bias_sigma, "o", ms=2.8, color=ACCENT)
            finite_b = r.bias_sigma[np.isfinite(r.bias_sigma)]
            lim = max(3.5, float(np.max(np.abs(finite_b), initial=0.0)) * 1.15)
            bx.set_ylim(-lim, lim)
            cx.axhspan(1.0 - band, 1.0 + band, color=BAND, alpha=0.24, lw=0)
            cx.axhline(1.0, color=SOFT, lw=0.8)
            cx.plot(x, r.error_ratio, "s", ms=2.6, color=ACCENT)
            finite = r.error_ratio[np.isfinite(r.error_ratio)]
            spread = float(np.max(np.abs(finite - 1.0), initial=0.0)) if finite.size else 0.0
            cx.set_ylim(1.0 - max(0.2, 1.15 * spread), 1.0 + max(0.2, 1.15 * spread))
            cx.set_xlabel(ELL_LABEL, fontsize=8)
            if i % 3 == 0:
                ax.set_ylabel(DL_LABEL, fontsize=8)
                bx.set_ylabel(r"bias [$\sigma/\sqrt{N}$]", fontsize=7)
                cx.set_ylabel("scatter / error", fontsize=7)
            for a in (ax, bx):
                for lab in a.get_xticklabels():
                    lab.set_visible(False)
            for a in (ax, bx, cx):
                a.tick_params(labelsize=7)
            style_axes(ax, bx, cx)
        s = self.summary()
        if title is None:
            def num(key, spec):
                return "n/a" if s[key] is None else format(s[key], spec)

            title = (f"{self.n_sims} simulations, six spectra ({self.metadata.get('spectrum_kind', 'polarized')}): "
                     f"max |bias| {num('max_abs_bias_sigma', '.2f')} sigma, error ratio "
                     f"{num('min_error_ratio', '.3f')} to {num('max_error_ratio', '.3f')}")
        fig.suptitle(title, fontsize=11, x=0.01, ha="left", color=INK)
        fig.text(0.99, 0.005, f"cmbtools {__version__}; line: input through the bandpower windows, points: mean "
                 "of the simulations, bands: +-1 and +-2 sigma of one simulation", ha="right", va="bottom",
                 fontsize=6.5, color=SOFT)
        with atomic_output(out, overwrite=overwrite) as tmp:
            fig.savefig(tmp, format=fmt, bbox_inches="tight")
        return out

    def __repr__(self):
        s = self.summary()
        v = s["max_abs_bias_sigma"]
        return (f"PolarizedValidationResult(n_sims={self.n_sims}, n_bins={self.n_bins}, "
                f"max_abs_bias_sigma={'n/a' if v is None else format(v, '.3g')})")
