"""Climate scenarios and the ELA sensitivity to warming.

A *scenario* is a pair (uniform warming in K added to the station temperature,
precipitation change in % scaling the station precipitation by 1 + pct/100), or
twelve monthly such pairs from a change file (:mod:`firnline.changes`). A
sweep runs every combination of the given warming and precipitation changes and
every change file, always together with the no-change reference (0 K, 0 %), in
**one** kernel call:
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

from . import metrics
from .changes import Scenario, read_change_files
from .config import Config
from .errors import InputError
from .metrics import ABOVE, BELOW, OK, band_profile, ela, line_fit
from .model import Setup, cell_fields, check_config, glacier_metrics, simulate, tables, to_grid
from .progress import Progress

RULES = (
    "Per balance year, each glacier's specific balance, ELA, AAR and ELA flag follow the rules of "
    "firnline.metrics (the same as summary.csv of a run).",
    "Monthly scenarios: besides the uniform grid, each change file (--changes) is one scenario of "
    "twelve monthly warmings and precipitation changes, named by its file stem; in the tables its "
    "warming_k and precip_change_pct are the means of its twelve monthly values and scenario holds its "
    "name (a uniform scenario is named like w+1.0_p+0). Sensitivities use the uniform grid only.",
    "Mean over the record (scenarios.csv): the annual balance and the AAR are averaged over every "
    "balance year (the AAR is 0 or 1 in a year whose ELA left the glacier, which is its true value "
    "then). The ELA (ela_m) is the ELA of the record-mean balance profile (the band profile of each "
    "cell's mean annual balance over all years), never a mean of yearly ELAs over a changing set of "
    "years; its ela_flag says whether that profile crosses zero on the glacier. A mean of the yearly "
    "ELAs over the years whose ELA stayed on the glacier would lean towards the cooler, snowier years "
    "as warming grows, and could even fall while the glacier warms.",
    "ELA shift: per year, the scenario's ELA minus the reference ELA of the same year (paired; empty "
    "unless both are ok). Over the record, ela_shift_m is the mean of those paired differences, with "
    "their year-to-year spread (ela_shift_sd_m, ela_shift_min_m, ela_shift_max_m) and the number of "
    "paired years n_shift_years; profile_ela_shift_m is the shift of the record-mean-profile ELA. The "
    "figure ela_vs_warming.png shows the paired shift and its spread.",
    "Sensitivity (sensitivity.csv), from the scenarios at 0 % precipitation change: "
    "dbalance_dt_mwe_per_k is the least-squares slope of the record-mean annual balance against "
    "warming. dela_dt_m_per_k is the least-squares slope of the yearly ELA against warming with one "
    "intercept per balance year (a pooled within-year fit), over the (year, warming) pairs whose ELA "
    "is ok; pairs whose ELA left the glacier are excluded, and so is a year with fewer than two ok "
    "warming steps; the note column says which were left out. With every pair ok this is exactly the "
    "slope of the record-mean ELA against warming.",
    "Balanced budget per scenario (scenario_budget.csv): ELA and AAR of the years with the flag ok "
    "regressed on the specific balance, evaluated at zero balance (Dyurgerov, Meier & Bahr 2009), for "
    "every scenario.",
    "Precipitation offset (precip_offset.csv): per glacier and warming of the uniform grid, the "
    "precipitation change that gives a zero record-mean balance, and the one that keeps the reference "
    "balance (offsets the warming), by linear interpolation between the sweep's own precipitation steps "
    "at that warming (no extrapolation: empty with a note when the target lies outside them); divided by "
    "the warming, the latter is the precipitation change offsetting each kelvin. Also a linearised value "
    "per kelvin, -(dB/dT) / (dB/dP), from the least-squares slopes of the sweep's balances (valid near "
    "the swept range).",
)
"""The rules of a sweep's means, shifts and slopes, one sentence group each (``scenarios.json``)."""

SCENARIO_COLUMNS = ["glacier", "warming_k", "precip_change_pct", "mean_annual_balance_mwe", "ela_m",
                    "aar", "ela_shift_m"]
"""The contract columns of ``scenarios.csv`` (DESIGN.md); :data:`SCENARIO_EXTRA` follow them."""
SCENARIO_EXTRA = ["scenario", "ela_flag", "n_years", "n_shift_years", "ela_shift_sd_m", "ela_shift_min_m",
                  "ela_shift_max_m", "profile_ela_shift_m"]
