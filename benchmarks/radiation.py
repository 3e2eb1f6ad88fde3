"""Benchmark of the radiation climatology: horizons plus the day-of-year table.

Times :func:`firnline.radiation.table_from_terrain` (horizons band of rows by
band, bounded memory) and :func:`firnline.horizon.horizon_angles` followed by
:func:`firnline.radiation.compute_table` (all horizons at once) on synthetic relief (25 m cells,
72 sectors, 20 km horizon distance, 15-minute steps) for a 300 x 300 DEM (the
demo's size) and a 1000 x 1000 DEM, and prints seconds, peak memory and the
ratio to one numpy ``add(a, b, out=a)`` pass over 1e6 float32 measured in the
same process. Then measures the storage error of the table (day nodes, uint16)
against the full-resolution day-by-day result on the 300 x 300 DEM.

    python benchmarks/radiation.py [--sizes 300 1000] [--no-error]

Targets: 1000 x 1000 within a minute on a 2-core machine and under 2 GB; the
demo's size in seconds; 2000 x 2000 (a 4e6-cell unit) under 1 GB band by band. Numba compilation is done (or loaded from
its cache) in a warm-up call and reported apart.
"""

from __future__ import annotations

import argparse
import resource
import time
import tracemalloc

import numpy as np
from pyproj import Transformer

from firnline import horizon, radiation
from firnline.terrain import slope_aspect

CELL_M = 25.0
SECTORS = 72
DISTANCE_M = 20000.0
STEP_MIN = 15
TRANSMISSIVITY = 0.75
CRS = "EPSG:32632"  # UTM 32N; the grid's lower-left corner near 46.5 N, 7.7 E
X0, Y0 = 400000.0, 5150000.0


def synthetic_dem(n: int, cell_m: float = CELL_M):
    """Alpine-looking relief: ridges, a valley and cirque-like bowls, 1200-3600 m (invented)."""
    y, x = np.mgrid[0:n, 0:n] * cell_m
    size = n * cell_m
    z = 2200.0 + 700.0 * np.sin(2 * np.pi * x / (0.9 * size)) * np.cos(2 * np.pi * y / (1.1 * size))
    z += 350.0 * np.sin(2 * np.pi * (x + 0.6 * y) / (0.35 * size))
    z -= 500.0 * np.exp(-(((x - 0.5 * size) / (0.12 * size)) ** 2))  # a north-south valley
    rng = np.random.default_rng(42)
    for cx, cy, r, depth in rng.uniform([0, 0, 0.04, 100], [size, size, 0.1, 400], size=(12, 4)) * [1, 1, size, 1]:
        z -= depth * np.exp(-((x - cx) ** 2 + (y - cy) ** 2) / (r * r))
    valid = np.ones((n, n), dtype=bool)
    return z, valid


def cell_lat_lon(n: int, cell_m: float = CELL_M):
    """Latitude and longitude of the cell centres (row 0 at the top), via pyproj."""
    cols, rows = np.meshgrid(np.arange(n), np.arange(n))
    x = X0 + (cols + 0.5) * cell_m
    y = Y0 + (n - rows - 0.5) * cell_m
    lon, lat = Transformer.from_crs(CRS, "EPSG:4326", always_xy=True).transform(x, y)
    return np.asarray(lat), np.asarray(lon)


def numpy_add_seconds(n: int = 1_000_000, repeat: int = 200) -> float:
    """Best time of one numpy add(a, b, out=a) pass over n float32."""
    a = np.ones(n, dtype=np.float32)
    b = np.ones(n, dtype=np.float32)
    best = np.inf
    for _ in range(repeat):
        t = time.perf_counter()
        np.add(a, b, out=a)
        best = min(best, time.perf_counter() - t)
    return best


