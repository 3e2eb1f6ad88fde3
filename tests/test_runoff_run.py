"""Runoff through `firnline run`: the gauge file's checks (exit 2, culprit named, no output)
and the wiring from the kernel's daily region volumes to runoff.csv, runoff_monthly.csv,
runoff.nc, the hydrograph, run.json and the console."""

from __future__ import annotations

import dataclasses
import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from conftest import base_sections, ramp, write_config, write_dem, write_station
from test_runoff_tables import Daily


def run_cli(*args):
    return subprocess.run([sys.executable, "-m", "firnline", *map(str, args)], capture_output=True, text=True)


def case(tmp_path, discharge_text=None, runoff=None):
    write_dem(tmp_path / "dem.tif", ramp())
    write_station(tmp_path / "station.csv", "2016-10-01", "2018-09-30", 5.0, 5.0)
    sec = base_sections()
    if discharge_text is not None:
        (tmp_path / "discharge.csv").write_text(discharge_text)
        sec["observations"] = {"discharge": "discharge.csv"}
    if runoff is not None:
        sec["runoff"] = runoff
    return write_config(tmp_path / "case.toml", sec)


@pytest.mark.parametrize("text,culprit", [
    ("date,discharge_m3s\n2017-01-01,1.0\n2017-01-32,2.0\n", "discharge.csv, line 3: date '2017-01-32'"),
    ("date,discharge_m3s\n2017-01-01,1.0\n2017-01-02,-2.0\n", "discharge.csv, line 3: discharge_m3s -2"),
    ("date,discharge_m3s\n2017-01-01,1.0\n2017-01-01,2.0\n",
     "discharge.csv, line 3: the date 2017-01-01 appears twice"),
    ("date,discharge_m3s\n2017-01-01,1.0\n2017-01-02,abc\n", "discharge.csv, line 3: discharge_m3s 'abc'"),
    ("day,flow\n2017-01-01,1.0\n", "discharge.csv"),
])
def test_bad_discharge_files_exit_2_naming_the_line(tmp_path, text, culprit):
    cfg = case(tmp_path, text)
    r = run_cli("run", cfg, "--out", tmp_path / "out")
    assert r.returncode == 2, r.stderr
    assert culprit in r.stderr and "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())


def test_missing_catchment_file_exits_2(tmp_path):
    cfg = case(tmp_path, runoff={"catchment": "basin.gpkg"})
    r = run_cli("run", cfg, "--out", tmp_path / "out")
    assert r.returncode == 2 and "basin.gpkg" in r.stderr and "[runoff] catchment" in r.stderr
    assert "Traceback" not in r.stderr


def _with_daily(monkeypatch):
    """Stand in for the kernel's daily seam (issue 11), ``KernelResult.daily`` in m3 per day,
    so that the wiring (routing, files, figure, scores, the fit) is exercised end to end.

    The stand-in is a plain degree-day rule on the station record, not the kernel's physics:
    each day the glacier releases ddf_ice x max(T, 0) mm of ice melt (T at the mean glacier
    elevation with the config's first lapse rate) into the ice reservoir, and the precipitation
    reaches the ground reservoir; the glacier is the whole grid, so glacier = catchment."""
    import firnline.kernel as kernel
    import firnline.model as model

    real = model.simulate

    @dataclasses.dataclass(frozen=True)
    class WithDaily:
        inner: object
        daily: np.ndarray
        region_area_m2: np.ndarray

        def __getattr__(self, name):
            return getattr(self.inner, name)

    def simulate(setup, config=None, *a, **k):
        kres = real(setup, config, *a, **k)
        cfg = config or setup.config
        f = setup.forcing
        n_g = len(setup.glaciers.names)
        area = setup.grid.cell_area_m2 * setup.cells.size
        z = float(setup.z_m.mean())
        t = f.temperature_c + cfg.downscaling.lapse_rate_k_per_m[0] * (z - cfg.climate.station_elevation_m)
        warming = np.asarray(a[0] if a else k.get("warming_k", (0.0,)), dtype=float)
        melt = cfg.melt.ddf_ice_mm_per_day_k * np.maximum(t[None, :] + warming[:, None], 0.0) * 1e-3 * area
        daily = np.zeros((kres.sums.shape[2], f.n_days, n_g + 2, len(Daily)))
        for r in (0, n_g + 1):
            daily[:, :, r, Daily.ICE_MELT] = melt
            daily[:, :, r, Daily.RELEASED_ICE] = melt
            daily[:, :, r, Daily.RAIN] = f.precipitation_mm * 1e-3 * area
            daily[:, :, r, Daily.RELEASED_GROUND] = f.precipitation_mm * 1e-3 * area
        return WithDaily(kres, daily, np.full(n_g + 2, area))

    monkeypatch.setattr(model, "simulate", simulate)
    monkeypatch.setattr(kernel, "Daily", Daily, raising=False)
    import firnline.calibrate.fit as fit
    monkeypatch.setattr(fit, "simulate", simulate)


