"""Sun geometry, top-of-atmosphere radiation and the standard atmosphere.

Pure functions over numpy arrays; nothing here reads or writes files.

Sun position follows the low-accuracy solar coordinates of Meeus (1998),
*Astronomical Algorithms*, 2nd ed., Willmann-Bell, ch. 25 (geometric mean
longitude and anomaly, equation of centre, apparent longitude, obliquity of the
ecliptic) and the equation of time of Smart (1956) as given by Meeus (1998)
eq. 28.3. Over 1950-2050 the declination is good to about 0.01 degree and the
equation of time to a few seconds, so zenith and azimuth come out within a few
hundredths of a degree of the NREL Solar Position Algorithm (Reda and Andreas,
2004, Solar Energy 76(5), 577-589). Terrestrial time is taken equal to UT (the
difference, about 70 s, moves the sun by 0.0008 degree) and refraction and
parallax are left out: the zenith is the true geocentric one.

Angles: latitude positive north, longitude positive east, azimuth in degrees
clockwise from (true) north, zenith in degrees from the vertical.
"""

from __future__ import annotations

import numpy as np

#: Solar constant, W m-2 (Allen et al., 1998, FAO Irrigation and Drainage Paper 56; WMO).
SOLAR_CONSTANT_W_M2 = 1367.0

#: ISO 2533:1975 standard atmosphere (troposphere, below 11 km).
SEA_LEVEL_PRESSURE_PA = 101325.0
SEA_LEVEL_TEMPERATURE_K = 288.15
LAPSE_RATE_K_PER_M = 0.0065
GRAVITY_M_S2 = 9.80665
MOLAR_MASS_AIR_KG_MOL = 0.0289644
GAS_CONSTANT_J_MOL_K = 8.31447

#: Julian day of the J2000.0 epoch (2000-01-01 12:00 UT).
J2000 = 2451545.0

#: Julian day of 2022-01-01 00:00 UT: the reference year in which a day of
#: year 1..366 is placed by :func:`day_parameters`.
REFERENCE_YEAR_JD0 = 2459580.5

_NS_PER_DAY = 86400e9
_J2000_DATETIME = np.datetime64("2000-01-01T12:00:00", "ns")


def julian_day(times) -> np.ndarray:
    """Julian day (UT) of instants.

    Parameters
    ----------
    times : array-like of numpy.datetime64, or pandas.DatetimeIndex
        Instants in UTC. A time-zone-aware pandas index is converted to UTC;
        naive values are taken as UTC.

    Returns
    -------
    numpy.ndarray of float64
        Julian day, days (2451545.0 at 2000-01-01 12:00 UT).
    """
    if getattr(times, "tz", None) is not None:
        times = times.tz_convert("UTC").tz_localize(None)
    t = np.asarray(times, dtype="datetime64[ns]")
    return J2000 + (t - _J2000_DATETIME).astype(np.int64) / _NS_PER_DAY


def _orbit(jd):
    """Mean longitude, eccentricity, mean anomaly, apparent longitude, obliquity.

    Meeus (1998), Astronomical Algorithms, 2nd ed., eqs. 25.2-25.8 and 22.2
    (low-accuracy solar coordinates). All angles in radians.
    """
    jc = (np.asarray(jd, dtype=np.float64) - J2000) / 36525.0
    l0 = np.deg2rad(np.mod(280.46646 + jc * (36000.76983 + 0.0003032 * jc), 360.0))
    m = np.deg2rad(357.52911 + jc * (35999.05029 - 0.0001537 * jc))
    e = 0.016708634 - jc * (0.000042037 + 0.0000001267 * jc)
    c = np.deg2rad(
        np.sin(m) * (1.914602 - jc * (0.004817 + 0.000014 * jc))
        + np.sin(2.0 * m) * (0.019993 - 0.000101 * jc)
        + np.sin(3.0 * m) * 0.000289
    )
    omega = np.deg2rad(125.04 - 1934.136 * jc)
    apparent_longitude = l0 + c - np.deg2rad(0.00569 + 0.00478 * np.sin(omega))
    mean_obliquity = 23.0 + (26.0 + (21.448 - jc * (46.815 + jc * (0.00059 - 0.001813 * jc))) / 60.0) / 60.0
    obliquity = np.deg2rad(mean_obliquity + 0.00256 * np.cos(omega))
    true_anomaly = m + c
    return l0, e, m, apparent_longitude, obliquity, true_anomaly


