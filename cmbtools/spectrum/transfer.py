"""Transfer function of a processing step, measured on simulations: per multipole or per bin.

Two forms, both from the MASTER treatment of filtering (Hivon et al. 2002, ApJ 567, 2):

* per multipole, :func:`transfer_from_pseudo_spectrum` (``T_l``, the ``transfer=``
  input of :class:`~cmbtools.spectrum.SpectrumEstimator`, folded into its coupling);
* per bin, :class:`BandpowerTransfer` (``F_b``, the mean recovered bandpower over the
  expected one, as ``cmbtools validate`` measures it): the corrected bandpowers are
  ``cl / F_b``, their errors ``cl_err / F_b`` and their covariance ``C_bb' / (F_b F_b')``.
  Its table (:func:`cmbtools._core.binned_tables.write_transfer_table`) is what
  ``cmbtools validate`` writes and ``cmbtools spectrum --transfer`` reads.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from cmbtools._core.checks import check_int
from cmbtools.exceptions import InvalidInputError

__all__ = ["transfer_from_pseudo_spectrum", "BandpowerTransfer", "PolarizedBandpowerTransfer"]


class _PerBinTransfer:
    """What the per-bin transfers share: the checks of the bins and the metadata, ``n_bins``, the positivity of
    ``F_b`` (a bin that keeps no signal cannot be corrected).  Subclasses are frozen dataclasses with the fields
    ``ell_min``, ``ell_max``, ``ell_eff`` and ``metadata``; ``__post_init__`` calls :meth:`_set_bins` first and
    :meth:`_set_metadata` last."""

    def _set_bins(self) -> int:
        """Check and freeze ``ell_min``, ``ell_max`` (int) and ``ell_eff`` (finite); returns the number of bins."""
        name = type(self).__name__
        lo = np.array(self.ell_min, dtype=np.int64)
        nb = lo.size
        if lo.ndim != 1 or nb == 0:
            raise InvalidInputError(f"{name}.ell_min must be a non-empty 1-d array of bin limits.")
        hi = np.array(self.ell_max, dtype=np.int64)
        if hi.shape != (nb,) or np.any(hi < lo) or np.any(lo[1:] <= hi[:-1]) or lo[0] < 0:
            raise InvalidInputError(f"{name} bins must be (ell_min, ell_max) pairs from ell >= 0, "
                                    "increasing without overlaps.")
        self._freeze("ell_min", lo)
        self._freeze("ell_max", hi)
        self._freeze("ell_eff", self._finite_per_bin("ell_eff", self.ell_eff, nb))
        return nb

    def _finite_per_bin(self, field, value, nb):
        a = np.array(value, dtype=np.float64)
        if a.shape != (nb,) or not np.all(np.isfinite(a)):
            raise InvalidInputError(f"{type(self).__name__}.{field} must hold {nb} finite numbers (one per bin).")
        return a

    def _freeze(self, field, a):
        a.setflags(write=False)
        object.__setattr__(self, field, a)

    def _check_positive(self, f, label, why):
        """Raise unless every ``f`` is finite and positive: ``"The {label}transfer function is ... in bin b (ell
        lo-hi): {why}"``."""
        bad = ~(np.isfinite(f) & (f > 0))
        if np.any(bad):
            b = int(np.argmax(bad))
            raise InvalidInputError(f"The {label}transfer function is {f[b]:.3g} in bin {b} "
                                    f"(ell {self.ell_min[b]}-{self.ell_max[b]}): {why}")

    def _set_metadata(self):
        """Metadata as str keys to number or str values."""
        if not isinstance(self.metadata, dict):
            raise InvalidInputError(f"{type(self).__name__}.metadata must be a dict of str to str or number.")
        object.__setattr__(self, "metadata", {str(k): v if isinstance(v, (int, float)) else str(v)
                                              for k, v in self.metadata.items()})

    @property
    def n_bins(self) -> int:
        """Number of bins."""
        return int(self.ell_min.size)


