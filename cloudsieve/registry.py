"""The registry of screening tests: one entry per test, everything else is generated from it.

Each :class:`ScreeningTest` holds the test's margin function, the channels it needs, whether
it makes pixels cloudy or only flags them, its bit in the ``test_bits`` field, its label and
help text for the dashboard, its CF long name, its tunable threshold (config key, unit,
slider range) and the defaults of its ``[tests.<name>]`` configuration table. The screening
(:mod:`cloudsieve.screen`), the export, the dashboard's sliders and help and the bit table
all read this registry, so adding a test is one :func:`register` call plus its TOML table
(DEVELOPERS.md has a worked example).

A margin function takes the :class:`ScreeningInputs` of a grid (or of a block of one) and the
test's configuration table and returns a :class:`Margin`: per pixel in K, positive where the
test fires, NaN where it does not apply. Whether a test can run on a scene at all is decided
once per scene, before any pixel is looked at, from :class:`SceneFacts` (its channels, the
window channel, whether it has night or daylight pixels): a test is skipped, saying why, when
a channel it needs is absent or its ``requires`` function gives a reason. Bits are part of the output format: a new test takes a new bit, an
existing test never changes its bit.
"""
from dataclasses import dataclass, field
import json
from typing import Callable

import numpy as np
from scipy import ndimage

from .codes import FLAG_BITS, per_surface


@dataclass(frozen=True)
class SceneFacts:
    """What decides which tests can run on a scene.

    channels : the scene's channel names
    window_channel : the cold-departure test's channel, or its stand-in when absent (None: none)
    night_any, day_any : whether the scene has valid night / daylight pixels
    """

    channels: tuple
    window_channel: str
    night_any: bool
    day_any: bool


@dataclass
class ScreeningInputs:
    """What a margin function may use, on a grid or a block of rows of one.

    Attributes
    ----------
    departure : dict
        Channel -> (y, x) observed − clear-sky brightness temperature [K] (bias removed when
        configured).
    sigma_clear : ndarray
        (y, x) expected 1-σ error of the window channel's clear-sky brightness temperature [K].
    sigma : dict
        The pixel's own clear-sky σ's [K], (y, x) each (cloudsieve.uncertainty.ClearSkySigma.as_dict):
        ``<ch>`` of a channel, ``"<a>-<b>"`` of a channel difference (errors correlated),
        ``"pixel:<ch>"`` the part independent from pixel to pixel.
    surface : ndarray
        (y, x) surface codes (0 sea, 1 land, 2 ice).
    slant_path : ndarray
        (y, x) water-vapour slant path W·sec θ [kg m⁻²], NaN replaced by 0.
    valid, night : ndarray
        (y, x) bool: pixel has complete data; sun below ``[screening] night_sun_zenith``.
    window_channel : str or None
        The window channel of the cold-departure test, or its stand-in when absent.
    notes : list of str
        Margin functions may append notes for the user here.
    cache : dict or None
        Threshold-independent arrays kept between calls (see ``screen.screen_arrays``).
    cache_key : object
        Identifies the departures the cache entries belong to.
    raw_departure : dict
        Channel -> (y, x) observed − clear before any bias removal [K] (the texture test's field).
    """

    departure: dict
    sigma_clear: np.ndarray
    sigma: dict
    surface: np.ndarray
    slant_path: np.ndarray
    valid: np.ndarray
    night: np.ndarray
    window_channel: str = None
    notes: list = field(default_factory=list)
    cache: dict = None
    cache_key: object = None
    raw_departure: dict = None


@dataclass
class Margin:
    """A test's outcome on a grid: ``margin`` [K] (> 0 fired, NaN not applicable) and the
    ``threshold`` actually applied per pixel [K] (signed as the departure it bounds; for plots)."""

    margin: np.ndarray
    threshold: np.ndarray


@dataclass(frozen=True)
class Tunable:
    """The threshold an analyst tunes: the per-surface key of the test's config table.

    key : config key (a {sea, land, ice} table)
    unit : unit label shown beside the slider ("K", "× σ")
    bounds : slider range (low, high) in that unit
    step : slider step in that unit
    """

    key: str
    unit: str
    bounds: tuple = (0.0, 10.0)
    step: float = 0.05


