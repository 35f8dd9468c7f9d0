r"""Schwarzschild's equation through a layered atmosphere, along a slant path.

For a non-scattering atmosphere in local thermodynamic equilibrium the radiance along a
path obeys Schwarzschild's equation,

.. math:: \frac{dL}{d\tau_s} = -L + B(T),

with τ_s the slant optical depth, τ_s = τ/μ for a plane-parallel layer seen at a zenith
angle θ, μ = cos θ (e.g. Liou 2002, Eq. 4.2.2; Petty 2006, Eq. 8.4). Integrating over a
layer of slant optical depth δ whose source B varies *linearly in optical depth* between
its boundary values gives, for the radiance leaving the layer towards the observer,

.. math::
    L_{out} = L_{in}\,e^{-\delta} + B_{near}\,(1 - e^{-\delta})
              + (B_{far} - B_{near})\left[\frac{1 - e^{-\delta}}{\delta} - e^{-\delta}\right]

where "near" is the boundary facing the observer. The linear-in-τ source is exact for a
source linear in optical depth and stays accurate for optically thick layers, where the
common isothermal-layer assumption overestimates the emission (Clough, Iacono & Moncet 1992,
J. Geophys. Res. 97, 15761, Sec. 2; Wiscombe 1976, JQSRT 16, 477).

At the lower boundary the surface emits ε B(T_skin) and reflects (1 − ε) of the downwelling
sky radiance (Kirchhoff's law for an opaque surface: reflectivity = 1 − emissivity). The
downwelling radiance is taken along one slant path with the diffusivity factor 1.66, which
approximates the hemispheric flux integral of a Lambertian reflector (Elsasser 1942,
"Heat transfer by infrared radiation in the atmosphere"; common practice).

Array convention: level axis then channel axis, both trailing: ``(..., level, channel)``;
levels surface first; layer j lies between levels j and j + 1.
"""
from typing import NamedTuple

import numpy as np

from .constants import DIFFUSIVITY_FACTOR


class TransferResult(NamedTuple):
    """Output of :func:`schwarzschild_upwelling`.

    radiance : (..., n_ch)
        Upwelling radiance at the top of the atmosphere. [radiance unit of the inputs]
    level_transmittance : (..., n_levels, n_ch)
        Slant transmittance from each level to space. [1]
    opaque_radiance : (..., n_levels, n_ch)
        Top-of-atmosphere radiance if an opaque black surface sat at each level with the
        level's temperature. [radiance unit]
    downwelling : (..., n_ch)
        Downwelling sky radiance at the surface along the diffusivity path. [radiance unit]
    """

    radiance: np.ndarray
    level_transmittance: np.ndarray
    opaque_radiance: np.ndarray
    downwelling: np.ndarray


def layer_transmittance_and_weight(slant_optical_depth):
    r"""Layer transmittance e^{−δ}, absorptance 1 − e^{−δ} and the linear-source weight.

    Parameters
    ----------
    slant_optical_depth : ndarray
        δ ≥ 0. [1]

    Returns
    -------
    transmittance, absorptance, weight : ndarray
        e^{−δ}, 1 − e^{−δ}, and w(δ) = (1 − e^{−δ})/δ − e^{−δ}. [1]

    Notes
    -----
    The absorptance comes from ``expm1`` (accurate to rounding for all δ), and
    w = a/δ − (1 − a). For small δ, w ≈ δ/2 is a difference of two numbers near 1, so its
    *relative* error grows, but its *absolute* error stays at one rounding unit of 1 —
    and w only multiplies the source difference across the layer, so the emitted radiance
    keeps full absolute accuracy. δ is floored at 10⁻³⁰ so that δ = 0 gives w = 0 exactly
    (w → 0 as δ → 0, and w → 0 as 1/δ for δ → ∞, so a thick layer radiates at the
    temperature of its boundary facing the observer). No branches: the kernel stays vectorised.
    """
    d = np.asarray(slant_optical_depth)
    f = np.result_type(d, np.float32).type
    d = np.maximum(d, f(1.0e-30))
    absorptance = np.expm1(-d)
    absorptance *= f(-1.0)
    trans = f(1.0) - absorptance
    weight = absorptance / d
    weight -= trans
    return trans, absorptance, weight


