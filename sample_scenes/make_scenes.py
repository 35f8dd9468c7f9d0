"""Generate cloudsieve's invented sample scenes, their truth files and two small tables.

Run from the repository root::

    python sample_scenes/make_scenes.py            # write the files into sample_scenes/
    python sample_scenes/make_scenes.py --check    # also print sanity statistics
    python sample_scenes/make_scenes.py --out DIR  # write elsewhere (e.g. to compare runs)

Everything here is INVENTED: the seas, coasts, ice and place names of the scenario, the
weather and the "observations". Nothing comes from a real instrument or a real analysis.
See ``sample_scenes/README.md`` for the scenario, the file layout and the variables.

How a scene is made
-------------------
1. A TRUE state per pixel from seeded smooth random fields (``scipy.ndimage.gaussian_filter``
   of seeded white noise): skin and air temperature, column water vapour, surface pressure,
   surface type, emissivity per channel; viewing and solar geometry.
2. Clouds as invented structures (frontal band, cirrus streaks, fog, cumulus, ...), each
   with a cover fraction f in [0, 1] (smooth edges), a vertical 11 µm absorption optical
   depth, top and base pressure and phase. One cloud layer per pixel: where structures
   overlap, the one with the larger fraction wins (ties: the listed priority).
3. Radiances from the project's gas physics (``physics.atmosphere``, ``physics.absorption``,
   ``physics.clearsky.channel_planck``, ``physics.transfer``) on a finer grid than the
   screening uses (61 instead of 41 levels). The cloud is put INTO that layered solver: two
   levels of the column are moved onto the cloud top and base pressure and the cloud's
   optical depth is spread over the layers between them in proportion to their pressure
   thickness. This code path is independent of ``physics.cloud`` (the inversion under
   test). Water clouds at 3.9 µm get a smaller absorption optical depth and reflect the
   downwelling sky radiance (the night-time fog signature); see :func:`_solve_chunk`.
4. Partial cover mixes radiances, f·L_cloudy + (1 − f)·L_clear; Gaussian instrument noise
   is added to the brightness temperatures.
5. The scene file holds the observed brightness temperatures and a BACKGROUND state = TRUE
   state + smooth background errors; the truth file holds the true state and the clouds.

All random numbers come from ``numpy.random.default_rng([scene_seed, crc32(field_name)])``,
so the output is the same on every run (byte for byte, for the same library versions).
"""
import argparse
import os
import tomllib
import zlib
from pathlib import Path
from typing import NamedTuple

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import xarray as xr
from scipy import ndimage, special

from physics.absorption import channel_coefficients, layer_optical_depth
from physics.atmosphere import column_water_vapour, profile_from_surface
from physics.channels import default_channels
from physics.clearsky import channel_brightness_temperature, channel_planck, simulate_clear_sky
from physics.transfer import schwarzschild_upwelling

HERE = Path(__file__).resolve().parent
ABSORPTION_TABLE = HERE.parent / "physics" / "data" / "absorption.toml"

# ---------------------------------------------------------------------------------------
# Settings of the generator (all in one place)
# ---------------------------------------------------------------------------------------
#: Levels of the TRUE columns; the screening's default is 41, so the two grids differ.
TRUTH_LEVELS = 61
#: Model-top pressure of the true columns [hPa] (the same as the project default).
TOP_PRESSURE = 10.0
#: Pixels per radiative-transfer chunk.
CHUNK = 4096
#: Instrument noise, Gaussian, added to every brightness temperature [K] (NEΔT).
NOISE_K = 0.1
#: Background errors: rms of t_skin [K], of t_air [K], relative rms of tcwv [1], and the
#: Gaussian smoothing scale of the error fields [pixel].
BG_T_SKIN_RMS = 0.3
BG_T_AIR_RMS = 0.5
BG_TCWV_REL_RMS = 0.07
BG_ERROR_SCALE_PX = 20.0

CHANNEL_ORDER = ("3p9um", "8p6um", "11um", "12um")
SURFACE_CODES = {"sea": 0, "land": 1, "ice": 2}
#: Surface emissivity per channel (3.9, 8.6, 11, 12 µm). Approximate, from memory: typical
#: window values for sea water near nadir, for vegetated/soil land (lower, most of all at
#: 3.9 and 8.6 µm) and for snow-covered sea ice.
EMISSIVITY = {
    "sea": (0.975, 0.982, 0.990, 0.985),
    "land": (0.90, 0.93, 0.965, 0.97),
    "ice": (0.98, 0.98, 0.99, 0.985),
}
#: Amplitude (1 sigma) of the smooth land-emissivity variation per channel [1]; one
#: spatial pattern for all channels (drier, sparser land lower everywhere). Ours.
LAND_EMISSIVITY_SPREAD = (0.012, 0.015, 0.005, 0.004)

#: Water cloud at 3.9 µm: absorption optical depth as a fraction of the 11 µm one, and the
#: reflectivity of a thick water cloud for the downwelling sky radiance; the reflectivity
#: of a cloud of optical depth τ is R_MAX (1 − e^{−τ}). Approximate, from memory: small
#: droplets absorb less and scatter more at 3.9 µm than at 11 µm (common practice for the
#: night-time fog signature BT3.9 − BT11 < 0).
WATER_ABSORPTION_RATIO_3P9 = 0.6
WATER_REFLECTIVITY_MAX_3P9 = 0.15
#: Structures whose phase follows their top temperature are ice below this [K]
#: (≈ −20 °C; common practice, from memory).
ICE_TOP_TEMPERATURE = 253.15
#: Fraction of the saturated column that a column may hold (keeps background tcwv, which
#: carries up to ~+20 % error, below saturation of the background profile).
MAX_COLUMN_SATURATION = 0.8

#: Invented cloud-structure codes of the truth variable ``cloud_feature``.
FEATURES = ("none", "frontal_band", "cirrus_streak", "fog_low_stratus", "cumulus_field",
            "sea_stratocumulus", "polar_low_cloud", "polar_ice_cloud")
#: Phase codes: 1 water, 2 ice, 3 "from the top temperature" (resolved in the solver).
WATER, ICE, BY_TEMPERATURE = 1, 2, 3

EARTH_RADIUS_KM = 6371.0
#: Height of the notional satellite (a low polar orbit) [km]; sets the scan-angle to
#: zenith-angle geometry of the invented swath.
ORBIT_HEIGHT_KM = 820.0


# ---------------------------------------------------------------------------------------
# Random fields and small helpers
# ---------------------------------------------------------------------------------------
def field_rng(seed, name):
    """A generator of its own for one named field of one scene (stable when fields are added)."""
    return np.random.default_rng([seed, zlib.crc32(name.encode())])


def standardise(a):
    """Zero mean, unit standard deviation over the scene."""
    return (a - a.mean()) / a.std()


def smooth_field(seed, name, shape, sigma):
    """Standardised Gaussian-smoothed white noise; ``sigma`` [pixel] sets the feature size."""
    noise = field_rng(seed, name).standard_normal(shape)
    return standardise(ndimage.gaussian_filter(noise, sigma, mode="reflect"))


def streak_field(seed, name, shape, sigma_across, sigma_along, angle_deg):
    """Standardised elongated noise: streaks ``sigma_along`` long, turned by ``angle_deg``.

    The angle is counted anticlockwise from the +col axis as the image is shown with row 0
    at the top.
    """
    size = int(np.ceil(np.hypot(*shape))) + 8
    noise = field_rng(seed, name).standard_normal((size, size))
    streaks = ndimage.gaussian_filter(noise, (sigma_across, sigma_along), mode="wrap")
    turned = ndimage.rotate(streaks, angle_deg, reshape=False, order=1, mode="wrap")
    r0, c0 = (size - shape[0]) // 2, (size - shape[1]) // 2
    return standardise(turned[r0:r0 + shape[0], c0:c0 + shape[1]])


def to_range(z, lo, hi):
    """Map a standardised field onto [lo, hi] with a uniform distribution (normal CDF)."""
    return lo + (hi - lo) * special.ndtr(z)


