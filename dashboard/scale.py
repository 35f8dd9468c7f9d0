"""Large scenes and archives: the same pipeline, chunked along rows, on Dask.

The in-memory path (:mod:`dashboard.pipeline`) holds a whole scene and, for the dashboard,
the per-level arrays of every pixel. Here nothing of the size of the scene times the number
of levels ever exists: scenes load lazily (NetCDF through xarray with chunks along y;
Parquet row group by row group), the physics kernels run block by block through
``xarray.apply_ufunc(..., dask="parallelized")``, the texture test sees its neighbours
across block borders through an overlap of half its window, and results are written chunk
by chunk. The per-pixel arithmetic is the in-memory path's own (``pipeline.screen_arrays``,
``pipeline.invert_columns``, ``physics.clearsky.simulate_channel_major``), so both paths give
the same numbers (tested to 1e-6 K).

Passes over a scene:

1. clear-sky brightness temperatures (persisted: 4 bytes × channels per pixel);
2. screening of every block (with halo rows) → additive sums for the clear-sky bias fit;
3. if bias removal is on, screening again with the fitted line;
4. grey-cloud inversion of the non-clear pixels of every block (their columns are simulated
   again with levels, inside the block, and dropped);
5. writing, block by block.

Schedulers: the default is Dask's threaded scheduler (numpy releases the GIL); a
``dask.distributed`` client (``--workers N`` starts a local cluster, ``--scheduler ADDRESS``
joins an existing one) is used when given.
"""
from dataclasses import dataclass, field
import time
from pathlib import Path

import dask
import dask.array as da
import numpy as np
import xarray as xr

from physics.absorption import channel_coefficients
from physics.atmosphere import profile_levels_first
from physics.clearsky import simulate_channel_major

from . import pipeline as pl
from .config import absorption_table, per_surface
from .errors import SceneError
from .scene import _RANGES, _open_netcdf, known_channel_names, scene_format

DEFAULT_CHUNK_ROWS = 256
_INPUTS = ("t_skin", "t_air", "tcwv", "sat_zenith", "sol_zenith", "p_surf", "surface")


# ---------------------------------------------------------------------------------------
# lazy loading
# ---------------------------------------------------------------------------------------
@dataclass
class LazyScene:
    """A scene whose variables are dask arrays chunked along y (duck-types Scene for export)."""

    data: xr.Dataset
    channels: tuple
    name: str
    path: Path
    notes: list = field(default_factory=list)

    @property
    def shape(self):
        return self.data.sizes["y"], self.data.sizes["x"]


