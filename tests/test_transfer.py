"""Reference tests of physics.transfer: exact solutions, limits and convergence of the solver."""
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate

from physics.atmosphere import profile_from_surface
from physics.absorption import layer_optical_depth
from physics.clearsky import channel_brightness_temperature, channel_planck
from physics.constants import DIFFUSIVITY_FACTOR
from physics.planck import planck_radiance
from physics.transfer import (
    layer_transmittance_and_weight,
    schwarzschild_upwelling,
    upwelling_level_major,
)
from physics_helpers import channels, coefficients

NU = 926.0  # [cm⁻¹] monochromatic tests at the 11 µm window centre


def _solve(tau, b_levels, b_surface, emissivity=1.0, mu=1.0, **kw):
    """One channel, one pixel: tau (n_lay,), b_levels (n_lay + 1,) → TransferResult."""
    tau = np.asarray(tau, dtype=float)[:, None]
    b = np.asarray(b_levels, dtype=float)[:, None]
    return schwarzschild_upwelling(tau, b, np.array([b_surface]), np.array([emissivity]), mu, **kw)


# ---------------------------------------------------------------------------------------
# Exact solutions and limits
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("n_layers", [1, 3, 10, 40])
@pytest.mark.parametrize("mu", [1.0, 0.7, 0.3])
@pytest.mark.parametrize("tau_total", [0.0, 1e-6, 0.05, 0.7, 3.0, 25.0])
def test_isothermal_slab_exact_solution(tau_total, mu, n_layers):
    # textbook isothermal slab over a black surface (Schwarzschild's equation with constant
    # source; e.g. Petty 2006, Ch. 8, from memory): L = B(T)(1 − e^(−τ/μ)) + L_s e^(−τ/μ)
    b_air, b_s = planck_radiance(NU, 250.0), planck_radiance(NU, 295.0)
    # unequal sub-layers: the solution must not depend on how the slab is cut
    weights = np.linspace(1.0, 2.0, n_layers)
    tau = tau_total * weights / weights.sum()
    res = _solve(tau, np.full(n_layers + 1, b_air), b_s, mu=mu)
    trans = np.exp(-tau_total / mu)
    expected = b_air * -np.expm1(-tau_total / mu) + b_s * trans
    assert float(res.radiance[0]) == pytest.approx(expected, rel=1e-10)
    assert float(res.level_transmittance[0, 0]) == pytest.approx(trans, rel=1e-10)


def test_zero_optical_depth_is_transparent():
    # identity: τ = 0 ⇒ TOA radiance = surface emission ε B_s; no sky radiance to reflect
    b = planck_radiance(NU, np.linspace(290.0, 220.0, 11))
    for eps in (1.0, 0.9, 0.5):
        res = _solve(np.zeros(10), b, 123.0, emissivity=eps, mu=0.6)
        assert float(res.radiance[0]) == pytest.approx(eps * 123.0, rel=1e-15)
        # no sky radiance: the telescoped layer sums leave only rounding of B_0 (documented
        # in upwelling_level_major), a few units in the last place
        assert abs(float(res.downwelling[0])) <= 8 * np.finfo(float).eps * b.max()
        assert_allclose(res.level_transmittance[:, 0], 1.0, rtol=0)
        assert_allclose(res.opaque_radiance[:, 0], b, rtol=1e-15)  # each level seen unattenuated


def test_thick_isothermal_layer_radiates_as_black_body():
    # identity: an optically thick isothermal layer emits B(T) whatever lies below it
    b_air = planck_radiance(NU, 230.0)
    res = _solve([80.0, 80.0], np.full(3, b_air), planck_radiance(NU, 300.0), emissivity=0.8, mu=0.5)
    assert float(res.radiance[0]) == pytest.approx(b_air, rel=1e-14)
    assert float(res.downwelling[0]) == pytest.approx(b_air, rel=1e-14)


