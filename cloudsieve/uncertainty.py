"""Error budget of the clear-sky brightness temperature of pixel columns.

For each channel the simulated clear-sky brightness temperature T is a function of the
background: skin temperature, air temperature and lapse rate of the profile, water-vapour column
and the shape of its profile, surface emissivity, and the strength of the water-vapour
continuum. Its sensitivities (Jacobians ∂T/∂x) come from columns simulated again with one input
changed at a time (the one column loop, :func:`cloudsieve.simulate.simulate_columns`); with the
background-error σ of each input per surface type (``[background_errors]``) and the instrument
noise (``[instrument]``), the budget is

    σ_T² = Σ_i (∂T/∂x_i · σ_i)² + NEΔT(T)²,

the inputs' errors taken as independent. The 11 − 12 µm difference has its own budget from the
differences of the two channels' Jacobians, so errors common to both (most of the skin
temperature's) cancel instead of adding. The instrument noise is a constant radiance noise
NEΔL = NEΔT_ref · dB/dT(T_ref): its temperature equivalent NEΔT(T) = NEΔL / (dB/dT)(T) grows
fast at cold scenes, above all at 3.9 µm.

:func:`error_budget` simulates each column seven more times (the pixel inspector's
breakdown). The screening's per-pixel σ (:func:`clear_sky_sigma`) evaluates the same
Jacobians once per bin of background state, so a scene costs a small fraction of a second
simulation; the emissivity error that differs between channels (``emissivity_contrast``) and
the part of the background errors that is independent from pixel to pixel
(``[background_noise]``, for the texture test) are added there. A scene with explicit
profiles has no profile-shape components (lapse rate, humidity exponent); its air temperature
and water vapour are shifted and scaled in the profile given.
"""
from dataclasses import dataclass, replace
import copy

import numpy as np
import pandas as pd

from physics.absorption import channel_coefficients
from physics.atmosphere import DEFAULT_HUMIDITY_EXPONENT, DEFAULT_LAPSE_RATE

from .codes import per_surface
from .config import absorption_table
from .simulate import ChannelSet, Columns, simulate_columns

#: The inputs of the budget: (config key of its σ, label, unit of σ, step of the perturbation)
COMPONENTS = (
    ("skin_temperature", "skin temperature", "K", 0.5),
    ("air_temperature", "air temperature (whole profile)", "K", 0.5),
    ("lapse_rate", "lapse rate", "K km⁻¹", 0.5),
    ("water_vapour", "water-vapour column (relative)", "1", 0.05),
    ("humidity_exponent", "humidity profile shape (exponent)", "1", 0.5),
    ("emissivity", "surface emissivity", "1", 0.005),
    ("continuum", "water-vapour continuum strength (relative)", "1", 0.10),
)
#: Components of the profile's shape: zero for explicit profiles, which are not rebuilt from the
#: surface numbers (their air temperature and water vapour are shifted and scaled as given)
PROFILE_COMPONENTS = ("lapse_rate", "humidity_exponent")


@dataclass
class ErrorBudget:
    """Clear-sky error budget of n columns.

    channels : channel names; components : the input names (``COMPONENTS`` order)
    input_sigma : (n, n_comp) background-error σ of each input [its unit in ``COMPONENTS``]
    jacobian : (n, n_ch, n_comp) ∂T/∂x [K per unit of the input]
    contribution : (n, n_ch, n_comp) |∂T/∂x| σ [K]
    noise : (n, n_ch) instrument NEΔT at the clear-sky brightness temperature [K]
    total : (n, n_ch) σ of the clear-sky brightness temperature [K]
    split_window : (n,) σ of T11 − T12 with the two channels' errors correlated [K], or None
    contrast : (n, n_ch) part from the emissivity error that differs between channels [K]
    difference : dict "a-b" -> (n,) σ of T_a − T_b (``DIFFERENCES`` present), errors correlated [K]
    """

    channels: tuple
    components: tuple
    input_sigma: np.ndarray
    jacobian: np.ndarray
    contribution: np.ndarray
    noise: np.ndarray
    total: np.ndarray
    split_window: np.ndarray = None
    contrast: np.ndarray = None
    difference: dict = None


