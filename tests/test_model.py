"""The dashboard's state object, driven without a browser.

Every test works on a copy of the sample scene night_front.nc in tmp_path, so QA journals
are written there and never into the repository.
"""
import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from cloudsieve import cli, session as session_module, simulate as simulation_module
from cloudsieve.codes import CLASS_NAMES, CLEAR, CLOUD, MARGINAL
from cloudsieve.config import to_toml
from cloudsieve.journal import journal_path
from cloudsieve.registry import REGISTRY, bit_table, registered
from cloudsieve.screen import screen_scene
from dashboard.model import ScreeningModel

BITS = bit_table()

SAMPLE = Path(__file__).resolve().parents[1] / "sample_scenes" / "night_front.nc"


@pytest.fixture
def scene_path(tmp_path):
    path = tmp_path / "night_front.nc"
    shutil.copy(SAMPLE, path)
    return path


@pytest.fixture
def model(scene_path):
    return ScreeningModel.open(scene_path)


def _pixels_of(model, code, n, seed=0):
    """n flat indices of pixels currently in class ``code``."""
    idx = np.flatnonzero(model.result.mask.ravel() == code)
    assert idx.size >= n, f"the sample scene has fewer than {n} pixels of class {CLASS_NAMES[code]}"
    return np.sort(np.random.default_rng(seed).choice(idx, n, replace=False))


# ---------------------------------------------------------------------------------------
# retuning
# ---------------------------------------------------------------------------------------
def test_raising_the_cold_threshold_lowers_the_cloud_fraction(model):
    before = model.counts
    version = model.version
    model.set_threshold("cold_departure", 8.0)  # k = 8 σ instead of 3 σ
    after = model.counts
    assert model.version == version + 1
    assert after["cloud"] < before["cloud"]
    assert after["clear"] + after["marginal"] > before["clear"] + before["marginal"]
    assert sum(after.values()) == pytest.approx(1.0)
    assert model.threshold("cold_departure", "sea") == 8.0


def test_switching_a_test_off_changes_counts_and_is_reported(model):
    before = model.counts
    model.set_enabled("cold_departure", False)
    assert model.counts != before
    assert "cold_departure" in model.result.skipped
    assert "cold_departure" not in model.result.margins
    model.set_enabled("cold_departure", True)
    assert model.counts == before


def test_retuning_never_reruns_the_clear_sky_simulation(model, monkeypatch):
    sim, simulate_s = model.sim, model.timings["simulate_s"]

    def forbidden(*args, **kwargs):
        raise AssertionError("the clear-sky simulation ran again")

    monkeypatch.setattr(simulation_module, "simulate", forbidden)
    for test in REGISTRY:
        model.set_threshold(test, model.threshold(test) * 1.5 + 0.1)
        model.set_enabled(test, False)
        model.set_enabled(test, True)
    model.remove_bias = True
    model.marginal_fraction = 0.5
    model.cloud_top = "fixed"
    model.top_pressure = 300.0
    assert model.sim is sim
    assert model.timings["simulate_s"] == simulate_s


def test_cached_retuning_gives_the_same_screening_as_a_fresh_one(model):
    """The model keeps threshold-independent arrays between retunes (pipeline.screen's
    cache); every result must equal a screening computed from scratch."""
    steps = [lambda: model.set_threshold("texture", 0.8), lambda: setattr(model, "remove_bias", True),
             lambda: model.set_threshold("cold_departure", 2.5), lambda: model.set_enabled("texture", False),
             lambda: setattr(model, "remove_bias", False), lambda: model.set_enabled("texture", True),
             lambda: model.set_threshold("split_window_excess", 0.3)]
    for step in steps:
        step()
        fresh = screen_scene(model.scene, model.sim, model.config)
        np.testing.assert_array_equal(model.result.mask, fresh.mask)
        np.testing.assert_array_equal(model.result.bits, fresh.bits)
        assert set(model.result.margins) == set(fresh.margins)
        for test, m in fresh.margins.items():
            np.testing.assert_array_equal(model.result.margins[test], m)
        for ch, d in fresh.departure.items():
            np.testing.assert_array_equal(model.result.departure[ch], d)
        assert model.result.counts == fresh.counts
    # the cache holds the raw departures and those of the latest bias line only
    assert sum(1 for k in model.session._screen_cache if isinstance(k, tuple) and k[0] == "departure") <= 2


