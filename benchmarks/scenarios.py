"""Cost of a 9-scenario sweep relative to one run, measured in the same process.

The sweep is 3 warmings x 3 precipitation changes (0, 1, 2 K x -10, 0, +10 %) in one
kernel pass (:func:`firnline.scenarios.sweep`); one run is :func:`firnline.run` with no
change. Both include reading the inputs (:func:`firnline.model.prepare`) and the
per-glacier metrics, and neither writes files. Targets: the sweep costs at most 4x
one run, and each scenario beyond the first at most 0.6 of one run on an all-glacier
grid (``--synthetic``).

The sweep models only the glacier cells (its products need no others) while a run
models every valid cell, so the ratio depends on the glacier share of the DEM. Uses
the demo (``configs/demo.toml``) when it exists, else (or with ``--synthetic``) the
synthetic case of ``benchmarks/kernel.py`` at 300 x 300 (one balance year, no
outlines): every cell is glacier, the worst case for the sweep.

    python benchmarks/scenarios.py [--config configs/demo.toml] [--synthetic] [--repeat 5]
"""

from __future__ import annotations

import argparse
import dataclasses
import importlib.util
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
TARGET = 4.0
EXTRA_TARGET = 0.6   # each scenario beyond the first, as a share of one run (all-glacier grid)


def synthetic_case(folder: Path, size: int = 300) -> Path:
    """The synthetic valley of benchmarks/kernel.py (25 m cells, one balance year), no outlines."""
    spec = importlib.util.spec_from_file_location("kernel_benchmark", Path(__file__).with_name("kernel.py"))
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod.make_case(folder, size, "degree-day", smooth=True)


def best(fn, repeat: int):
    """Fastest of ``repeat`` calls: (seconds, the value it returned)."""
    out = None
    for _ in range(repeat):
        t0 = time.perf_counter()
        value = fn()
        t = time.perf_counter() - t0
        if out is None or t < out[0]:
            out = (t, value)
    return out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--config", default=str(REPO / "configs" / "demo.toml"))
    ap.add_argument("--synthetic", action="store_true", help="use the synthetic whole-grid case")
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args()
    import firnline
    from firnline.model import prepare
    from firnline.scenarios import sweep

    warming, precip = [0.0, 1.0, 2.0], [-10.0, 0.0, 10.0]
    with tempfile.TemporaryDirectory() as td:
        path = Path(args.config)
        if path.exists() and not args.synthetic:
            cfg = firnline.load_config(path)
            # keep any radiation cache out of the repository
            cfg = dataclasses.replace(cfg, radiation=dataclasses.replace(cfg.radiation, cache_dir=Path(td)))
            label = str(path)
        else:
            cfg = firnline.load_config(synthetic_case(Path(td)))
            label = "synthetic 300 x 300, every cell glacier"
        firnline.run(cfg)                              # warm-up: numba cache, radiation cache
        sweep(prepare(cfg), warming, precip)
        t_run, one = best(lambda: firnline.run(cfg), args.repeat)
        t_sweep, sw = best(lambda: sweep(prepare(cfg), warming, precip), args.repeat)
        t_prepare = best(lambda: prepare(cfg), args.repeat)[0]
    n_valid, n_glacier, n_days = one.setup.cells.size, sw.setup.cells.size, sw.setup.forcing.n_days
    print(f"case: {label}; {n_valid} valid cells of which {n_glacier} glacier cells, {n_days} days, "
          f"{len(sw.years)} balance years, {len(sw.setup.glaciers.names)} glaciers, method {cfg.melt.method}")
    print(f"prepare (inputs):   {t_prepare:.3f} s (best of {args.repeat})")
    print(f"one run:            {t_run:.3f} s (kernel {one.timings['kernel_s']:.3f} s, "
          f"metrics and fields {one.timings['metrics_s']:.3f} s)")
    print(f"sweep, {len(sw.scenarios)} scenarios: {t_sweep:.3f} s (kernel {sw.timings['kernel_s']:.3f} s, "
          f"metrics {sw.timings['metrics_s']:.3f} s)")
    ratio = t_sweep / t_run
    print(f"ratio sweep / one run = {ratio:.2f} (target <= {TARGET:g}: {'met' if ratio <= TARGET else 'NOT met'})")
    print(f"kernel only: {sw.timings['kernel_s'] / one.timings['kernel_s']:.2f} x for "
          f"{len(sw.scenarios)} scenarios")
    extra = (t_sweep - t_run) / (len(sw.scenarios) - 1) / t_run
    kernel_extra = ((sw.timings["kernel_s"] - one.timings["kernel_s"]) / (len(sw.scenarios) - 1)
                    / one.timings["kernel_s"])
    print(f"cost of each scenario beyond the first: {extra:.2f} of one run (target <= {EXTRA_TARGET:g}: "
          f"{'met' if extra <= EXTRA_TARGET else 'NOT met'}); kernel only {kernel_extra:.2f}")


if __name__ == "__main__":
    main()
