"""Screening: simulation, departures, tests, classes, bias fit, user clear-sky values, inversion."""
import copy
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from cloudsieve.codes import CLEAR, CLOUD, MARGINAL, NO_DATA
from cloudsieve.config import load_config
from cloudsieve.invert import invert_all
from cloudsieve.registry import bit_table
from cloudsieve.scene import load_scene
from cloudsieve.screen import bias_from_sums, bias_sums, classify, screen_scene
from cloudsieve.session import Session
from cloudsieve.simulate import ColumnSimulator, simulate

BITS = bit_table()

SAMPLES = Path(__file__).resolve().parent.parent / "sample_scenes"
SMALL = SAMPLES / "night_front_small.csv"


@pytest.fixture(scope="module")
def cfg():
    return load_config()


@pytest.fixture(scope="module")
def small(cfg):
    scene = load_scene(SMALL, config=cfg)
    return scene, simulate(scene, cfg)


def test_simulation_is_plausible(small):
    scene, sim = small
    i = sim.channels.index("11um")
    clear_bt = sim.bt_clear[i]
    skin = scene.data["t_skin"].values
    # clear-sky 11 µm is colder than the skin by the atmospheric correction (common practice:
    # ~0.5–10 K for 10–60 kg m-2 of water vapour) and never warmer than the skin by much
    diff = skin - clear_bt
    assert np.all(diff > 0) and np.all(diff < 12)


def test_threads_and_chunks_do_not_change_results(small, cfg):
    scene, sim = small
    c = copy.deepcopy(cfg)
    c["simulation"].update(threads=1, chunk_pixels=100)
    other = simulate(scene, c)
    np.testing.assert_array_equal(sim.bt_clear, other.bt_clear)


def test_classes_from_margins():
    valid = np.array([[True, True, True, False]])
    margins = {"cold_departure": np.array([[1.0, -0.1, -5.0, 2.0]]),
               "texture": np.array([[np.nan, -3.0, -3.0, np.nan]])}
    thr = {"cold_departure": np.full((1, 4), 2.0), "texture": np.full((1, 4), 0.5)}
    mask, bits = classify(valid, margins, thr, 0.25)
    assert mask.tolist() == [[CLOUD, MARGINAL, CLEAR, NO_DATA]]
    assert bits[0, 0] & BITS["cold_departure"] and not bits[0, 1]
    edits = np.array([[1, 2, 0, 0]], np.int8)
    mask, bits = classify(valid, margins, thr, 0.25, edits=edits)
    assert mask.tolist() == [[CLEAR, CLOUD, CLEAR, NO_DATA]]
    assert bits[0, 0] & BITS["analyst_clear"] and bits[0, 1] & BITS["analyst_cloud"]


def test_warm_departure_does_not_make_cloud():
    valid = np.ones((1, 1), bool)
    mask, bits = classify(valid, {"warm_departure": np.array([[3.0]])}, {"warm_departure": np.ones((1, 1))}, 0.25)
    assert mask[0, 0] == CLEAR and bits[0, 0] == BITS["warm_departure"]


def test_bias_fit_recovers_a_line(small):
    scene, sim = small
    x = sim.slant_path
    dep = {"11um": 0.3 + 0.02 * x + np.random.default_rng(0).normal(0, 0.01, x.shape)}
    mask = np.zeros(x.shape, np.int8)
    bits = np.zeros(x.shape, np.uint16)
    surface = np.zeros(x.shape, np.int8)
    fit = bias_from_sums(bias_sums(dep, x, mask, bits, np.ones(x.shape, bool), surface), 10)
    assert fit["11um"]["a"] == pytest.approx(0.3, abs=0.02)
    assert fit["11um"]["b"] == pytest.approx(0.02, abs=0.001)
    assert fit["11um"]["surfaces"]["sea"]["a"] == fit["11um"]["a"] and set(fit["11um"]["surfaces"]) == {"sea"}


