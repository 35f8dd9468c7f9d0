"""Reference tests of physics.atmosphere: the 1976 standard, humidity, columns, profiles."""
import metpy.calc as mpcalc
import numpy as np
import pytest
import ussa1976
from metpy.units import units
from numpy.testing import assert_allclose

from physics import atmosphere as atm
from physics.constants import EPSILON, GRAVITY, R_DRY_AIR

#: Earth radius of the 1976 standard's geopotential-to-geometric conversion [m]
#: (U.S. Standard Atmosphere 1976, Eq. 18 with r₀ = 6356766 m)
R0_USSA = 6356766.0
#: Geopotential heights of the comparison, 0–80 km every 250 m' [m']
GEOPOTENTIAL_H = np.linspace(0.0, 80000.0, 321)


def _geometric(h):
    # U.S. Standard Atmosphere 1976, Eq. 18 inverted: z = r₀ H / (r₀ − H)
    return R0_USSA * h / (R0_USSA - h)


def _ussa1976(h):
    ds = ussa1976.compute(z=_geometric(h), variables=["t", "p"])
    return ds["t"].values, ds["p"].values / 100.0  # [K], [Pa] → [hPa]


# ---------------------------------------------------------------------------------------
# US Standard Atmosphere 1976
# ---------------------------------------------------------------------------------------
def test_us_standard_atmosphere_matches_ussa1976_package():
    # reference implementation: the `ussa1976` package (on geometric altitude, hence Eq. 18)
    t_ref, p_ref = _ussa1976(GEOPOTENTIAL_H)
    t, p = atm.us_standard_atmosphere(GEOPOTENTIAL_H)
    assert np.max(np.abs(t - t_ref)) <= 0.01
    assert np.max(np.abs(p / p_ref - 1.0)) <= 1e-4  # 0.01 %


def test_us_standard_temperature_at_pressure_matches_ussa1976_package():
    # reference implementation: `ussa1976`, queried at the pressures of its own altitude grid
    t_ref, p_ref = _ussa1976(GEOPOTENTIAL_H)
    assert np.max(np.abs(atm.us_standard_temperature_at_pressure(p_ref) - t_ref)) <= 0.01


@pytest.mark.parametrize(
    "height, temperature, pressure",
    [
        # from memory: the layer-base values of the U.S. Standard Atmosphere 1976 (Table 4 and
        # its pressure tables), heights geopotential
        (0.0, 288.15, 1013.25),
        (11000.0, 216.65, 226.32),
        (20000.0, 216.65, 54.75),
        (32000.0, 228.65, 8.680),
        (47000.0, 270.65, 1.1091),
    ],
)
def test_us_standard_atmosphere_handbook_values(height, temperature, pressure):
    t, p = atm.us_standard_atmosphere(height)
    assert float(t) == pytest.approx(temperature, abs=1e-9)
    assert float(p) == pytest.approx(pressure, rel=1e-4)  # the table's 4–5 significant digits


def test_us_standard_atmosphere_rejects_heights_outside_its_range():
    with pytest.raises(ValueError, match="0–84852"):
        atm.us_standard_atmosphere(90000.0)
    with pytest.raises(ValueError, match="hPa"):
        atm.us_standard_temperature_at_pressure(1.0e-4)


# ---------------------------------------------------------------------------------------
# Humidity
# ---------------------------------------------------------------------------------------
def test_saturation_vapour_pressure_agrees_with_metpy():
    # MetPy's saturation_vapor_pressure uses Ambaum (2020), Eq. 13 — a different formula from
    # Bolton (1980) Eq. 10; Bolton states 0.1 % against Wexler over −35..35 °C, and the two
    # formulations agree within 0.5 % there (the check is that we are the same physics).
    t = np.linspace(273.15 - 35.0, 273.15 + 35.0, 141)
    reference = mpcalc.saturation_vapor_pressure(t * units.K).m_as("hPa")
    assert_allclose(atm.saturation_vapour_pressure(t), reference, rtol=5e-3)


def test_saturation_vapour_pressure_bolton_anchor_values():
    # Bolton (1980), Eq. 10: e_s(0 °C) = 6.112 hPa exactly (the formula's constant)
    assert float(atm.saturation_vapour_pressure(273.15)) == pytest.approx(6.112, rel=1e-12)
    # from memory: e_s(20 °C) ≈ 23.37 hPa over water
    assert float(atm.saturation_vapour_pressure(293.15)) == pytest.approx(23.37, rel=2e-3)


