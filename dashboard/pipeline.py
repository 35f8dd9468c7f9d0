"""The screening pipeline: clear-sky simulation, departures, tests, classes, bias, cloud layer.

Three stages with different costs, so that the dashboard can retune without redoing work:

1. :func:`simulate` — the expensive one: clear-sky brightness temperatures of every valid
   pixel (physics.clearsky, chunked and threaded), plus what the cloud inversion needs
   (level pressures, temperatures and opaque-level radiances).
2. :func:`invert_all` — grey-cloud retrieval for every valid pixel under the cloud
   settings (physics.cloud); repeated only when the cloud settings change.
3. :func:`screen` — departures, the screening tests, classes and bit field, the clear-sky
   bias fit, analyst edits, and the cloud layer masked to the non-clear pixels; cheap
   (2-D array arithmetic), repeated on every threshold change.

Everything returns plain numpy arrays on the scene grid (y, x) collected in small
dataclasses; :mod:`dashboard.export` turns them into CSV and CF-NetCDF.
"""
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
import json

import numpy as np
from scipy import ndimage

from physics.absorption import channel_coefficients
from physics.atmosphere import geopotential_height, profile_levels_first
from physics.channels import default_channels
from physics.clearsky import channel_brightness_temperature, channel_planck, simulate_channel_major
from physics import cloud as pcloud

from .config import absorption_table, per_surface

# ---------------------------------------------------------------------------------------
# codes
# ---------------------------------------------------------------------------------------
CLASS_NAMES = ("clear", "marginal", "cloud", "no_data")
CLEAR, MARGINAL, CLOUD, NO_DATA = 0, 1, 2, 3

#: Screening tests in bit order; each yields a margin in K (> 0: fired)
CLOUD_TESTS = ("cold_departure", "split_window_excess", "texture", "night_fog_contrast")
TESTS = CLOUD_TESTS + ("warm_departure",)
BIT_NAMES = TESTS + ("daylight_3p9um_unused", "analyst_clear", "analyst_cloud")
BITS = {name: 1 << i for i, name in enumerate(BIT_NAMES)}

EDIT_ACTIONS = ("clear", "cloud", "reset")


# ---------------------------------------------------------------------------------------
# stage 1: clear-sky simulation
# ---------------------------------------------------------------------------------------
@dataclass
class Simulation:
    """Clear-sky simulation of a scene (stage 1).

    channels : names of the scene's channels, in order
    bt_clear : (n_ch, y, x) float32 clear-sky brightness temperature [K] (NaN at no_data)
    source : per channel, "simulated" or "user" (bt_clear_<ch> given in the scene)
    slant_path : (y, x) water-vapour slant path W·sec θ [kg m⁻²]
    valid_index : (n_valid,) flat indices of the valid pixels
    level_pressure, level_temperature : (n_valid, n_levels) float32 [hPa], [K]
    opaque_radiance : (n_valid, n_levels, n_ch) float32 [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹]
    clear_radiance : (n_valid, n_ch) float32
    channel_objects : physics Channel per channel
    """

    channels: tuple
    bt_clear: np.ndarray
    source: dict
    slant_path: np.ndarray
    valid_index: np.ndarray
    level_pressure: np.ndarray
    level_temperature: np.ndarray
    opaque_radiance: np.ndarray
    clear_radiance: np.ndarray
    channel_objects: tuple
    seconds: float = 0.0


def scene_channels(config, names):
    """physics Channel objects for ``names`` (defaults overridden by the config)."""
    overrides = {k: (v["centre"], v["width"]) for k, v in config.get("channels", {}).items()}
    chans = default_channels(overrides)
    return tuple(chans[n] for n in names)


def surface_emissivity(ds, channels, config):
    """(n_ch, y, x) emissivity: emis_<ch> where given, else the surface-type default."""
    codes = ds["surface"].values
    table = config["surface"]["emissivity"]
    out = []
    for ch in channels:
        default = {s: table[s].get(ch, table[s].get("11um", 0.98)) for s in ("sea", "land", "ice")}
        e = per_surface(default, codes)
        name = f"emis_{ch}"
        if name in ds:
            given = ds[name].values
            e = np.where(np.isfinite(given), given, e)
        out.append(e)
    return np.stack(out)


#: Above this many valid pixels the simulation keeps no per-level data (≈ 0.8 kB per pixel);
#: the cloud inversion and the pixel inspector then simulate the columns they need again.
LEVELS_PIXEL_LIMIT = 2_000_000


