"""Benchmark: a large scene in the dashboard, driven in headless chromium.

Writes an N × N, 4-channel NetCDF scene (the sample scene night_front mirror-tiled, as in
bench_scale.py; not timed), starts ``cloudsieve serve SCENE`` and, in Debian's chromium:

1. waits for the first complete render (every map drawn with image data) → ``first_render_s``
   (from starting the server; the scene is loaded, simulated and inverted on the first page);
2. zooms the class map with the mouse wheel and waits until every map holds a new raster of
   the zoomed view → ``zoom_rerender_s``, and checks that the raster covers the zoomed range
   at screen resolution (``reaggregated``: the image spans the new range, not the whole
   scene), then pans by dragging → ``pan_rerender_s``;
3. clicks a pixel and waits for the inspector's heading and its BT–τ curve → ``inspect_s``;
4. samples the resident memory of the server (and any children) every 0.2 s throughout →
   ``server_peak_rss_mb`` (target ≤ 4096 at 4000 × 4000).

Screenshots go to ``--shots`` (default: a temporary folder, kept and printed).

    python tests/benchmarks/bench_dashboard_scale.py [--size 4000] [--shots DIR]

The last line printed is one JSON object.
"""
import argparse
import json
import signal
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import psutil

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_scale import write_tiled  # noqa: E402

from bench_dashboard import _free_port, wait_listening  # noqa: E402
from browser_js import CHROMIUM, CHROMIUM_ARGS, COVERS, RENDERED, SCREEN_XY  # noqa: E402
#: per map (by colour-bar title): visible x range and the first image's extent and raster size
MAP_STATE = """() => [...Bokeh.index.all_views()].filter(v => v.model.type === 'Figure').map(fig => {
  const cb = fig.model.right.find(r => r.type === 'ColorBar');
  const img = fig.model.renderers.find(r => r.glyph && r.glyph.type === 'Image');
  const d = img ? img.data_source.data : null;
  const im = d && d.image && d.image.length ? d.image[0] : null;
  const shape = im && im.shape ? im.shape : (im && im.length ? [im.length, im[0].length] : null);
  return {title: cb ? cb.title : null, x0: fig.model.x_range.start, x1: fig.model.x_range.end,
          y0: fig.model.y_range.start, y1: fig.model.y_range.end,
          ix: d && d.x ? d.x[0] : null, idw: d && d.dw ? d.dw[0] : null, shape: shape};
})"""


