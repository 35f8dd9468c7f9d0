"""Does the clear-sky uncertainty fit the scene? Normalised departures of clear pixels, per surface.

Where the configured σ of the clear-sky brightness temperature is right, the departures of
pixels classed clear, divided by their σ, spread like a unit normal (after the clear-sky bias
line is taken off). A spread well above 1 means the background is worse than the
configuration assumes (false alarms follow); well below 1, the cold-departure test is less
sensitive than it could be. :func:`calibrate` reports the spread per surface type and proposes
a factor on that surface's ``[background_errors]`` (and ``[background_noise]``) that makes the
clear pixels' spread fit, given the instrument noise, which is known; nothing is applied.

The clear population is cut by the screening itself: above the cold test's marginal band and
below the warm flag. Mean and spread are fitted by maximum likelihood to a normal distribution
truncated at each pixel's own cuts, so the cut does not narrow them (a sample's own moments
would read a true spread of 2 as about 1.6).
"""
from dataclasses import dataclass

import numpy as np

from .codes import CLEAR, SURFACES
from .registry import bit_table, registered

#: 1 / Φ⁻¹(3/4): turns a median absolute deviation into a normal standard deviation (common practice)
MAD_TO_SIGMA = 1.482602218505602
#: bin edges of the normalised-departure histograms [1]
Z_EDGES = np.linspace(-6.0, 6.0, 49)