@dataclasses.dataclass(frozen=True, eq=False)
class BandpowerTransfer(_PerBinTransfer):
    r"""Per-bin transfer function ``F_b`` of a pipeline, and its correction of bandpowers.

    ``F_b`` is the mean bandpower the pipeline recovers from simulated skies
    divided by the one it should recover (the ``transfer`` of a
    :class:`~cmbtools.simulate.ValidationResult`): it measures what a processing
    step the estimator does not model (a filter, for example) does to each bin.
    :meth:`apply` divides bandpowers of maps that went through the same
    processing by it, which is the per-bin form of the MASTER correction
    (Hivon et al. 2002, ApJ 567, 2, section 2: ``<C~_b> = F_b <C_b>``).  The
    correction is exact in the mean for skies with the spectrum of the
    simulations, and first-order exact for others (it depends on the shape of
    the spectrum within a bin only where the filter changes across the bin).

    Parameters
    ----------
    ell_min, ell_max : array_like of int, shape (n_bins,)
        Bin limits (inclusive), increasing, without overlaps.
    ell_eff : array_like of shape (n_bins,)
        Effective multipole of each bin.
    transfer : array_like of shape (n_bins,)
        ``F_b``, dimensionless, finite and positive.
    transfer_error : array_like of shape (n_bins,), optional
        Standard error of ``F_b`` (Monte Carlo); default 0 (unknown).
    metadata : dict, optional
        Record of how it was measured (str or number values).
    """

    ell_min: np.ndarray
    ell_max: np.ndarray
    ell_eff: np.ndarray
    transfer: np.ndarray
    transfer_error: np.ndarray | None = None
    metadata: dict = dataclasses.field(default_factory=dict)

    def __post_init__(self):
        nb = self._set_bins()
        transfer = self._finite_per_bin("transfer", self.transfer, nb)
        err = self._finite_per_bin("transfer_error", np.zeros(nb) if self.transfer_error is None
                                   else self.transfer_error, nb)
        self._check_positive(transfer, "", "a bin that keeps no signal cannot be corrected (drop or widen it).")
        if np.any(err < 0):
            raise InvalidInputError("BandpowerTransfer.transfer_error must be >= 0.")
        self._freeze("transfer", transfer)
        self._freeze("transfer_error", err)
        self._set_metadata()

    @property
    def key(self) -> str:
        """A hash of the bins and ``F_b`` (16 hex digits): what a covariance of corrected bandpowers records."""
        from cmbtools._core.files import sha256_arrays

        return sha256_arrays(self.ell_min, self.ell_max, self.transfer)[:16]

    @classmethod
    def from_validation(cls, result) -> "BandpowerTransfer":
        """The transfer a Monte Carlo validation measured: ``F_b = mean / expected``.

        Its standard error is ``std / (sqrt(n_sims) expected)``.

        Parameters
        ----------
        result : ValidationResult
            From :func:`cmbtools.simulate.validate_estimator`.

        Returns
        -------
        BandpowerTransfer
        """
        for attr in ("transfer", "std", "expected", "n_sims", "ell_min", "ell_max", "ell_eff"):
            if not hasattr(result, attr):
                raise InvalidInputError(
                    f"The 'result' must be a cmbtools.simulate.ValidationResult. Got {type(result).__name__} instead."
                )
        with np.errstate(divide="ignore", invalid="ignore"):
            err = np.asarray(result.std) / (math.sqrt(result.n_sims) * np.abs(np.asarray(result.expected)))
        meta = {"measured_by": "Monte Carlo validation (mean / expected per bin)", "n_sims": int(result.n_sims),
                "seed": int(result.seed)}
        meta.update({k: v for k, v in result.metadata.items() if k not in meta})
        return cls(result.ell_min, result.ell_max, result.ell_eff, result.transfer, err, meta)

    def write_csv(self, path, *, overwrite=False):
        """Write the table (columns ``ell_min,ell_max,ell_eff,transfer,transfer_error``; see
        :func:`cmbtools._core.binned_tables.write_transfer_table`).

        Parameters
        ----------
        path : str or path-like
            Output file, written atomically.
        overwrite : bool, default=False
            Replace an existing file.

        Returns
        -------
        Path
        """
        from cmbtools._core.binned_tables import write_transfer_table

        return write_transfer_table(path, self.ell_min, self.ell_max, self.ell_eff, self.transfer,
                                    self.transfer_error, metadata=self.metadata, overwrite=overwrite)

    @classmethod
    def read_csv(cls, path) -> "BandpowerTransfer":
        """Read a transfer table (the one :meth:`write_csv` writes, or a validation ``summary.csv``).

        Parameters
        ----------
        path : str or path-like
            The text table.

        Returns
        -------
        BandpowerTransfer
        """
        from cmbtools._core.binned_tables import read_transfer_table

        p, cols, meta = read_transfer_table(path)
        return cls(cols["ell_min"], cols["ell_max"], cols["ell_eff"], cols["transfer"], cols["transfer_error"],
                   {k: v for k, v in meta.items() if k not in ("columns",) and not k.startswith("cmbtools")})

    def check_bins(self, binning, what="the bandpowers"):
        """Raise :class:`InvalidInputError` unless ``binning`` (anything with ``ell_min``/``ell_max``) has these bins.

        Parameters
        ----------
        binning : Binning, Bandpowers or BandpowerCovariance
            What the transfer is applied to.
        what : str
            Its name in the message.
        """
        lo = np.asarray(binning.ell_min, dtype=np.int64)
        hi = np.asarray(binning.ell_max, dtype=np.int64)
        if not (np.array_equal(lo, self.ell_min) and np.array_equal(hi, self.ell_max)):
            def span(a, b):
                return f"{a.size} bins, ell {int(a[0])}-{int(b[-1])}" if a.size else "no bins"

            raise InvalidInputError(
                f"The transfer function has other bins than {what} ({span(self.ell_min, self.ell_max)} against "
                f"{span(lo, hi)}); measure it with the same bins and lmax."
            )

    def apply(self, bandpowers):
        """Correct bandpowers for the transfer: ``cl / F_b``, ``cl_err / F_b``, covariance ``C / (F F^T)``.

        The errors are scaled, not widened by the uncertainty of ``F_b``
        (``transfer_error``, recorded in the metadata as its largest relative
        value); the noise in the corrected bins grows by ``1 / F_b``.

        Parameters
        ----------
        bandpowers : Bandpowers
            Measured on maps that went through the processing ``F_b`` describes, with the same bins.

        Returns
        -------
        Bandpowers
            The corrected copy; its metadata records the transfer.
        """
        from cmbtools.spectrum.bandpowers import Bandpowers

        if not isinstance(bandpowers, Bandpowers):
            raise InvalidInputError(
                f"The 'bandpowers' must be a cmbtools.spectrum.Bandpowers. Got {type(bandpowers).__name__} instead."
            )
        self.check_bins(bandpowers)
        f = self.transfer
        cov = None if bandpowers.covariance is None else bandpowers.covariance / np.outer(f, f)
        out = dataclasses.replace(bandpowers, cl=bandpowers.cl / f, cl_err=bandpowers.cl_err / f,
                                  dl=bandpowers.dl / f, dl_err=bandpowers.dl_err / f, covariance=cov)
        return out.with_metadata(**self.record())

    def apply_to_covariance(self, covariance):
        """The covariance of the corrected bandpowers: ``C_bb' / (F_b F_b')`` (window functions kept).

        Parameters
        ----------
        covariance : BandpowerCovariance
            Covariance of bandpowers measured on processed maps, with the same bins.

        Returns
        -------
        BandpowerCovariance
        """
        if covariance.spectra != ("TT",):
            raise InvalidInputError("A temperature transfer function applies to a temperature covariance; this one "
                                    "holds the six polarized spectra (use PolarizedBandpowerTransfer).")
        self.check_bins(covariance, "the covariance")
        f = self.transfer
        settings = dict(covariance.settings)
        settings.update(self.record())
        return dataclasses.replace(covariance, matrix=covariance.matrix / np.outer(f, f), settings=settings)

    def record(self) -> dict:
        """What a correction by this transfer function records in the metadata of its result.

        Returns
        -------
        dict
            ``bandpower_transfer`` (text), ``bandpower_transfer_max_relative_error`` and
            ``bandpower_transfer_key`` (:attr:`key`).
        """
        with np.errstate(divide="ignore", invalid="ignore"):
            rel = float(np.max(self.transfer_error / self.transfer))
        return {"bandpower_transfer": f"divided by F_b from {self.transfer.min():.4g} to {self.transfer.max():.4g}",
                "bandpower_transfer_max_relative_error": rel, "bandpower_transfer_key": self.key}


