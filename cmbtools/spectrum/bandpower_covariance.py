"""The bandpower covariance as an object and a file; the covariance from simulations.

:class:`BandpowerCovariance` holds a covariance with its bins and window
functions, whether analytic (:class:`~cmbtools.spectrum.GaussianCovariance`)
or simulated.

Simulated covariance
--------------------
:func:`simulated_covariance` turns the bandpowers of a Monte Carlo run into a
covariance file; its inverse carries the Hartlap et al. (2007, A&A 464, 399,
eq. 17) factor ``(n - p - 2) / (n - 1)`` for ``n`` simulations and ``p`` bins.

Several spectra
---------------
One file layout serves temperature and I, Q, U measurements: a covariance
has a spectrum axis ``spectra`` (``('TT',)`` for temperature; ``('TT', 'TE',
'TB', 'EE', 'EB', 'BB')`` for I, Q, U maps) and is spectrum-major: row
``i * n_bins + b`` is bin ``b`` of spectrum ``spectra[i]``, the same order as
:class:`~cmbtools.spectrum.PolarizedBandpowers` ``cl.ravel()``.  The window
functions are spectrum-major too, on both axes: ``windows[i * n_bins + b,
j * (lmax+1) + l]`` is how bin ``b`` of spectrum ``i`` responds to the sky's
``C_l`` of spectrum ``j``.  ``blocks`` (n_spectra, n_spectra) says which
blocks the model computed; a block it did not compute holds zeros and is
marked False there (so a zero block is never passed off as a computed one).

Files
-----
:func:`write_covariance` / :func:`read_covariance` (``.npz`` without pickle,
or FITS); layout in :func:`write_covariance`.
"""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import numpy as np

from cmbtools._core.files import atomic_output, check_input_file, check_output_path
from cmbtools._version import __version__
from cmbtools.exceptions import InputFileError, InvalidInputError

__all__ = [
    "BandpowerCovariance",
    "simulated_covariance",
    "hartlap_factor",
    "write_covariance",
    "read_covariance",
    "check_covariance_spectra",
]

_FORMAT = "cmbtools-bandpower-covariance-1"
#: The spectra a covariance may hold, in the order of every polarized array.
_KNOWN_SPECTRA = ("TT", "TE", "TB", "EE", "EB", "BB")


def hartlap_factor(n_sims, n_bins) -> float:
    """``(n - p - 2) / (n - 1)``, the factor that debiases the inverse of a simulated covariance.

    Hartlap, Simon & Schneider (2007, A&A 464, 399, eq. 17).

    Parameters
    ----------
    n_sims : int
        Number of simulations.
    n_bins : int
        Number of bins (the dimension of the covariance).

    Returns
    -------
    float
    """
    n, p = int(n_sims), int(n_bins)
    if n < p + 3:
        raise InvalidInputError(
            f"A simulated covariance of {p} bins needs at least {p + 3} simulations to be inverted. Got {n} instead."
        )
    return (n - p - 2) / (n - 1)


