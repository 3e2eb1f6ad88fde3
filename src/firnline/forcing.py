"""Daily station forcing: reading, checking, and the balance-year calendar.

The station record holds one row per day with the daily mean air temperature
(deg C) and the daily precipitation total (mm) at the station elevation. The
calendar follows the fixed-date system (Cogley et al., 2011, Glossary of Glacier
Mass Balance, UNESCO-IHP): each balance year starts on ``year_start`` and is
labelled by the calendar year it ends in; winter runs from ``year_start`` to
``winter_end`` inclusive, summer is the rest of the balance year.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import InputError
from .files import regular_file

# plausible daily mean air temperature at a station, deg C (common practice; the
# world's record daily means lie inside this range)
T_MIN_C, T_MAX_C = -70.0, 50.0
# largest daily precipitation accepted, mm: the world's one-day record is under 2000 mm
# (1825 mm at Foc-Foc, La Reunion, January 1966, WMO archive; from memory), common practice
P_MAX_MM = 2000.0


@dataclass(frozen=True)
class Forcing:
    """A gap-free daily station record cut to complete balance years.

    Attributes
    ----------
    dates : ndarray of datetime64[D]
    temperature_c : ndarray float64
        Daily mean air temperature at the station, deg C.
    precipitation_mm : ndarray float64
        Daily precipitation total at the station, mm (= kg m-2).
    years : ndarray int
        The balance-year labels, in order.
    year_index : ndarray int
        For each day, the index into ``years`` of its balance year.
    winter : ndarray bool
        For each day, True in the winter season of the fixed-date system.
    notes : list of str
        Console notes (for example a partial year that was skipped).
    cells_source : object, optional
        With several stations or a gridded file: the source of per-cell daily
        forcing (:class:`firnline.stations.StationNetwork` or
        :class:`firnline.gridded.GriddedForcing`); ``temperature_c`` and
        ``precipitation_mm`` then hold NaN and the kernel runs in cell mode.
    """

    dates: np.ndarray
    temperature_c: np.ndarray
    precipitation_mm: np.ndarray
    years: np.ndarray
    year_index: np.ndarray
    winter: np.ndarray
    notes: list = field(default_factory=list)
    cells_source: object | None = None

    @property
    def n_days(self) -> int:
        return len(self.dates)

    @property
    def month(self) -> np.ndarray:
        """Calendar month 1..12 of each day."""
        return self.dates.astype("datetime64[M]").astype(int) % 12 + 1

    @property
    def day_of_year(self) -> np.ndarray:
        """Day of the year 1..366 of each day."""
        d = self.dates
        return (d - d.astype("datetime64[Y]")).astype(int) + 1

    def day_index(self, date: dt.date) -> int:
        """Index of a date in the record, or -1 when outside it."""
        i = (np.datetime64(date, "D") - self.dates[0]).astype(int)
        return int(i) if 0 <= i < self.n_days else -1


def _md(text: str) -> tuple[int, int]:
    m, d = text.split("-")
    return int(m), int(d)


def balance_year_of(dates: np.ndarray, year_start: str) -> np.ndarray:
    """Balance-year label of each date: the calendar year in which its balance year ends."""
    m0, d0 = _md(year_start)
    ts = pd.DatetimeIndex(dates)
    after = (ts.month > m0) | ((ts.month == m0) & (ts.day >= d0))
    label = ts.year.to_numpy() + (after.astype(int) if (m0, d0) != (1, 1) else 0)
    return label


def in_winter(dates: np.ndarray, year_start: str, winter_end: str) -> np.ndarray:
    """True for dates from ``year_start`` to ``winter_end`` (inclusive), month-day wise."""
    ts = pd.DatetimeIndex(dates)
    md = ts.month.to_numpy() * 100 + ts.day.to_numpy()
    s = _md(year_start)
    e = _md(winter_end)
    s, e = s[0] * 100 + s[1], e[0] * 100 + e[1]
    return (md >= s) & (md <= e) if s <= e else (md >= s) | (md <= e)


def build_forcing(df: pd.DataFrame, source: str, date_col: str, t_col: str, p_col: str,
                  year_start: str, winter_end: str, start: dt.date | None = None,
                  end: dt.date | None = None) -> Forcing:
    """Check a station table and cut it to complete balance years.

    Parameters
    ----------
    df : DataFrame
        The table as read, all columns as text; the row whose index is i is line i + 2
        of the file (the header is line 1).
    source : str
        File name used in messages.
    date_col, t_col, p_col : str
        Column names of the date, temperature (deg C) and precipitation (mm).
    year_start, winter_end : str
        "MM-DD" of the balance-year start and of the end of winter.
    start, end : date, optional
        Clip the record to these dates (inclusive) before cutting to whole years.

    Raises
    ------
    InputError
        Missing columns, unreadable or empty values, duplicated, unsorted or
        missing dates, kelvin-like or implausible temperatures, negative
        precipitation, or no complete balance year; the message names the line or date.
    """
    d, t, p = check_table(df, source, date_col, t_col, p_col)
    return calendar(d, source, year_start, winter_end, start, end, t, p)


def check_table(df: pd.DataFrame, source: str, date_col: str, t_col: str, p_col: str,
                allow_gaps: bool = False) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Check the dates and values of a daily station table.

    Returns ``(dates, temperature_c, precipitation_mm)`` as datetime64[D] and float64
    arrays. With ``allow_gaps`` (a station of a network), empty values become NaN and
    days may be missing; otherwise both are errors naming the line or the date.
    """
    for col, key in ((date_col, "date_column"), (t_col, "temperature_column"),
                     (p_col, "precipitation_column")):
        if col not in df.columns:
            raise InputError(f"{source}: no column \"{col}\" (set [climate] {key}); the file has "
                             + ", ".join(f'"{c}"' for c in df.columns) + ".")
    line = df.index.to_numpy() + 2  # header is line 1
    raw_dates = df[date_col].astype("string").str.strip()
    dates = pd.to_datetime(raw_dates, format="%Y-%m-%d", errors="coerce")
    bad = dates.isna().to_numpy()
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(f"{source}, line {line[i]}: the date {raw_dates.iloc[i]!r} is not a date "
                         "written YYYY-MM-DD; correct or remove the row.")
    values = {}
    for col, what in ((t_col, "temperature"), (p_col, "precipitation")):
        raw = df[col].astype("string").str.strip()
        num = pd.to_numeric(raw, errors="coerce")
        empty = (raw.isna() | (raw == "")).fillna(True).to_numpy(dtype=bool)
        badv = (num.isna() | ~np.isfinite(num.astype("float64").fillna(np.nan))).to_numpy()
        if allow_gaps:
            badv = badv & ~empty
        if badv.any():
            i = int(np.argmax(badv))
            shown = "empty" if (raw.iloc[i] is pd.NA or raw.iloc[i] == "") else f"{raw.iloc[i]!r}, not a number"
            raise InputError(f"{source}, line {line[i]} ({dates.iloc[i].date()}): the {what} is {shown}; "
                             "fill the gap (firnline does not invent values) or shorten the record.")
        values[what] = num.to_numpy(dtype="float64")
    d = dates.to_numpy().astype("datetime64[D]")
    step = np.diff(d).astype(int)
    if (step == 0).any():
        i = int(np.argmax(step == 0)) + 1
        raise InputError(f"{source}, line {line[i]}: the date {d[i]} appears twice; keep one row per day.")
    if (step < 0).any():
        i = int(np.argmax(step < 0)) + 1
        raise InputError(f"{source}, line {line[i]}: the date {d[i]} comes after {d[i - 1]}; "
                         "sort the rows by date.")
    if (step > 1).any() and not allow_gaps:
        i = int(np.argmax(step > 1))
        raise InputError(f"{source}: no row for {d[i] + 1} (between lines {line[i]} and {line[i + 1]}); "
                         "the record must have every day; fill the gap.")
    t, p = values["temperature"], values["precipitation"]
    if np.nanmedian(t) > 150:
        raise InputError(f"{source}: the temperatures look like kelvin (median {np.nanmedian(t):.1f}); "
                         "give them in deg C.")
    out = (t < T_MIN_C) | (t > T_MAX_C)
    if out.any():
        i = int(np.argmax(out))
        raise InputError(f"{source}, line {line[i]} ({d[i]}): temperature {t[i]:g} C is outside "
                         f"{T_MIN_C:g}..{T_MAX_C:g} C; correct the value.")
    if (p < 0).any():
        i = int(np.argmax(p < 0))
        raise InputError(f"{source}, line {line[i]} ({d[i]}): precipitation {p[i]:g} mm is negative; "
                         "correct the value.")
    if (p > P_MAX_MM).any():
        i = int(np.argmax(p > P_MAX_MM))
        raise InputError(f"{source}, line {line[i]} ({d[i]}): precipitation {p[i]:g} mm in one day is above "
                         f"{P_MAX_MM:g} mm, more than the world's one-day record; correct the value (a "
                         "missing-value code such as 9999?) or check the unit (mm per day).")

    return d, t, p


