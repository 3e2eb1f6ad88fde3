"""Several climate stations: reading the network and interpolating it to every cell.

Each day, every reporting station's temperature is reduced to a common reference
elevation ``z_ref`` (the lowest station) with the day's lapse rate, and its
precipitation with the relative precipitation gradient; the reduced values are
interpolated to each cell by inverse distance weighting and brought back to the
cell's elevation (detrended inverse-distance weighting after elevation reduction;
common practice)::

    T0_s = T_s - lapse_d * (z_s - z_ref)
    P0_s = P_s / (1 + gradient * (z_s - z_ref))
    w_s(c) = 1 / distance(c, s) ** power
    T(c) = sum_s w_s T0_s / sum_s w_s + lapse_d * (z_c - z_ref)
    P(c) = factor * max(0, 1 + gradient * (z_c - z_ref)) * sum_s w_s P0_s / sum_s w_s

so that a field linear in elevation (the lapse rate) and the same everywhere else
is reproduced exactly at any cell, and one station reproduces the single-station
downscaling of :mod:`firnline.kernel`. A station that has no value on a day drops
out of that day's sums (its weight too); a day on which no station reports is an
error naming the date.

Optional daily lapse rate from the stations: on a day with at least
:data:`MIN_REGRESSION_STATIONS` temperatures, the lapse rate is the ordinary
least-squares slope of the stations' temperatures on their elevations (the
elevation regression of detrended interpolation; common practice, as in the
elevation-regression step of PRISM, Daly, Neilson & Phillips 1994, J. Applied
Meteorology 33(2), from memory), limited to the range allowed for
``[downscaling] lapse_rate_k_per_m``; on other days the configured (monthly)
lapse rate is used.

The per-cell provider follows the kernel's cell-mode protocol: ``block(a, b)``
returns temperature (deg C) and precipitation (mm, gauge factor and gradient
applied) at each cell for days ``a .. b-1`` as two (b - a, n_cells) float32 arrays,
never more days than asked for.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from numba import njit, prange

from . import jit  # noqa: F401  (numba's threading layer and vector width, before compiling)
from .errors import InputError
from .forcing import Forcing, calendar, check_table, read_text_table
from .grid import to_crs

STATION_COLUMNS = ("station", "x", "y", "elevation_m", "file")
MIN_REGRESSION_STATIONS = 3
"""Fewest stations with a temperature on a day for the day's lapse-rate regression."""

MIN_DISTANCE_M = 1e-3
"""Distances below this count as this (a cell on a station takes that station's value)."""

_CHUNK = 4096  # cells per parallel chunk of the interpolation


