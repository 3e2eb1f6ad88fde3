"""Potential clear-sky direct radiation, its day-of-year table and the on-disk cache."""

import math
import os

import numpy as np
import pandas as pd
import pvlib  # test-only dependency (pyproject [test])
import pytest
from scipy import integrate

from firnline import cache, radiation, solar
from firnline.errors import InputError
from firnline.horizon import horizon_angles
from firnline.radiation import RadiationTable, compute_days, compute_table
from firnline.terrain import slope_aspect


def _cells(n, slope=0.0, aspect=np.nan, elevation=0.0):
    """n cells in one row with open horizons."""
    shape = (1, n)
    return dict(
        elevation_m=np.full(shape, elevation),
        valid=np.ones(shape, dtype=bool),
        slope_deg=np.broadcast_to(np.asarray(slope, dtype=float), shape).copy(),
        aspect_deg=np.broadcast_to(np.asarray(aspect, dtype=float), shape).copy(),
        horizon_rad=np.zeros((8, 1, n), dtype=np.float32),
    )


def test_flat_top_of_atmosphere_matches_fao56_eq21():
    # Source: Allen et al. (1998), FAO-56 Eq. 21 (with Eq. 25), the closed-form 24-hour
    # integral for a horizontal surface, evaluated with the model's own declination and
    # (Rm/R)^2; psi = 1 and no relief reduce Hock's beam to the top of the atmosphere.
    # Measured at latitudes -70..80 on every day: full resolution within 0.7 % wherever
    # Ra > 1 W m-2 and 0.15 W m-2 everywhere; the table (day nodes) within 0.5 % at
    # |latitude| <= 60 (Ra > 5 W m-2) and 0.72 W m-2 everywhere, its largest relative
    # errors where the sun returns after polar night and the curve bends between nodes.
    lats = np.arange(-70.0, 81.0, 5.0)
    days = np.arange(1, 367)
    args = dict(_cells(len(lats)), lat_deg=lats[None, :], lon_deg=0.0, transmissivity=1.0, time_step_minutes=15)
    dec, ecc = solar.day_parameters(days, 0.0)
    ref = solar.toa_daily_horizontal_mj(lats[None, :], dec[:, None], ecc[:, None]) * 1e6 / 86400.0

    full = compute_days(**args, doys=days)
    sunny = ref > 1.0
    assert np.all(np.abs(full - ref)[sunny] / ref[sunny] < 0.01)
    assert np.abs(full - ref).max() < 0.2

    table = compute_table(**args)
    model = np.stack([table.day(d) for d in days])
    mid_lat = (np.abs(lats) <= 60.0)[None, :] & (ref > 5.0)
    assert np.all(np.abs(model - ref)[mid_lat] / ref[mid_lat] < 0.01)
    bright = ref > 50.0
    assert np.all(np.abs(model - ref)[bright] / ref[bright] < 0.01)
    assert np.abs(model - ref).max() < 1.0


def test_fao56_example_8_through_the_model():
    # Source: Allen et al. (1998), FAO-56 Example 8: Ra = 32.2 MJ m-2 d-1 on 3 September
    # (day 246) at 20 deg S. The model gives 31.95 (0.8 % lower): its astronomical
    # declination, 7.45 deg, lies 0.6 deg above FAO's Eq. 24 approximation (6.86 deg).
    table = compute_table(**_cells(1), lat_deg=-20.0, lon_deg=0.0, transmissivity=1.0, time_step_minutes=15)
    ra_mj = table.day(246)[0] * 86400.0 / 1e6
    assert ra_mj == pytest.approx(32.2, rel=0.01)


