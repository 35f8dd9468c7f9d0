"""Large scenes in the dashboard (lean mode), model level and without a browser.

A real 4000 × 4000 scene takes minutes to simulate on a 2-core machine, so these tests move
the two size limits down instead — the pixel count above which the simulation keeps no level
data (lean mode) and the one above which maps are rasterized — and run the sample scene
``night_front`` (300 × 300) through the large-scene path. The browser run on a real large
scene, with its time and memory figures, is ``tests/benchmarks/bench_dashboard_scale.py``.
"""
from pathlib import Path

import numpy as np
import pytest

from cloudsieve import codes as pl, simulate as simulation
from cloudsieve.config import load_config
from dashboard.model import ScreeningModel
from dashboard.views import Focus, MapGrid, Notices, PixelInspector
from dashboard.views import maps as maps_module

SAMPLE = Path(__file__).resolve().parents[1] / "sample_scenes" / "night_front.nc"


@pytest.fixture(scope="module")
def models(tmp_path_factory):
    """The same scene opened normally and in lean mode (limit moved below its 90 000 pixels).

    The scene is night_front with its float variables stored as float32, as satellite scenes
    usually are (the sample file stores float64)."""
    import xarray as xr

    path = tmp_path_factory.mktemp("lean") / "night_front32.nc"
    ds = xr.open_dataset(SAMPLE).load()
    for name, var in ds.data_vars.items():
        if var.dtype == np.float64:
            ds[name] = var.astype(np.float32)
    ds.to_netcdf(path)
    cfg = load_config()
    full = ScreeningModel.open(path, cfg, journal=False)
    mp = pytest.MonkeyPatch()
    mp.setattr(simulation, "LEVELS_PIXEL_LIMIT", 10_000)
    try:
        lean = ScreeningModel.open(path, cfg, journal=False)
    finally:
        mp.undo()
    return full, lean


def test_compact_scene_narrows_only_lat_lon_and_only_losslessly(monkeypatch):
    from cloudsieve.session import compact_scene
    from cloudsieve.scene import load_scene

    monkeypatch.setattr(simulation, "LEVELS_PIXEL_LIMIT", 10_000)
    scene = load_scene(SAMPLE, config=load_config())
    before = {k: scene.data[k].values.copy() for k in ("lat", "bt_11um")}
    scene.data.coords["lon"] = scene.data["lon"] + 1e-9  # not representable in float32: stays
    compact_scene(scene)
    assert scene.data["lat"].dtype == np.float32 and scene.data["lon"].dtype == np.float64
    assert scene.data["bt_11um"].dtype == np.float64  # data variables feed the arithmetic: untouched
    for k, v in before.items():
        np.testing.assert_array_equal(scene.data[k].values.astype(np.float64), v)


def _assert_same(a, b, tol=1e-6):
    assert set(a.data_vars) == set(b.data_vars)
    for name in a.data_vars:
        x, y = a[name].values.astype(float), b[name].values.astype(float)
        np.testing.assert_array_equal(np.isnan(x), np.isnan(y), err_msg=name)
        ok = np.isfinite(x) & np.isfinite(y)
        assert np.array_equal(np.isinf(x), np.isinf(y)), name
        if ok.any():
            assert np.max(np.abs(x[ok] - y[ok])) <= tol, name


def test_lean_model_holds_float32_and_exports_the_same(models):
    """Lean mode keeps no level data, holds lat/lon, margins and the cloud layer in float32 and
    each threshold as its median (what the diagnostics show), and still writes the very file
    the normal path writes (exports are float32; tolerance 1e-6, the chunked-path standard)."""
    full, lean = models
    assert not full.lean and lean.lean and lean.sim.level_pressure is None
    assert lean.scene.data["lat"].dtype == np.float32 and full.scene.data["lat"].dtype == np.float64
    assert lean.result.margins["cold_departure"].dtype == np.float32
    assert lean.result.cloud.optical_depth.dtype == np.float32
    assert lean.result.cloud.status.dtype == np.int8
    valid = full.scene.data["valid"].values
    for test, thr in full.result.thresholds.items():
        assert lean.result.thresholds[test].ndim == 0
        assert float(lean.result.thresholds[test]) == pytest.approx(
            float(np.nanmedian(np.broadcast_to(thr, valid.shape)[valid])), abs=1e-12)
    _assert_same(full.result_dataset(), lean.result_dataset())


