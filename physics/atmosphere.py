"""Atmospheric profiles on pressure levels, humidity and column water vapour.

Profiles are stored surface first: level 0 is the lowest (near-surface air), the last level
is the model top. Arrays broadcast over leading pixel axes with the level axis last.

Units: pressure [hPa], temperature [K], specific humidity [kg kg⁻¹], water-vapour
partial pressure [hPa], height [m], column water vapour [kg m⁻²] (numerically equal to
precipitable water in mm).
"""
from typing import NamedTuple

import numpy as np

from . import fused
from .constants import EPSILON, GRAVITY, R_DRY_AIR

# ---------------------------------------------------------------------------------------
# US Standard Atmosphere 1976
# ---------------------------------------------------------------------------------------
#: Base geopotential heights [m'] and lapse rates [K m'⁻¹] of the seven layers below
#: 86 km geometric (84.852 km geopotential). U.S. Standard Atmosphere, 1976
#: (NOAA/NASA/USAF, NOAA-S/T 76-1562), Table 4.
USSA1976_BASE_HEIGHT = np.array([0.0, 11000.0, 20000.0, 32000.0, 47000.0, 51000.0, 71000.0, 84852.0])
USSA1976_LAPSE_RATE = np.array([-0.0065, 0.0, 0.0010, 0.0028, 0.0, -0.0028, -0.0020])
#: Sea-level temperature [K] and pressure [hPa] of the 1976 standard (Table 1 / Sec. 1.2).
USSA1976_T0 = 288.15
USSA1976_P0 = 1013.25
#: g0' M0 / R* of the 1976 standard: 9.80665 × 0.0289644 / 8.31432 [K m'⁻¹]. The standard
#: fixes R* = 8.31432 J mol⁻¹ K⁻¹ (its own value, not CODATA) so its tables are reproduced.
_USSA_GMR = 9.80665 * 0.0289644 / 8.31432


def _ussa1976_bases():
    t_base = [USSA1976_T0]
    p_base = [USSA1976_P0]
    for i, lapse in enumerate(USSA1976_LAPSE_RATE):
        dh = USSA1976_BASE_HEIGHT[i + 1] - USSA1976_BASE_HEIGHT[i]
        t0, p0 = t_base[-1], p_base[-1]
        t1 = t0 + lapse * dh
        if lapse == 0.0:
            p1 = p0 * np.exp(-_USSA_GMR * dh / t0)
        else:
            p1 = p0 * (t0 / t1) ** (_USSA_GMR / lapse)
        t_base.append(t1)
        p_base.append(p1)
    return np.array(t_base), np.array(p_base)


USSA1976_BASE_T, USSA1976_BASE_P = _ussa1976_bases()


def us_standard_atmosphere(geopotential_height):
    """Temperature and pressure of the US Standard Atmosphere 1976 below 84.852 km'.

    Parameters
    ----------
    geopotential_height : array_like
        Geopotential height, 0 ≤ H ≤ 84852. [m']

    Returns
    -------
    temperature : ndarray
        [K]
    pressure : ndarray
        [hPa]

    Notes
    -----
    U.S. Standard Atmosphere, 1976, Eqs. (23) and (33a/b): linear temperature segments in
    geopotential height and the hydrostatic pressure for each (power law, or exponential
    where the lapse rate is zero).
    """
    h = np.asarray(geopotential_height, dtype=float)
    if np.any((h < 0) | (h > USSA1976_BASE_HEIGHT[-1])):
        raise ValueError("geopotential height must lie within 0–84852 m' for the 1976 standard atmosphere")
    i = np.clip(np.searchsorted(USSA1976_BASE_HEIGHT, h, side="right") - 1, 0, 6)
    lapse = USSA1976_LAPSE_RATE[i]
    t_b, p_b, h_b = USSA1976_BASE_T[i], USSA1976_BASE_P[i], USSA1976_BASE_HEIGHT[i]
    t = t_b + lapse * (h - h_b)
    with np.errstate(divide="ignore", invalid="ignore"):
        p_power = p_b * (t_b / t) ** (_USSA_GMR / np.where(lapse == 0, 1.0, lapse))
    p_iso = p_b * np.exp(-_USSA_GMR * (h - h_b) / t_b)
    return t, np.where(lapse == 0.0, p_iso, p_power)


