"""Climate scenarios and the ELA sensitivity to warming.

A *scenario* is a pair (uniform warming in K added to the station temperature,
precipitation change in % scaling the station precipitation by 1 + pct/100). A
sweep runs every combination of the given warming and precipitation changes,
always together with the no-change reference (0 K, 0 %), in **one** kernel call:
the scenarios are the kernel's extra axis, on one prepared :class:`~firnline.model.Setup`
(grid, terrain, outlines, forcing and radiation read and derived once).

The rules of the means, shifts and slopes are :data:`RULES` (written into
``scenarios.json``); the balanced-budget ELA0 / AAR0 of a run are
:func:`firnline.metrics.balanced_budget`.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
import pandas as pd

from .config import Config
from .errors import InputError
from .metrics import ABOVE, BELOW, OK, band_profile, line_fit
from .model import Setup, cell_fields, check_config, glacier_metrics, simulate, tables, to_grid
from .progress import Progress

RULES = (
    "Per balance year, each glacier's specific balance, ELA, AAR and ELA flag follow the rules of "
    "firnline.metrics (the same as summary.csv of a run).",
    "Mean over the record (scenarios.csv): the annual balance and the AAR are averaged over every "
    "balance year (the AAR is 0 or 1 in a year whose ELA left the glacier, which is its true value "
    "then). The ELA is averaged over the years whose flag is ok only; it is empty when no year is ok. "
    "How many years were flagged is in scenarios.json (ela_flags) and the console table and, year by "
    "year, in scenario_years.csv. A mean ELA over fewer years than the record is biased towards the "
    "years in which the ELA stayed on the glacier.",
    "ELA shift: per year, the scenario's ELA minus the reference ELA of the same year (empty unless "
    "both are ok); over the record, the mean of those paired differences. When every year is ok this "
    "equals the difference of the means.",
    "Sensitivity (sensitivity.csv), from the scenarios at 0 % precipitation change: "
    "dbalance_dt_mwe_per_k is the least-squares slope of the record-mean annual balance against "
    "warming. dela_dt_m_per_k is the least-squares slope of the yearly ELA against warming with one "
    "intercept per balance year (a pooled within-year fit), over the (year, warming) pairs whose ELA "
    "is ok; pairs whose ELA left the glacier are excluded, and so is a year with fewer than two ok "
    "warming steps; the note column says which were left out. With every pair ok this is exactly the "
    "slope of the record-mean ELA against warming.",
)
"""The rules of a sweep's means, shifts and slopes, one sentence group each (``scenarios.json``)."""

SCENARIO_COLUMNS = ["glacier", "warming_k", "precip_change_pct", "mean_annual_balance_mwe", "ela_m",
                    "aar", "ela_shift_m"]
YEAR_COLUMNS = ["glacier", "warming_k", "precip_change_pct", "balance_year", "annual_balance_mwe",
                "ela_m", "aar", "ela_shift_m", "ela_flag", "winter_balance_mwe", "summer_balance_mwe"]
SENSITIVITY_COLUMNS = ["glacier", "dela_dt_m_per_k", "dbalance_dt_mwe_per_k", "n_warming_steps",
                       "n_ela_years_used", "n_ela_years_excluded", "note"]
PROFILE_COLUMNS = ["glacier", "warming_k", "precip_change_pct", "band_bottom_m", "band_top_m",
                   "area_km2", "mean_annual_balance_mwe"]
FLAG_COLUMNS = ["glacier", "warming_k", "precip_change_pct", "n_years", "n_ela_ok", "n_above_glacier",
                "n_below_glacier"]

_DECIMALS = 6  # scenario values are compared after rounding to this many decimals


# ----------------------------------------------------------------------------
# the scenario list
# ----------------------------------------------------------------------------

#: Warmings a sweep accepts, K: far beyond projected end-of-century changes (IPCC AR6 ranges lie
#: within about -2..+10 K regionally; from memory), so only typing errors are refused.
WARMING_RANGE_K = (-20.0, 20.0)
#: Largest precipitation change a sweep accepts, % (a factor of 4; larger values are typing errors,
#: for example a factor given as a percent).
MAX_PRECIP_CHANGE_PCT = 300.0


