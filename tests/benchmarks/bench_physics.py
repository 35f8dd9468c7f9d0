"""Benchmark of the clear-sky physics hot path (a script, not a test).

Simulates clear-sky brightness temperatures for N pixels × 40 layers (41 levels) × 4 default
channels from surface numbers, in float32 and in chunks of pixels, the way a scene is
processed: ``physics.atmosphere.profile_levels_first`` → ``physics.clearsky.simulate_channel_major``
with ``levels=False``. For this float32 input both run the compiled kernels of
``physics.fused`` (numba; compiled or loaded from numba's cache before any timing); with
``CLOUDSIEVE_PHYSICS=numpy`` in the environment they run the numpy reference path instead,
and ``physics_path`` in the JSON says which ran. It runs once on one thread and once with a 2-thread
``concurrent.futures.ThreadPoolExecutor`` over the chunks (numpy releases the GIL in its
loops), and compares both with a floor: one ``np.exp`` over a float32 array of N×40×4 elements,
about the number of exponentials the transfer step alone needs.

Usage::

    python tests/benchmarks/bench_physics.py [--pixels N] [--chunk C] [--repeats R] [--seed S]

Human-readable lines first; the last line is one JSON object with the figures.

Chunk size: unless ``--chunk`` is given, 512–8192 pixels are tried on a sample and the
fastest is used, separately for one and for two threads (larger chunks amortise the
per-call Python overhead that the two threads contend for under the GIL; chunks of 4096 and
more make multi-megabyte temporaries that glibc's allocator returns to the system and
faults in again on every chunk). Each mode then runs ``--repeats`` times over all pixels and
the best pass counts, which keeps a shared machine's noise out of the figures as far as
possible; ``exp_chunks_speedup_2threads`` shows how much a second thread can give at all.

The exp floor runs in a child process so that its 2 × N×160×4 bytes (1.3 GB at N = 1e6) do
not count in ``peak_rss_mb``, the simulation's own peak resident set;
``peak_rss_mb_with_floor`` is the machine-wide peak of the run (the simulation's peak, or
its resident set while the floor runs plus the floor's peak, whichever is larger).
BLAS is pinned to one thread (unless the environment already says otherwise) so that
"single-threaded" means one core.
"""
import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import concurrent.futures  # noqa: E402
import json  # noqa: E402
import resource  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

N_LEVELS = 41  # 40 layers
CHUNK_CANDIDATES = (512, 1024, 2048, 4096, 8192)


def _peak_rss_mb(who=resource.RUSAGE_SELF):
    return resource.getrusage(who).ru_maxrss / 1024.0  # Linux reports KiB


def _current_rss_mb():
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20


# ---------------------------------------------------------------------------------------
# exp floor (child process)
# ---------------------------------------------------------------------------------------
def exp_floor(n_elements, seed, repeats=3):
    """Best-of-``repeats`` time of np.exp over n float32 values, input and output preallocated."""
    rng = np.random.default_rng(seed)
    x = rng.random(n_elements, dtype=np.float32)
    x *= np.float32(-3.0)  # slant optical depths of a few: a representative exp argument
    y = np.empty_like(x)
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        np.exp(x, out=y)
        best = min(best, time.perf_counter() - t0)
    return {"exp_floor_s": best, "exp_floor_rss_mb": _peak_rss_mb(), "elements": n_elements}