def us_standard_temperature_at_pressure(pressure):
    """Temperature of the 1976 standard atmosphere at a pressure. [K]

    Parameters
    ----------
    pressure : array_like
        Pressure between 1013.25 and 0.0037 hPa. [hPa]

    Notes
    -----
    Inverts Eq. (33a/b) of the 1976 standard for geopotential height, then applies Eq. (23).
    """
    p = np.asarray(pressure, dtype=float)
    if np.any((p > USSA1976_P0 * 1.2) | (p < USSA1976_BASE_P[-1])):
        raise ValueError("pressure must lie within 0.0037–1216 hPa for the 1976 standard atmosphere")
    # pressures decrease with layer index: find layer i with P_b[i] >= p > P_b[i+1]
    i = np.clip(np.searchsorted(-USSA1976_BASE_P, -p, side="right") - 1, 0, 6)
    lapse = USSA1976_LAPSE_RATE[i]
    t_b, p_b = USSA1976_BASE_T[i], USSA1976_BASE_P[i]
    with np.errstate(divide="ignore", invalid="ignore"):
        t_power = t_b * (p / p_b) ** (-np.where(lapse == 0, 1.0, lapse) / _USSA_GMR)
    return np.where(lapse == 0.0, t_b, t_power)


# ---------------------------------------------------------------------------------------
# Humidity
# ---------------------------------------------------------------------------------------
def saturation_vapour_pressure(temperature):
    r"""Saturation vapour pressure over liquid water.

    Parameters
    ----------
    temperature : array_like
        [K]

    Returns
    -------
    ndarray
        e_s. [hPa]

    Notes
    -----
    Bolton (1980), "The computation of equivalent potential temperature", Mon. Wea. Rev.
    108, 1046–1053, Eq. (10):

    .. math:: e_s = 6.112 \exp\left(\frac{17.67\, T_c}{T_c + 243.5}\right)

    with T_c in °C; within 0.1 % of the Wexler formulation for −35 °C ≤ T_c ≤ 35 °C.
    Used over water at all temperatures (supercooled below 0 °C), as is common practice
    for screening-level humidity.
    """
    tc = np.asarray(temperature) - 273.15
    return 6.112 * np.exp(17.67 * tc / (tc + 243.5))


def specific_humidity_from_vapour_pressure(vapour_pressure, pressure):
    """Specific humidity from water-vapour partial pressure.

    Parameters
    ----------
    vapour_pressure : array_like
        e. [hPa]
    pressure : array_like
        Total pressure p. [hPa]

    Returns
    -------
    ndarray
        q = ε e / (p − (1 − ε) e). [kg kg⁻¹]   (e.g. Wallace & Hobbs 2006, Eq. 3.57a with w→q)
    """
    e = np.asarray(vapour_pressure)
    return EPSILON * e / (np.asarray(pressure) - (1.0 - EPSILON) * e)


def vapour_pressure_from_specific_humidity(specific_humidity, pressure):
    """Water-vapour partial pressure from specific humidity. [hPa]

    Inverse of :func:`specific_humidity_from_vapour_pressure`:
    e = q p / (ε + (1 − ε) q).
    """
    q = np.asarray(specific_humidity)
    return q * np.asarray(pressure) / (EPSILON + (1.0 - EPSILON) * q)


def mixing_ratio_from_specific_humidity(specific_humidity):
    """Water-vapour mixing ratio w = q / (1 − q). [kg kg⁻¹]"""
    q = np.asarray(specific_humidity)
    return q / (1.0 - q)


def relative_humidity(temperature, specific_humidity, pressure):
    """Relative humidity over water, e / e_s(T). [1]

    Parameters
    ----------
    temperature : array_like
        [K]
    specific_humidity : array_like
        [kg kg⁻¹]
    pressure : array_like
        [hPa]
    """
    return vapour_pressure_from_specific_humidity(specific_humidity, pressure) / saturation_vapour_pressure(
        temperature
    )


def dewpoint_from_vapour_pressure(vapour_pressure):
    """Dew point from vapour pressure, the exact inverse of Bolton (1980) Eq. (10). [K]

    Parameters
    ----------
    vapour_pressure : array_like
        e > 0. [hPa]
    """
    x = np.log(np.asarray(vapour_pressure) / 6.112)
    return 273.15 + 243.5 * x / (17.67 - x)


def column_water_vapour(pressure, specific_humidity):
    r"""Total column water vapour of a profile (trapezoidal rule in pressure).

    Parameters
    ----------
    pressure : array_like
        Level pressures, surface first, level axis last. [hPa]
    specific_humidity : array_like
        Specific humidity on the same levels. [kg kg⁻¹]

    Returns
    -------
    ndarray
        W = (1/g) ∫ q dp. [kg m⁻²] (= precipitable water in mm)

    Notes
    -----
    Hydrostatic column mass of vapour, W = g⁻¹ ∫ q dp (common practice; the same
    integral as MetPy's ``precipitable_water``), with g the standard gravity.
    """
    p = np.asarray(pressure)
    q = np.asarray(specific_humidity)
    dp = (p[..., :-1] - p[..., 1:]) * 100.0
    return np.sum(0.5 * (q[..., :-1] + q[..., 1:]) * dp, axis=-1) / GRAVITY


