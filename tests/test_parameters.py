"""The registry of model parameters: one declaration, and everything derived from it agrees."""

from __future__ import annotations

import dataclasses
import re
import tomllib  # Python 3.11+ (pyproject.toml requires it)
from pathlib import Path

import pytest

from firnline import parameters
from firnline.calibrate import DEFAULT_BOUNDS, calibratable_keys, fit_spec
from firnline.config import SCHEMA, parse_config
from firnline.demo import demo_config_text
from firnline.errors import InputError
from firnline.kernel import KernelParams

REPO = Path(__file__).resolve().parents[1]


def minimal(**extra) -> dict:
    data = {"dem": {"path": "dem.tif"}, "climate": {"station_file": "s.csv", "station_elevation_m": 1000.0}}
    data.update(extra)
    return data


def test_each_parameter_is_declared_completely():
    keys = [p.key for p in parameters.PARAMETERS]
    assert len(keys) == len(set(keys))
    for p in parameters.PARAMETERS:
        assert p.section in ("melt", "downscaling", "snow", "runoff") and p.unit and p.source and p.description
        assert set(p.methods) <= set(parameters.METHODS) and p.methods
        assert p.kind in ("number", "monthly", "pair")
        assert (p.bounds is None) == bool(p.not_calibratable)
        if p.bounds is not None:
            assert p.low <= p.bounds[0] < p.bounds[1] <= p.high, p.key
        for v in (p.default if isinstance(p.default, tuple) else (p.default,)):
            assert p.low <= v <= p.high, p.key


def test_schema_rows_come_from_the_registry():
    for p in parameters.PARAMETERS:
        check, default = SCHEMA[p.section][p.key]
        assert default == p.default
        if p.kind == "number":
            assert check(p.low if not p.low_open else p.high, "x") in (p.low, p.high)
            with pytest.raises(InputError):
                check(p.high + 1.0, "x")


def test_calibration_defaults_come_from_the_registry():
    assert DEFAULT_BOUNDS == {p.key: p.bounds for p in parameters.PARAMETERS if p.bounds}
    assert calibratable_keys("degree-day") == sorted(
        ["ddf_snow_mm_per_day_k", "ddf_ice_mm_per_day_k", "threshold_c", "precip_gradient_per_m",
         "precip_factor", "lapse_rate_k_per_m", "storage_days_snow", "storage_days_firn", "storage_days_ice",
         "storage_days_ground"])
    assert "transmissivity" not in calibratable_keys("radiation")
    assert "radiation_factor_ice" in calibratable_keys("radiation")


@pytest.mark.parametrize("method", parameters.METHODS)
@pytest.mark.parametrize("key", [p.key for p in parameters.PARAMETERS])
def test_every_parameter_either_fits_or_is_refused_in_one_sentence(tmp_path, method, key):
    """No parameter leads to a KeyError (the latent one of a key without default bounds)."""
    data = minimal(melt={"method": method}, calibration={"parameters": [key]})
    try:
        cfg = parse_config(data, tmp_path)
        spec = fit_spec(cfg)
    except InputError as e:
        assert key in str(e) and "\n" not in str(e)
        return
    assert spec.parameters == (key,) and key in calibratable_keys(method)
    assert (spec.lower[0], spec.upper[0]) == parameters.BY_KEY[key].bounds


@pytest.mark.parametrize("method", parameters.METHODS)
def test_kernel_values_agree_with_the_kernel_parameters(tmp_path, method):
    cfg = parse_config(minimal(melt={"method": method, "ddf_snow_mm_per_day_k": 4.0},
                               downscaling={"snow_rain_range_c": [0.0, 2.0]}), tmp_path)
    assert parameters.kernel_values(cfg) == dataclasses.asdict(KernelParams.from_config(cfg))
    monthly = [-0.004 - 0.0001 * m for m in range(12)]
    cfg12 = parse_config(minimal(downscaling={"lapse_rate_k_per_m": monthly}), tmp_path)
    assert parameters.kernel_values(cfg12)["lapse_rate_k_per_m"] == pytest.approx(tuple(monthly))


@pytest.mark.parametrize("text", [demo_config_text(), (REPO / "configs" / "demo.toml").read_text(),
                                  (REPO / "configs" / "demo_calibrate.toml").read_text()])
def test_demo_config_rows_show_the_registry(text):
    """Every registry parameter appears in the demo config with its default and unit."""
    data = tomllib.loads(text)
    for p in parameters.PARAMETERS:
        value = data[p.section][p.key]
        default = list(p.default) if p.kind == "pair" else p.default
        if p.kind == "monthly":
            value = (value,)
        assert value == default, p.key
        line = next(row for row in text.splitlines() if re.match(rf"^{p.key}\s*=", row))
        assert p.unit == "1" or p.unit in line, line


def test_demo_config_output_folder_is_set_by_key_not_by_text(tmp_path):
    data = tomllib.loads(demo_config_text("in/", output_dir="elsewhere"))
    assert data["output"]["dir"] == "elsewhere" and data["dem"]["path"] == "in/dem.tif"
    assert tomllib.loads(demo_config_text())["output"]["dir"] == "out"


def test_committed_demo_calibration_config_is_the_generated_text():
    """configs/demo_calibrate.toml is written by firnline.demo.write_repo_config(..., calibration=True)."""
    assert (REPO / "configs" / "demo_calibrate.toml").read_text() == demo_config_text(
        "../demo_dem/", "../out/calibrate", calibration=True)
