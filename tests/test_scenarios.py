"""Scenario sweeps, ELA sensitivity and balanced-budget ELA0 / AAR0.

Outside checks name their source beside the check. The closed-form cases are worked
out in the docstrings from the kernel's equations (DEVELOPERS.md, kernel docstring).
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rasterio
import shapely

import firnline
from firnline.cli import main
from firnline.metrics import BUDGET_COLUMNS, balanced_budget
from firnline.model import prepare
from firnline.outdir import MANIFEST
from firnline.scenarios import (
    SCENARIO_COLUMNS,
    SCENARIO_EXTRA,
    YEAR_COLUMNS,
    YEAR_EXTRA,
    scenario_label,
    scenario_list,
    sensitivity,
    sweep,
)

REPO = Path(__file__).resolve().parents[1]
LAPSE = -0.0065   # K per m: ICAO Standard Atmosphere (Doc 7488) / ISO 2533:1975 tropospheric lapse rate
BAND = 50.0       # m, the default [balance] band_width_m
SNOW_C, RAIN_C = 0.5, 2.5   # deg C, default snow/rain range
DDF_SNOW, DDF_ICE = 3.0, 6.0  # mm w.e. d-1 K-1, default degree-day factors
T_ST, P_ST, Z_ST = 5.0, 5.0, 2000.0   # constant station forcing: deg C, mm per day, m


# ----------------------------------------------------------------------------
# builders
# ----------------------------------------------------------------------------

def plane(builders, tmp_path: Path) -> firnline.Config:
    """A planar glacier 2000..3500 m (101 rows, 15 m apart) under constant forcing, two 365-day years."""
    builders.write_dem(tmp_path / "dem.tif", builders.ramp(101, 2, 3500.0, 2000.0))
    builders.write_station(tmp_path / "station.csv", t=T_ST, p=P_ST)       # 2016-10-01..2018-09-30, no 29 Feb
    sec = builders.base_sections(Z_ST)
    sec["downscaling"] = {"precip_gradient_per_m": 0.0}
    return firnline.load_config(builders.write_config(tmp_path / "case.toml", sec))


def hand_daily_balance(z_m, warming_k):
    """Daily balance (mm w.e.) of a cell under the constant forcing of :func:`plane`.

    T = T_st + lapse (z - z_st) + dT; snowfall s = P f(T), f = 1 at or below 0.5 C, 0 at or
    above 2.5 C, linear between. Where s >= ddf_snow T+ the day's snow outlasts the day's
    melt and the balance is s - ddf_snow T+; otherwise all of it melts, the degree-days left,
    T - s / ddf_snow, melt ice at ddf_ice and the balance is -ddf_ice (T - s / ddf_snow).
    """
    T = T_ST + LAPSE * (np.asarray(z_m) - Z_ST) + warming_k
    s = P_ST * np.clip((RAIN_C - T) / (RAIN_C - SNOW_C), 0.0, 1.0)
    Tp = np.maximum(T, 0.0)
    return np.where(s >= DDF_SNOW * Tp, s - DDF_SNOW * Tp, -DDF_ICE * (T - s / DDF_SNOW))


def hand_ela(warming_k):
    """Zero balance where ddf_snow T = P (2.5 - T) / 2 (inside the mixed-phase range):
    T* = 2.5 P / (2 ddf_snow + P) = 12.5 / 11 = 1.136 C, independent of the warming, so
    z* = z_st + (T_st + dT - T*) / |lapse|: the ELA rises by exactly 1 / |lapse| = 153.8 m per K."""
    t_star = RAIN_C * P_ST / ((RAIN_C - SNOW_C) * DDF_SNOW + P_ST)
    return Z_ST + (T_ST + warming_k - t_star) / -LAPSE


# ----------------------------------------------------------------------------
# closed form, flags, precipitation
# ----------------------------------------------------------------------------

def test_planar_glacier_ela_moves_by_one_over_lapse_rate_per_kelvin(builders, tmp_path):
    """Closed form (see hand_ela): each kelvin lifts the ELA by 1/|lapse| = 153.8 m, within one band."""
    setup = prepare(plane(builders, tmp_path))
    sw = sweep(setup, [1.0, 2.0])          # the (0, 0) reference is added by the sweep
    assert sw.scenarios == [(0.0, 0.0), (1.0, 0.0), (2.0, 0.0)]
    z = setup.elevation()
    for w in (0.0, 1.0, 2.0):
        yrs = sw.year_table[sw.year_table.warming_k == w]
        assert (yrs.ela_flag == "ok").all()
        assert np.abs(yrs.ela_m - hand_ela(w)).max() < BAND
        assert np.abs(yrs.ela_shift_m - w / -LAPSE).max() < BAND
        # AAR: the share of cells above z* (equal areas per cell; no cell lies at z* itself)
        assert yrs.aar.to_numpy() == pytest.approx(np.mean(z > hand_ela(w)), abs=1e-9)
        # specific balance: the hand daily balance over the cells, 365 days a year, m w.e.
        hand_b = hand_daily_balance(z, w).mean() * 365 / 1000
        assert yrs.annual_balance_mwe.to_numpy() == pytest.approx(hand_b, rel=1e-4)
    row = sw.sensitivity.iloc[0]
    # three warming steps, each ELA within one band of the closed form: the slope within one
    # band over the 2 K span
    assert row.dela_dt_m_per_k == pytest.approx(1 / -LAPSE, abs=BAND / 2)
    hand = [hand_daily_balance(z, w).mean() * 365 / 1000 for w in (0.0, 1.0, 2.0)]
    assert row.dbalance_dt_mwe_per_k == pytest.approx(np.polyfit([0.0, 1.0, 2.0], hand, 1)[0], rel=1e-4)
    assert row.n_warming_steps == 3 and row.n_ela_years_used == 6 and row.n_ela_years_excluded == 0


def test_planar_ela_is_the_closed_form_within_two_metres_at_50_m_bands(builders, tmp_path):
    """The closed form of :func:`hand_ela` (constant forcing T_st = 5 C, P = 5 mm d-1 at 2000 m,
    lapse rate -0.0065 K m-1, degree-day melt 3 / 6 mm d-1 K-1, snow/rain range 0.5..2.5 C):
    zero balance where ddf_snow T = P (2.5 - T) / 2, T* = 12.5 / 11 C, so
    z* = 2000 + (5 + dT - T*) / 0.0065 = 2594.4 m (+153.8 m per K). The DEM rows are 15 m apart,
    the default 50 m bands hold three or four rows each, and the balance profile has a kink at
    z* (slope 26 mm m-1 below, 13 above): the ELA of every year, of the record-mean profile and
    of the plain run lies within 2 m of z* (issue 11; band centres put it 4-12 m high)."""
    cfg = plane(builders, tmp_path)
    assert cfg.balance.band_width_m == BAND
    run = firnline.run(cfg)
    assert (run.summary.ela_flag == "ok").all()
    np.testing.assert_allclose(run.summary.ela_m, hand_ela(0.0), atol=2.0)
    assert set(run.profiles.band_top_m - run.profiles.band_bottom_m) == {BAND}   # profiles stay on 50 m
    sw = sweep(prepare(cfg), [0.5, 1.0, 2.0])
    for w in (0.0, 0.5, 1.0, 2.0):
        yrs = sw.year_table[sw.year_table.warming_k == w]
        np.testing.assert_allclose(yrs.ela_m, hand_ela(w), atol=2.0)
        mean = sw.table[sw.table.warming_k == w]
        np.testing.assert_allclose(mean.ela_m, hand_ela(w), atol=2.0)


def test_scenario_above_the_glacier_is_flagged_and_left_out_of_dela_dt(builders, tmp_path):
    """With 6 K, z* = 2594 + 6 x 153.8 = 3517 m lies above the glacier top (3500 m): every
    band loses mass, the flag is above_glacier and the AAR 0 (DESIGN.md ela_flag rule)."""
    setup = prepare(plane(builders, tmp_path))
    assert hand_ela(6.0) > setup.elevation().max()
    sw = sweep(setup, [1.0, 2.0, 6.0])
    hot = sw.year_table[sw.year_table.warming_k == 6.0]
    assert (hot.ela_flag == "above_glacier").all() and (hot.aar == 0.0).all() and hot.ela_m.isna().all()
    mean_hot = sw.table[sw.table.warming_k == 6.0].iloc[0]
    assert np.isnan(mean_hot.ela_m) and np.isnan(mean_hot.ela_shift_m) and mean_hot.aar == 0.0
    row = sw.sensitivity.iloc[0]
    # the ELA slope comes from 0, 1 and 2 K only: the same as the sweep without 6 K
    without = sweep(setup, [1.0, 2.0]).sensitivity.iloc[0]
    assert row.dela_dt_m_per_k == pytest.approx(without.dela_dt_m_per_k, rel=1e-12)
    assert row.dela_dt_m_per_k == pytest.approx(1 / -LAPSE, abs=BAND / 2)
    assert row.n_ela_years_used == 6 and row.n_ela_years_excluded == 2
    assert "above the glacier" in row.note and "+6 K in 2 of 2 years" in row.note
    # the balance slope keeps every warming step (balance is defined in every year)
    hand = [hand_daily_balance(setup.elevation(), w).mean() * 365 / 1000 for w in (0.0, 1.0, 2.0, 6.0)]
    assert row.dbalance_dt_mwe_per_k == pytest.approx(np.polyfit([0, 1, 2, 6], hand, 1)[0], rel=1e-4)
    assert sw.flags[sw.flags.warming_k == 6.0].n_above_glacier.iloc[0] == 2


def test_more_precipitation_lowers_the_ela_and_raises_the_balance(builders, tmp_path):
    """More snowfall on every cell can only add accumulation and shelter ice from melt, so the
    balance rises and the ELA falls with each step of precipitation, year by year (common practice)."""
    setup = prepare(firnline.load_config(builders.seasonal(tmp_path)))
    sw = sweep(setup, [0.0], [-30.0, -15.0, 15.0, 30.0])
    yrs = sw.year_table.sort_values(["balance_year", "precip_change_pct"])
    assert (yrs.ela_flag == "ok").all()
    for _, y in yrs.groupby("balance_year"):
        assert np.all(np.diff(y.annual_balance_mwe) > 0)
        assert np.all(np.diff(y.ela_m) < 0)
        assert np.all(np.diff(y.aar) >= 0)
    t = sw.table.sort_values("precip_change_pct")
    assert np.all(np.diff(t.mean_annual_balance_mwe) > 0) and np.all(np.diff(t.ela_m) < 0)
    ref = t[t.precip_change_pct == 0.0].iloc[0]
    assert ref.ela_shift_m == 0.0
    assert np.all(np.sign(t.ela_shift_m) == -np.sign(t.precip_change_pct))


def test_sweep_is_one_kernel_call_on_the_glacier_cells_and_matches_separate_runs(builders, tmp_path, monkeypatch):
    """The scenarios are the kernel's extra axis: one simulate() call over the glacier cells for the
    balance products, with the numbers of one full run per scenario, and one over the whole
    catchment for the runoff regimes (scenario_runoff_monthly.csv needs the ice-free ground)."""
    import firnline.scenarios as scen_mod

    cfg_path = builders.seasonal(tmp_path, years=2)
    # an outline over the upper 24 rows and 2.5 of the 3 columns (fractional cells on its east edge)
    builders.write_outlines(tmp_path / "outlines.gpkg", ["Upper"], [shapely.box(600000, 5148800, 600125, 5150000)],
                   "GPKG", crs="EPSG:32632")
    cfg_path.write_text(cfg_path.read_text() + '\n[glaciers]\noutlines = "outlines.gpkg"\nid_field = "name"\n')
    cfg = firnline.load_config(cfg_path)
    setup = prepare(cfg)
    calls = []
    real = scen_mod.simulate
    monkeypatch.setattr(scen_mod, "simulate", lambda st, *a, **k: calls.append(st.cells.size) or real(st, *a, **k))
    sw = sweep(setup, [0.5, 1.5], [-10.0, 10.0])
    assert calls == [72, 120] and setup.cells.size == 120 and len(sw.scenarios) == 5   # 24 x 3 of 40 x 3 cells
    for w, p in [(1.5, 10.0), (0.0, 0.0)]:
        one = firnline.run(cfg, warming_k=w, precip_change_pct=p, setup=setup)
        mine = sw.year_table[(sw.year_table.warming_k == w) & (sw.year_table.precip_change_pct == p)]
        np.testing.assert_allclose(mine.annual_balance_mwe, one.summary.annual_balance_mwe, rtol=1e-6)
        np.testing.assert_allclose(mine.ela_m, one.summary.ela_m, rtol=1e-9)
        np.testing.assert_allclose(mine.aar, one.summary.aar, rtol=1e-12)
        i = sw.scenarios.index((w, p))
        np.testing.assert_allclose(sw.mean_balance_map(i),
                                   one.fields.annual_balance.mean("balance_year").values, rtol=1e-5,
                                   atol=1e-6)   # NaN off the glacier in both


def test_sensitivity_needs_two_warming_steps_at_zero_precipitation_change():
    """Only (0 K, 0 %) at 0 %: no slope, and the note says what to add."""
    rows = [["A", w, p, 2001, -0.5 - w + p / 100, 2800 + 150 * w - p, 0.5, 0.0, "ok", 0.0, 0.0]
            for w, p in [(0.0, 0.0), (1.0, 10.0), (2.0, 10.0)]]
    s = sensitivity(pd.DataFrame(rows, columns=YEAR_COLUMNS)).iloc[0]
    assert np.isnan(s.dela_dt_m_per_k) and np.isnan(s.dbalance_dt_mwe_per_k) and s.n_warming_steps == 1
    assert "include 0 among the precipitation changes" in s.note


def test_scenario_list_and_labels():
    assert scenario_list([2, 1, 1.0], [10, 0]) == [(0.0, 0.0), (1.0, 0.0), (1.0, 10.0), (2.0, 0.0),
                                                   (2.0, 10.0)]
    assert scenario_list(["-0.0"], []) == [(0.0, 0.0)]
    assert scenario_label(1.0, 0.0) == "w+1.0_p+0"
    assert scenario_label(-0.5, -12.5) == "w-0.5_p-12.5"
    assert scenario_label(0.25, 10.0) == "w+0.25_p+10"
    for bad in ([[], [0]], [[1], [-100]], [[float("nan")], [0]], [["warm"], [0]]):
        with pytest.raises(firnline.errors.InputError):
            scenario_list(*bad)


# ----------------------------------------------------------------------------
# balanced budget
# ----------------------------------------------------------------------------

def test_balanced_budget_recovers_the_intercept_of_an_exact_linear_relation():
    """ELA0 and AAR0 are the ELA and AAR at zero specific balance from the year-to-year
    regression on the balance. Source: Dyurgerov, Meier & Bahr (2009), J. Glaciology 55(192).
    Years with the ELA off the glacier do not enter (their AAR is saturated at 0 or 1)."""
    b = np.array([-1.2, -0.6, -0.1, 0.3, 0.8])
    rows = [["Alpha", 2000 + i, bi, 2950.0 - 180.0 * bi, 0.57 + 0.11 * bi, "ok"] for i, bi in enumerate(b)]
    rows += [["Alpha", 2010, -2.5, np.nan, 0.0, "above_glacier"],
             ["Alpha", 2011, 1.5, np.nan, 1.0, "below_glacier"]]
    # Beta: two usable years only
    rows += [["Beta", 2000, -0.5, 3000.0, 0.4, "ok"], ["Beta", 2001, 0.2, 2900.0, 0.6, "ok"],
             ["Beta", 2002, -3.0, np.nan, 0.0, "above_glacier"]]
    # Gamma: every year loses mass: B = 0 lies outside the modelled balances
    rows += [["Gamma", 2000 + i, bi - 2.0, 3100.0 - 150.0 * (bi - 2.0), 0.6 + 0.1 * (bi - 2.0), "ok"]
             for i, bi in enumerate(b)]
    summary = pd.DataFrame(rows, columns=["glacier", "balance_year", "annual_balance_mwe", "ela_m",
                                          "aar", "ela_flag"])
    bb = balanced_budget(summary).set_index("glacier")
    assert list(bb.reset_index().columns[:5]) == ["glacier", "ela0_m", "aar0", "r2", "n_years"]
    a = bb.loc["Alpha"]
    assert a.ela0_m == pytest.approx(2950.0, abs=1e-9) and a.aar0 == pytest.approx(0.57, abs=1e-12)
    assert a.r2 == pytest.approx(1.0) and a.aar_r2 == pytest.approx(1.0) and a.n_years == 5
    assert a.dela_db_m_per_mwe == pytest.approx(-180.0) and a.daar_db_per_mwe == pytest.approx(0.11)
    assert a.note == ""
    beta = bb.loc["Beta"]
    assert np.isnan(beta.ela0_m) and np.isnan(beta.aar0) and np.isnan(beta.r2) and beta.n_years == 2
    assert beta.note.startswith("insufficient years")
    g = bb.loc["Gamma"]
    assert g.ela0_m == pytest.approx(3100.0, abs=1e-9) and g.aar0 == pytest.approx(0.6, abs=1e-12)
    assert "extrapolated" in g.note


def test_every_run_writes_balanced_budget_csv_from_its_summary(builders, tmp_path):
    """The regression in balanced_budget.csv matches numpy.polyfit on summary.csv (reference library)."""
    cfg = builders.seasonal(tmp_path, years=4)
    out = tmp_path / "out"
    assert main(["run", str(cfg), "--out", str(out), "--quiet"]) == 0
    bb = pd.read_csv(out / "balanced_budget.csv")
    assert list(bb.columns) == BUDGET_COLUMNS
    s = pd.read_csv(out / "summary.csv")
    ok = s[s.ela_flag == "ok"]
    assert len(ok) >= 3
    slope, icpt = np.polyfit(ok.annual_balance_mwe, ok.ela_m, 1)
    assert bb.n_years.iloc[0] == len(ok)
    assert bb.ela0_m.iloc[0] == pytest.approx(icpt, rel=1e-4)   # the CSV keeps 6 significant digits
    assert bb.aar0.iloc[0] == pytest.approx(np.polyfit(ok.annual_balance_mwe, ok.aar, 1)[1], rel=1e-4)
    r = np.corrcoef(ok.annual_balance_mwe, ok.ela_m)[0, 1]
    assert bb.r2.iloc[0] == pytest.approx(r * r, rel=1e-4)


def test_run_with_two_years_says_insufficient_years(plane_case, tmp_path):
    out = tmp_path / "out"
    assert main(["run", str(plane_case()), "--out", str(out), "--quiet"]) == 0
    bb = pd.read_csv(out / "balanced_budget.csv", keep_default_na=False)
    assert list(bb.columns[:5]) == ["glacier", "ela0_m", "aar0", "r2", "n_years"]
    assert bb.ela0_m.iloc[0] == "" and bb.aar0.iloc[0] == "" and bb.r2.iloc[0] == ""
    assert bb.n_years.iloc[0] == 2 and bb.note.iloc[0].startswith("insufficient years")


def test_demo_balanced_budget_aar_is_plausible(tmp_path):
    """Plausibility only: balanced-budget AARs of glaciers worldwide average about 0.58
    (Dyurgerov, Meier & Bahr 2009, J. Glaciology 55(192); from memory); the invented demo
    should give a value in a generous band around it."""
    import dataclasses

    cfg = firnline.load_config(REPO / "configs" / "demo.toml")
    cfg = dataclasses.replace(cfg, radiation=dataclasses.replace(cfg.radiation, cache_dir=tmp_path))
    bb = balanced_budget(firnline.run(cfg).summary)
    aar0 = bb.aar0.dropna()
    assert len(aar0) >= 1
    assert aar0.between(0.3, 0.85).all(), bb


# ----------------------------------------------------------------------------
# command line
# ----------------------------------------------------------------------------

def test_scenarios_command_writes_every_file_with_the_contract_columns(builders, tmp_path, capsys):
    cfg = builders.seasonal(tmp_path, years=3)
    out = tmp_path / "sweep"
    assert main(["scenarios", str(cfg), "--warming", "1", "2", "--precip-change", "-10", "0", "10",
                 "--out", str(out), "--quiet", "--no-report"]) == 0   # the report: test_report_commands.py
    printed = capsys.readouterr().out
    names = {p.name for p in out.iterdir() if p.name != MANIFEST}
    assert (out / MANIFEST).is_file()                 # the folder's record of what was written
    scen = [(0.0, 0.0), (1.0, -10.0), (1.0, 0.0), (1.0, 10.0), (2.0, -10.0), (2.0, 0.0), (2.0, 10.0)]
    maps = {f"mean_annual_balance_{scenario_label(w, p)}.tif" for w, p in scen}
    assert "mean_annual_balance_w+1.0_p-10.tif" in maps
    expected = {"scenarios.csv", "scenario_years.csv", "sensitivity.csv", "scenario_profiles.csv",
                "scenario_budget.csv", "precip_offset.csv", "ela_vs_warming.png", "balance_vs_warming.png",
                "balance_profiles.png", "scenario_runoff_monthly.csv", "runoff_regimes.png",
                "scenarios.json"} | maps
    assert names == expected                        # and no staging folder left behind
    t = pd.read_csv(out / "scenarios.csv")
    assert SCENARIO_COLUMNS == ["glacier", "warming_k", "precip_change_pct",
                                "mean_annual_balance_mwe", "ela_m", "aar", "ela_shift_m"]
    assert list(t.columns) == SCENARIO_COLUMNS + SCENARIO_EXTRA     # the contract first, then additions
    assert sorted(zip(t.warming_k, t.precip_change_pct)) == scen
    y = pd.read_csv(out / "scenario_years.csv")
    assert list(y.columns) == YEAR_COLUMNS + YEAR_EXTRA and len(y) == 7 * 3
    s = pd.read_csv(out / "sensitivity.csv")
    assert list(s.columns[:3]) == ["glacier", "dela_dt_m_per_k", "dbalance_dt_mwe_per_k"]
    assert s.dbalance_dt_mwe_per_k.iloc[0] < 0 and s.dela_dt_m_per_k.iloc[0] > 0
    assert s.n_warming_steps.iloc[0] == 3
    with rasterio.open(tmp_path / "dem.tif") as dem, rasterio.open(out / "mean_annual_balance_w+2.0_p+10.tif") as m:
        assert m.crs == dem.crs and m.transform == dem.transform and m.shape == dem.shape
        assert m.units[0] == "m w.e." and "caution" in m.tags() and m.tags()["warming_k"] == "2"
        assert np.isfinite(m.read(1, masked=True)).all()
    for png in ("ela_vs_warming.png", "balance_vs_warming.png", "balance_profiles.png"):
        assert (out / png).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "dELA/dT" in printed and "test plane" in printed


def test_scenarios_failure_while_writing_leaves_nothing(plane_case, tmp_path, monkeypatch):
    import firnline.scenario_products as cli_mod

    calls = {"n": 0}
    real = cli_mod.write_geotiff

    def flaky(*a, **k):
        calls["n"] += 1
        if calls["n"] == 2:
            raise OSError("disk full")
        return real(*a, **k)
    monkeypatch.setattr(cli_mod, "write_geotiff", flaky)
    out = tmp_path / "out"
    assert main(["scenarios", str(plane_case()), "--warming", "1", "--out", str(out), "--quiet"]) == 1
    assert not out.exists() or list(out.iterdir()) == []


def run_cli(*args):
    return subprocess.run([sys.executable, "-m", "firnline", *map(str, args)], capture_output=True, text=True)


@pytest.mark.parametrize("extra,words", [
    ([], "needs --warming"),
    (["--warming"], "needs --warming"),
    (["--warming", "1", "--precip-change", "-100"], "would remove all precipitation"),
    (["--warming", "1", "--precip-change", "-150"], "would remove all precipitation"),
    (["--warming", "one"], "takes numbers"),
    (["--warming", "nan"], "takes finite numbers"),
])
def test_scenarios_bad_input_exits_2_with_one_sentence_and_no_output(plane_case, tmp_path, capsys, extra, words):
    cfg = plane_case()
    assert main(["scenarios", str(cfg), "--out", str(tmp_path / "out"), *extra]) == 2
    err = capsys.readouterr().err
    assert words in err and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())


def test_scenarios_exit_status_and_help_in_a_real_process(plane_case, tmp_path):
    r = run_cli("scenarios", plane_case(), "--out", tmp_path / "out")
    assert r.returncode == 2 and "needs --warming" in r.stderr and "Traceback" not in r.stderr
    r = run_cli("scenarios", "--help")
    assert r.returncode == 0 and "--warming" in r.stdout and "--precip-change" in r.stdout
