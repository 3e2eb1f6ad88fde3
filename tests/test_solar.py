"""Sun geometry, top-of-atmosphere radiation and the standard atmosphere against outside values."""

import numpy as np
import pandas as pd
import pvlib  # test-only dependency (pyproject [test])
import pytest

from firnline import solar

LATITUDES = np.arange(-70, 81, 10)
LONGITUDES = (-147.3, 8.6)
# a year of instants every 97 minutes, so the samples walk through every hour of the day
TIMES = pd.date_range("2023-01-01", "2024-01-01", freq="97min", tz="UTC")


def _angle_diff_deg(a, b):
    return np.abs((np.asarray(a) - np.asarray(b) + 180.0) % 360.0 - 180.0)


def test_zenith_and_azimuth_match_nrel_spa_over_a_year():
    # Source: pvlib.solarposition.get_solarposition (NREL SPA, Reda and Andreas, 2004,
    # Solar Energy 76(5)); "zenith" is its true (unrefracted) zenith.
    # Worst errors reached for zenith < 85 deg at latitudes -70..80 (issue 3 aims at 0.3 deg
    # zenith, 0.5 deg azimuth): zenith 0.018 deg; azimuth 0.16 deg with the sun more than
    # 5 deg from the zenith, 0.69 deg closer in, which is 0.015 deg as an angle on the sky.
    worst_zenith = worst_azimuth = worst_sky = 0.0
    for lat in LATITUDES:
        for lon in LONGITUDES:
            ref = pvlib.solarposition.get_solarposition(TIMES, lat, lon)
            zen, azi = solar.solar_position(TIMES, lat, lon)
            up = ref["zenith"].to_numpy() < 85.0
            z_ref = ref["zenith"].to_numpy()[up]
            d_zen = np.abs(zen[up] - z_ref)
            d_azi = _angle_diff_deg(azi[up], ref["azimuth"].to_numpy()[up])
            worst_zenith = max(worst_zenith, d_zen.max())
            # azimuth is ill-conditioned with the sun near the zenith: compare it there
            # as an angle on the sky (azimuth error times sin(zenith))
            off_zenith = z_ref > 5.0
            worst_azimuth = max(worst_azimuth, d_azi[off_zenith].max())
            worst_sky = max(worst_sky, (d_azi * np.sin(np.deg2rad(z_ref))).max())
    assert worst_zenith < 0.03
    assert worst_azimuth < 0.25
    assert worst_sky < 0.025


def test_equation_of_time_and_distance_match_nrel_spa():
    # Source: pvlib.solarposition.get_solarposition "equation_of_time" (minutes) and
    # pvlib.solarposition.nrel_earthsun_distance (AU), NREL SPA (Reda and Andreas, 2004).
    jd = solar.julian_day(TIMES)
    ref = pvlib.solarposition.get_solarposition(TIMES, 46.5, 8.6)
    assert np.abs(solar.equation_of_time_min(jd) - ref["equation_of_time"].to_numpy()).max() < 0.1
    r_au = pvlib.solarposition.nrel_earthsun_distance(TIMES).to_numpy()
    assert np.abs(solar.eccentricity_correction(jd) - 1.0 / r_au**2).max() < 3e-4


def test_declination_extremes_are_the_obliquity_near_the_solstices():
    # Source: obliquity of the ecliptic 23.44 degrees in the 2020s (Meeus, 1998, eq. 22.2;
    # from memory); solstices on 21 June and 21/22 December.
    jd = solar.julian_day(pd.date_range("2023-01-01", "2024-01-01", freq="6h"))
    dec = np.rad2deg(solar.declination_rad(jd))
    assert dec.max() == pytest.approx(23.44, abs=0.01)
    assert dec.min() == pytest.approx(-23.44, abs=0.01)
    seconds = int(round((jd[dec.argmax()] - solar.J2000) * 86400))
    summer = np.datetime64("2000-01-01T12:00") + np.timedelta64(seconds, "s")
    assert pd.Timestamp(summer).strftime("%m-%d") == "06-21"


