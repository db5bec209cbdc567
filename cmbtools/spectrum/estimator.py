"""The reusable masked-sky spectrum estimator (pseudo-Cl with MASTER correction).

:class:`SpectrumEstimator` does all the expensive work once, in its
constructor: the mask's harmonic transform up to ``2*lmax``, the mode-coupling
matrix (through :mod:`cmbtools.spectrum.coupling`), its binned form and that matrix's
inverse, the bandpower windows and (optionally) the covariance kernel.  It keeps
only the mask(s) and small ``(n_bins, lmax+1)`` or ``(n_bins, n_bins)`` arrays,
so it is cheap to pickle and send to Monte Carlo workers; applying it to a map
costs one monopole/dipole fit and one harmonic transform.

Notation (Hivon et al. 2002, ApJ 567, 2): the pseudo-spectrum of the masked map
is ``C~_l``; its expectation is ``sum_l' M_ll' F_l' C_l'`` with ``M`` the
mode-coupling matrix and ``F_l = B_l^2 p_l^2 T_l`` (beam, pixel window,
transfer function).  With the averaging operator ``P`` and the piecewise-flat
model ``Q`` of the binning, the bandpowers are ``(P M F Q)^-1 P C~``.
"""

from __future__ import annotations

import inspect
from pathlib import Path

import numpy as np

from cmbtools._core import sht as _sht
from cmbtools._core.checks import check_cl, check_int, check_lmax, nside_from_npix
from cmbtools._core.memory import check_memory, estimate_estimator_bytes
from cmbtools.exceptions import CmbtoolsError, InvalidInputError
from cmbtools.spectrum import coupling as _coupling
from cmbtools.spectrum.binning import Binning
from cmbtools.spectrum.errors import bandpower_covariance, mode_counts
from cmbtools.spectrum.map_preparation import _MapPreparation
from cmbtools.spectrum.operator import build_operator
from cmbtools.spectrum.settings import MAX_CONDITION_NUMBER, bandpower_record, resolve_settings
from cmbtools.spectrum.storage import load_estimator, load_or_build, save_estimator

__all__ = ["SpectrumEstimator", "MAX_CONDITION_NUMBER"]


def _bias_bytes(nside, lmax, mask2, settings):
    """Bytes of the deprojection-bias correction the settings ask for (0 when there is none)."""
    from cmbtools._core.memory import estimate_deprojection_bias_bytes
    from cmbtools.spectrum.deprojection import COARSE_NSIDE

    templates = settings.get("templates")
    remove = settings.get("remove_monopole_dipole", True) is True
    if settings.get("correct_deprojection_bias", True) is not True:
        return 0
    if templates is None:
        n_user = 0
    elif isinstance(templates, np.ndarray) and templates.ndim < 2:
        return 0  # refused by resolve_settings with its own message
    else:
        try:
            n_user = len(templates)
        except TypeError:
            return 0
    sky_lmax = settings.get("sky_lmax")
    return estimate_deprojection_bias_bytes(
        nside, lmax, n_templates=4 * remove + n_user, sky_lmax=sky_lmax if isinstance(sky_lmax, int) else None,
        cross=mask2 is not None, grid_nside=COARSE_NSIDE if n_user == 0 else None,
    )


def _check_estimator_memory(mask, binning, *, lmax, mask2, n_iter, covariance, force, settings=None) -> int | None:
    """Refuse, before any large allocation, an estimator whose construction would not fit in memory.

    The byte model is :func:`cmbtools._core.memory.estimate_estimator_bytes`.
    Returns the estimate in bytes, or None for inputs that
    :func:`~cmbtools.spectrum.settings.resolve_settings` will refuse with its own message.
    """
    try:
        nside = nside_from_npix(np.size(mask), "mask")
        lmax = 3 * nside - 1 if lmax is None else check_lmax(lmax, nside)
        refine = check_int(n_iter, "n_iter", minimum=0, maximum=20) > 0
    except CmbtoolsError:
        return None
    need = estimate_estimator_bytes(
        nside, lmax,
        n_bins=binning.n_bins if isinstance(binning, Binning) else lmax + 1,
        mask_lmax=_coupling.mask_lmax(lmax, nside, 1 if refine else 0),
        cross=mask2 is not None,
        refine=refine,
        covariance=isinstance(covariance, (bool, np.bool_)) and bool(covariance),
        bias_bytes=_bias_bytes(nside, lmax, mask2, settings or {}),
    )
    return check_memory(need, f"Building the spectrum estimator at nside {nside} with lmax {lmax}", force=force)


