"""Scene files in, one validated xarray Dataset out.

A scene is a grid of pixels with observed window-channel brightness temperatures and a
background state. Tables (CSV, Parquet) hold one row per pixel with integer grid positions
``row``/``col``; NetCDF holds the same names as 2-D variables on dimensions (y, x). Either
way the result is one :class:`xarray.Dataset` on (y, x) plus a :class:`Report` that lists every
problem found, each with what to do about it.

Missing values (empty cells, NaN, ±inf) never fail a scene: those pixels become ``no_data``.
Problems that make the whole scene untrustworthy (missing columns, text in numeric
columns, °C instead of K, impossible values, duplicate positions, unknown channels) are
errors and stop the run with one report.
"""
import difflib
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from .config import SURFACE_CODES
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
    "sol_zenith": ("degree", "no", "solar zenith angle; > 90 is night (3.9 µm usable). Missing: taken as day", (0.0, 180.0)),
    "p_surf": ("hPa", "no", "surface pressure; missing: 1013.25", (300.0, 1100.0)),
    "surface": ("text", "no", "sea, land or ice (NetCDF: 0, 1, 2); missing: sea", None),
    "emis_<ch>": ("1", "no", "surface emissivity of channel <ch>; overrides the surface-type default", (0.5, 1.0)),
    "bt_clear_<ch>": ("K", "no", "your own clear-sky brightness temperature of <ch>; used instead of the simulation", (150.0, 350.0)),
}

_RANGES = {k: v[3] for k, v in COLUMNS.items() if v[3] is not None}
_TEMPERATURE_LIKE = ("t_skin", "t_air")
MAX_PIXELS = 25_000_000  # in-memory limit; larger grids go through the chunked path


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
    """A loaded scene: the gridded data, its channels and the validation report."""

    data: xr.Dataset
    channels: tuple
    report: Report
    path: Path = None
    name: str = ""

    @property
    def shape(self):
        return self.data.sizes["y"], self.data.sizes["x"]


# ---------------------------------------------------------------------------------------
# reading
# ---------------------------------------------------------------------------------------
_TABLE_EXT = {".csv": "csv", ".txt": "csv", ".parquet": "parquet", ".pq": "parquet"}
_NC_EXT = {".nc": "netcdf", ".nc4": "netcdf", ".netcdf": "netcdf", ".cdf": "netcdf"}


def scene_format(path):
    """'csv', 'parquet' or 'netcdf' from the file extension; SceneError otherwise."""
    ext = Path(path).suffix.lower()
    fmt = _TABLE_EXT.get(ext) or _NC_EXT.get(ext)
    if fmt is None:
        raise SceneError(f"'{Path(path).name}': unknown scene format '{ext or '(no extension)'}'. "
                         "Use a .csv, .parquet or .nc file (see the scene format table in the README).")
    return fmt


def _read_csv(path, report):
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


def _read_parquet(path):
    try:
        return pd.read_parquet(path)
    except Exception as exc:  # pyarrow raises many types for corrupt files
        msg = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise SceneError(f"'{Path(path).name}' is not a readable Parquet file ({msg}). "
                         "Write it again with pandas.DataFrame.to_parquet or pyarrow.") from None


def _numeric_table(df, report):
    """Convert text cells to numbers; list non-numeric cells; missing → NaN."""
    out = {}
    for col in df.columns:
        if col == "surface":
            continue
        s = df[col]
        if s.dtype == object or pd.api.types.is_string_dtype(s):
            text = s.astype(str).str.strip()
            missing = text.str.lower().isin(["", "nan", "na", "n/a", "null", "none", "-", "inf", "-inf", "+inf"])
            num = pd.to_numeric(text.where(~missing, None), errors="coerce")
            bad = num.isna() & ~missing
            if bad.any():
                rows = list(np.flatnonzero(bad.to_numpy())[:3] + 2)
                report.error(f"column '{col}' has {int(bad.sum())} non-numeric cell(s), e.g. "
                             f"{text[bad].iloc[0]!r} on line(s) {', '.join(map(str, rows))}",
                             "replace them with numbers, or leave the cell empty for a missing value")
            out[col] = num.to_numpy(dtype=float)
        elif pd.api.types.is_bool_dtype(s):
            report.error(f"column '{col}' holds true/false values", "give numbers in the unit of the scene format table")
            out[col] = np.full(len(s), np.nan)
        else:
            out[col] = pd.to_numeric(s, errors="coerce").to_numpy(dtype=float)
    return out


