"""Several stations: inverse-distance weighting after elevation reduction (no kernel needed).

Detrended inverse-distance weighting (reduce to a common elevation with the lapse rate,
interpolate, bring back to the cell's elevation) is common practice; see
../shared/REFERENCES.md.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from firnline.errors import InputError
from firnline.stations import StationNetwork, network_forcing, read_network

LAPSE = -0.0065          # ICAO Standard Atmosphere / ISO 2533 lapse rate, K m-1
GRAD = 0.0003
FACTOR = 1.2


def params(lapse=LAPSE, grad=GRAD, factor=FACTOR):
    return SimpleNamespace(lapse_rate_k_per_m=(lapse,) * 12, precip_gradient_per_m=grad, precip_factor=factor)


def network(x, y, z, t, p, power=2.0, regress=False, start="2016-10-01"):
    t, p = np.asarray(t, float), np.asarray(p, float)
    dates = np.arange(np.datetime64(start), np.datetime64(start) + t.shape[0])
    return StationNetwork(names=tuple(f"s{i}" for i in range(len(x))), x_m=np.asarray(x, float),
                          y_m=np.asarray(y, float), elevation_m=np.asarray(z, float), dates=dates,
                          temperature_c=t, precipitation_mm=p, power=power, lapse_from_stations=regress)


def cells(n=500, seed=1):
    rng = np.random.default_rng(seed)
    return rng.uniform(-5000, 15000, n), rng.uniform(-5000, 15000, n), rng.uniform(1000, 3500, n)


def test_linear_field_in_elevation_is_reproduced_at_any_cell():
    """T = a + lapse * z and P = b (1 + g (z - z_low)) at three stations: detrended IDW gives
    exactly that field at every cell, whatever the distances (common practice)."""
    nd = 10
    a = np.linspace(-5, 12, nd)
    b = np.linspace(0, 20, nd)
    zs = np.array([1200.0, 2100.0, 2900.0])
    t = a[:, None] + LAPSE * zs[None, :]
    p = b[:, None] * (1 + GRAD * (zs - zs.min()))[None, :]
    net = network([0, 9000, 3000], [0, 2000, 8000], zs, t, p)
    x, y, z = cells()
    prov = net.cells(x, y, z, params(), np.full(nd, 7))
    tc, pc = prov.block(0, nd)
    assert tc.shape == (nd, z.size) and tc.dtype == np.float32
    np.testing.assert_allclose(tc, a[:, None] + LAPSE * z[None, :], rtol=0, atol=2e-5)
    np.testing.assert_allclose(pc, FACTOR * b[:, None] * (1 + GRAD * (z - zs.min()))[None, :], rtol=2e-6, atol=1e-6)


def test_two_identical_lapse_consistent_stations_equal_one():
    """A second station whose record is the first one carried to its elevation by the same
    lapse rate and gradient changes nothing (to float32 rounding)."""
    rng = np.random.default_rng(3)
    nd = 40
    t1 = rng.normal(2, 6, nd)
    p1 = rng.gamma(0.6, 6, nd)
    z1, z2 = 1500.0, 2600.0
    one = network([100.0], [200.0], [z1], t1[:, None], p1[:, None])
    two = network([100.0, 7000.0], [200.0, -3000.0], [z1, z2],
                  np.column_stack([t1, t1 + LAPSE * (z2 - z1)]),
                  np.column_stack([p1, p1 * (1 + GRAD * (z2 - z1))]))
    x, y, z = cells()
    m = np.full(nd, 1)
    ta, pa = one.cells(x, y, z, params(), m).block(0, nd)
    tb, pb = two.cells(x, y, z, params(), m).block(0, nd)
    np.testing.assert_allclose(tb, ta, rtol=1e-6, atol=1e-5)
    np.testing.assert_allclose(pb, pa, rtol=1e-6, atol=1e-6)


def test_one_station_is_the_kernels_downscaling():
    """One station: T = T_st + lapse (z - z_st), P = P_st * factor * max(0, 1 + g (z - z_st)),
    the single-station rule of firnline.kernel (its module docstring)."""
    nd = 5
    t = np.array([[-3.0], [0.0], [4.5], [10.0], [1.0]])
    p = np.array([[0.0], [3.0], [12.0], [1.0], [40.0]])
    net = network([0.0], [0.0], [1800.0], t, p)
    x, y, z = cells(50)
    z[0] = -3000.0           # far below: the precipitation factor is clipped at zero
    tc, pc = net.cells(x, y, z, params(grad=0.0004), np.full(nd, 3)).block(0, nd)
    np.testing.assert_allclose(tc, t + LAPSE * (z - 1800.0), atol=1e-5)
    np.testing.assert_allclose(pc, p * FACTOR * np.maximum(0, 1 + 0.0004 * (z - 1800.0)), rtol=1e-6, atol=1e-6)


def test_monthly_lapse_rates_follow_the_calendar():
    lapse = tuple(-0.004 - 0.0002 * m for m in range(12))
    net = network([0.0], [0.0], [1000.0], [[0.0], [0.0]], [[1.0], [1.0]])
    prm = SimpleNamespace(lapse_rate_k_per_m=lapse, precip_gradient_per_m=0.0, precip_factor=1.0)
    tc, _ = net.cells(np.array([5.0]), np.array([5.0]), np.array([2000.0]), prm, np.array([1, 7])).block(0, 2)
    np.testing.assert_allclose(tc[:, 0], [lapse[0] * 1000, lapse[6] * 1000], atol=1e-5)


def test_a_missing_value_drops_the_station_out_of_that_day():
    t = np.array([[1.0, 50.0], [2.0, np.nan]])
    p = np.array([[np.nan, 4.0], [3.0, 9.0]])
    net = network([0.0, 1000.0], [0.0, 0.0], [1000.0, 1000.0], t, p)
    tc, pc = net.cells(np.array([10.0]), np.array([0.0]), np.array([1000.0]), params(grad=0.0, factor=1.0),
                       np.array([1, 1])).block(0, 2)
    assert tc[1, 0] == pytest.approx(2.0)     # only station 0 reports on day 1
    assert pc[0, 0] == pytest.approx(4.0)     # only station 1 reports precipitation on day 0
    assert 1.0 < tc[0, 0] < 50.0


def test_blocks_are_the_days_asked_for():
    rng = np.random.default_rng(5)
    nd = 30
    net = network([0, 5000, 900], [0, 100, 7000], [1100, 1900, 2500], rng.normal(0, 5, (nd, 3)),
                  rng.gamma(0.5, 5, (nd, 3)))
    x, y, z = cells(200)
    prov = net.cells(x, y, z, params(), np.full(nd, 4))
    t_all, p_all = prov.block(0, nd)
    t_part, p_part = prov.block(11, 17)
    np.testing.assert_array_equal(t_part, t_all[11:17])
    np.testing.assert_array_equal(p_part, p_all[11:17])


def test_daily_lapse_rate_regressed_on_three_stations():
    """With >= 3 stations the day's lapse rate is the least-squares slope of temperature on
    elevation (common practice); with fewer the configured rate is used."""
    zs = np.array([1000.0, 2000.0, 3000.0])
    gam = np.array([-0.004, -0.008])
    t = 10 + gam[:, None] * zs[None, :]
    t = np.vstack([t, [[np.nan, 2.0, -5.0]]])          # day 2: two stations only
    p = np.ones_like(t)
    net = network([0, 4000, 8000], [0, 3000, 0], zs, t, p, regress=True)
    lapse, n_reg, n_lim = net.daily_lapse_rates((LAPSE,) * 12, np.array([1, 1, 1]), -0.0125, 0.01)
    np.testing.assert_allclose(lapse, [-0.004, -0.008, LAPSE])
    assert (n_reg, n_lim) == (2, 0)
    tc, _ = net.cells(np.array([100.0]), np.array([100.0]), np.array([2500.0]), params(),
                      np.array([1, 1, 1])).block(0, 2)
    np.testing.assert_allclose(tc[:, 0], 10 + gam * 2500.0, atol=1e-4)
    # a steeper-than-possible slope is limited to the allowed range
    wild = network([0, 4000, 8000], [0, 3000, 0], zs, (10 - 0.03 * zs)[None, :], np.ones((1, 3)), regress=True)
    lapse, _, n_lim = wild.daily_lapse_rates((LAPSE,) * 12, np.array([1]), -0.0125, 0.01)
    assert lapse[0] == -0.0125 and n_lim == 1


# ----------------------------------------------------------------------------
# the files
# ----------------------------------------------------------------------------

def write_network(folder, rows, start="2016-10-01", end="2018-09-30", t=None, p=3.0, gaps=None):
    dates = pd.date_range(start, end, freq="D")
    lines = ["station,x,y,elevation_m,file"]
    for i, (name, x, y, z) in enumerate(rows):
        f = f"{name}.csv"
        lines.append(f"{name},{x},{y},{z},{f}")
        tt = (5.0 + LAPSE * (z - 1000.0)) if t is None else t[i]
        df = pd.DataFrame({"date": dates.strftime("%Y-%m-%d"), "temperature_c": tt, "precipitation_mm": p})
        if gaps and name in gaps:
            df = gaps[name](df)
        df.to_csv(folder / f, index=False)
    (folder / "stations.csv").write_text("\n".join(lines) + "\n")
    return folder / "stations.csv"


def read(path, **kw):
    return read_network(path, "date", "temperature_c", "precipitation_mm", None, None, **kw)


def test_network_files_and_calendar(tmp_path):
    path = write_network(tmp_path, [("low", 0, 0, 1000), ("high", 5000, 0, 2500), ("mid", 0, 5000, 1800)],
                         gaps={"high": lambda df: df.drop(index=range(30, 40)),
                               "mid": lambda df: df.assign(temperature_c=df.temperature_c.astype(str)
                                                           .where(df.index != 3, ""))})
    net = read(path, power=3.0)
    assert net.names == ("low", "high", "mid") and net.power == 3.0
    assert np.isnan(net.temperature_c[30:40, 1]).all() and np.isnan(net.temperature_c[3, 2])
    f = network_forcing(net, "10-01", "04-30")
    assert list(f.years) == [2017, 2018] and f.cells_source.temperature_c.shape == (730, 3)
    assert np.isnan(f.temperature_c).all()


def test_a_day_without_any_station_is_an_error_naming_the_date(tmp_path):
    path = write_network(tmp_path, [("a", 0, 0, 1000), ("b", 100, 0, 1100)],
                         gaps={"a": lambda df: df.drop(index=[50]), "b": lambda df: df.drop(index=[50])})
    with pytest.raises(InputError, match="no station has a temperature on 2016-11-20"):
        network_forcing(read(path), "10-01", "04-30")


@pytest.mark.parametrize("edit,words", [
    (lambda s: s.replace("station,x", "name,x"), 'no column "station"'),
    (lambda s: s.replace("b,100,0,1100", "b,east,0,1100"), r"line 3 \(station 'b'\): x 'east' is not a number"),
    (lambda s: s.replace("b,100,0,1100,b.csv", "b,100,0,1100,nowhere.csv"),
     r"station 'b'.*'nowhere.csv' was not found"),
    (lambda s: s.replace("b,100", "a,100"), "station 'a' appears twice"),
    (lambda s: s.replace(",1100,", ",12000,"), "elevation_m 12000 is outside"),
    (lambda s: "station,x,y,elevation_m,file\n", "no rows"),
])
def test_bad_station_tables_name_the_culprit(tmp_path, edit, words):
    path = write_network(tmp_path, [("a", 0, 0, 1000), ("b", 100, 0, 1100)])
    path.write_text(edit(path.read_text()))
    with pytest.raises(InputError, match=words):
        read(path)


def test_bad_station_file_names_file_and_line(tmp_path):
    path = write_network(tmp_path, [("a", 0, 0, 1000), ("b", 100, 0, 1100)],
                         gaps={"b": lambda df: df.assign(precipitation_mm=df.precipitation_mm.astype(str)
                                                         .where(df.index != 7, "lots"))})
    with pytest.raises(InputError, match=r"b.csv, line 9 .*precipitation is 'lots', not a number"):
        read(path)


def test_station_coordinates_are_transformed_from_stations_crs(tmp_path):
    """A station given in longitude/latitude lands where pyproj puts it in UTM 32N."""
    from pyproj import Transformer
    path = write_network(tmp_path, [("a", 9.8, 46.5, 1000)])
    net = read_network(path, "date", "temperature_c", "precipitation_mm", "EPSG:4326", "EPSG:32632")
    x, y = Transformer.from_crs("EPSG:4326", "EPSG:32632", always_xy=True).transform(9.8, 46.5)
    assert net.x_m[0] == pytest.approx(x) and net.y_m[0] == pytest.approx(y)