def _freeze(a):
    if a is not None:
        a = np.ascontiguousarray(a)
        a.setflags(write=False)
    return a


class SpectrumEstimator(_MapPreparation):
    r"""Masked-sky angular power spectrum estimator (pseudo-Cl with MASTER correction), built once.

    The constructor computes everything that depends on the mask, the bins,
    the beams and the other settings; :meth:`estimate` then measures the
    bandpowers of any number of maps with one harmonic transform each.  The
    object is immutable and picklable.

    Parameters
    ----------
    mask : ndarray of shape (12*nside**2,)
        Weights in [0, 1] (apodized or binary) for map 1, RING ordering.
    binning : Binning
        The bins of the bandpowers (all within ``0..lmax``).
    lmax : int, optional
        Largest multipole of the transforms and of the coupling matrix.
        Default ``3*nside - 1``; above it a :class:`~cmbtools.exceptions.CmbtoolsWarning`,
        above ``4*nside - 1`` an error.
    mask2 : ndarray of shape (12*nside**2,), optional
        Weights for map 2 of cross-spectra (default: ``mask``).  The coupling
        of a cross-spectrum uses the cross-spectrum of the two masks.
    beam, beam2 : None, GaussianBeam, float or ndarray of shape (>= lmax+1,), optional
        Beam of map 1 / map 2: ``None`` (no beam), a Gaussian beam
        (``GaussianBeam(fwhm_arcmin=25.0)``, or the bare FWHM in arcmin) or a
        table ``B_l``.  ``beam2=None`` means "the same as map 1".
    pixel_window : bool or ndarray of shape (>= lmax+1,), default=True
        Deconvolve the HEALPix pixel window of nside (computed by cmbtools,
        no download), or a table ``p_l``; ``False`` for none.  It applies to
        both maps.
    transfer, transfer2 : ndarray of shape (>= lmax+1,), optional
        Per-multipole transfer function ``T_l`` of each map's power spectrum
        (e.g. from filtering); ``transfer2=None`` means "the same as map 1".
    remove_monopole_dipole : bool, default=True
        Fit the monopole and dipole on the masked sky (weights = mask) and
        subtract them before the transform.
    templates : sequence of ndarray of shape (12*nside**2,), optional
        Template maps (RING, e.g. a foreground map) fitted on the masked sky
        jointly with the monopole and dipole and removed from every map
        (:class:`cmbtools.spectrum.deprojection.TemplateDeprojection`).
    guess_cl : array_like of shape (>= sky_lmax+1,), optional
        Guess of the sky spectrum (K^2, from ell 0; default: the built-in
        fiducial spectrum) for the corrections below; only its shape matters
        (the corrections are exact for any multiple of it), and the bins'
        model follows its shape inside each bin.
    sky_lmax : int, optional
        Band limit of the sky (default: lmax).  Above the last bin, up to
        ``sky_lmax``, the sky's power leaking into the bins is modelled from
        ``guess_cl`` with a rectangular coupling matrix; real skies: ``4 nside - 1``.
    correct_deprojection_bias : bool, default=True
        Correct the bias that removing the monopole, dipole and templates
        causes (Elsner, Leistedt & Peiris 2016, MNRAS 456, 2095; see
        :mod:`cmbtools.spectrum.deprojection`), from ``guess_cl``.  Exact
        on the map's grid; above nside 256, without templates, the monopole
        and dipole's bias comes from the mask averaged to nside 256
        (:func:`~cmbtools.spectrum.deprojection.coarse_grid_deprojection_bias`,
        accurate to a few 1e-5 of the pseudo-power on tapered masks).
    averaged_pixels : bool or None, default=None
        True: the maps hold the sky averaged over each pixel (a detector's
        map), not sampled at the pixel centres: correct, from ``guess_cl``,
        what the isotropic pixel window leaves out (the shapes of the pixels
        under the mask and their aliasing; 0.5-1.3 % near 1.5-2.5 nside, see
        :mod:`cmbtools.spectrum.averaging_bias`; about 2 s more in the
        first call).  Needs ``pixel_window=True``.  False: maps sampled at the
        pixel centres (synthesised from harmonic coefficients, e.g.
        simulations made with the pixel window), for which the window alone
        is exact.  None (default): True with the HEALPix pixel window (at
        every nside; the pair sums run on a thread beside the coupling
        kernel), else False.
    coupling : {'exact', 'fast'}, default='exact'
        ``'fast'`` uses the approximation of Louis et al. 2020 (PRD 102,
        123538) for large lmax: exact rows below ``fast_exact_below``, a band of
        half-width ``fast_band_half_width`` around the diagonal below ``fast_banded_below``,
        and above it rows that repeat the band's shape along the diagonal (a Toeplitz matrix).  Defaults: :func:`cmbtools.spectrum.coupling.default_fast_settings`.
        With ``lmax`` above ``2 nside`` the exact matrix is computed instead
        (unless the settings below are given): there the coupling is dominated
        by the HEALPix grid's aliasing, which a banded form cannot represent
        (bandpowers off by 0.5% at 2.5 nside and 14% at 3 nside, against a few
        1e-6 up to 2.4 nside).
        It agrees with ``'exact'`` to < 1e-3 for bins up to ``2 nside``; above,
        it misses the quadrature-aliasing part of the exact matrix (percent
        level near ``3 nside``).
    fast_exact_below, fast_banded_below, fast_band_half_width : int, optional
        Settings of the fast coupling (the multipole below which rows are
        exact, the one below which they are banded, the band's half-width).
    n_iter : int, default=0
        Refinement steps of every harmonic transform (maps and mask).  With 0
        the pseudo-Cl is the plain quadrature of the masked map and the
        coupling matrix, built from the same quadrature of the mask up to
        ``2 lmax``, is its exact expectation for a sky band-limited at lmax:
        the result is unbiased up to lmax, even above ``2 nside`` where the
        plain HEALPix quadrature is not.  Each step costs two more transforms
        per map and brings the coefficients closer to the continuum ones; the
        mask spectrum is then refined too but only up to ``3 nside - 1``
        (refinement diverges above), so use ``n_iter > 0`` with smooth
        (apodized) masks.
    nthreads : int, optional
        Threads of the transforms and the coupling kernel (default: all cores
        or ``$CMBTOOLS_NUM_THREADS``), resolved at every call so that a
        pickled estimator follows the settings of the process it runs in.
    covariance : bool, default=False
        Also prepare the full bandpower covariance (one more coupling matrix,
        of the squared mask); :meth:`estimate` then fills
        ``Bandpowers.covariance``.
    max_condition_number : float, default=MAX_CONDITION_NUMBER (1e3)
        Largest accepted condition number of the binned coupling matrix.
    force : bool, default=False
        Build even when the memory estimate (mask transforms up to ``2*lmax``,
        coupling matrices), made before any large allocation, exceeds what the
        machine has available: warn instead of raising (see
        :func:`cmbtools._core.memory.check_memory`).

    Attributes
    ----------
    nside, lmax : int
    binning : Binning
    f_sky : float
        Mean of mask 1 (its weighted sky fraction).
    f_sky_eff : float
        ``w2**2 / w4`` of mask 1: the sky fraction of the Knox errors of
        auto-spectra of map 1.
    f_sky_eff_cross : float
        ``w2**2 / w4`` of ``sqrt(mask*mask2)``: the sky fraction of the Knox
        errors of cross-spectra (equal to ``f_sky_eff`` with one mask).
    bandpower_windows : ndarray of shape (n_bins, lmax+1)
        ``E[cl] = bandpower_windows @ C_l`` for auto-spectra of map 1.
    condition_number : float
        Of the binned coupling matrix of map 1 (beam etc. divided out).
    cache_key : str
        Hex SHA-256 of every input (mask hashes, lmax, bins, beams, pixel
        window, transfer, coupling mode, settings, version).

    Raises
    ------
    InvalidInputError, ResolutionMismatchError
        Bad settings, or mask and mask2 of different nside.
    IllConditionedError
        If the binned coupling matrix cannot be inverted reliably.
    MemoryLimitError
        If building would need more memory than the machine has available
        (unless ``force``); the message gives the estimate.

    Notes
    -----
    Error bars are the Knox formula (Knox 1995, PRD 52, 4307) with the
    effective sky fraction ``w2**2/w4`` (Hivon et al. 2002): for an
    auto-spectrum ``sigma_b^2 = 2 C_b^2 / (f_sky_eff nu_b)``, for a
    cross-spectrum ``(C12_b^2 + C11_b C22_b) / (f_sky_eff nu_b)``, with
    ``nu_b = sum_{l in b} (2l+1)`` and ``C`` the measured total (signal plus
    noise) bandpowers with the beam deconvolved.

    The optional covariance uses the narrow-kernel approximation of the
    pseudo-Cl covariance, ``Cov(C~_l, C~_l') ~ 2 O_l O_l' M2_ll' / (2l'+1)``
    with ``O_l`` the observed total spectrum and ``M2`` the coupling matrix of
    the squared mask (Efstathiou 2004, MNRAS 349, 603, from memory), with the
    spectrum taken as flat (in the weighting's quantity) inside each bin and
    propagated through the binned inverse coupling.  It is an approximation,
    good where the spectrum varies slowly over the mask's kernel width.

    Examples
    --------
    >>> import numpy as np
    >>> from cmbtools import _sht
    >>> from cmbtools.spectrum import Binning, SpectrumEstimator
    >>> nside, lmax = 16, 47
    >>> ell = np.arange(lmax + 1)
    >>> cl = np.where(ell >= 2, 1e-10 / (ell + 1.0) ** 2, 0.0)
    >>> rng = np.random.default_rng(1)
    >>> alm = (rng.standard_normal(_sht.alm_size(lmax)) + 1j * rng.standard_normal(_sht.alm_size(lmax)))
    >>> alm *= np.sqrt(cl[_sht.alm_ell(lmax)] / 2); alm[: lmax + 1] = alm[: lmax + 1].real * np.sqrt(2)
    >>> sky = _sht.alm2map(alm, nside, lmax, nthreads=1)
    >>> mask = np.ones(12 * nside**2); mask[: 12 * nside**2 // 4] = 0.0
    >>> est = SpectrumEstimator(mask, Binning.uniform(2, lmax, 9), pixel_window=False, nthreads=1)
    >>> bp = est.estimate(sky)
    >>> bp.cl.shape, round(est.f_sky, 2)
    ((5,), 0.75)
    """

    # ------------------------------------------------------------------ construction
    def __init__(self, mask, binning, *, nthreads=None, force=False, **settings):
        # the settings' one signature is resolve_settings's (see __signature__ below)
        _check_estimator_memory(
            mask, binning, lmax=settings.get("lmax"), mask2=settings.get("mask2"),
            n_iter=settings.get("n_iter", 0), covariance=settings.get("covariance", False), force=force,
            settings=settings,
        )
        inputs = resolve_settings(mask, binning, nthreads=nthreads, **settings)
        state = build_operator(inputs, nthreads)
        self._set_state(state)
        object.__setattr__(self, "_nthreads", nthreads)

    def _set_state(self, state):
        for k, v in state.items():
            if isinstance(v, np.ndarray):
                v = _freeze(v)
            object.__setattr__(self, "_" + k, v)
        object.__setattr__(self, "_frozen", True)

    def __setattr__(self, name, value):
        raise AttributeError(f"SpectrumEstimator is immutable; cannot set {name!r}")

    def __delattr__(self, name):
        raise AttributeError(f"SpectrumEstimator is immutable; cannot delete {name!r}")

    def __getstate__(self):
        # the thread count belongs to the process: an estimator sent to a worker process uses that
        # worker's budget ($CMBTOOLS_NUM_THREADS, set by the Monte Carlo engine), never oversubscribes
        state = dict(self.__dict__)
        state["_nthreads"] = None
        state.pop("_removal_coefficients", None)  # large: rebuilt where it is wanted
        return state

    def __setstate__(self, state):
        for k, v in state.items():
            if isinstance(v, np.ndarray):
                v = _freeze(v)
            object.__setattr__(self, k, v)

    # ------------------------------------------------------------------ properties
    @property
    def nside(self) -> int:
        return self._inputs.nside

    @property
    def lmax(self) -> int:
        return self._inputs.lmax

    @property
    def binning(self) -> Binning:
        return self._inputs.binning

    @property
    def mask(self) -> np.ndarray:
        """The mask of map 1 (read-only)."""
        return self._inputs.mask1

    @property
    def mask2(self) -> np.ndarray:
        """The mask of map 2 (read-only; the same array as :attr:`mask` when not given)."""
        return self._inputs.mask1 if self._inputs.mask2 is None else self._inputs.mask2

    @property
    def f_sky(self) -> float:
        """Mean of mask 1 (its weighted sky fraction)."""
        return float(self._f_sky)

    @property
    def f_sky_eff(self) -> float:
        """``w2**2/w4`` of mask 1: the sky fraction of auto-spectrum errors (cross-spectra: ``f_sky_eff_cross``)."""
        return float(self._f_sky_eff)

    @property
    def f_sky_eff_cross(self) -> float:
        """``w2**2/w4`` of ``sqrt(mask*mask2)``: the sky fraction of cross-spectrum errors."""
        return float(self._f_sky_eff_cross)

    @property
    def condition_number(self) -> float:
        return float(self._condition_number)

    @property
    def cache_key(self) -> str:
        return self._inputs.cache_key

    @property
    def remove_monopole_dipole(self) -> bool:
        return self._inputs.remove_monopole_dipole

    @property
    def coupling(self) -> str:
        return self._inputs.coupling

    @property
    def has_covariance(self) -> bool:
        return self._g11 is not None

    @property
    def beam(self) -> np.ndarray:
        """B_l of map 1, ell = 0..lmax."""
        return self._inputs.beam1

    @property
    def beam2(self) -> np.ndarray:
        return self._inputs.beam2

    @property
    def pixel_window(self) -> np.ndarray:
        """p_l deconvolved from both maps (ones when disabled)."""
        return self._inputs.pixel_window

    def _pair(self, cross: bool):
        """(P M, F, A^-1) of the auto-spectrum of map 1, or of the cross-spectrum."""
        if not cross:
            return self._pm11, self._f1, self._ainv11
        pm = self._pm11 if self._pm12 is None else self._pm12
        ainv = self._ainv11 if self._ainv12 is None else self._ainv12
        return pm, self._f12, ainv

    def _pair22(self):
        pm = self._pm11 if self._pm22 is None else self._pm22
        ainv = self._ainv11 if self._ainv22 is None else self._ainv22
        return pm, self._f2, ainv

    def _to_cl(self, x):
        """Bandpowers in the binning's quantity -> the C_l column."""
        b = self.binning
        return x / (b.dl_factor if b.weighting == "dl" else 1.0)

    def _windows(self, cross: bool) -> np.ndarray:
        pm, f, ainv = self._pair(cross)
        w = ainv @ (pm * f[None, :])
        if self.binning.weighting == "dl":
            w /= self.binning.dl_factor[:, None]
        return w

    @property
    def bandpower_windows(self) -> np.ndarray:
        """``W`` of shape (n_bins, lmax+1) with ``E[bp.cl] = W @ C_l`` (auto-spectrum of map 1).

        ``C_l`` is the sky spectrum (before beam, pixel window and transfer).
        Rows sum over ell to about 1 for ``'cl'`` weighting.
        """
        return self._windows(False)

    @property
    def cross_bandpower_windows(self) -> np.ndarray:
        """As :attr:`bandpower_windows`, for the cross-spectrum map 1 x map 2."""
        return self._windows(True)

    def expected_bandpowers(self, cl_theory, *, cross=False, kind="cl") -> np.ndarray:
        """What :meth:`estimate` returns on average for a sky with spectrum ``cl_theory``.

        Parameters
        ----------
        cl_theory : array_like of shape (>= lmax+1,)
            Sky spectrum ``C_l`` in K^2 from ell = 0 (before beam and pixel window).
            When the monopole and dipole are removed, its ell = 0 and 1 values
            are ignored.
        cross : bool, default=False
            Use the windows of the cross-spectrum map 1 x map 2.
        kind : {'cl', 'dl'}, default='cl'
            Return the ``cl`` column (K^2) or the ``dl`` column.

        Returns
        -------
        ndarray of shape (n_bins,)
        """
        cl = check_cl(cl_theory, "cl_theory", lmax=self.lmax, allow_negative=True)[: self.lmax + 1].copy()
        if self.remove_monopole_dipole:
            cl[:2] = 0.0
        out = self._windows(bool(cross)) @ cl
        if kind == "dl":
            return out * self.binning.dl_factor
        if kind != "cl":
            raise InvalidInputError(f"The 'kind' parameter must be 'cl' or 'dl'. Got {kind!r} instead.")
        return out

    # ------------------------------------------------------------------ applying (checks, removal and
    # transforms: cmbtools.spectrum.map_preparation)
    def pseudo_spectrum(self, map1, map2=None) -> np.ndarray:
        """Pseudo-Cl (ell = 0..lmax, K^2) of the masked map(s), after the monopole/dipole removal.

        Parameters
        ----------
        map1 : ndarray of shape (12*nside**2,)
            RING map in K_CMB.
        map2 : ndarray of shape (12*nside**2,), optional
            Second map (through ``mask2``): the cross pseudo-spectrum.

        Returns
        -------
        ndarray of shape (lmax+1,)
            The pseudo-spectrum in K^2.
        """
        if map2 is None:
            return self._map_auto_spectrum(map1, "map1")
        a1 = self._alm(self._prepare(map1, "map1", self.mask))
        a2 = self._alm(self._prepare(map2, "map2", self.mask2, True), True)
        return _sht.alm2cl(a1, a2, lmax=self.lmax)

    def estimate(self, map1, map2=None, *, noise_cl=None, noise_maps=None):
        """Bandpowers of one map (auto-spectrum) or of two maps (cross-spectrum).

        Parameters
        ----------
        map1 : ndarray of shape (12*nside**2,)
            RING map in K_CMB, observed through ``beam`` and ``mask``.
        map2 : ndarray of shape (12*nside**2,), optional
            Second map (``beam2``, ``mask2``); gives the cross-spectrum, which
            carries no noise bias when the two maps' noises are independent.
        noise_cl : array_like of shape (>= lmax+1,), optional
            Noise spectrum ``N_l`` of ``map1`` as observed (K^2, not beam
            deconvolved), subtracted from an auto-spectrum.  Above lmax it is
            taken as constant (white, like pixel noise, whose pseudo-spectrum
            on any pixel grid is exactly ``mean(w^2) N``).
        noise_maps : sequence of ndarray, optional
            Noise-only maps like ``map1``'s noise; the mean of their pseudo
            spectra is the noise bias subtracted from an auto-spectrum.

        Returns
        -------
        Bandpowers
            ``cl``/``dl`` with Knox errors; ``covariance`` when the estimator
            was built with ``covariance=True``.

        Raises
        ------
        InvalidInputError
            Malformed map, missing pixels inside the mask, or noise options
            with a cross-spectrum.
        ResolutionMismatchError
            A map whose nside differs from the mask's.
        """
        from cmbtools.spectrum.bandpowers import Bandpowers

        cross = map2 is not None
        if cross and (noise_cl is not None or noise_maps is not None):
            raise InvalidInputError(
                "The 'noise_cl' and 'noise_maps' parameters apply to auto-spectra only; a cross-spectrum of "
                "maps with independent noise has no noise bias."
            )
        if noise_cl is not None and noise_maps is not None:
            raise InvalidInputError("Give either 'noise_cl' or 'noise_maps', not both.")
        lmax = self.lmax
        if cross:
            a1 = self._alm(self._prepare(map1, "map1", self.mask))
            pseudo11 = _sht.alm2cl(a1, lmax=lmax)
        else:
            pseudo11 = self._map_auto_spectrum(map1, "map1")
        pm11, f11, ainv11 = self._pair(False)
        total11 = ainv11 @ self._bin_pseudo(pseudo11)
        noise_b = None
        if cross:
            a2 = self._alm(self._prepare(map2, "map2", self.mask2, True), True)
            pseudo12 = _sht.alm2cl(a1, a2, lmax=lmax)
            pseudo22 = _sht.alm2cl(a2, lmax=lmax)
            _, _, ainv12 = self._pair(True)
            _, _, ainv22 = self._pair22()
            value = ainv12 @ self._bin_pseudo(pseudo12)
            total22 = ainv22 @ self._bin_pseudo(pseudo22)
            var = (value**2 + np.clip(total11 * total22, 0.0, None)) / self._modes(True)
            tot_for_cov = (value, total11, total22)
        else:
            value = total11
            if noise_cl is not None:
                n = check_cl(noise_cl, "noise_cl", lmax=lmax)[: lmax + 1]
                noise_b = ainv11 @ self._pseudo_noise(n)
            elif noise_maps is not None:
                if isinstance(noise_maps, np.ndarray) and noise_maps.ndim == 1:
                    raise InvalidInputError("The 'noise_maps' parameter must be a list of maps, not a single map.")
                acc = np.zeros(lmax + 1)
                count = 0
                for i, nm in enumerate(noise_maps):
                    acc += self._map_auto_spectrum(nm, f"noise_maps[{i}]")
                    count += 1
                if count == 0:
                    raise InvalidInputError("The 'noise_maps' parameter is empty; give at least one noise map.")
                noise_b = ainv11 @ self._bin_pseudo(acc / count)
            if noise_b is not None:
                value = total11 - noise_b
            var = 2.0 * total11**2 / self._modes(False)
            tot_for_cov = (total11, total11, total11)

        cov = None
        if self.has_covariance:
            cov = self._covariance(cross, *tot_for_cov)

        b = self.binning
        conv = b.dl_factor if b.weighting == "dl" else np.ones(b.n_bins)
        cl = value / conv if b.weighting == "dl" else value
        cl_err = np.sqrt(var) / conv if b.weighting == "dl" else np.sqrt(var)
        if cov is not None:
            cov = cov / np.outer(conv, conv) if b.weighting == "dl" else cov
        dl = cl * b.dl_factor
        dl_err = cl_err * b.dl_factor
        meta = self._metadata(cross, noise_cl is not None, noise_maps is not None)
        if noise_b is not None:
            meta["noise_bias_subtracted"] = "spectrum" if noise_cl is not None else f"{count} noise maps"
        return Bandpowers(
            ell_min=b.ell_min,
            ell_max=b.ell_max,
            ell_eff=b.ell_eff,
            cl=cl,
            cl_err=cl_err,
            dl=dl,
            dl_err=dl_err,
            covariance=cov,
            metadata=meta,
        )

    def _pseudo_noise(self, n):
        """Binned pseudo-spectrum ``P <N~>`` of noise with spectrum ``n`` (ell = 0..lmax), constant above lmax.

        ``P M N`` for the multipoles up to lmax, plus the rest of each row of the
        coupling (up to the total ``mean(w^2)`` that a white noise gives on any
        pixel grid, exactly) times ``N_lmax``: the noise is taken as white beyond
        lmax, where it is not band-limited (pixel noise), unlike the sky.
        """
        pm = self._pm11
        row_weight = np.add.reduceat(self._p_vector, self.binning.ell_min)
        missing = self._w2 * row_weight - pm.sum(axis=1)
        return pm @ n + missing * n[-1]

    def _bin_pseudo(self, pseudo):
        """``P @ pseudo`` (bin averages in the binning's quantity)."""
        b = self.binning
        return np.add.reduceat(self._p_vector * pseudo, b.ell_min)

    @property
    def _p_vector(self):
        return self.binning.averaging_weights(self.lmax)

    def _modes(self, cross: bool) -> np.ndarray:
        """``f_sky_eff * sum_{l in b} (2l+1)``, the effective number of modes per bin."""
        return mode_counts(self.binning, self.f_sky_eff_cross if cross else self.f_sky_eff)

    def _covariance(self, cross, c12, c11, c22):
        if cross:
            g = self._g11 if self._g12 is None else self._g12
            _, _, ainv = self._pair(True)
        else:
            g, ainv = self._g11, self._ainv11
        return bandpower_covariance(ainv, g, c12, c11, c22, cross=cross)

    def _metadata(self, cross, has_noise_cl, has_noise_maps) -> dict:
        return bandpower_record(
            self._inputs, cross=cross, f_sky=self.f_sky,
            f_sky_eff=self.f_sky_eff_cross if cross else self.f_sky_eff, condition_number=self.condition_number,
        )

    # ------------------------------------------------------------------ persistence (cmbtools.spectrum.storage)
    def save(self, path, *, overwrite=False) -> Path:
        """Write the estimator to a ``.npz`` file (no pickle) that :meth:`load` reads back.

        The file stores the mask(s), every setting, the precomputed matrices,
        the :attr:`cache_key`, the cmbtools version and a SHA-256 checksum of
        its contents.  Written atomically; an existing file is only replaced
        with ``overwrite=True``.

        Parameters
        ----------
        path : str or path-like
            The ``.npz`` file.
        overwrite : bool, default=False
            Replace an existing file.

        Returns
        -------
        pathlib.Path
            The file written.
        """
        return save_estimator(self, path, overwrite=overwrite)

    @classmethod
    def load(cls, path, *, nthreads=None) -> "SpectrumEstimator":
        """Read an estimator written by :meth:`save`.

        Parameters
        ----------
        path : str or path-like
            The ``.npz`` file.
        nthreads : int, optional
            Threads of the loaded estimator (default: all cores, or ``$CMBTOOLS_NUM_THREADS``).

        Returns
        -------
        SpectrumEstimator
            The estimator, ready to apply.

        Raises
        ------
        InputFileError
            If the file is missing or unreadable.
        CacheError
            If the file is corrupt (checksum mismatch, truncated, not an
            estimator file) or was written by another cmbtools version.
        """
        return load_estimator(cls, path, nthreads=nthreads)

    @classmethod
    def load_or_build(cls, path, mask, binning, *, force=False, **kwargs) -> "SpectrumEstimator":
        """Load the estimator saved at ``path`` if it was built from these inputs, else build and save it.

        The inputs are identified by their hash (:attr:`cache_key`).  A file
        built from other inputs (stale) or a corrupt file is reported with a
        :class:`~cmbtools.exceptions.CmbtoolsWarning` and replaced,
        atomically, by a freshly built estimator.  A file that is not a
        ``.npz`` archive at all (a map given as the cache path by mistake,
        ...) is never replaced.

        Parameters
        ----------
        path : str or path-like
            The ``.npz`` cache file.
        mask, binning, **kwargs
            As for :class:`SpectrumEstimator`.
        force : bool, default=False
            When building: go ahead even if the memory estimate exceeds what
            the machine has available (as for :class:`SpectrumEstimator`).

        Raises
        ------
        CacheError
            If ``path`` holds a file that is not a ``.npz`` archive.
        """
        return load_or_build(cls, path, mask, binning, lambda: cls(mask, binning, force=force, **kwargs), **kwargs)

    def __repr__(self):
        return (
            f"SpectrumEstimator(nside={self.nside}, lmax={self.lmax}, {self.binning!r}, "
            f"f_sky={self.f_sky:.3f}, coupling={self.coupling!r})"
        )


def _constructor_signature():
    """``SpectrumEstimator(mask, binning, *, <the settings of resolve_settings>, force=False)`` for introspection."""
    params = list(inspect.signature(resolve_settings).parameters.values())
    force = inspect.Parameter("force", inspect.Parameter.KEYWORD_ONLY, default=False)
    self_ = inspect.Parameter("self", inspect.Parameter.POSITIONAL_OR_KEYWORD)
    return inspect.Signature([self_, *params, force])


SpectrumEstimator.__init__.__signature__ = _constructor_signature()
