"""From the kernel's daily water volumes per region to runoff.csv, runoff_monthly.csv and
the regime; the [runoff] config rows; gauge scores.

The kernel's daily region volumes (``KernelResult.daily``, (n_scen, n_days, n_regions, n_terms)
m3 per day, terms named by the IntEnum ``kernel.Daily``) are stood in for by small synthetic
arrays indexed by conftest's ``Daily`` (checked there to match the kernel's names).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from conftest import Daily, write_outlines
from firnline import parameters
from firnline.errors import InputError
from firnline.observations import parse_table
from firnline.runoff import (
    DAILY_COLUMNS,
    DEFAULT_STORAGE_DAYS,
    MONTHLY_COLUMNS,
    RESERVOIRS,
    check_discharge,
    daily_table,
    discharge_sigma_m3s,
    gauge_scores,
    glacier_ice_share,
    monthly_table,
    regime,
    runoff_series,
)

REGIONS = ("north", "south", "ice_free", "catchment")
AREA = np.array([4.0e6, 1.0e6, 81.4e6, 86.4e6])
K = tuple(DEFAULT_STORAGE_DAYS[n] for n in RESERVOIRS)


def synthetic(n_days=3 * 365 + 1, seed=3):
    """Daily volumes (m3) of two glaciers, the ice-free rest and the catchment (their sum)."""
    rng = np.random.default_rng(seed)
    v = np.zeros((n_days, 4, len(Daily)))
    doy = np.arange(n_days) % 365
    summer = np.clip(np.sin((doy - 180) / 365 * 2 * np.pi + np.pi / 2), 0, None)
    for r in range(3):
        a = AREA[r]
        v[:, r, Daily.RAIN] = rng.gamma(0.3, 3.0, n_days) * a * 1e-3
        v[:, r, Daily.SNOW_MELT] = 8.0 * summer * a * 1e-3
        v[:, r, Daily.REFREEZING] = 0.5 * summer * a * 1e-3
        if r < 2:
            v[:, r, Daily.FIRN_MELT] = 2.0 * summer**2 * a * 1e-3
            v[:, r, Daily.ICE_MELT] = 12.0 * summer**3 * a * 1e-3
            v[:, r, Daily.RELEASED_SNOW] = v[:, r, Daily.SNOW_MELT] - v[:, r, Daily.REFREEZING]
            v[:, r, Daily.RELEASED_FIRN] = v[:, r, Daily.FIRN_MELT]
            v[:, r, Daily.RELEASED_ICE] = v[:, r, Daily.ICE_MELT] + v[:, r, Daily.RAIN]
        else:
            v[:, r, Daily.RELEASED_GROUND] = (v[:, r, Daily.SNOW_MELT] - v[:, r, Daily.REFREEZING]
                                              + v[:, r, Daily.RAIN])
    v[:, 3] = v[:, :3].sum(axis=1)
    dates = np.arange(np.datetime64("2016-10-01"), np.datetime64("2016-10-01") + n_days)
    return v, dates


def test_one_mm_per_day_over_86_4_km2_released_steadily_is_one_cubic_metre_per_second():
    # common practice (arithmetic): 1e-3 m * 86.4e6 m2 / 86400 s = 1 m3 s-1; a steady release
    # leaves every linear reservoir at the same rate it enters (Baker et al., 1982).
    n = 400
    v = np.zeros((n, 1, len(Daily)))
    v[:, 0, Daily.RELEASED_GROUND] = 1e-3 * 86.4e6
    s = runoff_series(v, Daily, ["catchment"], [86.4e6], np.arange(n) + np.datetime64("2020-01-01"), K)
    assert s.discharge_m3s[0, -1] == pytest.approx(1.0, rel=1e-9)
    assert s.mm["released_mm"][0] == pytest.approx(np.ones(n), rel=1e-12)


def test_routed_volume_is_released_volume_plus_storage_change_in_every_region_and_reservoir():
    v, dates = synthetic()
    s = runoff_series(v, Daily, REGIONS, AREA, dates, K)
    released = np.stack([v[:, :, Daily[t]].T * 1e3 / AREA[:, None] for t in
                         ("RELEASED_SNOW", "RELEASED_FIRN", "RELEASED_ICE", "RELEASED_GROUND")], axis=1)
    lhs = s.routed_mm.sum(axis=2)
    rhs = released.sum(axis=2) + s.storage_start_mm - s.storage_end_mm
    assert np.allclose(lhs, rhs, rtol=1e-12, atol=1e-9)
    # discharge (m3 s-1) is the routed depth over the region's area per second
    assert np.allclose(s.discharge_m3s, s.routed_mm.sum(axis=1) * 1e-3 * AREA[:, None] / 86400.0, rtol=1e-12)
    # the catchment's series is the sum of its parts (the reservoirs are linear)
    assert np.allclose(s.discharge_m3s[3], s.discharge_m3s[:3].sum(axis=0), rtol=1e-10)


def test_reservoirs_start_spun_up_from_the_first_year():
    """Spin-up: starting storage = end storage after routing the first 365 days from empty, so
    a record that repeats one year exactly gives the same discharge in the first and second year."""
    v, dates = synthetic(730)
    v[365:] = v[:365]
    s = runoff_series(v, Daily, REGIONS, AREA, dates, K)
    assert np.allclose(s.discharge_m3s[:, :365], s.discharge_m3s[:, 365:], rtol=1e-9, atol=1e-12)
    empty = runoff_series(v, Daily, REGIONS, AREA, dates, K, spinup_days=0)
    assert not empty.storage_start_mm.any()
    assert np.allclose(empty.discharge_m3s[:, 400:], s.discharge_m3s[:, 400:], rtol=1e-4)


def test_runoff_csv_columns_regions_and_values():
    v, dates = synthetic()
    s = runoff_series(v, Daily, REGIONS, AREA, dates, K)
    t = daily_table(s)
    assert list(t.columns) == DAILY_COLUMNS                     # DESIGN.md
    assert list(t.region.unique()) == ["north", "south", "catchment"]
    north = t[t.region == "north"]
    assert north.date.iloc[0] == "2016-10-01" and len(north) == len(dates)
    assert np.allclose(north.rain_mm, v[:, 0, Daily.RAIN] * 1e3 / AREA[0])
    assert np.allclose(north.released_mm, v[:, 0, Daily.RELEASED_SNOW:].sum(axis=1) * 1e3 / AREA[0])


def test_monthly_table_sums_the_days_of_each_month_and_balance_year():
    v, dates = synthetic()
    s = runoff_series(v, Daily, REGIONS, AREA, dates, K)
    m = monthly_table(s, "10-01")
    d = daily_table(s)
    assert list(m.columns) == MONTHLY_COLUMNS
    first = m[(m.region == "catchment")].iloc[0]
    assert (first.balance_year, first.year, first.month, first.days) == (2017, 2016, 10, 31)
    cat = d[d.region == "catchment"]
    assert first.rain_mm == pytest.approx(cat.rain_mm.iloc[:31].sum(), rel=1e-12)
    assert first.discharge_m3s == pytest.approx(cat.discharge_m3s.iloc[:31].mean(), rel=1e-12)
    # balance years end in September: September 2017 is still 2017, October 2017 is 2018
    assert set(m[(m.year == 2017) & (m.month == 9)].balance_year) == {2017}
    assert set(m[(m.year == 2017) & (m.month == 10)].balance_year) == {2018}
    # monthly sums add up to the record
    assert m[m.region == "south"].released_mm.sum() == pytest.approx(d[d.region == "south"].released_mm.sum())
    # the glacier-ice share is a share, and zero where no glacier ice melts
    assert ((m.glacier_ice_share >= 0) & (m.glacier_ice_share <= 1)).all()
    assert m[m.region == "north"].glacier_ice_share.max() > 0.2


def test_glacier_ice_share_is_routed_ice_melt_over_routed_discharge():
    """Only ice melt: the share is 1 after the reservoirs filled; ice melt plus an equal steady rain
    on bare ice (both into the ice reservoir): 1/2."""
    n = 200
    v = np.zeros((n, 1, len(Daily)))
    v[:, 0, Daily.ICE_MELT] = 1000.0
    v[:, 0, Daily.RELEASED_ICE] = 1000.0
    dates = np.arange(n) + np.datetime64("2020-10-01")
    s = runoff_series(v, Daily, ["g"], [1e6], dates, K)
    assert s.glacier_ice_share[0, -1] == pytest.approx(1.0, rel=1e-12)
    v[:, 0, Daily.RAIN] = 1000.0
    v[:, 0, Daily.RELEASED_ICE] = 2000.0
    s = runoff_series(v, Daily, ["g"], [1e6], dates, K)
    assert s.glacier_ice_share[0, -1] == pytest.approx(0.5, rel=1e-12)
    assert glacier_ice_share(0.0, 0.0) == 0.0


def test_regime_averages_complete_balance_years_only():
    v, dates = synthetic(3 * 365 + 40)
    s = runoff_series(v, Daily, REGIONS, AREA, dates, K)
    m = monthly_table(s, "10-01")
    r = regime(m)
    cat = r[r.region == "catchment"].set_index("month")
    assert len(cat) == 12 and set(cat.years) == {3}
    mm = m[(m.region == "catchment") & (m.balance_year <= 2019)]
    july = mm[mm.month == 7]
    assert cat.loc[7, "ice_melt_mm"] == pytest.approx(july.ice_melt_mm.mean())
    assert cat.loc[7, "discharge_m3s"] == pytest.approx(np.average(july.discharge_m3s, weights=july.days))


def test_gauge_scores_over_the_overlapping_days():
    dates = np.arange(np.datetime64("2020-01-01"), np.datetime64("2020-01-11"))
    sim = np.arange(10, dtype=float) + 1.0
    text = "date,discharge_m3s\n" + "".join(
        f"{d},{'' if i == 4 else sim[i]}\n" for i, d in enumerate(dates[2:], start=2)) + "2020-01-20,5.0\n"
    obs = check_discharge(parse_table(text, "q.csv"))
    sc = gauge_scores(dates, sim, obs)
    # a perfect fit on the 7 overlapping days (2 before the gauge, 1 gap): NSE = KGE = 1, no volume error
    assert sc["days"] == 7 and sc["first_day"] == "2020-01-03" and sc["last_day"] == "2020-01-10"
    assert sc["nse"] == pytest.approx(1.0) and sc["kge"] == pytest.approx(1.0)
    assert sc["volume_error"] == pytest.approx(0.0)
    late = check_discharge(parse_table("date,discharge_m3s\n2021-05-01,3.0\n", "late.csv"))
    with pytest.raises(InputError, match="late.csv.*no value on a modelled day"):
        gauge_scores(dates, sim, late)


def test_discharge_sigma_is_relative_to_the_flow_level_with_a_low_flow_floor():
    q = np.array([0.0, 1.0, 10.0, np.nan, 29.0])          # mean of the values: 10, floor 1
    s = discharge_sigma_m3s(q, 20.0, window_days=1)        # level = the day's own value
    assert np.allclose(s[[0, 1, 2, 4]], [0.2, 0.2, 2.0, 5.8]) and np.isnan(s[3])
    s = discharge_sigma_m3s(q, 20.0, window_days=3)        # centred 3-day means: 0.5, 11/3, 5.5, 19.5, 29
    assert np.allclose(s[[0, 1, 2, 4]], [0.2, 0.2 * 11 / 3, 1.1, 5.8])


def test_runoff_section_in_the_registry_and_config(tmp_path):
    import firnline
    from firnline.config import parse_config

    for name in RESERVOIRS:
        p = parameters.get(f"storage_days_{name}")
        assert p.section == "runoff" and p.unit == "d" and p.default == DEFAULT_STORAGE_DAYS[name]
        assert p.bounds[0] < p.default < p.bounds[1] and p.source
    base = {"dem": {"path": "dem.tif"}, "climate": {"station_file": "s.csv", "station_elevation_m": 1000.0}}
    cfg = parse_config(base, tmp_path)
    assert parameters.storage_days(cfg) == K and cfg.runoff.catchment is None
    cfg = parse_config({**base, "runoff": {"catchment": "c.gpkg", "storage_days_ice": 1.0},
                        "observations": {"discharge": "q.csv"}}, tmp_path)
    assert cfg.runoff.catchment == (tmp_path / "c.gpkg").resolve()
    assert cfg.observations.discharge == (tmp_path / "q.csv").resolve()
    assert cfg.with_values(storage_days_firn=20.0).runoff.storage_days_firn == 20.0
    assert cfg.runoff.storage_days_ice == 1.0
    with pytest.raises(InputError, match=r"\[runoff\] storage_days_snow must be a number >= 0"):
        parse_config({**base, "runoff": {"storage_days_snow": -1}}, tmp_path)
    assert math.isclose(firnline.config.SCHEMA["calibration"]["discharge_sigma_pct"][1], 15.0)


def test_runoff_files_and_cf_time_axis(tmp_path):
    """runoff.csv, runoff_monthly.csv and runoff.nc (CF 1.8: time coordinate with bounds,
    timeSeries feature type, cf_role timeseries_id; NetCDF Climate and Forecast Metadata
    Conventions 1.8, chapters 4.4, 7.1 and 9)."""
    import xarray as xr

    from firnline.outputs import staged
    from firnline.runoff_products import write_run_runoff

    v, dates = synthetic()
    s = runoff_series(v, Daily, REGIONS, AREA, dates, K)
    with staged(tmp_path) as st:
        write_run_runoff(st, s, "10-01", {"title": "test"})
    daily = pd.read_csv(tmp_path / "runoff.csv")
    assert list(daily.columns) == DAILY_COLUMNS
    monthly = pd.read_csv(tmp_path / "runoff_monthly.csv")
    assert list(monthly.columns) == MONTHLY_COLUMNS
    with xr.open_dataset(tmp_path / "runoff.nc", decode_times=False) as ds:
        assert ds.attrs["featureType"] == "timeSeries" and ds.attrs["Conventions"] == "CF-1.8"
        t = ds["time"]
        assert t.attrs["standard_name"] == "time" and t.attrs["bounds"] == "time_bounds"
        assert t.attrs["units"] == "days since 1970-01-01 00:00:00"
        first = (np.datetime64("2016-10-01") - np.datetime64("1970-01-01")).astype(int)
        assert float(t[0]) == first + 0.5 and list(ds["time_bounds"][0].values) == [first, first + 1]
        assert ds["region_name"].attrs["cf_role"] == "timeseries_id"
        assert [str(x) for x in ds["region_name"].values] == list(REGIONS)
        assert np.allclose(ds["discharge_m3s"].values, s.discharge_m3s)
    with xr.open_dataset(tmp_path / "runoff.nc") as ds:        # decodes as dates
        assert str(ds.time.values[0])[:10] == "2016-10-01"


def test_hydrograph_and_regime_figures(tmp_path):
    from firnline.charts import png_bytes
    from firnline.runoff import scenario_regimes
    from firnline.runoff_products import hydrograph_figure, regime_figure

    v, dates = synthetic()
    s = runoff_series(v, Daily, REGIONS, AREA, dates, K)
    text = "date,discharge_m3s\n" + "".join(f"{d},{q * 1.1:.3f}\n" for d, q in zip(dates[::2], s.discharge_m3s[3, ::2]))
    obs = check_discharge(parse_table(text, "q.csv"))
    sc = gauge_scores(dates, s.discharge_m3s[3], obs)
    png = png_bytes(hydrograph_figure(s, "10-01", obs, sc, site="Test valley"))
    (tmp_path / "hydrograph.png").write_bytes(png)
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    v2 = v.copy()
    v2[:, :, Daily.ICE_MELT] *= 1.5
    v2[:, :, Daily.RELEASED_ICE] += 0.5 * v[:, :, Daily.ICE_MELT]
    s2 = runoff_series(v2, Daily, REGIONS, AREA, dates, K)
    reg = scenario_regimes([("reference", 0.0, 0.0, s), ("+2 K", 2.0, 0.0, s2)], "10-01")
    from firnline.runoff import REGIME_COLUMNS
    assert list(reg.columns) == REGIME_COLUMNS
    jul = reg[(reg.region == "catchment") & (reg.month == 7)].set_index("scenario")
    assert jul.loc["+2 K", "glacier_ice_share"] > jul.loc["reference", "glacier_ice_share"]
    png = png_bytes(regime_figure(reg, "10-01", site="Test valley"))
    (tmp_path / "regimes.png").write_bytes(png)


def test_catchment_polygon_weights_cells_by_their_exact_share(tmp_path):
    """Two overlapping polygons in UTM 32N over a 10 x 10 grid of 100 m cells: their union
    counts once; a polygon edge through the middle of a column gives that column 0.5
    (exact area shares, as for glacier outlines)."""
    import shapely
    from rasterio.transform import from_origin

    from firnline.catchment import catchment_weight

    tr = from_origin(500000.0, 5200000.0, 100.0, 100.0)
    a = shapely.box(500000.0, 5199000.0, 500350.0, 5200000.0)           # columns 0-2 and half of 3
    b = shapely.box(500100.0, 5199500.0, 500250.0, 5200000.0)           # inside a
    path = write_outlines(tmp_path / "c.gpkg", ["x", "y"], [a, b], "GPKG", crs="EPSG:32632")
    valid = np.ones((10, 10), bool)
    cells = np.flatnonzero(valid.ravel())
    w, warn = catchment_weight(path, None, "EPSG:32632", tr, (10, 10), valid, 1e4, cells)
    grid = w.reshape(10, 10)
    assert np.allclose(grid[:, :3], 1.0) and np.allclose(grid[:, 3], 0.5) and not grid[:, 4:].any()
    assert not warn
    with pytest.raises(InputError, match=r"Catchment file .*nothere.gpkg.*does not exist"):
        catchment_weight(tmp_path / "nothere.gpkg", None, "EPSG:32632", tr, (10, 10), valid, 1e4, cells)
