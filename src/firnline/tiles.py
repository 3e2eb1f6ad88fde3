"""Tiled runs: the DEM cut into units of work that dask computes independently, merged exactly.

A unit is a window of ``[compute] tile_size`` x ``tile_size`` cells of the DEM (a DEM smaller
than one unit is one unit). Each unit runs the kernel over its own modelled cells
(:func:`firnline.model.simulate` with ``cells=``; with snow redistribution the run reaches
every cell upslope of them, so the unit's cells are exact) and returns

* its per-cell fields (:func:`firnline.model.cell_fields`), placed into the run's maps by
  position: bit for bit those of the untiled run;
* the exact partial sums of each glacier part it holds (:func:`firnline.model.glacier_part_sums`)
  and of the water budget (:func:`firnline.model.water_budget_sums`): integer sums
  (:mod:`firnline.exact`) that merge in any order to the sums of the whole run, so the
  summary, profiles and water budget equal the untiled run bit for bit;
* its daily region volumes (runoff), added in unit order: equal to the untiled run to float
  rounding only (the kernel itself adds them per thread, in the order threads finish).

A unit runs the kernel over its parts, windows of at most :data:`PART_SIZE` cells a side
(:func:`unit_parts`), one after the other, so its memory is that of one part whatever
``tile_size`` is (the parts' sums merge exactly, like the units'); each part runs a block of
balance years at a time (:func:`block_years`,
:func:`firnline.model.simulate_years`; the kernel's state carried from block to block, every
value that of one pass), and makes each block's fields and sums before the next block runs,
so its memory does not grow with the years. The fields go into the run's
:class:`firnline.yearmaps.YearMaps` block by block on the synchronous path
(:meth:`Collector.put`; from dask workers on this machine through files, :class:`Spool`), or
as each unit arrives from a worker elsewhere (:meth:`Collector.add`), in
memory or, for a large run, into a chunked file read lazily, so the run holds one unit's
results at a time. Terrain, horizons and the radiation table are computed once
for the whole DEM by :func:`firnline.model.prepare` (no per-unit halo yet); on a DEM above
:data:`firnline.model.WINDOW_ROUTING_CELLS` the snow routing is not: each unit makes that of its
cells and those upslope of them (:func:`firnline.model.upslope_setup`) and runs on that cut.

Scheduling (:func:`run_units`): a run of one unit, or with ``workers = 1``, runs in this
process (the synchronous path: no copy of the inputs to other processes, and numba's
threads use every core). Otherwise ``scheduler = "local"`` starts a dask.distributed
``LocalCluster`` of ``workers`` processes with one task thread each, and an address connects
to a running scheduler; a ``dask.distributed.Client`` passed in is used as it is. Each task
limits numba to ``cores // tasks at once on its machine`` threads so they do not
oversubscribe the cores.
"""

from __future__ import annotations

import dataclasses
import logging
import os
import time
from dataclasses import dataclass, field

import numpy as np

from . import exact
from .kernel import N_FLUX, N_SEASON
from .outdir import pause_point
from .progress import Progress
from .yearmaps import YearMaps, on_glaciers_only


@dataclass(frozen=True)
class Unit:
    """One unit of work: a window of the DEM and the modelled cells in it.

    ``positions`` (ascending, into ``Setup.cells`` order) are its modelled cells; ``glaciers``
    lists, for each glacier with cells in it, ``(g, local, pos, share)``: the cells' places in
    ``positions``, in ``Setup.cells`` and in ``glaciers.fractions[g]``. A unit of
    :func:`make_units` holds neither (None: every valid cell of its window, and the parts of the
    glaciers ``glacier_ids``) until it runs (:func:`fill_unit`), so a run does not hold every
    unit's cells (8 B per DEM cell) while they wait.
    """

    index: int
    rows: tuple[int, int]
    cols: tuple[int, int]
    positions: np.ndarray | None = None
    glaciers: tuple | None = None
    glacier_ids: tuple = ()


