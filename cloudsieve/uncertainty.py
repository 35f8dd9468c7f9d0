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

Seven extra simulations per column: used for the pixel inspector's breakdown; the screening
does not use it yet. A scene with explicit profiles gets no profile components (their
Jacobians are zero: the profile given is not rebuilt from the surface numbers).
"""
from dataclasses import dataclass, replace
import copy

import numpy as np

from physics.absorption import channel_coefficients
from physics.atmosphere import DEFAULT_HUMIDITY_EXPONENT, DEFAULT_LAPSE_RATE

from .codes import per_surface
from .config import absorption_table
from .simulate import ChannelSet, simulate_columns

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
    """

    channels: tuple
    components: tuple
    input_sigma: np.ndarray
    jacobian: np.ndarray
    contribution: np.ndarray
    noise: np.ndarray
    total: np.ndarray
    split_window: np.ndarray = None


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


def error_budget(cols, chset, config, surface):
    """The :class:`ErrorBudget` of columns ``cols`` (simulate.Columns) on ``surface`` codes (n,)."""
    sim_cfg = config["simulation"]
    errs = config["background_errors"]
    base = simulate_columns(cols, chset, sim_cfg).brightness_temperature.astype(np.float64)  # (n_ch, n)
    profile_default = {"lapse_rate": DEFAULT_LAPSE_RATE, "humidity_exponent": DEFAULT_HUMIDITY_EXPONENT}
    jac, sig = [], []
    for key, _, _, step in COMPONENTS:
        c, cs, opts = cols, chset, None
        if key == "skin_temperature":
            c = replace(cols, t_skin=cols.t_skin + np.float32(step))
        elif key == "air_temperature":
            c = replace(cols, t_air=cols.t_air + np.float32(step))
        elif key == "lapse_rate":  # K km⁻¹ → the profile builder's K m⁻¹
            opts = dict(profile_default, lapse_rate=DEFAULT_LAPSE_RATE + step / 1000.0)
        elif key == "water_vapour":
            c = replace(cols, tcwv=cols.tcwv * np.float32(1.0 + step))
        elif key == "humidity_exponent":
            opts = dict(profile_default, humidity_exponent=DEFAULT_HUMIDITY_EXPONENT + step)
        elif key == "emissivity":
            c = replace(cols, emissivity=np.minimum(cols.emissivity + np.float32(step), np.float32(1.0)))
        elif key == "continuum":
            cs = _scaled_continuum(chset, config, 1.0 + step)
        bt = simulate_columns(c, cs, sim_cfg, profile_options=opts).brightness_temperature.astype(np.float64)
        if key == "emissivity":  # the step may be cut at 1
            d_eps = (c.emissivity - cols.emissivity).astype(np.float64)
            jac.append(np.where(d_eps > 0, (bt - base) / np.where(d_eps > 0, d_eps, 1.0), 0.0))
        else:
            jac.append((bt - base) / step)
        sig.append(per_surface(errs[key], surface))
    jacobian = np.moveaxis(np.stack(jac), (0, 1, 2), (2, 1, 0))  # (n, n_ch, n_comp)
    input_sigma = np.stack(sig, axis=-1)  # (n, n_comp)
    contribution = np.abs(jacobian) * input_sigma[:, None, :]
    inst = config["instrument"]
    noise = np.stack([noise_equivalent_temperature(ch, base[i], inst["nedt"].get(ch.name, inst["nedt_default"]),
                                                   inst["reference_temperature"])
                      for i, ch in enumerate(chset.channels)], axis=-1)  # (n, n_ch)
    total = np.sqrt(np.sum(contribution**2, axis=-1) + noise**2)
    split = None
    if "11um" in chset.names and "12um" in chset.names:
        i, j = chset.names.index("11um"), chset.names.index("12um")
        diff = (jacobian[:, i] - jacobian[:, j]) * input_sigma
        split = np.sqrt(np.sum(diff**2, axis=-1) + noise[:, i] ** 2 + noise[:, j] ** 2)
    return ErrorBudget(chset.names, tuple(k for k, *_ in COMPONENTS), input_sigma, jacobian, contribution, noise,
                       total, split)