YEAR_COLUMNS = ["glacier", "warming_k", "precip_change_pct", "balance_year", "annual_balance_mwe",
                "ela_m", "aar", "ela_shift_m", "ela_flag", "winter_balance_mwe", "summer_balance_mwe"]
YEAR_EXTRA = ["scenario"]
SENSITIVITY_COLUMNS = ["glacier", "dela_dt_m_per_k", "dbalance_dt_mwe_per_k", "n_warming_steps",
                       "n_ela_years_used", "n_ela_years_excluded", "note"]
SCENARIO_BUDGET_COLUMNS = ["glacier", "scenario", "warming_k", "precip_change_pct", "ela0_m", "aar0", "r2",
                           "n_years", "note"]
OFFSET_COLUMNS = ["glacier", "warming_k", "reference_balance_mwe", "precip_change_zero_balance_pct",
                  "precip_change_same_balance_pct", "offset_pct_per_k", "offset_pct_per_k_linear",
                  "n_precip_steps", "note"]
PROFILE_COLUMNS = ["glacier", "warming_k", "precip_change_pct", "band_bottom_m", "band_top_m",
                   "area_km2", "mean_annual_balance_mwe", "scenario"]
FLAG_COLUMNS = ["glacier", "warming_k", "precip_change_pct", "n_years", "n_ela_ok", "n_above_glacier",
                "n_below_glacier", "scenario"]

