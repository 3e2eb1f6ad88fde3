"""The invented Seldra demo: determinism, the files it writes, and plausibility of the invented data.

The numeric bounds on the climate, relief and glacier sizes below are
plausibility bounds on our own invented demo data (the demo scenario asks for
a realistic mid-latitude mountain climate and valley), not outside reference
values.
"""

from __future__ import annotations

import itertools
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rasterio
import shapely
from pyogrio.raw import read
from pyproj import Transformer
from rasterio.enums import Compression
from rasterio.features import rasterize

from firnline import demo
from firnline.errors import InputError

REPO_DEMO = Path(__file__).resolve().parents[1] / "demo_dem"


@pytest.fixture(scope="module")
def dem():
    return demo.make_dem()


@pytest.fixture(scope="module")
def outlines(dem):
    return demo.make_outlines(*dem)


@pytest.fixture(scope="module")
def station():
    return demo.make_station_record()


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    folder = tmp_path_factory.mktemp("seldra")
    return folder, demo.write_demo_inputs(folder)


def _cells(polygon, shape, transform):
    """Cells whose centre lies inside the polygon."""
    return rasterize([polygon], out_shape=shape, transform=transform).astype(bool)


def _read_outlines_in_dem_crs(path):
    meta, _, wkb, fields = read(str(path))
    to_utm = Transformer.from_crs(meta["crs"], demo.DEM_CRS, always_xy=True)

    def project(coords):
        return np.column_stack(to_utm.transform(coords[:, 0], coords[:, 1]))

    names = list(fields[meta["fields"].tolist().index("name")])
    return meta, dict(zip(names, (shapely.transform(g, project) for g in shapely.from_wkb(wkb))))


# --- determinism -----------------------------------------------------------


def test_generators_are_deterministic(dem, outlines, station):
    elevation, transform = dem
    again, transform_again = demo.make_dem()
    assert np.array_equal(elevation, again, equal_nan=True)
    assert transform == transform_again
    pd.testing.assert_frame_equal(station, demo.make_station_record())
    for (name, polygon), (name_again, polygon_again) in zip(outlines, demo.make_outlines(again, transform_again)):
        assert name == name_again
        assert shapely.equals_exact(polygon, polygon_again, tolerance=0.0)


def test_seed_changes_roughness_not_layout(dem, station):
    elevation, _ = dem
    other, _ = demo.make_dem(seed=7)
    both = np.isfinite(elevation) & np.isfinite(other)
    assert np.abs(other[both] - elevation[both]).max() > 5.0  # the seed is used
    assert np.corrcoef(other[both], elevation[both])[0, 1] > 0.9  # on the same valleys and ridges
    assert not demo.make_station_record(seed=7)["temperature_c"].equals(station["temperature_c"])


# --- the DEM ---------------------------------------------------------------


def test_dem_grid_relief_and_nodata(dem):
    elevation, transform = dem
    assert elevation.shape == demo.DEM_SHAPE == (300, 320)
    assert elevation.dtype == np.float32
    assert (transform.a, transform.e, transform.b, transform.d) == (30.0, -30.0, 0.0, 0.0)
    # plausibility bounds on the invented relief: valley floor near the 1200 m station, summits below 3500 m
    low, high = float(np.nanmin(elevation)), float(np.nanmax(elevation))
    assert 1000.0 <= low <= demo.STATION_ELEVATION_M + 100.0
    assert 3300.0 <= high <= 3500.0
    # nodata: some cells, all in the north-west corner
    rows, cols = np.nonzero(np.isnan(elevation))
    assert 100 < rows.size < 2000
    assert np.all(rows + cols < 40)


def test_written_dem_file(dem, written):
    elevation, transform = dem
    _, paths = written
    with rasterio.open(paths["dem"]) as src:
        assert src.crs.to_epsg() == 32632
        assert src.dtypes == ("float32",)
        assert src.nodata == demo.NODATA == -9999.0
        assert src.profile["tiled"] and src.block_shapes == [(256, 256)]
        assert src.compression == Compression.deflate
        assert src.transform == transform
        assert src.units == ("m",)
        values = src.read(1, masked=True)
    assert np.array_equal(values.mask, np.isnan(elevation))
    assert np.array_equal(values.filled(np.nan), elevation, equal_nan=True)