def schwarzschild_upwelling(
    layer_optical_depth,
    level_radiance,
    surface_radiance,
    surface_emissivity,
    mu,
    diffusivity=DIFFUSIVITY_FACTOR,
    levels=True,
):
    r"""Solve Schwarzschild's equation for the top-of-atmosphere upwelling radiance.

    Parameters
    ----------
    layer_optical_depth : array_like, (..., n_layers, n_ch)
        Vertical (nadir) absorption optical depth of each layer. [1]
    level_radiance : array_like, (..., n_layers + 1, n_ch)
        Planck (channel) radiance at each level's temperature, surface level first.
        [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹, or any radiance unit used consistently]
    surface_radiance : array_like, (..., n_ch)
        Planck radiance at the surface skin temperature. [same unit]
    surface_emissivity : array_like, (..., n_ch)
        Surface emissivity ε in [0, 1]; reflectivity is 1 − ε (Kirchhoff). [1]
    mu : array_like, (...)
        Cosine of the viewing zenith angle, 0 < μ ≤ 1. [1]
    diffusivity : float
        Secant of the equivalent slant path of the downwelling flux (1.66, Elsasser 1942). [1]
    levels : bool
        Also return the per-level transmittance and opaque-level radiance (else None).

    Returns
    -------
    TransferResult

    Notes
    -----
    Upwelling emission of layer j at its top (linear-in-τ source, module docstring):
    U_j = B_{j+1} a_j + (B_j − B_{j+1}) w_j with a_j = 1 − e^{−δ_j}, δ_j = τ_j/μ.
    The level-to-space transmittance is 𝒯_k = Π_{j ≥ k} e^{−δ_j}, and the radiance above
    level k reaching space is A_k = Σ_{j ≥ k} U_j 𝒯_{j+1}. Then

    * TOA radiance: L = [ε B_s + (1 − ε) L↓] 𝒯_0 + A_0,
    * opaque black surface at level k: L_k^{opq} = B_k 𝒯_k + A_k,

    and the downwelling at the surface, along δ'_j = 1.66 τ_j, follows the recursion
    L↓_j = L↓_{j+1} e^{−δ'_j} + D_j from the top (L↓ = 0) down, with
    D_j = B_j a'_j + (B_{j+1} − B_j) w'_j.

    This wrapper lays the arrays out channel-major, (channel, level, pixel), and calls
    :func:`upwelling_channel_major`, where every element-wise operation runs along long
    contiguous pixel rows.
    """
    tau = np.asarray(layer_optical_depth)
    b_lev = np.asarray(level_radiance)
    dtype = np.result_type(tau, b_lev, np.float32)
    if tau.shape[-2] + 1 != b_lev.shape[-2]:
        raise ValueError(
            f"level_radiance needs one more level than layer_optical_depth has layers; "
            f"got {b_lev.shape[-2]} levels for {tau.shape[-2]} layers"
        )
    lead = np.broadcast_shapes(tau.shape[:-2], b_lev.shape[:-2], np.shape(surface_radiance)[:-1],
                               np.shape(surface_emissivity)[:-1], np.shape(mu))
    n_lay, n_ch = tau.shape[-2], tau.shape[-1]
    n_pix = int(np.prod(lead, dtype=np.int64))

    def channel_major(a, n):  # (..., n, ch) -> (ch, n, pix), contiguous
        a = np.broadcast_to(np.asarray(a, dtype=dtype), lead + (n, n_ch)).reshape(n_pix, n, n_ch)
        return np.ascontiguousarray(a.transpose(2, 1, 0))

    def pixel_rows(a):  # (..., ch) -> (ch, pix)
        a = np.broadcast_to(np.asarray(a, dtype=dtype), lead + (n_ch,)).reshape(n_pix, n_ch)
        return np.ascontiguousarray(a.T)

    inv_mu = dtype.type(1.0) / np.broadcast_to(np.asarray(mu, dtype=dtype), lead).reshape(n_pix)
    rad, trans, opaque, down = upwelling_channel_major(
        channel_major(tau, n_lay),
        channel_major(b_lev, n_lay + 1),
        pixel_rows(surface_radiance),
        pixel_rows(surface_emissivity),
        inv_mu,
        diffusivity,
        levels,
    )

    def back(a):  # (ch, pix) -> (..., ch)
        return a.T.reshape(lead + (n_ch,))

    def back_levels(a):  # (ch, lev, pix) -> (..., lev, ch)
        return None if a is None else a.transpose(2, 1, 0).reshape(lead + (n_lay + 1, n_ch))

    return TransferResult(back(rad), back_levels(trans), back_levels(opaque), back(down))


