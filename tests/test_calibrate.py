"""Calibration: recovery of known factors, uncertainties, warnings, geodetic conversion, bad rows.

The synthetic case is a planar glacier 2200..3200 m (20 x 10 cells of 50 m, one glacier
covering every cell) under an invented seasonal station record of three balance years.
"Observed" values are read off the products of ``firnline.run`` with known factors
(annual and winter balance maps at stake cells, glacier-wide annual balances from
summary.csv), an independent path from the calibration's own snapshot arithmetic.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import firnline
from firnline.calibrate import DEFAULT_BOUNDS, build_operator, calibrate, check_value, fit_spec, modelled_values
from firnline.cli import main
from firnline.errors import InputError
from firnline.model import prepare
from firnline.observations import geodetic_balance, load_observations
from firnline.outdir import MANIFEST

TRUTH = {"ddf_snow_mm_per_day_k": 4.5, "ddf_ice_mm_per_day_k": 8.5}
START = {"ddf_snow_mm_per_day_k": 3.0, "ddf_ice_mm_per_day_k": 6.0}
POINT_COLUMNS = ["point_id", "x", "y", "start_date", "end_date", "balance_mwe", "sigma_mwe"]
GLACIER_COLUMNS = ["glacier", "start_date", "end_date", "balance_mwe", "sigma_mwe"]


@pytest.fixture
def case(calibration_case):
    """The calibration case of conftest.py, observed with TRUTH, starting from START."""
    return calibration_case(TRUTH, START)


def test_modelled_values_over_periods_match_the_run_products(case):
    """The snapshot differences over balance years and winters equal the run's maps and summary."""
    cfg = firnline.load_config(case["config"](melt=TRUTH))
    setup = prepare(cfg)
    points, glaciers = load_observations(cfg, setup)
    op = build_operator(setup, points, glaciers)
    # only the five stake cells and the glacier's cells are modelled: here the glacier is every cell
    assert op.positions.size == setup.cells.size
    got = modelled_values(setup, cfg, op)
    want = np.concatenate([case["stakes"].balance_mwe, case["glacier"].balance_mwe])
    np.testing.assert_allclose(got, want, atol=2e-6)   # the run's maps are float32


def test_a_record_cut_to_the_observations_keeps_the_runs_spin_up(builders, tmp_path):
    """The fit cuts the record after the last observed day; with [snow] spinup_years = 2 the
    spin-up still cycles the record's first two balance years, so a glacier-wide balance of the
    first year alone is modelled as `firnline run` has it (a cut to one year would spin up on
    that year twice and start from another state)."""
    builders.write_dem(tmp_path / "dem.tif", builders.ramp(20, 10, 3200.0, 2200.0))
    builders.seasonal_station(tmp_path / "station.csv")
    (tmp_path / "gb.csv").write_text("glacier,start_date,end_date,balance_mwe,sigma_mwe\n"
                                     "test plane,2016-10-01,2017-09-30,-0.5,0.2\n")
    sec = builders.calibration_sections(TRUTH, observations={"glacier_balances": "gb.csv"},
                                        calibration={"parameters": ["ddf_ice_mm_per_day_k"]},
                                        snow={"firn_years": 2, "spinup_years": 2})
    cfg = firnline.load_config(builders.write_config(tmp_path / "c.toml", sec))
    setup = prepare(cfg)
    points, glaciers = load_observations(cfg, setup)
    op = build_operator(setup, points, glaciers)
    got = modelled_values(setup, cfg, op)[0]
    want = firnline.run(cfg, setup=setup).summary.set_index("balance_year").annual_balance_mwe[2017]
    assert got == pytest.approx(want, abs=2e-6)      # the run's summary comes from float32 maps