def geopotential_height(pressure, temperature, specific_humidity=None, surface_height=0.0):
    r"""Geopotential height of each level by the hypsometric equation.

    Parameters
    ----------
    pressure : array_like
        Level pressures, surface first. [hPa]
    temperature : array_like
        Level temperatures. [K]
    specific_humidity : array_like, optional
        Level specific humidity; virtual temperature is used when given. [kg kg⁻¹]
    surface_height : array_like
        Geopotential height of level 0. [m]

    Returns
    -------
    ndarray
        Geopotential height of each level. [m]

    Notes
    -----
    Hypsometric equation (Wallace & Hobbs 2006, Eq. 3.29):

    .. math:: Z_2 - Z_1 = \frac{R_d \bar T_v}{g_0} \ln\frac{p_1}{p_2}

    with the layer-mean virtual temperature T_v = T (1 + 0.608 q) taken as the mean of
    the two levels.
    """
    p = np.asarray(pressure, dtype=float)
    t = np.asarray(temperature, dtype=float)
    if specific_humidity is not None:
        t = t * (1.0 + (1.0 / EPSILON - 1.0) * np.asarray(specific_humidity))
    tv_layer = 0.5 * (t[..., :-1] + t[..., 1:])
    dz = R_DRY_AIR * tv_layer / GRAVITY * np.log(p[..., :-1] / p[..., 1:])
    z0 = np.broadcast_to(np.asarray(surface_height, dtype=float), dz.shape[:-1])[..., None]
    return np.concatenate([z0, z0 + np.cumsum(dz, axis=-1)], axis=-1)


# ---------------------------------------------------------------------------------------
# Profile builder
# ---------------------------------------------------------------------------------------
class Profile(NamedTuple):
    """Levels of an atmospheric column, surface first, level axis last.

    pressure [hPa], temperature [K], specific_humidity [kg kg⁻¹]
    """

    pressure: np.ndarray
    temperature: np.ndarray
    specific_humidity: np.ndarray


#: Documented assumptions of :func:`profile_from_surface`
DEFAULT_LEVELS = 41
DEFAULT_TOP_PRESSURE = 10.0  # [hPa] model top; the window channels see little above it
DEFAULT_LAPSE_RATE = 0.0065  # [K m⁻¹] tropospheric lapse rate of the 1976 standard (Table 4)
DEFAULT_TROPOPAUSE_T = 210.0  # [K] one tropopause temperature between tropical (~195 K) and
#                               mid-latitude (~217 K) values (common practice, from memory)
DEFAULT_HUMIDITY_EXPONENT = 3.0  # λ in q = q0 (p/ps)^λ (Smith 1966, J. Appl. Meteor. 5, 726; λ≈3 typical, from memory)
STRATOSPHERE_Q = 3.0e-6  # [kg kg⁻¹] floor above the tropopause (~5 ppmv, common practice)


def profile_from_surface(
    t_air,
    tcwv,
    surface_pressure=1013.25,
    n_levels=DEFAULT_LEVELS,
    top_pressure=DEFAULT_TOP_PRESSURE,
    lapse_rate=DEFAULT_LAPSE_RATE,
    tropopause_temperature=DEFAULT_TROPOPAUSE_T,
    humidity_exponent=DEFAULT_HUMIDITY_EXPONENT,
    dtype=np.float64,
):
    r"""Per-pixel profiles from a few surface numbers.

    Parameters
    ----------
    t_air : array_like
        Near-surface air temperature. [K]
    tcwv : array_like
        Total column water vapour the profile must hold. [kg m⁻²]
    surface_pressure : array_like
        [hPa]
    n_levels, top_pressure
        Vertical grid: ``n_levels`` (≥ 2) levels equally spaced in pressure from the surface
        to the model top ``top_pressure`` [hPa].
    lapse_rate : float
        Tropospheric lapse rate. [K m⁻¹]
    tropopause_temperature : float
        Temperature held constant above the tropopause. [K]
    humidity_exponent : float
        λ of the humidity shape q = q₀ (p/p_s)^λ. [1]
    dtype : numpy dtype
        Floating type of the result (float32 halves memory for large scenes).

    Returns
    -------
    Profile
        Arrays of shape ``broadcast(t_air, tcwv, surface_pressure).shape + (n_levels,)``.

    Notes
    -----
    Assumptions (documented, and the same for every pixel):

    * Temperature falls with a constant lapse rate Γ from ``t_air`` until it reaches the
      tropopause temperature, then stays there (where ``t_air`` is already colder than the
      tropopause value, the column is isothermal at ``t_air``). In pressure coordinates a constant lapse
      rate is T = T_air (p/p_s)^{R_d Γ / g} (hydrostatic balance; Wallace & Hobbs 2006,
      Sec. 3.2).
    * Specific humidity follows q = q₀ (p/p_s)^λ (Smith 1966), scaled so the column
      equals ``tcwv``, limited to saturation over water (Bolton 1980) and to a
      stratospheric value above the tropopause. Where the saturation cap bites, the
      remaining levels are scaled up again (two fixed-point passes), so the column matches
      ``tcwv`` unless the air is too cold to hold it: then the column falls short (the scene
      validation warns of such pixels).
    """
    shape = np.broadcast_shapes(np.shape(t_air), np.shape(tcwv), np.shape(surface_pressure))
    flat = [np.broadcast_to(np.asarray(v, dtype=dtype), shape).reshape(-1) for v in (t_air, tcwv, surface_pressure)]
    p, t, q = profile_levels_first(
        *flat, n_levels, top_pressure, lapse_rate, tropopause_temperature, humidity_exponent, dtype
    )
    return Profile(*(np.ascontiguousarray(a.T).reshape(shape + (n_levels,)) for a in (p, t, q)))