@dataclass(frozen=True)
class StationNetwork:
    """Daily records of several stations on one calendar.

    Attributes
    ----------
    names : tuple of str
    x_m, y_m : ndarray (n_stations,)
        Station positions in the DEM grid's CRS, m.
    elevation_m : ndarray (n_stations,)
    dates : ndarray (n_days,) datetime64[D], gap-free
    temperature_c, precipitation_mm : ndarray (n_days, n_stations) float64
        NaN where a station has no value that day.
    source : str
        The station table's file name (for messages).
    power : float
        Inverse-distance power.
    lapse_from_stations : bool
        Regress each day's lapse rate on the stations (>= 3 reporting).
    notes : list of str
    """

    names: tuple
    x_m: np.ndarray
    y_m: np.ndarray
    elevation_m: np.ndarray
    dates: np.ndarray
    temperature_c: np.ndarray
    precipitation_mm: np.ndarray
    source: str = "stations"
    power: float = 2.0
    lapse_from_stations: bool = False
    notes: list = field(default_factory=list)

    @property
    def n_stations(self) -> int:
        return len(self.names)

    @property
    def reference_elevation_m(self) -> float:
        """The common elevation the station values are reduced to: the lowest station, m."""
        return float(np.min(self.elevation_m))

    def daily_lapse_rates(self, monthly_k_per_m, month: np.ndarray, lo: float, hi: float,
                          rows: slice | np.ndarray = slice(None)) -> tuple[np.ndarray, int, int]:
        """Lapse rate of each day (K m-1): regressed on the stations or the monthly value.

        Parameters
        ----------
        monthly_k_per_m : 12 lapse rates, January first, K m-1
        month : ndarray (n,) calendar month of each day of ``rows``
        lo, hi : bounds of a regressed lapse rate, K m-1
        rows : the days (rows of the record) concerned

        Returns
        -------
        lapse : ndarray (n,) float64
        n_regressed : days whose lapse rate came from the stations
        n_limited : of those, days whose slope was outside ``lo .. hi`` and limited
        """
        lapse = np.asarray(monthly_k_per_m, dtype="float64")[np.asarray(month) - 1]
        if not self.lapse_from_stations:
            return lapse, 0, 0
        t = self.temperature_c[rows]
        have = np.isfinite(t)
        n = have.sum(axis=1)
        use = n >= MIN_REGRESSION_STATIONS
        if not use.any():
            return lapse, 0, 0
        z = np.where(have, self.elevation_m[None, :], 0.0)
        tt = np.where(have, t, 0.0)
        nn = np.maximum(n, 1)
        zm = z.sum(axis=1) / nn
        tm = tt.sum(axis=1) / nn
        dz = np.where(have, z - zm[:, None], 0.0)
        sxx = (dz * dz).sum(axis=1)
        sxy = (dz * (tt - tm[:, None])).sum(axis=1)
        use &= sxx > 0
        slope = np.divide(sxy, sxx, out=np.zeros_like(sxy), where=sxx > 0)
        limited = use & ((slope < lo) | (slope > hi))
        lapse = np.where(use, np.clip(slope, lo, hi), lapse)
        return lapse, int(use.sum()), int(limited.sum())

    def cells(self, x_m: np.ndarray, y_m: np.ndarray, z_m: np.ndarray, params, month: np.ndarray,
              lapse_bounds: tuple[float, float] = (-0.0125, 0.01)) -> "StationCells":
        """The per-cell provider for cells at ``x_m, y_m`` (grid CRS, m) and elevations ``z_m``.

        ``params`` gives ``lapse_rate_k_per_m`` (12), ``precip_gradient_per_m`` and
        ``precip_factor`` (e.g. :class:`firnline.kernel.KernelParams`); ``month`` is the
        calendar month of each day of the record.
        """
        return StationCells(self, x_m, y_m, z_m, params, month, lapse_bounds)