def open_lazy(path, config, chunk_rows=DEFAULT_CHUNK_ROWS):
    """Open a NetCDF or Parquet scene without loading it whole; check it with dask reductions.

    Returns
    -------
    LazyScene

    Raises
    ------
    SceneError
        Listing every problem found (missing variables, unknown channels, °C, ranges).
    """
    path = Path(path)
    if not path.is_file():
        raise SceneError(f"scene file '{path}' does not exist. Check the path.")
    fmt = scene_format(path)
    if fmt == "netcdf":
        try:
            ds = _open_netcdf(path)
        except Exception as exc:  # noqa: BLE001 — any reader failure is a bad file for the user
            msg = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            raise SceneError(f"'{path.name}' is not a readable NetCDF file ({msg}).") from None
        if "y" not in ds.dims or "x" not in ds.dims:
            raise SceneError(f"'{path.name}' has no variables on dimensions (y, x) (found {dict(ds.sizes)}); "
                             "a NetCDF scene holds the scene columns as 2-D variables on (y, x).")
        if any(v.startswith("profile_") for v in ds.data_vars):
            raise SceneError(f"'{path.name}' holds explicit profiles; the chunked path builds profiles from the "
                             "surface numbers only. Screen it without --chunks/--workers (in memory).")
        ds = ds.chunk({"y": chunk_rows, "x": -1})
    elif fmt == "parquet":
        ds = _parquet_to_grid(path, chunk_rows)
    else:
        raise SceneError(f"'{path.name}': the chunked path reads NetCDF and Parquet; load CSV scenes in memory "
                         "(omit --chunks/--workers/--scheduler) or convert them to Parquet.")
    known = known_channel_names(config)
    problems = []
    channels = []
    for name in ds.data_vars:
        if name.startswith("bt_") and not name.startswith("bt_clear_"):
            ch = name[3:]
            if ch in known:
                channels.append(ch)
            else:
                problems.append(f"variable '{name}' names an unknown channel '{ch}'; define it in [channels] of "
                                "the config or rename it")
    order = [c for c in known if c in channels]
    missing = [v for v in ("t_skin", "t_air", "tcwv", "sat_zenith") if v not in ds]
    if missing or not order:
        problems.append(f"required variable(s) missing: {', '.join(missing + ([] if order else ['bt_<channel>']))}")
        raise SceneError(f"scene {path.name} is NOT usable:", problems)
    ny, nx = ds.sizes["y"], ds.sizes["x"]
    data = {}
    for name in [f"bt_{c}" for c in order] + [f"emis_{c}" for c in order if f"emis_{c}" in ds] + \
            [f"bt_clear_{c}" for c in order if f"bt_clear_{c}" in ds] + ["t_skin", "t_air", "tcwv", "sat_zenith"]:
        data[name] = ds[name].astype(np.float64)
    data["sol_zenith"] = ds["sol_zenith"].astype(np.float64) if "sol_zenith" in ds else \
        xr.DataArray(da.full((ny, nx), np.nan, chunks=(chunk_rows, nx)), dims=("y", "x"))
    data["p_surf"] = ds["p_surf"].astype(np.float64) if "p_surf" in ds else \
        xr.DataArray(da.full((ny, nx), 1013.25, chunks=(chunk_rows, nx)), dims=("y", "x"))
    if "surface" in ds:
        surf = ds["surface"]
        data["surface"] = xr.where(surf.isin([0, 1, 2]), surf, 0).astype(np.int8)
    else:
        data["surface"] = xr.DataArray(da.zeros((ny, nx), dtype=np.int8, chunks=(chunk_rows, nx)), dims=("y", "x"))
    coords = {"row": ("y", np.asarray(ds["row"].values if "row" in ds.variables else np.arange(ny), np.int32)),
              "col": ("x", np.asarray(ds["col"].values if "col" in ds.variables else np.arange(nx), np.int32))}
    for c in ("lat", "lon"):
        if c in ds.variables and ds[c].dims == ("y", "x"):
            coords[c] = (("y", "x"), ds[c].data)
    out = xr.Dataset(data, coords=coords)
    needed = [f"bt_{c}" for c in order] + ["t_skin", "t_air", "tcwv", "sat_zenith"]
    valid = None
    for v in needed:
        ok = np.isfinite(out[v])
        valid = ok if valid is None else valid & ok
    out["valid"] = valid.persist()  # one byte per pixel, reused by every pass
    _check_ranges(out, order, path.name, problems)
    out.attrs["channels"] = " ".join(order)
    return LazyScene(out, tuple(order), path.stem, path)


def _check_ranges(ds, channels, name, problems):
    """Scene-wide checks by dask reductions: °C temperatures, values out of range."""
    names = [v for v in ds.data_vars if v not in ("surface", "valid")]
    stats = {v: (ds[v].min(skipna=True).data, ds[v].max(skipna=True).data, ds[v].mean(skipna=True).data)
             for v in names}
    (computed,) = dask.compute(stats)
    for v, (lo_v, hi_v, mean_v) in computed.items():
        lo_v, hi_v, mean_v = float(lo_v), float(hi_v), float(mean_v)
        if not np.isfinite(mean_v):
            continue
        key = "bt_clear_<ch>" if v.startswith("bt_clear_") else "bt_<ch>" if v.startswith("bt_") else \
            "emis_<ch>" if v.startswith("emis_") else v
        rng = _RANGES.get(key)
        if rng is None:
            continue
        if (v.startswith("bt") or v in ("t_skin", "t_air")) and mean_v < 100:
            problems.append(f"'{v}' looks like °C (mean {mean_v:.1f}); temperatures must be in kelvin: add 273.15")
        elif lo_v < rng[0] or hi_v > rng[1]:
            problems.append(f"'{v}' has values outside {rng[0]:g}–{rng[1]:g} (found {lo_v:g}…{hi_v:g}); check units "
                            "and missing-value codes")
    if problems:
        raise SceneError(f"scene {name} is NOT usable:", problems)


