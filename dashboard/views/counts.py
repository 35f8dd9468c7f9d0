"""Class fractions of the current mask, as a row of coloured chips."""
import html

import panel as pn
from panel.viewable import Viewer

from cloudsieve.codes import CLASS_NAMES
from .style import CLASS_COLOURS, COUNTS_CSS, channel_label


class ClassCounts(Viewer):
    """Scene name plus clear / marginal / cloud / no_data fractions and pixel counts."""

    def __init__(self, model, **params):
        super().__init__(**params)
        self.model = model
        self._pane = pn.pane.HTML(pn.bind(self._html, model.param.version), stylesheets=[COUNTS_CSS],
                                  sizing_mode="stretch_width", margin=(4, 10), css_classes=["cs-counts-pane"])

    def __panel__(self):
        return self._pane

    def _html(self, _version=None):
        m = self.model
        n = m.result.mask.size
        ny, nx = m.result.mask.shape
        chips = [f'<div class="cs-scene"><div class="cs-scene-name">{html.escape(m.scene.name)}</div>'
                 f'<div class="cs-pixels">{ny} × {nx} pixels · channels '
                 f'{html.escape(", ".join(channel_label(c) for c in m.scene.channels))}</div></div>']
        for name in CLASS_NAMES:
            frac = m.counts[name]
            chips.append(
                f'<div class="cs-count cs-count-{name}" data-class="{name}">'
                f'<div class="cs-swatch" style="background:{CLASS_COLOURS[name]}"></div>'
                f'<div><div class="cs-label">{name}</div><div class="cs-value">{100 * frac:.1f}%</div>'
                f'<div class="cs-pixels">{round(frac * n):,} px</div></div></div>')
        sk = m.truth_skill()
        if sk is not None:  # a truth file lies beside the scene: the skill follows every change
            pod = "–" if sk.pod != sk.pod else f"{sk.pod:.3f}"
            chips.append(
                f'<div class="cs-count cs-truth" title="against {html.escape(m.session.truth.path.name)}: POD = share '
                f'of truth cloud (fraction ≥ 0.5, τ ≥ 1) classed cloud; false alarms = share of truth-clear '
                f'pixels classed cloud"><div><div class="cs-label">vs truth</div>'
                f'<div class="cs-value">POD {pod}</div><div class="cs-pixels">false alarms '
                f'{100 * sk.clear_classed_cloud:.2f} % · marginal {100 * sk.clear_classed_marginal:.2f} %</div></div>'
                f'</div>')
        return f'<div class="cs-counts">{"".join(chips)}</div>'
