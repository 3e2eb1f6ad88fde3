"""Tiled runs ([compute], firnline.tiles): the same numbers as the untiled run, bit for bit.

Maps are assembled by position; the glacier and water-budget tables come from exact partial
sums (firnline.exact) that merge in any order. Checked on a synthetic valley with one glacier
cut by four units and on the demo; the dask.distributed path on a two-worker LocalCluster.
"""

from __future__ import annotations

import dataclasses
import json
import math
import os

import numpy as np
import pandas as pd
import pytest
import shapely

import firnline
from firnline import exact
from firnline.cli import main
from firnline.model import prepare, run
from firnline.tiles import fill_unit, make_units, modelled_positions, run_unit

CELL = 50.0
X0, Y0 = 600000.0, 5150000.0


def compute(cfg, **kw):
    return dataclasses.replace(cfg, compute=dataclasses.replace(cfg.compute, **kw))


def valley(ny=40, nx=40) -> np.ndarray:
    """A valley draining south: walls rising east and west, floor rising north, a few nodata cells."""
    r, c = np.mgrid[0:ny, 0:nx]
    z = 2200.0 + 25.0 * (ny - r) + 3.0 * np.abs(c - nx / 2) ** 1.6 + 5.0 * np.sin(r * 0.7) * np.cos(c * 0.5)
    z[0, :3] = np.nan
    return z


def valley_case(tmp_path, builders, snow=None, **sections):
    """A 40 x 40 valley with one glacier over rows and columns 8..31 (cut by 20-cell units)."""
    builders.write_dem(tmp_path / "dem.tif", valley(), cell=CELL, x0=X0, y0=Y0)
    builders.seasonal_station(tmp_path / "station.csv", "2015-10-01", "2018-09-30")
    glacier = shapely.box(X0 + 8 * CELL, Y0 - 31 * CELL, X0 + 31.5 * CELL, Y0 - 8.3 * CELL)
    builders.write_outlines(tmp_path / "gl.geojson", ["middle"], [glacier], "GeoJSON", crs="EPSG:32632")
    sec = builders.base_sections(station_elevation=2300.0)
    sec["glaciers"] = {"outlines": "gl.geojson"}
    sec["snow"].update(snow or {})
    for k, v in sections.items():
        sec.setdefault(k, {}).update(v)
    return firnline.load_config(builders.write_config(tmp_path / "valley.toml", sec))


def assert_same_run(a, b, exact_budget=True):
    for name in a.fields.data_vars:
        assert np.array_equal(a.fields[name].values, b.fields[name].values, equal_nan=True), name
    for table in ("summary", "profiles", "gradients"):
        pd.testing.assert_frame_equal(getattr(a, table), getattr(b, table), check_exact=True)
    wa, wb = a.water_budget, b.water_budget
    if exact_budget:
        pd.testing.assert_frame_equal(wa, wb, check_exact=True)
    else:
        rest = [c for c in wa.columns if c != "residual_mm"]
        pd.testing.assert_frame_equal(wa[rest], wb[rest], check_exact=True)
        np.testing.assert_allclose(wa.residual_mm, wb.residual_mm, rtol=0, atol=1e-9)
    # daily region volumes: the kernel adds them per thread in the order threads finish, so
    # equal to float64 rounding only
    np.testing.assert_allclose(a.runoff.discharge_m3s, b.runoff.discharge_m3s, rtol=1e-12, atol=1e-15)


# ----------------------------------------------------------------------------
# exact sums
# ----------------------------------------------------------------------------

def test_exact_sums_merge_in_any_order_and_match_a_correctly_rounded_sum():
    rng = np.random.default_rng(3)
    v = rng.normal(size=20000) * 10.0 ** rng.uniform(-9, 7, 20000)
    k = rng.integers(0, 7, v.size)
    whole = exact.values(exact.of(k, v))
    perm = rng.permutation(v.size)
    cuts = np.sort(rng.choice(v.size, 11, replace=False))
    parts = [exact.of(k[perm][a:b], v[perm][a:b]) for a, b in zip(np.r_[0, cuts], np.r_[cuts, v.size])]
    merged = exact.values(exact.merge(parts[::-1]))
    assert np.array_equal(whole[0], merged[0]) and np.array_equal(whole[1], merged[1])
    # against math.fsum (the correctly rounded sum, Python standard library): a few ulp
    ref = np.array([math.fsum(v[k == j]) for j in range(7)])
    np.testing.assert_allclose(whole[1], ref, rtol=1e-14)
    assert np.isnan(exact.values(exact.of([0, 0, 1], [1.0, np.nan, 2.0]))[1][0])


