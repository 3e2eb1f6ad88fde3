"""Glacier outlines: reading, reprojection, exact fractional coverage, bad input."""

import re

import numpy as np
import pyproj
import pytest
import rasterio.crs
import shapely
from rasterio.transform import from_origin

from firnline.errors import InputError
from firnline.glaciers import (
    Glaciers,
    build_glaciers,
    load_glaciers,
    read_outlines,
    reproject_outlines,
    whole_grid,
)

# In-memory DEM grid of the invented Seldra catchment: UTM zone 32N, 25 m cells,
# 8 km x 6 km, about 100 km east of the zone's central meridian (10.3 E, 47.0 N).
DEM_CRS = pyproj.CRS.from_epsg(32632)
CELL = 25.0
WEST, NORTH = 600_000.0, 5_210_000.0
SHAPE = (240, 320)
TRANSFORM = from_origin(WEST, NORTH, CELL, CELL)
DEM_BOX = shapely.box(WEST, NORTH - SHAPE[0] * CELL, WEST + SHAPE[1] * CELL, NORTH)
LONLAT = pyproj.CRS.from_epsg(4326)
_TO_LONLAT = pyproj.Transformer.from_crs(DEM_CRS, LONLAT, always_xy=True)
LON0, LAT0 = _TO_LONLAT.transform(WEST + 4000.0, NORTH - 3000.0)  # the grid's centre


def ll(points):
    """Offsets in degrees from the grid centre to absolute lon/lat."""
    return [(LON0 + dx, LAT0 + dy) for dx, dy in points]


# Outlines in lon/lat: none of their edges follows a cell line of the UTM grid
# (meridians and parallels are turned by the grid convergence, about 1 degree here).
RECTANGLE = shapely.Polygon(ll([(-0.021, -0.013), (-0.003, -0.013), (-0.003, 0.004), (-0.021, 0.004)]))
WITH_HOLES = shapely.Polygon(
    ll([(0.002, -0.015), (0.024, -0.011), (0.027, 0.006), (0.012, 0.014), (0.004, 0.003)]),
    holes=[
        ll([(0.010, -0.008), (0.016, -0.007), (0.013, -0.002)]),
        ll([(0.015, 0.002), (0.020, 0.001), (0.021, 0.005), (0.016, 0.006)]),
    ],
)
MULTI = shapely.MultiPolygon(
    [
        shapely.Polygon(ll([(-0.020, 0.008), (-0.012, 0.009), (-0.016, 0.016)])),
        shapely.Polygon(ll([(-0.009, 0.007), (-0.001, 0.008), (0.000, 0.015), (-0.006, 0.018), (-0.010, 0.013)])),
    ]
)
OUTLINES = {"Rectangle": RECTANGLE, "Nunatak": WITH_HOLES, "Twin": MULTI}


def reference_utm(geom_lonlat):
    """Reference reprojection: pyproj on edges densified to about 1 m."""
    fine = shapely.segmentize(geom_lonlat, 1e-5)
    t = pyproj.Transformer.from_crs(LONLAT, DEM_CRS, always_xy=True)
    return shapely.transform(fine, lambda xy: np.column_stack(t.transform(xy[:, 0], xy[:, 1])))


def valid_all():
    return np.ones(SHAPE, dtype=bool)


def build_lonlat(names, geoms, valid=None, transform=TRANSFORM, shape=SHAPE, cell_area=CELL * CELL):
    projected = reproject_outlines(geoms, LONLAT, DEM_CRS)
    return build_glaciers(
        names, projected, transform, shape, valid_all() if valid is None else valid, cell_area
    )


def load(path, valid=None, id_field="name", layer=None, crs=DEM_CRS):
    return load_glaciers(
        path, id_field, layer, crs, TRANSFORM, SHAPE, valid_all() if valid is None else valid, CELL * CELL
    )


def percents(text):
    return [float(v) for v in re.findall(r"([0-9.]+(?:e-?\d+)?) %", text)]


# --------------------------------------------------------------------------- areas


@pytest.mark.parametrize("name", list(OUTLINES))
def test_modelled_area_matches_reprojected_polygon_area(name):
    g = build_lonlat([name], [OUTLINES[name]])
    # Source: shapely (GEOS) area of the polygon reprojected with pyproj (reference libraries).
    reference = reference_utm(OUTLINES[name]).area
    assert abs(g.modelled_area_m2[0] / reference - 1) < 0.01  # requirement of issue 4
    # The coverage is exact cell-polygon intersection, so it is far better than 1 %.
    assert abs(g.modelled_area_m2[0] / reference - 1) < 1e-6
    assert abs(g.polygon_area_m2[0] / reference - 1) < 1e-6
    assert g.warnings == []


