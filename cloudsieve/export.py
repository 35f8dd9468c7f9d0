"""Results out: CSV and CF-NetCDF, written block by block through one writer, atomically.

Every output file goes through :func:`write_blocks`: a :class:`Layout` (coordinates, each
variable's type and CF attributes, global attributes) and a stream of
:class:`EncodedBlock` s of grid rows, in any order. For NetCDF each block's variables arrive
already deflated as HDF5 stores a chunk (byte shuffle + zlib), so the block pipeline's workers
do the compression and the writer only places chunks in the file; for CSV the blocks are put
in row order and appended. The dashboard's in-memory result, the batch pipeline (in memory or
on Dask) and the clear-sky simulation all write through it, so the same scene, configuration
and edits give the same files from the command line and from the dashboard.
"""
import contextlib
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
import datetime as _dt
import json
import os
from pathlib import Path
import tempfile
import zlib

import numpy as np
import pandas as pd
import xarray as xr

from physics.cloud import STATUS_NAMES, STATUS_WORDS

from . import CAUTION, __version__
from .codes import CLASS_NAMES
from .config import config_json, to_toml
from .errors import OutputError
from .invert import PHASE_NAMES, layer_beta
from .registry import REGISTRY, bit_table
from .uncertainty import clear_part

#: rows per NetCDF chunk (and per block of the batch pipeline unless told otherwise)
CHUNK_ROWS = 256
#: output format by file extension
FORMAT_OF_SUFFIX = {".nc": "netcdf", ".nc4": "netcdf", ".netcdf": "netcdf", ".csv": "csv"}
FORMATS = ("netcdf", "csv")


def format_of(path, fmt=None):
    """'netcdf' or 'csv': ``fmt`` if given, else from the file extension (OutputError if neither tells)."""
    fmt = fmt or FORMAT_OF_SUFFIX.get(Path(path).suffix.lower())
    if fmt not in FORMATS:
        raise OutputError(f"cannot tell the output format of '{Path(path).name}'; end the name in .nc (CF-NetCDF) "
                          "or .csv, or give the format (netcdf or csv)")
    return fmt


def _physics_path():
    """Which implementation simulated the clear sky in this process (provenance of the file)."""
    from physics import fused

    if fused.enabled():
        return "compiled float32 kernels (physics.fused, numba)"
    return "numpy reference" + (f" (compiled kernels unavailable: {fused.failure})" if fused.failure else "")


def _history(action):
    return f"{_dt.datetime.now(_dt.timezone.utc).strftime('%Y-%m-%dT%H:%M:%SZ')} cloudsieve {__version__} {action}"


# ---------------------------------------------------------------------------------------
# what a result holds
# ---------------------------------------------------------------------------------------
@dataclass
class ResultHeader:
    """Everything of a screened scene that is not per pixel.

    scene_name : str; channels : scene channel names; source : per channel, where its clear sky
    came from; tests : names of the tests that ran (have margins); cloud_channels : inversion
    channels; method : cloud-top choice; bias : channel -> {"a" [K], "b" [K per kg m⁻²], "n",
    "rms" [K], "applied"}; notes, skipped : for the user; config : dict; n_edits : QA edits
    applied; action : what made the file (history attribute); row, col : (y,), (x,) grid indices;
    lat, lon : (y, x) [degrees] or None
    """

    scene_name: str
    channels: tuple
    source: dict
    tests: tuple
    cloud_channels: tuple
    method: str
    bias: dict
    notes: list
    skipped: dict
    config: dict
    n_edits: int
    action: str
    row: np.ndarray
    col: np.ndarray
    lat: np.ndarray = None
    lon: np.ndarray = None


@dataclass
class ResultBlock:
    """Per-pixel results of grid rows ``start`` to ``start + mask.shape[0]``.

    bt_clear : (n_ch, rows, x) clear-sky brightness temperature [K]
    departure : channel -> (rows, x) observed − clear [K]
    margins : test -> (rows, x) [K]
    mask : (rows, x) int8 class codes; bits : (rows, x) uint16
    cloud : invert.CloudLayer of the rows (masked to non-clear pixels)
    sigma : channel -> (rows, x) 1-σ uncertainty of the clear-sky brightness temperature, without the
        instrument noise [K] (uncertainty.clear_part)
    """

    start: int
    bt_clear: np.ndarray
    departure: dict
    margins: dict
    mask: np.ndarray
    bits: np.ndarray
    cloud: object
    sigma: dict