def _parquet_to_grid(path, chunk_rows):
    """Read a Parquet scene row group by row group into float grids (never as one table)."""
    import pyarrow.parquet as pq

    try:
        pf = pq.ParquetFile(path)
    except Exception as exc:  # noqa: BLE001
        raise SceneError(f"'{path.name}' is not a readable Parquet file ({str(exc).splitlines()[0]}).") from None
    cols = [c for c in pf.schema_arrow.names]
    if "row" not in cols or "col" not in cols:
        raise SceneError(f"'{path.name}' needs integer 'row' and 'col' columns")
    rmax = cmax = -1
    rmin = cmin = None
    for batch in pf.iter_batches(columns=["row", "col"], batch_size=1 << 20):
        r = batch.column(0).to_numpy(zero_copy_only=False)
        c = batch.column(1).to_numpy(zero_copy_only=False)
        rmax, cmax = max(rmax, int(r.max())), max(cmax, int(c.max()))
        rmin = int(r.min()) if rmin is None else min(rmin, int(r.min()))
        cmin = int(c.min()) if cmin is None else min(cmin, int(c.min()))
    ny, nx = rmax - rmin + 1, cmax - cmin + 1
    wanted = [c for c in cols if c not in ("row", "col")]
    grids = {}
    for name in wanted:
        grids[name] = np.zeros((ny, nx), np.int8) if name == "surface" else np.full((ny, nx), np.nan, np.float32)
    lut = {"sea": 0, "land": 1, "ice": 2}
    for batch in pf.iter_batches(batch_size=1 << 18):
        r = batch.column(batch.schema.get_field_index("row")).to_numpy(zero_copy_only=False).astype(np.int64) - rmin
        c = batch.column(batch.schema.get_field_index("col")).to_numpy(zero_copy_only=False).astype(np.int64) - cmin
        for name in wanted:
            col = batch.column(batch.schema.get_field_index(name))
            if name == "surface":
                vals = col.to_pandas().astype(str).str.strip().str.lower().map(lut).fillna(0).to_numpy(np.int8)
            else:
                vals = col.to_numpy(zero_copy_only=False).astype(np.float32)
            grids[name][r, c] = vals
    data = {k: (("y", "x"), da.from_array(v, chunks=(chunk_rows, nx))) for k, v in grids.items()
            if k not in ("lat", "lon")}
    coords = {"row": ("y", np.arange(rmin, rmin + ny, dtype=np.int32)),
              "col": ("x", np.arange(cmin, cmin + nx, dtype=np.int32))}
    for k in ("lat", "lon"):
        if k in grids:
            coords[k] = (("y", "x"), da.from_array(grids[k], chunks=(chunk_rows, nx)))
    return xr.Dataset(data, coords=coords)


# ---------------------------------------------------------------------------------------
# block kernels (numpy in, numpy out)
# ---------------------------------------------------------------------------------------
_ALLOCATOR_TUNED = False


def _tune_allocator():
    """Let glibc keep the physics' short-lived, MB-sized temporaries on the heap (once per process).

    Dask's nanny starts workers with ``MALLOC_TRIM_THRESHOLD_=65536``, which also freezes
    glibc's mmap threshold at 128 KiB: every temporary of a simulation block (≈1 MB) is then
    mapped, zero-filled page by page and unmapped again, which halves the kernels' speed
    (measured: 58 000 instead of 133 000 columns/s on one core). Here temporaries below
    16 MiB come from the heap, and at most 64 MiB of free heap top is kept before it is
    returned to the system. A no-op where the C library is not glibc.
    """
    global _ALLOCATOR_TUNED
    if _ALLOCATOR_TUNED:
        return
    _ALLOCATOR_TUNED = True
    try:
        import ctypes

        libc = ctypes.CDLL("libc.so.6")
        m_trim_threshold, m_mmap_threshold = -1, -3  # <malloc.h>
        libc.mallopt(m_mmap_threshold, 16 << 20)
        libc.mallopt(m_trim_threshold, 64 << 20)
    except (OSError, AttributeError):
        pass


