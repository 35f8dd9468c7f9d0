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

    This wrapper lays the arrays out level-major, (level, channel, pixel), and calls
    :func:`upwelling_level_major`, where every element-wise operation runs along long
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

    def level_major(a, n):  # (..., n, ch) -> (n, ch, pix), contiguous
        a = np.broadcast_to(np.asarray(a, dtype=dtype), lead + (n, n_ch)).reshape(n_pix, n, n_ch)
        return np.ascontiguousarray(a.transpose(1, 2, 0))

    def pixel_rows(a):  # (..., ch) -> (ch, pix)
        a = np.broadcast_to(np.asarray(a, dtype=dtype), lead + (n_ch,)).reshape(n_pix, n_ch)
        return np.ascontiguousarray(a.T)

    inv_mu = dtype.type(1.0) / np.broadcast_to(np.asarray(mu, dtype=dtype), lead).reshape(n_pix)
    rad, trans, opaque, down = upwelling_level_major(
        level_major(tau, n_lay),
        level_major(b_lev, n_lay + 1),
        pixel_rows(surface_radiance),
        pixel_rows(surface_emissivity),
        inv_mu,
        diffusivity,
        levels,
    )

    def back(a):  # (ch, pix) -> (..., ch)
        return a.T.reshape(lead + (n_ch,))

    def back_levels(a):  # (lev, ch, pix) -> (..., lev, ch)
        return None if a is None else a.transpose(2, 0, 1).reshape(lead + (n_lay + 1, n_ch))

    return TransferResult(back(rad), back_levels(trans), back_levels(opaque), back(down))


def _running(op, src, out, reverse):
    """Running product or sum of ``src`` along its first axis into ``out`` (same shape).

    A loop over the (few tens of) levels with one whole-slab ufunc call each: numpy's own
    ``cumprod``/``cumsum`` along a leading axis runs element by element and is several
    times slower than this.
    """
    n = src.shape[0]
    order = range(n - 1, -1, -1) if reverse else range(n)
    prev = None
    for j in order:
        if prev is None:
            np.copyto(out[j], src[j])
        else:
            op(out[prev], src[j], out=out[j])
        prev = j
    return out


def upwelling_level_major(tau, level_radiance, surface_radiance, emissivity, inv_mu, diffusivity=DIFFUSIVITY_FACTOR,
                          levels=True):
    r"""Hot-path core of :func:`schwarzschild_upwelling` on level-major arrays.

    Parameters
    ----------
    tau : ndarray (n_layers, n_ch, n_pix)
        Vertical layer optical depths. [1]
    level_radiance : ndarray (n_layers + 1, n_ch, n_pix)
        Planck radiance of the levels, surface level first. [radiance]
    surface_radiance, emissivity : ndarray (n_ch, n_pix)
        Planck radiance of the skin [radiance] and emissivity [1].
    inv_mu : ndarray (n_pix,)
        Secant of the viewing zenith angle, 1/μ. [1]
    diffusivity : float
    levels : bool

    Returns
    -------
    radiance (n_ch, n_pix), level_transmittance (n_levels, n_ch, n_pix) or None,
    opaque_radiance (n_levels, n_ch, n_pix) or None, downwelling (n_ch, n_pix)

    Notes
    -----
    The layer sums of :func:`schwarzschild_upwelling` are evaluated in a telescoped form.
    With g_j = (1 − e^{−δ_j})/δ_j, the linear-in-τ emission of layer j reaching space is
    𝒯_{j+1}[B_{j+1}(1 − g_j) + B_j(g_j − e^{−δ_j})], and since 𝒯_{j+1} e^{−δ_j} = 𝒯_j the
    sum over the layers above level k telescopes to

    .. math:: A_k = B_n − B_k 𝒯_k + \sum_{j ≥ k} (B_j − B_{j+1})\, 𝒯_{j+1}\, g_j ,

    so the opaque-level radiance is L_k^{opq} = B_k 𝒯_k + A_k = B_n + Σ_{j≥k} ΔB_j 𝒯_{j+1} g_j
    (a running sum from the top), and the TOA radiance is
    L = 𝒯_0 [ε B_s + (1 − ε) L↓ − B_0] + L_0^{opq}. In the same way, with 𝒮_j the
    transmittance from the surface to level j along the diffusivity path (no radiance enters
    at the top), the downwelling at the surface is
    L↓ = B_0 − B_n 𝒮_n − Σ_j ΔB_j 𝒮_j g'_j. Each step is one whole-array numpy pass, or a
    loop over levels of whole (channel × pixel) slabs for the running products and sums,
    which the level-major layout keeps contiguous: about sixteen passes and two
    exponentials per element.

    Rounding: the telescoped sums carry an absolute error of a few units in the last place of
    B_0 (about 10⁻⁵ K in brightness temperature in float32), where the layer-by-layer
    recursion carried a relative one; a transparent atmosphere's downwelling is therefore
    zero to rounding of B_0, not to 10⁻³⁰.
    """
    dtype = tau.dtype
    f = dtype.type
    n_lay = tau.shape[0]
    b = level_radiance
    b_top = b[n_lay]
    # δ is floored at 10⁻³⁰ (as in layer_transmittance_and_weight) so that g = 1 at δ = 0
    tau_f = np.maximum(tau, f(1.0e-30))
    d_b = b[:-1] - b[1:]  # ΔB_j = B_j − B_{j+1}
    work = np.empty_like(tau_f)
    e = np.empty_like(tau_f)

    # downwelling along the diffusivity path
    np.multiply(tau_f, f(-diffusivity), out=work)  # −δ'
    np.expm1(work, out=e)  # e^{−δ'} − 1
    np.divide(e, work, out=work)  # g'
    e += f(1.0)  # e^{−δ'}
    _running(np.multiply, e, e, reverse=False)  # 𝒮_{j+1}
    work[1:] *= e[:-1]  # 𝒮_j g'_j (𝒮_0 = 1)
    work *= d_b
    down = b[0] - b_top * e[n_lay - 1]
    down -= work.sum(axis=0)

    # upwelling along the viewing path
    np.multiply(tau_f, -inv_mu, out=work)  # −δ
    del tau_f
    np.expm1(work, out=e)
    np.divide(e, work, out=work)  # g
    e += f(1.0)  # e^{−δ}
    trans = np.empty(b.shape, dtype=dtype)
    trans[n_lay] = f(1.0)
    _running(np.multiply, e, trans[:n_lay], reverse=True)  # 𝒯_k = Π_{j ≥ k} e^{−δ_j}
    del e
    work *= trans[1:]  # 𝒯_{j+1} g_j
    work *= d_b
    del d_b
    t_surf = trans[0]
    # the same summation order with and without levels, so that both give the same radiance
    work[n_lay - 1] += b_top
    if levels:
        opaque = np.empty(b.shape, dtype=dtype)
        opaque[n_lay] = b_top
        _running(np.add, work, opaque[:n_lay], reverse=True)
        top_part = opaque[0]
    else:
        top_part = work[n_lay - 1].copy()
        for j in range(n_lay - 2, -1, -1):
            top_part += work[j]
    radiance = emissivity * surface_radiance
    radiance += (f(1.0) - emissivity) * down
    radiance -= b[0]
    radiance *= t_surf
    radiance += top_part
    if not levels:
        return radiance, None, None, down
    return radiance, trans, opaque, down
