"""Scene loading and validation: every problem reported with a fix, missing values → no_data.

The good scene is the bundled invented CSV cutout; each bad case mutates a copy of it.
"""
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from cloudsieve.errors import SceneError
from cloudsieve.scene import check_scene, load_scene

SAMPLES = Path(__file__).resolve().parent.parent / "sample_scenes"
SMALL = SAMPLES / "night_front_small.csv"


@pytest.fixture
def table():
    return pd.read_csv(SMALL)


def write(tmp_path, df, name="scene.csv"):
    path = tmp_path / name
    if name.endswith(".parquet"):
        df.to_parquet(path)
    else:
        df.to_csv(path, index=False)
    return path


def report_text(path):
    scene = check_scene(path)
    return scene, scene.report.text()


def test_good_csv_loads_to_grid(table):
    scene = load_scene(SMALL)
    ny, nx = table["row"].nunique(), table["col"].nunique()
    assert scene.shape == (ny, nx)
    assert set(scene.channels) == {"3p9um", "8p6um", "11um", "12um"}
    assert scene.report.ok and scene.report.n_no_data == 0
    # the grid holds the table's values at their (row, col)
    r0, c0 = table["row"].min(), table["col"].min()
    first = table.iloc[17]
    got = scene.data["bt_11um"].values[int(first["row"] - r0), int(first["col"] - c0)]
    assert got == pytest.approx(first["bt_11um"])


def test_parquet_and_netcdf_read_the_same_fields(tmp_path, table):
    pq = write(tmp_path, table, "scene.parquet")
    a, b = load_scene(SMALL), load_scene(pq)
    np.testing.assert_allclose(a.data["bt_11um"].values, b.data["bt_11um"].values)
    ds = xr.open_dataset(SAMPLES / "night_front.nc")
    nc = load_scene(SAMPLES / "night_front.nc")
    assert nc.shape == (ds.sizes["y"], ds.sizes["x"])
    np.testing.assert_allclose(nc.data["bt_11um"].values, ds["bt_11um"].values)


def test_missing_values_become_no_data(tmp_path, table):
    table.loc[[0, 5], "bt_11um"] = np.nan
    table.loc[9, "tcwv"] = np.inf
    scene, text = report_text(write(tmp_path, table))
    assert scene.report.ok
    assert scene.report.n_no_data == 3
    assert "no_data" in text


def test_all_problems_listed_in_one_report(tmp_path, table):
    table = table.drop(columns=["tcwv"])
    table["bt_12um"] = table["bt_12um"] - 273.15  # °C
    table.loc[3, "sat_zenith"] = 95.0
    table = table.rename(columns={"bt_8p6um": "bt_10um"})
    scene, text = report_text(write(tmp_path, table))
    assert not scene.report.ok
    assert "tcwv" in text and "°C" in text and "273.15" in text
    assert "sat_zenith" in text and "0–80" in text
    assert "unknown channel '10um'" in text and "[channels]" in text
    assert len(scene.report.errors) >= 4
    with pytest.raises(SceneError) as err:
        load_scene(write(tmp_path, table))
    assert "tcwv" in str(err.value)


def test_non_numeric_cells_named_with_line(tmp_path, table):
    table["t_skin"] = table["t_skin"].astype(object)
    table.loc[4, "t_skin"] = "warm"
    scene, text = report_text(write(tmp_path, table))
    assert not scene.report.ok
    assert "'t_skin'" in text and "'warm'" in text and "line(s) 6" in text


def test_duplicate_and_ragged_grid(tmp_path, table):
    dup = pd.concat([table, table.iloc[[2]]])
    scene, text = report_text(write(tmp_path, dup, "dup.csv"))
    assert not scene.report.ok and "more than once" in text
    ragged = table.drop(index=[7, 8])
    scene, text = report_text(write(tmp_path, ragged, "ragged.csv"))
    assert scene.report.ok and "ragged" in text and scene.report.n_no_data == 2


@pytest.mark.parametrize(
    "content, expected",
    [
        (b"", "empty"),
        (b"row,col,bt_11um\n", "no pixel rows"),
        (b"row;col;bt_11um\n0;0;280\n", "semicolons"),
        (b"\x00\x01\x02\x03binary", "binary"),
        (b"row,col\n0,0,1,2,3\n1,1\n", "well-formed"),
    ],
)
def test_unreadable_files_give_clear_errors(tmp_path, content, expected):
    path = tmp_path / "bad.csv"
    path.write_bytes(content)
    with pytest.raises(SceneError) as err:
        check_scene(path)
    assert expected in str(err.value)


def test_unknown_extension_and_garbage_netcdf(tmp_path):
    p = tmp_path / "scene.xlsx"
    p.write_bytes(b"PK")
    with pytest.raises(SceneError, match="unknown scene format"):
        check_scene(p)
    p = tmp_path / "scene.nc"
    p.write_bytes(b"not a netcdf file at all")
    with pytest.raises(SceneError, match="not a readable NetCDF"):
        check_scene(p)


def test_netcdf_with_wrong_dimensions(tmp_path):
    ds = xr.Dataset({"bt_11um": (("time",), np.arange(5.0))})
    p = tmp_path / "scene.nc"
    ds.to_netcdf(p)
    with pytest.raises(SceneError, match=r"\(y, x\)"):
        check_scene(p)


def test_negative_water_vapour_and_percent_emissivity(tmp_path, table):
    table.loc[0, "tcwv"] = -5.0
    table["emis_11um"] = 99.0
    scene, text = report_text(write(tmp_path, table))
    assert "tcwv" in text and "negative" in text
    assert "emis_11um" in text and "fractions" in text


def test_surface_text_codes(tmp_path, table):
    table["surface"] = "land"
    table.loc[0, "surface"] = "lava"
    scene, text = report_text(write(tmp_path, table))
    assert "lava" in text and "sea, land or ice" in text
