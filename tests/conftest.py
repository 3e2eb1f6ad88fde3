"""Shared builders of small synthetic cases (DEM GeoTIFF, station CSV, config, outlines).

Test modules reach them through the ``builders`` fixture (``builders.write_dem(...)``);
no test module imports from another.
"""

from __future__ import annotations

import warnings
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
import rasterio
import shapely
import tomli_w
from pyogrio import raw
from rasterio.transform import from_origin

from firnline.kernel import Daily as _KernelDaily
from firnline.observations import POINT_COLUMNS

CRS = "EPSG:32632"


def write_dem(path: Path, elevation: np.ndarray, cell=50.0, x0=600000.0, y0=5150000.0, crs=CRS,
              nodata=-9999.0) -> Path:
    z = np.where(np.isfinite(elevation), elevation, nodata).astype("float32")
    with rasterio.open(path, "w", driver="GTiff", width=z.shape[1], height=z.shape[0], count=1,
                       dtype="float32", crs=crs, transform=from_origin(x0, y0, cell, cell),
                       nodata=nodata) as dst:
        dst.write(z, 1)
    return path


def write_sparse_dem(path: Path, size: int, cell=1.0) -> Path:
    """A sparse, tiled size x size DEM: its header says size**2 cells, the file holds one 256-cell block."""
    with rasterio.open(path, "w", driver="GTiff", width=size, height=size, count=1, dtype="float32",
                       crs=CRS, transform=from_origin(600000, 5150000, cell, cell), nodata=-9999,
                       tiled=True, SPARSE_OK=True, BIGTIFF="YES") as dst:
        dst.write(np.full((256, 256), 2500, dtype="float32"), 1, window=((0, 256), (0, 256)))
    return path


def ramp(ny=20, nx=10, z_top=3000.0, z_bottom=2000.0) -> np.ndarray:
    """A plane rising northwards (row 0 is north) from z_bottom to z_top at the row centres."""
    z = np.linspace(z_top, z_bottom, ny)
    return np.repeat(z[:, None], nx, axis=1)


def write_station(path: Path, start="2016-10-01", end="2018-09-30", t=5.0, p=5.0) -> Path:
    dates = pd.date_range(start, end, freq="D")
    tt = np.broadcast_to(np.asarray(t, float), dates.shape) if np.ndim(t) == 0 else np.asarray(t)
    pp = np.broadcast_to(np.asarray(p, float), dates.shape) if np.ndim(p) == 0 else np.asarray(p)
    pd.DataFrame({"date": dates.strftime("%Y-%m-%d"), "temperature_c": tt,
                  "precipitation_mm": pp}).to_csv(path, index=False)
    return path


def write_config(path: Path, sections: dict) -> Path:
    path.write_text(tomli_w.dumps(sections))
    return path


def write_outlines(path, names, geoms, driver, crs="EPSG:4326", layer=None, extra=None, append=False):
    """Write outlines with pyogrio (geometry None = a feature without geometry)."""
    wkb = np.array([None if g is None else shapely.to_wkb(g) for g in geoms], dtype=object)
    fields, data = ["name"], [np.array(names, dtype=object)]
    for key, values in (extra or {}).items():
        fields.append(key)
        data.append(np.asarray(values))
    gtype = "MultiPolygon" if driver == "ESRI Shapefile" else "Unknown"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # pyogrio: no crs given
        raw.write(
            str(path), wkb, data, fields, driver=driver, crs=crs, layer=layer,
            geometry_type=gtype, append=append,
        )
    return path


def base_sections(station_elevation=2000.0) -> dict:
    return {
        "site": {"name": "test plane"},
        "dem": {"path": "dem.tif"},
        "climate": {"station_file": "station.csv", "station_elevation_m": station_elevation},
        "output": {"dir": "out"},
        # the synthetic cases keep the pure degree-day physics their hand-worked closed forms
        # assume (no sliding, refreezing, firn or spin-up); tests of those processes switch them on
        "snow": dict(PRE_ISSUE_SNOW),
    }


def folder_case(folder: Path, start="2015-10-01", end="2018-09-30", **overrides) -> Path:
    """A planar glacier 2000..3000 m, constant forcing, three balance years (2016-2018)."""
    folder.mkdir(parents=True, exist_ok=True)
    write_dem(folder / "dem.tif", ramp())
    write_station(folder / "station.csv", start, end, t=5.0, p=5.0)
    sec = base_sections()
    for k, v in overrides.items():
        sec.setdefault(k, {}).update(v)
    return write_config(folder / "case.toml", sec)


