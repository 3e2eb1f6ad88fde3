"""Field and geodetic observations for calibration: reading and checking.

Two CSV tables, named in ``[observations]``:

``point_balances`` (stakes, snow probing, snow pits)
    ``point_id, x, y, start_date, end_date, balance_mwe, sigma_mwe``. A stake
    reading over any period, or a winter snow-probing or pit value (the same row
    over winter dates). ``x, y`` are in the DEM file's CRS, or in
    ``[observations] points_crs`` (transformed to the model grid with pyproj).

``glacier_balances`` (glacier-wide balances, glaciological or geodetic)
    ``glacier, start_date, end_date, balance_mwe, sigma_mwe``, over any period of
    one or many years. A ``dh_m`` column (mean surface-elevation change over the
    period, m) may replace ``balance_mwe``; when both columns are present each
    row fills exactly one of them. Elevation changes are converted to mass with
    :func:`geodetic_balance` (850 +/- 60 kg m-3; Huss 2013).

Conventions (the same for both tables)
--------------------------------------
* A period ``start_date .. end_date`` is *inclusive*: the balance from the start
  of ``start_date`` (00:00) to the end of ``end_date`` (24:00). The balance year
  2016-10-01 .. 2017-09-30 is thus exactly the model's balance year 2017.
* ``balance_mwe`` is the total over the period in m w.e. (not a rate per year);
  ``sigma_mwe`` is its one-standard-deviation uncertainty, m w.e., > 0. For a
  ``dh_m`` row ``sigma_mwe`` is the uncertainty from the elevation change alone
  (already in m w.e.); the density uncertainty is added in quadrature.
* Every period must lie within the forcing record that the model uses (its
  complete balance years).
* Each point uses the DEM cell that contains it (a point on a cell edge belongs
  to the cell east of / south of the edge). The cell's DEM elevation is used as it
  is: no correction is made for the difference between the point's own
  elevation and the cell's (the table carries no point elevation; on grids of a
  few tens of metres the difference is a few metres, about 0.02 K of air
  temperature at -6.5 K per km).
* Blank lines and lines starting with ``#`` are skipped; extra columns (notes,
  elevations) are ignored. Errors name the file and its line number (the header
  is line 1).

Files are read only in :func:`read_table` and :func:`load_observations`;
everything else is a pure function of the rows and of numpy arrays.
"""

from __future__ import annotations

import csv
import datetime as dt
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np

from .errors import InputError
from .files import read_text

POINT_COLUMNS = ("point_id", "x", "y", "start_date", "end_date", "balance_mwe", "sigma_mwe")
GLACIER_COLUMNS = ("glacier", "start_date", "end_date", "balance_mwe", "sigma_mwe")

#: Volume-to-mass conversion density for geodetic balances, kg m-3, and its
#: uncertainty (Huss 2013, The Cryosphere 7, 877-887).
GEODETIC_DENSITY_KG_M3 = 850.0
GEODETIC_DENSITY_SIGMA_KG_M3 = 60.0
#: Density of water, kg m-3 (common practice): 1 m w.e. = 1000 kg m-2.
WATER_DENSITY_KG_M3 = 1000.0


# ----------------------------------------------------------------------------
# rows as read
# ----------------------------------------------------------------------------

@dataclass(frozen=True)
class Table:
    """A CSV table as text: header, rows and the line number of each row.

    Attributes
    ----------
    source : str
        File name for messages.
    columns : list of str
        Header names, stripped of white space.
    rows : list of list of str
        Cell texts, stripped; each row padded to the header's length.
    lines : list of int
        Line number in the file of each row (the header is line 1).
    """

    source: str
    columns: list
    rows: list
    lines: list


def parse_table(text: str, source: str) -> Table:
    """Split CSV text into a :class:`Table` (blank and ``#`` lines skipped).

    Raises
    ------
    InputError
        No header, no data row, or a row with more fields than the header.
    """
    header = None
    rows, lines = [], []
    reader = csv.reader(text.splitlines())
    for fields in reader:
        line = reader.line_num
        if not fields or all(not f.strip() for f in fields) or fields[0].lstrip().startswith("#"):
            continue
        fields = [f.strip() for f in fields]
        if header is None:
            header = fields
            header_line = line
            continue
        if len(fields) > len(header):
            raise InputError(f"{source}, line {line}: {len(fields)} fields but the header (line "
                             f"{header_line}) names {len(header)}; remove the extra commas or quote "
                             "text that contains a comma.")
        rows.append(fields + [""] * (len(header) - len(fields)))
        lines.append(line)
    if header is None:
        raise InputError(f"{source}: the file is empty; give a header line and one row per observation.")
    if not rows:
        raise InputError(f"{source}: the file has a header but no observation rows; add rows or "
                         "remove the file from [observations].")
    return Table(source=source, columns=header, rows=rows, lines=lines)


