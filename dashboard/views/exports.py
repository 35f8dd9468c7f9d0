"""Downloads of the current result (mask, test bits and margins, departures, cloud layer).

The files are built on click from the model (same writers as ``cloudsieve screen``), so they
hold the current thresholds and every QA edit in force.
"""
import io
import tomllib

import panel as pn
from panel.viewable import Viewer

from cloudsieve.config import to_toml

from .style import OUTLINE_BUTTON_CSS


def settings_toml(model):
    """The current settings as TOML text (the schema of ``--config``), with a header saying how to use it."""
    name = model.scene.name
    head = (f"# cloudsieve settings saved from the dashboard (scene {name}).\n"
            f"# The same result from the command line, with the scene's QA journal beside it:\n"
            f"#   cloudsieve screen {name}.nc --config {name}_settings.toml --out {name}_mask.nc\n")
    return head + to_toml(model.config)


class ExportPanel(Viewer):
    """CSV and NetCDF download buttons."""

    def __init__(self, model, notices, on_settings=None, defaults=None, **params):
        super().__init__(**params)
        self.model, self.notices = model, notices
        #: called after settings were loaded or reset (the app rebuilds the tuning widgets)
        self.on_settings = on_settings
        #: what "Reset to defaults" goes back to: the server's configuration (its --config), else cloudsieve's
        self.defaults = defaults
        name = model.scene.name
        self.csv = pn.widgets.FileDownload(callback=self._callback("csv"), filename=f"{name}_mask.csv",
                                           label="Download CSV", color="primary", variant="outline",
                                           sizing_mode="stretch_width", css_classes=["cs-download-csv"],
                                           stylesheets=[OUTLINE_BUTTON_CSS])
        self.netcdf = pn.widgets.FileDownload(callback=self._callback("netcdf"), filename=f"{name}_mask.nc",
                                              label="Download NetCDF", color="primary",
                                              variant="outline", sizing_mode="stretch_width",
                                              css_classes=["cs-download-nc"], stylesheets=[OUTLINE_BUTTON_CSS])
        self.settings = pn.widgets.FileDownload(callback=self._settings, filename=f"{name}_settings.toml",
                                                label="Save settings (TOML)", color="primary", variant="outline",
                                                sizing_mode="stretch_width", css_classes=["cs-download-settings"],
                                                stylesheets=[OUTLINE_BUTTON_CSS])
        self.load = pn.widgets.FileInput(accept=".toml", multiple=False, css_classes=["cs-load-settings"],
                                         sizing_mode="stretch_width")
        self.load.param.watch(self._loaded, "value")
        self.reset = pn.widgets.Button(label="Reset to defaults", color="primary", variant="outline",
                                       sizing_mode="stretch_width", css_classes=["cs-reset-settings"],
                                       stylesheets=[OUTLINE_BUTTON_CSS])
        self.reset.on_click(self._reset)
        n = model.result.mask.size
        hint = ("" if n <= 1_000_000 else
                "<div class='cs-muted'>Large scene: NetCDF is much smaller and faster than CSV.</div>")
        self._layout = pn.Column(
            pn.Row(self.csv, self.netcdf, sizing_mode="stretch_width"),
            pn.pane.HTML("<div class='cs-muted'>Mask, test bits and margins, departures, clear-sky BT and the "
                         "cloud layer, with the current settings and QA edits.</div>" + hint, margin=(0, 10)),
            self.settings,
            pn.pane.HTML("<div class='cs-muted'>The thresholds and switches as a configuration file for "
                         "<code>cloudsieve screen --config</code>: with the scene's QA journal it writes the same "
                         "files as these downloads.</div>", margin=(0, 10)),
            pn.pane.HTML("<div class='cs-muted'>Load settings from such a file (thresholds, switches, bias "
                         "removal, marginal band, cloud layer), or go back to the defaults:</div>", margin=(6, 10, 0, 10)),
            self.load, self.reset,
            sizing_mode="stretch_width")

    def __panel__(self):
        return self._layout

    def _settings(self):
        try:
            return io.BytesIO(settings_toml(self.model).encode("utf-8"))
        except Exception as exc:  # noqa: BLE001 — reported in the page
            self.notices.report(exc, "saving the settings")
            return io.BytesIO(b"")

    def _apply(self, cfg, what):
        ignored = self.model.apply_settings(cfg)
        note = (f" Not applied here (they change the clear-sky simulation; use <code>cloudsieve screen --config</code> "
                f"or <code>cloudsieve serve --config</code>): {', '.join(ignored)}." if ignored else "")
        self.notices.show(f"{what}.{note}", "warning" if ignored else "success")
        if self.on_settings is not None:
            self.on_settings()

    def _loaded(self, event):
        if not event.new:
            return
        from cloudsieve.config import merge_config

        name = self.load.filename or "the file"
        try:
            text = bytes(event.new).decode("utf-8")
            cfg = merge_config(tomllib.loads(text))
        except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
            self.notices.show(f"{name} is not a TOML settings file ({exc}); nothing changed.", "warning")
            return
        except Exception as exc:  # noqa: BLE001 — the configuration's own report, in the page
            self.notices.report(exc, f"loading {name}")
            return
        self._apply(cfg, f"Settings loaded from {name}")

    def _reset(self, _event=None):
        from cloudsieve.config import load_config

        try:
            self._apply(self.defaults if self.defaults is not None else load_config(), "Settings reset to the defaults")
            self.load.clear()  # the file box no longer names a file whose settings are gone
        except Exception as exc:  # noqa: BLE001 — reported in the page
            self.notices.report(exc, "resetting the settings")

    def _callback(self, fmt):
        def build():
            try:
                return io.BytesIO(self.model.export_bytes(fmt))
            except Exception as exc:  # noqa: BLE001 — reported in the page
                self.notices.report(exc, f"building the {fmt.upper()} download")
                return io.BytesIO(b"")
        return build
