"""The loading panel: while a scene opens, the page says which scene and at which stage it is.

Opening a scene runs four stages, each shown as it starts: reading and checking the file,
simulating the clear sky, screening and inverting the cloud layer, drawing the maps (a scene
already in the server's cache starts at the screening). The bar counts the stages; large
scenes spend most of their time in the second and third.
"""
import html
import time

import panel as pn
from panel.viewable import Viewer

#: the stages of opening a scene, by the first word of their text
STAGES = ("reading", "simulating", "screening", "drawing")


class LoadingPanel(Viewer):
    """A line of text and a progress bar, visible only while a scene opens."""

    def __init__(self, **params):
        super().__init__(**params)
        self._label = ""
        self._started = None
        self._text = pn.pane.HTML("", margin=(4, 10, 0, 10), css_classes=["cs-loading-text"],
                                  sizing_mode="stretch_width")
        self._bar = pn.indicators.Progress(value=0, max=len(STAGES), bar_color="primary", height=14,
                                           sizing_mode="stretch_width", margin=(4, 10, 8, 10))
        self._panel = pn.Column(self._text, self._bar, visible=False, sizing_mode="stretch_width",
                                css_classes=["cs-loading"], margin=(4, 0))

    def __panel__(self):
        return self._panel

    @property
    def active(self):
        return self._panel.visible

    def start(self, label):
        """A scene starts opening: show its name, waiting for the first stage."""
        self._label, self._started = str(label), time.monotonic()
        self._panel.visible = True
        self.stage("starting")

    def stage(self, text):
        """The stage now running (its first word one of STAGES, else shown before the first)."""
        if not self._panel.visible:
            return
        first = text.split()[0] if text else ""
        step = STAGES.index(first) if first in STAGES else 0
        self._bar.value = step
        elapsed = time.monotonic() - self._started if self._started else 0.0
        self._text.object = (
            f"<div style='font-size:15px'><b>Opening {html.escape(self._label)}</b> · {html.escape(text)} …</div>"
            f"<div class='cs-muted'>stage {step + 1 if first in STAGES else 0} of {len(STAGES)} · "
            f"{elapsed:.0f} s so far. Large scenes take a while to simulate and screen; the page stays "
            f"usable.</div>")

    def done(self):
        self._panel.visible = False
        self._bar.value = 0