@dataclass(frozen=True)
class ScreeningTest:
    """One screening test.

    name : identifier, also the ``[tests.<name>]`` table and the ``margin_<name>`` variable
    bit : bit number in ``test_bits`` (part of the file format: never change it)
    kind : "cloud" (firing makes the pixel cloud) or "flag" (recorded only)
    channels : channels the test needs; it is skipped, saying so, when one is absent
    label : short name shown in the dashboard
    help : one or two sentences for the dashboard's help icon (what, why, threshold unit)
    long_name : CF long_name of the margin variable
    tunable : the threshold the dashboard's slider moves
    margin : function (ScreeningInputs, config table) -> Margin
    fires_when, why : the test's condition and its physical reason, for the README table
        (:func:`markdown_table`)
    requires : function (SceneFacts) -> None, or the reason the test cannot run on the scene
    defaults : the config table used when the configuration has none for this test
    """

    name: str
    bit: int
    kind: str
    channels: tuple
    label: str
    help: str
    long_name: str
    tunable: Tunable
    margin: Callable
    fires_when: str = ""
    why: str = ""
    requires: Callable = None
    defaults: dict = field(default_factory=dict)

    @property
    def makes_cloud(self):
        return self.kind == "cloud"


#: Registered tests by name, in registration order (the order of margins, plots and sliders)
REGISTRY = {}


def register(test):
    """Add a :class:`ScreeningTest` to the registry (its bit must be free); returns it."""
    if test.kind not in ("cloud", "flag"):
        raise ValueError(f"test {test.name}: kind must be 'cloud' or 'flag', not {test.kind!r}")
    taken = dict(FLAG_BITS, **{t.name: t.bit for t in REGISTRY.values() if t.name != test.name})
    clash = [n for n, b in taken.items() if b == test.bit]
    if clash or not 0 <= test.bit < 16:
        raise ValueError(f"test {test.name}: bit {test.bit} is taken by {clash[0]}" if clash
                         else f"test {test.name}: bit must lie within 0–15 (test_bits is 16 bits wide)")
    REGISTRY[test.name] = test
    return test


def unregister(name):
    """Remove a test from the registry (for tests of the registry itself)."""
    REGISTRY.pop(name, None)


def registered(kind=None):
    """Names of the registered tests (of one kind: "cloud" or "flag")."""
    return tuple(n for n, t in REGISTRY.items() if kind is None or t.kind == kind)


def markdown_table():
    """The README's table of screening tests, generated from the registry.

    ``python -m cloudsieve.registry`` prints it; a test keeps the README's copy in step.
    """
    bits = bit_table()
    lines = ["| test | bit | kind | fires when | why | tuned threshold |", "| --- | --- | --- | --- | --- | --- |"]
    for name, t in REGISTRY.items():
        lines.append(f"| `{name}` | {bits[name]} | {'cloud' if t.makes_cloud else 'flag'} | {t.fires_when} | {t.why} "
                     f"| `{t.tunable.key}` [{t.tunable.unit}] |")
    return "\n".join(lines)


def bit_table():
    """{flag name: bit value} of every bit of ``test_bits``, in bit order."""
    bits = dict(FLAG_BITS, **{t.name: t.bit for t in REGISTRY.values()})
    return {name: 1 << b for name, b in sorted(bits.items(), key=lambda kv: kv[1])}


# ---------------------------------------------------------------------------------------
# the tests
# ---------------------------------------------------------------------------------------
def _cold_departure(inp, t):
    """Window channel colder than clear by more than k·σ: clouds are colder than the surface."""
    ch = inp.window_channel
    thr = per_surface(t["k_sigma"], inp.surface) * inp.sigma_clear
    return Margin(-inp.departure[ch] - thr, -thr)


def _split_window_excess(inp, t):
    """(T11 − T12) observed minus clear above k times the σ of the clear-sky difference."""
    thr = per_surface(t["k_sigma"], inp.surface) * inp.sigma["11um-12um"]
    return Margin(inp.departure["11um"] - inp.departure["12um"] - thr, thr)


def local_std(values, valid, window):
    """Local mean and standard deviation in a square window, ignoring invalid pixels."""
    v = np.where(valid, values, 0.0)
    w = valid.astype(float)
    size = (window, window)
    n = ndimage.uniform_filter(w, size, mode="nearest")
    s1 = ndimage.uniform_filter(v, size, mode="nearest")
    s2 = ndimage.uniform_filter(v * v, size, mode="nearest")
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = s1 / n
        var = np.maximum(s2 / n - mean**2, 0.0)
    enough = n * window * window >= 3 - 1e-9
    return np.where(enough, mean, np.nan), np.where(enough, np.sqrt(var), np.nan)