def calendar(d: np.ndarray, source: str, year_start: str, winter_end: str, start=None, end=None,
             *series: np.ndarray) -> Forcing:
    """Clip gap-free dates (and day-first ``series``) to ``start..end`` and cut to complete balance years.

    The first two ``series`` become the Forcing's ``temperature_c`` and
    ``precipitation_mm`` (any shape with days first; NaN-filled when not given).
    """
    series = list(series) or [np.full(len(d), np.nan), np.full(len(d), np.nan)]
    keep = np.ones(len(d), bool)
    if start is not None:
        keep &= d >= np.datetime64(start, "D")
    if end is not None:
        keep &= d <= np.datetime64(end, "D")
    d, series = d[keep], [v[keep] for v in series]
    if len(d) == 0:
        raise InputError(f"{source}: no day of the record lies between [climate] start and end.")

    label = balance_year_of(d, year_start)
    notes = []
    years = []
    keep = np.zeros(len(d), bool)
    for y in np.unique(label):
        sel = label == y
        first = _year_start_date(int(y), year_start)
        last = _year_start_date(int(y) + 1, year_start) - dt.timedelta(days=1)
        n_full = (last - first).days + 1
        if sel.sum() == n_full:
            keep |= sel
            years.append(int(y))
        else:
            notes.append(f"{source}: balance year {y} ({first} to {last}) is incomplete in the record "
                         f"({int(sel.sum())} of {n_full} days) and was skipped.")
    if not years:
        raise InputError(f"{source}: the record holds no complete balance year (starting "
                         f"{year_start}); give at least one full year.")
    d, label = d[keep], label[keep]
    t, p = (v[keep] for v in series[:2])
    years_arr = np.array(years)
    return Forcing(dates=d, temperature_c=t, precipitation_mm=p, years=years_arr,
                   year_index=np.searchsorted(years_arr, label),
                   winter=in_winter(d, year_start, winter_end), notes=notes)


