"""The batch path (blocks of rows, in memory or lazily on Dask) gives the dashboard session's
results; archives skip bad scenes."""
from pathlib import Path

import dask
import numpy as np
import pandas as pd
import pytest
import xarray as xr

from cloudsieve import batch
from cloudsieve.cli import main
from cloudsieve.config import load_config, merge_config
from cloudsieve.errors import SceneError
from cloudsieve.scene import load_scene
from cloudsieve.session import Session

SAMPLES = Path(__file__).resolve().parent.parent / "sample_scenes"


def _compare(a, b, tol=1e-6):
    assert set(a.data_vars) == set(b.data_vars)
    # the same notes (in the same order) and the same bias fit in both files
    for attr in ("cloudsieve_notes", "cloudsieve_bias_fit", "cloudsieve_channels", "cloudsieve_qa_edits"):
        assert a.attrs[attr] == b.attrs[attr], attr
    for name in a.data_vars:
        x = a[name].values.astype(float)
        y = b[name].values.astype(float)
        np.testing.assert_array_equal(np.isnan(x), np.isnan(y), err_msg=name)
        finite = np.isfinite(x) & np.isfinite(y)
        assert np.array_equal(np.isinf(x), np.isinf(y)), name
        if finite.any():
            assert np.max(np.abs(x[finite] - y[finite])) <= tol, name


@pytest.mark.parametrize("name, override", [("night_front", {}), ("day_coast", {"bias": {"remove": True}}),
                                            ("polar_ice", {"cloud": {"top": "consistent", "phase": "grey"},
                                                           "surface": {"sea_view_angle": {"model": "fixed"}}})])
@pytest.mark.parametrize("chunk_rows", [None, 37])
def test_batch_equals_the_session(tmp_path, name, override, chunk_rows):
    """The batch path, in memory (blocks of 256 rows) or lazily in blocks of 37 rows (block
    borders cut through clouds and the texture window), gives the session's results (≤ 1e-6 K)."""
    cfg = merge_config(override)
    path = SAMPLES / f"{name}.nc"
    mem = Session.open(path, cfg, journal=False).result_dataset()
    scene = load_scene(path, config=cfg, chunk_rows=chunk_rows)
    assert (chunk_rows is not None) == hasattr(scene.data["bt_11um"].data, "dask")
    with dask.config.set(scheduler="threads"):
        batch.screen_scene_file(scene, tmp_path / "b.nc", cfg, chunk_rows=chunk_rows or batch.DEFAULT_CHUNK_ROWS)
    _compare(mem, xr.open_dataset(tmp_path / "b.nc"))


def test_small_blocks_chunks_and_edits_equal_the_session(tmp_path):
    """Blocks of 23 rows, simulation chunks of 64 columns and QA edits in the scene's journal:
    still the session's results (whose simulation uses the default chunks) to 1e-6 K."""
    import shutil

    from cloudsieve.journal import Journal, journal_path

    path = tmp_path / "night_front.nc"
    shutil.copy(SAMPLES / "night_front.nc", path)
    journal = Journal(journal_path(path), 300 * 300)
    journal.add("cloud", np.arange(5000, 5400))
    journal.add("clear", np.arange(40000, 40900))
    mem = Session.open(path, load_config()).result_dataset()
    assert mem.attrs["cloudsieve_qa_edits"] == "2"
    small = merge_config({"simulation": {"chunk_pixels": 64}})
    row = batch.screen_file(path, tmp_path / "c.nc", small, chunk_rows=23)
    assert row["qa_edits"] == 2
    _compare(mem, xr.open_dataset(tmp_path / "c.nc"))


def test_float32_scene_equals_the_session(tmp_path):
    """A scene stored in float32 (as most satellite files are) gives the session's results."""
    ds = xr.open_dataset(SAMPLES / "night_front.nc").load()
    for name, var in ds.data_vars.items():
        if var.dtype == np.float64:
            ds[name] = var.astype(np.float32)
    path = tmp_path / "night_front32.nc"
    ds.to_netcdf(path)
    cfg = load_config()
    mem = Session.open(path, cfg, journal=False).result_dataset()
    batch.screen_file(path, tmp_path / "c.nc", cfg, chunk_rows=41)
    _compare(mem, xr.open_dataset(tmp_path / "c.nc"))


def test_lazy_parquet_to_csv_matches_the_session(tmp_path):
    cfg = load_config()
    pq = SAMPLES / "day_coast.parquet"
    mem = Session.open(pq, cfg, journal=False).result_dataset()
    batch.screen_file(pq, tmp_path / "c.csv", cfg, chunk_rows=64)
    table = pd.read_csv(tmp_path / "c.csv")
    assert len(table) == mem.sizes["y"] * mem.sizes["x"]
    np.testing.assert_array_equal(table["mask"].map({"clear": 0, "marginal": 1, "cloud": 2, "no_data": 3}),
                                  mem["mask"].values.ravel())
    np.testing.assert_allclose(table["departure_11um"], mem["departure_11um"].values.ravel(), atol=1e-4)


