"""The demo's extra climate: invented upper stations, gridded forcing, change files and configs."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

import firnline
from firnline import demo
from firnline.changes import read_changes

REPO = Path(__file__).resolve().parents[1]
DEMO = REPO / "demo_dem"


@pytest.fixture(scope="module")
def network():
    return demo.make_station_network()


def test_committed_climate_files_match_the_generator(tmp_path, network):
    table, records = network
    pd.testing.assert_frame_equal(pd.read_csv(DEMO / "stations.csv"), pd.read_csv(
        pd.io.common.StringIO(table.to_csv(index=False, float_format="%.1f"))))
    for name, df in records.items():
        committed = pd.read_csv(DEMO / name, keep_default_na=True)
        fresh = pd.read_csv(pd.io.common.StringIO(df.to_csv(index=False, float_format="%.1f")))
        pd.testing.assert_frame_equal(committed, fresh)
    with xr.open_dataset(DEMO / "forcing.nc", engine="h5netcdf") as ds:
        fresh = demo.make_grid_forcing()
        np.testing.assert_array_equal(ds.tas.values, fresh.tas.values)
        np.testing.assert_array_equal(ds.pr.values, fresh.pr.values)
    for name in demo.DEMO_CHANGES:
        s = read_changes(DEMO / f"{name}.csv")
        assert s.warming_k == pytest.approx(demo.DEMO_CHANGES[name][0])
    for mode in ("stations", "grid"):
        assert (REPO / "configs" / f"demo_{mode}.toml").read_text() == demo.climate_config_text(
            mode, "../demo_dem/", output_dir=f"../out/{mode}")


def test_upper_stations_sit_off_the_ice_at_their_dem_elevation(network):
    table, records = network
    z, tr = demo.make_dem()
    masks = demo.glacier_masks(z, tr)
    assert list(table.station) == ["Seldra Dam", "Kessel Hut", "Seldra Pass"]
    for r in table.itertuples():
        col, row = ~tr @ (r.x, r.y)
        row, col = int(row), int(col)
        assert abs(z[row, col] - r.elevation_m) < 1.0
        assert not any(m[row, col] for m in masks.values())
    assert table.elevation_m.is_monotonic_increasing and table.elevation_m.iloc[-1] > 2700


def test_upper_records_are_colder_wetter_and_have_the_invented_gaps(network):
    table, records = network
    base = demo.make_station_record()
    hut, col = records["kessel_hut.csv"], records["seldra_pass.csv"]
    t_hut = pd.to_numeric(hut.temperature_c, errors="coerce")
    assert t_hut.isna().sum() == 15                                    # 10-24 January 2019
    assert len(col) == len(base) - 9                                   # no rows 1-9 July 2021
    assert t_hut.mean() < base.temperature_c.mean() - 5                # about 1270 m higher
    assert pd.to_numeric(hut.precipitation_mm, errors="coerce").mean() > base.precipitation_mm.mean()
    # the winter lapse rate is weaker than the summer one (invented valley inversions)
    d = pd.to_datetime(base.date)
    dz = table.elevation_m.iloc[1] - table.elevation_m.iloc[0]
    jan = (d.dt.month == 1).to_numpy() & t_hut.notna().to_numpy()
    jul = (d.dt.month == 7).to_numpy()
    lap_jan = (t_hut[jan] - base.temperature_c[jan]).mean() / dz
    lap_jul = (t_hut[jul] - base.temperature_c[jul]).mean() / dz
    assert -0.0055 < lap_jan < -0.0040 and -0.0075 < lap_jul < -0.0062


def test_demo_climate_configs_load_and_prepare():
    for mode, kind in (("stations", "StationNetwork"), ("grid", "GriddedForcing")):
        cfg = firnline.load_config(REPO / "configs" / f"demo_{mode}.toml")
        assert cfg.climate.mode == mode
        from firnline.model import prepare
        setup = prepare(cfg)
        assert type(setup.forcing.cells_source).__name__ == kind
        assert list(setup.forcing.years) == list(range(2017, 2025))