def _year_start_date(label: int, year_start: str) -> dt.date:
    m, d = _md(year_start)
    return dt.date(label - 1 if (m, d) != (1, 1) else label, m, d)


def read_station(path: Path, date_col: str, t_col: str, p_col: str, year_start: str,
                 winter_end: str, start=None, end=None) -> Forcing:
    """Read a station CSV (the file edge) and check it with :func:`build_forcing`."""
    path = regular_file(path, "station file", "[climate] station_file")
    df = read_text_table(path, f"{path}: station file not found; check [climate] station_file.",
                         what="station file")
    return build_forcing(df, path.name, date_col, t_col, p_col, year_start, winter_end, start, end)


def read_text_table(path: Path, not_found: str, label: str | None = None, what: str = "file") -> pd.DataFrame:
    """A CSV file with every column as text; ``not_found`` is the message when it is missing.

    Blank lines are dropped after reading, so that the index of each row gives its line
    number (index i is line i + 2).
    """
    try:
        # blank lines are kept while reading so that every row's index gives its line number
        df = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True,
                         skip_blank_lines=False)
    except FileNotFoundError:
        raise InputError(not_found) from None
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as e:
        raise InputError(f"{label or Path(path).name}: not a readable CSV table "
                         f"({str(e).splitlines()[0]}).") from None
    except OSError as e:
        raise InputError(f"{path}: cannot read the {what} ({e.strerror or e}).") from None
    return df[~(df.fillna("").apply(lambda c: c.str.strip()) == "").all(axis=1)]   # then dropped


def load_forcing(config, grid, cells: np.ndarray) -> tuple[Forcing, dict]:
    """Read the forcing named in ``[climate]`` (the file edge of every forcing source).

    Parameters
    ----------
    config : Config
    grid : Grid
        The DEM grid (its CRS places the stations and the gridded file's points).
    cells : ndarray of int
        Flat indices of the modelled DEM cells (where a gridded file must have values).

    Returns
    -------
    forcing : Forcing
        One station: its record. Several stations or a gridded file: the calendar, with the
        :class:`firnline.stations.StationNetwork` or :class:`firnline.gridded.GriddedForcing`
        as ``cells_source``.
    checksums : dict
        SHA-256 of every forcing file read, by name.
    """
    from .grid import file_checksum

    cl, b = config.climate, config.balance
    cols = (cl.date_column, cl.temperature_column, cl.precipitation_column)
    if cl.mode == "station":
        f = read_station(cl.station_file, *cols, b.year_start, b.winter_end, cl.start, cl.end)
        return f, {"station": file_checksum(cl.station_file)}
    if cl.mode == "stations":
        from .observations import dem_file_crs
        from .stations import network_forcing, read_network

        crs = cl.stations_crs if cl.stations_crs is not None else dem_file_crs(grid.path)
        net = read_network(cl.stations, *cols, crs, grid.crs, cl.idw_power, cl.lapse_rate_from_stations)
        f = network_forcing(net, b.year_start, b.winter_end, cl.start, cl.end)
        sums = {"stations": file_checksum(cl.stations)}
        tab = pd.read_csv(cl.stations, dtype=str, skipinitialspace=True)
        for name, fname in zip(net.names, tab["file"]):
            sums[f"station {name}"] = file_checksum(Path(cl.stations).parent / fname.strip())
        return f, sums
    from .gridded import read_grid_file

    x, y = grid.cell_centres()
    ny, nx = grid.shape
    r, c = np.divmod(np.asarray(cells), nx)
    f = read_grid_file(cl.grid_file, x[c], y[r], np.asarray(cells), grid.crs, b.year_start, b.winter_end,
                       cl.start, cl.end)
    return f, {"grid_file": file_checksum(cl.grid_file)}
