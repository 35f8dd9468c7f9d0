"""Scenes under their own variable names: found by CF standard_name (looked up with cf_xarray)
or named in [input.names] / --rename; the screening of a renamed scene equals that of the same
scene under our names, and every naming problem is reported with its fix.

Source: the standard names used (surface_temperature, sensor_zenith_angle, surface_air_pressure
in Pa) are those of the CF standard name table; the reference result is the same scene screened
under our own names."""
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from cloudsieve import batch
from cloudsieve.config import add_renames, load_config, merge_config
from cloudsieve.errors import ConfigError
from cloudsieve.scene import check_scene, load_scene

SAMPLES = Path(__file__).resolve().parents[1] / "sample_scenes"
SMALL = SAMPLES / "night_front_small.csv"
EXE = Path(sys.executable).with_name("cloudsieve")


def _provider_file(tmp_path, name="provider.nc"):
    """night_front as a provider might write it: other names, CF standard names, pressure in Pa."""
    ds = xr.open_dataset(SAMPLES / "night_front.nc").load()
    ds = ds.rename({"t_skin": "skt", "sat_zenith": "vza", "p_surf": "sp", "bt_11um": "IR_108"})
    ds["skt"].attrs["standard_name"] = "surface_temperature"
    ds["vza"].attrs["standard_name"] = "sensor_zenith_angle"
    ds["sp"] = (ds["sp"] * 100.0).assign_attrs(standard_name="surface_air_pressure", units="Pa")
    path = tmp_path / name
    ds.to_netcdf(path)
    return path


def test_a_provider_file_screens_like_ours(tmp_path):
    """Standard names find t_skin, sat_zenith and p_surf (Pa → hPa); [input.names] gives the
    11 µm channel; the mask, bits and departures equal those of the sample scene itself."""
    path = _provider_file(tmp_path)
    cfg = merge_config({"input": {"names": {"bt_11um": "IR_108"}}})
    scene = load_scene(path, config=cfg)
    text = scene.report.text()
    for line in ("t_skin ← 'skt' (standard_name surface_temperature)", "sat_zenith ← 'vza'",
                 "p_surf ← 'sp'", "bt_11um ← 'IR_108' ([input.names])", "converted from Pa to hPa"):
        assert line in text, text
    np.testing.assert_allclose(scene.data["p_surf"].values,
                               xr.open_dataset(SAMPLES / "night_front.nc")["p_surf"].values, rtol=1e-12)
    batch.screen_file(path, tmp_path / "a.nc", cfg, use_edits=False)
    batch.screen_file(SAMPLES / "night_front.nc", tmp_path / "b.nc", load_config(), use_edits=False)
    with xr.open_dataset(tmp_path / "a.nc") as a, xr.open_dataset(tmp_path / "b.nc") as b:
        np.testing.assert_array_equal(a["mask"].values, b["mask"].values)
        np.testing.assert_array_equal(a["test_bits"].values, b["test_bits"].values)
        np.testing.assert_allclose(a["departure_11um"].values, b["departure_11um"].values, atol=1e-5)


def test_without_the_name_the_channel_is_missing_and_the_report_says_so(tmp_path):
    scene = check_scene(_provider_file(tmp_path), config=load_config())
    assert "11um" not in scene.channels
    bad = check_scene(_provider_file(tmp_path, "again.nc"), config=merge_config({"input": {"names": {"bt_11um": "IR_999"}}}))
    assert not bad.report.ok and "no variable 'IR_999'" in bad.report.text()


def test_two_variables_with_one_standard_name_are_not_guessed(tmp_path):
    ds = xr.open_dataset(SAMPLES / "night_front.nc").load().rename({"t_skin": "skt"})
    ds["skt"].attrs["standard_name"] = "surface_temperature"
    ds["lst2"] = ds["skt"] + 1.0
    ds["lst2"].attrs["standard_name"] = "surface_temperature"
    ds.to_netcdf(tmp_path / "two.nc")
    scene = check_scene(tmp_path / "two.nc", config=load_config())
    assert not scene.report.ok
    assert "several variables have standard_name surface_temperature" in scene.report.text()


def test_the_command_line_rename_reads_a_csv_under_other_names(tmp_path):
    df = pd.read_csv(SMALL).rename(columns={"t_skin": "skin_temp", "bt_12um": "ch12"})
    path = tmp_path / "theirs.csv"
    df.to_csv(path, index=False)
    out = subprocess.run([str(EXE), "screen", str(path), "--out", str(tmp_path / "a.csv"), "--rename",
                          "skin_temp=t_skin", "--rename", "ch12=bt_12um", "--quiet"], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    subprocess.run([str(EXE), "screen", str(SMALL), "--out", str(tmp_path / "b.csv"), "--quiet"], check=True)
    a, b = pd.read_csv(tmp_path / "a.csv"), pd.read_csv(tmp_path / "b.csv")
    assert (a["mask"] == b["mask"]).all()
    bad = subprocess.run([str(EXE), "check", str(path), "--rename", "skin_temp"], capture_output=True, text=True)
    assert bad.returncode == 2 and "THEIRS=OURS" in bad.stderr and "Traceback" not in bad.stderr


def test_naming_mistakes_in_the_configuration_are_reported():
    with pytest.raises(ConfigError, match="not a scene variable"):
        merge_config({"input": {"names": {"skin": "skt"}}})
    with pytest.raises(ConfigError, match="more than one variable"):
        merge_config({"input": {"names": {"t_skin": "x", "t_air": "x"}}})
    with pytest.raises(ConfigError, match="as text"):
        merge_config({"input": {"names": {"t_skin": 3}}})
    assert add_renames(load_config(), ["skt=t_skin"])["input"]["names"] == {"t_skin": "skt"}