def noise_equivalent_temperature(channel, temperature, nedt_ref, t_ref):
    """NEΔT of a channel at scene brightness temperature ``temperature`` [K].

    A detector's noise is (to first order) a constant radiance NEΔL = NEΔT_ref · dB/dT(T_ref),
    quoted as NEΔT_ref [K] at a reference scene temperature T_ref [K]; at another scene
    temperature NEΔT(T) = NEΔL / (dB/dT)(T) (common practice in sensor specifications).
    """
    return nedt_ref * channel.radiance_derivative(np.float64(t_ref)) / channel.radiance_derivative(
        np.asarray(temperature, dtype=np.float64))


def _scaled_continuum(chset, config, factor):
    table = copy.deepcopy(absorption_table(config))
    sc = table["self_continuum"]
    for key in ("a", "b"):
        sc[key]["value"] = sc[key]["value"] * factor
    sc["outside_k296"]["value"] = [v * factor for v in sc["outside_k296"]["value"]]
    return ChannelSet(chset.names, chset.channels, channel_coefficients(chset.channels, table))


def _concat(columns):
    """One :class:`Columns` of the columns of several (pixels along the last axis, in order)."""
    cat = lambda name: np.concatenate([getattr(c, name) for c in columns], axis=-1)  # noqa: E731
    profiles = None
    if columns[0].profiles is not None:
        profiles = tuple(np.concatenate([c.profiles[k] for c in columns], axis=-1) for k in range(3))
    return Columns(cat("t_air"), cat("tcwv"), cat("p_surf"), cat("t_skin"), cat("sat_zenith"), cat("emissivity"),
                   profiles)


def _jacobians(cols, chset, config, threads=1):
    """Clear-sky brightness temperature (n_ch, n) and its Jacobians (n, n_ch, n_comp) of
    columns ``cols``, by re-simulated columns (one input changed at a time, ``COMPONENTS``).

    The changes of a column's own inputs (skin and air temperature, water vapour, emissivity)
    are simulated together with the unchanged columns in one call; the profile's shape and the
    continuum, which change the profile builder or the absorption table, in one call each."""
    sim_cfg = config["simulation"]
    n = cols.size
    profile_default = {"lapse_rate": DEFAULT_LAPSE_RATE, "humidity_exponent": DEFAULT_HUMIDITY_EXPONENT}
    together, alone = [cols], {}  # columns changed in their own inputs; (chset, options) of the others
    for key, _, _, step in COMPONENTS:
        if key == "skin_temperature":
            together.append(replace(cols, t_skin=cols.t_skin + np.float32(step)))
        elif key == "air_temperature" and cols.profiles is not None:  # the whole profile given
            pr, tm, q = cols.profiles
            together.append(replace(cols, profiles=(pr, tm + np.float32(step), q)))
        elif key == "air_temperature":
            together.append(replace(cols, t_air=cols.t_air + np.float32(step)))
        elif key == "water_vapour" and cols.profiles is not None:
            pr, tm, q = cols.profiles
            together.append(replace(cols, profiles=(pr, tm, q * np.float32(1.0 + step))))
        elif key == "water_vapour":
            together.append(replace(cols, tcwv=cols.tcwv * np.float32(1.0 + step)))
        elif key == "emissivity":
            together.append(replace(cols, emissivity=np.minimum(cols.emissivity + np.float32(step), np.float32(1.0))))
        elif key in PROFILE_COMPONENTS and cols.profiles is None:  # K km⁻¹ → the profile builder's K m⁻¹
            value = DEFAULT_LAPSE_RATE + step / 1000.0 if key == "lapse_rate" else DEFAULT_HUMIDITY_EXPONENT + step
            alone[key] = (chset, dict(profile_default, **{key: value}))
        elif key == "continuum":
            alone[key] = (_scaled_continuum(chset, config, 1.0 + step), None)
    bt_together = simulate_columns(_concat(together), chset, sim_cfg, threads=threads).brightness_temperature
    bt_together = bt_together.astype(np.float64)
    base = bt_together[:, :n]
    shifted = {key: bt_together[:, (k + 1) * n:(k + 2) * n] for k, key in
               enumerate(k for k, *_ in COMPONENTS if k in ("skin_temperature", "air_temperature", "water_vapour",
                                                           "emissivity"))}
    for key, (cs, opts) in alone.items():
        shifted[key] = simulate_columns(cols, cs, sim_cfg, profile_options=opts, threads=threads
                                        ).brightness_temperature.astype(np.float64)
    jac = []
    for key, _, _, step in COMPONENTS:
        if key not in shifted:  # an explicit profile is not rebuilt from the surface numbers
            jac.append(np.zeros_like(base))
        elif key == "emissivity":  # the step may be cut at 1
            d_eps = (together[-1].emissivity - cols.emissivity).astype(np.float64)
            jac.append(np.where(d_eps > 0, (shifted[key] - base) / np.where(d_eps > 0, d_eps, 1.0), 0.0))
        else:
            jac.append((shifted[key] - base) / step)
    return np.ascontiguousarray(base), np.moveaxis(np.stack(jac), (0, 1, 2), (2, 1, 0))