def test_thick_layer_radiates_at_the_temperature_of_its_near_boundary():
    # limit of the linear-in-τ source (Clough, Iacono & Moncet 1992, Sec. 2): for δ → ∞ a layer
    # emits B_near + (B_far − B_near)/δ — towards space the top boundary, towards the surface
    # the bottom one (the isothermal-layer assumption would give the layer mean instead)
    b_bottom, b_top = planck_radiance(NU, 280.0), planck_radiance(NU, 220.0)
    delta = 1.0e4
    res = _solve([delta], [b_bottom, b_top], planck_radiance(NU, 300.0))
    assert float(res.radiance[0]) == pytest.approx(b_top + (b_bottom - b_top) / delta, rel=1e-12)
    res_dn = _solve([delta / DIFFUSIVITY_FACTOR], [b_bottom, b_top], 0.0)
    assert float(res_dn.downwelling[0]) == pytest.approx(b_bottom + (b_top - b_bottom) / delta, rel=1e-12)


@pytest.mark.parametrize("mu", [1.0, 0.4])
@pytest.mark.parametrize("n_layers", [1, 4, 17])
def test_source_linear_in_optical_depth_is_exact(mu, n_layers):
    # analytic integral of Schwarzschild's equation for B(t) = B₀ + B₁ t, t the vertical optical
    # depth below the top (calculus, as in the transfer module docstring):
    # ∫₀^τ (B₀ + B₁t) e^(−t/μ) dt/μ = B₀(1 − e^(−τ/μ)) + B₁ μ [1 − e^(−τ/μ)(1 + τ/μ)]
    tau_total, b0, b1 = 2.5, 40.0, 12.0
    edges = np.sort(np.r_[0.0, tau_total, np.random.default_rng(n_layers).uniform(0, tau_total, n_layers - 1)])
    t_levels = edges[::-1]  # optical depth below the top of each level, surface first
    res = _solve(np.diff(edges)[::-1], b0 + b1 * t_levels, 0.0, mu=mu)
    x = tau_total / mu
    expected = b0 * -np.expm1(-x) + b1 * mu * (1.0 - np.exp(-x) * (1.0 + x))
    assert float(res.radiance[0]) == pytest.approx(expected, rel=1e-12)


def test_layer_weight_limits():
    # limits of w(δ) = (1 − e^(−δ))/δ − e^(−δ): w = δ/2 − δ²/3 + O(δ³) as δ → 0 (Taylor series),
    # w → 1/δ as δ → ∞; w(0) = 0 exactly (documented floor δ ≥ 1e-30, so a(0) = 1e-30)
    trans, absorp, w = layer_transmittance_and_weight(np.array([0.0, 1e-3, 50.0, 1e4]))
    assert w[0] == 0.0 and absorp[0] <= 1e-30 and trans[0] == 1.0
    assert w[1] == pytest.approx(0.5e-3 - 1e-6 / 3, rel=1e-6)  # absolute error ~1e-16 (docstring)
    assert w[2] == pytest.approx((1 - np.exp(-50.0)) / 50.0 - np.exp(-50.0), rel=1e-14)
    assert w[3] == pytest.approx(1e-4, rel=1e-12)
    # float32 stays float32
    assert layer_transmittance_and_weight(np.float32([0.1]))[2].dtype == np.float32


# ---------------------------------------------------------------------------------------
# Convergence to the Schwarzschild integral
# ---------------------------------------------------------------------------------------
PS = 1000.0  # [hPa]
TAU_COLUMN = 1.5  # vertical optical depth of the whole column [1]


def _smooth_temperature(p):
    return 220.0 + 80.0 * p / PS  # [K], smooth in pressure


def _tau_above(p):
    # absorber amount ∝ p³ above pressure p (humidity ∝ (p/p_s)² with hydrostatic weighting)
    return TAU_COLUMN * (p / PS) ** 3


def _schwarzschild_quad(mu, t_skin):
    # Schwarzschild's integral (Liou 2002, Eq. 4.2.2; Petty 2006, Eq. 8.4) by adaptive quadrature:
    # L = B_s e^(−τ*/μ) + ∫ B(T(p)) e^(−τ(p)/μ) (dτ/dp) dp / μ
    def integrand(p):
        dtau_dp = 3.0 * TAU_COLUMN * p**2 / PS**3
        return planck_radiance(NU, _smooth_temperature(p)) * np.exp(-_tau_above(p) / mu) * dtau_dp / mu

    atmosphere, _ = integrate.quad(integrand, 0.0, PS, epsabs=0.0, epsrel=1e-13, limit=200)
    return atmosphere + planck_radiance(NU, t_skin) * np.exp(-TAU_COLUMN / mu)