def test_hock_beam_with_pressure_against_quadrature():
    # Source: Hock (1999), J. Glaciology 45(149), after Oke (1987):
    # I = I0 (Rm/R)^2 psi^(P / (P0 cos Z)) cos(theta); here integrated independently over
    # the hour angle with scipy quad, P from pvlib.atmosphere.alt2pres (ISO 2533 fit).
    lat, doy, psi, z = 46.5, 172, 0.75, 3000.0
    dec, ecc = solar.day_parameters(doy, 8.0)
    p_ratio = pvlib.atmosphere.alt2pres(z) / 101325.0

    def beam(h):
        cos_z = math.sin(math.radians(lat)) * math.sin(dec) + math.cos(math.radians(lat)) * math.cos(dec) * math.cos(h)
        return 1367.0 * ecc * psi ** (p_ratio / cos_z) * cos_z if cos_z > 0 else 0.0

    h_set = math.acos(-math.tan(math.radians(lat)) * math.tan(dec))
    expected = integrate.quad(beam, -h_set, h_set, limit=200)[0] / (2 * math.pi)
    got = compute_days(**_cells(1, elevation=z), lat_deg=lat, lon_deg=8.0, transmissivity=psi,
                       time_step_minutes=10, doys=[doy])[0, 0]
    assert got == pytest.approx(expected, rel=2e-3)


def test_tilted_plane_matches_pvlib_angle_of_incidence():
    # Source: pvlib.irradiance.aoi (angle of incidence on a tilted plane) and
    # pvlib.solarposition.get_solarposition (NREL SPA) for the sun's path on 10 April 2022
    # (day 100 of the reference year); beam after Hock (1999) on the plane.
    lat, lon, tilt, azim, psi = 46.5, 8.6, 35.0, 150.0, 0.75
    times = pd.date_range("2022-04-10", periods=1440, freq="1min", tz="UTC")
    pos = pvlib.solarposition.get_solarposition(times, lat, lon)
    cos_inc = np.cos(np.deg2rad(pvlib.irradiance.aoi(tilt, azim, pos["zenith"], pos["azimuth"]))).to_numpy()
    cos_z = np.cos(np.deg2rad(pos["zenith"].to_numpy()))
    ecc = 1.0 / pvlib.solarposition.nrel_earthsun_distance(times).to_numpy() ** 2
    with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
        beam = np.where((cos_z > 0) & (cos_inc > 0), 1367.0 * ecc * psi ** (1.0 / cos_z) * cos_inc, 0.0)
    expected = beam.mean()
    got = compute_days(**_cells(1, slope=tilt, aspect=azim), lat_deg=lat, lon_deg=lon, transmissivity=psi,
                       time_step_minutes=5, doys=[100])[0, 0]
    assert got == pytest.approx(expected, rel=5e-3)


def _wall_scene(height_m):
    """Flat ground with an east-west wall 5 cells south of the middle row (25 m cells)."""
    z = np.zeros((40, 200))
    z[26:30, :] = height_m
    valid = np.ones(z.shape, dtype=bool)
    hz = horizon_angles(z, valid, 25.0, 72, 20000.0)
    flat = np.zeros(z.shape)
    return dict(elevation_m=z, valid=valid, slope_deg=flat, aspect_deg=np.full(z.shape, np.nan),
                horizon_rad=hz), (20, 100)


def test_cell_under_a_high_wall_is_in_full_shadow_while_the_sun_stays_lower():
    # Source: analytic geometry: the wall's horizon due south is atan(h / d) = 40 deg; at
    # 46.5 N the noon sun (elevation 90 - |lat - declination|, common practice) stays
    # lower from early November to early February and clears it in summer.
    lat = 46.5
    d = 6 * 25.0
    scene, (r, c) = _wall_scene(d * math.tan(math.radians(40.0)))
    days = np.arange(1, 366)
    values = compute_days(**scene, lat_deg=lat, lon_deg=8.0, transmissivity=0.75, time_step_minutes=15, doys=days)
    cell = values[:, r * scene["valid"].shape[1] + c]
    dec, _ = solar.day_parameters(days, 8.0)
    noon_elevation = 90.0 - np.abs(lat - np.rad2deg(dec))
    assert np.all(cell[noon_elevation < 39.0] == 0.0)
    assert np.all(cell[noon_elevation > 45.0] > 0.0)
    open_ground = values[:, 2 * scene["valid"].shape[1] + c]  # far north of the wall
    assert np.all(open_ground > 0.0)
    assert np.all(cell <= open_ground + 1e-3)


