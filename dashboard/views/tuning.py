"""Threshold tuning: a switch and a threshold slider per test, cloud-top choice, bias removal.

Every change calls the model (set_threshold / set_enabled / its parameters), which rescreens
without re-running the clear-sky simulation. Sliders act on release (value_throttled).
"""
import numpy as np
import panel as pn
from panel.viewable import Viewer

from cloudsieve.codes import SURFACES
from cloudsieve.registry import REGISTRY

from .style import BUTTON_GROUP_CSS, SURFACE_LABELS, plain_words


class TuningPanel(Viewer):
    """Widgets bound to one model's screening settings."""

    def __init__(self, model, notices, **params):
        super().__init__(**params)
        self.model, self.notices = model, notices
        codes = np.unique(model.scene.data["surface"].values[model.scene.data["valid"].values])
        self.surfaces = [SURFACES[int(c)] for c in codes] or ["sea"]
        self.surface = pn.widgets.RadioButtonGroup(
            label="Surface", options={SURFACE_LABELS[s]: s for s in self.surfaces}, value=self.surfaces[0],
            color="primary", variant="outline", visible=len(self.surfaces) > 1, sizing_mode="stretch_width",
            stylesheets=[BUTTON_GROUP_CSS],
            description="Thresholds are set per surface type; choose which one the sliders below edit.")
        self.switches, self.sliders = {}, {}
        rows = []
        for test, spec in REGISTRY.items():
            unit = spec.tunable.unit
            (lo, hi), step = spec.tunable.bounds, spec.tunable.step
            sw = pn.widgets.Switch(value=model.enabled(test), width=40, margin=(8, 4, 0, 10),
                                   css_classes=[f"cs-switch-{test}"])
            sl = pn.widgets.FloatSlider(label=f"threshold [{unit}]", start=lo,
                                        end=max(hi, model.threshold(test, self.surfaces[0])), step=step,
                                        value=model.threshold(test, self.surfaces[0]), format="0.00",
                                        sizing_mode="stretch_width", margin=(0, 10, 4, 10),
                                        css_classes=[f"cs-slider-{test}"])
            usable = pn.bind(self._applicable, test, model.param.version)
            sw.disabled = pn.bind(lambda ok: not ok, usable)
            sl.disabled = pn.bind(lambda ok, on: not (ok and on), usable, sw.param.value)
            sw.param.watch(self._switch_cb(test), "value")
            sl.param.watch(self._slider_cb(test), "value_throttled")
            self.switches[test], self.sliders[test] = sw, sl
            title = pn.pane.HTML(f"<b>{REGISTRY[test].label}</b>", margin=(8, 0, 0, 0))
            help_ = pn.widgets.TooltipIcon(value=REGISTRY[test].help, margin=(6, 0, 0, 0))
            note = pn.pane.HTML(pn.bind(self._skip_note, test, model.param.version), margin=(0, 10),
                                css_classes=["cs-muted"])
            rows.append(pn.Column(pn.Row(sw, title, help_), sl, note, margin=0))
        self.surface.param.watch(self._surface_changed, "value")
        # cloud layer and other settings
        self.cloud_top = pn.widgets.RadioButtonGroup.from_param(
            model.param.cloud_top, label="Cloud top", color="primary", variant="outline",
            sizing_mode="stretch_width", stylesheets=[BUTTON_GROUP_CSS])
        self.top_pressure = pn.widgets.FloatSlider(
            label="fixed cloud-top pressure [hPa]", start=model.param.top_pressure.bounds[0],
            end=model.param.top_pressure.bounds[1], step=model.param.top_pressure.step or 10.0,
            value=model.top_pressure, format="0", sizing_mode="stretch_width",
            visible=pn.bind(lambda v: v == "fixed", model.param.cloud_top))
        self.top_pressure.param.watch(self._setter("top_pressure", "changing the cloud-top pressure"),
                                      "value_throttled")
        self.remove_bias = pn.widgets.Switch.from_param(model.param.remove_bias, label="", width=40, margin=(8, 4, 0, 10),
                                                     css_classes=["cs-switch-bias"])
        mp = model.param.marginal_fraction
        self.marginal = pn.widgets.FloatSlider(
            label="marginal band [fraction of threshold]", start=mp.bounds[0], end=mp.bounds[1],
            step=mp.step or 0.05, value=model.marginal_fraction, format="0.00", sizing_mode="stretch_width",
            css_classes=["cs-slider-marginal"])
        self.marginal.param.watch(self._setter("marginal_fraction", "changing the marginal band"), "value_throttled")
        self._layout = pn.Column(
            pn.pane.HTML("<div class='cs-muted'>Switch tests on or off and move thresholds; the mask, the "
                         "cloud layer and the counts follow at once (no new clear-sky simulation).</div>",
                         margin=(0, 10)),
            self.surface, *rows,
            pn.pane.HTML("<hr style='border:none;border-top:1px solid #dde2e6;margin:0'>",
                         sizing_mode="stretch_width", margin=(6, 10)),
            pn.Row(self.remove_bias, pn.pane.HTML("<b>Remove clear-sky bias</b>", margin=(8, 0, 0, 0)),
                   pn.widgets.TooltipIcon(value="Fit departure = a + b·W·secθ over clear pixels per channel, "
                                                "subtract it and screen again.", margin=(6, 0, 0, 0))),
            self.marginal,
            pn.pane.HTML("<b>Cloud top</b>", margin=(6, 10, 0, 10)), self.cloud_top, self.top_pressure,
            sizing_mode="stretch_width", margin=0)

    def __panel__(self):
        return self._layout

    # ------------------------------------------------------------------ callbacks
    def _switch_cb(self, test):
        @self.notices.guard(f"switching {REGISTRY[test].label}")
        def cb(event):
            self.model.set_enabled(test, event.new)
        return cb

    def _slider_cb(self, test):
        @self.notices.guard(f"setting the {REGISTRY[test].label} threshold")
        def cb(event):
            if event.new is None:
                return
            self.model.set_threshold(test, float(event.new), self.surface.value)
        return cb

    def _setter(self, name, doing):
        @self.notices.guard(doing)
        def cb(event):
            if event.new is not None:
                setattr(self.model, name, float(event.new))
        return cb

    def _surface_changed(self, event):
        """Show the thresholds of the newly chosen surface (without rescreening)."""
        for test, sl in self.sliders.items():
            v = self.model.threshold(test, event.new)
            sl.param.update(end=max(sl.end, v), value=v)

    def _applicable(self, test, _version=None):
        """False when the scene cannot run the test (not merely switched off)."""
        why = self.model.result.skipped.get(test)
        return not (why and "switched off" not in why)

    def _skip_note(self, test, _version=None):
        why = self.model.result.skipped.get(test)
        if why and "switched off" not in why:
            return f"not applied: {plain_words(why)}"
        return ""