def test_holes_are_not_glacier():
    g = build_lonlat(["Nunatak"], [WITH_HOLES])
    filled = shapely.Polygon(WITH_HOLES.exterior)
    gf = build_lonlat(["Filled"], [filled])
    holes = sum(reference_utm(shapely.Polygon(r)).area for r in WITH_HOLES.interiors)
    # Source: shapely areas of the reprojected hole rings (reference library).
    assert gf.modelled_area_m2[0] - g.modelled_area_m2[0] == pytest.approx(holes, rel=1e-6)
    # a cell well inside the first hole has no glacier
    hx, hy = pyproj.Transformer.from_crs(LONLAT, DEM_CRS, always_xy=True).transform(
        *np.mean(np.asarray(WITH_HOLES.interiors[0].coords)[:3], axis=0)
    )
    row, col = rasterio.transform.rowcol(TRANSFORM, hx, hy)
    assert g.total_fraction[row, col] == 0 and gf.total_fraction[row, col] == 1


@pytest.mark.parametrize("cell_x, cell_y", [(25.0, 25.0), (20.0, 30.0)])
def test_fractions_equal_shapely_cell_intersections(cell_x, cell_y):
    """Every cell's share equals the shapely area of cell box ∩ polygon / cell area."""
    transform = from_origin(WEST, NORTH, cell_x, cell_y)
    shape = (int(6000 / cell_y), int(8000 / cell_x))
    geoms = [WITH_HOLES, MULTI]
    valid = np.ones(shape, dtype=bool)
    g = build_lonlat(["Nunatak", "Twin"], geoms, valid, transform, shape, cell_x * cell_y)
    projected = reproject_outlines(geoms, LONLAT, DEM_CRS)
    rows, cols = np.mgrid[0 : shape[0], 0 : shape[1]]
    x0 = transform.c + transform.a * cols.ravel()  # north-up: upper-left corners
    y0 = transform.f + transform.e * rows.ravel()
    boxes = shapely.box(x0, y0 - cell_y, x0 + cell_x, y0)
    for k, geom in enumerate(projected):
        # Source: shapely.intersection (GEOS overlay) as the reference library.
        expected = shapely.area(shapely.intersection(boxes, geom)) / (cell_x * cell_y)
        got = np.zeros(rows.size)
        got[g.cells[k]] = g.fractions[k]
        np.testing.assert_allclose(got, expected, rtol=0, atol=1e-9)
        assert np.all(g.fractions[k] > 0) and np.all(g.fractions[k] <= 1)
        assert np.all(np.diff(g.cells[k]) > 0)


def test_areas_agree_with_geodesic_area_times_utm_scale():
    # Source: pyproj.Geod (Karney 2013, J. Geodesy 87) ellipsoidal area, times the
    # UTM areal scale factor from PROJ's get_factors; edges that are straight in
    # lon/lat differ from geodesics by centimetres here, so 0.1 % is ample.
    geod = pyproj.Geod(ellps="WGS84")
    proj = pyproj.Proj(DEM_CRS)
    g = build_lonlat(list(OUTLINES), list(OUTLINES.values()))
    for k, geom in enumerate(OUTLINES.values()):
        area, _ = geod.geometry_area_perimeter(shapely.orient_polygons(geom))
        c = geom.centroid
        scale = proj.get_factors(c.x, c.y).areal_scale
        assert g.modelled_area_m2[k] == pytest.approx(area * scale, rel=1e-3)


def test_densified_edges_follow_the_projected_curve():
    # A parallel of latitude is curved on a UTM map; a 0.1 degree long side bows
    # by metres, so a reprojection of the corners alone would cut the corner.
    side = shapely.Polygon(ll([(-0.05, 0.0), (0.05, 0.0), (0.05, 0.01), (-0.05, 0.01)]))
    exact = pyproj.Transformer.from_crs(LONLAT, DEM_CRS, always_xy=True)
    mid = shapely.Point(exact.transform(LON0, LAT0))  # middle of the southern side
    dense = reproject_outlines([side], LONLAT, DEM_CRS)[0]
    corners = reproject_outlines([side], LONLAT, DEM_CRS, densify_m=0)[0]
    # Source: pyproj point transformation as the reference for the true curve.
    assert dense.boundary.distance(mid) < 0.01
    assert corners.boundary.distance(mid) > 0.5


