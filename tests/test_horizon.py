"""Horizon angles against analytic relief and a brute-force search."""

import math

import numpy as np
import pytest

from firnline.horizon import horizon_angles, sector_azimuths_deg


def _wall_dem(ny=61, nx=60, wall_col=40, height=100.0):
    z = np.zeros((ny, nx))
    z[:, wall_col] = height
    return z


def test_wall_horizon_is_atan_height_over_distance():
    # Source: analytic geometry (issue 3): a straight wall of height h at horizontal
    # distance d subtends the elevation angle atan(h / d); along a line at angle alpha
    # to the wall's normal the distance is d / cos(alpha).
    dx, h, wall = 10.0, 100.0, 40
    z = _wall_dem(wall_col=wall, height=h)
    hz = horizon_angles(z, None, dx, 8, 1e5)
    az = sector_azimuths_deg(8)
    row = 30
    for c in range(25, wall):
        d = (wall - c) * dx
        assert hz[2, row, c] == pytest.approx(math.atan(h / d), abs=1e-6)  # east, 90 deg
        for k in (1, 3):  # 45 and 135 deg: distance d / sin(azimuth)
            expected = math.atan(h * math.sin(math.radians(az[k])) / d)
            assert hz[k, row, c] == pytest.approx(expected, abs=1e-6)
        # facing away from the wall over flat ground: open
        assert hz[6, row, c] == 0.0
        assert hz[0, row, c] == 0.0 and hz[4, row, c] == 0.0
    for c in range(wall + 1, 55):  # west of the cells right of the wall
        assert hz[6, row, c] == pytest.approx(math.atan(h / ((c - wall) * dx)), abs=1e-6)


def test_wall_with_rectangular_cells():
    # Source: analytic geometry, atan(h / d), with d counted in rows of 30 m.
    dx, dy, h = 10.0, 30.0, 250.0
    z = np.zeros((40, 30))
    z[5, :] = h  # a wall along row 5, north of the rows below it
    hz = horizon_angles(z, None, (dx, dy), 4, 1e5)
    for r in range(6, 40):
        assert hz[0, r, 15] == pytest.approx(math.atan(h / ((r - 5) * dy)), abs=1e-6)
        assert hz[2, r, 15] == 0.0


def test_inclined_plane_has_its_slope_as_horizon_in_every_sector():
    # Source: analytic geometry: on a plane z = a*east + b*north the terrain ahead in
    # azimuth alpha rises at a*sin(alpha) + b*cos(alpha) per metre, so the horizon is
    # atan of that where positive and 0 (clipped) where the plane falls away.
    ny, nx, dx, dy = 50, 60, 10.0, 14.0
    rows, cols = np.mgrid[0:ny, 0:nx]
    a, b = 0.3, -0.5
    z = a * cols * dx - b * rows * dy
    hz = horizon_angles(z, None, (dx, dy), 72, 1e6)
    alpha = np.deg2rad(sector_azimuths_deg(72))
    expected = np.arctan(np.maximum(0.0, a * np.sin(alpha) + b * np.cos(alpha)))
    np.testing.assert_allclose(hz[:, 2:-2, 2:-2], np.broadcast_to(expected[:, None, None], (72, ny - 4, nx - 4)),
                               atol=1e-6)


def test_beyond_the_dem_edge_the_horizon_is_open():
    # terrain rising to the east: the last column has nothing ahead and sees an open horizon
    z = np.tile(np.arange(20) * 5.0, (10, 1))
    hz = horizon_angles(z, None, 10.0, 4, 1e5)
    assert np.all(hz[1, :, -1] == 0.0)
    assert np.allclose(hz[1, :, :-1], math.atan(0.5), atol=1e-6)


def test_distance_limit_is_exact():
    # a wall 200 m away counts with a 200 m limit and is ignored with a 199 m limit
    z = _wall_dem(wall_col=40)
    near = horizon_angles(z, None, 10.0, 4, 200.0)
    far = horizon_angles(z, None, 10.0, 4, 199.0)
    assert near[1, 30, 20] == pytest.approx(math.atan(100.0 / 200.0), abs=1e-6)
    assert far[1, 30, 20] == 0.0
    assert far[1, 30, 21] == pytest.approx(math.atan(100.0 / 190.0), abs=1e-6)


def _brute_force(z, d_row, d_col, window, step_m):
    """Reference by exhaustive search along a line through the cell centres (not an outside source)."""
    ny, nx = z.shape
    out = np.full(z.shape, np.nan)
    for r in range(ny):
        for c in range(nx):
            if np.isnan(z[r, c]):
                continue
            best = 0.0
            for k in range(1, window + 1):
                rr, cc = r + d_row * k, c + d_col * k
                if 0 <= rr < ny and 0 <= cc < nx and not np.isnan(z[rr, cc]):
                    best = max(best, math.atan((z[rr, cc] - z[r, c]) / (k * step_m)))
            out[r, c] = best
    return out


