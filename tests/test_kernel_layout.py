"""The chunked kernel against a frozen copy of the previous algorithm, its two forcing modes,
and monthly scenarios.

The reference below is the scalar kernel as it stood before the chunked rewrite (firnline
commit 2a35444, ``kernel._block``), re-expressed in numpy over cells and kept here frozen: the
rewritten kernel must reproduce it within 1e-6 relative on a case with real relief, both
melt methods and several scenarios (issue 10, item 3).
"""

from __future__ import annotations

import numpy as np
import pytest

from firnline import kernel as K
from firnline.kernel import Calendar, Cells, Flux, Method, Scenarios, Season, State, StationForcing, run_kernel
from firnline.radiation import RadiationTable


def reference(z, ice, z_station, T, P, month, doy, year, winter, p, warming_k, precip_scale,
              radiation=None, snapshot_days=()):
    """Frozen previous kernel: per-year sums (6, n_scen, n_years, n), snow at year ends, snapshots.

    ``warming_k`` and ``precip_scale`` are (n_scen, 12). Order of the six sums: snowfall,
    snow melt, ice melt in winter, then the same in summer (the old ``sums[s, 0..5, c]``).
    """
    ns, n = warming_k.shape[0], z.size
    n_years = int(year.max()) + 1
    dz = z - z_station
    orog = p.precip_factor * np.maximum(0.0, 1.0 + p.precip_gradient_per_m * dz)
    lapse = np.asarray(p.lapse_rate_k_per_m)
    span = p.rain_c - p.snow_c
    swe = np.zeros((ns, n))
    sums = np.zeros((6, ns, n_years, n))
    snow_end = np.zeros((ns, n_years, n))
    cum = np.zeros((ns, n))
    snaps = {0: cum.copy()}
    use_rad = p.code == Method.RADIATION
    if use_rad:
        lo, hi, wgt = radiation.node_weights(doy)
    for d in range(T.size):
        m = month[d] - 1
        t = T[d] + lapse[m] * dz + warming_k[:, m:m + 1]
        pr = P[d] * orog * precip_scale[:, m:m + 1]
        with np.errstate(divide="ignore", invalid="ignore"):
            snow = np.where(t <= p.snow_c, pr, np.where(t >= p.rain_c, 0.0, pr * (p.rain_c - t) / span))
        w = swe + snow
        if use_rad:
            s = radiation.scale_w_m2
            rad = ((1.0 - wgt[d]) * s) * radiation.values[lo[d]] + (wgt[d] * s) * radiation.values[hi[d]]
            fs = p.melt_factor + p.radiation_factor_snow * rad
            fi = p.melt_factor + p.radiation_factor_ice * rad
        else:
            fs, fi = p.ddf_snow, p.ddf_ice
        dd = t - p.threshold_c
        pot = fs * dd
        melting = t > p.threshold_c
        with np.errstate(divide="ignore", invalid="ignore"):
            smelt = np.where(melting & (w > 0), np.where(pot > w, w, pot), 0.0)
            left = np.where(melting, np.where(w <= 0, dd, np.where(pot > w, dd * (1.0 - w / pot), 0.0)), 0.0)
        imelt = np.where(ice, fi * left, 0.0)
        swe = w - smelt
        k = 0 if winter[d] else 3
        y = year[d]
        sums[k, :, y] += snow
        sums[k + 1, :, y] += smelt
        sums[k + 2, :, y] += imelt
        cum += snow - smelt - imelt
        snaps[d + 1] = cum.copy()
        if d == T.size - 1 or year[d + 1] != y:
            snow_end[:, y] = swe
    return sums, snow_end, np.stack([snaps[k] for k in snapshot_days])