# --------------------------------------------------------------------------- maps


def test_shared_boundary_split_cells_and_id_map():
    # Two glaciers sharing a boundary that cuts through cells: touching is allowed,
    # a split cell's shares add up, and the id map picks the larger share.
    left = shapely.Polygon(ll([(-0.01, -0.005), (0.0013, -0.0051), (0.0011, 0.005), (-0.01, 0.005)]))
    right = shapely.Polygon(ll([(0.0013, -0.0051), (0.01, -0.005), (0.01, 0.005), (0.0011, 0.005)]))
    g = build_lonlat(["West", "East"], [left, right])
    union = reference_utm(shapely.union(left, right)).area
    # Source: shapely area of the reprojected union (reference library).
    assert g.modelled_area_m2.sum() == pytest.approx(union, rel=1e-6)
    assert (g.total_fraction * CELL * CELL).sum() == pytest.approx(union, rel=1e-6)
    shared = np.intersect1d(g.cells[0], g.cells[1])
    assert shared.size > 0
    f0 = dict(zip(g.cells[0], g.fractions[0]))
    f1 = dict(zip(g.cells[1], g.fractions[1]))
    flat_ids = g.id_map.ravel()
    flat_total = g.total_fraction.ravel()
    for cell in shared:
        assert flat_ids[cell] == (1 if f0[cell] >= f1[cell] else 2)
        assert flat_total[cell] == pytest.approx(min(1.0, f0[cell] + f1[cell]), abs=1e-6)
    only0 = np.setdiff1d(g.cells[0], g.cells[1])
    assert np.all(flat_ids[only0] == 1)
    outside = np.ones(flat_ids.size, bool)
    outside[np.union1d(g.cells[0], g.cells[1])] = False
    assert np.all(flat_ids[outside] == 0) and np.all(flat_total[outside] == 0)
    assert g.total_fraction.dtype == np.float32 and g.id_map.dtype == np.int32
    assert g.total_fraction.max() <= 1.0


def test_whole_grid():
    valid = valid_all()
    valid[:10, :] = False
    g = whole_grid("Seldra", valid, CELL * CELL)
    assert isinstance(g, Glaciers) and g.names == ["Seldra"]
    np.testing.assert_array_equal(g.cells[0], np.flatnonzero(valid))
    assert g.modelled_area_m2[0] == valid.sum() * CELL * CELL == g.polygon_area_m2[0]
    np.testing.assert_array_equal(g.id_map, valid.astype(np.int32))
    np.testing.assert_array_equal(g.total_fraction, valid.astype(np.float32))


# --------------------------------------------------------------------------- files


def test_geojson_geopackage_shapefile_give_identical_results(builders, tmp_path):
    names, geoms = list(OUTLINES), list(OUTLINES.values())
    # RFC 7946 GeoJSON carries no crs member: longitude/latitude is implied.
    gj = builders.write_outlines(tmp_path / "outlines.geojson", names, geoms, "GeoJSON", crs=None)
    assert '"crs"' not in gj.read_text()
    gpkg = builders.write_outlines(tmp_path / "outlines.gpkg", names, geoms, "GPKG", layer="glaciers")
    # a second layer: the outlines layer must then be named
    builders.write_outlines(tmp_path / "outlines.gpkg", ["x"], [shapely.box(0, 0, 1, 1)], "GPKG", layer="other",
                            append=True)
    shp = builders.write_outlines(tmp_path / "outlines.shp", names, geoms, "ESRI Shapefile")
    results = [load(gj), load(gpkg, layer="glaciers"), load(shp)]
    first = results[0]
    assert first.names == names
    for other in results[1:]:
        assert other.names == first.names
        for a, b in zip(first.cells, other.cells):
            np.testing.assert_array_equal(a, b)
        for a, b in zip(first.fractions, other.fractions):
            np.testing.assert_array_equal(a, b)
        np.testing.assert_array_equal(other.modelled_area_m2, first.modelled_area_m2)
        np.testing.assert_array_equal(other.polygon_area_m2, first.polygon_area_m2)
        np.testing.assert_array_equal(other.id_map, first.id_map)
        np.testing.assert_array_equal(other.total_fraction, first.total_fraction)
    # and the same as building from the geometries in memory
    direct = build_lonlat(names, geoms)
    np.testing.assert_array_equal(direct.modelled_area_m2, first.modelled_area_m2)