def smoothstep(x):
    """0 below 0, 1 above 1, a smooth S in between (cover fraction at cloud edges)."""
    t = np.clip(x, 0.0, 1.0)
    return t * t * (3.0 - 2.0 * t)


def latlon_grid(shape, lat_north, lon_west, pixel_km):
    """Notional regular grid: row 0 at ``lat_north``, col 0 at ``lon_west``. [deg]"""
    rows, cols = np.mgrid[0:shape[0], 0:shape[1]].astype(float)
    lat = lat_north - rows * pixel_km / 111.2
    lon = lon_west + cols * pixel_km / (111.2 * np.cos(np.deg2rad(lat)))
    return lat, lon


def solar_zenith(lat, lon, declination, utc_hour):
    """Solar zenith angle from declination and hour angle (spherical astronomy). [deg]

    cos θ = sin φ sin δ + cos φ cos δ cos h, h = 15° (UTC − 12 h) + λ (no equation of time).
    """
    phi, dec = np.deg2rad(lat), np.deg2rad(declination)
    h = np.deg2rad(15.0 * (utc_hour - 12.0) + lon)
    cos_z = np.sin(phi) * np.sin(dec) + np.cos(phi) * np.cos(dec) * np.cos(h)
    return np.rad2deg(np.arccos(np.clip(cos_z, -1.0, 1.0)))


def swath_zenith(shape, zenith_min, zenith_max, tilt=0.12):
    """Viewing zenith angle across an invented scan swath, from ``zenith_min`` to ``zenith_max``. [deg]

    The scan angle grows linearly along the (slightly tilted) column direction; the zenith
    angle at the ground follows sin θ = (R + h)/R · sin(scan) for a spherical Earth.
    """
    rows, cols = np.mgrid[0:shape[0], 0:shape[1]].astype(float)
    s = cols + tilt * rows
    s = (s - s.min()) / (s.max() - s.min())
    k = (EARTH_RADIUS_KM + ORBIT_HEIGHT_KM) / EARTH_RADIUS_KM
    scan_lo, scan_hi = (np.arcsin(np.sin(np.deg2rad(z)) / k) for z in (zenith_min, zenith_max))
    return np.rad2deg(np.arcsin(k * np.sin(scan_lo + s * (scan_hi - scan_lo))))


def saturated_column(t_air, p_surf):
    """Column water vapour of the project's profile shape when saturated throughout. [kg m⁻²]"""
    prof = profile_from_surface(t_air, np.full_like(t_air, 1.0e3), p_surf, n_levels=TRUTH_LEVELS,
                                top_pressure=TOP_PRESSURE)
    return column_water_vapour(prof.pressure, prof.specific_humidity)


class Cloud(NamedTuple):
    """One invented cloud structure on the scene grid (all arrays (ny, nx))."""

    fraction: np.ndarray  # cover fraction [1]
    optical_depth: np.ndarray  # vertical 11 µm absorption optical depth [1]
    top_pressure: np.ndarray  # [hPa]
    base_pressure: np.ndarray  # [hPa]
    phase: np.ndarray  # WATER, ICE or BY_TEMPERATURE
    feature: int  # index into FEATURES


class Scene(NamedTuple):
    """TRUE state of an invented scene before the radiative transfer."""

    name: str
    title: str
    setting: str
    seed: int
    pixel_km: float
    channels: tuple
    lat: np.ndarray
    lon: np.ndarray
    sat_zenith: np.ndarray
    sol_zenith: np.ndarray
    surface: np.ndarray  # int8 codes
    t_skin: np.ndarray
    t_air: np.ndarray
    tcwv: np.ndarray
    p_surf: np.ndarray
    emissivity: np.ndarray  # (ny, nx, n_ch)
    clouds: tuple  # of Cloud, in priority order


def emissivity_field(seed, surface, channels):
    """True emissivity per pixel and channel: table values, with a smooth variation over land."""
    shape = surface.shape
    names = [n for n in SURFACE_CODES]
    idx = [CHANNEL_ORDER.index(c) for c in channels]
    table = np.array([[EMISSIVITY[n][i] for i in idx] for n in names])  # (n_surf, n_ch)
    emis = table[surface]
    land = surface == SURFACE_CODES["land"]
    if land.any():
        g = np.clip(smooth_field(seed, "land_emissivity", shape, 8.0), -2.5, 2.5)
        spread = np.array([LAND_EMISSIVITY_SPREAD[i] for i in idx])
        emis = np.where(land[..., None], emis + g[..., None] * spread, emis)
    return emis


def nominal_emissivity(surface, channels):
    """Table emissivity per surface type (what an analyst would assume). [1]"""
    idx = [CHANNEL_ORDER.index(c) for c in channels]
    names = list(SURFACE_CODES)
    table = np.array([[EMISSIVITY[n][i] for i in idx] for n in names])
    return table[surface]


def column_from_saturation(t_air, p_surf, saturation):
    """tcwv = saturation fraction × saturated column, capped at MAX_COLUMN_SATURATION. [kg m⁻²]"""
    return np.minimum(saturation, MAX_COLUMN_SATURATION) * saturated_column(t_air, p_surf)