def test_exact_sums_of_repeated_terms_are_those_of_every_term():
    """exact.of_repeated (the region areas: terms equal to one value counted, not split) gives the
    integers of exact.of, with the common value given or found, one key or a key per term, zeros,
    a NaN and a subnormal common value."""
    rng = np.random.default_rng(3)
    for t in range(60):
        n = int(rng.integers(0, 3000))
        x = float(rng.choice([625.0, 900.0, 0.1, 1e-310, 3.3333]))
        v = np.where(rng.random(n) < 0.8, x, rng.random(n) * x)
        if t % 7 == 0 and n:
            v[rng.integers(0, n)] = np.nan
        if t % 5 == 0 and n:
            v[rng.integers(0, n)] = 0.0
        k = np.int64(t % 9) if t % 3 == 0 else rng.integers(0, int(rng.integers(1, 40)), n)
        a, b = exact.of(k, v), exact.of_repeated(k, v, None if t % 2 else x)
        for name in ("key", "exp", "hi", "lo", "nonfinite"):
            np.testing.assert_array_equal(getattr(a, name), getattr(b, name))


def test_columns_of_a_selection_are_those_of_the_dense_renumbering():
    """Columns.select (work over the selection's span only) gives the columns, cells, shares and
    regions of the plain definition: renumber every cell, keep the selected cells' own columns
    in order and the appended columns of selected cells in column order."""
    from firnline.model import Columns

    rng = np.random.default_rng(5)
    n = 3000
    pos = [np.sort(rng.choice(n, rng.integers(1, 300), replace=False)) for _ in range(30)]
    cols = Columns.build(n, pos, [rng.uniform(0.05, 1.0, p.size) for p in pos])
    assert cols.n > n
    for size in (0, 1, 17, 900, n):
        sub = np.sort(rng.choice(n, size, replace=False))
        new = np.full(n, -1)
        new[sub] = np.arange(sub.size)
        extra = np.arange(n, cols.n)
        keep = np.concatenate([sub, extra[new[cols.cell[extra]] >= 0]])
        got = cols.select(sub)
        np.testing.assert_array_equal(got.cell, new[cols.cell[keep]])
        for name in ("share", "ice", "region"):
            np.testing.assert_array_equal(getattr(got, name), getattr(cols, name)[keep])
        assert got.n_cells == sub.size


def test_the_column_table_of_a_setup_gives_the_columns_of_the_full_build():
    """A prepared setup holds its columns as a ColumnTable (its glacier cells and appended columns,
    not a column array of every cell); its selections and its full columns are those of
    Columns.build, bit for bit, also where glaciers share cells with equal shares (ties go to the
    first glacier in file order) and where they cover a cell more than wholly."""
    from firnline.model import Columns, ColumnTable

    rng = np.random.default_rng(11)
    n = 4000
    for ties in (False, True):
        pos = [np.sort(rng.choice(n, rng.integers(1, 400), replace=False)) for _ in range(40)]
        fr = [rng.choice([0.25, 0.5, 1.0], p.size) if ties else rng.uniform(0.05, 1.0, p.size) for p in pos]
        cols, table = Columns.build(n, pos, fr), ColumnTable.build(n, pos, fr)
        assert table.n == cols.n and table.glacier_cell.size < n
        for sub in (np.arange(n), np.zeros(0, dtype=np.int64), np.arange(100, 1700),
                    np.sort(rng.choice(n, 999, replace=False))):
            ref, got = cols.select(sub), table.select(sub)
            for name in ("cell", "share", "ice", "region"):
                assert getattr(got, name).dtype == getattr(ref, name).dtype
                np.testing.assert_array_equal(getattr(got, name), getattr(ref, name))
            assert got.n_cells == ref.n_cells
        full = table.full()
        for name in ("cell", "share", "ice", "region"):
            np.testing.assert_array_equal(getattr(full, name), getattr(cols, name))


def test_columns_of_a_range_of_cells_are_those_of_the_selection_and_blend_alike():
    """Columns.cell_range(c0, c1) (the slices a block's fields are made in) gives the columns of
    Columns.select(arange(c0, c1)) and their indices, and blending a slice gives those cells'
    values of the whole blend bit for bit."""
    from firnline.model import Columns

    rng = np.random.default_rng(8)
    n = 2000
    pos = [np.sort(rng.choice(n, rng.integers(1, 200), replace=False)) for _ in range(25)]
    cols = Columns.build(n, pos, [rng.uniform(0.05, 1.0, p.size) for p in pos])
    values = rng.normal(size=(3, cols.n))
    whole = cols.blend(values)
    for c0, c1 in ((0, 0), (0, 1), (5, 6), (17, 900), (900, n), (0, n)):
        part, keep = cols.cell_range(c0, c1)
        ref = cols.select(np.arange(c0, c1))
        for name in ("cell", "share", "ice", "region"):
            np.testing.assert_array_equal(getattr(part, name), getattr(ref, name))
        np.testing.assert_array_equal(cols.share[keep], part.share)
        assert np.all(cols.cell[keep] - c0 == part.cell) and part.n_cells == c1 - c0
        np.testing.assert_array_equal(part.blend(values[:, keep]), whole[:, c0:c1])


