"""Pixel inspector: everything the screening knows about the clicked pixel."""
import numpy as np
import holoviews as hv
import panel as pn
from panel.viewable import Viewer

from .style import CLASS_COLOURS, channel_colour, channel_label, plain_words, test_label

_INPUT_LABELS = {
    "t_skin": ("skin temperature", "K", ".2f"), "t_air": ("air temperature", "K", ".2f"),
    "tcwv": ("water vapour column", "kg m⁻²", ".1f"), "sat_zenith": ("viewing zenith", "°", ".1f"),
    "sol_zenith": ("solar zenith", "°", ".1f"), "p_surf": ("surface pressure", "hPa", ".1f"),
    "lat": ("latitude", "°N", ".3f"), "lon": ("longitude", "°E", ".3f"),
}


def _f(v, fmt):
    if v is None:
        return "–"
    if isinstance(v, float) and np.isinf(v):
        return "∞"
    return format(v, fmt)


#: the curve's cloud, by the phase whose absorption ratios it uses (grey where none was retrieved)
_CURVE_PHASE = {"ice": "Ice", "water": "Water", "grey": "Grey", "none": "Grey"}


class PixelInspector(Viewer):
    """Inputs, per-channel temperatures, test margins, inversion and BT-vs-τ curve of a pixel."""

    def __init__(self, model, focus, notices, **params):
        super().__init__(**params)
        self.model, self.focus, self.notices = model, focus, notices
        self._info = None
        self._md = pn.pane.Markdown(pn.bind(self.text, focus.param.pixel, model.param.version),
                                    sizing_mode="stretch_width", css_classes=["cs-inspector"], margin=(0, 10),
                                    # compact tables: the channel table fits the 380 px column
                                    stylesheets=["table { font-size: 12px; } th, td { padding: 2px 4px !important; }"
                                                 " .markdown { overflow-x: auto; }"])
        # the curve plot is built on the first click (a page without it opens faster)
        self._plot = pn.Column(margin=0)
        focus.param.watch(self._first_pixel, "pixel")

    def __panel__(self):
        return pn.Column(self._md, self._plot, sizing_mode="stretch_width")

    def _first_pixel(self, event):
        if event.new is not None and not len(self._plot):
            self._plot.extend([
                pn.pane.HoloViews(
                    hv.DynamicMap(pn.bind(self.curve, pixel=self.focus.param.pixel, version=self.model.param.version)),
                    linked_axes=False, css_classes=["cs-curve"]),
                pn.pane.HTML("<div class='cs-muted'>Solid: modelled top-of-atmosphere brightness temperature of a "
                             "single cloud layer at the retrieved top with the absorption ratios β of the retrieved phase (grey "
                             "where none), against its optical depth in the reference channel; dashed: observed, in "
                             "the same colour per channel.</div>",
                             margin=(0, 10))])

    def _pixel_info(self, pixel):
        if pixel is None:
            return None
        try:
            return self.model.pixel_info(*pixel)
        except Exception as exc:  # noqa: BLE001 — shown in the page, never a traceback
            self.notices.report(exc, "inspecting the pixel")
            return None

    def text(self, pixel=None, version=None):
        info = self._pixel_info(pixel)
        if info is None:
            return ("**Pixel inspector** — click any map to see one pixel's inputs, temperatures, test "
                    "margins and cloud retrieval.")
        colour = CLASS_COLOURS.get(info["class"], "#999")
        swatch = (f'<span style="display:inline-block;width:11px;height:11px;background:{colour};'
                  'border:1px solid #666;margin:0 4px 0 2px"></span>')
        inp = info["inputs"]
        where = f"row {info['row']}, column {info['col']}"
        if inp.get("lat") is not None:
            lat, lon = inp["lat"], (inp["lon"] + 180.0) % 360.0 - 180.0
            where += f" · {abs(lat):.3f}° {'N' if lat >= 0 else 'S'}, {abs(lon):.3f}° {'E' if lon >= 0 else 'W'}"
        out = [f"#### Pixel {where}",
               f"Class {swatch}**{info['class']}** · surface {inp.get('surface', '–')}"
               + (f" · tests fired: {', '.join(test_label(t) for t in info['tests_fired'])}"
                  if info["tests_fired"] else " · no test fired"), ""]
        out += ["| input | value |", "|---|---|"]
        for key, (label, unit, fmt) in _INPUT_LABELS.items():
            if key in inp and key not in ("lat", "lon"):
                out.append(f"| {label} | {_f(inp[key], fmt)} {unit} |")
        out += ["", "| channel | observed [K] | clear sky [K] | bias removed [K] | departure [K] | σ [K] |",
                "|---|---|---|---|---|---|"]
        for ch, v in info["channels"].items():
            out.append(f"| {channel_label(ch)} | {_f(v['observed'], '.2f')} | {_f(v['clear'], '.2f')} | "
                       f"{_f(v['bias_removed'], '+.2f')} | {_f(v['departure'], '+.2f')} | {_f(v['sigma'], '.2f')} |")
        out += ["", "| test | margin [K] | fired |", "|---|---|---|"]
        for t, mg in info["margins"].items():
            fired = mg is not None and mg > 0
            out.append(f"| {test_label(t)} | {_f(mg, '+.2f')} | {'● fired' if fired else ''} |")
        skipped = self.model.result.skipped
        for t, why in skipped.items():
            out.append(f"| {test_label(t)} | – | not applied ({plain_words(why)}) |")
        cl = info["cloud"]
        tau, stau = cl["optical_depth"], cl["optical_depth_sigma"]
        if tau is None:
            tau_text = "–"
        elif stau is None:
            tau_text = f"≥ {tau:.2f} (lower bound)"
        else:
            tau_text = f"{tau:.2f} ± {stau:.2f}"
        sp = cl["top_pressure_sigma"]
        if cl["top_pressure"] is None:
            top_text = "–"
        elif cl["status"] == "top_assumed":
            top_text = f"{cl['top_pressure']:.0f} hPa (assumed: the channels could not fix it)"
        elif sp is None or not np.isfinite(sp):
            top_text = f"{cl['top_pressure']:.0f} hPa"
        else:
            top_text = f"{cl['top_pressure']:.0f} ± {sp:.0f} hPa"
        beta = cl.get("beta")
        beta_text = ", ".join(f"{channel_label(c)} {b:.2f}" for c, b in beta.items()) if beta else "–"
        ext = _f(cl['extinction_optical_depth'], '.2f')
        if cl["status"] == "opaque" and ext != "–":
            ext = f"≥ {ext} (lower bound)"
        out += ["", f"**Cloud retrieval** · status **{cl['status'].replace('_', ' ')}** — {cl['status_words']}", "",
                "| quantity | value |", "|---|---|",
                f"| optical depth (absorption) | {tau_text} |",
                f"| extinction optical depth | {ext} |",
                f"| top pressure | {top_text} |",
                f"| top temperature | {_f(cl['top_temperature'], '.1f')} K |",
                f"| phase | {cl['phase_words']} |",
                f"| absorption ratio β = τ/τ(reference), from the phase's optics | {beta_text} |"]
        for ch, e in cl["emissivity"].items():
            value = _f(e, '.3f')
            if e is not None and np.isfinite(e) and not -0.02 <= e <= 1.02:  # beyond a plausible noise
                # the raw radiance ratio; outside [0, 1] the single-layer model does not hold for
                # this channel (noise, a second layer, or other optics at 3.9 µm) — as exported
                value = f"{min(max(e, 0.0), 1.0):.3f} (ratio {e:.3f}: outside the single-layer model)"
            elif e is not None and np.isfinite(e):
                value = _f(min(max(e, 0.0), 1.0), '.3f')
            out.append(f"| emissivity {channel_label(ch)} | {value} |")
        if info["class"] == "clear":
            out.append("\n<span class='cs-muted'>Clear pixel: no cloud retrieval; the curve below shows what a "
                       "grey cloud at the reference top would do.</span>")
        out += self._budget_lines(pixel)
        return "\n".join(out)

    def _budget_lines(self, pixel):
        """The clear-sky error budget of the pixel: what each background error does to each channel."""
        try:
            budget = self.model.session.error_budget(*pixel)
        except Exception as exc:  # noqa: BLE001 — shown in the page, never a traceback
            self.notices.report(exc, "computing the clear-sky error budget")
            return []
        if budget is None:
            return []
        chans = list(budget["channels"])
        lines = ["", "**Clear-sky error budget** (1 σ, K; background errors per surface from the configuration; "
                 "this pixel simulated at its own state — the tests use the same budget evaluated at the centre "
                 "of the pixel's bin of background state, the last row; the two differ by a few per cent)", "",
                 "| source (σ) | " + " | ".join(channel_label(c) for c in chans) + " |",
                 "|---|" + "---|" * len(chans)]
        for key, (label, sigma, unit) in budget["components"].items():
            cells = [f"{budget['channels'][c]['contribution'][key]:.2f}" for c in chans]
            if "(relative)" in label:
                label, size = label.replace(" (relative)", ""), f"{100 * sigma:g} %"
            else:
                size = f"{sigma:g}" + ("" if unit == "1" else f" {unit}")
            lines.append(f"| {label} ({size}) | " + " | ".join(cells) + " |")
        lines.append("| instrument noise | " + " | ".join(f"{budget['channels'][c]['noise']:.2f}" for c in chans)
                     + " |")
        lines.append("| **total** | " + " | ".join(f"**{budget['channels'][c]['total']:.2f}**" for c in chans) + " |")
        screening = budget.get("screening", {})
        if screening:
            lines.append("| tests' σ (at the pixel's bin) | "
                         + " | ".join(f"{screening[c]:.2f}" if c in screening else "–" for c in chans) + " |")
        for key, sigma in budget.get("differences", {}).items():
            a, b = key.split("-")
            used = f"; the tests used {screening[key]:.2f} K" if key in screening else ""
            lines.append(f"\n{channel_label(a)} − {channel_label(b)} difference: σ {sigma:.2f} K (errors common "
                         f"to both channels cancel{used}).")
        return lines

    def curve(self, pixel=None, version=None):
        tau_dim = hv.Dimension("tau", label="cloud optical depth (absorption)")
        bt_dim = hv.Dimension("bt", label="brightness temperature", unit="K")
        empty = hv.Curve([], kdims=[tau_dim], vdims=[bt_dim]).opts(frame_width=280, frame_height=220, logx=True)
        if pixel is None:
            return empty
        try:
            curve = self.model.optical_depth_curve(*pixel)
        except Exception as exc:  # noqa: BLE001
            self.notices.report(exc, "drawing the optical-depth curve")
            return empty
        if curve is None:
            return empty.opts(title="no curve: pixel without data")
        tau = np.asarray(curve["tau"], float)
        keep = tau > 0
        layers = []
        for k, (ch, bt) in enumerate(curve["model"].items()):
            col = channel_colour(ch, k)
            layers.append(hv.Curve((tau[keep], np.asarray(bt, float)[keep]), kdims=[tau_dim], vdims=[bt_dim],
                                   label=f"model {channel_label(ch)}").opts(color=col, line_width=2))
            obs = curve["observed"].get(ch)
            if obs is not None:
                layers.append(hv.HLine(obs).opts(color=col, line_dash="dashed", line_width=1.2))
        return hv.Overlay(layers).opts(
            title=f"{_CURVE_PHASE.get(curve.get('phase'), 'Grey')} cloud at {curve['top_pressure']:.0f} hPa: "
                  "BT vs optical depth",
            frame_width=280, frame_height=220, logx=True, legend_position="bottom", legend_cols=2, show_grid=True,
            fontscale=0.85, toolbar=None, legend_opts={"background_fill_alpha": 0.7, "label_text_font_size": "10px"})
