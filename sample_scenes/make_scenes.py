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
   with a cover fraction f in [0, 1] (smooth edges, broken inside cumulus-like cloud), a
   vertical 11 µm absorption optical depth, top and base pressure and phase. One cloud
   layer per pixel: where structures overlap, the one with the larger fraction wins (ties:
   the listed priority).
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
   state + background errors (smooth and pixel-to-pixel); the truth file holds the true
   state and the clouds.

The truth is made in a DIFFERENT world from the one the screening assumes (:class:`TruthWorld`,
``HONEST_WORLD``): its own absorption coefficients, humidity shape and lapse rate, low-level
inversions, view-angle dependent sea emissivity, non-grey ice cloud and background errors
larger than the configuration's σ in part of each scene. So the skill tests do not judge the
screening by its own physics. :func:`make_scene_in_world` makes a (cut of a) scene in any
world in memory, for the robustness tests.

All random numbers come from ``numpy.random.default_rng([scene_seed, crc32(field_name)])``,
so the output is the same on every run (byte for byte, for the same library versions).
"""
import argparse
import copy
import dataclasses
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
from physics.surface import emissivity_angle_factor
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
#: Complex refractive index of liquid water at window wavelengths [µm]: Hale & Querry (1973),
#: Appl. Opt. 12, 555-563 (approximate, from memory; the same nodes as the configuration's
#: [surface.sea_view_angle], copied here so that the truth does not move when the config does).
WATER_INDEX_WAVELENGTH = (3.5, 4.0, 8.0, 9.0, 10.0, 11.0, 12.0, 13.0)
WATER_INDEX_N = (1.400, 1.351, 1.291, 1.262, 1.218, 1.153, 1.111, 1.123)
WATER_INDEX_K = (0.0094, 0.0046, 0.0343, 0.0399, 0.0508, 0.0968, 0.199, 0.305)

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
#: Fraction of the saturated column that a column may hold (keeps background tcwv, whose
#: errors are ~10 % rms and reach ~+40 %, below the scene reader's 1.5 × saturation warning).
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


def true_profile(t_air, tcwv, p_surf, lapse_rate, humidity_exponent):
    """Profiles (n, TRUTH_LEVELS) of the true columns from 1-D pixel arrays.

    ``physics.atmosphere.profile_from_surface`` with the world's per-pixel lapse rate
    [K m⁻¹] and humidity exponent [1] (the numpy reference path, float64).
    """
    return profile_from_surface(t_air, tcwv, p_surf, n_levels=TRUTH_LEVELS, top_pressure=TOP_PRESSURE,
                                lapse_rate=lapse_rate, humidity_exponent=humidity_exponent)


def saturated_column(t_air, p_surf, lapse_rate):
    """Column water vapour of a true column when saturated throughout. [kg m⁻²]

    ``lapse_rate`` [K m⁻¹] per pixel (the saturated column does not depend on the humidity
    shape: every level holds its saturation value).
    """
    shape = np.shape(t_air)
    flat = [np.broadcast_to(np.asarray(a, dtype=float), shape).reshape(-1) for a in (t_air, p_surf, lapse_rate)]
    prof = true_profile(flat[0], np.full_like(flat[0], 1.0e3), flat[1], flat[2], 3.0)
    return column_water_vapour(prof.pressure, prof.specific_humidity).reshape(shape)


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
    world: "TruthWorld"  # the world the truth is made in
    fields: "WorldFields"  # its per-pixel fields on this grid
    noise: np.ndarray = None  # standard-normal instrument noise (ny, nx, n_ch), drawn by prepare()


def emissivity_field(seed, surface, channels, sat_zenith, world):
    """True emissivity per pixel and channel [1]: table values, a smooth variation over land
    and, over sea, the fall with view angle of the world (:func:`sea_angle_factor`)."""
    shape = surface.shape
    names = [n for n in SURFACE_CODES]
    idx = [CHANNEL_ORDER.index(c) for c in channels]
    table = np.array([[EMISSIVITY[n][i] for i in idx] for n in names])  # (n_surf, n_ch)
    emis = table[surface]
    land = surface == SURFACE_CODES["land"]
    if land.any():
        g = np.clip(smooth_field(seed, "land_emissivity", shape, 8.0), -2.5, 2.5)
        spread = np.array([world.land_emissivity_spread[i] for i in idx])
        emis = np.where(land[..., None], emis + g[..., None] * spread, emis)
    sea = surface == SURFACE_CODES["sea"]
    if sea.any() and world.sea_angle_fall > 0.0:
        emis = np.where(sea[..., None], emis * sea_angle_factor(channels, sat_zenith, world), emis)
    return emis


def sea_angle_factor(channels, sat_zenith, world):
    """ε(θ)/ε(0) of the world's sea per pixel and channel, (ny, nx, n_ch). [1]

    1 − s (1 − F(θ)), F the ratio of a flat water surface (``physics.surface``, Fresnel with
    the refractive index of water at the channel's central wavelength) and s the world's
    ``sea_angle_fall``.
    """
    all_channels = default_channels()
    out = []
    for c in channels:
        wavelength = 1.0e4 / all_channels[c].central_wavenumber  # [µm]
        n = np.interp(wavelength, WATER_INDEX_WAVELENGTH, WATER_INDEX_N)
        k = np.interp(wavelength, WATER_INDEX_WAVELENGTH, WATER_INDEX_K)
        out.append(1.0 - world.sea_angle_fall * (1.0 - emissivity_angle_factor(n, k, sat_zenith)))
    return np.stack(out, axis=-1)


def nominal_emissivity(surface, channels):
    """Table emissivity per surface type (what an analyst would assume). [1]"""
    idx = [CHANNEL_ORDER.index(c) for c in channels]
    names = list(SURFACE_CODES)
    table = np.array([[EMISSIVITY[n][i] for i in idx] for n in names])
    return table[surface]


def column_from_saturation(t_air, p_surf, saturation, lapse_rate):
    """tcwv = saturation fraction × saturated column, capped at MAX_COLUMN_SATURATION. [kg m⁻²]"""
    return np.minimum(saturation, MAX_COLUMN_SATURATION) * saturated_column(t_air, p_surf, lapse_rate)


# ---------------------------------------------------------------------------------------
# The truth world: how it differs from the world the screening assumes
# ---------------------------------------------------------------------------------------
@dataclasses.dataclass(frozen=True)
class TruthWorld:
    """The physics and errors the truth is made with, where they differ from the screening's.

    The screening simulates clear sky with ``physics/data/absorption.toml``, the profile
    builder's defaults (humidity exponent 3, lapse rate 6.5 K km⁻¹, no inversion), the table
    emissivities of ``[surface.emissivity]`` (sea with a flat water surface's full Fresnel fall
    with view angle by default)
    and a grey cloud, and it expects background errors of the size given in
    ``[background_errors]`` (``[background_noise]`` of them pixel-to-pixel). The truth world
    changes each of these by an amount a real analyst would meet. Ranges ``(lo, hi)`` vary
    smoothly across a scene (uniform distribution between them); ``(x, x)`` is a constant.
    Sources: "ours" (chosen for these invented scenes) or "from memory" (recalled, not
    looked up).
    """

    #: factor on the self continuum (a, b, outside_k296). Ours: published versions of the
    #: water-vapour continuum differ by 10-20 % in the 11 µm window (from memory).
    self_continuum: float = 1.1
    #: factor on the foreign continuum. Ours: less well known than the self continuum
    #: (from memory); weaker here, so the two do not scale together.
    foreign_continuum: float = 0.9
    #: factor on the water-vapour line coefficients. Ours: the table's line values were set
    #: by hand (its own note says so), so 15 % is an honest doubt.
    lines: float = 1.15
    #: λ of the humidity shape q = q0 (p/ps)^λ [1], smooth across the scene. Soundings give
    #: λ of about 2-4 (Smith 1966, from memory); the screening uses 3.
    humidity_exponent: tuple = (2.3, 3.6)
    #: tropospheric lapse rate [K km⁻¹], smooth across the scene. Ours, around the 1976
    #: standard atmosphere's 6.5 K km⁻¹ (Table 4) that the screening uses.
    lapse_rate: tuple = (6.0, 7.2)
    #: smoothing scale of the humidity-exponent and lapse-rate fields [pixel]. Ours.
    profile_scale_px: float = 40.0
    #: apply each scene's low-level temperature inversion (where and how strong: in the scene
    #: functions, ours); the screening's profiles have none.
    inversions: bool = True
    #: share of a flat water surface's emissivity fall with view angle (Fresnel,
    #: physics.surface) that the sea shows. Ours: wind roughening makes the real fall
    #: somewhat smaller than a flat surface's (from memory); the screening's default has none.
    sea_angle_fall: float = 0.8
    #: 1-σ smooth variation of land emissivity per channel (3.9, 8.6, 11, 12 µm) [1]. Ours;
    #: the screening uses the table value for every land pixel.
    land_emissivity_spread: tuple = (0.015, 0.020, 0.007, 0.006)
    #: absorption optical depth of ice cloud at 12 µm over that at 11 µm [1], smooth per
    #: structure. From memory: published ice optics give 1.1-1.2 for effective sizes of a
    #: few tens of µm (larger for small crystals); the screening's cloud is grey.
    ice_tau_ratio_12: tuple = (1.1, 1.2)
    #: the same at 8.6 µm over 11 µm [1]. From memory: about 0.9 for ice.
    ice_tau_ratio_8p6: tuple = (0.85, 0.95)
    #: lowest sub-pixel cover factor inside cumulus, stratocumulus, polar low cloud and the
    #: post-frontal part of the front [1] (a pixel-scale field between it and 1 multiplies
    #: the cover fraction). Ours.
    broken_cover: float = 0.35
    #: 1-σ of the smooth background skin-temperature error over sea, land, ice [K]. Sea as a
    #: good SST analysis (~0.3 K, from memory); land and ice ours, below the configuration's
    #: 1.5 and 1.0 K outside the poor-background region.
    bg_t_skin_rms: tuple = (0.3, 1.0, 0.6)
    #: 1-σ of the smooth background air-temperature error [K]. Ours (as the config's sea value).
    bg_t_air_rms: float = 0.5
    #: relative 1-σ of the smooth background water-vapour error [1]. From memory: typical of
    #: a short-range forecast; the config's sea value.
    bg_tcwv_rel_rms: float = 0.07
    #: Gaussian smoothing scale of the smooth background errors [pixel]. Ours.
    bg_smoothing_px: float = 20.0
    #: 1-σ of a pixel-to-pixel (independent) background skin-temperature error [K]: a
    #: background retrieved or interpolated pixel by pixel (the project's issue 13).
    bg_pixel_t_skin_rms: float = 0.3
    #: relative 1-σ of a pixel-to-pixel background water-vapour error [1] (issue 13).
    bg_pixel_tcwv_rel_rms: float = 0.07
    #: the smooth skin error is this many times larger (rms) in a poor-background region of
    #: 12-16 % of each scene (an analysis gone wrong there), larger than the config's σ. Ours.
    poor_background_factor: float = 2.5
    #: instrument noise as a constant radiance, NOISE_K at 300 K: its temperature equivalent
    #: grows at cold scenes, fastest at 3.9 µm (common practice for thermal detectors; the
    #: screening's [instrument] assumes the same). False: NOISE_K at every temperature.
    constant_radiance_noise: bool = True

    def attrs(self):
        """The world as global attributes of a truth file (``truth_world_<field>``)."""
        out = {}
        for f in dataclasses.fields(self):
            v = getattr(self, f.name)
            out[f"truth_world_{f.name}"] = np.array(v, dtype=float) if isinstance(v, tuple) else (
                int(v) if isinstance(v, bool) else v)
        return out


#: The world the sample files are made in.
HONEST_WORLD = TruthWorld()
#: The screening's own physics with the previous generator's smooth 0.3 K / 0.5 K / 7 %
#: background errors: for comparison runs only (the sample files are not made with it).
SCREENING_WORLD = TruthWorld(
    self_continuum=1.0, foreign_continuum=1.0, lines=1.0, humidity_exponent=(3.0, 3.0), lapse_rate=(6.5, 6.5),
    inversions=False, sea_angle_fall=1.0, land_emissivity_spread=(0.0, 0.0, 0.0, 0.0),
    ice_tau_ratio_12=(1.0, 1.0), ice_tau_ratio_8p6=(1.0, 1.0), broken_cover=1.0, bg_t_skin_rms=(0.3, 0.3, 0.3),
    bg_pixel_t_skin_rms=0.0, bg_pixel_tcwv_rel_rms=0.0, poor_background_factor=1.0)


def world_absorption_table(world):
    """``physics/data/absorption.toml`` with the world's factors applied (a deep copy).

    The foreign continuum is stored as a ratio to the self continuum, so its factor enters as
    foreign / self. Dry gases are unchanged.
    """
    table = copy.deepcopy(tomllib.loads(ABSORPTION_TABLE.read_text()))
    sc = table["self_continuum"]
    for key in ("a", "b"):
        sc[key]["value"] = sc[key]["value"] * world.self_continuum
    sc["outside_k296"]["value"] = [v * world.self_continuum for v in sc["outside_k296"]["value"]]
    ratio = table["foreign_continuum"]["ratio_to_self"]
    ratio["value"] = ratio["value"] * world.foreign_continuum / world.self_continuum
    lines = table["water_vapour_lines"]["k"]
    lines["value"] = [v * world.lines for v in lines["value"]]
    return table


class WorldFields(NamedTuple):
    """Per-pixel fields of the truth world on a scene grid (all (ny, nx))."""

    humidity_exponent: np.ndarray  # λ of q = q0 (p/ps)^λ [1]
    lapse_rate: np.ndarray  # tropospheric lapse rate [K m⁻¹]
    inversion_excess: np.ndarray  # warming of the air at the inversion top [K] (0: none; apply_inversion)
    inversion_depth: np.ndarray  # pressure depth of the inversion layer [hPa]
    ice_tau_ratio_8p6: np.ndarray  # τ8.6/τ11 of an ice cloud in the pixel [1]
    ice_tau_ratio_12: np.ndarray  # τ12/τ11 of an ice cloud in the pixel [1]
    bg_t_skin_error: np.ndarray  # background − true skin temperature [K]
    bg_t_air_error: np.ndarray  # background − true air temperature [K]
    bg_tcwv_error: np.ndarray  # background / true water vapour − 1 [1]
    bg_t_skin_scale: np.ndarray  # rms factor of the smooth skin error (1 outside the poor-background region) [1]


def world_range(seed, name, shape, value_range, sigma):
    """A smooth field spread uniformly over ``value_range`` (a constant if lo == hi)."""
    lo, hi = value_range
    if lo == hi:
        return np.full(shape, float(lo))
    return to_range(smooth_field(seed, name, shape, sigma), lo, hi)


def profile_fields(seed, shape, world):
    """The world's humidity exponent [1] and lapse rate [K m⁻¹] on the scene grid."""
    lam = world_range(seed, "true_humidity_exponent", shape, world.humidity_exponent, world.profile_scale_px)
    lapse = world_range(seed, "true_lapse_rate", shape, world.lapse_rate, world.profile_scale_px) * 1.0e-3
    return lam, lapse


def broken_cover(seed, name, shape, world):
    """Sub-pixel cover factor in [world.broken_cover, 1], varying from pixel to pixel. [1]

    About a quarter of the pixels keep their full cover (the factor is cut at 1).
    """
    lo = world.broken_cover
    if lo >= 1.0:
        return np.ones(shape)
    return np.minimum(to_range(smooth_field(seed, name, shape, 0.8), lo, 1.0 + 0.4 * (1.0 - lo)), 1.0)


def world_fields(seed, surface, world, profile, inversion_weight, inversion_excess, inversion_depth):
    """The world's per-pixel fields of a scene (:class:`WorldFields`).

    ``profile`` is (λ, lapse rate) from :func:`profile_fields`; ``inversion_weight`` (0-1)
    says where the scene has a low-level inversion, ``inversion_excess`` [K] and
    ``inversion_depth`` [hPa] are (lo, hi) ranges of its strength (see :func:`apply_inversion`)
    and depth there.
    """
    shape = surface.shape
    lam, lapse = profile
    if world.inversions:
        excess = inversion_weight * world_range(seed, "inversion_excess", shape, inversion_excess, 10.0)
        excess = np.where(excess < 0.05, 0.0, excess)  # a trace is no inversion (keeps the truth map clean)
    else:
        excess = np.zeros(shape)
    depth = world_range(seed, "inversion_depth", shape, inversion_depth, 10.0)
    ratio_86 = world_range(seed, "ice_tau_ratio_8p6", shape, world.ice_tau_ratio_8p6, 15.0)
    ratio_12 = world_range(seed, "ice_tau_ratio_12", shape, world.ice_tau_ratio_12, 15.0)

    # background errors: smooth (with a poor region) plus pixel-to-pixel
    # poor region: a smooth error field of its own is added, scaled so that inside the region
    # the smooth skin error has poor_background_factor times its rms (whatever the luck of
    # the scene-wide field there)
    poor = smoothstep((smooth_field(seed, "poor_background", shape, 30.0) - 0.85) / 0.5)
    scale = 1.0 + (world.poor_background_factor - 1.0) * poor
    skin_rms = np.array(world.bg_t_skin_rms)[surface]
    smooth = smooth_field(seed, "bg_error_t_skin", shape, world.bg_smoothing_px)
    if world.poor_background_factor > 1.0:
        extra = smooth_field(seed, "bg_error_t_skin_poor", shape, world.bg_smoothing_px)
        extra = extra / np.sqrt(np.mean(extra[poor > 0.5] ** 2))
        smooth = smooth + np.sqrt(world.poor_background_factor**2 - 1.0) * poor * extra
    e_skin = (skin_rms * smooth
              + world.bg_pixel_t_skin_rms * field_rng(seed, "bg_pixel_t_skin").standard_normal(shape))
    e_air = world.bg_t_air_rms * smooth_field(seed, "bg_error_t_air", shape, world.bg_smoothing_px)
    e_wv = (world.bg_tcwv_rel_rms * smooth_field(seed, "bg_error_tcwv", shape, world.bg_smoothing_px)
            + world.bg_pixel_tcwv_rel_rms * field_rng(seed, "bg_pixel_tcwv").standard_normal(shape))
    return WorldFields(lam, lapse, excess, depth, ratio_86, ratio_12, e_skin, e_air, e_wv, scale)


def apply_inversion(pressure, temperature, p_surf, excess, depth):
    """Add a low-level inversion to profiles (n, n_lev), levels surface first. [K]

    The air is warmed by ``excess`` × h/depth at h hPa above the surface up to the inversion
    top (h = ``depth`` [hPa]); above it the warming fades linearly to 0 over max(4 depth,
    40 hPa per K of excess), so the lapse rate there exceeds the profile's by less than
    about 3 K km⁻¹. The air then warms with height inside the layer where the excess beats
    the lapse-rate drop over its depth (about 2.5-6 K for 50-100 hPa). An excess of 0 changes
    nothing. Ours: a simple shape for a surface-based inversion.
    """
    height = p_surf[:, None] - pressure  # [hPa] above the surface
    d = depth[:, None]
    e = excess[:, None]
    fade = np.maximum(4.0 * d, 40.0 * e)
    shape = np.where(height <= d, height / d, np.clip(1.0 - (height - d) / fade, 0.0, 1.0))
    return temperature + e * shape


# ---------------------------------------------------------------------------------------
# Scene 1: night_front — a night over the invented Ardelle Sea
# ---------------------------------------------------------------------------------------
def make_night_front(world=HONEST_WORLD):
    """Cold front over the Ardelle Sea at night, cirrus ahead of it, fog over the Miresk upwelling."""
    seed, shape, pixel_km = 1101, (300, 300), 2.0
    ny, nx = shape
    rows, cols = np.mgrid[0:ny, 0:nx].astype(float)
    lat, lon = latlon_grid(shape, lat_north=38.6, lon_west=-152.0, pixel_km=pixel_km)
    profile = profile_fields(seed, shape, world)

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
    tcwv = np.clip(column_from_saturation(t_air, p_surf, saturation, profile[1]), 10.0, 50.0)

    sat_zenith = swath_zenith(shape, 5.0, 60.0)
    sol_zenith = solar_zenith(lat, lon, declination=-8.0, utc_hour=7.0)
    channels = CHANNEL_ORDER
    emissivity = emissivity_field(seed, surface, channels, sat_zenith, world)
    # the warm moist air over the cool patch lies in a surface inversion (ours: 4-7 K warmer at its
    # top, 50-90 hPa up, than the lapse-rate profile)
    fields = world_fields(seed, surface, world, profile, smoothstep((upwelling - 0.2) / 0.4), (4.0, 7.0), (50.0, 90.0))

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
    # the trailing mid-level cloud is broken on the pixel scale (post-frontal cells)
    f_front = f_front * (1.0 - mid * (1.0 - broken_cover(seed, "front_broken", shape, world)))
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
        emissivity, (front, cirrus, fog), world, fields,
    )