# ---------------------------------------------------------------------------------------
# Scene 1: night_front — a night over the invented Ardelle Sea
# ---------------------------------------------------------------------------------------
def make_night_front():
    """Cold front over the Ardelle Sea at night, cirrus ahead of it, fog over the Miresk upwelling."""
    seed, shape, pixel_km = 1101, (300, 300), 2.0
    ny, nx = shape
    rows, cols = np.mgrid[0:ny, 0:nx].astype(float)
    lat, lon = latlon_grid(shape, lat_north=38.6, lon_west=-152.0, pixel_km=pixel_km)

    # front axis: a curved line from the south-west (row ~255, col 0) to the north-east
    u = cols / (nx - 1)
    axis_row = (ny - 1) * (0.85 - 0.72 * u + 0.06 * np.sin(2.2 * np.pi * u + 0.4))
    slope = (ny - 1) / (nx - 1) * (-0.72 + 0.06 * 2.2 * np.pi * np.cos(2.2 * np.pi * u + 0.4))
    across = (rows - axis_row) / np.sqrt(1.0 + slope**2)  # [px], > 0 in the warm sector (south-east)
    warm = special.ndtr(across / 30.0)

    # sea-surface temperature: cooler to the north, eddies, and the Miresk upwelling patch
    up_r, up_c = rows - 228.0, cols - 222.0
    ang = np.deg2rad(25.0)
    e1 = (up_r * np.cos(ang) + up_c * np.sin(ang)) / 34.0
    e2 = (-up_r * np.sin(ang) + up_c * np.cos(ang)) / 52.0
    upwelling = np.exp(-(e1**2 + e2**2) ** 1.3)
    eddies = smooth_field(seed, "sst_eddies", shape, 12.0)
    sst = 291.6 + 6.0 * rows / (ny - 1) + 0.5 * eddies + 1.0 * warm - 3.6 * upwelling
    surface = np.zeros(shape, dtype=np.int8)
    t_skin = sst
    # air - sea: slightly cold air behind the front, warm moist air over the cool patch
    air_sea = -0.35 + 0.55 * warm + 0.25 * smooth_field(seed, "air_sea", shape, 25.0)
    air_sea = np.clip(air_sea + 1.0 * upwelling, -0.5, 1.0)
    t_air = t_skin + air_sea
    p_surf = 1010.0 + 5.0 * smooth_field(seed, "p_surf", shape, 60.0) - 7.0 * np.exp(-((across + 15.0) / 90.0) ** 2)
    p_surf = np.clip(p_surf, 1000.0, 1020.0)
    # moist warm sector, dry cold sector; drier aloft over the upwelling (subsiding air)
    saturation = 0.33 + 0.42 * warm - 0.30 * upwelling + 0.04 * smooth_field(seed, "humidity", shape, 18.0)
    tcwv = np.clip(column_from_saturation(t_air, p_surf, saturation), 10.0, 50.0)

    sat_zenith = swath_zenith(shape, 5.0, 60.0)
    sol_zenith = solar_zenith(lat, lon, declination=-8.0, utc_hour=7.0)
    channels = CHANNEL_ORDER
    emissivity = emissivity_field(seed, surface, channels)

    # frontal band: thick, high, ice tops on the leading side; mid-level water tops trailing
    half_width = 34.0 + 8.0 * smooth_field(seed, "front_width", shape, 40.0)
    centre = across + 8.0
    edge_noise = 7.0 * smooth_field(seed, "front_edge", shape, 5.0)
    inside = half_width + edge_noise - np.abs(centre)
    f_front = smoothstep(inside / 10.0)
    x_band = np.clip(centre / half_width, -1.5, 1.5)  # −1 trailing (cold) edge, +1 leading edge
    mid = special.ndtr((-x_band - 0.25) / 0.2 + 0.9 * smooth_field(seed, "front_mid", shape, 10.0))
    p_high = to_range(smooth_field(seed, "front_top", shape, 15.0), 215.0, 330.0)
    p_mid = to_range(smooth_field(seed, "front_mid_top", shape, 12.0), 470.0, 620.0)
    p_top = (1.0 - mid) * p_high + mid * p_mid
    thickness = to_range(smooth_field(seed, "front_depth", shape, 20.0), 100.0, 300.0) * (1.0 - 0.4 * mid)
    p_base = np.minimum(p_top + thickness, p_surf - 60.0)
    tau_core = np.exp(to_range(smooth_field(seed, "front_tau", shape, 8.0), np.log(8.0), np.log(45.0)))
    tau = tau_core * (0.2 + 0.8 * smoothstep(inside / 25.0))
    front = Cloud(f_front, tau, p_top, p_base, np.full(shape, BY_TEMPERATURE), FEATURES.index("frontal_band"))

    # cirrus streaks, parallel to the band: most ahead of it, a few over the cold sector
    streaks = streak_field(seed, "cirrus_streaks", shape, 2.5, 22.0, angle_deg=35.0)
    envelope = np.exp(-((across - 85.0) / 45.0) ** 2) + 0.8 * np.exp(-((rows - 45.0) ** 2 + (cols - 55.0) ** 2) / 45.0**2)
    f_ci = smoothstep((streaks + 1.6 * envelope - 1.7) / 0.6)
    tau_ci = np.exp(to_range(0.7 * streaks + 0.7 * smooth_field(seed, "cirrus_tau", shape, 4.0),
                             np.log(0.1), np.log(3.0)))
    p_top_ci = to_range(smooth_field(seed, "cirrus_top", shape, 25.0), 200.0, 350.0)
    p_base_ci = p_top_ci + to_range(smooth_field(seed, "cirrus_depth", shape, 15.0), 40.0, 80.0)
    cirrus = Cloud(f_ci, tau_ci, p_top_ci, p_base_ci, np.full(shape, ICE), FEATURES.index("cirrus_streak"))

    # fog / low stratus on the cool upwelling patch
    fog_shape = upwelling + 0.22 * smooth_field(seed, "fog_edge", shape, 4.0)
    f_fog = smoothstep((fog_shape - 0.42) / 0.18)
    tau_fog = 2.0 + 18.0 * np.clip(upwelling**1.5 + 0.08 * smooth_field(seed, "fog_tau", shape, 5.0), 0.0, 1.0)
    top_depth = to_range(smooth_field(seed, "fog_top", shape, 10.0), 25.0, 50.0)
    p_top_fog = p_surf - top_depth
    p_base_fog = np.minimum(p_top_fog + to_range(smooth_field(seed, "fog_depth", shape, 10.0), 20.0, 40.0), p_surf)
    fog = Cloud(f_fog, tau_fog, p_top_fog, p_base_fog, np.full(shape, WATER), FEATURES.index("fog_low_stratus"))

    return Scene(
        "night_front",
        "Invented night scene: cold front, cirrus and upwelling fog over the Ardelle Sea",
        "The invented Ardelle Sea at night. A cold front crosses the scene from south-west to north-east; "
        "jet cirrus streaks run ahead of it; fog and low stratus lie over the cool upwelling water off "
        "the invented Cape Miresk (south-east of the scene centre).",
        seed, pixel_km, channels, lat, lon, sat_zenith, sol_zenith, surface, t_skin, t_air, tcwv, p_surf,
        emissivity, (front, cirrus, fog),
    )


# ---------------------------------------------------------------------------------------
# Scene 2: day_coast — a summer day on the invented Corvenna coast
# ---------------------------------------------------------------------------------------
def make_day_coast():
    """Warm land with cumulus fields, cirrus, and a sea with a few stratocumulus patches."""
    seed, shape, pixel_km = 2202, (300, 300), 1.0
    ny, nx = shape
    rows, cols = np.mgrid[0:ny, 0:nx].astype(float)
    lat, lon = latlon_grid(shape, lat_north=-28.5, lon_west=-101.0, pixel_km=pixel_km)

    coast_col = 118.0 + 20.0 * np.sin(2.0 * np.pi * rows / 230.0 + 0.7)
    land = (cols - coast_col + 9.0 * smooth_field(seed, "coast_wiggle", shape, 9.0)) > 0.0
    island = ((rows - 70.0) ** 2 / 11.0**2 + (cols - 48.0) ** 2 / 16.0**2 + 0.3 * smooth_field(seed, "isle", shape, 3.0)) < 1.0
    land |= island
    surface = np.where(land, SURFACE_CODES["land"], SURFACE_CODES["sea"]).astype(np.int8)
    inland = ndimage.distance_transform_edt(land) * pixel_km  # [km] from the sea
    offshore = ndimage.distance_transform_edt(~land) * pixel_km  # [km] from the land

    # Taskel Hills: terrain rises inland to ~1.4 km
    hills = special.ndtr((inland - 70.0) / 35.0) * to_range(smooth_field(seed, "hills", shape, 15.0), 0.55, 1.05)
    height_m = np.where(land, 1400.0 * np.clip(hills, 0.0, None) + 60.0 * special.ndtr(inland / 3.0 - 1.0), 0.0)
    p_msl = 1014.0 + 2.0 * smooth_field(seed, "p_msl", shape, 60.0)
    # hypsometric reduction with a scale height of R_d T / g ≈ 8.4 km at 288 K (approximate)
    p_surf = p_msl * np.exp(-height_m / 8400.0)

    sst = 294.0 + 1.2 * smooth_field(seed, "sst", shape, 30.0) - 0.8 * np.exp(-offshore / 12.0)
    t_air_land = 298.5 + 0.8 * smooth_field(seed, "t_air_land", shape, 25.0) - 0.0065 * height_m + 1.0 * special.ndtr(inland / 10.0 - 1.0)
    sea_air = sst + np.clip(0.25 + 0.35 * smooth_field(seed, "air_sea", shape, 25.0), -0.5, 1.0)
    # the air changes from its sea to its land value over a few km across the coast
    land_weight = np.clip(ndimage.gaussian_filter(land.astype(float), 3.0 / pixel_km, mode="nearest"), 0.0, 1.0)
    t_air = land_weight * t_air_land + (1.0 - land_weight) * sea_air
    # sunlit land: skin warmer than the air by 4–12 K (drier ground warmer)
    dryness = smooth_field(seed, "dryness", shape, 12.0)
    t_skin = np.where(land, t_air + to_range(dryness, 4.0, 12.0), sst)
    saturation = 0.58 - land_weight * (0.10 + 0.06 * dryness) + 0.04 * smooth_field(seed, "humidity", shape, 20.0)
    tcwv = column_from_saturation(t_air, p_surf, saturation)

    sat_zenith = swath_zenith(shape, 22.0, 46.0, tilt=-0.1)
    sol_zenith = solar_zenith(lat, lon, declination=-15.0, utc_hour=15.75)
    channels = ("11um", "12um")
    emissivity = emissivity_field(seed, surface, channels)

    # cumulus fields over land, none within ~12 km of the coast (sea breeze), denser in the hills
    density = special.ndtr(1.4 * smooth_field(seed, "cu_density", shape, 22.0) + 0.02 * (inland - 40.0))
    cells = smooth_field(seed, "cu_cells", shape, 1.4)
    threshold = 2.3 - 1.5 * density
    growth = cells - threshold
    allowed = smoothstep((inland - 12.0) / 6.0)
    f_cu = smoothstep(growth / 0.5) * allowed
    strength = np.clip(growth / 1.2, 0.0, 1.0)
    p_base_cu = p_surf - to_range(smooth_field(seed, "cu_base", shape, 30.0), 80.0, 110.0)
    p_top_cu = p_base_cu - (40.0 + 220.0 * strength)
    tau_cu = 2.0 + 28.0 * strength
    cumulus = Cloud(f_cu, tau_cu, p_top_cu, p_base_cu, np.full(shape, WATER), FEATURES.index("cumulus_field"))

    # cirrus streaks, most of them across the north of the scene
    streaks = streak_field(seed, "cirrus_streaks", shape, 3.0, 30.0, angle_deg=-20.0)
    envelope = np.exp(-((rows - 70.0) / 55.0) ** 2)
    f_ci = smoothstep((streaks + 1.5 * envelope - 1.9) / 0.6)
    tau_ci = np.exp(to_range(0.7 * streaks + 0.7 * smooth_field(seed, "cirrus_tau", shape, 4.0), np.log(0.1), np.log(3.0)))
    p_top_ci = to_range(smooth_field(seed, "cirrus_top", shape, 25.0), 200.0, 350.0)
    p_base_ci = p_top_ci + to_range(smooth_field(seed, "cirrus_depth", shape, 15.0), 40.0, 80.0)
    cirrus = Cloud(f_ci, tau_ci, p_top_ci, p_base_ci, np.full(shape, ICE), FEATURES.index("cirrus_streak"))

    # a few stratocumulus patches over the sea, away from the coast
    blobs = smooth_field(seed, "sc_blobs", shape, 11.0)
    f_sc = smoothstep((blobs - 1.45) / 0.35) * smoothstep((offshore - 8.0) / 6.0)
    p_top_sc = p_surf - to_range(smooth_field(seed, "sc_top", shape, 15.0), 110.0, 160.0)
    p_base_sc = p_top_sc + to_range(smooth_field(seed, "sc_depth", shape, 10.0), 30.0, 60.0)
    tau_sc = 3.0 + 12.0 * np.clip((blobs - 1.45) / 1.0, 0.0, 1.0)
    stratocu = Cloud(f_sc, tau_sc, p_top_sc, p_base_sc, np.full(shape, WATER), FEATURES.index("sea_stratocumulus"))

    return Scene(
        "day_coast",
        "Invented day scene: cumulus over the Corvenna coast and the Taskel Hills",
        "A summer morning on the invented Corvenna coast: sea to the west with the small invented Isle "
        "of Quennet, sunlit land to the east rising into the invented Taskel Hills, fair-weather cumulus "
        "fields inland, cirrus streaks (most in the north) and a few stratocumulus patches over the sea. "
        "Only the 11 and 12 µm channels (a daytime product without 3.9 µm).",
        seed, pixel_km, channels, lat, lon, sat_zenith, sol_zenith, surface, t_skin, t_air, tcwv, p_surf,
        emissivity, (cirrus, cumulus, stratocu),
    )


