"""Glacier outlines on the DEM grid: reading, reprojection and fractional coverage.

Outlines come from a vector file (GeoJSON, GeoPackage or Shapefile, any CRS),
are reprojected to the DEM's CRS with densified edges, checked, and turned
into per-glacier lists of covered cells with the exact share of each cell
that the glacier covers. Holes (nunataks) are not glacier.

Files are read only in :func:`read_outlines` (and :func:`load_glaciers`, which
chains the steps); everything else is a pure function of shapely geometries
and numpy arrays.

Coverage method
---------------
Each cell's share is the *exact* area of the cell-polygon intersection, not a
supersampled estimate. The polygon is mapped into pixel coordinates with the
inverse of the grid's affine transform (cells become unit squares, so any
north-up, south-up, rotated, square or rectangular grid is handled alike), its
edges are cut at every cell line, and Green's theorem turns the area of the
polygon inside each cell into a sum over the edge pieces: a piece in column
``c`` and row ``j`` running over ``dx`` at mean pixel height ``y_m`` adds
``-dx * (y_m - j)`` to cell ``(j, c)`` and ``-dx`` to every cell ``(r, c)``
with ``r < j`` (a cumulative sum along the column). This is the
shoelace (surveyor's) area formula applied cell by cell (Green's theorem; the
polygon form: Braden, 1986, The College Mathematics Journal 17(4), 326-337,
from memory). It is exact up to rounding, so each glacier's modelled area
matches its polygon's area to about 1e-12 (far inside the 1 % required), has
no resolution parameter to tune, costs time in proportion to the number of
edge pieces plus the cells of the glacier's bounding window, and runs as
numpy array operations with no Python loop over cells (the loop is over
glaciers). Supersampling with n x n samples per cell would only estimate the
shares (an edge cell can be off by about 1/n) at n**2 times the cost.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np
import pyproj
import shapely
from affine import Affine

from firnline.errors import InputError
from firnline.files import regular_file

__all__ = [
    "Glaciers",
    "read_outlines",
    "reproject_outlines",
    "build_glaciers",
    "whole_grid",
    "load_glaciers",
]

#: Cell shares below this (a billionth of a cell) are rounding residue of
#: edges that run along cell lines; such cells are not counted as covered.
MIN_FRACTION = 1e-9

#: Two outlines may overlap by at most this share of the smaller one's area
#: (digitising slivers along a shared boundary); more is an error.
OVERLAP_TOLERANCE = 1e-6

#: Shares of an outline's area lost outside the DEM or over nodata below this
#: are rounding residue and give no warning.
LOSS_WARNING_SHARE = 1e-6

#: Metres per degree along a meridian (about 110.6-111.7 km; the equatorial
#: value is the largest, so densifying by it never gives longer segments).
_M_PER_DEGREE = 111_320.0

_POLYGONAL = ("Polygon", "MultiPolygon")


@dataclass(frozen=True)
class Glaciers:
    """Glaciers on the DEM grid, in the order of the outlines file (not sorted).

    Attributes
    ----------
    names : list of str
        Glacier ids as strings, in file order.
    cells : list of numpy.ndarray
        Per glacier, int64 flat indices (C order, ``row * nx + col``) into the
        full ``(ny, nx)`` grid of the valid cells the glacier covers
        (share > ``MIN_FRACTION``, i.e. > 0 but for rounding), ascending.
    fractions : list of numpy.ndarray
        Per glacier, float64 share (0, 1] of each of those cells that the
        glacier covers, dimensionless.
    polygon_area_m2 : numpy.ndarray
        Per glacier, area of its reprojected polygon in the DEM's CRS, m2,
        including any part outside the DEM or over nodata (its area in cells
        times ``cell_area_m2``: the shapely area for a CRS in metres).
    modelled_area_m2 : numpy.ndarray
        Per glacier, ``sum(fractions) * cell area`` over valid cells, m2.
    total_fraction : numpy.ndarray
        float32 ``(ny, nx)``: glacier share of each cell over all glaciers,
        0 outside glaciers and on nodata, clipped to 1.
    id_map : numpy.ndarray
        int32 ``(ny, nx)``: 1-based index into ``names`` of the glacier with
        the largest share of the cell (the first in file order on a tie),
        0 where no glacier covers a valid cell.
    warnings : list of str
        Plain sentences: outlines partly outside the DEM or over nodata (with
        the share of area lost) and repaired geometries.
    """

    names: list[str]
    cells: list[np.ndarray]
    fractions: list[np.ndarray]
    polygon_area_m2: np.ndarray
    modelled_area_m2: np.ndarray
    total_fraction: np.ndarray
    id_map: np.ndarray
    warnings: list[str]


# --------------------------------------------------------------------------
# file edge


def read_outlines(path, id_field, layer=None):
    """Read glacier outlines and their ids from a vector file.

    Parameters
    ----------
    path : str or os.PathLike
        GeoJSON, GeoPackage or Shapefile (anything GDAL reads through pyogrio).
    id_field : str
        Attribute holding each glacier's id or name.
    layer : str, optional
        Layer to read; needed only when the file holds more than one layer
        (a GeoPackage may).

    Returns
    -------
    names : list of str
        Ids as strings, in file order (integer-valued numbers without ".0").
    geoms : list of shapely geometry or None
        2D geometries in the file's CRS (None for a feature without one;
        :func:`build_glaciers` rejects those with the feature named).
    crs : pyproj.CRS
        The file's CRS; longitude/latitude (OGC:CRS84) for a GeoJSON file
        without a ``crs`` member, as RFC 7946 (Butler et al., 2016, IETF)
        prescribes.

    Raises
    ------
    InputError
        The file or layer cannot be read, the layer is ambiguous, ``id_field``
        does not exist (the fields that do are listed), an id is missing, the
        file has no features, or a non-GeoJSON file has no CRS.
    """
    import pyogrio
    from pyogrio import raw
    from pyogrio.errors import DataLayerError, DataSourceError

    where = f"Glacier outlines file {os.fspath(path)}"
    if not os.path.exists(path):
        raise InputError(f"{where} does not exist; check [glaciers] outlines in the config.")
    regular_file(path, "glacier outlines file", "[glaciers] outlines")
    layers = np.empty((0, 2), dtype=object)
    try:
        layers = pyogrio.list_layers(path)
        if layer is None and len(layers) > 1:
            listed = ", ".join(str(name) for name in layers[:, 0])
            raise InputError(
                f"{where} holds {len(layers)} layers ({listed}); name the one with the "
                "glaciers in [glaciers] layer."
            )
        info = pyogrio.read_info(path, layer=layer)
        fields = [str(f) for f in info["fields"]]
        if id_field not in fields:
            listed = ", ".join(fields) if fields else "none"
            raise InputError(
                f"{where} has no field '{id_field}' (set by [glaciers] id_field); "
                f"use one of its fields: {listed}."
            )
        meta, _fids, wkb, field_data = raw.read(
            path, layer=layer, columns=[id_field], force_2d=True
        )
    except (DataSourceError, DataLayerError) as exc:
        detail = str(exc).strip().rstrip(".")
        if layer is not None and len(layers):
            detail += f" (layers in the file: {', '.join(str(n) for n in layers[:, 0])})"
        raise InputError(
            f"{where} cannot be read ({detail}); give a GeoJSON, GeoPackage or "
            "Shapefile with polygon outlines."
        ) from exc

    if len(wkb) == 0:
        raise InputError(f"{where} holds no features; add the glacier outlines.")
    names = []
    for number, value in enumerate(field_data[0], start=1):
        name = _id_text(value)
        if name is None:
            raise InputError(
                f"{where}: feature {number} (in file order) has no value in id field "
                f"'{id_field}'; give every outline an id."
            )
        names.append(name)
    geoms = [None if g is None else shapely.from_wkb(g) for g in wkb]

    is_geojson = info.get("driver") == "GeoJSON" or str(path).lower().endswith((".geojson", ".json"))
    member = _geojson_crs_member(path, where) if is_geojson else None
    if member is not None:
        crs = member
    elif meta.get("crs"):
        try:
            crs = pyproj.CRS.from_user_input(meta["crs"])
        except pyproj.exceptions.CRSError:
            raise InputError(f"{where} declares a coordinate reference system that is not known "
                             f"({str(meta['crs'])[:60]}); give the outlines in an EPSG CRS.") from None
    elif is_geojson:
        crs = pyproj.CRS.from_user_input("OGC:CRS84")  # RFC 7946, section 4
    else:
        raise InputError(
            f"{where} has no coordinate reference system; add one (for a Shapefile, "
            "the .prj file beside it)."
        )
    return names, geoms, crs


def _geojson_crs_member(path, where):
    """The CRS named by a GeoJSON file's (pre-RFC 7946) ``crs`` member, or None without one.

    GDAL reads an unknown name there as longitude/latitude without a word, which would
    place outlines in metres at absurd degrees; an unknown name is refused instead.
    """
    import json

    try:
        with open(path, "rb") as f:
            data = json.load(f)
    except (OSError, ValueError):
        return None                           # pyogrio has read it; leave the details to it
    member = data.get("crs") if isinstance(data, dict) else None
    if member is None:
        return None
    props = member.get("properties") if isinstance(member, dict) else None
    name = props.get("name") if isinstance(props, dict) else None
    if not isinstance(name, str) or not name.strip():
        raise InputError(f"{where}: its \"crs\" member names no CRS ({json.dumps(member)[:80]}); give "
                         "\"properties\": {\"name\": \"EPSG:...\"} or remove the member for longitude/latitude.")
    try:
        return pyproj.CRS.from_user_input(name)
    except pyproj.exceptions.CRSError:
        raise InputError(f"{where}: its \"crs\" member names \"{name[:60]}\", which is not a known "
                         "coordinate reference system; name it as EPSG:<code> (for example "
                         "urn:ogc:def:crs:EPSG::32632).") from None


def _id_text(value):
    """An id value as text, or None when it is missing (null, NaN, blank)."""
    if value is None:
        return None
    if isinstance(value, (float, np.floating)):
        if not np.isfinite(value):
            return None
        if float(value).is_integer():
            return str(int(value))
    if isinstance(value, bytes):
        value = value.decode("utf-8", "replace")
    text = str(value)
    return text if text.strip() else None


# --------------------------------------------------------------------------
# reprojection


def reproject_outlines(geoms, src_crs, dst_crs, densify_m=50.0):
    """Reproject outlines, densifying edges first so long straight sides stay correct.

    An edge is a straight line in the source CRS (for GeoJSON: RFC 7946,
    Butler et al., 2016, section 3.1.1, from memory); its image in another CRS is generally curved. Vertices are
    inserted along every edge, in the source CRS, no more than ``densify_m``
    apart before the vertices are transformed, so the reprojected chords
    follow the curve. A chord of length L on a curve of curvature k departs
    from it by L**2 * k / 8, well under a millimetre for 50 m chords on a
    UTM image of a 1 degree long edge.

    Each outline is first put in shapely's normal form (ring orientation,
    start vertex and order of parts), so that the result does not depend on
    how a format stores rings (a Shapefile turns exterior rings clockwise):
    the same outlines give bit-identical results from any file format.

    Parameters
    ----------
    geoms : sequence of shapely geometry or None
        Outlines in ``src_crs``; None passes through.
    src_crs, dst_crs : pyproj.CRS, rasterio.crs.CRS or anything pyproj accepts
        Source and destination CRS.
    densify_m : float, default 50.0
        Largest edge length before transformation, m. For a geographic
        source CRS it is converted with 111 320 m per degree, which is the
        most a degree spans, so segments are never longer than asked.

    Returns
    -------
    list of shapely geometry or None
        Outlines in ``dst_crs``. Points that cannot be transformed become
        infinite coordinates (rejected by :func:`build_glaciers`).
    """
    src = pyproj.CRS.from_user_input(src_crs)
    dst = pyproj.CRS.from_user_input(dst_crs)
    arr = np.empty(len(geoms), dtype=object)
    arr[:] = list(geoms)
    arr = shapely.normalize(arr)
    if densify_m and densify_m > 0:
        arr = shapely.segmentize(arr, densify_m / _metres_per_unit(src))
    if src == dst:
        return list(arr)
    transformer = pyproj.Transformer.from_crs(src, dst, always_xy=True)

    def _transform(xy):
        x, y = transformer.transform(xy[:, 0], xy[:, 1])
        return np.column_stack([x, y])

    return list(shapely.transform(arr, _transform))


def _metres_per_unit(crs):
    """Length of one unit of the CRS's first axis, m (per degree for geographic)."""
    if crs.is_geographic:
        return _M_PER_DEGREE
    factor = crs.axis_info[0].unit_conversion_factor if crs.axis_info else 1.0
    return float(factor or 1.0)


