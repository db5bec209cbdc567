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

__all__ = ["transfer_from_pseudo_spectrum", "BandpowerTransfer"]


@dataclasses.dataclass(frozen=True, eq=False)
class BandpowerTransfer:
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
        lo = np.array(self.ell_min, dtype=np.int64)
        nb = lo.size
        if lo.ndim != 1 or nb == 0:
            raise InvalidInputError("BandpowerTransfer.ell_min must be a non-empty 1-d array of bin limits.")
        hi = np.array(self.ell_max, dtype=np.int64)
        if hi.shape != (nb,) or np.any(hi < lo) or np.any(lo[1:] <= hi[:-1]) or lo[0] < 0:
            raise InvalidInputError("BandpowerTransfer bins must be (ell_min, ell_max) pairs from ell >= 0, "
                                    "increasing without overlaps.")
        err = np.zeros(nb) if self.transfer_error is None else self.transfer_error
        arrays = {"ell_min": lo, "ell_max": hi}
        for name, value in (("ell_eff", self.ell_eff), ("transfer", self.transfer), ("transfer_error", err)):
            a = np.array(value, dtype=np.float64)
            if a.shape != (nb,) or not np.all(np.isfinite(a)):
                raise InvalidInputError(f"BandpowerTransfer.{name} must hold {nb} finite numbers (one per bin).")
            arrays[name] = a
        if np.any(arrays["transfer"] <= 0):
            b = int(np.argmax(arrays["transfer"] <= 0))
            raise InvalidInputError(
                f"The transfer function is {arrays['transfer'][b]:.3g} in bin {b} (ell {lo[b]}-{hi[b]}): a bin "
                "that keeps no signal cannot be corrected (drop or widen it)."
            )
        if np.any(arrays["transfer_error"] < 0):
            raise InvalidInputError("BandpowerTransfer.transfer_error must be >= 0.")
        for name, a in arrays.items():
            a.setflags(write=False)
            object.__setattr__(self, name, a)
        if not isinstance(self.metadata, dict):
            raise InvalidInputError("BandpowerTransfer.metadata must be a dict of str to str or number.")
        object.__setattr__(self, "metadata", {str(k): v if isinstance(v, (int, float)) else str(v)
                                              for k, v in self.metadata.items()})

    @property
    def n_bins(self) -> int:
        """Number of bins."""
        return int(self.ell_min.size)

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


