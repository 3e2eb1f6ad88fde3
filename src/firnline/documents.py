"""What each command's report says: the run report, the scenario report and the
calibration report, all built with :class:`firnline.page.Page` (one look).

The functions here take results and figures (PNG bytes) and return the HTML
text; the files are written by :mod:`firnline.products` and
:mod:`firnline.calibrate`.
"""

from __future__ import annotations

import dataclasses
import re
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd

from . import __version__
from .config import PATH_KEYS, REQUIRED, SCHEMA, Config
from .page import Page

UNIT = "m w.e."

INPUT_LABELS = {"dem": "DEM", "outlines": "glacier outlines", "station": "climate station record",
                "config": "config file", "point_balances": "point balances (stakes, snow probing)",
                "glacier_balances": "glacier-wide balances", "snowlines": "snowlines",
                "discharge": "discharge record"}


# ----------------------------------------------------------------------------
# parameters and where they came from
# ----------------------------------------------------------------------------

def fitted_keys(config: Config) -> set[str]:
    """Keys a calibration fitted (or tied), read from the header that ``calibrate``
    writes at the top of calibrated.toml ("Fitted: key = value, ...; tied: ...")."""
    if config.source is None:
        return set()
    try:
        head = Path(config.source).read_text(encoding="utf-8")[:4000]
    except OSError:
        return set()
    keys: set[str] = set()
    for line in head.splitlines():
        text = line.lstrip("# ").strip()
        if text.startswith("Fitted:"):
            keys |= set(re.findall(r"([a-z_][a-z0-9_]*)\s*=", text))
        if not line.startswith("#") and line.strip():
            break
    return keys


def _show(v) -> str:
    if isinstance(v, (tuple, list)):
        return "[" + ", ".join(_show(x) for x in v) + "]"
    if isinstance(v, float):
        return f"{v:.6g}"
    return str(v)


def parameter_sources(config: Config, fitted: set | None = None) -> pd.DataFrame:
    """Every setting of the config with its value and where it came from.

    ``source`` is ``calibration`` for a key that a calibration fitted (``fitted``, or
    by default the keys named in the header of a calibrated.toml), ``config`` for a key
    written in the config file, ``default`` for a key left out (its value is the default
    of :data:`firnline.config.SCHEMA`). Model parameters add their unit and published
    source from the registry (:mod:`firnline.parameters`). Paths (listed with the
    inputs) and the ``[calibration]`` and ``[observations]`` sections are left out.
    """
    from . import parameters as registry
    fitted = fitted_keys(config) if fitted is None else set(fitted)
    rows = []
    for section, keys in SCHEMA.items():
        if section in ("calibration", "observations", "site"):
            continue
        obj = getattr(config, section, None)
        if obj is None:
            continue
        written = config.raw.get(section, {}) if isinstance(config.raw.get(section), dict) else {}
        for key, (_, default) in keys.items():
            if (section, key) in PATH_KEYS or not hasattr(obj, key):
                continue
            value = getattr(obj, key)
            if value is None and key not in written:
                continue
            if key in fitted and key in written:
                source = "calibration"
            elif key in written:
                source = "config"
            else:
                source = "default"
            same = default is not REQUIRED and default is not None and _show(default) == _show(value)
            par = registry.get(key)
            rows.append([f"[{section}] {key}", _show(value), par.unit if par else "", source,
                         "" if default in (REQUIRED, None) else _show(default),
                         "yes" if same else ("" if default in (REQUIRED, None) else "no"),
                         par.source if par else ""])
    return pd.DataFrame(rows, columns=["setting", "value", "unit", "source", "default", "equals default",
                                       "published source of the default"])


# ----------------------------------------------------------------------------
# shared sections
# ----------------------------------------------------------------------------

def input_paths(config: Config) -> dict:
    """The input files the config names, by kind (DEM, outlines, station, observations, config)."""
    paths = {"dem": config.dem.path, "station": config.climate.station_file}
    if config.glaciers is not None:
        paths["outlines"] = config.glaciers.outlines
    obs = getattr(config, "observations", None)
    for key in ("point_balances", "glacier_balances", "snowlines", "discharge"):
        if obs is not None and getattr(obs, key, None):
            paths[key] = getattr(obs, key)
    if config.source is not None:
        paths["config"] = config.source
    return paths