def test_run_writes_runoff_files_and_reports_the_gauge(tmp_path, monkeypatch, capsys):
    from firnline.cli import main

    dates = pd.date_range("2016-12-01", "2018-09-30", freq="D")
    q = 0.5 + 0.4 * np.sin(np.arange(dates.size) / 58.0)
    text = "date,discharge_m3s\n" + "".join(f"{d:%Y-%m-%d},{v:.3f}\n" for d, v in zip(dates, q))
    cfg = case(tmp_path, text)
    _with_daily(monkeypatch)
    out = tmp_path / "out"
    assert main(["run", str(cfg), "--out", str(out)]) == 0
    console = capsys.readouterr()
    for name in ("runoff.csv", "runoff_monthly.csv", "runoff.nc", "chart_hydrograph.png"):
        assert (out / name).exists(), name
    daily = pd.read_csv(out / "runoff.csv")
    assert set(daily.region) == {"test plane", "catchment"} and len(daily) == 2 * 730
    run = json.loads((out / "run.json").read_text())
    check = run["discharge_check"]
    assert check["days"] == dates.size and check["first_day"] == "2016-12-01"
    assert {"nse", "kge", "volume_error"} <= set(check)
    assert "NSE" in console.out + console.err and "KGE" in console.out + console.err
    assert run["parameters"]["runoff"]["storage_days_ice"] == 0.5
    assert "chart_hydrograph.png" in (out / "report.html").read_text()


def test_calibration_to_discharge_recovers_the_true_ice_factor_and_storage_constant(tmp_path, monkeypatch):
    """Synthetic gauge from "true" ddf_ice = 7.6 mm d-1 K-1 and storage_days_ice = 0.8 d with
    seeded 8 % noise; a fit from the defaults (6.0, 0.5) weighted by the stated 8 % finds both
    within two standard errors (and the standard errors are small against the values)."""
    import firnline
    from firnline.calibrate import calibrate
    from firnline.model import prepare, runoff_of
    from firnline.runoff import CATCHMENT

    _with_daily(monkeypatch)
    dates = pd.date_range("2016-10-01", "2018-09-30", freq="D")
    doy = dates.day_of_year.to_numpy()
    rng = np.random.default_rng(5)
    t = 8.0 - 10.0 * np.cos(2 * np.pi * (doy - 15) / 365.0) + rng.normal(0, 3.0, dates.size)
    p = np.where(rng.random(dates.size) < 0.3, rng.gamma(0.8, 6.0, dates.size), 0.0)
    write_dem(tmp_path / "dem.tif", ramp())
    write_station(tmp_path / "station.csv", "2016-10-01", "2018-09-30", np.round(t, 1), np.round(p, 1))
    sec = base_sections(station_elevation=2500.0)
    write_config(tmp_path / "truth.toml", sec)
    truth = firnline.load_config(tmp_path / "truth.toml").with_values(ddf_ice_mm_per_day_k=7.6,
                                                                      storage_days_ice=0.8)
    setup = prepare(truth)
    import firnline.model as model
    series, _ = runoff_of(setup, truth, model.simulate(setup, truth), 0)
    q = series.discharge_m3s[series.region(CATCHMENT)]
    noisy = np.maximum(q * (1.0 + 0.08 * rng.normal(0, 1, q.size)), 0.0)
    keep = rng.random(q.size) > 0.05                                   # gaps in the gauge record
    (tmp_path / "discharge.csv").write_text("date,discharge_m3s\n" + "".join(
        f"{d:%Y-%m-%d},{v:.4f}\n" if k else f"{d:%Y-%m-%d},\n" for d, v, k in zip(dates, noisy, keep)))
    sec["observations"] = {"discharge": "discharge.csv"}
    sec["calibration"] = {"parameters": ["ddf_ice_mm_per_day_k", "storage_days_ice"], "discharge_sigma_pct": 8.0}
    cfg = firnline.load_config(write_config(tmp_path / "fit.toml", sec))
    res = calibrate(cfg)
    for key, true in (("ddf_ice_mm_per_day_k", 7.6), ("storage_days_ice", 0.8)):
        assert abs(res.value[key] - true) < 2 * res.std_error[key], (key, res.value[key], res.std_error[key])
        assert res.std_error[key] < 0.1 * true
    js = res.to_json()
    assert js["discharge"]["days"] == int(keep.sum())
    assert js["discharge"]["fitted"]["nse"] > js["discharge"]["initial"]["nse"]


