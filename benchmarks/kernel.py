"""Kernel speed and memory: one balance year on a 1000 x 1000 DEM with real relief.

Prints nanoseconds per cell-day and the ratio to one numpy ``add(a, b, out=a)`` pass
over as many float32 cells, measured in the same process (best of ``--repeat`` for
both, since the machine may be shared), and the peak memory.

The DEM is a procedural rough mountain range (fractal noise with a power-law spectrum
on a large-scale massif, 1200-3900 m, 25 m cells), so neighbouring cells differ the way
they do in a real DEM and the kernel gets no help from smooth fields. Glacier outlines
cover part of the high ground (about a fifth of the cells); the station record mixes
snow, rain, melt and dry days at every elevation.

Targets (issue 10): degree-day at most 5x the add pass; radiation at most 1.4x the
degree-day kernel on the same grid; peak memory at most 1.5 GB (issue 2).

"kernel" is the daily loop itself: every process of the pack on (refreezing, firn) but no
spin-up, no daily region sums and no snow sliding, which cut or lengthen the record. The
next lines add the daily region sums (runoff), then the sliding snow (the record cut every
5 days), then the spin-up (the default run: 5 extra years cycled), each per cell-day of the
record itself.

    python benchmarks/kernel.py [--size 1000] [--method degree-day|radiation]
                                [--repeat 5] [--threads N] [--smooth] [--cache DIR]

``--smooth`` uses the old smooth valley instead (for comparison with earlier notes);
``--cache`` keeps the radiation climatology between runs (default: a folder in the
system's temporary directory).
"""

from __future__ import annotations

import argparse
import json
import resource
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import rasterio
from rasterio.transform import from_origin

CELL_M = 25.0
ORIGIN = (600000.0, 5200000.0)


def add_pass_ns(n=1_000_000, repeat=200, rounds=7) -> float:
    """Best-of-``rounds`` time of one float32 ``np.add(a, b, out=a)`` over n cells, ns per cell."""
    a = np.ones(n, dtype="float32")
    b = np.ones(n, dtype="float32")
    np.add(a, b, out=a)
    best = float("inf")
    for _ in range(rounds):
        t0 = time.perf_counter()
        for _ in range(repeat):
            np.add(a, b, out=a)
        best = min(best, (time.perf_counter() - t0) / repeat)
    return best / n * 1e9


def rough_dem(size: int, seed: int = 7) -> np.ndarray:
    """A rough mountain range: fractal noise (power spectrum ~ k^-3.6, i.e. a surface of
    fractal dimension about 2.2, typical of alpine relief) on a broad massif, m."""
    rng = np.random.default_rng(seed)
    ky = np.fft.fftfreq(size)[:, None]
    kx = np.fft.rfftfreq(size)[None, :]
    k = np.hypot(kx, ky)
    k[0, 0] = np.inf
    amp = k ** -1.8
    spec = amp * (rng.normal(size=k.shape) + 1j * rng.normal(size=k.shape))
    noise = np.fft.irfft2(spec, s=(size, size))
    noise = (noise - noise.mean()) / noise.std()
    y, x = np.mgrid[0:size, 0:size] / size
    massif = np.exp(-((x - 0.55) ** 2 + (y - 0.45) ** 2) / 0.12)
    z = 1200 + 2000 * massif + 450 * noise * (0.4 + massif)
    return np.clip(z, 1200, 3900)


def smooth_dem(size: int) -> np.ndarray:
    """The smooth valley of the earlier benchmark (for comparison only)."""
    y, x = np.mgrid[0:size, 0:size] / size
    return 1500 + 1800 * (1 - y) + 200 * np.sin(6 * x) * np.cos(4 * y)


def glacier_outlines(z: np.ndarray) -> dict:
    """GeoJSON boxes around the high ground: each box of 50 x 50 cells whose mean is above
    the 75th percentile becomes a glacier; about a fifth of the DEM."""
    size = z.shape[0]
    step = 50
    limit = np.percentile(z, 75)
    boxes = []
    for i in range(0, size, step):
        for j in range(0, size, step):
            if z[i:i + step, j:j + step].mean() > limit:
                x0 = ORIGIN[0] + j * CELL_M
                y0 = ORIGIN[1] - i * CELL_M
                x1, y1 = x0 + step * CELL_M, y0 - step * CELL_M
                boxes.append([[[x0, y0], [x1, y0], [x1, y1], [x0, y1], [x0, y0]]])
    feats = [{"type": "Feature", "properties": {"name": f"G{k}"},
              "geometry": {"type": "Polygon", "coordinates": box}} for k, box in enumerate(boxes)]
    return {"type": "FeatureCollection",
            "crs": {"type": "name", "properties": {"name": "urn:ogc:def:crs:EPSG::32632"}},
            "features": feats}