def test_balance_over_an_arbitrary_inclusive_period_closed_form(builders, tmp_path):
    """Worked example: warm, dry days melt only ice, so B = -ddf_ice * T_cell * days.

    Station 10 C at 2000 m, no precipitation, lapse rate -0.0065 K/m: the cell centred at
    z has T = 10 - 0.0065 (z - 2000) C and melts ddf_ice * T mm w.e. a day (the kernel's
    degree-day rule, no snow ever falls). 2017-03-05 .. 2017-03-14 inclusive is 10 days.
    """
    builders.write_dem(tmp_path / "dem.tif", builders.ramp(20, 10, 3200.0, 2200.0))
    dates = pd.date_range("2016-10-01", "2017-09-30", freq="D")
    pd.DataFrame({"date": dates.strftime("%Y-%m-%d"), "temperature_c": 10.0,
                  "precipitation_mm": 0.0}).to_csv(tmp_path / "station.csv", index=False)
    x = 600000.0 + 3.5 * 50.0
    y = 5150000.0 - 10.5 * 50.0          # centre of row 10
    pd.DataFrame([["P", x, y, "2017-03-05", "2017-03-14", -1.0, 0.1]],
                 columns=POINT_COLUMNS).to_csv(tmp_path / "stakes.csv", index=False)
    cfg = firnline.load_config(builders.write_config(tmp_path / "c.toml", builders.calibration_sections(
        {"ddf_ice_mm_per_day_k": 7.0}, observations={"point_balances": "stakes.csv"},
        calibration={"parameters": ["ddf_ice_mm_per_day_k"]})))
    setup = prepare(cfg)
    points, glaciers = load_observations(cfg, setup)
    z = points.elevation_m[0]                 # the cell's DEM value (float32 in the file)
    assert z == pytest.approx(builders.ramp(20, 10, 3200.0, 2200.0)[10, 3], abs=1e-3)
    op = build_operator(setup, points, glaciers)
    assert op.positions.size == 1          # the run is restricted to the one cell needed
    assert op.n_days == (pd.Timestamp("2017-03-15") - pd.Timestamp("2016-10-01")).days
    got = modelled_values(setup, cfg, op)[0]
    assert got == pytest.approx(-7.0 * (10.0 - 0.0065 * (z - 2000.0)) * 10 / 1000.0, rel=1e-9)


def test_recovery_from_other_starting_values_within_one_percent(case):
    result = calibrate(firnline.load_config(case["config"]()))
    for key, truth in TRUTH.items():
        assert result.value[key] == pytest.approx(truth, rel=0.01)
        assert result.spec.initial[result.spec.parameters.index(key)] == START[key]
    assert result.converged
    assert result.rmse_mwe < 1e-4 < result.rmse_initial_mwe
    assert result.n_obs == 33 and result.n_evaluations > 3
    assert result.warnings == []


def test_with_noise_the_truth_lies_within_about_two_standard_errors(case):
    """Gaussian noise at the stated sigmas, ten realisations: with standard errors from the
    Jacobian, |fit - truth| < 2 SE should hold about 95 % of the time (normal quantiles,
    common practice); require it in at least 8 of 10 and < 3.5 SE always."""
    cfg = firnline.load_config(case["config"]())
    setup = prepare(cfg)
    stakes, glacier = case["stakes"], case["glacier"]
    inside = {k: 0 for k in TRUTH}
    for seed in range(10):
        rng = np.random.default_rng(seed)
        stakes.assign(balance_mwe=stakes.balance_mwe + rng.normal(0, 1, len(stakes)) * stakes.sigma_mwe
                      ).to_csv(case["dir"] / "stakes.csv", index=False)
        glacier.assign(balance_mwe=glacier.balance_mwe + rng.normal(0, 1, len(glacier)) * glacier.sigma_mwe
                       ).to_csv(case["dir"] / "glacier_balances.csv", index=False)
        r = calibrate(cfg, setup=setup)
        assert 0.3 < r.chi_square_reduced < 3.0
        for k, truth in TRUTH.items():
            z = abs(r.value[k] - truth) / r.std_error[k]
            assert 0 < r.std_error[k] < 0.5 and z < 3.5
            inside[k] += z < 2.0
    assert all(n >= 8 for n in inside.values()), inside