def test_lean_model_retunes_and_inspects_like_the_normal_one(models):
    full, lean = models
    for m in (full, lean):
        m.set_threshold("cold_departure", 2.0)
    np.testing.assert_array_equal(full.result.mask, lean.result.mask)
    _assert_same(full.result_dataset(), lean.result_dataset())
    cloudy = np.argwhere((lean.result.mask == pl.CLOUD) & np.isfinite(lean.result.cloud.top_pressure))
    row, col = cloudy[len(cloudy) // 2]
    a, b = full.pixel_info(int(row), int(col)), lean.pixel_info(int(row), int(col))
    assert a["class"] == b["class"] == "cloud"
    # the curve: the normal model reads the stored levels, the lean one simulates the column again
    assert b["curve"] is not None
    for ch in a["curve"]["model"]:
        np.testing.assert_array_equal(b["curve"]["model"][ch], a["curve"]["model"][ch])
    assert b["cloud"]["top_pressure"] == a["cloud"]["top_pressure"]
    for m in (full, lean):
        m.set_threshold("cold_departure", 3.0)


def test_large_scene_maps_rasterize_and_reaggregate_a_zoomed_view(models, monkeypatch):
    """Maps of a large scene are datashader rasters; a zoomed view is aggregated again from
    the full-resolution arrays (one source pixel per raster cell at 1:1), and the inspector
    and the pointer readout read the source arrays."""
    from holoviews.operation.datashader import rasterize

    _, lean = models
    monkeypatch.setattr(maps_module, "RASTERIZE_ABOVE", 10_000)
    ds = lean.scene.data
    focus = Focus((ds.sizes["y"], ds.sizes["x"]))
    notices = Notices()
    grid = MapGrid(lean, focus, notices)
    assert grid.rasterized
    whole = rasterize(grid.mask(), aggregator="first", width=100, height=100, dynamic=False)
    assert whole.data["class"].shape == (100, 100)  # 300 × 300 drawn on 100 × 100
    zoom = rasterize(grid.mask(), aggregator="first", x_range=(99.5, 149.5), y_range=(59.5, 109.5), width=50,
                     height=50, dynamic=False)
    np.testing.assert_array_equal(zoom.data["class"].values, lean.result.mask[60:110, 100:150])
    obs = rasterize(grid.observed("11um"), aggregator="mean", x_range=(99.5, 149.5), y_range=(59.5, 109.5),
                    width=50, height=50, dynamic=False)
    np.testing.assert_allclose(obs.data["bt_obs"].values, ds["bt_11um"].values[60:110, 100:150], rtol=1e-6)
    # clicking picks the source pixel; the inspector text names it; the readout reads its values
    inspector = PixelInspector(lean, focus, notices)
    grid._on_tap(x=120.2, y=80.4)
    assert focus.pixel == (80, 120)
    assert "Pixel row 80, column 120" in inspector.text(focus.pixel, lean.version)
    grid._on_pointer(x=120.2, y=80.4)
    obs_value = float(ds["bt_11um"].values[80, 120])
    assert f"observed {obs_value:.2f} K" in grid._readout.object
    assert f"class {pl.CLASS_NAMES[int(lean.result.mask[80, 120])]}" in grid._readout.object


# ---------------------------------------------------------------------------------------
# the same path in a real browser (limits moved down, so the sample scene takes it)
# ---------------------------------------------------------------------------------------
_CLASS_MAP = """() => {
  const fig = [...Bokeh.index.all_views()].filter(v => v.model.type === 'Figure').find(
      v => v.model.right.some(r => r.type === 'ColorBar' && r.title === 'class'));
  const img = fig.model.renderers.find(r => r.glyph && r.glyph.type === 'Image');
  const d = img.data_source.data;
  return {x0: fig.model.x_range.start, x1: fig.model.x_range.end, ix: d.x[0], idw: d.dw[0]};
}"""


@pytest.mark.ui
def test_large_scene_path_in_the_browser(serve_app, scene_dir, page, artifacts, monkeypatch):
    """Lean model and rasterized maps in chromium: the maps draw, a wheel zoom over the class
    map makes every map aggregate the zoomed range again (the raster spans just the view), and
    a click still fills the inspector, BT–τ curve included."""
    from browser_js import COVERS, RENDERED
    from test_app_ui import TIMEOUT, map_point, open_dashboard

    monkeypatch.setattr(simulation, "LEVELS_PIXEL_LIMIT", 10_000)
    monkeypatch.setattr(maps_module, "RASTERIZE_ABOVE", 10_000)
    served = serve_app(scene_dir)
    open_dashboard(page, served.url)
    page.get_by_text("Large scene: the maps are rasterized").first.wait_for(timeout=TIMEOUT)
    before = page.evaluate(_CLASS_MAP)
    assert before["idw"] == pytest.approx(300, abs=1)  # the whole scene
    page.locator(".cs-map-class").first.scroll_into_view_if_needed()  # the wheel must land on the map
    page.mouse.move(*map_point(page, 150, 150))
    page.mouse.wheel(0, -240)
    page.wait_for_function("(w) => { const f = [...Bokeh.index.all_views()].find(v => v.model.type === 'Figure');"
                           " return f && (f.model.x_range.end - f.model.x_range.start) < 0.9 * w; }",
                           arg=before["x1"] - before["x0"], timeout=TIMEOUT)
    zoom = page.evaluate(_CLASS_MAP)
    page.wait_for_function(COVERS, arg=[zoom["x0"], zoom["x1"], 1.5], timeout=TIMEOUT, polling=100)
    after = page.evaluate(_CLASS_MAP)
    assert after["idw"] == pytest.approx(after["x1"] - after["x0"], abs=1.5)
    assert after["idw"] < 0.9 * before["idw"]
    col, row = int(round((after["x0"] + after["x1"]) / 2)), 150
    x, y = map_point(page, col, row)
    page.mouse.click(x, y)
    page.get_by_text(f"Pixel row {row}, column {col}").first.wait_for(timeout=TIMEOUT)
    page.wait_for_function(RENDERED, arg=9, timeout=TIMEOUT, polling=100)  # the BT-vs-τ curve (after the 8 maps)
    page.screenshot(path=str(artifacts / "ui_large_scene_path.png"))
