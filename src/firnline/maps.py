"""Balance maps (matplotlib, Agg canvas, PNG; no tiles from the network).

A map shows one *view* (the catchment, or one glacier with a margin) for one
*period* (a balance year, or the record mean): three panels side by side, the
annual, winter and summer balance, each over a hillshade of the DEM, with the
glacier outlines, the ELA as a contour line on the annual panel, a diverging
colour scale centred on zero in m w.e., a scale bar, a north arrow and the
coordinates of the grid's CRS on the axes.

Choices
-------
* Colours: ColorBrewer's RdBu (red: mass loss, blue: gain), a diverging scale that
  stays readable with the common colour-vision deficiencies (ColorBrewer 2.0,
  Brewer 2003, "colorblind safe"; from memory). The limits are symmetric about
  zero and shared by every period and season of a view, so maps compare at a
  glance; values beyond the limits show in the end colours (the colour bar is
  extended).
* Hillshade: matplotlib's ``LightSource`` (light from the north-west, 45 degrees up).
* Size: a map draws at most :data:`MAX_MAP_CELLS` cells along its longer side; a
  larger view is reduced by block means (NaN-aware) before drawing, so a map of a
  big DEM never holds more than a screen's worth of pixels.
* North arrow: it points to true north, found by moving a small step north in
  longitude/latitude from the view's centre and projecting back (grid north and
  true north differ by the meridian convergence).
* Views (:func:`plan_views`): the catchment map (the extent of the valid DEM) is
  always drawn and shows every glacier. A glacier gets a map of its own only where
  that shows more than the catchment map can: when the catchment map had to be
  reduced (more than :data:`MAX_MAP_CELLS` cells across), the glacier's own map
  would be reduced less, it spans at least :data:`MIN_DETAIL_CELLS` cells and it
  covers under half the catchment map's width; at most :data:`MAX_DETAIL_VIEWS` of
  them, the largest first. Small glaciers and small catchments are seen in the
  catchment map, drawn at the DEM's full resolution.
"""

from __future__ import annotations

import io
import math
import warnings
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
from matplotlib import patheffects
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.collections import LineCollection
from matplotlib.colors import LightSource, Normalize
from matplotlib.figure import Figure
from matplotlib.patches import Rectangle
from matplotlib.ticker import FuncFormatter, MaxNLocator

MAX_MAP_CELLS = 400
"""Most cells drawn along the longer side of one map panel (about its width in pixels)."""

MIN_DETAIL_CELLS = 20
"""Fewest cells along a glacier's longer side for a map of its own."""

MAX_DETAIL_VIEWS = 12
"""Most glaciers with a map of their own (the largest by area)."""

CMAP = "RdBu"
_HALO = [patheffects.withStroke(linewidth=2.5, foreground="white")]       # readable on dark relief
_HALO_LINE = [patheffects.withStroke(linewidth=3.2, foreground="white")]
SEASONS = (("annual_balance", "annual balance"), ("winter_balance", "winter balance"),
           ("summer_balance", "summer balance"))


@dataclass
class View:
    """A map extent: rows ``r0:r1`` and columns ``c0:c1`` of the grid."""

    key: str            # used in file names: "catchment" or a glacier's slug
    title: str
    r0: int
    r1: int
    c0: int
    c1: int
    glaciers: list = field(default_factory=list)   # 1-based ids drawn with ELA lines


def slug(text: str) -> str:
    """A file-name-safe version of a glacier name."""
    s = "".join(c if c.isalnum() or c in "-_" else "_" for c in str(text).strip())
    return s.strip("_") or "glacier"


def _bbox(mask: np.ndarray):
    rows = np.flatnonzero(mask.any(axis=1))
    cols = np.flatnonzero(mask.any(axis=0))
    return int(rows[0]), int(rows[-1]) + 1, int(cols[0]), int(cols[-1]) + 1


def _pad(r0, r1, c0, c1, shape, frac=0.12, least=3):
    pr = max(least, int(round((r1 - r0) * frac)))
    pc = max(least, int(round((c1 - c0) * frac)))
    return max(0, r0 - pr), min(shape[0], r1 + pr), max(0, c0 - pc), min(shape[1], c1 + pc)


