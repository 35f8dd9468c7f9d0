"""The dashboard in a real browser (Playwright + Debian chromium), plus its server plumbing.

The browser tests are marked ``ui``; each serves the app on a free port over a temporary
data folder holding a copy of the sample scene (fixtures in conftest.py) and waits for
conditions — Bokeh finished drawing, a text appearing — never for a fixed time.
Screenshots go to test-artifacts/.
"""
import json
import re
import shutil
import subprocess
import sys
import types
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from playwright.sync_api import expect

from browser_js import RENDERED, SCREEN_XY
from cloudsieve import cli
from dashboard.app import SceneCatalog, is_scene_file, serve, server_options
from cloudsieve.errors import PathError
from cloudsieve.journal import journal_path

SAMPLES = Path(__file__).resolve().parents[1] / "sample_scenes"

TIMEOUT = 60_000  # ms; the first page of a fresh server prepares the scene

MASK_TITLE = "class"


def open_dashboard(page, url, n_maps=8):
    page.set_viewport_size({"width": 1680, "height": 1050})
    page.goto(url)
    page.wait_for_function(RENDERED, arg=n_maps, timeout=TIMEOUT, polling=100)


def shadow_text(page, css):
    return page.locator(css).first.inner_text()


def markdown_text(page, css):
    """Text of a Markdown pane (its content sits in a div of the shadow root)."""
    return page.locator(f"{css} div").first.inner_text()


def cloud_percent(page):
    return shadow_text(page, ".cs-count-cloud .cs-value")


def map_point(page, x, y, title=MASK_TITLE):
    pos = page.evaluate(SCREEN_XY, [title, x, y])
    assert pos is not None, f"no map with colour bar '{title}'"
    return pos


def screenshot(page, artifacts, name):
    page.screenshot(path=str(artifacts / name))


def read_journal(path):
    return [json.loads(line) for line in path.read_text().splitlines() if line.strip()]


# ---------------------------------------------------------------------------------------
# server plumbing (no browser)
# ---------------------------------------------------------------------------------------
def test_catalog_lists_scenes_and_refuses_paths_outside_the_data_folder(tmp_path):
    data = tmp_path / "data"
    data.mkdir()
    for name in ("a.nc", "b.csv", "c.parquet", "a_truth.nc", "a_mask.nc", "a.nc.qa.jsonl", ".hidden.nc",
                 "notes.txt"):
        (data / name).write_bytes(b"x")
    outside = tmp_path / "secret.nc"
    outside.write_bytes(b"x")
    (data / "link.nc").symlink_to(outside)
    (data / "inner.nc").symlink_to(data / "a.nc")
    cat = SceneCatalog(data)
    assert cat.names() == ["a.nc", "b.csv", "c.parquet", "inner.nc"]
    assert cat.resolve("a.nc") == (data / "a.nc").resolve()
    for bad in ("../secret.nc", "link.nc", str(outside), "sub/a.nc", "..", "", "a_truth.nc", "missing.nc"):
        with pytest.raises(PathError):
            cat.resolve(bad)
    assert not is_scene_file(data / "a.nc.qa.jsonl")


def test_non_local_address_needs_allowed_origins(capsys):
    args = types.SimpleNamespace(address="0.0.0.0", port=5999, allow_websocket_origin=[], max_upload_mb=10.0,
                                 scenes=[], data_dir=None, config=None, show=False)
    assert serve(args) == 2
    assert "--allow-websocket-origin" in capsys.readouterr().err


def test_server_options_for_localhost_and_upload_limit():
    opts = server_options("127.0.0.1", 5077, [], 100.0)
    assert opts["websocket_origin"] == ["127.0.0.1:5077", "localhost:5077"]
    # base64 makes an upload 4/3 larger on the websocket
    assert opts["websocket_max_message_size"] >= 100 * 1024 * 1024 * 4 / 3
    assert opts["http_server_kwargs"]["max_buffer_size"] == opts["websocket_max_message_size"]
    remote = server_options("0.0.0.0", 80, ["maps.example.org:80"], 10.0)
    assert remote["websocket_origin"] == ["maps.example.org:80"]