def inputs_table(config: Config, checksums: dict) -> pd.DataFrame:
    paths = input_paths(config)
    rows = [[INPUT_LABELS.get(k, k), str(paths.get(k, "")), v] for k, v in checksums.items()]
    return pd.DataFrame(rows, columns=["input", "file", "SHA-256"])


def input_checksums(config: Config) -> dict:
    """SHA-256 of every input file the config names."""
    from .grid import file_checksum
    return {k: file_checksum(Path(p)) for k, p in input_paths(config).items() if p and Path(p).is_file()}


def _common_tail(page: Page, config: Config, checksums: dict, notes: Sequence[str],
                 warnings: Sequence[str] = (), fitted: set | None = None) -> None:
    page.section("Inputs")
    page.paragraph("The files this result was computed from, with their SHA-256 checksums (a changed file "
                   "gives a different checksum).")
    page.table(inputs_table(config, checksums), hash_columns=("SHA-256",))
    page.section("Parameters")
    page.paragraph("Every setting in force and where it came from: written in the config file, left at "
                   "firnline's default, or fitted by a calibration (a calibrated.toml).")
    page.table(parameter_sources(config, fitted))
    page.section("Notes and warnings")
    if warnings:
        page.subsection("Warnings")
        page.notes(warnings)
    page.subsection("Notes of the run")
    page.notes(notes, empty="No notes.")


def _page(config: Config, title: str, subtitle: str, caution: str) -> Page:
    """A page titled "<title> — <site>" with the version, the subtitle and the config file."""
    return Page(f"{title} — {config.site.name}", subtitle=f"firnline {__version__} · {subtitle}",
                caution=caution, meta={"config": config.source or "(in memory)"})


SUMMARY_HEADERS = {"glacier": "glacier", "balance_year": "year", "area_km2": "area (km²)",
                   "annual_balance_mwe": f"annual ({UNIT})", "winter_balance_mwe": f"winter ({UNIT})",
                   "summer_balance_mwe": f"summer ({UNIT})", "ela_m": "ELA (m)", "aar": "AAR",
                   "ela_flag": "ELA flag", "ablation_gradient_mwe_per_100m": f"ablation gradient ({UNIT} per 100 m)"}
SUMMARY_DIGITS = {"area_km2": 3, "annual_balance_mwe": 2, "winter_balance_mwe": 2, "summer_balance_mwe": 2,
                  "ela_m": 0, "aar": 2, "ablation_gradient_mwe_per_100m": 3}


# ----------------------------------------------------------------------------
# run
# ----------------------------------------------------------------------------

@dataclasses.dataclass
class RunFigures:
    """PNG bytes of a run's figures with their file names."""

    overview: tuple[str, bytes] | None
    glacier_charts: dict           # glacier -> (file name, png)
    maps: dict                     # (view key, period) -> (file name, png)
    views: list                    # maps.View in order
    periods: list                  # period keys (years, then "mean")
    ela_text: dict                 # period -> text about the ELA line
    hydrograph: tuple[str, bytes] | None = None   # the catchment's hydrograph and regime


