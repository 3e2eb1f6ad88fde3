"""The runoff files of a run and a sweep: runoff.csv, runoff_monthly.csv, runoff.nc,
scenario_runoff_monthly.csv, and the hydrograph and regime figures.

The tables come from :mod:`firnline.runoff` (pure); this module only lays them out and
writes them (through a staging of :mod:`firnline.outputs`), so the contract's file names
and columns (DESIGN.md) live here and in :mod:`firnline.runoff`.

Figures (matplotlib, Agg canvas, no pyplot state; colours of the Okabe-Ito palette as in
:mod:`firnline.charts`):

* :func:`hydrograph_figure`: the catchment's daily discharge with the routed glacier-ice
  melt shaded beneath it (and the gauge record when given), and the mean monthly regime
  split into the routed water of the four reservoirs;
* :func:`regime_figure`: the mean monthly discharge of each scenario, and its glacier-ice share.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from . import __version__
from .charts import OKABE_ITO, _style
from .outputs import write_csv
from .provenance import CAUTION
from .runoff import CATCHMENT, MM_COLUMNS, RESERVOIRS, ObservedDischarge, RunoffSeries, daily_table, monthly_table

MONTH_LETTERS = "JFMAMJJASOND"
#: Colours of the four reservoirs (snow, firn, ice, ground), Okabe-Ito.
RESERVOIR_COLOURS = {"snow": OKABE_ITO[5], "firn": OKABE_ITO[4], "ice": OKABE_ITO[0], "ground": OKABE_ITO[2]}
#: CF time units of runoff.nc (CF 1.8 section 4.4).
TIME_UNITS = "days since 1970-01-01 00:00:00"


def runoff_dataset(series: RunoffSeries, attrs: dict | None = None):
    """The daily series of every region as an xarray Dataset in the CF timeSeries layout.

    CF 1.8 chapter 9 (discrete sampling geometries), orthogonal multidimensional
    representation: dims ``(region, time)``, ``featureType = "timeSeries"``, the region names
    in a variable with ``cf_role = "timeseries_id"``; ``time`` is a CF time coordinate stamped
    at the middle of each day with ``time_bounds`` holding the day [start, end) (section 7.1),
    the mm variables carry ``cell_methods = "time: sum area: mean"`` and the discharge
    ``"time: mean"`` (section 7.3).
    """
    import xarray as xr

    epoch = np.datetime64("1970-01-01", "D")
    day0 = (series.dates - epoch).astype("int64").astype("float64")
    data = {}
    long = {"rain_mm": "rain", "snow_melt_mm": "melt of snow", "firn_melt_mm": "melt of firn",
            "ice_melt_mm": "melt of glacier ice", "refreezing_mm": "refrozen rain and meltwater",
            "released_mm": "water released by the snow, firn, ice and ground surfaces"}
    for col in [*MM_COLUMNS, "released_mm"]:
        data[col] = (("region", "time"), series.mm[col], {
            "units": "mm", "long_name": f"{long[col]} per day, depth of water over the region's area",
            "cell_methods": "time: sum area: mean"})
    data["discharge_m3s"] = (("region", "time"), series.discharge_m3s, {
        "units": "m3 s-1", "long_name": "routed daily mean discharge (parallel linear reservoirs)",
        "cell_methods": "time: mean"})
    data["glacier_ice_share"] = (("region", "time"), series.glacier_ice_share, {
        "units": "1", "long_name": "share of the routed discharge that melted from glacier ice"})
    data["region_name"] = (("region",), np.array(series.regions, dtype=object),
                           {"cf_role": "timeseries_id", "long_name": "region (glacier, ice_free or catchment)"})
    data["region_area"] = (("region",), series.area_m2, {"units": "m2", "long_name": "area of the region"})
    data["time_bounds"] = (("time", "nv"), np.stack([day0, day0 + 1.0], axis=1))
    ds = xr.Dataset(data, coords={"time": ("time", day0 + 0.5, {
        "standard_name": "time", "long_name": "middle of the day", "units": TIME_UNITS,
        "calendar": "standard", "axis": "T", "bounds": "time_bounds"})})
    ds.attrs.update({"Conventions": "CF-1.8", "featureType": "timeSeries", "source": f"firnline {__version__}",
                     "storage_days": ", ".join(f"{n} {k:g}" for n, k in zip(RESERVOIRS, series.storage_days)),
                     "comment": CAUTION, **(attrs or {})})
    return ds


def write_runoff_netcdf(path: Path, series: RunoffSeries, attrs: dict | None = None) -> None:
    """Write :func:`runoff_dataset` as compressed NetCDF-4 (h5netcdf)."""
    ds = runoff_dataset(series, attrs)
    enc = {v: {"zlib": True, "complevel": 4, "_FillValue": None} for v in ds.data_vars
           if v not in ("region_name",)}
    enc["time"] = {"_FillValue": None, "dtype": "float64"}
    enc["region_name"] = {"dtype": str}
    ds.to_netcdf(path, engine="h5netcdf", encoding=enc)


def write_run_runoff(staging, series: RunoffSeries, year_start: str, attrs: dict | None = None) -> dict:
    """runoff.csv, runoff_monthly.csv and runoff.nc into a staging; returns the monthly table."""
    write_csv(staging.path("runoff.csv"), daily_table(series))
    monthly = monthly_table(series, year_start)
    write_csv(staging.path("runoff_monthly.csv"), monthly)
    write_runoff_netcdf(staging.path("runoff.nc"), series, attrs)
    return {"monthly": monthly}


# ----------------------------------------------------------------------------
# figures
# ----------------------------------------------------------------------------

def hydrograph_figure(series: RunoffSeries, year_start: str, observed: ObservedDischarge | None = None,
                      scores: dict | None = None, site: str = "", region: str = CATCHMENT) -> Figure:
    """The daily hydrograph of a region and its mean monthly regime (two panels)."""
    r = series.region(region)
    fig = Figure(figsize=(11.0, 4.4))
    fig.subplots_adjust(left=0.06, right=0.985, top=0.82, bottom=0.2, wspace=0.22)
    gs = fig.add_gridspec(1, 3)
    ax = fig.add_subplot(gs[0, :2])
    t = series.dates.astype("datetime64[D]").astype("O")
    q = series.discharge_m3s[r]
    ice = series.ice_melt_routed_mm[r] * 1e-3 * series.area_m2[r] / 86400.0
    ax.fill_between(t, 0, ice, color=RESERVOIR_COLOURS["ice"], alpha=0.45, lw=0, label="glacier-ice melt (routed)")
    ax.plot(t, q, color="#000000", lw=0.7, label="modelled discharge")
    if observed is not None:
        obs = observed.on(series.dates)
        ax.plot(t, obs, color=OKABE_ITO[3], lw=0.6, alpha=0.9, label="gauged discharge")
    ax.set_ylabel("discharge (m$^3$ s$^{-1}$)", fontsize=8)
    ax.set_ylim(bottom=0)
    ax.set_xlim(t[0], t[-1])
    title = f"Daily discharge, {region}"
    if scores is not None:
        def f(x):
            return "n/a" if x is None else f"{x:.2f}"
        title += (f" (against the gauge over {scores['days']} days: NSE {f(scores['nse'])}, "
                  f"KGE {f(scores['kge'])}, volume error "
                  f"{f(None if scores['volume_error'] is None else 100 * scores['volume_error'])} %)")
    _style(ax, title)
    ax.legend(fontsize=7, frameon=False, loc="upper left", ncols=3)
    # the regime: mean monthly routed water per reservoir, balance-year order
    ax2 = fig.add_subplot(gs[0, 2])
    m = monthly_table(series, year_start, [region])
    full = m.groupby("balance_year").days.transform("sum") >= 365
    m = m[full] if full.any() else m
    start_month = int(year_start.split("-")[0])
    order = [(start_month - 1 + i) % 12 + 1 for i in range(12)]
    d = pd.DataFrame({"year": series.dates.astype("datetime64[Y]").astype(int) + 1970,
                      "month": series.dates.astype("datetime64[M]").astype(int) % 12 + 1})
    keep = d.set_index(["year", "month"]).index.isin(m.set_index(["year", "month"]).index)
    bottom = np.zeros(12)
    n_years = max(m.balance_year.nunique(), 1)
    for i, name in enumerate(RESERVOIRS):
        vol = pd.Series(series.routed_mm[r, i][keep] * 1e-3 * series.area_m2[r], index=d.month[keep])
        days = pd.Series(1, index=d.month[keep]).groupby(level=0).sum()
        per = (vol.groupby(level=0).sum() / (days * 86400.0)).reindex(order).fillna(0.0).to_numpy()
        ax2.bar(range(12), per, bottom=bottom, color=RESERVOIR_COLOURS[name], width=0.8,
                label=f"from {name}" if name != "ground" else "from ice-free ground")
        bottom += per
    ax2.set_xticks(range(12), [MONTH_LETTERS[mo - 1] for mo in order])
    ax2.set_ylabel("mean discharge (m$^3$ s$^{-1}$)", fontsize=8)
    _style(ax2, f"Monthly regime, {n_years} balance years")
    ax2.legend(fontsize=6.5, frameon=False, loc="upper left")
    fig.suptitle(f"{site}: runoff of the {region}" if site else f"Runoff of the {region}", fontsize=11,
                 x=0.06, ha="left")
    fig.text(0.06, 0.03, "Discharge routed through parallel linear reservoirs (snow, firn, ice, ground; storage "
             "constants " + ", ".join(f"{n} {k:g} d" for n, k in zip(RESERVOIRS, series.storage_days))
             + "). Shaded: glacier-ice melt routed through the ice reservoir. " + CAUTION,
             fontsize=6.5, wrap=True, va="bottom")
    return fig


def regime_figure(regimes: pd.DataFrame, year_start: str, site: str = "", region: str = CATCHMENT) -> Figure:
    """Mean monthly discharge and glacier-ice share of each scenario (scenario_runoff_monthly.csv)."""
    fig = Figure(figsize=(10.0, 4.2))
    fig.subplots_adjust(left=0.07, right=0.985, top=0.84, bottom=0.2, wspace=0.25)
    ax, ax2 = fig.add_subplot(1, 2, 1), fig.add_subplot(1, 2, 2)
    start_month = int(year_start.split("-")[0])
    order = [(start_month - 1 + i) % 12 + 1 for i in range(12)]
    sub = regimes[regimes.region == region]
    names = list(dict.fromkeys(sub.scenario))
    from matplotlib import colormaps
    cmap = colormaps["cividis"]
    for i, name in enumerate(names):
        g = sub[sub.scenario == name].set_index("month").reindex(order)
        c = cmap(0.05 + 0.9 * (i / (len(names) - 1) if len(names) > 1 else 0.5))
        lab = f"{name}" if len(names) <= 10 else None
        ax.plot(range(12), g.discharge_m3s.to_numpy(), color=c, lw=1.4, marker="o", ms=2.5, label=lab)
        ax2.plot(range(12), 100 * g.glacier_ice_share.to_numpy(), color=c, lw=1.4, marker="o", ms=2.5)
    for a in (ax, ax2):
        a.set_xticks(range(12), [MONTH_LETTERS[mo - 1] for mo in order])
        a.set_ylim(bottom=0)
    ax.set_ylabel("mean discharge (m$^3$ s$^{-1}$)", fontsize=8)
    ax2.set_ylabel("glacier-ice share of discharge (%)", fontsize=8)
    _style(ax, f"Monthly regime per scenario, {region}")
    _style(ax2, "Glacier-ice share per scenario")
    ax.legend(fontsize=7, frameon=False, loc="upper left")
    fig.suptitle(f"{site}: runoff regimes under the scenarios" if site else "Runoff regimes under the scenarios",
                 fontsize=11, x=0.07, ha="left")
    fig.text(0.07, 0.03, "Mean of each calendar month over the complete balance years of the record, "
             "routed discharge. " + CAUTION, fontsize=6.5, wrap=True, va="bottom")
    return fig
