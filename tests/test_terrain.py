"""Slope and aspect by Horn (1981), against analytic planes and a real DEM."""

from __future__ import annotations

import numpy as np
import pytest

from firnline.terrain import illumination, slope_aspect


@pytest.mark.parametrize("facing", [0, 45, 90, 135, 180, 225, 270, 315])
def test_horn_exact_on_planes_facing_eight_directions(facing):
    """On a plane Horn's weighted differences are exact (Horn 1981, Proc. IEEE 69(1))."""
    ny, nx, dx, dy = 9, 11, 30.0, 20.0
    x = (np.arange(nx) * dx)[None, :]
    y = -(np.arange(ny) * dy)[:, None]          # row 0 is north: y decreases with row
    grad = 0.3                                  # m per m, downhill towards `facing`
    a = np.radians(facing)
    z = 2000.0 - grad * (np.sin(a) * x + np.cos(a) * y)
    slope, aspect = slope_aspect(z, dx, dy)
    np.testing.assert_allclose(slope, np.degrees(np.arctan(grad)), atol=1e-9)
    diff = (aspect - facing + 180.0) % 360.0 - 180.0
    np.testing.assert_allclose(diff, 0.0, atol=1e-9)


def test_flat_cells_have_nan_aspect_and_zero_slope():
    z = np.full((5, 5), 1000.0)
    slope, aspect = slope_aspect(z, 10.0, 10.0)
    assert np.all(slope == 0) and np.all(np.isnan(aspect))


def test_edges_and_nodata_use_real_neighbours_only():
    """Next to nodata the gradient comes from the real neighbours; nodata stays NaN."""
    ny, nx = 6, 6
    z = 100.0 + 0.5 * np.arange(nx)[None, :] * 10.0 + np.zeros((ny, 1))
    z[2, 2] = np.nan
    slope, aspect = slope_aspect(z, 10.0, 10.0)
    assert np.isnan(slope[2, 2])
    good = np.isfinite(z)
    np.testing.assert_allclose(slope[good], np.degrees(np.arctan(0.5)), atol=1e-9)
    np.testing.assert_allclose(aspect[good], 270.0, atol=1e-9)


def test_illumination_agrees_with_matplotlib_hillshade_on_real_dem():
    """Real relief: matplotlib's shipped jacksboro_fault_dem (geographic grid, see
    ../shared/REFERENCES.md), reprojected by firnline's grid reader to UTM; the Lambertian
    illumination from our Horn slope/aspect is compared with
    (after undoing hillshade's linear 0..1 stretch)
    matplotlib.colors.LightSource.hillshade (an independent implementation based on
    np.gradient). Agreement reached: correlation > 0.99, rms difference < 0.02."""
    import rasterio
    from matplotlib import cbook
    from matplotlib.colors import LightSource
    from rasterio.transform import from_origin

    from firnline.grid import read_dem

    dem = cbook.get_sample_data("jacksboro_fault_dem.npz")
    z = dem["elevation"].astype("float64")
    lon0, lat0 = float(dem["xmin"]), float(dem["ymax"])
    dlon, dlat = float(dem["dx"]), float(dem["dy"])
    import pathlib
    import tempfile
    with tempfile.TemporaryDirectory() as td:
        path = pathlib.Path(td) / "jacksboro.tif"
        with rasterio.open(path, "w", driver="GTiff", width=z.shape[1], height=z.shape[0], count=1,
                           dtype="float32", crs="EPSG:4326",
                           transform=from_origin(lon0, lat0, dlon, dlat)) as dst:
            dst.write(z.astype("float32"), 1)
        grid = read_dem(path)
    assert grid.crs.to_epsg() in range(32601, 32661)     # a UTM zone, northern hemisphere
    assert "reprojected" in grid.notes[0]
    dx, dy = grid.cell_size_m
    assert 60 < dx < 110                                  # 0.000833 deg is about 92 m north-south
    slope, aspect = slope_aspect(grid.elevation, dx, dy)
    ours = illumination(slope, aspect, sun_azimuth_deg=315.0, sun_elevation_deg=45.0)
    zz = np.nan_to_num(grid.elevation, nan=np.nanmean(grid.elevation))
    ref = LightSource(azdeg=315, altdeg=45).hillshade(zz, vert_exag=1, dx=dx, dy=dy, fraction=1.0)
    inner = np.zeros_like(grid.valid)
    inner[2:-2, 2:-2] = True
    from scipy.ndimage import binary_erosion
    m = binary_erosion(grid.valid, iterations=2) & inner
    r = np.corrcoef(ours[m], ref[m])[0, 1]
    assert r > 0.99
    # hillshade stretches its intensity linearly to 0..1 over the grid; undo that by a
    # linear fit and compare what is left
    a, b = np.polyfit(ours[m], ref[m], 1)
    resid = ref[m] - (a * ours[m] + b)
    assert np.sqrt(np.mean(resid ** 2)) < 0.02


@pytest.mark.parametrize("band_cells", [1, 5, 23])
def test_bands_of_rows_give_the_whole_dem_result(band_cells, monkeypatch):
    """Slope and aspect made a band of rows at a time (each band read with a row above and
    below) equal the one-band result bit for bit, with nodata cells and at the DEM's edges."""
    from firnline import terrain

    rng = np.random.default_rng(4)
    z = np.cumsum(rng.normal(0, 25, (17, 11)), axis=1) + 2500.0
    z[rng.random(z.shape) < 0.15] = np.nan
    whole = slope_aspect(z, 25.0, 30.0)
    monkeypatch.setattr(terrain, "BAND_CELLS", band_cells)
    banded = slope_aspect(z, 25.0, 30.0)
    for a, b in zip(whole, banded):
        np.testing.assert_array_equal(a, b)
    assert np.isnan(whole[1]).any() and np.isfinite(whole[0]).sum() > 100
