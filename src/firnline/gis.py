"""Vector products for a GIS: outlines on the run's grid, ELA contour lines, glaciers.gpkg,
and the raster attribute table of glacier_id.tif.

* :func:`outline_geometries` gives each glacier's outline in the grid's CRS (the
  outlines file reprojected, or the valid DEM area polygonised when the run has no
  outlines).
* :func:`ela_lines` traces the ELA of a glacier and year as the contour of the DEM
  at that elevation inside the glacier's cells (contourpy, matplotlib's contouring
  library, on the cell centres).
* :func:`write_geopackage` writes ``glaciers.gpkg`` (pyogrio): layer ``outlines``
  (one polygon per glacier with the record means), layer ``glacier_years`` (the
  same polygon once per glacier and balance year with that year's results, for a
  GIS's filter or time slider), and layer ``ela_lines`` (one multi-line per glacier
  and year with the ELA on the glacier). Every layer carries ``glacier_id``, the
  value of the glacier in ``glacier_id.tif``, and ``glacier``, its name.
* :func:`write_rat_sidecar` writes ``glacier_id.tif.aux.xml``: a GDAL PAM sidecar
  holding a raster attribute table (value, glacier name) and the band's category
  names, which GDAL, and GIS programs built on it, read together with the GeoTIFF.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Sequence
from xml.sax.saxutils import escape

import numpy as np
import pandas as pd
import shapely


def outline_geometries(config, grid, glaciers) -> list:
    """Each glacier's outline as a shapely geometry in the grid's CRS, in ``glaciers.names`` order.

    With ``[glaciers] outlines`` the file is read again and reprojected as the run did;
    without it the valid DEM area (the one "glacier" named after the site) is
    polygonised on the cell edges.
    """
    if config.glaciers is not None:
        from .glaciers import read_outlines, reproject_outlines
        names, geoms, src = read_outlines(config.glaciers.outlines, config.glaciers.id_field,
                                          config.glaciers.layer)
        geoms = [g if g is None or g.is_valid else shapely.make_valid(g) for g in geoms]
        by_name = dict(zip(names, reproject_outlines(geoms, src, grid.crs)))
        return [by_name.get(n) for n in glaciers.names]
    return [polygonise(glaciers.id_map == k + 1, grid.transform) for k in range(len(glaciers.names))]


def polygonise(mask: np.ndarray, transform):
    """The cells of ``mask`` as one (multi)polygon on the cell edges, map coordinates."""
    from rasterio.features import shapes
    parts = [shapely.geometry.shape(g) for g, v in shapes(mask.astype("uint8"), mask=mask, transform=transform)
             if v == 1]
    return shapely.union_all(parts) if parts else None


def ela_lines(elevation: np.ndarray, x: np.ndarray, y: np.ndarray, inside: np.ndarray,
              ela_m: float) -> list[np.ndarray]:
    """The contour of ``elevation`` at ``ela_m`` over the cells where ``inside`` is true.

    Parameters
    ----------
    elevation : ndarray (ny, nx), m (NaN on nodata)
    x, y : ndarray (nx,), (ny,)
        Cell-centre coordinates in the grid's CRS.
    inside : ndarray (ny, nx) of bool
        The glacier's cells.
    ela_m : float

    Returns
    -------
    list of ndarray (n, 2): polylines in map coordinates (empty when the level does not
    cross the glacier or ``ela_m`` is NaN).
    """
    import contourpy

    if not np.isfinite(ela_m) or not inside.any():
        return []
    rows = np.flatnonzero(inside.any(axis=1))
    cols = np.flatnonzero(inside.any(axis=0))
    r0, r1 = max(rows[0] - 1, 0), min(rows[-1] + 2, inside.shape[0])
    c0, c1 = max(cols[0] - 1, 0), min(cols[-1] + 2, inside.shape[1])
    z = elevation[r0:r1, c0:c1]
    m = ~inside[r0:r1, c0:c1] | ~np.isfinite(z)
    if (r1 - r0) < 2 or (c1 - c0) < 2:
        return []
    gen = contourpy.contour_generator(x[c0:c1], y[r0:r1], np.ma.array(np.where(m, 0.0, z), mask=m),
                                      line_type="Separate")
    return [ln for ln in gen.lines(float(ela_m)) if len(ln) >= 2]


def _multiline(lines: Sequence[np.ndarray]):
    return shapely.MultiLineString([shapely.LineString(ln) for ln in lines]) if lines else None


def write_geopackage(path: Path, crs, glacier_ids: Sequence[int], names: Sequence[str], outlines: Sequence,
                     per_glacier: pd.DataFrame, per_year: pd.DataFrame,
                     lines: dict[tuple[str, int], list[np.ndarray]]) -> None:
    """Write ``glaciers.gpkg`` with the layers ``outlines``, ``glacier_years`` and ``ela_lines``.

    Parameters
    ----------
    path : Path
    crs : the grid's CRS (written as WKT)
    glacier_ids, names, outlines : per glacier, in the same order
    per_glacier : DataFrame with a ``glacier`` column: attributes of ``outlines``
    per_year : DataFrame with ``glacier`` and ``balance_year``: attributes of ``glacier_years``
    lines : {(glacier, balance_year): polylines} for ``ela_lines``
    """
    from pyogrio.raw import write

    wkt = crs.to_wkt()
    ids = dict(zip(names, glacier_ids))
    geom_of = dict(zip(names, outlines))

    def layer(df: pd.DataFrame, geoms, name: str, gtype: str, append: bool) -> None:
        df = df.reset_index(drop=True)
        wkb = np.array([None if g is None else shapely.to_wkb(g) for g in geoms], dtype=object)
        fields = list(df.columns)
        data = [_column(df[c]) for c in fields]
        write(str(path), wkb, data, fields, layer=name, driver="GPKG", geometry_type=gtype, crs=wkt,
              append=append, promote_to_multi=True)

    g = per_glacier.copy()
    g.insert(0, "glacier_id", g.glacier.map(ids).astype("int32"))
    layer(g, [_multipolygon(geom_of[n]) for n in g.glacier], "outlines", "MultiPolygon", False)
    y = per_year.copy()
    y.insert(0, "glacier_id", y.glacier.map(ids).astype("int32"))
    layer(y, [_multipolygon(geom_of[n]) for n in y.glacier], "glacier_years", "MultiPolygon", True)
    keys = [k for k in lines if lines[k]]
    e = pd.DataFrame({"glacier_id": np.array([ids[k[0]] for k in keys], dtype="int32"),
                      "glacier": [k[0] for k in keys],
                      "balance_year": np.array([k[1] for k in keys], dtype="int32"),
                      "ela_m": [float(per_year.set_index(["glacier", "balance_year"]).ela_m.get(k, np.nan))
                                for k in keys]})
    layer(e, [_multiline(lines[k]) for k in keys], "ela_lines", "MultiLineString", True)


def _multipolygon(g):
    if g is None:
        return None
    if g.geom_type == "Polygon":
        return shapely.MultiPolygon([g])
    if g.geom_type == "GeometryCollection":
        polys = [p for p in shapely.get_parts(g) if p.geom_type in ("Polygon", "MultiPolygon")]
        return _multipolygon(shapely.union_all(polys)) if polys else None
    return g


def _column(s: pd.Series) -> np.ndarray:
    if s.dtype.kind in "if":
        return s.to_numpy()
    if s.dtype.kind == "b":
        return s.to_numpy().astype("int8")
    return np.array(["" if v is None or (isinstance(v, float) and np.isnan(v)) else str(v) for v in s],
                    dtype=object)


def rat_sidecar_xml(names: Sequence[str]) -> str:
    """GDAL PAM XML (``.aux.xml``) with a raster attribute table and category names for band 1.

    The band metadata item ``glacier_names`` repeats the lookup as JSON (as in run.json).
    The table has two columns, ``value`` (usage MinMax, the pixel value) and ``glacier``
    (usage Name); row 0 is ``0`` = no glacier. Field types and usages are GDAL's
    ``GDALRATFieldType`` (0 integer, 2 string) and ``GDALRATFieldUsage`` (5 MinMax,
    2 Name) codes (GDAL raster attribute table API, from memory).
    """
    rows = [(0, "no glacier")] + [(k + 1, str(n)) for k, n in enumerate(names)]
    lookup = json.dumps({str(k + 1): str(n) for k, n in enumerate(names)}, ensure_ascii=False)
    out = ['<PAMDataset>', '  <PAMRasterBand band="1">',
           f'    <Metadata><MDI key="glacier_names">{escape(lookup)}</MDI></Metadata>', '    <CategoryNames>']
    out += [f'      <Category>{escape(n)}</Category>' for _, n in rows]
    out += ['    </CategoryNames>',
            '    <GDALRasterAttributeTable tableType="thematic">',
            '      <FieldDefn index="0"><Name>value</Name><Type>0</Type><Usage>5</Usage></FieldDefn>',
            '      <FieldDefn index="1"><Name>glacier</Name><Type>2</Type><Usage>2</Usage></FieldDefn>']
    out += [f'      <Row index="{i}"><F>{v}</F><F>{escape(n)}</F></Row>' for i, (v, n) in enumerate(rows)]
    out += ['    </GDALRasterAttributeTable>', '  </PAMRasterBand>', '</PAMDataset>', '']
    return "\n".join(out)


def write_rat_sidecar(path: Path, names: Sequence[str]) -> None:
    """Write :func:`rat_sidecar_xml` to ``path`` (the GeoTIFF's name + ``.aux.xml``)."""
    Path(path).write_text(rat_sidecar_xml(names), encoding="utf-8")