def relief_case(n_cells=2 * K.CHUNK_CELLS + 37, n_years=3, seed=11):
    """A rough mountainside (1200-3900 m, neighbouring cells hundreds of metres apart), half
    glacier, under a seasonal station record with snow, rain, melt and dry days."""
    rng = np.random.default_rng(seed)
    walk = np.cumsum(rng.normal(0, 1, n_cells))
    walk = (walk - walk.min()) / (walk.max() - walk.min())
    z = np.clip(1200 + 2700 * walk + rng.normal(0, 150, n_cells), 1200, 3900)
    ice = rng.random(n_cells) < 0.5
    dates = np.arange("2015-10-01", f"{2015 + n_years}-10-01", dtype="datetime64[D]")
    n_days = dates.size
    month = dates.astype("datetime64[M]").astype(int) % 12 + 1
    doy = (dates - dates.astype("datetime64[Y]")).astype(int) + 1
    year = np.searchsorted(np.array([f"{2016 + i}-10-01" for i in range(n_years)], dtype="datetime64[D]"),
                           dates, side="right")
    winter = np.isin(month, [10, 11, 12, 1, 2, 3, 4])
    T = 4 + 10 * np.sin(2 * np.pi * (np.arange(n_days) - 200) / 365) + rng.normal(0, 3, n_days)  # July warmest
    P = rng.gamma(0.5, 8.0, n_days) * (rng.random(n_days) < 0.6)
    values = (rng.random((5, n_cells)) * 30000).astype(np.uint16)
    table = RadiationTable(doy_nodes=np.array([1, 80, 172, 264, 366]), values=values, scale_w_m2=0.01)
    return z, ice, T, P, month, doy, year, winter, table


PARAMS = dict(lapse_rate_k_per_m=tuple(np.linspace(-0.0045, -0.0072, 12)), precip_gradient_per_m=0.0004,
              precip_factor=1.15, snow_c=0.5, rain_c=2.5, threshold_c=0.0, ddf_snow=3.0, ddf_ice=6.0,
              melt_factor=1.8, radiation_factor_snow=0.0144, radiation_factor_ice=0.0192)

SCENARIOS = Scenarios(
    warming_k=np.array([[0.0] * 12, [1.5] * 12, [-1.0] * 12, [0, 0, 0.5, 1, 2, 3, 3, 2, 1, 0.5, 0, 0]]),
    precip_scale=np.array([[1.0] * 12, [1.1] * 12, [0.8] * 12, [1.2] * 6 + [0.9] * 6]))


