"""Choosing the scene: a picker over the data folder and an upload box.

Neither opens files by itself: the picker hands a name to the session, which resolves it
inside the data folder; the upload box validates the uploaded bytes and hands over a
checked :class:`cloudsieve.scene.Scene`.
"""
import asyncio
import functools
import html
import re
import tempfile
from pathlib import Path

import panel as pn
from panel.viewable import Viewer

from cloudsieve.errors import SceneError
from cloudsieve.scene import check_scene

from .qa import edits_statement

UPLOAD_SUFFIXES = (".csv", ".parquet", ".nc")
#: marker the browser-side size check puts in mime_type instead of sending an oversized file
_TOO_LARGE = "x-cloudsieve/too-large"


def _short(folder):
    """The folder relative to the working directory when inside it, else the full path."""
    try:
        return str(Path(folder).relative_to(Path.cwd())) or "."
    except ValueError:
        return str(folder)


class ScenePicker(Viewer):
    """A select box of the scene files in the data folder (and any given on the command line)."""

    def __init__(self, catalog, on_open, notices, current=None, **params):
        super().__init__(**params)
        self.catalog, self.on_open, self.notices = catalog, on_open, notices
        options = catalog.names()
        self.select = pn.widgets.Select(label="Scene file", options=options, value=current if current in options else None,
                                        sizing_mode="stretch_width", css_classes=["cs-scene-select"])
        self.refresh = pn.widgets.Button(label="↻", description="Look for new files in the data folder",
                                         color="light", width=38, margin=(26, 10, 0, 0))
        self.select.param.watch(self._picked, "value")
        self.refresh.on_click(lambda _e: self.update_options())
        self._ignore = False
        self._extra = []

    def __panel__(self):
        folder = self.catalog.folder
        return pn.Column(
            pn.Row(self.select, self.refresh, sizing_mode="stretch_width"),
            pn.pane.HTML(f"<div class='cs-muted'>Data folder: <code title='{html.escape(str(folder))}'>"
                         f"{html.escape(_short(folder))}</code></div>", margin=(0, 10)),
            sizing_mode="stretch_width")

    def update_options(self, current=None, extra=None):
        """Re-list the data folder (plus ``extra`` names, e.g. uploads, kept for later calls)."""
        if extra is not None:
            self._extra = list(extra)
        options = self.catalog.names() + [e for e in self._extra if e not in self.catalog.names()]
        self._ignore = True
        try:
            value = current if current is not None else self.select.value
            self.select.param.update(options=options, value=value if value in options else None)
        finally:
            self._ignore = False

    def _picked(self, event):
        # a synchronous watcher, so that the _ignore guard of update_options holds; the opening
        # itself is a coroutine scheduled on the session's event loop
        if self._ignore or event.new is None or event.new == event.old:
            return
        pn.state.execute(functools.partial(self.on_open, event.new))


class UploadBox(Viewer):
    """Upload a scene file: size limit, validation report in the page, then hand it over."""

    def __init__(self, on_scene, notices, max_upload_mb=200.0, config=None, **params):
        super().__init__(**params)
        self.on_scene, self.notices, self.config = on_scene, notices, config
        self.limit = int(max_upload_mb * 1024 * 1024)
        self.max_upload_mb = max_upload_mb
        self.input = pn.widgets.FileInput(accept=",".join(UPLOAD_SUFFIXES), sizing_mode="stretch_width",
                                          css_classes=["cs-upload"])
        # Refuse oversized files in the browser, before they travel over the websocket: the value
        # is emptied and the size reported in mime_type, which the server turns into a message.
        self.input.jscallback(value=f"""
            const v = cb_obj.value;
            if (typeof v === 'string' && v.length * 0.75 > {self.limit}) {{
                cb_obj.setv({{value: '', mime_type: '{_TOO_LARGE};' + Math.round(v.length * 0.75)}});
            }}""")
        # the report is preformatted text: wrap its long lines inside the narrow sidebar
        self.report = pn.pane.Alert("", alert_type="light", visible=False, sizing_mode="stretch_width",
                                    css_classes=["cs-upload-report"], margin=(4, 10),
                                    stylesheets=["pre, code { white-space: pre-wrap; overflow-wrap: anywhere; "
                                                 "font-size: 0.92em; }"])
        self.input.param.watch(self._uploaded, ["value", "mime_type"])
        self._tmp = tempfile.TemporaryDirectory(prefix="cloudsieve-upload-")
        self._busy = False

    def __panel__(self):
        return pn.Column(
            pn.pane.HTML(f"<div class='cs-muted'>Upload a scene (.csv, .parquet or .nc, at most "
                         f"{self.max_upload_mb:g} MB). It is checked first; a failed check leaves the current "
                         "scene open.</div>", margin=(0, 10)),
            self.input, self.report, sizing_mode="stretch_width")

    def cleanup(self):
        self._tmp.cleanup()

    def clear_report(self):
        """Hide the report of an earlier upload (another scene is now open)."""
        self._show("", "light")

    def _show(self, text, kind):
        self.report.param.update(object=text, alert_type=kind, visible=bool(text))

    async def _uploaded(self, *events):
        if self._busy:
            return
        mime = self.input.mime_type or ""
        name = self.input.filename or "upload"
        if isinstance(mime, str) and mime.startswith(_TOO_LARGE):
            size = int(mime.split(";")[1]) if ";" in mime else 0
            self._show(f"**{name}** is {size / 1024 ** 2:.0f} MB; uploads are limited to {self.max_upload_mb:g} MB. "
                       "Screen large scenes with `cloudsieve screen`, or restart the dashboard with a larger "
                       "`--max-upload-mb`.", "warning")
            return
        data = self.input.value
        if not data or not any(e.name == "value" for e in events):
            return
        self._busy = True
        try:
            await self._handle(name, data)
        except Exception as exc:  # noqa: BLE001 — never a traceback in the page
            self.notices.report(exc, "reading the upload")
        finally:
            self._busy = False

    async def _handle(self, name, data):
        if len(data) > self.limit:
            self._show(f"**{name}** is {len(data) / 1024 ** 2:.0f} MB; uploads are limited to "
                       f"{self.max_upload_mb:g} MB.", "warning")
            return
        suffix = Path(name).suffix.lower()
        if suffix not in UPLOAD_SUFFIXES:
            self._show(f"**{name}**: not a scene file. Upload a .csv, .parquet or .nc file.", "warning")
            return
        stem = re.sub(r"[^A-Za-z0-9_.-]+", "_", Path(name).stem)[:80] or "upload"
        folder = Path(self._tmp.name) / f"{len(list(Path(self._tmp.name).iterdir())):03d}"
        folder.mkdir()
        path = folder / f"{stem}{suffix}"
        path.write_bytes(data)
        self._show(f"Checking **{name}** …", "info")
        loop = asyncio.get_running_loop()
        try:
            scene = await loop.run_in_executor(None, lambda: check_scene(path, config=self.config))
        except SceneError as exc:
            self._show(f"**{name} cannot be used.**\n\n```\n{exc}\n```", "danger")
            return
        report = scene.report.text()
        if not scene.report.ok:
            self._show(f"**{name} cannot be used.**\n\n```\n{report}\n```", "danger")
            return
        kind = "warning" if scene.report.warnings else "success"
        self._show(f"```\n{report}\n```\n" + edits_statement(f"{path.name}.qa.jsonl", True).replace("<code>", "`")
                   .replace("</code>", "`"), kind)
        await self.on_scene(scene)
