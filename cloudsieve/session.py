"""One screened scene and its settings: the headless session the CLI and the dashboard drive.

:class:`Session` holds the scene, the configuration (the settings an analyst tunes live in it),
the pipeline's stage results and the QA journal. In three lines::

    s = Session.open("scene.nc")          # read, check, simulate, screen, invert
    s.set_threshold("texture", 1.2)       # retune: only the screening runs again
    s.write("mask.nc")                    # the same file `cloudsieve screen` writes

Costs: opening a scene runs the clear-sky simulation once. Changing a threshold, switching a
test or the bias removal re-runs only the screening (2-D arithmetic); changing the cloud-top
choice re-runs the inversion (per pixel, no new simulation). The dashboard's param model
(:mod:`dashboard.model`) wraps one Session per browser session.
"""
import copy
import json
import tempfile
import time
from pathlib import Path

import numpy as np

from physics import cloud as pcloud

from .codes import CLASS_NAMES, CLEAR, CLOUD, EDIT_CODES, MARGINAL, SURFACES, per_surface
from .config import TOP_METHODS, TOP_PRESSURE_RANGE, load_config
from .export import result_dataset, write_result
from .invert import PHASE_NAMES, PHASE_WORDS, bias_close, invert_all, inversion_bias, phase_beta
from .journal import Journal, StaleEditsError, journal_path
from .registry import REGISTRY, bit_table
from .scene import load_scene
from .truth import read_truth, skill
from .screen import edits_grid, screen_scene, summary_row
from . import simulate as simulation

#: Where the cloud inversion runs: every valid pixel once (the dashboard, so that retuning
#: never waits for it) or only the pixels the screening flags.
INVERT_SCOPES = ("all", "flagged")


class RepeatedEdit(ValueError):
    """A QA edit that would change nothing: the edits in force already give its outcome."""


