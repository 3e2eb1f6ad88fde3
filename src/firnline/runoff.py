"""Runoff: linear-reservoir routing of released water, and checks against a gauge.

Water released by the snow and ice surfaces (rain and melt that the pack neither
holds nor refreezes) reaches the outlet through storages of different speed. As
in Baker et al. (1982) and Hock and Noetzli (1997, Nordic Hydrology 28), each
kind of released water (from snow, from firn, from ice, from ice-free ground)
passes through its own linear reservoir, storage S = k Q, and the discharge at
the outlet is the sum of the reservoirs' outflows. The reservoirs are solved
exactly over each day for a release spread evenly over the day (see
:func:`linear_reservoir`), so that over any period

    routed volume = released volume - (storage at the end - storage at the start).

Efficiencies against an observed series: Nash-Sutcliffe (Nash and Sutcliffe,
1970, Journal of Hydrology 10), Kling-Gupta (Gupta, Kling, Yilmaz and Martinez,
2009, Journal of Hydrology 377) and the relative volume error.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd

from .errors import InputError

#: Seconds per day.
SECONDS_PER_DAY = 86400.0

#: Default storage constants of the four reservoirs, days. Hock and Noetzli (1997),
#: Nordic Hydrology 28, after Baker et al. (1982), give for glacier runoff about
#: 350 h for firn, 30-100 h for snow and 4-16 h for ice (from memory); the defaults
#: take rounded values inside those ranges. Ice-free ground is our own choice
#: (common practice: slower than snow on a glacier, a few days).
DEFAULT_STORAGE_DAYS = {"snow": 2.5, "firn": 14.5, "ice": 0.5, "ground": 5.0}

#: The reservoirs in their fixed order.
RESERVOIRS = ("snow", "firn", "ice", "ground")


def mm_per_day_to_m3s(mm_per_day, area_m2: float):
    """Volume flow of a water depth per day over an area.

    1 mm d-1 over 86.4 km2 is 1 m3 s-1 (common practice: 1e-3 m x 86.4e6 m2 / 86400 s).

    Parameters
    ----------
    mm_per_day : float or ndarray
        Water depth per day, mm d-1.
    area_m2 : float
        Area, m2.

    Returns
    -------
    float or ndarray
        Discharge, m3 s-1.
    """
    return np.asarray(mm_per_day, dtype="float64") * 1e-3 * float(area_m2) / SECONDS_PER_DAY


def linear_reservoir(release, k_days: float, storage0: float = 0.0):
    """Route a daily release through one linear reservoir, exactly.

    The reservoir obeys dS/dt = R - S/k with the release R constant within each day
    (Baker et al., 1982; Hock and Noetzli, 1997). Over a day of length dt = 1 d the
    exact solution is

        S_t = S_(t-1) exp(-dt/k) + R_t k (1 - exp(-dt/k))

    and the water leaving the reservoir during the day is O_t = R_t + S_(t-1) - S_t,
    so volume is conserved to rounding. For long k the outflow tends to
    S_(t-1) dt / k; for k -> 0 it equals the release. The end-of-day discharge
    S_t / k is the familiar recursion Q_t = Q_(t-1) exp(-dt/k) + R_t (1 - exp(-dt/k)).

    Parameters
    ----------
    release : array_like (n_days,)
        Water released into the reservoir each day, mm d-1 (or any depth per day).
    k_days : float
        Storage constant, days (>= 0; 0 passes the release through).
    storage0 : float
        Storage at the start, mm.

    Returns
    -------
    outflow : ndarray (n_days,)
        Water leaving the reservoir each day, same unit as ``release``.
    storage : ndarray (n_days,)
        Storage at the end of each day, mm.
    """
    r = np.asarray(release, dtype="float64")
    out, s = linear_reservoirs(r[None, :], [k_days], [storage0])
    return out[0], s[0]


def linear_reservoirs(release, k_days, storage0=None, every_day: bool = True):
    """Route many daily series at once, each through its own linear reservoir, exactly.

    The same solution as :func:`linear_reservoir` (Baker et al., 1982; Hock and Noetzli,
    1997), S_t = a S_(t-1) + k (1 - a) R_t with a = exp(-dt/k), evaluated as one pass over
    the days for all series together, so the cost grows with the days, not with the number
    of regions and reservoirs.

    Parameters
    ----------
    release : array_like (n_series, n_days)
        Water released into each reservoir each day, mm d-1.
    k_days : array_like (n_series,)
        Storage constant of each reservoir, days (>= 0; 0 passes the release through).
    storage0 : array_like (n_series,), optional
        Storage at the start, mm (default empty; ignored where k = 0).

    Returns
    -------
    outflow : ndarray (n_series, n_days)
        Water leaving each reservoir each day, mm d-1.
    storage : ndarray (n_series, n_days)
        Storage at the end of each day, mm; with ``every_day=False`` at the end of the last day
        only, (n_series,) (the storage at the start when there are no days).
    """
    r = np.asarray(release, dtype="float64")
    if r.ndim != 2:
        raise ValueError("release must be (n_series, n_days)")
    k = np.asarray(k_days, dtype="float64").reshape(r.shape[0])
    if not np.all(np.isfinite(k)) or np.any(k < 0):
        raise ValueError("the storage constant must be a finite number of days >= 0")
    pass_through = k == 0.0
    a = np.array([0.0 if x == 0.0 else math.exp(-1.0 / x) for x in k.tolist()])
    gain = np.where(pass_through, 0.0, k * (1.0 - a))
    s = np.zeros(r.shape[0]) if storage0 is None else np.array(storage0, dtype="float64").reshape(r.shape[0])
    s[pass_through] = 0.0
    rt = np.ascontiguousarray(r.T)                     # (n_days, n_series): one row a day
    storage = np.empty_like(rt) if every_day else None
    out = np.empty_like(rt)
    for t in range(rt.shape[0]):
        prev = s
        s = a * s + gain * rt[t]
        if every_day:
            storage[t] = s
        out[t] = rt[t] + prev - s                      # k = 0: storage 0, out = r
    del rt                                             # one day-major copy less at a time
    out = np.ascontiguousarray(out.T)
    return out, (np.ascontiguousarray(storage.T) if every_day else s)


@dataclass(frozen=True)
class Routed:
    """Routed discharge of one region.

    Attributes
    ----------
    outflow_mm : ndarray (n_days,)
        Water leaving all reservoirs each day, mm d-1 over the region's area.
    by_reservoir_mm : ndarray (4, n_days)
        The same per reservoir, in the order of :data:`RESERVOIRS`.
    storage_mm : ndarray (4,)
        Storage left in each reservoir at the end, mm.
    discharge_m3s : ndarray (n_days,)
        Daily mean discharge, m3 s-1.
    """

    outflow_mm: np.ndarray
    by_reservoir_mm: np.ndarray
    storage_mm: np.ndarray
    discharge_m3s: np.ndarray


def route(release_mm: np.ndarray, storage_days: Sequence[float], area_m2: float,
          storage0_mm: Sequence[float] | None = None) -> Routed:
    """Route the four kinds of released water through parallel linear reservoirs.

    Parameters
    ----------
    release_mm : ndarray (4, n_days)
        Water released each day from snow, firn, ice and ice-free ground (order of
        :data:`RESERVOIRS`), mm d-1 over the region's area.
    storage_days : sequence of 4 floats
        Storage constants, days.
    area_m2 : float
        Area of the region, m2.
    storage0_mm : sequence of 4 floats, optional
        Storage at the start, mm (default empty).

    Returns
    -------
    Routed
    """
    rel = np.asarray(release_mm, dtype="float64")
    if rel.ndim != 2 or rel.shape[0] != len(RESERVOIRS):
        raise ValueError("release_mm must be (4, n_days): snow, firn, ice, ground")
    s0 = np.zeros(len(RESERVOIRS)) if storage0_mm is None else np.asarray(storage0_mm, float)
    by, s = linear_reservoirs(rel, [float(k) for k in storage_days], s0)
    ends = s[:, -1] if s.shape[1] else s0.copy()
    total = by.sum(axis=0)
    return Routed(outflow_mm=total, by_reservoir_mm=by, storage_mm=ends,
                  discharge_m3s=mm_per_day_to_m3s(total, area_m2))


# ----------------------------------------------------------------------------
# the daily series of regions: from the kernel's daily water volumes to runoff
# ----------------------------------------------------------------------------

#: The daily terms the runoff step reads from the kernel, by name (``KernelResult.daily``'s
#: last axis is indexed by the kernel's ``Daily`` IntEnum; any mapping name -> index works).
RELEASED_TERMS = ("RELEASED_SNOW", "RELEASED_FIRN", "RELEASED_ICE", "RELEASED_GROUND")
#: mm columns of runoff.csv and the daily term each comes from (released_mm: the four released terms).
MM_COLUMNS = {"rain_mm": "RAIN", "snow_melt_mm": "SNOW_MELT", "firn_melt_mm": "FIRN_MELT",
              "ice_melt_mm": "ICE_MELT", "refreezing_mm": "REFREEZING"}
#: Columns of runoff.csv (DESIGN.md).
DAILY_COLUMNS = ["date", "region", *MM_COLUMNS, "released_mm", "discharge_m3s"]
#: Columns of runoff_monthly.csv: the same per calendar month of each balance year, with the
#: days of the month in the record, the monthly mean discharge and the glacier-ice share.
MONTHLY_COLUMNS = ["region", "balance_year", "year", "month", "days", *MM_COLUMNS, "released_mm",
                   "discharge_m3s", "glacier_ice_share"]
#: Region name of the whole catchment (the kernel's last region).
CATCHMENT = "catchment"


@dataclass(frozen=True)
class RunoffSeries:
    """Daily runoff of the regions of a run (one scenario).

    Attributes
    ----------
    dates : ndarray datetime64[D] (n_days,)
    regions : tuple of str
        Region names, in the kernel's order (glaciers, then ``ice_free``, then ``catchment``).
    area_m2 : ndarray (n_regions,)
    mm : dict of str -> ndarray (n_regions, n_days)
        The columns of :data:`MM_COLUMNS` and ``released_mm``, mm d-1 over the region's area.
    routed_mm : ndarray (n_regions, 4, n_days)
        Water leaving each reservoir (order of :data:`RESERVOIRS`) each day, mm d-1.
    ice_melt_routed_mm : ndarray (n_regions, n_days)
        The part of the ice reservoir's outflow that was ice melt (the reservoir is linear,
        so ice melt routed alone through it is exactly its share of the outflow), mm d-1.
    discharge_m3s : ndarray (n_regions, n_days)
        Routed daily mean discharge, m3 s-1.
    storage_start_mm, storage_end_mm : ndarray (n_regions, 4)
        Reservoir storage at the start of the first day and the end of the last day, mm.
    storage_days : tuple of 4 floats
    """

    dates: np.ndarray
    regions: tuple
    area_m2: np.ndarray
    mm: dict
    routed_mm: np.ndarray
    ice_melt_routed_mm: np.ndarray
    discharge_m3s: np.ndarray
    storage_start_mm: np.ndarray
    storage_end_mm: np.ndarray
    storage_days: tuple

    def region(self, name: str) -> int:
        """Index of a region by name."""
        return self.regions.index(name)

    @property
    def glacier_ice_share(self) -> np.ndarray:
        """Daily glacier-ice share of discharge (n_regions, n_days); see :func:`glacier_ice_share`."""
        return glacier_ice_share(self.ice_melt_routed_mm, self.routed_mm.sum(axis=1))


def glacier_ice_share(ice_melt_routed, routed_total):
    """Glacier-ice share of discharge: routed glacier-ice melt over the routed discharge.

    Defined here as the water that melted from glacier ice (``ICE_MELT``, released into the
    ice reservoir) routed through the ice reservoir, divided by the water leaving all four
    reservoirs over the same days; rain on bare ice and firn melt are not counted as glacier
    ice. Both arguments are sums over the same days (any unit); 0 where nothing flows.
    """
    a = np.asarray(ice_melt_routed, dtype="float64")
    b = np.asarray(routed_total, dtype="float64")
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(b > 0, np.clip(a / np.where(b > 0, b, 1.0), 0.0, 1.0), 0.0)


def _spun_up_storage(release_mm: np.ndarray, k, spinup_days: int) -> np.ndarray:
    """Storage at the start of each series (rows of ``release_mm``, constants ``k``): the end
    storage of routing its first ``spinup_days`` days from empty."""
    n = release_mm.shape[0]
    if spinup_days <= 0 or release_mm.shape[1] == 0:
        return np.zeros(n)
    _, s = linear_reservoirs(release_mm[:, :spinup_days], k, every_day=False)
    return s.copy()


def runoff_series(daily, terms, regions: Sequence[str], area_m2, dates, storage_days: Sequence[float],
                  spinup_days: int = 365) -> RunoffSeries:
    """Route the daily water volumes of every region of one scenario.

    The kernel sums, for each region and day, the water volumes of its cells (m3); here they
    become depths over the region's area and the four kinds of released water pass through
    their parallel linear reservoirs (:func:`route`), so that for each region and reservoir
    routed volume = released volume - (storage at the end - storage at the start).

    Reservoir start: the record starts at the beginning of a balance year with the kernel's
    state spun up; the reservoirs are spun up alike, starting from the storage they hold after
    routing the first ``spinup_days`` days of the record from empty (0: start empty). The
    storage at the start is in :attr:`RunoffSeries.storage_start_mm`.

    Parameters
    ----------
    daily : ndarray (n_days, n_regions, n_terms)
        Water volumes per day, region and daily term, m3 (one scenario of ``KernelResult.daily``).
    terms : mapping of term name -> index
        The kernel's ``Daily`` IntEnum (``terms["RAIN"]``), or any mapping with the names of
        :data:`MM_COLUMNS` and :data:`RELEASED_TERMS`.
    regions : sequence of str
    area_m2 : array_like (n_regions,)
        Area of each region, m2 (``KernelResult.region_area_m2``).
    dates : array_like (n_days,) of dates
    storage_days : 4 floats
        Storage constants of the snow, firn, ice and ground reservoirs, days.
    spinup_days : int

    Returns
    -------
    RunoffSeries
    """
    v = np.asarray(daily, dtype="float64")
    if v.ndim != 3 or v.shape[1] != len(regions):
        raise ValueError("daily must be (n_days, n_regions, n_terms) with one region per name")
    area = np.asarray(area_m2, dtype="float64").reshape(len(regions))
    dates = np.asarray(dates, dtype="datetime64[D]")
    if dates.shape != (v.shape[0],):
        raise ValueError("one date per day of daily")
    with np.errstate(invalid="ignore", divide="ignore"):
        per_mm = np.where(area > 0, 1e3 / np.where(area > 0, area, 1.0), 0.0)   # m3 -> mm over the area
    # depths over the areas, mm (one term at a time: no (days, regions, terms) copy)
    idx = [int(terms[n]) for n in RELEASED_TERMS]
    mm = {col: (v[:, :, int(terms[t])] * per_mm[None, :]).T.copy() for col, t in MM_COLUMNS.items()}
    released = np.moveaxis(v[:, :, idx] * per_mm[None, :, None], 0, -1)     # (n_regions, 4, n_days)
    mm["released_mm"] = released.sum(axis=1)
    k = tuple(float(x) for x in storage_days)
    n_r, n_d = len(regions), v.shape[0]
    ice_i = RESERVOIRS.index("ice")
    ice_melt = np.minimum(mm["ice_melt_mm"], released[:, ice_i])   # ice melt is released at bare ice
    # every region's four reservoirs, then (the ice reservoir is linear) ice melt alone through
    # the ice reservoir from its own share of the start storage: one pass over the days for all
    series_in = np.concatenate((released.reshape(n_r * 4, n_d), ice_melt), axis=0)
    del released, ice_melt             # (days x regions) arrays no longer needed while routing
    k_rows = np.concatenate((np.tile(k, n_r), np.full(n_r, k[ice_i])))
    start = _spun_up_storage(series_in, k_rows, spinup_days)
    out, last = linear_reservoirs(series_in, k_rows, start, every_day=False)
    del series_in
    routed = out[:n_r * 4].reshape(n_r, 4, n_d)
    ice_routed = out[n_r * 4:]
    s0 = start[:n_r * 4].reshape(n_r, 4)
    s1 = (last[:n_r * 4] if n_d else start[:n_r * 4]).reshape(n_r, 4)
    discharge = routed.sum(axis=1) * 1e-3 * area[:, None] / SECONDS_PER_DAY
    return RunoffSeries(dates=dates, regions=tuple(regions), area_m2=area, mm=mm, routed_mm=routed,
                        ice_melt_routed_mm=ice_routed, discharge_m3s=discharge, storage_start_mm=s0,
                        storage_end_mm=s1, storage_days=k)


def _balance_years(dates: np.ndarray, year_start: str) -> np.ndarray:
    """Balance-year label of each date (the year a balance year ends in), ``year_start`` "MM-DD"."""
    m0, d0 = (int(x) for x in year_start.split("-"))
    d = dates.astype("datetime64[D]")
    year = d.astype("datetime64[Y]").astype(int) + 1970
    month = d.astype("datetime64[M]").astype(int) % 12 + 1
    day = (d - d.astype("datetime64[M]")).astype(int) + 1
    after = (month > m0) | ((month == m0) & (day >= d0))
    return year + (after if (m0, d0) != (1, 1) else 0)


def daily_table(series: RunoffSeries, regions: Sequence[str] | None = None) -> "pd.DataFrame":
    """runoff.csv: one row per day and region (default: every glacier and ``catchment``).

    ``ice_free`` is left out by default (it is in the NetCDF); the mm columns are over the
    region's area, ``discharge_m3s`` is the routed daily mean discharge.
    """
    import pandas as pd

    if regions is None:
        regions = [r for r in series.regions if r != "ice_free"]
    frames = []
    dates = pd.to_datetime(series.dates).strftime("%Y-%m-%d")
    for name in regions:
        r = series.region(name)
        cols = {"date": dates, "region": name}
        cols.update({c: series.mm[c][r] for c in [*MM_COLUMNS, "released_mm"]})
        cols["discharge_m3s"] = series.discharge_m3s[r]
        frames.append(pd.DataFrame(cols))
    return pd.concat(frames, ignore_index=True)[DAILY_COLUMNS]


def monthly_table(series: RunoffSeries, year_start: str, regions: Sequence[str] | None = None) -> "pd.DataFrame":
    """runoff_monthly.csv: the daily series by calendar month of each balance year.

    mm columns are monthly sums (mm per month over the region's area); ``discharge_m3s`` is
    the mean daily discharge of the month's days in the record; ``glacier_ice_share`` is the
    routed glacier-ice melt over the routed discharge of the month (:func:`glacier_ice_share`).
    """
    import pandas as pd

    if regions is None:
        regions = [r for r in series.regions if r != "ice_free"]
    d = series.dates
    key = pd.DataFrame({"balance_year": _balance_years(d, year_start),
                        "year": d.astype("datetime64[Y]").astype(int) + 1970,
                        "month": d.astype("datetime64[M]").astype(int) % 12 + 1})
    frames = []
    for name in regions:
        r = series.region(name)
        df = key.copy()
        for c in [*MM_COLUMNS, "released_mm"]:
            df[c] = series.mm[c][r]
        df["discharge_m3s"] = series.discharge_m3s[r]
        df["_ice"] = series.ice_melt_routed_mm[r]
        df["_out"] = series.routed_mm[r].sum(axis=0)
        df["days"] = 1
        g = df.groupby(["balance_year", "year", "month"], sort=True)
        m = g.sum()
        m["discharge_m3s"] = g["discharge_m3s"].mean()
        m["glacier_ice_share"] = glacier_ice_share(m["_ice"].to_numpy(), m["_out"].to_numpy())
        m = m.reset_index()
        m["region"] = name
        frames.append(m)
    return pd.concat(frames, ignore_index=True)[MONTHLY_COLUMNS]


#: Columns of scenario_runoff_monthly.csv: the mean regime per scenario, region and calendar month.
REGIME_COLUMNS = ["scenario", "warming_k", "precip_change_pct", "region", "month", "years", *MM_COLUMNS,
                  "released_mm", "discharge_m3s", "glacier_ice_share"]


def regime(monthly: "pd.DataFrame") -> "pd.DataFrame":
    """The mean monthly regime: each calendar month averaged over the complete balance years.

    Only the months of balance years the record holds completely are averaged (a partial
    month at the record's ends would bias its mean). mm columns are mean monthly sums,
    ``discharge_m3s`` the mean of the monthly means weighted by days, ``glacier_ice_share``
    the share of the mean month (ratio of sums, not the mean of ratios).
    """
    import pandas as pd

    rows = []
    full = monthly.groupby(["region", "balance_year"]).days.transform("sum") >= 365
    m = monthly[full]
    for (region, month), g in m.groupby(["region", "month"], sort=False):
        w = g.days.to_numpy(dtype=float)
        q = g.discharge_m3s.to_numpy()
        share = g.glacier_ice_share.to_numpy()
        row = {"region": region, "month": int(month), "years": int(len(g))}
        row.update({c: float(g[c].mean()) for c in [*MM_COLUMNS, "released_mm"]})
        row["discharge_m3s"] = float(np.sum(q * w) / np.sum(w))
        row["glacier_ice_share"] = float(np.sum(share * q * w) / np.sum(q * w)) if np.sum(q * w) > 0 else 0.0
        rows.append(row)
    out = pd.DataFrame(rows)
    if len(out):
        out = out.sort_values(["region", "month"], kind="stable").reset_index(drop=True)
    return out


def scenario_regimes(runs: list[tuple[str, float, float, RunoffSeries]], year_start: str) -> "pd.DataFrame":
    """scenario_runoff_monthly.csv: the mean monthly regime of each scenario and region.

    Parameters
    ----------
    runs : list of (scenario name, warming_k, precip_change_pct, RunoffSeries)
    """
    import pandas as pd

    frames = []
    for name, warming, precip, series in runs:
        r = regime(monthly_table(series, year_start))
        r.insert(0, "precip_change_pct", float(precip))
        r.insert(0, "warming_k", float(warming))
        r.insert(0, "scenario", str(name))
        frames.append(r)
    return pd.concat(frames, ignore_index=True)[REGIME_COLUMNS]


def gauge_scores(dates, simulated_m3s, observed: "ObservedDischarge") -> dict:
    """Scores of the modelled discharge against the gauge over the days both have.

    Returns
    -------
    dict
        ``source, days, first_day, last_day, mean_observed_m3s, mean_modelled_m3s, nse,
        kge, volume_error`` (NSE: Nash and Sutcliffe, 1970; KGE: Gupta et al., 2009;
        volume error: :func:`volume_error`; NaN scores as None).

    Raises
    ------
    InputError
        When the gauge record has no value on any modelled day.
    """
    d = np.asarray(dates, dtype="datetime64[D]")
    obs = observed.on(d)
    sim = np.asarray(simulated_m3s, dtype="float64")
    both = np.isfinite(obs) & np.isfinite(sim)
    if not both.any():
        raise InputError(f"{observed.source}: the discharge record ({observed.dates[0]} .. {observed.dates[-1]}) "
                         f"has no value on a modelled day ({d[0]} .. {d[-1]}); give a record that "
                         "overlaps the station record.")

    def num(x):
        return None if not math.isfinite(x) else float(x)

    days = d[both]
    return {"source": str(observed.source), "days": int(both.sum()), "first_day": str(days[0]),
            "last_day": str(days[-1]), "mean_observed_m3s": float(obs[both].mean()),
            "mean_modelled_m3s": float(sim[both].mean()), "nse": num(nash_sutcliffe(obs, sim)),
            "kge": num(kling_gupta(obs, sim)), "volume_error": num(volume_error(obs, sim))}


#: Days of the centred running mean that gives the flow level of a day's stated error.
SIGMA_WINDOW_DAYS = 31


def discharge_sigma_m3s(observed_m3s, sigma_pct: float, window_days: int = SIGMA_WINDOW_DAYS):
    """Stated error of daily gauged discharges, m3 s-1, for a weighted fit.

    sigma = sigma_pct / 100 x max(Qbar, Q_floor): relative to the flow level Qbar, the
    centred ``window_days`` running mean of the gauged values around the day (gaps left
    out), with the floor Q_floor a tenth of the record's mean gauged discharge, so that days
    of near-zero winter flow do not get a near-zero error and dominate the fit (a rating
    curve is least certain at low flow; common practice). Taking the error relative to the
    day's own gauged value instead would give the days the noise pushed low more weight and
    bias the fit low. ``[calibration] discharge_sigma_pct`` (default 15 %: daily gauged
    discharges of mountain rivers are commonly uncertain by 5-20 %, common practice, from memory).

    Parameters
    ----------
    observed_m3s : array_like (n_days,)
        Gauged discharge on consecutive days, NaN on gaps.
    sigma_pct : float
    window_days : int

    Returns
    -------
    ndarray (n_days,)
        NaN on gaps.
    """
    import pandas as pd

    q = np.asarray(observed_m3s, dtype="float64")
    level = pd.Series(q).rolling(int(window_days), center=True, min_periods=1).mean().to_numpy()
    floor = 0.1 * np.nanmean(q)
    return np.where(np.isfinite(q), sigma_pct / 100.0 * np.maximum(level, floor), np.nan)


# ----------------------------------------------------------------------------
# efficiencies
# ----------------------------------------------------------------------------

def _paired(observed, simulated) -> tuple[np.ndarray, np.ndarray]:
    o = np.asarray(observed, dtype="float64")
    s = np.asarray(simulated, dtype="float64")
    if o.shape != s.shape:
        raise ValueError("observed and simulated series need the same length")
    ok = np.isfinite(o) & np.isfinite(s)
    return o[ok], s[ok]


def nash_sutcliffe(observed, simulated) -> float:
    """Nash-Sutcliffe efficiency over the days both series have.

    NSE = 1 - sum (Qo - Qm)^2 / sum (Qo - mean Qo)^2 (Nash and Sutcliffe, 1970,
    Journal of Hydrology 10). 1 is a perfect fit, 0 no better than the observed
    mean. NaN when fewer than two days overlap or the observations are constant.
    """
    o, s = _paired(observed, simulated)
    if o.size < 2:
        return math.nan
    den = np.sum((o - o.mean()) ** 2)
    return math.nan if den == 0 else float(1.0 - np.sum((o - s) ** 2) / den)


def kling_gupta(observed, simulated) -> float:
    """Kling-Gupta efficiency over the days both series have.

    KGE = 1 - sqrt((r - 1)^2 + (alpha - 1)^2 + (beta - 1)^2) with r the linear
    correlation, alpha = sd(Qm) / sd(Qo) and beta = mean(Qm) / mean(Qo) (Gupta,
    Kling, Yilmaz and Martinez, 2009, Journal of Hydrology 377). NaN when fewer
    than two days overlap, or a series is constant, or the observed mean is zero.
    """
    o, s = _paired(observed, simulated)
    if o.size < 2 or o.std() == 0 or s.std() == 0 or o.mean() == 0:
        return math.nan
    r = float(np.corrcoef(o, s)[0, 1])
    alpha = float(s.std() / o.std())
    beta = float(s.mean() / o.mean())
    return float(1.0 - math.sqrt((r - 1) ** 2 + (alpha - 1) ** 2 + (beta - 1) ** 2))


def volume_error(observed, simulated) -> float:
    """Relative volume error over the days both series have: sum(Qm - Qo) / sum(Qo)."""
    o, s = _paired(observed, simulated)
    tot = o.sum()
    return math.nan if o.size == 0 or tot == 0 else float((s.sum() - tot) / tot)


# ----------------------------------------------------------------------------
# observed discharge (the file edge)
# ----------------------------------------------------------------------------

#: Highest daily mean discharge accepted, m3 s-1: the largest rivers' floods stay
#: below about 3e5 m3 s-1 (common practice), a plausibility bound for a gauge file.
MAX_DISCHARGE_M3S = 3.0e5


@dataclass(frozen=True)
class ObservedDischarge:
    """A daily gauge record; days without a value are NaN (gaps allowed).

    Attributes
    ----------
    source : str
    dates : ndarray datetime64[D], consecutive
    discharge_m3s : ndarray float64
    """

    source: str
    dates: np.ndarray
    discharge_m3s: np.ndarray

    def on(self, dates: np.ndarray) -> np.ndarray:
        """The observed values on ``dates`` (NaN where the gauge has none)."""
        d = np.asarray(dates, dtype="datetime64[D]")
        out = np.full(d.shape, np.nan)
        i = (d - self.dates[0]).astype(int)
        ok = (i >= 0) & (i < self.dates.size)
        out[ok] = self.discharge_m3s[i[ok]]
        return out


def check_discharge(table, key: str = "discharge") -> ObservedDischarge:
    """Check a gauge table (``date, discharge_m3s``; empty values are gaps).

    Parameters
    ----------
    table : firnline.observations.Table
    key : str
        The ``[observations]`` key naming the file, for messages.

    Raises
    ------
    InputError
        Missing columns, a date that is not YYYY-MM-DD, a date twice or out of order,
        a value that is not a number, negative or above :data:`MAX_DISCHARGE_M3S`, or
        no value at all; the message names the line.
    """
    from .observations import _require_columns, _where

    _require_columns(table, ["date", "discharge_m3s"], key)
    ci, cq = table.columns.index("date"), table.columns.index("discharge_m3s")
    dates, values = [], []
    for i, row in enumerate(table.rows):
        try:
            d = dt.datetime.strptime(row[ci], "%Y-%m-%d").date()
        except ValueError:
            raise InputError(f"{_where(table, i)}: date {row[ci]!r} is not a date written YYYY-MM-DD; "
                             "correct it or remove the row.") from None
        if dates and d <= dates[-1]:
            what = "appears twice" if d == dates[-1] else f"comes after {dates[-1]}"
            raise InputError(f"{_where(table, i)}: the date {d} {what}; keep one row per day, "
                             "sorted by date.")
        text = row[cq]
        if text == "":
            q = math.nan
        else:
            try:
                q = float(text)
            except ValueError:
                q = math.nan
                ok = False
            else:
                ok = math.isfinite(q)
            if not ok:
                raise InputError(f"{_where(table, i)}: discharge_m3s {text!r} is not a number; "
                                 "correct it, or leave it empty for a gap.")
            if q < 0 or q > MAX_DISCHARGE_M3S:
                raise InputError(f"{_where(table, i)}: discharge_m3s {q:g} is outside 0..{MAX_DISCHARGE_M3S:g} "
                                 "m3 s-1; correct the value (is it in litres per second?).")
        dates.append(d)
        values.append(q)
    if not np.isfinite(values).any():
        raise InputError(f"{table.source}: no discharge value in the file; give at least one day.")
    d = np.array(dates, dtype="datetime64[D]")
    full = np.arange(d[0], d[-1] + 1, dtype="datetime64[D]")
    q = np.full(full.shape, np.nan)
    q[(d - d[0]).astype(int)] = values
    return ObservedDischarge(source=table.source, dates=full, discharge_m3s=q)


def read_discharge(path: str | Path, key: str = "discharge") -> ObservedDischarge:
    """Read and check a gauge CSV (``date, discharge_m3s``)."""
    from .observations import read_table

    return check_discharge(read_table(path, key), key)
