"""Single-layer grey-cloud inversion of scene pixels: the per-pixel core and its gather/scatter.

:func:`invert_columns` inverts a set of pixel columns (physics.cloud.invert_grey_cloud under the
``[cloud]`` settings, plus the phase-dependent similarity relation for the extinction optical
depth). :func:`invert_pixels` is the one gather/scatter around it: it takes the pixels'
observed and clear-sky brightness temperatures from (y, x) grids (a whole scene or a block of
rows), inverts them and writes the results into a :class:`CloudLayer`. The dashboard's
:func:`invert_all` and the block pipeline (:mod:`cloudsieve.batch`) both call it.
"""
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, replace

import numpy as np

from physics import cloud as pcloud
from physics.atmosphere import geopotential_height

from .codes import CLOUD, MARGINAL
from .simulate import level_chunk
from .uncertainty import clear_part, noise_radiance


@dataclass
class CloudLayer:
    """Grey-cloud retrieval on a grid (NaN and status ``not_cloudy`` where not inverted).

    emissivity : (n_inv, y, x) per inversion channel, unclipped [1]
    optical_depth, optical_depth_sigma : (y, x) absorption optical depth and its 1-σ [1]
    extinction_optical_depth : (y, x) [1]
    top_pressure [hPa], top_temperature [K] : (y, x)
    status : (y, x) int8 (physics.cloud.STATUS_NAMES)
    uncertain : (y, x) bool, relative optical-depth uncertainty > 100 %
    channels : inversion channel names
    method : cloud-top choice configured
    notes : notes for the user (fallbacks)
    """

    emissivity: np.ndarray
    optical_depth: np.ndarray
    optical_depth_sigma: np.ndarray
    extinction_optical_depth: np.ndarray
    top_pressure: np.ndarray
    top_temperature: np.ndarray
    status: np.ndarray
    uncertain: np.ndarray
    channels: tuple
    method: str
    notes: list = field(default_factory=list)

    FIELDS = ("optical_depth", "optical_depth_sigma", "extinction_optical_depth", "top_pressure", "top_temperature")

    @classmethod
    def empty(cls, shape, channels, method):
        """A layer of ``shape`` (y, x) with nothing inverted yet."""
        nan = lambda: np.full(shape, np.nan)  # noqa: E731
        return cls(np.full((len(channels),) + tuple(shape), np.nan), nan(), nan(), nan(), nan(), nan(),
                   np.full(shape, pcloud.STATUS_NOT_CLOUDY, np.int8), np.zeros(shape, bool), tuple(channels), method)

    def put(self, flat_index, res):
        """Write a :class:`ColumnInversion` of pixels ``flat_index`` (flat (y, x) indices) into the layer."""
        n_inv = self.emissivity.shape[0]
        self.emissivity.reshape(n_inv, -1)[:, flat_index] = res.emissivity.T
        for name in self.FIELDS:
            getattr(self, name).reshape(-1)[flat_index] = getattr(res, name)
        self.status.reshape(-1)[flat_index] = res.status
        self.uncertain.reshape(-1)[flat_index] = res.uncertain

    def masked(self, mask):
        """The layer restricted to pixels classed marginal or cloud (others: not_cloudy, NaN)."""
        keep = (mask == CLOUD) | (mask == MARGINAL)
        nan = lambda a: np.where(keep, a, np.nan)  # noqa: E731
        return replace(self, emissivity=np.where(keep[None], self.emissivity, np.nan),
                       **{name: nan(getattr(self, name)) for name in self.FIELDS},
                       status=np.where(keep, self.status, pcloud.STATUS_NOT_CLOUDY).astype(np.int8),
                       uncertain=keep & self.uncertain, notes=list(self.notes))

    def as_float32(self):
        """Float fields in float32 (what the exports write), except the top pressure: the
        inspector's BT–τ curve is drawn at it and stays the normal model's."""
        f = lambda a: np.asarray(a).astype(np.float32)  # noqa: E731
        return replace(self, emissivity=f(self.emissivity),
                       **{n: f(getattr(self, n)) for n in self.FIELDS if n != "top_pressure"})


@dataclass
class ColumnInversion:
    """Grey-cloud inversion of n pixel columns.

    emissivity : (n, n_inv) [1]; optical_depth, optical_depth_sigma, extinction_optical_depth [1],
    top_pressure [hPa], top_temperature [K] : (n,); status : (n,) int8; uncertain : (n,) bool
    """

    emissivity: np.ndarray
    optical_depth: np.ndarray
    optical_depth_sigma: np.ndarray
    extinction_optical_depth: np.ndarray
    top_pressure: np.ndarray
    top_temperature: np.ndarray
    status: np.ndarray
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


def inversion_notes(inv, config):
    """Notes on the cloud-top choice a scene with inversion channels ``inv`` falls back to."""
    cc = config["cloud"]
    notes = []
    if cc["reference_channel"] not in inv:
        notes.append(f"reference channel {cc['reference_channel']} absent: {inv[0]} places the opaque top")
    if cc["top"] == "grey" and not all(p in inv for p in cc["pair"]):
        notes.append(f"grey-consistency top needs {cc['pair'][0]} and {cc['pair'][1]}: using the opaque top instead")
    return notes


