"""The observation operator: modelled values over the exact observation periods.

An observation's period ``start_date .. end_date`` is inclusive (start of the first
day to the end of the last; see :mod:`firnline.observations`). The kernel records the
cumulative balance of every modelled cell at the day boundaries ``start`` and
``end + 1`` of every period (``snapshot_days``), so the balance over a period is the
difference of two snapshots, for any dates, not only balance years. A point's value is
that of the DEM cell containing it. A glacier-wide value is the area-weighted mean over
the glacier's cells, the weights being the share of each cell the glacier covers
(``Glaciers.fractions``; all cells have the same area)::

    B_glacier = sum_i f_i b_i / sum_i f_i

Every evaluation reuses the grid, forcing and radiation read once by
:func:`firnline.model.prepare`, runs the kernel only on the cells the observations need
(the point cells and the cells of the glaciers with glacier-wide observations) and
stops at the last day any observation needs (the model always starts on the first day
of the record, with no snow).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import sparse

from ..config import Config
from ..errors import InputError
from ..model import Setup, simulate
from ..observations import GlacierBalances, PointBalances


@dataclass(frozen=True)
class ObservationOperator:
    """From kernel snapshots to modelled observations.

    Attributes
    ----------
    positions : ndarray int
        Cells to model (positions in ``Setup.cells`` order), ascending.
    snapshot_days : ndarray int
        Sorted day boundaries at which the kernel records cumulative balances.
    weights : scipy.sparse.csr_matrix (n_obs, n_positions)
        Each row sums to 1: one cell for a point, the glacier's cover shares for a glacier.
    start_col, end_col : ndarray int (n_obs,)
        Columns in ``snapshot_days`` of each observation's start and end boundary.
    n_days : int
        Days the kernel must run (the last boundary needed).
    """

    positions: np.ndarray
    snapshot_days: np.ndarray
    weights: sparse.csr_matrix
    start_col: np.ndarray
    end_col: np.ndarray
    n_days: int

    def apply(self, snapshots_mm: np.ndarray) -> np.ndarray:
        """Modelled balance of each observation, m w.e.

        Parameters
        ----------
        snapshots_mm : ndarray (n_snapshots, n_positions)
            Cumulative balance (mm w.e.) of each modelled cell at ``snapshot_days``.
        """
        cum = np.asarray(self.weights @ np.asarray(snapshots_mm, dtype="float64").T)  # (n_obs, n_snap)
        rows = np.arange(cum.shape[0])
        return (cum[rows, self.end_col] - cum[rows, self.start_col]) * 1e-3  # mm -> m w.e.


def build_operator(setup: Setup, points: PointBalances | None,
                   glaciers: GlacierBalances | None) -> ObservationOperator:
    """The cells, snapshot days and weights that give the modelled observations.

    Observations are ordered points first, then glacier-wide values (as in
    :func:`observation_table`).
    """
    cells = setup.cells
    parts, starts, ends = [], [], []
    point_pos = np.zeros(0, dtype=np.int64)
    if points is not None and len(points):
        point_pos = np.searchsorted(cells, points.flat_index)
        parts.append(point_pos)
        starts.append(points.start_day)
        ends.append(points.end_day)
    used = []
    if glaciers is not None and len(glaciers):
        used = sorted(set(int(g) for g in glaciers.glacier_index))
        parts += [np.asarray(setup.glacier_pos[g], dtype=np.int64) for g in used]
        starts.append(glaciers.start_day)
        ends.append(glaciers.end_day)
    positions = np.unique(np.concatenate(parts)) if parts else np.zeros(0, dtype=np.int64)
    rows, cols, vals = [], [], []
    n_obs = 0
    for p in point_pos:
        rows.append(np.array([n_obs]))
        cols.append(np.searchsorted(positions, [p]))
        vals.append(np.ones(1))
        n_obs += 1
    if glaciers is not None:
        per = {}
        for g in used:
            frac = np.asarray(setup.glaciers.fractions[g], dtype="float64")
            per[g] = (np.searchsorted(positions, setup.glacier_pos[g]), frac / frac.sum())
        for g in glaciers.glacier_index:
            c, w = per[int(g)]
            rows.append(np.full(c.size, n_obs))
            cols.append(c)
            vals.append(w)
            n_obs += 1
    if n_obs == 0:
        raise InputError("the observation files hold no observations; add rows.")
    w = sparse.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                          shape=(n_obs, positions.size))
    start = np.concatenate(starts)
    end = np.concatenate(ends)
    days = np.unique(np.concatenate([start, end]))
    return ObservationOperator(positions=positions, snapshot_days=days, weights=w,
                               start_col=np.searchsorted(days, start), end_col=np.searchsorted(days, end),
                               n_days=int(days[-1]))


def observation_table(setup: Setup, points: PointBalances | None,
                      glaciers: GlacierBalances | None) -> pd.DataFrame:
    """One row per observation (points first): where, when, observed value and sigma."""
    frames = []
    if points is not None and len(points):
        frames.append(pd.DataFrame({
            "kind": "point", "id": points.point_id, "file": points.source, "line": points.lines,
            "start_date": [d.isoformat() for d in points.start_date],
            "end_date": [d.isoformat() for d in points.end_date],
            "days": points.end_day - points.start_day, "x_m": points.x_m, "y_m": points.y_m,
            "elevation_m": points.elevation_m, "dh_m": np.nan,
            "observed_mwe": points.balance_mwe, "sigma_mwe": points.sigma_mwe}))
    if glaciers is not None and len(glaciers):
        gl = setup.glaciers
        mean_z = {}
        for g in set(int(i) for i in glaciers.glacier_index):
            frac = np.asarray(gl.fractions[g], dtype="float64")
            mean_z[g] = float(np.sum(frac * setup.elevation(setup.glacier_pos[g])) / frac.sum())
        frames.append(pd.DataFrame({
            "kind": "glacier", "id": glaciers.glacier, "file": glaciers.source, "line": glaciers.lines,
            "start_date": [d.isoformat() for d in glaciers.start_date],
            "end_date": [d.isoformat() for d in glaciers.end_date],
            "days": glaciers.end_day - glaciers.start_day, "x_m": np.nan, "y_m": np.nan,
            "elevation_m": [mean_z[int(g)] for g in glaciers.glacier_index], "dh_m": glaciers.dh_m,
            "observed_mwe": glaciers.balance_mwe, "sigma_mwe": glaciers.sigma_mwe}))
    return pd.concat(frames, ignore_index=True)


def first_days(setup: Setup, n_days: int) -> Setup:
    """The setup with its forcing cut to the first ``n_days`` days (all when n_days >= the record).

    The cut keeps at least the balance years the spin-up cycles (``[snow] spinup_years`` of
    them from the start of the record, :func:`firnline.model.spinup_days`), so the cut run
    starts from the same spun-up state as a run over the whole record.
    """
    f = setup.forcing
    spin_years = int(setup.config.snow.spinup_years)
    if spin_years > 0:
        n_days = max(int(n_days), int(np.searchsorted(np.asarray(f.year_index), spin_years)))
    if n_days >= f.n_days:
        return setup
    n = max(int(n_days), 1)
    last_year = int(f.year_index[n - 1])
    forcing = dataclasses.replace(f, dates=f.dates[:n], temperature_c=f.temperature_c[:n],
                                  precipitation_mm=f.precipitation_mm[:n], years=f.years[:last_year + 1],
                                  year_index=f.year_index[:n], winter=f.winter[:n])
    return dataclasses.replace(setup, forcing=forcing)


def modelled_values(setup: Setup, config: Config, operator: ObservationOperator) -> np.ndarray:
    """Modelled balance of each observation (m w.e.) for the parameters of ``config``.

    ``setup`` should already be cut with :func:`first_days` to ``operator.n_days``
    (it is cut here otherwise).
    """
    if setup.forcing.n_days > operator.n_days:
        setup = first_days(setup, operator.n_days)
    kres = simulate(setup, config, snapshot_days=operator.snapshot_days, cells=operator.positions, daily=False)
    return operator.apply(kres.snapshots[:, 0, :operator.positions.size])   # the cells' own columns
