"""Calibration: fit model parameters to stakes, snow probing and glacier-wide balances.

The fit is weighted non-linear least squares (``scipy.optimize.least_squares``,
trust-region reflective, finite-difference Jacobian) of the normalised residuals

    r_j = (modelled_j - observed_j) / sigma_j

over the parameters named in ``[calibration] parameters``.

Modelled values over the exact observation periods
--------------------------------------------------
An observation's period ``start_date .. end_date`` is inclusive (start of the
first day to the end of the last; see :mod:`firnline.observations`). The kernel
records the cumulative balance of every modelled cell at the day boundaries
``start`` and ``end + 1`` of every period (``snapshot_days``), so the balance
over a period is the difference of two snapshots, for any dates, not only
balance years. A point's value is that of the DEM cell containing it. A
glacier-wide value is the area-weighted mean over the glacier's cells, the
weights being the share of each cell the glacier covers
(``Glaciers.fractions``; all cells have the same area)::

    B_glacier = sum_i f_i b_i / sum_i f_i

Every evaluation reuses the grid, forcing and radiation read once by
:func:`firnline.model.prepare`, runs the kernel only on the cells the
observations need (the point cells and the cells of the glaciers with
glacier-wide observations) and stops at the last day any observation needs
(the model always starts on the first day of the record, with no snow).

Parameters, bounds and ties
---------------------------
* ``parameters``: any numeric key of ``[melt]`` or ``[downscaling]`` that the
  chosen melt method uses (a key the method ignores is refused, as the
  observations could not determine it). ``lapse_rate_k_per_m`` can be fitted
  only when it holds a single value (not twelve monthly values).
  ``transmissivity`` is refused: it shapes the radiation table, which is built
  once from the DEM; fit ``radiation_factor_snow`` / ``radiation_factor_ice``
  (or ``melt_factor_mm_per_day_k``) instead.
* ``bounds = { key = [low, high] }``; a key without bounds gets the sensible
  physical range in :data:`DEFAULT_BOUNDS` (each inside the range the config
  schema allows). Bounds must lie within the schema's allowed range, and the
  starting value (the key's value in the config) within the bounds.
* ``ratios = { tied_key = ["other_key", ratio] }``: ``tied_key`` is not fitted
  but set to ``ratio x other_key`` at every evaluation and in the result (for
  example ``ddf_ice_mm_per_day_k = ["ddf_snow_mm_per_day_k", 2.0]``). The other
  key may be fitted or fixed; the ratio is a positive number; a tied key cannot
  be a parameter or the other key of another tie.

Uncertainties
-------------
The covariance of the fitted parameters is ``(J^T J)^-1`` with ``J`` the Jacobian
of the normalised residuals at the solution, **scaled by the reduced
chi-square** ``chi2 / (n_obs - n_params)`` when there are degrees of freedom
left (as ``scipy.optimize.curve_fit`` does with ``absolute_sigma=False``), so
that a misfit larger than the stated sigmas widens the standard errors. With no
degrees of freedom the unscaled covariance (from the sigmas alone) is used and a
warning says so. Parameters the observations cannot determine (rank-deficient
Jacobian) get no standard error (null in JSON).

Residuals are ``modelled - observed`` (m w.e.): a positive bias means the model
balance is too high. RMSE is the unweighted root-mean-square residual.

Files are read by :func:`calibrate` (through ``prepare`` and
:func:`firnline.observations.load_observations`) and written only by
:func:`write_calibration`; the fit itself is pure.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import math
import re
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd
from scipy import sparse
from scipy.optimize import least_squares

from . import __version__
from .config import PATH_KEYS, SCHEMA, Config, numeric_keys, parse_config
from .errors import InputError
from .model import CAUTION, Setup, prepare, simulate
from .observations import GlacierBalances, PointBalances, load_observations

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

#: Default bounds of each calibratable key: sensible physical ranges, each within
#: the range the config schema allows. Degree-day factors enclose the published
#: ranges (snow about 2.5-11.6, ice about 6.6-20 mm w.e. d-1 K-1; Hock 2003,
#: J. Hydrology 282, from memory) with margin; radiation factors enclose the
#: Hock (1999) values (0.0144 and 0.0192 in daily units, from memory) five-fold;
#: the lapse rate runs from dry-adiabatic (-0.0098 K m-1) to isothermal; the
#: others are common practice.
DEFAULT_BOUNDS = {
    "ddf_snow_mm_per_day_k": (1.0, 15.0),
    "ddf_ice_mm_per_day_k": (2.0, 25.0),
    "melt_factor_mm_per_day_k": (0.0, 15.0),
    "radiation_factor_snow": (0.0, 0.1),
    "radiation_factor_ice": (0.0, 0.1),
    "threshold_c": (-3.0, 3.0),
    "precip_factor": (0.3, 4.0),
    "precip_gradient_per_m": (-0.001, 0.003),
    "lapse_rate_k_per_m": (-0.0098, 0.0),
}

#: Keys each melt method uses; the downscaling keys and threshold_c serve both.
METHOD_KEYS = {
    "degree-day": {"ddf_snow_mm_per_day_k", "ddf_ice_mm_per_day_k"},
    "radiation": {"melt_factor_mm_per_day_k", "radiation_factor_snow", "radiation_factor_ice"},
}
SHARED_KEYS = {"threshold_c", "precip_gradient_per_m", "precip_factor", "lapse_rate_k_per_m"}

#: Relative finite-difference step on the internal variable u = 1 + (x - low) / (high - low),
#: so each parameter is stepped by 1e-5 to 2e-5 of its bound span.
DIFF_STEP = 1e-5
#: Convergence: stop when a step moves the internal variables u (each spanning 1 over
#: its bounds) by less than about X_TOLERANCE (relative), i.e. every parameter by less
#: than about 2e-4 of its bound span, far below any standard error the observations
#: allow; or when the cost changes by less than F_TOLERANCE (relative). Tighter
#: tolerances only chase the tiny kinks of the piecewise-linear melt model.
X_TOLERANCE = 1e-4
F_TOLERANCE = 1e-6
#: Function evaluations allowed per fitted parameter (besides the Jacobian's).
MAX_NFEV_PER_PARAMETER = 40
#: |correlation| above which a pair of parameters is reported as strongly correlated.
STRONG_CORRELATION = 0.9
#: A fitted value closer than this share of its bound span to a bound is "at the bound".
AT_BOUND_SHARE = 1e-4
#: Singular values of the Jacobian below this share of the largest count as zero.
RANK_TOLERANCE = 1e-8

RESIDUAL_COLUMNS = ["kind", "id", "file", "line", "start_date", "end_date", "days", "x_m", "y_m",
                    "elevation_m", "dh_m", "observed_mwe", "sigma_mwe", "modelled_initial_mwe",
                    "modelled_mwe", "residual_mwe", "normalised_residual"]


# ----------------------------------------------------------------------------
# what to fit
# ----------------------------------------------------------------------------

def _section_of(key: str) -> str:
    return "melt" if key in SCHEMA["melt"] else "downscaling"


def calibratable_keys(method: str) -> list[str]:
    """Numeric keys of [melt] and [downscaling] that can be fitted under a melt method."""
    keys = set(numeric_keys("melt")) | set(numeric_keys("downscaling")) | {"lapse_rate_k_per_m"}
    used = METHOD_KEYS[method] | SHARED_KEYS
    return sorted(k for k in keys if k in used)


def _check_key(config: Config, key: str, where: str) -> float:
    """Check that ``key`` can be fitted or tied under this config; return its current value."""
    label = config.source.name if config.source else "config"
    method = config.melt.method
    if key == "transmissivity":
        raise InputError(f"{label}: {where} names \"transmissivity\", which cannot be calibrated "
                         "because it shapes the radiation table built once from the DEM; fit "
                         "radiation_factor_snow and radiation_factor_ice instead.")
    allowed = calibratable_keys(method)
    if key not in allowed:
        other = [m for m, keys in METHOD_KEYS.items() if key in keys]
        why = (f"is not used by [melt] method = \"{method}\" (it belongs to \"{other[0]}\")" if other
               else "is not a numeric key of [melt] or [downscaling]")
        raise InputError(f"{label}: {where} names \"{key}\", which {why}; choose from "
                         + ", ".join(allowed) + ".")
    if key == "lapse_rate_k_per_m":
        lr = config.downscaling.lapse_rate_k_per_m
        if len(lr) != 1:
            raise InputError(f"{label}: {where} names \"lapse_rate_k_per_m\", but [downscaling] "
                             "lapse_rate_k_per_m holds twelve monthly values; give one value to fit "
                             "it, or leave it out of the calibration.")
        return float(lr[0])
    return float(getattr(getattr(config, _section_of(key)), key))


def _schema_check(key: str, value: float, where: str) -> None:
    SCHEMA[_section_of(key)][key][0](float(value), where)


@dataclass(frozen=True)
class FitSpec:
    """What is fitted: names, starting values, bounds and ties.

    Attributes
    ----------
    parameters : tuple of str
        The fitted keys, in config order.
    initial, lower, upper : ndarray float
        Starting values (the config's) and bounds, in each key's units.
    ratios : dict
        ``tied_key -> (other_key, ratio)``.
    fixed : dict
        Current values of tied keys' other keys that are not fitted.
    """

    parameters: tuple
    initial: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    ratios: dict = field(default_factory=dict)
    fixed: dict = field(default_factory=dict)

    @property
    def span(self) -> np.ndarray:
        return self.upper - self.lower

    def to_internal(self, x: np.ndarray) -> np.ndarray:
        """u = 1 + (x - lower) / span, in [1, 2]: the variable the optimiser steps."""
        return 1.0 + (np.asarray(x, dtype="float64") - self.lower) / self.span

    def to_values(self, u: np.ndarray) -> np.ndarray:
        return self.lower + (np.asarray(u, dtype="float64") - 1.0) * self.span

    def values(self, x) -> dict[str, float]:
        """Every key set by a trial: the fitted ones and the tied ones."""
        out = {k: float(v) for k, v in zip(self.parameters, x)}
        for tied, (other, ratio) in self.ratios.items():
            out[tied] = ratio * (out[other] if other in out else self.fixed[other])
        return out


def fit_spec(config: Config) -> FitSpec:
    """Check ``[calibration]`` against the config and build the :class:`FitSpec`.

    Raises
    ------
    InputError
        No [calibration] section; a key that is not a numeric key of [melt] or
        [downscaling], unused by the melt method, a monthly lapse rate or the
        transmissivity; bounds beyond the schema's range or not containing the
        starting value; a malformed or conflicting ratio.
    """
    label = config.source.name if config.source else "config"
    cal = config.calibration
    if cal is None:
        raise InputError(f"{label}: there is no [calibration] section; add one with parameters = "
                         "[\"ddf_snow_mm_per_day_k\", ...] (see configs/demo_calibrate.toml).")
    names = list(cal.parameters)
    if len(set(names)) != len(names):
        dup = next(n for n in names if names.count(n) > 1)
        raise InputError(f"{label}: [calibration] parameters names \"{dup}\" twice; name each key once.")
    x0, lo, hi = [], [], []
    for p in names:
        v = _check_key(config, p, "[calibration] parameters")
        b = cal.bounds.get(p, DEFAULT_BOUNDS[p])
        low, high = float(b[0]), float(b[1])
        for bound in (low, high):
            _schema_check(p, bound, f"{label}: [calibration] bounds for \"{p}\"")
        if not low <= v <= high:
            given = "the bounds given" if p in cal.bounds else "the default bounds"
            raise InputError(f"{label}: the starting value {v:g} of {p} (from [{_section_of(p)}]) lies "
                             f"outside {given} [{low:g}, {high:g}]; change the starting value or set "
                             f"[calibration] bounds for it.")
        x0.append(v)
        lo.append(low)
        hi.append(high)
    ratios, fixed = {}, {}
    for tied, spec in cal.ratios.items():
        where = "[calibration] ratios"
        _check_key(config, tied, where)
        if (not isinstance(spec, list) or len(spec) != 2 or not isinstance(spec[0], str)
                or isinstance(spec[1], bool) or not isinstance(spec[1], (int, float))
                or not math.isfinite(spec[1]) or spec[1] <= 0):
            raise InputError(f"{label}: [calibration] ratios for \"{tied}\" must be [\"other_key\", ratio] "
                             f"with a positive ratio, e.g. {tied} = [\"ddf_snow_mm_per_day_k\", 2.0]; "
                             f"got {spec!r}.")
        other, ratio = spec[0], float(spec[1])
        if tied in names:
            raise InputError(f"{label}: \"{tied}\" is both in [calibration] parameters and tied in ratios; "
                             "a tied key is not fitted, so remove it from one of them.")
        if other == tied or other in cal.ratios:
            raise InputError(f"{label}: [calibration] ratios ties \"{tied}\" to \"{other}\", which is "
                             "itself tied; tie each key to a fitted or fixed key that is not tied.")
        other_value = _check_key(config, other, f"[calibration] ratios for \"{tied}\"")
        if other in names:
            i = names.index(other)
            reach = (lo[i] * ratio, hi[i] * ratio)
        else:
            fixed[other] = other_value
            reach = (other_value * ratio,)
        for v in reach:
            _schema_check(tied, v, f"{label}: [calibration] ratios make \"{tied}\" = {ratio:g} x "
                                   f"{other}, which")
        ratios[tied] = (other, ratio)
    return FitSpec(parameters=tuple(names), initial=np.array(x0), lower=np.array(lo),
                   upper=np.array(hi), ratios=ratios, fixed=fixed)


# ----------------------------------------------------------------------------
# modelled values over the observation periods
# ----------------------------------------------------------------------------

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
            mean_z[g] = float(np.sum(frac * setup.z_m[setup.glacier_pos[g]]) / frac.sum())
        frames.append(pd.DataFrame({
            "kind": "glacier", "id": glaciers.glacier, "file": glaciers.source, "line": glaciers.lines,
            "start_date": [d.isoformat() for d in glaciers.start_date],
            "end_date": [d.isoformat() for d in glaciers.end_date],
            "days": glaciers.end_day - glaciers.start_day, "x_m": np.nan, "y_m": np.nan,
            "elevation_m": [mean_z[int(g)] for g in glaciers.glacier_index], "dh_m": glaciers.dh_m,
            "observed_mwe": glaciers.balance_mwe, "sigma_mwe": glaciers.sigma_mwe}))
    return pd.concat(frames, ignore_index=True)


def first_days(setup: Setup, n_days: int) -> Setup:
    """The setup with its forcing cut to the first ``n_days`` days (all when n_days >= the record)."""
    f = setup.forcing
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
    kres = simulate(setup, config, snapshot_days=operator.snapshot_days, cells=operator.positions)
    return operator.apply(kres.snapshots[:, 0, :])


# ----------------------------------------------------------------------------
# the fit
# ----------------------------------------------------------------------------

@dataclass
class CalibrationResult:
    """Result of :func:`calibrate`.

    Attributes
    ----------
    config : Config
        The config as given.
    fitted : Config
        The config with the fitted (and tied) values.
    spec : FitSpec
    value, std_error : dict name -> float
        Fitted values and standard errors (NaN where undetermined), each key's units.
    correlation : ndarray (n_params, n_params)
        Correlation matrix of the fitted parameters (NaN where undetermined).
    tied : dict name -> float
        Values of the tied keys.
    records : DataFrame with :data:`RESIDUAL_COLUMNS`
    rmse_mwe, bias_mwe, rmse_initial_mwe : float
    chi_square_reduced : float (NaN without degrees of freedom)
    n_obs, n_evaluations, dof : int
    converged : bool
    message : str
        The optimiser's stopping reason.
    warnings, notes : list of str
    elapsed_s : float
    """

    config: Config
    fitted: Config
    spec: FitSpec
    value: dict
    std_error: dict
    correlation: np.ndarray
    tied: dict
    records: pd.DataFrame
    rmse_mwe: float
    bias_mwe: float
    rmse_initial_mwe: float
    chi_square_reduced: float
    n_obs: int
    n_evaluations: int
    dof: int
    converged: bool
    message: str
    warnings: list
    notes: list
    elapsed_s: float

    def to_json(self) -> dict:
        """The content of calibration.json."""
        spec = self.spec
        params = {p: {"value": self.value[p], "std_error": self.std_error[p],
                      "initial": float(spec.initial[i]),
                      "bounds": [float(spec.lower[i]), float(spec.upper[i])]}
                  for i, p in enumerate(spec.parameters)}
        corr = {a: {b: float(self.correlation[i, j]) for j, b in enumerate(spec.parameters)}
                for i, a in enumerate(spec.parameters)}
        recs = self.records.to_dict(orient="records")
        return {
            "firnline_version": __version__,
            "created_utc": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
            "caution": CAUTION,
            "config_file": self.config.source,
            "melt_method": self.config.melt.method,
            "parameters": params,
            "tied": {k: {"value": v, "ratio": spec.ratios[k][1], "of": spec.ratios[k][0]}
                     for k, v in self.tied.items()},
            "rmse_mwe": self.rmse_mwe,
            "bias_mwe": self.bias_mwe,
            "rmse_initial_mwe": self.rmse_initial_mwe,
            "n_obs": self.n_obs,
            "n_evaluations": self.n_evaluations,
            "degrees_of_freedom": self.dof,
            "chi_square_reduced": self.chi_square_reduced,
            "std_error_method": ("Jacobian of the sigma-weighted residuals at the solution, covariance "
                                 "(J^T J)^-1 scaled by the reduced chi-square" if self.dof > 0 else
                                 "Jacobian of the sigma-weighted residuals at the solution, covariance "
                                 "(J^T J)^-1 from the stated sigmas alone (no degrees of freedom left)"),
            "correlation": corr,
            "converged": self.converged,
            "optimiser_message": self.message,
            "residual_definition": "modelled minus observed, m w.e.; bias = mean residual",
            "period_definition": "start_date .. end_date inclusive (start of the first day to the end "
                                 "of the last)",
            "point_cells": "each point uses the DEM cell that contains it, at that cell's elevation "
                           "(no elevation correction)",
            "observations": recs,
            "warnings": self.warnings,
            "notes": self.notes,
            "elapsed_s": self.elapsed_s,
        }


def _covariance(jac_u: np.ndarray, span: np.ndarray, chi2_red: float) -> tuple[np.ndarray, np.ndarray]:
    """Covariance of the parameters from the Jacobian in the internal variables.

    Returns the covariance (parameter units) and a mask of undetermined parameters
    (those with a component in the Jacobian's null space); their rows and columns are NaN.
    """
    p = jac_u.shape[1]
    _, s, vt = np.linalg.svd(jac_u, full_matrices=True)
    s_full = np.zeros(p)
    s_full[:s.size] = s
    keep = s_full > RANK_TOLERANCE * (s_full.max() if s_full.max() > 0 else 1.0)
    v = vt.T
    cov_u = (v[:, keep] / s_full[keep] ** 2) @ v[:, keep].T
    null = v[:, ~keep]
    undetermined = (np.abs(null) > 1e-6).any(axis=1) if null.size else np.zeros(p, bool)
    if math.isfinite(chi2_red):
        cov_u = cov_u * chi2_red
    cov = cov_u * np.outer(span, span)
    cov[undetermined, :] = np.nan
    cov[:, undetermined] = np.nan
    return cov, undetermined


def calibrate(config: Config, setup: Setup | None = None,
              progress: Callable[[str, int], Callable[[int], None]] | None = None) -> CalibrationResult:
    """Fit ``[calibration] parameters`` to the observations of ``[observations]``.

    Parameters
    ----------
    config : Config
        With ``[observations]`` and ``[calibration]`` sections.
    setup : Setup, optional
        A prepared setup to reuse (default: :func:`firnline.model.prepare` is called once).
    progress : callable(label, total) -> callable(done), optional
        Makes a progress callback (the CLI passes tqdm bars).

    Returns
    -------
    CalibrationResult

    Raises
    ------
    InputError
        A bad [calibration] section or bad observations (see :func:`fit_spec` and
        :mod:`firnline.observations`).
    """
    t0 = time.perf_counter()
    spec = fit_spec(config)
    if setup is None:
        setup = prepare(config, progress)
    points, glaciers = load_observations(config, setup)
    table = observation_table(setup, points, glaciers)
    op = build_operator(setup, points, glaciers)
    short = first_days(setup, op.n_days)
    observed = table["observed_mwe"].to_numpy(dtype="float64")
    sigma = table["sigma_mwe"].to_numpy(dtype="float64")
    n_obs, n_par = len(observed), len(spec.parameters)
    max_nfev = MAX_NFEV_PER_PARAMETER * n_par
    bar = progress("model runs", max_nfev * (n_par + 1)) if progress else None
    cache: dict[bytes, np.ndarray] = {}
    count = {"n": 0}

    def model_at(u: np.ndarray) -> np.ndarray:
        key = np.asarray(u, dtype="float64").tobytes()
        if key not in cache:
            trial = config.with_values(**spec.values(spec.to_values(u)))
            cache[key] = modelled_values(short, trial, op)
            count["n"] += 1
            if bar:
                bar(count["n"])
        return cache[key]

    def residuals(u: np.ndarray) -> np.ndarray:
        return (model_at(u) - observed) / sigma

    u0 = spec.to_internal(spec.initial)
    initial_model = model_at(u0)
    res = least_squares(residuals, u0, bounds=(np.ones(n_par), 2.0 * np.ones(n_par)), method="trf",
                        diff_step=DIFF_STEP, xtol=X_TOLERANCE, ftol=F_TOLERANCE, max_nfev=max_nfev)
    if bar:
        bar(max_nfev * (n_par + 1))
    x = spec.to_values(res.x)
    modelled = model_at(res.x)
    resid = modelled - observed
    r = resid / sigma
    dof = n_obs - n_par
    chi2_red = float(np.sum(r ** 2) / dof) if dof > 0 else math.nan
    cov, undetermined = _covariance(np.atleast_2d(res.jac), spec.span, chi2_red)
    se = np.sqrt(np.diag(cov))
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cov / np.outer(se, se)

    warnings = _warnings(spec, x, res, corr, undetermined, np.atleast_2d(res.jac), n_obs, dof)
    off_ice = _points_off_glacier(setup, points)
    warnings += off_ice
    values = spec.values(x)
    fitted = config.with_values(**values)
    records = table.assign(modelled_initial_mwe=initial_model, modelled_mwe=modelled,
                           residual_mwe=resid, normalised_residual=r)[RESIDUAL_COLUMNS]
    rmse0 = float(np.sqrt(np.mean((initial_model - observed) ** 2)))
    return CalibrationResult(
        config=config, fitted=fitted, spec=spec,
        value={p: float(v) for p, v in zip(spec.parameters, x)},
        std_error={p: float(s) for p, s in zip(spec.parameters, se)},
        correlation=corr, tied={k: values[k] for k in spec.ratios}, records=records,
        rmse_mwe=float(np.sqrt(np.mean(resid ** 2))), bias_mwe=float(np.mean(resid)),
        rmse_initial_mwe=rmse0, chi_square_reduced=chi2_red, n_obs=n_obs,
        n_evaluations=count["n"], dof=dof, converged=bool(res.status > 0), message=str(res.message),
        warnings=warnings, notes=list(setup.notes), elapsed_s=time.perf_counter() - t0)


def _warnings(spec: FitSpec, x, res, corr, undetermined, jac, n_obs, dof) -> list[str]:
    names = spec.parameters
    out = []
    if n_obs < len(names):
        out.append(f"underdetermined: {n_obs} observation{'s' if n_obs != 1 else ''} for {len(names)} "
                   "parameters; many combinations fit equally well, so the values are not determined "
                   "and have no standard error; add observations or fit fewer parameters.")
    else:
        flat = [p for p, col in zip(names, jac.T) if not np.any(col)]
        for p in flat:
            out.append(f"the observations do not depend on {p}; it stays at its starting value and has "
                       "no standard error.")
        rest = [p for p, u in zip(names, undetermined) if u and p not in flat]
        if rest:
            out.append("the observations cannot tell " + " and ".join(rest) + " apart (rank-deficient "
                       "Jacobian); they have no standard error; add observations of another kind "
                       "(for example winter balances) or fit fewer parameters.")
        if dof == 0:
            out.append("as many observations as parameters: no misfit is left to judge the fit by; the "
                       "standard errors come from the stated sigmas alone.")
    for i, p in enumerate(names):
        near = AT_BOUND_SHARE * spec.span[i]
        if x[i] - spec.lower[i] <= near or spec.upper[i] - x[i] <= near:
            which = "lower" if x[i] - spec.lower[i] <= near else "upper"
            bound = spec.lower[i] if which == "lower" else spec.upper[i]
            out.append(f"{p} = {x[i]:.6g} sits at its {which} bound {bound:g}; the best fit may lie "
                       "beyond it and its standard error is not meaningful; check the observations or "
                       "widen [calibration] bounds.")
    for i in range(len(names)):
        for j in range(i + 1, len(names)):
            if math.isfinite(corr[i, j]) and abs(corr[i, j]) > STRONG_CORRELATION:
                out.append(f"{names[i]} and {names[j]} are strongly correlated (r = {corr[i, j]:+.2f}); "
                           "the observations mostly fix a combination of the two.")
    if res.status == 0:
        out.append(f"the fit stopped at the evaluation limit without converging ({res.message}).")
    return out


def _points_off_glacier(setup: Setup, points: PointBalances | None) -> list[str]:
    if points is None or not len(points):
        return []
    pos = np.searchsorted(setup.cells, points.flat_index)
    off = ~setup.glacier_mask[pos]
    ids = sorted(set(np.asarray(points.point_id, dtype=object)[off]))
    if not ids:
        return []
    return [f"point{'s' if len(ids) > 1 else ''} " + ", ".join(ids) + " lie on cells outside every "
            "glacier, where the model melts snow but no ice."]


# ----------------------------------------------------------------------------
# outputs: calibrated.toml, console table, plot, files
# ----------------------------------------------------------------------------

_BARE_KEY = re.compile(r"^[A-Za-z0-9_-]+$")


def _toml_key(k: str) -> str:
    return k if _BARE_KEY.match(k) else json.dumps(k, ensure_ascii=False)


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        f = float(v)
        if not math.isfinite(f):
            raise ValueError("TOML config values must be finite")
        return repr(f)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, Path):
        return json.dumps(str(v), ensure_ascii=False)
    if isinstance(v, (dt.date, dt.datetime, dt.time)):
        return v.isoformat()
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{_toml_key(k)} = {_toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(f"cannot write {type(v).__name__} as TOML")


def toml_text(data: dict, header: str = "") -> str:
    """A config mapping ({section: {key: value}}) as TOML text, with an optional comment header."""
    lines = [f"# {h}" if h else "#" for h in header.splitlines()] if header else []
    for section, keys in data.items():
        lines.append("")
        lines.append(f"[{_toml_key(section)}]")
        for k, v in keys.items():
            lines.append(f"{_toml_key(k)} = {_toml_value(v)}")
    return "\n".join(lines).lstrip("\n") + "\n"


def calibrated_config(result: CalibrationResult) -> dict:
    """The whole config as a TOML mapping, with the fitted values and absolute paths.

    Paths are written absolute so that the file runs from any folder; the output
    folder and the radiation cache folder are written even where they were defaults.
    """
    cfg = result.fitted
    data = {s: dict(v) for s, v in cfg.raw.items()}
    for section, key in sorted(PATH_KEYS):
        sec = getattr(cfg, section, None)
        if sec is None:
            continue
        value = getattr(sec, key)
        if value is None:
            continue
        if section in data or section in ("output", "radiation"):
            data.setdefault(section, {})[key] = str(Path(value))
    return data


def calibrated_toml(result: CalibrationResult, out_dir: Path) -> str:
    """calibrated.toml: the checked text (it parses as a config when placed in ``out_dir``)."""
    lines = [f"Written by firnline {__version__} calibrate from {result.config.source or 'a config'}.",
             "Fitted: " + ", ".join(f"{p} = {v:.6g}" for p, v in result.value.items())
             + (("; tied: " + ", ".join(f"{k} = {v:.6g}" for k, v in result.tied.items()))
                if result.tied else "") + ".",
             f"RMSE {result.rmse_mwe:.3f} m w.e. over {result.n_obs} observations (calibration.json).",
             "Paths are absolute. " + CAUTION]
    text = toml_text(calibrated_config(result), "\n".join(lines))
    parse_config(tomllib.loads(text), Path(out_dir).resolve())  # must run as it is
    return text


def fit_table(result: CalibrationResult) -> str:
    """The console table of the fit."""
    spec = result.spec
    w = max([len(p) for p in spec.parameters] + [len(k) for k in result.tied] + [9])
    lines = [f"{'parameter':<{w}}  {'initial':>10}  {'fitted':>10}  {'std error':>10}  bounds"]
    for i, p in enumerate(spec.parameters):
        se = result.std_error[p]
        se_text = f"{se:10.4g}" if math.isfinite(se) else f"{'-':>10}"
        lines.append(f"{p:<{w}}  {spec.initial[i]:10.4g}  {result.value[p]:10.4g}  {se_text}  "
                     f"[{spec.lower[i]:g}, {spec.upper[i]:g}]")
    for k, v in result.tied.items():
        other, ratio = spec.ratios[k]
        lines.append(f"{k:<{w}}  {'':>10}  {v:10.4g}  {'':>10}  tied: {ratio:g} x {other}")
    kinds = result.records["kind"].value_counts()
    lines.append(f"observations {result.n_obs} ({int(kinds.get('point', 0))} point, "
                 f"{int(kinds.get('glacier', 0))} glacier-wide); model evaluations {result.n_evaluations}; "
                 f"{result.elapsed_s:.1f} s")
    lines.append(f"RMSE {result.rmse_mwe:.3f} m w.e. (at the starting values {result.rmse_initial_mwe:.3f}); "
                 f"bias {result.bias_mwe:+.3f} m w.e. (modelled - observed)")
    lines += [f"warning: {w_}" for w_ in result.warnings]
    return "\n".join(lines)


def plot_fit(path: Path, result: CalibrationResult) -> None:
    """Modelled against observed balances with the 1:1 line; error bars are the sigmas (PNG)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    rec = result.records
    fig = Figure(figsize=(6.4, 6.8), dpi=120)
    FigureCanvasAgg(fig)
    ax = fig.add_axes([0.14, 0.17, 0.8, 0.75])
    groups = [("point", rec.kind == "point", "o", "tab:blue"),
              ("glacier-wide", (rec.kind == "glacier") & rec.dh_m.isna(), "s", "tab:green"),
              ("glacier-wide, geodetic", (rec.kind == "glacier") & rec.dh_m.notna(), "D", "tab:red")]
    for label, sel, marker, colour in groups:
        if sel.any():
            ax.errorbar(rec.observed_mwe[sel], rec.modelled_mwe[sel], xerr=rec.sigma_mwe[sel], fmt=marker,
                        color=colour, ms=4, lw=0.8, capsize=2, label=f"{label} ({int(sel.sum())})")
    lo = float(min((rec.observed_mwe - rec.sigma_mwe).min(), rec.modelled_mwe.min()))
    hi = float(max((rec.observed_mwe + rec.sigma_mwe).max(), rec.modelled_mwe.max()))
    pad = 0.05 * (hi - lo if hi > lo else 1.0)
    lims = (lo - pad, hi + pad)
    ax.plot(lims, lims, color="black", lw=0.8, ls="--", label="1:1")
    ax.set_xlim(lims)
    ax.set_ylim(lims)
    ax.set_aspect("equal")
    ax.set_xlabel("observed balance over the period (m w.e.)")
    ax.set_ylabel("modelled balance over the period (m w.e.)")
    ax.set_title(f"{result.config.site.name}: calibration fit", fontsize=11)
    ax.legend(loc="upper left", fontsize=8)
    ax.grid(alpha=0.3)
    fitted = ", ".join(f"{p} = {v:.3g}" for p, v in result.value.items())
    caption = (f"Fitted {fitted}. RMSE {result.rmse_mwe:.3f} m w.e., bias {result.bias_mwe:+.3f} m w.e., "
               f"{result.n_obs} observations. Error bars: observation uncertainty (1 sigma). Modelled "
               "values are model estimates; decisions on water, hydropower or hazards need review by "
               "qualified practitioners.")
    fig.text(0.5, 0.02, caption, ha="center", va="bottom", fontsize=7, wrap=True)
    fig.savefig(path, format="png")


def write_calibration(result: CalibrationResult, out_dir: str | Path) -> list[Path]:
    """Write calibration.json, calibration_residuals.csv, calibration_fit.png and calibrated.toml.

    All or nothing (staged); returns the written paths.
    """
    from .outputs import staged, write_csv, write_json

    out_dir = Path(out_dir)
    text = calibrated_toml(result, out_dir)
    with staged(out_dir) as st:
        write_csv(st.path("calibration_residuals.csv"), result.records, float_format="%.10g")
        plot_fit(st.path("calibration_fit.png"), result)
        st.path("calibrated.toml").write_text(text, encoding="utf-8")
        write_json(st.path("calibration.json"), dict(result.to_json(), files=list(st.names)
                                                     + ["calibration.json"]))
    return [out_dir / n for n in st.names]
