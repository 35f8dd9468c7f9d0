"""Diagnostic plots of the screening: departure histogram, split-window scatter, bias fit,
and a short scene summary. Each redraws when the model's result changes."""
import html

from bokeh.models import NumeralTickFormatter
import holoviews as hv
import numpy as np
import panel as pn
from panel.viewable import Viewer

from cloudsieve import codes as pl
from cloudsieve.registry import REGISTRY, bit_table

from .style import CLASS_COLOURS, INK, SURFACE_LABELS, channel_colour, channel_label, plain_words, test_label

MAX_POINTS = 20_000
_DARK = "#454c5a"


def window_channel(model):
    """The channel the cold-departure test uses (the configured one, else a fallback)."""
    want = model.config["tests"]["cold_departure"]["channel"]
    chans = model.sim.channels
    return want if want in chans else next((c for c in ("11um", "12um", "8p6um") if c in chans), chans[0])


def _subsample(n, k, seed=0):
    if n <= k:
        return np.arange(n)
    return np.sort(np.random.default_rng(seed).choice(n, k, replace=False))


def _median_threshold(thr, valid):
    return float(np.nanmedian(np.broadcast_to(np.asarray(thr, float), valid.shape)[valid]))


class _ModelPlot(Viewer):
    """A HoloViews plot of the model, redrawn by ``plot`` whenever the results change."""

    def __init__(self, model, **params):
        super().__init__(**params)
        self.model = model
        self._pane = pn.pane.HoloViews(hv.DynamicMap(pn.bind(self.plot, version=model.param.version)))

    def __panel__(self):
        return self._pane


