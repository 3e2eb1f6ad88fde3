"""balance.nc: NetCDF-CF that opens in xarray, with the DEM's CRS and the GeoTIFFs' values."""

from __future__ import annotations

import numpy as np
import rasterio
import xarray as xr
from pyproj import CRS

from firnline.cli import main


def test_balance_nc_matches_geotiffs_and_crs(plane_case, tmp_path):
    cfg = plane_case()
    out = tmp_path / "out"
    assert main(["run", str(cfg), "--out", str(out), "--quiet"]) == 0
    ds = xr.open_dataset(out / "balance.nc")
    try:
        assert ds.attrs["Conventions"].startswith("CF-")
        assert set(ds.annual_balance.dims) == {"balance_year", "y", "x"}
        # CF grid mapping (CF conventions 1.8, section 5.6) read back with pyproj
        gm = ds[ds.annual_balance.attrs["grid_mapping"]]
        with rasterio.open(tmp_path / "dem.tif") as dem:
            assert CRS.from_cf(gm.attrs) == CRS.from_wkt(dem.crs.to_wkt())
            x0 = dem.transform.c + dem.transform.a / 2
            assert np.isclose(float(ds.x[0]), x0)
        assert ds.elevation.attrs["standard_name"] == "surface_altitude"       # CF standard name table
        assert ds.glacier_fraction.attrs["standard_name"] == "land_ice_area_fraction"
        assert ds.annual_balance.encoding.get("zlib") or ds.annual_balance.encoding.get("compression")
        for var in ("annual_balance", "winter_balance", "summer_balance", "accumulation", "ablation"):
            for i, year in enumerate(ds.balance_year.dt.year.values):   # a CF time axis since issue 15
                with rasterio.open(out / f"{var}_{int(year)}.tif") as t:
                    tif = t.read(1, masked=True).filled(np.nan)
                np.testing.assert_array_equal(ds[var].values[i], tif)
    finally:
        ds.close()
