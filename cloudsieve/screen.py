"""Screening: departures, the registered tests, classes and bit field, the clear-sky bias fit.

:func:`screen_arrays` screens a grid or a block of rows of one (2-D array arithmetic, no
scene-wide step but the two flags it is given), running every test of the registry
(:mod:`cloudsieve.registry`) and classing each pixel clear / marginal / cloud / no_data. The
bias fit is a closed-form least-squares line from sums that add over blocks
(:func:`bias_sums`, :func:`bias_from_sums`), so the block pipeline and the in-memory
:func:`screen_scene` give the same line.
"""
from dataclasses import dataclass, field
import json

import numpy as np

from .codes import CLASS_NAMES, CLEAR, CLOUD, EDIT_CODES, MARGINAL, NO_DATA, SURFACES
from .invert import CloudLayer, inversion_notes
from .registry import REGISTRY, SceneFacts, ScreeningInputs, bit_table


@dataclass
class Screening:
    """Outcome of the screening on the scene grid.

    departure : dict channel -> (y, x) observed − clear (bias removed when configured) [K]
    margins : dict test -> (y, x) margin [K] (> 0: fired; NaN: not applicable)
    mask : (y, x) int8 class code (codes.CLASS_NAMES)
    bits : (y, x) uint16 bit field (registry.bit_table())
    counts : dict class -> fraction of pixels
    bias : dict channel -> {"a", "b", "n", "rms", "applied"}
    notes : list of str (skipped tests, daylight 3.9 µm, …)
    thresholds : dict test -> (y, x) threshold actually applied [K] (for plots)
    sigma_clear : (y, x) the window channel's clear-sky σ [K]
    sigma : dict of (y, x) clear-sky σ's [K] (uncertainty.ClearSkySigma.as_dict keys)
    cloud : CloudLayer masked to non-clear pixels (or None)
    skipped : dict test -> why it did not run
    """

    departure: dict
    margins: dict
    mask: np.ndarray
    bits: np.ndarray
    counts: dict
    bias: dict
    notes: list
    thresholds: dict
    sigma_clear: np.ndarray
    cloud: CloudLayer = None
    skipped: dict = field(default_factory=dict)
    sigma: dict = field(default_factory=dict)



def window_channel(channels, config):
    """The cold-departure test's channel, or the first of 11, 12, 8.6 µm the scene has (None: none)."""
    want = config["tests"]["cold_departure"]["channel"]
    if want in channels:
        return want
    return next((c for c in ("11um", "12um", "8p6um") if c in channels), None)


@dataclass
class ScreeningPlan:
    """Which registered tests run on a scene, decided once per scene (no pixel looked at).

    facts : registry.SceneFacts; run : names of the tests that run, in registry order;
    skipped : test -> why not; notes : for the user
    """

    facts: SceneFacts
    run: tuple
    skipped: dict
    notes: list


def plan_tests(channels, config, night_any, day_any):
    """The :class:`ScreeningPlan` of a scene with ``channels`` and (``night_any``, ``day_any``) valid
    night / daylight pixels (:func:`scene_flags`)."""
    facts = SceneFacts(tuple(channels), window_channel(channels, config), bool(night_any), bool(day_any))
    run, skipped, notes = [], {}, []
    for name, test in REGISTRY.items():
        table = config["tests"].get(name, test.defaults)
        missing = [c for c in test.channels if c not in facts.channels]
        if not table.get("enabled", True):
            why = "switched off in the config"
        elif missing:
            why = f"needs {' and '.join(test.channels)}"
        else:
            why = test.requires(facts) if test.requires else None
        if why:
            skipped[name] = why
            notes.append(f"test {name} skipped: {why}")
        else:
            run.append(name)
    wanted = config["tests"]["cold_departure"]["channel"]
    if facts.window_channel and facts.window_channel != wanted:
        notes.append(f"window-channel tests use {facts.window_channel} ({wanted} absent)")
    if not any(REGISTRY[t].makes_cloud for t in run):
        notes.append("NO CLOUD TEST COULD RUN on this scene: every valid pixel is classed clear by default, "
                      "so the mask says nothing about cloud; give the channels the tests need (see the notes above)")
    if "3p9um" in facts.channels and day_any:
        notes.append("3.9 µm not used on daylight pixels: by day it carries reflected sunlight that the "
                     "thermal model does not simulate (bit daylight_3p9um_unused marks them)")
    return ScreeningPlan(facts, tuple(run), skipped, notes)


