"""Per-year maps of a run: every balance year's accumulation, ablation, balances, ... as (year, y, x).

They are the one result of a run that grows with years x cells. :class:`YearMaps` takes each unit's
window as the unit finishes (:func:`firnline.tiles.run_units`), so a run never holds more than one
unit's results besides them, and keeps them

* in memory (numpy arrays, NaN where no cell was modelled) while all maps of the run take at most
  :data:`SPILL_BYTES`;
* otherwise in a chunked NetCDF-4 file (h5netcdf; one chunk per year and unit window, zlib level 1
  after the shuffle filter) in a work folder beside the output folder: ``.OUT.firnline-maps-PID-*``.
  :meth:`YearMaps.arrays` then gives dask arrays over the file's chunks, read only where asked.

Writers and figures read the maps a strip of rows at a time (:func:`row_strips`, :func:`reduce_years`),
so writing holds one strip of every year, never all years x all cells. The work folder is removed
by :meth:`YearMaps.close` (``RunResult.close``), when the result is collected, at exit, and by the
next command on the same output folder if a run was killed
(:func:`firnline.outdir.OutputFolder`).
"""

from __future__ import annotations

import os
import secrets
import shutil
import weakref
from pathlib import Path
from typing import Callable, Iterator, Sequence

import numpy as np

#: The maps of a run (all names x years x cells, float32) above this size go to a file.
SPILL_BYTES = 512 * 2**20
#: A strip of rows read at once by the writers holds at most about this much (all years).
STRIP_BYTES = 64 * 2**20
#: Name part of the work folder of spilled maps (beside the output folder).
WORK_PART = "maps-"


def on_glaciers_only(name: str) -> bool:
    """The balances are maps of the glacier surface (NaN off the glaciers); the rest cover every cell."""
    return name.endswith("balance")


class YearMaps:
    """The maps ``name -> (n_years, ny, nx)`` float32 of a run, filled window by window.

    Parameters
    ----------
    names : the maps
    n_years : balance years
    shape : (ny, nx) of the DEM
    tile : (rows, cols) of a unit window: the file's chunks
    work_dir : folder in which a spill file may be made (default: the current folder)
    spill_bytes : spill when the maps would take more (default :data:`SPILL_BYTES`)
    prefix : name prefix of the work folder (``.OUT.firnline-``)
    """

    def __init__(self, names: Sequence[str], n_years: int, shape: tuple[int, int], tile: tuple[int, int],
                 work_dir: Path | None = None, spill_bytes: int | None = None, prefix: str = ".firnline-"):
        self.names = list(names)
        self.n_years, self.shape = int(n_years), (int(shape[0]), int(shape[1]))
        self.tile = (max(1, min(int(tile[0]), self.shape[0])), max(1, min(int(tile[1]), self.shape[1])))
        size = len(self.names) * self.n_years * self.shape[0] * self.shape[1] * 4
        limit = SPILL_BYTES if spill_bytes is None else spill_bytes
        self.dir: Path | None = None
        self._handles: list = []          # open files, closed by the finalizer
        self._file = self._opened = None
        self._closer = None
        self._spilled = not (size <= limit or self.n_years == 0)
        if not self._spilled:
            self._memory = {n: np.full((self.n_years,) + self.shape, np.nan, dtype="float32") for n in self.names}
            return
        import h5netcdf

        self._memory = None
        base = Path(work_dir) if work_dir is not None else Path.cwd()
        self.dir = base / f"{prefix}{WORK_PART}{os.getpid()}-{secrets.token_hex(6)}"
        os.mkdir(self.dir)
        self._closer = weakref.finalize(self, _remove, self._handles, self.dir)
        self.path = self.dir / "maps.nc"
        f = h5netcdf.File(self.path, "w")
        self._handles.append(f)
        self._file = f
        f.dimensions = {"balance_year": self.n_years, "y": self.shape[0], "x": self.shape[1]}
        for n in self.names:
            f.create_variable(n, ("balance_year", "y", "x"), "f4", chunks=(1,) + self.tile,
                              compression="gzip", compression_opts=1, shuffle=True, fillvalue=np.float32(np.nan))

    @property
    def spilled(self) -> bool:
        """The maps are in a file (also after :meth:`close`)."""
        return self._spilled

    def put(self, name: str, rows: tuple[int, int], cols: tuple[int, int], r: np.ndarray, c: np.ndarray,
            values: np.ndarray, first_year: int = 0) -> None:
        """Place ``values`` (years, n) of balance years ``first_year ..`` at the cells (``r``, ``c``) of
        the DEM, all inside the window ``rows`` x ``cols``; the window's other cells stay NaN."""
        y0, y1 = int(first_year), int(first_year) + values.shape[0]
        if self._memory is not None:
            self._memory[name][y0:y1, r, c] = values
            return
        (r0, r1), (c0, c1) = rows, cols
        win = np.full((y1 - y0, r1 - r0, c1 - c0), np.nan, dtype="float32")
        win[:, r - r0, c - c0] = values
        self._file.variables[name][y0:y1, r0:r1, c0:c1] = win

    def arrays(self) -> dict:
        """The maps: numpy arrays in memory, or dask arrays over the spill file's chunks."""
        if self._memory is not None:
            return dict(self._memory)
        import xarray as xr
        if self._file is not None:          # written: from now on read only
            self._file.close()
            self._handles.remove(self._file)
            self._file = None
            self._opened = xr.open_dataset(self.path, engine="h5netcdf", mask_and_scale=False,
                                           chunks={"balance_year": 1, "y": self.tile[0], "x": self.tile[1]})
            self._handles.append(self._opened)
        return {n: self._opened[n].data for n in self.names}

    def close(self) -> None:
        """Drop the maps; remove the spill file and its work folder."""
        if self._closer is not None:
            self._closer()
        self._memory = None