def _noise(chset, bt, config):
    """(n, n_ch) instrument NEΔT [K] at brightness temperatures ``bt`` (n_ch, n) [K]."""
    inst = config["instrument"]
    return np.stack([noise_equivalent_temperature(ch, bt[i], inst["nedt"].get(ch.name, inst["nedt_default"]),
                                                  inst["reference_temperature"])
                     for i, ch in enumerate(chset.channels)], axis=-1)


def error_budget(cols, chset, config, surface):
    """The :class:`ErrorBudget` of columns ``cols`` (simulate.Columns) on ``surface`` codes (n,),
    each column simulated at its own state (the pixel inspector's breakdown)."""
    errs = config["background_errors"]
    base, jacobian = _jacobians(cols, chset, config)
    input_sigma = np.stack([per_surface(errs[key], surface) for key, *_ in COMPONENTS], axis=-1)  # (n, n_comp)
    contribution = np.abs(jacobian) * input_sigma[:, None, :]
    noise = _noise(chset, base, config)
    contrast = _contrast_sigma(jacobian, surface, config)  # (n, n_ch)
    total = np.sqrt(np.sum(contribution**2, axis=-1) + contrast**2 + noise**2)
    difference = {}
    for a, b in DIFFERENCES:
        if a in chset.names and b in chset.names:
            i, j = chset.names.index(a), chset.names.index(b)
            diff = (jacobian[:, i] - jacobian[:, j]) * input_sigma
            difference[f"{a}-{b}"] = np.sqrt(np.sum(diff**2, axis=-1) + contrast[:, i] ** 2 + contrast[:, j] ** 2
                                             + noise[:, i] ** 2 + noise[:, j] ** 2)
    return ErrorBudget(chset.names, tuple(k for k, *_ in COMPONENTS), input_sigma, jacobian, contribution, noise,
                       total, difference.get("11um-12um"), contrast, difference)


def _contrast_sigma(jacobian, surface, config):
    """(n, n_ch) σ [K] from the emissivity error that differs between channels (independent per
    channel): |∂T/∂ε| σ_contrast."""
    k = [c[0] for c in COMPONENTS].index("emissivity")
    return np.abs(jacobian[:, :, k]) * per_surface(config["background_errors"]["emissivity_contrast"],
                                                   surface)[:, None]