@dataclass
class Layout:
    """The shape of an output file: grid size, coordinates, variables and global attributes.

    coords : name -> xr.Variable (row, col, and lat/lon when given)
    variables : name -> (numpy dtype, CF attributes), in file order
    attrs : global attributes
    """

    ny: int
    nx: int
    coords: dict
    variables: dict
    attrs: dict = field(default_factory=dict)


@dataclass
class EncodedBlock:
    """Output variables of grid rows start:stop, ready for :func:`write_blocks`.

    variables : name -> list of deflated HDF5 chunks (NetCDF) or the (rows, x) array (CSV)
    counts : pixels per class code
    extra : anything the producer sends along (the batch pipeline: bias-fit sums)
    """

    start: int
    stop: int
    variables: dict
    counts: np.ndarray
    extra: object = None


def _grid_coords(row, col, lat=None, lon=None):
    """row/col (and lat/lon when the scene has them) as CF coordinate variables of (y, x)."""
    coords = {"row": xr.Variable("y", np.asarray(row).astype(np.int32), {"long_name": "grid row index", "units": "1"}),
              "col": xr.Variable("x", np.asarray(col).astype(np.int32),
                                 {"long_name": "grid column index", "units": "1"})}
    if lat is not None and lon is not None:
        coords["lat"] = xr.Variable(("y", "x"), np.asarray(lat).astype(np.float32),
                                    {"standard_name": "latitude", "units": "degrees_north", "long_name": "latitude"})
        coords["lon"] = xr.Variable(("y", "x"), np.asarray(lon).astype(np.float32),
                                    {"standard_name": "longitude", "units": "degrees_east", "long_name": "longitude"})
    return coords


def _coordinates_attr(coords):
    return " ".join(c for c in ("row", "col", "lat", "lon") if c in coords)


def _uncertainty_attrs(ch):
    return {"standard_name": "toa_brightness_temperature_assuming_clear_sky standard_error", "units": "K",
            "long_name": f"1-sigma uncertainty of the clear-sky brightness temperature, {ch}: the pixel's "
                         "Jacobians times the configured background errors (the screening adds the "
                         "instrument noise of the observation)"}


