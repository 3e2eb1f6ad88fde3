"""Run configuration: TOML in, typed and validated objects out.

Every default lives in :data:`SCHEMA` below and nowhere else; ``configs/demo.toml``
shows each of them, commented. Relative paths resolve against the folder of the
config file. Any problem (unknown key, wrong type, impossible value) raises
:class:`firnline.errors.InputError` with one sentence that names the key.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import difflib
import math
import re
import tomllib  # Python 3.11+ (pyproject.toml requires it)
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

from . import parameters
from .errors import InputError
from .files import read_text
from .parameters import MAX_INVERSION_K_PER_M, MIN_LAPSE_K_PER_M

#: ``[snow] redistribution``: gravitational snow redistribution (firnline.snowslide) or none
REDISTRIBUTION_CHOICES = ("gravitational", "none")
#: ``[snow] refreezing``: the cold-content scheme of firnline.kernel (retention and refreezing) or none
REFREEZING_CHOICES = ("cold-content", "none")
#: ``[compute] cells``: every valid DEM cell, or the glacier cells and those within glacier_buffer_m of them
CELLS_CHOICES = ("all", "glaciers")

REQUIRED = object()  # marker: the key has no default and must be given
OPTIONAL = None


# ----------------------------------------------------------------------------
# value checkers: each takes (value, where) and returns the converted value
# ----------------------------------------------------------------------------

def _fail(where: str, allowed: str, value: Any) -> InputError:
    return InputError(f"{where} must be {allowed}; got {value!r}.")


def _number(lo: float | None = None, hi: float | None = None, lo_open=False) -> Callable:
    def check(v, where):
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise _fail(where, "a number", v)
        v = float(v)
        if lo is not None and (v < lo or (lo_open and v == lo)):
            raise _fail(where, f"a number {'>' if lo_open else '>='} {lo:g}", v)
        if hi is not None and v > hi:
            raise _fail(where, f"a number <= {hi:g}", v)
        return v
    check.type = float
    return check


def _integer(lo: int, hi: int) -> Callable:
    def check(v, where):
        if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
            raise _fail(where, f"a whole number from {lo} to {hi}", v)
        return int(v)
    check.type = int
    return check


def _string(choices: tuple[str, ...] | None = None) -> Callable:
    def check(v, where):
        if not isinstance(v, str) or not v.strip():
            raise _fail(where, "a non-empty text in quotes", v)
        if choices and v not in choices:
            raise _fail(where, "one of " + ", ".join(f'"{c}"' for c in choices), v)
        return v
    check.type = str
    return check


def _path(v, where):
    if not isinstance(v, str) or not v.strip():
        raise _fail(where, "a file path in quotes", v)
    return v  # resolved against the config folder in load_config


def _date(v, where):
    if isinstance(v, _dt.datetime):
        return v.date()
    if isinstance(v, _dt.date):
        return v
    if isinstance(v, str):
        try:
            return _dt.date.fromisoformat(v.strip())
        except ValueError:
            pass
    raise _fail(where, 'a date written "YYYY-MM-DD"', v)


def _month_day(v, where):
    try:
        m, d = (int(p) for p in str(v).split("-"))
        _dt.date(2001, m, d)  # a non-leap year: 02-29 is refused
        return f"{m:02d}-{d:02d}"
    except (ValueError, TypeError):
        raise _fail(where, 'a month and day written "MM-DD" (not 02-29)', v) from None


def _lapse(v, where):
    values = v if isinstance(v, list) else [v]
    if len(values) not in (1, 12):
        raise _fail(where, "one number or a list of twelve monthly numbers (January first)", v)
    check = _number(MIN_LAPSE_K_PER_M, MAX_INVERSION_K_PER_M)
    out = []
    for i, x in enumerate(values):
        label = where if len(values) == 1 else f"{where} (month {i + 1})"
        try:
            out.append(check(x, label))
        except InputError:
            raise InputError(
                f"{label} must be a lapse rate in K per m between {MIN_LAPSE_K_PER_M:g} and "
                f"{MAX_INVERSION_K_PER_M:g} (for example -0.0065; a positive value is an "
                f"inversion); got {x!r}.") from None
    return tuple(out)


def _pair(v, where):
    if (not isinstance(v, list) or len(v) != 2
            or any(isinstance(x, bool) or not isinstance(x, (int, float)) for x in v)):
        raise _fail(where, "a list of two numbers [all snow at or below, all rain at or above] in deg C", v)
    lo, hi = float(v[0]), float(v[1])
    if lo > hi:
        raise InputError(f"{where}: the snow threshold {lo:g} C lies above the rain threshold "
                         f"{hi:g} C; give them as [snow, rain] with snow <= rain.")
    if lo < -10 or hi > 10:
        raise _fail(where, "two temperatures between -10 and 10 deg C", v)
    return (lo, hi)


def _string_list(v, where):
    if not isinstance(v, list) or not all(isinstance(x, str) for x in v):
        raise _fail(where, 'a list of key names in quotes, e.g. ["ddf_snow_mm_per_day_k"]', v)
    return tuple(v)


def _table(v, where):
    if not isinstance(v, dict):
        raise _fail(where, "a table { key = value, ... }", v)
    return dict(v)


def _scheduler(v, where):
    """``"local"`` or the address of a dask.distributed scheduler (``tcp://host:port``, ``host:port``)."""
    if isinstance(v, str) and (v == "local" or re.fullmatch(r"(tcp|tls|ucx|ws|wss|inproc)://\S+|[\w.-]+:\d+", v)):
        return v
    raise _fail(where, '"local" (a local dask cluster) or the address of a dask.distributed scheduler, '
                'for example "tcp://10.0.0.5:8786"', v)


def _boolean(v, where):
    if not isinstance(v, bool):
        raise _fail(where, "true or false", v)
    return v


for _check, _type in ((_path, Path), (_date, _dt.date), (_month_day, str), (_lapse, tuple), (_pair, tuple),
                      (_string_list, tuple), (_table, dict), (_boolean, bool), (_scheduler, str)):
    _check.type = _type   # the type of the value a checker returns (for the typed sections)


# ----------------------------------------------------------------------------
# the schema: section -> key -> (checker, default). The only home of defaults.
# ----------------------------------------------------------------------------

SCHEMA: dict[str, dict[str, tuple[Callable, Any]]] = {
    "site": {
        "name": (_string(), "unnamed site"),
    },
    "dem": {
        "path": (_path, REQUIRED),
    },
    "glaciers": {
        "outlines": (_path, REQUIRED),
        "id_field": (_string(), "name"),
        "layer": (_string(), OPTIONAL),
    },
    "climate": {
        "station_file": (_path, OPTIONAL),        # exactly one of station_file, stations, grid_file
        "station_elevation_m": (_number(-500.0, 9000.0), OPTIONAL),   # required with station_file
        "stations": (_path, OPTIONAL),
        "stations_crs": (_string(), OPTIONAL),
        "idw_power": (_number(0.0, 10.0, lo_open=True), 2.0),
        "lapse_rate_from_stations": (_boolean, False),
        "grid_file": (_path, OPTIONAL),
        "date_column": (_string(), "date"),
        "temperature_column": (_string(), "temperature_c"),
        "precipitation_column": (_string(), "precipitation_mm"),
        "start": (_date, OPTIONAL),
        "end": (_date, OPTIONAL),
    },
    # the model parameters: rows made from the registry (firnline.parameters)
    "downscaling": {},
    "melt": {
        "method": (_string(parameters.METHODS), parameters.METHODS[0]),
    },
    "snow": {
        "redistribution": (_string(REDISTRIBUTION_CHOICES), REDISTRIBUTION_CHOICES[0]),
        "refreezing": (_string(REFREEZING_CHOICES), REFREEZING_CHOICES[0]),
        # firn older than this many balance years becomes glacier ice; 0: no firn. Default 5:
        # parameters.FIRN_YEARS_SOURCE (Cuffey & Paterson 2010, from memory)
        "firn_years": (_integer(0, 100), 5),
        # balance years cycled before the first modelled year (common practice); 0: empty start
        "spinup_years": (_integer(0, 50), 5),
    },
    "runoff": {
        "catchment": (_path, OPTIONAL),
        "layer": (_string(), OPTIONAL),
    },
    "balance": {
        "year_start": (_month_day, "10-01"),
        "winter_end": (_month_day, "04-30"),
        "band_width_m": (_number(1.0, 2000.0), 50.0),   # below 1 m: bands finer than any DEM's accuracy
    },
    "output": {
        "dir": (_path, "out"),
    },
    "radiation": {
        "time_step_minutes": (_integer(1, 180), 15),
        "horizon_sectors": (_integer(4, 720), 72),
        "horizon_distance_m": (_number(0.0, 200000.0), 20000.0),
        "cache_dir": (_path, ".firnline_cache"),
        "write_horizons": (_boolean, False),
    },
    "observations": {
        "glacier_balances": (_path, OPTIONAL),
        "point_balances": (_path, OPTIONAL),
        "points_crs": (_string(), OPTIONAL),
        "discharge": (_path, OPTIONAL),
    },
    "calibration": {
        "parameters": (_string_list, REQUIRED),
        "bounds": (_table, {}),
        "ratios": (_table, {}),
        "discharge_sigma_pct": (_number(0.0, 100.0, lo_open=True), 15.0),
    },
    "compute": {
        # cells along a unit's side (firnline.tiles); a DEM smaller than one unit is one unit
        "tile_size": (_integer(16, 1 << 20), 2048),
        "workers": (_integer(1, 4096), 2),                 # dask worker processes of a local cluster
        "scheduler": (_scheduler, "local"),
        "cells": (_string(CELLS_CHOICES), CELLS_CHOICES[0]),
        "glacier_buffer_m": (_number(0.0, 1.0e6), 500.0),  # with cells = "glaciers"
    },
}



def _parameter_checker(p: parameters.Parameter) -> Callable:
    """The value checker of a registry parameter (see :mod:`firnline.parameters`)."""
    if p.kind == "monthly":
        return _lapse
    if p.kind == "pair":
        return _pair
    return _number(p.low, p.high, lo_open=p.low_open)


for _p in parameters.PARAMETERS:
    SCHEMA[_p.section][_p.key] = (_parameter_checker(_p), _p.default)
del _p

# sections without which a run cannot start
REQUIRED_SECTIONS = ("dem", "climate")
PATH_KEYS = {("dem", "path"), ("glaciers", "outlines"), ("climate", "station_file"),
             ("climate", "stations"), ("climate", "grid_file"),
             ("output", "dir"), ("radiation", "cache_dir"),
             ("observations", "glacier_balances"), ("observations", "point_balances"),
             ("observations", "discharge"), ("runoff", "catchment")}


# ----------------------------------------------------------------------------
# typed sections
# ----------------------------------------------------------------------------

# Each section is a frozen dataclass made from its SCHEMA rows, one field per key in
# order, typed by its checker (``X | None`` for an optional key): a new key is one row.

def _section_type(section: str, name: str, namespace: dict | None = None) -> type:
    fields = [(key, check.type if default is not OPTIONAL else check.type | None)
              for key, (check, default) in SCHEMA[section].items()]
    cls = dataclasses.make_dataclass(name, fields, frozen=True, namespace=namespace)
    cls.__module__ = __name__
    return cls


def _monthly_lapse_rates(self) -> tuple[float, ...]:
    """Twelve lapse rates (K per m), January first."""
    return parameters.monthly(self.lapse_rate_k_per_m)


Site = _section_type("site", "Site")
Dem = _section_type("dem", "Dem")
GlacierOutlines = _section_type("glaciers", "GlacierOutlines")


def _climate_mode(self) -> str:
    """Which forcing is given: ``"station"``, ``"stations"`` or ``"grid"``."""
    return "stations" if self.stations else "grid" if self.grid_file else "station"


Climate = _section_type("climate", "Climate", {"mode": property(_climate_mode)})
#: a lapse rate holds one value or twelve (January first); ``monthly_lapse_rates()`` gives twelve
Downscaling = _section_type("downscaling", "Downscaling", {"monthly_lapse_rates": _monthly_lapse_rates})
Melt = _section_type("melt", "Melt")
Snow = _section_type("snow", "Snow")
#: ``[runoff]``: the catchment polygons and the storage constants of the linear reservoirs
Runoff = _section_type("runoff", "Runoff")
Balance = _section_type("balance", "Balance")
Output = _section_type("output", "Output")
Radiation = _section_type("radiation", "Radiation")
Observations = _section_type("observations", "Observations")
Calibration = _section_type("calibration", "Calibration")
#: ``[compute]``: units of work (tiles), dask workers and scheduler, which cells are modelled
Compute = _section_type("compute", "Compute")


@dataclass(frozen=True)
class Config:
    """A validated run configuration (see ``../shared/DESIGN.md`` for each key)."""

    site: Site
    dem: Dem
    climate: Climate
    downscaling: Downscaling
    melt: Melt
    snow: Snow
    balance: Balance
    output: Output
    radiation: Radiation
    compute: Compute = field(default_factory=lambda: Compute(**{k: d for k, (_, d) in SCHEMA["compute"].items()}))
    runoff: Runoff | None = None        # always set by parse_config (the section is optional in a file)
    glaciers: GlacierOutlines | None = None
    observations: Observations | None = None
    calibration: Calibration | None = None
    source: Path | None = None          # the TOML file it came from
    raw: dict = field(default_factory=dict, repr=False)  # as written, for run.json and calibrated.toml

    def with_values(self, **changes: float) -> "Config":
        """A copy with numeric model parameters (:data:`firnline.parameters.PARAMETERS`) replaced.

        ``changes`` maps key names (e.g. ``ddf_snow_mm_per_day_k``) to numbers; each is
        validated like the value in a file.
        """
        sections: dict[str, dict] = {}
        raw = {k: dict(v) if isinstance(v, dict) else v for k, v in self.raw.items()}
        for key, value in changes.items():
            if key not in parameters.numeric():
                raise InputError(f"{key} is not a numeric model parameter (see firnline.parameters).")
            section = parameters.BY_KEY[key].section
            checked = SCHEMA[section][key][0](value, f"[{section}] {key}")
            sections.setdefault(section, dataclasses.asdict(getattr(self, section)))[key] = checked
            raw.setdefault(section, {})[key] = list(checked) if isinstance(checked, tuple) else checked
        new = {name: _SECTION_TYPES[name](**values) for name, values in sections.items()}
        return dataclasses.replace(self, raw=raw, **new)


_SECTION_TYPES = {
    "site": Site, "dem": Dem, "glaciers": GlacierOutlines, "climate": Climate,
    "downscaling": Downscaling, "melt": Melt, "snow": Snow, "balance": Balance, "output": Output,
    "radiation": Radiation, "compute": Compute, "runoff": Runoff, "observations": Observations,
    "calibration": Calibration,
}


def _suggest(name: str, choices) -> str:
    close = difflib.get_close_matches(name, list(choices), n=1)
    return f' (did you mean "{close[0]}"?)' if close else ""


def parse_config(data: dict, base_dir: Path, source: Path | None = None) -> Config:
    """Validate a TOML mapping and build a :class:`Config`; paths resolve against ``base_dir``."""
    label = source.name if source else "config"
    unknown = [s for s in data if s not in SCHEMA]
    if unknown:
        s = unknown[0]
        raise InputError(f"{label}: unknown section [{s}]{_suggest(s, SCHEMA)}; allowed sections are "
                         + ", ".join(f"[{k}]" for k in SCHEMA) + ".")
    for s in REQUIRED_SECTIONS:
        if s not in data:
            raise InputError(f"{label}: the section [{s}] is missing; add it (see configs/demo.toml).")
    sections = {}
    for name, spec in SCHEMA.items():
        given = data.get(name)
        if given is None:
            if name in ("glaciers", "observations", "calibration"):
                continue
            given = {}
        if not isinstance(given, dict):
            raise InputError(f"{label}: [{name}] must be a section (a table of keys), not a value.")
        for key in given:
            if key not in spec:
                raise InputError(f"{label}: unknown key \"{key}\" in [{name}]{_suggest(key, spec)}; "
                                 f"allowed keys are {', '.join(spec)}.")
        values = {}
        for key, (check, dflt) in spec.items():
            where = f"{label}: [{name}] {key}"
            if key in given:
                value = check(given[key], where)
            elif dflt is REQUIRED:
                raise InputError(f"{label}: [{name}] needs the key \"{key}\"; add it (see configs/demo.toml).")
            else:
                value = dflt
            if (name, key) in PATH_KEYS and value is not None:
                value = (base_dir / Path(value).expanduser()).resolve()
            values[key] = value
        sections[name] = _SECTION_TYPES[name](**values)

    cl = sections["climate"]
    _check_climate(cl, data.get("climate", {}), label)
    if cl.start and cl.end and cl.end <= cl.start:
        raise InputError(f"{label}: [climate] end ({cl.end}) must come after start ({cl.start}).")
    _check_compute(sections, label)
    if "calibration" in sections:
        from .calibrate.spec import check_section  # all [calibration] checks live there
        check_section(sections["calibration"], label)
    return Config(**sections, source=source, raw=data)


def _check_compute(sections: dict, label: str) -> None:
    """``cells = "glaciers"`` models part of the ground: refuse the inputs that need all of it."""
    if sections["compute"].cells != "glaciers":
        return
    obs = sections.get("observations")
    for key, given in (("[runoff] catchment", sections["runoff"].catchment),
                       ("[observations] discharge", obs.discharge if obs is not None else None)):
        if given is not None:
            raise InputError(f'{label}: [compute] cells = "glaciers" models only the glaciers and their '
                             f"surroundings, so the catchment runoff that {key} asks for would miss the rest "
                             f'of the catchment; set [compute] cells = "all" or remove {key}.')


def _check_climate(cl: Climate, given: dict, label: str) -> None:
    """Exactly one forcing source; the keys that belong to it only."""
    chosen = [k for k in ("station_file", "stations", "grid_file") if getattr(cl, k) is not None]
    if len(chosen) != 1:
        what = "none" if not chosen else " and ".join(chosen)
        raise InputError(f"{label}: [climate] needs exactly one of station_file (one station), stations "
                         f"(a table of several) or grid_file (NetCDF-CF); it has {what}.")
    if cl.station_file is not None and cl.station_elevation_m is None:
        raise InputError(f"{label}: [climate] needs the key \"station_elevation_m\" with station_file; "
                         "add the station's elevation in m (see configs/demo.toml).")
    if cl.station_file is None and "station_elevation_m" in given:
        raise InputError(f"{label}: [climate] station_elevation_m belongs to station_file; with "
                         f"{chosen[0]} the elevations come from the {'table' if cl.stations else 'file'}; "
                         "remove it.")
    if cl.stations is None:
        for k in ("stations_crs", "idw_power", "lapse_rate_from_stations"):
            if k in given:
                raise InputError(f"{label}: [climate] {k} applies to stations only; remove it or give "
                                 "[climate] stations.")


def load_config(path: str | Path) -> Config:
    """Read and validate a TOML config file.

    Parameters
    ----------
    path : str or Path
        The TOML file. Relative paths inside it resolve against its folder.

    Returns
    -------
    Config

    Raises
    ------
    InputError
        When the file is missing or not TOML, or any key is unknown, of the wrong
        type or impossible; the message names the key.
    """
    path = Path(path)
    text = read_text(path, "config file", "check the path")
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise InputError(f"{path.name}: not valid TOML ({e}); fix the line it names.") from None
    return parse_config(data, path.resolve().parent, source=path.resolve())