def test_two_parameters_against_one_glacier_value_warn_underdetermined(case):
    case["glacier"].iloc[:1].to_csv(case["dir"] / "one.csv", index=False)
    cfg = case["config"](observations={"glacier_balances": "one.csv", "point_balances": None})
    result = calibrate(firnline.load_config(cfg))
    assert result.n_obs == 1
    assert any(w.startswith("underdetermined") for w in result.warnings)
    assert all(np.isnan(v) for v in result.std_error.values())
    assert abs(result.records.residual_mwe.iloc[0]) < 0.01  # one value is easy to match


def test_factors_against_glacier_wide_annual_values_only_are_strongly_correlated(case):
    """Three annual glacier-wide values fix the total melt, hardly how it splits into snow and ice."""
    cfg = case["config"](observations={"point_balances": None})
    result = calibrate(firnline.load_config(cfg))
    assert result.n_obs == 3
    assert result.correlation[0, 1] < -0.9
    assert any("strongly correlated" in w for w in result.warnings)


def test_a_parameter_held_at_its_bound_is_reported(case):
    cfg = case["config"](calibration={"bounds": {"ddf_ice_mm_per_day_k": [2.0, 7.0]}})
    result = calibrate(firnline.load_config(cfg))
    assert result.value["ddf_ice_mm_per_day_k"] == pytest.approx(7.0, abs=1e-6)   # truth 8.5 is beyond
    assert any(w.startswith("ddf_ice_mm_per_day_k = 7 sits at its upper bound 7") for w in result.warnings)


def test_points_off_every_glacier_are_reported():
    """Pure checks on a 2 x 2 grid of 10 m cells: each point lands in the cell containing it."""
    from types import SimpleNamespace

    from affine import Affine

    from firnline.calibrate.fit import _points_off_glacier
    from firnline.observations import check_point_balances, parse_table

    text = ("point_id,x,y,start_date,end_date,balance_mwe,sigma_mwe\n"
            "A,2.0,18.0,2017-01-01,2017-01-31,0.1,0.1\n"       # row 0, column 0
            "B,15.0,15.0,2017-01-01,2017-01-31,0.1,0.1\n"      # row 0, column 1
            "C,10.0,5.0,2017-01-01,2017-01-31,0.1,0.1\n")      # on the edge: row 1, column 1
    record = np.arange(np.datetime64("2016-10-01"), np.datetime64("2017-10-01"))
    valid = np.ones((2, 2), bool)
    pts = check_point_balances(parse_table(text, "p.csv"), record, Affine(10, 0, 0, 0, -10, 20), valid,
                               np.full((2, 2), 2500.0))
    assert list(pts.flat_index) == [0, 1, 3]
    assert list(pts.start_day) == [92, 92, 92] and list(pts.end_day) == [123, 123, 123]
    setup = SimpleNamespace(cells=np.arange(4), glacier_mask=np.array([True, False, True, False]))
    assert _points_off_glacier(setup, pts) == [
        "points B, C lie on cells outside every glacier, where the model melts snow but no ice."]


def test_geodetic_conversion_huss_2013():
    # Source: Huss (2013), The Cryosphere 7, 877-887: 850 +/- 60 kg m-3 for volume-to-mass
    # conversion; with water at 1000 kg m-3 (common practice) 1 m of lowering is 0.85 m w.e.
    # with 0.06 m w.e. of conversion uncertainty.
    b, s = geodetic_balance(-1.0)
    assert b == pytest.approx(-0.85, abs=1e-12)
    assert s == pytest.approx(0.06, abs=1e-12)
    # the conversion part adds in quadrature to the elevation-change part
    b, s = geodetic_balance(-10.0, 0.8)
    assert b == pytest.approx(-8.5) and s == pytest.approx(np.hypot(0.8, 0.6))


