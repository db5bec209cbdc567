r"""Template deprojection of masked maps, the pseudo-Cl bias it causes, and the sky's power above the bins.

Removing modes fitted on the masked sky (the monopole, the three dipole
components and any user template maps) changes the pseudo-spectrum: the
fitted amplitudes absorb part of the sky's power.  Elsner, Leistedt & Peiris
(2016, MNRAS 456, 2095, "Unbiased methods for removing systematics from
galaxy clustering measurements", section 3, from memory) give this
deprojection bias for a Gaussian sky and show that it can be subtracted given
a guess of the sky spectrum.  With the weighted least-squares removal of
templates ``f_i`` (weights ``w``, the mask)::

    x = w d - sum_ij g_i (A^-1)_ij (g_j . d),   g_i = w f_i,   A_ij = sum_p w_p f_i(p) f_j(p)

the pseudo-coefficients are ``x_lm = (w d)_lm - sum_ij G_i,lm (A^-1)_ij (g_j . d)``
(``G_i`` the quadrature transform of ``g_i``) and, for a sky of pixel
covariance ``S``, the expected pseudo-spectrum is the one without removal plus

    delta_l = - 2 sum_ij (A^-1)_ij C_l[G_i, Y_j]  +  sum_ik C_l[G_i, G_k] (A^-1 Sigma A^-1)_ik

with ``C_l[a, b]`` the cross-spectrum of two sets of coefficients,
``Y_j`` the transform of ``w (S g_j)`` and ``Sigma_jn = g_j^T S g_n =
sum_l (2l+1) S_l C_l[H_j, H_n]`` (``H_j`` the exact pixel sums
``sum_p g_j(p) Y*_lm(p)``, ``S_l`` the spectrum of the map as seen on the
grid: beam, pixel window and transfer function included).  This is exact for
any mask, template and pixel grid, given ``S_l``
(:func:`deprojection_bias`; ``tests/spectrum/test_deprojection.py`` checks
it against the explicit projection applied to every pixel-space mode).  It
costs, per template, one exact pixel sum up to the sky band limit, one
synthesis and one analysis.

The guess spectrum enters as a multiplicative correction of the mode-coupling
matrix's rows, ``M_ll' -> (1 + r_l) M_ll'`` with
``r_l = delta_l / (M F C_guess)_l`` (:func:`row_factors`): exact when the sky
spectrum is the guess, or the guess times any constant (so the guess's
amplitude and unit do not matter, only its shape).  Measured on the
demo-like cap with holes at nside 64 (300 skies, monopole 100 uK, dipole
3 mK): first bin 0.81 of the input without the correction, 0.963 +- 0.013
with it.

Power above the last bin.  A sky is not band-limited at the analysis lmax;
the mask couples the multipoles ``l'`` above the last bin into the reported
ones, by ``sum_l' M_ll' F_l' C_l'``.  With ``sky_lmax`` above the last bin,
this leakage is computed with a rectangular coupling matrix (rows to lmax,
columns to ``sky_lmax``, from the mask's spectrum to ``lmax + sky_lmax``) and
the guess spectrum, and folded into the same row factors
(``r_l += leak_l / (M F C_guess)_l``).  On skies with power to 4 nside - 1 this
removes the excess of the top bins (nside 64, beam of one pixel, bins to
2 nside: top bin +17 standard errors of the mean without it, -0.6 with it).
The multipoles up to lmax that no bin covers (below the first bin, in gaps,
between the last bin and lmax) are columns of ``M`` itself: with
``modelled`` (the binned columns) :func:`row_factors` counts their guess
power as leakage and takes the binned columns' share as its base, so that
bins starting above ell 2 are unbiased too (bins of 8 from ell 10, nside 32,
tapered cap with holes: 1.07-2.6 times the input without it, within 1.9
standard errors of the mean with it, 200 skies).
"""

from __future__ import annotations

import functools

import numpy as np

from cmbtools._core import sht as _sht
from cmbtools._core.checks import check_mask, check_same_nside, resolve_nthreads
from cmbtools.exceptions import IllConditionedError, InvalidInputError

