"""Memory a run will need, estimated before anything large is allocated, against what is free.

The estimate counts the arrays a run holds at its peak, from sizes known before the
inputs are read: the DEM's cell count (from the raster header), the number of balance
years (from the station file's line count and the configured period), the number of
scenarios, the band width (profile rows) and, for the radiation method, the horizon
sectors and the radiation table. It is deliberately generous (float64 working copies,
the per-year fields of every scenario, the writers' temporaries); a run it refuses would
at best have swapped for hours. ``firnline run`` streams its per-year maps
(:mod:`firnline.yearmaps`): its estimate counts the whole DEM's setup, one unit's kernel results
and at most :data:`firnline.yearmaps.SPILL_BYTES` of maps, not every year of every cell.
"""

from __future__ import annotations

import math
import os
import warnings
from dataclasses import dataclass
from pathlib import Path

from .errors import InputError
from .kernel import CHUNK_CELLS, CHUNK_STRIDE, N_DAILY, N_FLUX, N_SEASON, N_STATE

# bytes per DEM cell that do not grow with years: the whole DEM's setup (firnline.model.prepare)
# at its peak, while the glacier cover and the snow routing are built beside the DEM, its valid
# mask, cell indices, elevations, columns and slope: 11.0 GB for the 1e8 cells of
# benchmarks/region.py, 8.6 GB since the builds fill their arrays in place (kept generous);
# about 75-78 B per cell stay held for the run
_BYTES_PER_CELL = 110
# ... of which the run holds this much (and each worker process of a local cluster its copy)
_HELD_BYTES_PER_CELL = 75
# the kernel per surface column and scenario (firnline.kernel): the state and its copy at the
# start, the cumulative balance, the firn age layers (5, the default firn_years), and the
# chunks' kept rows (state and running sums, rows CHUNK_STRIDE apart) that persist between
# calls with sliding snow or cell-mode forcing
_STATE_BYTES_PER_CELL_SCENARIO = (8 * 2 * N_STATE + 8 + 8 * 5
                                  + 8 * (N_STATE + N_SEASON * N_FLUX) * CHUNK_STRIDE // CHUNK_CELLS)
# bytes per cell, scenario and year: the kernel's results as it keeps them (season x flux sums
# and year-end snow and firn float32, year-end storage float64)
_KERNEL_BYTES_PER_CELL_YEAR = 4 * N_SEASON * N_FLUX + 4 + 4 + 8
# ... plus the per-year fields (5 maps float32 on the cells and on the grid)
_BYTES_PER_CELL_SCENARIO_YEAR = _KERNEL_BYTES_PER_CELL_YEAR + 4 * 5 * 2
_MAPS = 8                     # per-year maps of a run (firnline.tiles, firnline.yearmaps)
_BYTES_PER_PROFILE_ROW = 200                                 # a pandas row of the profile tables
_GLACIER_RELIEF_M = 5000.0                                  # upper bound of one glacier's relief
_FIXED_BYTES = 300 * 2**20                                  # interpreter, numba, GDAL, pandas


@dataclass(frozen=True)
class Estimate:
    bytes: int
    cells: int
    shape: tuple[int, int]
    years: int
    scenarios: int
    band_width_m: float
    glaciers: int


def estimate(shape: tuple[int, int], years: int, scenarios: int = 1, band_width_m: float = 50.0,
             glaciers: int = 1, radiation_sectors: int | None = None, unit_cells: int | None = None,
             returned: bool = False, part_cells: int | None = None, setup_copies: int = 0) -> Estimate:
    """Peak memory of a run, bytes (see the module docstring for what is counted).

    ``unit_cells``: the cells of one unit of work when the run's per-year maps are streamed
    (``firnline run``: :mod:`firnline.yearmaps` holds at most :data:`~firnline.yearmaps.SPILL_BYTES`
    of them, the rest goes to a file), so the kernel's per-year results are one unit's block of
    years; ``part_cells``: the cells of the unit's parts (:func:`firnline.tiles.unit_parts`, default
    ``unit_cells``), whose kernel runs one at a time; ``returned``: units run in other processes and
    send back every year of their fields; None counts every year of every cell (a sweep keeps every
    scenario's maps). ``setup_copies``: worker processes that each hold a copy of the setup.
    """
    from .yearmaps import SPILL_BYTES, STRIP_BYTES

    ny, nx = shape
    cells = ny * nx
    b = _FIXED_BYTES + cells * _BYTES_PER_CELL + setup_copies * (_FIXED_BYTES + cells * _HELD_BYTES_PER_CELL)
    if unit_cells is None:
        b += cells * scenarios * _STATE_BYTES_PER_CELL_SCENARIO
        b += cells * scenarios * max(years, 1) * _BYTES_PER_CELL_SCENARIO_YEAR
    else:
        unit = min(unit_cells, cells)
        part = min(unit if part_cells is None else part_cells, unit)
        b += part * (scenarios * _STATE_BYTES_PER_CELL_SCENARIO + _UNIT_INPUT_BYTES_PER_CELL)
        b += _unit_year_bytes(part, unit, years, scenarios, returned)
        b += min(cells * max(years, 1) * 4 * _MAPS, SPILL_BYTES) + 2 * STRIP_BYTES
        b += scenarios * 366 * max(years, 1) * (glaciers + 2) * N_DAILY * 8     # the run's daily region sums
    bands = math.ceil(_GLACIER_RELIEF_M / band_width_m)
    b += bands * max(years, 1) * glaciers * scenarios * _BYTES_PER_PROFILE_ROW
    if radiation_sectors:
        from .model import WINDOW_RADIATION_CELLS
        from .radiation import day_nodes, peak_bytes
        if unit_cells is not None and cells > WINDOW_RADIATION_CELLS:
            # made per unit (model.WindowRadiation): the unit's table and as much again of working
            # arrays (generous: measured +1.16 GB for a 2048 x 2048 unit, 72 sectors, 20 km, and
            # +1.71 GB for a window across four blocks), and no less than a whole table at the
            # threshold (which counts valid cells, this the DEM's)
            unit = min(unit_cells, cells)
            b += max(peak_bytes(unit, unit, radiation_sectors) + len(day_nodes()) * unit * 2,
                     peak_bytes(WINDOW_RADIATION_CELLS, WINDOW_RADIATION_CELLS, radiation_sectors))
        else:
            b += peak_bytes(cells, cells, radiation_sectors)    # the climatology as it is made
    return Estimate(int(b), cells, (ny, nx), years, scenarios, band_width_m, glaciers)


def available_bytes() -> int | None:
    """Memory this process may still use: the smaller of MemAvailable and a cgroup limit; None if unknown."""
    found = []
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemAvailable:"):
                found.append(int(line.split()[1]) * 1024)
                break
    except (OSError, ValueError, IndexError):
        pass
    if not found:
        try:
            found.append(os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE"))
        except (ValueError, OSError, AttributeError):
            pass
    for limit_file, usage_file in (("/sys/fs/cgroup/memory.max", "/sys/fs/cgroup/memory.current"),
                                   ("/sys/fs/cgroup/memory/memory.limit_in_bytes",
                                    "/sys/fs/cgroup/memory/memory.usage_in_bytes")):
        try:
            text = Path(limit_file).read_text().strip()
            if text != "max" and int(text) < 2**60:
                used = int(Path(usage_file).read_text().strip())
                found.append(max(int(text) - used, 0))
            break
        except (OSError, ValueError):
            continue
    return min(found) if found else None


def _gb(n: int) -> str:
    return f"{n / 2**30:.1f} GB" if n >= 2**30 else f"{n / 2**20:.0f} MB"


def check(est: Estimate, available: int | None = None) -> None:
    """InputError when the estimate exceeds the available memory (nothing happens when unknown)."""
    avail = available_bytes() if available is None else available
    if avail is None or est.bytes <= avail:
        return
    ny, nx = est.shape
    raise InputError(
        f"This run needs about {_gb(est.bytes)} of memory (DEM {ny} x {nx} cells, {est.years} balance years, "
        f"{est.scenarios} scenario{'s' if est.scenarios != 1 else ''}, band width {est.band_width_m:g} m), "
        f"more than the {_gb(avail)} available; use a coarser DEM (or a smaller window of it), fewer years "
        "([climate] start and end) or fewer scenarios.")


# one unit of a tiled run (firnline.tiles) in one worker process, which runs the kernel over its
# parts (firnline.tiles.unit_parts) one at a time: a part's setup cut, kernel state and running
# sums per surface column, and one block of years (firnline.tiles.block_years) of the kernel's
# results, fields and temporaries (generous, as above). _UNIT_INPUT_BYTES_PER_CELL: the part's two
# cuts of the setup (its cells, and its cells with those upslope of them for sliding snow:
# elevation, indices, columns, routing links), the kernel's per-column inputs and the slide's
# buffers; a part of 2048 x 2048 cells of benchmarks/region.py measured about 3 GB over one year
_UNIT_INPUT_BYTES_PER_CELL = 300
_UNIT_BYTES_PER_CELL = _BYTES_PER_CELL + _STATE_BYTES_PER_CELL_SCENARIO + _UNIT_INPUT_BYTES_PER_CELL
_RETURNED_BYTES_PER_CELL_YEAR = 4 * 8 * 2      # a unit's fields sent back: 8 maps float32, and their copy


def _unit_year_bytes(part: int, cells: int, years: int, scenarios: int, returned: bool) -> int:
    """The per-year memory of a unit of ``cells`` in parts of ``part`` cells: one block of years of a
    part, and every year of the unit's fields when they are sent back from another process
    (``returned``) rather than placed block by block."""
    from .tiles import _BLOCK_BYTES_PER_COLUMN_YEAR, block_years
    b = part * scenarios * block_years(part, years) * _BLOCK_BYTES_PER_COLUMN_YEAR
    if returned:
        b += cells * scenarios * max(years, 1) * _RETURNED_BYTES_PER_CELL_YEAR
    return b


def unit_cells(tile_size: int, shape: tuple[int, int]) -> tuple[int, int]:
    """The cells of a unit of ``tile_size`` on a DEM of ``shape`` (a DEM smaller than a unit is one
    unit) and of its largest part (:func:`firnline.tiles.part_size`)."""
    from .tiles import part_size
    side = part_size(tile_size)
    return (min(int(tile_size), shape[0]) * min(int(tile_size), shape[1]),
            min(side, shape[0]) * min(side, shape[1]))


def unit_bytes(tile_size: int, shape: tuple[int, int], years: int, scenarios: int = 1,
               glaciers: int = 1, returned: bool = False) -> tuple[int, int]:
    """Peak memory of one unit's task (bytes) and its cells: a DEM smaller than a unit is one unit.

    Besides the per-cell terms of one part and one block of years of it (``returned``: and every
    year of the fields a unit in another process sends back), a unit holds the daily region sums
    of its own glaciers (days x regions x :data:`~firnline.kernel.N_DAILY` terms, float64: the
    unit's for the whole record, and a part's per thread and summed, counted once for the whole
    record and three times for a block of years), taken as its share of the DEM's glaciers plus 16."""
    from .tiles import block_years
    cells, part = unit_cells(tile_size, shape)
    b = _FIXED_BYTES + part * scenarios * _UNIT_BYTES_PER_CELL + _unit_year_bytes(part, cells, years, scenarios,
                                                                                  returned)
    n = max(shape[0] * shape[1], 1)
    mine, mine_part = (min(glaciers, math.ceil(glaciers * c / n) + 16) for c in (cells, part))
    b += scenarios * 366 * max(years, 1) * (mine + 2) * N_DAILY * 8
    b += scenarios * 366 * (max(years, 1) + 3 * block_years(part, years)) * (mine_part + 2) * N_DAILY * 8
    return int(b), cells


def _returned(compute, shape: tuple[int, int]) -> bool:
    """Whether the units of ``[compute]`` send every year of their fields back whole: units on the
    cluster at a scheduler address (on a local cluster they write them block by block into files
    beside the output folder, :class:`firnline.tiles.Spool`)."""
    n_units = -(-shape[0] // compute.tile_size) * -(-shape[1] // compute.tile_size)
    return n_units > 1 and compute.scheduler != "local"


def check_unit(compute, shape: tuple[int, int], years: int, scenarios: int = 1,
               available: int | None = None, glaciers: int = 1) -> None:
    """InputError when the units of ``[compute]`` cannot fit: ``workers`` units at once (one per worker
    process of a local cluster; one unit when the DEM is one unit) against the available memory."""
    avail = available_bytes() if available is None else available
    if avail is None:
        return
    returned = _returned(compute, shape)
    need, cells = unit_bytes(compute.tile_size, shape, years, scenarios, glaciers, returned)
    n_units = -(-shape[0] // compute.tile_size) * -(-shape[1] // compute.tile_size)
    at_once = min(compute.workers, n_units) if compute.scheduler == "local" else 1
    if need * at_once <= avail:
        return
    fits = [t for t in (4096, 2048, 1024, 512, 256, 128, 64, 32, 16) if t < compute.tile_size
            and unit_bytes(t, shape, years, scenarios, glaciers, returned)[0] * at_once <= avail]
    fix = (f"set [compute] tile_size to {fits[0]} or less" if fits else
           "free memory or use a machine with more (even a unit of 16 x 16 cells does not fit)")
    workers = f" ({at_once} workers at once: {_gb(need * at_once)})" if at_once > 1 else ""
    raise InputError(
        f"[compute] tile_size = {compute.tile_size} gives units of {cells} cells that need about {_gb(need)} "
        f"each over {years} balance year{'s' if years != 1 else ''}{workers}, more than the {_gb(avail)} "
        f"available; {fix}" + (" or lower [compute] workers." if at_once > 1 and fits else "."))


def count_lines(path: Path, limit: int = 2**31) -> int:
    """Number of lines of a text file (read in blocks, never whole)."""
    n = 0
    with open(path, "rb") as f:
        while True:
            block = f.read(1 << 20)
            if not block:
                return n
            n += block.count(b"\n")
            if n > limit:
                return n


def estimate_for(config, scenarios: int = 1, streamed: bool = False, sizes: tuple | None = None) -> Estimate:
    """The estimate of a run of ``config`` from file headers only (no input is read whole);
    ``streamed``: the run's maps are streamed (:func:`estimate`, ``unit_cells``); ``sizes``: the
    DEM shape, balance years and glaciers when already read (default: read from the headers)."""
    shape, years, glaciers = _header_sizes(config) if sizes is None else sizes
    sectors = config.radiation.horizon_sectors if config.melt.method == "radiation" else None
    unit, part = unit_cells(config.compute.tile_size, shape) if streamed else (None, None)
    comp = config.compute
    n_units = -(-shape[0] // comp.tile_size) * -(-shape[1] // comp.tile_size)
    copies = comp.workers if comp.scheduler == "local" and comp.workers > 1 and n_units > 1 else 0
    return estimate(shape, years, scenarios, config.balance.band_width_m, glaciers, sectors, unit,
                    returned=_returned(comp, shape), part_cells=part, setup_copies=copies)


def check_run(config, scenarios: int = 1, available: int | None = None, streamed: bool = False) -> None:
    """The checks before a run: its units (:func:`check_unit`), then the whole run (:func:`check`)."""
    sizes = _header_sizes(config)           # the station file's lines are counted once
    shape, years, glaciers = sizes
    check_unit(config.compute, shape, years, scenarios, available, glaciers)
    check(estimate_for(config, scenarios, streamed, sizes), available)


def _header_sizes(config) -> tuple[tuple[int, int], int, int]:
    """DEM shape, balance years and glaciers of ``config`` from file headers only."""

    import rasterio
    from rasterio.errors import RasterioIOError

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")        # the reader warns and names problems later
            src = rasterio.open(config.dem.path)   # the header only
        with src:
            shape = (src.height, src.width)
            if src.crs is not None and src.crs.is_geographic:
                shape = (int(src.height * 1.5), int(src.width * 1.5))   # the UTM grid is somewhat larger
    except (RasterioIOError, OSError):
        shape = (1, 1)              # the reader will name the problem
    years = 1
    cl = config.climate
    station = getattr(cl, "station_file", None)
    try:
        if station is not None:
            # complete balance years have at least 365 days; the first line is the header
            years = max(1, (count_lines(Path(station)) - 1) // 365)
    except OSError:
        pass
    if cl.start and cl.end:
        years = min(years, max(1, ((cl.end - cl.start).days + 1) // 365))
    glaciers = 1
    gl = getattr(config, "glaciers", None)
    if gl is not None:
        try:
            import pyogrio
            glaciers = max(1, int(pyogrio.read_info(gl.outlines, layer=gl.layer).get("features", 1)))
        except Exception:           # the reader will name the problem
            glaciers = 1
    return shape, years, glaciers