def transfer_from_pseudo_spectrum(mean_pseudo_cl, cl, mask, *, beam=None, pixel_window=None, iterations=5,
                                  nthreads=None) -> np.ndarray:
    r"""Per-multipole transfer function of a processing step, measured on simulations.

    The transfer function ``T_l`` says how much of the sky's power at each
    multipole survives a processing step that the estimator does not model
    (a filter applied to the maps, for example), on top of the beam ``B_l``
    and the pixel window ``p_l``.  It is the ``transfer=`` input of
    :class:`~cmbtools.spectrum.SpectrumEstimator`, which then corrects for it
    exactly as it does for ``B_l^2 p_l^2``.  It is defined by the MASTER model
    of the mean pseudo-spectrum (Hivon et al. 2002, ApJ 567, 2, section 2)::

        <C~_l> = sum_l' M_ll' T_l' B_l'^2 p_l'^2 C_l'

    with ``M`` the mode-coupling matrix of ``mask``, ``C_l`` the spectrum the
    simulations were drawn from and ``<C~_l>`` the mean pseudo-spectrum of the
    masked, processed simulated skies (without noise).  The first estimate is
    the ratio ``T_l = <C~_l> / (w2 B_l^2 p_l^2 C_l)`` (``w2`` the mean of the
    squared mask; each row of ``M`` sums to ``w2``, so this is exact for a
    spectrum that is flat across the mask's coupling kernel); each of the
    ``iterations`` refinements adds
    ``(<C~_l> - sum_l' M_ll' T_l' B_l'^2 p_l'^2 C_l') / (w2 B_l^2 p_l^2 C_l)``
    (the iterative scheme of Hivon et al. 2002, from memory).  Where
    ``B_l^2 p_l^2 C_l`` is zero (``l = 0, 1`` of a spectrum without monopole
    and dipole) ``T_l`` is set to 1, which leaves those multipoles as they are.

    A pipeline that does nothing to the sky gives ``T_l = 1`` up to the
    Monte Carlo noise of ``<C~_l>`` (relative ``sqrt(2 / ((2l+1) f_sky N))``
    for N simulations).  Measure it from noise-free simulations with the same
    mask, beam and pixel window as the estimator, for example
    ``validate_estimator(est, cl, noise=None, sky_filter=f, record_pseudo_spectra=True)``
    and ``transfer_from_pseudo_spectrum(result.mean_pseudo_cl, cl, est.mask,
    beam=est.beam, pixel_window=est.pixel_window)`` with an estimator built
    without a transfer function.

    Parameters
    ----------
    mean_pseudo_cl : array_like of shape (lmax+1,)
        Mean pseudo-spectrum of the masked, processed skies, K^2, from ell = 0.
    cl : array_like of shape (>= lmax+1,)
        Spectrum the skies were drawn from, K^2.
    mask : ndarray of shape (12*nside**2,)
        The mask the pseudo-spectra were measured with.
    beam, pixel_window : array_like of shape (>= lmax+1,), optional
        ``B_l`` and ``p_l`` the skies were convolved with (default: none).
    iterations : int, default=5
        Refinements with the mode-coupling matrix (0: the plain ratio; each
        costs one matrix-vector product after one coupling matrix).  On a
        noiseless input the refinements converge quickly for large sky
        fractions (0.75 of the sky: 12% error of the plain ratio at l = 2, 1e-4
        after 5 steps) and slowly for small ones (0.2 of the sky: 35%, then 8%);
        on Monte Carlo input many steps also amplify the noise, so keep a few.
    nthreads : int, optional
        Threads for the mask transform and the coupling kernel.

    Returns
    -------
    ndarray of shape (lmax+1,)
        ``T_l``, dimensionless.
    """
    from cmbtools.spectrum import coupling as _coupling
    from cmbtools._core.checks import check_cl, check_mask

    pseudo = check_cl(mean_pseudo_cl, "mean_pseudo_cl", allow_negative=True)
    lmax = pseudo.size - 1
    cl = check_cl(cl, "cl", lmax=lmax)[: lmax + 1]
    w = check_mask(mask)
    iterations = check_int(iterations, "iterations", minimum=0)
    factor = np.ones(lmax + 1)
    for name, table in (("beam", beam), ("pixel_window", pixel_window)):
        if table is not None:
            t = check_cl(table, name, lmax=lmax, allow_negative=True)[: lmax + 1]
            factor = factor * t**2
    signal = factor * cl
    w2 = float(np.mean(w**2))
    ok = signal > 0
    denom = np.where(ok, w2 * signal, 1.0)
    t = np.where(ok, pseudo / denom, 1.0)
    if iterations:
        m = _coupling.coupling_matrix(_coupling.mask_spectrum(w, lmax=lmax, nthreads=nthreads), lmax, nthreads=nthreads)
        for _ in range(iterations):
            t = np.where(ok, t + (pseudo - m @ (t * signal)) / denom, 1.0)
    return t