# --------------------------------------------------------------------------
# coverage


def build_glaciers(names, geoms, transform, shape, valid, cell_area_m2):
    """Checked outlines (already in the DEM's CRS) to per-glacier cells and shares.

    Pure function. Shares are exact cell-polygon intersection areas (see the
    module docstring: Green's theorem / shoelace formula per cell).

    Parameters
    ----------
    names : sequence
        Glacier ids, in file order; turned into strings.
    geoms : sequence of shapely geometry
        Polygon or MultiPolygon outlines in the DEM's CRS; holes are not glacier.
    transform : affine.Affine
        The DEM's affine transform (pixel corner to CRS coordinates), as rasterio gives it.
    shape : tuple of int
        ``(ny, nx)`` of the DEM.
    valid : numpy.ndarray of bool
        ``(ny, nx)``, False on DEM nodata.
    cell_area_m2 : float
        Area of one cell, m2.

    Returns
    -------
    Glaciers

    Raises
    ------
    InputError
        Missing or duplicated ids; missing, empty, non-polygon, unprojectable or
        unrepairable geometry; outlines overlapping each other by more than
        ``OVERLAP_TOLERANCE`` of the smaller one (both named); outlines wholly
        outside the DEM or wholly over nodata.
    """
    return _build(names, geoms, transform, shape, valid, cell_area_m2, "Glacier outlines")