# ---------------------------------------------------------------------------------------
# σ of every pixel of a scene: Jacobians at binned states
# ---------------------------------------------------------------------------------------
#: Bin widths of the background state at which a pixel's Jacobians are evaluated (ours):
#: ln tcwv [1], t_air [K], t_skin − t_air [K], sec θ [1], p_surf [hPa], emissivity [1]. The
#: Jacobians change by a few per cent across a bin (tests/test_uncertainty.py holds the
#: binned σ to the per-pixel budget), while a scene of smooth fields has few distinct bins.
BIN_WIDTHS = {"log_tcwv": 0.04, "t_air": 1.0, "skin_minus_air": 1.0, "sec_zenith": 0.02, "p_surf": 10.0,
              "emissivity": 0.005}

#: Channel pairs whose difference a test or the cloud inversion uses: its σ has its own budget
#: (correlated errors; the cloud top's χ² reads the channels' correlation from it)
DIFFERENCES = (("11um", "12um"), ("3p9um", "11um"), ("8p6um", "11um"), ("8p6um", "12um"))


@dataclass
class ClearSkySigma:
    """Expected 1-σ error of the clear-sky brightness temperatures of n pixels [K].

    channels : channel names
    total : (n_ch, n) all background errors and the instrument noise
    pixel : (n_ch, n) the part independent from pixel to pixel: ``[background_noise]`` and the
        instrument noise (what roughens a clear departure field on the pixel scale)
    noise : (n_ch, n) the instrument NEΔT alone
    difference : dict "a-b" -> (n,) σ of T_a − T_b with the two channels' errors correlated
    bins : number of distinct background states the Jacobians were evaluated at
    difference_pixel : dict "a-b" -> (n,) the part of that σ independent from pixel to pixel
    """

    channels: tuple
    total: np.ndarray
    pixel: np.ndarray
    noise: np.ndarray
    difference: dict
    bins: int = 0
    difference_pixel: dict = None

    def as_dict(self, parts=None):
        """{channel: σ, "a-b": σ of the difference, "noise:<ch>": the NEΔT, "pixel:<ch>" and
        "pixel:<a-b>": the parts independent from pixel to pixel}; "pixel:<ch>" for the channels
        ``parts`` only (all when None; memory)."""
        out = {c: self.total[i] for i, c in enumerate(self.channels)}
        out.update(self.difference)
        out.update({f"pixel:{k}": v for k, v in (self.difference_pixel or {}).items()})
        for i, c in enumerate(self.channels):
            out[f"noise:{c}"] = self.noise[i]
            if parts is None or c in parts:
                out[f"pixel:{c}"] = self.pixel[i]
        return out


def _bin_components(cols, surface):
    """The bin index of each column's background state, one int32 array per component
    (``BIN_WIDTHS``; float32 arithmetic is exact enough for these widths). The reference of
    :func:`_bin_codes_compiled` (tests hold the two together)."""
    w = BIN_WIDTHS
    f32 = np.float32
    sec = f32(1.0) / np.cos(np.deg2rad(cols.sat_zenith.astype(f32)))
    comps = [np.asarray(surface).astype(np.int32),
             np.log(np.maximum(cols.tcwv, f32(1e-3))) / f32(w["log_tcwv"]),
             cols.t_air / f32(w["t_air"]),
             (cols.t_skin - cols.t_air) / f32(w["skin_minus_air"]),
             sec / f32(w["sec_zenith"]),
             cols.p_surf / f32(w["p_surf"])]
    comps += [e / f32(w["emissivity"]) for e in cols.emissivity]
    return [c if c.dtype == np.int32 else np.rint(c).astype(np.int32) for c in comps]


