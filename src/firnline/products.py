"""The files of a run: which products, named how, with which provenance.

``write_run`` is the single place that knows the run's output layout (see the
contract in DESIGN.md); the generic writers live in :mod:`firnline.outputs`.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd

from . import __version__
from .model import CAUTION, RunResult, parameters_used
from .scenarios import SCENARIO_COLUMNS, Sweep, balanced_budget, scenario_label
from .scenarios import __doc__ as SCENARIO_RULES
from .outputs import staged, write_csv, write_geotiff, write_json, write_netcdf

MAPS = [  # (variable in fields, file prefix, description)
    ("annual_balance", "annual_balance", "annual surface mass balance"),
    ("winter_balance", "winter_balance", "winter surface mass balance (fixed-date system)"),
    ("summer_balance", "summer_balance", "summer surface mass balance (fixed-date system)"),
    ("accumulation", "accumulation", "accumulation (snowfall)"),
    ("ablation", "ablation", "ablation (melt of snow and ice)"),
]


def provenance(result: RunResult) -> dict:
    """Tags written into every GeoTIFF of a run."""
    cfg = result.config
    return {
        "firnline_version": __version__,
        "created_utc": dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "config": str(cfg.source) if cfg.source else "",
        "config_sha256": result.setup.checksums.get("config", ""),
        "dem_sha256": result.setup.checksums["dem"],
        "melt_method": cfg.melt.method,
        "warming_k": f"{result.warming_k:g}",
        "precip_change_pct": f"{result.precip_change_pct:g}",
        "caution": CAUTION,
    }


def glacier_results(result: RunResult) -> dict:
    """Per-glacier results and the all-glaciers aggregate for run.json."""
    s = result.summary
    g = result.gradients
    per = {}
    for name, rows in s.groupby("glacier", sort=False):
        grad = g[g.glacier == name]
        per[name] = {
            "area_km2": float(rows.area_km2.iloc[0]),
            "mean_annual_balance_mwe": float(rows.annual_balance_mwe.mean()),
            "mean_winter_balance_mwe": float(rows.winter_balance_mwe.mean()),
            "mean_summer_balance_mwe": float(rows.summer_balance_mwe.mean()),
            "mean_ela_m": float(rows.ela_m.mean()) if rows.ela_m.notna().any() else None,
            "mean_aar": float(rows.aar.mean()),
            "mean_ablation_gradient_mwe_per_100m": (float(grad.gradient_mwe_per_100m.mean())
                                                   if grad.gradient_mwe_per_100m.notna().any() else None),
            "years": [
                {"balance_year": int(r.balance_year), "annual_balance_mwe": r.annual_balance_mwe,
                 "winter_balance_mwe": r.winter_balance_mwe, "summer_balance_mwe": r.summer_balance_mwe,
                 "ela_m": r.ela_m, "aar": r.aar, "ela_flag": r.ela_flag,
                 "ablation_gradient_mwe_per_100m": gr}
                for r, gr in zip(rows.itertuples(), grad.gradient_mwe_per_100m)],
        }
    # all glaciers together: area-weighted balances per year
    agg_years = []
    for year, rows in s.groupby("balance_year"):
        w = rows.area_km2.to_numpy()
        agg_years.append({"balance_year": int(year), "area_km2": float(w.sum()),
                          **{c: float(np.sum(rows[c].to_numpy() * w) / w.sum())
                             for c in ("annual_balance_mwe", "winter_balance_mwe", "summer_balance_mwe")}})
    aggregate = {"area_km2": float(s.groupby("glacier").area_km2.first().sum()),
                 "mean_annual_balance_mwe": float(np.mean([y["annual_balance_mwe"] for y in agg_years])),
                 "years": agg_years}
    return {"glaciers": per, "all_glaciers": aggregate}


def run_json(result: RunResult, files: list[str]) -> dict:
    cfg = result.config
    setup = result.setup
    return {
        "firnline_version": __version__,
        "created_utc": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
        "caution": CAUTION,
        "config_file": cfg.source,
        "config": {k: (dataclasses.asdict(v) if dataclasses.is_dataclass(v) else v)
                   for k, v in ((f.name, getattr(cfg, f.name)) for f in dataclasses.fields(cfg))
                   if k not in ("raw", "source")},
        "parameters": parameters_used(cfg),
        "scenario": {"warming_k": result.warming_k, "precip_change_pct": result.precip_change_pct},
        "input_sha256": setup.checksums,
        "grid": {"crs": setup.grid.crs.to_string(), "shape": list(setup.grid.shape),
                 "transform": list(setup.grid.transform)[:6], "cell_size_m": list(setup.grid.cell_size_m),
                 "valid_cells": setup.grid.n_valid},
        "record": {"first_day": str(setup.forcing.dates[0]), "last_day": str(setup.forcing.dates[-1]),
                   "balance_years": [int(y) for y in setup.forcing.years]},
        "initial_condition": "no snow on any cell on the first day of the record; the snowpack "
                             "then carries over between balance years",
        "glacier_lookup": {str(i + 1): n for i, n in enumerate(setup.glaciers.names)},
        **glacier_results(result),
        "notes": setup.notes,
        "timings_s": result.timings,
        "files": files,
    }


def write_run(result: RunResult, out_dir: Path) -> list[Path]:
    """Write every product of a run into ``out_dir``, all or nothing."""
    setup = result.setup
    grid = setup.grid
    tags = provenance(result)
    ds = result.fields
    years = [int(y) for y in ds.balance_year.values]
    with staged(out_dir) as st:
        write_csv(st.path("summary.csv"), result.summary)
        write_csv(st.path("profiles.csv"), result.profiles)
        write_csv(st.path("balanced_budget.csv"), balanced_budget(result.summary))
        for var, prefix, desc in MAPS:
            for i, year in enumerate(years):
                write_geotiff(st.path(f"{prefix}_{year}.tif"), ds[var].values[i], grid.transform, grid.crs,
                              [f"{desc}, balance year {year}"], "m w.e.", tags)
        mean = ds["annual_balance"].mean("balance_year").values
        write_geotiff(st.path("mean_annual_balance.tif"), mean, grid.transform, grid.crs,
                      [f"mean annual surface mass balance {years[0]}-{years[-1]}"], "m w.e.", tags)
        write_geotiff(st.path("glacier_id.tif"), setup.glaciers.id_map, grid.transform, grid.crs,
                      ["glacier id with the largest share of the cell (lookup in run.json)"], "1",
                      tags, dtype="int32", nodata=0)
        write_netcdf(st.path("balance.nc"), ds, grid.crs,
                     {"title": f"firnline surface mass balance, {result.config.site.name}",
                      "history": f"created by firnline {__version__}", **{k: tags[k] for k in
                      ("dem_sha256", "config_sha256", "melt_method", "warming_k", "precip_change_pct")}})
        write_json(st.path("run.json"), run_json(result, list(st.names)))
    return [Path(out_dir) / n for n in st.names]


MONTHS = ("January", "February", "March", "April", "May", "June", "July", "August", "September",
          "October", "November", "December")


def write_terrain(config, grid, slope, aspect, table, horizons, out_dir: Path) -> list[Path]:
    """Write the products of ``firnline terrain`` into ``out_dir``, all or nothing."""
    from .horizon import sector_azimuths_deg

    tags = {"firnline_version": __version__, "dem_sha256": grid.checksum,
            "transmissivity": f"{config.melt.transmissivity:g}",
            "time_step_minutes": str(config.radiation.time_step_minutes),
            "horizon_sectors": str(config.radiation.horizon_sectors),
            "horizon_distance_m": f"{config.radiation.horizon_distance_m:g}",
            "method": "potential clear-sky direct radiation, Hock (1999) after Oke (1987), cast shadows "
                      "by horizon sectors (Dozier and Frew 1990)"}
    with staged(out_dir) as st:
        write_geotiff(st.path("slope.tif"), slope, grid.transform, grid.crs,
                      ["slope angle (Horn 1981)"], "degree", tags)
        write_geotiff(st.path("aspect.tif"), aspect, grid.transform, grid.crs,
                      ["aspect, clockwise from north (NaN on flat cells)"], "degree", tags)
        write_geotiff(st.path("radiation_monthly.tif"), grid.to_grid(table.monthly_means()), grid.transform,
                      grid.crs, [f"mean daily potential direct radiation, {m}" for m in MONTHS], "W m-2", tags)
        write_geotiff(st.path("radiation_annual.tif"), grid.to_grid(table.annual_mean()), grid.transform, grid.crs,
                      ["mean daily potential direct radiation over the year"], "W m-2", tags)
        if horizons is not None:
            hz = np.where(grid.valid, np.degrees(horizons), np.nan)
            write_geotiff(st.path("horizon.tif"), hz, grid.transform, grid.crs,
                          [f"horizon angle towards azimuth {a:g} deg (grid north)"
                           for a in sector_azimuths_deg(horizons.shape[0])], "degree", tags)
    return [Path(out_dir) / n for n in st.names]


def summary_table(summary: pd.DataFrame) -> str:
    """The console's closing table: glacier, year, balance, ELA, AAR."""
    lines = [f"{'glacier':<20} {'year':>5} {'balance':>9} {'ELA':>7} {'AAR':>5}  flag",
             f"{'':<20} {'':>5} {'m w.e.':>9} {'m':>7} {'':>5}"]
    for r in summary.itertuples():
        ela = f"{r.ela_m:7.0f}" if np.isfinite(r.ela_m) else f"{'-':>7}"
        lines.append(f"{str(r.glacier)[:20]:<20} {r.balance_year:>5} {r.annual_balance_mwe:9.2f} "
                     f"{ela} {r.aar:5.2f}  {r.ela_flag}")
    return "\n".join(lines)


