"""Does the clear-sky uncertainty fit the scene? Normalised departures of clear pixels, per surface.

Where the configured σ of the clear-sky brightness temperature is right, the departures of
pixels classed clear, divided by their σ, spread like a unit normal (after the clear-sky bias
line is taken off). A spread well above 1 means the background is worse than the
configuration assumes (false alarms follow); well below 1, the cold-departure test is less
sensitive than it could be. :func:`calibrate` reports the spread per surface type and proposes
a factor on that surface's ``[background_errors]`` (and ``[background_noise]``) that makes the
clear pixels' spread fit, given the instrument noise, which is known; nothing is applied.

The clear population is cut at −k·σ by the cold-departure test itself, so the spread is
estimated robustly (1.4826 × the median absolute deviation, exact for a normal population and
blind to a one-sided cut beyond 3σ and to a few cloudy pixels that slipped through).
"""
from dataclasses import dataclass

import numpy as np

from .codes import CLEAR, SURFACES
from .registry import bit_table

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
    bias_a [K], bias_b [K per kg m⁻²] : the bias line of this surface's clear departures
    z_spread : robust spread of (departure − bias line)/σ [1] (1 where σ is right)
    z_mean : mean of (departure − bias line)/σ [1]
    factor : proposed factor f on this surface's background errors [1]: the departures divided
        by √(f² σ_bg² + NEΔT²) have unit robust spread (σ² = σ_bg² + NEΔT² as configured)
    z_density : probability density of (departure − bias line)/σ in the bins of ``Z_EDGES``
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


def calibrate(departure, sigma, noise, slant_path, surface, mask, bits, valid, min_pixels=100):
    """Per surface type: how (observed − clear)/σ of clear pixels spreads, and σ fitted to them.

    Parameters
    ----------
    departure : (y, x) observed − clear of the window channel, before any bias removal [K]
    sigma : (y, x) clear-sky 1-σ the screening used [K]
    noise : (y, x) its instrument-noise part [K]
    slant_path : (y, x) W·secθ [kg m⁻²]
    surface : (y, x) surface codes; mask, bits : the screening's classes and test bits
    valid : (y, x) bool
    min_pixels : int
        Fewer clear pixels of a surface than this: no figures for it.

    Returns
    -------
    dict surface name -> SurfaceCalibration
    """
    use = valid & (mask == CLEAR) & ((bits & bit_table()["warm_departure"]) == 0) & np.isfinite(departure)
    out = {}
    for code, name in enumerate(SURFACES):
        sel = use & (surface == code)
        n = int(sel.sum())
        if n < min_pixels:
            continue
        d, x = departure[sel].astype(float), np.nan_to_num(slant_path[sel].astype(float))
        s, nz = sigma[sel].astype(float), noise[sel].astype(float)
        if np.ptp(x) > 1e-9:
            b, a = np.polyfit(x, d, 1)
        else:
            a, b = float(np.median(d)), 0.0
        r = d - (a + b * x)
        z = r / s
        factor = _fit_factor(r, np.maximum(s * s - nz * nz, 0.0), nz * nz)
        density, _ = np.histogram(np.clip(z, Z_EDGES[0], Z_EDGES[-1]), Z_EDGES, density=True)
        out[name] = SurfaceCalibration(name, n, float(a), float(b), robust_std(z), float(np.mean(z)), float(factor),
                                       density)
    return out


def _fit_factor(residual, var_bg, var_noise):
    """f ≥ 0 with robust_std(residual / √(f² var_bg + var_noise)) = 1 (NaN without a background part).

    The spread falls as f grows, so the root is bracketed and found by Brent's method; a spread
    below 1 even at f = 0 (the noise alone explains it) gives 0."""
    from scipy.optimize import brentq

    if not np.any(var_bg > 0):
        return float("nan")

    def excess(f):
        return robust_std(residual / np.sqrt(f * f * var_bg + var_noise + 1e-12)) - 1.0

    if excess(0.0) <= 0:
        return 0.0
    hi = 1.0
    while excess(hi) > 0 and hi < 1e3:
        hi *= 2.0
    return float(brentq(excess, 0.0, hi, xtol=1e-3))


def session_calibration(session):
    """:func:`calibrate` on a screened :class:`cloudsieve.session.Session` (its window channel)."""
    from .screen import window_channel

    res, sim, ds = session.result, session.sim, session.scene.data
    ch = window_channel(sim.channels, session.config)
    i = sim.channels.index(ch)
    raw = ds[f"bt_{ch}"].values - sim.bt_clear[i]  # before any bias removal
    return ch, calibrate(raw, res.sigma_clear, sim.sigma[f"noise:{ch}"], sim.slant_path, ds["surface"].values,
                         res.mask, res.bits, ds["valid"].values, session.config["bias"]["min_pixels"])


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
