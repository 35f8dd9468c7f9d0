"""The eight linked maps of a screened scene.

Observed and clear-sky brightness temperature and their departure (for the chosen channel),
the class mask, cloud optical depth and cloud-top pressure, the clear-sky uncertainty σ of the
channel and the departure in units of it (what the cold-departure test thresholds). All share the axes x =
column and y = row of the scene grid (row 0 at the top), so pan and zoom move them together.
A click on any map picks the pixel for the inspector; the box and lasso tools select pixels
for QA edits. Grids of a million pixels or more are rasterized with datashader; their
values under the cursor are then read from the source arrays into a readout line.
"""
import colorcet
import holoviews as hv
import numpy as np
import panel as pn
from bokeh.models import CustomJSHover, FixedTicker, Range1d
from panel.viewable import Viewer
from scipy import ndimage

from cloudsieve import codes as pl
from cloudsieve.invert import PHASE_NAMES
from cloudsieve.registry import REGISTRY, bit_table
from cloudsieve.screen import edits_grid
from cloudsieve.truth import COMPARISON_NAMES, comparison
from physics.cloud import (STATUS_BEYOND_OPAQUE, STATUS_ILL_CONDITIONED, STATUS_INVERTED, STATUS_NAMES,
                           STATUS_NOT_CLOUDY, STATUS_OPAQUE, STATUS_TOP_ASSUMED, STATUS_WARMER_THAN_CLEAR)
from .style import (CLASS_COLOURS, CLOUD_CATEGORY_COLOURS, EDIT_OUTLINE, SELECTION_LINE, TRUTH_COLOURS,
                    channel_label, cloud_legend_html, swatch_legend_html, why_colours)

XDIM = hv.Dimension("x", label="column")
YDIM = hv.Dimension("y", label="row")
NAN_COLOUR = "#eef0f2"
RASTERIZE_ABOVE = 1_000_000  # pixels

# colour maps as explicit colorcet palettes (hex lists): HoloViews resolves a "cet_…" name
# only where matplotlib is installed, which the dashboard does not need
BT_CMAP = list(colorcet.palette["CET_L12"])          # light = cold, the way infrared imagery shows cloud
DEPARTURE_CMAP = list(colorcet.palette["CET_D1A"])   # blue (colder than clear) – white – red (warmer)
# optical depth: from light orange (τ ≈ 0.05, visible against the pale "no cloud" grey) to dark blue;
# opaque pixels (τ a lower bound) are drawn in near-black over it
TAU_CMAP = list(colorcet.palette["CET_L17"])[64:]
PTOP_CMAP = list(colorcet.palette["CET_L8"])[::-1]  # high (low-pressure) tops in the brightest colour
SIGMA_CMAP = list(colorcet.palette["CET_L20"])
# a test's margin: blue (short of its threshold) – white (at it) – orange-red (fired)
MARGIN_CMAP = list(colorcet.palette["CET_D1A"])
#: colour range of the departure in units of σ (the tests fire at about −3)
Z_CLIM = (-6.0, 6.0)
#: colour of the cloud class's outline on the temperature maps (ours: the palettes' complement)
MASK_OUTLINE = "#ff9f1c"
#: default colour range of the departure maps, ± [K] (a range control changes it)
DEPARTURE_RANGE = 5.0

_OUTLINE_OPTS = dict(cmap=["#00000000", EDIT_OUTLINE], clim=(0, 1), colorbar=False, tools=[],
                     clipping_colors={"NaN": "#00000000"})
_READOUT_HINT = ("<span class='cs-muted'>Large scene: the maps are rasterized; move the pointer over a map to "
                 "read the values of the pixel under it here.</span>")
_CLASS_JS = "return %s[Math.round(value)] || '';" % list(pl.CLASS_NAMES)
#: hover text of a test margin [K]: signed, or "not run" where the test did not apply (NaN)
_MARGIN_JS = "return Number.isFinite(value) ? (value >= 0 ? '+' : '') + value.toFixed(2) + ' K' : 'not run';"
#: hover text of a cloud code (status × 4 + phase), in words
#: hover words of each inversion status (short; the legends and the inspector say more)
_HOVER_STATUS = {"inverted": "retrieved", "opaque": "opaque (τ ≥ the value shown)",
                 "beyond_opaque": "beyond opaque (no τ)", "warmer_than_clear": "warmer than clear (nothing to invert)",
                 "ill_conditioned": "no cloud signal to invert", "not_cloudy": "no cloud",
                 "top_assumed": "top assumed (τ at that top)"}
#: hover text of a cloud code (status × 4 + phase; −1: no cloud), in words
_CLOUD_JS = ("if (!(value >= 0)) return 'no cloud (screened clear)'; const s = Math.floor(value / 4), "
             "p = Math.round(value - 4 * s); const st = %s[s] || ''; const ph = %s[p] || ''; "
             "return ph && ph !== 'none' ? st + ' · ' + ph : st;"
             % ([_HOVER_STATUS[n] for n in STATUS_NAMES], list(PHASE_NAMES)))
