"""The cloudsieve command line: commands, outputs, exit codes, no tracebacks."""
import subprocess
import sys
from pathlib import Path

import pandas as pd
import xarray as xr

from cloudsieve.cli import main

SAMPLES = Path(__file__).resolve().parent.parent / "sample_scenes"
SMALL = SAMPLES / "night_front_small.csv"
EXE = Path(sys.executable).with_name("cloudsieve")


def run(*args):
    """Run the installed console script as a user would."""
    out = subprocess.run([str(EXE), *map(str, args)], capture_output=True, text=True, timeout=300)
    assert "Traceback" not in out.stderr, out.stderr
    return out


def test_help_explains_the_job():
    out = run("--help")
    assert out.returncode == 0
    assert "clear-sky" in out.stdout and "exit codes" in out.stdout and "not a certified" in out.stdout
    for cmd in ("check", "screen", "simulate", "serve"):
        assert cmd in out.stdout


def test_check_good_and_bad(tmp_path):
    out = run("check", SMALL)
    assert out.returncode == 0 and "usable" in out.stdout
    bad = tmp_path / "bad.csv"
    pd.read_csv(SMALL).drop(columns=["t_skin"]).to_csv(bad, index=False)
    out = run("check", bad)
    assert out.returncode == 2 and "t_skin" in out.stdout


def test_screen_one_scene_netcdf_and_csv(tmp_path):
    assert main(["screen", str(SMALL), "--out", str(tmp_path / "m.nc"), "--quiet"]) == 0
    ds = xr.open_dataset(tmp_path / "m.nc")
    assert {"mask", "test_bits", "cloud_optical_depth"} <= set(ds.data_vars)
    assert ds.attrs["history"].endswith(" screen")
    from physics import fused  # provenance of the numbers: which implementation ran

    assert ds.attrs["cloudsieve_physics"].startswith("compiled float32" if fused.enabled() else "numpy")
    assert main(["screen", str(SMALL), "--out", str(tmp_path / "m.csv"), "--quiet"]) == 0
    df = pd.read_csv(tmp_path / "m.csv")
    assert list(df["mask"].map({"clear": 0, "marginal": 1, "cloud": 2, "no_data": 3})) == list(ds["mask"].values.ravel())


def test_screen_many_scenes_into_folder_one_bad(tmp_path):
    bad = tmp_path / "broken.csv"
    bad.write_text("row,col\n")
    good = tmp_path / "good.csv"
    good.write_bytes(SMALL.read_bytes())
    out = run("screen", good, bad, "--out", tmp_path / "out")
    assert out.returncode == 4  # some scenes failed, the others were written
    assert (tmp_path / "out" / "good_mask.nc").exists()
    assert "broken.csv" in out.stderr and "no pixel rows" in out.stderr
    assert "good" in out.stdout  # summary table


def test_screen_glob_pattern(tmp_path):
    for name in ("a.csv", "b.csv"):
        (tmp_path / name).write_bytes(SMALL.read_bytes())
    assert main(["screen", str(tmp_path / "*.csv"), "--out", str(tmp_path / "res"), "--quiet", "--format", "csv"]) == 0
    assert sorted(p.name for p in (tmp_path / "res").iterdir()) == ["a_mask.csv", "a_mask.csv.key.md", "b_mask.csv",
                                                                "b_mask.csv.key.md"]


def test_simulate(tmp_path):
    out = run("simulate", SMALL, "--out", tmp_path / "clear.nc")
    assert out.returncode == 0
    ds = xr.open_dataset(tmp_path / "clear.nc")
    assert "bt_clear_11um" in ds and ds["bt_clear_11um"].attrs["units"] == "K"
    # the scene's lat/lon travel with the simulation (CF auxiliary coordinates), and the
    # history names the command
    assert ds["lat"].attrs["standard_name"] == "latitude" and "lat" in ds["bt_clear_11um"].coords
    assert ds.attrs["history"].endswith("simulate")
    out = run("simulate", SMALL, "--out", tmp_path / "clear.csv")
    assert out.returncode == 0
    assert {"lat", "lon", "bt_clear_11um"} <= set(pd.read_csv(tmp_path / "clear.csv").columns)