@dataclasses.dataclass(frozen=True, eq=False)
class BandpowerCovariance:
    """A bandpower covariance with its bins and window functions (what the covariance files hold).

    Parameters
    ----------
    ell_min, ell_max : array_like of int, shape (n_bins,)
        Bin limits (inclusive).
    ell_eff : array_like of shape (n_bins,)
        Effective multipole of each bin.
    matrix : array_like of shape (n_spectra n_bins, n_spectra n_bins)
        Covariance of the ``cl`` bandpowers, K^4, spectrum-major (see the module notes).
    windows : array_like of shape (n_spectra n_bins, n_spectra (lmax+1)), optional
        Bandpower window functions ``E[cl] = windows @ C_l`` (``C_l`` of the spectra one after the other,
        each from ell = 0).
    kind : {'gaussian', 'simulation', 'knox'}, default='gaussian'
        How it was obtained.
    n_sims : int, default=0
        Number of simulations of a simulated covariance.
    settings : dict, optional
        Recorded settings (str or number values).
    spectra : tuple of str, default=('TT',)
        The spectrum axis: ``('TT',)`` (temperature) or ``('TT', 'TE', 'TB', 'EE', 'EB', 'BB')``.
    blocks : array_like of bool, shape (n_spectra, n_spectra), optional
        Which blocks were computed (default: all).  A block marked False must hold zeros.
    """

    ell_min: np.ndarray
    ell_max: np.ndarray
    ell_eff: np.ndarray
    matrix: np.ndarray
    windows: np.ndarray | None = None
    kind: str = "gaussian"
    n_sims: int = 0
    settings: dict = dataclasses.field(default_factory=dict)
    spectra: tuple = ("TT",)
    blocks: np.ndarray | None = None

    def __post_init__(self):
        lo = np.array(self.ell_min, dtype=np.int64)
        nb = lo.size
        hi = np.array(self.ell_max, dtype=np.int64)
        eff = np.array(self.ell_eff, dtype=np.float64)
        m = np.array(self.matrix, dtype=np.float64)
        if lo.ndim != 1 or nb == 0 or hi.shape != (nb,) or eff.shape != (nb,):
            raise InvalidInputError("The bins of a covariance must be three 1-d arrays of the same length.")
        spectra = tuple(str(x) for x in np.atleast_1d(np.asarray(self.spectra, dtype=str)))
        if spectra not in (("TT",), _KNOWN_SPECTRA):
            raise InvalidInputError(f"The spectra of a covariance must be ('TT',) or {_KNOWN_SPECTRA}. "
                                    f"Got {spectra} instead.")
        ns = len(spectra)
        n = ns * nb
        if m.shape != (n, n) or not np.all(np.isfinite(m)):
            raise InvalidInputError(f"The covariance matrix must be a finite ({n}, {n}) array ({ns} spectra of {nb} "
                                    f"bins). Got shape {m.shape} instead.")
        blocks = np.ones((ns, ns), dtype=bool) if self.blocks is None else np.array(self.blocks)
        if blocks.shape != (ns, ns) or blocks.dtype.kind not in "bui":
            raise InvalidInputError(f"The 'blocks' of a covariance must be a ({ns}, {ns}) array of booleans.")
        blocks = blocks.astype(bool)
        if not np.array_equal(blocks, blocks.T) or not np.all(np.diag(blocks)):
            raise InvalidInputError("The 'blocks' of a covariance must be symmetric, with every diagonal block computed.")
        for i, j in zip(*np.nonzero(~blocks)):
            if np.any(m[i * nb:(i + 1) * nb, j * nb:(j + 1) * nb] != 0.0):
                raise InvalidInputError(f"The covariance block {spectra[i]} x {spectra[j]} is marked as not computed "
                                        "but holds non-zero values.")
        blocks.setflags(write=False)
        object.__setattr__(self, "spectra", spectra)
        object.__setattr__(self, "blocks", blocks)
        if not np.allclose(m, m.T, rtol=1e-8, atol=0.0):
            raise InvalidInputError("The covariance matrix is not symmetric.")
        if np.any(np.diag(m) < 0):
            raise InvalidInputError("The covariance matrix has negative variances on its diagonal.")
        if self.kind not in ("gaussian", "simulation", "knox"):
            raise InvalidInputError(f"The covariance 'kind' must be 'gaussian', 'simulation' or 'knox'. Got {self.kind!r} instead.")
        for name, arr in (("ell_min", lo), ("ell_max", hi), ("ell_eff", eff), ("matrix", m)):
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)
        if self.windows is not None:
            w = np.array(self.windows, dtype=np.float64)
            if w.ndim != 2 or w.shape[0] != n or w.shape[1] % ns or w.shape[1] == 0:
                shape = f"({nb}, lmax+1)" if ns == 1 else f"({n}, {ns} (lmax+1))"
                raise InvalidInputError(f"The window functions must have shape {shape}. Got {w.shape} instead.")
            w.setflags(write=False)
            object.__setattr__(self, "windows", w)
        object.__setattr__(self, "n_sims", int(self.n_sims))
        object.__setattr__(self, "settings", {str(k): v for k, v in dict(self.settings).items()})

    @property
    def n_bins(self) -> int:
        """Number of bins (of each spectrum)."""
        return int(self.ell_min.size)

    @property
    def size(self) -> int:
        """Dimension of the matrix: number of spectra times number of bins."""
        return len(self.spectra) * self.n_bins

    @property
    def errors(self) -> np.ndarray:
        """Square roots of the diagonal: the error bars of the ``cl`` bandpowers, K^2 (spectrum-major)."""
        return np.sqrt(np.diag(self.matrix))

    def block(self, spectrum1, spectrum2=None) -> np.ndarray:
        """The (n_bins, n_bins) block of two spectra (default: the auto block of ``spectrum1``).

        Parameters
        ----------
        spectrum1 : str
            The spectrum of the rows ('TT', 'TE', ...).
        spectrum2 : str, optional
            The spectrum of the columns (default: ``spectrum1``).

        Returns
        -------
        ndarray of shape (n_bins, n_bins)

        Raises
        ------
        InvalidInputError
            An unknown spectrum, or a block the model did not compute (see ``blocks``).
        """
        spectrum2 = spectrum1 if spectrum2 is None else spectrum2
        for s in (spectrum1, spectrum2):
            if s not in self.spectra:
                raise InvalidInputError(f"The covariance holds the spectra {', '.join(self.spectra)}; not {s!r}.")
        i, j = self.spectra.index(spectrum1), self.spectra.index(spectrum2)
        if not self.blocks[i, j]:
            raise InvalidInputError(f"The covariance block {spectrum1} x {spectrum2} was not computed.")
        nb = self.n_bins
        return self.matrix[i * nb:(i + 1) * nb, j * nb:(j + 1) * nb]

    @property
    def correlation(self) -> np.ndarray:
        """Correlation coefficients ``C_ij / sqrt(C_ii C_jj)``."""
        e = self.errors
        with np.errstate(invalid="ignore", divide="ignore"):
            return self.matrix / np.outer(e, e)

    def inverse(self) -> np.ndarray:
        """The inverse for a likelihood; a simulated covariance is debiased with :func:`hartlap_factor`.

        Returns
        -------
        ndarray of shape (n_spectra n_bins, n_spectra n_bins)
        """
        if not np.all(self.blocks):
            raise InvalidInputError("The covariance has blocks that were not computed (see 'blocks'); its inverse "
                                    "would treat them as uncorrelated.")
        inv = np.linalg.inv(self.matrix)
        if self.kind == "simulation":
            inv *= hartlap_factor(self.n_sims, self.size)
        return 0.5 * (inv + inv.T)

    def matches(self, binning) -> bool:
        """Whether the covariance has the bins of ``binning`` (a Binning or Bandpowers).

        Parameters
        ----------
        binning : Binning or Bandpowers
            Anything with ``ell_min`` and ``ell_max``.

        Returns
        -------
        bool
        """
        return (np.array_equal(np.asarray(binning.ell_min), self.ell_min)
                and np.array_equal(np.asarray(binning.ell_max), self.ell_max))

    def write(self, path, *, overwrite=False) -> Path:
        """Write to ``.npz`` or ``.fits`` (see :func:`write_covariance`).

        Parameters
        ----------
        path : str or path-like
            Output file, ``.npz`` or ``.fits``.
        overwrite : bool, default=False
            Replace an existing file.

        Returns
        -------
        Path
        """
        return write_covariance(path, self, overwrite=overwrite)