def invert_columns(obs_bt, clr_bt, level_pressure, level_temperature, opaque, sat_zenith, sigma_clear, chans, inv,
                   config):
    """Grey-cloud inversion of a set of pixel columns.

    Parameters
    ----------
    obs_bt, clr_bt : (n, n_inv) observed and clear-sky brightness temperatures [K]
    level_pressure, level_temperature : (n, n_levels) [hPa], [K]
    opaque : (n, n_levels, n_inv) opaque-level radiances [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹]
    sat_zenith : (n,) [deg]
    sigma_clear : (n,) or (n, n_inv) clear-sky 1-σ [K] without the instrument noise (one for every
        channel, or per channel; uncertainty.clear_part)
    chans : physics Channels of the inversion channels; inv : their names
    config : dict (fallbacks of the top choice: :func:`inversion_notes`)

    Returns
    -------
    ColumnInversion
    """
    cc = config["cloud"]
    method = cc["top"]
    n_inv = len(inv)
    n_blk = obs_bt.shape[0]
    obs = np.stack([ch.radiance(obs_bt[:, k]) for k, ch in enumerate(chans)], axis=-1)
    clr = np.stack([ch.radiance(clr_bt[:, k]) for k, ch in enumerate(chans)], axis=-1)
    # the observation's noise: a constant radiance ([instrument]); the clear sky's σ comes without it
    s_obs = np.broadcast_to(np.array([noise_radiance(ch, config) for ch in chans]), obs.shape)
    s_in = np.asarray(sigma_clear, dtype=float)
    s_in = np.broadcast_to(s_in[:, None] if s_in.ndim == 1 else s_in, clr_bt.shape)
    s_clr = np.stack([s_in[:, k] * ch.radiance_derivative(clr_bt[:, k]) for k, ch in enumerate(chans)], axis=-1)
    lp = np.asarray(level_pressure, dtype=float)
    lt = np.asarray(level_temperature, dtype=float)
    opq = np.asarray(opaque, dtype=float)
    mu = np.cos(np.deg2rad(sat_zenith))
    # the tropopause (first temperature minimum going up) bounds the cloud top
    k_trop = np.argmin(lt, axis=-1)
    top_limit = np.take_along_axis(lp, k_trop[:, None], axis=-1)[:, 0]
    ref = inv.index(cc["reference_channel"]) if cc["reference_channel"] in inv else 0
    pair = tuple(cc["pair"])
    use_method = method
    if method == "grey":
        if all(p in inv for p in pair):
            pair_idx = (inv.index(pair[0]), inv.index(pair[1]))
        else:
            pair_idx = (0, 0)
            use_method = "opaque"
    else:
        pair_idx = (0, min(1, n_inv - 1))
    fixed = _fixed_top(cc, lp, lt, n_blk) if method == "fixed" else None
    res = pcloud.invert_grey_cloud(
        obs, clr, opq, lp, lt, mu, s_obs, s_clr, np.ones(n_blk, bool), method=use_method,
        fixed_pressure=fixed, reference=ref, pair=pair_idx, top_limit=top_limit, eps_max=cc["eps_max"],
        max_sigma_pressure=cc["max_sigma_pressure"],
    )
    # phase from the top temperature -> similarity-relation extinction
    ice, water = cc["optics"]["ice"], cc["optics"]["water"]
    frac_ice = np.clip((cc["water_above"] - res.top_temperature) / max(cc["water_above"] - cc["ice_below"], 1e-6),
                       0.0, 1.0)
    ssa = frac_ice * ice["single_scattering_albedo"] + (1 - frac_ice) * water["single_scattering_albedo"]
    g = frac_ice * ice["asymmetry"] + (1 - frac_ice) * water["asymmetry"]
    return ColumnInversion(res.emissivity, res.optical_depth, res.optical_depth_sigma,
                           pcloud.extinction_optical_depth(res.optical_depth, ssa, g), res.top_pressure,
                           res.top_temperature, res.status, res.uncertain)


def invert_pixels(layer, flat_index, obs, clear, levels, sat_zenith, sigma_clear, chset, config):
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
    """
    inv = layer.channels
    ci = [chset.names.index(c) for c in inv]
    take = lambda a: np.asarray(a).ravel()[flat_index]  # noqa: E731
    obs_bt = np.stack([take(obs[c]) for c in inv], axis=-1)
    clr_bt = np.stack([take(clear[c]) for c in inv], axis=-1).astype(float)
    lp, lt, opq = levels
    sig = (np.stack([take(clear_part(sigma_clear, c)) for c in inv], axis=-1) if isinstance(sigma_clear, dict)
           else take(sigma_clear))
    res = invert_columns(obs_bt, clr_bt, lp, lt, opq[:, :, ci], take(sat_zenith), sig,
                         [chset.channels[i] for i in ci], inv, config)
    layer.put(flat_index, res)


def invert_all(scene, sim, config, sigma_clear, only=None, column_simulator=None):
    """The grey-cloud inversion of every valid pixel of an in-memory scene (the dashboard's stage 2).

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

    Returns
    -------
    CloudLayer
    """
    ds = scene.data
    shape = (ds.sizes["y"], ds.sizes["x"])
    layer = CloudLayer.empty(shape, inversion_channels(sim.channels, config), config["cloud"]["top"])
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

    def run(blk):
        flat = idx[blk]
        if sim.level_pressure is not None:
            levels = (sim.level_pressure[blk], sim.level_temperature[blk], sim.opaque_radiance[blk])
        else:
            levels = column_simulator.levels(flat)
        invert_pixels(layer, flat, obs, clear, levels, zen, sigma_clear, sim.chset, config)

    # blocks write disjoint pixels of the layer, so they run on the configured threads
    with ThreadPoolExecutor(max(1, int(config["simulation"].get("threads", 1)))) as pool:
        list(pool.map(run, blocks))
    return layer
