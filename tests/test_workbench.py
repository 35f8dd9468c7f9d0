"""The analyst's workbench without a browser: the "why flagged" and margin maps, the truth
comparison, maps sized to the window, per-test histograms with per-surface lines, and the
stages the loading panel shows. The same views in a browser: test_app_ui.py.

Source of the expected values: pixels worked out by hand, brute-force recomputation from the
screening's margins, and the project's skill definitions (tests/skill_figures.py, the
reference for POD and false alarms) — the views must say what the core computed."""
import asyncio
import shutil
from pathlib import Path

import holoviews as hv
import numpy as np
import pytest

from cloudsieve.codes import CLEAR, CLOUD, MARGINAL, NO_DATA
from cloudsieve.registry import REGISTRY, bit_table
from cloudsieve.truth import COMPARISON_NAMES, Truth, comparison, skill
from dashboard.model import ScreeningModel
from dashboard.views import MapGrid, Notices
from dashboard.views.diagnostics import DepartureHistogram
from dashboard.views.focus import Focus
from dashboard.views.maps import DEFAULT_MAPS, FRAME_WIDTH_RANGE, MAP_EXTRA_WIDTH, frame_size

SAMPLES = Path(__file__).resolve().parents[1] / "sample_scenes"


@pytest.fixture
def scene_path(tmp_path):
    for name in ("night_front.nc", "night_front_truth.nc"):
        shutil.copy(SAMPLES / name, tmp_path / name)
    return tmp_path / "night_front.nc"


@pytest.fixture
def model(scene_path):
    return ScreeningModel.open(scene_path)


@pytest.fixture
def grid(model):
    return MapGrid(model, Focus(model.result.mask.shape), Notices())


def _cloud_tests():
    return [t for t in REGISTRY if REGISTRY[t].makes_cloud]


# ---------------------------------------------------------------------------------------
# why flagged
# ---------------------------------------------------------------------------------------
def test_why_map_names_a_fired_test_for_every_cloud_pixel_and_only_fired_ones(model, grid):
    """Every pixel classed cloud by the tests is put down to a cloud test that fired there, the one
    with the largest margin relative to its threshold; no pixel is put down to a test that did not
    fire; pixels where nothing fired are empty (NaN)."""
    res = model.result
    codes = grid.why_codes()
    tests = _cloud_tests()
    cloud = res.mask == CLOUD
    assert cloud.any() and np.all(np.isfinite(codes[cloud]))
    fired_any = np.zeros(res.mask.shape, bool)
    rel = {}
    for k, t in enumerate(tests):
        m = np.nan_to_num(np.asarray(res.margins.get(t, np.full(res.mask.shape, np.nan))), nan=-np.inf)
        fired_any |= m > 0
        rel[t] = m / np.maximum(np.abs(np.asarray(res.thresholds.get(t, 1.0))), 1e-6)
        assert np.all(m[codes == k] > 0), f"pixels put down to {t} where it did not fire"
    assert np.all(np.isnan(codes[~fired_any & (res.mask != CLOUD)]) | (codes[~fired_any & (res.mask != CLOUD)]
                                                                       >= len(tests)))
    # the deciding test has the largest relative margin of those that fired (brute force per pixel)
    stack = np.stack([rel[t] for t in tests])
    picked = codes[cloud].astype(int)
    assert np.all(stack[:, cloud][picked, np.arange(picked.size)] >= stack[:, cloud].max(axis=0) - 1e-5)