def test_humidity_conversions_round_trip():
    # identities: each conversion inverts the other
    p = np.array([1013.25, 850.0, 500.0, 200.0])
    e = np.array([30.0, 10.0, 1.0, 0.01])
    q = atm.specific_humidity_from_vapour_pressure(e, p)
    assert_allclose(atm.vapour_pressure_from_specific_humidity(q, p), e, rtol=1e-14)
    t = np.array([240.0, 273.15, 300.0])
    assert_allclose(atm.dewpoint_from_vapour_pressure(atm.saturation_vapour_pressure(t)), t, rtol=1e-14)
    q_sat = atm.specific_humidity_from_vapour_pressure(atm.saturation_vapour_pressure(t), 900.0)
    assert_allclose(atm.relative_humidity(t, q_sat, 900.0), 1.0, rtol=1e-14)


def test_humidity_conversions_agree_with_metpy():
    # MetPy as reference library; its ε = 0.621957 (molar mass of dry air 28.96546 g mol⁻¹)
    # differs from ours (28.9644, the 1976 standard) by 3.4e-5 relative, hence rtol 1e-4
    p = np.array([1013.25, 850.0, 500.0])
    e = np.array([30.0, 10.0, 1.0])
    w_ref = mpcalc.mixing_ratio(e * units.hPa, p * units.hPa).m_as("")
    q_ref = mpcalc.specific_humidity_from_mixing_ratio(w_ref * units("")).m_as("")
    q = atm.specific_humidity_from_vapour_pressure(e, p)
    assert_allclose(q, q_ref, rtol=1e-4)
    assert_allclose(atm.mixing_ratio_from_specific_humidity(q),
                    mpcalc.mixing_ratio_from_specific_humidity(q * units("")).m_as(""), rtol=1e-14)
    # MetPy's dewpoint inverts Bolton (1980) Eq. 10, as ours does
    assert_allclose(atm.dewpoint_from_vapour_pressure(e), mpcalc.dewpoint(e * units.hPa).m_as("K"), rtol=1e-12)


# ---------------------------------------------------------------------------------------
# Column water vapour and heights
# ---------------------------------------------------------------------------------------
def _dewpoint_for_metpy(vapour_pressure):
    """Dew points whose MetPy (Ambaum 2020) saturation pressure is exactly ``vapour_pressure``.

    Newton's method on ln e_s with the Clausius–Clapeyron slope L/(R_v T²) (L = 2.501e6 J kg⁻¹,
    R_v = 461.5 J kg⁻¹ K⁻¹, from memory); the slope only steers the iteration, the result is
    MetPy's own inverse to ~1e-9 relative.
    """
    td = atm.dewpoint_from_vapour_pressure(vapour_pressure)
    for _ in range(8):
        es = mpcalc.saturation_vapor_pressure(td * units.K).m_as("hPa")
        td = td - np.log(es / vapour_pressure) * 461.5 * td**2 / 2.501e6
    return td


@pytest.mark.parametrize("t_air, tcwv", [(260.0, 2.0), (283.0, 20.0), (300.0, 55.0)])
def test_column_water_vapour_matches_metpy_precipitable_water(t_air, tcwv):
    prof = atm.profile_from_surface(t_air, tcwv)
    p, q = prof.pressure, prof.specific_humidity
    e = atm.vapour_pressure_from_specific_humidity(q, p)
    td = _dewpoint_for_metpy(e)
    assert_allclose(mpcalc.saturation_vapor_pressure(td * units.K).m_as("hPa"), e, rtol=1e-7)
    pw = mpcalc.precipitable_water(p * units.hPa, td * units.K).m_as("mm")
    # MetPy integrates the mixing ratio r (help(): −1/(ρ_l g) ∫ r dp, Salby 1996 p. 28) with the
    # trapezoid rule; the same integral of r with our function agrees to MetPy's constants
    # (ε, and ρ_l = 999.975 kg m⁻³ turning kg m⁻² into mm) — 1e-4 relative.
    r = atm.mixing_ratio_from_specific_humidity(q)
    assert pw == pytest.approx(float(atm.column_water_vapour(p, r)), rel=1e-4)
    # Our column integrates q (the mass of vapour per unit area, common practice); r = q/(1 − q)
    # exceeds q by about q, so MetPy's figure is larger by the column of r − q: ≈ 1.2 % for a
    # tropical column, less when drier. Explained exactly:
    ours = float(atm.column_water_vapour(p, q))
    assert ours + float(atm.column_water_vapour(p, r - q)) == pytest.approx(pw, rel=1e-4)
    assert 0.0 <= pw / ours - 1.0 <= 0.015