def run_exp_floor_in_child(n_elements, seed):
    out = subprocess.run(
        [sys.executable, os.path.abspath(__file__), "--exp-floor-only", str(n_elements), "--seed", str(seed)],
        check=True, capture_output=True, text=True,
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


# ---------------------------------------------------------------------------------------
# simulation
# ---------------------------------------------------------------------------------------
def make_inputs(n_pixels, n_channels, seed):
    """Seeded random surface numbers, float32, pixel axis last. Ranges are typical of
    global ocean scenes (air 245–305 K, 0.5–60 kg m⁻², skin within a few K of the air,
    view zenith 0–65°, sea emissivity 0.96–0.995)."""
    rng = np.random.default_rng(seed)
    f = np.float32
    t_air = rng.uniform(245.0, 305.0, n_pixels).astype(f)
    tcwv = rng.uniform(0.5, 60.0, n_pixels).astype(f)
    surface_pressure = np.full(n_pixels, 1013.25, dtype=f)
    t_skin = (t_air + rng.normal(0.5, 1.5, n_pixels)).astype(f)
    zenith = rng.uniform(0.0, 65.0, n_pixels).astype(f)
    emissivity = rng.uniform(0.96, 0.995, (n_channels, n_pixels)).astype(f)
    return t_air, tcwv, surface_pressure, t_skin, zenith, emissivity


def make_chunk_runner(inputs, channels, coefficients, out):
    from physics.atmosphere import profile_levels_first
    from physics.clearsky import simulate_channel_major

    t_air, tcwv, ps, t_skin, zenith, emissivity = inputs

    def run(start, stop):
        p, t, q = profile_levels_first(t_air[start:stop], tcwv[start:stop], ps[start:stop],
                                       n_levels=N_LEVELS, dtype=np.float32)
        res = simulate_channel_major(p, t, q, t_skin[start:stop], emissivity[:, start:stop], zenith[start:stop],
                                     channels, coefficients, levels=False)
        out[:, start:stop] = res.brightness_temperature

    return run


def chunk_bounds(n_pixels, chunk):
    return [(s, min(s + chunk, n_pixels)) for s in range(0, n_pixels, chunk)]


def run_serial(run, bounds):
    t0 = time.perf_counter()
    for start, stop in bounds:
        run(start, stop)
    return time.perf_counter() - t0


def run_threads(run, bounds, workers=2):
    with concurrent.futures.ThreadPoolExecutor(max_workers=workers) as pool:
        t0 = time.perf_counter()
        for _ in pool.map(lambda b: run(*b), bounds):
            pass
        return time.perf_counter() - t0


def thread_scaling_control(chunk, n_chunks, n_per_pixel, repeats=3):
    """Speed-up of 2 threads for plain GIL-releasing numpy work of the same granularity:
    np.exp over chunk × n_per_pixel float32 values, n_chunks times. Tells whether the
    machine has two free cores to give (a busy or shared machine does not)."""
    x = np.linspace(-3.0, 0.0, chunk * n_per_pixel, dtype=np.float32)
    outs = [np.empty_like(x) for _ in range(2)]

    def one(i):
        np.exp(x, out=outs[i % 2])

    serial = min(run_serial(lambda a, b: one(a), [(i, 0) for i in range(n_chunks)]) for _ in range(repeats))
    threads = min(run_threads(lambda a, b: one(a), [(i, 0) for i in range(n_chunks)]) for _ in range(repeats))
    return serial / threads


def pick_chunks(run, n_pixels, candidates=CHUNK_CANDIDATES, sample=131_072, repeats=3):
    """Fastest chunk size for one thread and for two, on the first ``sample`` pixels.

    After a warm-up pass, each candidate runs ``repeats`` times in each mode and the best
    time counts, so that a busy machine does not decide. Returns the two chosen sizes and
    the timings [µs per pixel] per mode and candidate.
    """
    n = min(n_pixels, sample)
    run_serial(run, chunk_bounds(n, candidates[0]))  # warm-up: imports, caches, allocator
    timings = {"1": {}, "2": {}}
    for chunk in candidates:
        bounds = chunk_bounds(n, chunk)
        timings["1"][chunk] = min(run_serial(run, bounds) for _ in range(repeats)) / n * 1e6
        timings["2"][chunk] = min(run_threads(run, bounds) for _ in range(repeats)) / n * 1e6
    best = {mode: min(t, key=t.get) for mode, t in timings.items()}
    return best["1"], best["2"], timings


def sigma_stage(n_pix):
    """Time the screening's per-pixel clear-sky σ (cloudsieve.uncertainty.clear_sky_sigma: Jacobians
    per bin of background state) against the clear-sky simulation of the same columns, both on
    2 threads, on ``n_pix`` pixels tiled from the sample scene ``night_front`` (its smooth and
    pixel-to-pixel background errors decide how many bins there are)."""
    from pathlib import Path

    import xarray as xr

    from cloudsieve.config import load_config
    from cloudsieve.simulate import ChannelSet, gather_columns, simulate_columns, surface_emissivity
    from cloudsieve.uncertainty import clear_sky_sigma

    root = Path(__file__).resolve().parents[2]
    ds = xr.open_dataset(root / "sample_scenes" / "night_front.nc").load()
    reps = int(np.ceil(n_pix / ds.sizes["y"] / ds.sizes["x"]))
    fields = {k: np.tile(ds[k].values.ravel(), reps)[:n_pix][None, :]
              for k in ("t_air", "tcwv", "p_surf", "t_skin", "sat_zenith", "surface")}
    cfg = load_config()
    cfg["simulation"]["threads"] = 2
    names = ("3p9um", "8p6um", "11um", "12um")
    chset = ChannelSet.for_scene(names, cfg)
    idx = np.arange(n_pix)
    cols = gather_columns(fields, surface_emissivity(fields, chset, cfg), idx)
    t_sim = t_sig = np.inf
    for _ in range(3):  # interleaved, the best of three each: the ratio is read in one run
        t0 = time.perf_counter()
        simulate_columns(cols, chset, cfg["simulation"], threads=2)
        t_sim = min(t_sim, time.perf_counter() - t0)
        t0 = time.perf_counter()
        sig = clear_sky_sigma(cols, fields["surface"].ravel(), chset, cfg, threads=2)
        t_sig = min(t_sig, time.perf_counter() - t0)
    print(f"clear-sky σ of {n_pix:,} night_front pixels: {t_sig:.3f} s for {sig.bins:,} bins of background state, "
          f"against {t_sim:.3f} s for their simulation (2 threads, best of 3 each): σ adds {100 * t_sig / t_sim:.0f} %")
    return {"sigma_pixels": n_pix, "sigma_s_2threads": round(t_sig, 4), "sigma_bins": sig.bins,
            "sigma_simulate_s_2threads": round(t_sim, 4), "sigma_over_simulate": round(t_sig / t_sim, 3)}


def inversion_stage(n_pix, chunk=65_536):
    """Time the single-layer cloud inversion (cloudsieve.invert.invert_columns: auto phase — ice,
    large-crystal and water optics — the consistent χ² top, the clear-sky error correlation) of
    ``n_pix`` flagged pixels, tiled from the pixels the screening flags (marginal or cloud) in
    the sample scene ``night_front``, in chunks of ``chunk`` as the pipeline runs it; the
    compiled kernels on 2 and on 1 thread, and the numpy reference (``CLOUDSIEVE_PHYSICS=numpy``)
    on one chunk for the ratio. The inputs are those invert_columns receives from the scene
    pipeline (recorded from one call of cloudsieve.invert.invert_all)."""
    from pathlib import Path

    from cloudsieve import invert
    from cloudsieve.codes import CLEAR, NO_DATA
    from cloudsieve.session import Session
    from physics import cloud_kernel, fused

    root = Path(__file__).resolve().parents[2]
    session = Session.open(root / "sample_scenes" / "night_front.nc", journal=False)
    mask = session.result.mask
    flagged = (mask != CLEAR) & (mask != NO_DATA)
    calls = []
    orig = invert.invert_columns
    invert.invert_columns = lambda *a, **k: calls.append((a, k)) or orig(*a, **k)
    try:
        invert.invert_all(session.scene, session.sim, session.config, session.sim.sigma, only=flagged)
    finally:
        invert.invert_columns = orig
    per_pixel = (0, 1, 2, 3, 4, 5, 6)  # obs, clear, level p, level T, opaque radiance, zenith, σ
    base = [np.concatenate([np.asarray(c[0][j]) for c in calls]) for j in per_pixel]
    extra = {key: np.concatenate([np.asarray(c[1][key]) for c in calls]) for key in ("night_contrast",
                                                                                      "clear_correlation")}
    chans, inv, cfg = calls[0][0][7:10]
    n_base = base[0].shape[0]
    cloud_kernel.warm_up()

    def run(n, threads):
        fused.numba.set_num_threads(threads)
        total = 0.0
        for start in range(0, n, chunk):
            idx = np.arange(start, min(n, start + chunk)) % n_base
            args = [a[idx] for a in base]
            t0 = time.perf_counter()
            invert.invert_columns(*args, chans, inv, cfg, **{k: v[idx] for k, v in extra.items()})
            total += time.perf_counter() - t0
        return total

    run(min(n_pix, chunk), 2)  # first call: kernels loaded
    t2 = min(run(n_pix, 2) for _ in range(2))
    t1 = run(n_pix, 1)
    fused.numba.set_num_threads(fused.numba.config.NUMBA_NUM_THREADS)
    n_ref = min(n_pix, chunk)
    os.environ["CLOUDSIEVE_PHYSICS"] = "numpy"
    try:
        t_ref = run(n_ref, 1)
    finally:
        del os.environ["CLOUDSIEVE_PHYSICS"]
    t_com = run(n_ref, 1)
    print(f"cloud inversion of {n_pix:,} flagged pixels ({n_base:,} distinct, night_front): {t2:.2f} s on 2 threads "
          f"({1e6 * t2 / n_pix:.2f} µs per pixel), {t1:.2f} s on 1 thread; numpy reference on {n_ref:,}: "
          f"{t_ref:.2f} s against {t_com:.2f} s compiled (1 thread), {t_ref / t_com:.1f} x")
    return {"invert_pixels": n_pix, "invert_s_2threads": round(t2, 3), "invert_s": round(t1, 3),
            "invert_us_per_pixel_2threads": round(1e6 * t2 / n_pix, 3),
            "invert_numpy_over_compiled": round(t_ref / t_com, 2)}


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--pixels", type=int, default=1_000_000, help="number of pixel columns (default 1e6)")
    parser.add_argument("--chunk", type=int, default=None,
                        help="pixels per chunk in both modes (default: the fastest measured for each mode)")
    parser.add_argument("--seed", type=int, default=20240601, help="random seed of the inputs")
    parser.add_argument("--repeats", type=int, default=5,
                        help="passes of each mode over all pixels; the best counts (default 5)")
    parser.add_argument("--exp-floor-only", type=int, default=None, metavar="N_ELEMENTS", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)

    if args.exp_floor_only is not None:
        print(json.dumps(exp_floor(args.exp_floor_only, args.seed)))
        return

    wall0 = time.perf_counter()
    import tomllib
    from importlib import resources

    from physics import fused
    from physics.absorption import channel_coefficients
    from physics.channels import default_channels

    fused.warm_up()  # compile (first run on a machine) or load the kernels: not part of any timing

    with resources.files("physics").joinpath("data/absorption.toml").open("rb") as fh:
        table = tomllib.load(fh)
    channels = list(default_channels().values())
    coefficients = channel_coefficients(channels, table)
    n_ch, n_pix, n_lay = len(channels), args.pixels, N_LEVELS - 1

    inputs = make_inputs(n_pix, n_ch, args.seed)
    bt_serial = np.empty((n_ch, n_pix), dtype=np.float32)
    bt_threads = np.empty((n_ch, n_pix), dtype=np.float32)
    run_serial_chunk = make_chunk_runner(inputs, channels, coefficients, bt_serial)
    run_thread_chunk = make_chunk_runner(inputs, channels, coefficients, bt_threads)

    if args.chunk is None:
        chunk, chunk2, chunk_timings = pick_chunks(run_serial_chunk, n_pix)
        for mode, chosen in (("1", chunk), ("2", chunk2)):
            print(f"chunk sizes tried (µs per pixel, {mode} thread{'s' if mode == '2' else ''}): "
                  + ", ".join(f"{c}: {t:.3f}" for c, t in chunk_timings[mode].items()) + f" -> using {chosen}")
    else:
        chunk = chunk2 = args.chunk
        chunk_timings = {}
    bounds, bounds2 = chunk_bounds(n_pix, chunk), chunk_bounds(n_pix, chunk2)

    serial_times = [run_serial(run_serial_chunk, bounds) for _ in range(args.repeats)]
    thread_times = [run_threads(run_thread_chunk, bounds2, workers=2) for _ in range(args.repeats)]
    t_serial, t_threads = min(serial_times), min(thread_times)
    if not np.array_equal(bt_serial, bt_threads, equal_nan=True):
        raise RuntimeError("threaded and serial runs disagree")
    finite = np.isfinite(bt_serial)
    peak_sim = _peak_rss_mb()
    control = thread_scaling_control(chunk2, len(bounds2), n_lay * n_ch)

    print(f"pixels {n_pix}, layers {n_lay}, channels {n_ch}, float32, chunks of {chunk} pixels "
          f"({len(bounds)} chunks) on 1 thread, of {chunk2} pixels ({len(bounds2)} chunks) on 2 threads")
    print(f"1 thread : {t_serial:8.3f} s  {n_pix / t_serial:12,.0f} pixels/s  "
          f"(best of {args.repeats}: " + ", ".join(f"{t:.3f}" for t in serial_times) + " s)")
    print(f"2 threads: {t_threads:8.3f} s  {n_pix / t_threads:12,.0f} pixels/s  "
          f"(best of {args.repeats}: " + ", ".join(f"{t:.3f}" for t in thread_times) + " s; "
          f"speed-up {t_serial / t_threads:.2f}x, results identical)")
    print(f"control: np.exp over the same chunks, 2 threads vs 1: speed-up {control:.2f}x "
          "(the machine's capacity for two threads)")
    print(f"brightness temperatures: {finite.mean() * 100:.1f} % finite, "
          f"mean per channel " + ", ".join(f"{c.name} {m:.2f} K" for c, m in
                                          zip(channels, np.nanmean(bt_serial, axis=1))))
    print(f"simulation peak RSS: {peak_sim:.0f} MB")

    del inputs, bt_serial, bt_threads, run_serial_chunk, run_thread_chunk
    rss_before_floor = _current_rss_mb()
    n_exp = n_pix * n_lay * n_ch
    floor = run_exp_floor_in_child(n_exp, args.seed)
    exp_s = floor["exp_floor_s"]
    peak_with_floor = max(peak_sim, rss_before_floor + floor["exp_floor_rss_mb"])
    print(f"exp floor: np.exp over {n_exp:,} float32 (preallocated in/out, best of 3, separate process): "
          f"{exp_s:.3f} s, that process's peak RSS {floor['exp_floor_rss_mb']:.0f} MB")
    print(f"ratio to exp floor: 1 thread {t_serial / exp_s:.2f}, 2 threads {t_threads / exp_s:.2f}")

    sigma = sigma_stage(n_pix)
    inversion = inversion_stage(n_pix)
    wall = time.perf_counter() - wall0
    result = {
        "pixels": n_pix,
        "layers": n_lay,
        "levels": N_LEVELS,
        "channels": n_ch,
        "dtype": "float32",
        "chunk": chunk,
        "chunk_2threads": chunk2,
        "chunk_us_per_pixel": {mode: {str(k): round(v, 4) for k, v in t.items()} for mode, t in chunk_timings.items()},
        "repeats": args.repeats,
        "simulate_s": round(t_serial, 4),
        "simulate_s_2threads": round(t_threads, 4),
        "pixels_per_s": round(n_pix / t_serial),
        "pixels_per_s_2threads": round(n_pix / t_threads),
        "exp_chunks_speedup_2threads": round(control, 3),
        "exp_floor_s": round(exp_s, 4),
        "ratio_to_exp_floor": round(t_serial / exp_s, 3),
        "ratio_to_exp_floor_2threads": round(t_threads / exp_s, 3),
        "peak_rss_mb": round(peak_sim, 1),
        "exp_floor_rss_mb": round(floor["exp_floor_rss_mb"], 1),
        "peak_rss_mb_with_floor": round(peak_with_floor, 1),
        "finite_fraction": round(float(finite.mean()), 6),
        "wall_s": round(wall, 3),
        **sigma,
        **inversion,
        "physics_path": "compiled" if fused.enabled() else "numpy",
        "numpy": np.__version__,
        "cpu_count": os.cpu_count(),
    }
    print(json.dumps(result))


if __name__ == "__main__":
    main()
