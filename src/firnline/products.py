"""The files of a run and of ``firnline terrain``: which products, named how, with which provenance.

``write_run`` and ``write_terrain`` are the single places that know those output
layouts (see the contract in DESIGN.md); a sweep's files are
:mod:`firnline.scenario_products`; the generic writers live in :mod:`firnline.outputs`
and the provenance in :mod:`firnline.provenance`.
"""

from __future__ import annotations

import dataclasses
import warnings
from pathlib import Path

import dask
import numpy as np
import pandas as pd

from . import __version__, provenance, yearmaps
from .metrics import balanced_budget
from .model import RunResult, TerrainResult, parameters_used
from .outputs import staged, write_csv, write_geotiff, write_json, write_netcdf
from .yearmaps import reduce_years

MAPS = [  # (variable in fields, file prefix, description)
    ("annual_balance", "annual_balance", "annual surface mass balance"),
    ("winter_balance", "winter_balance", "winter surface mass balance (fixed-date system)"),
    ("summer_balance", "summer_balance", "summer surface mass balance (fixed-date system)"),
    ("accumulation", "accumulation", "accumulation (snowfall, refreezing, deposition by sliding snow)"),
    ("ablation", "ablation", "ablation (melt of snow, firn and ice, loss by sliding snow)"),
    ("snow_end", "snow_end", "snow and firn at the end of the balance year"),
    ("refreezing", "refreezing", "refrozen rain and meltwater"),
    ("redistribution", "redistribution", "net gain (+) or loss (-) by sliding snow"),
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
        "initial_condition": initial_condition(cfg, setup),
        "compute": {"units": result.timings.get("units", 1), "scheduler": result.compute,
                    "modelled_cells": int(np.isfinite(np.asarray(result.fields["accumulation"][0])).sum())
                    if result.fields.sizes.get("balance_year") else 0},
        "glacier_lookup": {str(i + 1): n for i, n in enumerate(setup.glaciers.names)},
        **glacier_results(result),
        "notes": result.notes,
        **({"discharge_check": result.gauge} if result.gauge is not None else {}),
        "timings_s": result.timings,
        "files": files,
    }


def initial_condition(cfg, setup) -> dict:
    """How the run started (run.json): the spin-up and the processes of ``[snow]``."""
    n = int(cfg.snow.spinup_years)
    years = [int(y) for y in setup.forcing.years]
    cycled = [years[k % len(years)] for k in range(n)] if years else []
    return {"spinup_years": n, "spinup_balance_years": cycled,
            "description": (f"snow, firn, liquid water and cold content spun up by cycling the balance years "
                            f"{', '.join(map(str, cycled))} before the first modelled year" if n else
                            "no snow, firn, liquid water or cold content on the first day of the record"),
            "redistribution": cfg.snow.redistribution, "refreezing": cfg.snow.refreezing,
            "firn_years": int(cfg.snow.firn_years)}


AGGREGATE = "all_glaciers"
"""Name of the area-weighted rows over every glacier in summary.csv."""

SUMMARY_EXTRA = ["ablation_gradient_mwe_per_100m"]


def summary_csv(result: RunResult) -> pd.DataFrame:
    """summary.csv: the run's summary with the ablation-area balance gradient, and one
    ``all_glaciers`` row per balance year.

    The all-glaciers row weights each glacier by its area: the balances are the
    area-weighted means (the specific balance of the ice cover as a whole) and the AAR
    is the accumulation area of all glaciers over their area; the ELA, its flag and the
    gradient belong to single glaciers and stay empty.
    """
    from .errors import InputError
    s = result.summary.merge(result.gradients.rename(columns={"gradient_mwe_per_100m": SUMMARY_EXTRA[0]}),
                             on=["glacier", "balance_year"], how="left")
    if (s.glacier.astype(str) == AGGREGATE).any():
        raise InputError(f"A glacier is named {AGGREGATE!r}, the name summary.csv gives the rows over all "
                         f"glaciers; rename it in the outlines' id field.")
    rows = []
    for year, r in s.groupby("balance_year", sort=True):
        w = r.area_km2.to_numpy()
        tot = float(w.sum())
        row = {"glacier": AGGREGATE, "balance_year": int(year), "area_km2": tot}
        for c in ("annual_balance_mwe", "winter_balance_mwe", "summer_balance_mwe", "aar"):
            row[c] = float(np.sum(r[c].to_numpy() * w) / tot) if tot > 0 else np.nan
        row.update(ela_m=np.nan, ela_flag="", **{SUMMARY_EXTRA[0]: np.nan})
        rows.append(row)
    return pd.concat([s, pd.DataFrame(rows, columns=s.columns)], ignore_index=True)


