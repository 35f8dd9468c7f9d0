"""Single-layer cloud inversion of scene pixels: the per-pixel core and its gather/scatter.

:func:`invert_columns` inverts a set of pixel columns (physics.cloud.invert_cloud under the
``[cloud]`` settings: top choice, phase and its absorption ratios β, then the phase's
similarity relation for the extinction optical depth). :func:`invert_pixels` is the one gather/scatter around it: it takes the pixels'
observed and clear-sky brightness temperatures from (y, x) grids (a whole scene or a block of
rows), inverts them and writes the results into a :class:`CloudLayer`. The dashboard's
:func:`invert_all` and the block pipeline (:mod:`cloudsieve.batch`) both call it.
"""
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, replace
from typing import NamedTuple

import numpy as np

from physics import cloud as pcloud
from physics.atmosphere import geopotential_height

from .codes import CLOUD, MARGINAL
from .simulate import level_chunk
from .uncertainty import clear_correlation, clear_part, noise_radiance


#: Phase codes of the cloud layer (``CloudLayer.phase``)
PHASE_NONE, PHASE_ICE, PHASE_WATER, PHASE_GREY = 0, 1, 2, 3
PHASE_NAMES = ("none", "ice", "water", "grey")
PHASE_WORDS = {"none": "no cloud retrieved", "ice": "ice (β of the configured ice optics)",
               "water": "water (β of droplet optics)",
               "grey": "grey (β = 1 in every channel: large ice crystals, or phase = grey configured)"}


@dataclass
class CloudLayer:
    """Single-layer cloud retrieval on a grid (NaN and status ``not_cloudy`` where not inverted).

    emissivity : (n_inv, y, x) per inversion channel, unclipped [1]
    optical_depth, optical_depth_sigma : (y, x) absorption optical depth (reference channel) and its 1-σ [1]
    extinction_optical_depth : (y, x) [1]
    top_pressure, top_pressure_sigma [hPa], top_temperature [K] : (y, x)
    status : (y, x) int8 (physics.cloud.STATUS_NAMES)
    phase : (y, x) int8 (PHASE_NAMES): the optics the pixel was retrieved with
    uncertain : (y, x) bool, relative optical-depth uncertainty > 100 %
    channels : inversion channel names
    method : cloud-top choice configured
    beta : {phase name: (β per inversion channel)} the absorption ratios used
    notes : notes for the user (fallbacks)
    """

    emissivity: np.ndarray
    optical_depth: np.ndarray
    optical_depth_sigma: np.ndarray
    extinction_optical_depth: np.ndarray
    top_pressure: np.ndarray
    top_pressure_sigma: np.ndarray
    top_temperature: np.ndarray
    status: np.ndarray
    phase: np.ndarray
    uncertain: np.ndarray
    channels: tuple
    method: str
    beta: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)

    FIELDS = ("optical_depth", "optical_depth_sigma", "extinction_optical_depth", "top_pressure",
              "top_pressure_sigma", "top_temperature")

    @classmethod
    def empty(cls, shape, channels, method, beta=None):
        """A layer of ``shape`` (y, x) with nothing inverted yet."""
        nan = lambda: np.full(shape, np.nan)  # noqa: E731
        return cls(np.full((len(channels),) + tuple(shape), np.nan), nan(), nan(), nan(), nan(), nan(), nan(),
                   np.full(shape, pcloud.STATUS_NOT_CLOUDY, np.int8), np.zeros(shape, np.int8),
                   np.zeros(shape, bool), tuple(channels), method, dict(beta or {}))

    def put(self, flat_index, res):
        """Write a :class:`ColumnInversion` of pixels ``flat_index`` (flat (y, x) indices) into the layer."""
        n_inv = self.emissivity.shape[0]
        self.emissivity.reshape(n_inv, -1)[:, flat_index] = res.emissivity.T
        for name in self.FIELDS:
            getattr(self, name).reshape(-1)[flat_index] = getattr(res, name)
        self.status.reshape(-1)[flat_index] = res.status
        self.phase.reshape(-1)[flat_index] = res.phase
        self.uncertain.reshape(-1)[flat_index] = res.uncertain

    def masked(self, mask):
        """The layer restricted to pixels classed marginal or cloud (others: not_cloudy, NaN)."""
        keep = (mask == CLOUD) | (mask == MARGINAL)
        nan = lambda a: np.where(keep, a, np.nan)  # noqa: E731
        return replace(self, emissivity=np.where(keep[None], self.emissivity, np.nan),
                       **{name: nan(getattr(self, name)) for name in self.FIELDS},
                       status=np.where(keep, self.status, pcloud.STATUS_NOT_CLOUDY).astype(np.int8),
                       phase=np.where(keep, self.phase, PHASE_NONE).astype(np.int8),
                       uncertain=keep & self.uncertain, beta=dict(self.beta), notes=list(self.notes))

    def as_float32(self):
        """Float fields in float32 (what the exports write), except the top pressure: the
        inspector's BT–τ curve is drawn at it and stays the normal model's."""
        f = lambda a: np.asarray(a).astype(np.float32)  # noqa: E731
        return replace(self, emissivity=f(self.emissivity),
                       **{n: f(getattr(self, n)) for n in self.FIELDS if n != "top_pressure"})