def test_the_page_renders_without_matplotlib(tmp_path):
    # `pip install -e .` (the README's first command) brings no matplotlib; the test extras do.
    # Colour maps named the matplotlib way made the maps fail on a base install: render the
    # page, the diagnostics and the inspector curve with matplotlib unimportable
    code = f"""
import sys
sys.modules["matplotlib"] = None
import holoviews as hv
import panel as pn
from bokeh.document import Document
from dashboard.app import Session
from dashboard.views import Diagnostics, PixelInspector
session = Session([{str(SAMPLES / "night_front_small.csv")!r}], None, None, 200.0)
session.template.server_doc(Document())
assert session.model is not None, session.notices.text()
assert not session.notices._alert.visible, session.notices.text()
pn.panel(Diagnostics(session.model)).get_root(Document())
hv.render(PixelInspector(session.model, session.focus, session.notices).curve((3, 4)), backend="bokeh")
print("rendered")
"""
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300,
                         cwd=str(tmp_path))
    assert out.returncode == 0 and "rendered" in out.stdout, out.stderr[-2000:]


# ---------------------------------------------------------------------------------------
# in the browser
# ---------------------------------------------------------------------------------------
@pytest.mark.ui
def test_page_renders_every_map_and_the_caution(served_app, page, artifacts):
    # nothing is fetched from outside this server (analysts' data, often offline machines)
    outside = []
    page.on("request", lambda r: outside.append(r.url)
            if not re.match(r"(https?|wss?)://127\.0\.0\.1[:/]|data:|blob:", r.url) else None)
    open_dashboard(page, served_app.url)
    assert page.title() == "cloudsieve"
    assert re.fullmatch(r"\d+\.\d%", cloud_percent(page))
    titles = page.evaluate("""() => [...Bokeh.index.all_views()].filter(v => v.model.type === 'Figure')
        .map(v => (v.model.right.find(r => r.type === 'ColorBar') || {}).title)""")
    assert {"observed BT [K]", "clear-sky BT [K]", "observed − clear [K]", "class", "why flagged",
            "optical depth [1]", "cloud-top pressure [hPa]", "departure / σ [1]"} <= set(titles)
    page.get_by_text("is not a certified operational product").first.wait_for()
    screenshot(page, artifacts, "ui_main.png")
    page.locator(".bk-tab").filter(has_text="Diagnostics").first.click()
    page.wait_for_function(RENDERED, arg=3, timeout=TIMEOUT, polling=100)
    page.get_by_text("Validation report").first.wait_for(timeout=TIMEOUT)
    screenshot(page, artifacts, "ui_diagnostics.png")
    assert outside == []
    # at laptop width the diagnostics wrap: no plot is cut off at the right edge
    page.set_viewport_size({"width": 1366, "height": 900})
    page.wait_for_function("""() => { const figs = [...Bokeh.index.all_views()].filter(
        v => v.model.type === 'Figure' && v.el.getBoundingClientRect().width > 0);
        return figs.length >= 3 && figs.every(v => v.el.getBoundingClientRect().right <= window.innerWidth); }""",
                           timeout=TIMEOUT, polling=200)
    screenshot(page, artifacts, "ui_diagnostics_1366.png")


@pytest.mark.ui
def test_moving_a_threshold_changes_the_counts(served_app, page, artifacts):
    open_dashboard(page, served_app.url)
    before = cloud_percent(page)
    slider = page.locator(".cs-slider-night_fog_contrast").first
    expect(slider).to_contain_text("3.00", timeout=TIMEOUT)
    handle = slider.locator(".noUi-handle").first
    handle.focus()
    for _ in range(20):  # 20 steps of 0.1: the fog threshold from 3 σ to 5 σ
        handle.press("ArrowRight")
    expect(slider).to_contain_text("5.00", timeout=TIMEOUT)
    expect(page.locator(".cs-count-cloud .cs-value").first).not_to_have_text(before, timeout=TIMEOUT)
    after = cloud_percent(page)
    assert float(after.rstrip("%")) < float(before.rstrip("%"))
    screenshot(page, artifacts, "ui_retuned.png")


