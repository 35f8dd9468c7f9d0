"""Bad inputs: each gets the documented exit code and a message naming the problem and the
fix — never a traceback — and no output file is created or overwritten.

The README's "Bad inputs" table lists these cases; keep the two in step.
"""
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from cloudsieve.cli import main

SAMPLES = Path(__file__).resolve().parent.parent / "sample_scenes"
SMALL = SAMPLES / "night_front_small.csv"
EXE = Path(sys.executable).with_name("cloudsieve")


def _table():
    return pd.read_csv(SMALL)


def _csv(df):
    return lambda p: df.to_csv(p, index=False)


def _mutate(fn):
    def make(path):
        df = _table()
        out = fn(df)
        (df if out is None else out).to_csv(path, index=False)
    return make


def _parquet(fn):
    def make(path):
        df = _table()
        out = fn(df)
        (df if out is None else out).to_parquet(path, index=False)
    return make


def _half_celsius(d):
    d.loc[d.index[: len(d) * 3 // 5], "bt_11um"] -= 273.15  # part of a column in °C: median and mean disagree


def _bytes(data):
    return lambda p: p.write_bytes(data)


def _nc_wrong_dims(path):
    xr.Dataset({"bt_11um": (("time",), np.arange(4.0))}).to_netcdf(path)


def _nc_truncated(path):
    data = (SAMPLES / "polar_ice.nc").read_bytes()
    path.write_bytes(data[: len(data) // 3])


def _parquet_corrupt(path):
    data = (SAMPLES / "day_coast.parquet").read_bytes()
    path.write_bytes(data[:1000] + b"\x00" * 1000)


def _dup_header(path):
    text = SMALL.read_text().splitlines()
    text[0] = text[0].replace("t_air", "t_skin")
    path.write_text("\n".join(text) + "\n")


# (id, file name, maker, exit code, words the message must contain)
CASES = [
    ("empty file", "s.csv", _bytes(b""), 2, ["empty"]),
    ("header only", "s.csv", _bytes(b"row,col,bt_11um,t_skin,t_air,tcwv,sat_zenith\n"), 2, ["no pixel rows"]),
    ("semicolon delimiter", "s.csv", _bytes(b"row;col;bt_11um\n0;0;280\n"), 2, ["semicolons", "commas"]),
    ("tab delimiter", "s.csv", _bytes(b"row\tcol\tbt_11um\n0\t0\t280\n"), 2, ["tabs", "commas"]),
    ("binary garbage", "s.csv", _bytes(bytes(range(256)) * 4), 2, ["binary", "CSV"]),
    ("not UTF-8 text", "s.csv", _bytes("row,col\n0,0é".encode("latin-1") + b"\xff\xfe"), 2, ["UTF-8"]),
    ("ragged CSV line", "s.csv", _bytes(b"row,col,bt_11um\n0,0,280,1,2\n"), 2, ["well-formed", "same number"]),
    ("unknown extension", "s.xlsx", _bytes(b"PK\x03\x04"), 2, ["unknown scene format", ".csv"]),
    ("NetCDF garbage", "s.nc", _bytes(b"this is not netcdf"), 2, ["not a readable NetCDF"]),
    ("NetCDF truncated", "s.nc", _nc_truncated, 2, ["not a readable NetCDF"]),
    ("NetCDF wrong dimensions", "s.nc", _nc_wrong_dims, 2, ["(y, x)"]),
    ("Parquet corrupt", "s.parquet", _parquet_corrupt, 2, ["not a readable Parquet"]),
    ("missing required column", "s.csv", _mutate(lambda d: d.drop(columns=["tcwv"])), 2,
     ["tcwv", "missing"]),
    ("required column under another name", "s.csv", _mutate(lambda d: d.rename(columns={"sat_zenith": "satzen"})),
     2, ["sat_zenith", "rename 'satzen' to 'sat_zenith'"]),
    ("no brightness temperature", "s.csv",
     _mutate(lambda d: d.drop(columns=[c for c in d.columns if c.startswith("bt_")])), 2,
     ["bt_<channel>"]),
    ("non-numeric cell", "s.csv", _mutate(lambda d: d.__setitem__("tcwv", d["tcwv"].astype(object).where(d.index != 3, "wet"))), 2,
     ["non-numeric", "'wet'", "line"]),
    ("brightness temperatures in °C", "s.csv", _mutate(lambda d: d.__setitem__("bt_11um", d["bt_11um"] - 273.15)), 2,
     ["°C", "273.15"]),
    ("air temperature in °C", "s.csv", _mutate(lambda d: d.__setitem__("t_air", d["t_air"] - 273.15)), 2,
     ["t_air", "°C"]),
    ("negative water vapour", "s.csv", _mutate(lambda d: d.__setitem__("tcwv", -d["tcwv"])), 2,
     ["tcwv", "negative"]),
    ("zenith angle over 90°", "s.csv", _mutate(lambda d: d.__setitem__("sat_zenith", d["sat_zenith"] + 70)), 2,
     ["sat_zenith", "0–80"]),
    ("surface pressure in Pa", "s.csv", _mutate(lambda d: d.__setitem__("p_surf", d["p_surf"] * 100)), 2,
     ["p_surf", "hPa"]),
    ("emissivity in percent", "s.csv", _mutate(lambda d: d.__setitem__("emis_11um", 98.0)), 2,
     ["emis_11um", "fractions"]),
    ("unknown surface type", "s.csv", _mutate(lambda d: d.__setitem__("surface", "swamp")), 2,
     ["swamp", "sea, land or ice"]),
    ("unknown channel", "s.csv", _mutate(lambda d: d.rename(columns={"bt_8p6um": "bt_10um"})), 2,
     ["unknown channel '10um'", "[channels]"]),
    ("duplicate grid position", "s.csv", lambda p: pd.concat([_table(), _table().iloc[:1]]).to_csv(p, index=False), 2,
     ["more than once"]),
    ("negative grid index", "s.csv", _mutate(lambda d: d.__setitem__("row", d["row"] - 5)), 2, ["whole numbers ≥ 0"]),
    ("fractional grid index", "s.csv", _mutate(lambda d: d.__setitem__("col", d["col"] + 0.5)), 2, ["whole numbers"]),
    ("duplicate column names", "s.csv", _dup_header, 2, ["more than once"]),
    ("channel column all empty", "s.csv", _mutate(lambda d: d.__setitem__("bt_12um", np.nan)), 2,
     ["bt_12um", "no valid values"]),
    ("Parquet unknown surface type", "s.parquet", _parquet(lambda d: d.__setitem__("surface", "desert")), 2,
     ["desert", "sea, land or ice"]),
    ("part of a channel in °C", "s.csv", _mutate(_half_celsius), 2, ["bt_11um", "°C"]),
    ("Parquet part of a channel in °C", "s.parquet", _parquet(_half_celsius), 2, ["bt_11um", "°C"]),
    ("missing scene file", "absent.csv", None, 2, ["does not exist"]),
    ("scene path is a folder", "folder.csv", lambda p: p.mkdir(), 2, ["folder"]),
]


def _run(args, capsys):
    """The CLI's own entry point, in process (it catches every error as the console script does)."""
    code = main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out, out.err


@pytest.mark.parametrize("case", CASES, ids=[c[0] for c in CASES])
def test_bad_scene(tmp_path, case, capsys):
    _, name, make, code, words = case
    scene = tmp_path / name
    if make is not None:
        make(scene)
    out = tmp_path / "mask.nc"
    out.write_bytes(b"previous result")
    got, stdout, stderr = _run(["screen", scene, "--out", out], capsys)
    assert got == code, stderr
    for w in words:
        assert w in stderr, (w, stderr)
    assert out.read_bytes() == b"previous result"  # nothing overwritten
    assert sorted(p.name for p in tmp_path.iterdir() if p.name.startswith(".")) == []  # no temporaries left
    # the lazy path (blocks of 8 rows) reads and checks with the same code: same exit, same words
    lazy = _run(["screen", scene, "--out", out, "--chunks", "8"], capsys)
    assert lazy == (got, stdout, stderr)
    assert out.read_bytes() == b"previous result"
    got, stdout, stderr = _run(["check", scene], capsys)
    assert got == code
    assert any(w in stdout + stderr for w in words)


@pytest.mark.parametrize("case", [CASES[0], CASES[9], CASES[15]], ids=[CASES[i][0] for i in (0, 9, 15)])
def test_bad_scene_console_script(tmp_path, case):
    """The installed console script itself: exit code, message, no traceback."""
    _, name, make, code, words = case
    scene = tmp_path / name
    make(scene)
    proc = subprocess.run([str(EXE), "screen", str(scene), "--out", str(tmp_path / "m.nc")], capture_output=True,
                          text=True, timeout=300)
    assert proc.returncode == code
    assert "Traceback" not in proc.stderr + proc.stdout
    assert all(w in proc.stderr for w in words)
    assert not (tmp_path / "m.nc").exists()


def test_nan_and_inf_cells_become_no_data(tmp_path, capsys):
    df = _table()
    df.loc[:4, "bt_11um"] = np.nan
    df.loc[5:9, "tcwv"] = np.inf
    scene = tmp_path / "holes.csv"
    df.to_csv(scene, index=False)
    code, _, err = _run(["screen", scene, "--out", tmp_path / "m.csv", "--quiet"], capsys)
    assert code == 0, err
    res = pd.read_csv(tmp_path / "m.csv")
    assert (res["mask"] == "no_data").sum() == 10


CONFIG_CASES = [
    ("config with wrong type", "[tests.texture]\nwindow = \"big\"\n", ["tests.texture.window", "must be"]),
    ("config with unknown key", "[tests.texture]\ntreshold = 1.0\n", ["unknown key", "treshold", "Did you mean 'tests.texture.threshold'"]),
    ("config unknown table", "[screning]\nmarginal_fraction = 0.2\n", ["unknown key 'screning'"]),
    ("config not TOML", "this is = = not toml", ["not valid TOML"]),
    ("config impossible value", "[cloud]\ntop = \"sideways\"\n", ["cloud.top", "fixed, opaque, grey"]),
    ("config missing file", None, ["does not exist"]),
]


@pytest.mark.parametrize("case", CONFIG_CASES, ids=[c[0] for c in CONFIG_CASES])
def test_bad_config(tmp_path, case, capsys):
    _, text, words = case
    cfg = tmp_path / "my.toml"
    if text is not None:
        cfg.write_text(text)
    out = tmp_path / "mask.nc"
    code, _, err = _run(["screen", SMALL, "--out", out, "--config", cfg], capsys)
    assert code == 2
    for w in words:
        assert w in err, (w, err)
    assert not out.exists()


def test_unwritable_output(tmp_path, capsys):
    code, _, err = _run(["screen", SMALL, "--out", tmp_path / "missing" / "m.nc"], capsys)
    assert code == 3 and "does not exist" in err


UPLOADABLE = [c for c in CASES if c[2] is not None and c[0] != "scene path is a folder"]


@pytest.mark.parametrize("case", UPLOADABLE, ids=[c[0] for c in UPLOADABLE])
def test_bad_upload_gets_the_same_message_in_the_app(tmp_path, case):
    """The dashboard's upload check reports the problem in the page (same words as the CLI),
    opens nothing, and raises nothing."""
    import asyncio
    import threading

    from dashboard.views.notices import Notices
    from dashboard.views.scenes import UploadBox

    _, name, make, code, words = case
    src = tmp_path / name
    make(src)
    opened = []

    async def on_scene(scene):
        opened.append(scene)

    box = UploadBox(on_scene, Notices(), max_upload_mb=50)
    errors = []

    def run():  # a thread of its own: browser tests may leave an event loop running in this one
        try:
            asyncio.run(box._handle(name, src.read_bytes()))
        except BaseException as exc:  # noqa: BLE001 — re-raised below
            errors.append(exc)

    try:
        worker = threading.Thread(target=run)
        worker.start()
        worker.join(timeout=300)
        assert not errors, errors
        text = box.report.object
        assert not opened
        assert "cannot be used" in text or "not a scene file" in text
        assert "Traceback" not in text
        if not name.endswith(".xlsx"):
            for w in words:
                assert w in text, (w, text)
    finally:
        box.cleanup()