def result_layout(h):
    """The :class:`Layout` of a screening result (variables, CF attributes, global attributes)."""
    bits = bit_table()
    v = {"mask": (np.int8, {"long_name": "cloud screening class", "units": "1",
                            "flag_values": np.arange(len(CLASS_NAMES), dtype=np.int8),
                            "flag_meanings": " ".join(CLASS_NAMES)}),
         "test_bits": (np.uint16, {"long_name": "screening tests that fired, and analyst edits", "units": "1",
                                   "flag_masks": np.array(list(bits.values()), dtype=np.uint16),
                                   "flag_meanings": " ".join(bits)})}
    for test in h.tests:
        v[f"margin_{test}"] = (np.float32, {"long_name": f"margin of test {test}: {REGISTRY[test].long_name} "
                                                         "(positive: fired)", "units": "K"})
    for ch in h.channels:
        v[f"departure_{ch}"] = (np.float32, {"long_name": f"observed minus clear-sky brightness temperature, {ch}" + (
            " (clear-sky bias removed)" if h.bias.get(ch, {}).get("applied") else ""), "units": "K"})
        v[f"bt_clear_{ch}"] = (np.float32, {"standard_name": "toa_brightness_temperature_assuming_clear_sky",
                                            "units": "K",
                                            "long_name": f"clear-sky brightness temperature, {ch} ({h.source[ch]})",
                                            "ancillary_variables": f"bt_clear_uncertainty_{ch}"})
        v[f"bt_clear_uncertainty_{ch}"] = (np.float32, _uncertainty_attrs(ch))
    for ch in h.cloud_channels:
        v[f"cloud_emissivity_{ch}"] = (np.float32, {
            "long_name": f"emissivity of channel {ch} at the retrieved cloud top, unclipped: "
                         f"(L_obs - L_clear)/(L_opaque - L_clear)", "units": "1"})
    ref = _reference_channel(h)
    v.update({
        "cloud_emissivity": (np.float32, {
            "long_name": f"slant emissivity of the single cloud layer ({ref}), clipped to "
                         f"[0, 1]; 1 where inversion_status is opaque (cloud_optical_depth then a lower bound)",
            "units": "1"}),
        "cloud_optical_depth": (np.float32, {
            "long_name": f"vertical infrared absorption optical depth of a single cloud layer at {ref} "
                         "(a lower bound where inversion_status is opaque; at the assumed top where it is "
                         "top_assumed)", "units": "1"}),
        "cloud_optical_depth_uncertainty": (np.float32, {
            "long_name": "1-sigma uncertainty of cloud_optical_depth (inf: opaque, lower bound)", "units": "1"}),
        "cloud_extinction_optical_depth": (np.float32, {
            "long_name": "window extinction optical depth by the similarity relation tau_abs/(1 - ssa*g)",
            "units": "1"}),
        "cloud_top_pressure": (np.float32, {"standard_name": "air_pressure_at_cloud_top", "units": "hPa",
                                            "long_name": f"cloud-top pressure ({h.method} top)"}),
        "cloud_top_pressure_uncertainty": (np.float32, {
            "long_name": "1-sigma uncertainty of cloud_top_pressure (inf: top assumed or unknown)", "units": "hPa"}),
        "cloud_top_temperature": (np.float32, {"long_name": "air temperature at the cloud top", "units": "K"}),
        "inversion_status": (np.int8, {"long_name": "outcome of the single-layer cloud inversion", "units": "1",
                                       "flag_values": np.arange(len(STATUS_NAMES), dtype=np.int8),
                                       "flag_meanings": " ".join(STATUS_NAMES),
                                       "comment": "; ".join(f"{k}: {v}" for k, v in STATUS_WORDS.items())}),
        "cloud_phase": (np.int8, {"long_name": "cloud phase whose absorption ratios the inversion used", "units": "1",
                                  "flag_values": np.arange(len(PHASE_NAMES), dtype=np.int8),
                                  "flag_meanings": " ".join(PHASE_NAMES),
                                  "comment": _beta_comment(h)}),
        "cloud_optical_depth_uncertain": (np.int8, {"long_name": "relative optical-depth uncertainty above 100 %",
                                                    "units": "1", "flag_values": np.array([0, 1], np.int8),
                                                    "flag_meanings": "no yes"}),
    })
    coords = _grid_coords(h.row, h.col, h.lat, h.lon)
    for _, attrs in v.values():  # auxiliary coordinates (CF 5): grid indices, and lat/lon when given
        attrs["coordinates"] = _coordinates_attr(coords)
    return Layout(len(h.row), len(h.col), coords, v, result_attrs(h))


def _beta_comment(h):
    """The absorption ratios β = τ_ch/τ_ref per phase the inversion used, in words."""
    parts = [f"{p}: " + ", ".join(f"{c} {b:.3g}" for c, b in zip(h.cloud_channels, betas))
             for p, betas in layer_beta(tuple(h.cloud_channels), h.config).items()]
    return "absorption optical depth over that of the reference channel (beta) by phase: " + "; ".join(parts)


def _reference_channel(h):
    ref = h.config["cloud"]["reference_channel"]
    return ref if ref in h.cloud_channels else h.cloud_channels[0]