def _columns(t_air, tcwv, p_surf, t_skin, zen, emis, chans, coeffs, sim_cfg, levels):
    """Simulate pixel columns (1-D inputs, emis (n_ch, n)) chunk by chunk, like pipeline.simulate."""
    f32 = np.float32
    n = t_air.size
    chunk = int(sim_cfg["chunk_pixels"])
    n_lev = int(sim_cfg["levels"])
    n_ch = len(chans)
    bt = np.empty((n_ch, n), f32)
    rad = np.empty((n_ch, n), f32)
    lp = np.empty((n, n_lev), f32) if levels else None
    lt = np.empty((n, n_lev), f32) if levels else None
    opq = np.empty((n, n_lev, n_ch), f32) if levels else None
    for s in range(0, n, chunk):
        sl = slice(s, min(s + chunk, n))
        p, t, q = profile_levels_first(t_air[sl], tcwv[sl], p_surf[sl], n_lev, sim_cfg["top_pressure"], dtype=f32)
        r = simulate_channel_major(p, t, q, t_skin[sl], emis[:, sl], zen[sl], chans, coeffs, levels=levels)
        bt[:, sl] = r.brightness_temperature
        rad[:, sl] = r.radiance
        if levels:
            lp[sl], lt[sl] = p.T, t.T
            opq[sl] = r.opaque_radiance.transpose(2, 1, 0)
    return bt, rad, lp, lt, opq


def _inputs_f32(t_air, tcwv, p_surf, t_skin, zen, idx):
    f32 = np.float32
    p = p_surf.ravel()[idx].astype(f32)
    return (t_air.ravel()[idx].astype(f32), tcwv.ravel()[idx].astype(f32), np.where(np.isfinite(p), p, f32(1013.25)),
            t_skin.ravel()[idx].astype(f32), zen.ravel()[idx].astype(f32))


def _clear_kernel(t_air, tcwv, p_surf, t_skin, zen, valid, emis, *, chans, coeffs, sim_cfg):
    """apply_ufunc kernel: clear-sky brightness temperature (..., n_ch) [K] of a block."""
    _tune_allocator()
    shape = t_air.shape
    idx = np.flatnonzero(valid.ravel())
    out = np.full((len(chans), t_air.size), np.nan, np.float32)
    if idx.size:
        args = _inputs_f32(t_air, tcwv, p_surf, t_skin, zen, idx)
        e = emis.reshape(-1, len(chans))[idx].T.astype(np.float32)
        bt, *_ = _columns(*args, e, chans, coeffs, sim_cfg, levels=False)
        out[:, idx] = bt
    return np.moveaxis(out.reshape((len(chans),) + shape), 0, -1)