def test_exact_sums_are_the_same_integers_on_the_dense_and_the_sparse_path():
    """The dense (key, exponent) table and the sorted path give the same sums, bit for bit,
    for terms with zeros, subnormals, both signs, an infinity and 600 binary orders of
    magnitude; the values are within a few ulp of math.fsum (Python standard library)."""
    rng = np.random.default_rng(11)
    v = rng.normal(size=5000) * 2.0 ** rng.integers(-300, 300, 5000)
    v[::97] = 0.0
    v[5] = 5e-324
    v[6] = -3e-320
    v[7] = np.inf
    k = rng.integers(0, 5, v.size)
    dense = exact.of(k, v)
    sparse = exact.of(k * (1 << 40), v)            # a key span too wide for the dense table
    np.testing.assert_array_equal(dense.key * (1 << 40), sparse.key)
    for a, b in ((dense.exp, sparse.exp), (dense.hi, sparse.hi), (dense.lo, sparse.lo)):
        np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(dense.nonfinite * (1 << 40), sparse.nonfinite)
    keys, vals = exact.values(dense)
    ok = keys != k[7]
    ref = np.array([math.fsum(v[(k == j) & np.isfinite(v)]) for j in keys[ok]])
    np.testing.assert_allclose(vals[ok], ref, rtol=1e-14)
    assert np.isnan(vals[~ok]).all()


# ----------------------------------------------------------------------------
# tiled == untiled
# ----------------------------------------------------------------------------

def test_one_glacier_across_four_units_gives_the_untiled_numbers(tmp_path, builders, monkeypatch):
    cfg = valley_case(tmp_path, builders)
    setup = prepare(cfg)
    lazy = make_units(setup, 20)
    assert all(u.positions is None and u.glaciers is None for u in lazy)   # held only when it runs
    units = [fill_unit(setup, u) for u in lazy]
    assert len(units) == 4
    assert all(any(g == 0 for g, *_ in u.glaciers) for u in units)      # the glacier is in all four
    # the units share out every cell and every glacier's cells exactly
    assert np.array_equal(np.sort(np.concatenate([u.positions for u in units])), np.arange(setup.cells.size))
    for g, pos in enumerate(setup.glacier_pos):
        mine = [(u, q) for u in units for q in u.glaciers if q[0] == g]
        assert np.array_equal(np.sort(np.concatenate([q[2] for _, q in mine])), pos)
        for u, (_, local, gp, share) in mine:
            assert np.array_equal(u.positions[local], gp) and np.array_equal(pos[share], gp)
    whole = run(cfg, setup=setup)
    tiled = run(compute(cfg, tile_size=20, workers=1), setup=setup)
    assert whole.timings["units"] == 1 and tiled.timings["units"] == 4
    # the region areas, made from the column table a few cells at a time, are the kernel's
    from firnline import tiles
    from firnline.model import simulate
    kres = simulate(setup, cfg)
    np.testing.assert_array_equal(tiles.region_areas(setup, None), kres.region_area_m2)
    monkeypatch.setattr(tiles, "_AREA_CELLS", 7)
    np.testing.assert_array_equal(tiles.region_areas(setup, None), kres.region_area_m2)
    assert_same_run(whole, tiled)
    # uneven units (tile 16: 3 x 3 windows, the last ones narrow) give the same again
    assert_same_run(whole, run(compute(cfg, tile_size=16, workers=1), setup=setup))


def test_with_snow_redistribution_and_every_process_on_tiles_give_the_same_maps_and_tables(tmp_path, builders):
    cfg = valley_case(tmp_path, builders, snow={"redistribution": "gravitational", "refreezing": "cold-content",
                                                "firn_years": 5, "spinup_years": 1, "min_slide_slope_deg": 15.0})
    setup = prepare(cfg)
    whole = run(cfg, setup=setup)
    assert np.nanmax(np.abs(whole.fields["redistribution"].values)) > 0.01     # snow does slide here
    tiled = run(compute(cfg, tile_size=20, workers=1), setup=setup)
    # residual_mm, the float rounding of the books (~1e-7 mm), may differ in its last bit: the
    # kernel's float64 year-end storage of a column can differ by one ulp (see DEVELOPERS.md, tiles)
    assert_same_run(whole, tiled, exact_budget=False)


