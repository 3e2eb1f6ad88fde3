"""Figures of a scenario sweep and of a calibration (matplotlib, Agg canvas, PNG).

Each function takes the tables of a :class:`firnline.scenarios.Sweep` (or a
:class:`firnline.calibrate.CalibrationResult`) and returns a
:class:`matplotlib.figure.Figure` on an Agg canvas (no pyplot, no global backend
change, so it is safe inside a notebook); :func:`save_png` writes it. Every figure
carries a caption saying that it shows model estimates, the period and what the
markers mean, so it can be read without the tables.

* :func:`ela_figure`: paired ELA shift against warming with its year-to-year spread, one
  panel per glacier, one line per precipitation change, monthly scenarios as stars.
* :func:`balance_figure`: mean annual balance against warming, one panel per
  precipitation change, one line per glacier plus the area-weighted mean of all.
* :func:`profile_figure`: balance profiles of the record-mean annual balance, one
  panel per glacier, one line per scenario.
* :func:`fit_figure`: modelled against observed balances of a calibration, with the
  1:1 line and the observations' sigmas.
"""

from __future__ import annotations

import math
import textwrap
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from .provenance import CAUTION

MAX_PANELS = 12
"""At most this many glaciers get a panel (the largest by area); the caption says so."""

MAX_LINES = 10
"""At most this many glaciers get a line in :func:`balance_figure` (the largest by area)."""

_STYLES = ["-", "--", ":", "-."]


def save_png(fig: Figure, path: str | Path, dpi: int = 150) -> None:
    """Write a figure as PNG."""
    fig.savefig(path, dpi=dpi, format="png")


def _figure(n_panels: int, caption: Sequence[str], panel_w=4.2, panel_h=3.4, ncols_max=3,
            legend_w=3.0, sharey=False):
    """A figure with ``n_panels`` axes, room for a figure legend on the right and the caption below."""
    ncols = min(ncols_max, max(1, n_panels))
    nrows = math.ceil(n_panels / ncols)
    width = panel_w * ncols + legend_w
    lines = [w for line in [*caption, CAUTION] for w in textwrap.wrap(line, int(width * 15))]
    cap_h = 0.14 * len(lines) + 0.15
    height = panel_h * nrows + 0.5 + cap_h
    fig = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(fig)
    fig.get_layout_engine().set(rect=(0.0, cap_h / height, 1.0, 1.0 - cap_h / height))
    axes = fig.subplots(nrows, ncols, squeeze=False, sharey=sharey).ravel()
    for ax in axes[n_panels:]:
        ax.set_visible(False)
    fig.text(0.01, 0.08 / height, "\n".join(lines), fontsize=7.5, ha="left", va="bottom", color="0.25",
             in_layout=False)
    return fig, list(axes[:n_panels])


def _finish(fig: Figure, title: str, site: str, handles, labels=None) -> None:
    fig.suptitle(f"{title} - {site}" if site else title, x=0.01, ha="left")
    if labels is None:
        fig.legend(handles=handles, loc="outside right center", fontsize=8, frameon=False)
    else:
        fig.legend(handles, labels, loc="outside right center", fontsize=8, frameon=False)


def _largest(glaciers: pd.DataFrame, n: int) -> list[str]:
    g = glaciers.sort_values("area_km2", ascending=False, kind="stable")
    return list(g.glacier[:n])


def _period(years: Sequence[int]) -> str:
    return f"balance years {years[0]}-{years[-1]}" if len(years) > 1 else f"balance year {years[0]}"


def _precip_style(precips: Sequence[float]) -> tuple[dict, dict]:
    """Line style and colour per precipitation change: 0 % solid and blue, the others in turn."""
    style, colour, others = {}, {}, [p for p in precips if p != 0.0]
    for p in precips:
        k = others.index(p) if p != 0.0 else -1
        style[p] = "-" if p == 0.0 else _STYLES[1 + k % (len(_STYLES) - 1)]
        colour[p] = "C0" if p == 0.0 else f"C{1 + k % 9}"
    return style, colour


def _subset_note(shown: int, total: int) -> list[str]:
    return [f"Shown: the {shown} largest of {total} glaciers; all are in scenarios.csv."] if shown < total else []


