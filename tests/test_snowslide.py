"""Gravitational snow redistribution (firnline.snowslide): routing, transport, cache, config."""

from __future__ import annotations

import numpy as np
import pytest

from firnline import slide_cache, snowslide
from firnline.config import parse_config
from firnline.errors import InputError
from firnline.snowslide import EXPORT, build_routing, holding_capacity_mm, holding_depth_m, redistribute
from firnline.terrain import slope_aspect

DX = 10.0


def routing_of(z, valid=None, **kw):
    valid = np.isfinite(z) if valid is None else valid
    slope, _ = slope_aspect(np.where(valid, z, np.nan), DX, DX)
    return build_routing(z, valid, (DX, DX), slope, **kw), slope


def steady_snow(r, mm):
    """The same snow on every cell, redistributed: (before, after, change, exported per cell, total)."""
    snow0 = np.full(r.n_cells, mm)
    snow = snow0.copy()
    change = np.zeros_like(snow)
    exported = np.zeros_like(snow)
    out = redistribute(r, snow, change, exported)
    return snow0, snow, change, exported, out


def wall_above_flat(ny=30, nx=12, wall_rows=15, angle_deg=50.0):
    """A wall (rows 0 .. wall_rows-1) falling south at ``angle_deg`` onto a flat floor at 0 m."""
    t = np.tan(np.radians(angle_deg))
    rows = np.arange(ny, dtype=float)
    z = np.maximum(0.0, (wall_rows - rows)) * DX * t
    return np.repeat(z[:, None], nx, axis=1)


def rough(ny=60, nx=70, seed=1, holes=True):
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[0:ny, 0:nx]
    z = 2000.0 + 8.0 * (ny - y) * DX * 0.1 + 300.0 * np.sin(x / 7.0) * np.cos(y / 9.0)
    z = z + rng.normal(0.0, 15.0, z.shape)
    if holes:
        z[rng.random(z.shape) < 0.05] = np.nan
        z[20:26, 30:38] = np.nan
    return z


# ----------------------------------------------------------------------------
# the published formula
# ----------------------------------------------------------------------------

def test_holding_depth_is_bernhardt_and_schulz():
    """Source: Bernhardt & Schulz (2010), GRL 37, L11502 (from memory): SHD = 3178.4 slope^-1.998 m,
    about 0.9 m at 60 deg and 2 m at 40 deg (../shared/REFERENCES.md)."""
    assert holding_depth_m(60.0) == pytest.approx(0.9, abs=0.02)
    assert holding_depth_m(40.0) == pytest.approx(2.0, abs=0.02)
    assert holding_depth_m(50.0) == pytest.approx(3178.4 * 50.0 ** -1.998, rel=1e-12)
    assert np.isinf(holding_depth_m(0.0))


def test_holding_capacity_is_depth_times_density_and_unlimited_on_gentle_slopes():
    """1 m of snow at 250 kg m-3 is 250 kg m-2 = 250 mm w.e. (common practice)."""
    cap = holding_capacity_mm(np.array([10.0, 24.9, 25.0, 50.0]), 250.0, 25.0)
    assert np.isinf(cap[0]) and np.isinf(cap[1])
    assert cap[2] == pytest.approx(250.0 * 3178.4 * 25.0 ** -1.998)
    assert cap[3] == pytest.approx(250.0 * 3178.4 * 50.0 ** -1.998)


# ----------------------------------------------------------------------------
# routing
# ----------------------------------------------------------------------------

@pytest.mark.parametrize("scheme", snowslide.SCHEMES)
def test_order_is_highest_to_lowest_and_receivers_come_later(scheme):
    z = rough()
    r, _ = routing_of(z, scheme=scheme)
    zc = z.ravel()[np.flatnonzero(np.isfinite(z).ravel())]
    assert r.order.dtype == np.int32 and r.recv_pos.dtype == np.int32
    assert r.holding_mm.dtype == np.float32 and r.recv_weight.dtype == np.float32
    assert np.all(np.diff(zc[r.order]) <= 0)
    assert np.array_equal(np.sort(r.order), np.arange(zc.size))
    step = np.empty(zc.size, np.int64)
    step[r.order] = np.arange(zc.size)
    donor_step = np.repeat(np.arange(zc.size), np.diff(r.recv_ptr))
    inner = r.recv_pos != EXPORT
    assert np.all(step[r.recv_pos[inner]] > donor_step[inner])
    assert np.all(zc[r.recv_pos[inner]] < zc[r.order[donor_step[inner]]])
    sums = np.add.reduceat(r.recv_weight.astype(float), r.recv_ptr[:-1][np.diff(r.recv_ptr) > 0])
    assert np.allclose(sums, 1.0, atol=1e-6)
    if scheme == "steepest":
        assert np.all(np.diff(r.recv_ptr) <= 1)


