"""Runoff end to end, on the kernel's own daily output: the books of runoff.csv close against
water_budget.csv, the routed volume against the released volume and the storage left in the
reservoirs, and a catchment polygon weighs cells by their share inside it.

Rounding of the files: every float in the CSV tables is written with 6 significant digits
(firnline.outputs.write_csv), so a value read back is within 5e-6 of itself (relative). A sum of
n such values of one sign is then within 5e-6 of the true sum, and the annual value of
water_budget.csv is itself within 5e-6; the kernel stores per-column yearly sums in float32
(relative 6e-8 each). Hence the file comparisons below allow 1.1e-5 of the compared amount
(REL_FILES) and nothing absolute.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import shapely

import firnline
from firnline.kernel import Daily as KernelDaily
from firnline.runoff import CATCHMENT, DEFAULT_STORAGE_DAYS, RELEASED_TERMS, RESERVOIRS

REL_FILES = 1.1e-5
SECONDS_PER_DAY = 86400.0
X0, Y0, CELL = 600000.0, 5150000.0, 50.0        # the builders' DEM origin and cell size (EPSG:32632)


def annual_released(runoff_csv: pd.DataFrame) -> pd.Series:
    """Sums per region and balance year (1 October .. 30 September, labelled by the year it ends in)."""
    d = pd.to_datetime(runoff_csv.date)
    by = runoff_csv.assign(balance_year=d.dt.year + (d.dt.month >= 10))
    return by.groupby(["region", "balance_year"]).released_mm.sum()


def check_books(out, regions):
    """Annual sums of released_mm in runoff.csv against water_budget.csv's runoff_mm."""
    daily = pd.read_csv(out / "runoff.csv")
    budget = pd.read_csv(out / "water_budget.csv").set_index(["region", "balance_year"])
    sums = annual_released(daily)
    assert set(daily.region) == set(regions)
    for region in regions:
        years = budget.loc[region].index
        assert len(years) > 0
        for year in years:
            expected = budget.loc[(region, year), "runoff_mm"]
            assert expected > 0
            assert sums.loc[(region, year)] == pytest.approx(expected, rel=REL_FILES, abs=0), (region, year)


def test_demo_runoff_csv_closes_against_the_water_budget_every_year(demo_run):
    """runoff.csv of the demo: the released_mm of the catchment and of each glacier, summed over
    each balance year, is water_budget.csv's runoff_mm of that year (to the files' rounding)."""
    _, out = demo_run
    check_books(out, ["north_seldra", "kessel", "tarn", CATCHMENT])


# ----------------------------------------------------------------------------
# a small case with glacier, firn, snow and ice-free ground, so that all four reservoirs fill
# ----------------------------------------------------------------------------

def glacier_case(builders, folder, rows=24, glacier_rows=(6.5, 24), catchment=None, snow=None):
    """A plane 3400 .. 1800 m (rows x 4 cells of 50 m), seasonal station record 2016-2019, a
    glacier outline over rows glacier_rows[0] .. glacier_rows[1] (a half row at a fractional
    edge gives partly covered cells), and an optional catchment polygon over rows 0 .. catchment."""
    folder.mkdir(parents=True, exist_ok=True)
    z = 3400.0 - np.arange(rows) * (1600.0 / 23)          # row i at the same height whatever the rows
    builders.write_dem(folder / "dem.tif", np.repeat(z[:, None], 4, axis=1))
    builders.seasonal_station(folder / "station.csv")
    top, bottom = glacier_rows
    ice = shapely.box(X0 - 100.0, Y0 - bottom * CELL, X0 + 300.0, Y0 - top * CELL)
    builders.write_outlines(folder / "glaciers.gpkg", ["lower glacier"], [ice], "GPKG", crs="EPSG:32632")
    sec = builders.base_sections(1800.0)
    sec["glaciers"] = {"outlines": "glaciers.gpkg"}
    sec["snow"] = {"redistribution": "none", "refreezing": "cold-content", "firn_years": 2, "spinup_years": 1,
                   **(snow or {})}
    if catchment is not None:
        basin = shapely.box(X0 - 100.0, Y0 - catchment * CELL, X0 + 300.0, Y0 + 100.0)
        builders.write_outlines(folder / "basin.geojson", ["basin"], [basin], "GeoJSON", crs="EPSG:32632")
        sec["runoff"] = {"catchment": "basin.geojson"}
    return builders.write_config(folder / "case.toml", sec)


