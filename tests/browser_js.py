"""Browser set-up and Bokeh page probes shared by the browser tests and the dashboard benchmarks.

One copy of each: the chromium launch (Debian's build, see conftest.py) and the JavaScript
predicates that wait for the maps to be drawn or locate a data point on screen.
"""
from pathlib import Path

CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]

#: every map drawn: all figures finished and every image glyph has data (arg: number of maps)
RENDERED = """(n) => {
  if (!window.Bokeh || !Bokeh.index) return false;
  const views = [...Bokeh.index.all_views()];
  const figs = views.filter(v => v.model.type === 'Figure');
  if (figs.length < n || !figs.every(v => v.has_finished())) return false;
  const imgs = views.filter(v => v.model.type === 'GlyphRenderer' && v.model.glyph.type === 'Image');
  return imgs.length >= n && imgs.every(v => {
    const d = v.model.data_source.data.image; return d && d.length > 0; });
}"""

#: screen position of data coordinate (x, y) on the map whose colour bar has this title
SCREEN_XY = """([title, x, y]) => {
  const fig = [...Bokeh.index.all_views()].filter(v => v.model.type === 'Figure').find(
      v => v.model.right.some(r => r.type === 'ColorBar' && r.title === title));
  if (!fig) return null;
  const r = fig.canvas_view.el.getBoundingClientRect();
  return [r.left + fig.frame.x_scale.compute(x), r.top + fig.frame.y_scale.compute(y)];
}"""

#: the eight maps finished and each image covers x0..x1 within tol data units (re-rasterized view)
COVERS = """([x0, x1, tol]) => {
  const figs = [...Bokeh.index.all_views()].filter(v => v.model.type === 'Figure');
  return figs.length >= 8 && figs.every(v => v.has_finished()) && figs.slice(0, 8).every(fig => {
    const img = fig.model.renderers.find(r => r.glyph && r.glyph.type === 'Image');
    const d = img.data_source.data;
    return d.x && Math.abs(d.x[0] - x0) <= tol && Math.abs(d.x[0] + d.dw[0] - x1) <= tol; });
}"""
