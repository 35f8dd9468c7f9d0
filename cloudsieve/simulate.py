"""Clear-sky simulation of scene pixels: the one column loop every path uses.

:func:`simulate_columns` turns the background of a set of pixels (1-D over pixels) into
clear-sky brightness temperatures, radiances and, on request, the per-level data the cloud
inversion needs; it runs :func:`physics.clearsky.simulate_channel_major` over chunks of
``[simulation] chunk_pixels`` columns, on threads when asked. :func:`gather_columns` takes those
inputs from the (y, x) fields of a whole grid or of a block of rows, so that the dashboard's
whole-scene :func:`simulate`, the per-pixel :class:`ColumnSimulator` and the block pipeline
(:mod:`cloudsieve.batch`) share the same arithmetic and give the same bits.
"""
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
import threading
import time

import numpy as np

from physics.absorption import channel_coefficients
from physics.atmosphere import profile_levels_first
from physics.channels import default_channels
from physics.clearsky import simulate_channel_major
from physics.surface import emissivity_angle_factor

from .codes import SURFACE_CODES, per_surface
from .config import absorption_table

#: Above this many valid pixels the dashboard's simulation keeps no per-level data (≈ 0.8 kB
#: per pixel); the cloud inversion and the pixel inspector then simulate the columns they need.
LEVELS_PIXEL_LIMIT = 2_000_000
#: Surface pressure where a scene leaves it missing [hPa]
DEFAULT_SURFACE_PRESSURE = 1013.25
PROFILE_FIELDS = ("pressure", "temperature", "q")


def scene_channels(config, names):
    """physics Channel objects for ``names`` (defaults overridden by the config's [channels])."""
    overrides = {k: (v["centre"], v["width"]) for k, v in config.get("channels", {}).items()}
    chans = default_channels(overrides)
    return tuple(chans[n] for n in names)


@dataclass(frozen=True)
class ChannelSet:
    """The scene's channels with their absorption coefficients (built once per scene).

    names : channel names in scene order
    channels : physics Channel per name
    coefficients : channel-effective absorption coefficients (physics.absorption)
    """

    names: tuple
    channels: tuple
    coefficients: object

    @classmethod
    def for_scene(cls, names, config):
        chans = scene_channels(config, tuple(names))
        return cls(tuple(names), chans, channel_coefficients(chans, absorption_table(config)))


def surface_emissivity(fields, chset, config):
    """(n_ch, y, x) emissivity: ``emis_<ch>`` where the scene gives it, else the surface default.

    Parameters
    ----------
    fields : mapping of (y, x) arrays
        ``surface`` codes, ``sat_zenith`` [deg] and any ``emis_<ch>`` [1].
    chset : ChannelSet
    config : dict
        ``[surface.emissivity]`` nadir values per surface type; with ``[surface.sea_view_angle]
        model = "fresnel"`` the sea value is scaled by the smooth-water emissivity's fall with
        view angle (physics.surface.emissivity_angle_factor) at the channel's central wavelength.

    Returns
    -------
    ndarray (n_ch, y, x) [1]
    """
    codes = fields["surface"]
    table = config["surface"]["emissivity"]
    angle = config["surface"]["sea_view_angle"]
    out = []
    for chan in chset.channels:
        ch = chan.name
        default = {s: table[s].get(ch, table[s].get("11um", 0.98)) for s in ("sea", "land", "ice")}
        e = per_surface(default, codes)
        if angle["model"] == "fresnel":
            wavelength = 1.0e4 / chan.central_wavenumber  # [um]
            n = np.interp(wavelength, angle["wavelength"], angle["n"])
            k = np.interp(wavelength, angle["wavelength"], angle["k"])
            zen = np.nan_to_num(np.asarray(fields["sat_zenith"], dtype=float))
            e = np.where(codes == SURFACE_CODES["sea"], e * emissivity_angle_factor(n, k, zen), e)
        given = fields.get(f"emis_{ch}")
        if given is not None:
            e = np.where(np.isfinite(given), given, e)
        out.append(e)
    return np.stack(out)