def result_attrs(h):
    """Global attributes of a screening result (CF-1.10 and cloudsieve's own)."""
    return {
        "Conventions": "CF-1.10",
        "title": f"cloudsieve cloud screening of scene {h.scene_name}",
        "source": f"cloudsieve {__version__}",
        "institution": "cloudsieve users",
        "history": _history(h.action),
        "comment": CAUTION,
        "references": "README.md of cloudsieve: methods, tests and their published sources",
        "cloudsieve_scene": str(h.scene_name),
        "cloudsieve_channels": " ".join(h.channels),
        "cloudsieve_physics": _physics_path(),
        "cloudsieve_config": config_json(h.config),
        "cloudsieve_config_toml": to_toml(h.config),
        "cloudsieve_bias_fit": json.dumps(h.bias, sort_keys=True),
        "cloudsieve_notes": json.dumps(list(h.notes)),
        "cloudsieve_qa_edits": str(h.n_edits),
    }


def block_variables(block, h):
    """The output variables of a :class:`ResultBlock` (name -> (rows, x) array of the file's type)."""
    cl = block.cloud
    k_ref = h.cloud_channels.index(_reference_channel(h))
    out = {"mask": block.mask, "test_bits": block.bits}
    out.update({f"margin_{t}": block.margins[t] for t in h.tests})
    for i, ch in enumerate(h.channels):
        out[f"departure_{ch}"] = block.departure[ch]
        out[f"bt_clear_{ch}"] = block.bt_clear[i]
        out[f"bt_clear_uncertainty_{ch}"] = block.sigma[ch]
    out.update({f"cloud_emissivity_{ch}": cl.emissivity[k] for k, ch in enumerate(h.cloud_channels)})
    out.update({"cloud_emissivity": np.clip(cl.emissivity[k_ref], 0.0, 1.0), "cloud_optical_depth": cl.optical_depth,
                "cloud_optical_depth_uncertainty": cl.optical_depth_sigma,
                "cloud_extinction_optical_depth": cl.extinction_optical_depth, "cloud_top_pressure": cl.top_pressure,
                "cloud_top_pressure_uncertainty": cl.top_pressure_sigma,
                "cloud_top_temperature": cl.top_temperature, "inversion_status": cl.status, "cloud_phase": cl.phase,
                "cloud_optical_depth_uncertain": cl.uncertain})
    return out


def layout_dataset(layout, variables):
    """An in-memory xarray Dataset of a layout and its whole-grid variables."""
    ds = xr.Dataset(coords=layout.coords)
    for name, (dtype, attrs) in layout.variables.items():
        ds[name] = xr.Variable(("y", "x"), np.asarray(variables[name]).astype(dtype), dict(attrs))
    ds.attrs.update(layout.attrs)
    return ds


def whole_scene_result(scene, sim, res, config, edits=None, action="screen"):
    """(ResultHeader, ResultBlock) of an in-memory screening (``session.Session``)."""
    ds = scene.data
    has_latlon = "lat" in ds.coords and "lon" in ds.coords
    cl = res.cloud
    h = ResultHeader(scene.name, tuple(sim.channels), dict(sim.source), tuple(t for t in REGISTRY if t in res.margins),
                     tuple(cl.channels), cl.method, res.bias, list(res.notes) + list(cl.notes), dict(res.skipped),
                     config, len(edits or []), action, ds["row"].values, ds["col"].values,
                     ds["lat"].values if has_latlon else None, ds["lon"].values if has_latlon else None)
    block = ResultBlock(0, sim.bt_clear, res.departure, res.margins, res.mask, res.bits, cl,
                        {ch: clear_part(sim.sigma, ch) for ch in sim.channels})
    return h, block


def result_dataset(scene, sim, res, config, edits=None, action="screen"):
    """Everything written for a screened in-memory scene, as a CF-annotated Dataset on (y, x).

    Parameters
    ----------
    scene : cloudsieve.scene.Scene
    sim : cloudsieve.simulate.Simulation
    res : cloudsieve.screen.Screening (with its cloud layer)
    config : dict
    edits : list, optional
        The QA edits applied (stored as a count and in the bit field).
    action : str
        What made the file, for the ``history`` attribute.
    """
    h, block = whole_scene_result(scene, sim, res, config, edits, action)
    return layout_dataset(result_layout(h), block_variables(block, h))


