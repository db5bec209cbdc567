"""Outputs survive a SIGKILL at any moment; inputs are never modified.

A writer process is killed with SIGKILL at random moments while it writes a
large output over and over (``maps.write_map`` of an nside-256 map, 6.3 MB,
and ``_io.atomic_output`` with a 32 MB file written in chunks).  Afterwards
the destination is absent (nothing was ever completed), or holds the old
file, or one complete version; a file that reads back partially is a
failure.  A killed writer may leave its temporary file behind, but only under
a hidden name that starts with ``.<name>.`` and ends in ``.tmp<suffix>``,
never under the destination's name.

Every finished subcommand (``mask``, ``inspect``, ``physics``) and every
reader is then run on input files whose bytes, size, mode and modification
time are recorded before and compared after, whether the run succeeds or
fails; the public map functions are checked not to change the arrays they
are given.
"""

from __future__ import annotations

import hashlib
import multiprocessing
import os
import signal
import time
from pathlib import Path

import numpy as np
import pytest

from cmbtools import _io, cli, maps, physics
from cmbtools._validation import UNSEEN

BIG_NSIDE = 256  # 786 432 pixels of 8 bytes: a 6.3 MB file, tens of milliseconds to write
CHUNK = 1 << 20
N_CHUNKS = 32


def big_map(version):
    """Version ``version`` of the large map: every pixel tells which version it belongs to."""
    return np.full(12 * BIG_NSIDE**2, float(version)) + np.arange(12 * BIG_NSIDE**2) * 1e-9


def chunk_bytes(version, k):
    return bytes([(version * 31 + k) % 251]) * CHUNK


def expected_blob_sha(version):
    h = hashlib.sha256()
    for k in range(N_CHUNKS):
        h.update(chunk_bytes(version, k))
    return h.hexdigest()


def _writer(kind, target, first_version, progress):
    """Child process: write versions first_version, first_version+1, ... to ``target`` until killed."""
    version = first_version
    progress.value = -1  # ready, nothing written yet
    while True:
        if kind == "write_map":
            maps.write_map(target, big_map(version), overwrite=True)
        else:
            with _io.atomic_output(target, overwrite=True) as tmp:
                with open(tmp, "wb") as fh:
                    for k in range(N_CHUNKS):
                        fh.write(chunk_bytes(version, k))
                        fh.flush()
        progress.value = version  # this version is complete and in place
        version += 1


def version_in_file(kind, target):
    """Which complete version the file holds; fails if it is not one complete version."""
    if kind == "write_map":
        m, info = maps.read_map(target)
        version = int(round(m[0]))
        np.testing.assert_array_equal(m, big_map(version))
        return version
    data = target.read_bytes()
    assert len(data) == CHUNK * N_CHUNKS, f"a partial file of {len(data)} bytes is visible as the target"
    for version in range(0, 251):
        if data[0] == chunk_bytes(version, 0)[0] and hashlib.sha256(data).hexdigest() == expected_blob_sha(version):
            return version
    raise AssertionError("the target holds bytes that no version wrote")


def leftovers_are_hidden(directory, name, suffix):
    """Everything but the target is a hidden temporary of it (or of its writability probe)."""
    stray = []
    for p in directory.iterdir():
        if p.name == name:
            continue
        if p.name.startswith(f".{name}.") and (p.name.endswith(f".tmp{suffix}") or p.name.endswith(".probe")):
            continue
        stray.append(p.name)
    assert not stray, stray
    return [p for p in directory.iterdir() if p.name != name]


