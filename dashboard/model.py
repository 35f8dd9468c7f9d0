"""The one state object of cloudsieve: a screened scene and its settings.

:class:`ScreeningModel` holds the scene, the configuration, the three pipeline stages'
results and the QA journal. The command line drives it in a few calls
(``ScreeningModel.open(path, config).result_dataset()``); the dashboard binds widgets to
its parameters and renders what it holds. It imports no user-interface library.

Costs: opening a scene runs the clear-sky simulation once. Changing a threshold, switching
a test or the bias removal re-runs only the screening (2-D arithmetic); changing the
cloud-top choice re-runs the inversion (per pixel, no new simulation).
"""
import copy
import io
import tempfile
import time
from pathlib import Path

import numpy as np
import param

from physics import cloud as pcloud

from . import pipeline as pl
from .config import SURFACES, TOP_METHODS, load_config, merge_config
from .export import result_dataset, result_table, write_result
from .journal import Journal, StaleEditsError, journal_path
from .scene import load_scene

#: per test: (config key of the tunable threshold, unit label)
TUNABLE = {
    "cold_departure": ("k_sigma", "× σ"),
    "split_window_excess": ("threshold", "K"),
    "texture": ("threshold", "K"),
    "night_fog_contrast": ("threshold", "K"),
    "warm_departure": ("threshold", "K"),
}