__all__ = [
    "TemplateDeprojection",
    "deprojection_bias",
    "coarse_grid_deprojection_bias",
    "coarse_grid_bias_below",
    "continued_coarse_grid_bias",
    "above_bins_leakage",
    "row_factors",
]

#: Maps finer than this nside get the monopole/dipole deprojection bias from this grid
#: (:func:`coarse_grid_deprojection_bias`).
COARSE_NSIDE = 256

#: Width (multipoles) of the running mean of the mask spectrum that shapes the coarse-grid bias above 2 COARSE_NSIDE.
_TAIL_SMOOTHING = 21

#: Templates whose normalised normal matrix has a larger condition number are refused (degenerate on the mask).
MAX_TEMPLATE_CONDITION = 1e12

_CHUNK = 1 << 20
_S0, _S10, _S11 = np.sqrt(4 * np.pi), np.sqrt(4 * np.pi / 3), np.sqrt(8 * np.pi / 3)


@functools.lru_cache(maxsize=2)
def _small_grid_vectors(nside):
    """The RING pixel-centre unit vectors of a small grid (nside <= COARSE_NSIDE), shape (3, npix), read-only."""
    v = np.ascontiguousarray(_healpix_base(nside).pix2vec(np.arange(12 * nside * nside)).T)
    v.setflags(write=False)
    return v


def _healpix_base(nside):
    """ducc0's RING pixelization of ``nside`` (pixel centres and RING/NESTED indices without importing healpy,
    whose import also loads matplotlib: tens of MB of a first call's memory)."""
    import ducc0

    return ducc0.healpix.Healpix_Base(int(nside), "RING")


def _pixel_vector_component(nside, k):
    """Component ``k`` (0 x, 1 y, 2 z) of the RING pixel-centre unit vectors (chunked)."""
    if nside <= COARSE_NSIDE:
        return _small_grid_vectors(nside)[k]
    base = _healpix_base(nside)
    npix = 12 * nside * nside
    out = np.empty(npix)
    for s in range(0, npix, _CHUNK):
        pix = np.arange(s, min(npix, s + _CHUNK))
        out[s:s + pix.size] = base.pix2vec(pix)[:, k]
    return out


def _first_moments(a):
    """``(sum g, sum g x, sum g y, sum g z)`` from the exact pixel sums ``a`` of a map up to lmax 1."""
    a00, a10, a11 = a[0].real, a[1].real, a[2]
    return np.array([_S0 * a00, -_S11 * a11.real, _S11 * a11.imag, _S10 * a10])


