"""The water budget of each region per balance year (``water_budget.csv``): the books of the catchment.

Regions: each glacier (its glacier surface columns, in the order of the outlines),
``ice_free`` (every ice-free surface column: ice-free cells and the ice-free share of
partly covered cells) and ``catchment`` (every modelled column, weighted by its catchment
weight, 1 by default). Every term is a volume over the region divided by its area, mm.

Budget identity
---------------
Per surface column and balance year (all mm w.e. over the column's area)::

    precipitation = snowfall + rain
    exchange      = redistribution change + exported     (snow moved to or from other valid cells)
    storage       = snow + firn + liquid water (held in the pack) + glacier ice
    storage_change = [snow + firn + liquid](year end) - [snow + firn + liquid](year start)
                     + firn turned to ice - ice melt     (the change of glacier ice)
    precipitation + redistribution_in - redistribution_out - exported
        - runoff - storage_change = residual ~ 0

with ``redistribution_in`` / ``redistribution_out`` the positive / negative parts of each
column's yearly exchange, ``exported`` the snow it sent off the DEM edge or into nodata
and ``runoff`` the water released by the column (rain and meltwater neither held nor
refrozen, and ice melt). The kernel conserves water exactly (to float64 rounding per
step), so the residual is float rounding of the stored per-year sums (float32 per
column: about 1e-7 of the terms). The glacier ice itself is not a state of the model
(its thickness is unlimited): only its change enters.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from . import exact

COLUMNS = ["region", "balance_year", "area_km2", "precipitation_mm", "snowfall_mm", "rain_mm",
           "redistribution_in_mm", "redistribution_out_mm", "exported_mm", "refreezing_mm", "snow_melt_mm",
           "firn_melt_mm", "ice_melt_mm", "runoff_mm", "storage_change_mm", "residual_mm"]

#: names of the two regions besides the glaciers
ICE_FREE, CATCHMENT = "ice_free", "catchment"


def region_names(glacier_names) -> list[str]:
    """Region names in the order of the kernel's regions: the glaciers, ``ice_free``, ``catchment``."""
    return [str(n) for n in glacier_names] + [ICE_FREE, CATCHMENT]


def column_budget(year_sum, storage_start, storage_end) -> dict[str, np.ndarray]:
    """The yearly budget terms of every surface column, mm w.e. over the column (float64).

    Parameters
    ----------
    year_sum : callable(Flux) -> ndarray (n_years, n_cols)
        The yearly sum of a kernel flux for one scenario.
    storage_start : ndarray (n_cols,)
        Snow + firn + liquid water before the first year, mm w.e.
    storage_end : ndarray (n_years, n_cols)
        The same at the end of each year.

    Returns
    -------
    dict of ndarray (n_years, n_cols): the terms of :data:`COLUMNS` (without region, year, area).
    """
    from .kernel import Flux

    def f(flux):
        return np.asarray(year_sum(flux), dtype="float64")
    snowfall, rain = f(Flux.SNOWFALL), f(Flux.RAIN)
    change, exported = f(Flux.REDISTRIBUTION), f(Flux.EXPORTED)
    exchange = change + exported
    end = np.asarray(storage_end, dtype="float64")
    start = np.concatenate([np.asarray(storage_start, dtype="float64")[None], end[:-1]])
    ice_melt = f(Flux.ICE_MELT)
    storage_change = end - start + f(Flux.FIRN_TO_ICE) - ice_melt
    runoff = f(Flux.RELEASED_SNOW) + f(Flux.RELEASED_FIRN) + f(Flux.RELEASED_ICE)
    precip = snowfall + rain
    r_in, r_out = np.maximum(exchange, 0.0), np.maximum(-exchange, 0.0)
    return {"precipitation_mm": precip, "snowfall_mm": snowfall, "rain_mm": rain,
            "redistribution_in_mm": r_in, "redistribution_out_mm": r_out, "exported_mm": exported,
            "refreezing_mm": f(Flux.REFREEZING), "snow_melt_mm": f(Flux.SNOW_MELT),
            "firn_melt_mm": f(Flux.FIRN_MELT), "ice_melt_mm": ice_melt, "runoff_mm": runoff,
            "storage_change_mm": storage_change,
            "residual_mm": precip + r_in - r_out - exported - runoff - storage_change}


