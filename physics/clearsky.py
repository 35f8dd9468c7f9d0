"""Clear-sky channel radiances and brightness temperatures of pixel columns.

Ties the pieces together for one block of pixels: profile → channel-effective layer optical
depths (physics.absorption) → band-corrected Planck radiances of levels and surface
(physics.channels) → Schwarzschild solver (physics.transfer). No I/O; callers chunk large
scenes and call :func:`simulate_clear_sky` per chunk (see :func:`simulate_clear_sky_chunked`).
"""
from typing import NamedTuple

import numpy as np

from . import fused
from .absorption import layer_optical_depth_level_major
from .constants import C1_RADIANCE, C2_CM_K
from .transfer import upwelling_level_major


class ClearSky(NamedTuple):
    """Clear-sky simulation of a block of pixels.

    radiance : (..., n_ch) top-of-atmosphere radiance [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹]
    brightness_temperature : (..., n_ch) [K]
    level_transmittance : (..., n_levels, n_ch) slant level-to-space transmittance [1], or None
    opaque_radiance : (..., n_levels, n_ch) TOA radiance of an opaque black surface at each level
        [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹], or None
    surface_transmittance : (..., n_ch) slant surface-to-space transmittance [1]
    """

    radiance: np.ndarray
    brightness_temperature: np.ndarray
    level_transmittance: np.ndarray
    opaque_radiance: np.ndarray
    surface_transmittance: np.ndarray


def _channel_constants(channels, f):
    nu = np.array([c.central_wavenumber for c in channels], dtype=f)
    a = np.array([c.band_a for c in channels], dtype=f)
    b = np.array([c.band_b for c in channels], dtype=f)
    return nu, a, b


def channel_planck(channels, temperature, channel_axis=-1):
    """Band-corrected channel radiance of every channel at ``temperature``.

    Parameters
    ----------
    channels : sequence of Channel
    temperature : array_like
        [K]
    channel_axis : {-1, 0, 1}
        Where the channel axis goes: last (``temperature.shape + (n_ch,)``, the public
        layout), first (``(n_ch,) + temperature.shape``, channel-major) or second
        (``temperature.shape[:1] + (n_ch,) + temperature.shape[1:]``, the level-major hot path).

    Returns
    -------
    ndarray
        [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹]

    Notes
    -----
    Planck's law as in :func:`physics.planck.planck_radiance` evaluated at the channel's
    effective temperature a + bT and centroid wavenumber, with the constants hoisted.
    """
    t = np.asarray(temperature)
    f = np.result_type(t, np.float32).type
    nu, a, b = _channel_constants(channels, f)
    if channel_axis == 0:
        expand = (slice(None),) + (None,) * t.ndim
        nu, a, b = nu[expand], a[expand], b[expand]
        t_eff = a + b * t
    elif channel_axis == 1:
        expand = (None, slice(None)) + (None,) * (t.ndim - 1)
        nu, a, b = nu[expand], a[expand], b[expand]
        t_eff = a + b * t[:, None]
    else:
        t_eff = a + b * t[..., None]
    x = np.expm1((f(C2_CM_K) * nu) / t_eff)
    return (f(C1_RADIANCE) * nu**3) / x


def channel_brightness_temperature(channels, radiance, channel_axis=-1):
    """Inverse of :func:`channel_planck`: channel radiance → brightness temperature [K]."""
    from .planck import brightness_temperature

    r = np.asarray(radiance)
    f = np.result_type(r, np.float32).type
    nu, a, b = _channel_constants(channels, f)
    if channel_axis == 0:
        expand = (slice(None),) + (None,) * (r.ndim - 1)
        nu, a, b = nu[expand], a[expand], b[expand]
    return (brightness_temperature(nu, r) - a) / b


