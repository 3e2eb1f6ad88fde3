"""Charts of a run, per glacier (matplotlib, Agg canvas; no pyplot state).

:func:`glacier_figure` draws one figure per glacier with six panels:

1. the balance profile of every balance year (band balance against band-centre
   elevation), the year's ELA marked where the profile crosses zero;
2. the hypsometry: glacier area per elevation band;
3. annual, winter and summer balance per balance year (bars for winter and summer,
   the annual balance as a marker);
4. the cumulative annual balance since the start of the record;
5. the ELA per year with ELA0, the ELA of a balanced budget (balanced_budget.csv);
6. the AAR per year with AAR0.

:func:`overview_figure` puts the annual balance of every glacier and the
area-weighted mean of all on one chart. Colours: matplotlib's ``cividis`` for the
years (made for readers with colour-vision deficiencies; Nuñez, Anderton & Renslow
2018, PLoS ONE 13(7)) and the Okabe-Ito palette for categories (Okabe & Ito 2008,
"Color Universal Design"; from memory).
"""

from __future__ import annotations

import io
from typing import Sequence

import numpy as np
import pandas as pd
from matplotlib import colormaps
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

OKABE_ITO = ["#0072B2", "#E69F00", "#009E73", "#D55E00", "#CC79A7", "#56B4E9", "#F0E442", "#000000"]
WINTER, SUMMER, ANNUAL = "#0072B2", "#D55E00", "#000000"

MAX_OVERVIEW_LINES = 8
"""Glaciers with a line of their own on the overview chart (the largest); the mean covers all."""


def png_bytes(fig: Figure, dpi: int = 100) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    fig.clear()
    return buf.getvalue()


def _year_colours(years: Sequence[int]):
    cmap = colormaps["cividis"]
    n = len(years)
    return {y: cmap(0.05 + 0.9 * (i / (n - 1) if n > 1 else 0.5)) for i, y in enumerate(years)}


def _style(ax, title: str) -> None:
    ax.set_title(title, fontsize=9, loc="left")
    ax.tick_params(labelsize=7.5)
    ax.grid(alpha=0.3, lw=0.6)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)