def slant_path(tcwv, sat_zenith):
    """Water-vapour slant path W·sec θ, float32 [kg m⁻²] from tcwv [kg m⁻²] and θ [deg]."""
    return (np.asarray(tcwv) / np.cos(np.deg2rad(np.asarray(sat_zenith)))).astype(np.float32)


@dataclass
class Columns:
    """Inputs of a set of pixel columns (float32, pixels along the last axis).

    t_air [K], tcwv [kg m⁻²], p_surf [hPa], t_skin [K], sat_zenith [deg] : (n,)
    emissivity : (n_ch, n) [1]
    profiles : None, or explicit (pressure [hPa], temperature [K], q [kg kg⁻¹]), each (n_lev, n)
    """

    t_air: np.ndarray
    tcwv: np.ndarray
    p_surf: np.ndarray
    t_skin: np.ndarray
    sat_zenith: np.ndarray
    emissivity: np.ndarray
    profiles: tuple = None

    @property
    def size(self):
        return self.t_air.size


def gather_columns(fields, emissivity, flat_index):
    """The :class:`Columns` of pixels ``flat_index`` of a grid (or block) of fields.

    Parameters
    ----------
    fields : mapping of arrays
        (y, x) ``t_air``, ``tcwv``, ``p_surf``, ``t_skin``, ``sat_zenith``; optional
        ``profile_pressure``, ``profile_temperature``, ``profile_q`` on (y, x, level).
    emissivity : (n_ch, y, x) array [1]
    flat_index : (n,) int
        Flat indices into the (y, x) grid.
    """
    f32 = np.float32

    def take(name):
        return np.asarray(fields[name]).ravel()[flat_index].astype(f32)

    p_surf = take("p_surf")
    profiles = None
    if all(f"profile_{k}" in fields for k in PROFILE_FIELDS):
        n_pix = np.asarray(fields["t_air"]).size
        profiles = tuple(np.ascontiguousarray(np.asarray(fields[f"profile_{k}"]).reshape(n_pix, -1)[flat_index]
                                              .astype(f32).T) for k in PROFILE_FIELDS)
    emis = np.asarray(emissivity).reshape(emissivity.shape[0], -1)[:, flat_index].astype(f32)
    return Columns(take("t_air"), take("tcwv"), np.where(np.isfinite(p_surf), p_surf, f32(DEFAULT_SURFACE_PRESSURE)),
                   take("t_skin"), take("sat_zenith"), emis, profiles)


@dataclass
class ColumnResult:
    """Clear-sky results of a set of columns (float32).

    brightness_temperature [K], radiance [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹] : (n_ch, n)
    level_pressure [hPa], level_temperature [K] : (n, n_levels), or None without levels
    opaque_radiance : (n, n_levels, n_ch) radiance of an opaque surface at each level seen
        from space [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹], or None without levels
    """

    brightness_temperature: np.ndarray
    radiance: np.ndarray
    level_pressure: np.ndarray = None
    level_temperature: np.ndarray = None
    opaque_radiance: np.ndarray = None


_POOLS = {}
_POOLS_LOCK = threading.Lock()


def worker_pool(threads):
    """The process's pool of ``threads`` worker threads for column chunks, started once: a
    screening calls the simulation several times (clear sky, the Jacobians of its σ), and starting
    threads for each call costs about as much as simulating a few thousand columns. Its tasks never
    wait on other tasks of the pool, so callers on any thread may share it."""
    with _POOLS_LOCK:
        pool = _POOLS.get(threads)
        if pool is None:
            pool = _POOLS[threads] = ThreadPoolExecutor(threads, thread_name_prefix=f"cloudsieve-columns-{threads}")
        return pool


