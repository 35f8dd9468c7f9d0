"""Solar and geostationary viewing geometry (physics/geometry.py) against outside references:
the Sun's position from astropy (its ephemeris and sidereal time, a different computation), and
the geostationary zenith against a vector computation in Earth-centred coordinates and the
horizon's textbook angle."""
import warnings

import numpy as np
import pytest

from physics.geometry import (EARTH_RADIUS_KM, GEOSTATIONARY_RADIUS_KM, geostationary_zenith, julian_date,
                              solar_zenith)


def test_julian_date_of_known_epochs():
    # J2000.0 and the Unix epoch (Astronomical Almanac: JD 2451545.0 and 2440587.5)
    assert julian_date(np.datetime64("2000-01-01T12:00:00")) == pytest.approx(2451545.0, abs=1e-9)
    assert julian_date(np.datetime64("1970-01-01T00:00:00")) == pytest.approx(2440587.5, abs=1e-9)


def test_solar_zenith_against_astropy():
    """A year of times and places (both hemispheres, both sides of the date line, day and night)
    within 0.02° of astropy's AltAz of get_sun (astropy uses its own ephemeris and Earth
    rotation; refraction off). The Almanac formulas claim ~0.01°."""
    from astropy import units as u
    from astropy.coordinates import AltAz, EarthLocation, get_sun
    from astropy.time import Time
    from astropy.utils import iers

    iers.conf.auto_download = False  # offline: the bundled Earth-orientation table
    iers.conf.iers_degraded_accuracy = "warn"
    rng = np.random.default_rng(7)
    n = 60
    secs = rng.uniform(0, 365 * 86400, n)
    times = np.datetime64("2026-01-01T00:00:00", "ns") + (secs * 1e9).astype("timedelta64[ns]")
    lat = rng.uniform(-75, 75, n)
    lon = rng.uniform(-180, 180, n)
    ours = solar_zenith(times, lat, lon)
    t = Time(times.astype("datetime64[ms]").astype(str).tolist(), scale="utc")
    with warnings.catch_warnings():  # the bundled table's "degraded accuracy" for future dates
        warnings.simplefilter("ignore")
        frame = AltAz(obstime=t, location=EarthLocation(lat=lat * u.deg, lon=lon * u.deg, height=0 * u.m),
                      pressure=0 * u.hPa)
        ref = 90.0 - get_sun(t).transform_to(frame).alt.deg
    np.testing.assert_allclose(ours, ref, atol=0.02)  # max seen 0.0104°
    assert (ours > 90).any() and (ours < 90).any()


def test_geostationary_zenith_against_a_vector_computation():
    """The angle between the local vertical and the line of sight to the satellite, from
    Earth-centred vectors (spherical Earth), and the horizon at γ = arccos(R/r) ≈ 81.3°."""
    rng = np.random.default_rng(3)
    lat, lon, sub = rng.uniform(-70, 70, 200), rng.uniform(-60, 60, 200), 10.0

    def ecef(la, lo, r):
        la, lo = np.deg2rad(la), np.deg2rad(lo)
        return r * np.stack([np.cos(la) * np.cos(lo), np.cos(la) * np.sin(lo), np.sin(la)], axis=-1)

    p = ecef(lat, lon, EARTH_RADIUS_KM)
    s = ecef(0.0, sub, GEOSTATIONARY_RADIUS_KM)
    los = s - p
    cos_t = np.sum(los * p, axis=-1) / (np.linalg.norm(los, axis=-1) * np.linalg.norm(p, axis=-1))
    want = np.where(cos_t > 0, np.rad2deg(np.arccos(cos_t)), np.nan)
    got = geostationary_zenith(lat, lon, sub)
    np.testing.assert_allclose(got, want, atol=1e-9, equal_nan=True)
    assert geostationary_zenith(0.0, sub, sub) == pytest.approx(0.0, abs=1e-9)
    horizon = np.rad2deg(np.arccos(EARTH_RADIUS_KM / GEOSTATIONARY_RADIUS_KM))
    assert horizon == pytest.approx(81.3, abs=0.1)  # textbook value (from memory)
    assert geostationary_zenith(0.0, sub + horizon - 0.01, sub) == pytest.approx(90.0, abs=0.1)
    assert np.isnan(geostationary_zenith(0.0, sub + horizon + 1.0, sub))


