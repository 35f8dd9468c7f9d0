r"""Single-layer grey cloud: forward model and inversion of emissivity and optical depth.

A thin cloud at pressure p_c that absorbs and emits like a grey body (the same absorption
optical depth in every window channel) and does not reflect changes the top-of-atmosphere
radiance of each channel to

.. math:: L = (1 - \varepsilon) L_{clr} + \varepsilon L_{opq}(p_c),
          \qquad \varepsilon = 1 - e^{-\tau/\mu}

where L_clr is the clear-sky radiance and L_opq(p_c) the radiance an opaque black surface at
p_c (at the air temperature there) gives at the top, seen through the atmosphere above it
(physics.transfer returns it for every level). This is the standard effective-emissivity
cloud model of infrared sounding (e.g. Smith & Platt 1978, J. Appl. Meteor. 17, 1796;
Menzel, Smith & Stewart 1983, J. Clim. Appl. Meteor. 22, 377), with ε the slant emissivity.

Inversion per channel: ε = (L_obs − L_clr)/(L_opq − L_clr), then the vertical absorption
optical depth τ = −μ ln(1 − ε).

Cloud-top choices
-----------------
fixed   a pressure given by the user;
opaque  the level where L_opq equals the observation in a reference channel: the cloud-top
        pressure of a thick (ε = 1) cloud. The reference channel is black there by
        construction, so such pixels get status ``opaque`` and τ only as a lower bound;
grey    the level where two window channels give the same emissivity, i.e. where the ratio
        of their cloud signals equals the ratio of (L_opq − L_clr): the radiance-ratio idea
        of Smith & Platt (1978) and Menzel et al. (1983), applied to a grey cloud. Where that
        two-channel problem is ill-conditioned (no crossing, or a top-pressure uncertainty
        beyond a limit), the opaque level is used instead (status ``opaque``).

Beyond absorption: scattering reduces the infrared extinction that absorption sees. The
similarity relation τ_abs ≈ (1 − ω₀ g) τ_ext (van de Hulst 1974, J. Atmos. Sci. 31, 2077;
used for infrared cloud emissivity e.g. by Parol et al. 1991, J. Appl. Meteor. 30, 973)
gives the extinction optical depth from the retrieved absorption optical depth.

Array layout: channel axis last, level axis before it: (..., n_levels, n_ch); pressures
(..., n_levels) surface first.
"""
from typing import NamedTuple

import numpy as np

#: Inversion status codes (values of ``CloudRetrieval.status``)
STATUS_INVERTED = 0  # a finite emissivity in (0, 1) and its optical depth
STATUS_OPAQUE = 1  # ε within noise of 1: τ is reported as a lower bound (τ at ε = eps_max)
STATUS_BEYOND_OPAQUE = 2  # ε > 1 beyond noise: the cloud must be higher/colder than assumed
STATUS_WARMER_THAN_CLEAR = 3  # observation warmer than clear sky: no cloud signal to invert
STATUS_ILL_CONDITIONED = 4  # L_opq ≈ L_clr at the assumed top: emissivity undetermined
STATUS_NOT_CLOUDY = 5  # pixel not screened as cloud-affected; no inversion attempted
STATUS_NAMES = ("inverted", "opaque", "beyond_opaque", "warmer_than_clear", "ill_conditioned", "not_cloudy")


def slant_emissivity(optical_depth, mu):
    """Slant emissivity of a grey non-scattering layer, ε = 1 − exp(−τ/μ). [1]

    Parameters
    ----------
    optical_depth : array_like
        Vertical absorption optical depth τ ≥ 0. [1]
    mu : array_like
        Cosine of the viewing zenith angle. [1]

    Notes
    -----
    Beer–Lambert–Bouguer transmission along the slant path; emissivity = absorptivity
    (Kirchhoff) for a non-scattering layer.
    """
    return -np.expm1(-np.asarray(optical_depth) / np.asarray(mu))