def test_threshold_changes_reuse_the_cloud_inversion_and_cloud_top_changes_redo_it(model, monkeypatch):
    calls, inverted = [], []
    real = session_module.invert_all

    def counting(*args, **kwargs):
        calls.append(args[2]["cloud"]["top"])
        inverted.append(np.asarray(kwargs["only"]).copy())
        return real(*args, **kwargs)

    monkeypatch.setattr(session_module, "invert_all", counting)
    # with the bias removal on, the inversion adds the bias fit back to the clear sky and re-runs
    # when a retune moves the fit by more than 0.1 K (invert.bias_close); without it, only for
    # pixels flagged for the first time under these cloud settings
    model.remove_bias = False
    calls.clear()
    inverted.clear()
    flagged = lambda: (model.result.mask == CLOUD) | (model.result.mask == MARGINAL)  # noqa: E731
    seen = flagged()
    model.set_threshold("split_window_excess", 1.0)
    seen_after_one = seen | flagged()
    model.set_threshold("texture", 0.8)
    # same cloud settings: the cached retrieval is masked to the new classes, and just the newly
    # flagged pixels are inverted (never one twice)
    assert set(calls) <= {"consistent"}
    done = np.zeros_like(seen)
    for only in inverted:
        assert not (only & (done | seen)).any()
        done |= only
    assert (done == (seen_after_one | flagged()) & ~seen).all()
    calls.clear()
    model.cloud_top = "fixed"
    assert calls == ["fixed"]
    cl = model.result.cloud
    assert cl.method == "fixed"
    retrieved = np.isfinite(cl.top_pressure)
    assert retrieved.any()
    np.testing.assert_allclose(cl.top_pressure[retrieved], 500.0)
    model.top_pressure = 300.0
    assert calls == ["fixed", "fixed"]
    np.testing.assert_allclose(model.result.cloud.top_pressure[np.isfinite(model.result.cloud.top_pressure)], 300.0)
    model.cloud_top = "opaque"
    assert calls[-1] == "opaque"
    # the cloud layer only covers pixels that are not clear
    clear = model.result.mask == CLEAR
    assert np.all(np.isnan(model.result.cloud.optical_depth[clear]))


