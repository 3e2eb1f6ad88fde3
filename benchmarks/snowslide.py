"""Benchmark of gravitational snow redistribution (firnline.snowslide).

On a rough procedural DEM of 1000 x 1000 cells (1e6 cells, 25 m; invented relief with
ridges, bowls and metre-scale noise, about a third of it steeper than 25 deg), measures

* the precompute (:func:`firnline.snowslide.build_routing`: order, receivers, weights,
  holding capacities), and
* one transport step (:func:`firnline.snowslide.redistribute`) for one scenario and for
  ``--scenarios`` scenarios at once, with a deep snowpack so that every steep cell releases,

each as the best of several repeats and as a ratio to one numpy ``add(a, b, out=a)`` pass
over the same number of float32 cells, measured in the same process. The machine is
shared: read the ratios, and expect noise.

    python benchmarks/snowslide.py [--size 1000] [--scheme steepest|multiple] [--scenarios 4]

Numba compilation is done (or loaded from its cache) in a warm-up call, reported apart.
Three cases: a deep pack with every steep cell over capacity (the worst case), the pack at
rest plus 10 mm w.e. of fresh snow everywhere (a snowfall day), and the pack at rest with
no fresh snow (a dry day, where the step only checks). The last line gives the cost per
call in add passes, to set against the kernel's cost per day (benchmarks/kernel.py).
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from firnline import snowslide
from firnline.terrain import slope_aspect
from timing import best_of as best  # noqa: E402  (benchmarks/ is on sys.path when run)

CELL_M = 25.0


def rough_dem(n: int, cell_m: float = CELL_M, seed: int = 7):
    """Invented rough relief, 1500-3800 m: ridges, cirque-like bowls and noise."""
    y, x = np.mgrid[0:n, 0:n] * cell_m
    size = n * cell_m
    z = 2600.0 + 800.0 * np.sin(2 * np.pi * x / (0.5 * size)) * np.cos(2 * np.pi * y / (0.6 * size))
    z += 300.0 * np.sin(2 * np.pi * (x + 0.7 * y) / (0.12 * size))
    rng = np.random.default_rng(seed)
    for cx, cy, r, depth in rng.uniform([0, 0, 0.02, 100], [size, size, 0.06, 400], size=(40, 4)) * [1, 1, size, 1]:
        z -= depth * np.exp(-((x - cx) ** 2 + (y - cy) ** 2) / (r * r))
    z += rng.normal(0.0, 2.0, z.shape)
    return z, np.ones((n, n), dtype=bool)




def numpy_add_seconds(n: int, repeat: int = 100) -> float:
    """Best time of one numpy add(a, b, out=a) pass over n float32."""
    a = np.ones(n, dtype=np.float32)
    b = np.ones(n, dtype=np.float32)
    return best(lambda: np.add(a, b, out=a), repeat)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=1000, help="DEM side in cells (default 1000: 1e6 cells)")
    parser.add_argument("--scheme", choices=snowslide.SCHEMES, default="steepest")
    parser.add_argument("--scenarios", type=int, default=4)
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args()

    z, valid = rough_dem(args.size)
    n = int(valid.sum())
    slope, _ = slope_aspect(z, CELL_M, CELL_M)
    add_s = numpy_add_seconds(n)
    print(f"{n} cells; numpy add(a, b, out=a) over {n} float32: {add_s * 1e3:.3f} ms")
    probe = np.random.default_rng(2).permutation(n)
    values = np.ones(n)
    gather_s = best(lambda: values[probe], 20)
    print(f"memory reference: one random gather of {n} float64: {gather_s * 1e3:.2f} ms "
          f"= {gather_s / add_s:.0f} x numpy add (the transport is bound by such accesses; "
          f"on a busy machine this ratio swings most)")
    print(f"share of cells steeper than 25 deg: {np.mean(slope >= 25.0):.2f}")

    t0 = time.perf_counter()
    routing = snowslide.build_routing(z, valid, (CELL_M, CELL_M), slope, scheme=args.scheme)
    first = time.perf_counter() - t0
    pre = min(first, best(lambda: snowslide.build_routing(z, valid, (CELL_M, CELL_M), slope,
                                                          scheme=args.scheme), max(1, args.repeat // 2)))
    print(f"precompute ({args.scheme}): {pre:.3f} s = {pre / add_s:.0f} x numpy add "
          f"({routing.recv_ptr[-1]} links, {np.isfinite(routing.holding_mm).mean():.2f} of cells release)")

    rng = np.random.default_rng(1)
    deep = rng.uniform(500.0, 3000.0, n)           # a deep pack: every steep cell is over capacity
    t0 = time.perf_counter()
    snowslide.redistribute(routing, deep.copy())
    print(f"first call (compile or load from cache): {time.perf_counter() - t0:.2f} s")
    rest = deep.copy()
    snowslide.redistribute(routing, rest)           # the pack at rest: every cell at or below capacity
    cases = {
        "deep pack, every steep cell over capacity": deep,
        "pack at rest + 10 mm w.e. of fresh snow on every cell (a snowfall day)": rest + 10.0,
        "pack at rest, no fresh snow (a dry day: only the check)": rest,
    }
    per_day = {}
    for label, start in cases.items():
        for n_scen in sorted({1, args.scenarios}):
            snow = np.repeat(start[None, :], n_scen, axis=0)
            change = np.zeros_like(snow)
            exported = np.zeros_like(snow)
            work = snow.copy()

            def step():
                work[...] = snow
                snowslide.redistribute(routing, work, change, exported)

            if start is rest:      # nothing moves: time the call alone (no fresh copy needed)
                t = best(lambda: snowslide.redistribute(routing, work, change, exported), args.repeat)
            else:
                copy_s = best(lambda: work.__setitem__(Ellipsis, snow), args.repeat)
                t = max(best(step, args.repeat) - copy_s, 0.0)
            moved = np.abs(work - snow).sum() / 2 / snow.sum()
            print(f"transport step, {label}, {n_scen} scenario(s): {t * 1e3:.1f} ms = {t / add_s:.0f} x "
                  f"numpy add = {t / add_s / n_scen:.0f} x per scenario ({moved:.3f} of the mass moved)")
            if n_scen == 1:
                per_day[label] = t / add_s
    deep_x, fresh_x, dry_x = per_day.values()
    print(f"per scenario and call, in numpy add passes over {n} cells: deep {deep_x:.0f}, snowfall day "
          f"{fresh_x:.0f}, dry day {dry_x:.1f} (compare the kernel's cost per day, benchmarks/kernel.py)")


if __name__ == "__main__":
    main()
