"""The model grid: a DEM read with rasterio, nodata masked, in a metric CRS.

A DEM in a projected CRS with metre units is used as it is. A DEM in a
geographic CRS (longitude/latitude) is reprojected, bilinear, to the UTM zone of
its centre (found with pyproj's UTM zone query), and a note says so.
"""

from __future__ import annotations

import hashlib
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import rasterio
from affine import Affine
from pyproj import CRS, Transformer
from pyproj.aoi import AreaOfInterest
from pyproj.database import query_utm_crs_info
from rasterio.crs import CRS as RioCRS
from rasterio.errors import NotGeoreferencedWarning, RasterioIOError
from rasterio.warp import Resampling, calculate_default_transform, reproject

from .errors import InputError
from .files import regular_file


@dataclass(frozen=True)
class Grid:
    """A DEM on a metric grid.

    Attributes
    ----------
    elevation : ndarray (ny, nx) float64
        Surface elevation, m; NaN on nodata cells.
    valid : ndarray (ny, nx) bool
        True where the DEM has a value.
    transform : affine.Affine
        Pixel-to-CRS transform (GDAL convention: origin at the upper-left corner).
    crs : rasterio.crs.CRS
        Projected CRS with metre units.
    path : Path
        The DEM file.
    checksum : str
        SHA-256 of the DEM file's bytes (keys caches, goes into run.json).
    notes : list of str
        Plain sentences for the console (for example a reprojection).
    """

    elevation: np.ndarray
    valid: np.ndarray
    transform: Affine
    crs: RioCRS
    path: Path
    checksum: str
    notes: list = field(default_factory=list)

    @property
    def shape(self) -> tuple[int, int]:
        return self.elevation.shape

    @property
    def cell_size_m(self) -> tuple[float, float]:
        """(dx, dy) cell size in metres, both positive."""
        return abs(self.transform.a), abs(self.transform.e)

    @property
    def cell_area_m2(self) -> float:
        dx, dy = self.cell_size_m
        return dx * dy

    @property
    def n_valid(self) -> int:
        return int(self.valid.sum())

    def to_grid(self, values: np.ndarray, where: np.ndarray | None = None,
                cells: np.ndarray | None = None) -> np.ndarray:
        """Scatter per-cell values (..., n) onto maps (..., ny, nx), float32, NaN elsewhere.

        ``cells`` are the flat C-order indices the values belong to (default: every valid
        cell in order); cells where ``where`` (n,) is False also get NaN.
        """
        ny, nx = self.shape
        lead = values.shape[:-1]
        out = np.full(lead + (ny * nx,), np.nan, dtype="float32")
        at = self.valid.ravel() if cells is None else cells
        out[..., at] = values if where is None else np.where(where, values, np.nan)
        return out.reshape(lead + (ny, nx))

    def cell_centres(self) -> tuple[np.ndarray, np.ndarray]:
        """x (nx,) and y (ny,) coordinates of the cell centres in the grid's CRS, m."""
        ny, nx = self.shape
        t = self.transform
        x = t.c + (np.arange(nx) + 0.5) * t.a
        y = t.f + (np.arange(ny) + 0.5) * t.e
        return x, y

    def lonlat(self, rows: tuple[int, int] | None = None,
               cols: tuple[int, int] | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Longitude and latitude (degrees, WGS 84) of every cell centre, each (ny, nx), or of a
        window of rows ``rows[0] .. rows[1] - 1`` and columns ``cols[0] ..`` (the same values)."""
        x, y = self.cell_centres()
        if rows is not None:
            y = y[rows[0]:rows[1]]
        if cols is not None:
            x = x[cols[0]:cols[1]]
        xx, yy = np.meshgrid(x, y)
        tr = Transformer.from_crs(CRS.from_wkt(self.crs.to_wkt()), CRS.from_epsg(4326), always_xy=True)
        lon, lat = tr.transform(xx, yy)
        return np.asarray(lon), np.asarray(lat)


def file_checksum(path: Path) -> str:
    """SHA-256 hex digest of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def to_crs(x: np.ndarray, y: np.ndarray, from_crs, to_crs_, key: str) -> tuple[np.ndarray, np.ndarray]:
    """Coordinates transformed between two CRSs (any pyproj or rasterio CRS, or text like "EPSG:32632").

    ``key`` names the config key of ``from_crs`` in the message when pyproj does not know it.
    Either CRS ``None``: the coordinates are returned as they are.
    """
    from pyproj.exceptions import CRSError

    def as_pyproj(c):
        return c if isinstance(c, CRS) else CRS.from_wkt(c.to_wkt()) if hasattr(c, "to_wkt") else CRS.from_user_input(c)
    if from_crs is None or to_crs_ is None:
        return x, y
    try:
        src = as_pyproj(from_crs)
    except CRSError:
        raise InputError(f"{key} {from_crs!r} is not a coordinate reference system pyproj knows; "
                         "give one like \"EPSG:32632\".") from None
    dst = as_pyproj(to_crs_)
    if src == dst:
        return x, y
    xt, yt = Transformer.from_crs(src, dst, always_xy=True).transform(x, y)
    return np.asarray(xt, dtype="float64"), np.asarray(yt, dtype="float64")


def utm_crs_for(lon: float, lat: float) -> CRS:
    """The WGS 84 UTM zone CRS that contains a point (pyproj's database query)."""
    infos = query_utm_crs_info(datum_name="WGS 84",
                               area_of_interest=AreaOfInterest(lon, lat, lon, lat))
    if not infos:  # pragma: no cover - only outside the UTM domain
        raise InputError(f"no UTM zone covers longitude {lon:.3f}, latitude {lat:.3f}.")
    # prefer the plain "WGS 84 / UTM zone NNx" entry
    infos = sorted(infos, key=lambda i: (not i.name.startswith("WGS 84 / UTM"), i.code))
    return CRS.from_authority(infos[0].auth_name, infos[0].code)


def _metre_units(crs: RioCRS) -> bool:
    pcrs = CRS.from_wkt(crs.to_wkt())
    return all((ax.unit_name or "").lower() in ("metre", "meter", "m") for ax in pcrs.axis_info)


def read_dem(path: str | Path) -> Grid:
    """Read a DEM into a :class:`Grid`.

    Parameters
    ----------
    path : str or Path
        Any single-band raster that rasterio (GDAL) reads; elevations in metres.

    Returns
    -------
    Grid
        Elevation as float64 with NaN on nodata. A geographic DEM is reprojected
        (bilinear) to the UTM zone of its centre; ``notes`` says so.

    Raises
    ------
    InputError
        The file is missing, not a regular file (a folder, FIFO or device) or not
        a raster, has no CRS, has no valid cell, has elevations outside
        :data:`ELEVATION_RANGE_M`, or its projected CRS is not in metres. A DEM with
        several bands is read from band 1, and a note says so.
    """
    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: DEM file not found; check [dem] path.")
    regular_file(path, "DEM", "[dem] path")
    notes: list[str] = []
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", NotGeoreferencedWarning)
            src = rasterio.open(path)
        with src:
            if src.crs is None:
                raise InputError(f"{path.name}: the DEM has no coordinate reference system; "
                                 "assign one (for example with gdal_edit.py -a_srs) and run again.")
            if src.count > 1:
                desc = src.descriptions[0]
                notes.append(f"{path.name} has {src.count} bands; band 1"
                             + (f" (\"{desc}\")" if desc else "") + " is used as the elevation.")
            data = src.read(1, masked=True).astype("float64")
            elevation = data.filled(np.nan)
            transform, crs = src.transform, src.crs
            if src.transform.b != 0 or src.transform.d != 0:
                raise InputError(f"{path.name}: the DEM grid is rotated; warp it to a north-up grid first.")
    except RasterioIOError:
        raise InputError(f"{path.name}: not a raster that rasterio can read; give a GeoTIFF or "
                         "another GDAL raster as [dem] path.") from None
    elevation[~np.isfinite(elevation)] = np.nan
    _check_elevations(elevation, path.name)
    if crs.is_geographic:
        elevation, transform, crs, note = _to_utm(elevation, transform, crs)
        notes.append(f"{path.name}: {note}")
    elif not _metre_units(crs):
        raise InputError(f"{path.name}: the DEM's projected CRS is not in metres; reproject it to a "
                         "metric CRS (for example its UTM zone).")
    valid = np.isfinite(elevation)
    if not valid.any():
        raise InputError(f"{path.name}: the DEM has no valid cell (all nodata).")
    return Grid(elevation=elevation, valid=valid, transform=transform, crs=crs, path=path.resolve(),
                checksum=file_checksum(path), notes=notes)


#: Elevations accepted in a DEM, m: below the Dead Sea shore (about -430 m) and above Everest
#: (8849 m) with a margin (common practice); anything outside is a void code or a unit error.
ELEVATION_RANGE_M = (-500.0, 9000.0)


def _check_elevations(elevation: np.ndarray, name: str) -> None:
    """InputError naming the first cell outside :data:`ELEVATION_RANGE_M` (NaN cells are nodata)."""
    lo, hi = ELEVATION_RANGE_M
    with np.errstate(invalid="ignore"):
        bad = (elevation < lo) | (elevation > hi)
    if bad.any():
        r, c = np.unravel_index(int(np.argmax(bad)), bad.shape)
        n = int(bad.sum())
        raise InputError(f"{name}: {n} cell{'s have' if n > 1 else ' has'} elevations outside {lo:g}..{hi:g} m "
                         f"(the first, row {r} column {c}, is {elevation[r, c]:g}); set the DEM's nodata value "
                         "to its void code or convert the elevations to metres.")


def _to_utm(elevation, transform, crs):
    ny, nx = elevation.shape
    lon_c, lat_c = transform @ (nx / 2.0, ny / 2.0)
    utm = utm_crs_for(lon_c, lat_c)
    dst_crs = RioCRS.from_wkt(utm.to_wkt())
    left, top = transform @ (0, 0)
    right, bottom = transform @ (nx, ny)
    dst_transform, w, h = calculate_default_transform(
        crs, dst_crs, nx, ny, left=min(left, right), bottom=min(top, bottom),
        right=max(left, right), top=max(top, bottom))
    # square cells, as metric models expect
    res = min(abs(dst_transform.a), abs(dst_transform.e))
    dst_transform, w, h = calculate_default_transform(
        crs, dst_crs, nx, ny, left=min(left, right), bottom=min(top, bottom),
        right=max(left, right), top=max(top, bottom), resolution=res)
    out = np.full((h, w), np.nan)
    reproject(elevation, out, src_transform=transform, src_crs=crs, src_nodata=np.nan,
              dst_transform=dst_transform, dst_crs=dst_crs, dst_nodata=np.nan,
              resampling=Resampling.bilinear)
    name = utm.name
    note = (f"geographic DEM reprojected (bilinear) to {name} (EPSG:{utm.to_epsg()}), "
            f"{res:.1f} m cells, {h} x {w}.")
    return out, dst_transform, dst_crs, note