class DepartureHistogram(_ModelPlot):
    """Window-channel departures, or one test's margins, of one surface type stacked by class, with
    that surface's thresholds as lines (a scene's surfaces have their own thresholds); counts linear
    or log."""

    def __init__(self, model, **params):
        Viewer.__init__(self, **params)
        self.model = model
        ds = model.scene.data
        valid = ds["valid"].values
        codes, counts = np.unique(ds["surface"].values[valid], return_counts=True)
        present = [pl.SURFACES[int(c)] for c in codes[np.argsort(-counts)]] or [pl.SURFACES[0]]
        self.surface = pn.widgets.RadioButtonGroup(options={SURFACE_LABELS[s]: s for s in present}, value=present[0],
                                                   color="primary", variant="outline",
                                                   css_classes=["cs-hist-surface"], margin=(4, 10))
        self.log = pn.widgets.Checkbox(label="log count", value=False, css_classes=["cs-hist-log"], margin=(10, 10))
        quantities = {f"departure, {channel_label(window_channel(model))}": "departure"}
        quantities.update({f"margin of {test_label(t)}": t for t in REGISTRY if t in model.result.margins})
        self.quantity = pn.widgets.Select(options=quantities, value="departure", width=260,
                                          css_classes=["cs-hist-quantity"], margin=(4, 10))
        # a new plot for every change (not a DynamicMap): its axis ranges and log scale follow the
        # quantity, the surface and the log switch
        self._pane = pn.pane.HoloViews(pn.bind(self.plot, version=model.param.version, surface=self.surface,
                                               log=self.log, quantity=self.quantity))

    def __panel__(self):
        return pn.Column(pn.Row(self.quantity, self.surface, self.log), self._pane)

    def plot(self, version=None, surface=None, log=False, quantity="departure"):
        if quantity and quantity != "departure":
            return self.plot_margin(quantity, surface, log)
        m = self.model
        res = m.result
        ch = window_channel(m)
        ds = m.scene.data
        surface = surface or self.surface.value
        on = ds["valid"].values & (ds["surface"].values == pl.SURFACES.index(surface))
        d = res.departure[ch]
        ok = on & np.isfinite(d)
        vals, cls = d[ok], res.mask[ok]
        lines = []
        if on.any() and "cold_departure" in res.thresholds:
            lines.append((_median_threshold(res.thresholds["cold_departure"], on), "cold (−k·σ, median)", "dashed"))
        if on.any() and "warm_departure" in res.thresholds:
            lines.append((_median_threshold(res.thresholds["warm_departure"], on), "warm", "dotted"))
        # the range around the thresholds, where tuning matters; the tails pile up in the end bins
        cuts = [v for v, _, _ in lines] or [0.0]
        lo = min(min(cuts) - 6.0, -8.0)
        hi = max(max(cuts) + 3.0, 4.0)
        kdim = hv.Dimension("dep", label=f"departure observed − clear, {channel_label(ch)}", unit="K")
        title = (f"Window-channel departures by class · {SURFACE_LABELS[surface].lower()}, "
                 f"{int(on.sum()):,} pixels")
        return self._stacked(vals, cls, lines, lo, hi, kdim, title, log)

    def plot_margin(self, test, surface=None, log=False):
        """One test's margins [K] (> 0: fired, the threshold at 0 for every pixel) on one surface, and
        where the marginal band begins for that surface (its median threshold × the marginal fraction)."""
        m = self.model
        res = m.result
        ds = m.scene.data
        surface = surface or self.surface.value
        on = ds["valid"].values & (ds["surface"].values == pl.SURFACES.index(surface))
        if test not in res.margins:  # switched off, or cannot run on this scene
            return hv.Text(0, 0, f"{test_label(test)} does not run at the current settings").opts(
                frame_width=520, frame_height=260, xaxis=None, yaxis=None, toolbar=None)
        margin = np.asarray(res.margins[test], float)
        ok = on & np.isfinite(margin)
        vals, cls = margin[ok], res.mask[ok]
        lines = [(0.0, "threshold", "dashed")]
        if REGISTRY[test].makes_cloud and ok.any():
            band = -m.marginal_fraction * abs(_median_threshold(res.thresholds[test], ok))
            lines.append((band, "marginal from (median)", "dotted"))
        lo, hi = -8.0, 4.0
        if vals.size:  # the bulk of the margins, with the threshold in view
            a, b = np.percentile(vals, [1, 99])
            lo, hi = min(float(a), -1.0), max(float(b), 1.0)
            pad = 0.05 * (hi - lo)
            lo, hi = lo - pad, hi + pad
        kdim = hv.Dimension("margin", label=f"margin of {test_label(test)} (> 0: fired)", unit="K")
        title = f"{test_label(test)} margins by class · {SURFACE_LABELS[surface].lower()}, {int(ok.sum()):,} px"
        return self._stacked(vals, cls, lines, lo, hi, kdim, title, log)

    @staticmethod
    def _stacked(vals, cls, lines, lo, hi, kdim, title, log):
        """A histogram of vals stacked by class, with labelled vertical lines (value, text, dash)."""
        edges = np.linspace(lo, hi, 91)
        stack = np.zeros(edges.size - 1)
        parts = []
        for code, name in ((pl.CLEAR, "clear"), (pl.MARGINAL, "marginal"), (pl.CLOUD, "cloud")):
            counts, _ = np.histogram(np.clip(vals[cls == code], lo, hi), edges)
            stack = stack + counts
            parts.append((name, stack.copy()))
        vdim = hv.Dimension("n", label="pixels")
        floor = 0.8 if log else 0.0  # a log axis needs a bottom above 0
        layers = [hv.Histogram((edges, np.maximum(top, floor)), kdims=[kdim], vdims=[vdim], label=name)
                  .opts(color=CLASS_COLOURS[name], line_color="#4a5560", line_width=0.5)
                  for name, top in reversed(parts)]  # tallest first, so each class shows as its band
        inner = stack[1:-1]  # the end bins gather the tails and may tower over the rest
        ymax = float(inner.max()) if inner.size and inner.max() > 0 else max(float(stack.max()), 1.0)
        if log:
            ymax = max(float(stack.max()), 1.0)
        for k, (v, text, dash) in enumerate(lines):
            y_text = ymax * (10 ** (0.3 - 0.25 * k) if log else 1.08 - 0.09 * k)
            layers.append(hv.VLine(v).opts(color=INK, line_dash=dash, line_width=1.6))
            layers.append(hv.Text(v, y_text, f" {text}: {v:+.2f} K", fontsize=9, halign="left",
                                  valign="center").opts(text_color=INK))
        outside = int(((vals < lo) | (vals > hi)).sum())
        return hv.Overlay(layers).opts(
            title=f"{title} · {outside:,} in the end bins",
            frame_width=520, frame_height=260, legend_position="right",
            ylim=(floor, ymax * (4.0 if log else 1.15)), xlim=(lo, hi), logy=bool(log),
            yformatter=NumeralTickFormatter(format="0,0"), show_grid=True, toolbar="above", active_tools=["pan"],
            fontscale=0.9)


