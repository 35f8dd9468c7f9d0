"""The cloudsieve dashboard: page assembly and the server.

Each browser session gets its own :class:`dashboard.model.ScreeningModel`; sessions share
only what is immutable — a loaded scene and its clear-sky simulation, cached per file
(path, modification time, size) and configuration. The views in :mod:`dashboard.views`
render the model; this module puts them on a page and serves it.

    cloudsieve serve [SCENE ...] [--data-dir DIR] [--port 5006]
"""
import asyncio
import collections
import logging
import socket
import sys
import threading
from pathlib import Path

import numpy as np
import panel as pn
from bokeh.core.validation import silence
from bokeh.core.validation.warnings import FIXED_SIZING_MODE

from cloudsieve import CAUTION, __version__
from cloudsieve.codes import MARGINAL
from cloudsieve.config import config_json, load_config
from cloudsieve.errors import CloudsieveError, PathError, SceneError
from cloudsieve.export import result_key
from cloudsieve.scene import load_scene
from cloudsieve.session import compact_scene
from cloudsieve.simulate import simulate

from .model import ScreeningModel
from .views import (ClassCounts, Diagnostics, ExportPanel, Focus, MapGrid, Notices, PixelInspector, QAPanel,
                    TuningPanel)
from .views.keys import KeyShortcuts
from .views.loading import LoadingPanel
from .views.maps import DEFAULT_AVAILABLE_WIDTH, FRAME_WIDTH_RANGE, MAP_EXTRA_WIDTH
from .views.scenes import ScenePicker, UploadBox
from .views.style import ACCENT, BUTTON_GROUP_CSS, PAGE_CSS, channel_label, legend_html

# HoloViews sizes plots by their frame (frame_width/frame_height); Bokeh's check does not know that
silence(FIXED_SIZING_MODE, True)


def _no_outside_font_request():
    """Panel's Fast design links a web font from an outside font server on every page load.
    The dashboard serves analysts' data, often offline, and must not call out from their
    browser: drop that link (the page falls back to the browser's sans-serif, as it did
    offline anyway). Everything else the page loads comes from this server."""
    from panel.theme.fast import Fast

    Fast._resources = {k: v for k, v in Fast._resources.items() if k != "font"}


_no_outside_font_request()

log = logging.getLogger("cloudsieve.dashboard")

SAMPLE_DIR = Path(__file__).resolve().parent.parent / "sample_scenes"
DEFAULT_SCENE = "night_front.nc"
SCENE_SUFFIXES = (".nc", ".csv", ".parquet")
LOCAL_ADDRESSES = ("127.0.0.1", "localhost", "::1")
DIAGNOSTICS_TAB = 1  # position of the Diagnostics tab
SIDE_WIDTH = 390  # the QA and inspector column beside the maps [px]


def maps_width(main_width):
    """Width [px] the maps may fill in a main area ``main_width`` px wide: beside the QA and
    inspector column where at least one map of the smallest size fits there, else the whole
    width (the column then goes below the maps)."""
    if not main_width:
        return DEFAULT_AVAILABLE_WIDTH
    beside = main_width - SIDE_WIDTH - 40
    return beside if beside >= FRAME_WIDTH_RANGE[0] + MAP_EXTRA_WIDTH else max(main_width - 30, 200)


# ---------------------------------------------------------------------------------------
# scene files: listing inside the data folder, and the shared cache
# ---------------------------------------------------------------------------------------
def is_scene_file(path):
    """A scene file the picker lists (not a truth file, a journal or an exported mask)."""
    name = path.name
    return (path.suffix.lower() in SCENE_SUFFIXES and not name.startswith(".")
            and not name.endswith("_truth.nc") and "_mask." not in name and ".qa.jsonl" not in name)