@dataclass
class ColumnInversion:
    """Single-layer cloud inversion of n pixel columns.

    emissivity : (n, n_inv) [1]; optical_depth, optical_depth_sigma, extinction_optical_depth [1],
    top_pressure, top_pressure_sigma [hPa], top_temperature [K] : (n,); status, phase : (n,) int8;
    uncertain : (n,) bool
    """

    emissivity: np.ndarray
    optical_depth: np.ndarray
    optical_depth_sigma: np.ndarray
    extinction_optical_depth: np.ndarray
    top_pressure: np.ndarray
    top_pressure_sigma: np.ndarray
    top_temperature: np.ndarray
    status: np.ndarray
    phase: np.ndarray
    uncertain: np.ndarray


def inversion_channels(channels, config):
    """The channels the inversion uses: ``[cloud] channels`` present in the scene, else every
    channel but 3.9 µm (reflected sunlight by day), else all."""
    wanted = [c for c in config["cloud"]["channels"] if c in channels]
    if not wanted:
        wanted = [c for c in channels if c != "3p9um"] or list(channels)
    return tuple(wanted)


def _fixed_top(cc, lp, lt, n):
    """Cloud-top pressure [hPa] of the fixed choice: ``top_height`` [km above the surface]
    interpolated in log-pressure on the pixel's geopotential heights, else ``top_pressure``."""
    if "top_height" not in cc:
        return np.full(n, cc["top_pressure"])
    z = geopotential_height(lp, lt)
    target = cc["top_height"] * 1000.0 + z[:, 0]
    k = np.clip(np.sum(z <= target[:, None], axis=-1) - 1, 0, lp.shape[1] - 2)
    at = lambda a, j: np.take_along_axis(a, j[:, None], -1)[:, 0]  # noqa: E731
    z0, z1, p0, p1 = at(z, k), at(z, k + 1), at(lp, k), at(lp, k + 1)
    w = np.clip((target - z0) / (z1 - z0), 0, 1)
    return np.exp(np.log(p0) + w * (np.log(p1) - np.log(p0)))


def reference_index(inv, config):
    """Index in ``inv`` of the channel that places the opaque top and carries β = 1."""
    ref = config["cloud"]["reference_channel"]
    return inv.index(ref) if ref in inv else 0


def phase_beta(phase, inv, config):
    """Absorption ratios β = τ_ch/τ_ref of ``phase`` ("ice", "water" or "grey") for channels ``inv``:
    ``[cloud.optics.<phase>] beta`` relative to the reference channel (a channel without a value: 1)."""
    n = len(inv)
    if phase == "grey":
        return np.ones(n)
    table = config["cloud"]["optics"][phase].get("beta", {})
    ref = inv[reference_index(inv, config)]
    ref_beta = float(table.get(ref, 1.0))
    return np.array([float(table.get(c, 1.0)) / ref_beta for c in inv])