# ---------------------------------------------------------------------------------------
# encoding and the one writer
# ---------------------------------------------------------------------------------------
def _hdf5_chunk(values, chunk_rows, fill, complevel=1, shuffle=True):
    """One (chunk_rows, x) chunk as HDF5 stores it: padded, byte-shuffled, zlib-deflated.

    zlib level 1 with the byte shuffle: on a 1000 × 1000 result it writes in half the time of
    level 4 and the file is no larger (the shuffle does more for float fields than the level).
    """
    values = np.ascontiguousarray(values)
    if values.shape[0] < chunk_rows:  # the last block: pad to the full chunk (never read back)
        pad = np.full((chunk_rows - values.shape[0],) + values.shape[1:], fill, values.dtype)
        values = np.concatenate([values, pad])
    raw = values.view(np.uint8)
    size = values.dtype.itemsize
    if shuffle and size > 1:  # HDF5's shuffle filter: byte j of every element together
        raw = raw.reshape(-1, size).T
    return zlib.compress(np.ascontiguousarray(raw).tobytes(), complevel)


def encode_block(start, variables, layout, fmt, chunk_rows=CHUNK_ROWS, extra=None):
    """Turn a block's output variables (name -> (rows, x)) into an :class:`EncodedBlock`.

    For NetCDF ``start`` must be a multiple of ``chunk_rows``; the block is split into chunks
    of ``chunk_rows`` rows, each deflated as HDF5 stores it. ``extra`` travels with the block
    (the batch pipeline: its bias-fit sums).
    """
    rows = next(iter(variables.values())).shape[0]
    chunk_rows = min(chunk_rows, layout.ny)  # a grid smaller than a chunk is one chunk of its own size
    if fmt == "netcdf" and start % chunk_rows:
        raise ValueError(f"block start {start} is not a multiple of the NetCDF chunk height {chunk_rows}")
    out = {}
    for name, (dtype, _) in layout.variables.items():
        v = np.asarray(variables[name]).astype(dtype)
        if fmt == "netcdf":
            fill = np.nan if np.dtype(dtype).kind == "f" else 0
            out[name] = [_hdf5_chunk(v[a:a + chunk_rows], chunk_rows, fill) for a in range(0, rows, chunk_rows)]
        else:
            out[name] = v
    mask = np.asarray(variables["mask"]) if "mask" in variables else None
    counts = np.bincount(mask.ravel(), minlength=len(CLASS_NAMES)) if mask is not None else np.zeros(len(CLASS_NAMES))
    return EncodedBlock(start, start + rows, out, counts, extra)


def encode_dataset(layout, variables, fmt, chunk_rows=CHUNK_ROWS, threads=2):
    """Encoded blocks of a whole in-memory grid (blocks of ``chunk_rows`` rows, on threads)."""
    starts = range(0, layout.ny, chunk_rows)

    def one(a):
        return encode_block(a, {n: np.asarray(v)[a:a + chunk_rows] for n, v in variables.items()}, layout, fmt,
                            chunk_rows)

    with ThreadPoolExecutor(max(1, threads)) as pool:  # zlib releases the GIL
        yield from pool.map(one, starts)


def result_table(result):
    """A result Dataset as one row per pixel, text labels for the class and status."""
    cols = {"row": np.repeat(result["row"].values, result.sizes["x"]),
            "col": np.tile(result["col"].values, result.sizes["y"])}
    if "lat" in result.coords:
        cols["lat"] = result["lat"].values.ravel()
        cols["lon"] = result["lon"].values.ravel()
    for name, var in result.data_vars.items():
        vals = var.values.ravel()
        if name == "mask":
            cols[name] = np.asarray(CLASS_NAMES)[vals]
        elif name == "inversion_status":
            cols[name] = np.asarray(STATUS_NAMES)[vals]
        elif name == "cloud_phase":
            cols[name] = np.asarray(PHASE_NAMES)[vals]
        else:
            cols[name] = vals
    return pd.DataFrame(cols)


