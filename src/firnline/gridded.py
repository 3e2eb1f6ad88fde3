"""Gridded daily forcing from a NetCDF-CF file (a reanalysis or a downscaled climate model).

The variables are found by their CF standard names (NetCDF Climate and Forecast
Metadata Conventions 1.8): ``air_temperature`` (K or deg C), ``precipitation_flux``
(a rate, e.g. kg m-2 s-1 or mm/day) or ``precipitation_amount`` (per daily step, kg
m-2 or mm), and ``surface_altitude`` (the grid's own elevation, m). The grid's CRS
comes from the variables' ``grid_mapping`` (via :meth:`pyproj.CRS.from_cf`) or, without
one, from longitude/latitude coordinates (WGS 84).

Each DEM cell gets the bilinear interpolation of the four surrounding grid points
(in the grid's own coordinates) of temperature, precipitation and surface altitude,
and is then corrected from the interpolated grid elevation ``z_g`` to its own
elevation ``z`` with the lapse rate and the relative precipitation gradient, the
same rules as for one station::

    T(c) = T_g(c) + lapse(month) * (z - z_g(c))
    P(c) = P_g(c) * precip_factor * max(0, 1 + precip_gradient * (z - z_g(c)))

The file is read lazily with xarray, by blocks of days and only over the window of
grid points the DEM needs; no array of all days x cells is ever made. The
provider follows the kernel's cell-mode protocol (``block(a, b)`` -> two
(b - a, n_cells) float32 arrays).
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from numba import njit, prange

from . import jit  # noqa: F401  (numba's threading layer and vector width, before compiling)
from .errors import InputError
from .forcing import Forcing, calendar

TEMPERATURE_NAMES = ("air_temperature",)
PRECIPITATION_NAMES = ("precipitation_flux", "precipitation_amount")
ALTITUDE_NAMES = ("surface_altitude",)

READ_DAYS = 366
"""Days read from the file at a time (over the DEM's window of grid points only)."""

NEGATIVE_PRECIP_TOLERANCE_MM = 0.1
"""Slightly negative daily precipitation above minus this (numerical noise of gridded
products) is set to zero; below it is an error naming the date."""

_KELVIN = {"k", "kelvin", "kelvins", "degk", "deg_k"}
_CELSIUS = {"degc", "deg_c", "celsius", "degree_celsius", "degrees_celsius", "degreec", "c", "°c",
            "degrees_c", "degree_c"}
# unit symbol -> (kind, factor to kg, m or day)
_UNIT_SYMBOLS = {"kg": ("mass", 1.0), "g": ("mass", 1e-3), "m": ("length", 1.0), "mm": ("length", 1e-3),
                 "cm": ("length", 1e-2), "s": ("time", 1.0 / 86400.0), "sec": ("time", 1.0 / 86400.0),
                 "min": ("time", 1.0 / 1440.0), "h": ("time", 1.0 / 24.0), "hr": ("time", 1.0 / 24.0),
                 "hour": ("time", 1.0 / 24.0), "d": ("time", 1.0), "day": ("time", 1.0),
                 "days": ("time", 1.0)}


def temperature_offset(units: str, name: str, source: str) -> float:
    """What to add to a temperature in ``units`` to get deg C (K -> -273.15)."""
    u = (units or "").strip().lower().replace(" ", "_")
    if u in _KELVIN:
        return -273.15
    if u in _CELSIUS:
        return 0.0
    raise InputError(f"{source}: the units {units!r} of the temperature variable {name!r} are not known; "
                     "give K or degC.")


def precipitation_factor(units: str, standard_name: str, name: str, source: str) -> float:
    """Factor that turns precipitation in ``units`` into mm per day (= kg m-2 per day).

    ``precipitation_flux`` needs a rate (mass per area or depth, per time, e.g.
    kg m-2 s-1, mm/day, m s-1); ``precipitation_amount`` an amount per daily step
    (kg m-2, mm, m). Water density 1000 kg m-3: 1 kg m-2 = 1 mm (common practice).
    """
    text = (units or "").strip()
    toks = re.findall(r"(/)|([A-Za-z°]+)\s*(?:\*\*|\^)?\s*([-+]?\d+)?", text.replace(".", " "))
    exps = {"mass": 0, "length": 0, "time": 0}
    factor = 1.0
    divide = False
    ok = bool(toks)
    for slash, sym, power in toks:
        if slash:
            divide = True
            continue
        kind = _UNIT_SYMBOLS.get(sym.lower())
        if kind is None:
            ok = False
            break
        e = int(power) if power else 1
        if divide:
            e, divide = -e, False
        exps[kind[0]] += e
        factor *= kind[1] ** e
    want_time = -1 if standard_name == "precipitation_flux" else 0
    if ok and exps["time"] == want_time:
        if exps["mass"] == 1 and exps["length"] == -2:
            return factor                       # kg m-2 (per day) = mm (per day)
        if exps["mass"] == 0 and exps["length"] == 1:
            return factor * 1000.0              # m (per day) -> mm (per day)
    example = "kg m-2 s-1 or mm/day" if want_time else "kg m-2 or mm per daily step"
    raise InputError(f"{source}: the units {units!r} of the precipitation variable {name!r} "
                     f"({standard_name}) are not known; give {example}.")


@dataclass(frozen=True)
class GriddedForcing:
    """What :func:`read_grid_file` found in a NetCDF-CF file, and where the DEM cells sit in it.

    Attributes
    ----------
    path : Path
    t_name, p_name : variable names of temperature and precipitation
    t_offset : add to the temperature to get deg C
    p_factor : multiply the precipitation by to get mm per day
    y_dim, x_dim, time_dim : the dimension names
    y_window, x_window : slices of the grid points read (the DEM's window)
    first_step : time index of the first modelled day
    idx : ndarray (4, n_cells) int64, flat indices (into the window) of each cell's four points
    wts : ndarray (4, n_cells) float64, their bilinear weights
    z_grid_m : ndarray (n_cells,) grid surface altitude interpolated to each cell, m
    cells : ndarray (n_cells,) the DEM's flat cell indices these rows belong to
    notes : list of str
    """

    path: Path
    t_name: str
    p_name: str
    t_offset: float
    p_factor: float
    time_dim: str
    y_dim: str
    x_dim: str
    y_window: slice
    x_window: slice
    first_step: int
    idx: np.ndarray
    wts: np.ndarray
    z_grid_m: np.ndarray
    cells: np.ndarray
    notes: list = field(default_factory=list)

    def read(self, a: int, b: int) -> tuple[np.ndarray, np.ndarray]:
        """Temperature (deg C) and precipitation (mm/day) of days a..b-1 over the window, (b-a, n_points)."""
        with _open(self.path) as ds:
            sel = {self.time_dim: slice(self.first_step + a, self.first_step + b),
                   self.y_dim: self.y_window, self.x_dim: self.x_window}
            order = (self.time_dim, self.y_dim, self.x_dim)
            t = ds[self.t_name].isel(sel).transpose(*order).to_numpy().astype("float64")
            p = ds[self.p_name].isel(sel).transpose(*order).to_numpy().astype("float64")
        nd = b - a
        t = t.reshape(nd, -1) + self.t_offset
        p = p.reshape(nd, -1) * self.p_factor
        p[(p < 0) & (p >= -NEGATIVE_PRECIP_TOLERANCE_MM)] = 0.0
        return t, p

    def subset(self, positions: np.ndarray) -> "GriddedForcing":
        """The same file for a subset of the cells (positions into this object's cell order)."""
        from dataclasses import replace
        return replace(self, idx=self.idx[:, positions], wts=self.wts[:, positions],
                       z_grid_m=self.z_grid_m[positions], cells=self.cells[positions])

    def cells_provider(self, z_m: np.ndarray, params, month: np.ndarray,
                       positions: np.ndarray | None = None) -> "GridCells":
        """The per-cell provider for these cells (``z_m`` in the same order, optionally a subset)."""
        src = self if positions is None else self.subset(positions)
        return GridCells(src, z_m, params, month)


class GridCells:
    """Per-cell daily temperature and precipitation from a :class:`GriddedForcing` (cell-mode protocol)."""

    def __init__(self, src: GriddedForcing, z_m, params, month):
        self.src = src
        z = np.asarray(z_m, dtype="float64")
        self.n_cells = z.size
        g = float(params.precip_gradient_per_m)
        self.dz = z - src.z_grid_m
        self.orog = float(params.precip_factor) * np.maximum(0.0, 1.0 + g * self.dz)
        self.lapse_month = np.asarray(params.lapse_rate_k_per_m, dtype="float64")
        self.month = np.asarray(month)
        self._cache = (0, 0, None, None)
        self._out = None
        # bilinear form per grid quad: v = a + b wx + c wy + e wx wy, with the quad's four
        # corner values; cells come in runs that share a quad (row-major DEM order), so the
        # inner loop is contiguous arithmetic with four constants per run
        corners, first, self.corner = np.unique(src.idx[0], return_index=True, return_inverse=True)
        self.corner_points = src.idx[:, first]                       # (4, n_quads) window points
        self.wx = np.ascontiguousarray(src.wts[1] + src.wts[3])
        self.wy = np.ascontiguousarray(src.wts[2] + src.wts[3])
        q = self.corner
        self.run_start = np.concatenate([[0], np.flatnonzero(np.diff(q)) + 1, [q.size]]).astype(np.int64)
        self.run_quad = q[self.run_start[:-1]].astype(np.int64)
        # parallel pieces of about 4096 cells each, cut at run boundaries
        cuts = np.searchsorted(self.run_start, np.arange(0, q.size, 4096), side="right") - 1
        self.piece = np.unique(np.concatenate([cuts, [self.run_start.size - 1]])).astype(np.int64)

    def _days(self, a: int, b: int):
        c0, c1, t, p = self._cache
        if not (c0 <= a and b <= c1):
            c0, c1 = a, max(b, min(a + READ_DAYS, len(self.month)))
            t, p = self.src.read(c0, c1)
            self._cache = (c0, c1, t, p)
        return t[a - c0:b - c0], p[a - c0:b - c0]

    def block(self, a: int, b: int) -> tuple[np.ndarray, np.ndarray]:
        """Temperature (deg C) and precipitation (mm) at every cell for days a .. b-1, each (b-a, n_cells) float32.

        The two arrays are reused by the next call; copy them to keep them.
        """
        from .stations import _buffers

        tg, pg = self._days(a, b)
        lapse = self.lapse_month[self.month[a:b] - 1]
        t, p = _buffers(self, b - a)
        cp = self.corner_points
        coef = []
        for v in (tg, pg):
            v00, v01, v10, v11 = (v[:, cp[j]] for j in range(4))
            coef.append(np.ascontiguousarray(np.stack([v00, v01 - v00, v10 - v00, v11 - v10 - v01 + v00], axis=1)))
        _bilinear_block(self.run_start, self.run_quad, self.piece, self.wx, self.wy, coef[0], coef[1],
                        lapse, self.dz, self.orog, t, p)
        return t, p


@njit(parallel=True, cache=True)
def _bilinear_block(run_start, run_quad, piece, wx, wy, ct, cp, lapse, dz, orog, t_out, p_out):
    """Bilinear interpolation of one block of days to the cells, with the elevation correction.

    ``ct``, ``cp`` (nd, 4, n_quads): the coefficients a, b, c, e of each quad's bilinear
    form a + b wx + c wy + e wx wy for temperature and precipitation; cells in runs of one
    quad (``run_start``, ``run_quad``), runs grouped in parallel pieces (``piece``).
    """
    nd = ct.shape[0]
    for k in prange(piece.size - 1):
        for d in range(nd):
            lap = lapse[d]
            for r in range(piece[k], piece[k + 1]):
                q = run_quad[r]
                ta, tb, tc, te = ct[d, 0, q], ct[d, 1, q], ct[d, 2, q], ct[d, 3, q]
                pa, pb, pc, pe = cp[d, 0, q], cp[d, 1, q], cp[d, 2, q], cp[d, 3, q]
                # views from the run's first cell, so the loop index starts at 0 (numba then
                # drops its negative-index check and the loop vectorises)
                i0, i1 = run_start[r], run_start[r + 1]
                xr, yr, dzr, orr = wx[i0:i1], wy[i0:i1], dz[i0:i1], orog[i0:i1]
                tr, pr = t_out[d, i0:i1], p_out[d, i0:i1]
                for i in range(i1 - i0):
                    x = xr[i]
                    y = yr[i]
                    xy = x * y
                    tr[i] = ta + tb * x + tc * y + te * xy + lap * dzr[i]
                    pr[i] = (pa + pb * x + pc * y + pe * xy) * orr[i]


# ----------------------------------------------------------------------------
# the file edge
# ----------------------------------------------------------------------------

def _open(path: Path):
    import xarray as xr
    try:
        return xr.open_dataset(path, engine="h5netcdf", decode_times=False, mask_and_scale=True)
    except (OSError, ValueError):
        return xr.open_dataset(path, decode_times=False, mask_and_scale=True)


def _by_standard_name(ds, names, what: str, source: str) -> str:
    found = [v for v in ds.data_vars if ds[v].attrs.get("standard_name") in names]
    if not found:
        have = sorted({str(ds[v].attrs.get("standard_name")) for v in ds.data_vars
                       if "standard_name" in ds[v].attrs})
        raise InputError(f"{source}: no variable with the standard_name {' or '.join(names)} ({what}); "
                         "set that attribute on the variable" + (f" (the file has {', '.join(have)})"
                                                                  if have else "") + ".")
    return found[0]


def _axis_kind(ds, dim: str) -> str | None:
    """'x', 'y', 'lon', 'lat' for a 1-D coordinate variable, from CF attributes."""
    if dim not in ds.variables:
        return None
    a = ds[dim].attrs
    sn = str(a.get("standard_name", "")).lower()
    units = str(a.get("units", "")).lower()
    axis = str(a.get("axis", "")).upper()
    if sn in ("longitude", "grid_longitude") or units in ("degrees_east", "degree_east", "degree_e", "degrees_e"):
        return "lon"
    if sn in ("latitude", "grid_latitude") or units in ("degrees_north", "degree_north", "degree_n", "degrees_n"):
        return "lat"
    if sn == "projection_x_coordinate" or axis == "X":
        return "x"
    if sn == "projection_y_coordinate" or axis == "Y":
        return "y"
    return None


def _times(ds, time_dim: str, source: str) -> np.ndarray:
    import xarray as xr
    var = ds[time_dim]
    try:
        decoded = xr.decode_cf(var.to_dataset(name="_t"))["_t"].to_numpy()
    except (ValueError, TypeError, OverflowError) as e:
        raise InputError(f"{source}: the time coordinate {time_dim!r} cannot be read as dates ({e}); "
                         "give CF time units like \"days since 1990-01-01\" on the standard calendar.") from None
    if not np.issubdtype(decoded.dtype, np.datetime64):
        cal = var.attrs.get("calendar", "?")
        raise InputError(f"{source}: the time coordinate uses the calendar {cal!r}; firnline needs real dates "
                         "(standard/Gregorian calendar) so that every day of the record is present.")
    return decoded.astype("datetime64[D]")


def read_grid_file(path: Path, cell_x_m: np.ndarray, cell_y_m: np.ndarray, cells: np.ndarray, grid_crs,
                   year_start: str, winter_end: str, start=None, end=None) -> Forcing:
    """Open a NetCDF-CF forcing file, check it and place the DEM cells on its grid.

    Parameters
    ----------
    path : the file
    cell_x_m, cell_y_m : ndarray (n_cells,)
        Centres of the modelled DEM cells in the DEM grid's CRS, m.
    cells : ndarray (n_cells,) their flat indices in the DEM (kept with the placement)
    grid_crs : the DEM grid's CRS
    year_start, winter_end, start, end : the balance calendar and the optional clip

    Returns
    -------
    Forcing
        The calendar of the complete balance years in the file, with the
        :class:`GriddedForcing` as ``cells_source`` (station series NaN).

    Raises
    ------
    InputError
        Missing standard names, unknown units, no CRS, a grid that does not cover the
        DEM, duplicated, unsorted or missing days, missing values at the grid points
        the DEM needs; each names the variable or the date.
    """
    from pyproj import CRS
    from pyproj.exceptions import CRSError

    from .grid import to_crs

    path = Path(path)
    src = path.name
    if not path.exists():
        raise InputError(f"{path}: gridded forcing file not found; check [climate] grid_file.")
    try:
        ds = _open(path)
    except Exception as e:  # noqa: BLE001 - any reader failure is a bad input file
        why = str(e).splitlines()[0] if str(e) else type(e).__name__
        raise InputError(f"{src}: not a readable NetCDF file ({why}).") from None
    with ds:
        t_name = _by_standard_name(ds, TEMPERATURE_NAMES, "daily mean air temperature", src)
        p_name = _by_standard_name(ds, PRECIPITATION_NAMES, "daily precipitation", src)
        z_name = _by_standard_name(ds, ALTITUDE_NAMES, "the grid's surface elevation", src)
        tv, pv, zv = ds[t_name], ds[p_name], ds[z_name]
        t_off = temperature_offset(tv.attrs.get("units", ""), t_name, src)
        p_fac = precipitation_factor(pv.attrs.get("units", ""), pv.attrs["standard_name"], p_name, src)
        zu = str(zv.attrs.get("units", "m")).strip().lower()
        if zu not in ("m", "meter", "meters", "metre", "metres"):
            raise InputError(f"{src}: the units {zv.attrs.get('units')!r} of the surface altitude {z_name!r} "
                             "are not known; give m.")
        spatial = [d for d in tv.dims if _axis_kind(ds, d) is not None]
        time_dims = [d for d in tv.dims if d not in spatial]
        kinds = {_axis_kind(ds, d): d for d in spatial}
        if len(time_dims) != 1 or len(spatial) != 2:
            raise InputError(f"{src}: the temperature {t_name!r} has dimensions {tv.dims}; firnline needs "
                             "(time, y, x) with 1-D coordinate variables marked by standard_name or axis.")
        time_dim = time_dims[0]
        if ("x" in kinds and "y" in kinds):
            x_dim, y_dim = kinds["x"], kinds["y"]
        elif ("lon" in kinds and "lat" in kinds):
            x_dim, y_dim = kinds["lon"], kinds["lat"]
        else:
            raise InputError(f"{src}: cannot tell the x and y coordinates of {t_name!r} (dimensions "
                             f"{tv.dims}); mark them with standard_name projection_x/y_coordinate or "
                             "longitude/latitude.")
        for v, n in ((pv, p_name),):
            if set(v.dims) != set(tv.dims):
                raise InputError(f"{src}: the precipitation {n!r} has dimensions {v.dims}, the temperature "
                                 f"{tv.dims}; give both on the same time and grid.")
        if not set(zv.dims) >= {x_dim, y_dim} or any(zv.sizes[d] != 1 for d in zv.dims if d not in (x_dim, y_dim)):
            raise InputError(f"{src}: the surface altitude {z_name!r} must lie on the grid ({y_dim}, {x_dim}).")
        # CRS: grid mapping, or longitude/latitude
        gm = tv.attrs.get("grid_mapping")
        if gm:
            gm = str(gm).split(":")[0].strip()
            if gm not in ds.variables:
                raise InputError(f"{src}: the grid mapping variable {gm!r} named by {t_name!r} is missing.")
            try:
                crs = CRS.from_cf(dict(ds[gm].attrs))
            except CRSError as e:
                raise InputError(f"{src}: the grid mapping {gm!r} is not a CRS pyproj understands ({e}).") from None
        elif "lon" in kinds:
            crs = CRS.from_epsg(4326)
        else:
            raise InputError(f"{src}: {t_name!r} has projected coordinates but no grid_mapping attribute; "
                             "add a CF grid mapping variable (or use longitude/latitude coordinates).")
        xs = ds[x_dim].to_numpy().astype("float64")
        ys = ds[y_dim].to_numpy().astype("float64")
        scale = {"km": 1000.0, "kilometre": 1000.0, "kilometer": 1000.0}
        xs = xs * scale.get(str(ds[x_dim].attrs.get("units", "")).strip().lower(), 1.0)
        ys = ys * scale.get(str(ds[y_dim].attrs.get("units", "")).strip().lower(), 1.0)
        qx, qy = to_crs(np.asarray(cell_x_m, float), np.asarray(cell_y_m, float), grid_crs, crs,
                             "the DEM CRS")
        if crs.is_geographic and xs.max() > 180.0:
            qx = np.mod(qx, 360.0)
        fx, okx = _fractional(xs, qx)
        fy, oky = _fractional(ys, qy)
        outside = ~(okx & oky)
        if outside.any():
            raise InputError(f"{src}: the grid does not cover the DEM: {int(outside.sum())} of {outside.size} "
                             f"cells lie outside its grid points ({x_dim} {xs.min():g}..{xs.max():g}, "
                             f"{y_dim} {ys.min():g}..{ys.max():g}); extend the file by at least one grid "
                             "point beyond the DEM on every side.")
        ix0 = np.minimum(np.floor(fx).astype(np.int64), xs.size - 2) if xs.size > 1 else np.zeros(fx.size, np.int64)
        iy0 = np.minimum(np.floor(fy).astype(np.int64), ys.size - 2) if ys.size > 1 else np.zeros(fy.size, np.int64)
        wx, wy = fx - ix0, fy - iy0
        if xs.size == 1 or ys.size == 1:
            raise InputError(f"{src}: the grid needs at least two points along {x_dim} and {y_dim} for "
                             "bilinear interpolation.")
        xw = slice(int(ix0.min()), int(ix0.max()) + 2)
        yw = slice(int(iy0.min()), int(iy0.max()) + 2)
        nxw = xw.stop - xw.start
        lx, ly = ix0 - xw.start, iy0 - yw.start
        idx = np.stack([ly * nxw + lx, ly * nxw + lx + 1, (ly + 1) * nxw + lx, (ly + 1) * nxw + lx + 1])
        wts = np.stack([(1 - wy) * (1 - wx), (1 - wy) * wx, wy * (1 - wx), wy * wx])
        used = np.zeros((yw.stop - yw.start) * nxw, bool)
        used[np.unique(idx[wts > 0])] = True
        zsel = zv.isel({y_dim: yw, x_dim: xw}).squeeze(drop=True).transpose(y_dim, x_dim).to_numpy()
        zg = zsel.astype("float64").ravel()
        if not np.isfinite(zg[used]).all():
            raise InputError(f"{src}: the surface altitude {z_name!r} has missing values at grid points the "
                             "DEM needs; fill them.")
        z_cell = np.einsum("kc,kc->c", wts, zg[idx])
        # time axis
        days = _times(ds, time_dim, src)
        step = np.diff(days).astype(np.int64)
        if (step == 0).any():
            i = int(np.argmax(step == 0)) + 1
            raise InputError(f"{src}: the day {days[i]} appears twice in {time_dim!r}; keep one step per day.")
        if (step < 0).any():
            i = int(np.argmax(step < 0)) + 1
            raise InputError(f"{src}: the day {days[i]} comes after {days[i - 1]} in {time_dim!r}; sort the time axis.")
        if (step > 1).any():
            i = int(np.argmax(step > 1))
            raise InputError(f"{src}: the day {days[i] + 1} is missing from {time_dim!r} (after {days[i]}); "
                             "the file must hold every day.")
    rows = np.arange(days.size)
    f = calendar(days, src, year_start, winter_end, start, end, rows, np.full(days.size, np.nan))
    first = int(f.temperature_c[0])
    gf = GriddedForcing(path=path, t_name=t_name, p_name=p_name, t_offset=t_off, p_factor=p_fac,
                        time_dim=time_dim, y_dim=y_dim, x_dim=x_dim, y_window=yw, x_window=xw,
                        first_step=first, idx=np.ascontiguousarray(idx), wts=np.ascontiguousarray(wts),
                        z_grid_m=z_cell, cells=np.asarray(cells), notes=[])
    _check_values(gf, used, f.dates)
    from dataclasses import replace
    nan = np.full(f.dates.size, np.nan)
    return replace(f, temperature_c=nan, precipitation_mm=nan.copy(), cells_source=gf)


def _fractional(coord: np.ndarray, q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Fractional index of each query along a monotonic 1-D coordinate, and whether it lies inside."""
    idx = np.arange(coord.size, dtype="float64")
    if coord.size > 1 and coord[0] > coord[-1]:
        coord, idx = coord[::-1], idx[::-1]
    if coord.size > 1 and np.any(np.diff(coord) <= 0):
        raise InputError("a coordinate of the gridded file is not monotonic; sort it.")
    tol = 1e-9 * max(1.0, float(np.abs(coord).max()))
    inside = (q >= coord[0] - tol) & (q <= coord[-1] + tol)
    return np.interp(q, coord, idx), inside


def _check_values(gf: GriddedForcing, used: np.ndarray, dates: np.ndarray) -> None:
    """Stream the modelled days once (window only) and name the first missing or negative value."""
    n = dates.size
    for a in range(0, n, READ_DAYS):
        b = min(n, a + READ_DAYS)
        t, p = gf.read(a, b)
        for v, name, what in ((t, gf.t_name, "temperature"), (p, gf.p_name, "precipitation")):
            bad = ~np.isfinite(v[:, used]).all(axis=1)
            if bad.any():
                i = int(np.argmax(bad))
                raise InputError(f"{gf.path.name}: the {what} {name!r} has missing values on {dates[a + i]} at "
                                 "grid points the DEM needs; fill them (firnline does not invent values).")
        bad = (t[:, used] < -90.0) | (t[:, used] > 60.0)
        if bad.any():
            i = int(np.argmax(bad.any(axis=1)))
            raise InputError(f"{gf.path.name}: the temperature {gf.t_name!r} on {dates[a + i]} lies outside "
                             "-90..60 deg C after unit conversion; check its units attribute.")
        neg = (p[:, used] < 0).any(axis=1)
        if neg.any():
            i = int(np.argmax(neg))
            raise InputError(f"{gf.path.name}: the precipitation {gf.p_name!r} on {dates[a + i]} is negative "
                             f"(below -{NEGATIVE_PRECIP_TOLERANCE_MM:g} mm); correct the file.")


def area_mean_series(path: str | Path) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Daily area means over every grid point of a NetCDF-CF file (for the delta-change helper).

    Returns ``(dates, temperature_c, precipitation_mm)``; the variables are found and
    converted as for ``[climate] grid_file``; read by blocks of :data:`READ_DAYS` steps.
    Missing values are left out of each day's mean (a day with none is NaN).
    """
    path = Path(path)
    src = path.name
    if not path.exists():
        raise InputError(f"{path}: gridded file not found; check the path.")
    with _open(path) as ds:
        t_name = _by_standard_name(ds, TEMPERATURE_NAMES, "daily mean air temperature", src)
        p_name = _by_standard_name(ds, PRECIPITATION_NAMES, "daily precipitation", src)
        t_off = temperature_offset(ds[t_name].attrs.get("units", ""), t_name, src)
        p_fac = precipitation_factor(ds[p_name].attrs.get("units", ""), ds[p_name].attrs["standard_name"],
                                     p_name, src)
        time_dim = [d for d in ds[t_name].dims if _axis_kind(ds, d) is None][0]
        days = _times(ds, time_dim, src)
        n = days.size
        t = np.empty(n)
        p = np.empty(n)
        for a in range(0, n, READ_DAYS):
            b = min(n, a + READ_DAYS)
            for name, out, off, fac in ((t_name, t, t_off, 1.0), (p_name, p, 0.0, p_fac)):
                v = ds[name].isel({time_dim: slice(a, b)}).transpose(time_dim, ...).to_numpy()
                v = v.reshape(b - a, -1).astype("float64")
                with np.errstate(invalid="ignore"):
                    out[a:b] = np.nanmean(v, axis=1) * fac + off if v.size else np.nan
    return days, t, p