def test_dh_rows_are_converted_and_fitted(case):
    """A multi-year geodetic balance (dh_m) over the whole record enters with Huss (2013) density."""
    total = float(case["glacier"].balance_mwe.sum())
    dh = total / 0.85
    pd.DataFrame({"glacier": ["test plane", "test plane"], "start_date": ["2016-10-01", "2017-10-01"],
                  "end_date": ["2019-09-30", "2018-09-30"], "balance_mwe": ["", case["glacier"].balance_mwe[1]],
                  "dh_m": [dh, ""], "sigma_mwe": [0.1, 0.2]}).to_csv(case["dir"] / "geo.csv", index=False)
    result = calibrate(firnline.load_config(case["config"](observations={"glacier_balances": "geo.csv"})))
    geo = result.records[result.records.dh_m.notna()].iloc[0]
    assert geo.observed_mwe == pytest.approx(total)
    assert geo.sigma_mwe == pytest.approx(np.hypot(0.1, abs(dh) * 0.06))   # Source: Huss (2013)
    assert geo.days == 3 * 365 and geo.kind == "glacier"   # no 29 February in 2016-10 .. 2019-09
    assert abs(geo.residual_mwe) < 1e-3
    for key, truth in TRUTH.items():
        assert result.value[key] == pytest.approx(truth, rel=0.01)


def test_ratio_ties_the_ice_factor_to_the_snow_factor(builders, case, tmp_path):
    tied_truth = {"ddf_snow_mm_per_day_k": 4.0, "ddf_ice_mm_per_day_k": 8.0}
    cfg = builders.write_config(tmp_path / "t2.toml", builders.calibration_sections(tied_truth))
    run = firnline.run(firnline.load_config(cfg))
    s = run.summary
    pd.DataFrame({"glacier": s.glacier, "start_date": [f"{v - 1}-10-01" for v in s.balance_year],
                  "end_date": [f"{v}-09-30" for v in s.balance_year], "balance_mwe": s.annual_balance_mwe,
                  "sigma_mwe": 0.2}).to_csv(tmp_path / "g2.csv", index=False)
    cfg = case["config"](calibration={"parameters": ["ddf_snow_mm_per_day_k"],
                                      "ratios": {"ddf_ice_mm_per_day_k": ["ddf_snow_mm_per_day_k", 2.0]}},
                         observations={"glacier_balances": "g2.csv", "point_balances": None})
    out = tmp_path / "tied_out"
    assert main(["calibrate", str(cfg), "--out", str(out), "--quiet"]) == 0
    info = json.loads((out / "calibration.json").read_text())
    snow = info["parameters"]["ddf_snow_mm_per_day_k"]["value"]
    assert snow == pytest.approx(4.0, rel=0.01)
    assert info["tied"]["ddf_ice_mm_per_day_k"]["value"] == pytest.approx(2.0 * snow, rel=1e-12)
    fitted = firnline.load_config(out / "calibrated.toml")
    assert fitted.melt.ddf_ice_mm_per_day_k == pytest.approx(2.0 * snow, rel=1e-12)