# ---------------------------------------------------------------------------------------
# Scene 3: polar_ice — polar night over the invented Kelvor ice pack
# ---------------------------------------------------------------------------------------
def make_polar_ice():
    """Dry cold polar night: pack ice with a lead, open sea in one corner, low and thin ice cloud."""
    seed, shape, pixel_km = 3303, (150, 150), 2.0
    ny, nx = shape
    rows, cols = np.mgrid[0:ny, 0:nx].astype(float)
    lat, lon = latlon_grid(shape, lat_north=79.0, lon_west=163.0, pixel_km=pixel_km)

    edge = 0.75 * rows / (ny - 1) + 0.55 * (1.0 - cols / (nx - 1)) + 0.06 * smooth_field(seed, "ice_edge", shape, 6.0)
    open_sea = edge > 0.98
    # a lead: a narrow wiggly crack of open water from the north-west to the south-east
    lead_axis = 22.0 + 0.72 * cols + 6.0 * np.sin(cols / 17.0)
    lead_width = 1.3 + 0.7 * smooth_field(seed, "lead_width", shape, 10.0)
    lead = (np.abs(rows - lead_axis) < lead_width) & (cols > 15.0) & (cols < 140.0)
    sea = open_sea | lead
    surface = np.where(sea, SURFACE_CODES["sea"], SURFACE_CODES["ice"]).astype(np.int8)
    sea_weight = ndimage.gaussian_filter(sea.astype(float), 6.0, mode="nearest")

    # over ice: a surface-based inversion, skin 2–7 K colder than the air
    t_air_ice = 257.0 + 2.5 * smooth_field(seed, "t_air", shape, 30.0)
    inversion = to_range(smooth_field(seed, "inversion", shape, 15.0), 2.0, 7.0)
    t_air_sea = 263.0 + 1.0 * smooth_field(seed, "t_air_sea", shape, 30.0)
    t_air = t_air_ice + np.clip(2.0 * sea_weight, 0.0, 1.0) * (t_air_sea - t_air_ice)
    # open water at about its freezing point (−1.8 °C for sea water)
    t_skin = np.where(sea, 271.35 + 0.3 * special.ndtr(smooth_field(seed, "sst", shape, 10.0)), t_air - inversion)
    p_surf = 1015.0 + 6.0 * smooth_field(seed, "p_surf", shape, 50.0)
    saturation = 0.62 + 0.08 * sea_weight + 0.05 * smooth_field(seed, "humidity", shape, 20.0)
    tcwv = np.clip(column_from_saturation(t_air, p_surf, saturation), 1.0, 5.0)

    sat_zenith = swath_zenith(shape, 34.0, 55.0, tilt=0.2)
    sol_zenith = solar_zenith(lat, lon, declination=-20.0, utc_hour=3.0)
    channels = CHANNEL_ORDER
    emissivity = emissivity_field(seed, surface, channels)

    # supercooled low cloud fed by the open water, drifting over the ice
    low_shape = smooth_field(seed, "low_cloud", shape, 7.0) + 1.4 * np.clip(2.0 * sea_weight, 0.0, 1.0)
    f_low = smoothstep((low_shape - 0.9) / 0.4)
    p_top_low = p_surf - to_range(smooth_field(seed, "low_top", shape, 12.0), 30.0, 80.0)
    p_base_low = np.minimum(p_top_low + to_range(smooth_field(seed, "low_depth", shape, 10.0), 20.0, 60.0), p_surf)
    tau_low = 2.0 + 13.0 * np.clip((low_shape - 0.9) / 1.5, 0.0, 1.0)
    low = Cloud(f_low, tau_low, p_top_low, p_base_low, np.full(shape, WATER), FEATURES.index("polar_low_cloud"))

    # thin ice cloud over the north-east
    ice_shape = smooth_field(seed, "ice_cloud", shape, 9.0) + 1.2 * np.exp(-((rows - 35.0) ** 2 + (cols - 110.0) ** 2) / 40.0**2)
    f_ice = smoothstep((ice_shape - 1.0) / 0.5)
    p_top_ice = to_range(smooth_field(seed, "ice_top", shape, 20.0), 400.0, 600.0)
    p_base_ice = p_top_ice + to_range(smooth_field(seed, "ice_depth", shape, 10.0), 50.0, 100.0)
    tau_ice = np.exp(to_range(smooth_field(seed, "ice_tau", shape, 5.0), np.log(0.2), np.log(2.0)))
    ice_cloud = Cloud(f_ice, tau_ice, p_top_ice, p_base_ice, np.full(shape, ICE), FEATURES.index("polar_ice_cloud"))

    return Scene(
        "polar_ice",
        "Invented polar-night scene over the Kelvor ice pack",
        "Polar night over the invented Kelvor ice pack: very dry and cold, a surface inversion over the "
        "ice (skin colder than the air), a lead of open water crossing the pack and the open invented "
        "Ostrel Sea in the south-west corner, supercooled low cloud fed by the open water and a thin ice "
        "cloud in the north-east.",
        seed, pixel_km, channels, lat, lon, sat_zenith, sol_zenith, surface, t_skin, t_air, tcwv, p_surf,
        emissivity, (ice_cloud, low),
    )