def test_column_water_vapour_of_uniform_humidity_is_q_dp_over_g():
    # hydrostatic identity: W = q (p_s − p_t) / g for constant q (common practice)
    p = np.linspace(1000.0, 100.0, 19)
    assert float(atm.column_water_vapour(p, np.full_like(p, 0.01))) == pytest.approx(
        0.01 * 900.0e2 / GRAVITY, rel=1e-14
    )


def test_geopotential_height_matches_metpy_thickness():
    # MetPy thickness_hydrostatic (Wallace & Hobbs Eq. 3.24, trapezoid in ln p, virtual T);
    # R_d differs by 3.8e-5 (MetPy's molar mass of dry air 28.96546 vs our 28.9644), hence 1e-4
    prof = atm.profile_from_surface(295.0, 40.0)
    p, t, q = prof
    w = atm.mixing_ratio_from_specific_humidity(q)
    dry = mpcalc.thickness_hydrostatic(p * units.hPa, t * units.K).m_as("m")
    moist = mpcalc.thickness_hydrostatic(p * units.hPa, t * units.K, mixing_ratio=w * units("")).m_as("m")
    z_dry = atm.geopotential_height(p, t)
    z_moist = atm.geopotential_height(p, t, q)
    assert z_dry[-1] - z_dry[0] == pytest.approx(dry, rel=1e-4)
    assert z_moist[-1] - z_moist[0] == pytest.approx(moist, rel=1e-4)
    # the virtual-temperature correction of a moist tropical column is tens of metres
    assert moist - dry > 10.0


def test_geopotential_height_of_standard_atmosphere():
    # U.S. Standard Atmosphere 1976: the hypsometric heights of its own (p, T) are its heights.
    # Within a few metres: the standard's R* = 8.31432 J mol⁻¹ K⁻¹ differs from CODATA's R by
    # 1.7e-5 (1.4 m at 80 km), and the level-mean temperature of the hypsometric equation
    # overestimates a layer by (r − 1)²/12 relative, r = T₁/T₂ ≤ 1.015 on this 500 m grid.
    h = np.linspace(0.0, 80000.0, 161)
    t, p = atm.us_standard_atmosphere(h)
    z = atm.geopotential_height(p, t, surface_height=0.0)
    assert np.max(np.abs(z - h)) <= 3.0
    assert np.max(np.abs(z - h) / np.maximum(h, 1.0)) <= 1.72e-5 + 0.015**2 / 12


def test_geopotential_height_broadcasts_over_pixels():
    # convention (STYLE.md §5): leading axes broadcast, level axis last
    prof = atm.profile_from_surface(np.array([[270.0, 290.0], [300.0, 250.0]]), 5.0)
    z = atm.geopotential_height(prof.pressure, prof.temperature, surface_height=100.0)
    assert z.shape == prof.pressure.shape
    assert_allclose(z[1, 0], atm.geopotential_height(prof.pressure[1, 0], prof.temperature[1, 0]) + 100.0)


# ---------------------------------------------------------------------------------------
# Profiles from surface numbers
# ---------------------------------------------------------------------------------------
# (t_air [K], tcwv [kg m⁻²]) well inside the saturated column of each t_air
UNSATURATED = [(250.0, 0.8), (260.0, 2.5), (275.0, 8.0), (288.0, 20.0), (300.0, 50.0)]


@pytest.mark.parametrize("t_air, tcwv", UNSATURATED)
def test_profile_column_equals_requested_tcwv(t_air, tcwv):
    # documented contract of profile_from_surface: the column holds tcwv unless saturation
    # limits it; 0.1 % allows for the stratospheric floor of q
    prof = atm.profile_from_surface(t_air, tcwv)
    assert float(atm.column_water_vapour(prof.pressure, prof.specific_humidity)) == pytest.approx(tcwv, rel=1e-3)
    assert np.all(atm.relative_humidity(*prof[1:], prof.pressure) <= 1.0 + 1e-12)  # capped at saturation