def year_bounds(years, year_start: str) -> list[tuple]:
    """(first day, day after the last) of each balance year (fixed-date system)."""
    from .forcing import _year_start_date
    return [(_year_start_date(int(y), year_start), _year_start_date(int(y) + 1, year_start)) for y in years]


def netcdf_cell_methods(config) -> dict:
    """CF cell_methods (CF 1.8 section 7.3) of the fields of balance.nc."""
    b = config.balance
    winter = f"winter of the balance year, {b.year_start} to {b.winter_end}, fixed-date system"
    summer = f"summer of the balance year, the day after {b.winter_end} to the day before {b.year_start}"
    return {
        "annual_balance": "time: sum (comment: daily balances summed over the balance year) "
                          "area: mean where land_ice",
        "winter_balance": f"time: sum (comment: daily balances summed over the {winter}) area: mean where land_ice",
        "summer_balance": f"time: sum (comment: daily balances summed over the {summer}) area: mean where land_ice",
        "accumulation": "time: sum (comment: snowfall, refreezing and deposition summed over the balance year) "
                        "area: mean",
        "ablation": "time: sum (comment: melt and loss by sliding summed over the balance year) area: mean",
        "snow_end": "time: point (comment: snow and firn on the last day of the balance year) area: mean",
        "refreezing": "time: sum (comment: refreezing summed over the balance year) area: mean",
        "redistribution": "time: sum (comment: net gain by sliding snow over the balance year) area: mean",
    }


def write_run(result: RunResult, out_dir: Path, report: bool = True) -> list[Path]:
    """Write every product of a run into ``out_dir``, all or nothing.

    With ``report`` (the default) the maps, charts and ``report.html`` are written too.
    """
    import time

    from . import gis
    setup = result.setup
    grid = setup.grid
    tags = run_tags(result)
    ds = result.fields
    years = [int(y) for y in ds.balance_year.values]
    summary = summary_csv(result)
    budget = balanced_budget(result.summary)
    # maps held in a file are read a strip or a year at a time in this process, even when a
    # dask.distributed client is the default scheduler
    with dask.config.set(scheduler="synchronous"), staged(out_dir) as st:
        write_csv(st.path("summary.csv"), summary)
        write_csv(st.path("profiles.csv"), result.profiles)
        write_csv(st.path("balanced_budget.csv"), budget)
        if result.water_budget is not None:
            write_csv(st.path("water_budget.csv"), result.water_budget)
        for var, prefix, desc in MAPS:
            if var not in ds:
                continue
            for i, year in enumerate(years):
                write_geotiff(st.path(f"{prefix}_{year}.tif"), ds[var].data[i], grid.transform, grid.crs,
                              [f"{desc}, balance year {year}"], "m w.e.", tags)
        mean = record_mean(ds["annual_balance"])
        write_geotiff(st.path("mean_annual_balance.tif"), mean, grid.transform, grid.crs,
                      [f"mean annual surface mass balance {years[0]}-{years[-1]}"], "m w.e.", tags)
        write_geotiff(st.path("glacier_id.tif"), setup.glaciers.id_map, grid.transform, grid.crs,
                      ["glacier id with the largest share of the cell (names in glacier_id.tif.aux.xml and "
                       "run.json)"], "1", tags, dtype="int32", nodata=0)
        gis.write_rat_sidecar(st.path("glacier_id.tif.aux.xml"), setup.glaciers.names)
        write_netcdf(st.path("balance.nc"), ds, grid.crs,
                     {"title": f"firnline surface mass balance, {result.config.site.name}",
                      "institution": "", "source": f"firnline {__version__}, temperature-index surface mass "
                      f"balance model ({result.config.melt.method} method)",
                      "history": f"created by firnline {__version__}", "comment": provenance.CAUTION,
                      **{k: tags[k] for k in
                      ("dem_sha256", "config_sha256", "melt_method", "warming_k", "precip_change_pct")}},
                     year_bounds=year_bounds(years, result.config.balance.year_start),
                     cell_methods=netcdf_cell_methods(result.config))
        outlines = gis.outline_geometries(result.config, grid, setup.glaciers)
        lines = ela_lines_all(result, summary, mean)
        write_glaciers_gpkg(st.path("glaciers.gpkg"), result, summary, budget, outlines, lines)
        if result.runoff is not None:
            from .runoff_products import write_run_runoff
            write_run_runoff(st, result.runoff, result.config.balance.year_start,
                             {"title": f"firnline daily runoff, {result.config.site.name}",
                              **{k: tags[k] for k in ("dem_sha256", "config_sha256", "warming_k",
                                                       "precip_change_pct")}})
        if report:
            t0 = time.perf_counter()
            from .documents import run_document
            figures = run_figures(result, summary, budget, outlines, lines)
            for name, png in figures_files(figures):
                st.path(name).write_bytes(png)
            st.path("report.html")
            names_after = list(st.names) + ["run.json"]
            st.path("report.html").write_text(run_document(result, summary, budget, figures, names_after,
                                                           provenance.CAUTION), encoding="utf-8")
            result.timings["report_s"] = time.perf_counter() - t0
        write_json(st.path("run.json"), run_json(result, list(st.names)))
    return [Path(out_dir) / n for n in st.names]