def _remove(handles: list, folder: Path) -> None:
    for h in handles:
        try:
            h.close()
        except Exception:       # noqa: BLE001 - a file torn down at exit may be closed already
            pass
    handles.clear()
    shutil.rmtree(folder, ignore_errors=True)


def stale(entry_name: str) -> bool:
    """A work folder of spilled maps whose process is gone."""
    try:
        pid = int(entry_name.split(WORK_PART, 1)[1].split("-", 1)[0])
    except (IndexError, ValueError):
        return False
    if pid == os.getpid():
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except OSError:
        return False
    return False


def row_strips(shape: Sequence[int], itemsize: int = 4, budget: int | None = None,
               multiple: int = 256) -> Iterator[tuple[int, int]]:
    """Row ranges ``(r0, r1)`` over the last two axes of ``shape`` (..., ny, nx), each holding at most
    about ``budget`` bytes (default :data:`STRIP_BYTES`) and a multiple of ``multiple`` rows (a GeoTIFF
    block) where that fits."""
    *lead, ny, nx = shape
    per_row = max(1, int(np.prod(lead, dtype=np.int64)) * nx * itemsize)
    rows = max(1, (STRIP_BYTES if budget is None else budget) // per_row)
    if rows >= multiple:
        rows -= rows % multiple
    for r0 in range(0, ny, rows):
        yield r0, min(ny, r0 + rows)


def reduce_years(maps, fn: Callable, budget: int | None = None) -> np.ndarray:
    """``fn`` applied to strips of rows of ``maps`` (n_years, ny, nx; numpy, xarray or dask), one map
    (ny, nx) out. Each strip is loaded into memory first (so a dask-backed map is reduced by the same
    numpy code as an in-memory one), and ``fn`` must reduce each cell over the years on its own (a
    mean over axis 0, ...), so the strips give the same values, bit for bit, as ``fn`` on the whole
    array in memory."""
    ny, nx = maps.shape[-2:]
    out = None
    for r0, r1 in row_strips(maps.shape, budget=budget):
        strip = maps[:, r0:r1, :]
        strip = strip.load() if hasattr(strip, "load") else np.asarray(strip)
        part = np.asarray(fn(strip))
        if out is None:
            out = np.empty((ny, nx), dtype=part.dtype)
        out[r0:r1] = part
    return out
