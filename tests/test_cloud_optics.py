"""Absorption ratios β = τ_ch/τ_11 of the configured cloud optics against Mie theory.

Water: Mie absorption efficiencies (miepython, a general-purpose Mie library) of a gamma size
distribution of droplets, effective radius 10 µm and effective variance 0.1 (common practice
for water clouds), with the refractive index of liquid water from Hale & Querry (1973, Appl.
Opt. 12, 555; values from memory). The configuration's water β must agree within 5 %.
Ice: no sphere check (ice crystals are not spheres); the configured ratios must lie in the
ranges published for ice clouds of a few tens of µm (1.05–1.3 at 12 µm, 0.8–1.0 at 8.6 µm;
from memory, e.g. Parol et al. 1991).
"""
import miepython
import numpy as np
import pytest

from cloudsieve.config import load_config
from cloudsieve.invert import phase_beta

#: wavelength [µm] -> complex refractive index of liquid water (Hale & Querry 1973, from memory;
#: 8.6 µm interpolated between their 8 and 9 µm values)
WATER_INDEX = {"8p6um": (8.6, 1.274 - 0.0377j), "11um": (11.0, 1.153 - 0.0968j), "12um": (12.0, 1.111 - 0.199j)}


def _absorption_efficiency(wavelength, m, r_eff=10.0, v_eff=0.1):
    r = np.linspace(0.25, 80.0, 1600)
    n = r ** ((1 - 3 * v_eff) / v_eff) * np.exp(-r / (r_eff * v_eff))  # gamma distribution (Hansen 1971)
    x = 2 * np.pi * r / wavelength
    qext, qsca, _, _ = miepython.efficiencies_mx(m, x)
    area = n * np.pi * r**2
    return np.sum(area * (qext - qsca)) / np.sum(area)


def test_water_beta_against_mie():
    cfg = load_config()
    chans = ("8p6um", "11um", "12um")
    beta = dict(zip(chans, phase_beta("water", chans, cfg)))
    q = {c: _absorption_efficiency(*WATER_INDEX[c]) for c in chans}
    for c in ("8p6um", "12um"):
        mie = q[c] / q["11um"]
        assert beta[c] == pytest.approx(mie, rel=0.05), (c, beta[c], mie)


def test_ice_beta_in_the_published_range():
    cfg = load_config()
    chans = ("8p6um", "11um", "12um")
    beta = dict(zip(chans, phase_beta("ice", chans, cfg)))
    assert 1.05 <= beta["12um"] <= 1.3
    assert 0.8 <= beta["8p6um"] <= 1.0
    assert beta["11um"] == 1.0
