"""One reader and one validator for every scene size: a scene read in memory
(``check_scene(path)``) and the same scene opened lazily (``check_scene(path, chunk_rows=8)``)
give the same outcome — the same SceneError message, or the same report word for word, and
for usable scenes the same Dataset.

The bad inputs are the table of ``scene_cases.py`` (run through the CLI in test_bad_inputs.py), plus
cases where the two paths used to drift apart: text surface codes in Parquet, temperatures
partly in °C, explicit profiles in NetCDF.

Only :mod:`cloudsieve.scene`, :mod:`cloudsieve.config` and :mod:`cloudsieve.errors` are imported.
"""

import dask.array as da
import numpy as np
import pandas as pd
import pytest
import xarray as xr

import cloudsieve.scene as scene_mod
from cloudsieve.config import load_config
from cloudsieve.errors import SceneError
from cloudsieve.scene import check_scene, load_scene
from scene_cases import CASES, SAMPLES, table, written

CHUNK = 8  # grid rows per chunk on the lazy path


def _set(col, value, rows=slice(None)):
    def fn(df):
        if isinstance(value, str):
            df[col] = df[col].astype(str)  # one type per column (Parquet)
        df.loc[df.index[rows], col] = value
    return fn


def _holes(df):
    """Missing bt_11um in the first 5 rows, infinite tcwv in every 50th."""
    df["bt_11um"] = df["bt_11um"].where(df.index > 4)
    df["tcwv"] = df["tcwv"].where(df.index % 50 != 3, np.inf)


def _unused_columns(df):
    """An unknown column, and an emissivity of a channel the scene does not observe."""
    df["zzz"] = 1.0
    df["emis_8p6um"] = 0.97
    return df.drop(columns=["bt_8p6um"])


def _shift(col, delta, fraction):
    """``col`` + delta on the first ``fraction`` of the rows (e.g. -273.15: those in °C)."""
    def fn(df):
        n = round(len(df) * fraction)
        df.loc[df.index[:n], col] = df.loc[df.index[:n], col] + delta
    return fn


def _nc_cutout(ny=64, nx=50, profiles=False, edit=None):
    """A NetCDF cutout of polar_ice.nc (ny × nx), optionally with explicit profiles
    (surface first, 12 levels) and an edit of the Dataset before writing."""
    def make(path):
        with xr.open_dataset(SAMPLES / "polar_ice.nc") as src:
            ds = src.isel(y=slice(0, ny), x=slice(0, nx)).load()
        if profiles:
            lev = np.linspace(0.0, 1.0, 12)
            p = ds["p_surf"].values[..., None] * (1.0 - 0.9 * lev)  # hPa
            t = ds["t_air"].values[..., None] - 60.0 * lev  # K
            q = 3e-3 * np.exp(-4.0 * lev) * np.ones_like(t)  # kg/kg
            for name, v in (("pressure", p), ("temperature", t), ("q", q)):
                ds[f"profile_{name}"] = (("y", "x", "level"), v)
        if edit is not None:
            ds = edit(ds) or ds
        ds.to_netcdf(path)
    return make


def _nc_edit(fn):
    return _nc_cutout(edit=fn)


def _nc_surface_codes(ds):
    s = ds["surface"].values.copy()
    s[:3, :4] = 7
    ds["surface"] = (("y", "x"), s)


def _nc_inf(ds):
    v = ds["bt_12um"].values.copy()
    v[5, :6] = np.inf
    ds["bt_12um"] = (("y", "x"), v)