# ----------------------------------------------------------------------------
# the files of a scenario sweep
# ----------------------------------------------------------------------------

def map_name(warming_k: float, precip_change_pct: float) -> str:
    """File name of a scenario's mean-balance map, e.g. ``mean_annual_balance_w+1.0_p+0.tif``."""
    return f"mean_annual_balance_{scenario_label(warming_k, precip_change_pct)}.tif"


def write_sweep(result: Sweep, out_dir: Path) -> list[Path]:
    """Write every product of a sweep into ``out_dir``, all or nothing."""
    from .report import balance_figure, ela_figure, profile_figure, save_png  # matplotlib: only here
    setup, cfg = result.setup, result.config
    grid = setup.grid
    years = result.years
    site = cfg.site.name
    with staged(Path(out_dir)) as st:
        write_csv(st.path("scenarios.csv"), result.table[SCENARIO_COLUMNS])
        write_csv(st.path("scenario_years.csv"), result.year_table)
        write_csv(st.path("sensitivity.csv"), result.sensitivity)
        write_csv(st.path("scenario_profiles.csv"), result.profiles)
        for i, (w, p) in enumerate(result.scenarios):
            tags = provenance(SimpleNamespace(config=cfg, setup=setup, warming_k=w, precip_change_pct=p))
            write_geotiff(st.path(map_name(w, p)), result.mean_balance_map(i), grid.transform, grid.crs,
                          [f"mean annual surface mass balance {years[0]}-{years[-1]}, warming {w:+g} K, "
                           f"precipitation change {p:+g} %"], "m w.e.", tags)
        figures = [("ela_vs_warming.png", ela_figure(result.table, result.flags, result.glaciers, years, site)),
                   ("balance_vs_warming.png", balance_figure(result.table, result.glaciers, years, site)),
                   ("balance_profiles.png", profile_figure(result.profiles, result.glaciers, years, site))]
        for name, fig in figures:
            save_png(fig, st.path(name))
        path = st.path("scenarios.json")
        write_json(path, sweep_json(result, list(st.names)))
    return [Path(out_dir) / n for n in st.names]