# ---------------------------------------------------------------------------------------
# Scene 2: day_coast — a summer day on the invented Corvenna coast
# ---------------------------------------------------------------------------------------
def make_day_coast(world=HONEST_WORLD):
    """Warm land with cumulus fields, cirrus, and a sea with a few stratocumulus patches."""
    seed, shape, pixel_km = 2202, (300, 300), 1.0
    ny, nx = shape
    rows, cols = np.mgrid[0:ny, 0:nx].astype(float)
    lat, lon = latlon_grid(shape, lat_north=-28.5, lon_west=-101.0, pixel_km=pixel_km)
    profile = profile_fields(seed, shape, world)

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
    tcwv = column_from_saturation(t_air, p_surf, saturation, profile[1])

    sat_zenith = swath_zenith(shape, 22.0, 46.0, tilt=-0.1)
    sol_zenith = solar_zenith(lat, lon, declination=-15.0, utc_hour=15.75)
    channels = ("11um", "12um")
    emissivity = emissivity_field(seed, surface, channels, sat_zenith, world)
    # a shallow inversion over the cooler water of the coastal strip, inshore of the stratocumulus
    # (ours: 3-5 K warmer at its top, 60-100 hPa up; fading out within ~10 km of the coast)
    marine = (1.0 - land_weight) * np.exp(-offshore / 5.0)
    fields = world_fields(seed, surface, world, profile, marine, (3.0, 5.0), (60.0, 100.0))

    # cumulus fields over land, none within ~12 km of the coast (sea breeze), denser in the hills
    density = special.ndtr(1.4 * smooth_field(seed, "cu_density", shape, 22.0) + 0.02 * (inland - 40.0))
    cells = smooth_field(seed, "cu_cells", shape, 1.4)
    threshold = 2.3 - 1.5 * density
    growth = cells - threshold
    allowed = smoothstep((inland - 12.0) / 6.0)
    f_cu = smoothstep(growth / 0.5) * allowed * broken_cover(seed, "cu_broken", shape, world)
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
    f_sc = (smoothstep((blobs - 1.45) / 0.35) * smoothstep((offshore - 8.0) / 6.0)
            * broken_cover(seed, "sc_broken", shape, world))
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
        emissivity, (cirrus, cumulus, stratocu), world, fields,
    )


