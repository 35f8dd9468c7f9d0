"""The clear-sky error budget: Jacobians by re-simulated columns, instrument noise, correlations.

Outside references: astropy's Planck function (the temperature dependence of a detector's
noise-equivalent temperature), the analytic surface-temperature sensitivity of Schwarzschild's
equation ε t_s B'(T_s)/B'(T) from the numpy reference simulation's surface transmittance, and
the sign of the water-vapour sensitivity (common practice).
"""
from pathlib import Path

import numpy as np
import pytest

from cloudsieve.config import load_config
from cloudsieve.simulate import ChannelSet, Columns
from cloudsieve.uncertainty import COMPONENTS, clear_sky_sigma, error_budget, noise_equivalent_temperature

SAMPLES = Path(__file__).resolve().parent.parent / "sample_scenes"
NAMES = ("3p9um", "8p6um", "11um", "12um")


@pytest.fixture(scope="module")
def chset():
    return ChannelSet.for_scene(NAMES, load_config())


@pytest.mark.parametrize("name, t", [("3p9um", 240.0), ("11um", 220.0), ("12um", 320.0)])
def test_noise_equivalent_temperature_follows_the_planck_slope(chset, name, t):
    """Constant radiance noise: NEΔT(T)/NEΔT(300 K) = B'(300 K)/B'(T), here from astropy's black
    body at the channel's central wavenumber (monochromatic; the band correction moves it < 2 %)."""
    import astropy.units as u
    from astropy.modeling.physical_models import BlackBody

    ch = chset.channels[NAMES.index(name)]
    nu = ch.central_wavenumber / u.cm

    def slope(temp):
        bb = BlackBody(temperature=temp * u.K)
        return (bb(nu.to(u.Hz, equivalencies=u.spectral())) - BlackBody(temperature=(temp - 0.01) * u.K)(
            nu.to(u.Hz, equivalencies=u.spectral()))).value / 0.01

    expected = 0.1 * slope(300.0) / slope(t)
    assert noise_equivalent_temperature(ch, t, 0.1, 300.0) == pytest.approx(expected, rel=0.02)
    if name == "3p9um":  # from memory: 3.9 µm noise grows about tenfold from 300 K to 240 K
        assert noise_equivalent_temperature(ch, t, 0.1, 300.0) > 0.8


def _columns(t_air, tcwv, zenith=0.0, emis=0.99):
    f32 = np.float32
    n = len(t_air)
    return Columns(np.asarray(t_air, f32), np.asarray(tcwv, f32), np.full(n, 1013.25, f32), np.asarray(t_air, f32),
                   np.full(n, zenith, f32), np.full((len(NAMES), n), emis, f32))


def test_skin_temperature_sensitivity_is_the_analytic_one(chset):
    """∂T/∂T_s = ε t_s B'(T_s)/B'(T): Schwarzschild's equation is linear in the surface emission;
    t_s from the numpy reference simulation (float64), against the re-simulated float32 columns."""
    from physics.atmosphere import profile_from_surface
    from physics.clearsky import simulate_clear_sky

    cfg = load_config()
    t_air, tcwv = np.array([285.0, 295.0, 300.0]), np.array([10.0, 30.0, 50.0])
    budget = error_budget(_columns(t_air, tcwv), chset, cfg, np.zeros(3, np.int8))
    sky = simulate_clear_sky(profile_from_surface(t_air, tcwv), t_air, np.full((3, 4), 0.99), np.zeros(3),
                             chset.channels, chset.coefficients)
    k = COMPONENTS.index(next(c for c in COMPONENTS if c[0] == "skin_temperature"))
    for i, ch in enumerate(chset.channels):
        analytic = 0.99 * sky.surface_transmittance[:, i] * ch.radiance_derivative(t_air + 0.25) / \
            ch.radiance_derivative(sky.brightness_temperature[:, i])
        np.testing.assert_allclose(budget.jacobian[:, i, k], analytic, rtol=0.03, err_msg=ch.name)


def test_water_vapour_cools_and_the_split_window_errors_are_correlated(chset):
    cfg = load_config()
    b = error_budget(_columns([298.0], [40.0]), chset, cfg, np.zeros(1, np.int8))
    k = [c[0] for c in COMPONENTS].index("water_vapour")
    i11, i12 = NAMES.index("11um"), NAMES.index("12um")
    # common practice: more water vapour over a surface warmer than the air above it, colder window BT
    assert b.jacobian[0, i11, k] < 0 and b.jacobian[0, i12, k] < b.jacobian[0, i11, k]
    # the difference's σ: errors common to both channels cancel, so it is below the two σ's added
    assert b.split_window[0] < np.hypot(b.total[0, i11], b.total[0, i12])
    assert np.all(b.total >= b.noise) and np.all(b.contribution >= 0)


