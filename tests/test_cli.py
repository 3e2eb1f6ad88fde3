"""The command line: exit statuses, one-sentence errors, no partial output, every product."""

from __future__ import annotations

import functools
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rasterio

from firnline.cli import main


def run_cli(*args, cwd=None):
    """Run `firnline ARGS` in a subprocess (real exit status, stderr and no traceback)."""
    return subprocess.run([sys.executable, "-m", "firnline", *map(str, args)], capture_output=True,
                          text=True, cwd=cwd)


def outputs(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.rglob("*")) if folder.exists() else []


def test_run_writes_every_contracted_file_on_the_dem_grid(plane_case, tmp_path):
    cfg = plane_case()
    out = tmp_path / "results"
    assert main(["run", str(cfg), "--out", str(out), "--quiet"]) == 0
    names = set(outputs(out))
    for year in (2017, 2018):
        for prefix in ("annual_balance", "winter_balance", "summer_balance", "accumulation", "ablation"):
            assert f"{prefix}_{year}.tif" in names
    for f in ("summary.csv", "profiles.csv", "mean_annual_balance.tif", "run.json"):
        assert f in names
    assert not any(n.startswith(".firnline-staging") for n in names)
    with rasterio.open(tmp_path / "dem.tif") as dem, rasterio.open(out / "annual_balance_2017.tif") as t:
        assert t.crs == dem.crs and t.transform == dem.transform and t.shape == dem.shape
        assert t.dtypes[0] == "float32" and t.nodata == -9999.0
        assert t.compression.name.lower() == "deflate" and t.profile["tiled"]
        assert t.descriptions[0].startswith("annual surface mass balance")
        assert t.units[0] == "m w.e."
        assert "firnline_version" in t.tags() and "caution" in t.tags()
    s = pd.read_csv(out / "summary.csv")
    assert list(s.columns) == ["glacier", "balance_year", "area_km2", "annual_balance_mwe",
                               "winter_balance_mwe", "summer_balance_mwe", "ela_m", "aar", "ela_flag",
                               "ablation_gradient_mwe_per_100m"]   # the extra column of issue 15
    p = pd.read_csv(out / "profiles.csv")
    assert list(p.columns) == ["glacier", "balance_year", "band_bottom_m", "band_top_m", "area_km2",
                               "annual_balance_mwe"]
    info = json.loads((out / "run.json").read_text())
    assert info["firnline_version"] and info["input_sha256"]["dem"]
    g = info["glaciers"]["test plane"]
    assert g["mean_ablation_gradient_mwe_per_100m"] > 0


def test_warming_flag_raises_the_ela(plane_case, tmp_path):
    cfg = plane_case()
    assert main(["run", str(cfg), "--out", str(tmp_path / "a"), "--quiet"]) == 0
    assert main(["run", str(cfg), "--out", str(tmp_path / "b"), "--quiet", "--warming", "1"]) == 0
    a = pd.read_csv(tmp_path / "a" / "summary.csv")
    b = pd.read_csv(tmp_path / "b" / "summary.csv")
    assert (b.ela_m - a.ela_m).mean() == pytest.approx(1 / 0.0065, abs=50)


def test_terrain_writes_slope_and_aspect(plane_case, tmp_path):
    cfg = plane_case()
    out = tmp_path / "terrain"
    assert main(["terrain", str(cfg), "--out", str(out), "--quiet"]) == 0
    with rasterio.open(out / "slope.tif") as s, rasterio.open(out / "aspect.tif") as a:
        assert s.read(1).max() > 0
        asp = a.read(1, masked=True)
        np.testing.assert_allclose(asp.compressed(), 180.0)   # the ramp rises northwards: faces south


def test_version_and_help():
    r = run_cli("--version")
    assert r.returncode == 0 and "firnline" in r.stdout
    for cmd in ("run", "terrain", "demo"):
        r = run_cli(cmd, "--help")
        assert r.returncode == 0 and "usage" in r.stdout.lower()