def profile_levels_first(
    t_air,
    tcwv,
    surface_pressure,
    n_levels=DEFAULT_LEVELS,
    top_pressure=DEFAULT_TOP_PRESSURE,
    lapse_rate=DEFAULT_LAPSE_RATE,
    tropopause_temperature=DEFAULT_TROPOPAUSE_T,
    humidity_exponent=DEFAULT_HUMIDITY_EXPONENT,
    dtype=np.float64,
):
    """:func:`profile_from_surface` for 1-D pixel vectors, laid out (level, pixel).

    The hot path of the clear-sky simulation works level-major so that every element-wise
    operation runs along long contiguous pixel rows. Same assumptions and units as
    :func:`profile_from_surface`; returns (pressure, temperature, specific humidity), each
    of shape (n_levels, n_pixels). :func:`physics.fused.dispatch` picks the implementation
    (float32: the compiled kernel of the same formulas; otherwise the numpy reference).
    """
    return fused.dispatch(dtype, _profile_levels_first_compiled, _profile_levels_first_numpy, t_air, tcwv,
                          surface_pressure, n_levels, top_pressure, lapse_rate, tropopause_temperature,
                          humidity_exponent, dtype)


def _profile_levels_first_compiled(t_air, tcwv, surface_pressure, n_levels, top_pressure, lapse_rate,
                                   tropopause_temperature, humidity_exponent, dtype):
    """:func:`profile_levels_first` by the compiled float32 kernel (``dtype`` is float32 here)."""
    return fused.profile(t_air, tcwv, surface_pressure,
                         np.linspace(1.0, 0.0, n_levels), top_pressure, R_DRY_AIR * lapse_rate / GRAVITY,
                         tropopause_temperature, humidity_exponent, STRATOSPHERE_Q, STRATOSPHERE_Q * 0.1)


def _profile_levels_first_numpy(t_air, tcwv, surface_pressure, n_levels, top_pressure, lapse_rate,
                                tropopause_temperature, humidity_exponent, dtype):
    """:func:`profile_levels_first` by numpy, the reference implementation."""
    f = np.dtype(dtype).type
    t_air = np.asarray(t_air, dtype=dtype)
    tcwv = np.asarray(tcwv, dtype=dtype)
    ps = np.asarray(surface_pressure, dtype=dtype)
    sigma = np.linspace(1.0, 0.0, n_levels, dtype=dtype)[:, None]
    top = f(top_pressure)
    p = top + (ps - top) * sigma
    log_ratio = np.log(p / ps)
    t = np.exp(log_ratio * f(R_DRY_AIR * lapse_rate / GRAVITY))
    t *= t_air
    # a surface colder than the tropopause value (polar winter) keeps its own temperature aloft
    trop_t = np.minimum(f(tropopause_temperature), t_air)
    troposphere = (t > trop_t) | (trop_t >= t_air)  # an isothermal polar column has no stratospheric cap
    np.maximum(t, trop_t, out=t)
    q_sat = specific_humidity_from_vapour_pressure(saturation_vapour_pressure(t), p)
    q_sat = np.where(troposphere, q_sat, np.minimum(q_sat, f(STRATOSPHERE_Q)))
    shape_q = np.exp(log_ratio * f(humidity_exponent))
    dp = (p[:-1] - p[1:]) * f(100.0 / GRAVITY)

    def column(qv):
        return np.sum(f(0.5) * (qv[:-1] + qv[1:]) * dp, axis=0)

    scale = tcwv / column(shape_q)
    for _ in range(2):
        q = np.minimum(shape_q * scale, q_sat)
        w = column(q)
        scale = scale * np.where(w > 0, tcwv / np.where(w > 0, w, f(1.0)), f(1.0))
    q = np.minimum(shape_q * scale, q_sat)
    np.maximum(q, f(STRATOSPHERE_Q * 0.1), out=q)
    return p, t, q
