"""Instrument channels: spectral response, channel radiance and band-corrected conversions.

A channel is a normalised spectral response φ(ν̃) on a wavenumber grid. Its radiance for a
scene of temperature T is the response-weighted mean of the monochromatic Planck radiance,

    L_ch(T) = ∫ φ(ν̃) B(ν̃, T) dν̃ / ∫ φ(ν̃) dν̃ .

Evaluating that integral per pixel and level would be wasteful, so each channel carries a
band correction computed once: an effective temperature T_eff = a + b·T such that
B(ν̃_c, T_eff) reproduces L_ch(T) at the centroid wavenumber ν̃_c. This linear band
correction is the common practice for radiometer channels (e.g. Weinreb et al. 1981,
"Operational calibration of Geostationary Operational Environmental Satellite-4 radiometer
data", NOAA Tech. Rep. NESS 77; the same a + bT form is used for many imagers). Its worst
residual over 180–340 K is stored with the channel and checked by the tests (≤ 0.01 K for
the defaults).

Default channels near 3.9, 8.6, 11 and 12 µm use a response shape of our own: a flat top
with raised-cosine shoulders (a Tukey window) over the stated full width. Centres and
widths are typical of window channels (common practice); each is overridable, and a
user-measured response table can replace the shape.
"""
from dataclasses import dataclass, field

import numpy as np

from .planck import brightness_temperature, planck_derivative, planck_radiance

#: Temperatures over which the band correction is fitted and checked [K]
BAND_FIT_TEMPERATURES = np.arange(180.0, 340.0 + 0.5, 1.0)

#: Default window channels: name -> (centre wavenumber [cm⁻¹], full width [cm⁻¹]).
#: Centres correspond to 3.90, 8.60, 10.8 and 12.0 µm; widths of 0.2–0.9 µm are
#: typical of imager window channels (common practice).
DEFAULT_CHANNEL_SPECS = {
    "3p9um": (2564.0, 120.0),
    "8p6um": (1163.0, 45.0),
    "11um": (926.0, 70.0),
    "12um": (833.0, 60.0),
}


class ChannelError(ValueError):
    """A channel definition that cannot be used; the message says what to change."""


@dataclass(frozen=True)
class Channel:
    """One instrument channel with its band correction.

    Attributes
    ----------
    name : str
        Short name, by wavelength, e.g. ``"11um"`` or ``"3p9um"``.
    wavenumber : ndarray
        Spectral grid of the response, increasing. [cm⁻¹]
    response : ndarray
        Relative spectral response on that grid, peak 1. [1]
    central_wavenumber : float
        Response-weighted centroid ν̃_c. [cm⁻¹]
    band_a, band_b : float
        Band correction T_eff = band_a + band_b · T. [K], [1]
    band_fit_residual : float
        Largest |error| of the band correction over 180–340 K. [K]
    """

    name: str
    wavenumber: np.ndarray = field(repr=False)
    response: np.ndarray = field(repr=False)
    central_wavenumber: float
    band_a: float
    band_b: float
    band_fit_residual: float

    def exact_radiance(self, temperature):
        """Response-weighted mean Planck radiance (the definition, no band correction).

        Parameters
        ----------
        temperature : array_like
            Temperature. [K]

        Returns
        -------
        ndarray
            Channel radiance. [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹]
        """
        t = np.asarray(temperature, dtype=float)[..., None]
        spectral = planck_radiance(self.wavenumber, t)
        return np.trapezoid(spectral * self.response, self.wavenumber, axis=-1) / np.trapezoid(
            self.response, self.wavenumber
        )

    def radiance(self, temperature):
        """Channel radiance of a black body at ``temperature`` (band-corrected Planck).

        Parameters
        ----------
        temperature : array_like
            Temperature. [K]

        Returns
        -------
        ndarray
            Channel radiance. [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹]
        """
        t = np.asarray(temperature)
        dtype = np.result_type(t, np.float32)
        t_eff = dtype.type(self.band_a) + dtype.type(self.band_b) * t
        return planck_radiance(dtype.type(self.central_wavenumber), t_eff)

    def brightness_temperature(self, radiance):
        """Channel brightness temperature of ``radiance`` (inverse of :meth:`radiance`).

        Parameters
        ----------
        radiance : array_like
            Channel radiance. [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹]

        Returns
        -------
        ndarray
            Brightness temperature. [K]
        """
        r = np.asarray(radiance)
        dtype = np.result_type(r, np.float32)
        t_eff = brightness_temperature(dtype.type(self.central_wavenumber), r)
        return (t_eff - dtype.type(self.band_a)) / dtype.type(self.band_b)

    def radiance_derivative(self, temperature):
        """d L_ch / d T of the band-corrected channel radiance. [mW m⁻² sr⁻¹ (cm⁻¹)⁻¹ K⁻¹]"""
        t = np.asarray(temperature)
        dtype = np.result_type(t, np.float32)
        t_eff = dtype.type(self.band_a) + dtype.type(self.band_b) * t
        return planck_derivative(dtype.type(self.central_wavenumber), t_eff) * dtype.type(self.band_b)

    def weighted_mean(self, wavenumber, values):
        """Response-weighted mean of a spectral quantity (used for channel-effective coefficients).

        Parameters
        ----------
        wavenumber : array_like
            Grid of ``values``. [cm⁻¹]
        values : array_like
            Spectral quantity on that grid (any unit); interpolated linearly onto the
            response grid, held constant beyond its ends.

        Returns
        -------
        float
            ∫ φ v dν̃ / ∫ φ dν̃ (same unit as ``values``).
        """
        v = np.interp(self.wavenumber, np.asarray(wavenumber, float), np.asarray(values, float))
        return float(np.trapezoid(v * self.response, self.wavenumber) / np.trapezoid(self.response, self.wavenumber))


