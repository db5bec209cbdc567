"""The `inspect` figure: cmbtools' own projections and the close-up of the observed patch."""

from __future__ import annotations

import math

import numpy as np
import pytest

from cmbtools import maps
from cmbtools.maps import sky_view


def test_mollweide_round_trip_and_equal_area():
    rng = np.random.default_rng(5)
    lon = rng.uniform(-math.pi + 1e-3, math.pi - 1e-3, 2000)
    lat = np.arcsin(rng.uniform(-0.999, 0.999, 2000))
    x, y = sky_view._mollweide_forward(lon, lat)
    lon2, lat2 = sky_view._mollweide_inverse(x, y)
    np.testing.assert_allclose(lat2, lat, atol=1e-9)
    np.testing.assert_allclose(np.angle(np.exp(1j * (lon2 - lon))), 0.0, atol=1e-9)
    # equal area (Snyder 1987, section 31): the ellipse of semi-axes 2 sqrt2 and sqrt2 has area 4 pi, the sphere's;
    # the strip below latitude phi holds the sphere's fraction (1 + sin phi) / 2 of it
    for phi in (-1.0, -0.3, 0.4, 1.2):
        _, y_phi = sky_view._mollweide_forward(np.array([0.0]), np.array([phi]))
        t = math.asin(y_phi[0] / math.sqrt(2))
        fraction = (2 * t + math.sin(2 * t) + math.pi) / (2 * math.pi)  # ellipse area below y, over the total
        assert fraction == pytest.approx((1 + math.sin(phi)) / 2, rel=1e-9)


def test_azimuthal_equidistant_keeps_distances_from_the_centre():
    lon0, lat0 = math.radians(250.0), math.radians(-55.0)
    rng = np.random.default_rng(6)
    x, y = rng.uniform(-0.8, 0.8, (2, 500))
    lon, lat = sky_view._equidistant_inverse(x, y, lon0, lat0)
    # the great-circle distance to the centre is the plane distance (Snyder 1987, section 25)
    cos_d = math.sin(lat0) * np.sin(lat) + math.cos(lat0) * np.cos(lat) * np.cos(lon - lon0)
    np.testing.assert_allclose(np.arccos(np.clip(cos_d, -1, 1)), np.hypot(x, y), atol=1e-9)
    x2, y2 = sky_view._equidistant_forward(lon, lat, lon0, lat0)
    np.testing.assert_allclose(x2, x, atol=1e-9)
    np.testing.assert_allclose(y2, y, atol=1e-9)


def test_the_close_up_is_centred_on_the_observed_patch():
    w = maps.cap_mask(64, 250.0, -55.0, 30.0)
    lon0, lat0, radius = sky_view._patch_centre_and_radius(w > 0, 64)
    assert math.degrees(lon0) % 360 == pytest.approx(250.0, abs=0.5)
    assert math.degrees(lat0) == pytest.approx(-55.0, abs=0.5)
    assert math.degrees(radius) == pytest.approx(30.0 * 1.08, abs=2.0)  # the cap and a margin of 8 %


def test_the_figure_is_written_with_its_caption(tmp_path, monkeypatch):
    from matplotlib.figure import Figure

    texts = []
    original = Figure.text

    def keep(self, x, y, s, *args, **kwargs):
        texts.append(s)
        return original(self, x, y, s, *args, **kwargs)

    monkeypatch.setattr(Figure, "text", keep)
    rng = np.random.default_rng(7)
    m = rng.normal(0, 1e-4, 12 * 32**2)
    used = maps.cap_mask(32, 0.0, 40.0, 30.0) > 0
    sky_view.draw_sky_view(tmp_path / "v.png", m, used, title="t", caption="Removed before drawing: the monopole")
    assert (tmp_path / "v.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "Removed before drawing: the monopole" in texts


def test_inspect_draws_the_map_without_its_monopole_and_dipole_and_says_so(tmp_path, monkeypatch, capsys):
    from pathlib import Path

    from matplotlib.figure import Figure

    from cmbtools import cli

    texts = []
    original = Figure.text

    def keep(self, x, y, s, *args, **kwargs):
        texts.append(s)
        return original(self, x, y, s, *args, **kwargs)

    monkeypatch.setattr(Figure, "text", keep)
    demo = Path(__file__).resolve().parents[2] / "maps"
    assert cli.main(["inspect", str(demo / "tern_sky.fits"), "--mask", str(demo / "tern_mask.fits"),
                     "--figure", str(tmp_path / "sky.png")]) == 0
    out = capsys.readouterr().out
    monopole = float(next(s for s in out.splitlines() if s.startswith("monopole")).split()[1])
    dipole = float(next(s for s in out.splitlines() if s.startswith("dipole")).split()[1])
    caption = next(s for s in texts if s.startswith("Removed before drawing"))
    assert f"the monopole ({monopole:.2f} uK)" in caption and f"the dipole ({dipole:.2f} uK)" in caption
    assert "fitted on the pixels the mask keeps" in caption