def test_why_map_shows_analyst_edits_and_the_warm_flag(model, grid):
    """An analyst's edit is its own category; pixels where only the warm-departure flag fired (classed
    clear, invisible on the class map) are shown as that flag."""
    warm = [t for t in REGISTRY if not REGISTRY[t].makes_cloud]
    assert warm == ["warm_departure"]
    n_cloud = len(_cloud_tests())
    model.set_threshold("warm_departure", 0.3)  # a low warm threshold: some clear pixels carry the flag
    codes = grid.why_codes()
    flag = np.nan_to_num(np.asarray(model.result.margins["warm_departure"]), nan=-1) > 0
    flag_only = flag & (model.result.mask != CLOUD)
    assert flag_only.sum() > 10
    assert np.all(codes[flag_only] == n_cloud + 1)
    assert grid._why_names[n_cloud + 1].startswith(REGISTRY["warm_departure"].label)
    idx = np.flatnonzero((model.result.mask == CLEAR).ravel() & ~flag.ravel())[:25]
    model.mark("cloud", idx)
    assert np.all(grid.why_codes().ravel()[idx] == n_cloud)
    assert np.all(model.result.bits.ravel()[idx] & bit_table()["analyst_cloud"])


# ---------------------------------------------------------------------------------------
# truth comparison
# ---------------------------------------------------------------------------------------
def test_truth_comparison_categories_on_a_hand_made_case():
    """Each category from a pixel worked out by hand; POD from the categories equals skill()'s."""
    mask = np.array([[CLOUD, CLEAR, MARGINAL, CLOUD, MARGINAL, CLEAR, NO_DATA, CLOUD]])
    frac = np.array([[1.0, 1.0, 1.0, 0.0, 0.0, 0.0, 1.0, 0.3]], np.float32)
    tau = np.array([[5.0, 5.0, 2.0, 0.0, 0.0, 0.0, 5.0, 0.4]], np.float32)
    truth = Truth(Path("x_truth.nc"), frac, tau)
    got = comparison(mask, truth)
    want = [0, 1, 1, 2, 3, np.nan, np.nan, 4]  # caught, missed, missed (marginal), false alarm, …
    np.testing.assert_array_equal(got[0], np.array(want, np.float32))
    assert COMPARISON_NAMES[1] == "truth cloud, missed"


def test_truth_comparison_agrees_with_the_skill_figures(model):
    codes = comparison(model.result.mask, model.session.truth)
    sk = skill(model.result.mask, model.session.truth)
    caught, missed = int((codes == 0).sum()), int((codes == 1).sum())
    assert caught + missed == sk.n_target
    assert caught / (caught + missed) == pytest.approx(sk.pod)
    assert int((codes == 2).sum()) / sk.n_clear == pytest.approx(sk.clear_classed_cloud)


def test_truth_map_offered_only_where_a_truth_file_exists(model, tmp_path):
    with_truth = MapGrid(model, Focus(model.result.mask.shape), Notices())
    assert "truth" in with_truth.shown.options.values()
    shutil.copy(SAMPLES / "day_coast.nc", tmp_path / "day_coast_alone.nc")
    other = ScreeningModel.open(tmp_path / "day_coast_alone.nc", journal=False)
    assert "truth" not in MapGrid(other, Focus(other.result.mask.shape), Notices()).shown.options.values()


# ---------------------------------------------------------------------------------------
# maps chosen and sized to the window
# ---------------------------------------------------------------------------------------
def test_frame_size_fills_the_width_and_enlarges_one_map():
    shape = (300, 300)
    # a 1366 px window: about 560 px left beside the QA column → one column of maps, each wider than before
    ncols, fw, fh = frame_size(560, 8, shape)
    assert ncols == 1 and fw == 560 - MAP_EXTRA_WIDTH and fh == fw
    # a 1920 px window: two columns
    ncols, fw, _ = frame_size(1100, 8, shape)
    assert ncols == 2 and fw == 1100 // 2 - MAP_EXTRA_WIDTH
    # one map enlarged fills the width, but not taller than the window
    ncols, fw, fh = frame_size(1100, 1, shape, height=900)
    assert ncols == 1 and fh <= 900 - 260 + 1 and fw >= FRAME_WIDTH_RANGE[0]
    # never below the smallest size
    assert frame_size(100, 8, shape)[1] == FRAME_WIDTH_RANGE[0]