# ---------------------------------------------------------------------------------------
# Scene 3: polar_ice — polar night over the invented Kelvor ice pack
# ---------------------------------------------------------------------------------------
def make_polar_ice(world=HONEST_WORLD):
    """Dry cold polar night: pack ice with a lead, open sea in one corner, low and thin ice cloud."""
    seed, shape, pixel_km = 3303, (150, 150), 2.0
    ny, nx = shape
    rows, cols = np.mgrid[0:ny, 0:nx].astype(float)
    lat, lon = latlon_grid(shape, lat_north=79.0, lon_west=163.0, pixel_km=pixel_km)
    profile = profile_fields(seed, shape, world)

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
    tcwv = np.clip(column_from_saturation(t_air, p_surf, saturation, profile[1]), 1.0, 5.0)

    sat_zenith = swath_zenith(shape, 34.0, 55.0, tilt=0.2)
    sol_zenith = solar_zenith(lat, lon, declination=-20.0, utc_hour=3.0)
    channels = CHANNEL_ORDER
    emissivity = emissivity_field(seed, surface, channels, sat_zenith, world)
    # over much of the ice the air also warms with height (ours: 5-9 K warmer at the inversion
    # top, 50-100 hPa up, than the lapse-rate profile: a rise of about 1-6 K)
    over_ice = 1.0 - np.clip(2.0 * sea_weight, 0.0, 1.0)
    air_inversion = over_ice * smoothstep((smooth_field(seed, "air_inversion", shape, 25.0) + 0.3) / 0.8)
    fields = world_fields(seed, surface, world, profile, air_inversion, (5.0, 9.0), (50.0, 100.0))

    # supercooled low cloud fed by the open water, drifting over the ice
    low_shape = smooth_field(seed, "low_cloud", shape, 7.0) + 1.4 * np.clip(2.0 * sea_weight, 0.0, 1.0)
    f_low = smoothstep((low_shape - 0.9) / 0.4) * broken_cover(seed, "low_broken", shape, world)
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
        emissivity, (ice_cloud, low), world, fields,
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