def optical_depth_from_emissivity(emissivity, mu):
    """Vertical absorption optical depth from slant emissivity, τ = −μ ln(1 − ε). [1]

    Inverse of :func:`slant_emissivity`; requires 0 ≤ ε < 1 (returns inf at ε = 1).
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        return -np.asarray(mu) * np.log1p(-np.asarray(emissivity))


def grey_cloud_radiance(clear_radiance, opaque_radiance, optical_depth, mu):
    """Top-of-atmosphere radiance with a single grey cloud.

    Parameters
    ----------
    clear_radiance : array_like (..., n_ch)
        Clear-sky radiance. [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹]
    opaque_radiance : array_like (..., n_ch)
        Radiance of an opaque black cloud at the cloud top. [same unit]
    optical_depth : array_like (...)
        Vertical absorption optical depth of the cloud. [1]
    mu : array_like (...)
        Cosine of the viewing zenith angle. [1]

    Returns
    -------
    ndarray (..., n_ch)
        (1 − ε) L_clr + ε L_opq with ε = 1 − exp(−τ/μ). [same unit]
    """
    eps = slant_emissivity(np.asarray(optical_depth)[..., None], np.asarray(mu)[..., None])
    return (1.0 - eps) * np.asarray(clear_radiance) + eps * np.asarray(opaque_radiance)


def interpolate_levels(level_pressure, level_values, pressure):
    """Interpolate per-level values to a pressure, linearly in ln p.

    Parameters
    ----------
    level_pressure : array_like (..., n_levels)
        Pressures, surface first (decreasing). [hPa]
    level_values : array_like (..., n_levels, n_ch) or (..., n_levels)
        Values on the levels (any unit).
    pressure : array_like (...)
        Target pressure; clipped into the level range. [hPa]

    Returns
    -------
    ndarray (..., n_ch) or (...)
    """
    lp = np.asarray(level_pressure)
    vals = np.asarray(level_values)
    per_channel = vals.ndim == lp.ndim + 1
    p = np.clip(np.asarray(pressure, dtype=lp.dtype), lp[..., -1], lp[..., 0])
    # index k with lp[k] >= p > lp[k+1]
    below = np.sum(lp >= p[..., None], axis=-1) - 1
    k = np.clip(below, 0, lp.shape[-1] - 2)
    p0 = np.take_along_axis(lp, k[..., None], axis=-1)[..., 0]
    p1 = np.take_along_axis(lp, (k + 1)[..., None], axis=-1)[..., 0]
    w = np.log(p0 / p) / np.log(p0 / p1)
    if per_channel:
        kk = k[..., None, None]
        v0 = np.take_along_axis(vals, np.broadcast_to(kk, k.shape + (1, vals.shape[-1])), axis=-2)[..., 0, :]
        v1 = np.take_along_axis(vals, np.broadcast_to(kk + 1, k.shape + (1, vals.shape[-1])), axis=-2)[..., 0, :]
        return v0 + (v1 - v0) * w[..., None]
    v0 = np.take_along_axis(vals, k[..., None], axis=-1)[..., 0]
    v1 = np.take_along_axis(vals, (k + 1)[..., None], axis=-1)[..., 0]
    return v0 + (v1 - v0) * w


def opaque_top_pressure(observed, opaque_levels, level_pressure, top_limit=None):
    """Cloud-top pressure of an opaque cloud: where L_opq(p) equals the observation.

    Parameters
    ----------
    observed : array_like (...)
        Observed radiance in the reference channel. [radiance]
    opaque_levels : array_like (..., n_levels)
        L_opq on the levels in that channel. [radiance]
    level_pressure : array_like (..., n_levels)
        [hPa], surface first.
    top_limit : array_like (...), optional
        Lowest pressure the cloud may reach (e.g. the tropopause). [hPa]

    Returns
    -------
    pressure : ndarray (...)
        [hPa]; the lowest-altitude crossing found going up from the surface. Where the
        observation is colder than every level up to ``top_limit``, the coldest such level;
        where it is warmer than the surface level, the surface pressure.
    found : ndarray of bool (...)
        True where a crossing exists.

    Notes
    -----
    Going up level by level, the first layer across which L_opq passes from above to below
    the observation holds the top; the pressure is interpolated linearly in ln p. Taking
    the lowest crossing keeps low clouds under an inversion low (common practice).
    """
    obs = np.asarray(observed)[..., None]
    lo = np.asarray(opaque_levels)
    lp = np.asarray(level_pressure)
    allowed = np.ones(lp.shape, bool) if top_limit is None else lp >= np.asarray(top_limit)[..., None]
    cross = (lo[..., :-1] >= obs) & (lo[..., 1:] < obs) & allowed[..., 1:]
    found = cross.any(axis=-1)
    k = np.argmax(cross, axis=-1)
    l0 = np.take_along_axis(lo, k[..., None], axis=-1)[..., 0]
    l1 = np.take_along_axis(lo, (k + 1)[..., None], axis=-1)[..., 0]
    p0 = np.take_along_axis(lp, k[..., None], axis=-1)[..., 0]
    p1 = np.take_along_axis(lp, (k + 1)[..., None], axis=-1)[..., 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.clip((l0 - obs[..., 0]) / (l0 - l1), 0.0, 1.0)
    p_cross = np.exp(np.log(p0) + w * (np.log(p1) - np.log(p0)))
    # no crossing: colder than all allowed levels -> coldest allowed level; warmer -> surface
    masked = np.where(allowed, lo, np.inf)
    coldest = np.take_along_axis(lp, np.argmin(masked, axis=-1)[..., None], axis=-1)[..., 0]
    warmer = obs[..., 0] >= lo[..., 0]
    fallback = np.where(warmer, lp[..., 0], coldest)
    return np.where(found, p_cross, fallback), found


def grey_top_pressure(observed, clear, opaque_levels, level_pressure, sigma_observed, top_limit=None,
                      max_sigma_pressure=100.0):
    r"""Cloud-top pressure where two channels give the same emissivity (grey consistency).

    Parameters
    ----------
    observed, clear : array_like (..., 2)
        Observed and clear-sky radiances in the two channels. [radiance]
    opaque_levels : array_like (..., n_levels, 2)
        L_opq on the levels in both channels. [radiance]
    level_pressure : array_like (..., n_levels)
        [hPa], surface first.
    sigma_observed : array_like (..., 2)
        1-σ radiance uncertainty of the cloud signal L_obs − L_clr per channel. [radiance]
    top_limit : array_like (...), optional
        Lowest pressure allowed. [hPa]
    max_sigma_pressure : float
        Largest acceptable 1-σ uncertainty of the retrieved pressure. [hPa]

    Returns
    -------
    pressure : ndarray (...)
        [hPa] (NaN where not ``ok``)
    ok : ndarray of bool (...)
        False where the problem is ill-conditioned (no sign change of the emissivity
        difference, or a pressure uncertainty beyond ``max_sigma_pressure``).
    sigma_pressure : ndarray (...)
        Propagated 1-σ pressure uncertainty. [hPa]

    Notes
    -----
    With ε_i(p) = (L_obs,i − L_clr,i)/(L_opq,i(p) − L_clr,i), the grey assumption requires
    ε_1(p_c) = ε_2(p_c) (Smith & Platt 1978; Menzel et al. 1983 use the same ratio with
    CO₂-band channels). The difference g(p) = ε_1 − ε_2 is evaluated on all levels, the
    lowest sign change is interpolated in ln p, and its uncertainty follows from the
    emissivity uncertainties divided by |dg/d ln p|.
    """
    obs = np.asarray(observed)
    clr = np.asarray(clear)
    lo = np.asarray(opaque_levels)
    lp = np.asarray(level_pressure)
    sig = np.asarray(sigma_observed)
    denom = lo - clr[..., None, :]
    with np.errstate(divide="ignore", invalid="ignore"):
        eps = (obs - clr)[..., None, :] / denom
        sig_eps = np.hypot(sig[..., None, 0] / denom[..., 0], sig[..., None, 1] / denom[..., 1])
    g = eps[..., 0] - eps[..., 1]
    usable = (denom[..., 0] < 0) & (denom[..., 1] < 0) & np.isfinite(g)
    if top_limit is not None:
        usable &= lp >= np.asarray(top_limit)[..., None]
    usable[..., 0] = False  # the surface level is no cloud top
    both = usable[..., :-1] & usable[..., 1:]
    change = both & (np.sign(g[..., :-1]) != np.sign(g[..., 1:]))
    found = change.any(axis=-1)
    k = np.argmax(change, axis=-1)
    take = lambda a, i: np.take_along_axis(a, i[..., None], axis=-1)[..., 0]  # noqa: E731
    g0, g1 = take(g, k), take(g, k + 1)
    lp0, lp1 = np.log(take(lp, k)), np.log(take(lp, k + 1))
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.clip(g0 / (g0 - g1), 0.0, 1.0)
        slope = np.abs((g1 - g0) / (lp1 - lp0))  # |dg/d ln p|
        s_eps = take(sig_eps, k) * (1 - w) + take(sig_eps, k + 1) * w
        p = np.exp(lp0 + w * (lp1 - lp0))
        sigma_p = p * s_eps / slope
    ok = found & np.isfinite(sigma_p) & (sigma_p <= max_sigma_pressure)
    return np.where(ok, p, np.nan), ok, np.where(found, sigma_p, np.inf)


class CloudRetrieval(NamedTuple):
    """Per-pixel grey-cloud retrieval (all arrays shaped like the pixel grid).

    emissivity : (..., n_ch) slant emissivity per channel [1]
    emissivity_sigma : (..., n_ch) its 1-σ uncertainty [1]
    optical_depth : (...) vertical absorption optical depth, inverse-variance mean over channels [1]
    optical_depth_sigma : (...) its 1-σ uncertainty [1]
    top_pressure : (...) [hPa]
    top_temperature : (...) air temperature at the top [K]
    status : (...) int8, see STATUS_NAMES
    uncertain : (...) bool, relative optical-depth uncertainty above 100 %
    """

    emissivity: np.ndarray
    emissivity_sigma: np.ndarray
    optical_depth: np.ndarray
    optical_depth_sigma: np.ndarray
    top_pressure: np.ndarray
    top_temperature: np.ndarray
    status: np.ndarray
    uncertain: np.ndarray


def invert_grey_cloud(
    observed,
    clear,
    opaque_levels,
    level_pressure,
    level_temperature,
    mu,
    sigma_observed,
    sigma_clear,
    cloudy,
    method="opaque",
    fixed_pressure=None,
    reference=0,
    pair=(0, 1),
    top_limit=None,
    eps_max=0.99,
    noise_sigmas=2.0,
    max_sigma_pressure=100.0,
):
    r"""Invert a single-layer grey cloud per pixel.

    Parameters
    ----------
    observed, clear : array_like (..., n_ch)
        Observed and clear-sky radiances of the channels used. [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹]
    opaque_levels : array_like (..., n_levels, n_ch)
        Opaque-level radiances from the clear-sky transfer solution. [same unit]
    level_pressure, level_temperature : array_like (..., n_levels)
        [hPa], [K], surface first.
    mu : array_like (...)
        Cosine of the viewing zenith angle. [1]
    sigma_observed, sigma_clear : array_like (..., n_ch)
        1-σ radiance uncertainty of the observation (instrument noise) and of the clear-sky
        simulation. [same unit]
    cloudy : array_like of bool (...)
        Pixels to invert; others get ``not_cloudy``.
    method : {"fixed", "opaque", "grey"}
        Cloud-top choice (module docstring).
    fixed_pressure : array_like (...), optional
        Cloud-top pressure for ``method="fixed"``. [hPa]
    reference : int
        Channel index used to place an opaque top (the 11 µm channel in practice).
    pair : (int, int)
        Channel indices of the two channels for the grey-consistency top.
    top_limit : array_like (...), optional
        Highest cloud top allowed (lowest pressure), e.g. the tropopause. [hPa]
    eps_max : float
        Emissivities above this (and within noise of 1) are reported as opaque. [1]
    noise_sigmas : float
        How many σ beyond 1 (or above 0) an emissivity must lie to count as beyond opaque
        (or warmer than clear). [1]
    max_sigma_pressure : float
        Grey-consistency tops with a larger 1-σ pressure uncertainty fall back to opaque. [hPa]

    Returns
    -------
    CloudRetrieval

    Notes
    -----
    Error propagation (first order, independent errors): with D = L_opq − L_clr,
    σ_ε² = [σ_obs² + (1 − ε)² σ_clr²] / D², and σ_τ = μ σ_ε / (1 − ε). The pixel's τ is
    the inverse-variance weighted mean of the channel values with ε < eps_max.
    """
    obs = np.asarray(observed, dtype=float)
    clr = np.asarray(clear, dtype=float)
    lo = np.asarray(opaque_levels, dtype=float)
    lp = np.asarray(level_pressure, dtype=float)
    lt = np.asarray(level_temperature, dtype=float)
    mu = np.asarray(mu, dtype=float)
    s_obs = np.asarray(sigma_observed, dtype=float)
    s_clr = np.asarray(sigma_clear, dtype=float)
    cloudy = np.asarray(cloudy, dtype=bool)
    shape = obs.shape[:-1]

    if method == "fixed":
        if fixed_pressure is None:
            raise ValueError("method 'fixed' needs fixed_pressure [hPa]")
        p_top = np.broadcast_to(np.asarray(fixed_pressure, dtype=float), shape).copy()
        placed_opaque = np.zeros(shape, bool)
    elif method in ("opaque", "grey"):
        p_top, found = opaque_top_pressure(obs[..., reference], lo[..., reference], lp, top_limit)
        # where the opaque top holds, the reference channel is black there by construction:
        # the observation then bounds τ from below and says nothing more about it (the other
        # channels' emissivities at that top measure non-greyness, not optical depth)
        placed_opaque = found
        if method == "grey":
            i, j = pair
            sig_signal = np.hypot(s_obs, s_clr)
            p_grey, ok, _ = grey_top_pressure(
                obs[..., [i, j]], clr[..., [i, j]], lo[..., [i, j]], lp, sig_signal[..., [i, j]], top_limit,
                max_sigma_pressure,
            )
            p_top = np.where(ok, p_grey, p_top)
            placed_opaque = found & ~ok
    else:
        raise ValueError(f"unknown cloud-top method {method!r}; use 'fixed', 'opaque' or 'grey'")
    p_top = np.clip(p_top, lp[..., -1], lp[..., 0])

    l_opq = interpolate_levels(lp, lo, p_top)
    t_top = interpolate_levels(lp, lt, p_top)
    d = l_opq - clr
    with np.errstate(divide="ignore", invalid="ignore"):
        eps = (obs - clr) / d
        s_eps = np.sqrt(s_obs**2 + (1.0 - np.clip(eps, 0, 1)) ** 2 * s_clr**2) / np.abs(d)
    mu_c = mu[..., None]
    conditioned = np.abs(d) > noise_sigmas * np.hypot(s_obs, s_clr)
    opaque_ch = (eps >= eps_max) & (eps <= 1.0 + noise_sigmas * s_eps)
    beyond_ch = eps > 1.0 + noise_sigmas * s_eps
    warmer_ch = eps < -noise_sigmas * s_eps
    valid = conditioned & (eps < eps_max) & ~warmer_ch
    eps_c = np.clip(eps, 0.0, eps_max)
    with np.errstate(divide="ignore", invalid="ignore"):
        tau_ch = optical_depth_from_emissivity(eps_c, mu_c)
        s_tau_ch = mu_c * s_eps / (1.0 - eps_c)
        wts = np.where(valid, 1.0 / np.maximum(s_tau_ch, 1e-6) ** 2, 0.0)
        tau = np.sum(wts * np.where(valid, tau_ch, 0.0), axis=-1) / np.sum(wts, axis=-1)
        s_tau = 1.0 / np.sqrt(np.sum(wts, axis=-1))
    n_valid = valid.sum(axis=-1)
    tau_opaque = optical_depth_from_emissivity(eps_max, mu)

    status = np.full(shape, STATUS_INVERTED, dtype=np.int8)
    any_cond = conditioned.any(axis=-1)
    all_opaque = (opaque_ch | beyond_ch | ~conditioned).all(axis=-1) & (opaque_ch.any(axis=-1))
    status = np.where(all_opaque | (placed_opaque & conditioned[..., reference]), STATUS_OPAQUE, status)
    status = np.where((n_valid == 0) & beyond_ch.any(axis=-1) & ~opaque_ch.any(axis=-1), STATUS_BEYOND_OPAQUE, status)
    status = np.where((n_valid == 0) & warmer_ch.any(axis=-1) & ~opaque_ch.any(axis=-1)
                      & ~beyond_ch.any(axis=-1), STATUS_WARMER_THAN_CLEAR, status)
    status = np.where(~any_cond, STATUS_ILL_CONDITIONED, status)
    status = np.where((n_valid == 0) & (status == STATUS_INVERTED), STATUS_ILL_CONDITIONED, status)
    status = np.where(cloudy, status, STATUS_NOT_CLOUDY).astype(np.int8)

    tau = np.where(status == STATUS_OPAQUE, tau_opaque, tau)
    s_tau = np.where(status == STATUS_OPAQUE, np.inf, s_tau)
    keep = (status == STATUS_INVERTED) | (status == STATUS_OPAQUE)
    tau = np.where(keep, tau, np.nan)
    s_tau = np.where(keep, s_tau, np.nan)
    show_eps = cloudy[..., None] & np.isfinite(eps) & conditioned
    return CloudRetrieval(
        np.where(show_eps, eps, np.nan),
        np.where(show_eps, s_eps, np.nan),
        tau,
        s_tau,
        np.where(cloudy, p_top, np.nan),
        np.where(cloudy, t_top, np.nan),
        status,
        keep & ~(s_tau <= tau),
    )


def extinction_optical_depth(absorption_optical_depth, single_scattering_albedo, asymmetry):
    r"""Extinction optical depth implied by an absorption optical depth (similarity relation).

    Parameters
    ----------
    absorption_optical_depth : array_like
        Effective absorption optical depth τ_abs. [1]
    single_scattering_albedo : array_like
        ω₀ of the cloud particles in the window. [1]
    asymmetry : array_like
        Asymmetry parameter g. [1]

    Returns
    -------
    ndarray
        τ_ext = τ_abs / (1 − ω₀ g). [1]

    Notes
    -----
    Similarity relation for the effective absorption of a scattering layer (van de Hulst
    1974; e.g. Parol et al. 1991, J. Appl. Meteor. 30, 973, who use τ_abs = (1 − ω₀ g) τ_ext
    for cirrus in the split window).
    """
    return np.asarray(absorption_optical_depth) / (
        1.0 - np.asarray(single_scattering_albedo) * np.asarray(asymmetry)
    )
