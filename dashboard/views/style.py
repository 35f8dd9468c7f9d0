"""Look of the dashboard: class palette, channel colours, labels, page CSS.

Class palette (chosen for cloudsieve; distinct in lightness as well as hue, so it reads
for the common colour-vision deficiencies and in greyscale):

=========  =========  ==========================================================
class      colour     why
=========  =========  ==========================================================
clear      deep teal  dark and saturated: the open surface
marginal   amber      mid lightness, warm hue: "look here"
cloud      lavender   near-white with a cool tint: bright like cold cloud tops
no_data    mid-grey   neutral, no hue
=========  =========  ==========================================================

Pixels edited by the analyst are outlined in magenta on the class map.
"""
import re

CLASS_COLOURS = {
    "clear": "#176d6d",
    "marginal": "#eaa221",
    "cloud": "#e6defa",
    "no_data": "#9a9a9a",
}
EDIT_OUTLINE = "#d81b60"
SELECTION_LINE = "#111827"
ACCENT = "#17595c"
INK = "#1f2933"

#: button stylesheets (inside the widgets' shadow roots). The design's outline buttons drew
#: download links in grey, like disabled ones, and the chosen option of a button group in dark
#: text on the dark accent; these keep the accent for what can be pressed and white text on it.
OUTLINE_BUTTON_CSS = (f".bk-btn {{ color: {ACCENT} !important; border-color: {ACCENT} !important; }} "
                      f".bk-btn:hover {{ color: white !important; background-color: {ACCENT} !important; }}")
BUTTON_GROUP_CSS = (f".bk-btn.bk-active {{ color: white !important; background-color: {ACCENT} !important; "
                    f"border-color: {ACCENT} !important; }} .bk-btn {{ border-color: {ACCENT}; }}")

#: channel colours (Okabe–Ito, colour-blind safe)
CHANNEL_COLOURS = {"3p9um": "#D55E00", "8p6um": "#009E73", "11um": "#0072B2", "12um": "#CC79A7"}
_SPARE = ["#E69F00", "#56B4E9", "#F0E442", "#000000"]


def channel_colour(ch, k=0):
    return CHANNEL_COLOURS.get(ch, _SPARE[k % len(_SPARE)])


def channel_label(ch):
    """'11um' -> '11 µm', '3p9um' -> '3.9 µm' (other names unchanged)."""
    if ch.endswith("um"):
        return ch[:-2].replace("p", ".") + " µm"
    return ch


_CHANNEL_CODE = re.compile(r"\b(\d+(?:p\d+)?um)\b")


def plain_words(text):
    """A core message in the app's words: channel codes as labels ('3p9um' → '3.9 µm') and test
    names as the tests' labels ('night_fog_contrast' → its label)."""
    from cloudsieve.registry import REGISTRY

    text = _CHANNEL_CODE.sub(lambda m: channel_label(m.group(1)), str(text))
    for name, test in REGISTRY.items():
        text = re.sub(rf"\b{re.escape(name)}\b", test.label, text)
    return text


def test_label(name):
    """The dashboard label of a screening test (from the registry)."""
    from cloudsieve.registry import REGISTRY

    return REGISTRY[name].label if name in REGISTRY else name


SURFACE_LABELS = {"sea": "Sea", "land": "Land", "ice": "Ice"}

#: page-wide CSS (the template's raw_css)
PAGE_CSS = """
:root { --cs-ink: %(ink)s; --cs-accent: %(accent)s; }
.cs-muted { color: #5b6770; font-size: 0.9em; }
.cs-caution { font-size: 0.82em; color: #5b4a1f; background: #fbf4e4; border-left: 3px solid #eaa221;
              padding: 6px 10px; border-radius: 3px; }
""" % {"ink": INK, "accent": ACCENT}

#: CSS of the class-count chips (inside the HTML pane's shadow root)
COUNTS_CSS = """
.cs-counts { display: flex; gap: 10px; flex-wrap: wrap; font-family: inherit; }
.cs-count { display: flex; align-items: center; gap: 10px; border: 1px solid #d9dee3; border-radius: 6px;
            padding: 6px 14px 6px 8px; background: #fff; min-width: 150px; }
.cs-swatch { width: 14px; height: 38px; border-radius: 3px; border: 1px solid rgba(0,0,0,0.25); }
.cs-label { font-size: 12px; color: #5b6770; text-transform: uppercase; letter-spacing: 0.04em; }
.cs-value { font-size: 24px; font-weight: 600; color: %(ink)s; line-height: 1.1; }
.cs-pixels { font-size: 11px; color: #7b8790; }
.cs-scene { display: flex; flex-direction: column; justify-content: center; padding: 0 8px; }
.cs-scene-name { font-size: 18px; font-weight: 600; color: %(ink)s; }
""" % {"ink": INK}