def test_east_and_west_slopes_receive_equal_totals_at_the_equinox():
    # Source: symmetry of the sun's path about apparent noon (common practice); the
    # March equinox of 2022 fell on 20 March (day 79).
    n, cell_m = 61, 25.0
    cols = np.arange(n)
    z = np.tile(1500.0 - 0.6 * np.abs(cols - 30) * cell_m, (41, 1))  # a north-south ridge
    z += np.linspace(0.0, 200.0, 41)[:, None]  # tilted to the north, so not symmetric north-south
    slope, aspect = slope_aspect(z, cell_m, cell_m)
    valid = np.ones(z.shape, dtype=bool)
    hz = horizon_angles(z, valid, cell_m, 72, 20000.0)
    day = compute_days(z, valid, slope, aspect, hz, 46.5, 8.0, 0.75, 15, [79])[0].reshape(z.shape)
    np.testing.assert_allclose(day[:, 30 - 10], day[:, 30 + 10], rtol=1e-3)
    np.testing.assert_allclose(day[:, 30 - 25], day[:, 30 + 25], rtol=1e-3)
    assert np.all(aspect[:, 20] > 180.0) and np.all(aspect[:, 40] < 180.0)


@pytest.mark.parametrize("lat, doy, sunny_aspect", [(46.5, 15, 180.0), (-46.5, 196, 0.0)])
def test_sun_facing_beats_flat_beats_shaded_in_midwinter(lat, doy, sunny_aspect):
    # Source: common practice: in mid-winter an equator-facing slope gets more direct
    # radiation than flat ground, which gets more than a pole-facing slope (15 January in
    # the north, 15 July in the south).
    shaded_aspect = (sunny_aspect + 180.0) % 360.0
    cells = _cells(3, slope=[30.0, 0.0, 30.0], aspect=[sunny_aspect, np.nan, shaded_aspect], elevation=2500.0)
    sunny, flat, shaded = compute_days(**cells, lat_deg=lat, lon_deg=0.0, transmissivity=0.75,
                                       time_step_minutes=15, doys=[doy])[0]
    assert sunny > flat > shaded
    assert sunny > 1.5 * flat


def test_grid_rotation_is_taken_from_latitude_and_longitude():
    # A south-up grid (latitude increasing with the row): a slope facing grid north faces
    # true south and must get what a true-south slope gets on a north-up grid.
    rows = np.arange(5)[:, None] * np.ones((1, 3))
    lon = np.full((5, 3), 8.0) + np.arange(3)[None, :] * 1e-3
    shape = (5, 3)
    common = dict(elevation_m=np.zeros(shape), valid=np.ones(shape, dtype=bool),
                  slope_deg=np.full(shape, 30.0), horizon_rad=np.zeros((8, 5, 3), dtype=np.float32),
                  transmissivity=0.75, time_step_minutes=15, doys=[20])
    north_up = compute_days(aspect_deg=np.full(shape, 180.0), lat_deg=46.5 - rows * 1e-3, lon_deg=lon, **common)
    south_up = compute_days(aspect_deg=np.full(shape, 0.0), lat_deg=46.5 + rows * 1e-3, lon_deg=lon[:, ::-1], **common)
    np.testing.assert_allclose(np.sort(north_up[0]), np.sort(south_up[0]), rtol=1e-3)
    scalar = compute_days(aspect_deg=np.full(shape, 180.0), lat_deg=46.5, lon_deg=8.0, **common)
    np.testing.assert_allclose(north_up[0], scalar[0], rtol=2e-3)
    # cells without data may have no coordinates either
    lat_gap, lon_gap = 46.5 - rows * 1e-3, lon.copy()
    lat_gap[2, 1] = lon_gap[2, 1] = np.nan
    gap = dict(common, valid=np.ones(shape, dtype=bool))
    gap["valid"][2, 1] = False
    with_gap = compute_days(aspect_deg=np.full(shape, 180.0), lat_deg=lat_gap, lon_deg=lon_gap, **gap)
    np.testing.assert_allclose(with_gap[0], np.delete(north_up[0], 2 * 3 + 1), rtol=1e-6)