def layer_beta(inv, config):
    """{phase name: β tuple} of the phases the configuration may retrieve with."""
    phase = config["cloud"]["phase"]
    phases = ("ice", "water", "grey") if phase == "auto" else (phase,)
    return {p: tuple(float(b) for b in phase_beta(p, inv, config)) for p in phases}


def inversion_notes(inv, config):
    """Notes on the cloud-top choice and phase a scene with inversion channels ``inv`` falls back to."""
    cc = config["cloud"]
    notes = []
    if cc["reference_channel"] not in inv:
        notes.append(f"reference channel {cc['reference_channel']} absent: {inv[0]} places the opaque top")
    if cc["top"] == "consistent" and len(inv) < 2:
        notes.append(f"one inversion channel ({inv[0]}) cannot fix a cloud top: every cloudy pixel gets the assumed "
                     f"top of {cc['assumed_top_pressure']:g} hPa (status top_assumed)")
    if cc["phase"] in ("ice", "water", "auto"):
        phases = ("ice", "water") if cc["phase"] == "auto" else (cc["phase"],)
        for p in phases:
            missing = [c for c in inv if c != inv[reference_index(inv, config)]
                       and c not in cc["optics"][p].get("beta", {})]
            if missing:
                notes.append(f"no {p} absorption ratio for {', '.join(missing)} in [cloud.optics.{p}] beta: "
                             "taken as 1 (grey) there")
    return notes


class _Candidate(NamedTuple):
    """A cloud top of one phase's optics, with what the phase choice reads."""

    top: pcloud.CloudTop
    top_temperature: np.ndarray  # [K]
    chi2: np.ndarray  # [1]


def _tops(phases, obs, clr, lp, lt, opq, mu, s_obs, s_clr, top_limit, fixed, inv, config, corr):
    """The cloud top of each phase's optics (physics.cloud.cloud_tops: one call, compiled where
    the physics kernels run), as :class:`_Candidate` s in the order of ``phases``."""
    cc = config["cloud"]
    tops = pcloud.cloud_tops(
        obs, clr, opq, lp, lt, s_obs, s_clr, [phase_beta(p, inv, config) for p in phases], method=cc["top"],
        fixed_pressure=fixed, reference=reference_index(inv, config), top_limit=top_limit,
        assumed_pressure=cc["assumed_top_pressure"], max_sigma_pressure=cc["max_sigma_pressure"],
        clear_correlation=corr, compiled=None)
    return [_Candidate(top, t_top, top.chi2) for top, t_top in tops]


def _where(cond, a, b):
    """Field-wise choice between two candidates (or CloudRetrievals) of the same pixels."""
    if isinstance(a, _Candidate):
        return _Candidate(_where(cond, a.top, b.top), np.where(cond, a.top_temperature, b.top_temperature),
                          np.where(cond, a.chi2, b.chi2))
    return type(a)(*(np.where(cond.reshape(cond.shape + (1,) * (x.ndim - 1)), x, y) for x, y in zip(a, b)))


def _take_rows(c, rows):
    return _Candidate(pcloud.CloudTop(*(f[rows] for f in c.top)), c.top_temperature[rows], c.chi2[rows])


def _put_rows(c, rows, part):
    """A copy of candidate ``c`` with ``rows`` replaced by ``part``."""
    top = pcloud.CloudTop(*(f.copy() for f in c.top))
    for f, g in zip(top, part.top):
        f[rows] = g
    tt, chi = c.top_temperature.copy(), c.chi2.copy()
    tt[rows], chi[rows] = part.top_temperature, part.chi2
    return _Candidate(top, tt, chi)


