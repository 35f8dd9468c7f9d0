"""Skill of the screening on the invented sample scenes, against their truth.

The scenes come from sample_scenes/make_scenes.py, which puts clouds *inside* the layered
radiative-transfer solution (a cloud layer of finite thickness, partial cover mixed in
radiance, instrument noise of 0.1 K at 300 K as a constant radiance, so larger at cold scenes) — not through the screening's grey-cloud formula — and
makes the truth in a world that DIFFERS from the one the screening assumes
(``make_scenes.TruthWorld``; values and reasons in sample_scenes/README.md, "How the truth
world differs from the screening's"):

* gas absorption: self continuum ×1.1, foreign continuum ×0.9, water-vapour lines ×1.15;
* humidity shape q ∝ (p/ps)^λ with λ varying smoothly over 2.3–3.6 (the screening: 3) and a
  lapse rate varying over 6.0–7.2 K km⁻¹ (the screening: 6.5);
* surface-based low-level inversions (night fog patch, coastal strip, much of the pack ice);
* sea emissivity falling with view angle by 80 % of a flat water surface's Fresnel fall (the
  screening's default: the full fall) and a land-emissivity spread (the screening: table values);
* non-grey ice cloud (τ12/τ11 1.1–1.2, τ8.6/τ11 0.85–0.95), broken sub-pixel cover in cumulus,
  stratocumulus, polar low cloud and post-frontal cloud;
* background errors smooth (skin 0.3 K sea / 1.0 K land / 0.6 K ice, ×2.5 in a
  poor-background region of 12–16 % of each scene; air 0.5 K; water vapour 7 %) AND
  pixel-to-pixel (skin 0.3 K, water vapour 7 %).

Targets (from the project's issue 13): probability of detection ≥ 0.97 for truth pixels with
cloud fraction ≥ 0.5 and optical depth ≥ 1, and at most 2 % of truth-clear pixels classed
`cloud` (`marginal` is the analyst's "look here" class and is reported separately).
Where the screening on main misses a target, the test is an expected failure (strict) with
the measured figure: the targets stay, no threshold or coefficient is tuned to meet them.
Figures per scene: sample_scenes/README.md, "Skill of the screening on these scenes".
"""
import numpy as np
import pytest
import xarray as xr

from cloudsieve.config import load_config
from cloudsieve.session import Session
from skill_figures import MAX_CLEAR_CLASSED_CLOUD, MIN_POD, SAMPLES, skill_figures

SCENES = ["night_front", "day_coast", "polar_ice"]
#: Scenes where main misses a target, with the figure measured there (default configuration:
#: per-pixel clear-sky σ, per-surface bias fit removed, Fresnel sea emissivity).
MISSES_CLEAR = {}
MISSES_POD = {}
_cache = {}


def screened(name):
    if name not in _cache:
        model = Session.open(SAMPLES / f"{name}.nc", load_config(), journal=False)
        with xr.open_dataset(SAMPLES / f"{name}_truth.nc") as truth:
            truth = truth.load()
        _cache[name] = model, truth, skill_figures(model.result, truth)
    return _cache[name]


def _params(misses):
    return [pytest.param(n, marks=pytest.mark.xfail(strict=True, reason=misses[n])) if n in misses else n
            for n in SCENES]


@pytest.mark.parametrize("name", _params(MISSES_POD))
def test_probability_of_detection(name):
    model, truth, fig = screened(name)
    assert fig.n_target > 500, "the scene must hold enough clearly cloudy pixels to measure skill"
    print(fig.line(name))
    assert fig.pod >= MIN_POD


@pytest.mark.parametrize("name", _params(MISSES_CLEAR))
def test_truth_clear_pixels_classed_cloud(name):
    model, truth, fig = screened(name)
    assert fig.n_clear > 500
    print(fig.line(name))
    assert fig.clear_classed_cloud <= MAX_CLEAR_CLASSED_CLOUD


@pytest.mark.parametrize("name", SCENES)
def test_clear_sky_departures_unbiased(name):
    """The clear sky is simulated without a large bias: truth-clear departures BEFORE the bias
    removal (which would centre them by construction) lie within 0.5 K of 0 on average, with a
    spread under 1.5 K, given what the truth world changes (ours: its stated differences move
    the 11 µm clear sky by −0.3 to +0.04 K on average, sample_scenes/README.md, and the
    background errors add 0.3–1.5 K of scatter)."""
    model, truth, fig = screened(name)
    clear = (truth["cloud_fraction"].values == 0) & (model.result.mask != 3)
    i = model.sim.channels.index("11um")
    raw = (model.scene.data["bt_11um"].values - model.sim.bt_clear[i])[clear]
    print(f"{name}: truth-clear 11 um departure before the bias removal {np.nanmean(raw):+.2f} ± "
          f"{np.nanstd(raw):.2f} K")
    assert abs(np.nanmean(raw)) < 0.5
    assert np.nanstd(raw) < 1.5


@pytest.mark.parametrize("name", SCENES)
def test_daylight_scene_skips_night_only_test(name):
    model, truth, fig = screened(name)
    if name == "day_coast":
        assert "night_fog_contrast" in model.result.skipped
        assert "split_window_excess" not in model.result.skipped
    else:
        assert model.result.skipped == {}


def test_night_fog_contrast_means_low_cloud():
    """The fog test's bit is read as "fog or low water cloud": on the night scene it fires on
    the invented fog patch and never on cold high cloud (truth top colder than 260 K)."""
    model, truth, fig = screened("night_front")
    fired = np.nan_to_num(model.result.margins["night_fog_contrast"], nan=-1.0) > 0
    top_t = truth["cloud_top_temperature"].values
    cold_high = (truth["cloud_fraction"].values > 0) & (top_t < 260.0)
    assert cold_high.sum() > 500
    meanings = truth["cloud_feature"].attrs["flag_meanings"].split()
    fog = truth["cloud_feature"].values == meanings.index("fog_low_stratus")
    thick_fog = fog & (truth["cloud_fraction"].values >= 0.5) & (truth["cloud_optical_depth"].values >= 1.0)
    assert thick_fog.sum() > 200
    hit = fired[thick_fog].mean()
    print(f"night_fog_contrast: fires on {hit:.3f} of thick fog pixels, on {fired[cold_high].mean():.4f} of cold high cloud")
    assert not fired[cold_high].any()
    assert hit >= 0.8
