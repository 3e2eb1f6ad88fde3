"""Kernel speed and memory: one balance year on a 1000 x 1000 DEM through the API.

Prints nanoseconds per cell-day and the ratio to one numpy ``add(a, b, out=a)``
pass over 1e6 float32 cells measured in the same process, and the peak memory.
Targets (issue 2): at most 20x that pass, at most 1.5 GB peak.

    python benchmarks/kernel.py [--size 1000] [--method degree-day|radiation]
"""

from __future__ import annotations

import argparse
import resource
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import rasterio
from rasterio.transform import from_origin


def add_pass_ns(n=1_000_000, repeat=200) -> float:
    a = np.ones(n, dtype="float32")
    b = np.ones(n, dtype="float32")
    np.add(a, b, out=a)
    best = float("inf")
    for _ in range(5):
        t0 = time.perf_counter()
        for _ in range(repeat):
            np.add(a, b, out=a)
        best = min(best, (time.perf_counter() - t0) / repeat)
    return best / n * 1e9


def make_case(folder: Path, size: int, method: str) -> Path:
    y, x = np.mgrid[0:size, 0:size] / size
    z = 1500 + 1800 * (1 - y) + 200 * np.sin(6 * x) * np.cos(4 * y)
    with rasterio.open(folder / "dem.tif", "w", driver="GTiff", width=size, height=size, count=1,
                       dtype="float32", crs="EPSG:32632", transform=from_origin(600000, 5200000, 25, 25),
                       nodata=-9999) as dst:
        dst.write(z.astype("float32"), 1)
    d = pd.date_range("2019-10-01", "2020-09-30", freq="D")
    rng = np.random.default_rng(1)
    t = 5 + 10 * np.sin(2 * np.pi * (np.arange(len(d)) - 100) / 365) + rng.normal(0, 3, len(d))
    p = rng.gamma(0.5, 8, len(d))
    pd.DataFrame({"date": d.strftime("%Y-%m-%d"), "temperature_c": t.round(1),
                  "precipitation_mm": p.round(1)}).to_csv(folder / "station.csv", index=False)
    (folder / "bench.toml").write_text(f"""
[dem]
path = "dem.tif"
[climate]
station_file = "station.csv"
station_elevation_m = 1200.0
[melt]
method = "{method}"
[radiation]
cache_dir = "cache"
""")
    return folder / "bench.toml"


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--size", type=int, default=1000)
    ap.add_argument("--method", default="degree-day")
    args = ap.parse_args()
    import firnline
    from firnline.model import prepare, simulate

    add_ns = add_pass_ns()
    with tempfile.TemporaryDirectory() as td:
        cfg = firnline.load_config(make_case(Path(td), args.size, args.method))
        setup = prepare(cfg)
        simulate(setup, cfg)             # warm-up: numba compilation / cache load

        def best_of(c, n=3):
            times = []
            for _ in range(n):
                t0 = time.perf_counter()
                simulate(setup, c)
                times.append(time.perf_counter() - t0)
            return min(times)
        t_kernel = best_of(cfg)
        ratio_dd = None
        if args.method == "radiation":      # same setup, degree-day kernel, for the time ratio
            import dataclasses
            cfg_dd = dataclasses.replace(cfg, melt=dataclasses.replace(cfg.melt, method="degree-day"))
            simulate(setup, cfg_dd)
            ratio_dd = t_kernel / best_of(cfg_dd)
        t0 = time.perf_counter()
        result = firnline.run(cfg, setup=setup)
        t_run = time.perf_counter() - t0
    n_cd = setup.z_m.size * setup.forcing.n_days
    ns = t_kernel / n_cd * 1e9
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"grid {args.size} x {args.size}, {setup.forcing.n_days} days, method {args.method}")
    print(f"kernel (best of 3): {t_kernel:.2f} s, {ns:.2f} ns per cell-day")
    print(f"numpy add pass: {add_ns:.3f} ns per cell; ratio kernel / add = {ns / add_ns:.1f}")
    if ratio_dd is not None:
        print(f"radiation kernel / degree-day kernel on the same grid: {ratio_dd:.2f} (target <= 1.5)")
    print(f"run() incl. metrics and fields: {t_run:.2f} s; peak memory {peak_mb:.0f} MB")
    del result
    sys.stdout.flush()


if __name__ == "__main__":
    main()
