"""Writers: GeoTIFF, CSV, JSON and NetCDF-CF.

Every command writes its files through :func:`staged` (see :mod:`firnline.outdir`):
the whole new set goes into a staging folder beside the output folder and is
swapped in, all or nothing, when it is complete; a failure or an interruption on
the way leaves the earlier set as it was.

GeoTIFFs are cloud-optimised (COG, written by GDAL's COG driver): float32, tiled
256 x 256, DEFLATE with the floating-point predictor, overviews, nodata -9999, a
band description and unit, and the run's provenance in the dataset tags.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd

from .outdir import Staging, staged  # noqa: F401  (the writers' entry point)

NODATA = -9999.0


#: GDAL COG creation options of every GeoTIFF (GDAL COG driver documentation): 256 x 256
#: tiles, DEFLATE with the predictor, at level 1, compressed on all cores. Measured with
#: ``python benchmarks/writers.py`` (24 maps of 1e6 cells): 0.89 s and 59.1 MB, against
#: 1.61 s and 58.6 MB at GDAL's default level 6 on one thread.
COG_OPTIONS = dict(COMPRESS="DEFLATE", PREDICTOR="YES", BLOCKSIZE=256, LEVEL=1, NUM_THREADS="ALL_CPUS")
#: NetCDF-4 encoding of the gridded variables of balance.nc: zlib level 1 after the shuffle
#: filter, chunks of one map (one year) x 512 x 512 cells (``tile``). Measured in
#: the same script: 0.99 s and 45.5 MB, against 1.53 s and 54.2 MB with the earlier zlib 4, no shuffle
#: and h5py's own chunks.
NETCDF_ENCODING = {"zlib": True, "complevel": 1, "shuffle": True, "tile": 512}


#: A GeoTIFF whose bands take more than this is staged in a file beside it, not in memory.
MEMORY_SOURCE_BYTES = 256 * 2**20


def write_geotiff(path: Path, bands, transform, crs, descriptions: Sequence[str], units: str,
                  tags: dict | None = None, dtype: str = "float32", nodata: float = NODATA) -> None:
    """Write one or more 2D bands as a cloud-optimised GeoTIFF (COG).

    ``bands``: a (ny, nx) or (count, ny, nx) array, or a sequence of (ny, nx) arrays; numpy, xarray
    or dask (read a strip of rows at a time, :func:`firnline.yearmaps.row_strips`, so a map held in a
    file is never loaded whole). NaN becomes ``nodata``. ``descriptions`` gives one text per band;
    ``units`` is set on every band; ``tags`` (provenance) go into the dataset metadata.

    The bands are first written to a tiled GTiff, in memory (or, above
    :data:`MEMORY_SOURCE_BYTES`, in a file beside ``path`` removed afterwards), where rasterio can
    set band descriptions, units and tags, then copied with GDAL's COG driver, which carries that
    metadata over and lays the file out as the COG standard asks (GDAL COG driver documentation;
    OGC Cloud Optimized GeoTIFF standard, 2023): 256 x 256 tiles, DEFLATE (floating-point
    predictor for floats), overviews down to one tile (averaged for floats, the most frequent
    value for integer ids), and every IFD ahead of the image data.
    """
    import rasterio
    from rasterio.io import MemoryFile
    from rasterio.shutil import copy as gdal_copy
    from rasterio.windows import Window

    from .yearmaps import row_strips

    if isinstance(bands, (list, tuple)):
        layers = list(bands)
    elif getattr(bands, "ndim", np.ndim(bands)) == 2:
        layers = [bands]
    else:
        layers = [bands[i] for i in range(bands.shape[0])]
    count = len(layers)
    ny, nx = layers[0].shape
    is_float = np.dtype(dtype).kind == "f"
    profile = dict(driver="GTiff", width=nx, height=ny, count=count, dtype=dtype, crs=crs,
                   transform=transform, nodata=nodata, tiled=True, blockxsize=256, blockysize=256)

    def fill(tmp) -> None:
        for b, layer in enumerate(layers):
            for r0, r1 in row_strips((ny, nx), np.dtype(dtype).itemsize):
                a = np.asarray(layer[r0:r1])
                data = np.where(np.isfinite(a), a, nodata).astype(dtype) if is_float else a.astype(dtype)
                tmp.write(data, b + 1, window=Window(0, r0, nx, r1 - r0))
            tmp.set_band_description(b + 1, descriptions[b])
            tmp.set_band_unit(b + 1, units)
        if tags:
            tmp.update_tags(**{k: str(v) for k, v in tags.items()})

    def to_cog(src) -> None:
        gdal_copy(src, str(path), driver="COG", **COG_OPTIONS, BIGTIFF="IF_SAFER",
                  OVERVIEW_RESAMPLING="AVERAGE" if is_float else "MODE")

    if count * ny * nx * np.dtype(dtype).itemsize <= MEMORY_SOURCE_BYTES:
        with MemoryFile() as mem:
            with mem.open(**profile) as tmp:
                fill(tmp)
            with mem.open() as src:
                to_cog(src)
        return
    source = Path(path).with_name(Path(path).name + ".source.tif")
    try:
        with rasterio.open(source, "w", **profile, BIGTIFF="IF_SAFER") as tmp:
            fill(tmp)
        with rasterio.open(source) as src:
            to_cog(src)
    finally:
        source.unlink(missing_ok=True)


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


def plain_number(value: float, digits: int = 6) -> str:
    """``value`` with ``digits`` significant digits in positional notation (never ``1e-05``).

    The integer part is never rounded away (12345678.9 gives 12345679); trailing zeros
    are dropped; whole numbers print without a decimal point.
    """
    if not math.isfinite(value):
        return ""
    if value == 0:
        return "0"
    decimals = max(0, digits - 1 - math.floor(math.log10(abs(value))))
    text = np.format_float_positional(value, precision=decimals, unique=False, fractional=True, trim="-")
    return "0" if text in ("-0", "0") else text


def write_csv(path: Path, df: pd.DataFrame, float_format: str = "%.6g") -> None:
    """Write a table as CSV: no index, empty cells for missing values, and floats in
    positional notation with the significant digits of ``float_format`` ("%.Ng"), so a
    spreadsheet or a reader pastes plain numbers (0.00012, not 1.2e-04)."""
    digits = int(float_format.strip("%g.")) if float_format.endswith("g") else 6
    out = df.copy(deep=False)
    for col in out.columns:
        if pd.api.types.is_float_dtype(out[col].dtype):
            out[col] = plain_numbers(out[col].to_numpy(dtype="float64", na_value=np.nan), digits)
    out.to_csv(path, index=False, na_rep="")


def plain_numbers(values: np.ndarray, digits: int = 6) -> np.ndarray:
    """:func:`plain_number` of every value of a float array, as an object array of str.

    The same text (``%.Nf`` rounds the exact binary value as :func:`plain_number` does),
    made by C-level formatting instead of one numpy call per value.
    """
    v = np.asarray(values, dtype="float64")
    out = np.full(v.shape, "", dtype=object)
    finite = np.isfinite(v)
    out[finite & (v == 0)] = "0"
    nz = finite & (v != 0)
    if not nz.any():
        return out
    x = v[nz]
    with np.errstate(divide="ignore"):
        decimals = np.maximum(0, digits - 1 - np.floor(np.log10(np.abs(x)))).astype(np.int64)

    def fmt(value, d):
        t = "%.*f" % (d, value)
        if d:
            t = t.rstrip("0").rstrip(".")
        return "0" if t in ("-0", "0") else t
    text = np.array([fmt(a, d) for a, d in zip(x.tolist(), decimals.tolist())], dtype=object)
    out[nz] = text
    return out


# CF standard names where CF has one (CF Standard Name Table); balances in metres of
# water equivalent over a balance year have none, so they carry long_name and comment only.
CF_STANDARD_NAMES = {
    "elevation": "surface_altitude",
    "glacier_fraction": "land_ice_area_fraction",
}

CF_CONVENTIONS = "CF-1.8"
TIME_UNITS = "days since 1970-01-01 00:00:00"
WATER_EQUIVALENT_COMMENT = (
    "metres of water equivalent (m w.e.): the mass per unit area divided by the density of water "
    "(1000 kg m-3), so 1 m w.e. = 1000 kg m-2; the number is the same as in the GeoTIFFs and CSV tables")


def write_netcdf(path: Path, ds, crs, attrs: dict | None = None, year_bounds=None,
                 cell_methods: dict | None = None) -> None:
    """Write a (balance_year, y, x) Dataset as compressed NetCDF-CF 1.8 (NetCDF-4 via h5netcdf).

    Parameters
    ----------
    path : Path
    ds : xarray.Dataset with dims (balance_year, y, x); ``balance_year`` holds the labels
    crs : the grid's CRS (rasterio or pyproj)
    attrs : global attributes to add
    year_bounds : sequence of (start, end) dates per balance year, optional
        The fixed-date balance year as a half-open interval [start, end). With it the
        ``balance_year`` dimension gets a CF time coordinate (CF 1.8 section 4.4:
        ``standard_name = "time"``, ``units = "days since 1970-01-01 00:00:00"``,
        ``calendar = "standard"``, ``axis = "T"``) whose value is the last day of the
        balance year (so its calendar year is the label), and a bounds variable
        ``balance_year_bounds`` (section 7.1) holding the start and end.
    cell_methods : {variable: text}, optional
        CF ``cell_methods`` (section 7.3), e.g. ``"balance_year: sum area: mean"``.

    Notes
    -----
    Units: "m w.e." is not a UDUNITS unit. Balances are written with ``units = "m"`` (a
    length of water, which UDUNITS parses) and the water-equivalent meaning in
    ``long_name`` and ``comment``; kg m-2 was not chosen because the numbers would then
    differ by 1000 from the GeoTIFFs and tables of the same run. Coordinates and bounds
    carry no ``_FillValue`` (CF 1.8 section 2.5.1: coordinates hold no missing data).
    The grid-mapping variable ``crs`` comes from pyproj's ``CRS.to_cf()`` (section 5.6,
    with ``crs_wkt``); every data variable points at it through ``grid_mapping``.
    """
    import xarray as xr
    from pyproj import CRS

    pcrs = CRS.from_wkt(crs.to_wkt()) if not isinstance(crs, CRS) else crs
    out = ds.copy()
    out["crs"] = xr.DataArray(np.int32(0), attrs=pcrs.to_cf())
    out["x"].attrs = dict(standard_name="projection_x_coordinate", long_name="x coordinate of cell centre",
                          units="m", axis="X")
    out["y"].attrs = dict(standard_name="projection_y_coordinate", long_name="y coordinate of cell centre",
                          units="m", axis="Y")
    encoding = {"x": {"_FillValue": None}, "y": {"_FillValue": None}, "crs": {"_FillValue": None}}
    if year_bounds is not None:
        epoch = np.datetime64("1970-01-01", "D")
        starts = np.array([np.datetime64(a, "D") for a, _ in year_bounds])
        ends = np.array([np.datetime64(b, "D") for _, b in year_bounds])
        labels = [int(v) for v in out["balance_year"].values]
        last_day = ((ends - epoch).astype("int64") - 1).astype("float64")
        out = out.assign_coords(balance_year=("balance_year", last_day, dict(
            standard_name="time", long_name="balance year (fixed-date system), stamped on its last day; "
                                            "its calendar year is the balance-year label",
            units=TIME_UNITS, calendar="standard", axis="T", bounds="balance_year_bounds",
            comment="balance years " + ", ".join(str(v) for v in labels) + "; each is the half-open "
                    "interval [start, end) given by balance_year_bounds")))
        bounds = np.stack([(starts - epoch).astype("int64"), (ends - epoch).astype("int64")], axis=1)
        out["balance_year_bounds"] = xr.DataArray(bounds.astype("float64"), dims=("balance_year", "nv"))
        encoding["balance_year"] = {"_FillValue": None, "dtype": "float64"}
        encoding["balance_year_bounds"] = {"_FillValue": None, "dtype": "float64"}
    else:
        out["balance_year"].attrs = dict(long_name="balance year, labelled by the calendar year it ends in")
        encoding["balance_year"] = {"_FillValue": None}
    for name, var in out.data_vars.items():
        if name in ("crs", "balance_year_bounds"):
            continue
        a = dict(var.attrs)
        if a.get("units") == "m w.e.":
            a["units"] = "m"
            a["long_name"] = f"{a.get('long_name', name)}, in metres of water equivalent (m w.e.)"
            a["comment"] = WATER_EQUIVALENT_COMMENT
        if name in CF_STANDARD_NAMES:
            a["standard_name"] = CF_STANDARD_NAMES[name]
        if cell_methods and name in cell_methods:
            a["cell_methods"] = cell_methods[name]
        a["grid_mapping"] = "crs"
        var.attrs = a
        enc = dict(NETCDF_ENCODING)
        tile = enc.pop("tile")
        if var.ndim >= 2:          # one map a chunk, cut into tiles (y, x last)
            enc["chunksizes"] = (1,) * (var.ndim - 2) + tuple(min(tile, n) for n in var.shape[-2:])
        encoding[name] = {**enc, "dtype": "float32", "_FillValue": np.float32(NODATA)}
    out.attrs = {k: v for k, v in out.attrs.items() if k != "crs_wkt"}
    out.attrs.update({"Conventions": CF_CONVENTIONS}, **(attrs or {}))
    out.to_netcdf(path, engine="h5netcdf", encoding=encoding)
