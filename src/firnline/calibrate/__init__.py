"""Calibration: fit model parameters to stakes, snow probing, glacier-wide balances and discharge.

A small package, one job a module:

* :mod:`~firnline.calibrate.spec`: what is fitted; every check of ``[calibration]``;
* :mod:`~firnline.calibrate.operator`: the observation operator (modelled values over
  the exact observation periods);
* :mod:`~firnline.calibrate.discharge`: daily gauged discharge as observations (stated
  errors, the routed catchment discharge on the gauged days);
* :mod:`~firnline.calibrate.fit`: the weighted least-squares fit, its covariance and
  warnings (:func:`calibrate`);
* :mod:`~firnline.calibrate.outputs`: calibrated.toml, calibration.json, the residuals
  table, the console table (the figure is :func:`firnline.report.fit_figure`).
"""

from .fit import RESIDUAL_COLUMNS, CalibrationResult, calibrate
from .operator import ObservationOperator, build_operator, first_days, modelled_values, observation_table
from .outputs import calibrated_config, calibrated_toml, fit_table, toml_text, write_calibration
from .spec import DEFAULT_BOUNDS, FitSpec, calibratable_keys, check_value, fit_spec

__all__ = ["DEFAULT_BOUNDS", "RESIDUAL_COLUMNS", "CalibrationResult", "FitSpec", "ObservationOperator",
           "build_operator", "calibratable_keys", "calibrate", "calibrated_config", "calibrated_toml",
           "check_value", "first_days", "fit_spec", "fit_table", "modelled_values", "observation_table",
           "toml_text", "write_calibration"]