def snapshot(folder: Path) -> dict:
    """{relative path: bytes} of every file below ``folder`` (hidden ones included)."""
    if not folder.exists():
        return {}
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def work_entries(out: Path) -> list[str]:
    """firnline's work entries beside ``out`` (staging, earlier set, lock)."""
    return sorted(p.name for p in out.parent.iterdir() if p.name.startswith(f".{out.name}.firnline-"))


def seasonal(tmp_path: Path, years=3, seed=7) -> Path:
    """A planar glacier 1800..3500 m under a seasonal, noisy station record (3 balance years)."""
    end = 2015 + years
    dates = pd.date_range("2015-10-01", f"{end}-09-30", freq="D")
    rng = np.random.default_rng(seed)
    t = 2 + 8 * np.sin(2 * np.pi * (np.arange(len(dates)) - 100) / 365.25) + rng.normal(0, 3, len(dates))
    p = rng.gamma(0.6, 8, len(dates))
    write_dem(tmp_path / "dem.tif", ramp(40, 3, 3500.0, 1800.0))
    write_station(tmp_path / "station.csv", "2015-10-01", f"{end}-09-30", t, p)
    return write_config(tmp_path / "case.toml", base_sections(1800.0))


CALIBRATION_STAKE_ROWS = (1, 6, 10, 14, 18)   # DEM rows of the calibration case's stakes (row 0: 3200 m)


def seasonal_station(path: Path, start="2016-10-01", end="2019-09-30", seed=3) -> Path:
    """An invented station record: seasonal temperature cycle with noise, gamma precipitation."""
    dates = pd.date_range(start, end, freq="D")
    doy = dates.day_of_year.to_numpy()
    rng = np.random.default_rng(seed)
    t = 4.0 - 9.0 * np.cos(2 * np.pi * (doy - 20) / 365.0) + rng.normal(0.0, 3.0, dates.size)
    p = rng.gamma(0.6, 8.0, dates.size)
    pd.DataFrame({"date": dates.strftime("%Y-%m-%d"), "temperature_c": t.round(2),
                  "precipitation_mm": p.round(2)}).to_csv(path, index=False)
    return path


def calibration_sections(melt: dict, **extra) -> dict:
    sec = base_sections(2000.0)
    sec["melt"] = dict(melt)
    for k, v in extra.items():
        sec.setdefault(k, {}).update(v)
    return sec


@pytest.fixture
def calibration_case(tmp_path):
    """A calibration case: ``calibration_case(truth, start)`` writes the DEM (a plane 2200..3200 m,
    20 x 10 cells of 50 m), a seasonal station record and the observations the model makes with
    the factors ``truth`` (stakes on CALIBRATION_CALIBRATION_STAKE_ROWS, glacier-wide annual balances).

    Returns a dict with the folder, the truth run, the observations, the stake rows and a
    ``config(**sections)`` writer of a calibration config that starts from ``start``.
    """
    def build(truth: dict, start: dict) -> dict:
        return _calibration_case(tmp_path, truth, start)
    return build


def _calibration_case(tmp_path, truth_values: dict, start: dict) -> dict:
    import firnline
    write_dem(tmp_path / "dem.tif", ramp(20, 10, 3200.0, 2200.0))
    seasonal_station(tmp_path / "station.csv")
    truth_cfg = write_config(tmp_path / "truth.toml", calibration_sections(truth_values))
    truth = firnline.run(firnline.load_config(truth_cfg))
    ds = truth.fields
    x, y = ds.x.values, ds.y.values
    stakes = []
    for j, r in enumerate(CALIBRATION_STAKE_ROWS):
        for k, year in enumerate(ds.balance_year.values):
            stakes.append([f"S{j}", x[3], y[r], f"{year - 1}-10-01", f"{year}-09-30",
                           float(ds.annual_balance.values[k, r, 3]), 0.15])
            stakes.append([f"S{j}", x[3], y[r], f"{year - 1}-10-01", f"{year}-04-30",
                           float(ds.winter_balance.values[k, r, 3]), 0.15])
    stakes = pd.DataFrame(stakes, columns=list(POINT_COLUMNS))
    s = truth.summary
    glacier = pd.DataFrame({"glacier": s.glacier, "start_date": [f"{v - 1}-10-01" for v in s.balance_year],
                            "end_date": [f"{v}-09-30" for v in s.balance_year],
                            "balance_mwe": s.annual_balance_mwe, "sigma_mwe": 0.2})
    stakes.to_csv(tmp_path / "stakes.csv", index=False)
    glacier.to_csv(tmp_path / "glacier_balances.csv", index=False)

    def config(name="cal.toml", melt=None, calibration=None, observations=None, **extra):
        obs = {"point_balances": "stakes.csv", "glacier_balances": "glacier_balances.csv"}
        obs.update(observations or {})
        obs = {k: v for k, v in obs.items() if v is not None}   # None: leave the key out
        cal = {"parameters": ["ddf_snow_mm_per_day_k", "ddf_ice_mm_per_day_k"]}
        cal.update(calibration or {})
        sec = calibration_sections(melt or start, observations=obs, calibration=cal, **extra)
        return write_config(tmp_path / name, sec)

    return {"dir": tmp_path, "truth": truth, "stakes": stakes, "glacier": glacier, "config": config,
            "stake_rows": CALIBRATION_STAKE_ROWS}