def ela_figure(table: pd.DataFrame, year_table: pd.DataFrame, glaciers: pd.DataFrame,
               years: Sequence[int], site: str = "") -> Figure:
    """Paired ELA shift (m) against warming (K), with its year-to-year spread; one panel per glacier.

    Parameters
    ----------
    table : DataFrame with :data:`firnline.scenarios.SCENARIO_COLUMNS` and the extra columns
        (``scenario``, ``n_years``, ``n_shift_years``, ``ela_shift_sd_m``, ...)
    year_table : DataFrame with :data:`firnline.scenarios.YEAR_COLUMNS` and ``scenario``
    glaciers : DataFrame (glacier, area_km2, min_elevation_m, max_elevation_m)
    years : balance years of the record
    site : label for the title

    For each precipitation change of the uniform grid, a line through the mean of the
    paired yearly shifts (each year's ELA minus the reference ELA of the same year); grey
    dots: the yearly shifts; bar: +- one standard deviation of them. An open marker: some
    years could not be paired (the ELA left the glacier); a triangle at the top: no year
    could. Stars: monthly change scenarios at their mean warming, labelled by name.
    """
    names = _largest(glaciers, MAX_PANELS)
    fig, axes = _figure(len(names), [
        f"ELA shift from the no-change reference, {_period(years)}: each balance year's ELA minus the "
        "reference ELA of the same year (paired), so that the shift is never a difference of means over "
        "different sets of years. Line: mean of the paired shifts; bars: +- one year-to-year standard "
        "deviation; small dots: single years. Open marker: some years unpaired because the ELA left the "
        "glacier (counts in scenarios.csv: n_shift_years of n_years). Dashed line and grey band: a shift that "
        "lifts the record-mean ELA of the reference to the glacier top or beyond.",
        *_subset_note(len(names), len(glaciers))])
    t = table.copy()
    uniform = t.scenario.str.match(r"^w[+-][0-9.]+_p[+-][0-9.]+$")
    precips = sorted(t[uniform].precip_change_pct.unique())
    style, pcol = _precip_style(precips)
    for ax, name in zip(axes, names):
        gi = glaciers[glaciers.glacier == name].iloc[0]
        tg = t[t.glacier == name]
        ref = tg[tg.scenario == "w+0.0_p+0"]
        ref_ela = float(ref.ela_m.iloc[0]) if len(ref) else float("nan")
        room = gi.max_elevation_m - ref_ela if np.isfinite(ref_ela) else float("nan")
        if np.isfinite(room):
            ax.axhline(room, color="0.5", lw=0.8, ls="--")
            ax.annotate("ELA at the glacier top", (0.01, room), xycoords=("axes fraction", "data"), fontsize=7,
                        color="0.4", va="bottom")
        ax.axhline(0.0, color="0.5", lw=0.8)
        yg = year_table[year_table.glacier == name]
        top = []
        for p in precips:
            r = tg[uniform.loc[tg.index] & (tg.precip_change_pct == p)].sort_values("warming_k")
            c = pcol[p]
            ax.plot(r.warming_k, r.ela_shift_m, style[p], color=c, lw=1.4)
            ax.errorbar(r.warming_k, r.ela_shift_m, yerr=r.ela_shift_sd_m.fillna(0.0), fmt="none", ecolor=c,
                        elinewidth=1.0, capsize=3)
            full = r.n_shift_years == r.n_years
            part = (r.n_shift_years > 0) & ~full
            ax.plot(r.warming_k[full], r.ela_shift_m[full], "o", color=c, ms=5)
            ax.plot(r.warming_k[part], r.ela_shift_m[part], "o", mfc="white", mec=c, ms=5)
            none = r[r.n_shift_years == 0]
            top += [(w, c) for w in none.warming_k]
            yy = yg[yg.scenario.isin(r.scenario)]
            ax.plot(yy.warming_k, yy.ela_shift_m, ".", color=c, ms=2.5, alpha=0.5)
        monthly = tg[~uniform.loc[tg.index]]
        for r in monthly.itertuples():
            if np.isfinite(r.ela_shift_m):
                sd = 0.0 if np.isnan(r.ela_shift_sd_m) else r.ela_shift_sd_m
                ax.errorbar([r.warming_k], [r.ela_shift_m], yerr=[sd], fmt="*", color="k", ms=9, capsize=3)
                ax.annotate(str(r.scenario), (r.warming_k, r.ela_shift_m), textcoords="offset points",
                            xytext=(6, -10), fontsize=7)
            else:
                top.append((r.warming_k, "k"))
        if np.isfinite(room):
            ylim = ax.get_ylim()
            ax.axhspan(room, max(ylim[1], room) + 1e5, color="0.93", zorder=0)
            ax.set_ylim(ylim[0], max(ylim[1], room * 1.08))
        if top:
            ylim = ax.get_ylim()
            for w, c in top:
                ax.plot([w], [ylim[1]], "^", color=c, ms=7, clip_on=False)
            ax.set_ylim(ylim)
        ax.set_title(str(name), fontsize=10)
        ax.set_xlabel("warming (K; monthly scenarios: mean)")
        ax.set_ylabel("ELA shift (m)")
        ax.grid(alpha=0.3)
    handles = [Line2D([], [], ls=style[p], color=pcol[p], label=f"precipitation {p:+g} %") for p in precips]
    handles += [Line2D([], [], ls="", marker="o", color="0.3", label="every year paired"),
                Line2D([], [], ls="", marker="o", mfc="white", mec="0.3", label="some years unpaired"),
                Line2D([], [], ls="", marker="^", color="0.3", label="no year paired (ELA off the glacier)"),
                Line2D([], [], ls="", marker=".", color="0.3", label="single balance years")]
    if (~uniform).any():
        handles.append(Line2D([], [], ls="", marker="*", color="k", ms=9, label="monthly change scenario"))
    _finish(fig, "Equilibrium-line altitude shift under warming", site, handles)
    return fig