def _layered(n_layers, mu, t_skin):
    p = np.linspace(PS, 0.0, n_layers + 1)
    tau = _tau_above(p[:-1]) - _tau_above(p[1:])
    res = _solve(tau, planck_radiance(NU, _smooth_temperature(p)), planck_radiance(NU, t_skin), mu=mu)
    return float(res.radiance[0])


@pytest.mark.parametrize("mu", [1.0, 0.5])
def test_layered_solution_converges_at_second_order(mu):
    reference = _schwarzschild_quad(mu, 300.0)
    errors = np.array([abs(_layered(n, mu, 300.0) - reference) for n in (10, 20, 40)])
    # a source linear in τ within each layer is second-order accurate (local error O(h³))
    orders = np.log2(errors[:-1] / errors[1:])
    assert_allclose(orders, 2.0, atol=0.1)
    # and tiny at 200 layers (the error ∝ n⁻² from 2e-3 relative at 10 layers)
    assert abs(_layered(200, mu, 300.0) / reference - 1.0) < 1e-5


# ---------------------------------------------------------------------------------------
# Slant path, surface reflection, level quantities
# ---------------------------------------------------------------------------------------
def _realistic(dtype=np.float64, t_air=295.0, tcwv=40.0):
    """Layer optical depths and channel level radiances of a moist profile (n_lay, n_ch)."""
    prof = profile_from_surface(t_air, tcwv, dtype=dtype)
    tau = layer_optical_depth(*prof, coefficients())
    b = channel_planck(channels(), prof.temperature)
    return prof, tau, b


@pytest.mark.parametrize("mu", [0.9, 0.5, 0.2])
def test_slant_path_scales_optical_depth_by_secant(mu):
    # plane-parallel slant path: τ_s = τ/μ (common practice) — the solution at μ equals the
    # solution at μ = 1 of τ/μ (black surface, so the downwelling path does not enter)
    _, tau, b = _realistic()
    b_s = channel_planck(channels(), 297.0)
    slant = schwarzschild_upwelling(tau, b, b_s, np.ones(4), mu)
    nadir = schwarzschild_upwelling(tau / mu, b, b_s, np.ones(4), 1.0)
    assert_allclose(slant.level_transmittance, nadir.level_transmittance, rtol=1e-13)
    assert_allclose(slant.opaque_radiance, nadir.opaque_radiance, rtol=1e-13)
    assert_allclose(slant.radiance, nadir.radiance, rtol=1e-13)
    # Beer–Lambert along the slant path (common practice): 𝒯₀ = exp(−Σ τ / μ)
    assert_allclose(slant.level_transmittance[0], np.exp(-tau.sum(axis=0) / mu), rtol=1e-12)


def test_kirchhoff_reflection_of_isothermal_sky():
    # Kirchhoff: an opaque surface reflects 1 − ε (common practice). For an isothermal
    # atmosphere the diffusivity-path downwelling is B(T)(1 − e^(−1.66 τ)) (Elsasser 1942,
    # 1.66; isothermal slab), so L(ε) − L(1) = (1 − ε)(L↓ − B_s) 𝒯₀ exactly.
    tau = np.array([0.2, 0.3, 0.1])
    b_air, b_s = planck_radiance(NU, 260.0), planck_radiance(NU, 290.0)
    down_expected = b_air * -np.expm1(-1.66 * tau.sum())
    mu = 0.8
    trans = np.exp(-tau.sum() / mu)
    black = _solve(tau, np.full(4, b_air), b_s, 1.0, mu)
    assert float(black.downwelling[0]) == pytest.approx(down_expected, rel=1e-13)
    for eps in (0.98, 0.9, 0.6):
        grey = _solve(tau, np.full(4, b_air), b_s, eps, mu)
        reflected = float(grey.radiance[0] - black.radiance[0])
        assert reflected == pytest.approx((1.0 - eps) * (down_expected - b_s) * trans, rel=1e-10)