def simulated_covariance(samples, *, ell_min, ell_max, ell_eff, windows=None, settings=None,
                         spectra=("TT",)) -> BandpowerCovariance:
    """The sample covariance (``ddof=1``) of simulated bandpowers.

    Its :meth:`BandpowerCovariance.inverse` applies the Hartlap et al. (2007)
    factor.

    Parameters
    ----------
    samples : array_like of shape (n_sims, n_spectra n_bins)
        ``cl`` bandpowers of every simulation, K^2 (spectrum-major: every bin of the first spectrum, then
        of the next).
    ell_min, ell_max, ell_eff : array_like of shape (n_bins,)
        The bins.
    windows : array_like of shape (n_spectra n_bins, n_spectra (lmax+1)), optional
        Bandpower window functions to store with it.
    settings : dict, optional
        Settings to record.
    spectra : tuple of str, default=('TT',)
        The spectrum axis (see :class:`BandpowerCovariance`); every block is computed.

    Returns
    -------
    BandpowerCovariance
    """
    x = np.asarray(samples, dtype=np.float64)
    if x.ndim != 2 or x.shape[0] < 2:
        raise InvalidInputError(f"The 'samples' must have shape (n_sims, n_bins) with n_sims >= 2. Got {x.shape} instead.")
    cov = np.atleast_2d(np.cov(x, rowvar=False, ddof=1))
    return BandpowerCovariance(ell_min, ell_max, ell_eff, 0.5 * (cov + cov.T), windows, kind="simulation",
                               n_sims=x.shape[0], settings=dict(settings or {}), spectra=spectra)