def test_steepest_descent_picks_the_largest_drop_per_distance():
    """A diagonal neighbour 1.3 m lower (drop/distance 0.092) loses to a side neighbour 1 m lower (0.1)."""
    z = np.full((3, 3), 100.0)
    z[1, 1] = 110.0
    z[1, 2] = 109.0           # east: 1 m over 10 m
    z[2, 2] = 108.7           # south-east: 1.3 m over 14.1 m
    z[0, :] = z[:, 0] = 120.0
    z[2, :2] = 120.0
    z[0, 2] = 120.0
    r, _ = routing_of(z, min_slide_slope_deg=0.0)
    centre = 4
    k = int(np.flatnonzero(r.order == centre)[0])
    assert r.recv_pos[r.recv_ptr[k]:r.recv_ptr[k + 1]].tolist() == [5]


def test_flat_and_pit_cells_hold_any_amount():
    z = np.full((8, 8), 1500.0)
    r, _ = routing_of(z)
    assert r.recv_ptr[-1] == 0 and np.all(np.isinf(r.holding_mm))


# ----------------------------------------------------------------------------
# transport
# ----------------------------------------------------------------------------

def test_wall_above_flat_glacier_gains_exactly_the_walls_excess():
    """A 50 deg wall under steady snow (2000 mm w.e. on every cell) above a flat glacier floor.

    Every wall cell keeps its Bernhardt & Schulz (2010) holding capacity (from memory:
    3178.4 slope^-1.998 m, times 250 kg m-3; slope by Horn 1981), the rest slides, so the
    flat floor gains sum over the wall of (2000 - capacity) and nothing is exported.
    """
    z = wall_above_flat()
    r, slope = routing_of(z)
    snow0, snow, change, exported, out = steady_snow(r, 2000.0)
    wall = z.ravel() > 0
    cap = 250.0 * 3178.4 * slope.ravel()[wall] ** -1.998
    assert np.all(cap < 2000.0)
    cap = cap.astype(np.float32).astype(float)      # the routing stores capacities as float32
    expected = np.sum(2000.0 - cap)
    assert out == 0.0 and not exported.any()
    assert np.sum(change[~wall]) == pytest.approx(expected, rel=1e-12)
    assert np.sum(snow[~wall]) - np.sum(snow0[~wall]) == pytest.approx(expected, rel=1e-12)
    np.testing.assert_allclose(snow[wall], cap, rtol=1e-12)
    np.testing.assert_allclose(change, snow - snow0, rtol=0, atol=1e-9)
    assert abs(snow.sum() - snow0.sum()) <= 1e-9 * snow0.sum()
    # interior wall cells at exactly 50 deg keep about 1.27 m of snow = 320 mm w.e.
    assert snow.reshape(z.shape)[5, 5] == pytest.approx(250.0 * 3178.4 * 50.0 ** -1.998, rel=1e-6)


def test_a_flat_dem_is_unchanged():
    z = np.full((20, 25), 2400.0)
    r, _ = routing_of(z)
    snow = np.random.default_rng(3).uniform(0, 5000, (3, z.size))
    before = snow.copy()
    change = np.zeros_like(snow)
    out = redistribute(r, snow, change)
    assert np.array_equal(snow, before) and not change.any() and not out.any()


def test_snow_running_off_the_edge_is_exported_not_lost():
    """A 50 deg plane falling off the south edge: every cell's excess leaves through the last row."""
    ny, nx = 25, 9
    z = np.repeat((np.arange(ny)[::-1] * DX * np.tan(np.radians(50.0)))[:, None], nx, axis=1)
    r, slope = routing_of(z)
    snow0, snow, change, exported, out = steady_snow(r, 1000.0)
    cap = (250.0 * 3178.4 * slope.ravel() ** -1.998).astype(np.float32).astype(float)
    assert out == pytest.approx(np.sum(1000.0 - cap), rel=1e-12)
    assert out == pytest.approx(exported.sum(), rel=1e-14)
    assert np.flatnonzero(exported).min() >= (ny - 1) * nx    # only the south row exports
    assert snow.sum() + out == pytest.approx(snow0.sum(), rel=1e-14)
    assert change.sum() == pytest.approx(-out, rel=1e-12)