def _relief(n=48, cell_m=25.0):
    y, x = np.mgrid[0:n, 0:n] * cell_m
    z = 2400.0 + 300.0 * np.sin(x / 180.0) * np.cos(y / 230.0) + 0.4 * x
    slope, aspect = slope_aspect(z, cell_m, cell_m)
    valid = np.ones(z.shape, dtype=bool)
    valid[:3, :5] = False
    hz = horizon_angles(z, valid, cell_m, 36, 5000.0)
    return dict(elevation_m=z, valid=valid, slope_deg=slope, aspect_deg=aspect, horizon_rad=hz,
                lat_deg=46.5, lon_deg=8.0, transmissivity=0.75, time_step_minutes=20)


def test_compact_table_against_day_by_day_result():
    # Storage error of day nodes + uint16 against the full day-by-day result on relief.
    # Measured here: mean 0.24 W m-2, 99th percentile 4.7, largest 32 W m-2 (a day when the
    # sun clears a ridge), monthly means within 2.7 W m-2.
    args = _relief()
    table = compute_table(**args)
    full = compute_days(**args, doys=range(1, 367))
    approx = np.stack([table.day(d) for d in range(1, 367)])
    err = np.abs(approx - full)
    assert table.values.dtype == np.uint16 and table.values.shape == (len(table.doy_nodes), args["valid"].sum())
    assert err.mean() < 0.5
    assert np.percentile(err, 99) < 5.0
    # at the nodes only the quantisation is left
    at_nodes = np.abs(approx[table.doy_nodes - 1] - full[table.doy_nodes - 1])
    assert at_nodes.max() <= 0.5 * radiation.STORAGE_SCALE_W_M2 * 1.01
    monthly_full = np.stack([full[s:e].mean(axis=0) for s, e in _month_bounds()])
    assert np.abs(table.monthly_means() - monthly_full).max() < 4.0


def _month_bounds():
    ends = np.cumsum(radiation.DAYS_PER_MONTH)
    return list(zip(ends - radiation.DAYS_PER_MONTH, ends))


def test_table_covers_valid_cells_in_c_order_and_reports_progress():
    args = _relief()
    calls = []
    compute_table(**args, progress=lambda label, i, n: calls.append((i, n)))
    n_total = calls[-1][1]
    assert 1 <= n_total <= 48 and calls == [(i, n_total) for i in range(1, n_total + 1)]
    everywhere = dict(args, valid=np.ones(args["valid"].shape, dtype=bool),
                      horizon_rad=np.nan_to_num(args["horizon_rad"]))
    full = compute_days(**everywhere, doys=[150])[0]
    part = compute_days(**args, doys=[150])[0]
    np.testing.assert_array_equal(part, full[args["valid"].ravel()])


def test_table_band_by_band_from_the_dem_equals_the_table_of_all_horizons(monkeypatch):
    """table_from_terrain holds one band of rows' horizons at a time and gives compute_table's
    table of horizon_angles bit for bit, however the bands fall (here 200-cell kernel bands
    grouped into several horizon bands), on a grid with nodata and a projected latitude field."""
    args = _relief()
    n = args["valid"].shape[0]
    lat = 46.5 + 0.0002 * np.arange(n)[::-1, None] + 0.00001 * np.arange(n)[None, :]
    lon = 8.0 + 0.0003 * np.arange(n)[None, :] - 0.00002 * np.arange(n)[:, None]
    args = dict(args, lat_deg=lat, lon_deg=lon)
    whole = compute_table(**args)
    monkeypatch.setattr(radiation, "KERNEL_BAND_CELLS", 200)
    monkeypatch.setattr(radiation, "MIN_SINE_BAND_BYTES", 0)
    monkeypatch.setattr(radiation, "TABLE_PARTS_PER_BAND", 1 << 40)
    inputs = {k: v for k, v in args.items() if k != "horizon_rad"}
    tile = radiation._tile(args["elevation_m"], args["valid"], args["slope_deg"], args["aspect_deg"],
                           lat, lon, 0.75, 20, 36)
    budget = len(radiation.day_nodes()) * int(args["valid"].sum()) * 2 + 9 * n * n + \
        len(radiation.day_nodes()) * 200 * 4 + (16 << 20) + 15 * (2 * 36 + 4) * n
    groups = radiation.horizon_band_groups((n, n), int(args["valid"].sum()), 36, radiation._kernel_bands(tile),
                                           memory_bytes=budget)
    assert len(groups) >= 3 and all(g[-1][1] - g[0][0] <= 15 for g in groups)
    banded = radiation.table_from_terrain(**inputs, cell_size_m=25.0, n_sectors=36, max_distance_m=5000.0,
                                          memory_bytes=budget)
    np.testing.assert_array_equal(banded.values, whole.values)
    # the kernel's own banding changes nothing either
    np.testing.assert_array_equal(compute_table(**args).values, whole.values)


