"""The files of a scenario sweep: which products, named how, with which provenance.

``write_sweep`` is the single place that knows a sweep's output layout (see the
contract in DESIGN.md); the generic writers live in :mod:`firnline.outputs`.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from . import provenance
from .model import parameters_used
from .outputs import staged, write_csv, write_geotiff, write_json
from .scenarios import RULES, SCENARIO_COLUMNS, SCENARIO_EXTRA, Sweep, scenario_label


def map_name(warming_k: float | str, precip_change_pct: float | None = None) -> str:
    """File name of a scenario's mean-balance map, e.g. ``mean_annual_balance_w+1.0_p+0.tif``.

    ``warming_k`` may instead be a scenario name (a change file's stem), e.g.
    ``mean_annual_balance_strong.tif``.
    """
    label = warming_k if isinstance(warming_k, str) else scenario_label(warming_k, precip_change_pct)
    return f"mean_annual_balance_{label}.tif"


def write_sweep(result: Sweep, out_dir: Path, report: bool = True) -> list[Path]:
    """Write every product of a sweep into ``out_dir``, all or nothing.

    With ``report`` (the default) ``scenarios_report.html`` is written too: the sweep's
    tables and figures on one self-contained page (:func:`firnline.documents.sweep_document`).
    """
    from .report import balance_figure, ela_figure, profile_figure  # matplotlib: only here
    setup, cfg = result.setup, result.config
    grid = setup.grid
    years = result.years
    site = cfg.site.name
    with staged(Path(out_dir)) as st:
        write_csv(st.path("scenarios.csv"), result.table[SCENARIO_COLUMNS + SCENARIO_EXTRA])
        write_csv(st.path("scenario_years.csv"), result.year_table)
        write_csv(st.path("sensitivity.csv"), result.sensitivity)
        write_csv(st.path("scenario_profiles.csv"), result.profiles)
        write_csv(st.path("scenario_budget.csv"), result.budgets)
        write_csv(st.path("precip_offset.csv"), result.offsets)
        for i, ((w, p), d) in enumerate(zip(result.scenarios, result.definitions)):
            tags = provenance.run_tags(cfg, setup.checksums, w, p)
            what = (f"warming {w:+g} K, precipitation change {p:+g} %" if d.uniform else
                    f"monthly changes {d.name!r} (mean warming {w:+g} K, mean precipitation change {p:+g} %)")
            if not d.uniform:
                tags["scenario"] = d.name
                tags["monthly_warming_k"] = ",".join(f"{v:g}" for v in d.warming_k)
                tags["monthly_precip_change_pct"] = ",".join(f"{v:g}" for v in d.precip_change_pct)
            write_geotiff(st.path(map_name(d.name)), result.mean_balance_map(i), grid.transform, grid.crs,
                          [f"mean annual surface mass balance {years[0]}-{years[-1]}, {what}"], "m w.e.", tags)
        figures = [("ela_vs_warming.png", ela_figure(result.table, result.year_table, result.glaciers, years,
                                                     site)),
                   ("balance_vs_warming.png", balance_figure(result.table, result.glaciers, years, site)),
                   ("balance_profiles.png", profile_figure(result.profiles, result.glaciers, years, site))]
        if result.runoff_regimes is not None:
            from .runoff_products import regime_figure
            write_csv(st.path("scenario_runoff_monthly.csv"), result.runoff_regimes)
            figures.append(("runoff_regimes.png", regime_figure(result.runoff_regimes, cfg.balance.year_start, site)))
        pngs = []
        for name, fig in figures:
            png = _png(fig)
            st.path(name).write_bytes(png)
            pngs.append((name, png, FIGURE_CAPTIONS[name]))
        if report:
            from .documents import sweep_document
            files = list(st.names) + ["scenarios_report.html", "scenarios.json"]
            st.path("scenarios_report.html").write_text(
                sweep_document(result, pngs, files, provenance.CAUTION, list(RULES)), encoding="utf-8")
        path = st.path("scenarios.json")
        write_json(path, sweep_json(result, list(st.names)))
    return [Path(out_dir) / n for n in st.names]


FIGURE_CAPTIONS = {
    "ela_vs_warming.png": "mean ELA against warming, one panel per glacier, one line per precipitation change.",
    "balance_vs_warming.png": "mean annual balance against warming, one panel per precipitation change.",
    "balance_profiles.png": "balance profiles of the record-mean balance, one line per scenario.",
    "runoff_regimes.png": "mean monthly discharge of the catchment and its glacier-ice share, one line per "
                          "scenario (scenario_runoff_monthly.csv).",
}


def _png(fig, dpi: int = 150) -> bytes:
    """PNG bytes of a figure (the resolution :func:`firnline.report.save_png` uses)."""
    import io
    buf = io.BytesIO()
    fig.savefig(buf, dpi=dpi, format="png")
    return buf.getvalue()


def sweep_json(result: Sweep, files: list[str]) -> dict:
    """Provenance and rules of a sweep (``scenarios.json``)."""
    setup, cfg = result.setup, result.config
    return {
        **provenance.header(cfg),
        "parameters": parameters_used(cfg),
        "input_sha256": setup.checksums,
        "scenarios": [{"scenario": d.name, "warming_k": w, "precip_change_pct": p, "map": map_name(d.name),
                       "reference": i == result.reference,
                       **({} if d.uniform else {"change_file": d.source, "monthly_warming_k": list(d.warming_k),
                                                 "monthly_precip_change_pct": list(d.precip_change_pct)})}
                      for i, ((w, p), d) in enumerate(zip(result.scenarios, result.definitions))],
        "balance_years": result.years,
        "rules": list(RULES),
        "ela_flags": result.flags.to_dict(orient="records"),
        "glaciers": result.glaciers.to_dict(orient="records"),
        "notes": result.notes,
        "timings_s": result.timings,
        "files": files,
    }


def sweep_table(result: Sweep) -> str:
    """The console's closing table: one line per glacier and scenario."""
    t = result.table.merge(result.flags[["glacier", "scenario", "n_ela_ok"]], on=["glacier", "scenario"])
    lines = [f"{'glacier':<20} {'scenario':<12} {'warming':>7} {'precip':>6} {'balance':>9} {'ELA':>6} "
             f"{'shift':>6} {'+-sd':>5} {'AAR':>5}  ELA off glacier",
             f"{'':<20} {'':<12} {'K':>7} {'%':>6} {'m w.e./a':>9} {'m':>6} {'m':>6} {'m':>5} {'':>5}"]

    def num(v, fmt, width):
        return f"{format(v, fmt):>{width}}" if np.isfinite(v) else f"{'-':>{width}}"
    for r in t.itertuples():
        off = r.n_years - r.n_ela_ok
        lines.append(f"{str(r.glacier)[:20]:<20} {str(r.scenario)[:12]:<12} {r.warming_k:>+7.2f} "
                     f"{r.precip_change_pct:>+6.1f} {r.mean_annual_balance_mwe:9.2f} {num(r.ela_m, '.0f', 6)} "
                     f"{num(r.ela_shift_m, '+.0f', 6)} {num(r.ela_shift_sd_m, '.0f', 5)} {r.aar:5.2f}  "
                     f"{f'{off} of {r.n_years} years' if off else ''}")
    s = result.sensitivity
    lines.append("")
    lines.append(f"{'glacier':<20} {'dELA/dT':>9} {'dB/dT':>11}")
    lines.append(f"{'':<20} {'m per K':>9} {'m w.e./K':>11}")
    for r in s.itertuples():
        lines.append(f"{str(r.glacier)[:20]:<20} {num(r.dela_dt_m_per_k, '.0f', 9)} "
                     f"{num(r.dbalance_dt_mwe_per_k, '.3f', 11)}  {r.note}")
    lines.append("ELA: of the record-mean balance profile; shift: mean of the paired yearly shifts from the "
                 "reference (+- their year-to-year SD); see scenarios.json for the rules.")
    return "\n".join(lines)