def test_cli_writes_every_file_and_calibrated_toml_runs(case, tmp_path, capsys):
    cfg = case["config"]()
    out = tmp_path / "elsewhere" / "calibration"
    assert main(["calibrate", str(cfg), "--out", str(out), "--quiet", "--no-report"]) == 0  # report: see
    table = capsys.readouterr().out                                                         # test_report_commands
    assert "ddf_snow_mm_per_day_k" in table and "RMSE" in table
    assert sorted(p.name for p in out.iterdir() if p.name != MANIFEST) == [
        "calibrated.toml", "calibration.json", "calibration_fit.png", "calibration_residuals.csv"]
    assert (out / MANIFEST).is_file()                 # the folder's record of what was written
    info = json.loads((out / "calibration.json").read_text())
    for key in ("parameters", "rmse_mwe", "bias_mwe", "n_obs", "n_evaluations", "observations", "warnings"):
        assert key in info
    p = info["parameters"]["ddf_ice_mm_per_day_k"]
    assert set(p) == {"value", "std_error", "initial", "bounds"}
    assert p["initial"] == 6.0 and p["bounds"] == list(DEFAULT_BOUNDS["ddf_ice_mm_per_day_k"])
    assert info["n_obs"] == len(info["observations"]) == 33
    rec = info["observations"][0]
    for key in ("observed_mwe", "modelled_mwe", "residual_mwe", "sigma_mwe", "line", "id"):
        assert key in rec
    res = pd.read_csv(out / "calibration_residuals.csv")
    assert len(res) == 33 and res.line.iloc[0] == 2 and set(res.kind) == {"point", "glacier"}
    assert (out / "calibration_fit.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # calibrated.toml runs as it is from the output folder, with the fitted values
    run_out = tmp_path / "fitted_run"
    assert main(["run", str(out / "calibrated.toml"), "--out", str(run_out), "--quiet"]) == 0
    used = json.loads((run_out / "run.json").read_text())["parameters"]["melt"]
    for key in TRUTH:
        assert used[key] == pytest.approx(info["parameters"][key]["value"], rel=1e-12)
        assert used[key] == pytest.approx(TRUTH[key], rel=0.01)


def test_default_bounds_lie_within_the_schema():
    for key, (lo, hi) in DEFAULT_BOUNDS.items():
        assert lo < hi
        check_value(key, lo, key)
        check_value(key, hi, key)


# ----------------------------------------------------------------------------
# bad observations and bad [calibration] sections: exit 2 naming the row or key
# ----------------------------------------------------------------------------

def _edit_stakes(case, fn):
    lines = (case["dir"] / "stakes.csv").read_text().splitlines()
    lines = fn(lines)
    (case["dir"] / "stakes.csv").write_text("\n".join(lines) + "\n")


def _set_field(lines, line_no, column, value):
    header = lines[0].split(",")
    fields = lines[line_no - 1].split(",")
    fields[header.index(column)] = value
    lines[line_no - 1] = ",".join(fields)
    return lines


def _stake_field(line_no, column, value):
    """A case edit: set one field of stakes.csv (line numbers as in the file, header = 1)."""
    return lambda case: _edit_stakes(case, lambda ls: _set_field(ls, line_no, column, value))


def _glacier_rows(case, text):
    (case["dir"] / "glacier_balances.csv").write_text(text)


BAD_ROWS = {
    "text": (_stake_field(4, "balance_mwe", "n/a"),
             ["stakes.csv, line 4", "balance_mwe 'n/a' is not a number"]),
    "empty": (_stake_field(5, "sigma_mwe", ""),
              ["stakes.csv, line 5", "sigma_mwe is empty"]),
    "date": (_stake_field(3, "end_date", "2017-13-01"),
             ["stakes.csv, line 3", "not a date written YYYY-MM-DD"]),
    "end_before_start": (_stake_field(6, "end_date", "2016-09-30"),
                         ["stakes.csv, line 6", "comes before start_date"]),
    "outside_record": (_stake_field(2, "start_date", "2015-10-01"),
                       ["stakes.csv, line 2", "outside the forcing record"]),
    "after_record": (_stake_field(7, "end_date", "2019-10-01"),
                     ["stakes.csv, line 7", "outside the forcing record"]),
    "outside_dem": (_stake_field(8, "x", "590000"),
                    ["stakes.csv, line 8", "lies outside the DEM"]),
    "sigma_zero": (_stake_field(9, "sigma_mwe", "0"),
                   ["stakes.csv, line 9", "sigma_mwe is 0", "positive"]),
    "sigma_negative": (_stake_field(9, "sigma_mwe", "-0.1"),
                       ["stakes.csv, line 9", "sigma_mwe is -0.1"]),
    "missing_column": (lambda c: c["stakes"].drop(columns="sigma_mwe").to_csv(c["dir"] / "stakes.csv",
                                                                              index=False),
                       ["stakes.csv", 'missing column "sigma_mwe"']),
    "extra_fields": (lambda c: _edit_stakes(c, lambda ls: ls[:3] + [ls[3] + ",0.3,extra"] + ls[4:]),
                     ["stakes.csv, line 4", "fields but the header"]),
    "unknown_glacier": (lambda c: _glacier_rows(c, "glacier,start_date,end_date,balance_mwe,sigma_mwe\n"
                                                   "test plane,2016-10-01,2017-09-30,-1.0,0.2\n"
                                                   "Test Plain,2016-10-01,2017-09-30,-1.0,0.2\n"),
                        ["glacier_balances.csv, line 3", 'unknown glacier "Test Plain"', '"test plane"']),
    "both_values": (lambda c: _glacier_rows(c, "glacier,start_date,end_date,balance_mwe,dh_m,sigma_mwe\n"
                                               "test plane,2016-10-01,2019-09-30,-3.0,-3.5,0.2\n"),
                    ["glacier_balances.csv, line 2", "both balance_mwe and dh_m"]),
    "no_value_column": (lambda c: _glacier_rows(c, "glacier,start_date,end_date,sigma_mwe\n"
                                                   "test plane,2016-10-01,2019-09-30,0.2\n"),
                        ["glacier_balances.csv", 'no column "balance_mwe" or "dh_m"']),
    "glacier_sigma": (lambda c: _glacier_rows(c, "# geodetic\nglacier,start_date,end_date,dh_m,sigma_mwe\n\n"
                                                 "test plane,2016-10-01,2019-09-30,-3.5,0\n"),
                      ["glacier_balances.csv, line 4", "sigma_mwe is 0"]),
}


@pytest.mark.parametrize("kind", sorted(BAD_ROWS))
def test_bad_observation_exits_2_naming_the_row(case, capsys, kind):
    make, words = BAD_ROWS[kind]
    make(case)
    cfg = case["config"]()
    out = case["dir"] / "out_bad"
    assert main(["calibrate", str(cfg), "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err
    for w in words:
        assert w in err, err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert not out.exists() or list(out.iterdir()) == []


def test_point_on_nodata_exits_2(builders, case, capsys):
    z = builders.ramp(20, 10, 3200.0, 2200.0)
    z[10, 3] = np.nan
    builders.write_dem(case["dir"] / "dem.tif", z)
    out = case["dir"] / "out_bad"
    assert main(["calibrate", str(case["config"]()), "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "stakes.csv, line 14" in err and "nodata cell" in err   # first row of the stake at row 10
    assert not out.exists() or list(out.iterdir()) == []


BAD_KEYS = {
    "not_numeric": ({"parameters": ["snow_rain_range_c"]}, {}, 'names "snow_rain_range_c", which is not a numeric key'),
    "unused_by_method": ({"parameters": ["melt_factor_mm_per_day_k"]}, {},
                         'not used by [melt] method = "degree-day"'),
    "transmissivity": ({"parameters": ["transmissivity"]}, {"melt": {"method": "radiation"}},
                       '"transmissivity", which cannot be calibrated'),
    "monthly_lapse": ({"parameters": ["lapse_rate_k_per_m"]},
                      {"downscaling": {"lapse_rate_k_per_m": [-0.006] * 12}}, "twelve monthly values"),
    "bounds_beyond_schema": ({"bounds": {"ddf_snow_mm_per_day_k": [1.0, 80.0]}}, {},
                             'bounds for "ddf_snow_mm_per_day_k" must be a number <= 50'),
    "start_outside_bounds": ({"bounds": {"ddf_snow_mm_per_day_k": [4.0, 9.0]}}, {},
                             "starting value 3 of ddf_snow_mm_per_day_k"),
    "ratio_syntax": ({"parameters": ["ddf_snow_mm_per_day_k"],
                      "ratios": {"ddf_ice_mm_per_day_k": [2.0, "ddf_snow_mm_per_day_k"]}}, {},
                     'ratios for "ddf_ice_mm_per_day_k" must be ["other_key", ratio]'),
    "ratio_on_fitted": ({"ratios": {"ddf_ice_mm_per_day_k": ["ddf_snow_mm_per_day_k", 2.0]}}, {},
                        "both in [calibration] parameters and tied"),
    "ratio_out_of_range": ({"parameters": ["ddf_snow_mm_per_day_k"],
                            "ratios": {"ddf_ice_mm_per_day_k": ["ddf_snow_mm_per_day_k", 5.0]}}, {},
                           'ratios make "ddf_ice_mm_per_day_k" = 5 x ddf_snow_mm_per_day_k, '
                           'which must be a number <= 50'),
    "bad_points_crs": ({}, {"observations": {"points_crs": "EPSG:not-a-code"}}, "points_crs"),
}


@pytest.mark.parametrize("kind", sorted(BAD_KEYS))
def test_bad_calibration_key_exits_2_naming_the_key(case, capsys, kind):
    cal, extra, words = BAD_KEYS[kind]
    melt = dict(START, **extra.pop("melt", {})) if "melt" in extra else START
    obs = extra.pop("observations", None)
    cfg = case["config"](melt=melt, calibration=cal, observations=obs, **extra)
    out = case["dir"] / "out_bad"
    assert main(["calibrate", str(cfg), "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert words in err, err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert not out.exists() or list(out.iterdir()) == []


def test_fit_spec_builds_the_tie_and_default_bounds(case):
    cfg = firnline.load_config(case["config"](calibration={
        "parameters": ["ddf_snow_mm_per_day_k", "precip_factor"],
        "ratios": {"ddf_ice_mm_per_day_k": ["ddf_snow_mm_per_day_k", 1.8]}}))
    spec = fit_spec(cfg)
    assert spec.parameters == ("ddf_snow_mm_per_day_k", "precip_factor")
    assert list(spec.lower) == [DEFAULT_BOUNDS["ddf_snow_mm_per_day_k"][0], DEFAULT_BOUNDS["precip_factor"][0]]
    assert spec.values([5.0, 1.2]) == {"ddf_snow_mm_per_day_k": 5.0, "precip_factor": 1.2,
                                       "ddf_ice_mm_per_day_k": pytest.approx(9.0)}
    with pytest.raises(InputError, match="no \\[calibration\\] section"):
        fit_spec(firnline.load_config(case["dir"] / "truth.toml"))


def test_points_in_another_crs_use_the_cell_that_contains_them(case):
    """Stakes given in longitude/latitude (EPSG:4326) land in the same cells as in UTM."""
    from pyproj import Transformer

    tr = Transformer.from_crs("EPSG:32632", "EPSG:4326", always_xy=True)
    st = case["stakes"]
    lon, lat = tr.transform(st.x.to_numpy(), st.y.to_numpy())
    st.assign(x=lon, y=lat).to_csv(case["dir"] / "stakes_ll.csv", index=False, float_format="%.10f")
    cfg_utm = firnline.load_config(case["config"]())
    cfg_ll = firnline.load_config(case["config"](name="ll.toml", observations={
        "point_balances": "stakes_ll.csv", "points_crs": "EPSG:4326"}))
    setup = prepare(cfg_utm)
    a, _ = load_observations(cfg_utm, setup)
    b, _ = load_observations(cfg_ll, setup)
    np.testing.assert_array_equal(a.flat_index, b.flat_index)
    np.testing.assert_array_equal(a.flat_index[::6] // 10, case["stake_rows"])   # rows of the stakes, 10 columns
    np.testing.assert_allclose(b.x_m, a.x_m, atol=1e-3)


def test_bad_row_through_a_real_process_has_no_traceback(case):
    BAD_ROWS["unknown_glacier"][0](case)
    out = case["dir"] / "out_bad"
    r = subprocess.run([sys.executable, "-m", "firnline", "calibrate", str(case["config"]()), "--out",
                        str(out)], capture_output=True, text=True)
    assert r.returncode == 2, r.stderr
    assert "glacier_balances.csv, line 3" in r.stderr and "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
    assert not out.exists() or list(out.iterdir()) == []


# ----------------------------------------------------------------------------
# the demo
# ----------------------------------------------------------------------------

REPO = Path(__file__).resolve().parents[1]


def test_demo_calibrate_config_is_the_demo_config_plus_observations(tmp_path):
    import tomllib

    base = tomllib.loads((REPO / "configs" / "demo.toml").read_text())
    cal = tomllib.loads((REPO / "configs" / "demo_calibrate.toml").read_text())
    assert set(cal) == set(base) | {"observations", "calibration"}
    for section, keys in base.items():
        for key, value in keys.items():
            if (section, key) != ("output", "dir"):
                assert cal[section][key] == value, (section, key)
    cfg = firnline.load_config(REPO / "configs" / "demo_calibrate.toml")
    spec = fit_spec(cfg)
    assert spec.parameters == ("ddf_snow_mm_per_day_k", "ddf_ice_mm_per_day_k", "storage_days_ice")
    assert cfg.observations.point_balances == (REPO / "demo_dem" / "stakes.csv").resolve()
    assert cfg.observations.discharge == (REPO / "demo_dem" / "discharge.csv").resolve()


def test_regression_committed_demo_observations_match_the_generator(tmp_path):
    """Regression test, not a check of correctness: demo_dem/stakes.csv, glacier_balances.csv and
    discharge.csv are byte for byte what the seeded generator (which runs the model) writes today.
    A change of the model's results changes them; regenerate them with
    firnline.demo.regenerate_observations("demo_dem") after checking that the change is intended."""
    from firnline import demo
    from firnline.outputs import staged

    with staged(tmp_path) as st:
        names = demo.write_demo_observations(st, inputs=REPO / "demo_dem")
    for name in names.values():
        assert (tmp_path / name).read_bytes() == (REPO / "demo_dem" / name).read_bytes(), name
    stakes = pd.read_csv(REPO / "demo_dem" / "stakes.csv")
    geo = pd.read_csv(REPO / "demo_dem" / "glacier_balances.csv")
    assert list(stakes.columns) == POINT_COLUMNS
    assert {s[:2] for s in stakes.point_id} == {"NO", "KE", "TA"}           # stakes on every glacier
    winter = pd.to_datetime(stakes.end_date).dt.month.isin([4, 5])
    assert winter.sum() > 40 and (~winter).sum() > 40                        # winter and annual readings
    assert stakes.point_id.str.contains("-P").sum() == 40                    # the probing survey
    assert list(geo.columns) == ["glacier", "start_date", "end_date", "dh_m", "sigma_mwe"]
    assert sorted(geo.glacier) == ["kessel", "north_seldra", "tarn"]
    from firnline.runoff import read_discharge
    gauge = read_discharge(REPO / "demo_dem" / "discharge.csv")       # passes the gauge file's checks
    station = pd.read_csv(REPO / "demo_dem" / "station.csv")
    assert str(gauge.dates[0]) == station.date.iloc[0] and str(gauge.dates[-1]) == station.date.iloc[-1]
    gaps = ~np.isfinite(gauge.discharge_m3s)
    assert 20 <= gaps.sum() <= 0.05 * gaps.size                          # the outage and a few more days
    assert np.nanmean(gauge.discharge_m3s) > 0