def test_storage_constants_need_a_gauge(tmp_path):

    write_dem(tmp_path / "dem.tif", ramp())
    write_station(tmp_path / "station.csv", "2016-10-01", "2018-09-30", 5.0, 5.0)
    sec = base_sections()
    (tmp_path / "g.csv").write_text("glacier,start_date,end_date,balance_mwe,sigma_mwe\n"
                                    "test plane,2016-10-01,2017-09-30,-0.5,0.2\n")
    sec["observations"] = {"glacier_balances": "g.csv"}
    sec["calibration"] = {"parameters": ["storage_days_ice"]}
    cfg = write_config(tmp_path / "c.toml", sec)
    r = run_cli("calibrate", cfg, "--out", tmp_path / "out")
    assert r.returncode == 2 and "storage_days_ice" in r.stderr and "[observations] discharge" in r.stderr


def test_scenarios_write_the_runoff_regimes(tmp_path, monkeypatch):
    import firnline.model as model
    import firnline.scenarios as scenarios
    from firnline.cli import main
    from firnline.runoff import REGIME_COLUMNS

    _with_daily(monkeypatch)
    monkeypatch.setattr(scenarios, "simulate", model.simulate)
    monkeypatch.setattr(model, "kernel_gives_daily", lambda: True)
    write_dem(tmp_path / "dem.tif", ramp())
    dates = pd.date_range("2016-10-01", "2018-09-30", freq="D")
    t = 8.0 - 10.0 * np.cos(2 * np.pi * (dates.day_of_year.to_numpy() - 15) / 365.0)
    write_station(tmp_path / "station.csv", "2016-10-01", "2018-09-30", np.round(t, 1), 2.0)
    cfg = write_config(tmp_path / "c.toml", base_sections(station_elevation=2500.0))
    out = tmp_path / "sweep"
    assert main(["scenarios", str(cfg), "--warming", "2", "--out", str(out), "--quiet"]) == 0
    reg = pd.read_csv(out / "scenario_runoff_monthly.csv")
    assert list(reg.columns) == REGIME_COLUMNS
    cat = reg[reg.region == "catchment"]
    assert set(cat.warming_k) == {0.0, 2.0} and len(cat) == 24
    jul = cat[cat.month == 7].set_index("warming_k")
    assert jul.loc[2.0, "ice_melt_mm"] > jul.loc[0.0, "ice_melt_mm"]       # the stand-in melts more when warmer
    assert (out / "runoff_regimes.png").exists()
    assert "runoff_regimes.png" in (out / "scenarios_report.html").read_text()