def glacier_figure(name: str, summary: pd.DataFrame, profiles: pd.DataFrame, budget: pd.Series | None,
                   site: str = "") -> Figure:
    """Six charts of one glacier (see the module docstring).

    Parameters
    ----------
    name : glacier
    summary : rows of summary.csv for this glacier (balance_year, annual/winter/summer
        balance, ela_m, aar, ela_flag)
    profiles : rows of profiles.csv for this glacier
    budget : the glacier's row of balanced_budget.csv (ela0_m, aar0, note), optional
    site : label for the title
    """
    s = summary.sort_values("balance_year")
    years = [int(y) for y in s.balance_year]
    col = _year_colours(years)
    fig = Figure(figsize=(11.5, 6.4), dpi=100)
    FigureCanvasAgg(fig)
    fig.subplots_adjust(left=0.065, right=0.985, top=0.9, bottom=0.09, wspace=0.32, hspace=0.42)
    ax = fig.subplots(2, 3)
    fig.suptitle(f"{name}: balance, ELA and AAR, balance years {years[0]}-{years[-1]}"
                 + (f" ({site})" if site else ""), x=0.065, ha="left", fontsize=10.5)
    # 1 profiles
    a = ax[0, 0]
    for y in years:
        p = profiles[profiles.balance_year == y]
        zc = 0.5 * (p.band_bottom_m + p.band_top_m)
        a.plot(p.annual_balance_mwe, zc, color=col[y], lw=1.1, label=str(y))
        r = s[s.balance_year == y].iloc[0]
        if r.ela_flag == "ok" and np.isfinite(r.ela_m):
            a.plot([0.0], [r.ela_m], "o", ms=4.5, mfc=col[y], mec="black", mew=0.6, zorder=4)
    a.axvline(0.0, color="0.3", lw=0.8)
    a.set_xlabel("annual balance (m w.e.)", fontsize=8)
    a.set_ylabel("elevation (m a.s.l.)", fontsize=8)
    _style(a, "balance profile per year (dots: ELA)")
    a.legend(fontsize=6.5, ncol=2 if len(years) > 6 else 1, frameon=False, loc="upper left",
             handlelength=1.2, columnspacing=0.8)
    # 2 hypsometry
    a = ax[0, 1]
    p = profiles[profiles.balance_year == years[0]]
    a.barh(0.5 * (p.band_bottom_m + p.band_top_m), p.area_km2, height=(p.band_top_m - p.band_bottom_m) * 0.9,
           color="#56B4E9", edgecolor="#0072B2", lw=0.4)
    a.set_xlabel("area (km²)", fontsize=8)
    a.set_ylabel("elevation (m a.s.l.)", fontsize=8)
    width = float((p.band_top_m - p.band_bottom_m).iloc[0]) if len(p) else float("nan")
    _style(a, f"hypsometry ({width:g} m bands, {p.area_km2.sum():.2f} km² in all)")
    # 3 seasonal balances
    a = ax[0, 2]
    x = np.arange(len(years))
    a.bar(x - 0.18, s.winter_balance_mwe, width=0.36, color=WINTER, label="winter")
    a.bar(x + 0.18, s.summer_balance_mwe, width=0.36, color=SUMMER, label="summer")
    a.plot(x, s.annual_balance_mwe, "D", color=ANNUAL, ms=4.5, label="annual")
    a.axhline(0.0, color="0.3", lw=0.8)
    a.set_xticks(x, [str(y) for y in years], rotation=45 if len(years) > 6 else 0)
    a.set_ylabel("balance (m w.e.)", fontsize=8)
    _style(a, "winter, summer and annual balance")
    lo = min(0.0, float(np.nanmin(s[["winter_balance_mwe", "summer_balance_mwe", "annual_balance_mwe"]].to_numpy())))
    hi = max(0.0, float(np.nanmax(s[["winter_balance_mwe", "summer_balance_mwe", "annual_balance_mwe"]].to_numpy())))
    a.set_ylim(lo - 0.05 * (hi - lo), hi + 0.3 * (hi - lo) + 1e-6)   # room for the legend above the bars
    a.legend(fontsize=7, frameon=False, ncol=3, loc="upper left")
    # 4 cumulative
    a = ax[1, 0]
    cum = np.concatenate([[0.0], np.cumsum(s.annual_balance_mwe.to_numpy())])
    a.plot([years[0] - 1] + years, cum, "o-", color="#0072B2", ms=3.5, lw=1.4)
    a.axhline(0.0, color="0.3", lw=0.8)
    a.set_xlabel("end of balance year", fontsize=8)
    a.set_ylabel("cumulative balance (m w.e.)", fontsize=8)
    _style(a, f"cumulative annual balance since {years[0] - 1}")
    a.xaxis.get_major_locator().set_params(integer=True)
    # 5 ELA
    a = ax[1, 1]
    ok = s.ela_flag == "ok"
    a.plot(s.balance_year[ok], s.ela_m[ok], "o-", color="black", ms=4, lw=1.1, label="ELA")
    zmin, zmax = float(profiles.band_bottom_m.min()), float(profiles.band_top_m.max())
    for flag, z, marker, lab in (("above_glacier", zmax, "^", "above the glacier"),
                                 ("below_glacier", zmin, "v", "below the glacier")):
        sel = s.ela_flag == flag
        if sel.any():
            a.plot(s.balance_year[sel], np.full(int(sel.sum()), z), marker, color="#D55E00", ms=6,
                   label=f"ELA {lab}")
    if budget is not None and np.isfinite(budget.get("ela0_m", np.nan)):
        a.axhline(budget["ela0_m"], color="#009E73", lw=1.4, ls="--", label=f"ELA0 {budget['ela0_m']:.0f} m")
    a.axhspan(zmin, zmax, color="0.93", zorder=0)
    a.set_ylabel("ELA (m a.s.l.)", fontsize=8)
    a.set_xlabel("balance year", fontsize=8)
    _style(a, "ELA (grey: the glacier's elevation range)")
    a.legend(fontsize=6.5, frameon=False, loc="best")
    a.xaxis.get_major_locator().set_params(integer=True)
    # 6 AAR
    a = ax[1, 2]
    a.plot(s.balance_year, s.aar, "o-", color="black", ms=4, lw=1.1, label="AAR")
    if budget is not None and np.isfinite(budget.get("aar0", np.nan)):
        a.axhline(budget["aar0"], color="#009E73", lw=1.4, ls="--", label=f"AAR0 {budget['aar0']:.2f}")
    a.set_ylim(-0.03, 1.03)
    a.set_ylabel("AAR", fontsize=8)
    a.set_xlabel("balance year", fontsize=8)
    _style(a, "accumulation-area ratio")
    a.legend(fontsize=6.5, frameon=False, loc="best")
    a.xaxis.get_major_locator().set_params(integer=True)
    return fig


def overview_figure(summary: pd.DataFrame, totals: pd.DataFrame, site: str = "") -> Figure:
    """Annual balance per balance year: the largest glaciers and the area-weighted mean of all.

    summary : summary rows of the glaciers; totals : the ``all_glaciers`` rows.
    """
    fig = Figure(figsize=(8.0, 3.6), dpi=100)
    FigureCanvasAgg(fig)
    fig.subplots_adjust(left=0.09, right=0.72, top=0.86, bottom=0.15)
    a = fig.subplots()
    area = summary.groupby("glacier", sort=False).area_km2.first().sort_values(ascending=False)
    shown = list(area.index[:MAX_OVERVIEW_LINES])
    for i, g in enumerate(shown):
        r = summary[summary.glacier == g].sort_values("balance_year")
        a.plot(r.balance_year, r.annual_balance_mwe, "o-", color=OKABE_ITO[i % 7], ms=3.5, lw=1.1,
               label=f"{g} ({area[g]:.2f} km²)")
    t = totals.sort_values("balance_year")
    a.plot(t.balance_year, t.annual_balance_mwe, "-", color="black", lw=2.6, label="all glaciers (area-weighted)")
    a.axhline(0.0, color="0.4", lw=0.8, ls="--")
    a.set_xlabel("balance year", fontsize=8)
    a.set_ylabel("annual balance (m w.e.)", fontsize=8)
    a.xaxis.get_major_locator().set_params(integer=True)
    _style(a, "")
    note = f" ({len(shown)} largest of {len(area)})" if len(shown) < len(area) else ""
    fig.suptitle(f"Annual balance of the glaciers{note}" + (f", {site}" if site else ""), x=0.09, ha="left",
                 fontsize=10.5)
    fig.legend(*a.get_legend_handles_labels(), loc="center right", fontsize=7, frameon=False)
    return fig