def simulate(scene, config, progress=None, levels=None):
    """Stage 1: clear-sky brightness temperatures (and inversion inputs) for every valid pixel.

    Parameters
    ----------
    scene : dashboard.scene.Scene
    config : dict
    progress : callable(n_done, n_total), optional
    levels : bool, optional
        Keep the per-level arrays for the cloud inversion; by default only for scenes of up
        to ``LEVELS_PIXEL_LIMIT`` valid pixels.

    Returns
    -------
    Simulation
    """
    import time

    if levels is None:
        levels = int(scene.data["valid"].values.sum()) <= LEVELS_PIXEL_LIMIT

    t0 = time.perf_counter()
    ds = scene.data
    names = tuple(scene.channels)
    chans = scene_channels(config, names)
    coeffs = channel_coefficients(chans, absorption_table(config))
    ny, nx = ds.sizes["y"], ds.sizes["x"]
    valid = ds["valid"].values.ravel()
    idx = np.flatnonzero(valid)
    n = idx.size
    sim_cfg = config["simulation"]
    f32 = np.float32

    def col(name):
        return ds[name].values.ravel()[idx].astype(f32)

    t_air, tcwv, p_surf, t_skin, zen = col("t_air"), col("tcwv"), col("p_surf"), col("t_skin"), col("sat_zenith")
    p_surf = np.where(np.isfinite(p_surf), p_surf, f32(1013.25))
    emis = surface_emissivity(ds, names, config).reshape(len(names), -1)[:, idx].astype(f32)
    explicit = all(f"profile_{k}" in ds for k in ("pressure", "temperature", "q"))
    n_lev = ds.sizes["level"] if explicit else int(sim_cfg["levels"])
    n_ch = len(names)
    rad = np.empty((n_ch, n), f32)
    bt = np.empty((n_ch, n), f32)
    keep = levels
    lp = np.empty((n, n_lev), f32) if keep else None
    lt = np.empty((n, n_lev), f32) if keep else None
    opq = np.empty((n, n_lev, n_ch), f32) if keep else None
    chunk = int(sim_cfg["chunk_pixels"])
    starts = list(range(0, n, chunk))
    if explicit:
        prof = {k: ds[f"profile_{k}"].values.reshape(ny * nx, -1)[idx].astype(f32) for k in ("pressure", "temperature", "q")}

    def run(s):
        sl = slice(s, min(s + chunk, n))
        if explicit:
            p = np.ascontiguousarray(prof["pressure"][sl].T)
            t = np.ascontiguousarray(prof["temperature"][sl].T)
            q = np.ascontiguousarray(prof["q"][sl].T)
        else:
            p, t, q = profile_levels_first(t_air[sl], tcwv[sl], p_surf[sl], n_lev, sim_cfg["top_pressure"], dtype=f32)
        r = simulate_channel_major(p, t, q, t_skin[sl], emis[:, sl], zen[sl], chans, coeffs, levels=keep)
        rad[:, sl] = r.radiance
        bt[:, sl] = r.brightness_temperature
        if keep:
            lp[sl] = p.T
            lt[sl] = t.T
            opq[sl] = r.opaque_radiance.transpose(2, 1, 0)
        return sl.stop - sl.start

    done = 0
    threads = max(1, int(sim_cfg.get("threads", 1)))
    if threads == 1 or len(starts) < 2:
        for s in starts:
            done += run(s)
            if progress:
                progress(done, n)
    else:
        with ThreadPoolExecutor(threads) as pool:
            for k in pool.map(run, starts):
                done += k
                if progress:
                    progress(done, n)

    source = {}
    bt_full = np.full((n_ch, ny * nx), np.nan, f32)
    for i, ch in enumerate(names):
        user = f"bt_clear_{ch}"
        if user in ds:
            given = ds[user].values.ravel()[idx].astype(f32)
            use = np.isfinite(given)
            bt[i] = np.where(use, given, bt[i])
            rad[i] = np.where(use, chans[i].radiance(given), rad[i])
            source[ch] = "user" if use.all() else ("user+simulated" if use.any() else "simulated")
        else:
            source[ch] = "simulated"
        bt_full[i, idx] = bt[i]
    mu = np.cos(np.deg2rad(ds["sat_zenith"].values))
    path = (ds["tcwv"].values / mu).astype(f32)
    return Simulation(names, bt_full.reshape(n_ch, ny, nx), source, path, idx, lp, lt, opq, rad.T.copy(), chans,
                      time.perf_counter() - t0)


class ColumnSimulator:
    """Clear-sky columns of chosen pixels of a scene, with their level data (on demand).

    Used where the level data of every pixel would not fit in memory (large scenes): the
    cloud inversion and the pixel inspector simulate just the columns they need. Same
    arithmetic as :func:`simulate`, so the values are the same.
    """

    def __init__(self, scene, config):
        ds = scene.data
        self.names = tuple(scene.channels)
        self.chans = scene_channels(config, self.names)
        self.coeffs = channel_coefficients(self.chans, absorption_table(config))
        self.sim_cfg = config["simulation"]
        self.ds = ds
        self.emis = surface_emissivity(ds, self.names, config).reshape(len(self.names), -1)
        self.explicit = all(f"profile_{k}" in ds for k in ("pressure", "temperature", "q"))

    def levels(self, idx):
        """(level pressure, level temperature, opaque radiance) of flat pixel indices ``idx``."""
        f32 = np.float32
        ds = self.ds
        col = lambda name: ds[name].values.ravel()[idx].astype(f32)  # noqa: E731
        p_surf = col("p_surf")
        p_surf = np.where(np.isfinite(p_surf), p_surf, f32(1013.25))
        if self.explicit:
            n = ds.sizes["y"] * ds.sizes["x"]
            p, t, q = (np.ascontiguousarray(ds[f"profile_{k}"].values.reshape(n, -1)[idx].astype(f32).T)
                       for k in ("pressure", "temperature", "q"))
        else:
            p, t, q = profile_levels_first(col("t_air"), col("tcwv"), p_surf, int(self.sim_cfg["levels"]),
                                           self.sim_cfg["top_pressure"], dtype=f32)
        lp = np.empty((idx.size, p.shape[0]), f32)
        lt = np.empty_like(lp)
        opq = np.empty((idx.size, p.shape[0], len(self.names)), f32)
        chunk = int(self.sim_cfg["chunk_pixels"])
        for s in range(0, idx.size, chunk):
            sl = slice(s, min(s + chunk, idx.size))
            r = simulate_channel_major(np.ascontiguousarray(p[:, sl]), np.ascontiguousarray(t[:, sl]),
                                       np.ascontiguousarray(q[:, sl]), col("t_skin")[sl],
                                       self.emis[:, idx[sl]].astype(f32), col("sat_zenith")[sl], self.chans,
                                       self.coeffs, levels=True)
            lp[sl], lt[sl] = p[:, sl].T, t[:, sl].T
            opq[sl] = r.opaque_radiance.transpose(2, 1, 0)
        return lp, lt, opq