def halo_rows(config):
    """Rows a block of a scene needs on either side: half the widest window of a test."""
    return max(int(config["tests"]["texture"]["window"]), int(config["tests"]["night_fog_contrast"]["window"])) // 2


def night_mask(sol_zenith, config):
    """(y, x) bool: the sun below ``[screening] night_sun_zenith`` (NaN solar zenith: day)."""
    return np.isfinite(sol_zenith) & (sol_zenith > config["screening"]["night_sun_zenith"])


def scene_flags(sol_zenith, valid, config):
    """(night_any, day_any): whether a scene has valid night / daylight pixels.

    ``sol_zenith`` [deg] and ``valid`` are (y, x) arrays, numpy or dask (one pass).
    """
    import dask

    night = night_mask(sol_zenith, config)
    n, d = dask.compute((night & valid).any(), (~night & valid).any(), scheduler="threads")
    return bool(n), bool(d)


def scene_plan(fields, config, channels):
    """The :class:`ScreeningPlan` of a whole scene from its (y, x) ``sol_zenith`` and ``valid``."""
    return plan_tests(tuple(channels), config, *scene_flags(fields["sol_zenith"], fields["valid"], config))


def run_tests(fields, config, departure, sigma, plan=None, cache=None, cache_key=None, raw_departure=None):
    """Margins [K] of every registered test that runs (> 0 means the test fired), thresholds, notes.

    Parameters
    ----------
    fields : mapping of (y, x) arrays
        ``surface`` (codes), ``valid`` (bool), ``sol_zenith`` [deg], ``slant_path`` [kg m⁻²].
    config : dict
    departure : dict channel -> (y, x) observed − clear [K]
    sigma : dict of (y, x) expected clear-sky errors [K] (uncertainty.ClearSkySigma.as_dict)
    plan : ScreeningPlan, optional
        The scene's plan (a block of a scene cannot tell whether the scene has night pixels);
        from ``fields`` as a whole scene when omitted.
    cache : dict, optional
        Keeps threshold-independent statistics (the texture test's) between calls (see
        :func:`screen_scene`); ``cache_key`` names the departures they belong to.
    raw_departure : dict channel -> (y, x) observed − clear before any bias removal [K], optional
        (``departure`` when omitted)

    Returns
    -------
    MarginSet
    """
    valid = fields["valid"]
    night = night_mask(fields["sol_zenith"], config)
    if plan is None:
        plan = scene_plan(fields, config, tuple(departure))
    win = plan.facts.window_channel
    inp = ScreeningInputs(
        departure=departure, sigma_clear=sigma[win] if win else None, sigma=sigma, surface=fields["surface"],
        slant_path=np.nan_to_num(fields["slant_path"]), valid=valid, night=night,
        window_channel=plan.facts.window_channel, notes=list(plan.notes), cache=cache, cache_key=cache_key,
        raw_departure=departure if raw_departure is None else raw_departure)
    out = MarginSet({}, {}, dict(plan.skipped), inp.notes, night)
    for name in plan.run:
        test = REGISTRY[name]
        m = test.margin(inp, config["tests"].get(name, test.defaults))
        out.margins[name] = np.where(valid, m.margin, np.nan)
        out.thresholds[name] = m.threshold
    return out


@dataclass
class MarginSet:
    """What :func:`run_tests` found: per test the margin and threshold [K] on the grid, the tests
    skipped with why, notes for the user, and the night mask it used."""

    margins: dict
    thresholds: dict
    skipped: dict
    notes: list
    night: np.ndarray