def test_downwelling_uses_the_requested_diffusivity():
    # isothermal slab along the diffusivity path (textbook): B(T)(1 − e^(−D τ))
    b_air = planck_radiance(NU, 260.0)
    res = _solve([0.4], np.full(2, b_air), 0.0, diffusivity=2.0)
    assert float(res.downwelling[0]) == pytest.approx(b_air * -np.expm1(-0.8), rel=1e-13)


def test_opaque_radiance_at_top_and_bottom_levels():
    # definitions (TransferResult): an opaque black surface at the top level is seen as
    # B(T_top); at level 0 it is a black surface at the lowest air temperature
    _, tau, b = _realistic()
    res = schwarzschild_upwelling(tau, b, b[0] * 0.5, np.full(4, 0.7), 0.6)
    assert_allclose(res.opaque_radiance[-1], b[-1], rtol=1e-15)
    black_at_air_t = schwarzschild_upwelling(tau, b, b[0], np.ones(4), 0.6)
    assert_allclose(res.opaque_radiance[0], black_at_air_t.radiance, rtol=1e-13)


def test_level_transmittance_is_monotone_and_one_at_top():
    # definition: 𝒯_k = Π_{j ≥ k} e^(−δ_j) is non-decreasing upwards and 1 at the top
    _, tau, b = _realistic()
    res = schwarzschild_upwelling(tau, b, b[0], np.ones(4), 0.5)
    assert np.all(np.diff(res.level_transmittance, axis=0) >= 0)
    assert_allclose(res.level_transmittance[-1], 1.0, rtol=0)
    assert np.all(res.level_transmittance[0] > 0)


def test_float32_agrees_with_float64():
    # float32 rounding ≈ 1e-7 relative in radiance ≈ 1e-5 K; the requirement is 0.01 K
    tb = {}
    for dtype in (np.float64, np.float32):
        prof, tau, b = _realistic(dtype)
        assert tau.dtype == dtype and b.dtype == dtype
        b_s = channel_planck(channels(), np.asarray(299.0, dtype=dtype))
        res = schwarzschild_upwelling(tau, b, b_s, np.full(4, 0.97, dtype=dtype), dtype(0.6))
        assert res.radiance.dtype == dtype
        tb[dtype] = channel_brightness_temperature(channels(), res.radiance)
    assert np.max(np.abs(tb[np.float32] - tb[np.float64])) <= 0.01


# ---------------------------------------------------------------------------------------
# Layout and broadcasting
# ---------------------------------------------------------------------------------------
def _grid_inputs(shape=(3, 5)):
    rng = np.random.default_rng(7)
    t_air = rng.uniform(260.0, 300.0, shape)
    prof = profile_from_surface(t_air, rng.uniform(2.0, 40.0, shape))
    tau = layer_optical_depth(*prof, coefficients())
    b = channel_planck(channels(), prof.temperature)
    b_s = channel_planck(channels(), t_air + rng.uniform(-2, 5, shape))
    eps = rng.uniform(0.9, 1.0, shape + (4,))
    mu = np.cos(np.deg2rad(rng.uniform(0.0, 65.0, shape)))
    return tau, b, b_s, eps, mu


def test_public_layout_agrees_with_level_major_core():
    tau, b, b_s, eps, mu = _grid_inputs()
    pub = schwarzschild_upwelling(tau, b, b_s, eps, mu)
    n_lay, n_ch = tau.shape[-2:]

    def lm(a):  # (3, 5, n, ch) → (n, ch, 15)
        return np.ascontiguousarray(a.reshape(15, a.shape[-2], n_ch).transpose(1, 2, 0))

    rad, trans, opaque, down = upwelling_level_major(
        lm(tau), lm(b), np.ascontiguousarray(b_s.reshape(15, n_ch).T),
        np.ascontiguousarray(eps.reshape(15, n_ch).T), 1.0 / mu.reshape(15),
    )
    assert_allclose(pub.radiance, rad.T.reshape(3, 5, n_ch), rtol=1e-15)
    assert_allclose(pub.downwelling, down.T.reshape(3, 5, n_ch), rtol=1e-15)
    assert_allclose(pub.level_transmittance, trans.transpose(2, 0, 1).reshape(3, 5, n_lay + 1, n_ch), rtol=1e-15)
    assert_allclose(pub.opaque_radiance, opaque.transpose(2, 0, 1).reshape(3, 5, n_lay + 1, n_ch), rtol=1e-15)
    # levels=False returns the same radiance without the level arrays
    lean = schwarzschild_upwelling(tau, b, b_s, eps, mu, levels=False)
    assert lean.level_transmittance is None and lean.opaque_radiance is None
    assert_allclose(lean.radiance, pub.radiance, rtol=1e-15)