class StationCells:
    """Per-cell daily temperature and precipitation from a :class:`StationNetwork`.

    Holds the inverse-distance weights (n_stations, n_cells) float32 and the per-cell
    orographic precipitation factor; :meth:`block` makes one block of days at a time.
    """

    def __init__(self, network: StationNetwork, x_m, y_m, z_m, params, month, lapse_bounds):
        self.network = network
        z = np.ascontiguousarray(z_m, dtype="float64")
        self.n_cells = z.size
        zr = network.reference_elevation_m
        g = float(params.precip_gradient_per_m)
        n_days = len(month)             # the record may be cut short (e.g. for a calibration)
        rows = slice(0, n_days)
        self.lapse, self.n_regressed, self.n_limited = network.daily_lapse_rates(
            params.lapse_rate_k_per_m, month, *lapse_bounds, rows=rows)
        dz_st = network.elevation_m - zr
        red = 1.0 + g * dz_st
        if np.any(red <= 0):
            i = int(np.argmax(red <= 0))
            raise InputError(f"{network.source}: station {network.names[i]!r} lies "
                             f"{dz_st[i]:.0f} m above the lowest station, where [downscaling] "
                             f"precip_gradient_per_m = {g:g} leaves no precipitation; use a smaller "
                             "negative gradient or drop the station.")
        t0 = network.temperature_c[rows] - self.lapse[:, None] * dz_st[None, :]
        p0 = network.precipitation_mm[rows] / red[None, :]
        self.at = np.isfinite(t0).astype("float64")
        self.ap = np.isfinite(p0).astype("float64")
        self.t0 = np.where(self.at > 0, t0, 0.0)
        self.p0 = np.where(self.ap > 0, p0, 0.0)
        self.full = (self.at.min(axis=1) > 0) & (self.ap.min(axis=1) > 0)
        self._out = None
        self.dz = z - zr
        self.orog = float(params.precip_factor) * np.maximum(0.0, 1.0 + g * self.dz)
        self.weights = idw_weights(np.asarray(x_m, float), np.asarray(y_m, float), network.x_m,
                                   network.y_m, network.power)
        # days on which every station reports: T = [T0, lapse] @ [w; dz], P = P0 @ (w * orog),
        # two products (:func:`_linear_block`) that write each output value once
        # one basis array (the kernel's LINEAR mode reads it whole, see linear()): T rows, then P rows
        self._basis = np.ascontiguousarray(np.vstack([self.weights, self.dz[None, :].astype("float32"),
                                                      (self.weights * self.orog[None, :]).astype("float32")]))
        self._bt = self._basis[:self.weights.shape[0] + 1]
        self._bp = self._basis[self.weights.shape[0] + 1:]
        self._at = np.ascontiguousarray(np.column_stack([self.t0, self.lapse]))
        self._ap = np.ascontiguousarray(self.p0)

    @property
    def n_days(self) -> int:
        return self.t0.shape[0]

    def linear(self):
        """The forcing as coefficients of the days times basis rows of the cells (the kernel's
        LINEAR mode, :class:`firnline.kernel.CellForcing`): on days when every station reports,
        T = [T0, lapse] . [w; dz] and P = P0 . (w x orog), the products of :meth:`block`.

        Returns ``(coef (n_days, 2 ns + 1) float32, basis (2 ns + 1, n_cells) float32, kt = ns + 1,
        full (n_days,) bool)``; on the days not ``full`` the weights are renormalised per cell
        (:meth:`block`), which is not linear.
        """
        coef = np.ascontiguousarray(np.column_stack([self._at, self._ap]).astype("float32"))
        return coef, self._basis, self._bt.shape[0], self.full.copy()

    def block(self, a: int, b: int) -> tuple[np.ndarray, np.ndarray]:
        """Temperature (deg C) and precipitation (mm) at every cell for days a .. b-1, each (b-a, n_cells) float32.

        The two arrays are reused by the next call (the kernel consumes one block before
        asking for the next); copy them to keep them.
        """
        t, p = _buffers(self, b - a)
        _linear_block(self._at[a:b], self._bt, t)
        _linear_block(self._ap[a:b], self._bp, p)
        part = np.flatnonzero(~self.full[a:b]) + a       # days with a station missing: renormalise
        if part.size:
            tp = np.empty((part.size, self.n_cells), dtype="float32")
            pp = np.empty((part.size, self.n_cells), dtype="float32")
            _idw_block(self.weights, self.dz, self.orog, self.t0[part], self.at[part], self.p0[part],
                       self.ap[part], self.lapse[part], tp, pp)
            t[part - a] = tp
            p[part - a] = pp
        return t, p


def _buffers(provider, nd: int) -> tuple[np.ndarray, np.ndarray]:
    """Two (nd, n_cells) float32 arrays kept on the provider and reused block after block
    (fresh arrays each block would cost more in page faults than the interpolation)."""
    out = provider._out
    if out is None or out[0].shape[0] < nd:
        out = provider._out = (np.empty((nd, provider.n_cells), dtype="float32"),
                               np.empty((nd, provider.n_cells), dtype="float32"))
    return out[0][:nd], out[1][:nd]


def idw_weights(x: np.ndarray, y: np.ndarray, xs: np.ndarray, ys: np.ndarray, power: float) -> np.ndarray:
    """Inverse-distance weights 1 / d**power, (n_stations, n_cells) float32 (not normalised)."""
    out = np.empty((len(xs), x.size), dtype="float32")
    for s in range(len(xs)):   # over the few stations, not the cells
        d = np.hypot(x - xs[s], y - ys[s])
        out[s] = np.maximum(d, MIN_DISTANCE_M) ** -power
    # scale each cell's weights to sum 1 (same ratios; keeps float32 far from under/overflow)
    out /= out.sum(axis=0, keepdims=True)
    return out


