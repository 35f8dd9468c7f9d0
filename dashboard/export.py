"""Masks and cloud layer out: one xarray Dataset, written as CSV or CF-NetCDF, atomically.

The CLI and the dashboard both call :func:`result_dataset` and the writers here, so the
same scene, configuration and edits give the same files from either.
"""
import contextlib
import datetime as _dt
import json
import os
from pathlib import Path
import tempfile

import numpy as np
import pandas as pd
import xarray as xr

from physics.cloud import STATUS_NAMES

from . import __version__, CAUTION
from .config import config_json
from .errors import OutputError
from .pipeline import BIT_NAMES, BITS, CLASS_NAMES, TESTS

_TEST_LONG = {
    "cold_departure": "cold departure of the window channel beyond its expected clear-sky uncertainty",
    "split_window_excess": "11-12 um difference above the simulated clear-sky difference",
    "texture": "local standard deviation of the window-channel departure",
    "night_fog_contrast": "night-time 3.9-11 um difference below the clear-sky difference",
    "warm_departure": "window channel warmer than clear sky (background suspect)",
}


def _grid_coords(ds):
    """row/col (and lat/lon when the scene has them) as CF coordinate variables of (y, x)."""
    coords = {"row": ("y", ds["row"].values.astype(np.int32), {"long_name": "grid row index", "units": "1"}),
              "col": ("x", ds["col"].values.astype(np.int32), {"long_name": "grid column index", "units": "1"})}
    has_latlon = "lat" in ds.coords and "lon" in ds.coords
    if has_latlon:
        coords["lat"] = (("y", "x"), ds["lat"].values.astype(np.float32),
                         {"standard_name": "latitude", "units": "degrees_north", "long_name": "latitude"})
        coords["lon"] = (("y", "x"), ds["lon"].values.astype(np.float32),
                         {"standard_name": "longitude", "units": "degrees_east", "long_name": "longitude"})
    return {k: xr.Variable(*v) for k, v in coords.items()}, ("row col lat lon" if has_latlon else "row col")


def _physics_path():
    """Which implementation simulated the clear sky in this process (provenance of the file)."""
    from physics import fused

    if fused.enabled():
        return "compiled float32 kernels (physics.fused, numba)"
    return "numpy reference" + (f" (compiled kernels unavailable: {fused.failure})" if fused.failure else "")


def _history(action):
    return f"{_dt.datetime.now(_dt.timezone.utc).strftime('%Y-%m-%dT%H:%M:%SZ')} cloudsieve {__version__} {action}"