class TemplateDeprojection:
    """Weighted least-squares removal of template maps (and the monopole and dipole) from a masked map.

    Parameters
    ----------
    mask : ndarray of shape (12*nside**2,)
        Weights in [0, 1] (RING): the fit's weights and the mask applied after it.
    templates : sequence of ndarray of shape (12*nside**2,), optional
        Template maps (RING, any unit), fitted jointly with the monopole and dipole.
    monopole_dipole : bool, default=True
        Include the monopole and the three dipole components.
    nthreads : int, optional
        Threads of the transforms.

    Raises
    ------
    InvalidInputError
        A template of the wrong size or with non-finite values where the mask is non-zero.
    IllConditionedError
        If the templates are degenerate on the mask (normalised condition number above 1e12).
    """

    def __init__(self, mask, templates=(), *, monopole_dipole=True, nthreads=None):
        w = check_mask(mask, "mask")
        nside = int(round(np.sqrt(w.size / 12)))
        temps = []
        for i, t in enumerate(templates or ()):
            a = np.asarray(t, dtype=np.float64)
            if a.shape != w.shape:
                raise InvalidInputError(
                    f"The 'templates[{i}]' map has {a.size} pixels but the mask has {w.size}; give templates at the "
                    f"mask's nside ({nside}), RING ordering."
                )
            if not np.all(np.isfinite(a[w > 0])):
                raise InvalidInputError(f"The 'templates[{i}]' map has missing or non-finite pixels inside the mask.")
            a = np.where(w > 0, a, 0.0)
            a.setflags(write=False)
            temps.append(a)
        self.nside = nside
        self.mask = w
        self.templates = tuple(temps)
        self.monopole_dipole = bool(monopole_dipole)
        self.n_templates = (4 if monopole_dipole else 0) + len(temps)
        n = self.n_templates
        if n == 0:
            raise InvalidInputError("A template deprojection needs the monopole/dipole or at least one template.")
        normal = np.zeros((n, n))
        maps = [self.template_map(i) for i in range(n)]
        for i in range(n):
            wi = w * maps[i]
            for j in range(i, n):
                normal[i, j] = normal[j, i] = float(np.dot(wi, maps[j]))
        del maps
        diag = np.diag(normal)
        if np.any(~(diag > 0)):
            k = int(np.argmax(~(diag > 0)))
            raise IllConditionedError(f"Template {k} is zero wherever the mask is non-zero; it cannot be fitted.", np.inf)
        scale = 1.0 / np.sqrt(diag)
        normed = normal * np.outer(scale, scale)
        cond = float(np.linalg.cond(normed))
        if not np.isfinite(cond) or cond > MAX_TEMPLATE_CONDITION:
            raise IllConditionedError(
                f"The templates (monopole/dipole included) cannot be told apart on the mask: condition number "
                f"{cond:.3g} (limit {MAX_TEMPLATE_CONDITION:.0e}). Drop a template that repeats another one.",
                cond,
            )
        self.normal = normal
        self.normal_inverse = scale[:, None] * np.linalg.inv(normed) * scale[None, :]
        self.condition_number = cond
        self._nthreads = nthreads

    def template_map(self, i):
        """Template ``i`` as a map: 0 the monopole (ones), 1-3 the dipole's x, y, z, then the user templates."""
        n_md = 4 if self.monopole_dipole else 0
        if i < n_md:
            return np.ones(self.mask.size) if i == 0 else _pixel_vector_component(self.nside, i - 1)
        return np.asarray(self.templates[i - n_md])

    def coefficients(self, m, *, nthreads=None):
        """Fitted amplitudes of the templates in ``m`` (finite RING map), in the order of :meth:`template_map`.

        Parameters
        ----------
        m : ndarray of shape (12*nside**2,)
            The map, finite everywhere the mask is non-zero.
        nthreads : int, optional
            Threads of the transform.

        Returns
        -------
        ndarray of shape (n_templates,)
        """
        nthreads = resolve_nthreads(self._nthreads if nthreads is None else nthreads)
        w = self.mask
        b = np.zeros(self.n_templates)
        n_md = 4 if self.monopole_dipole else 0
        offset = 0.0
        if n_md:  # centre on the weighted mean first: a large monopole does not cost digits
            offset = float(np.dot(w, m)) / float(w.sum())
            wm = (m - offset) * w
            b[:4] = _first_moments(_sht.adjoint_sums(wm, 1, nthreads=nthreads))
        else:
            wm = m * w
        for k, t in enumerate(self.templates):
            b[n_md + k] = float(np.dot(wm, t))
        c = self.normal_inverse @ b
        if n_md:
            c[0] += offset
        return c

    def project(self, m, *, nthreads=None):
        """``w * (m - sum_i c_i f_i)`` with the weighted least-squares amplitudes ``c`` (a new array).

        Parameters
        ----------
        m : ndarray of shape (12*nside**2,)
            The map, finite everywhere the mask is non-zero.
        nthreads : int, optional
            Threads of the transforms.

        Returns
        -------
        ndarray of shape (12*nside**2,)
            The masked map without the templates.
        """
        nthreads = resolve_nthreads(self._nthreads if nthreads is None else nthreads)
        c = self.coefficients(m, nthreads=nthreads)
        out = np.array(m, dtype=np.float64)
        if self.monopole_dipole:
            alm = np.zeros((1, 3), dtype=np.complex128)
            alm[0, 0] = c[0] * _S0
            alm[0, 1] = c[3] * _S10
            alm[0, 2] = (-c[1] + 1j * c[2]) * (0.5 * _S11)
            out -= _sht.synthesis_on_rings(alm, 1, self.nside, 0, 4 * self.nside - 1, nthreads=nthreads)
        n_md = 4 if self.monopole_dipole else 0
        for k, t in enumerate(self.templates):
            out -= c[n_md + k] * t
        out *= self.mask
        return out

    def __getstate__(self):
        state = dict(self.__dict__)
        state["_nthreads"] = None
        return state