def write_covariance(path, covariance, *, overwrite=False) -> Path:
    """Write a :class:`BandpowerCovariance` to ``.npz`` (no pickle) or ``.fits``, atomically.

    Layout (both formats; C_l bandpowers, K^4 for the matrix):

    * ``.npz``: arrays ``ell_min``, ``ell_max``, ``ell_eff`` (n_bins,),
      ``spectra`` (n_spectra,) of str (``['TT']`` for temperature, ``['TT',
      'TE', 'TB', 'EE', 'EB', 'BB']`` for I, Q, U maps), ``blocks`` (n_spectra,
      n_spectra) bool (the blocks computed), ``covariance`` (n_spectra n_bins,
      n_spectra n_bins; spectrum-major), ``windows`` (n_spectra n_bins,
      n_spectra (lmax+1), present when known) and ``settings``, a JSON string
      with ``format``, ``software``, ``kind`` ('gaussian', 'simulation' or
      'knox'), ``n_sims``, ``unit`` ('K^4') and the recorded settings.  A file
      without ``spectra`` (written before the spectrum axis) is temperature.
    * ``.fits``: primary header with ``CMBFMT``, ``KIND``, ``NSIMS``, ``BUNIT``,
      ``NSPEC`` and the settings as ``HIERARCH`` cards (for the eye: ASCII, at
      most 60 characters); extension ``BINS`` (table ``ELL_MIN``, ``ELL_MAX``,
      ``ELL_EFF``), extension ``SPECTRA`` (table ``SPECTRUM``), image
      ``BLOCKS`` (1 = computed), image ``COVARIANCE``, table ``SETTINGS`` (one
      row, column ``JSON``: the same JSON string as the npz file's
      ``settings``, which is what is read back) and image ``WINDOWS`` (rows =
      spectrum-major bins, columns = spectrum-major ell from 0).  A FITS file
      without ``SETTINGS`` (written before it) reads with its kind and count
      only.

    Parameters
    ----------
    path : str or path-like
        ``.npz`` or ``.fits`` file.
    covariance : BandpowerCovariance
        What to write.
    overwrite : bool, default=False
        Replace an existing file.

    Returns
    -------
    Path
    """
    out = check_output_path(path, overwrite=overwrite)
    suffix = out.suffix.lower()
    if suffix not in (".npz", ".fits"):
        raise InvalidInputError(f"A covariance file must end in .npz or .fits. Got {str(path)!r} instead.")
    c = covariance
    meta = {"format": _FORMAT, "software": f"cmbtools {__version__}", "kind": c.kind, "n_sims": c.n_sims,
            "unit": "K^4", **c.settings}
    if suffix == ".npz":
        arrays = {"ell_min": c.ell_min, "ell_max": c.ell_max, "ell_eff": c.ell_eff, "covariance": c.matrix,
                  "spectra": np.array(c.spectra, dtype="<U2"), "blocks": np.asarray(c.blocks, dtype=bool)}
        if c.windows is not None:
            arrays["windows"] = c.windows
        with atomic_output(out, overwrite=overwrite, suffix=".npz") as tmp:
            with open(tmp, "wb") as fh:
                np.savez(fh, settings=np.array(json.dumps(meta, sort_keys=True)), **arrays)
        return out
    from astropy.io import fits

    primary = fits.PrimaryHDU()
    primary.header["CMBFMT"] = _FORMAT
    primary.header["KIND"] = c.kind
    primary.header["NSIMS"] = c.n_sims
    primary.header["BUNIT"] = "K^4"
    primary.header["NSPEC"] = len(c.spectra)
    for k, v in c.settings.items():  # for the eye (ASCII, cut to 60 characters); the SETTINGS extension is read
        text = v if isinstance(v, (int, float)) and not isinstance(v, bool) else _header_text(v)
        primary.header[f"HIERARCH {_header_text(k).upper()}"[:60]] = text
    bins = fits.BinTableHDU.from_columns([
        fits.Column(name="ELL_MIN", format="K", array=c.ell_min),
        fits.Column(name="ELL_MAX", format="K", array=c.ell_max),
        fits.Column(name="ELL_EFF", format="D", array=c.ell_eff),
    ], name="BINS")
    spectra = fits.BinTableHDU.from_columns([fits.Column(name="SPECTRUM", format="2A", array=np.array(c.spectra))],
                                            name="SPECTRA")
    text = json.dumps(meta, sort_keys=True)  # ASCII (JSON escapes the rest): the npz file's settings string
    settings = fits.BinTableHDU.from_columns(
        [fits.Column(name="JSON", format=f"{max(len(text), 1)}A", array=np.array([text]))], name="SETTINGS")
    hdus = [primary, bins, spectra, fits.ImageHDU(np.asarray(c.blocks, dtype=np.int16), name="BLOCKS"),
            fits.ImageHDU(np.asarray(c.matrix), name="COVARIANCE"), settings]
    if c.windows is not None:
        hdus.append(fits.ImageHDU(np.asarray(c.windows), name="WINDOWS"))
    with atomic_output(out, overwrite=overwrite, suffix=".fits") as tmp:
        fits.HDUList(hdus).writeto(tmp)
    return out