def classify(valid, margins, thresholds, fraction, night=None, has_3p9=False, edits=None):
    """Class codes and bit field from the test margins (and analyst edits).

    Parameters
    ----------
    valid : (y, x) bool
    margins : dict test -> (y, x) [K]
    thresholds : dict test -> (y, x) threshold applied [K] (sign ignored)
    fraction : float
        Marginal band as a fraction of each test's threshold: no test fired, but one came
        within ``fraction × |threshold|`` of firing.
    night : (y, x) bool, optional
    has_3p9 : bool
        Scene has the 3.9 µm channel (day pixels then get the daylight bit).
    edits : (y, x) int8, optional
        Analyst overrides: 0 none, 1 clear, 2 cloud.
    """
    shape = valid.shape
    bits = np.zeros(shape, np.uint16)
    fired_any = np.zeros(shape, bool)
    near_any = np.zeros(shape, bool)
    table = bit_table()
    for name, test in REGISTRY.items():
        m = margins.get(name)
        if m is None:
            continue
        with np.errstate(invalid="ignore"):  # NaN margins (test not applicable) compare False
            fired = m > 0
            if test.makes_cloud:
                near_any |= m > -fraction * np.abs(thresholds[name])
        bits[fired] |= np.uint16(table[name])
        if test.makes_cloud:
            fired_any |= fired
    mask = np.full(shape, CLEAR, np.int8)
    mask[near_any] = MARGINAL
    mask[fired_any] = CLOUD
    if has_3p9 and night is not None:
        bits |= np.where(valid & ~night, table["daylight_3p9um_unused"], 0).astype(np.uint16)
    if edits is not None:
        mask = np.where(edits == EDIT_CODES["clear"], CLEAR, mask)
        mask = np.where(edits == EDIT_CODES["cloud"], CLOUD, mask)
        bits |= np.where(edits == EDIT_CODES["clear"], table["analyst_clear"], 0).astype(np.uint16)
        bits |= np.where(edits == EDIT_CODES["cloud"], table["analyst_cloud"], 0).astype(np.uint16)
    mask = np.where(valid, mask, NO_DATA).astype(np.int8)
    bits = np.where(valid, bits, 0).astype(np.uint16)
    return mask, bits


def bias_sums(departure, slant_path, mask, bits, valid, surface):
    """Sums for the clear-sky bias fit over pixels passing every test (additive over blocks).

    Returns dict channel -> (4, 6) array: rows sea, land, ice and all surfaces, each
    [n, Σx, Σy, Σx², Σxy, Σy²] (float64), x = W sec θ.
    """
    use = valid & (mask == CLEAR) & ((bits & bit_table().get("warm_departure", 0)) == 0)
    x_all = np.asarray(slant_path, dtype=float)
    code = np.asarray(surface)
    n_surf = len(SURFACES)
    out = {}
    for ch, d in departure.items():
        d = np.asarray(d, dtype=float)
        ok = use & np.isfinite(d) & np.isfinite(x_all)
        c, x, y = code[ok], x_all[ok], d[ok]
        counts = np.bincount(c.astype(np.intp), minlength=n_surf)[:n_surf]
        present = np.flatnonzero(counts)
        rows = np.zeros((n_surf, 6))
        for k in present:
            xs, ys = (x, y) if present.size == 1 else (x[c == k], y[c == k])
            rows[k] = [xs.size, xs.sum(), ys.sum(), xs @ xs, xs @ ys, ys @ ys]
        out[ch] = np.vstack([rows, rows.sum(axis=0)])
    return out


def _line(sums, min_pixels):
    """{"a", "b", "n", "rms"} of the least-squares line from one row of sums (NaN below min_pixels)."""
    n, sx, sy, sxx, sxy, syy = sums
    n = int(n)
    if n < min_pixels:
        return {"a": float("nan"), "b": float("nan"), "n": n, "rms": float("nan")}
    var_x = sxx - sx * sx / n
    if var_x <= 1e-12 * max(sxx, 1.0):
        a, b = sy / n, 0.0
    else:
        b = (sxy - sx * sy / n) / var_x
        a = (sy - b * sx) / n
    # Rounded far below any physical meaning (1e-9 K, 1e-12 K per kg m⁻²) so that sums
    # accumulated in a different order (the chunked path adds them block by block) give
    # the very same line.
    a, b = round(float(a), 9), round(float(b), 12)
    # residual sum of squares Σ(y − a − b x)² expanded in the sums (rounded likewise)
    rss = syy - 2 * a * sy - 2 * b * sxy + n * a * a + 2 * a * b * sx + b * b * sxx
    return {"a": float(a), "b": float(b), "n": n, "rms": round(float(np.sqrt(max(rss, 0.0) / n)), 9)}


def bias_from_sums(sums, min_pixels):
    """Least-squares lines departure = a + b·x from :func:`bias_sums` (closed form).

    Returns dict channel -> {"a" [K], "b" [K per kg m⁻²], "n", "rms" [K], "surfaces"}: the line
    of all surfaces together, and in ``surfaces`` the line of each surface type with at least
    ``min_pixels`` clear pixels (surfaces differ: land emissivity, ice inversions). a, b NaN
    when fewer than ``min_pixels`` clear pixels in all; b = 0 when x does not vary.
    """
    out = {}
    for ch, rows in sums.items():
        rows = np.asarray(rows, dtype=float).reshape(-1, 6)
        fit = _line(rows[-1], min_pixels)
        fit["surfaces"] = {name: line for name, row in zip(SURFACES, rows[:-1])
                           if (line := _line(row, min_pixels))["n"] >= min_pixels}
        out[ch] = fit
    return out