def simulate_columns(cols, chset, sim_cfg, levels=False, threads=1, progress=None, profile_options=None):
    """Simulate pixel columns chunk by chunk (the one column loop of cloudsieve).

    Parameters
    ----------
    cols : Columns
    chset : ChannelSet
    sim_cfg : mapping
        The ``[simulation]`` table: ``levels``, ``top_pressure`` [hPa], ``chunk_pixels``.
    levels : bool
        Also return the per-level data the cloud inversion needs.
    threads : int
        Chunks run on this many threads (each writes its own columns of the outputs).
    progress : callable(n_done, n_total), optional
    profile_options : mapping, optional
        Other parameters of the profile built from the surface numbers
        (physics.atmosphere.profile_levels_first: ``lapse_rate`` [K m⁻¹], ``humidity_exponent`` [1]).

    Returns
    -------
    ColumnResult
    """
    f32 = np.float32
    n = cols.size
    n_ch = len(chset.names)
    n_lev = cols.profiles[0].shape[0] if cols.profiles is not None else int(sim_cfg["levels"])
    out = ColumnResult(np.empty((n_ch, n), f32), np.empty((n_ch, n), f32))
    if levels:
        out.level_pressure = np.empty((n, n_lev), f32)
        out.level_temperature = np.empty((n, n_lev), f32)
        out.opaque_radiance = np.empty((n, n_lev, n_ch), f32)
    chunk = int(sim_cfg["chunk_pixels"])

    def run(start):
        sl = slice(start, min(start + chunk, n))
        if cols.profiles is not None:
            p, t, q = (np.ascontiguousarray(a[:, sl]) for a in cols.profiles)
        else:
            p, t, q = profile_levels_first(cols.t_air[sl], cols.tcwv[sl], cols.p_surf[sl], n_lev,
                                           sim_cfg["top_pressure"], dtype=f32, **(profile_options or {}))
        r = simulate_channel_major(p, t, q, cols.t_skin[sl], np.ascontiguousarray(cols.emissivity[:, sl]),
                                   cols.sat_zenith[sl], chset.channels, chset.coefficients, levels=levels)
        out.radiance[:, sl] = r.radiance
        out.brightness_temperature[:, sl] = r.brightness_temperature
        if levels:
            out.level_pressure[sl] = p.T
            out.level_temperature[sl] = t.T
            out.opaque_radiance[sl] = r.opaque_radiance.transpose(2, 1, 0)
        return sl.stop - sl.start

    starts = range(0, n, chunk)
    done = 0
    if threads <= 1 or len(starts) < 2:
        for s in starts:
            done += run(s)
            if progress:
                progress(done, n)
    else:
        for k in worker_pool(threads).map(run, starts):
            done += k
            if progress:
                progress(done, n)
    return out


def level_chunk(config):
    """Columns whose level data exist at once when the inversion re-simulates them (≈ 0.8 kB each)."""
    return max(1024, int(config["simulation"]["chunk_pixels"]) * 16)


def use_scene_clear_sky(res, fields, chset, flat_index):
    """Put the scene's own clear-sky values (``bt_clear_<ch>``, where finite) into a ColumnResult.

    ``res`` holds the simulated columns of pixels ``flat_index`` of ``fields``; its brightness
    temperatures [K] and radiances are replaced in place where the scene gives a value.
    """
    for i, ch in enumerate(chset.names):
        if f"bt_clear_{ch}" not in fields:
            continue
        given = np.asarray(fields[f"bt_clear_{ch}"]).ravel()[flat_index].astype(np.float32)
        use = np.isfinite(given)
        res.brightness_temperature[i] = np.where(use, given, res.brightness_temperature[i])
        res.radiance[i] = np.where(use, chset.channels[i].radiance(given), res.radiance[i])
    return res


def clear_sky_source(fields, names):
    """Per channel where the clear sky comes from: "simulated", "user" (the scene gives
    ``bt_clear_<ch>`` at every valid pixel) or "user+simulated".

    ``fields`` maps names to (y, x) arrays, numpy or dask (counted in one pass).
    """
    import dask

    valid = fields["valid"]
    counts = {c: ((np.isfinite(fields[f"bt_clear_{c}"]) & valid).sum(), valid.sum())
              for c in names if f"bt_clear_{c}" in fields}
    (counts,) = dask.compute(counts, scheduler="threads")
    out = {}
    for ch in names:
        n_given, n_valid = counts.get(ch, (0, 0))
        out[ch] = "user" if n_given and n_given == n_valid else ("user+simulated" if n_given else "simulated")
    return out


