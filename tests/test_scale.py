"""The chunked (Dask) path gives the in-memory path's results; archives skip bad scenes."""
from pathlib import Path

import dask
import numpy as np
import pandas as pd
import pytest
import xarray as xr

from dashboard import pipeline as pl, scale
from dashboard.cli import main
from dashboard.config import load_config, merge_config
from dashboard.export import result_dataset
from dashboard.model import ScreeningModel

SAMPLES = Path(__file__).resolve().parent.parent / "sample_scenes"


def _compare(a, b, tol=1e-6):
    assert set(a.data_vars) == set(b.data_vars)
    for name in a.data_vars:
        x = a[name].values.astype(float)
        y = b[name].values.astype(float)
        np.testing.assert_array_equal(np.isnan(x), np.isnan(y), err_msg=name)
        finite = np.isfinite(x) & np.isfinite(y)
        assert np.array_equal(np.isinf(x), np.isinf(y)), name
        if finite.any():
            assert np.max(np.abs(x[finite] - y[finite])) <= tol, name


@pytest.mark.parametrize("name, override", [("night_front", {}), ("day_coast", {"bias": {"remove": True}}),
                                            ("polar_ice", {"cloud": {"top": "grey"}})])
def test_chunked_equals_in_memory(tmp_path, name, override):
    """Identical results to the in-memory path (≤ 1e-6 K), blocks of 37 rows so that block
    borders cut through clouds and the texture window."""
    cfg = merge_config(override)
    path = SAMPLES / f"{name}.nc"
    mem = ScreeningModel.open(path, cfg, journal=False).result_dataset()
    with dask.config.set(scheduler="threads"):
        lazy = scale.open_lazy(path, cfg, chunk_rows=37)
        res = scale.screen_chunked(lazy, cfg)
        out, _ = scale.write_chunked(lazy, res, cfg, tmp_path / "chunked.nc")
    _compare(mem, xr.open_dataset(out))


def test_one_pass_slabs_and_edits_equal_in_memory(tmp_path):
    """The one-pass block kernel simulates a block in slabs of rows and keeps the level data
    only until a slab's rows are screened: with slabs of three rows (chunk_pixels 64 on a
    300-wide scene), blocks of 23 rows and QA edits, the results still equal the in-memory
    path's (whose simulation uses the default chunks) to 1e-6 K."""
    cfg = load_config()
    small = merge_config({"simulation": {"chunk_pixels": 64}})
    path = SAMPLES / "night_front.nc"
    edits = [{"action": "cloud", "index": np.arange(5000, 5400)}, {"action": "clear", "index": np.arange(40000, 40900)}]
    model = ScreeningModel.open(path, cfg, journal=False)
    res = pl.screen(model.scene, model.sim, cfg, edits=edits)
    mem = result_dataset(model.scene, model.sim, res, cfg, edits)
    with dask.config.set(scheduler="threads"):
        lazy = scale.open_lazy(path, small, chunk_rows=23)
        out, _ = scale.write_chunked(lazy, scale.screen_chunked(lazy, small, edits), small, tmp_path / "c.nc",
                                     edits=edits)
    _compare(mem, xr.open_dataset(out))


def test_float32_scene_equals_in_memory(tmp_path):
    """A scene stored in float32 (as the benchmark's and most satellite files are): its fields
    travel between tasks as float32, which holds them exactly, and the results still equal
    the in-memory path's."""
    ds = xr.open_dataset(SAMPLES / "night_front.nc").load()
    for name, var in ds.data_vars.items():
        if var.dtype == np.float64:
            ds[name] = var.astype(np.float32)
    path = tmp_path / "night_front32.nc"
    ds.to_netcdf(path)
    cfg = load_config()
    mem = ScreeningModel.open(path, cfg, journal=False).result_dataset()
    with dask.config.set(scheduler="threads"):
        lazy = scale.open_lazy(path, cfg, chunk_rows=41)
        assert lazy.data["bt_11um"].attrs["cloudsieve_float32_exact"] == 1
        out, _ = scale.write_chunked(lazy, scale.screen_chunked(lazy, cfg), cfg, tmp_path / "c.nc")
    _compare(mem, xr.open_dataset(out))


def test_chunked_parquet_matches_csv_output(tmp_path):
    cfg = load_config()
    pq = SAMPLES / "day_coast.parquet"
    mem = ScreeningModel.open(pq, cfg, journal=False).result_dataset()
    with dask.config.set(scheduler="threads"):
        lazy = scale.open_lazy(pq, cfg, chunk_rows=64)
        out, _ = scale.write_chunked(lazy, scale.screen_chunked(lazy, cfg), cfg, tmp_path / "c.csv")
    table = pd.read_csv(out)
    assert len(table) == mem.sizes["y"] * mem.sizes["x"]
    np.testing.assert_array_equal(table["mask"].map({"clear": 0, "marginal": 1, "cloud": 2, "no_data": 3}),
                                  mem["mask"].values.ravel())


def test_lazy_check_reports_problems(tmp_path):
    ds = xr.open_dataset(SAMPLES / "night_front.nc").load()
    ds["bt_11um"] = ds["bt_11um"] - 273.15
    ds = ds.rename({"bt_8p6um": "bt_10um"})
    path = tmp_path / "bad.nc"
    ds.to_netcdf(path)
    with pytest.raises(scale.SceneError) as err:
        scale.open_lazy(path, load_config())
    assert "°C" in str(err.value) and "unknown channel '10um'" in str(err.value)


def test_archive_with_workers_skips_bad_scene(tmp_path):
    arch = tmp_path / "arch"
    arch.mkdir()
    (arch / "a.nc").write_bytes((SAMPLES / "polar_ice.nc").read_bytes())
    (arch / "bad.nc").write_text("not netcdf")
    code = main(["screen", str(arch / "*.nc"), "--out", str(tmp_path / "out"), "--workers", "1", "--quiet"])
    assert code == 4
    assert (tmp_path / "out" / "a_mask.nc").exists() and not (tmp_path / "out" / "bad_mask.nc").exists()


def test_chunked_netcdf_passes_cf_checker(tmp_path):
    """The block-by-block NetCDF writer keeps the CF attributes (IOOS compliance-checker)."""
    import json
    import subprocess

    import shutil
    import sys

    cfg = load_config()
    with dask.config.set(scheduler="threads"):
        lazy = scale.open_lazy(SAMPLES / "polar_ice.nc", cfg, chunk_rows=50)
        out, counts = scale.write_chunked(lazy, scale.screen_chunked(lazy, cfg), cfg, tmp_path / "c.nc")
    assert abs(sum(counts.values()) - 1) < 1e-3
    exe = Path(sys.executable).with_name("compliance-checker")
    checker = str(exe) if exe.exists() else shutil.which("compliance-checker")
    proc = subprocess.run([checker, "--test=cf:1.10", "--format=json", "-o", "-", str(out)], capture_output=True,
                          text=True, timeout=300)
    cf = next(iter(json.loads(proc.stdout).values()))
    bad = [m for m in cf["high_priorities"] + cf["medium_priorities"] if m["value"][0] != m["value"][1]]
    assert not bad, bad
