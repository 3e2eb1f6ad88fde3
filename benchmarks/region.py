"""A mountain range in tiles: wall time, peak memory of every process and cells per second.

Makes a procedural mountain range of ``--cells`` cells (a square DEM, 25 m cells) tile by tile
into a tiled GeoTIFF (never whole in memory), invented glacier outlines on its high ground
(boxes of 40 x 40 cells whose mean lies above a fixed elevation), and a station record of
``--years`` balance years; then runs ``firnline.run`` with ``[compute] tile_size`` and
``workers`` (degree-day method, every ``[snow]`` process on) and, unless ``--no-write``,
writes the products.

    python benchmarks/region.py [--cells 1e6] [--years 1] [--tile 2048] [--workers 2]
                                [--cells-mode all|glaciers] [--no-write] [--keep DIR]

Prints: the grid, units and scheduler, the wall time of the run (prepare + units + merge) and
of writing, cells per second (valid cells x balance years / run time, and per cell-day), the
peak resident memory of this process and of the largest worker process (RUSAGE_CHILDREN: the
local cluster's workers are children of this process), and this process's peak in each phase
(making the inputs, prepare, run, write; sampled every 50 ms). Targets (issue 14): below 2.5 GB per
process at 1e8 cells, time linear in cells x days, the 1e8-cell year within 15 minutes.
"""

from __future__ import annotations

import argparse
import json
import math
import resource
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import rasterio
from rasterio.transform import from_origin
from rasterio.windows import Window

CELL_M = 25.0
ORIGIN = (400000.0, 5300000.0)
BLOCK = 1024          # rows and columns of DEM made at once
GLACIER_BOX = 40      # cells along a glacier box's side
GLACIER_ABOVE_M = 2900.0


def _lattice(ix: np.ndarray, iy: np.ndarray, seed: int) -> np.ndarray:
    """A reproducible pseudo-random value in [0, 1) per integer lattice point (integer hash)."""
    h = (ix.astype(np.uint64) * np.uint64(0x9E3779B1) + iy.astype(np.uint64) * np.uint64(0x85EBCA77)
         + np.uint64(seed) * np.uint64(0xC2B2AE3D)) & np.uint64(0xFFFFFFFF)
    h ^= h >> np.uint64(15)
    h = (h * np.uint64(0x2C1B3C6D)) & np.uint64(0xFFFFFFFF)
    h ^= h >> np.uint64(12)
    return h.astype("float64") / 2.0**32


def _value_noise(x: np.ndarray, y: np.ndarray, scale: float, seed: int) -> np.ndarray:
    """Smoothly interpolated lattice noise of wavelength ``scale`` (cells), in [-1, 1]."""
    gx, gy = x / scale, y / scale
    ix, iy = np.floor(gx).astype(np.int64), np.floor(gy).astype(np.int64)
    fx, fy = gx - ix, gy - iy
    sx, sy = fx * fx * (3 - 2 * fx), fy * fy * (3 - 2 * fy)
    v00, v10 = _lattice(ix, iy, seed), _lattice(ix + 1, iy, seed)
    v01, v11 = _lattice(ix, iy + 1, seed), _lattice(ix + 1, iy + 1, seed)
    return 2.0 * ((v00 * (1 - sx) + v10 * sx) * (1 - sy) + (v01 * (1 - sx) + v11 * sx) * sy) - 1.0


def elevation(rows: np.ndarray, cols: np.ndarray, size: int) -> np.ndarray:
    """The range at cell rows/columns: ridges along the diagonal plus fractal noise, 900-4200 m."""
    r, c = np.meshgrid(rows.astype("float64"), cols.astype("float64"), indexing="ij")
    u = (r + c) / (2.0 * size)                         # across the range, 0 .. 1
    crest = np.exp(-((u - 0.5) / 0.22) ** 2)
    z = 1000.0 + 2300.0 * crest
    for k, scale in enumerate((1600.0, 600.0, 220.0, 80.0, 28.0, 10.0)):
        z += 900.0 * (scale / 1600.0) ** 0.7 * _value_noise(r, c, scale, 11 + k) * (0.35 + crest)
    return np.clip(z, 900.0, 4200.0)


