"""Transfer function of a processing step, measured on simulations."""

from __future__ import annotations

import numpy as np

from cmbtools._core.checks import check_int

__all__ = ["transfer_from_pseudo_spectrum"]

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


