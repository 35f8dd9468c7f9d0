"""Keyboard shortcuts of the QA work (mark cloud, mark clear, undo, next marginal pixel) and the
size of the page's main area.

One invisible browser component per page listens for the keys (not while typing in a field)
and reports the key to the server, which acts on the current scene's QA panel and focus. It
also reports the width of the main area and the window's height (at first and after every
resize, the sidebar folded or unfolded included), so that the server sizes the maps to fit.
"""
import param
from panel.reactive import ReactiveHTML

#: key -> what it does (listed in the QA card)
SHORTCUTS = {"c": "mark the selection cloud", "l": "mark the selection clear", "u": "undo the latest edit",
             "n": "inspect the next marginal pixel"}


class KeyShortcuts(ReactiveHTML):
    """Reports a pressed shortcut key as ``pressed`` = "<key>:<time>" (every press a new value)."""

    pressed = param.String(default="")
    main_width = param.Integer(default=0, doc="Width of the page's main area [px] (0 until the browser reports)")
    window_height = param.Integer(default=0, doc="Height of the browser window [px]")

    _template = '<span id="keys" class="cs-keys"></span>'

    _scripts = {"render": """
      const shortcutKeys = %s;
      document.addEventListener('keydown', (e) => {
        if (e.ctrlKey || e.metaKey || e.altKey) return;
        const target = e.composedPath()[0];
        if (target && (['INPUT', 'TEXTAREA', 'SELECT'].includes(target.tagName) || target.isContentEditable)) return;
        const k = (e.key || '').toLowerCase();
        if (shortcutKeys.includes(k)) { data.pressed = k + ':' + Date.now(); }
      });
      let timer = null;
      const report = () => {
        const main = document.getElementById('main');
        const w = Math.round(main ? main.clientWidth : window.innerWidth);
        const h = Math.round(window.innerHeight);
        if (Math.abs(w - data.main_width) > 8 || Math.abs(h - data.window_height) > 8) {
          data.main_width = w; data.window_height = h;
        }
      };
      const later = () => { clearTimeout(timer); timer = setTimeout(report, 250); };
      const main = document.getElementById('main');
      if (main && window.ResizeObserver) { new ResizeObserver(later).observe(main); }
      window.addEventListener('resize', later);
      report();
    """ % list(SHORTCUTS)}


def shortcuts_html():
    """The shortcuts as a line of text for the QA card."""
    keys = " · ".join(f"<kbd>{k.upper()}</kbd> {what}" for k, what in SHORTCUTS.items())
    return f"<div class='cs-muted cs-shortcuts'>Keys: {keys}.</div>"
