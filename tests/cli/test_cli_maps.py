"""The `cmbtools mask` and `cmbtools inspect` subcommands, run in-process."""

from __future__ import annotations

import math
import re

import healpy as hp
import numpy as np
import pytest

from cmbtools import cli
from cmbtools.maps import UNSEEN, cap_mask, mask_moments, read_mask, write_sky_map, write_mask

NSIDE = 32


def run(capsys, *argv):
    code = cli.main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def value(out, label):
    """The first number printed after ``label`` at the start of a line."""
    m = re.search(rf"^{re.escape(label)}\s+(-?[\d.]+(?:e[-+]?\d+)?)", out, re.MULTILINE)
    assert m, f"no line {label!r} in:\n{out}"
    return float(m.group(1))


def one_error_line(err, text):
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert text in lines[0], lines[0]
    return lines[0]


# ---------------------------------------------------------------- mask

def test_mask_cap_with_holes_and_apodization(tmp_path, capsys):
    csv = tmp_path / "sources.csv"
    csv.write_text("name,lon_deg,lat_deg,radius_deg\nA,250,-55,\nB,240,-40,3\n")
    out_path = tmp_path / "mask.fits"
    code, out, err = run(capsys, "mask", "--nside", NSIDE, "--keep-cap", "250,-55,50", "--holes", csv,
                         "--hole-radius", 2, "--apodize", "cosine", "--apodize-width", 5, "-o", out_path)
    assert (code, err) == (0, "")
    w = read_mask(out_path)
    mom = mask_moments(w)
    assert value(out, "f_sky") == pytest.approx(mom.f_sky, abs=5e-7)
    assert value(out, "w2") == pytest.approx(mom.w2, abs=5e-7)
    assert value(out, "w4") == pytest.approx(mom.w4, abs=5e-7)
    assert value(out, "f_sky_eff") == pytest.approx(mom.f_sky_eff, abs=5e-7)
    assert value(out, "nside") == NSIDE
    # the unapodized cap minus two holes has the area 2 pi (1 - cos r) of each cap
    # (Archimedes' hat-box theorem; common practice) -- apodization only lowers it
    cap_area = lambda r: (1 - math.cos(math.radians(r))) / 2  # noqa: E731
    assert mom.f_sky < cap_area(50) - cap_area(2) - cap_area(3) + 0.01
    assert np.all(w[hp.ang2pix(NSIDE, [250, 240], [-55, -40], lonlat=True)] == 0)
    assert w.max() == 1.0 and 0 < np.count_nonzero((w > 0) & (w < 1))


def test_mask_latitude_cut_area(tmp_path, capsys):
    code, out, _ = run(capsys, "mask", "--nside", 64, "--cut-latitude", 20, "-o", tmp_path / "cut.fits")
    assert code == 0
    # the band |b| < 20 deg covers sin(20 deg) of the sphere (Archimedes; common practice);
    # tolerance: one pixel width along both edges
    tol = 2 * 2 * math.pi * math.cos(math.radians(20)) * hp.nside2resol(64) / (4 * math.pi)
    assert abs(value(out, "f_sky") - (1 - math.sin(math.radians(20)))) < tol


def test_mask_from_map_threshold_and_from_mask(tmp_path, capsys):
    hits = np.arange(12 * NSIDE**2, dtype=float)  # increasing from the north pole
    hits_path = write_sky_map(tmp_path / "hits.fits", hits, unit=None)
    code, out, _ = run(capsys, "mask", "--from-map", hits_path, "--threshold", 6143.5, "--keep-where", "above",
                       "-o", tmp_path / "south.fits")
    assert code == 0
    assert value(out, "f_sky") == pytest.approx(0.5, abs=1e-12)  # exactly the pixels 6144..12287
    assert value(out, "pixels used") == 6144
    # start from that mask, change the resolution and cut a cap from it
    code, out, _ = run(capsys, "mask", "--from-mask", tmp_path / "south.fits", "--nside", 16,
                       "--keep-cap", "0,-90,60", "-o", tmp_path / "cap.fits")
    assert code == 0
    expected = mask_moments(cap_mask(16, 0, -90, 60)).f_sky  # the cap lies inside the southern half
    assert value(out, "f_sky") == pytest.approx(expected, abs=5e-7)


