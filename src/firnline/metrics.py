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
  mean of its cells, placed at the band's area-weighted mean elevation (for a balance
  linear in elevation the band mean balance is exactly the balance at that elevation,
  not at the band centre).
* ELA: found on a finer internal profile (bands of :data:`FINE_BAND_M`, at most the
  band width; ``profiles.csv`` stays on the configured band width). Its zero
  crossings lie between neighbouring (non-empty) fine bands whose balances straddle
  zero. When the profile crosses zero more than once, the crossing kept is the one
  that best separates the glacier: the one that minimises the glacier area lying on
  the wrong side of it (positive bands below it plus negative bands above it); ties
  go to the lowest crossing. The crossing is then placed by a continuous two-segment
  linear fit with its hinge at zero balance, ``b(z) = s_lo min(z - h, 0) + s_hi
  max(z - h, 0)``, least squares with the band areas as weights, over the fine bands
  within one band width below and above the two straddling bands; the ELA is the
  hinge ``h`` (searched between the two bands). A balance profile is close to two
  straight lines meeting at the ELA, steeper in the ablation area where ice is
  exposed (common practice; in this model ice melts at ``ddf_ice`` > ``ddf_snow``):
  the hinge fit recovers that kink, where linear interpolation between
  band values across it is biased toward the flatter side by a good part of a band.
  With a single band on each side the fit is undetermined and the ELA is the linear
  interpolation between the two bands' mean elevations.
* Flags: if every band is negative the ELA lies above the glacier (``above_glacier``,
  AAR = 0); if every band is positive or zero it lies below (``below_glacier``, AAR = 1);
  otherwise ``ok``. ``ela_m`` is empty (NaN) unless ``ok``.
* AAR: the glacier area with a positive annual balance divided by the glacier area
  (cell by cell, area-weighted); in a flagged year it follows the flag.
* Balance gradient of the ablation area: least-squares slope of band balance
  against band mean elevation over the bands whose mean elevation lies below the ELA
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

from . import exact

OK, BELOW, ABOVE = "ok", "below_glacier", "above_glacier"

BUDGET_COLUMNS = ["glacier", "ela0_m", "aar0", "r2", "n_years", "aar_r2", "dela_db_m_per_mwe",
                  "daar_db_per_mwe", "note"]

MIN_BUDGET_YEARS = 3
"""Fewest balance years with the ELA on the glacier for a balanced-budget regression."""


FINE_BAND_M = 5.0
"""Band width (m) of the internal profile the ELA is found on (at most the configured width)."""

_HINGE_STEPS = 201
"""Hinge positions tried per search pass (two passes: the gap, then one step around the best)."""


@dataclass(frozen=True)
class Profile:
    """Balance profile of one glacier and year.

    band_bottom_m, band_top_m : (n_bands,) m
    area_m2 : (n_bands,) glacier area in each band
    balance_mwe : (n_bands,) area-weighted mean annual balance, m w.e.
    mean_elevation_m : (n_bands,) area-weighted mean elevation of each band, m
        (None: the band centres)
    """

    band_bottom_m: np.ndarray
    band_top_m: np.ndarray
    area_m2: np.ndarray
    balance_mwe: np.ndarray
    mean_elevation_m: np.ndarray | None = None

    @property
    def centre_m(self) -> np.ndarray:
        return 0.5 * (self.band_bottom_m + self.band_top_m)

    @property
    def elevation_m(self) -> np.ndarray:
        """Where each band's balance belongs: its area-weighted mean elevation, m."""
        return self.centre_m if self.mean_elevation_m is None else self.mean_elevation_m


def specific_balance(values: np.ndarray, weights: np.ndarray) -> float:
    """Area-weighted mean of ``values`` (any unit) with ``weights`` (areas); exact sums (:mod:`firnline.exact`)."""
    wsum = exact.total(weights)
    return exact.total(values * weights) / wsum if wsum > 0 else float("nan")


def _band_index(z_m: np.ndarray, band_width_m: float) -> np.ndarray:
    return np.floor(z_m / band_width_m).astype(np.int64)


def profile_from_sums(band: np.ndarray, area_m2: np.ndarray, weighted_balance: np.ndarray,
                      weighted_z: np.ndarray, band_width_m: float) -> Profile:
    """A :class:`Profile` from the sums per band (ascending band numbers ``k``, band ``[k w, (k + 1) w)``):
    glacier area, area x balance and area x elevation; empty bands are dropped."""
    keep = area_m2 > 0
    bottom = np.asarray(band, dtype="float64") * band_width_m
    with np.errstate(invalid="ignore", divide="ignore"):
        bal = weighted_balance / area_m2
        zmean = weighted_z / area_m2
    return Profile(band_bottom_m=bottom[keep], band_top_m=bottom[keep] + band_width_m,
                   area_m2=area_m2[keep], balance_mwe=bal[keep], mean_elevation_m=zmean[keep])