# ---------------------------------------------------------------------------------------
# One cloud layer per pixel
# ---------------------------------------------------------------------------------------
def combine_clouds(clouds, shape):
    """Per pixel the structure with the largest fraction (ties: earlier in ``clouds``).

    Returns a dict of (ny, nx) arrays: fraction, optical_depth, top_pressure, base_pressure,
    phase (WATER/ICE/BY_TEMPERATURE, 0 where clear), feature (index into FEATURES).
    """
    fractions = np.stack([np.clip(c.fraction, 0.0, 1.0) for c in clouds])
    # cover below 1 % is rounded away so that truth-clear pixels are exactly clear
    fractions = np.where(fractions < 0.01, 0.0, fractions)
    pick = np.argmax(fractions, axis=0)

    def take(attr):
        stack = np.stack([np.broadcast_to(getattr(c, attr), shape) for c in clouds])
        return np.take_along_axis(stack, pick[None], axis=0)[0]

    fraction = np.take_along_axis(fractions, pick[None], axis=0)[0]
    cloudy = fraction > 0.0
    feature = np.array([c.feature for c in clouds])[pick]
    return {
        "fraction": fraction,
        "optical_depth": np.where(cloudy, take("optical_depth"), 0.0),
        "top_pressure": np.where(cloudy, take("top_pressure"), np.nan),
        "base_pressure": np.where(cloudy, take("base_pressure"), np.nan),
        "phase": np.where(cloudy, take("phase"), 0).astype(np.int8),
        "feature": np.where(cloudy, feature, 0).astype(np.int8),
    }


# ---------------------------------------------------------------------------------------
# Radiative transfer of the true columns, clear and cloudy
# ---------------------------------------------------------------------------------------
def _interp_log_p(pressure, values, target):
    """Per-pixel linear interpolation in ln p along the level axis (levels surface first)."""
    n_lev = pressure.shape[1]
    j = np.clip(np.sum(pressure >= target[:, None], axis=1) - 1, 0, n_lev - 2)
    rows = np.arange(pressure.shape[0])
    p0, p1 = pressure[rows, j], pressure[rows, j + 1]
    w = np.log(p0 / target) / np.log(p0 / p1)
    return values[rows, j] + w * (values[rows, j + 1] - values[rows, j])


def place_cloud_levels(pressure, temperature, humidity, p_top, p_base):
    """Move two levels of each column onto the cloud top and base.

    The level nearest the base (level 0, the surface, stays where it is: a base within half
    a layer of the surface becomes the surface) and the nearest level above it that is
    closest to the top are moved; temperature and humidity there are interpolated in ln p
    from the unmoved column.

    Returns
    -------
    pressure, temperature, humidity : (n, n_lev) the modified columns
    k_top, k_base : (n,) level indices of cloud top and base
    p_base : (n,) cloud base actually used [hPa]
    """
    n, n_lev = pressure.shape
    rows = np.arange(n)
    k_base = np.argmin(np.abs(pressure[:, :-1] - p_base[:, None]), axis=1)
    k_top = np.argmin(np.abs(pressure[:, :-1] - p_top[:, None]), axis=1)
    k_top = np.maximum(k_top, k_base + 1)
    p_base_used = np.where(k_base == 0, pressure[:, 0], p_base)
    if np.any(p_top >= p_base_used - 1.0):
        raise ValueError("a cloud is thinner than 1 hPa or has its top below its base; check the scene's cloud fields")
    p, t, q = pressure.copy(), temperature.copy(), humidity.copy()
    for k, target in ((k_top, p_top), (k_base, p_base_used)):
        t[rows, k] = _interp_log_p(pressure, temperature, target)
        q[rows, k] = _interp_log_p(pressure, humidity, target)
        p[rows, k] = target
    if not np.all(np.diff(p, axis=1) < 0.0):
        raise ValueError("moving levels onto a cloud top and base broke the pressure order")
    return p, t, q, k_top, k_base, p_base_used


def _solve_chunk(t_skin, t_air, tcwv, p_surf, emissivity, sat_zenith, cloud, channels, coeffs):
    """Clear and cloudy top-of-atmosphere radiances of one chunk of true columns.

    Parameters are 1-D pixel arrays (emissivity (n, n_ch)); ``cloud`` holds 1-D arrays
    fraction, optical_depth, top_pressure, base_pressure, phase for the same pixels.

    Returns clear radiance (n, n_ch), cloudy radiance (n, n_ch; NaN where clear), the cloud
    top temperature [K], the resolved phase and the cloud base used [hPa].

    Notes
    -----
    Gas: profile → layer optical depths → Planck radiances of levels and skin →
    Schwarzschild solver (all from ``physics``). Cloud: its vertical optical depth τ_ch is
    spread over the layers between its (moved) base and top levels in proportion to their
    pressure thickness and added to the gas optical depth; the same solver gives L_cloudy.
    τ_ch = τ at 8.6, 11, 12 µm (grey) and at 3.9 µm for ice; 0.6 τ at 3.9 µm for water.
    A water cloud at 3.9 µm also reflects the downwelling sky radiance L↓ reaching its top,
    with reflectivity r = 0.15 (1 − e^{−τ}); r is taken out of the radiance leaving the cloud
    top (energy conservation, simply): with 𝒯 the slant transmittance from the cloud top to
    space and A the emission of the air above it,

        L = [(1 − r) L_up,top + r L↓_top] 𝒯 + A .

    L↓_top is the solver's downwelling at the surface of a column whose layers below the
    cloud top are made transparent (so only the air above the cloud contributes).
    """
    n = t_skin.size
    n_ch = len(channels)
    prof = profile_from_surface(t_air, tcwv, p_surf, n_levels=TRUTH_LEVELS, top_pressure=TOP_PRESSURE)
    p, t, q = (np.array(a) for a in prof)
    mu = np.cos(np.deg2rad(sat_zenith))
    b_skin = channel_planck(channels, t_skin)

    cloudy = np.flatnonzero(cloud["fraction"] > 0.0)
    top_temperature = np.full(n, np.nan)
    phase = np.zeros(n, dtype=np.int8)
    base_used = np.full(n, np.nan)
    if cloudy.size:
        pc, tc, qc, k_top, k_base, p_base_used = place_cloud_levels(
            p[cloudy], t[cloudy], q[cloudy], cloud["top_pressure"][cloudy], cloud["base_pressure"][cloudy])
        p[cloudy], t[cloudy], q[cloudy] = pc, tc, qc
        base_used[cloudy] = p_base_used
        rows_c = np.arange(cloudy.size)
        t_top = tc[rows_c, k_top]
        top_temperature[cloudy] = t_top
        ph = cloud["phase"][cloudy]
        ph = np.where(ph == BY_TEMPERATURE, np.where(t_top < ICE_TOP_TEMPERATURE, ICE, WATER), ph).astype(np.int8)
        phase[cloudy] = ph

    tau_gas = layer_optical_depth(p, t, q, coeffs)  # (n, n_lay, n_ch)
    b_levels = channel_planck(channels, t)  # (n, n_lev, n_ch)
    clear = schwarzschild_upwelling(tau_gas, b_levels, b_skin, emissivity, mu, levels=False).radiance
    cloudy_rad = np.full((n, n_ch), np.nan)
    if not cloudy.size:
        return clear, cloudy_rad, top_temperature, phase, base_used

    # the cloud's optical depth per layer and channel
    n_lay = TRUTH_LEVELS - 1
    layer = np.arange(n_lay)[None, :]
    inside = (layer >= k_base[:, None]) & (layer < k_top[:, None])
    dp = pc[:, :-1] - pc[:, 1:]
    share = np.where(inside, dp, 0.0) / (p_base_used - cloud["top_pressure"][cloudy])[:, None]
    names = [c.name for c in channels]
    factor = np.ones((cloudy.size, n_ch))
    water = ph == WATER
    if "3p9um" in names:
        i39 = names.index("3p9um")
        factor[water, i39] = WATER_ABSORPTION_RATIO_3P9
    tau_c = cloud["optical_depth"][cloudy]
    tau_cloud = share[:, :, None] * (tau_c[:, None] * factor)[:, None, :]
    tau_total = tau_gas[cloudy] + tau_cloud
    need_levels = "3p9um" in names and water.any()
    res = schwarzschild_upwelling(tau_total, b_levels[cloudy], b_skin[cloudy], emissivity[cloudy], mu[cloudy],
                                  levels=need_levels)
    rad = np.array(res.radiance)
    if need_levels:
        w = np.flatnonzero(water)
        k = k_top[w]
        trans_top = res.level_transmittance[w, k, i39]
        opaque_top = res.opaque_radiance[w, k, i39]
        above = opaque_top - b_levels[cloudy][w, k, i39] * trans_top  # emission of the air above
        up_top = (rad[w, i39] - above) / trans_top  # radiance leaving the cloud top upwards
        # downwelling at the cloud top: the same column with the layers below the top made transparent
        tau_above = np.where(layer >= k[:, None], tau_total[w][:, :, i39], 0.0)
        down_top = schwarzschild_upwelling(tau_above[:, :, None], b_levels[cloudy][w][:, :, [i39]],
                                           b_skin[cloudy][w][:, [i39]], emissivity[cloudy][w][:, [i39]],
                                           mu[cloudy][w], levels=False).downwelling[:, 0]
        r = WATER_REFLECTIVITY_MAX_3P9 * -np.expm1(-tau_c[w])
        rad[w, i39] = ((1.0 - r) * up_top + r * down_top) * trans_top + above
    cloudy_rad[cloudy] = rad
    return clear, cloudy_rad, top_temperature, phase, base_used


