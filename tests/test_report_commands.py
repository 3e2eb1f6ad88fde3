"""The reports of ``scenarios`` and ``calibrate`` (issue 15): the same page builder as the run's
report, their tables and figures, the parameters and where they came from, and ``--no-report``."""

from __future__ import annotations

import base64
import re

import pandas as pd
import pytest

from firnline.cli import main
from firnline.outdir import MANIFEST


@pytest.fixture
def case(calibration_case):
    """The small calibration case of conftest.py (observed with factors 4.5 and 8.5, started at 3 and 6)."""
    return calibration_case({"ddf_snow_mm_per_day_k": 4.5, "ddf_ice_mm_per_day_k": 8.5},
                            {"ddf_snow_mm_per_day_k": 3.0, "ddf_ice_mm_per_day_k": 6.0})


def _images(text: str) -> list[bytes]:
    return [base64.b64decode(m) for m in re.findall(r'src="data:image/png;base64,([^"]+)"', text)]


def test_scenarios_report(builders, tmp_path):
    cfg = builders.seasonal(tmp_path, years=3)
    out = tmp_path / "sweep"
    assert main(["scenarios", str(cfg), "--warming", "1", "2", "--out", str(out), "--quiet"]) == 0
    text = (out / "scenarios_report.html").read_text(encoding="utf-8")
    assert text.startswith("<!DOCTYPE html>") and "Warming and precipitation scenarios" in text
    # the sweep's four figures, embedded byte for byte
    figs = {(out / n).read_bytes() for n in ("ela_vs_warming.png", "balance_vs_warming.png",
                                             "balance_profiles.png", "runoff_regimes.png")}
    assert set(_images(text)) == figs
    # every scenario row of scenarios.csv, the sensitivity, the rules, inputs, the caution
    t = pd.read_csv(out / "scenarios.csv")
    assert len(t) == 3 and all(f"{v:.2f}" in text for v in t.mean_annual_balance_mwe)
    assert "dELA/dT" in text and "Rules of the means and slopes" in text
    assert "SHA-256" in text and "qualified practitioners" in text
    assert "http://" not in text and "https://" not in text
    names = {p.name for p in out.iterdir() if p.name != MANIFEST}
    assert "scenarios_report.html" in names
    out2 = tmp_path / "sweep2"
    assert main(["scenarios", str(cfg), "--warming", "1", "--out", str(out2), "--quiet", "--no-report"]) == 0
    assert not (out2 / "scenarios_report.html").exists() and (out2 / "ela_vs_warming.png").exists()


def test_calibration_report(case, tmp_path):
    cfg = case["config"]()
    out = tmp_path / "cal"
    assert main(["calibrate", str(cfg), "--out", str(out), "--quiet"]) == 0
    text = (out / "calibration_report.html").read_text(encoding="utf-8")
    assert "Calibration" in text and "RMSE" in text
    assert _images(text) == [(out / "calibration_fit.png").read_bytes()]
    res = pd.read_csv(out / "calibration_residuals.csv")
    assert text.count("<tr") >= len(res)                   # one row per observation (and the others)
    # the fitted keys are marked as coming from the calibration, the rest from the config or defaults
    rows = re.findall(r"<tr><td[^>]*>\[melt\] (ddf_\w+)</td>(.*?)</tr>", text)
    assert {k for k, _ in rows} == {"ddf_snow_mm_per_day_k", "ddf_ice_mm_per_day_k"}
    assert all(">calibration<" in r for _, r in rows)
    assert "glacier-wide balances" in text and "point balances" in text      # observation files with checksums
    out2 = tmp_path / "cal2"
    assert main(["calibrate", str(cfg), "--out", str(out2), "--quiet", "--no-report"]) == 0
    assert not (out2 / "calibration_report.html").exists()


def test_run_of_calibrated_toml_says_calibration(case, tmp_path):
    """The run report of a calibrated.toml marks the fitted values as coming from the calibration."""
    cfg = case["config"]()
    out = tmp_path / "cal"
    assert main(["calibrate", str(cfg), "--out", str(out), "--quiet", "--no-report"]) == 0
    run = tmp_path / "run"
    assert main(["run", str(out / "calibrated.toml"), "--out", str(run), "--quiet"]) == 0
    text = (run / "report.html").read_text(encoding="utf-8")
    rows = dict(re.findall(r"<tr><td[^>]*>\[melt\] (\w+)</td>(.*?)</tr>", text))
    assert ">calibration<" in rows["ddf_snow_mm_per_day_k"] and ">calibration<" in rows["ddf_ice_mm_per_day_k"]
    assert ">calibration<" not in rows["threshold_c"]