@pytest.mark.parametrize("lean", [False, True])
def test_a_cloud_layer_built_up_over_retunes_equals_one_inverted_at_once(scene_path, lean):
    """The session inverts each pixel once per cloud settings, when it is first flagged: after
    retunes that flag more and fewer pixels, its layer must equal that of a new session opened
    on the final settings (every flagged pixel inverted in one call), in memory and in the lean
    mode of large scenes (float32 layer, levels simulated again per block)."""
    from cloudsieve.config import load_config
    from cloudsieve.scene import load_scene
    from cloudsieve.session import Session

    scene = load_scene(scene_path)
    cfg = load_config()
    cfg["bias"]["remove"] = False  # the bias fit would move with the thresholds (tested apart)
    sim = simulation_module.simulate(scene, cfg, levels=not lean)
    grown = Session(scene, cfg, journal=False, sim=sim)
    assert grown.lean is lean
    for test, value in (("cold_departure", 4.0), ("cold_departure", 1.5), ("texture", 0.4), ("cold_departure", 3.0)):
        grown.set_threshold(test, value)
    once = Session(scene, grown.config, journal=False, sim=sim)
    np.testing.assert_array_equal(grown.result.mask, once.result.mask)
    a, b = grown.result.cloud, once.result.cloud
    for name in ("status", "phase", "optical_depth", "optical_depth_sigma", "top_pressure", "top_temperature",
                 "emissivity", "uncertain"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
    assert np.isfinite(a.optical_depth).sum() > 1000


# ---------------------------------------------------------------------------------------
# QA edits
# ---------------------------------------------------------------------------------------
def test_mark_and_undo_are_journaled_and_survive_reopening(model, scene_path):
    journal = journal_path(scene_path)
    cloudy = _pixels_of(model, CLOUD, 40, seed=1)
    clear = _pixels_of(model, CLEAR, 30, seed=2)

    e1 = model.mark("clear", cloudy)
    assert journal.exists()
    lines = [json.loads(x) for x in journal.read_text().splitlines()]
    assert lines[-1]["action"] == "clear" and lines[-1]["count"] == 40 and lines[-1]["index"] == cloudy.tolist()
    assert np.all(model.result.mask.ravel()[cloudy] == CLEAR)
    assert np.all(model.result.bits.ravel()[cloudy] & BITS["analyst_clear"])

    model.mark("cloud", clear)
    assert np.all(model.result.mask.ravel()[clear] == CLOUD)
    undone = model.undo()
    assert undone["action"] == "cloud"
    assert not np.any(model.result.bits.ravel()[clear] & BITS["analyst_cloud"])
    assert [json.loads(x)["action"] for x in journal.read_text().splitlines()] == ["clear", "cloud", "undo"]

    # a new model (a new session, a restarted server) replays the journal
    again = ScreeningModel.open(scene_path)
    assert again.edit_listing() == model.edit_listing()
    assert [(c, a) for _, c, a in again.edit_listing()] == [(40, "clear")]
    assert np.all(again.result.mask.ravel()[cloudy] == CLEAR)
    assert e1["id"] == again.journal.active()[0]["id"]


def test_two_sessions_on_one_scene_keep_journal_ids_unique(scene_path):
    a = ScreeningModel.open(scene_path)
    b = ScreeningModel.open(scene_path)
    ea = a.mark("cloud", [0, 1, 2])
    eb = b.mark("clear", [10, 11])  # b has not seen a's edit in memory; the journal must
    assert eb["id"] != ea["id"]
    assert b.undo()["id"] == eb["id"]
    assert [e["id"] for e in ScreeningModel.open(scene_path).journal.active()] == [ea["id"]]


def test_undo_never_cancels_an_edit_the_session_has_not_seen(scene_path):
    from cloudsieve.journal import StaleEditsError

    a = ScreeningModel.open(scene_path)
    b = ScreeningModel.open(scene_path)
    eb = b.mark("clear", [10, 11])
    ea = a.mark("cloud", [0, 1, 2])  # b's page does not show this edit yet
    with pytest.raises(StaleEditsError, match="another session"):
        b.undo()
    # nothing was undone, and b now shows both edits ...
    assert [e["id"] for e in b.journal.active()] == [eb["id"], ea["id"]]
    assert b.result.mask.ravel()[0] == CLOUD
    # ... so a second undo, informed, cancels the latest one
    assert b.undo()["id"] == ea["id"]
    with pytest.raises(StaleEditsError):  # a's view is now stale in turn
        a.undo()


def test_label_scores_against_the_analyst_labels(model):
    cloudy = _pixels_of(model, CLOUD, 50, seed=3)
    clear = _pixels_of(model, CLEAR, 60, seed=4)
    # the margins before the edits are what the tests said about these pixels
    margins = {t: m.ravel().copy() for t, m in model.result.margins.items()}
    model.mark("cloud", cloudy)
    model.mark("clear", clear)
    scores = model.label_scores()
    assert set(scores) == set(model.result.margins)
    for test, (hit, false_alarm, n_cloud, n_clear) in scores.items():
        fired = np.nan_to_num(margins[test], nan=-np.inf) > 0
        assert (n_cloud, n_clear) == (50, 60)
        assert hit == pytest.approx(fired[cloudy].mean())
        assert false_alarm == pytest.approx(fired[clear].mean())
    # something fired on every pixel that was classed cloud
    fired_any = np.zeros(cloudy.size, bool)
    for test in registered("cloud"):
        if test in margins:
            fired_any |= np.nan_to_num(margins[test][cloudy], nan=-np.inf) > 0
    assert fired_any.all()


def test_label_scores_without_labels_are_nan(model):
    for hit, false_alarm, n_cloud, n_clear in model.label_scores().values():
        assert np.isnan(hit) and np.isnan(false_alarm) and n_cloud == n_clear == 0


# ---------------------------------------------------------------------------------------
# exports
# ---------------------------------------------------------------------------------------
def test_csv_download_equals_the_cli_output_for_the_same_scene_settings_and_edits(model, scene_path, tmp_path):
    model.set_threshold("cold_departure", 4.0, "sea")
    model.set_enabled("texture", False)
    model.marginal_fraction = 0.4
    model.mark("cloud", _pixels_of(model, CLEAR, 25, seed=5))
    model.mark("clear", _pixels_of(model, CLOUD, 35, seed=6))
    ours = pd.read_csv(pd.io.common.BytesIO(model.export_bytes("csv")))

    cfg = tmp_path / "tuned.toml"
    cfg.write_text(to_toml(model.config))
    out = tmp_path / "cli_mask.csv"
    assert cli.main(["screen", str(scene_path), "--out", str(out), "--config", str(cfg), "--quiet"]) == 0
    theirs = pd.read_csv(out)
    pd.testing.assert_frame_equal(ours, theirs)
    assert (ours["mask"] == "cloud").mean() == pytest.approx(model.counts["cloud"], abs=1e-4)


def test_netcdf_download_holds_the_mask_and_the_settings(model, tmp_path):
    import xarray as xr

    model.set_threshold("warm_departure", 3.5, "sea")
    path = tmp_path / "download.nc"
    path.write_bytes(model.export_bytes("netcdf"))
    with xr.open_dataset(path) as ds:
        np.testing.assert_array_equal(ds["mask"].values, model.result.mask)
        cfg = json.loads(ds.attrs["cloudsieve_config"])
        assert cfg["tests"]["warm_departure"]["threshold"]["sea"] == 3.5
        # the file says it came from the dashboard, not from a batch run
        assert "cloudsieve" in ds.attrs["history"] and "dashboard export" in ds.attrs["history"]


# ---------------------------------------------------------------------------------------
# pixel inspector
# ---------------------------------------------------------------------------------------
def test_inspector_curve_of_a_clear_pixel_uses_the_reference_top(model):
    # the inspector says so ("what a grey cloud at the reference top would do"); a thick cloud
    # there must cool the 11 µm channel well below clear
    y, x = np.argwhere(model.result.mask == CLEAR)[0]
    curve = model.optical_depth_curve(int(y), int(x))
    assert curve["top_pressure"] == model.top_pressure
    bt = curve["model"]["11um"]
    assert bt[0] - bt[-1] > 10.0


def test_pixel_info_of_a_cloudy_pixel(model):
    y, x = np.argwhere(model.result.mask == CLOUD)[0]
    info = model.pixel_info(int(y), int(x))
    assert info["class"] == "cloud" and info["tests_fired"]
    assert {"t_skin", "t_air", "tcwv", "sat_zenith", "surface"} <= set(info["inputs"])
    assert set(info["channels"]) == set(model.scene.channels)
    for ch, v in info["channels"].items():
        assert v["departure"] == pytest.approx(v["observed"] - v["clear"] - v["bias_removed"], abs=1e-3)
        assert v["sigma"] > 0
    assert set(info["margins"]) == set(model.result.margins)
    assert any(m is not None and m > 0 for t, m in info["margins"].items() if t in registered("cloud"))
    cloud = info["cloud"]
    assert {"status", "optical_depth", "optical_depth_sigma", "top_pressure", "emissivity"} <= set(cloud)
    curve = info["curve"]
    tau = np.asarray(curve["tau"])
    assert tau[0] == 0 and np.all(np.diff(tau) > 0)
    for ch, bt in curve["model"].items():
        bt = np.asarray(bt)
        assert bt.shape == tau.shape
        # zero optical depth is the clear sky
        assert bt[0] == pytest.approx(info["channels"][ch]["clear"], abs=0.05)
        assert curve["observed"][ch] == info["channels"][ch]["observed"]


def test_pixel_info_outside_the_grid_is_a_clear_error(model):
    with pytest.raises(ValueError, match="outside"):
        model.pixel_info(10_000, 0)


def test_inspector_text_explains_an_emissivity_outside_the_single_layer_model(model):
    # the raw radiance ratio can leave [0, 1] (noise, a second layer, non-grey ice); the
    # inspector shows the clipped value, as exported, and says why
    from dashboard.views import Notices, PixelInspector
    from dashboard.views.focus import Focus

    cl = model.result.cloud
    emis = np.asarray(cl.emissivity)  # (inversion channel, y, x)
    outside = np.argwhere(np.any(np.isfinite(emis) & ((emis > 1.02) | (emis < -0.02)), axis=0))
    assert len(outside), "sample scene has no pixel with a ratio outside [0, 1]"
    y, x = (int(v) for v in outside[0])
    inspector = PixelInspector(model, Focus(model.result.mask.shape), Notices())
    text = inspector.text((y, x))
    assert "outside the single-layer model" in text


def test_changing_one_setting_leaves_a_configured_top_alone(scene_path, tmp_path):
    """Found in review: every setting change sent the slider's top pressure to the session, so a
    configured top pressure outside the slider range, or a top height, was silently replaced."""
    from cloudsieve.config import merge_config

    model = ScreeningModel.open(scene_path, merge_config({"cloud": {"top": "fixed", "top_pressure": 20.0}}),
                                journal=False)
    model.marginal_fraction = 0.4
    assert model.session.top_pressure == 20.0
    model = ScreeningModel.open(scene_path, merge_config({"cloud": {"top": "fixed", "top_height": 2.0}}),
                                journal=False)
    tops = model.result.cloud.top_pressure.copy()
    model.marginal_fraction = 0.4
    assert model.config["cloud"]["top_height"] == 2.0
    same = np.isfinite(tops) & np.isfinite(model.result.cloud.top_pressure)
    np.testing.assert_array_equal(tops[same], model.result.cloud.top_pressure[same])
    model.top_pressure = 300.0  # the analyst's own choice replaces the height
    assert "top_height" not in model.config["cloud"]


def test_saved_settings_and_journal_reproduce_the_netcdf_download(model, scene_path, tmp_path):
    """The dashboard's "Save settings (TOML)" file, given to `cloudsieve screen --config` with the
    scene's QA journal, writes the same variables as the NetCDF download; the NetCDF carries the
    same TOML text, which `--config` reads back to the same configuration."""
    import tomllib

    import xarray as xr

    from cloudsieve.config import merge_config
    from dashboard.views.exports import settings_toml

    model.set_threshold("split_window_excess", 2.5, "sea")
    model.set_enabled("texture", False)
    model.cloud_top = "opaque"
    model.mark("cloud", _pixels_of(model, CLEAR, 20, seed=8))
    ours = tmp_path / "download.nc"
    ours.write_bytes(model.export_bytes("netcdf"))
    cfg = tmp_path / "night_front_settings.toml"
    cfg.write_text(settings_toml(model))
    theirs = tmp_path / "cli.nc"
    assert cli.main(["screen", str(scene_path), "--out", str(theirs), "--config", str(cfg), "--quiet"]) == 0
    with xr.open_dataset(ours) as a, xr.open_dataset(theirs) as b:
        assert set(a.data_vars) == set(b.data_vars)
        for name in a.data_vars:
            np.testing.assert_array_equal(a[name].values, b[name].values, err_msg=name)
        assert merge_config(tomllib.loads(a.attrs["cloudsieve_config_toml"])) == model.config
        assert a.attrs["cloudsieve_config_toml"] == b.attrs["cloudsieve_config_toml"]


def test_core_messages_reach_the_app_in_its_own_words():
    """Channel codes and test names in core notes become the app's labels."""
    from dashboard.views.style import plain_words

    assert plain_words("test night_fog_contrast skipped: needs 3p9um and 11um") == \
        "test Night fog contrast skipped: needs 3.9 µm and 11 µm"
    assert plain_words("channels 8p6um, 12um") == "channels 8.6 µm, 12 µm"


def test_an_edit_that_repeats_one_in_force_is_refused_with_a_warning(model):
    """Marking the same pixels cloud twice adds nothing to the journal (and says so); marking
    them clear afterwards is a real change and is recorded."""
    from cloudsieve.session import RepeatedEdit

    idx = _pixels_of(model, CLEAR, 12, seed=11)
    model.mark("cloud", idx)
    n = len(model.edit_listing())
    with pytest.raises(RepeatedEdit, match="already marked cloud"):
        model.mark("cloud", idx[:5])
    assert len(model.edit_listing()) == n
    model.mark("clear", idx[:5])
    assert len(model.edit_listing()) == n + 1


def test_each_edit_is_listed_with_its_place(model):
    """The QA card lists each edit with the row and column range of its pixels."""
    nx = model.result.mask.shape[1]
    idx = np.array([5 * nx + 7, 9 * nx + 12, 6 * nx + 30])  # rows 5–9, columns 7–30
    model.mark("cloud", idx)
    place = model.edit_places()[0]
    assert place["action"] == "cloud" and place["count"] == 3
    assert place["rows"] == (5, 9) and place["cols"] == (7, 30)
    from dashboard.views import Notices
    from dashboard.views.focus import Focus
    from dashboard.views.qa import QAPanel

    text = QAPanel(model, Focus(model.result.mask.shape), Notices())._edits_text()
    assert "rows 5–9, columns 7–30" in text


def test_departure_histogram_draws_the_thresholds_of_the_surface_shown(tmp_path):
    """On a scene of sea and land, each surface's histogram draws that surface's cold threshold:
    moving the land threshold moves the land line and leaves the sea line where it was."""
    import shutil

    import holoviews as hv

    from dashboard.views.diagnostics import DepartureHistogram

    path = tmp_path / "day_coast.nc"
    shutil.copy(Path(__file__).resolve().parents[1] / "sample_scenes" / "day_coast.nc", path)
    model = ScreeningModel.open(path)
    hist = DepartureHistogram(model)
    assert set(hist.surface.options.values()) >= {"sea", "land"}

    def cold_line(surface):
        plot = hist.plot(surface=surface)
        return [el.data for el in plot if isinstance(el, hv.VLine)][0]

    sea, land = cold_line("sea"), cold_line("land")
    model.set_threshold("cold_departure", 5.0, "land")
    assert cold_line("sea") == pytest.approx(sea)
    assert cold_line("land") < land  # a larger k·σ puts the cold line further out
    log_plot = hist.plot(surface="land", log=True)
    assert log_plot.opts.get().kwargs.get("logy") is True


def test_cloud_class_outline_for_the_temperature_maps(model):
    """The outline drawn over the temperature maps is the rim of the cloud class (cloud pixels with
    a non-cloud neighbour), and nothing when switched off."""
    from dashboard.views import MapGrid, Notices
    from dashboard.views.focus import Focus

    grid = MapGrid(model, Focus(model.result.mask.shape), Notices())
    rim = np.isfinite(grid.mask_outline().data["cloud rim"])
    cloud = model.result.mask == CLOUD
    assert rim.any() and np.all(cloud[rim])
    interior = cloud.copy()
    interior[1:-1, 1:-1] &= cloud[:-2, 1:-1] & cloud[2:, 1:-1] & cloud[1:-1, :-2] & cloud[1:-1, 2:]
    assert not np.any(rim[1:-1, 1:-1] & interior[1:-1, 1:-1])
    assert not np.isfinite(grid.mask_outline(show=False).data["cloud rim"]).any()


def test_live_skill_against_a_truth_file_beside_the_scene(tmp_path):
    """With `<scene>_truth.nc` beside the scene the session scores its current mask against it
    (definitions of tests/skill_figures.py) and the score follows a retune; without one, None."""
    import shutil

    from skill_figures import skill_figures

    samples = Path(__file__).resolve().parents[1] / "sample_scenes"
    shutil.copy(samples / "night_front.nc", tmp_path / "night_front.nc")
    alone = ScreeningModel.open(tmp_path / "night_front.nc")
    assert alone.truth_skill() is None
    shutil.copy(samples / "night_front_truth.nc", tmp_path / "night_front_truth.nc")
    model = ScreeningModel.open(tmp_path / "night_front.nc")
    sk = model.truth_skill()
    import xarray as xr

    ref = skill_figures(model.result, xr.open_dataset(tmp_path / "night_front_truth.nc"))
    assert sk.pod == pytest.approx(ref.pod) and sk.clear_classed_cloud == pytest.approx(ref.clear_classed_cloud)
    model.set_threshold("cold_departure", 1.0)  # much more cloud: POD up, false alarms up
    after = model.truth_skill()
    assert after.clear_classed_cloud > sk.clear_classed_cloud and after.pod >= sk.pod
    from dashboard.views import ClassCounts

    assert "vs truth" in ClassCounts(model)._html()


def test_settings_load_and_reset(model, tmp_path):
    """Saved settings loaded into another session give its thresholds, switches and cloud settings;
    reset brings the defaults back; sections that would change the clear-sky simulation are not
    applied and are named."""
    import copy

    from cloudsieve.config import load_config

    model.set_threshold("cold_departure", 4.5, "sea")
    model.set_enabled("texture", False)
    model.cloud_top = "opaque"
    saved = copy.deepcopy(model.config)
    mask_tuned = model.result.mask.copy()
    other = ScreeningModel.open(model.scene.path, journal=False)
    assert other.apply_settings(saved) == []
    assert other.threshold("cold_departure", "sea") == 4.5 and not other.enabled("texture")
    assert other.cloud_top == "opaque"
    np.testing.assert_array_equal(other.result.mask, mask_tuned)
    defaults = load_config()
    assert other.apply_settings(defaults) == []
    assert other.threshold("cold_departure", "sea") == defaults["tests"]["cold_departure"]["k_sigma"]["sea"]
    assert other.enabled("texture") and other.cloud_top == defaults["cloud"]["top"]
    changed = copy.deepcopy(defaults)
    changed["background_errors"]["skin_temperature"]["sea"] = 2.0
    assert other.apply_settings(changed) == ["background_errors"]
