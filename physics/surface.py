"""Emissivity of a flat water surface against view angle (Fresnel reflection of an absorbing medium).

By Kirchhoff's law the directional emissivity of an opaque surface is one minus its
directional reflectance, ε(θ) = 1 − R(θ). For a smooth surface of complex refractive index
m = n + ik the reflectance of each polarisation follows Fresnel's equations, and thermal
emission is unpolarised on average, so R = (R_s + R_p) / 2. Water is nearly black at nadir in
the 8–13 µm window (ε ≈ 0.99) but reflects more at grazing angles, so a sea surface seen at
60° emits about 2–3 % less than at nadir, about 1 K of brightness temperature at 11 µm. Wind
roughening reduces the fall at large angles; a flat surface is the first-order model.
"""
import numpy as np


def fresnel_reflectance(n, k, zenith):
    """Reflectance of a smooth surface for s- and p-polarised light.

    Parameters
    ----------
    n, k : array_like
        Real and imaginary parts of the complex refractive index of the medium (from a
        medium of index 1). [1]
    zenith : array_like
        Angle of incidence from the surface normal. [degree]

    Returns
    -------
    (ndarray, ndarray)
        R_s and R_p. [1]

    Notes
    -----
    Fresnel's equations with the complex angle of refraction, cos θ_t = √(1 − sin²θ / m²)
    (Born & Wolf, *Principles of Optics*, §14.2, for absorbing media):
    r_s = (cos θ − m cos θ_t)/(cos θ + m cos θ_t), r_p = (m cos θ − cos θ_t)/(m cos θ + cos θ_t),
    R = |r|². Valid for 0 ≤ θ < 90°.
    """
    m = np.asarray(n, dtype=float) + 1j * np.asarray(k, dtype=float)
    theta = np.deg2rad(np.asarray(zenith, dtype=float))
    cos_i = np.cos(theta)
    cos_t = np.sqrt(1.0 - (np.sin(theta) / m) ** 2)
    r_s = (cos_i - m * cos_t) / (cos_i + m * cos_t)
    r_p = (m * cos_i - cos_t) / (m * cos_i + cos_t)
    return np.abs(r_s) ** 2, np.abs(r_p) ** 2


def fresnel_emissivity(n, k, zenith):
    """Directional emissivity ε(θ) = 1 − (R_s + R_p)/2 of a smooth, opaque surface. [1]

    Parameters as :func:`fresnel_reflectance`: ``n``, ``k`` [1], ``zenith`` [degree].

    Notes
    -----
    Kirchhoff's law for an opaque body with Fresnel's reflectances, averaged over the two
    polarisations (thermal emission is unpolarised on average).
    """
    r_s, r_p = fresnel_reflectance(n, k, zenith)
    return 1.0 - 0.5 * (r_s + r_p)


def emissivity_angle_factor(n, k, zenith):
    """ε(θ)/ε(0) of a smooth surface: the fall of emissivity with view angle, 1 at nadir. [1]

    Scales a nadir emissivity (measured, or from a table) to other view angles.
    """
    return fresnel_emissivity(n, k, zenith) / fresnel_emissivity(n, k, 0.0)