def _build(names, geoms, transform, shape, valid, cell_area_m2, where, warnings=None):
    ny, nx = (int(n) for n in shape)
    valid = np.asarray(valid, dtype=bool)
    if valid.shape != (ny, nx):
        raise ValueError(f"valid has shape {valid.shape}, expected {(ny, nx)}")
    if len(names) != len(geoms):
        raise ValueError(f"{len(names)} names for {len(geoms)} geometries")
    if len(geoms) == 0:
        raise InputError(f"{where}: there are no outlines; add at least one glacier outline.")

    names = _checked_names(names, where)
    warnings = list(warnings or [])
    geoms = [_checked_geometry(n, g, where, warnings) for n, g in zip(names, geoms)]
    _check_overlaps(names, geoms, where)

    transform = Affine(*tuple(transform)[:6])
    det = abs(transform.determinant)
    if det == 0:
        raise ValueError("the grid transform is degenerate")
    to_pixel = ~transform
    unit_area_m2 = float(cell_area_m2)  # m2 per pixel-space unit area

    # the id map first marks the glacier cells, then numbers them (slots of the sums below): the
    # cover is summed over glacier cells only, not over a float64 grid of every cell
    id_map = np.zeros(ny * nx, dtype=np.int32)
    valid_flat = valid.ravel()
    cells_out, fractions_out = [], []
    polygon_area = np.empty(len(names))
    modelled_area = np.empty(len(names))

    for k, (name, geom) in enumerate(zip(names, geoms)):
        pixel_geom = shapely.orient_polygons(_affine(geom, to_pixel))
        area_px = shapely.area(pixel_geom)
        flat, frac = _cell_fractions(pixel_geom, ny, nx)
        polygon_area[k] = area_px * unit_area_m2
        inside_px = frac.sum()
        if flat.size == 0:
            raise InputError(
                f"{where}: outline '{name}' lies wholly outside the DEM; fix its "
                "coordinates or CRS, or remove it."
            )
        ok = valid_flat[flat]
        lost_nodata_px = frac[~ok].sum()
        flat, frac = flat[ok], frac[ok]
        if flat.size == 0:
            raise InputError(
                f"{where}: outline '{name}' covers only DEM nodata cells; fill the DEM "
                "there or remove the outline."
            )
        share_out = max(0.0, 1.0 - inside_px / area_px)
        if share_out > LOSS_WARNING_SHARE:
            warnings.append(
                f"{where}: outline '{name}' lies partly outside the DEM, so "
                f"{_pct(share_out)} % of its area ({_km2(share_out * polygon_area[k])} km2) "
                "is left out."
            )
        share_nodata = lost_nodata_px / area_px
        if share_nodata > LOSS_WARNING_SHARE:
            warnings.append(
                f"{where}: outline '{name}' covers DEM nodata cells, so "
                f"{_pct(share_nodata)} % of its area ({_km2(share_nodata * polygon_area[k])} km2) "
                "is left out."
            )
        modelled_area[k] = frac.sum() * unit_area_m2
        id_map[flat] = 1
        cells_out.append(flat)
        fractions_out.append(frac)

    total_fraction = _cover(cells_out, fractions_out, id_map)
    return Glaciers(
        names=names,
        cells=cells_out,
        fractions=fractions_out,
        polygon_area_m2=polygon_area,
        modelled_area_m2=modelled_area,
        total_fraction=total_fraction.reshape(ny, nx),
        id_map=id_map.reshape(ny, nx),
        warnings=warnings,
    )


