"""How the spectrum estimator turns a map into its pseudo-spectrum: checks, monopole/dipole or templates, transforms.

:class:`_MapPreparation` is the base of :class:`~cmbtools.spectrum.SpectrumEstimator` (its "applying"
half before the binned inverse): a map is checked against the mask (missing pixels outside it set to 0,
inside it refused), its monopole and dipole are removed on the masked sky
(:mod:`cmbtools.maps.monopole_dipole`) or templates are deprojected
(:mod:`cmbtools.spectrum.deprojection`), and it is transformed on the rings the mask touches
(:mod:`cmbtools._core.sht`).  For the many maps of a Monte Carlo run the monopole and dipole can be
removed in harmonic space after one transform (:meth:`_MapPreparation._keep_removal_coefficients`).
Small derived quantities of the masks (occupied rings, weight sums) are computed on first use and kept.

The subclass provides ``mask``, ``mask2``, ``lmax``, ``remove_monopole_dipole``, ``_inputs`` (the
:class:`~cmbtools.spectrum.settings.EstimatorSettings`) and ``_nthreads``.
"""

from __future__ import annotations

import numpy as np

from cmbtools._core import sht as _sht
from cmbtools._core.checks import as_map, check_same_nside, missing_pixels
from cmbtools.exceptions import InvalidInputError

__all__ = []

#: Largest |map value| (K) the estimator accepts: squares summed over up to 12 * 2**58 pixels stay finite.
_LARGEST_MAP_VALUE = 1e100

#: A map whose values all lie within +-this has no missing pixel (UNSEEN is -1.6375e30) and no value above
#: _LARGEST_MAP_VALUE: the per-pixel checks are skipped.
_LARGEST_PLAIN_VALUE = 1e29


def _checked_values(a, mask, name, field="", one_call="cmbtools.spectrum.estimate_spectrum"):
    """``a`` (a float64 map) with its missing pixels outside ``mask`` set to 0; refuse missing pixels or values
    above :data:`_LARGEST_MAP_VALUE` where ``mask`` is non-zero (``field``: 'Q ' etc. in the messages;
    ``one_call``: the function that zeroes the mask there for the user)."""
    lo, hi = float(a.min()), float(a.max())  # (NaN propagates) two passes, no map-sized temporary
    if -_LARGEST_PLAIN_VALUE <= lo and hi <= _LARGEST_PLAIN_VALUE:
        return a  # no missing pixel, no value too large: nothing else to look at
    bad = missing_pixels(a)
    if bad.any():
        n_in = int((bad & (mask > 0)).sum())
        if n_in:
            raise InvalidInputError(
                f"The {name!r} has {n_in} missing (UNSEEN/NaN/inf) {field}pixels where its mask is non-zero; "
                f"the precomputed coupling matrix would be wrong. Zero the mask there and build a new "
                f"estimator, or use {one_call}, which does that for you."
            )
        a = np.where(bad, 0.0, a)
    peak = float(np.max(np.abs(a[mask > 0]), initial=0.0))
    if peak > _LARGEST_MAP_VALUE:
        raise InvalidInputError(
            f"The {name!r} has {field}values up to {peak:.3g} inside the mask; the transforms square and sum them, "
            f"which overflows double precision beyond {_LARGEST_MAP_VALUE:g} (K). Check the map's unit."
        )
    return a


