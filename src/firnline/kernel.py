"""The daily mass-balance kernel: named processes over chunks of cells, a pure function of arrays.

Physics
-------
Each day, for each cell ``c`` and each scenario ``s`` (``m`` the day's calendar month)::

    T = T_station + lapse(m) * (z - z_station) + warming[s, m]                   [deg C]
    P = P_station * precip_factor * max(0, 1 + precip_gradient * (z - z_station))
        * precip_scale[s, m]                                                     [mm w.e.]
    snowfall = P * f_solid(T)  with f_solid = 1 at or below snow_c, 0 at or above rain_c,
                               linear between;  rain = P - snowfall
    snow += snowfall                              (snowfall is added before melt)
    potential snow melt = F_snow * (T - threshold)+
    snow melt = min(snow, potential)
    firn melt (glacier surfaces) = F_firn * degree-days left once the snow is gone,
                                   F_firn = F_snow + firn_share * (F_ice - F_snow)
    ice melt (glacier surfaces)  = F_ice * degree-days left once snow and firn are gone

with the melt factors ``F`` of the chosen method (:class:`Method`), one small jitted
function per published equation:

* :func:`degree_day_factors` (e.g. Hock, 2003, J. Hydrology 282): F_snow = ddf_snow,
  F_ice = ddf_ice;
* :func:`hock1999_factors` (Hock, 1999, J. Glaciology 45(149)): F = melt_factor +
  radiation_factor * I, I the cell's potential clear-sky direct radiation for that day
  of year (W m-2).

Then the cold-content scheme (``refreezing = "cold-content"``): the pack's cold content
(the water its top ``cold_layer_mm`` can refreeze) follows the air below 0 C with the
time constant ``cold_days`` (:func:`cold_content_step`); rain, the day's melt and the
water already held refreeze as far as the cold content allows, then are held up to
``holding_fraction`` of the pack's mass, and the rest is released
(:func:`refreeze_and_hold`). Released water is labelled by origin: firn melt leaving the
firn, ice melt and rain on bare ice, the rest leaving the snow pack (on ice-free ground
everything released is "ground" water).

At the end of each balance year the firn turns over (:func:`_firn_turnover`): snow that
survived the year on a glacier surface becomes the youngest firn layer, the year's firn
melt is taken from the youngest layers, and the layer older than ``firn_years`` becomes
glacier ice (it leaves the pack). Ice-free ground keeps its snow as snow.

Snow redistribution (``Slide``): at day boundaries every :data:`SLIDE_INTERVAL_DAYS` days
and before the last day of each balance year, the snow above each cell's holding
capacity slides down the steepest descent (:mod:`firnline.snowslide`, Gruber 2007 with
the holding depth of Bernhardt & Schulz 2010); the change of each column is its
``REDISTRIBUTION`` flux, snow sent off the DEM or into nodata is ``EXPORTED``.

Accumulation = snowfall + refreezing + deposition by sliding snow; ablation = melt of
snow, firn and ice + loss by sliding snow; balance = accumulation - ablation, all mm w.e.
(Cogley et al., 2011, glossary). Rain that is not refrozen is not accumulation.

State and initial condition: the state (snow, firn and its age layers, liquid water,
cold content) starts empty at the first kernel day; the caller (:func:`firnline.model.simulate`)
spins it up by running the first ``[snow] spinup_years`` balance years before the record
and keeps only the record's years (:meth:`KernelResult.after_spinup`).

Names, not positions
--------------------
:class:`State` names the per-column state, :class:`Flux` the daily fluxes that are summed
per season (:class:`Season`), :class:`Daily` the terms of the daily region sums and
:class:`Method` the melt equations. Results are indexed by these names
(``result.season_sum(Flux.SNOWFALL, Season.WINTER)``), never by literal positions.

Inputs come in groups: per cell (:class:`Cells`), per day (:class:`Calendar` and the
forcing), per scenario (:class:`Scenarios`) and parameters (:class:`KernelParams`,
built from a config in one place, :meth:`KernelParams.from_config`).

Surfaces
--------
A kernel cell is one *surface column*: ``Cells.ice`` says whether its surface is glacier
ice. A DEM cell partly covered by glacier is two (or more) columns: its glacier surface
and its ice-free share (:class:`firnline.model.Columns`); the kernel loop does not care,
the caller blends the columns' results by share. ``Cells.region``, ``area_m2`` and
``catchment_weight`` say which region each column counts in and with what area for the
daily region sums (:attr:`KernelResult.daily`, m3 per day: each glacier, ``ice_free``,
``catchment``).

Forcing: two modes
------------------
* **Station mode** (the fast path, :class:`StationForcing`): daily station temperature
  and precipitation at a reference elevation, downscaled inside the kernel with the
  monthly lapse rate and the per-cell orographic factor above.
* **Cell mode**: any object with a method ``block(a, b) -> (t, p)`` returning two
  ``(b - a, n_cells)`` float32 arrays for days ``a .. b-1``: temperature (deg C) at each
  cell's own elevation and precipitation (mm, gauge factor and elevation gradient
  already applied), both *before* scenario changes. The kernel pulls one block at a
  time (at most :data:`CELL_BLOCK_BYTES` of forcing, never days x cells for the whole
  record) and adds the scenario's warming and scales the precipitation itself; the
  lapse rate, precipitation gradient and factor of :class:`KernelParams` are not used.
  With a ``column_order`` attribute equal to :meth:`Cells.column_order` the blocks'
  columns are in that order and are read as slices (:data:`CELL_ORDERED`).

Scenarios are per scenario and per calendar month (:class:`Scenarios`): warming
``(n_scen, 12)`` K and precipitation scale ``(n_scen, 12)``; a uniform change is twelve
equal values, bit for bit the same as a uniform step.

Layout for speed
----------------
Columns are processed in chunks of :data:`CHUNK_CELLS`, in region order (``Cells.order``,
so a chunk holds one or two regions for the daily sums; results go to each column's own
place), chunks in parallel; for each chunk and scenario the days run in the middle and the
innermost loop runs over the chunk's cells with branch-free arithmetic (min/max and
selects) on scalars (:func:`_cell_day`), which the compiler turns into packed SIMD code.
A chunk's rows (its kept state and running per-season sums, ``K_*``; its inputs, the day's
radiation and the day's fluxes, ``W_*``) lie at constant offsets in two flat buffers, rows
:data:`CHUNK_STRIDE` apart, that stay in the core's cache; its columns of the radiation
table are read once per call, as float64. All arithmetic and the running sums are float64
(so results match the previous scalar kernel to rounding); the per-year per-season sums
are stored as float32 (each is a single rounding of a float64 sum); cumulative snapshots
stay float64; the daily region sums are packed partial sums (:func:`_region_sums`). In
station mode each chunk runs the whole record in one go; in cell mode (the days come in
blocks) and with snow redistribution (the record is cut at its boundaries) each chunk's
kept rows persist in ``Targets.work`` between calls.

Threads and vectors: :mod:`firnline.jit` sets numba's threading layer to OpenMP with a passive
wait policy, so idle workers sleep instead of spinning against other programs on a shared
machine (with the active policy, two threads ran slower than one under a competing load),
and on AVX-512 hosts lets LLVM use 512-bit vectors for the cell loop (about 14 % faster);
settings the user made in the environment win. Work is handed out in tasks of
:data:`CHUNKS_PER_TASK` chunks, dynamically (:data:`TASK_CHUNKSIZE`), so a thread slowed by a
competing program does not hold up the other, and station mode makes few parallel calls
(:data:`GROUP_CELLS` cells each) so there are few barriers to wait at. Without daily region
sums the cell loop does not store the day's fluxes (nothing reads them).

Memory: state (states x scenarios x cells and firn_years age layers, float64), with sliding
snow or cell mode the chunks' kept rows (``Targets.work``: (states + seasons x fluxes) x
scenarios x cells, float64), results (seasons x fluxes x scenarios x years x cells, float32)
and the daily region sums (threads x
scenarios x days x regions x terms, float64, only when asked for); no (days x cells) array is
ever made in station mode, and at most one block of :data:`CELL_BLOCK_BYTES` in cell mode.
:func:`run_kernel_years` makes the results and daily sums a block of balance years at a time
(the state carried from block to block), so a caller that drops each block holds one block's
years, not the record's.
"""

from __future__ import annotations

import dataclasses
from collections import namedtuple
from dataclasses import dataclass
from enum import IntEnum
from typing import Callable, Iterator, Protocol, Sequence

import numba
import numpy as np
from numba import njit, prange

from . import jit  # noqa: F401  (numba's threading layer and vector width, before compiling)


class Method(IntEnum):
    """Melt equations (the ``[melt] method`` of the config)."""

    DEGREE_DAY = 0   #: :func:`degree_day_factors`
    RADIATION = 1    #: :func:`hock1999_factors`

    @classmethod
    def from_name(cls, name: "str | Method") -> "Method":
        """The method of a config name (``"degree-day"``, ``"radiation"``)."""
        return name if isinstance(name, Method) else cls[name.upper().replace("-", "_")]

    @property
    def config_name(self) -> str:
        """The name ``[melt] method`` gives it."""
        return self.name.lower().replace("_", "-")


class State(IntEnum):
    """Per-column state, mm w.e. (cold content: mm w.e. of water it can refreeze)."""

    SNOW = 0          #: snow water equivalent of the pack (this balance year's snow, movable)
    FIRN = 1          #: firn: snow that survived a balance year (glacier surfaces only), all ages
    LIQUID = 2        #: liquid water held in the snow and firn
    COLD_CONTENT = 3  #: cold content of the pack, as the mass of water it can refreeze


class Flux(IntEnum):
    """Daily fluxes summed per season, mm w.e. over the column (see DEVELOPERS.md, "How to add a
    kernel process")."""

    SNOWFALL = 0        #: solid precipitation (accumulation)
    RAIN = 1            #: liquid precipitation
    SNOW_MELT = 2       #: melt of the snowpack
    ICE_MELT = 3        #: melt of glacier ice (glacier surfaces only)
    FIRN_MELT = 4       #: melt of firn (glacier surfaces only)
    REFREEZING = 5      #: rain and meltwater refrozen in the pack (accumulation)
    RELEASED_SNOW = 6   #: water leaving the snow pack (on ice-free ground: all released water)
    RELEASED_FIRN = 7   #: firn melt leaving the firn
    RELEASED_ICE = 8    #: ice melt and rain on bare ice
    REDISTRIBUTION = 9  #: net gain (+) or loss (-) by sliding snow, its export included
    EXPORTED = 10       #: snow sent off the DEM edge or into nodata by sliding
    FIRN_TO_ICE = 11    #: firn older than firn_years turned into glacier ice (internal to storage)


class Daily(IntEnum):
    """Terms of the daily region sums (:attr:`KernelResult.daily`), m3 of water.

    Released water by origin: on glacier surfaces, water leaving the snow pack is ``SNOW``,
    firn melt leaving the firn ``FIRN``, ice melt and rain on bare ice ``ICE``; on ice-free
    ground everything released is ``GROUND``.
    """

    RAIN = 0
    SNOWFALL = 1
    SNOW_MELT = 2
    FIRN_MELT = 3
    ICE_MELT = 4
    REFREEZING = 5
    RELEASED_SNOW = 6
    RELEASED_FIRN = 7
    RELEASED_ICE = 8
    RELEASED_GROUND = 9


