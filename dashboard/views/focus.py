"""What the analyst points at: the inspected pixel and the current selection.

This is view state, not screening state: it says which pixel the inspector shows and which
pixels the QA buttons would edit. The maps write it, the inspector and the QA panel read it.
Everything that changes the screening goes through :class:`dashboard.model.ScreeningModel`.
"""
import numpy as np
import param


class Focus(param.Parameterized):
    """Inspected pixel and selected pixels of one session (grid indices, 0-based)."""

    pixel = param.Tuple(default=None, allow_None=True, length=2,
                        doc="(y, x) grid indices of the inspected pixel, or None")
    selection = param.Array(default=np.zeros(0, np.int64), doc="Flat indices of the selected pixels")
    outline = param.List(default=[], doc="Outline of the selection as [(x, y), ...] in map coordinates")
    description = param.String(default="", doc="How the selection was made (box/lasso and its extent)")

    def __init__(self, shape, row0=0, col0=0, **params):
        super().__init__(**params)
        self.shape = tuple(shape)
        self.row0, self.col0 = int(row0), int(col0)

    # ------------------------------------------------------------------ conversions
    def pixel_at(self, x, y):
        """Grid indices (y, x) of the map coordinate (column x, row y), or None outside."""
        if x is None or y is None or not (np.isfinite(x) and np.isfinite(y)):
            return None
        j = int(np.floor(x + 0.5)) - self.col0
        i = int(np.floor(y + 0.5)) - self.row0
        ny, nx = self.shape
        return (i, j) if 0 <= i < ny and 0 <= j < nx else None

    def select_box(self, bounds):
        """Select the pixels whose centres lie inside (left, bottom, right, top)."""
        if bounds is None:
            return
        x0, y0, x1, y1 = bounds
        x0, x1 = sorted((x0, x1))
        y0, y1 = sorted((y0, y1))
        ny, nx = self.shape
        j0 = max(int(np.ceil(x0)) - self.col0, 0)
        j1 = min(int(np.floor(x1)) - self.col0, nx - 1)
        i0 = max(int(np.ceil(y0)) - self.row0, 0)
        i1 = min(int(np.floor(y1)) - self.row0, ny - 1)
        if j1 < j0 or i1 < i0:
            idx = np.zeros(0, np.int64)
        else:
            ii, jj = np.meshgrid(np.arange(i0, i1 + 1), np.arange(j0, j1 + 1), indexing="ij")
            idx = (ii * nx + jj).ravel().astype(np.int64)
        desc = (f"box over rows {i0 + self.row0}–{i1 + self.row0}, columns {j0 + self.col0}–{j1 + self.col0}"
                if idx.size else "box between pixel centres")
        self.param.update(selection=idx, outline=[(x0, y0), (x1, y0), (x1, y1), (x0, y1), (x0, y0)],
                          description=desc)

    def select_polygon(self, geometry):
        """Select the pixels whose centres lie inside a lasso polygon [(x, y), ...]."""
        if geometry is None or len(geometry) < 3:
            return
        poly = np.asarray(geometry, dtype=float)
        ny, nx = self.shape
        j0 = max(int(np.ceil(poly[:, 0].min())) - self.col0, 0)
        j1 = min(int(np.floor(poly[:, 0].max())) - self.col0, nx - 1)
        i0 = max(int(np.ceil(poly[:, 1].min())) - self.row0, 0)
        i1 = min(int(np.floor(poly[:, 1].max())) - self.row0, ny - 1)
        if j1 < j0 or i1 < i0:
            idx = np.zeros(0, np.int64)
        else:
            ii, jj = np.meshgrid(np.arange(i0, i1 + 1), np.arange(j0, j1 + 1), indexing="ij")
            inside = points_in_polygon(jj.ravel() + self.col0, ii.ravel() + self.row0, poly)
            idx = (ii.ravel() * nx + jj.ravel())[inside].astype(np.int64)
        closed = [tuple(p) for p in poly] + [tuple(poly[0])]
        self.param.update(selection=idx, outline=closed, description=f"lasso with {len(poly)} vertices")

    def clear_selection(self):
        self.param.update(selection=np.zeros(0, np.int64), outline=[], description="")


def points_in_polygon(x, y, poly):
    """Even–odd rule: which points (x, y) lie inside the polygon (n, 2)."""
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    inside = np.zeros(x.shape, bool)
    px, py = poly[:, 0], poly[:, 1]
    qx, qy = np.roll(px, -1), np.roll(py, -1)
    for ax, ay, bx, by in zip(px, py, qx, qy):
        crosses = (ay > y) != (by > y)
        with np.errstate(divide="ignore", invalid="ignore"):
            xint = ax + (y - ay) * (bx - ax) / (by - ay)
        inside ^= crosses & (x < xint)
    return inside
