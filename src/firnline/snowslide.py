"""Gravitational snow redistribution: snow on steep slopes slides down to where it can rest.

The scheme is the mass-conserving transport of Gruber (2007) with the slope-dependent
holding depth of Bernhardt & Schulz (2010):

* Gruber, S. (2007): A mass-conserving fast algorithm to parameterize gravitational
  transport and deposition using digital elevation models. Water Resources Research 43,
  W06412. Cells are processed once, from the highest to the lowest; each cell keeps what
  it can hold of its own snow plus what arrived from above, and passes the rest on to
  its lower neighbours, so a cell's gain from above is always handled before its own
  excess moves on, and nothing is created or lost.
* Bernhardt, M. & Schulz, K. (2010): SnowSlide: A simple routine for calculating
  gravitational snow transport. Geophysical Research Letters 37, L11502. The snow
  holding depth of a slope, from memory::

      SHD = 3178.4 * slope_deg ** -1.998      [m of snow depth]

  (about 0.9 m at 60 deg, 1.3 m at 50 deg, 2 m at 40 deg, 5.1 m at 25 deg).

What is implemented here (the variant and its parameters)
---------------------------------------------------------
Routing (:func:`build_routing`, a pure function of the DEM, computed once and cached):

* ``scheme = "steepest"`` (the default, the single-direction form used by SnowSlide):
  the excess goes to the one neighbour of the eight with the steepest descent, i.e. the
  largest drop per distance ``(z - z_n) / d`` (``d`` = the cell width, height, or the
  diagonal for corner neighbours).
* ``scheme = "multiple"``: the excess is shared by every lower neighbour with weights
  proportional to ``((z - z_n) / d) ** exponent`` (the multiple-flow-direction form of
  Freeman, 1991, Computers & Geosciences 17; Gruber, 2007 shares mass among all lower
  neighbours in this way, from memory; ``exponent`` 1.1 after Freeman).

Receivers are strictly lower, so sorting the cells by elevation (highest first, ties
by cell index) processes every donor before its receivers.

Edges and nodata. A neighbour beyond the DEM edge or on a nodata cell has no elevation;
it gets one by continuing the DEM linearly through the cell: a missing side neighbour
mirrors the opposite one (``2 z - z_opposite``; ``z`` if that is missing too), a missing
corner neighbour is ``z_row + z_col - z`` from the two side neighbours that share its
row and column (each known or mirrored). Where that virtual neighbour is the steepest
descent (``"steepest"``), or for its share (``"multiple"``), the snow leaves the modelled
area: it is **exported**, counted per cell, never lost. A slope that runs off the edge
thus sheds its excess off the edge; a flat edge, or an edge along the fall line, keeps it.

Holding capacity (mm w.e.). The holding depth is a snow *depth*; it becomes a mass with
one stated bulk density of the snowpack, ``holding_mm = SHD * snow_density_kg_m3``
(1 kg m-2 = 1 mm w.e.; common practice), default 250 kg m-3 (a settled seasonal
snowpack, commonly 200-400 kg m-3 over a winter: common practice, from memory). On
gentle slopes the formula explodes (15 m at 15 deg, infinite at 0 deg); cells flatter
than ``min_slide_slope_deg`` (default 25 deg: slab avalanches rarely release on slopes
gentler than about 25-30 deg, common practice, from memory) hold any amount. Cells with
no lower neighbour and no export (pits, flat ground) hold any amount as well: they are
where the snow comes to rest. An unlimited capacity is stored as ``inf``. The slope is
the Horn (1981) slope of :func:`firnline.terrain.slope_aspect`.

Transport (:func:`redistribute`): one pass over the precomputed order per call and per
scenario, O(cells), in numba. See DEVELOPERS.md ("Gravitational snow redistribution")
for when the kernel calls it and what it passes.

Per-cell order rule: every per-cell array here follows the run's order of the valid
cells, the row-major flat indices ``np.flatnonzero(valid.ravel())`` (ascending), as
``Setup.cells`` does; ``position`` means an index into that order.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
from numba import njit, prange

from . import jit  # noqa: F401  (numba's threading layer and vector width, before compiling)

#: Version of the routing built here; part of every cache key of a routing.
ALGORITHM_VERSION = 1

#: Bernhardt & Schulz (2010) holding depth: SHD = A * slope_deg ** B, m of snow (from memory).
SHD_COEFFICIENT_M = 3178.4
SHD_EXPONENT = -1.998

#: Defaults of the scheme (declared with their sources in :mod:`firnline.parameters`).
DEFAULT_SNOW_DENSITY_KG_M3 = 250.0
DEFAULT_MIN_SLIDE_SLOPE_DEG = 25.0
#: Exponent of the multiple-flow-direction weights (Freeman, 1991).
DEFAULT_MFD_EXPONENT = 1.1

SCHEMES = ("steepest", "multiple")

#: receiver index meaning "off the DEM edge or into nodata" (exported)
EXPORT = -1
#: receiver index of a subset (:func:`subset`) meaning "a valid cell outside the subset": the snow
#: leaves the subset (the sender's change) but is not exported, as in the run of every cell
LEAVE = -2

# the eight neighbours (row offset, column offset); row 0 is the north edge
_OFFSETS = ((-1, -1), (-1, 0), (-1, 1), (0, -1), (0, 1), (1, -1), (1, 0), (1, 1))


def holding_depth_m(slope_deg):
    """Snow holding depth of a slope by Bernhardt & Schulz (2010), m of snow depth.

    SHD = 3178.4 * slope_deg ** -1.998 (from memory); infinite at 0 deg.

    Parameters
    ----------
    slope_deg : array_like
        Slope angle, degrees (0..90).

    Returns
    -------
    ndarray float64
        Holding depth, m; ``inf`` where the slope is 0 (or NaN).
    """
    s = np.asarray(slope_deg, dtype="float64")
    with np.errstate(divide="ignore", invalid="ignore"):
        out = SHD_COEFFICIENT_M * np.power(s, SHD_EXPONENT)
    return np.where(np.isfinite(out) & (s > 0), out, np.inf)


def holding_capacity_mm(slope_deg, snow_density_kg_m3: float = DEFAULT_SNOW_DENSITY_KG_M3,
                        min_slide_slope_deg: float = DEFAULT_MIN_SLIDE_SLOPE_DEG):
    """Snow a slope can hold, mm w.e.: the holding depth times the snow density.

    Parameters
    ----------
    slope_deg : array_like
        Slope angle, degrees.
    snow_density_kg_m3 : float
        Bulk density of the snowpack that turns the holding depth (m) into a mass
        (kg m-2 = mm w.e.; common practice).
    min_slide_slope_deg : float
        Slopes gentler than this hold any amount (``inf``).

    Returns
    -------
    ndarray float64
        mm w.e.; ``inf`` on slopes below ``min_slide_slope_deg``, at 0 deg and on NaN.
    """
    s = np.asarray(slope_deg, dtype="float64")
    cap = holding_depth_m(s) * float(snow_density_kg_m3)
    return np.where(np.nan_to_num(s, nan=0.0) >= float(min_slide_slope_deg), cap, np.inf)


@dataclass(frozen=True)
class Routing:
    """The precomputed routing of one DEM (from :func:`build_routing`; cached with the terrain).

    Attributes
    ----------
    order : ndarray (n_cells,) int32
        Positions of the cells (into the run's valid-cell order), highest first.
    recv_ptr : ndarray (n_cells + 1,) int32
        Receivers of the ``k``-th cell of ``order`` are ``recv_pos[recv_ptr[k]:recv_ptr[k+1]]``
        (in processing order, not in cell order); cells that never release (unlimited
        capacity) have none.
    recv_pos : ndarray (n_links,) int32
        Position of each receiver, or :data:`EXPORT` (-1) for off the DEM edge / into nodata.
    recv_weight : ndarray (n_links,) float32
        Share of the donor's excess for each receiver (sum 1 per donor; the last receiver
        takes the exact remainder, so transport conserves mass whatever the rounding).
    holding_mm : ndarray (n_cells,) float32
        Holding capacity per cell (cell order), mm w.e.; ``inf`` = holds any amount.
    scheme : str
        ``"steepest"`` or ``"multiple"``.
    exponent : float
        Weight exponent of ``"multiple"`` (unused by ``"steepest"``).
    snow_density_kg_m3, min_slide_slope_deg : float
        The holding-capacity parameters it was built with.
    """

    order: np.ndarray
    recv_ptr: np.ndarray
    recv_pos: np.ndarray
    recv_weight: np.ndarray
    holding_mm: np.ndarray
    scheme: str
    exponent: float
    snow_density_kg_m3: float
    min_slide_slope_deg: float

    @property
    def n_cells(self) -> int:
        return int(self.order.size)

    def exporting(self) -> np.ndarray:
        """Boolean (n_cells,) in cell order: cells whose excess leaves (partly) off the DEM or into nodata."""
        out = np.zeros(self.n_cells, dtype=bool)
        counts = np.diff(self.recv_ptr)
        donor = np.repeat(self.order, counts)
        out[donor[self.recv_pos == EXPORT]] = True
        return out

    @functools.cached_property
    def holding_in_order(self) -> np.ndarray:
        """``holding_mm`` in processing order (float32), read sequentially by the transport."""
        return np.ascontiguousarray(self.holding_mm[self.order])

    @functools.cached_property
    def step_of(self) -> np.ndarray:
        """Processing step of each cell (int32, cell order): the inverse of ``order``."""
        step = np.empty(self.n_cells, dtype=np.int32)
        step[self.order] = np.arange(self.n_cells, dtype=np.int32)
        return step

    @functools.cached_property
    def recv_step(self) -> np.ndarray:
        """Processing step of each receiver (int32, like ``recv_pos``), :data:`EXPORT` for exports."""
        pos = self.recv_pos
        return np.where(pos >= 0, self.step_of[np.maximum(pos, 0)], pos).astype(np.int32)

    def can_release(self) -> np.ndarray:
        """Boolean (n_cells,) in cell order: cells that pass excess snow on (finite capacity)."""
        return np.isfinite(self.holding_mm)


def build_routing(elevation: np.ndarray, valid: np.ndarray, cell_size_m, slope_deg: np.ndarray,
                  snow_density_kg_m3: float = DEFAULT_SNOW_DENSITY_KG_M3,
                  min_slide_slope_deg: float = DEFAULT_MIN_SLIDE_SLOPE_DEG,
                  scheme: str = "steepest", exponent: float = DEFAULT_MFD_EXPONENT) -> Routing:
    """Routing order, receivers, weights and holding capacities of a DEM (see the module docstring).

    Parameters
    ----------
    elevation : ndarray (ny, nx)
        Elevation, m, north-up (row 0 at the north); values off ``valid`` are ignored.
    valid : ndarray (ny, nx) bool
        Modelled cells.
    cell_size_m : (float, float)
        Cell width (x, east) and height (y, north), m.
    slope_deg : ndarray (ny, nx)
        Horn (1981) slope, degrees (:func:`firnline.terrain.slope_aspect`).
    snow_density_kg_m3 : float
        Density that turns the holding depth into mm w.e.
    min_slide_slope_deg : float
        Cells flatter than this hold any amount.
    scheme : {"steepest", "multiple"}
        Single steepest-descent receiver, or all lower neighbours (Freeman 1991 weights).
    exponent : float
        Exponent of the ``"multiple"`` weights (> 0).

    Returns
    -------
    Routing
    """
    if scheme not in SCHEMES:
        raise ValueError(f"scheme must be one of {SCHEMES}; got {scheme!r}")
    if scheme == "multiple" and not exponent > 0:
        raise ValueError("exponent of the multiple-flow-direction weights must be > 0")
    valid = np.asarray(valid, dtype=bool)
    ny, nx = valid.shape
    dx, dy = (float(v) for v in cell_size_m)
    cells = np.flatnonzero(valid.ravel())
    n = cells.size
    if n >= np.iinfo(np.int32).max // 9:
        raise ValueError("too many cells for int32 routing arrays")
    zc = np.asarray(elevation).ravel()[cells].astype("float64")
    pos_pad = np.full((ny + 2, nx + 2), EXPORT, dtype=np.int32)
    inner = pos_pad[1:-1, 1:-1]
    inner[valid] = np.arange(n, dtype=np.int32)
    slope = np.asarray(slope_deg).ravel()
    # the links of each cell, block by block in cell order (every step is per cell, so the
    # blocks give the values of one pass over all cells, bit for bit); then put in
    # processing order
    counts = np.zeros(n, dtype=np.int32)
    links_pos, links_weight = [], []
    holding = np.empty(n, dtype=np.float32)
    for a in range(0, n, ROUTING_BLOCK_CELLS):
        b = min(n, a + ROUTING_BLOCK_CELLS)
        keep, recv, weight, hold = _block_links(pos_pad, zc, cells[a:b], a, nx, dx, dy,
                                                slope[cells[a:b]], snow_density_kg_m3,
                                                min_slide_slope_deg, scheme, exponent)
        holding[a:b] = hold
        counts[a:b] = keep.sum(axis=1)
        links_pos.append(recv[keep])
        links_weight.append(weight[keep].astype(np.float32))
    del pos_pad, inner, cells, slope
    recv_cell = np.concatenate(links_pos) if links_pos else np.empty(0, np.int32)
    weight_cell = np.concatenate(links_weight) if links_weight else np.empty(0, np.float32)
    del links_pos, links_weight
    np.negative(zc, out=zc)                                 # highest first (no negated copy)
    order = np.argsort(zc, kind="stable").astype(np.int32)
    del zc
    first = np.zeros(n + 1, dtype=np.int32)                 # each cell's first link (cell order)
    np.cumsum(counts, out=first[1:])
    del counts
    ptr, recv_pos, recv_weight = _links_in_order(order, first, recv_cell, weight_cell)
    return Routing(order=order, recv_ptr=ptr, recv_pos=recv_pos, recv_weight=recv_weight,
                   holding_mm=holding, scheme=scheme,
                   exponent=float(exponent) if scheme == "multiple" else 0.0,
                   snow_density_kg_m3=float(snow_density_kg_m3),
                   min_slide_slope_deg=float(min_slide_slope_deg))


#: cells whose links :func:`build_routing` makes at once (about 400 bytes of temporaries each)
ROUTING_BLOCK_CELLS = 1 << 18


@njit(cache=True)
def _links_in_order(order, first, recv_cell, weight_cell):
    """The links of the cells (``first[c] .. first[c + 1] - 1`` of ``recv_cell`` / ``weight_cell``
    for cell ``c``) put in processing order ``order``: each step's first link ``ptr`` and the
    links' receivers and weights, copied with no temporary of the links' size."""
    n = order.size
    ptr = np.zeros(n + 1, dtype=np.int32)
    recv = np.empty(recv_cell.size, dtype=np.int32)
    weight = np.empty(weight_cell.size, dtype=np.float32)
    j = 0
    for k in range(n):
        c = order[k]
        for i in range(first[c], first[c + 1]):
            recv[j] = recv_cell[i]
            weight[j] = weight_cell[i]
            j += 1
        ptr[k + 1] = j
    return ptr, recv, weight


def _block_links(pos_pad, zc, cells, a, nx, dx, dy, slope_c, snow_density_kg_m3, min_slide_slope_deg,
                 scheme, exponent):
    """The receivers of the cells ``cells`` (flat indices; positions ``a ..`` in the run's order)
    out of their eight neighbours (see :func:`build_routing`): ``keep`` (m, 8) which links
    exist, ``recv`` (m, 8) int32 their positions, ``weight`` (m, 8) float64 their shares, and the
    cells' holding capacities (float32, ``inf`` for cells that never release)."""
    n = cells.size
    zb = zc[a:a + n]
    r, c = np.divmod(cells, nx)
    base = (r + 1) * (nx + 2) + (c + 1)
    flat = pos_pad.ravel()
    # position of the (dr, dc) neighbour of every cell, EXPORT off the DEM or on nodata
    nbr = {off: flat[base + off[0] * (nx + 2) + off[1]] for off in _OFFSETS}
    del r, c, base

    def known(p):
        return np.where(p >= 0, zc[np.maximum(p, 0)], np.nan)

    # elevation along each axis; a missing neighbour continues the line from the opposite one
    axis = {}
    for d in (-1, 1):
        for kind, off in (("row", (d, 0)), ("col", (0, d))):
            here = known(nbr[off])
            there = known(nbr[-off[0], -off[1]])
            mirror = np.where(np.isfinite(there), 2.0 * zb - there, zb)
            axis[kind, d] = np.where(np.isfinite(here), here, mirror)

    tan = np.empty((n, 8))
    recv = np.empty((n, 8), dtype=np.int32)
    for k, (dr, dc) in enumerate(_OFFSETS):
        p = nbr[dr, dc]
        if dr and dc:
            virtual = axis["row", dr] + axis["col", dc] - zb
        else:
            virtual = axis["row", dr] if dr else axis["col", dc]
        zn = np.where(p >= 0, zc[np.maximum(p, 0)], virtual)
        tan[:, k] = (zb - zn) / np.hypot(dc * dx, dr * dy)
        recv[:, k] = p
    del nbr, axis
    lower = tan > 0.0
    if scheme == "steepest":
        best = np.argmax(np.where(lower, tan, -np.inf), axis=1)
        keep = np.zeros_like(lower)
        rows = np.arange(n)
        keep[rows, best] = lower[rows, best]
        weight = keep.astype("float64")
    else:
        keep = lower
        weight = np.where(keep, np.power(np.where(keep, tan, 1.0), float(exponent)), 0.0)
    total = weight.sum(axis=1)
    has_receiver = total > 0
    weight /= np.where(has_receiver, total, 1.0)[:, None]
    holding = holding_capacity_mm(np.asarray(slope_c, dtype="float64"), snow_density_kg_m3, min_slide_slope_deg)
    holding = np.where(has_receiver, holding, np.inf).astype(np.float32)
    keep &= np.isfinite(holding)[:, None]        # cells that never release need no links
    return keep, recv, weight, holding


@njit(cache=True, inline="always")
def _reach_step(order, ptr, recv, reach, k):
    # the cell of processing step k is reached when one of its receivers is
    i = order[k]
    if reach[i]:
        return
    for j in range(ptr[k], ptr[k + 1]):
        if recv[j] >= 0 and reach[recv[j]]:
            reach[i] = True
            return


@njit(cache=True)
def _reach_up(order, ptr, recv, reach, last):
    # lowest first: receivers are settled; a cell below every target (a step after ``last``, the
    # lowest target's) sends only to cells below it, so none of them is reached
    for k in range(last, -1, -1):
        _reach_step(order, ptr, recv, reach, k)


@njit(cache=True)
def _reach_up_within(order, ptr, recv, reach, steps):
    # as _reach_up over the given processing steps only (ascending), lowest first
    for s in range(steps.size - 1, -1, -1):
        _reach_step(order, ptr, recv, reach, steps[s])


def upslope_steps(routing: Routing, targets: np.ndarray) -> np.ndarray:
    """The processing steps (ascending, int32) of the cells upslope of ``targets``
    (:func:`upslope`): the ``within`` of :func:`upslope` for any part of the targets."""
    return np.sort(routing.step_of[np.flatnonzero(upslope(routing, targets))])


def upslope(routing: Routing, targets: np.ndarray, within: np.ndarray | None = None) -> np.ndarray:
    """Cells whose snow can slide onto any of ``targets`` (the targets included).

    Parameters
    ----------
    routing : Routing
    targets : ndarray (n_cells,) bool, or positions (int)
    within : ndarray of int, optional
        Processing steps (ascending) that hold every cell upslope of the targets, such as
        :func:`upslope_steps` of cells that include them (a unit, for its parts): only those
        steps are searched, not every step of the DEM. The result is the same.

    Returns
    -------
    ndarray (n_cells,) bool
        The contributing area of the targets: a run restricted to these cells
        (:func:`subset`) redistributes snow onto the targets exactly as the full run does.
    """
    t = np.asarray(targets)
    reach = np.zeros(routing.n_cells, dtype=bool)
    if t.dtype == bool:
        reach[:] = t
    else:
        reach[t] = True
    steps = routing.step_of[np.flatnonzero(reach) if t.dtype == bool else t]
    if not steps.size:
        return reach
    last = int(steps.max())
    if within is None:
        _reach_up(routing.order, routing.recv_ptr, routing.recv_pos, reach, last)
    else:
        within = np.asarray(within)
        within = within[:np.searchsorted(within, last, side="right")]
        _reach_up_within(routing.order, routing.recv_ptr, routing.recv_pos, reach, within)
    return reach


def subset(routing: Routing, positions) -> Routing:
    """The routing of some cells (ascending positions), as for ``Setup.select``.

    Order, links and capacities are kept; snow sent to a valid cell outside the subset
    leaves it (:data:`LEAVE`: the sender's change and the total :func:`redistribute` returns)
    without counting as exported, so each cell's ``change`` and ``exported`` are those of the
    run of every cell. Exact for the cells of the subset when it holds every cell upslope of
    them (:func:`upslope`).
    """
    sub = np.asarray(positions, dtype=np.int64)
    if sub.size > 1 and np.any(np.diff(sub) <= 0):
        raise ValueError("subset takes ascending, distinct positions")
    # the subset's processing steps, in processing order (work over the subset only: a unit of
    # a tiled run does not pass over every cell of the DEM; Routing.step_of is made once)
    steps = np.sort(routing.step_of[sub].astype(np.int64))
    first = routing.recv_ptr[steps].astype(np.int64)         # the steps' links only, not a copy of all
    counts = routing.recv_ptr[steps + 1].astype(np.int64) - first
    links = np.repeat(first, counts) + (np.arange(counts.sum()) - np.repeat(
        np.cumsum(counts) - counts, counts))
    ptr = np.zeros(steps.size + 1, dtype=np.int32)
    np.cumsum(counts, out=ptr[1:])
    pos = routing.recv_pos[links]
    return Routing(order=_renumber(sub, routing.order[steps]).astype(np.int32), recv_ptr=ptr,
                   recv_pos=np.where(pos >= 0, _renumber(sub, np.maximum(pos, 0)), pos).astype(np.int32),
                   recv_weight=routing.recv_weight[links], holding_mm=routing.holding_mm[sub],
                   scheme=routing.scheme, exponent=routing.exponent,
                   snow_density_kg_m3=routing.snow_density_kg_m3,
                   min_slide_slope_deg=routing.min_slide_slope_deg)


def _renumber(sub: np.ndarray, pos: np.ndarray) -> np.ndarray:
    """The index in ``sub`` (ascending positions) of each of ``pos``, or :data:`LEAVE` where a
    position is not in ``sub``."""
    if sub.size == 0:
        return np.full(np.shape(pos), LEAVE, dtype=np.int64)
    lo, hi = int(sub[0]), int(sub[-1])
    # a table over the subset's span (a unit's rows, and those upslope of it: 40 MB for the 1e7
    # cells of 1024 rows of a 10000-column DEM) rather than a binary search of every position
    if hi - lo < 16 * sub.size + (1 << 24):
        table = np.full(hi - lo + 1, LEAVE, dtype=np.int32 if sub.size < 2**31 else np.int64)
        table[sub - lo] = np.arange(sub.size)
        inside = (pos >= lo) & (pos <= hi)
        return np.where(inside, table[np.clip(pos - lo, 0, hi - lo)], LEAVE)
    at = np.minimum(np.searchsorted(sub, pos), sub.size - 1)
    return np.where(sub[at] == pos, at, LEAVE)


# ----------------------------------------------------------------------------
# transport: one pass per scenario over the precomputed order
# ----------------------------------------------------------------------------

@njit(cache=True, nogil=True)
def _one_pass(snow, immobile, use_immobile, order, ptr, recv_step, weight, holding,
              holding_in_order, change, exported, accumulate):
    """Transport of one scenario (1-D arrays over cells) in place; returns the amount exported.

    With ``accumulate``, ``change`` gets each cell's after - before added and ``exported``
    what it sent off the DEM (both unused otherwise). A sequential sweep in cell
    order looks for a cell over capacity (none: done, nothing allocated). Otherwise the
    snow is gathered into processing order, the cells are handled highest first in one
    sequential scan (a receiver is only slightly lower, so its slot is only a little
    further on in that order and stays in cache), and the snow is scattered back.
    """
    n = snow.size
    busy = False
    for i in range(n):
        held = snow[i] + immobile[i] if use_immobile else snow[i]
        if held > holding[i]:
            busy = True
            break
    if not busy:
        return 0.0
    mass = np.empty(n)                        # snow, then snow + arrivals, by processing step
    for k in range(n):
        mass[k] = snow[order[k]]
    total_export = 0.0
    for k in range(n):
        if ptr[k] == ptr[k + 1]:
            continue                          # holds any amount
        cap = np.float64(holding_in_order[k])
        if use_immobile:
            cap = max(cap - immobile[order[k]], 0.0)
        if mass[k] <= cap:
            continue
        excess = mass[k] - cap
        mass[k] = cap
        left = excess
        last = ptr[k + 1] - 1
        for j in range(ptr[k], ptr[k + 1]):
            share = left if j == last else excess * np.float64(weight[j])
            left -= share
            r = recv_step[j]
            if r < 0:                         # EXPORT, or LEAVE (to a cell outside a subset)
                if accumulate and r == EXPORT:
                    exported[order[k]] += share
                total_export += share
            else:
                mass[r] += share
    for k in range(n):
        i = order[k]
        if mass[k] != snow[i]:
            if accumulate:
                change[i] += mass[k] - snow[i]
            snow[i] = mass[k]
    return total_export


@njit(cache=True, parallel=True)
def _transport(snow, immobile, use_immobile, order, ptr, recv_step, weight, holding,
               holding_in_order, change, exported, accumulate):
    """Scenarios in parallel, one pass each (see :func:`_one_pass`)."""
    n_scen = snow.shape[0]
    out = np.zeros(n_scen)
    for sc in prange(n_scen):
        im = immobile[sc] if use_immobile else immobile[0]
        ch = change[sc] if accumulate else change[0]
        ex = exported[sc] if accumulate else exported[0]
        out[sc] = _one_pass(snow[sc], im, use_immobile, order, ptr, recv_step, weight, holding,
                            holding_in_order, ch, ex, accumulate)
    return out


def redistribute(routing: Routing, snow: np.ndarray, change: np.ndarray | None = None,
                 exported: np.ndarray | None = None, immobile: np.ndarray | None = None):
    """Move the snow above each cell's holding capacity down the slope, in place (one pass).

    Cells are taken from the highest to the lowest (:attr:`Routing.order`); each keeps
    ``min(snow + arrived, capacity)`` and passes the rest to its receivers (or exports it
    off the DEM / into nodata). Strictly mass conserving: for each scenario
    ``sum(snow before) == sum(snow after) + exported`` to float64 rounding.

    Parameters
    ----------
    routing : Routing
        From :func:`build_routing` (or the cache) for the same cells.
    snow : ndarray (n_cells,) or (n_scen, n_cells) float64, C-contiguous
        Movable snow of each cell, mm w.e. over the whole cell area, in the run's cell
        order. **Updated in place.** The caller passes the snow of the cell (for a cell
        modelled as a glacier and an ice-free column, the area-weighted sum of the two
        columns' snow) and shares the change back.
    change : ndarray like ``snow`` float64, optional
        Accumulator: the net change of each cell (gain +, loss -, including its export)
        is **added** to it, mm w.e. (for ``redistribution_<year>.tif``).
    exported : ndarray like ``snow`` float64, optional
        Accumulator: the amount each cell sent off the DEM edge or into nodata is
        **added** to it, mm w.e. (for ``exported_mm`` of ``water_budget.csv``).
    immobile : ndarray like ``snow`` float64, optional
        Mass that does not move but fills the holding capacity first (for example firn),
        mm w.e.: a cell keeps at most ``max(capacity - immobile, 0)`` of movable snow.

    Returns
    -------
    float or ndarray (n_scen,)
        Snow exported off the DEM / into nodata by this call (on a :func:`subset`, also what
        it sent to cells outside the subset), mm w.e. summed over cells (one number for a
        1-D ``snow``).

    Notes
    -----
    The per-cell exchange with other valid cells is ``change + exported`` (it sums to 0
    over all cells); a region's ``redistribution_in`` / ``redistribution_out`` are the sums
    of its positive and negative parts (see DEVELOPERS.md).
    """
    one = snow.ndim == 1
    s2 = snow.reshape(1, -1) if one else snow
    n = routing.n_cells
    if s2.dtype != np.float64 or not s2.flags.c_contiguous or s2.ndim != 2 or s2.shape[1] != n:
        raise ValueError(f"snow must be a C-contiguous float64 array of {n} cells (or n_scen x {n})")

    def _acc(a, name):
        if a is None:
            return None
        a2 = a.reshape(1, -1) if a.ndim == 1 else a
        if a2.shape != s2.shape or a2.dtype != np.float64 or not a2.flags.c_contiguous:
            raise ValueError(f"{name} must be a C-contiguous float64 array shaped like snow")
        return a2

    ch, ex, im = _acc(change, "change"), _acc(exported, "exported"), _acc(immobile, "immobile")
    if (ch is None) != (ex is None):           # both or neither accumulate in the pass
        ch = np.zeros(s2.shape) if ch is None else ch
        ex = np.zeros(s2.shape) if ex is None else ex
    accumulate = ch is not None
    dummy = np.zeros((1, 1))
    r = routing
    args = (r.order, r.recv_ptr, r.recv_step, r.recv_weight, r.holding_mm, r.holding_in_order)
    if s2.shape[0] == 1:       # one scenario: no thread start-up
        total = np.array([_one_pass(s2[0], (im if im is not None else dummy)[0], im is not None, *args,
                                    (ch if accumulate else dummy)[0], (ex if accumulate else dummy)[0],
                                    accumulate)])
    else:
        total = _transport(s2, im if im is not None else dummy, im is not None, *args,
                           ch if accumulate else dummy, ex if accumulate else dummy, accumulate)
    return float(total[0]) if one else total