@njit(parallel=True, cache=True)
def _linear_block(a, b, out):
    """out[d, c] = sum over k of a[d, k] * b[k, c], summed in float64, stored float32.

    The days' few coefficients ``a`` (nd, k) times the cells' basis ``b`` (k, n_cells): a
    matrix product with a short inner dimension, on numba's threads. A BLAS product would
    start BLAS's own thread pool, whose busy-waiting threads then compete with the kernel's
    threads for the same cores (measured: it doubled the kernel's time in cell mode).
    """
    nd, nk = a.shape
    nc = b.shape[1]
    n_chunks = (nc + _CHUNK - 1) // _CHUNK
    for j in prange(n_chunks):
        c0 = j * _CHUNK
        c1 = min(nc, c0 + _CHUNK)
        m = c1 - c0
        acc = np.empty(m)
        for d in range(nd):
            b0 = b[0, c0:c1]
            v = a[d, 0]
            for i in range(m):
                acc[i] = v * b0[i]
            for k in range(1, nk):
                bk = b[k, c0:c1]
                v = a[d, k]
                for i in range(m):
                    acc[i] += v * bk[i]
            od = out[d, c0:c1]
            for i in range(m):
                od[i] = acc[i]


@njit(parallel=True, cache=True)
def _idw_block(w, dz, orog, t0, at, p0, ap, lapse, t_out, p_out):
    """Days on which some station is missing: t0/p0 (nd, ns) reduced values with 0 where
    missing, at/ap their availability (1/0); the weights are renormalised over the
    stations that report. Station loop outside the contiguous cell loop, float64 sums."""
    ns, nc = w.shape
    nd = t0.shape[0]
    n_chunks = (nc + _CHUNK - 1) // _CHUNK
    for k in prange(n_chunks):
        c0 = k * _CHUNK
        c1 = min(nc, c0 + _CHUNK)
        m = c1 - c0
        st = np.empty(m)
        sp = np.empty(m)
        sw = np.empty(m)
        swp = np.empty(m)
        for d in range(nd):
            st[:] = 0.0
            sp[:] = 0.0
            sw[:] = 0.0
            swp[:] = 0.0
            for s in range(ns):
                vt, vp, a_t, a_p = t0[d, s], p0[d, s], at[d, s], ap[d, s]
                for i in range(m):
                    ws = w[s, c0 + i]
                    st[i] += ws * vt
                    sp[i] += ws * vp
                    sw[i] += ws * a_t
                    swp[i] += ws * a_p
            lap = lapse[d]
            for i in range(m):
                t_out[d, c0 + i] = st[i] / sw[i] + lap * dz[c0 + i]
                p_out[d, c0 + i] = sp[i] / swp[i] * orog[c0 + i]


# ----------------------------------------------------------------------------
# the file edge
# ----------------------------------------------------------------------------

