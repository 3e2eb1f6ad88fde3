"""The fit and its covariance: weighted least squares of the normalised residuals.

The fit is weighted non-linear least squares (``scipy.optimize.least_squares``,
trust-region reflective, finite-difference Jacobian) of the normalised residuals

    r_j = (modelled_j - observed_j) / sigma_j

over the parameters named in ``[calibration] parameters`` (see
:mod:`firnline.calibrate.spec`), with the modelled values of
:mod:`firnline.calibrate.operator`.

Uncertainties
-------------
The covariance of the fitted parameters is ``(J^T J)^-1`` with ``J`` the Jacobian
of the normalised residuals at the solution, **scaled by the reduced
chi-square** ``chi2 / (n_obs - n_params)`` when there are degrees of freedom
left (as ``scipy.optimize.curve_fit`` does with ``absolute_sigma=False``), so
that a misfit larger than the stated sigmas widens the standard errors. With no
degrees of freedom the unscaled covariance (from the sigmas alone) is used and a
warning says so. Daily discharge rows enter by their own squared residuals (HC0 sandwich,
White, 1980, Econometrica 48; :func:`_covariance`); their day-to-day correlation is not
accounted for (:mod:`firnline.calibrate.discharge`). Parameters the observations cannot
determine (rank-deficient Jacobian) get no standard error (null in JSON).

Residuals are ``modelled - observed`` (m w.e.): a positive bias means the model
balance is too high. RMSE is the unweighted root-mean-square residual.

Files are read by :func:`calibrate` (through ``prepare`` and
:func:`firnline.observations.load_observations`) and written only by
:func:`firnline.calibrate.outputs.write_calibration`; the fit itself is pure.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.optimize import least_squares

from .. import provenance
from ..config import Config
from ..errors import InputError
from ..model import Setup, prepare, simulate
from ..observations import PointBalances, load_observations
from ..progress import Progress, stage
from .discharge import check_routing_fit, discharge_target, modelled_discharge, routing_keys
from .operator import build_operator, first_days, modelled_values, observation_table
from .spec import FitSpec, fit_spec

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
    discharge: dict | None = None

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
            **provenance.header(self.config),
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
                                 "(J^T J)^-1 from the stated sigmas alone (no degrees of freedom left)")
            + ("; the daily discharge rows enter by their own squared residuals, the sandwich "
               "(J^T J)^-1 (chi2_red J_b^T J_b + J_q^T diag(r_q^2) J_q) (J^T J)^-1 (HC0, White 1980)"
               if self.discharge is not None else ""),
            "correlation": corr,
            "converged": self.converged,
            "optimiser_message": self.message,
            "residual_definition": "modelled minus observed, m w.e.; bias = mean residual",
            "period_definition": "start_date .. end_date inclusive (start of the first day to the end "
                                 "of the last)",
            "point_cells": "each point uses the DEM cell that contains it, at that cell's elevation "
                           "(no elevation correction)",
            "observations": recs,
            **({"discharge": self.discharge} if self.discharge is not None else {}),
            "warnings": self.warnings,
            "notes": self.notes,
            "elapsed_s": self.elapsed_s,
        }


def _covariance(jac_u: np.ndarray, span: np.ndarray, chi2_red: float, robust_rows: np.ndarray | None = None,
                residuals: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Covariance of the parameters from the Jacobian in the internal variables.

    ``(J^T J)^-1`` scaled by the reduced chi-square ``c``; with ``robust_rows`` (the daily
    discharges) the sandwich ``A (c J_b^T J_b + J_q^T diag(r_q^2) J_q) A``, ``A = (J^T J)^-1``,
    ``r_q`` their normalised residuals at the solution: heteroscedasticity-consistent (HC0,
    White, 1980, Econometrica 48, 817-838) for the many days, whose stated error (a share of the
    flow level) rarely has the shape of the actual one (a share of each day's flow, larger on
    the days that shape the storage constants); the stated sigmas for the few balances.

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
    scale = chi2_red if math.isfinite(chi2_red) else 1.0
    if robust_rows is not None and np.any(robust_rows):
        q = np.asarray(robust_rows, dtype=bool)
        jb, jq = jac_u[~q], jac_u[q]
        meat = scale * (jb.T @ jb) + (jq.T * np.asarray(residuals, dtype="float64")[q] ** 2) @ jq
        cov_u = cov_u @ meat @ cov_u
    else:
        cov_u = cov_u * scale
    cov = cov_u * np.outer(span, span)
    cov[undetermined, :] = np.nan
    cov[:, undetermined] = np.nan
    return cov, undetermined


def calibrate(config: Config, setup: Setup | None = None, progress: Progress = None) -> CalibrationResult:
    """Fit ``[calibration] parameters`` to the observations of ``[observations]``.

    Parameters
    ----------
    config : Config
        With ``[observations]`` and ``[calibration]`` sections.
    setup : Setup, optional
        A prepared setup to reuse (default: :func:`firnline.model.prepare` is called once).
    progress : callable(label, done, total), optional
        Progress reports (see :mod:`firnline.progress`); the model runs are labelled
        ``"model runs"``.

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
    target = discharge_target(setup, config.calibration.discharge_sigma_pct)
    check_routing_fit(spec.parameters, target)
    balances = (points is not None and len(points)) or (glaciers is not None and len(glaciers))
    table = observation_table(setup, points, glaciers) if balances else pd.DataFrame(columns=RESIDUAL_COLUMNS[:13])
    op = build_operator(setup, points, glaciers) if balances else None
    n_days = max(op.n_days if op is not None else 0, target.n_days if target is not None else 0)
    short = first_days(setup, n_days)
    observed = table["observed_mwe"].to_numpy(dtype="float64")
    sigma = table["sigma_mwe"].to_numpy(dtype="float64")
    n_bal = len(observed)
    if target is not None:
        observed = np.concatenate([observed, target.observed_m3s])
        sigma = np.concatenate([sigma, target.sigma_m3s])
    n_obs, n_par = len(observed), len(spec.parameters)
    max_nfev = MAX_NFEV_PER_PARAMETER * n_par
    bar = stage(progress, "model runs", max_nfev * (n_par + 1))
    cache: dict[bytes, np.ndarray] = {}
    count = {"n": 0}
    last_kernel: dict = {}
    routing = set(routing_keys(list(spec.parameters) + list(spec.ratios)))

    def kernel_run(trial, values):
        """The kernel over all cells for a trial; reused when only storage constants changed."""
        key = tuple(sorted((k, v) for k, v in values.items() if k not in routing))
        if last_kernel.get("key") != key:
            snaps = op.snapshot_days if op is not None else None
            last_kernel.update(key=key, kres=simulate(short, trial, snapshot_days=snaps,
                                                                daily=target is not None))
            count["n"] += 1
        return last_kernel["kres"]

    def evaluate(values) -> np.ndarray:
        trial = config.with_values(**values)
        if target is None:
            count["n"] += 1
            return modelled_values(short, trial, op)
        kres = kernel_run(trial, values)
        parts = [op.apply(kres.snapshots[:, 0, op.positions])] if op is not None else []
        parts.append(modelled_discharge(short, trial, kres, target))
        return np.concatenate(parts)

    def model_at(u: np.ndarray) -> np.ndarray:
        key = np.asarray(u, dtype="float64").tobytes()
        if key not in cache:
            cache[key] = evaluate(spec.values(spec.to_values(u)))
            if bar:
                bar(count["n"])
        return cache[key]

    def residuals(u: np.ndarray) -> np.ndarray:
        return (model_at(u) - observed) / sigma

    u0 = spec.to_internal(spec.initial)
    initial_model = model_at(u0)
    _check_finite(table, initial_model, observed, sigma)
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
    robust = np.arange(n_obs) >= n_bal if target is not None else None     # the daily discharges
    cov, undetermined = _covariance(np.atleast_2d(res.jac), spec.span, chi2_red, robust, r)
    se = np.sqrt(np.diag(cov))
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cov / np.outer(se, se)

    warnings = _warnings(spec, x, res, corr, undetermined, np.atleast_2d(res.jac), n_obs, dof)
    flow = target.summary(initial_model[n_bal:], modelled[n_bal:]) if target is not None else None
    off_ice = _points_off_glacier(setup, points)
    warnings += off_ice
    values = spec.values(x)
    fitted = config.with_values(**values)
    records = table.assign(modelled_initial_mwe=initial_model[:n_bal], modelled_mwe=modelled[:n_bal],
                           residual_mwe=resid[:n_bal], normalised_residual=r[:n_bal])[RESIDUAL_COLUMNS]
    bal = resid[:n_bal]
    rmse0 = float(np.sqrt(np.mean((initial_model[:n_bal] - observed[:n_bal]) ** 2))) if n_bal else math.nan
    return CalibrationResult(
        config=config, fitted=fitted, spec=spec,
        value={p: float(v) for p, v in zip(spec.parameters, x)},
        std_error={p: float(s) for p, s in zip(spec.parameters, se)},
        correlation=corr, tied={k: values[k] for k in spec.ratios}, records=records,
        rmse_mwe=float(np.sqrt(np.mean(bal ** 2))) if n_bal else math.nan,
        bias_mwe=float(np.mean(bal)) if n_bal else math.nan,
        rmse_initial_mwe=rmse0, chi_square_reduced=chi2_red, n_obs=n_obs,
        n_evaluations=count["n"], dof=dof, converged=bool(res.status > 0), message=str(res.message),
        warnings=warnings, notes=list(setup.notes), elapsed_s=time.perf_counter() - t0, discharge=flow)


def _check_finite(table, modelled: np.ndarray, observed: np.ndarray, sigma: np.ndarray) -> None:
    """InputError naming the first observation whose weighted residual, or its square, is not finite.

    An observation of 1e308 m w.e. or a sigma of 1e-300 m w.e. passes each value's own check
    but makes the least-squares cost infinite; the row is named instead of fitting nonsense.
    """
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        r = (modelled - observed) / sigma
        bad = ~np.isfinite(r) | ~np.isfinite(r * r)
    if not bad.any():
        return
    i = int(np.argmax(bad))
    row = table.iloc[i]
    raise InputError(f"{row['file']}, line {row['line']} ({row['id']}): the weighted residual (modelled - observed) "
                     f"/ sigma is not a finite number (observed {observed[i]:g} m w.e., sigma {sigma[i]:g} m w.e.); "
                     "correct the balance or give a realistic uncertainty (for example 0.1 m w.e.).")


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
