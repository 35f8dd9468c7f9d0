"""The table of bad scene inputs, shared by the CLI tests (test_bad_inputs.py) and the
two-path reader tests (test_scene_paths.py): each case makes a file and says what must happen.

Imports nothing from the package.
"""
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

SAMPLES = Path(__file__).resolve().parent.parent / "sample_scenes"
SMALL = SAMPLES / "night_front_small.csv"


def table():
    """The small sample scene as a pandas table (a fresh copy)."""
    return pd.read_csv(SMALL)


def written(fn, fmt="csv", **to_kwargs):
    """A maker: the small sample table changed by ``fn`` (in place, or returning a new table),
    written as CSV (without the index) or Parquet (``to_kwargs`` passed to pandas)."""
    def make(path):
        df = table()
        out = fn(df)
        out = df if out is None else out
        if fmt == "csv":
            out.to_csv(path, **dict({"index": False}, **to_kwargs))
        else:
            out.to_parquet(path, **to_kwargs)
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
    ("missing required column", "s.csv", written(lambda d: d.drop(columns=["tcwv"])), 2,
     ["tcwv", "missing"]),
    ("required column under another name", "s.csv", written(lambda d: d.rename(columns={"sat_zenith": "satzen"})),
     2, ["sat_zenith", "rename 'satzen' to 'sat_zenith'"]),
    ("no brightness temperature", "s.csv",
     written(lambda d: d.drop(columns=[c for c in d.columns if c.startswith("bt_")])), 2,
     ["bt_<channel>"]),
    ("non-numeric cell", "s.csv", written(lambda d: d.__setitem__("tcwv", d["tcwv"].astype(object).where(d.index != 3, "wet"))), 2,
     ["non-numeric", "'wet'", "line"]),
    ("brightness temperatures in °C", "s.csv", written(lambda d: d.__setitem__("bt_11um", d["bt_11um"] - 273.15)), 2,
     ["°C", "273.15"]),
    ("air temperature in °C", "s.csv", written(lambda d: d.__setitem__("t_air", d["t_air"] - 273.15)), 2,
     ["t_air", "°C"]),
    ("negative water vapour", "s.csv", written(lambda d: d.__setitem__("tcwv", -d["tcwv"])), 2,
     ["tcwv", "negative"]),
    ("zenith angle over 90°", "s.csv", written(lambda d: d.__setitem__("sat_zenith", d["sat_zenith"] + 70)), 2,
     ["sat_zenith", "0–80"]),
    ("surface pressure in Pa", "s.csv", written(lambda d: d.__setitem__("p_surf", d["p_surf"] * 100)), 2,
     ["p_surf", "hPa"]),
    ("emissivity in percent", "s.csv", written(lambda d: d.__setitem__("emis_11um", 98.0)), 2,
     ["emis_11um", "fractions"]),
    ("unknown surface type", "s.csv", written(lambda d: d.__setitem__("surface", "swamp")), 2,
     ["swamp", "sea, land or ice"]),
    ("unknown channel", "s.csv", written(lambda d: d.rename(columns={"bt_8p6um": "bt_10um"})), 2,
     ["unknown channel '10um'", "[channels]"]),
    ("duplicate grid position", "s.csv", lambda p: pd.concat([table(), table().iloc[:1]]).to_csv(p, index=False), 2,
     ["more than once"]),
    ("negative grid index", "s.csv", written(lambda d: d.__setitem__("row", d["row"] - 5)), 2, ["whole numbers ≥ 0"]),
    ("fractional grid index", "s.csv", written(lambda d: d.__setitem__("col", d["col"] + 0.5)), 2, ["whole numbers"]),
    ("duplicate column names", "s.csv", _dup_header, 2, ["more than once"]),
    ("channel column all empty", "s.csv", written(lambda d: d.__setitem__("bt_12um", np.nan)), 2,
     ["bt_12um", "no valid values"]),
    ("Parquet unknown surface type", "s.parquet", written(lambda d: d.__setitem__("surface", "desert"), "parquet", index=False), 2,
     ["desert", "sea, land or ice"]),
    ("part of a channel in °C", "s.csv", written(_half_celsius), 2, ["bt_11um", "°C"]),
    ("Parquet part of a channel in °C", "s.parquet", written(_half_celsius, "parquet", index=False), 2, ["bt_11um", "°C"]),
    ("missing scene file", "absent.csv", None, 2, ["does not exist"]),
    ("scene path is a folder", "folder.csv", lambda p: p.mkdir(), 2, ["folder"]),
]