def test_the_inspector_shows_the_budget():
    from dashboard.model import ScreeningModel
    from dashboard.views.focus import Focus
    from dashboard.views.inspector import PixelInspector
    from dashboard.views.notices import Notices

    model = ScreeningModel.open(SAMPLES / "polar_ice.nc", load_config(), journal=False)
    budget = model.session.error_budget(60, 70)
    assert budget["channels"]["3p9um"]["noise"] > budget["channels"]["11um"]["noise"]  # cold scene
    text = PixelInspector(model, Focus(model.result.mask.shape), Notices()).text((60, 70))
    assert "Clear-sky error budget" in text and "instrument noise" in text and "11 µm − 12 µm difference" in text
    assert "differing between channels" in text and "3.9 µm − 11 µm difference" in text
    # the σ the tests used (bin centre) is shown beside this pixel's own budget, within a few per cent
    for key in ("11um", "3p9um", "11um-12um", "3p9um-11um"):
        own = budget["channels"][key]["total"] if key in budget["channels"] else budget["differences"][key]
        assert budget["screening"][key] == pytest.approx(own, rel=0.1), key


# ---------------------------------------------------------------------------------------
# the screening's per-pixel σ (Jacobians at binned states)
# ---------------------------------------------------------------------------------------
def _scene_columns(name, n=400, seed=3):
    from cloudsieve.scene import load_scene
    from cloudsieve.simulate import gather_columns, scene_fields, surface_emissivity, simulate_columns

    cfg = load_config()
    scene = load_scene(SAMPLES / f"{name}.nc", config=cfg)
    fields = scene_fields(scene.data)
    cs = ChannelSet.for_scene(tuple(scene.channels), cfg)
    idx = np.sort(np.random.default_rng(seed).choice(np.flatnonzero(fields["valid"].ravel()), n, replace=False))
    cols = gather_columns(fields, surface_emissivity(fields, cs, cfg), idx)
    bt = simulate_columns(cols, cs, cfg["simulation"]).brightness_temperature
    return cfg, cs, cols, fields["surface"].ravel()[idx], bt


@pytest.mark.parametrize("name", ["night_front", "day_coast"])
def test_binned_sigma_matches_each_pixels_own_budget(name):
    """The Jacobians evaluated at the centre of a pixel's bin of background state give the σ of
    the pixel's own budget (each column simulated at its own state) within a few per cent."""
    cfg, cs, cols, surface, bt = _scene_columns(name)
    sig = clear_sky_sigma(cols, surface, cs, cfg)
    own = error_budget(cols, cs, cfg, surface)
    rel = np.abs(sig.total.T / own.total - 1.0)
    # near a kink of the profile builder (humidity at its saturation cap) the finite-difference
    # Jacobians of two nearby states may differ more: allow 1 % of the values up to 10 %
    assert np.mean(rel <= 0.05) >= 0.99 and rel.max() <= 0.10, rel.max()
    rel = np.abs(sig.difference["11um-12um"] / own.split_window - 1.0)
    assert np.mean(rel <= 0.08) >= 0.99 and rel.max() <= 0.15, rel.max()
    assert sig.bins <= cols.size


def test_sigma_is_the_same_on_both_physics_paths(monkeypatch):
    """Both paths of the physics (compiled float32 kernels, numpy reference) give the same σ."""
    import physics.fused as fused

    cfg, cs, cols, surface, bt = _scene_columns("night_front", n=200)
    compiled = clear_sky_sigma(cols, surface, cs, cfg)
    monkeypatch.setenv("CLOUDSIEVE_PHYSICS", "numpy")
    assert not fused.enabled()
    reference = clear_sky_sigma(cols, surface, cs, cfg)
    np.testing.assert_allclose(compiled.total, reference.total, rtol=0.02)
    for k, v in compiled.difference.items():
        np.testing.assert_allclose(v, reference.difference[k], rtol=0.02, err_msg=k)


