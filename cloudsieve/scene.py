"""Scene files in, one validated xarray Dataset out — in memory or lazily, for every size.

A scene is a grid of pixels with observed window-channel brightness temperatures and a
background state. Tables (CSV, Parquet) hold one row per pixel with integer grid positions
``row``/``col``; NetCDF holds the same names as 2-D variables on dimensions (y, x). Either
way the result is one :class:`xarray.Dataset` on (y, x) plus a :class:`Report` that lists every
problem found, each with what to do about it.

One reader and one validator serve every scene size:

* ``chunk_rows=None`` (in memory): the Dataset holds numpy arrays; grids above
  :data:`MAX_PIXELS` are refused.
* ``chunk_rows=N`` (lazy): the same Dataset, but its (y, x) variables are dask arrays chunked
  ``{"y": N, "x": -1}``. NetCDF is opened lazily through xarray and never loaded whole;
  Parquet is read batch by batch (row group by row group) with pyarrow into numpy grids that
  are then wrapped as dask arrays; CSV (meant for small scenes) is read as in memory and
  wrapped.

Tables go through one table-to-grid function on both paths (non-numeric cells, duplicate
header names or positions, ragged grids, fractional positions, text surface codes). The
validator computes every statistic it needs (finite counts, values out of range, minima and
maxima, °C and unit tests by counts, infinite values, surface codes, the saturation cap) as
numpy or dask reductions evaluated in one ``dask.compute`` on the threaded scheduler, so both
paths give the same report, word for word, and the same Dataset.

Missing values (empty cells, NaN, ±inf) never fail a scene: those pixels become ``no_data``.
Problems that make the whole scene untrustworthy (missing columns, text in numeric
columns, °C instead of K, impossible values, duplicate positions, unknown channels) are
errors and stop the run with one report.
"""
import difflib
import re
import uuid
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from .codes import SURFACE_CODES
from .errors import SceneError

#: Columns every scene needs (besides at least one bt_<channel>)
REQUIRED = ("row", "col", "t_skin", "t_air", "tcwv", "sat_zenith")

#: Scene columns: name -> (unit, required, meaning, valid range or None)
COLUMNS = {
    "row": ("1", "yes", "grid row index (integer ≥ 0)", None),
    "col": ("1", "yes", "grid column index (integer ≥ 0)", None),
    "lat": ("degrees_north", "no", "latitude of the pixel centre", (-90.0, 90.0)),
    "lon": ("degrees_east", "no", "longitude of the pixel centre", (-180.0, 360.0)),
    "bt_<ch>": ("K", "≥ 1 channel", "observed brightness temperature of channel <ch> (3p9um, 8p6um, 11um, 12um, or one defined in the config)", (150.0, 350.0)),
    "t_skin": ("K", "yes", "background surface skin temperature", (180.0, 350.0)),
    "t_air": ("K", "yes", "background near-surface (2 m) air temperature", (180.0, 340.0)),
    "tcwv": ("kg m-2", "yes", "background total column water vapour (= precipitable water in mm)", (0.0, 90.0)),
    "sat_zenith": ("degree", "yes", "satellite (viewing) zenith angle at the pixel", (0.0, 80.0)),
    "sol_zenith": ("degree", "no", "solar zenith angle; > 90 is night (3.9 µm usable). Missing: computed from a NetCDF scene's time and lat/lon, else taken as day", (0.0, 180.0)),
    "p_surf": ("hPa", "no", "surface pressure; missing: 1013.25", (300.0, 1100.0)),
    "surface": ("text", "no", "sea, land or ice (NetCDF: 0, 1, 2); missing: sea", None),
    "emis_<ch>": ("1", "no", "surface emissivity of channel <ch>; overrides the surface-type default", (0.5, 1.0)),
    "bt_clear_<ch>": ("K", "no", "your own clear-sky brightness temperature of <ch>; used instead of the simulation", (150.0, 350.0)),
}

_RANGES = {k: v[3] for k, v in COLUMNS.items() if v[3] is not None}
_TEMPERATURE_LIKE = ("t_skin", "t_air")
_BACKGROUND = ("t_skin", "t_air", "tcwv", "sat_zenith")
MAX_PIXELS = 25_000_000  # in-memory limit; larger grids go through the chunked path (chunk_rows)
_P_SURF_DEFAULT = 1013.25  # hPa, where a scene gives no surface pressure
_BATCH_ROWS = 1 << 18  # table rows per Parquet batch on both paths (bounded memory)
_MISSING_TEXT = ["", "nan", "na", "n/a", "null", "none", "-", "inf", "-inf", "+inf"]


@dataclass
class Problem:
    """One finding of the validation."""

    severity: str  # "error" | "warning"
    what: str
    fix: str

    def __str__(self):
        return f"{self.severity.upper()}: {self.what} → {self.fix}"


def _count(n, noun):
    """'1 pixel', '2 pixels' (with thousands separators)."""
    return f"{n:,} {noun}" + ("" if n == 1 else "s")


@dataclass
class Report:
    """Everything the validation found in a scene."""

    source: str
    problems: list = field(default_factory=list)
    n_pixels: int = 0
    n_no_data: int = 0
    channels: tuple = ()
    shape: tuple = (0, 0)

    @property
    def errors(self):
        return [p for p in self.problems if p.severity == "error"]

    @property
    def warnings(self):
        return [p for p in self.problems if p.severity == "warning"]

    @property
    def ok(self):
        return not self.errors

    def error(self, what, fix):
        self.problems.append(Problem("error", what, fix))

    def warn(self, what, fix):
        self.problems.append(Problem("warning", what, fix))

    def text(self):
        head = f"Scene {self.source}: "
        if self.ok:
            head += (f"usable. {self.shape[0]} × {self.shape[1]} grid, {self.n_pixels:,} pixels, channels "
                     f"{', '.join(self.channels) or 'none'}; {_count(self.n_no_data, 'pixel')} without complete "
                     f"data (no_data).")
        else:
            head += f"NOT usable: {_count(len(self.errors), 'error')} to fix."
        lines = [head]
        for p in self.errors + self.warnings:
            lines.append(f"  {p}")
        return "\n".join(lines)

    def raise_if_errors(self):
        if not self.ok:
            raise SceneError(self.text())


@dataclass
class Scene:
    """A loaded scene: the gridded data, its channels and the validation report.

    ``data`` holds numpy arrays when the scene was read in memory and dask arrays chunked
    along y when it was opened with ``chunk_rows``; ``None`` when the report has errors.
    """

    data: xr.Dataset
    channels: tuple
    report: Report
    path: Path = None
    name: str = ""

    @property
    def shape(self):
        return self.data.sizes["y"], self.data.sizes["x"]


# ---------------------------------------------------------------------------------------
# formats
# ---------------------------------------------------------------------------------------
_TABLE_EXT = {".csv": "csv", ".txt": "csv", ".parquet": "parquet", ".pq": "parquet"}
_NC_EXT = {".nc": "netcdf", ".nc4": "netcdf", ".netcdf": "netcdf", ".cdf": "netcdf"}


def human_count(n):
    """A pixel count in words: 1.6 billion, 25 million, 900 thousand, 512."""
    for size, word in ((1e9, "billion"), (1e6, "million"), (1e3, "thousand")):
        if n >= size:
            return f"{n / size:.3g} {word}"
    return f"{int(n)}"