def _bin_codes_numpy(cols, surface):
    """(code, low, span): each column's bin packed into one int64 (mixed radix over the
    components' ranges in this set of columns), and the radix (numpy reference)."""
    comps = _bin_components(cols, surface)
    low = np.array([int(c.min()) for c in comps], np.int64)
    span = np.array([int(c.max()) for c in comps], np.int64) - low + 1
    if np.prod(span.astype(float)) >= 2.0**62:
        return np.stack(comps, axis=-1).astype(np.int64), low, span
    code = np.zeros(comps[0].size, np.int64)
    for c, lo, sp in zip(comps, low, span):
        code *= sp
        code += c - lo
    return code, low, span


_KERNELS = {}
#: pixels per block of the compiled binning passes
_BLOCK = 4096


def _kernels():
    """The compiled binning kernels (numba, parallel over pixels), built on first use; None
    where the compiled physics is off (``CLOUDSIEVE_PHYSICS=numpy``) or numba is missing."""
    from physics import fused

    if not fused.enabled():
        return None
    if not _KERNELS:
        import numba

        opts = dict(parallel=True, nogil=True, error_model="numpy", cache=True)

        @numba.njit(**opts)
        def components(surface, tcwv, t_air, t_skin, sat_zenith, p_surf, emissivity, width, out, low, high):
            # blocks of pixels in parallel; each block's minimum and maximum per component
            f32 = np.float32
            deg = f32(np.pi / 180.0)
            n, k = tcwv.size, out.shape[0]
            for b in numba.prange(low.shape[0]):
                for j in range(k):
                    low[b, j] = np.iinfo(np.int32).max
                    high[b, j] = np.iinfo(np.int32).min
                for p in range(b * _BLOCK, min(n, (b + 1) * _BLOCK)):
                    out[0, p] = surface[p]
                    out[1, p] = np.int32(np.rint(np.log(max(tcwv[p], f32(1e-3))) / width[0]))
                    out[2, p] = np.int32(np.rint(t_air[p] / width[1]))
                    out[3, p] = np.int32(np.rint((t_skin[p] - t_air[p]) / width[2]))
                    out[4, p] = np.int32(np.rint((f32(1.0) / np.cos(sat_zenith[p] * deg)) / width[3]))
                    out[5, p] = np.int32(np.rint(p_surf[p] / width[4]))
                    for c in range(emissivity.shape[0]):
                        out[6 + c, p] = np.int32(np.rint(emissivity[c, p] / width[5]))
                    for j in range(k):
                        low[b, j] = min(low[b, j], out[j, p])
                        high[b, j] = max(high[b, j], out[j, p])

        @numba.njit(**opts)
        def pack(comps, low, span, code):
            for p in numba.prange(code.size):
                v = np.int64(0)
                for j in range(comps.shape[0]):
                    v = v * span[j] + (comps[j, p] - low[j])
                code[p] = v

        @numba.njit(**opts)
        def gather(table, index, out):
            n = index.size
            for b in numba.prange((n + _BLOCK - 1) // _BLOCK):
                stop = min(n, (b + 1) * _BLOCK)
                for r in range(table.shape[1]):  # each output row written contiguously
                    for p in range(b * _BLOCK, stop):
                        out[r, p] = table[index[p], r]

        _KERNELS.update(components=components, pack=pack, gather=gather)
    return _KERNELS


def _bin_codes_compiled(cols, surface, kern):
    """:func:`_bin_codes_numpy` in two compiled passes over the pixels."""
    f32 = np.float32
    w = BIN_WIDTHS
    widths = np.array([w["log_tcwv"], w["t_air"], w["skin_minus_air"], w["sec_zenith"], w["p_surf"],
                       w["emissivity"]], f32)
    n_ch = cols.emissivity.shape[0]
    comps = np.empty((6 + n_ch, cols.size), np.int32)
    blocks = -(-cols.size // _BLOCK)
    low, high = np.empty((blocks, comps.shape[0]), np.int32), np.empty((blocks, comps.shape[0]), np.int32)
    c32 = [np.ascontiguousarray(a, dtype=f32) for a in (cols.tcwv, cols.t_air, cols.t_skin, cols.sat_zenith,
                                                          cols.p_surf)]
    surface = np.ascontiguousarray(surface)
    if surface.dtype.kind not in "iu":
        surface = surface.astype(np.int32)
    kern["components"](surface, *c32, np.asarray(cols.emissivity, dtype=f32), widths, comps, low, high)
    low, high = low.min(axis=0).astype(np.int64), high.max(axis=0).astype(np.int64)
    span = high - low + 1
    if np.prod(span.astype(float)) >= 2.0**62:
        return comps.T.astype(np.int64), low, span
    code = np.empty(cols.size, np.int64)
    kern["pack"](comps, low, span, code)
    return code, low, span


def _bins(cols, surface):
    """(rows, inverse): the distinct bins (m, k) int64 of the columns and each column's bin.

    The components are packed into one int64 per column (mixed radix over their ranges in this
    set of columns) and made unique by hashing; a bin's values do not depend on which columns
    come together or in which order, so every chunking of a scene gives each pixel the same σ."""
    kern = _kernels()
    surface = np.asarray(surface)
    code, low, span = (_bin_codes_compiled(cols, surface, kern) if kern is not None
                       else _bin_codes_numpy(cols, surface))
    if code.ndim == 2:  # not expected for real states; exact but slower
        rows, inverse = np.unique(code, axis=0, return_inverse=True)
        return rows, inverse.ravel()
    inverse, uniq = pd.factorize(code)  # hashing: the bins in order of first appearance
    uniq = np.asarray(uniq, np.int64)
    rows = np.empty((uniq.size, low.size), np.int64)
    for j in range(low.size - 1, -1, -1):
        uniq, rows[:, j] = np.divmod(uniq, span[j])
        rows[:, j] += low[j]
    return rows, inverse.ravel()


def _gather(table, index):
    """(k, n) float32: ``table`` (m, k) rows picked by ``index`` (n,), transposed."""
    table = np.ascontiguousarray(table, dtype=np.float32)
    kern = _kernels()
    if kern is None:
        return np.ascontiguousarray(table.T)[:, index]
    out = np.empty((table.shape[1], index.size), np.float32)
    kern["gather"](table, np.ascontiguousarray(index), out)
    return out


def _bin_columns(rows, n_ch):
    """The :class:`Columns` at the centres of bins ``rows`` (see :func:`_bin_keys`)."""
    w = BIN_WIDTHS
    f32 = np.float32
    t_air = rows[:, 2] * w["t_air"]
    sec = np.maximum(rows[:, 4] * w["sec_zenith"], 1.0)
    return Columns(t_air.astype(f32), np.exp(rows[:, 1] * w["log_tcwv"]).astype(f32),
                   (rows[:, 5] * w["p_surf"]).astype(f32), (t_air + rows[:, 3] * w["skin_minus_air"]).astype(f32),
                   np.rad2deg(np.arccos(1.0 / sec)).astype(f32),
                   np.ascontiguousarray((rows[:, 6:6 + n_ch] * w["emissivity"]).T.astype(f32)))


def clear_sky_sigma(cols, surface, chset, config, threads=1):
    """:class:`ClearSkySigma` of pixel columns ``cols`` (simulate.Columns).

    Parameters
    ----------
    cols : Columns
    surface : (n,) surface codes
    chset : ChannelSet
    config : dict
        ``[background_errors]``, ``[background_noise]``, ``[instrument]``, ``[simulation]``.
    threads : int

    Notes
    -----
    The background part of σ depends on the pixel through its Jacobians. They are evaluated at
    the centre of the pixel's bin of background state (``BIN_WIDTHS``), by the same re-simulated
    columns as :func:`error_budget`, once per distinct bin; columns with explicit profiles are
    evaluated each at its own state (their profile components are zero). The instrument noise
    is evaluated at the bin's simulated clear-sky brightness temperature. With σ_i the background
    error of input i on the pixel's surface type (``[background_errors]``), σ_c the channel-
    independent emissivity error (``emissivity_contrast``) and NEΔT the noise:

        σ_ch² = Σ_i (J_ch,i σ_i)² + (J_ch,ε σ_c)² + NEΔT_ch²
        σ_a−b² = Σ_i ((J_a,i − J_b,i) σ_i)² + (J_a,ε σ_c)² + (J_b,ε σ_c)² + NEΔT_a² + NEΔT_b²
        σ_pixel,ch² = Σ_i (J_ch,i ν_i)² + NEΔT_ch²    (ν_i: ``[background_noise]``)
    """
    n = cols.size
    n_ch = len(chset.names)
    names = chset.names
    surface = np.asarray(surface).ravel()
    if n == 0:
        empty = np.empty((n_ch, 0), np.float32)
        none = {f"{a}-{b}": np.empty(0, np.float32) for a, b in DIFFERENCES if a in names and b in names}
        return ClearSkySigma(names, empty, empty, empty, none, 0, dict(none))
    if cols.profiles is None:
        rows, inverse = _bins(cols, surface)
        bin_bt, jac = _jacobians(_bin_columns(rows, n_ch), chset, config, threads)
        bin_surface = rows[:, 0]
    else:
        bin_bt, jac = _jacobians(cols, chset, config, threads)
        inverse, bin_surface = np.arange(n), surface
    errs, noise_cfg = config["background_errors"], config["background_noise"]
    sig = np.stack([per_surface(errs[key], bin_surface) for key, *_ in COMPONENTS], axis=-1)  # (m, n_comp)
    nu = np.stack([per_surface(noise_cfg.get(key, {"sea": 0.0, "land": 0.0, "ice": 0.0}), bin_surface)
                   for key, *_ in COMPONENTS], axis=-1)
    contrast = _contrast_sigma(jac, bin_surface, config)  # (m, n_ch)
    pairs = [(f"{a}-{b}", names.index(a), names.index(b)) for a, b in DIFFERENCES if a in names and b in names]
    # one table of variances per bin, gathered once for every pixel: background (n_ch), pixel-to-
    # pixel (n_ch), differences (pairs)
    table = [np.sum((jac * sig[:, None, :]) ** 2, axis=-1) + contrast**2, np.sum((jac * nu[:, None, :]) ** 2, axis=-1)]
    table += [(np.sum(((jac[:, i] - jac[:, j]) * sig) ** 2, axis=-1) + contrast[:, i] ** 2 + contrast[:, j] ** 2)[:, None]
              for _, i, j in pairs]
    table += [np.sum(((jac[:, i] - jac[:, j]) * nu) ** 2, axis=-1)[:, None] for _, i, j in pairs]
    # the noise at the bin's clear-sky brightness temperature (within a bin the noise changes by
    # a few per cent at most: 1 K of scene temperature moves NEΔT by < 4 % even at 3.9 µm and 240 K)
    noise2 = _noise(chset, bin_bt, config) ** 2  # (m, n_ch)
    pair_noise = [noise2[:, i] + noise2[:, j] for _, i, j in pairs]
    n_p = len(pairs)
    sd = np.sqrt(np.concatenate([table[0] + noise2, table[1] + noise2, noise2]
                                + [t + pn[:, None] for t, pn in zip(table[2:2 + n_p] + table[2 + n_p:], 2 * pair_noise)],
                                axis=1))
    sd = _gather(sd, inverse)  # (3 n_ch + 2 pairs, n): one gather
    total, pixel, noise = sd[:n_ch], sd[n_ch:2 * n_ch], sd[2 * n_ch:3 * n_ch]
    diff = {name: sd[3 * n_ch + k] for k, (name, _, _) in enumerate(pairs)}
    diff_pixel = {name: sd[3 * n_ch + n_p + k] for k, (name, _, _) in enumerate(pairs)}
    return ClearSkySigma(names, total, pixel, noise, diff, int(jac.shape[0]), diff_pixel)


def sigma_grids(cols, surface, chset, config, flat_index, shape, threads=1):
    """:func:`clear_sky_sigma` of the columns ``cols`` of pixels ``flat_index`` of a (y, x) grid
    of ``shape``, as grids: {name: (y, x) float32 [K]} (``ClearSkySigma.as_dict`` keys, the pixel
    part of the window channel only; NaN at the other pixels). ``surface`` and
    ``bt_clear`` are those of the columns ((n,), (n_ch, n))."""
    from .screen import window_channel

    sig = clear_sky_sigma(cols, surface, chset, config, threads)
    out = {}
    for name, values in sig.as_dict((window_channel(chset.names, config),)).items():
        grid = np.full(int(np.prod(shape)), np.nan, np.float32)
        grid[flat_index] = values
        out[name] = grid.reshape(shape)
    return out


def clear_part(sigma, channel):
    """The clear-sky part of a channel's σ [K]: without the instrument noise of the observation,
    √(σ² − NEΔT²), from :func:`sigma_grids` (what ``bt_clear_uncertainty_<ch>`` holds and the
    cloud inversion adds to its own observation noise)."""
    total, noise = sigma[channel], sigma[f"noise:{channel}"]
    return np.sqrt(np.maximum(total * total - noise * noise, 0.0)).astype(np.float32)


def clear_correlation(sigma, channels, take=lambda a: a):
    """Correlation of the clear-sky errors between ``channels`` per pixel, (..., n, n) [1], from the
    σ grids of :func:`sigma_grids`: for a pair with a difference budget (``DIFFERENCES``),
    ρ = (σ_a² + σ_b² − σ_a−b²) / (2 σ_a σ_b) on the clear-sky parts (noise taken out); other pairs
    0 (independent). ``take`` selects the pixels of each grid (e.g. a flat index)."""
    n = len(channels)
    clr = [np.asarray(take(clear_part(sigma, c)), dtype=float) for c in channels]
    shape = clr[0].shape
    out = np.zeros(shape + (n, n))
    for i in range(n):
        out[..., i, i] = 1.0
    for i, a in enumerate(channels):
        for j, b in enumerate(channels):
            key = f"{a}-{b}"
            if j <= i and f"{b}-{a}" in sigma:
                continue
            if key not in sigma:
                continue
            noise2 = (np.asarray(take(sigma[f"noise:{a}"]), float) ** 2 if f"noise:{a}" in sigma else 0.0) + (
                np.asarray(take(sigma[f"noise:{b}"]), float) ** 2 if f"noise:{b}" in sigma else 0.0)
            d2 = np.maximum(np.asarray(take(sigma[key]), float) ** 2 - noise2, 0.0)
            with np.errstate(divide="ignore", invalid="ignore"):
                rho = (clr[i] ** 2 + clr[j] ** 2 - d2) / (2.0 * clr[i] * clr[j])
            rho = np.clip(np.where(np.isfinite(rho), rho, 0.0), -1.0, 1.0)
            out[..., i, j] = out[..., j, i] = rho
    # float32 σ's and pairs without a budget can leave the matrix slightly indefinite: keep its
    # eigenvalues at or above 1 % of the largest (a correlation of at most about 0.99)
    w, v = np.linalg.eigh(out)
    w = np.maximum(w, 0.01 * w[..., -1:])
    out = np.einsum("...ik,...k,...jk->...ij", v, w, v)
    d = np.sqrt(np.einsum("...ii->...i", out))
    return out / d[..., :, None] / d[..., None, :]


def noise_radiance(channel, config):
    """The instrument's noise as a radiance [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹], the same at every scene
    temperature: NEΔT_ref · dB/dT(T_ref) (``[instrument]``)."""
    inst = config["instrument"]
    return inst["nedt"].get(channel.name, inst["nedt_default"]) * float(
        channel.radiance_derivative(np.float64(inst["reference_temperature"])))
