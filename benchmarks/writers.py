"""Writer settings: time and size of the per-year GeoTIFFs and of balance.nc for a few choices.

Issue 14 asks for a measured choice of compression level, predictor or shuffle filter and
chunking for GeoTIFF and NetCDF, written in parallel where the libraries allow. This script
writes the same fields (balance-like maps over the procedural range of ``region.py``: a
balance gradient times the height above an ELA, nodata off the high ground, plus noise)
with each candidate and prints seconds and MB, so the settings in ``firnline.outputs``
can be checked on any machine.

    python benchmarks/writers.py [--size 1000] [--years 5] [--repeat 2]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np

from region import elevation  # noqa: E402  (benchmarks/ is on sys.path when run)
from timing import best_of  # noqa: E402

MAPS = 8  # per-year maps of a run (annual, winter, summer, accumulation, ablation, snow_end, ...)
_COG = dict(COMPRESS="DEFLATE", PREDICTOR="YES", BLOCKSIZE=256)
COG_CANDIDATES = {
    "deflate 6, predictor, 1 thread": {**_COG, "LEVEL": 6, "NUM_THREADS": "1"},
    "deflate 6, predictor, all cores": {**_COG, "LEVEL": 6, "NUM_THREADS": "ALL_CPUS"},
    "deflate 1, predictor, all cores": {**_COG, "LEVEL": 1, "NUM_THREADS": "ALL_CPUS"},
    "deflate 6, no predictor, all cores": {**_COG, "PREDICTOR": "NO", "LEVEL": 6, "NUM_THREADS": "ALL_CPUS"},
    "zstd 9, predictor, all cores": {**_COG, "COMPRESS": "ZSTD", "LEVEL": 9, "NUM_THREADS": "ALL_CPUS"},
    "lzw, predictor, all cores": {**_COG, "COMPRESS": "LZW", "NUM_THREADS": "ALL_CPUS"},
}
NETCDF_CANDIDATES = {
    "zlib 4, whole-map chunks": {"zlib": True, "complevel": 4, "shuffle": False, "tile": 1 << 30},
    "zlib 4, shuffle, 512 x 512": {"zlib": True, "complevel": 4, "shuffle": True, "tile": 512},
    "zlib 1, shuffle, 512 x 512": {"zlib": True, "complevel": 1, "shuffle": True, "tile": 512},
    "zlib 1, no shuffle, 512 x 512": {"zlib": True, "complevel": 1, "shuffle": False, "tile": 512},
    "zlib 1, shuffle, 256 x 256": {"zlib": True, "complevel": 1, "shuffle": True, "tile": 256},
}


def fields(size: int, years: int) -> np.ndarray:
    z = elevation(np.arange(size), np.arange(size), size)
    rng = np.random.default_rng(1)
    out = np.empty((years, size, size), dtype="float32")
    for y in range(years):
        b = 0.007 * (z - 2900.0 - 40.0 * y) + rng.normal(0, 0.02, z.shape)   # m w.e., 0.7 per 100 m
        out[y] = np.where(z > 2000.0, b, np.nan).astype("float32")
    return out


def geotiff(folder: Path, data: np.ndarray) -> float:
    from rasterio.transform import from_origin

    from firnline import outputs
    t = from_origin(400000.0, 5300000.0, 25.0, 25.0)
    size = 0
    for y in range(data.shape[0]):
        for k in range(MAPS):
            p = folder / f"m{k}_{y}.tif"
            outputs.write_geotiff(p, data[y], t, "EPSG:32632", ["x"], "m w.e.")
            size += p.stat().st_size
    return size / 1e6


def netcdf(folder: Path, data: np.ndarray) -> float:
    import xarray as xr
    from pyproj import CRS

    from firnline import outputs
    ny, nx = data.shape[1:]
    ds = xr.Dataset({f"v{k}": (("balance_year", "y", "x"), data, {"units": "m w.e."}) for k in range(MAPS)},
                    coords={"balance_year": np.arange(2000, 2000 + data.shape[0]),
                            "y": 5300000.0 - 25.0 * (np.arange(ny) + 0.5),
                            "x": 400000.0 + 25.0 * (np.arange(nx) + 0.5)})
    p = folder / "b.nc"
    outputs.write_netcdf(p, ds, CRS("EPSG:32632"))
    return p.stat().st_size / 1e6


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--size", type=int, default=1000)
    ap.add_argument("--years", type=int, default=5)
    ap.add_argument("--repeat", type=int, default=2)
    args = ap.parse_args()
    from firnline import outputs
    data = fields(args.size, args.years)
    n = args.years * MAPS
    print(f"{n} maps of {args.size} x {args.size} float32 cells ({data.nbytes * MAPS / 1e6:.0f} MB raw)")
    with tempfile.TemporaryDirectory() as td:
        folder = Path(td)
        for kind, setting, candidates, write in (("GeoTIFF (COG)", "COG_OPTIONS", COG_CANDIDATES, geotiff),
                                                 ("NetCDF-4", "NETCDF_ENCODING", NETCDF_CANDIDATES, netcdf)):
            chosen = dict(getattr(outputs, setting))
            for label, opts in candidates.items():
                setattr(outputs, setting, opts)
                mb = write(folder, data)
                s = best_of(lambda: write(folder, data), args.repeat)
                mark = "  <- firnline" if opts == chosen else ""
                print(f"{kind:14s} {label:34s} {s:6.2f} s {mb:8.1f} MB{mark}")
            setattr(outputs, setting, chosen)


if __name__ == "__main__":
    t0 = time.perf_counter()
    main()
    print(f"({time.perf_counter() - t0:.0f} s in all)")
