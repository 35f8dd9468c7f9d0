"""Channel-effective gas optical depths of atmospheric layers.

Three absorbers matter in the infrared windows:

1. the water-vapour continuum, self-broadened (∝ e·u) and foreign-broadened (∝ (p − e)·u),
   both with the temperature factor exp(T₀ (1/T − 1/296)), in the empirical form of
   Roberts, Selby & Biberman (1976), Appl. Opt. 15, 2085–2090, as usually quoted:
   k(ν, T) = k(ν, 296) exp(T₀ (1/T − 1/296)) times e + γ (p − e);
2. water-vapour lines, as an effective mass absorption coefficient scaled by (p/p₀)ⁿ
   (band-model pressure scaling; approximate);
3. well-mixed dry gases, as a column optical depth distributed in proportion to
   pressure-broadened absorber amount, 2 p dp / p₀².

Spectral coefficients come from one data file (``physics/data/absorption.toml``; it is read
by the caller, never here) and are made channel-effective once per channel by weighting
with the spectral response. Weighting coefficients rather than transmittances is accurate
while the channel's layer optical depths are small, as in the windows (common practice for
fast window models).
"""
from typing import NamedTuple

import numpy as np

from .constants import AVOGADRO, CONTINUUM_REFERENCE_T, GRAVITY, MOLAR_MASS_WATER, STANDARD_PRESSURE_HPA
from .atmosphere import vapour_pressure_from_specific_humidity

#: molecules per cm² in 1 kg m⁻² of water vapour: 1 kg m⁻² = 0.1 g cm⁻²
MOLECULES_PER_CM2_PER_KG_M2 = 0.1 / (MOLAR_MASS_WATER * 1000.0) * AVOGADRO


class ChannelCoefficients(NamedTuple):
    """Channel-effective absorption coefficients, one entry per channel.

    self_continuum : ndarray (n_ch,)  [m² kg⁻¹] per unit e/p₀, at 296 K
    foreign_continuum : ndarray (n_ch,)  [m² kg⁻¹] per unit (p − e)/p₀
    line : ndarray (n_ch,)  [m² kg⁻¹] at p₀
    dry_column : ndarray (n_ch,)  vertical optical depth of a p₀ column of dry gases [1]
    continuum_t0 : float  temperature coefficient T₀ of the self continuum [K]
    line_pressure_exponent : float  n in (p/p₀)ⁿ [1]
    names : tuple of str
    """

    self_continuum: np.ndarray
    foreign_continuum: np.ndarray
    line: np.ndarray
    dry_column: np.ndarray
    continuum_t0: float
    line_pressure_exponent: float
    names: tuple

    def matrix(self):
        """Coefficients stacked as a (4, n_ch) matrix in the order used by :func:`layer_optical_depth`."""
        return np.stack([self.self_continuum, self.foreign_continuum, self.line, self.dry_column])


def _value(entry):
    return entry["value"] if isinstance(entry, dict) else entry


def self_continuum_spectrum(wavenumber, table):
    """Self-continuum coefficient at 296 K on a wavenumber grid.

    Parameters
    ----------
    wavenumber : array_like
        [cm⁻¹]
    table : mapping
        The ``[self_continuum]`` table of the absorption data file.

    Returns
    -------
    ndarray
        k(ν̃, 296 K). [cm² molecule⁻¹ atm⁻¹]

    Notes
    -----
    Roberts, Selby & Biberman (1976): k = a + b exp(−β ν̃) inside its range; outside,
    log-linear interpolation of the tabulated nodes.
    """
    nu = np.asarray(wavenumber, dtype=float)
    a, b, beta = (float(_value(table[k])) for k in ("a", "b", "beta"))
    lo, hi = float(_value(table["valid_min"])), float(_value(table["valid_max"]))
    roberts = a + b * np.exp(-beta * nu)
    nodes_nu = np.asarray(_value(table["outside_wavenumber"]), float)
    nodes_k = np.log(np.asarray(_value(table["outside_k296"]), float))
    outside = np.exp(np.interp(nu, nodes_nu, nodes_k))
    return np.where((nu >= lo) & (nu <= hi), roberts, outside)


def channel_coefficients(channels, table):
    """Make the spectral coefficients channel-effective (once per channel, not per pixel).

    Parameters
    ----------
    channels : sequence of physics.channels.Channel
    table : mapping
        Parsed absorption data file (see ``physics/data/absorption.toml``).

    Returns
    -------
    ChannelCoefficients
    """
    sc = table["self_continuum"]
    ratio = float(_value(table["foreign_continuum"]["ratio_to_self"]))
    lines = table["water_vapour_lines"]
    dry = table["dry_gases"]
    out_self, out_for, out_line, out_dry = [], [], [], []
    for ch in channels:
        k_self = ch.weighted_mean(ch.wavenumber, self_continuum_spectrum(ch.wavenumber, sc))
        # τ = k [cm² molec⁻¹ atm⁻¹] · e [atm] · u [molec cm⁻²] and u = u_kg · N, N in molec cm⁻² per
        # kg m⁻², so the mass coefficient per atm of vapour is k · N [m² kg⁻¹ atm⁻¹].
        k_self_mass = k_self * MOLECULES_PER_CM2_PER_KG_M2
        out_self.append(k_self_mass)
        out_for.append(ratio * k_self_mass)
        out_line.append(ch.weighted_mean(_value(lines["wavenumber"]), _value(lines["k"])))
        out_dry.append(ch.weighted_mean(_value(dry["wavenumber"]), _value(dry["tau_column"])))
    return ChannelCoefficients(
        np.array(out_self),
        np.array(out_for),
        np.array(out_line),
        np.array(out_dry),
        float(_value(sc["T0"])),
        float(_value(lines["pressure_exponent"])),
        tuple(ch.name for ch in channels),
    )