class Season(IntEnum):
    """Seasons of the fixed-date system."""

    WINTER = 0
    SUMMER = 1


N_STATE, N_FLUX, N_SEASON, N_DAILY = len(State), len(Flux), len(Season), len(Daily)
# the same names as plain ints for compiled code (numba indexes tuples by int constants);
# _cell_day, _store_day and _fill_kept handle one entry per member
_SNOW, _FIRN, _LIQUID, _COLD_CONTENT = (int(x) for x in State)
(_SNOWFALL, _RAIN, _SNOW_MELT, _ICE_MELT, _FIRN_MELT, _REFREEZING, _REL_SNOW, _REL_FIRN, _REL_ICE,
 _REDIST, _EXPORTED, _FIRN_TO_ICE) = (int(x) for x in Flux)
#: the fluxes of a cell-day that go into the daily region sums, in :class:`Daily` order up to
#: RELEASED_ICE (RELEASED_GROUND is RELEASED_SNOW of ice-free columns)
_DAY_FLUXES = (_RAIN, _SNOWFALL, _SNOW_MELT, _FIRN_MELT, _ICE_MELT, _REFREEZING, _REL_SNOW, _REL_FIRN,
               _REL_ICE)
N_DAY_ROWS = len(_DAY_FLUXES)
#: heat capacity of ice over the latent heat of fusion, K-1: 2097 J kg-1 K-1 / 334 kJ kg-1
#: (common practice): the mass of water 1 kg of pack 1 K below 0 C can refreeze
COLD_PER_K = 2097.0 / 334000.0
#: redistribution runs at the day boundaries every this many days of the record, and before
#: the last day of each balance year (see the module docstring, "Snow redistribution")
SLIDE_INTERVAL_DAYS = 5
if (N_STATE, N_FLUX) != (4, 12):  # pragma: no cover - a reminder for whoever adds a member
    raise ImportError("kernel: handle every State and Flux member in _cell_day and _store_day")
#: columns per chunk: the chunk's rows (about 100 kB, see K_LEN and W_LEN) stay in the L2 cache
CHUNK_CELLS = 256
#: chunks per parallel task
CHUNKS_PER_TASK = 4
#: tasks handed to a thread at a time, dynamically (numba's parallel chunk size; 0 = static split)
TASK_CHUNKSIZE = 1
#: cells per parallel call in station mode (the progress step; few calls = few barriers)
GROUP_CELLS = 1 << 18
#: upper bound of one cell-mode forcing block (t and p together), bytes
CELL_BLOCK_BYTES = 256 << 20
#: at most this many days per cell-mode block
CELL_BLOCK_DAYS = 64

STATION, CELL, CELL_ORDERED, LINEAR = 0, 1, 2, 3   # forcing modes of the compiled core (CELL_ORDERED:
# the blocks' columns in Cells.column_order(), read as slices; LINEAR: T and P made in the chunk
# from the days' coefficients and the columns' basis rows, see CellForcing.linear)


# ----------------------------------------------------------------------------
# grouped inputs
# ----------------------------------------------------------------------------

@dataclass(frozen=True)
class KernelParams:
    """Model parameters in kernel units.

    lapse_rate_k_per_m : 12 values (January first), K m-1 (station mode)
    precip_gradient_per_m : m-1 (station mode)
    precip_factor : 1 (station mode)
    snow_c, rain_c : deg C, all snow at or below snow_c, all rain at or above rain_c
    threshold_c : deg C, melt threshold
    ddf_snow, ddf_ice : mm w.e. d-1 K-1 (degree-day method)
    melt_factor : mm w.e. d-1 K-1 (radiation method)
    radiation_factor_snow, radiation_factor_ice : mm w.e. d-1 K-1 per W m-2
    firn_years : int
        Firn older than this many balance years becomes glacier ice; 0: no firn (snow that
        survives a year stays snow, the behaviour before firn was modelled).
    firn_share : 1
        Firn melt factor = F_snow + firn_share * (F_ice - F_snow).
    holding_fraction : 1
        Liquid water a snow or firn pack holds, share of its mass (refreezing scheme on).
    cold_days : d
        Time constant of the pack's cold content following the air below 0 C.
    cold_layer_mm : mm w.e.
        Mass of the top of the pack whose cold content follows the air.
    refreezing : str
        ``"cold-content"`` (retention and refreezing on) or ``"none"``.
    method : str
        The ``[melt] method`` name (a :class:`Method` is accepted and stored by its name);
        :attr:`code` is the :class:`Method` the kernel dispatches on.
    """

    lapse_rate_k_per_m: tuple
    precip_gradient_per_m: float
    precip_factor: float
    snow_c: float
    rain_c: float
    threshold_c: float
    ddf_snow: float
    ddf_ice: float
    melt_factor: float = 0.0
    radiation_factor_snow: float = 0.0
    radiation_factor_ice: float = 0.0
    firn_years: int = 0
    firn_share: float = 0.5
    holding_fraction: float = 0.0
    cold_days: float = 7.0
    cold_layer_mm: float = 500.0
    refreezing: str = "none"
    method: str = "degree-day"

    def __post_init__(self):
        object.__setattr__(self, "method", Method.from_name(self.method).config_name)
        if self.refreezing not in ("cold-content", "none"):
            raise ValueError('refreezing is "cold-content" or "none"')
        if int(self.firn_years) != self.firn_years or self.firn_years < 0:
            raise ValueError("firn_years must be a whole number >= 0")

    @property
    def code(self) -> Method:
        """The melt method the kernel dispatches on."""
        return Method.from_name(self.method)

    @property
    def use_radiation(self) -> bool:
        """True for the radiation method (it needs a radiation table)."""
        return self.code == Method.RADIATION

    @classmethod
    def from_config(cls, cfg) -> "KernelParams":
        """The one mapping from a config to the kernel: the parameter registry's kernel names
        (:func:`firnline.parameters.kernel_values`)."""
        from .parameters import kernel_values
        return cls(**kernel_values(cfg))


@dataclass(frozen=True)
class Cells:
    """Per-cell inputs (one kernel cell = one surface column, see the module docstring).

    z_m : ndarray (n_cells,) float
        Elevation, m.
    ice : ndarray (n_cells,) bool
        True where the surface is glacier ice (ice melt allowed).
    radiation : RadiationTable, optional
        Potential direct radiation over the same cells (``values`` (n_nodes, n_cells),
        ``scale_w_m2``, ``node_weights(doys)``; see
        :class:`firnline.radiation.RadiationTable`); required by the radiation method.
    region : ndarray (n_cells,) int, optional
        Region of each column for the daily sums: a glacier ``0 .. n_glaciers-1``, or
        ``n_glaciers`` for ice-free ground (default: glacier columns in region 0 when there is
        one glacier, else everything ice-free... give it explicitly when ``n_glaciers`` > 1).
    area_m2 : ndarray (n_cells,) float, optional
        Surface area each column stands for (cell area x share), m2 (default 1).
    catchment_weight : ndarray (n_cells,) float, optional
        Weight of each column in the ``catchment`` region (default 1).
    n_glaciers : int
        Number of glacier regions (regions: glaciers, ``ice_free``, ``catchment``).
    """

    z_m: np.ndarray
    ice: np.ndarray
    radiation: object | None = None
    region: np.ndarray | None = None
    area_m2: np.ndarray | None = None
    catchment_weight: np.ndarray | None = None
    n_glaciers: int = 1

    @property
    def n(self) -> int:
        return int(np.shape(self.z_m)[0])

    @property
    def n_regions(self) -> int:
        """Regions of the daily sums: the glaciers, ``ice_free``, ``catchment``."""
        return int(self.n_glaciers) + 2

    def region_ids(self) -> np.ndarray:
        """int64 region of each column (see ``region``)."""
        if self.region is not None:
            r = np.ascontiguousarray(self.region, dtype=np.int64)
            if r.shape != (self.n,) or (r.size and (r.min() < 0 or r.max() > self.n_glaciers)):
                raise ValueError(f"Cells.region needs one value 0..{self.n_glaciers} per column")
            return r
        if self.n_glaciers > 1:
            raise ValueError("Cells.region is needed with more than one glacier")
        ice = np.asarray(self.ice, dtype=bool)
        return np.where(ice, 0, int(self.n_glaciers)).astype(np.int64)

    def column_order(self) -> np.ndarray:
        """The order in which the kernel hands out the columns (by region, stable), int64.

        A cell-mode forcing whose blocks hold the columns in this order (and says so by its
        ``column_order`` attribute) is read by the kernel as contiguous slices, not gathered.
        """
        return np.argsort(self.region_ids(), kind="stable").astype(np.int64)


@dataclass(frozen=True)
class Slide:
    """Gravitational snow redistribution between kernel days (:mod:`firnline.snowslide`).

    routing : snowslide.Routing over the DEM cells the columns belong to
    column_cell : ndarray (n_cols,) int, the cell of each column (position in the routing's cells)
    column_share : ndarray (n_cols,) float, the share of its cell's area each column stands for
    every_days : int, days between calls (and one call before the last day of each balance year)
    """

    routing: object
    column_cell: np.ndarray
    column_share: np.ndarray
    every_days: int = SLIDE_INTERVAL_DAYS


@dataclass(frozen=True)
class Calendar:
    """Per-day calendar (n_days,): month 1..12, day of year 1..366, balance-year index
    0..n_years-1 (non-decreasing) and the winter season of the fixed-date system (bool)."""

    month: np.ndarray
    day_of_year: np.ndarray
    year_index: np.ndarray
    winter: np.ndarray

    @classmethod
    def from_forcing(cls, forcing) -> "Calendar":
        """The calendar of a :class:`firnline.forcing.Forcing`."""
        return cls(forcing.month, forcing.day_of_year, forcing.year_index, forcing.winter)

    @property
    def n_days(self) -> int:
        return int(np.shape(self.month)[0])

    @property
    def n_years(self) -> int:
        yi = np.asarray(self.year_index)
        return int(yi.max()) + 1 if yi.size else 0


@dataclass(frozen=True)
class StationForcing:
    """Station mode: daily temperature (deg C) and precipitation (mm) at ``elevation_m``."""

    temperature_c: np.ndarray
    precipitation_mm: np.ndarray
    elevation_m: float


class CellForcing(Protocol):
    """Cell mode: forcing already at each cell (see the module docstring).

    The blocks' columns are the cells' columns in their own order, or, when the provider has
    an attribute ``column_order`` (equal to :meth:`Cells.column_order`), in that order: the
    kernel then reads each chunk's columns as one contiguous slice of a day's row, which
    vectorises (a gather by column index does not).
    """

    def block(self, a: int, b: int) -> tuple[np.ndarray, np.ndarray]:
        """Temperature (deg C) and precipitation (mm), each (b - a, n_cells) float32."""

    # Optional, with ``column_order``: ``linear() -> (coef, basis, kt, full)`` or None. On the
    # days where ``full`` is True the forcing is linear in a few per-column basis rows:
    # T[d, c] = sum_{k < kt} coef[d, k] basis[k, c], P[d, c] = sum_{k >= kt} coef[d, k]
    # basis[k, c] (coef (n_days, K) and basis (K, n_cells) float32, basis columns in
    # ``column_order``); the kernel then makes T and P inside each chunk (LINEAR mode: no block
    # is written or read) and asks ``block`` only for the other days.