def _nc_half_celsius(ds):
    v = ds["t_skin"].values.copy()
    v[: v.shape[0] // 2 + 3] -= 273.15
    ds["t_skin"] = (("y", "x"), v)


def _nc_tcwv_x10(ds):
    ds["tcwv"] = ds["tcwv"] * 100.0


def _nc_text_surface(ds):
    s = np.where(ds["surface"].values == 2, "ice", "sea").astype(object)
    s[0, 0] = "desert"
    ds["surface"] = (("y", "x"), s)


def _nc_dims_named_otherwise(ds):
    return ds.rename({"y": "line", "x": "pixel"})


# (id, file name, maker, error expected, words the outcome must contain)
NEW_CASES = [
    ("Parquet surface desert on some rows", "s.parquet", written(_set("surface", "desert", slice(None, None, 7)), "parquet"),
     True, ["'desert'", "sea, land or ice"]),
    ("CSV surface desert on some rows", "s.csv", written(_set("surface", "desert", slice(None, None, 7))),
     True, ["'desert'", "sea, land or ice"]),
    ("half of bt_11um in °C", "s.csv", written(_shift("bt_11um", -273.15, 0.5)), True,
     ["bt_11um", "outside 150–350"]),
    ("half of bt_11um in °C, Parquet", "s.parquet", written(_shift("bt_11um", -273.15, 0.5), "parquet"), True,
     ["bt_11um", "outside 150–350"]),
    ("most of bt_11um in °C", "s.csv", written(_shift("bt_11um", -273.15, 0.6)), True, ["bt_11um", "°C", "273.15"]),
    ("a tenth of t_air in °C", "s.csv", written(_shift("t_air", -273.15, 0.1)), True, ["t_air", "smallest"]),
    ("tcwv in kg m-2 × 10", "s.csv", written(lambda d: d.__setitem__("tcwv", d["tcwv"] * 10)), True,
     ["tcwv", "divide by 10"]),
    ("Parquet non-numeric cell", "s.parquet", written(_set("t_skin", "warm", [4, 9]), "parquet"), True,
     ["'warm'", "line(s) 6, 11"]),
    ("Parquet duplicate grid position", "s.parquet", lambda p: pd.concat([table(), table().iloc[[3]]]).to_parquet(p),
     True, ["more than once"]),
    ("Parquet ragged grid, rows dropped", "s.parquet", written(lambda d: d.drop(index=[7, 8, 30]), "parquet"), False,
     ["ragged", "3 pixel(s) miss a required value"]),
    ("Parquet fractional grid index", "s.parquet", written(lambda d: d.__setitem__("col", d["col"] + 0.5), "parquet"), True,
     ["whole numbers"]),
    ("Parquet true/false column", "s.parquet", written(lambda d: d.__setitem__("tcwv", d["tcwv"] > 20), "parquet"), True,
     ["true/false"]),
    ("Parquet surface as codes 0/1/2", "s.parquet", written(lambda d: d.__setitem__("surface", 1), "parquet"), False,
     ["usable"]),
    ("CSV missing and infinite cells", "s.csv", written(_holes), False, ["no_data", "36 pixel(s) miss"]),
    ("Parquet missing and infinite cells", "s.parquet", written(_holes, "parquet"), False,
     ["32 infinite value(s)", "36 pixel(s) miss"]),
    ("CSV unused columns, lone emissivity", "s.csv", written(_unused_columns), False,
     ["not used", "'emis_8p6um' given"]),
    ("CSV without the optional columns", "s.csv",
     written(lambda d: d.drop(columns=["sol_zenith", "p_surf", "surface", "lat", "lon"])), False, ["usable"]),
    ("NetCDF without the optional variables", "s.nc",
     _nc_edit(lambda ds: ds.drop_vars(["sol_zenith", "p_surf", "surface", "lat", "lon"])), False, ["usable"]),
    ("NetCDF with explicit profiles", "s.nc", _nc_cutout(profiles=True), False, ["usable"]),
    ("NetCDF surface codes other than 0-2", "s.nc", _nc_edit(_nc_surface_codes), True, ["other than 0, 1, 2"]),
    ("NetCDF text surface with desert", "s.nc", _nc_edit(_nc_text_surface), True, ["'desert'"]),
    ("NetCDF infinite values", "s.nc", _nc_edit(_nc_inf), False, ["6 infinite value(s)", "6 pixel(s) miss"]),
    ("NetCDF t_skin mostly in °C", "s.nc", _nc_edit(_nc_half_celsius), True, ["t_skin", "°C"]),
    ("NetCDF tcwv × 100", "s.nc", _nc_edit(_nc_tcwv_x10), True, ["tcwv", "too large for kg m-2"]),
    ("NetCDF dimensions named otherwise", "s.nc", _nc_edit(_nc_dims_named_otherwise), False,
     ["read as (y, x)"]),
    ("NetCDF bt_12um all missing", "s.nc", _nc_edit(lambda ds: ds.assign(bt_12um=ds["bt_12um"] * np.nan)), True,
     ["bt_12um", "no valid values"]),
]


@pytest.fixture(scope="module")
def cfg():
    return load_config()


def _outcome(path, cfg, chunk_rows):
    """('error', message) for a SceneError, otherwise ('report', report text) and the Scene."""
    try:
        scene = check_scene(path, config=cfg, chunk_rows=chunk_rows)
    except SceneError as exc:
        return ("error", str(exc)), None
    return ("report", scene.report.text()), scene


def _same_on_both_paths(path, cfg, chunk_rows=CHUNK):
    """Check a scene both ways, require the same outcome; return (outcome, in-memory scene, lazy scene)."""
    mem, a = _outcome(path, cfg, None)
    lazy, b = _outcome(path, cfg, chunk_rows)
    assert mem == lazy, f"in memory:\n{mem[1]}\n\nlazy (chunk_rows={chunk_rows}):\n{lazy[1]}"
    if a is None:
        return mem, a, b
    assert (a.data is None) == (b.data is None)
    assert a.channels == b.channels
    if a.data is not None:
        assert a.data.attrs["channels"] == " ".join(a.channels)
        for name, var in a.data.data_vars.items():
            assert isinstance(var.data, np.ndarray), name
            assert isinstance(b.data[name].data, da.Array), name  # lazy
            assert b.data[name].chunks[0] == tuple(b.data[name].data.chunks[0])
            assert max(b.data[name].data.chunks[0]) <= chunk_rows
        xr.testing.assert_identical(a.data, b.data.compute())
    return mem, a, b


def _make(tmp_path, name, make):
    path = tmp_path / name
    if make is not None:
        make(path)
    return path


@pytest.mark.parametrize("case", CASES, ids=[c[0] for c in CASES])
def test_bad_input_same_outcome_on_both_paths(tmp_path, cfg, case):
    _, name, make, code, words = case
    (kind, text), a, _ = _same_on_both_paths(_make(tmp_path, name, make), cfg)
    assert code == 2 and (kind == "error" or not a.report.ok), text
    for w in words:
        assert w in text, (w, text)


@pytest.mark.parametrize("case", NEW_CASES, ids=[c[0] for c in NEW_CASES])
def test_drift_cases_same_outcome_on_both_paths(tmp_path, cfg, case):
    _, name, make, is_error, words = case
    (kind, text), a, _ = _same_on_both_paths(_make(tmp_path, name, make), cfg)
    assert (kind == "error" or not a.report.ok) == is_error, text
    for w in words:
        assert w in text, (w, text)


@pytest.mark.parametrize("name", ["night_front.nc", "day_coast.nc", "day_coast.parquet", "polar_ice.nc",
                                  "night_front_small.csv"])
def test_sample_scenes_identical_on_both_paths(cfg, name):
    (kind, text), a, _ = _same_on_both_paths(SAMPLES / name, cfg)
    assert kind == "report" and a.report.ok, text
    assert a.data["valid"].values.all()
    assert set(a.data.data_vars) >= {"t_skin", "t_air", "tcwv", "sat_zenith", "sol_zenith", "p_surf", "surface",
                                     "valid"}
    assert a.data["surface"].dtype == np.int8 and a.data["valid"].dtype == bool
    assert a.data["row"].dtype == np.int32 and a.data["col"].dtype == np.int32


def test_netcdf_opened_lazily_in_row_chunks(tmp_path, cfg):
    path = tmp_path / "cut.nc"
    _nc_cutout(64, 50, profiles=True)(path)
    scene = load_scene(path, config=cfg, chunk_rows=16)
    ds = scene.data
    assert ds.sizes["y"] == 64 and ds.sizes["x"] == 50
    for name, var in ds.data_vars.items():
        assert isinstance(var.data, da.Array), name
        assert var.data.numblocks[0] == 4 and var.chunks[0] == (16,) * 4, name
        assert var.chunks[1] == (50,), name  # whole rows
    assert ds["profile_temperature"].dims == ("y", "x", "level")
    assert ds["profile_temperature"].chunks[2] == (12,)
    assert isinstance(ds["lat"].data, da.Array)
    # the variables still read the file (xarray's layers over the backend), nothing was loaded whole
    assert any(layer.startswith("original-xarray-bt_11um") for layer in ds["bt_11um"].data.dask.layers)
    mem = load_scene(path, config=cfg)
    xr.testing.assert_identical(mem.data, ds.compute())


def test_parquet_read_in_batches_gives_the_same_report(tmp_path, cfg, monkeypatch):
    """Cell, position and surface problems summed over batches (97 rows each) as over one table."""
    df = table()
    df["t_skin"] = df["t_skin"].astype(str)
    df.loc[[5, 150, 151, 1500], "t_skin"] = "warm"
    df.loc[[20, 400, 1200], "surface"] = "desert"
    df = pd.concat([df, df.iloc[[10, 1300]]], ignore_index=True)  # duplicates in other batches
    df.to_parquet(tmp_path / "s.parquet", row_group_size=300)
    df.to_csv(tmp_path / "s.csv", index=False)
    one = check_scene(tmp_path / "s.parquet", config=cfg).report.text()
    monkeypatch.setattr(scene_mod, "_BATCH_ROWS", 97)
    (_, text), _, _ = _same_on_both_paths(tmp_path / "s.parquet", cfg)
    assert text == one
    assert check_scene(tmp_path / "s.csv", config=cfg).report.text().replace("s.csv", "s.parquet") == one
    assert "4 non-numeric cell(s), e.g. 'warm' on line(s) 7, 152, 153" in one
    assert "3 unknown value(s), e.g. 'desert'" in one
    assert "2 grid position(s) appear more than once" in one


def test_range_errors_name_the_extreme_values(tmp_path, cfg):
    df = table()
    df.loc[3, "sat_zenith"] = 85.0
    df.loc[7, "sat_zenith"] = 97.5
    df.loc[9, "sat_zenith"] = -2.0
    df.to_csv(tmp_path / "s.csv", index=False)
    (_, text), _, _ = _same_on_both_paths(tmp_path / "s.csv", cfg)
    assert "'sat_zenith' has 3 value(s) outside 0–80 (degree), smallest and largest -2 and 97.5" in text


def test_lazy_path_has_no_in_memory_limit(tmp_path, cfg, monkeypatch):
    monkeypatch.setattr(scene_mod, "MAX_PIXELS", 1000)
    for name in ("night_front_small.csv", "polar_ice.nc"):
        with pytest.raises(SceneError, match=r"in-memory limit.*cloudsieve screen --chunks"):
            load_scene(SAMPLES / name, config=cfg)
        assert load_scene(SAMPLES / name, config=cfg, chunk_rows=CHUNK).report.ok


@pytest.mark.parametrize("name", ["polar_ice.nc", "day_coast.parquet", "night_front_small.csv"])
def test_lazy_check_computes_once(cfg, name, monkeypatch):
    """The lazy check evaluates everything in one dask.compute on the threaded scheduler and
    never turns a dask array into numpy behind its back."""
    import dask

    calls = []
    real = dask.compute

    def compute(*args, **kwargs):
        calls.append(kwargs.get("scheduler"))
        return real(*args, **kwargs)

    def no_implicit_load(self, *args, **kwargs):
        raise AssertionError("a dask array was converted to numpy outside dask.compute")

    monkeypatch.setattr(dask, "compute", compute)
    monkeypatch.setattr(da.Array, "__array__", no_implicit_load)
    scene = load_scene(SAMPLES / name, config=cfg, chunk_rows=CHUNK)
    assert calls == ["threads"]
    assert isinstance(scene.data["valid"].data, da.Array)
