"""Runoff: linear-reservoir routing of released water, and checks against a gauge.

Water released by the snow and ice surfaces (rain and melt that the pack neither
holds nor refreezes) reaches the outlet through storages of different speed. As
in Baker et al. (1982) and Hock and Noetzli (1997, Nordic Hydrology 28), each
kind of released water (from snow, from firn, from ice, from ice-free ground)
passes through its own linear reservoir, storage S = k Q, and the discharge at
the outlet is the sum of the reservoirs' outflows. The reservoirs are solved
exactly over each day for a release spread evenly over the day (see
:func:`linear_reservoir`), so that over any period

    routed volume = released volume - (storage at the end - storage at the start).

Efficiencies against an observed series: Nash-Sutcliffe (Nash and Sutcliffe,
1970, Journal of Hydrology 10), Kling-Gupta (Gupta, Kling, Yilmaz and Martinez,
2009, Journal of Hydrology 377) and the relative volume error.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np

from .errors import InputError

#: Seconds per day.
SECONDS_PER_DAY = 86400.0

#: Default storage constants of the four reservoirs, days. Hock and Noetzli (1997),
#: Nordic Hydrology 28, after Baker et al. (1982), give for glacier runoff about
#: 350 h for firn, 30-100 h for snow and 4-16 h for ice (from memory); the defaults
#: take rounded values inside those ranges. Ice-free ground is our own choice
#: (common practice: slower than snow on a glacier, a few days).
DEFAULT_STORAGE_DAYS = {"snow": 2.5, "firn": 14.5, "ice": 0.5, "ground": 5.0}

#: The reservoirs in their fixed order.
RESERVOIRS = ("snow", "firn", "ice", "ground")


def mm_per_day_to_m3s(mm_per_day, area_m2: float):
    """Volume flow of a water depth per day over an area.

    1 mm d-1 over 86.4 km2 is 1 m3 s-1 (common practice: 1e-3 m x 86.4e6 m2 / 86400 s).

    Parameters
    ----------
    mm_per_day : float or ndarray
        Water depth per day, mm d-1.
    area_m2 : float
        Area, m2.

    Returns
    -------
    float or ndarray
        Discharge, m3 s-1.
    """
    return np.asarray(mm_per_day, dtype="float64") * 1e-3 * float(area_m2) / SECONDS_PER_DAY


def linear_reservoir(release, k_days: float, storage0: float = 0.0):
    """Route a daily release through one linear reservoir, exactly.

    The reservoir obeys dS/dt = R - S/k with the release R constant within each day
    (Baker et al., 1982; Hock and Noetzli, 1997). Over a day of length dt = 1 d the
    exact solution is

        S_t = S_(t-1) exp(-dt/k) + R_t k (1 - exp(-dt/k))

    and the water leaving the reservoir during the day is O_t = R_t + S_(t-1) - S_t,
    so volume is conserved to rounding. For long k the outflow tends to
    S_(t-1) dt / k; for k -> 0 it equals the release. The end-of-day discharge
    S_t / k is the familiar recursion Q_t = Q_(t-1) exp(-dt/k) + R_t (1 - exp(-dt/k)).

    Parameters
    ----------
    release : array_like (n_days,)
        Water released into the reservoir each day, mm d-1 (or any depth per day).
    k_days : float
        Storage constant, days (>= 0; 0 passes the release through).
    storage0 : float
        Storage at the start, mm.

    Returns
    -------
    outflow : ndarray (n_days,)
        Water leaving the reservoir each day, same unit as ``release``.
    storage : ndarray (n_days,)
        Storage at the end of each day, mm.
    """
    r = np.asarray(release, dtype="float64")
    if k_days < 0 or not math.isfinite(k_days):
        raise ValueError("the storage constant must be a finite number of days >= 0")
    if k_days == 0.0:
        return r.copy(), np.zeros_like(r)
    a = math.exp(-1.0 / k_days)
    gain = k_days * (1.0 - a)
    # S_t = a S_(t-1) + gain R_t : a first-order recursive filter (scipy.signal.lfilter)
    from scipy.signal import lfilter

    s, _ = lfilter([gain], [1.0, -a], r, zi=[a * storage0])
    prev = np.concatenate(([storage0], s[:-1]))
    return r + prev - s, s


@dataclass(frozen=True)
class Routed:
    """Routed discharge of one region.

    Attributes
    ----------
    outflow_mm : ndarray (n_days,)
        Water leaving all reservoirs each day, mm d-1 over the region's area.
    by_reservoir_mm : ndarray (4, n_days)
        The same per reservoir, in the order of :data:`RESERVOIRS`.
    storage_mm : ndarray (4,)
        Storage left in each reservoir at the end, mm.
    discharge_m3s : ndarray (n_days,)
        Daily mean discharge, m3 s-1.
    """

    outflow_mm: np.ndarray
    by_reservoir_mm: np.ndarray
    storage_mm: np.ndarray
    discharge_m3s: np.ndarray


def route(release_mm: np.ndarray, storage_days: Sequence[float], area_m2: float,
          storage0_mm: Sequence[float] | None = None) -> Routed:
    """Route the four kinds of released water through parallel linear reservoirs.

    Parameters
    ----------
    release_mm : ndarray (4, n_days)
        Water released each day from snow, firn, ice and ice-free ground (order of
        :data:`RESERVOIRS`), mm d-1 over the region's area.
    storage_days : sequence of 4 floats
        Storage constants, days.
    area_m2 : float
        Area of the region, m2.
    storage0_mm : sequence of 4 floats, optional
        Storage at the start, mm (default empty).

    Returns
    -------
    Routed
    """
    rel = np.asarray(release_mm, dtype="float64")
    if rel.ndim != 2 or rel.shape[0] != len(RESERVOIRS):
        raise ValueError("release_mm must be (4, n_days): snow, firn, ice, ground")
    s0 = np.zeros(len(RESERVOIRS)) if storage0_mm is None else np.asarray(storage0_mm, float)
    outs, ends = [], []
    for i, k in enumerate(storage_days):
        o, s = linear_reservoir(rel[i], float(k), float(s0[i]))
        outs.append(o)
        ends.append(s[-1] if len(s) else s0[i])
    by = np.array(outs).reshape(rel.shape)
    total = by.sum(axis=0)
    return Routed(outflow_mm=total, by_reservoir_mm=by, storage_mm=np.array(ends),
                  discharge_m3s=mm_per_day_to_m3s(total, area_m2))


# ----------------------------------------------------------------------------
# efficiencies
# ----------------------------------------------------------------------------

def _paired(observed, simulated) -> tuple[np.ndarray, np.ndarray]:
    o = np.asarray(observed, dtype="float64")
    s = np.asarray(simulated, dtype="float64")
    if o.shape != s.shape:
        raise ValueError("observed and simulated series need the same length")
    ok = np.isfinite(o) & np.isfinite(s)
    return o[ok], s[ok]


def nash_sutcliffe(observed, simulated) -> float:
    """Nash-Sutcliffe efficiency over the days both series have.

    NSE = 1 - sum (Qo - Qm)^2 / sum (Qo - mean Qo)^2 (Nash and Sutcliffe, 1970,
    Journal of Hydrology 10). 1 is a perfect fit, 0 no better than the observed
    mean. NaN when fewer than two days overlap or the observations are constant.
    """
    o, s = _paired(observed, simulated)
    if o.size < 2:
        return math.nan
    den = np.sum((o - o.mean()) ** 2)
    return math.nan if den == 0 else float(1.0 - np.sum((o - s) ** 2) / den)


def kling_gupta(observed, simulated) -> float:
    """Kling-Gupta efficiency over the days both series have.

    KGE = 1 - sqrt((r - 1)^2 + (alpha - 1)^2 + (beta - 1)^2) with r the linear
    correlation, alpha = sd(Qm) / sd(Qo) and beta = mean(Qm) / mean(Qo) (Gupta,
    Kling, Yilmaz and Martinez, 2009, Journal of Hydrology 377). NaN when fewer
    than two days overlap, or a series is constant, or the observed mean is zero.
    """
    o, s = _paired(observed, simulated)
    if o.size < 2 or o.std() == 0 or s.std() == 0 or o.mean() == 0:
        return math.nan
    r = float(np.corrcoef(o, s)[0, 1])
    alpha = float(s.std() / o.std())
    beta = float(s.mean() / o.mean())
    return float(1.0 - math.sqrt((r - 1) ** 2 + (alpha - 1) ** 2 + (beta - 1) ** 2))


def volume_error(observed, simulated) -> float:
    """Relative volume error over the days both series have: sum(Qm - Qo) / sum(Qo)."""
    o, s = _paired(observed, simulated)
    tot = o.sum()
    return math.nan if o.size == 0 or tot == 0 else float((s.sum() - tot) / tot)


# ----------------------------------------------------------------------------
# observed discharge (the file edge)
# ----------------------------------------------------------------------------

#: Highest daily mean discharge accepted, m3 s-1: the largest rivers' floods stay
#: below about 3e5 m3 s-1 (common practice), a plausibility bound for a gauge file.
MAX_DISCHARGE_M3S = 3.0e5


@dataclass(frozen=True)
class ObservedDischarge:
    """A daily gauge record; days without a value are NaN (gaps allowed).

    Attributes
    ----------
    source : str
    dates : ndarray datetime64[D], consecutive
    discharge_m3s : ndarray float64
    """

    source: str
    dates: np.ndarray
    discharge_m3s: np.ndarray

    def on(self, dates: np.ndarray) -> np.ndarray:
        """The observed values on ``dates`` (NaN where the gauge has none)."""
        d = np.asarray(dates, dtype="datetime64[D]")
        out = np.full(d.shape, np.nan)
        i = (d - self.dates[0]).astype(int)
        ok = (i >= 0) & (i < self.dates.size)
        out[ok] = self.discharge_m3s[i[ok]]
        return out


def check_discharge(table, key: str = "discharge") -> ObservedDischarge:
    """Check a gauge table (``date, discharge_m3s``; empty values are gaps).

    Parameters
    ----------
    table : firnline.observations.Table
    key : str
        The ``[observations]`` key naming the file, for messages.

    Raises
    ------
    InputError
        Missing columns, a date that is not YYYY-MM-DD, a date twice or out of order,
        a value that is not a number, negative or above :data:`MAX_DISCHARGE_M3S`, or
        no value at all; the message names the line.
    """
    from .observations import _require_columns, _where

    _require_columns(table, ["date", "discharge_m3s"], key)
    ci, cq = table.columns.index("date"), table.columns.index("discharge_m3s")
    dates, values = [], []
    for i, row in enumerate(table.rows):
        try:
            d = dt.datetime.strptime(row[ci], "%Y-%m-%d").date()
        except ValueError:
            raise InputError(f"{_where(table, i)}: date {row[ci]!r} is not a date written YYYY-MM-DD; "
                             "correct it or remove the row.") from None
        if dates and d <= dates[-1]:
            what = "appears twice" if d == dates[-1] else f"comes after {dates[-1]}"
            raise InputError(f"{_where(table, i)}: the date {d} {what}; keep one row per day, "
                             "sorted by date.")
        text = row[cq]
        if text == "":
            q = math.nan
        else:
            try:
                q = float(text)
            except ValueError:
                q = math.nan
                ok = False
            else:
                ok = math.isfinite(q)
            if not ok:
                raise InputError(f"{_where(table, i)}: discharge_m3s {text!r} is not a number; "
                                 "correct it, or leave it empty for a gap.")
            if q < 0 or q > MAX_DISCHARGE_M3S:
                raise InputError(f"{_where(table, i)}: discharge_m3s {q:g} is outside 0..{MAX_DISCHARGE_M3S:g} "
                                 "m3 s-1; correct the value (is it in litres per second?).")
        dates.append(d)
        values.append(q)
    if not np.isfinite(values).any():
        raise InputError(f"{table.source}: no discharge value in the file; give at least one day.")
    d = np.array(dates, dtype="datetime64[D]")
    full = np.arange(d[0], d[-1] + 1, dtype="datetime64[D]")
    q = np.full(full.shape, np.nan)
    q[(d - d[0]).astype(int)] = values
    return ObservedDischarge(source=table.source, dates=full, discharge_m3s=q)


def read_discharge(path: str | Path, key: str = "discharge") -> ObservedDischarge:
    """Read and check a gauge CSV (``date, discharge_m3s``)."""
    from .observations import read_table

    return check_discharge(read_table(path, key), key)