def test_dem_crs_as_rasterio_or_pyproj(builders, tmp_path):
    path = builders.write_outlines(tmp_path / "o.geojson", ["A"], [RECTANGLE], "GeoJSON")
    a = load(path, crs=rasterio.crs.CRS.from_epsg(32632))
    b = load(path, crs=DEM_CRS)
    np.testing.assert_array_equal(a.cells[0], b.cells[0])
    assert a.modelled_area_m2[0] == b.modelled_area_m2[0]


def test_read_outlines_numeric_ids_and_crs(builders, tmp_path):
    path = builders.write_outlines(
        tmp_path / "o.gpkg", ["a", "b"], [RECTANGLE, MULTI], "GPKG", crs="EPSG:32632",
        extra={"rgi_number": np.array([7, 12])},
    )
    names, geoms, crs = read_outlines(path, "rgi_number")
    assert names == ["7", "12"]
    assert crs == DEM_CRS
    assert [g.geom_type for g in geoms] == ["Polygon", "MultiPolygon"]


# --------------------------------------------------------------------------- bad outlines


def bad(builders, tmp_path, names, geoms, match, **kw):
    path = builders.write_outlines(tmp_path / "bad.geojson", names, geoms, "GeoJSON")
    with pytest.raises(InputError) as err:
        load(path, **kw)
    message = str(err.value)
    assert "bad.geojson" in message
    for part in match:
        assert part in message, message
    return message


def test_missing_id(builders, tmp_path):
    bad(builders, tmp_path, ["A", None, "C"], [RECTANGLE, WITH_HOLES, MULTI], ["feature 2", "'name'"])


def test_duplicated_id(builders, tmp_path):
    bad(builders, tmp_path, ["A", "B", "A"], [RECTANGLE, WITH_HOLES, MULTI], ["'A'", "1 and 3"])


def test_id_field_that_does_not_exist(builders, tmp_path):
    path = builders.write_outlines(
        tmp_path / "o.geojson", ["A"], [RECTANGLE], "GeoJSON", extra={"area_km2": np.array([1.0])}
    )
    with pytest.raises(InputError, match=r"no field 'glacier_name'.*name, area_km2"):
        load(path, id_field="glacier_name")


def test_empty_geometry(builders, tmp_path):
    bad(builders, tmp_path, ["A", "B"], [RECTANGLE, None], ["'B'", "no geometry"])
    bad(builders, tmp_path, ["A", "B"], [RECTANGLE, shapely.Polygon()], ["'B'", "no geometry"])


def test_non_polygon_geometry(builders, tmp_path):
    line = shapely.LineString(ll([(0, 0), (0.01, 0.01)]))
    bad(builders, tmp_path, ["A", "Ridge"], [RECTANGLE, line], ["'Ridge'", "LineString"])
    bad(builders, tmp_path, ["Stake", "A"], [shapely.Point(LON0, LAT0), RECTANGLE], ["'Stake'", "Point"])


def test_invalid_geometry_that_does_not_repair_to_a_polygon(builders, tmp_path):
    flat = shapely.Polygon(ll([(0, 0), (0.005, 0), (0.01, 0), (0, 0)]))  # zero area: a line
    bad(builders, tmp_path, ["A", "Sliver"], [RECTANGLE, flat], ["'Sliver'", "make_valid", "redraw"])


def test_self_intersecting_outline_is_repaired_with_a_warning(builders, tmp_path):
    bowtie = shapely.Polygon(ll([(0.002, -0.01), (0.02, 0.01), (0.02, -0.01), (0.002, 0.01)]))
    path = builders.write_outlines(tmp_path / "o.geojson", ["Bowtie"], [bowtie], "GeoJSON")
    g = load(path)
    assert len(g.warnings) == 1
    assert "'Bowtie'" in g.warnings[0] and "make_valid" in g.warnings[0]
    assert "Self-intersection" in g.warnings[0]
    # Source: shapely.make_valid of the outline as drawn, reprojected, area by shapely.
    repaired = shapely.make_valid(bowtie)
    assert repaired.geom_type == "MultiPolygon"
    assert g.modelled_area_m2[0] == pytest.approx(reference_utm(repaired).area, rel=1e-6)


def test_overlapping_outlines_name_both(builders, tmp_path):
    shifted = shapely.affinity.translate(RECTANGLE, xoff=0.004)
    message = bad(builders, tmp_path, ["North", "Seldra", "South"], [MULTI, RECTANGLE, shifted],
                  ["'Seldra'", "'South'", "overlap"])
    assert "'North'" not in message