@pytest.mark.ui
def test_clicking_a_pixel_fills_the_inspector(served_app, page, artifacts):
    open_dashboard(page, served_app.url)
    x, y = map_point(page, 150, 120)
    page.mouse.click(x, y)
    heading = page.get_by_text("Pixel row 120, column 150").first
    heading.wait_for(timeout=TIMEOUT)
    inspector = markdown_text(page, ".cs-inspector")
    for text in ("observed [K]", "clear sky [K]", "departure [K]", "margin [K]", "Cloud retrieval", "11 µm"):
        assert text in inspector
    page.wait_for_function(RENDERED, arg=9, timeout=TIMEOUT, polling=100)  # the BT-vs-τ curve (after the 8 maps)
    # the pixel is ringed on all eight maps (the inspector may be scrolled out of sight)
    page.wait_for_function("""() => [...Bokeh.index.all_views()].filter(v => v.model.type === 'GlyphRenderer'
        && v.model.glyph.type === 'Scatter').filter(v => { const d = v.model.data_source.data;
        return d.x && d.x.length === 1 && d.x[0] === 150 && d.y[0] === 120; }).length >= 16""",
                           timeout=TIMEOUT, polling=200)
    screenshot(page, artifacts, "ui_inspector.png")


def _box_select(page, x0, y0, x1, y1):
    """Drag a box over the class map with its box-select tool."""
    page.locator(".cs-map-class .bk-tool-icon-box-select").first.click()
    p0, p1 = map_point(page, x0, y0), map_point(page, x1, y1)
    page.mouse.move(*p0)
    page.mouse.down()
    page.mouse.move((p0[0] + p1[0]) / 2, (p0[1] + p1[1]) / 2, steps=5)
    page.mouse.move(*p1, steps=5)
    page.mouse.up()
    selection = page.locator(".cs-selection div").first
    expect(selection).to_contain_text(re.compile(r"[\d,]+ pixel\(s\)"), timeout=TIMEOUT)
    text = selection.inner_text()
    return int(re.search(r"([\d,]+) pixel", text).group(1).replace(",", ""))


@pytest.mark.ui
def test_qa_edit_is_journaled_survives_a_restart_and_goes_into_the_download(served_app, page, artifacts,
                                                                             tmp_path):
    scene = served_app.data_dir / "night_front.nc"
    journal = journal_path(scene)
    open_dashboard(page, served_app.url)

    n = _box_select(page, 60.2, 40.2, 89.8, 59.8)
    assert 400 <= n <= 800  # about 30 × 20 pixels (the drag lands within a pixel of the corners)
    page.get_by_role("button", name="Mark cloud").click()
    expect(page.locator(".cs-edits div").first).to_contain_text("marked cloud", timeout=TIMEOUT)
    entries = read_journal(journal)
    assert [e["action"] for e in entries] == ["cloud"] and entries[0]["count"] == n
    rows, cols = np.divmod(np.asarray(entries[0]["index"]), 300)
    assert rows.min() >= 39 and rows.max() <= 61 and cols.min() >= 59 and cols.max() <= 91
    assert n == (rows.max() - rows.min() + 1) * (cols.max() - cols.min() + 1)  # a full rectangle
    screenshot(page, artifacts, "ui_qa_edit.png")

    # a restarted server reads the journal back
    served_app.restart()
    open_dashboard(page, served_app.url)
    edits = page.locator(".cs-edits div").first
    expect(edits).to_contain_text("marked cloud", timeout=TIMEOUT)
    assert f"{n:,}" in edits.inner_text()

    # the CSV download holds the edit and equals what the command line writes
    with page.expect_download(timeout=TIMEOUT) as dl:
        page.get_by_role("button", name="Download CSV").click()
    download = dl.value
    assert download.suggested_filename == "night_front_mask.csv"
    saved = artifacts / "ui_download_night_front_mask.csv"
    download.save_as(saved)
    ours = pd.read_csv(saved)
    out = tmp_path / "cli_mask.csv"
    assert cli.main(["screen", str(scene), "--out", str(out), "--quiet"]) == 0
    pd.testing.assert_frame_equal(ours, pd.read_csv(out))
    flat = ours["row"].to_numpy() * 300 + ours["col"].to_numpy()
    edited = np.isin(flat, entries[0]["index"])
    assert (ours.loc[edited, "mask"] == "cloud").all()