def bias_field(fit, surface, slant_path):
    """(y, x) clear-sky bias [K] of one channel's fit (:func:`bias_from_sums`): each pixel takes
    its surface type's line, or the line of all surfaces where its type has none."""
    x = np.asarray(slant_path, dtype=float)
    out = fit["a"] + fit["b"] * x
    for name, line in fit.get("surfaces", {}).items():
        out = np.where(np.asarray(surface) == SURFACES.index(name), line["a"] + line["b"] * x, out)
    return out


def bias_key(bias):
    """A hashable identity of a set of bias fits (None without one)."""
    if not bias:
        return None
    return json.dumps({c: {k: v for k, v in b.items() if k != "applied"} for c, b in bias.items()}, sort_keys=True)


def edits_grid(shape, edits):
    """Apply a sequence of QA edits ({'action', 'index'}) to an int8 override grid."""
    grid = np.zeros(shape, np.int8).ravel()
    for e in edits or ():
        code = EDIT_CODES[e["action"]]
        grid[np.asarray(e["index"], dtype=np.int64)] = code
    return grid.reshape(shape)


@dataclass
class ScreenedArrays:
    """Screening of a grid or of a block of one (no scene-wide step).

    departure : dict channel -> (y, x) observed − clear (bias removed when given) [K]
    margins, thresholds : dict test -> (y, x) [K] (see registry.Margin)
    mask : (y, x) int8 class codes; bits : (y, x) uint16 test_bits
    sigma : (y, x) the window channel's clear-sky 1-σ [K] (None without a window channel)
    skipped : dict test -> why; notes : list of str
    """

    departure: dict
    margins: dict
    thresholds: dict
    mask: np.ndarray
    bits: np.ndarray
    sigma: np.ndarray
    skipped: dict
    notes: list


def screen_arrays(obs, bt_clear, fields, config, sigma, bias=None, edit_codes=None, plan=None, cache=None):
    """Departures, test margins, classes and bits for a grid or a block of one (no scene-wide step).

    Parameters
    ----------
    obs, bt_clear : dict channel -> (y, x) observed and clear-sky brightness temperature [K]
    fields : mapping of (y, x) arrays: surface, valid, sol_zenith, slant_path
    config : dict
    sigma : dict of (y, x) clear-sky σ's [K] (uncertainty.ClearSkySigma.as_dict keys)
    bias : dict channel -> {"a", "b"}, optional
        Clear-sky bias line to subtract from the departures.
    edit_codes : (y, x) int8, optional
        Analyst overrides (codes.EDIT_CODES).
    plan : ScreeningPlan, optional
        The scene's test plan (see :func:`run_tests`).
    cache : dict, optional
        See :func:`screen_scene`.

    Returns
    -------
    ScreenedArrays
    """
    key = bias_key(bias)
    if cache is not None:
        # keep the arrays of the raw departures and of the latest bias line only
        for k in [k for k in cache if isinstance(k, tuple) and k[0] in ("departure", "texture")
                  and k[-1] not in (None, key)]:
            del cache[k]
    # float64 throughout: a float32 field would keep float32 arithmetic (numpy promotion rules)
    fields = dict(fields, slant_path=np.asarray(fields["slant_path"], dtype=float))
    if plan is None:
        plan = scene_plan(fields, config, tuple(bt_clear))
    def raw_departures():
        return {ch: (np.asarray(obs[ch], dtype=float) - np.asarray(bt_clear[ch], dtype=float)) for ch in bt_clear}

    if cache is None:
        raw = raw_departures()
    else:
        if ("departure", None) not in cache:
            cache[("departure", None)] = raw_departures()
        raw = cache[("departure", None)]
    departure = raw
    if bias:
        if cache is not None and ("departure", key) in cache:
            departure = cache[("departure", key)]
        else:
            departure = {ch: d - bias_field(bias[ch], fields["surface"], fields["slant_path"]) for ch, d in raw.items()}
            if cache is not None:
                cache[("departure", key)] = departure
    tests = run_tests(fields, config, departure, sigma, plan, cache, key, raw)
    mask, bits = classify(fields["valid"], tests.margins, tests.thresholds, config["screening"]["marginal_fraction"],
                          tests.night, "3p9um" in departure, edit_codes)
    win = plan.facts.window_channel
    return ScreenedArrays(departure, tests.margins, tests.thresholds, mask, bits, sigma[win] if win else None,
                          tests.skipped, tests.notes)