def _surface_codes_from_text(values, report):
    raw = pd.Series(values)
    lut = dict(SURFACE_CODES, **{"0": 0, "1": 1, "2": 2, "0.0": 0, "1.0": 1, "2.0": 2})
    inverse, uniq = pd.factorize(raw.astype(str), use_na_sentinel=False)  # hashing; few distinct values
    uniq = np.asarray(uniq, dtype=object)
    norm = np.array([str(u).strip().lower() for u in uniq], dtype=object)
    text = pd.Series(norm[inverse.ravel()])
    codes = pd.Series(np.array([lut.get(u, -1) for u in norm], dtype=np.int64)[inverse.ravel()])
    missing = text.isin(["", "nan", "none", "null"])
    bad = (codes < 0) & ~missing
    if bad.any():
        report.error(f"column 'surface' has {int(bad.sum())} unknown value(s), e.g. {text[bad].iloc[0]!r}",
                     "use sea, land or ice (or leave empty for sea)")
    return np.where(missing | bad, SURFACE_CODES["sea"], codes).astype(np.int8)


def _grid_from_table(df, report, source):
    """Table (one row per pixel) → dict of 2-D arrays, row/col coordinates."""
    df.columns = [str(c).strip() for c in df.columns]
    dupe_cols = sorted({c for c in df.columns if list(df.columns).count(c) > 1})
    if dupe_cols:
        report.error(f"column(s) {', '.join(dupe_cols)} appear more than once in the header", "keep one of each")
        df = df.loc[:, ~df.columns.duplicated()]
    missing_req = [c for c in ("row", "col") if c not in df.columns]
    if missing_req:
        report.error(f"required column(s) {', '.join(missing_req)} missing (found: {', '.join(df.columns[:12])})",
                     "add integer grid positions 'row' and 'col' for every pixel")
        return None
    surface_raw = df["surface"].to_numpy() if "surface" in df.columns else None
    nums = _numeric_table(df, report)
    r, c = nums["row"], nums["col"]
    with np.errstate(invalid="ignore"):
        bad_pos = ~np.isfinite(r) | ~np.isfinite(c) | (r < 0) | (c < 0) | (np.mod(r, 1) != 0) | (np.mod(c, 1) != 0)
    if bad_pos.any():
        report.error(f"{int(bad_pos.sum())} row(s) have a missing, negative or fractional 'row'/'col'",
                     "grid positions must be whole numbers ≥ 0")
        return None
    if r.max() > 1e7 or c.max() > 1e7:
        report.error(f"grid positions up to row {r.max():.0f}, col {c.max():.0f} are implausibly large",
                     "'row' and 'col' are grid indices (0, 1, 2, …), not coordinates")
        return None
    r = r.astype(np.int64)
    c = c.astype(np.int64)
    r0, c0 = r.min(), c.min()
    ny, nx = int(r.max() - r0 + 1), int(c.max() - c0 + 1)
    if ny * nx > MAX_PIXELS:
        report.error(f"grid of {ny} × {nx} positions is larger than the in-memory limit of {MAX_PIXELS} pixels",
                     "screen it as NetCDF with the chunked path (cloudsieve screen --chunks), or split it")
        return None
    flat = (r - r0) * nx + (c - c0)
    counts = np.bincount(flat, minlength=ny * nx)
    if (counts > 1).any():
        k = int(np.argmax(counts > 1))
        report.error(f"{int((counts > 1).sum())} grid position(s) appear more than once, e.g. row {k // nx + r0}, "
                     f"col {k % nx + c0} ({int(counts[k])} times)",
                     "each (row, col) must be given once; remove duplicate rows")
    holes = int((counts == 0).sum())
    if holes:
        report.warn(f"ragged grid: {holes} of {ny * nx} positions in the {ny} × {nx} rectangle have no row",
                    "they are treated as no_data; add them if they should be screened")
    grid = {}
    for name, values in nums.items():
        if name in ("row", "col"):
            continue
        arr = np.full(ny * nx, np.nan)
        arr[flat] = values
        grid[name] = arr.reshape(ny, nx)
    if surface_raw is not None:
        codes = _surface_codes_from_text(surface_raw, report)
        arr = np.zeros(ny * nx, np.int8)
        arr[flat] = codes
        grid["surface"] = arr.reshape(ny, nx)
    present = np.zeros(ny * nx, bool)
    present[flat] = True
    grid["_present"] = present.reshape(ny, nx)
    return grid, np.arange(r0, r0 + ny), np.arange(c0, c0 + nx)