def _cloud_kernel(t_air, tcwv, p_surf, t_skin, zen, valid, mask, obs, clear, emis, sigma_k, *, chans, coeffs,
                  sim_cfg, config, inv, ci):
    """apply_ufunc kernel: grey-cloud layer of the non-clear pixels of a block.

    Returns (..., n_inv + 7): emissivities, τ, σ_τ, τ_ext, p_top, T_top, status, uncertain.
    """
    _tune_allocator()
    shape = t_air.shape
    n_inv = len(inv)
    out = np.full((t_air.size, n_inv + 7), np.nan)
    out[:, n_inv + 5] = pl.pcloud.STATUS_NOT_CLOUDY
    out[:, n_inv + 6] = 0.0
    keep = valid.ravel() & ((mask.ravel() == pl.CLOUD) | (mask.ravel() == pl.MARGINAL))
    all_idx = np.flatnonzero(keep)
    step = max(1024, int(sim_cfg["chunk_pixels"]) * 16)  # levels exist only for this many columns at once
    for start in range(0, all_idx.size, step):
        idx = all_idx[start:start + step]
        args = _inputs_f32(t_air, tcwv, p_surf, t_skin, zen, idx)
        e = emis.reshape(-1, len(chans))[idx].T.astype(np.float32)
        _, _, lp, lt, opq = _columns(*args, e, chans, coeffs, sim_cfg, levels=True)
        obs_bt = obs.reshape(-1, obs.shape[-1])[idx][:, ci]
        clr_bt = clear.reshape(-1, clear.shape[-1])[idx][:, ci].astype(float)
        res = pl.invert_columns(obs_bt, clr_bt, lp, lt, opq[:, :, ci], zen.ravel()[idx], sigma_k.ravel()[idx],
                                [chans[i] for i in ci], inv, config)
        out[idx, :n_inv] = res["emissivity"]
        for k, key in enumerate(("optical_depth", "optical_depth_sigma", "extinction_optical_depth", "top_pressure",
                                 "top_temperature", "status", "uncertain")):
            out[idx, n_inv + k] = res[key]
    return out.reshape(shape + (n_inv + 7,))


# ---------------------------------------------------------------------------------------
# the chunked screening
# ---------------------------------------------------------------------------------------
def _emissivity(ds, channels, config):
    """(y, x, channel) emissivity as a lazy DataArray (emis_<ch> where given, else by surface)."""
    table = config["surface"]["emissivity"]
    parts = []
    for ch in channels:
        default = {s: table[s].get(ch, table[s].get("11um", 0.98)) for s in ("sea", "land", "ice")}
        lut = np.array([default["sea"], default["land"], default["ice"]])
        e = xr.apply_ufunc(lambda s, lut=lut: lut[np.clip(s, 0, 2)], ds["surface"], dask="parallelized",
                           output_dtypes=[np.float64])
        if f"emis_{ch}" in ds:
            e = xr.where(np.isfinite(ds[f"emis_{ch}"]), ds[f"emis_{ch}"], e)
        parts.append(e)
    return xr.concat(parts, dim="channel").transpose("y", "x", "channel")


def _stack(arrays):
    return da.stack([a.astype(np.float64) for a in arrays], axis=0)


def _screen_block(block, *, channels, config, bias, night_any, day_any, n_ch, has_edits):
    """Screening of one (fields, rows, x) block (halo rows included); stacked outputs."""
    obs = {ch: block[i] for i, ch in enumerate(channels)}
    clear = {ch: block[n_ch + i] for i, ch in enumerate(channels)}
    k = 2 * n_ch
    fields = {"surface": block[k].astype(np.int8), "valid": block[k + 1] > 0.5, "sol_zenith": block[k + 2],
              "slant_path": block[k + 3]}
    edits = block[k + 4].astype(np.int8) if has_edits else None
    out = pl.screen_arrays(obs, clear, fields, config, bias, edits, night_any, day_any)
    layers = [out["departure"][ch] for ch in channels]
    layers += [out["margins"].get(t, np.full(block.shape[1:], np.nan)) for t in pl.TESTS]
    layers += [out["mask"].astype(float), out["bits"].astype(float), out["sigma"]]
    return np.stack(layers)


@dataclass
class ChunkedResult:
    """Duck-types the Simulation/Screening pair for :func:`dashboard.export.result_dataset`."""

    channels: tuple
    bt_clear: object
    source: dict
    departure: dict
    margins: dict
    mask: object
    bits: object
    bias: dict
    notes: list
    skipped: dict
    cloud: object
    counts: dict = field(default_factory=dict)