def write_blocks(layout, blocks, path, fmt=None, chunk_rows=CHUNK_ROWS, on_block=None, final_attrs=None):
    """Write an output file from encoded blocks (in any order), atomically.

    Parameters
    ----------
    layout : Layout
    blocks : iterable of EncodedBlock
        Covering the grid's rows once (NetCDF blocks start at multiples of ``chunk_rows``).
    path : str or Path
    fmt : {"netcdf", "csv"}, optional
        By the file extension when omitted.
    chunk_rows : int
        Rows per NetCDF chunk (the blocks were encoded with the same).
    on_block : callable(EncodedBlock), optional
        Called for every block as it arrives (sums, progress).
    final_attrs : callable() -> dict, optional
        Global attributes known only once every block has arrived (NetCDF: written last).

    Returns
    -------
    (Path, ndarray)
        The file written and the number of pixels per class code.
    """
    import netCDF4

    path = Path(path)
    fmt = format_of(path, fmt)
    counts = np.zeros(len(CLASS_NAMES), np.int64)
    ny, nx = layout.ny, layout.nx
    with atomic_write(path) as tmp:
        if fmt == "netcdf":
            import h5py

            with netCDF4.Dataset(tmp, "w", format="NETCDF4") as nc:
                nc.createDimension("y", ny)
                nc.createDimension("x", nx)
                for name, v in layout.coords.items():
                    var = nc.createVariable(name, v.dtype, v.dims)
                    var.setncatts(v.attrs)
                    var[:] = v.values
                for name, (dtype, attrs) in layout.variables.items():
                    dtype = np.dtype(dtype)
                    var = nc.createVariable(name, dtype, ("y", "x"), zlib=True, complevel=1, shuffle=True,
                                            fill_value=np.array(np.nan, dtype) if dtype.kind == "f" else False,
                                            chunksizes=(min(chunk_rows, ny), nx))
                    var.setncatts(attrs)
            step = min(chunk_rows, ny)
            with h5py.File(tmp, "r+") as h5:
                dsets = {name: h5[name] for name in layout.variables}
                covered = np.zeros(ny, bool)
                for blk in blocks:
                    for name, chunks in blk.variables.items():
                        for k, data in enumerate(chunks):
                            dsets[name].id.write_direct_chunk((blk.start + k * step, 0), data)
                    covered[blk.start:blk.stop] = True
                    counts += blk.counts.astype(np.int64)
                    if on_block:
                        on_block(blk)
                if not covered.all():
                    raise ValueError(f"the blocks left {int((~covered).sum())} of {ny} rows unwritten")
            attrs = dict(layout.attrs, **(final_attrs() if final_attrs else {}))
            with netCDF4.Dataset(tmp, "a") as nc:
                nc.setncatts(attrs)
        else:
            with open(tmp, "wb") as fh:
                pending, nxt = {}, 0
                for blk in blocks:
                    pending[blk.start] = blk
                    counts += blk.counts.astype(np.int64)
                    if on_block:
                        on_block(blk)
                    while nxt in pending:  # rows in order
                        b = pending.pop(nxt)
                        rows = {"y": slice(b.start, b.stop)}
                        part = xr.Dataset({k: (("y", "x"), v) for k, v in b.variables.items()},
                                          coords={k: c[rows] if "y" in c.dims else c for k, c in layout.coords.items()})
                        write_table_csv(result_table(part), fh, header=nxt == 0)
                        nxt = b.stop
                if nxt != ny or pending:
                    raise ValueError(f"the blocks covered rows 0–{nxt} of {ny} (and {len(pending)} out of order)")
    if fmt == "csv":  # a CSV has no attributes: its key and settings go beside it
        attrs = dict(layout.attrs, **(final_attrs() if final_attrs else {}))
        with atomic_write(key_path(path)) as tmp:
            Path(tmp).write_text(result_key(attrs), encoding="utf-8")
    return path, counts


def key_path(csv_path):
    """The key written beside a CSV result: ``<name>.key.md``."""
    p = Path(csv_path)
    return p.with_name(p.name + ".key.md")


_FLAG_WORDS = {"daylight_3p9um_unused": "3.9 µm channel not used: daylight (reflected sunlight)",
               "analyst_clear": "marked clear by the analyst (QA edit)",
               "analyst_cloud": "marked cloud by the analyst (QA edit)"}