def layer_absorber_amounts(pressure, temperature, specific_humidity, continuum_t0, line_pressure_exponent):
    r"""Per-layer absorber amounts, the channel-independent half of the optical depth.

    Parameters
    ----------
    pressure, temperature, specific_humidity : array_like
        Level values, surface first, level axis last. [hPa], [K], [kg kg⁻¹]
    continuum_t0 : float
        Self-continuum temperature coefficient. [K]
    line_pressure_exponent : float
        [1]

    Returns
    -------
    ndarray
        Shape (..., n_layers, 4): u·(e/p₀)·f(T), u·((p − e)/p₀)·f(T), u·(p/p₀)ⁿ, 2 p Δp / p₀²,
        with u the layer water vapour [kg m⁻²] and f(T) = exp(T₀ (1/T − 1/296)).

    Notes
    -----
    Layer means are arithmetic means of the bounding levels; u = q̄ Δp / g (hydrostatic).
    """
    p = np.moveaxis(np.asarray(pressure), -1, 0)
    t = np.moveaxis(np.asarray(temperature), -1, 0)
    q = np.moveaxis(np.asarray(specific_humidity), -1, 0)
    return np.moveaxis(_absorber_amounts_levels_first(p, t, q, continuum_t0, line_pressure_exponent), (0, 1), (-1, -2))


def _absorber_amounts_levels_first(p, t, q, continuum_t0, line_pressure_exponent, layout="term"):
    """Absorber amounts from level-first arrays (n_levels, ...).

    ``layout="term"`` → (4, n_layers, ...); ``layout="layer"`` → (n_layers, 4, ...), the
    operand of the per-layer sum of :func:`layer_optical_depth_level_major`.
    """
    dtype = np.result_type(p, t, q, np.float32)
    f = dtype.type
    p_lay = f(0.5) * (p[:-1] + p[1:])
    t_lay = f(0.5) * (t[:-1] + t[1:])
    q_lay = f(0.5) * (q[:-1] + q[1:])
    dp = p[:-1] - p[1:]
    u = q_lay * dp * f(100.0 / GRAVITY)
    e = vapour_pressure_from_specific_humidity(q_lay, p_lay)
    inv_p0 = f(1.0 / STANDARD_PRESSURE_HPA)
    p_rel = p_lay * inv_p0
    if layout == "layer":
        x = np.empty((p_lay.shape[0], 4) + p_lay.shape[1:], dtype=dtype)
        terms = [x[:, i] for i in range(4)]
    else:
        x = np.empty((4,) + p_lay.shape, dtype=dtype)
        terms = [x[i] for i in range(4)]
    # both continua carry the temperature factor f(T) = exp(T₀ (1/T − 1/296)): Roberts et al.
    # (1976) as usually quoted, k(ν, T) = k(ν, 296) f(T) applied to e + γ (p − e)
    u_f = u * np.exp(f(continuum_t0) * (f(1.0) / t_lay - f(1.0 / CONTINUUM_REFERENCE_T)))
    np.multiply(u_f, e * inv_p0, out=terms[0])
    np.multiply(u_f, p_rel - e * inv_p0, out=terms[1])
    np.multiply(u, np.exp(f(line_pressure_exponent) * np.log(p_rel)), out=terms[2])
    np.multiply(f(2.0) * p_rel, dp * inv_p0, out=terms[3])
    return x


def layer_optical_depth(pressure, temperature, specific_humidity, coefficients):
    """Vertical optical depth of every layer in every channel.

    Parameters
    ----------
    pressure, temperature, specific_humidity : array_like
        Level values, surface first, level axis last. [hPa], [K], [kg kg⁻¹]
    coefficients : ChannelCoefficients

    Returns
    -------
    ndarray
        Shape (..., n_layers, n_channels). [1]

    Notes
    -----
    τ = Σ_i X_i K_i over the four absorber terms of :func:`layer_absorber_amounts`,
    evaluated per layer by :func:`layer_optical_depth_level_major` (the channel-effective
    coefficients do not depend on the pixel).
    """
    p = np.moveaxis(np.asarray(pressure), -1, 0)
    t = np.moveaxis(np.asarray(temperature), -1, 0)
    q = np.moveaxis(np.asarray(specific_humidity), -1, 0)
    tau = layer_optical_depth_level_major(p, t, q, coefficients)
    return np.moveaxis(tau, (0, 1), (-2, -1))


def layer_optical_depth_level_major(pressure, temperature, specific_humidity, coefficients):
    """:func:`layer_optical_depth` on level-first arrays (n_levels, ...) → (n_layers, n_ch, ...).

    The layout of the transfer hot path (physics.transfer.upwelling_level_major). The sum
    over the four absorber terms is an ``einsum`` rather than a BLAS product: a batched BLAS
    kernel's rounding depends on where a pixel falls in its block, and a pixel's optical
    depth must not depend on how a scene is chunked (tested).
    """
    x = _absorber_amounts_levels_first(
        np.asarray(pressure), np.asarray(temperature), np.asarray(specific_humidity),
        coefficients.continuum_t0, coefficients.line_pressure_exponent, layout="layer",
    )
    k = coefficients.matrix().astype(x.dtype)  # (4, n_ch)
    return np.einsum("ic,li...->lc...", k, x)