def scenario_list(warming_k: Sequence[float], precip_change_pct: Sequence[float] = (0.0,),
                  names: tuple[str, str] = ("warming_k", "precip_change_pct")) -> list[tuple[float, float]]:
    """Every (warming, precipitation change) combination, with the (0, 0) reference.

    Parameters
    ----------
    warming_k : sequence of float
        Uniform warmings added to the station temperature, K (at least one).
    precip_change_pct : sequence of float
        Precipitation changes, % (each > -100); an empty sequence means ``[0]``.
    names : (str, str)
        How the caller calls the two lists, for the messages (the command line passes
        its option names).

    Returns
    -------
    list of (warming_k, precip_change_pct)
        Sorted by warming, then precipitation change, duplicates removed, always
        containing (0.0, 0.0).

    Raises
    ------
    InputError
        No warming given, a value that is not a finite number, a warming outside
        :data:`WARMING_RANGE_K`, or a precipitation change of -100 % or less or above
        :data:`MAX_PRECIP_CHANGE_PCT`.
    """
    w_name, p_name = names
    w = [_checked(v, w_name) for v in warming_k]
    p = [_checked(v, p_name) for v in precip_change_pct] or [0.0]
    if not w:
        raise InputError(f"No warming given: pass at least one warming in K as {w_name}, e.g. 1 2 3.")
    for v in w:
        if not WARMING_RANGE_K[0] <= v <= WARMING_RANGE_K[1]:
            raise InputError(f"The warming {v:g} K ({w_name}) lies outside {WARMING_RANGE_K[0]:g}..+"
                             f"{WARMING_RANGE_K[1]:g} K, beyond any climate scenario a temperature-index "
                             "model can stand for; give a value inside that range.")
    for v in p:
        if v <= -100.0:
            raise InputError(f"The precipitation change {v:g} % ({p_name}) would remove all "
                             "precipitation; give values above -100.")
        if v > MAX_PRECIP_CHANGE_PCT:
            raise InputError(f"The precipitation change {v:g} % ({p_name}) is above +{MAX_PRECIP_CHANGE_PCT:g} % "
                             f"(precipitation times {1 + MAX_PRECIP_CHANGE_PCT / 100:g}); give a change of "
                             "at most that (a percent, not a factor).")
    combos = {(a, b) for a in w for b in p} | {(0.0, 0.0)}
    return sorted(combos)