#: The six spectra of a polarized transfer table, in order; the first three of them are the fields' own.
_POL_SPECTRA = ("TT", "TE", "TB", "EE", "EB", "BB")
_AUTO = ("TT", "EE", "BB")
_CROSS_OF = {"TE": ("TT", "EE"), "TB": ("TT", "BB"), "EB": ("EE", "BB")}
#: The columns of a polarized transfer table.
POLARIZED_TRANSFER_COLUMNS = ("spectrum", "ell_min", "ell_max", "ell_eff", "transfer", "transfer_error")


@dataclasses.dataclass(frozen=True, eq=False)
class PolarizedBandpowerTransfer(_PerBinTransfer):
    r"""Per-bin transfer functions of the six spectra of I, Q, U maps, and their correction of bandpowers.

    ``transfer[i]`` is ``F_b`` of spectrum ``SPECTRA[i]`` (TT, TE, TB, EE, EB, BB): the mean recovered
    bandpower over the expected one, as ``cmbtools validate --polarized`` measures it.  TT, EE and BB (each
    field's own power) must be finite and positive in every bin; TE, TB and EB are recorded as measured
    (not a number where the expectation is zero, as TB and EB of a parity-even sky; TE crosses zero, where
    its ratio is ill-defined) and are not used: :meth:`apply` divides a cross-spectrum XY by
    ``sqrt(F^XX_b F^YY_b)``, the transfer of a filtering that acts on each field (exact for a harmonic filter,
    whose power transfer is ``f^X_l f^Y_l``, to first order in its variation across a bin).

    Parameters
    ----------
    ell_min, ell_max : array_like of int, shape (n_bins,)
        Bin limits (inclusive), increasing, without overlaps.
    ell_eff : array_like of shape (n_bins,)
        Effective multipole of each bin.
    transfer, transfer_error : array_like of shape (6, n_bins)
        ``F_b`` per spectrum and its Monte Carlo standard error (not a number where not measured).
    metadata : dict, optional
        Record of how it was measured (str or number values).
    """

    ell_min: np.ndarray
    ell_max: np.ndarray
    ell_eff: np.ndarray
    transfer: np.ndarray
    transfer_error: np.ndarray
    metadata: dict = dataclasses.field(default_factory=dict)

    def __post_init__(self):
        nb = self._set_bins()
        for name in ("transfer", "transfer_error"):
            a = np.array(getattr(self, name), dtype=np.float64)
            if a.shape != (len(_POL_SPECTRA), nb):
                raise InvalidInputError(f"PolarizedBandpowerTransfer.{name} must have shape (6, {nb}). "
                                        f"Got {a.shape} instead.")
            self._freeze(name, a)
        for s in _AUTO:
            self._check_positive(self.transfer[_POL_SPECTRA.index(s)], f"{s} ",
                                 "TT, EE and BB need a finite, positive F_b in every bin (a bin that keeps no "
                                 "signal cannot be corrected).")
        self._set_metadata()

    @property
    def factors(self) -> np.ndarray:
        """(6, n_bins): what :meth:`apply` divides each spectrum by (``sqrt(F^XX F^YY)`` for XY = TE, TB, EB)."""
        f = {s: self.transfer[_POL_SPECTRA.index(s)] for s in _AUTO}
        return np.stack([f[s] if s in f else np.sqrt(f[_CROSS_OF[s][0]] * f[_CROSS_OF[s][1]])
                         for s in _POL_SPECTRA])

    @property
    def key(self) -> str:
        """A hash of the bins and the factors (16 hex digits)."""
        from cmbtools._core.files import sha256_arrays

        return sha256_arrays(self.ell_min, self.ell_max, self.factors)[:16]

    @classmethod
    def from_validation(cls, result) -> "PolarizedBandpowerTransfer":
        """The transfer functions a polarized Monte Carlo validation measured (``mean / expected`` per spectrum).

        Parameters
        ----------
        result : PolarizedValidationResult
            From :func:`cmbtools.simulate.validate_polarized_estimator`.

        Returns
        -------
        PolarizedBandpowerTransfer
        """
        if not hasattr(result, "results") or tuple(getattr(result, "results", ())) != _POL_SPECTRA:
            raise InvalidInputError("The 'result' must be a cmbtools.simulate.PolarizedValidationResult. "
                                    f"Got {type(result).__name__} instead.")
        t, e = [], []
        for s in _POL_SPECTRA:
            r = result[s]
            expected = np.asarray(r.expected, dtype=np.float64)
            with np.errstate(divide="ignore", invalid="ignore"):
                measured = expected != 0
                t.append(np.where(measured, np.asarray(r.transfer, dtype=np.float64), np.nan))
                e.append(np.where(measured, np.asarray(r.std) / (math.sqrt(r.n_sims) * np.abs(expected)), np.nan))
        meta = {"measured_by": "Monte Carlo validation of the polarized estimator (mean / expected per spectrum "
                               "and bin)", "n_sims": int(result.n_sims), "seed": int(result.seed)}
        meta.update({k: v for k, v in result.metadata.items() if k not in meta})
        return cls(result.ell_min, result.ell_max, result.ell_eff, np.array(t), np.array(e), meta)

    def write_csv(self, path, *, overwrite=False):
        """Write the table: comment lines, then ``spectrum,ell_min,ell_max,ell_eff,transfer,transfer_error``,
        one row per spectrum and bin (TT's bins first, then TE, TB, EE, EB, BB; ``nan`` where not measured).

        Parameters
        ----------
        path : str or path-like
            Output file, written atomically.
        overwrite : bool, default=False
            Replace an existing file.

        Returns
        -------
        Path
        """
        from cmbtools._core.binned_tables import write_binned_table
        from cmbtools._core.tables import key_value_lines

        comments = ["cmbtools polarized bandpower transfer function",
                    "columns: spectrum (TT, TE, TB, EE, EB, BB); ell_min, ell_max = bin limits (inclusive); ell_eff; "
                    "transfer = F_b, the mean recovered bandpower over the expected one (nan: not measured, the "
                    "expectation is zero); transfer_error = its standard error; TE, TB and EB are corrected by "
                    "sqrt(F_XX F_YY)"]
        comments += key_value_lines(self.metadata.items())
        return write_binned_table(path, POLARIZED_TRANSFER_COLUMNS[4:], self.ell_min, self.ell_max, self.ell_eff,
                                  (self.transfer, self.transfer_error), spectra=_POL_SPECTRA, comments=comments,
                                  overwrite=overwrite)

    @classmethod
    def read_csv(cls, path) -> "PolarizedBandpowerTransfer":
        """Read a table written by :meth:`write_csv` (or the ``summary.csv`` of ``validate --polarized``).

        Parameters
        ----------
        path : str or path-like
            The text table.

        Returns
        -------
        PolarizedBandpowerTransfer

        Raises
        ------
        InputFileError
            Missing file or column, a cell that is not a number, spectra not in the order TT, TE, TB, EE, EB,
            BB each over the same bins, or a TT, EE or BB transfer that is not finite and positive.
        """
        from cmbtools._core.tables import number_cell, read_text_table
        from cmbtools.exceptions import InputFileError

        table = read_text_table(path, what="a polarized transfer table", separator=",")
        p = table.path
        names = list(table.names or ())
        if "spectrum" not in names:
            raise InputFileError(p, "has no 'spectrum' column: it is a temperature transfer table; the spectra of "
                                    "I, Q, U maps need the table of `cmbtools validate --polarized` (columns "
                                    f"{','.join(POLARIZED_TRANSFER_COLUMNS)})")
        missing = [c for c in ("ell_min", "ell_max", "transfer") if c not in names]
        if missing:
            raise InputFileError(p, f"no {', '.join(repr(c) for c in missing)} column (a polarized transfer table "
                                    f"has the columns {','.join(POLARIZED_TRANSFER_COLUMNS)})")
        spectra, values = [], []
        wanted = [c for c in POLARIZED_TRANSFER_COLUMNS[1:] if c in names]
        for number, cells in table.rows:
            if len(cells) != len(names):
                raise InputFileError(p, f"line {number}: {len(cells)} cells, but the header names {len(names)} columns")
            spectra.append(cells[names.index("spectrum")])
            values.append([number_cell(p, cells[names.index(c)], f"line {number}: {c}") for c in wanted])
        if not values or len(values) % len(_POL_SPECTRA):
            raise InputFileError(p, f"expected the same bins for each of {', '.join(_POL_SPECTRA)}; found "
                                    f"{len(values)} rows")
        nb = len(values) // len(_POL_SPECTRA)
        if spectra != [s for s in _POL_SPECTRA for _ in range(nb)]:
            raise InputFileError(p, f"the spectrum column must list {', '.join(_POL_SPECTRA)} in that order, each "
                                    "over the same bins")
        a = np.array(values).reshape(len(_POL_SPECTRA), nb, len(wanted))
        col = {c: a[:, :, k] for k, c in enumerate(wanted)}
        lo, hi = col["ell_min"], col["ell_max"]
        if not (np.all(lo == lo[:1]) and np.all(hi == hi[:1])):
            raise InputFileError(p, "the six spectra must have the same bins")
        if not (np.all(np.isfinite(lo)) and np.all(np.isfinite(hi)) and np.all(lo == np.round(lo))
                and np.all(hi == np.round(hi)) and np.all(np.abs(lo) < 2**40) and np.all(np.abs(hi) < 2**40)):
            raise InputFileError(p, "ell_min and ell_max must be whole numbers")
        eff = col["ell_eff"][0] if "ell_eff" in col else 0.5 * (lo[0] + hi[0])
        err = col["transfer_error"] if "transfer_error" in col else np.zeros_like(col["transfer"])
        meta = {k: v for k, v in table.metadata().items() if k not in ("columns",) and not k.startswith("cmbtools")}
        try:
            return cls(lo[0].astype(np.int64), hi[0].astype(np.int64), eff, col["transfer"], err, meta)
        except InvalidInputError as exc:
            raise InputFileError(p, str(exc)) from None

    def check_bins(self, binning, what="the bandpowers"):
        """Raise :class:`InvalidInputError` unless ``binning`` has these bins (see :meth:`BandpowerTransfer.check_bins`).

        Parameters
        ----------
        binning : Binning, PolarizedBandpowers or BandpowerCovariance
            What the transfer is applied to.
        what : str
            Its name in the message.
        """
        BandpowerTransfer(self.ell_min, self.ell_max, self.ell_eff, np.ones(self.n_bins)).check_bins(binning, what)

    def record(self) -> dict:
        """What a correction records in the metadata of its result (as :meth:`BandpowerTransfer.record`).

        Returns
        -------
        dict
            ``bandpower_transfer`` (text) and ``bandpower_transfer_key`` (:attr:`key`).
        """
        f = self.factors
        return {"bandpower_transfer": f"divided by F_b (TT, EE, BB; sqrt(F_XX F_YY) for TE, TB, EB) from "
                                      f"{f.min():.4g} to {f.max():.4g}",
                "bandpower_transfer_key": self.key}

    def apply(self, bandpowers):
        """Correct polarized bandpowers: each spectrum's ``cl``, ``dl`` and errors over its factor, the
        covariance over ``outer(f, f)`` (spectrum-major).

        Parameters
        ----------
        bandpowers : PolarizedBandpowers
            Measured on maps that went through the processing, with the same bins.

        Returns
        -------
        PolarizedBandpowers
        """
        from cmbtools.spectrum.polarized_bandpowers import PolarizedBandpowers

        if not isinstance(bandpowers, PolarizedBandpowers):
            raise InvalidInputError("The 'bandpowers' must be a cmbtools.spectrum.PolarizedBandpowers. "
                                    f"Got {type(bandpowers).__name__} instead.")
        self.check_bins(bandpowers)
        f = self.factors
        flat = f.ravel()
        cov = None if bandpowers.covariance is None else bandpowers.covariance / np.outer(flat, flat)
        meta = dict(bandpowers.metadata)
        meta.update(self.record())
        return PolarizedBandpowers(bandpowers.ell_min, bandpowers.ell_max, bandpowers.ell_eff, bandpowers.cl / f,
                                   bandpowers.cl_err / f, bandpowers.dl / f, bandpowers.dl_err / f, cov, meta)

    def apply_to_covariance(self, covariance):
        """The covariance of the corrected bandpowers: ``C / outer(f, f)`` with the :attr:`factors` (windows kept).

        Parameters
        ----------
        covariance : BandpowerCovariance
            A covariance of the six spectra, with the same bins.

        Returns
        -------
        BandpowerCovariance
        """
        if covariance.spectra != _POL_SPECTRA:
            raise InvalidInputError("A polarized transfer function applies to a covariance of the six spectra.")
        self.check_bins(covariance, "the covariance")
        flat = self.factors.ravel()
        settings = dict(covariance.settings)
        settings.update(self.record())
        return dataclasses.replace(covariance, matrix=covariance.matrix / np.outer(flat, flat), settings=settings)