class SceneCatalog:
    """The scene files a session may open: those inside the data folder, plus any given
    explicitly on the command line."""

    def __init__(self, folder, extra=()):
        self.folder = Path(folder).resolve()
        self.extra = {}
        for p in extra:
            p = Path(p).resolve()
            if not self._inside(p):
                self.extra[f"{p.name} ({p.parent})"] = p

    def _inside(self, path):
        return path.is_relative_to(self.folder)

    def names(self):
        found = []
        if self.folder.is_dir():
            for p in sorted(self.folder.iterdir()):
                if is_scene_file(p):
                    try:
                        target = self.resolve(p.name)
                    except PathError:
                        continue
                    if target.is_file():
                        found.append(p.name)
        return found + list(self.extra)

    def resolve(self, name):
        """The file behind a listed name; PathError for anything that leaves the data folder."""
        if name in self.extra:
            return self.extra[name]
        if not name or "/" in name or "\\" in name or name in (".", "..") or "\x00" in name:
            raise PathError(f"'{name}' is not a file name inside the data folder; pick a scene from the list")
        path = (self.folder / name).resolve()
        if not self._inside(path):
            raise PathError(f"'{name}' points outside the data folder {self.folder} (through a link); "
                            "copy the file into the folder instead")
        if not path.is_file():
            raise PathError(f"'{name}' is not in the data folder {self.folder} any more; refresh the list")
        if not is_scene_file(path):
            raise PathError(f"'{name}' is not a scene file (.nc, .csv or .parquet)")
        return path


_CACHE = collections.OrderedDict()
_CACHE_SIZE = 4
_CACHE_LOCK = threading.Lock()


def load_cached(path, config, progress=None):
    """(Scene, Simulation) of a scene file, shared between sessions (both are never modified);
    ``progress(stage)`` is told each stage as it starts."""
    progress = progress or (lambda stage: None)
    path = Path(path).resolve()
    st = path.stat()
    key = (str(path), st.st_mtime_ns, st.st_size, config_json(config))
    with _CACHE_LOCK:
        if key in _CACHE:
            _CACHE.move_to_end(key)
            return _CACHE[key]
        progress("reading and checking the file")
        scene = compact_scene(load_scene(path, config=config))  # large scenes: lat/lon in float32 where lossless
        progress(f"simulating the clear sky of {scene.data.sizes['y'] * scene.data.sizes['x']:,} pixels")
        sim = simulate(scene, config)
        _CACHE[key] = (scene, sim)
        while len(_CACHE) > _CACHE_SIZE:
            _CACHE.popitem(last=False)
        return scene, sim


def _as_config(config):
    if config is None or isinstance(config, (str, Path)):
        return load_config(config)
    return config