def _checked(value, where: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{where} takes numbers; got {value!r}.") from None
    if not np.isfinite(v):
        raise InputError(f"{where} takes finite numbers; got {value!r}.")
    return round(v, _DECIMALS) + 0.0  # + 0.0 turns -0.0 into 0.0


def scenario_label(warming_k: float, precip_change_pct: float) -> str:
    """A plain file-name label, e.g. ``w+1.0_p+0`` or ``w-0.5_p-12.5``."""
    return f"w{_signed(warming_k, 1)}_p{_signed(precip_change_pct, 0)}"


def _signed(v: float, min_decimals: int) -> str:
    s = f"{v + 0.0:+.{_DECIMALS}f}".rstrip("0")
    if s.endswith("."):
        s = s + "0" * min_decimals if min_decimals else s[:-1]
    return s


# ----------------------------------------------------------------------------
# the sweep
# ----------------------------------------------------------------------------

@dataclass
class Sweep:
    """Result of :func:`sweep`.

    setup : the setup restricted to the glacier cells (:func:`glacier_view`)
    config : the config used (the setup's, or one differing only in kernel parameters)
    scenarios : list of (warming_k, precip_change_pct), the kernel's scenario order
    reference : index of (0, 0) in ``scenarios``
    years : balance years (labelled by the year they end in)
    table : DataFrame with :data:`SCENARIO_COLUMNS` (``scenarios.csv``)
    year_table : DataFrame with :data:`YEAR_COLUMNS` (``scenario_years.csv``)
    sensitivity : DataFrame with :data:`SENSITIVITY_COLUMNS` (``sensitivity.csv``)
    profiles : DataFrame with :data:`PROFILE_COLUMNS`: band profile of the record-mean
        annual balance per glacier and scenario (``scenario_profiles.csv``)
    flags : DataFrame with :data:`FLAG_COLUMNS` (see :func:`flag_counts`)
    glaciers : DataFrame (glacier, area_km2, min_elevation_m, max_elevation_m)
    mean_balance : ndarray (n_scenarios, n_cells) float32
        Record-mean annual balance of each glacier cell (``setup.cells`` order), m w.e.
    timings : dict, s
    """

    setup: Setup
    config: Config
    scenarios: list
    reference: int
    years: list
    table: pd.DataFrame
    year_table: pd.DataFrame
    sensitivity: pd.DataFrame
    profiles: pd.DataFrame
    flags: pd.DataFrame
    glaciers: pd.DataFrame
    mean_balance: np.ndarray
    timings: dict = field(default_factory=dict)

    def mean_balance_map(self, scenario: int) -> np.ndarray:
        """(ny, nx) float32 record-mean annual balance of one scenario, m w.e., NaN off glaciers."""
        return to_grid(self.setup, self.mean_balance[scenario], where=self.setup.glacier_mask)


def sweep(setup: Setup, warming_k: Sequence[float], precip_change_pct: Sequence[float] = (0.0,),
          config: Config | None = None, progress: Progress = None) -> Sweep:
    """Run every scenario in one kernel call and derive the per-glacier results.

    Parameters
    ----------
    setup : Setup
        Prepared inputs (:func:`firnline.model.prepare`), shared by every scenario; only
        its glacier cells are modelled (see :func:`glacier_view`).
    warming_k : sequence of float
        Uniform warmings, K; combined with every precipitation change.
    precip_change_pct : sequence of float
        Precipitation changes, %; precipitation is scaled by 1 + pct/100.
    config : Config, optional
        Parameters to use (default: ``setup.config``); it may differ from
        ``setup.config`` only in the kernel parameters
        (:func:`firnline.model.check_config`).
    progress : callable(label, done, total), optional

    Returns
    -------
    Sweep
        See the module docstring for how the means, shifts and slopes are taken.
    """
    cfg = check_config(setup, config)
    scen = scenario_list(warming_k, precip_change_pct)
    setup = glacier_view(setup)
    t0 = time.perf_counter()
    kres = simulate(setup, cfg, [s[0] for s in scen], [s[1] for s in scen], progress=progress)
    t1 = time.perf_counter()
    years = [int(y) for y in setup.forcing.years]
    area = setup.grid.cell_area_m2
    bw = cfg.balance.band_width_m
    gl = setup.glaciers
    per_scenario = []
    profile_rows = []
    mean_balance = np.empty((len(scen), setup.z_m.size), dtype="float32")
    for s, (w, p) in enumerate(scen):
        f = cell_fields(setup, kres, s)
        mean_balance[s] = f["annual_balance"].mean(axis=0)
        summary = tables(glacier_metrics(setup, f, years), years)[0]
        summary.insert(1, "warming_k", w)
        summary.insert(2, "precip_change_pct", p)
        per_scenario.append(summary)
        for name, pos, frac in zip(gl.names, setup.glacier_pos, gl.fractions):
            prof = band_profile(setup.z_m[pos], mean_balance[s][pos].astype("float64"), frac * area, bw)
            profile_rows += [[name, w, p, b0, b1, a / 1e6, b] for b0, b1, a, b in
                             zip(prof.band_bottom_m, prof.band_top_m, prof.area_m2, prof.balance_mwe)]
    del kres
    reference = scen.index((0.0, 0.0))
    rank = {name: i for i, name in enumerate(gl.names)}   # glaciers in outline order, then scenarios
    years_df = year_results(pd.concat(per_scenario, ignore_index=True))
    years_df = years_df.sort_values(["glacier", "warming_k", "precip_change_pct", "balance_year"],
                                    key=lambda c: c.map(rank) if c.name == "glacier" else c,
                                    kind="stable", ignore_index=True)
    glaciers = pd.DataFrame({
        "glacier": list(gl.names),
        "area_km2": [float(np.sum(fr) * area / 1e6) for fr in gl.fractions],
        "min_elevation_m": [float(setup.z_m[pos].min()) for pos in setup.glacier_pos],
        "max_elevation_m": [float(setup.z_m[pos].max()) for pos in setup.glacier_pos],
    })
    t2 = time.perf_counter()
    return Sweep(setup=setup, config=cfg, scenarios=scen, reference=reference, years=years,
                 table=scenario_means(years_df), year_table=years_df,
                 sensitivity=sensitivity(years_df),
                 profiles=pd.DataFrame(profile_rows, columns=PROFILE_COLUMNS),
                 flags=flag_counts(years_df), glaciers=glaciers, mean_balance=mean_balance,
                 timings=dict(setup.timings, kernel_s=t1 - t0, metrics_s=t2 - t1))


def glacier_view(setup: Setup) -> Setup:
    """The setup restricted to the cells that carry glacier ice (the setup itself if all do).

    Every product of a sweep (glacier metrics, mean-balance maps with nodata off the
    glaciers) depends only on glacier cells, and each cell's balance depends only on its
    own inputs, so ice-free cells need not be modelled. The grid, glaciers, forcing and
    notes are shared; ``cells``, ``z_m``, ``glacier_mask``, ``glacier_pos`` and the
    radiation table are cut to the glacier cells.
    """
    if setup.glacier_mask.all():
        return setup
    return setup.select(np.flatnonzero(setup.glacier_mask))


# ----------------------------------------------------------------------------
# tables from the per-year results
# ----------------------------------------------------------------------------

_KEYS = ["glacier", "warming_k", "precip_change_pct"]


def year_results(summaries: pd.DataFrame) -> pd.DataFrame:
    """Per-year table of a sweep, with the ELA shift from the same year's reference.

    Parameters
    ----------
    summaries : DataFrame
        Rows of ``summary.csv`` (:data:`firnline.model.SUMMARY_COLUMNS`) with the
        columns ``warming_k`` (K) and ``precip_change_pct`` (%) added; it must hold
        the reference scenario (0, 0).

    Returns
    -------
    DataFrame with :data:`YEAR_COLUMNS`; ``ela_shift_m`` (m) is NaN unless both this
    scenario's and the reference's ELA are ``ok`` that year.
    """
    ref = summaries[(summaries.warming_k == 0.0) & (summaries.precip_change_pct == 0.0)]
    if ref.empty:
        raise ValueError("the per-year results need the reference scenario (0 K, 0 %)")
    ref = ref[["glacier", "balance_year", "ela_m"]].rename(columns={"ela_m": "_ref_ela"})
    out = summaries.merge(ref, on=["glacier", "balance_year"], how="left", validate="many_to_one")
    out["ela_shift_m"] = out.ela_m - out._ref_ela
    return out[YEAR_COLUMNS].reset_index(drop=True)


def scenario_means(years: pd.DataFrame) -> pd.DataFrame:
    """Record means per glacier and scenario (``scenarios.csv``).

    Parameters
    ----------
    years : DataFrame with :data:`YEAR_COLUMNS`

    Returns
    -------
    DataFrame with :data:`SCENARIO_COLUMNS`: mean annual balance (m w.e.) and mean AAR
    over every year; mean ELA (m) over the ``ok`` years (NaN if none); mean of the
    paired yearly ELA shifts (m; NaN if no year has both ELAs ``ok``).
    """
    g = years.groupby(_KEYS, sort=False)
    out = g.agg(mean_annual_balance_mwe=("annual_balance_mwe", "mean"), ela_m=("ela_m", "mean"),
                aar=("aar", "mean"), ela_shift_m=("ela_shift_m", "mean")).reset_index()
    return out[SCENARIO_COLUMNS]


def flag_counts(years: pd.DataFrame) -> pd.DataFrame:
    """How many years per glacier and scenario had the ELA on, above and below the glacier."""
    flag = years.ela_flag
    tmp = years[_KEYS].assign(n_years=1, n_ela_ok=(flag == OK).astype(int),
                              n_above_glacier=(flag == ABOVE).astype(int),
                              n_below_glacier=(flag == BELOW).astype(int))
    return tmp.groupby(_KEYS, sort=False).sum().reset_index()[FLAG_COLUMNS]


def sensitivity(years: pd.DataFrame) -> pd.DataFrame:
    """dELA/dT and dB/dT per glacier at 0 % precipitation change (``sensitivity.csv``).

    Parameters
    ----------
    years : DataFrame with :data:`YEAR_COLUMNS`

    Returns
    -------
    DataFrame with :data:`SENSITIVITY_COLUMNS`:

    * ``dela_dt_m_per_k`` (m K-1): pooled within-year least-squares slope of the ELA
      against warming over the (year, warming) pairs with an ``ok`` ELA, in years
      holding at least two such pairs; the others are counted in
      ``n_ela_years_excluded`` and named in ``note``.
    * ``dbalance_dt_mwe_per_k`` (m w.e. K-1): least-squares slope of the record-mean
      annual balance against warming (every year counts).
    * ``n_warming_steps``: distinct warmings at 0 % precipitation change; both slopes
      need at least two and are NaN otherwise.
    """
    rows = []
    for name, g in years[years.precip_change_pct == 0.0].groupby("glacier", sort=False):
        means = g.groupby("warming_k").annual_balance_mwe.mean()
        n_steps = len(means)
        notes = []
        dbdt = dela = float("nan")
        n_used = 0
        if n_steps < 2:
            notes.append(f"needs at least two warming steps at 0 % precipitation change, found "
                         f"{n_steps}: give a warming other than 0 and include 0 among the "
                         "precipitation changes")
        else:
            dbdt = line_fit(means.index.to_numpy(), means.to_numpy())[1]
            ok = g[g.ela_flag == OK]
            steps_in_year = ok.groupby("balance_year").warming_k.transform("nunique")
            used = ok[steps_in_year >= 2]
            n_used = len(used)
            if n_used:   # one intercept per year: the line through the within-year deviations
                dx = used.warming_k - used.groupby("balance_year").warming_k.transform("mean")
                dy = used.ela_m - used.groupby("balance_year").ela_m.transform("mean")
                dela = line_fit(dx.to_numpy(), dy.to_numpy())[1]
            else:
                notes.append("no balance year has two warming steps with the ELA on the glacier, "
                             "so dELA/dT is undefined")
            notes += _exclusion_notes(g, ok, used)
        rows.append([name, dela, dbdt, n_steps, n_used, len(g) - n_used, "; ".join(notes)])
    return pd.DataFrame(rows, columns=SENSITIVITY_COLUMNS)


def _exclusion_notes(g: pd.DataFrame, ok: pd.DataFrame, used: pd.DataFrame) -> list[str]:
    """Plain sentences naming the (warming, year) pairs left out of dELA/dT."""
    out = []
    n_years = g.balance_year.nunique()
    for flag, words in ((ABOVE, "ELA above the glacier"), (BELOW, "ELA below the glacier")):
        off = g[g.ela_flag == flag]
        if len(off):
            parts = [f"{w:+g} K in {len(r)} of {n_years} years" for w, r in off.groupby("warming_k")]
            out.append(f"left out of dELA/dT ({words}): " + ", ".join(parts))
    lone = ok.index.difference(used.index)
    if len(lone):
        out.append(f"left out of dELA/dT: {len(lone)} year(s) with a single warming step whose ELA "
                   "stayed on the glacier")
    return out
