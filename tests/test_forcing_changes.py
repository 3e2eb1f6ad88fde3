"""Monthly change scenarios: change files, delta change, and the honest ELA under warming."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import xarray as xr

import firnline
from firnline.changes import delta_change, delta_change_from_file, read_change_files, read_changes, write_changes
from firnline.cli import main
from firnline.errors import InputError
from firnline.model import prepare
from firnline.scenarios import REFERENCE, precip_offsets, sweep

LAPSE = -0.0065   # K per m: ICAO Standard Atmosphere (Doc 7488) / ISO 2533:1975
BAND = 50.0       # m, the default [balance] band_width_m


def write_change_file(path, warming, precip, order=None):
    rows = list(range(1, 13)) if order is None else order
    df = pd.DataFrame({"month": rows, "warming_k": [warming[m - 1] for m in rows],
                       "precip_change_pct": [precip[m - 1] for m in rows]})
    df.to_csv(path, index=False)
    return path


def test_change_file_is_one_scenario_named_by_its_stem(tmp_path):
    w = [0.5 + 0.1 * m for m in range(12)]
    p = [-5.0 + m for m in range(12)]
    path = write_change_file(tmp_path / "moderate.csv", w, p, order=[7, 8, 9, 10, 11, 12, 1, 2, 3, 4, 5, 6])
    s = read_changes(path)
    assert s.name == "moderate" and s.warming_k == pytest.approx(tuple(w)) and not s.uniform
    assert s.precip_scale == pytest.approx(tuple(1 + v / 100 for v in p))
    assert s.mean_warming_k == pytest.approx(np.mean(w))
    flat = read_changes(write_change_file(tmp_path / "flat.csv", [1.0] * 12, [0.0] * 12))
    assert flat.uniform


@pytest.mark.parametrize("edit,words", [
    (lambda df: df.drop(columns="warming_k"), 'no column "warming_k"'),
    (lambda df: df.iloc[:11], "no row for month 12"),
    (lambda df: df.assign(month=[1, 2, 3, 4, 5, 5, 7, 8, 9, 10, 11, 12]), "line 7: month 5 appears twice"),
    (lambda df: df.assign(month=list(range(1, 12)) + [13]), "line 13: month 13 is not a whole month"),
    (lambda df: df.assign(warming_k=df.warming_k.astype(str).where(df.index != 3, "warm")), "line 5: warming_k 'warm'"),
    (lambda df: df.assign(precip_change_pct=df.precip_change_pct.where(df.index != 0, -100.0)),
     "line 2: precip_change_pct -100 would remove"),
])
def test_bad_change_files_name_file_and_line(tmp_path, edit, words):
    path = write_change_file(tmp_path / "bad.csv", [1.0] * 12, [0.0] * 12)
    edit(pd.read_csv(path)).to_csv(path, index=False)
    with pytest.raises(InputError, match=f"bad.csv.*{words}" if "line" in words else words):
        read_changes(path)


def test_two_change_files_with_one_stem_and_missing_file(tmp_path):
    (tmp_path / "a").mkdir()
    one = write_change_file(tmp_path / "x.csv", [1.0] * 12, [0.0] * 12)
    two = write_change_file(tmp_path / "a" / "x.csv", [2.0] * 12, [0.0] * 12)
    with pytest.raises(InputError, match="both named 'x'"):
        read_change_files([one, two])
    with pytest.raises(InputError, match="change file not found"):
        read_changes(tmp_path / "none.csv")


def test_delta_change_recovers_monthly_differences_and_ratios(tmp_path):
    """Delta change (common practice): warming = difference of monthly mean temperatures,
    precipitation change = ratio of monthly means - 1, between the two periods."""
    d = pd.date_range("1991-01-01", "2010-12-31", freq="D")
    rng = np.random.default_rng(2)
    m = d.month.to_numpy()
    dt_m = np.linspace(0.8, 2.5, 12)
    ratio_m = np.linspace(0.85, 1.2, 12)
    future = d.year >= 2001
    t = 5 + 8 * np.sin(2 * np.pi * d.day_of_year.to_numpy() / 365.25) + rng.normal(0, 2, d.size)
    p = rng.gamma(0.6, 6, d.size)
    # the future decade: the reference decade repeated with the monthly change applied
    ref = ~future
    t_ref_mean = np.array([t[ref & (m == k)].mean() for k in range(1, 13)])
    p_ref_mean = np.array([p[ref & (m == k)].mean() for k in range(1, 13)])
    t_f_mean = np.array([t[future & (m == k)].mean() for k in range(1, 13)])
    p_f_mean = np.array([p[future & (m == k)].mean() for k in range(1, 13)])
    # shift/scale the future so that its monthly means are exactly ref + dt, ref * ratio
    t[future] += (t_ref_mean + dt_m - t_f_mean)[m[future] - 1]
    p[future] *= (p_ref_mean * ratio_m / p_f_mean)[m[future] - 1]
    ch = delta_change(d.values, t, p, ("1991-01-01", "2000-12-31"), ("2001-01-01", "2010-12-31"))
    assert list(ch.columns) == ["month", "warming_k", "precip_change_pct"] and list(ch.month) == list(range(1, 13))
    np.testing.assert_allclose(ch.warming_k, dt_m, atol=1e-9)
    np.testing.assert_allclose(ch.precip_change_pct, 100 * (ratio_m - 1), atol=1e-9)
    # round trip through a change file
    s = read_changes(write_changes(tmp_path / "derived.csv", ch))
    assert s.name == "derived" and s.warming_k == pytest.approx(tuple(dt_m), abs=1e-4)
    # from a station CSV with gaps, and from the area mean of a gridded file
    st = pd.DataFrame({"date": d.strftime("%Y-%m-%d"), "temperature_c": t, "precipitation_mm": p})
    st.loc[st.date.str.startswith("1995-06"), "temperature_c"] = np.nan     # a gap: June 1995
    st.to_csv(tmp_path / "series.csv", index=False)
    c2 = delta_change_from_file(tmp_path / "series.csv", ("1991-01-01", "2000-12-31"), ("2001-01-01", "2010-12-31"))
    june = t[ref & (m == 6) & ~((d.year == 1995) & (d.month == 6))].mean()
    np.testing.assert_allclose(np.delete(c2.warming_k.to_numpy(), 5), np.delete(dt_m, 5), atol=1e-9)
    assert c2.warming_k[5] == pytest.approx(t_ref_mean[5] + dt_m[5] - june, abs=1e-9)
    shape = (d.size, 2, 3)
    ds = xr.Dataset({"tas": (("time", "y", "x"), np.broadcast_to((t + 273.15)[:, None, None], shape),
                             {"standard_name": "air_temperature", "units": "K"}),
                     "pr": (("time", "y", "x"), np.broadcast_to((p / 86400)[:, None, None], shape),
                            {"standard_name": "precipitation_flux", "units": "kg m-2 s-1"})},
                    coords={"time": ("time", np.arange(d.size, dtype=float), {"units": "days since 1991-01-01"}),
                            "y": ("y", [0.0, 1.0], {"axis": "Y"}), "x": ("x", [0.0, 1.0, 2.0], {"axis": "X"})})
    ds.to_netcdf(tmp_path / "model.nc", engine="h5netcdf")
    c3 = delta_change_from_file(tmp_path / "model.nc", ("1991-01-01", "2000-12-31"), ("2001-01-01", "2010-12-31"))
    np.testing.assert_allclose(c3.warming_k, dt_m, atol=1e-6)
    np.testing.assert_allclose(c3.precip_change_pct, 100 * (ratio_m - 1), atol=1e-5)


def test_delta_change_needs_both_periods_covered():
    d = pd.date_range("2000-01-01", "2005-12-31", freq="D")
    t = np.zeros(d.size)
    p = np.ones(d.size)
    with pytest.raises(InputError, match="future period 2010-01-01..2015-12-31 has only 0 days"):
        delta_change(d.values, t, p, ("2000-01-01", "2002-12-31"), ("2010-01-01", "2015-12-31"))
    p[d.month == 3] = 0.0
    with pytest.raises(InputError, match="month 3 has no precipitation in the reference period"):
        delta_change(d.values, t, p, ("2000-01-01", "2002-12-31"), ("2003-01-01", "2005-12-31"))


def test_precip_offset_interpolates_the_sweeps_own_numbers():
    """B = -0.5 - 0.8 w + 0.02 p (m w.e.): zero balance at p = (0.5 + 0.8 w) / 0.02, the
    reference balance kept at p = 40 w, i.e. 40 % per K; linear interpolation is exact here."""
    rows = [["A", w, p, -0.5 - 0.8 * w + 0.02 * p] for w in (0.0, 1.0, 2.0) for p in (-20.0, 0.0, 40.0, 80.0)]
    t = pd.DataFrame(rows, columns=["glacier", "warming_k", "precip_change_pct", "mean_annual_balance_mwe"])
    o = precip_offsets(t).set_index("warming_k")
    assert o.loc[1.0, "precip_change_zero_balance_pct"] == pytest.approx(65.0)
    assert o.loc[1.0, "precip_change_same_balance_pct"] == pytest.approx(40.0)
    assert o.loc[1.0, "offset_pct_per_k"] == pytest.approx(40.0)
    assert o.loc[2.0, "offset_pct_per_k_linear"] == pytest.approx(40.0)
    assert np.isnan(o.loc[2.0, "precip_change_zero_balance_pct"])    # 105 % lies beyond +80 %
    assert "not extrapolated" in o.loc[2.0, "note"]


# ----------------------------------------------------------------------------
# honest ELA on the planar closed form (uniform steps; any kernel)
# ----------------------------------------------------------------------------

T_ST, P_ST, Z_ST = 5.0, 5.0, 2000.0


def plane(builders, tmp_path):
    builders.write_dem(tmp_path / "dem.tif", builders.ramp(101, 2, 3500.0, 2000.0))
    builders.write_station(tmp_path / "station.csv", t=T_ST, p=P_ST)
    sec = builders.base_sections(Z_ST)
    sec["downscaling"] = {"precip_gradient_per_m": 0.0}
    return builders.write_config(tmp_path / "case.toml", sec)


def hand_ela(w):
    """Zero balance where ddf_snow T = P (2.5 - T) / 2: T* = 12.5 / 11 C whatever the warming, so the
    ELA rises by 1 / |lapse| per K (the closed form of tests/test_scenarios.py)."""
    t_star = 2.5 * P_ST / (2.0 * 3.0 + P_ST)
    return Z_ST + (T_ST + w - t_star) / -LAPSE


def test_paired_shift_is_monotonic_and_one_over_lapse_per_kelvin(builders, tmp_path):
    sw = sweep(prepare(firnline.load_config(plane(builders, tmp_path))), [0.5, 1.0, 1.5, 2.0, 3.0])
    t = sw.table.sort_values("warming_k")
    assert (t.n_shift_years == t.n_years).all()
    assert np.all(np.diff(t.ela_shift_m) > 0)                              # monotonic in warming
    np.testing.assert_allclose(t.ela_shift_m, t.warming_k / -LAPSE, atol=BAND)
    slope = np.polyfit(t.warming_k, t.ela_shift_m, 1)[0]
    assert slope == pytest.approx(1 / -LAPSE, abs=BAND / 3)                 # 153.8 m per K
    np.testing.assert_allclose(t.ela_shift_sd_m, 0.0, atol=1e-6)           # identical years: no spread
    np.testing.assert_allclose(t.ela_m, hand_ela(t.warming_k.to_numpy()), atol=BAND)   # record-mean profile
    np.testing.assert_allclose(t.profile_ela_shift_m, t.ela_shift_m, atol=1e-6)


def test_record_mean_profile_ela_does_not_fall_while_warming(builders, tmp_path):
    """Years whose ELA leaves the glacier must not drag a mean ELA down: the record-mean-profile
    ELA rises with warming (or leaves the glacier), never falls."""
    dates = pd.date_range("2014-10-01", "2020-09-30", freq="D")
    rng = np.random.default_rng(11)
    year_anom = rng.normal(0, 1.2, 6)[(dates.year + (dates.month >= 10) - 2015).to_numpy()]
    t = 1 + 8 * np.sin(2 * np.pi * (np.arange(dates.size) - 100) / 365.25) + year_anom + rng.normal(0, 2, dates.size)
    p = rng.gamma(0.6, 8, dates.size)
    builders.write_dem(tmp_path / "dem.tif", builders.ramp(60, 2, 3000.0, 2000.0))
    builders.write_station(tmp_path / "station.csv", "2014-10-01", "2020-09-30", t, p)
    cfg = firnline.load_config(builders.write_config(tmp_path / "case.toml", builders.base_sections(2000.0)))
    sw = sweep(prepare(cfg), [0.5, 1.0, 1.5, 2.0, 2.5, 3.0])
    t_ = sw.table.sort_values("warming_k")
    ok = t_[t_.ela_flag == "ok"]
    assert np.all(np.diff(ok.ela_m) > 0)
    assert t_.ela_flag.iloc[-1] in ("ok", "above_glacier")


def test_scenarios_command_with_change_files_writes_their_maps(builders, tmp_path, capsys):
    cfg = plane(builders, tmp_path)
    a = write_change_file(tmp_path / "summer.csv", [0, 0, 0, 0, 1, 2, 2, 2, 1, 0, 0, 0], [0.0] * 12)
    out = tmp_path / "sw"
    rc = main(["scenarios", str(cfg), "--changes", str(a), "--warming", "1", "--out", str(out), "--quiet"])
    assert rc == 0, capsys.readouterr().err
    names = {p.name for p in out.iterdir()}
    assert {"mean_annual_balance_summer.tif", "mean_annual_balance_w+1.0_p+0.tif", "scenario_budget.csv",
            "precip_offset.csv"} <= names
    t = pd.read_csv(out / "scenarios.csv")
    row = t[t.scenario == "summer"].iloc[0]
    assert row.warming_k == pytest.approx(8 / 12) and row.precip_change_pct == 0.0
    assert REFERENCE in set(t.scenario)
    import json
    js = json.loads((out / "scenarios.json").read_text())
    s = [x for x in js["scenarios"] if x["scenario"] == "summer"][0]
    assert s["monthly_warming_k"][5] == 2.0 and s["map"] == "mean_annual_balance_summer.tif"


@pytest.mark.parametrize("force", [False, True])
def test_a_change_file_inside_the_output_folder_is_never_overwritten(builders, tmp_path, capsys, force):
    """The change files named on the command line are inputs of the claim: --force never
    replaces them (DESIGN.md: `--force` never overwrites an input)."""
    cfg = plane(builders, tmp_path)
    out = tmp_path / "sw"
    out.mkdir()
    a = write_change_file(out / "summer.csv", [0, 0, 0, 0, 1, 2, 2, 2, 1, 0, 0, 0], [0.0] * 12)
    before = builders.snapshot(out)
    rc = main(["scenarios", str(cfg), "--changes", str(a), "--out", str(out), "--quiet"]
              + (["--force"] if force else []))
    assert rc == 2
    line = builders.one_sentence_no_traceback(capsys.readouterr().err)
    assert "summer.csv" in line and "input" in line
    assert builders.snapshot(out) == before


@pytest.mark.parametrize("args,words", [
    (["--changes"], "--changes needs one or more change files"),
    (["--changes", "nowhere.csv"], "change file not found"),
])
def test_scenarios_bad_changes_exit_2(builders, tmp_path, capsys, args, words):
    cfg = plane(builders, tmp_path)
    assert main(["scenarios", str(cfg), *args, "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert words in err and "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "o").exists()


def seasonal_case(builders, tmp_path):
    dates = pd.date_range("2015-10-01", "2018-09-30", freq="D")
    rng = np.random.default_rng(5)
    t = 1 + 9 * np.sin(2 * np.pi * (np.arange(dates.size) - 100) / 365.25) + rng.normal(0, 3, dates.size)
    p = rng.gamma(0.6, 8, dates.size)
    builders.write_dem(tmp_path / "dem.tif", builders.ramp(40, 3, 3400.0, 1800.0))
    builders.write_station(tmp_path / "station.csv", "2015-10-01", "2018-09-30", t, p)
    return firnline.load_config(builders.write_config(tmp_path / "case.toml", builders.base_sections(1800.0)))


def test_twelve_equal_monthly_warmings_equal_the_uniform_warming_bit_for_bit(builders, tmp_path):
    """A change file of twelve 1.0 K and +5 % rows is the uniform step (1 K, +5 %), bit for bit,
    also when it runs beside a truly monthly scenario."""
    cfg = seasonal_case(builders, tmp_path)
    setup = prepare(cfg)
    flat = write_change_file(tmp_path / "flat.csv", [1.0] * 12, [5.0] * 12)
    summer = write_change_file(tmp_path / "summer.csv", [0, 0, 0, 0, 2, 2, 2, 2, 2, 0, 0, 0], [0.0] * 12)
    uni = sweep(setup, [1.0], [0.0, 5.0])
    mon = sweep(setup, [], changes=[flat, summer])
    a = uni.year_table[uni.year_table.scenario == "w+1.0_p+5"].reset_index(drop=True)
    b = mon.year_table[mon.year_table.scenario == "flat"].reset_index(drop=True)
    cols = ["annual_balance_mwe", "winter_balance_mwe", "summer_balance_mwe", "ela_m", "aar"]
    pd.testing.assert_frame_equal(a[cols], b[cols], check_exact=True)
    i = [s.name for s in uni.definitions].index("w+1.0_p+5")
    j = [s.name for s in mon.definitions].index("flat")
    np.testing.assert_array_equal(uni.mean_balance[i], mon.mean_balance[j])


def test_summer_only_warming_leaves_winter_accumulation_unchanged(builders, tmp_path):
    """Warming only May-September (the fixed-date summer, winter 1 Oct - 30 Apr) changes no
    winter day: winter snowfall is the same on every cell, bit for bit; the summer balance
    falls wherever a summer day reaches the melt threshold or crosses the snow/rain range."""
    from firnline.changes import read_changes
    from firnline.model import cell_fields
    from firnline.scenarios import run_scenarios, scenario_definitions

    cfg = seasonal_case(builders, tmp_path)
    setup = prepare(cfg)
    summer = write_change_file(tmp_path / "summer.csv", [0, 0, 0, 0, 2, 2, 2, 2, 2, 0, 0, 0], [0.0] * 12)
    defs = scenario_definitions([], [0.0], [summer])
    assert defs[0].name == REFERENCE and defs[1].name == "summer"
    kres = run_scenarios(setup, cfg, defs)
    ref, warm = cell_fields(setup, kres, 0), cell_fields(setup, kres, 1)
    np.testing.assert_array_equal(kres.acc_winter[0], kres.acc_winter[1])   # winter snowfall, every cell
    assert np.all(kres.acc_summer[1] <= kres.acc_summer[0])    # warmer summer days: less of it falls as snow
    assert np.all(warm["summer_balance"] <= ref["summer_balance"] + 1e-6)
    assert np.mean(warm["summer_balance"]) < np.mean(ref["summer_balance"]) - 0.1
    assert read_changes(summer).mean_warming_k == pytest.approx(10 / 12)