@pytest.mark.ui
def test_undo_removes_the_edit(served_app, page):
    journal = journal_path(served_app.data_dir / "night_front.nc")
    open_dashboard(page, served_app.url)
    _box_select(page, 10.2, 10.2, 19.8, 19.8)
    edits = page.locator(".cs-edits div").first
    expect(edits).to_contain_text("none yet", timeout=TIMEOUT)
    page.get_by_role("button", name="Mark clear").click()
    expect(edits).to_contain_text("marked clear", timeout=TIMEOUT)
    page.get_by_role("button", name="Undo").click()
    expect(edits).to_contain_text("none yet", timeout=TIMEOUT)
    assert [e["action"] for e in read_journal(journal)] == ["clear", "undo"]


@pytest.mark.ui
def test_a_bad_upload_shows_the_report_and_keeps_the_scene(served_app, page, tmp_path, artifacts):
    open_dashboard(page, served_app.url)
    bad = tmp_path / "broken.csv"
    bad.write_text("row,col,bt_11um,t_skin,t_air,tcwv,sat_zenith\n0,0,warm,290,289,20,10\n")
    page.locator(".cs-upload input[type=file]").first.set_input_files(str(bad))
    report = page.locator(".cs-upload-report div").first
    page.get_by_text("broken.csv cannot be used").first.wait_for(timeout=TIMEOUT)
    assert "Traceback" not in report.inner_text()
    screenshot(page, artifacts, "ui_bad_upload.png")
    # the sample scene is still open and the page still works
    assert "night_front" in shadow_text(page, ".cs-scene-name")
    x, y = map_point(page, 20, 20)
    page.mouse.click(x, y)
    page.get_by_text("Pixel row 20, column 20").first.wait_for(timeout=TIMEOUT)


@pytest.mark.ui
def test_a_good_upload_opens_the_scene(served_app, page):
    open_dashboard(page, served_app.url)
    page.locator(".cs-upload input[type=file]").first.set_input_files(str(SAMPLES / "night_front_small.csv"))
    expect(page.locator(".cs-scene-name").first).to_have_text("night_front_small", timeout=TIMEOUT)
    page.wait_for_function(RENDERED, arg=8, timeout=TIMEOUT, polling=100)
    assert "40 × 40" in shadow_text(page, ".cs-counts")
    # one statement of where edits go, in the upload report and on the QA card
    expect(page.locator(".cs-upload-report").first).to_contain_text("temporary copy", timeout=TIMEOUT)
    expect(page.locator(".cs-edits-where").first).to_contain_text("temporary copy", timeout=TIMEOUT)
    # back to a scene of the data folder: the upload's report goes, the QA card says where edits go now
    page.locator(".cs-scene-select select").first.select_option("night_front.nc")
    expect(page.locator(".cs-scene-name").first).to_have_text("night_front", timeout=TIMEOUT)
    expect(page.locator(".cs-upload-report").first).to_be_hidden(timeout=TIMEOUT)
    expect(page.locator(".cs-edits-where").first).to_contain_text("beside the scene", timeout=TIMEOUT)


@pytest.mark.ui
def test_an_oversized_upload_is_refused_with_a_message(serve_app, scene_dir, page):
    served = serve_app(scene_dir, max_upload_mb=0.01)  # 10 KiB
    open_dashboard(page, served.url)
    page.locator(".cs-upload input[type=file]").first.set_input_files(str(SAMPLES / "night_front_small.csv"))
    page.get_by_text("uploads are limited to 0.01 MB").first.wait_for(timeout=TIMEOUT)
    assert shadow_text(page, ".cs-scene-name") == "night_front"
    # the page is still connected and working
    x, y = map_point(page, 20, 20)
    page.mouse.click(x, y)
    page.get_by_text("Pixel row 20, column 20").first.wait_for(timeout=TIMEOUT)