class ScreeningModel(param.Parameterized):
    """A screened scene with tunable settings, QA edits and exports."""

    cloud_top = param.Selector(default="opaque", objects=list(TOP_METHODS), doc="Cloud-top choice of the inversion")
    top_pressure = param.Number(default=500.0, bounds=(50.0, 1050.0), step=10.0,
                                doc="Cloud-top pressure for the fixed choice [hPa]")
    remove_bias = param.Boolean(default=False, doc="Subtract the clear-sky bias fit and screen again")
    marginal_fraction = param.Number(default=0.25, bounds=(0.0, 1.0), step=0.05,
                                     doc="Marginal band as a fraction of each test's threshold [1]")
    channel = param.Selector(default=None, objects=[], doc="Channel shown on the brightness-temperature maps")
    version = param.Integer(default=0, doc="Incremented after every update of the results")
    busy = param.Boolean(default=False, doc="An update is running")
    invert_scope = param.Selector(
        default="all", objects=["all", "flagged"], constant=True,
        doc="Pixels the cloud inversion runs on: every valid pixel once (the dashboard, so that "
            "retuning never waits for it) or only the pixels the screening flags (batch: one pass)")
    message = param.String(default="", doc="Last user-facing message (errors included)")

    def __init__(self, scene, config=None, journal=None, sim=None, **params):
        """``sim``: a Simulation of this scene under this configuration, to reuse (the
        dashboard caches one per file); computed when omitted."""
        super().__init__(**params)
        compact_scene(scene)
        self.scene = scene
        self.config = copy.deepcopy(config) if config is not None else load_config()
        cc = self.config["cloud"]
        self.param.update(cloud_top=cc["top"], top_pressure=float(np.clip(cc["top_pressure"], 50, 1050)),
                          remove_bias=self.config["bias"]["remove"],
                          marginal_fraction=self.config["screening"]["marginal_fraction"])
        self.param.channel.objects = list(scene.channels)
        self.channel = "11um" if "11um" in scene.channels else scene.channels[0]
        n = scene.data.sizes["y"] * scene.data.sizes["x"]
        self.journal = journal if journal is not None else (
            Journal(journal_path(scene.path), n) if scene.path is not None else None)
        if self.journal is not None and self.journal.problems:
            self.message = "; ".join(self.journal.problems)
        self.sim = sim if sim is not None else pl.simulate(scene, self.config)
        #: large scene: no level data kept (pipeline.LEVELS_PIXEL_LIMIT); results held in float32
        self.lean = self.sim.level_pressure is None
        self._cloud = None
        self._cloud_key = None
        self._screen_cache = {}  # threshold-independent screening arrays of this scene (pipeline.screen)
        self.result = None
        self.timings = {"simulate_s": self.sim.seconds}
        self._update()

    # ------------------------------------------------------------------ construction
    @classmethod
    def open(cls, path, config=None, journal=True):
        """Load, validate and simulate a scene file (raises SceneError with the report)."""
        cfg = config if config is not None else load_config()
        scene = load_scene(path, config=cfg)
        if not journal:
            return cls(scene, cfg, journal=_NoJournal())
        return cls(scene, cfg)

    # ------------------------------------------------------------------ settings
    def effective_config(self):
        """The configuration with the model's current settings folded in."""
        cfg = copy.deepcopy(self.config)
        cfg["cloud"]["top"] = self.cloud_top
        cfg["cloud"]["top_pressure"] = float(self.top_pressure)
        cfg["cloud"].pop("top_height", None) if self.cloud_top != "fixed" or self._fixed_by_pressure else None
        cfg["bias"]["remove"] = bool(self.remove_bias)
        cfg["screening"]["marginal_fraction"] = float(self.marginal_fraction)
        return cfg

    _fixed_by_pressure = True

    def threshold(self, test, surface="sea"):
        key, _ = TUNABLE[test]
        return float(self.config["tests"][test][key][surface])

    def enabled(self, test):
        return bool(self.config["tests"][test]["enabled"])

    def set_threshold(self, test, value, surface=None):
        """Set a test's threshold for one surface type (or all) and rescreen."""
        key, _ = TUNABLE[test]
        if not np.isfinite(value) or value < 0:
            raise ValueError(f"threshold of {test} must be a number ≥ 0")
        for s in ([surface] if surface else SURFACES):
            self.config["tests"][test][key][s] = float(value)
        self._update()

    def set_enabled(self, test, on):
        """Switch a test on or off and rescreen."""
        self.config["tests"][test]["enabled"] = bool(on)
        self._update()

    @param.depends("cloud_top", "top_pressure", "remove_bias", "marginal_fraction", watch=True)
    def _settings_changed(self):
        if getattr(self, "result", None) is None:  # still constructing: __init__ runs the first update
            return
        self._update()

    # ------------------------------------------------------------------ computing
    def _cloud_layer(self, cfg, bias_applied, mask):
        only = None
        if self.invert_scope == "flagged":
            only = (mask == pl.CLOUD) | (mask == pl.MARGINAL)
        key = (cfg["cloud"]["top"], cfg["cloud"]["top_pressure"] if cfg["cloud"]["top"] == "fixed" else None,
               tuple(sorted((c, b["a"], b["b"]) for c, b in bias_applied.items())) if bias_applied else None,
               None if only is None else hash(np.packbits(only).tobytes()))
        if key != self._cloud_key:
            t0 = time.perf_counter()
            self._cloud = pl.invert_all(self.scene, self.sim, cfg,
                                        {c: (b["a"], b["b"]) for c, b in bias_applied.items()} if bias_applied else None,
                                        only=only)
            if self.lean:
                self._cloud = _cloud_f32(self._cloud)
            self._cloud_key = key
            self.timings["invert_s"] = time.perf_counter() - t0
        return self._cloud

    def _update(self):
        self.busy = True
        try:
            t0 = time.perf_counter()
            cfg = self.effective_config()
            edits = self.journal.active() if self.journal is not None else []
            self._shown_latest_edit = edits[-1]["id"] if edits else None
            res = pl.screen(self.scene, self.sim, cfg, edits=edits, cloud=_PENDING, cache=self._screen_cache)
            bias_applied = {c: b for c, b in res.bias.items() if b.get("applied")}
            res.cloud = pl.mask_cloud_layer(self._cloud_layer(cfg, bias_applied, res.mask), res.mask)
            if self.lean:  # exports write float32 anyway; the departures and σ stay shared with the cache
                res.margins = {t: m.astype(np.float32) for t, m in res.margins.items()}
                # the dashboard shows each threshold as its median over valid pixels: keep just that
                valid = self.scene.data["valid"].values
                res.thresholds = {t: _median_over(v, valid) for t, v in res.thresholds.items()}
            self.result = res
            self.timings["screen_s"] = time.perf_counter() - t0
            self.version += 1
        finally:
            self.busy = False

    # ------------------------------------------------------------------ QA edits
    def mark(self, action, index):
        """Record a QA edit (clear / cloud / reset) of flat pixel indices, then rescreen."""
        entry = self.journal.add(action, index)
        self._update()
        return entry

    def undo(self):
        """Undo the latest edit in force — the one this model last showed. If another session
        changed the scene's edits meanwhile, rescreen with them and raise StaleEditsError
        (nothing undone)."""
        try:
            entry = self.journal.undo(expected=self._shown_latest_edit)
        except StaleEditsError:
            self._update()
            raise
        self._update()
        return entry

    def edit_listing(self):
        return self.journal.listing() if self.journal is not None else []

    def label_scores(self):
        """Each test's hit rate and false-alarm rate against the analyst's labels.

        Pixels the analyst marked cloud are positives, those marked clear negatives.
        Hit rate = fired on marked-cloud / marked-cloud; false-alarm rate = fired on
        marked-clear / marked-clear. Returns dict test -> (hit_rate, false_alarm_rate,
        n_cloud, n_clear); rates are NaN without labels of that kind.
        """
        codes = pl.edits_grid(self.result.mask.shape, self.journal.active() if self.journal else [])
        pos, neg = codes == 2, codes == 1
        out = {}
        for test, m in self.result.margins.items():
            fired = np.nan_to_num(m, nan=-np.inf) > 0
            hr = fired[pos].mean() if pos.any() else float("nan")
            far = fired[neg].mean() if neg.any() else float("nan")
            out[test] = (float(hr), float(far), int(pos.sum()), int(neg.sum()))
        return out

    # ------------------------------------------------------------------ reading results
    @property
    def counts(self):
        return dict(self.result.counts)

    def result_dataset(self, action="screen"):
        edits = self.journal.active() if self.journal is not None else []
        return result_dataset(self.scene, self.sim, self.result, self.effective_config(), edits, action)

    def export_bytes(self, fmt):
        """The CSV or NetCDF file of the current result, as bytes (for downloads)."""
        n_edits = len(self.journal.active()) if self.journal is not None else 0
        ds = self.result_dataset(action=f"dashboard export ({n_edits} QA edit{'s' if n_edits != 1 else ''} in force)")
        suffix = ".nc" if fmt == "netcdf" else ".csv"
        with tempfile.TemporaryDirectory() as tmp:
            path = Path(tmp) / f"{self.scene.name}_mask{suffix}"
            write_result(ds, path, fmt)
            return path.read_bytes()

    def write(self, path, fmt=None):
        return write_result(self.result_dataset(), path, fmt)

    def summary(self):
        return pl.summary(self.scene, self.sim, self.result)

    def pixel_info(self, row, col):
        """Everything the inspector shows for one pixel (grid indices y=row, x=col)."""
        ds = self.scene.data
        ny, nx = self.result.mask.shape
        if not (0 <= row < ny and 0 <= col < nx):
            raise ValueError(f"pixel ({row}, {col}) is outside the {ny} × {nx} grid")
        res = self.result
        flat = row * nx + col
        inputs = {k: _num(ds[k].values[row, col]) for k in ("t_skin", "t_air", "tcwv", "sat_zenith", "sol_zenith",
                                                            "p_surf") if k in ds}
        inputs["surface"] = SURFACES[int(ds["surface"].values[row, col])]
        if "lat" in ds.coords:
            inputs["lat"] = _num(ds["lat"].values[row, col])
            inputs["lon"] = _num(ds["lon"].values[row, col])
        channels = {}
        for i, ch in enumerate(self.sim.channels):
            channels[ch] = {"observed": _num(ds[f"bt_{ch}"].values[row, col]),
                            "clear": _num(self.sim.bt_clear[i, row, col]),
                            "departure": _num(res.departure[ch][row, col])}
        margins = {t: _num(m[row, col]) for t, m in res.margins.items()}
        cl = res.cloud
        cloud = {"status": pcloud.STATUS_NAMES[int(cl.status[row, col])],
                 "optical_depth": _num(cl.optical_depth[row, col]),
                 "optical_depth_sigma": _num(cl.optical_depth_sigma[row, col]),
                 "extinction_optical_depth": _num(cl.extinction_optical_depth[row, col]),
                 "top_pressure": _num(cl.top_pressure[row, col]),
                 "top_temperature": _num(cl.top_temperature[row, col]),
                 "emissivity": {c: _num(cl.emissivity[k, row, col]) for k, c in enumerate(cl.channels)}}
        bits = int(res.bits[row, col])
        return {"row": int(ds["row"].values[row]), "col": int(ds["col"].values[col]), "y": row, "x": col,
                "flat": flat, "class": pl.CLASS_NAMES[int(res.mask[row, col])],
                "tests_fired": [b for b in pl.BIT_NAMES if bits & pl.BITS[b]],
                "inputs": inputs, "channels": channels, "margins": margins, "cloud": cloud,
                "curve": self.optical_depth_curve(row, col)}

    def optical_depth_curve(self, row, col, taus=None):
        """Modelled brightness temperature against cloud optical depth at the pixel's top.

        Uses the grey-cloud forward model (physics.cloud.grey_cloud_radiance) with the
        clear-sky and opaque-level radiances of the simulation, at the retrieved top
        pressure, or at the reference (``top_pressure``) one for a clear pixel. Returns dict
        with "tau", per channel modelled BT [K], and the observed BT per channel.
        """
        ny, nx = self.result.mask.shape
        flat = row * nx + col
        pos = np.searchsorted(self.sim.valid_index, flat)
        if pos >= self.sim.valid_index.size or self.sim.valid_index[pos] != flat:
            return None
        taus = np.concatenate([[0.0], np.geomspace(0.01, 20.0, 60)]) if taus is None else np.asarray(taus)
        p_top = self.result.cloud.top_pressure[row, col]
        if not np.isfinite(p_top) and self.result.mask[row, col] != pl.CLEAR and self._cloud is not None:
            p_top = self._cloud.top_pressure[row, col]
        if not np.isfinite(p_top):
            # a clear pixel has no retrieved top (a top fitted to its small departure would sit
            # near the surface and show a flat curve): show a cloud at the reference top
            p_top = self.top_pressure
        if self.sim.level_pressure is not None:
            lp = self.sim.level_pressure[pos].astype(float)
            opq_levels = self.sim.opaque_radiance[pos].astype(float)
        else:  # large scene: simulate this one column again, with its levels
            lp, _, opq_levels = pl.ColumnSimulator(self.scene, self.config).levels(np.array([flat]))
            lp, opq_levels = lp[0].astype(float), opq_levels[0].astype(float)
        opq = pcloud.interpolate_levels(lp, opq_levels, p_top)
        clr = self.sim.clear_radiance[pos].astype(float)
        mu = np.cos(np.deg2rad(float(self.scene.data["sat_zenith"].values[row, col])))
        out = {"tau": taus.tolist(), "top_pressure": float(p_top), "model": {}, "observed": {}}
        for i, ch in enumerate(self.sim.channels):
            chan = self.sim.channel_objects[i]
            rad = pcloud.grey_cloud_radiance(clr[i:i + 1], opq[i:i + 1], taus, mu)[..., 0]
            out["model"][ch] = chan.brightness_temperature(rad).tolist()
            out["observed"][ch] = _num(self.scene.data[f"bt_{ch}"].values[row, col])
        return out