_DECIMALS = 6  # scenario values are compared after rounding to this many decimals
REFERENCE = "w+0.0_p+0"
"""Name of the no-change reference scenario."""


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
                  names: tuple[str, str] = ("warming_k", "precip_change_pct"),
                  allow_empty: bool = False) -> list[tuple[float, float]]:
    """Every (warming, precipitation change) combination, with the (0, 0) reference.

    Parameters
    ----------
    warming_k : sequence of float
        Uniform warmings added to the station temperature, K (at least one, unless
        ``allow_empty``: change files give the scenarios).
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
    if not w and not allow_empty:
        raise InputError(f"No warming given: pass at least one warming in K as {w_name}, e.g. 1 2 3 "
                         "(or monthly change files).")
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


def scenario_definitions(warming_k: Sequence[float] = (), precip_change_pct: Sequence[float] = (0.0,),
                         changes: Sequence = (), names: tuple[str, str] = ("warming_k", "precip_change_pct")
                         ) -> list[Scenario]:
    """The uniform grid (with the reference) followed by the monthly change scenarios.

    ``changes`` holds change-file paths or :class:`firnline.changes.Scenario` objects.
    A change scenario may not take the name of a uniform one.
    """
    grid = scenario_list(warming_k, precip_change_pct, names, allow_empty=bool(changes))
    out = [Scenario.uniform_step(w, p, scenario_label(w, p)) for w, p in grid]
    monthly = read_change_files(changes)
    taken = {s.name for s in out}
    for s in monthly:
        if s.name in taken:
            raise InputError(f"{s.source}: the change file's stem {s.name!r} is the name of a uniform "
                             "scenario of the sweep; rename the file.")
    return out + monthly


# ----------------------------------------------------------------------------
# the sweep
# ----------------------------------------------------------------------------

@dataclass
class Sweep:
    """Result of :func:`sweep`.

    setup : the setup restricted to the glacier cells (:func:`glacier_view`)
    config : the config used (the setup's, or one differing only in kernel parameters)
    scenarios : list of (warming_k, precip_change_pct), the kernel's scenario order
        (for a monthly scenario: the means of its twelve values)
    definitions : list of :class:`firnline.changes.Scenario` in the same order
    reference : index of (0, 0) in ``scenarios``
    years : balance years (labelled by the year they end in)
    table : DataFrame with :data:`SCENARIO_COLUMNS` + :data:`SCENARIO_EXTRA` (``scenarios.csv``)
    year_table : DataFrame with :data:`YEAR_COLUMNS` + :data:`YEAR_EXTRA` (``scenario_years.csv``)
    sensitivity : DataFrame with :data:`SENSITIVITY_COLUMNS` (``sensitivity.csv``)
    profiles : DataFrame with :data:`PROFILE_COLUMNS`: band profile of the record-mean
        annual balance per glacier and scenario (``scenario_profiles.csv``)
    flags : DataFrame with :data:`FLAG_COLUMNS` (see :func:`flag_counts`)
    budgets : DataFrame with :data:`SCENARIO_BUDGET_COLUMNS` (``scenario_budget.csv``)
    offsets : DataFrame with :data:`OFFSET_COLUMNS` (``precip_offset.csv``)
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
    definitions: list = field(default_factory=list)
    budgets: pd.DataFrame | None = None
    offsets: pd.DataFrame | None = None
    timings: dict = field(default_factory=dict)
    #: scenario_runoff_monthly.csv (firnline.runoff.REGIME_COLUMNS).
    runoff_regimes: pd.DataFrame | None = None

    @property
    def notes(self) -> tuple:
        """Notes of the sweep: the setup's, then the warning of uncalibrated radiation-method
        defaults (:func:`firnline.parameters.radiation_defaults_notes`)."""
        from .parameters import radiation_defaults_notes
        return (*self.setup.notes, *radiation_defaults_notes(self.config))

    def mean_balance_map(self, scenario: int) -> np.ndarray:
        """(ny, nx) float32 record-mean annual balance of one scenario, m w.e., NaN off glaciers."""
        return to_grid(self.setup, self.mean_balance[scenario], where=self.setup.glacier_mask)


def run_scenarios(setup: Setup, cfg: Config, defs: Sequence[Scenario], progress: Progress = None,
                  daily: bool = True):
    """One kernel call for every scenario (uniform ones as uniform steps, monthly ones per month)."""
    if all(s.uniform for s in defs):
        return simulate(setup, cfg, [s.warming_k[0] for s in defs], [s.precip_change_pct[0] for s in defs],
                        progress=progress, daily=daily)
    from .kernel import Scenarios
    scen = Scenarios(np.array([s.warming_k for s in defs], dtype="float64"),
                     np.array([s.precip_scale for s in defs], dtype="float64"))
    return simulate(setup, cfg, progress=progress, scenarios=scen, daily=daily)


def sweep(setup: Setup, warming_k: Sequence[float] = (), precip_change_pct: Sequence[float] = (0.0,),
          config: Config | None = None, progress: Progress = None, changes: Sequence = ()) -> Sweep:
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
    changes : sequence of paths or :class:`firnline.changes.Scenario`
        Monthly change scenarios (change files ``month, warming_k, precip_change_pct``),
        each named by its file stem.

    Returns
    -------
    Sweep
        See the module docstring for how the means, shifts and slopes are taken.
    """
    cfg = check_config(setup, config)
    defs = scenario_definitions(warming_k, precip_change_pct, changes)
    scen = [(s.mean_warming_k, s.mean_precip_change_pct) for s in defs]
    full = setup
    setup = glacier_view(setup)
    t0 = time.perf_counter()
    kres = run_scenarios(setup, cfg, defs, progress, daily=setup is full)   # daily: for the runoff regimes
    t1 = time.perf_counter()
    years = [int(y) for y in setup.forcing.years]
    area = setup.grid.cell_area_m2
    bw = cfg.balance.band_width_m
    gl = setup.glaciers
    per_scenario = []
    profile_rows = []
    profile_ela = []
    mean_balance = np.empty((len(defs), setup.cells.size), dtype="float32")
    for s, d in enumerate(defs):
        w, p = scen[s]
        f = cell_fields(setup, kres, s)
        mean_balance[s] = f["annual_balance"].mean(axis=0)
        summary = tables(glacier_metrics(setup, f, years), years)[0]
        summary.insert(1, "warming_k", w)
        summary.insert(2, "precip_change_pct", p)
        summary["scenario"] = d.name
        per_scenario.append(summary)
        for name, pos, frac in zip(gl.names, setup.glacier_pos, gl.fractions):
            zs, bs = setup.elevation(pos), mean_balance[s][pos].astype("float64")
            prof = band_profile(zs, bs, frac * area, bw)
            profile_rows += [[name, w, p, b0, b1, a / 1e6, b, d.name] for b0, b1, a, b in
                             zip(prof.band_bottom_m, prof.band_top_m, prof.area_m2, prof.balance_mwe)]
            profile_ela.append([name, d.name, *ela(zs, bs, frac * area, bw)])
    regimes = runoff_regimes(full, cfg, defs, kres if setup is full else None)
    del kres
    reference = [d.name for d in defs].index(REFERENCE)
    rank = {name: i for i, name in enumerate(gl.names)}   # glaciers in outline order, then scenarios
    order = {d.name: i for i, d in enumerate(defs)}
    years_df = year_results(pd.concat(per_scenario, ignore_index=True))
    years_df = years_df.sort_values(["glacier", "scenario", "balance_year"],
                                    key=lambda c: c.map(rank) if c.name == "glacier" else
                                    c.map(order) if c.name == "scenario" else c,
                                    kind="stable", ignore_index=True)
    glaciers = pd.DataFrame({
        "glacier": list(gl.names),
        "area_km2": [float(np.sum(fr) * area / 1e6) for fr in gl.fractions],
        "min_elevation_m": [float(setup.elevation(pos).min()) for pos in setup.glacier_pos],
        "max_elevation_m": [float(setup.elevation(pos).max()) for pos in setup.glacier_pos],
    })
    prof_ela = pd.DataFrame(profile_ela, columns=["glacier", "scenario", "profile_ela_m", "profile_ela_flag"])
    table = scenario_means(years_df, prof_ela)
    t2 = time.perf_counter()
    return Sweep(setup=setup, config=cfg, scenarios=scen, reference=reference, years=years,
                 table=table, year_table=years_df, sensitivity=sensitivity(years_df),
                 profiles=pd.DataFrame(profile_rows, columns=PROFILE_COLUMNS),
                 flags=flag_counts(years_df), glaciers=glaciers, mean_balance=mean_balance,
                 definitions=list(defs), budgets=scenario_budgets(years_df),
                 offsets=precip_offsets(table), timings=dict(setup.timings, kernel_s=t1 - t0, metrics_s=t2 - t1),
                 runoff_regimes=regimes)


def runoff_regimes(full: Setup, cfg: Config, defs: Sequence, kres=None) -> pd.DataFrame:
    """The mean monthly runoff regime of every scenario (scenario_runoff_monthly.csv).

    The catchment's runoff needs every cell of the catchment, not only the glacier cells of
    the balance products: the kernel runs on the whole setup (``kres`` reused when the sweep's
    run already covered it).
    """
    from .model import runoff_of
    from .runoff import scenario_regimes

    if kres is None:
        kres = run_scenarios(full, cfg, defs)
    runs = [(d.name, d.mean_warming_k, d.mean_precip_change_pct, runoff_of(full, cfg, kres, i)[0])
            for i, d in enumerate(defs)]
    return scenario_regimes(runs, cfg.balance.year_start)


def glacier_view(setup: Setup) -> Setup:
    """The setup restricted to the cells that carry glacier ice (the setup itself if all do).

    Every product of a sweep (glacier metrics, mean-balance maps with nodata off the
    glaciers) depends only on glacier cells, and each cell's balance depends only on its
    own inputs, so ice-free cells need not be modelled. The grid, glaciers, forcing and
    notes are shared; ``cells``, ``z_m``, ``glacier_mask``, ``glacier_pos`` and the
    radiation table are cut to the glacier cells (with snow redistribution: the glacier
    cells and every cell upslope of them, whose sliding snow can reach them).
    """
    if setup.glacier_mask.all():
        return setup
    # with sliding snow, every cell upslope of them too (snow slides onto the glaciers from above)
    from .model import upslope_setup
    return upslope_setup(setup, np.flatnonzero(setup.glacier_mask))[0]


# ----------------------------------------------------------------------------
# tables from the per-year results
# ----------------------------------------------------------------------------

_KEYS = ["glacier", "scenario"]


def _with_scenario(df: pd.DataFrame) -> pd.DataFrame:
    """Tables built without a ``scenario`` column name each row after its uniform step."""
    if "scenario" in df.columns:
        return df
    return df.assign(scenario=[scenario_label(w, p) for w, p in zip(df.warming_k, df.precip_change_pct)])


def year_results(summaries: pd.DataFrame) -> pd.DataFrame:
    """Per-year table of a sweep, with the ELA shift from the same year's reference.

    Parameters
    ----------
    summaries : DataFrame
        Rows of ``summary.csv`` (:data:`firnline.model.SUMMARY_COLUMNS`) with the
        columns ``warming_k`` (K), ``precip_change_pct`` (%) and optionally
        ``scenario`` added; it must hold the reference scenario (0, 0).

    Returns
    -------
    DataFrame with :data:`YEAR_COLUMNS` + :data:`YEAR_EXTRA`; ``ela_shift_m`` (m) is NaN
    unless both this scenario's and the reference's ELA are ``ok`` that year.
    """
    summaries = _with_scenario(summaries)
    ref = summaries[summaries.scenario == REFERENCE]
    if ref.empty:
        raise ValueError("the per-year results need the reference scenario (0 K, 0 %)")
    ref = ref[["glacier", "balance_year", "ela_m"]].rename(columns={"ela_m": "_ref_ela"})
    out = summaries.merge(ref, on=["glacier", "balance_year"], how="left", validate="many_to_one")
    out["ela_shift_m"] = out.ela_m - out._ref_ela
    return out[YEAR_COLUMNS + YEAR_EXTRA].reset_index(drop=True)


def scenario_means(years: pd.DataFrame, profile_ela: pd.DataFrame) -> pd.DataFrame:
    """Record means per glacier and scenario (``scenarios.csv``).

    Parameters
    ----------
    years : DataFrame with :data:`YEAR_COLUMNS` (+ ``scenario``)
    profile_ela : DataFrame (glacier, scenario, profile_ela_m, profile_ela_flag): the ELA
        and flag of each scenario's record-mean balance profile

    Returns
    -------
    DataFrame with :data:`SCENARIO_COLUMNS` + :data:`SCENARIO_EXTRA`: mean annual balance
    (m w.e.) and mean AAR over every year; ``ela_m`` the ELA of the record-mean profile
    (NaN when it leaves the glacier, see ``ela_flag``); ``ela_shift_m`` the mean of the
    paired yearly shifts with their SD, minimum and maximum over the ``n_shift_years``
    paired years (NaN if none); ``profile_ela_shift_m`` the shift of the
    record-mean-profile ELA from the reference's.
    """
    years = _with_scenario(years)
    g = years.groupby(_KEYS, sort=False)
    out = g.agg(warming_k=("warming_k", "first"), precip_change_pct=("precip_change_pct", "first"),
                mean_annual_balance_mwe=("annual_balance_mwe", "mean"), aar=("aar", "mean"),
                ela_shift_m=("ela_shift_m", "mean"), n_years=("balance_year", "size"),
                n_shift_years=("ela_shift_m", "count"), ela_shift_sd_m=("ela_shift_m", "std"),
                ela_shift_min_m=("ela_shift_m", "min"), ela_shift_max_m=("ela_shift_m", "max")).reset_index()
    out = out.merge(profile_ela, on=_KEYS, how="left", validate="one_to_one")
    out["ela_m"] = out.profile_ela_m
    out["ela_flag"] = out.profile_ela_flag
    ref = out[out.scenario == REFERENCE][["glacier", "profile_ela_m"]].rename(columns={"profile_ela_m": "_r"})
    out = out.merge(ref, on="glacier", how="left")
    out["profile_ela_shift_m"] = out.profile_ela_m - out._r
    return out[SCENARIO_COLUMNS + SCENARIO_EXTRA]


def flag_counts(years: pd.DataFrame) -> pd.DataFrame:
    """How many years per glacier and scenario had the ELA on, above and below the glacier."""
    years = _with_scenario(years)
    flag = years.ela_flag
    tmp = years[_KEYS].assign(n_years=1, n_ela_ok=(flag == OK).astype(int),
                              n_above_glacier=(flag == ABOVE).astype(int),
                              n_below_glacier=(flag == BELOW).astype(int))
    out = tmp.groupby(_KEYS, sort=False).sum().reset_index()
    first = years.groupby(_KEYS, sort=False)[["warming_k", "precip_change_pct"]].first().reset_index()
    return out.merge(first, on=_KEYS)[FLAG_COLUMNS]


def scenario_budgets(years: pd.DataFrame) -> pd.DataFrame:
    """ELA0 and AAR0 of every scenario (``scenario_budget.csv``): :func:`balanced_budget`
    over each scenario's years (Dyurgerov, Meier & Bahr 2009)."""
    years = _with_scenario(years)
    parts = []
    for name, g in years.groupby("scenario", sort=False):
        bb = metrics.balanced_budget(g)
        bb.insert(1, "scenario", name)
        bb.insert(2, "warming_k", g.warming_k.iloc[0])
        bb.insert(3, "precip_change_pct", g.precip_change_pct.iloc[0])
        parts.append(bb)
    out = pd.concat(parts, ignore_index=True)
    return out[SCENARIO_BUDGET_COLUMNS]


def _crossing(x: np.ndarray, y: np.ndarray, target: float) -> float:
    """The first x at which the piecewise-linear y(x) (x sorted) reaches ``target``; NaN if none."""
    d = y - target
    for i in range(len(x)):
        if d[i] == 0.0:
            return float(x[i])
        if i + 1 < len(x) and d[i] * d[i + 1] < 0:
            return float(x[i] + (x[i + 1] - x[i]) * d[i] / (d[i] - d[i + 1]))
    return float("nan")


def precip_offsets(table: pd.DataFrame) -> pd.DataFrame:
    """Precipitation change that offsets each warming (``precip_offset.csv``).

    Per glacier and warming of the uniform grid (change-file scenarios do not enter):
    the precipitation change (%) giving a zero record-mean balance, and the one keeping
    the reference balance B(0 K, 0 %), both by linear interpolation between the sweep's
    own precipitation steps at that warming; NaN with a note when the target lies
    outside them (no extrapolation) or fewer than two steps were swept.
    ``offset_pct_per_k`` is the latter divided by the warming.
    ``offset_pct_per_k_linear`` is the linearised estimate -(dB/dT) / (dB/dP): the
    least-squares slope of the balance against warming at 0 % over that against the
    precipitation change at this warming (a ratio of the sweep's own slopes, valid near
    the swept range; NaN without two steps of each).
    """
    t = _with_scenario(table)
    t = t[t.scenario == [scenario_label(w, p) for w, p in zip(t.warming_k, t.precip_change_pct)]]
    rows = []
    for name, g in t.groupby("glacier", sort=False):
        ref = g[g.scenario == REFERENCE].mean_annual_balance_mwe
        b_ref = float(ref.iloc[0]) if len(ref) else float("nan")
        at0 = g[g.precip_change_pct == 0.0]
        dbdt = line_fit(at0.warming_k, at0.mean_annual_balance_mwe)[1] if at0.warming_k.nunique() >= 2 else np.nan
        for w, gw in g.groupby("warming_k"):
            gw = gw.sort_values("precip_change_pct")
            x = gw.precip_change_pct.to_numpy(float)
            y = gw.mean_annual_balance_mwe.to_numpy(float)
            zero = same = float("nan")
            notes = []
            if len(x) < 2:
                notes.append("needs at least two precipitation changes at this warming")
            else:
                zero = _crossing(x, y, 0.0)
                same = 0.0 if w == 0.0 else _crossing(x, y, b_ref)
                span = f"{x[0]:+g}..{x[-1]:+g} %"
                if np.isnan(zero):
                    notes.append(f"zero balance lies outside the swept precipitation changes ({span}); "
                                 "not extrapolated")
                if np.isnan(same):
                    notes.append(f"the reference balance lies outside the swept precipitation changes ({span}); "
                                 "not extrapolated")
            per_k = same / w if w != 0.0 and np.isfinite(same) else float("nan")
            dbdp = line_fit(x, y)[1] if len(np.unique(x)) >= 2 else np.nan
            linear = -dbdt / dbdp if np.isfinite(dbdt) and np.isfinite(dbdp) and dbdp != 0 else float("nan")
            if w == 0.0:
                same = 0.0          # no warming to offset
            rows.append([name, float(w), b_ref, zero, same, per_k, linear, len(x), "; ".join(notes)])
    return pd.DataFrame(rows, columns=OFFSET_COLUMNS)


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
    years = _with_scenario(years)
    uniform = years.scenario == [scenario_label(w, p) for w, p in zip(years.warming_k, years.precip_change_pct)]
    rows = []
    for name, g in years[uniform & (years.precip_change_pct == 0.0)].groupby("glacier", sort=False):
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
