"""Potential clear-sky direct radiation of every cell: a day-of-year climatology.

The direct beam on a cell follows Hock (1999), A distributed temperature-index
ice- and snowmelt model including potential direct solar radiation, Journal of
Glaciology 45(149), 101-111, after Oke (1987), Boundary Layer Climates, 2nd ed.:

    I = I0 (Rm/R)^2 psi^(P / (P0 cos Z)) cos(theta)

with I0 = 1367 W m-2 the solar constant, (Rm/R)^2 the eccentricity correction,
psi the clear-sky transmissivity at sea-level pressure, P the standard-atmosphere
pressure at the cell's elevation (ISO 2533), P0 = 101325 Pa, Z the solar zenith
angle and theta the angle of incidence on the sloping cell:

    cos(theta) = cos(beta) cos(Z) + sin(beta) sin(Z) cos(A - a)

(beta slope, a aspect, A sun azimuth; e.g. Iqbal, 1983, An Introduction to
Solar Radiation, ch. 1). I = 0 when the sun is below the cell's horizon in the
sun's direction (cast shadow), when cos(theta) <= 0 (self shadow) or at night.

Daily means
-----------
The daily mean (W m-2, averaged over 24 h including the night) is integrated
over the sun's path in local apparent solar time: the day is cut into
n = round(1440 / time_step_minutes) equal steps and the beam is evaluated at
the mid-point hour angle of each step. Declination and (Rm/R)^2 are taken at
local apparent noon of the day of year, placed in the common reference year
2022 (:func:`firnline.solar.day_parameters`), so a day of year means the same
thing in every year within a day of the sun's cycle; the station's daily record
needs no clock time, and day 366 (31 December of a leap year) continues into
1 January. Solar geometry from :mod:`firnline.solar` (Meeus, 1998).

Per cell, per tile
------------------
Latitude is used per cell (zenith, incidence and air mass). The grid's rotation
against true north (meridian convergence) is derived per cell from the latitude
and longitude arrays and turns each cell's slope normal to true north; slope
aspect and horizon sectors are grid azimuths (clockwise from the grid's up
direction, decreasing row index). Longitude only sets the UT instant of local
noon and, with the sun's azimuth for the horizon look-up and the convergence
used for that look-up, is taken per tile (at the centre cell): across a
catchment-sized DEM (tens of km) these vary by a fraction of a degree, far
below a horizon sector.

Horizon look-up
---------------
The sine of the horizon angle in the sun's direction is interpolated linearly
in azimuth between the two neighbouring sector centre lines of
:mod:`firnline.horizon`; the cell is in cast shadow when the sine of the sun's
elevation is not above it. The sines are held as uint16 codes
(:func:`firnline.horizon.quantised_sines`, a step of 1.5e-5), half the memory of
float32; against float32 sines this moves a daily mean at a day node by at most
one 15-minute step that grazes the horizon (9 W m-2 on the benchmark relief) and
annual means by at most 0.1 W m-2.

Memory
------
The grid is worked through in bands of rows of about ``KERNEL_BAND_CELLS``
cells; only the table itself is of the grid's size. :func:`compute_table` takes
the caller's horizons; :func:`table_from_terrain` makes them from the DEM band
of rows by band, as few bands as keep the table, one band's codes and the
working arrays under ``MEMORY_TARGET_BYTES``, and gives the same table bit for
bit. Measured with ``python benchmarks/radiation.py --sizes 1000 2000
--no-error`` (72 sectors, 20 km): 2000 x 2000 cells band by band in 5 bands,
22.8 s and 0.94 GB traced peak, against 16.3 s and 1.9 GB with all horizons at
once; 1000 x 1000 in one band, 3.6 s and 0.37 GB.

Compact storage
---------------
Daily means are computed exactly at day-of-year nodes every ``NODE_SPACING_DAYS``
(4) days, 93 nodes with both 1 and 366 among them, and linearly interpolated
between them; values are stored as uint16 in units of ``STORAGE_SCALE_W_M2``
(0.025 W m-2, top of range 1638 W m-2, quantisation error at most
0.0125 W m-2): 186 bytes per cell instead of 2928 for 366 float64 days.
Measured against the full-resolution day-by-day result on the 300 x 300
synthetic relief of ``benchmarks/radiation.py`` (25 m cells, 46.5 N,
psi = 0.75, 15-minute steps, 72 sectors, 20 km horizon), over all cells and
366 days: mean absolute error 0.29 W m-2, 99th percentile 4.0 W m-2, 99.9th
percentile 6.3 W m-2; monthly means within 3.4 W m-2 and annual means within
0.52 W m-2. The largest single-day error, 27 W m-2 (19 % of that cell's annual
mean), falls on the few days when the rising sun clears a ridge and a cell's
daily total jumps within two or three days, faster than the node spacing; a
single 15-minute step that changes from shade to sun moves a daily mean by up
to about 5 W m-2 in the full-resolution result itself. On flat ground the
table is within 0.5 % of FAO-56 Eq. 21 (psi = 1) between 60 S and 60 N.
Run ``python benchmarks/radiation.py`` to measure again.

Numerics
--------
The per-step work is done in float32 with a branch-free cell loop (numba,
parallel over rows) and a polynomial exp (relative error below 1e-4); the
result is within 0.001 W m-2 on average of a float64 evaluation, with the
odd 15-minute step flipping between sun and shade where the sun grazes a
horizon.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit, prange

from . import jit, solar  # noqa: F401  (jit: numba's threading layer and vector width, before compiling)
from .errors import InputError
from .horizon import SINE_LEVELS, SineBands, quantised_sines

#: Changes whenever the algorithm changes the numbers it returns (cache keys use it).
ALGORITHM_VERSION = "radiation-3"  # 2: horizon sines as uint16 codes; 3: whole blocks of cells per row

#: Spacing of the day-of-year nodes at which daily means are computed exactly.
NODE_SPACING_DAYS = 4

#: The radiation kernel works through the grid in bands of rows of at most about this many
#: valid cells (its float32 output buffer: n_nodes x this x 4 bytes, 12 MiB).
KERNEL_BAND_CELLS = 1 << 15

#: table_from_terrain keeps the table, one band's horizon sines and its working arrays under
#: this many bytes where the table leaves room (a 4e6-cell grid with 72 sectors: under 1 GB).
MEMORY_TARGET_BYTES = 950_000_000

#: ... and never holds less than this of horizon sine codes per band,
MIN_SINE_BAND_BYTES = 64 << 20

#: ... nor less than the table's bytes over this.
TABLE_PARTS_PER_BAND = 8

#: The radiation kernel's rows (and numpy's work on its per-cell constants) are padded with unlit
#: cells: a block of this many before each row, whole blocks after it, the last all padding. The
#: vectorised loops' first and last steps, which may run other code whose float32 rounding
#: differs (measured: the last cells of a row, and its first), then never take a cell, so a
#: cell's value does not depend on where its row starts or ends: any window of the DEM gives the
#: values of the whole DEM (what a unit of work computes, :func:`firnline.model.window_radiation`).
CELL_BLOCK = 64

#: W m-2 per stored uint16 unit.
STORAGE_SCALE_W_M2 = 0.025

#: Days in each month of the (common) reference year.
DAYS_PER_MONTH = np.array([31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31])


def day_nodes(spacing_days: int = NODE_SPACING_DAYS) -> np.ndarray:
    """Day-of-year nodes 1 .. 366, about ``spacing_days`` apart, both ends included.

    Parameters
    ----------
    spacing_days : int
        Target spacing, days.

    Returns
    -------
    numpy.ndarray of int64
        Increasing days of year, first 1 and last 366.
    """
    n = int(math.ceil(365.0 / spacing_days)) + 1
    return np.unique(np.round(np.linspace(1.0, 366.0, n)).astype(np.int64))


def _day_weights(nodes: np.ndarray, doys: np.ndarray) -> np.ndarray:
    """Weights (len(doys), len(nodes)) of the cyclic linear interpolation between nodes."""
    n = len(nodes)
    weights = np.zeros((len(doys), n))
    for i, d in enumerate(doys):
        lo, hi, w = _bracket_index(nodes, int(d))
        weights[i, lo] += 1.0 - w
        weights[i, hi] += w
    return weights


def _bracket_index(nodes: np.ndarray, doy: int) -> tuple[int, int, float]:
    """Indices (lo, hi) and weight of day ``doy`` between nodes.

    Cyclic with the period of the common reference year, 365 days: day 366
    (1 January of the following year) is day 1 of the next cycle.
    """
    if not 1 <= doy <= 366:
        raise ValueError(f"day of year must be 1..366, got {doy}")
    n = len(nodes)
    if n == 1:
        return 0, 0, 0.0
    i = int(np.searchsorted(nodes, doy, side="right")) - 1
    if 0 <= i < n - 1:
        span = nodes[i + 1] - nodes[i]
        return i, i + 1, float(doy - nodes[i]) / span
    if i == n - 1 and doy == nodes[-1]:
        return n - 2, n - 1, 1.0
    # wrap-around between the last node and the first node of the next cycle
    span = nodes[0] + 365 - nodes[-1]
    offset = doy - nodes[-1] if doy > nodes[-1] else doy + 365 - nodes[-1]
    return n - 1, 0, float(offset) / span


@dataclass(frozen=True, eq=False)
class RadiationTable:
    """Daily mean potential clear-sky direct radiation of the valid cells, day of year 1..366.

    Attributes
    ----------
    doy_nodes : numpy.ndarray of int
        Increasing day-of-year nodes at which ``values`` were computed; days
        between nodes (and, cyclically with a 365-day period, before the first
        or after the last) are linearly interpolated. The default nodes
        include 1 and 366.
    values : numpy.ndarray, shape (n_nodes, n_cells)
        Stored daily means (uint16 scaled by ``scale_w_m2``, or float32). The
        cells are those of ``valid.ravel()`` in C order.
    scale_w_m2 : float
        W m-2 per stored unit (1.0 for float storage).
    """

    doy_nodes: np.ndarray
    values: np.ndarray
    scale_w_m2: float

    @property
    def n_cells(self) -> int:
        """Number of cells (columns of ``values``)."""
        return int(self.values.shape[1])

    def bracket(self, doy: int) -> tuple[np.ndarray, np.ndarray, float]:
        """Rows (lo, hi) of ``values`` and weight w for a day of year.

        I(doy) = ((1 - w) * lo + w * hi) * scale_w_m2, W m-2.

        Parameters
        ----------
        doy : int
            Day of year, 1..366.

        Returns
        -------
        lo, hi : numpy.ndarray, shape (n_cells,)
            Rows of ``values`` (views, storage dtype).
        w : float
            Interpolation weight in [0, 1].
        """
        lo, hi, w = _bracket_index(self.doy_nodes, int(doy))
        return self.values[lo], self.values[hi], w

    def node_weights(self, doys) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Node indices and weights for many days at once (what the kernel reads).

        Parameters
        ----------
        doys : array of int
            Days of year, 1..366.

        Returns
        -------
        lo, hi : numpy.ndarray of int64
            Rows of ``values`` on either side of each day.
        w : numpy.ndarray of float64
            Weights, so that I = ((1 - w) values[lo] + w values[hi]) * scale_w_m2.
        """
        doys = np.asarray(doys, dtype=np.int64)
        uniq, inverse = np.unique(doys, return_inverse=True)
        table = np.array([_bracket_index(self.doy_nodes, int(d)) for d in uniq], dtype=np.float64)
        table = table.reshape(-1, 3)
        return (table[inverse, 0].astype(np.int64), table[inverse, 1].astype(np.int64),
                table[inverse, 2].copy())

    def subset(self, positions) -> "RadiationTable":
        """The table restricted to some cells (positions into the cell order)."""
        return RadiationTable(self.doy_nodes, np.ascontiguousarray(self.values[:, positions]),
                              self.scale_w_m2)

    def day(self, doy: int) -> np.ndarray:
        """Daily mean potential direct radiation of one day of year, W m-2, float32 (n_cells,)."""
        lo, hi, w = self.bracket(doy)
        out = lo.astype(np.float32) * np.float32((1.0 - w) * self.scale_w_m2)
        out += hi.astype(np.float32) * np.float32(w * self.scale_w_m2)
        return out

    def _mean_over(self, day_groups: list[np.ndarray]) -> np.ndarray:
        """Mean over each group of days, float32 (n_groups, n_cells), in bounded-memory chunks."""
        weights = np.stack([_day_weights(self.doy_nodes, g).mean(axis=0) for g in day_groups])
        weights = (weights * self.scale_w_m2).astype(np.float32)
        out = np.empty((len(day_groups), self.n_cells), dtype=np.float32)
        chunk = 1 << 16
        for s in range(0, self.n_cells, chunk):
            out[:, s : s + chunk] = weights @ self.values[:, s : s + chunk].astype(np.float32)
        return out

    def monthly_means(self) -> np.ndarray:
        """Mean daily potential direct radiation per calendar month, W m-2, float32 (12, n_cells).

        Months are those of the common reference year (days of year 1..365).
        """
        ends = np.cumsum(DAYS_PER_MONTH)
        groups = [np.arange(e - n + 1, e + 1) for e, n in zip(ends, DAYS_PER_MONTH)]
        return self._mean_over(groups)

    def annual_mean(self) -> np.ndarray:
        """Mean over days of year 1..365 of the daily potential direct radiation, W m-2, float32 (n_cells,)."""
        return self._mean_over([np.arange(1, 366)])[0]


