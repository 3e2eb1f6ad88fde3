"""The invented demo catchment "Seldra": a procedural DEM, glacier outlines and a station record.

Everything here is made up. Seldra is a fictional glacierised valley in an
invented mountain range; its valley station "Seldra Dam" stands at 1200 m a.s.l.
at the valley's outlet. The grid is placed in a real projected CRS (WGS 84 /
UTM zone 32N, near 46.5 deg N) only so that the files behave like real inputs
(CRS, reprojection of the outlines, sun geometry); the terrain is that of no
real place.

The generators are pure functions of their arguments and deterministic for a
given seed; only :func:`write_demo_inputs` touches files.

How the terrain is built
------------------------
A skeleton of valley floors (axis polylines with a floor elevation and a flat
floor half-width at each vertex) and ridge crests (polylines with a crest
elevation at each vertex) is rasterised on a gently warped copy of the grid, so
that valleys and ridges do not run in straight lines. Every cell gets its
distance to the nearest floor ``d_f`` and to the nearest crest ``d_r``; with the
wall fraction ``F = d_f / (d_f + d_r)`` (0 on floors, 1 on crests) the
elevation is ``z = z_floor + (z_crest - z_floor) * F**1.6``, which makes
U-shaped, concave valley walls that meet in sharp ridges (aretes) and closed
bowls (cirques) where a short valley ends below a curved crest. Fractal
(spectral-synthesis) noise adds roughness, gullies and spurs on the walls and
summits and cols on the crests, weak only on the ice-filled valley floors. A
rock knob in the main glacier's upper basin becomes a nunatak. A soft ceiling
keeps the highest summits below about 3480 m, and a Gaussian filter of one cell
removes the creases.

Glacier outlines are the parts of the three ice-bearing valleys above each
glacier's terminus, where the surface lies low on the valley walls (the lateral
margin climbing higher up-valley, so that tongues taper), below the crests, on
slopes under 40 deg and off the nunatak; the masks are smoothed and vectorised
on a four-times finer grid, so that the outlines do not follow cell lines.

The loops below run over the few skeleton segments and over the days of one
station record, never over cells.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pandas as pd
import shapely
import tomli_w
from affine import Affine
from scipy import ndimage
from shapely.geometry import Polygon
from shapely.geometry.polygon import orient

from .errors import InputError
from .outdir import staged_beside
from .outputs import write_csv, write_geotiff

DEM_CRS = "EPSG:32632"
"""WGS 84 / UTM zone 32N (EPSG:32632), the CRS of the demo DEM."""

STATION_ELEVATION_M = 1200.0
"""Elevation of the invented valley station "Seldra Dam", m a.s.l."""

VALLEY_STATION = "Seldra Dam"
"""Name of the invented valley station (the first row of ``stations.csv``)."""

SITE_NAME = "Seldra"

CELL_SIZE_M = 30.0
"""Demo DEM cell size, m."""

DEM_SHAPE = (300, 320)
"""Demo DEM size (rows, columns)."""

DEM_ORIGIN = (561_000.0, 5_150_970.0)
"""Upper-left corner (x of the west edge, y of the north edge) of the demo DEM
in EPSG:32632, m: about 46.5 deg N, 9.8 deg E, an arbitrary spot."""

NODATA = -9999.0
"""Nodata value of the demo GeoTIFF."""

DEFAULT_SEED = 20161001

GLACIER_NAMES = ("north_seldra", "kessel", "tarn")
"""The demo glaciers: a north-facing valley glacier, an east-facing cirque
glacier and a small high south-facing cirque glacier."""

# ---------------------------------------------------------------------------
# Terrain skeleton, in km from the grid's south-west corner (x east, y north).
# Valley floors: (x_km, y_km, floor elevation m, flat-floor half-width m) per
# axis vertex; ridges: (x_km, y_km, crest elevation m) per vertex. Vertices
# just outside the grid shape the slopes that fall off its edges.
_VALLEYS = {
    # the main valley, ice-filled above about 2250 m, flowing north to the dam
    "main": [
        (4.75, 1.45, 3090.0, 200.0),
        (4.65, 2.30, 2980.0, 260.0),
        (4.65, 3.30, 2780.0, 180.0),
        (4.75, 4.30, 2570.0, 120.0),
        (4.85, 5.20, 2300.0, 90.0),
        (4.95, 6.80, 1800.0, 80.0),
        (5.05, 9.05, 1120.0, 110.0),
    ],
    # hanging cirque on the west wall of the main valley, opening east
    "kessel": [
        (2.30, 6.40, 3080.0, 40.0),
        (2.90, 6.45, 2850.0, 60.0),
        (3.45, 6.50, 2680.0, 70.0),
        (4.10, 6.55, 2250.0, 60.0),
        (4.75, 6.60, 1870.0, 80.0),
    ],
    # small high cirque on the south flank of the north-east summit
    "tarn": [
        (7.92, 8.05, 3120.0, 60.0),
        (7.85, 7.55, 2880.0, 80.0),
        (7.80, 7.10, 2600.0, 60.0),
        (7.70, 6.55, 2120.0, 60.0),
    ],
    # tributary valley from the east, joining the main valley below the tongue
    "east_branch": [
        (9.65, 6.35, 2330.0, 140.0),
        (8.60, 6.40, 2220.0, 140.0),
        (7.60, 6.45, 2080.0, 140.0),
        (4.95, 6.95, 1760.0, 110.0),
    ],
    # valleys beyond the catchment's ridges, and slopes falling off the grid's edges
    "west_outer": [(1.35, 1.90, 2950.0, 120.0), (1.05, 3.80, 2550.0, 150.0),
                   (0.60, 5.40, 2150.0, 160.0), (0.25, 9.05, 1500.0, 220.0)],
    "east_outer": [(8.00, 1.90, 2950.0, 120.0), (8.30, 4.00, 2600.0, 140.0),
                   (8.60, 5.90, 2260.0, 140.0), (8.60, 6.40, 2220.0, 140.0)],
    "south_edge": [(-0.05, -0.02, 2650.0, 20.0), (4.50, -0.02, 2950.0, 20.0), (9.65, -0.02, 2700.0, 20.0)],
    "north_edge": [(6.70, 9.02, 2500.0, 20.0), (9.65, 9.02, 2700.0, 20.0)],
}
_RIDGES = [
    # southern main ridge with the catchment's highest summit
    [(-0.05, 0.90, 2900.0), (1.60, 1.00, 3250.0), (3.20, 0.70, 3370.0), (4.50, 0.55, 3440.0),
     (5.80, 0.75, 3350.0), (6.80, 0.95, 3300.0), (8.00, 1.15, 3380.0), (9.20, 1.30, 3250.0),
     (9.65, 1.40, 3100.0)],
    # west ridge of the main valley, closing in on the tongue
    [(1.60, 1.00, 3250.0), (2.40, 2.20, 3320.0), (3.35, 3.40, 3170.0), (3.55, 4.50, 2990.0),
     (3.40, 5.40, 2870.0), (2.90, 5.80, 3000.0)],
    # kessel: south spur, headwall and north spur, then the ridge down to the dam
    [(1.85, 5.70, 3250.0), (2.80, 5.80, 3060.0), (3.70, 5.95, 2620.0), (4.15, 6.05, 2300.0)],
    [(1.85, 5.70, 3250.0), (1.80, 6.40, 3330.0), (1.95, 7.10, 3150.0), (2.20, 7.60, 2950.0),
     (2.90, 8.40, 2500.0), (3.50, 9.05, 2150.0)],
    [(1.95, 7.10, 3150.0), (2.90, 7.15, 2960.0), (3.80, 7.10, 2480.0), (4.25, 7.00, 2170.0)],
    # east ridge of the main valley
    [(6.80, 0.95, 3300.0), (6.30, 2.30, 3290.0), (5.90, 3.50, 3120.0), (5.95, 4.60, 2920.0),
     (6.20, 5.50, 2700.0), (6.50, 5.95, 2450.0)],
    # ridge between the two eastern valleys
    [(9.20, 1.30, 3250.0), (9.30, 3.00, 3050.0), (9.40, 5.00, 2750.0), (9.50, 5.80, 2500.0)],
    # north-east ridge with the summit above the tarn cirque
    [(5.90, 7.70, 2150.0), (6.80, 8.10, 2800.0), (7.90, 8.35, 3330.0), (8.90, 8.30, 3120.0),
     (9.65, 8.20, 2850.0)],
    # tarn side spurs
    [(7.30, 8.20, 3120.0), (7.30, 7.50, 2990.0), (7.25, 7.10, 2450.0)],
    [(8.45, 8.30, 3180.0), (8.45, 7.50, 3040.0), (8.35, 7.10, 2500.0)],
]
# glacier name -> (valley that holds it, elevation of its terminus m)
_GLACIERS = {"north_seldra": ("main", 2200.0), "kessel": ("kessel", 2600.0), "tarn": ("tarn", 2800.0)}

_LAYOUT_SEED = 46       # fixed: the warp of the skeleton does not change with the roughness seed
_WARP_KM = 0.25         # spread of the warp
_WALL_EXPONENT = 1.6    # concavity of the valley walls
_BLEND_CELLS = 4.0      # smoothing where the nearest valley or ridge changes, cells
_NUNATAK = (4.40, 2.45, 150.0, 120.0)  # rock knob: x_km, y_km, height m, radius m
_CEILING_KNEE_M, _CEILING_ROOM_M = 3330.0, 150.0

_MAX_GLACIER_SLOPE_DEG = 40.0
_OUTLINE_REFINE = 4          # outlines are traced on a grid this many times finer
_OUTLINE_SIMPLIFY_M = 8.0    # Douglas-Peucker tolerance of the traced outlines
_MIN_HOLE_M2 = 20_000.0      # smaller holes in the ice masks are filled (the nunatak is larger)

# ---------------------------------------------------------------------------
# Station climate at 1200 m (invented, in the manner of a mid-latitude valley
# station in a mountain range): annual mean near 5.8 C, January near -4.5 C,
# July near 15.8 C, about 1100-1150 mm a year with a summer maximum. Tuned so
# that the demo glaciers, run with firnline's default parameters, have ELAs
# near 2700-3150 m and specific balances of about -1.7..+1.1 m w.e.
_T_MONTHLY_C = (-3.6, -2.8, 0.3, 4.3, 9.3, 13.4, 15.8, 15.4, 11.9, 7.1, 1.6, -2.6)  # Jan..Dec
_T_WARMEST_DOY = 200.0
_T_AR1 = 0.75                              # lag-one autocorrelation of daily anomalies
_T_SD_K = (3.4, 2.8)                       # spread of daily anomalies: mid-winter, mid-summer
_T_YEAR_SD_K = {"winter": 1.0, "summer": 0.8}
_T_TREND_K_PER_YEAR = 0.03
_P_WET_AFTER_DRY = (0.27, 0.33)            # Markov chain: mid-winter, mid-summer
_P_WET_AFTER_WET = (0.64, 0.62)
_P_MEAN_WET_MM = (4.8, 8.0)                # mean wet-day amount: mid-winter, mid-summer
_P_GAMMA_SHAPE = 0.8
_P_YEAR_SD = {"winter": 0.12, "summer": 0.08}  # log-spread of the seasonal totals
_WET_DAY_T_SHIFT_K = (0.5, -1.2)           # wet days milder in winter, cooler in summer


# ---------------------------------------------------------------------------
# terrain


def dem_transform() -> Affine:
    """Affine transform of the demo DEM (north up, 30 m cells, in :data:`DEM_CRS`)."""
    return Affine(CELL_SIZE_M, 0.0, DEM_ORIGIN[0], 0.0, -CELL_SIZE_M, DEM_ORIGIN[1])


def _cell_centres_km(shape, transform):
    """Cell-centre coordinates (km) from the grid's south-west corner, x east and y north."""
    ny, nx = shape
    x = (np.arange(nx) + 0.5) * abs(transform.a) / 1000.0
    y = (ny - np.arange(ny) - 0.5) * abs(transform.e) / 1000.0
    return np.meshgrid(x, y)


