"""Gridded NetCDF-CF forcing: standard names, units, CRS, bilinear placement (no kernel needed).

Variable discovery by standard_name, units attributes and grid mappings follow the
NetCDF Climate and Forecast Metadata Conventions 1.8 (Source: CF 1.8).
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from firnline.errors import InputError
from firnline.gridded import precipitation_factor, read_grid_file, temperature_offset

LAPSE = -0.0065          # ICAO Standard Atmosphere / ISO 2533, K m-1
GRAD = 0.0003
UTM = "EPSG:32632"


def params(lapse=LAPSE, grad=GRAD, factor=1.0):
    return SimpleNamespace(lapse_rate_k_per_m=(lapse,) * 12, precip_gradient_per_m=grad, precip_factor=factor)


def write_grid(path, t, p, zs, xs, ys, start="2016-10-01", t_units="degC", p_units="mm/day",
               p_name="precipitation_flux", projected=True, time_units="days since 2016-10-01", drop=None,
               calendar="standard"):
    nd = t.shape[0]
    time = np.arange(nd, dtype="float64") + (pd.Timestamp(start) - pd.Timestamp("2016-10-01")).days
    if projected:
        dims = ("time", "y", "x")
        coords = {"x": ("x", xs, {"standard_name": "projection_x_coordinate", "units": "m"}),
                  "y": ("y", ys, {"standard_name": "projection_y_coordinate", "units": "m"})}
        gm = {"grid_mapping": "crs"}
    else:
        dims = ("time", "lat", "lon")
        coords = {"lon": ("lon", xs, {"standard_name": "longitude", "units": "degrees_east"}),
                  "lat": ("lat", ys, {"standard_name": "latitude", "units": "degrees_north"})}
        gm = {}
    coords["time"] = ("time", time, {"units": time_units, "calendar": calendar, "standard_name": "time"})
    data = {"tas": (dims, t, {"standard_name": "air_temperature", "units": t_units, **gm}),
            "pr": (dims, p, {"standard_name": p_name, "units": p_units, **gm}),
            "orog": (dims[1:], zs, {"standard_name": "surface_altitude", "units": "m", **gm})}
    ds = xr.Dataset(data, coords=coords)
    if projected:
        from pyproj import CRS
        ds["crs"] = ((), 0, CRS(UTM).to_cf())
    if drop:
        ds = drop(ds)
    ds.to_netcdf(path, engine="h5netcdf")
    return path


def case(tmp_path, nd=730, **kw):
    rng = np.random.default_rng(0)
    xs = np.arange(599000.0, 612000.0, 3000.0)          # 5 points
    ys = np.arange(5140000.0, 5156000.0, 4000.0)[::-1]  # 4 points, north first
    t = rng.normal(0, 6, (nd, ys.size, xs.size))
    p = rng.gamma(0.5, 6, (nd, ys.size, xs.size))
    zs = rng.uniform(1500, 2500, (ys.size, xs.size))
    return xs, ys, t, p, zs


def cells(n=300, seed=2):
    rng = np.random.default_rng(seed)
    return rng.uniform(600000, 611000, n), rng.uniform(5141000, 5151000, n), rng.uniform(1200, 3300, n)


def load(path, x, y, **kw):
    return read_grid_file(path, x, y, np.arange(x.size), UTM, "10-01", "04-30", **kw)


def test_uniform_field_at_the_station_elevation_is_the_one_station_rule(tmp_path):
    """A grid holding the station's record everywhere, with surface_altitude = the station
    elevation, gives T_st + lapse (z - z_st) and P_st * factor * max(0, 1 + g (z - z_st)) —
    the single-station downscaling of firnline.kernel."""
    xs, ys, _, _, _ = case(tmp_path)
    nd = 730
    rng = np.random.default_rng(4)
    ts, ps = rng.normal(1, 7, nd), rng.gamma(0.5, 7, nd)
    shape = (nd, ys.size, xs.size)
    path = write_grid(tmp_path / "f.nc", np.broadcast_to(ts[:, None, None], shape).copy(),
                      np.broadcast_to(ps[:, None, None], shape).copy(), np.full((ys.size, xs.size), 1800.0), xs, ys)
    x, y, z = cells()
    f = load(path, x, y)
    assert list(f.years) == [2017, 2018]
    prov = f.cells_source.cells_provider(z, params(factor=1.1), f.month)
    t, p = prov.block(100, 140)
    np.testing.assert_allclose(t, ts[100:140, None] + LAPSE * (z - 1800.0), atol=2e-5)
    np.testing.assert_allclose(p, ps[100:140, None] * 1.1 * np.maximum(0, 1 + GRAD * (z - 1800.0)),
                               rtol=2e-6, atol=1e-6)


def test_kelvin_and_kg_per_m2_s_equal_degc_and_mm_per_day(tmp_path):
    """K = degC + 273.15 and 1 kg m-2 s-1 = 86400 mm per day (water, 1000 kg m-3; common practice)."""
    xs, ys, t, p, zs = case(tmp_path)
    a = write_grid(tmp_path / "a.nc", t, p, zs, xs, ys)
    b = write_grid(tmp_path / "b.nc", t + 273.15, p / 86400.0, zs, xs, ys, t_units="K", p_units="kg m-2 s-1")
    c = write_grid(tmp_path / "c.nc", t, p, zs, xs, ys, p_name="precipitation_amount", p_units="kg m-2")
    x, y, z = cells()
    out = []
    for path in (a, b, c):
        f = load(path, x, y)
        out.append(f.cells_source.cells_provider(z, params(), f.month).block(0, 365))
    for t_, p_ in out[1:]:
        np.testing.assert_allclose(t_, out[0][0], atol=1e-4)
        np.testing.assert_allclose(p_, out[0][1], rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize("units,name,factor", [
    ("kg m-2 s-1", "precipitation_flux", 86400.0), ("kg m**-2 s**-1", "precipitation_flux", 86400.0),
    ("kg/m2/s", "precipitation_flux", 86400.0), ("mm/day", "precipitation_flux", 1.0),
    ("mm d-1", "precipitation_flux", 1.0), ("m s-1", "precipitation_flux", 86400000.0),
    ("mm h-1", "precipitation_flux", 24.0), ("kg m-2", "precipitation_amount", 1.0),
    ("mm", "precipitation_amount", 1.0), ("m", "precipitation_amount", 1000.0),
])
def test_precipitation_units(units, name, factor):
    """Conversions to mm per day: 86400 s per day, 1 kg m-2 of water = 1 mm (common practice)."""
    assert precipitation_factor(units, name, "pr", "f.nc") == pytest.approx(factor)


@pytest.mark.parametrize("units,name", [("furlongs", "precipitation_flux"), ("mm", "precipitation_flux"),
                                        ("kg m-2 s-1", "precipitation_amount"), ("", "precipitation_flux")])
def test_unknown_precipitation_units_name_the_variable(units, name):
    with pytest.raises(InputError, match="units .* of the precipitation variable 'pr'"):
        precipitation_factor(units, name, "pr", "f.nc")


def test_temperature_units():
    assert temperature_offset("K", "t", "f") == -273.15
    assert temperature_offset("degC", "t", "f") == 0.0
    assert temperature_offset("degree_Celsius", "t", "f") == 0.0
    with pytest.raises(InputError, match="units 'degF' of the temperature variable 't'"):
        temperature_offset("degF", "t", "f")


def test_bilinear_reproduces_a_plane(tmp_path):
    """Bilinear interpolation is exact for a field linear in x and y (flat grid elevation)."""
    xs, ys, _, _, _ = case(tmp_path)
    nd = 365
    X, Y = np.meshgrid(xs, ys)
    plane = 1e-4 * (X - 600000) - 2e-4 * (Y - 5140000)
    t = np.broadcast_to(plane, (nd,) + plane.shape).copy()
    p = np.broadcast_to(plane - plane.min(), (nd,) + plane.shape).copy()
    path = write_grid(tmp_path / "plane.nc", t, p, np.full(plane.shape, 2000.0), xs, ys,
                      start="2016-10-01")
    x, y, _ = cells()
    z = np.full(x.size, 2000.0)
    f = load(path, x, y)
    tt, pp = f.cells_source.cells_provider(z, params(), f.month).block(0, 3)
    want = 1e-4 * (x - 600000) - 2e-4 * (y - 5140000)
    np.testing.assert_allclose(tt[0], want, atol=1e-5)
    np.testing.assert_allclose(pp[2], want - plane.min(), atol=1e-5)


def test_longitude_latitude_grid_without_grid_mapping(tmp_path):
    """Without a grid mapping, longitude/latitude coordinates are taken as WGS 84 (CF 1.8)."""
    from pyproj import Transformer
    nd = 365
    lons = np.array([9.7, 9.8, 9.9, 10.0])
    lats = np.array([46.4, 46.5, 46.6])
    LON, LAT = np.meshgrid(lons, lats)
    t = np.broadcast_to(10 * (LON - 9.8) - 5 * (LAT - 46.5), (nd,) + LON.shape).copy()
    path = write_grid(tmp_path / "ll.nc", t, np.ones_like(t), np.full(LON.shape, 1000.0), lons, lats,
                      projected=False)
    tr = Transformer.from_crs("EPSG:4326", UTM, always_xy=True)
    qlon, qlat = np.array([9.75, 9.93]), np.array([46.45, 46.58])
    x, y = tr.transform(qlon, qlat)
    f = load(path, np.asarray(x), np.asarray(y))
    tt, _ = f.cells_source.cells_provider(np.full(2, 1000.0), params(), f.month).block(0, 1)
    np.testing.assert_allclose(tt[0], 10 * (qlon - 9.8) - 5 * (qlat - 46.5), atol=1e-4)


def test_only_the_window_over_the_dem_is_read(tmp_path):
    """Memory stays bounded: a block reads days x (window of grid points), never the whole grid."""
    xs, ys, t, p, zs = case(tmp_path)
    path = write_grid(tmp_path / "w.nc", t, p, zs, xs, ys)
    x = np.array([599100.0, 601900.0])
    y = np.array([5148100.0, 5151000.0])
    gf = load(path, x, y).cells_source
    tw, pw = gf.read(0, 10)
    assert tw.shape == (10, 4) and pw.shape == (10, 4)     # 2 x 2 of the 4 x 5 points


def test_calendar_and_clipping(tmp_path):
    xs, ys, t, p, zs = case(tmp_path, nd=800)
    path = write_grid(tmp_path / "c.nc", t, p, zs, xs, ys, start="2016-09-01")
    x, y, z = cells(5)
    f = load(path, x, y)
    assert list(f.years) == [2017, 2018] and str(f.dates[0]) == "2016-10-01"
    assert f.cells_source.first_step == 30
    import datetime as dt
    g = load(path, x, y, start=dt.date(2017, 10, 1))
    assert list(g.years) == [2018] and g.cells_source.first_step == 30 + 365


@pytest.mark.parametrize("mutate,words", [
    (dict(drop=lambda ds: ds.drop_vars("orog")), "no variable with the standard_name surface_altitude"),
    (dict(drop=lambda ds: ds.assign(tas=ds.tas.assign_attrs(standard_name="tas"))),
     "no variable with the standard_name air_temperature"),
    (dict(p_units="inches"), "units 'inches' of the precipitation variable 'pr'"),
    (dict(t_units="F"), "units 'F' of the temperature variable 'tas'"),
    (dict(drop=lambda ds: ds.isel(time=[i for i in range(730) if i != 100])), "the day 2017-01-09 is missing"),
    (dict(drop=lambda ds: ds.assign(tas=ds.tas.where(ds.time != 200))),
     "temperature 'tas' has missing values on 2017-04-19"),
    (dict(drop=lambda ds: ds.assign(pr=ds.pr - 5)), "precipitation 'pr' on 2016-10-0"),
    (dict(calendar="noleap"), "calendar 'noleap'"),
    (dict(drop=lambda ds: ds.assign(tas=ds.tas.assign_attrs(grid_mapping="nothere"))),
     "grid mapping variable 'nothere'"),
])
def test_bad_gridded_files_name_the_culprit(tmp_path, mutate, words):
    xs, ys, t, p, zs = case(tmp_path)
    path = write_grid(tmp_path / "bad.nc", t, p, zs, xs, ys, **mutate)
    x, y, _ = cells()
    with pytest.raises(InputError, match=words):
        load(path, x, y)


def test_a_grid_that_does_not_cover_the_dem(tmp_path):
    xs, ys, t, p, zs = case(tmp_path)
    path = write_grid(tmp_path / "small.nc", t, p, zs, xs, ys)
    with pytest.raises(InputError, match="does not cover the DEM: 1 of 2 cells"):
        load(path, np.array([600500.0, 620000.0]), np.array([5145000.0, 5145000.0]))


def test_missing_file_and_not_netcdf(tmp_path):
    with pytest.raises(InputError, match="gridded forcing file not found"):
        load(tmp_path / "none.nc", np.zeros(1), np.zeros(1))
    (tmp_path / "junk.nc").write_text("not a netcdf file")
    with pytest.raises(InputError, match="junk.nc: not a readable NetCDF file"):
        load(tmp_path / "junk.nc", np.zeros(1), np.zeros(1))