def test_snow_routing_made_by_window_gives_the_numbers_of_the_routing_of_the_whole_dem(tmp_path, builders,
                                                                                       monkeypatch):
    """Above model.WINDOW_ROUTING_CELLS valid cells (lowered here to 100) a setup holds no snow
    routing: each unit makes that of a window around it, the halo (here from 1 cell) doubled until
    the cells upslope of the unit stay two cells clear of the window's inner edges. The tiled run,
    the run of every cell, a run of some cells (as a calibration's) and a sweep's glacier cut on
    that setup give the numbers of the routing of the whole DEM, bit for bit."""
    from firnline import model
    from firnline.model import simulate
    from firnline.scenarios import glacier_view

    cfg = valley_case(tmp_path, builders, snow={"redistribution": "gravitational", "refreezing": "cold-content",
                                                "firn_years": 5, "spinup_years": 1, "min_slide_slope_deg": 15.0})
    ref = prepare(cfg)
    assert ref.routing is not None and not ref.routing_by_window
    whole = run(cfg, setup=ref)
    monkeypatch.setattr(model, "WINDOW_ROUTING_CELLS", 100)
    monkeypatch.setattr(model, "WINDOW_HALO", 1)
    setup = prepare(cfg)
    assert setup.routing is None and setup.routing_by_window
    windows = []
    made = model.window_routing
    monkeypatch.setattr(model, "window_routing", lambda s, r, c: windows.append((r, c)) or made(s, r, c))
    tiled = run(compute(cfg, tile_size=10, workers=1), setup=setup)
    assert tiled.timings["units"] == 16
    assert_same_run(whole, tiled, exact_budget=False)
    # some units' upslope cells reached past the first halo (one cell), so it grew
    assert max(r[1] - r[0] for r, _ in windows) > 12 and len(windows) > 16
    assert_same_run(whole, run(cfg, setup=setup), exact_budget=False)        # every cell: one routing
    cells = np.arange(3, setup.cells.size, 37)
    a = simulate(ref, cfg, cells=cells, snapshot_days=[100, 400], daily=False)
    b = simulate(setup, cfg, cells=cells, snapshot_days=[100, 400], daily=False)
    assert np.array_equal(a.snapshots, b.snapshots) and np.array_equal(a.sums, b.sums)
    ga, gb = glacier_view(ref), glacier_view(setup)
    assert np.array_equal(ga.cells, gb.cells) and ga.cells.size < setup.cells.size
    for name in ("order", "recv_ptr", "recv_pos", "recv_weight", "holding_mm"):
        assert np.array_equal(getattr(ga.routing, name), getattr(gb.routing, name)), name
    with pytest.raises(ValueError, match="upslope_setup"):
        setup.select(np.arange(3))


@pytest.mark.parametrize("sliding", [False, True])
def test_radiation_made_by_window_gives_the_numbers_of_the_table_of_the_whole_dem(tmp_path, builders, monkeypatch,
                                                                                 sliding):
    """Above model.WINDOW_RADIATION_CELLS valid cells (lowered here to 100) a radiation-method setup
    holds no table of the whole DEM: a run makes that of its cells (a tiled run: each unit's),
    window by window (here of 16 cells), each with the rows either side, a slope window and a
    horizon halo, and the whole DEM's sun constants. The table of any cells equals those columns
    of the whole DEM's table bit for bit, and so do the tiled run and the run of every cell (with
    and without sliding snow, whose upslope cells join a unit's cut)."""
    from firnline import model
    from firnline.radiation import RadiationTable

    snow = {"redistribution": "gravitational", "spinup_years": 1, "min_slide_slope_deg": 15.0} if sliding else {}
    # a horizon distance of 4 cells, so that each window's halo is a part of the DEM
    cfg = valley_case(tmp_path, builders, snow=snow, melt={"method": "radiation"},
                      radiation={"horizon_distance_m": 4 * CELL, "horizon_sectors": 16})
    ref = prepare(cfg)
    assert isinstance(ref.radiation, RadiationTable) and not ref.by_window
    whole = run(cfg, setup=ref)
    monkeypatch.setattr(model, "WINDOW_RADIATION_CELLS", 100)
    monkeypatch.setattr(model, "RADIATION_WINDOW", 16)
    setup = prepare(cfg)
    assert isinstance(setup.radiation, model.WindowRadiation) and setup.by_window
    assert any("radiation climatology: made for each unit" in n for n in setup.notes)
    n = setup.cells.size
    rng = np.random.default_rng(5)
    for pos in (np.arange(n), np.arange(3, n, 37), np.array([0]), np.array([n - 1]),
                np.sort(rng.choice(n, 200, replace=False)), np.arange(17 * 40 + 5, 17 * 40 + 9),
                np.zeros(0, dtype=np.int64)):
        table = setup.radiation.subset(pos)
        assert np.array_equal(table.values, ref.radiation.values[:, pos]), pos[:5]
        assert table.scale_w_m2 == ref.radiation.scale_w_m2 and np.array_equal(table.doy_nodes, ref.radiation.doy_nodes)
    made = []
    window = model.window_radiation
    monkeypatch.setattr(model, "window_radiation", lambda *a: made.append(a[2].size) or window(*a))
    tiled = run(compute(cfg, tile_size=10, workers=1), setup=setup)
    assert tiled.timings["units"] == 16 and len(made) == 16      # one table per unit
    assert_same_run(whole, tiled, exact_budget=False)
    assert_same_run(whole, run(cfg, setup=setup), exact_budget=False)