def band_profile(z_m: np.ndarray, balance_mwe: np.ndarray, area_m2: np.ndarray,
                 band_width_m: float) -> Profile:
    """Area-weighted balance in elevation bands of ``band_width_m`` (empty bands dropped).

    The band sums are exact (:mod:`firnline.exact`), so they do not depend on the order of
    the cells (a tiled run merges the same sums from its units).

    Parameters
    ----------
    z_m, balance_mwe, area_m2 : ndarray (n_cells,)
        Elevation (m), annual balance (m w.e.) and glacier area (m2) of each cell.
    band_width_m : float
    """
    k = _band_index(z_m, band_width_m)
    bands = np.unique(k)
    sums = [exact.lookup(*exact.values(exact.of(k, v)), bands)
            for v in (area_m2, area_m2 * balance_mwe, area_m2 * z_m)]
    return profile_from_sums(bands, *sums, band_width_m)


def ela(z_m: np.ndarray, balance_mwe: np.ndarray, area_m2: np.ndarray,
        band_width_m: float) -> tuple[float, str]:
    """ELA (m) and flag of one glacier from its cells (module docstring: the rules).

    The zero crossing is found on a profile of ``min(FINE_BAND_M, band_width_m)`` bands
    and placed by the hinge fit over one ``band_width_m`` on either side.
    """
    fine = band_profile(z_m, balance_mwe, area_m2, min(FINE_BAND_M, band_width_m))
    return ela_from_profile(fine, window_m=band_width_m)


def _hinge_residual(h: np.ndarray, z_lo, b_lo, w_lo, z_hi, b_hi, w_hi) -> np.ndarray:
    """Weighted residual sum of squares of the zero-hinged two-segment fit at hinges ``h``."""
    total = np.zeros(h.shape)
    for z, b, w in ((z_lo, b_lo, w_lo), (z_hi, b_hi, w_hi)):
        u = z[None, :] - h[:, None]
        num = (w * u * b).sum(axis=1)
        den = (w * u * u).sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            explained = np.where(den > 0, num * num / den, 0.0)
        total += float((w * b * b).sum()) - explained
    return total


def _hinge(profile: Profile, i: int, window_m: float) -> float:
    """ELA between bands ``i`` and ``i + 1`` by the zero-hinged two-segment fit (docstring)."""
    z, b, a = profile.elevation_m, profile.balance_mwe, profile.area_m2
    z0, z1 = float(z[i]), float(z[i + 1])
    linear = z0 + (0.0 - b[i]) * (z1 - z0) / (b[i + 1] - b[i])
    lo = (z <= z0) & (z >= z0 - window_m)
    hi = (z >= z1) & (z <= z1 + window_m)
    if lo.sum() < 2 and hi.sum() < 2:
        return float(linear)
    sides = (z[lo], b[lo], a[lo], z[hi], b[hi], a[hi])
    h = np.linspace(z0, z1, _HINGE_STEPS)
    r = _hinge_residual(h, *sides)
    best = int(np.argmin(r))
    step = (z1 - z0) / (_HINGE_STEPS - 1)
    h = np.linspace(max(z0, h[best] - step), min(z1, h[best] + step), _HINGE_STEPS)
    r = _hinge_residual(h, *sides)
    return float(h[int(np.argmin(r))])


def ela_from_profile(profile: Profile, window_m: float | None = None) -> tuple[float, str]:
    """ELA (m) and flag from a profile; see the module docstring for the rules.

    ``window_m``: how far below and above the crossing the hinge fit looks (default:
    the profile's band width, so a band profile fits over its neighbouring bands).
    """
    b = profile.balance_mwe
    zc = profile.elevation_m
    a = profile.area_m2
    if np.all(b < 0):
        return float("nan"), ABOVE
    if np.all(b >= 0):
        return float("nan"), BELOW
    if window_m is None:
        window_m = float(profile.band_top_m[0] - profile.band_bottom_m[0])
    neg = b < 0
    cross = np.flatnonzero(neg[:-1] != neg[1:])
    z = zc[cross] + (0.0 - b[cross]) * (zc[cross + 1] - zc[cross]) / (b[cross + 1] - b[cross])
    # the glacier area on the wrong side of each crossing: positive bands below, negative above
    wrong = [a[:i + 1][~neg[:i + 1]].sum() + a[i + 1:][neg[i + 1:]].sum() for i in cross]
    _, _, i = min(zip(wrong, z, cross))  # ties: lowest crossing
    return _hinge(profile, int(i), window_m), OK


def aar(balance_mwe: np.ndarray, area_m2: np.ndarray, flag: str) -> float:
    """Accumulation-area ratio: area with positive balance / glacier area (follows the flag)."""
    if flag == ABOVE:
        return 0.0
    if flag == BELOW:
        return 1.0
    total = exact.total(area_m2)
    return exact.total(area_m2[balance_mwe > 0]) / total if total > 0 else float("nan")


def ablation_gradient(profile: Profile, ela_m: float, flag: str) -> float:
    """Balance gradient of the ablation area, m w.e. per 100 m (NaN if under two bands)."""
    if flag == BELOW:
        return float("nan")
    zc = profile.elevation_m
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
    sums = glacier_sums(z_m, area_m2, [annual_mwe], [winter_mwe], [summer_mwe], band_width_m)
    return glacier_years_from_sums(sums, 1, band_width_m)[0]