def _truncate(alm, lmax_from, lmax_to):
    """The coefficients up to ``lmax_to`` of a healpy-layout array up to ``lmax_from >= lmax_to``."""
    out = np.empty(_sht.alm_size(lmax_to), dtype=alm.dtype)
    s_in = s_out = 0
    for m in range(lmax_to + 1):
        n_out = lmax_to + 1 - m
        out[s_out:s_out + n_out] = alm[s_in:s_in + n_out]
        s_out += n_out
        s_in += lmax_from + 1 - m
    return out


def deprojection_bias(deprojection, signal_cl, lmax, *, deprojection2=None, nthreads=None) -> np.ndarray:
    r"""Expected change of the pseudo-spectrum caused by a template deprojection (Elsner et al. 2016).

    For a Gaussian sky whose map (as seen on the grid: beam, pixel window and
    transfer function applied) has the spectrum ``signal_cl``,
    ``E[C~_l with removal] = E[C~_l without removal] + delta_l`` exactly, with
    ``delta_l`` the formula of the module docstring (the deprojection bias of
    Elsner, Leistedt & Peiris 2016, MNRAS 456, 2095).  For a cross-spectrum,
    map 1 goes through ``deprojection`` and map 2 through ``deprojection2``
    (its own mask and templates); ``signal_cl`` is then the cross-spectrum of
    the two maps.  Cost: per template and map, one exact pixel sum up to the
    sky band limit, one synthesis and one analysis.

    Parameters
    ----------
    deprojection : TemplateDeprojection
        The removal applied to map 1.
    signal_cl : array_like of shape (sky_lmax+1,)
        Spectrum of the map(s) on the grid, K^2, from ell 0 to the sky's band limit.
    lmax : int
        Largest multipole of the pseudo-spectrum.
    deprojection2 : TemplateDeprojection, optional
        The removal applied to map 2 (default: the same as map 1, an auto-spectrum).
    nthreads : int, optional
        Threads of the transforms.

    Returns
    -------
    ndarray of shape (lmax+1,)
        ``delta_l`` in K^2 (negative where the removal takes power away).
    """
    nthreads = resolve_nthreads(nthreads)
    s = np.asarray(signal_cl, dtype=np.float64)
    lw = max(s.size - 1, lmax)
    s_ext = np.zeros(lw + 1)
    s_ext[: s.size] = s
    d1 = deprojection
    d2 = d1 if deprojection2 is None else deprojection2
    cross = d2 is not d1
    if cross:
        check_same_nside(d1.mask, d2.mask, "mask", "mask2")
    omega = 4.0 * np.pi / d1.mask.size
    nside = d1.nside

    def sums(d):
        out = []
        for i in range(d.n_templates):
            out.append(_sht.adjoint_sums(d.template_map(i) * d.mask, lw, nthreads=nthreads))
        return out

    h1 = sums(d1)
    h2 = sums(d2) if cross else h1
    g1 = [omega * _truncate(h, lw, lmax) for h in h1]
    g2 = [omega * _truncate(h, lw, lmax) for h in h2] if cross else g1
    # Sigma_jn = sum_l (2l+1) S_l C_l[H_j, H_n] = sum_lm S_l Re(H_j,lm conj H_n,lm) over m = -l..l:
    # twice the sum over the stored m >= 0 minus the m = 0 terms (the first lw+1 entries)
    sh2 = np.array([_sht.almxfl(h, s_ext, lw) for h in h2])
    stacked1 = np.array(h1)
    sigma = 2.0 * (stacked1 @ sh2.conj().T).real - (stacked1[:, : lw + 1] @ sh2[:, : lw + 1].conj().T).real
    del sh2, stacked1

    def covariance_times(h_list, w_other):
        # Y_j = quadrature transform of w_other * (S g_j): E[(w_other d_other)_lm (g_j . d)]
        out = []
        for h in h_list:
            smap = _sht.alm2map(_sht.almxfl(h, s_ext, lw), nside, lw, nthreads=nthreads)
            smap *= w_other
            out.append(_sht.map2alm(smap, lmax, nthreads=nthreads))
        return out

    y12 = covariance_times(h1, d2.mask)
    y21 = covariance_times(h2, d1.mask) if cross else y12
    a1, a2 = d1.normal_inverse, d2.normal_inverse
    inner = a1 @ sigma @ a2

    def combined(coeffs, alms):  # sum_j coeffs[j] alms[j] (real coefficients: C_l is linear in each argument)
        out = np.zeros_like(alms[0])
        for c, a in zip(coeffs, alms):
            out += c * a
        return out

    delta = np.zeros(lmax + 1)
    for i in range(d1.n_templates):
        delta -= _sht.alm2cl(g1[i], combined(a1[i], y12), lmax=lmax)
    for k in range(d2.n_templates):
        delta -= _sht.alm2cl(combined(a2[k], y21), g2[k], lmax=lmax)
    for i in range(d1.n_templates):
        delta += _sht.alm2cl(g1[i], combined(inner[i], g2), lmax=lmax)
    return delta


