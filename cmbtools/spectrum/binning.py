"""Groups of multipoles (bins) and the matrices that average a spectrum over them.

A :class:`Binning` is a frozen value object: a list of bins, each an inclusive
range of multipoles ``ell_min[b] <= ell <= ell_max[b]``, plus the weighting used
inside a bin.  Bins are sorted and do not overlap; gaps between bins are
allowed (multipoles in no bin are left out of the bandpowers).

Two weightings are offered.  With ``weighting="dl"`` (the default) a bandpower
is the plain average of ``D_l = l(l+1) C_l / 2 pi`` over the bin and the
spectrum is modelled as flat in ``D_l`` inside the bin; with ``"cl"`` it is the
plain average of ``C_l`` and the model is flat in ``C_l``.  In matrix form
(Hivon et al. 2002, ApJ 567, 2, section 2.2) the averaging operator is ``P``
(shape ``(n_bins, lmax+1)``) and the piecewise-flat model is ``Q`` (shape
``(lmax+1, n_bins)``), with ``P @ Q`` the identity.
"""

from __future__ import annotations

import dataclasses
import functools

import numpy as np

from cmbtools._core.checks import check_int
from cmbtools.exceptions import InvalidInputError

__all__ = ["Binning"]

_WEIGHTINGS = ("dl", "cl")


def _int_array(values, name):
    try:
        a = np.asarray(values)
    except (TypeError, ValueError):
        raise InvalidInputError(f"The {name!r} must be a 1-d array of integers.") from None
    if a.ndim != 1 or a.size == 0:
        raise InvalidInputError(f"The {name!r} must be a non-empty 1-d array of integers. Got shape {a.shape} instead.")
    if a.dtype.kind == "f":
        # whole numbers that fit in int64 (larger ones would wrap around when converted)
        if not np.all(np.isfinite(a)) or not np.all(a == np.round(a)) or not np.all(np.abs(a) <= 2**62):
            raise InvalidInputError(f"The {name!r} must contain whole numbers. Got {a!r} instead.")
    elif a.dtype.kind not in "iu":
        raise InvalidInputError(f"The {name!r} must be a 1-d array of integers. Got dtype {a.dtype} instead.")
    out = a.astype(np.int64)
    out.setflags(write=False)
    return out


