"""Shared by the tests that check commands and readers never modify their inputs."""

from __future__ import annotations

import os
import time

from cmbtools import cli
from cmbtools._core import files as _io


def fingerprint(path):
    """Bytes (as a hash), size, mode and modification time of a file."""
    st = os.stat(path)
    return (_io.sha256_file(path), st.st_size, st.st_mode, st.st_mtime_ns)


def run_on_inputs(argv, input_files, tmp_path, capsys):
    """Run ``cmbtools argv`` ({out} -> an empty output directory, {key} -> the input file of that key).

    Asserts that no input changed and that nothing appeared beside the inputs;
    returns (exit status, stderr, the output directory, the expanded argv).
    """
    out_dir = tmp_path / "outputs"
    out_dir.mkdir()
    names = {k: str(v) for k, v in input_files.items()}
    argv = [a.replace("{out}", str(out_dir)).format(**names) for a in argv]
    before = {k: fingerprint(p) for k, p in input_files.items()}
    time.sleep(0.01)  # a rewrite, even of identical bytes, would show in the modification time
    code = cli.main(argv)
    _, err = capsys.readouterr()
    assert {k: fingerprint(p) for k, p in input_files.items()} == before
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted([*(p.name for p in input_files.values()), "outputs"])
    return code, err, out_dir, argv