def tapered_response(wavenumber, centre, width, taper=0.5):
    """Our default response shape: flat top, raised-cosine shoulders (Tukey window).

    Parameters
    ----------
    wavenumber : array_like
        Grid. [cm⁻¹]
    centre : float
        Centre of the passband. [cm⁻¹]
    width : float
        Full width at half maximum. [cm⁻¹]
    taper : float
        Fraction of the full width taken by the two cosine shoulders together. [1]

    Returns
    -------
    ndarray
        Response in [0, 1].
    """
    nu = np.asarray(wavenumber, float)
    half_flat = 0.5 * width * (1.0 - taper)
    shoulder = width * taper  # each shoulder spans this, half-power at its middle
    d = np.abs(nu - centre)
    x = np.clip((d - half_flat) / shoulder, 0.0, 1.0)
    return 0.5 * (1.0 + np.cos(np.pi * x))


def channel_from_response(name, wavenumber, response):
    """Build a channel from a response table and fit its band correction.

    Parameters
    ----------
    name : str
        Channel name, e.g. ``"11um"``.
    wavenumber : array_like
        Wavenumber grid, strictly monotonic, ≥ 3 points. [cm⁻¹]
    response : array_like
        Relative response, ≥ 0, not all zero. [1]

    Returns
    -------
    Channel

    Raises
    ------
    ChannelError
        If the table is unusable (the message says why).
    """
    nu = np.asarray(wavenumber, dtype=float)
    phi = np.asarray(response, dtype=float)
    if nu.ndim != 1 or nu.shape != phi.shape or nu.size < 3:
        raise ChannelError(
            f"channel {name!r}: the response table needs two equal-length columns "
            f"(wavenumber in cm-1, response) with at least 3 rows; got shapes {nu.shape} and {phi.shape}"
        )
    if not np.all(np.isfinite(nu)) or not np.all(np.isfinite(phi)):
        raise ChannelError(f"channel {name!r}: the response table holds NaN or infinite values; remove those rows")
    if np.all(np.diff(nu) < 0):
        nu, phi = nu[::-1], phi[::-1]
    if not np.all(np.diff(nu) > 0):
        raise ChannelError(f"channel {name!r}: wavenumbers must be strictly increasing or decreasing")
    if np.any(phi < 0) or phi.max() <= 0:
        raise ChannelError(f"channel {name!r}: responses must be ≥ 0 with a positive peak")
    if nu[0] < 100 or nu[-1] > 5000:
        raise ChannelError(
            f"channel {name!r}: wavenumbers {nu[0]:.0f}–{nu[-1]:.0f} cm-1 lie outside 100–5000 cm-1; "
            "the table must be in cm-1 (convert µm with 10000/λ)"
        )
    phi = phi / phi.max()
    centroid = float(np.trapezoid(phi * nu, nu) / np.trapezoid(phi, nu))
    t = BAND_FIT_TEMPERATURES
    spectral = planck_radiance(nu, t[:, None])
    exact = np.trapezoid(spectral * phi, nu, axis=-1) / np.trapezoid(phi, nu)
    t_eff = brightness_temperature(centroid, exact)
    b, a = np.polyfit(t, t_eff, 1)
    # residual expressed as the temperature error of the band-corrected brightness temperature
    t_back = (t_eff - a) / b
    residual = float(np.max(np.abs(t_back - t)))
    return Channel(name, nu, phi, centroid, float(a), float(b), residual)


def make_channel(name, centre, width, taper=0.5, step=0.5):
    """A channel with our default tapered response.

    Parameters
    ----------
    name : str
        Channel name.
    centre : float
        Centre wavenumber. [cm⁻¹]
    width : float
        Full width at half maximum. [cm⁻¹]
    taper : float
        Shoulder fraction of the width. [1]
    step : float
        Spectral grid step. [cm⁻¹]

    Returns
    -------
    Channel
    """
    if not (100 <= centre <= 5000) or not (0 < width < centre):
        raise ChannelError(
            f"channel {name!r}: centre {centre} cm-1 and width {width} cm-1 are not a usable passband "
            "(centre 100–5000 cm-1, 0 < width < centre)"
        )
    half_span = 0.5 * width * (1.0 + taper) + step
    nu = np.arange(centre - half_span, centre + half_span + step / 2, step)
    return channel_from_response(name, nu, tapered_response(nu, centre, width, taper))


def default_channels(overrides=None):
    """The default window channels, optionally overridden.

    Parameters
    ----------
    overrides : mapping, optional
        name -> ``(centre [cm⁻¹], width [cm⁻¹])`` or ``(wavenumber array, response array)``
        for a measured response; new names add channels.

    Returns
    -------
    dict of str -> Channel
    """
    specs = dict(DEFAULT_CHANNEL_SPECS)
    specs.update(overrides or {})
    out = {}
    for name, spec in specs.items():
        first, second = spec
        if np.ndim(first) == 0:
            out[name] = make_channel(name, float(first), float(second))
        else:
            out[name] = channel_from_response(name, first, second)
    return out
