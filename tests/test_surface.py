"""Sea-surface emissivity against view angle: Fresnel reflection of a smooth absorbing surface.

Checks against textbook optics (Born & Wolf, Principles of Optics, §1.5 and §14.2: the normal-
incidence reflectance and Brewster's angle) and, for water, against the size of the effect
quoted for smooth seas (from memory; see each test).
"""
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from cloudsieve.config import load_config, merge_config
from cloudsieve.scene import load_scene
from cloudsieve.simulate import simulate
from physics.surface import emissivity_angle_factor, fresnel_emissivity, fresnel_reflectance

SMALL = Path(__file__).resolve().parent.parent / "sample_scenes" / "night_front_small.csv"


@pytest.mark.parametrize("n, k", [(1.5, 0.0), (1.153, 0.0968), (1.111, 0.199), (2.4, 0.7)])
def test_normal_incidence_reflectance(n, k):
    # Born & Wolf §14.2: at normal incidence R = ((n − 1)² + k²) / ((n + 1)² + k²), both polarisations
    r_s, r_p = fresnel_reflectance(n, k, 0.0)
    expected = ((n - 1) ** 2 + k**2) / ((n + 1) ** 2 + k**2)
    assert r_s == pytest.approx(expected, rel=1e-12) and r_p == pytest.approx(expected, rel=1e-12)


def test_brewster_angle_of_glass():
    # Born & Wolf §1.5: for a non-absorbing medium R_p vanishes at tan θ_B = n, where
    # R_s = sin²(θ_i − θ_t) / sin²(θ_i + θ_t) with Snell's law sin θ_t = sin θ_i / n
    n = 1.5
    theta_b = np.degrees(np.arctan(n))
    r_s, r_p = fresnel_reflectance(n, 0.0, theta_b)
    assert r_p == pytest.approx(0.0, abs=1e-14)
    ti, tt = np.radians(theta_b), np.arcsin(np.sin(np.radians(theta_b)) / n)
    assert r_s == pytest.approx(np.sin(ti - tt) ** 2 / np.sin(ti + tt) ** 2, rel=1e-12)


def test_water_at_11um_emits_less_at_large_view_angles():
    """Water at 11 µm (Hale & Querry 1973 index, from memory, as in the configuration): nadir
    emissivity ≈ 0.99 (the configuration's sea value), falling monotonically with angle by
    2–3.5 % at 60° (the size quoted for smooth seas, e.g. the issue's Δε ≈ 0.025; from memory)."""
    cfg = load_config()["surface"]["sea_view_angle"]
    n, k = np.interp(11.0, cfg["wavelength"], cfg["n"]), np.interp(11.0, cfg["wavelength"], cfg["k"])
    angles = np.arange(0.0, 81.0, 5.0)
    eps = fresnel_emissivity(n, k, angles)
    assert eps[0] == pytest.approx(0.990, abs=0.005)
    assert np.all(np.diff(eps) < 0)
    assert 0.020 <= eps[0] - fresnel_emissivity(n, k, 60.0) <= 0.035
    assert emissivity_angle_factor(n, k, 0.0) == 1.0


def test_the_fresnel_model_cools_the_clear_sky_at_large_angles_only(tmp_path):
    """With [surface.sea_view_angle] model = "fresnel", sea pixels' clear-sky 11 µm brightness
    temperature is unchanged at nadir and colder at 60°, by less than the bound of a transparent
    atmosphere over a cold sky, Δε · B(T)/B'(T) ≈ 0.025 × 64 K ≈ 1.6 K (Planck), and the less
    the moister the column (the sky radiance the surface reflects makes up more of the lost
    emission, and the atmosphere hides more of the surface); a scene's own emissivity is used
    as given."""
    df = pd.read_csv(SMALL)
    df["surface"] = "sea"
    df["sat_zenith"] = np.where(df["col"] % 2 == 0, 0.0, 60.0)
    path = tmp_path / "angles.csv"
    df.to_csv(path, index=False)
    fixed_cfg = merge_config({"surface": {"sea_view_angle": {"model": "fixed"}}})
    fresnel_cfg = load_config()  # the default
    scene = load_scene(path, config=fixed_cfg)
    i = scene.channels.index("11um")
    diff = simulate(scene, fixed_cfg).bt_clear[i] - simulate(scene, fresnel_cfg).bt_clear[i]
    nadir = scene.data["sat_zenith"].values == 0.0
    assert np.nanmax(np.abs(diff[nadir])) < 1e-3
    assert np.all(diff[~nadir] > 0.05) and np.all(diff[~nadir] < 1.6)
    assert np.corrcoef(diff[~nadir], scene.data["tcwv"].values[~nadir])[0, 1] < -0.5
    df["emis_11um"] = 0.99
    df.to_csv(path, index=False)
    given = load_scene(path, config=fixed_cfg)
    same = simulate(given, fixed_cfg).bt_clear[i] - simulate(given, fresnel_cfg).bt_clear[i]
    assert np.nanmax(np.abs(same)) < 1e-3
