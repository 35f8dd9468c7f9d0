"""Reference tests of physics.constants and physics.planck.

Each expected value names its source beside it: CODATA through scipy.constants, a reference
library (astropy), a physical identity (Stefan–Boltzmann, Wien) or a textbook limit.
"""
import astropy.constants as ac
import astropy.units as u
import numpy as np
import pytest
from astropy.modeling.models import BlackBody
from numpy.testing import assert_allclose
from scipy import constants as sc
from scipy import integrate, optimize

from physics import constants
from physics.planck import brightness_temperature, planck_derivative, planck_radiance
from physics_helpers import TEMPERATURES, WAVENUMBERS

RADIANCE_UNIT = u.mW / (u.m**2 * u.sr * u.cm**-1)  # our radiance unit, per cm⁻¹


# ---------------------------------------------------------------------------------------
# Radiation constants
# ---------------------------------------------------------------------------------------
def test_first_radiation_constant_from_codata():
    # CODATA via scipy.constants: 2hc² [W m² sr⁻¹] → [mW m⁻² sr⁻¹ cm⁴] is × 1e3 (W → mW)
    # × 1e8 (m⁴ → cm⁴)
    expected = 2.0 * sc.h * sc.c**2 * 1.0e11
    assert constants.C1_RADIANCE == pytest.approx(expected, rel=1e-15)
    # from memory: c1 = 1.191042e-5 mW m⁻² sr⁻¹ cm⁴ (customary infrared-sounding value)
    assert constants.C1_RADIANCE == pytest.approx(1.191042e-5, rel=1e-6)


def test_second_radiation_constant_from_codata():
    # CODATA via scipy.constants: hc/k [m K] × 100 → cm K
    expected = sc.h * sc.c / sc.k * 100.0
    assert constants.C2_CM_K == pytest.approx(expected, rel=1e-15)
    # from memory: c2 = 1.4387769 cm K
    assert constants.C2_CM_K == pytest.approx(1.4387769, rel=1e-7)


# ---------------------------------------------------------------------------------------
# Physical identities of Planck's law
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("temperature", [180.0, 250.0, 300.0, 340.0, 1000.0, 5772.0])
def test_integral_over_wavenumber_is_sigma_t4_over_pi(temperature):
    # Stefan–Boltzmann law: ∫₀^∞ B dν̃ = σT⁴/π (σ from scipy.constants, CODATA). Our radiance
    # per cm⁻¹ integrated over cm⁻¹ is in mW m⁻² sr⁻¹, hence × 1e3 from W.
    expected = sc.Stefan_Boltzmann * temperature**4 / np.pi * 1.0e3
    # x = c₂ν̃/T: below 1e-3 cm⁻¹ the Rayleigh–Jeans tail adds < 1e-15 relative, and
    # x³/(eˣ − 1) above x = 60 adds < 1e-20 relative, so the finite range is exact to rounding.
    peak = 2.821439 * temperature / constants.C2_CM_K
    upper = 60.0 * temperature / constants.C2_CM_K
    total, err = integrate.quad(
        lambda nu: planck_radiance(nu, temperature), 1.0e-3, upper,
        points=[0.25 * peak, peak, 4.0 * peak], epsabs=0.0, epsrel=1e-12, limit=200,
    )
    assert err < 1e-9 * total
    assert total == pytest.approx(expected, rel=1e-6)


def _wien_x():
    # Wien's displacement law in wavenumber form: dB/dν̃ = 0 ⇔ 3(1 − e^(−x)) = x, x = hcν̃/(kT)
    # (e.g. Liou 2002, Sec. 1.2; the peak per wavenumber differs from the per-wavelength 4.965)
    return optimize.brentq(lambda x: 3.0 * (1.0 - np.exp(-x)) - x, 1.0, 5.0, xtol=1e-15)


def test_wien_constant_in_wavenumber_form():
    # from memory: x = 2.821439372 (root of 3(1 − e^(−x)) = x)
    assert _wien_x() == pytest.approx(2.821439372, rel=1e-9)


@pytest.mark.parametrize("temperature", [200.0, 288.15, 340.0, 5772.0])
def test_peak_of_planck_per_wavenumber_follows_wien(temperature):
    # Wien's law in wavenumber form: ν̃_max = x k T / (h c), scipy.constants (CODATA), in cm⁻¹
    expected = _wien_x() * sc.k * temperature / (sc.h * sc.c) / 100.0
    res = optimize.minimize_scalar(
        lambda nu: -planck_radiance(nu, temperature),
        bounds=(0.5 * expected, 2.0 * expected), method="bounded",
        options={"xatol": 1e-10 * expected},
    )
    assert res.success
    # a flat maximum is located to about √ε relative, so 1e-6 is a fair tolerance
    assert res.x == pytest.approx(expected, rel=1e-6)


# ---------------------------------------------------------------------------------------
# Reference library: astropy's black body
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("temperature", TEMPERATURES.tolist() + [1000.0])
def test_planck_matches_astropy_blackbody_per_frequency(temperature):
    # astropy.modeling.models.BlackBody (reference library) gives B_ν per Hz; per wavenumber
    # B_ν̃ = B_ν |dν/dν̃| = B_ν c, with c from astropy.constants (CODATA).
    wn = WAVENUMBERS / u.cm
    reference = (BlackBody(temperature=temperature * u.K)(wn) * ac.c).to(RADIANCE_UNIT)
    assert_allclose(planck_radiance(WAVENUMBERS, temperature), reference.value, rtol=1e-6)