def _grid_convergence_rad(lat_deg: np.ndarray, lon_deg: np.ndarray, columns: tuple | None = None) -> np.ndarray:
    """True azimuth of the grid's up direction (decreasing row), radians, per cell.

    From the change of latitude and longitude along the columns of the grid;
    0 for a north-up geographic grid, the meridian convergence for a
    projected one. ``columns``: (first, stop) of the grid's own columns (the rest is padding).
    """
    if lat_deg.shape[0] < 2:
        return np.zeros(lat_deg.shape)
    lon_unwrapped = np.unwrap(lon_deg, period=360.0, axis=0)
    d_north = -np.gradient(lat_deg, axis=0)
    d_east = -np.gradient(lon_unwrapped, axis=0) * np.cos(np.deg2rad(lat_deg))
    # where the coordinates do not change along the columns (a scalar latitude and
    # longitude) the grid is taken as north-up; + 0.0 also turns -0.0 into 0.0
    still = np.hypot(d_east, d_north) < 1e-12
    with np.errstate(invalid="ignore"):
        gamma = np.where(still, 0.0, np.arctan2(d_east + 0.0, d_north + 0.0))
    # next to cells without coordinates (NaN) use the typical value of the grid
    bad = ~np.isfinite(gamma)
    if bad.any():
        inside = slice(None) if columns is None else slice(*columns)
        good = gamma[:, inside][~bad[:, inside]]
        gamma[bad] = float(np.arctan2(np.sin(good).mean(), np.cos(good).mean())) if good.size else 0.0
    return gamma


