"""Monthly climate-change scenarios: change files and the delta-change helper.

A scenario is twelve monthly changes (January first): a warming in K added to the
daily temperature of that calendar month and a precipitation change in % scaling its
daily precipitation by ``1 + pct/100``. A uniform scenario (``--warming`` /
``--precip-change``) is twelve equal values.

Change files (``firnline scenarios CONFIG --changes FILE [FILE ...]``) are CSV tables
with the columns ``month, warming_k, precip_change_pct`` and one row for each month
1..12; a file is one scenario, named by its file stem.

Delta change (common practice; see ../shared/REFERENCES.md): the twelve changes from
two periods of one series (a climate-model run, a reanalysis, a long station record)
are the differences of the monthly mean temperatures (future minus reference, K) and
the ratios of the monthly mean precipitation (future over reference, as a change in
%), applied to the observed record.
"""

from __future__ import annotations

import datetime as dt
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd

from .errors import InputError

CHANGE_COLUMNS = ("month", "warming_k", "precip_change_pct")
_DECIMALS = 6
_SAFE_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.+-]*$")


@dataclass(frozen=True)
class Scenario:
    """Twelve monthly changes with a name.

    name : str
        File-name-safe label: the change file's stem, or ``w+1.0_p+0`` for a uniform one.
    warming_k : tuple of 12 floats, K (January first)
    precip_change_pct : tuple of 12 floats, % (each > -100)
    source : str, optional
        The change file it came from.
    """

    name: str
    warming_k: tuple
    precip_change_pct: tuple
    source: str | None = None

    @property
    def uniform(self) -> bool:
        """True when all twelve months carry the same change (a uniform step)."""
        return len(set(self.warming_k)) == 1 and len(set(self.precip_change_pct)) == 1

    @property
    def mean_warming_k(self) -> float:
        """Mean of the twelve monthly warmings, K."""
        return round(float(np.mean(self.warming_k)), _DECIMALS) + 0.0

    @property
    def mean_precip_change_pct(self) -> float:
        """Mean of the twelve monthly precipitation changes, %."""
        return round(float(np.mean(self.precip_change_pct)), _DECIMALS) + 0.0

    @property
    def precip_scale(self) -> tuple:
        """Twelve factors 1 + pct/100 on the precipitation."""
        return tuple(1.0 + p / 100.0 for p in self.precip_change_pct)

    @classmethod
    def uniform_step(cls, warming_k: float, precip_change_pct: float, name: str) -> "Scenario":
        return cls(name, (float(warming_k),) * 12, (float(precip_change_pct),) * 12)


def parse_changes(df: pd.DataFrame, source: str, name: str) -> Scenario:
    """Check a change table (all columns as text; row i is line i + 2) and make its scenario.

    Raises
    ------
    InputError
        A missing column, a month missing, repeated or outside 1..12, a value that is
        not a finite number, or a precipitation change of -100 % or less; the message
        names the file and line.
    """
    cols = [c.strip() for c in df.columns]
    df = df.set_axis(cols, axis=1)
    for c in CHANGE_COLUMNS:
        if c not in cols:
            raise InputError(f"{source}: no column \"{c}\"; a change file needs the columns "
                             + ", ".join(CHANGE_COLUMNS) + " (the file has "
                             + ", ".join(f'"{c}"' for c in cols) + ").")
    if not _SAFE_NAME.match(name):
        raise InputError(f"{source}: the scenario is named after the file stem {name!r}, which must be "
                         "letters, digits and _ . + - only; rename the file.")
    line = df.index.to_numpy() + 2          # blank lines dropped: the index keeps the line numbers
    values = {}
    for c in CHANGE_COLUMNS:
        raw = df[c].astype("string").str.strip()
        num = pd.to_numeric(raw, errors="coerce").to_numpy(dtype="float64")
        bad = ~np.isfinite(num)
        if bad.any():
            i = int(np.argmax(bad))
            raise InputError(f"{source}, line {line[i]}: {c} {raw.iloc[i]!r} is not a finite number; correct it.")
        values[c] = num
    m = values["month"]
    for i, v in enumerate(m):
        if v != int(v) or not 1 <= v <= 12:
            raise InputError(f"{source}, line {line[i]}: month {v:g} is not a whole month 1..12; correct it.")
        if v in m[:i]:
            raise InputError(f"{source}, line {line[i]}: month {int(v)} appears twice; keep one row per month.")
    missing = sorted(set(range(1, 13)) - set(int(v) for v in m))
    if missing:
        raise InputError(f"{source}: no row for month {', '.join(str(k) for k in missing)}; give all twelve "
                         "months (1 = January).")
    p = values["precip_change_pct"]
    if (p <= -100).any():
        i = int(np.argmax(p <= -100))
        raise InputError(f"{source}, line {line[i]}: precip_change_pct {p[i]:g} would remove all precipitation; "
                         "give a value above -100.")
    order = np.argsort(m)
    w = tuple(round(float(x), _DECIMALS) + 0.0 for x in values["warming_k"][order])
    pc = tuple(round(float(x), _DECIMALS) + 0.0 for x in p[order])
    return Scenario(name=name, warming_k=w, precip_change_pct=pc, source=source)