def declination_rad(jd) -> np.ndarray:
    """Solar declination.

    Parameters
    ----------
    jd : array-like of float
        Julian day (UT), days.

    Returns
    -------
    numpy.ndarray
        Declination, radians: sin(delta) = sin(obliquity) sin(apparent longitude),
        Meeus (1998), Astronomical Algorithms, 2nd ed., eq. 25.7.
    """
    _, _, _, lam, eps, _ = _orbit(jd)
    return np.arcsin(np.sin(eps) * np.sin(lam))


def equation_of_time_min(jd) -> np.ndarray:
    """Equation of time (apparent minus mean solar time).

    Parameters
    ----------
    jd : array-like of float
        Julian day (UT), days.

    Returns
    -------
    numpy.ndarray
        Equation of time, minutes. Smart (1956), Text-Book on Spherical
        Astronomy, as given by Meeus (1998), Astronomical Algorithms, eq. 28.3.
    """
    l0, e, m, _, eps, _ = _orbit(jd)
    y = np.tan(eps / 2.0) ** 2
    eot_rad = (
        y * np.sin(2.0 * l0)
        - 2.0 * e * np.sin(m)
        + 4.0 * e * y * np.sin(m) * np.cos(2.0 * l0)
        - 0.5 * y * y * np.sin(4.0 * l0)
        - 1.25 * e * e * np.sin(2.0 * m)
    )
    return 4.0 * np.rad2deg(eot_rad)


def eccentricity_correction(jd) -> np.ndarray:
    """Eccentricity correction factor (Rm/R)^2 of the Earth's orbit.

    Parameters
    ----------
    jd : array-like of float
        Julian day (UT), days.

    Returns
    -------
    numpy.ndarray
        (Rm/R)^2, dimensionless, with R the Sun-Earth distance from the
        ellipse R = a (1 - e^2) / (1 + e cos v), a = 1.000001018 AU
        (Meeus, 1998, Astronomical Algorithms, eq. 25.5), and Rm = 1 AU.
    """
    _, e, _, _, _, v = _orbit(jd)
    r_au = 1.000001018 * (1.0 - e * e) / (1.0 + e * np.cos(v))
    return 1.0 / (r_au * r_au)


def hour_angle_rad(jd, lon_deg, equation_of_time_min) -> np.ndarray:
    """Hour angle of the sun (negative in the morning, zero at apparent noon).

    Parameters
    ----------
    jd : array-like of float
        Julian day (UT), days.
    lon_deg : array-like of float
        Longitude, degrees east.
    equation_of_time_min : array-like of float
        Equation of time, minutes (:func:`equation_of_time_min`).

    Returns
    -------
    numpy.ndarray
        Hour angle, radians in [-pi, pi): apparent solar time = UT + 4 lon
        + EoT (minutes), hour angle = 15 degrees per hour from noon
        (Meeus, 1998; e.g. Iqbal, 1983, An Introduction to Solar Radiation, ch. 1).
    """
    ut_min = np.mod(np.asarray(jd, dtype=np.float64) - 0.5, 1.0) * 1440.0
    solar_min = ut_min + 4.0 * np.asarray(lon_deg, dtype=np.float64) + equation_of_time_min
    h_deg = np.mod(solar_min / 4.0, 360.0) - 180.0
    return np.deg2rad(h_deg)


def zenith_azimuth_deg(lat_deg, declination_rad, hour_angle_rad):
    """Solar zenith and azimuth from latitude, declination and hour angle.

    Parameters
    ----------
    lat_deg : array-like of float
        Latitude, degrees north.
    declination_rad : array-like of float
        Solar declination, radians.
    hour_angle_rad : array-like of float
        Hour angle, radians (negative before apparent noon).

    Returns
    -------
    zenith_deg, azimuth_deg : numpy.ndarray
        Zenith angle, degrees from the vertical (no refraction), and azimuth,
        degrees clockwise from north in [0, 360). From the direction cosines
        cos Z = sin(phi) sin(delta) + cos(phi) cos(delta) cos(h),
        east = -cos(delta) sin(h),
        north = cos(phi) sin(delta) - sin(phi) cos(delta) cos(h)
        (spherical astronomy, e.g. Iqbal, 1983, An Introduction to Solar
        Radiation, Academic Press, ch. 1).
    """
    east, north, up = sun_vector(lat_deg, declination_rad, hour_angle_rad)
    zenith = np.rad2deg(np.arccos(np.clip(up, -1.0, 1.0)))
    azimuth = np.mod(np.rad2deg(np.arctan2(east, north)), 360.0)
    return zenith, azimuth