@pytest.mark.parametrize("kind", ["write_map", "atomic_output"])
def test_sigkill_at_random_moments_leaves_old_or_complete_files(tmp_path, kind):
    ctx = multiprocessing.get_context("fork")  # the child inherits the imported modules: no start-up cost
    rng = np.random.default_rng(20261202 + len(kind))
    suffix = ".fits" if kind == "write_map" else ".bin"
    # how long one write takes here, to spread the kills over several writes
    probe = tmp_path / f"probe{suffix}"
    for _ in range(2):  # the second write is timed: the first one also warms up imports and caches
        t0 = time.perf_counter()
        if kind == "write_map":
            maps.write_map(probe, big_map(0), overwrite=True)
        else:
            with _io.atomic_output(probe, overwrite=True) as tmp:
                tmp.write_bytes(b"".join(chunk_bytes(0, k) for k in range(N_CHUNKS)))
        one_write = time.perf_counter() - t0
    probe.unlink()

    killed_mid_write = 0
    outcomes = []
    for trial in range(8):
        d = tmp_path / f"trial{trial}"
        d.mkdir()
        target = d / f"result{suffix}"
        old_version = None
        if trial % 2 == 1:  # half of the trials start with an old file in place
            old_version = 200 + trial  # versions stay below 251, where the chunk patterns repeat
            if kind == "write_map":
                maps.write_map(target, big_map(old_version))
            else:
                with _io.atomic_output(target) as tmp:
                    tmp.write_bytes(b"".join(chunk_bytes(old_version, k) for k in range(N_CHUNKS)))
        progress = ctx.Value("i", -2)
        child = ctx.Process(target=_writer, args=(kind, target, 10 * trial + 1, progress), daemon=True)
        child.start()
        deadline = time.monotonic() + 60
        while progress.value == -2 and time.monotonic() < deadline:
            time.sleep(0.001)
        assert progress.value == -1, "the writer did not start"
        time.sleep(float(rng.uniform(0.0, 3.0 * one_write)))
        os.kill(child.pid, signal.SIGKILL)
        child.join(timeout=30)
        assert child.exitcode == -signal.SIGKILL
        last_done = progress.value

        others = leftovers_are_hidden(d, target.name, suffix)
        killed_mid_write += bool(others)
        if not target.exists():
            # only possible if nothing had been completed and there was no old file
            assert old_version is None and last_done == -1
            outcomes.append("absent")
            continue
        version = version_in_file(kind, target)
        # the last version the writer reported complete, or the next one if the kill came between
        # its rename and the report; before any report, the old file or the first version
        first = 10 * trial + 1
        allowed = {old_version, first} if last_done == -1 else {last_done, last_done + 1}
        assert version in allowed, (version, allowed)
        outcomes.append("old" if version == old_version else "new")
        # the hidden leftovers never replace the target when it is read again
        assert version_in_file(kind, target) == version
    # the test is only meaningful if some kills hit a write in progress
    assert killed_mid_write >= 2, (killed_mid_write, outcomes)


def test_a_failing_writer_leaves_nothing_behind(tmp_path):
    # an exception inside the block (not a kill) removes the temporary and keeps the old file
    target = maps.write_map(tmp_path / "m.fits", big_map(1)[:768 * 4])
    before = target.read_bytes()
    with pytest.raises(ZeroDivisionError):
        with _io.atomic_output(target, overwrite=True) as tmp:
            tmp.write_bytes(b"partial")
            raise ZeroDivisionError("simulated failure")
    assert target.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["m.fits"]


# ---------------------------------------------------------------- inputs are never modified

def fingerprint(path):
    st = os.stat(path)
    return (_io.sha256_file(path), st.st_size, st.st_mode, st.st_mtime_ns)


@pytest.fixture
def input_files(tmp_path):
    rng = np.random.default_rng(3)
    m = rng.normal(0.0, 1e-4, 12 * 16**2)
    m[:20] = UNSEEN
    f = {
        "map": maps.write_map(tmp_path / "map.fits", m, unit="uK_CMB", nest=True),
        "hits": maps.write_map(tmp_path / "hits.fits", rng.integers(0, 9, 12 * 16**2).astype(float), unit=None),
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
    out_dir = tmp_path / "outputs"
    out_dir.mkdir()
    names = {k: str(v) for k, v in input_files.items()}
    argv = [a.replace("{out}", str(out_dir)).format(**names) for a in argv]
    before = {k: fingerprint(p) for k, p in input_files.items()}
    time.sleep(0.01)  # a rewrite, even of identical bytes, would show in the modification time
    code = cli.main(argv)
    _, err = capsys.readouterr()
    assert code == expect, err
    assert {k: fingerprint(p) for k, p in input_files.items()} == before
    # nothing but the requested outputs appears, next to the inputs or among the outputs
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted([*(p.name for p in input_files.values()), "outputs"])
    written = sorted(p.name for p in out_dir.iterdir())
    wanted = sorted(Path(a).name for a in argv if a.startswith(str(out_dir)))
    assert written == (wanted if code == 0 else [])


def test_readers_never_modify_their_inputs(input_files):
    before = {k: fingerprint(p) for k, p in input_files.items()}
    maps.read_map(input_files["map"])
    maps.read_mask(input_files["mask"])
    maps.read_positions_csv(input_files["holes"])
    physics.read_bandpass(input_files["band"])
    with pytest.raises(Exception):
        maps.read_map(input_files["bad"])
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
    maps.write_map(tmp_path / "a.fits", m, unit="uK_CMB", nest=True, dtype="float32")
    maps.write_map(tmp_path / "b.fits", m, partial=True)
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