def _texture(inp, t):
    """Rough departure field, and the pixel colder than the warmest of its window."""
    ch = inp.window_channel
    # the departure before the bias removal: the bias line barely changes within a small window,
    # and the window statistics then need no recomputing when the fit moves with a threshold
    d = inp.raw_departure[ch]
    ok = inp.valid & np.isfinite(d)
    win = int(t["window"])
    key = ("texture", ch, win, None)
    if inp.cache is not None and key in inp.cache:
        std, warmest = inp.cache[key]
    else:
        _, std = local_std(d, ok, win)
        warmest = ndimage.maximum_filter(np.where(ok, d, -np.inf), size=win, mode="nearest")
        if inp.cache is not None:
            inp.cache[key] = (std, warmest)
    # the departure field of clear sky is rough by the instrument noise and the background's own
    # pixel-to-pixel noise: the threshold allows for noise_k times that σ
    thr = np.hypot(per_surface(t["threshold"], inp.surface), t["noise_k"] * inp.sigma[f"pixel:{ch}"])
    # A rough neighbourhood alone does not make the pixel cloudy: a clear pixel beside a
    # cloud sits in a rough window too, but it is the warmest there. The pixel must also be
    # colder than the warmest of its neighbours by twice the threshold.
    return Margin(np.minimum(std - thr, (warmest - d) - 2.0 * thr), thr)


def _night_fog_contrast(inp, t):
    """At night, (T3.9 − T11) observed minus clear below −k times its clear-sky σ: water droplets.

    Tested on the pixel, and on the mean over a small window of the night pixels that are not
    much colder than clear: a fog or low-cloud deck is extended, so its contrast survives the
    mean while the noise independent from pixel to pixel (instrument, [background_noise])
    averages down, σ_mean² = σ² − σ_pixel² + σ_pixel²/n. At a cold 3.9 µm scene, where the
    noise dominates σ, the mean sees a deck that no single pixel can."""
    k = per_surface(t["k_sigma"], inp.surface)
    thr = k * inp.sigma["3p9um-11um"]
    diff = inp.departure["3p9um"] - inp.departure["11um"]
    m = -diff - thr
    # fog and low water cloud have tops near the surface temperature; a pixel much colder
    # than clear at 11 µm is a high (often ice) cloud, for which a 3.9 µm deficit is no
    # fog signature (the cold-departure test classes it): not applicable there
    max_cold = per_surface(t["max_cold_11um"], inp.surface)
    low = inp.departure["11um"] >= -max_cold
    win = int(t["window"])
    if win > 1:
        raw = inp.raw_departure["3p9um"] - inp.raw_departure["11um"]
        key = ("fog_window", win, json.dumps(t["max_cold_11um"], sort_keys=True))
        if inp.cache is not None and key in inp.cache:
            mean_raw, s_mean = inp.cache[key]
        else:
            use = inp.valid & inp.night & np.isfinite(raw) & (inp.raw_departure["11um"] >= -max_cold)
            n = ndimage.uniform_filter(use.astype(float), win, mode="constant") * win * win
            s_pix = inp.sigma["pixel:3p9um-11um"]
            with np.errstate(invalid="ignore", divide="ignore"):
                mean_raw = ndimage.uniform_filter(np.where(use, raw, 0.0), win, mode="constant") * win * win / n
                s_mean = np.sqrt(np.maximum(inp.sigma["3p9um-11um"] ** 2 - s_pix**2, 0.0) + s_pix**2 / n)
            s_mean = np.where(n >= 2.5, s_mean, np.nan)  # fewer than 3 pixels: no window mean
            if inp.cache is not None:
                inp.cache[key] = (mean_raw, s_mean)
        # the window statistics come from the departures before the bias removal: the pixel's own
        # bias difference stands for the window's (the bias line barely changes in a few pixels)
        mean = mean_raw - (raw - diff)
        m = np.fmax(m, -mean - k * s_mean)
    return Margin(np.where(inp.night & low, m, np.nan), -thr)


def _warm_departure(inp, t):
    """Window channel warmer than clear: the background is suspect (a flag, not cloud)."""
    thr = per_surface(t["threshold"], inp.surface)
    return Margin(inp.departure[inp.window_channel] - thr, thr)