def test_the_demo_tiled_equals_the_demo_untiled(tmp_path):
    assert main(["demo", str(tmp_path / "in"), "--quiet"]) == 0
    cfg = firnline.load_config(tmp_path / "in" / "demo.toml")
    setup = prepare(cfg)
    whole = run(cfg, setup=setup)
    tiled = run(compute(cfg, tile_size=128, workers=1), setup=setup)
    assert tiled.timings["units"] == 9
    assert_same_run(whole, tiled, exact_budget=False)
    # a unit's daily sums hold its own glaciers only (plus ice_free and catchment), placed by id
    n_gl = len(setup.glaciers.names)
    for unit in [fill_unit(setup, u) for u in make_units(setup, 128)[:4]]:
        ids, sums = run_unit(setup, cfg, unit, 0.0, 0.0).daily
        mine = sorted(g for g, *_ in unit.glaciers)
        assert list(ids) == mine + [n_gl, n_gl + 1] and sums.shape[1] == len(mine) + 2


# ----------------------------------------------------------------------------
# cells = "glaciers"
# ----------------------------------------------------------------------------

def test_glacier_cells_and_their_buffer_only_give_the_glacier_results_of_the_full_run(tmp_path, builders):
    cfg = valley_case(tmp_path, builders, compute={"cells": "glaciers", "glacier_buffer_m": 120.0})
    setup = prepare(cfg)
    pos = modelled_positions(setup, cfg.compute)
    glacier = setup.glacier_mask
    assert glacier[pos].sum() == glacier.sum() and pos.size < setup.cells.size
    # the buffer: every modelled ice-free cell lies within 120 m (2 cells + 20 m) of a glacier cell
    r, c = np.divmod(setup.cells, setup.grid.shape[1])
    gr, gc = r[glacier], c[glacier]
    for p in pos[~glacier[pos]]:
        assert np.min(np.hypot(gr - r[p], gc - c[p])) * CELL <= 120.0
    part = run(cfg, setup=setup)
    full = run(compute(cfg, cells="all"), setup=setup)
    pd.testing.assert_frame_equal(part.summary, full.summary, check_exact=True)
    pd.testing.assert_frame_equal(part.profiles, full.profiles, check_exact=True)
    acc = part.fields["accumulation"].values[0]
    assert np.isfinite(acc).sum() == pos.size
    tiled = run(compute(cfg, tile_size=20, workers=1), setup=setup)
    assert_same_run(part, tiled)


def test_glacier_cells_only_refuse_a_catchment_for_runoff(tmp_path, builders, capsys):
    cfg = valley_case(tmp_path, builders)
    builders.write_outlines(tmp_path / "c.geojson", ["c"], [shapely.box(X0, Y0 - 2000, X0 + 2000, Y0)], "GeoJSON",
                            crs="EPSG:32632")
    text = (tmp_path / "valley.toml").read_text()
    (tmp_path / "bad.toml").write_text(text + '\n[compute]\ncells = "glaciers"\n\n[runoff]\ncatchment = "c.geojson"\n')
    assert main(["run", str(tmp_path / "bad.toml"), "--quiet"]) == 2
    line = builders.one_sentence_no_traceback(capsys.readouterr().err)
    assert '[compute] cells = "glaciers"' in line and "[runoff] catchment" in line and 'cells = "all"' in line
    assert not (tmp_path / "out").exists() and cfg is not None


# ----------------------------------------------------------------------------
# [compute] keys
# ----------------------------------------------------------------------------

@pytest.mark.parametrize("key, value, words", [
    ("tile_size", 8, "whole number from 16"),
    ("tile_size", 100.5, "whole number"),
    ("workers", 0, "whole number from 1"),
    ("scheduler", "my cluster", "address of a dask.distributed scheduler"),
    ("cells", "ice", '"all", "glaciers"'),
    ("glacier_buffer_m", -5, ">= 0"),
])
def test_bad_compute_values_are_refused_naming_the_key(builders, tmp_path, capsys, key, value, words):
    cfg = builders.folder_case(tmp_path, compute={key: value})
    assert main(["run", str(cfg), "--quiet"]) == 2
    line = builders.one_sentence_no_traceback(capsys.readouterr().err)
    assert f"[compute] {key}" in line and words in line
    assert not (tmp_path / "out").exists()


