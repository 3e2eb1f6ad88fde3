"""Runoff through `firnline run`: the gauge file's checks (exit 2, culprit named, no output)
and the wiring from the kernel's daily region volumes to runoff.csv, runoff_monthly.csv,
runoff.nc, the hydrograph, run.json and the console."""

from __future__ import annotations

import dataclasses
import json
import subprocess
import sys
from pathlib import Path

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
    ("date,discharge_m3s\n2017-01-01,1.0\n2017-01-01,2.0\n", "discharge.csv, line 3: the date 2017-01-01 appears twice"),
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
    """Stand in for the kernel's daily seam (issue 11): KernelResult.daily of m3 per day,
    made here from the per-year sums spread evenly over each year's days, so that the
    wiring (routing, files, figure, scores) is exercised end to end."""
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

    def simulate(setup, *a, **k):
        kres = real(setup, *a, **k)
        f = setup.forcing
        n_g = len(setup.glaciers.names)
        area = np.full(n_g + 2, setup.grid.cell_area_m2 * setup.cells.size)
        daily = np.zeros((kres.sums.shape[2], f.n_days, n_g + 2, len(Daily)))
        melt = (kres.snow_melt_winter + kres.snow_melt_summer)[:, :, :].sum(axis=2)     # (scen, years) mm*cells
        ice = (kres.ice_melt_winter + kres.ice_melt_summer).sum(axis=2)
        days = np.bincount(f.year_index, minlength=len(f.years))
        cell_area = setup.grid.cell_area_m2
        for y in range(len(f.years)):
            d = f.year_index == y
            daily[:, d, :, Daily.SNOW_MELT] = (melt[:, y] * cell_area * 1e-3 / days[y])[:, None, None]
            daily[:, d, :, Daily.ICE_MELT] = (ice[:, y] * cell_area * 1e-3 / days[y])[:, None, None]
        daily[..., Daily.RELEASED_SNOW] = daily[..., Daily.SNOW_MELT]
        daily[..., Daily.RELEASED_ICE] = daily[..., Daily.ICE_MELT]
        return WithDaily(kres, daily, area)

    monkeypatch.setattr(model, "simulate", simulate)
    monkeypatch.setattr(kernel, "Daily", Daily, raising=False)


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