def simulate_observation(scene, layer):
    """Observed brightness temperatures of a scene and the resolved cloud truth.

    Returns bt (ny, nx, n_ch) with noise, bt_noise_free, cloud top temperature, phase and
    base pressure (ny, nx).
    """
    all_channels = default_channels()
    channels = [all_channels[c] for c in scene.channels]
    coeffs = channel_coefficients(channels, tomllib.loads(ABSORPTION_TABLE.read_text()))
    shape = scene.t_skin.shape
    n = scene.t_skin.size
    n_ch = len(channels)
    flat = {k: np.ascontiguousarray(getattr(scene, k), dtype=np.float64).reshape(n)
            for k in ("t_skin", "t_air", "tcwv", "p_surf", "sat_zenith")}
    emis = scene.emissivity.reshape(n, n_ch).astype(np.float64)
    cloud = {k: np.asarray(layer[k]).reshape(n) for k in ("fraction", "optical_depth", "top_pressure",
                                                          "base_pressure", "phase")}
    radiance = np.empty((n, n_ch))
    top_t = np.empty(n)
    phase = np.empty(n, dtype=np.int8)
    base = np.empty(n)
    for start in range(0, n, CHUNK):
        sl = slice(start, min(start + CHUNK, n))
        clear, cloudy, tt, ph, pb = _solve_chunk(
            flat["t_skin"][sl], flat["t_air"][sl], flat["tcwv"][sl], flat["p_surf"][sl], emis[sl],
            flat["sat_zenith"][sl], {k: v[sl] for k, v in cloud.items()}, channels, coeffs)
        f = cloud["fraction"][sl][:, None]
        radiance[sl] = np.where(f > 0.0, f * np.nan_to_num(cloudy) + (1.0 - f) * clear, clear)
        top_t[sl], phase[sl], base[sl] = tt, ph, pb
    bt_clean = channel_brightness_temperature(channels, radiance).reshape(shape + (n_ch,))
    noise = field_rng(scene.seed, "instrument_noise").standard_normal(shape + (n_ch,)) * NOISE_K
    return bt_clean + noise, bt_clean, top_t.reshape(shape), phase.reshape(shape), base.reshape(shape)


def background_state(scene):
    """TRUE state plus smooth background errors: t_skin, t_air, tcwv as the analyst gets them."""
    shape = scene.t_skin.shape
    e_skin = smooth_field(scene.seed, "bg_error_t_skin", shape, BG_ERROR_SCALE_PX)
    e_air = smooth_field(scene.seed, "bg_error_t_air", shape, BG_ERROR_SCALE_PX)
    e_wv = smooth_field(scene.seed, "bg_error_tcwv", shape, BG_ERROR_SCALE_PX)
    return (scene.t_skin + BG_T_SKIN_RMS * e_skin,
            scene.t_air + BG_T_AIR_RMS * e_air,
            scene.tcwv * (1.0 + BG_TCWV_REL_RMS * e_wv))


# ---------------------------------------------------------------------------------------
# Writing
# ---------------------------------------------------------------------------------------
COMPRESSION = {"zlib": True, "complevel": 5, "shuffle": True}
#: CF packing of temperatures: int16, 0.01 K steps around 250 K (covers −77…577 K)
PACKED_K = {"dtype": "int16", "scale_factor": 0.01, "add_offset": 250.0, "_FillValue": np.int16(-32768)}


def _packed_temperature(values):
    return np.round((values - 250.0) / 0.01) * 0.01 + 250.0


def _grid_coords(scene):
    ny, nx = scene.t_skin.shape
    return {
        "row": ("y", np.arange(ny, dtype=np.int32), {"long_name": "pixel row index (y), 0 at the north edge", "units": "1"}),
        "col": ("x", np.arange(nx, dtype=np.int32), {"long_name": "pixel column index (x), 0 at the west edge", "units": "1"}),
        "lat": (("y", "x"), np.round(scene.lat, 4).astype(np.float32),
                {"long_name": "latitude of the pixel centre (notional)", "standard_name": "latitude", "units": "degrees_north"}),
        "lon": (("y", "x"), np.round(scene.lon, 4).astype(np.float32),
                {"long_name": "longitude of the pixel centre (notional)", "standard_name": "longitude", "units": "degrees_east"}),
    }


def _float_var(values, decimals, long_name, units, standard_name=None):
    attrs = {"long_name": long_name, "units": units}
    if standard_name:
        attrs["standard_name"] = standard_name
    return (("y", "x"), np.round(values, decimals).astype(np.float32), attrs)


def _temperature_var(values, long_name, standard_name=None):
    attrs = {"long_name": long_name, "units": "K"}
    if standard_name:
        attrs["standard_name"] = standard_name
    return (("y", "x"), values.astype(np.float64), attrs)


def _encoding(ds):
    enc = {}
    for name, var in ds.variables.items():
        if name in ("row", "col"):
            enc[name] = {"dtype": "int32"}
        elif var.dtype == np.int8:
            enc[name] = dict(COMPRESSION, dtype="int8")
        elif var.dtype == np.float64:
            enc[name] = dict(COMPRESSION, **PACKED_K)
        else:
            enc[name] = dict(COMPRESSION, dtype="float32", _FillValue=np.float32(np.nan))
    return enc


def _global_attrs(scene, kind):
    return {
        "title": scene.title + (" (truth)" if kind == "truth" else ""),
        "scene_name": scene.name,
        "comment": ("INVENTED data for demonstration and testing: a made-up scenario with made-up place names, "
                    "simulated by cloudsieve's sample-scene generator. Not real observations. " + scene.setting),
        "source": "sample_scenes/make_scenes.py",
        "Conventions": "CF-1.10",
        "pixel_spacing_km": scene.pixel_km,
        "channels": " ".join(f"bt_{c}" for c in scene.channels),
        "random_seed": scene.seed,
    }