def _open_netcdf(path):
    """Open with an explicit engine (guessing imports every installed backend, seconds)."""
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


def _grid_from_netcdf(path, report):
    try:
        ds = _open_netcdf(path)
        ds = ds.load()
    except Exception as exc:  # netCDF4/h5py raise a variety of errors for broken files
        msg = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise SceneError(f"'{Path(path).name}' is not a readable NetCDF file ({msg}). "
                         "Check that it is NetCDF-4 or classic NetCDF and was written completely.") from None
    dims = None
    for name in ("y", "x"):
        if name not in ds.dims:
            twod = [v for v in ds.data_vars.values() if v.ndim == 2]
            if twod:
                dims = twod[0].dims
                report.warn(f"NetCDF dimensions are named {dims}, not (y, x)", "they are read as (y, x)")
                ds = ds.rename({dims[0]: "y", dims[1]: "x"})
            break
    if "y" not in ds.dims or "x" not in ds.dims:
        raise SceneError(f"'{Path(path).name}' has no 2-D variables on dimensions (y, x) "
                         f"(dimensions found: {dict(ds.sizes)}). A NetCDF scene holds the scene columns as 2-D "
                         "variables on (y, x).")
    ny, nx = ds.sizes["y"], ds.sizes["x"]
    if ny * nx > MAX_PIXELS:
        raise SceneError(f"grid of {ny} × {nx} is larger than the in-memory limit of {MAX_PIXELS} pixels; "
                         "use the chunked path (cloudsieve screen --chunks)")
    grid = {}
    profiles = {}
    for name, var in ds.data_vars.items():
        if name.startswith("profile_"):
            if var.dims[:2] != ("y", "x") or var.ndim != 3:
                report.error(f"profile variable '{name}' has dimensions {var.dims}",
                             "explicit profiles must be on (y, x, level), surface first")
            else:
                profiles[name] = np.asarray(var.values, dtype=float)
            continue
        if var.dims != ("y", "x"):
            if name in ("row", "col"):
                continue
            report.error(f"variable '{name}' has dimensions {var.dims}, not (y, x)",
                         "write every scene variable as a 2-D array on (y, x)")
            continue
        if name == "surface":
            vals = np.asarray(var.values)
            if vals.dtype.kind in "OSU":
                grid[name] = _surface_codes_from_text(vals.ravel(), report).reshape(ny, nx)
            else:
                f = np.asarray(vals, dtype=float)
                bad = np.isfinite(f) & ~np.isin(f, [0, 1, 2])
                if bad.any():
                    report.error(f"variable 'surface' has {int(bad.sum())} value(s) other than 0, 1, 2",
                                 "use 0 = sea, 1 = land, 2 = ice")
                grid[name] = np.where(np.isin(f, [0, 1, 2]), f, 0).astype(np.int8)
            continue
        if var.dtype.kind not in "fiu":
            report.error(f"variable '{name}' is not numeric ({var.dtype})", "store it as a floating-point variable")
            continue
        grid[name] = np.asarray(var.values, dtype=float)
    rows = np.asarray(ds["row"].values) if "row" in ds and ds["row"].dims == ("y",) else np.arange(ny)
    cols = np.asarray(ds["col"].values) if "col" in ds and ds["col"].dims == ("x",) else np.arange(nx)
    for name in ("lat", "lon"):
        if name in ds.coords and name not in grid and ds[name].dims == ("y", "x"):
            grid[name] = np.asarray(ds[name].values, dtype=float)
    grid["_present"] = np.ones((ny, nx), bool)
    if profiles:
        grid["_profiles"] = profiles
    return grid, rows, cols


# ---------------------------------------------------------------------------------------
# validation
# ---------------------------------------------------------------------------------------
_CH_RE = re.compile(r"^(bt|bt_clear|emis)_(.+)$")


def is_truth_table(names):
    """True for the truth files of the sample scenes (``*_true`` fields and a cloud fraction,
    but no observed channel of their own)."""
    names = [str(n) for n in names]
    has_true = any(n.endswith("_true") for n in names)
    observed = any(n.startswith("bt_") and not n.endswith("_true") for n in names)
    return has_true and "cloud_fraction" in names and not observed