def _cover(cells, fractions, id_map):
    """The glacier cover (float32, ``min(1, sum of the glaciers' shares)``) of every cell, and, in
    ``id_map`` (int32, marked 1 on the glacier cells; rewritten in place), the 1-based number of the
    glacier with the largest share of each cell (the first in file order of equal shares; 0 off the
    glaciers). The sums and comparisons go glacier by glacier in file order over the glacier cells
    only, so the values are those of a pass over grids of every cell."""
    marked = np.flatnonzero(id_map)
    id_map[marked] = np.arange(1, marked.size + 1, dtype=np.int32)       # slots, 1-based
    total = np.zeros(marked.size)
    best = np.zeros(marked.size)
    which = np.zeros(marked.size, dtype=np.int32)
    for k, (flat, frac) in enumerate(zip(cells, fractions)):
        slot = id_map[flat] - 1
        total[slot] += frac
        larger = frac > best[slot]
        best[slot[larger]] = frac[larger]
        which[slot[larger]] = k + 1
    del best
    id_map[marked] = which
    cover = np.zeros(id_map.size, dtype=np.float32)
    cover[marked] = np.minimum(total, 1.0).astype(np.float32)
    return cover


def _checked_names(names, where):
    out, first_seen = [], {}
    for number, value in enumerate(names, start=1):
        name = _id_text(value)
        if name is None:
            raise InputError(
                f"{where}: feature {number} (in file order) has no id; give every outline an id."
            )
        if name in first_seen:
            raise InputError(
                f"{where}: id '{name}' is used by features {first_seen[name]} and {number} "
                "(in file order); give each glacier its own id, or merge its parts into "
                "one MultiPolygon."
            )
        first_seen[name] = number
        out.append(name)
    return out


