"""Benchmark: screen a 1000 × 1000, 4-channel scene from Parquet to NetCDF with the CLI.

Builds the scene by tiling the invented sample scene ``night_front`` (mirrored so the tiles
join smoothly), writes it as Parquet in a temporary folder (not timed), then runs
``cloudsieve screen scene.parquet --out mask.nc`` in a child process and measures its wall
time and peak resident memory. Targets (2-core machine): wall_s ≤ 15, peak_rss_mb ≤ 3072.
The command's ``--timings`` line gives the stages: start-up, imports, reading and checking,
each block stage in seconds summed over the threads (simulate, σ, screen, invert, encode),
writing, and the exit (wall time after the command's own last figure).

    python tests/benchmarks/bench_screening.py [--size 1000] [--no-timings]

The last line printed is one JSON object.
"""
import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import xarray as xr

ROOT = Path(__file__).resolve().parents[2]


def tiled_scene(size):
    ds = xr.open_dataset(ROOT / "sample_scenes" / "night_front.nc").load()
    reps = -(-size // ds.sizes["y"]) + 1

    def tile(a):
        row = np.concatenate([a if k % 2 == 0 else a[:, ::-1] for k in range(reps)], axis=1)
        full = np.concatenate([row if k % 2 == 0 else row[::-1, :] for k in range(reps)], axis=0)
        return full[:size, :size]

    r, c = np.meshgrid(np.arange(size), np.arange(size), indexing="ij")
    cols = {"row": r.ravel().astype(np.int32), "col": c.ravel().astype(np.int32)}
    for name in ("lat", "lon", "bt_3p9um", "bt_8p6um", "bt_11um", "bt_12um", "t_skin", "t_air", "tcwv",
                 "sat_zenith", "sol_zenith", "p_surf"):
        cols[name] = tile(ds[name].values).ravel().astype(np.float32)
    import pandas as pd

    df = pd.DataFrame(cols)
    df["surface"] = "sea"
    return df


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--size", type=int, default=1000)
    ap.add_argument("--no-timings", action="store_true",
                    help="do not ask for the stage breakdown (code from before the --timings option)")
    args = ap.parse_args()
    # the command as `python -m cloudsieve.cli` of this interpreter: the same entry for any
    # checkout on PYTHONPATH (a before/after comparison runs both through it)
    cmd = [sys.executable, "-m", "cloudsieve.cli"]
    with tempfile.TemporaryDirectory() as tmp:
        scene = Path(tmp) / "bench_scene.parquet"
        df = tiled_scene(args.size)
        df.to_parquet(scene)
        n = len(df)
        del df
        print(f"scene: {args.size} × {args.size} = {n} pixels, 4 channels, {scene.stat().st_size / 1e6:.1f} MB Parquet")
        out = Path(tmp) / "mask.nc"
        t0 = time.perf_counter()
        proc = subprocess.run(cmd + ["screen", str(scene), "--out", str(out), "--quiet"]
                              + ([] if args.no_timings else ["--timings"]), capture_output=True, text=True)
        wall = time.perf_counter() - t0
        if proc.returncode != 0:
            print(proc.stderr)
            raise SystemExit(proc.returncode)
        peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0
        size_mb = out.stat().st_size / 1e6
        ds = xr.open_dataset(out)
        frac = {k: float(np.mean(ds["mask"].values == i)) for i, k in enumerate(("clear", "marginal", "cloud", "no_data"))}
    stages = next((json.loads(line.split("timings: ", 1)[1]) for line in proc.stderr.splitlines()
                   if line.startswith("timings: ")), {})
    print(f"wall time {wall:.2f} s (target ≤ 15), peak RSS {peak:.0f} MB (target ≤ 3072), "
          f"{n / wall:,.0f} pixels/s, output {size_mb:.1f} MB, classes {frac}")
    if stages:
        threads = stages.get("threads", 1)
        print(f"stages: start-up {stages['startup']:.2f} s, imports {stages['imports']:.2f} s, read+check "
              f"{stages['read_check']:.2f} s; blocks {stages['blocks_wall']:.2f} s wall on {threads} thread(s), of "
              f"which (seconds summed over threads) simulate {stages['simulate']:.2f}, σ {stages['sigma']:.2f}, "
              f"screen {stages['screen']:.2f}, invert {stages['invert']:.2f}, encode {stages['encode']:.2f}; "
              f"write {stages['write']:.2f} s; exit {wall - stages['process_age']:.2f} s"
              if stages.get("process_age") is not None else f"stages: {stages}")
    print(json.dumps({"pixels": n, "pixels_per_s": round(n / wall), "peak_rss_mb": round(peak), "wall_s": round(wall, 2),
                      "cpu_count": os.cpu_count(), "stages": stages}))


if __name__ == "__main__":
    main()