def test_tiny_sliver_overlap_is_tolerated():
    a = shapely.Polygon(ll([(-0.01, -0.005), (0.0, -0.005), (0.0, 0.005), (-0.01, 0.005)]))
    # the neighbour reaches 1e-9 degrees (below a tenth of a millimetre) across the shared side
    b = shapely.Polygon(ll([(-1e-9, -0.005), (0.01, -0.005), (0.01, 0.005), (-1e-9, 0.005)]))
    assert shapely.intersection(a, b).area > 0
    g = build_lonlat(["A", "B"], [a, b])
    assert g.names == ["A", "B"]


def test_outline_wholly_outside_the_dem(builders, tmp_path):
    far = shapely.affinity.translate(RECTANGLE, xoff=0.5)
    bad(builders, tmp_path, ["A", "Elsewhere"], [RECTANGLE, far], ["'Elsewhere'", "wholly outside the DEM"])


def test_outline_only_over_nodata(builders, tmp_path):
    valid = np.zeros(SHAPE, dtype=bool)
    bad(builders, tmp_path, ["A"], [RECTANGLE], ["'A'", "nodata"], valid=valid)


def test_wrong_or_ambiguous_layer_and_missing_file(builders, tmp_path):
    path = tmp_path / "o.gpkg"
    builders.write_outlines(path, ["A"], [RECTANGLE], "GPKG", layer="glaciers")
    builders.write_outlines(path, ["B"], [MULTI], "GPKG", layer="lakes", append=True)
    with pytest.raises(InputError, match=r"2 layers \(glaciers, lakes\)"):
        load(path)
    with pytest.raises(InputError, match=r"o\.gpkg cannot be read.*glaciers, lakes"):
        load(path, layer="ice")
    assert load(path, layer="lakes").names == ["B"]
    with pytest.raises(InputError, match="does not exist"):
        load(tmp_path / "missing.geojson")


def test_shapefile_without_prj(builders, tmp_path):
    path = builders.write_outlines(tmp_path / "o.shp", ["A"], [RECTANGLE], "ESRI Shapefile", crs=None)
    (tmp_path / "o.prj").unlink(missing_ok=True)
    with pytest.raises(InputError, match=r"o\.shp has no coordinate reference system"):
        load(path)


# --------------------------------------------------------------------------- warnings


def test_partly_outside_the_dem_warns_with_the_share(builders, tmp_path):
    # straddles the eastern edge of the grid
    east_lon, _ = _TO_LONLAT.transform(WEST + SHAPE[1] * CELL, NORTH - 3000.0)
    dx = east_lon - LON0
    edge = shapely.Polygon(ll([(dx - 0.012, -0.006), (dx + 0.005, -0.0055), (dx + 0.004, 0.007), (dx - 0.010, 0.006)]))
    path = builders.write_outlines(tmp_path / "o.geojson", ["Edge"], [edge], "GeoJSON")
    g = load(path)
    utm = reference_utm(edge)
    # Source: shapely area of the reprojected outline inside the DEM's extent (reference library).
    inside = shapely.intersection(utm, DEM_BOX).area
    share = 1 - inside / utm.area
    assert 0.1 < share < 0.5
    assert len(g.warnings) == 1 and "'Edge'" in g.warnings[0] and "outside the DEM" in g.warnings[0]
    assert percents(g.warnings[0])[0] == pytest.approx(100 * share, rel=2e-3)
    assert g.modelled_area_m2[0] == pytest.approx(inside, rel=1e-6)
    assert g.polygon_area_m2[0] == pytest.approx(utm.area, rel=1e-6)


def test_nodata_cells_warn_with_the_share():
    valid = valid_all()
    valid[:, 100:140] = False  # a band of nodata columns through the rectangle
    g = build_lonlat(["Rectangle"], [RECTANGLE], valid)
    utm = reference_utm(RECTANGLE)
    band = shapely.box(WEST + 100 * CELL, NORTH - SHAPE[0] * CELL, WEST + 140 * CELL, NORTH)
    # Source: shapely area of the reprojected outline over the nodata band (reference library).
    lost = shapely.intersection(utm, band).area / utm.area
    assert 0.05 < lost < 0.95
    assert len(g.warnings) == 1 and "nodata" in g.warnings[0]
    assert percents(g.warnings[0])[0] == pytest.approx(100 * lost, rel=2e-3)
    assert g.modelled_area_m2[0] == pytest.approx(utm.area * (1 - lost), rel=1e-6)
    assert not np.any(np.isin(g.cells[0], np.flatnonzero(~valid)))