@pytest.mark.ui
def test_picking_another_scene_opens_it_with_its_own_settings(served_app, page):
    shutil.copy(SAMPLES / "day_coast.nc", served_app.data_dir / "day_coast.nc")
    open_dashboard(page, served_app.url)
    page.locator(".cs-scene-select select").first.select_option("day_coast.nc")
    expect(page.locator(".cs-scene-name").first).to_have_text("day_coast", timeout=TIMEOUT)
    page.wait_for_function(RENDERED, arg=8, timeout=TIMEOUT, polling=100)
    # sea and land in this scene: the thresholds are edited per surface
    expect(page.get_by_role("button", name="Land").first).to_be_visible(timeout=TIMEOUT)
    # no 3.9 µm channel: the fog test cannot run, and the page says so
    page.get_by_text("not applied: needs 3.9 µm and 11 µm").first.wait_for(timeout=TIMEOUT)


@pytest.mark.ui
def test_lasso_selection_marks_the_pixels_inside(served_app, page):
    journal = journal_path(served_app.data_dir / "night_front.nc")
    open_dashboard(page, served_app.url)
    title = "observed BT [K]"  # lasso on another map than the class map: all maps select
    page.locator(".cs-map-observed .bk-tool-icon-lasso-select").first.click()
    corners = [map_point(page, x, y, title) for x, y in ((100, 100), (160, 100), (160, 160), (100, 100))]
    page.mouse.move(*corners[0])
    page.mouse.down()
    for corner in corners[1:]:
        page.mouse.move(*corner, steps=8)
    page.mouse.up()
    selection = page.locator(".cs-selection div").first
    expect(selection).to_contain_text(re.compile(r"pixel\(s\) — lasso"), timeout=TIMEOUT)
    n = int(re.search(r"([\d,]+) pixel", selection.inner_text()).group(1).replace(",", ""))
    assert 1500 <= n <= 2100  # the triangle's area is 1800 pixels
    page.get_by_role("button", name="Mark cloud").click()
    expect(page.locator(".cs-edits div").first).to_contain_text("marked cloud", timeout=TIMEOUT)
    entry = read_journal(journal)[0]
    rows, cols = np.divmod(np.asarray(entry["index"]), 300)
    assert entry["count"] == n and np.all(rows <= cols + 1)  # inside the triangle above the diagonal


_COLOUR_RANGE = """(title) => { const bars = [...Bokeh.index.all_views()].filter(v => v.model.type === 'Figure')
    .map(v => v.model.right.find(r => r.type === 'ColorBar')).filter(c => c && c.title === title);
    return bars.length ? [bars[0].color_mapper.low, bars[0].color_mapper.high] : null; }"""


@pytest.mark.ui
def test_departure_map_is_centred_on_zero_with_a_range_control(served_app, page, artifacts):
    """The departure map opens at ±5 K (a few-K cirrus or fog departure shows), a range control
    widens it; observed and clear-sky maps share one colour range (one colour, one temperature)."""
    open_dashboard(page, served_app.url)
    assert page.evaluate(_COLOUR_RANGE, "observed − clear [K]") == [-5, 5]
    obs = page.evaluate(_COLOUR_RANGE, "observed BT [K]")
    assert obs is not None and obs == page.evaluate(_COLOUR_RANGE, "clear-sky BT [K]")
    page.locator(".cs-departure-range").first.scroll_into_view_if_needed()
    screenshot(page, artifacts, "ui_departure_5K.png")
    box = page.locator(".cs-departure-range input").first
    box.fill("12")
    box.press("Enter")
    page.wait_for_function(f"() => {{ const r = ({_COLOUR_RANGE})('observed − clear [K]'); "
                           "return r && r[1] === 12 && r[0] === -12; }", timeout=TIMEOUT, polling=200)


