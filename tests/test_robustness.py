"""Robustness of the screening to a world unlike the one it assumes, on one small scene.

The scene is a 100 × 100 cut of the invented night_front (rows 150-249, columns 120-219:
clear sea of the moist warm sector, cirrus streaks, the upwelling fog patch and the thick
frontal band), made by ``sample_scenes/make_scenes.py`` (``make_scene_in_world``) in worlds
that change one factor at a time around the honest truth world of the sample files
(``HONEST_WORLD``; how it differs from the screening's, see tests/test_skill.py and
sample_scenes/README.md):

* self and foreign water-vapour continuum ×0.8, ×1.0, ×1.2 of the screening's table (the
  honest world: self ×1.1, foreign ×0.9);
* humidity exponent λ = 2, 3, 4 over the whole cut (honest: 2.3-3.6, smooth; the screening: 3);
* lapse rate 5.5, 6.5, 7.5 K km⁻¹ over the whole cut (honest: 6.0-7.2; the screening: 6.5).

Ranges from the project's issue 13. Each case is screened with the default configuration
through ``cloudsieve.session.Session``. Targets (issue 13): at most 2 % of truth-clear pixels
classed `cloud`, POD ≥ 0.97 for truth cloud fraction ≥ 0.5 and optical depth ≥ 1, in every
case. Cases main misses are strict expected failures with the measured figure. A control
case, the screening's own world (``SCREENING_WORLD``), shows that the harness can pass.
"""
import dataclasses

import numpy as np
import pytest

from cloudsieve.config import load_config
from cloudsieve.session import Session
from skill_figures import MAX_CLEAR_CLASSED_CLOUD, MIN_POD, scene_generator, skill_figures

CUT = (slice(150, 250), slice(120, 220))
#: case -> changes to the honest world ("screening_world": the screening's own world instead)
CASES = {
    "honest": {},
    "continuum_0.8": dict(self_continuum=0.8, foreign_continuum=0.8),
    "continuum_1.0": dict(self_continuum=1.0, foreign_continuum=1.0),
    "continuum_1.2": dict(self_continuum=1.2, foreign_continuum=1.2),
    "humidity_exponent_2": dict(humidity_exponent=(2.0, 2.0)),
    "humidity_exponent_3": dict(humidity_exponent=(3.0, 3.0)),
    "humidity_exponent_4": dict(humidity_exponent=(4.0, 4.0)),
    "lapse_rate_5.5": dict(lapse_rate=(5.5, 5.5)),
    "lapse_rate_6.5": dict(lapse_rate=(6.5, 6.5)),
    "lapse_rate_7.5": dict(lapse_rate=(7.5, 7.5)),
    # the background's pixel-to-pixel errors 1.4 times what [background_noise] assumes (skin 0.42 K,
    # water vapour 10 %): the configuration's noise is not the truth's
    "pixel_noise_x1.4": dict(bg_pixel_t_skin_rms=0.42, bg_pixel_tcwv_rel_rms=0.10),
    "screening_world": None,
}
#: Cases main misses (default configuration), with the figure: none at present. Without the
#: clear-sky bias removal (`[bias] remove = false`) lapse rates of 5.5 and 7.5 K km⁻¹ gave 8.0 and
#: 2.6 % of truth-clear pixels classed cloud (the whole scene's departures shift by +1.3 and
#: −0.8 K): the sweep is what the bias removal is for.
MISSES_CLEAR = {}
MISSES_POD = {}
_cache = {}


@pytest.fixture(scope="module")
def sweep_dir(tmp_path_factory):
    return tmp_path_factory.mktemp("robustness")


def screened(case, folder):
    """(figures, truth-clear mean 11 µm departure [K]) of one case, made and screened once."""
    if case not in _cache:
        gen = scene_generator()
        changes = CASES[case]
        world = gen.SCREENING_WORLD if changes is None else dataclasses.replace(gen.HONEST_WORLD, **changes)
        scene, truth = gen.make_scene_in_world("night_front", world, *CUT)
        path = folder / f"{case}.nc"
        gen.write_netcdf(scene, path)
        model = Session.open(path, load_config(), journal=False, invert_scope="flagged")
        clear = truth["cloud_fraction"].values == 0
        raw = model.scene.data["bt_11um"].values - model.sim.bt_clear[model.sim.channels.index("11um")]
        _cache[case] = skill_figures(model.result, truth), float(np.nanmean(raw[clear]))  # before bias removal
    return _cache[case]


def _params(misses):
    return [pytest.param(c, marks=pytest.mark.xfail(strict=True, reason=misses[c])) if c in misses else c
            for c in CASES]


@pytest.mark.parametrize("case", _params(MISSES_CLEAR))
def test_truth_clear_pixels_classed_cloud(case, sweep_dir):
    fig, _ = screened(case, sweep_dir)
    print(fig.line(case))
    assert fig.n_clear > 2000
    assert fig.clear_classed_cloud <= MAX_CLEAR_CLASSED_CLOUD


@pytest.mark.parametrize("case", _params(MISSES_POD))
def test_probability_of_detection(case, sweep_dir):
    fig, _ = screened(case, sweep_dir)
    print(fig.line(case))
    assert fig.n_target > 2000
    assert fig.pod >= MIN_POD


def test_the_sweep_changes_the_truth(sweep_dir):
    """The worlds really differ: more continuum absorption and a steeper lapse rate make the
    clear sky colder than the screening expects (the mean truth-clear 11 µm departure, before
    the bias removal, falls
    by more than 0.1 K from step to step; ours, well above the ~0.01 K sampling error of a
    4000-pixel mean of ~0.8 K scatter). Prints the table of every case."""
    rows = {case: screened(case, sweep_dir) for case in CASES}
    print("\ncase                   clear→cloud  marginal   POD     mean clear 11 µm departure")
    for case, (fig, dep) in rows.items():
        print(f"{case:22s} {100 * fig.clear_classed_cloud:8.2f} %  {100 * fig.clear_classed_marginal:6.2f} %  "
              f"{fig.pod:.4f}  {dep:+.2f} K")
    for steps in (("continuum_0.8", "continuum_1.0", "continuum_1.2"),
                  ("lapse_rate_5.5", "lapse_rate_6.5", "lapse_rate_7.5")):
        deps = [rows[c][1] for c in steps]
        assert np.all(np.diff(deps) < -0.1), f"{steps}: {deps}"
