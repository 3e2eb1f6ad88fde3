"""The files of a run and of ``firnline terrain``: which products, named how, with which provenance.

``write_run`` and ``write_terrain`` are the single places that know those output
layouts (see the contract in DESIGN.md); a sweep's files are
:mod:`firnline.scenario_products`; the generic writers live in :mod:`firnline.outputs`
and the provenance in :mod:`firnline.provenance`.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pandas as pd

from . import __version__, provenance
from .metrics import balanced_budget
from .model import RunResult, TerrainResult, parameters_used
from .outputs import staged, write_csv, write_geotiff, write_json, write_netcdf

MAPS = [  # (variable in fields, file prefix, description)
    ("annual_balance", "annual_balance", "annual surface mass balance"),
    ("winter_balance", "winter_balance", "winter surface mass balance (fixed-date system)"),
    ("summer_balance", "summer_balance", "summer surface mass balance (fixed-date system)"),
    ("accumulation", "accumulation", "accumulation (snowfall)"),
    ("ablation", "ablation", "ablation (melt of snow and ice)"),
]


def run_tags(result: RunResult) -> dict:
    """Tags written into every GeoTIFF of a run."""
    return provenance.run_tags(result.config, result.setup.checksums, result.warming_k,
                               result.precip_change_pct)


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
        **provenance.header(cfg),
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
    tags = run_tags(result)
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


def write_terrain(result: TerrainResult, out_dir: Path) -> list[Path]:
    """Write the products of ``firnline terrain`` into ``out_dir``, all or nothing.

    Each file carries the provenance of what it depends on
    (:func:`firnline.provenance.terrain_tags`).
    """
    from .horizon import sector_azimuths_deg

    cfg, grid, table, horizons = result.config, result.grid, result.radiation, result.horizons
    tags = {k: provenance.terrain_tags(cfg, result.checksums, k) for k in ("slope", "radiation", "horizon")}

    def tif(name, bands, descriptions, units, product):
        write_geotiff(st.path(name), bands, grid.transform, grid.crs, descriptions, units, tags[product])

    with staged(out_dir) as st:
        tif("slope.tif", result.slope_deg, ["slope angle (Horn 1981)"], "degree", "slope")
        tif("aspect.tif", result.aspect_deg, ["aspect, clockwise from north (NaN on flat cells)"], "degree",
            "slope")
        tif("radiation_monthly.tif", grid.to_grid(table.monthly_means()),
            [f"mean daily potential direct radiation, {m}" for m in MONTHS], "W m-2", "radiation")
        tif("radiation_annual.tif", grid.to_grid(table.annual_mean()),
            ["mean daily potential direct radiation over the year"], "W m-2", "radiation")
        if horizons is not None:
            tif("horizon.tif", np.where(grid.valid, np.degrees(horizons), np.nan),
                [f"horizon angle towards azimuth {a:g} deg (grid north)"
                 for a in sector_azimuths_deg(horizons.shape[0])], "degree", "horizon")
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