@pytest.mark.parametrize("method", [Method.DEGREE_DAY, Method.RADIATION])
def test_chunked_kernel_equals_the_previous_kernel(builders, method, monkeypatch):
    """Equal within 1e-6 relative (values under 1e-3 mm: within 1e-9 mm) on every per-season
    sum, the snow at year ends and the cumulative snapshots; cells cross chunk and (with a
    small group size) parallel-call boundaries."""
    monkeypatch.setattr(K, "GROUP_CELLS", 300)
    z, ice, T, P, month, doy, year, winter, table = relief_case()
    p = builders.kernel_params(**PARAMS, method=method)
    snaps = [0, 45, 365, 366, 700, T.size]
    ref_sums, ref_snow, ref_snaps = reference(z, ice, 1200.0, T, P, month, doy, year, winter, p,
                                              SCENARIOS.warming_k, SCENARIOS.precip_scale, table, snaps)
    r = run_kernel(Cells(z, ice, table), Calendar(month, doy, year, winter), StationForcing(T, P, 1200.0),
                   p, SCENARIOS, snapshot_days=snaps)
    new = [r.acc_winter, r.snow_melt_winter, r.ice_melt_winter, r.acc_summer, r.snow_melt_summer,
           r.ice_melt_summer]
    for k in range(6):
        np.testing.assert_allclose(new[k], ref_sums[k], rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(r.snow_end, ref_snow, rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(r.snapshots, ref_snaps, rtol=1e-6, atol=1e-9)
    # the case exercises every branch of the old code: snow that outlasts the summer and snow
    # that is gone, melt of ice under snow-free days, rain-on-snow temperatures
    assert ref_sums[5].max() > 100 and (ref_snow[0, -1] == 0).any() and (ref_snow[0, -1] > 100).any()
    assert (ref_sums[5][0, -1, ice] == 0).any() and (ref_sums[5][0, -1, ice] > 0).any()
    assert np.all(r.ice_melt_summer[..., ~ice] == 0)


def test_results_are_named(builders):
    z, ice, T, P, month, doy, year, winter, _ = relief_case(n_cells=40, n_years=2)
    p = builders.kernel_params(**PARAMS)
    r = run_kernel(Cells(z, ice), Calendar(month, doy, year, winter), StationForcing(T, P, 1200.0), p)
    np.testing.assert_array_equal(r.season_sum(Flux.SNOWFALL, Season.WINTER), r.acc_winter)
    np.testing.assert_array_equal(r.season_sum(Flux.RAIN, Season.SUMMER), r.rain_summer)
    np.testing.assert_array_equal(r.year_sum(Flux.ICE_MELT), r.ice_melt_winter + r.ice_melt_summer)
    assert r.sums.shape == (len(Season), len(Flux), 1, 2, 40)
    assert r.state_final.shape == (len(State), 1, 40)
    np.testing.assert_array_equal(r.state_final[State.SNOW].astype("float32"), r.snow_end[:, -1, :])
    assert not r.state_final[[State.FIRN, State.LIQUID, State.COLD_CONTENT]].any()


def test_rain_plus_snowfall_is_the_cells_precipitation(builders):
    """Precipitation partition conserves mass: snowfall + rain = P_station * factor *
    (1 + gradient dz) * scale, summed over the year (common practice)."""
    z, ice, T, P, month, doy, year, winter, _ = relief_case(n_cells=60, n_years=1)
    p = builders.kernel_params(**PARAMS)
    scen = Scenarios.uniform([0.0, 2.0], [0.0, -25.0])
    r = run_kernel(Cells(z, ice), Calendar(month, doy, year, winter), StationForcing(T, P, 1200.0), p, scen)
    orog = 1.15 * np.maximum(0.0, 1.0 + 0.0004 * (z - 1200.0))
    total = P.sum() * orog * np.array([1.0, 0.75])[:, None]
    np.testing.assert_allclose((r.year_sum(Flux.SNOWFALL) + r.year_sum(Flux.RAIN))[:, 0], total, rtol=1e-6)
    assert r.year_sum(Flux.RAIN).min() > 0 and r.year_sum(Flux.SNOWFALL).min() > 0


class StationAtCells:
    """Cell-mode forcing built from a station record (what a gridded source would hand in)."""

    def __init__(self, z, z_station, T, P, month, p):
        self.dz = z - z_station
        self.orog = p.precip_factor * np.maximum(0.0, 1.0 + p.precip_gradient_per_m * self.dz)
        self.lapse = np.asarray(p.lapse_rate_k_per_m)[month - 1]
        self.T, self.P = T, P
        self.calls = []

    def block(self, a, b):
        self.calls.append((a, b))
        t = self.T[a:b, None] + self.lapse[a:b, None] * self.dz[None, :]
        p = self.P[a:b, None] * self.orog[None, :]
        return t.astype("float32"), p.astype("float32")


@pytest.mark.parametrize("method", [Method.DEGREE_DAY, Method.RADIATION])
def test_cell_mode_equals_station_mode(builders, method, monkeypatch):
    """Forcing handed in at the cells gives the station-mode result to float32 rounding of the
    forcing; the kernel pulls the days in order, one bounded block at a time, and the result
    does not depend on where the blocks cut the years (bit for bit)."""
    z, ice, T, P, month, doy, year, winter, table = relief_case(n_cells=K.CHUNK_CELLS + 5, n_years=2)
    p = builders.kernel_params(**PARAMS, method=method)
    cal = Calendar(month, doy, year, winter)
    station = run_kernel(Cells(z, ice, table), cal, StationForcing(T, P, 1200.0), p, SCENARIOS)
    src = StationAtCells(z, 1200.0, T, P, month, p)
    cell = run_kernel(Cells(z, ice, table), cal, src, p, SCENARIOS)
    for name in ("acc_winter", "acc_summer", "snow_melt_winter", "snow_melt_summer", "ice_melt_winter",
                 "ice_melt_summer", "rain_summer", "swe_end"):
        np.testing.assert_allclose(getattr(cell, name), getattr(station, name), rtol=2e-5, atol=2e-3)
    starts = [a for a, _ in src.calls]
    assert starts[0] == 0 and src.calls[-1][1] == T.size
    assert all(b0 == a1 for (_, b0), (a1, _) in zip(src.calls[:-1], src.calls[1:]))
    assert max(b - a for a, b in src.calls) <= K.CELL_BLOCK_DAYS < T.size
    monkeypatch.setattr(K, "CELL_BLOCK_DAYS", 7)
    src7 = StationAtCells(z, 1200.0, T, P, month, p)
    cell7 = run_kernel(Cells(z, ice, table), cal, src7, p, SCENARIOS, snapshot_days=[0, 30, 400])
    assert max(b - a for a, b in src7.calls) == 7
    np.testing.assert_array_equal(cell7.sums, cell.sums)
    np.testing.assert_array_equal(cell7.snow_end, cell.snow_end)


@pytest.mark.parametrize("mode", ["station", "cells"])
@pytest.mark.parametrize("edges", [[0, 1, 2, 3], [0, 2, 3]])
def test_blocks_of_years_equal_one_pass_over_the_record(builders, mode, edges):
    """run_kernel_years cut at balance-year edges (state, firn layers, cumulative balance and the
    chunks' work buffers carried from block to block) gives every per-year value, the daily sums,
    the storage at each block's start, the final state and the snapshots of one run_kernel call
    bit for bit, with refreezing and firn layers on."""
    z, ice, T, P, month, doy, year, winter, table = relief_case(n_cells=K.CHUNK_CELLS + 41, n_years=3)
    p = builders.kernel_params(**PARAMS, refreezing="cold-content", firn_years=2)
    cal = Calendar(month, doy, year, winter)
    cells = Cells(z, ice, table, region=(np.arange(z.size) % 3 == 0).astype(np.int32),
                  area_m2=np.full(z.size, 900.0), n_glaciers=1)

    def forcing():
        return StationForcing(T, P, 1200.0) if mode == "station" else StationAtCells(z, 1200.0, T, P, month, p)
    snaps = [0, 30, 400, T.size]
    one = run_kernel(cells, cal, forcing(), p, SCENARIOS, snapshot_days=snaps)
    blocks = list(K.run_kernel_years(cells, cal, forcing(), p, SCENARIOS, snapshot_days=snaps, year_edges=edges))
    assert [b.first_year for b in blocks] == edges[:-1]
    for name in ("sums", "snow_end", "firn_end", "storage_end"):
        axis = 3 if name == "sums" else 1
        np.testing.assert_array_equal(np.concatenate([getattr(b, name) for b in blocks], axis=axis),
                                      getattr(one, name), err_msg=name)
    assert one.sums[:, Flux.REFREEZING].max() > 0 and one.firn_end.max() > 0
    np.testing.assert_allclose(np.concatenate([b.daily for b in blocks], axis=1), one.daily, rtol=1e-12, atol=1e-9)
    for b in blocks:
        start = one.storage_start if b.first_year == 0 else one.storage_end[:, b.first_year - 1]
        np.testing.assert_array_equal(b.storage_start, start)
        np.testing.assert_array_equal(b.year_days, one.year_days[b.first_year:b.first_year + b.sums.shape[3]])
    np.testing.assert_array_equal(blocks[-1].state_final, one.state_final)
    np.testing.assert_array_equal(blocks[1].state_initial, blocks[0].state_final)
    np.testing.assert_array_equal(blocks[-1].snapshots, one.snapshots)
    assert all(b.snapshots is None for b in blocks[:-1])
    with pytest.raises(ValueError, match="year_edges"):
        next(K.run_kernel_years(cells, cal, forcing(), p, year_edges=[0, 2, 2, 3]))


def test_cell_mode_rejects_a_block_of_the_wrong_shape(builders):
    z, ice, _, _, month, doy, year, winter, _ = relief_case(n_cells=10, n_years=1)

    class Short:
        def block(self, a, b):
            return np.zeros((b - a, 9), "float32"), np.zeros((b - a, 9), "float32")
    with pytest.raises(ValueError, match="must return two"):
        run_kernel(Cells(z, ice), Calendar(month, doy, year, winter), Short(), builders.kernel_params(**PARAMS))


def test_twelve_equal_monthly_changes_are_the_uniform_change_bit_for_bit(builders):
    z, ice, T, P, month, doy, year, winter, _ = relief_case(n_cells=80, n_years=2)
    args = (Cells(z, ice), Calendar(month, doy, year, winter), StationForcing(T, P, 1200.0),
            builders.kernel_params(**PARAMS))
    uniform = run_kernel(*args, Scenarios.uniform([0.0, 1.3, 2.7], [0.0, 7.0, -12.5]))
    monthly = run_kernel(*args, Scenarios.monthly(np.repeat([[0.0], [1.3], [2.7]], 12, axis=1),
                                                  np.repeat([[0.0], [7.0], [-12.5]], 12, axis=1)))
    np.testing.assert_array_equal(monthly.sums, uniform.sums)
    np.testing.assert_array_equal(monthly.snow_end, uniform.snow_end)


def test_summer_only_warming_leaves_the_first_winter_unchanged(builders):
    """Warming in May..September only: the first winter (October..April) is the same bit for
    bit, the year melts more."""
    z, ice, T, P, month, doy, year, winter, _ = relief_case(n_cells=80, n_years=2)
    args = (Cells(z, ice), Calendar(month, doy, year, winter), StationForcing(T, P, 1200.0),
            builders.kernel_params(**PARAMS))
    warm = np.zeros((2, 12))
    warm[1, 4:9] = 2.0
    r = run_kernel(*args, Scenarios.monthly(warm, np.zeros((2, 12))))
    np.testing.assert_array_equal(r.sums[Season.WINTER, :, 1, 0], r.sums[Season.WINTER, :, 0, 0])
    melt = r.year_sum(Flux.SNOW_MELT) + r.year_sum(Flux.ICE_MELT)
    assert melt[1, 0].sum() > 1.05 * melt[0, 0].sum()


def test_scenarios_are_checked():
    with pytest.raises(ValueError, match="below -100"):
        Scenarios.uniform([0.0], [-101.0])
    with pytest.raises(ValueError, match="one value per scenario"):
        Scenarios.uniform([0.0, 1.0], [0.0])
    with pytest.raises(ValueError, match=r"\(n_scen, 12\)"):
        Scenarios(np.zeros((1, 11)), np.ones((1, 11)))


_OTHER_BUILD = """
import pickle, sys
import numba
features = numba.config.CPU_FEATURES       # numba's own, before firnline is imported
from firnline.kernel import run_kernel
args = pickle.load(open(sys.argv[1], "rb"))
r = run_kernel(*args, daily=True)
pickle.dump((numba.config.CPU_NAME, features == numba.config.CPU_FEATURES, r.sums, r.state_final, r.snow_end,
             r.daily), open(sys.argv[2], "wb"))
"""


def test_vector_width_leaves_the_results_unchanged(builders, tmp_path):
    """The kernel built for the baseline x86-64 CPU (``NUMBA_CPU_NAME=generic``: 128-bit vectors)
    gives this process's results (512-bit vectors on AVX-512 hosts, see firnline.jit) bit for
    bit; only the daily region sums, reassociated partial sums, may differ in their last bits.
    Also: a CPU the user names wins over firnline's choice."""
    import os
    import pickle
    import subprocess
    import sys

    z, ice, T, P, month, doy, year, winter, table = relief_case(n_cells=3 * K.CHUNK_CELLS + 17, n_years=2)
    p = builders.kernel_params(**PARAMS, method=Method.RADIATION)
    cells = Cells(z, ice, table, region=np.where(ice, 0, 1), catchment_weight=np.linspace(0.2, 1.0, z.size),
                  n_glaciers=1)
    args = (cells, Calendar(month, doy, year, winter),
            StationForcing(T, P, 1200.0), p, SCENARIOS)
    here = run_kernel(*args, daily=True)
    (tmp_path / "args.pkl").write_bytes(pickle.dumps(args))
    env = dict(os.environ, NUMBA_CPU_NAME="generic")
    subprocess.run([sys.executable, "-c", _OTHER_BUILD, str(tmp_path / "args.pkl"), str(tmp_path / "out.pkl")],
                   env=env, check=True)
    cpu, kept, sums, state, snow_end, daily = pickle.loads((tmp_path / "out.pkl").read_bytes())
    assert cpu == "generic" and kept          # firnline.jit left the user's choice alone
    np.testing.assert_array_equal(sums, here.sums)
    np.testing.assert_array_equal(state, here.state_final)
    np.testing.assert_array_equal(snow_end, here.snow_end)
    np.testing.assert_allclose(daily, here.daily, rtol=1e-12, atol=1e-9)
    assert here.daily.any() and here.sums.any()