def test_compute_defaults_and_the_run_record(builders, tmp_path):
    cfg = firnline.load_config(builders.folder_case(tmp_path, compute={"scheduler": "tcp://10.0.0.5:8786"}))
    assert cfg.compute.scheduler == "tcp://10.0.0.5:8786"
    cfg = firnline.load_config(builders.folder_case(tmp_path))
    c = cfg.compute
    assert (c.tile_size, c.workers, c.scheduler, c.cells, c.glacier_buffer_m) == (2048, 2, "local", "all", 500.0)
    out = tmp_path / "o"
    assert main(["run", str(tmp_path / "case.toml"), "--out", str(out), "--quiet", "--no-report"]) == 0
    info = json.loads((out / "run.json").read_text())
    assert info["config"]["compute"] == {"tile_size": 2048, "workers": 2, "scheduler": "local", "cells": "all",
                                         "glacier_buffer_m": 500.0}
    assert info["compute"]["units"] == 1 and info["compute"]["scheduler"].startswith("synchronous")
    assert info["compute"]["modelled_cells"] == 200


def test_a_unit_that_cannot_fit_is_refused_before_computing(builders, tmp_path, capsys):
    """A sparse 20 000 x 20 000 DEM (a tiny file): units of 16384 x 16384 cells on the cluster at a
    scheduler address, which send back every year of their fields, cannot fit (refused before
    connecting)."""
    builders.folder_case(tmp_path)
    builders.write_sparse_dem(tmp_path / "big.tif", 20_000, cell=25.0)
    cfg = builders.folder_case(tmp_path, dem={"path": "big.tif"},
                               compute={"tile_size": 16384, "scheduler": "tcp://127.0.0.1:1"})
    assert main(["run", str(cfg), "--quiet"]) == 2
    line = builders.one_sentence_no_traceback(capsys.readouterr().err)
    assert "[compute] tile_size = 16384" in line and "268435456 cells" in line and "GB" in line
    assert "3 balance years" in line and "set [compute] tile_size to" in line
    assert not (tmp_path / "out").exists()
    # in this process, or on a local cluster (whose units write their fields block by block into
    # files), a unit runs in parts of 512 x 512 cells (firnline.tiles.unit_parts), which fit;
    # the whole DEM's setup does not, and the run is refused as a whole
    for workers in (1, 2):
        cfg = builders.folder_case(tmp_path, dem={"path": "big.tif"},
                                   compute={"tile_size": 16384, "workers": workers})
        assert main(["run", str(cfg), "--quiet"]) == 2
        line = builders.one_sentence_no_traceback(capsys.readouterr().err)
        assert "This run needs about" in line and "20000 x 20000 cells" in line and "coarser DEM" in line
        assert not (tmp_path / "out").exists()


# ----------------------------------------------------------------------------
# dask.distributed
# ----------------------------------------------------------------------------

def test_a_two_worker_local_cluster_gives_the_serial_result(tmp_path, builders, monkeypatch):
    """Workers on this machine write each block's fields into a work folder beside the output
    folder (firnline.tiles.Spool), removed when the run is done; workers elsewhere send them back
    whole; both give the serial result."""
    pytest.importorskip("dask.distributed")
    from dask.distributed import Client, LocalCluster

    from firnline import tiles

    cfg = valley_case(tmp_path, builders, snow={"redistribution": "gravitational", "min_slide_slope_deg": 15.0})
    setup = prepare(cfg)
    serial = run(compute(cfg, tile_size=20, workers=1), setup=setup)
    calls = []
    local = run(compute(cfg, tile_size=20, workers=2), setup=setup,
                progress=lambda label, done, total: calls.append((label, done, total)))
    assert local.compute.startswith("dask LocalCluster: 2 worker processes") and "fields through files" in local.compute
    assert [c for c in calls if c[0] == "units"][-1] == ("units", 4, 4)
    assert_same_run(serial, local, exact_budget=False)
    assert not list(tmp_path.glob(".out.firnline-maps-*"))
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster, \
            Client(cluster) as client:
        given = run(compute(cfg, tile_size=20), setup=setup, client=client)
        assert given.compute.startswith("dask.distributed at ") and "fields through files" in given.compute
        assert_same_run(serial, given, exact_budget=False)
        monkeypatch.setattr(tiles, "_all_on_this_machine", lambda client: False)
        sent = run(compute(cfg, tile_size=20), setup=setup, client=client)
    assert "fields through files" not in sent.compute
    assert_same_run(serial, sent, exact_budget=False)


# ----------------------------------------------------------------------------
# streamed per-year maps (firnline.yearmaps)
# ----------------------------------------------------------------------------