def read_table(path: str | Path, key: str) -> Table:
    """Read an observation CSV (the file edge).

    Parameters
    ----------
    path : str or Path
    key : str
        The ``[observations]`` key that names the file (for messages).
    """
    path = Path(path)
    text = read_text(path, "observation file", f"check [observations] {key}",
                     f"give a UTF-8 CSV as [observations] {key}", key=f"[observations] {key}",
                     encoding="utf-8-sig")
    return parse_table(text, path.name)


# ----------------------------------------------------------------------------
# checked observations
# ----------------------------------------------------------------------------

@dataclass(frozen=True)
class _Observed:
    """What every checked observation table holds.

    Attributes
    ----------
    source : str
        File name.
    lines : ndarray int
        Line number of each observation in the file.
    start_date, end_date : list of datetime.date
        Inclusive period.
    start_day, end_day : ndarray int
        Day boundaries in the forcing record: the period is days
        ``start_day .. end_day - 1`` (``end_day`` is one past the last day).
    balance_mwe, sigma_mwe : ndarray float
        Observed balance over the period and its uncertainty, m w.e.
    """

    source: str
    lines: np.ndarray
    start_date: list
    end_date: list
    start_day: np.ndarray
    end_day: np.ndarray
    balance_mwe: np.ndarray
    sigma_mwe: np.ndarray

    def __len__(self) -> int:
        return len(self.lines)


@dataclass(frozen=True, kw_only=True)
class PointBalances(_Observed):
    """Checked point observations (stakes, probing, pits); the fields of ``_Observed`` and:

    Attributes
    ----------
    point_id : list of str
    x_m, y_m : ndarray float
        Coordinates in the model grid's CRS, m.
    flat_index : ndarray int
        Flat (C-order) index of the containing DEM cell.
    elevation_m : ndarray float
        DEM elevation of that cell, m (used as it is; no correction to the point).
    """

    point_id: list
    x_m: np.ndarray
    y_m: np.ndarray
    flat_index: np.ndarray
    elevation_m: np.ndarray


@dataclass(frozen=True, kw_only=True)
class GlacierBalances(_Observed):
    """Checked glacier-wide observations; the fields of ``_Observed`` and:

    Attributes
    ----------
    glacier : list of str
        Glacier names as in the outlines.
    glacier_index : ndarray int
        Index of each glacier in ``Glaciers.names``.
    dh_m : ndarray float
        The mean surface-elevation change as given, m; NaN for rows given in m w.e.
        (``balance_mwe`` and ``sigma_mwe`` are then converted, with the density
        uncertainty included.)
    """

    glacier: list
    glacier_index: np.ndarray
    dh_m: np.ndarray


def geodetic_balance(dh_m, sigma_mwe=0.0, density_kg_m3: float = GEODETIC_DENSITY_KG_M3,
                     density_sigma_kg_m3: float = GEODETIC_DENSITY_SIGMA_KG_M3):
    """Glacier-wide balance from a mean surface-elevation change.

    ``B = dh * rho / rho_w`` and ``sigma_B = sqrt(sigma**2 + (dh * sigma_rho / rho_w)**2)``,
    with rho = 850 +/- 60 kg m-3 (Huss, 2013, The Cryosphere 7, 877-887) and rho_w =
    1000 kg m-3.

    Parameters
    ----------
    dh_m : float or ndarray
        Mean surface-elevation change over the period, m (negative: lowering).
    sigma_mwe : float or ndarray
        Uncertainty of the balance from the elevation change alone, m w.e.
    density_kg_m3, density_sigma_kg_m3 : float
        Conversion density and its uncertainty, kg m-3.

    Returns
    -------
    balance_mwe, sigma_mwe : float or ndarray
        The balance over the period and its total uncertainty, m w.e.
    """
    dh = np.asarray(dh_m, dtype="float64")
    b = dh * density_kg_m3 / WATER_DENSITY_KG_M3
    conv = np.abs(dh) * density_sigma_kg_m3 / WATER_DENSITY_KG_M3
    s = np.hypot(np.asarray(sigma_mwe, dtype="float64"), conv)
    if b.ndim == 0:
        return float(b), float(s)
    return b, s