def record_mean(maps) -> np.ndarray:
    """The mean over the balance years of (balance_year, y, x) maps (xarray), NaN-skipping as xarray's
    mean is, one strip of rows at a time (:func:`firnline.yearmaps.reduce_years`)."""
    return reduce_years(maps, lambda strip: strip.mean("balance_year").values)


def ela_lines_all(result: RunResult, summary: pd.DataFrame, mean: np.ndarray | None = None) -> dict:
    """ELA contour lines per (glacier, balance year) and (glacier, "mean"), map coordinates;
    ``mean``: the record-mean annual balance map (default: computed, :func:`record_mean`)."""
    from .gis import ela_lines
    from .metrics import ela
    setup = result.setup
    grid = setup.grid
    gl = setup.glaciers
    x, y = grid.cell_centres()
    s = summary.set_index(["glacier", "balance_year"])
    if mean is None:
        mean = record_mean(result.fields["annual_balance"])
    out = {}
    for k, name in enumerate(gl.names):
        inside = gl.id_map == k + 1
        for year in result.fields.balance_year.values:
            out[(name, int(year))] = ela_lines(grid.elevation, x, y, inside, float(s.ela_m.get((name, int(year)),
                                                                                             np.nan)))
        cells, frac = gl.cells[k], gl.fractions[k]
        mean_ela, flag = ela(grid.elevation.ravel()[cells], mean.ravel()[cells].astype("float64"),
                             frac * grid.cell_area_m2, result.config.balance.band_width_m)
        out[(name, "mean")] = ela_lines(grid.elevation, x, y, inside, mean_ela) if flag == "ok" else []
        out[(name, "mean_ela_m")] = mean_ela
    return out


def write_glaciers_gpkg(path: Path, result: RunResult, summary: pd.DataFrame, budget: pd.DataFrame,
                        outlines: list, lines: dict) -> None:
    """glaciers.gpkg: layers outlines (record means), glacier_years (per year) and ela_lines."""
    from .gis import write_geopackage
    names = list(result.setup.glaciers.names)
    s = summary[summary.glacier != AGGREGATE]
    per = (s.groupby("glacier", sort=False)
           .agg(area_km2=("area_km2", "first"), mean_annual_balance_mwe=("annual_balance_mwe", "mean"),
                mean_winter_balance_mwe=("winter_balance_mwe", "mean"),
                mean_summer_balance_mwe=("summer_balance_mwe", "mean"), mean_ela_m=("ela_m", "mean"),
                mean_aar=("aar", "mean"), cumulative_balance_mwe=("annual_balance_mwe", "sum"),
                n_years=("balance_year", "count")).reset_index())
    per = per.merge(budget[["glacier", "ela0_m", "aar0"]], on="glacier", how="left")
    per["glacier"] = per.glacier.astype(str)
    yl = s.copy()
    yl["glacier"] = yl.glacier.astype(str)
    ela = {k: v for k, v in lines.items() if isinstance(k[1], int)}
    write_geopackage(path, result.setup.grid.crs, list(range(1, len(names) + 1)), [str(n) for n in names],
                     outlines, per, yl, ela)