def reservoir_storage_closed_form(release_mm, k_days, storage0_mm=0.0):
    """Storage of a linear reservoir after n days of a release constant within each day.

    dS/dt = R - S/k (the linear reservoir S = k Q; Baker et al., 1982; Hock and Noetzli, 1997,
    Nordic Hydrology 28) has over a day the exact solution S_t = S_(t-1) a + R_t k (1 - a),
    a = exp(-1/k); unrolled over n days:

        S_n = S_0 a^n + k (1 - a) sum_t R_t a^(n - t)

    evaluated here as that explicit sum (not the recursion the code uses).
    """
    r = np.asarray(release_mm, dtype="float64")
    n = r.size
    a = math.exp(-1.0 / k_days)
    powers = a ** (n - 1 - np.arange(n, dtype="float64"))
    return storage0_mm * a ** n + k_days * (1.0 - a) * float(np.sum(r * powers))


def test_routed_volume_is_released_volume_minus_the_storage_left_closed_form(builders, tmp_path):
    """Over the record, for every region written to runoff.csv: sum of discharge x 86400 s =
    released volume + (storage at the start - storage at the end) of the four reservoirs, with
    both storages from the closed form of the linear reservoir (see
    reservoir_storage_closed_form) applied to the kernel's daily released water: at the start
    the reservoirs hold what the first 365 days routed from empty leave (firnline.runoff's
    spin-up of the reservoirs), at the end what the whole record leaves."""
    cfg = firnline.load_config(glacier_case(builders, tmp_path / "case"))
    result = firnline.run(cfg)
    out = tmp_path / "out"
    result.write(out)
    check_books(out, ["lower glacier", CATCHMENT])
    kres, series = result.kernel, result.runoff
    daily = pd.read_csv(out / "runoff.csv")
    k = [DEFAULT_STORAGE_DAYS[n] for n in RESERVOIRS]
    assert tuple(k) == series.storage_days
    for region in ("lower glacier", CATCHMENT):
        r = series.region(region)
        area = float(kres.region_area_m2[r])
        release = np.stack([kres.daily[0, :, r, int(KernelDaily[t])] for t in RELEASED_TERMS]) * 1e3 / area
        start = np.array([reservoir_storage_closed_form(release[i, :365], k[i]) for i in range(4)])
        end = np.array([reservoir_storage_closed_form(release[i], k[i], start[i]) for i in range(4)])
        assert np.allclose(series.storage_start_mm[r], start, rtol=1e-9, atol=1e-12)
        assert np.allclose(series.storage_end_mm[r], end, rtol=1e-9, atol=1e-12)
        rows = daily[daily.region == region]
        routed_m3 = float(rows.discharge_m3s.sum()) * SECONDS_PER_DAY
        released_m3 = float(rows.released_mm.sum()) * 1e-3 * area
        left_m3 = float(np.sum(end - start)) * 1e-3 * area
        assert routed_m3 == pytest.approx(released_m3 - left_m3, rel=REL_FILES, abs=0), region
    cat = series.region(CATCHMENT)
    assert np.all(series.mm["released_mm"][cat].sum() > 0)
    for i, name in enumerate(RESERVOIRS):      # the case fills every reservoir
        assert series.routed_mm[cat, i].sum() > 1.0, name


def test_catchment_polygon_over_half_the_dem_weighs_cells_by_their_share(builders, tmp_path):
    """A catchment polygon over the north 10.5 of 21 rows (rows 0-9 whole, the north half of
    row 10): the catchment's area is 10.5 rows of cells, and its daily volumes are those of
    the cropped DEM of rows 0-9 plus half of what row 10 adds (the run of rows 0-10), exactly,
    as cells are independent without snow redistribution and the routing is linear. The
    glacier covers rows 5-20, so the catchment holds ice-free ground and glacier."""
    rows, cut = 21, 10.5
    half = firnline.run(firnline.load_config(
        glacier_case(builders, tmp_path / "half", rows=rows, glacier_rows=(5, 21), catchment=cut)))
    out = tmp_path / "out"
    half.write(out)
    check_books(out, ["lower glacier", CATCHMENT])
    cell_area = CELL * CELL
    budget = pd.read_csv(out / "water_budget.csv")
    cat_budget = budget[budget.region == CATCHMENT]
    assert np.allclose(cat_budget.area_km2, cut * 4 * cell_area / 1e6, rtol=1e-5)
    s = half.runoff
    c = s.region(CATCHMENT)
    assert s.area_m2[c] == pytest.approx(cut * 4 * cell_area, rel=1e-12)
    assert half.setup.catchment_weight.reshape(rows, 4)[:, 0].tolist() == [1.0] * 10 + [0.5] + [0.0] * 10

    def volumes(n_rows):
        res = firnline.run(firnline.load_config(
            glacier_case(builders, tmp_path / f"rows{n_rows}", rows=n_rows, glacier_rows=(5, 21))))
        r = res.runoff
        i = r.region(CATCHMENT)
        assert r.area_m2[i] == pytest.approx(n_rows * 4 * cell_area, rel=1e-12)
        return res.kernel.daily[0, :, -1, :], r.discharge_m3s[i]

    v10, q10 = volumes(10)
    v11, q11 = volumes(11)
    v_half = half.kernel.daily[0, :, -1, :]
    expected = v10 + 0.5 * (v11 - v10)
    assert v_half.shape == expected.shape
    scale = np.abs(expected).max(axis=0)
    assert np.all(np.abs(v_half - expected) <= 1e-9 * np.maximum(scale, 1e-30))
    assert np.allclose(s.discharge_m3s[c], q10 + 0.5 * (q11 - q10), rtol=1e-9, atol=1e-15)
    assert expected[:, KernelDaily.RELEASED_GROUND].sum() > 0 and expected[:, KernelDaily.RELEASED_ICE].sum() > 0
    # the glacier region is the whole outline, inside the catchment or not
    g = s.region("lower glacier")
    assert s.area_m2[g] == pytest.approx(16 * 4 * cell_area, rel=1e-9)


