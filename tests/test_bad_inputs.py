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

from cloudsieve.cli import main
from scene_cases import CASES, SMALL, table

EXE = Path(sys.executable).with_name("cloudsieve")


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
    df = table()
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
    ("config impossible value", "[cloud]\ntop = \"sideways\"\n", ["cloud.top", "fixed, opaque, consistent"]),
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


def _bomb_netcdf(path, n=40_000):
    """A 9 KB NetCDF file declaring n × n pixels (deflated chunks never written: fill values)."""
    import netCDF4

    with netCDF4.Dataset(path, "w") as ds:
        ds.createDimension("y", n)
        ds.createDimension("x", n)
        for name in ("bt_11um", "bt_12um", "t_skin", "t_air", "tcwv", "sat_zenith"):
            ds.createVariable(name, "f4", ("y", "x"), zlib=True, chunksizes=(1000, 1000), fill_value=280.0)


def _bomb_parquet(path, n=40_000):
    """Two table rows whose grid positions span n × n pixels."""
    df = table().iloc[:2].copy()
    df["row"] = [0, n - 1]
    df["col"] = [0, n - 1]
    df.to_parquet(path, index=False)


@pytest.mark.parametrize("make,name", [(_bomb_netcdf, "bomb.nc"), (_bomb_parquet, "bomb.parquet")])
def test_size_bombs_are_refused_before_any_value_is_read(tmp_path, make, name):
    """Issue 18: a small file declaring 40000 × 40000 pixels is refused by `check` with the size
    in words and the chunked alternative — not called unreadable — under a 2 GB address-space
    limit (1.6 billion float32 pixels would need 6 GB per variable), with no traceback."""
    import resource

    scene = tmp_path / name
    make(scene)
    assert scene.stat().st_size < 50_000

    def limit():
        resource.setrlimit(resource.RLIMIT_AS, (2 * 1024**3, 2 * 1024**3))

    proc = subprocess.run([str(EXE), "check", str(scene)], capture_output=True, text=True, timeout=300,
                          preexec_fn=limit)
    text = proc.stdout + proc.stderr
    assert proc.returncode == 2, text
    assert "40000 × 40000 = 1.6 billion pixels" in text and "--chunks" in text
    assert "not a readable" not in text and "Traceback" not in text and "allocate" not in text


def test_size_bomb_upload_is_refused_and_the_app_goes_on(tmp_path):
    """The same NetCDF bomb uploaded to the dashboard: the page reports the size and opens
    nothing; the server process (this one) is still there to handle the next upload."""
    import asyncio

    from dashboard.views.notices import Notices
    from dashboard.views.scenes import UploadBox

    bomb = tmp_path / "bomb.nc"
    _bomb_netcdf(bomb)
    opened = []

    async def on_scene(scene):
        opened.append(scene)

    box = UploadBox(on_scene, Notices(), max_upload_mb=50)
    try:
        import threading

        # threads of their own: browser tests may leave an event loop running in this one
        worker = threading.Thread(target=lambda: asyncio.run(box._handle("bomb.nc", bomb.read_bytes())))
        worker.start()
        worker.join(timeout=300)
        text = box.report.object
        assert not opened and "1.6 billion pixels" in text and "Traceback" not in text
        # the next upload, a good scene, opens
        worker = threading.Thread(target=lambda: asyncio.run(box._handle(SMALL.name, SMALL.read_bytes())))
        worker.start()
        worker.join(timeout=300)
        assert opened
    finally:
        box.cleanup()