def make_case(folder: Path, n_cells: float, years: int, tile: int, workers: int, cells_mode: str) -> Path:
    size = int(round(math.sqrt(n_cells)))
    boxes = []
    profile = dict(driver="GTiff", width=size, height=size, count=1, dtype="float32", crs="EPSG:32632",
                   transform=from_origin(ORIGIN[0], ORIGIN[1], CELL_M, CELL_M), nodata=-9999, tiled=True,
                   blockxsize=256, blockysize=256, compress="deflate", BIGTIFF="IF_SAFER")
    with rasterio.open(folder / "dem.tif", "w", **profile) as dst:
        for r0 in range(0, size, BLOCK):
            for c0 in range(0, size, BLOCK):
                rows = np.arange(r0, min(r0 + BLOCK, size))
                cols = np.arange(c0, min(c0 + BLOCK, size))
                z = elevation(rows, cols, size)
                dst.write(z.astype("float32"), 1, window=Window(c0, r0, cols.size, rows.size))
                for i in range(0, rows.size - GLACIER_BOX + 1, GLACIER_BOX):
                    for j in range(0, cols.size - GLACIER_BOX + 1, GLACIER_BOX):
                        if z[i:i + GLACIER_BOX, j:j + GLACIER_BOX].mean() > GLACIER_ABOVE_M:
                            x0 = ORIGIN[0] + (c0 + j) * CELL_M
                            y0 = ORIGIN[1] - (r0 + i) * CELL_M
                            x1, y1 = x0 + GLACIER_BOX * CELL_M, y0 - GLACIER_BOX * CELL_M
                            boxes.append([[[x0, y0], [x1, y0], [x1, y1], [x0, y1], [x0, y0]]])
    feats = [{"type": "Feature", "properties": {"name": f"G{k:05d}"},
              "geometry": {"type": "Polygon", "coordinates": b}} for k, b in enumerate(boxes)]
    (folder / "glaciers.geojson").write_text(json.dumps({
        "type": "FeatureCollection", "crs": {"type": "name", "properties": {"name": "urn:ogc:def:crs:EPSG::32632"}},
        "features": feats}))
    d = pd.date_range(f"{2020 - years}-10-01", "2020-09-30", freq="D")
    rng = np.random.default_rng(1)
    t = 4 + 10 * np.sin(2 * np.pi * (np.arange(len(d)) - 100) / 365) + rng.normal(0, 3, len(d))
    p = rng.gamma(0.5, 8, len(d))
    pd.DataFrame({"date": d.strftime("%Y-%m-%d"), "temperature_c": t.round(1),
                  "precipitation_mm": p.round(1)}).to_csv(folder / "station.csv", index=False)
    (folder / "region.toml").write_text(f"""
[site]
name = "procedural range"
[dem]
path = "dem.tif"
[glaciers]
outlines = "glaciers.geojson"
[climate]
station_file = "station.csv"
station_elevation_m = 1200.0
[snow]
spinup_years = 0
[radiation]
cache_dir = "cache"
[compute]
tile_size = {tile}
workers = {workers}
cells = "{cells_mode}"
""")
    return folder / "region.toml"


class PhasePeaks:
    """Peak resident memory of this process per phase, sampled every 50 ms from /proc/self/statm
    (Linux; elsewhere only the whole-process peak of getrusage is printed)."""

    def __init__(self):
        import threading
        self.phase, self.peaks = "start", {}
        self._page = resource.getpagesize()
        if Path("/proc/self/statm").exists():
            threading.Thread(target=self._watch, daemon=True).start()

    def _watch(self) -> None:
        while True:
            with open("/proc/self/statm") as f:
                rss = int(f.read().split()[1]) * self._page / 2**30
            self.peaks[self.phase] = max(self.peaks.get(self.phase, 0.0), rss)
            time.sleep(0.05)

    def __call__(self, phase: str) -> None:
        self.phase = phase


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--cells", type=float, default=1e6)
    ap.add_argument("--years", type=int, default=1)
    ap.add_argument("--tile", type=int, default=2048)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--cells-mode", default="all", choices=("all", "glaciers"))
    ap.add_argument("--no-write", action="store_true")
    ap.add_argument("--keep", type=Path, default=None)
    args = ap.parse_args()

    import firnline
    from firnline.model import prepare, simulate

    phase = PhasePeaks()
    with tempfile.TemporaryDirectory() as td:
        folder = args.keep or Path(td)
        phase("make inputs")
        folder.mkdir(parents=True, exist_ok=True)
        t0 = time.perf_counter()
        cfg = firnline.load_config(make_case(folder, args.cells, args.years, args.tile, args.workers,
                                             args.cells_mode))
        t_make = time.perf_counter() - t0
        t0 = time.perf_counter()
        phase("prepare")
        setup = prepare(cfg)
        t_prepare = time.perf_counter() - t0
        # numba compilation (or its on-disk cache) once, on a few cells, so the timing is of the work
        simulate(setup, cfg, cells=np.arange(min(1000, setup.cells.size)))
        t0 = time.perf_counter()
        phase("run")
        result = firnline.run(cfg, setup=setup)
        t_run = time.perf_counter() - t0
        t_write = 0.0
        if not args.no_write:
            t0 = time.perf_counter()
            phase("write")
            result.write(folder / "out")
            t_write = time.perf_counter() - t0
        spilled = result.maps.spilled
        result.close()
    n = setup.cells.size
    cell_days = n * setup.forcing.n_days
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20
    kids = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 2**20
    print(f"grid {setup.grid.shape[0]} x {setup.grid.shape[1]}: {n} valid cells, "
          f"{int(setup.glacier_mask.sum())} glacier cells in {len(setup.glaciers.names)} glaciers, "
          f"{len(setup.forcing.years)} balance years ({setup.forcing.n_days} days)")
    print(f"units {result.timings['units']} of tile {args.tile}; {result.compute}; per-year maps "
          f"{'in a file beside the output folder' if spilled else 'in memory'}")
    print(f"make inputs {t_make:.1f} s; prepare {t_prepare:.1f} s; run {t_run:.1f} s "
          f"(units {result.timings['kernel_s']:.1f} s, metrics {result.timings['metrics_s']:.1f} s); "
          f"write {t_write:.1f} s")
    print(f"{n * len(setup.forcing.years) / (t_prepare + t_run):.3g} cell-years per second (prepare + run); "
          f"{(t_prepare + t_run) / cell_days * 1e9:.1f} ns per cell-day")
    # without workers a child is only a short helper forked by a library, whose peak is the
    # parent's size at the fork: not a worker's memory
    workers = "" if result.compute.startswith("synchronous") else \
        f", largest worker process {kids:.2f} GB (RUSAGE_CHILDREN)"
    print(f"peak memory: this process {own:.2f} GB{workers}")
    if phase.peaks:
        print("peak memory of this process by phase: " + ", ".join(
            f"{k} {v:.2f} GB" for k, v in phase.peaks.items() if k != "start"))


if __name__ == "__main__":
    main()
