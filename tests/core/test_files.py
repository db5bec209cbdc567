"""Atomic outputs, input-file checks and content hashes (cmbtools._core.files)."""

from __future__ import annotations

import os

import numpy as np
import pytest

from cmbtools._core import files as _io
from cmbtools.exceptions import InputFileError, OutputExistsError, OutputPathError


def test_atomic_output_writes_and_leaves_no_temporary(tmp_path):
    target = tmp_path / "table.csv"
    with _io.atomic_output(target) as tmp:
        assert tmp.parent == tmp_path and tmp.suffix == ".csv"
        tmp.write_text("a,b\n1,2\n")
        assert not target.exists()  # nothing is visible before the rename
    assert target.read_text() == "a,b\n1,2\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["table.csv"]


def test_atomic_output_refuses_to_overwrite_without_flag(tmp_path):
    target = tmp_path / "out.txt"
    target.write_text("old")
    with pytest.raises(OutputExistsError, match="output exists"):
        with _io.atomic_output(target) as tmp:
            tmp.write_text("new")
    assert target.read_text() == "old"
    with _io.atomic_output(target, overwrite=True) as tmp:
        tmp.write_text("new")
    assert target.read_text() == "new"


def test_failure_inside_the_block_keeps_the_old_file(tmp_path):
    target = tmp_path / "out.txt"
    target.write_text("old")
    with pytest.raises(RuntimeError):
        with _io.atomic_output(target, overwrite=True) as tmp:
            tmp.write_text("half")
            raise RuntimeError("killed mid-write")
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["out.txt"]


def test_output_in_missing_or_readonly_directory(tmp_path):
    with pytest.raises(OutputPathError, match="does not exist"):
        _io.check_output_path(tmp_path / "nope" / "x.fits")
    with pytest.raises(OutputPathError, match="is a directory"):
        _io.check_output_path(tmp_path)



def test_output_in_unwritable_directory(tmp_path, monkeypatch):
    # CI runs as root, which ignores permission bits, so the permission test
    # answers "not writable" through os.access itself.
    real_access = os.access
    monkeypatch.setattr(os, "access", lambda p, mode: False if mode & os.W_OK else real_access(p, mode))
    with pytest.raises(OutputPathError, match="not writable"):
        _io.check_output_path(tmp_path / "x.fits")


def test_check_input_file(tmp_path):
    with pytest.raises(InputFileError, match="no such file"):
        _io.check_input_file(tmp_path / "missing.fits")
    with pytest.raises(InputFileError, match="is a directory"):
        _io.check_input_file(tmp_path)
    f = tmp_path / "ok.txt"
    f.write_text("x")
    assert _io.check_input_file(f) == f


def test_hashes_are_content_hashes(tmp_path):
    a = np.arange(10.0)
    # same content, different memory layout and byte order -> same hash
    assert _io.sha256_arrays(a) == _io.sha256_arrays(a[::-1][::-1].copy())
    assert _io.sha256_arrays(a) == _io.sha256_arrays(a.astype(">f8"))
    assert _io.sha256_arrays(a) != _io.sha256_arrays(a + 1e-12)
    assert _io.sha256_arrays(a, 3) != _io.sha256_arrays(a, 4)
    f = tmp_path / "f.bin"
    f.write_bytes(b"abc")
    # SHA-256("abc") from FIPS 180-2, appendix B.1
    assert _io.sha256_file(f) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"


def test_cache_dir_honours_environment(tmp_path, monkeypatch):
    monkeypatch.setenv("CMBTOOLS_CACHE_DIR", str(tmp_path / "c"))
    assert _io.cache_dir() == tmp_path / "c" and (tmp_path / "c").is_dir()