def _too_many(ny, nx):
    """Words for a grid above the in-memory limit (checked before any value is read)."""
    return (f"{ny} × {nx} = {human_count(ny * nx)} pixels, more than the in-memory limit of "
            f"{human_count(MAX_PIXELS)}")


def scene_format(path):
    """'csv', 'parquet' or 'netcdf' from the file extension; SceneError otherwise."""
    ext = Path(path).suffix.lower()
    fmt = _TABLE_EXT.get(ext) or _NC_EXT.get(ext)
    if fmt is None:
        raise SceneError(f"'{Path(path).name}': unknown scene format '{ext or '(no extension)'}'. "
                         "Use a .csv, .parquet or .nc file (see the scene format table in the README).")
    return fmt


def grid_size(path):
    """Number of grid positions (ny × nx) of a scene file, where the file tells it cheaply.

    Parameters
    ----------
    path : str or Path
        A .parquet or .nc scene (CSV scenes are small and are not looked into).

    Returns
    -------
    int or None
        Pixels [1]; ``None`` for CSV, for unreadable files (the reader then reports the
        problem) and for Parquet files without row/col statistics, where the number of table
        rows is returned instead.
    """
    try:
        fmt = scene_format(path)
        if fmt == "netcdf":
            with _open_netcdf(path) as ds:
                if "y" in ds.sizes and "x" in ds.sizes:
                    return int(ds.sizes["y"] * ds.sizes["x"])
                twod = [v for v in ds.data_vars.values() if v.ndim == 2]
                return int(np.prod(twod[0].shape)) if twod else None
        if fmt == "parquet":
            import pyarrow.parquet as pq

            meta = pq.ParquetFile(path).metadata
            names = [meta.schema.column(i).name for i in range(meta.num_columns)]
            if "row" not in names or "col" not in names:
                return None
            ext = {}
            for key in ("row", "col"):
                i = names.index(key)
                lo = hi = None
                for g in range(meta.num_row_groups):
                    st = meta.row_group(g).column(i).statistics
                    if st is None or not st.has_min_max:
                        return int(meta.num_rows)
                    lo = st.min if lo is None else min(lo, st.min)
                    hi = st.max if hi is None else max(hi, st.max)
                if lo is None:
                    return int(meta.num_rows)
                ext[key] = int(hi) - int(lo) + 1
            return ext["row"] * ext["col"]
    except Exception:  # noqa: BLE001 — any problem is reported by the reader itself
        return None
    return None


# ---------------------------------------------------------------------------------------
# arrays: numpy in memory, dask when chunked
# ---------------------------------------------------------------------------------------
def _as_dask(arr, chunk_rows):
    """Wrap a numpy array on (y, ...) as a dask array of ``chunk_rows`` rows per chunk.

    Like ``dask.array.from_array`` for numpy input, but the chunks are views of ``arr``
    (no copy of the whole array).
    """
    import dask.array as da
    from dask.array.core import normalize_chunks

    chunks = normalize_chunks((chunk_rows,) + (-1,) * (arr.ndim - 1), arr.shape, dtype=arr.dtype)
    name = f"cloudsieve-grid-{uuid.uuid4().hex}"
    starts = np.cumsum((0,) + chunks[0])
    dsk = {(name, k) + (0,) * (arr.ndim - 1): arr[starts[k]:starts[k + 1]] for k in range(len(chunks[0]))}
    return da.Array(dsk, name, chunks, dtype=arr.dtype, meta=np.empty((0,) * arr.ndim, arr.dtype))


def _full(shape, value, dtype, chunk_rows):
    """A constant grid: numpy in memory, dask chunked along y when ``chunk_rows`` is set."""
    if chunk_rows is None:
        return np.full(shape, value, dtype)
    import dask.array as da

    return da.full(shape, value, dtype=dtype, chunks=(chunk_rows,) + tuple(shape[1:]))


def _is_dask(a):
    return hasattr(a, "dask") and hasattr(a, "chunks") and not isinstance(a, np.ndarray)


def _blockwise(fn, dtype, *arrays):
    """``fn`` on numpy arrays, or block by block on dask arrays of the same chunks."""
    if any(_is_dask(a) for a in arrays):
        import dask.array as da

        return da.map_blocks(fn, *arrays, dtype=dtype)
    return fn(*arrays)


