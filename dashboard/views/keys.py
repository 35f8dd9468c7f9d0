"""Keyboard shortcuts of the QA work: mark cloud, mark clear, undo, next marginal pixel.

One invisible browser component per page listens for the keys (not while typing in a field)
and reports the key to the server, which acts on the current scene's QA panel and focus.
"""
import param
from panel.reactive import ReactiveHTML

#: key -> what it does (listed in the QA card)
SHORTCUTS = {"c": "mark the selection cloud", "l": "mark the selection clear", "u": "undo the latest edit",
             "n": "inspect the next marginal pixel"}


class KeyShortcuts(ReactiveHTML):
    """Reports a pressed shortcut key as ``pressed`` = "<key>:<time>" (every press a new value)."""

    pressed = param.String(default="")

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
    """ % list(SHORTCUTS)}


def shortcuts_html():
    """The shortcuts as a line of text for the QA card."""
    keys = " · ".join(f"<kbd>{k.upper()}</kbd> {what}" for k, what in SHORTCUTS.items())
    return f"<div class='cs-muted cs-shortcuts'>Keys: {keys}.</div>"
