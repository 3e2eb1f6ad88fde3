"""Horizon angles of every DEM cell in azimuth sectors (cast-shadow horizon).

The horizon in a direction is the largest elevation angle, seen from a cell
centre, of the terrain along the line in that direction up to a maximum
distance. It is found by a sector search along azimuth lines in the manner of
Dozier and Frew (1990), Rapid calculation of terrain parameters for radiation
modeling from digital elevation data, IEEE Transactions on Geoscience and
Remote Sensing 28(5), 963-969, after Dozier, Bruno and Downey (1981),
Computers & Geosciences 7(2), 145-151:

* For each sector direction the grid is cut into parallel lines one cell
  apart. A line advances one cell along the major axis (the axis closer to
  the direction) per step; across it the elevation is interpolated linearly
  between the two cells the line passes between (extrapolated from the
  nearest cell and the one behind it where the line runs along the outer half
  of an edge cell; from the nearest cell alone where the other is nodata).
  Every cell is represented by the point of exactly one line per direction
  that is nearest to its centre (at most half a cell across the line) and gets
  the horizon of that point, seen from the point's interpolated elevation.
  Planes are thus exact, and lines along the grid axes or diagonals pass
  through the cell centres themselves. Distances are those along the ideal line.
* Along each line the horizon of a point is the tangent to the upper convex
  hull of the points ahead of it, found with an amortised O(1) stack walk
  (the hull-chain idea of Dozier et al., 1981). The distance limit is kept
  exactly by splitting each line into blocks of the window length: the window
  of a point is the rest of its own block (hull walk from the far end) plus a
  prefix of the next block (a hull grown point by point, queried by binary
  search). The work is O(N log W) per direction for N cells and a window of
  W cells.

Conventions:

* Sector k points along the grid azimuth ``k * 360 / n_sectors`` degrees,
  clockwise from the grid's up direction (decreasing row index, i.e. grid north
  for a north-up raster). The horizon of a sector is the horizon along its
  centre line.
* The result is the elevation angle in radians, float32, shape
  ``(n_sectors, ny, nx)``. Negative horizons (all terrain ahead lower than the
  cell) are clipped to 0: the sun below the mathematical horizon gives no direct
  beam anyway.
* Beyond the DEM edge the horizon is open: terrain outside the grid is taken to
  be no higher than the cell itself (angle 0 unless the DEM blocks).
* :class:`SineBands` gives the same horizons band of rows by band (only the
  band is held; each line is searched over the band and the search blocks
  around it that its points see), as
  :func:`quantised_sines` uint16 codes of the sine, the form the radiation
  climatology reads.
* Nodata cells (``valid`` False or NaN elevation) neither block the view nor
  are computed: their horizon is NaN, a line point whose nearest cell is
  nodata is left out, and a nodata cell is not used in the interpolation.
* The Earth's curvature is ignored (it lowers a horizon 20 km away by 0.09 degree).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from . import jit  # noqa: F401  (numba's threading layer and vector width, before compiling)

#: Changes whenever the algorithm changes the numbers it returns (cache keys use it).
ALGORITHM_VERSION = "horizon-1"


def sector_azimuths_deg(n_sectors: int) -> np.ndarray:
    """Centre azimuth of each horizon sector.

    Parameters
    ----------
    n_sectors : int
        Number of azimuth sectors.

    Returns
    -------
    numpy.ndarray of float64
        Grid azimuth of sector k, ``k * 360 / n_sectors``, degrees clockwise
        from the grid's up direction.
    """
    return np.arange(n_sectors, dtype=np.float64) * (360.0 / n_sectors)


def _elevation_grid(elevation_m, valid):
    """The DEM as float64 with NaN on nodata (a copy), checked."""
    z = np.array(elevation_m, dtype=np.float64)
    if z.ndim != 2:
        raise ValueError("elevation_m must be a 2-D array")
    if valid is not None:
        valid = np.asarray(valid, dtype=bool)
        if valid.shape != z.shape:
            raise ValueError("valid must have the shape of elevation_m")
        z[~valid] = np.nan
    return z


def _spacing(cell_size_m):
    if np.ndim(cell_size_m) == 0:
        dx = dy = float(cell_size_m)
    else:
        dx, dy = (float(v) for v in cell_size_m)
    if not (dx > 0 and dy > 0):
        raise ValueError("cell_size_m must be positive")
    return dx, dy


def _sector_count(n_sectors):
    n_sectors = int(n_sectors)
    if n_sectors < 1:
        raise ValueError("n_sectors must be at least 1")
    return n_sectors


def _sector(z, dx, dy, az_rad, max_distance_m, out, row0, at=None):
    """Horizons of one sector into ``out`` (rows row0 .. row0 + len(out) - 1 of the grid).

    ``at``: ``(zr0, zc0, ny, nx, col0)`` when ``z`` is a window of a larger grid (``ny`` x ``nx``)
    whose first cell is row ``zr0``, column ``zc0``, and ``out`` starts at column ``col0`` (rows
    and columns counted in the larger grid): the lines are those of the larger grid. Raises when
    a point the search needs lies outside the window.
    """
    # exact zeros along the grid axes, so that those lines run through the cell centres
    sin_az, cos_az = (0.0 if abs(v) < 1e-12 else v for v in (math.sin(az_rad), math.cos(az_rad)))
    zr0, zc0, ny, nx, col0 = (0, 0, z.shape[0], z.shape[1], 0) if at is None else at
    outside = _direction_horizon(z, zr0, zc0, ny, nx, dx, dy, sin_az, cos_az, max_distance_m, out, row0, col0)
    if outside:
        raise ValueError(f"the horizon search needs {outside} points outside the given window of the DEM; "
                         "widen its halo (firnline.horizon.window_halo_cells)")


def horizon_angles(elevation_m, valid, cell_size_m, n_sectors, max_distance_m, progress=None) -> np.ndarray:
    """Horizon elevation angle of every cell in ``n_sectors`` azimuth sectors.

    Sector search along azimuth lines after Dozier and Frew (1990), IEEE TGRS
    28(5); see the module docstring for the algorithm and conventions.

    Parameters
    ----------
    elevation_m : array-like, shape (ny, nx)
        Elevation, m. NaN marks nodata.
    valid : array-like of bool, shape (ny, nx), or None
        Cells with data; None means every finite elevation.
    cell_size_m : float or (float, float)
        Cell size, m: one value for square cells or ``(dx, dy)`` (column
        spacing, row spacing).
    n_sectors : int
        Number of azimuth sectors (at least 1).
    max_distance_m : float
        How far the search looks, m. A point exactly at this distance counts.
    progress : callable(label, done, total), optional
        Called after each sector, label ``"horizon sectors"`` (see :mod:`firnline.progress`).

    Returns
    -------
    numpy.ndarray of float32, shape (n_sectors, ny, nx)
        Horizon elevation angle, radians, clipped at 0; NaN on nodata cells.
    """
    z = _elevation_grid(elevation_m, valid)
    dx, dy = _spacing(cell_size_m)
    n_sectors = _sector_count(n_sectors)
    out = np.empty((n_sectors,) + z.shape, dtype=np.float32)
    for k, az in enumerate(np.deg2rad(sector_azimuths_deg(n_sectors))):
        _sector(z, dx, dy, az, float(max_distance_m), out[k], 0)
        if progress is not None:
            progress("horizon sectors", k + 1, n_sectors)
    return out


#: Quantisation of the sine of a horizon angle (0 .. 1) as uint16: sine = value / SINE_LEVELS.
SINE_LEVELS = 65535


def quantised_sines(horizon_rad, out=None) -> np.ndarray:
    """Sines of horizon angles as uint16 in units of 1 / ``SINE_LEVELS``, 0 where NaN.

    ``rint(sin(angle) * 65535)`` with the sine taken in float32 on the float32
    angle, so the same angles always give the same codes. The step is 1.5e-5 in
    sine; rounding moves a horizon by at most 0.0009 degree while it is below 60
    degrees. Against float32 sines, measured on the relief of benchmarks/radiation.py
    (300 x 300 cells, 72 sectors): a daily mean at a day node moves by 9 W m-2 at most
    (a 15-minute step whose sun lies within the rounding of a horizon changes between
    sun and shade), annual means by 0.1 W m-2 at most and 0.0002 W m-2 on average.

    Parameters
    ----------
    horizon_rad : array-like of float
        Horizon elevation angles, radians, 0 .. pi / 2 (NaN allowed).
    out : numpy.ndarray of uint16, optional
        Where to write (the shape of ``horizon_rad``).
    """
    sine = np.sin(np.asarray(horizon_rad, dtype=np.float32))
    np.multiply(sine, np.float32(SINE_LEVELS), out=sine)
    np.rint(sine, out=sine)
    np.clip(sine, 0.0, np.float32(SINE_LEVELS), out=sine)
    sine[np.isnan(sine)] = 0.0
    if out is None:
        return sine.astype(np.uint16)
    out[...] = sine
    return out


class SineBands:
    """Quantised horizon sines of a DEM made band of rows by band of rows.

    ``band(r0, r1)`` gives ``quantised_sines(horizon_angles(...)[:, r0:r1])`` of the
    whole DEM bit for bit, computed from the whole DEM but holding only the band.
    Only the lines that meet the band are searched, each over the band plus whole
    search blocks (one horizon distance) around it, so a band of h rows costs about
    (h + 2 x distance) / grid height of the whole search for the sectors nearer
    north-south, less for those nearer east-west.
    """

    def __init__(self, elevation_m, valid, cell_size_m, n_sectors, max_distance_m, progress=None):
        self.z = _elevation_grid(elevation_m, valid)
        self.dx, self.dy = _spacing(cell_size_m)
        self.n_sectors = _sector_count(n_sectors)
        self.max_distance_m = float(max_distance_m)
        self.progress = progress
        self.azimuths_rad = np.deg2rad(sector_azimuths_deg(self.n_sectors))
        self.done = 0

    def band(self, r0: int, r1: int, total_bands: int = 1) -> np.ndarray:
        """uint16 (n_sectors, r1 - r0, nx) codes of rows r0 .. r1 - 1."""
        nx = self.z.shape[1]
        out = np.empty((self.n_sectors, r1 - r0, nx), dtype=np.uint16)
        scratch = np.empty((r1 - r0, nx), dtype=np.float32)
        for k, az in enumerate(self.azimuths_rad):
            _sector(self.z, self.dx, self.dy, az, self.max_distance_m, scratch, r0)
            quantised_sines(scratch, out=out[k])
            self.done += 1
            if self.progress is not None:
                self.progress("horizon sectors", self.done, self.n_sectors * total_bands)
        return out


def window_halo_cells(cell_size_m, max_distance_m) -> int:
    """Cells a window of the DEM needs on every side of the cells whose horizons
    :func:`window_sines` gives from it: two search blocks of one horizon distance (the rest of
    a point's block and the next one, ahead or behind it along its line), the line's drift
    across (at most one cell per step) and the interpolation's neighbour."""
    dx, dy = _spacing(cell_size_m)
    return 2 * int(math.floor(float(max_distance_m) / min(dx, dy) + 1e-9)) + 3


def window_sines(elevation_m, valid, origin, grid_shape, rows, cols, cell_size_m, n_sectors,
                 max_distance_m) -> np.ndarray:
    """uint16 (n_sectors, rows, cols) :func:`quantised_sines` codes of the horizons of the cells of
    rows ``rows[0] .. rows[1] - 1`` and columns ``cols[0] ..`` of a DEM of ``grid_shape``, from a
    window of it: ``elevation_m`` and ``valid`` are the window, whose first cell is at ``origin``
    (row, column) of the DEM. The lines and search blocks are those of the whole DEM, so where
    the window holds :func:`window_halo_cells` around the cells (or reaches the DEM's edge)
    they get the codes of :func:`horizon_angles` of the whole DEM bit for bit; otherwise a
    ValueError is raised. Only the window is held: the cells' horizons of a unit of work."""
    z = _elevation_grid(elevation_m, valid)
    dx, dy = _spacing(cell_size_m)
    n_sectors = _sector_count(n_sectors)
    (r0, r1), (c0, c1) = rows, cols
    at = (int(origin[0]), int(origin[1]), int(grid_shape[0]), int(grid_shape[1]), int(c0))
    out = np.empty((n_sectors, r1 - r0, c1 - c0), dtype=np.uint16)
    scratch = np.empty((r1 - r0, c1 - c0), dtype=np.float32)
    for k, az in enumerate(np.deg2rad(sector_azimuths_deg(n_sectors))):
        _sector(z, dx, dy, az, float(max_distance_m), scratch, int(r0), at)
        quantised_sines(scratch, out=out[k])
    return out


@njit(cache=True, parallel=True)
def _direction_horizon(z, zr0, zc0, ny, nx, dx, dy, sin_az, cos_az, max_dist, out, row0, col0):
    """Horizon angles in one direction (grid azimuth given by sin/cos) of the rows row0 ..
    row0 + out.shape[0] - 1 and columns col0 .. col0 + out.shape[1] - 1 of an ny x nx grid, into
    out; ``z`` is the window of the grid from row zr0, column zc0. Lines that never meet out's
    cells are skipped. Returns the number of points the search needed outside the window."""
    dcol = sin_az / dx  # columns per metre along the direction
    drow = -cos_az / dy  # rows per metre (up = decreasing row)
    if abs(dcol) >= abs(drow):
        major_is_col = True
        n_major, n_minor = nx, ny
        forward = dcol > 0
        t = drow / dcol  # rows per +1 column
        ds = math.hypot(dx, t * dy)  # metres per step along the line
        m_lo, m_hi = col0, col0 + out.shape[1]      # out's major and minor ranges
        n_lo, n_hi = row0, row0 + out.shape[0]
    else:
        major_is_col = False
        n_major, n_minor = ny, nx
        forward = drow > 0
        t = dcol / drow  # columns per +1 row
        ds = math.hypot(dy, t * dx)
        m_lo, m_hi = row0, row0 + out.shape[0]
        n_lo, n_hi = col0, col0 + out.shape[1]
    # the line with offset o crosses major index m at minor position o + t*m; its nearest
    # cell is o + shift[m] and the next one across is o + shift[m] + side[m], weight frac[m]
    shift = np.empty(n_major, np.int64)
    frac = np.empty(n_major, np.float64)
    side = np.empty(n_major, np.int64)
    for m in range(n_major):
        p = t * m
        shift[m] = int(math.floor(p + 0.5))
        d = p - shift[m]
        frac[m] = abs(d)
        side[m] = 1 if d >= 0.0 else -1
    o_lo = -shift.max()
    n_lines = (n_minor - 1 - shift.min()) - o_lo + 1
    window = int(math.floor(max_dist / ds + 1e-9))
    # only the lines that reach out's minor range within its major range
    s_lo = shift[m_lo:m_hi].min()
    s_hi = shift[m_lo:m_hi].max()
    line0 = max(0, n_lo - s_hi - o_lo)
    line1 = min(n_lines, n_hi - 1 - s_lo - o_lo + 1)
    n_run = line1 - line0
    if n_run <= 0:
        return 0
    # neighbouring lines share cache lines of the grid, so each task takes a run of them
    n_chunks = min(n_run, 64)
    outside = np.zeros(n_chunks, np.int64)
    for chunk in prange(n_chunks):
        first = line0 + chunk * n_run // n_chunks
        stop = line0 + (chunk + 1) * n_run // n_chunks
        outside[chunk] = _lines_horizon(z, zr0, zc0, n_major, n_minor, out, row0, col0, major_is_col, forward,
                                        shift, frac, side, o_lo, first, stop, window, ds)
    return outside.sum()


@njit(cache=True)
def _lines_horizon(z, zr0, zc0, n_major, n_minor, out, row0, col0, major_is_col, forward, shift, frac, side,
                   o_lo, first, stop, window, ds):
    """Horizons along the lines first .. stop - 1 of one direction (out: rows row0 .., columns
    col0 .. of the grid; z: its window from row zr0, column zc0).

    Each line's profile holds its in-grid points; only the part that out's points and
    their windows need is built and searched: from the start of the search block (of the
    whole profile) holding out's first point to one block past its last, so that every
    point of out sees the same blocks as in the whole profile and gets the same value bit
    for bit. Returns the number of those points that lie outside z (then out is not valid).
    """
    zny, znx = z.shape
    rows, cols = out.shape
    zp = np.empty(n_major, np.float64)
    im = np.empty(n_major, np.int64)
    hz = np.empty(n_major, np.float64)
    stack = np.empty(n_major, np.int64)
    outside = 0
    for line in range(first, stop):
        o = o_lo + line
        # the in-grid points (q = qa .. qa + n - 1, profile index k = q - qa) and those of
        # out (k = ka .. kb - 1): both runs, since the line's cells move monotonically
        qa = -1
        n = 0
        ka = -1
        kb = -1
        for q in range(n_major):
            m = q if forward else n_major - 1 - q
            near = o + shift[m]
            if not 0 <= near < n_minor:
                continue
            if qa < 0:
                qa = q
            r = (near if major_is_col else m) - row0
            c = (m if major_is_col else near) - col0
            if 0 <= r < rows and 0 <= c < cols:
                if ka < 0:
                    ka = n
                kb = n + 1
            n += 1
        if ka < 0:
            continue
        if window < 1:
            block = 1
            s0, end = ka, kb
        else:
            block = window if window < n else n
            s0 = (ka // block) * block
            end = min(n, ((kb - 1) // block + 2) * block)
        for k in range(s0, end):
            q = qa + k
            m = q if forward else n_major - 1 - q
            near = o + shift[m]
            # the point between `near` and `other`, or, when `other` is off the grid,
            # half a cell at most beyond `near` (extrapolated from the cell behind)
            other = near + side[m]
            w = frac[m]
            if not 0 <= other < n_minor:
                other = near - side[m]
                w = -w
            if major_is_col:
                zr, zc, zr2, zc2 = near - zr0, m - zc0, other - zr0, m - zc0
            else:
                zr, zc, zr2, zc2 = m - zr0, near - zc0, m - zr0, other - zc0
            has_other = 0 <= other < n_minor
            if not (0 <= zr < zny and 0 <= zc < znx) or (has_other and not (0 <= zr2 < zny and 0 <= zc2 < znx)):
                outside += 1
                zp[k - s0] = np.nan
                im[k - s0] = m
                continue
            z_near = z[zr, zc]
            z_other = np.nan
            if has_other:
                z_other = z[zr2, zc2]
            j = k - s0
            if math.isnan(z_other):
                zp[j] = z_near
            else:
                zp[j] = z_near + w * (z_other - z_near)
            im[j] = m
        _profile_horizon(zp, end - s0, window, block, hz, stack)
        for k in range(ka, kb):
            j = k - s0
            m = im[j]
            minor = o + shift[m]
            if math.isnan(zp[j]):
                val = np.nan
            elif hz[j] > 0.0:
                val = math.atan(hz[j] / ds)
            else:
                val = 0.0
            r = (minor if major_is_col else m) - row0
            c = (m if major_is_col else minor) - col0
            if 0 <= r < rows and 0 <= c < cols:
                out[r, c] = val
    return outside


@njit(cache=True)
def _profile_horizon(zp, n, window, block, hz, stack):
    """Largest rise per step ahead of each point of a profile, within ``window`` steps.

    zp[0:n] are elevations at equal steps in the look direction (NaN skipped), searched in
    blocks of ``block`` points from zp[0] (``window``, or the whole profile when it is
    shorter than the window).
    On return hz[k] = max over valid j in (k, k + window] of (zp[j] - zp[k]) / (j - k),
    or -inf when there is none, and NaN where zp[k] is NaN.
    """
    for k in range(n):
        hz[k] = -np.inf
    if window < 1:
        for k in range(n):
            if math.isnan(zp[k]):
                hz[k] = np.nan
        return
    for start in range(0, n, block):
        end = min(start + block, n)
        # Part A: the rest of the point's own block, hull walk from the far end.
        top = -1
        for k in range(end - 1, start - 1, -1):
            zk = zp[k]
            if math.isnan(zk):
                hz[k] = np.nan
                continue
            while top >= 1:
                a = stack[top]
                b = stack[top - 1]
                if (zp[b] - zk) * (a - k) >= (zp[a] - zk) * (b - k):
                    top -= 1
                else:
                    break
            if top >= 0:
                a = stack[top]
                hz[k] = (zp[a] - zk) / (a - k)
            top += 1
            stack[top] = k
        if end >= n:
            continue
        # Part B: the prefix of the next block, a hull grown at its far end.
        # Part A of this block is done with the stack, so the hull reuses it.
        base = 0
        size = 0
        nxt = end
        for k in range(start, end):
            zk = zp[k]
            limit = min(k + window, n - 1)
            while nxt <= limit:
                zq = zp[nxt]
                if not math.isnan(zq):
                    while size >= 2:
                        p1 = stack[base + size - 2]
                        p2 = stack[base + size - 1]
                        if (zp[p2] - zp[p1]) * (nxt - p1) <= (zq - zp[p1]) * (p2 - p1):
                            size -= 1
                        else:
                            break
                    stack[base + size] = nxt
                    size += 1
                nxt += 1
            if math.isnan(zk) or size == 0:
                continue
            lo = 0
            hi = size - 1
            while lo < hi:
                mid = (lo + hi) // 2
                p1 = stack[base + mid]
                p2 = stack[base + mid + 1]
                if (zp[p2] - zk) * (p1 - k) > (zp[p1] - zk) * (p2 - k):
                    lo = mid + 1
                else:
                    hi = mid
            p = stack[base + lo]
            rise = (zp[p] - zk) / (p - k)
            if rise > hz[k]:
                hz[k] = rise