@pytest.mark.parametrize("temperature", TEMPERATURES.tolist())
def test_planck_matches_astropy_blackbody_per_wavelength(temperature):
    # astropy BlackBody (reference library) per µm at the wavelengths of our wavenumbers
    # (astropy.units.spectral equivalency); per wavenumber B_ν̃ = B_λ |dλ/dν̃| = B_λ λ².
    wn = WAVENUMBERS / u.cm
    lam = wn.to(u.um, equivalencies=u.spectral())
    bb = BlackBody(temperature=temperature * u.K, scale=1.0 * u.W / (u.m**2 * u.sr * u.um))
    reference = (bb(lam) * lam**2).to(RADIANCE_UNIT)
    assert_allclose(planck_radiance(WAVENUMBERS, temperature), reference.value, rtol=1e-6)


# ---------------------------------------------------------------------------------------
# Inverse, derivative, limits
# ---------------------------------------------------------------------------------------
def test_brightness_temperature_inverts_planck_float64():
    # identity: T_b(B(T)) = T (exact inverse)
    t = np.linspace(150.0, 350.0, 201)[:, None]
    tb = brightness_temperature(WAVENUMBERS, planck_radiance(WAVENUMBERS, t))
    assert tb.dtype == np.float64
    assert np.max(np.abs(tb - t)) <= 1e-9


def test_brightness_temperature_inverts_planck_float32():
    # identity: T_b(B(T)) = T; in float32 a few units in the last place of T (ulp(300 K) = 3e-5 K)
    t = np.linspace(150.0, 350.0, 201, dtype=np.float32)[:, None]
    nu = WAVENUMBERS.astype(np.float32)
    rad = planck_radiance(nu, t)
    assert rad.dtype == np.float32
    tb = brightness_temperature(nu, rad)
    assert tb.dtype == np.float32
    assert np.max(np.abs(tb.astype(float) - t.astype(float))) <= 5e-4


def test_brightness_temperature_is_nan_for_non_positive_radiance():
    # definition: no black body emits zero or negative radiance (documented NaN)
    assert np.all(np.isnan(brightness_temperature(926.0, np.array([0.0, -1.0]))))


@pytest.mark.parametrize("temperature", [180.0, 260.0, 340.0])
def test_planck_derivative_matches_central_difference(temperature):
    # central finite difference, error O(h²): with h = 1e-3 K about 1e-9 relative
    h = 1.0e-3
    fd = (planck_radiance(WAVENUMBERS, temperature + h) - planck_radiance(WAVENUMBERS, temperature - h)) / (2 * h)
    assert_allclose(planck_derivative(WAVENUMBERS, temperature), fd, rtol=1e-7)


def test_rayleigh_jeans_limit_float64():
    # textbook limit: for x = c₂ν̃/T → 0, B → c₁ν̃²T/c₂ · x/(eˣ − 1) with
    # x/(eˣ − 1) = 1 − x/2 + x²/12 + O(x⁴) (Bernoulli series). At x ≈ 5e-9 a naive
    # exp(x) − 1 loses ~1e-8 relative; expm1 keeps rounding accuracy.
    nu = np.array([1.0e-6, 1.0e-5, 1.0e-4, 1.0e-3])
    t = 300.0
    x = constants.C2_CM_K * nu / t
    expected = constants.C1_RADIANCE * nu**2 * t / constants.C2_CM_K * (1.0 - x / 2.0 + x**2 / 12.0)
    assert_allclose(planck_radiance(nu, t), expected, rtol=1e-13)


def test_rayleigh_jeans_limit_float32():
    # textbook limit as above; in float32 exp(x) − 1 would be 0 (radiance inf) at x ≈ 5e-9
    nu = np.float32(1.0e-6)
    t = np.float32(300.0)
    expected = constants.C1_RADIANCE * 1.0e-12 * 300.0 / constants.C2_CM_K
    rad = planck_radiance(nu, t)
    assert rad.dtype == np.float32
    assert float(rad) == pytest.approx(expected, rel=1e-6)


def test_wien_limit():
    # textbook limit: for x ≫ 1, B → c₁ν̃³ e^(−x) (Wien's approximation); at x ≈ 50 the
    # relative difference is e^(−x) ≈ 2e-22
    nu, t = 4000.0, 115.0
    x = constants.C2_CM_K * nu / t
    expected = constants.C1_RADIANCE * nu**3 * np.exp(-x)
    assert planck_radiance(nu, t) == pytest.approx(expected, rel=1e-14)


def test_planck_broadcasts_and_keeps_float32():
    # convention (STYLE.md §5): leading axes broadcast, float32 stays float32
    t = np.full((3, 4, 1), 280.0, dtype=np.float32)
    nu = WAVENUMBERS.astype(np.float32)
    rad = planck_radiance(nu, t)
    assert rad.shape == (3, 4, WAVENUMBERS.size) and rad.dtype == np.float32
    assert_allclose(rad[2, 3], planck_radiance(WAVENUMBERS, 280.0), rtol=1e-6)