@dataclass
class Simulation:
    """Clear-sky simulation of a whole scene (the dashboard's stage 1).

    channels : names of the scene's channels, in order
    bt_clear : (n_ch, y, x) float32 clear-sky brightness temperature [K] (NaN at no_data)
    source : per channel, "simulated", "user" or "user+simulated" (``bt_clear_<ch>`` given)
    slant_path : (y, x) float32 water-vapour slant path W·sec θ [kg m⁻²]
    valid_index : (n_valid,) flat indices of the valid pixels
    level_pressure, level_temperature : (n_valid, n_levels) float32 [hPa], [K], or None
    opaque_radiance : (n_valid, n_levels, n_ch) float32 [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹], or None
    clear_radiance : (n_valid, n_ch) float32 [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹]
    chset : the scene's ChannelSet
    seconds : wall time of the simulation [s]
    sigma : {name: (y, x) float32} the clear-sky σ's [K] (cloudsieve.uncertainty.sigma_grids)
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
    chset: ChannelSet
    seconds: float = 0.0
    sigma: dict = None

    @property
    def channel_objects(self):
        return self.chset.channels


def scene_fields(ds):
    """The (y, x) (and profile) arrays of an in-memory scene Dataset, by name."""
    return {name: var.values for name, var in ds.data_vars.items()}


def simulate(scene, config, progress=None, levels=None):
    """Clear-sky brightness temperatures (and inversion inputs) of every valid pixel of a scene.

    Parameters
    ----------
    scene : cloudsieve.scene.Scene (in memory)
    config : dict
    progress : callable(n_done, n_total), optional
    levels : bool, optional
        Keep the per-level arrays for the cloud inversion; by default only for scenes of up
        to ``LEVELS_PIXEL_LIMIT`` valid pixels.

    Returns
    -------
    Simulation
    """
    t0 = time.perf_counter()
    ds = scene.data
    fields = scene_fields(ds)
    names = tuple(scene.channels)
    chset = ChannelSet.for_scene(names, config)
    ny, nx = ds.sizes["y"], ds.sizes["x"]
    idx = np.flatnonzero(fields["valid"].ravel())
    if levels is None:
        levels = idx.size <= LEVELS_PIXEL_LIMIT
    emis = surface_emissivity(fields, chset, config)
    cols = gather_columns(fields, emis, idx)
    res = simulate_columns(cols, chset, config["simulation"], levels=levels,
                           threads=max(1, int(config["simulation"].get("threads", 1))), progress=progress)
    use_scene_clear_sky(res, fields, chset, idx)
    from .uncertainty import sigma_grids  # uncertainty re-simulates columns with this module's loop

    sigma = sigma_grids(cols, fields["surface"].ravel()[idx], chset, config, idx, (ny, nx),
                        threads=max(1, int(config["simulation"].get("threads", 1))))
    bt_full = np.full((len(names), ny * nx), np.nan, np.float32)
    bt_full[:, idx] = res.brightness_temperature
    return Simulation(names, bt_full.reshape(len(names), ny, nx), clear_sky_source(fields, names),
                      slant_path(fields["tcwv"], fields["sat_zenith"]), idx, res.level_pressure,
                      res.level_temperature, res.opaque_radiance, res.radiance.T.copy(), chset,
                      time.perf_counter() - t0, sigma)


class ColumnSimulator:
    """Per-level data of chosen pixels of an in-memory scene, simulated on demand.

    Used where the level data of every pixel would not fit in memory (large scenes in the
    dashboard): the cloud inversion and the pixel inspector simulate just the columns they
    need, with the same column loop as :func:`simulate`, so the values are the same.
    """

    def __init__(self, scene, config):
        self.fields = scene_fields(scene.data)
        self.chset = ChannelSet.for_scene(tuple(scene.channels), config)
        self.sim_cfg = config["simulation"]
        self.emis = surface_emissivity(self.fields, self.chset, config)

    def levels(self, idx):
        """(level pressure, level temperature, opaque radiance) of flat pixel indices ``idx``."""
        r = simulate_columns(gather_columns(self.fields, self.emis, idx), self.chset, self.sim_cfg, levels=True)
        return r.level_pressure, r.level_temperature, r.opaque_radiance