def screen_chunked(scene, config, edits=None):
    """Build the lazy result of a :class:`LazyScene` (passes 1–4; writing is left to the caller).

    Returns
    -------
    ChunkedResult
        mask, bits, departures, margins and the cloud layer as dask arrays.
    """
    ds = scene.data
    names = scene.channels
    n_ch = len(names)
    chans = pl.scene_channels(config, names)
    coeffs = channel_coefficients(chans, absorption_table(config))
    sim_cfg = dict(config["simulation"])
    rows = ds.chunks["y"]
    nx = ds.sizes["x"]
    emis = _emissivity(ds, names, config).chunk({"y": rows, "x": -1, "channel": -1})
    # pass 1: clear sky
    clear = xr.apply_ufunc(
        _clear_kernel, ds["t_air"], ds["tcwv"], ds["p_surf"], ds["t_skin"], ds["sat_zenith"], ds["valid"], emis,
        input_core_dims=[[]] * 6 + [["channel"]], output_core_dims=[["channel"]], dask="parallelized",
        output_dtypes=[np.float32], dask_gufunc_kwargs={"output_sizes": {"channel": n_ch}},
        kwargs={"chans": chans, "coeffs": coeffs, "sim_cfg": sim_cfg},
    )
    source = {}
    layers = []
    for i, ch in enumerate(names):
        c = clear.isel(channel=i)
        if f"bt_clear_{ch}" in ds:
            user = ds[f"bt_clear_{ch}"].astype(np.float32)
            c = xr.where(np.isfinite(user) & ds["valid"], user, c)
            source[ch] = "user"
        else:
            source[ch] = "simulated"
        layers.append(c.data)
    bt_clear = da.stack(layers).persist()  # (n_ch, y, x) float32: the one persisted product
    mu = np.cos(np.deg2rad(ds["sat_zenith"].data))
    slant = (ds["tcwv"].data / mu).astype(np.float32)
    night = np.isfinite(ds["sol_zenith"].data) & (ds["sol_zenith"].data > config["screening"]["night_sun_zenith"])
    night_any, day_any = dask.compute(night.any(), (~night & ds["valid"].data).any())
    night_any, day_any = bool(night_any), bool(day_any)
    edit_grid = pl.edits_grid(scene.shape, edits) if edits else None
    inputs = [ds[f"bt_{c}"].data for c in names] + [bt_clear[i] for i in range(n_ch)] + \
             [ds["surface"].data, ds["valid"].data, ds["sol_zenith"].data, slant]
    if edit_grid is not None:
        inputs.append(da.from_array(edit_grid, chunks=(rows, nx)))
    stack = _stack(inputs).rechunk((len(inputs), rows, nx))
    half = int(config["tests"]["texture"]["window"]) // 2
    n_out = n_ch + len(pl.TESTS) + 3

    def screened(bias):
        g = da.overlap.overlap(stack, depth={0: 0, 1: half, 2: 0}, boundary="none")
        out = g.map_blocks(_screen_block, dtype=np.float64, chunks=(n_out,) + g.chunks[1:],
                           channels=names, config=config, bias=bias, night_any=night_any, day_any=day_any,
                           n_ch=n_ch, has_edits=edit_grid is not None)
        return da.overlap.trim_internal(out, {0: 0, 1: half, 2: 0}, boundary="none")

    # probe one small block for the notes and skipped tests (scene-wide flags passed in)
    probe = pl.screen_arrays({c: np.full((1, 1), 280.0) for c in names}, {c: np.full((1, 1), 280.0) for c in names},
                             {"surface": np.zeros((1, 1), np.int8), "valid": np.ones((1, 1), bool),
                              "sol_zenith": np.full((1, 1), 120.0 if night_any else 30.0),
                              "slant_path": np.ones((1, 1))}, config, None, None, night_any, day_any)
    notes, skipped = list(probe["notes"]), dict(probe["skipped"])
    out = screened(None)
    mask_i, bits_i = n_ch + len(pl.TESTS), n_ch + len(pl.TESTS) + 1

    sums = _bias_sums_dask(out, slant, ds["valid"].data, names, mask_i, bits_i)
    bias = pl.bias_from_sums(sums, config["bias"]["min_pixels"])
    applied = False
    if config["bias"]["remove"]:
        if all(np.isfinite(b["a"]) for b in bias.values()):
            out = screened(bias)
            applied = True
        else:
            notes.append(f"bias not removed: fewer than {config['bias']['min_pixels']} clear pixels to fit it")
    for b in bias.values():
        b["applied"] = applied
    mask = out[mask_i].astype(np.int8)
    bits = out[bits_i].astype(np.uint16)
    departure = {ch: out[i] for i, ch in enumerate(names)}
    margins = {t: out[n_ch + k] for k, t in enumerate(pl.TESTS) if t not in skipped}
    sigma = out[n_out - 1]
    # pass 4: cloud layer of the non-clear pixels
    inv = pl._inversion_channels(type("S", (), {"channels": names})(), config)
    ci = [names.index(c) for c in inv]
    obs_da = xr.concat([ds[f"bt_{c}"] for c in names], dim="channel").transpose("y", "x", "channel")
    clr_bt = bt_clear
    if applied:
        slant64 = slant.astype(np.float64)
        clr_bt = da.stack([bt_clear[i].astype(np.float64) + (bias[ch]["a"] + bias[ch]["b"] * slant64)
                           for i, ch in enumerate(names)])
    clr_da = xr.DataArray(da.moveaxis(clr_bt, 0, -1), dims=("y", "x", "channel"))
    mask_da = xr.DataArray(mask, dims=("y", "x"))
    sig_da = xr.DataArray(sigma, dims=("y", "x"))
    cl = xr.apply_ufunc(
        _cloud_kernel, ds["t_air"], ds["tcwv"], ds["p_surf"], ds["t_skin"], ds["sat_zenith"], ds["valid"], mask_da,
        obs_da.chunk({"channel": -1}), clr_da.chunk({"y": rows, "channel": -1}), emis, sig_da,
        input_core_dims=[[]] * 7 + [["channel"]] * 3 + [[]], output_core_dims=[["cfield"]], dask="parallelized",
        output_dtypes=[np.float64], dask_gufunc_kwargs={"output_sizes": {"cfield": len(inv) + 7}},
        kwargs={"chans": chans, "coeffs": coeffs, "sim_cfg": sim_cfg, "config": config, "inv": inv, "ci": ci},
    ).data
    n_inv = len(inv)
    cloud = pl.CloudLayer(da.moveaxis(cl[..., :n_inv], -1, 0), cl[..., n_inv], cl[..., n_inv + 1],
                          cl[..., n_inv + 2], cl[..., n_inv + 3], cl[..., n_inv + 4],
                          cl[..., n_inv + 5].astype(np.int8), cl[..., n_inv + 6] > 0.5, tuple(inv),
                          config["cloud"]["top"], [])
    return ChunkedResult(names, bt_clear, source, departure, margins, mask, bits, bias, notes, skipped, cloud)