class SplitWindowScatter(_ModelPlot):
    """BT11 against BT11 − BT12 (or the two window channels present), coloured by class."""

    def _pair(self):
        chans = self.model.sim.channels
        if "11um" in chans and "12um" in chans:
            return "11um", "12um"
        window = [c for c in chans if c != "3p9um"]
        return (window[0], window[1]) if len(window) >= 2 else (chans[0], None)

    def plot(self, version=None):
        m = self.model
        ds = m.scene.data
        a, b = self._pair()
        valid = ds["valid"].values.ravel()
        ta = ds[f"bt_{a}"].values.ravel()
        tb = ds[f"bt_{b}"].values.ravel() if b else np.zeros_like(ta)
        mask = m.result.mask.ravel()
        idx = np.flatnonzero(valid & np.isfinite(ta) & np.isfinite(tb))
        idx = idx[_subsample(idx.size, MAX_POINTS)]
        xd = hv.Dimension("bt_a", label=f"BT {channel_label(a)}", unit="K")
        yd = hv.Dimension("diff", label=f"BT {channel_label(a)} − BT {channel_label(b)}" if b else "0", unit="K")
        layers = []
        for code, name in ((pl.CLOUD, "cloud"), (pl.MARGINAL, "marginal"), (pl.CLEAR, "clear")):
            sel = idx[mask[idx] == code]
            layers.append(hv.Points((ta[sel], ta[sel] - tb[sel]), kdims=[xd, yd], label=name)
                          .opts(color=CLASS_COLOURS[name], size=2.5, alpha=0.7))
        shown = f"{idx.size:,} pixels" + (" (random sample)" if valid.sum() > MAX_POINTS else "")
        return hv.Overlay(layers).opts(
            title=f"Split window by class · {shown}", frame_width=420, frame_height=260, bgcolor=_DARK,
            legend_position="top_left", show_grid=False, toolbar="above", active_tools=["pan"])


class _PlotWithTable(_ModelPlot):
    """A model plot with a Markdown table (``table``) below it, both redrawn with the results."""

    table_css = "cs-table"

    def __init__(self, model, **params):
        super().__init__(model, **params)
        self._table = pn.pane.Markdown(pn.bind(self.table, version=model.param.version), width=520,
                                       css_classes=[self.table_css])

    def __panel__(self):
        return pn.Column(self._pane, self._table)