@dataclass(frozen=True, eq=False)
class _Tile:
    """What the sun paths need of the whole grid, and the cell inputs read band by band."""

    valid: np.ndarray
    elevation_m: object  # float or (ny, nx) array, read by rows
    slope_deg: object
    aspect_deg: object
    lat_deg: object
    lon_deg: object
    log_psi: float  # ln(psi)
    row_offset: np.ndarray  # index in the cell list of each row's first valid cell (ny + 1 entries)
    lat_range_deg: tuple[float, float]
    lat_centre_deg: float
    lon_centre_deg: float
    convergence_centre_rad: float
    n_steps: int
    n_sectors: int


def _check_grid(value, shape, name):
    arr = np.asarray(value, dtype=np.float64)
    if arr.ndim == 0:
        return float(arr)
    if arr.shape != shape:
        raise ValueError(f"{name} must be a scalar or have the DEM's shape {shape}, got {arr.shape}")
    return arr


def _rows(value, r0: int, r1: int, nx: int) -> np.ndarray:
    """Rows r0 .. r1 - 1 of a grid input (a scalar becomes a block of that value)."""
    if isinstance(value, float):
        return np.full((r1 - r0, nx), value)
    return value[r0:r1]


def _block_rows(value, r0: int, r1: int, nx: int) -> np.ndarray:
    """Rows r0 .. r1 - 1 of a grid input as a C-contiguous float64 block, each row padded with zeros
    as :func:`_padded_width` (the row from column :data:`CELL_BLOCK`): numpy's vectorised loops
    then take every cell in their main loop, whose rounding does not depend on where a row starts
    or ends (that of a window of the DEM equals that of the whole DEM)."""
    out = np.zeros((r1 - r0, _padded_width(nx)))
    out[:, CELL_BLOCK:CELL_BLOCK + nx] = _rows(value, r0, r1, nx)
    return out


def _padded_width(nx: int) -> int:
    """A row of nx cells with a block of padding before it and whole blocks after it, the last
    all padding: the vectorised loops' first and last steps (which may run other code) never
    take a cell."""
    return CELL_BLOCK + nx + (-nx % CELL_BLOCK) + CELL_BLOCK


def _convergence_rows(tile: _Tile, r0: int, r1: int) -> np.ndarray:
    """Grid convergence of rows r0 .. r1 - 1 (padded as :func:`_block_rows`), from those rows and
    one row either side (the same values as over the whole grid: the derivative along the
    columns is local)."""
    ny, nx = tile.valid.shape
    h0, h1 = max(0, r0 - 1), min(ny, r1 + 1)
    gamma = _grid_convergence_rad(_block_rows(tile.lat_deg, h0, h1, nx), _block_rows(tile.lon_deg, h0, h1, nx),
                                  (CELL_BLOCK, CELL_BLOCK + nx))
    return gamma[r0 - h0 : r0 - h0 + (r1 - r0)]