def sun_vector(lat_deg, declination_rad, hour_angle_rad):
    """Unit vector towards the sun in local east, north, up coordinates.

    Parameters
    ----------
    lat_deg : array-like of float
        Latitude, degrees north.
    declination_rad, hour_angle_rad : array-like of float
        Declination and hour angle, radians.

    Returns
    -------
    east, north, up : numpy.ndarray
        Direction cosines, dimensionless (see :func:`zenith_azimuth_deg`).
    """
    phi = np.deg2rad(np.asarray(lat_deg, dtype=np.float64))
    dec = np.asarray(declination_rad, dtype=np.float64)
    h = np.asarray(hour_angle_rad, dtype=np.float64)
    cos_dec_cos_h = np.cos(dec) * np.cos(h)
    east = -np.cos(dec) * np.sin(h)
    north = np.cos(phi) * np.sin(dec) - np.sin(phi) * cos_dec_cos_h
    up = np.sin(phi) * np.sin(dec) + np.cos(phi) * cos_dec_cos_h
    east, north, up = np.broadcast_arrays(east, north, up)
    return east, north, up


def solar_position(times, lat_deg, lon_deg):
    """True solar zenith and azimuth at instants and places.

    Parameters
    ----------
    times : array-like of numpy.datetime64 or pandas.DatetimeIndex
        Instants (UTC; see :func:`julian_day`).
    lat_deg, lon_deg : array-like of float
        Latitude (degrees north) and longitude (degrees east); broadcast
        against ``times``.

    Returns
    -------
    zenith_deg, azimuth_deg : numpy.ndarray
        Zenith (degrees, no refraction) and azimuth (degrees clockwise from
        north). Meeus (1998) solar coordinates, see the module docstring;
        within 0.02 degree of NREL SPA (Reda and Andreas, 2004) over
        latitudes -70..80 (tests/test_solar.py).
    """
    jd = julian_day(times)
    dec = declination_rad(jd)
    h = hour_angle_rad(jd, lon_deg, equation_of_time_min(jd))
    return zenith_azimuth_deg(lat_deg, dec, h)


def day_parameters(doy, lon_deg=0.0):
    """Declination and (Rm/R)^2 at local apparent noon of a day of year.

    The day of year is placed in the common year 2022 (day 1 = 1 January,
    day 365 = 31 December, day 366 = 1 January 2023, standing for 31 December
    of a leap year). 2022 lies mid-way in the leap cycle: for common years a
    day of year then matches the sun's position within a third of a day; in a
    leap year the days after 28 February are a day late (declination within
    0.4 degree).

    Parameters
    ----------
    doy : array-like of int or float
        Day of year, 1..366.
    lon_deg : float or array-like
        Longitude, degrees east; sets the UT instant of local noon.

    Returns
    -------
    declination_rad, eccentricity_correction : numpy.ndarray
        Declination (radians) and (Rm/R)^2 (dimensionless), Meeus (1998).
    """
    jd = REFERENCE_YEAR_JD0 + (np.asarray(doy, dtype=np.float64) - 1.0) + 0.5 - np.asarray(lon_deg) / 360.0
    return declination_rad(jd), eccentricity_correction(jd)