class BiasFitPlot(_PlotWithTable):
    """Departure against slant water-vapour path W·secθ over clear pixels, with each fit line."""

    table_css = "cs-bias-table"

    def plot(self, version=None):
        m = self.model
        ds = m.scene.data
        res = m.result
        use = (ds["valid"].values & (res.mask == pl.CLEAR) & ((res.bits & bit_table()["warm_departure"]) == 0)).ravel()
        x_all = m.sim.slant_path.ravel()
        idx = np.flatnonzero(use & np.isfinite(x_all))
        idx = idx[_subsample(idx.size, 4000, seed=1)]
        xd = hv.Dimension("path", label="slant water-vapour path W·secθ", unit="kg m⁻²")
        yd = hv.Dimension("dep", label="observed − clear", unit="K")
        layers = []
        xs = np.array([np.nanmin(x_all), np.nanmax(x_all)]) if np.isfinite(x_all).any() else np.array([0.0, 1.0])
        for k, ch in enumerate(m.sim.channels):
            raw = (ds[f"bt_{ch}"].values - m.sim.bt_clear[k]).ravel()
            col = channel_colour(ch, k)
            layers.append(hv.Points((x_all[idx], raw[idx]), kdims=[xd, yd], label=channel_label(ch))
                          .opts(color=col, size=2, alpha=0.35))
            fit = res.bias.get(ch, {})
            if np.isfinite(fit.get("a", np.nan)) and np.isfinite(fit.get("b", np.nan)):
                layers.append(hv.Curve((xs, fit["a"] + fit["b"] * xs), kdims=[xd], vdims=[yd],
                                       label=channel_label(ch)).opts(color=col, line_width=2.5))
        if len(layers) == 0:
            layers.append(hv.Points([], kdims=[xd, yd]))
        return hv.Overlay(layers).opts(
            title=f"Clear-sky bias fit · {idx.size:,} clear pixels shown", frame_width=520, frame_height=260,
            legend_position="right", show_grid=True, toolbar="above", active_tools=["pan"], legend_limit=20)

    def table(self, version=None):
        rows = ["| channel | surface | a [K] | b [K per kg m⁻²] | pixels | rms [K] | removed |",
                "|---|---|---|---|---|---|---|"]
        f = (lambda v, fmt: format(v, fmt) if np.isfinite(v) else "–")  # noqa: E731
        for ch, b in self.model.result.bias.items():
            removed = "yes" if b.get("applied") else "no"
            lines = [("all", b)] + list(b.get("surfaces", {}).items())
            for name, line in lines:
                rows.append(f"| {channel_label(ch)} | {name} | {f(line['a'], '+.3f')} | {f(line['b'], '+.4f')} | "
                            f"{line['n']:,} | {f(line['rms'], '.3f')} | {removed} |")
        return ("\n".join(rows) + "\n\nWhen removed, each pixel takes its surface type's line (the line of all "
                "surfaces where its type has too few clear pixels).")


class SceneSummary(Viewer):
    """Counts, skipped tests, notes and the validation report of the scene."""

    def __init__(self, model, **params):
        super().__init__(**params)
        self.model = model
        self._md = pn.pane.Markdown(pn.bind(self.text, version=model.param.version), sizing_mode="stretch_width",
                                    css_classes=["cs-summary"])

    def __panel__(self):
        return self._md

    def text(self, version=None):
        m = self.model
        s = m.summary()
        lines = [f"### Scene {html.escape(s['scene'])}",
                 f"{s['pixels']:,} pixels · clear **{100 * s['clear']:.1f} %** · marginal "
                 f"**{100 * s['marginal']:.1f} %** · cloud **{100 * s['cloud']:.1f} %** · no_data "
                 f"**{100 * s['no_data']:.1f} %**", ""]
        sources = ", ".join(f"{channel_label(c)}: {v}" for c, v in m.sim.source.items())
        lines.append(f"Clear-sky brightness temperatures: {sources}. Simulation took "
                     f"{m.timings.get('simulate_s', float('nan')):.1f} s; the last rescreen "
                     f"{1000 * m.timings.get('screen_s', float('nan')):.0f} ms.")
        lines.append("")
        lines.append("**Tests not applied**" if s["skipped_tests"] else "**All tests applied.**")
        for t, why in s["skipped_tests"].items():
            lines.append(f"- {test_label(t)}: {plain_words(why)}")
        lines.append("")
        if s["notes"]:
            lines.append("**Notes**")
            lines += [f"- {plain_words(n)}" for n in s["notes"]]
            lines.append("")
        edits = m.edit_listing()
        lines.append(f"**Analyst edits in force:** {len(edits)}")
        lines.append("")
        lines.append("**Validation report**")
        lines.append('<pre style="white-space:pre-wrap;background:#f4f6f8;color:#1f2933;padding:8px;'
                     'border-radius:4px;font-size:12px">' + html.escape(plain_words(m.scene.report.text())) + "</pre>")
        return "\n".join(lines)