# ----------------------------------------------------------------------------
# calibration to a gauge: the demo's true ice factor and ice storage constant come back
# ----------------------------------------------------------------------------

def test_calibration_to_discharge_and_balances_recovers_the_true_ice_factor_and_storage_constant(
        builders, tmp_path):
    """The glacier case made with the demo's "true" parameters (firnline.demo:
    DEMO_TRUE_FACTORS, ddf_ice 7.6 and ddf_snow 4.2 mm w.e. d-1 K-1; DEMO_TRUE_STORAGE_DAYS,
    storage_days_ice 0.3 d) gives a gauge record (the demo's lognormal 10 % noise, seeded, one
    day in fifty missing) and glacier-wide annual balances (noise at their stated 0.1 m w.e.).
    A fit of ddf_snow, ddf_ice and storage_days_ice from the defaults (3.0, 6.0, 0.5), each
    kind weighted by its stated error, finds ddf_ice and storage_days_ice within two standard
    errors of the truth. Two, not one: with noise the truth lies within one standard error of
    a fit only about 68 % of the time and within two about 95 % (normal errors; common
    practice), so a one-error criterion would be a coin toss on the seed, not a check."""
    from firnline import demo
    from firnline.calibrate import calibrate

    folder = tmp_path / "case"
    cfg_path = glacier_case(builders, folder)
    truth_values = {**demo.DEMO_TRUE_FACTORS, **demo.DEMO_TRUE_STORAGE_DAYS}
    truth = firnline.run(firnline.load_config(cfg_path).with_values(**truth_values))
    rng = np.random.default_rng(11)
    s = truth.runoff
    q = s.discharge_m3s[s.region(CATCHMENT)]
    sd = demo.DEMO_DISCHARGE_NOISE
    noisy = q * np.exp(sd * rng.normal(0.0, 1.0, q.size) - 0.5 * sd * sd)
    keep = rng.random(q.size) > demo.DEMO_DISCHARGE_MISSING
    dates = pd.to_datetime(s.dates)
    (folder / "discharge.csv").write_text("date,discharge_m3s\n" + "".join(
        f"{d:%Y-%m-%d},{v:.6g}\n" if k else f"{d:%Y-%m-%d},\n" for d, v, k in zip(dates, noisy, keep)))
    summ = truth.summary
    (folder / "glacier_balances.csv").write_text("glacier,start_date,end_date,balance_mwe,sigma_mwe\n" + "".join(
        f"{g},{y - 1}-10-01,{y}-09-30,{b + 0.1 * rng.normal():.3f},0.1\n"
        for g, y, b in zip(summ.glacier, summ.balance_year, summ.annual_balance_mwe)))
    sec = builders.base_sections(1800.0)
    sec["glaciers"] = {"outlines": "glaciers.gpkg"}
    sec["snow"] = {"redistribution": "none", "refreezing": "cold-content", "firn_years": 2, "spinup_years": 1}
    sec["observations"] = {"discharge": "discharge.csv", "glacier_balances": "glacier_balances.csv"}
    keys = ["ddf_snow_mm_per_day_k", "ddf_ice_mm_per_day_k", "storage_days_ice"]
    sec["calibration"] = {"parameters": keys, "discharge_sigma_pct": 100 * sd}
    res = calibrate(firnline.load_config(builders.write_config(folder / "fit.toml", sec)))
    for key in ("ddf_ice_mm_per_day_k", "storage_days_ice"):
        value, se, true = res.value[key], res.std_error[key], truth_values[key]
        assert abs(value - true) < 2 * se, (key, value, se, true)
        assert se < 0.1 * true, (key, se)                  # and the record does determine it
        start = {"ddf_ice_mm_per_day_k": 6.0, "storage_days_ice": 0.5}[key]
        assert abs(value - true) < 0.2 * abs(start - true), (key, value)
    js = res.to_json()
    assert js["discharge"]["days"] == int(keep.sum())
    assert js["discharge"]["fitted"]["nse"] > js["discharge"]["initial"]["nse"]
