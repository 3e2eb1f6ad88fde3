"""Glacier-wide metrics from per-cell balances.

Terms follow Cogley et al. (2011), Glossary of Glacier Mass Balance and Related
Terms, UNESCO-IHP: specific balance (area-weighted mean over the glacier),
balance profile (balance against elevation), equilibrium-line altitude (ELA),
accumulation-area ratio (AAR) and balance gradient.

Rules used here
---------------
* Weights: every cell counts with its glacier area, ``fraction * cell_area``.
* Profile: elevation bands ``[k * band_width, (k + 1) * band_width)`` (band edges
  at whole multiples of the band width); each band's balance is the area-weighted
  mean of its cells.
* ELA: the elevation where the band profile crosses zero, by linear interpolation
  between the centres of the two neighbouring (non-empty) bands whose balances
  straddle zero. When the profile crosses zero more than once, the crossing kept
  is the one that best separates the glacier: the one that minimises the glacier
  area lying on the wrong side of it (positive bands below it plus negative bands
  above it); ties go to the lowest crossing.
* Flags: if every band is negative the ELA lies above the glacier (``above_glacier``,
  AAR = 0); if every band is positive or zero it lies below (``below_glacier``, AAR = 1);
  otherwise ``ok``. ``ela_m`` is empty (NaN) unless ``ok``.
* AAR: the glacier area with a positive annual balance divided by the glacier area
  (cell by cell, area-weighted); in a flagged year it follows the flag.
* Balance gradient of the ablation area: least-squares slope of band balance
  against band-centre elevation over the bands whose centre lies below the ELA
  (all bands in an ``above_glacier`` year), in m w.e. per 100 m; it needs at
  least two such bands.
* Balanced budget (``balanced_budget.csv``, :func:`balanced_budget`): per glacier,
  ELA and AAR are regressed linearly on the specific annual balance B over the
  balance years of a run, and ELA0 and AAR0 are the fitted values at B = 0 (the
  intercepts), after Dyurgerov, Meier & Bahr (2009), J. Glaciology 55(192). Only
  years with the flag ``ok`` are used (in the other years the ELA is undefined and
  the AAR saturated at 0 or 1). Fewer than three usable years give empty values and
  an ``insufficient years`` note; when B = 0 lies outside the modelled balances, the
  note says the values are extrapolated.

Every straight-line fit (gradient, balanced budget, the sensitivities of
:mod:`firnline.scenarios`) is :func:`line_fit`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

OK, BELOW, ABOVE = "ok", "below_glacier", "above_glacier"

BUDGET_COLUMNS = ["glacier", "ela0_m", "aar0", "r2", "n_years", "aar_r2", "dela_db_m_per_mwe",
                  "daar_db_per_mwe", "note"]

MIN_BUDGET_YEARS = 3
"""Fewest balance years with the ELA on the glacier for a balanced-budget regression."""


@dataclass(frozen=True)
class Profile:
    """Balance profile of one glacier and year.

    band_bottom_m, band_top_m : (n_bands,) m
    area_m2 : (n_bands,) glacier area in each band
    balance_mwe : (n_bands,) area-weighted mean annual balance, m w.e.
    """

    band_bottom_m: np.ndarray
    band_top_m: np.ndarray
    area_m2: np.ndarray
    balance_mwe: np.ndarray

    @property
    def centre_m(self) -> np.ndarray:
        return 0.5 * (self.band_bottom_m + self.band_top_m)


def specific_balance(values: np.ndarray, weights: np.ndarray) -> float:
    """Area-weighted mean of ``values`` (any unit) with ``weights`` (areas)."""
    wsum = float(np.sum(weights))
    return float(np.sum(values * weights) / wsum) if wsum > 0 else float("nan")


def band_profile(z_m: np.ndarray, balance_mwe: np.ndarray, area_m2: np.ndarray,
                 band_width_m: float) -> Profile:
    """Area-weighted balance in elevation bands of ``band_width_m`` (empty bands dropped).

    Parameters
    ----------
    z_m, balance_mwe, area_m2 : ndarray (n_cells,)
        Elevation (m), annual balance (m w.e.) and glacier area (m2) of each cell.
    band_width_m : float
    """
    k = np.floor(z_m / band_width_m).astype(np.int64)
    k0 = int(k.min())
    idx = k - k0
    nb = int(idx.max()) + 1
    area = np.bincount(idx, weights=area_m2, minlength=nb)
    wbal = np.bincount(idx, weights=area_m2 * balance_mwe, minlength=nb)
    keep = area > 0
    bottom = (np.arange(nb) + k0) * band_width_m
    with np.errstate(invalid="ignore", divide="ignore"):
        bal = wbal / area
    return Profile(band_bottom_m=bottom[keep], band_top_m=bottom[keep] + band_width_m,
                   area_m2=area[keep], balance_mwe=bal[keep])


def ela_from_profile(profile: Profile) -> tuple[float, str]:
    """ELA (m) and flag from a band profile; see the module docstring for the rules."""
    b = profile.balance_mwe
    zc = profile.centre_m
    a = profile.area_m2
    if np.all(b < 0):
        return float("nan"), ABOVE
    if np.all(b >= 0):
        return float("nan"), BELOW
    candidates = []
    for i in range(len(b) - 1):
        b0, b1 = b[i], b[i + 1]
        if (b0 < 0) != (b1 < 0):
            if b1 == b0:
                z = zc[i]
            else:
                z = zc[i] + (0.0 - b0) * (zc[i + 1] - zc[i]) / (b1 - b0)
            wrong = a[(zc < z) & (b >= 0)].sum() + a[(zc > z) & (b < 0)].sum()
            candidates.append((wrong, z))
    wrong, z = min(candidates)  # ties: lowest z (tuples compare z second)
    return float(z), OK


def aar(balance_mwe: np.ndarray, area_m2: np.ndarray, flag: str) -> float:
    """Accumulation-area ratio: area with positive balance / glacier area (follows the flag)."""
    if flag == ABOVE:
        return 0.0
    if flag == BELOW:
        return 1.0
    total = float(area_m2.sum())
    return float(area_m2[balance_mwe > 0].sum() / total) if total > 0 else float("nan")


def ablation_gradient(profile: Profile, ela_m: float, flag: str) -> float:
    """Balance gradient of the ablation area, m w.e. per 100 m (NaN if under two bands)."""
    if flag == BELOW:
        return float("nan")
    zc = profile.centre_m
    sel = np.ones(len(zc), bool) if flag == ABOVE else zc < ela_m
    if sel.sum() < 2:
        return float("nan")
    return line_fit(zc[sel], profile.balance_mwe[sel])[1] * 100.0


@dataclass(frozen=True)
class YearMetrics:
    area_m2: float
    annual_mwe: float
    winter_mwe: float
    summer_mwe: float
    ela_m: float
    aar: float
    ela_flag: str
    gradient_mwe_per_100m: float
    profile: Profile


def glacier_year(z_m, area_m2, annual_mwe, winter_mwe, summer_mwe, band_width_m) -> YearMetrics:
    """All metrics of one glacier in one balance year (inputs over the glacier's cells)."""
    prof = band_profile(z_m, annual_mwe, area_m2, band_width_m)
    ela, flag = ela_from_profile(prof)
    return YearMetrics(area_m2=float(area_m2.sum()),
                       annual_mwe=specific_balance(annual_mwe, area_m2),
                       winter_mwe=specific_balance(winter_mwe, area_m2),
                       summer_mwe=specific_balance(summer_mwe, area_m2),
                       ela_m=ela, aar=aar(annual_mwe, area_m2, flag), ela_flag=flag,
                       gradient_mwe_per_100m=ablation_gradient(prof, ela, flag), profile=prof)


def line_fit(x: np.ndarray, y: np.ndarray) -> tuple[float, float, float]:
    """Ordinary least-squares line y = a + b x.

    Parameters
    ----------
    x, y : ndarray (n,), n >= 2, x not all equal

    Returns
    -------
    (a, b, r2) : intercept (unit of y), slope (unit of y per unit of x) and the
        coefficient of determination 1 - SS_res / SS_tot (NaN when y is constant).
    """
    x = np.asarray(x, dtype="float64")
    y = np.asarray(y, dtype="float64")
    dx = x - x.mean()
    sxx = float(np.sum(dx * dx))
    if x.size < 2 or sxx == 0.0:
        raise ValueError("a line fit needs at least two distinct x values")
    b = float(np.sum(dx * (y - y.mean())) / sxx)
    a = float(y.mean() - b * x.mean())
    ss_tot = float(np.sum((y - y.mean()) ** 2))
    ss_res = float(np.sum((y - a - b * x) ** 2))
    return a, b, (1.0 - ss_res / ss_tot) if ss_tot > 0 else float("nan")


def balanced_budget(summary: pd.DataFrame) -> pd.DataFrame:
    """Balanced-budget ELA0 and AAR0 per glacier (``balanced_budget.csv``).

    ELA and AAR of the years with an ``ok`` flag are regressed on the specific annual
    balance B by ordinary least squares, and evaluated at B = 0 (Dyurgerov, Meier &
    Bahr, 2009, J. Glaciology 55(192), "A new index of glacier area change").

    Parameters
    ----------
    summary : DataFrame
        One row per glacier and year with at least ``glacier``, ``annual_balance_mwe``
        (m w.e.), ``ela_m`` (m), ``aar`` and ``ela_flag`` (as ``summary.csv``).

    Returns
    -------
    DataFrame with :data:`BUDGET_COLUMNS`: ``ela0_m`` (m), ``aar0`` (1), ``r2`` of the
    ELA regression, ``n_years`` used, then ``aar_r2``, the slopes
    ``dela_db_m_per_mwe`` (m per m w.e.) and ``daar_db_per_mwe`` (per m w.e.) and a
    ``note``. With fewer than :data:`MIN_BUDGET_YEARS` usable years, or no spread of
    B between them, the values are NaN and the note says why.
    """
    rows = []
    for name, g in summary.groupby("glacier", sort=False):
        u = g[(g.ela_flag == OK) & np.isfinite(g.ela_m) & np.isfinite(g.aar)
              & np.isfinite(g.annual_balance_mwe)]
        b = u.annual_balance_mwe.to_numpy(float)
        n = len(u)
        nan = float("nan")
        if n < MIN_BUDGET_YEARS:
            rows.append([name, nan, nan, nan, n, nan, nan, nan,
                         f"insufficient years: {n} balance year(s) with the ELA on the glacier, "
                         f"{MIN_BUDGET_YEARS} needed"])
            continue
        if np.ptp(b) == 0.0:
            rows.append([name, nan, nan, nan, n, nan, nan, nan,
                         "insufficient years: the specific balance does not vary between the usable "
                         "years, so no regression"])
            continue
        ela0, dela, r2 = line_fit(b, u.ela_m.to_numpy(float))
        aar0, daar, aar_r2 = line_fit(b, u.aar.to_numpy(float))
        note = ""
        if not b.min() <= 0.0 <= b.max():
            note = (f"zero balance lies outside the modelled balances ({b.min():.2f} to {b.max():.2f} "
                    "m w.e.); ELA0 and AAR0 are extrapolated")
        rows.append([name, ela0, aar0, r2, n, aar_r2, dela, daar, note])
    return pd.DataFrame(rows, columns=BUDGET_COLUMNS).astype({"n_years": int})
