"""What a calibration fits: every check of the ``[calibration]`` section lives here.

* ``parameters``: any numeric model parameter (:data:`firnline.parameters.PARAMETERS`)
  that the chosen melt method uses and that has calibration bounds (a key the method
  ignores is refused, as the observations could not determine it).
  ``lapse_rate_k_per_m`` can be fitted only when it holds a single value (not twelve
  monthly values). A parameter the registry marks as not calibratable (for example
  ``transmissivity``, which shapes the radiation table built once from the DEM) is
  refused with the registry's reason.
* ``bounds = { key = [low, high] }``; a key without bounds gets its registry default
  (:func:`firnline.parameters.default_bounds`). Bounds must lie within the range the
  config allows, and the starting value (the key's value in the config) within them.
* ``ratios = { tied_key = ["other_key", ratio] }``: ``tied_key`` is not fitted but set
  to ``ratio x other_key`` at every evaluation and in the result (for example
  ``ddf_ice_mm_per_day_k = ["ddf_snow_mm_per_day_k", 2.0]``). The other key may be
  fitted or fixed; the ratio is a positive number; a tied key cannot be a parameter or
  the other key of another tie.

:func:`check_section` runs when a config is loaded (the checks that need no melt
method); :func:`fit_spec` runs when a calibration starts (all of them).
"""

from __future__ import annotations

import difflib
import math
from dataclasses import dataclass, field

import numpy as np

from .. import parameters
from ..errors import InputError

#: Default bounds of each calibratable key, from the registry.
DEFAULT_BOUNDS = parameters.default_bounds()


def _label(config) -> str:
    return config.source.name if config.source else "config"


def check_value(key: str, value: float, where: str) -> None:
    """Check a value of ``key`` against the range the config allows (InputError naming ``where``)."""
    from ..config import SCHEMA

    SCHEMA[parameters.BY_KEY[key].section][key][0](float(value), where)


def check_section(cal, label: str) -> None:
    """The load-time checks of a ``[calibration]`` section (no melt method needed).

    Raises
    ------
    InputError
        Empty ``parameters``; a name that is not a numeric model parameter; bounds
        for a key not in ``parameters`` or not ``[low, high]`` with low < high.
    """
    allowed = parameters.numeric()
    if not cal.parameters:
        raise InputError(f"{label}: [calibration] parameters is empty; name at least one numeric key "
                         "of [melt] or [downscaling].")
    for p in cal.parameters:
        if p not in allowed:
            close = difflib.get_close_matches(p, allowed, n=1)
            hint = f' (did you mean "{close[0]}"?)' if close else ""
            raise InputError(f"{label}: [calibration] parameters names \"{p}\", which is not a numeric "
                             f"key of [melt] or [downscaling]{hint}; allowed: "
                             + ", ".join(sorted(allowed)) + ".")
    for p, b in cal.bounds.items():
        if p not in cal.parameters:
            raise InputError(f"{label}: [calibration] bounds gives \"{p}\", which is not in parameters.")
        if (not isinstance(b, list) or len(b) != 2
                or any(isinstance(x, bool) or not isinstance(x, (int, float)) for x in b) or b[0] >= b[1]):
            raise InputError(f"{label}: [calibration] bounds for \"{p}\" must be [low, high] with "
                             f"low < high; got {b!r}.")


def calibratable_keys(method: str) -> list[str]:
    """Keys that can be fitted under a melt method."""
    return parameters.calibratable(method)


def _check_key(config, key: str, where: str) -> float:
    """Check that ``key`` can be fitted or tied under this config; return its current value."""
    label = _label(config)
    method = config.melt.method
    p = parameters.get(key)
    if p is not None and p.bounds is None and p.kind != "pair":
        raise InputError(f"{label}: {where} names \"{key}\", which cannot be calibrated because "
                         f"{p.not_calibratable}.")
    allowed = calibratable_keys(method)
    if key not in allowed:
        why = (f"is not used by [melt] method = \"{method}\" (it belongs to \"{p.methods[0]}\")"
               if p is not None and p.kind != "pair" else "is not a numeric key of [melt] or [downscaling]")
        raise InputError(f"{label}: {where} names \"{key}\", which {why}; choose from "
                         + ", ".join(allowed) + ".")
    value = getattr(getattr(config, p.section), key)
    if p.kind == "monthly":
        if len(value) != 1:
            raise InputError(f"{label}: {where} names \"{key}\", but [{p.section}] {key} holds twelve "
                             "monthly values; give one value to fit it, or leave it out of the "
                             "calibration.")
        return float(value[0])
    return float(value)


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


def fit_spec(config) -> FitSpec:
    """Check ``[calibration]`` against the config and build the :class:`FitSpec`.

    Raises
    ------
    InputError
        No [calibration] section; a key that is not a numeric key of [melt] or
        [downscaling], unused by the melt method, a monthly lapse rate or not
        calibratable; bounds beyond the config's range or not containing the starting
        value; a malformed or conflicting ratio.
    """
    label = _label(config)
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
        low, high = (float(b) for b in cal.bounds.get(p) or DEFAULT_BOUNDS[p])
        for bound in (low, high):
            check_value(p, bound, f"{label}: [calibration] bounds for \"{p}\"")
        if not low <= v <= high:
            given = "the bounds given" if p in cal.bounds else "the default bounds"
            raise InputError(f"{label}: the starting value {v:g} of {p} (from "
                             f"[{parameters.BY_KEY[p].section}]) lies outside {given} [{low:g}, "
                             f"{high:g}]; change the starting value or set [calibration] bounds for it.")
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
            check_value(tied, v, f"{label}: [calibration] ratios make \"{tied}\" = {ratio:g} x "
                                 f"{other}, which")
        ratios[tied] = (other, ratio)
    return FitSpec(parameters=tuple(names), initial=np.array(x0), lower=np.array(lo),
                   upper=np.array(hi), ratios=ratios, fixed=fixed)