def test_exit_codes_for_bad_input_and_output(tmp_path):
    out = run("screen", tmp_path / "missing.csv", "--out", tmp_path / "x.nc")
    assert out.returncode == 2 and "does not exist" in out.stderr
    out = run("screen", SMALL, "--out", tmp_path / "no" / "such" / "x.nc")
    assert out.returncode == 3 and "does not exist" in out.stderr
    cfg = tmp_path / "bad.toml"
    cfg.write_text("[tests.texture]\ntreshold = 1\n")
    out = run("screen", SMALL, "--out", tmp_path / "x.nc", "--config", cfg)
    assert out.returncode == 2 and "treshold" in out.stderr
    out = run("screen", SMALL)
    assert out.returncode == 2 and "--out" in out.stderr


def test_config_show_round_trips(tmp_path):
    out = run("config", "--show")
    assert out.returncode == 0
    path = tmp_path / "mine.toml"
    path.write_text(out.stdout)
    assert run("config", "--check", path).returncode == 0


def test_qa_journal_applied_by_cli(tmp_path):
    scene = tmp_path / "s.csv"
    scene.write_bytes(SMALL.read_bytes())
    from cloudsieve.journal import Journal, journal_path

    j = Journal(journal_path(scene), 10_000)
    j.add("cloud", [0, 1, 2])
    assert main(["screen", str(scene), "--out", str(tmp_path / "m.csv"), "--quiet"]) == 0
    df = pd.read_csv(tmp_path / "m.csv")
    assert (df["mask"].iloc[:3] == "cloud").all()
    assert main(["screen", str(scene), "--out", str(tmp_path / "n.csv"), "--quiet", "--no-edits"]) == 0