def test_profile_column_falls_short_only_when_saturated():
    # documented contract: a column the air cannot hold is saturated in the troposphere
    prof = atm.profile_from_surface(250.0, 5.0)
    column = float(atm.column_water_vapour(prof.pressure, prof.specific_humidity))
    assert column < 5.0
    rh = atm.relative_humidity(prof.temperature, prof.specific_humidity, prof.pressure)
    assert rh[0] == pytest.approx(1.0, rel=1e-12)


@pytest.mark.parametrize("t_air", [250.0, 288.15, 305.0])
def test_profile_lapse_rate_and_tropopause(t_air):
    prof = atm.profile_from_surface(t_air, 1.0)
    p, t = prof.pressure, prof.temperature
    # surface first, strictly decreasing, from the surface pressure to the model top
    assert p[0] == pytest.approx(1013.25) and p[-1] == pytest.approx(atm.DEFAULT_TOP_PRESSURE)
    assert np.all(np.diff(p) < 0)
    assert t[0] == pytest.approx(t_air, rel=1e-14)
    # 6.5 K km⁻¹ in geopotential height (US Standard Atmosphere 1976, Table 4) up to the
    # tropopause, checked with the hypsometric heights of the profile itself. The level-mean
    # temperature of the hypsometric equation overestimates a layer's thickness by
    # (r − 1)²/12 relative, r = T₁/T₂ < 1.04 between these levels: below 1.5e-4.
    z = atm.geopotential_height(p, t)
    trop = atm.DEFAULT_TROPOPAUSE_T
    troposphere = (t[:-1] > trop) & (t[1:] > trop)
    lapse = -np.diff(t) / np.diff(z)
    assert troposphere.sum() >= 3
    assert_allclose(lapse[troposphere], 0.0065, rtol=1.5e-4)
    # isothermal at 210 K above (documented assumption, from memory)
    assert_allclose(t[t <= trop + 1e-9], 210.0, rtol=1e-14)
    assert np.all(t >= trop)


def test_profile_levels_first_is_profile_from_surface_transposed():
    t_air = np.array([250.0, 270.0, 290.0, 300.0])
    tcwv = np.array([0.8, 5.0, 25.0, 55.0])
    ps = np.array([1013.25, 1000.0, 990.0, 1020.0])
    prof = atm.profile_from_surface(t_air, tcwv, ps)
    first = atm.profile_levels_first(t_air, tcwv, ps)
    for a, b in zip(prof, first):
        assert b.shape == (atm.DEFAULT_LEVELS, 4)
        assert_allclose(a, b.T, rtol=1e-15)


def test_profile_from_surface_broadcasts_and_keeps_float32():
    prof = atm.profile_from_surface(np.full((2, 3), 290.0), np.array([10.0, 20.0, 30.0]), dtype=np.float32)
    assert prof.pressure.shape == (2, 3, atm.DEFAULT_LEVELS)
    assert all(a.dtype == np.float32 for a in prof)
    ref = atm.profile_from_surface(290.0, 20.0)
    # float32 rounding of a float64 profile (≈ 1e-7 relative; humidity through exp, 1e-5)
    assert_allclose(prof.temperature[1, 1], ref.temperature, rtol=1e-6)
    assert_allclose(prof.specific_humidity[1, 1], ref.specific_humidity, rtol=1e-5)


def test_profile_temperature_follows_dry_adiabat_form_in_pressure():
    # Wallace & Hobbs (2006) Sec. 3.2: constant lapse Γ ⇔ T = T_s (p/p_s)^(R_d Γ/g)
    prof = atm.profile_from_surface(300.0, 10.0)
    p, t = prof.pressure, prof.temperature
    expected = 300.0 * (p / p[0]) ** (R_DRY_AIR * 0.0065 / GRAVITY)
    trop = t > atm.DEFAULT_TROPOPAUSE_T
    assert_allclose(t[trop], expected[trop], rtol=1e-13)


def test_vapour_pressure_uses_our_epsilon():
    # definition: q = ε e / (p − (1 − ε) e) with ε = M_w / M_d (constants module)
    assert float(atm.specific_humidity_from_vapour_pressure(10.0, 1000.0)) == pytest.approx(
        EPSILON * 10.0 / (1000.0 - (1.0 - EPSILON) * 10.0), rel=1e-15
    )