def test_map_grid_shows_the_chosen_maps_and_rebuilds_only_when_their_size_changes(grid):
    assert grid.keys_shown == [k for k in grid.shown.options.values() if k in DEFAULT_MAPS]
    first = grid._grid[0]
    grid.set_window(grid._available + 5)  # a few pixels: the same layout, nothing redrawn
    assert grid._grid[0] is first
    grid.set_window(1400, 900)
    assert grid._grid[0] is not first and grid._fw == 1400 // 2 - MAP_EXTRA_WIDTH
    grid.enlarge.value = "class"
    assert grid.keys_shown == ["class"] and len(grid._grid[0].objects) == 1
    assert grid._fw > 1400 // 2 - MAP_EXTRA_WIDTH
    grid.enlarge.value = ""
    grid.shown.value = ["margin", "why"]
    assert grid.keys_shown == ["why", "margin"]
    css = [c.css_classes[0] for c in grid._grid[0].objects]
    assert css == ["cs-map-why", "cs-map-margin"]


def test_margin_map_follows_the_chosen_test(model, grid):
    for test in ("cold_departure", "split_window_excess"):
        img = grid.margin(test)
        np.testing.assert_array_equal(np.asarray(img.data["margin"]),
                                      np.asarray(model.result.margins[test], np.float32))
    assert "Split-window" in grid.title_margin("split_window_excess")


# ---------------------------------------------------------------------------------------
# per-test histograms
# ---------------------------------------------------------------------------------------
def _lines(overlay):
    return [el.data for el in overlay if isinstance(el, hv.VLine)]


def test_histogram_threshold_lines_follow_the_surface_shown(tmp_path):
    """On a scene with sea and land, moving the sea threshold moves the sea line and leaves the
    land line where it was (the lines are the shown surface's own thresholds)."""
    shutil.copy(SAMPLES / "day_coast.nc", tmp_path / "day_coast.nc")
    m = ScreeningModel.open(tmp_path / "day_coast.nc", journal=False)
    h = DepartureHistogram(m)
    assert {"sea", "land"} <= set(h.surface.options.values())
    sea, land = _lines(h.plot(surface="sea")), _lines(h.plot(surface="land"))
    band_sea = _lines(h.plot(surface="sea", quantity="cold_departure"))
    m.set_threshold("cold_departure", 2 * m.threshold("cold_departure", "sea"), surface="sea")
    assert _lines(h.plot(surface="land")) == land
    assert _lines(h.plot(surface="sea"))[0] < sea[0]  # the cold line moved further from zero
    # margin histograms: the threshold sits at 0 for every pixel; the marginal band's start follows
    band2 = _lines(h.plot(surface="sea", quantity="cold_departure"))
    assert band2[0] == band_sea[0] == 0.0 and band2[1] < band_sea[1] < 0
    # the warm line on land is land's own value
    assert land[1] == pytest.approx(np.nanmedian(np.asarray(m.result.thresholds["warm_departure"])[
        (m.scene.data["surface"].values == 1) & m.scene.data["valid"].values]))


def test_every_test_has_a_margin_histogram(model):
    h = DepartureHistogram(model)
    tests = [t for t in h.quantity.options.values() if t != "departure"]
    assert set(tests) == set(model.result.margins)
    for t in tests:
        for log in (False, True):
            plot = h.plot(surface="sea", quantity=t, log=log)
            hv.render(plot)
            assert _lines(plot)[0] == 0.0


# ---------------------------------------------------------------------------------------
# loading stages
# ---------------------------------------------------------------------------------------
def test_opening_a_scene_reports_each_stage_in_order(scene_path):
    """Opening an uncached scene goes through reading, simulating, screening and drawing, each
    named on the loading panel with the pixel count where it matters; the panel is hidden after."""
    from dashboard import app

    page = app.Session(data_dir=scene_path.parent)
    seen = []
    page.loading.stage = seen.append
    app._CACHE.clear()
    target = scene_path.with_name("copy.nc")
    shutil.copy(scene_path, target)
    asyncio.run(page.open_name("copy.nc"))
    assert [s.split()[0] for s in seen] == ["starting", "reading", "simulating", "screening", "drawing"]
    assert "90,000 pixels" in seen[2]
    assert not page.loading.active
    assert page.model.scene.path.name == "copy.nc"
