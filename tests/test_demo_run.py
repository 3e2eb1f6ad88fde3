"""The demo end to end: `firnline demo DIR`, then `firnline run` on it."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import rasterio

from firnline.cli import main
from firnline.demo import demo_config_text

REPO = Path(__file__).resolve().parents[1]


def test_repo_config_is_the_packaged_demo_config():
    """configs/demo.toml is src/firnline/demo.toml with paths into ../demo_dem/ (regenerate with
    firnline.demo.write_repo_config('configs/demo.toml'))."""
    assert (REPO / "configs" / "demo.toml").read_text() == demo_config_text("../demo_dem/", "../out")


def test_demo_command_then_run_writes_every_file_on_the_dem_grid(tmp_path):
    folder = tmp_path / "demo"
    assert main(["demo", str(folder), "--quiet"]) == 0
    cfg = folder / "demo.toml"
    text = cfg.read_text().replace('# start = "2016-10-01"', 'start = "2016-10-01"')
    text = text.replace('# end = "2024-09-30"', 'end = "2018-09-30"')      # a shortened period
    cfg.write_text(text)
    out = tmp_path / "out"
    assert main(["run", str(cfg), "--out", str(out), "--quiet"]) == 0
    s = pd.read_csv(out / "summary.csv")
    s = s[s.glacier != "all_glaciers"]          # the area-weighted rows over every glacier (issue 15)
    assert sorted(s.balance_year.unique()) == [2017, 2018]
    assert set(s.glacier) == {"north_seldra", "kessel", "tarn"}
    expected = {"summary.csv", "profiles.csv", "mean_annual_balance.tif", "run.json", "balance.nc",
                "glacier_id.tif", "balanced_budget.csv"}
    for y in (2017, 2018):
        expected |= {f"{p}_{y}.tif" for p in ("annual_balance", "winter_balance", "summer_balance",
                                              "accumulation", "ablation")}
    names = {p.name for p in out.iterdir()}
    assert expected <= names, expected - names
    with rasterio.open(folder / "dem.tif") as dem:
        for name in sorted(n for n in names if n.endswith(".tif")):
            with rasterio.open(out / name) as t:
                assert (t.crs, t.transform, t.shape) == (dem.crs, dem.transform, dem.shape), name
    # plausibility of the invented demo (a mid-latitude glacier; issue 2, item 9)
    assert s.annual_balance_mwe.between(-3, 1.5).all()
    assert (s.ela_flag == "ok").mean() >= 0.5