def fao_day_parameters(doy):
    """Inverse relative Earth-Sun distance and declination of FAO-56.

    Allen et al. (1998), FAO Irrigation and Drainage Paper 56, Eq. 23
    (dr = 1 + 0.033 cos(2 pi J / 365)) and Eq. 24 (declination
    0.409 sin(2 pi J / 365 - 1.39)). These are smooth approximations: the
    declination departs from the astronomical one (:func:`day_parameters`)
    by up to about 1 degree, which moves daily radiation by a few per cent at
    high latitudes.

    Parameters
    ----------
    doy : array-like of int
        Day of year J, 1..366.

    Returns
    -------
    eccentricity_correction, declination_rad : numpy.ndarray
        dr (dimensionless) and declination (radians).
    """
    j = np.asarray(doy, dtype=np.float64)
    dr = 1.0 + 0.033 * np.cos(2.0 * np.pi * j / 365.0)
    dec = 0.409 * np.sin(2.0 * np.pi * j / 365.0 - 1.39)
    return dr, dec


def toa_daily_horizontal_mj(lat_deg, declination_rad, eccentricity_correction) -> np.ndarray:
    """Extraterrestrial (top-of-atmosphere) daily radiation on a horizontal surface.

    Allen, R. G., Pereira, L. S., Raes, D. and Smith, M. (1998), Crop
    evapotranspiration, FAO Irrigation and Drainage Paper 56, Eq. 21:
    Ra = (24 * 60 / pi) Gsc dr (ws sin(phi) sin(delta) + cos(phi) cos(delta) sin(ws)),
    Gsc = 0.0820 MJ m-2 min-1, with the sunset hour angle ws of Eq. 25, whose
    argument is clipped to [-1, 1] so that polar night gives 0 and polar day
    a full turn. Eq. 21 is the exact 24-hour integral of Gsc dr cos(Z) for a
    declination held over the day.

    Parameters
    ----------
    lat_deg : array-like of float
        Latitude, degrees north.
    declination_rad : array-like of float
        Solar declination, radians (:func:`fao_day_parameters` for FAO's own,
        :func:`day_parameters` for the astronomical one).
    eccentricity_correction : array-like of float
        dr = (Rm/R)^2, dimensionless.

    Returns
    -------
    numpy.ndarray
        Ra, MJ m-2 d-1.
    """
    phi = np.deg2rad(np.asarray(lat_deg, dtype=np.float64))
    dec = np.asarray(declination_rad, dtype=np.float64)
    ws = fao_sunset_hour_angle_rad(phi, dec)
    gsc = SOLAR_CONSTANT_W_M2 * 60.0 / 1e6  # 0.0820 MJ m-2 min-1
    return (24.0 * 60.0 / np.pi) * gsc * np.asarray(eccentricity_correction) * (
        ws * np.sin(phi) * np.sin(dec) + np.cos(phi) * np.cos(dec) * np.sin(ws)
    )


def fao_sunset_hour_angle_rad(lat_rad, declination_rad) -> np.ndarray:
    """Sunset hour angle, FAO-56 Eq. 25 (Allen et al., 1998): arccos(-tan(phi) tan(delta)).

    Parameters
    ----------
    lat_rad, declination_rad : array-like of float
        Latitude and declination, radians.

    Returns
    -------
    numpy.ndarray
        Sunset hour angle, radians in [0, pi] (argument clipped to [-1, 1]).
    """
    return np.arccos(np.clip(-np.tan(lat_rad) * np.tan(declination_rad), -1.0, 1.0))


def standard_pressure_pa(elevation_m) -> np.ndarray:
    """Air pressure of the standard atmosphere at an elevation.

    Barometric formula of the ISO 2533:1975 / ICAO standard atmosphere for
    the troposphere: P = P0 (1 - L z / T0) ^ (g M / (R L)), with
    P0 = 101325 Pa, T0 = 288.15 K, L = 0.0065 K m-1, g = 9.80665 m s-2,
    M = 0.0289644 kg mol-1, R = 8.31447 J mol-1 K-1.

    Parameters
    ----------
    elevation_m : array-like of float
        Elevation above sea level, m (valid below 11 000 m).

    Returns
    -------
    numpy.ndarray
        Pressure, Pa.
    """
    z = np.asarray(elevation_m, dtype=np.float64)
    exponent = GRAVITY_M_S2 * MOLAR_MASS_AIR_KG_MOL / (GAS_CONSTANT_J_MOL_K * LAPSE_RATE_K_PER_M)
    return SEA_LEVEL_PRESSURE_PA * (1.0 - LAPSE_RATE_K_PER_M * z / SEA_LEVEL_TEMPERATURE_K) ** exponent