def _solve_chunk(col, cloud, channels, coeffs):
    """Clear and cloudy top-of-atmosphere radiances of one chunk of true columns.

    ``col`` holds 1-D pixel arrays t_skin, t_air, tcwv, p_surf, sat_zenith, the world's
    lapse_rate, humidity_exponent, inversion_excess, inversion_depth, and emissivity (n, n_ch);
    ``cloud`` holds 1-D arrays fraction, optical_depth, top_pressure, base_pressure, phase,
    ratio_8p6, ratio_12 (the ice cloud's τ ratios) for the same pixels. ``coeffs`` are the
    world's channel absorption coefficients.

    Returns clear radiance (n, n_ch), cloudy radiance (n, n_ch; NaN where clear), the cloud
    top temperature [K], the resolved phase and the cloud base used [hPa].

    Notes
    -----
    Gas: profile (the world's lapse rate and humidity shape, then its inversion) → layer
    optical depths → Planck radiances of levels and skin → Schwarzschild solver (all from
    ``physics``). Cloud: its vertical optical depth τ_ch is spread over the layers between
    its (moved) base and top levels in proportion to their pressure thickness and added to
    the gas optical depth; the same solver gives L_cloudy. Water: τ_ch = τ at 8.6, 11 and
    12 µm, 0.6 τ at 3.9 µm. Ice: τ at 3.9 and 11 µm, ratio_8p6 · τ at 8.6 µm and ratio_12 · τ
    at 12 µm (non-grey). A water cloud at 3.9 µm also reflects the downwelling sky radiance
    L↓ reaching its top, with reflectivity r = 0.15 (1 − e^{−τ}); r is taken out of the
    radiance leaving the cloud top (energy conservation, simply): with 𝒯 the slant
    transmittance from the cloud top to space and A the emission of the air above it,

        L = [(1 − r) L_up,top + r L↓_top] 𝒯 + A .

    L↓_top is the solver's downwelling at the surface of a column whose layers below the
    cloud top are made transparent (so only the air above the cloud contributes).
    """
    t_skin, emissivity = col["t_skin"], col["emissivity"]
    n = t_skin.size
    n_ch = len(channels)
    prof = true_profile(col["t_air"], col["tcwv"], col["p_surf"], col["lapse_rate"], col["humidity_exponent"])
    p, t, q = (np.array(a) for a in prof)
    t = apply_inversion(p, t, col["p_surf"], col["inversion_excess"], col["inversion_depth"])
    mu = np.cos(np.deg2rad(col["sat_zenith"]))
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
    water, ice = ph == WATER, ph == ICE
    if "3p9um" in names:
        i39 = names.index("3p9um")
        factor[water, i39] = WATER_ABSORPTION_RATIO_3P9
    for ch, key in (("8p6um", "ratio_8p6"), ("12um", "ratio_12")):
        if ch in names:
            factor[ice, names.index(ch)] = cloud[key][cloudy][ice]
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
    coeffs = channel_coefficients(channels, world_absorption_table(scene.world))
    shape = scene.t_skin.shape
    n = scene.t_skin.size
    n_ch = len(channels)
    fields = scene.fields
    col = {k: np.ascontiguousarray(getattr(scene, k), dtype=np.float64).reshape(n)
           for k in ("t_skin", "t_air", "tcwv", "p_surf", "sat_zenith")}
    col.update({k: np.ascontiguousarray(getattr(fields, k), dtype=np.float64).reshape(n)
                for k in ("lapse_rate", "humidity_exponent", "inversion_excess", "inversion_depth")})
    col["emissivity"] = scene.emissivity.reshape(n, n_ch).astype(np.float64)
    cloud = {k: np.asarray(layer[k]).reshape(n) for k in ("fraction", "optical_depth", "top_pressure",
                                                          "base_pressure", "phase")}
    cloud["ratio_8p6"] = fields.ice_tau_ratio_8p6.reshape(n)
    cloud["ratio_12"] = fields.ice_tau_ratio_12.reshape(n)
    radiance = np.empty((n, n_ch))
    top_t = np.empty(n)
    phase = np.empty(n, dtype=np.int8)
    base = np.empty(n)
    for start in range(0, n, CHUNK):
        sl = slice(start, min(start + CHUNK, n))
        clear, cloudy, tt, ph, pb = _solve_chunk({k: v[sl] for k, v in col.items()},
                                                 {k: v[sl] for k, v in cloud.items()}, channels, coeffs)
        f = cloud["fraction"][sl][:, None]
        radiance[sl] = np.where(f > 0.0, f * np.nan_to_num(cloudy) + (1.0 - f) * clear, clear)
        top_t[sl], phase[sl], base[sl] = tt, ph, pb
    bt_clean = channel_brightness_temperature(channels, radiance).reshape(shape + (n_ch,))
    noise = scene.noise * NOISE_K
    if scene.world.constant_radiance_noise:  # NOISE_K at 300 K, its radiance the same at every temperature
        for k, ch in enumerate(channels):
            noise[..., k] *= ch.radiance_derivative(300.0) / ch.radiance_derivative(bt_clean[..., k])
    return bt_clean + noise, bt_clean, top_t.reshape(shape), phase.reshape(shape), base.reshape(shape)