class _MapPreparation:
    """Map checks, monopole/dipole removal or template deprojection, and transforms of the spectrum estimator."""

    def _prepare(self, m, name, mask, is_second=False, by_rings=False):
        """Check a map against the mask, fill missing pixels outside it, remove monopole/dipole, apply the mask.

        ``by_rings``: with the plain monopole/dipole removal, return a
        :class:`~cmbtools._core.sht.RingBlocks` that makes the prepared map a run
        of rings at a time (for a transform in pieces: no second map-sized array).
        """
        a = self._checked_map(m, name, mask, is_second)
        if self._inputs.templates:
            return self._template_deprojection(is_second).project(a, nthreads=self._nthreads)
        if self.remove_monopole_dipole:
            from cmbtools.maps.monopole_dipole import masked_without_monopole_dipole, weight_sums

            key = "_weight_sums2" if is_second else "_weight_sums1"
            rings = self._cached("_rings2" if is_second else "_rings1", lambda: _sht.occupied_rings(mask))
            sums = self._cached(key, lambda: weight_sums(mask, nthreads=self._nthreads, rings=rings))
            return masked_without_monopole_dipole(
                a, mask, nthreads=self._nthreads, sums_of_weights=sums, rings=rings, by_rings=by_rings
            )
        return a * mask

    def _template_deprojection(self, is_second=False):
        """The :class:`~cmbtools.spectrum.deprojection.TemplateDeprojection` of map 1 or map 2 (built once)."""
        key = "_deprojection2" if is_second and self._inputs.mask2 is not None else "_deprojection1"
        from cmbtools.spectrum.deprojection import TemplateDeprojection

        mask = self.mask2 if key == "_deprojection2" else self.mask
        inp = self._inputs
        return self._cached(key, lambda: TemplateDeprojection(
            mask, inp.templates, monopole_dipole=inp.remove_monopole_dipole, nthreads=self._nthreads))

    @staticmethod
    def _checked_map(m, name, mask, is_second=False):
        """The map as float64, missing pixels outside the mask set to 0; refuse missing or too large values inside."""
        a = as_map(m, name)
        check_same_nside(a, mask, name, "mask2" if is_second else "mask")
        return _checked_values(a, mask, name)

    def _cached(self, key, make):
        """A small derived quantity of the masks, computed on first use and kept."""
        value = self.__dict__.get(key)
        if value is None:
            value = make()
            object.__setattr__(self, key, value)
        return value

    def _alm(self, masked, is_second=False):
        if self._inputs.n_iter:
            return _sht.map2alm(masked, self.lmax, n_iter=self._inputs.n_iter, nthreads=self._nthreads)
        # the masked map is zero on the rings the mask does not touch: the transform skips them
        mask = self.mask2 if is_second else self.mask
        rings = self._cached("_rings2" if is_second else "_rings1", lambda: _sht.occupied_rings(mask))
        return _sht.map2alm(masked, self.lmax, nthreads=self._nthreads, rings=rings)

    # -- one map's pseudo-spectrum: lean on memory for large maps, cheap for the many maps of a Monte Carlo run
    def _occupied_rings(self):
        """Rings where the mask (or, with two masks, either one) is non-zero (read-only, kept)."""
        rings = self._cached("_rings1", lambda: _sht.occupied_rings(self.mask))
        if self._inputs.mask2 is not None:
            rings = rings | self._cached("_rings2", lambda: _sht.occupied_rings(self.mask2))
        return rings

    def _auto_spectrum(self, masked):
        """Pseudo-Cl of one prepared map; a large transform never holds all its coefficients (sht.map_spectra)."""
        if self._inputs.n_iter:
            return _sht.alm2cl(self._alm(masked), lmax=self.lmax)
        rings = self._cached("_rings1", lambda: _sht.occupied_rings(self.mask))
        return _sht.map_spectra([masked], self.lmax, nthreads=self._nthreads, rings=rings)[0]

    def _map_auto_spectrum(self, m, name):
        """Pseudo-Cl of one map through ``mask``: ``_prepare`` then ``_auto_spectrum``, or the harmonic removal.

        Once :meth:`_keep_removal_coefficients` has stored the transforms of
        the mask times ``1, x, y, z`` (the Monte Carlo validation does, for the
        many maps of a run), the monopole and dipole are fitted and removed
        after one transform of the masked map
        (:func:`cmbtools.maps.monopole_dipole.subtract_fitted_coefficients`):
        the same pseudo-Cl to rounding, without the low-multipole transforms
        and the pixel passes of the removal in map space.
        """
        coefficients = self.__dict__.get("_removal_coefficients")
        if coefficients is None:
            # a large map's transform runs in pieces: then the prepared map is made a run of rings at a time
            by_rings = not self._inputs.n_iter and _sht.runs_in_pieces(self.nside, self.lmax)
            return self._auto_spectrum(self._prepare(m, name, self.mask, by_rings=by_rings))
        from cmbtools.maps.monopole_dipole import subtract_fitted_coefficients

        masked = self._checked_map(m, name, self.mask) * self.mask
        alm = _sht.map2alm(masked, self.lmax, nthreads=self._nthreads, rings=self._occupied_rings())
        del masked
        subtract_fitted_coefficients(alm, coefficients, self._weight_sums1, self._n_used1, self.mask.size)
        return _sht.alm2cl(alm, lmax=self.lmax)

    def _keep_removal_coefficients(self) -> bool:
        """Store what the harmonic removal of :meth:`_map_auto_spectrum` needs; return whether it is on.

        For an estimator applied to many maps (costs four transforms once, and
        four sets of coefficients of memory, which are not pickled).  Only
        with the monopole/dipole removal, the plain quadrature, one mask
        spread over enough of the sphere, and coefficients that fit four times
        in :data:`cmbtools._core.sht.ONE_CALL_BYTES`.
        """
        if "_removal_coefficients" in self.__dict__:
            return True
        if not self.remove_monopole_dipole or self._inputs.n_iter or self._inputs.mask2 is not None:
            return False
        if self._inputs.templates:
            return False
        if 4 * 16 * _sht.alm_size(self.lmax) > _sht.ONE_CALL_BYTES:
            return False
        from cmbtools.maps.monopole_dipole import harmonic_removal_applies, removal_coefficients, weight_sums

        rings = self._cached("_rings1", lambda: _sht.occupied_rings(self.mask))
        sums = self._cached("_weight_sums1", lambda: weight_sums(self.mask, nthreads=self._nthreads, rings=rings))
        if not harmonic_removal_applies(sums):
            return False
        self._cached("_n_used1", lambda: int(np.count_nonzero(self.mask)))
        self._cached(
            "_removal_coefficients",
            lambda: removal_coefficients(self.mask, self.lmax, nthreads=self._nthreads, rings=self._occupied_rings()),
        )
        return True
