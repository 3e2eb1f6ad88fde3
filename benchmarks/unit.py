"""Memory and time of one unit of work, in one pass and in parts (firnline.tiles.unit_parts).

Makes (or reuses, ``--keep DIR``) the procedural range of ``benchmarks/region.py`` with
``--cells`` cells and ``--years`` balance years, prepares it once, and runs the unit of
``[compute] tile_size = --tile`` with the most cells through ``firnline.tiles.run_unit`` twice:
in parts of at most ``firnline.tiles.PART_SIZE`` cells a side (as a run does) and in one pass
(``PART_SIZE`` set to the tile). For each it reports the time and the rise of this process's
peak resident memory over what it held before (``VmHWM`` of ``/proc/self/status``, reset
before each pass through ``/proc/self/clear_refs``; Linux), and checks that both passes give
the same fields and sums::

    python benchmarks/unit.py [--cells 1e7] [--years 1] [--tile 2048] [--keep DIR]

Not a test: the figures go into the issue notes and DEVELOPERS.md.
"""

from __future__ import annotations

import argparse
import dataclasses
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

import firnline  # noqa: E402
import region  # noqa: E402  (benchmarks/region.py: the procedural range)
from firnline import exact, tiles  # noqa: E402
from firnline.model import prepare  # noqa: E402


def memory_gb() -> tuple[float, float]:
    """(VmRSS, VmHWM) of this process, GB."""
    fields = dict(line.split(":", 1) for line in Path("/proc/self/status").read_text().splitlines() if ":" in line)
    return int(fields["VmRSS"].split()[0]) / 1e6, int(fields["VmHWM"].split()[0]) / 1e6


def one_pass(setup, cfg, unit, part: int):
    """Run ``unit`` with parts of at most ``part`` cells a side: result, seconds, GB above the start
    and GB held at the start."""
    old = tiles.PART_SIZE
    tiles.PART_SIZE = part
    try:
        Path("/proc/self/clear_refs").write_text("5")      # peak := current
        start = memory_gb()[0]
        t0 = time.perf_counter()
        r = tiles.run_unit(setup, cfg, unit, 0.0, 0.0)
        return r, time.perf_counter() - t0, memory_gb()[1] - start, start
    finally:
        tiles.PART_SIZE = old


def digest(r) -> str:
    """SHA-256 of a unit's fields and exact glacier sums."""
    import hashlib
    h = hashlib.sha256()
    for k in sorted(r.fields):
        h.update(k.encode())
        h.update(np.ascontiguousarray(r.fields[k]).tobytes())
    for g in sorted(r.glacier_sums):
        for x in exact.values(r.glacier_sums[g]):
            h.update(np.ascontiguousarray(x).tobytes())
    return h.hexdigest()[:16]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cells", type=float, default=1e7)
    ap.add_argument("--years", type=int, default=1)
    ap.add_argument("--tile", type=int, default=2048)
    ap.add_argument("--keep", type=Path, default=None, help="make (or reuse) the case in this folder")
    ap.add_argument("--only", choices=("parts", "one"), default=None, help=argparse.SUPPRESS)
    a = ap.parse_args(argv)
    if a.only is None:          # each pass in a fresh process: memory freed by one is not reused by the other
        import subprocess
        with tempfile.TemporaryDirectory() as tmp:
            folder = a.keep or Path(tmp)
            folder.mkdir(parents=True, exist_ok=True)
            if not (folder / "region.toml").exists():
                region.make_case(folder, a.cells, a.years, a.tile, 1, "all")
            digests = []
            for only in ("parts", "one"):
                out = subprocess.run([sys.executable, __file__, "--tile", str(a.tile), "--keep", str(folder),
                                      "--only", only], capture_output=True, text=True, check=True).stdout
                print(out.strip().split("\n", 1)[1] if digests else out.strip(), flush=True)
                digests.append(out.strip().rsplit(" ", 1)[1])
        same = digests[0] == digests[1]
        print(f"same fields and glacier sums: {same}")
        return 0 if same else 1
    cfg = firnline.load_config(a.keep / "region.toml")
    cfg = dataclasses.replace(cfg, compute=dataclasses.replace(cfg.compute, tile_size=a.tile, workers=1))
    setup = prepare(cfg)
    unit = max((tiles.fill_unit(setup, u) for u in tiles.make_units(setup, a.tile)), key=lambda u: u.positions.size)
    n_parts = len(tiles.unit_parts(setup, unit, tiles.part_size(a.tile)))
    print(f"grid {setup.grid.shape[0]} x {setup.grid.shape[1]}, {len(setup.forcing.years)} balance years; "
          f"unit {unit.index}: {unit.rows[1] - unit.rows[0]} x {unit.cols[1] - unit.cols[0]} cells, "
          f"{unit.positions.size} modelled, {n_parts} parts of at most {tiles.part_size(a.tile)} a side")
    part = tiles.PART_SIZE if a.only == "parts" else max(a.tile, 1)
    r, seconds, gb, held = one_pass(setup, cfg, unit, part)
    label = "in parts" if a.only == "parts" else "one pass"
    print(f"{label}: {seconds:.1f} s, +{gb:.2f} GB above the {held:.2f} GB held before; digest {digest(r)}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