class TreeMemory:
    """Peak summed RSS of a process and its children, sampled every 0.2 s."""

    def __init__(self, pid):
        self.proc, self.peak, self._stop = psutil.Process(pid), 0.0, False
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self):
        while not self._stop:
            try:
                total = self.proc.memory_info().rss + sum(c.memory_info().rss for c in self.proc.children(True))
                self.peak = max(self.peak, total / 2**20)
            except psutil.Error:
                pass
            time.sleep(0.2)

    def stop(self):
        self._stop = True
        self._thread.join()
        return self.peak


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--size", type=int, default=4000)
    ap.add_argument("--shots", type=Path, default=None)
    ap.add_argument("--timeout", type=float, default=900, help="seconds allowed for the first render")
    args = ap.parse_args()
    from playwright.sync_api import sync_playwright

    shots = args.shots or Path(tempfile.mkdtemp(prefix="cloudsieve-dash-scale-"))
    shots.mkdir(parents=True, exist_ok=True)
    result = {"size": args.size, "pixels": args.size**2}
    with tempfile.TemporaryDirectory(prefix="cloudsieve-dash-scale-") as tmp:
        scene = Path(tmp) / f"tiled_{args.size}.nc"
        write_tiled(args.size, scene)
        port = _free_port()
        exe = Path(sys.executable).with_name("cloudsieve")
        with sync_playwright() as p:
            browser = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
            page = browser.new_page(viewport={"width": 1680, "height": 1050})
            t0 = time.perf_counter()
            server = subprocess.Popen([str(exe), "serve", str(scene), "--port", str(port)],
                                      stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
            mem = TreeMemory(server.pid)
            try:
                url = f"http://127.0.0.1:{port}/"
                wait_listening(server, url, t0, limit_s=args.timeout)
                page.goto(url, timeout=args.timeout * 1000)
                page.wait_for_function(RENDERED, arg=6, timeout=args.timeout * 1000, polling=200)
                result["first_render_s"] = round(time.perf_counter() - t0, 1)
                print(f"first render of {args.size} × {args.size}: {result['first_render_s']} s after starting "
                      f"the server (peak RSS so far {mem.peak:.0f} MB)", flush=True)
                page.screenshot(path=str(shots / "scale_first.png"))
                before = {m["title"]: m for m in page.evaluate(MAP_STATE)}
                cls = before["class"]
                print("class map before zoom:", cls)
                # zoom: mouse wheel over the class map's centre
                cx, cy = page.evaluate(SCREEN_XY, ["class", args.size / 2, args.size / 2])
                page.mouse.move(cx, cy)
                t = time.perf_counter()
                for _ in range(3):
                    page.mouse.wheel(0, -120)
                page.wait_for_function("""(w) => { const f = [...Bokeh.index.all_views()].find(
                    v => v.model.type === 'Figure'); return f && (f.model.x_range.end - f.model.x_range.start) < w * 0.9; }""",
                                       arg=cls["x1"] - cls["x0"], timeout=60_000)
                zoomed = page.evaluate(MAP_STATE)[0]
                page.wait_for_function(COVERS, arg=[zoomed["x0"], zoomed["x1"], 2], timeout=120_000, polling=100)
                result["zoom_rerender_s"] = round(time.perf_counter() - t, 2)
                after = {m["title"]: m for m in page.evaluate(MAP_STATE)}
                z = after["class"]
                width = z["x1"] - z["x0"]
                result["zoom_factor"] = round((cls["x1"] - cls["x0"]) / width, 2)
                # re-aggregated: the raster now spans the zoomed range only, with finer data pixels
                result["reaggregated"] = bool(abs(z["idw"] - width) <= 2 and width < 0.9 * (cls["x1"] - cls["x0"])
                                              and z["shape"] is not None)
                print(f"zoom ×{result['zoom_factor']}: new rasters in {result['zoom_rerender_s']} s; class map now "
                      f"x {z['x0']:.0f}–{z['x1']:.0f}, raster {z['shape']} over dw {z['idw']:.0f} "
                      f"(before {cls['shape']} over {cls['idw']:.0f})")
                page.screenshot(path=str(shots / "scale_zoomed.png"))
                # pan: drag the class map by a quarter of its width
                page.mouse.move(cx, cy)
                t = time.perf_counter()
                page.mouse.down()
                page.mouse.move(cx - 60, cy, steps=6)
                page.mouse.up()
                page.wait_for_function("""(x0) => { const f = [...Bokeh.index.all_views()].find(
                    v => v.model.type === 'Figure'); return f && Math.abs(f.model.x_range.start - x0) > 1; }""",
                                       arg=z["x0"], timeout=60_000)
                panned = page.evaluate(MAP_STATE)[0]
                page.wait_for_function(COVERS, arg=[panned["x0"], panned["x1"], 2], timeout=120_000, polling=100)
                result["pan_rerender_s"] = round(time.perf_counter() - t, 2)
                print(f"pan: x {panned['x0']:.0f}–{panned['x1']:.0f}, new rasters in {result['pan_rerender_s']} s")
                page.screenshot(path=str(shots / "scale_panned.png"))
                # inspector: click the centre of the visible part of the class map
                row = int(round((panned["y0"] + panned["y1"]) / 2))
                col = int(round((panned["x0"] + panned["x1"]) / 2))
                px, py = page.evaluate(SCREEN_XY, ["class", col, row])
                t = time.perf_counter()
                page.mouse.click(px, py)
                page.get_by_text(f"Pixel row {row}, column {col}").first.wait_for(timeout=120_000)
                page.wait_for_function(RENDERED, arg=7, timeout=120_000, polling=100)  # + the BT-τ curve
                result["inspect_s"] = round(time.perf_counter() - t, 2)
                result["inspected_pixel"] = [row, col]
                print(f"inspector: pixel row {row}, column {col} shown with its curve in {result['inspect_s']} s")
                page.screenshot(path=str(shots / "scale_inspector.png"), full_page=True)
            finally:
                server.send_signal(signal.SIGINT)
                try:
                    server.wait(timeout=30)
                except subprocess.TimeoutExpired:
                    server.kill()
                peak = mem.stop()
                browser.close()
    result["server_peak_rss_mb"] = round(peak)
    print(f"server peak RSS {peak:.0f} MB (target ≤ 4096 MB); screenshots in {shots}")
    print(json.dumps(result))


if __name__ == "__main__":
    main()
