"""Does the clear-sky uncertainty fit the scene? Normalised departures of clear pixels, per surface.

Where the configured σ of the clear-sky brightness temperature is right, the departures of
pixels classed clear, divided by their σ, spread like a unit normal (after the clear-sky bias
line is taken off). A spread well above 1 means the background is worse than the
configuration assumes (false alarms follow); well below 1, the cold-departure test is less
sensitive than it could be. :func:`calibrate` reports the spread per surface type and proposes
``[clear_sky_uncertainty]`` values fitted to the scene's clear pixels; nothing is applied.

The clear population is cut at −k·σ by the cold-departure test itself, so the spread is
estimated robustly (1.4826 × the median absolute deviation, exact for a normal population and
blind to a one-sided cut beyond 3σ and to a few cloudy pixels that slipped through).
"""
from dataclasses import dataclass

import numpy as np
from scipy.optimize import nnls

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
    base [K], per_path [K per kg m⁻²] : proposed ``[clear_sky_uncertainty]`` values, fitted so
        that σ² = base² + (per_path · W secθ)² matches the spread in bins of slant path (NaN
        with too few pixels)
    z_density : probability density of (departure − bias line)/σ in the bins of ``Z_EDGES``
        (values beyond them in the end bins) [1]
    """

    surface: str
    pixels: int
    bias_a: float
    bias_b: float
    z_spread: float
    z_mean: float
    base: float
    per_path: float
    z_density: np.ndarray


def calibrate(departure, sigma, slant_path, surface, mask, bits, valid, min_pixels=100, bins=8):
    """Per surface type: how (observed − clear)/σ of clear pixels spreads, and σ fitted to them.

    Parameters
    ----------
    departure : (y, x) observed − clear of the window channel, before any bias removal [K]
    sigma : (y, x) clear-sky 1-σ the screening used [K]
    slant_path : (y, x) W·secθ [kg m⁻²]
    surface : (y, x) surface codes; mask, bits : the screening's classes and test bits
    valid : (y, x) bool
    min_pixels : int
        Fewer clear pixels of a surface than this: no figures for it.
    bins : int
        Slant-path bins (equal counts) for the σ fit.

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
        d, x, s = departure[sel].astype(float), np.nan_to_num(slant_path[sel].astype(float)), sigma[sel]
        if np.ptp(x) > 1e-9:
            b, a = np.polyfit(x, d, 1)
        else:
            a, b = float(np.median(d)), 0.0
        r = d - (a + b * x)
        z = r / s
        base, per_path = _fit_sigma(r, x, bins)
        density, _ = np.histogram(np.clip(z, Z_EDGES[0], Z_EDGES[-1]), Z_EDGES, density=True)
        out[name] = SurfaceCalibration(name, n, float(a), float(b), robust_std(z), float(np.mean(z)), base, per_path,
                                       density)
    return out


def _fit_sigma(residual, path, bins):
    """(base, per_path) of σ² = base² + (per_path·x)² from robust spreads in bins of x (non-negative)."""
    edges = np.unique(np.quantile(path, np.linspace(0, 1, bins + 1)))
    rows, rhs = [], []
    for lo, hi in zip(edges[:-1], edges[1:]):
        inside = (path >= lo) & (path <= hi)
        if inside.sum() < 20:
            continue
        xm = float(np.median(path[inside]))
        rows.append([1.0, xm * xm])
        rhs.append(robust_std(residual[inside]) ** 2)
    if len(rows) < 2:
        s = robust_std(residual)
        return s, 0.0
    (b2, c2), _ = nnls(np.asarray(rows), np.asarray(rhs))
    return float(np.sqrt(b2)), float(np.sqrt(c2))


def session_calibration(session):
    """:func:`calibrate` on a screened :class:`cloudsieve.session.Session` (its window channel)."""
    from .screen import window_channel

    res, sim, ds = session.result, session.sim, session.scene.data
    ch = window_channel(sim.channels, session.config)
    i = sim.channels.index(ch)
    raw = ds[f"bt_{ch}"].values - sim.bt_clear[i]  # before any bias removal
    return ch, calibrate(raw, res.sigma_clear, sim.slant_path, ds["surface"].values, res.mask, res.bits,
                         ds["valid"].values, session.config["bias"]["min_pixels"])


def proposal_toml(calibration, config):
    """The proposed ``[clear_sky_uncertainty]`` table as TOML text (surfaces without a fit keep
    the configured value)."""
    unc = config["clear_sky_uncertainty"]

    def table(key, fmt):
        vals = {s: (getattr(calibration[s], key) if s in calibration and np.isfinite(getattr(calibration[s], key))
                    else unc[key][s]) for s in SURFACES}
        return "{ " + ", ".join(f"{s} = {format(v, fmt)}" for s, v in vals.items()) + " }"

    return ("[clear_sky_uncertainty]\n"
            "# fitted to the clear pixels of one scene: base [K], per_path [K per kg m-2 of W sec(theta)]\n"
            f"base = {table('base', '.2f')}\n"
            f"per_path = {table('per_path', '.4f')}\n")