# ---------------------------------------------------------------------------------------
# one browser session
# ---------------------------------------------------------------------------------------
class Session:
    """The page of one browser session and the model it renders."""

    def __init__(self, paths=None, data_dir=None, config=None, max_upload_mb=200.0):
        paths = [Path(p) for p in (paths or [])]
        folder = Path(data_dir) if data_dir else (paths[0].resolve().parent if paths else SAMPLE_DIR)
        self.config = _as_config(config)
        self.catalog = SceneCatalog(folder, paths)
        self.model = None
        self.notices = Notices()
        self._uploaded = {}
        self.qa = None
        # keyboard shortcuts of the QA work (one listener per page, acting on the scene on screen)
        self.keys = KeyShortcuts(margin=0)
        self.keys.param.watch(self._on_key, "pressed")
        self.keys.param.watch(self._on_window, ["main_width", "window_height"])
        self.loading = LoadingPanel()
        self.map_grid = None
        self._uploading = []  # the path of an upload being opened (its QA card says where edits go)
        # sidebar
        self.picker = ScenePicker(self.catalog, self.open_name, self.notices)
        self.upload = UploadBox(self.open_scene, self.notices, max_upload_mb=max_upload_mb, config=self.config)
        self.tuning = pn.Column(sizing_mode="stretch_width", margin=0)
        self.exports = pn.Column(sizing_mode="stretch_width", margin=0)
        # main
        self.counts = pn.Column(sizing_mode="stretch_width", margin=0)
        self.maps = pn.Column(sizing_mode="stretch_width", margin=0)
        self.diagnostics = pn.Column(sizing_mode="stretch_width", margin=0)
        self.template = self._assemble()
        first = self._first_scene(paths)
        if first is not None and _served():
            # the page answers at once, saying which scene it opens and at which stage it is
            self.loading.start(Path(first).name)

            async def open_first():
                await self._open_first(first)

            pn.state.onload(open_first)
        elif first is not None:
            self._open_sync(first)
        else:
            self.notices.show("No scene found. Put .nc, .csv or .parquet scenes into the data folder, or upload one.",
                              "info")

    # ------------------------------------------------------------------ page
    def _assemble(self):
        caution = pn.pane.HTML(f"<div class='cs-caution'><b>Caution.</b> {CAUTION}</div>",
                               sizing_mode="stretch_width", margin=(10, 10), css_classes=["cs-caution-pane"])
        sidebar = [
            pn.Card(self.picker, self.upload, title="Scene", collapsible=False, sizing_mode="stretch_width"),
            pn.Card(self.tuning, title="Screening", collapsible=True, sizing_mode="stretch_width"),
            pn.Card(self.exports, title="Download result", collapsible=True, sizing_mode="stretch_width"),
            pn.pane.HTML(legend_html(), margin=(4, 12)),
            caution,
            self.keys,
        ]
        # the key to the codes of the maps and the downloads (the same text goes beside a CSV result)
        key = result_key().replace("# cloudsieve result key", "## Key to the codes in maps and downloads", 1)
        about = pn.pane.Markdown(_about_text() + "\n\n" + key, sizing_mode="stretch_width", max_width=900,
                                 css_classes=["cs-about"])
        self.tabs = pn.Tabs(("Maps & QA", self.maps), ("Diagnostics", self.diagnostics), ("About", about),
                            dynamic=True, sizing_mode="stretch_width", css_classes=["cs-tabs"])
        self.tabs.param.watch(self._on_tab, "active")
        footer = pn.pane.HTML(f"<div class='cs-muted' style='padding:6px 10px;border-top:1px solid #e3e7ea'>"
                              f"cloudsieve {__version__} · {CAUTION}</div>", sizing_mode="stretch_width",
                              css_classes=["cs-footer"])
        # the caution also sits on the first screen, not only at the foot of the sidebar
        banner = pn.pane.HTML("<div class='cs-caution'><b>Not a certified operational product.</b> For "
                              "fog, aviation and other hazards defer to official services and local "
                              "practice.</div>", sizing_mode="stretch_width", margin=(0, 10, 4, 10),
                              css_classes=["cs-caution-banner"],
                              stylesheets=[".cs-caution { font-size: 0.9em; color: #5b4a1f; background: #fbf4e4; "
                                           "border-left: 3px solid #eaa221; padding: 5px 10px; border-radius: 3px; }"])
        return pn.template.FastListTemplate(
            title="cloudsieve", sidebar=sidebar, main=[banner, self.notices, self.loading, self.counts, self.tabs, footer],
            accent=ACCENT, header_background=ACCENT, sidebar_width=360, theme_toggle=False, main_layout=None,
            raw_css=[PAGE_CSS], main_max_width="", collapsed_sidebar=False)

    def _first_scene(self, paths):
        """The scene named in the address (``?scene=NAME``, a file of the data folder), else the
        first one given, else the default."""
        wanted = _query_scene()
        if wanted:
            try:
                return self.catalog.resolve(wanted)
            except PathError as exc:
                self.notices.report(exc, f"opening {wanted}")
        return paths[0] if paths else self.default_scene(self.catalog.folder)

    @staticmethod
    def default_scene(folder):
        """The scene opened first: night_front.nc of the data folder, else its first scene, else the
        bundled sample scene."""
        catalog = SceneCatalog(folder if folder is not None else SAMPLE_DIR)
        names = catalog.names()
        if DEFAULT_SCENE in names:
            return catalog.resolve(DEFAULT_SCENE)
        if names:
            return catalog.resolve(names[0])
        bundled = SAMPLE_DIR / DEFAULT_SCENE
        return bundled if bundled.is_file() else None

    # ------------------------------------------------------------------ opening scenes
    def _open_sync(self, path):
        try:
            scene, sim = load_cached(path, self.config)
            self._show_model(ScreeningModel(scene, self.config, sim=sim))
            self.picker.update_options(current=self._label_of(path))
        except Exception as exc:  # noqa: BLE001 — shown in the page
            self.notices.report(exc, f"opening {Path(path).name}")

    def _label_of(self, path):
        path = Path(path).resolve()
        for name in self.catalog.names():
            try:
                if self.catalog.resolve(name) == path:
                    return name
            except PathError:
                continue
        return None

    def _on_window(self, *_):
        """The browser reported the main area's size: fit the maps to it."""
        if self.map_grid is not None:
            self.map_grid.set_window(maps_width(self.keys.main_width), self.keys.window_height or None)

    def _on_key(self, event):
        key = (event.new or "").split(":")[0]
        if self.model is None or self.qa is None:
            return
        try:
            if key in ("c", "l"):
                self.qa.mark_selection("cloud" if key == "c" else "clear")
            elif key == "u":
                self.qa._undo()
            elif key == "n":
                self._next_marginal()
        except Exception as exc:  # noqa: BLE001 — shown in the page
            self.notices.report(exc, "a keyboard shortcut")

    def _next_marginal(self):
        """Inspect the next marginal pixel after the current one (row by row, wrapping round)."""
        mask = self.model.result.mask
        flat = np.flatnonzero(mask.ravel() == MARGINAL)
        if not flat.size:
            self.notices.show("No marginal pixels in this scene at the current settings.", "info")
            return
        cur = self.focus.pixel
        start = -1 if cur is None else cur[0] * mask.shape[1] + cur[1]
        nxt = flat[np.searchsorted(flat, start, side="right") % flat.size]
        self.focus.pixel = (int(nxt // mask.shape[1]), int(nxt % mask.shape[1]))

    def _uploaded_paths(self):
        return {scene.path for scene in self._uploaded.values()} | set(self._uploading)

    async def open_name(self, name):
        """Open a scene chosen in the picker (a data-folder name or an uploaded one)."""
        if name not in self._uploaded:
            self.upload.clear_report()  # the report of an earlier upload is about another scene
        if name in self._uploaded:
            scene = self._uploaded[name]
            await self._open(lambda progress: (scene, None), name)
            return
        try:
            path = self.catalog.resolve(name)
        except PathError as exc:
            self.notices.report(exc, f"opening {name}")
            return
        await self._open(lambda progress: load_cached(path, self.config, progress), name)

    async def open_scene(self, scene):
        """Open a validated, uploaded scene."""
        label = f"⬆ {scene.path.name} (uploaded)"
        self._uploading = [scene.path]
        if await self._open(lambda progress: (scene, None), label):
            self._uploaded[label] = scene
            self.picker.update_options(current=label, extra=list(self._uploaded))

    async def _open_first(self, path):
        label = self._label_of(path) or Path(path).name
        if await self._open(lambda progress: load_cached(path, self.config, progress), label):
            self.picker.update_options(current=self._label_of(path))

    async def _open(self, load, label):
        """Build a model off the event loop, then its views; True when the scene is on screen.
        ``load(progress)`` gives (scene, simulation or None); the loading panel shows each stage."""
        self.loading.start(label)
        self.notices.clear()
        self.tabs.loading = self.counts.loading = self.model is not None  # the old scene, greyed out meanwhile
        log.info("opening scene %s", label)
        doc, served = pn.state.curdoc, _served()

        def progress(stage):  # called from the worker thread: the page is changed on its own loop
            if served:
                doc.add_next_tick_callback(lambda: self.loading.stage(stage))
            else:
                self.loading.stage(stage)

        try:
            loop = asyncio.get_running_loop()

            def build():
                scene, sim = load(progress)
                n = scene.data.sizes["y"] * scene.data.sizes["x"]
                if sim is None:
                    progress(f"simulating the clear sky of {n:,} pixels")
                    sim = simulate(scene, self.config)
                progress(f"screening {n:,} pixels and inverting the cloud layer of the flagged ones")
                return ScreeningModel(scene, self.config, sim=sim)

            model = await loop.run_in_executor(None, build)
            self.loading.stage("drawing the maps")
            await asyncio.sleep(0)  # let the stage reach the browser before the views are built
            self._show_model(model)
            log.info("opened scene %s", label)
            return True
        except Exception as exc:  # noqa: BLE001 — ours are shown as they are, anything else briefly
            self.notices.report(exc, f"opening {label}")
            self.picker.update_options(current=self._current_label())
            return False
        finally:
            self.loading.done()
            self.tabs.loading = self.counts.loading = False

    def _on_tab(self, *_):
        if self.tabs.active != DIAGNOSTICS_TAB or len(self.diagnostics) or self.model is None:
            return
        model = self.model
        waiting = pn.Row(pn.indicators.LoadingSpinner(value=True, size=28, color="primary"),
                         pn.pane.HTML("<span class='cs-muted'>Drawing the diagnostics…</span>", margin=(14, 8)),
                         css_classes=["cs-diagnostics-waiting"], margin=(20, 10))
        self.diagnostics[:] = [waiting]

        def build():
            try:
                if self.model is model and list(self.diagnostics) == [waiting]:
                    self.diagnostics[:] = [Diagnostics(model)]
            except Exception as exc:  # noqa: BLE001
                self.diagnostics[:] = []
                self.notices.report(exc, "drawing the diagnostics")

        doc = pn.state.curdoc
        if doc is not None and doc.session_context is not None:
            doc.add_next_tick_callback(build)  # let the spinner reach the browser first
        else:
            build()

    def _current_label(self):
        if self.model is None:
            return None
        for label, scene in self._uploaded.items():
            if scene is self.model.scene:
                return label
        return self._label_of(self.model.scene.path)

    def _show_model(self, model):
        """Build the views of a freshly opened model and put them on the page."""
        self.model = model
        ds = model.scene.data
        focus = Focus((ds.sizes["y"], ds.sizes["x"]), row0=int(ds["row"].values[0]), col0=int(ds["col"].values[0]))
        self.focus = focus
        channel = pn.widgets.RadioButtonGroup(options={channel_label(c): c for c in model.param.channel.objects},
                                              value=model.channel, color="primary", variant="outline",
                                              margin=(6, 10), css_classes=["cs-channel"],
                                              stylesheets=[BUTTON_GROUP_CSS])
        channel.link(model, value="channel")
        maps = MapGrid(model, focus, self.notices, available_width=maps_width(self.keys.main_width),
                       window_height=self.keys.window_height or None)
        self.map_grid = maps
        self.qa = QAPanel(model, focus, self.notices, uploaded=model.scene.path in self._uploaded_paths())
        side = pn.Column(
            pn.Card(self.qa,
                    title="Analyst QA", collapsible=False,
                    sizing_mode="stretch_width", css_classes=["cs-qa-card"]),
            pn.Card(PixelInspector(model, focus, self.notices), title="Pixel inspector", collapsible=False,
                    sizing_mode="stretch_width", css_classes=["cs-inspector-card"]),
            width=SIDE_WIDTH - 10, margin=(0, 0, 0, 10), css_classes=["cs-side"],
            # beside the maps it stays in view while the page scrolls (its own scroll bar if taller)
            styles={"flex": f"0 0 {SIDE_WIDTH - 10}px", "position": "sticky", "top": "0px",
                    "max-height": "calc(100vh - 72px)", "overflow-y": "auto"})  # below the 64 px header
        self.counts[:] = [ClassCounts(model)]
        # a flex box: the maps fill the width left beside the QA and inspector column (sized from the
        # window the browser reports); in a very narrow window the column wraps below the maps
        self.maps[:] = [pn.FlexBox(pn.Column(
            pn.Row(pn.pane.HTML("<b>Channel of the temperature maps</b>", margin=(12, 0, 0, 10)), channel),
            maps, styles={"flex": "1 1 0px", "min-width": "0px"}), side, flex_wrap="wrap",
            align_items="flex-start", sizing_mode="stretch_width")]
        # the diagnostics take a second or two to draw: built when their tab is first shown,
        # behind a spinner, not with every scene
        self.diagnostics[:] = []
        if self.tabs.active == DIAGNOSTICS_TAB:
            self._on_tab()
        self.tuning[:] = [TuningPanel(model, self.notices)]
        self.exports[:] = [ExportPanel(model, self.notices, defaults=self.config,
                                       on_settings=lambda: self.tuning.__setitem__(slice(None),
                                                                                   [TuningPanel(model, self.notices)]))]
        if model.message:
            self.notices.show(model.message, "warning")

    def cleanup(self, *_):
        self.upload.cleanup()


def _about_text():
    return f"""
### cloudsieve dashboard

Screens infrared window-channel imagery for cloud. For every pixel the clear-sky brightness
temperature is simulated from the background state; the **departure** observed − clear and a set
of physically based tests give each pixel a class:

{legend_html()}

- **Maps & QA** — linked maps (pan or zoom one, all follow), chosen with the "Maps" boxes: observed, clear
  sky and their departure, the class, why each pixel was flagged (the deciding test, an analyst edit, or a
  flag such as the warm departure alone), a chosen test's margin, cloud optical depth and top, the clear-sky
  σ of each pixel, the departure in units of it and, where a truth file lies beside the scene, the mask
  against it; eight are shown at first and one can be enlarged. Click a pixel to inspect it. With the
  box or lasso tool from the toolbar, select pixels and mark them clear or cloud; edits are saved at once
  beside the scene (`<scene>.qa.jsonl`), shown outlined in magenta on the class map, and used by the
  downloads and by `cloudsieve screen`.
- **Screening** (sidebar) — switch tests and move thresholds; only the screening is redone, never the
  clear-sky simulation.
- **Diagnostics** — departure histogram with the thresholds, split-window scatter, clear-sky bias fit
  per surface, the calibration card (how the clear pixels' departures spread against their σ, and a
  factor on `[background_errors]` fitted to them, shown as a configuration to copy, never applied) and a
  summary of the scene.

Class palette: deep teal = clear, amber = marginal, pale lavender = cloud, mid-grey = no_data. The
colours differ in lightness as well as hue, so they stay apart for common colour-vision deficiencies.

Cloud layer: one cloud layer per flagged pixel, its top fitted to every inversion channel at once with
the absorption ratios of ice, large ice crystals (grey) or water; the phase follows the top temperature
(and, at night, the 3.9 µm channel). On the optical-depth map near-black marks opaque pixels (τ only a
lower bound), green pixels colder than an opaque cloud at the highest allowed top, blue-grey pixels with
no signal to invert; on the top map cyan marks tops the channels could not fix (τ is then given at the
assumed top). Hover names the status and phase.

**Caution.** {CAUTION}

cloudsieve {__version__}
"""


def _served():
    """True inside a server session (a page in a browser), False when a page is built directly."""
    doc = pn.state.curdoc
    return doc is not None and doc.session_context is not None


def _query_scene():
    """The ``scene`` argument of the page address, if any (a name, checked by the catalog)."""
    try:
        args = pn.state.session_args or {}
    except Exception:  # noqa: BLE001 — no session (tests building pages directly)
        return None
    value = args.get("scene")
    if not value:
        return None
    raw = value[0]
    return raw.decode("utf-8", "replace") if isinstance(raw, bytes) else str(raw)


def create_app(paths=None, data_dir=None, config=None, max_upload_mb=200.0):
    """A new page (with its own model) for one session; ``config`` is a dict, a TOML path or None."""
    session = Session(paths, data_dir, config, max_upload_mb)
    if pn.state.curdoc is not None and pn.state.curdoc.session_context is not None:
        pn.state.on_session_destroyed(session.cleanup)
    return session.template


# ---------------------------------------------------------------------------------------
# the server
# ---------------------------------------------------------------------------------------
def _free_port(address):
    family = socket.AF_INET6 if ":" in address else socket.AF_INET
    with socket.socket(family, socket.SOCK_STREAM) as s:
        s.bind((address, 0))
        return s.getsockname()[1]


def _check_port(address, port):
    """Fail early (before the first scene is prepared) if the port is taken."""
    family = socket.AF_INET6 if ":" in address else socket.AF_INET
    with socket.socket(family, socket.SOCK_STREAM) as s:
        s.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        s.bind((address, port))
    return port


def server_options(address, port, allow_websocket_origin, max_upload_mb):
    """Keyword arguments of pn.serve for these command-line settings (raises CloudsieveError)."""
    local = address in LOCAL_ADDRESSES
    origins = [o for o in (allow_websocket_origin or []) if o]
    if not local and not origins:
        raise _OriginError(
            f"cloudsieve: --address {address} makes the dashboard reachable from other machines; say which "
            f"origins may connect with --allow-websocket-origin HOST:PORT (e.g. --allow-websocket-origin "
            f"myhost.example.org:{port or 5006}), or serve on 127.0.0.1.")
    if local:
        origins += [f"127.0.0.1:{port}", f"localhost:{port}"] + ([f"[::1]:{port}"] if address == "::1" else [])
    # uploads travel base64-encoded over the websocket (4/3 of the file), plus some headroom
    limit = int(max_upload_mb * 1024 * 1024 * 4 / 3) + 8 * 1024 * 1024
    return dict(port=port, address=address, websocket_origin=origins, websocket_max_message_size=limit,
                http_server_kwargs={"max_buffer_size": limit}, title="cloudsieve")


def login_check(address, basic_auth=None, no_login=False):
    """The login rule of ``serve``: an address other than this machine's needs a login
    (``--basic-auth`` or CLOUDSIEVE_BASIC_AUTH), or an explicit ``--no-login``. Returns the
    warning to print at start (None when there is nothing to warn of); raises _OriginError."""
    import os

    basic_auth = basic_auth or os.environ.get("CLOUDSIEVE_BASIC_AUTH")
    if basic_auth and no_login:
        raise _OriginError("cloudsieve: --no-login and --basic-auth contradict each other; give one of them")
    if address in LOCAL_ADDRESSES or basic_auth:
        return None
    if not no_login:
        raise _OriginError(
            f"cloudsieve: --address {address} serves the data folder's scenes to the network, and anyone who "
            "reaches the port could read them and upload files. Require a login with --basic-auth PASSWORD "
            "(or a JSON file of {user: password}; also CLOUDSIEVE_BASIC_AUTH), or say --no-login to serve it "
            "open on a network you trust.")
    return (f"cloudsieve: WARNING: serving on {address} without a login (--no-login): anyone who reaches this "
            "port can read the scenes of the data folder and upload files. Use --basic-auth, and TLS through a "
            "reverse proxy, beyond a trusted network.")


def auth_options(basic_auth=None, cookie_secret=None):
    """pn.serve keyword arguments for an optional login (Panel's basic authentication).

    ``basic_auth`` is one password or the path of a JSON file mapping user names to
    passwords (Panel reads either); the environment variable CLOUDSIEVE_BASIC_AUTH is used
    when the option is not given. The login cookie is signed with ``cookie_secret`` (or
    CLOUDSIEVE_COOKIE_SECRET), else with a random secret made at start-up.
    """
    import os
    import secrets

    basic_auth = basic_auth or os.environ.get("CLOUDSIEVE_BASIC_AUTH")
    if not basic_auth:
        return {}
    if len(basic_auth) < 8 and not Path(basic_auth).is_file():
        raise _OriginError("cloudsieve: the --basic-auth password must have at least 8 characters")
    secret = cookie_secret or os.environ.get("CLOUDSIEVE_COOKIE_SECRET") or secrets.token_urlsafe(32)
    return {"basic_auth": basic_auth, "cookie_secret": secret}


class _OriginError(CloudsieveError):
    exit_code = 2


def _quiet_closed_connections(loop, context):
    """asyncio exception handler: a browser tab closed while the server was still sending to
    it is routine, not an error worth a traceback in the terminal; anything else is reported
    as usual."""
    exc = context.get("exception")
    if exc is not None and type(exc).__name__ in ("WebSocketClosedError", "StreamClosedError"):
        return
    loop.default_exception_handler(context)


def serve(args):
    """``cloudsieve serve``: run the dashboard until Ctrl-C (returns the exit code)."""
    address = getattr(args, "address", None) or "127.0.0.1"
    max_mb = float(getattr(args, "max_upload_mb", None) or 200.0)
    if max_mb <= 0:
        print("cloudsieve: --max-upload-mb must be a positive number of megabytes", file=sys.stderr)
        return 2
    try:
        server_options(address, args.port or 5006, args.allow_websocket_origin, max_mb)
        open_warning = login_check(address, getattr(args, "basic_auth", None), getattr(args, "no_login", False))
    except _OriginError as exc:
        print(str(exc), file=sys.stderr)
        return exc.exit_code
    if open_warning:
        print(open_warning, file=sys.stderr, flush=True)
    from cloudsieve.config import add_renames

    # a bad file or --rename raises ConfigError: the CLI prints it, exit 2
    config = add_renames(load_config(args.config), getattr(args, "rename", None))
    paths = [Path(p) for p in (args.scenes or [])]
    for p in paths:
        if not p.is_file():
            raise SceneError(f"scene file '{p}' does not exist. Check the path.")
    data_dir = Path(args.data_dir) if args.data_dir else None
    if data_dir is not None and not data_dir.is_dir():
        raise PathError(f"--data-dir '{data_dir}' is not a folder")
    try:
        port = _check_port(address, args.port) if args.port else _free_port(address)
    except OSError as exc:
        print(f"cloudsieve: cannot listen on {address}:{args.port} ({exc.strerror or exc}); choose another "
              "--port (0 picks a free one) or stop the program using it.", file=sys.stderr)
        return 2
    opts = server_options(address, port, args.allow_websocket_origin, max_mb)
    opts.update(auth_options(getattr(args, "basic_auth", None), getattr(args, "cookie_secret", None)))
    def app():  # a plain function: Panel calls it once per session
        return create_app(paths=paths, data_dir=data_dir, config=config, max_upload_mb=max_mb)

    host = f"[{address}]" if ":" in address else address
    print("cloudsieve dashboard: preparing the first scene …", flush=True)
    first = paths[0] if paths else Session.default_scene(data_dir)
    if first is not None:
        try:  # fills the shared cache, so the first page opens quickly
            load_cached(first, config)
        except CloudsieveError as exc:
            print(f"cloudsieve: {exc}", file=sys.stderr)
            print("cloudsieve dashboard: the page will show this problem; pick another scene there.", file=sys.stderr)
    server = pn.serve(app, show=False, start=False, verbose=False, threaded=False, **opts)
    server.io_loop.asyncio_loop.set_exception_handler(_quiet_closed_connections)
    print(f"cloudsieve dashboard: http://{host}:{port}/ (Ctrl-C to stop)", flush=True)
    if args.show:
        server.io_loop.add_callback(server.show, "/")
    try:
        server.start()
        server.io_loop.start()
    except KeyboardInterrupt:
        pass
    finally:
        try:
            server.stop()
        except Exception:  # noqa: BLE001 — already stopped
            pass
    print("cloudsieve dashboard: stopped", flush=True)
    return 0