def _bias_sums_dask(out, slant, valid, names, mask_i, bits_i):
    """Bias-fit sums over all blocks (one small reduction)."""
    n_ch = len(names)

    def block_sums(dep_block, mask_block, bits_block, valid_block, slant_block):
        dep = {ch: dep_block[i] for i, ch in enumerate(names)}
        s = pl.bias_sums(dep, slant_block, mask_block.astype(np.int8), bits_block.astype(np.uint16), valid_block)
        return np.stack([s[ch] for ch in names])[None]

    rows = out.chunks[1]
    nx = out.shape[2]
    dep = out[:n_ch].rechunk((n_ch, rows, nx))
    mask, bits = out[mask_i].rechunk((rows, nx)), out[bits_i].rechunk((rows, nx))
    valid, slant = valid.rechunk((rows, nx)), slant.rechunk((rows, nx))
    parts = [dask.delayed(block_sums)(dep.blocks[0, k, 0], mask.blocks[k, 0], bits.blocks[k, 0], valid.blocks[k, 0],
                                      slant.blocks[k, 0]) for k in range(len(rows))]
    total = np.sum(dask.compute(*parts), axis=0)[0]
    return {ch: total[i] for i, ch in enumerate(names)}


def _blocks(ds, rows_per_block):
    starts = np.cumsum((0,) + tuple(ds.chunks["y"])) if ds.chunks else np.array([0, ds.sizes["y"]])
    edges = list(starts)
    if rows_per_block:
        edges = list(range(0, ds.sizes["y"], rows_per_block)) + [ds.sizes["y"]]
    return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:]) if b > a]


