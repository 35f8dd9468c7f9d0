"""Exports: CF-NetCDF checked by a CF checker from the registry, re-read round trips, CSV
content, atomic writes."""
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from cloudsieve import export
from cloudsieve.config import load_config
from cloudsieve.session import Session

SAMPLES = Path(__file__).resolve().parent.parent / "sample_scenes"


@pytest.fixture(scope="module")
def model():
    return Session.open(SAMPLES / "night_front_small.csv", load_config(), journal=False)


@pytest.fixture(scope="module")
def result(model):
    return model.result_dataset()


def _checker():
    exe = Path(sys.executable).with_name("compliance-checker")
    return str(exe) if exe.exists() else shutil.which("compliance-checker")


def test_netcdf_passes_cf_checker(tmp_path, result):
    """CF-1.10 conformance by the IOOS compliance-checker (registry package)."""
    path = export.write_result(result, tmp_path / "mask.nc", "netcdf")
    exe = _checker()
    assert exe, "compliance-checker must be installed (pip install compliance-checker)"
    out = subprocess.run([exe, "--test=cf:1.10", "--criteria=normal", "--format=json", "-o", "-", str(path)],
                         capture_output=True, text=True, timeout=300)
    report = json.loads(out.stdout)
    cf = next(iter(report.values()))
    high = [m for m in cf["high_priorities"] if m["value"][0] != m["value"][1]]
    medium = [m for m in cf["medium_priorities"] if m["value"][0] != m["value"][1]]
    assert not high and not medium, (high, medium)


def test_netcdf_round_trip(tmp_path, result):
    path = export.write_result(result, tmp_path / "mask.nc", "netcdf")
    back = xr.open_dataset(path)
    np.testing.assert_array_equal(back["mask"].values, result["mask"].values)
    np.testing.assert_array_equal(back["test_bits"].values, result["test_bits"].values)
    np.testing.assert_allclose(back["departure_11um"].values, result["departure_11um"].values, equal_nan=True)
    assert back["mask"].attrs["flag_meanings"] == "clear marginal cloud no_data"
    assert "cold_departure" in back["test_bits"].attrs["flag_meanings"]
    assert back["inversion_status"].attrs["flag_meanings"].split()[0] == "inverted"
    cfg = json.loads(back.attrs["cloudsieve_config"])
    assert cfg["cloud"]["top"] == "consistent"
    assert back.attrs["source"].startswith("cloudsieve")


def test_csv_columns_and_values(tmp_path, result):
    path = export.write_result(result, tmp_path / "mask.csv", "csv")
    df = pd.read_csv(path)
    for col in ("row", "col", "lat", "lon", "mask", "test_bits", "margin_cold_departure", "departure_11um",
                "bt_clear_11um", "cloud_optical_depth", "cloud_top_pressure", "inversion_status"):
        assert col in df.columns
    assert set(df["mask"]) <= {"clear", "marginal", "cloud", "no_data"}
    assert len(df) == result.sizes["y"] * result.sizes["x"]
    np.testing.assert_allclose(df["departure_11um"].to_numpy(), result["departure_11um"].values.ravel(), atol=1e-4)


def test_interrupted_write_leaves_old_file(tmp_path, result, monkeypatch):
    target = tmp_path / "mask.csv"
    target.write_text("old content\n")

    def boom(table, fh, header=True):
        fh.write(b"row,col\n0,")  # partial content, then the disk is full
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(export, "write_table_csv", boom)
    with pytest.raises(export.OutputError, match="No space left"):
        export.write_result(result, target, "csv")
    assert target.read_text() == "old content\n"
    assert [p.name for p in tmp_path.iterdir()] == ["mask.csv"]  # no temporary left behind


def test_missing_output_folder(tmp_path, result):
    with pytest.raises(export.OutputError, match="does not exist"):
        export.write_result(result, tmp_path / "nope" / "mask.nc", "netcdf")


def test_outputs_get_the_usual_file_mode_not_the_temporary_ones(tmp_path):
    # mkstemp makes private 0600 files; a result must be readable as any new file would be
    # (0666 less the umask, POSIX), and a replaced file keeps its mode
    import stat

    from cloudsieve.export import atomic_write

    old = os.umask(0o022)
    try:
        with atomic_write(tmp_path / "a.csv") as tmp:
            tmp.write_text("x\n")
        assert stat.S_IMODE((tmp_path / "a.csv").stat().st_mode) == 0o644
        (tmp_path / "a.csv").chmod(0o640)
        with atomic_write(tmp_path / "a.csv") as tmp:
            tmp.write_text("y\n")
        assert stat.S_IMODE((tmp_path / "a.csv").stat().st_mode) == 0o640
    finally:
        os.umask(old)


def test_the_writer_refuses_misaligned_or_missing_blocks(tmp_path, result):
    """NetCDF blocks start on chunk boundaries and every row is written once (else: a bug)."""
    layout = export.Layout(result.sizes["y"], result.sizes["x"], {k: result[k].variable for k in result.coords},
                           {k: (v.dtype, dict(v.attrs)) for k, v in result.data_vars.items()}, dict(result.attrs))
    variables = {k: v.values for k, v in result.data_vars.items()}
    with pytest.raises(ValueError, match="multiple of the NetCDF chunk"):
        export.encode_block(3, {k: v[3:10] for k, v in variables.items()}, layout, "netcdf", 8)
    for fmt, name in (("netcdf", "gap.nc"), ("csv", "gap.csv")):
        first = export.encode_block(0, {k: v[:8] for k, v in variables.items()}, layout, fmt, 8)
        with pytest.raises(ValueError, match="rows"):
            export.write_blocks(layout, [first], tmp_path / name, fmt, 8)
        assert not (tmp_path / name).exists()


def test_a_csv_result_has_its_key_and_settings_beside_it(tmp_path, result):
    """A CSV has no attributes: `<name>.key.md` beside it says what the codes mean (every class,
    bit, status and phase of the file) and holds the settings as TOML that --config reads back."""
    import tomllib

    from cloudsieve.codes import CLASS_NAMES
    from cloudsieve.config import merge_config
    from cloudsieve.registry import bit_table
    from physics.cloud import STATUS_NAMES

    path = export.write_result(result, tmp_path / "mask.csv", "csv")
    key = export.key_path(path).read_text()
    for code, name in enumerate(CLASS_NAMES):
        assert f"- {code}: {name}" in key
    for name, value in bit_table().items():
        assert f"- {value}: {name}" in key
    for code, name in enumerate(STATUS_NAMES):
        assert f"- {code}: {name}" in key
    toml_text = key.split("```toml\n", 1)[1].split("```", 1)[0]
    assert merge_config(tomllib.loads(toml_text)) == json.loads(result.attrs["cloudsieve_config"])
