"""The compiled float32 kernels (physics.fused) against numpy: their elementary functions
against numpy's float64 ones (a general-purpose reference library), and the whole clear-sky
simulation against the numpy reference path in float64, over columns from polar to
tropical, steep views and grey surfaces."""
import numpy as np
import pytest

from physics import fused
from physics.atmosphere import profile_levels_first
from physics.clearsky import simulate_channel_major
from physics_helpers import channels, coefficients

pytestmark = pytest.mark.skipif(not fused.enabled(), reason="numba not importable or CLOUDSIEVE_PHYSICS=numpy")

F32_EPS = np.finfo(np.float32).eps  # 2⁻²³ (IEEE 754 single)


def _columns(n, seed=11, f=np.float32):
    """Seeded surface numbers spanning the scenes the tool meets: air 200–310 K (polar
    winter to tropics), 0.05–75 kg m⁻², surface pressure 600–1050 hPa (high plateaus),
    skin within ±8 K of the air, view zenith 0–75°, emissivity 0.75–1 (quartz sand at
    8.6 µm is near 0.75, water near 0.99; common practice)."""
    rng = np.random.default_rng(seed)
    t_air = rng.uniform(200.0, 310.0, n).astype(f)
    tcwv = np.exp(rng.uniform(np.log(0.05), np.log(75.0), n)).astype(f)
    ps = rng.uniform(600.0, 1050.0, n).astype(f)
    t_skin = (t_air + rng.uniform(-8.0, 8.0, n)).astype(f)
    zen = rng.uniform(0.0, 75.0, n).astype(f)
    emis = rng.uniform(0.75, 1.0, (len(channels()), n)).astype(f)
    return t_air, tcwv, ps, t_skin, zen, emis


def _run(cols, dtype, levels=True):
    t_air, tcwv, ps, t_skin, zen, emis = (np.asarray(a, dtype=dtype) for a in cols)
    p, t, q = profile_levels_first(t_air, tcwv, ps, n_levels=41, dtype=dtype)
    return (p, t, q), simulate_channel_major(p, t, q, t_skin, emis, zen, channels(), coefficients(), levels=levels)


# ---------------------------------------------------------------------------------------
# elementary functions against numpy in float64
# ---------------------------------------------------------------------------------------
def test_exp_and_log_match_numpy_float64():
    x = np.concatenate([np.linspace(-87.0, 88.0, 200_001), np.geomspace(1e-30, 1.0, 5001),
                        -np.geomspace(1e-30, 1.0, 5001)]).astype(np.float32)
    out_exp, out_log = np.empty_like(x), np.empty_like(x)
    fused._exp_log_kernel(x, out_exp, out_log)
    ref = np.exp(x.astype(np.float64))
    assert np.max(np.abs(out_exp / ref - 1.0)) < 4 * F32_EPS
    pos = x > 0
    ref_log = np.log(x[pos].astype(np.float64))
    # absolute error near ln 1 = 0, relative elsewhere
    assert np.max(np.abs(out_log[pos] - ref_log) / np.maximum(np.abs(ref_log), 1.0)) < 4 * F32_EPS


def test_expm1_is_accurate_near_zero_where_exp_minus_one_is_not():
    # e^{−δ} − 1 for thin layers (δ down to 1e-30) must keep its relative accuracy: the
    # linear-in-τ weight (1 − e^{−δ})/δ is built from it
    x = np.concatenate([-np.geomspace(1e-30, 87.0, 20001), np.geomspace(1e-30, 88.0, 20001)]).astype(np.float32)
    out = np.empty_like(x)
    fused._expm1_kernel(x, out)
    ref = np.expm1(x.astype(np.float64))
    assert np.max(np.abs(out / ref - 1.0)) < 4 * F32_EPS


def test_nan_input_gives_nan_output():
    x = np.array([np.nan, 1.0], dtype=np.float32)
    e, lg, m1 = np.empty_like(x), np.empty_like(x), np.empty_like(x)
    fused._exp_log_kernel(x, e, lg)
    fused._expm1_kernel(x, m1)
    assert np.isnan(e[0]) and np.isnan(m1[0]) and np.isfinite(e[1])
    cols = [a[..., :3].copy() for a in _columns(3)]
    cols[3][1] = np.nan  # a missing skin temperature
    _, res = _run(cols, np.float32)
    assert np.all(np.isnan(res.brightness_temperature[:, 1]))
    assert np.all(np.isfinite(res.brightness_temperature[:, [0, 2]]))


# ---------------------------------------------------------------------------------------
# the compiled simulation against the numpy reference path in float64
# ---------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def both_paths():
    cols = _columns(4000)
    return _run(cols, np.float32), _run(cols, np.float64)


def test_profiles_match_the_numpy_path(both_paths):
    (prof32, _), (prof64, _) = both_paths
    for a, b, tol in zip(prof32, prof64, (4 * F32_EPS, 4 * F32_EPS, 1e-4)):
        assert a.dtype == np.float32
        # humidity goes through an exponential of a humidity shape and three column sums
        assert np.max(np.abs(a / b - 1.0)) < tol