@pytest.mark.ui
def test_class_map_hover_says_which_test_decided_and_lists_every_margin(served_app, page, artifacts):
    """Why a pixel is flagged: the class map's hover names the deciding test (the fired cloud test
    with the largest margin relative to its threshold) and every test's margin in K, the warm-
    departure flag included."""
    open_dashboard(page, served_app.url)
    x, y = map_point(page, 150, 120)  # inside the front's cloud band
    page.mouse.move(x, y)
    # Bokeh draws tooltips inside shadow roots: collect the text of every visible one
    tooltip_text = """() => { const out = []; const walk = (root) => { root.querySelectorAll('*').forEach(el => {
        if (el.classList && el.classList.contains('bk-tooltip-content')) out.push(el.innerText);
        if (el.shadowRoot) walk(el.shadowRoot); }); }; walk(document); return out.join('\\n'); }"""
    page.wait_for_function(f"() => ({tooltip_text})().includes('decided by')", timeout=TIMEOUT, polling=200)
    text = page.evaluate(tooltip_text)
    for label in ("Cold departure margin", "Split-window excess margin", "Warm departure margin"):
        assert label in text
    assert re.search(r"decided by:\s*(Cold departure|Split-window excess|Texture|Night fog contrast)", text), text
    assert re.search(r"Cold departure margin:\s*[+-]\d+\.\d\d K", text), text
    screenshot(page, artifacts, "ui_class_hover_why.png")


@pytest.mark.ui
def test_keyboard_shortcuts_mark_undo_and_step_through_marginal_pixels(served_app, page, artifacts):
    """C marks the selection cloud, U undoes it, N inspects the next marginal pixel; the QA card
    lists the keys."""
    journal = journal_path(served_app.data_dir / "night_front.nc")
    open_dashboard(page, served_app.url)
    expect(page.locator(".cs-shortcuts").first).to_contain_text("mark the selection cloud", timeout=TIMEOUT)
    page.locator(".cs-counts-pane").first.click()  # focus on the page, not a field
    page.keyboard.press("n")
    heading = page.get_by_text(re.compile(r"Pixel row \d+, column \d+")).first
    heading.wait_for(timeout=TIMEOUT)
    assert "Class marginal" in markdown_text(page, ".cs-inspector")
    n = _box_select(page, 60.2, 40.2, 89.8, 59.8)
    assert n > 0
    page.locator(".cs-counts-pane").first.click()
    page.keyboard.press("c")
    expect(page.locator(".cs-edits div").first).to_contain_text("marked cloud", timeout=TIMEOUT)
    assert [e["action"] for e in read_journal(journal)] == ["cloud"]
    page.keyboard.press("u")
    expect(page.locator(".cs-edits div").first).to_contain_text("none yet", timeout=TIMEOUT)
    screenshot(page, artifacts, "ui_keyboard.png")


@pytest.mark.ui
def test_settings_are_loaded_from_a_file_and_reset(served_app, page, tmp_path):
    """A TOML settings file loaded in the app sets the sliders; "Reset to defaults" brings them back."""
    settings = tmp_path / "tuned.toml"
    settings.write_text("[tests.cold_departure]\nk_sigma = { sea = 4.5, land = 4.5, ice = 4.5 }\n")
    open_dashboard(page, served_app.url)
    before = cloud_percent(page)
    page.locator(".cs-load-settings input[type=file]").first.set_input_files(str(settings))
    page.get_by_text("Settings loaded from tuned.toml").first.wait_for(timeout=TIMEOUT)
    slider = page.locator(".cs-slider-cold_departure").first
    expect(slider).to_contain_text("4.50", timeout=TIMEOUT)
    expect(page.locator(".cs-count-cloud .cs-value").first).not_to_have_text(before, timeout=TIMEOUT)
    page.get_by_role("button", name="Reset to defaults").click()
    page.get_by_text("Settings reset to the defaults").first.wait_for(timeout=TIMEOUT)
    expect(page.locator(".cs-slider-cold_departure").first).to_contain_text("3.00", timeout=TIMEOUT)
    expect(page.locator(".cs-count-cloud .cs-value").first).to_have_text(before, timeout=TIMEOUT)