def robust_std(values):
    """Standard deviation of a normal population from its median absolute deviation [as values]."""
    v = np.asarray(values, float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return float("nan")
    return float(MAD_TO_SIGMA * np.median(np.abs(v - np.median(v))))


@dataclass
class SurfaceCalibration:
    """The clear pixels of one surface type.

    surface : "sea", "land" or "ice"; pixels : clear pixels used
    bias_a [K], bias_b [K per kg m⁻²] : the screening's clear-sky bias line of this surface
        (NaN where it has none)
    z_spread : fitted spread of the departures in units of their σ [1] (1 where σ is right)
    z_mean : fitted mean departure in units of σ [1]
    factor : proposed factor f on this surface's background errors [1]: departures spread as
        √(f² σ_bg² + NEΔT²), the clear-sky part scaled, the instrument noise as it is
    z_density : probability density of departure/σ of the clear pixels in the bins of ``Z_EDGES``
        (values beyond them in the end bins) [1]
    pixel_spread : robust spread of the differences of neighbouring pixels over their pixel-to-
        pixel σ [1] (1 where ``[background_noise]`` and the instrument noise are right)
    pixel_factor : proposed factor on this surface's ``[background_noise]`` [1]
    """

    surface: str
    pixels: int
    bias_a: float
    bias_b: float
    z_spread: float
    z_mean: float
    factor: float
    z_density: np.ndarray
    pixel_spread: float = float("nan")
    pixel_factor: float = float("nan")


#: at most this many clear pixels per surface enter the fit (an even sample beyond it)
FIT_SAMPLE = 200_000


def calibrate(departure, sigma, noise, surface, mask, valid, lower, upper, bias=None, min_pixels=100):
    """Per surface type: how the departures of clear pixels spread against their σ.

    The clear pixels are a cut population: the screening classed a pixel clear only where its
    departure lay above the cold test's marginal band (``lower``) and below the warm flag
    (``upper``). Their mean and spread are therefore fitted by maximum likelihood to a normal
    distribution truncated at each pixel's own bounds (a truncated-normal likelihood; common
    practice for censored samples), not read from the sample's moments, which the cut narrows.

    Parameters
    ----------
    departure : (y, x) the window channel's departure as the tests saw it (bias removed when
        the screening removed it) [K]
    sigma : (y, x) its σ as the screening used it [K]; noise : (y, x) its instrument-noise part [K]
    surface : (y, x) surface codes; mask : the screening's classes; valid : (y, x) bool
    lower, upper : (y, x) the departures [K] below and above which a pixel would not have been
        classed clear (−(1 − marginal_fraction)·k·σ; the warm flag's threshold)
    bias : the screening's bias fit of this channel (screen.bias_from_sums entry), optional
    min_pixels : int
        Fewer clear pixels of a surface than this: no figures for it.

    Returns
    -------
    dict surface name -> SurfaceCalibration
    """
    use = valid & (mask == CLEAR) & np.isfinite(departure) & (sigma > 0)
    out = {}
    for code, name in enumerate(SURFACES):
        sel = np.flatnonzero((use & (surface == code)).ravel())
        n = int(sel.size)
        if n < min_pixels:
            continue
        sel = sel[:: max(1, n // FIT_SAMPLE)]
        d, s, nz = (np.asarray(a, float).ravel()[sel] for a in (departure, sigma, noise))
        lo, hi = (np.asarray(a, float).ravel()[sel] for a in (lower, upper))
        mean, factor = _truncated_fit(d, np.maximum(s * s - nz * nz, 0.0), nz * nz, lo, hi)
        spread = float(np.sqrt(np.mean(factor**2 * np.maximum(s * s - nz * nz, 0.0) + nz * nz) / np.mean(s * s)))
        z = d / s
        density, _ = np.histogram(np.clip(z, Z_EDGES[0], Z_EDGES[-1]), Z_EDGES, density=True)
        line = (bias or {}).get("surfaces", {}).get(name, {})
        out[name] = SurfaceCalibration(name, n, float(line.get("a", np.nan)), float(line.get("b", np.nan)), spread,
                                       float(mean / np.sqrt(np.mean(s * s))), float(factor), density)
    return out


def _truncated_fit(d, var_bg, var_noise, lower, upper):
    """(mean [K], factor f) maximising the likelihood of departures ``d`` under N(mean, f² var_bg +
    var_noise), each truncated to its own (lower, upper)."""
    from scipy.optimize import minimize
    from scipy.stats import norm

    def nll(p):
        m, f = p[0], np.exp(p[1])
        sd = np.sqrt(f * f * var_bg + var_noise + 1e-12)
        mass = norm.cdf((upper - m) / sd) - norm.cdf((lower - m) / sd)
        return float(np.sum(0.5 * ((d - m) / sd) ** 2 + np.log(sd) + np.log(np.maximum(mass, 1e-300))))

    start = robust_std(d) / np.sqrt(np.mean(var_bg + var_noise))
    best = minimize(nll, [float(np.median(d)), np.log(max(start, 0.05))], method="Nelder-Mead",
                    options={"xatol": 1e-4, "fatol": 1e-6, "maxiter": 400})
    return float(best.x[0]), float(np.exp(best.x[1]))


def pixel_scale(departure, sigma_pixel, noise, surface, use, min_pairs=100):
    """Per surface: how differences of neighbouring pixels spread against their pixel-to-pixel σ.

    The smooth part of the background errors is the same in two neighbouring pixels and cancels
    in their difference; what is left is the part independent from pixel to pixel, whose σ the
    screening expects as σ_pixel (``[background_noise]`` through the Jacobians, and the instrument
    noise). For pairs of horizontal and vertical neighbours of the same surface, both in ``use``:

        (d_i − d_j) / √(g² (σp_i² − n_i²) + g² (σp_j² − n_j²) + n_i² + n_j²)

    spreads like a unit normal for the right factor g on ``[background_noise]`` (instrument noise
    n known); g is found by Brent's method on the robust spread, the spread at g = 1 reported.

    Returns dict surface name -> (pairs, spread at g = 1, g).
    """
    from scipy.optimize import brentq

    d = np.asarray(departure, float)
    sp2 = np.asarray(sigma_pixel, float) ** 2
    n2 = np.asarray(noise, float) ** 2
    out = {}
    for code, name in enumerate(SURFACES):
        ok = use & (surface == code) & np.isfinite(d) & np.isfinite(sp2)
        parts = []
        for a, b in (((slice(None), slice(1, None)), (slice(None), slice(None, -1))),
                     ((slice(1, None), slice(None)), (slice(None, -1), slice(None)))):
            both = ok[a] & ok[b]
            parts.append((d[a][both] - d[b][both], (sp2[a] - n2[a])[both] + (sp2[b] - n2[b])[both],
                          n2[a][both] + n2[b][both]))
        x, bg, nn = (np.concatenate(v) for v in zip(*parts))
        if x.size < min_pairs:
            continue
        bg = np.maximum(bg, 0.0)
        spread = robust_std(x / np.sqrt(bg + nn))

        def excess(g):
            return robust_std(x / np.sqrt(g * g * bg + nn + 1e-12)) - 1.0

        if not np.any(bg > 0):
            g = float("nan")
        elif excess(0.0) <= 0:
            g = 0.0
        else:
            hi = 1.0
            while excess(hi) > 0 and hi < 1e3:
                hi *= 2.0
            g = float(brentq(excess, 0.0, hi, xtol=1e-3))
        out[name] = (int(x.size), float(spread), g)
    return out


def session_calibration(session):
    """:func:`calibrate` on a screened :class:`cloudsieve.session.Session` (its window channel)."""
    from .codes import per_surface
    from .screen import window_channel

    res, sim, ds, cfg = session.result, session.sim, session.scene.data, session.config
    ch = window_channel(sim.channels, cfg)
    surface = ds["surface"].values
    k = per_surface(cfg["tests"]["cold_departure"]["k_sigma"], surface)
    lower = -(1.0 - cfg["screening"]["marginal_fraction"]) * k * res.sigma_clear
    warm = cfg["tests"]["warm_departure"]
    upper = (per_surface(warm["threshold"], surface) if warm.get("enabled", True)
             else np.full(surface.shape, np.inf))
    valid = ds["valid"].values
    cal = calibrate(res.departure[ch], res.sigma_clear, sim.sigma[f"noise:{ch}"], surface, res.mask, valid, lower,
                    upper, res.bias.get(ch), cfg["bias"]["min_pixels"])
    # the pixel scale is what the texture test judges: its departures (before the bias removal,
    # whose line in the noisy slant path takes out part of the pixel-to-pixel water-vapour error),
    # on pixels no other cloud test fired on
    bits = bit_table()
    others = sum(bits[t] for t in registered("cloud") if t != "texture")
    use = valid & ((res.bits & others) == 0)
    raw = ds[f"bt_{ch}"].values - sim.bt_clear[sim.channels.index(ch)]
    for name, (pairs, spread, g) in pixel_scale(raw, sim.sigma[f"pixel:{ch}"], sim.sigma[f"noise:{ch}"],
                                                surface, use, cfg["bias"]["min_pixels"]).items():
        if name in cal:
            cal[name].pixel_spread, cal[name].pixel_factor = spread, g
    return ch, cal


def proposal_toml(calibration, config):
    """``[background_noise]`` scaled per surface by the pixel-scale factor and the smooth part of
    ``[background_errors]`` (√(total² − pixel part²)) by the fitted factor, as TOML text (surfaces
    without a fit keep the configured values)."""
    def factor(s, attr):
        c = calibration.get(s)
        f = getattr(c, attr) if c is not None else float("nan")
        return f if np.isfinite(f) else 1.0

    old_noise = config["background_noise"]
    noise = {key: {s: round(per[s] * factor(s, "pixel_factor"), 4) for s in SURFACES} for key, per in old_noise.items()}

    def total(key, s, value):
        # the smooth part (total² − pixel part²) scaled by the fitted factor, the pixel part by its own
        n = old_noise.get(key, {}).get(s, 0.0)
        smooth2 = max(value * value - n * n, 0.0) * factor(s, "factor") ** 2
        return round(float(np.sqrt(smooth2 + noise.get(key, {}).get(s, 0.0) ** 2)), 4)

    errors = {key: {s: total(key, s, per[s]) for s in SURFACES} for key, per in config["background_errors"].items()}

    def lines(table):
        return "\n".join(f"{key} = {{ " + ", ".join(f"{s} = {v:g}" for s, v in vals.items()) + " }"
                         for key, vals in table.items())

    factors = ", ".join(f"{s} × {c.factor:.2f}" + (f" (pixel scale × {c.pixel_factor:.2f})"
                                                   if np.isfinite(c.pixel_factor) else "")
                        for s, c in calibration.items() if np.isfinite(c.factor))
    return ("# fitted to the clear pixels of one scene: the background errors scaled per surface "
            f"({factors or 'no fit'})\n"
            "[background_errors]\n" + lines(errors) + "\n\n[background_noise]\n" + lines(noise) + "\n")