def scene_dataset(scene, bt, t_skin_bg, t_air_bg, tcwv_bg):
    """The analyst's file: observations plus the background state."""
    data = {}
    wavelengths = {"3p9um": "3.9", "8p6um": "8.6", "11um": "11", "12um": "12"}
    for i, c in enumerate(scene.channels):
        data[f"bt_{c}"] = _temperature_var(
            _packed_temperature(bt[..., i]), f"observed brightness temperature, {wavelengths[c]} µm window channel (simulated)")
    data["t_skin"] = _temperature_var(_packed_temperature(t_skin_bg), "background surface skin temperature",
                                      "surface_temperature")
    data["t_air"] = _temperature_var(_packed_temperature(t_air_bg), "background near-surface air temperature",
                                     "air_temperature")
    data["tcwv"] = _float_var(tcwv_bg, 2, "background total column water vapour", "kg m-2",
                              "atmosphere_mass_content_of_water_vapor")
    data["sat_zenith"] = _float_var(scene.sat_zenith, 2, "satellite (viewing) zenith angle", "degree",
                                    "sensor_zenith_angle")
    data["sol_zenith"] = _float_var(scene.sol_zenith, 2, "solar zenith angle", "degree", "solar_zenith_angle")
    data["p_surf"] = _float_var(scene.p_surf, 1, "surface pressure", "hPa", "surface_air_pressure")
    data["surface"] = (("y", "x"), scene.surface.astype(np.int8), {
        "long_name": "surface type", "units": "1",
        "flag_values": np.array([0, 1, 2], dtype=np.int8), "flag_meanings": "sea land ice"})
    ds = xr.Dataset(data, coords=_grid_coords(scene), attrs=_global_attrs(scene, "scene"))
    return ds


def truth_dataset(scene, layer, top_t, phase, base_used, bg_attrs):
    cloudy = layer["fraction"] > 0.0
    data = {
        "cloud_fraction": _float_var(layer["fraction"], 3, "cloud cover fraction of the pixel", "1"),
        "cloud_optical_depth": _float_var(layer["optical_depth"], 3,
                                          "vertical 11 um absorption optical depth of the cloud layer (0: no cloud)", "1"),
        "cloud_top_pressure": _float_var(layer["top_pressure"], 1, "cloud top pressure (NaN: no cloud)", "hPa"),
        "cloud_base_pressure": _float_var(np.where(cloudy, base_used, np.nan), 1,
                                          "cloud base pressure (NaN: no cloud)", "hPa"),
        "cloud_phase": (("y", "x"), np.where(cloudy, phase, 0).astype(np.int8), {
            "long_name": "thermodynamic phase of the cloud top", "units": "1",
            "flag_values": np.array([0, 1, 2], dtype=np.int8), "flag_meanings": "none water ice"}),
        "cloud_feature": (("y", "x"), layer["feature"].astype(np.int8), {
            "long_name": "invented cloud structure the pixel's cloud belongs to", "units": "1",
            "flag_values": np.arange(len(FEATURES), dtype=np.int8), "flag_meanings": " ".join(FEATURES)}),
        "cloud_top_temperature": _temperature_var(
            _packed_temperature(np.where(cloudy, top_t, np.nan)),
            "air temperature of the true column at the cloud top (NaN: no cloud)"),
        "t_skin_true": _temperature_var(_packed_temperature(scene.t_skin), "true surface skin temperature",
                                        "surface_temperature"),
        "t_air_true": _temperature_var(_packed_temperature(scene.t_air), "true near-surface air temperature",
                                       "air_temperature"),
        "tcwv_true": _float_var(scene.tcwv, 2, "true total column water vapour", "kg m-2",
                                "atmosphere_mass_content_of_water_vapor"),
    }
    for i, c in enumerate(scene.channels):
        data[f"emis_{c}_true"] = _float_var(scene.emissivity[..., i], 4, f"true surface emissivity, {c} channel", "1",
                                            "surface_longwave_emissivity")
    attrs = _global_attrs(scene, "truth")
    attrs.update(bg_attrs)
    return xr.Dataset(data, coords=_grid_coords(scene), attrs=attrs)


def generation_attrs():
    """Global attributes that record the noise and error magnitudes and the cloud model."""
    return {
        "instrument_noise_K": NOISE_K,
        "instrument_noise": "Gaussian, independent per pixel and channel, added to the brightness temperature",
        "background_error_t_skin_rms_K": BG_T_SKIN_RMS,
        "background_error_t_air_rms_K": BG_T_AIR_RMS,
        "background_error_tcwv_relative_rms": BG_TCWV_REL_RMS,
        "background_error_smoothing_px": BG_ERROR_SCALE_PX,
        "background_error_note": ("scene file t_skin, t_air, tcwv = truth + smooth Gaussian error fields "
                                  "(tcwv multiplicative); p_surf, surface, angles are exact"),
        "truth_levels": TRUTH_LEVELS,
        "cloud_model": ("single layer per pixel inside a layered Schwarzschild solver; grey at 8.6/11/12 um; "
                        f"water at 3.9 um: absorption x{WATER_ABSORPTION_RATIO_3P9}, reflectivity "
                        f"{WATER_REFLECTIVITY_MAX_3P9}(1-exp(-tau)) of the downwelling sky; ice at 3.9 um grey; "
                        "partial cover mixed in radiance"),
    }


def _replace_atomically(path, write):
    """Write through a temporary file in the same folder, then rename it over ``path``.

    Readers (tests, the dashboard) that have the old file open keep a complete file and
    never see a half-written one.
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}.partial")
    try:
        write(tmp)
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def write_netcdf(ds, path):
    _replace_atomically(path, lambda tmp: ds.to_netcdf(tmp, engine="netcdf4", format="NETCDF4",
                                                       encoding=_encoding(ds)))


def pixel_table(ds, rows=slice(None), cols=slice(None)):
    """One row per pixel with the decoded values of a scene file (row/col restart at 0)."""
    sub = ds.isel(y=rows, x=cols)
    ny, nx = sub.sizes["y"], sub.sizes["x"]
    rr, cc = np.mgrid[0:ny, 0:nx]
    names = {v: k for k, v in SURFACE_CODES.items()}
    columns = {"row": rr.ravel().astype(np.int32), "col": cc.ravel().astype(np.int32),
               "lat": np.round(sub["lat"].values.astype(np.float64), 4).ravel(),
               "lon": np.round(sub["lon"].values.astype(np.float64), 4).ravel()}
    decimals = {"t_skin": 2, "t_air": 2, "tcwv": 2, "sat_zenith": 2, "sol_zenith": 2, "p_surf": 1}
    for c in CHANNEL_ORDER:
        if f"bt_{c}" in sub:
            decimals[f"bt_{c}"] = 2
    order = [f"bt_{c}" for c in CHANNEL_ORDER if f"bt_{c}" in sub] + ["t_skin", "t_air", "tcwv", "sat_zenith",
                                                                       "sol_zenith", "p_surf"]
    for name in order:
        columns[name] = np.round(sub[name].values.astype(np.float64), decimals[name]).ravel()
    columns["surface"] = np.array([names[int(s)] for s in sub["surface"].values.ravel()], dtype=object)
    return columns


def write_csv(columns, path):
    _replace_atomically(path, lambda tmp: _write_csv(columns, tmp))


def _write_csv(columns, path):
    names = list(columns)
    with open(path, "w", newline="\n") as fh:
        fh.write(",".join(names) + "\n")
        n = len(columns["row"])
        fmt = {"lat": "{:.4f}", "lon": "{:.4f}", "p_surf": "{:.1f}"}
        for i in range(n):
            fields = []
            for name in names:
                v = columns[name][i]
                if name in ("row", "col", "surface"):
                    fields.append(str(v))
                else:
                    fields.append(fmt.get(name, "{:.2f}").format(v))
            fh.write(",".join(fields) + "\n")


def write_parquet(columns, path):
    arrays = {}
    for name, v in columns.items():
        if name in ("row", "col"):
            arrays[name] = pa.array(v, type=pa.int32())
        elif name == "surface":
            arrays[name] = pa.array(list(v), type=pa.string())
        else:  # float64: the values equal the scene file's decoded values, rounded as there
            arrays[name] = pa.array(v, type=pa.float64())
    _replace_atomically(path, lambda tmp: pq.write_table(pa.table(arrays), tmp, compression="zstd",
                                                         compression_level=9, use_dictionary=["surface"],
                                                         write_statistics=False))


# ---------------------------------------------------------------------------------------
# Sanity checks
# ---------------------------------------------------------------------------------------
def departure_check(scene_ds, truth_ds):
    """Observed − clear-sky BT simulated from the file's BACKGROUND (41 levels, table emissivity)."""
    channels_all = default_channels()
    names = [c for c in CHANNEL_ORDER if f"bt_{c}" in scene_ds]
    channels = [channels_all[c] for c in names]
    coeffs = channel_coefficients(channels, tomllib.loads(ABSORPTION_TABLE.read_text()))
    n = scene_ds.sizes["y"] * scene_ds.sizes["x"]
    get = {k: scene_ds[k].values.astype(np.float64).reshape(n) for k in ("t_skin", "t_air", "tcwv", "p_surf",
                                                                          "sat_zenith")}
    surface = scene_ds["surface"].values.reshape(n)
    emis = nominal_emissivity(surface, names)
    clear_bt = np.empty((n, len(names)))
    for start in range(0, n, CHUNK):
        sl = slice(start, min(start + CHUNK, n))
        prof = profile_from_surface(get["t_air"][sl], get["tcwv"][sl], get["p_surf"][sl])
        clear_bt[sl] = simulate_clear_sky(prof, get["t_skin"][sl], emis[sl], get["sat_zenith"][sl], channels, coeffs,
                                          levels=False).brightness_temperature
    obs = np.stack([scene_ds[f"bt_{c}"].values.reshape(n) for c in names], axis=1)
    return names, obs - clear_bt, obs