def background_state(scene):
    """TRUE state plus the world's background errors: t_skin, t_air, tcwv as the analyst gets them."""
    f = scene.fields
    return scene.t_skin + f.bg_t_skin_error, scene.t_air + f.bg_t_air_error, scene.tcwv * (1.0 + f.bg_tcwv_error)


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
    data.update(world_variables(scene, cloudy, phase))
    attrs = _global_attrs(scene, "truth")
    attrs.update(bg_attrs)
    return xr.Dataset(data, coords=_grid_coords(scene), attrs=attrs)


def world_variables(scene, cloudy, phase):
    """Truth variables that describe the truth world of each pixel (CF-style attributes)."""
    f = scene.fields
    ice = cloudy & (phase == ICE)
    excess = f.inversion_excess
    data = {
        "true_humidity_exponent": _float_var(f.humidity_exponent, 3,
                                             "exponent lambda of the true humidity shape q = q0 (p/ps)^lambda", "1"),
        "true_lapse_rate": _float_var(f.lapse_rate * 1.0e3, 3, "true tropospheric lapse rate", "K km-1"),
        "true_inversion_excess": _float_var(excess, 2, "warming of the true air at the top of its low-level "
                                            "inversion over the lapse-rate profile (0: no inversion)", "K"),
        "true_inversion_depth": _float_var(np.where(excess > 0.0, f.inversion_depth, np.nan), 1,
                                           "pressure depth of the true low-level inversion (NaN: no inversion)", "hPa"),
    }
    for c, ratio in (("8p6um", f.ice_tau_ratio_8p6), ("12um", f.ice_tau_ratio_12)):
        if c in scene.channels:
            data[f"cloud_tau_ratio_{c}"] = _float_var(
                np.where(cloudy, np.where(ice, ratio, 1.0), np.nan), 3,
                f"absorption optical depth of the cloud at {c[:-2].replace('p', '.')} um over that at 11 um "
                "(1: grey water cloud; NaN: no cloud)", "1")
    data["background_error_t_skin"] = _float_var(
        f.bg_t_skin_error, 2, "background minus true skin temperature (smooth plus pixel-to-pixel)", "K")
    data["background_error_t_skin"][2]["comment"] = "before the scene file's 0.01 K packing"
    data["background_error_tcwv"] = _float_var(
        f.bg_tcwv_error, 3, "background over true total column water vapour minus 1 (smooth plus pixel-to-pixel)", "1")
    data["background_error_t_skin_scale"] = _float_var(
        f.bg_t_skin_scale, 3, "rms factor of the smooth skin-temperature error (above 1: the poor-background region)", "1")
    return data


