"""Runoff through `firnline run` and `firnline scenarios`: the gauge file's checks (exit 2,
culprit named, no output) and the wiring from the kernel's daily region volumes to runoff.csv,
runoff_monthly.csv, runoff.nc, the hydrograph, run.json, the console and the regimes."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from conftest import base_sections, ramp, write_config, write_dem, write_station


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


def test_run_writes_runoff_files_and_reports_the_gauge(tmp_path, capsys):
    from firnline.cli import main

    dates = pd.date_range("2016-12-01", "2018-09-30", freq="D")
    q = 0.5 + 0.4 * np.sin(np.arange(dates.size) / 58.0)
    text = "date,discharge_m3s\n" + "".join(f"{d:%Y-%m-%d},{v:.3f}\n" for d, v in zip(dates, q))
    cfg = case(tmp_path, text)
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


def test_scenarios_write_the_runoff_regimes(tmp_path):
    from firnline.cli import main
    from firnline.runoff import REGIME_COLUMNS

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
    assert jul.loc[2.0, "ice_melt_mm"] > jul.loc[0.0, "ice_melt_mm"]       # more ice melt when warmer
    assert (out / "runoff_regimes.png").exists()
    assert "runoff_regimes.png" in (out / "scenarios_report.html").read_text()