def _needs_window(facts):
    return None if facts.window_channel else "no 11, 12 or 8.6 µm window channel in the scene"


def _needs_night(facts):
    return None if facts.night_any else "no valid night-time pixels (sun above the horizon, sol_zenith missing, or no complete data at night)"


register(ScreeningTest(
    "cold_departure", bit=0, kind="cloud", channels=(), label="Cold departure",
    help="Window channel colder than clear sky by more than k times the expected clear-sky error σ. "
         "Threshold: k [× σ].",
    long_name="cold departure of the window channel beyond its expected clear-sky uncertainty",
    tunable=Tunable("k_sigma", "× σ", (0.0, 10.0), 0.1), margin=_cold_departure, requires=_needs_window,
    fires_when="11 µm observed − clear < −k·σ, σ the pixel's clear-sky error from its Jacobians and background errors",
    why="clouds are colder than the surface they hide; σ grows with water-vapour path, view angle and surface "
        "uncertainty"))
register(ScreeningTest(
    "split_window_excess", bit=1, kind="cloud", channels=("11um", "12um"), label="Split-window excess",
    help="11 − 12 µm difference above its clear-sky value by more than k times the expected error σ of "
         "that difference (the pixel's own, from its background errors): thin ice cloud widens it. "
         "Threshold: k [× σ].",
    long_name="11-12 um difference above the simulated clear-sky difference",
    tunable=Tunable("k_sigma", "× σ", (0.0, 10.0), 0.1), margin=_split_window_excess,
    fires_when="(T11 − T12)obs − (T11 − T12)clear > k·σ₁₁₋₁₂, the pixel's σ of the clear-sky difference",
    why="thin ice cloud absorbs more at 12 µm than at 11 µm"))
register(ScreeningTest(
    "texture", bit=2, kind="cloud", channels=(), label="Texture",
    help="Rough window-channel departure in a small window, with the pixel colder than its "
         "warmest neighbour. Threshold on the local standard deviation [K], raised to allow for the "
         "instrument's and the background's pixel-to-pixel noise.",
    long_name="local standard deviation of the window-channel departure",
    tunable=Tunable("threshold", "K"), margin=_texture, requires=_needs_window,
    fires_when="local std of the 11 µm departure (before the bias removal) > t = √(threshold² + (noise_k·σ_pixel)²), "
               "and the pixel is colder than its window's warmest pixel by 2t",
    why="broken cloud and cloud edges are rough; clear pixels bordering a cloud are the warm ones"))
register(ScreeningTest(
    "night_fog_contrast", bit=3, kind="cloud", channels=("3p9um", "11um"), label="Night fog contrast",
    help="Night only: 3.9 µm colder than 11 µm relative to clear sky by more than k times the expected "
         "error σ of that difference, the mark of water droplets (fog, low cloud); also tested on the mean of a "
         "small window, where the noise averages down and an extended deck shows. Threshold: k [× σ].",
    long_name="night-time 3.9-11 um difference below the clear-sky difference",
    tunable=Tunable("k_sigma", "× σ", (0.0, 10.0), 0.1), margin=_night_fog_contrast, requires=_needs_night,
    fires_when="at night, where the 11 µm departure is within `max_cold_11um` of clear: (T3.9 − T11)obs − clear "
               "< −k·σ₃.₉₋₁₁, the pixel's σ of the clear-sky difference (3.9 µm noise grows at cold scenes); or its "
               "mean over the `window` box < −k·σ of that mean (pixel-to-pixel noise averaged down)",
    why="water droplets emit less at 3.9 µm than at 11 µm: fog and low water cloud (tops near the surface "
        "temperature)"))
register(ScreeningTest(
    "warm_departure", bit=4, kind="flag", channels=(), label="Warm departure",
    help="Window channel warmer than clear sky: the background is suspect. Flags the pixel (not "
         "cloud) and keeps it out of the bias fit. Threshold [K].",
    long_name="window channel warmer than clear sky (background suspect)",
    tunable=Tunable("threshold", "K"), margin=_warm_departure, requires=_needs_window,
    fires_when="11 µm observed − clear > threshold",
    why="not cloud: the background is suspect; flagged and left out of the bias fit"))


if __name__ == "__main__":
    print(markdown_table())