def test_two_dimensional_grid_equals_pixel_by_pixel():
    # convention (STYLE.md §5): leading pixel axes broadcast; every pixel is independent
    tau, b, b_s, eps, mu = _grid_inputs()
    grid = schwarzschild_upwelling(tau, b, b_s, eps, mu)
    assert grid.radiance.shape == (3, 5, 4)
    assert grid.level_transmittance.shape == (3, 5) + b.shape[-2:]
    for i, j in [(0, 0), (1, 3), (2, 4)]:
        one = schwarzschild_upwelling(tau[i, j], b[i, j], b_s[i, j], eps[i, j], mu[i, j])
        assert_allclose(grid.radiance[i, j], one.radiance, rtol=1e-14)
        assert_allclose(grid.opaque_radiance[i, j], one.opaque_radiance, rtol=1e-14)


def test_shared_inputs_broadcast_over_pixels():
    # one profile, a scalar μ and a per-channel emissivity broadcast against per-pixel skin radiance
    tau, b, b_s, eps, mu = _grid_inputs()
    res = schwarzschild_upwelling(tau[0, 0], b[0, 0], b_s, eps[0, 0], 0.8)
    assert res.radiance.shape == (3, 5, 4)
    one = schwarzschild_upwelling(tau[0, 0], b[0, 0], b_s[2, 1], eps[0, 0], 0.8)
    assert_allclose(res.radiance[2, 1], one.radiance, rtol=1e-14)


def test_inputs_are_not_mutated():
    # convention (STYLE.md §5): kernels never mutate inputs
    tau, b, b_s, eps, mu = _grid_inputs()
    copies = [a.copy() for a in (tau, b, b_s, eps, mu)]
    schwarzschild_upwelling(tau, b, b_s, eps, mu)
    for a, c in zip((tau, b, b_s, eps, mu), copies):
        assert np.array_equal(a, c)


def test_mismatched_levels_are_rejected():
    with pytest.raises(ValueError, match="one more level"):
        schwarzschild_upwelling(np.ones((3, 4)), np.ones((3, 4)), np.ones(4), np.ones(4), 1.0)


def test_hot_path_results_do_not_depend_on_chunking_or_levels():
    # a pixel's clear-sky result must be bit-for-bit the same whatever block of pixels it is
    # simulated in and whether the level arrays are kept: the chunked (Dask) and in-memory
    # paths, and the lean and full simulations, rely on it (project requirement)
    from physics.atmosphere import profile_levels_first
    from physics.clearsky import simulate_channel_major

    rng = np.random.default_rng(7)
    n = 3001
    f = np.float32
    t_air = rng.uniform(245.0, 305.0, n).astype(f)
    tcwv = rng.uniform(0.5, 60.0, n).astype(f)
    ps = rng.uniform(950.0, 1030.0, n).astype(f)
    t_skin = (t_air + rng.normal(0.5, 1.5, n)).astype(f)
    zen = rng.uniform(0.0, 65.0, n).astype(f)
    chans = channels()
    emis = rng.uniform(0.95, 0.995, (len(chans), n)).astype(f)
    co = coefficients()

    def run(a, b, levels):
        p, t, q = profile_levels_first(t_air[a:b], tcwv[a:b], ps[a:b], n_levels=41, dtype=f)
        return simulate_channel_major(p, t, q, t_skin[a:b], emis[:, a:b], zen[a:b], chans, co, levels=levels)

    whole = run(0, n, True)
    lean = run(0, n, False)
    assert np.array_equal(whole.radiance, lean.radiance)
    for a, b in [(0, 17), (3, 1000), (5, 2053), (1, 2), (33, 33 + 512), (2999, 3001)]:
        part = run(a, b, True)
        assert np.array_equal(part.brightness_temperature, whole.brightness_temperature[:, a:b]), (a, b)
        assert np.array_equal(part.opaque_radiance, whole.opaque_radiance[:, :, a:b]), (a, b)