def _header_text(value) -> str:
    """One line of printable ASCII (non-ASCII characters escaped), at most 60 characters: a FITS card's value."""
    text = " ".join(str(value).splitlines()).encode("ascii", "backslashreplace").decode("ascii")
    return "".join(ch if " " <= ch <= "~" else "?" for ch in text)[:60]


def read_covariance(path) -> BandpowerCovariance:
    """Read a covariance file written by :func:`write_covariance` (``.npz`` or ``.fits``).

    Parameters
    ----------
    path : str or path-like
        The file.

    Returns
    -------
    BandpowerCovariance

    Raises
    ------
    InputFileError
        If the file is missing, unreadable or not a cmbtools covariance file.
    """
    p = check_input_file(path)
    try:
        if p.suffix.lower() == ".npz":
            with open(p, "rb") as fh, np.load(fh, allow_pickle=False) as z:
                meta = json.loads(str(z["settings"][()]))
                if meta.get("format") != _FORMAT:
                    raise InputFileError(p, "not a cmbtools covariance file")
                windows = z["windows"] if "windows" in z.files else None
                arrays = (z["ell_min"], z["ell_max"], z["ell_eff"], z["covariance"])
                spectra = tuple(str(x) for x in z["spectra"]) if "spectra" in z.files else ("TT",)
                blocks = np.array(z["blocks"]) if "blocks" in z.files else None
        else:
            from astropy.io import fits

            with fits.open(p, memmap=False) as hdul:
                if hdul[0].header.get("CMBFMT") != _FORMAT:
                    raise InputFileError(p, "not a cmbtools covariance file")
                t = hdul["BINS"].data
                arrays = (np.array(t["ELL_MIN"]), np.array(t["ELL_MAX"]), np.array(t["ELL_EFF"]),
                          np.array(hdul["COVARIANCE"].data, dtype=np.float64))
                windows = np.array(hdul["WINDOWS"].data, dtype=np.float64) if "WINDOWS" in hdul else None
                spectra = (tuple(str(x).strip() for x in hdul["SPECTRA"].data["SPECTRUM"]) if "SPECTRA" in hdul
                           else ("TT",))
                blocks = np.array(hdul["BLOCKS"].data) if "BLOCKS" in hdul else None
                if "SETTINGS" in hdul:  # the settings as the npz file holds them (JSON)
                    meta = json.loads(str(hdul["SETTINGS"].data["JSON"][0]))
                    if meta.get("format") != _FORMAT:
                        raise InputFileError(p, "not a cmbtools covariance file (its SETTINGS name another format)")
                else:  # a file written before the SETTINGS extension: its kind and count only
                    meta = {"kind": hdul[0].header["KIND"], "n_sims": int(hdul[0].header["NSIMS"])}
    except InputFileError:
        raise
    except Exception as exc:  # noqa: BLE001 - any decoding failure: not a readable covariance file
        raise InputFileError(p, f"cannot be read as a covariance file ({type(exc).__name__}: {exc})") from None
    settings = {k: v for k, v in meta.items() if k not in ("format", "software", "kind", "n_sims", "unit")}
    try:
        return BandpowerCovariance(*arrays, windows, kind=meta["kind"], n_sims=int(meta["n_sims"]), settings=settings,
                                   spectra=spectra, blocks=blocks)
    except (InvalidInputError, KeyError) as exc:
        raise InputFileError(p, f"is not a valid covariance file ({exc})") from None


def check_covariance_spectra(covariance, polarized, path) -> None:
    """Refuse a covariance of the other kind of map: the six spectra for temperature bandpowers, or TT alone
    for the bandpowers of I, Q, U maps (one line naming the file).

    Parameters
    ----------
    covariance : BandpowerCovariance
        As read from ``path``.
    polarized : bool
        Whether the bandpowers are the six spectra of I, Q, U maps.
    path : str or path-like
        The file, for the message.
    """
    wanted = _KNOWN_SPECTRA if polarized else ("TT",)
    if covariance.spectra != wanted:
        if polarized:
            raise InvalidInputError(f"{path}: the covariance is of temperature bandpowers (TT only), but MAP holds "
                                    "I, Q, U maps (six spectra); give the covariance of a polarized run "
                                    "(e.g. RUN_DIR/covariance.npz of `cmbtools validate --polarized`).")
        raise InvalidInputError(f"{path}: the covariance is of the six polarized spectra (TT, TE, TB, EE, EB, BB) "
                                "of I, Q, U maps, but MAP holds a temperature map; give the covariance of a "
                                "temperature run.")