def test_horizon_sines_are_the_rounded_sine_of_the_horizon_angle():
    """Codes are rint(65535 sin h): within half a code of the float64 sine (closed form), 0 on
    nodata, and a band of rows of SineBands is that of the whole grid's horizons."""
    from firnline.horizon import SINE_LEVELS, SineBands, quantised_sines

    args = _relief(n=40)
    codes = quantised_sines(args["horizon_rad"])
    valid = args["valid"]
    exact = np.sin(args["horizon_rad"].astype(np.float64))[:, valid] * SINE_LEVELS
    assert codes.dtype == np.uint16
    assert np.abs(codes[:, valid] - exact).max() <= 0.5 + 0.01   # + float32 rounding of sin x 65535
    assert (codes[:, ~valid] == 0).all()
    bands = SineBands(args["elevation_m"], valid, (25.0, 30.0), 36, 5000.0)
    whole = quantised_sines(horizon_angles(args["elevation_m"], valid, (25.0, 30.0), 36, 5000.0))
    parts = np.concatenate([bands.band(0, 7), bands.band(7, 8), bands.band(8, 40)], axis=1)
    np.testing.assert_array_equal(parts, whole)


@pytest.mark.parametrize("distance_m", [0.0, 60.0, 300.0, 700.0])
def test_horizon_bands_shorter_than_the_search_equal_the_whole_grid(distance_m):
    """Bands of rows cut each line to the band plus whole search blocks around it; with
    windows shorter than the grid (2 .. 28 cells), terraced relief full of exact ties, nodata
    holes and non-square cells, every band is still the whole grid's, bit for bit."""
    from firnline.horizon import SineBands, quantised_sines

    rng = np.random.default_rng(7)
    ny, nx = 57, 43
    y, x = np.mgrid[0:ny, 0:nx]
    z = np.round(2000.0 + 3.0 * x + 2.0 * y + 40.0 * np.sin(x / 5.0) * np.cos(y / 7.0), -1)
    valid = rng.random((ny, nx)) > 0.05
    whole = quantised_sines(horizon_angles(z, valid, (25.0, 20.0), 24, distance_m))
    bands = SineBands(z, valid, (25.0, 20.0), 24, distance_m)
    edges = [0, 1, 9, 10, 30, 44, 57]
    parts = np.concatenate([bands.band(a, b) for a, b in zip(edges[:-1], edges[1:])], axis=1)
    np.testing.assert_array_equal(parts, whole)


def test_bracket_day_and_means_are_consistent():
    values = np.array([[0, 100], [40, 300], [400, 0]], dtype=np.uint16)
    table = RadiationTable(doy_nodes=np.array([10, 100, 300]), values=values, scale_w_m2=0.5)
    lo, hi, w = table.bracket(55)
    np.testing.assert_array_equal(lo, values[0])   # day 55 lies halfway between nodes 10 and 100
    np.testing.assert_array_equal(hi, values[1])
    assert w == pytest.approx(0.5)
    np.testing.assert_allclose(table.day(55), ((1 - w) * lo + w * hi) * 0.5)
    np.testing.assert_allclose(table.day(100), [20.0, 150.0])
    # wrap-around: day 5 lies between node 300 and node 10 of the next cycle
    lo, hi, w = table.bracket(5)
    np.testing.assert_array_equal(lo, values[2])
    np.testing.assert_array_equal(hi, values[0])
    assert w == pytest.approx((5 + 365 - 300) / (10 + 365 - 300))  # 365-day cycle
    lo, hi, w = table.bracket(366)
    assert w == pytest.approx(66 / 75)
    with pytest.raises(ValueError):
        table.bracket(0)
    with pytest.raises(ValueError):
        table.bracket(367)
    days = np.stack([table.day(d) for d in range(1, 366)])
    monthly = table.monthly_means()
    assert monthly.shape == (12, 2) and monthly.dtype == np.float32
    np.testing.assert_allclose(monthly, [days[s:e].mean(axis=0) for s, e in _month_bounds()], rtol=1e-5)
    np.testing.assert_allclose(table.annual_mean(), days.mean(axis=0), rtol=1e-5)


