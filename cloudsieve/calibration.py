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
    """

    surface: str
    pixels: int
    bias_a: float
    bias_b: float
    z_spread: float
    z_mean: float
    factor: float
    z_density: np.ndarray


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
    return ch, calibrate(res.departure[ch], res.sigma_clear, sim.sigma[f"noise:{ch}"], surface, res.mask,
                         ds["valid"].values, lower, upper, res.bias.get(ch), cfg["bias"]["min_pixels"])


def proposal_toml(calibration, config):
    """``[background_errors]`` and ``[background_noise]`` scaled per surface by the fitted factor,
    as TOML text (surfaces without a fit keep the configured values)."""
    def scaled(table, digits):
        lines = []
        for key, per in table.items():
            vals = {}
            for s in SURFACES:
                c = calibration.get(s)
                f = c.factor if c is not None and np.isfinite(c.factor) else 1.0
                vals[s] = round(per[s] * f, digits)
            lines.append(f"{key} = {{ " + ", ".join(f"{s} = {v:g}" for s, v in vals.items()) + " }")
        return "\n".join(lines)

    factors = ", ".join(f"{s} × {c.factor:.2f}" for s, c in calibration.items() if np.isfinite(c.factor))
    return ("# fitted to the clear pixels of one scene: the background errors scaled per surface "
            f"({factors or 'no fit'})\n"
            "[background_errors]\n" + scaled(config["background_errors"], 4) + "\n\n"
            "[background_noise]\n" + scaled(config["background_noise"], 4) + "\n")