@pytest.mark.parametrize("window_cells", [1, 4, 9, 200])
def test_hull_search_equals_exhaustive_search(window_cells):
    # Along the grid axes and diagonals the lines pass through cell centres, so the
    # fast search must give exactly the exhaustive maximum, including the distance limit.
    rng = np.random.default_rng(7)
    z = (rng.normal(size=(23, 31)).cumsum(axis=0).cumsum(axis=1)) * 4.0
    z[5:8, 10:13] = np.nan
    dx = 10.0
    hz = horizon_angles(z, None, dx, 8, window_cells * dx)
    directions = {0: (-1, 0), 1: (-1, 1), 2: (0, 1), 3: (1, 1), 4: (1, 0), 5: (1, -1), 6: (0, -1), 7: (-1, -1)}
    for k, (d_row, d_col) in directions.items():
        step = dx * math.hypot(d_row, d_col)
        window = int(math.floor(window_cells * dx / step + 1e-9))
        ref = _brute_force(z, d_row, d_col, window, step)
        np.testing.assert_allclose(hz[k], ref, atol=1e-6)


def test_nodata_neither_blocks_nor_is_computed():
    z = _wall_dem(wall_col=40)
    valid = np.ones(z.shape, dtype=bool)
    valid[:, 40] = False  # the wall is nodata
    hz = horizon_angles(z, valid, 10.0, 8, 1e5)
    assert np.all(np.isnan(hz[:, :, 40]))
    assert np.all(hz[:, :, :40] == 0.0) and np.all(hz[:, :, 41:] == 0.0)
    z2 = z.copy()
    z2[:, 40] = np.nan
    np.testing.assert_array_equal(horizon_angles(z2, None, 10.0, 8, 1e5), hz)


def test_output_layout_and_progress():
    calls = []
    z = np.random.default_rng(3).normal(size=(12, 17)) * 20.0
    hz = horizon_angles(z, None, 25.0, 36, 500.0, progress=lambda label, i, n: calls.append((i, n)))
    assert hz.shape == (36, 12, 17) and hz.dtype == np.float32
    assert np.all(hz >= 0.0) and np.all(hz < math.pi / 2)
    assert calls == [(i, 36) for i in range(1, 37)]


def test_cone_apex_sees_open_sky_and_the_foot_sees_the_cone():
    # Source: analytic geometry: from the foot of a cone of slope s the horizon towards the
    # apex is atan(s); from the apex every direction is open.
    n, dx, s = 41, 10.0, 0.8
    rows, cols = np.mgrid[0:n, 0:n]
    r = np.hypot(rows - 20, cols - 20) * dx
    z = np.maximum(0.0, (200.0 - r) * s)
    hz = horizon_angles(z, None, dx, 72, 1e4)
    assert np.all(hz[:, 20, 20] == 0.0)
    # from a cell on the flank, looking straight up the fall line (east from the west flank)
    assert hz[18, 20, 10] == pytest.approx(math.atan(s), abs=1e-6)


def test_the_horizons_of_a_window_with_its_halo_are_those_of_the_whole_dem():
    """window_sines searches the whole DEM's lines and search blocks over a window of it, so the
    codes of any cells with window_halo_cells around them equal those of the whole DEM bit for bit
    (nodata cells, non-square cells, a zero distance); with too little halo it refuses."""
    from firnline.horizon import quantised_sines, window_halo_cells, window_sines

    rng = np.random.default_rng(3)
    for trial, (cs, dist, ns) in enumerate([(25.0, 800.0, 8), ((25.0, 30.0), 1500.0, 36), (25.0, 0.0, 12)]):
        ny, nx = (int(v) for v in rng.integers(150, 230, 2))
        y, x = np.mgrid[0:ny, 0:nx]
        z = (2000 + 700 * np.sin(x / (20 + trial * 7)) * np.cos(y / 31.0) + 200 * np.sin((x - 2 * y) / 9.0)
             + rng.normal(0, 8, (ny, nx)))
        z[rng.random((ny, nx)) < 0.02] = np.nan
        valid = np.isfinite(z)
        whole = quantised_sines(horizon_angles(z, valid, cs, ns, dist))
        halo = window_halo_cells(cs, dist)
        for _ in range(4):
            r0 = int(rng.integers(0, ny - 2))
            r1 = int(rng.integers(r0 + 1, ny + 1))
            c0 = int(rng.integers(0, nx - 2))
            c1 = int(rng.integers(c0 + 1, nx + 1))
            zr = (max(0, r0 - halo), min(ny, r1 + halo))
            zc = (max(0, c0 - halo), min(nx, c1 + halo))
            got = window_sines(z[zr[0]:zr[1], zc[0]:zc[1]], valid[zr[0]:zr[1], zc[0]:zc[1]], (zr[0], zc[0]),
                               (ny, nx), (r0, r1), (c0, c1), cs, ns, dist)
            assert np.array_equal(got, whole[:, r0:r1, c0:c1]), (trial, r0, r1, c0, c1)
    with pytest.raises(ValueError, match="outside the given window"):
        window_sines(z[10:60, 10:60], valid[10:60, 10:60], (10, 10), (ny, nx), (20, 50), (20, 50), 25.0, 8, 1000.0)