#: the daily terms of the runoff contract, for hand-made daily arrays (the kernel's own names)
Daily = _KernelDaily


def one_sentence_no_traceback(err: str) -> str:
    assert "Traceback" not in err
    lines = [ln for ln in err.strip().splitlines() if ln.strip()]
    assert len(lines) == 1, err
    assert lines[0].startswith("firnline: ")
    return lines[0]
#: every [snow] process of issue 11 switched off: the model as it was before them
PRE_ISSUE_SNOW = {"redistribution": "none", "refreezing": "none", "firn_years": 0, "spinup_years": 0}


@pytest.fixture
def plane_case(tmp_path):
    """A planar glacier 2000..3000 m under constant forcing; returns a builder."""
    def build(t=5.0, p=5.0, start="2016-10-01", end="2018-09-30", **overrides):
        write_dem(tmp_path / "dem.tif", ramp())
        write_station(tmp_path / "station.csv", start, end, t, p)
        sec = base_sections()
        for k, v in overrides.items():
            sec.setdefault(k, {}).update(v)
        return write_config(tmp_path / "case.toml", sec)
    return build


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory):
    """The demo written by ``firnline demo`` and run once with the report (shared by the
    report tests): returns (inputs folder, output folder)."""
    from firnline.cli import main

    folder = tmp_path_factory.mktemp("demo_report")
    assert main(["demo", str(folder / "in"), "--quiet"]) == 0
    out = folder / "out"
    assert main(["run", str(folder / "in" / "demo.toml"), "--out", str(out), "--quiet"]) == 0
    return folder / "in", out


# ----------------------------------------------------------------------------
# kernel cases
# ----------------------------------------------------------------------------

LAPSE = -0.0065  # K per m: ICAO Standard Atmosphere (Doc 7488) / ISO 2533:1975 tropospheric lapse rate


def kernel_params(**kw):
    """Kernel parameters of the hand-worked kernel cases (all precipitation snow below 9 C)."""
    from firnline.kernel import KernelParams
    base = dict(lapse_rate_k_per_m=(LAPSE,) * 12, precip_gradient_per_m=0.0, precip_factor=1.0,
                snow_c=9.0, rain_c=10.0, threshold_c=0.0, ddf_snow=5.0, ddf_ice=8.0)
    base.update(kw)
    return KernelParams(**base)


def constant_record(n_days=365, t=5.0, p=5.0, winter_days=212):
    """One balance year of constant forcing (no leap day), winter first:
    (T, P, month, day of year, year index, winter)."""
    T = np.full(n_days, t)
    P = np.full(n_days, p)
    month = np.ones(n_days, int)
    doy = (np.arange(n_days) % 365) + 1
    year = np.zeros(n_days, int)
    winter = np.arange(n_days) < winter_days
    return T, P, month, doy, year, winter


def station_run(z, ice, z_station, T, P, month, doy, year, winter, params, warming_k=(0.0,),
                precip_change_pct=(0.0,), radiation=None, snapshot_days=None):
    """The kernel in station mode from plain arrays (uniform scenarios)."""
    from firnline.kernel import Calendar, Cells, Scenarios, StationForcing, run_kernel
    return run_kernel(Cells(z, ice, radiation), Calendar(month, doy, year, winter),
                      StationForcing(T, P, z_station), params,
                      Scenarios.uniform(warming_k, precip_change_pct), snapshot_days=snapshot_days)


@pytest.fixture(scope="session")
def builders():
    """The builders above as one namespace: ``builders.write_dem(...)``, ``builders.ramp()``, ..."""
    return SimpleNamespace(write_dem=write_dem, write_sparse_dem=write_sparse_dem, ramp=ramp,
                           write_station=write_station,
                           write_config=write_config, write_outlines=write_outlines,
                           base_sections=base_sections, folder_case=folder_case, snapshot=snapshot,
                           work_entries=work_entries, seasonal=seasonal, seasonal_station=seasonal_station,
                           calibration_sections=calibration_sections,
                           one_sentence_no_traceback=one_sentence_no_traceback,
                           kernel_params=kernel_params, constant_record=constant_record,
                           station_run=station_run, Daily=Daily)