def _validate_grid(grid, known_channels, report):
    names = [k for k in grid if not k.startswith("_")]
    n_inf = 0
    for name in names:
        a = grid[name]
        if a.dtype.kind == "f":
            inf = np.isinf(a)
            if inf.any():
                n_inf += int(inf.sum())
                a[inf] = np.nan
    if n_inf:
        report.warn(f"{n_inf} infinite value(s) found", "they are treated as missing; their pixels become no_data")
    channels = []
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
        elif kind == "bt":
            channels.append(ch)
    for kind in ("bt_clear", "emis"):
        for name in names:
            if name.startswith(kind + "_"):
                ch = name[len(kind) + 1:]
                if ch in known_channels and ch not in channels:
                    report.warn(f"'{name}' given but the scene has no 'bt_{ch}'", "it is ignored")
    known = set(COLUMNS) | {f"{k}_{c}" for k in ("bt", "bt_clear", "emis") for c in known_channels}
    unknown = [n for n in names if n not in known and not _CH_RE.match(n)]
    missing = [c for c in REQUIRED if c not in names and c not in ("row", "col")]
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

    def range_of(name):
        if name.startswith("bt_clear_"):
            return _RANGES["bt_clear_<ch>"]
        if name.startswith("bt_"):
            return _RANGES["bt_<ch>"]
        if name.startswith("emis_"):
            return _RANGES["emis_<ch>"]
        return _RANGES.get(name)

    for name in names:
        if name == "surface":
            continue
        rng = range_of(name)
        if rng is None:
            continue
        a = grid[name]
        finite = np.isfinite(a)
        if not finite.any():
            if name in REQUIRED or (name.startswith("bt_") and not name.startswith("bt_clear_")):
                report.error(f"column '{name}' has no valid values (all cells empty or NaN)",
                             "fill it in, or drop the column if the channel was not observed")
            continue
        vals = a[finite]
        is_temp = name.startswith("bt") or name in _TEMPERATURE_LIKE
        if is_temp and np.median(vals) < 100:
            report.error(f"'{name}' looks like °C (median {np.median(vals):.1f})",
                         "brightness and air/skin temperatures must be in kelvin: add 273.15")
            continue
        if name == "tcwv" and np.median(vals) > 90 and np.median(vals) < 9000:
            report.error(f"'tcwv' median {np.median(vals):.0f} is too large for kg m-2",
                         "give total column water vapour in kg m-2 (= mm); divide by 10 if it is in kg m-2 × 10, "
                         "or convert from g cm-2 by multiplying by 10")
            continue
        lo, hi = rng
        out = (vals < lo) | (vals > hi)
        if out.any():
            report.error(f"'{name}' has {int(out.sum())} value(s) outside {lo:g}–{hi:g} "
                         f"({COLUMNS.get(name, COLUMNS.get('bt_<ch>'))[0]}), e.g. {vals[out][0]:g}",
                         _range_fix(name, lo, hi))
    if "tcwv" in grid and "t_air" in grid:
        from physics.atmosphere import saturation_vapour_pressure

        # a saturated column of our humidity shape holds about q_s p_s / (g (λ+1))
        ta = grid["t_air"]
        ps = grid.get("p_surf", np.full_like(ta, 1013.25))
        with np.errstate(all="ignore"):
            cap = 0.622 * saturation_vapour_pressure(ta) / ps * ps * 100 / 9.80665 / 4.0
            over = np.isfinite(grid["tcwv"]) & (grid["tcwv"] > 1.5 * cap)
        if over.any():
            report.warn(f"{int(over.sum())} pixel(s) have more water vapour than a saturated column at their "
                        "air temperature can hold", "check 'tcwv' and 't_air'; the profile is capped at saturation")
    return tuple(channels)


def _range_fix(name, lo, hi):
    if name == "sat_zenith":
        return "viewing zenith angles must lie within 0–80° (beyond, the plane-parallel path is not valid); mask such pixels out"
    if name == "tcwv":
        return "water vapour cannot be negative; check the units (kg m-2) and missing-value codes such as -999"
    if name.startswith("emis_"):
        return "emissivities are fractions (0.5–1.0), not percentages"
    if name == "p_surf":
        return "surface pressure must be in hPa (divide Pa by 100)"
    return f"check units and missing-value codes (e.g. -999); leave missing cells empty instead"