def choose_phase(ice, water, night_contrast, config):
    """Per pixel, True where the ice retrieval is taken over the water one (``[cloud] phase = "auto"``).

    Rules, in order: a top colder than ``ice_below`` in the ice retrieval → ice (no water cloud is
    that cold: droplets freeze homogeneously near 235 K, common practice; :func:`invert_columns`
    then skips the water retrieval); a top warmer than ``water_above`` in the water retrieval →
    water (both or neither: go on); at night, a 3.9 µm
    departure below the 11 µm one by more than ``night_water_contrast`` → water (droplets absorb
    less at 3.9 µm than at 11 µm, so a water cloud looks colder there at night: common practice
    of night fog and low-cloud detection); else the phase whose channels fit better (lower χ²);
    else the ice retrieval's top temperature below the middle of the two limits → ice.
    """
    cc = config["cloud"]
    cold = ice.top_temperature <= cc["ice_below"]
    warm = water.top_temperature >= cc["water_above"]
    undecided = cold == warm
    nc = np.asarray(night_contrast, dtype=float)
    night_water = np.isfinite(nc) & (nc < -cc["night_water_contrast"])
    chi_i = np.where(np.isfinite(ice.chi2), ice.chi2, np.inf)
    chi_w = np.where(np.isfinite(water.chi2), water.chi2, np.inf)
    by_fit = chi_i != chi_w
    middle = 0.5 * (cc["ice_below"] + cc["water_above"])
    pick = np.where(by_fit, chi_i < chi_w, ice.top_temperature < middle)
    pick = np.where(night_water, False, pick)
    return np.where(undecided, pick, cold)