def test_compiled_binning_and_gather_match_the_numpy_reference(monkeypatch):
    """The compiled passes that bin the background states and gather each pixel's σ give the
    same bins and values as the numpy reference, on a sample scene's pixels and on random
    states that put values on the bins' edges."""
    from dataclasses import replace

    import physics.fused as fused
    from cloudsieve import uncertainty as u

    if not fused.enabled():
        pytest.skip("the compiled physics is off here")
    cfg, cs, cols, surface, bt = _scene_columns("night_front", n=3000)
    rng = np.random.default_rng(5)
    edges = replace(cols, t_air=(np.round(cols.t_air) + 0.5).astype(np.float32),
                    t_skin=(np.round(cols.t_skin) + rng.choice([-0.5, 0.5], cols.size)).astype(np.float32),
                    p_surf=(np.round(cols.p_surf / 10) * 10 + 5).astype(np.float32))
    for c in (cols, edges):
        code, low, span = u._bin_codes_compiled(c, surface, u._kernels())
        ref = u._bin_codes_numpy(c, surface)
        np.testing.assert_array_equal(code, ref[0])
        np.testing.assert_array_equal(low, ref[1])
        np.testing.assert_array_equal(span, ref[2])
    table = rng.random((50, 7)).astype(np.float32)
    index = rng.integers(0, 50, 1000)
    compiled = u._gather(table, index)
    monkeypatch.setenv("CLOUDSIEVE_PHYSICS", "numpy")
    np.testing.assert_array_equal(compiled, u._gather(table, index))
    np.testing.assert_array_equal(compiled, table[index].T)


def test_linear_budget_agrees_with_a_monte_carlo_of_the_simulation():
    """Propagating the background errors by Monte Carlo through the simulation itself (draws of
    skin and air temperature, water vapour and emissivity; GUM Supplement 1 practice) gives the
    spread the linear budget predicts, for each channel and for the 11 − 12 µm difference."""
    from dataclasses import replace

    from cloudsieve.simulate import simulate_columns

    cfg = load_config()
    for key in ("lapse_rate", "humidity_exponent", "continuum", "emissivity_contrast"):
        cfg["background_errors"][key] = {"sea": 0.0, "land": 0.0, "ice": 0.0}
    cfg["background_noise"] = {}
    cs = ChannelSet.for_scene(NAMES, cfg)
    one = _columns([296.0], [35.0], zenith=40.0)
    sig = clear_sky_sigma(one, np.zeros(1, np.int8), cs, cfg)
    rng = np.random.default_rng(11)
    n = 4000
    e = cfg["background_errors"]
    f32 = np.float32
    draws = replace(
        one, t_air=(296.0 + e["air_temperature"]["sea"] * rng.standard_normal(n)).astype(f32),
        t_skin=(296.0 + e["skin_temperature"]["sea"] * rng.standard_normal(n)).astype(f32),
        tcwv=(35.0 * (1 + e["water_vapour"]["sea"] * rng.standard_normal(n))).astype(f32),
        p_surf=np.full(n, 1013.25, f32), sat_zenith=np.full(n, 40.0, f32),
        emissivity=np.repeat(0.99 + e["emissivity"]["sea"] * rng.standard_normal((1, n)), len(NAMES), 0).astype(f32))
    bt = simulate_columns(draws, cs, cfg["simulation"]).brightness_temperature.astype(float)
    noise = sig.noise[:, 0]
    for i, ch in enumerate(NAMES):
        mc = np.sqrt(np.var(bt[i]) + noise[i] ** 2)
        assert sig.total[i, 0] == pytest.approx(mc, rel=0.06), ch
    i, j = NAMES.index("11um"), NAMES.index("12um")
    mc = np.sqrt(np.var(bt[i] - bt[j]) + noise[i] ** 2 + noise[j] ** 2)
    assert sig.difference["11um-12um"][0] == pytest.approx(mc, rel=0.08)


def test_cold_scenes_raise_the_sigma_of_the_night_fog_difference():
    """The 3.9 µm noise grows fast at cold scenes (constant radiance noise): the σ of the
    3.9 − 11 µm difference of a polar column exceeds a tropical one's by the noise alone."""
    cfg = load_config()
    cs = ChannelSet.for_scene(NAMES, cfg)
    cols = _columns([250.0, 300.0], [2.0, 50.0])
    sig = clear_sky_sigma(cols, np.zeros(2, np.int8), cs, cfg)
    assert sig.noise[NAMES.index("3p9um"), 0] > 5 * sig.noise[NAMES.index("3p9um"), 1]
    assert sig.difference["3p9um-11um"][0] > sig.noise[NAMES.index("3p9um"), 0]