def _require_columns(table: Table, needed: Sequence[str], key: str) -> None:
    missing = [c for c in needed if c not in table.columns]
    if missing:
        raise InputError(f"{table.source}: missing column{'s' if len(missing) > 1 else ''} "
                         + ", ".join(f'"{c}"' for c in missing) + " (the header has "
                         + ", ".join(f'"{c}"' for c in table.columns)
                         + f"); [observations] {key} needs the columns " + ", ".join(needed) + ".")


def _where(table: Table, i: int) -> str:
    return f"{table.source}, line {table.lines[i]}"


def _number(table: Table, i: int, name: str, text: str) -> float:
    if text == "":
        raise InputError(f"{_where(table, i)}: {name} is empty; fill it in or remove the row.")
    try:
        v = float(text)
    except ValueError:
        v = math.nan
        bad = True
    else:
        bad = not math.isfinite(v)
    if bad:
        raise InputError(f"{_where(table, i)}: {name} {text!r} is not a number; correct it or remove the row.")
    return v


def _date(table: Table, i: int, name: str, text: str) -> dt.date:
    try:
        return dt.datetime.strptime(text, "%Y-%m-%d").date()
    except ValueError:
        raise InputError(f"{_where(table, i)}: {name} {text!r} is not a date written YYYY-MM-DD; "
                         "correct it or remove the row.") from None


def _period(table: Table, i: int, row: dict, record: np.ndarray) -> tuple[dt.date, dt.date, int, int]:
    """Dates and day boundaries of a row's inclusive period, checked against the record."""
    start = _date(table, i, "start_date", row["start_date"])
    end = _date(table, i, "end_date", row["end_date"])
    if end < start:
        raise InputError(f"{_where(table, i)}: end_date {end} comes before start_date {start}; "
                         "swap or correct the dates.")
    first, last = record[0].item(), record[-1].item()
    if start < first or end > last:
        raise InputError(f"{_where(table, i)}: the period {start} to {end} lies outside the forcing "
                         f"record used ({first} to {last}, its complete balance years); shorten the "
                         "period or extend the station record.")
    s = (np.datetime64(start, "D") - record[0]).astype(int)
    e = (np.datetime64(end, "D") - record[0]).astype(int) + 1
    return start, end, int(s), int(e)


def _sigma(table: Table, i: int, row: dict) -> float:
    s = _number(table, i, "sigma_mwe", row["sigma_mwe"])
    if s <= 0:
        raise InputError(f"{_where(table, i)}: sigma_mwe is {s:g}; give the observation's uncertainty "
                         "as a positive number in m w.e.")
    return s