def test_time_zone_aware_and_naive_times_agree():
    naive = pd.date_range("2023-03-01 06:00", periods=5, freq="3h")
    aware = naive.tz_localize("UTC").tz_convert("Europe/Zurich")
    z1, a1 = solar.solar_position(naive, 46.0, 8.0)
    z2, a2 = solar.solar_position(aware, 46.0, 8.0)
    np.testing.assert_allclose(z1, z2)
    np.testing.assert_allclose(a1, a2)


def test_position_broadcasts_over_places():
    t = np.array(["2023-06-21T12:00"], dtype="datetime64[s]")
    lats = np.array([[-30.0], [0.0], [45.0]])
    zen, azi = solar.solar_position(t, lats, np.zeros((3, 1)))
    assert zen.shape == (3, 1)
    # near noon in June the sun stands north of 30 S and of the equator, south of 45 N
    assert _angle_diff_deg(azi[0, 0], 0.0) < 5.0
    assert _angle_diff_deg(azi[1, 0], 0.0) < 5.0
    assert _angle_diff_deg(azi[2, 0], 180.0) < 5.0
    # noon zenith = |latitude - declination| (common practice)
    np.testing.assert_allclose(zen[:, 0], np.abs(lats[:, 0] - 23.44), atol=0.5)


def test_fao56_example_8():
    # Source: Allen et al. (1998), FAO Irrigation and Drainage Paper 56, Example 8:
    # 3 September (J = 246) at 20 deg S: dr = 0.985, declination = 0.120 rad,
    # sunset hour angle = 1.527 rad, Ra = 32.2 MJ m-2 d-1.
    dr, dec = solar.fao_day_parameters(246)
    assert dr == pytest.approx(0.985, abs=0.0005)
    assert dec == pytest.approx(0.120, abs=0.0005)
    assert solar.fao_sunset_hour_angle_rad(np.deg2rad(-20.0), dec) == pytest.approx(1.527, abs=0.0005)
    assert solar.toa_daily_horizontal_mj(-20.0, dec, dr) == pytest.approx(32.2, abs=0.05)


def test_fao56_polar_night_and_day():
    # Source: FAO-56 Eq. 21 and 25 (Allen et al., 1998): no sun in polar night; in polar
    # day (sunset hour angle pi) Ra = 24*60/pi * Gsc * dr * pi sin(phi) sin(delta).
    dr, dec = solar.fao_day_parameters(np.array([355, 172]))
    ra = solar.toa_daily_horizontal_mj(80.0, dec, dr)
    assert ra[0] == 0.0
    expected = 24 * 60 * 0.0820 * dr[1] * np.sin(np.deg2rad(80.0)) * np.sin(dec[1])
    assert ra[1] == pytest.approx(expected, rel=1e-3)


def test_standard_pressure_iso_2533():
    # Source: ISO 2533:1975 standard atmosphere: 1013.25 hPa at sea level, 898.75 hPa at 1000 m;
    # pvlib.atmosphere.alt2pres gives 89874.8 Pa at 1000 m.
    assert solar.standard_pressure_pa(0.0) == pytest.approx(101325.0)
    assert solar.standard_pressure_pa(1000.0) / 100.0 == pytest.approx(898.75, abs=0.01)
    heights = np.array([0.0, 1000.0, 2500.0, 4000.0, 6000.0])
    np.testing.assert_allclose(solar.standard_pressure_pa(heights), pvlib.atmosphere.alt2pres(heights), rtol=1e-6)


def test_day_parameters_places_days_in_the_reference_year():
    # Source: the June solstice of 2022 fell on 21 June (day 172), common practice/almanac.
    dec, ecc = solar.day_parameters(np.arange(1, 367))
    assert np.argmax(dec) + 1 in (171, 172, 173)
    # perihelion in early January, aphelion in early July (common practice)
    assert np.argmax(ecc) + 1 <= 6 or np.argmax(ecc) + 1 >= 365
    assert 182 <= np.argmin(ecc) + 1 <= 190