def _checked_geometry(name, geom, where, warnings):
    """The outline as a valid Polygon/MultiPolygon, or InputError naming it."""
    if geom is None or shapely.is_empty(geom):
        raise InputError(f"{where}: outline '{name}' has no geometry; draw it or remove the feature.")
    if geom.geom_type not in _POLYGONAL:
        raise InputError(
            f"{where}: outline '{name}' is a {geom.geom_type}, not a polygon; store each "
            "glacier as a Polygon or MultiPolygon."
        )
    if not np.isfinite(shapely.get_coordinates(geom)).all():
        raise InputError(
            f"{where}: outline '{name}' has points that cannot be projected to the DEM's "
            "CRS; check the outline's coordinates and the file's CRS."
        )
    if shapely.is_valid(geom):
        return geom
    reason = shapely.is_valid_reason(geom)
    repaired = shapely.make_valid(geom)
    if repaired.geom_type not in _POLYGONAL or shapely.is_empty(repaired) or repaired.area <= 0:
        raise InputError(
            f"{where}: outline '{name}' is not a valid polygon ({reason}) and does not repair "
            f"to one (shapely.make_valid gives a {repaired.geom_type}); redraw it."
        )
    warnings.append(
        f"{where}: outline '{name}' was not a valid polygon ({reason}) and was repaired "
        f"with shapely.make_valid into a {repaired.geom_type}; check that it is what was meant."
    )
    return repaired