def read_changes(path: str | Path) -> Scenario:
    """Read one change file (``month, warming_k, precip_change_pct``, 12 rows); named by its stem."""
    from .forcing import read_text_table

    path = Path(path)
    df = read_text_table(path, f"{path}: change file not found; check the path given to --changes.")
    return parse_changes(df, path.name, path.stem)


def read_change_files(paths: Sequence[str | Path]) -> list[Scenario]:
    """Read several change files; two files with the same stem are an error."""
    out = [c if isinstance(c, Scenario) else read_changes(c) for c in paths]
    seen = {}
    for s in out:
        if s.name in seen:
            raise InputError(f"two change files are both named {s.name!r} ({seen[s.name]} and {s.source}); "
                             "each scenario is named by its file stem, so rename one.")
        seen[s.name] = s.source
    return out


def write_changes(path: str | Path, changes: pd.DataFrame) -> Path:
    """Write a change table (as made by :func:`delta_change`) as a change file."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp")
    changes[list(CHANGE_COLUMNS)].to_csv(tmp, index=False, float_format="%.4f")
    tmp.replace(path)
    return path


# ----------------------------------------------------------------------------
# delta change
# ----------------------------------------------------------------------------

def _period(p, what: str) -> tuple[np.datetime64, np.datetime64]:
    try:
        a, b = (np.datetime64(dt.date.fromisoformat(str(x)) if not isinstance(x, dt.date) else x, "D") for x in p)
    except (TypeError, ValueError):
        raise InputError(f"the {what} period must be two dates written YYYY-MM-DD, e.g. "
                         f"(\"1991-01-01\", \"2020-12-31\"); got {p!r}.") from None
    if b < a:
        raise InputError(f"the {what} period ends ({b}) before it starts ({a}).")
    return a, b


def delta_change(dates: np.ndarray, temperature_c: np.ndarray, precipitation_mm: np.ndarray,
                 reference: tuple, future: tuple, source: str = "the series",
                 min_days_per_month: int = 28) -> pd.DataFrame:
    """Twelve monthly changes between two periods of one daily series (delta change).

    Parameters
    ----------
    dates : ndarray (n,) datetime64 or date-like
    temperature_c, precipitation_mm : ndarray (n,)
        Daily mean temperature (deg C) and daily precipitation (mm); NaN = missing.
    reference, future : (start, end)
        The two periods, dates inclusive ("YYYY-MM-DD" or date).
    source : str
        Named in messages.
    min_days_per_month : int
        Fewest days with a value of each calendar month in each period.

    Returns
    -------
    DataFrame with columns month (1..12), warming_k (K: mean temperature of the month
    in the future period minus that in the reference period) and precip_change_pct (%:
    100 x (mean future precipitation / mean reference precipitation - 1)); common
    practice, see the module docstring.

    Raises
    ------
    InputError
        A period with too few days of some month, or a month without any reference
        precipitation (its ratio is undefined).
    """
    d = np.asarray(pd.DatetimeIndex(np.asarray(dates)).values.astype("datetime64[D]"))
    t = np.asarray(temperature_c, dtype="float64")
    p = np.asarray(precipitation_mm, dtype="float64")
    month = d.astype("datetime64[M]").astype(int) % 12 + 1
    means = {}
    for what, per in (("reference", reference), ("future", future)):
        a, b = _period(per, what)
        sel = (d >= a) & (d <= b)
        rows = []
        for m in range(1, 13):
            k = sel & (month == m)
            nt, np_ = int(np.isfinite(t[k]).sum()), int(np.isfinite(p[k]).sum())
            if min(nt, np_) < min_days_per_month:
                raise InputError(f"{source}: the {what} period {a}..{b} has only {min(nt, np_)} days with values "
                                 f"in month {m} ({min_days_per_month} needed); choose a period the series covers.")
            rows.append((np.nanmean(t[k]), np.nanmean(p[k])))
        means[what] = np.array(rows)
    ref, fut = means["reference"], means["future"]
    if (ref[:, 1] <= 0).any():
        m = int(np.argmax(ref[:, 1] <= 0)) + 1
        raise InputError(f"{source}: month {m} has no precipitation in the reference period, so its "
                         "precipitation ratio is undefined; choose a longer reference period.")
    return pd.DataFrame({"month": np.arange(1, 13), "warming_k": fut[:, 0] - ref[:, 0],
                         "precip_change_pct": 100.0 * (fut[:, 1] / ref[:, 1] - 1.0)})


def delta_change_from_file(path: str | Path, reference: tuple, future: tuple,
                           date_column: str = "date", temperature_column: str = "temperature_c",
                           precipitation_column: str = "precipitation_mm") -> pd.DataFrame:
    """Delta change from a station CSV or from the area mean of a gridded NetCDF-CF file.

    A ``.nc`` file is read like ``[climate] grid_file`` (standard names, units
    converted) and averaged over its grid points day by day (read by time blocks);
    any other file is read as a daily station CSV with the given column names (gaps
    allowed). See :func:`delta_change`.
    """
    path = Path(path)
    if path.suffix.lower() in (".nc", ".nc4", ".netcdf"):
        from .gridded import area_mean_series
        d, t, p = area_mean_series(path)
    else:
        from .forcing import check_table, read_text_table
        df = read_text_table(path, f"{path}: series file not found; check the path.")
        d, t, p = check_table(df, path.name, date_column, temperature_column, precipitation_column,
                              allow_gaps=True)
    return delta_change(d, t, p, reference, future, source=path.name)