def balance_figure(table: pd.DataFrame, glaciers: pd.DataFrame, years: Sequence[int],
                   site: str = "") -> Figure:
    """Mean annual balance (m w.e. per year) against warming (K), one panel per precipitation change.

    Parameters
    ----------
    table : DataFrame with :data:`firnline.scenarios.SCENARIO_COLUMNS`
    glaciers : DataFrame (glacier, area_km2, ...)
    years : balance years of the record
    site : label for the title

    With more than one glacier a thick black line gives the area-weighted mean of all
    glaciers.
    """
    precips = sorted(table.precip_change_pct.unique())
    names = _largest(glaciers, MAX_LINES)
    note = ([f"Lines for the {len(names)} largest of {len(glaciers)} glaciers; the black line "
             "covers all of them."] if len(names) < len(glaciers) else [])
    fig, axes = _figure(len(precips), [
        f"Specific annual balance averaged over the {_period(years)}; dashed line: zero balance "
        "(the glacier in balance).", *note], sharey=True)
    area = glaciers.set_index("glacier").area_km2
    for ax, p in zip(axes, precips):
        t = table[table.precip_change_pct == p]
        for i, name in enumerate(names):
            r = t[t.glacier == name].sort_values("warming_k")
            ax.plot(r.warming_k, r.mean_annual_balance_mwe, "o-", color=f"C{i % 10}", ms=4, lw=1.2,
                    label=str(name))
        if len(glaciers) > 1:
            w = t.glacier.map(area)
            allg = (t.mean_annual_balance_mwe * w).groupby(t.warming_k).sum() / w.groupby(t.warming_k).sum()
            ax.plot(allg.index, allg.to_numpy(), "k-", lw=2.6, label="all glaciers (area-weighted)")
        ax.axhline(0.0, color="0.5", lw=0.8, ls="--")
        ax.set_title(f"precipitation change {p:+g} %", fontsize=10)
        ax.set_xlabel("warming (K)")
        ax.set_ylabel("mean annual balance (m w.e. per year)")
        ax.grid(alpha=0.3)
    _finish(fig, "Glacier-wide annual balance under warming", site, *axes[0].get_legend_handles_labels())
    return fig