def _check_overlaps(names, geoms, where):
    """InputError naming two outlines that overlap by more than a sliver."""
    arr = np.array(geoms, dtype=object)
    tree = shapely.STRtree(arr)
    left, right = tree.query(arr, predicate="intersects")
    keep = left < right
    left, right = left[keep], right[keep]
    if left.size == 0:
        return
    overlap = shapely.area(shapely.intersection(arr[left], arr[right]))
    areas = shapely.area(arr)
    smaller = np.minimum(areas[left], areas[right])
    bad = np.flatnonzero(overlap > OVERLAP_TOLERANCE * smaller)
    if bad.size == 0:
        return
    i = bad[np.argmax(overlap[bad] / smaller[bad])]
    more = f" (and {bad.size - 1} more pairs)" if bad.size > 1 else ""
    raise InputError(
        f"{where}: outlines '{names[left[i]]}' and '{names[right[i]]}' overlap by "
        f"{_km2(overlap[i])} km2 ({_pct(overlap[i] / smaller[i])} % of the smaller){more}; "
        "edit them so that neighbouring glaciers at most share a boundary."
    )


def _affine(geom, aff):
    """Geometry with the affine transform ``aff`` applied to every vertex."""
    a, b, c, d, e, f = aff.a, aff.b, aff.c, aff.d, aff.e, aff.f

    def _apply(xy):
        x, y = xy[:, 0], xy[:, 1]
        return np.column_stack([a * x + b * y + c, d * x + e * y + f])

    return shapely.transform(geom, _apply)