def test_snow_running_into_nodata_is_exported():
    z = wall_above_flat(ny=20, nx=10, wall_rows=12)
    z[12:, :] = np.nan                       # the floor is nodata (a lake, or outside the DEM's mask)
    r, _ = routing_of(z)
    snow = np.full(int(np.isfinite(z).sum()), 2000.0)
    total = snow.sum()
    out = redistribute(r, snow)
    assert out > 0 and snow.sum() + out == pytest.approx(total, rel=1e-14)


@pytest.mark.parametrize("scheme", snowslide.SCHEMES)
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_mass_is_conserved_on_rough_terrain(scheme, seed):
    z = rough(seed=seed)
    r, _ = routing_of(z, scheme=scheme, min_slide_slope_deg=5.0, snow_density_kg_m3=150.0)
    rng = np.random.default_rng(seed)
    snow = rng.uniform(0.0, 3000.0, (4, r.n_cells))
    before = snow.copy()
    change = np.zeros_like(snow)
    exported = np.zeros_like(snow)
    out = redistribute(r, snow, change, exported)
    moved = np.abs(snow - before).sum()
    assert moved > 0.01 * before.sum()                      # the test moves a lot of snow
    np.testing.assert_allclose(snow.sum(axis=1) + out, before.sum(axis=1), rtol=1e-13)
    np.testing.assert_allclose(exported.sum(axis=1), out, rtol=1e-13)
    np.testing.assert_allclose(change, snow - before, atol=1e-9)
    assert np.all(snow >= -1e-9)
    assert np.all(snow <= np.maximum(before + change, r.holding_mm) + 1e-6)
    # a second pass moves nothing: every cell is at or below its capacity or at rest
    again = snow.copy()
    assert np.all(redistribute(r, again) == 0.0) and np.allclose(again, snow, rtol=0, atol=1e-9)


def test_scenarios_are_independent_and_one_dimensional_input_works():
    z = rough(seed=4)
    r, _ = routing_of(z)
    rng = np.random.default_rng(4)
    many = rng.uniform(0, 4000, (3, r.n_cells))
    singles = [row.copy() for row in many]
    outs = redistribute(r, many)
    for s, row in enumerate(singles):
        out = redistribute(r, row)
        assert isinstance(out, float) and out == outs[s]
        assert np.array_equal(row, many[s])


def test_immobile_mass_fills_the_capacity_first():
    z = wall_above_flat(ny=20, nx=6, wall_rows=10)
    r, _ = routing_of(z)
    wall = np.isfinite(r.holding_mm)
    firn = np.where(wall, 100.0, 0.0)
    snow = np.full(r.n_cells, 2000.0)
    total = snow.sum()
    redistribute(r, snow, immobile=firn)
    np.testing.assert_allclose(snow[wall], r.holding_mm[wall].astype(float) - 100.0, rtol=1e-12)
    assert snow.sum() == pytest.approx(total, rel=1e-14)


@pytest.mark.parametrize("scheme", snowslide.SCHEMES)
def test_a_run_on_the_upslope_area_of_some_cells_gives_them_the_same_snow(scheme):
    z = rough(seed=9)
    r, _ = routing_of(z, scheme=scheme, min_slide_slope_deg=5.0)
    rng = np.random.default_rng(9)
    snow = rng.uniform(0.0, 3000.0, r.n_cells)
    full = snow.copy()
    redistribute(r, full)
    targets = np.zeros(r.n_cells, bool)
    targets[rng.choice(r.n_cells, 40, replace=False)] = True
    area = snowslide.upslope(r, targets)
    assert targets[area].sum() == 40 and area.sum() < r.n_cells
    # searched only within the upslope steps of more cells (a unit's, for its parts): the same area
    more = targets.copy()
    more[rng.choice(r.n_cells, 40, replace=False)] = True
    within = snowslide.upslope_steps(r, more)
    assert within.size < r.n_cells and np.all(np.diff(within) > 0)
    assert np.array_equal(snowslide.upslope(r, targets, within), area)
    assert np.array_equal(snowslide.upslope(r, np.flatnonzero(targets), within), area)
    pos = np.flatnonzero(area)
    part = snow[pos].copy()
    sub = snowslide.subset(r, pos)
    exported = redistribute(sub, part)
    np.testing.assert_allclose(part[targets[pos]], full[targets], rtol=1e-12)
    assert part.sum() + exported == pytest.approx(snow[pos].sum(), rel=1e-13)
    # each cell's change and export (off the DEM) are those of the run of every cell: snow sent
    # to a valid cell outside the subset leaves it without counting as exported
    ch_full, ex_full = np.zeros(r.n_cells), np.zeros(r.n_cells)
    redistribute(r, snow.copy(), change=ch_full, exported=ex_full)
    ch_sub, ex_sub = np.zeros(pos.size), np.zeros(pos.size)
    redistribute(sub, snow[pos].copy(), change=ch_sub, exported=ex_sub)
    assert np.array_equal(ch_sub[targets[pos]], ch_full[targets]) and np.array_equal(ex_sub, ex_full[pos])
    # no cell outside the upslope area sends snow into it
    donors = np.repeat(r.order, np.diff(r.recv_ptr))
    inner = r.recv_pos >= 0
    assert not np.any(area[r.recv_pos[inner]] & ~area[donors[inner]])