# ---------------------------------------------------------------------------------------
# a scene without sol_zenith but with a time: computed on reading, on both paths
# ---------------------------------------------------------------------------------------
SAMPLE = __import__("pathlib").Path(__file__).resolve().parents[1] / "sample_scenes" / "night_front.nc"


def _scene_without_sol_zenith(tmp_path, **attrs):
    import xarray as xr

    ds = xr.open_dataset(SAMPLE).load().drop_vars("sol_zenith")
    ds.attrs.update(attrs)
    path = tmp_path / "no_sun.nc"
    ds.to_netcdf(path)
    return path


def test_sol_zenith_is_computed_from_the_scene_time_on_both_paths(tmp_path):
    """At 10:00 UTC on 14 March the invented scene (33–39° N, 145–152° W) lies in the night (local
    time about 00:00): the computed angles are night, equal the physics function at the pixels'
    lat/lon, the same read whole or lazily, and the report says where they came from."""
    from cloudsieve.scene import load_scene

    path = _scene_without_sol_zenith(tmp_path, time_coverage_start="2026-03-14T10:00:00Z")
    whole = load_scene(path)
    lazy = load_scene(path, chunk_rows=37)
    sz = whole.data["sol_zenith"].values
    assert np.all(sz > 120)  # local midnight in March at 33–39° N: the Sun far below the horizon
    want = solar_zenith(np.datetime64("2026-03-14T10:00:00"), whole.data["lat"].values, whole.data["lon"].values)
    np.testing.assert_allclose(sz, want, rtol=0, atol=1e-9)
    np.testing.assert_array_equal(lazy.data["sol_zenith"].values, sz)
    assert "sol_zenith computed from the scene time 2026-03-14T10:00:00 UTC" in whole.report.text()
    # a scalar CF time variable works the same
    import xarray as xr

    ds = xr.open_dataset(path).load()
    ds.attrs.pop("time_coverage_start")
    ds["time"] = np.datetime64("2026-03-14T22:00:00", "ns")  # local 12:00: day
    ds.to_netcdf(tmp_path / "with_time.nc")
    assert np.all(load_scene(tmp_path / "with_time.nc").data["sol_zenith"].values < 90)


def test_a_bad_or_missing_time_leaves_sol_zenith_missing_and_says_why(tmp_path):
    from cloudsieve.scene import load_scene

    bad = load_scene(_scene_without_sol_zenith(tmp_path, time_coverage_start="the 14th of March"))
    assert np.isnan(bad.data["sol_zenith"].values).all()
    assert "is not an ISO 8601 time" in bad.report.text()
    none = load_scene(_scene_without_sol_zenith(tmp_path))
    assert np.isnan(none.data["sol_zenith"].values).all() and "computed" not in none.report.text()


def test_sat_zenith_is_computed_from_a_cf_geostationary_grid_mapping(tmp_path):
    """A scene without sat_zenith but with the CF grid mapping of a geostationary view (CF
    conventions appendix F attribute names) gets it from its lat/lon, equal to the physics
    function with the mapping's sub-point and orbit; the scalar mapping variable is not taken for
    a pixel variable; read whole and lazily alike."""
    import xarray as xr

    from cloudsieve.scene import load_scene

    ds = xr.open_dataset(SAMPLE).load().drop_vars("sat_zenith")
    ds["projection"] = xr.DataArray(0, attrs={"grid_mapping_name": "geostationary",
                                               "longitude_of_projection_origin": -137.0,
                                               "perspective_point_height": 35786023.0,
                                               "semi_major_axis": 6378137.0, "sweep_angle_axis": "x"})
    path = tmp_path / "geo.nc"
    ds.to_netcdf(path)
    whole, lazy = load_scene(path), load_scene(path, chunk_rows=64)
    got = whole.data["sat_zenith"].values
    want = geostationary_zenith(whole.data["lat"].values, whole.data["lon"].values, -137.0,
                                orbit_radius=(35786023.0 + 6378137.0) / 1000.0, earth_radius=6378.137)
    np.testing.assert_allclose(got, want, atol=1e-9)
    np.testing.assert_array_equal(lazy.data["sat_zenith"].values, got)
    assert 30 < np.nanmin(got) < np.nanmax(got) < 60  # 33–39° N, 8–15° of longitude from the sub-point
    assert "sat_zenith computed from the CF geostationary grid mapping" in whole.report.text()
    assert whole.report.ok