def _polyline_nearest(xk, yk, vertices):
    """Distance from each cell to a polyline and the vertex attributes at the nearest point.

    Parameters
    ----------
    xk, yk : ndarray
        Cell coordinates, km.
    vertices : sequence of (x_km, y_km, *attributes)

    Returns
    -------
    distance_m : ndarray
        Distance to the polyline, m.
    attributes : ndarray (n_attributes, *xk.shape)
        The attributes interpolated linearly along the segment at the nearest point.
    """
    v = np.asarray(vertices, dtype=float)
    best = np.full(xk.shape, np.inf)
    attributes = np.zeros((v.shape[1] - 2,) + xk.shape)
    for a, b in zip(v[:-1], v[1:]):  # over the few segments
        dx, dy = b[0] - a[0], b[1] - a[1]
        t = np.clip(((xk - a[0]) * dx + (yk - a[1]) * dy) / (dx * dx + dy * dy), 0.0, 1.0)
        d = np.hypot(xk - (a[0] + t * dx), yk - (a[1] + t * dy)) * 1000.0
        closer = d < best
        best = np.where(closer, d, best)
        along = a[2:, None, None] + t[None] * (b[2:] - a[2:])[:, None, None]
        attributes = np.where(closer[None], along, attributes)
    return best, attributes