@dataclass(frozen=True)
class Scenarios:
    """Climate changes per scenario and calendar month (January first).

    warming_k : ndarray (n_scen, 12) float64, K added to the temperature
    precip_scale : ndarray (n_scen, 12) float64, factor on the precipitation (1 + pct/100)
    """

    warming_k: np.ndarray
    precip_scale: np.ndarray

    def __post_init__(self):
        w = np.asarray(self.warming_k, dtype="float64")
        p = np.asarray(self.precip_scale, dtype="float64")
        if w.ndim != 2 or w.shape[1] != 12 or p.shape != w.shape:
            raise ValueError("scenarios need (n_scen, 12) warmings and precipitation scales")
        if np.any(p < 0):
            raise ValueError("a precipitation change below -100 % is impossible")
        object.__setattr__(self, "warming_k", np.ascontiguousarray(w))
        object.__setattr__(self, "precip_scale", np.ascontiguousarray(p))

    @property
    def n(self) -> int:
        return int(self.warming_k.shape[0])

    @classmethod
    def uniform(cls, warming_k: Sequence[float] = (0.0,),
                precip_change_pct: Sequence[float] = (0.0,)) -> "Scenarios":
        """One (warming K, precipitation change %) pair per scenario, the same every month."""
        w = np.asarray(warming_k, dtype="float64").reshape(-1)
        pct = np.asarray(precip_change_pct, dtype="float64").reshape(-1)
        if w.shape != pct.shape:
            raise ValueError("warming_k and precip_change_pct need one value per scenario each")
        return cls(np.repeat(w[:, None], 12, axis=1), np.repeat((1.0 + pct / 100.0)[:, None], 12, axis=1))

    @classmethod
    def monthly(cls, warming_k, precip_change_pct) -> "Scenarios":
        """Twelve monthly warmings (K) and precipitation changes (%) per scenario, (n_scen, 12)."""
        w = np.atleast_2d(np.asarray(warming_k, dtype="float64"))
        pct = np.atleast_2d(np.asarray(precip_change_pct, dtype="float64"))
        return cls(w, 1.0 + pct / 100.0)


@dataclass(frozen=True)
class KernelResult:
    """Results of :func:`run_kernel`.

    sums : ndarray (seasons, fluxes, scenarios, years, cells) float32
        Per-season sums of each :class:`Flux`, mm w.e.; read them by name with
        :meth:`season_sum` or the properties below.
    snow_end : ndarray (scenarios, years, cells) float32
        Snow water equivalent on the last day of each balance year, mm w.e.
    state_initial, state_final : ndarray (states, scenarios, cells) float64
        The :class:`State` before the first day and after the last.
    snapshots : ndarray (n_snapshots, scenarios, cells) float64 or None
        Cumulative balance since the start of the record at the requested day
        boundaries, mm w.e.
    firn_end : ndarray (scenarios, years, cells) float32
        Firn on the last day of each balance year (after the year's firn turnover), mm w.e.
    storage_end : ndarray (scenarios, years, cells) float64
        Snow + firn + liquid water at the end of each balance year, mm w.e.
    storage_start : ndarray (scenarios, cells) float64
        The same before the first day.
    daily : ndarray (scenarios, days, regions, :class:`Daily`) float64
        Daily sums per region of water volumes, m3 (mm w.e. x column area x 1e-3); regions:
        the glaciers (``Cells.region`` 0 .. n_glaciers - 1), ``ice_free``, ``catchment``
        (every column, weighted by ``Cells.catchment_weight``).
    region_area_m2 : ndarray (regions,) float64
        Area of each region (the catchment's weighted), m2; daily mm = m3 / area x 1e3.
    """

    sums: np.ndarray
    snow_end: np.ndarray
    state_initial: np.ndarray
    state_final: np.ndarray
    snapshots: np.ndarray | None = None
    year_days: np.ndarray | None = None
    firn_end: np.ndarray | None = None
    storage_end: np.ndarray | None = None
    storage_start: np.ndarray | None = None
    daily: np.ndarray | None = None
    region_area_m2: np.ndarray | None = None
    slide_seconds: float = 0.0
    #: the glaciers (setup order) of the daily sums' glacier regions, when only some are kept
    #: (``simulate(local_regions=True)``); None: every glacier, in order
    region_ids: np.ndarray | None = None
    #: the index of the first balance year of ``sums`` (and the other per-year arrays) in the record:
    #: 0, or a block's first year (:func:`run_kernel_years`, :meth:`year_block`)
    first_year: int = 0

    def released(self) -> np.ndarray:
        """Water released per balance year (snow, firn and ice origins), (scenarios, years, cells)."""
        return (self.year_sum(Flux.RELEASED_SNOW) + self.year_sum(Flux.RELEASED_FIRN)
                + self.year_sum(Flux.RELEASED_ICE))

    def after_spinup(self, n_years: int) -> "KernelResult":
        """The result without its first ``n_years`` balance years and their days (the spin-up):
        the starting storage becomes the storage at the end of the spin-up."""
        if n_years <= 0:
            return self
        days = self.daily
        if days is not None:
            days = days[:, self.spinup_days_of(n_years):]
        return KernelResult(sums=self.sums[:, :, :, n_years:], snow_end=self.snow_end[:, n_years:],
                            state_initial=self.state_initial, state_final=self.state_final,
                            snapshots=self.snapshots, firn_end=self.firn_end[:, n_years:],
                            slide_seconds=self.slide_seconds,
                            storage_end=self.storage_end[:, n_years:],
                            storage_start=self.storage_end[:, n_years - 1], daily=days,
                            region_area_m2=self.region_area_m2, year_days=self.year_days[n_years:])

    def year_block(self, a: int, b: int) -> "KernelResult":
        """Balance years ``a .. b-1`` only, as views (no copy; the daily sums and snapshots are
        left out): the starting storage becomes the storage at the end of year ``a - 1``, so every
        per-year quantity of the block equals that of the whole result."""
        def cut(v):
            return None if v is None else v[:, a:b]
        start = self.storage_start if a == 0 or self.storage_end is None else self.storage_end[:, a - 1]
        return dataclasses.replace(self, sums=self.sums[:, :, :, a:b], snow_end=cut(self.snow_end),
                                   firn_end=cut(self.firn_end), storage_end=cut(self.storage_end),
                                   storage_start=start, daily=None, snapshots=None,
                                   year_days=None if self.year_days is None else self.year_days[a:b],
                                   first_year=self.first_year + a)

    def spinup_days_of(self, n_years: int) -> int:
        return int(np.sum(self.year_days[:n_years]))

    def columns(self, keep) -> "KernelResult":
        """The result of some columns only (the daily region sums are kept as they are)."""
        k = np.asarray(keep, dtype=np.int64)
        return dataclasses.replace(
            self, sums=self.sums[..., k], snow_end=self.snow_end[..., k], state_initial=self.state_initial[..., k],
            state_final=self.state_final[..., k],
            snapshots=None if self.snapshots is None else self.snapshots[..., k],
            firn_end=self.firn_end[..., k], storage_end=self.storage_end[..., k],
            storage_start=self.storage_start[..., k])

    def season_sum(self, flux: Flux, season: Season) -> np.ndarray:
        """One flux summed over one season, (scenarios, years, cells) float32, mm w.e."""
        return self.sums[season, flux]

    def year_sum(self, flux: Flux) -> np.ndarray:
        """One flux summed over the balance year, (scenarios, years, cells) float32, mm w.e."""
        return self.sums[Season.WINTER, flux] + self.sums[Season.SUMMER, flux]

    # the names the callers have always used
    acc_winter = property(lambda self: self.sums[Season.WINTER, Flux.SNOWFALL])
    acc_summer = property(lambda self: self.sums[Season.SUMMER, Flux.SNOWFALL])
    snow_melt_winter = property(lambda self: self.sums[Season.WINTER, Flux.SNOW_MELT])
    snow_melt_summer = property(lambda self: self.sums[Season.SUMMER, Flux.SNOW_MELT])
    ice_melt_winter = property(lambda self: self.sums[Season.WINTER, Flux.ICE_MELT])
    ice_melt_summer = property(lambda self: self.sums[Season.SUMMER, Flux.ICE_MELT])
    rain_winter = property(lambda self: self.sums[Season.WINTER, Flux.RAIN])
    rain_summer = property(lambda self: self.sums[Season.SUMMER, Flux.RAIN])
    swe_end = property(lambda self: self.snow_end)
    swe_initial = property(lambda self: self.state_initial[State.SNOW].astype("float32"))


# ----------------------------------------------------------------------------
# the processes: one small jitted function per published equation
# ----------------------------------------------------------------------------

@njit(inline="always", cache=True, error_model="numpy")
def degree_day_factors(ddf_snow, ddf_ice):
    """Melt factors of the classical degree-day method.

    Parameters
    ----------
    ddf_snow, ddf_ice : float
        Degree-day factors of snow and ice, mm w.e. d-1 K-1.

    Returns
    -------
    f_snow, f_ice : float
        The same factors on every cell and day, mm w.e. d-1 K-1.

    References
    ----------
    Hock, R. (2003): Temperature index melt modelling in mountain areas. J. Hydrology 282,
    104-115.
    """
    return ddf_snow, ddf_ice


@njit(inline="always", cache=True, error_model="numpy")
def hock1999_factors(melt_factor, radiation_factor_snow, radiation_factor_ice, radiation_w_m2):
    """Melt factors of the radiation-enhanced temperature index (Hock 1999, eq. 2).

    ``F = MF + a * I``: melt = F * (T - threshold) for T above the threshold.

    Parameters
    ----------
    melt_factor : float
        MF, mm w.e. d-1 K-1.
    radiation_factor_snow, radiation_factor_ice : float
        a_snow, a_ice, mm w.e. d-1 K-1 per W m-2.
    radiation_w_m2 : float
        I, daily mean potential clear-sky direct radiation at the cell, W m-2.

    Returns
    -------
    f_snow, f_ice : float
        Melt factors of snow and of ice for that cell and day, mm w.e. d-1 K-1.

    References
    ----------
    Hock, R. (1999): A distributed temperature-index ice- and snowmelt model including
    potential direct solar radiation. J. Glaciology 45(149), 101-111.
    """
    return (melt_factor + radiation_factor_snow * radiation_w_m2,
            melt_factor + radiation_factor_ice * radiation_w_m2)


@njit(inline="always", cache=True, error_model="numpy")
def snowfall_fraction(t, snow_c, rain_c, inv_span):
    """Solid share of precipitation at temperature ``t`` (deg C), linear between the thresholds.

    1 at or below ``snow_c``, 0 at or above ``rain_c``; ``inv_span`` = 1 / (rain_c - snow_c)
    (0 when the two are equal). Common practice (e.g. Hock, 1999).
    """
    f = (rain_c - t) * inv_span
    f = f if t < rain_c else 0.0
    return 1.0 if t <= snow_c else f