# ---------------------------------------------------------------------------------------
# tables (CSV, Parquet): one table-to-grid function for both formats and both paths
# ---------------------------------------------------------------------------------------
def _read_csv(path, report):
    """Read a CSV scene as a table of text cells (every format problem a SceneError)."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(4096)
    except OSError as exc:
        raise SceneError(f"cannot read '{path}': {exc.strerror}. Check the path and its permissions.") from None
    if not head.strip():
        raise SceneError(f"'{Path(path).name}' is empty. Export the scene table again (header line plus one row per pixel).")
    if b"\x00" in head:
        raise SceneError(f"'{Path(path).name}' is not a text table (it holds binary bytes). "
                         "Give a CSV text file, or a .parquet / .nc file with the matching extension.")
    try:
        first = head.decode("utf-8").splitlines()[0]
    except UnicodeDecodeError:
        raise SceneError(f"'{Path(path).name}' is not UTF-8 text. Save the table as UTF-8 CSV.") from None
    header = [h.strip().strip('"').lstrip("\ufeff") for h in first.split(",")]
    dupes = sorted({h for h in header if header.count(h) > 1 and h})
    if dupes:
        raise SceneError(f"'{Path(path).name}': column(s) {', '.join(dupes)} appear more than once in the header. "
                         "Keep one of each (rename the other if it is a different quantity).")
    if "," not in first:
        sep = next((s for s in (";", "\t", "|") if s in first), None)
        if sep is not None:
            name = {";": "semicolons", "\t": "tabs", "|": "vertical bars"}[sep]
            raise SceneError(f"'{Path(path).name}' separates columns with {name}; cloudsieve reads comma-separated "
                             "tables. Re-export with commas (e.g. pandas: df.to_csv(path, index=False)).")
    import warnings

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", pd.errors.ParserWarning)
            df = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True, index_col=False,
                             on_bad_lines="error", encoding="utf-8-sig")
    except (pd.errors.ParserError, pd.errors.ParserWarning, UnicodeDecodeError, ValueError) as exc:
        msg = str(exc).splitlines()[0]
        raise SceneError(f"'{Path(path).name}' is not a well-formed CSV table ({msg}). "
                         "Every row must have the same number of comma-separated fields as the header.") from None
    if len(df) == 0:
        raise SceneError(f"'{Path(path).name}' has a header but no pixel rows. Add one row per pixel.")
    return df


class _CsvTable:
    """A CSV scene as a table source: its columns, and its rows as one batch."""

    def __init__(self, df):
        self.df = df
        self.names = [str(c) for c in df.columns]

    def batches(self, keys):
        """Yield (offset of the first row, {key: pandas Series}) — here one batch."""
        yield 0, {k: self.df.iloc[:, k] for k in keys}

    def close(self):
        self.df = None


class _ParquetTable:
    """A Parquet scene as a table source, read batch by batch (never as one table).

    Columns that pandas stored as the table's index are left out (as ``pd.read_parquet``
    followed by ``reset_index(drop=True)`` would).
    """

    def __init__(self, path):
        import pyarrow.parquet as pq

        self.path = Path(path)
        try:
            self.file = pq.ParquetFile(path)
            schema = self.file.schema_arrow
            pandas_meta = schema.pandas_metadata or {}
        except Exception as exc:  # noqa: BLE001 — pyarrow raises many types for corrupt files
            self._unreadable(exc)
        index = {c for c in pandas_meta.get("index_columns", []) if isinstance(c, str)}
        self.fields = [(i, f) for i, f in enumerate(schema) if f.name not in index]
        self.names = [f.name for _, f in self.fields]
        self.unique = len(set(schema.names)) == len(schema.names)
        self.n_rows = self.file.metadata.num_rows

    def _unreadable(self, exc):
        msg = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise SceneError(f"'{self.path.name}' is not a readable Parquet file ({msg}). "
                         "Write it again with pandas.DataFrame.to_parquet or pyarrow.") from None

    def _series(self, column, field):
        import pyarrow as pa

        s = column.to_pandas()
        if pa.types.is_boolean(field.type) and not pd.api.types.is_bool_dtype(s):
            s = s.astype("boolean")  # with nulls: still true/false values in every batch
        return s

    def batches(self, keys):
        """Yield (offset of the first row, {key: pandas Series}) for each batch of rows."""
        # keys index self.fields; with duplicate names in the schema read every column and
        # pick them by position
        pos = [self.fields[k][0] for k in keys]
        columns = [self.fields[k][1].name for k in keys] if self.unique else None
        offset = 0
        it = self.file.iter_batches(batch_size=_BATCH_ROWS, columns=columns, use_pandas_metadata=False)
        while True:
            try:
                batch = next(it)
                part = {k: self._series(batch.column(j if self.unique else p), self.fields[k][1])
                        for j, (k, p) in enumerate(zip(keys, pos))}
            except StopIteration:
                return
            except Exception as exc:  # noqa: BLE001 — corrupt pages show up while reading
                self._unreadable(exc)
            yield offset, part
            offset += batch.num_rows

    def close(self):
        self.file.close()


class _CellIssues:
    """Non-numeric and true/false cells of one column, summed over the batches of a table."""

    def __init__(self):
        self.n_bad = 0
        self.example = None
        self.lines = []
        self.boolean = False

    def report(self, col, report):
        if self.n_bad:
            report.error(f"column '{col}' has {self.n_bad} non-numeric cell(s), e.g. "
                         f"{self.example!r} on line(s) {', '.join(map(str, self.lines))}",
                         "replace them with numbers, or leave the cell empty for a missing value")
        if self.boolean:
            report.error(f"column '{col}' holds true/false values", "give numbers in the unit of the scene format table")


def _numbers(s, offset, issues):
    """Cells of one column batch → float64 array; non-numeric cells noted in ``issues``.

    Parameters
    ----------
    s : pandas.Series
        The cells (text or numbers).
    offset : int
        Table row of the batch's first cell (0-based); line numbers are offset + index + 2.
    issues : _CellIssues or None
        Where to note non-numeric and true/false cells (None: do not note).

    Returns
    -------
    ndarray of float64
        Missing and non-numeric cells NaN.
    """
    if s.dtype == object or pd.api.types.is_string_dtype(s) or isinstance(s.dtype, pd.CategoricalDtype):
        text = s.astype(str).str.strip()
        missing = text.str.lower().isin(_MISSING_TEXT)
        num = pd.to_numeric(text.where(~missing, None), errors="coerce")
        bad = (num.isna() & ~missing).to_numpy(dtype=bool)
        if issues is not None and bad.any():
            if issues.example is None:
                issues.example = text[bad].iloc[0]
            if len(issues.lines) < 3:
                issues.lines += [int(i) + offset + 2 for i in np.flatnonzero(bad)[:3 - len(issues.lines)]]
            issues.n_bad += int(bad.sum())
        return num.to_numpy(dtype=float, na_value=np.nan)
    if pd.api.types.is_bool_dtype(s):
        if issues is not None:
            issues.boolean = True
        return np.full(len(s), np.nan)
    try:
        return pd.to_numeric(s, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    except (TypeError, ValueError):  # dates, nested values: read them as text
        return _numbers(s.astype(str), offset, issues)


def _surface_codes(values):
    """Surface text (sea/land/ice or 0/1/2) → int8 codes.

    Returns
    -------
    codes : ndarray of int8
        0 sea, 1 land, 2 ice; missing and unknown values 0 (sea).
    n_bad : int
        Number of unknown values.
    example : str or None
        The first unknown value (lower case, stripped).
    """
    # a table's column comes as it is (Arrow strings, numbers, categories): hashed in C without a
    # Python string per pixel; the few distinct values are then read one by one
    raw = values if isinstance(values, pd.Series) else pd.Series(np.asarray(values, dtype=object).ravel())
    lut = dict(SURFACE_CODES, **{"0": 0, "1": 1, "2": 2, "0.0": 0, "1.0": 1, "2.0": 2})
    inverse, uniq = pd.factorize(raw, use_na_sentinel=False)
    inverse = np.asarray(inverse).ravel()
    norm = ["" if u is None or (isinstance(u, float) and np.isnan(u)) else str(u).strip().lower()
            for u in np.asarray(uniq, dtype=object)]
    code_u = np.array([lut.get(u, -1) for u in norm], dtype=np.int64)
    missing_u = np.array([u in ("", "nan", "none", "null", "<na>") for u in norm], dtype=bool)
    bad_u = (code_u < 0) & ~missing_u
    out = np.where(bad_u | missing_u, SURFACE_CODES["sea"], code_u).astype(np.int8)[inverse]
    n_bad, example = 0, None
    if bad_u.any():
        bad = bad_u[inverse]
        n_bad = int(bad.sum())
        example = norm[int(inverse[int(np.argmax(bad))])]
    return out, n_bad, example


def _report_surface(n_bad, example, report):
    if n_bad:
        report.error(f"column 'surface' has {n_bad} unknown value(s), e.g. {example!r}",
                     "use sea, land or ice (or leave empty for sea)")


def _grid_from_table(table, report, in_memory, names=None):
    """Table (one row per pixel) → 2-D numpy grids; the table checks of both paths.

    Two passes over the table's batches: the grid positions first (extent, whole numbers),
    then every other column, placed at its positions.

    Parameters
    ----------
    table : _CsvTable or _ParquetTable
        The table source.
    report : Report
        Receives every problem of the table.
    in_memory : bool
        Apply the :data:`MAX_PIXELS` limit.

    Returns
    -------
    (fields, rows, cols, present) or None
        ``fields``: {name: (ny, nx) float64 grid, ``surface`` int8 codes}, in column order with
        ``surface`` last; ``rows``/``cols``: grid indices; ``present``: (ny, nx) bool, a table
        row at the position. None when the positions are unusable (the report says why).
    """
    labels = [str(c).strip() for c in table.names]
    if names:  # [input.names]: ours = "theirs"
        theirs_to_ours = {t: o for o, t in names.items() if o not in labels}
        missing = [f"{o} = '{t}'" for o, t in names.items() if t not in labels and o not in labels]
        if missing:
            report.error(f"[input.names] names column(s) the table does not have: {', '.join(missing)}",
                         f"check the names; the table's columns: {', '.join(labels[:15])}")
        used = [f"{theirs_to_ours[c]} ← '{c}'" for c in labels if c in theirs_to_ours]
        labels = [theirs_to_ours.get(c, c) for c in labels]
        if used:
            report.warn("columns read under other names: " + "; ".join(used) + " ([input.names])",
                        "nothing to do if these are right; otherwise set [input.names]")
    dupe_cols = sorted({c for c in labels if labels.count(c) > 1})
    if dupe_cols:
        report.error(f"column(s) {', '.join(dupe_cols)} appear more than once in the header", "keep one of each")
    keep = [k for k, c in enumerate(labels) if labels.index(c) == k]
    names = [labels[k] for k in keep]
    missing_req = [c for c in ("row", "col") if c not in names]
    if missing_req:
        report.error(f"required column(s) {', '.join(missing_req)} missing (found: {', '.join(names[:12])})",
                     "add integer grid positions 'row' and 'col' for every pixel")
        return None
    key = {labels[k]: k for k in keep}
    pos_keys = [key["row"], key["col"]]
    value_names = [c for c in names if c not in ("row", "col", "surface")]
    issues = {c: _CellIssues() for c in names if c != "surface"}

    # pass 1: grid positions
    n_bad_pos = 0
    rmin = cmin = np.inf
    rmax = cmax = -np.inf
    for offset, part in table.batches(pos_keys):
        r = _numbers(part[pos_keys[0]], offset, issues["row"])
        c = _numbers(part[pos_keys[1]], offset, issues["col"])
        with np.errstate(invalid="ignore"):
            bad = ~np.isfinite(r) | ~np.isfinite(c) | (r < 0) | (c < 0) | (np.mod(r, 1) != 0) | (np.mod(c, 1) != 0)
        n_bad_pos += int(bad.sum())
        if not bad.all():
            r, c = r[~bad], c[~bad]
            rmin, rmax = min(rmin, r.min()), max(rmax, r.max())
            cmin, cmax = min(cmin, c.min()), max(cmax, c.max())
    shape = None
    problem = None
    if n_bad_pos:
        problem = (f"{n_bad_pos} row(s) have a missing, negative or fractional 'row'/'col'",
                   "grid positions must be whole numbers ≥ 0")
    elif rmax > 1e7 or cmax > 1e7:
        problem = (f"grid positions up to row {rmax:.0f}, col {cmax:.0f} are implausibly large",
                   "'row' and 'col' are grid indices (0, 1, 2, …), not coordinates")
    else:
        r0, c0 = int(rmin), int(cmin)
        ny, nx = int(rmax) - r0 + 1, int(cmax) - c0 + 1
        if in_memory and ny * nx > MAX_PIXELS:
            problem = (f"the grid declares {_too_many(ny, nx)}",
                       "screen it with the chunked path (cloudsieve screen --chunks ROWS), or split it")
        else:
            shape = (ny, nx)

    # pass 2: the other columns (their cell problems are listed even when the grid is unusable)
    grids = {}
    counts = None
    surf_bad, surf_example = 0, None
    if shape is not None:
        ny, nx = shape
        grids = {c: np.full(ny * nx, np.nan) for c in value_names}
        if "surface" in key:
            grids["surface"] = np.zeros(ny * nx, np.int8)
        counts = np.zeros(ny * nx, np.int32)
    keys = pos_keys + [key[c] for c in value_names] + ([key["surface"]] if "surface" in key else [])
    for offset, part in table.batches(keys):
        nums = {c: _numbers(part[key[c]], offset, issues[c]) for c in value_names}
        if shape is None:
            continue
        r = _numbers(part[pos_keys[0]], offset, None).astype(np.int64)
        c = _numbers(part[pos_keys[1]], offset, None).astype(np.int64)
        flat = (r - r0) * nx + (c - c0)
        u, k = np.unique(flat, return_counts=True)
        counts[u] += k.astype(np.int32)
        for name, values in nums.items():
            grids[name][flat] = values
        if "surface" in key:
            codes, n, ex = _surface_codes(part[key["surface"]].to_numpy(dtype=object))
            surf_bad += n
            surf_example = surf_example if surf_example is not None else ex
            grids["surface"][flat] = codes
    for c in names:
        if c != "surface":
            issues[c].report(c, report)
    if shape is None:
        report.error(*problem)
        return None
    dupes = counts > 1
    if dupes.any():
        k = int(np.argmax(dupes))
        report.error(f"{int(dupes.sum())} grid position(s) appear more than once, e.g. row {k // nx + r0}, "
                     f"col {k % nx + c0} ({int(counts[k])} times)",
                     "each (row, col) must be given once; remove duplicate rows")
    holes = int((counts == 0).sum())
    if holes:
        report.warn(f"ragged grid: {holes} of {ny * nx} positions in the {ny} × {nx} rectangle have no row",
                    "they are treated as no_data; add them if they should be screened")
    _report_surface(surf_bad, surf_example, report)
    fields = {name: arr.reshape(ny, nx) for name, arr in grids.items()}
    return fields, np.arange(r0, r0 + ny), np.arange(c0, c0 + nx), (counts > 0).reshape(ny, nx)


# ---------------------------------------------------------------------------------------
# NetCDF
# ---------------------------------------------------------------------------------------
def _open_netcdf(path):
    """Open lazily with an explicit engine (guessing imports every installed backend, seconds)."""
    with open(path, "rb") as fh:
        magic = fh.read(8)
    if magic.startswith(b"\x89HDF"):
        try:
            return xr.open_dataset(path, engine="netcdf4", mask_and_scale=True)
        except Exception:  # noqa: BLE001 — fall back to the pure-h5py reader
            return xr.open_dataset(path, engine="h5netcdf", mask_and_scale=True)
    if magic.startswith(b"CDF"):
        return xr.open_dataset(path, engine="netcdf4", mask_and_scale=True)
    raise ValueError("the file does not start like NetCDF (no HDF5 or CDF signature)")


def _unreadable_netcdf(path, exc):
    msg = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
    return SceneError(f"'{Path(path).name}' is not a readable NetCDF file ({msg}). "
                      "Check that it is NetCDF-4 or classic NetCDF and was written completely.")


def _grid_from_netcdf(path, report, chunk_rows, names=None):
    """NetCDF scene → 2-D grids (numpy loaded whole, or dask chunked along y).

    Returns
    -------
    (fields, profiles, rows, cols, facts)
        ``fields``: {name: (ny, nx) array}: float64, except a text ``surface`` (int8 codes) —
        a numeric ``surface`` stays float64 and is checked and coded by :func:`_assemble`.
        ``profiles``: {name: (ny, nx, level) float64 array}. ``facts``: ``time``, the scene's UTC
        time (:func:`_scene_time`), and ``geostationary`` (:func:`_geostationary`), each or None.
    """
    try:
        ds = _open_netcdf(path)
    except Exception as exc:  # noqa: BLE001 — netCDF4/h5py raise a variety of errors for broken files
        raise _unreadable_netcdf(path, exc) from None
    try:
        return _netcdf_fields(ds, path, report, chunk_rows, names)
    except BaseException:
        ds.close()
        raise


#: our scene variables found by CF standard_name in a NetCDF scene that does not use our names
#: (names from the CF standard name table; first match wins, in this order)
STANDARD_NAMES = {
    "lat": ("latitude",), "lon": ("longitude",),
    "t_skin": ("surface_temperature", "sea_surface_skin_temperature"),
    "t_air": ("air_temperature",),
    "tcwv": ("atmosphere_mass_content_of_water_vapor",),
    "sat_zenith": ("sensor_zenith_angle", "platform_zenith_angle"),
    "sol_zenith": ("solar_zenith_angle",),
    "p_surf": ("surface_air_pressure",),
}


def _find_names(ds, names, report):
    """The Dataset with the scene's variables under our names: first the analyst's table
    (``[input.names]``, ours → theirs), then, for what is still missing, a CF ``standard_name``
    (:data:`STANDARD_NAMES`, looked up with cf_xarray) on a variable of the (y, x) grid. A
    pressure in Pa is converted to hPa. The report lists what was read under which name."""
    import cf_xarray  # noqa: F401 — registers the .cf accessor

    found, renames = [], {}
    for ours, theirs in names.items():
        if theirs in ds.variables and ours not in ds.variables:
            renames[theirs] = ours
            found.append(f"{ours} ← '{theirs}' ([input.names])")
        elif theirs not in ds.variables and ours not in ds.variables:
            report.error(f"[input.names] says {ours} is '{theirs}', but the file has no variable '{theirs}'",
                         f"check the name; the file's variables: {', '.join(map(str, list(ds.data_vars)[:15]))}")
    by_standard = ds.cf.standard_names
    for ours, standards in STANDARD_NAMES.items():
        if ours in ds.variables or ours in renames.values():
            continue
        for sn in standards:
            cands = [v for v in by_standard.get(sn, []) if ds[v].dims == ("y", "x") and v not in renames]
            if len(cands) == 1:
                renames[cands[0]] = ours
                found.append(f"{ours} ← '{cands[0]}' (standard_name {sn})")
                break
            if len(cands) > 1:
                report.warn(f"several variables have standard_name {sn} ({', '.join(cands)}); none is taken as {ours}",
                            f"say which in the configuration: [input.names] {ours} = \"{cands[0]}\"")
                break
    if not renames:
        return ds
    ds = ds.rename(renames)
    if "p_surf" in renames.values() and str(ds["p_surf"].attrs.get("units", "")).strip() == "Pa":
        ds["p_surf"] = (ds["p_surf"] / 100.0).assign_attrs(units="hPa")
        found.append("p_surf converted from Pa to hPa")
    report.warn("variables read under other names: " + "; ".join(found),
                "nothing to do if these are right; otherwise set [input.names]")
    return ds


def _netcdf_fields(ds, path, report, chunk_rows, names=None):
    """The body of :func:`_grid_from_netcdf` on the opened (lazy) Dataset."""
    for name in ("y", "x"):
        if name not in ds.dims:
            twod = [v for v in ds.data_vars.values() if v.ndim == 2]
            if twod:
                dims = twod[0].dims
                report.warn(f"NetCDF dimensions are named {dims}, not (y, x)", "they are read as (y, x)")
                try:
                    ds = ds.rename({dims[0]: "y", dims[1]: "x"})
                except ValueError:  # the names are taken by other dimensions: reported below
                    pass
            break
    if "y" not in ds.dims or "x" not in ds.dims:
        raise SceneError(f"'{Path(path).name}' has no 2-D variables on dimensions (y, x) "
                         f"(dimensions found: {dict(ds.sizes)}). A NetCDF scene holds the scene columns as 2-D "
                         "variables on (y, x).")
    ds = _find_names(ds, names or {}, report)
    ny, nx = ds.sizes["y"], ds.sizes["x"]
    try:  # grid indices: small, read now on both paths
        rows = np.asarray(ds["row"].values) if "row" in ds and ds["row"].dims == ("y",) else np.arange(ny)
        cols = np.asarray(ds["col"].values) if "col" in ds and ds["col"].dims == ("x",) else np.arange(nx)
    except Exception as exc:  # noqa: BLE001
        raise _unreadable_netcdf(path, exc) from None
    if chunk_rows is None:
        if ny * nx > MAX_PIXELS:
            raise SceneError(f"the grid declares {_too_many(ny, nx)}; nothing was read. Screen it with the chunked "
                             "path (cloudsieve screen --chunks ROWS), or split it")
        try:
            ds = ds.load()
        except Exception as exc:  # noqa: BLE001 — data that cannot be read back: a broken file
            raise _unreadable_netcdf(path, exc) from None
    else:
        ds = ds.chunk({**{d: -1 for d in ds.dims}, "y": chunk_rows})

    def data(var):
        return var.data if chunk_rows is not None else var.values

    fields = {}
    profiles = {}
    for name, var in ds.data_vars.items():
        if name.startswith("profile_"):
            if var.dims[:2] != ("y", "x") or var.ndim != 3:
                report.error(f"profile variable '{name}' has dimensions {var.dims}",
                             "explicit profiles must be on (y, x, level), surface first")
            elif profiles and next(iter(profiles.values())).shape[2] != var.shape[2]:
                report.error(f"profile variable '{name}' has {var.shape[2]} levels, the other profiles "
                             f"{next(iter(profiles.values())).shape[2]}",
                             "give every profile variable on the same levels")
            else:
                profiles[name] = data(var).astype(np.float64)
            continue
        if name in ("row", "col"):
            continue
        if var.ndim == 0 and (name == "time" or "grid_mapping_name" in var.attrs):
            continue  # the scene's time (_scene_time) or its CF grid mapping (_geostationary): not pixels
        if var.dims != ("y", "x"):
            report.error(f"variable '{name}' has dimensions {var.dims}, not (y, x)",
                         "write every scene variable as a 2-D array on (y, x)")
            continue
        if name == "surface" and var.dtype.kind in "OSU":
            codes, n_bad, example = _surface_codes(var.values)  # text: rare, read whole
            _report_surface(n_bad, example, report)
            codes = codes.reshape(ny, nx)
            fields[name] = codes if chunk_rows is None else _as_dask(codes, chunk_rows)
            continue
        if var.dtype.kind not in "fiu":
            report.error(f"variable '{name}' is not numeric ({var.dtype})", "store it as a floating-point variable")
            continue
        fields[name] = data(var).astype(np.float64)
    for name in ("lat", "lon"):
        if name in ds.coords and name not in fields and ds[name].dims == ("y", "x"):
            fields[name] = data(ds[name]).astype(np.float64)
    facts = {"time": _scene_time(ds, report), "geostationary": _geostationary(ds)}
    if chunk_rows is None:
        ds.close()
    return fields, profiles, rows, cols, facts


def _geostationary(ds):
    """(sub-satellite longitude [degree east], orbit radius [km], Earth radius [km]) from a CF
    grid mapping ``grid_mapping_name = "geostationary"`` (CF conventions, appendix F:
    ``longitude_of_projection_origin``, ``perspective_point_height`` above the ellipsoid [m],
    ``semi_major_axis`` [m], WGS 84's when absent), or None."""
    for var in ds.variables.values():
        if var.attrs.get("grid_mapping_name") != "geostationary":
            continue
        try:
            lon0 = float(var.attrs["longitude_of_projection_origin"])
            height = float(var.attrs["perspective_point_height"])
            a = float(var.attrs.get("semi_major_axis", 6378137.0))
        except (KeyError, TypeError, ValueError):
            return None
        return lon0, (height + a) / 1000.0, a / 1000.0
    return None


def _computed_sat_zenith(fields, geo, report):
    """``sat_zenith`` from a CF geostationary grid mapping and the pixels' lat/lon where the scene
    gives none (physics.geometry.geostationary_zenith; numpy or dask). Pixels seen lower than the
    scene limit (COLUMNS: 80°), or beyond the horizon, get NaN (no_data); the report says so."""
    from physics.geometry import geostationary_zenith

    if "lat" not in fields or "lon" not in fields:
        report.warn("the scene has a geostationary grid mapping but no lat/lon, so sat_zenith cannot be computed",
                    "add 2-D lat and lon, or a sat_zenith variable")
        return fields
    lon0, orbit, earth = geo
    zen = geostationary_zenith(fields["lat"], fields["lon"], lon0, orbit_radius=orbit, earth_radius=earth)
    limit = _RANGES["sat_zenith"][1]
    fields = dict(fields, sat_zenith=np.where(zen <= limit, zen, np.nan))
    report.warn(f"sat_zenith computed from the CF geostationary grid mapping (sub-satellite longitude {lon0:g}° E, "
                f"orbit radius {orbit:,.0f} km) and the pixels' lat/lon; pixels at a zenith angle above {limit:g}° "
                "or beyond the horizon are no_data", "give a sat_zenith variable to use your own")
    return fields


def _scene_time(ds, report):
    """The scene's UTC time as datetime64, from a scalar CF ``time`` variable (decoded by xarray)
    or else the ACDD global attribute ``time_coverage_start`` (ISO 8601); None when it has neither
    (a time that cannot be read is reported and not used)."""
    if "time" in ds.variables and ds["time"].size == 1 and ds["time"].dtype.kind == "M":
        return np.datetime64(ds["time"].values.reshape(-1)[0], "ns")
    text = ds.attrs.get("time_coverage_start")
    if text is None:
        return None
    try:
        return np.datetime64(str(text).strip().rstrip("Z").replace("z", ""), "ns")
    except ValueError:
        report.warn(f"global attribute time_coverage_start = {text!r} is not an ISO 8601 time",
                    "write it as 2026-03-14T02:30:00Z; without it sol_zenith cannot be computed")
        return None


def _computed_sol_zenith(ds, time, report):
    """``sol_zenith`` from the scene time and the pixels' lat/lon where the scene gives none
    (physics.geometry.solar_zenith, lazily on dask arrays); the report says so."""
    from physics.geometry import solar_zenith

    if "lat" not in ds.coords or "lon" not in ds.coords:
        report.warn("the scene has a time but no lat/lon, so sol_zenith cannot be computed",
                    "add 2-D lat and lon (or sol_zenith); the night tests are skipped meanwhile")
        return ds
    ds["sol_zenith"] = (("y", "x"), solar_zenith(time, ds["lat"].data, ds["lon"].data))
    report.warn(f"sol_zenith computed from the scene time {np.datetime_as_string(time, unit='s')} UTC and the "
                "pixels' lat/lon (Astronomical Almanac low-precision formulas, about 0.01°)",
                "give a sol_zenith variable to use your own")
    return ds


# ---------------------------------------------------------------------------------------
# one Dataset, one validator
# ---------------------------------------------------------------------------------------
_CH_RE = re.compile(r"^(bt|bt_clear|emis)_(.+)$")


def is_truth_table(names):
    """True for the truth files of the sample scenes (``*_true`` fields and a cloud fraction,
    but no observed channel of their own)."""
    names = [str(n) for n in names]
    has_true = any(n.endswith("_true") for n in names)
    observed = any(n.startswith("bt_") and not n.endswith("_true") for n in names)
    return has_true and "cloud_fraction" in names and not observed


def _column_key(name):
    """The :data:`COLUMNS` entry of a variable name (``bt_11um`` → ``bt_<ch>``)."""
    if name.startswith("bt_clear_"):
        return "bt_clear_<ch>"
    if name.startswith("bt_"):
        return "bt_<ch>"
    if name.startswith("emis_"):
        return "emis_<ch>"
    return name


def _surface_bad_and_codes(s):
    """Numeric surface grid → (non-finite-safe int8 codes, mask of finite values not 0/1/2)."""
    ok = (s == 0) | (s == 1) | (s == 2)
    return np.where(ok, s, 0).astype(np.int8), np.isfinite(s) & ~ok


def _assemble(fields, profiles, present, rows, cols, chunk_rows):
    """The scene Dataset from the grids of either reader (numpy or dask, same operations).

    Infinite values become NaN, numbers float64, a numeric surface int8 codes (values other
    than 0, 1, 2 → 0); absent ``sol_zenith`` is NaN, ``p_surf`` 1013.25 hPa, ``surface`` 0 (sea).

    Returns
    -------
    ds : xarray.Dataset
        Every field of the file (lat/lon as coordinates) plus the defaults; no ``valid`` yet.
    stats : dict
        Lazy (or numpy) scene-wide counts for the validator: ``n_inf``, ``surface_bad``.
    """
    ny, nx = len(rows), len(cols)
    coords = {"row": ("y", np.asarray(rows, dtype=np.int32)), "col": ("x", np.asarray(cols, dtype=np.int32))}
    data = {}
    inf_counts = []
    stats = {}
    for name, arr in fields.items():
        if name == "surface":
            if arr.dtype.kind == "f":
                codes, bad = _surface_bad_and_codes(arr)
                stats["surface_bad"] = np.count_nonzero(bad)
                arr = codes
            data[name] = (("y", "x"), arr)
            continue
        inf = np.isinf(arr)
        inf_counts.append(np.count_nonzero(inf))
        arr = np.where(inf, np.nan, arr)
        if name in ("lat", "lon"):
            coords[name] = (("y", "x"), arr)
        else:
            data[name] = (("y", "x"), arr)
    for name, arr in profiles.items():
        inf = np.isinf(arr)
        inf_counts.append(np.count_nonzero(inf))
        data[name] = (("y", "x", "level"), np.where(inf, np.nan, arr))
    stats["n_inf"] = sum(inf_counts) if inf_counts else 0
    if "surface" not in data:
        data["surface"] = (("y", "x"), _full((ny, nx), 0, np.int8, chunk_rows))
    if "p_surf" not in data:
        data["p_surf"] = (("y", "x"), _full((ny, nx), _P_SURF_DEFAULT, np.float64, chunk_rows))
    if "sol_zenith" not in data:
        data["sol_zenith"] = (("y", "x"), _full((ny, nx), np.nan, np.float64, chunk_rows))
    if present is not None and chunk_rows is not None:
        present = _as_dask(present, chunk_rows)
    return xr.Dataset(data, coords=coords), stats, present


def _over_saturation(tcwv, t_air, p_surf):
    """Pixels whose water vapour [kg m-2] exceeds 1.5 × what a saturated column of our
    humidity shape holds at their air temperature [K] and surface pressure [hPa]."""
    from physics.atmosphere import saturation_vapour_pressure

    with np.errstate(all="ignore"):
        # a saturated column of our humidity shape holds about q_s p_s / (g (λ+1))
        cap = 0.622 * saturation_vapour_pressure(t_air) / p_surf * p_surf * 100 / 9.80665 / 4.0
        return np.isfinite(tcwv) & (tcwv > 1.5 * cap)


def _range_fix(name, lo, hi):
    if name == "sat_zenith":
        return "viewing zenith angles must lie within 0–80° (beyond, the plane-parallel path is not valid); mask such pixels out"
    if name == "tcwv":
        return "water vapour cannot be negative; check the units (kg m-2) and missing-value codes such as -999"
    if name.startswith("emis_"):
        return "emissivities are fractions (0.5–1.0), not percentages"
    if name == "p_surf":
        return "surface pressure must be in hPa (divide Pa by 100)"
    return "check units and missing-value codes (e.g. -999); leave missing cells empty instead"


def _validate(ds, given, present, known_channels, report, stats, unreadable):
    """Check a scene Dataset (numpy- or dask-backed) and list every problem in ``report``.

    Every statistic is a numpy or dask reduction; all are evaluated in one
    ``dask.compute(..., scheduler="threads")`` (numpy results pass through), together with
    the ``valid`` grid when the scene has what it needs.

    Parameters
    ----------
    ds : xarray.Dataset
        From :func:`_assemble`.
    given : list of str
        The scene's own fields, in file order (the defaults of :func:`_assemble` are not given).
    present : ndarray or dask array of bool, or None
        Grid positions with a table row (None: all).
    known_channels : tuple of str
        Channel names the scene may use.
    report : Report
        Receives the problems.
    stats : dict
        Scene-wide counts of :func:`_assemble` (infinite values, bad surface codes).
    unreadable : callable
        Exception → SceneError, for data that cannot be read back while computing.

    Returns
    -------
    channels : tuple of str
        The scene's observed channels, in the order of ``known_channels``.
    valid : ndarray of bool or None
        (ny, nx): grid position present and every required value finite; None when required
        variables are missing.
    """
    import dask

    stats = dict(stats)
    names = list(given)
    found = [m.group(2) for n in names if (m := _CH_RE.match(n)) and m.group(1) == "bt"
             and not m.group(2).startswith("clear_")]
    channels = tuple(c for c in known_channels if c in found)
    missing = [c for c in REQUIRED if c not in names and c not in ("row", "col")]
    checks = {}
    for name in names:
        rng = _RANGES.get(_column_key(name)) if name != "surface" else None
        if rng is None:
            continue
        a = ds[name].data if name in ds.data_vars else ds.coords[name].data
        if a.size == 0:
            checks[name] = {"n": 0}
            continue
        fin = np.isfinite(a)
        lo, hi = rng
        st = {"n": np.count_nonzero(fin), "min": np.min(np.where(fin, a, np.inf)),
              "max": np.max(np.where(fin, a, -np.inf)), "n_lo": np.count_nonzero(a < lo),
              "n_hi": np.count_nonzero(a > hi)}
        if name.startswith("bt") or name in _TEMPERATURE_LIKE:
            st["n_celsius"] = np.count_nonzero(a < 100)
        if name == "tcwv":
            st["n_x10"] = np.count_nonzero((a > 90) & (a < 9000))
        checks[name] = st
    stats["checks"] = checks
    if "tcwv" in names and "t_air" in names:
        over = _blockwise(_over_saturation, bool, ds["tcwv"].data, ds["t_air"].data, ds["p_surf"].data)
        stats["n_over_saturation"] = np.count_nonzero(over)
    if channels and not missing:
        valid = present
        for name in [f"bt_{c}" for c in channels] + list(_BACKGROUND):
            ok = np.isfinite(ds[name].data)
            valid = ok if valid is None else valid & ok
        stats["valid"] = valid
    try:
        (got,) = dask.compute(stats, scheduler="threads")  # on this process's threads even with a cluster
    except SceneError:
        raise
    except Exception as exc:  # noqa: BLE001 — a lazily opened file that cannot be read back
        raise unreadable(exc) from None

    n_bad = int(got.get("surface_bad", 0))
    if n_bad:
        report.error(f"variable 'surface' has {n_bad} value(s) other than 0, 1, 2", "use 0 = sea, 1 = land, 2 = ice")
    n_inf = int(got["n_inf"])
    if n_inf:
        report.warn(f"{n_inf} infinite value(s) found", "they are treated as missing; their pixels become no_data")
    for name in names:
        m = _CH_RE.match(name)
        if not m:
            continue
        kind, ch = m.groups()
        if kind == "bt" and ch.startswith("clear_"):
            continue
        if ch not in known_channels:
            report.error(f"column '{name}' names an unknown channel '{ch}' (known: {', '.join(known_channels)})",
                         f"rename it to one of the known channels, or define '{ch}' in the [channels] table of "
                         "the config (centre and width in cm-1)")
    for kind in ("bt_clear", "emis"):
        for name in names:
            if name.startswith(kind + "_"):
                ch = name[len(kind) + 1:]
                if ch in known_channels and ch not in channels:
                    report.warn(f"'{name}' given but the scene has no 'bt_{ch}'", "it is ignored")
    known = set(COLUMNS) | {f"{k}_{c}" for k in ("bt", "bt_clear", "emis") for c in known_channels}
    unknown = [n for n in names if n not in known and not _CH_RE.match(n)]
    if not channels:
        missing.append("bt_<channel> (e.g. bt_11um)")
    if missing:
        # a renamed column (satzen for sat_zenith, tskin for t_skin) is the usual cause
        guesses = {}
        for col in missing:
            close = difflib.get_close_matches(col.lower(), [u.lower() for u in unknown], n=1, cutoff=0.6)
            if close:
                guesses[col] = next(u for u in unknown if u.lower() == close[0])
        hint = ", ".join(f"'{u}' to '{c}'" for c, u in guesses.items())
        report.error(f"required column(s) missing: {', '.join(missing)}",
                     (f"if they are there under another name, rename {hint}; otherwise " if hint else "")
                     + "add them (see the scene format table: column, unit, meaning)")
    if unknown:
        report.warn(f"column(s) not used by cloudsieve: {', '.join(unknown[:8])}", "they are ignored")

    for name, st in got["checks"].items():
        n = int(st["n"])
        if n == 0:
            if name in REQUIRED or (name.startswith("bt_") and not name.startswith("bt_clear_")):
                report.error(f"column '{name}' has no valid values (all cells empty or NaN)",
                             "fill it in, or drop the column if the channel was not observed")
            continue
        if "n_celsius" in st and 2 * int(st["n_celsius"]) > n:  # the median is below 100
            report.error(f"'{name}' looks like °C ({int(st['n_celsius'])} of its {n} values are below 100)",
                         "brightness and air/skin temperatures must be in kelvin: add 273.15")
            continue
        if "n_x10" in st and 2 * int(st["n_x10"]) > n:  # the median is between 90 and 9000
            report.error(f"'tcwv' is too large for kg m-2 ({int(st['n_x10'])} of its {n} values lie "
                         f"between 90 and 9000)",
                         "give total column water vapour in kg m-2 (= mm); divide by 10 if it is in kg m-2 × 10, "
                         "or convert from g cm-2 by multiplying by 10")
            continue
        lo, hi = _RANGES[_column_key(name)]
        n_lo, n_hi = int(st["n_lo"]), int(st["n_hi"])
        if n_lo or n_hi:
            worst = [f"{float(st['min']):g}"] * bool(n_lo) + [f"{float(st['max']):g}"] * bool(n_hi)
            label = "smallest" if not n_hi else "largest" if not n_lo else "smallest and largest"
            report.error(f"'{name}' has {n_lo + n_hi} value(s) outside {lo:g}–{hi:g} "
                         f"({COLUMNS[_column_key(name)][0]}), {label} {' and '.join(worst)}",
                         _range_fix(name, lo, hi))
    n_over = int(got.get("n_over_saturation", 0))
    if n_over:
        report.warn(f"{n_over} pixel(s) have more water vapour than a saturated column at their "
                    "air temperature can hold", "check 'tcwv' and 't_air'; the profile is capped at saturation")
    valid = got.get("valid")
    return channels, (None if valid is None else np.asarray(valid, dtype=bool))


def _scene_dataset(ds, channels, valid, given, profiles, chunk_rows, name):
    """The Dataset handed out: the variables cloudsieve uses, ``valid``, channel order attrs."""
    keep = [f"bt_{c}" for c in channels] + list(_BACKGROUND) + ["sol_zenith", "p_surf", "surface"]
    keep += [f"emis_{c}" for c in channels if f"emis_{c}" in given]
    keep += [f"bt_clear_{c}" for c in channels if f"bt_clear_{c}" in given]
    keep += list(profiles)
    out = ds[keep]
    out["valid"] = (("y", "x"), valid if chunk_rows is None else _as_dask(valid, chunk_rows))
    out.attrs = {"channels": " ".join(channels), "scene_name": name}
    return out


def known_channel_names(config=None):
    """Channel names a scene may use: the defaults, then those of the config's [channels]."""
    from physics.channels import DEFAULT_CHANNEL_SPECS

    names = list(DEFAULT_CHANNEL_SPECS)
    if config:
        names += [n for n in config.get("channels", {}) if n not in names]
    return tuple(names)


def load_scene(path, channels=None, config=None, chunk_rows=None):
    """Read and validate a scene file.

    Parameters
    ----------
    path : str or Path
        A .csv, .parquet or .nc scene.
    channels : iterable of str, optional
        Known channel names (defaults + config); the defaults when omitted.
    config : dict, optional
        Configuration; its [channels] table adds known channel names.
    chunk_rows : int, optional
        Open the scene lazily, its variables dask arrays of this many grid rows per chunk.
        None (default): read it into memory (numpy).

    Returns
    -------
    Scene

    Raises
    ------
    SceneError
        With the full report when the scene has errors.
    """
    scene = check_scene(path, channels, config, chunk_rows)
    scene.report.raise_if_errors()
    return scene


def check_scene(path, channels=None, config=None, chunk_rows=None):
    """Read and validate a scene; return it with its report even when it has errors.

    Parameters
    ----------
    path : str or Path
        A .csv, .parquet or .nc scene.
    channels : iterable of str, optional
        Known channel names; ``known_channel_names(config)`` when omitted.
    config : dict, optional
        Configuration; its [channels] table adds known channel names.
    chunk_rows : int, optional
        None (default): in memory — the Dataset holds numpy arrays and grids of more than
        :data:`MAX_PIXELS` pixels are refused. An integer ≥ 1: lazily — the same Dataset with
        its (y, x) variables as dask arrays chunked ``{"y": chunk_rows, "x": -1}`` (``valid``
        already computed); profiles are chunked along y too.

    Returns
    -------
    Scene
        ``data`` is None when the report has errors. Otherwise an :class:`xarray.Dataset` on
        (y, x) with ``bt_<ch>``, ``t_skin``, ``t_air`` [K], ``tcwv`` [kg m-2], ``sat_zenith``,
        ``sol_zenith`` [degree] (NaN when absent), ``p_surf`` [hPa] (1013.25 when absent),
        ``surface`` (int8: 0 sea, 1 land, 2 ice), optional ``emis_<ch>`` [1], ``bt_clear_<ch>``
        [K] and ``profile_*`` on (y, x, level), ``valid`` (bool); coordinates ``row``, ``col``
        (int32) and optional ``lat``, ``lon`` [degree]; attributes ``channels`` (space-joined,
        in known-channel order) and ``scene_name``. Numbers are float64; infinite values NaN.

    Raises
    ------
    SceneError
        When the file cannot be read at all (missing, empty, unknown format, corrupt).
    """
    if chunk_rows is not None and (int(chunk_rows) != chunk_rows or chunk_rows < 1):
        raise ValueError(f"chunk_rows must be a whole number ≥ 1, not {chunk_rows!r}")
    chunk_rows = None if chunk_rows is None else int(chunk_rows)
    path = Path(path)
    known = tuple(channels) if channels is not None else known_channel_names(config)
    report = Report(str(path.name))
    if not path.exists():
        raise SceneError(f"scene file '{path}' does not exist. Check the path (cloudsieve check <file>).")
    if path.is_dir():
        raise SceneError(f"'{path}' is a folder, not a scene file. Give a .csv, .parquet or .nc file.")
    fmt = scene_format(path)
    names = dict(((config or {}).get("input") or {}).get("names") or {})
    if path.stat().st_size == 0:
        raise SceneError(f"'{path.name}' is empty (0 bytes). Export the scene again.")
    profiles = {}
    present = None
    facts = {}
    if fmt == "netcdf":
        fields, profiles, rows, cols, facts = _grid_from_netcdf(path, report, chunk_rows, names)
        if "sat_zenith" not in fields and facts.get("geostationary") is not None:
            fields = _computed_sat_zenith(fields, facts["geostationary"], report)
    else:
        if fmt == "csv":
            table = _CsvTable(_read_csv(path, report))
        else:
            table = _ParquetTable(path)
            if table.n_rows == 0:
                table.close()
                raise SceneError(f"'{path.name}' has columns but no pixel rows. Add one row per pixel.")
        try:
            built = _grid_from_table(table, report, in_memory=chunk_rows is None, names=names)
        finally:
            table.close()
        if built is None:
            return Scene(None, (), report, path, path.stem)
        fields, rows, cols, present = built
        if chunk_rows is not None:
            fields = {k: _as_dask(v, chunk_rows) for k, v in fields.items()}
    if is_truth_table(list(fields) + list(profiles)):
        stem = path.stem[:-len("_truth")] if path.stem.endswith("_truth") else None
        raise SceneError(
            f"'{path.name}' holds the truth of a sample scene (cloud fraction, optical depth, true background), "
            f"for skill tests; it is not a scene to screen"
            + (f" — screen '{stem}{path.suffix}' instead" if stem else "") + ".")
    ds, stats, present = _assemble(fields, profiles, present, rows, cols, chunk_rows)
    if "sol_zenith" not in fields and facts.get("time") is not None:
        ds = _computed_sol_zenith(ds, facts["time"], report)
    unreadable = (lambda exc: _unreadable_netcdf(path, exc)) if fmt == "netcdf" else \
        (lambda exc: SceneError(f"'{path.name}' could not be read ({exc})."))
    chans, valid = _validate(ds, list(fields), present, known, report, stats, unreadable)
    report.channels = chans
    report.shape = (len(rows), len(cols))
    if not report.ok:
        return Scene(None, chans, report, path, path.stem)
    # no errors: the scene has its channels and background variables, so ``valid`` exists
    ds = _scene_dataset(ds, chans, valid, list(fields), profiles, chunk_rows, path.stem)
    report.n_pixels = int(valid.size)
    report.n_no_data = int(valid.size - np.count_nonzero(valid))
    if report.n_no_data:
        report.warn(f"{report.n_no_data} pixel(s) miss a required value (empty, NaN or infinite)",
                    "they are classed no_data and not screened")
    return Scene(ds, chans, report, path, path.stem)