def _fractal_noise(shape, rng, exponent=1.8, smallest_scale_cells=2.0):
    """Zero-mean, unit-variance isotropic fractal noise by spectral synthesis.

    White Gaussian noise filtered in the Fourier domain to an amplitude spectrum
    proportional to ``k**-exponent`` (fractional Brownian surfaces by Fourier
    filtering; Voss 1988, in Peitgen & Saupe (eds.), The Science of Fractal
    Images, Springer), with a Gaussian roll-off below ``smallest_scale_cells``.
    """
    ny, nx = shape
    ky = np.fft.fftfreq(ny)[:, None]
    kx = np.fft.rfftfreq(nx)[None, :]
    k = np.hypot(kx, ky)
    k[0, 0] = 1.0
    amplitude = k ** (-exponent) * np.exp(-((k * smallest_scale_cells) ** 2))
    amplitude[0, 0] = 0.0
    spectrum = rng.normal(size=(ny, nx // 2 + 1)) + 1j * rng.normal(size=(ny, nx // 2 + 1))
    field = np.fft.irfft2(amplitude * spectrum, s=shape)
    return (field - field.mean()) / field.std()


def _layout(shape, transform):
    """The valley-and-ridge skeleton on a grid; it does not depend on the roughness seed.

    Returns
    -------
    dict of ndarray
        ``xk``, ``yk`` cell centres (km); ``valley`` index into ``_VALLEYS`` of
        the nearest valley floor; ``nearest_floor_z`` and ``nearest_ridge_z``
        the elevation of the nearest floor and crest (m); ``d_floor`` the
        distance to the nearest floor (m); ``fraction`` the wall fraction F
        (0 on floors, 1 on crests).
    """
    xk, yk = _cell_centres_km(shape, transform)
    rng = np.random.default_rng(_LAYOUT_SEED)
    xw = xk + _WARP_KM * _fractal_noise(shape, rng, exponent=3.0)
    yw = yk + _WARP_KM * _fractal_noise(shape, rng, exponent=3.0)
    cell_m = abs(transform.a)
    half_diagonal_m = 0.5 * cell_m * np.sqrt(2.0)

    floor = np.zeros(shape, bool)
    floor_z = np.zeros(shape)
    label = np.full(shape, -1)
    for k, vertices in enumerate(_VALLEYS.values()):
        d, (z, half_width) = _polyline_nearest(xw, yw, vertices)
        on = d <= np.maximum(half_width, half_diagonal_m)
        floor |= on
        floor_z = np.where(on, z, floor_z)
        label = np.where(on, k, label)
    ridge = np.zeros(shape, bool)
    ridge_z = np.zeros(shape)
    for vertices in _RIDGES:
        d, (z,) = _polyline_nearest(xw, yw, vertices)
        on = (d <= half_diagonal_m) & ~floor
        ridge |= on
        ridge_z = np.where(on, z, ridge_z)

    d_floor, (iy, ix) = ndimage.distance_transform_edt(~floor, sampling=cell_m, return_indices=True)
    d_ridge, (jy, jx) = ndimage.distance_transform_edt(~ridge, sampling=cell_m, return_indices=True)
    return {
        "xk": xk,
        "yk": yk,
        "valley": label[iy, ix],
        "nearest_floor_z": floor_z[iy, ix],
        "nearest_ridge_z": ridge_z[jy, jx],
        "d_floor": d_floor,
        "fraction": d_floor / (d_floor + d_ridge),
    }


def _floor_surface(layout):
    """Floor elevation of the nearest valley (m), blended where the nearest valley changes."""
    return ndimage.gaussian_filter(layout["nearest_floor_z"], _BLEND_CELLS, mode="nearest")


def _knob(xk, yk):
    """Height (m) of the rock knob that makes the nunatak in the main glacier's upper basin."""
    x0, y0, height, radius = _NUNATAK
    return height * np.exp(-((xk - x0) ** 2 + (yk - y0) ** 2) * 1e6 / (2.0 * radius**2))


def _ice_valleys(layout):
    """Cells in an ice-bearing valley above (or a little below) its glacier's terminus."""
    names = list(_VALLEYS)
    icy = np.zeros(layout["valley"].shape, bool)
    for valley, terminus_m in _GLACIERS.values():
        icy |= (layout["valley"] == names.index(valley)) & (layout["nearest_floor_z"] > terminus_m - 150.0)
    return icy


def make_dem(seed: int = DEFAULT_SEED) -> tuple[np.ndarray, Affine]:
    """Procedural elevation model of the invented Seldra catchment.

    Parameters
    ----------
    seed : int
        Seed of the random roughness; the same seed gives the same DEM. The
        layout of valleys and ridges is the same for every seed.

    Returns
    -------
    elevation : ndarray (300, 320) float32
        Surface elevation, m a.s.l., between about 1200 and 3480 m; NaN on a
        ragged triangle of nodata cells in the north-west corner (as if outside
        a survey's footprint).
    transform : affine.Affine
        Pixel-to-CRS transform in :data:`DEM_CRS` (30 m cells).
    """
    rng = np.random.default_rng(seed)
    transform = dem_transform()
    layout = _layout(DEM_SHAPE, transform)
    z_floor = _floor_surface(layout)
    z_crest = ndimage.gaussian_filter(layout["nearest_ridge_z"], _BLEND_CELLS, mode="nearest")
    fraction = layout["fraction"]
    z = z_floor + (z_crest - z_floor) * fraction**_WALL_EXPONENT

    # roughness on walls and rock; the ice-filled valley floors stay smooth
    knob = _knob(layout["xk"], layout["yk"])
    rough = np.clip(fraction / 0.4, 0.0, 1.0)
    rough = np.maximum(rough, 1.0 - ndimage.gaussian_filter(_ice_valleys(layout).astype(float), 3.0))
    rough = np.maximum(rough, np.clip(knob / 60.0, 0.0, 1.0))
    z += (4.0 + 30.0 * rough) * _fractal_noise(DEM_SHAPE, rng, exponent=1.6)
    # gullies and spurs on the walls, summits and cols along the crests
    ridged = 1.0 - np.abs(_fractal_noise(DEM_SHAPE, rng, exponent=2.2, smallest_scale_cells=5.0))
    z += 110.0 * rough * (ridged - ridged.mean())
    z += 50.0 * fraction**2 * _fractal_noise(DEM_SHAPE, rng, exponent=3.0)
    z += knob
    z = ndimage.gaussian_filter(z, 1.0, mode="nearest")
    above = z > _CEILING_KNEE_M
    z[above] = _CEILING_KNEE_M + _CEILING_ROOM_M * np.tanh((z[above] - _CEILING_KNEE_M) / _CEILING_ROOM_M)

    # ragged nodata triangle in the north-west corner
    ny, nx = DEM_SHAPE
    row, col = np.mgrid[0:ny, 0:nx]
    edge = 28.0 + 4.0 * np.sin(row / 3.0) + rng.integers(0, 3, size=(ny, 1))
    z[row + col < edge] = np.nan
    return z.astype(np.float32), transform


# ---------------------------------------------------------------------------
# glacier outlines


def _slope_deg(elevation, cell_m):
    """Slope (deg) by central differences; used only to keep steep rock out of the ice masks."""
    filled = np.where(np.isfinite(elevation), elevation, np.nanmean(elevation))
    gy, gx = np.gradient(filled, cell_m)
    return np.degrees(np.arctan(np.hypot(gx, gy)))


def _largest_component(mask):
    parts, n = ndimage.label(mask)
    if n <= 1:
        return mask
    sizes = ndimage.sum(mask, parts, index=np.arange(1, n + 1))
    return parts == (1 + int(np.argmax(sizes)))


def glacier_masks(elevation, transform) -> dict[str, np.ndarray]:
    """Ice masks of the demo glaciers on the DEM grid.

    A cell is ice where it lies in the glacier's valley (by nearest valley
    floor) above the glacier's terminus, no higher on the valley wall than
    ``30 m + 0.8 x`` (``x``: height of the nearest floor above the terminus) and
    no further from the floor than ``60 m + 2 x``, so that the tongue tapers,
    below the upper third of the walls, on slopes under 40 deg, on valid cells
    and off the nunatak's rock knob.

    Parameters
    ----------
    elevation : ndarray (ny, nx)
        The demo DEM, m (NaN for nodata).
    transform : affine.Affine
        Its pixel-to-CRS transform (north up, square cells).

    Returns
    -------
    dict of str to ndarray (ny, nx) bool
        One mask per name in :data:`GLACIER_NAMES`.
    """
    elevation = np.asarray(elevation, dtype=float)
    layout = _layout(elevation.shape, transform)
    slope = _slope_deg(elevation, abs(transform.a))
    height_above_floor_m = elevation - _floor_surface(layout)
    rock = (_knob(layout["xk"], layout["yk"]) > 40.0) | ~np.isfinite(elevation)
    names = list(_VALLEYS)
    masks = {}
    for glacier, (valley, terminus_m) in _GLACIERS.items():
        above_terminus_m = layout["nearest_floor_z"] - terminus_m
        with np.errstate(invalid="ignore"):
            ice = (
                (layout["valley"] == names.index(valley))
                & (above_terminus_m >= 0.0)
                & (elevation >= terminus_m)
                & (height_above_floor_m < 30.0 + 0.8 * above_terminus_m)
                & (layout["d_floor"] < 60.0 + 2.0 * above_terminus_m)
                & (layout["fraction"] < 0.65)
                & (slope < _MAX_GLACIER_SLOPE_DEG)
                & ~rock
            )
        masks[glacier] = _largest_component(ndimage.binary_opening(ice, iterations=2))
    return masks


def _trace(mask, transform):
    """Largest polygon (with its larger holes) around a boolean mask, smoothed, in CRS units."""
    from rasterio.features import shapes

    refine = _OUTLINE_REFINE
    soft = ndimage.gaussian_filter(mask.astype(float), 1.0)
    fine = ndimage.zoom(soft, refine, order=1, grid_mode=True, mode="nearest") >= 0.5
    t = transform
    fine_transform = Affine(t.a / refine, t.b / refine, t.c, t.d / refine, t.e / refine, t.f)
    pieces = [
        shapely.geometry.shape(geometry)
        for geometry, value in shapes(fine.astype(np.uint8), mask=fine, transform=fine_transform)
        if value == 1
    ]
    polygon = max(pieces, key=lambda p: p.area)
    holes = [ring for ring in polygon.interiors if Polygon(ring).area >= _MIN_HOLE_M2]
    return Polygon(polygon.exterior, holes).simplify(_OUTLINE_SIMPLIFY_M, preserve_topology=True)


def make_outlines(elevation, transform) -> list[tuple[str, Polygon]]:
    """Outlines of the demo glaciers, in the DEM's CRS.

    The masks of :func:`glacier_masks` are smoothed (Gaussian, one cell),
    traced on a four-times finer grid with ``rasterio.features.shapes`` and
    simplified (Douglas-Peucker, 8 m), so that edges do not follow cell lines.
    Holes under 0.02 km2 are filled; the nunatak in ``north_seldra`` stays a
    hole. The polygons are valid, do not overlap and have counter-clockwise
    exteriors.

    Parameters
    ----------
    elevation : ndarray (ny, nx)
        The demo DEM, m (NaN for nodata), as from :func:`make_dem`.
    transform : affine.Affine
        Its pixel-to-CRS transform.

    Returns
    -------
    list of (str, shapely.Polygon)
        ``(name, polygon)`` for each name in :data:`GLACIER_NAMES`, coordinates in m.
    """
    outlines = []
    for name, mask in glacier_masks(elevation, transform).items():
        polygon = _trace(mask, transform)
        for _, other in outlines:  # guard against any touching margins
            polygon = polygon.difference(other)
        if polygon.geom_type != "Polygon":
            polygon = max(getattr(polygon, "geoms", [polygon]), key=lambda p: p.area)
        outlines.append((name, orient(polygon, sign=1.0)))
    return outlines


# ---------------------------------------------------------------------------
# station record


def _smooth_annual_cycle(monthly, doy, n_harmonics=3):
    """Smooth periodic curve through twelve monthly means, evaluated on days of the year.

    Least-squares fit of ``n_harmonics`` annual harmonics to the monthly values
    placed at mid-month (harmonic analysis; Wilks 2011, Statistical Methods in
    the Atmospheric Sciences, 3rd ed., Academic Press, section 9.4).
    """
    mid_month = np.array([16.0, 45.5, 75.0, 105.5, 136.0, 166.5, 197.0, 228.0, 258.5, 289.0, 319.5, 350.0])

    def basis(day):
        angle = 2.0 * np.pi * np.asarray(day, dtype=float)[:, None] / 365.25 * np.arange(1, n_harmonics + 1)
        return np.hstack([np.ones((angle.shape[0], 1)), np.cos(angle), np.sin(angle)])

    coefficients, *_ = np.linalg.lstsq(basis(mid_month), np.asarray(monthly, dtype=float), rcond=None)
    return basis(doy) @ coefficients


def make_station_record(seed: int = DEFAULT_SEED, start: str = "2016-10-01", end: str = "2024-09-30") -> pd.DataFrame:
    """Invented daily record of the valley station "Seldra Dam" (1200 m a.s.l.).

    Temperature: a smooth seasonal cycle through invented monthly means, plus
    AR(1) day-to-day anomalies (first-order autoregression; Wilks 2011,
    Statistical Methods in the Atmospheric Sciences, 3rd ed., section 9.3),
    plus one winter and one summer anomaly per balance year (warm and cool
    summers, mild and cold winters), plus a small warming trend; wet days are
    a little milder in winter and cooler in summer. Precipitation: occurrence
    from a two-state first-order Markov chain and wet-day amounts from a gamma
    distribution (Richardson 1981, Water Resources Research 17(1), 182-190),
    both seasonally varying, with one winter and one summer multiplier per
    balance year (snowy and dry winters). The year-by-year anomalies are
    centred, so that the record's period keeps the invented climatology.

    Parameters
    ----------
    seed : int
        Seed of the random generator; the same seed gives the same record.
    start, end : str
        First and last day, ISO dates, both included.

    Returns
    -------
    pandas.DataFrame
        Columns ``date`` (str, YYYY-MM-DD), ``temperature_c`` (daily mean air
        temperature, deg C) and ``precipitation_mm`` (daily total, mm, >= 0),
        one row per day without gaps, values rounded to 0.1.
    """
    dates = pd.date_range(start, end, freq="D")
    if dates.size == 0:
        raise InputError(f"The demo station record from {start} to {end} is empty; give an end after the start.")
    n = dates.size
    rng = np.random.default_rng(seed)
    doy = dates.day_of_year.to_numpy(dtype=float)
    summer = 0.5 * (1.0 + np.cos(2.0 * np.pi * (doy - _T_WARMEST_DOY) / 365.25))  # 1 late July, 0 mid January

    def seasonal(pair):
        return pair[0] + (pair[1] - pair[0]) * summer

    balance_year = (dates.year + (dates.month >= 10)).to_numpy()
    years, year_index = np.unique(balance_year, return_inverse=True)

    def year_anomalies(sd):
        draws = rng.normal(0.0, sd, years.size)
        return (draws - draws.mean())[year_index]

    t_winter = year_anomalies(_T_YEAR_SD_K["winter"])
    t_summer = year_anomalies(_T_YEAR_SD_K["summer"])
    p_winter = np.exp(year_anomalies(_P_YEAR_SD["winter"]))
    p_summer = np.exp(year_anomalies(_P_YEAR_SD["summer"]))

    # precipitation occurrence: two-state Markov chain, then gamma amounts
    p01, p11 = seasonal(_P_WET_AFTER_DRY), seasonal(_P_WET_AFTER_WET)
    u = rng.random(n)
    wet = np.zeros(n, dtype=bool)
    previous = False
    for i in range(n):  # over the days of one station
        previous = bool(u[i] < (p11[i] if previous else p01[i]))
        wet[i] = previous
    mean_wet_mm = seasonal(_P_MEAN_WET_MM) * ((1.0 - summer) * p_winter + summer * p_summer)
    amount_mm = rng.gamma(_P_GAMMA_SHAPE, mean_wet_mm / _P_GAMMA_SHAPE)
    precipitation = np.where(wet, 0.1 + amount_mm, 0.0)

    # temperature: climatology + year anomalies + trend + AR(1) daily anomalies
    sd = seasonal(_T_SD_K)
    innovation = rng.normal(0.0, 1.0, n) * sd * np.sqrt(1.0 - _T_AR1**2)
    anomaly = np.empty(n)
    anomaly[0] = innovation[0] / np.sqrt(1.0 - _T_AR1**2)
    for i in range(1, n):  # recursive filter over the days of one station
        anomaly[i] = _T_AR1 * anomaly[i - 1] + innovation[i]
    elapsed_years = (dates - dates[0]).days.to_numpy() / 365.25
    wet_share = p01 / (1.0 - p11 + p01)  # stationary wet-day probability of the chain
    temperature = (
        _smooth_annual_cycle(_T_MONTHLY_C, doy)
        + (1.0 - summer) * t_winter
        + summer * t_summer
        + _T_TREND_K_PER_YEAR * (elapsed_years - elapsed_years.mean())
        + anomaly
        + seasonal(_WET_DAY_T_SHIFT_K) * (wet - wet_share)
    )
    return pd.DataFrame(
        {
            "date": dates.strftime("%Y-%m-%d"),
            "temperature_c": np.round(temperature, 1),
            "precipitation_mm": np.round(precipitation, 1),
        }
    )


# ---------------------------------------------------------------------------
# the one edge that writes files


def _write_outlines(path: Path, outlines):
    """GeoJSON per RFC 7946: longitude/latitude (EPSG:4326), no CRS member."""
    from pyogrio.raw import write
    from pyproj import Transformer

    to_lonlat = Transformer.from_crs(DEM_CRS, "EPSG:4326", always_xy=True)

    def project(coords):
        lon, lat = to_lonlat.transform(coords[:, 0], coords[:, 1])
        return np.column_stack([lon, lat])

    # densify first so that long straight edges stay true after reprojection
    geometries = [shapely.transform(shapely.segmentize(p, 20.0), project) for _, p in outlines]
    names = np.array([name for name, _ in outlines], dtype=object)
    write(
        str(path),
        geometry=shapely.to_wkb(geometries),
        field_data=[names],
        fields=["name"],
        driver="GeoJSON",
        geometry_type="Polygon",
        crs="EPSG:4326",
        layer="glaciers",
        layer_options={"RFC7946": "YES"},
    )


def write_demo_inputs(folder, seed: int = DEFAULT_SEED, config_text: str | None = None) -> dict[str, Path]:
    """Write the Seldra demo inputs into a folder.

    Files: ``dem.tif`` (GeoTIFF, float32, nodata -9999, tiled, DEFLATE,
    EPSG:32632, 30 m cells), ``station.csv`` (``date, temperature_c,
    precipitation_mm``, 2016-10-01 to 2024-09-30), ``glaciers.geojson``
    (RFC 7946 longitude/latitude polygons with a ``name`` property), and the
    invented observations ``stakes.csv`` and ``glacier_balances.csv`` (see
    :func:`write_demo_observations`), and ``demo.toml`` when ``config_text`` is given.
    The files are staged with :func:`firnline.outdir.staged_beside` and appear only
    when all are complete; the folder's other files are left alone, and a file of one
    of these names that is not byte-identical to firnline's demo file refuses the write.

    Parameters
    ----------
    folder : str or path-like
        Output folder; created if missing.
    seed : int
        Seed of the DEM roughness and of the station record.

    Returns
    -------
    dict of str to Path
        Paths under the keys ``dem``, ``station`` and ``glaciers``.
    """
    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise InputError(f"The demo folder {folder} is a file; give the path of a folder.")
    elevation, transform = make_dem(seed)
    outlines = make_outlines(elevation, transform)
    station = make_station_record(seed)
    names = {"dem": "dem.tif", "station": "station.csv", "glaciers": "glaciers.geojson"}
    with staged_beside(folder, "demo") as staging:
        write_geotiff(
            staging.path(names["dem"]), elevation, transform, DEM_CRS,
            descriptions=["surface elevation"], units="m",
            tags={
                "site": SITE_NAME,
                "content": "invented terrain of the fictional Seldra catchment, not a real place",
                "generator": f"firnline.demo.make_dem(seed={seed})",
            },
            nodata=NODATA,
        )
        write_csv(staging.path(names["station"]), station, float_format="%.1f")
        _write_outlines(staging.path(names["glaciers"]), outlines)
        names.update(write_demo_observations(staging, seed))
        if config_text is not None:
            staging.path("demo.toml").write_text(config_text, encoding="utf-8")
            names["config"] = "demo.toml"
    return {key: folder / name for key, name in names.items()}


# ----------------------------------------------------------------------------
# the demo config, written from rows: the model parameters' rows come from the
# registry (firnline.parameters), so their defaults and comments are declared once.
# configs/demo.toml is the same text with paths into ../demo_dem/.
# ----------------------------------------------------------------------------

_HEADER = ("firnline demo: the invented Seldra catchment (fictional; all data are made up).",
           'Every key below shows its default value unless marked "demo value".',
           "Results are model estimates; see the caution in README.md.")
_CALIBRATION_HEADER = (
    "firnline demo calibration: the invented Seldra catchment (fictional; all data are made up).",
    "The keys of configs/demo.toml plus [observations] and [calibration]; run",
    "    firnline calibrate configs/demo_calibrate.toml",
    "then run the fitted model with `firnline run out/calibrate/calibrated.toml`.",
    *_HEADER[1:])

class _Commented(str):
    """A TOML value shown commented out (an optional key without a default value to show)."""


# (section, key, value, comment); "{inputs}" and "{output_dir}" mark the values
# demo_config_text sets; key "*": the section's model parameters from the registry.
_ROWS = (
    ("site", "name", "Seldra catchment", 'demo value (default "unnamed site")'),
    ("dem", "path", "{inputs}dem.tif", "demo value (required): any raster rasterio reads, elevations in m"),
    ("glaciers", "outlines", "{inputs}glaciers.geojson",
     "demo value (optional section): GeoJSON, GeoPackage or Shapefile"),
    ("glaciers", "id_field", "name", 'default "name"'),
    ("glaciers", "layer", _Commented('"outlines"'), "GeoPackage layer; default: the first layer"),
    ("climate", "station_file", "{inputs}station.csv",
     "demo value: one station (exactly one of station_file, stations, grid_file)"),
    ("climate", "station_elevation_m", STATION_ELEVATION_M,
     "demo value (required with station_file): the Seldra Dam station"),
    ("climate", "stations", _Commented('"stations.csv"'),
     "several stations: station, x, y, elevation_m, file (configs/demo_stations.toml)"),
    ("climate", "stations_crs", _Commented('"EPSG:32632"'), "default: the DEM's CRS (stations)"),
    ("climate", "idw_power", _Commented("2.0"), "default: inverse-distance power (stations)"),
    ("climate", "lapse_rate_from_stations", _Commented("false"),
     "default: regress each day's lapse rate on >= 3 stations"),
    ("climate", "grid_file", _Commented('"forcing.nc"'), "gridded NetCDF-CF forcing (configs/demo_grid.toml)"),
    ("climate", "date_column", "date", "default"),
    ("climate", "temperature_column", "temperature_c", "default: daily mean air temperature, deg C"),
    ("climate", "precipitation_column", "precipitation_mm", "default: daily total, mm"),
    ("climate", "start", _Commented('"2016-10-01"'), "default: the whole record"),
    ("climate", "end", _Commented('"2024-09-30"'), ""),
    ("downscaling", "*", "", ""),
    ("melt", "method", "degree-day", 'default; or "radiation"'),
    ("melt", "*", "", ""),
    ("snow", "redistribution", "gravitational", 'default: snow slides off steep slopes; or "none"'),
    ("snow", "refreezing", "cold-content", 'default: rain and meltwater held and refrozen in the pack; or "none"'),
    ("snow", "firn_years", 5, "default: firn older than this many balance years becomes glacier ice (0: no firn)"),
    ("snow", "spinup_years", 5, "default: balance years cycled before the first modelled year (0: empty start)"),
    ("snow", "*", "", ""),
    ("runoff", "catchment", _Commented('"catchment.geojson"'),
     "default: every valid DEM cell; or polygons (any vector format and CRS)"),
    ("runoff", "layer", _Commented('"catchment"'), "layer of a multi-layer vector file; default: the first layer"),
    ("runoff", "*", "", ""),
    ("balance", "year_start", "10-01",
     "default: the balance year starts 1 October, labelled by the year it ends in"),
    ("balance", "winter_end", "04-30", "default: fixed-date winter 1 October .. 30 April"),
    ("balance", "band_width_m", 50, "default: elevation band width for profiles and the ELA"),
    ("output", "dir", "{output_dir}", "{output_comment}"),
    ("radiation", "time_step_minutes", 15, "default"),
    ("radiation", "horizon_sectors", 72, "default"),
    ("radiation", "horizon_distance_m", 20000, "default"),
    ("radiation", "cache_dir", ".firnline_cache", "default, relative to this file"),
    ("radiation", "write_horizons", False, "default: also write horizon.tif with `firnline terrain`"),
    ("compute", "tile_size", 2048, "default: cells along a unit's side (a DEM smaller than one unit is one unit)"),
    ("compute", "workers", 2, "default: dask worker processes of the local cluster"),
    ("compute", "scheduler", "local", 'default; or the address of a dask.distributed scheduler, "tcp://host:8786"'),
    ("compute", "cells", "all", 'default; or "glaciers": the glacier cells and those within glacier_buffer_m'),
    ("compute", "glacier_buffer_m", 500, "default: with cells = \"glaciers\""),
)

_CALIBRATION_ROWS = (
    ("observations", "point_balances", "{inputs}stakes.csv",
     "demo value: invented stake readings (annual, winter) and snow probing"),
    ("observations", "glacier_balances", "{inputs}glacier_balances.csv",
     "demo value: invented geodetic balances (dh_m) of the three glaciers"),
    ("observations", "points_crs", _Commented('"EPSG:32632"'), "default: the DEM's CRS"),
    ("observations", "discharge", "{inputs}discharge.csv",
     "demo value: invented daily discharge at the catchment outlet (date, discharge_m3s; gaps empty)"),
    ("calibration", "parameters", ["ddf_snow_mm_per_day_k", "ddf_ice_mm_per_day_k", "storage_days_ice"],
     "demo value (required)"),
    ("calibration", "bounds", {"ddf_snow_mm_per_day_k": [1.0, 12.0], "ddf_ice_mm_per_day_k": [2.0, 20.0],
                               "storage_days_ice": [0.05, 3.0]},
     "demo value (default: the registry's bounds, firnline.parameters)"),
    ("calibration", "discharge_sigma_pct", 10.0,
     "demo value (default 15): stated error of a day's gauged discharge, % of the flow level"),
    ("calibration", "ratios", _Commented('{ ddf_ice_mm_per_day_k = ["ddf_snow_mm_per_day_k", 2.0] }'),
     "optional: tie a key to another instead of fitting it"),
)


def _toml_value(value) -> str:
    """One value as TOML (tomli-w), arrays and tables on one line."""
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{k} = {_toml_value(v)}" for k, v in value.items()) + " }"
    return tomli_w.dumps({"v": value})[4:].strip()


def _rows(output_dir: str | None, calibration: bool):
    from . import parameters

    for section, key, value, comment in _ROWS + (_CALIBRATION_ROWS if calibration else ()):
        if key == "*":   # the model parameters of the section, from the registry
            for p in parameters.in_section(section):
                default = p.default[0] if p.kind == "monthly" and len(p.default) == 1 else p.default
                methods = "" if p.methods == parameters.ALL_METHODS else f"; {', '.join(p.methods)} method"
                unit = f", {p.unit}" if p.unit != "1" else ""
                yield section, p.key, default, f"default: {p.description}{unit}{methods}"
            continue
        if value == "{output_dir}":
            value, comment = ((output_dir, 'demo value (default "out"), relative to this file') if output_dir
                              else ("out", "default, relative to this file"))
        yield section, key, value, comment


def demo_config_text(inputs_prefix: str = "", output_dir: str | None = None, calibration: bool = False) -> str:
    """The demo config, with ``inputs_prefix`` put before each input file name.

    ``output_dir`` sets ``[output] dir`` (marked as a demo value) when given;
    ``calibration`` adds the demo's ``[observations]`` and ``[calibration]`` sections.
    """
    lines = [f"# {h}" for h in (_CALIBRATION_HEADER if calibration else _HEADER)]
    section = None
    for sec, key, value, comment in _rows(output_dir, calibration):
        if sec != section:
            lines += ["", f"[{sec}]"]
            section = sec
        if isinstance(value, _Commented):
            row = f"# {key} = {value}"
        else:
            if isinstance(value, str):
                value = value.replace("{inputs}", inputs_prefix)
            row = f"{key} = {_toml_value(value)}"
        lines.append(f"{row:<41} # {comment}" if comment else row)
    return "\n".join(lines) + "\n"


def write_demo(folder) -> Path:
    """Write the demo inputs and ``demo.toml`` into ``folder``; return the config's path."""
    folder = Path(folder)
    path = write_demo_inputs(folder, config_text=demo_config_text())["config"]
    write_demo_climate(folder, configs=True)
    return path


def write_repo_config(path, calibration: bool = False) -> None:
    """Write ``configs/demo.toml`` (or, with ``calibration``, ``configs/demo_calibrate.toml``)
    of the source tree (inputs in ``../demo_dem/``)."""
    text = (demo_config_text("../demo_dem/", "../out/calibrate", calibration=True) if calibration
            else demo_config_text("../demo_dem/", output_dir="../out"))
    Path(path).write_text(text, encoding="utf-8")


# ----------------------------------------------------------------------------
# invented observations for calibration: stakes, snow probing, geodetic balances
# ----------------------------------------------------------------------------

DEMO_TRUE_FACTORS = {"ddf_snow_mm_per_day_k": 4.2, "ddf_ice_mm_per_day_k": 7.6}
"""The invented "true" degree-day factors (mm w.e. d-1 K-1) that make the demo observations;
``configs/demo_calibrate.toml`` starts from the defaults 3.0 and 6.0 and should find them again."""

DEMO_TRUE_STORAGE_DAYS = {"storage_days_ice": 0.3}
"""The invented "true" storage constant of the ice reservoir (d) that, with
:data:`DEMO_TRUE_FACTORS`, makes the demo's gauge record ``discharge.csv``: 7 h, inside the
4-16 h Hock and Noetzli (1997, Nordic Hydrology 28) give for ice (from memory) and unlike the
default 0.5 d; the other storage constants stay at their defaults."""

#: Spread of the invented gauge's multiplicative error (lognormal, sd of the log): daily gauged
#: discharges of mountain rivers are commonly uncertain by 5-20 % (common practice, from memory).
DEMO_DISCHARGE_NOISE = 0.10
#: The invented winter outage of the gauge (ice in the control section): first and last day.
DEMO_DISCHARGE_OUTAGE = ("2019-01-08", "2019-01-27")
#: Share of other days without a value (logger faults), invented.
DEMO_DISCHARGE_MISSING = 0.02

#: The true catchment discharge of the demo inputs, by their checksums (one model run per process).
_TRUE_DISCHARGE: dict = {}


def demo_true_discharge(folder) -> tuple[np.ndarray, np.ndarray]:
    """Daily routed discharge of the demo catchment (every valid DEM cell) for the "true"
    parameters (:data:`DEMO_TRUE_FACTORS`, :data:`DEMO_TRUE_STORAGE_DAYS`), m3 s-1.

    The demo model (``demo.toml`` on the inputs in ``folder``) is run once over the whole
    catchment; the result is kept for the rest of the process, keyed by the SHA-256 of the
    inputs, so that writing the demo again does not rerun it.

    Returns
    -------
    dates : ndarray datetime64[D]
    discharge_m3s : ndarray float64
    """
    import tomllib

    from .config import parse_config
    from .grid import file_checksum
    from .model import prepare, runoff_of, simulate
    from .runoff import CATCHMENT

    folder = Path(folder)
    key = (tuple(file_checksum(folder / n) for n in ("dem.tif", "station.csv", "glaciers.geojson")),
           demo_config_text(), tuple(sorted({**DEMO_TRUE_FACTORS, **DEMO_TRUE_STORAGE_DAYS}.items())))
    if key not in _TRUE_DISCHARGE:
        config = parse_config(tomllib.loads(demo_config_text()), folder).with_values(
            **DEMO_TRUE_FACTORS, **DEMO_TRUE_STORAGE_DAYS)
        setup = prepare(config)
        series, _ = runoff_of(setup, config, simulate(setup, config), 0)
        _TRUE_DISCHARGE[key] = (series.dates.copy(), series.discharge_m3s[series.region(CATCHMENT)].copy())
    dates, q = _TRUE_DISCHARGE[key]
    return dates.copy(), q.copy()


def demo_gauge_record(dates, true_m3s, seed: int = DEFAULT_SEED) -> pd.DataFrame:
    """The invented gauge record (``date, discharge_m3s``) from the true discharge: seeded
    lognormal multiplicative noise q exp(s e - s^2 / 2), e standard normal, s =
    :data:`DEMO_DISCHARGE_NOISE` (the factor's mean is 1), rounded to 1 l s-1; empty on the days
    of :data:`DEMO_DISCHARGE_OUTAGE` and on a seeded :data:`DEMO_DISCHARGE_MISSING` share of days."""
    rng = np.random.default_rng(seed + 7)
    d = np.asarray(dates, dtype="datetime64[D]")
    q = np.asarray(true_m3s, dtype="float64")
    s = DEMO_DISCHARGE_NOISE
    observed = q * np.exp(s * rng.normal(0.0, 1.0, q.size) - 0.5 * s * s)
    gap = (rng.random(q.size) < DEMO_DISCHARGE_MISSING)
    gap |= (d >= np.datetime64(DEMO_DISCHARGE_OUTAGE[0])) & (d <= np.datetime64(DEMO_DISCHARGE_OUTAGE[1]))
    text = np.where(gap, "", np.char.mod("%.3f", np.round(observed, 3)))
    return pd.DataFrame({"date": d.astype(str), "discharge_m3s": text})


def write_demo_observations(staging, seed: int = DEFAULT_SEED, inputs=None) -> dict[str, str]:
    """Invent the observations of the demo glaciers and write them into a staging folder.

    The demo inputs (``dem.tif``, ``glaciers.geojson``, ``station.csv``) must already be
    in the folder ``inputs`` (default: ``staging.dir``, where :func:`write_demo_inputs`
    has just written them). The demo model (``demo.toml`` with :data:`DEMO_TRUE_FACTORS`) is
    run once on the cells observed, and seeded Gaussian noise at each row's stated
    sigma is added. Everything is invented:

    * ``stakes.csv`` (``[observations] point_balances``): stakes on each glacier (6 on
      north_seldra, 4 on kessel, 3 on tarn, spread over the glacier's elevation range,
      in its interior), read at an autumn and a spring visit each year for the balance
      years 2020-2024 (annual: autumn visit to the day before the next autumn visit,
      sigma 0.15 m w.e.; winter: autumn visit to the day before the spring visit,
      sigma 0.10 m w.e.); about one reading in twenty is missing (stake lost). Plus a
      snow-probing survey on 27 April 2022 (30 points on north_seldra, 10 on kessel,
      autumn 2021 visit to 26 April, sigma 0.12 m w.e.). Coordinates in EPSG:32632, 0.1 m; balances 0.01 m w.e.
    * ``glacier_balances.csv``: a geodetic balance of each glacier from two invented
      DEM surveys (2017-09-14 and 2023-09-20) as ``dh_m``, the mean elevation change;
      ``sigma_mwe`` is the part of the uncertainty from the elevation change, and the
      noise added includes the conversion uncertainty (850 +/- 60 kg m-3, Huss 2013,
      The Cryosphere 7, 877-887).

    Parameters
    ----------
    staging : firnline.outdir.FileStaging or Staging
        Where the two files are written (they appear when the staging commits).
    seed : int
        Seed of the stake sites, visit dates and noise.
    inputs : str or path-like, optional
        Folder holding the demo inputs.

    Returns
    -------
    dict
        ``{"stakes": "stakes.csv", "glacier_balances": "glacier_balances.csv"}``.
    """
    import datetime as dt
    import tomllib

    from .calibrate import build_operator, modelled_values
    from .config import parse_config
    from .model import prepare
    from .observations import (
        GEODETIC_DENSITY_KG_M3,
        GEODETIC_DENSITY_SIGMA_KG_M3,
        check_glacier_balances,
        check_point_balances,
        parse_table,
    )

    folder = Path(staging.dir if inputs is None else inputs)
    config = parse_config(tomllib.loads(demo_config_text()), folder).with_values(**DEMO_TRUE_FACTORS)
    setup = prepare(config)
    gl, grid = setup.glaciers, setup.grid
    ny, nx = grid.shape
    rng = np.random.default_rng(seed + 6)
    x_c, y_c = grid.cell_centres()

    def interior(g):
        """Cells wholly inside glacier g and their distance to its margin (m)."""
        full = np.zeros(ny * nx, bool)
        full[gl.cells[g][gl.fractions[g] > 0.999]] = True
        full = full.reshape(ny, nx)
        return full, ndimage.distance_transform_edt(full, sampling=abs(grid.transform.a))

    def where(flat):
        """An invented GPS position: the cell centre plus up to 10 m either way."""
        r, c = divmod(int(flat), nx)
        return round(float(x_c[c] + rng.uniform(-10, 10)), 1), round(float(y_c[r] + rng.uniform(-10, 10)), 1)

    def day(year, month, first_day, last_day):
        return dt.date(year, month, int(rng.integers(first_day, last_day + 1)))

    rows = []  # point_id, (x, y), start, end, sigma
    stake_counts = {"north_seldra": 6, "kessel": 4, "tarn": 3}
    years = range(2020, 2025)
    for g, name in enumerate(gl.names):
        full, dist = interior(g)
        z = grid.elevation
        cells = np.flatnonzero(full)
        zq = np.quantile(z.ravel()[cells], np.linspace(0.1, 0.9, stake_counts[name]))
        autumn = {y: day(y, 9, 12, 30) for y in range(years[0] - 1, years[-1] + 1)}
        spring = {y: day(y, 4, 22, 30) + dt.timedelta(days=int(rng.integers(0, 13))) for y in years}
        for k, zk in enumerate(zq):
            near = cells[np.abs(z.ravel()[cells] - zk) < 25.0]
            stake = near[np.argmax(dist.ravel()[near])]
            sid, xy = f"{name[:2].upper()}{k + 1:02d}", where(stake)
            for y in years:
                if rng.random() > 0.05:
                    rows.append((sid, xy, autumn[y - 1], autumn[y] - dt.timedelta(days=1), 0.15))
                if rng.random() > 0.05:
                    rows.append((sid, xy, autumn[y - 1], spring[y] - dt.timedelta(days=1), 0.10))
        probes = {"north_seldra": 30, "kessel": 10}.get(name, 0)
        if probes:
            deep = cells[dist.ravel()[cells] >= 60.0]
            for k, cell in enumerate(rng.choice(deep, probes, replace=False)):
                rows.append((f"{name[:2].upper()}-P{k + 1:02d}", where(cell), autumn[2021],
                             dt.date(2022, 4, 26), 0.12))
    stakes = pd.DataFrame({"point_id": [r[0] for r in rows], "x": [r[1][0] for r in rows],
                           "y": [r[1][1] for r in rows],
                           "start_date": [r[2].isoformat() for r in rows],
                           "end_date": [r[3].isoformat() for r in rows],
                           "balance_mwe": 0.0, "sigma_mwe": [r[4] for r in rows]})
    geodetic = pd.DataFrame({"glacier": list(gl.names), "start_date": "2017-09-14", "end_date": "2023-09-19",
                             "dh_m": 0.0,
                             "sigma_mwe": [{"north_seldra": 0.25, "kessel": 0.3}.get(n, 0.35) for n in gl.names]})
    points = check_point_balances(parse_table(stakes.to_csv(index=False), "stakes.csv"), setup.forcing.dates,
                                  grid.transform, grid.valid, grid.elevation, grid.crs, grid.crs)
    glaciers = check_glacier_balances(parse_table(geodetic.to_csv(index=False), "glacier_balances.csv"),
                                      setup.forcing.dates, list(gl.names))
    truth = modelled_values(setup, config, build_operator(setup, points, glaciers))
    n = len(stakes)
    stakes["balance_mwe"] = np.round(truth[:n] + rng.normal(0.0, 1.0, n) * stakes.sigma_mwe, 2)
    b_geo = truth[n:]
    sigma_geo = np.hypot(geodetic.sigma_mwe, np.abs(b_geo) * GEODETIC_DENSITY_SIGMA_KG_M3 / GEODETIC_DENSITY_KG_M3)
    observed = b_geo + rng.normal(0.0, 1.0, b_geo.size) * sigma_geo
    geodetic["dh_m"] = np.round(observed * 1000.0 / GEODETIC_DENSITY_KG_M3, 2)
    names = {"stakes": "stakes.csv", "glacier_balances": "glacier_balances.csv", "discharge": "discharge.csv"}
    stakes.to_csv(staging.path(names["stakes"]), index=False)
    geodetic[["glacier", "start_date", "end_date", "dh_m", "sigma_mwe"]].to_csv(
        staging.path(names["glacier_balances"]), index=False)
    demo_gauge_record(*demo_true_discharge(folder), seed).to_csv(staging.path(names["discharge"]), index=False)
    return names


def regenerate_observations(folder) -> dict[str, Path]:
    """Rewrite the invented observations of :func:`write_demo_observations` in a folder that
    already holds the demo inputs (``demo_dem`` of the source tree), leaving the inputs as they
    are: the files are written by the generator beside the folder and moved in when all are
    complete. Returns the paths written."""
    import shutil
    import tempfile

    from .outputs import staged

    folder = Path(folder)
    with tempfile.TemporaryDirectory(dir=folder.parent) as tmp:
        out = Path(tmp) / "observations"
        with staged(out) as st:
            names = write_demo_observations(st, inputs=folder)
        for name in names.values():
            os.replace(shutil.copyfile(out / name, Path(tmp) / name), folder / name)
    return {key: folder / name for key, name in names.items()}


# ----------------------------------------------------------------------------
# more climate for the demo: two more stations, a small gridded forcing file, and two
# monthly change scenarios (all invented)
# ----------------------------------------------------------------------------

DEMO_STATIONS = (
    # name, target elevation (m), near (row, column) of the DEM
    ("Kessel Hut", 2450.0, (78, 90)),
    ("Seldra Pass", 2750.0, (262, 200)),
)
"""The invented upper stations: a hut below the Kessel cirque and a col south of North Seldra."""

_TRUE_LAPSE_K_PER_M = (-0.0048, -0.0052, -0.0058, -0.0064, -0.0068, -0.0070,
                       -0.0069, -0.0067, -0.0063, -0.0058, -0.0052, -0.0048)
"""Invented monthly lapse rates (January first) of the Seldra valley: weaker in winter
(valley inversions), near the standard value in summer."""

_DEMO_GRADIENT_PER_M = 0.0004
"""Invented relative precipitation increase per metre used to make the upper records."""

DEMO_CHANGES = {
    # invented monthly changes (January first): warming K, precipitation change %
    "moderate": ((1.0, 1.0, 1.1, 1.2, 1.3, 1.5, 1.7, 1.8, 1.5, 1.3, 1.1, 1.0),
                 (8.0, 8.0, 6.0, 4.0, 0.0, -4.0, -7.0, -8.0, -5.0, 0.0, 4.0, 7.0)),
    "strong": ((2.6, 2.7, 2.8, 3.0, 3.3, 3.7, 4.1, 4.3, 3.8, 3.3, 2.9, 2.6),
               (14.0, 13.0, 10.0, 6.0, -2.0, -10.0, -16.0, -18.0, -12.0, -2.0, 6.0, 12.0)),
}
"""The two invented change scenarios of ``demo_dem/moderate.csv`` and ``demo_dem/strong.csv``."""

GRID_SPACING_M = 3000.0
"""Spacing of the invented gridded forcing (a coarse "downscaled reanalysis"), m."""


def _station_cell(elevation, target_m, near, exclude):
    """The off-glacier cell closest to ``near`` whose elevation lies within 25 m of ``target_m``."""
    rows, cols = np.nonzero(np.isfinite(elevation) & (np.abs(elevation - target_m) < 25.0) & ~exclude)
    k = int(np.argmin((rows - near[0]) ** 2 + (cols - near[1]) ** 2))
    return int(rows[k]), int(cols[k])


def make_station_network(seed: int = DEFAULT_SEED, base: pd.DataFrame | None = None):
    """The invented station table and the records of the two upper stations.

    The upper records are the valley record carried up with invented monthly lapse rates
    (:data:`_TRUE_LAPSE_K_PER_M`) and precipitation gradient, plus local AR(1) temperature
    noise (Wilks 2011, section 9.3) and log-normal noise on wet-day amounts, with two
    invented gaps (Kessel Hut without values 10-24 January 2019; Seldra Pass without rows
    1-9 July 2021, a logger failure). The valley station sits at the valley outlet.

    Returns
    -------
    table : DataFrame (station, x, y, elevation_m, file), EPSG:32632
    records : dict file name -> DataFrame (date, temperature_c, precipitation_mm)
    """
    base = make_station_record(seed) if base is None else base
    elevation, transform = make_dem(seed)
    masks = glacier_masks(elevation, transform)
    on_ice = np.zeros(elevation.shape, bool)
    for m in masks.values():
        on_ice |= m
    on_ice = ndimage.binary_dilation(on_ice, iterations=3)
    rng = np.random.default_rng(seed + 13)
    dates = pd.to_datetime(base["date"])
    month = dates.dt.month.to_numpy()
    t1 = base["temperature_c"].to_numpy(float)
    p1 = base["precipitation_mm"].to_numpy(float)
    lapse = np.asarray(_TRUE_LAPSE_K_PER_M)[month - 1]

    def xy(r, c):
        x, y = transform @ (c + 0.5, r + 0.5)
        return round(float(x), 1), round(float(y), 1)

    r0, c0 = np.unravel_index(np.nanargmin(np.where(np.isfinite(elevation), elevation, np.inf)), elevation.shape)
    rows = [(VALLEY_STATION, *xy(r0, c0), STATION_ELEVATION_M, "station.csv")]
    records = {}
    for k, (name, target, near) in enumerate(DEMO_STATIONS):
        r, c = _station_cell(elevation, target, near, on_ice)
        z = round(float(elevation[r, c]))
        dz = z - STATION_ELEVATION_M
        noise = np.empty(t1.size)
        e = rng.normal(0.0, 0.6 * np.sqrt(1 - 0.7 ** 2), t1.size)
        noise[0] = e[0]
        for i in range(1, t1.size):      # recursive filter over the days of one station
            noise[i] = 0.7 * noise[i - 1] + e[i]
        t = t1 + lapse * dz + noise
        wet = p1 > 0
        p = np.where(wet, p1 * (1 + _DEMO_GRADIENT_PER_M * dz) * np.exp(rng.normal(-0.03, 0.25, t1.size)), 0.0)
        df = pd.DataFrame({"date": base["date"], "temperature_c": np.round(t, 1),
                           "precipitation_mm": np.round(p, 1)})
        if k == 0:
            gap = (dates >= "2019-01-10") & (dates <= "2019-01-24")
            df = df.astype({"temperature_c": object, "precipitation_mm": object})
            df.loc[gap.to_numpy(), ["temperature_c", "precipitation_mm"]] = ""
        else:
            df = df[~((dates >= "2021-07-01") & (dates <= "2021-07-09")).to_numpy()]
        fname = name.lower().replace(" ", "_") + ".csv"
        records[fname] = df
        rows.append((name, *xy(r, c), float(z), fname))
    table = pd.DataFrame(rows, columns=["station", "x", "y", "elevation_m", "file"])
    return table, records


def make_grid_forcing(seed: int = DEFAULT_SEED, base: pd.DataFrame | None = None):
    """An invented small gridded forcing on a 3 km grid over the demo catchment (xarray Dataset).

    NetCDF-CF 1.8: ``tas`` (air_temperature, K), ``pr`` (precipitation_flux, kg m-2 s-1),
    ``orog`` (surface_altitude, m, a smooth invented coarse terrain), projected
    coordinates in EPSG:32632 with a ``crs`` grid mapping, daily time axis with bounds.
    The values are the valley record carried to each grid point with the invented
    monthly lapse rates and precipitation gradient, plus a weak west-east gradient and
    small point noise.
    """
    import xarray as xr
    from pyproj import CRS

    base = make_station_record(seed) if base is None else base
    rng = np.random.default_rng(seed + 17)
    x0, y0 = DEM_ORIGIN
    xs = np.arange(x0 - 1500.0, x0 + DEM_SHAPE[1] * CELL_SIZE_M + 3000.0, GRID_SPACING_M)
    ys = np.arange(y0 + 1500.0, y0 - DEM_SHAPE[0] * CELL_SIZE_M - 3000.0, -GRID_SPACING_M)
    X, Y = np.meshgrid(xs, ys)
    xc, yc = xs.mean(), ys.mean()
    orog = 1500.0 + 900.0 * np.exp(-(((X - xc) / 6000.0) ** 2 + ((Y - yc) / 5000.0) ** 2))
    dates = pd.to_datetime(base["date"])
    month = dates.dt.month.to_numpy()
    t1 = base["temperature_c"].to_numpy(float)
    p1 = base["precipitation_mm"].to_numpy(float)
    lapse = np.asarray(_TRUE_LAPSE_K_PER_M)[month - 1]
    dz = orog - STATION_ELEVATION_M
    tas = (t1[:, None, None] + lapse[:, None, None] * dz[None] + 0.4 * ((X - xc) / 6000.0)[None]
           + rng.normal(0.0, 0.3, (t1.size,) + X.shape))
    wet = 1.0 + 0.08 * ((xc - X) / 6000.0)        # a little wetter to the west (invented)
    pr = p1[:, None, None] * (1 + _DEMO_GRADIENT_PER_M * dz)[None] * wet[None]
    days = (dates - dates[0]).dt.days.to_numpy().astype("float64")
    gm = {"grid_mapping": "crs"}
    ds = xr.Dataset(
        {"tas": (("time", "y", "x"), (tas + 273.15).astype("float32"),
                 {"standard_name": "air_temperature", "units": "K", "long_name": "daily mean air temperature",
                  "cell_methods": "time: mean", **gm}),
         "pr": (("time", "y", "x"), (pr / 86400.0).astype("float32"),
                {"standard_name": "precipitation_flux", "units": "kg m-2 s-1",
                 "long_name": "daily mean precipitation rate", "cell_methods": "time: mean", **gm}),
         "orog": (("y", "x"), orog.astype("float32"),
                  {"standard_name": "surface_altitude", "units": "m", "long_name": "grid surface elevation", **gm}),
         "time_bnds": (("time", "nv"), np.column_stack([days, days + 1.0])),
         "crs": ((), np.int32(0), CRS(DEM_CRS).to_cf())},
        coords={"time": ("time", days + 0.5, {"standard_name": "time", "units": f"days since {base['date'].iloc[0]}",
                                              "calendar": "standard", "bounds": "time_bnds"}),
                "y": ("y", ys, {"standard_name": "projection_y_coordinate", "units": "m"}),
                "x": ("x", xs, {"standard_name": "projection_x_coordinate", "units": "m"})},
        attrs={"Conventions": "CF-1.8", "title": "Invented daily forcing of the fictional Seldra catchment",
               "source": f"firnline.demo.make_grid_forcing(seed={seed}); invented, not a real product"})
    return ds


def change_table(name: str) -> pd.DataFrame:
    """One of the invented monthly change scenarios (:data:`DEMO_CHANGES`) as a change table."""
    w, p = DEMO_CHANGES[name]
    return pd.DataFrame({"month": np.arange(1, 13), "warming_k": w, "precip_change_pct": p})


def write_demo_climate(folder, seed: int = DEFAULT_SEED, configs: bool = False) -> dict[str, Path]:
    """Write the demo's extra climate inputs into ``folder`` (next to :func:`write_demo_inputs`).

    Files: ``stations.csv`` (the three stations; the valley one is ``station.csv``),
    ``kessel_hut.csv``, ``seldra_pass.csv``, ``forcing.nc`` (gridded NetCDF-CF),
    ``moderate.csv`` and ``strong.csv`` (monthly changes), and with ``configs`` also
    ``demo_stations.toml`` and ``demo_grid.toml``. Staged: all or nothing.
    """
    folder = Path(folder)
    base = make_station_record(seed)
    table, records = make_station_network(seed, base)
    grid = make_grid_forcing(seed, base)
    names = {"stations": "stations.csv", "grid": "forcing.nc"}
    enc = {v: {"zlib": True, "complevel": 6} for v in ("tas", "pr")}
    with staged_beside(folder, "demo") as st:
        write_csv(st.path("stations.csv"), table, float_format="%.1f")
        for fname, df in records.items():
            df.to_csv(st.path(fname), index=False, float_format="%.1f")
            names[fname.removesuffix(".csv")] = fname
        grid.to_netcdf(st.path("forcing.nc"), engine="h5netcdf", encoding=enc)
        for name in DEMO_CHANGES:
            change_table(name).to_csv(st.path(f"{name}.csv"), index=False, float_format="%.1f")
            names[name] = f"{name}.csv"
        if configs:
            for mode in ("stations", "grid"):
                st.path(f"demo_{mode}.toml").write_text(climate_config_text(mode), encoding="utf-8")
                names[f"config_{mode}"] = f"demo_{mode}.toml"
    return {key: folder / name for key, name in names.items()}


def climate_config_text(mode: str, inputs_prefix: str = "", output_dir: str | None = None) -> str:
    """The demo config with ``[climate]`` set to several stations (``mode="stations"``) or the grid."""
    text = demo_config_text(inputs_prefix, output_dir)
    lines = []
    for line in text.splitlines():
        key = line.split("=")[0].strip().lstrip("# ").strip()
        if key in ("station_file", "station_elevation_m") and not line.startswith("#"):
            lines.append("# " + line.replace("# demo value: one station", "# one station")
                         .replace("# demo value (required with station_file): the Seldra Dam station",
                                  "# required with station_file"))
            continue
        if mode == "stations" and key == "stations":
            line = f'stations = "{inputs_prefix}stations.csv"'.ljust(42) + \
                "# demo value: Seldra Dam, Kessel Hut, Seldra Pass (invented)"
        elif mode == "stations" and key == "lapse_rate_from_stations":
            line = "lapse_rate_from_stations = true".ljust(42) + "# demo value (default false)"
        elif mode == "stations" and key == "idw_power":
            line = "idw_power = 2.0".ljust(42) + "# default: inverse-distance power (stations)"
        elif mode == "grid" and key == "grid_file":
            line = f'grid_file = "{inputs_prefix}forcing.nc"'.ljust(42) + "# demo value: invented 3 km gridded forcing"
        lines.append(line)
    head = ("# firnline demo with several stations (invented); see configs/demo.toml for every key.\n"
            if mode == "stations" else
            "# firnline demo with gridded NetCDF-CF forcing (invented); see configs/demo.toml for every key.\n")
    return head + "\n".join(lines) + "\n"


def write_repo_climate_configs(folder) -> None:
    """Write ``configs/demo_stations.toml`` and ``configs/demo_grid.toml`` of the source tree."""
    folder = Path(folder)
    for mode, name in (("stations", "demo_stations.toml"), ("grid", "demo_grid.toml")):
        (folder / name).write_text(climate_config_text(mode, "../demo_dem/", output_dir=f"../out/{mode}"),
                                   encoding="utf-8")
