"""Every kind of output survives a SIGKILL at any moment; the spectrum commands never modify their inputs.

A forked writer process writes one output over and over, each time a new
version, and is killed with SIGKILL, either at a random moment or a random
instant after its temporary file appeared (so that some kills land in the
middle of a write), for each writer kind:

* ``map``: ``maps.write_sky_map`` of an nside-256 map (6.3 MB);
* ``raw_output``: ``_io.atomic_output`` with a 32 MB file written in chunks;
* ``spectrum_table``: ``simulate.write_spectrum_table`` (the text spectrum table);
* ``bandpower_table``: ``Bandpowers.write_csv`` (the table of ``cmbtools spectrum``);
* ``figure``: ``Bandpowers.plot`` to PNG (matplotlib's savefig through atomic_output);
* ``estimator_cache``: ``SpectrumEstimator.save`` (the ``--operator-cache`` file);
* ``simulation_record``: the per-simulation ``sim_NNNNNN.npz`` of a Monte Carlo run;
* ``validation_summary``: ``ValidationResult.write_json`` (``summary.json``).

Afterwards the destination is absent (only if nothing was completed and there
was no old file), or holds the old file, or one complete version, checked with
the kind's own reader (checksums for the caches and records, every value for
the tables, the exact bytes for the figure); leftovers are hidden temporaries.

Then ``spectrum``, ``simulate`` and ``validate`` (the real process pool) are
run, successfully and not, on read-only input files whose bytes, size, mode
and modification time are compared before and after; only the requested
outputs appear.  A cache path that names a map is refused rather than
replaced, and a valid cache is reused without being rewritten.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import multiprocessing
import os
import signal
import time
from pathlib import Path

import numpy as np
import pytest
from matplotlib.image import imread

from _untouched import fingerprint, run_on_inputs
from cmbtools import maps
from cmbtools._core import files as _io
from cmbtools.simulate import run_directory as _run_directory
from cmbtools.simulate import ValidationResult
from cmbtools._core.checks import UNSEEN
from cmbtools.simulate import read_spectrum_table, write_spectrum_table
from cmbtools.spectrum import Bandpowers, Binning, SpectrumEstimator, read_beam, write_beam


# ---------------------------------------------------------------- the writer kinds

class Kind:
    """How to write version ``v`` of one output, and which version a file holds (None: not a complete one)."""

    suffix = ".bin"

    def write(self, target, version, overwrite=True):
        raise NotImplementedError

    def label(self, version):
        """What identifies version ``version`` in a file (the version itself unless versions share contents)."""
        return version

    def read_label(self, target):
        raise NotImplementedError


class SpectrumTable(Kind):
    suffix = ".csv"
    LMAX = 30000

    def cl(self, version):
        ell = np.arange(self.LMAX + 1)
        return np.where(ell >= 2, 1e-10 * (1.0 + version) / (ell + 10.0) ** 2, 0.0)

    def write(self, target, version, overwrite=True):
        write_spectrum_table(target, self.cl(version), overwrite=overwrite)

    def read_label(self, target):
        cl = read_spectrum_table(target)
        version = int(round(cl[2] * 144.0 / 1e-10 - 1.0))
        np.testing.assert_allclose(cl, self.cl(version), rtol=1e-10, atol=0)  # the 11 digits written
        return version


class BandpowerTable(Kind):
    suffix = ".csv"
    N_BINS = 8000

    def bandpowers(self, version):
        lo = 2 + 4 * np.arange(self.N_BINS)
        cl = 1e-12 * (1.0 + version) * np.ones(self.N_BINS) + 1e-20 * np.arange(self.N_BINS)
        return Bandpowers(ell_min=lo, ell_max=lo + 3, ell_eff=lo + 1.5, cl=cl, cl_err=0.1 * cl, dl=cl, dl_err=cl,
                          metadata={"spectrum": "auto", "version_written": version})

    def write(self, target, version, overwrite=True):
        self.bandpowers(version).write_csv(target, overwrite=overwrite)

    def read_label(self, target):
        got = Bandpowers.read_csv(target)
        version = int(got.metadata["version_written"])
        want = self.bandpowers(version)
        assert got.n_bins == self.N_BINS
        np.testing.assert_allclose(got.cl, want.cl, rtol=1e-15, atol=0)
        np.testing.assert_array_equal(got.ell_max, want.ell_max)
        return version


class Figure(Kind):
    suffix = ".png"

    def __init__(self):
        self._hashes = {}
        self.scratch = None  # where the reference drawings go (the test's tmp_path)

    def bandpowers(self, version):
        lo = 2 + 20 * np.arange(12)
        cl = 1e-10 * (1.0 + 0.05 * version) / (lo + 10.0)
        return Bandpowers(ell_min=lo, ell_max=lo + 19, ell_eff=lo + 9.5, cl=cl, cl_err=0.1 * cl,
                          dl=cl * lo * (lo + 1) / (2 * np.pi), dl_err=0.1 * cl * lo * (lo + 1) / (2 * np.pi),
                          metadata={"spectrum": "auto", "lmax": 241})

    def write(self, target, version, overwrite=True):
        self.bandpowers(version).plot(target, overwrite=overwrite, title=f"version {version}")

    def label(self, version):
        # the PNG bytes of a version are the same every time it is drawn: compare hashes
        if version not in self._hashes:
            probe = Path(self.scratch, f"figure_probe_{version}.png")
            self.write(probe, version)
            self._hashes[version] = hashlib.sha256(probe.read_bytes()).hexdigest()
            probe.unlink()
        return self._hashes[version]

    def read_label(self, target):
        data = target.read_bytes()
        assert data.startswith(b"\x89PNG\r\n\x1a\n") and data[-12:-8] == b"\x00\x00\x00\x00" and data[-8:-4] == b"IEND"
        image = imread(target)
        assert image.ndim == 3 and image.shape[0] > 100 and image.shape[1] > 100
        return hashlib.sha256(data).hexdigest()


class EstimatorCache(Kind):
    """Versions alternate between two estimators (building one per version would take too long)."""

    suffix = ".npz"

    def __init__(self):
        nside = 128
        binning = Binning.uniform(2, 3 * nside - 1, 8)
        self.estimators = [
            SpectrumEstimator(maps.cap_mask(nside, lon, 30.0, radius), binning, nthreads=2)
            for lon, radius in ((0.0, 60.0), (120.0, 75.0), (240.0, 50.0))
        ]

    def write(self, target, version, overwrite=True):
        self.estimators[version % 2 if version < 200 else 2].save(target, overwrite=overwrite)

    def label(self, version):
        return self.estimators[version % 2 if version < 200 else 2].cache_key

    def read_label(self, target):
        est = SpectrumEstimator.load(target)  # checks the checksum and the key
        return est.cache_key


class SimulationRecord(Kind):
    suffix = ".npz"
    SIZE = 400_000
    HASH = "0" * 64

    def arrays(self, version):
        return {"x": np.full(self.SIZE, float(version)) + np.arange(self.SIZE) * 1e-9, "index": np.int64(7)}

    def write(self, target, version, overwrite=True):
        assert target.name == "sim_000007.npz"
        # as the engine stores a result: cleaned (arrays only), then written by the parent process
        _run_directory._write_record(target.parent, 7, _run_directory._clean_result(self.arrays(version), 7), self.HASH)

    def read_label(self, target):
        data, problem = _run_directory._read_record(target, 7, self.HASH)
        assert problem is None, problem
        version = int(round(data["x"][0]))
        np.testing.assert_array_equal(data["x"], self.arrays(version)["x"])
        return version


class ValidationSummary(Kind):
    suffix = ".json"
    N_BINS = 1000

    def __init__(self):
        rng = np.random.default_rng(5)
        samples = rng.normal(1.0, 0.1, (3, self.N_BINS)) * 1e-12
        lo = 2 + 2 * np.arange(self.N_BINS)
        self.base = ValidationResult.from_samples(samples, np.full_like(samples, 1e-13), np.full(self.N_BINS, 1e-12),
                                                  ell_min=lo, ell_max=lo + 1, ell_eff=lo + 0.5)

    def write(self, target, version, overwrite=True):
        dataclasses.replace(self.base, seed=version).write_json(target, overwrite=overwrite)

    def read_label(self, target):
        doc = json.loads(target.read_text())
        assert len(doc["bins"]["ell_min"]) == self.N_BINS and doc["unit"] == "K^2"
        return int(doc["seed"])


BIG_NSIDE = 256  # 786 432 pixels of 8 bytes: a 6.3 MB file, tens of milliseconds to write
CHUNK = 1 << 20
N_CHUNKS = 32


class Map(Kind):
    """``maps.write_sky_map`` of an nside-256 map: every pixel tells which version it belongs to."""

    suffix = ".fits"

    def pixels(self, version):
        return np.full(12 * BIG_NSIDE**2, float(version)) + np.arange(12 * BIG_NSIDE**2) * 1e-9

    def write(self, target, version, overwrite=True):
        maps.write_sky_map(target, self.pixels(version), overwrite=overwrite)

    def read_label(self, target):
        m, _ = maps.read_sky_map(target)
        version = int(round(m[0]))
        np.testing.assert_array_equal(m, self.pixels(version))
        return version


class RawOutput(Kind):
    """``_io.atomic_output`` with a 32 MB file written in 1 MB chunks."""

    suffix = ".bin"

    @staticmethod
    def chunk(version, k):
        return bytes([(version * 31 + k) % 251]) * CHUNK

    def write(self, target, version, overwrite=True):
        with _io.atomic_output(target, overwrite=overwrite) as tmp:
            with open(tmp, "wb") as fh:
                for k in range(N_CHUNKS):
                    fh.write(self.chunk(version, k))
                    fh.flush()

    def read_label(self, target):
        data = target.read_bytes()
        assert len(data) == CHUNK * N_CHUNKS, f"a partial file of {len(data)} bytes is visible as the target"
        version = next(v for v in range(251) if data[0] == self.chunk(v, 0)[0] and data[CHUNK] == self.chunk(v, 1)[0])
        digest = hashlib.sha256(b"".join(self.chunk(version, k) for k in range(N_CHUNKS))).hexdigest()
        assert hashlib.sha256(data).hexdigest() == digest, "the target holds bytes that no version wrote"
        return version


KINDS = {
    "map": Map,
    "raw_output": RawOutput,
    "spectrum_table": SpectrumTable,
    "bandpower_table": BandpowerTable,
    "figure": Figure,
    "estimator_cache": EstimatorCache,
    "simulation_record": SimulationRecord,
    "validation_summary": ValidationSummary,
}


# ---------------------------------------------------------------- the kill test

def _writer(kind, target, first_version, progress):
    """Child process: write versions first_version, first_version+1, ... to ``target`` until killed."""
    version = first_version
    progress.value = -1  # ready, nothing written yet
    while True:
        kind.write(target, version)
        progress.value = version  # this version is complete and in place
        version += 1


def _temporaries(directory, name):
    return [p for p in directory.iterdir() if p.name.startswith(f".{name}.") and ".tmp" in p.name]


def _leftovers_are_hidden(directory, name):
    """Everything but the target is a hidden temporary of it (or of its writability probe)."""
    stray = [p.name for p in directory.iterdir()
             if p.name != name and not (p.name.startswith(f".{name}.") and (".tmp" in p.name or p.name.endswith(".probe")))]
    assert not stray, stray
    return [p for p in directory.iterdir() if p.name != name]


@pytest.mark.parametrize("kind_name", sorted(KINDS))
def test_sigkill_at_random_moments_leaves_old_or_complete_outputs(tmp_path, kind_name):
    kind = KINDS[kind_name]()
    kind.scratch = tmp_path
    ctx = multiprocessing.get_context("fork")  # the child inherits the imported modules and built objects
    rng = np.random.default_rng(20261203 + len(kind_name))
    probe = tmp_path / ("sim_000007.npz" if kind_name == "simulation_record" else f"probe{kind.suffix}")
    for _ in range(2):  # the second write is timed: the first one also warms up imports and caches
        t0 = time.perf_counter()
        kind.write(probe, 0)
        one_write = time.perf_counter() - t0
    probe.unlink()

    killed_mid_write = 0
    outcomes = []
    # at least 6 trials, more (up to 60) until two kills have hit a write in progress: on a loaded machine a
    # write of a small table can finish between two polls, and the kill then lands between writes
    for trial in range(60):
        if trial >= 6 and killed_mid_write >= 2:
            break
        d = tmp_path / f"trial{trial}"
        d.mkdir()
        target = d / ("sim_000007.npz" if kind_name == "simulation_record" else f"result{kind.suffix}")
        old_version = None
        if trial % 3 == 1:  # some trials start with an old file in place
            old_version = 200 + trial
            kind.write(target, old_version, overwrite=False)
        progress = ctx.Value("i", -2)
        first = 10 * trial + 1
        child = ctx.Process(target=_writer, args=(kind, target, first, progress), daemon=True)
        child.start()
        deadline = time.monotonic() + 60
        while progress.value == -2 and time.monotonic() < deadline:
            time.sleep(0.0005)
        assert progress.value == -1, "the writer did not start"
        if trial % 2 == 0:  # at a random moment of the next few writes
            time.sleep(float(rng.uniform(0.0, 2.5 * one_write)))
        else:  # a random instant after the temporary file of a write appeared
            skip = int(rng.integers(0, 2))
            seen = 0
            while time.monotonic() < deadline:
                if _temporaries(d, target.name):
                    if seen == skip:
                        break
                    seen += 1
                    while _temporaries(d, target.name) and time.monotonic() < deadline:
                        time.sleep(0.0002)
                time.sleep(0.0001)
            time.sleep(float(rng.uniform(0.0, 0.002)))
        os.kill(child.pid, signal.SIGKILL)
        child.join(timeout=30)
        assert child.exitcode == -signal.SIGKILL
        last_done = progress.value

        others = _leftovers_are_hidden(d, target.name)
        killed_mid_write += any(".tmp" in p.name for p in others)
        if not target.exists():
            # only possible if nothing had been completed and there was no old file
            assert old_version is None and last_done == -1, (old_version, last_done)
            outcomes.append("absent")
            continue
        label = kind.read_label(target)
        # the last version the writer reported complete, or the next one if the kill came between
        # its rename and the report; before any report, the old file or the first version
        allowed = {old_version, first} if last_done == -1 else {last_done, last_done + 1}
        allowed_labels = {kind.label(v) for v in allowed if v is not None}
        assert label in allowed_labels, (label, allowed, outcomes)
        outcomes.append("old" if old_version is not None and label == kind.label(old_version) else "new")
    # the test is only meaningful if some kills hit a write in progress
    assert killed_mid_write >= 2, (killed_mid_write, outcomes)


def test_a_record_left_by_a_killed_writer_is_not_read_as_a_simulation(tmp_path):
    # a temporary record (what a kill mid-write leaves) is deleted by the next run and never resumed from
    kind = SimulationRecord()
    run_dir = tmp_path / "run"
    run_dir.mkdir()
    kind.write(run_dir / "sim_000007.npz", 3)
    leftover = run_dir / ".sim_000008.npz.abc123.tmp.npz"
    leftover.write_bytes((run_dir / "sim_000007.npz").read_bytes()[:1000])
    assert sorted(_run_directory._existing_records(run_dir)) == [7]
    _run_directory._remove_leftover_temporaries(run_dir)
    assert not leftover.exists() and (run_dir / "sim_000007.npz").exists()


# ---------------------------------------------------------------- inputs are never modified

NSIDE = 16


@pytest.fixture
def input_files(tmp_path):
    rng = np.random.default_rng(8)
    npix = 12 * NSIDE**2
    w = maps.cap_mask(NSIDE, 30.0, 20.0, 70.0)
    m = rng.normal(0.0, 1e-4, npix)
    m[np.flatnonzero(w == 0)[:6]] = UNSEEN  # missing pixels outside the mask
    ell = np.arange(3 * NSIDE)
    f = {
        "map": maps.write_sky_map(tmp_path / "map.fits", m, unit="uK_CMB", nested=True),
        "map2": maps.write_sky_map(tmp_path / "map2.fits", rng.normal(0.0, 1e-4, npix)),
        "mask": maps.write_mask(tmp_path / "mask.fits", w),
        "mask2": maps.write_mask(tmp_path / "mask2.fits", maps.cap_mask(NSIDE, 60.0, 10.0, 80.0)),
        "hits": maps.write_sky_map(tmp_path / "hits.fits", rng.integers(1, 9, npix).astype(float), unit=None),
        "beam": write_beam(tmp_path / "beam.csv", np.exp(-ell * (ell + 1) * 1e-4)),
        "theory": tmp_path / "theory.csv",
        "noise": tmp_path / "noise.csv",
        "edges": tmp_path / "edges.txt",
        "bad": tmp_path / "bad.fits",
    }
    write_spectrum_table(f["theory"], np.where(np.arange(200) >= 2, 1e-10 / (np.arange(200) + 10.0), 0.0))
    f["noise"].write_text("ell,nl\n" + "".join(f"{l},1e-16\n" for l in range(3 * NSIDE)))
    f["edges"].write_text("2 10 20 30 47\n")
    f["bad"].write_bytes(f["map2"].read_bytes()[:4000])
    for p in f.values():
        os.chmod(p, 0o444)  # read-only, as shared input data often are
    return f


@pytest.mark.parametrize(
    "argv, expect, made",
    [
        (["spectrum", "{map}", "--mask", "{mask}", "--beam", "{beam}", "--noise-spectrum", "{noise}", "--theory",
          "{theory}", "--bin-edges", "{edges}", "--operator-cache", "{out}/cache.npz", "-o", "{out}/table.csv",
          "--fits", "{out}/table.fits", "--figure", "{out}/spectrum.png"], 0, None),
        (["spectrum", "{map}", "{map2}", "--mask", "{mask}", "--mask2", "{mask2}", "--beam2", "{beam}",
          "-o", "{out}/cross.csv"], 0, None),
        (["spectrum", "{map}", "--mask", "{mask}", "--operator-cache", "{map}", "-o", "{out}/t.csv"], 2, None),
        (["spectrum", "{map}", "--mask", "{mask}", "-o", "{map}"], 2, None),
        (["spectrum", "{bad}", "--mask", "{mask}", "-o", "{out}/t.csv"], 2, None),
        (["spectrum", "{map}", "--mask", "{mask}", "--theory", "{noise}", "-o", "{out}/t.csv"], 2, None),
        (["simulate", "--nside", "16", "--spectrum", "{theory}", "--beam", "{beam}", "--noise-depth", "30",
          "--hits", "{hits}", "--seed", "2", "--sims", "2", "--output-dir", "{out}/sims",
          "--write-spectrum", "{out}/cl.csv"], 0, ["sims", "cl.csv"]),
        (["simulate", "--nside", "16", "--spectrum", "{theory}", "--write-spectrum", "{theory}",
          "--output-dir", "{out}/sims"], 2, None),
        (["simulate", "--nside", "16", "--spectrum", "{theory}", "--hits", "{bad}", "--noise-depth", "30",
          "--output-dir", "{out}/sims"], 2, None),
        (["validate", "{mask}", "--beam", "{beam}", "--spectrum", "{theory}", "--noise-depth", "30", "--hits",
          "{hits}", "--sims", "2", "--workers", "1", "--seed", "1", "--no-progress", "--run-dir", "{out}/run"],
         0, ["run"]),
        (["validate", "{mask}", "--sims", "2", "--no-progress", "--table", "{mask}", "--run-dir", "{out}/run"], 2, None),
        (["validate", "{bad}", "--sims", "2", "--no-progress", "--run-dir", "{out}/run"], 2, None),
    ],
)
def test_spectrum_commands_never_modify_their_inputs(input_files, tmp_path, capsys, monkeypatch, argv, expect, made):
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "1")
    # inputs unchanged and nothing beside them; a failed run writes no file at all (it may have created
    # the output directory it was given)
    code, err, out_dir, argv = run_on_inputs(argv, input_files, tmp_path, capsys)
    assert code == expect, err
    if code != 0:
        assert [str(p) for p in out_dir.rglob("*") if not p.is_dir()] == []
    else:
        if made is None:  # the outputs named on the command line
            made = [Path(a).name for a in argv if a.startswith(str(out_dir))]
        assert sorted(p.name for p in out_dir.iterdir()) == sorted(made)


def test_table_readers_and_caches_never_modify_their_inputs(input_files, tmp_path):
    mask = maps.read_mask(input_files["mask"])
    cache = SpectrumEstimator(mask, Binning.uniform(2, 47, 16), nthreads=1).save(tmp_path / "cache.npz")
    bp_path = SpectrumEstimator.load(cache).estimate(maps.read_sky_map(input_files["map2"])[0]).write_csv(tmp_path / "bp.csv")
    files = {**input_files, "cache": cache, "bp": bp_path}
    for p in (cache, bp_path):
        os.chmod(p, 0o444)
    before = {k: fingerprint(p) for k, p in files.items()}
    time.sleep(0.01)
    read_spectrum_table(files["theory"])
    read_beam(files["beam"])
    Bandpowers.read_csv(files["bp"])
    SpectrumEstimator.load(files["cache"])
    # a cache built from these inputs is reused as it is: not rewritten
    est = SpectrumEstimator.load_or_build(files["cache"], mask, Binning.uniform(2, 47, 16), nthreads=1)
    assert est.cache_key == SpectrumEstimator.load(files["cache"]).cache_key
    assert {k: fingerprint(p) for k, p in files.items()} == before
