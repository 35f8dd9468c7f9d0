"""Soak benchmark: does the dashboard server give back what each browser session took?

Starts ``cloudsieve serve`` (a child process) on a data folder holding one scene — the sample
scene ``night_front`` (300 × 300), or with ``--size N`` that scene tiled to N × N — then opens
``--sessions`` pages one after another in headless Debian chromium, each in a fresh browser
context: load, wait until every map is drawn, close. After each close it records the server's
resident set (psutil), then waits ``--idle`` seconds with no page open (Bokeh drops a closed
session's document after its unused-session lifetime, 15 s by default) and records it again.

Figures: RSS after every session, the least-squares growth per session over the sessions after
the first ``--warmup`` (target ≤ 2 MB per session), and the RSS before and after the idle wait.

    python tests/benchmarks/bench_soak.py [--sessions 32] [--size 0] [--warmup 4] [--idle 60]

The last line printed is one JSON object.
"""
import argparse
import json
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import psutil

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "tests"))
sys.path.insert(0, str(Path(__file__).resolve().parent))
from browser_js import CHROMIUM, CHROMIUM_ARGS, RENDERED  # noqa: E402
from bench_dashboard import SAMPLE, _free_port, tiled_scene, wait_listening  # noqa: E402


def rss_mb(pid):
    return psutil.Process(pid).memory_info().rss / 2**20


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sessions", type=int, default=32)
    ap.add_argument("--size", type=int, default=0, help="tile the sample scene to SIZE × SIZE (0: as it is)")
    ap.add_argument("--warmup", type=int, default=4, help="sessions left out of the growth fit")
    ap.add_argument("--idle", type=float, default=60.0, help="seconds to wait with no page open at the end")
    args = ap.parse_args()
    from playwright.sync_api import sync_playwright

    with tempfile.TemporaryDirectory() as tmp:
        data = Path(tmp) / "scenes"
        data.mkdir()
        if args.size:
            tiled_scene(args.size, data / f"night_front_{args.size}.nc")
        else:
            shutil.copy(SAMPLE, data / SAMPLE.name)
        port = _free_port()
        exe = Path(sys.executable).with_name("cloudsieve")
        server = subprocess.Popen([str(exe), "serve", "--port", str(port), "--data-dir", str(data)],
                                  stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
        url = f"http://127.0.0.1:{port}/"
        rss, times = [], []
        try:
            wait_listening(server, url, time.perf_counter(), limit_s=300)
            rss_start = rss_mb(server.pid)
            with sync_playwright() as p:
                browser = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
                for k in range(args.sessions):
                    t0 = time.perf_counter()
                    context = browser.new_context(viewport={"width": 1680, "height": 1050})
                    page = context.new_page()
                    page.goto(url)
                    page.wait_for_function(RENDERED, arg=6, timeout=300_000, polling=100)
                    context.close()
                    times.append(time.perf_counter() - t0)
                    time.sleep(1.0)
                    rss.append(rss_mb(server.pid))
                    print(f"session {k + 1:3d}: drawn and closed in {times[-1]:5.1f} s, server RSS {rss[-1]:7.0f} MB",
                          flush=True)
                browser.close()
            rss_closed = rss_mb(server.pid)
            time.sleep(args.idle)
            rss_idle = rss_mb(server.pid)
        finally:
            server.send_signal(signal.SIGINT)
            try:
                server.wait(timeout=30)
            except subprocess.TimeoutExpired:
                server.kill()
    x = np.arange(args.warmup + 1, args.sessions + 1)
    slope = float(np.polyfit(x, np.asarray(rss[args.warmup:]), 1)[0]) if x.size >= 2 else float("nan")
    print(f"server RSS: {rss_start:.0f} MB at start, {rss_closed:.0f} MB after {args.sessions} sessions, "
          f"{rss_idle:.0f} MB after {args.idle:.0f} s idle; growth {slope:.2f} MB per session "
          f"(least squares over sessions {args.warmup + 1}–{args.sessions}; target ≤ 2)")
    print(json.dumps({"scene_pixels": (args.size or 300) ** 2, "sessions": args.sessions, "warmup": args.warmup,
                      "rss_start_mb": round(rss_start, 1), "rss_after_sessions_mb": round(rss_closed, 1),
                      "rss_after_idle_mb": round(rss_idle, 1), "growth_mb_per_session": round(slope, 2),
                      "rss_mb": [round(r, 1) for r in rss], "session_s_median": round(float(np.median(times)), 2)}))


if __name__ == "__main__":
    main()