def window_of(setup, tile_size: int, positions: np.ndarray) -> np.ndarray:
    """The unit index (row-major over the windows) of each position."""
    nx = setup.grid.shape[1]
    r, c = np.divmod(setup.cells[positions], nx)
    n_tc = -(-nx // tile_size)
    return (r // tile_size) * n_tc + c // tile_size


def modelled_positions(setup, compute) -> np.ndarray | None:
    """The positions of the modelled cells: None for every cell (``cells = "all"``), else the glacier
    cells and the valid cells within ``glacier_buffer_m`` of a glacier cell (Euclidean distance
    between cell centres, scipy.ndimage.distance_transform_edt)."""
    if compute.cells == "all":
        return None
    from scipy.ndimage import distance_transform_edt

    grid = setup.grid
    glacier = setup.glaciers.total_fraction > 0
    if not glacier.any():
        return np.zeros(0, dtype=np.int64)
    dx, dy = grid.cell_size_m
    dist = distance_transform_edt(~glacier, sampling=(abs(dy), abs(dx)))
    near = (dist <= compute.glacier_buffer_m).ravel()[setup.cells]
    return np.flatnonzero(near)


def make_units(setup, tile_size: int, positions: np.ndarray | None = None) -> list[Unit]:
    """The units of a run: windows of ``tile_size`` cells with at least one modelled cell, row-major.

    With ``positions`` (a selection of cells) each unit holds its own; without, it holds none until
    it runs (:func:`fill_unit`). Made a band of ``tile_size`` rows at a time (the cells are in
    row-major order, so a band's cells are a range of them)."""
    ny, nx = setup.grid.shape
    n_tc = -(-nx // tile_size)
    cells = setup.cells
    if positions is not None:
        positions = np.asarray(positions, dtype=np.int64)
        at = cells[positions]
    g_ids: dict[int, list] = {}
    for g, gpos in enumerate(setup.glacier_pos):
        for u in np.unique(window_of(setup, tile_size, gpos)):
            g_ids.setdefault(int(u), []).append(g)
    units = []
    for r0 in range(0, ny, tile_size):
        r1 = min(r0 + tile_size, ny)
        if positions is None:
            lo, hi = np.searchsorted(cells, [r0 * nx, r1 * nx])
            col = cells[lo:hi] % nx // tile_size
            ids = np.unique(col)
            bounds = None
        else:
            lo, hi = np.searchsorted(at, [r0 * nx, r1 * nx])
            band = positions[lo:hi]
            col = at[lo:hi] % nx // tile_size
            order = np.argsort(col, kind="stable")
            ids, start = np.unique(col[order], return_index=True)
            bounds = np.append(start, order.size)
        for k, w in enumerate(ids):
            u = (r0 // tile_size) * n_tc + int(w)
            c0 = int(w) * tile_size
            mine = None if bounds is None else band[order[bounds[k]:bounds[k + 1]]]
            units.append(Unit(index=u, rows=(r0, r1), cols=(c0, min(c0 + tile_size, nx)), positions=mine,
                              glacier_ids=tuple(g_ids.get(u, ()))))
        del col
    return units


def fill_unit(setup, unit: Unit) -> Unit:
    """The unit with its modelled cells and glacier parts (see :class:`Unit`)."""
    if unit.positions is not None and unit.glaciers is not None:
        return unit
    pos = unit.positions if unit.positions is not None else setup.window_positions(unit.rows, unit.cols)
    (r0, r1), (c0, c1) = unit.rows, unit.cols
    nx = setup.grid.shape[1]
    parts = []
    for g in unit.glacier_ids:
        gpos = setup.glacier_pos[g]
        r, c = np.divmod(setup.cells[gpos], nx)
        share = np.flatnonzero((r >= r0) & (r < r1) & (c >= c0) & (c < c1))
        gp = gpos[share]
        parts.append((g, np.searchsorted(pos, gp), gp, share))
    return dataclasses.replace(unit, positions=pos, glaciers=tuple(parts))


#: A unit runs in blocks of balance years whose kernel results and fields take about this much
#: (:func:`block_years`), and makes a block's fields and budget terms in slices of its cells whose
#: float64 temporaries take about as much: the unit's memory does not grow with the years.
BLOCK_BYTES = 256 * 2**20
# per column and year of a block: the kernel's results (season x flux sums and year-end snow and
# firn float32, year-end storage float64) and the fields (8 float32)
_BLOCK_BYTES_PER_COLUMN_YEAR = (4 * N_SEASON * N_FLUX + 4 + 4 + 8) + 4 * 8
# per column and year of a slice: its cut of the kernel's results and the float64 arrays of
# cell_fields and column_budget
_TEMP_BYTES_PER_COLUMN_YEAR = (4 * N_SEASON * N_FLUX + 4 + 4 + 8) + 8 * 40


def block_years(n_columns: int, n_years: int) -> int:
    """Balance years per block of a unit of ``n_columns`` surface columns (at least one)."""
    return max(1, min(max(n_years, 1), BLOCK_BYTES // max(1, n_columns * _BLOCK_BYTES_PER_COLUMN_YEAR)))


def block_products(sub, kb) -> tuple[dict, object]:
    """A block's per-cell fields (:func:`firnline.model.cell_fields`) and exact water-budget sums,
    made a few years at a time (views of the block) and, where one year of every cell would take
    more, in slices of the cells, so their float64 temporaries take about :data:`BLOCK_BYTES`: the
    same values, bit for bit, as over the whole block at once."""
    from .model import cell_fields, water_budget_sums

    cols = sub.surface_columns
    n_years = kb.sums.shape[3]
    year_bytes = cols.n * _TEMP_BYTES_PER_COLUMN_YEAR
    step = max(1, BLOCK_BYTES // max(1, year_bytes))                  # years at a time
    per = max(1, BLOCK_BYTES // _TEMP_BYTES_PER_COLUMN_YEAR)          # cells at a time when a year is more
    cw = sub.catchment_weight
    fields, budgets = {}, []

    def place(name, v, y0, c0, c1):
        if name not in fields:
            fields[name] = np.empty((n_years, cols.n_cells), dtype=v.dtype)
        fields[name][y0:y0 + v.shape[0], c0:c1] = v

    for y0 in range(0, n_years, step):
        part_years = kb if step >= n_years else kb.year_block(y0, min(n_years, y0 + step))
        if year_bytes <= BLOCK_BYTES:
            for name, v in cell_fields(sub, part_years, 0).items():
                place(name, v, y0, 0, cols.n_cells)
            budgets.append(water_budget_sums(sub, part_years, 0, first_year=part_years.first_year))
            continue
        for c0 in range(0, cols.n_cells, per):
            c1 = min(cols.n_cells, c0 + per)
            part, keep = cols.cell_range(c0, c1)
            kp = part_years.columns(keep)
            for name, v in cell_fields(sub, kp, 0, columns=part).items():
                place(name, v, y0, c0, c1)
            budgets.append(water_budget_sums(sub, kp, 0, None if cw is None else cw[c0:c1], kp.first_year,
                                             columns=part))
            del kp
    return fields, exact.merge(budgets)


@dataclass
class UnitResult:
    """What a unit sends back: per-cell fields of its positions and the partial sums."""

    index: int
    positions: np.ndarray
    fields: dict
    rows: tuple
    cols: tuple
    glacier_sums: dict          # glacier index -> exact.Sums of its part in the unit
    budget: exact.Sums
    daily: tuple | None          # (region ids, (days, their regions, terms)); ids None: every region
    seconds: float
    slide_seconds: float
    kernel: object = None       # the kernel result, kept only by a run of one unit in this process


#: A unit runs the kernel over windows of at most this many cells along a side (its parts,
#: :func:`unit_parts`), one after the other, so a unit's memory does not grow with ``[compute]
#: tile_size`` beyond the fields it sends back. A part's kernel state, work rows, setup cut and
#: one year of results took 3.1 GB at 2048 x 2048 cells and 1.2 GB at 1024; parts of 512 were
#: also faster (a 2048 unit of benchmarks/region.py: 11.9 s against 14.6 s at 1024 on 1e8 cells).
PART_SIZE = 512


def part_size(tile_size: int) -> int:
    """The side of a unit's parts: ``tile_size`` cut into the fewest equal parts of at most
    :data:`PART_SIZE` (a unit of 2048 into 4 x 4 parts of 512)."""
    tile = max(1, int(tile_size))
    return -(-tile // -(-tile // PART_SIZE))


def unit_parts(setup, unit: Unit, size: int) -> list[Unit]:
    """The parts of a unit: windows of ``size`` cells from the unit's corner, each with the unit's
    modelled cells and glacier parts in it (the unit's ``index``); ``[unit]`` when it is one part."""
    (r0, r1), (c0, c1) = unit.rows, unit.cols
    if r1 - r0 <= size and c1 - c0 <= size:
        return [unit]
    n_pc = -(-(c1 - c0) // size)
    rr, cc = np.divmod(setup.cells[unit.positions], setup.grid.shape[1])
    key = ((rr - r0) // size) * n_pc + (cc - c0) // size
    ids = np.unique(key)
    parts = []
    for k in ids:
        k = int(k)
        mine = np.flatnonzero(key == k)
        pos = unit.positions[mine]
        gl = []
        for g, local, gp, share in unit.glaciers:
            inside = key[local] == k
            if inside.any():
                gl.append((g, np.searchsorted(mine, local[inside]), gp[inside], share[inside]))
        pr, pc = r0 + (k // n_pc) * size, c0 + (k % n_pc) * size
        parts.append(Unit(index=unit.index, rows=(pr, min(pr + size, r1)), cols=(pc, min(pc + size, c1)),
                          positions=pos, glaciers=tuple(gl)))
    return parts


def run_unit(setup, config, unit: Unit, warming_k: float, precip_change_pct: float,
             threads: int | dict | None = None, progress: Progress = None, whole: bool = False,
             keep_kernel: bool = False, put=None) -> UnitResult:
    """Run one unit: the kernel over its cells, its fields and partial sums (a dask task).

    The unit runs its parts (:func:`unit_parts`, windows of :func:`part_size`) one after the
    other, and each part a block of balance years at a time (:func:`block_years`;
    :func:`firnline.model.simulate_years`), the state carried from block to block: each block's
    fields and sums are made, and the block dropped, before the next one runs. The parts' sums
    merge exactly, so a unit gives the values of one pass over its cells. ``put``:
    ``put(part, first_year, fields)`` takes each block's fields (the synchronous path places
    them into the run's maps at once); without it the fields of every year come back in the
    result. ``threads``: numba threads for the task (a dict host -> threads for a remote
    cluster); ``whole``: the unit is every cell of the setup (the run needs no cut);
    ``keep_kernel``: keep the kernel's result when the unit is one part and its record one block;
    ``progress``: the days of a unit of one part, else its parts (label ``"parts"``).
    """
    if isinstance(threads, dict):
        import socket
        threads = threads.get(socket.gethostname(), threads.get("*"))
    if threads:
        import numba
        numba.set_num_threads(max(1, min(int(threads), numba.config.NUMBA_NUM_THREADS)))
    unit = fill_unit(setup, unit)
    if setup.by_window and not whole:
        # the unit's cells and those upslope of them, with their own routing or radiation table; the results go back
        # to the run's positions
        from .model import upslope_setup
        t0 = time.perf_counter()
        setup, local, cut = upslope_setup(setup, unit.positions)
        unit = dataclasses.replace(unit, positions=local, glaciers=tuple(
            (g, at, np.searchsorted(cut, gp), share) for g, at, gp, share in unit.glaciers))
        r = run_unit(setup, config, unit, warming_k, precip_change_pct, None, progress, False, keep_kernel,
                     None if put is None else _PutBack(put, cut))
        r.positions = cut[r.positions]
        r.seconds = time.perf_counter() - t0
        return r
    parts = unit_parts(setup, unit, part_size(config.compute.tile_size))
    if len(parts) == 1:
        return _run_part(setup, config, unit, warming_k, precip_change_pct, progress, whole, keep_kernel, put)
    within = None
    if setup.routing is not None and not whole:     # the unit's upslope steps bound each part's search
        from .snowslide import upslope_steps
        within = upslope_steps(setup.routing, unit.positions)
    t0 = time.perf_counter()
    n_years = len(setup.forcing.years)
    f: dict = {}
    gparts: dict = {}
    budgets, dailies = [], []
    slide_s = 0.0
    for k, part in enumerate(parts):
        r = _run_part(setup, config, part, warming_k, precip_change_pct, None, False, False, put, within)
        if progress is not None:            # a run of one unit: a bar over its parts
            progress("parts", k + 1, len(parts))
        if r.fields:
            at = np.searchsorted(unit.positions, part.positions)
            for name, v in r.fields.items():
                if name not in f:
                    f[name] = np.empty((n_years, unit.positions.size), dtype=v.dtype)
                f[name][:, at] = v
        for g, sums in r.glacier_sums.items():
            gparts.setdefault(g, []).append(sums)
        budgets.append(r.budget)
        if r.daily is not None:
            dailies.append(r.daily)
        slide_s += r.slide_seconds
        del r
    daily = None
    if dailies:                 # the parts' region volumes, added in part order
        ids = np.unique(np.concatenate([i for i, _ in dailies]))
        d = np.zeros((dailies[0][1].shape[0], ids.size) + dailies[0][1].shape[2:], dtype=dailies[0][1].dtype)
        for i, v in dailies:
            d[:, np.searchsorted(ids, i)] += v
        daily = (ids, d)
    return UnitResult(index=unit.index, positions=unit.positions, fields=f, rows=unit.rows, cols=unit.cols,
                      glacier_sums={g: exact.merge(p) for g, p in gparts.items()}, budget=exact.merge(budgets),
                      daily=daily, seconds=time.perf_counter() - t0, slide_seconds=slide_s)


@dataclass(frozen=True)
class _PutBack:
    """A ``put`` of :func:`run_unit` for a unit run on a cut of the setup (:func:`firnline.model.upslope_setup`):
    the parts' positions turned back into the run's (``cut``: the cut's positions in it)."""

    put: object
    cut: np.ndarray

    def __call__(self, part, first_year: int, fields: dict) -> None:
        self.put(dataclasses.replace(part, positions=self.cut[part.positions]), first_year, fields)


def _run_part(setup, config, unit: Unit, warming_k: float, precip_change_pct: float, progress: Progress,
              whole: bool, keep_kernel: bool, put, within=None) -> UnitResult:
    """One part of a unit (or a unit of one part): :func:`run_unit` without the parts (``within``:
    the unit's upslope steps, :func:`firnline.snowslide.upslope_steps`)."""
    from .model import glacier_part_sums, simulate_years

    t0 = time.perf_counter()
    cells = None if whole else unit.positions
    n_years = len(setup.forcing.years)
    n_cols = setup.surface_columns.n if whole else setup.columns_of(unit.positions).n
    step = block_years(n_cols, n_years)
    sub = None          # the unit's setup, cut once the kernel's first block is done
    f, budgets, gparts = {}, [], {}
    kept = region_ids = daily_all = None
    day = 0
    slide_s = 0.0
    for kb in simulate_years(setup, config, [warming_k], [precip_change_pct], progress=progress, cells=cells,
                             local_regions=not whole, block_years=step, upslope_within=within):
        a = kb.first_year
        if sub is None:
            sub = setup if whole else setup.select(unit.positions)
        fb, budget = block_products(sub, kb)
        budgets.append(budget)
        if put is not None:
            put(unit, a, fb)
        else:
            for name, v in fb.items():
                if name not in f:
                    f[name] = np.empty((n_years, v.shape[1]), dtype=v.dtype)
                f[name][a:a + v.shape[0]] = v
        for (g, *_), sums in zip(unit.glaciers, glacier_part_sums(setup, fb, unit.glaciers, first_year=a)):
            gparts.setdefault(g, []).append(sums)
        del fb
        if kb.daily is not None:          # the unit's days, filled block by block
            d = kb.daily[0]
            if daily_all is None:
                daily_all = d if step >= n_years else np.empty((setup.forcing.n_days,) + d.shape[1:], d.dtype)
            if daily_all is not d:
                daily_all[day:day + d.shape[0]] = d
            day += d.shape[0]
        region_ids = kb.region_ids
        slide_s += float(kb.slide_seconds)
        kept = kb if keep_kernel and step >= n_years else None
        del kb
    gsums = {g: exact.merge(parts) for g, parts in gparts.items()}
    daily = None
    if daily_all is not None:           # (its glaciers, ice_free, catchment) or every region (None)
        ids = None
        if region_ids is not None:
            n_gl = len(setup.glaciers.names)
            ids = np.concatenate([region_ids, [n_gl, n_gl + 1]])
        daily = (ids, daily_all)
    return UnitResult(index=unit.index, positions=unit.positions, fields=f, rows=unit.rows, cols=unit.cols,
                      glacier_sums=gsums, budget=exact.merge(budgets),
                      daily=daily, seconds=time.perf_counter() - t0, slide_seconds=slide_s,
                      kernel=kept)


@dataclass
class Merged:
    """The merged results of every unit (see the module docstring)."""

    maps: YearMaps
    glacier_sums: list
    budget: exact.Sums
    daily: np.ndarray | None
    region_area_m2: np.ndarray
    n_units: int
    scheduler: str
    kernel: object = None
    timings: dict = field(default_factory=dict)
    notes: tuple = ()


#: Cells at a time of :func:`region_areas` (their columns take about 100 MB).
_AREA_CELLS = 1 << 22


def region_areas(setup, positions: np.ndarray | None) -> np.ndarray:
    """Areas of the daily-sum regions (glaciers, ice_free, catchment weighted) of the modelled cells,
    m2: the exact sums of :func:`firnline.kernel.region_area_sums` (what a kernel run over the same
    cells gives), made :data:`_AREA_CELLS` cells at a time and merged."""
    from .kernel import region_area_sums

    n_regions = len(setup.glaciers.names) + 2
    cw = setup.catchment_weight
    n = setup.cells.size if positions is None else int(np.asarray(positions).size)
    parts = []
    for a in range(0, n, _AREA_CELLS):
        b = min(n, a + _AREA_CELLS)
        sub = np.arange(a, b, dtype=np.int64) if positions is None else np.asarray(positions[a:b], dtype=np.int64)
        cols = setup.columns_of(sub)
        weight = None if cw is None else np.asarray(cw, dtype="float64")[sub][cols.cell]
        parts.append(region_area_sums(cols.region, setup.grid.cell_area_m2 * cols.share, weight, n_regions))
        del cols, weight
    return exact.dense(exact.merge(parts), n_regions)


class Collector:
    """Takes the units' results as they finish: fields placed into the run's :class:`YearMaps` at
    once (and dropped), daily volumes added in unit order (a unit that arrives early waits for
    those before it), exact sums kept (each unit's are of its own glaciers: small) and merged by
    :meth:`finish`; so the run holds about one unit's results at a time."""

    def __init__(self, setup, units: list, tile_size: int, work_dir=None, prefix: str = ".firnline-",
                 spill_bytes: int | None = None):
        self.setup, self.tile = setup, int(tile_size)
        self.n_years = len(setup.forcing.years)
        self.work_dir, self.prefix, self.spill_bytes = work_dir, prefix, spill_bytes
        self.maps: YearMaps | None = None
        self.order = sorted(u.index for u in units)
        self.next = 0
        self.early: dict = {}          # daily volumes of units that came before their turn
        self.daily = None
        self.glacier_parts: dict = {}  # glacier -> its parts' sums
        self.budgets: list = []        # the units' water-budget sums (each of its own regions)

    def put(self, unit, first_year: int, fields: dict) -> None:
        """Place a unit's fields of balance years ``first_year ..`` (``unit``: a :class:`Unit` or
        :class:`UnitResult`) into the run's maps."""
        setup = self.setup
        if self.maps is None:
            chunk = part_size(self.tile)            # a unit's parts write whole chunks of the file
            self.maps = YearMaps(list(fields), self.n_years, setup.grid.shape, (chunk, chunk),
                                 self.work_dir, self.spill_bytes, self.prefix)
        rr, cc = np.divmod(setup.cells[unit.positions], setup.grid.shape[1])
        on_glacier = setup.glacier_mask[unit.positions]
        for name, values in fields.items():
            if on_glaciers_only(name):
                values = np.where(on_glacier, values, np.nan)
            self.maps.put(name, unit.rows, unit.cols, rr, cc, values, first_year)

    def add(self, r: UnitResult) -> None:
        """Take a unit's result: its fields (unless :meth:`put` took them block by block), sums and
        daily volumes."""
        if r.fields:
            self.put(r, 0, r.fields)
        r.fields = {}
        for g, sums in r.glacier_sums.items():
            self.glacier_parts.setdefault(g, []).append(sums)
        self.budgets.append(r.budget)
        self.early[r.index] = r.daily
        while self.next < len(self.order) and self.order[self.next] in self.early:
            d = self.early.pop(self.order[self.next])
            self.next += 1
            if d is None:
                continue
            ids, d = d
            if ids is None:               # every region: the whole run in one unit
                self.daily = d
                continue
            if self.daily is None:
                n_reg = len(self.setup.glaciers.names) + 2
                self.daily = np.zeros((d.shape[0], n_reg) + d.shape[2:], dtype=d.dtype)
            self.daily[:, ids] += d

    def finish(self) -> tuple:
        """The maps, the merged glacier and budget sums, the daily volumes."""
        n_gl = len(self.setup.glaciers.names)
        gsums = [exact.merge(self.glacier_parts.get(g, [])) for g in range(n_gl)]
        return self.maps, gsums, exact.merge(self.budgets), self.daily


class Spool:
    """A work folder beside the output folder into which units on worker processes of this machine
    write each block's fields (:class:`SpoolPut`: one ``.npz`` file per part and block of
    years), so a worker holds one block of one part, not every year of its unit; the run places
    and removes them as the unit arrives (:meth:`take`). Named like the spilled maps' folders
    (``.OUT.firnline-maps-PID-*``), so the next command on the output folder clears it if the run
    was killed; removed by :meth:`close` and at exit."""

    def __init__(self, work_dir, prefix: str):
        import secrets
        import shutil
        import weakref
        from pathlib import Path

        from .yearmaps import WORK_PART
        self.dir = Path(work_dir) / f"{prefix}{WORK_PART}{os.getpid()}-{secrets.token_hex(6)}"
        os.mkdir(self.dir)
        self._closer = weakref.finalize(self, shutil.rmtree, self.dir, ignore_errors=True)

    def put(self) -> "SpoolPut":
        return SpoolPut(str(self.dir))

    def take(self, collect: "Collector", index: int) -> None:
        """Place the blocks unit ``index`` wrote into the run's maps, and remove them."""
        for path in sorted(self.dir.glob(f"u{index}-*.npz")):
            with np.load(path) as z:
                part = Unit(index=index, rows=tuple(int(v) for v in z["_rows"]),
                            cols=tuple(int(v) for v in z["_cols"]), positions=z["_positions"])
                fields = {k: z[k] for k in z.files if not k.startswith("_")}
                collect.put(part, int(z["_first_year"]), fields)
            path.unlink()

    def close(self) -> None:
        self._closer()


@dataclass(frozen=True)
class SpoolPut:
    """``put(part, first_year, fields)`` of :func:`run_unit` on a worker: the block into the spool
    folder (written whole under a temporary name, then renamed; a task run again writes the same
    names)."""

    folder: str

    def __call__(self, part, first_year: int, fields: dict) -> None:
        import secrets
        from pathlib import Path
        name = f"u{part.index}-r{part.rows[0]}-c{part.cols[0]}-y{int(first_year)}.npz"
        final = Path(self.folder) / name
        tmp = final.with_name(f".{name}.{secrets.token_hex(4)}.npz")
        np.savez(tmp, _rows=np.asarray(part.rows), _cols=np.asarray(part.cols), _positions=part.positions,
                 _first_year=np.asarray(first_year), **fields)
        os.replace(tmp, final)


def run_units(setup, config, warming_k: float = 0.0, precip_change_pct: float = 0.0,
              progress: Progress = None, client=None) -> Merged:
    """Run every unit of ``config``'s ``[compute]`` settings and merge them (module docstring)."""
    comp = config.compute
    positions = modelled_positions(setup, comp)
    units = make_units(setup, comp.tile_size, positions)
    whole = positions is None and len(units) == 1
    t0 = time.perf_counter()
    work_dir, prefix = maps_work_dir(config)
    collect = Collector(setup, units, comp.tile_size, work_dir, prefix)
    seconds = []
    kernel = None
    try:
        if client is None and comp.scheduler == "local" and (len(units) <= 1 or comp.workers == 1):
            how = "synchronous: one unit" if len(units) <= 1 else "synchronous: one worker"
            for k, u in enumerate(units):
                r = run_unit(setup, config, u, warming_k, precip_change_pct,
                             progress=progress if len(units) == 1 else None, whole=whole,
                             keep_kernel=len(units) == 1, put=collect.put)
                kernel = r.kernel
                seconds.append((r.seconds, r.slide_seconds))
                collect.add(r)
                if progress is not None and len(units) > 1:
                    progress("units", k + 1, len(units))
                pause_point("unit")
        else:
            how = _distributed(setup, config, units, warming_k, precip_change_pct, progress, client,
                               collect, seconds)
        maps, gsums, budget, daily = collect.finish()
    except BaseException:
        if collect.maps is not None:
            collect.maps.close()
        raise
    notes = ()
    if positions is not None:
        notes = (f'[compute] cells = "glaciers": modelled {positions.size} of {setup.cells.size} valid cells '
                 f"(the glacier cells and those within {comp.glacier_buffer_m:g} m of them); the ice_free and "
                 "catchment rows of water_budget.csv and runoff.csv cover those cells only.",)
    return Merged(notes=notes, maps=maps, glacier_sums=gsums, budget=budget, daily=daily,
                  region_area_m2=region_areas(setup, positions), n_units=len(units), scheduler=how,
                  kernel=kernel if len(units) == 1 else None,
                  timings={"units_s": time.perf_counter() - t0,
                           "unit_kernel_s": float(sum(a for a, _ in seconds)),
                           "redistribution_s": float(sum(b for _, b in seconds))})


def maps_work_dir(config) -> tuple:
    """Where a run's spilled maps go (:mod:`firnline.yearmaps`): a work folder beside the output folder
    (the disk that takes the outputs), named like its other work entries; the system's temporary
    folder when the output folder's parent does not exist yet."""
    import tempfile
    from pathlib import Path

    from .outdir import WORK_TAG
    out = Path(config.output.dir)
    if out.parent.is_dir():
        return out.parent, f".{out.name}{WORK_TAG}"
    return Path(tempfile.gettempdir()), f".firnline-{out.name}-"


def _cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


def _host_cores() -> tuple[str, int]:
    import socket
    return socket.gethostname(), _cores()


def _distributed(setup, config, units, warming_k, precip_change_pct, progress, client, collect, seconds):
    """The units as tasks of a dask.distributed cluster: local, at an address, or the caller's client."""
    from dask.distributed import Client, LocalCluster, as_completed

    comp = config.compute
    own = []
    try:
        if client is None and comp.scheduler == "local":
            # the cluster's own warnings (a task cancelled by Ctrl-C, ...) stay out of the
            # console, which says in one sentence what happened; errors still show
            cluster = LocalCluster(n_workers=comp.workers, threads_per_worker=1, processes=True,
                                   dashboard_address=None, silence_logs=logging.ERROR)
            own.append(cluster)
            client = Client(cluster)
            own.insert(0, client)
            threads = max(1, _cores() // comp.workers)
            how = f"dask LocalCluster: {comp.workers} worker processes, {threads} numba threads each"
        else:
            if client is None:
                client = Client(comp.scheduler)
                own.append(client)
            threads = _host_threads(client)
            how = f"dask.distributed at {client.scheduler.address}"
        spool = None
        if _all_on_this_machine(client) and collect.work_dir is not None:
            # the workers write each block's fields beside the output folder: none holds every
            # year of its unit, and the fields do not travel through the scheduler
            spool = Spool(collect.work_dir, collect.prefix)
            own.append(spool)           # removed after the cluster has stopped
            how += "; fields through files"
        put = spool.put() if spool is not None else None
        remote = client.scatter(setup, broadcast=True)
        futures = [client.submit(run_unit, remote, config, u, warming_k, precip_change_pct, threads, put=put,
                                 pure=False, key=f"firnline-unit-{u.index}-{time.monotonic_ns()}")
                   for u in units]
        for k, fut in enumerate(as_completed(futures), start=1):
            r = fut.result()
            futures.remove(fut)        # the worker may drop the unit's results once they are here
            del fut
            seconds.append((r.seconds, r.slide_seconds))
            if spool is not None:
                spool.take(collect, r.index)
            collect.add(r)
            if progress is not None:
                progress("units", k, len(units))
            pause_point("unit")
        return how
    finally:
        for thing in own:
            thing.close()


def _hostname() -> str:
    import socket
    return socket.gethostname()


def _all_on_this_machine(client) -> bool:
    """Whether every worker of ``client`` runs on this machine (they can write into its folders)."""
    try:
        names = set(client.run(_hostname).values())
    except Exception:       # noqa: BLE001 - a cluster that cannot answer: its workers send fields back
        return False
    return bool(names) and names == {_hostname()}


def _host_threads(client) -> dict:
    """numba threads per task on each host of a cluster: the host's cores over its task threads."""
    info = client.scheduler_info().get("workers", {})
    per_host: dict = {}
    for w in info.values():
        host = w.get("host", "")
        per_host[host] = per_host.get(host, 0) + int(w.get("nthreads", 1))
    cores = client.run(_host_cores)
    out = {}
    for addr, (name, n) in cores.items():
        host = info.get(addr, {}).get("host", "")
        out[name] = max(1, n // max(per_host.get(host, 1), 1))
    out["*"] = 1
    return out
