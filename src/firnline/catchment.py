"""The catchment of the runoff step: ``[runoff] catchment`` polygons as cell weights.

The catchment is the area draining to the outlet (the gauge). By default it is every valid
DEM cell; with ``[runoff] catchment`` it is the union of the polygons of a vector file (any
format GDAL reads through pyogrio and any CRS, like the glacier outlines), and each modelled
cell counts with the exact share of its area inside them, computed by the same exact
cell-polygon intersection as the glacier outlines (:mod:`firnline.glaciers`). The kernel
takes these shares as ``catchment_weight`` and sums the catchment's daily water with them.
"""

from __future__ import annotations

import os

import numpy as np

from .errors import InputError


def read_catchment(path, layer=None):
    """Read the catchment polygons of a vector file; returns (one shapely geometry, pyproj CRS).

    Raises
    ------
    InputError
        Missing or unreadable file, an ambiguous layer, no features, no polygon, or no CRS
        (a GeoJSON file without one is longitude/latitude, RFC 7946).
    """
    import pyogrio
    import pyproj
    import shapely
    from pyogrio import raw
    from pyogrio.errors import DataLayerError, DataSourceError

    where = f"Catchment file {os.fspath(path)} ([runoff] catchment)"
    if not os.path.exists(path):
        raise InputError(f"{where} does not exist; check the path in the config.")
    try:
        layers = pyogrio.list_layers(path)
        if layer is None and len(layers) > 1:
            raise InputError(f"{where} holds {len(layers)} layers ({', '.join(str(n) for n in layers[:, 0])}); "
                             "name the catchment's in [runoff] layer.")
        info = pyogrio.read_info(path, layer=layer)
        meta, _fids, wkb, _ = raw.read(path, layer=layer, columns=[], force_2d=True)
    except (DataSourceError, DataLayerError) as exc:
        raise InputError(f"{where} cannot be read ({str(exc).strip().rstrip('.')}); give a vector file "
                         "(GeoJSON, GeoPackage, Shapefile, ...) with the catchment polygon.") from exc
    geoms = [shapely.from_wkb(g) for g in wkb if g is not None]
    polys = [g for g in geoms if g.geom_type in ("Polygon", "MultiPolygon") and not g.is_empty]
    if not polys:
        raise InputError(f"{where} holds no polygon; give the catchment as one or more polygons.")
    if meta.get("crs"):
        crs = pyproj.CRS.from_user_input(meta["crs"])
    elif info.get("driver") == "GeoJSON" or str(path).lower().endswith((".geojson", ".json")):
        crs = pyproj.CRS.from_user_input("OGC:CRS84")  # RFC 7946, section 4
    else:
        raise InputError(f"{where} has no coordinate reference system; add one (for a Shapefile, the .prj file).")
    union = shapely.union_all([shapely.make_valid(g) for g in polys])
    return union, crs


def catchment_weight(path, layer, dem_crs, transform, shape, valid, cell_area_m2, cells) -> tuple[np.ndarray, list]:
    """Share of each modelled cell inside the catchment polygons (exact), and warnings.

    Parameters
    ----------
    path, layer : the ``[runoff] catchment`` file and layer
    dem_crs, transform, shape, valid, cell_area_m2 : the DEM grid
    cells : ndarray int
        Flat indices of the modelled cells (``Setup.cells``).

    Returns
    -------
    weight : ndarray float64 (n_cells,)
        0..1 per modelled cell.
    warnings : list of str
        When part of the catchment lies off the DEM or on nodata.
    """
    import pyproj

    from .glaciers import _build, reproject_outlines

    geom, src = read_catchment(path, layer)
    dst = pyproj.CRS.from_user_input(dem_crs)
    projected = reproject_outlines([geom], src, dst)
    where = f"Catchment file {os.fspath(path)} ([runoff] catchment)"
    gl = _build(["catchment"], projected, transform, shape, valid, cell_area_m2, where)
    weight = np.zeros(int(np.prod(shape)))
    weight[gl.cells[0]] = gl.fractions[0]
    return weight[np.asarray(cells)], list(gl.warnings)
