"""Planck's law per wavenumber, its inverse (brightness temperature) and dB/dT.

Units throughout: wavenumber ν̃ [cm⁻¹], temperature [K], radiance
[mW m⁻² sr⁻¹ (cm⁻¹)⁻¹].

References
----------
Planck's law in wavenumber form, e.g. Liou (2002), *An Introduction to Atmospheric
Radiation*, 2nd ed., Eq. (1.2.9) with ν̃ = 1/λ; Petty (2006), *A First Course in
Atmospheric Radiation*, Eq. (6.3).
"""
import numpy as np

from .constants import C1_RADIANCE, C2_CM_K


def planck_radiance(wavenumber, temperature):
    r"""Black-body spectral radiance per unit wavenumber.

    Parameters
    ----------
    wavenumber : array_like
        Wavenumber ν̃. [cm⁻¹]
    temperature : array_like
        Absolute temperature, > 0. [K]

    Returns
    -------
    ndarray
        Radiance B(ν̃, T). [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹]

    Notes
    -----
    .. math:: B(\tilde\nu, T) = \frac{c_1 \tilde\nu^3}{\exp(c_2 \tilde\nu / T) - 1}

    with c₁ = 2hc² and c₂ = hc/k (Planck 1901; Liou 2002, Eq. 1.2.9). ``expm1`` keeps the
    Rayleigh–Jeans limit accurate. Arrays broadcast; the dtype of the result follows the
    inputs (float32 stays float32).
    """
    wavenumber = np.asarray(wavenumber)
    temperature = np.asarray(temperature)
    dtype = np.result_type(wavenumber, temperature, np.float32)
    nu = wavenumber.astype(dtype, copy=False)
    c1 = dtype.type(C1_RADIANCE)
    c2 = dtype.type(C2_CM_K)
    return c1 * nu**3 / np.expm1(c2 * nu / temperature.astype(dtype, copy=False))


def brightness_temperature(wavenumber, radiance):
    r"""Temperature of the black body that emits ``radiance`` at ``wavenumber``.

    Parameters
    ----------
    wavenumber : array_like
        Wavenumber ν̃. [cm⁻¹]
    radiance : array_like
        Spectral radiance, > 0. [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹]

    Returns
    -------
    ndarray
        Brightness temperature. [K]; NaN where the radiance is not positive.

    Notes
    -----
    Exact inverse of :func:`planck_radiance`:

    .. math:: T_b = \frac{c_2 \tilde\nu}{\ln(1 + c_1 \tilde\nu^3 / L)}
    """
    wavenumber = np.asarray(wavenumber)
    radiance = np.asarray(radiance)
    dtype = np.result_type(wavenumber, radiance, np.float32)
    nu = wavenumber.astype(dtype, copy=False)
    rad = radiance.astype(dtype, copy=False)
    with np.errstate(divide="ignore", invalid="ignore"):
        tb = dtype.type(C2_CM_K) * nu / np.log1p(dtype.type(C1_RADIANCE) * nu**3 / rad)
    return np.where(rad > 0, tb, np.nan).astype(dtype, copy=False)


def planck_derivative(wavenumber, temperature):
    r"""Temperature derivative of the Planck radiance, ∂B/∂T.

    Parameters
    ----------
    wavenumber : array_like
        Wavenumber ν̃. [cm⁻¹]
    temperature : array_like
        Absolute temperature. [K]

    Returns
    -------
    ndarray
        ∂B/∂T. [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹ K⁻¹]

    Notes
    -----
    Differentiating Planck's law (Liou 2002, Eq. 1.2.9):

    .. math:: \frac{\partial B}{\partial T} = B \frac{x e^{x}}{T (e^{x} - 1)},
              \quad x = c_2 \tilde\nu / T
    """
    wavenumber = np.asarray(wavenumber)
    temperature = np.asarray(temperature)
    dtype = np.result_type(wavenumber, temperature, np.float32)
    nu = wavenumber.astype(dtype, copy=False)
    t = temperature.astype(dtype, copy=False)
    x = dtype.type(C2_CM_K) * nu / t
    em1 = np.expm1(x)
    return dtype.type(C1_RADIANCE) * nu**3 / em1 * x * (em1 + 1) / (t * em1)