def test_a_reader_that_stops_early_is_not_an_error():
    # `cloudsieve config --show | head -1`: the pipe closes under us (common Unix practice:
    # the writer stops quietly)
    proc = subprocess.Popen([str(EXE), "config", "--show"], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    proc.stdout.close()  # nobody reads: the first write breaks the pipe
    err = proc.stderr.read().decode()
    assert proc.wait(timeout=120) == 0
    assert "internal error" not in err and "Traceback" not in err


def test_format_and_file_name_must_agree(tmp_path):
    out = run("screen", SMALL, "--out", tmp_path / "x.csv", "--format", "netcdf", "--quiet")
    assert out.returncode == 2 and "make them agree" in out.stderr
    out = run("screen", SMALL, "--out", tmp_path / "x.txt", "--quiet")
    assert out.returncode == 2 and "cannot tell the output format" in out.stderr
    assert not list(tmp_path.iterdir())
    out = run("simulate", SMALL, "--out", tmp_path / "c.csv", "--format", "netcdf")
    assert out.returncode == 2 and "make them agree" in out.stderr


def test_patterns_skip_truth_files_and_say_so(tmp_path):
    data = tmp_path / "scenes"
    data.mkdir()
    for name in ("polar_ice.nc", "polar_ice_truth.nc"):
        (data / name).write_bytes((SAMPLES / name).read_bytes())
    out = run("screen", str(data / "*.nc"), "--out", tmp_path / "out", "--quiet")
    assert out.returncode == 0, out.stderr
    assert "skipping 1 truth file" in out.stderr
    assert [p.name for p in (tmp_path / "out").iterdir()] == ["polar_ice_mask.nc"]
    # named explicitly, a truth file is refused with what to do instead
    out = run("check", data / "polar_ice_truth.nc")
    assert out.returncode == 2 and "truth of a sample scene" in out.stdout + out.stderr
    assert "polar_ice.nc" in out.stdout + out.stderr


def test_output_folder_with_a_trailing_slash_is_made(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert main(["screen", str(SMALL), "--out", "results/", "--quiet"]) == 0
    assert [p.name for p in (tmp_path / "results").iterdir()] == ["night_front_small_mask.nc"]


def test_a_folder_that_refuses_files_is_an_output_error_not_a_bug(tmp_path, capsys):
    # /proc takes no new files (on Linux): exit 3 with the reason, as for any unwritable output
    assert main(["screen", str(SMALL), "--out", "/proc/mask.nc", "--quiet"]) == 3
    err = capsys.readouterr().err
    assert "cannot write into '/proc'" in err and "bug" not in err


def test_debug_is_accepted_after_the_command(tmp_path):
    assert main(["screen", str(SMALL), "--out", str(tmp_path / "m.nc"), "--quiet", "--debug"]) == 0



def test_out_must_not_overwrite_its_own_scene(tmp_path):
    scene = tmp_path / "s.csv"
    scene.write_bytes(SMALL.read_bytes())
    out = run("screen", scene, "--out", scene)
    assert out.returncode == 2 and "would overwrite the scene" in out.stderr
    assert scene.read_bytes() == SMALL.read_bytes()
    out = run("simulate", scene, "--out", scene)
    assert out.returncode == 2 and scene.read_bytes() == SMALL.read_bytes()


def test_a_journal_from_another_grid_is_reported_not_a_crash(tmp_path):
    """QA edits whose pixels lie outside the scene (the scene was regenerated smaller): the
    edits are left out and the summary says why; no internal error."""
    from cloudsieve.journal import journal_path

    scene = tmp_path / "s.csv"
    scene.write_bytes(SMALL.read_bytes())
    journal_path(scene).write_text('{"id":1,"time":"t","action":"cloud","count":1,"index":[999999]}\n'
                                   '{"id":2,"time":"t","action":"undo"}\n')
    out = run("screen", scene, "--out", tmp_path / "m.nc")
    assert out.returncode == 0, out.stderr
    assert "outside this scene" in out.stdout and "undo without" in out.stdout


def test_a_scene_no_cloud_test_can_screen_says_so(tmp_path):
    scene = tmp_path / "only3p9.csv"
    pd.read_csv(SMALL).drop(columns=["bt_8p6um", "bt_11um", "bt_12um"]).to_csv(scene, index=False)
    out = run("screen", scene, "--out", tmp_path / "m.nc")
    assert out.returncode == 0 and "NO CLOUD TEST COULD RUN" in out.stdout


def test_timings_line_accounts_for_the_run(tmp_path):
    """--timings prints one JSON line on stderr whose stages are non-negative and fit inside the
    run: the block stages summed over threads within blocks_wall × threads, and the process age at
    the end within the wall time measured here (common practice: a profile must add up)."""
    import json
    import time

    t0 = time.perf_counter()
    out = run("screen", SMALL, "--out", tmp_path / "m.nc", "--timings", "--quiet")
    wall = time.perf_counter() - t0
    assert out.returncode == 0, out.stderr
    lines = [ln for ln in out.stderr.splitlines() if ln.startswith("timings: ")]
    assert len(lines) == 1
    t = json.loads(lines[0].split("timings: ", 1)[1])
    stages = ("simulate", "sigma", "screen", "invert", "encode")
    assert all(t[k] >= 0 for k in stages + ("read_check", "write", "imports", "blocks_wall"))
    assert t["invert"] > 0 and t["simulate"] > 0
    assert sum(t[k] for k in stages) <= t["blocks_wall"] * t["threads"] * 1.05 + 0.05
    if t["process_age"] is not None:  # Linux /proc
        assert t["imports"] + t["read_check"] + t["blocks_wall"] <= t["process_age"] + 0.05
        assert t["process_age"] <= wall + 0.05
    assert xr.open_dataset(tmp_path / "m.nc")["mask"].size > 0


def test_the_command_leaves_at_once_with_its_exit_code_and_all_output(tmp_path):
    """The console script ends through os._exit after main(): the exit code, stdout and stderr
    still arrive whole (a bad scene: exit 2 and its report; a good one: exit 0 and the summary)."""
    import os

    env = {k: v for k, v in os.environ.items() if k != "PYTHONUNBUFFERED"}  # pipes buffered, as for most users

    def buffered(*args):
        return subprocess.run([str(EXE), *map(str, args)], capture_output=True, text=True, timeout=300, env=env)

    bad = tmp_path / "bad.csv"
    pd.read_csv(SMALL).drop(columns=["t_skin"]).to_csv(bad, index=False)
    out = buffered("screen", bad, "--out", tmp_path / "m.nc")
    assert out.returncode == 2 and "t_skin" in out.stderr
    out = buffered("screen", SMALL, "--out", tmp_path / "m.nc")
    assert out.returncode == 0 and "night_front_small" in out.stdout and out.stdout.endswith("\n")
