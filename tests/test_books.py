"""The catchment's books close (issue 11): sliding snow, firn, refreezing, spin-up, partial cells.

Kernel-level cases on synthetic terrain; the demo checks use the shared demo run.
"""

from __future__ import annotations

import numpy as np
import pytest

from conftest import constant_record, kernel_params
from firnline import snowslide
from firnline.kernel import (
    COLD_PER_K,
    Calendar,
    Cells,
    Daily,
    Flux,
    Slide,
    State,
    StationForcing,
    run_kernel,
)
from firnline.model import Columns
from firnline.terrain import slope_aspect
from firnline.water_budget import budget_table, column_budget

CELL = 10.0  # m


def years_record(n_years, t, p, winter_days=212):
    """``n_years`` balance years of 365 days of the same daily forcing (arrays of one year)."""
    T = np.tile(np.broadcast_to(t, 365), n_years).astype(float)
    P = np.tile(np.broadcast_to(p, 365), n_years).astype(float)
    doy = np.tile(np.arange(365) + 1, n_years)
    month = np.clip((doy - 1) // 31 + 1, 1, 12)
    year = np.repeat(np.arange(n_years), 365)
    winter = np.tile(np.arange(365) < winter_days, n_years)
    return T, P, month, doy, year, winter


def wall_valley(ny=12, nx=12, wall_deg=50.0, wall_rows=5, z0=2000.0):
    """A flat valley floor (the glacier, rows >= wall_rows) below a uniform wall of ``wall_deg``."""
    rows = np.arange(ny)[:, None] * np.ones((1, nx))
    drop = np.tan(np.radians(wall_deg)) * CELL
    z = np.where(rows < wall_rows, z0 + (wall_rows - rows) * drop, z0)
    return z


def run_on_dem(z, ice_grid, params, T, P, month, doy, year, winter, redistribute=True, z_station=None,
               every=1):
    valid = np.isfinite(z)
    slope, _ = slope_aspect(z, CELL, CELL)
    cells = np.flatnonzero(valid.ravel())
    routing = snowslide.build_routing(z, valid, (CELL, CELL), slope)
    ice = ice_grid.ravel()[cells]
    zc = z.ravel()[cells]
    n = cells.size
    slide = Slide(routing, np.arange(n), np.ones(n), every_days=every) if redistribute else None
    kc = Cells(zc, ice, region=np.where(ice, 0, 1), area_m2=np.full(n, CELL * CELL), n_glaciers=1)
    zs = float(zc.min()) if z_station is None else z_station
    res = run_kernel(kc, Calendar(month, doy, year, winter), StationForcing(T, P, zs), params, slide=slide)
    return res, kc, routing


def books(res, kc):
    terms = column_budget(lambda f: res.year_sum(f)[0], res.storage_start[0], res.storage_end[0])
    return terms, budget_table(terms, kc.area_m2, kc.region_ids(), np.ones(kc.n), ["glacier", "ice_free",
                                                                               "catchment"],
                               range(res.sums.shape[3]))


ON = dict(firn_years=3, holding_fraction=0.05, refreezing="cold-content", cold_days=7.0)


def test_steep_walled_valley_books_close_with_every_process():
    """Closure: residual < 1e-6 of the region's precipitation, per cell accumulation - ablation =
    annual balance, with sliding, refreezing, firn and ice (synthetic record: cold winter, warm
    summer)."""
    z = wall_valley()
    ice = np.zeros_like(z, bool)
    ice[5:, 2:10] = True
    t = np.where(np.arange(365) < 212, -6.0, 4.0) + 2.0 * np.sin(np.arange(365) / 3.0)
    p = np.where(np.arange(365) % 3 == 0, 12.0, 0.0)
    res, kc, _ = run_on_dem(z, ice, kernel_params(snow_c=0.5, rain_c=2.5, **ON), *years_record(4, t, p),
                            every=5)
    terms, table = books(res, kc)
    assert (table.residual_mm.abs() < 1e-6 * table.precipitation_mm).all(), table
    assert table.refreezing_mm.max() > 0 and table.redistribution_out_mm.max() > 0
    assert (table.exported_mm >= 0).all()
    acc = sum(res.year_sum(f)[0] for f in (Flux.SNOWFALL, Flux.REFREEZING)) + np.maximum(
        res.year_sum(Flux.REDISTRIBUTION)[0], 0) * 0
    abl = sum(res.year_sum(f)[0] for f in (Flux.SNOW_MELT, Flux.FIRN_MELT, Flux.ICE_MELT))
    bal = acc - abl + res.year_sum(Flux.REDISTRIBUTION)[0]
    # the per-year balance equals the mass change of snow + firn + ice (liquid water aside)
    dmass = (np.diff(np.concatenate([res.storage_start[0][None], res.storage_end[0]]), axis=0)
             + res.year_sum(Flux.FIRN_TO_ICE)[0] - res.year_sum(Flux.ICE_MELT)[0])
    liquid_change = dmass - bal
    assert np.all(np.abs(liquid_change) <= 0.05 * np.maximum(res.storage_end[0], 1.0) + 1e-3)


def test_wall_feeds_the_glacier_by_its_excess():
    """A 50-degree wall above a flat glacier, steady snowfall, no melt: the glacier gains what the
    wall cannot hold (Bernhardt & Schulz, 2010 holding depth; Gruber, 2007 routing), to rounding;
    nothing is lost; a flat DEM is unchanged."""
    z = wall_valley(ny=10, nx=8, wall_rows=4)
    ice = np.zeros_like(z, bool)
    ice[4:, :] = True
    n_years = 1
    rec = years_record(n_years, -10.0, 5.0)
    par = kernel_params()           # all snow, no melt below 0 C; firn and refreezing off
    res, kc, routing = run_on_dem(z, ice, par, *rec, z_station=2000.0)
    res0, _, _ = run_on_dem(z, ice, par, *rec, redistribute=False, z_station=2000.0)
    redist = res.year_sum(Flux.REDISTRIBUTION)[0, 0].astype(float)
    exported = res.year_sum(Flux.EXPORTED)[0, 0].astype(float)
    wall = ~kc.ice.astype(bool)
    total_fall = res0.year_sum(Flux.SNOWFALL)[0, 0].astype(float)
    # the wall keeps at most its capacity; its excess goes to the glacier or off the edge. The
    # last call of the year runs before its last day, so that day's 5 mm stay until the next one.
    excess = np.maximum(total_fall[wall] - 5.0 - routing.holding_mm[wall], 0).sum()
    assert -redist[wall].sum() == pytest.approx(excess, rel=1e-5)
    gain = redist[~wall].sum() + exported[~wall].sum()
    assert gain + exported[wall].sum() == pytest.approx(excess, rel=1e-5)
    assert res.storage_end[0, 0].sum() + exported.sum() == pytest.approx(res0.storage_end[0, 0].sum(), rel=1e-9)
    # flat DEM: nothing moves
    flat = np.full_like(z, 2000.0)
    resf, _, _ = run_on_dem(flat, ice, par, *rec)
    assert np.all(resf.year_sum(Flux.REDISTRIBUTION) == 0)
    assert np.all(resf.year_sum(Flux.EXPORTED) == 0)


def test_temperate_pack_refreezes_nothing_and_cold_pack_a_bounded_share():
    """Temperate: a pack at 0 C (air never below 0 C) has no cold content, so nothing refreezes.
    Cold: refreezing stays positive and below 60 % of the annual snowfall (Reeh, 1991,
    Polarforschung 59, from memory) and below the cold content the air could give; water is
    conserved with it."""
    z = np.array([2000.0, 2000.0])
    ice = np.array([True, False])
    t = np.where(np.arange(365) < 212, 0.0, 3.0)
    p = np.full(365, 6.0)
    par = kernel_params(snow_c=0.5, rain_c=2.5, **ON)
    T, P, month, doy, year, winter = years_record(2, t, p)
    cal = Calendar(month, doy, year, winter)
    kc = Cells(z, ice, area_m2=np.ones(2))
    res = run_kernel(kc, cal, StationForcing(T, P, 2000.0), par)
    assert np.all(res.year_sum(Flux.REFREEZING) == 0)
    t_cold = np.where(np.arange(365) < 212, -8.0, 3.0)
    T, P, *_ = years_record(2, t_cold, p)
    res = run_kernel(kc, cal, StationForcing(T, P, 2000.0), par)
    refr = res.year_sum(Flux.REFREEZING)[0].astype(float)
    snowfall = res.year_sum(Flux.SNOWFALL)[0].astype(float)
    assert np.all(refr > 0)
    assert np.all(refr < 0.6 * snowfall)
    # bound: at most the pack's cold content at -8 C, c_i / L_f per K (common practice)
    assert np.all(refr <= COLD_PER_K * 8.0 * (snowfall + res.storage_end[0].max()))
    terms = column_budget(lambda f: res.year_sum(f)[0], res.storage_start[0], res.storage_end[0])
    assert np.all(np.abs(terms["residual_mm"]) < 1e-6 * terms["precipitation_mm"])


def test_half_cover_gives_half_the_ice_melt():
    """A glacier covering half of each cell: its glacier column melts ice, the ice-free half
    does not, so the cell's blended ice melt is half that of full cover (to rounding)."""
    n = 4
    full = Columns.build(n, [np.arange(n)], [np.ones(n)])
    half = Columns.build(n, [np.arange(n)], [np.full(n, 0.5)])
    assert half.n == 2 * n and full.n == n
    T, P, month, doy, year, winter = constant_record(t=5.0, p=0.0)
    z = np.full(n, 2000.0)

    def ice_melt(cols):
        kc = Cells(z[cols.cell], cols.ice, region=cols.region, area_m2=cols.share * 100.0, n_glaciers=1)
        res = run_kernel(kc, Calendar(month, doy, year, winter), StationForcing(T, P, 2000.0), kernel_params())
        return cols.blend(res.year_sum(Flux.ICE_MELT)[0].astype(float)), res
    m_full, _ = ice_melt(full)
    m_half, res = ice_melt(half)
    assert m_full[0] == pytest.approx(365 * 5.0 * 8.0)
    np.testing.assert_allclose(m_half, 0.5 * m_full, rtol=1e-12)
    # the daily seam: ice released on the glacier region only, as volumes (m3)
    daily = res.daily[0]
    assert daily[:, 0, Daily.RELEASED_ICE].sum() == pytest.approx(m_half.sum() * 100.0 * 1e-3, rel=1e-6)
    assert daily[:, 1, Daily.RELEASED_ICE].sum() == 0.0


def test_firn_turns_to_ice_after_firn_years_and_ice_free_snow_stays_snow():
    """Constant cold forcing: snow that survives becomes firn; firn older than firn_years leaves
    the pack as glacier ice; ice-free columns never turn snow into firn or ice."""
    T, P, month, doy, year, winter = years_record(6, -5.0, 2.0)
    kc = Cells(np.array([2000.0, 2000.0]), np.array([True, False]))
    res = run_kernel(kc, Calendar(month, doy, year, winter), StationForcing(T, P, 2000.0),
                     kernel_params(firn_years=3))
    per_year = 365 * 2.0
    to_ice = res.year_sum(Flux.FIRN_TO_ICE)[0].astype(float)
    np.testing.assert_allclose(to_ice[:, 0], [0, 0, 0, per_year, per_year, per_year], rtol=1e-6)
    assert np.all(to_ice[:, 1] == 0) and np.all(res.firn_end[0, :, 1] == 0)
    np.testing.assert_allclose(res.firn_end[0, -1, 0], 3 * per_year, rtol=1e-6)
    np.testing.assert_allclose(res.snow_end[0, -1, 1], 6 * per_year, rtol=1e-6)
    assert res.state_final[State.FIRN, 0, 0] == pytest.approx(3 * per_year)


def test_demo_books_close_and_steep_ground_sheds_its_snow(demo_run):
    """The demo after its full record, every process on: every water_budget.csv residual below
    1e-6 of the region's precipitation, and fewer than 2 % of the ice-free cells steeper than
    35 degrees hold more than 0.5 m w.e. of snow at the end (issue 11; the figure is printed)."""
    import pandas as pd
    import rasterio

    from firnline.grid import read_dem
    _, out = demo_run
    table = pd.read_csv(out / "water_budget.csv")
    assert list(table.columns)[:3] == ["region", "balance_year", "area_km2"]
    assert {"ice_free", "catchment"} <= set(table.region)
    assert (table.residual_mm.abs() < 1e-6 * table.precipitation_mm).all()
    cat = table[table.region == "catchment"]
    assert (cat.redistribution_in_mm > 0).all() and (cat.refreezing_mm > 0).all()
    last = int(table.balance_year.max())
    grid = read_dem(out.parent / "in" / "dem.tif")
    slope, _ = slope_aspect(grid.elevation, *grid.cell_size_m)
    with rasterio.open(out / f"snow_end_{last}.tif") as src:
        snow = src.read(1, masked=True).filled(np.nan)
    with rasterio.open(out / "glacier_id.tif") as src:
        free = src.read(1) == 0
    steep = free & grid.valid & (slope > 35.0)
    share = float(np.mean(snow[steep] > 0.5))
    print(f"ice-free cells steeper than 35 deg holding > 0.5 m w.e. at the end of {last}: "
          f"{100 * share:.2f} % of {int(steep.sum())}")
    assert share < 0.02


def test_planar_constant_forcing_is_steady_in_the_first_modelled_year(plane_case):
    """Spin-up: under the same forcing every year, the first modelled year's balances equal the
    later years' (the state is spun up); without spin-up the first year differs."""
    import firnline
    from conftest import PRE_ISSUE_SNOW
    snow = dict(PRE_ISSUE_SNOW, refreezing="cold-content", firn_years=2, spinup_years=4)
    cfg = firnline.load_config(plane_case(t=2.0, p=4.0, start="2014-10-01", end="2018-09-30", snow=snow))
    s = firnline.run(cfg).summary
    b = s.annual_balance_mwe.to_numpy()
    # balance years 2015, 2017, 2018 have 365 days (2016 has a leap day)
    np.testing.assert_allclose(b[[0, 2, 3]], b[-1], rtol=1e-9)


@pytest.mark.xfail(strict=True, reason="measured 0.073, 0.034 and 0.148 m w.e. (north_seldra, kessel, tarn): "
                   "the full record's first common year follows two real years that the later start cannot "
                   "know, and the firn, its held water and the snow upslope remember them (without refreezing "
                   "and sliding: 0.03); a 10-year spin-up makes it worse (tarn 0.42) "
                   "(issue 11, item 4: bound awaiting a decision)")
def test_demo_first_common_year_does_not_depend_on_where_the_record_starts(demo_run, tmp_path):
    """Starting the demo record two years later changes the first common year's glacier-wide
    balance by less than 0.05 m w.e. (issue 11; spin-up of 5 years, the default)."""
    import tomllib

    import tomli_w

    import firnline
    inputs, _ = demo_run
    data = tomllib.loads((inputs / "demo.toml").read_text())
    for section in ("dem", "glaciers", "climate"):
        for key, value in list(data.get(section, {}).items()):
            if key in ("path", "outlines", "station_file"):
                data[section][key] = str(inputs / value)
    data["output"]["dir"] = str(tmp_path / "out")
    full = firnline.run(firnline.load_config(_write(tmp_path / "a.toml", data, tomli_w))).summary
    years = sorted(full.balance_year.unique())
    data["climate"]["start"] = f"{years[2] - 1}-10-01"
    later = firnline.run(firnline.load_config(_write(tmp_path / "b.toml", data, tomli_w))).summary
    first = years[2]
    a = full[full.balance_year == first].set_index("glacier").annual_balance_mwe
    b = later[later.balance_year == first].set_index("glacier").annual_balance_mwe
    diff = (a - b.reindex(a.index)).abs()
    print("first common year", first, "largest change", float(diff.max()), "m w.e.")
    assert diff.max() < 0.05


def _write(path, data, tomli_w):
    path.write_text(tomli_w.dumps(data))
    return path
