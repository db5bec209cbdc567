"""cmbtools' own picture of a HEALPix map: the whole sky and a close-up of the observed patch.

The figure has two panels that share one labelled colour bar:

* the whole sky in an equal-area Mollweide projection (longitude increasing to the left, as the sky is seen
  from inside), with a 30-degree graticule and the outline of the close-up;
* a close-up of the observed patch in an azimuthal equidistant projection centred on the patch (distances from
  the centre are true), with rings every 10 degrees and the patch's own scale.

Pixels that are not used (masked out or missing) are drawn in a flat light tone, so the observed patch stands
out; a caption under the figure states what was removed from the map before drawing.  The projections are
computed here (inverse formulas from Snyder 1987, "Map Projections: A Working Manual", USGS Professional Paper
1395, sections 31 and 25); healpy only finds the pixel under each point (``ang2pix``).
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["draw_sky_view"]

_UNUSED_COLOUR = "#ecebe4"
_COLOUR_MAP = "coolwarm"


def _mollweide_inverse(x, y):
    """(lon, lat) in radians of Mollweide plane points (x in [-2 sqrt2, 2 sqrt2], y in [-sqrt2, sqrt2]); NaN outside."""
    r2 = math.sqrt(2.0)
    with np.errstate(invalid="ignore"):
        theta = np.arcsin(np.clip(y / r2, -1.0, 1.0))
        lat = np.arcsin(np.clip((2 * theta + np.sin(2 * theta)) / np.pi, -1.0, 1.0))
        cos_t = np.cos(theta)
        lon = np.where(cos_t > 0, np.pi * x / (2 * r2 * np.where(cos_t > 0, cos_t, 1.0)), 0.0)
    inside = (x / (2 * r2)) ** 2 + (y / r2) ** 2 <= 1.0
    return np.where(inside, -lon, np.nan), np.where(inside, lat, np.nan)  # minus: longitude grows to the left


def _mollweide_forward(lon, lat):
    """Mollweide plane (x, y) of (lon, lat) in radians (Newton iteration for the auxiliary angle)."""
    r2 = math.sqrt(2.0)
    lat = np.asarray(lat, dtype=np.float64)
    theta = lat.copy()
    for _ in range(50):
        f = 2 * theta + np.sin(2 * theta) - np.pi * np.sin(lat)
        d = 2 + 2 * np.cos(2 * theta)
        theta = theta - np.where(d > 1e-12, f / np.where(d > 1e-12, d, 1.0), 0.0)
    lon = (np.asarray(lon) + np.pi) % (2 * np.pi) - np.pi
    return -2 * r2 / np.pi * lon * np.cos(theta), r2 * np.sin(theta)


def _equidistant_inverse(x, y, lon0, lat0):
    """(lon, lat) of azimuthal equidistant plane points (radians from the centre (lon0, lat0))."""
    rho = np.hypot(x, y)
    c = rho
    with np.errstate(invalid="ignore", divide="ignore"):
        sin_c, cos_c = np.sin(c), np.cos(c)
        lat = np.arcsin(np.clip(cos_c * math.sin(lat0) + np.where(rho > 0, y * sin_c * math.cos(lat0) / rho, 0.0),
                                -1.0, 1.0))
        lon = lon0 + np.arctan2(x * sin_c, rho * math.cos(lat0) * cos_c - y * math.sin(lat0) * sin_c)
    return -(lon - lon0) + lon0, lat  # x grows towards smaller longitude, as on the whole-sky panel


def _equidistant_forward(lon, lat, lon0, lat0):
    lon = -(np.asarray(lon) - lon0) + lon0
    cos_c = np.clip(math.sin(lat0) * np.sin(lat) + math.cos(lat0) * np.cos(lat) * np.cos(lon - lon0), -1.0, 1.0)
    c = np.arccos(cos_c)
    with np.errstate(invalid="ignore", divide="ignore"):
        k = np.where(c > 0, c / np.sin(c), 1.0)
    return k * np.cos(lat) * np.sin(lon - lon0), k * (math.cos(lat0) * np.sin(lat) - math.sin(lat0) * np.cos(lat) *
                                                      np.cos(lon - lon0))


def _sample(values, nside, lon, lat):
    """The map value under each (lon, lat) (NaN where the point is outside the projection)."""
    import healpy as hp

    out = np.full(lon.shape, np.nan)
    ok = np.isfinite(lon) & np.isfinite(lat)
    pix = hp.ang2pix(nside, np.degrees(lon[ok]), np.degrees(lat[ok]), lonlat=True)
    out[ok] = values[pix]
    return out


def _patch_centre_and_radius(used, nside):
    import healpy as hp

    vec = np.array(hp.pix2vec(nside, np.flatnonzero(used)))
    mean = vec.mean(axis=1)
    norm = np.linalg.norm(mean)
    if norm < 1e-6:  # the whole sky (or a symmetric pattern): centre on the galactic centre
        return 0.0, 0.0, math.pi
    centre = mean / norm
    radius = float(np.arccos(np.clip(centre @ vec, -1.0, 1.0)).max())
    lon0 = math.atan2(centre[1], centre[0])
    lat0 = math.asin(centre[2])
    return lon0, lat0, min(radius * 1.08, math.pi)


def draw_sky_view(path, m, used, *, title, caption, unit_label="temperature [uK_CMB]", overwrite=False, scale=1e6):
    """Write the two-panel view of ``m`` (RING, K_CMB) to ``path`` (PNG or PDF), atomically.

    Parameters
    ----------
    path : str or path-like
        The figure file.
    m : ndarray of shape (12*nside**2,)
        The map to draw (K_CMB; drawn times ``scale``).
    used : ndarray of bool, same shape
        The pixels to colour; the others are drawn in a flat light tone.
    title, caption : str
        Text above the panels and under the colour bar.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.colors import Normalize
    from matplotlib.figure import Figure

    from cmbtools._core.files import atomic_output

    nside = int(round(math.sqrt(m.size / 12)))
    shown = np.where(used, m * scale, np.nan)
    limit = float(np.nanpercentile(np.abs(shown), 99.5)) if used.any() else 1.0  # a few outliers do not wash out the rest
    limit = limit if limit > 0 else 1.0
    norm = Normalize(-limit, limit)

    fig = Figure(figsize=(12.0, 5.6))
    FigureCanvasAgg(fig)
    sky_ax = fig.add_axes([0.02, 0.22, 0.56, 0.66])
    zoom_ax = fig.add_axes([0.62, 0.22, 0.36, 0.66])
    bar_ax = fig.add_axes([0.25, 0.12, 0.5, 0.03])

    # whole sky
    r2 = math.sqrt(2.0)
    nx = 1200
    x = np.linspace(-2 * r2, 2 * r2, nx)
    y = np.linspace(-r2, r2, nx // 2)
    xx, yy = np.meshgrid(x, y)
    lon, lat = _mollweide_inverse(xx, yy)
    img = _sample(shown, nside, lon, lat)
    outside = ~np.isfinite(lon)
    background = np.where(outside, np.nan, 0.0)
    sky_ax.imshow(background, origin="lower", extent=(x[0], x[-1], y[0], y[-1]), cmap="Greys", vmin=0, vmax=1,
                  interpolation="nearest")
    sky_ax.imshow(np.where(np.isfinite(lon) & ~np.isfinite(img), 1.0, np.nan), origin="lower",
                  extent=(x[0], x[-1], y[0], y[-1]), cmap=_single_colour_map(_UNUSED_COLOUR), interpolation="nearest")
    image = sky_ax.imshow(img, origin="lower", extent=(x[0], x[-1], y[0], y[-1]), cmap=_COLOUR_MAP, norm=norm,
                          interpolation="nearest")
    grid = dict(color="#55554f", lw=0.5, alpha=0.6)
    t = np.linspace(-math.pi / 2, math.pi / 2, 181)
    for lon_deg in range(-180, 181, 60):
        gx, gy = _mollweide_forward(np.full_like(t, math.radians(lon_deg) - 1e-9 * np.sign(lon_deg)), t)
        sky_ax.plot(gx, gy, **grid)
    s = np.linspace(-math.pi, math.pi, 361)
    for lat_deg in range(-60, 61, 30):
        gx, gy = _mollweide_forward(s, np.full_like(s, math.radians(lat_deg)))
        sky_ax.plot(gx, gy, **grid)
    sky_ax.set_xlim(x[0], x[-1])
    sky_ax.set_ylim(y[0], y[-1])
    sky_ax.set_aspect("equal")
    sky_ax.axis("off")
    sky_ax.set_title("whole sky (Mollweide, equal area; graticule every 30/60 deg)", fontsize=9)

    # close-up of the patch
    lon0, lat0, radius = _patch_centre_and_radius(used, nside) if used.any() else (0.0, 0.0, math.pi)
    edge = np.linspace(0, 2 * math.pi, 361)
    bx, by = radius * np.cos(edge), radius * np.sin(edge)
    blon, blat = _equidistant_inverse(bx, by, lon0, lat0)
    ox, oy = _mollweide_forward(blon, blat)
    jumps = np.abs(np.diff(ox)) > r2
    ox = np.insert(ox.astype(float), np.flatnonzero(jumps) + 1, np.nan)
    oy = np.insert(oy.astype(float), np.flatnonzero(jumps) + 1, np.nan)
    sky_ax.plot(ox, oy, color="black", lw=1.0)
    n = 600
    u = np.linspace(-radius, radius, n)
    uu, vv = np.meshgrid(u, u)
    inside = np.hypot(uu, vv) <= radius
    zlon, zlat = _equidistant_inverse(uu, vv, lon0, lat0)
    zlon, zlat = np.where(inside, zlon, np.nan), np.where(inside, zlat, np.nan)
    zimg = _sample(shown, nside, zlon, zlat)
    deg = math.degrees(radius)
    ext = (-deg, deg, -deg, deg)
    zoom_ax.imshow(np.where(inside & ~np.isfinite(zimg), 1.0, np.nan), origin="lower", extent=ext,
                   cmap=_single_colour_map(_UNUSED_COLOUR), interpolation="nearest")
    zoom_ax.imshow(zimg, origin="lower", extent=ext, cmap=_COLOUR_MAP, norm=norm, interpolation="nearest")
    for ring in range(10, int(deg) + 1, 10):
        zoom_ax.plot(ring * np.cos(edge), ring * np.sin(edge), **grid)
    zoom_ax.plot(deg * np.cos(edge), deg * np.sin(edge), color="black", lw=1.0)
    zoom_ax.set_xlim(-deg, deg)
    zoom_ax.set_ylim(-deg, deg)
    zoom_ax.set_aspect("equal")
    zoom_ax.set_xlabel("degrees from the centre (rings every 10 deg)", fontsize=8)
    zoom_ax.tick_params(labelsize=7)
    lon_c = math.degrees(lon0) % 360.0
    zoom_ax.set_title(f"observed patch around lon {lon_c:.1f}, lat {math.degrees(lat0):.1f} deg "
                      "(azimuthal equidistant)", fontsize=9)

    bar = fig.colorbar(image, cax=bar_ax, orientation="horizontal")
    bar.set_label(unit_label, fontsize=9)
    bar.ax.tick_params(labelsize=8)
    fig.suptitle(title, fontsize=11, x=0.02, ha="left")
    fig.text(0.5, 0.02, caption, ha="center", va="bottom", fontsize=8.5, wrap=True)
    with atomic_output(path, overwrite=overwrite) as tmp:
        fig.savefig(tmp, dpi=100)


def _single_colour_map(colour):
    from matplotlib.colors import ListedColormap

    return ListedColormap([colour])