def _cell_fractions(pixel_geom, ny, nx):
    """Exact share of each grid cell covered by a polygon in pixel coordinates.

    Parameters
    ----------
    pixel_geom : shapely Polygon or MultiPolygon
        Valid, oriented with positive (counter-clockwise in the pixel axes)
        exteriors and negative holes; x = column, y = row, cell (r, c) is the
        unit square [c, c+1] x [r, r+1].
    ny, nx : int
        Grid size.

    Returns
    -------
    flat : numpy.ndarray of int64
        Ascending flat indices ``r * nx + c`` of cells with share > MIN_FRACTION.
    frac : numpy.ndarray of float64
        Their shares, in (0, 1].

    Notes
    -----
    Green's theorem with the field (-h(y), 0), h(y) = clip(y - r, 0, 1), gives
    for the cells of row r: area inside the cell = sum over boundary pieces in
    the cell's column of -integral h(y) dx. After cutting every edge at the
    cell lines, a piece in cell (j, c) with run dx and mean height y_m adds
    -dx * (y_m - j) to cell (j, c) and -dx to every cell (r, c) with r < j.
    Source: Green's theorem; shoelace formula (Braden, 1986, from memory).
    """
    minx, miny, maxx, maxy = shapely.bounds(pixel_geom)
    c0, c1 = max(0, int(np.floor(minx))), min(nx, int(np.ceil(maxx)))
    r0, r1 = max(0, int(np.floor(miny))), min(ny, int(np.ceil(maxy)))
    empty = np.empty(0, np.int64), np.empty(0, np.float64)
    if c1 <= c0 or r1 <= r0:
        return empty
    h, w = r1 - r0, c1 - c0

    x0, y0, x1, y1 = _edges(pixel_geom)
    xs, ys, xe, ye = _cut_at_cell_lines(x0, y0, x1, y1)
    dx = xe - xs
    ym = 0.5 * (ys + ye)
    col = np.floor(0.5 * (xs + xe)).astype(np.int64) - c0
    row_abs = np.floor(ym)
    row = row_abs.astype(np.int64) - r0
    use = (dx != 0) & (col >= 0) & (col < w) & (row >= 0)
    dx, ym, row_abs, col, row = dx[use], ym[use], row_abs[use], col[use], row[use]

    # partial term in the piece's own cell (only where that cell is in the window)
    own = row < h
    partial = np.bincount(
        row[own] * w + col[own], weights=-dx[own] * (ym[own] - row_abs[own]), minlength=h * w
    )
    # full-height term for every cell below the piece in the column: pieces past
    # the window's last row count for all its rows (virtual row h)
    full = np.bincount(np.minimum(row, h) * w + col, weights=-dx, minlength=(h + 1) * w)
    full = full.reshape(h + 1, w)
    below = np.cumsum(full[::-1], axis=0)[::-1][1:]  # sum over rows j > r
    frac = partial.reshape(h, w) + below

    rr, cc = np.nonzero(frac > MIN_FRACTION)
    values = np.minimum(frac[rr, cc], 1.0)
    flat = (rr + r0).astype(np.int64) * nx + (cc + c0)
    return flat, values


def _edges(geom):
    """Start and end coordinates of every ring edge of a (multi)polygon."""
    rings = shapely.get_rings(shapely.get_parts(geom))
    xy, ring_index = shapely.get_coordinates(rings, return_index=True)
    same = ring_index[1:] == ring_index[:-1]
    start, end = xy[:-1][same], xy[1:][same]
    return start[:, 0], start[:, 1], end[:, 0], end[:, 1]


def _cut_at_cell_lines(x0, y0, x1, y1):
    """Cut straight edges at every integer x and y, so each piece lies in one cell.

    Returns the pieces' start and end coordinates; cut points on a cell line
    carry that line's integer coordinate exactly, so the pieces of one
    column sum to whole cell widths without rounding drift.
    """
    n = x0.size
    xlo, xhi = np.minimum(x0, x1), np.maximum(x0, x1)
    ylo, yhi = np.minimum(y0, y1), np.maximum(y0, y1)
    kx0 = np.floor(xlo) + 1  # first integer strictly above the low end
    ky0 = np.floor(ylo) + 1
    nxc = np.maximum(0, np.ceil(xhi) - kx0).astype(np.int64)  # integers strictly inside
    nyc = np.maximum(0, np.ceil(yhi) - ky0).astype(np.int64)

    def _crossings(counts, first):
        edge = np.repeat(np.arange(n), counts)
        offset = np.arange(edge.size) - np.repeat(np.cumsum(counts) - counts, counts)
        return edge, first[edge] + offset

    ex, kx = _crossings(nxc, kx0)
    ey, ky = _crossings(nyc, ky0)
    ddx, ddy = x1 - x0, y1 - y0
    with np.errstate(divide="ignore", invalid="ignore"):
        tx = (kx - x0[ex]) / ddx[ex]
        ty = (ky - y0[ey]) / ddy[ey]
    ar = np.arange(n)
    edge = np.concatenate([ar, ar, ex, ey])
    t = np.concatenate([np.zeros(n), np.ones(n), tx, ty])
    px = np.concatenate([x0, x1, kx, x0[ey] + ty * ddx[ey]])
    py = np.concatenate([y0, y1, y0[ex] + tx * ddy[ex], ky])
    order = np.lexsort((t, edge))
    edge, px, py = edge[order], px[order], py[order]
    same = edge[1:] == edge[:-1]
    return px[:-1][same], py[:-1][same], px[1:][same], py[1:][same]


