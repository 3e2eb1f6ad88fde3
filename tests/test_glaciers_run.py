"""Outlines through the whole run: per-glacier rows, ice-free ground, flags, exit 2."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pandas as pd
import rasterio
from shapely.geometry import box

from firnline.cli import main

X0, Y0, CELL = 600000.0, 5150000.0, 50.0


def _case(builders, tmp_path, polygons: dict, t=5.0, p=5.0):
    """A 40 x 20 cell plane rising northwards from 1500 m (row 39) to 3500 m (row 0)."""
    z = np.repeat(np.linspace(3500.0, 1500.0, 40)[:, None], 20, axis=1)
    builders.write_dem(tmp_path / "dem.tif", z, cell=CELL, x0=X0, y0=Y0)
    builders.write_station(tmp_path / "station.csv", t=t, p=p)
    builders.write_outlines(tmp_path / "outlines.gpkg", list(polygons), list(polygons.values()), "GPKG",
                   crs="EPSG:32632")
    sec = builders.base_sections()
    sec["glaciers"] = {"outlines": "outlines.gpkg", "id_field": "name"}
    return builders.write_config(tmp_path / "case.toml", sec)


def rows(r0, r1, c0=2, c1=18):
    """A box over rows r0..r1 (row 0 at the north edge), edges off the cell lines."""
    return box(X0 + c0 * CELL + 7, Y0 - r1 * CELL + 11, X0 + c1 * CELL - 9, Y0 - r0 * CELL - 3)


def test_two_glaciers_higher_one_gains_more(builders, tmp_path):
    """Same forcing, different elevations: the higher glacier has the higher specific
    balance (temperature falls with height at the lapse rate; common practice). Under
    constant forcing the ELA is where T = p / ddf_snow (see tests/test_kernel.py):
    T = 5 - 0.0065 (z - 2000) and p/ddf = 5/3 C gives about 2513 m with the snow range
    [0.5, 2.5] C making the low cells rain-fed; the low glacier (1600-2300 m) lies wholly
    below it and the high one (3000-3400 m) wholly above it."""
    cfg = _case(builders, tmp_path, {"high": rows(2, 12), "low": rows(26, 34)})
    out = tmp_path / "out"
    assert main(["run", str(cfg), "--out", str(out), "--quiet"]) == 0
    s = pd.read_csv(out / "summary.csv")
    s = s[s.glacier != "all_glaciers"]          # the area-weighted rows over every glacier (issue 15)
    assert set(s.glacier) == {"high", "low"} and len(s) == 4
    high, low = s[s.glacier == "high"], s[s.glacier == "low"]
    assert (high.annual_balance_mwe.to_numpy() > low.annual_balance_mwe.to_numpy()).all()
    assert (high.ela_flag == "below_glacier").all() and (high.aar == 1).all()
    assert (low.ela_flag == "above_glacier").all() and (low.aar == 0).all()
    assert high.ela_m.isna().all() and low.ela_m.isna().all()
    # modelled area equals the polygon area (the box is exact in the DEM CRS)
    assert np.isclose(high.area_km2.iloc[0], rows(2, 12).area / 1e6, rtol=1e-6)
    info = json.loads((out / "run.json").read_text())
    assert set(info["glaciers"]) == {"high", "low"}
    assert info["glacier_lookup"] == {"1": "high", "2": "low"}
    assert np.isclose(info["all_glaciers"]["area_km2"], (rows(2, 12).area + rows(26, 34).area) / 1e6)
    with rasterio.open(out / "glacier_id.tif") as g, rasterio.open(out / "annual_balance_2017.tif") as b, \
            rasterio.open(out / "ablation_2017.tif") as a, rasterio.open(out / "accumulation_2017.tif") as c:
        ids = g.read(1)
        bal = b.read(1, masked=True)
        abl = a.read(1, masked=True)
        acc = c.read(1, masked=True)
    assert set(np.unique(ids)) == {0, 1, 2}
    # balance maps: nodata off the glaciers; accumulation and ablation everywhere
    assert bal.mask[ids == 0].all() and not bal.mask[ids > 0].any()
    assert not abl.mask.any() and not acc.mask.any()
    # ice-free ground next to the low glacier melts its snow only: ablation <= accumulation
    # (no ice to lose), while the glacier cells at the same rows lose ice
    free = (ids == 0)
    free[:26] = False
    assert np.all(abl[free] <= acc[free] + 1e-6)
    assert np.all(abl[ids == 2] > acc[ids == 2])


def test_bad_outlines_exit_2_through_the_cli(builders, tmp_path):
    cfg = _case(builders, tmp_path, {"a": rows(2, 12), "b": rows(10, 20)})       # a and b overlap
    r = subprocess.run([sys.executable, "-m", "firnline", "run", str(cfg), "--out", str(tmp_path / "o")],
                       capture_output=True, text=True)
    assert r.returncode == 2
    assert "'a'" in r.stderr and "'b'" in r.stderr and "overlap" in r.stderr
    assert "Traceback" not in r.stderr and not (tmp_path / "o").exists() or not any((tmp_path / "o").iterdir())
