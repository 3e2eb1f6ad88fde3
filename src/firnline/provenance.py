"""Provenance in one place: the caution, the header of every JSON record, the file tags.

* :data:`CAUTION`: the one text saying that results are model estimates needing review;
  the console, every JSON record, every GeoTIFF and NetCDF file, calibrated.toml and
  every figure caption use it.
* :func:`header`: the fields that open run.json, scenarios.json and calibration.json
  (version, time, caution, config file).
* :func:`run_tags`: the GeoTIFF / NetCDF tags of a model product (the inputs' checksums,
  the melt method and the scenario).
* :func:`terrain_tags`: the tags of a terrain product; each product carries only the
  settings it depends on (slope and aspect: the DEM; radiation: the radiation settings
  and transmissivity; horizons: the horizon settings) and the config it came from.
"""

from __future__ import annotations

import datetime as dt

from . import __version__

CAUTION = ("firnline results are model estimates. Before they inform water-resource, hydropower "
           "or hazard decisions they must be reviewed by qualified practitioners under the "
           "regulations that apply locally.")

RADIATION_METHOD = ("potential clear-sky direct radiation, Hock (1999) after Oke (1987), cast shadows "
                    "by horizon sectors (Dozier and Frew 1990)")
HORIZON_METHOD = "horizon angles by sector search (Dozier and Frew 1990)"
SLOPE_METHOD = "slope and aspect by the third-order finite difference of Horn (1981)"


def now_utc() -> str:
    """The current time, UTC, ISO 8601 to the second."""
    return dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds")


def header(config) -> dict:
    """The opening fields of every JSON record a command writes."""
    return {"firnline_version": __version__, "created_utc": now_utc(), "caution": CAUTION,
            "config_file": config.source}


def _file_tags(config, checksums: dict) -> dict:
    return {"firnline_version": __version__,
            "created_utc": dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
            "config": str(config.source) if config.source else "",
            "config_sha256": checksums.get("config", ""),
            "dem_sha256": checksums["dem"],
            "caution": CAUTION}


def run_tags(config, checksums: dict, warming_k: float, precip_change_pct: float) -> dict:
    """Tags of a model product (GeoTIFF metadata, NetCDF attributes), all text."""
    return {**_file_tags(config, checksums), "melt_method": config.melt.method,
            "warming_k": f"{warming_k:g}", "precip_change_pct": f"{precip_change_pct:g}"}


def terrain_tags(config, checksums: dict, product: str) -> dict:
    """Tags of a terrain product: ``product`` is ``"slope"``, ``"radiation"`` or ``"horizon"``.

    Slope and aspect depend on the DEM only; the radiation climatology on the horizons,
    ``[melt] transmissivity`` and ``[radiation] time_step_minutes``; the horizons on
    ``[radiation] horizon_sectors`` and ``horizon_distance_m``.
    """
    rc = config.radiation
    tags = _file_tags(config, checksums)
    horizon = {"horizon_sectors": str(rc.horizon_sectors), "horizon_distance_m": f"{rc.horizon_distance_m:g}"}
    if product == "slope":
        return {**tags, "method": SLOPE_METHOD}
    if product == "horizon":
        return {**tags, **horizon, "method": HORIZON_METHOD}
    if product == "radiation":
        return {**tags, **horizon, "transmissivity": f"{config.melt.transmissivity:g}",
                "time_step_minutes": str(rc.time_step_minutes), "method": RADIATION_METHOD}
    raise ValueError(f"unknown terrain product {product!r}")