def test_bad_snow_arrays_are_refused():
    r, _ = routing_of(np.full((4, 4), 10.0))
    with pytest.raises(ValueError):
        redistribute(r, np.zeros(16, dtype=np.float32))
    with pytest.raises(ValueError):
        redistribute(r, np.zeros(15))
    with pytest.raises(ValueError):
        redistribute(r, np.zeros(16), change=np.zeros(15))


# ----------------------------------------------------------------------------
# cache
# ----------------------------------------------------------------------------

def _cached(tmp_path, z, **kw):
    valid = np.isfinite(z)
    slope, _ = slope_aspect(z, DX, DX)
    return slide_cache.cached_routing(tmp_path, "ab" * 32, (DX, 0, 0, 0, -DX, 0), z, valid, (DX, DX), slope, **kw)


def _same(a, b):
    for name in ("order", "recv_ptr", "recv_pos", "recv_weight", "holding_mm"):
        x, y = getattr(a, name), getattr(b, name)
        assert x.dtype == y.dtype and np.array_equal(x, y), name
    assert (a.scheme, a.exponent, a.snow_density_kg_m3, a.min_slide_slope_deg) == \
           (b.scheme, b.exponent, b.snow_density_kg_m3, b.min_slide_slope_deg)


@pytest.mark.parametrize("scheme", snowslide.SCHEMES)
def test_cache_round_trip(tmp_path, scheme):
    z = rough(seed=5)
    built, note = _cached(tmp_path, z, scheme=scheme)
    assert note.startswith("built") and len(list(tmp_path.glob("routing-*.npz"))) == 1
    again, note2 = _cached(tmp_path, z, scheme=scheme)
    assert note2.startswith("reused")
    _same(built, again)
    other, note3 = _cached(tmp_path, z, scheme=scheme, snow_density_kg_m3=300.0)
    assert note3.startswith("built") and len(list(tmp_path.glob("routing-*.npz"))) == 2


def _entry(tmp_path):
    (path,) = tmp_path.glob("routing-*.npz")
    return path


def test_cache_miss_on_corruption(tmp_path):
    z = rough(seed=6)
    built, _ = _cached(tmp_path, z)
    path = _entry(tmp_path)
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0xFF
    path.write_bytes(bytes(data))
    r, note = _cached(tmp_path, z)
    assert note.startswith("built")
    _same(built, r)
    path.write_bytes(path.read_bytes()[:100])          # truncated
    assert _cached(tmp_path, z)[1].startswith("built")


def _rewrite(path, **changes):
    with np.load(path, allow_pickle=False) as d:
        arrays = {k: d[k] for k in d.files}
    arrays.update(changes)
    with open(path, "wb") as fh:
        np.savez(fh, **arrays)


@pytest.mark.parametrize("change", ["dtype", "shape", "content"])
def test_cache_miss_on_wrong_dtype_shape_or_checksum(tmp_path, change):
    z = rough(seed=7)
    built, _ = _cached(tmp_path, z)
    path = _entry(tmp_path)
    if change == "dtype":
        _rewrite(path, holding_mm=built.holding_mm.astype(np.float64))
    elif change == "shape":
        _rewrite(path, holding_mm=built.holding_mm[:-1], order=built.order[:-1])
    else:
        h = built.holding_mm.copy()
        h[np.isfinite(h)] *= 2
        _rewrite(path, holding_mm=h)
    key = slide_cache.routing_key("ab" * 32, z.shape, (DX, 0, 0, 0, -DX, 0), "steepest", 0.0, 250.0, 25.0)
    assert slide_cache.load_routing(tmp_path, key, built.n_cells) is None
    r, note = _cached(tmp_path, z)
    assert note.startswith("built")
    _same(built, r)


def test_cache_miss_when_the_number_of_cells_differs(tmp_path):
    z = rough(seed=8)
    built, _ = _cached(tmp_path, z)
    key = slide_cache.routing_key("ab" * 32, z.shape, (DX, 0, 0, 0, -DX, 0), "steepest", 0.0, 250.0, 25.0)
    assert slide_cache.load_routing(tmp_path, key, built.n_cells) is not None
    assert slide_cache.load_routing(tmp_path, key, built.n_cells + 1) is None