def test_lazy_check_reports_problems(tmp_path):
    ds = xr.open_dataset(SAMPLES / "night_front.nc").load()
    ds["bt_11um"] = ds["bt_11um"] - 273.15
    ds = ds.rename({"bt_8p6um": "bt_10um"})
    path = tmp_path / "bad.nc"
    ds.to_netcdf(path)
    with pytest.raises(SceneError) as err:
        load_scene(path, config=load_config(), chunk_rows=64)
    assert "°C" in str(err.value) and "unknown channel '10um'" in str(err.value)


def test_archive_with_workers_skips_bad_scene(tmp_path):
    arch = tmp_path / "arch"
    arch.mkdir()
    (arch / "a.nc").write_bytes((SAMPLES / "polar_ice.nc").read_bytes())
    (arch / "bad.nc").write_text("not netcdf")
    code = main(["screen", str(arch / "*.nc"), "--out", str(tmp_path / "out"), "--workers", "1", "--quiet"])
    assert code == 4
    assert (tmp_path / "out" / "a_mask.nc").exists() and not (tmp_path / "out" / "bad_mask.nc").exists()


def test_lazy_batch_netcdf_passes_cf_checker(tmp_path):
    """The block-by-block NetCDF writer keeps the CF attributes (IOOS compliance-checker)."""
    import json
    import subprocess

    import shutil
    import sys

    cfg = load_config()
    out = tmp_path / "c.nc"
    row = batch.screen_file(SAMPLES / "polar_ice.nc", out, cfg, chunk_rows=50)
    assert abs(sum(row[k] for k in ("clear", "marginal", "cloud", "no_data")) - 1) < 1e-3
    exe = Path(sys.executable).with_name("compliance-checker")
    checker = str(exe) if exe.exists() else shutil.which("compliance-checker")
    proc = subprocess.run([checker, "--test=cf:1.10", "--format=json", "-o", "-", str(out)], capture_output=True,
                          text=True, timeout=300)
    cf = next(iter(json.loads(proc.stdout).values()))
    bad = [m for m in cf["high_priorities"] + cf["medium_priorities"] if m["value"][0] != m["value"][1]]
    assert not bad, bad


def test_cloud_top_height_works_on_both_paths(tmp_path):
    """``[cloud] top_height`` (km above the surface) places the fixed top on the session's
    path and the batch path alike, at pressures that follow each pixel's own profile."""
    cfg = merge_config({"cloud": {"top": "fixed", "top_height": 5.0}})
    path = SAMPLES / "polar_ice.nc"
    mem = Session.open(path, cfg, journal=False).result_dataset()
    top = mem["cloud_top_pressure"].values
    ok = np.isfinite(top)
    assert ok.any()
    # 5 km above the surface: well below 1013 hPa, above 400 hPa, and not one fixed number
    assert 400 < np.nanmin(top) and np.nanmax(top) < 650 and np.nanstd(top) > 0.1
    batch.screen_file(path, tmp_path / "b.nc", cfg, chunk_rows=64)
    _compare(mem, xr.open_dataset(tmp_path / "b.nc"))


def test_bias_removal_on_a_two_worker_cluster_equals_the_session(tmp_path):
    """Blocks finish in any order on a cluster: the first pass's clear sky and sums must still
    land in their own rows (found in review: they were paired with blocks by position)."""
    cfg_file = tmp_path / "bias.toml"
    cfg_file.write_text("[bias]\nremove = true\n")
    path = SAMPLES / "night_front.nc"
    mem = Session.open(path, merge_config({"bias": {"remove": True}}), journal=False).result_dataset()
    out = tmp_path / "w.nc"
    assert main(["screen", str(path), "--out", str(out), "--config", str(cfg_file), "--workers", "2",
                 "--chunks", "23", "--quiet", "--no-edits"]) == 0
    _compare(mem, xr.open_dataset(out))


def test_csv_output_reports_the_bias_fit(tmp_path):
    cfg = load_config()
    small = SAMPLES / "night_front_small.csv"
    a = batch.screen_file(small, tmp_path / "m.csv", cfg)
    b = batch.screen_file(small, tmp_path / "m.nc", cfg)
    assert np.isfinite(a["bias"]["11um"]["a"]) and a["bias"] == b["bias"]


def test_a_scene_without_valid_night_pixels_is_screened_alike_on_both_paths(tmp_path):
    """Night rows whose 11 µm is missing: no valid night pixel, so the night test does not run
    — on the session's path and the batch path alike, saying why."""
    df = pd.read_csv(SAMPLES / "night_front_small.csv")
    night = df["row"] >= 20
    df.loc[~night, "sol_zenith"] = 60.0
    df.loc[night, "bt_11um"] = np.nan
    path = tmp_path / "terminator.csv"
    df.to_csv(path, index=False)
    cfg = load_config()
    mem = Session.open(path, cfg, journal=False).result_dataset()
    assert "margin_night_fog_contrast" not in mem
    assert "no valid night-time pixels" in mem.attrs["cloudsieve_notes"]
    batch.screen_file(path, tmp_path / "t.nc", cfg, chunk_rows=16)
    _compare(mem, xr.open_dataset(tmp_path / "t.nc"))