def run_figures(result: RunResult, summary: pd.DataFrame, budget: pd.DataFrame, outlines: list, lines: dict):
    """Draw the maps and charts of a run (PNG bytes); see :mod:`firnline.maps`, :mod:`firnline.charts`."""
    from .charts import glacier_figure, overview_figure, png_bytes
    from .documents import RunFigures
    from .maps import BalanceMaps, MapData, colour_limit, plan_views, slug
    from .report import MAX_PANELS

    setup, cfg = result.setup, result.config
    grid, gl = setup.grid, setup.glaciers
    site = cfg.site.name
    ds = result.fields
    years = [int(y) for y in ds.balance_year.values]
    s = summary[summary.glacier != AGGREGATE]
    totals = summary[summary.glacier == AGGREGATE]
    area = s.groupby("glacier", sort=False).area_km2.first()
    names = list(gl.names)
    # charts: the largest glaciers
    charts = {}
    for name in sorted(names, key=lambda n: -float(area.get(n, 0.0)))[:MAX_PANELS]:
        b = budget[budget.glacier == name]
        fig = glacier_figure(str(name), s[s.glacier == name], result.profiles[result.profiles.glacier == name],
                             b.iloc[0] if len(b) else None, site)
        charts[name] = (f"chart_{slug(name)}.png", png_bytes(fig))
    overview = None
    if len(names) > 1:
        overview = ("chart_all_glaciers.png", png_bytes(overview_figure(s, totals, site)))
    # maps
    x, y = grid.cell_centres()
    data = MapData(elevation=grid.elevation, id_map=gl.id_map, x=x, y=y, cell_size_m=grid.cell_size_m,
                   crs=grid.crs, crs_label=grid.crs.to_string(), names=names, outlines=outlines)
    views = plan_views(grid.valid, gl.id_map, names, [float(area.get(n, 0.0)) for n in names], site)
    seasons = ("annual_balance", "winter_balance", "summer_balance")
    periods = years + ["mean"]
    means = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)   # cells off the glaciers are NaN in every year
        for v in seasons:
            means[v] = reduce_years(ds[v].data, lambda a: np.nanmean(a, axis=0))
    ela_text = {}
    for p in periods:
        if p == "mean":
            ela_text[p] = "; dashed: the ELA of the record-mean balance profile"
        else:
            ela_text[p] = "; dashed: the year's ELA"
    maps = {}
    for view in views:
        # a view's window is read once for every year when that is small, else one year at a time
        # (the maps of a large run live in a file)
        win = (slice(view.r0, view.r1), slice(view.c0, view.c1))
        cells = (view.r1 - view.r0) * (view.c1 - view.c0)
        stack = None
        if len(seasons) * len(years) * cells * 4 <= yearmaps.STRIP_BYTES:
            stack = {v: np.asarray(ds[v].data[(slice(None), *win)]) for v in seasons}

        def year_window(v, i):
            return stack[v][i] if stack is not None else np.asarray(ds[v].data[(i, *win)])
        finite = []
        for v in seasons:
            for i in range(len(years)):
                a = year_window(v, i)
                finite.append(a[np.isfinite(a)])
        vmax = colour_limit(finite)
        del finite
        drawer = BalanceMaps(data, view, vmax, site)
        for p in periods:
            fields = {v: (means[v][win] if p == "mean" else year_window(v, years.index(p))) for v in seasons}
            ela = {k + 1: lines.get((n, p), []) for k, n in enumerate(names)}
            label = f"mean of the balance years {years[0]}-{years[-1]}" if p == "mean" else f"balance year {p}"
            maps[(view.key, p)] = (f"map_{view.key}_{p}.png", drawer.draw(label, fields, ela))
        drawer.close()
    hydrograph = None
    if result.runoff is not None:
        from .runoff_products import hydrograph_figure
        fig = hydrograph_figure(result.runoff, cfg.balance.year_start, setup.discharge, result.gauge, site)
        hydrograph = ("chart_hydrograph.png", png_bytes(fig))
    return RunFigures(overview=overview, glacier_charts=charts, maps=maps, views=views, periods=periods,
                      ela_text=ela_text, hydrograph=hydrograph)


def figures_files(figures) -> list[tuple[str, bytes]]:
    out = []
    if figures.overview is not None:
        out.append(figures.overview)
    out += list(figures.glacier_charts.values())
    if figures.hydrograph is not None:
        out.append(figures.hydrograph)
    out += [figures.maps[k] for k in figures.maps]
    return out


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