class Diagnostics(Viewer):
    """All diagnostics of one model, laid out for the Diagnostics tab."""

    def __init__(self, model, **params):
        super().__init__(**params)
        # a flex box: on a laptop-width window the plots wrap onto more rows instead of being
        # cut off at the right edge
        self._layout = pn.FlexBox(
            DepartureHistogram(model), SplitWindowScatter(model), BiasFitPlot(model), SigmaCalibration(model),
            pn.Column(SceneSummary(model), width=520),
            flex_wrap="wrap", align_items="flex-start", sizing_mode="stretch_width")

    def __panel__(self):
        return self._layout


class SigmaCalibration(_PlotWithTable):
    """Clear pixels' departures over their σ, per surface, against a unit normal; σ proposed
    from the scene (shown, never applied by itself)."""

    table_css = "cs-calibration"
    _cached = (None, None)  # (model version, calibration)

    def _calibration(self):
        """The session's calibration, computed once per result (the plot and the table share it)."""
        from cloudsieve.calibration import session_calibration

        if self._cached[0] != self.model.version:
            self._cached = (self.model.version, session_calibration(self.model.session))
        return self._cached[1]

    def plot(self, version=None):
        from scipy import stats

        from cloudsieve.calibration import Z_EDGES

        ch, cal = self._calibration()
        zd = hv.Dimension("z", label=f"(observed − clear − bias line) / σ, {channel_label(ch)}", unit="1")
        yd = hv.Dimension("density", label="probability density")
        grid = np.linspace(Z_EDGES[0], Z_EDGES[-1], 241)
        layers = [hv.Curve((grid, stats.norm.pdf(grid)), kdims=[zd], vdims=[yd], label="unit normal")
                  .opts(color="#f4f6f8", line_dash="dashed", line_width=2)]
        colours = {"sea": "#56B4E9", "land": "#E69F00", "ice": "#F0E442"}
        for name, c in cal.items():
            layers.append(hv.Histogram((Z_EDGES, c.z_density), kdims=[zd], vdims=[yd],
                                       label=f"{name} (spread {c.z_spread:.2f})")
                          .opts(fill_alpha=0.0, line_color=colours[name], line_width=2))
        return hv.Overlay(layers).opts(
            title="Clear pixels against their σ (a right σ gives the unit normal)", frame_width=520,
            frame_height=240, bgcolor=_DARK, legend_position="right", toolbar="above", show_grid=False)

    def table(self, version=None):
        from cloudsieve.calibration import proposal_toml

        ch, cal = self._calibration()
        if not cal:
            return "Too few clear pixels on any surface to judge the clear-sky σ."
        rows = ["| surface | clear pixels | bias a [K] | b [K per kg m⁻²] | spread of dep./σ | background errors "
                "× fitted factor | neighbour spread | background noise × factor |", "|---|---|---|---|---|---|---|---|"]
        f = (lambda v, fmt: format(v, fmt) if np.isfinite(v) else "–")  # noqa: E731
        for name, c in cal.items():
            rows.append(f"| {name} | {c.pixels:,} | {f(c.bias_a, '+.2f')} | {f(c.bias_b, '+.4f')} | "
                        f"**{c.z_spread:.2f}** | × {c.factor:.2f} | **{f(c.pixel_spread, '.2f')}** | "
                        f"× {f(c.pixel_factor, '.2f')} |")
        return ("\n".join(rows) + "\n\nThe neighbour spread compares differences of adjacent pixels (the smooth "
                "errors cancel) with the pixel-to-pixel σ the texture test allows for. "
                "A spread above 1: the background is worse than the configuration assumes "
                "(false alarms follow); below 1: the cold test could be sharper. σ fitted to this scene's clear "
                "pixels, **not applied** — to use it, put this in a configuration file (`--config`):\n\n"
                "```toml\n" + proposal_toml(cal, self.model.config) + "```")