def sweep_json(result: Sweep, files: list[str]) -> dict:
    """Provenance and rules of a sweep (``scenarios.json``)."""
    setup, cfg = result.setup, result.config
    rules = SCENARIO_RULES.split("Rules used here", 1)[1].split("\n", 2)[2]
    return {
        "firnline_version": __version__,
        "created_utc": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
        "caution": CAUTION,
        "config_file": cfg.source,
        "parameters": parameters_used(cfg),
        "input_sha256": setup.checksums,
        "scenarios": [{"warming_k": w, "precip_change_pct": p, "map": map_name(w, p),
                       "reference": i == result.reference} for i, (w, p) in enumerate(result.scenarios)],
        "balance_years": result.years,
        "rules": [r for r in (" ".join(x.replace("``", "").split()).lstrip("* ")
                              for x in rules.strip().split("\n* ")) if not r.startswith("Balanced")],
        "ela_flags": result.flags.to_dict(orient="records"),
        "glaciers": result.glaciers.to_dict(orient="records"),
        "notes": setup.notes,
        "timings_s": result.timings,
        "files": files,
    }


def sweep_table(result: Sweep) -> str:
    """The console's closing table: one line per glacier and scenario."""
    t = result.table.merge(result.flags, on=["glacier", "warming_k", "precip_change_pct"])
    lines = [f"{'glacier':<20} {'warming':>7} {'precip':>6} {'balance':>9} {'ELA':>6} {'shift':>6} "
             f"{'AAR':>5}  ELA off glacier",
             f"{'':<20} {'K':>7} {'%':>6} {'m w.e./a':>9} {'m':>6} {'m':>6} {'':>5}"]

    def num(v, fmt, width):
        return f"{format(v, fmt):>{width}}" if np.isfinite(v) else f"{'-':>{width}}"
    for r in t.itertuples():
        off = r.n_years - r.n_ela_ok
        lines.append(f"{str(r.glacier)[:20]:<20} {r.warming_k:>+7g} {r.precip_change_pct:>+6g} "
                     f"{r.mean_annual_balance_mwe:9.2f} {num(r.ela_m, '.0f', 6)} "
                     f"{num(r.ela_shift_m, '+.0f', 6)} {r.aar:5.2f}  "
                     f"{f'{off} of {r.n_years} years' if off else ''}")
    s = result.sensitivity
    lines.append("")
    lines.append(f"{'glacier':<20} {'dELA/dT':>9} {'dB/dT':>11}")
    lines.append(f"{'':<20} {'m per K':>9} {'m w.e./K':>11}")
    for r in s.itertuples():
        lines.append(f"{str(r.glacier)[:20]:<20} {num(r.dela_dt_m_per_k, '.0f', 9)} "
                     f"{num(r.dbalance_dt_mwe_per_k, '.3f', 11)}  {r.note}")
    lines.append("ELA: mean over the years with the ELA on the glacier; see scenarios.json for the rules.")
    return "\n".join(lines)
