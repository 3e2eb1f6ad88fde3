"""The registry of model parameters: each one declared once, here.

A *model parameter* is a number (or a small fixed group of numbers) of ``[downscaling]``,
``[melt]`` or ``[snow]`` that the model uses (the kernel, or a table or routing built once
from the DEM). Each :class:`Parameter` says where it lives in the
config, its unit, the range a config may give, its default, its default calibration
bounds (``None``: it cannot be calibrated, and ``not_calibratable`` says why), which
melt methods use it, its published source (or "common practice"), and the name(s)
the kernel knows it by.

Everything else is derived from :data:`PARAMETERS`:

* the config schema rows of these keys (:data:`firnline.config.SCHEMA`);
* the calibration defaults (:func:`default_bounds`, :func:`calibratable`);
* the kernel's parameter values by name (:func:`kernel_values`);
* the commented defaults of the demo config (:mod:`firnline.demo`, which writes
  ``configs/demo.toml``).

A new parameter is one entry in :data:`PARAMETERS` (and its use in the kernel).

This module knows nothing of files, of the config loader or of the kernel's code.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from .runoff import DEFAULT_STORAGE_DAYS

#: The melt methods, in the order the config lists them; the first is the default.
METHODS = ("degree-day", "radiation")
ALL_METHODS = METHODS

#: Lapse rates above this (K per m) are beyond any plausible mean inversion.
MAX_INVERSION_K_PER_M = 0.01
#: Steeper than dry-adiabatic (-0.0098 K per m) plus a margin.
MIN_LAPSE_K_PER_M = -0.0125

# Radiation-method defaults for a daily model (see DEVELOPERS.md, "Parameter defaults and
# their sources"). Hock's (1999) hourly factors for Storglaciaren (from memory: MF 0.075 mm h-1
# K-1, a_snow 0.0006, a_ice 0.0008 mm m2 W-1 h-1 K-1; x 24 h: 1.8, 0.0144, 0.0192 in daily
# units) melt about 1.9 times as much snow as the degree-day defaults when applied to daily
# means. The defaults are instead derived from the degree-day defaults (3.0 / 6.0) so that
# MF + a I_dd = DDF, with I_dd = 262.5 W m-2 the degree-day-weighted mean potential direct
# radiation over the demo glaciers (firnline.radiation.degree_day_weighted_radiation), and MF
# keeping its share of the snow factor in Hock's values at I_dd: 1.8 / (1.8 + 0.0144 x 262.5)
# = 0.32, so MF = 0.32 x 3.0 = 0.97, a_snow = (3.0 - 0.97) / 262.5 = 0.00774 and
# a_ice = (6.0 - 0.97) / 262.5 = 0.01917 mm w.e. d-1 K-1 per W m-2.
RADIATION_IDD_W_M2 = 262.5
"""Degree-day-weighted mean potential direct radiation over the demo glaciers, W m-2."""
RADIATION_DERIVATION = ("derived for a daily model from the degree-day defaults (3.0 snow, 6.0 ice) so that "
                        "MF + a I_dd = DDF, with I_dd = 262.5 W m-2 the degree-day-weighted mean potential "
                        "direct radiation over the demo glaciers; MF keeps its share of the snow factor "
                        "(0.32) in Hock (1999), J. Glaciology 45(149), values from memory (hourly MF 0.075 "
                        "mm h-1 K-1, a_snow 0.0006, a_ice 0.0008 mm m2 W-1 h-1 K-1, x 24 h: 1.8, 0.0144, "
                        "0.0192); uncalibrated, fit it for the site (DEVELOPERS.md)")
# Bernhardt & Schulz (2010) holding depth and the density that turns it into a mass; see
# firnline.snowslide and DEVELOPERS.md ("Gravitational snow redistribution").
SNOW_DENSITY_SOURCE = ("common practice (from memory: the bulk density of a settled seasonal snowpack is "
                       "about 200-400 kg m-3 over a winter); turns the holding depth of Bernhardt & Schulz "
                       "(2010), Geophysical Research Letters 37, L11502, into mm w.e.")
MIN_SLIDE_SLOPE_SOURCE = ("common practice (from memory: slab avalanches rarely release on slopes gentler "
                          "than about 25-30 deg); below it the holding depth of Bernhardt & Schulz (2010) "
                          "exceeds 5 m and is treated as unlimited")
ROUTING_ONLY = ("it shapes the snow-redistribution routing built once from the DEM and cached with the "
                "terrain; set it from field knowledge")

_K = DEFAULT_STORAGE_DAYS
STORAGE_SOURCE = ("Hock & Noetzli (1997), Nordic Hydrology 28, after Baker et al. (1982): storage constants "
                  "of glacier runoff about 350 h (firn), 30-100 h (snow) and 4-16 h (ice) (from memory)")
ROUTING_STEP = ("it only routes the water released each day (firnline.runoff); fit it against "
                "[observations] discharge")
# firn, retention and refreezing ([snow]; see firnline.kernel and DEVELOPERS.md)
FIRN_YEARS_SOURCE = ("Cuffey & Paterson (2010), The Physics of Glaciers, 4th ed., ch. 2 (from memory: on temperate "
                     "glaciers with abundant meltwater firn turns to ice within a few years, e.g. 3-5 years at "
                     "Upper Seward Glacier; decades to centuries on cold dry glaciers); 0 turns firn off (surviving "
                     "snow stays snow, the behaviour before firn was modelled)")
FIRN_FACTOR_SOURCE = ("common practice: the firn melt factor lies between those of snow and ice (firn is darker "
                      "than snow, brighter than ice); 0.5 puts it midway")
HOLDING_SOURCE = ("common practice (from memory: the irreducible liquid-water content of snow and firn is a few per "
                  "cent of the pack mass, about 3-6 %)")
COLD_DAYS_SOURCE = ("common practice (from memory): the thermal diffusivity of seasonal snow, about 4e-7 m2 s-1, "
                    "gives (0.5 m)^2 / 4e-7 m2 s-1 = 7 days for a cold spell to reach half a metre into the pack; "
                    "heat capacity of ice 2097 J kg-1 K-1 and latent heat 334 kJ kg-1 (common practice)")
COLD_LAYER_SOURCE = ("common practice (from memory): the yearly temperature wave reaches an e-folding depth "
                     "sqrt(kappa P / pi) = 2 m into snow and firn (kappa about 4e-7 m2 s-1, P one year); "
                     "2 m at about 400 kg m-3, half of it as cold as the air on average, is about 500 mm w.e. "
                     "Deeper snow and firn do not follow the air and hold no cold content")
PROCESS_ONLY = ("a process constant of common practice that stake and geodetic balances hardly constrain; "
                "set it from field knowledge")

HOCK_2003 = ("Hock (2003), J. Hydrology 282: published ranges about 2.5-11.6 (snow) and "
             "6.6-20 (ice) mm w.e. d-1 K-1 (from memory)")


@dataclass(frozen=True)
class Parameter:
    """One model parameter.

    Attributes
    ----------
    section, key : str
        Where it lives in the config (``[section] key``).
    unit : str
    low, high : float
        The range a config may give (each value for ``monthly`` and ``pair``).
    default : float or tuple
    bounds : (float, float) or None
        Default calibration bounds (inside ``low .. high``); None: not calibratable.
    methods : tuple of str
        Melt methods that use it.
    source : str
        Published source of the default, or "common practice".
    description : str
        One line for the demo config.
    kernel : tuple of str
        Name(s) the kernel knows the value(s) by: one name, or two for a ``pair``.
    kind : str
        ``"number"``; ``"monthly"`` (one value or twelve, January first; the kernel gets
        twelve); ``"pair"`` (two numbers, low <= high; the kernel gets two names).

    low_open : bool
        ``low`` itself is not allowed.
    not_calibratable : str
        Why it cannot be calibrated (when ``bounds`` is None).
    """

    section: str
    key: str
    unit: str
    low: float
    high: float
    default: Any
    bounds: tuple[float, float] | None
    methods: tuple[str, ...]
    source: str
    description: str
    kernel: tuple[str, ...]
    kind: str = "number"
    low_open: bool = False
    not_calibratable: str = ""


PARAMETERS: tuple[Parameter, ...] = (
    Parameter("downscaling", "lapse_rate_k_per_m", "K m-1", MIN_LAPSE_K_PER_M, MAX_INVERSION_K_PER_M,
              (-0.0065,), (-0.0098, 0.0), ALL_METHODS,
              "ICAO Standard Atmosphere / ISO 2533 (-0.0065 K m-1); bounds from dry-adiabatic "
              "(-0.0098 K m-1) to isothermal",
              "one value or twelve monthly values (January first)",
              ("lapse_rate_k_per_m",), kind="monthly"),
    Parameter("downscaling", "precip_gradient_per_m", "m-1", -0.002, 0.01, 0.0003, (-0.001, 0.003),
              ALL_METHODS, "common practice",
              "relative increase of precipitation per m above the station",
              ("precip_gradient_per_m",)),
    Parameter("downscaling", "precip_factor", "1", 0.0, 10.0, 1.0, (0.3, 4.0), ALL_METHODS,
              "common practice", "gauge undercatch / correction", ("precip_factor",)),
    Parameter("downscaling", "snow_rain_range_c", "deg C", -10.0, 10.0, (0.5, 2.5), None, ALL_METHODS,
              "common practice", "all snow at or below, all rain at or above, linear between",
              ("snow_c", "rain_c"), kind="pair",
              not_calibratable="it is a pair of thresholds [snow, rain], not a single number"),
    Parameter("melt", "threshold_c", "deg C", -10.0, 10.0, 0.0, (-3.0, 3.0), ALL_METHODS,
              "common practice", "air temperature above which melt starts", ("threshold_c",)),
    Parameter("melt", "ddf_snow_mm_per_day_k", "mm w.e. d-1 K-1", 0.0, 50.0, 3.0, (1.0, 15.0),
              ("degree-day",), HOCK_2003, "degree-day factor of snow", ("ddf_snow",)),
    Parameter("melt", "ddf_ice_mm_per_day_k", "mm w.e. d-1 K-1", 0.0, 50.0, 6.0, (2.0, 25.0),
              ("degree-day",), HOCK_2003, "degree-day factor of ice", ("ddf_ice",)),
    Parameter("melt", "melt_factor_mm_per_day_k", "mm w.e. d-1 K-1", 0.0, 50.0, 0.97, (0.0, 15.0),
              ("radiation",), RADIATION_DERIVATION, "melt factor", ("melt_factor",)),
    Parameter("melt", "radiation_factor_snow", "mm w.e. d-1 K-1 per W m-2", 0.0, 1.0, 0.00774,
              (0.0, 0.1), ("radiation",), RADIATION_DERIVATION + "; bounds enclose it ten-fold",
              "radiation factor of snow", ("radiation_factor_snow",)),
    Parameter("melt", "radiation_factor_ice", "mm w.e. d-1 K-1 per W m-2", 0.0, 1.0, 0.01917,
              (0.0, 0.1), ("radiation",), RADIATION_DERIVATION + "; bounds enclose it five-fold",
              "radiation factor of ice", ("radiation_factor_ice",)),
    Parameter("melt", "transmissivity", "1", 0.0, 1.0, 0.75, None, ("radiation",),
              "common practice", "clear-sky transmissivity at sea-level pressure",
              (), low_open=True,
              not_calibratable="it shapes the radiation table built once from the DEM; fit "
                               "radiation_factor_snow and radiation_factor_ice instead"),
    Parameter("snow", "firn_factor_share", "1", 0.0, 1.0, 0.5, None, ALL_METHODS, FIRN_FACTOR_SOURCE,
              "firn melt factor = snow factor + share x (ice factor - snow factor)", ("firn_share",),
              not_calibratable=PROCESS_ONLY),
    Parameter("snow", "liquid_holding_fraction", "1", 0.0, 0.2, 0.05, None, ALL_METHODS, HOLDING_SOURCE,
              "liquid water a snow or firn pack holds, share of its mass", ("holding_fraction",),
              not_calibratable=PROCESS_ONLY),
    Parameter("snow", "cold_exchange_days", "d", 0.0, 365.0, 7.0, None, ALL_METHODS, COLD_DAYS_SOURCE,
              "time constant of the pack temperature following the air below 0 C", ("cold_days",),
              low_open=True, not_calibratable=PROCESS_ONLY),
    Parameter("snow", "cold_layer_mm", "mm w.e.", 0.0, 10000.0, 500.0, None, ALL_METHODS, COLD_LAYER_SOURCE,
              "mass of the top of the pack whose cold content follows the air", ("cold_layer_mm",),
              not_calibratable=PROCESS_ONLY),
    Parameter("snow", "snow_density_kg_m3", "kg m-3", 50.0, 917.0, 250.0, None, ALL_METHODS,
              SNOW_DENSITY_SOURCE, "snow density that turns the slope's holding depth into a mass",
              (), not_calibratable=ROUTING_ONLY),
    Parameter("snow", "min_slide_slope_deg", "deg", 0.0, 89.0, 25.0, None, ALL_METHODS,
              MIN_SLIDE_SLOPE_SOURCE, "slopes gentler than this hold all their snow",
              (), not_calibratable=ROUTING_ONLY),
    # [runoff]: storage constants of the parallel linear reservoirs (firnline.runoff); they act
    # after the kernel, on the water released each day, so the kernel has no name for them.
    Parameter("runoff", "storage_days_snow", "d", 0.0, 365.0, _K["snow"], (0.5, 10.0), ALL_METHODS,
              STORAGE_SOURCE + "; 2.5 d = 60 h", "storage constant of water released from snow", ()),
    Parameter("runoff", "storage_days_firn", "d", 0.0, 365.0, _K["firn"], (3.0, 40.0), ALL_METHODS,
              STORAGE_SOURCE + "; 14.5 d = 348 h", "storage constant of water released from firn", ()),
    Parameter("runoff", "storage_days_ice", "d", 0.0, 365.0, _K["ice"], (0.05, 3.0), ALL_METHODS,
              STORAGE_SOURCE + "; 0.5 d = 12 h", "storage constant of water released from glacier ice", ()),
    Parameter("runoff", "storage_days_ground", "d", 0.0, 365.0, _K["ground"], (0.5, 60.0), ALL_METHODS,
              "common practice (our choice: ice-free ground drains slower than snow on a glacier, a few days)",
              "storage constant of water released on ice-free ground", ()),
)

#: The value type each kind of parameter has in a validated config.
PYTHON_TYPES = {"number": float, "monthly": tuple, "pair": tuple}

BY_KEY: dict[str, Parameter] = {p.key: p for p in PARAMETERS}


def get(key: str) -> Parameter | None:
    """The parameter of a config key, or None when the key is not a model parameter."""
    return BY_KEY.get(key)


def in_section(section: str) -> list[Parameter]:
    """The parameters of one config section, in declaration order."""
    return [p for p in PARAMETERS if p.section == section]


def numeric() -> list[str]:
    """Keys whose value is one number (a ``monthly`` parameter counts when it holds one)."""
    return [p.key for p in PARAMETERS if p.kind != "pair"]


def calibratable(method: str) -> list[str]:
    """Keys that can be fitted under a melt method (sorted)."""
    return sorted(p.key for p in PARAMETERS if p.bounds is not None and method in p.methods)


def default_bounds() -> dict[str, tuple[float, float]]:
    """Default calibration bounds of every calibratable key."""
    return {p.key: p.bounds for p in PARAMETERS if p.bounds is not None}


def monthly(values) -> tuple[float, ...]:
    """Twelve monthly values (January first) from one value or twelve."""
    values = tuple(float(v) for v in values)
    return values * 12 if len(values) == 1 else values


def storage_days(cfg) -> tuple[float, float, float, float]:
    """The four storage constants (days) of ``[runoff]``, in the order snow, firn, ice, ground."""
    r = cfg.runoff
    return (r.storage_days_snow, r.storage_days_firn, r.storage_days_ice, r.storage_days_ground)


def kernel_values(cfg) -> dict[str, Any]:
    """The kernel's parameter values by the kernel's names, from a validated config.

    ``monthly`` parameters give twelve values (January first); a ``pair`` gives its two
    names; parameters without a kernel name (``transmissivity`` shapes the radiation
    table, not the kernel) give none. The melt method is given by its config name as ``method``.

    Parameters
    ----------
    cfg : firnline.config.Config

    Returns
    -------
    dict
        For example ``{"lapse_rate_k_per_m": (-0.0065,) * 12, "snow_c": 0.5, ...,
        "ddf_snow": 3.0, ..., "method": "degree-day", "refreezing": "cold-content"}``.
    """
    out: dict[str, Any] = {}
    for p in PARAMETERS:
        value = getattr(getattr(cfg, p.section), p.key)
        if p.kind == "monthly":
            out[p.kernel[0]] = monthly(value)
        elif p.kind == "pair":
            out.update(zip(p.kernel, (float(v) for v in value)))
        elif p.kernel:
            out[p.kernel[0]] = float(value)
    out["method"] = cfg.melt.method
    out["refreezing"] = cfg.snow.refreezing
    out["firn_years"] = int(cfg.snow.firn_years)
    return out


#: The factors of the radiation method; all three at their defaults = an uncalibrated run.
RADIATION_FACTORS = ("melt_factor_mm_per_day_k", "radiation_factor_snow", "radiation_factor_ice")


def radiation_defaults_notes(cfg) -> list[str]:
    """One console note when ``[melt] method = "radiation"`` runs with all three factors at
    their defaults (:data:`RADIATION_FACTORS`), none otherwise.

    The defaults are derived from the degree-day defaults over the demo glaciers (see
    :data:`RADIATION_DERIVATION`), not fitted to any site.
    """
    if cfg.melt.method != "radiation":
        return []
    if any(float(getattr(cfg.melt, k)) != float(get(k).default) for k in RADIATION_FACTORS):
        return []
    return [f'warning: [melt] method = "radiation" runs with the uncalibrated default factors '
            f"({', '.join(f'{k} = {get(k).default:g}' for k in RADIATION_FACTORS)}), derived from the "
            f"degree-day defaults over the demo glaciers (I_dd = {RADIATION_IDD_W_M2:g} W m-2); fit them "
            "with `firnline calibrate` or set them from field knowledge before trusting the balances"]