def make_case(folder: Path, size: int, method: str, smooth: bool = False,
              cache_dir: Path | None = None) -> Path:
    """Write DEM, outlines (rough case), station record and config into ``folder``."""
    z = smooth_dem(size) if smooth else rough_dem(size)
    with rasterio.open(folder / "dem.tif", "w", driver="GTiff", width=size, height=size, count=1,
                       dtype="float32", crs="EPSG:32632",
                       transform=from_origin(ORIGIN[0], ORIGIN[1], CELL_M, CELL_M),
                       nodata=-9999) as dst:
        dst.write(z.astype("float32"), 1)
    d = pd.date_range("2019-10-01", "2020-09-30", freq="D")
    rng = np.random.default_rng(1)
    t = 5 + 10 * np.sin(2 * np.pi * (np.arange(len(d)) - 100) / 365) + rng.normal(0, 3, len(d))
    p = rng.gamma(0.5, 8, len(d))
    pd.DataFrame({"date": d.strftime("%Y-%m-%d"), "temperature_c": t.round(1),
                  "precipitation_mm": p.round(1)}).to_csv(folder / "station.csv", index=False)
    glaciers = ""
    if not smooth:
        (folder / "glaciers.geojson").write_text(json.dumps(glacier_outlines(z)))
        glaciers = '[glaciers]\noutlines = "glaciers.geojson"\nid_field = "name"\n'
    cache = (cache_dir or folder / "cache").as_posix()
    (folder / "bench.toml").write_text(f"""
[dem]
path = "dem.tif"
{glaciers}
[climate]
station_file = "station.csv"
station_elevation_m = 1200.0
[melt]
method = "{method}"
[radiation]
cache_dir = "{cache}"
""")
    return folder / "bench.toml"


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--size", type=int, default=1000)
    ap.add_argument("--method", default="degree-day")
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--threads", type=int, default=None)
    ap.add_argument("--smooth", action="store_true")
    ap.add_argument("--cache", type=Path, default=Path(tempfile.gettempdir()) / "firnline-bench-cache")
    args = ap.parse_args()
    import dataclasses

    import numba

    import firnline
    from firnline.model import prepare, simulate

    if args.threads:
        numba.set_num_threads(args.threads)
    with tempfile.TemporaryDirectory() as td:
        full = firnline.load_config(make_case(Path(td), args.size, args.method, args.smooth, args.cache))
        cfg = dataclasses.replace(full, snow=dataclasses.replace(full.snow, spinup_years=0,
                                                                 redistribution="none"))
        setup = prepare(cfg)
        simulate(setup, cfg, daily=False)             # warm-up: numba compilation / cache load

        def best_of(c, s=setup, daily=False, repeat=args.repeat):
            times = []
            for _ in range(repeat):
                t0 = time.perf_counter()
                simulate(s, c, daily=daily)
                times.append(time.perf_counter() - t0)
            return min(times)
        add_ns = add_pass_ns()
        t_kernel = best_of(cfg)
        add_ns = min(add_ns, add_pass_ns())
        ratio_dd = None
        if args.method == "radiation":      # same grid, degree-day kernel, for the time ratio
            cfg_dd = dataclasses.replace(cfg, melt=dataclasses.replace(cfg.melt, method="degree-day"))
            setup_dd = prepare(cfg_dd)       # the method shapes the setup (model.check_config)
            simulate(setup_dd, cfg_dd, daily=False)
            t_dd = best_of(cfg_dd, setup_dd)
            for _ in range(2):                   # alternate, so both see the same spells of load
                t_kernel = min(t_kernel, best_of(cfg))
                t_dd = min(t_dd, best_of(cfg_dd, setup_dd))
            ratio_dd = t_kernel / t_dd
        t_daily = best_of(cfg, daily=True)
        slide_cfg = dataclasses.replace(cfg, snow=dataclasses.replace(cfg.snow, redistribution="gravitational"))
        slide_setup = prepare(slide_cfg)
        simulate(slide_setup, slide_cfg)
        t_slide = best_of(slide_cfg, slide_setup, daily=True, repeat=min(args.repeat, 2))
        full_setup = prepare(full)
        t0 = time.perf_counter()
        result = firnline.run(full, setup=full_setup)
        t_run = time.perf_counter() - t0
    n_cd = setup.cells.size * setup.forcing.n_days
    ns = t_kernel / n_cd * 1e9
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    n_glacier = int(np.count_nonzero(setup.glacier_mask))
    layer = getattr(numba, "threading_layer", lambda: "?")
    try:
        layer_name = layer()
    except ValueError:
        layer_name = "none"
    print(f"grid {args.size} x {args.size} ({'smooth valley' if args.smooth else 'rough relief'}), "
          f"{setup.cells.size} cells of which {n_glacier} glacier, {setup.forcing.n_days} days, "
          f"method {args.method}")
    print(f"threads {numba.get_num_threads()}, numba threading layer {layer_name}")
    print(f"kernel (best of {args.repeat}): {t_kernel:.3f} s, {ns:.3f} ns per cell-day")
    print(f"numpy add pass (best of 7x200, twice): {add_ns:.4f} ns per cell; "
          f"ratio kernel / add = {ns / add_ns:.2f}")
    if ratio_dd is not None:
        print(f"radiation kernel / degree-day kernel on the same grid: {ratio_dd:.2f} (target <= 1.4)")
    for label, t in (("+ daily region sums", t_daily), ("+ sliding snow (record cut every 5 days)", t_slide)):
        print(f"{label}: {t:.3f} s, {t / n_cd * 1e9:.3f} ns per cell-day, {t / n_cd * 1e9 / add_ns:.2f} x add")
    print(f"run() with the default config (spin-up, sliding, runoff, metrics and fields): {t_run:.2f} s; "
          f"peak memory {peak_mb:.0f} MB")
    del result
    sys.stdout.flush()


if __name__ == "__main__":
    main()