# ---------------------------------------------------------------------------------------
# the workbench: layout at laptop and desktop width, why / margin / truth maps, loading
# ---------------------------------------------------------------------------------------
_RECT = "(el) => { const r = el.getBoundingClientRect(); return [r.left, r.top, r.right, r.bottom]; }"
_FIGURE_RECTS = """(title) => [...Bokeh.index.all_views()].filter(v => v.model.type === 'Figure'
    && v.model.right.some(r => r.type === 'ColorBar' && r.title === title))
    .map(v => { const r = v.el.getBoundingClientRect(); return [r.left, r.top, r.width, r.height]; })"""


def _rect(page, css):
    return page.locator(css).first.evaluate(_RECT)


@pytest.mark.ui
def test_at_1366_the_qa_buttons_and_inspector_stay_in_view_after_a_click(served_app, page, artifacts):
    """A laptop window: the maps take one column as wide as the window allows; after scrolling down to
    the class map and clicking a pixel, "Mark cloud" and the filled inspector are on screen."""
    page.set_viewport_size({"width": 1366, "height": 768})
    page.goto(served_app.url)
    page.wait_for_function(RENDERED, arg=8, timeout=TIMEOUT, polling=100)
    page.wait_for_function(f"() => ({_FIGURE_RECTS})('class').some(r => r[2] > 450)", timeout=TIMEOUT,
                           polling=200)  # one column, each map wider than the old 250 px frame
    obs, clr = page.evaluate(_FIGURE_RECTS, "observed BT [K]")[0], page.evaluate(_FIGURE_RECTS, "clear-sky BT [K]")[0]
    assert clr[1] > obs[1] + obs[3] - 5  # stacked, not side by side
    page.locator(".cs-map-class").first.scroll_into_view_if_needed()
    page.mouse.click(*map_point(page, 150, 120))
    page.get_by_text("Pixel row 120, column 150").first.wait_for(timeout=TIMEOUT)
    for css in (".cs-inspector-card", ".cs-qa-card"):
        left, top, right, bottom = _rect(page, css)
        assert top < 768 - 150 and bottom > 150 and right <= 1366, (css, top, bottom)
    button = page.get_by_role("button", name="Mark cloud")
    left, top, right, bottom = button.evaluate(_RECT)
    assert 0 <= top and bottom <= 768
    maps_right = _rect(page, ".cs-map-class")[2]
    assert _rect(page, ".cs-side")[0] >= maps_right - 5  # beside the maps, not below them
    screenshot(page, artifacts, "ui_1366_inspector.png")


@pytest.mark.ui
def test_at_1920_maps_sit_two_by_two_beside_the_qa_column(served_app, page, artifacts):
    page.set_viewport_size({"width": 1920, "height": 1080})
    page.goto(served_app.url)
    page.wait_for_function(RENDERED, arg=8, timeout=TIMEOUT, polling=100)
    page.wait_for_function(f"""() => {{ const a = ({_FIGURE_RECTS})('observed BT [K]')[0],
        b = ({_FIGURE_RECTS})('clear-sky BT [K]')[0];
        return a && b && Math.abs(a[1] - b[1]) < 5 && b[0] > a[0] + a[2] - 5 && a[2] > 400; }}""",
                           timeout=TIMEOUT, polling=200)
    assert _rect(page, ".cs-side")[0] >= _rect(page, ".cs-map-clear")[2] - 5
    screenshot(page, artifacts, "ui_1920.png")