def legend_html():
    """An HTML legend of the class palette (and the edit outline)."""
    items = "".join(
        f'<span style="display:inline-flex;align-items:center;margin-right:14px">'
        f'<span style="display:inline-block;width:14px;height:14px;background:{c};border:1px solid #777;'
        f'border-radius:2px;margin-right:5px"></span>{name}</span>'
        for name, c in CLASS_COLOURS.items())
    items += (f'<span style="display:inline-flex;align-items:center">'
              f'<span style="display:inline-block;width:12px;height:12px;border:2px solid {EDIT_OUTLINE};'
              f'margin-right:5px"></span>analyst edit</span>')
    return f'<div style="font-size:13px;line-height:1.8">{items}</div>'


#: Colours of the cloud-layer categories drawn over the optical-depth and top maps (ours). Pixels
#: with no cloud to invert (screened clear) stay in the maps' pale NaN grey.
CLOUD_CATEGORY_COLOURS = {
    "opaque": "#141414",            # τ map: opaque, τ only a lower bound (beyond the palette's dark end)
    "top_assumed": "#00a2c7",       # top map: the channels could not fix the top (cyan, outside both palettes)
    "beyond_opaque": "#7fbc41",     # colder than an opaque cloud at the highest allowed top (green, ditto)
    "not_retrieved": "#a3abb5",     # warmer than clear, or opaque and clear radiances too close
}

#: Colours of the "why flagged" map (ours): the cloud tests in registry order, then an analyst
#: edit (the edit outline's magenta), then flag-only tests such as the warm departure
WHY_TEST_COLOURS = ["#2b59c3", "#e07b00", "#8e44ad", "#00897b", "#6d4c41", "#9e9d24", "#5c6bc0"]
WHY_EDIT_COLOUR = EDIT_OUTLINE
WHY_FLAG_COLOURS = ["#c62828", "#ad1457", "#4e342e"]


def why_colours(n_cloud, n_flag):
    """Colours of the why map's categories: n_cloud cloud tests, an analyst edit, n_flag flags."""
    return WHY_TEST_COLOURS[:n_cloud] + [WHY_EDIT_COLOUR] + WHY_FLAG_COLOURS[:n_flag]


#: Colours of the "vs truth" map (ours), in the order of cloudsieve.truth.COMPARISON_NAMES: caught,
#: missed, false alarm, truth-clear marginal, thin or partial truth cloud
TRUTH_COLOURS = ["#4a7fb5", "#d1495b", "#f08c00", "#f6e27f", "#c7ccd3"]

_CATEGORY_WORDS = {
    "opaque": "opaque: τ ≥ the lower bound shown on hover",
    "top_assumed": "top not fixed by the channels: τ at the assumed top",
    "beyond_opaque": "colder than an opaque cloud at the highest allowed top",
    "not_retrieved": "flagged, but no cloud signal to invert",
}


def swatch_legend_html(pairs, css_class="cs-legend"):
    """An HTML legend: a swatch and its words for each (colour, text) pair."""
    items = "".join(
        f'<span style="display:inline-flex;align-items:center;margin-right:12px">'
        f'<span style="display:inline-block;width:12px;height:12px;background:{colour};border:1px solid #777;'
        f'border-radius:2px;margin-right:4px"></span>{text}</span>' for colour, text in pairs)
    return f'<div class="{css_class}" style="font-size:12px;line-height:1.6">{items}</div>'


def cloud_legend_html(categories, no_cloud_colour):
    """An HTML legend of the categories drawn over a cloud-layer map, plus "no cloud"."""
    pairs = [(CLOUD_CATEGORY_COLOURS[c], _CATEGORY_WORDS[c]) for c in categories]
    return swatch_legend_html(pairs + [(no_cloud_colour, "no cloud (screened clear)")], "cs-cloud-legend")