def invert_columns(obs_bt, clr_bt, level_pressure, level_temperature, opaque, sat_zenith, sigma_clear, chans, inv,
                   config, night_contrast=None, clear_correlation=None):
    """Single-layer cloud inversion of a set of pixel columns.

    Parameters
    ----------
    obs_bt, clr_bt : (n, n_inv) observed and clear-sky brightness temperatures [K]
    level_pressure, level_temperature : (n, n_levels) [hPa], [K]
    opaque : (n, n_levels, n_inv) opaque-level radiances [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹]
    sat_zenith : (n,) [deg]
    sigma_clear : (n,) or (n, n_inv) clear-sky 1-σ [K] without the instrument noise (one for every
        channel, or per channel; uncertainty.clear_part)
    chans : physics Channels of the inversion channels; inv : their names
    config : dict (``[cloud]``; fallbacks: :func:`inversion_notes`)
    night_contrast : (n,), optional
        (obs − clear) at 3.9 µm minus that at 11 µm [K] where it is night, NaN elsewhere (the
        phase choice, :func:`choose_phase`).
    clear_correlation : (n, n_inv, n_inv), optional
        Correlation of the clear-sky errors between the channels (uncertainty.clear_correlation);
        None: independent.

    Returns
    -------
    ColumnInversion
    """
    cc = config["cloud"]
    n_blk = obs_bt.shape[0]
    obs = np.stack([ch.radiance(obs_bt[:, k]) for k, ch in enumerate(chans)], axis=-1)
    clr = np.stack([ch.radiance(clr_bt[:, k]) for k, ch in enumerate(chans)], axis=-1)
    # the observation's noise: a constant radiance ([instrument]); the clear sky's σ comes without it
    s_obs = np.broadcast_to(np.array([noise_radiance(ch, config) for ch in chans]), obs.shape)
    s_in = np.asarray(sigma_clear, dtype=float)
    s_in = np.broadcast_to(s_in[:, None] if s_in.ndim == 1 else s_in, clr_bt.shape)
    s_clr = np.stack([s_in[:, k] * ch.radiance_derivative(clr_bt[:, k]) for k, ch in enumerate(chans)], axis=-1)
    # float32 from the simulation: the compiled path reads them so, without float64 copies
    lp, lt, opq = np.asarray(level_pressure), np.asarray(level_temperature), np.asarray(opaque)
    mu = np.cos(np.deg2rad(sat_zenith))
    # the tropopause (first temperature minimum going up) bounds the cloud top
    k_trop = np.argmin(lt, axis=-1)
    top_limit = np.take_along_axis(lp, k_trop[:, None], axis=-1)[:, 0]
    fixed = _fixed_top(cc, lp.astype(float), lt.astype(float), n_blk) if cc["top"] == "fixed" else None
    args = (obs, clr, lp, lt, opq, mu, s_obs, s_clr, top_limit, fixed, inv, config, clear_correlation)
    n_inv = len(inv)
    if cc["phase"] == "auto":
        # the tops of each phase's optics first (cheap), then the optics at the chosen top once
        # ice of the configured optics, or large crystals (β → 1, geometric-optics limit): the better fit
        ice, grey = _tops(("ice", "grey"), *args)
        chi_i = np.where(np.isfinite(ice.chi2), ice.chi2, np.inf)
        chi_g = np.where(np.isfinite(grey.chi2), grey.chi2, np.inf)
        large = chi_g < chi_i
        ice = _where(large, grey, ice)
        phase = np.where(large, PHASE_GREY, PHASE_ICE).astype(np.int8)
        # no water cloud is colder than ice_below: the water top is sought only where the ice top is warmer
        take_ice = ice.top_temperature <= cc["ice_below"]
        rest = np.flatnonzero(~take_ice)
        chosen = ice
        if rest.size:
            part = lambda a: a[rest] if isinstance(a, np.ndarray) and a.shape[:1] == (n_blk,) else a  # noqa: E731
            water, = _tops(("water",), *(part(a) for a in args))
            ice_rest = _take_rows(ice, rest)
            nc = np.full(rest.size, np.nan) if night_contrast is None else np.asarray(night_contrast)[rest]
            take_ice[rest] = choose_phase(ice_rest, water, nc, config)
            chosen = _put_rows(ice, rest, _where(take_ice[rest], ice_rest, water))
            phase[rest] = np.where(take_ice[rest], phase[rest], PHASE_WATER)
        table = {code: phase_beta(name, inv, config) for code, name in
                 ((PHASE_ICE, "ice"), (PHASE_GREY, "grey"), (PHASE_WATER, "water"))}
        beta = np.empty((n_blk, n_inv))
        for code, b in table.items():
            beta[phase == code] = b
        top = chosen.top
    else:
        beta = phase_beta(cc["phase"], inv, config)
        top = _tops((cc["phase"],), *args)[0].top
        phase = np.full(n_blk, PHASE_NAMES.index(cc["phase"]), np.int8)
    res = pcloud.cloud_at_top(obs, clr, opq, lp, lt, mu, s_obs, s_clr, np.ones(n_blk, bool), top, beta=beta,
                              reference=reference_index(inv, config), eps_max=cc["eps_max"], compiled=None)
    phase = np.where(np.isfinite(res.optical_depth) | (res.status == pcloud.STATUS_BEYOND_OPAQUE), phase,
                     PHASE_NONE).astype(np.int8)
    # similarity-relation extinction with the phase's optics (grey: interpolated by top temperature)
    ice_o, water_o = cc["optics"]["ice"], cc["optics"]["water"]
    frac_ice = np.clip((cc["water_above"] - res.top_temperature) / max(cc["water_above"] - cc["ice_below"], 1e-6),
                       0.0, 1.0)
    frac_ice = np.where(phase == PHASE_ICE, 1.0, np.where(phase == PHASE_WATER, 0.0, frac_ice))
    ssa = frac_ice * ice_o["single_scattering_albedo"] + (1 - frac_ice) * water_o["single_scattering_albedo"]
    g = frac_ice * ice_o["asymmetry"] + (1 - frac_ice) * water_o["asymmetry"]
    return ColumnInversion(res.emissivity, res.optical_depth, res.optical_depth_sigma,
                           pcloud.extinction_optical_depth(res.optical_depth, ssa, g), res.top_pressure,
                           res.top_pressure_sigma, res.top_temperature, res.status, phase, res.uncertain)


