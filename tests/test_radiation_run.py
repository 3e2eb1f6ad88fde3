"""The radiation-enhanced temperature-index method in the kernel and through the commands."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
import rasterio

from firnline.cli import main
from firnline.kernel import Method
from firnline.radiation import RadiationTable


def table(values_w_m2: np.ndarray) -> RadiationTable:
    """A table whose every day of year gives ``values_w_m2`` (n_cells,)."""
    nodes = np.array([1, 183, 366])
    v = np.repeat(np.asarray(values_w_m2, np.float32)[None, :], 3, axis=0)
    return RadiationTable(doy_nodes=nodes, values=v, scale_w_m2=1.0)


def annual(r):
    return (r.acc_winter + r.acc_summer - r.snow_melt_winter - r.snow_melt_summer
            - r.ice_melt_winter - r.ice_melt_summer)


def test_radiation_method_reduces_to_degree_day(builders):
    """With zero radiation factors and the melt factor equal to both degree-day factors,
    the radiation method (Hock 1999, J. Glaciology 45(149)) is the degree-day method."""
    z = np.linspace(2000, 3200, 61)
    rec = builders.constant_record(t=4.0)
    dd = builders.station_run(z, np.ones(61, bool), 2000.0, *rec, builders.kernel_params(ddf_snow=4.5, ddf_ice=4.5))
    rad = builders.station_run(z, np.ones(61, bool), 2000.0, *rec,
                     builders.kernel_params(ddf_snow=1.0, ddf_ice=9.0, melt_factor=4.5, radiation_factor_snow=0.0,
                            radiation_factor_ice=0.0, method=Method.RADIATION),
                     radiation=table(np.linspace(0, 400, 61)))
    np.testing.assert_array_equal(annual(dd), annual(rad))


def test_radiation_melt_by_hand(builders):
    """One day at T = 3 C on bare ice (no snow): melt = (MF + a_ice I) (T - 0) (Hock 1999)."""
    one = np.ones(1, int)
    I = np.array([0.0, 100.0, 250.0])
    p = builders.kernel_params(lapse_rate_k_per_m=(0.0,) * 12, melt_factor=1.8, radiation_factor_snow=0.01,
               radiation_factor_ice=0.02, method=Method.RADIATION)
    r = builders.station_run(np.full(3, 2000.0), np.ones(3, bool), 2000.0, np.array([3.0]), np.array([0.0]),
                   one, one, np.zeros(1, int), np.ones(1, bool), p, radiation=table(I))
    np.testing.assert_allclose(r.ice_melt_winter[0, 0], (1.8 + 0.02 * I) * 3.0, rtol=1e-6)


def test_node_weights_interpolate_between_nodes():
    t = RadiationTable(doy_nodes=np.array([1, 11, 366]), values=np.array([[0.0], [100.0], [0.0]], np.float32),
                       scale_w_m2=1.0)
    lo, hi, w = t.node_weights([1, 6, 11])
    i = ((1 - w) * t.values[lo, 0] + w * t.values[hi, 0])
    np.testing.assert_allclose(i, [0.0, 50.0, 100.0])
    np.testing.assert_allclose(t.subset([0]).values, t.values)


@pytest.fixture
def rad_case(plane_case):
    def build(**extra):
        sections = {"melt": {"method": "radiation"},
                    "radiation": {"time_step_minutes": 60, "horizon_sectors": 8, "horizon_distance_m": 2000.0}}
        for k, v in extra.items():
            sections.setdefault(k, {}).update(v)
        return plane_case(**sections)
    return build


def test_terrain_writes_radiation_climatology_and_reuses_the_cache(rad_case, tmp_path):
    cfg = rad_case(radiation={"write_horizons": True})
    out = tmp_path / "terrain"
    r1 = subprocess.run([sys.executable, "-m", "firnline", "terrain", str(cfg), "--out", str(out)],
                        capture_output=True, text=True)
    assert r1.returncode == 0, r1.stderr
    assert "computed the radiation climatology" in r1.stderr
    with rasterio.open(out / "radiation_monthly.tif") as m, rasterio.open(out / "radiation_annual.tif") as a:
        assert m.count == 12 and m.units[0] == "W m-2" and "June" in m.descriptions[5]
        monthly = m.read(masked=True)
        ann = a.read(1, masked=True)
    # the plane (45 deg) faces south at 46 N: June above December, annual mean between
    assert monthly[5].mean() > 1.5 * monthly[11].mean()
    assert monthly.min() >= 0 and monthly.max() < 1367.0          # below the solar constant (FAO-56)
    assert monthly[11].mean() < ann.mean() < monthly[5].mean()
    with rasterio.open(out / "horizon.tif") as h:
        assert h.count == 8
    r2 = subprocess.run([sys.executable, "-m", "firnline", "terrain", str(cfg), "--out", str(out)],
                        capture_output=True, text=True)
    assert r2.returncode == 0 and "reused the cached radiation climatology" in r2.stderr


def test_run_scenarios_and_calibration_inputs_with_the_radiation_method(rad_case, tmp_path):
    """A run with the radiation method melts more than one with its melt factor alone; the
    scenario sweep (cell subsets of the table) agrees with the run."""
    cfg = rad_case()
    assert main(["run", str(cfg), "--out", str(tmp_path / "r"), "--quiet"]) == 0
    cfg0 = rad_case(melt={"radiation_factor_snow": 0.0, "radiation_factor_ice": 0.0})
    assert main(["run", str(cfg0), "--out", str(tmp_path / "r0"), "--quiet"]) == 0
    s = pd.read_csv(tmp_path / "r" / "summary.csv")
    s0 = pd.read_csv(tmp_path / "r0" / "summary.csv")
    assert (s.annual_balance_mwe < s0.annual_balance_mwe).all()
    cfg = rad_case()
    assert main(["scenarios", str(cfg), "--warming", "0", "1", "--out", str(tmp_path / "s"), "--quiet"]) == 0
    sc = pd.read_csv(tmp_path / "s" / "scenarios.csv")
    ref = sc[(sc.warming_k == 0) & (sc.precip_change_pct == 0)]
    assert ref.mean_annual_balance_mwe.iloc[0] == pytest.approx(s.annual_balance_mwe.mean(), abs=1e-4)
