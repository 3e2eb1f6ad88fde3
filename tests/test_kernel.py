"""The degree-day kernel against cases worked out by hand, and its conservation laws."""

from __future__ import annotations

import numpy as np
import pytest

from firnline.metrics import band_profile, ela_from_profile, glacier_year

LAPSE = -0.0065  # K per m: ICAO Standard Atmosphere (Doc 7488) / ISO 2533:1975 tropospheric lapse rate


def hand_balance(z, t_st=5.0, z_st=2000.0, p=5.0, ddf_s=5.0, ddf_i=8.0, days=365, warming=0.0):
    """Annual balance (mm w.e.) worked out by hand for constant forcing, all precipitation snow.

    Each day the cell receives p of snow and has T = t_st + lapse (z - z_st) + warming.
    Where the daily snowfall outlasts the day's melt (p >= ddf_s * T+), snow piles up and
    the daily balance is p - ddf_s * T+. Where it does not, the day's snow melts, the
    degree-days left (T - p / ddf_s) melt ice at ddf_i, and the balance is
    -ddf_i * (T - p / ddf_s). Zero balance (the ELA) where T = p / ddf_s.
    """
    T = t_st + LAPSE * (z - z_st) + warming
    Tp = np.maximum(T, 0.0)
    daily = np.where(p >= ddf_s * Tp, p - ddf_s * Tp, -ddf_i * (T - p / ddf_s))
    return daily * days


def test_planar_glacier_matches_hand_calculation(builders):
    z = np.linspace(2000.0, 3000.0, 201)
    rec = builders.constant_record()
    res = builders.station_run(z, np.ones_like(z, bool), 2000.0, *rec, builders.kernel_params())
    annual = (res.acc_winter + res.acc_summer - res.snow_melt_winter - res.snow_melt_summer
              - res.ice_melt_winter - res.ice_melt_summer)[0, 0]
    np.testing.assert_allclose(annual, hand_balance(z), rtol=1e-5, atol=1e-2)


def test_planar_glacier_ela_and_aar_by_hand(builders):
    """Uniform area per metre of elevation: AAR = (z_max - ELA) / (z_max - z_min)."""
    z = np.linspace(2000.0, 3000.0, 1001)[:-1] + 0.5
    area = np.full_like(z, 100.0)
    rec = builders.constant_record()
    res = builders.station_run(z, np.ones_like(z, bool), 2000.0, *rec, builders.kernel_params())
    b = (res.acc_winter + res.acc_summer - res.snow_melt_winter - res.snow_melt_summer
         - res.ice_melt_winter - res.ice_melt_summer)[0, 0] / 1000.0
    m = glacier_year(z, area, b.astype(float), b.astype(float) * 0, b.astype(float), band_width_m=50.0)
    ela_hand = 2000.0 + (5.0 - 5.0 / 5.0) / -LAPSE          # T = p / ddf_s = 1 C
    assert m.ela_flag == "ok"
    assert abs(m.ela_m - ela_hand) < 2.0                    # 50 m bands, no band-centre bias (issue 11)
    aar_hand = (3000.0 - ela_hand) / 1000.0
    assert m.aar == pytest.approx(aar_hand, abs=2e-3)
    # ablation-area gradient: below the ELA the hand balance is linear in z with slope
    # ddf_i * ddf_s... per metre: d/dz[-ddf_i (T - p/ddf_s)] * days = -ddf_i * LAPSE * 365 mm per m
    grad_hand = -8.0 * LAPSE * 365 / 1000.0 * 100.0       # m w.e. per 100 m
    assert m.gradient_mwe_per_100m == pytest.approx(grad_hand, rel=0.02)


def test_ela_of_a_plane_cut_across_the_bands_is_the_closed_form():
    """A plane tilted along both axes (cell elevations spread continuously, not on the band
    grid) under the closed form of :func:`hand_balance`: the ELA lies where T = p / ddf_s,
    z* = z_st + (t_st - p / ddf_s) / |lapse| = 2615.4 m. Two straight balance lines meet there
    (slope ddf_i |lapse| 365 below, ddf_s |lapse| 365 above); interpolating 50 m band values
    across that kink put the ELA several metres too high, the hinge fit on the fine profile
    puts it within 2 m. The other hand-worked stations move z* with the station temperature."""
    from firnline.metrics import ela
    rows, cols = np.meshgrid(np.arange(120), np.arange(37), indexing="ij")
    z = (2000.0 + 8.3 * rows + 1.7 * cols).ravel()            # 2000..3057 m, 1e4 distinct values
    area = np.full_like(z, 2500.0)
    for t_st in (4.0, 5.0, 5.7, 6.3):
        z_star = 2000.0 + (t_st - 5.0 / 5.0) / -LAPSE
        b = hand_balance(z, t_st=t_st) / 1000.0
        e, flag = ela(z, b, area, 50.0)
        assert flag == "ok" and abs(e - z_star) < 2.0, (t_st, e, z_star)


def test_several_zero_crossings_keep_the_one_with_least_area_on_the_wrong_side():
    """Balance negative below 2300 m, positive 2300-2400 m, a negative dip 2400-2420 m, positive
    above, equal area per metre. Area on the wrong side (positive below plus negative above):
    2300 m: the dip, 20; 2400 m: the strip below, 100, plus the dip, 20; 2420 m: the strip,
    100. The least is 2300 m, the ELA (rule of the metrics module docstring)."""
    from firnline.metrics import ela
    z = np.arange(2000.0, 3000.0, 1.0) + 0.5
    b = np.where(z < 2300.0, (z - 2300.0) * 0.01, 0.3)
    b = np.where((z > 2400.0) & (z < 2420.0), -0.2, b)
    e, flag = ela(z, b, np.ones_like(z), 50.0)
    # the profile jumps at 2300 m (-0.005 to +0.3 m w.e.), so its crossing is only defined to the
    # internal 5 m band; the rule is what is tested: 2300 m, not 2400 or 2420 m
    assert flag == "ok" and abs(e - 2300.0) <= 5.0