# ---------------------------------------------------------------------------------------
# stage 2: cloud inversion for every valid pixel
# ---------------------------------------------------------------------------------------
@dataclass
class CloudLayer:
    """Grey-cloud retrieval on the scene grid (NaN / status not_cloudy where not inverted).

    emissivity : (n_inv, y, x) per inversion channel [1]
    optical_depth, optical_depth_sigma : (y, x) absorption optical depth and 1-σ [1]
    extinction_optical_depth : (y, x) [1]
    top_pressure [hPa], top_temperature [K] : (y, x)
    status : (y, x) int8 (physics.cloud.STATUS_NAMES)
    uncertain : (y, x) bool, relative optical-depth uncertainty > 100 %
    channels : inversion channel names
    method : cloud-top choice actually configured
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


def clear_sky_sigma(ds, sim, config):
    """Expected 1-σ error of the clear-sky brightness temperature, (y, x) [K].

    σ = sqrt(base² + (per_path · W sec θ)²) with base and per_path per surface type
    (config [clear_sky_uncertainty]).
    """
    return sigma_from_path(ds["surface"].values, sim.slant_path, config)


def sigma_from_path(surface, slant_path, config):
    """:func:`clear_sky_sigma` from the surface codes and the slant path W sec θ [kg m⁻²]. [K]"""
    unc = config["clear_sky_uncertainty"]
    base = per_surface(unc["base"], surface)
    per = per_surface(unc["per_path"], surface)
    return np.sqrt(base**2 + (per * np.nan_to_num(slant_path)) ** 2)


def _inversion_channels(sim, config):
    wanted = [c for c in config["cloud"]["channels"] if c in sim.channels]
    if not wanted:
        wanted = [c for c in sim.channels if c != "3p9um"] or list(sim.channels)
    return wanted


def invert_all(scene, sim, config, bias=None, only=None):
    """Stage 2: the grey-cloud inversion for every valid pixel under the cloud settings.

    Parameters
    ----------
    scene : Scene
    sim : Simulation (with or without levels: without, the columns are simulated again)
    config : dict
    bias : dict channel -> (a, b), optional
        Clear-sky bias fit to add to the clear-sky radiance (when bias removal is on).
    only : (y, x) bool array, optional
        Invert just these pixels (the batch path passes the non-clear ones; the dashboard
        inverts every valid pixel once so that retuning never waits for the inversion).
        Pixels left out get status not_cloudy and NaN, as :func:`mask_cloud_layer` gives.

    Returns
    -------
    CloudLayer
        Retrieval for every valid (or chosen) pixel; :func:`screen` masks it to the
        non-clear ones.
    """
    ds = scene.data
    cc = config["cloud"]
    ny, nx = ds.sizes["y"], ds.sizes["x"]
    notes = []
    inv = _inversion_channels(sim, config)
    ci = [sim.channels.index(c) for c in inv]
    chans = [sim.channel_objects[i] for i in ci]
    idx = sim.valid_index
    n_inv = len(inv)
    shape2 = (ny * nx,)
    out_eps = np.full((n_inv,) + shape2, np.nan)
    out = {k: np.full(shape2, np.nan) for k in ("tau", "stau", "pc", "tc", "text")}
    status = np.full(shape2, pcloud.STATUS_NOT_CLOUDY, np.int8)
    uncertain = np.zeros(shape2, bool)
    method = cc["top"]
    # positions in the simulation's valid-pixel order of the pixels to invert
    chosen = None if only is None else np.flatnonzero(np.asarray(only, bool).ravel()[idx])
    n_todo = idx.size if chosen is None else chosen.size
    if n_todo:
        chunk = max(1024, int(config["simulation"]["chunk_pixels"]) * 16)
        sigma_k = clear_sky_sigma(ds, sim, config).ravel()
        blocks = [slice(start, min(start + chunk, n_todo)) if chosen is None else chosen[start:start + chunk]
                  for start in range(0, n_todo, chunk)]
        if sim.level_pressure is None:
            # lean simulation (large scenes): simulate each block's columns again with levels,
            # invert, and drop the levels; blocks run on the configured threads
            column_sim = ColumnSimulator(scene, config)

            def run_block(k_blk):
                k, blk = k_blk
                _invert_block(blk, ds, sim, config, bias, inv, ci, chans, out_eps, out, status, uncertain,
                              notes if k == 0 else [], sigma_k, levels=column_sim.levels(sim.valid_index[blk]))

        else:
            def run_block(k_blk):
                k, blk = k_blk
                _invert_block(blk, ds, sim, config, bias, inv, ci, chans, out_eps, out, status, uncertain,
                              notes if k == 0 else [], sigma_k)

        # blocks write disjoint pixels of the outputs, so they run on the configured threads
        threads = max(1, int(config["simulation"].get("threads", 1)))
        with ThreadPoolExecutor(threads) as pool:
            list(pool.map(run_block, enumerate(blocks)))
    r2 = lambda a: a.reshape(ny, nx)  # noqa: E731
    return CloudLayer(out_eps.reshape(n_inv, ny, nx), r2(out["tau"]), r2(out["stau"]), r2(out["text"]), r2(out["pc"]),
                      r2(out["tc"]), r2(status), r2(uncertain), tuple(inv), method, notes)




def _invert_block(blk, ds, sim, config, bias, inv, ci, chans, out_eps, out, status, uncertain, notes, sigma_k,
                  levels=None):
    """Invert one block of valid pixels of a Simulation; writes into the output arrays.

    ``blk``: a slice or an index array into the simulation's valid-pixel order.
    ``levels``: (pressure, temperature, opaque radiance) of the block's columns when the
    simulation did not keep them.
    """
    idx = sim.valid_index[blk]
    lp, lt, opq = levels if levels is not None else (sim.level_pressure[blk], sim.level_temperature[blk],
                                                     sim.opaque_radiance[blk])
    obs_bt = np.stack([ds[f"bt_{c}"].values.ravel()[idx] for c in inv], axis=-1)
    clr_bt = np.stack([sim.bt_clear[i].ravel()[idx] for i in ci], axis=-1).astype(float)
    if bias:
        clr_bt = clr_bt + np.stack([bias[c][0] + bias[c][1] * sim.slant_path.ravel()[idx].astype(float) if c in bias
                                    else np.zeros(idx.size) for c in inv], axis=-1)
    res = invert_columns(obs_bt, clr_bt, lp, lt, opq[:, :, ci], ds["sat_zenith"].values.ravel()[idx], sigma_k[idx],
                         chans, inv, config, notes)
    out_eps[:, idx] = res["emissivity"].T
    out["tau"][idx] = res["optical_depth"]
    out["stau"][idx] = res["optical_depth_sigma"]
    out["pc"][idx] = res["top_pressure"]
    out["tc"][idx] = res["top_temperature"]
    out["text"][idx] = res["extinction_optical_depth"]
    status[idx] = res["status"]
    uncertain[idx] = res["uncertain"]


def invert_columns(obs_bt, clr_bt, level_pressure, level_temperature, opaque, sat_zenith, sigma_clear, chans, inv,
                   config, notes=None):
    """Grey-cloud inversion of a set of pixel columns (the per-pixel core of stage 2).

    Parameters
    ----------
    obs_bt, clr_bt : (n, n_inv) observed and clear-sky brightness temperatures [K]
    level_pressure, level_temperature : (n, n_levels) [hPa], [K]
    opaque : (n, n_levels, n_inv) opaque-level radiances [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹]
    sat_zenith : (n,) [deg]
    sigma_clear : (n,) clear-sky 1-σ [K]
    chans : physics Channels of the inversion channels; inv : their names
    config : dict
    notes : list, optional — receives notes about fallbacks

    Returns
    -------
    dict of arrays: emissivity (n, n_inv), optical_depth, optical_depth_sigma, top_pressure,
    top_temperature, extinction_optical_depth, status, uncertain (n,)
    """
    notes = [] if notes is None else notes
    cc = config["cloud"]
    method = cc["top"]
    n_inv = len(inv)
    n_blk = obs_bt.shape[0]
    obs = np.stack([ch.radiance(obs_bt[:, k]) for k, ch in enumerate(chans)], axis=-1)
    clr = np.stack([ch.radiance(clr_bt[:, k]) for k, ch in enumerate(chans)], axis=-1)
    s_obs = np.stack([cc["nedt"] * ch.radiance_derivative(obs_bt[:, k]) for k, ch in enumerate(chans)], axis=-1)
    s_clr = np.stack([sigma_clear * ch.radiance_derivative(clr_bt[:, k]) for k, ch in enumerate(chans)], axis=-1)
    lp = np.asarray(level_pressure, dtype=float)
    lt = np.asarray(level_temperature, dtype=float)
    opq = np.asarray(opaque, dtype=float)
    mu = np.cos(np.deg2rad(sat_zenith))
    # the tropopause (first temperature minimum going up) bounds the cloud top
    k_trop = np.argmin(lt, axis=-1)
    top_limit = np.take_along_axis(lp, k_trop[:, None], axis=-1)[:, 0]
    ref = inv.index(cc["reference_channel"]) if cc["reference_channel"] in inv else 0
    if cc["reference_channel"] not in inv:
        notes.append(f"reference channel {cc['reference_channel']} absent: {inv[ref]} places the opaque top")
    pair = tuple(cc["pair"])
    use_method = method
    if method == "grey":
        if all(p in inv for p in pair):
            pair_idx = (inv.index(pair[0]), inv.index(pair[1]))
        else:
            pair_idx = (0, 0)
            use_method = "opaque"
            notes.append(f"grey-consistency top needs {pair[0]} and {pair[1]}: using the opaque top instead")
    else:
        pair_idx = (0, min(1, n_inv - 1))
    fixed = None
    if method == "fixed":
        if "top_height" in cc:
            z = geopotential_height(lp, lt)
            target = cc["top_height"] * 1000.0 + z[:, 0]
            k = np.clip(np.sum(z <= target[:, None], axis=-1) - 1, 0, lp.shape[1] - 2)
            z0 = np.take_along_axis(z, k[:, None], -1)[:, 0]
            z1 = np.take_along_axis(z, k[:, None] + 1, -1)[:, 0]
            p0 = np.take_along_axis(lp, k[:, None], -1)[:, 0]
            p1 = np.take_along_axis(lp, k[:, None] + 1, -1)[:, 0]
            w = np.clip((target - z0) / (z1 - z0), 0, 1)
            fixed = np.exp(np.log(p0) + w * (np.log(p1) - np.log(p0)))
        else:
            fixed = np.full(n_blk, cc["top_pressure"])
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
    return {"emissivity": res.emissivity, "optical_depth": res.optical_depth,
            "optical_depth_sigma": res.optical_depth_sigma, "top_pressure": res.top_pressure,
            "top_temperature": res.top_temperature,
            "extinction_optical_depth": pcloud.extinction_optical_depth(res.optical_depth, ssa, g),
            "status": res.status, "uncertain": res.uncertain}


# ---------------------------------------------------------------------------------------
# stage 3: screening
# ---------------------------------------------------------------------------------------
@dataclass
class Screening:
    """Outcome of the screening on the scene grid.

    departure : dict channel -> (y, x) observed − clear (bias removed when configured) [K]
    margins : dict test -> (y, x) margin [K] (> 0: fired; NaN: not applicable)
    mask : (y, x) int8 class code (CLASS_NAMES)
    bits : (y, x) uint16 bit field (BIT_NAMES)
    counts : dict class -> fraction of pixels
    bias : dict channel -> {"a", "b", "n", "rms", "applied"}
    notes : list of str (skipped tests, daylight 3.9 µm, …)
    thresholds : dict test -> (y, x) threshold actually applied [K] (for plots)
    sigma_clear : (y, x) [K]
    cloud : CloudLayer masked to non-clear pixels (or None)
    """

    departure: dict
    margins: dict
    mask: np.ndarray
    bits: np.ndarray
    counts: dict
    bias: dict
    notes: list
    thresholds: dict
    sigma_clear: np.ndarray
    cloud: CloudLayer = None
    skipped: dict = field(default_factory=dict)


def _local_std(values, valid, window):
    """Local mean and standard deviation in a square window, ignoring invalid pixels."""
    v = np.where(valid, values, 0.0)
    w = valid.astype(float)
    size = (window, window)
    n = ndimage.uniform_filter(w, size, mode="nearest")
    s1 = ndimage.uniform_filter(v, size, mode="nearest")
    s2 = ndimage.uniform_filter(v * v, size, mode="nearest")
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = s1 / n
        var = np.maximum(s2 / n - mean**2, 0.0)
    enough = n * window * window >= 3 - 1e-9
    return np.where(enough, mean, np.nan), np.where(enough, np.sqrt(var), np.nan)


def run_tests(fields, config, departure, sigma_clear, night_any=None, day_any=None, cache=None):
    """Margins [K] of every test (> 0 means the test fired), thresholds, notes.

    Parameters
    ----------
    fields : mapping of (y, x) arrays
        ``surface`` (codes), ``valid`` (bool), ``sol_zenith`` [deg], ``slant_path`` [kg m⁻²].
    config : dict
    departure : dict channel -> (y, x) observed − clear [K]
    sigma_clear : (y, x) expected clear-sky error [K]
    night_any, day_any : bool, optional
        Whether the whole scene has night / daylight valid pixels (a block of a chunked
        scene cannot tell); computed from ``fields`` when omitted.
    cache : dict, optional
        Keeps the texture test's neighbourhood statistics, which depend on the departures
        but not on any threshold (see :func:`screen`).
    """
    codes = fields["surface"]
    tests_cfg = config["tests"]
    valid = fields["valid"]
    margins, thresholds, skipped, notes = {}, {}, {}, []
    path = np.nan_to_num(fields["slant_path"])
    sol = fields["sol_zenith"]
    night = np.isfinite(sol) & (sol > config["screening"]["night_sun_zenith"])
    if night_any is None:
        night_any = bool(night.any())
    if day_any is None:
        day_any = bool((~night & valid).any())
    window_ch = tests_cfg["cold_departure"]["channel"]
    if window_ch not in departure:
        window_ch = next((c for c in ("11um", "12um", "8p6um") if c in departure), None)

    def off(name, why):
        skipped[name] = why
        notes.append(f"test {name} skipped: {why}")

    # cold departure
    t = tests_cfg["cold_departure"]
    if not t["enabled"]:
        off("cold_departure", "switched off in the config")
    elif window_ch is None:
        off("cold_departure", "no 11, 12 or 8.6 µm channel in the scene")
    else:
        thr = per_surface(t["k_sigma"], codes) * sigma_clear
        margins["cold_departure"] = -departure[window_ch] - thr
        thresholds["cold_departure"] = -thr
        if window_ch != t["channel"]:
            notes.append(f"cold_departure uses {window_ch} ({t['channel']} absent)")
    # split-window excess
    t = tests_cfg["split_window_excess"]
    if not t["enabled"]:
        off("split_window_excess", "switched off in the config")
    elif not ("11um" in departure and "12um" in departure):
        off("split_window_excess", "needs both 11um and 12um")
    else:
        thr = per_surface(t["threshold"], codes) + per_surface(t["per_path"], codes) * path
        margins["split_window_excess"] = departure["11um"] - departure["12um"] - thr
        thresholds["split_window_excess"] = thr
    # texture
    t = tests_cfg["texture"]
    if not t["enabled"]:
        off("texture", "switched off in the config")
    elif window_ch is None:
        off("texture", "no window channel")
    else:
        d = departure[window_ch]
        ok = valid & np.isfinite(d)
        win = int(t["window"])
        key = ("texture", window_ch, win, cache.get("bias_key") if cache is not None else None)
        if cache is not None and key in cache:
            std, warmest = cache[key]
        else:
            _, std = _local_std(d, ok, win)
            warmest = ndimage.maximum_filter(np.where(ok, d, -np.inf), size=win, mode="nearest")
            if cache is not None:
                cache[key] = (std, warmest)
        thr = per_surface(t["threshold"], codes)
        # A rough neighbourhood alone does not make the pixel cloudy: a clear pixel beside a
        # cloud sits in a rough window too, but it is the warmest there. The pixel must also be
        # colder than the warmest of its neighbours by twice the threshold.
        margins["texture"] = np.minimum(std - thr, (warmest - d) - 2.0 * thr)
        thresholds["texture"] = thr
    # night-time 3.9 - 11 contrast
    t = tests_cfg["night_fog_contrast"]
    if not t["enabled"]:
        off("night_fog_contrast", "switched off in the config")
    elif not ("3p9um" in departure and "11um" in departure):
        off("night_fog_contrast", "needs 3p9um and 11um")
    elif not night_any:
        off("night_fog_contrast", "no night-time pixels (sun above the horizon, or sol_zenith missing)")
    else:
        thr = per_surface(t["threshold"], codes) + per_surface(t["per_path"], codes) * path
        m = -(departure["3p9um"] - departure["11um"]) - thr
        # fog and low water cloud have tops near the surface temperature; a pixel much colder
        # than clear at 11 µm is a high (often ice) cloud, for which a 3.9 µm deficit is no
        # fog signature (the cold-departure test classes it): not applicable there
        low = departure["11um"] >= -per_surface(t["max_cold_11um"], codes)
        margins["night_fog_contrast"] = np.where(night & low, m, np.nan)
        thresholds["night_fog_contrast"] = -thr
    if "3p9um" in departure and day_any:
        notes.append("3.9 µm not used on daylight pixels: by day it carries reflected sunlight that the "
                     "thermal model does not simulate (bit daylight_3p9um_unused marks them)")
    # warm departure (background suspect)
    t = tests_cfg["warm_departure"]
    if not t["enabled"]:
        off("warm_departure", "switched off in the config")
    elif window_ch is None:
        off("warm_departure", "no window channel")
    else:
        thr = per_surface(t["threshold"], codes)
        margins["warm_departure"] = departure[window_ch] - thr
        thresholds["warm_departure"] = thr
    for name in list(margins):
        margins[name] = np.where(valid, margins[name], np.nan)
    return margins, thresholds, skipped, notes, night


def classify(valid, margins, thresholds, fraction, night=None, has_3p9=False, edits=None):
    """Class codes and bit field from the test margins (and analyst edits).

    Parameters
    ----------
    valid : (y, x) bool
    margins : dict test -> (y, x) [K]
    thresholds : dict test -> (y, x) threshold applied [K] (sign ignored)
    fraction : float
        Marginal band as a fraction of each test's threshold: no test fired, but one came
        within ``fraction × |threshold|`` of firing.
    night : (y, x) bool, optional
    has_3p9 : bool
        Scene has the 3.9 µm channel (day pixels then get the daylight bit).
    edits : (y, x) int8, optional
        Analyst overrides: 0 none, 1 clear, 2 cloud.
    """
    shape = valid.shape
    bits = np.zeros(shape, np.uint16)
    fired_any = np.zeros(shape, bool)
    near_any = np.zeros(shape, bool)
    for name in TESTS:
        m = margins.get(name)
        if m is None:
            continue
        with np.errstate(invalid="ignore"):  # NaN margins (test not applicable) compare False
            fired = m > 0
            if name in CLOUD_TESTS:
                near_any |= m > -fraction * np.abs(thresholds[name])
        bits[fired] |= np.uint16(BITS[name])
        if name in CLOUD_TESTS:
            fired_any |= fired
    mask = np.full(shape, CLEAR, np.int8)
    mask[near_any] = MARGINAL
    mask[fired_any] = CLOUD
    if has_3p9 and night is not None:
        bits |= np.where(valid & ~night, BITS["daylight_3p9um_unused"], 0).astype(np.uint16)
    if edits is not None:
        mask = np.where(edits == 1, CLEAR, mask)
        mask = np.where(edits == 2, CLOUD, mask)
        bits |= np.where(edits == 1, BITS["analyst_clear"], 0).astype(np.uint16)
        bits |= np.where(edits == 2, BITS["analyst_cloud"], 0).astype(np.uint16)
    mask = np.where(valid, mask, NO_DATA).astype(np.int8)
    bits = np.where(valid, bits, 0).astype(np.uint16)
    return mask, bits


def bias_sums(departure, slant_path, mask, bits, valid):
    """Sums for the clear-sky bias fit over pixels passing every test (additive over blocks).

    Returns dict channel -> array [n, Σx, Σy, Σx², Σxy, Σy²] (float64), x = W sec θ.
    """
    use = valid & (mask == CLEAR) & ((bits & BITS["warm_departure"]) == 0)
    x_all = np.asarray(slant_path, dtype=float)
    out = {}
    for ch, d in departure.items():
        ok = use & np.isfinite(d) & np.isfinite(x_all)
        x = x_all[ok]
        y = np.asarray(d, dtype=float)[ok]
        out[ch] = np.array([x.size, x.sum(), y.sum(), (x * x).sum(), (x * y).sum(), (y * y).sum()])
    return out


def bias_from_sums(sums, min_pixels):
    """Least-squares line departure = a + b·x from :func:`bias_sums` (closed form).

    Returns dict channel -> {"a" [K], "b" [K per kg m⁻²], "n", "rms" [K]}; a, b NaN when
    fewer than ``min_pixels`` clear pixels; b = 0 when x does not vary.
    """
    out = {}
    for ch, (n, sx, sy, sxx, sxy, syy) in sums.items():
        n = int(n)
        if n < min_pixels:
            out[ch] = {"a": float("nan"), "b": float("nan"), "n": n, "rms": float("nan")}
            continue
        var_x = sxx - sx * sx / n
        if var_x <= 1e-12 * max(sxx, 1.0):
            a, b = sy / n, 0.0
        else:
            b = (sxy - sx * sy / n) / var_x
            a = (sy - b * sx) / n
        # Rounded far below any physical meaning (1e-9 K, 1e-12 K per kg m⁻²) so that sums
        # accumulated in a different order (the chunked path adds them block by block) give
        # the very same line.
        a, b = round(float(a), 9), round(float(b), 12)
        # residual sum of squares Σ(y − a − b x)² expanded in the sums
        rss = syy - 2 * a * sy - 2 * b * sxy + n * a * a + 2 * a * b * sx + b * b * sxx
        out[ch] = {"a": float(a), "b": float(b), "n": n, "rms": float(np.sqrt(max(rss, 0.0) / n))}
    return out


def fit_bias(departure, sim, mask, bits, valid, min_pixels):
    """Clear-sky bias per channel: departure = a + b · (W sec θ) over pixels passing every test.

    Returns dict channel -> {"a" [K], "b" [K per kg m⁻²], "n", "rms" [K]} (a, b NaN when
    fewer than ``min_pixels`` clear pixels).
    """
    return bias_from_sums(bias_sums(departure, sim.slant_path, mask, bits, valid), min_pixels)


def edits_grid(shape, edits):
    """Apply a sequence of QA edits ({'action', 'index'}) to an int8 override grid."""
    grid = np.zeros(shape, np.int8).ravel()
    for e in edits or ():
        code = {"clear": 1, "cloud": 2, "reset": 0}[e["action"]]
        grid[np.asarray(e["index"], dtype=np.int64)] = code
    return grid.reshape(shape)


def screen_arrays(obs, bt_clear, fields, config, bias=None, edit_codes=None, night_any=None, day_any=None,
                  cache=None):
    """Departures, test margins, classes and bits for a grid or a block of one (no global step).

    Parameters
    ----------
    obs, bt_clear : dict channel -> (y, x) observed and clear-sky brightness temperature [K]
    fields : mapping of (y, x) arrays: surface, valid, sol_zenith, slant_path
    config : dict
    bias : dict channel -> {"a", "b"}, optional
        Clear-sky bias line to subtract from the departures.
    edit_codes : (y, x) int8, optional
        Analyst overrides (0 none, 1 clear, 2 cloud).
    night_any, day_any : bool, optional
        Scene-wide flags (see :func:`run_tests`).
    cache : dict, optional
        See :func:`screen`.

    Returns
    -------
    dict with departure, margins, thresholds, mask, bits, sigma, skipped, notes
    """
    bias_key = tuple(sorted((c, b["a"], b["b"]) for c, b in bias.items())) if bias else None
    sigma_key = ("sigma", json.dumps(config["clear_sky_uncertainty"], sort_keys=True))
    if cache is not None:
        cache["bias_key"] = bias_key
        # keep the arrays of the raw departures and of the latest bias line only
        for k in [k for k in cache if isinstance(k, tuple) and k[0] in ("departure", "texture")
                  and k[-1] not in (None, bias_key)]:
            del cache[k]
    # float64 throughout: a float32 field would keep float32 arithmetic (numpy promotion rules)
    fields = dict(fields, slant_path=np.asarray(fields["slant_path"], dtype=float))
    if cache is not None and ("departure", bias_key) in cache and sigma_key in cache:
        departure, sigma = cache[("departure", bias_key)], cache[sigma_key]
    else:
        departure = {ch: (np.asarray(obs[ch], dtype=float) - np.asarray(bt_clear[ch], dtype=float))
                     for ch in bt_clear}
        if bias:
            departure = {ch: d - (bias[ch]["a"] + bias[ch]["b"] * fields["slant_path"])
                         for ch, d in departure.items()}
        sigma = sigma_from_path(fields["surface"], fields["slant_path"], config)
        if cache is not None:
            cache[("departure", bias_key)], cache[sigma_key] = departure, sigma
    margins, thresholds, skipped, notes, night = run_tests(fields, config, departure, sigma, night_any, day_any,
                                                           cache)
    mask, bits = classify(fields["valid"], margins, thresholds, config["screening"]["marginal_fraction"], night,
                          "3p9um" in departure, edit_codes)
    return {"departure": departure, "margins": margins, "thresholds": thresholds, "mask": mask, "bits": bits,
            "sigma": sigma, "skipped": skipped, "notes": notes}


def screen_fields(scene, sim):
    """The per-pixel fields the screening needs, from a loaded scene and its simulation."""
    ds = scene.data
    return {"surface": ds["surface"].values, "valid": ds["valid"].values, "sol_zenith": ds["sol_zenith"].values,
            "slant_path": sim.slant_path}


def screen(scene, sim, config, edits=None, cloud=None, cache=None):
    """Stage 3: departures, tests, classes, bias and the cloud layer for non-clear pixels.

    Parameters
    ----------
    scene : Scene
    sim : Simulation
    config : dict
    edits : list of {"action": "clear"|"cloud"|"reset", "index": flat pixel indices}, optional
    cloud : CloudLayer, optional
        From :func:`invert_all` for the same cloud settings; computed when omitted (and the
        simulation kept level data).
    cache : dict, optional
        An empty dict the caller keeps for this scene and simulation: the departures, the
        clear-sky σ and the texture statistics (none depends on a threshold) are kept in it
        and reused by the next call, so retuning redoes only the threshold arithmetic. The
        arrays returned are shared with the cache: treat them as read-only.

    Returns
    -------
    Screening
    """
    ds = scene.data
    fields = screen_fields(scene, sim)
    obs = {ch: ds[f"bt_{ch}"].values for ch in sim.channels}
    clear = {ch: sim.bt_clear[i] for i, ch in enumerate(sim.channels)}
    edit_codes = edits_grid(fields["valid"].shape, edits) if edits else None
    out = screen_arrays(obs, clear, fields, config, None, edit_codes, cache=cache)
    bias = bias_from_sums(bias_sums(out["departure"], sim.slant_path, out["mask"], out["bits"], fields["valid"]),
                          config["bias"]["min_pixels"])
    applied = False
    notes = out["notes"]
    if config["bias"]["remove"]:
        if all(np.isfinite(b["a"]) for b in bias.values()):
            out = screen_arrays(obs, clear, fields, config, bias, edit_codes, cache=cache)
            notes = out["notes"]
            applied = True
        else:
            notes = notes + [f"bias not removed: fewer than {config['bias']['min_pixels']} clear pixels to fit it"]
    for b in bias.values():
        b["applied"] = applied
    mask = out["mask"]
    counts = {name: float(np.mean(mask == code)) for code, name in enumerate(CLASS_NAMES)}
    result = Screening(out["departure"], out["margins"], mask, out["bits"], counts, bias, notes, out["thresholds"],
                       out["sigma"], None, out["skipped"])
    if type(cloud).__name__ == "_Pending":  # the caller (the model) supplies its cached cloud layer
        return result
    if cloud is None and sim.level_pressure is not None:
        cloud = invert_all(scene, sim, config, {c: (b["a"], b["b"]) for c, b in bias.items()} if applied else None)
    if cloud is not None:
        result.cloud = mask_cloud_layer(cloud, mask)
    return result


def mask_cloud_layer(cloud, mask):
    """The cloud layer restricted to pixels classed marginal or cloud (others: not_cloudy)."""
    keep = (mask == CLOUD) | (mask == MARGINAL)
    nan = lambda a: np.where(keep, a, np.nan)  # noqa: E731
    return CloudLayer(
        np.where(keep[None], cloud.emissivity, np.nan), nan(cloud.optical_depth), nan(cloud.optical_depth_sigma),
        nan(cloud.extinction_optical_depth), nan(cloud.top_pressure), nan(cloud.top_temperature),
        np.where(keep, cloud.status, pcloud.STATUS_NOT_CLOUDY).astype(np.int8), keep & cloud.uncertain,
        cloud.channels, cloud.method, list(cloud.notes),
    )


def summary(scene, sim, result):
    """A short dict summary of a screened scene (for the CLI table and the dashboard)."""
    c = result.counts
    return {
        "scene": scene.name,
        "pixels": int(result.mask.size),
        "clear": round(c["clear"], 4),
        "marginal": round(c["marginal"], 4),
        "cloud": round(c["cloud"], 4),
        "no_data": round(c["no_data"], 4),
        "bias": {ch: {k: (round(v, 4) if isinstance(v, float) else v) for k, v in b.items()}
                 for ch, b in result.bias.items()},
        "skipped_tests": result.skipped,
        "notes": result.notes + (result.cloud.notes if result.cloud else []),
    }


def notes_json(result):
    return json.dumps(result.notes)