def generation_attrs(world):
    """Global attributes that record the noise, the truth world and the cloud model."""
    attrs = {
        "instrument_noise_K": NOISE_K,
        "instrument_noise": ("Gaussian, independent per pixel and channel, added to the brightness temperature; "
                             "NEdT = instrument_noise_K at 300 K, a constant radiance (grows at cold scenes) when "
                             "truth_world_constant_radiance_noise is 1"),
        "background_error_note": ("scene file t_skin, t_air, tcwv = truth + smooth Gaussian error fields "
                                  "(tcwv multiplicative; the smooth t_skin error per surface type and larger in a "
                                  "poor-background region) + independent per-pixel errors of t_skin and tcwv; "
                                  "p_surf, surface, angles are exact"),
        "truth_levels": TRUTH_LEVELS,
        "cloud_model": ("single layer per pixel inside a layered Schwarzschild solver; water grey at 8.6/11/12 um, "
                        f"at 3.9 um absorption x{WATER_ABSORPTION_RATIO_3P9}, reflectivity "
                        f"{WATER_REFLECTIVITY_MAX_3P9}(1-exp(-tau)) of the downwelling sky; ice non-grey "
                        "(cloud_tau_ratio_<ch>), grey at 3.9 um; partial cover mixed in radiance"),
        "truth_world": ("the truth is made with physics and errors that differ from the screening's: "
                        "the truth_world_* attributes (make_scenes.TruthWorld; per-surface values in the order "
                        "sea land ice, channel values 3.9 8.6 11 12 um) and sample_scenes/README.md"),
    }
    attrs.update(world.attrs())
    return attrs


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
SCENE_MAKERS = {"night_front": make_night_front, "day_coast": make_day_coast, "polar_ice": make_polar_ice}


