"""Messages for the analyst, and the guard that turns exceptions into them.

Our own errors (:class:`cloudsieve.errors.CloudsieveError`) carry a message that says how to
fix the input; it is shown as it is. Anything else is a bug: the page shows one short line,
the server log gets the traceback, and the app stays usable.
"""
import functools
import inspect
import logging

import panel as pn
from panel.viewable import Viewer

from cloudsieve.errors import CloudsieveError

log = logging.getLogger("cloudsieve.dashboard")


_COMPACT = ":host(.alert) { padding: 6px 14px; } p { margin: 0; }"


class Notices(Viewer):
    """One dismissible message line above the main area."""

    def __init__(self, **params):
        super().__init__(**params)
        self._alert = pn.pane.Alert("", alert_type="info", visible=False, sizing_mode="stretch_width",
                                    margin=(0, 10, 4, 10), css_classes=["cs-notice"], stylesheets=[_COMPACT])
        self._close = pn.widgets.Button(label="✕", color="light", width=36, height=32, margin=(0, 10),
                                        visible=False, description="Dismiss the message")
        self._close.on_click(lambda _e: self.clear())

    def __panel__(self):
        return pn.Row(self._alert, self._close, sizing_mode="stretch_width")

    #: seconds a confirmation ("success") stays before it goes by itself (warnings stay until dismissed)
    FADE_S = 10

    def show(self, text, kind="info"):
        self._alert.param.update(object=text, alert_type=kind, visible=bool(text))
        self._close.visible = bool(text)
        if text and kind == "success" and pn.state.curdoc is not None and pn.state.curdoc.session_context:
            # a confirmation says what just happened; later it would be stale
            pn.state.add_periodic_callback(lambda: self.text == text and self.clear(), period=self.FADE_S * 1000,
                                           count=1)

    def clear(self):
        self.show("")

    @property
    def text(self):
        return self._alert.object if self._alert.visible else ""

    def report(self, exc, doing):
        """Show an exception the analyst can act on (ours) or a short note (a bug)."""
        if isinstance(exc, CloudsieveError):
            self.show(f"**{doing.capitalize()} failed.** {exc}", "warning")
        elif isinstance(exc, ValueError):
            self.show(f"**{doing.capitalize()}:** {exc}", "warning")
        else:
            log.exception("unexpected error while %s", doing)
            self.show(f"**{doing.capitalize()} failed** because of an unexpected error "
                      f"({type(exc).__name__}). The dashboard is still usable; the server log has the "
                      "details — please report it.", "danger")

    def guard(self, doing):
        """Decorator: run a callback, report any exception instead of raising it."""
        def wrap(fn):
            if inspect.iscoroutinefunction(fn):
                @functools.wraps(fn)
                async def run_async(*args, **kwargs):
                    try:
                        return await fn(*args, **kwargs)
                    except Exception as exc:  # noqa: BLE001 — shown to the analyst, logged
                        self.report(exc, doing)
                return run_async

            @functools.wraps(fn)
            def run(*args, **kwargs):
                try:
                    return fn(*args, **kwargs)
                except Exception as exc:  # noqa: BLE001 — shown to the analyst, logged
                    self.report(exc, doing)
            return run
        return wrap
