"""Nothing lost: processes killed with SIGKILL at random moments.

* An export killed mid-way leaves either the old file or the complete new one under the
  final name — never a partial file (writes go to a temporary file renamed into place).
* The QA-edit journal keeps every edit that was acknowledged before the kill (append with
  fsync); a torn last line is detected, reported and left out on the next start.
"""
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from cloudsieve.journal import Journal, journal_path

SAMPLES = Path(__file__).resolve().parent.parent / "sample_scenes"
EXE = Path(sys.executable).with_name("cloudsieve")


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """A complete export of the scene, and how long one takes."""
    tmp = tmp_path_factory.mktemp("ref")
    scene = tmp / "scene.nc"
    scene.write_bytes((SAMPLES / "polar_ice.nc").read_bytes())
    t0 = time.perf_counter()
    subprocess.run([str(EXE), "screen", str(scene), "--out", str(tmp / "ref.nc"), "--quiet"], check=True,
                   timeout=600)
    return scene, xr.open_dataset(tmp / "ref.nc").load(), time.perf_counter() - t0


def test_export_killed_at_random_moments(tmp_path, reference):
    scene, ref, duration = reference
    rng = random.Random(20261201)
    target = tmp_path / "mask.nc"
    outcomes = []
    for trial in range(5):
        target.write_bytes(b"OLD RESULT")
        proc = subprocess.Popen([str(EXE), "screen", str(scene), "--out", str(target), "--quiet"],
                                stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        time.sleep(rng.uniform(0.3, 1.1) * duration)
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        data = target.read_bytes()
        if data == b"OLD RESULT":
            outcomes.append("old")
            continue
        got = xr.open_dataset(target).load()  # must be a complete, readable file ...
        np.testing.assert_array_equal(got["mask"].values, ref["mask"].values)  # ... equal to a full run
        outcomes.append("new")
    # the final name never held anything else; stray temporaries may remain after a SIGKILL
    leftovers = [p.name for p in tmp_path.iterdir() if p.name != "mask.nc"]
    assert all(p.startswith(".mask.nc.") and p.endswith(".part") for p in leftovers)
    print("outcomes:", outcomes)
    # the next complete write of the same file sweeps the dead writers' temporaries
    subprocess.run([str(EXE), "screen", str(scene), "--out", str(target), "--quiet"], check=True, timeout=600)
    assert [p.name for p in tmp_path.iterdir()] == ["mask.nc"]


def test_stale_temporaries_of_dead_writers_are_swept_live_ones_kept(tmp_path):
    from cloudsieve.export import atomic_write

    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True,
                          check=True)
    dead_pid = int(dead.stdout)  # that process has exited
    stale = tmp_path / f".out.csv.{dead_pid}.abc123.part"
    live = tmp_path / f".out.csv.{os.getppid()}.def456.part"  # the test runner's parent is alive
    other = tmp_path / f".other.csv.{dead_pid}.xyz.part"  # another file's temporary: not ours to judge
    for p in (stale, live, other):
        p.write_text("partial")
    with atomic_write(tmp_path / "out.csv") as tmp:
        tmp.write_text("row,col\n")
    names = sorted(p.name for p in tmp_path.iterdir())
    assert names == sorted(["out.csv", live.name, other.name])


WRITER = """
import sys
from cloudsieve.journal import Journal
j = Journal(sys.argv[1], 1000)
k = 0
while True:
    e = j.add("cloud" if k % 2 else "clear", [k % 1000, (k * 7) % 1000])
    print(e["id"], flush=True)
    k += 1
"""


def test_journal_survives_sigkill(tmp_path):
    path = tmp_path / "scene.nc.qa.jsonl"
    rng = random.Random(7)
    acknowledged = set()
    for trial in range(5):
        proc = subprocess.Popen([sys.executable, "-c", WRITER, str(path)], stdout=subprocess.PIPE, text=True)
        deadline = time.perf_counter() + rng.uniform(0.8, 2.5)
        while time.perf_counter() < deadline:
            line = proc.stdout.readline()
            if line.strip():
                acknowledged.add(int(line))
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        j = Journal(path, 1000)  # reloading never fails
        ids = {e["id"] for e in j.entries}
        assert acknowledged <= ids, "an acknowledged edit was lost"
    assert len(acknowledged) > 10


def test_torn_last_line_detected(tmp_path):
    path = journal_path(tmp_path / "scene.csv")
    j = Journal(path, 100)
    j.add("cloud", [1, 2, 3])
    j.add("clear", [4])
    with open(path, "ab") as fh:
        fh.write(b'{"id": 3, "time": "2026-12-01T00:00:00Z", "action": "cl')  # a write cut short
    again = Journal(path, 100)
    assert [e["id"] for e in again.active()] == [1, 2]
    assert any("torn last line" in p for p in again.problems)
    again.add("reset", [1])  # appending after a torn line starts on a fresh line
    third = Journal(path, 100)
    assert [e["action"] for e in third.active()] == ["cloud", "clear", "reset"]


def test_undo_and_listing(tmp_path):
    j = Journal(tmp_path / "s.qa.jsonl", 50)
    j.add("cloud", [1, 2])
    j.add("clear", [3])
    assert j.undo()["action"] == "clear"
    assert [(c, a) for _, c, a in j.listing()] == [(2, "cloud")]
    with pytest.raises(Exception, match="out of the scene"):
        j.add("cloud", [50])
    with pytest.raises(Exception, match="unknown QA action"):
        j.add("maybe", [1])