def _averaged_down(w, nside_out, nthreads=1):
    """The RING map ``w`` averaged into the pixels of ``nside_out`` (RING): the plain mean of the sub-pixels."""
    nside_in = int(round(np.sqrt(w.size / 12)))
    k = (nside_in // nside_out) ** 2
    fine = _healpix_base(nside_in)
    sums = np.empty(12 * nside_out * nside_out)
    # no full-size temporary: the fine pixels in NESTED order, a chunk of whole coarse pixels at a time
    # (the k sub-pixels of the NESTED coarse pixel c are the NESTED fine pixels c k .. c k + k - 1)
    step = max(k, (_CHUNK // k) * k)
    for s in range(0, w.size, step):
        e = min(w.size, s + step)
        ring = fine.nest2ring(np.arange(s, e), nthreads=nthreads)
        sums[s // k:e // k] = w[ring].reshape(-1, k).sum(axis=1)
    # NESTED -> RING: the RING pixel p holds the NESTED pixel ring2nest(p)
    return sums[_healpix_base(nside_out).ring2nest(np.arange(sums.size))] / k


def coarse_grid_deprojection_bias(mask, signal_cl, lmax, mask_cl, *, mask2=None, coarse_nside=COARSE_NSIDE,
                                  nthreads=None) -> np.ndarray:
    """The monopole/dipole deprojection bias of a fine map, computed on a coarser grid (fast, approximate).

    The mask(s) are averaged into the pixels of ``coarse_nside`` and
    :func:`deprojection_bias` of the monopole and dipole removal runs there up
    to ``2 coarse_nside`` (the guess spectrum cut at ``3 coarse_nside - 1``).
    Above that multipole the bias is taken proportional to the mask spectrum
    ``mask_cl`` of the fine mask averaged over 21 multipoles (the bias of a
    removal of smooth templates is mask power at those scales), with the
    factor fitted by least squares on ``coarse_nside .. 2 coarse_nside``.  Maps at or below ``coarse_nside``
    get the exact :func:`deprojection_bias`.

    Accuracy (nside 1024 against the exact bias on the grid, row factors
    ``delta / (M S)`` with the fiducial spectrum): largest difference 5e-6
    for an apodized latitude cut, 3.7e-5 for a tapered cap with tapered
    holes, 3.3e-4 below ``2 coarse_nside`` and 4.2e-3 above it for a cap with
    unapodized edges and holes (where the exact factor reaches 2.3e-2).  The
    cost is that of a few transforms at ``coarse_nside`` instead of three
    transforms per template at the map's resolution.

    Parameters
    ----------
    mask : ndarray of shape (12*nside**2,)
        Weights of map 1.
    signal_cl : array_like of shape (>= lmax+1,)
        Spectrum of the map(s) on the grid, K^2, from ell 0.
    lmax : int
        Largest multipole of the pseudo-spectrum.
    mask_cl : array_like of shape (>= lmax+1,)
        Spectrum of the mask (cross-spectrum of the two masks for a cross-spectrum) on the fine grid.
    mask2 : ndarray, optional
        Weights of map 2 (cross-spectra).
    coarse_nside : int, default=COARSE_NSIDE
        The grid of the computation.
    nthreads : int, optional
        Threads of the transforms.

    Returns
    -------
    ndarray of shape (lmax+1,)
        ``delta_l`` in K^2.
    """
    low = coarse_grid_bias_below(mask, signal_cl, lmax, mask2=mask2, coarse_nside=coarse_nside, nthreads=nthreads)
    return continued_coarse_grid_bias(low, lmax, mask_cl, coarse_nside=coarse_nside)


def coarse_grid_bias_below(mask, signal_cl, lmax, *, mask2=None, coarse_nside=COARSE_NSIDE, nthreads=None):
    """The part of :func:`coarse_grid_deprojection_bias` that needs no fine mask spectrum: the bias to
    ``min(lmax, 2 coarse_nside)`` on the coarse grid (the exact bias to ``lmax`` at or below ``coarse_nside``).

    The estimator runs it on a thread beside the fine mask's transform and the coupling kernel, then
    completes it with :func:`continued_coarse_grid_bias`.
    """
    nthreads = resolve_nthreads(nthreads)
    w1 = check_mask(mask, "mask")
    nside = int(round(np.sqrt(w1.size / 12)))
    s = np.asarray(signal_cl, dtype=np.float64)
    if nside <= coarse_nside:
        d1 = TemplateDeprojection(w1, nthreads=nthreads)
        d2 = None if mask2 is None else TemplateDeprojection(mask2, nthreads=nthreads)
        return deprojection_bias(d1, s, lmax, deprojection2=d2, nthreads=nthreads)
    d1 = TemplateDeprojection(_averaged_down(w1, coarse_nside, nthreads=nthreads), nthreads=nthreads)
    d2 = None
    if mask2 is not None:
        d2 = TemplateDeprojection(_averaged_down(check_mask(mask2, "mask2"), coarse_nside, nthreads=nthreads),
                                  nthreads=nthreads)
    top = min(lmax, 2 * coarse_nside)
    return deprojection_bias(d1, s[: 3 * coarse_nside], top, deprojection2=d2, nthreads=nthreads)


def continued_coarse_grid_bias(low, lmax, mask_cl, *, coarse_nside=COARSE_NSIDE):
    """:func:`coarse_grid_bias_below`'s ``low`` continued to ``lmax`` along the smoothed fine mask spectrum."""
    low = np.asarray(low, dtype=np.float64)
    top = low.size - 1
    if top >= lmax:
        return low[: lmax + 1].copy()
    delta = np.zeros(lmax + 1)
    delta[: top + 1] = low
    if lmax > top:
        # the shape: the mask spectrum averaged over _TAIL_SMOOTHING multipoles (the bias follows its envelope,
        # not the oscillations of a sharp-edged mask's spectrum)
        raw = np.asarray(mask_cl, dtype=np.float64)[: lmax + 1]
        half = _TAIL_SMOOTHING // 2
        wl = np.convolve(np.pad(raw, half, mode="edge"), np.full(_TAIL_SMOOTHING, 1.0 / _TAIL_SMOOTHING), mode="valid")
        fit = slice(coarse_nside, top + 1)
        norm = float(np.dot(wl[fit], wl[fit]))
        factor = float(np.dot(low[fit], wl[fit])) / norm if norm > 0 else 0.0
        delta[top + 1:] = factor * wl[top + 1:]
    return delta


def above_bins_leakage(mask, signal_cl, lmax, first_unbinned, *, mask2=None, nthreads=None) -> np.ndarray:
    """Expected pseudo-spectrum (l = 0..lmax) of the sky's multipoles from ``first_unbinned`` to the band limit.

    ``sum_{l' >= first_unbinned} M_ll' S_l'`` with the rectangular mode-coupling
    matrix (rows to ``lmax``, columns to the band limit ``len(signal_cl) - 1``)
    of the mask's quadrature spectrum up to ``lmax + band limit``: the exact
    expectation for a sky sampled at the pixel centres (Hivon et al. 2002, ApJ
    567, 2, eq. 7 with the sums extended beyond lmax).

    Parameters
    ----------
    mask : ndarray of shape (12*nside**2,)
        Weights of map 1.
    signal_cl : array_like of shape (sky_lmax+1,)
        Spectrum of the map(s) on the grid, K^2, from ell 0 to the band limit.
    lmax : int
        Largest multipole of the pseudo-spectrum.
    first_unbinned : int
        First multipole not covered by the bins.
    mask2 : ndarray, optional
        Weights of map 2 (cross-spectra).
    nthreads : int, optional
        Threads of the transforms and the coupling kernel.

    Returns
    -------
    ndarray of shape (lmax+1,)
        K^2.
    """
    import ducc0

    nthreads = resolve_nthreads(nthreads)
    s = np.asarray(signal_cl, dtype=np.float64)
    big_l = s.size - 1
    if big_l < first_unbinned:
        return np.zeros(lmax + 1)
    lw = lmax + big_l
    w1 = np.asarray(mask, dtype=np.float64)
    if mask2 is None:
        wl = _sht.map_spectra([w1], lw, nthreads=nthreads)[0]
    else:
        wl = _sht.map_spectra([w1, np.asarray(mask2, dtype=np.float64)], lw, nthreads=nthreads)[2]
    spec = np.zeros((1, lw + 1))
    spec[0, : wl.size] = wl[: lw + 1]
    out = np.empty((1, lmax + 1, big_l + 1))
    ducc0.misc.experimental.coupling_matrix_rect(spec, (0,), out, nthreads=nthreads)
    cols = slice(first_unbinned, big_l + 1)
    weights = (2.0 * np.arange(big_l + 1) + 1.0)[cols] * s[cols]
    return out[0][:, cols] @ weights


def binned_columns(binning, lmax):
    """(lmax+1,) bool: the multipoles inside the bins (the binned matrix's columns; the others count as leakage)."""
    idx = np.full(lmax + 1, -1)
    n = min(lmax + 1, binning.bin_index.size)
    idx[:n] = binning.bin_index[:n]
    return idx >= 0


def row_factors(coupling, signal_cl, lmax, *, bias=None, leakage=None, modelled=None) -> np.ndarray:
    """``1 + (delta_l + leak_l) / (M S)_l``: the row factors that fold the corrections into the coupling matrix.

    With ``modelled`` (the columns that the binned matrix models: the multipoles inside the bins), the
    guess's power in the other columns up to ``lmax`` (below the first bin, between bins, above the last)
    joins the leakage and the base is the modelled columns' share: ``1 + (delta_l + leak_l +
    (M S_out)_l) / (M S_in)_l``, so that the binned matrix with these rows gives the whole expected
    pseudo-spectrum of a sky whose spectrum is the guess (times any constant).  ``leakage`` then holds only
    the columns above ``lmax``.  Without it (the rows of the windows and the noise), ``1 + delta_l / (M S)_l``
    over every column.

    Parameters
    ----------
    coupling : ndarray of shape (lmax+1, lmax+1)
        The mode-coupling matrix ``M``.
    signal_cl : array_like of shape (>= lmax+1,)
        Spectrum of the map on the grid for the guess, K^2.
    lmax : int
        Largest multipole.
    bias, leakage : ndarray of shape (lmax+1,), optional
        :func:`deprojection_bias` and :func:`above_bins_leakage` for the same spectrum.
    modelled : ndarray of shape (lmax+1,) of bool, optional
        The columns the binned matrix models (inside the bins).

    Returns
    -------
    ndarray of shape (lmax+1,)
        Dimensionless; 1 where the guess gives no pseudo-power.
    """
    s = np.asarray(signal_cl, dtype=np.float64)[: lmax + 1]
    extra = np.zeros(lmax + 1)
    if modelled is None:
        base = coupling @ s
    else:
        inside = np.asarray(modelled, dtype=bool)[: lmax + 1]
        base = coupling @ np.where(inside, s, 0.0)
        extra += coupling @ np.where(inside, 0.0, s)
    if bias is not None:
        extra += bias
    if leakage is not None:
        extra += leakage
    ok = base > 1e-12 * max(float(np.max(base)), 1e-300)
    out = np.ones(lmax + 1)
    out[ok] += extra[ok] / base[ok]
    return out