def budget_table(terms: dict[str, np.ndarray], area_m2: np.ndarray, region: np.ndarray,
                 catchment_weight: np.ndarray, names: list[str], years) -> pd.DataFrame:
    """``water_budget.csv``: region means (mm) of the column terms, one row per region and year.

    Parameters
    ----------
    terms : from :func:`column_budget`, each (n_years, n_cols)
    area_m2 : ndarray (n_cols,)
        Area each column stands for, m2.
    region : ndarray (n_cols,) int
        Region index of each column (glaciers, then ice-free = ``len(names) - 2``).
    catchment_weight : ndarray (n_cols,)
        Weight of each column in the ``catchment`` region.
    names : from :func:`region_names`
    years : balance-year labels
    """
    sums = budget_sums(terms, area_m2, region, catchment_weight, len(names), len(years))
    return budget_from_sums(sums, names, years)


def _budget_key(term: int, year: int, region, n_years: int, n_regions: int):
    """Key of a region's sum: term 0 is the area (year 0), terms 1.. the :data:`COLUMNS` terms."""
    return (term * (n_years + 1) + year) * n_regions + np.asarray(region, dtype=np.int64)


def budget_sums(terms: dict[str, np.ndarray], area_m2: np.ndarray, region: np.ndarray,
                catchment_weight: np.ndarray, n_regions: int, n_years: int, first_year: int = 0) -> exact.Sums:
    """The exact region sums behind :func:`budget_table` (volumes in mm m2 and areas in m2).

    Sums of some columns (the units of a tiled run) merged with :func:`firnline.exact.merge`
    equal those of all columns exactly, whatever the order. ``terms`` may hold a block of the
    ``n_years`` years, starting at ``first_year``: the blocks' sums then merge into those of all
    years (the areas are counted with the block of the first year only).
    """
    region = np.asarray(region, dtype=np.int64)
    area = np.asarray(area_m2, dtype="float64")
    w_cat = area * np.asarray(catchment_weight, dtype="float64")
    cat = np.full(region.size, n_regions - 1, dtype=np.int64)
    parts = []
    if first_year == 0:
        parts.append(exact.of(np.concatenate([_budget_key(0, 0, region, n_years, n_regions),
                                              _budget_key(0, 0, cat, n_years, n_regions)]),
                              np.concatenate([area, w_cat])))
    for t, key in enumerate(_TERMS, start=1):
        v = np.asarray(terms[key], dtype="float64")
        for i in range(v.shape[0]):
            y = first_year + i
            parts.append(exact.of(np.concatenate([_budget_key(t, y, region, n_years, n_regions),
                                                  _budget_key(t, y, cat, n_years, n_regions)]),
                                  np.concatenate([v[i] * area, v[i] * w_cat])))
    return exact.merge(parts)


def budget_from_sums(sums: exact.Sums, names: list[str], years) -> pd.DataFrame:
    """``water_budget.csv`` from :func:`budget_sums` (of all columns, or merged from parts)."""
    n_reg, n_years = len(names), len(years)
    keys, vals = exact.values(sums)
    regions = np.arange(n_reg)
    areas = exact.lookup(keys, vals, _budget_key(0, 0, regions, n_years, n_reg))
    tot = {key: exact.lookup(keys, vals, _budget_key(t, np.arange(n_years)[:, None], regions, n_years, n_reg))
           for t, key in enumerate(_TERMS, start=1)}                  # (n_years, n_regions) mm m2
    rows = []
    for r, name in enumerate(names):
        a = areas[r]
        for y, year in enumerate(years):
            row = {"region": name, "balance_year": int(year), "area_km2": a / 1e6}
            for key in _TERMS:
                row[key] = tot[key][y, r] / a if a > 0 else np.nan
            rows.append(row)
    return pd.DataFrame(rows, columns=COLUMNS)


#: the per-column terms of :func:`column_budget`, in :data:`COLUMNS` order
_TERMS = COLUMNS[3:]
