"""Writers: GeoTIFF, CSV, JSON and NetCDF-CF.

Every command writes its files through :func:`staged` (see :mod:`firnline.outdir`):
the whole new set goes into a staging folder beside the output folder and is
swapped in, all or nothing, when it is complete; a failure or an interruption on
the way leaves the earlier set as it was.

GeoTIFFs follow GDAL's conventions: float32, tiled 256 x 256, DEFLATE with the
floating-point predictor, nodata -9999, a band description and unit, and the
run's provenance in the dataset tags.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd
import rasterio

from .outdir import Staging, staged  # noqa: F401  (the writers' entry point)

NODATA = -9999.0


def write_geotiff(path: Path, bands: np.ndarray | Sequence[np.ndarray], transform, crs,
                  descriptions: Sequence[str], units: str, tags: dict | None = None,
                  dtype: str = "float32", nodata: float = NODATA) -> None:
    """Write one or more 2D bands as a tiled, DEFLATE-compressed GeoTIFF.

    NaN becomes ``nodata``. ``descriptions`` gives one text per band; ``units`` is set
    on every band; ``tags`` (provenance) go into the dataset metadata.
    """
    arr = np.asarray(bands)
    if arr.ndim == 2:
        arr = arr[None]
    count, ny, nx = arr.shape
    profile = dict(driver="GTiff", width=nx, height=ny, count=count, dtype=dtype, crs=crs,
                   transform=transform, nodata=nodata, compress="deflate", tiled=True,
                   blockxsize=256, blockysize=256, BIGTIFF="IF_SAFER")
    if np.dtype(dtype).kind == "f":
        profile["predictor"] = 3
        data = np.where(np.isfinite(arr), arr, nodata).astype(dtype)
    else:
        data = arr.astype(dtype)
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(data)
        for b in range(count):
            dst.set_band_description(b + 1, descriptions[b])
            dst.set_band_unit(b + 1, units)
        if tags:
            dst.update_tags(**{k: str(v) for k, v in tags.items()})


def _clean(obj):
    """JSON-safe copy: NaN -> null, numpy scalars -> Python, Paths -> text."""
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _clean(obj.tolist())
    if isinstance(obj, (np.floating, float)):
        v = float(obj)
        return None if not math.isfinite(v) else v
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, Path):
        return str(obj)
    if hasattr(obj, "isoformat"):
        return obj.isoformat()
    return obj


def write_json(path: Path, data: dict) -> None:
    with open(path, "w", encoding="utf-8") as f:
        json.dump(_clean(data), f, indent=2)
        f.write("\n")


def write_csv(path: Path, df: pd.DataFrame, float_format: str = "%.6g") -> None:
    df.to_csv(path, index=False, float_format=float_format, na_rep="")


# CF standard names where CF has one (CF Standard Name Table); balances in metres of
# water equivalent over a balance year have none, so they carry long_name and comment only.
CF_STANDARD_NAMES = {
    "elevation": "surface_altitude",
    "glacier_fraction": "land_ice_area_fraction",
}


def write_netcdf(path: Path, ds, crs, attrs: dict | None = None) -> None:
    """Write a (balance_year, y, x) Dataset as compressed NetCDF-CF (NetCDF-4 via h5netcdf).

    The grid-mapping variable ``crs`` comes from pyproj's ``CRS.to_cf()`` (CF-1.8
    conventions, with ``crs_wkt``); every data variable points at it through
    ``grid_mapping``. Units "m w.e." (not UDUNITS) are written as ``units = "m"`` with a
    comment that the value is metres of water equivalent.
    """
    import xarray as xr
    from pyproj import CRS

    pcrs = CRS.from_wkt(crs.to_wkt()) if not isinstance(crs, CRS) else crs
    out = ds.copy()
    out["crs"] = xr.DataArray(np.int32(0), attrs=pcrs.to_cf())
    out["x"].attrs.update(standard_name="projection_x_coordinate", long_name="x coordinate of cell centre",
                          units="m")
    out["y"].attrs.update(standard_name="projection_y_coordinate", long_name="y coordinate of cell centre",
                          units="m")
    out["balance_year"].attrs.update(long_name="balance year, labelled by the calendar year it ends in",
                                     units="1")
    encoding = {}
    for name, var in out.data_vars.items():
        if name == "crs":
            continue
        a = dict(var.attrs)
        if a.get("units") == "m w.e.":
            a["units"] = "m"
            a["comment"] = "metres of water equivalent (m w.e.)"
        if name in CF_STANDARD_NAMES:
            a["standard_name"] = CF_STANDARD_NAMES[name]
        a["grid_mapping"] = "crs"
        var.attrs = a
        encoding[name] = {"zlib": True, "complevel": 4, "dtype": "float32", "_FillValue": np.float32(NODATA)}
    out.attrs = {k: v for k, v in out.attrs.items() if k != "crs_wkt"}
    out.attrs.update({"Conventions": "CF-1.8"}, **(attrs or {}))
    out.to_netcdf(path, engine="h5netcdf", encoding=encoding)