def run_document(result, summary: pd.DataFrame, budget: pd.DataFrame, figures: RunFigures,
                 files: Sequence[str], caution: str) -> str:
    """The HTML of a run's ``report.html``.

    summary : summary.csv as written (with the all_glaciers rows and the gradient)
    budget : balanced_budget.csv
    """
    cfg, setup = result.config, result.setup
    years = [int(y) for y in result.fields.balance_year.values]
    site = cfg.site.name
    names = list(setup.glaciers.names)
    page = _page(cfg, "Surface mass balance",
                 f"balance years {years[0]}–{years[-1]} · {len(names)} glacier{'s' if len(names) != 1 else ''}"
                 f" · melt method {cfg.melt.method}"
                 + (f" · scenario: warming {result.warming_k:+g} K, precipitation {result.precip_change_pct:+g} %"
                    if result.warming_k or result.precip_change_pct else ""), caution)
    # summary of the job
    page.section("Summary")
    tot = summary[summary.glacier == "all_glaciers"]
    g = setup.grid
    page.facts([
        ("site", site),
        ("balance years", f"{years[0]}–{years[-1]} ({len(years)} years, fixed-date system: year from "
                          f"{cfg.balance.year_start}, winter to {cfg.balance.winter_end})"),
        ("record", f"{setup.forcing.dates[0]} to {setup.forcing.dates[-1]}"),
        ("glaciers", f"{len(names)}, {tot.area_km2.iloc[0]:.2f} km² in all" if len(tot) else str(len(names))),
        ("grid", f"{g.shape[1]} × {g.shape[0]} cells of {g.cell_size_m[0]:g} × {g.cell_size_m[1]:g} m, "
                 f"{g.crs.to_string()}"),
        ("mean annual balance, all glaciers", f"{tot.annual_balance_mwe.mean():.2f} {UNIT} per year" if len(tot)
         else ""),
        ("cumulative balance, all glaciers", f"{tot.annual_balance_mwe.sum():.2f} {UNIT} over the record"
         if len(tot) else ""),
        ("initial condition", "no snow on the first day of the record; the snowpack carries over between years"),
    ])
    page.paragraph("Balances are specific balances (area-weighted means over each glacier) in metres of water "
                   f"equivalent ({UNIT}); the all-glaciers rows weight every glacier by its area. The ELA is "
                   "empty when the whole glacier gained (below_glacier) or lost (above_glacier) mass in a year.")
    means = (summary[summary.glacier != "all_glaciers"].groupby("glacier", sort=False)
             .agg(area_km2=("area_km2", "first"), annual_balance_mwe=("annual_balance_mwe", "mean"),
                  winter_balance_mwe=("winter_balance_mwe", "mean"), summer_balance_mwe=("summer_balance_mwe", "mean"),
                  ela_m=("ela_m", "mean"), aar=("aar", "mean"),
                  ablation_gradient_mwe_per_100m=("ablation_gradient_mwe_per_100m", "mean")).reset_index())
    means = means.merge(budget[["glacier", "ela0_m", "aar0"]], on="glacier", how="left")
    hdr = dict(SUMMARY_HEADERS, annual_balance_mwe=f"mean annual ({UNIT})", winter_balance_mwe=f"mean winter ({UNIT})",
               summer_balance_mwe=f"mean summer ({UNIT})", ela_m="mean ELA (m)", aar="mean AAR",
               ablation_gradient_mwe_per_100m=f"mean ablation gradient ({UNIT} per 100 m)",
               ela0_m="ELA0 (m)", aar0="AAR0")
    page.subsection("Record means per glacier")
    page.table(means, digits=dict(SUMMARY_DIGITS, ela0_m=0, aar0=2), headers=hdr)
    page.paragraph("Mean ELA: over the years with the ELA on the glacier. ELA0 and AAR0: the ELA and AAR of a "
                   "balanced budget, from the regression of the yearly ELA and AAR on the annual balance "
                   "(Dyurgerov, Meier & Bahr 2009); see balanced_budget.csv for the fit and its notes.")
    if figures.overview is not None:
        page.figure(figures.overview[1], "annual balance of each glacier per balance year",
                    f"{figures.overview[0]}: annual balance per balance year; black: all glaciers, area-weighted.")
    # per glacier
    page.section("Glaciers")
    for name in names:
        rows = summary[summary.glacier == name]
        page.subsection(str(name), anchor=f"g-{_anchor(name)}")
        page.table(rows.drop(columns=["glacier"]), digits=SUMMARY_DIGITS, headers=SUMMARY_HEADERS)
        b = budget[budget.glacier == name]
        if len(b) and isinstance(b.note.iloc[0], str) and b.note.iloc[0]:
            page.paragraph(f"Balanced budget: {b.note.iloc[0]}")
        if name in figures.glacier_charts:
            fname, png = figures.glacier_charts[name]
            page.figure(png, f"charts of {name}",
                        f"{fname}: balance profile of each year (dots at the ELA), hypsometry, winter, summer "
                        f"and annual balance, cumulative balance, ELA with ELA0 and AAR with AAR0.")
    missing = [n for n in names if n not in figures.glacier_charts]
    if missing:
        page.paragraph(f"Charts are drawn for the {len(figures.glacier_charts)} largest glaciers; the tables above "
                       f"cover all {len(names)}.")
    page.subsection("All glaciers (area-weighted)")
    page.table(tot.drop(columns=["glacier", "ela_m", "ela_flag", "ablation_gradient_mwe_per_100m"],
                        errors="ignore"), digits=SUMMARY_DIGITS, headers=SUMMARY_HEADERS)
    if figures.hydrograph is not None:
        page.section("Runoff")
        if result.gauge is not None:
            sc = result.gauge
            page.facts([("gauge record", str(sc["source"])),
                        ("days compared", f"{sc['days']} ({sc['first_day']} to {sc['last_day']})"),
                        ("Nash-Sutcliffe efficiency", "n/a" if sc["nse"] is None else f"{sc['nse']:.2f}"),
                        ("Kling-Gupta efficiency", "n/a" if sc["kge"] is None else f"{sc['kge']:.2f}"),
                        ("volume error", "n/a" if sc["volume_error"] is None
                         else f"{100 * sc['volume_error']:+.1f} %")])
        page.figure(figures.hydrograph[1], "daily discharge and monthly regime of the catchment",
                    f"{figures.hydrograph[0]}: routed daily discharge with the routed glacier-ice melt shaded, "
                    "and the mean monthly regime by reservoir; runoff.csv and runoff_monthly.csv hold the "
                    "numbers. NSE: Nash & Sutcliffe (1970); KGE: Gupta et al. (2009).")
    # maps
    page.section("Maps")
    page.paragraph(f"Annual, winter and summer balance ({UNIT}) over a hillshade of the DEM, with the glacier "
                   "outlines and, on the annual panel, the ELA as a dashed line. The colour scale is centred "
                   "on zero (red: loss, blue: gain) and the same for every year of a map view. Coordinates are "
                   f"in {g.crs.to_string()}; the arrow points to true north.")
    if len(figures.views) == 1 and len(names) > 1:
        page.paragraph("Every glacier is drawn at the DEM's full resolution in the catchment map, so none needs "
                       "a map of its own (a glacier gets one on a DEM too large to show it in full detail).")
    elif len(figures.views) > 1:
        page.paragraph("The catchment map is reduced to fit the page; the largest glaciers also have maps of "
                       "their own at a finer resolution.")
    for view in figures.views:
        page.subsection("Catchment" if view.key == "catchment" else f"{view.title}")
        for period in figures.periods:
            key = (view.key, period)
            if key not in figures.maps:
                continue
            fname, png = figures.maps[key]
            label = "record mean" if period == "mean" else f"balance year {period}"
            page.figure(png, f"balance maps of {view.title}, {label}",
                        f"{fname}: {label}{figures.ela_text.get(period, '')}.")
    _common_tail(page, cfg, setup.checksums, result.notes)
    page.section("Files")
    page.paragraph("Written to the output folder with this report:")
    page.notes(sorted(files))
    return page.render()