def night_contrast_of(obs, clear, sol_zenith, config):
    """(obs − clear) at 3.9 µm minus that at 11 µm [K] where it is night (NaN elsewhere, or
    without both channels); (y, x) arrays from channel → (y, x) mappings."""
    if "3p9um" not in obs or "11um" not in obs or sol_zenith is None:
        return None
    sz = np.asarray(sol_zenith, dtype=float)
    night = np.isfinite(sz) & (sz > config["screening"]["night_sun_zenith"])
    d = (np.asarray(obs["3p9um"], float) - np.asarray(clear["3p9um"], float)
         - np.asarray(obs["11um"], float) + np.asarray(clear["11um"], float))
    return np.where(night, d, np.nan)


def inversion_bias(bias):
    """The clear-sky bias lines the inversion adds back to the simulation: {channel: {"a", "b",
    "surfaces"}} of a bias fit (screen.bias_from_sums), or None without one."""
    if not bias:
        return None

    def line(f):  # rounded to 0.1 mK (and 1 µK per kg m⁻²): a fit summed in another order (Dask
        # workers) gives the same lines, so no pixel's status can flip on rounding noise
        return {"a": round(float(f["a"]), 4), "b": round(float(f["b"]), 6)}

    return {c: dict(line(f), surfaces={k: line(v) for k, v in f.get("surfaces", {}).items()}) for c, f in bias.items()}


#: a bias line that moved by less than this at a path of BIAS_PATH does not re-run the inversion [K]
BIAS_TOLERANCE = 0.1
BIAS_PATH = 50.0  # kg m⁻², a typical moist slant path


def bias_close(old, new):
    """Whether two :func:`inversion_bias` results differ by at most BIAS_TOLERANCE at 0 and at
    BIAS_PATH kg m⁻² of slant path, in every channel and surface line."""
    if old is None or new is None:
        return old is new
    if set(old) != set(new):
        return False

    def near(a, b):
        return all(abs((a["a"] + a["b"] * x) - (b["a"] + b["b"] * x)) <= BIAS_TOLERANCE for x in (0.0, BIAS_PATH))

    for c in old:
        if not near(old[c], new[c]) or set(old[c]["surfaces"]) != set(new[c]["surfaces"]):
            return False
        if not all(near(old[c]["surfaces"][k], new[c]["surfaces"][k]) for k in old[c]["surfaces"]):
            return False
    return True


def invert_pixels(layer, flat_index, obs, clear, levels, sat_zenith, sigma_clear, chset, config, sol_zenith=None,
                  bias=None, surface=None, slant_path=None):
    """Invert pixels ``flat_index`` of a grid (or block) and write them into ``layer``.

    Parameters
    ----------
    layer : CloudLayer
        Of the same (y, x) shape as the grids; its ``channels`` are the inversion channels.
    flat_index : (n,) int
        Flat (y, x) indices of the pixels.
    obs, clear : mapping channel -> (y, x) observed and clear-sky brightness temperature [K]
    levels : (level pressure (n, L) [hPa], level temperature (n, L) [K], opaque radiance
        (n, L, n_ch of ``chset``)) of exactly these pixels, in this order
    sat_zenith : (y, x) [deg]
    sigma_clear : mapping of (y, x) clear-sky σ's [K] (uncertainty.sigma_grids: each inversion channel's
        σ and NEΔT, the noise taken out), or one (y, x) clear-sky σ without noise for all channels
    chset : simulate.ChannelSet of the scene
    config : dict
    sol_zenith : (y, x) [deg], optional: night pixels' 3.9 µm behaviour helps choose the phase
    bias : {channel: fit}, optional
        The clear-sky bias removed from the departures (:func:`inversion_bias`): the inversion's
        clear sky is the simulation plus it, i.e. what the bias-corrected departures measure from;
        needs ``surface`` (codes) and ``slant_path`` [kg m⁻²] (y, x) grids.
    """
    inv = layer.channels
    ci = [chset.names.index(c) for c in inv]
    take = lambda a: np.asarray(a).ravel()[flat_index]  # noqa: E731
    wanted = set(inv) | {"3p9um", "11um"}
    obs = {c: take(v) for c, v in obs.items() if c in wanted}
    clear = {c: take(v).astype(float) for c, v in clear.items() if c in wanted}
    if bias:
        from .screen import bias_field

        surf, path = take(surface), take(slant_path)
        clear = {c: v + bias_field(bias[c], surf, path) if c in bias else v for c, v in clear.items()}
    obs_bt = np.stack([obs[c] for c in inv], axis=-1)
    clr_bt = np.stack([clear[c] for c in inv], axis=-1)
    lp, lt, opq = levels
    sig = (np.stack([take(clear_part(sigma_clear, c)) for c in inv], axis=-1) if isinstance(sigma_clear, dict)
           else take(sigma_clear))
    nc = None
    if config["cloud"]["phase"] == "auto" and sol_zenith is not None and "3p9um" in obs and "11um" in obs:
        nc = night_contrast_of(obs, clear, take(sol_zenith), config)
    corr = None
    if isinstance(sigma_clear, dict) and config["cloud"]["top"] == "consistent":
        corr = clear_correlation(sigma_clear, inv, take)
    res = invert_columns(obs_bt, clr_bt, lp, lt, opq[:, :, ci], take(sat_zenith), sig,
                         [chset.channels[i] for i in ci], inv, config, night_contrast=nc, clear_correlation=corr)
    layer.put(flat_index, res)