def _compute_window(result, window):
    """Compute a few row blocks of the lazy result at once (threads or the active cluster)."""
    parts = [result.isel(y=slice(a, b)) for a, b in window]
    return dask.compute(*parts)


def write_chunked(scene, res, config, out_path, fmt=None, edits=None, parallel=2):
    """Write a chunked result block of rows by block of rows, atomically.

    Only ``parallel`` blocks are computed at a time and each is written as soon as it is
    computed, so memory stays bounded whatever the scene size. NetCDF is written with the
    same variables and CF attributes as the in-memory export; CSV block by block.

    Returns
    -------
    (Path, dict)
        The file written and the class fractions.
    """
    import netCDF4

    from .export import atomic_write, result_dataset, result_table

    out_path = Path(out_path)
    fmt = fmt or ("netcdf" if out_path.suffix.lower() in (".nc", ".nc4", ".netcdf") else "csv")
    result = result_dataset(scene, res, res, config, edits)
    blocks = _blocks(result, None)
    counts = np.zeros(len(pl.CLASS_NAMES))
    with atomic_write(out_path) as tmp:
        if fmt == "netcdf":
            nc = netCDF4.Dataset(tmp, "w", format="NETCDF4")
            try:
                ny, nx = result.sizes["y"], result.sizes["x"]
                nc.createDimension("y", ny)
                nc.createDimension("x", nx)
                for name in ("row", "col"):
                    var = nc.createVariable(name, "i4", result[name].dims)
                    var.setncatts(result[name].attrs)
                    var[:] = result[name].values
                layers = [n for n in result.variables if n not in ("row", "col")]
                for name in layers:
                    v = result[name]
                    is_float = v.dtype.kind == "f"
                    var = nc.createVariable(name, v.dtype, v.dims, zlib=True, complevel=4,
                                            fill_value=np.array(np.nan, v.dtype) if is_float else False,
                                            chunksizes=(min(max(b - a for a, b in blocks), ny), nx))
                    var.setncatts({k: val for k, val in v.attrs.items()})
                nc.setncatts({k: val for k, val in result.attrs.items()})
                for w in range(0, len(blocks), parallel):
                    window = blocks[w:w + parallel]
                    for (a, b), part in zip(window, _compute_window(result, window)):
                        for name in layers:
                            nc[name][a:b, :] = part[name].values
                        m = part["mask"].values
                        counts += [np.sum(m == k) for k in range(len(pl.CLASS_NAMES))]
            finally:
                nc.close()
        else:
            with open(tmp, "w", newline="") as fh:
                first = True
                for w in range(0, len(blocks), parallel):
                    window = blocks[w:w + parallel]
                    for part in _compute_window(result, window):
                        result_table(part).to_csv(fh, index=False, header=first, float_format="%.4f")
                        first = False
                        m = part["mask"].values
                        counts += [np.sum(m == k) for k in range(len(pl.CLASS_NAMES))]
    total = max(counts.sum(), 1)
    return out_path, {name: round(float(c / total), 4) for name, c in zip(pl.CLASS_NAMES, counts)}


def screen_file_chunked(path, out_path, config, fmt=None, chunk_rows=DEFAULT_CHUNK_ROWS, use_edits=True):
    """Screen one scene file on the chunked path and write the result; returns a summary dict."""
    from .journal import Journal, journal_path

    t0 = time.perf_counter()
    scene = open_lazy(path, config, chunk_rows)
    edits = []
    jp = journal_path(path)
    if use_edits and jp.exists():
        edits = Journal(jp, scene.shape[0] * scene.shape[1]).active()
    res = screen_chunked(scene, config, edits)
    _, counts = write_chunked(scene, res, config, out_path, fmt, edits)
    return {"scene": scene.name, "pixels": scene.shape[0] * scene.shape[1], **counts,
            "bias": {ch: {k: (round(v, 4) if isinstance(v, float) else v) for k, v in b.items()}
                     for ch, b in res.bias.items()},
            "skipped_tests": res.skipped, "notes": res.notes, "seconds": round(time.perf_counter() - t0, 2),
            "output": str(out_path), "qa_edits": len(edits)}