@njit(inline="always", cache=True, error_model="numpy")
def snow_then_ice(snow, t, threshold_c, f_snow, f_ice, inv_f_snow, ice):
    """One day of melt: the snowpack first, then glacier ice with the degree-days left.

    Parameters
    ----------
    snow : float
        Snowpack after the day's snowfall, mm w.e.
    t, threshold_c : float
        Air temperature and melt threshold, deg C.
    f_snow, f_ice : float
        Melt factors, mm w.e. d-1 K-1 (from the method's factor function).
    inv_f_snow : float
        1 / f_snow.
    ice : float
        1.0 where the surface is glacier ice, else 0.0.

    Returns
    -------
    snow_melt, ice_melt : float
        mm w.e.; the degree-days left once the snow is gone are
        ``(T - threshold) - snow / f_snow`` (common practice in temperature-index models).
    """
    # the same rule as firn over the degree-days left: one layer melts, the rest goes below
    return firn_then_ice(snow, max(t - threshold_c, 0.0), f_snow, f_ice, inv_f_snow, ice)


@njit(inline="always", cache=True, error_model="numpy")
def firn_then_ice(firn, left, f_firn, f_ice, inv_f_firn, ice):
    """Melt of firn with the degree-days ``left`` once the snow is gone, then of glacier ice.

    Parameters
    ----------
    firn : float
        Firn, mm w.e.
    left : float
        Degree-days left once the snow is gone, K d.
    f_firn, f_ice : float
        Melt factors of firn and ice, mm w.e. d-1 K-1.
    inv_f_firn : float
        1 / f_firn.
    ice : float
        1.0 on glacier surfaces, else 0.0.

    Returns
    -------
    firn_melt, ice_melt : float
        mm w.e.; as for snow, the degree-days left once the firn is gone,
        ``left - firn / f_firn``, melt ice (common practice in temperature-index models
        with a firn factor, e.g. Hock, 2003). With no firn the ice melt is exactly that of
        :func:`snow_then_ice`.
    """
    pot = f_firn * left
    fmelt = min(firn, pot)
    rest = left - firn * inv_f_firn
    rest = rest if pot > firn else 0.0
    rest = left if firn <= 0.0 else rest
    return fmelt, f_ice * rest * ice


@njit(inline="always", cache=True, error_model="numpy")
def cold_content_step(cold, pack, t, exchange, layer):
    """One day of the pack's cold content following the air below 0 C (the cold-content scheme).

    The cold content is the mass of water the pack can refreeze, mm w.e.: a pack of mass
    ``M`` (mm w.e.) at a mean ``dT`` below 0 C holds ``M * dT * c_i / L_f`` of it, with
    c_i = 2097 J kg-1 K-1 and L_f = 334 kJ kg-1 (common practice). On days below 0 C it
    relaxes towards the air's, ``target = min(M, layer) * (-T) * c_i / L_f``, by the share
    ``exchange = 1 - exp(-1 d / tau)`` of the difference (a bulk heat exchange with time
    constant tau, ``[snow] cold_exchange_days``); on days at or above 0 C it is only spent by
    refreezing; it vanishes with the pack. Only the top ``layer`` mm w.e. of the pack
    (``[snow] cold_layer_mm``, about the depth the yearly temperature wave reaches) follows
    the air: deep firn holds no cold content.

    Parameters
    ----------
    cold : float
        Cold content before the day, mm w.e.
    pack : float
        Snow + firn after the day's melt, mm w.e.
    t : float
        Air temperature, deg C.
    exchange : float
        Daily exchange share (0 turns the scheme off).
    layer : float
        Mass of the pack's top layer that follows the air, mm w.e.

    Returns
    -------
    float
        Cold content, mm w.e.
    """
    target = COLD_PER_K * min(pack, layer) * max(-t, 0.0)
    c = cold + exchange * (target - cold)
    c = c if t < 0.0 else cold
    return c if pack > 0.0 else 0.0


@njit(inline="always", cache=True, error_model="numpy")
def refreeze_and_hold(water, cold, pack, holding_fraction):
    """Refreezing as far as the cold content allows, then retention up to the holding capacity.

    Parameters
    ----------
    water : float
        Rain, meltwater and the liquid water already held, mm w.e.
    cold : float
        Cold content, mm w.e. of water it can refreeze.
    pack : float
        Snow + firn, mm w.e.
    holding_fraction : float
        Liquid water the pack holds, share of its mass (a few per cent: common practice).

    Returns
    -------
    refrozen, held, released : float
        mm w.e.; ``refrozen + held + released = water``; the refrozen water joins the pack
        (accumulation: Cogley et al., 2011, glossary), the held water stays liquid in it.
    """
    refrozen = min(water, cold)
    rest = water - refrozen
    held = min(rest, holding_fraction * (pack + refrozen))
    return refrozen, held, rest - held


# ----------------------------------------------------------------------------
# the compiled core
# ----------------------------------------------------------------------------

# named groups passed into the compiled core (numba compiles namedtuples of arrays)
CellArrays = namedtuple("CellArrays", "dz orog ice rad_values region vol wcat order")
DayArrays = namedtuple("DayArrays", "t_station p_station lapse month season year year_end "
                                    "snapshot rad_lo rad_hi rad_w_lo rad_w_hi index")
ScenarioArrays = namedtuple("ScenarioArrays", "warming precip_scale")
ParamValues = namedtuple("ParamValues", "snow_c rain_c inv_span threshold_c ddf_snow ddf_ice "
                                        "inv_ddf_snow melt_factor rad_snow rad_ice firn_share ddf_firn "
                                        "inv_ddf_firn holding exchange cold_layer firn_years n_glaciers "
                                        "want_daily weighted")
Targets = namedtuple("Targets", "state work cum sums snow_end snapshots layers firn_end storage_end daily")


#: distance between the rows of a chunk's work buffer, float64 values: a chunk plus one cache
#: line, so that rows do not start at addresses 4 KiB apart (loads would wait for unrelated
#: stores to the same low address bits, "4K aliasing": twice the time, measured)
CHUNK_STRIDE = CHUNK_CELLS + 8
# a chunk's rows: two flat float64 buffers, row r at r * CHUNK_STRIDE (constant offsets from
# one base each, so the compiler sees that the cell loop's stores do not overlap and
# vectorises it). What a chunk keeps from day to day (state and running sums) is one buffer;
# with ``carry`` it persists between calls in ``out.work``, and it is all a call moves
# through memory. The other buffer (the task's) holds the inputs and the day's fluxes.
K_STATE = 0                      #: N_STATE rows: the chunk's state (:class:`State` order)
K_RUN = K_STATE + N_STATE        #: N_SEASON * N_FLUX rows: running sums, season q flux f at
                                 #: row K_RUN + q * N_FLUX + f
K_LEN = (K_RUN + N_SEASON * N_FLUX) * CHUNK_STRIDE
W_DAY = 0                        #: N_DAY_ROWS rows: the day's fluxes (``_DAY_FLUXES`` order)
W_T = W_DAY + N_DAY_ROWS         #: station mode: z - z_station; cell mode: the day's T
W_P = W_T + 1                    #: station mode: the orographic factor; cell mode: the day's P
W_ICE = W_P + 1                  #: 1 on glacier surfaces, else 0
W_RAD = W_ICE + 1                #: the day's radiation, W m-2 (radiation method)
W_VOL = W_RAD + 1                #: area * 1e-3 (mm over the column -> m3)
W_CAT = W_VOL + 1                #: the same times the catchment weight
W_CAT_FREE = W_CAT + 1           #: the same on ice-free columns only
W_LEN = (W_CAT_FREE + 1) * CHUNK_STRIDE


