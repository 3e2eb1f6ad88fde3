"""The daily mass-balance kernel: a pure function of arrays.

Each day, for each cell ``c`` and each scenario ``s``::

    T = T_station + lapse(month) * (z - z_station) + warming[s]                 [deg C]
    P = P_station * precip_factor * max(0, 1 + precip_gradient * (z - z_station))
        * (1 + precip_change[s] / 100)                                          [mm w.e.]
    snow = P * f_solid(T)   with f_solid = 1 at or below snow_c, 0 at or above rain_c,
                            linear between
    SWE += snow                                  (snowfall is added before melt)
    potential snow melt = F_snow * (T - threshold)+
    melt of snow = min(SWE, potential)
    ice melt (glacier cells only) = F_ice * degree-days left once the snow is gone

with the melt factors of the chosen method:

* degree-day (e.g. Hock, 2003, J. Hydrology 282): F_snow = ddf_snow, F_ice = ddf_ice;
* radiation (Hock, 1999, J. Glaciology 45(149)): F = melt_factor + radiation_factor * I,
  I the cell's potential clear-sky direct radiation for that day of year (W m-2).

Rain is not accumulation (it runs off; no refreezing). Accumulation = snowfall,
ablation = melt of snow plus melt of ice, balance = accumulation - ablation, all
in mm w.e. The balance of a glacier cell is that of its glacier surface; ice-free
ground keeps a seasonal snowpack but cannot lose ice.

State and initial condition: the model starts with no snow on any cell at the
first day of the record (the start of a balance year, by default 1 October, when
the seasonal snow is at its minimum); the snowpack then carries over from one
balance year to the next. Snow that survives a summer stays in the pack (as firn)
and counts as accumulation of the year it fell in.

Memory: the state is (scenarios x cells); results are (scenarios x years x cells);
no (days x cells) array is ever made. The days are cut into blocks (at most
``BLOCK_DAYS``, ending at year ends and snapshot days); each block is one fused,
parallel numba pass with the cells outermost, so each cell's state stays in
registers for the whole block.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np
from numba import njit, prange

# indices of the per-season accumulators
ACC, SNOW_MELT, ICE_MELT = 0, 1, 2
N_TERMS = 3
# days per fused kernel call (blocks also end at year ends and snapshots)
BLOCK_DAYS = 32


@dataclass(frozen=True)
class KernelParams:
    """Model parameters in kernel units.

    lapse_rate_k_per_m : 12 values (January first), K m-1
    precip_gradient_per_m : m-1
    precip_factor : 1
    snow_c, rain_c : deg C, all snow at or below snow_c, all rain at or above rain_c
    threshold_c : deg C, melt threshold
    ddf_snow, ddf_ice : mm w.e. d-1 K-1 (degree-day method)
    melt_factor : mm w.e. d-1 K-1 (radiation method)
    radiation_factor_snow, radiation_factor_ice : mm w.e. d-1 K-1 per W m-2
    use_radiation : bool
    """

    lapse_rate_k_per_m: tuple
    precip_gradient_per_m: float
    precip_factor: float
    snow_c: float
    rain_c: float
    threshold_c: float
    ddf_snow: float
    ddf_ice: float
    melt_factor: float = 0.0
    radiation_factor_snow: float = 0.0
    radiation_factor_ice: float = 0.0
    use_radiation: bool = False

    @classmethod
    def from_config(cls, cfg) -> "KernelParams":
        d, m = cfg.downscaling, cfg.melt
        return cls(lapse_rate_k_per_m=d.monthly_lapse_rates(),
                   precip_gradient_per_m=d.precip_gradient_per_m, precip_factor=d.precip_factor,
                   snow_c=d.snow_rain_range_c[0], rain_c=d.snow_rain_range_c[1],
                   threshold_c=m.threshold_c, ddf_snow=m.ddf_snow_mm_per_day_k,
                   ddf_ice=m.ddf_ice_mm_per_day_k, melt_factor=m.melt_factor_mm_per_day_k,
                   radiation_factor_snow=m.radiation_factor_snow,
                   radiation_factor_ice=m.radiation_factor_ice,
                   use_radiation=m.method == "radiation")


@dataclass(frozen=True)
class KernelResult:
    """Per-year sums, mm w.e., float32, shape (scenarios, years, cells) unless stated.

    acc_winter, acc_summer : snowfall in each season
    snow_melt_winter, snow_melt_summer, ice_melt_winter, ice_melt_summer : melt
    swe_end : snow water equivalent on the last day of each balance year
    swe_initial : (scenarios, cells) SWE before the first day (zero)
    snapshots : (n_snapshots, scenarios, cells) float64 cumulative balance since the
        start of the record at the requested day boundaries, or None
    """

    acc_winter: np.ndarray
    acc_summer: np.ndarray
    snow_melt_winter: np.ndarray
    snow_melt_summer: np.ndarray
    ice_melt_winter: np.ndarray
    ice_melt_summer: np.ndarray
    swe_end: np.ndarray
    swe_initial: np.ndarray
    snapshots: np.ndarray | None = None


@njit(parallel=True, cache=True, fastmath=False)
def _block(dz, orog, glacier, rad_values, rad_scale, use_rad, t_st, p_st, lapse, season,
           rad_lo, rad_hi, rad_w, warming, pscale, snow_c, rain_c, thr,
           f_snow0, f_ice0, a_snow, a_ice, swe, sums, cum):
    """A block of days over all cells and scenarios (fused; see the module docstring).

    The loop runs cells outermost so each cell's state stays in registers across the
    block; the per-day inputs (t_st, p_st, lapse, season, rad_lo/hi/w) are (n_days_block,).
    """
    n = dz.shape[0]
    ns = warming.shape[0]
    nd = t_st.shape[0]
    span = rain_c - snow_c
    w_lo = (1.0 - rad_w) * rad_scale     # interpolation weights with the storage scale folded in
    w_hi = rad_w * rad_scale
    for c in prange(n):
        is_glacier = glacier[c]
        for s in range(ns):
            w = swe[s, c]
            acc_w = acc_s = sm_w = sm_s = im_w = im_s = 0.0
            for d in range(nd):
                t = t_st[d] + lapse[d] * dz[c] + warming[s]
                p = p_st[d] * orog[c] * pscale[s]
                if t <= snow_c:
                    snow = p
                elif t >= rain_c:
                    snow = 0.0
                else:
                    snow = p * (rain_c - t) / span
                w += snow
                smelt = 0.0
                imelt = 0.0
                if t > thr:
                    if use_rad:
                        rad = w_lo[d] * rad_values[rad_lo[d], c] + w_hi[d] * rad_values[rad_hi[d], c]
                        fs = f_snow0 + a_snow * rad
                        fi = f_ice0 + a_ice * rad
                    else:
                        fs = f_snow0
                        fi = f_ice0
                    dd = t - thr
                    pot = fs * dd
                    if w <= 0.0:
                        left = dd
                    elif pot > w:
                        smelt = w
                        left = dd * (1.0 - w / pot)
                    else:
                        smelt = pot
                        left = 0.0
                    if is_glacier:
                        imelt = fi * left
                    w -= smelt
                if season[d] == 0:
                    acc_w += snow
                    sm_w += smelt
                    im_w += imelt
                else:
                    acc_s += snow
                    sm_s += smelt
                    im_s += imelt
            swe[s, c] = w
            sums[s, 0, c] += acc_w
            sums[s, 1, c] += sm_w
            sums[s, 2, c] += im_w
            sums[s, 3, c] += acc_s
            sums[s, 4, c] += sm_s
            sums[s, 5, c] += im_s
            cum[s, c] += acc_w + acc_s - sm_w - sm_s - im_w - im_s


def _block_edges(n_days: int, year_index: np.ndarray, snapshot_days, max_block: int) -> list[int]:
    """Day boundaries at which a block must end: year ends, snapshots, and every max_block days."""
    edges = {0, n_days}
    edges.update(int(i) for i in np.flatnonzero(np.diff(year_index)) + 1)
    edges.update(int(k) for k in snapshot_days if 0 <= k <= n_days)
    out = []
    ordered = sorted(edges)
    for a, b in zip(ordered[:-1], ordered[1:]):
        out.extend(range(a, b, max_block))
    out.append(n_days)
    return out


def run_kernel(z_m: np.ndarray, glacier: np.ndarray, z_station_m: float,
               temperature_c: np.ndarray, precipitation_mm: np.ndarray, month: np.ndarray,
               day_of_year: np.ndarray, year_index: np.ndarray, winter: np.ndarray,
               params: KernelParams, warming_k: Sequence[float] = (0.0,),
               precip_change_pct: Sequence[float] = (0.0,), radiation=None,
               snapshot_days: Sequence[int] | None = None,
               progress: Callable[[int], None] | None = None) -> KernelResult:
    """Run the daily balance over a record.

    Parameters
    ----------
    z_m : ndarray (n_cells,)
        Cell elevations, m.
    glacier : ndarray (n_cells,) bool
        True where the cell carries glacier ice (ice melt allowed).
    z_station_m : float
        Station elevation, m.
    temperature_c, precipitation_mm : ndarray (n_days,)
        Station daily mean temperature, deg C, and daily precipitation, mm.
    month, day_of_year, year_index : ndarray (n_days,) int
        Calendar month 1..12, day of year 1..366 and balance-year index 0..n_years-1.
    winter : ndarray (n_days,) bool
        Winter season of the fixed-date system.
    params : KernelParams
    warming_k : sequence of float
        One uniform warming (K) per scenario, added to the station temperature.
    precip_change_pct : sequence of float
        One precipitation change (%) per scenario, same length as ``warming_k``.
    radiation : object with ``values`` (n_nodes, n_cells), ``scale_w_m2`` and
        ``node_weights(doys) -> (i_lo, i_hi, w)``, optional
        Potential direct radiation table over the same cells (see
        :class:`firnline.radiation.RadiationTable`); required when
        ``params.use_radiation``.
    snapshot_days : sequence of int, optional
        Day boundaries k (0..n_days) at which to record the cumulative balance of
        every cell after k days (for balances over arbitrary periods).
    progress : callable, optional
        Called with the number of days done after each block of days.

    Returns
    -------
    KernelResult
    """
    z = np.ascontiguousarray(z_m, dtype="float64")
    n = z.shape[0]
    warming = np.asarray(warming_k, dtype="float64")
    pscale = 1.0 + np.asarray(precip_change_pct, dtype="float64") / 100.0
    if warming.shape != pscale.shape:
        raise ValueError("warming_k and precip_change_pct need one value per scenario each")
    if np.any(pscale < 0):
        raise ValueError("a precipitation change below -100 % is impossible")
    ns = warming.shape[0]
    n_years = int(year_index.max()) + 1 if len(year_index) else 0
    dz = z - z_station_m
    orog = params.precip_factor * np.maximum(0.0, 1.0 + params.precip_gradient_per_m * dz)
    glacier = np.ascontiguousarray(glacier, dtype=np.bool_)
    lapse = np.asarray(params.lapse_rate_k_per_m, dtype="float64")
    if lapse.shape != (12,):
        raise ValueError("params.lapse_rate_k_per_m needs twelve monthly values")
    use_rad = bool(params.use_radiation)
    if use_rad:
        if radiation is None:
            raise ValueError("the radiation method needs a radiation table")
        f_snow0 = f_ice0 = params.melt_factor
        a_snow, a_ice = params.radiation_factor_snow, params.radiation_factor_ice
        scale = float(radiation.scale_w_m2)
    else:
        f_snow0, f_ice0 = params.ddf_snow, params.ddf_ice
        a_snow = a_ice = 0.0
        scale = 1.0

    swe = np.zeros((ns, n), dtype="float64")
    swe_initial = swe.astype("float32")
    sums = np.zeros((ns, 2 * N_TERMS, n), dtype="float64")
    cum = np.zeros((ns, n), dtype="float64")
    out = np.zeros((2 * N_TERMS, ns, n_years, n), dtype="float32")
    swe_end = np.zeros((ns, n_years, n), dtype="float32")
    n_days = len(temperature_c)
    snaps = sorted(set(int(k) for k in snapshot_days)) if snapshot_days is not None else []
    if any(k < 0 or k > n_days for k in snaps):
        raise ValueError("snapshot days must lie within 0..n_days")
    snap_arr = np.zeros((len(snaps), ns, n), dtype="float64") if snaps else None
    snap_pos = {k: i for i, k in enumerate(snaps)}

    t_st = np.ascontiguousarray(temperature_c, dtype="float64")
    p_st = np.ascontiguousarray(precipitation_mm, dtype="float64")
    lapse_d = lapse[np.asarray(month, dtype=np.int64) - 1]
    season = np.where(np.asarray(winter, bool), 0, 1).astype(np.int64)
    if use_rad:
        rad_values = radiation.values             # (n_nodes, n_cells)
        rad_lo, rad_hi, rad_w = radiation.node_weights(np.asarray(day_of_year))
    else:
        rad_values = np.zeros((1, 1), dtype="float32")
        rad_lo = rad_hi = np.zeros(n_days, dtype=np.int64)
        rad_w = np.zeros(n_days)
    rad_lo = np.ascontiguousarray(rad_lo, dtype=np.int64)
    rad_hi = np.ascontiguousarray(rad_hi, dtype=np.int64)
    rad_w = np.ascontiguousarray(rad_w, dtype="float64")
    edges = _block_edges(n_days, np.asarray(year_index), snaps, BLOCK_DAYS)
    if 0 in snap_pos:
        snap_arr[snap_pos[0]] = cum
    for a, b in zip(edges[:-1], edges[1:]):
        sl = slice(a, b)
        _block(dz, orog, glacier, rad_values, scale, use_rad, t_st[sl], p_st[sl], lapse_d[sl],
               season[sl], rad_lo[sl], rad_hi[sl], rad_w[sl], warming, pscale,
               params.snow_c, params.rain_c, params.threshold_c, f_snow0, f_ice0, a_snow, a_ice,
               swe, sums, cum)
        if b in snap_pos:
            snap_arr[snap_pos[b]] = cum
        if b == n_days or year_index[b] != year_index[b - 1]:
            y = int(year_index[b - 1])
            for k in range(2 * N_TERMS):
                out[k, :, y, :] = sums[:, k, :]
            swe_end[:, y, :] = swe
            sums[:] = 0.0
        if progress is not None:
            progress(b)

    return KernelResult(acc_winter=out[ACC], acc_summer=out[N_TERMS + ACC],
                        snow_melt_winter=out[SNOW_MELT], snow_melt_summer=out[N_TERMS + SNOW_MELT],
                        ice_melt_winter=out[ICE_MELT], ice_melt_summer=out[N_TERMS + ICE_MELT],
                        swe_end=swe_end, swe_initial=swe_initial, snapshots=snap_arr)