# ----------------------------------------------------------------------------
# the sums behind the metrics of a glacier: partial sums of parts of it merge exactly
# ----------------------------------------------------------------------------

# key = ((slot * _NQ + quantity) << _BAND_BITS) + band + _BAND_OFFSET; slot 0: fixed, 1 + y: year y
_NQ, _BAND_BITS, _BAND_OFFSET = 8, 17, 1 << 16
_AREA, _CB_AREA, _CB_Z, _FB_AREA, _FB_Z = 0, 1, 2, 3, 4          # fixed over the years
_TOTALS, _CB_BAL, _FB_BAL = 5, 6, 7                                # per year
_ANNUAL, _WINTER, _SUMMER, _POSITIVE = 0, 1, 2, 3                  # the "band" slots of _TOTALS


def _key(slot: int, quantity: int, band) -> np.ndarray:
    return ((slot * _NQ + quantity) << _BAND_BITS) + np.asarray(band, dtype=np.int64) + _BAND_OFFSET


def glacier_sums(z_m, area_m2, annual_mwe, winter_mwe, summer_mwe, band_width_m,
                 first_year: int = 0) -> exact.Sums:
    """The exact sums of a glacier's cells (or of some of them) behind :func:`glacier_years_from_sums`.

    ``z_m`` and ``area_m2`` (n_cells,); the balances (n_years, n_cells) m w.e. Sums of parts of
    a glacier (the units of a tiled run) merged with :func:`firnline.exact.merge` equal the sums
    of the whole glacier exactly; so do those of blocks of years, the balances then being years
    ``first_year ..`` of the record (the areas are counted with the block of year 0 only).
    """
    z = np.asarray(z_m, dtype="float64")
    a = np.asarray(area_m2, dtype="float64")
    cb = _band_index(z, band_width_m)
    fb = _band_index(z, min(FINE_BAND_M, band_width_m))
    parts = []
    if first_year == 0:
        parts.append(exact.of(np.concatenate([_key(0, _AREA, np.zeros(z.size, np.int64)), _key(0, _CB_AREA, cb),
                                              _key(0, _CB_Z, cb), _key(0, _FB_AREA, fb), _key(0, _FB_Z, fb)]),
                              np.concatenate([a, a, a * z, a, a * z])))
    zero = np.zeros(z.size, np.int64)
    for y, (b, w, s) in enumerate(zip(annual_mwe, winter_mwe, summer_mwe)):
        b = np.asarray(b, dtype="float64")
        slot = first_year + y + 1
        keys = [_key(slot, _TOTALS, zero + q) for q in (_ANNUAL, _WINTER, _SUMMER, _POSITIVE)]
        vals = [a * b, a * np.asarray(w, dtype="float64"), a * np.asarray(s, dtype="float64"), np.where(b > 0, a, 0.0)]
        parts.append(exact.of(np.concatenate(keys + [_key(slot, _CB_BAL, cb), _key(slot, _FB_BAL, fb)]),
                              np.concatenate(vals + [a * b, a * b])))
    return exact.merge(parts)


def glacier_years_from_sums(sums: exact.Sums, n_years: int, band_width_m: float) -> list[YearMetrics]:
    """The metrics of each balance year from a glacier's :func:`glacier_sums` (module docstring: the rules)."""
    keys, vals = exact.values(sums)

    def block(slot, quantity):          # the bands of one quantity: (band numbers, sums)
        lo = int(_key(slot, quantity, -_BAND_OFFSET))
        i, j = np.searchsorted(keys, [lo, lo + (1 << _BAND_BITS)])
        return keys[i:j] - lo - _BAND_OFFSET, vals[i:j]

    def profile(slot, q_area, q_z, q_bal, width):
        band, area = block(0, q_area)
        return profile_from_sums(band, area, exact.lookup(*block(slot, q_bal), band),
                                 exact.lookup(*block(0, q_z), band), width)

    area = float(exact.lookup(keys, vals, _key(0, _AREA, 0)))
    out = []
    for y in range(n_years):
        t = exact.lookup(keys, vals, _key(y + 1, _TOTALS, [_ANNUAL, _WINTER, _SUMMER, _POSITIVE]))
        mean = t / area if area > 0 else np.full(4, np.nan)
        prof = profile(y + 1, _CB_AREA, _CB_Z, _CB_BAL, band_width_m)
        fine = profile(y + 1, _FB_AREA, _FB_Z, _FB_BAL, min(FINE_BAND_M, band_width_m))
        ela_m, flag = ela_from_profile(fine, window_m=band_width_m)
        aar_ = 0.0 if flag == ABOVE else 1.0 if flag == BELOW else float(mean[_POSITIVE])
        out.append(YearMetrics(area_m2=area, annual_mwe=float(mean[_ANNUAL]), winter_mwe=float(mean[_WINTER]),
                               summer_mwe=float(mean[_SUMMER]), ela_m=ela_m, aar=aar_, ela_flag=flag,
                               gradient_mwe_per_100m=ablation_gradient(prof, ela_m, flag), profile=prof))
    return out


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