def profile_figure(profiles: pd.DataFrame, glaciers: pd.DataFrame, years: Sequence[int],
                   site: str = "") -> Figure:
    """Balance profiles: elevation (m a.s.l.) against mean annual balance (m w.e. per year).

    Parameters
    ----------
    profiles : DataFrame with :data:`firnline.scenarios.PROFILE_COLUMNS`
    glaciers : DataFrame (glacier, area_km2, ...)
    years : balance years of the record
    site : label for the title

    One panel per glacier, one line per scenario: colour by warming (blue cool to red
    warm), line style by precipitation change; points at the band centres.
    """
    from matplotlib import colormaps

    names = _largest(glaciers, MAX_PANELS)
    band = profiles.band_top_m.iloc[0] - profiles.band_bottom_m.iloc[0] if len(profiles) else float("nan")
    fig, axes = _figure(len(names), [
        f"Area-weighted mean annual balance of {band:g} m elevation bands over the {_period(years)}; "
        "a line crosses zero at the equilibrium line of the record-mean balance (which can differ from "
        "the mean of the yearly ELAs in scenarios.csv).",
        *_subset_note(len(names), len(glaciers))], panel_h=3.8)
    warm = sorted(profiles.warming_k.unique())
    precips = sorted(profiles.precip_change_pct.unique())
    style = _precip_style(precips)[0]
    cmap = colormaps["coolwarm"]
    colour = {w: cmap(0.5 if len(warm) == 1 else i / (len(warm) - 1)) for i, w in enumerate(warm)}
    for ax, name in zip(axes, names):
        g = profiles[profiles.glacier == name]
        for (w, p), r in g.groupby(["warming_k", "precip_change_pct"]):
            zc = 0.5 * (r.band_bottom_m + r.band_top_m)
            ax.plot(r.mean_annual_balance_mwe, zc, style[p], color=colour[w], lw=1.3, marker=".", ms=3)
        ax.axvline(0.0, color="0.4", lw=0.8)
        ax.set_title(str(name), fontsize=10)
        ax.set_xlabel("mean annual balance (m w.e. per year)")
        ax.set_ylabel("elevation (m a.s.l.)")
        ax.grid(alpha=0.3)
    handles = [Line2D([], [], color=colour[w], lw=2, label=f"warming {w:+g} K") for w in warm]
    handles += [Line2D([], [], color="0.3", ls=style[p], label=f"precipitation {p:+g} %") for p in precips]
    _finish(fig, "Balance profiles per scenario", site, handles)
    return fig


def fit_figure(result) -> Figure:
    """Modelled against observed balances of a calibration, 1:1 line; error bars are the sigmas.

    Parameters
    ----------
    result : firnline.calibrate.CalibrationResult
    """
    rec = result.records
    fig = Figure(figsize=(6.4, 6.8), dpi=120)
    FigureCanvasAgg(fig)
    ax = fig.add_axes([0.14, 0.17, 0.8, 0.75])
    groups = [("point", rec.kind == "point", "o", "tab:blue"),
              ("glacier-wide", (rec.kind == "glacier") & rec.dh_m.isna(), "s", "tab:green"),
              ("glacier-wide, geodetic", (rec.kind == "glacier") & rec.dh_m.notna(), "D", "tab:red")]
    for label, sel, marker, colour in groups:
        if sel.any():
            ax.errorbar(rec.observed_mwe[sel], rec.modelled_mwe[sel], xerr=rec.sigma_mwe[sel], fmt=marker,
                        color=colour, ms=4, lw=0.8, capsize=2, label=f"{label} ({int(sel.sum())})")
    lo = float(min((rec.observed_mwe - rec.sigma_mwe).min(), rec.modelled_mwe.min()))
    hi = float(max((rec.observed_mwe + rec.sigma_mwe).max(), rec.modelled_mwe.max()))
    pad = 0.05 * (hi - lo if hi > lo else 1.0)
    lims = (lo - pad, hi + pad)
    ax.plot(lims, lims, color="black", lw=0.8, ls="--", label="1:1")
    ax.set_xlim(lims)
    ax.set_ylim(lims)
    ax.set_aspect("equal")
    ax.set_xlabel("observed balance over the period (m w.e.)")
    ax.set_ylabel("modelled balance over the period (m w.e.)")
    ax.set_title(f"{result.config.site.name}: calibration fit", fontsize=11)
    ax.legend(loc="upper left", fontsize=8)
    ax.grid(alpha=0.3)
    fitted = ", ".join(f"{p} = {v:.3g}" for p, v in result.value.items())
    caption = (f"Fitted {fitted}. RMSE {result.rmse_mwe:.3f} m w.e., bias {result.bias_mwe:+.3f} m w.e., "
               f"{result.n_obs} observations. Error bars: observation uncertainty (1 sigma). {CAUTION}")
    fig.text(0.5, 0.02, caption, ha="center", va="bottom", fontsize=7, wrap=True)
    return fig