def print_checks(scene_ds, truth_ds):
    name = scene_ds.attrs["scene_name"]
    f = truth_ds["cloud_fraction"].values.ravel()
    tau = truth_ds["cloud_optical_depth"].values.ravel()
    phase = truth_ds["cloud_phase"].values.ravel()
    feature = truth_ds["cloud_feature"].values.ravel()
    surface = scene_ds["surface"].values.ravel()
    print(f"\n== {name}: {scene_ds.sizes['y']} x {scene_ds.sizes['x']}")
    print(f"  mean cloud fraction {f.mean():.3f}; pixels with f>0 {np.mean(f > 0):.3f}, f=1 {np.mean(f >= 0.999):.3f}, "
          f"0<f<1 {np.mean((f > 0) & (f < 0.999)):.3f}")
    for k, fname in enumerate(FEATURES[1:], start=1):
        sel = feature == k
        if sel.any():
            print(f"  {fname:18s} pixels {sel.mean():.3f}  mean f {f[sel].mean():.2f}  tau {np.percentile(tau[sel], 5):.2f}"
                  f"..{np.percentile(tau[sel], 95):.2f}  water {np.mean(phase[sel] == 1):.2f} ice {np.mean(phase[sel] == 2):.2f}")
    for v in ("t_skin", "t_air", "tcwv", "p_surf", "sat_zenith", "sol_zenith"):
        a = scene_ds[v].values
        print(f"  {v:10s} {np.nanmin(a):8.2f} .. {np.nanmax(a):8.2f}")
    for v, bgv in (("t_skin_true", "t_skin"), ("t_air_true", "t_air")):
        d = scene_ds[bgv].values - truth_ds[v].values
        print(f"  background - truth {bgv}: mean {d.mean():+.3f} rms {np.sqrt(np.mean(d**2)):.3f} K")
    r = scene_ds["tcwv"].values / truth_ds["tcwv_true"].values - 1.0
    print(f"  background / truth - 1, tcwv: mean {r.mean():+.4f} rms {np.sqrt(np.mean(r**2)):.4f}")
    names, dep, obs = departure_check(scene_ds, truth_ds)
    clear = f == 0.0
    for label, sel in (("truth-clear", clear), ("cloudy f>0", f > 0.0), ("overcast f=1", f >= 0.999),
                       ("partial 0<f<1", (f > 0) & (f < 0.999))):
        if not sel.any():
            continue
        stats = "  ".join(f"{c}: {dep[sel, i].mean():+6.2f}±{dep[sel, i].std():5.2f}" for i, c in enumerate(names))
        print(f"  departure obs-bg [{label:13s} n={sel.sum():6d}] {stats}")
    for s_name, s_code in SURFACE_CODES.items():
        sel = clear & (surface == s_code)
        if sel.any() and len(np.unique(surface)) > 1:
            stats = "  ".join(f"{c}: {dep[sel, i].mean():+6.2f}±{dep[sel, i].std():5.2f}" for i, c in enumerate(names))
            print(f"    clear over {s_name:4s} n={sel.sum():6d}  {stats}")
    for k, fname in enumerate(FEATURES[1:], start=1):
        sel = (feature == k) & (f >= 0.999)
        if sel.sum() > 10:
            stats = "  ".join(f"{c}: {np.median(dep[sel, i]):+6.2f}" for i, c in enumerate(names))
            print(f"    overcast {fname:18s} median departure  {stats}")
    if "3p9um" in names and "11um" in names:
        d39 = obs[:, names.index("3p9um")] - obs[:, names.index("11um")]
        fog = (feature == FEATURES.index("fog_low_stratus")) | (feature == FEATURES.index("polar_low_cloud"))
        thick_fog = fog & (f >= 0.999) & (tau >= 5.0)
        print(f"  BT3.9-BT11 clear: mean {d39[clear].mean():+.2f} (p5 {np.percentile(d39[clear], 5):+.2f}, "
              f"p95 {np.percentile(d39[clear], 95):+.2f})")
        if thick_fog.any():
            print(f"  BT3.9-BT11 thick low water cloud (f=1, tau>=5, n={thick_fog.sum()}): mean {d39[thick_fog].mean():+.2f} "
                  f"(p5 {np.percentile(d39[thick_fog], 5):+.2f}, p95 {np.percentile(d39[thick_fog], 95):+.2f})")
        thin = fog & (f >= 0.999) & (tau < 5.0)
        if thin.any():
            print(f"  BT3.9-BT11 thin low water cloud (f=1, tau<5, n={thin.sum()}): mean {d39[thin].mean():+.2f}")


# ---------------------------------------------------------------------------------------
# Main
# ---------------------------------------------------------------------------------------
def build(scene, out_dir):
    # the fields handed over exactly are rounded first, so the file holds what the simulation used
    scene = scene._replace(p_surf=np.round(scene.p_surf, 1), sat_zenith=np.round(scene.sat_zenith, 2),
                           sol_zenith=np.round(scene.sol_zenith, 2))
    layer = combine_clouds(scene.clouds, scene.t_skin.shape)
    bt, _, top_t, phase, base_used = simulate_observation(scene, layer)
    t_skin_bg, t_air_bg, tcwv_bg = background_state(scene)
    scene_ds = scene_dataset(scene, bt, t_skin_bg, t_air_bg, tcwv_bg)
    truth_ds = truth_dataset(scene, layer, top_t, phase, base_used, generation_attrs())
    write_netcdf(scene_ds, out_dir / f"{scene.name}.nc")
    write_netcdf(truth_ds, out_dir / f"{scene.name}_truth.nc")
    return out_dir / f"{scene.name}.nc", out_dir / f"{scene.name}_truth.nc"


#: A 40 × 40 cutout of night_front for the CSV: the edge of the fog patch, clear sea and cirrus
CSV_CUTOUT = (slice(170, 210), slice(175, 215))


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=HERE, help="output folder (default: sample_scenes/)")
    parser.add_argument("--check", action="store_true", help="print sanity statistics after writing")
    args = parser.parse_args(argv)
    args.out.mkdir(parents=True, exist_ok=True)
    written = {}
    for make in (make_night_front, make_day_coast, make_polar_ice):
        scene = make()
        written[scene.name] = build(scene, args.out)
        print(f"wrote {written[scene.name][0].name} and {written[scene.name][1].name}")
    with xr.open_dataset(written["night_front"][0]) as ds:
        write_csv(pixel_table(ds, *CSV_CUTOUT), args.out / "night_front_small.csv")
    with xr.open_dataset(written["day_coast"][0]) as ds:
        write_parquet(pixel_table(ds), args.out / "day_coast.parquet")
    print("wrote night_front_small.csv and day_coast.parquet")
    if args.check:
        for scene_path, truth_path in written.values():
            with xr.open_dataset(scene_path) as s, xr.open_dataset(truth_path) as t:
                print_checks(s.load(), t.load())


if __name__ == "__main__":
    main()
