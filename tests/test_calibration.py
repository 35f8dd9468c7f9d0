"""Calibration of the clear-sky uncertainty: normalised clear departures and σ fitted to a scene.

The truths here are statistical, from outside the project: normal deviates of a known σ
(numpy's generator) and the normal distribution's quartile from scipy.stats.
"""
from pathlib import Path
import tomllib

import numpy as np
import pytest
from scipy import stats

from cloudsieve.calibration import MAD_TO_SIGMA, calibrate, proposal_toml, robust_std, session_calibration
from cloudsieve.codes import CLEAR, CLOUD
from cloudsieve.config import load_config, merge_config
from cloudsieve.session import Session

SAMPLES = Path(__file__).resolve().parent.parent / "sample_scenes"


def test_mad_constant_is_the_normal_quartile():
    # 1/Φ⁻¹(3/4) (scipy.stats.norm), the consistency constant of the MAD for a normal population
    assert MAD_TO_SIGMA == pytest.approx(1 / stats.norm.ppf(0.75), rel=1e-12)
    rng = np.random.default_rng(1)
    assert robust_std(rng.normal(5.0, 2.0, 400_000)) == pytest.approx(2.0, rel=0.01)


def _population(n=60_000, seed=2, factor=1.0, noise=0.12, leak=0.02, k=3.0, fraction=0.25, warm=2.0):
    """Sea pixels whose configured background σ grows with slant path x (σ_bg = 0.25 + 0.01 x),
    with instrument noise; the true background errors are ``factor`` times the configured ones.
    The screening's cuts are applied as it applies them: a pixel is clear only above the cold
    test's marginal band, −(1 − fraction)·k·σ, and below the warm flag; a few cloud leaks."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(10.0, 120.0, n)
    bg = 0.25 + 0.01 * x
    sig = np.sqrt(bg**2 + noise**2)  # the σ the screening assumes
    d = 0.05 + rng.normal(0.0, 1.0, n) * np.sqrt((factor * bg) ** 2 + noise**2)
    d[rng.random(n) < leak] -= 6.0  # cloud: classed cloud by the cold test
    lower, upper = -(1.0 - fraction) * k * sig, np.full(n, warm)
    mask = np.where((d > lower) & (d < upper), CLEAR, CLOUD).astype(np.int8)
    shape = (1, n)
    return {"departure": d.reshape(shape), "sigma": sig.reshape(shape), "noise": np.full(shape, noise),
            "surface": np.zeros(shape, np.int8), "mask": mask.reshape(shape), "valid": np.ones(shape, bool),
            "lower": lower.reshape(shape), "upper": upper.reshape(shape)}


def _calibrate(p):
    return calibrate(**p)["sea"]


def test_the_right_sigma_gives_unit_spread_and_factor_one():
    cal = _calibrate(_population())
    assert cal.z_spread == pytest.approx(1.0, abs=0.04)
    assert cal.factor == pytest.approx(1.0, abs=0.06)


@pytest.mark.parametrize("factor", [0.5, 2.0, 3.0])
def test_background_errors_off_by_a_factor_are_found_through_the_cut(factor):
    """True background errors half, twice or three times the configured ones: the screening's
    cut (cold marginal band at −2.25 σ, warm flag at +2 K) removes much of a wide population, yet
    the truncated fit finds the factor (the sample's own spread would read 2 as about 1.6)."""
    p = _population(factor=factor)
    clear = p["mask"] == CLEAR
    naive = robust_std(p["departure"][clear] / p["sigma"][clear])
    cal = _calibrate(p)
    assert cal.factor == pytest.approx(factor, rel=0.08)
    if factor > 1:
        assert naive < 0.9 * cal.z_spread  # what the cut would have hidden


def test_a_scene_calibration_and_its_proposal_are_usable():
    session = Session.open(SAMPLES / "day_coast.nc", load_config(), journal=False)
    ch, cal = session_calibration(session)
    assert ch == "11um" and set(cal) <= {"sea", "land", "ice"} and cal
    for c in cal.values():
        assert c.pixels >= 100 and np.isfinite(c.z_spread) and c.factor >= 0
    text = proposal_toml(cal, session.config)
    cfg = merge_config(tomllib.loads(text))  # the proposal is a valid configuration
    default = load_config()
    for s, c in cal.items():
        # the smooth part of the total scaled by the fitted factor, the pixel-to-pixel part by its own
        t, n = (default[k]["skin_temperature"][s] for k in ("background_errors", "background_noise"))
        g = c.pixel_factor if np.isfinite(c.pixel_factor) else 1.0
        assert cfg["background_noise"]["skin_temperature"][s] == pytest.approx(g * n, abs=1e-3)
        assert cfg["background_errors"]["skin_temperature"][s] == pytest.approx(
            np.sqrt(c.factor**2 * max(t * t - n * n, 0.0) + (g * n) ** 2), abs=1e-3)


def test_the_diagnostics_show_the_calibration_and_the_proposal():
    """The dashboard's calibration card draws the unit normal and each surface, and shows the
    proposal as a configuration to copy (not applied)."""
    import holoviews as hv

    from dashboard.model import ScreeningModel
    from dashboard.views.diagnostics import SigmaCalibration

    model = ScreeningModel.open(SAMPLES / "day_coast.nc", load_config(), journal=False)
    view = SigmaCalibration(model)
    plot = view.plot()
    labels = [el.label for el in plot]
    assert "unit normal" in labels and any(lab.startswith("land (spread") for lab in labels)
    text = view.table()
    assert "[background_errors]" in text and "not applied" in text
    assert "| land |" in text and "× " in text  # the fitted factor of the land background errors
    assert isinstance(plot, hv.Overlay)


@pytest.mark.parametrize("g", [1.0, 1.7])
def test_neighbour_differences_find_the_pixel_to_pixel_noise(g):
    """A smooth error field (scale 20 pixels, 0.8 K) plus independent pixel noise g times the
    configured 0.3 K plus 0.1 K instrument noise: differences of neighbours cancel the smooth part,
    and the pixel-scale factor finds g (numpy's normal deviates, scipy's Gaussian filter)."""
    from scipy import ndimage

    from cloudsieve.calibration import pixel_scale

    rng = np.random.default_rng(5)
    shape = (300, 300)
    smooth = ndimage.gaussian_filter(rng.standard_normal(shape), 20.0)
    smooth *= 0.8 / smooth.std()
    d = smooth + rng.normal(0.0, 0.3 * g, shape) + rng.normal(0.0, 0.1, shape)
    sigma_pixel = np.full(shape, np.hypot(0.3, 0.1))
    out = pixel_scale(d, sigma_pixel, np.full(shape, 0.1), np.zeros(shape, np.int8), np.ones(shape, bool))
    pairs, spread, factor = out["sea"]
    assert pairs == 2 * 300 * 299
    assert factor == pytest.approx(g, rel=0.05)
    assert spread == pytest.approx(np.hypot(0.3 * g, 0.1) / np.hypot(0.3, 0.1), rel=0.05)