def run_case(n: int, add_s: float) -> None:
    z, valid = synthetic_dem(n)
    slope, aspect = slope_aspect(z, CELL_M, CELL_M)
    lat, lon = cell_lat_lon(n)
    # the banded way firnline.model takes when all horizons would not fit beside the table
    tracemalloc.start()
    t0 = time.perf_counter()
    table = radiation.table_from_terrain(z, valid, slope, aspect, lat, lon, CELL_M, SECTORS, DISTANCE_M,
                                         TRANSMISSIVITY, STEP_MIN)
    t1 = time.perf_counter()
    _, peak_banded = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    groups = radiation.horizon_band_groups(z.shape, n * n, SECTORS, radiation._kernel_bands(
        radiation._tile(z, valid, slope, aspect, lat, lon, TRANSMISSIVITY, STEP_MIN, SECTORS)))
    banded = t1 - t0
    print(f"{n} x {n}, horizons band by band ({len(groups)} band(s) of rows): {banded:.2f} s "
          f"= {banded / add_s:.3g} x numpy add over 1e6 float32; peak traced memory {peak_banded / 2**20:.0f} MiB "
          f"({peak_banded / 1e9:.2f} GB)")
    # all horizons at once, then the table (what firnline.model does while they fit, caching them)
    tracemalloc.start()
    t0 = time.perf_counter()
    hz = horizon.horizon_angles(z, valid, CELL_M, SECTORS, DISTANCE_M)
    t1 = time.perf_counter()
    whole = radiation.compute_table(z, valid, slope, aspect, hz, lat, lon, TRANSMISSIVITY, STEP_MIN)
    t2 = time.perf_counter()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    same = np.array_equal(whole.values, table.values)
    annual = table.annual_mean()
    print(
        f"{n} x {n}, all horizons at once: horizons {t1 - t0:.2f} s, table {t2 - t1:.2f} s "
        f"({len(table.doy_nodes)} day nodes), total {t2 - t0:.2f} s; peak traced memory {peak / 2**20:.0f} MiB; "
        f"tables equal bit for bit: {same}; annual mean {annual.min():.1f}..{annual.max():.1f} W m-2"
    )
    if not same:
        raise SystemExit("the banded table differs from the whole-grid one")


def storage_error(n: int = 300) -> None:
    z, valid = synthetic_dem(n)
    slope, aspect = slope_aspect(z, CELL_M, CELL_M)
    lat, lon = cell_lat_lon(n)
    hz = horizon.horizon_angles(z, valid, CELL_M, SECTORS, DISTANCE_M)
    args = (z, valid, slope, aspect, hz, lat, lon, TRANSMISSIVITY, STEP_MIN)
    table = radiation.compute_table(*args)
    days = np.arange(1, 367)
    month_of_day = np.repeat(np.arange(12), radiation.DAYS_PER_MONTH)  # days 1..365
    errors = np.empty((len(days), table.n_cells), dtype=np.float32)
    monthly_full = np.zeros((12, table.n_cells))
    for chunk in np.array_split(days, 12):
        full = radiation.compute_days(*args, chunk)
        for i, d in enumerate(chunk):
            errors[d - 1] = table.day(int(d)) - full[i]
            if d <= 365:
                monthly_full[month_of_day[d - 1]] += full[i]
    monthly_full /= radiation.DAYS_PER_MONTH[:, None]
    annual = monthly_full.T @ radiation.DAYS_PER_MONTH / 365.0
    abs_err = np.abs(errors)
    lit = annual > 1.0
    rel_annual = abs_err.max(axis=0)[lit] / annual[lit]
    monthly_err = np.abs(table.monthly_means() - monthly_full)
    annual_err = np.abs(table.annual_mean() - annual)
    print(
        f"storage error on {n} x {n} with {len(table.doy_nodes)} day nodes "
        f"(table vs day-by-day at full resolution, all cells x 366 days): "
        f"max {abs_err.max():.2f} W m-2, 99.9th percentile {np.percentile(abs_err, 99.9):.2f}, "
        f"99th {np.percentile(abs_err, 99):.2f}, mean abs {abs_err.mean():.3f}; "
        f"largest daily error relative to the cell's annual mean {100 * rel_annual.max():.1f} %; "
        f"monthly means: max {monthly_err.max():.2f} W m-2; annual mean: max {annual_err.max():.3f} W m-2"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[300, 1000])
    parser.add_argument("--no-error", action="store_true", help="skip the storage-error measurement")
    args = parser.parse_args()
    t = time.perf_counter()
    z, valid = synthetic_dem(40)
    slope, aspect = slope_aspect(z, CELL_M, CELL_M)
    hz = horizon.horizon_angles(z, valid, CELL_M, 4, DISTANCE_M)
    radiation.compute_table(z, valid, slope, aspect, hz, 46.5, 7.7, TRANSMISSIVITY, STEP_MIN)
    radiation.table_from_terrain(z, valid, slope, aspect, 46.5, 7.7, CELL_M, 4, DISTANCE_M, TRANSMISSIVITY, STEP_MIN)
    print(f"warm-up (numba compile or cache load): {time.perf_counter() - t:.2f} s")
    add_s = numpy_add_seconds()
    print(f"numpy add(a, b, out=a) over 1e6 float32: {add_s * 1e3:.3f} ms")
    for n in args.sizes:
        run_case(n, add_s)
    if not args.no_error:
        storage_error()
    print(f"process peak resident memory: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**10:.0f} MiB")


if __name__ == "__main__":
    main()