def test_mask_info(tmp_path, capsys):
    w = cap_mask(NSIDE, 0, 0, 40) * 0.5
    path = write_mask(tmp_path / "m.fits", w)
    code, out, _ = run(capsys, "mask", "--info", path)
    assert code == 0
    mom = mask_moments(w)
    assert value(out, "f_sky") == pytest.approx(mom.f_sky, abs=5e-7)
    assert value(out, "w2") == pytest.approx(0.25 * mom.f_sky / 0.5, abs=5e-7)  # w2 = 0.5^2 x cap fraction
    assert value(out, "pixels used") == np.count_nonzero(w)
    assert "weighted" in out


def test_mask_refuses_to_overwrite(tmp_path, capsys):
    out_path = tmp_path / "m.fits"
    assert run(capsys, "mask", "--nside", 16, "--cut-latitude", 10, "-o", out_path)[0] == 0
    before = out_path.read_bytes()
    code, out, err = run(capsys, "mask", "--nside", 16, "--cut-latitude", 30, "-o", out_path)
    assert code == 2 and out == ""
    one_error_line(err, "output exists")
    assert out_path.read_bytes() == before
    code, out, _ = run(capsys, "mask", "--nside", 16, "--cut-latitude", 30, "-o", out_path, "--overwrite")
    assert code == 0
    assert value(out, "f_sky") == pytest.approx(read_mask(out_path).mean(), abs=5e-7)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.fits"]


@pytest.mark.parametrize(
    "argv, message",
    [
        (["--nside", "12", "--cut-latitude", "10", "-o", "{tmp}/out.fits"], "power of two"),
        (["--nside", "16"], "give -o/--output FILE"),
        (["--info", "{tmp}/none.fits"], "none.fits: no such file"),
        (["--nside", "16", "--holes", "{tmp}/bad.csv", "--hole-radius", "1", "-o", "{tmp}/out.fits"],
         "bad.csv: lacks the column(s) lat_deg"),
        (["--nside", "16", "--holes", "{tmp}/ok.csv", "-o", "{tmp}/out.fits"], "have no radius"),
        (["--nside", "16", "--from-map", "{tmp}/none.fits", "-o", "{tmp}/out.fits"],
         "--from-map and --threshold go together"),
        (["--nside", "16", "--apodize", "cosine", "-o", "{tmp}/out.fits"], "--apodize and --apodize-width go together"),
        (["--nside", "16", "--keep-cap", "0,95,10", "-o", "{tmp}/out.fits"], "latitude in [-90, 90]"),
        (["--nside", "16", "--cut-latitude", "10", "-o", "{tmp}/no/such/dir/out.fits"], "does not exist"),
    ],
)
def test_mask_bad_input_exit_2(tmp_path, capsys, argv, message):
    (tmp_path / "bad.csv").write_text("lon_deg,radius_deg\n1,2\n")
    (tmp_path / "ok.csv").write_text("lon_deg,lat_deg\n1,2\n")
    argv = [a.replace("{tmp}", str(tmp_path)) for a in argv]
    code, out, err = run(capsys, "mask", *argv)
    assert code == 2 and out == ""
    one_error_line(err, message)
    assert not (tmp_path / "out.fits").exists()


def test_mask_usage_errors_exit_2(tmp_path, capsys):
    with pytest.raises(SystemExit) as info:
        cli.main(["mask", "--keep-cap", "1,2", "-o", str(tmp_path / "x.fits")])
    assert info.value.code == 2
    one_error_line(capsys.readouterr().err, "expected LON,LAT,RADIUS")
    path = write_mask(tmp_path / "m.fits", np.ones(768))
    code, _, err = run(capsys, "mask", "--info", path, "--nside", 8)
    assert code == 2
    one_error_line(err, "--info describes a mask and cannot be combined with --nside")


# ---------------------------------------------------------------- inspect