def read_network(path: Path, date_col: str, t_col: str, p_col: str, stations_crs, grid_crs,
                 power: float = 2.0, lapse_from_stations: bool = False) -> StationNetwork:
    """Read a station table (``station, x, y, elevation_m, file``) and every station's daily CSV.

    Station files are resolved against the table's folder and read with the column
    names of ``[climate]``; empty values and missing days are allowed (the station
    drops out of those days). Coordinates are transformed from ``stations_crs`` to
    ``grid_crs``.

    Raises
    ------
    InputError
        Missing columns or files, unreadable numbers, duplicated station names, fewer
        than one station, or any bad row of a station file (naming file and line).
    """
    path = Path(path)
    src = path.name
    tab = read_text_table(path, f"{path}: station table not found; check [climate] stations.")
    tab.columns = [c.strip() for c in tab.columns]
    missing = [c for c in STATION_COLUMNS if c not in tab.columns]
    if missing:
        raise InputError(f"{src}: no column \"{missing[0]}\"; a station table needs the columns "
                         + ", ".join(STATION_COLUMNS) + " (the file has "
                         + ", ".join(f'"{c}"' for c in tab.columns) + ").")
    if len(tab) == 0:
        raise InputError(f"{src}: the station table has no rows; list at least one station.")
    names = [n.strip() for n in tab.station]
    line = tab.index.to_numpy() + 2          # blank lines dropped: the index keeps the line numbers
    nums = {}
    for col in ("x", "y", "elevation_m"):
        v = pd.to_numeric(tab[col].str.strip(), errors="coerce").to_numpy(dtype="float64")
        bad = ~np.isfinite(v)
        if bad.any():
            i = int(np.argmax(bad))
            raise InputError(f"{src}, line {line[i]} (station {names[i]!r}): {col} {tab[col].iloc[i]!r} "
                             "is not a number; correct it.")
        nums[col] = v
    for i, n in enumerate(names):
        if not n:
            raise InputError(f"{src}, line {line[i]}: the station has no name; fill the station column.")
        if names.index(n) != i:
            raise InputError(f"{src}, line {line[i]}: the station {n!r} appears twice; keep one row per station.")
    z = nums["elevation_m"]
    bad = (z < -500) | (z > 9000)
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(f"{src}, line {line[i]} (station {names[i]!r}): elevation_m {z[i]:g} is outside "
                         "-500..9000 m; correct it.")
    records = []
    for i, (n, f) in enumerate(zip(names, tab.file)):
        fp = (path.parent / f.strip()).resolve()
        df = read_text_table(fp, f"{src}, line {line[i]} (station {n!r}): the file {f.strip()!r} was not "
                                 f"found (looked for {fp}); check the file column.", f"{fp.name} (station {n!r})")
        records.append(check_table(df, fp.name, date_col, t_col, p_col, allow_gaps=True))
    first = min(r[0][0] for r in records)
    last = max(r[0][-1] for r in records)
    dates = np.arange(first, last + np.timedelta64(1, "D"), dtype="datetime64[D]")
    t = np.full((dates.size, len(names)), np.nan)
    p = np.full((dates.size, len(names)), np.nan)
    for s, (d, ts, ps) in enumerate(records):
        k = (d - first).astype(int)
        t[k, s], p[k, s] = ts, ps
    x, y = to_crs(nums["x"], nums["y"], stations_crs, grid_crs, "[climate] stations_crs")
    return StationNetwork(names=tuple(names), x_m=np.asarray(x, float), y_m=np.asarray(y, float),
                          elevation_m=z, dates=dates, temperature_c=t, precipitation_mm=p,
                          source=src, power=float(power), lapse_from_stations=bool(lapse_from_stations))


def network_forcing(net: StationNetwork, year_start: str, winter_end: str, start=None, end=None) -> Forcing:
    """The balance-year calendar of a network, cut to complete years, with the network attached.

    Raises
    ------
    InputError
        A day of the modelled years on which no station has a temperature (or a
        precipitation); the message names the first such date.
    """
    rows = np.arange(net.dates.size)
    f = calendar(net.dates, net.source, year_start, winter_end, start, end, rows,
                 np.full(net.dates.size, np.nan))
    keep = f.temperature_c.astype(np.int64)
    for values, what in ((net.temperature_c, "temperature"), (net.precipitation_mm, "precipitation")):
        none = ~np.isfinite(values[keep]).any(axis=1)
        if none.any():
            i = int(np.argmax(none))
            raise InputError(f"{net.source}: no station has a {what} on {f.dates[i]}; give at least one "
                             f"station's value for that day (or shorten the record with [climate] start/end).")
    sub = StationNetwork(names=net.names, x_m=net.x_m, y_m=net.y_m, elevation_m=net.elevation_m,
                         dates=f.dates, temperature_c=net.temperature_c[keep],
                         precipitation_mm=net.precipitation_mm[keep], source=net.source, power=net.power,
                         lapse_from_stations=net.lapse_from_stations, notes=list(net.notes))
    nan = np.full(f.dates.size, np.nan)
    from dataclasses import replace
    return replace(f, temperature_c=nan, precipitation_mm=nan.copy(), cells_source=sub)
