"""End to end through the kernel's cell mode: several stations and a gridded file against one station."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from pyproj import CRS

import firnline
from conftest import base_sections, ramp, write_config, write_dem, write_station
from firnline.cli import main

Z_ST = 2000.0
LAPSE = -0.0065   # ICAO Standard Atmosphere / ISO 2533, K m-1
GRAD = 0.0003     # the default precipitation gradient, m-1


def record():
    d = pd.date_range("2016-10-01", "2018-09-30", freq="D")
    rng = np.random.default_rng(8)
    t = 1 + 8 * np.sin(2 * np.pi * (np.arange(d.size) - 100) / 365.25) + rng.normal(0, 3, d.size)
    p = rng.gamma(0.6, 8, d.size)
    return d, np.round(t, 1), np.round(p, 1)


def one_station(tmp_path):
    write_dem(tmp_path / "dem.tif", ramp(30, 4, 3300.0, 2000.0))
    d, t, p = record()
    write_station(tmp_path / "station.csv", t=t, p=p)
    return write_config(tmp_path / "one.toml", base_sections(Z_ST))


def sections(climate):
    sec = base_sections(Z_ST)
    sec["climate"] = climate
    return sec


def test_two_lapse_consistent_stations_give_the_one_station_result(tmp_path):
    one = firnline.run(firnline.load_config(one_station(tmp_path)))
    d, t, p = record()
    z2 = 2800.0
    pd.DataFrame({"date": d.strftime("%Y-%m-%d"), "temperature_c": t + LAPSE * (z2 - Z_ST),
                  "precipitation_mm": p * (1 + GRAD * (z2 - Z_ST))}).to_csv(tmp_path / "high.csv", index=False)
    (tmp_path / "stations.csv").write_text(f"station,x,y,elevation_m,file\nlow,600010,5149000,{Z_ST},station.csv\n"
                                           f"high,600190,5148600,{z2},high.csv\n")
    cfg = firnline.load_config(write_config(tmp_path / "two.toml", sections({"stations": "stations.csv"})))
    two = firnline.run(cfg)
    np.testing.assert_allclose(two.summary.annual_balance_mwe, one.summary.annual_balance_mwe, atol=2e-4)
    np.testing.assert_allclose(two.summary.ela_m, one.summary.ela_m, atol=1.0)


@pytest.mark.parametrize("units", ["degC", "K"])
def test_gridded_uniform_field_at_the_station_elevation_gives_the_one_station_result(tmp_path, units):
    """A grid holding the station record everywhere, surface_altitude = the station elevation,
    in degC and mm/day or in K and kg m-2 s-1 (86400 s per day; common practice): the one-station
    result to rounding."""
    one = firnline.run(firnline.load_config(one_station(tmp_path)))
    d, t, p = record()
    xs = np.arange(599000.0, 602000.0, 1000.0)
    ys = np.array([5151000.0, 5150000.0, 5149000.0, 5148000.0, 5147000.0])
    shape = (d.size, ys.size, xs.size)
    tv = t + (273.15 if units == "K" else 0.0)
    pv = p / 86400.0 if units == "K" else p
    gm = {"grid_mapping": "crs"}
    ds = xr.Dataset({"tas": (("time", "y", "x"), np.broadcast_to(tv[:, None, None], shape),
                             {"standard_name": "air_temperature", "units": units, **gm}),
                     "pr": (("time", "y", "x"), np.broadcast_to(pv[:, None, None], shape),
                            {"standard_name": "precipitation_flux",
                             "units": "kg m-2 s-1" if units == "K" else "mm/day", **gm}),
                     "orog": (("y", "x"), np.full(shape[1:], Z_ST),
                              {"standard_name": "surface_altitude", "units": "m"}),
                     "crs": ((), 0, CRS("EPSG:32632").to_cf())},
                    coords={"time": ("time", np.arange(d.size, dtype=float), {"units": "days since 2016-10-01"}),
                            "y": ("y", ys, {"standard_name": "projection_y_coordinate", "units": "m"}),
                            "x": ("x", xs, {"standard_name": "projection_x_coordinate", "units": "m"})})
    ds.to_netcdf(tmp_path / "forcing.nc", engine="h5netcdf")
    cfg = firnline.load_config(write_config(tmp_path / "grid.toml", sections({"grid_file": "forcing.nc"})))
    grid = firnline.run(cfg)
    np.testing.assert_allclose(grid.summary.annual_balance_mwe, one.summary.annual_balance_mwe, atol=2e-4)
    np.testing.assert_allclose(grid.summary.winter_balance_mwe, one.summary.winter_balance_mwe, atol=2e-4)


@pytest.mark.parametrize("climate,files,words", [
    ({"stations": "stations.csv"}, {"stations.csv": "station,x,y,file\na,1,2,station.csv\n"},
     'stations.csv: no column "elevation_m"'),
    ({"stations": "stations.csv"}, {"stations.csv": "station,x,y,elevation_m,file\na,1,2,2000,gone.csv\n"},
     "'gone.csv' was not found"),
    ({"grid_file": "forcing.nc"}, {"forcing.nc": "not netcdf"}, "forcing.nc: not a readable NetCDF file"),
    ({"grid_file": "forcing.nc", "station_file": "station.csv"}, {}, "exactly one of station_file"),
])
def test_bad_station_tables_and_gridded_files_exit_2(tmp_path, capsys, climate, files, words):
    one_station(tmp_path)
    for name, text in files.items():
        (tmp_path / name).write_text(text)
    cfg = write_config(tmp_path / "bad.toml", sections(climate))
    assert main(["run", str(cfg), "--out", str(tmp_path / "out"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert words in err and "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())


def test_linear_station_forcing_equals_the_blocks_and_asks_blocks_only_for_days_with_a_gap(tmp_path, monkeypatch):
    """The kernel makes the station network's forcing inside its chunks on the days every station
    reports (LINEAR mode) and asks for blocks only on the other days; the balances equal those of
    the block path (forcing rounded to float32 there, so to 1e-5 m w.e.)."""
    from firnline import stations
    d, t, p = record()
    write_dem(tmp_path / "dem.tif", ramp(30, 4, 3300.0, 2000.0))
    write_station(tmp_path / "station.csv", t=t, p=p)
    z2 = 2800.0
    t2 = t + LAPSE * (z2 - Z_ST) + 0.7
    t2[[40, 41, 300]] = np.nan                         # the high station misses three days
    pd.DataFrame({"date": d.strftime("%Y-%m-%d"), "temperature_c": t2,
                  "precipitation_mm": p * (1 + GRAD * (z2 - Z_ST))}).to_csv(tmp_path / "high.csv", index=False)
    (tmp_path / "stations.csv").write_text(f"station,x,y,elevation_m,file\nlow,600010,5149000,{Z_ST},station.csv\n"
                                           f"high,600190,5148600,{z2},high.csv\n")
    sec = sections({"stations": "stations.csv"})
    sec["snow"] = {"spinup_years": 0}
    cfg = firnline.load_config(write_config(tmp_path / "two.toml", sec))
    asked = []
    block = stations.StationCells.block

    def recording(self, a, b):
        asked.extend(range(a, b))
        return block(self, a, b)
    monkeypatch.setattr(stations.StationCells, "block", recording)
    linear = firnline.run(cfg)
    assert sorted(set(asked)) == [40, 41, 300]
    monkeypatch.delattr(stations.StationCells, "linear")
    asked.clear()
    blocks = firnline.run(cfg)
    assert len(set(asked)) == len(d)
    np.testing.assert_allclose(linear.summary.annual_balance_mwe, blocks.summary.annual_balance_mwe, atol=1e-5)
    np.testing.assert_allclose(linear.fields["annual_balance"].values, blocks.fields["annual_balance"].values,
                               atol=1e-5, equal_nan=True)


def test_a_station_network_run_a_year_at_a_time_equals_the_whole_record(tmp_path, monkeypatch):
    """Cell-mode forcing (the network's LINEAR days and its block days around a gap) with sliding
    snow, refreezing, firn layers and a spin-up year: the kernel run one balance year at a time,
    its state and work buffers carried over (firnline.tiles.BLOCK_BYTES tiny), gives the maps and
    tables of one pass over the record bit for bit."""
    from firnline import tiles
    from firnline.model import prepare
    d, t, p = record()
    write_dem(tmp_path / "dem.tif", ramp(30, 4, 3300.0, 2000.0))
    write_station(tmp_path / "station.csv", t=t, p=p)
    z2 = 2800.0
    t2 = t + LAPSE * (z2 - Z_ST) + 0.7
    t2[[40, 41, 500]] = np.nan
    pd.DataFrame({"date": d.strftime("%Y-%m-%d"), "temperature_c": t2,
                  "precipitation_mm": p * (1 + GRAD * (z2 - Z_ST))}).to_csv(tmp_path / "high.csv", index=False)
    (tmp_path / "stations.csv").write_text(f"station,x,y,elevation_m,file\nlow,600010,5149000,{Z_ST},station.csv\n"
                                           f"high,600190,5148600,{z2},high.csv\n")
    sec = sections({"stations": "stations.csv"})
    sec["snow"] = {"spinup_years": 1, "redistribution": "gravitational", "refreezing": "cold-content",
                   "firn_years": 3, "min_slide_slope_deg": 10.0}
    cfg = firnline.load_config(write_config(tmp_path / "net.toml", sec))
    setup = prepare(cfg)
    whole = firnline.run(cfg, setup=setup)
    assert whole.kernel is not None and whole.kernel.sums.shape[3] == 2
    monkeypatch.setattr(tiles, "BLOCK_BYTES", 1)
    yearly = firnline.run(cfg, setup=setup)
    assert yearly.kernel is None                      # the record ran in two blocks
    for name in whole.fields.data_vars:
        assert np.array_equal(whole.fields[name].values, yearly.fields[name].values, equal_nan=True), name
    assert np.nanmax(np.abs(whole.fields["redistribution"].values)) > 0
    for table in ("summary", "profiles", "gradients", "water_budget"):
        pd.testing.assert_frame_equal(getattr(whole, table), getattr(yearly, table), check_exact=True)
    np.testing.assert_array_equal(whole.runoff.discharge_m3s, yearly.runoff.discharge_m3s)
