"""The Python API: prepare the inputs once, run the kernel, derive the metrics.

>>> import firnline
>>> cfg = firnline.load_config("configs/demo.toml")
>>> result = firnline.run(cfg)                  # doctest: +SKIP
>>> result.summary.head()                       # doctest: +SKIP
>>> result.write("out")                         # doctest: +SKIP

:func:`prepare` reads every input once (grid, terrain, outlines, forcing and, for
the radiation method, the radiation table) into a :class:`Setup`; :func:`simulate`
runs the kernel on it for any parameters and scenarios; :func:`run` does both and
derives per-glacier metrics. Scenario sweeps and calibration call :func:`prepare`
once and :func:`simulate` many times.
"""

from __future__ import annotations

import dataclasses
import functools
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator, Sequence

import numpy as np
import pandas as pd
import xarray as xr

from . import __version__, parameters
from . import glaciers as glaciers_mod
from .config import Config
from .forcing import Forcing, load_forcing
from .glaciers import Glaciers
from .grid import Grid, file_checksum, read_dem
from .kernel import (
    Calendar,
    Cells,
    Flux,
    KernelParams,
    KernelResult,
    Scenarios,
    Season,
    Slide,
    StationForcing,
    run_kernel_years,
)
from .metrics import YearMetrics, glacier_sums, glacier_years_from_sums
from .progress import Progress, stage
from .provenance import CAUTION
from .radiation import RadiationTable
from .terrain import slope_aspect

SUMMARY_COLUMNS = ["glacier", "balance_year", "area_km2", "annual_balance_mwe", "winter_balance_mwe",
                   "summer_balance_mwe", "ela_m", "aar", "ela_flag"]
PROFILE_COLUMNS = ["glacier", "balance_year", "band_bottom_m", "band_top_m", "area_km2",
                   "annual_balance_mwe"]

