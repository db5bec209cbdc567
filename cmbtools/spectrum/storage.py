"""Persistence of a spectrum estimator: one ``.npz`` file (no pickle) with its settings, matrices and checksum.

The file stores the mask(s), every setting, the precomputed matrices, the
estimator's cache key, the cmbtools version and a SHA-256 checksum of its
contents.  :func:`load_or_build` reuses a file built from the same inputs and
replaces a stale or corrupt one.
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np

from cmbtools._core import files as _io
from cmbtools._version import __version__
from cmbtools.exceptions import CacheError, CmbtoolsWarning
from cmbtools.spectrum.binning import Binning
from cmbtools.spectrum.settings import _FILE_FORMAT, EstimatorSettings, resolve_settings

#: The precomputed arrays of an estimator that the file holds (attribute ``_<name>``; absent when None).
_ARRAYS = ("f1", "f2", "f12", "pm11", "pm12", "pm22", "ainv11", "ainv12", "ainv22", "g11", "g12",
           "mask_cl11", "mask_cl12", "mask_cl22")


def save_estimator(estimator, path, *, overwrite=False) -> Path:
    """Write ``estimator`` to ``path`` (see :meth:`~cmbtools.spectrum.SpectrumEstimator.save`)."""
    inp = estimator._inputs
    arrays = {
        "mask1": inp.mask1,
        "ell_min": inp.binning.ell_min,
        "ell_max": inp.binning.ell_max,
        "beam1": inp.beam1,
        "beam2": inp.beam2,
        "pixel_window": inp.pixel_window,
        "transfer1": inp.transfer1,
        "transfer2": inp.transfer2,
    }
    if inp.mask2 is not None:
        arrays["mask2"] = inp.mask2
    for i, t in enumerate(inp.templates):
        arrays[f"template{i}"] = t
    if inp.guess_cl is not None:
        arrays["guess_cl"] = inp.guess_cl
    if inp.sky_factors is not None:
        arrays["sky_factor1"], arrays["sky_factor2"], arrays["sky_factor12"] = inp.sky_factors
    for name in _ARRAYS:
        v = getattr(estimator, "_" + name)
        if v is not None:
            arrays[name] = v
    settings = {
        "format": _FILE_FORMAT,
        "version": __version__,
        "cache_key": inp.cache_key,
        "nside": inp.nside,
        "lmax": inp.lmax,
        "weighting": inp.binning.weighting,
        "remove_monopole_dipole": inp.remove_monopole_dipole,
        "coupling": inp.coupling,
        "fast": None if inp.fast is None else [int(v) for v in inp.fast],
        "n_iter": inp.n_iter,
        "covariance": inp.covariance,
        "max_condition_number": inp.max_condition_number,
        "descriptions": inp.descriptions,
        "mask1_sha256": inp.mask1_sha256,
        "mask2_sha256": inp.mask2_sha256,
        "n_templates": len(inp.templates),
        "sky_lmax": inp.sky_lmax,
        "correct_deprojection_bias": bool(inp.correct_deprojection_bias),
        "averaged_pixels": bool(inp.averaged_pixels),
        "condition_number": float(estimator._condition_number),
        "f_sky": float(estimator._f_sky),
        "f_sky_eff": float(estimator._f_sky_eff),
        "f_sky_eff_cross": float(estimator._f_sky_eff_cross),
        "w2": float(estimator._w2),
    }
    text = json.dumps(settings, sort_keys=True)
    checksum = _checksum(arrays, text)
    out = _io.check_output_path(path, overwrite=overwrite)
    with _io.atomic_output(out, overwrite=overwrite, suffix=".npz") as tmp:
        with open(tmp, "wb") as fh:
            np.savez_compressed(
                fh, settings=np.array(text), checksum=np.array(checksum), **arrays
            )
    return out


def load_estimator(cls, path, *, nthreads=None):
    """Read an estimator of class ``cls`` written by :func:`save_estimator` (see :meth:`~cmbtools.spectrum.SpectrumEstimator.load`)."""
    p = _io.check_input_file(path)
    try:
        # open the file here: np.load leaves its own handle open when the zip is damaged
        with open(p, "rb") as fh, np.load(fh, allow_pickle=False) as z:
            data = {k: z[k] for k in z.files}
    except Exception as exc:  # noqa: BLE001 - any decoding failure means a corrupt file
        raise CacheError(f"{p}: cannot read the estimator file ({type(exc).__name__}: {exc}); it is corrupt") from None
    try:
        text = str(data.pop("settings")[()])
        checksum = str(data.pop("checksum")[()])
        settings = json.loads(text)
    except (KeyError, ValueError) as exc:
        raise CacheError(f"{p}: not a cmbtools estimator file ({exc})") from None
    if settings.get("format") != _FILE_FORMAT:
        raise CacheError(f"{p}: not a cmbtools estimator file (format {settings.get('format')!r})")
    if _checksum(data, text) != checksum:
        raise CacheError(f"{p}: checksum mismatch; the estimator file is corrupt")
    if settings["version"] != __version__:
        raise CacheError(
            f"{p}: written by cmbtools {settings['version']}, this is {__version__}; rebuild the estimator"
        )
    binning = Binning(data["ell_min"], data["ell_max"], settings["weighting"])
    for k in ("mask1", "mask2", "beam1", "beam2", "pixel_window", "transfer1", "transfer2", "guess_cl",
              "sky_factor1", "sky_factor2", "sky_factor12"):
        if k in data:
            data[k].setflags(write=False)
    try:
        templates = tuple(data[f"template{i}"] for i in range(int(settings.get("n_templates", 0))))
    except KeyError:
        raise CacheError(f"{p}: a template map is missing; the estimator file is corrupt") from None
    for t in templates:
        t.setflags(write=False)
    factors = None
    if "sky_factor1" in data:
        factors = (data["sky_factor1"], data["sky_factor2"], data["sky_factor12"])
    inp = EstimatorSettings(
        mask1=data["mask1"],
        mask2=data.get("mask2"),
        binning=binning,
        nside=int(settings["nside"]),
        lmax=int(settings["lmax"]),
        beam1=data["beam1"],
        beam2=data["beam2"],
        pixel_window=data["pixel_window"],
        transfer1=data["transfer1"],
        transfer2=data["transfer2"],
        remove_monopole_dipole=bool(settings["remove_monopole_dipole"]),
        coupling=settings["coupling"],
        fast=None if settings["fast"] is None else tuple(settings["fast"]),
        n_iter=int(settings["n_iter"]),
        covariance=bool(settings["covariance"]),
        max_condition_number=float(settings["max_condition_number"]),
        descriptions=dict(settings["descriptions"]),
        mask1_sha256=settings["mask1_sha256"],
        mask2_sha256=settings["mask2_sha256"],
        templates=templates,
        guess_cl=data.get("guess_cl"),
        sky_lmax=settings.get("sky_lmax"),
        correct_deprojection_bias=bool(settings.get("correct_deprojection_bias", True)),
        averaged_pixels=bool(settings.get("averaged_pixels", False)),
        sky_factors=factors,
    )
    if inp.cache_key != settings["cache_key"]:
        raise CacheError(f"{p}: the stored inputs do not match the stored key; the estimator file is corrupt")
    state = {"inputs": inp}
    for name in _ARRAYS:
        state[name] = data.get(name)
    for name in ("condition_number", "f_sky", "f_sky_eff", "f_sky_eff_cross", "w2"):
        state[name] = float(settings[name])
    obj = cls.__new__(cls)
    obj._set_state(state)
    object.__setattr__(obj, "_nthreads", nthreads)
    return obj


def load_or_build(cls, path, mask, binning, build, **kwargs):
    """See :meth:`~cmbtools.spectrum.SpectrumEstimator.load_or_build`; ``build()`` makes a new estimator."""
    p = Path(path)
    nthreads = kwargs.get("nthreads")
    if p.exists():
        if not _may_replace_as_cache(p):
            raise CacheError(
                f"{p}: is not an estimator cache (not a .npz archive) and is left alone; "
                "choose another cache path or delete the file"
            )
        key = resolve_settings(mask, binning, **kwargs).cache_key
        try:
            est = cls.load(p, nthreads=nthreads)
        except CacheError as exc:
            warnings.warn(f"{exc}; rebuilding it.", CmbtoolsWarning, stacklevel=3)
        else:
            if est.cache_key == key:
                return est
            warnings.warn(
                f"{p}: the cached estimator was built from other inputs (stale: key "
                f"{est.cache_key[:12]}..., expected {key[:12]}...); rebuilding it.",
                CmbtoolsWarning,
                stacklevel=3,
            )
    else:
        _io.check_output_path(p)
    est = build()
    est.save(p, overwrite=True)
    return est


def _may_replace_as_cache(p: Path) -> bool:
    """Whether an existing file may be replaced by a cache: an empty file or a zip archive (.npz), damaged or not."""
    try:
        with open(p, "rb") as fh:
            head = fh.read(2)
    except OSError:
        return True  # not a readable file: load() reports it
    return head in (b"", b"PK")


def _checksum(arrays: dict, text: str) -> str:
    keys = sorted(arrays)
    return _io.sha256_arrays(text, *[x for k in keys for x in (k, np.asarray(arrays[k]))])