def test_each_surface_gets_its_own_bias_line():
    """Two surface types with different biases (common practice: land and sea backgrounds err
    differently): each gets its own line, the joint line lies between them, and removing the
    fit takes each pixel's own surface line."""
    from cloudsieve.screen import bias_field

    rng = np.random.default_rng(1)
    x = rng.uniform(10.0, 60.0, (50, 40))
    surface = np.where(np.arange(40) < 20, 0, 1)[None, :].repeat(50, 0).astype(np.int8)
    dep = {"11um": np.where(surface == 0, -0.2 + 0.01 * x, 0.8 - 0.02 * x) + rng.normal(0, 0.01, x.shape)}
    zeros = np.zeros(x.shape, np.int8)
    fit = bias_from_sums(bias_sums(dep, x, zeros, zeros.astype(np.uint16), np.ones(x.shape, bool), surface), 100)
    sea, land = fit["11um"]["surfaces"]["sea"], fit["11um"]["surfaces"]["land"]
    assert (sea["a"], sea["b"]) == (pytest.approx(-0.2, abs=0.02), pytest.approx(0.01, abs=0.001))
    assert (land["a"], land["b"]) == (pytest.approx(0.8, abs=0.02), pytest.approx(-0.02, abs=0.001))
    assert fit["11um"]["n"] == sea["n"] + land["n"] == x.size
    residual = dep["11um"] - bias_field(fit["11um"], surface, x)
    assert np.abs(residual).max() < 0.06


def test_bias_removal_centres_clear_departures(cfg):
    scene = load_scene(SAMPLES / "day_coast.nc", config=cfg)
    sim = simulate(scene, cfg)
    c = copy.deepcopy(cfg)
    c["bias"]["remove"] = True
    res = screen_scene(scene, sim, c)
    clear = res.mask == CLEAR
    assert all(b["applied"] for b in res.bias.values())
    assert abs(np.nanmean(res.departure["11um"][clear])) < 0.05


def test_user_clear_sky_replaces_simulation(tmp_path, cfg):
    df = pd.read_csv(SMALL)
    df["bt_clear_11um"] = df["bt_11um"] + 0.25
    path = tmp_path / "with_clear.csv"
    df.to_csv(path, index=False)
    scene = load_scene(path, config=cfg)
    sim = simulate(scene, cfg)
    raw = copy.deepcopy(cfg)
    raw["bias"]["remove"] = False  # the raw departures
    res = screen_scene(scene, sim, raw)
    assert sim.source["11um"] == "user" and sim.source["12um"] == "simulated"
    np.testing.assert_allclose(res.departure["11um"], -0.25, atol=1e-4)


def test_absent_channels_skip_tests_and_say_so(tmp_path, cfg):
    df = pd.read_csv(SMALL).drop(columns=["bt_3p9um", "bt_12um", "bt_8p6um"])
    path = tmp_path / "only11.csv"
    df.to_csv(path, index=False)
    scene = load_scene(path, config=cfg)
    res = screen_scene(scene, simulate(scene, cfg), cfg)
    assert set(res.skipped) == {"split_window_excess", "night_fog_contrast"}
    assert any("split_window_excess skipped" in n for n in res.notes)
    assert "cold_departure" in res.margins