def result_dataset(scene, sim, res, config, edits=None, action="screen"):
    """Everything written for a screened scene, as a CF-annotated Dataset on (y, x).

    Parameters
    ----------
    scene : dashboard.scene.Scene
    sim : dashboard.pipeline.Simulation
    res : dashboard.pipeline.Screening
    config : dict
    edits : list, optional
        The QA edits applied (stored as a count and in the bit field).
    action : str
        What made the file, for the ``history`` attribute (``screen`` from the CLI, a
        dashboard export otherwise).

    Returns
    -------
    xarray.Dataset
    """
    ds = scene.data
    coords, coordinates = _grid_coords(ds)
    out = xr.Dataset(coords=coords)

    def put(name, data, attrs, dtype=np.float32):
        # dask arrays (the chunked path) stay lazy, so writing computes them block by block
        data = data.astype(dtype) if hasattr(data, "dask") else np.asarray(data).astype(dtype)
        out[name] = xr.Variable(("y", "x"), data, attrs)

    put("mask", res.mask, {"long_name": "cloud screening class", "units": "1",
                           "flag_values": np.arange(len(CLASS_NAMES), dtype=np.int8),
                           "flag_meanings": " ".join(CLASS_NAMES)}, np.int8)
    put("test_bits", res.bits, {"long_name": "screening tests that fired, and analyst edits", "units": "1",
                                "flag_masks": np.array([BITS[b] for b in BIT_NAMES], dtype=np.uint16),
                                "flag_meanings": " ".join(BIT_NAMES)}, np.uint16)
    for test in TESTS:
        if test in res.margins:
            put(f"margin_{test}", res.margins[test],
                {"long_name": f"margin of test {test}: {_TEST_LONG[test]} (positive: fired)", "units": "K"})
    for i, ch in enumerate(sim.channels):
        put(f"departure_{ch}", res.departure[ch],
            {"long_name": f"observed minus clear-sky brightness temperature, {ch}"
                          + (" (clear-sky bias removed)" if res.bias[ch].get("applied") else ""), "units": "K"})
        put(f"bt_clear_{ch}", sim.bt_clear[i],
            {"standard_name": "toa_brightness_temperature_assuming_clear_sky", "units": "K",
             "long_name": f"clear-sky brightness temperature, {ch} ({sim.source[ch]})"})
    cl = res.cloud
    if cl is not None:
        for k, ch in enumerate(cl.channels):
            put(f"cloud_emissivity_{ch}", cl.emissivity[k],
                {"long_name": f"emissivity of channel {ch} at the retrieved cloud top, unclipped: "
                              f"(L_obs - L_clear)/(L_opaque - L_clear); departures from cloud_emissivity "
                              f"show noise or a cloud that is not grey", "units": "1"})
        ref = config["cloud"]["reference_channel"]
        k_ref = cl.channels.index(ref) if ref in cl.channels else 0
        put("cloud_emissivity", np.clip(cl.emissivity[k_ref], 0.0, 1.0),
            {"long_name": f"slant emissivity of the single grey cloud layer ({cl.channels[k_ref]}), clipped to "
                          f"[0, 1]; 1 where inversion_status is opaque (cloud_optical_depth then a lower bound)",
             "units": "1"})
        put("cloud_optical_depth", cl.optical_depth,
            {"long_name": "vertical infrared absorption optical depth of a single grey cloud layer "
                          "(a lower bound where inversion_status is opaque)", "units": "1"})
        put("cloud_optical_depth_uncertainty", cl.optical_depth_sigma,
            {"long_name": "1-sigma uncertainty of cloud_optical_depth (inf: opaque, lower bound)", "units": "1"})
        put("cloud_extinction_optical_depth", cl.extinction_optical_depth,
            {"long_name": "window extinction optical depth by the similarity relation tau_abs/(1 - ssa*g)",
             "units": "1"})
        put("cloud_top_pressure", cl.top_pressure,
            {"standard_name": "air_pressure_at_cloud_top", "units": "hPa",
             "long_name": f"cloud-top pressure ({cl.method} top)"})
        put("cloud_top_temperature", cl.top_temperature,
            {"long_name": "air temperature at the cloud top", "units": "K"})
        put("inversion_status", cl.status, {"long_name": "outcome of the grey-cloud inversion", "units": "1",
                                            "flag_values": np.arange(len(STATUS_NAMES), dtype=np.int8),
                                            "flag_meanings": " ".join(STATUS_NAMES)}, np.int8)
        put("cloud_optical_depth_uncertain", cl.uncertain.astype(np.int8),
            {"long_name": "relative optical-depth uncertainty above 100 %", "units": "1",
             "flag_values": np.array([0, 1], np.int8), "flag_meanings": "no yes"}, np.int8)
    for v in out.data_vars.values():  # auxiliary coordinates (CF 5): grid indices, and lat/lon when given
        v.attrs["coordinates"] = coordinates
    out.attrs.update({
        "Conventions": "CF-1.10",
        "title": f"cloudsieve cloud screening of scene {scene.name}",
        "source": f"cloudsieve {__version__}",
        "institution": "cloudsieve users",
        "history": _history(action),
        "comment": CAUTION,
        "references": "README.md of cloudsieve: methods, tests and their published sources",
        "cloudsieve_scene": str(scene.name),
        "cloudsieve_channels": " ".join(sim.channels),
        "cloudsieve_physics": _physics_path(),
        "cloudsieve_config": config_json(config),
        "cloudsieve_bias_fit": json.dumps(res.bias, sort_keys=True),
        "cloudsieve_notes": json.dumps(res.notes + (cl.notes if cl is not None else [])),
        "cloudsieve_qa_edits": str(len(edits or [])),
    })
    return out


def result_table(result):
    """The result Dataset as one row per pixel, text labels for the class and status."""
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
        else:
            cols[name] = vals
    return pd.DataFrame(cols)


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


def write_csv(result, path):
    """Write the result as CSV atomically (a temporary file renamed into place)."""
    with atomic_write(path) as tmp:
        with open(tmp, "wb") as fh:
            write_table_csv(result_table(result), fh)
    return Path(path)


def netcdf_encoding(result):
    """Compression and fill values of every variable (NaN for floats, none for integers).

    zlib level 1 with the byte shuffle: on a 1000 × 1000 result it writes in half the time of
    level 4 and the file is no larger (the shuffle does more for float fields than the level).
    """
    enc = {name: {"zlib": True, "complevel": 1, "shuffle": True,
                  "_FillValue": np.float32(np.nan) if var.dtype.kind == "f" else None}
           for name, var in result.data_vars.items()}
    enc.update({name: {"_FillValue": None} for name in result.coords})
    return enc


def write_netcdf(result, path):
    """Write the result as compressed CF-NetCDF4 atomically."""
    with atomic_write(path) as tmp:
        result.to_netcdf(tmp, engine="netcdf4", encoding=netcdf_encoding(result))
    return Path(path)


def write_result(result, path, fmt=None):
    """Write CSV or NetCDF by ``fmt`` or by the file extension."""
    fmt = fmt or ("netcdf" if Path(path).suffix.lower() in (".nc", ".nc4", ".netcdf") else "csv")
    return write_netcdf(result, path) if fmt == "netcdf" else write_csv(result, path)


def write_simulation(scene, sim, path, fmt=None):
    """Write the clear-sky simulation (bt_clear_<ch> and the slant water-vapour path)."""
    ds = scene.data
    coords, coordinates = _grid_coords(ds)
    out = xr.Dataset(coords=coords)
    for i, ch in enumerate(sim.channels):
        out[f"bt_clear_{ch}"] = xr.Variable(("y", "x"), sim.bt_clear[i].astype(np.float32), {
            "standard_name": "toa_brightness_temperature_assuming_clear_sky", "units": "K",
            "long_name": f"clear-sky brightness temperature, {ch} ({sim.source[ch]})"})
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