def _build_dataset(grid, rows, cols, channels, known_channels):
    ny, nx = len(rows), len(cols)
    coords = {"row": ("y", np.asarray(rows, dtype=np.int32)), "col": ("x", np.asarray(cols, dtype=np.int32))}
    data = {}
    for name, arr in grid.items():
        if name.startswith("_"):
            continue
        if name in ("lat", "lon"):
            coords[name] = (("y", "x"), arr.astype(np.float64))
            continue
        data[name] = (("y", "x"), arr if name == "surface" else arr.astype(np.float64))
    if "surface" not in data:
        data["surface"] = (("y", "x"), np.zeros((ny, nx), np.int8))
    if "p_surf" not in data:
        data["p_surf"] = (("y", "x"), np.full((ny, nx), 1013.25))
    if "sol_zenith" not in data:
        data["sol_zenith"] = (("y", "x"), np.full((ny, nx), np.nan))
    ds = xr.Dataset(data, coords=coords)
    profiles = grid.get("_profiles")
    if profiles:
        for name, arr in profiles.items():
            ds[name] = (("y", "x", "level"), arr)
    needed = [f"bt_{c}" for c in channels] + ["t_skin", "t_air", "tcwv", "sat_zenith"]
    valid = grid["_present"].copy()
    for name in needed:
        if name in ds:
            valid &= np.isfinite(ds[name].values)
    ds["valid"] = (("y", "x"), valid)
    ds.attrs["channels"] = " ".join(channels)
    return ds


def load_scene(path, channels=None, config=None):
    """Read and validate a scene file.

    Parameters
    ----------
    path : str or Path
        A .csv, .parquet or .nc scene.
    channels : iterable of str, optional
        Known channel names (defaults + config); the defaults when omitted.
    config : dict, optional
        Configuration; its [channels] table adds known channel names.

    Returns
    -------
    Scene

    Raises
    ------
    SceneError
        With the full report when the scene has errors.
    """
    scene = check_scene(path, channels, config)
    scene.report.raise_if_errors()
    return scene


def known_channel_names(config=None):
    from physics.channels import DEFAULT_CHANNEL_SPECS

    names = list(DEFAULT_CHANNEL_SPECS)
    if config:
        names += [n for n in config.get("channels", {}) if n not in names]
    return tuple(names)


def check_scene(path, channels=None, config=None):
    """Read and validate a scene; return it with its report even when it has errors.

    The Dataset is ``None`` when the file could not be read at all.
    """
    path = Path(path)
    known = tuple(channels) if channels is not None else known_channel_names(config)
    report = Report(str(path.name))
    if not path.exists():
        raise SceneError(f"scene file '{path}' does not exist. Check the path (cloudsieve check <file>).")
    if path.is_dir():
        raise SceneError(f"'{path}' is a folder, not a scene file. Give a .csv, .parquet or .nc file.")
    fmt = scene_format(path)
    if path.stat().st_size == 0:
        raise SceneError(f"'{path.name}' is empty (0 bytes). Export the scene again.")
    if fmt == "csv":
        df = _read_csv(path, report)
        built = _grid_from_table(df, report, path.name)
    elif fmt == "parquet":
        df = _read_parquet(path)
        if len(df) == 0:
            raise SceneError(f"'{path.name}' has columns but no pixel rows. Add one row per pixel.")
        built = _grid_from_table(df.reset_index(drop=True), report, path.name)
    else:
        built = _grid_from_netcdf(path, report)
    if built is None:
        return Scene(None, (), report, path, path.stem)
    grid, rows, cols = built
    if is_truth_table(grid):
        stem = path.stem[:-len("_truth")] if path.stem.endswith("_truth") else None
        raise SceneError(
            f"'{path.name}' holds the truth of a sample scene (cloud fraction, optical depth, true background), "
            f"for skill tests; it is not a scene to screen"
            + (f" — screen '{stem}{path.suffix}' instead" if stem else "") + ".")
    chans = _validate_grid(grid, known, report)
    report.channels = chans
    report.shape = (len(rows), len(cols))
    if not report.ok:
        return Scene(None, chans, report, path, path.stem)
    ds = _build_dataset(grid, rows, cols, chans, known)
    report.n_pixels = int(ds["valid"].size)
    report.n_no_data = int((~ds["valid"].values).sum())
    if report.n_no_data:
        report.warn(f"{report.n_no_data} pixel(s) miss a required value (empty, NaN or infinite)",
                    "they are classed no_data and not screened")
    ds.attrs["scene_name"] = path.stem
    return Scene(ds, chans, report, path, path.stem)