def plan_views(valid: np.ndarray, id_map: np.ndarray, names: Sequence[str], areas_km2: Sequence[float],
               site: str) -> list[View]:
    """The catchment view and the glaciers that get a view of their own (see the module notes)."""
    n = len(names)
    glacier_cells = id_map > 0
    base = glacier_cells if glacier_cells.any() else valid
    r0, r1, c0, c1 = _pad(*_bbox(valid if valid.any() else base), valid.shape, frac=0.0, least=0)
    views = [View("catchment", f"{site}: all glaciers" if n > 1 else str(site), r0, r1, c0, c1,
                  list(range(1, n + 1)))]
    span = max(r1 - r0, c1 - c0)
    step_catchment = max(1, math.ceil(span / MAX_MAP_CELLS))
    order = sorted(range(n), key=lambda k: -float(areas_km2[k]))
    for k in order:
        m = id_map == k + 1
        if not m.any() or len(views) > MAX_DETAIL_VIEWS:
            continue
        g0, g1, h0, h1 = _pad(*_bbox(m), valid.shape)
        side = max(g1 - g0, h1 - h0)
        step = max(1, math.ceil(side / MAX_MAP_CELLS))
        shown = side / step_catchment          # cells the catchment map gives it along its longer side
        if step < step_catchment and side >= MIN_DETAIL_CELLS and shown < 0.5 * MAX_MAP_CELLS:
            key = slug(names[k])
            if key in {v.key for v in views}:
                key = f"{key}_{k + 1}"
            views.append(View(key, str(names[k]), g0, g1, h0, h1, [k + 1]))
    return views