def result_key(attrs=None):
    """What the codes of a result mean (classes, test bits, inversion statuses, phases) and, given a
    result's global attributes, the settings it was made with (TOML): the About tab's key and the
    file beside a CSV."""
    attrs = attrs or {}
    lines = ["# cloudsieve result key", "", CAUTION, "", "## mask", ""]
    lines += [f"- {code}: {name}" for code, name in enumerate(CLASS_NAMES)]
    lines += ["", "## test_bits (sum of the values of the tests that fired)", ""]
    for name, value in bit_table().items():
        test = REGISTRY.get(name)
        what = f"{test.label} ({test.kind} test)" if test else _FLAG_WORDS.get(name, name.replace("_", " "))
        lines.append(f"- {value}: {name} — {what}")
    lines += ["", "## inversion_status", ""]
    lines += [f"- {code}: {name} — {STATUS_WORDS[name]}" for code, name in enumerate(STATUS_NAMES)]
    lines += ["", "## cloud_phase", ""]
    lines += [f"- {code}: {name}" for code, name in enumerate(PHASE_NAMES)]
    if attrs.get("cloudsieve_config_toml"):
        lines += ["", f"## settings (scene {attrs.get('cloudsieve_scene', '?')}; use with `cloudsieve screen "
                  "--config`)", "", "```toml", attrs["cloudsieve_config_toml"].rstrip(), "```"]
    return "\n".join(lines) + "\n"


def write_result(result, path, fmt=None):
    """Write an in-memory result Dataset (e.g. :func:`result_dataset`) as CSV or NetCDF."""
    layout = Layout(result.sizes["y"], result.sizes["x"], {k: result[k].variable for k in result.coords},
                    {k: (v.dtype, dict(v.attrs)) for k, v in result.data_vars.items()}, dict(result.attrs))
    fmt = format_of(path, fmt)
    variables = {k: v.values for k, v in result.data_vars.items()}
    chunk_rows = min(CHUNK_ROWS, layout.ny)
    path, _ = write_blocks(layout, encode_dataset(layout, variables, fmt, chunk_rows), path, fmt, chunk_rows)
    return path


def _atomic_target(path):
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise OutputError(f"output folder '{folder}' does not exist; create it first or choose another --out")
    if path.is_dir():
        raise OutputError(f"'{path}' is a folder; give a file name for the output")
    if not os.access(folder, os.W_OK):
        raise OutputError(f"cannot write into '{folder}' (no permission); choose another --out")
    try:
        _sweep_stale_parts(folder, path.name)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.{os.getpid()}.", suffix=".part", dir=folder)
        os.close(fd)
    except OSError as exc:  # a folder that refuses files (read-only mount, /proc, a full disk)
        raise OutputError(f"cannot write into '{folder}' ({exc.strerror or exc}); choose another --out") from None
    return path, Path(tmp)


def _pid_alive(pid):
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:  # exists but belongs to someone else
        return True
    return True


def _sweep_stale_parts(folder, name):
    """Remove temporaries of ``name`` left by writers that no longer run (killed mid-write).

    A temporary is named ``.<name>.<pid>.<random>.part``; one whose writer process is gone is
    an incomplete file nobody will finish. Temporaries of live writers are left alone.
    """
    prefix = f".{name}."
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return
    for entry in entries:
        if not (entry.name.startswith(prefix) and entry.name.endswith(".part")):
            continue
        pid = entry.name[len(prefix):].split(".", 1)[0]
        if pid.isdigit() and int(pid) != os.getpid() and not _pid_alive(int(pid)):
            try:
                os.unlink(entry.path)
            except OSError:
                pass


def _umask():
    """The process umask, read without changing it (Linux /proc), else by a set-and-restore."""
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _commit(tmp, path):
    # a temporary file is private (0600); the result gets the mode a new file would get
    # (0666 less the umask), or keeps the mode of the file it replaces
    try:
        mode = path.stat().st_mode & 0o777
    except FileNotFoundError:
        mode = 0o666 & ~_umask()
    os.chmod(tmp, mode)
    with open(tmp, "rb") as fh:
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    try:  # make the rename durable
        dfd = os.open(path.parent, os.O_RDONLY)
        try:
            os.fsync(dfd)
        finally:
            os.close(dfd)
    except OSError:
        pass


