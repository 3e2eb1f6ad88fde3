"""Config loading: defaults in one place, typed values, one clear sentence per mistake."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from firnline.config import SCHEMA, load_config, parse_config
from firnline.errors import InputError

REPO = Path(__file__).resolve().parents[1]


def minimal(**extra):
    data = {"dem": {"path": "dem.tif"},
            "climate": {"station_file": "st.csv", "station_elevation_m": 1200.0}}
    for k, v in extra.items():
        data.setdefault(k, {}).update(v)
    return data


def test_defaults_and_relative_paths(tmp_path):
    cfg = parse_config(minimal(), tmp_path)
    assert cfg.dem.path == (tmp_path / "dem.tif").resolve()
    assert cfg.downscaling.monthly_lapse_rates() == (-0.0065,) * 12
    assert cfg.melt.method == "degree-day"
    assert cfg.balance.band_width_m == 50.0
    assert cfg.output.dir == (tmp_path / "out").resolve()
    assert cfg.glaciers is None


def test_twelve_monthly_lapse_rates(tmp_path):
    lr = [-0.004, -0.0045, -0.005, -0.006, -0.0065, -0.007, -0.007, -0.0068, -0.0062, -0.0055, -0.005, -0.0042]
    cfg = parse_config(minimal(downscaling={"lapse_rate_k_per_m": lr}), tmp_path)
    assert cfg.downscaling.monthly_lapse_rates() == tuple(lr)


@pytest.mark.parametrize("section,key,value,words", [
    ("melt", "ddf_snow_mm_per_day_k", -1.0, "ddf_snow_mm_per_day_k"),
    ("melt", "ddf_snow_mm_per_dy_k", 3.0, "did you mean \"ddf_snow_mm_per_day_k\""),
    ("melt", "method", "energy-balance", "one of"),
    ("melt", "ddf_ice_mm_per_day_k", "six", "must be a number"),
    ("downscaling", "snow_rain_range_c", [2.5, 0.5], "snow threshold 2.5 C lies above the rain threshold"),
    ("downscaling", "lapse_rate_k_per_m", 0.05, "inversion"),
    ("downscaling", "lapse_rate_k_per_m", [-0.006] * 11, "twelve"),
    ("balance", "band_width_m", 0, "band_width_m"),
    ("balance", "year_start", "13-01", "MM-DD"),
    ("climate", "start", "yesterday", "YYYY-MM-DD"),
    ("radiation", "horizon_sectors", 2.5, "whole number"),
])
def test_bad_values_name_the_key(tmp_path, section, key, value, words):
    with pytest.raises(InputError) as e:
        parse_config(minimal(**{section: {key: value}}), tmp_path)
    msg = str(e.value)
    assert key.split("_dy_")[0] in msg and words in msg
    assert msg.count("\n") == 0


def test_unknown_section_and_missing_keys(tmp_path):
    with pytest.raises(InputError, match=r"unknown section \[melting\].*\[melt\]"):
        parse_config(minimal(melting={"x": 1}), tmp_path)
    with pytest.raises(InputError, match="station_elevation_m"):
        parse_config({"dem": {"path": "d.tif"}, "climate": {"station_file": "s.csv"}}, tmp_path)
    with pytest.raises(InputError, match=r"\[dem\] is missing"):
        parse_config({"climate": {"station_file": "s.csv", "station_elevation_m": 1.0}}, tmp_path)


def test_calibration_parameters_must_be_numeric_keys(tmp_path):
    with pytest.raises(InputError, match="method"):
        parse_config(minimal(calibration={"parameters": ["method"]}), tmp_path)
    cfg = parse_config(minimal(calibration={"parameters": ["ddf_snow_mm_per_day_k"],
                                            "bounds": {"ddf_snow_mm_per_day_k": [1.0, 12.0]}}), tmp_path)
    assert cfg.calibration.parameters == ("ddf_snow_mm_per_day_k",)


def test_not_toml_and_missing_file(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text("[dem\npath = 1")
    with pytest.raises(InputError, match="not valid TOML"):
        load_config(p)
    with pytest.raises(InputError, match="not found"):
        load_config(tmp_path / "nope.toml")


def test_with_values_validates(tmp_path):
    cfg = parse_config(minimal(), tmp_path)
    c2 = cfg.with_values(ddf_ice_mm_per_day_k=7.5, precip_factor=1.1)
    assert c2.melt.ddf_ice_mm_per_day_k == 7.5 and c2.downscaling.precip_factor == 1.1
    assert c2.raw["melt"]["ddf_ice_mm_per_day_k"] == 7.5
    with pytest.raises(InputError):
        cfg.with_values(ddf_ice_mm_per_day_k=-2.0)


def test_demo_config_shows_every_default():
    """configs/demo.toml lists every key of the sections it shows, and each value not
    marked "demo value" equals the default in firnline.config.SCHEMA."""
    text = (REPO / "configs" / "demo.toml").read_text()
    cfg = load_config(REPO / "configs" / "demo.toml")
    section = None
    seen = set()
    for line in text.splitlines():
        m = re.match(r"^\[(\w+)\]", line)
        if m:
            section = m.group(1)
            continue
        m = re.match(r"^#?\s*(\w+)\s*=", line)
        if m and section in SCHEMA and m.group(1) in SCHEMA[section]:
            seen.add((section, m.group(1)))
            if line.startswith("#") or "demo value" in line or "required" in line:
                continue
            import tomllib
            value = tomllib.loads(line.split("#")[0])[m.group(1)]
            check, default = SCHEMA[section][m.group(1)]
            got = check(value, "x")
            if isinstance(default, str) and section in ("output", "radiation") and m.group(1).endswith("dir"):
                continue
            assert got == default or (isinstance(default, float) and abs(got - default) < 1e-9), (section, m.group(1))
    for section in ("site", "dem", "climate", "downscaling", "melt", "snow", "balance", "output", "radiation"):
        for key in SCHEMA[section]:
            assert (section, key) in seen, f"configs/demo.toml does not show [{section}] {key}"
    assert cfg.site.name