def test_ela_shift_is_one_over_lapse_rate_per_kelvin(builders):
    """A uniform warming dT raises the T = p/ddf_s isotherm, hence the ELA, by dT / |lapse|."""
    z = np.linspace(2000.0, 3500.0, 1501)
    rec = builders.constant_record()
    res = builders.station_run(z, np.ones_like(z, bool), 2000.0, *rec, builders.kernel_params(),
                               warming_k=[0.0, 1.0, 2.0], precip_change_pct=[0.0, 0.0, 0.0])
    b = (res.acc_winter + res.acc_summer - res.snow_melt_winter - res.snow_melt_summer
         - res.ice_melt_winter - res.ice_melt_summer)[:, 0]
    elas = [ela_from_profile(band_profile(z, b[s] / 1000.0, np.ones_like(z), 50.0))[0] for s in range(3)]
    shift = 1.0 / -LAPSE
    assert elas[1] - elas[0] == pytest.approx(shift, abs=50.0)
    assert elas[2] - elas[0] == pytest.approx(2 * shift, abs=50.0)


def test_conservation_per_cell(builders):
    """acc - abl = annual, winter + summer = annual, and the snow carried over is accounted:
    SWE_end - SWE_start = acc - snow melt (mass conservation; common practice)."""
    rng = np.random.default_rng(3)
    n_days = 365 * 3
    T = 4 + 9 * np.sin(2 * np.pi * (np.arange(n_days) - 100) / 365) + rng.normal(0, 3, n_days)
    P = rng.gamma(0.6, 6.0, n_days)
    month = (np.arange(n_days) // 30.5 % 12 + 1).astype(int)
    doy = np.arange(n_days) % 365 + 1
    year = np.arange(n_days) // 365
    winter = (np.arange(n_days) % 365) < 212
    z = np.linspace(1500, 3500, 500)
    glacier = np.arange(500) % 3 != 0
    p = builders.kernel_params(precip_gradient_per_m=0.0004, snow_c=0.5, rain_c=2.5, ddf_snow=3.0, ddf_ice=6.0)
    r = builders.station_run(z, glacier, 1200.0, T, P, month, doy, year, winter, p)
    acc = r.acc_winter + r.acc_summer
    smelt = r.snow_melt_winter + r.snow_melt_summer
    imelt = r.ice_melt_winter + r.ice_melt_summer
    winter_b = r.acc_winter - r.snow_melt_winter - r.ice_melt_winter
    summer_b = r.acc_summer - r.snow_melt_summer - r.ice_melt_summer
    annual = acc - smelt - imelt
    np.testing.assert_allclose(winter_b + summer_b, annual, rtol=1e-5, atol=1e-3)
    swe_prev = np.concatenate([r.swe_initial[:, None, :], r.swe_end[:, :-1, :]], axis=1)
    np.testing.assert_allclose(r.swe_end - swe_prev, acc - smelt, rtol=1e-4, atol=5e-2)
    # ice-free ground never loses ice
    assert np.all(imelt[..., ~glacier] == 0)
    # some ice melt does happen on the glacier, and snow does carry over up high
    assert imelt[..., glacier].max() > 0 and r.swe_end[0, -1, -1] > r.swe_end[0, 0, -1]


def test_precipitation_and_snow_fraction_by_hand(builders):
    """P = P_st * factor * (1 + grad dz) * (1 + pct/100); snow fraction linear across the range."""
    z = np.array([1200.0, 2200.0])
    T = np.array([1.5])                 # halfway through [0.5, 2.5] at the station
    P = np.array([10.0])
    one = np.ones(1, int)
    p = builders.kernel_params(lapse_rate_k_per_m=(0.0,) * 12, precip_gradient_per_m=0.0003, precip_factor=1.2,
               snow_c=0.5, rain_c=2.5, threshold_c=5.0)
    r = builders.station_run(z, np.ones(2, bool), 1200.0, T, P, one, one, np.zeros(1, int), np.ones(1, bool), p,
                   precip_change_pct=[10.0])
    expect = 10.0 * 1.2 * np.array([1.0, 1.3]) * 1.1 * 0.5
    np.testing.assert_allclose(r.acc_winter[0, 0], expect, rtol=1e-6)


def test_snapshots_give_period_balances(builders):
    rec = builders.constant_record(t=3.0)
    z = np.linspace(2000, 3000, 11)
    r = builders.station_run(z, np.ones(11, bool), 2000.0, *rec, builders.kernel_params(), snapshot_days=[0, 100, 365])
    annual = (r.acc_winter + r.acc_summer - r.snow_melt_winter - r.snow_melt_summer
              - r.ice_melt_winter - r.ice_melt_summer)[0, 0]
    np.testing.assert_allclose(r.snapshots[2, 0] - r.snapshots[0, 0], annual, rtol=1e-5, atol=1e-2)
    np.testing.assert_allclose(r.snapshots[1, 0], hand_balance(z, t_st=3.0, days=100), rtol=1e-5, atol=1e-2)