@contextlib.contextmanager
def atomic_write(path):
    """Write through a temporary file in the target's folder, renamed into place on success.

    Yields the temporary path. On success the file is fsynced and renamed over ``path`` (the
    old file stays until then); on any failure the temporary is removed and OSErrors become
    :class:`OutputError`. A killed process can leave only a ``.<name>.<pid>.*.part`` file
    behind; the next write of the same file removes it.
    """
    path, tmp = _atomic_target(path)
    try:
        yield tmp
        _commit(tmp, path)
    except OSError as exc:
        raise OutputError(f"could not write '{path}': {exc.strerror or exc}") from None
    finally:
        if tmp.exists():
            tmp.unlink()


def write_table_csv(table, fh, header=True):
    """Write a per-pixel table (pandas DataFrame) as CSV to a binary file object.

    Floats are rounded to 4 decimals (0.1 mK, far below any signal) and written in their
    shortest form, missing values as empty cells, text unquoted (class and status names have
    no commas). pyarrow's writer does this about ten times faster than pandas' ``to_csv``
    with a float format, which matters for million-pixel scenes.
    """
    import pyarrow as pa
    import pyarrow.csv as pacsv

    arrays = {}
    for name in table.columns:
        values = table[name].to_numpy()
        if values.dtype.kind == "f":
            arrays[name] = pa.array(np.round(values.astype(np.float64), 4), from_pandas=True)
        elif values.dtype.kind in "biu":
            arrays[name] = pa.array(values)
        else:
            arrays[name] = pa.array(values.astype(str))
    if header:
        fh.write((",".join(map(str, table.columns)) + "\n").encode("utf-8"))
    pacsv.write_csv(pa.table(arrays), fh, pacsv.WriteOptions(include_header=False, quoting_style="none"))


def write_simulation(scene, sim, path, fmt=None):
    """Write the clear-sky simulation (bt_clear_<ch> and the slant water-vapour path)."""
    ds = scene.data
    coords = _grid_coords(ds["row"].values, ds["col"].values, *((ds["lat"].values, ds["lon"].values)
                           if "lat" in ds.coords and "lon" in ds.coords else ()))
    coordinates = _coordinates_attr(coords)
    out = xr.Dataset(coords=coords)
    for i, ch in enumerate(sim.channels):
        out[f"bt_clear_{ch}"] = xr.Variable(("y", "x"), sim.bt_clear[i].astype(np.float32), {
            "standard_name": "toa_brightness_temperature_assuming_clear_sky", "units": "K",
            "long_name": f"clear-sky brightness temperature, {ch} ({sim.source[ch]})",
            "ancillary_variables": f"bt_clear_uncertainty_{ch}"})
        out[f"bt_clear_uncertainty_{ch}"] = xr.Variable(("y", "x"), clear_part(sim.sigma, ch),
                                                        _uncertainty_attrs(ch))
        out[f"departure_{ch}"] = xr.Variable(("y", "x"), (ds[f"bt_{ch}"].values - sim.bt_clear[i]).astype(np.float32),
                                             {"long_name": f"observed minus clear-sky brightness temperature, {ch}",
                                              "units": "K"})
    out["slant_water_vapour_path"] = xr.Variable(("y", "x"), sim.slant_path.astype(np.float32), {
        "long_name": "total column water vapour times secant of the viewing zenith angle", "units": "kg m-2"})
    for v in out.data_vars.values():
        v.attrs["coordinates"] = coordinates
    out.attrs.update({"Conventions": "CF-1.10", "title": f"cloudsieve clear-sky simulation of scene {scene.name}",
                      "source": f"cloudsieve {__version__}", "history": _history("simulate"), "comment": CAUTION,
                      "cloudsieve_physics": _physics_path()})
    return write_result(out, path, fmt)