# --- the station record ----------------------------------------------------


def test_station_record_complete(station, written):
    dates = pd.to_datetime(station["date"], format="%Y-%m-%d")
    assert list(station.columns) == ["date", "temperature_c", "precipitation_mm"]
    assert dates.iloc[0] == pd.Timestamp("2016-10-01") and dates.iloc[-1] == pd.Timestamp("2024-09-30")
    assert len(station) == 2922  # eight balance years, two of them with 29 February
    assert (dates.diff().dropna() == pd.Timedelta(days=1)).all()
    values = station[["temperature_c", "precipitation_mm"]].to_numpy()
    assert np.isfinite(values).all()
    assert (station["precipitation_mm"] >= 0.0).all()
    assert np.allclose(values * 10.0, np.round(values * 10.0), atol=1e-6)
    _, paths = written
    pd.testing.assert_frame_equal(pd.read_csv(paths["station"]), station)


def test_station_climate_plausible(station):
    """Plausibility bounds on our invented 1200 m valley climate (not outside reference values)."""
    dates = pd.to_datetime(station["date"])
    t = station["temperature_c"].to_numpy()
    p = station["precipitation_mm"].to_numpy()
    balance_year = dates.dt.year + (dates.dt.month >= 10)
    month = dates.dt.month

    assert 5.0 <= t.mean() <= 6.5
    assert -6.0 <= t[month == 1].mean() <= -2.0
    assert 13.5 <= t[month == 7].mean() <= 17.0
    totals = pd.Series(p).groupby(balance_year.to_numpy()).sum()
    assert 1100.0 <= totals.mean() <= 1500.0
    assert totals.between(800.0, 1800.0).all()

    # day-to-day: anomalies from a 31-day running climatology persist for a few days
    seasonal = pd.Series(t).groupby(dates.dt.day_of_year.to_numpy()).transform("mean")
    anomaly = t - seasonal.rolling(31, center=True, min_periods=1).mean().to_numpy()
    assert 2.0 <= anomaly.std() <= 4.5
    assert 0.55 <= np.corrcoef(anomaly[:-1], anomaly[1:])[0, 1] <= 0.9

    # wet and dry spells: a wet day is more likely after a wet day
    wet = p > 0.0
    assert 0.35 <= wet.mean() <= 0.6
    wet_after_wet = wet[1:][wet[:-1]].mean()
    wet_after_dry = wet[1:][~wet[:-1]].mean()
    assert wet_after_wet > wet_after_dry + 0.2

    # year to year: warm and cool summers, snowy and dry winters
    summer_t = pd.Series(t[month.isin([6, 7, 8])]).groupby(balance_year[month.isin([6, 7, 8])].to_numpy()).mean()
    winter = month.isin([11, 12, 1, 2, 3, 4])
    winter_p = pd.Series(p[winter]).groupby(balance_year[winter].to_numpy()).sum()
    assert summer_t.max() - summer_t.min() >= 1.0
    assert winter_p.max() / winter_p.min() >= 1.3


# --- the outlines ----------------------------------------------------------


def test_outlines_valid_inside_and_apart(dem, outlines):
    elevation, transform = dem
    assert [name for name, _ in outlines] == list(demo.GLACIER_NAMES)
    ny, nx = elevation.shape
    grid = shapely.box(transform.c, transform.f + ny * transform.e, transform.c + nx * transform.a, transform.f)
    for name, polygon in outlines:
        assert polygon.geom_type == "Polygon" and polygon.is_valid and not polygon.is_empty, name
        assert grid.contains(polygon), name
        assert np.isfinite(elevation[_cells(polygon, elevation.shape, transform)]).all(), name
    for (a, pa), (b, pb) in itertools.combinations(outlines, 2):
        assert pa.intersection(pb).area == pytest.approx(0.0, abs=1e-6), (a, b)
    # the nunatak
    assert len(dict(outlines)["north_seldra"].interiors) >= 1