def upwelling_channel_major(tau, level_radiance, surface_radiance, emissivity, inv_mu, diffusivity=DIFFUSIVITY_FACTOR,
                            levels=True):
    """Core of :func:`schwarzschild_upwelling` on channel-major arrays.

    Parameters
    ----------
    tau : ndarray (n_ch, n_layers, n_pix)
        Vertical layer optical depths. [1]
    level_radiance : ndarray (n_ch, n_layers + 1, n_pix)
        Planck radiance of the levels, surface level first. [radiance]
    surface_radiance, emissivity : ndarray (n_ch, n_pix)
        Planck radiance of the skin [radiance] and emissivity [1].
    inv_mu : ndarray (n_pix,)
        Secant of the viewing zenith angle, 1/μ. [1]
    diffusivity : float
    levels : bool

    Returns
    -------
    radiance (n_ch, n_pix), level_transmittance (n_ch, n_levels, n_pix) or None,
    opaque_radiance (n_ch, n_levels, n_pix) or None, downwelling (n_ch, n_pix)
    """
    dtype = tau.dtype
    f = dtype.type
    n_ch, n_lay, n_pix = tau.shape
    b_bot = level_radiance[:, :-1]
    b_top = level_radiance[:, 1:]
    d_b = b_bot - b_top  # source difference across each layer

    # downwelling along the diffusivity path, from the top (no sky radiance) to the surface
    t_dn, a_dn, w_dn = layer_transmittance_and_weight(tau * f(diffusivity))
    emit_dn = b_bot * a_dn
    emit_dn -= d_b * w_dn
    del a_dn, w_dn
    down = np.zeros((n_ch, n_pix), dtype=dtype)
    for j in range(n_lay - 1, -1, -1):
        down *= t_dn[:, j]
        down += emit_dn[:, j]
    del t_dn, emit_dn

    # upwelling along the viewing path: accumulate emission above each level
    t_up, a_up, w_up = layer_transmittance_and_weight(tau * inv_mu)
    emit_up = b_top * a_up
    emit_up += d_b * w_up
    del a_up, w_up, d_b
    trans = np.ones((n_ch, n_pix), dtype=dtype)
    above = np.zeros((n_ch, n_pix), dtype=dtype)
    if levels:
        level_trans = np.empty((n_ch, n_lay + 1, n_pix), dtype=dtype)
        opaque = np.empty((n_ch, n_lay + 1, n_pix), dtype=dtype)
        level_trans[:, n_lay] = trans
        opaque[:, n_lay] = level_radiance[:, n_lay]
    for j in range(n_lay - 1, -1, -1):
        emit_up[:, j] *= trans
        above += emit_up[:, j]
        trans *= t_up[:, j]
        if levels:
            level_trans[:, j] = trans
            opaque[:, j] = level_radiance[:, j] * trans + above
    radiance = emissivity * surface_radiance
    radiance += (f(1.0) - emissivity) * down
    radiance *= trans
    radiance += above
    if not levels:
        return radiance, None, None, down
    return radiance, level_trans, opaque, down