def test_simulation_matches_the_numpy_path(both_paths):
    (_, r32), (_, r64) = both_paths
    assert r32.radiance.dtype == np.float32
    # brightness temperatures to 1 mK, well inside any screening threshold (≥ 0.1 K)
    assert np.max(np.abs(r32.brightness_temperature - r64.brightness_temperature)) < 1e-3
    assert np.max(np.abs(r32.radiance / r64.radiance - 1.0)) < 2e-5
    assert np.max(np.abs(r32.surface_transmittance - r64.surface_transmittance)) < 5e-6
    assert np.max(np.abs(r32.level_transmittance - r64.level_transmittance)) < 5e-6
    assert np.max(np.abs(r32.opaque_radiance / r64.opaque_radiance - 1.0)) < 2e-5


def test_simulation_is_no_worse_than_numpy_in_float32(both_paths, monkeypatch):
    # the numpy path in float32 is the yardstick for what float32 allows
    cols = _columns(4000)
    (_, r32), (_, r64) = both_paths
    monkeypatch.setenv("CLOUDSIEVE_PHYSICS", "numpy")
    assert not fused.enabled()
    _, n32 = _run(cols, np.float32)
    err_fused = np.abs(r32.brightness_temperature - r64.brightness_temperature).max()
    err_numpy = np.abs(n32.brightness_temperature - r64.brightness_temperature).max()
    assert err_fused < 2.0 * err_numpy + 1e-5


def test_float64_input_takes_the_numpy_path(monkeypatch):
    cols = _columns(50)
    _, a = _run(cols, np.float64)
    monkeypatch.setenv("CLOUDSIEVE_PHYSICS", "numpy")
    _, b = _run(cols, np.float64)
    assert a.radiance.dtype == np.float64
    assert np.array_equal(a.radiance, b.radiance)


def test_lean_and_full_runs_agree_and_block_sizes_do_not_matter():
    # tiles of fused.TILE pixels: blocks that end inside a tile, span several, or hold one pixel
    cols = _columns(2 * fused.TILE + 37, seed=3)
    _, whole = _run(cols, np.float32, levels=True)
    _, lean = _run(cols, np.float32, levels=False)
    assert lean.level_transmittance is None and lean.opaque_radiance is None
    assert np.array_equal(whole.brightness_temperature, lean.brightness_temperature)
    for a, b in [(0, 1), (fused.TILE - 1, fused.TILE + 1), (5, 2 * fused.TILE + 30)]:
        _, part = _run([c[..., a:b] for c in cols], np.float32, levels=True)
        assert np.array_equal(part.brightness_temperature, whole.brightness_temperature[:, a:b])
        assert np.array_equal(part.level_transmittance, whole.level_transmittance[:, :, a:b])


def test_mismatched_shapes_are_refused_not_read_past():
    cols = _columns(5)
    (p, t, q), _ = _run(cols, np.float32, levels=False)
    with pytest.raises(ValueError, match="broadcast"):
        simulate_channel_major(p, t, q, cols[3], cols[5][:3], cols[4], channels(), coefficients(), levels=False)
    with pytest.raises(ValueError, match="one .levels"):
        simulate_channel_major(p, t[:, :4], q, cols[3], cols[5], cols[4], channels(), coefficients(), levels=False)


def test_float32_runs_take_the_compiled_path(monkeypatch):
    # the dashboard, the CLI and the Dask path all simulate float32 columns: they must reach
    # the kernels (a silent fall-back to numpy would cost a factor of three to four)
    calls = []
    for name in ("profile", "simulate"):
        real = getattr(fused, name)
        monkeypatch.setattr(fused, name, lambda *a, _real=real, _name=name, **k: calls.append(_name) or _real(*a, **k))
    _run(_columns(10), np.float32)
    assert calls == ["profile", "simulate"]


def test_a_kernel_that_cannot_compile_falls_back_to_numpy_with_a_warning(monkeypatch):
    # e.g. an llvmlite that does not match numba, or a CPU numba cannot target: the user's run
    # must go on, on the numpy path, with one clear warning
    def broken(*args):
        raise RuntimeError("LLVM ERROR: cannot select this instruction\nmore lines")

    monkeypatch.setattr(fused, "_simulate_kernel", broken)
    monkeypatch.setattr(fused, "failure", None)
    cols = _columns(20)
    with pytest.warns(RuntimeWarning, match="compiled physics kernels are unavailable here.*cannot select"):
        _, res = _run(cols, np.float32)
    assert not fused.enabled() and "cannot select" in fused.failure
    monkeypatch.setenv("CLOUDSIEVE_PHYSICS", "numpy")
    _, ref = _run(cols, np.float32)
    # the profile still came from its (working) kernel: the same to float32 rounding
    assert np.max(np.abs(res.brightness_temperature - ref.brightness_temperature)) < 1e-3


def test_non_default_exponents_take_the_general_branch_and_still_match():
    # the kernels shortcut the default humidity exponent (3) and line pressure exponent (½);
    # other values go through exp/log and must agree with numpy as well
    t_air, tcwv, ps, t_skin, zen, emis = _columns(500, seed=5)
    co = coefficients()._replace(line_pressure_exponent=0.7)
    res = {}
    for f in (np.float32, np.float64):
        p, t, q = profile_levels_first(t_air.astype(f), tcwv.astype(f), ps.astype(f), n_levels=41, dtype=f,
                                       humidity_exponent=2.5)
        res[f] = (q, simulate_channel_major(p, t, q, t_skin.astype(f), emis.astype(f), zen.astype(f), channels(), co,
                                            levels=False))
    assert np.max(np.abs(res[np.float32][0] / res[np.float64][0] - 1.0)) < 1e-4
    assert np.max(np.abs(res[np.float32][1].brightness_temperature - res[np.float64][1].brightness_temperature)) < 1e-3