@dataclass(frozen=True)
class Columns:
    """Surface columns of the kernel: a DEM cell is one column, or several when it is partly glacier.

    The first ``n_cells`` columns are the cells themselves, in ``Setup.cells`` order: a cell
    with any glacier cover is the column of its glacier surface (its main glacier, the one
    with the largest share), any other cell the column of its ice-free ground. Appended after
    them: one ice-free column for each partly covered cell (share ``1 - F``, ``F`` the cell's
    total glacier share) and one glacier column for each further glacier sharing a cell.
    Columns of the same surface type in one cell see the same forcing and state, so their
    values per mm are equal; they differ in the area (``share``) and region they count for.

    cell : ndarray (n_cols,) int64
        Position of the column's cell in ``Setup.cells`` order.
    share : ndarray (n_cols,) float64
        Share of the cell's area the column stands for (the shares of a cell sum to 1).
    ice : ndarray (n_cols,) bool
        Glacier surface (ice melt, firn) or ice-free ground.
    region : ndarray (n_cols,) int32
        Index of the column's glacier (``Glaciers.names`` order), or ``n_glaciers`` for
        ice-free ground (the ``ice_free`` region).
    n_cells : int
    """

    cell: np.ndarray
    share: np.ndarray
    ice: np.ndarray
    region: np.ndarray
    n_cells: int

    @property
    def n(self) -> int:
        return int(self.cell.size)

    @classmethod
    def build(cls, n_cells: int, glacier_pos, fractions) -> "Columns":
        """Columns of ``n_cells`` cells from the glaciers' cell positions and shares."""
        n_gl = len(glacier_pos)
        total = np.zeros(n_cells)
        best = np.zeros(n_cells)
        main = np.full(n_cells, n_gl, dtype=np.int32)
        for g, (pos, frac) in enumerate(zip(glacier_pos, fractions)):
            pos = np.asarray(pos, dtype=np.int64)
            frac = np.asarray(frac, dtype="float64")
            np.add.at(total, pos, frac)
            better = frac > best[pos]          # the first glacier in file order wins a tie
            main[pos[better]] = g
            best[pos[better]] = frac[better]
        # the arrays are made at their full size and filled in place, the largest temporaries freed
        # first: at 1e8 cells the build peaked at 62 B per cell with lists joined at the end
        glacier = main < n_gl
        part = np.flatnonzero(glacier & (total < 1.0))
        part_share = 1.0 - np.minimum(total[part], 1.0)
        del total
        others = [np.flatnonzero(main[np.asarray(pos, dtype=np.int64)] != g) for g, pos in enumerate(glacier_pos)]
        n_cols = n_cells + sum(o.size for o in others) + part.size
        share = np.empty(n_cols)
        share[:n_cells] = best
        del best
        np.copyto(share[:n_cells], 1.0, where=~glacier)
        ice = np.zeros(n_cols, dtype=bool)
        ice[:n_cells] = glacier
        del glacier
        region = np.empty(n_cols, dtype=np.int32)
        region[:n_cells] = main
        del main
        cell = np.empty(n_cols, dtype=np.int64)
        for a in range(0, n_cells, 1 << 22):
            b = min(n_cells, a + (1 << 22))
            cell[a:b] = np.arange(a, b, dtype=np.int64)
        at = n_cells
        for g, (pos, frac, other) in enumerate(zip(glacier_pos, fractions, others)):
            b = at + other.size
            cell[at:b] = np.asarray(pos, dtype=np.int64)[other]
            share[at:b] = np.asarray(frac, dtype="float64")[other]
            ice[at:b] = True
            region[at:b] = g
            at = b
        cell[at:] = part
        share[at:] = part_share
        region[at:] = n_gl                  # ice-free, ice stays False
        return cls(cell=cell, share=share, ice=ice, region=region, n_cells=int(n_cells))

    @functools.cached_property
    def _extra_by_cell(self) -> tuple[np.ndarray, np.ndarray]:
        """The appended columns sorted by cell (stable): (their cells, their column indices)."""
        extra_cells = self.cell[self.n_cells:]
        order = np.argsort(extra_cells, kind="stable")
        return extra_cells[order], (self.n_cells + order).astype(np.int64)

    def _cut(self, sub: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The columns of some cells (ascending positions): their indices here (the cells' own
        columns in order, then their appended columns in column order) and their cells renumbered.
        Work and memory in proportion to the cells and the appended columns of their span."""
        extra = np.zeros(0, dtype=np.int64)
        if sub.size and self.n > self.n_cells:
            cells_sorted, cols_sorted = self._extra_by_cell
            lo = int(np.searchsorted(cells_sorted, sub[0], side="left"))
            hi = int(np.searchsorted(cells_sorted, sub[-1], side="right"))
            cand_cells, cand_cols = cells_sorted[lo:hi], cols_sorted[lo:hi]
            at = np.minimum(np.searchsorted(sub, cand_cells), sub.size - 1)
            extra = np.sort(cand_cols[sub[at] == cand_cells])     # in column order, as appended
        keep = np.concatenate([sub, extra])
        cell = np.concatenate([np.arange(sub.size, dtype=np.int64), np.searchsorted(sub, self.cell[extra])])
        return keep, cell

    def _columns(self, keep: np.ndarray, cell: np.ndarray, n_cells: int) -> "Columns":
        return Columns(cell=cell, share=self.share[keep], ice=self.ice[keep], region=self.region[keep],
                       n_cells=int(n_cells))

    def select(self, positions: np.ndarray) -> "Columns":
        """The columns of some cells (ascending positions), their cells renumbered.

        Work and memory in proportion to the selection and the appended columns of its span
        of cells (a unit of a tiled run does not touch every cell of the DEM)."""
        sub = np.asarray(positions, dtype=np.int64)
        return self._columns(*self._cut(sub), sub.size)

    def cell_range(self, c0: int, c1: int) -> tuple["Columns", np.ndarray]:
        """The columns of cells ``c0 .. c1-1`` (renumbered from 0) and their indices here, in
        column order: a slice of the cells for work in bounded pieces (:meth:`blend` of the
        slice gives those cells' values bit for bit)."""
        keep, cell = self._cut(np.arange(c0, c1, dtype=np.int64))
        return self._columns(keep, cell, c1 - c0), keep

    def blend(self, values: np.ndarray) -> np.ndarray:
        """Per-cell area means (..., n_cells) of per-column values (..., n_cols), by share."""
        v = np.asarray(values, dtype="float64")
        out = v[..., :self.n_cells] * self.share[:self.n_cells]
        if self.n > self.n_cells:
            extra = v[..., self.n_cells:] * self.share[self.n_cells:]
            np.add.at(np.moveaxis(out, -1, 0), self.cell[self.n_cells:], np.moveaxis(extra, -1, 0))
        return out


@dataclass(frozen=True)
class ColumnTable:
    """The surface columns (:class:`Columns`) of every cell of a setup, held compactly.

    A cell without glacier cover is one ice-free column of share 1, so only the glacier cells
    (their main glacier and its share, 20 B each) and the appended columns are kept, not 21 B per
    column of every cell (2.1 GB at 1e8 cells). :meth:`select` gives the :class:`Columns` of some
    cells, :meth:`full` those of every cell: bit for bit what :meth:`Columns.build` and
    :meth:`Columns.select` give.

    glacier_cell : ndarray int64
        Positions (``Setup.cells`` order, ascending) of the cells with glacier cover.
    main_share, main_region : ndarray float64, int32
        Their main glacier's share and index.
    extra_cell, extra_share, extra_ice, extra_region : ndarray
        The appended columns, in column order (see :class:`Columns`).
    """

    n_cells: int
    n_glaciers: int
    glacier_cell: np.ndarray
    main_share: np.ndarray
    main_region: np.ndarray
    extra_cell: np.ndarray
    extra_share: np.ndarray
    extra_ice: np.ndarray
    extra_region: np.ndarray

    @property
    def n(self) -> int:
        return int(self.n_cells + self.extra_cell.size)

    @classmethod
    def build(cls, n_cells: int, glacier_pos, fractions) -> "ColumnTable":
        """The table of ``n_cells`` cells from the glaciers' cell positions and shares: the sums and
        comparisons of :meth:`Columns.build`, glacier by glacier in file order, over the glacier
        cells only."""
        n_gl = len(glacier_pos)
        pos_of = [np.asarray(p, dtype=np.int64) for p in glacier_pos]
        frac_of = [np.asarray(f, dtype="float64") for f in fractions]
        covered = np.unique(np.concatenate(pos_of)) if n_gl else np.zeros(0, dtype=np.int64)
        total = np.zeros(covered.size)
        best = np.zeros(covered.size)
        main = np.full(covered.size, n_gl, dtype=np.int32)
        for g, (pos, frac) in enumerate(zip(pos_of, frac_of)):
            slot = np.searchsorted(covered, pos)
            total[slot] += frac                  # a glacier's cells are distinct: np.add.at's sums
            better = frac > best[slot]           # the first glacier in file order wins a tie
            main[slot[better]] = g
            best[slot[better]] = frac[better]
        glacier = main < n_gl
        part = np.flatnonzero(glacier & (total < 1.0))
        others = [np.flatnonzero(main[np.searchsorted(covered, pos)] != g) for g, pos in enumerate(pos_of)]
        extra_cell = np.concatenate([p[o] for p, o in zip(pos_of, others)] + [covered[part]])
        extra_share = np.concatenate([f[o] for f, o in zip(frac_of, others)] + [1.0 - np.minimum(total[part], 1.0)])
        n_other = extra_cell.size - part.size
        extra_ice = np.zeros(extra_cell.size, dtype=bool)
        extra_ice[:n_other] = True
        extra_region = np.concatenate([np.full(o.size, g, dtype=np.int32) for g, o in enumerate(others)]
                                      + [np.full(part.size, n_gl, dtype=np.int32)])
        return cls(n_cells=int(n_cells), n_glaciers=n_gl, glacier_cell=covered[glacier],
                   main_share=best[glacier], main_region=main[glacier], extra_cell=extra_cell.astype(np.int64),
                   extra_share=extra_share.astype("float64"), extra_ice=extra_ice, extra_region=extra_region)

    @functools.cached_property
    def _extra_by_cell(self) -> tuple[np.ndarray, np.ndarray]:
        """The appended columns sorted by cell (stable): (their cells, their indices among them)."""
        order = np.argsort(self.extra_cell, kind="stable")
        return self.extra_cell[order], order

    def select(self, positions) -> Columns:
        """The :class:`Columns` of some cells (ascending positions), their cells renumbered: work and
        memory in proportion to the selection."""
        sub = np.asarray(positions, dtype=np.int64)
        n = sub.size
        share = np.ones(n)
        region = np.full(n, self.n_glaciers, dtype=np.int32)
        ice = np.zeros(n, dtype=bool)
        if n and self.glacier_cell.size:
            at = np.minimum(np.searchsorted(self.glacier_cell, sub), self.glacier_cell.size - 1)
            hit = self.glacier_cell[at] == sub
            k = at[hit]
            share[hit] = self.main_share[k]
            region[hit] = self.main_region[k]
            ice[hit] = True
        extra = np.zeros(0, dtype=np.int64)
        if n and self.extra_cell.size:
            cells_sorted, order = self._extra_by_cell
            lo = np.searchsorted(cells_sorted, sub, side="left")
            count = np.searchsorted(cells_sorted, sub, side="right") - lo
            if count.any():
                start = np.repeat(lo - np.concatenate([[0], np.cumsum(count)[:-1]]), count)
                extra = np.sort(order[start + np.arange(start.size)])      # in column order, as appended
        cell = np.concatenate([np.arange(n, dtype=np.int64), np.searchsorted(sub, self.extra_cell[extra])])
        return Columns(cell=cell, share=np.concatenate([share, self.extra_share[extra]]),
                       ice=np.concatenate([ice, self.extra_ice[extra]]),
                       region=np.concatenate([region, self.extra_region[extra]]), n_cells=int(n))

    def full(self) -> Columns:
        """The :class:`Columns` of every cell."""
        return self.select(np.arange(self.n_cells, dtype=np.int64))


def _all_in(pos: np.ndarray, sub: np.ndarray) -> bool:
    """Whether every one of ``pos`` is in ``sub`` (ascending)."""
    if pos.size == 0:
        return True
    if sub.size == 0:
        return False
    at = np.minimum(np.searchsorted(sub, pos), sub.size - 1)
    return bool((sub[at] == pos).all())


@dataclass(frozen=True)
class Setup:
    """Everything a kernel run needs, read and derived once by :func:`prepare` (frozen).

    The per-cell order rule: ``cells`` are the flat (C-order) indices of the modelled
    DEM cells, ascending; every per-cell array (``glacier_mask``, ``z_m`` or :meth:`elevation`, the rows of
    ``radiation``) follows that order, and ``glacier_pos[g]`` gives the positions of
    glacier ``g``'s cells in it (aligned with ``glaciers.fractions[g]``). A subset of
    cells is made only by :meth:`select`, which keeps the rule.

    ``config`` is the config the setup was prepared from: a run or sweep on the setup
    may change only the model parameters of :mod:`firnline.parameters` that the kernel
    takes (see :func:`check_config`).

    ``z_m`` (the cells' elevations) is None in a prepared setup, which reads them off the DEM grid
    (:meth:`elevation`; 8 B per cell not held twice), and held by a selection. Slope and aspect
    serve :func:`prepare` only (the snow routing and the radiation table) and
    are not kept (16 B per DEM cell); :func:`terrain` gives them.
    """

    config: Config
    grid: Grid
    glaciers: Glaciers
    forcing: Forcing
    cells: np.ndarray
    z_m: np.ndarray | None
    glacier_mask: np.ndarray
    glacier_pos: tuple
    #: The radiation table of ``cells``, or a :class:`WindowRadiation` that makes that of any of them.
    radiation: RadiationTable | WindowRadiation | None
    checksums: dict
    notes: tuple = ()
    timings: dict = field(default_factory=dict)
    #: Share of each cell (``cells`` order) inside ``[runoff] catchment``; None: every cell weighs 1.
    catchment_weight: np.ndarray | None = None
    #: The gauge record of ``[observations] discharge`` (firnline.runoff.ObservedDischarge), or None.
    discharge: object = None
    #: The surface columns: a :class:`ColumnTable` (a prepared setup) or :class:`Columns` (a selection).
    columns: Columns | ColumnTable | None = None
    routing: object | None = None
    #: Sliding snow on a DEM of more than :data:`WINDOW_ROUTING_CELLS` cells: no routing of the
    #: whole DEM is held; a run over some cells makes theirs and that of every cell upslope of
    #: them (:func:`upslope_setup`).
    routing_by_window: bool = False

    @property
    def by_window(self) -> bool:
        """Whether a run over some cells cuts the setup to them first (:func:`upslope_setup`): the
        snow routing or the radiation table is made for the cut (a unit's, for a tiled run)."""
        return self.routing_by_window or isinstance(self.radiation, WindowRadiation)

    @property
    def surface_columns(self) -> Columns:
        """The kernel's surface columns of every cell (:class:`Columns`; made once from a table)."""
        cols = self.columns
        if isinstance(cols, Columns):
            return cols
        made = self.__dict__.get("_every_column")
        if made is None:
            made = cols.full() if cols is not None else Columns.build(self.cells.size, self.glacier_pos,
                                                                       self.glaciers.fractions)
            self.__dict__["_every_column"] = made           # a cache, not a field: not pickled
        return made

    def columns_of(self, positions) -> Columns:
        """The surface columns of some cells (ascending positions), their cells renumbered, made
        without the columns of every cell when the setup holds a :class:`ColumnTable`."""
        cols = self.columns
        if cols is None:
            cols = self.surface_columns
        return cols.select(positions)

    def elevation(self, positions=None) -> np.ndarray:
        """Elevation of the cells (or of some positions in ``cells`` order), m: ``z_m``, or, for a
        prepared setup (which does not hold them, 8 B per cell), read off the DEM grid."""
        if self.z_m is not None:
            return self.z_m if positions is None else self.z_m[positions]
        flat = self.cells if positions is None else self.cells[positions]
        return self.grid.elevation.ravel()[flat]

    def __getstate__(self):
        state = dict(self.__dict__)
        state.pop("_every_column", None)
        return state

    def select(self, positions, routing=None) -> "Setup":
        """The setup restricted to some cells, given as ascending positions in ``cells`` order.

        The per-cell arrays and the radiation table are cut; the grid, glaciers,
        forcing and notes are shared. ``glacier_pos`` is remapped when every glacier
        lies wholly inside or wholly outside the selection (as for the glacier cells of
        a sweep); otherwise it is empty, and the selection serves kernel runs only (no
        per-glacier metrics). ``routing``: the snow routing of the selected cells, given for a
        setup with ``routing_by_window`` (by :func:`upslope_setup`, the one way to cut its cells).
        """
        sub = np.asarray(positions, dtype=np.int64)
        if sub.size > 1 and np.any(np.diff(sub) <= 0):
            raise ValueError("Setup.select takes ascending, distinct positions")
        if self.routing_by_window and routing is None:
            raise ValueError("the cells of a setup that makes its snow routing by window are cut by "
                             "firnline.model.upslope_setup, which makes the routing of the cut")
        whole = all(_all_in(pos, sub) for pos in self.glacier_pos)
        pos = tuple(np.searchsorted(sub, p) for p in self.glacier_pos) if whole else ()
        rad = self.radiation.subset(sub) if self.radiation is not None else None
        cw = self.catchment_weight[sub] if self.catchment_weight is not None else None
        if routing is None and self.routing is not None:
            from . import snowslide
            routing = snowslide.subset(self.routing, sub)
        return dataclasses.replace(self, cells=self.cells[sub], z_m=self.elevation(sub),
                                   glacier_mask=self.glacier_mask[sub], radiation=rad,
                                   glacier_pos=pos, catchment_weight=cw,
                                   columns=self.columns_of(sub), routing=routing, routing_by_window=False)

    def window_positions(self, rows: tuple[int, int], cols: tuple[int, int]) -> np.ndarray:
        """The positions (``cells`` order, ascending) of the cells in a window of the DEM (rows
        ``rows[0]`` to ``rows[1] - 1``, columns likewise): a search per row, no pass over the DEM."""
        nx = self.grid.shape[1]
        starts = np.arange(rows[0], rows[1], dtype=np.int64) * nx
        lo = np.searchsorted(self.cells, starts + cols[0])
        count = np.searchsorted(self.cells, starts + cols[1]) - lo
        return np.repeat(lo - (np.cumsum(count) - count), count) + np.arange(int(count.sum()), dtype=np.int64)


def check_config(setup: Setup, config: Config | None) -> Config:
    """The config of a call on ``setup``: ``config`` if it differs only in kernel parameters.

    One config per call: everything but the model parameters the kernel takes (those
    of :data:`firnline.parameters.PARAMETERS` with a kernel name) comes from the config
    the setup was prepared from: site, DEM, outlines, ``[climate]``, balance calendar,
    band width, radiation settings, ``[melt] method`` and ``transmissivity`` (which
    shapes the radiation table). A config that differs there is refused; where results
    go (``[output]``) and ``[observations]`` / ``[calibration]`` may differ.

    Raises
    ------
    ValueError
        When ``config`` differs from ``setup.config`` outside the kernel parameters.
    """
    if config is None or config is setup.config:
        return setup.config
    ref = setup.config
    free = {p.key for p in parameters.PARAMETERS if p.kernel or p.section == "runoff"}   # may differ: the kernel
    # takes them, or (storage constants) the routing after it
    for f in dataclasses.fields(Config):
        if f.name in _RESULT_FREE:
            continue
        mine, theirs = getattr(config, f.name), getattr(ref, f.name)
        if mine is None or theirs is None or not dataclasses.is_dataclass(mine):
            keys = [None] if mine != theirs else []
        else:
            keys = [k.name for k in dataclasses.fields(mine)
                    if k.name not in free and getattr(mine, k.name) != getattr(theirs, k.name)]
        if keys:
            where = f"[{f.name}]" + (f" {keys[0]}" if keys[0] else "")
            raise ValueError(f"the config differs from the one the setup was prepared from in {where}, "
                             "which shapes the setup (only kernel parameters may differ); prepare a "
                             "setup from this config (firnline.model.prepare) instead")
    return config


#: Parts of a config that do not shape the setup (where results go, what a calibration fits to, how
#: and which cells of it a run computes).
_RESULT_FREE = ("output", "observations", "calibration", "compute", "source", "raw")


def prepare(config: Config, progress: Progress = None, need_radiation: bool | None = None) -> Setup:
    """Read and check every input of ``config`` once.

    Parameters
    ----------
    config : Config
    progress : callable(label, done, total), optional
        Progress reports of the long steps (see :mod:`firnline.progress`).
    need_radiation : bool, optional
        Build the radiation table; default: when ``[melt] method = "radiation"``.
    """
    t0 = time.perf_counter()
    notes: list[str] = []
    grid = read_dem(config.dem.path)
    notes += grid.notes
    slope, aspect = slope_aspect(grid.elevation, *grid.cell_size_m)
    checksums = input_checksums(config, grid)
    if config.glaciers is not None:
        gl = glaciers_mod.load_glaciers(config.glaciers.outlines, config.glaciers.id_field,
                                        config.glaciers.layer, grid.crs, grid.transform, grid.shape,
                                        grid.valid, grid.cell_area_m2)
        checksums["outlines"] = file_checksum(config.glaciers.outlines)
    else:
        gl = glaciers_mod.whole_grid(config.site.name, grid.valid, grid.cell_area_m2)
    notes += list(gl.warnings)
    cells = np.flatnonzero(grid.valid.ravel())
    forcing, sums = load_forcing(config, grid, cells)
    checksums.update(sums)
    notes += forcing.notes
    weight, observed = runoff_inputs(config, grid, cells, checksums, notes)
    t1 = time.perf_counter()
    timings = {"read_inputs_s": t1 - t0}
    if need_radiation is None:
        need_radiation = config.melt.method == "radiation"
    table = None
    if need_radiation and cells.size > WINDOW_RADIATION_CELLS:
        table = WindowRadiation(grid, config, cells)
        notes.append(f"radiation climatology: made for each unit of work ({cells.size} cells are more than "
                     f"{WINDOW_RADIATION_CELLS} for one table of the whole DEM; not cached)")
    elif need_radiation:
        table, _, note = radiation_climatology(grid, slope, aspect, config, progress)
        notes.append(note)
        timings["radiation_s"] = time.perf_counter() - t1
    del aspect                  # only the radiation table needs it (8 B per DEM cell)
    routing = None
    by_window = config.snow.redistribution == "gravitational" and cells.size > WINDOW_ROUTING_CELLS
    if by_window:
        notes.append(f"snow routing: made for each unit of work and the cells upslope of it ({cells.size} "
                     f"cells are more than {WINDOW_ROUTING_CELLS} for one routing of the whole DEM)")
    elif config.snow.redistribution == "gravitational":
        from . import slide_cache
        t2 = time.perf_counter()
        routing, note = slide_cache.cached_routing(
            config.radiation.cache_dir, grid.checksum, grid.transform, grid.elevation, grid.valid,
            grid.cell_size_m, slope, config.snow.snow_density_kg_m3, config.snow.min_slide_slope_deg)
        notes.append(note)
        timings["routing_s"] = time.perf_counter() - t2
    glacier_pos = tuple(np.searchsorted(cells, c) for c in gl.cells)
    del slope
    return Setup(config=config, grid=grid, glaciers=gl,
                 forcing=forcing, cells=cells, z_m=None,
                 glacier_mask=gl.total_fraction.ravel()[cells] > 0,
                 glacier_pos=glacier_pos,
                 radiation=table, checksums=checksums, notes=tuple(notes), timings=timings,
                 catchment_weight=weight, discharge=observed,
                 columns=ColumnTable.build(cells.size, glacier_pos, gl.fractions), routing=routing,
                 routing_by_window=by_window)


#: A DEM of more valid cells than this does not get one snow routing of the whole DEM (13 B per
#: cell held, about 30 B more while it is built): each run over some cells makes the routing of
#: a window around them (:func:`upslope_setup`). Up to it the routing of the whole DEM is made
#: once and cached on disk (:mod:`firnline.slide_cache`).
WINDOW_ROUTING_CELLS = 1 << 24
#: Cells around the asked cells' bounding box in the first window of :func:`upslope_setup`
#: (doubled until the cells upslope of them stay clear of the window's edge).
WINDOW_HALO = 16


def window_routing(setup: Setup, rows: tuple[int, int], cols: tuple[int, int]):
    """The snow routing (:func:`firnline.snowslide.build_routing`) of a window of the DEM, over its
    valid cells in ``cells`` order, with the Horn slope of the window: that of the whole DEM for
    every cell whose 3 x 3 neighbourhood lies in the window."""
    from .snowslide import build_routing

    grid, snow = setup.grid, setup.config.snow
    z = grid.elevation[rows[0]:rows[1], cols[0]:cols[1]]
    slope, aspect = slope_aspect(z, *grid.cell_size_m)
    del aspect
    return build_routing(z, grid.valid[rows[0]:rows[1], cols[0]:cols[1]], grid.cell_size_m, slope,
                         snow.snow_density_kg_m3, snow.min_slide_slope_deg)


#: With ``[melt] method = "radiation"``, a DEM of more valid cells than this gets no radiation table
#: of the whole DEM (186 B per cell, 1.6 GB here, and not cached): :class:`WindowRadiation` makes
#: that of the cells a run asks for, window by window of the DEM (a unit of a tiled run: its own).
WINDOW_RADIATION_CELLS = 1 << 23
#: The cells of a :class:`WindowRadiation` table are made in windows of at most this many cells a
#: side (each with a horizon halo), so asked cells spread over the DEM cost their blocks only.
RADIATION_WINDOW = 2048


class WindowRadiation:
    """The radiation table of a DEM too large for one (:data:`WINDOW_RADIATION_CELLS`), made for the
    cells a run asks for: ``subset(positions)`` (what :meth:`Setup.select` and the kernel's cells
    call on a table) gives the :class:`~firnline.radiation.RadiationTable` of those cells, the
    values of the whole DEM's table bit for bit (:func:`window_radiation`). The last table made is
    kept, so a calibration that runs the same cells again does not make it again."""

    def __init__(self, grid: Grid, config: Config, cells: np.ndarray):
        from .radiation import sun_constants

        self.grid, self.config, self.cells = grid, config, cells
        ny, nx = grid.shape
        lo, hi = np.inf, -np.inf
        for r0 in range(0, ny, 256):            # the valid cells' latitude range, band by band
            r1 = min(ny, r0 + 256)
            v = grid.valid[r0:r1]
            if v.any():
                lat = grid.lonlat((r0, r1))[1]
                lo = min(lo, float(np.min(lat, where=v, initial=np.inf)))
                hi = max(hi, float(np.max(lat, where=v, initial=-np.inf)))
        r, c = divmod(int(cells[cells.size // 2]), nx)      # the middle valid cell in C order
        h0, h1 = max(0, r - 1), min(ny, r + 2)
        lon, lat = grid.lonlat((h0, h1), (c, c + 1))
        self.sun = sun_constants((lo, hi), lat, lon, r - h0)
        self._last = None

    @property
    def n_cells(self) -> int:
        return int(self.cells.size)

    def subset(self, positions):
        """The table of some cells (positions in ``cells`` order, in any order and repeated as the
        kernel's surface columns repeat a cell)."""
        pos = np.asarray(positions, dtype=np.int64)
        key = (pos.size, hash(pos.tobytes()))
        if self._last is None or self._last[0] != key:
            ascending = pos.size < 2 or bool(np.all(np.diff(pos) > 0))
            uniq, inverse = (pos, None) if ascending else np.unique(pos, return_inverse=True)
            table = window_radiation(self.grid, self.config, self.cells[uniq], self.sun)
            if inverse is not None:
                table = table.subset(inverse)
            self._last = (key, table)
        return self._last[1]

    def __getstate__(self):
        state = dict(self.__dict__)
        state["_last"] = None
        return state


def window_radiation(grid: Grid, config: Config, flat: np.ndarray, sun) -> RadiationTable:
    """The radiation table of some DEM cells (ascending flat indices ``flat``), made in blocks of
    :data:`RADIATION_WINDOW` cells a side: for each block holding some of them, a window of the
    DEM over their bounding box and the rows either side (:func:`firnline.radiation.window_table`,
    with the whole DEM's sun constants ``sun``), its slope and aspect from the DEM around it, and
    its horizons from a halo of :func:`firnline.horizon.window_halo_cells` around it
    (:func:`firnline.horizon.window_sines`). Each cell then has its whole-DEM slope, aspect,
    grid convergence and horizons, so the table is that of the whole DEM's, bit for bit."""
    from .horizon import window_halo_cells, window_sines
    from .radiation import STORAGE_SCALE_W_M2, day_nodes, window_table

    rc = config.radiation
    ny, nx = grid.shape
    flat = np.asarray(flat, dtype=np.int64)
    rr, cc = (a.astype(np.int32) for a in np.divmod(flat, nx))    # 8 B per cell, not 16
    block = (rr // RADIATION_WINDOW) * np.int32(-(-nx // RADIATION_WINDOW)) + cc // RADIATION_WINDOW
    if flat.size and block.min() == block.max():
        # one block (a unit's cut): its table is the result, not a copy
        groups, values = [slice(None)], None
    else:
        order = np.argsort(block, kind="stable")
        groups = np.split(order, np.flatnonzero(np.diff(block[order])) + 1) if flat.size else []
        values = np.empty((len(day_nodes()), flat.size), dtype=np.uint16)
        del order
    del block
    halo = window_halo_cells(grid.cell_size_m, rc.horizon_distance_m)
    for idx in groups:
        r, c = (rr, cc) if values is None else (rr[idx], cc[idx])
        t0, t1 = max(0, int(r.min()) - 1), min(ny, int(r.max()) + 2)       # the table's window
        c0, c1 = int(c.min()), int(c.max()) + 1
        s0, s1 = max(0, t0 - 1), min(ny, t1 + 1)                           # its slope's window
        sc0, sc1 = max(0, c0 - 1), min(nx, c1 + 1)
        slope, aspect = slope_aspect(grid.elevation[s0:s1, sc0:sc1], *grid.cell_size_m)
        inner = (slice(t0 - s0, t1 - s0), slice(c0 - sc0, c1 - sc0))
        slope, aspect = slope[inner], aspect[inner]
        z0, z1 = max(0, t0 - halo), min(ny, t1 + halo)                     # its horizons' window
        zc0, zc1 = max(0, c0 - halo), min(nx, c1 + halo)
        z, zv = grid.elevation[z0:z1, zc0:zc1], grid.valid[z0:z1, zc0:zc1]

        def codes(a, b, z=z, zv=zv, z0=z0, zc0=zc0, t0=t0, c0=c0, c1=c1):
            return window_sines(z, zv, (z0, zc0), grid.shape, (t0 + a, t0 + b), (c0, c1), grid.cell_size_m,
                                rc.horizon_sectors, rc.horizon_distance_m)

        asked = np.zeros((t1 - t0, c1 - c0), dtype=bool)
        asked[r - t0, c - c0] = True
        del r, c
        if values is None:
            del rr, cc
        lon, lat = grid.lonlat((t0, t1), (c0, c1))
        table = window_table(grid.elevation[t0:t1, c0:c1], asked, slope, aspect, lat, lon, codes,
                             config.melt.transmissivity, rc.time_step_minutes, rc.horizon_sectors, sun)
        del slope, aspect, lat, lon, z, zv
        if values is None:
            return table
        values[:, idx] = table.values       # idx ascends within a block: the table's C order
    return RadiationTable(doy_nodes=day_nodes(), values=values, scale_w_m2=STORAGE_SCALE_W_M2)


def upslope_setup(setup: Setup, positions) -> tuple[Setup, np.ndarray, np.ndarray]:
    """The setup cut to some cells and every cell upslope of them, with the snow routing of the cut,
    for a setup with ``routing_by_window``; also the cells' places in the cut and the cut's
    positions in ``setup``. (Without ``routing_by_window``: the cut of the cells and those upslope of
    them in the setup's routing, if any, as for a :class:`WindowRadiation`, whose table
    :meth:`Setup.select` makes for the cut.)

    The routing is made over a window: the cells' bounding box with a halo of
    :data:`WINDOW_HALO` cells, doubled until no cell upslope of them (:func:`firnline.snowslide.upslope`
    in the window) lies within two cells of a window edge that is not the DEM's. Then every such
    cell has its 3 x 3 neighbourhood in the window, so its slope, capacity, receivers and weights
    are those of the whole DEM, and a cell that sends snow onto one of them lies in the window
    (it is next to one), so the cut holds every cell upslope of them: the run of the cut gives the
    cells the values of a run with the routing of the whole DEM, bit for bit (the window's cells
    are in the same row-major order, so the processing order of equal elevations is the same).
    """
    from .snowslide import subset, upslope

    pos = np.asarray(positions, dtype=np.int64)
    if not setup.routing_by_window:
        # the routing of the whole DEM, or none: the cut is the cells and those upslope of them in
        # it (its radiation table is made for the cut by Setup.select)
        cut = pos if setup.routing is None else np.flatnonzero(upslope(setup.routing, pos))
        return setup.select(cut), np.searchsorted(cut, pos), cut
    grid = setup.grid
    ny, nx = grid.shape
    if pos.size == 0:
        empty = np.zeros(0, dtype=np.int64)
        return setup.select(empty, routing=subset(window_routing(setup, (0, 1), (0, 1)), empty)), empty, empty
    rr, cc = np.divmod(setup.cells[pos], nx)
    r0, r1, c0, c1 = int(rr.min()), int(rr.max()) + 1, int(cc.min()), int(cc.max()) + 1
    del rr, cc
    halo = WINDOW_HALO
    while True:
        rows = (max(0, r0 - halo), min(ny, r1 + halo))
        cols = (max(0, c0 - halo), min(nx, c1 + halo))
        win = setup.window_positions(rows, cols)
        routing = window_routing(setup, rows, cols)
        keep = np.flatnonzero(upslope(routing, np.searchsorted(win, pos)))
        ur, uc = np.divmod(setup.cells[win[keep]], nx)
        clear = ((rows[0] == 0 or ur.min() >= rows[0] + 2) and (rows[1] == ny or ur.max() < rows[1] - 2)
                 and (cols[0] == 0 or uc.min() >= cols[0] + 2) and (cols[1] == nx or uc.max() < cols[1] - 2))
        del ur, uc
        if clear:
            break
        halo *= 2
    cut = win[keep]
    sub = setup.select(cut, routing=subset(routing, keep))
    return sub, np.searchsorted(cut, pos), cut


def runoff_inputs(config: Config, grid: Grid, cells: np.ndarray, checksums: dict, notes: list):
    """The catchment's cell weights (``[runoff] catchment``; None without one: every cell weighs 1,
    and no array of ones over every cell is kept) and the gauge record (``[observations]
    discharge``, checked here so a bad file stops the run before computing)."""
    from .catchment import catchment_weight
    from .runoff import read_discharge

    ro = config.runoff
    if ro is not None and ro.catchment is not None:
        weight, warn = catchment_weight(ro.catchment, ro.layer, grid.crs, grid.transform, grid.shape,
                                        grid.valid, grid.cell_area_m2, cells)
        notes += warn
        checksums["catchment"] = file_checksum(ro.catchment)
    else:
        weight = None
    observed = None
    obs = config.observations
    if obs is not None and obs.discharge is not None:
        observed = read_discharge(obs.discharge)
        checksums["discharge"] = file_checksum(obs.discharge)
    return weight, observed


def input_checksums(config: Config, grid: Grid) -> dict:
    """SHA-256 of the DEM and of the config file (when it came from one)."""
    checksums = {"dem": grid.checksum}
    if config.source is not None:
        checksums["config"] = file_checksum(config.source)
    return checksums


def horizons_fit(grid: Grid, n_sectors: int) -> bool:
    """Whether the float32 horizons of all cells fit beside the radiation table
    (:func:`firnline.radiation.whole_horizons_fit`): then they are computed whole and cached;
    otherwise the table is made band by band from the DEM and the horizons are not kept."""
    from .radiation import whole_horizons_fit

    return whole_horizons_fit(grid.shape[0] * grid.shape[1], grid.n_valid, n_sectors)


def radiation_climatology(grid: Grid, slope_deg: np.ndarray, aspect_deg: np.ndarray, config: Config,
                          progress: Progress = None, want_horizons: bool = False):
    """The potential direct radiation table of the valid cells, from the disk cache when it can.

    Horizons (Dozier & Frew 1990 sector search) and the daily climatology (Hock 1999
    beam with cast shadows) depend only on the DEM and the ``[radiation]`` settings
    and ``[melt] transmissivity``; both are cached under ``[radiation] cache_dir``,
    keyed by the DEM's SHA-256 and those settings. Horizons are computed whole and
    cached only while they fit beside the table (:func:`horizons_fit`); on larger
    grids the table is made band by band from the DEM, the same bit for bit.

    Returns
    -------
    table : RadiationTable
    horizons : ndarray (n_sectors, ny, nx) radians, or None unless ``want_horizons``
    note : str
        One sentence for the console: computed (and cached) or reused.
    """
    from . import cache
    from .horizon import horizon_angles
    from .radiation import compute_table, table_from_terrain

    rc = config.radiation
    hkey = cache.cache_key(dem_sha256=grid.checksum, shape=list(grid.shape),
                           transform=list(grid.transform)[:6], horizon_sectors=rc.horizon_sectors,
                           horizon_distance_m=rc.horizon_distance_m)
    tkey = cache.cache_key(horizon=hkey, transmissivity=config.melt.transmissivity,
                           time_step_minutes=rc.time_step_minutes)
    t0 = time.perf_counter()
    table = cache.load_table(rc.cache_dir, tkey, n_cells=grid.n_valid)
    if table is not None and not want_horizons:
        return table, None, f"reused the cached radiation climatology ({cache.table_path(rc.cache_dir, tkey)})."
    lon, lat = grid.lonlat()
    if not want_horizons and not horizons_fit(grid, rc.horizon_sectors):
        # the horizons of all cells would not fit beside the table: band by band, not cached
        path = cache.table_path(rc.cache_dir, tkey)
        damaged = ([f"the cached radiation table {path.name} was not used ({cache.MISSES[str(path)]}) "
                    "and is recomputed"] if str(path) in cache.MISSES else [])
        table = table_from_terrain(grid.elevation, grid.valid, slope_deg, aspect_deg, lat, lon,
                                   grid.cell_size_m, rc.horizon_sectors, rc.horizon_distance_m,
                                   config.melt.transmissivity, rc.time_step_minutes, progress=progress)
        horizons = None
    else:
        horizons = cache.load_horizons(rc.cache_dir, hkey, shape=grid.shape, n_sectors=rc.horizon_sectors)
        damaged = [f"the cached {what} {path.name} was not used ({cache.MISSES[str(path)]}) and is recomputed"
                   for what, path in (("radiation table", cache.table_path(rc.cache_dir, tkey)),
                                      ("horizons", cache.horizon_path(rc.cache_dir, hkey)))
                   if str(path) in cache.MISSES]
        if horizons is None:
            horizons = horizon_angles(grid.elevation, grid.valid, grid.cell_size_m, rc.horizon_sectors,
                                      rc.horizon_distance_m, progress=progress)
            cache.save_horizons(rc.cache_dir, hkey, horizons)
        if table is not None:
            return table, horizons, "; ".join(damaged + ["reused the cached radiation climatology and horizons."])
        table = compute_table(grid.elevation, grid.valid, slope_deg, aspect_deg, horizons, lat, lon,
                              config.melt.transmissivity, rc.time_step_minutes, progress=progress)
        if not want_horizons:
            horizons = None
    cache.save_table(rc.cache_dir, tkey, table)
    return table, horizons, ("; ".join(damaged + [""]) +
                             f"computed the radiation climatology in {time.perf_counter() - t0:.1f} s "
                             f"and cached it in {rc.cache_dir}.")


@dataclass(frozen=True)
class TerrainResult:
    """Result of :func:`terrain`: the DEM's slope, aspect, radiation climatology and horizons.

    ``horizons`` is None unless ``[radiation] write_horizons``; ``checksums`` holds the
    SHA-256 of the DEM and the config; ``notes`` the console notes.
    """

    config: Config
    grid: Grid
    slope_deg: np.ndarray
    aspect_deg: np.ndarray
    radiation: RadiationTable
    horizons: np.ndarray | None
    checksums: dict
    notes: tuple

    def write(self, out_dir: str | Path | None = None) -> list[Path]:
        """Write the terrain products into ``out_dir`` (default: ``[output] dir``)."""
        from .products import write_terrain
        return write_terrain(self, Path(out_dir) if out_dir is not None else self.config.output.dir)


def terrain(config: Config, progress: Progress = None) -> TerrainResult:
    """Slope and aspect (Horn 1981), the radiation climatology and, if asked, the horizons.

    Parameters
    ----------
    config : Config
    progress : callable(label, done, total), optional
    """
    grid = read_dem(config.dem.path)
    slope, aspect = slope_aspect(grid.elevation, *grid.cell_size_m)
    want = config.radiation.write_horizons
    table, horizons, note = radiation_climatology(grid, slope, aspect, config, progress, want_horizons=want)
    return TerrainResult(config=config, grid=grid, slope_deg=slope, aspect_deg=aspect, radiation=table,
                         horizons=horizons if want else None, checksums=input_checksums(config, grid),
                         notes=(*grid.notes, note))


def cell_forcing(setup: Setup, params: KernelParams, positions: np.ndarray | None = None):
    """The per-cell forcing provider of a setup whose forcing has several stations or a grid.

    ``positions`` (into ``setup.cells`` order) restricts it to some cells. The provider
    answers ``block(a, b) -> (t, p)`` (the kernel's cell mode) with the lapse rate,
    precipitation gradient and factor of ``params``.
    """
    from .config import MAX_INVERSION_K_PER_M, MIN_LAPSE_K_PER_M
    from .gridded import GriddedForcing

    src = setup.forcing.cells_source
    flat = setup.cells if positions is None else setup.cells[positions]
    z = setup.elevation(positions)
    month = setup.forcing.month
    if isinstance(src, GriddedForcing):
        return src.cells_provider(z, params, month, np.searchsorted(src.cells, flat))
    x, y = setup.grid.cell_centres()
    r, c = np.divmod(flat, setup.grid.shape[1])
    return src.cells(x[c], y[r], z, params, month, (MIN_LAPSE_K_PER_M, MAX_INVERSION_K_PER_M))


class ColumnDays:
    """A cell-mode forcing provider seen through the kernel's day order and column order.

    ``days`` maps the kernel's days (spin-up years first, then the record) to days of the
    record; the provider gives the surface columns in the kernel's ``column_order``
    (:meth:`firnline.kernel.Cells.column_order`; it was made for the cells of the columns
    in that order), which this object passes on as its ``column_order`` so the kernel reads
    each chunk's columns as a slice. :meth:`block` asks the provider for each run of
    consecutive record days and gives (b - a, n_cols) float32.
    """

    def __init__(self, provider, days: np.ndarray, column_order: np.ndarray):
        self.provider = provider
        self.days = np.asarray(days, dtype=np.int64)
        self.column_order = np.asarray(column_order, dtype=np.int64)

    def block(self, a: int, b: int):
        d = self.days[a:b]
        cut = np.flatnonzero(np.diff(d) != 1) + 1
        parts_t, parts_p = [], []
        for run in np.split(d, cut):
            if run.size == 0:
                continue
            t, p = self.provider.block(int(run[0]), int(run[-1]) + 1)
            parts_t.append(np.asarray(t, dtype="float32"))
            parts_p.append(np.asarray(p, dtype="float32"))
        t = parts_t[0] if len(parts_t) == 1 else np.concatenate(parts_t)
        p = parts_p[0] if len(parts_p) == 1 else np.concatenate(parts_p)
        return t, p

    def linear(self):
        """The provider's ``linear()`` (see :class:`firnline.kernel.CellForcing`) on the
        kernel's days, or None when it has none."""
        if not hasattr(self.provider, "linear"):
            return None
        coef, basis, kt, full = self.provider.linear()
        return (np.ascontiguousarray(np.asarray(coef)[self.days]), basis, kt,
                np.asarray(full, dtype=bool)[self.days])


def spinup_days(forcing: Forcing, spinup_years: int) -> np.ndarray:
    """Indices of the days cycled before the record: its first balance years, repeated as needed.

    ``spinup_years`` balance years are taken from the start of the record (the first
    ``min(spinup_years, n_years)`` years, cycled when the record is shorter), so the state
    (snow, firn, liquid water, cold content) meets the first modelled year spun up. Common
    practice in distributed mass-balance modelling; 0 gives an empty start.

    Returns
    -------
    days : ndarray int64
        Indices into the record of the spin-up days, in the order they are run.
    year : ndarray int64
        Their spin-up year, 0 .. spinup_years - 1.
    """
    n_years = len(forcing.years)
    if spinup_years <= 0 or n_years == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    yi = np.asarray(forcing.year_index)
    per_year = [np.flatnonzero(yi == y) for y in range(n_years)]
    days = [per_year[k % n_years] for k in range(int(spinup_years))]
    labels = [np.full(d.size, k, dtype=np.int64) for k, d in enumerate(days)]
    return np.concatenate(days).astype(np.int64), np.concatenate(labels)


def simulate(setup: Setup, config: Config | None = None, warming_k: Sequence[float] = (0.0,),
             precip_change_pct: Sequence[float] = (0.0,), progress: Progress = None,
             snapshot_days: Sequence[int] | None = None, cells: np.ndarray | None = None,
             scenarios: Scenarios | None = None, catchment_weight: np.ndarray | None = None,
             daily: bool = True, local_regions: bool = False) -> KernelResult:
    """Run the kernel on a prepared setup.

    The kernel runs over the setup's surface columns (:class:`Columns`); the result's last
    axis is the columns, the first ``n_cells`` of which are the cells in ``cells`` order
    (the glacier surface of a glacier cell), so ``result.sums[..., :n_cells]`` is per cell.
    With ``[snow] spinup_years`` > 0 the first years of the record are cycled first
    (:func:`spinup_days`) and only the record's years are returned; ``state_initial`` is
    then the spun-up state, ``storage_start`` its snow + firn + liquid water.

    Parameters
    ----------
    setup : Setup
    config : Config, optional
        Parameters to use (default: ``setup.config``), for example a calibration trial;
        it may differ from ``setup.config`` only in the kernel parameters
        (:func:`check_config`).
    warming_k, precip_change_pct : sequences of equal length
        One uniform scenario per pair (K, %).
    progress : callable(label, done, total), optional
        Reports the days done (label ``"days"``).
    snapshot_days : day boundaries at which to keep the cumulative balance (see kernel).
    cells : ndarray of int, optional
        Positions (into ``setup.cells`` order, ascending) to restrict the run to
        (:meth:`Setup.select`). With snow redistribution the run covers every cell
        upslope of them too (exact for the asked cells); the result holds the columns of
        the asked cells only, in :meth:`Columns.select` order, and so do the daily region sums.
    scenarios : firnline.kernel.Scenarios, optional
        Monthly scenarios; replaces ``warming_k`` and ``precip_change_pct`` when given.
    catchment_weight : ndarray (n_cells,) float, optional
        Weight of each cell in the ``catchment`` region of the daily sums (default:
        ``setup.catchment_weight``, else 1).
    daily : bool
        Keep the daily region sums (``KernelResult.daily``, for runoff); False saves their cost.
    local_regions : bool
        The daily sums of the glaciers with columns in the run only, followed by ice_free and
        catchment; ``KernelResult.region_ids`` names their glaciers (a unit of a tiled run: days x
        its few glaciers, not days x every glacier of the setup, in each thread).
    """
    return next(simulate_years(setup, config, warming_k, precip_change_pct, progress, snapshot_days, cells,
                               scenarios, catchment_weight, daily, local_regions))


def simulate_years(setup: Setup, config: Config | None = None, warming_k: Sequence[float] = (0.0,),
                   precip_change_pct: Sequence[float] = (0.0,), progress: Progress = None,
                   snapshot_days: Sequence[int] | None = None, cells: np.ndarray | None = None,
                   scenarios: Scenarios | None = None, catchment_weight: np.ndarray | None = None,
                   daily: bool = True, local_regions: bool = False,
                   block_years: int | None = None, upslope_within: np.ndarray | None = None
                   ) -> Iterator[KernelResult]:
    """:func:`simulate` (same arguments) in blocks of ``block_years`` balance years of the record.

    Yields one :class:`~firnline.kernel.KernelResult` per block, in order, as the kernel reaches
    the block's end (:func:`firnline.kernel.run_kernel_years`): its per-year arrays, daily sums
    and ``year_days`` are the block's (``first_year`` its first year in the record; the spin-up
    years are run first and not yielded), the snapshots come with the last block, and every
    value equals that of :func:`simulate` bit for bit. A caller that drops each block holds the
    kernel's results of ``block_years`` years at a time. None: one block of the whole record
    (what :func:`simulate` returns). ``upslope_within``: processing steps of the routing that hold
    every cell upslope of ``cells`` (:func:`firnline.snowslide.upslope_steps` of a unit, for its
    parts), which bounds the search for them.
    """
    cfg = check_config(setup, config)
    params = KernelParams.from_config(cfg)
    keep = None
    halo = None           # cells run only for the snow they send to the asked cells (not in the daily sums)
    if cells is None and setup.routing_by_window:       # every cell: the routing of the whole DEM
        setup = dataclasses.replace(setup, routing=window_routing(setup, (0, setup.grid.shape[0]),
                                                                  (0, setup.grid.shape[1])),
                                    routing_by_window=False)
    if cells is not None:
        cells = np.asarray(cells, dtype=np.int64)
        if setup.by_window:     # the asked cells and those upslope of them, with their routing or radiation
            setup, cells, cut = upslope_setup(setup, cells)
            upslope_within = None
            if catchment_weight is not None:
                catchment_weight = np.asarray(catchment_weight)[cut]
        if setup.routing is not None:
            from .snowslide import upslope
            wide = np.flatnonzero(upslope(setup.routing, cells, upslope_within))
            if wide.size != cells.size:
                inner = setup.columns_of(wide)
                keep_cells = np.searchsorted(wide, cells)
                mark = np.zeros(wide.size, bool)
                mark[keep_cells] = True
                keep = np.concatenate([keep_cells, inner.n_cells + np.flatnonzero(mark[inner.cell[inner.n_cells:]])])
                cells = wide
                halo = ~mark
        if catchment_weight is not None:
            catchment_weight = np.asarray(catchment_weight)[cells]
        setup = setup.select(cells)
    f = setup.forcing
    if params.use_radiation and setup.radiation is None:
        raise RuntimeError("the setup was prepared without the radiation table")
    if scenarios is None:
        scenarios = Scenarios.uniform(warming_k, precip_change_pct)
    cols = setup.surface_columns
    spin, spin_year = spinup_days(f, cfg.snow.spinup_years)
    n_spin_years = int(spin_year[-1]) + 1 if spin.size else 0
    days = np.concatenate([spin, np.arange(f.n_days)])
    calendar = Calendar(np.asarray(f.month)[days], np.asarray(f.day_of_year)[days],
                        np.concatenate([spin_year, np.asarray(f.year_index) + n_spin_years]),
                        np.asarray(f.winter)[days])
    rad = None
    if params.use_radiation:
        rad = setup.radiation
        if cols.n != cols.n_cells or not isinstance(rad, RadiationTable):
            rad = rad.subset(cols.cell)
    if catchment_weight is None:
        catchment_weight = setup.catchment_weight
    weight = np.ones(cols.n) if catchment_weight is None else np.asarray(catchment_weight, dtype="float64")[cols.cell]
    region, n_gl = cols.region, len(setup.glaciers.names)
    region_ids = None
    if local_regions and daily:
        # the daily sums of the glaciers this run holds only (a unit of a tiled run holds a few of
        # a range's thousands): glacier g -> its place in region_ids, ice-free after them
        asked = region < n_gl if halo is None else (region < n_gl) & ~halo[cols.cell]
        region_ids = np.unique(region[asked])
        local = np.full(n_gl + 1, region_ids.size, dtype=np.int32)
        local[region_ids] = np.arange(region_ids.size, dtype=np.int32)
        region, n_gl = local[region], int(region_ids.size)
    if halo is not None and daily:
        # the upslope cells outside the asked ones go to an extra region, dropped below, so the
        # daily sums hold the asked cells only (as the rest of the result does)
        out_col = halo[cols.cell]
        region = np.where(out_col, n_gl, region + (region >= n_gl)).astype(np.int32)
        weight = np.where(out_col, 0.0, weight)
    kcells = Cells(setup.elevation(cols.cell), cols.ice, rad, region=region,
                   area_m2=setup.grid.cell_area_m2 * cols.share, catchment_weight=weight,
                   n_glaciers=n_gl + (halo is not None and daily))
    if f.cells_source is not None:      # several stations or a gridded file: the kernel's cell mode
        order = kcells.column_order()
        forcing = ColumnDays(cell_forcing(setup, params, cols.cell[order]), days, order)
    else:
        forcing = StationForcing(f.temperature_c[days], f.precipitation_mm[days], cfg.climate.station_elevation_m)
    slide = None
    if setup.routing is not None and cfg.snow.redistribution == "gravitational":
        slide = Slide(setup.routing, cols.cell, cols.share)
    asked = None if snapshot_days is None else sorted(set(int(k) for k in snapshot_days))
    snaps = None if asked is None else sorted({k + spin.size for k in asked} | {int(spin.size)})
    n_total = calendar.n_years
    edges = None
    if block_years is not None:
        step = max(1, int(block_years))
        edges = sorted({0, n_spin_years, n_total} | set(range(n_spin_years, n_total, step)))
    for kres in run_kernel_years(kcells, calendar, forcing, params, scenarios, snapshot_days=snaps,
                                 progress=stage(progress, "days", calendar.n_days), slide=slide,
                                 daily=daily, year_edges=edges):
        if edges is not None and kres.first_year < n_spin_years:
            continue                # a block of the spin-up
        if edges is None or kres.first_year + kres.sums.shape[3] == n_total:
            # the last block: the run's inputs go before the caller uses it
            setup = cols = kcells = forcing = slide = rad = weight = region = None
        if halo is not None and daily:
            kres = dataclasses.replace(kres, daily=np.delete(kres.daily, n_gl, axis=2),
                                       region_area_m2=np.delete(kres.region_area_m2, n_gl))
        if edges is None and spin.size:
            kres = kres.after_spinup(n_spin_years)
        elif edges is not None:
            kres = dataclasses.replace(kres, first_year=kres.first_year - n_spin_years)
        if asked is not None and kres.snapshots is not None:
            # balances since the start of the record (the end of the spin-up)
            ref = kres.snapshots[snaps.index(int(spin.size))]
            kres = dataclasses.replace(kres, snapshots=np.stack([kres.snapshots[snaps.index(k + spin.size)] - ref
                                                                 for k in asked]))
        if keep is not None:
            kres = kres.columns(keep)
        if region_ids is not None:
            kres = dataclasses.replace(kres, region_ids=region_ids)
        yield kres


# ----------------------------------------------------------------------------
# results
# ----------------------------------------------------------------------------

@dataclass
class RunResult:
    """Result of :func:`run`.

    fields : xarray.Dataset, dims (balance_year, y, x): annual_balance, winter_balance,
        summer_balance (glacier surface; NaN off glaciers), accumulation, ablation (every
        valid cell), all m w.e.; glacier_fraction and elevation (y, x). Numpy-backed, or for a run
        whose maps pass :data:`firnline.yearmaps.SPILL_BYTES` dask-backed over a chunked file (read a
        window or a year at a time; ``.values`` of a whole variable loads every year)
    summary : DataFrame with :data:`SUMMARY_COLUMNS`
    profiles : DataFrame with :data:`PROFILE_COLUMNS`
    gradients : DataFrame (glacier, balance_year, gradient_mwe_per_100m)
    water_budget : DataFrame with :data:`firnline.water_budget.COLUMNS`
    kernel : the kernel's result (per surface column; ``daily`` region sums for runoff), for a
        run of one unit in this process; None for a tiled run (:mod:`firnline.tiles`)
    compute : how the units ran; compute_notes : notes of ``[compute] cells = "glaciers"``
    """

    setup: Setup
    config: Config
    warming_k: float
    precip_change_pct: float
    fields: xr.Dataset
    summary: pd.DataFrame
    profiles: pd.DataFrame
    gradients: pd.DataFrame
    timings: dict
    #: Daily routed runoff of every region (firnline.runoff.RunoffSeries).
    runoff: object = None
    #: Scores against ``[observations] discharge`` (firnline.runoff.gauge_scores), or None.
    gauge: dict | None = None
    water_budget: pd.DataFrame | None = None
    #: the kernel's result; only for a run of one unit in this process (None for a tiled run)
    kernel: KernelResult | None = None
    #: how the units of work ran (firnline.tiles.run_units), for run.json
    compute: str = ""
    #: what ``[compute] cells = "glaciers"`` left out (console and run.json notes)
    compute_notes: tuple = ()
    #: where ``fields`` live (:class:`firnline.yearmaps.YearMaps`): in memory, or for a large run in
    #: a file beside the output folder, removed by :meth:`close` or when the result is collected
    maps: object = None

    def close(self) -> None:
        """Release the per-year maps (a large run's spill file); ``fields`` cannot be read after."""
        if self.maps is not None:
            self.maps.close()

    @property
    def notes(self) -> tuple:
        """Console notes of the run: the setup's, then the warning of uncalibrated
        radiation-method defaults (:func:`firnline.parameters.radiation_defaults_notes`)."""
        from .parameters import radiation_defaults_notes
        return (*self.setup.notes, *self.compute_notes, *radiation_defaults_notes(self.config))

    def write(self, out_dir: str | Path | None = None) -> list[Path]:
        """Write every output file into ``out_dir`` (default: ``[output] dir``)."""
        from .products import write_run
        return write_run(self, Path(out_dir) if out_dir is not None else self.config.output.dir)


def column_fields(kres: KernelResult, scenario: int = 0) -> dict[str, np.ndarray]:
    """Per-year per-column accumulation, ablation and seasonal balances, mm w.e., (n_years, n_cols).

    Accumulation = snowfall + refreezing + deposition by sliding snow; ablation = melt of
    snow, firn and ice + loss by sliding snow (the net gain or loss of a season by sliding
    counts as deposition or as ablation: Cogley et al., 2011, glossary).
    """
    s = scenario
    out = {}
    for season, name in ((Season.WINTER, "winter"), (Season.SUMMER, "summer")):
        def f(flux):
            return kres.sums[season, flux, s].astype("float64")
        redist = f(Flux.REDISTRIBUTION)
        out[f"acc_{name}"] = f(Flux.SNOWFALL) + f(Flux.REFREEZING) + np.maximum(redist, 0.0)
        out[f"abl_{name}"] = (f(Flux.SNOW_MELT) + f(Flux.FIRN_MELT) + f(Flux.ICE_MELT)
                              + np.maximum(-redist, 0.0))
    return out


def cell_fields(setup: Setup, kres: KernelResult, scenario: int = 0,
                columns: Columns | None = None) -> dict[str, np.ndarray]:
    """Per-year per-cell fields of one scenario, m w.e., each (n_years, n_cells) float32.

    The balances are those of each cell's glacier surface (its first column); accumulation,
    ablation, snow at the year end (snow + firn), refreezing and the net gain by sliding snow
    are area means over the whole cell, its columns blended by share (:meth:`Columns.blend`).
    ``columns``: the columns of ``kres`` when not the setup's (a :meth:`Columns.cell_range`).
    """
    s = scenario
    cols = setup.surface_columns if columns is None else columns
    n = cols.n_cells
    c = column_fields(kres, s)
    k = 1e-3  # mm w.e. -> m w.e. (1 kg m-2 = 1 mm w.e.; common practice)
    winter = (c["acc_winter"] - c["abl_winter"])[:, :n] * k
    summer = (c["acc_summer"] - c["abl_summer"])[:, :n] * k
    blend = cols.blend if kres.sums.shape[-1] == cols.n else (lambda v: v[..., :n])
    out = {"accumulation": blend(c["acc_winter"] + c["acc_summer"]) * k,
           "ablation": blend(c["abl_winter"] + c["abl_summer"]) * k,
           "winter_balance": winter, "summer_balance": summer, "annual_balance": winter + summer}
    if kres.firn_end is not None:
        out["snow_end"] = blend(kres.snow_end[s].astype("float64") + kres.firn_end[s]) * k
        out["refreezing"] = blend(kres.year_sum(Flux.REFREEZING)[s].astype("float64")) * k
        out["redistribution"] = blend(kres.year_sum(Flux.REDISTRIBUTION)[s].astype("float64")) * k
    return {name: v.astype("float32") for name, v in out.items()}


def water_budget(setup: Setup, kres: KernelResult, scenario: int = 0,
                 catchment_weight: np.ndarray | None = None) -> pd.DataFrame:
    """``water_budget.csv`` of one scenario (see :mod:`firnline.water_budget`).

    ``catchment_weight`` (n_cells,) weights each cell in the ``catchment`` region; default
    ``setup.catchment_weight`` (the ``[runoff] catchment`` shares), as in the kernel's daily sums.
    """
    from . import water_budget as wb
    return wb.budget_from_sums(water_budget_sums(setup, kres, scenario, catchment_weight),
                               wb.region_names(setup.glaciers.names), [int(y) for y in setup.forcing.years])


def water_budget_sums(setup: Setup, kres: KernelResult, scenario: int = 0,
                      catchment_weight: np.ndarray | None = None, first_year: int = 0,
                      columns: Columns | None = None):
    """The exact region sums of :func:`water_budget` (:func:`firnline.water_budget.budget_sums`); the
    sums of the units of a tiled run (each a :meth:`Setup.select`) merge into those of the whole run,
    and so do those of blocks of years (``kres`` a :meth:`KernelResult.year_block` from ``first_year``)
    and of slices of the cells (``columns`` a :meth:`Columns.cell_range`, ``catchment_weight`` its cells')."""
    from . import water_budget as wb
    cols = setup.surface_columns if columns is None else columns
    s = scenario
    if catchment_weight is None:
        catchment_weight = setup.catchment_weight
    terms = wb.column_budget(lambda flux: kres.year_sum(flux)[s], kres.storage_start[s], kres.storage_end[s])
    weight = np.ones(cols.n) if catchment_weight is None else np.asarray(catchment_weight, dtype="float64")[cols.cell]
    return wb.budget_sums(terms, setup.grid.cell_area_m2 * cols.share, cols.region, weight,
                          len(setup.glaciers.names) + 2, len(setup.forcing.years), first_year)


def glacier_metrics(setup: Setup, fields: dict[str, np.ndarray], years: Sequence[int]) -> dict:
    """Metrics per glacier and year: {glacier name: [YearMetrics per year]}."""
    bw = setup.config.balance.band_width_m
    return {name: glacier_years_from_sums(sums, len(years), bw)
            for name, sums in zip(setup.glaciers.names, glacier_part_sums(setup, fields))}


def glacier_part_sums(setup: Setup, fields: dict[str, np.ndarray], parts=None, first_year: int = 0) -> list:
    """The exact sums behind the metrics of glaciers (:func:`firnline.metrics.glacier_sums`).

    ``fields`` are per-cell fields (:func:`cell_fields`) over some cells; each of ``parts`` is
    ``(g, local, pos, share)``: glacier ``g``'s cells among them as positions in ``fields``, in
    ``setup.cells`` and in ``glaciers.fractions[g]``; default: every glacier with all its cells
    (``setup.glacier_pos``). Sums of parts merge exactly (:func:`firnline.exact.merge`), and so do
    those of blocks of years (``fields`` of years ``first_year ..``).
    """
    gl = setup.glaciers
    area = setup.grid.cell_area_m2
    bw = setup.config.balance.band_width_m
    if parts is None:
        parts = [(g, pos, pos, slice(None)) for g, pos in enumerate(setup.glacier_pos)]
    out = []
    for g, local, pos, share in parts:
        b = [fields[k][:, local] for k in ("annual_balance", "winter_balance", "summer_balance")]
        out.append(glacier_sums(setup.elevation(pos), gl.fractions[g][share] * area, *b, bw, first_year))
    return out


def tables(metrics: dict, years: Sequence[int]) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """summary, profiles and gradients tables from :func:`glacier_metrics`."""
    rows, prow, grow = [], [], []
    for name, per_year in metrics.items():
        for year, m in zip(years, per_year):
            m: YearMetrics
            rows.append([name, int(year), m.area_m2 / 1e6, m.annual_mwe, m.winter_mwe, m.summer_mwe,
                         m.ela_m, m.aar, m.ela_flag])
            grow.append([name, int(year), m.gradient_mwe_per_100m])
            p = m.profile
            for b0, b1, a, b in zip(p.band_bottom_m, p.band_top_m, p.area_m2, p.balance_mwe):
                prow.append([name, int(year), float(b0), float(b1), a / 1e6, float(b)])
    summary = pd.DataFrame(rows, columns=SUMMARY_COLUMNS)
    profiles = pd.DataFrame(prow, columns=PROFILE_COLUMNS)
    gradients = pd.DataFrame(grow, columns=["glacier", "balance_year", "gradient_mwe_per_100m"])
    return summary, profiles, gradients


def to_grid(setup: Setup, values: np.ndarray, where: np.ndarray | None = None) -> np.ndarray:
    """Per-cell values (..., n_cells) of a setup as maps (..., ny, nx); see :meth:`Grid.to_grid`."""
    return setup.grid.to_grid(values, where, setup.cells)


def fields_dataset(setup: Setup, maps: dict, years: Sequence[int]) -> xr.Dataset:
    """Per-year maps ``name -> (n_years, ny, nx)`` (numpy or dask; :class:`firnline.yearmaps.YearMaps`)
    as an xarray Dataset with dims (balance_year, y, x) and units."""
    x, y = setup.grid.cell_centres()
    long_names = {
        "annual_balance": "annual surface mass balance of the glacier surface",
        "winter_balance": "winter surface mass balance of the glacier surface (fixed-date system)",
        "summer_balance": "summer surface mass balance of the glacier surface (fixed-date system)",
        "accumulation": "accumulation (snowfall, refreezing and deposition by sliding snow) in the balance year",
        "ablation": "ablation (melt of snow, firn and ice and loss by sliding snow) in the balance year",
        "snow_end": "snow and firn at the end of the balance year",
        "refreezing": "rain and meltwater refrozen in the snow and firn in the balance year",
        "redistribution": "net gain (+) or loss (-) by sliding snow in the balance year",
    }
    data = {}
    for name, ln in long_names.items():
        if name in maps:
            data[name] = (("balance_year", "y", "x"), maps[name], {"units": "m w.e.", "long_name": ln})
    frac = setup.glaciers.total_fraction.astype("float32")
    data["glacier_fraction"] = (("y", "x"), np.where(setup.grid.valid, frac, np.nan).astype("float32"),
                                {"units": "1", "long_name": "glacier share of the cell area"})
    data["elevation"] = (("y", "x"), setup.grid.elevation.astype("float32"),
                         {"units": "m", "long_name": "surface elevation of the DEM"})
    ds = xr.Dataset(data, coords={"balance_year": np.asarray(years, dtype="int32"),
                                  "y": ("y", y, {"units": "m"}), "x": ("x", x, {"units": "m"})})
    ds.attrs.update({"crs_wkt": setup.grid.crs.to_wkt(), "source": f"firnline {__version__}",
                     "caution": CAUTION})
    return ds


def run(config: Config, warming_k: float = 0.0, precip_change_pct: float = 0.0,
        progress: Progress = None, setup: Setup | None = None, client=None) -> RunResult:
    """Model every complete balance year of the record.

    Parameters
    ----------
    config : Config
    warming_k : float
        Uniform warming added to the station temperature, K.
    precip_change_pct : float
        Precipitation change, % (precipitation is scaled by 1 + pct/100).
    progress : callable(label, done, total), optional
    setup : Setup, optional
        A prepared setup to reuse (default: :func:`prepare` is called). It must come
        from ``config`` or from a config that differs only in the kernel parameters
        (:func:`check_config`); otherwise ValueError.
    client : dask.distributed.Client, optional
        Run the units of work (``[compute]``, :mod:`firnline.tiles`) on this cluster; default:
        ``[compute] scheduler`` (a local cluster, or this process for a run of one unit).

    Returns
    -------
    RunResult
    """
    if setup is None:
        setup = prepare(config, progress)
    config = check_config(setup, config)
    from . import tiles
    from . import water_budget as wb
    t0 = time.perf_counter()
    merged = tiles.run_units(setup, config, warming_k, precip_change_pct, progress=progress, client=client)
    t1 = time.perf_counter()
    years = [int(y) for y in setup.forcing.years]
    bw = config.balance.band_width_m
    met = {name: glacier_years_from_sums(sums, len(years), bw)
           for name, sums in zip(setup.glaciers.names, merged.glacier_sums)}
    summary, profiles, gradients = tables(met, years)
    ds = fields_dataset(setup, merged.maps.arrays(), years)
    budget = wb.budget_from_sums(merged.budget, wb.region_names(setup.glaciers.names), years)
    t2 = time.perf_counter()
    series, gauge = runoff_from_daily(setup, config, merged.daily, merged.region_area_m2)
    t3 = time.perf_counter()
    timings = dict(setup.timings, kernel_s=t1 - t0, metrics_s=t2 - t1, runoff_s=t3 - t2,
                   redistribution_s=merged.timings["redistribution_s"], units=merged.n_units,
                   unit_kernel_s=merged.timings["unit_kernel_s"])
    return RunResult(setup=setup, config=config, warming_k=warming_k,
                     precip_change_pct=precip_change_pct, fields=ds, summary=summary,
                     profiles=profiles, gradients=gradients, timings=timings, runoff=series, gauge=gauge,
                     water_budget=budget, kernel=merged.kernel, compute=merged.scheduler,
                     compute_notes=merged.notes, maps=merged.maps)


def region_names(setup: Setup) -> list[str]:
    """The kernel's regions of the daily series: each glacier, ``ice_free``, ``catchment``."""
    return [*map(str, setup.glaciers.names), "ice_free", "catchment"]


def runoff_of(setup: Setup, config: Config, kres: KernelResult, scenario: int = 0):
    """The routed daily runoff of one scenario and its scores against the gauge.

    Returns ``(RunoffSeries, scores or None)``; the kernel result must hold the daily region
    volumes (``KernelResult.daily``: :func:`simulate` with ``daily=True``, its default).
    """
    if kres.daily is None:
        raise ValueError("the kernel result holds no daily region volumes; run simulate(..., daily=True)")
    return runoff_from_daily(setup, config, kres.daily[scenario], kres.region_area_m2)


def runoff_from_daily(setup: Setup, config: Config, daily: np.ndarray, region_area_m2: np.ndarray):
    """:func:`runoff_of` from daily region volumes (days, regions, terms), m3, and the region areas, m2."""
    from . import parameters
    from .kernel import Daily
    from .runoff import CATCHMENT, gauge_scores, runoff_series

    series = runoff_series(daily, Daily, region_names(setup), region_area_m2,
                           setup.forcing.dates, parameters.storage_days(config))
    gauge = None
    if setup.discharge is not None:
        gauge = gauge_scores(series.dates, series.discharge_m3s[series.region(CATCHMENT)], setup.discharge)
    return series, gauge


def parameters_used(config: Config) -> dict:
    """The model parameters of a config, as plain numbers (for run.json)."""
    out = {"downscaling": dataclasses.asdict(config.downscaling), "melt": dataclasses.asdict(config.melt),
           "snow": dataclasses.asdict(config.snow)}
    if config.runoff is not None:
        from . import parameters
        out["runoff"] = {p.key: getattr(config.runoff, p.key) for p in parameters.in_section("runoff")}
    return out