def _anchor(name) -> str:
    return re.sub(r"[^A-Za-z0-9_-]+", "-", str(name)).strip("-") or "glacier"


# ----------------------------------------------------------------------------
# scenarios
# ----------------------------------------------------------------------------

def sweep_document(result, figures: Sequence[tuple[str, bytes, str]], files: Sequence[str], caution: str,
                   rules: Sequence[str]) -> str:
    """The HTML of ``scenarios_report.html`` (figures: (file name, png, caption))."""
    cfg, setup = result.config, result.setup
    years = result.years
    page = _page(cfg, "Warming and precipitation scenarios",
                 f"balance years {years[0]}–{years[-1]} · {len(result.scenarios)} scenarios · "
                 f"melt method {cfg.melt.method}", caution)
    page.section("Summary")
    page.facts([("scenarios", ", ".join(f"{w:+g} K / {p:+g} %" for w, p in result.scenarios)),
                ("reference", "0 K, 0 % (always modelled)"),
                ("glaciers", str(len(result.glaciers)))])
    page.subsection("Sensitivity per glacier")
    page.table(result.sensitivity, digits={"dela_dt_m_per_k": 0, "dbalance_dt_mwe_per_k": 3},
               headers={"dela_dt_m_per_k": "dELA/dT (m per K)",
                        "dbalance_dt_mwe_per_k": f"dB/dT ({UNIT} per K)", "n_warming_steps": "warming steps",
                        "n_ela_years_used": "years used for dELA/dT",
                        "n_ela_years_excluded": "years left out", "note": "note"})
    page.section("Figures")
    for name, png, caption in figures:
        page.figure(png, name, f"{name}: {caption}")
    page.section("Scenario means per glacier")
    page.table(result.table, digits={"mean_annual_balance_mwe": 2, "ela_m": 0, "aar": 2, "ela_shift_m": 0,
                                     "warming_k": 2, "precip_change_pct": 1},
               headers={"mean_annual_balance_mwe": f"mean annual balance ({UNIT})", "ela_m": "mean ELA (m)",
                        "aar": "mean AAR",
                        "ela_shift_m": "ELA shift (m)", "warming_k": "warming (K)",
                        "precip_change_pct": "precipitation change (%)"})
    page.subsection("Rules of the means and slopes")
    page.notes(rules)
    _common_tail(page, cfg, setup.checksums, result.notes)
    page.section("Files")
    page.notes(sorted(files))
    return page.render()