#: categories drawn over the optical-depth and top maps: (map, category) -> statuses
_TAU_CATEGORIES = (("opaque", (STATUS_OPAQUE,)), ("beyond_opaque", (STATUS_BEYOND_OPAQUE,)),
                   ("not_retrieved", (STATUS_WARMER_THAN_CLEAR, STATUS_ILL_CONDITIONED)))
_TOP_CATEGORIES = (("top_assumed", (STATUS_TOP_ASSUMED,)), ("beyond_opaque", (STATUS_BEYOND_OPAQUE,)),
                   ("not_retrieved", (STATUS_WARMER_THAN_CLEAR, STATUS_ILL_CONDITIONED)))


#: colour ranges of larger grids come from an even sample of this many pixels per array
RANGE_SAMPLE = 1_000_000


def _robust_range(arrays, lo=1.0, hi=99.0, pad=0.0):
    """Percentile range over the arrays; above RANGE_SAMPLE pixels over an evenly strided
    sample (a 4000 × 4000 scene would otherwise copy every channel in float64 to set colours)."""
    def sample(a):
        flat = np.asarray(a).reshape(-1)
        step = max(1, flat.size // RANGE_SAMPLE)
        return flat[::step].astype(float)

    vals = np.concatenate([sample(a) for a in arrays])
    vals = vals[np.isfinite(vals)]
    if vals.size == 0:
        return 0.0, 1.0
    a, b = np.percentile(vals, [lo, hi])
    if b <= a:
        a, b = a - 0.5, b + 0.5
    return float(a - pad), float(b + pad)


#: the maps an analyst can show (key -> name in the chooser), in page order
MAPS = {"observed": "observed", "clear": "clear sky", "departure": "departure", "class": "class",
        "why": "why flagged", "margin": "test margin", "tau": "optical depth", "top": "cloud top",
        "sigma": "σ", "z": "departure / σ", "truth": "vs truth"}
#: the maps shown when a scene opens (the others are a click away in the chooser)
DEFAULT_MAPS = ("observed", "clear", "departure", "class", "why", "tau", "top", "z")
#: width a map needs beyond its frame: axis, colour bar with its labels, padding [px]
MAP_EXTRA_WIDTH = 190
#: frame widths a map may take [px] (the window decides within these)
FRAME_WIDTH_RANGE = (220, 1100)
#: width assumed for the maps' column before the browser has reported its size [px]
DEFAULT_AVAILABLE_WIDTH = 2 * (250 + MAP_EXTRA_WIDTH)


def frame_size(available, n_maps, shape, height=None):
    """(columns, frame width, frame height) [px] of n_maps maps of a (ny, nx) grid in a column of
    ``available`` px: two columns where each map can still be FRAME_WIDTH_RANGE[0] wide, else one;
    ``height`` (the window's) bounds a lone map's height so that it fits on one screen."""
    ny, nx = shape
    lo, hi = FRAME_WIDTH_RANGE
    ncols = 2 if n_maps > 1 and available / 2 - MAP_EXTRA_WIDTH >= lo else 1
    fw = int(min(hi, max(lo, available / ncols - MAP_EXTRA_WIDTH)))
    if height and n_maps == 1:  # an enlarged map: as wide as the column allows and no taller than the screen
        fw = int(max(lo, min(fw, (height - 260) * nx / ny)))
    fh = max(120, int(round(fw * ny / nx)))
    return ncols, fw, fh


class MapGrid(Viewer):
    """The linked maps of the model's current result (a chosen set, sized to the window)."""

    def __init__(self, model, focus, notices, available_width=DEFAULT_AVAILABLE_WIDTH, window_height=None,
                 **params):
        super().__init__(**params)
        self.model, self.focus, self.notices = model, focus, notices
        ds = model.scene.data
        self._xs = ds["col"].values.astype(float)
        self._ys = ds["row"].values.astype(float)
        ny, nx = ds.sizes["y"], ds.sizes["x"]
        self._shape = (ny, nx)
        self.rasterized = ny * nx >= RASTERIZE_ABOVE
        self._available, self._window_height = available_width, window_height
        sim = model.sim
        # colour ranges are fixed per scene (so retuning never rescales a map), over all channels;
        # observed and clear sky share one range, so one colour is one temperature on both
        obs = _robust_range([ds[f"bt_{c}"].values for c in sim.channels], 0.5, 99.5)
        clr = _robust_range([sim.bt_clear[i] for i in range(len(sim.channels))], 0.5, 99.5)
        self._bt_clim = (min(obs[0], clr[0]), max(obs[1], clr[1]))
        # departures centred on 0, ±DEPARTURE_RANGE K by default (thin cirrus, fog and marginal pixels
        # are a few K): the analyst widens it for the thick cloud's tens of K
        self.departure_range = pn.widgets.FloatInput(
            label="departure and margin colour range ± [K]", value=DEPARTURE_RANGE, start=0.5, end=150.0, step=0.5,
            width=230, css_classes=["cs-departure-range"], margin=(0, 10))
        self.show_mask_outline = pn.widgets.Checkbox(label="outline the cloud class on the temperature maps",
                                                     value=True, css_classes=["cs-mask-outline"], margin=(0, 10, 8, 10))
        self._sigma_clim = (0.0, max(0.5, _robust_range([sim.sigma[c] for c in sim.channels], 0, 99.5)[1]))
        p_surf = ds["p_surf"].values if "p_surf" in ds else np.array([1013.25])
        self._ptop_clim = (100.0, max(1000.0, float(np.nanmax(p_surf)) if np.isfinite(p_surf).any() else 1013.25))
        # one pair of ranges shared by all the figures: pan or zoom one and all follow (and survive a
        # change of the maps shown or of their size)
        self._x_range = Range1d(float(self._xs[0]) - 0.5, float(self._xs[-1]) + 0.5)
        self._y_range = Range1d(float(self._ys[-1]) + 0.5, float(self._ys[0]) - 0.5)  # row 0 at the top
        #: the tests whose margins the class map's hover lists (every registered test, in order)
        self._why_tests = tuple(REGISTRY)
        #: the categories of the "why flagged" map: each cloud test, an analyst edit, the warm flag
        self._why_names = [REGISTRY[t].label for t in self._why_tests if REGISTRY[t].makes_cloud] + [
            "analyst edit"] + [f"{REGISTRY[t].label} (flag only)" for t in self._why_tests
                               if not REGISTRY[t].makes_cloud]
        n_cloud = sum(REGISTRY[t].makes_cloud for t in self._why_tests)
        self._why_colours = why_colours(n_cloud, len(self._why_tests) - n_cloud)
        self._decided = (None, None)  # (version, codes): shared by the class map's hover and the why map
        tests = {REGISTRY[t].label: t for t in self._why_tests}
        self.margin_test = pn.widgets.Select(label="test", options=tests, value=self._why_tests[0], width=220,
                                             css_classes=["cs-margin-test"], margin=(0, 10))
        has_truth = model.session.truth is not None
        options = {name: key for key, name in MAPS.items() if key != "truth" or has_truth}
        self.shown = pn.widgets.CheckBoxGroup(
            label="maps shown", options=options, value=[k for k in DEFAULT_MAPS if k in options.values()],
            inline=True, css_classes=["cs-maps-shown"], margin=(0, 10), sizing_mode="stretch_width",
            stylesheets=[".bk-input-group { flex-wrap: wrap; row-gap: 2px; }"])
        self.enlarge = pn.widgets.Select(label="enlarge one map (fold the left bar ☰ for more room)", options={"— (none)": "", **options}, value="",
                                         width=300, css_classes=["cs-enlarge"], margin=(0, 10))
        self._readout = pn.pane.HTML(_READOUT_HINT, css_classes=["cs-readout"], margin=(0, 10), height=20,
                                     visible=self.rasterized, sizing_mode="stretch_width")
        self._grid = pn.Column(margin=0, css_classes=["cs-map-area"])
        self._layout_key = None
        self._rebuild()
        self.shown.param.watch(lambda *_: self._rebuild(), "value")
        self.enlarge.param.watch(lambda *_: self._rebuild(), "value")

    def __panel__(self):
        hint = pn.pane.HTML(
            '<span class="cs-muted">Drag to pan, scroll to zoom (all maps follow). Click a pixel to inspect '
            'it: it is ringed on every map, and the Pixel inspector beside the maps shows its numbers. For QA '
            'edits pick the box or lasso tool in a map\'s toolbar and drag over the map; the selection is '
            'outlined (dashed) on the class map. Choose the maps shown below, or enlarge one.</span>',
            margin=(0, 10))
        shown = pn.Row(pn.pane.HTML("<b>Maps</b>", margin=(4, 0, 0, 10)), self.shown, sizing_mode="stretch_width")
        controls = pn.FlexBox(self.enlarge, self.departure_range, self.show_mask_outline, flex_wrap="wrap",
                              align_items="flex-end", sizing_mode="stretch_width")
        return pn.Column(hint, shown, controls, self._readout, self._grid, sizing_mode="stretch_width",
                         css_classes=["cs-map-grid"])

    # ------------------------------------------------------------------ layout
    @property
    def keys_shown(self):
        """The keys of the maps on screen, in page order."""
        if self.enlarge.value:
            return [self.enlarge.value]
        return [k for k in MAPS if k in self.shown.value]

    def set_window(self, available_width, window_height=None):
        """The width [px] the maps may fill (and the window's height): redraws them only when their
        size changes."""
        self._available, self._window_height = available_width, window_height
        self._rebuild()

    def _rebuild(self):
        keys = self.keys_shown
        ncols, fw, fh = frame_size(self._available, len(keys), self._shape, self._window_height)
        layout_key = (tuple(keys), ncols, fw // 20)
        if layout_key == self._layout_key:
            return
        self._layout_key = layout_key
        self._fw, self._fh = fw, fh
        self._streams = []
        self._grid[:] = [self._build(keys, ncols)] if keys else [pn.pane.HTML(
            "<span class='cs-muted'>No map chosen: pick one or more above.</span>", margin=10)]

    # ------------------------------------------------------------------ elements
    def _image(self, arr, vdim, _what=None):
        return hv.Image((self._xs, self._ys, np.asarray(arr, dtype=np.float32)), kdims=[XDIM, YDIM], vdims=[vdim])

    def _channel_index(self, channel):
        return self.model.sim.channels.index(channel)

    # titles (shown above each map; they follow the channel and the settings)
    def title_observed(self, channel):
        return f"Observed brightness temperature · {channel_label(channel)}"

    def title_clear(self, channel):
        src = self.model.sim.source.get(channel, "simulated")
        return f"Clear-sky brightness temperature ({src}) · {channel_label(channel)}"

    def title_departure(self, channel, version=None):
        applied = bool(self.model.result.bias.get(channel, {}).get("applied"))
        return f"Departure observed − clear{' (bias removed)' if applied else ''} · {channel_label(channel)}"

    def title_sigma(self, channel):
        return f"σ of the departure (background errors and instrument noise) · {channel_label(channel)}"

    def title_z(self, channel, version=None):
        return f"Departure in units of σ (after the bias removal when on) · {channel_label(channel)}"

    def title_mask(self, version=None):
        return "Screening class"

    def title_tau(self, version=None):
        cl = self.model.result.cloud
        ref = self.model.config["cloud"]["reference_channel"]
        ref = ref if cl is None or ref in cl.channels else cl.channels[0]
        return f"Cloud optical depth (absorption, {channel_label(ref)}; single layer)"

    def title_ptop(self, version=None):
        cl = self.model.result.cloud
        return f"Cloud-top pressure ({cl.method if cl is not None else self.model.cloud_top} top)"

    # images
    def observed(self, channel):
        arr = self.model.scene.data[f"bt_{channel}"].values
        return self._image(arr, hv.Dimension("bt_obs", label="observed BT", unit="K"), "observed")

    def clear_sky(self, channel):
        arr = self.model.sim.bt_clear[self._channel_index(channel)]
        return self._image(arr, hv.Dimension("bt_clear", label="clear-sky BT", unit="K"), "clear sky")

    def departure(self, channel, version=None):
        return self._image(self.model.result.departure[channel],
                           hv.Dimension("departure", label="observed − clear", unit="K"), "departure")

    def sigma(self, channel):
        return self._image(self.model.sim.sigma[channel], hv.Dimension("sigma", label="clear-sky σ", unit="K"), "σ")

    def normalised(self, channel, version=None):
        with np.errstate(invalid="ignore", divide="ignore"):
            z = self.model.result.departure[channel] / self.model.sim.sigma[channel]
        return self._image(z, hv.Dimension("z", label="departure / σ", unit="1"), "departure / σ")

    def deciding_test(self):
        """Per pixel, which test decided the class (float codes for the hover): the index in
        ``self._why_tests`` of the fired cloud test with the largest margin relative to its threshold,
        len(_why_tests) where an analyst edit decided, −1 where no cloud test fired (computed once
        per result version, for the class map's hover and the why map)."""
        version = self.model.version
        if self._decided[0] != version:
            self._decided = (version, self._deciding_test())
        return self._decided[1]

    def _deciding_test(self):
        res = self.model.result
        shape = res.mask.shape
        best = np.full(shape, -np.inf, np.float32)
        code = np.full(shape, -1.0, np.float32)
        for k, t in enumerate(self._why_tests):
            if REGISTRY[t].kind != "cloud" or t not in res.margins:
                continue
            m = np.asarray(res.margins[t], np.float32)
            thr = np.abs(np.asarray(res.thresholds.get(t, 1.0), np.float32))
            with np.errstate(invalid="ignore", divide="ignore"):
                rel = np.where(np.nan_to_num(m, nan=-1.0) > 0, m / np.maximum(thr, 1e-6), -np.inf)
            take = rel > best
            best = np.where(take, rel, best)
            code = np.where(take, np.float32(k), code)
        bits = np.asarray(res.bits)
        edited = (bits & (bit_table()["analyst_clear"] | bit_table()["analyst_cloud"])) != 0
        return np.where(edited, np.float32(len(self._why_tests)), code).astype(np.float32)

    def mask(self, version=None):
        res = self.model.result
        cls = res.mask.astype(np.float32)
        if self.rasterized:
            return self._image(cls, hv.Dimension("class", label="class"), "class")
        nan = np.full(cls.shape, np.nan, np.float32)
        margins = [np.asarray(res.margins[t], np.float32) if t in res.margins else nan for t in self._why_tests]
        return hv.Image((self._xs, self._ys, cls, self.deciding_test(), *margins), kdims=[XDIM, YDIM],
                        vdims=[hv.Dimension("class", label="class"), "decided"]
                        + [f"margin_{t}" for t in self._why_tests])

    def why_codes(self):
        """Per pixel, the index in ``self._why_names`` of what flagged it: the deciding cloud test,
        an analyst edit, or (where no cloud test fired) a flag-only test that fired; NaN for none."""
        decided = self.deciding_test()
        out = np.full(decided.shape, np.nan, np.float32)
        cloud_tests = [t for t in self._why_tests if REGISTRY[t].makes_cloud]
        for k, t in enumerate(cloud_tests):
            out[decided == self._why_tests.index(t)] = k
        out[decided == len(self._why_tests)] = len(cloud_tests)
        margins = self.model.result.margins
        for k, t in enumerate(t for t in self._why_tests if not REGISTRY[t].makes_cloud):
            if t in margins:
                with np.errstate(invalid="ignore"):
                    flag = (np.asarray(margins[t]) > 0) & np.isnan(out)
                out[flag] = len(cloud_tests) + 1 + k
        return out

    def why(self, version=None):
        codes = self.why_codes()
        if self.rasterized:
            return self._image(codes, hv.Dimension("why", label="why flagged"))
        return hv.Image((self._xs, self._ys, codes, np.nan_to_num(codes, nan=-1.0)), kdims=[XDIM, YDIM],
                        vdims=[hv.Dimension("why", label="why flagged"), "whycode"])

    def margin(self, test, version=None):
        res = self.model.result
        arr = res.margins.get(test, np.full(res.mask.shape, np.nan))
        return self._image(arr, hv.Dimension("margin", label="margin", unit="K"))

    def truth(self, version=None):
        truth = self.model.session.truth
        codes = (comparison(self.model.result.mask, truth) if truth is not None
                 else np.full(self.model.result.mask.shape, np.nan, np.float32))
        if self.rasterized:
            return self._image(codes, hv.Dimension("truth", label="vs truth"))
        return hv.Image((self._xs, self._ys, codes, np.nan_to_num(codes, nan=-1.0)), kdims=[XDIM, YDIM],
                        vdims=[hv.Dimension("truth", label="vs truth"), "truthcode"])

    def title_why(self, version=None):
        return "Why flagged: the test that decided (largest margin against its threshold)"

    def title_margin(self, test, version=None):
        t = REGISTRY[test]
        return f"Margin of the {t.label} test (> 0: fired; threshold per surface type)"

    def title_truth(self, version=None):
        truth = self.model.session.truth
        return f"Mask against the truth ({truth.path.name if truth is not None else 'none'})"

    def _cloud_code(self):
        """status × 4 + phase per pixel (−1 where no cloud was inverted): the hover's words."""
        cl = self.model.result.cloud
        code = cl.status.astype(np.float32) * 4 + cl.phase
        return np.where(cl.status == STATUS_NOT_CLOUDY, -1.0, code).astype(np.float32)  # finite: hover words

    def _cloud_image(self, arr, vdim):
        """The value map with the cloud code as a second value (hover), single-valued when rasterized."""
        arr = np.asarray(arr, dtype=np.float32)
        if self.rasterized or self.model.result.cloud is None:
            return self._image(arr, vdim)
        return hv.Image((self._xs, self._ys, arr, self._cloud_code()), kdims=[XDIM, YDIM],
                        vdims=[vdim, hv.Dimension("code", label="cloud")])

    def optical_depth(self, version=None):
        cl = self.model.result.cloud
        arr = cl.optical_depth if cl is not None else np.full(self.model.result.mask.shape, np.nan)
        arr = np.where(np.isfinite(arr), np.clip(arr, 0.01, None), np.nan)
        return self._cloud_image(arr, hv.Dimension("tau", label="optical depth", unit="1"))

    def top_pressure(self, version=None):
        cl = self.model.result.cloud
        if cl is None:
            arr = np.full(self.model.result.mask.shape, np.nan)
        else:  # tops the channels did not fix are drawn as their category over it (the hover keeps the value)
            arr = np.where(np.isin(cl.status, (STATUS_INVERTED, STATUS_OPAQUE, STATUS_TOP_ASSUMED,
                                               STATUS_BEYOND_OPAQUE)), cl.top_pressure, np.nan)
        return self._cloud_image(arr, hv.Dimension("p_top", label="cloud-top pressure", unit="hPa"))

    def _categories(self, table):
        cl = self.model.result.cloud
        out = np.full(self.model.result.mask.shape, np.nan, np.float32)
        if cl is not None:
            for k, (_, statuses) in enumerate(table):
                out[np.isin(cl.status, statuses)] = k
        return hv.Image((self._xs, self._ys, out), kdims=[XDIM, YDIM], vdims=["category"])

    def tau_categories(self, version=None):
        return self._categories(_TAU_CATEGORIES)

    def top_categories(self, version=None):
        return self._categories(_TOP_CATEGORIES)

    @staticmethod
    def _category_opts(table):
        return dict(cmap=[CLOUD_CATEGORY_COLOURS[name] for name, _ in table], clim=(-0.5, len(table) - 0.5),
                    color_levels=len(table), colorbar=False, tools=[], clipping_colors={"NaN": "#00000000"})

    def edit_outline(self, version=None):
        edits = self.model.journal.active() if self.model.journal is not None else []
        codes = edits_grid(self.model.result.mask.shape, edits) != 0
        rim = codes & ~ndimage.binary_erosion(codes, border_value=0)
        return hv.Image((self._xs, self._ys, rim.astype(np.float32)), kdims=[XDIM, YDIM],
                        vdims=["edited"]).opts(**_OUTLINE_OPTS)

    def inspected_marker(self, pixel=None):
        """A ring around the inspected pixel (white under black, visible on every palette)."""
        pts = [] if pixel is None else [(pixel[1] + self.focus.col0, pixel[0] + self.focus.row0)]
        ring = dict(marker="circle", fill_alpha=0, tools=[], nonselection_alpha=1)
        return (hv.Points(pts, kdims=[XDIM, YDIM]).opts(size=15, line_color="white", line_width=4, **ring)
                * hv.Points(pts, kdims=[XDIM, YDIM]).opts(size=15, line_color=SELECTION_LINE, line_width=1.5,
                                                           **ring))

    def mask_outline(self, version=None, show=True):
        """The rim of the pixels classed cloud (drawn over the temperature maps when switched on)."""
        cloud = (self.model.result.mask == pl.CLOUD) if show else np.zeros(self.model.result.mask.shape, bool)
        rim = cloud & ~ndimage.binary_erosion(cloud, border_value=0)
        return hv.Image((self._xs, self._ys, np.where(rim, 1.0, np.nan).astype(np.float32)), kdims=[XDIM, YDIM],
                        vdims=["cloud rim"]).opts(cmap=[MASK_OUTLINE], clim=(0, 1), colorbar=False, tools=[],
                                                  clipping_colors={"NaN": "#00000000"})

    def selection_outline(self, outline=None):
        path = hv.Path([outline] if outline else [], kdims=[XDIM, YDIM])
        return path.opts(color=SELECTION_LINE, line_width=1.5, line_dash="dashed", tools=[])

    # ------------------------------------------------------------------ plots
    def _opts(self, vdim_label, fmt, clabel, **extra):
        tools = ["box_select", "lasso_select"]
        opts = dict(frame_width=self._fw, frame_height=self._fh, invert_yaxis=True, colorbar=True, title="",
                    clabel=clabel, xlabel="column", ylabel="row", tools=tools,
                    clipping_colors={"NaN": NAN_COLOUR}, fontscale=0.95, toolbar="above",
                    colorbar_opts={"title_text_font_style": "normal"}, hooks=[self._share_ranges])
        if not self.rasterized:
            opts["tools"] = tools + ["hover"]
            opts["hover_tooltips"] = [("row", "$y{0}"), ("column", "$x{0}"), (vdim_label, fmt)]
        opts.update(extra)
        return opts

    def _decided_js(self):
        names = [REGISTRY[t].label for t in self._why_tests] + ["analyst edit"]
        return "const k = Math.round(value); return k < 0 ? 'no cloud test fired' : (%s[k] || '');" % names

    def _mask_opts(self, vdim_label, fmt, clabel, **extra):
        """Options of the class map: its hover says which test decided and lists every test's margin."""
        opts = self._opts(vdim_label, fmt, clabel, **extra)
        if not self.rasterized:
            opts["hover_tooltips"] = opts["hover_tooltips"] + [("decided by", "@decided{custom}")] + [
                (f"{REGISTRY[t].label} margin", f"@margin_{t}{{custom}}") for t in self._why_tests]
            opts["hover_formatters"] = dict(opts.get("hover_formatters", {}), **{
                f"@{{margin_{t}}}": CustomJSHover(code=_MARGIN_JS) for t in self._why_tests})
        return opts

    def _cloud_opts(self, vdim_label, fmt, clabel, **extra):
        """Options of a cloud-layer map: its hover also names the status and phase in words."""
        opts = self._opts(vdim_label, fmt, clabel, **extra)
        if not self.rasterized:
            opts["hover_tooltips"] = opts["hover_tooltips"] + [("cloud", "@code{custom}")]
            opts["hover_formatters"] = {"@code": CustomJSHover(code=_CLOUD_JS)}
        return opts

    def _share_ranges(self, plot, element):
        fig = plot.state
        fig.output_backend = "canvas"  # images gain nothing from WebGL, which is slow in software rendering
        fig.x_range, fig.y_range = self._x_range, self._y_range
        plot.handles["x_range"], plot.handles["y_range"] = self._x_range, self._y_range

    def _panel_map(self, fn, refs, opts, aggregator="mean", outline=False, overlay=None, dynamic=None,
                   mask_rim=False):
        if self.rasterized:  # datashader (and numba) load only when a scene needs them
            from holoviews.operation.datashader import rasterize
        dmap = hv.DynamicMap(pn.bind(fn, **refs))
        if self.rasterized:
            dmap = rasterize(dmap, aggregator=aggregator, precompute=True)
        dmap = dmap.opts(**opts)
        if dynamic:  # options that follow a widget (the departure colour range)
            dmap = dmap.apply.opts(**dynamic)
        self._attach_streams(dmap)
        layers = dmap
        if mask_rim:  # the cloud mask's outline over a temperature map
            rim = hv.DynamicMap(pn.bind(self.mask_outline, version=self.model.param.version,
                                        show=self.show_mask_outline))
            if self.rasterized:
                rim = rasterize(rim, aggregator="max").opts(cmap=[MASK_OUTLINE], clim=(0, 1), colorbar=False,
                                                            clipping_colors={"NaN": "#00000000"})
            layers = layers * rim
        if overlay is not None:  # categories drawn over the values (cloud maps)
            fn2, opts2 = overlay
            over = hv.DynamicMap(pn.bind(fn2, **refs))
            if self.rasterized:
                over = rasterize(over, aggregator="max")
            layers = layers * over.opts(**opts2)
        if outline:
            rim = hv.DynamicMap(pn.bind(self.edit_outline, version=self.model.param.version))
            if self.rasterized:
                rim = rasterize(rim, aggregator="max").opts(**_OUTLINE_OPTS)
            sel = hv.DynamicMap(pn.bind(self.selection_outline, outline=self.focus.param.outline))
            layers = layers * rim * sel
        return layers * hv.DynamicMap(pn.bind(self.inspected_marker, pixel=self.focus.param.pixel))

    def _categorical_opts(self, label, names, colours, words_js, code_field):
        """Options of a categorical map (why flagged, vs truth): one colour per category, a colour
        bar naming them, hover words."""
        n = len(names)  # the colour bar shows the colours; the legend under the map names them
        opts = self._opts(label, f"@{{{code_field}}}{{custom}}", label, cmap=list(colours), clim=(-0.5, n - 0.5),
                          color_levels=n, colorbar_opts={"ticker": FixedTicker(ticks=list(range(n))),
                                                         "major_label_overrides": {k: "" for k in range(n)},
                                                         "width": 14})
        if not self.rasterized:
            opts["hover_tooltips"] = opts["hover_tooltips"][:2] + [(label, f"@{{{code_field}}}{{custom}}")]
            opts["hover_formatters"] = {f"@{{{code_field}}}": CustomJSHover(code=words_js)}
        return opts

    @staticmethod
    def _cloud_legend(table):
        return cloud_legend_html([name for name, _ in table], NAN_COLOUR)

    def _specs(self):
        """key -> (element function, title function, references, plot options, extras) of every map."""
        m = self.model
        ch, ver = m.param.channel, m.param.version
        class_ticks = dict(enumerate(pl.CLASS_NAMES))
        symmetric = {"dynamic": {"clim": pn.bind(lambda v: (-abs(v or DEPARTURE_RANGE), abs(v or DEPARTURE_RANGE)),
                                                 self.departure_range)}}
        why_js = "const k = Math.round(value); return k < 0 ? 'no test fired' : (%s[k] || '');" % self._why_names
        truth_js = ("const k = Math.round(value); return k < 0 ? 'clear in both, or no data' : (%s[k] || '');"
                    % list(COMPARISON_NAMES))
        return {
            "observed": (self.observed, self.title_observed, {"channel": ch}, self._opts(
                "observed BT", "@image{0.00} K", "observed BT [K]", cmap=BT_CMAP, clim=self._bt_clim),
                {"mask_rim": True}),
            "clear": (self.clear_sky, self.title_clear, {"channel": ch}, self._opts(
                "clear-sky BT", "@image{0.00} K", "clear-sky BT [K]", cmap=BT_CMAP, clim=self._bt_clim),
                {"mask_rim": True}),
            "departure": (self.departure, self.title_departure, {"channel": ch, "version": ver}, self._opts(
                "observed − clear", "@image{+0.00} K", "observed − clear [K]", cmap=DEPARTURE_CMAP,
                symmetric=True), symmetric),
            "class": (self.mask, self.title_mask, {"version": ver}, self._mask_opts(
                "class", "@image{custom}", "class", cmap=list(CLASS_COLOURS.values()), clim=(-0.5, 3.5),
                color_levels=4, hover_formatters={"@image": CustomJSHover(code=_CLASS_JS),
                                                  "@{decided}": CustomJSHover(code=self._decided_js())},
                colorbar_opts={"ticker": FixedTicker(ticks=[0, 1, 2, 3]), "major_label_overrides": class_ticks,
                               "major_label_text_font_size": "11px"}),
                {"aggregator": "first", "outline": True}),
            "why": (self.why, self.title_why, {"version": ver}, self._categorical_opts(
                "why flagged", self._why_names, self._why_colours, why_js, "whycode"),
                {"aggregator": "first", "outline": True,
                 "legend": list(zip(self._why_colours, self._why_names)) + [(NAN_COLOUR, "no test fired")]}),
            "margin": (self.margin, self.title_margin, {"test": self.margin_test, "version": ver}, self._opts(
                "margin", "@image{+0.00} K", "test margin [K]", cmap=MARGIN_CMAP, symmetric=True),
                dict(symmetric, widget=self.margin_test)),
            "tau": (self.optical_depth, self.title_tau, {"version": ver}, self._cloud_opts(
                "optical depth", "@image{0.00}", "optical depth [1]", cmap=TAU_CMAP, logz=True,
                clim=(0.01, 20.0)), {"overlay": (self.tau_categories, self._category_opts(_TAU_CATEGORIES)),
                                     "legend": self._cloud_legend(_TAU_CATEGORIES)}),
            "top": (self.top_pressure, self.title_ptop, {"version": ver}, self._cloud_opts(
                "cloud-top pressure", "@image{0} hPa", "cloud-top pressure [hPa]", cmap=PTOP_CMAP,
                clim=self._ptop_clim), {"overlay": (self.top_categories, self._category_opts(_TOP_CATEGORIES)),
                                        "legend": self._cloud_legend(_TOP_CATEGORIES)}),
            "sigma": (self.sigma, self.title_sigma, {"channel": ch}, self._opts(
                "σ", "@image{0.00} K", "σ of the departure [K]", cmap=SIGMA_CMAP, clim=self._sigma_clim), {}),
            "z": (self.normalised, self.title_z, {"channel": ch, "version": ver}, self._opts(
                "departure / σ", "@image{+0.0}", "departure / σ [1]", cmap=DEPARTURE_CMAP, clim=Z_CLIM,
                symmetric=True), {}),
            "truth": (self.truth, self.title_truth, {"version": ver}, self._categorical_opts(
                "vs truth", list(COMPARISON_NAMES), TRUTH_COLOURS, truth_js, "truthcode"),
                {"aggregator": "first", "outline": True,
                 "legend": list(zip(TRUTH_COLOURS, COMPARISON_NAMES)) + [(NAN_COLOUR, "clear in both, or no data")]}),
        }

    def _build(self, keys, ncols):
        specs = self._specs()
        cells = []
        for key in keys:
            fn, title_fn, refs, opts, extra = specs[key]
            extra = dict(extra)
            widget, legend = extra.pop("widget", None), extra.pop("legend", None)
            if isinstance(legend, list):
                legend = swatch_legend_html(legend)
            plot = self._panel_map(fn, refs, opts, **extra)
            # one pane per map, sharing the ranges set in _share_ranges (a single hv.Layout grid does not
            # lay out inside tabs next to other plots with Panel 1.9 / Bokeh 3.9)
            pane = pn.pane.HoloViews(plot, backend="bokeh", linked_axes=False, margin=(0, 4))
            title = pn.pane.HTML(pn.bind(lambda text: f"<b style='font-size:13px'>{text}</b>",
                                         pn.bind(title_fn, **refs)), margin=(8, 10, 0, 10),
                                 css_classes=["cs-map-title"], width=self._fw + MAP_EXTRA_WIDTH - 20)
            parts = [title] + ([widget] if widget is not None else []) + [pane]
            if legend is not None:
                parts.append(pn.pane.HTML(legend, margin=(0, 10), width=self._fw + 150,
                                          css_classes=[f"cs-legend-{key}"]))
            cells.append(pn.Column(*parts, margin=0, css_classes=[f"cs-map-{key}"]))
        return pn.GridBox(*cells, ncols=ncols, css_classes=["cs-maps"])

    # ------------------------------------------------------------------ interaction
    def _attach_streams(self, dmap):
        tap = hv.streams.Tap(source=dmap, x=None, y=None)
        box = hv.streams.BoundsXY(source=dmap, bounds=None)
        lasso = hv.streams.Lasso(source=dmap)
        guard = self.notices.guard
        tap.add_subscriber(guard("picking a pixel")(self._on_tap))
        box.add_subscriber(guard("selecting pixels")(lambda bounds=None, **_: self.focus.select_box(bounds)))
        lasso.add_subscriber(guard("selecting pixels")(
            lambda geometry=None, **_: self.focus.select_polygon(geometry)))
        if self.rasterized:
            pointer = hv.streams.PointerXY(source=dmap, x=None, y=None)
            pointer.add_subscriber(guard("reading values")(self._on_pointer))
        self._streams = getattr(self, "_streams", []) + [tap, box, lasso]

    def _on_tap(self, x=None, y=None, **_):
        pix = self.focus.pixel_at(x, y)
        if pix is not None:
            self.focus.pixel = pix

    def _on_pointer(self, x=None, y=None, **_):
        """Values under the cursor, read from the source arrays (rasterized maps aggregate)."""
        pix = self.focus.pixel_at(x, y)
        if pix is None:
            self._readout.object = _READOUT_HINT
            return
        i, j = pix
        m = self.model
        ch = m.channel
        k = m.sim.channels.index(ch)
        res = m.result
        tau = res.cloud.optical_depth[i, j] if res.cloud is not None else np.nan
        ptop = res.cloud.top_pressure[i, j] if res.cloud is not None else np.nan
        cloud = ""
        if res.cloud is not None and res.cloud.status[i, j] != STATUS_NOT_CLOUDY:
            phase = PHASE_NAMES[int(res.cloud.phase[i, j])]
            cloud = f" ({STATUS_NAMES[int(res.cloud.status[i, j])].replace('_', ' ')}" + (
                f", {phase})" if phase != "none" else ")")

        def f(v, fmt):
            return format(v, fmt) if np.isfinite(v) else "–"

        self._readout.object = (
            f'<span class="cs-muted">row {int(self._ys[i])}, column {int(self._xs[j])} · '
            f'{channel_label(ch)} observed {f(m.scene.data[f"bt_{ch}"].values[i, j], ".2f")} K, '
            f'clear {f(m.sim.bt_clear[k, i, j], ".2f")} K, departure {f(res.departure[ch][i, j], "+.2f")} K · '
            f'class {pl.CLASS_NAMES[int(res.mask[i, j])]} · τ {f(tau, ".2f")} · '
            f'top {f(ptop, ".0f")} hPa{cloud}</span>')
