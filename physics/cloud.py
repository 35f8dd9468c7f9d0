r"""Single cloud layer: forward model and inversion of top, emissivity and optical depth.

A cloud at pressure p_c that absorbs and emits and does not reflect changes the
top-of-atmosphere radiance of channel c to

.. math:: L_c = (1 - \varepsilon_c) L_{clr,c} + \varepsilon_c L_{opq,c}(p_c),
          \qquad \varepsilon_c = 1 - e^{-\beta_c \tau/\mu}

where L_clr is the clear-sky radiance, L_opq(p_c) the radiance an opaque black surface at p_c
(at the air temperature there) gives at the top, seen through the atmosphere above it
(physics.transfer returns it for every level), τ the vertical absorption optical depth in the
reference channel (11 µm) and β_c = τ_c/τ the ratio of the cloud's absorption optical depths.
This is the effective-emissivity cloud model of infrared sounding (e.g. Smith & Platt 1978,
J. Appl. Meteor. 17, 1796; Menzel, Smith & Stewart 1983, J. Clim. Appl. Meteor. 22, 377), with
ε the slant emissivity. A grey cloud is β = 1 in every channel; ice and water clouds have
ratios set by their particles' absorption (Parol et al. 1991, J. Appl. Meteor. 30, 973;
Inoue 1985, J. Meteor. Soc. Japan 63, 88 for the split window; values in the configuration).

Inversion per channel: ε_c = (L_obs − L_clr)/(L_opq − L_clr), then τ = −μ ln(1 − ε_c)/β_c.

Cloud-top choices
-----------------
fixed       a pressure given by the user;
opaque      the level where L_opq equals the observation in the reference channel: the top of a
            thick (ε = 1) cloud. The reference channel is black there by construction, so such
            pixels get status ``opaque`` and τ only as a lower bound;
consistent  the level where every channel's signal fits one cloud with the ratios β
            (:func:`consistent_top`, a χ² search over the levels where the problem is not
            degenerate, between the tropopause and the opaque top). Where the channels cannot
            fix the top (a single channel, or a top uncertainty beyond a limit) the pixel gets
            a stated assumed top and status ``top_assumed``.

Beyond absorption: scattering reduces the infrared extinction that absorption sees. The
similarity relation τ_abs ≈ (1 − ω₀ g) τ_ext (van de Hulst 1974, J. Atmos. Sci. 31, 2077;
used for infrared cloud emissivity e.g. by Parol et al. 1991) gives the extinction optical
depth from the retrieved absorption optical depth.

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
STATUS_TOP_ASSUMED = 6  # the channels could not fix the top: τ at the stated assumed top
STATUS_NAMES = ("inverted", "opaque", "beyond_opaque", "warmer_than_clear", "ill_conditioned", "not_cloudy",
                "top_assumed")
#: What each status means, in words (dashboard, CSV key, NetCDF comment)
STATUS_WORDS = {
    "inverted": "semi-transparent cloud; top and optical depth retrieved",
    "opaque": "top retrieved; the optical depth is only a lower bound",
    "beyond_opaque": "colder than an opaque cloud at the highest allowed top; no optical depth",
    "warmer_than_clear": "warmer than the clear sky; no cloud signal to invert",
    "ill_conditioned": "opaque-cloud and clear radiances too close; nothing to invert",
    "not_cloudy": "not screened as cloud; no inversion",
    "top_assumed": "the channels could not fix the top; optical depth at the assumed top",
}


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


def cloud_radiance(clear_radiance, opaque_radiance, optical_depth, mu, beta=None):
    """Top-of-atmosphere radiance with a single cloud layer.

    Parameters
    ----------
    clear_radiance : array_like (..., n_ch)
        Clear-sky radiance. [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹]
    opaque_radiance : array_like (..., n_ch)
        Radiance of an opaque black cloud at the cloud top. [same unit]
    optical_depth : array_like (...)
        Vertical absorption optical depth of the cloud in the reference channel. [1]
    mu : array_like (...)
        Cosine of the viewing zenith angle. [1]
    beta : array_like (..., n_ch) or (n_ch,), optional
        Absorption optical depth per channel over the reference channel's; None: grey. [1]

    Returns
    -------
    ndarray (..., n_ch)
        (1 − ε) L_clr + ε L_opq with ε = 1 − exp(−β τ/μ). [same unit]
    """
    tau = np.asarray(optical_depth)[..., None] * (1.0 if beta is None else np.asarray(beta))
    eps = slant_emissivity(tau, np.asarray(mu)[..., None])
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


def _take(a, i):
    """a[..., i] along the last axis with a per-pixel index i (...)."""
    return np.take_along_axis(a, i[..., None], axis=-1)[..., 0]


def consistent_top(signal, clear_to_opaque, level_pressure, sigma_observed, clear_covariance, beta, allowed,
                   reference=0, noise_sigmas=2.0, compiled=None):
    r"""Cloud-top pressure at which every channel's cloud signal fits one cloud layer (χ² search).

    Parameters
    ----------
    signal : array_like (..., n_ch)
        Cloud signal S = L_obs − L_clr per channel. [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹]
    clear_to_opaque : array_like (..., n_levels, n_ch)
        D(p) = L_opq(p) − L_clr on the levels. [same unit]
    level_pressure : array_like (..., n_levels)
        [hPa], surface first.
    sigma_observed : array_like (..., n_ch)
        1-σ of the observation (instrument noise, independent between channels). [same unit]
    clear_covariance : array_like (..., n_ch, n_ch)
        Covariance of the clear-sky radiance errors between channels. [same unit squared]
    beta : array_like (..., n_ch) or (n_ch,)
        Absorption optical depth of the cloud in each channel over that in the reference
        channel, β = τ_ch / τ_ref (1 in the reference channel; 1 everywhere for a grey cloud). [1]
    allowed : array_like of bool (..., n_levels)
        Levels where a top may lie (at or below the tropopause, above the surface level).
    reference : int
        Index of the reference channel (11 µm in practice).
    noise_sigmas : float
        How many σ count as "within the uncertainty" in the rejections below. [1]
    compiled : bool, optional
        Use the compiled loop (physics.cloud_kernel, the same computation pixel by pixel); None:
        where ``physics.fused.enabled()``. False: this numpy reference.

    Returns
    -------
    pressure : ndarray (...)
        Best top [hPa] (NaN where no level is usable).
    sigma_pressure : ndarray (...)
        Half the pressure span over which χ² stays within max(1, χ²_min) of its minimum,
        at least half a model layer [hPa] (inf where no level is usable). Two minima of similar
        depth give a wide span: the channels cannot tell the two tops apart.
    chi2_min : ndarray (...)
        χ² at the best level (inf where none is usable).
    usable : ndarray of bool (..., n_levels)
        Levels left after the rejections.

    Notes
    -----
    At each level the reference channel fixes the slant emissivity ε_ref = S_ref / D_ref, hence
    e^(−τ/μ) = 1 − ε_ref; a cloud with absorption ratios β then has ε_c = 1 − (1 − ε_ref)^β_c in
    channel c and gives the signal ε_c D_c. The residuals of the other channels,
    r_c = S_c − ε_c D_c, are weighed by their covariance, χ²(p) = rᵀ C_r⁻¹ r, smallest at the top:
    the radiance-ratio idea of Smith & Platt (1978, J. Appl. Meteor. 17, 1796) and Menzel et al.
    (1983, J. Clim. Appl. Meteor. 22, 377), written as a least-squares fit with non-grey ratios
    (as in the split-window analysis of Parol et al. 1991, J. Appl. Meteor. 30, 973).

    C_r = J C_clr Jᵀ + N diag(σ_obs²) Nᵀ, first order: a clear-sky error δ_c moves r_c by
    −(1 − ε_c) δ_c, and δ_ref moves it by s_c D_c (1 − ε_ref)/D_ref through ε_ref; an observation
    error moves r_c by itself and by −s_c D_c / D_ref. s_c = ∂ε_c/∂ε_ref is taken as the secant
    over ε_ref ± σ(ε_ref) (the derivative diverges at ε_ref → 1 when β < 1). The clear-sky errors
    of window channels are strongly correlated (a skin-temperature or water-vapour error moves
    them together), so C_clr matters: with the channels' errors taken as independent the
    spectral differences that fix the top would drown in σ's that mostly cancel.

    Levels are rejected where the problem is degenerate: D_ref not more negative than
    ``noise_sigmas`` times the σ of the signal (the opaque-cloud radiance is within the
    uncertainty of the clear one, so any ε fits a small signal), or ε_ref outside [0, 1] by more
    than ``noise_sigmas`` σ (a cloud emits no more than a black body, and no less than nothing).
    """
    s = np.asarray(signal, dtype=float)
    d = np.asarray(clear_to_opaque, dtype=float)
    lp = np.asarray(level_pressure, dtype=float)
    s_obs = np.asarray(sigma_observed, dtype=float)
    cov = np.asarray(clear_covariance, dtype=float)
    beta = np.broadcast_to(np.asarray(beta, dtype=float), s.shape)
    if compiled is None:
        from . import fused

        compiled = fused.enabled()
    if compiled:
        from . import cloud_kernel, fused

        lead = s.shape[:-1]
        n_lev, n_ch = d.shape[-2:]
        flat = lambda a, tail: np.broadcast_to(a, lead + tail).reshape((-1,) + tail)  # noqa: E731
        try:
            out = cloud_kernel.consistent_top(
                flat(s, (n_ch,)), flat(d, (n_lev, n_ch)), flat(lp, (n_lev,)), flat(s_obs, (n_ch,)),
                flat(cov, (n_ch, n_ch)), flat(beta, (n_ch,)), flat(np.asarray(allowed, bool), (n_lev,)),
                reference, noise_sigmas, REFINE_STEPS)
            return tuple(o.reshape(lead + o.shape[1:]) for o in out)
        except fused.Unavailable:
            pass  # warned once; the numpy reference below
    r = reference
    var_clr_r = cov[..., r, r]
    s_sig_r = np.sqrt(s_obs[..., r] ** 2 + var_clr_r)[..., None]
    chi2, eps_r, s_eps_r = _misfit(s, d, s_obs, cov, beta, r)
    d_r = d[..., r]
    usable = (np.asarray(allowed, bool) & (d_r < -noise_sigmas * s_sig_r) & np.isfinite(eps_r)
              & (eps_r <= 1.0 + noise_sigmas * s_eps_r) & (eps_r >= -noise_sigmas * s_eps_r))
    chi2 = np.where(usable & np.isfinite(chi2), chi2, np.inf)
    has = np.isfinite(chi2).any(axis=-1)
    k = np.argmin(chi2, axis=-1)
    x = np.log(lp)
    n_lev = x.shape[-1]
    # refine between the usable neighbours of the best level: D is linear in ln p between levels
    # (interpolate_levels), so χ² is evaluated on a fine grid there
    lo_k = np.where((k > 0) & np.isfinite(_take(chi2, np.maximum(k - 1, 0))), k - 1, k)
    hi_k = np.where((k < n_lev - 1) & np.isfinite(_take(chi2, np.minimum(k + 1, n_lev - 1))), k + 1, k)
    frac = np.linspace(0.0, 1.0, REFINE_STEPS)
    x_lo, x_hi = _take(x, lo_k), _take(x, hi_k)
    x_f = x_lo[..., None] + frac * (x_hi - x_lo)[..., None]  # (..., K)
    d_f = np.empty(x_f.shape + (s.shape[-1],))
    for j in range(REFINE_STEPS):
        d_f[..., j, :] = _interp_ln_p(x, d, x_f[..., j], lo_k, hi_k)
    chi2_f, _, _ = _misfit(s, d_f, s_obs, cov, beta, r)
    chi2_f = np.where(np.isfinite(chi2_f), chi2_f, np.inf)
    j = np.argmin(chi2_f, axis=-1)
    xs = _take(x_f, j)
    chi2_min = np.where(has, np.minimum(_take(chi2_f, j), _take(chi2, k)), np.inf)
    xs = np.where(_take(chi2_f, j) <= _take(chi2, k), xs, _take(x, k))
    threshold = chi2_min + np.maximum(1.0, chi2_min)
    lo, hi = _span(x, chi2, usable, np.where(has, threshold, 0.0))
    kk = np.clip(k, 1, n_lev - 2)
    layer = 0.5 * np.abs(_take(x, kk + 1) - _take(x, kk - 1))  # one model layer in ln p around the minimum
    sigma_x = np.maximum(0.5 * (hi - lo), 0.5 * layer)
    p = np.exp(xs)
    return (np.where(has, p, np.nan), np.where(has, p * sigma_x, np.inf), chi2_min, usable)


#: fine points between the neighbours of the best level (consistent_top)
REFINE_STEPS = 9


def _interp_ln_p(x, values, xt, lo_k, hi_k):
    """values (..., L, n_ch) at ln p = xt (...), linear in ln p between levels lo_k ≤ k ≤ hi_k."""
    mid = np.where(lo_k < hi_k, lo_k + 1, lo_k)  # the middle level when the bracket spans two layers
    xm = _take(x, mid)
    use_upper = (xt <= xm) & (hi_k > mid)  # pressure decreases with index: smaller ln p is higher up
    k0 = np.where(use_upper, mid, lo_k)
    k1 = np.where(use_upper, hi_k, mid)
    x0, x1 = _take(x, k0), _take(x, k1)
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(x1 != x0, (xt - x0) / (x1 - x0), 0.0)
    v0 = np.take_along_axis(values, k0[..., None, None], axis=-2)[..., 0, :]
    v1 = np.take_along_axis(values, k1[..., None, None], axis=-2)[..., 0, :]
    return v0 + (v1 - v0) * np.clip(w, 0.0, 1.0)[..., None]


def _misfit(s, d, s_obs, cov, beta, r):
    """χ² of the other channels' residuals for cloud tops with D = ``d`` (..., K, n_ch), and the
    reference emissivity and its σ there (consistent_top's notes)."""
    n_ch = s.shape[-1]
    d_r = d[..., r]
    var_clr_r = cov[..., r, r]
    with np.errstate(divide="ignore", invalid="ignore"):
        eps_r = s[..., None, r] / d_r
        s_eps_r = np.sqrt(s_obs[..., None, r] ** 2 + (1 - np.clip(eps_r, 0, 1)) ** 2 * var_clr_r[..., None]) / np.abs(d_r)
    trans = 1.0 - np.clip(eps_r, 0.0, 1.0)  # e^(−τ/μ) in the reference channel
    t_hi = np.clip(trans + s_eps_r, 0.0, 1.0)
    t_lo = np.clip(trans - s_eps_r, 0.0, 1.0)
    others = [c for c in range(n_ch) if c != r]
    m = len(others)
    shape_l = trans.shape
    if not m:
        return np.zeros(shape_l), eps_r, s_eps_r
    # residual r_i = S_c − ε_c D_c of each other channel c = others[i], and its sensitivities:
    # to the clear-sky error of c (−t_c), of the reference (g_i), to the reference's observation (h_i)
    resid, t_cs, g, h = [], [], [], []
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        span = t_hi - t_lo
        safe_span = np.where(span > 0, span, 1.0)
        for c in others:
            b = beta[..., None, c]
            t_c = trans**b
            d_c = d[..., c]
            secant = np.where(span > 0, (t_hi**b - t_lo**b) / safe_span, b)
            resid.append(s[..., None, c] - (1.0 - t_c) * d_c)
            t_cs.append(t_c)
            g.append(secant * d_c * trans / d_r)
            h.append(-secant * d_c / d_r)
        var_obs_r = s_obs[..., None, r] ** 2

        def cov_r(i, j):
            """C_r[i, j] = J C_clr Jᵀ + N diag(σ_obs²) Nᵀ with J, N sparse (one column each + the reference)."""
            ci, cj = others[i], others[j]
            out = (t_cs[i] * t_cs[j] * cov[..., None, ci, cj] - t_cs[i] * g[j] * cov[..., None, ci, r]
                   - g[i] * t_cs[j] * cov[..., None, r, cj] + g[i] * g[j] * var_clr_r[..., None]
                   + h[i] * h[j] * var_obs_r)
            if i == j:
                out = out + s_obs[..., None, ci] ** 2
            return out

        if m == 1:
            chi2 = resid[0] ** 2 / cov_r(0, 0)
        elif m == 2:
            a11, a22, a12 = cov_r(0, 0), cov_r(1, 1), cov_r(0, 1)
            det = a11 * a22 - a12 * a12
            chi2 = (a22 * resid[0] ** 2 - 2 * a12 * resid[0] * resid[1] + a11 * resid[1] ** 2) / det
        else:
            c_r = np.stack([np.stack([cov_r(i, j) for j in range(m)], -1) for i in range(m)], -2)
            res_v = np.stack(resid, -1)
            ok = np.all(np.isfinite(c_r), axis=(-2, -1)) & np.all(np.isfinite(res_v), axis=-1)
            c_r = np.where(ok[..., None, None], c_r, np.eye(m))
            res_v = np.where(ok[..., None], res_v, 0.0)
            chi2 = np.einsum("...i,...i->...", res_v, np.linalg.solve(c_r, res_v[..., None])[..., 0])
            chi2 = np.where(ok, chi2, np.inf)
    ok = np.isfinite(chi2) & (chi2 >= 0)
    return np.where(ok, chi2, np.inf), eps_r, s_eps_r


def _span(x, chi2, usable, threshold):
    """(lowest, highest) x where χ² ≤ threshold on usable levels, edges interpolated to the crossing."""
    inside = usable & (chi2 <= threshold[..., None])
    with np.errstate(invalid="ignore"):
        f = np.where(usable, chi2 - threshold[..., None], np.nan)
    f0, f1 = f[..., :-1], f[..., 1:]
    cross = usable[..., :-1] & usable[..., 1:] & np.isfinite(f0) & np.isfinite(f1) & ((f0 <= 0) != (f1 <= 0))
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.clip(f0 / (f0 - f1), 0.0, 1.0)
    xc = x[..., :-1] + w * (x[..., 1:] - x[..., :-1])
    cand = np.concatenate([np.where(inside, x, np.inf), np.where(cross, xc, np.inf)], axis=-1)
    lo = cand.min(axis=-1)
    cand = np.where(np.isinf(cand), -np.inf, cand)
    hi = cand.max(axis=-1)
    ok = np.isfinite(lo) & np.isfinite(hi)
    return np.where(ok, lo, 0.0), np.where(ok, hi, 0.0)


class CloudRetrieval(NamedTuple):
    """Per-pixel single-layer cloud retrieval (all arrays shaped like the pixel grid).

    emissivity : (..., n_ch) slant emissivity per channel [1]
    emissivity_sigma : (..., n_ch) its 1-σ uncertainty [1]
    optical_depth : (...) vertical absorption optical depth in the reference channel, inverse-
        variance mean of the channels' τ_ch / β_ch [1]
    optical_depth_sigma : (...) its 1-σ uncertainty, including that of the top [1]
    top_pressure : (...) [hPa]
    top_pressure_sigma : (...) its 1-σ uncertainty [hPa] (0 for a fixed top, inf where unknown)
    top_temperature : (...) air temperature at the top [K]
    status : (...) int8, see STATUS_NAMES
    uncertain : (...) bool, relative optical-depth uncertainty above 100 %
    chi2 : (...) misfit of the channels at the top (consistent top only; NaN otherwise) [1]
    """

    emissivity: np.ndarray
    emissivity_sigma: np.ndarray
    optical_depth: np.ndarray
    optical_depth_sigma: np.ndarray
    top_pressure: np.ndarray
    top_pressure_sigma: np.ndarray
    top_temperature: np.ndarray
    status: np.ndarray
    uncertain: np.ndarray
    chi2: np.ndarray


def _layer_spacing(lp, p):
    """Half the ln-p thickness of the model layer holding p, times p: a resolution floor [hPa]."""
    x = np.log(lp)
    k = np.clip(np.sum(lp >= p[..., None], axis=-1) - 1, 0, lp.shape[-1] - 2)
    return 0.5 * p * np.abs(_take(x, k) - _take(x, k + 1))


def invert_cloud(
    observed,
    clear,
    opaque_levels,
    level_pressure,
    level_temperature,
    mu,
    sigma_observed,
    sigma_clear,
    cloudy,
    beta=None,
    method="consistent",
    fixed_pressure=None,
    reference=0,
    top_limit=None,
    assumed_pressure=350.0,
    eps_max=0.99,
    noise_sigmas=2.0,
    max_sigma_pressure=100.0,
    clear_correlation=None,
):
    r"""Invert a single cloud layer per pixel: top pressure, emissivities, absorption optical depth.

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
    beta : array_like (..., n_ch) or (n_ch,), optional
        Absorption optical-depth ratios τ_ch / τ_ref of the cloud (module docstring); None: grey
        (all 1). [1]
    method : {"fixed", "opaque", "consistent"}
        Cloud-top choice (module docstring).
    fixed_pressure : array_like (...), optional
        Cloud-top pressure for ``method="fixed"``. [hPa]
    reference : int
        Channel index of the reference channel (β = 1; the 11 µm channel in practice).
    top_limit : array_like (...), optional
        Highest cloud top allowed (lowest pressure), e.g. the tropopause. [hPa]
    assumed_pressure : float or array_like (...)
        Top used where the consistent top cannot be fixed (status ``top_assumed``); clipped to
        the allowed range (between ``top_limit`` and the opaque top). [hPa]
    eps_max : float
        Reference emissivities above this (and within noise of 1) are reported as opaque. [1]
    noise_sigmas : float
        How many σ beyond 1 (or above 0) an emissivity must lie to count as beyond opaque
        (or warmer than clear); also the σ multiple of the degenerate-level rejection. [1]
    max_sigma_pressure : float
        Consistent tops with a larger 1-σ pressure uncertainty are not kept: the pixel gets the
        assumed top (status ``top_assumed``). [hPa]
    clear_correlation : array_like (..., n_ch, n_ch), optional
        Correlation of the clear-sky errors between channels (the consistent top); None:
        independent. [1]

    Returns
    -------
    CloudRetrieval

    Notes
    -----
    Per channel, ε_c = (L_obs − L_clr)/(L_opq(p_top) − L_clr) and τ_c = −μ ln(1 − ε_c)/β_c.
    Error propagation (first order, independent errors): with D = L_opq − L_clr,
    σ_ε² = [σ_obs² + (1 − ε)² σ_clr²] / D², σ_τ = μ σ_ε / ((1 − ε) β). The pixel's τ is the
    inverse-variance weighted mean of the channel values with ε < eps_max; its σ adds (in
    quadrature) half the change of the reference channel's τ between p_top ± σ_p.

    The reference channel decides the status where it carries a signal above its noise:
    ε_ref beyond 1 + noise → ``beyond_opaque`` (the cloud must be colder than the top allows;
    τ is not given), ε_ref ≥ eps_max → ``opaque`` (τ is a lower bound, its σ infinite),
    below −noise → ``warmer_than_clear``.
    """
    top = cloud_top(observed, clear, opaque_levels, level_pressure, sigma_observed, sigma_clear, beta, method,
                    fixed_pressure, reference, top_limit, assumed_pressure, noise_sigmas, max_sigma_pressure,
                    clear_correlation)
    return cloud_at_top(observed, clear, opaque_levels, level_pressure, level_temperature, mu, sigma_observed,
                        sigma_clear, cloudy, top, beta, reference, eps_max, noise_sigmas)


class CloudTop(NamedTuple):
    """A cloud-top choice per pixel (:func:`cloud_top`).

    pressure : (...) [hPa], within the level range
    sigma : (...) its 1-σ [hPa] (0 for a fixed top, inf for an assumed one)
    chi2 : (...) misfit of the channels at a consistent top (NaN otherwise) [1]
    assumed : (...) bool, the channels could not fix the top (status ``top_assumed``)
    """

    pressure: np.ndarray
    sigma: np.ndarray
    chi2: np.ndarray
    assumed: np.ndarray


def _as_arrays(observed, clear, opaque_levels, level_pressure, sigma_observed, sigma_clear, beta):
    """The common inputs of :func:`cloud_top` and :func:`cloud_at_top` as float arrays (β broadcast to
    the observations' shape, ones when None)."""
    obs = np.asarray(observed, dtype=float)
    beta = np.ones(obs.shape[-1]) if beta is None else np.asarray(beta, dtype=float)
    return (obs, np.asarray(clear, dtype=float), np.asarray(opaque_levels, dtype=float),
            np.asarray(level_pressure, dtype=float), np.asarray(sigma_observed, dtype=float),
            np.asarray(sigma_clear, dtype=float), np.broadcast_to(beta, obs.shape))


def cloud_top(observed, clear, opaque_levels, level_pressure, sigma_observed, sigma_clear, beta=None,
              method="consistent", fixed_pressure=None, reference=0, top_limit=None, assumed_pressure=350.0,
              noise_sigmas=2.0, max_sigma_pressure=100.0, clear_correlation=None, compiled=None):
    """The cloud-top choice of :func:`invert_cloud` (same parameters), as a :class:`CloudTop`
    (``compiled`` goes to :func:`consistent_top`)."""
    obs, clr, lo, lp, s_obs, s_clr, beta = _as_arrays(observed, clear, opaque_levels, level_pressure, sigma_observed,
                                                      sigma_clear, beta)
    shape, n_ch = obs.shape[:-1], obs.shape[-1]
    ref = reference
    chi2 = np.full(shape, np.nan)
    sigma_p = np.zeros(shape)
    assumed = np.zeros(shape, bool)

    if method == "fixed":
        if fixed_pressure is None:
            raise ValueError("method 'fixed' needs fixed_pressure [hPa]")
        p_top = np.broadcast_to(np.asarray(fixed_pressure, dtype=float), shape).copy()
    elif method in ("opaque", "consistent"):
        p_opq, found = opaque_top_pressure(obs[..., ref], lo[..., ref], lp, top_limit)
        p_top = p_opq
        sigma_p = _layer_spacing(lp, p_opq)
        if method == "consistent":
            allowed = np.ones(lp.shape, bool) if top_limit is None else lp >= np.asarray(top_limit)[..., None]
            allowed[..., 0] = False  # the surface level is no cloud top
            d = lo - clr[..., None, :]
            corr = np.eye(n_ch) if clear_correlation is None else np.asarray(clear_correlation, dtype=float)
            cov = corr * s_clr[..., :, None] * s_clr[..., None, :]
            p_c, s_c, chi2_c, _ = consistent_top(obs - clr, d, lp, s_obs, cov, beta, allowed, ref, noise_sigmas,
                                                  compiled)
            ok = np.isfinite(p_c) & (s_c <= max_sigma_pressure) & (n_ch > 1)
            lowest = lp[..., -1] if top_limit is None else np.asarray(top_limit, dtype=float)
            guess = np.clip(np.broadcast_to(np.asarray(assumed_pressure, dtype=float), shape),
                            np.broadcast_to(lowest, shape), p_opq)
            assumed = ~ok & found
            p_top = np.where(ok, p_c, np.where(assumed, guess, p_opq))
            sigma_p = np.where(ok, s_c, np.where(assumed, np.inf, sigma_p))
            chi2 = np.where(ok, chi2_c, np.nan)
    else:
        raise ValueError(f"unknown cloud-top method {method!r}; use 'fixed', 'opaque' or 'consistent'")
    p_top = np.clip(p_top, lp[..., -1], lp[..., 0])
    return CloudTop(p_top, sigma_p, chi2, assumed)


def cloud_tops(observed, clear, opaque_levels, level_pressure, level_temperature, sigma_observed, sigma_clear, betas,
               method="consistent", fixed_pressure=None, reference=0, top_limit=None, assumed_pressure=350.0,
               noise_sigmas=2.0, max_sigma_pressure=100.0, clear_correlation=None, compiled=False):
    """:func:`cloud_top` for several cloud optics at once, with the air temperature at each top.

    Parameters as :func:`invert_cloud`, except ``betas``: a sequence of absorption-ratio sets
    (each (n_ch,) or (..., n_ch); one per phase tried) and ``compiled``: True runs
    physics.cloud_kernel (the opaque top, the degenerate-level rejections and the ln p grid once
    per pixel, then one χ² search per β; per-level inputs read as float32), None where
    ``physics.fused.enabled()``, False (the default) this numpy reference.

    Returns
    -------
    list of (CloudTop, top temperature (...) [K]), one per entry of ``betas``
    """
    if compiled is None:
        from . import fused

        compiled = fused.enabled()
    if compiled and method in ("fixed", "opaque", "consistent") and not (method == "fixed" and fixed_pressure is None):
        from . import cloud_kernel, fused

        obs = np.asarray(observed)
        lead, n_ch = obs.shape[:-1], obs.shape[-1]
        lp = np.asarray(level_pressure)
        n_lev = lp.shape[-1]
        flat = lambda a, tail: np.broadcast_to(a, lead + tail).reshape((-1,) + tail)  # noqa: E731
        corr = np.eye(n_ch) if clear_correlation is None else clear_correlation
        limit = lp[..., -1] if top_limit is None else top_limit
        fixed = np.nan if fixed_pressure is None else fixed_pressure
        try:
            p, sp, chi2, assumed, tt = cloud_kernel.cloud_tops(
                flat(obs, (n_ch,)), flat(clear, (n_ch,)), flat(sigma_observed, (n_ch,)), flat(sigma_clear, (n_ch,)),
                flat(corr, (n_ch, n_ch)), flat(lp, (n_lev,)), flat(level_temperature, (n_lev,)),
                flat(opaque_levels, (n_lev, n_ch)), flat(limit, ()), [flat(b, (n_ch,)) for b in betas], method,
                flat(fixed, ()), flat(assumed_pressure, ()), reference, noise_sigmas, max_sigma_pressure,
                REFINE_STEPS)
            shape = lambda a: a.reshape(lead)  # noqa: E731
            return [(CloudTop(shape(p[j]), shape(sp[j]), shape(chi2[j]), shape(assumed[j])), shape(tt[j]))
                    for j in range(len(betas))]
        except fused.Unavailable:
            pass  # warned once; the numpy reference below
    out = []
    for beta in betas:
        top = cloud_top(observed, clear, opaque_levels, level_pressure, sigma_observed, sigma_clear, beta, method,
                        fixed_pressure, reference, top_limit, assumed_pressure, noise_sigmas, max_sigma_pressure,
                        clear_correlation, compiled=False)
        out.append((top, interpolate_levels(np.asarray(level_pressure, dtype=float),
                                            np.asarray(level_temperature, dtype=float), top.pressure)))
    return out


def cloud_at_top(observed, clear, opaque_levels, level_pressure, level_temperature, mu, sigma_observed, sigma_clear,
                 cloudy, top, beta=None, reference=0, eps_max=0.99, noise_sigmas=2.0, compiled=False):
    """Emissivities, optical depth and status at a chosen :class:`CloudTop` (:func:`invert_cloud`'s
    second half; parameters as there, ``beta`` may differ per pixel).

    ``compiled``: True runs physics.cloud_kernel (the same rules pixel by pixel; opaque-level
    radiances and level pressures and temperatures read as float32), None where
    ``physics.fused.enabled()``, False (the default) this
    numpy reference.
    """
    if compiled is None:
        from . import fused

        compiled = fused.enabled()
    if compiled:
        from . import cloud_kernel, fused

        obs = np.asarray(observed)
        lead, n_ch = obs.shape[:-1], obs.shape[-1]
        n_lev = np.shape(level_pressure)[-1]
        flat = lambda a, tail: np.broadcast_to(a, lead + tail).reshape((-1,) + tail)  # noqa: E731
        b = np.ones(n_ch) if beta is None else beta
        try:
            out = cloud_kernel.cloud_at_top(
                flat(obs, (n_ch,)), flat(clear, (n_ch,)), flat(sigma_observed, (n_ch,)), flat(sigma_clear, (n_ch,)),
                flat(level_pressure, (n_lev,)), flat(level_temperature, (n_lev,)),
                flat(opaque_levels, (n_lev, n_ch)), flat(mu, ()), flat(b, (n_ch,)),
                [flat(np.asarray(f), ()) for f in top], flat(np.asarray(cloudy, bool), ()), reference, eps_max,
                noise_sigmas)
            return CloudRetrieval(*(o.reshape(lead + o.shape[1:]) for o in out))
        except fused.Unavailable:
            pass  # warned once; the numpy reference below
    obs, clr, lo, lp, s_obs, s_clr, beta = _as_arrays(observed, clear, opaque_levels, level_pressure, sigma_observed,
                                                      sigma_clear, beta)
    lt = np.asarray(level_temperature, dtype=float)
    mu = np.asarray(mu, dtype=float)
    cloudy = np.asarray(cloudy, dtype=bool)
    shape = obs.shape[:-1]
    ref = reference
    p_top, sigma_p, chi2, assumed = (np.asarray(a) for a in top)

    def channel_optics(p):
        l_opq = interpolate_levels(lp, lo, p)
        d = l_opq - clr
        with np.errstate(divide="ignore", invalid="ignore"):
            eps = (obs - clr) / d
            s_eps = np.sqrt(s_obs**2 + (1.0 - np.clip(eps, 0, 1)) ** 2 * s_clr**2) / np.abs(d)
        return d, eps, s_eps

    d, eps, s_eps = channel_optics(p_top)
    t_top = interpolate_levels(lp, lt, p_top)
    mu_c = mu[..., None]
    conditioned = np.abs(d) > noise_sigmas * np.hypot(s_obs, s_clr)
    opaque_ch = (eps >= eps_max) & (eps <= 1.0 + noise_sigmas * s_eps)
    beyond_ch = eps > 1.0 + noise_sigmas * s_eps
    warmer_ch = eps < -noise_sigmas * s_eps
    valid = conditioned & (eps < eps_max) & ~warmer_ch & ~beyond_ch
    eps_c = np.clip(eps, 0.0, eps_max)
    with np.errstate(divide="ignore", invalid="ignore"):
        tau_ch = optical_depth_from_emissivity(eps_c, mu_c) / beta
        s_tau_ch = mu_c * s_eps / ((1.0 - eps_c) * beta)
        wts = np.where(valid, 1.0 / np.maximum(s_tau_ch, 1e-6) ** 2, 0.0)
        tau = np.sum(wts * np.where(valid, tau_ch, 0.0), axis=-1) / np.sum(wts, axis=-1)
        s_tau = 1.0 / np.sqrt(np.sum(wts, axis=-1))
    # the top's own uncertainty, through the reference channel's τ at p ± σ_p
    finite_sp = np.isfinite(sigma_p) & (sigma_p > 0)
    if finite_sp.any():
        sp = np.where(finite_sp, sigma_p, 0.0)
        taus = []
        for sign in (-1.0, 1.0):
            _, e2, _ = channel_optics(np.clip(p_top + sign * sp, lp[..., -1], lp[..., 0]))
            taus.append(optical_depth_from_emissivity(np.clip(e2[..., ref], 0.0, eps_max), mu))
        s_top = np.where(finite_sp, 0.5 * np.abs(taus[1] - taus[0]), 0.0)
        s_tau = np.hypot(s_tau, s_top)
    n_valid = valid.sum(axis=-1)
    tau_opaque = optical_depth_from_emissivity(eps_max, mu)

    # status: the reference channel decides where it is conditioned; elsewhere the others do
    r_cond = conditioned[..., ref]
    status = np.full(shape, STATUS_INVERTED, dtype=np.int8)
    others_opaque = (opaque_ch | beyond_ch | ~conditioned).all(axis=-1) & opaque_ch.any(axis=-1)
    others_beyond = (n_valid == 0) & beyond_ch.any(axis=-1) & ~opaque_ch.any(axis=-1)
    others_warmer = (n_valid == 0) & warmer_ch.any(axis=-1) & ~opaque_ch.any(axis=-1) & ~beyond_ch.any(axis=-1)
    status = np.where(r_cond & opaque_ch[..., ref], STATUS_OPAQUE, status)
    status = np.where(r_cond & beyond_ch[..., ref], STATUS_BEYOND_OPAQUE, status)
    status = np.where(r_cond & warmer_ch[..., ref], STATUS_WARMER_THAN_CLEAR, status)
    status = np.where(~r_cond & others_opaque, STATUS_OPAQUE, status)
    status = np.where(~r_cond & others_beyond, STATUS_BEYOND_OPAQUE, status)
    status = np.where(~r_cond & others_warmer, STATUS_WARMER_THAN_CLEAR, status)
    status = np.where(~conditioned.any(axis=-1), STATUS_ILL_CONDITIONED, status)
    status = np.where((n_valid == 0) & (status == STATUS_INVERTED), STATUS_ILL_CONDITIONED, status)
    status = np.where(assumed & (status == STATUS_INVERTED), STATUS_TOP_ASSUMED, status)
    status = np.where(cloudy, status, STATUS_NOT_CLOUDY).astype(np.int8)

    tau = np.where(status == STATUS_OPAQUE, tau_opaque, tau)
    s_tau = np.where(status == STATUS_OPAQUE, np.inf, s_tau)
    keep = (status == STATUS_INVERTED) | (status == STATUS_OPAQUE) | (status == STATUS_TOP_ASSUMED)
    tau = np.where(keep, tau, np.nan)
    s_tau = np.where(keep, s_tau, np.nan)
    show_eps = cloudy[..., None] & np.isfinite(eps) & conditioned
    return CloudRetrieval(
        np.where(show_eps, eps, np.nan),
        np.where(show_eps, s_eps, np.nan),
        tau,
        s_tau,
        np.where(cloudy, p_top, np.nan),
        np.where(cloudy, sigma_p, np.nan),
        np.where(cloudy, t_top, np.nan),
        status,
        keep & ~(s_tau <= tau),
        np.where(cloudy, chi2, np.nan),
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
