"""What the maps, charts and report.html add to a run of the demo (issue 15: at most 3 s).

Runs the demo once through the API, then writes its products with and without the report
(best of ``--repeat`` each, wall clock and process CPU time) and prints the difference, and
the same figure as a ratio to the run's kernel time in the same process. The machine may be
shared: read the CPU seconds and the best of the repeats.

    python benchmarks/report.py [--repeat 3]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import firnline
from firnline.products import write_run

ROOT = Path(__file__).resolve().parents[1]


def best(fn, repeat: int) -> tuple[float, float]:
    wall, cpu = float("inf"), float("inf")
    for _ in range(repeat):
        t0, c0 = time.perf_counter(), time.process_time()
        fn()
        wall, cpu = min(wall, time.perf_counter() - t0), min(cpu, time.process_time() - c0)
    return wall, cpu


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    cfg = firnline.load_config(ROOT / "configs" / "demo.toml")
    t0 = time.perf_counter()
    result = firnline.run(cfg)
    kernel_s = result.timings["kernel_s"]
    with tempfile.TemporaryDirectory() as tmp:
        n = iter(range(10 ** 6))
        without = best(lambda: write_run(result, Path(tmp) / f"a{next(n)}", report=False), args.repeat)
        with_report = best(lambda: write_run(result, Path(tmp) / f"b{next(n)}", report=True), args.repeat)
    print(f"demo run (API) {time.perf_counter() - t0:.1f} s in all; kernel {kernel_s:.2f} s")
    print(f"write products without the report: best {without[0]:.2f} s wall, {without[1]:.2f} s CPU")
    print(f"write products with the report:    best {with_report[0]:.2f} s wall, {with_report[1]:.2f} s CPU")
    print(f"added by maps, charts and report.html: {with_report[0] - without[0]:.2f} s wall, "
          f"{with_report[1] - without[1]:.2f} s CPU (target: at most 3 s); "
          f"{(with_report[1] - without[1]) / kernel_s:.2f} x the kernel time")


if __name__ == "__main__":
    main()