def test_outlines_sizes_elevations_and_slopes(dem, outlines):
    """Plausibility bounds on the invented glaciers."""
    elevation, transform = dem
    expected = {  # name: (area km2 range, lowest at most m, highest at least m)
        "north_seldra": ((6.0, 12.0), 2350.0, 3250.0),
        "kessel": ((0.5, 2.0), 2700.0, 3100.0),
        "tarn": ((0.2, 1.0), 2900.0, 3100.0),
    }
    gy, gx = np.gradient(elevation.astype(float), 30.0)
    slope = np.degrees(np.arctan(np.hypot(gx, gy)))
    for name, polygon in outlines:
        (area_low, area_high), lowest, highest = expected[name]
        assert area_low <= polygon.area / 1e6 <= area_high, name
        cells = _cells(polygon, elevation.shape, transform)
        assert elevation[cells].min() <= lowest and elevation[cells].max() >= highest, name
        assert np.nanmean(slope[cells]) < 30.0, name
        assert np.mean(slope[cells] > 45.0) < 0.05, name


def test_glaciers_face_different_ways(dem, outlines):
    """Mean downslope direction: north_seldra north, kessel east, tarn south."""
    elevation, transform = dem
    d_rows, d_cols = np.gradient(elevation.astype(float), 30.0)
    dz_east, dz_north = d_cols, -d_rows  # rows run southward
    expected = {"north_seldra": 0.0, "kessel": 90.0, "tarn": 180.0}
    for name, polygon in outlines:
        cells = _cells(polygon, elevation.shape, transform)
        aspect = np.degrees(np.arctan2(-dz_east[cells].mean(), -dz_north[cells].mean())) % 360.0
        off = abs((aspect - expected[name] + 180.0) % 360.0 - 180.0)
        assert off < 45.0, (name, aspect)


def test_geojson_is_rfc7946_lonlat(outlines, written):
    _, paths = written
    with open(paths["glaciers"], encoding="utf-8") as f:
        document = json.load(f)
    assert "crs" not in document  # RFC 7946: longitude/latitude, no CRS member
    assert {f["properties"]["name"] for f in document["features"]} == set(demo.GLACIER_NAMES)
    lon, lat = np.array(document["features"][0]["geometry"]["coordinates"][0]).T
    assert 9.0 < lon.min() and lon.max() < 11.0 and 46.0 < lat.min() and lat.max() < 47.0
    meta, back = _read_outlines_in_dem_crs(paths["glaciers"])
    assert meta["crs"] == "EPSG:4326"
    for name, polygon in outlines:
        assert back[name].area == pytest.approx(polygon.area, rel=1e-4), name
        assert back[name].symmetric_difference(polygon).area < 1e-4 * polygon.area, name


# --- the committed files and the writer ------------------------------------


def test_committed_demo_files_match_the_generator(dem, station, outlines):
    elevation, transform = dem
    with rasterio.open(REPO_DEMO / "dem.tif") as src:
        committed = src.read(1, masked=True).filled(np.nan)
        assert src.transform == transform
    assert np.array_equal(np.isnan(committed), np.isnan(elevation))
    assert np.nanmax(np.abs(committed - elevation)) < 1e-3
    committed_station = pd.read_csv(REPO_DEMO / "station.csv")
    assert committed_station["date"].tolist() == station["date"].tolist()
    columns = ["temperature_c", "precipitation_mm"]
    assert np.allclose(committed_station[columns], station[columns], atol=0.051)
    _, back = _read_outlines_in_dem_crs(REPO_DEMO / "glaciers.geojson")
    for name, polygon in outlines:
        assert back[name].area == pytest.approx(polygon.area, rel=1e-3), name
    assert sum(f.stat().st_size for f in REPO_DEMO.iterdir()) < 5 * 1024 * 1024


def test_writer_leaves_only_complete_files(written):
    folder, paths = written
    assert set(paths) == {"dem", "station", "glaciers", "stakes", "glacier_balances", "discharge"}
    assert sorted(p.name for p in folder.iterdir()) == ["dem.tif", "discharge.csv", "glacier_balances.csv",
                                                      "glaciers.geojson", "stakes.csv", "station.csv"]


def test_writer_refuses_a_file_as_folder(tmp_path):
    target = tmp_path / "not_a_folder"
    target.write_text("x")
    with pytest.raises(InputError, match="not_a_folder"):
        demo.write_demo_inputs(target)
