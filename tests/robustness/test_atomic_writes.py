"""Failed writes leave nothing behind; inputs are never modified.

The SIGKILL tests of every writer (maps, raw outputs, tables, figures,
caches, Monte Carlo records) are in test_atomic_writes_more.py.  Here: a
writer that fails leaves nothing behind, new outputs get the mode the umask
gives (an overwritten one keeps its mode), and every finished subcommand
(``mask``, ``inspect``, ``physics``) and every reader is run on input files
whose bytes, size, mode and modification time are recorded before and
compared after, whether the run succeeds or fails; the public map functions
are checked not to change the arrays they are given.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest

from _untouched import fingerprint, run_on_inputs
from cmbtools import maps, physics
from cmbtools._core import files as _io
from cmbtools._core.checks import UNSEEN


def test_a_failing_writer_leaves_nothing_behind(tmp_path):
    # an exception inside the block (not a kill) removes the temporary and keeps the old file
    target = maps.write_sky_map(tmp_path / "m.fits", np.arange(12 * 16**2, dtype=float))
    before = target.read_bytes()
    with pytest.raises(ZeroDivisionError):
        with _io.atomic_output(target, overwrite=True) as tmp:
            tmp.write_bytes(b"partial")
            raise ZeroDivisionError("simulated failure")
    assert target.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["m.fits"]


# ---------------------------------------------------------------- inputs are never modified

@pytest.fixture
def input_files(tmp_path):
    rng = np.random.default_rng(3)
    m = rng.normal(0.0, 1e-4, 12 * 16**2)
    m[:20] = UNSEEN
    f = {
        "map": maps.write_sky_map(tmp_path / "map.fits", m, unit="uK_CMB", nested=True),
        "hits": maps.write_sky_map(tmp_path / "hits.fits", rng.integers(0, 9, 12 * 16**2).astype(float), unit=None),
        "mask": maps.write_mask(tmp_path / "mask.fits", maps.cap_mask(16, 30.0, -20.0, 60.0)),
        "mask8": maps.write_mask(tmp_path / "mask8.fits", maps.cap_mask(8, 30.0, -20.0, 60.0)),
        "holes": tmp_path / "holes.csv",
        "band": tmp_path / "band.csv",
        "bad": tmp_path / "bad.fits",
    }
    f["holes"].write_text("name,lon_deg,lat_deg,radius_deg\nA,30,-20,4\nB,50,0,\n")
    f["band"].write_text("frequency_ghz,transmission\n130,0.1\n145,1\n160,0.1\n")
    f["bad"].write_bytes(f["map"].read_bytes()[:5000])
    for p in f.values():
        os.chmod(p, 0o444)  # read-only, as shared input data often are
    return f


@pytest.mark.parametrize(
    "argv, expect",
    [
        (["mask", "--info", "{mask}"], 0),
        (["mask", "--from-mask", "{mask}", "--holes", "{holes}", "--hole-radius", "2", "--apodize", "cosine",
          "--apodize-width", "5", "-o", "{out}/new.fits"], 0),
        (["mask", "--from-map", "{hits}", "--threshold", "4", "--from-mask", "{mask}", "-o", "{out}/t.fits"], 0),
        (["mask", "--from-mask", "{mask8}", "--nside", "16", "-o", "{out}/up.fits"], 0),
        (["mask", "--from-mask", "{mask}", "-o", "{mask}"], 2),  # refuses to overwrite its own input
        (["mask", "--from-mask", "{bad}", "-o", "{out}/x.fits"], 2),
        (["inspect", "{map}", "--mask", "{mask}", "--figure", "{out}/view.png"], 0),
        (["inspect", "{map}", "--figure", "{map}"], 2),  # refuses to draw over the map
        (["inspect", "{map}", "--mask", "{mask8}"], 2),
        (["inspect", "{bad}"], 2),
        (["physics", "--json"], 0),
    ],
)
def test_commands_never_modify_their_inputs(input_files, tmp_path, capsys, argv, expect):
    # inputs unchanged, nothing beside them, and only the requested outputs among the outputs
    code, err, out_dir, argv = run_on_inputs(argv, input_files, tmp_path, capsys)
    assert code == expect, err
    written = sorted(p.name for p in out_dir.iterdir())
    wanted = sorted(Path(a).name for a in argv if a.startswith(str(out_dir)))
    assert written == (wanted if code == 0 else [])


def test_readers_never_modify_their_inputs(input_files):
    before = {k: fingerprint(p) for k, p in input_files.items()}
    maps.read_sky_map(input_files["map"])
    maps.read_mask(input_files["mask"])
    maps.read_positions_csv(input_files["holes"])
    physics.read_bandpass(input_files["band"])
    with pytest.raises(Exception):
        maps.read_sky_map(input_files["bad"])
    assert {k: fingerprint(p) for k, p in input_files.items()} == before


@pytest.mark.parametrize(
    "call",
    [
        lambda m, w: maps.fit_monopole_dipole(m, w),
        lambda m, w: maps.remove_monopole_dipole(m, w),
        lambda m, w: maps.change_resolution(m, 8),
        lambda m, w: maps.change_mask_resolution(w, 32),
        lambda m, w: maps.smooth_map(m, fwhm_arcmin=120.0, fill_missing="mean", nthreads=1),
        lambda m, w: maps.rotate_mask(w, "G", "C"),
        lambda m, w: maps.apodize_mask(w, 10.0),
        lambda m, w: maps.apodize_mask(w, 10.0, taper="gaussian", nthreads=1),
        lambda m, w: maps.combine_masks(w, w),
        lambda m, w: maps.mask_moments(w),
        lambda m, w: maps.threshold_mask(m, 0.0),
    ],
)
def test_map_functions_never_modify_the_arrays_they_are_given(call):
    rng = np.random.default_rng(11)
    m = rng.normal(0.0, 1e-4, 12 * 16**2)
    m[:15] = UNSEEN
    m[15:20] = np.nan
    w = maps.cap_mask(16, 0.0, 45.0, 70.0)
    m_before, w_before = m.copy(), w.copy()
    call(m, w)
    np.testing.assert_array_equal(m, m_before)
    np.testing.assert_array_equal(w, w_before)


def test_writers_never_modify_the_arrays_they_are_given(tmp_path):
    m = np.random.default_rng(5).normal(0.0, 1e-4, 768)
    m[:4] = [np.nan, np.inf, -np.inf, UNSEEN]
    before = m.copy()
    maps.write_sky_map(tmp_path / "a.fits", m, unit="uK_CMB", nested=True, dtype="float32")
    maps.write_sky_map(tmp_path / "b.fits", m, observed_only=True)
    np.testing.assert_array_equal(m, before)


@pytest.mark.parametrize("umask", [0o022, 0o077, 0o002])
def test_new_outputs_get_the_mode_the_umask_gives(tmp_path, umask):
    # common practice: a newly created file gets 0666 less the umask (POSIX open(2) with O_CREAT)
    old = os.umask(umask)
    try:
        target = tmp_path / "new.csv"
        with _io.atomic_output(target) as tmp:
            tmp.write_text("a,b\n1,2\n")
        assert (target.stat().st_mode & 0o777) == (0o666 & ~umask)
    finally:
        os.umask(old)


def test_overwritten_outputs_keep_their_mode(tmp_path):
    target = tmp_path / "old.csv"
    target.write_text("old\n")
    os.chmod(target, 0o640)
    with _io.atomic_output(target, overwrite=True) as tmp:
        tmp.write_text("new\n")
    assert target.read_text() == "new\n"
    assert (target.stat().st_mode & 0o777) == 0o640