def _tile(elevation_m, valid, slope_deg, aspect_deg, lat_deg, lon_deg, transmissivity,
          time_step_minutes, n_sectors, sun: SunConstants | None = None) -> _Tile:
    """The tile of a grid's inputs, with its own sun constants (:func:`sun_constants`) or ``sun``."""
    valid = np.asarray(valid, dtype=bool)
    shape = valid.shape
    if valid.ndim != 2:
        raise ValueError("valid must be a 2-D array")
    if not (0.0 < float(transmissivity) <= 1.0):
        raise InputError(f"the clear-sky transmissivity must be above 0 and at most 1, got "
                         f"{transmissivity}; use a value such as 0.75.")
    if not (0.0 < float(time_step_minutes) <= 1440.0):
        raise InputError(f"the integration time_step_minutes must be above 0 and at most 1440, got "
                         f"{time_step_minutes}; use a value such as 15.")
    grids = {name: _check_grid(v, shape, name) for name, v in (
        ("elevation_m", elevation_m), ("slope_deg", slope_deg), ("aspect_deg", aspect_deg),
        ("lat_deg", lat_deg), ("lon_deg", lon_deg))}
    for name in ("elevation_m", "lat_deg", "lon_deg"):
        v = grids[name]
        if not (math.isfinite(v) if isinstance(v, float) else np.isfinite(v[valid]).all()):
            raise ValueError(f"{name} must be finite on every valid cell")
    row_offset = np.concatenate([[0], np.cumsum(valid.sum(axis=1))]).astype(np.int64)
    lat, lon = grids["lat_deg"], grids["lon_deg"]
    n_valid = int(row_offset[-1])
    if n_valid:
        lat_range = ((lat, lat) if isinstance(lat, float) else
                     (float(np.min(lat, where=valid, initial=np.inf)),
                      float(np.max(lat, where=valid, initial=-np.inf))))
        # the middle valid cell in C order, found without listing every valid cell
        r = int(np.searchsorted(row_offset, n_valid // 2, side="right")) - 1
        centre = (r, int(np.flatnonzero(valid[r])[n_valid // 2 - row_offset[r]]))
    else:
        lat_range = ((lat, lat) if isinstance(lat, float) else (float(lat.min()), float(lat.max())))
        centre = (shape[0] // 2, shape[1] // 2)
    if sun is None:
        r, c = centre
        h0, h1 = max(0, r - 1), min(shape[0], r + 2)
        sun = sun_constants(lat_range, _rows(lat, h0, h1, shape[1])[:, c], _rows(lon, h0, h1, shape[1])[:, c], r - h0)
    return _Tile(valid=valid, elevation_m=grids["elevation_m"], slope_deg=grids["slope_deg"],
                 aspect_deg=grids["aspect_deg"], lat_deg=lat, lon_deg=lon,
                 log_psi=math.log(float(transmissivity)), row_offset=row_offset,
                 lat_range_deg=sun.lat_range_deg, lat_centre_deg=sun.lat_centre_deg,
                 lon_centre_deg=sun.lon_centre_deg, convergence_centre_rad=sun.convergence_centre_rad,
                 n_steps=max(1, int(round(1440.0 / float(time_step_minutes)))), n_sectors=int(n_sectors))


def _band_constants(tile: _Tile, r0: int, r1: int):
    """Per-cell constants of rows r0 .. r1 - 1, float32, zeros off the valid cells:
    sin and cos of latitude, the slope normal's east, north and up components
    (turned to true north), and ln(psi) P / P0; and the rows' valid mask. All padded as
    :func:`_block_rows`."""
    nx = tile.valid.shape[1]
    valid = np.zeros((r1 - r0, _padded_width(nx)), dtype=bool)
    valid[:, CELL_BLOCK:CELL_BLOCK + nx] = tile.valid[r0:r1]
    slope = _block_rows(tile.slope_deg, r0, r1, nx)
    aspect = _block_rows(tile.aspect_deg, r0, r1, nx)
    # flat cells (aspect NaN) and missing slopes count as slope 0
    flat = ~np.isfinite(slope) | ~np.isfinite(aspect)
    beta = np.where(flat, 0.0, np.deg2rad(slope))
    true_aspect = np.where(flat, 0.0, np.deg2rad(aspect)) + _convergence_rows(tile, r0, r1)
    phi = np.deg2rad(_block_rows(tile.lat_deg, r0, r1, nx))
    pressure_ratio = solar.standard_pressure_pa(_block_rows(tile.elevation_m, r0, r1, nx)) / solar.SEA_LEVEL_PRESSURE_PA

    def on_valid(a):
        return np.where(valid, a, 0.0).astype(np.float32)

    return (on_valid(np.sin(phi)), on_valid(np.cos(phi)),
            on_valid(np.sin(beta) * np.sin(true_aspect)), on_valid(np.sin(beta) * np.cos(true_aspect)),
            on_valid(np.cos(beta)), on_valid(tile.log_psi * pressure_ratio)), valid


def _sun_path(tile: _Tile, doy: int):
    """Per-step sun terms of one day, night steps (over the whole tile) dropped.

    Returns east component, sin(delta), cos(delta) cos(h), the two horizon
    sectors and weight of the sun's grid azimuth, and I0 (Rm/R)^2.
    """
    n = tile.n_steps
    dec, ecc = solar.day_parameters(doy, tile.lon_centre_deg)
    dec = float(dec)
    h = -np.pi + (np.arange(n) + 0.5) * (2.0 * np.pi / n)
    sin_dec = math.sin(dec)
    cos_dec_cos_h = math.cos(dec) * np.cos(h)
    east = -math.cos(dec) * np.sin(h)
    lat_lo, lat_hi = np.deg2rad(tile.lat_range_deg)
    # the sun is up somewhere in the tile iff it is up at one of the extreme latitudes
    up_lo = math.sin(lat_lo) * sin_dec + math.cos(lat_lo) * cos_dec_cos_h
    up_hi = math.sin(lat_hi) * sin_dec + math.cos(lat_hi) * cos_dec_cos_h
    day = (up_lo > 0.0) | (up_hi > 0.0)
    phi_c = math.radians(tile.lat_centre_deg)
    north_c = math.cos(phi_c) * sin_dec - math.sin(phi_c) * cos_dec_cos_h
    grid_azimuth = np.mod(np.arctan2(east, north_c) - tile.convergence_centre_rad, 2.0 * np.pi)
    n_sectors = tile.n_sectors
    position = grid_azimuth / (2.0 * np.pi) * n_sectors
    k0 = np.floor(position)
    weight = position - k0
    k0 = k0.astype(np.int64) % n_sectors
    k1 = (k0 + 1) % n_sectors
    i0 = solar.SOLAR_CONSTANT_W_M2 * float(ecc)
    return (east[day], sin_dec, cos_dec_cos_h[day], k0[day], k1[day], weight[day], i0)


def _sun_paths(tile: _Tile, doys) -> tuple:
    """The sun paths of several days, concatenated; day i owns steps start[i]:start[i + 1]."""
    paths = [_sun_path(tile, int(d)) for d in doys]
    start = np.zeros(len(paths) + 1, dtype=np.int64)
    start[1:] = np.cumsum([len(p[0]) for p in paths])

    def joined(i, dtype):
        return np.concatenate([p[i] for p in paths]).astype(dtype) if paths else np.empty(0, dtype)

    sin_dec = np.array([p[1] for p in paths], dtype=np.float64)
    scale = np.array([p[6] / tile.n_steps for p in paths], dtype=np.float64)
    return (joined(0, np.float64), joined(2, np.float64), joined(3, np.int64), joined(4, np.int64),
            joined(5, np.float64), start, sin_dec, scale)


@njit(cache=True, inline="always", fastmath=True)
def _exp_nonpositive(x):
    """exp(x) for float32 x <= 0, branch-free so that the cell loop vectorises.

    (Taylor series of exp(x / 1024) to the 4th power) squared ten times;
    relative error below 1e-4 (float32 rounding through the squarings).
    x is clamped at -80, where exp is 2e-35 and counts as 0.
    """
    y = max(x, np.float32(-80.0)) * np.float32(1.0 / 1024.0)
    c2, c3, c4 = np.float32(0.5), np.float32(1.0 / 6.0), np.float32(1.0 / 24.0)
    p = np.float32(1.0) + y * (np.float32(1.0) + y * (c2 + y * (c3 + y * c4)))
    for _ in range(10):
        p = p * p
    return p


@njit(cache=True, parallel=True, fastmath=True)
def _daily_mean_kernel(sin_lat, cos_lat, n_e, n_n, n_u, log_tr, sine_codes, valid, row_offset,
                       east, cdch, k0, k1, weight, start, sin_dec, scale, out):
    """Daily means of a band of rows on several days into out[day, cell].

    All arrays but the sun terms are the band's rows; ``row_offset[r]`` is the
    column of out of row r's first valid cell; ``sine_codes`` are the uint16
    horizon sines of :func:`firnline.horizon.quantised_sines`. Each row is done
    for all days at once while its horizon sines are in the cache. float32
    arithmetic; the cell loop is branch-free (a lit mask selects the beam) so
    that it vectorises; cells off the valid mask have a zero normal and are
    never lit.
    """
    n_rows, nx = sin_lat.shape
    n_days = start.shape[0] - 1
    zero = np.float32(0.0)
    one = np.float32(1.0)
    min_up = np.float32(1e-3)
    per_code = np.float32(1.0 / SINE_LEVELS)
    for r in prange(n_rows):
        acc = np.empty(nx, np.float32)
        for d in range(n_days):
            acc[:] = zero
            sd = np.float32(sin_dec[d])
            for s in range(start[d], start[d + 1]):
                e = np.float32(east[s])
                cd = np.float32(cdch[s])
                a = k0[s]
                b = k1[s]
                w = np.float32(weight[s])
                for c in range(nx):
                    up = sin_lat[r, c] * sd + cos_lat[r, c] * cd
                    north = cos_lat[r, c] * sd - sin_lat[r, c] * cd
                    cos_inc = n_e[r, c] * e + n_n[r, c] * north + n_u[r, c] * up
                    sin_hz = ((one - w) * np.float32(sine_codes[a, r, c])
                              + w * np.float32(sine_codes[b, r, c])) * per_code
                    lit = (up > zero) & (cos_inc > zero) & (up > sin_hz)
                    beam = _exp_nonpositive(log_tr[r, c] / max(up, min_up)) * cos_inc
                    acc[c] += beam if lit else zero
            j = row_offset[r]
            for c in range(nx):
                if valid[r, c]:
                    out[d, j] = acc[c] * scale[d]
                    j += 1


def _kernel_bands(tile: _Tile) -> list[tuple[int, int]]:
    """Bands of rows of at most about ``KERNEL_BAND_CELLS`` valid cells (at least one row),
    the same for every way of computing a grid, so each cell's constants come from the same rows."""
    ny = tile.valid.shape[0]
    edges = [0]
    counts = tile.row_offset
    while edges[-1] < ny:
        r0 = edges[-1]
        r1 = int(np.searchsorted(counts, counts[r0] + KERNEL_BAND_CELLS, side="right")) - 1
        edges.append(min(ny, max(r0 + 1, r1)))
    return list(zip(edges[:-1], edges[1:]))


def _band_means(tile: _Tile, paths: tuple, r0: int, r1: int, sine_codes: np.ndarray, out: np.ndarray) -> None:
    """Daily means (W m-2) of the valid cells of rows r0 .. r1 - 1 into out (n_days, their cells)."""
    east, cdch, k0, k1, weight, start, sin_dec, scale = paths
    constants, valid = _band_constants(tile, r0, r1)        # padded to whole blocks of cells
    nx = sine_codes.shape[2]
    sine_codes = np.pad(sine_codes, ((0, 0), (0, 0), (CELL_BLOCK, valid.shape[1] - nx - CELL_BLOCK)))
    row_offset = tile.row_offset[r0:r1] - tile.row_offset[r0]
    _daily_mean_kernel(*constants, sine_codes, valid, row_offset,
                       east, cdch, k0, k1, weight, start, sin_dec, scale, out)


def _given_horizons(elevation_m, valid, slope_deg, aspect_deg, horizon_rad, lat_deg, lon_deg,
                    transmissivity, time_step_minutes):
    """The tile of caller-supplied horizons (checked) and a function giving the sine codes of a
    band of rows."""
    horizon = np.asarray(horizon_rad)
    shape = np.shape(valid)
    if horizon.ndim != 3 or horizon.shape[1:] != shape or horizon.shape[0] < 1:
        raise ValueError(f"horizon_rad must have shape (n_sectors, {shape[0]}, {shape[1]}), got {horizon.shape}")
    tile = _tile(elevation_m, valid, slope_deg, aspect_deg, lat_deg, lon_deg, transmissivity,
                 time_step_minutes, horizon.shape[0])

    def codes(r0, r1):
        band = horizon[:, r0:r1]
        valid = tile.valid[r0:r1]
        if not np.isfinite(band[:, valid]).all():
            raise ValueError("horizon_rad must be finite on every valid cell")
        out = quantised_sines(band)
        out[:, ~valid] = 0
        return out

    return tile, codes


def compute_days(elevation_m, valid, slope_deg, aspect_deg, horizon_rad, lat_deg, lon_deg,
                 transmissivity, time_step_minutes, doys) -> np.ndarray:
    """Daily mean potential clear-sky direct radiation on chosen days, at full resolution.

    Same inputs and method as :func:`compute_table`; no interpolation or
    storage quantisation. Memory: the result is ``len(doys) x n_cells`` float32, so ask
    for few days on large grids.

    Parameters
    ----------
    doys : sequence of int
        Days of year, 1..366.

    Returns
    -------
    numpy.ndarray of float32, shape (len(doys), n_cells)
        Daily mean (24 h) direct radiation, W m-2.
    """
    tile, codes = _given_horizons(elevation_m, valid, slope_deg, aspect_deg, horizon_rad, lat_deg, lon_deg,
                                  transmissivity, time_step_minutes)
    doys = [int(d) for d in doys]
    for d in doys:
        if not 1 <= d <= 366:
            raise ValueError(f"day of year must be 1..366, got {d}")
    out = np.empty((len(doys), int(tile.row_offset[-1])), dtype=np.float32)
    paths = _sun_paths(tile, doys)
    for r0, r1 in _kernel_bands(tile):
        j0, j1 = int(tile.row_offset[r0]), int(tile.row_offset[r1])
        if j1 > j0:
            buffer = np.empty((len(doys), j1 - j0), dtype=np.float32)
            _band_means(tile, paths, r0, r1, codes(r0, r1), buffer)
            out[:, j0:j1] = buffer
    return out


def _table(tile: _Tile, groups: list[list[tuple[int, int]]], codes, progress) -> RadiationTable:
    """The table, computed group of kernel bands by group; ``codes(r0, r1)`` gives the horizon
    sine codes of a group's rows."""
    nodes = day_nodes()
    values = np.empty((len(nodes), int(tile.row_offset[-1])), dtype=np.uint16)
    top = np.float32(np.iinfo(np.uint16).max)
    paths = _sun_paths(tile, nodes)
    n_bands = sum(len(g) for g in groups)
    done = 0
    for group in groups:
        g0 = group[0][0]
        sines = codes(g0, group[-1][1])
        for r0, r1 in group:
            done += 1
            j0, j1 = int(tile.row_offset[r0]), int(tile.row_offset[r1])
            if j1 > j0:
                buffer = np.empty((len(nodes), j1 - j0), dtype=np.float32)
                # a C-contiguous copy: the kernel is then compiled (and vectorised) alike for
                # every grouping of bands, so the numbers do not depend on it
                codes_band = np.ascontiguousarray(sines[:, r0 - g0 : r1 - g0])
                _band_means(tile, paths, r0, r1, codes_band, buffer)
                np.multiply(buffer, np.float32(1.0 / STORAGE_SCALE_W_M2), out=buffer)
                np.rint(buffer, out=buffer)
                np.clip(buffer, 0.0, top, out=buffer)
                values[:, j0:j1] = buffer
            if progress is not None:
                progress("radiation row bands", done, n_bands)
        del sines
    return RadiationTable(doy_nodes=nodes, values=values, scale_w_m2=STORAGE_SCALE_W_M2)


def compute_table(elevation_m, valid, slope_deg, aspect_deg, horizon_rad, lat_deg, lon_deg,
                  transmissivity, time_step_minutes, progress=None) -> RadiationTable:
    """Day-of-year climatology of daily mean potential clear-sky direct radiation.

    Hock (1999), J. Glaciology 45(149), 101-111, after Oke (1987): see the
    module docstring for the formula, time convention, what is per cell and
    per tile, the horizon look-up and the measured storage error.
    :func:`table_from_terrain` gives the same table bit for bit from the DEM
    alone, without holding all horizons at once.

    Parameters
    ----------
    elevation_m : array-like, shape (ny, nx)
        Elevation, m (sets each cell's standard-atmosphere pressure, ISO 2533).
    valid : array-like of bool, shape (ny, nx)
        Cells to compute; the table covers ``valid.ravel()`` in C order.
    slope_deg : array-like, shape (ny, nx)
        Slope, degrees (NaN counts as flat).
    aspect_deg : array-like, shape (ny, nx)
        Direction the slope faces, degrees clockwise from grid north; NaN on
        flat cells (treated as slope 0).
    horizon_rad : array-like, shape (n_sectors, ny, nx)
        Horizon elevation angles, radians, from
        :func:`firnline.horizon.horizon_angles` (sector k at grid azimuth
        k * 360 / n_sectors); finite on valid cells. Their sines are used as
        :func:`firnline.horizon.quantised_sines` codes, band of rows by band.
    lat_deg, lon_deg : float or array-like, shape (ny, nx)
        Latitude (degrees north) and longitude (degrees east) of the cell
        centres. Latitude is used per cell; with 2-D arrays the grid's
        rotation against true north is derived per cell from both; longitude
        is used per tile (centre cell).
    transmissivity : float
        Clear-sky transmissivity psi at sea-level pressure, in (0, 1].
    time_step_minutes : float
        Step of the integration over the day, minutes (1440 / step rounded to
        whole steps per day).
    progress : callable(label, done, total), optional
        Called after each band of rows of about ``KERNEL_BAND_CELLS`` cells (all days of a
        band are done together), label ``"radiation row bands"`` (see :mod:`firnline.progress`).

    Returns
    -------
    RadiationTable
        Daily means over the full 24 hours of local apparent solar time
        (night included), W m-2, for the days of year 1..366 of the common
        reference year 2022 (day 366 = 1 January 2023), as
        uint16 values at day nodes every ``NODE_SPACING_DAYS`` days, scale
        ``STORAGE_SCALE_W_M2``. Memory: the table, n_nodes x n_cells x 2 bytes (186 MB for 10^6
        cells), plus working arrays of one band of rows.
    """
    tile, codes = _given_horizons(elevation_m, valid, slope_deg, aspect_deg, horizon_rad, lat_deg, lon_deg,
                                  transmissivity, time_step_minutes)
    return _table(tile, [[band] for band in _kernel_bands(tile)], codes, progress)


def _working_bytes(n_grid_cells: int) -> int:
    """What making the table holds besides the table and the horizons: the DEM's float64 copy
    with its mask, one kernel band's output buffer, and some slack."""
    return 9 * n_grid_cells + len(day_nodes()) * KERNEL_BAND_CELLS * 4 + (16 << 20)


def _table_bytes(n_cells: int) -> int:
    return len(day_nodes()) * n_cells * 2


def whole_horizons_fit(n_grid_cells: int, n_cells: int, n_sectors: int) -> bool:
    """Whether the float32 horizons of all ``n_grid_cells`` fit beside the table of ``n_cells``
    valid cells within ``MEMORY_TARGET_BYTES`` (else :func:`table_from_terrain` holds them band
    of rows by band)."""
    return n_sectors * 4 * n_grid_cells + _table_bytes(n_cells) <= MEMORY_TARGET_BYTES


def _band_code_bytes(n_grid_cells: int, n_cells: int, memory_bytes: int) -> int:
    """Bytes of horizon sine codes a band of :func:`table_from_terrain` may hold (see
    :func:`horizon_band_groups`)."""
    table = _table_bytes(n_cells)
    return max(MIN_SINE_BAND_BYTES, table // TABLE_PARTS_PER_BAND,
               memory_bytes - table - _working_bytes(n_grid_cells))


def peak_bytes(n_grid_cells: int, n_cells: int, n_sectors: int) -> int:
    """Peak memory of making the table of ``n_cells`` valid cells on a grid of ``n_grid_cells``:
    the table, then all float32 horizons while they fit (:func:`whole_horizons_fit`) or one
    band's codes, and the working arrays."""
    table = _table_bytes(n_cells)
    if whole_horizons_fit(n_grid_cells, n_cells, n_sectors):
        return table + n_sectors * 4 * n_grid_cells + _working_bytes(n_grid_cells)
    return table + _band_code_bytes(n_grid_cells, n_cells, MEMORY_TARGET_BYTES) + _working_bytes(n_grid_cells)


def horizon_band_groups(tile_shape, n_cells: int, n_sectors: int, kernel_bands,
                        memory_bytes: int | None = None) -> list[list[tuple[int, int]]]:
    """Kernel bands grouped into the bands of rows whose horizons :func:`table_from_terrain`
    holds at a time: as few groups as keep the table, the group's sine codes and the working
    arrays under ``memory_bytes`` (default ``MEMORY_TARGET_BYTES``), and never less than
    ``MIN_SINE_BAND_BYTES`` of codes per group nor less than an eighth of the table
    (``TABLE_PARTS_PER_BAND``). Where the table alone passes the target that gives a few wide
    bands instead of many narrow ones (each band searches one horizon distance either side of
    it): 1e7 cells, 72 sectors, 20 km: 7 bands, 62.8 s, 2.21 GB traced, against 23 bands,
    115.3 s, 2.05 GB with the 64 MiB floor alone."""
    if memory_bytes is None:
        memory_bytes = MEMORY_TARGET_BYTES
    ny, nx = tile_shape
    room = _band_code_bytes(ny * nx, n_cells, memory_bytes)
    per_row = (2 * n_sectors + 4) * nx
    groups, rows = [], 0
    for band in kernel_bands:
        h = band[1] - band[0]
        if groups and rows + h <= max(1, room // per_row):
            groups[-1].append(band)
            rows += h
        else:
            groups.append([band])
            rows = h
    return groups


def table_from_terrain(elevation_m, valid, slope_deg, aspect_deg, lat_deg, lon_deg, cell_size_m,
                       n_sectors, max_distance_m, transmissivity, time_step_minutes, progress=None,
                       memory_bytes: int | None = None) -> RadiationTable:
    """The table of :func:`compute_table` with the horizons of
    :func:`firnline.horizon.horizon_angles` (``n_sectors``, ``max_distance_m``), bit for bit,
    holding the horizons only band of rows by band of rows.

    The bands are as few as keep the table, one band's horizon sine codes (2 bytes per cell
    and sector) and the working arrays under ``memory_bytes`` (see :func:`horizon_band_groups`);
    each band searches the lines that meet it over the band and one horizon distance either
    side, so the horizon work grows with the number of bands (one band on grids up to about
    2.7e6 cells with 72 sectors; 2000 x 2000 cells: see benchmarks/radiation.py). Parameters as
    :func:`compute_table` and
    :func:`firnline.horizon.horizon_angles`; ``progress`` also gets ``"horizon sectors"``.
    Returns the :class:`RadiationTable` of :func:`compute_table`.
    """
    tile = _tile(elevation_m, valid, slope_deg, aspect_deg, lat_deg, lon_deg, transmissivity,
                 time_step_minutes, n_sectors)
    sines = SineBands(elevation_m, tile.valid, cell_size_m, n_sectors, max_distance_m, progress=progress)
    groups = horizon_band_groups(tile.valid.shape, int(tile.row_offset[-1]), tile.n_sectors,
                                 _kernel_bands(tile), memory_bytes)

    def codes(r0, r1):
        out = sines.band(r0, r1, total_bands=len(groups))
        out[:, ~tile.valid[r0:r1]] = 0
        return out

    return _table(tile, groups, codes, progress)


@dataclass(frozen=True)
class SunConstants:
    """What the sun paths of :func:`compute_table` take of the whole DEM (see the module docstring:
    per tile): the valid cells' latitude range, and the latitude, longitude and grid convergence
    of the middle valid cell in C order (both made by :func:`sun_constants`). A window of the DEM
    made with them (:func:`window_table`) gives the values of the whole DEM's table."""

    lat_range_deg: tuple[float, float]
    lat_centre_deg: float
    lon_centre_deg: float
    convergence_centre_rad: float


def sun_constants(lat_range_deg, lat_deg, lon_deg, row: int) -> SunConstants:
    """The :class:`SunConstants` of a DEM from its valid cells' latitude range and the latitude and
    longitude of its middle valid cell's column, over that cell's row (``row``) and the rows
    either side of it that the DEM has (shape (rows, 1))."""
    lat = np.asarray(lat_deg, dtype=np.float64).reshape(-1, 1)
    lon = np.asarray(lon_deg, dtype=np.float64).reshape(-1, 1)
    gamma = _grid_convergence_rad(_block_rows(lat, 0, lat.shape[0], 1), _block_rows(lon, 0, lon.shape[0], 1),
                                  (CELL_BLOCK, CELL_BLOCK + 1))
    return SunConstants(lat_range_deg=(float(lat_range_deg[0]), float(lat_range_deg[1])),
                        lat_centre_deg=float(lat[row, 0]), lon_centre_deg=float(lon[row, 0]),
                        convergence_centre_rad=float(gamma[row, CELL_BLOCK]))


def window_table(elevation_m, cells, slope_deg, aspect_deg, lat_deg, lon_deg, codes, transmissivity,
                 time_step_minutes, n_sectors, sun: SunConstants, progress=None) -> RadiationTable:
    """The table of :func:`compute_table` of some cells of a window of a DEM, with the whole DEM's
    sun constants (:func:`sun_constants`): bit for bit the whole DEM's values of those cells.

    ``cells``: the window's cells to compute (bool, the window's shape; the table's columns are
    them in C order). ``lat_deg`` and ``lon_deg`` are the window's; its first and last rows serve
    the grid convergence of the rows next to them only (a cell there gets that of its rows in
    the window, so the window should hold the rows either side of its cells, where the DEM has
    them). ``codes(r0, r1)``: the uint16 horizon sine codes (n_sectors, r1 - r0, window columns)
    of rows r0 .. r1 - 1 of the window, from the whole DEM's horizons
    (:func:`firnline.horizon.window_sines`). Other parameters as :func:`compute_table`.
    """
    tile = _tile(elevation_m, cells, slope_deg, aspect_deg, lat_deg, lon_deg, transmissivity,
                 time_step_minutes, n_sectors, sun)
    groups = horizon_band_groups(tile.valid.shape, int(tile.row_offset[-1]), tile.n_sectors, _kernel_bands(tile))

    def masked(r0, r1):
        out = codes(r0, r1)
        out[:, ~tile.valid[r0:r1]] = 0
        return out

    return _table(tile, groups, masked, progress)


def degree_day_weighted_radiation(table: RadiationTable, t_station_c: np.ndarray, lapse_k_per_m: np.ndarray,
                                  day_of_year: np.ndarray, dz_m: np.ndarray, threshold_c: float,
                                  columns: np.ndarray, weights: np.ndarray) -> tuple[float, float]:
    """Degree-day-weighted mean potential direct radiation, W m-2, and the mean degree-days.

    ``I_dd = sum_d sum_c w_c DD_dc I_dc / sum_d sum_c w_c DD_dc`` with the positive
    degree-days ``DD_dc = (T_station,d + lapse_d dz_c - threshold)+`` of the station-mode
    kernel (no warming) and ``I_dc`` the table's daily mean for the day of year. With it a
    temperature-index melt ``(MF + a I) DD`` melts, summed over the cells and days, as much
    as a degree-day factor ``DDF = MF + a I_dd`` does: the rule the radiation-method
    defaults of :mod:`firnline.parameters` are derived by (DEVELOPERS.md, "Parameter
    defaults and their sources"). One pass over the days; no days x cells array.

    Parameters
    ----------
    table : RadiationTable
    t_station_c, lapse_k_per_m, day_of_year : ndarray (n_days,)
        Station temperature (deg C), the day's lapse rate (K m-1) and day of year (1..366).
    dz_m : ndarray (n,)
        Elevation above the station of the cells weighed, m.
    threshold_c : float
        Melt threshold, deg C.
    columns : ndarray of int (n,)
        The cells' columns in ``table``.
    weights : ndarray (n,)
        The cells' weights (glacier area, m2).

    Returns
    -------
    (I_dd in W m-2, the weighted mean positive degree-days per day of record in K)
    """
    dz = np.asarray(dz_m, dtype="float64")
    w = np.asarray(weights, dtype="float64")
    cols = np.asarray(columns)
    num = den = 0.0
    for t, lapse, doy in zip(t_station_c, lapse_k_per_m, day_of_year):
        dd = np.maximum(t + lapse * dz - threshold_c, 0.0) * w
        s = float(dd.sum())
        if s == 0.0:
            continue
        lo, hi, f = table.bracket(int(doy))
        rad = ((1.0 - f) * lo[cols].astype("float64") + f * hi[cols]) * table.scale_w_m2
        num += float(dd @ rad)
        den += s
    return (num / den if den > 0 else float("nan")), den / (w.sum() * len(t_station_c))
