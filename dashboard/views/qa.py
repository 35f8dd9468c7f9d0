"""Analyst QA edits: act on the selected pixels, list the edits, score the tests against them.

Edits go through the model, which appends them to the journal file beside the scene at once
(``<scene>.qa.jsonl``), applies them to the mask and carries them into exports.
"""
import numpy as np
import panel as pn
from panel.viewable import Viewer

from cloudsieve.journal import StaleEditsError
from cloudsieve.session import RepeatedEdit
from .keys import shortcuts_html
from .style import test_label


def edits_statement(journal, uploaded):
    """Where QA edits go, in one wording for the QA card and the upload report."""
    if uploaded:
        return (f"Edits are saved at once to <code>{journal}</code> beside this server's temporary copy of the "
                "uploaded scene and go into the downloads; the copy is removed when the page closes, so download "
                "the result (and the settings) to keep them.")
    return f"Edits are saved at once to <code>{journal}</code> beside the scene and go into the downloads."


class QAPanel(Viewer):
    """Selection summary, edit buttons, the list of edits and per-test label scores."""

    def __init__(self, model, focus, notices, uploaded=False, **params):
        super().__init__(**params)
        self.model, self.focus, self.notices = model, focus, notices
        self._selection = pn.pane.Markdown(pn.bind(self._selection_text, focus.param.selection),
                                           sizing_mode="stretch_width", css_classes=["cs-selection"], margin=(0, 10))
        self.buttons = {
            "clear": pn.widgets.Button(label="Mark clear", color="primary", variant="outline",
                                       description="Set the selected pixels to clear"),
            "cloud": pn.widgets.Button(label="Mark cloud", color="primary", variant="outline",
                                       description="Set the selected pixels to cloud"),
            "reset": pn.widgets.Button(label="Reset", color="default",
                                       description="Remove analyst edits from the selected pixels"),
        }
        self.undo_button = pn.widgets.Button(label="Undo", color="default",
                                             description="Cancel the latest edit still in force")
        self.deselect = pn.widgets.Button(label="Clear selection", color="light")
        has_sel = pn.bind(lambda s: len(s) > 0, focus.param.selection)
        for action, b in self.buttons.items():
            b.disabled = pn.bind(lambda s: len(s) == 0, focus.param.selection)
            b.on_click(self._mark_cb(action))
        self.deselect.visible = has_sel
        self.deselect.on_click(lambda _e: self.focus.clear_selection())
        self.undo_button.on_click(notices.guard("undoing the last edit")(self._undo))
        self.undo_button.disabled = pn.bind(lambda _v: not self.model.edit_listing(), model.param.version)
        self.edits = pn.pane.Markdown(pn.bind(self._edits_text, model.param.version), sizing_mode="stretch_width",
                                      css_classes=["cs-edits"], margin=(0, 10))
        self._scores = pn.pane.Markdown(pn.bind(self._scores_text, model.param.version),
                                        sizing_mode="stretch_width", css_classes=["cs-scores"], margin=(0, 10))
        journal = model.journal.path.name if getattr(model.journal, "path", None) else "(no journal)"
        self._layout = pn.Column(
            self._selection,
            pn.Row(*self.buttons.values(), self.undo_button, sizing_mode="stretch_width"),
            self.deselect,
            pn.pane.HTML(f"<div class='cs-muted'>{edits_statement(journal, uploaded)}</div>", margin=(4, 10),
                         css_classes=["cs-edits-where"]),
            pn.pane.HTML(shortcuts_html(), margin=(0, 10)),
            self.edits,
            self._scores,
            sizing_mode="stretch_width")

    def __panel__(self):
        return self._layout

    # ------------------------------------------------------------------ actions
    def _mark_cb(self, action):
        @self.notices.guard(f"marking pixels {action}")
        def cb(_event):
            idx = np.asarray(self.focus.selection, dtype=np.int64)
            try:
                entry = self.model.mark(action, idx)
            except RepeatedEdit as exc:
                self.notices.show(f"{str(exc)[0].upper()}{str(exc)[1:]}.", "warning")
                return
            verb = {"clear": "marked clear", "cloud": "marked cloud", "reset": "reset"}[action]
            self.notices.show(f"{entry['count']:,} pixel(s) {verb} (edit {entry['id']}).", "success")
            self.focus.clear_selection()
        return cb

    def mark_selection(self, action):
        """Mark the current selection (a keyboard shortcut); says so when nothing is selected."""
        if not len(self.focus.selection):
            self.notices.show("Select pixels first: the box or lasso tool in a map's toolbar, then drag.", "info")
            return
        self._mark_cb(action)(None)

    def _undo(self, _event=None):
        try:
            entry = self.model.undo()
        except StaleEditsError as exc:
            self.notices.show(f"Nothing undone: {exc}.", "warning")
            return
        if entry is None:
            self.notices.show("Nothing to undo: no edits in force.", "info")
        else:
            self.notices.show(f"Undid edit {entry['id']} ({entry['action']}, {entry['count']:,} pixel(s)).", "success")

    # ------------------------------------------------------------------ rendering
    def _edits_text(self, _version=None, limit=12):
        rows = self.model.edit_places()
        if not rows:
            return "**Edits in force:** none yet."
        label = {"clear": "marked clear", "cloud": "marked cloud", "reset": "reset"}
        out = [f"**Edits in force:** {len(rows)} (newest first)", "", "| edit | time (UTC) | pixels | action | where |",
               "|---:|---|---:|---|---|"]
        span = lambda a: f"{a[0]}" if a[0] == a[1] else f"{a[0]}–{a[1]}"  # noqa: E731
        for e in rows[:limit]:
            where = f"rows {span(e['rows'])}, columns {span(e['cols'])}" if e["rows"] else "–"
            out.append(f"| {e['id']} | {e['time'].replace('T', ' ').rstrip('Z')} | {e['count']:,} | "
                       f"{label.get(e['action'], e['action'])} | {where} |")
        if len(rows) > limit:
            out.append(f"| | … {len(rows) - limit} older | | | |")
        return "\n".join(out)

    def _selection_text(self, selection):
        n = len(selection)
        if n == 0:
            return ("**Selection:** none. Pick the box or lasso tool in the map toolbar, drag over any map, "
                    "then mark the pixels.")
        return f"**Selection:** {n:,} pixel(s) — {self.focus.description}."

    def _scores_text(self, _version=None):
        scores = self.model.label_scores() if self.model.journal is not None else {}
        if not scores:
            return ""
        any_n = next(iter(scores.values()))
        n_cloud, n_clear = any_n[2], any_n[3]
        if n_cloud == 0 and n_clear == 0:
            return ("**Test scores against your labels** appear once you mark pixels clear or cloud: hit rate on "
                    "pixels you marked cloud, false-alarm rate on those you marked clear.")

        def pct(v):
            return "–" if not np.isfinite(v) else f"{100 * v:.1f} %"

        rows = [f"**Test scores against your labels** ({n_cloud:,} marked cloud, {n_clear:,} marked clear)", "",
                "| test | hit rate | false-alarm rate |", "|---|---|---|"]
        for t, (hr, far, _nc, _nn) in scores.items():
            rows.append(f"| {test_label(t)} | {pct(hr)} | {pct(far)} |")
        return "\n".join(rows)