@dataclasses.dataclass(frozen=True, eq=False)
class Binning:
    """Bins of multipoles for bandpowers.

    Parameters
    ----------
    ell_min, ell_max : array_like of int, shape (n_bins,)
        First and last multipole of every bin (both inclusive).  Bins must be
        sorted, non-empty and must not overlap.
    weighting : {'dl', 'cl'}, default='dl'
        ``'dl'``: a bandpower is the average of ``l(l+1) C_l / 2 pi`` over the
        bin (flat-``D_l`` model inside the bin); ``'cl'``: the average of ``C_l``.

    Attributes
    ----------
    n_bins : int
        Number of bins.
    ell_eff : ndarray of shape (n_bins,)
        Representative multipole of each bin: the mean of its multipoles.
    lmax : int
        Largest binned multipole (``ell_max[-1]``).

    Examples
    --------
    >>> from cmbtools.spectrum import Binning
    >>> b = Binning.uniform(lmin=2, lmax=47, width=16)
    >>> b.n_bins, b.ell_min.tolist(), b.ell_max.tolist()
    (3, [2, 18, 34], [17, 33, 47])
    >>> b.ell_eff.tolist()
    [9.5, 25.5, 40.5]
    """

    ell_min: np.ndarray
    ell_max: np.ndarray
    weighting: str = "dl"

    def __post_init__(self):
        lo = _int_array(self.ell_min, "ell_min")
        hi = _int_array(self.ell_max, "ell_max")
        if lo.shape != hi.shape:
            raise InvalidInputError(
                f"The 'ell_min' and 'ell_max' arrays must have the same length. Got {lo.size} and {hi.size} instead."
            )
        if np.any(lo < 0):
            raise InvalidInputError(f"The 'ell_min' values must be >= 0. Got {int(lo.min())} instead.")
        if np.any(hi < lo):
            b = int(np.argmax(hi < lo))
            raise InvalidInputError(
                f"Bin {b} is empty: ell_max={int(hi[b])} is smaller than ell_min={int(lo[b])}."
            )
        if lo.size > 1 and np.any(lo[1:] <= hi[:-1]):
            b = int(np.argmax(lo[1:] <= hi[:-1]))
            raise InvalidInputError(
                f"Bins {b} and {b + 1} overlap or are not sorted: [{int(lo[b])}, {int(hi[b])}] and "
                f"[{int(lo[b + 1])}, {int(hi[b + 1])}]."
            )
        if self.weighting not in _WEIGHTINGS:
            raise InvalidInputError(f"The 'weighting' parameter must be 'dl' or 'cl'. Got {self.weighting!r} instead.")
        if self.weighting == "dl" and lo[0] == 0 and hi[0] == 0:
            raise InvalidInputError(
                "A bin holding only ell=0 has D_0 = 0 under the 'dl' weighting; use weighting='cl' "
                "or start the first bin at ell >= 1."
            )
        object.__setattr__(self, "ell_min", lo)
        object.__setattr__(self, "ell_max", hi)

    # ------------------------------------------------------------------ constructors
    @classmethod
    def uniform(cls, lmin: int = 2, lmax: int | None = None, width: int = 16, *, weighting: str = "dl") -> "Binning":
        """Bins of ``width`` multipoles from ``lmin`` up to ``lmax``.

        The last bin ends at ``lmax`` and may be narrower than ``width``
        (it is kept when it has at least half the width, otherwise merged into
        the bin before it).

        Parameters
        ----------
        lmin : int, default=2
            First multipole of the first bin.
        lmax : int
            Last multipole of the last bin (inclusive).
        width : int, default=16
            Number of multipoles per bin.
        weighting : {'dl', 'cl'}, default='dl'
        """
        if lmax is None:
            raise InvalidInputError("The 'lmax' parameter of Binning.uniform is required (last multipole of the last bin).")
        lmin = check_int(lmin, "lmin", minimum=0)
        lmax = check_int(lmax, "lmax", minimum=0)
        if lmin > lmax:
            raise InvalidInputError(f"The first multipole lmin={lmin} is above the last, lmax={lmax}.")
        width = check_int(width, "width", minimum=1)
        starts = np.arange(lmin, lmax + 1, width)
        ends = np.minimum(starts + width - 1, lmax)
        if starts.size > 1 and (ends[-1] - starts[-1] + 1) * 2 < width:
            starts = starts[:-1]
            ends = np.append(ends[:-2], lmax)
        return cls(starts, ends, weighting)

    @classmethod
    def from_edges(cls, edges, *, weighting: str = "dl") -> "Binning":
        """Contiguous bins from their edges: bin ``b`` is ``edges[b] <= ell < edges[b+1]``.

        Parameters
        ----------
        edges : array_like of int, shape (n_bins + 1,)
            Strictly increasing; the last value is one past the last multipole.
        weighting : {'dl', 'cl'}, default='dl'

        Examples
        --------
        >>> Binning.from_edges([2, 10, 30, 61]).ell_max.tolist()
        [9, 29, 60]
        """
        e = _int_array(edges, "edges")
        if e.size < 2:
            raise InvalidInputError(f"The 'edges' must have at least two values (one bin). Got {e.tolist()} instead.")
        if np.any(np.diff(e) <= 0):
            raise InvalidInputError(f"The 'edges' must be strictly increasing. Got {e.tolist()} instead.")
        return cls(e[:-1], e[1:] - 1, weighting)

    @classmethod
    def log_spaced(cls, lmin: int, lmax: int, n_bins: int, *, min_width: int = 1,
                   weighting: str = "dl") -> "Binning":
        """About ``n_bins`` bins evenly spaced in ``log(ell)`` from ``lmin`` to ``lmax``, none narrower than ``min_width``.

        Edges are rounded to whole multipoles.  Where evenly spaced edges
        would give bins narrower than ``min_width`` multipoles (at low
        ``ell``), bins are ``min_width`` wide instead and the remaining range
        is again split evenly in ``log(ell)``; a last bin narrower than
        ``min_width`` joins the one before.  The result may therefore have
        fewer than ``n_bins`` bins.  On a masked sky, multipoles closer than
        about ``1 / f_sky`` are coupled, so bins narrower than that make the
        binned coupling matrix ill-conditioned (common practice).

        Parameters
        ----------
        lmin : int
            First multipole (>= 1).
        lmax : int
            Last multipole (inclusive).
        n_bins : int
            Requested number of bins.
        min_width : int, default=1
            Smallest number of multipoles in a bin.
        weighting : {'dl', 'cl'}, default='dl'
            Average D_l or C_l inside each bin.

        Returns
        -------
        Binning
            The bins.
        """
        lmin = check_int(lmin, "lmin", minimum=1)
        lmax = check_int(lmax, "lmax", minimum=1)
        if lmin > lmax:
            raise InvalidInputError(f"The first multipole lmin={lmin} is above the last, lmax={lmax}.")
        n_bins = check_int(n_bins, "n_bins", minimum=1, maximum=lmax - lmin + 1)
        min_width = check_int(min_width, "min_width", minimum=1, maximum=lmax - lmin + 1)
        stop = lmax + 1
        edges = [lmin]
        while edges[-1] < stop and len(edges) <= n_bins:
            left = n_bins - (len(edges) - 1)  # bins still to place over [edges[-1], stop)
            step = (stop / edges[-1]) ** (1.0 / left)
            nxt = max(int(round(edges[-1] * step)), edges[-1] + min_width)
            edges.append(min(nxt, stop))
        edges[-1] = stop
        if len(edges) > 2 and edges[-1] - edges[-2] < min_width:
            del edges[-2]  # a narrow last bin joins the one before
        return cls.from_edges(np.array(edges, dtype=np.int64), weighting=weighting)

    # ------------------------------------------------------------------ derived values
    @property
    def n_bins(self) -> int:
        return int(self.ell_min.size)

    @property
    def lmin(self) -> int:
        """Smallest binned multipole."""
        return int(self.ell_min[0])

    @property
    def lmax(self) -> int:
        """Largest binned multipole."""
        return int(self.ell_max[-1])

    @functools.cached_property
    def n_ell(self) -> np.ndarray:
        """Number of multipoles in every bin."""
        n = self.ell_max - self.ell_min + 1
        n.setflags(write=False)
        return n

    @functools.cached_property
    def ell_eff(self) -> np.ndarray:
        """Mean multipole of every bin (float)."""
        e = 0.5 * (self.ell_min + self.ell_max).astype(np.float64)
        e.setflags(write=False)
        return e

    @functools.cached_property
    def dl_factor(self) -> np.ndarray:
        """``ell_eff (ell_eff + 1) / 2 pi``: converts the C_l column to the D_l column."""
        f = self.ell_eff * (self.ell_eff + 1.0) / (2.0 * np.pi)
        f.setflags(write=False)
        return f

    @functools.cached_property
    def bin_index(self) -> np.ndarray:
        """For ``ell = 0..lmax``: the bin containing it, or -1."""
        idx = np.full(self.lmax + 1, -1, dtype=np.int64)
        for b, (lo, hi) in enumerate(zip(self.ell_min, self.ell_max)):
            idx[lo : hi + 1] = b
        idx.setflags(write=False)
        return idx

    def averaging_weights(self, lmax: int | None = None) -> np.ndarray:
        """``P[bin(l), l]`` for ``l = 0..lmax`` (zero outside the bins): the non-zeros of :meth:`averaging_matrix`.

        Parameters
        ----------
        lmax : int, optional
            Largest multipole (>= the last bin's ``ell_max``, which is the default).

        Returns
        -------
        ndarray of shape (lmax+1,)
            The weight of each multipole in its bin's average.
        """
        lmax = self.lmax if lmax is None else check_int(lmax, "lmax", minimum=self.lmax)
        ell = np.arange(lmax + 1, dtype=np.float64)
        w = ell * (ell + 1.0) / (2.0 * np.pi) if self.weighting == "dl" else np.ones(lmax + 1)
        out = np.zeros(lmax + 1)
        idx = self.bin_index
        sel = np.nonzero(idx >= 0)[0]
        out[sel] = w[sel] / self.n_ell[idx[sel]]
        return out

    def model_weights(self, lmax: int | None = None) -> np.ndarray:
        """``Q[l, bin(l)]`` for ``l = 0..lmax`` (zero outside the bins): the non-zeros of :meth:`model_matrix`.

        Parameters
        ----------
        lmax : int, optional
            Largest multipole (>= the last bin's ``ell_max``, which is the default).

        Returns
        -------
        ndarray of shape (lmax+1,)
            The value of each multipole's model for a unit bandpower.
        """
        lmax = self.lmax if lmax is None else check_int(lmax, "lmax", minimum=self.lmax)
        w = self.unit_bandpower_cl(lmax)
        out = np.zeros(lmax + 1)
        sel = np.nonzero(self.bin_index >= 0)[0]
        out[sel] = w[sel]
        return out

    def unit_bandpower_cl(self, lmax: int) -> np.ndarray:
        """``C_l`` of a unit bandpower at every ``l = 0..lmax``, inside the bins or not.

        Parameters
        ----------
        lmax : int
            Largest multipole (any ``>= 0``, below or above the bins).

        Returns
        -------
        ndarray of shape (lmax+1,)
            ``2 pi / (l (l+1))`` (zero at ``l = 0``) with the ``"dl"`` weighting, one with ``"cl"``;
            :meth:`model_weights` is this restricted to the bins.
        """
        lmax = check_int(lmax, "lmax", minimum=0)
        if self.weighting != "dl":
            return np.ones(lmax + 1)
        ell = np.arange(1, lmax + 1, dtype=np.float64)
        w = np.zeros(lmax + 1)
        w[1:] = 2.0 * np.pi / (ell * (ell + 1.0))
        return w

    def averaging_matrix(self, lmax: int | None = None) -> np.ndarray:
        """The operator ``P`` of shape ``(n_bins, lmax+1)``: bandpowers = ``P @ C_l``.

        For ``'dl'`` weighting ``P[b, l] = l(l+1) / (2 pi n_b)``, for ``'cl'``
        ``P[b, l] = 1 / n_b``, on the multipoles of bin ``b``; zero elsewhere.

        Parameters
        ----------
        lmax : int, optional
            Largest multipole (>= the last bin's ``ell_max``, which is the default).

        Returns
        -------
        ndarray of shape (n_bins, lmax+1)
            The matrix ``P``.
        """
        w = self.averaging_weights(lmax)
        p = np.zeros((self.n_bins, w.size))
        sel = np.nonzero(self.bin_index >= 0)[0]
        p[self.bin_index[sel], sel] = w[sel]
        return p

    def model_matrix(self, lmax: int | None = None) -> np.ndarray:
        """The operator ``Q`` of shape ``(lmax+1, n_bins)``: the piecewise-flat spectrum of bandpowers.

        For ``'dl'`` weighting ``Q[l, b] = 2 pi / (l(l+1))`` on the multipoles of
        bin ``b`` (zero at ``l = 0``), for ``'cl'`` ``Q[l, b] = 1``.

        Parameters
        ----------
        lmax : int, optional
            Largest multipole (>= the last bin's ``ell_max``, which is the default).

        Returns
        -------
        ndarray of shape (lmax+1, n_bins)
            The matrix ``Q``.
        """
        w = self.model_weights(lmax)
        q = np.zeros((w.size, self.n_bins))
        sel = np.nonzero(self.bin_index >= 0)[0]
        q[sel, self.bin_index[sel]] = w[sel]
        return q

    def bin_spectrum(self, cl) -> np.ndarray:
        """Average a per-ell spectrum ``C_l`` (length >= lmax+1) into bins; returns the C_l bandpowers.

        With ``'dl'`` weighting the average is taken over ``D_l`` and converted
        back to ``C_l`` at ``ell_eff``, the same convention as the estimator's
        ``cl`` column.

        Parameters
        ----------
        cl : array_like of shape (>= lmax+1,)
            C_l from ell = 0 (any unit; K^2 for the library's spectra).

        Returns
        -------
        ndarray of shape (n_bins,)
            The C_l bandpowers, in the unit of ``cl``.
        """
        cl = np.asarray(cl, dtype=np.float64)
        if cl.ndim != 1 or cl.size < self.lmax + 1:
            raise InvalidInputError(
                f"The spectrum to bin must be 1-d and extend to ell={self.lmax}. Got shape {cl.shape} instead."
            )
        binned = self.averaging_matrix() @ cl[: self.lmax + 1]
        return binned / self.dl_factor if self.weighting == "dl" else binned

    def as_dict(self) -> dict:
        """A description for file headers: weighting, n_bins and the bin limits as text.

        Returns
        -------
        dict
            ``bins_weighting``, ``bins_count`` and the bin limits (``bins_ell_min``, ``bins_ell_max``) as text.
        """
        return {
            "bins_weighting": self.weighting,
            "bins_count": self.n_bins,
            "bins_ell_min": " ".join(map(str, self.ell_min.tolist())),
            "bins_ell_max": " ".join(map(str, self.ell_max.tolist())),
        }

    # ------------------------------------------------------------------ value semantics
    def _key(self):
        return (self.ell_min.tobytes(), self.ell_max.tobytes(), self.weighting)

    def __eq__(self, other):
        if not isinstance(other, Binning):
            return NotImplemented
        return self._key() == other._key()

    def __hash__(self):
        return hash(self._key())

    def __repr__(self):
        return (
            f"Binning(n_bins={self.n_bins}, ell {self.lmin}..{self.lmax}, weighting={self.weighting!r})"
        )


def read_bin_edges(path) -> np.ndarray:
    """Read bin edges from a text file: numbers separated by commas or white space, ``#`` starting a comment.

    The result goes to :meth:`Binning.from_edges` (which checks the values).

    Parameters
    ----------
    path : str or path-like
        The text file.

    Returns
    -------
    ndarray of float64
        The numbers in the order of the file.

    Raises
    ------
    InputFileError
        If the file is missing, not UTF-8 text, or holds something that is not a number.
    """
    from cmbtools._core.tables import number_cell, read_text_table

    table = read_text_table(path, what="a list of bin edges", inline_comments=True, header=False,
                            separator="per-line")
    values = []
    for number, cells in table.rows:
        for cell in (x for c in cells for x in c.split()):
            values.append(number_cell(table.path, cell, f"line {number}:"))
    return np.array(values, dtype=np.float64)