# ----------------------------------------------------------------------------
# calibration
# ----------------------------------------------------------------------------

def calibration_document(result, fit_png: bytes | None, files: Sequence[str], caution: str) -> str:
    """The HTML of ``calibration_report.html``: the fit, its figure, the residuals, the
    inputs (with the observation files), and the fitted config's parameters."""
    cfg = result.config
    page = _page(cfg, "Calibration", f"{result.n_obs} observations · {len(result.value)} fitted "
                 f"parameter{'s' if len(result.value) != 1 else ''}", caution)
    page.section("Fit")
    spec = result.spec
    rows = []
    for i, p in enumerate(spec.parameters):
        rows.append([p, float(spec.initial[i]), float(result.value[p]), float(result.std_error[p]),
                     f"[{spec.lower[i]:g}, {spec.upper[i]:g}]"])
    for k, v in result.tied.items():
        other, ratio = spec.ratios[k]
        rows.append([k, np.nan, float(v), np.nan, f"tied: {ratio:g} × {other}"])
    page.table(pd.DataFrame(rows, columns=["parameter", "initial", "fitted", "standard error", "bounds"]),
               digits={"initial": 4, "fitted": 4, "standard error": 4})
    page.facts([("RMSE", f"{result.rmse_mwe:.3f} {UNIT} (at the starting values {result.rmse_initial_mwe:.3f})"),
                ("bias (modelled − observed)", f"{result.bias_mwe:+.3f} {UNIT}"),
                ("observations", str(result.n_obs)), ("model evaluations", str(result.n_evaluations)),
                ("converged", "yes" if result.converged else f"no: {result.message}")])
    if fit_png is not None:
        page.figure(fit_png, "modelled against observed balances",
                    "calibration_fit.png: modelled against observed balances with the 1:1 line; error bars "
                    "are the observations' sigmas.")
    page.section("Residuals")
    rec = result.records
    page.table(rec, digits={c: 3 for c in rec.columns if rec[c].dtype.kind == "f"})
    page.paragraph("The parameters below are those of calibrated.toml: the fitted values are marked "
                   "calibration; the rest are as the config gave them or firnline's defaults.")
    _common_tail(page, result.fitted, input_checksums(cfg), list(result.notes), warnings=list(result.warnings),
                 fitted=set(result.value) | set(result.tied))
    page.section("Files")
    page.notes(sorted(files))
    return page.render()