@njit(parallel=True, cache=True, error_model="numpy")
def _advance(method, mode, carry, first, last, cells, days, t_block, p_block, scen, par, c_lo, c_hi,
             out, kt=0):
    """Advance cells ``c_lo .. c_hi-1`` (in ``cells.order``) over the days of ``days`` (see the
    module docstring).

    ``mode`` is STATION, CELL or CELL_ORDERED (then ``t_block``/``p_block`` are (n_days,
    n_cells) float32), or LINEAR (then ``t_block`` is the days' coefficients (n_days, K) and
    ``p_block`` the columns' basis (K, n_cells) in column order, the first ``kt`` rows for T).
    ``carry``: the chunks' work buffers persist in ``out.work`` between calls (cell mode,
    whose blocks cut years, and snow redistribution, whose calls cut the record);
    ``first`` fills them, ``last`` stores the final state in ``out.state``. Without
    ``carry`` each chunk runs the whole record in a buffer of its task.
    """
    n_chunks = (c_hi - c_lo + CHUNK_CELLS - 1) // CHUNK_CELLS
    n_tasks = (n_chunks + CHUNKS_PER_TASK - 1) // CHUNKS_PER_TASK
    n_scen = scen.warming.shape[0]
    n_days = days.month.shape[0]
    n_nodes = cells.rad_values.shape[0] if method == Method.RADIATION else 1
    # the radiation nodes the call's days use (a short call needs a few)
    need = np.zeros(n_nodes, dtype=np.bool_)
    if method == Method.RADIATION:
        for d in range(n_days):
            need[days.rad_lo[d]] = True
            need[days.rad_hi[d]] = True
    for task in prange(n_tasks):
        w = np.zeros(W_LEN)                     # the task's rows: inputs and the day's fluxes
        own = np.zeros(1 if carry else K_LEN)   # the task's kept rows (without carry)
        rad_chunk = np.zeros((n_nodes, CHUNK_CELLS))   # float64: converted once, not every day
        runs = np.empty(CHUNK_CELLS + 1, dtype=np.int64)   # the chunk's runs of one region
        cidx = np.empty(CHUNK_CELLS, dtype=np.int64)       # the chunk's columns (cells.order)
        res = np.empty(N_DAY_ROWS)                         # one run's daily sums
        for k in range(task * CHUNKS_PER_TASK, min(n_chunks, (task + 1) * CHUNKS_PER_TASK)):
            c0 = c_lo + k * CHUNK_CELLS
            m = min(CHUNK_CELLS, c_hi - c0)
            for i in range(m):
                cidx[i] = cells.order[c0 + i]
            if method == Method.RADIATION:
                # the chunk's columns of the radiation table, read at once into cache (rows lie
                # n_cells apart; read day by day they would stall the day loop)
                for j in range(n_nodes):
                    if need[j]:
                        for i in range(m):
                            rad_chunk[j, i] = cells.rad_values[j, cidx[i]]
            _fill_inputs(w, cells, m, cidx, mode)
            for s in range(n_scen):
                kk = (c0 // CHUNK_CELLS) * K_LEN
                kp = out.work[s, kk:kk + K_LEN] if carry else own
                if first or not carry:
                    _fill_kept(kp, out, s, m, cidx)
                _chunk(method, mode, cells, days, t_block, p_block, scen, par, out,
                       m, s, n_days, w, kp, rad_chunk, runs, cidx, res, c0, kt)
                if last or not carry:
                    _store_state(kp, out, s, m, cidx)


@njit(cache=True, error_model="numpy")
def _store_state(kp, out, s, m, cidx):
    """A chunk's state after its last day, back in ``out.state``."""
    for j in range(N_STATE):
        for i in range(m):
            out.state[j, s, cidx[i]] = kp[(K_STATE + j) * CHUNK_STRIDE + i]


@njit(cache=True, error_model="numpy")
def _fill_inputs(w, cells, m, cidx, mode):
    """The task's rows of a chunk's inputs (every call; a few 1-d reads per column)."""
    S = CHUNK_STRIDE
    for i in range(m):
        c = cidx[i]
        w[W_ICE * S + i] = cells.ice[c]
        w[W_VOL * S + i] = cells.vol[c]
        w[W_CAT * S + i] = cells.wcat[c]
        w[W_CAT_FREE * S + i] = cells.wcat[c] * (1.0 - cells.ice[c])
        if mode == STATION:
            w[W_T * S + i] = cells.dz[c]
            w[W_P * S + i] = cells.orog[c]


@njit(cache=True, error_model="numpy")
def _fill_kept(kp, out, s, m, cidx):
    """A chunk's kept rows before its first day: the state from ``out.state``, zero sums."""
    S = CHUNK_STRIDE
    for j in range(N_STATE):
        for i in range(m):
            kp[(K_STATE + j) * S + i] = out.state[j, s, cidx[i]]
    for r in range(N_SEASON * N_FLUX):
        for i in range(m):
            kp[(K_RUN + r) * S + i] = 0.0


@njit(inline="always", cache=True, error_model="numpy")
def _reciprocal(x):
    """1 / x to about 1e-14 relative: a float32 division (packed, cheap) refined by one
    Newton step in float64 (the packed float64 division would cost a third of the kernel)."""
    r = np.float64(np.float32(1.0) / np.float32(x))
    return r * (2.0 - x * r)


@njit(inline="always", cache=True, error_model="numpy")
def _cell_day(snow, firn, liquid, cold, t, p, f_snow, f_firn, f_ice, inv_f_snow, inv_f_firn, ice, par):
    """The processes of one cell-day after downscaling, in order: the precipitation split,
    snowfall onto the pack, melt of snow, then of firn, then of glacier ice; the cold content
    of the pack; refreezing and retention of rain and meltwater; the water released.

    A pure function of scalars (the state before the day, in :class:`State` order, the day's
    temperature ``t`` and precipitation ``p``, the melt factors, ``ice`` 1.0 on glacier
    surfaces); branch-free, so the loop over a chunk's cells that calls it compiles to packed
    SIMD code. A new process goes here.

    Returns
    -------
    state : tuple
        snow, firn, liquid, cold content after the day (:class:`State` order), mm w.e.
    fluxes : tuple
        The day's fluxes in ``_DAY_FLUXES`` order: rain, snowfall, snow melt, firn melt, ice
        melt, refreezing, water released from the snow, the firn and the ice, mm w.e.
    """
    snowfall = p * snowfall_fraction(t, par.snow_c, par.rain_c, par.inv_span)
    rain = p - snowfall
    snow = snow + snowfall
    # the degree-days left once the snow is gone (f_ice = 1 on "ice" gives them unscaled)
    snow_melt, left = snow_then_ice(snow, t, par.threshold_c, f_snow, 1.0, inv_f_snow, 1.0)
    firn_melt, ice_melt = firn_then_ice(firn, left, f_firn, f_ice, inv_f_firn, ice)
    snow -= snow_melt
    firn -= firn_melt
    pack = snow + firn
    cold = cold_content_step(cold, pack, t, par.exchange, par.cold_layer)
    water = rain + snow_melt + firn_melt + liquid
    refrozen, held, out = refreeze_and_hold(water, cold, pack, par.holding)
    snow += refrozen
    # released water by origin: firn melt leaves the firn, rain on bare ice runs off the ice
    r_firn = min(firn_melt, out)
    bare = 1.0 if snow + firn <= 0.0 else 0.0
    r_rain_ice = min(rain * bare * ice, out - r_firn)
    r_snow = out - r_firn - r_rain_ice
    r_ice = ice_melt + r_rain_ice
    return ((snow, firn, held, cold - refrozen),
            (rain, snowfall, snow_melt, firn_melt, ice_melt, refrozen, r_snow, r_firn, r_ice))


@njit(inline="always", cache=True, error_model="numpy")
def _store_day(w, kp, a0, i, state, fl, keep_day):
    """Store a cell-day's state and fluxes (:func:`_cell_day`): the state rows and the
    running sums of the season from row ``a0`` in the kept rows ``kp`` (``a0`` is a constant
    where it is called, so that every row lies at a constant offset), and with ``keep_day``
    (a constant where it is called: the daily region sums read them) the day's rows in ``w``."""
    S = CHUNK_STRIDE
    kp[(K_STATE + _SNOW) * S + i] = state[0]
    kp[(K_STATE + _FIRN) * S + i] = state[1]
    kp[(K_STATE + _LIQUID) * S + i] = state[2]
    kp[(K_STATE + _COLD_CONTENT) * S + i] = state[3]
    # the running sums, Flux by Flux, from the fluxes in _DAY_FLUXES order
    kp[(a0 + _RAIN) * S + i] += fl[0]
    kp[(a0 + _SNOWFALL) * S + i] += fl[1]
    kp[(a0 + _SNOW_MELT) * S + i] += fl[2]
    kp[(a0 + _FIRN_MELT) * S + i] += fl[3]
    kp[(a0 + _ICE_MELT) * S + i] += fl[4]
    kp[(a0 + _REFREEZING) * S + i] += fl[5]
    kp[(a0 + _REL_SNOW) * S + i] += fl[6]
    kp[(a0 + _REL_FIRN) * S + i] += fl[7]
    kp[(a0 + _REL_ICE) * S + i] += fl[8]
    if not keep_day:
        return
    # the day's rows (written out: a tuple indexed in a loop compiles to a switch, which
    # stops the vectoriser)
    w[W_DAY * S + i] = fl[0]
    w[(W_DAY + 1) * S + i] = fl[1]
    w[(W_DAY + 2) * S + i] = fl[2]
    w[(W_DAY + 3) * S + i] = fl[3]
    w[(W_DAY + 4) * S + i] = fl[4]
    w[(W_DAY + 5) * S + i] = fl[5]
    w[(W_DAY + 6) * S + i] = fl[6]
    w[(W_DAY + 7) * S + i] = fl[7]
    w[(W_DAY + 8) * S + i] = fl[8]


@njit(cache=True, fastmath=True, error_model="numpy")
def _region_sums(w, row, lo, hi, res):
    """The day's fluxes of a chunk's cells ``lo .. hi-1`` times row ``row`` of the work buffer
    (a volume factor), summed: ``res[f] = sum(w[W_DAY + f] * w[row])``, m3. Reassociated
    into packed partial sums (fastmath), so the last bits depend on the SIMD width."""
    S = CHUNK_STRIDE
    # views from 0 (a loop index that cannot be negative, so the loop vectorises)
    x = w[row * S + lo:row * S + hi]
    d0, d1, d2 = w[W_DAY * S + lo:], w[(W_DAY + 1) * S + lo:], w[(W_DAY + 2) * S + lo:]
    d3, d4, d5 = w[(W_DAY + 3) * S + lo:], w[(W_DAY + 4) * S + lo:], w[(W_DAY + 5) * S + lo:]
    d6, d7, d8 = w[(W_DAY + 6) * S + lo:], w[(W_DAY + 7) * S + lo:], w[(W_DAY + 8) * S + lo:]
    v0 = v1 = v2 = v3 = v4 = v5 = v6 = v7 = v8 = 0.0
    for k in range(x.size):
        v0 += d0[k] * x[k]
        v1 += d1[k] * x[k]
        v2 += d2[k] * x[k]
        v3 += d3[k] * x[k]
        v4 += d4[k] * x[k]
        v5 += d5[k] * x[k]
        v6 += d6[k] * x[k]
        v7 += d7[k] * x[k]
        v8 += d8[k] * x[k]
    res[0], res[1], res[2], res[3], res[4] = v0, v1, v2, v3, v4
    res[5], res[6], res[7], res[8] = v5, v6, v7, v8


@njit(inline="always", cache=True, error_model="numpy")
def _balance(kp, i):
    """Balance of cell ``i`` of a chunk from its running sums (kept rows ``kp``):
    accumulation - ablation, mm w.e.

    Accumulation = snowfall + refreezing + deposition by sliding snow; ablation = melt of
    snow, firn and ice + loss by sliding snow (the net of the two is ``REDISTRIBUTION``).
    """
    b = 0.0
    for q in range(N_SEASON):
        r = (K_RUN + q * N_FLUX) * CHUNK_STRIDE + i
        b += (kp[r + _SNOWFALL * CHUNK_STRIDE] + kp[r + _REFREEZING * CHUNK_STRIDE]
              + kp[r + _REDIST * CHUNK_STRIDE] - kp[r + _SNOW_MELT * CHUNK_STRIDE]
              - kp[r + _FIRN_MELT * CHUNK_STRIDE] - kp[r + _ICE_MELT * CHUNK_STRIDE])
    return b


@njit(inline="always", cache=True, error_model="numpy")
def _firn_turnover(layers, s, c, snow, firn, ice, n_layers):
    """The firn of one column at the end of a balance year (Cogley et al., 2011: firn is snow
    that has survived one melt season).

    ``layers[k, s, c]`` holds the firn of age k + 1 years at the last year end. The year's
    firn melt is taken from the youngest layers first (the surface); the oldest layer becomes
    glacier ice (it leaves the pack); the others age by one year and the surviving snow
    becomes the youngest layer. Ice-free columns (``ice`` = 0) keep their snow as snow.

    Returns
    -------
    snow, firn, to_ice : float
        mm w.e. after the turnover.
    """
    loss = 0.0
    for k in range(n_layers):
        loss += layers[k, s, c]
    loss -= firn
    for k in range(n_layers):
        take = min(layers[k, s, c], max(loss, 0.0))
        layers[k, s, c] -= take
        loss -= take
    to_ice = layers[n_layers - 1, s, c]
    for k in range(n_layers - 1, 0, -1):
        layers[k, s, c] = layers[k - 1, s, c]
    new = snow * ice
    layers[0, s, c] = new
    total = 0.0
    for k in range(n_layers):
        total += layers[k, s, c]
    return snow - new, total, to_ice


@njit(inline="always", cache=True, error_model="numpy")
def _day_cells(method, w, kp, a0, m, t0, lapse, p0, warm, pscale, par, keep_day):
    """One day of the chunk's ``m`` cells (``T = t0 + lapse * w[W_T] + warm``, ``P = p0 *
    w[W_P] * pscale``), the state and the season's running sums from row ``a0`` in ``kp`` (see
    :func:`_store_day`); the radiation method reads the day's radiation from ``w[W_RAD]``."""
    S = CHUNK_STRIDE
    if method == Method.DEGREE_DAY:
        f_snow, f_ice = degree_day_factors(par.ddf_snow, par.ddf_ice)
        for i in range(m):
            t = t0 + lapse * w[W_T * S + i] + warm
            p = p0 * w[W_P * S + i] * pscale
            state, fl = _cell_day(kp[(K_STATE + _SNOW) * S + i], kp[(K_STATE + _FIRN) * S + i],
                                  kp[(K_STATE + _LIQUID) * S + i], kp[(K_STATE + _COLD_CONTENT) * S + i],
                                  t, p, f_snow, par.ddf_firn, f_ice, par.inv_ddf_snow,
                                  par.inv_ddf_firn, w[W_ICE * S + i], par)
            _store_day(w, kp, a0, i, state, fl, keep_day)
    else:
        for i in range(m):
            t = t0 + lapse * w[W_T * S + i] + warm
            p = p0 * w[W_P * S + i] * pscale
            f_snow, f_ice = hock1999_factors(par.melt_factor, par.rad_snow, par.rad_ice,
                                             w[W_RAD * S + i])
            f_firn = f_snow + par.firn_share * (f_ice - f_snow)
            state, fl = _cell_day(kp[(K_STATE + _SNOW) * S + i], kp[(K_STATE + _FIRN) * S + i],
                                  kp[(K_STATE + _LIQUID) * S + i], kp[(K_STATE + _COLD_CONTENT) * S + i],
                                  t, p, f_snow, f_firn, f_ice, _reciprocal(f_snow),
                                  _reciprocal(f_firn), w[W_ICE * S + i], par)
            _store_day(w, kp, a0, i, state, fl, keep_day)


@njit(cache=True, error_model="numpy")
def _chunk(method, mode, cells, days, t_block, p_block, scen, par, out, m, s, n_days,
           w, kp, rad_chunk, runs, cidx, res, c0, kt):
    """One chunk of ``m`` columns ``cidx[:m]`` and one scenario over all days of the call
    (``w``: the task's rows, ``W_*``, inputs filled by :func:`_fill_inputs`; ``kp``: the
    chunk's kept rows, ``K_*``, filled by :func:`_fill_kept`; ``rad_chunk``: the chunk's
    columns of the radiation table; ``res``: room for one run's daily sums)."""
    CH = CHUNK_STRIDE
    # the chunk's runs of columns in one region (for the daily region sums; columns come in
    # region order, so a chunk holds few runs)
    n_runs = 0
    for i in range(m):
        if i == 0 or cells.region[cidx[i]] != cells.region[cidx[i - 1]]:
            runs[n_runs] = i
            n_runs += 1
    runs[n_runs] = m
    ice_free = par.n_glaciers
    tid = numba.get_thread_id()
    use_rad = method == Method.RADIATION
    for d in range(n_days):
        mo = days.month[d]
        warm = scen.warming[s, mo]
        pscale = scen.precip_scale[s, mo]
        q = days.season[d]
        if mode == STATION:
            # T = t0 + lapse * dz + warming, P = p0 * orog * scale (see the module docstring)
            t0, lapse, p0 = days.t_station[d], days.lapse[d], days.p_station[d]
        elif mode == LINEAR:
            # forcing made here from the day's coefficients and the chunk's basis rows (float64
            # sums); then the same expressions with t0 = 0, lapse = 1, p0 = 1 (exact)
            t0, lapse, p0 = 0.0, 1.0, 1.0
            n_basis = t_block.shape[1]
            for i in range(m):
                w[W_T * CH + i] = 0.0
                w[W_P * CH + i] = 0.0
            for k in range(n_basis):
                v = np.float64(t_block[d, k])
                row = p_block[k, c0:c0 + m]
                r0 = (W_T if k < kt else W_P) * CH
                for i in range(m):
                    w[r0 + i] += v * row[i]
        elif mode == CELL_ORDERED:
            # forcing at the cells, the chunk's columns contiguous in the block (positions
            # c0 .. c0+m-1 of the column order): the same expressions with t0 = 0, lapse = 1,
            # p0 = 1 (exact)
            t0, lapse, p0 = 0.0, 1.0, 1.0
            t_row = t_block[d, c0:c0 + m]
            p_row = p_block[d, c0:c0 + m]
            for i in range(m):
                w[W_T * CH + i] = t_row[i]
                w[W_P * CH + i] = p_row[i]
        else:
            # forcing at the cells, gathered by column
            t0, lapse, p0 = 0.0, 1.0, 1.0
            for i in range(m):
                w[W_T * CH + i] = t_block[d, cidx[i]]
                w[W_P * CH + i] = p_block[d, cidx[i]]
        if use_rad:
            r_lo, r_hi = rad_chunk[days.rad_lo[d]], rad_chunk[days.rad_hi[d]]
            w_lo, w_hi = days.rad_w_lo[d], days.rad_w_hi[d]
            for i in range(m):
                w[W_RAD * CH + i] = w_lo * r_lo[i] + w_hi * r_hi[i]
        # the season's rows at a constant offset in each branch (see _cell_day)
        # and whether the day's rows are kept, a constant in each branch (the loop without
        # them stores 13 rows per cell-day, not 22)
        if par.want_daily:
            if q == 0:
                _day_cells(method, w, kp, K_RUN, m, t0, lapse, p0, warm, pscale, par, True)
            else:
                _day_cells(method, w, kp, K_RUN + N_FLUX, m, t0, lapse, p0, warm, pscale, par, True)
        elif q == 0:
            _day_cells(method, w, kp, K_RUN, m, t0, lapse, p0, warm, pscale, par, False)
        else:
            _day_cells(method, w, kp, K_RUN + N_FLUX, m, t0, lapse, p0, warm, pscale, par, False)
        if par.want_daily:
            # the day's volumes per region (a run of columns at a time) and over the catchment
            dd = days.index[d]
            for r in range(n_runs):
                g = cells.region[cidx[runs[r]]]
                _region_sums(w, W_VOL, runs[r], runs[r + 1], res)
                for f in range(N_DAY_ROWS):
                    term = N_DAY_ROWS if (f == N_DAY_ROWS - 3 and g == ice_free) else f
                    out.daily[tid, s, dd, g, term] += res[f]
            if par.weighted:     # else: the catchment is the sum of the regions, later
                _region_sums(w, W_CAT, 0, m, res)
                for f in range(N_DAY_ROWS):
                    out.daily[tid, s, dd, ice_free + 1, f] += res[f]
                # released water of ice-free columns is ground water (RELEASED_GROUND)
                _region_sums(w, W_CAT_FREE, 0, m, res)
                out.daily[tid, s, dd, ice_free + 1, N_DAY_ROWS - 3] -= res[N_DAY_ROWS - 3]
                out.daily[tid, s, dd, ice_free + 1, N_DAY_ROWS] += res[N_DAY_ROWS - 3]
        if days.year_end[d]:
            y = days.year[d]
            if par.firn_years > 0:
                for i in range(m):
                    sn, fi, to_ice = _firn_turnover(out.layers, s, cidx[i], kp[(K_STATE + _SNOW) * CH + i],
                                                    kp[(K_STATE + _FIRN) * CH + i], w[W_ICE * CH + i],
                                                    par.firn_years)
                    kp[(K_STATE + _SNOW) * CH + i] = sn
                    kp[(K_STATE + _FIRN) * CH + i] = fi
                    kp[(K_RUN + q * N_FLUX + _FIRN_TO_ICE) * CH + i] += to_ice
            for i in range(m):
                sn = kp[(K_STATE + _SNOW) * CH + i]
                fi = kp[(K_STATE + _FIRN) * CH + i]
                out.cum[s, cidx[i]] += _balance(kp, i)
                out.snow_end[s, y, cidx[i]] = sn
                out.firn_end[s, y, cidx[i]] = fi
                out.storage_end[s, y, cidx[i]] = sn + fi + kp[(K_STATE + _LIQUID) * CH + i]
            for qq in range(N_SEASON):
                for f in range(N_FLUX):
                    r0 = (K_RUN + qq * N_FLUX + f) * CH
                    for i in range(m):
                        out.sums[qq, f, s, y, cidx[i]] = kp[r0 + i]
                        kp[r0 + i] = 0.0
        k = days.snapshot[d]
        if k >= 0:
            for i in range(m):
                out.snapshots[k, s, cidx[i]] = out.cum[s, cidx[i]] + _balance(kp, i)


# ----------------------------------------------------------------------------
# the driver
# ----------------------------------------------------------------------------

def _day_arrays(calendar: Calendar, params: KernelParams, station: StationForcing | None,
                radiation, snapshot_days: list[int]) -> DayArrays:
    n_days = calendar.n_days
    month0 = np.asarray(calendar.month, dtype=np.int64) - 1
    lapse = np.asarray(params.lapse_rate_k_per_m, dtype="float64")
    if lapse.shape != (12,):
        raise ValueError("params.lapse_rate_k_per_m needs twelve monthly values")
    year = np.ascontiguousarray(calendar.year_index, dtype=np.int64)
    year_end = np.ones(n_days, dtype=np.bool_)
    if n_days > 1:
        year_end[:-1] = year[1:] != year[:-1]
    snap = np.full(n_days, -1, dtype=np.int64)
    for i, k in enumerate(snapshot_days):
        if k > 0:
            snap[k - 1] = i
    if station is not None:
        t_st = np.ascontiguousarray(station.temperature_c, dtype="float64")
        p_st = np.ascontiguousarray(station.precipitation_mm, dtype="float64")
    else:
        t_st = p_st = np.zeros(n_days)
    if radiation is not None:
        lo, hi, w = radiation.node_weights(np.asarray(calendar.day_of_year))
        scale = float(radiation.scale_w_m2)
        w = np.asarray(w, dtype="float64")
        w_lo, w_hi = (1.0 - w) * scale, w * scale     # weights with the storage scale folded in
    else:
        lo = hi = np.zeros(n_days, dtype=np.int64)
        w_lo = w_hi = np.zeros(n_days)
    season = np.where(np.asarray(calendar.winter, bool), int(Season.WINTER), int(Season.SUMMER))
    return DayArrays(t_station=t_st, p_station=p_st, lapse=np.ascontiguousarray(lapse[month0]),
                     month=np.ascontiguousarray(month0), season=season.astype(np.int64), year=year,
                     year_end=year_end, snapshot=snap,
                     rad_lo=np.ascontiguousarray(lo, dtype=np.int64),
                     rad_hi=np.ascontiguousarray(hi, dtype=np.int64),
                     rad_w_lo=np.ascontiguousarray(w_lo), rad_w_hi=np.ascontiguousarray(w_hi),
                     index=np.arange(n_days, dtype=np.int64))


def _param_values(params: KernelParams, n_glaciers: int = 1, want_daily: bool = False,
                  weighted: bool = True) -> ParamValues:
    span = params.rain_c - params.snow_c

    def inv(x):
        return 1.0 / x if x != 0 else np.inf
    on = params.refreezing != "none"
    ddf_firn = params.ddf_snow + params.firn_share * (params.ddf_ice - params.ddf_snow)
    return ParamValues(snow_c=float(params.snow_c), rain_c=float(params.rain_c),
                       inv_span=1.0 / span if span > 0 else 0.0,
                       threshold_c=float(params.threshold_c), ddf_snow=float(params.ddf_snow),
                       ddf_ice=float(params.ddf_ice), inv_ddf_snow=float(inv(params.ddf_snow)),
                       melt_factor=float(params.melt_factor),
                       rad_snow=float(params.radiation_factor_snow),
                       rad_ice=float(params.radiation_factor_ice), firn_share=float(params.firn_share),
                       ddf_firn=float(ddf_firn), inv_ddf_firn=float(inv(ddf_firn)),
                       holding=float(params.holding_fraction) if on else 0.0,
                       exchange=float(-np.expm1(-1.0 / params.cold_days)) if on else 0.0,
                       cold_layer=float(params.cold_layer_mm),
                       firn_years=int(params.firn_years), n_glaciers=int(n_glaciers),
                       want_daily=bool(want_daily), weighted=bool(weighted))


def _slice_days(days: DayArrays, a: int, b: int) -> DayArrays:
    return DayArrays(*(np.ascontiguousarray(v[a:b]) for v in days))


def _slide_boundaries(calendar: Calendar, every: int) -> list[int]:
    """Day boundaries k (before day k) at which snow slides: every ``every`` days and before the
    last day of each balance year (so each year's sums close with the snow moved)."""
    n = calendar.n_days
    year = np.asarray(calendar.year_index)
    last = [int(k) for k in np.flatnonzero(np.r_[year[1:] != year[:-1], True])]
    ks = set(range(every, n, every)) | set(last)
    return sorted(k for k in ks if 0 < k < n)


SlideBuffers = namedtuple("SlideBuffers", "column_cell cell_ptr cell_share cell_where cell_snow cell_firn "
                                          "before change exported busy")

#: cells (or columns) of one scenario that a task of the slide's gather and scatter takes
SLIDE_TASK = 4096


def _slide_buffers(slide: Slide, n_scen: int, n_cells: int, where: np.ndarray) -> SlideBuffers:
    """The arrays every call of :func:`_slide` of a run fills (made once per run, not per call;
    ``change`` and ``exported`` are zero between calls), and the share and work-buffer place
    (``where``) of each cell's columns in ascending column order (``[cell_ptr[c]:cell_ptr[c +
    1]]``), so the cells can be gathered in parallel, each cell's sum made in the order of a
    pass over the columns."""
    def cells():
        return np.zeros((n_scen, n_cells))
    col = np.ascontiguousarray(slide.column_cell, dtype=np.int64)
    ptr = np.zeros(n_cells + 1, dtype=np.int64)
    np.cumsum(np.bincount(col, minlength=n_cells), out=ptr[1:])
    by_cell = np.argsort(col, kind="stable")
    share = np.asarray(slide.column_share, dtype="float64")
    return SlideBuffers(col, ptr, np.ascontiguousarray(share[by_cell]), np.ascontiguousarray(where[by_cell]),
                        cells(), cells(), cells(), cells(), cells(), np.zeros(n_scen, dtype=np.bool_))


def _slide(slide: Slide, buf: SlideBuffers, out: Targets, season: int, where: np.ndarray) -> float:
    """Move snow between cells at a day boundary (:func:`firnline.snowslide.redistribute`) and
    share each cell's change back to its columns; returns the time spent, s.

    A cell's snow is the share-weighted sum of its columns'; a gain adds the same mm to each
    column of the cell, a loss takes the same fraction of each column's snow (and the export
    in proportion), so every column keeps the cell's budget. Firn is immobile and fills the
    holding capacity first. The columns' state and sums are read and written in the chunks'
    work buffers (``where``: each column's place in them); the gather and the scatter run in
    parallel tasks of :data:`SLIDE_TASK` cells or columns. A scenario with no cell over its
    holding capacity moves nothing, and is done once its cells' snow is known.
    """
    import time

    from . import snowslide
    t0 = time.perf_counter()
    n_cells = buf.cell_snow.shape[1]
    over = np.zeros((buf.busy.size, -(-n_cells // SLIDE_TASK)), dtype=np.bool_)
    _gather_cells(buf.cell_ptr, buf.cell_share, buf.cell_where, out.work, slide.routing.holding_mm,
                  buf.cell_snow, buf.cell_firn, buf.before, over)
    np.any(over, axis=1, out=buf.busy)
    if buf.busy.any():
        snowslide.redistribute(slide.routing, buf.cell_snow, change=buf.change, exported=buf.exported,
                               immobile=buf.cell_firn)
        _scatter_columns(buf.column_cell, out.work, where, season, buf.before, buf.change, buf.exported,
                         buf.busy)
        _clear_cells(buf.change, buf.exported, buf.busy)
    return time.perf_counter() - t0


@njit(parallel=True, cache=True, error_model="numpy")
def _gather_cells(ptr, share, where, work, holding, cell_snow, cell_firn, before, over):
    """Share-weighted snow and firn of each cell from its columns (scenarios x cells), added in
    column order, and a copy of the snow in ``before``; ``over[s, task]``: whether a cell of the
    task holds more than its capacity (the test of the transport)."""
    n_scen, n_cells = cell_snow.shape
    n_tasks = over.shape[1]
    for task in prange(n_scen * n_tasks):
        sc = task // n_tasks
        c0 = (task % n_tasks) * SLIDE_TASK
        flag = False
        for c in range(c0, min(n_cells, c0 + SLIDE_TASK)):
            sn = 0.0
            fi = 0.0
            for t in range(ptr[c], ptr[c + 1]):
                sn += share[t] * work[sc, where[t] + (K_STATE + _SNOW) * CHUNK_STRIDE]
                fi += share[t] * work[sc, where[t] + (K_STATE + _FIRN) * CHUNK_STRIDE]
            cell_snow[sc, c] = sn
            cell_firn[sc, c] = fi
            before[sc, c] = sn
            if sn + fi > holding[c]:
                flag = True
        over[sc, task % n_tasks] = flag


@njit(parallel=True, cache=True, error_model="numpy")
def _scatter_columns(col, work, where, season, before, change, exported, busy):
    """Each cell's change by sliding back to its columns (see :func:`_slide`), with the
    season's REDISTRIBUTION and EXPORTED sums of each column; the ``busy`` scenarios only,
    in parallel tasks of columns (each column writes only its own rows)."""
    snow_row = (K_STATE + _SNOW) * CHUNK_STRIDE
    redist_row = (K_RUN + season * N_FLUX + _REDIST) * CHUNK_STRIDE
    export_row = (K_RUN + season * N_FLUX + _EXPORTED) * CHUNK_STRIDE
    n_tasks = (col.size + SLIDE_TASK - 1) // SLIDE_TASK
    for task in prange(work.shape[0] * n_tasks):
        sc = task // n_tasks
        if not busy[sc]:
            continue
        j0 = (task % n_tasks) * SLIDE_TASK
        for j in range(j0, min(col.size, j0 + SLIDE_TASK)):
            c = col[j]
            ch = change[sc, c]
            ex = exported[sc, c]
            if ch == 0.0 and ex == 0.0:
                continue
            at = where[j]
            if ch < 0.0:
                b = before[sc, c]
                frac = work[sc, at + snow_row] / b if b > 0.0 else 0.0
                ch *= frac
                ex *= frac
            work[sc, at + snow_row] = max(work[sc, at + snow_row] + ch, 0.0)
            work[sc, at + redist_row] += ch
            work[sc, at + export_row] += ex


@njit(parallel=True, cache=True, error_model="numpy")
def _clear_cells(change, exported, busy):
    """Zero ``change`` and ``exported`` of the busy scenarios for the next call."""
    n_scen, n_cells = change.shape
    n_tasks = (n_cells + SLIDE_TASK - 1) // SLIDE_TASK
    for task in prange(n_scen * n_tasks):
        sc = task // n_tasks
        if busy[sc]:
            c0 = (task % n_tasks) * SLIDE_TASK
            for c in range(c0, min(n_cells, c0 + SLIDE_TASK)):
                change[sc, c] = 0.0
                exported[sc, c] = 0.0


def run_kernel(cells: Cells, calendar: Calendar, forcing, params: KernelParams,
               scenarios: Scenarios | None = None, snapshot_days: Sequence[int] | None = None,
               progress: Callable[[int], None] | None = None, slide: Slide | None = None,
               daily: bool = True) -> KernelResult:
    """Run the daily balance over a record (every year in one :class:`KernelResult`; see
    :func:`run_kernel_years` for blocks of years).

    Parameters
    ----------
    cells : Cells
        Per-column inputs (elevation, glacier ice, radiation table, region, area, catchment
        weight).
    calendar : Calendar
        Per-day calendar.
    forcing : StationForcing or CellForcing
        Station mode (downscaled here) or cell mode (``block(a, b) -> (t, p)``); see the
        module docstring.
    params : KernelParams
    scenarios : Scenarios, optional
        Default: one scenario with no change.
    snapshot_days : sequence of int, optional
        Day boundaries k (0..n_days) at which to record the cumulative balance of every
        cell after k days (for balances over arbitrary periods).
    progress : callable, optional
        Called with the number of days done (in station mode, the share of cells done
        times the number of days) after each step.
    slide : Slide, optional
        Gravitational snow redistribution between days (either forcing mode); none without it.
    daily : bool
        Keep the daily region sums (:attr:`KernelResult.daily`).

    Returns
    -------
    KernelResult
    """
    return next(run_kernel_years(cells, calendar, forcing, params, scenarios, snapshot_days, progress, slide,
                                 daily))


def region_area_sums(region: np.ndarray, area_m2: np.ndarray, weight: np.ndarray | None, n_regions: int):
    """The exact sums (:mod:`firnline.exact`) of the daily-sum regions' areas, m2, keyed by region:
    each region's columns (``region`` < ``n_regions - 1``) and, under key ``n_regions - 1``, the
    catchment (every column, times its ``weight``; None: 1). They merge exactly, so areas summed
    slice by slice or unit by unit (:func:`firnline.tiles.region_areas`) are those of one pass."""
    from . import exact

    area = np.asarray(area_m2, dtype="float64")
    catchment = area if weight is None else area * np.asarray(weight, dtype="float64")
    region = np.asarray(region, dtype=np.int64)
    inside = region < n_regions - 1
    return exact.merge([exact.of_repeated(region[inside], area[inside]), exact.of_repeated(n_regions - 1, catchment)])


def region_areas(region: np.ndarray, area_m2: np.ndarray, weight: np.ndarray | None, n_regions: int) -> np.ndarray:
    """Areas of the daily-sum regions, m2 (:func:`region_area_sums`, the catchment last): a function
    of the columns, not of their order."""
    from . import exact

    return exact.dense(region_area_sums(region, area_m2, weight, n_regions), n_regions)


def run_kernel_years(cells: Cells, calendar: Calendar, forcing, params: KernelParams,
                     scenarios: Scenarios | None = None, snapshot_days: Sequence[int] | None = None,
                     progress: Callable[[int], None] | None = None, slide: Slide | None = None,
                     daily: bool = True, year_edges: Sequence[int] | None = None) -> Iterator[KernelResult]:
    """Run the daily balance over a record, one block of balance years at a time.

    Takes the arguments of :func:`run_kernel`, and ``year_edges``: ascending balance-year
    indices 0 = e0 < e1 < ... < en = ``calendar.n_years`` (default ``[0, n_years]``, one
    block). Yields one :class:`KernelResult` per block ``e(k) .. e(k+1) - 1``, made as the
    record reaches its end: the per-year arrays, ``daily`` and ``year_days`` hold the block's
    years and days only (``first_year`` is ``e(k)``), ``state_initial`` / ``storage_start``
    are the state / storage at the block's start and ``state_final`` the state at its end; the
    snapshots come with the last block. The state, the firn layers and the chunks' work
    buffers carry over from block to block, so every value equals that of one call over the
    whole record bit for bit, and a caller that drops each block after use holds one block of
    years, not all of them.
    """
    scenarios = scenarios if scenarios is not None else Scenarios.uniform()
    n = cells.n
    ns = scenarios.n
    n_days = calendar.n_days
    n_years = calendar.n_years
    station = forcing if isinstance(forcing, StationForcing) else None
    if station is None and not hasattr(forcing, "block"):
        raise TypeError("forcing must be a StationForcing or have a block(a, b) method")
    method = params.code
    if method == Method.RADIATION and cells.radiation is None:
        raise ValueError("the radiation method needs a radiation table")
    snaps = sorted(set(int(k) for k in snapshot_days)) if snapshot_days is not None else []
    if any(k < 0 or k > n_days for k in snaps):
        raise ValueError("snapshot days must lie within 0..n_days")

    z = np.ascontiguousarray(cells.z_m, dtype="float64")
    if station is not None:
        dz = z - float(station.elevation_m)
        orog = params.precip_factor * np.maximum(0.0, 1.0 + params.precip_gradient_per_m * dz)
    else:
        dz = orog = np.zeros(n)
    rad = cells.radiation if method == Method.RADIATION else None
    rad_values = rad.values if rad is not None else np.zeros((1, n), dtype="float32")
    area = np.ones(n) if cells.area_m2 is None else np.asarray(cells.area_m2, dtype="float64")
    weight = np.ones(n) if cells.catchment_weight is None else np.asarray(cells.catchment_weight, dtype="float64")
    if area.shape != (n,) or weight.shape != (n,):
        raise ValueError("Cells.area_m2 and Cells.catchment_weight need one value per column")
    region = cells.region_ids()
    ice = np.ascontiguousarray(cells.ice, dtype=np.bool_).astype("float64")
    cell_arrays = CellArrays(dz=dz, orog=np.ascontiguousarray(orog), ice=ice,
                             rad_values=np.ascontiguousarray(rad_values), region=region,
                             vol=np.ascontiguousarray(area * 1e-3),
                             wcat=np.ascontiguousarray(area * 1e-3 * weight),
                             # columns handed out in region order (few region runs per chunk
                             # for the daily sums); results are stored at each column's place
                             order=cells.column_order())
    days = _day_arrays(calendar, params, station, rad, snaps)
    n_regions = cells.n_regions
    weighted = bool(np.any(weight != 1.0))
    par = _param_values(params, cells.n_glaciers, daily, weighted)
    scen = ScenarioArrays(warming=scenarios.warming_k, precip_scale=scenarios.precip_scale)

    edges_y = [0, n_years] if year_edges is None else [int(e) for e in year_edges]
    if edges_y[0] != 0 or edges_y[-1] != n_years or len(edges_y) < 2 \
            or (n_years and any(b <= a for a, b in zip(edges_y[:-1], edges_y[1:]))):
        raise ValueError(f"year_edges must rise from 0 to the calendar's {n_years} balance years")
    year = np.asarray(calendar.year_index, dtype=np.int64)
    if np.any(np.diff(year) < 0):
        raise ValueError("the calendar's balance-year index must not decrease")
    day_edges = np.searchsorted(year, edges_y, side="left")
    day_edges[-1] = n_days
    region_area = region_areas(region, area, weight, n_regions)
    year_days_all = np.bincount(year, minlength=n_years)

    state = np.zeros((N_STATE, ns, n), dtype="float64")
    carry = station is None or slide is not None
    n_threads = numba.get_num_threads()
    out = Targets(state=state,
                  work=np.zeros((ns, -(-n // CHUNK_CELLS) * K_LEN) if carry else (1, 1)),
                  cum=np.zeros((ns, n)),
                  sums=None, snow_end=None,
                  snapshots=np.zeros((max(len(snaps), 1), ns, n)),
                  layers=np.zeros((max(int(params.firn_years), 1), ns, n) if params.firn_years else (1, 1, 1)),
                  firn_end=None, storage_end=None, daily=None)
    # a snapshot at boundary 0 is the zero balance before the first day (already zero)
    storage_start = np.zeros((ns, n))
    # the record's day boundaries of the whole call (cell blocks, slides), cut into the blocks
    plan = _plan(station, forcing, cell_arrays, n, ns, n_days, slide, calendar) if n and n_days else None
    for k in range(len(edges_y) - 1):
        y0, y1 = edges_y[k], edges_y[k + 1]
        d0, d1 = int(day_edges[k]), int(day_edges[k + 1])
        ny_b, nd_b = y1 - y0, d1 - d0
        out = out._replace(sums=np.zeros((N_SEASON, N_FLUX, ns, ny_b, n), dtype="float32"),
                           snow_end=np.zeros((ns, ny_b, n), dtype="float32"),
                           firn_end=np.zeros((ns, ny_b, n), dtype="float32"),
                           storage_end=np.zeros((ns, ny_b, n)),
                           daily=np.zeros((n_threads, ns, nd_b, n_regions, N_DAILY) if daily else (1, 1, 1, 1, 1)))
        state_initial = out.state.copy()
        slide_s = 0.0
        if n and nd_b:
            block_days = _slice_days(days, d0, d1)
            block_days = block_days._replace(year=np.ascontiguousarray(block_days.year - y0),
                                             index=np.ascontiguousarray(block_days.index - d0))
            with numba.parallel_chunksize(TASK_CHUNKSIZE):
                slide_s = _drive(method, station, forcing, cell_arrays, block_days, scen, par, out, n, n_days,
                                 progress, slide, plan, d0, d1)
        daily_sums = None
        if daily:
            daily_sums = out.daily.sum(axis=0)
            if not weighted:    # every catchment weight is 1: the catchment is the sum of the regions
                daily_sums[:, :, n_regions - 1] = daily_sums[:, :, :n_regions - 1].sum(axis=2)
        last = k == len(edges_y) - 2
        res = KernelResult(sums=out.sums, snow_end=out.snow_end, state_initial=state_initial,
                           state_final=out.state if last else out.state.copy(),
                           snapshots=out.snapshots if (snaps and last) else None,
                           year_days=year_days_all[y0:y1], firn_end=out.firn_end, storage_end=out.storage_end,
                           storage_start=storage_start, daily=daily_sums,
                           region_area_m2=region_area, slide_seconds=slide_s, first_year=y0)
        if ny_b:
            storage_start = out.storage_end[:, -1].copy()
        out = out._replace(sums=None, snow_end=None, firn_end=None, storage_end=None, daily=None)
        if last:        # the record is done: its working arrays go before the caller uses the block
            out = plan = cell_arrays = days = None
            z = dz = orog = ice = area = weight = region = None
        yield res


Plan = namedtuple("Plan", "edges slides cell_mode lin where buf")


def _plan(station, forcing, cell_arrays, n, n_scen, n_days, slide, calendar) -> Plan:
    """The day boundaries of a whole call (the record): where the driver cuts the days (cell
    blocks, changes of the linear forcing's days, slides), the days before which snow slides,
    the forcing mode and the slide's buffers; the same for every block of years, so blocks
    cut the record where one call over it would, plus at their own edges."""
    edges = {0, n_days}
    cell_mode = CELL
    lin = None
    if station is None:
        step = max(1, min(CELL_BLOCK_DAYS, CELL_BLOCK_BYTES // (8 * n)))
        edges |= set(range(0, n_days, step))
        given = getattr(forcing, "column_order", None)
        if given is not None:
            if not np.array_equal(np.asarray(given), cell_arrays.order):
                raise ValueError("forcing.column_order must equal Cells.column_order() of the kernel's cells")
            cell_mode = CELL_ORDERED
            lin = forcing.linear() if hasattr(forcing, "linear") else None
    if lin is not None:
        coef, basis, kt, full = lin
        coef = np.ascontiguousarray(coef, dtype="float32")
        basis = np.ascontiguousarray(basis, dtype="float32")
        full = np.asarray(full, dtype=bool)
        if coef.shape != (n_days, basis.shape[0]) or basis.shape[1] != n or full.shape != (n_days,) \
                or not 0 < int(kt) < basis.shape[0]:
            raise ValueError("forcing.linear() must give coef (n_days, K), basis (K, n_cells), 0 < kt < K "
                             "and full (n_days,)")
        edges |= {k for k in range(1, n_days) if full[k] != full[k - 1]}
        lin = (coef, basis, kt, full)
    slides = set(_slide_boundaries(calendar, int(slide.every_days))) if slide is not None else set()
    where = buf = None
    if slide is not None or station is None:
        # each column's place in the chunks' work buffers (see _advance)
        pos = np.empty(n, dtype=np.int64)
        pos[cell_arrays.order] = np.arange(n)
        where = (pos // CHUNK_CELLS) * K_LEN + pos % CHUNK_CELLS
    if slide is not None:
        buf = _slide_buffers(slide, n_scen, int(slide.routing.n_cells), where)
    return Plan(sorted(edges | slides), slides, cell_mode, lin, where, buf)


def _drive(method, station, forcing, cell_arrays, days, scen, par, out, n, n_days, progress,
           slide, plan: Plan, d0: int, d1: int) -> float:
    """The Python-level loop over the record's days ``d0 .. d1-1`` (``days`` holds those days):
    groups of cells over the days (station mode), or segments of days over all cells with the
    state carried between them (cell mode, and any mode with snow redistribution, which moves
    snow between cells at the segments' boundaries). The state is in ``out.state`` after the
    last day.

    Returns the time spent redistributing snow, s.
    """
    unused = np.zeros((1, 1), dtype="float32")
    if station is not None and slide is None:
        for c_lo in range(0, n, GROUP_CELLS):
            c_hi = min(n, c_lo + GROUP_CELLS)
            _advance(int(method), STATION, False, True, True, cell_arrays, days, unused, unused, scen, par,
                     c_lo, c_hi, out)
            if progress is not None:
                progress(int(d0 + (d1 - d0) * c_hi // n))
        return 0.0
    edges = sorted({d0, d1} | {e for e in plan.edges if d0 < e < d1})
    slide_s = 0.0
    lin = plan.lin
    for a, b in zip(edges[:-1], edges[1:]):
        if a in plan.slides:
            slide_s += _slide(slide, plan.buf, out, int(days.season[a - d0]), plan.where)
        local = _slice_days(days, a - d0, b - d0)
        first, last = a == 0, b == d1
        if lin is not None and lin[3][a]:
            coef, basis, kt, _ = lin
            _advance(int(method), LINEAR, True, first, last, cell_arrays, local,
                     np.ascontiguousarray(coef[a:b]), basis, scen, par, 0, n, out, int(kt))
        elif station is None:
            t, p = forcing.block(a, b)
            t = np.ascontiguousarray(t, dtype="float32")
            p = np.ascontiguousarray(p, dtype="float32")
            if t.shape != (b - a, n) or p.shape != (b - a, n):
                raise ValueError(f"forcing.block({a}, {b}) must return two ({b - a}, {n}) arrays")
            _advance(int(method), plan.cell_mode, True, first, last, cell_arrays, local,
                     t, p, scen, par, 0, n, out)
        else:
            _advance(int(method), STATION, True, first, last, cell_arrays, local,
                     unused, unused, scen, par, 0, n, out)
        if progress is not None:
            progress(b)
    return slide_s