@pytest.fixture
def sky_file(tmp_path):
    """A NESTED, uK map with 100 missing pixels, a 20 uK monopole and a 3000 uK dipole."""
    nside = NSIDE
    vec = np.stack(hp.pix2vec(nside, np.arange(12 * nside**2)), axis=-1)
    m = 2e-5 + 3e-3 * vec @ hp.ang2vec(264.0, 48.0, lonlat=True)
    m += 1e-5 * np.sin(7 * np.arange(m.size))  # a small deterministic ripple
    m[:100] = UNSEEN
    path = write_sky_map(tmp_path / "sky.fits", m, unit="uK_CMB", coordinates="G", nested=True, dtype="float32")
    return path, m


def test_inspect_prints_the_map_facts(sky_file, capsys):
    path, m = sky_file
    code, out, err = run(capsys, "inspect", path)
    assert (code, err) == (0, "")
    assert value(out, "nside") == NSIDE
    assert "NESTED in the file" in out and "uK_CMB" in out and "G (galactic)" in out
    assert value(out, "missing pixels") == 100
    assert value(out, "pixels used") == 12 * NSIDE**2 - 100
    assert value(out, "monopole") == pytest.approx(20.0, abs=0.1)
    assert value(out, "dipole") == pytest.approx(3000.0, abs=0.2)
    lon, lat = re.search(r"towards lon ([\d.]+), lat ([-\d.]+) deg", out).groups()
    assert float(lon) == pytest.approx(264.0, abs=0.01) and float(lat) == pytest.approx(48.0, abs=0.01)
    good = m[100:] * 1e6
    assert value(out, "min / max") == pytest.approx(good.min(), abs=1e-3)
    assert value(out, "rms") == pytest.approx(np.sqrt(np.mean(good**2)), rel=1e-6)


def test_inspect_with_mask_and_figure(sky_file, tmp_path, capsys):
    path, _ = sky_file
    mask_path = write_mask(tmp_path / "cap.fits", cap_mask(NSIDE, 250.0, -55.0, 50.0))
    fig = tmp_path / "view.png"
    code, out, _ = run(capsys, "inspect", path, "--mask", mask_path, "--figure", fig)
    assert code == 0
    assert value(out, "pixels used") == np.count_nonzero(cap_mask(NSIDE, 250.0, -55.0, 50.0)[100:])
    assert value(out, "dipole") == pytest.approx(3000.0, abs=1.0)
    assert fig.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification)
    before = fig.read_bytes()
    code, out, err = run(capsys, "inspect", path, "--figure", fig)
    assert code == 2 and out == ""
    one_error_line(err, "output exists")
    assert fig.read_bytes() == before
    assert run(capsys, "inspect", path, "--figure", fig, "--overwrite")[0] == 0


def test_inspect_errors_and_unit_override(tmp_path, capsys):
    code, _, err = run(capsys, "inspect", tmp_path / "none.fits")
    assert code == 2
    one_error_line(err, "none.fits: no such file")
    rj = tmp_path / "rj.fits"
    hp.write_map(rj, np.full(768, 5.0), column_units="K_RJ", dtype=np.float64)
    code, _, err = run(capsys, "inspect", rj)
    assert code == 2
    one_error_line(err, "Rayleigh-Jeans")
    code, out, _ = run(capsys, "inspect", rj, "--unit", "uK")
    assert code == 0 and value(out, "monopole") == pytest.approx(5.0, rel=1e-9)
    code, _, err = run(capsys, "inspect", rj, "--field", 2)
    assert code == 2
    one_error_line(err, "has no field 2")
    code, _, err = run(capsys, "inspect", rj, "--unit", "uK", "--mask", write_mask(tmp_path / "m.fits", np.ones(3072)))
    assert code == 2
    one_error_line(err, "nside 8 but the 'mask' has nside 16")


# the suite turns warnings into errors; here the warning must reach the CLI's printer instead
@pytest.mark.filterwarnings("default::cmbtools.exceptions.CmbtoolsWarning")
def test_inspect_warns_about_a_missing_unit(tmp_path, capsys):
    p = tmp_path / "nounit.fits"
    hp.write_map(p, np.full(768, 1e-6), dtype=np.float64)
    code, out, err = run(capsys, "inspect", p)
    assert code == 0
    # the CLI shows the library's warning as one line on stderr
    one_error_line(err, "cmbtools: warning: ")
    assert "states no unit; assuming K_CMB" in err
    assert "none stated, K_CMB assumed" in out
    assert value(out, "monopole") == pytest.approx(1.0, rel=1e-9)