def screen_fields(scene, sim):
    """The per-pixel fields the screening needs, from a loaded scene and its simulation."""
    ds = scene.data
    return {"surface": ds["surface"].values, "valid": ds["valid"].values, "sol_zenith": ds["sol_zenith"].values,
            "slant_path": sim.slant_path}


def screen_scene(scene, sim, config, edits=None, cache=None):
    """Departures, tests, classes and the bias fit of a whole in-memory scene (the dashboard's stage 3).

    Parameters
    ----------
    scene : Scene
    sim : simulate.Simulation
    config : dict
    edits : list of {"action": "clear"|"cloud"|"reset", "index": flat pixel indices}, optional
    cache : dict, optional
        An empty dict the caller keeps for this scene and simulation: the departures, the
        clear-sky σ and the texture statistics (none depends on a threshold) are kept in it
        and reused by the next call, so retuning redoes only the threshold arithmetic. The
        arrays returned are shared with the cache: treat them as read-only.

    Returns
    -------
    Screening
        With ``cloud`` None: the caller adds the cloud layer (``invert.invert_all`` masked to
        the non-clear pixels).
    """
    ds = scene.data
    fields = screen_fields(scene, sim)
    obs = {ch: ds[f"bt_{ch}"].values for ch in sim.channels}
    clear = {ch: sim.bt_clear[i] for i, ch in enumerate(sim.channels)}
    edit_codes = edits_grid(fields["valid"].shape, edits) if edits else None
    if cache is not None and "flags" not in cache:
        cache["flags"] = scene_flags(fields["sol_zenith"], fields["valid"], config)
    flags = cache["flags"] if cache is not None else scene_flags(fields["sol_zenith"], fields["valid"], config)
    plan = plan_tests(sim.channels, config, *flags)
    out = screen_arrays(obs, clear, fields, config, sim.sigma, None, edit_codes, plan, cache=cache)
    bias = bias_from_sums(bias_sums(out.departure, sim.slant_path, out.mask, out.bits, fields["valid"],
                                    fields["surface"]), config["bias"]["min_pixels"])
    applied, note = bias_decision(bias, config)
    if applied:
        out = screen_arrays(obs, clear, fields, config, sim.sigma, bias, edit_codes, plan, cache=cache)
    notes = out.notes + ([note] if note else [])
    counts = {name: float(np.mean(out.mask == code)) for code, name in enumerate(CLASS_NAMES)}
    return Screening(out.departure, out.margins, out.mask, out.bits, counts, bias, notes, out.thresholds, out.sigma,
                     None, out.skipped, sim.sigma)


def bias_decision(bias, config):
    """Whether the bias fit is removed: ``[bias] remove`` is on and every channel has a fit.

    Marks each channel's fit ``applied``; returns (applied, a note for the user or None).
    """
    applied = bool(config["bias"]["remove"]) and all(np.isfinite(b["a"]) for b in bias.values())
    note = None
    if config["bias"]["remove"] and not applied:
        note = f"bias not removed: fewer than {config['bias']['min_pixels']} clear pixels to fit it"
    for b in bias.values():
        b["applied"] = applied
    return applied, note


def result_notes(plan, bias_note, inversion_channels, config):
    """The notes of a screened scene, in the order every output gives them: the test plan's,
    the bias fit's, the cloud inversion's."""
    return list(plan.notes) + ([bias_note] if bias_note else []) + inversion_notes(inversion_channels, config)


def summary_row(name, pixels, fractions, bias, skipped, notes):
    """A short dict summary of a screened scene (for the CLI table and the dashboard)."""
    return {
        "scene": name,
        "pixels": int(pixels),
        **{k: round(float(fractions[k]), 4) for k in CLASS_NAMES},
        "bias": {ch: {k: (round(v, 4) if isinstance(v, float) else v) for k, v in b.items()}
                 for ch, b in bias.items()},
        "skipped_tests": dict(skipped),
        "notes": list(notes),
    }