def prepare(scene):
    """Round the fields handed over exactly (so the file holds what the simulation used) and
    draw the instrument noise (standard normal, (ny, nx, n_ch)) on the whole grid."""
    shape = scene.t_skin.shape
    noise = field_rng(scene.seed, "instrument_noise").standard_normal(shape + (len(scene.channels),))
    return scene._replace(p_surf=np.round(scene.p_surf, 1), sat_zenith=np.round(scene.sat_zenith, 2),
                          sol_zenith=np.round(scene.sol_zenith, 2), noise=noise)


def cut_scene(scene, rows, cols):
    """The part ``[rows, cols]`` of a prepared scene: every per-pixel array cut alike."""
    shape = scene.t_skin.shape

    def cut(v):
        return v[rows, cols] if isinstance(v, np.ndarray) and v.shape[:2] == shape else v

    return scene._replace(
        **{k: cut(v) for k, v in scene._asdict().items() if k not in ("clouds", "fields")},
        clouds=tuple(c._replace(**{k: cut(v) for k, v in c._asdict().items()}) for c in scene.clouds),
        fields=WorldFields(*(cut(v) for v in scene.fields)))


def render(scene):
    """The scene and truth datasets (in memory) of a prepared scene."""
    layer = combine_clouds(scene.clouds, scene.t_skin.shape)
    bt, _, top_t, phase, base_used = simulate_observation(scene, layer)
    t_skin_bg, t_air_bg, tcwv_bg = background_state(scene)
    scene_ds = scene_dataset(scene, bt, t_skin_bg, t_air_bg, tcwv_bg)
    truth_ds = truth_dataset(scene, layer, top_t, phase, base_used, generation_attrs(scene.world))
    return scene_ds, truth_ds