def block_reduce(a: np.ndarray, step: int) -> np.ndarray:
    """NaN-aware block mean of a 2D array over ``step`` x ``step`` blocks (edges padded)."""
    if step <= 1:
        return a
    ny, nx = a.shape
    py, px = (-ny) % step, (-nx) % step
    b = np.pad(a.astype("float64"), ((0, py), (0, px)), constant_values=np.nan)
    b = b.reshape(b.shape[0] // step, step, b.shape[1] // step, step)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)   # all-NaN blocks stay NaN
        return np.nanmean(b, axis=(1, 3))


def nice_length(target_m: float) -> float:
    """1, 2 or 5 times a power of ten, not above ``target_m``."""
    e = 10 ** math.floor(math.log10(target_m))
    for f in (5, 2, 1):
        if f * e <= target_m:
            return f * e
    return e


def _length_label(m: float) -> str:
    return f"{m / 1000:g} km" if m >= 1000 else f"{m:g} m"


def true_north(crs, x: float, y: float) -> tuple[float, float]:
    """Unit vector (dx, dy) in the grid of ``crs`` pointing to true north at (x, y)."""
    from pyproj import CRS, Transformer
    c = CRS.from_user_input(crs.to_wkt() if hasattr(crs, "to_wkt") else crs)
    try:
        to_ll = Transformer.from_crs(c, c.geodetic_crs, always_xy=True)
        lon, lat = to_ll.transform(x, y)
        x2, y2 = to_ll.transform(lon, min(lat + 0.01, 89.9), direction="INVERSE")
        dx, dy = x2 - x, y2 - y
        n = math.hypot(dx, dy)
        return (dx / n, dy / n) if n > 0 and math.isfinite(n) else (0.0, 1.0)
    except Exception:  # a CRS without a geodetic base: grid north
        return (0.0, 1.0)


@dataclass
class MapData:
    """What the maps need from a run (arrays on the full grid)."""

    elevation: np.ndarray          # (ny, nx) m, NaN on nodata
    id_map: np.ndarray             # (ny, nx) int, 0 = no glacier
    x: np.ndarray                  # (nx,) cell centres
    y: np.ndarray                  # (ny,)
    cell_size_m: tuple
    crs: object
    crs_label: str
    names: list
    outlines: list                 # shapely geometries in the grid's CRS (or None)


class BalanceMaps:
    """Draw the maps of one view for any number of periods, reusing the figure.

    The figure, hillshades, outlines, scale bar and north arrow are built once per
    view; each period only swaps the balance images and the ELA lines (which keeps the
    cost of a map to rendering and PNG encoding).
    """

    def __init__(self, data: MapData, view: View, vmax: float, site: str):
        self.data, self.view = data, view
        span = max(view.r1 - view.r0, view.c1 - view.c0)
        self.step = max(1, math.ceil(span / MAX_MAP_CELLS))
        s = self.step
        win = (slice(view.r0, view.r1), slice(view.c0, view.c1))
        z = block_reduce(data.elevation[win], s)
        dx, dy = data.cell_size_m
        xs, ys = data.x[view.c0:view.c1], data.y[view.r0:view.r1]
        half_x, half_y = abs(dx) / 2, abs(dy) / 2
        x0 = xs.min() - half_x          # west edge
        y1 = ys.max() + half_y          # north edge; the block-reduced grid may reach past the others
        self.extent = (x0, x0 + z.shape[1] * s * abs(dx), y1 - z.shape[0] * s * abs(dy), y1)
        ls = LightSource(azdeg=315, altdeg=45)
        zf = np.where(np.isfinite(z), z, np.nanmin(z) if np.isfinite(z).any() else 0.0)
        shade = ls.hillshade(zf, dx=abs(dx) * s, dy=abs(dy) * s)
        shade = np.ma.array(shade, mask=~np.isfinite(z))
        aspect_ratio = (self.extent[3] - self.extent[2]) / max(self.extent[1] - self.extent[0], 1e-9)
        panel_w = 3.6
        panel_h = min(max(panel_w * aspect_ratio, 1.8), 5.0)
        fig_h = panel_h + 1.15
        self.fig = Figure(figsize=(3 * panel_w + 1.2, fig_h), dpi=100)
        FigureCanvasAgg(self.fig)
        top = 1 - 0.6 / fig_h
        bottom = 0.5 / fig_h
        self.fig.subplots_adjust(left=0.075, right=0.915, top=top, bottom=bottom, wspace=0.06)
        self.axes = self.fig.subplots(1, 3, sharex=True, sharey=True)
        self.norm = Normalize(-vmax, vmax)
        self.images = []
        self.overlays: list[list] = []      # per panel: artists drawn above the balance image
        for i, ax in enumerate(self.axes):
            ax.set_facecolor("#f4f4f0")
            ax.imshow(shade, cmap="gray", vmin=0, vmax=1, extent=self.extent, interpolation="bilinear")
            im = ax.imshow(np.full(z.shape, np.nan), cmap=CMAP, norm=self.norm, extent=self.extent,
                           interpolation="nearest", alpha=0.85)
            self.images.append(im)
            self.overlays.append(self._outlines(ax))
            ax.set_xlim(self.extent[0], self.extent[1])
            ax.set_ylim(self.extent[2], self.extent[3])
            ax.set_aspect("equal")
            ax.xaxis.set_major_locator(MaxNLocator(3))
            ax.yaxis.set_major_locator(MaxNLocator(4))
            fmt = FuncFormatter(lambda v, _: f"{v:.0f}")
            ax.xaxis.set_major_formatter(fmt)
            ax.yaxis.set_major_formatter(fmt)
            ax.tick_params(labelsize=7)
            ax.set_xlabel(f"easting (m), {data.crs_label}", fontsize=7.5)
        self.axes[0].set_ylabel(f"northing (m), {data.crs_label}", fontsize=7.5)
        for lab in self.axes[0].get_yticklabels():
            lab.set_rotation(90)
            lab.set_va("center")
        self.overlays[0] += self._scale_bar(self.axes[0]) + self._north_arrow(self.axes[0])
        cax = self.fig.add_axes((0.93, bottom + 0.05, 0.012, top - bottom - 0.1))
        cb = self.fig.colorbar(self.images[0], cax=cax, extend="both")
        cb.set_label("balance (m w.e.)", fontsize=8)
        cb.ax.tick_params(labelsize=7)
        self.titles = [ax.set_title("", fontsize=9, loc="left") for ax in self.axes]
        self.suptitle = self.fig.suptitle("", x=0.075, y=1 - 0.08 / fig_h, ha="left", va="top", fontsize=10.5)
        self.ela_artists = []
        self.site = site
        # draw the static part once (blitting): everything but the artists that change per
        # period, and those that must lie above them, is kept as a background bitmap
        for a in [*self.images, *self.titles, self.suptitle, *(x for o in self.overlays for x in o)]:
            a.set_animated(True)
        self.canvas = self.fig.canvas
        self.canvas.draw()
        self.background = self.canvas.copy_from_bbox(self.fig.bbox)

    def _outlines(self, ax) -> list:
        import shapely
        segs = []
        tol = abs(self.data.cell_size_m[0]) * self.step * 0.5
        x0, x1, y0, y1 = self.extent
        box = shapely.box(x0, y0, x1, y1)
        for g in self.data.outlines:
            if g is None or not g.intersects(box):
                continue
            g = shapely.simplify(g, tol) if self.step > 1 else g
            for ring in shapely.get_parts(shapely.boundary(g)):
                for part in shapely.get_parts(ring):
                    segs.append(np.asarray(part.coords)[:, :2])
        return [ax.add_collection(LineCollection(segs, colors="0.1", linewidths=0.7, zorder=3))]

    def _scale_bar(self, ax) -> list:
        x0, x1, y0, y1 = self.extent
        length = nice_length((x1 - x0) / 4)
        bx, by = x0 + 0.05 * (x1 - x0), y0 + 0.05 * (y1 - y0)
        h = 0.012 * (y1 - y0) + 1e-9
        return [ax.add_patch(Rectangle(
            (bx, by), length / 2, h, facecolor="black", edgecolor="black", lw=0.6, zorder=5)),
            ax.add_patch(Rectangle(
                (bx + length / 2, by), length / 2, h, facecolor="white", edgecolor="black", lw=0.6, zorder=5)),
            ax.text(bx + length / 2, by + 2.2 * h, _length_label(length), ha="center", va="bottom", fontsize=7,
                    zorder=5, bbox=dict(facecolor="white", alpha=0.7, lw=0, pad=1))]

    def _north_arrow(self, ax) -> list:
        x0, x1, y0, y1 = self.extent
        ux, uy = true_north(self.data.crs, 0.5 * (x0 + x1), 0.5 * (y0 + y1))
        ax_x, ax_y = 0.92, 0.80
        L = 0.11
        aspect = (x1 - x0) / max(y1 - y0, 1e-9)   # axes fractions are not isotropic in map units
        dxf, dyf = ux * L / aspect, uy * L
        n = math.hypot(dxf, dyf) / L
        dxf, dyf = dxf / n, dyf / n
        arrow = ax.annotate("", xy=(ax_x + dxf / 2, ax_y + dyf / 2), xytext=(ax_x - dxf / 2, ax_y - dyf / 2),
                    xycoords="axes fraction", arrowprops=dict(arrowstyle="-|>", color="black", lw=1.2,
                                                              path_effects=_HALO_LINE), zorder=6)
        label = ax.text(ax_x + dxf / 2, ax_y + dyf / 2 + 0.02, "N", transform=ax.transAxes, ha="center",
                        va="bottom", fontsize=8, fontweight="bold", zorder=6, path_effects=_HALO)
        return [arrow, label]

    def draw(self, period_label: str, seasons: dict[str, np.ndarray],
             ela_lines: dict[int, list[np.ndarray]], ela_text: str = "") -> bytes:
        """PNG bytes of the map for one period.

        seasons : {"annual_balance"|"winter_balance"|"summer_balance": m w.e.}, maps of the whole
            grid (ny, nx) or of the view's window only
        ela_lines : {glacier id: polylines} drawn on the annual panel
        """
        v, s = self.view, self.step
        win = (slice(v.r0, v.r1), slice(v.c0, v.c1))
        for im, (var, label), title in zip(self.images, SEASONS, self.titles):
            a = seasons[var]
            a = a if a.shape == (v.r1 - v.r0, v.c1 - v.c0) else a[win]
            im.set_data(np.ma.masked_invalid(block_reduce(a, s)))
            title.set_text(label)
        segs = [ln for k in v.glaciers for ln in ela_lines.get(k, [])]
        ela = []
        if segs:
            ela = [LineCollection(segs, colors="white", linewidths=2.6, zorder=4),
                   LineCollection(segs, colors="black", linewidths=1.2, linestyles=(0, (3, 1.5)), zorder=4)]
            for c in ela:
                c.set_animated(True)
                self.axes[0].add_collection(c)
        place = "" if v.key == "catchment" else f"{v.title}, "
        self.suptitle.set_text(f"{place}{self.site}: surface mass balance, {period_label}")
        self.titles[0].set_text("annual balance" + (f"  (dashed: ELA{ela_text})" if segs else ""))
        self.canvas.restore_region(self.background)
        for i, ax in enumerate(self.axes):
            ax.draw_artist(self.images[i])
            if i == 0:
                for c in ela:
                    ax.draw_artist(c)
            for a in self.overlays[i]:
                ax.draw_artist(a)
            ax.draw_artist(self.titles[i])
        self.fig.draw_artist(self.suptitle)
        for c in ela:
            c.remove()
        return _png(self.canvas)

    def close(self) -> None:
        self.fig.clear()


def _png(canvas) -> bytes:
    """The canvas as PNG bytes (RGB, zlib level 6)."""
    from PIL import Image
    rgba = np.asarray(canvas.buffer_rgba())
    buf = io.BytesIO()
    Image.fromarray(rgba[..., :3]).save(buf, format="PNG", compress_level=6)
    return buf.getvalue()


def colour_limit(arrays: Sequence[np.ndarray]) -> float:
    """Symmetric colour limit: the 98th percentile of |balance| over the arrays, rounded up."""
    vals = np.concatenate([np.abs(a[np.isfinite(a)]).ravel() for a in arrays] or [np.zeros(1)])
    if vals.size == 0:
        return 1.0
    v = float(np.percentile(vals, 98))
    if not np.isfinite(v) or v <= 0:
        return 1.0
    e = 10 ** math.floor(math.log10(v))
    return math.ceil(v / (e / 2)) * (e / 2)