def compact_scene(scene):
    """Large scenes (lean mode): hold the lat/lon grids as float32 where that loses nothing.

    They are only shown and exported (as float32), so narrowing them changes no result and
    saves 8 bytes per pixel (256 MB at 4000 × 4000). The scene's data variables stay float64:
    the pipeline computes with them directly, and float32 inputs would change its arithmetic
    (measured: cloud optical-depth uncertainties moved by up to 0.03). Small scenes are left
    alone. Idempotent; the dashboard shares a scene between sessions, which is safe because
    the values do not change.
    """
    ds = scene.data
    if ds.sizes.get("y", 0) * ds.sizes.get("x", 0) <= pl.LEVELS_PIXEL_LIMIT:
        return scene
    for name in [c for c in ("lat", "lon") if c in ds.coords]:
        v = ds[name]
        if v.dtype != np.float64:
            continue
        narrow = v.values.astype(np.float32)
        if np.array_equal(narrow.astype(np.float64), v.values, equal_nan=True):
            ds.coords[name] = (v.dims, narrow, v.attrs)
    return scene


def _median_over(values, valid):
    """Median of a (y, x) threshold over valid pixels, as a 0-d array (lean mode)."""
    v = np.broadcast_to(np.asarray(values, float), valid.shape)[valid]
    return np.asarray(np.nanmedian(v) if v.size and np.isfinite(v).any() else np.nan)


def _cloud_f32(cloud):
    """The cloud layer with its float arrays in float32 (what the exports write), except the
    top pressure: the inspector's BT–τ curve is drawn at it and stays the normal model's."""
    f = lambda a: np.asarray(a).astype(np.float32) if np.asarray(a).dtype.kind == "f" else a  # noqa: E731
    return pl.CloudLayer(f(cloud.emissivity), f(cloud.optical_depth), f(cloud.optical_depth_sigma),
                         f(cloud.extinction_optical_depth), cloud.top_pressure, f(cloud.top_temperature),
                         cloud.status, cloud.uncertain, cloud.channels, cloud.method, list(cloud.notes))


def _num(v):
    v = float(v)
    return v if np.isfinite(v) else None


class _NoJournal:
    """Stand-in when edits are switched off (CLI --no-edits)."""

    problems = []

    def active(self):
        return []

    def listing(self):
        return []


class _Pending:
    pass


_PENDING = _Pending()