def make_scene_in_world(name, world=HONEST_WORLD, rows=slice(None), cols=slice(None)):
    """Scene and truth datasets of (a cut of) a sample scene made in ``world``, in memory.

    Parameters
    ----------
    name : {"night_front", "day_coast", "polar_ice"}
    world : TruthWorld
        E.g. ``dataclasses.replace(HONEST_WORLD, humidity_exponent=(2.0, 2.0))``.
    rows, cols : slice
        The part of the scene's grid to simulate; the state, clouds, errors and noise of every
        pixel are those of the whole scene (made on the whole grid, then cut), so only the
        radiative transfer shrinks with the cut.

    Returns
    -------
    (xarray.Dataset, xarray.Dataset)
        The scene (as in ``<name>.nc``) and its truth (as in ``<name>_truth.nc``), with row
        and column indices restarting at 0; write them with :func:`write_netcdf`.
    """
    whole = prepare(SCENE_MAKERS[name](world))
    (r0, r1, _), (c0, c1, _) = (s.indices(n) for s, n in zip((rows, cols), whole.t_skin.shape))
    scene_ds, truth_ds = render(cut_scene(whole, rows, cols))
    if (r1 - r0, c1 - c0) != whole.t_skin.shape:
        for ds in (scene_ds, truth_ds):
            ds.attrs["cut_of_scene"] = f"rows {r0}-{r1 - 1} and columns {c0}-{c1 - 1} of {name}"
    return scene_ds, truth_ds


def build(scene, out_dir):
    scene_ds, truth_ds = render(prepare(scene))
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