def test_daylight_3p9_not_screened(tmp_path, cfg):
    df = pd.read_csv(SMALL)
    df.loc[df.index[: len(df) // 2], "sol_zenith"] = 40.0  # half the pixels by day
    path = tmp_path / "dawn.csv"
    df.to_csv(path, index=False)
    scene = load_scene(path, config=cfg)
    res = screen_scene(scene, simulate(scene, cfg), cfg)
    day = scene.data["sol_zenith"].values < 90
    assert np.all(np.isnan(res.margins["night_fog_contrast"][day]))
    assert np.all(res.bits[day] & BITS["daylight_3p9um_unused"])
    assert not np.any(res.bits[~day] & BITS["daylight_3p9um_unused"])
    assert any("reflected sunlight" in n for n in res.notes)


def test_clear_sky_sigma_grows_with_water_vapour_path(small, cfg):
    # common practice: the water-vapour error weighs more in a longer slant path, so the
    # σ of the 11 µm clear sky and of the split-window difference grow with it (all sea here)
    scene, sim = small
    x = sim.slant_path.ravel()
    for name in ("11um", "11um-12um"):
        assert np.corrcoef(sim.sigma[name].ravel(), x)[0, 1] > 0.8, name


def test_explicit_profiles_from_netcdf(tmp_path, cfg):
    """Explicit (y, x, level) profiles are used instead of the built ones: giving the very
    profiles the builder would make reproduces its clear-sky values; warming them changes them."""
    from physics.atmosphere import profile_from_surface

    scene = load_scene(SMALL, config=cfg)
    ds = scene.data.drop_vars("valid")
    prof = profile_from_surface(ds["t_air"].values, ds["tcwv"].values, ds["p_surf"].values, dtype=np.float32)
    for name, arr in zip(("pressure", "temperature", "q"), prof):
        ds[f"profile_{name}"] = (("y", "x", "level"), arr)
    path = tmp_path / "profiles.nc"
    ds.to_netcdf(path)
    with_prof = load_scene(path, config=cfg)
    a = simulate(scene, cfg).bt_clear
    b = simulate(with_prof, cfg).bt_clear
    np.testing.assert_allclose(a, b, atol=1e-3)
    ds["profile_temperature"] = ds["profile_temperature"] + 2.0
    ds.to_netcdf(tmp_path / "warm.nc")
    c = simulate(load_scene(tmp_path / "warm.nc", config=cfg), cfg).bt_clear
    assert np.all(c > b)


def test_lean_simulation_gives_the_same_cloud_layer(cfg):
    """Large scenes keep no level data; the inversion then simulates each block's columns
    again and must give the very same cloud layer."""
    scene = load_scene(SAMPLES / "polar_ice.nc", config=cfg)
    full_sim = simulate(scene, cfg)
    sigma = full_sim.sigma
    full = invert_all(scene, full_sim, cfg, sigma)
    lean_sim = simulate(scene, cfg, levels=False)
    assert lean_sim.level_pressure is None
    lean = invert_all(scene, lean_sim, cfg, sigma, column_simulator=ColumnSimulator(scene, cfg))
    for name in ("optical_depth", "top_pressure", "status", "emissivity", "optical_depth_sigma"):
        np.testing.assert_array_equal(getattr(full, name), getattr(lean, name), err_msg=name)


def test_inspector_curve_without_stored_levels(cfg):
    """A large-scene session (no stored levels) gives the inspector the same curve."""
    scene = load_scene(SAMPLES / "polar_ice.nc", config=cfg)
    full = Session(scene, cfg, journal=False)
    lean = Session(scene, cfg, journal=False, sim=simulate(scene, cfg, levels=False))
    a, b = full.optical_depth_curve(60, 70), lean.optical_depth_curve(60, 70)
    assert a["top_pressure"] == b["top_pressure"]
    np.testing.assert_array_equal(a["model"]["11um"], b["model"]["11um"])


def test_a_channel_defined_in_the_config_is_read_simulated_and_written(tmp_path):
    """DEVELOPERS.md 'Add a channel': a centre and width in [channels] are enough. A 10.4 µm
    window channel (961 cm⁻¹) gets a plausible clear-sky value (0–12 K below the skin, common
    practice for a window channel) and reaches the output; without the config it is refused."""
    import xarray as xr

    from cloudsieve import batch
    from cloudsieve.config import merge_config

    cfg = merge_config({"channels": {"10p4um": {"centre": 961.0, "width": 50.0}},
                        "surface": {"emissivity": {"sea": {"10p4um": 0.99}}}})
    df = pd.read_csv(SMALL)
    df["bt_10p4um"] = df["bt_11um"] + 0.3
    path = tmp_path / "with_10p4.csv"
    df.to_csv(path, index=False)
    scene = load_scene(path, config=cfg)
    assert "10p4um" in scene.channels
    sim = simulate(scene, cfg)
    bt = sim.bt_clear[sim.channels.index("10p4um")]
    diff = scene.data["t_skin"].values - bt
    assert np.all((diff > 0) & (diff < 12))
    batch.screen_file(path, tmp_path / "m.nc", cfg)
    with xr.open_dataset(tmp_path / "m.nc") as out:
        assert {"bt_clear_10p4um", "departure_10p4um"} <= set(out.data_vars)
    with pytest.raises(Exception, match="unknown channel '10p4um'"):
        load_scene(path, config=load_config())