def simulate_clear_sky(profile, t_skin, emissivity, sat_zenith, channels, coefficients, levels=True):
    """Simulate clear-sky top-of-atmosphere radiances for pixel columns with given profiles.

    Parameters
    ----------
    profile : physics.atmosphere.Profile
        Level pressure [hPa], temperature [K], specific humidity [kg kg⁻¹]; (..., n_levels),
        surface first.
    t_skin : array_like (...)
        Surface skin temperature. [K]
    emissivity : array_like (..., n_ch)
        Surface emissivity per channel. [1]
    sat_zenith : array_like (...)
        Viewing (satellite) zenith angle at the pixel, 0 ≤ θ < 90. [deg]
    channels : sequence of Channel
    coefficients : physics.absorption.ChannelCoefficients
        For the same channels, in the same order.
    levels : bool
        Return the per-level transmittance and opaque-level radiance (needed by the
        cloud inversion); False saves memory and time.

    Returns
    -------
    ClearSky
        In the public layout: (..., n_ch) and (..., n_levels, n_ch).
    """
    p = np.asarray(profile[0])
    lead = np.broadcast_shapes(p.shape[:-1], np.shape(t_skin), np.shape(emissivity)[:-1], np.shape(sat_zenith))
    n_lev = p.shape[-1]
    dtype = np.result_type(p, np.float32)
    n_pix = int(np.prod(lead, dtype=np.int64))

    def levels_first(a):
        return np.ascontiguousarray(np.broadcast_to(np.asarray(a, dtype=dtype), lead + (n_lev,)).reshape(n_pix, n_lev).T)

    def flat(a, extra=()):
        return np.broadcast_to(np.asarray(a, dtype=dtype), lead + extra).reshape((n_pix,) + extra)

    res = simulate_channel_major(
        *(levels_first(a) for a in profile),
        flat(t_skin),
        np.ascontiguousarray(flat(emissivity, (len(channels),)).T),
        flat(sat_zenith),
        channels,
        coefficients,
        levels,
    )
    n_ch = len(channels)

    def back(a):
        return a.T.reshape(lead + (n_ch,))

    def back_levels(a):
        return None if a is None else a.transpose(2, 1, 0).reshape(lead + (n_lev, n_ch))

    return ClearSky(back(res.radiance), back(res.brightness_temperature), back_levels(res.level_transmittance),
                    back_levels(res.opaque_radiance), back(res.surface_transmittance))


def simulate_channel_major(pressure, temperature, specific_humidity, t_skin, emissivity, sat_zenith, channels,
                           coefficients, levels=True):
    """Hot path of the clear-sky simulation on level-first / channel-major arrays.

    Parameters
    ----------
    pressure, temperature, specific_humidity : ndarray (n_levels, n_pix)
        [hPa], [K], [kg kg⁻¹], surface first.
    t_skin : ndarray (n_pix,)
        [K]
    emissivity : ndarray (n_ch, n_pix)
        [1]
    sat_zenith : ndarray (n_pix,)
        [deg]
    channels, coefficients, levels
        As in :func:`simulate_clear_sky`.

    Returns
    -------
    ClearSky
        Channel-major: (n_ch, n_pix) and (n_ch, n_levels, n_pix).

    Notes
    -----
    :func:`physics.fused.dispatch` picks the implementation: float32 input the compiled
    kernel of the same formulas, otherwise the numpy reference.
    """
    dtype = np.result_type(pressure, temperature, specific_humidity, np.float32)
    return fused.dispatch(dtype, _simulate_compiled, _simulate_numpy, pressure, temperature, specific_humidity,
                          t_skin, emissivity, sat_zenith, channels, coefficients, levels)


def _simulate_compiled(pressure, temperature, specific_humidity, t_skin, emissivity, sat_zenith, channels,
                       coefficients, levels):
    """:func:`simulate_channel_major` by the compiled float32 kernel (physics.fused.simulate)."""
    f = np.float32
    inv_mu = f(1.0) / np.cos(np.deg2rad(np.asarray(sat_zenith, dtype=f)))
    nu, band_a, band_b = _channel_constants(channels, np.float64)
    rad, bt, surf_t, trans, opaque = fused.simulate(pressure, temperature, specific_humidity, t_skin, emissivity,
                                                    inv_mu, nu, band_a, band_b, coefficients.matrix(),
                                                    coefficients.continuum_t0, coefficients.line_pressure_exponent,
                                                    levels)
    if levels:
        trans, opaque = trans.transpose(1, 0, 2), opaque.transpose(1, 0, 2)
    return ClearSky(rad, bt, trans, opaque, surf_t)


def _simulate_numpy(pressure, temperature, specific_humidity, t_skin, emissivity, sat_zenith, channels,
                    coefficients, levels):
    """:func:`simulate_channel_major` by numpy, the reference implementation."""
    tau = layer_optical_depth_level_major(pressure, temperature, specific_humidity, coefficients)
    f = tau.dtype.type
    inv_mu = f(1.0) / np.cos(np.deg2rad(np.asarray(sat_zenith, dtype=tau.dtype)))
    b_lev = channel_planck(channels, temperature, channel_axis=1)
    b_s = channel_planck(channels, t_skin, channel_axis=0)
    rad, trans, opaque, _ = upwelling_level_major(tau, b_lev, b_s, emissivity.astype(tau.dtype, copy=False),
                                                  inv_mu, levels=levels)
    bt = channel_brightness_temperature(channels, rad, channel_axis=0)
    surf_t = np.exp(-np.sum(tau, axis=0) * inv_mu)
    if levels:  # channel-major views of the level-major arrays
        trans, opaque = trans.transpose(1, 0, 2), opaque.transpose(1, 0, 2)
    return ClearSky(rad, bt, trans, opaque, surf_t)
