"""Slope and aspect from a DEM by Horn (1981).

Horn, B. K. P. (1981): Hill shading and the reflectance map. Proceedings of the
IEEE 69(1), 14-47. The weighted 3 x 3 differences are

    dz/dx = ((c + 2f + i) - (a + 2d + g)) / (8 dx)
    dz/dy = ((a + 2b + c) - (g + 2h + i)) / (8 dy)      (y pointing north)

for the window  a b c / d e f / g h i  with ``a`` at the north-west corner.

Edges and nodata: where the full window is not available (the DEM border, next to
nodata) the gradient along each axis falls back to the plain central difference
of the two neighbours in that row or column, or to the one-sided difference with
the one neighbour that exists; where an axis has no valid neighbour at all the
cell gets NaN. No value outside the DEM is invented.
"""

from __future__ import annotations

import numpy as np


def _neighbour_view(z: np.ndarray):
    """A function (dr, dc) -> array whose [r, c] is z[r + dr, c + dc], NaN beyond the edge."""
    p = np.pad(z, 1, mode="constant", constant_values=np.nan)
    ny, nx = z.shape
    return lambda dr, dc: p[1 + dr:1 + dr + ny, 1 + dc:1 + dc + nx]


def gradient_horn(elevation: np.ndarray, dx: float, dy: float) -> tuple[np.ndarray, np.ndarray]:
    """Surface gradient (dz/dx east, dz/dy north) by Horn (1981), m per m.

    Parameters
    ----------
    elevation : ndarray (ny, nx)
        Elevation, m, row 0 at the north (GDAL north-up convention); NaN = nodata.
    dx, dy : float
        Cell width and height, m (positive).

    Returns
    -------
    gx, gy : ndarray (ny, nx) float64
        Gradient towards east and towards north; NaN on nodata cells and where
        no neighbour exists along an axis (see the module docstring for edges).
    """
    z = np.asarray(elevation, dtype="float64")
    nb = _neighbour_view(z)
    a, b, c = nb(-1, -1), nb(-1, 0), nb(-1, 1)
    d, f = nb(0, -1), nb(0, 1)
    g, h, i = nb(1, -1), nb(1, 0), nb(1, 1)
    with np.errstate(invalid="ignore"):
        gx = ((c + 2 * f + i) - (a + 2 * d + g)) / (8.0 * dx)
        gy = ((a + 2 * b + c) - (g + 2 * h + i)) / (8.0 * dy)
        # fall-backs where the full window is incomplete
        gx_c = np.where(np.isfinite(f) & np.isfinite(d), (f - d) / (2 * dx),
                        np.where(np.isfinite(f), (f - z) / dx,
                                 np.where(np.isfinite(d), (z - d) / dx, np.nan)))
        gy_c = np.where(np.isfinite(b) & np.isfinite(h), (b - h) / (2 * dy),
                        np.where(np.isfinite(b), (b - z) / dy,
                                 np.where(np.isfinite(h), (z - h) / dy, np.nan)))
    gx = np.where(np.isfinite(gx), gx, gx_c)
    gy = np.where(np.isfinite(gy), gy, gy_c)
    invalid = ~np.isfinite(z)
    gx[invalid] = np.nan
    gy[invalid] = np.nan
    return gx, gy


#: cells of the DEM (whole rows) whose slope and aspect :func:`slope_aspect` makes at once
#: (about 300 bytes of temporaries each)
BAND_CELLS = 1 << 20


def slope_aspect(elevation: np.ndarray, dx: float, dy: float,
                 flat_tolerance: float = 1e-12) -> tuple[np.ndarray, np.ndarray]:
    """Slope and aspect by Horn (1981).

    Made in bands of rows, each read with one row above and below: the 3 x 3 window of
    every cell is the same as over the whole DEM, so the result is the same bit for bit,
    without whole-DEM temporaries.

    Parameters
    ----------
    elevation : ndarray (ny, nx)
        Elevation, m, north-up; NaN = nodata.
    dx, dy : float
        Cell size, m.
    flat_tolerance : float
        Gradient magnitude (m per m) at or below which a cell counts as flat.

    Returns
    -------
    slope_deg : ndarray (ny, nx)
        Slope angle from horizontal, degrees 0..90.
    aspect_deg : ndarray (ny, nx)
        Direction the slope faces (downhill), degrees clockwise from north
        (0 = north, 90 = east); NaN on flat cells and on nodata.
    """
    z = np.asarray(elevation)
    if z.ndim != 2:
        raise ValueError("elevation must be a 2-D array")
    ny, nx = z.shape
    slope = np.empty((ny, nx))
    aspect = np.empty((ny, nx))
    rows = max(1, BAND_CELLS // max(nx, 1))
    for r0 in range(0, ny, rows):
        r1 = min(ny, r0 + rows)
        a, b = max(r0 - 1, 0), min(ny, r1 + 1)
        gx, gy = gradient_horn(z[a:b], dx, dy)
        gx, gy = gx[r0 - a:r1 - a], gy[r0 - a:r1 - a]
        mag = np.hypot(gx, gy)
        slope[r0:r1] = np.degrees(np.arctan(mag))
        # downhill direction is (-gx, -gy) in (east, north); azimuth clockwise from north
        band = np.degrees(np.arctan2(-gx, -gy)) % 360.0
        aspect[r0:r1] = np.where(mag > flat_tolerance, band, np.nan)
    return slope, aspect


def illumination(slope_deg: np.ndarray, aspect_deg: np.ndarray, sun_azimuth_deg: float,
                 sun_elevation_deg: float) -> np.ndarray:
    """Cosine of the angle between the surface normal and the sun (Lambert), clipped at 0.

    cos(i) = cos(Z) cos(s) + sin(Z) sin(s) cos(A_sun - A_slope), with Z the sun's zenith
    angle, s the slope and A the azimuths (common practice; e.g. Iqbal 1983).
    Flat cells (NaN aspect) use slope 0.
    """
    s = np.radians(np.nan_to_num(slope_deg, nan=0.0))
    asp = np.radians(np.nan_to_num(aspect_deg, nan=0.0))
    zen = np.radians(90.0 - sun_elevation_deg)
    cosi = np.cos(zen) * np.cos(s) + np.sin(zen) * np.sin(s) * np.cos(np.radians(sun_azimuth_deg) - asp)
    return np.clip(cosi, 0.0, None)