def written_products(folder):
    """Every product of a run folder by what it holds: GeoTIFF pixels, profile and tags (without
    the config path and the time), NetCDF variables and attributes, other files byte for byte."""
    import rasterio
    import xarray as xr

    moving = {"config", "config_sha256", "created_utc"}
    out = {}
    for p in sorted(folder.iterdir()):
        if p.name.startswith(".") or p.name in ("run.json", "report.html", "glaciers.gpkg"):
            continue
        if p.suffix == ".tif":
            with rasterio.open(p) as src:
                out[p.name] = (src.read(), dict(src.profile), src.overviews(1),
                               {k: v for k, v in src.tags().items() if k not in moving})
        elif p.suffix == ".nc":
            with xr.open_dataset(p) as ds:
                out[p.name] = ds.load()
        else:
            out[p.name] = p.read_bytes()
    return out


def assert_same_products(a, b):
    assert set(a) == set(b)
    for name in a:
        if name.endswith(".tif"):
            assert np.array_equal(a[name][0], b[name][0], equal_nan=True), name
            assert a[name][1:] == b[name][1:], name
        elif name.endswith(".nc"):
            assert a[name].identical(b[name]), name
        else:
            assert a[name] == b[name], name


def test_maps_streamed_through_a_file_give_the_products_of_maps_in_memory(tmp_path, builders, monkeypatch):
    """A run whose maps pass SPILL_BYTES keeps them in a chunked file beside the output folder and
    writes every product from it a strip at a time: the same files (GeoTIFF pixels, NetCDF, CSV,
    map and chart PNGs) as the maps held in memory; the file is gone once the result is closed."""
    from firnline import yearmaps

    cfg = valley_case(tmp_path, builders, snow={"redistribution": "gravitational", "min_slide_slope_deg": 15.0})
    cfg = compute(cfg, tile_size=16, workers=1)            # 3 x 3 units, the last ones narrow
    setup = prepare(cfg)
    held = run(cfg, setup=setup)
    assert not held.maps.spilled and isinstance(held.fields["annual_balance"].data, np.ndarray)
    held.write(tmp_path / "held")
    monkeypatch.setattr(yearmaps, "SPILL_BYTES", 0)
    monkeypatch.setattr(yearmaps, "STRIP_BYTES", 3 * 40 * 4 * 7)          # strips of 7 rows
    streamed = run(cfg, setup=setup)
    folder = streamed.maps.dir
    assert streamed.maps.spilled and folder.parent == tmp_path and folder.name.startswith(".out.firnline-maps-")
    assert not isinstance(streamed.fields["annual_balance"].data, np.ndarray)      # lazy, over the file
    assert_same_run(held, streamed)
    streamed.write(tmp_path / "streamed")
    assert_same_products(written_products(tmp_path / "held"), written_products(tmp_path / "streamed"))
    assert not list((tmp_path / "streamed").glob("*.source.tif"))
    streamed.close()
    held.close()
    assert not folder.exists() and streamed.maps.spilled and not held.maps.spilled


def test_an_interrupted_streamed_run_removes_its_maps_file(tmp_path, builders, monkeypatch):
    from firnline import yearmaps

    monkeypatch.setattr(yearmaps, "SPILL_BYTES", 0)
    cfg = compute(valley_case(tmp_path, builders), tile_size=20, workers=1)

    def stop(label, done, total):
        if label == "units" and done == 2:
            assert [p.name for p in tmp_path.glob(".out.firnline-maps-*")]      # being written
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        run(cfg, progress=stop)
    assert not list(tmp_path.glob(".out.firnline-maps-*"))


def test_the_maps_file_of_a_killed_run_is_cleared_by_the_next_command(tmp_path, builders):
    """A folder of spilled maps whose process is gone goes with the next run on that output folder;
    one of a live process stays."""
    cfg = builders.folder_case(tmp_path)
    dead = subprocess_pid_that_ended()
    stale = tmp_path / f".out.firnline-maps-{dead}-0123456789ab"
    live = tmp_path / f".out.firnline-maps-{os.getppid()}-0123456789ab"
    for d in (stale, live):
        d.mkdir()
        (d / "maps.nc").write_bytes(b"")
    assert main(["run", str(cfg), "--quiet", "--no-report"]) == 0
    assert not stale.exists() and live.exists()


def subprocess_pid_that_ended() -> int:
    import subprocess
    import sys
    proc = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    return int(proc.stdout)