@pytest.mark.ui
def test_why_map_has_a_legend_and_one_map_can_be_enlarged(served_app, page, artifacts):
    open_dashboard(page, served_app.url)
    legend = page.locator(".cs-legend-why").first
    for words in ("Cold departure", "analyst edit", "Warm departure (flag only)", "no test fired"):
        expect(legend).to_contain_text(words, timeout=TIMEOUT)
    page.locator(".cs-map-why").first.scroll_into_view_if_needed()
    screenshot(page, artifacts, "ui_why_map.png")
    small = page.evaluate(_FIGURE_RECTS, "class")[0][2]
    page.locator(".cs-enlarge select").first.select_option(label="class")
    page.wait_for_function(f"""() => {{ const r = ({_FIGURE_RECTS})('class');
        const others = ({_FIGURE_RECTS})('observed BT [K]');
        return r.length === 1 && r[0][2] > 1.5 * {small} && others.length === 0; }}""", timeout=TIMEOUT,
                           polling=200)
    screenshot(page, artifacts, "ui_enlarged.png")


@pytest.mark.ui
def test_margin_and_truth_maps_on_request(serve_app, scene_dir, page, artifacts):
    shutil.copy(SAMPLES / "night_front_truth.nc", scene_dir / "night_front_truth.nc")
    served = serve_app(scene_dir)
    open_dashboard(page, served.url)
    for label in ("test margin", "vs truth"):
        page.locator(".cs-maps-shown label", has_text=label).first.click()
    page.wait_for_function(RENDERED, arg=10, timeout=TIMEOUT, polling=100)
    expect(page.locator(".cs-legend-truth").first).to_contain_text("truth cloud, missed", timeout=TIMEOUT)
    page.locator(".cs-margin-test select").first.select_option(label="Split-window excess")
    expect(page.locator(".cs-map-margin .cs-map-title").first).to_contain_text("Split-window excess",
                                                                               timeout=TIMEOUT)
    page.locator(".cs-map-truth").first.scroll_into_view_if_needed()
    screenshot(page, artifacts, "ui_truth_map.png")


@pytest.mark.ui
def test_a_large_scene_shows_its_name_and_stage_while_it_opens(serve_app, tmp_path, page, artifacts):
    """The page answers at once: the scene's name, the stage (with the pixel count) and a bar, until
    the maps are drawn; then the panel goes."""
    sys.path.insert(0, str(Path(__file__).parent / "benchmarks"))
    from bench_dashboard import tiled_scene

    folder = tmp_path / "big"
    folder.mkdir()
    tiled_scene(900, folder / "tiled_900.nc")
    served = serve_app(folder)
    page.set_viewport_size({"width": 1366, "height": 768})
    page.goto(served.url)
    text = page.locator(".cs-loading-text").first
    expect(text).to_contain_text("Opening tiled_900.nc", timeout=TIMEOUT)
    expect(text).to_contain_text(re.compile(r"(simulating the clear sky of|screening) 810,000 pixels"),
                                 timeout=TIMEOUT)
    screenshot(page, artifacts, "ui_loading.png")
    page.wait_for_function(RENDERED, arg=8, timeout=3 * TIMEOUT, polling=200)
    expect(page.locator(".cs-loading").first).to_be_hidden(timeout=TIMEOUT)


@pytest.mark.ui
def test_margin_histogram_per_test_in_the_diagnostics(served_app, page, artifacts):
    open_dashboard(page, served_app.url)
    page.locator(".bk-tab").filter(has_text="Diagnostics").first.click()
    page.wait_for_function(RENDERED, arg=3, timeout=TIMEOUT, polling=100)
    page.locator(".cs-hist-quantity select").first.select_option(label="margin of Night fog contrast")
    page.wait_for_function("""() => [...Bokeh.index.all_views()].some(v => v.model.type === 'Figure'
        && v.model.title && (v.model.title.text || '').startsWith('Night fog contrast margins'))""",
                           timeout=TIMEOUT, polling=200)
    # the log switch and the new quantity redraw the axes (a fresh plot, not the first one's ranges)
    page.locator(".cs-hist-log input").first.check()
    page.wait_for_function("""() => [...Bokeh.index.all_views()].some(v => v.model.type === 'Figure'
        && (v.model.title.text || '').startsWith('Night fog contrast margins') && v.model.y_scale.type === 'LogScale')""",
                           timeout=TIMEOUT, polling=200)
    screenshot(page, artifacts, "ui_margin_histogram.png")
