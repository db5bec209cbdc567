"""A command writes all of its outputs or none: _core.files.OutputGroup and the commands that use it."""

from __future__ import annotations

import os

import numpy as np
import pytest

from cmbtools import cli
from cmbtools._core.files import OutputGroup
from cmbtools.exceptions import OutputExistsError
from cmbtools.maps import write_mask, write_sky_map


def _visible(directory):
    return sorted(p.name for p in directory.iterdir())


def _everything(directory):
    return sorted(os.listdir(directory))


def test_the_files_appear_together_when_the_group_ends(tmp_path):
    seen_inside = []
    with OutputGroup() as group:
        for name in ("a.csv", "b.txt"):
            group.write(tmp_path / name, lambda p, name=name: p.write_text(f"content of {name}\n"))
            seen_inside.append([n for n in _everything(tmp_path) if not n.startswith(".")])
    assert seen_inside == [[], []]  # nothing published before the end of the block
    assert _everything(tmp_path) == ["a.csv", "b.txt"]  # and no temporary file left
    assert (tmp_path / "b.txt").read_text() == "content of b.txt\n"
    assert group.paths == [tmp_path / "a.csv", tmp_path / "b.txt"]
    assert oct(os.stat(tmp_path / "a.csv").st_mode & 0o777) == oct(0o666 & ~_current_umask())


def _current_umask():
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


@pytest.mark.parametrize("failure", [RuntimeError("disk full"), KeyboardInterrupt()])
def test_a_failure_in_any_writer_leaves_every_destination_as_it_was(tmp_path, failure):
    (tmp_path / "a.csv").write_text("old a\n")

    def broken(p):
        p.write_text("half")
        raise failure

    with pytest.raises(type(failure)):
        with OutputGroup() as group:
            group.write(tmp_path / "a.csv", lambda p: p.write_text("new a\n"), overwrite=True)
            group.write(tmp_path / "b.csv", lambda p: p.write_text("new b\n"))
            group.write(tmp_path / "c.csv", broken)
    assert _everything(tmp_path) == ["a.csv"]
    assert (tmp_path / "a.csv").read_text() == "old a\n"


def test_a_file_created_meanwhile_by_another_process_is_not_replaced(tmp_path):
    with pytest.raises(OutputExistsError):
        with OutputGroup() as group:
            group.write(tmp_path / "a.csv", lambda p: p.write_text("new a\n"))
            (tmp_path / "b.csv").write_text("someone else's\n")  # after the check, before the publication
            group.write(tmp_path / "b.csv", lambda p: p.write_text("new b\n"))
    assert _everything(tmp_path) == ["b.csv"]
    assert (tmp_path / "b.csv").read_text() == "someone else's\n"


@pytest.fixture
def small_inputs(tmp_path):
    nside = 16
    rng = np.random.default_rng(3)
    sky = rng.standard_normal(12 * nside**2)
    write_sky_map(tmp_path / "sky.fits", sky * 1e-4)
    mask = np.ones(12 * nside**2)
    mask[: 12 * nside**2 // 4] = 0.0
    write_mask(tmp_path / "mask.fits", mask)
    return tmp_path


def test_spectrum_interrupted_while_writing_its_figure_keeps_the_old_table(small_inputs, capsys, monkeypatch):
    d = small_inputs
    (d / "out.csv").write_text("an earlier result\n")
    from cmbtools.spectrum import bandpowers

    def interrupted(self, path, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(bandpowers.Bandpowers, "plot", interrupted)
    before = _everything(d)
    code = cli.main(["spectrum", str(d / "sky.fits"), "--mask", str(d / "mask.fits"), "--lmax", "40",
                     "--bin-width", "10", "-o", str(d / "out.csv"), "--figure", str(d / "out.png"), "--overwrite"])
    out, err = capsys.readouterr()
    assert code == 130
    assert len(err.strip().splitlines()) == 1  # Ctrl-C prints one line
    assert (d / "out.csv").read_text() == "an earlier result\n"
    assert _everything(d) == before


def test_simulate_failing_at_its_last_map_writes_no_map(tmp_path, capsys, monkeypatch):
    import cmbtools.maps

    calls = []
    real = cmbtools.maps.write_sky_map

    def fails_third_time(path, m, **kwargs):
        calls.append(path)
        if len(calls) == 3:
            raise OSError(28, "No space left on device")
        return real(path, m, **kwargs)

    monkeypatch.setattr(cmbtools.maps, "write_sky_map", fails_third_time)
    code = cli.main(["simulate", "--nside", "16", "--seed", "4", "--sims", "3", "--output-dir", str(tmp_path / "sims"),
                     "--write-spectrum", str(tmp_path / "cl.csv")])
    out, err = capsys.readouterr()
    assert code != 0 and len(calls) == 3
    assert "wrote" not in out
    assert _everything(tmp_path) == []  # no table, no map, and the directory the run made is gone again
