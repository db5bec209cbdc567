"""What a Monte Carlo validation of the spectrum estimator found, bin by bin (:class:`ValidationResult`)."""

from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path

import numpy as np

from cmbtools._core.checks import check_int
from cmbtools._core.figures import (
    ACCENT,
    BAND,
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
from cmbtools._core.files import atomic_output, check_output_path
from cmbtools._core.binned_tables import write_binned_table
from cmbtools._core.tables import key_value_lines, power_unit_scale
from cmbtools._version import __version__
from cmbtools.exceptions import InvalidInputError

__all__ = ["ValidationResult"]


# --------------------------------------------------------------------------- validation of the estimator

_TABLE_COLUMNS = (
    "ell_min", "ell_max", "ell_eff", "expected", "mean", "std", "analytic_error", "bias_sigma", "error_ratio", "transfer",
)
_POWER_COLUMNS = ("expected", "mean", "std", "analytic_error")


def _column_lines(unit):
    """The comment lines of a validation table that say what its columns hold."""
    return [f"unit: {unit}^2 (columns expected, mean, std, analytic_error; C_l bandpowers)",
            "bias_sigma = (mean - expected) / (std / sqrt(n_sims)); error_ratio = std / analytic_error;"
            " transfer = mean / expected"]


def _write_validation_table(path, results, comments, *, spectra=None, unit="uK", overwrite=False) -> Path:
    """The per-bin table of one validation (``results = [result]``) or of one per spectrum (``spectra``): the
    columns ``_TABLE_COLUMNS`` (after ``spectrum``), ``ell_eff`` to 6 and the others to 10 significant digits,
    the power columns in ``unit``^2."""
    scale = power_unit_scale(unit)
    first = results[0]
    values = [np.array([getattr(r, name) for r in results]) * (scale if name in _POWER_COLUMNS else 1.0)
              for name in _TABLE_COLUMNS[3:]]
    if spectra is None:
        values = [v[0] for v in values]
    return write_binned_table(path, _TABLE_COLUMNS[3:], first.ell_min, first.ell_max, first.ell_eff, values,
                              spectra=spectra, comments=comments, overwrite=overwrite,
                              number=lambda v: f"{v:.10g}", ell_eff_number=lambda v: f"{v:.6g}")


def _finite_list(a) -> list:
    """The values as Python floats for JSON, None for a value that is not finite."""
    return [None if not math.isfinite(float(v)) else float(v) for v in np.asarray(a).ravel()]


def _write_validation_json(path, summary, metadata, bins, columns, *, overwrite=False) -> Path:
    """The JSON document of a validation: ``summary``, the software, the settings, ``bins`` (``ell_min``,
    ``ell_max`` of ``bins``, then ``columns``) and the unit, written atomically."""
    out = check_output_path(path, overwrite=overwrite)
    doc = dict(summary)
    doc["software"] = f"cmbtools {__version__}"
    doc["settings"] = dict(metadata)
    doc["bins"] = {"ell_min": [int(v) for v in bins.ell_min], "ell_max": [int(v) for v in bins.ell_max], **columns}
    doc["unit"] = "K^2"
    with atomic_output(out, overwrite=overwrite) as tmp:
        tmp.write_text(json.dumps(doc, indent=2) + "\n")
    return out


def _plain_value(value):
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else str(value)
    return " ".join(str(value).splitlines())


def _frozen_float(a, name, shape=None):
    arr = np.array(a, dtype=np.float64)
    if shape is not None and arr.shape != shape:
        raise InvalidInputError(f"ValidationResult.{name} must have shape {shape}. Got {arr.shape} instead.")
    arr.setflags(write=False)
    return arr


@dataclasses.dataclass(frozen=True, eq=False)
class ValidationResult:
    """What a Monte Carlo validation of the spectrum estimator found, bin by bin.

    Build it with :func:`validate_estimator` / :func:`validate_pipeline`, or
    from bandpowers you simulated yourself with :meth:`from_samples`.  All
    spectra are ``C_l`` bandpowers in K^2.

    Parameters
    ----------
    n_sims : int
        Number of simulations (>= 2).
    ell_min, ell_max : ndarray of int, shape (n_bins,)
        First and last multipole of each bin (inclusive).
    ell_eff : ndarray of shape (n_bins,)
        Effective multipole of each bin.
    expected : ndarray of shape (n_bins,)
        The input spectrum as the estimator should return it on average (the
        input ``C_l`` through the bandpower windows).
    samples : ndarray of shape (n_sims, n_bins)
        The recovered bandpowers of every simulation, in simulation order.
    mean, std : ndarray of shape (n_bins,)
        Mean and standard deviation (``ddof=1``) of the recovered bandpowers.
    covariance : ndarray of shape (n_bins, n_bins)
        Sample covariance of the recovered bandpowers (``ddof=1``).
    analytic_error : ndarray of shape (n_bins,)
        The estimator's reported error bar ``cl_err``, averaged over the simulations.
    bias_sigma : ndarray of shape (n_bins,)
        ``(mean - expected) / (std / sqrt(n_sims))``: the bias in units of the
        standard error of the mean.  For an unbiased estimator each value is
        drawn from Student's t distribution with ``n_sims - 1`` degrees of
        freedom (about N(0, 1)).
    error_ratio : ndarray of shape (n_bins,)
        ``std / analytic_error``: 1 when the reported errors match the scatter.
        Its own relative uncertainty is about ``1/sqrt(2 (n_sims - 1))``.
    transfer : ndarray of shape (n_bins,)
        ``mean / expected``, the per-bin transfer function of the whole
        pipeline (1 when nothing filters the signal).
    dl_factor : ndarray of shape (n_bins,)
        The factor that turns the ``C_l`` bandpowers into ``D_l`` ones (for tables and figures).
    seed : int
        Master seed of the simulations.
    mean_pseudo_cl : ndarray of shape (lmax+1,) or None
        Mean pseudo-spectrum of the masked, filtered skies (before noise), if recorded.
    metadata : dict
        Settings of the run (nside, lmax, sky fractions, beam, noise, ...), str or number values.
    """

    n_sims: int
    ell_min: np.ndarray
    ell_max: np.ndarray
    ell_eff: np.ndarray
    expected: np.ndarray
    samples: np.ndarray
    mean: np.ndarray
    std: np.ndarray
    covariance: np.ndarray
    analytic_error: np.ndarray
    bias_sigma: np.ndarray
    error_ratio: np.ndarray
    transfer: np.ndarray
    dl_factor: np.ndarray
    seed: int = 0
    mean_pseudo_cl: np.ndarray | None = None
    metadata: dict = dataclasses.field(default_factory=dict)

    def __post_init__(self):
        n_sims = check_int(self.n_sims, "n_sims", minimum=2)
        object.__setattr__(self, "n_sims", n_sims)
        ell_min = np.array(self.ell_min, dtype=np.int64)
        if ell_min.ndim != 1 or ell_min.size == 0:
            raise InvalidInputError("ValidationResult.ell_min must be a non-empty 1-d array.")
        ell_min.setflags(write=False)
        object.__setattr__(self, "ell_min", ell_min)
        nb = ell_min.size
        ell_max = np.array(self.ell_max, dtype=np.int64)
        if ell_max.shape != (nb,):
            raise InvalidInputError(f"ValidationResult.ell_max must have shape ({nb},). Got {ell_max.shape} instead.")
        ell_max.setflags(write=False)
        object.__setattr__(self, "ell_max", ell_max)
        for name in ("ell_eff", "expected", "mean", "std", "analytic_error", "bias_sigma", "error_ratio", "transfer", "dl_factor"):
            object.__setattr__(self, name, _frozen_float(getattr(self, name), name, (nb,)))
        object.__setattr__(self, "samples", _frozen_float(self.samples, "samples", (n_sims, nb)))
        object.__setattr__(self, "covariance", _frozen_float(self.covariance, "covariance", (nb, nb)))
        if self.mean_pseudo_cl is not None:
            object.__setattr__(self, "mean_pseudo_cl", _frozen_float(self.mean_pseudo_cl, "mean_pseudo_cl"))
        object.__setattr__(self, "seed", int(self.seed))
        if not isinstance(self.metadata, dict):
            raise InvalidInputError("ValidationResult.metadata must be a dict of str to str or number.")
        object.__setattr__(self, "metadata", {str(k): _plain_value(v) for k, v in self.metadata.items()})

    @classmethod
    def from_samples(cls, samples, errors, expected, *, ell_min, ell_max, ell_eff, dl_factor=None, seed=0,
                     mean_pseudo_cl=None, metadata=None) -> "ValidationResult":
        """Compute the statistics from per-simulation bandpowers and their reported errors.

        Parameters
        ----------
        samples, errors : array_like of shape (n_sims, n_bins)
            Recovered bandpowers ``cl`` and reported errors ``cl_err`` of each simulation (K^2).
        expected : array_like of shape (n_bins,)
            The expected bandpowers (``SpectrumEstimator.expected_bandpowers`` of the input).
        ell_min, ell_max, ell_eff : array_like of shape (n_bins,)
            First and last multipole of each bin, and its effective multipole.
        dl_factor : array_like of shape (n_bins,), optional
            ``D_l / C_l`` of each bin (default ``ell_eff (ell_eff + 1) / 2 pi``).
        seed : int, default=0
            Master seed of the simulations (recorded).
        mean_pseudo_cl : array_like, optional
            Mean pseudo-spectrum of the simulated skies, if recorded.
        metadata : dict, optional
            Settings of the run (str or number values).

        Returns
        -------
        ValidationResult
            The per-bin statistics.
        """
        x = np.array(samples, dtype=np.float64)
        if x.ndim != 2 or x.shape[0] < 2:
            raise InvalidInputError(
                f"The 'samples' must have shape (n_sims, n_bins) with n_sims >= 2. Got shape {x.shape} instead."
            )
        err = np.array(errors, dtype=np.float64)
        if err.shape != x.shape:
            raise InvalidInputError(f"The 'errors' must have the shape of 'samples' {x.shape}. Got {err.shape} instead.")
        n = x.shape[0]
        expected = np.array(expected, dtype=np.float64)
        mean = x.mean(axis=0)
        std = x.std(axis=0, ddof=1)
        cov = np.atleast_2d(np.cov(x, rowvar=False, ddof=1))
        analytic = err.mean(axis=0)
        with np.errstate(divide="ignore", invalid="ignore"):
            bias = (mean - expected) / (std / math.sqrt(n))
            ratio = std / analytic
            transfer = mean / expected
        ell_eff = np.asarray(ell_eff, dtype=np.float64)
        if dl_factor is None:
            dl_factor = ell_eff * (ell_eff + 1.0) / (2.0 * np.pi)
        return cls(
            n_sims=n, ell_min=ell_min, ell_max=ell_max, ell_eff=ell_eff, expected=expected, samples=x, mean=mean,
            std=std, covariance=cov, analytic_error=analytic, bias_sigma=bias, error_ratio=ratio,
            transfer=transfer, dl_factor=dl_factor, seed=seed, mean_pseudo_cl=mean_pseudo_cl,
            metadata=dict(metadata or {}),
        )

    @property
    def n_bins(self) -> int:
        return int(self.ell_min.size)

    def summary(self) -> dict:
        """The headline numbers, as a dict of plain Python numbers.

        Keys: ``n_sims``, ``n_bins``, ``seed``, ``max_abs_bias_sigma``,
        ``rms_bias_sigma``, ``median_error_ratio``, ``min_error_ratio``,
        ``max_error_ratio``, ``median_transfer``.

        With ``n_bins`` independent bins of an unbiased estimator,
        ``max_abs_bias_sigma`` exceeds 3 with probability about
        ``1 - 0.9973**n_bins`` (for example 8% for 30 bins): judge it with the
        number of bins in mind.  ``rms_bias_sigma`` should be near 1.

        Returns
        -------
        dict
            Field name to int or float (None for a number that is not finite).
        """
        def f(v):
            v = float(v)
            return v if math.isfinite(v) else None

        return {
            "n_sims": int(self.n_sims),
            "n_bins": self.n_bins,
            "seed": int(self.seed),
            "max_abs_bias_sigma": f(np.max(np.abs(self.bias_sigma))),
            "rms_bias_sigma": f(np.sqrt(np.mean(self.bias_sigma**2))),
            "median_error_ratio": f(np.median(self.error_ratio)),
            "min_error_ratio": f(np.min(self.error_ratio)),
            "max_error_ratio": f(np.max(self.error_ratio)),
            "median_transfer": f(np.median(self.transfer)),
        }

    def _header_lines(self, unit):
        return ([f"cmbtools {__version__}: Monte Carlo validation of the spectrum estimator"]
                + key_value_lines({**self.summary(), **self.metadata}.items()) + _column_lines(unit))

    def write_csv(self, path, *, overwrite=False, unit="uK") -> Path:
        """Write the per-bin table as CSV with a commented header (``# key: value`` lines).

        Columns: ``ell_min, ell_max, ell_eff, expected, mean, std,
        analytic_error, bias_sigma, error_ratio, transfer``; the power columns
        are in ``unit``^2 (``'uK'`` default, or ``'K'``).  Written atomically.

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
        return _write_validation_table(path, [self], self._header_lines(unit), unit=unit, overwrite=overwrite)

    def write_json(self, path, *, overwrite=False) -> Path:
        """Write :meth:`summary`, the settings and the per-bin columns (C_l in K^2) as JSON, atomically.

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
        return _write_validation_json(path, self.summary(), self.metadata, self,
                                      {name: _finite_list(getattr(self, name)) for name in _TABLE_COLUMNS[2:]},
                                      overwrite=overwrite)

    def plot(self, path, *, overwrite=False, title=None) -> Path:
        """Draw the input against the mean recovered ``D_l`` with scatter bands, and the bias per bin below.

        Upper panel: the expected bandpowers (line), the mean of the recovered
        ones (points with the standard error of the mean) and the scatter of a
        single simulation (shaded: +-1 and +-2 standard deviations).  Middle
        panel: ``bias_sigma`` per bin with the +-1, +-2 and +-3 levels.  Lower
        panel: ``error_ratio`` per bin (scatter / reported error) with the band
        of +-2 of its standard errors ``1/sqrt(2 (n_sims - 1))`` around 1.

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
        out, fmt = check_figure_path(path, overwrite)
        fig, ax, bx = new_figure(7.4, height_ratios=(3, 2.6))
        spec = bx.get_subplotspec()
        bx.remove()
        rows = spec.subgridspec(2, 1, hspace=0.09)
        bx = fig.add_subplot(rows[0], sharex=ax)
        cx = fig.add_subplot(rows[1], sharex=ax)
        x = self.ell_eff
        k = self.dl_factor * UK2
        half = 0.5 * (self.ell_max - self.ell_min + 1)
        ax.fill_between(x, (self.expected - 2 * self.std) * k, (self.expected + 2 * self.std) * k,
                        color=BAND, alpha=0.25, lw=0, label=r"$\pm2\sigma$ scatter of one simulation")
        ax.fill_between(x, (self.expected - self.std) * k, (self.expected + self.std) * k,
                        color=BAND, alpha=0.45, lw=0, label=r"$\pm1\sigma$ scatter of one simulation")
        ax.plot(x, self.expected * k, color=INK, lw=1.3, label="input (through the bandpower windows)")
        ax.errorbar(x, self.mean * k, yerr=self.std / math.sqrt(self.n_sims) * k, xerr=half, fmt="o", ms=3.8,
                    color=ACCENT, ecolor=ACCENT, elinewidth=1.0, capsize=0,
                    label=f"mean of {self.n_sims} simulations")
        ax.set_ylabel(DL_LABEL)
        ax.legend(frameon=False, fontsize=7.5, loc="best")
        for level, alpha in ((3, 0.10), (2, 0.16), (1, 0.24)):
            bx.axhspan(-level, level, color=BAND, alpha=alpha, lw=0)
        bx.axhline(0.0, color=SOFT, lw=0.9)
        bx.plot(x, self.bias_sigma, "o", ms=3.8, color=ACCENT)
        lim = max(3.5, float(np.nanmax(np.abs(self.bias_sigma), initial=0.0)) * 1.15)
        bx.set_ylim(-lim, lim)
        bx.set_ylabel(r"bias [$\sigma/\sqrt{N}$]")
        for lab in bx.get_xticklabels():
            lab.set_visible(False)
        band = 2.0 / math.sqrt(2.0 * (self.n_sims - 1))
        cx.axhspan(1.0 - band, 1.0 + band, color=BAND, alpha=0.24, lw=0)
        cx.axhline(1.0, color=SOFT, lw=0.9)
        cx.plot(x, self.error_ratio, "s", ms=3.4, color=ACCENT)
        finite = self.error_ratio[np.isfinite(self.error_ratio)]
        spread = float(np.max(np.abs(finite - 1.0), initial=0.0)) if finite.size else 0.0
        cx.set_ylim(1.0 - max(0.2, 1.15 * spread), 1.0 + max(0.2, 1.15 * spread))
        cx.set_ylabel("scatter / error")
        cx.set_xlabel(ELL_LABEL)
        style_axes(ax, bx, cx)
        s = self.summary()
        if title is None:
            def num(key, spec):  # None: not a number (a null run has no scatter)
                return "n/a" if s[key] is None else format(s[key], spec)

            title = (f"{self.n_sims} simulations: max |bias| {num('max_abs_bias_sigma', '.2f')} sigma, "
                     f"error ratio {num('min_error_ratio', '.3f')} to {num('max_error_ratio', '.3f')}")
        return save_figure(fig, ax, cx, title, out, fmt, overwrite=overwrite)

    def __repr__(self):
        s = self.summary()
        return (f"ValidationResult(n_sims={self.n_sims}, n_bins={self.n_bins}, "
                f"max_abs_bias_sigma={s['max_abs_bias_sigma']:.3g}, median_error_ratio={s['median_error_ratio']:.3g})")