# ----------------------------------------------------------------------------
# config
# ----------------------------------------------------------------------------

def _cfg(tmp_path, **snow):
    data = {"dem": {"path": "dem.tif"}, "climate": {"station_file": "s.csv", "station_elevation_m": 1000.0}}
    if snow:
        data["snow"] = snow
    return parse_config(data, tmp_path)


def test_snow_section_defaults_and_checks(tmp_path):
    cfg = _cfg(tmp_path)
    assert cfg.snow.redistribution == "gravitational"
    assert cfg.snow.snow_density_kg_m3 == snowslide.DEFAULT_SNOW_DENSITY_KG_M3 == 250.0
    assert cfg.snow.min_slide_slope_deg == snowslide.DEFAULT_MIN_SLIDE_SLOPE_DEG == 25.0
    assert _cfg(tmp_path, redistribution="none").snow.redistribution == "none"
    for bad in ({"redistribution": "avalanche"}, {"snow_density_kg_m3": 5.0}, {"min_slide_slope_deg": 95.0}):
        with pytest.raises(InputError) as e:
            _cfg(tmp_path, **bad)
        assert "[snow]" in str(e.value) and next(iter(bad)) in str(e.value)


def test_with_values_reaches_the_snow_section(tmp_path):
    cfg = _cfg(tmp_path).with_values(snow_density_kg_m3=300.0, ddf_snow_mm_per_day_k=4.0)
    assert cfg.snow.snow_density_kg_m3 == 300.0 and cfg.melt.ddf_snow_mm_per_day_k == 4.0
    assert cfg.snow.redistribution == "gravitational"


@pytest.mark.parametrize("scheme", ["steepest", "multiple"])
def test_routing_made_in_blocks_of_cells_equals_one_block(scheme, monkeypatch):
    """The links made a few cells at a time (snowslide.ROUTING_BLOCK_CELLS) and put in
    processing order give the routing of one block bit for bit (nodata, edges, pits)."""
    rng = np.random.default_rng(8)
    z = np.cumsum(rng.normal(5, 20, (23, 19)), axis=0) + rng.normal(0, 15, (23, 19))
    valid = rng.random(z.shape) > 0.1
    whole, _ = routing_of(z, valid, scheme=scheme)
    monkeypatch.setattr(snowslide, "ROUTING_BLOCK_CELLS", 7)
    blocks, _ = routing_of(z, valid, scheme=scheme)
    for name in ("order", "recv_ptr", "recv_pos", "recv_weight", "holding_mm"):
        a, b = getattr(whole, name), getattr(blocks, name)
        assert a.dtype == b.dtype
        np.testing.assert_array_equal(a, b)
    assert (whole.recv_pos == EXPORT).any() and np.isinf(whole.holding_mm).any()
    most = np.diff(whole.recv_ptr).max()
    assert most == 1 if scheme == "steepest" else most > 1


def test_subset_keeps_the_links_of_its_cells_in_processing_order():
    """snowslide.subset against its definition, written out cell by cell: the subset's cells in
    the routing's order, each with its own links, receivers renumbered into the subset or LEAVE
    (a compact window of positions and positions far apart take different paths inside)."""
    rng = np.random.default_rng(12)
    z = np.cumsum(rng.normal(5, 20, (90, 80)), axis=0) + rng.normal(0, 15, (90, 80))
    r, _ = routing_of(z, scheme="multiple")
    leaves = []
    for sub in (np.arange(2000, 3500), np.array([5, 4000, 7100]), np.flatnonzero(snowslide.upslope(r, [6000]))):
        s = snowslide.subset(r, sub)
        index = {int(p): i for i, p in enumerate(sub)}
        steps = [k for k in range(r.n_cells) if int(r.order[k]) in index]
        assert s.order.tolist() == [index[int(r.order[k])] for k in steps]
        links = [j for k in steps for j in range(r.recv_ptr[k], r.recv_ptr[k + 1])]
        want = [int(p) if p < 0 else index.get(int(p), snowslide.LEAVE) for p in r.recv_pos[links]]
        assert s.recv_pos.tolist() == want
        np.testing.assert_array_equal(s.recv_weight, r.recv_weight[links])
        np.testing.assert_array_equal(s.holding_mm, r.holding_mm[sub])
        assert s.recv_ptr[-1] == len(links)
        leaves.append(bool((s.recv_pos == snowslide.LEAVE).any()))
    # the window and the scattered cells send snow out of the subset (LEAVE is exercised)
    assert leaves[0] and leaves[1]