class Session:
    """A screened scene with tunable settings, QA edits and exports.

    Parameters
    ----------
    scene : cloudsieve.scene.Scene
    config : dict, optional
        Configuration (the defaults when omitted); copied, the session's settings change the copy.
    journal : Journal or None or bool
        The QA journal: ``True`` (default) opens the one beside the scene file, ``False`` or
        ``None`` applies no edits (and refuses new ones), a Journal is used as given.
    sim : simulate.Simulation, optional
        A simulation of this scene under this configuration to reuse (the dashboard shares
        one per file between browser sessions); computed when omitted.
    invert_scope : {"all", "flagged"}
        Which pixels the cloud layer is inverted for. "all" (default): every pixel once per
        cloud settings and clear-sky bias, when it is first flagged (marginal or cloud) — a
        retune that flags a few more pixels inverts just those, and one that unflags pixels
        keeps theirs for later. "flagged": the flagged set again whenever it changes.
    """

    def __init__(self, scene, config=None, journal=True, sim=None, invert_scope="all"):
        if invert_scope not in INVERT_SCOPES:
            raise ValueError(f"invert_scope must be one of {INVERT_SCOPES}")
        compact_scene(scene)
        self.scene = scene
        self.config = copy.deepcopy(config) if config is not None else load_config()
        self.invert_scope = invert_scope
        n = scene.data.sizes["y"] * scene.data.sizes["x"]
        if journal is True:
            journal = Journal(journal_path(scene.path), n) if scene.path is not None else None
        self.journal = journal or None
        self.problems = list(self.journal.problems) if self.journal is not None else []
        self.sim = sim if sim is not None else simulation.simulate(scene, self.config)
        #: the scene's truth file where one lies beside it (truth.read_truth), else None
        self.truth = read_truth(scene.path, (scene.data.sizes["y"], scene.data.sizes["x"]))
        #: large scene: no level data kept (simulate.LEVELS_PIXEL_LIMIT); results held in float32
        self.lean = self.sim.level_pressure is None
        self._cloud = None
        self._cloud_key = None
        self._inverted = None  # (y, x) bool: pixels the cloud layer holds under _cloud_key
        self._inv_bias = None
        self._screen_cache = {}  # threshold-independent screening arrays of this scene (screen.screen_scene)
        self._shown_latest_edit = None
        self.result = None
        self.timings = {"simulate_s": self.sim.seconds}
        self.update()

    @classmethod
    def open(cls, path, config=None, journal=True, invert_scope="all"):
        """Load, validate and simulate a scene file (raises SceneError with the report)."""
        cfg = config if config is not None else load_config()
        return cls(load_scene(path, config=cfg), cfg, journal=journal, invert_scope=invert_scope)

    # ------------------------------------------------------------------ settings
    @property
    def cloud_top(self):
        return self.config["cloud"]["top"]

    @property
    def top_pressure(self):
        return float(self.config["cloud"]["top_pressure"])

    @property
    def remove_bias(self):
        return bool(self.config["bias"]["remove"])

    @property
    def marginal_fraction(self):
        return float(self.config["screening"]["marginal_fraction"])

    def configure(self, cloud_top=None, top_pressure=None, remove_bias=None, marginal_fraction=None):
        """Change any of the tunable settings at once, then rescreen (once).

        Parameters
        ----------
        cloud_top : {"fixed", "opaque", "consistent"}, optional
        top_pressure : float, optional
            Fixed cloud-top pressure [hPa]; replaces a configured ``[cloud] top_height`` (the
            analyst chose a pressure).
        remove_bias : bool, optional
        marginal_fraction : float, optional
            Marginal band as a fraction of each test's threshold [1].
        """
        cc = self.config["cloud"]
        lo, hi = TOP_PRESSURE_RANGE
        if cloud_top is not None and cloud_top not in TOP_METHODS:
            raise ValueError(f"cloud_top must be one of {', '.join(TOP_METHODS)}")
        if top_pressure is not None and not lo <= float(top_pressure) <= hi:
            raise ValueError(f"top_pressure must lie within {lo:g}–{hi:g} hPa")
        if marginal_fraction is not None and not 0.0 <= float(marginal_fraction) <= 1.0:
            raise ValueError("marginal_fraction must lie within 0–1")
        if cloud_top is not None:
            cc["top"] = cloud_top
        if top_pressure is not None:
            cc["top_pressure"] = float(top_pressure)
            cc.pop("top_height", None)
        if remove_bias is not None:
            self.config["bias"]["remove"] = bool(remove_bias)
        if marginal_fraction is not None:
            self.config["screening"]["marginal_fraction"] = float(marginal_fraction)
        self.update()

    #: the parts of a configuration the session can take without a new clear-sky simulation
    TUNABLE = ("tests", "bias", "cloud", "screening.marginal_fraction")

    def apply_settings(self, config):
        """Take the tunable parts of a full configuration (``TUNABLE``: tests, bias removal, cloud
        layer, marginal band) and rescreen; returns the other top-level sections that differ from this
        session's and were not applied (they change the clear-sky simulation: give the file to
        ``cloudsieve screen --config`` or to ``cloudsieve serve --config``)."""
        new = copy.deepcopy(self.config)
        for key in ("tests", "bias", "cloud"):
            new[key] = copy.deepcopy(config[key])
        new["screening"]["marginal_fraction"] = float(config["screening"]["marginal_fraction"])
        ignored = sorted(k for k in config if k not in ("tests", "bias", "cloud") and config[k] != new.get(k))
        self.config = new
        self.update()
        return ignored

    def threshold(self, test, surface="sea"):
        """The tunable threshold of ``test`` for a surface type [its unit in the registry]."""
        return float(self.config["tests"][test][REGISTRY[test].tunable.key][surface])

    def enabled(self, test):
        return bool(self.config["tests"][test]["enabled"])

    def set_threshold(self, test, value, surface=None):
        """Set a test's threshold for one surface type (or all) and rescreen."""
        spec = REGISTRY[test].tunable
        if not np.isfinite(value) or value < 0:
            raise ValueError(f"threshold of {test} must be a number ≥ 0")
        for s in ([surface] if surface else SURFACES):
            self.config["tests"][test][spec.key][s] = float(value)
        self.update()

    def set_enabled(self, test, on):
        """Switch a test on or off and rescreen."""
        self.config["tests"][test]["enabled"] = bool(on)
        self.update()

    # ------------------------------------------------------------------ computing
    def _cloud_layer(self, cfg, mask, bias=None, exact=False):
        flagged = (mask == CLOUD) | (mask == MARGINAL)
        cc = cfg["cloud"]
        # the bias the inversion adds back: kept while the fit moves by less than 0.1 K (a retune
        # moves it a little; re-running the inversion for that would cost seconds for nothing)
        inv_bias = inversion_bias(bias)
        if not exact and bias_close(self._inv_bias, inv_bias):
            inv_bias = self._inv_bias
        self._inv_bias = inv_bias
        key = (json.dumps(cc, sort_keys=True, default=str), json.dumps(inv_bias, sort_keys=True))
        if self.invert_scope == "flagged":
            key += (hash(np.packbits(flagged).tobytes()),)
        if key != self._cloud_key:  # new cloud settings or bias: nothing inverted is valid any more
            self._cloud, self._inverted = None, np.zeros(mask.shape, bool)
        # "all": each pixel is inverted once per cloud settings and bias, when it is first flagged
        # (retunes that flag a few more pixels invert just those); "flagged": the flagged set anew
        todo = flagged & ~self._inverted
        if self._cloud is None or todo.any():
            t0 = time.perf_counter()
            into = None if self._cloud is None or self.lean else self._cloud
            layer = invert_all(self.scene, self.sim, cfg, self.sim.sigma, only=todo, into=into, bias=inv_bias,
                               column_simulator=simulation.ColumnSimulator(self.scene, cfg) if self.lean else None)
            if self.lean:  # float32 layer: the new pixels written into the kept one
                layer = layer.as_float32()
                if self._cloud is not None:
                    layer = _merged(self._cloud, layer, todo)
            self._cloud = layer
            self._inverted |= todo
            self._cloud_key = key
            self.timings["invert_s"] = time.perf_counter() - t0
            self.timings["invert_pixels"] = int(todo.sum())
        return self._cloud

    def edits(self):
        """The QA edits in force (none without a journal)."""
        return self.journal.active() if self.journal is not None else []

    def update(self):
        """Screen again under the current settings and edits (the inversion only if its inputs changed)."""
        t0 = time.perf_counter()
        cfg = self.config
        edits = self.edits()
        self._shown_latest_edit = edits[-1]["id"] if edits else None
        res = screen_scene(self.scene, self.sim, cfg, edits=edits, cache=self._screen_cache)
        res.cloud = self._cloud_layer(cfg, res.mask, self._applied_bias(res)).masked(res.mask)
        if self.lean:  # exports write float32 anyway; the departures and σ stay shared with the cache
            res.margins = {t: m.astype(np.float32) for t, m in res.margins.items()}
            # the dashboard shows each threshold as its median over valid pixels: keep just that
            valid = self.scene.data["valid"].values
            res.thresholds = {t: _median_over(v, valid) for t, v in res.thresholds.items()}
        self.result = res
        self.timings["screen_s"] = time.perf_counter() - t0
        return res

    # ------------------------------------------------------------------ QA edits
    def _journal_or_fail(self):
        if self.journal is None:
            raise ValueError("this session applies no QA edits (opened without a journal)")
        return self.journal

    def mark(self, action, index):
        """Record a QA edit (clear / cloud / reset) of flat pixel indices, then rescreen.

        Raises :class:`RepeatedEdit` (nothing recorded) when the edits in force already give every
        one of the pixels this outcome: a second identical edit would only lengthen the journal.
        """
        journal = self._journal_or_fail()
        idx = np.unique(np.asarray(index, dtype=np.int64).ravel())
        if action in EDIT_CODES and idx.size:
            shape = self.result.mask.shape
            current = edits_grid(shape, self.edits()).ravel()
            ok = (idx >= 0) & (idx < current.size)
            if ok.all() and np.all(current[idx] == EDIT_CODES[action]):
                word = {"clear": "marked clear", "cloud": "marked cloud", "reset": "without an edit"}[action]
                raise RepeatedEdit(f"all {idx.size:,} selected pixel(s) are already {word} by the edits in force; "
                                   "nothing added")
        entry = journal.add(action, index)
        self.update()
        return entry

    def undo(self):
        """Undo the latest edit in force — the one this session last showed. If another session
        changed the scene's edits meanwhile, rescreen with them and raise StaleEditsError
        (nothing undone)."""
        try:
            entry = self._journal_or_fail().undo(check_latest=True, latest=self._shown_latest_edit)
        except StaleEditsError:
            self.update()
            raise
        self.update()
        return entry

    def edit_listing(self):
        return self.journal.listing() if self.journal is not None else []

    def truth_skill(self):
        """The current mask's :class:`truth.Skill` against the scene's truth file, or None without one."""
        return skill(self.result.mask, self.truth) if self.truth is not None else None

    def edit_places(self):
        """The edits in force, newest first, with where they are: dicts of id, time, action, count and
        the scene's row and column ranges of their pixels (its ``row``/``col`` labels)."""
        if self.journal is None:
            return []
        ds = self.scene.data
        rows, cols = ds["row"].values, ds["col"].values
        nx = ds.sizes["x"]
        out = []
        for e in reversed(self.journal.active()):
            idx = np.asarray(e.get("index", []), dtype=np.int64)
            place = {"id": e["id"], "time": e["time"], "action": e["action"], "count": e["count"],
                     "rows": None, "cols": None}
            if idx.size:
                r, c = rows[idx // nx], cols[idx % nx]
                place["rows"], place["cols"] = (int(r.min()), int(r.max())), (int(c.min()), int(c.max()))
            out.append(place)
        return out

    def label_scores(self):
        """Each test's hit rate and false-alarm rate against the analyst's labels.

        Pixels the analyst marked cloud are positives, those marked clear negatives.
        Hit rate = fired on marked-cloud / marked-cloud; false-alarm rate = fired on
        marked-clear / marked-clear. Returns dict test -> (hit_rate, false_alarm_rate,
        n_cloud, n_clear); rates are NaN without labels of that kind.
        """
        codes = edits_grid(self.result.mask.shape, self.edits())
        pos, neg = codes == EDIT_CODES["cloud"], codes == EDIT_CODES["clear"]
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

    @staticmethod
    def _applied_bias(res):
        applied = all(b.get("applied") for b in res.bias.values()) if res.bias else False
        return res.bias if applied else None

    def _exact_cloud(self):
        """Before an export: the cloud layer with the current bias fit (the maps may show one up to
        0.1 K older while retuning, invert.bias_close), so that a download equals a batch run."""
        res = self.result
        if inversion_bias(self._applied_bias(res)) != self._inv_bias:
            res.cloud = self._cloud_layer(self.config, res.mask, self._applied_bias(res), exact=True).masked(res.mask)

    def result_dataset(self, action="screen"):
        self._exact_cloud()
        return result_dataset(self.scene, self.sim, self.result, self.config, self.edits(), action)

    def export_bytes(self, fmt):
        """The CSV or NetCDF file of the current result, as bytes (for downloads)."""
        n_edits = len(self.edits())
        ds = self.result_dataset(action=f"dashboard export ({n_edits} QA edit{'s' if n_edits != 1 else ''} in force)")
        suffix = ".nc" if fmt == "netcdf" else ".csv"
        with tempfile.TemporaryDirectory() as tmp:
            path = Path(tmp) / f"{self.scene.name}_mask{suffix}"
            write_result(ds, path, fmt)
            return path.read_bytes()

    def write(self, path, fmt=None):
        return write_result(self.result_dataset(), path, fmt)

    def summary(self):
        """The summary row of the current result (scene, pixels, class fractions, bias, notes)."""
        r = self.result
        return summary_row(self.scene.name, r.mask.size, r.counts, r.bias, r.skipped,
                           r.notes + (r.cloud.notes if r.cloud else []))

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
            obs, clear, dep = (float(ds[f"bt_{ch}"].values[row, col]), float(self.sim.bt_clear[i, row, col]),
                               float(res.departure[ch][row, col]))
            channels[ch] = {"observed": _num(obs), "clear": _num(clear), "departure": _num(dep),
                            "bias_removed": _num(obs - clear - dep), "sigma": _num(self.sim.sigma[ch][row, col])}
        margins = {t: _num(m[row, col]) for t, m in res.margins.items()}
        cl = res.cloud
        status = pcloud.STATUS_NAMES[int(cl.status[row, col])]
        phase = PHASE_NAMES[int(cl.phase[row, col])]
        cloud = {"status": status, "status_words": pcloud.STATUS_WORDS[status],
                 "phase": phase, "phase_words": PHASE_WORDS[phase],
                 "beta": dict(zip(cl.channels, cl.beta[phase])) if phase in cl.beta else None,
                 "top_pressure_sigma": _num(cl.top_pressure_sigma[row, col]),
                 "optical_depth": _num(cl.optical_depth[row, col]),
                 "optical_depth_sigma": _num(cl.optical_depth_sigma[row, col]),
                 "extinction_optical_depth": _num(cl.extinction_optical_depth[row, col]),
                 "top_pressure": _num(cl.top_pressure[row, col]),
                 "top_temperature": _num(cl.top_temperature[row, col]),
                 "emissivity": {c: _num(cl.emissivity[k, row, col]) for k, c in enumerate(cl.channels)}}
        bits = int(res.bits[row, col])
        return {"row": int(ds["row"].values[row]), "col": int(ds["col"].values[col]), "y": row, "x": col,
                "flat": flat, "class": CLASS_NAMES[int(res.mask[row, col])],
                "tests_fired": [b for b, v in bit_table().items() if bits & v],
                "inputs": inputs, "channels": channels, "margins": margins, "cloud": cloud,
                "curve": self.optical_depth_curve(row, col)}

    def error_budget(self, row, col):
        """The clear-sky error budget of one pixel (cloudsieve.uncertainty), for the inspector.

        Returns dict with "components" (name -> label, σ of the input, unit), per channel the
        contribution of each component [K] (and "emissivity_contrast", the emissivity error that
        differs between channels), the noise [K] and the total σ [K], the dominant component,
        the σ of T11 − T12 [K] (None without both channels), "differences" ("a-b" -> σ [K] of
        each channel difference a test uses) and "screening" (channel or "a-b" -> the σ the
        tests used, evaluated at the pixel's bin of background state); None for a pixel
        without data.
        """
        from .simulate import gather_columns, surface_emissivity
        from .uncertainty import COMPONENTS, error_budget

        ny, nx = self.result.mask.shape
        flat = row * nx + col
        fields = simulation.scene_fields(self.scene.data)
        if not fields["valid"].ravel()[flat]:
            return None
        chset = self.sim.chset
        idx = np.array([flat])
        cols = gather_columns(fields, surface_emissivity(fields, chset, self.config), idx)
        b = error_budget(cols, chset, self.config, fields["surface"].ravel()[idx])
        labels = {key: (label, unit) for key, label, unit, _ in COMPONENTS}
        surface = fields["surface"].ravel()[idx]
        out = {"components": {k: (labels[k][0], float(b.input_sigma[0, j]), labels[k][1])
                              for j, k in enumerate(b.components)},
               "channels": {}, "split_window": None if b.split_window is None else float(b.split_window[0]),
               "differences": {k: float(v[0]) for k, v in b.difference.items()}}
        out["components"]["emissivity_contrast"] = (
            "emissivity, differing between channels",
            float(per_surface(self.config["background_errors"]["emissivity_contrast"], surface)[0]), "1")
        screening = {}
        for name, grid in (self.sim.sigma or {}).items():
            if ":" not in name:
                screening[name] = float(grid[row, col])
        out["screening"] = screening
        for i, ch in enumerate(b.channels):
            contrib = {k: float(b.contribution[0, i, j]) for j, k in enumerate(b.components)}
            contrib["emissivity_contrast"] = float(b.contrast[0, i])
            parts = dict(contrib, noise=float(b.noise[0, i]))
            out["channels"][ch] = {"contribution": contrib, "noise": float(b.noise[0, i]),
                                   "total": float(b.total[0, i]), "dominant": max(parts, key=parts.get)}
        return out

    def optical_depth_curve(self, row, col, taus=None):
        """Modelled brightness temperature against cloud optical depth at the pixel's top.

        Uses the single-layer forward model (physics.cloud.cloud_radiance) with the clear-sky
        and opaque-level radiances of the simulation and the absorption ratios β of the
        pixel's retrieved phase (grey where none), at the retrieved top pressure, or at the
        reference (``top_pressure``) one for a clear pixel. τ is the reference channel's. Returns dict
        with "tau", per channel modelled BT [K], and the observed BT per channel.
        """
        ny, nx = self.result.mask.shape
        flat = row * nx + col
        pos = np.searchsorted(self.sim.valid_index, flat)
        if pos >= self.sim.valid_index.size or self.sim.valid_index[pos] != flat:
            return None
        taus = np.concatenate([[0.0], np.geomspace(0.01, 20.0, 60)]) if taus is None else np.asarray(taus)
        p_top = self.result.cloud.top_pressure[row, col]
        if not np.isfinite(p_top) and self.result.mask[row, col] != CLEAR and self._cloud is not None:
            p_top = self._cloud.top_pressure[row, col]
        if not np.isfinite(p_top):
            # a clear pixel has no retrieved top (a top fitted to its small departure would sit
            # near the surface and show a flat curve): show a cloud at the reference top
            p_top = self.top_pressure
        if self.sim.level_pressure is not None:
            lp = self.sim.level_pressure[pos].astype(float)
            opq_levels = self.sim.opaque_radiance[pos].astype(float)
        else:  # large scene: simulate this one column again, with its levels
            lp, _, opq_levels = simulation.ColumnSimulator(self.scene, self.config).levels(np.array([flat]))
            lp, opq_levels = lp[0].astype(float), opq_levels[0].astype(float)
        opq = pcloud.interpolate_levels(lp, opq_levels, p_top)
        clr = self.sim.clear_radiance[pos].astype(float)
        mu = np.cos(np.deg2rad(float(self.scene.data["sat_zenith"].values[row, col])))
        cl = self._cloud if self._cloud is not None else self.result.cloud
        phase = PHASE_NAMES[int(cl.phase[row, col])] if cl is not None else "none"
        beta = phase_beta(phase if phase in ("ice", "water") else "grey", tuple(self.sim.channels), self.config)
        out = {"tau": taus.tolist(), "top_pressure": float(p_top), "phase": phase, "model": {}, "observed": {}}
        for i, ch in enumerate(self.sim.channels):
            chan = self.sim.channel_objects[i]
            rad = pcloud.cloud_radiance(clr[i:i + 1], opq[i:i + 1], taus, mu, beta[i:i + 1])[..., 0]
            out["model"][ch] = chan.brightness_temperature(rad).tolist()
            out["observed"][ch] = _num(self.scene.data[f"bt_{ch}"].values[row, col])
        return out



def _merged(kept, new, where):
    """Cloud layer ``kept`` with the pixels ``where`` (y, x) taken from ``new`` (same shape and settings)."""
    for name in ("optical_depth", "optical_depth_sigma", "extinction_optical_depth", "top_pressure",
                 "top_pressure_sigma", "top_temperature", "status", "phase", "uncertain"):
        getattr(kept, name)[where] = getattr(new, name)[where]
    kept.emissivity[:, where] = new.emissivity[:, where]
    return kept


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
    if ds.sizes.get("y", 0) * ds.sizes.get("x", 0) <= simulation.LEVELS_PIXEL_LIMIT:
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


def _num(v):
    v = float(v)
    return v if np.isfinite(v) else None