def test_default_nodes_cover_the_year():
    nodes = radiation.day_nodes()
    assert nodes[0] == 1 and nodes[-1] == 366 and np.all(np.diff(nodes) > 0)
    assert np.diff(nodes).max() <= radiation.NODE_SPACING_DAYS + 1


@pytest.mark.parametrize("key, value", [("transmissivity", 0.0), ("transmissivity", 1.2), ("time_step_minutes", 0)])
def test_bad_settings_raise_input_error(key, value):
    args = dict(_cells(1), lat_deg=46.0, lon_deg=8.0, transmissivity=0.75, time_step_minutes=15)
    args[key] = value
    with pytest.raises(InputError, match=key):
        compute_table(**args)


def test_cache_round_trip(tmp_path):
    args = _relief(n=16)
    table = compute_table(**args)
    key = cache.cache_key(dem_sha256="abc", transmissivity=0.75, time_step_minutes=20)
    assert cache.load_table(tmp_path, key) is None
    path = cache.save_table(tmp_path / "sub", key, table)
    assert path.is_file() and sorted(os.listdir(tmp_path / "sub")) == [path.name]
    back = cache.load_table(tmp_path / "sub", key)
    np.testing.assert_array_equal(back.values, table.values)
    np.testing.assert_array_equal(back.doy_nodes, table.doy_nodes)
    assert back.values.dtype == np.uint16 and back.scale_w_m2 == table.scale_w_m2
    np.testing.assert_array_equal(back.day(200), table.day(200))
    cache.save_horizons(tmp_path, key, args["horizon_rad"])
    np.testing.assert_array_equal(cache.load_horizons(tmp_path, key), args["horizon_rad"])


def test_cache_ignores_broken_or_foreign_files(tmp_path):
    table = RadiationTable(doy_nodes=np.array([1, 366]), values=np.zeros((2, 3), np.uint16), scale_w_m2=0.025)
    key_a = cache.cache_key(dem_sha256="a")
    key_b = cache.cache_key(dem_sha256="b")
    path_a = cache.save_table(tmp_path, key_a, table)
    os.replace(path_a, tmp_path / f"radiation-{key_b}.npz")  # a file under the wrong name
    assert cache.load_table(tmp_path, key_b) is None
    (tmp_path / f"radiation-{key_a}.npz").write_bytes(b"not a zip file")
    assert cache.load_table(tmp_path, key_a) is None


def test_cache_key_changes_with_every_part():
    base = dict(dem_sha256="0f" * 32, transmissivity=0.75, time_step_minutes=15,
                horizon_sectors=72, horizon_distance_m=20000.0)
    key = cache.cache_key(**base)
    assert key == cache.cache_key(**dict(reversed(list(base.items()))))
    assert key == cache.cache_key(**dict(base, transmissivity=np.float64(0.75)))
    changed = [dict(base, dem_sha256="1f" * 32), dict(base, transmissivity=0.7), dict(base, time_step_minutes=10),
               dict(base, horizon_sectors=36), dict(base, horizon_distance_m=15000.0),
               dict(base, extra=None)]
    keys = {cache.cache_key(**parts) for parts in changed}
    assert key not in keys and len(keys) == len(changed)
    arr = np.arange(6.0)
    assert cache.cache_key(lat=arr) != cache.cache_key(lat=arr + 1e-9)
    assert cache.cache_key(lat=arr) == cache.cache_key(lat=arr.copy())
