"""The dashboard's param model over one headless :class:`cloudsieve.session.Session`.

Every tunable setting is a parameter (widgets come from ``from_param``); changing one calls
the session, which rescreens, and bumps ``version`` so that views redraw. The model holds no
results of its own: ``scene``, ``sim``, ``result``, ``journal`` … are the session's.
"""
import param

from cloudsieve.config import TOP_METHODS, TOP_PRESSURE_RANGE
from cloudsieve.session import Session


class ScreeningModel(param.Parameterized):
    """A screened scene with tunable settings, QA edits and exports, for one browser session."""

    cloud_top = param.Selector(default="opaque", objects=list(TOP_METHODS), doc="Cloud-top choice of the inversion")
    top_pressure = param.Number(default=500.0, bounds=TOP_PRESSURE_RANGE, step=10.0,
                                doc="Cloud-top pressure for the fixed choice [hPa]")
    remove_bias = param.Boolean(default=False, doc="Subtract the clear-sky bias fit and screen again")
    marginal_fraction = param.Number(default=0.25, bounds=(0.0, 1.0), step=0.05,
                                     doc="Marginal band as a fraction of each test's threshold [1]")
    channel = param.Selector(default=None, objects=[], doc="Channel shown on the brightness-temperature maps")
    version = param.Integer(default=0, doc="Incremented after every update of the results")
    busy = param.Boolean(default=False, doc="An update is running")
    message = param.String(default="", doc="Last user-facing message (errors included)")

    def __init__(self, scene=None, config=None, journal=True, sim=None, session=None, **params):
        """A new :class:`cloudsieve.session.Session` of ``scene`` (``config``, ``journal`` and ``sim``
        as there), or an existing ``session``."""
        super().__init__(**params)
        self.session = session if session is not None else Session(scene, config, journal=journal, sim=sim)
        s = self.session
        scene = s.scene
        with param.parameterized.discard_events(self):
            self.param.update(cloud_top=s.cloud_top, top_pressure=s.top_pressure, remove_bias=s.remove_bias,
                              marginal_fraction=s.marginal_fraction)
        self.param.channel.objects = list(scene.channels)
        self.channel = "11um" if "11um" in scene.channels else scene.channels[0]
        if s.problems:
            self.message = "; ".join(s.problems)

    @classmethod
    def open(cls, path, config=None, journal=True):
        """Load, validate and simulate a scene file (raises SceneError with the report)."""
        return cls(session=Session.open(path, config, journal=journal))

    # ------------------------------------------------------------------ the session's state
    scene = property(lambda self: self.session.scene)
    sim = property(lambda self: self.session.sim)
    result = property(lambda self: self.session.result)
    journal = property(lambda self: self.session.journal)
    config = property(lambda self: self.session.config)
    lean = property(lambda self: self.session.lean)
    timings = property(lambda self: self.session.timings)
    counts = property(lambda self: self.session.counts)

    def threshold(self, test, surface="sea"):
        return self.session.threshold(test, surface)

    def enabled(self, test):
        return self.session.enabled(test)

    def edit_listing(self):
        return self.session.edit_listing()

    def edit_places(self):
        return self.session.edit_places()

    def truth_skill(self):
        return self.session.truth_skill()

    def label_scores(self):
        return self.session.label_scores()

    def result_dataset(self, action="screen"):
        return self.session.result_dataset(action)

    def export_bytes(self, fmt):
        return self.session.export_bytes(fmt)

    def write(self, path, fmt=None):
        return self.session.write(path, fmt)

    def summary(self):
        return self.session.summary()

    def pixel_info(self, row, col):
        return self.session.pixel_info(row, col)

    def optical_depth_curve(self, row, col, taus=None):
        return self.session.optical_depth_curve(row, col, taus)

    # ------------------------------------------------------------------ changes
    def _run(self, call, *args, **kwargs):
        """Call the session (which rescreens), then tell the views."""
        self.busy = True
        try:
            return call(*args, **kwargs)
        finally:
            self.busy = False
            self.version += 1

    def set_threshold(self, test, value, surface=None):
        """Set a test's threshold for one surface type (or all) and rescreen."""
        self._run(self.session.set_threshold, test, value, surface)

    def set_enabled(self, test, on):
        """Switch a test on or off and rescreen."""
        self._run(self.session.set_enabled, test, on)

    def apply_settings(self, config):
        """Take a configuration's tunable settings (Session.apply_settings), align the widgets'
        parameters with them and rescreen; returns the sections not applied."""
        ignored = self._run(self.session.apply_settings, config)
        s = self.session
        with param.parameterized.discard_events(self):
            self.param.update(cloud_top=s.cloud_top, top_pressure=s.top_pressure, remove_bias=s.remove_bias,
                              marginal_fraction=s.marginal_fraction)
        return ignored

    def mark(self, action, index):
        """Record a QA edit (clear / cloud / reset) of flat pixel indices, then rescreen."""
        return self._run(self.session.mark, action, index)

    def undo(self):
        """Undo the latest edit this page showed (StaleEditsError if another session changed them)."""
        return self._run(self.session.undo)

    @param.depends("cloud_top", "top_pressure", "remove_bias", "marginal_fraction", watch=True)
    def _settings_changed(self):
        # only what the analyst changed goes to the session (an unchanged top pressure must not
        # replace a configured top height)
        changed = {name: getattr(self, name) for name in ("cloud_top", "top_pressure", "remove_bias",
                                                          "marginal_fraction")
                   if getattr(self, name) != getattr(self.session, name)}
        self._run(self.session.configure, **changed)
