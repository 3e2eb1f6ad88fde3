"""Maps on a large grid: the views a practitioner expects and never more than a screen's worth
of cells per map; the north arrow against pyproj's meridian convergence."""

from __future__ import annotations

import math

import numpy as np
import pytest
from pyproj import CRS, Proj, Transformer

from firnline.maps import MAX_MAP_CELLS, BalanceMaps, MapData, block_reduce, nice_length, plan_views, true_north
from firnline.page import png_size


def _big_case():
    ny, nx = 3000, 2600
    valid = np.ones((ny, nx), bool)
    ids = np.zeros((ny, nx), np.int32)
    ids[1000:1500, 800:1100] = 1        # a large glacier: 500 x 300 cells
    ids[200:210, 200:210] = 2           # a small one: 10 x 10 cells
    return valid, ids


def test_views_on_a_large_dem():
    valid, ids = _big_case()
    views = plan_views(valid, ids, ["big one", "small"], [4.5, 0.01], "site")
    assert [v.key for v in views] == ["catchment", "big_one"]     # the small glacier stays in the catchment map
    big = views[1]
    assert big.r0 <= 1000 and big.r1 >= 1500 and big.c0 <= 800 and big.c1 >= 1100
    assert (big.r1 - big.r0) < 700                                 # a margin, not the whole DEM


def test_a_small_dem_has_only_the_catchment_map():
    valid = np.ones((300, 320), bool)
    ids = np.zeros((300, 320), np.int32)
    ids[100:200, 100:150] = 1
    ids[20:60, 250:300] = 2
    assert [v.key for v in plan_views(valid, ids, ["a", "b"], [1.0, 0.5], "s")] == ["catchment"]


def test_maps_of_a_large_dem_draw_reduced_arrays():
    valid, ids = _big_case()
    ny, nx = valid.shape
    x = 500000.0 + 10.0 * (np.arange(nx) + 0.5)
    y = 5200000.0 - 10.0 * (np.arange(ny) + 0.5)
    z = np.linspace(3500, 1500, ny)[:, None] + np.zeros((1, nx))
    data = MapData(elevation=z, id_map=ids, x=x, y=y, cell_size_m=(10.0, 10.0), crs=CRS.from_epsg(32632),
                   crs_label="EPSG:32632", names=["big one", "small"], outlines=[None, None])
    bal = np.where(ids > 0, (z - 2500.0) / 500.0, np.nan)
    seasons = {"annual_balance": bal, "winter_balance": bal * 0 + 1.0, "summer_balance": bal - 1.0}
    for view in plan_views(valid, ids, data.names, [4.5, 0.01], "site"):
        m = BalanceMaps(data, view, 3.0, "site")
        png = m.draw("balance year 2020", seasons, {1: [np.array([[x[800], y[1250]], [x[1100], y[1250]]])]})
        for im in m.images:
            assert max(im.get_array().shape) <= MAX_MAP_CELLS      # never more than a screen's worth
        assert png_size(png)[0] == 1200 and len(png) > 10_000
        m.close()


def test_block_reduce_is_a_nan_aware_mean():
    a = np.array([[1.0, 3.0, np.nan], [5.0, np.nan, np.nan]])
    np.testing.assert_array_equal(block_reduce(a, 2), [[3.0, np.nan]])
    assert block_reduce(a, 1) is a


def test_scale_bar_length_and_true_north():
    assert [nice_length(v) for v in (2400.0, 730.0, 100.0, 19.0)] == [2000.0, 500.0, 100.0, 10.0]
    # true north against the meridian convergence of pyproj (PROJ's factors): east of the central
    # meridian of UTM 32N (9 E) grid north lies east of true north, so true north points west of up
    lon, lat = 11.5, 47.0
    xx, yy = Transformer.from_crs(4326, 32632, always_xy=True).transform(lon, lat)
    dx, dy = true_north(CRS.from_epsg(32632), xx, yy)
    gamma = Proj(CRS.from_epsg(32632)).get_factors(lon, lat).meridian_convergence
    assert math.degrees(math.atan2(dx, dy)) == pytest.approx(-gamma, abs=0.01)
    assert gamma > 1.0