def _case(builders, tmp_path, sections=None, dem=None, station=None):
    sec = builders.base_sections()
    for k, v in (sections or {}).items():
        sec.setdefault(k, {}).update(v)
    if dem is None:
        builders.write_dem(tmp_path / "dem.tif", builders.ramp())
    else:
        dem(tmp_path / "dem.tif")
    if station is None:
        builders.write_station(tmp_path / "station.csv")
    else:
        station(tmp_path / "station.csv")
    return builders.write_config(tmp_path / "case.toml", sec)


def _no_crs(path):
    with rasterio.open(path, "w", driver="GTiff", width=4, height=4, count=1, dtype="float32") as d:
        d.write(np.ones((4, 4), "float32"), 1)


def _station_gap(builders, path):
    builders.write_station(path)
    lines = path.read_text().splitlines()
    path.write_text("\n".join(lines[:30] + lines[31:]) + "\n")


def _station_text(builders, path):
    builders.write_station(path)
    lines = path.read_text().splitlines()
    lines[10] = lines[10].rsplit(",", 2)[0] + ",warm,1.0"
    path.write_text("\n".join(lines) + "\n")


@pytest.mark.parametrize("kind,words", [
    ("typo", 'unknown key "ddf_snow" in [melt]'),
    ("negative", "ddf_ice_mm_per_day_k must be a number >= 0"),
    ("snow_rain", "snow threshold"),
    ("lapse", "inversion"),
    ("band", "band_width_m must be a number >= 1"),
    ("no_crs", "no coordinate reference system"),
    ("not_raster", "not a raster"),
    ("gap", "no row for 2016-10-30"),
    ("text", "line 11"),
    ("missing_dem", "DEM file not found"),
])
def test_bad_input_exits_2_with_one_sentence_and_no_output(builders, tmp_path, kind, words):
    sections, dem, station = {}, None, None
    if kind == "typo":
        sections = {"melt": {"ddf_snow": 3.0}}
    elif kind == "negative":
        sections = {"melt": {"ddf_ice_mm_per_day_k": -6.0}}
    elif kind == "snow_rain":
        sections = {"downscaling": {"snow_rain_range_c": [3.0, 1.0]}}
    elif kind == "lapse":
        sections = {"downscaling": {"lapse_rate_k_per_m": 0.02}}
    elif kind == "band":
        sections = {"balance": {"band_width_m": 0}}
    elif kind == "no_crs":
        dem = _no_crs
    elif kind == "not_raster":
        dem = lambda p: p.write_text("this is not a DEM")  # noqa: E731
    elif kind == "gap":
        station = functools.partial(_station_gap, builders)
    elif kind == "text":
        station = functools.partial(_station_text, builders)
    elif kind == "missing_dem":
        sections = {"dem": {"path": "elsewhere.tif"}}
    cfg = _case(builders, tmp_path, sections, dem, station)
    r = run_cli("run", cfg, "--out", tmp_path / "out")
    assert r.returncode == 2, r.stderr
    assert words in r.stderr
    assert "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
    assert outputs(tmp_path / "out") == []


def test_failure_while_writing_leaves_nothing(plane_case, tmp_path, monkeypatch):
    """A crash in the middle of writing removes every file written so far."""
    import firnline.products as products

    cfg = plane_case()
    calls = {"n": 0}
    real = products.write_geotiff

    def flaky(*a, **k):
        calls["n"] += 1
        if calls["n"] == 3:
            raise OSError("disk full")
        return real(*a, **k)
    monkeypatch.setattr(products, "write_geotiff", flaky)
    assert main(["run", str(cfg), "--out", str(tmp_path / "out"), "--quiet"]) == 1
    assert outputs(tmp_path / "out") == []


@pytest.mark.parametrize("flag,value,words", [("--warming", "nan", "finite"),
                                              ("--precip-change", "-100", "above -100")])
def test_bad_scenario_flags_of_run_exit_2(plane_case, tmp_path, flag, value, words):
    r = run_cli("run", plane_case(), "--out", tmp_path / "out", flag, value)
    assert r.returncode == 2 and words in r.stderr and "Traceback" not in r.stderr
    assert outputs(tmp_path / "out") == []