def test_fields_and_budget_made_in_blocks_of_years_equal_those_of_the_whole_record(tmp_path, builders,
                                                                                   monkeypatch):
    """A unit's fields and water-budget sums are made a block of years at a time (a year's storage
    at the start is the previous year's end): one year a block gives the same maps and tables, bit
    for bit, with every [snow] process on and a spin-up."""
    from firnline import tiles

    cfg = valley_case(tmp_path, builders, snow={"redistribution": "gravitational", "refreezing": "cold-content",
                                                "firn_years": 5, "spinup_years": 1, "min_slide_slope_deg": 15.0})
    setup = prepare(cfg)
    whole = run(cfg, setup=setup)
    monkeypatch.setattr(tiles, "BLOCK_BYTES", 1)
    blocked = run(cfg, setup=setup)
    assert len(setup.forcing.years) == 3
    assert_same_run(whole, blocked)
    # the record in one kernel block, its fields and budget made a year at a time (views)
    n_cols = setup.surface_columns.n
    monkeypatch.setattr(tiles, "BLOCK_BYTES", 3 * n_cols * tiles._BLOCK_BYTES_PER_COLUMN_YEAR)
    assert tiles.block_years(n_cols, 3) == 3 and n_cols * tiles._TEMP_BYTES_PER_COLUMN_YEAR > tiles.BLOCK_BYTES / 2
    assert_same_run(whole, run(cfg, setup=setup))
    tiled = run(compute(cfg, tile_size=20, workers=1), setup=setup)
    assert_same_run(whole, tiled, exact_budget=False)


def test_a_unit_run_in_parts_gives_the_numbers_of_one_pass_over_it(tmp_path, builders, monkeypatch):
    """A unit's kernel runs over its parts (firnline.tiles.unit_parts) one after the other: with
    parts of at most 8 cells a side (a 20-cell unit in 3 x 3 parts of 7, the last ones narrow; the
    whole 40 x 40 DEM as one unit in 5 x 5 parts) the maps and tables are those of the untiled run
    in one part, bit for bit, with every [snow] process on; the fields a unit sends back whole (a
    dask task's result) and its sums are those of the unit in one part; spilled maps, written part
    by part into chunks of a part, give the same again."""
    from firnline import tiles, yearmaps

    cfg = valley_case(tmp_path, builders, snow={"redistribution": "gravitational", "refreezing": "cold-content",
                                                "firn_years": 5, "spinup_years": 1, "min_slide_slope_deg": 15.0})
    setup = prepare(cfg)
    whole = run(cfg, setup=setup)
    cfg20 = compute(cfg, tile_size=20, workers=1)
    units = [fill_unit(setup, u) for u in make_units(setup, 20)]
    one_part = [run_unit(setup, cfg20, u, 0.0, 0.0) for u in units]
    assert tiles.PART_SIZE == 512 and tiles.part_size(2048) == 512 and tiles.part_size(512) == 512
    assert tiles.part_size(3000) == 500 and tiles.part_size(513) == 257 and tiles.part_size(20) == 20

    monkeypatch.setattr(tiles, "PART_SIZE", 8)
    assert tiles.part_size(20) == 7 and tiles.part_size(40) == 8
    for u in units:                  # the parts share the unit's cells and glacier cells out exactly
        parts = tiles.unit_parts(setup, u, 7)
        assert len(parts) == 9 and {p.index for p in parts} == {u.index}
        assert np.array_equal(np.sort(np.concatenate([p.positions for p in parts])), u.positions)
        for g, local, gp, share in u.glaciers:
            mine = [q for p in parts for q in p.glaciers if q[0] == g]
            assert np.array_equal(np.sort(np.concatenate([q[2] for q in mine])), np.sort(gp))
            for p in parts:
                for q in p.glaciers:
                    assert np.array_equal(p.positions[q[1]], q[2])
    calls = []
    in_parts = run(cfg, setup=setup, progress=lambda label, done, total: calls.append((label, done, total)))
    assert_same_run(whole, in_parts, exact_budget=False)                       # one unit, 25 parts
    assert [c for c in calls if c[0] == "parts"] == [("parts", k, 25) for k in range(1, 26)]
    assert_same_run(whole, run(cfg20, setup=setup), exact_budget=False)        # 4 units, 9 parts each
    for u, a in zip(units, one_part):
        b = run_unit(setup, cfg20, u, 0.0, 0.0)
        assert set(a.fields) == set(b.fields)
        for name in a.fields:
            assert np.array_equal(a.fields[name], b.fields[name], equal_nan=True), name
        assert set(a.glacier_sums) == set(b.glacier_sums)
        for g in a.glacier_sums:
            for x, y in zip(exact.values(a.glacier_sums[g]), exact.values(b.glacier_sums[g])):
                np.testing.assert_array_equal(x, y)
        for x, y in zip(exact.values(a.budget), exact.values(b.budget)):
            np.testing.assert_allclose(x, y, rtol=1e-12, atol=1e-9)
        assert np.array_equal(a.daily[0], b.daily[0])
        np.testing.assert_allclose(a.daily[1], b.daily[1], rtol=1e-12, atol=1e-9)
    monkeypatch.setattr(yearmaps, "SPILL_BYTES", 0)
    streamed = run(cfg20, setup=setup)
    assert streamed.maps.spilled and streamed.maps.tile == (7, 7)
    assert_same_run(whole, streamed, exact_budget=False)
    streamed.close()
