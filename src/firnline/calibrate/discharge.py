"""Daily gauged discharge as observations of the fit.

Each day with a gauged value inside the modelled record is one observation: the routed
daily mean discharge of the ``catchment`` region (:func:`firnline.model.runoff_of`)
against the gauge, weighted by its stated error (:func:`firnline.runoff.discharge_sigma_m3s`:
``[calibration] discharge_sigma_pct`` of the flow level, the 31-day running mean of the
gauged values, with a low-flow floor of a tenth of the mean gauged discharge). The normalised
residuals ``(Q_mod - Q_obs) / sigma`` join those
of the stakes and glacier-wide balances in one weighted least-squares fit, so each kind
counts by its stated uncertainty.

Daily discharge errors are correlated from day to day (a rating-curve error lasts), so the
standard errors of a fit dominated by many daily residuals are optimistic when the stated
daily sigma is the error of one day; state a larger ``discharge_sigma_pct`` to give the
discharge record less weight against the balances.

The storage constants of ``[runoff]`` act after the kernel, on the released water; a trial
that changes only them re-routes the last kernel run instead of running the kernel again.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .. import parameters
from ..errors import InputError
from ..runoff import CATCHMENT, discharge_sigma_m3s, kling_gupta, nash_sutcliffe, volume_error


@dataclass(frozen=True)
class DischargeTarget:
    """The gauged days used in the fit.

    days : ndarray int   positions in the record (``Setup.forcing.dates``)
    observed_m3s, sigma_m3s : ndarray float64
    source : str
    sigma_pct : float
    """

    days: np.ndarray
    observed_m3s: np.ndarray
    sigma_m3s: np.ndarray
    source: str
    sigma_pct: float

    @property
    def n_days(self) -> int:
        """Days of the record the kernel must run for the last gauged day."""
        return int(self.days[-1]) + 1

    def summary(self, modelled_initial: np.ndarray, modelled: np.ndarray) -> dict:
        """The discharge part of calibration.json."""
        def num(x):
            return None if not np.isfinite(x) else float(x)
        o = self.observed_m3s
        return {"source": self.source, "days": int(self.days.size), "sigma_pct": self.sigma_pct,
                "sigma_definition": "sigma_pct % of max(the 31-day centred running mean of the gauged "
                                    "discharge, a tenth of the mean gauged discharge)",
                "mean_observed_m3s": float(o.mean()),
                "initial": {"nse": num(nash_sutcliffe(o, modelled_initial)),
                            "kge": num(kling_gupta(o, modelled_initial)),
                            "volume_error": num(volume_error(o, modelled_initial))},
                "fitted": {"nse": num(nash_sutcliffe(o, modelled)), "kge": num(kling_gupta(o, modelled)),
                           "volume_error": num(volume_error(o, modelled)),
                           "rmse_m3s": float(np.sqrt(np.mean((modelled - o) ** 2)))}}


def discharge_target(setup, sigma_pct: float) -> DischargeTarget | None:
    """The gauged days of ``setup.discharge`` inside the record, or None without a gauge."""
    obs = setup.discharge
    if obs is None:
        return None
    dates = setup.forcing.dates.astype("datetime64[D]")
    q = obs.on(dates)
    days = np.flatnonzero(np.isfinite(q))
    if days.size == 0:
        raise InputError(f"{obs.source}: the discharge record ({obs.dates[0]} .. {obs.dates[-1]}) has no value "
                         f"on a modelled day ({dates[0]} .. {dates[-1]}); give a record that overlaps the "
                         "station record.")
    sigma = discharge_sigma_m3s(q, sigma_pct)
    return DischargeTarget(days=days, observed_m3s=q[days], sigma_m3s=sigma[days],
                           source=str(obs.source), sigma_pct=float(sigma_pct))


def routing_keys(keys) -> list[str]:
    """The keys of ``keys`` that only shape the routing (``[runoff]`` storage constants)."""
    return [k for k in keys if (p := parameters.get(k)) is not None and p.section == "runoff"]


def check_routing_fit(keys, target: DischargeTarget | None) -> None:
    """Storage constants can be fitted only against a gauge."""
    keys = routing_keys(keys)
    if keys and target is None:
        raise InputError(f"[calibration] parameters names {', '.join(keys)}, which only shape the routing of "
                         "runoff; add [observations] discharge (a daily gauge record) or fit other keys.")


def modelled_discharge(setup, config, kres, target: DischargeTarget) -> np.ndarray:
    """Routed catchment discharge on the gauged days, m3 s-1."""
    from ..model import runoff_of

    series, _ = runoff_of(setup, config, kres, 0)
    return series.discharge_m3s[series.region(CATCHMENT)][target.days]