def _pct(share):
    return f"{100.0 * share:.3g}"


def _km2(area_m2):
    return f"{area_m2 / 1e6:.3g}"


# --------------------------------------------------------------------------
# whole grid and the full chain


def whole_grid(name, valid, cell_area_m2):
    """Every valid DEM cell as one glacier (no [glaciers] section in the config).

    Parameters
    ----------
    name : str
        The glacier's name (the site name).
    valid, cell_area_m2
        The DEM's valid mask and cell area (m2), as for :func:`build_glaciers`.

    Returns
    -------
    Glaciers
        One glacier covering each valid cell wholly; its polygon area is the
        area of the valid cells, m2.
    """
    valid = np.asarray(valid, dtype=bool)
    cells = np.flatnonzero(valid).astype(np.int64)
    if cells.size == 0:
        raise ValueError("the DEM has no valid cells")
    area = np.array([cells.size * float(cell_area_m2)])
    return Glaciers(
        names=[str(name)],
        cells=[cells],
        fractions=[np.ones(cells.size)],
        polygon_area_m2=area,
        modelled_area_m2=area.copy(),
        total_fraction=valid.astype(np.float32),
        id_map=valid.astype(np.int32),
        warnings=[],
    )


def load_glaciers(path, id_field, layer, dem_crs, transform, shape, valid, cell_area_m2):
    """Read, reproject and rasterise glacier outlines onto the DEM grid.

    Parameters
    ----------
    path : str or os.PathLike
        Outlines file (GeoJSON, GeoPackage or Shapefile, any CRS).
    id_field : str
        Attribute holding each glacier's id.
    layer : str or None
        Layer of a multi-layer file (GeoPackage).
    dem_crs : rasterio.crs.CRS or pyproj.CRS
        The DEM's projected CRS (metres).
    transform, shape, valid, cell_area_m2
        The DEM grid, as for :func:`build_glaciers`.

    Returns
    -------
    Glaciers
        With the warnings of :func:`build_glaciers`, plus one for each outline
        repaired as drawn (checked in the file's CRS before reprojection).

    Raises
    ------
    InputError
        Any problem listed under :func:`read_outlines` and :func:`build_glaciers`,
        the message naming this file.
    """
    dst = pyproj.CRS.from_user_input(dem_crs)
    if dst.is_geographic:
        raise ValueError("the DEM grid must be in a projected CRS (firnline.grid reprojects it)")
    names, geoms, src = read_outlines(path, id_field, layer)
    where = f"Glacier outlines file {os.fspath(path)}"
    # check and repair the outlines as drawn, in the file's CRS (densifying and
    # reprojecting can hide or create a self-intersection); the checks after
    # reprojection in _build then pass unless reprojection broke an outline
    names = _checked_names(names, where)
    warnings: list[str] = []
    geoms = [_checked_geometry(n, g, where, warnings) for n, g in zip(names, geoms)]
    projected = reproject_outlines(geoms, src, dst)
    return _build(names, projected, transform, shape, valid, cell_area_m2, where, warnings)