def invert_all(scene, sim, config, sigma_clear, only=None, column_simulator=None, bias=None, into=None):
    """The single-layer cloud inversion of every valid pixel of an in-memory scene (the dashboard's stage 2).

    Parameters
    ----------
    scene : Scene
    sim : simulate.Simulation (with or without levels: without, ``column_simulator``
        simulates each block's columns again)
    config : dict
    sigma_clear : mapping channel -> (y, x) clear-sky 1-σ [K] (``Simulation.sigma``)
    only : (y, x) bool array, optional
        Invert just these pixels; the others get status not_cloudy and NaN.
    column_simulator : simulate.ColumnSimulator, optional
    bias : {channel: fit}, optional
        The removed clear-sky bias (:func:`inversion_bias`), added back to the clear sky.
    into : CloudLayer, optional
        A layer of this scene and these settings to write the pixels into (its other pixels
        are kept; a pixel's inversion does not depend on any other pixel); a new one when omitted.

    Returns
    -------
    CloudLayer
    """
    ds = scene.data
    shape = (ds.sizes["y"], ds.sizes["x"])
    inv = inversion_channels(sim.channels, config)
    if into is not None:
        layer = into
    else:
        layer = CloudLayer.empty(shape, inv, config["cloud"]["top"], layer_beta(inv, config))
        layer.notes = inversion_notes(layer.channels, config)
    idx = sim.valid_index
    chosen = None if only is None else np.flatnonzero(np.asarray(only, bool).ravel()[idx])
    n_todo = idx.size if chosen is None else chosen.size
    if not n_todo:
        return layer
    chunk = level_chunk(config)
    blocks = [slice(s, min(s + chunk, n_todo)) if chosen is None else chosen[s:s + chunk]
              for s in range(0, n_todo, chunk)]
    obs = {c: ds[f"bt_{c}"].values for c in sim.channels}
    clear = {c: sim.bt_clear[i] for i, c in enumerate(sim.channels)}
    zen = ds["sat_zenith"].values
    sun = ds["sol_zenith"].values if "sol_zenith" in ds else None
    surface = ds["surface"].values

    def run(blk):
        flat = idx[blk]
        if sim.level_pressure is not None:
            levels = (sim.level_pressure[blk], sim.level_temperature[blk], sim.opaque_radiance[blk])
        else:
            levels = column_simulator.levels(flat)
        invert_pixels(layer, flat, obs, clear, levels, zen, sigma_clear, sim.chset, config, sol_zenith=sun, bias=bias,
                      surface=surface, slant_path=sim.slant_path)

    # blocks write disjoint pixels of the layer, so they run on the configured threads
    with ThreadPoolExecutor(max(1, int(config["simulation"].get("threads", 1)))) as pool:
        list(pool.map(run, blocks))
    return layer
