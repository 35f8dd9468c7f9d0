"""Viewing and solar geometry of a pixel: solar zenith angle from time and position, and the
zenith angle of a geostationary satellite seen from a pixel.

Numpy only, broadcasting over any array shape; angles in degrees.

Solar position: the low-precision formulas of the Astronomical Almanac (U.S. Naval
Observatory), as written out by Michalsky (1988, Solar Energy 40, 227–235): the Sun's mean
longitude and anomaly, its ecliptic longitude and the obliquity give right ascension and
declination; the Greenwich mean sidereal time and the pixel's longitude give the hour angle.
Stated accuracy about 0.01° in 1950–2050; no refraction (a screening's day/night split at
about 90° does not need it).

Geostationary viewing: a spherical Earth of the equatorial radius and the satellite on the
equator at the geostationary orbit radius; the zenith angle follows from the great-circle
angle γ between pixel and sub-satellite point by plane trigonometry in the triangle Earth
centre – pixel – satellite (common practice).
"""
import numpy as np

#: Julian date of 2000-01-01 12:00 TT (J2000.0), taken as UTC here (64 s apart: 0.004° of Sun)
J2000 = 2451545.0
#: equatorial Earth radius [km] (WGS 84)
EARTH_RADIUS_KM = 6378.137
#: geostationary orbit radius from the Earth's centre [km] (common practice: 42 164 km)
GEOSTATIONARY_RADIUS_KM = 42164.0


def julian_date(time):
    """Julian date of UTC times (numpy datetime64 or anything ``np.datetime64`` takes)."""
    t = np.asarray(time, dtype="datetime64[ns]")
    seconds = (t - np.datetime64("2000-01-01T12:00:00", "ns")) / np.timedelta64(1, "s")
    return J2000 + seconds / 86400.0


def solar_zenith(time, lat, lon):
    """Solar zenith angle [degree] at UTC ``time`` (datetime64) and geodetic ``lat``, ``lon``
    [degree, east positive]; > 90 is night. Astronomical Almanac low-precision formulas
    (Michalsky 1988): see the module docstring."""
    n = julian_date(time) - J2000  # days from J2000.0
    mean_lon = np.mod(280.460 + 0.9856474 * n, 360.0)
    anomaly = np.deg2rad(np.mod(357.528 + 0.9856003 * n, 360.0))
    ecl_lon = np.deg2rad(mean_lon + 1.915 * np.sin(anomaly) + 0.020 * np.sin(2 * anomaly))
    obliquity = np.deg2rad(23.439 - 0.0000004 * n)
    ra = np.arctan2(np.cos(obliquity) * np.sin(ecl_lon), np.cos(ecl_lon))
    dec = np.arcsin(np.sin(obliquity) * np.sin(ecl_lon))
    # Greenwich mean sidereal time [h]: at 0 h UT of the day plus the UT hours in sidereal rate
    jd = julian_date(time)
    jd0 = np.floor(jd - 0.5) + 0.5  # the preceding midnight
    ut_hours = (jd - jd0) * 24.0
    gmst = np.mod(6.697375 + 0.0657098242 * (jd0 - J2000) + 1.0027379 * ut_hours, 24.0)
    hour_angle = np.deg2rad(gmst * 15.0 + lon) - ra  # lat/lon as given: numpy or dask arrays
    phi = np.deg2rad(lat)
    cos_z = np.sin(phi) * np.sin(dec) + np.cos(phi) * np.cos(dec) * np.cos(hour_angle)
    return np.rad2deg(np.arccos(np.clip(cos_z, -1.0, 1.0)))


def geostationary_zenith(lat, lon, sub_lon, orbit_radius=GEOSTATIONARY_RADIUS_KM, earth_radius=EARTH_RADIUS_KM):
    """Zenith angle [degree] of a geostationary satellite above longitude ``sub_lon`` [degree]
    seen from ``lat``, ``lon`` [degree]; NaN where the satellite is below the horizon.

    cos γ = cos φ cos(λ − λ_s) (great-circle angle to the sub-satellite point), slant range
    d = √(R² + r² − 2 R r cos γ), cos θ = (r cos γ − R) / d with R the Earth's and r the orbit
    radius [km] (a spherical Earth; common practice)."""
    phi = np.deg2rad(np.asarray(lat, float))
    dlon = np.deg2rad(np.asarray(lon, float) - float(sub_lon))
    cos_g = np.cos(phi) * np.cos(dlon)
    r, big_r = float(orbit_radius), float(earth_radius)
    d = np.sqrt(big_r ** 2 + r ** 2 - 2 * big_r * r * cos_g)
    cos_t = (r * cos_g - big_r) / d
    theta = np.rad2deg(np.arccos(np.clip(cos_t, -1.0, 1.0)))
    return np.where(cos_t > 0, theta, np.nan)