def check_point_balances(table: Table, record_dates: np.ndarray, transform, valid: np.ndarray,
                         elevation: np.ndarray, grid_crs=None, points_crs=None,
                         key: str = "point_balances") -> PointBalances:
    """Check point observations and find the DEM cell of each.

    Parameters
    ----------
    table : Table
        The rows as read.
    record_dates : ndarray of datetime64[D]
        The days of the forcing record the model uses.
    transform : affine.Affine
        The model grid's pixel-to-CRS transform (north-up).
    valid : ndarray (ny, nx) bool
        Cells with a DEM value.
    elevation : ndarray (ny, nx)
        DEM elevation, m.
    grid_crs, points_crs : CRS-like, optional
        When both are given and differ, x and y are transformed from
        ``points_crs`` to ``grid_crs`` with pyproj (always x = easting/longitude first).
    key : str
        The ``[observations]`` key (for messages).

    Returns
    -------
    PointBalances

    Raises
    ------
    InputError
        A missing column, an unreadable value, end before start, a period outside
        the record, a point outside the DEM or on nodata, or a sigma <= 0; the
        message names the line.
    """
    _require_columns(table, POINT_COLUMNS, key)
    n = len(table.rows)
    idx = {c: table.columns.index(c) for c in POINT_COLUMNS}
    ids, x, y, starts, ends, s_day, e_day, b, sig = [], [], [], [], [], [], [], [], []
    for i, r in enumerate(table.rows):
        row = {c: r[j] for c, j in idx.items()}
        if row["point_id"] == "":
            raise InputError(f"{_where(table, i)}: point_id is empty; name the stake or probing point.")
        ids.append(row["point_id"])
        x.append(_number(table, i, "x", row["x"]))
        y.append(_number(table, i, "y", row["y"]))
        start, end, s, e = _period(table, i, row, record_dates)
        starts.append(start)
        ends.append(end)
        s_day.append(s)
        e_day.append(e)
        b.append(_number(table, i, "balance_mwe", row["balance_mwe"]))
        sig.append(_sigma(table, i, row))
    x_in, y_in = np.array(x), np.array(y)
    xg, yg = _to_grid_crs(x_in, y_in, points_crs, grid_crs)
    ny, nx = valid.shape
    colf, rowf = (~transform) @ (xg, yg)
    col = np.floor(np.asarray(colf, dtype="float64"))
    row_ = np.floor(np.asarray(rowf, dtype="float64"))
    inside = np.isfinite(col) & np.isfinite(row_) & (col >= 0) & (col < nx) & (row_ >= 0) & (row_ < ny)
    if not inside.all():
        i = int(np.argmin(inside))
        left, top = transform @ (0, 0)
        right, bottom = transform @ (nx, ny)
        crs_note = "in [observations] points_crs" if points_crs else "in the DEM's CRS"
        raise InputError(f"{_where(table, i)}: point {ids[i]} at x = {x_in[i]:g}, y = {y_in[i]:g} "
                         f"({crs_note}) lies outside the DEM (x {min(left, right):.1f} to "
                         f"{max(left, right):.1f}, y {min(top, bottom):.1f} to {max(top, bottom):.1f} "
                         "in the grid's CRS); check the coordinates or set [observations] points_crs.")
    col = col.astype(np.int64)
    row_ = row_.astype(np.int64)
    on_data = valid[row_, col]
    if not on_data.all():
        i = int(np.argmin(on_data))
        raise InputError(f"{_where(table, i)}: point {ids[i]} at x = {x_in[i]:g}, y = {y_in[i]:g} lies "
                         "on a nodata cell of the DEM; check the coordinates or fill the DEM there.")
    flat = row_ * nx + col
    return PointBalances(source=table.source, lines=np.asarray(table.lines[:n]), point_id=ids,
                         x_m=np.asarray(xg, dtype="float64"), y_m=np.asarray(yg, dtype="float64"),
                         flat_index=flat, elevation_m=np.asarray(elevation)[row_, col].astype("float64"),
                         start_date=starts, end_date=ends, start_day=np.array(s_day, dtype=np.int64),
                         end_day=np.array(e_day, dtype=np.int64), balance_mwe=np.array(b),
                         sigma_mwe=np.array(sig))


def _to_grid_crs(x: np.ndarray, y: np.ndarray, points_crs, grid_crs):
    from .grid import to_crs
    return to_crs(x, y, points_crs, grid_crs, "[observations] points_crs")


