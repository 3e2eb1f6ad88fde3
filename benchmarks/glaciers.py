"""Benchmark: outlines to fractional coverage, 100 glaciers on a 1000 x 1000 DEM.

Run:  python benchmarks/glaciers.py [--glaciers 100] [--size 1000] [--vertices 400]

Builds an in-memory UTM grid (EPSG:32632, 25 m cells, 25 km x 25 km) and
100 invented glacier outlines in longitude/latitude (lobed polygons with a
nunatak hole, every tenth one a two-part MultiPolygon), then times

* reprojection with densified edges (``reproject_outlines``),
* checks, overlap test and exact fractional coverage (``build_glaciers``),
* the whole chain from a GeoPackage on disk (``load_glaciers``),

and prints seconds and the worst relative difference between modelled and
polygon area. Target (issue 4): seconds.
"""

import argparse
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np
import pyproj
import shapely
from pyogrio import raw
from rasterio.transform import from_origin

from firnline.glaciers import build_glaciers, load_glaciers, reproject_outlines

CELL = 25.0
DEM_CRS = pyproj.CRS.from_epsg(32632)
LONLAT = pyproj.CRS.from_epsg(4326)


def lobed(cx, cy, radius, n, rng):
    """A lobed ring of n vertices around (cx, cy), radius in m, as an array."""
    t = np.linspace(0.0, 2 * np.pi, n, endpoint=False)
    r = radius * (1 + 0.25 * np.sin(3 * t + rng.uniform(0, 6)) + 0.03 * rng.standard_normal(n))
    return np.column_stack([cx + r * np.cos(t), cy + r * np.sin(t)])


def outlines_lonlat(n_glaciers, size, n_vertices, west, north, seed=1):
    """Invented non-overlapping outlines on a lattice over the grid, in lon/lat."""
    rng = np.random.default_rng(seed)
    per_side = int(np.ceil(np.sqrt(n_glaciers)))
    spacing = size * CELL / per_side
    to_ll = pyproj.Transformer.from_crs(DEM_CRS, LONLAT, always_xy=True)
    geoms = []
    for k in range(n_glaciers):
        i, j = divmod(k, per_side)
        cx, cy = west + (j + 0.5) * spacing, north - (i + 0.5) * spacing
        radius = rng.uniform(0.25, 0.38) * spacing
        shell = lobed(cx, cy, radius, n_vertices, rng)
        hole = lobed(cx + 0.1 * radius, cy, 0.2 * radius, max(8, n_vertices // 8), rng)[::-1]
        geom = shapely.Polygon(shell, holes=[hole])
        if k % 10 == 9:  # a detached second part
            part = shapely.Polygon(lobed(cx + 0.9 * radius, cy + 0.9 * radius, 0.12 * radius, 40, rng))
            geom = shapely.MultiPolygon([geom.difference(part.buffer(0.05 * radius)), part])
        geoms.append(shapely.transform(geom, lambda xy: np.column_stack(to_ll.transform(xy[:, 0], xy[:, 1]))))
    return geoms


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--glaciers", type=int, default=100)
    parser.add_argument("--size", type=int, default=1000, help="cells per side")
    parser.add_argument("--vertices", type=int, default=400, help="vertices per outline")
    args = parser.parse_args()

    west, north = 500_000.0, 5_220_000.0
    transform = from_origin(west, north, CELL, CELL)
    shape = (args.size, args.size)
    valid = np.ones(shape, dtype=bool)
    names = [f"G{k:03d}" for k in range(args.glaciers)]
    geoms = outlines_lonlat(args.glaciers, args.size, args.vertices, west, north)

    t0 = time.perf_counter()
    projected = reproject_outlines(geoms, LONLAT, DEM_CRS)
    t1 = time.perf_counter()
    glaciers = build_glaciers(names, projected, transform, shape, valid, CELL * CELL)
    t2 = time.perf_counter()

    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "outlines.gpkg"
        wkb = np.array(shapely.to_wkb(np.array(geoms, dtype=object)), dtype=object)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            raw.write(str(path), wkb, [np.array(names, dtype=object)], ["name"],
                      driver="GPKG", crs="EPSG:4326", geometry_type="Unknown")
        t3 = time.perf_counter()
        load_glaciers(path, "name", None, DEM_CRS, transform, shape, valid, CELL * CELL)
        t4 = time.perf_counter()

    reference = shapely.area(np.array(projected, dtype=object))
    worst = np.max(np.abs(glaciers.modelled_area_m2 / reference - 1))
    n_cells = sum(c.size for c in glaciers.cells)
    print(f"grid {args.size} x {args.size} cells of {CELL:g} m, {args.glaciers} glaciers, "
          f"{args.vertices} vertices each, {n_cells} covered cells")
    print(f"reproject (densified edges):       {t1 - t0:8.3f} s")
    print(f"build (checks, overlaps, fractions): {t2 - t1:6.3f} s")
    print(f"load from GeoPackage (whole chain): {t4 - t3:7.3f} s")
    print(f"worst |modelled / polygon area - 1|: {worst:.2e}")


if __name__ == "__main__":
    main()