def check_glacier_balances(table: Table, record_dates: np.ndarray, names: Sequence[str],
                           n_cells: Sequence[int] | None = None,
                           key: str = "glacier_balances") -> GlacierBalances:
    """Check glacier-wide observations (glaciological or geodetic).

    Parameters
    ----------
    table : Table
    record_dates : ndarray of datetime64[D]
        The days of the forcing record the model uses.
    names : sequence of str
        The glacier names of the outlines (``Glaciers.names``).
    n_cells : sequence of int, optional
        Number of DEM cells of each glacier; a glacier without cells cannot be observed.
    key : str
        The ``[observations]`` key (for messages).

    Returns
    -------
    GlacierBalances
        ``dh_m`` rows converted with :func:`geodetic_balance`.

    Raises
    ------
    InputError
        Missing columns (``balance_mwe`` or ``dh_m`` is needed), an unreadable
        value, a row with both or neither of balance_mwe and dh_m, end before
        start, a period outside the record, an unknown glacier name (the message
        lists the known ones) or sigma <= 0; the message names the line.
    """
    base = [c for c in GLACIER_COLUMNS if c != "balance_mwe"]
    has_b, has_dh = "balance_mwe" in table.columns, "dh_m" in table.columns
    if not (has_b or has_dh):
        raise InputError(f"{table.source}: no column \"balance_mwe\" or \"dh_m\" (the header has "
                         + ", ".join(f'"{c}"' for c in table.columns) + f"); [observations] {key} "
                         "needs glacier, start_date, end_date, balance_mwe (or dh_m), sigma_mwe.")
    _require_columns(table, base, key)
    known = {name: k for k, name in enumerate(names)}
    glac, gidx, starts, ends, s_day, e_day, b, sig, dh = [], [], [], [], [], [], [], [], []
    for i, r in enumerate(table.rows):
        row = dict(zip(table.columns, r))
        name = row["glacier"]
        if name not in known:
            listed = ", ".join(f'"{n}"' for n in names)
            raise InputError(f"{_where(table, i)}: unknown glacier \"{name}\"; the outlines name "
                             f"{listed} (check [glaciers] id_field and the spelling).")
        if n_cells is not None and n_cells[known[name]] == 0:
            raise InputError(f"{_where(table, i)}: glacier \"{name}\" covers no valid DEM cell, so its "
                             "balance cannot be modelled; remove the row or fix the outline or DEM.")
        start, end, s, e = _period(table, i, row, record_dates)
        tb = row.get("balance_mwe", "") if has_b else ""
        tdh = row.get("dh_m", "") if has_dh else ""
        if tb != "" and tdh != "":
            raise InputError(f"{_where(table, i)}: both balance_mwe and dh_m are filled; give one of them "
                             "per row (dh_m for a geodetic elevation change).")
        if tb == "" and tdh == "":
            given = " or ".join(c for c, h in (("balance_mwe", has_b), ("dh_m", has_dh)) if h)
            raise InputError(f"{_where(table, i)}: no value in {given}; fill it in or remove the row.")
        s_mwe = _sigma(table, i, row)
        if tdh != "":
            d = _number(table, i, "dh_m", tdh)
            bb, ss = geodetic_balance(d, s_mwe)
        else:
            d = math.nan
            bb, ss = _number(table, i, "balance_mwe", tb), s_mwe
        glac.append(name)
        gidx.append(known[name])
        starts.append(start)
        ends.append(end)
        s_day.append(s)
        e_day.append(e)
        b.append(bb)
        sig.append(ss)
        dh.append(d)
    return GlacierBalances(source=table.source, lines=np.asarray(table.lines), glacier=glac,
                           glacier_index=np.array(gidx, dtype=np.int64), start_date=starts, end_date=ends,
                           start_day=np.array(s_day, dtype=np.int64), end_day=np.array(e_day, dtype=np.int64),
                           balance_mwe=np.array(b), sigma_mwe=np.array(sig), dh_m=np.array(dh))


# ----------------------------------------------------------------------------
# the file edge for a prepared model
# ----------------------------------------------------------------------------

def dem_file_crs(path: str | Path):
    """The CRS written in the DEM file (before any reprojection to UTM), read from its header."""
    import rasterio

    with rasterio.open(path) as src:
        return src.crs


def load_observations(config, setup) -> tuple[PointBalances | None, GlacierBalances | None]:
    """Read and check the observation files of ``[observations]`` against a prepared setup.

    Parameters
    ----------
    config : Config
    setup : firnline.model.Setup
        Gives the grid, the glacier names and the forcing record.

    Returns
    -------
    points, glaciers : PointBalances or None, GlacierBalances or None

    Raises
    ------
    InputError
        No ``[observations]`` section or no file named in it, or any problem of the rows.
    """
    obs = config.observations
    if obs is None or (obs.point_balances is None and obs.glacier_balances is None and obs.discharge is None):
        raise InputError("the config has no observations; add an [observations] section naming "
                         "point_balances, glacier_balances and/or discharge (see configs/demo_calibrate.toml).")
    grid = setup.grid
    record = setup.forcing.dates
    points = glaciers = None
    if obs.point_balances is not None:
        table = read_table(obs.point_balances, "point_balances")
        points_crs = obs.points_crs if obs.points_crs is not None else dem_file_crs(grid.path)
        points = check_point_balances(table, record, grid.transform, grid.valid, grid.elevation,
                                      grid.crs, points_crs)
    if obs.glacier_balances is not None:
        table = read_table(obs.glacier_balances, "glacier_balances")
        gl = setup.glaciers
        glaciers = check_glacier_balances(table, record, list(gl.names), [len(c) for c in gl.cells])
    return points, glaciers
