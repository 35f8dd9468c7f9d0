"""Large scenes and archives: the same pipeline, chunked along rows, on Dask.

The in-memory path (:mod:`dashboard.pipeline`) holds a whole scene and, for the dashboard,
the per-level arrays of every pixel. Here nothing of the size of the scene times the number
of levels ever exists: scenes load lazily (NetCDF through xarray with chunks along y;
Parquet row group by row group), the physics kernels run block by block as Dask tasks
(``map_blocks`` over row blocks overlapped by half the texture window, so the texture test
sees its neighbours across block borders; ``xarray.apply_ufunc(..., dask="parallelized")``
for the clear-sky and cloud passes when the bias is removed), and results are written chunk
by chunk. The per-pixel arithmetic is the in-memory path's own (``pipeline.screen_arrays``,
``pipeline.invert_columns``, ``physics.clearsky.simulate_channel_major``), so both paths give
the same numbers (tested to 1e-6 K).

Passes over a scene (default, no bias removal): one. Each row block, with the halo rows the
texture test needs, is simulated once in slabs of rows, screened, and its non-clear pixels
inverted from the level data of the same simulation, which is then dropped; the bias-fit sums
come out of the same task and the fit is added to the file's attributes at the end. With
``[bias] remove = true`` the fit is needed before the final screening: clear sky first
(persisted: 4 bytes × channels per pixel), a screening for the fit, a second with it, and the
non-clear columns simulated again with levels for the cloud layer.

Writing: the block tasks also convert their block to the exported variables and deflate them
as HDF5 stores a chunk; the client only places finished chunks in the file, so neither the
big intermediate arrays nor the compression pass through it.

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
        data[name] = _widened(ds[name])
    data["sol_zenith"] = _widened(ds["sol_zenith"]) if "sol_zenith" in ds else \
        xr.DataArray(da.full((ny, nx), np.nan, chunks=(chunk_rows, nx)), dims=("y", "x"),
                     attrs={"cloudsieve_float32_exact": 1})
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
    # The checks read every variable once. They run on this process's threads even when a
    # Dask cluster is attached: shipping the chunks to workers and back made them four times
    # slower (4.1–4.6 s against 1.1 s for 2000 × 2000) and they do not scale with workers.
    out["valid"] = valid.persist(scheduler="threads")  # one byte per pixel, reused by every pass
    _check_ranges(out, order, path.name, problems)
    out.attrs["channels"] = " ".join(order)
    return LazyScene(out, tuple(order), path.stem, path)


def _widened(var):
    """float64 copy of a scene variable, noting whether float32 holds its values exactly
    (float32 or narrower integers in the file), so blocks can travel as float32."""
    dt = var.dtype
    exact = (dt.kind == "f" and dt.itemsize <= 4) or (dt.kind in "iub" and dt.itemsize <= 2)
    out = var.astype(np.float64)
    out.attrs = dict(var.attrs, cloudsieve_float32_exact=int(exact))
    return out


def _check_ranges(ds, channels, name, problems):
    """Scene-wide checks by dask reductions: °C temperatures, values out of range."""
    names = [v for v in ds.data_vars if v not in ("surface", "valid")]
    stats = {v: (ds[v].min(skipna=True).data, ds[v].max(skipna=True).data, ds[v].mean(skipna=True).data)
             for v in names}
    (computed,) = dask.compute(stats, scheduler="threads")  # see open_lazy
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


def _fused_block(*blocks, block_info=None, nk, half, names, chans, coeffs, sim_cfg, config, inv, ci, night_any,
                 day_any, has_edits, layout):
    """One row block, start to finish: clear sky, screening, cloud layer and bias-fit sums.

    ``blocks`` are the (rows, x) input fields of the block (in ``layout["inputs"]`` order)
    with ``half`` halo rows on each side that has a neighbour. Its columns are simulated once, in slabs of rows, with
    the per-level data kept only until the slab's rows are screened (the texture test needs
    ``half`` rows on either side) and its non-clear pixels inverted; so no column is
    simulated twice and level data never exist for more than a slab and its halo.

    Returns the (layer, core rows, x) float32 output stack (see :func:`_layout`): every layer
    is written as float32 (or is exact in it); the float64 bias-fit sums travel bit for bit
    in the last layer (:func:`_pack_sums`).
    """
    _tune_allocator()
    k = block_info[0]["chunk-location"][0]
    top, bot = (half if k > 0 else 0), (half if k < nk - 1 else 0)
    n_ch, n_inv = len(names), len(inv)
    n_rows, nx = blocks[0].shape
    f = dict(zip(layout["inputs"], blocks))
    for name in ("sat_zenith", "sol_zenith"):  # float64 arithmetic as in memory (widening is exact)
        f[name] = f[name].astype(np.float64, copy=False)
    valid = f["valid"] > 0.5
    emis = np.stack([f[f"emis_{c}"] for c in names])
    obs = {c: f[f"bt_{c}"].astype(np.float64, copy=False) for c in names}
    user = {c: f[f"user_{c}"].astype(np.float32) for c in names}
    fields = {"surface": f["surface"].astype(np.int8), "valid": valid, "sol_zenith": f["sol_zenith"],
              "slant_path": f["slant"]}
    edits = f["edits"].astype(np.int8) if has_edits else None
    core0, core1 = top, n_rows - bot
    out = np.full((layout["n_out"], core1 - core0, nx), np.nan)
    L = layout
    out[L["status"]] = pl.pcloud.STATUS_NOT_CLOUDY
    out[L["uncertain"]] = 0.0
    clear = np.full((n_ch, n_rows, nx), np.nan, np.float32)
    slab = max(1, int(sim_cfg["chunk_pixels"]) * 16 // max(nx, 1))
    kept = []  # (first row, last row + 1, pixel position in the slab's columns or -1, p, T, opaque radiance)
    done = core0
    for s0 in range(0, n_rows, slab):
        s1 = min(s0 + slab, n_rows)
        flat = np.flatnonzero(valid[s0:s1].ravel())
        pos = np.full((s1 - s0) * nx, -1, np.int64)
        pos[flat] = np.arange(flat.size)
        lv = None
        if flat.size:
            idx = flat + s0 * nx
            args = _inputs_f32(f["t_air"], f["tcwv"], f["p_surf"], f["t_skin"], f["sat_zenith"], idx)
            e = emis.reshape(n_ch, -1)[:, idx].astype(np.float32)
            want_levels = s1 > core0 and s0 < core1  # halo-only slabs need no level data
            bt, _, lp, lt, opq = _columns(*args, e, chans, coeffs, sim_cfg, levels=want_levels)
            rows_clear = clear[:, s0:s1].reshape(n_ch, -1)
            rows_clear[:, flat] = bt
            for i, c in enumerate(names):  # the user's clear-sky values replace the simulation where given
                u = user[c][s0:s1].ravel()
                use = np.isfinite(u) & valid[s0:s1].ravel()
                rows_clear[i, use] = u[use]
            if want_levels:
                lv = (lp, lt, opq[:, :, ci])
        kept.append((s0, s1, pos, lv))
        ready = core1 if s1 == n_rows else min(s1 - half, core1)
        if ready <= done:
            continue
        w0, w1 = max(done - half, 0), min(ready + half, n_rows)
        win = slice(w0, w1)
        scr = pl.screen_arrays({c: obs[c][win] for c in names}, {c: clear[i, win] for i, c in enumerate(names)},
                               {key: v[win] for key, v in fields.items()}, config, None,
                               None if edits is None else edits[win], night_any, day_any)
        r = slice(done - w0, ready - w0)  # the rows finished now, within the window
        o = slice(done - core0, ready - core0)  # the same rows in the output
        for i, c in enumerate(names):
            out[L["departure"][i], o] = scr["departure"][c][r]
            out[L["bt_clear"][i], o] = clear[i, done:ready]
        for j, t in enumerate(pl.TESTS):
            if t in scr["margins"]:
                out[L["margins"][j], o] = scr["margins"][t][r]
        mask = scr["mask"][r]
        out[L["mask"], o] = mask
        out[L["bits"], o] = scr["bits"][r]
        sigma = scr["sigma"][r]
        todo = valid[done:ready] & ((mask == pl.CLOUD) | (mask == pl.MARGINAL))
        for s0_, s1_, pos_, lv_ in kept:
            a, b = max(s0_, done), min(s1_, ready)
            if a >= b or lv_ is None:
                continue
            sel = todo[a - done:b - done]
            ry, rx = np.nonzero(sel)
            if not ry.size:
                continue
            p = pos_[(ry + a - s0_) * nx + rx]
            gy = ry + a  # block rows
            obs_bt = np.stack([obs[inv[q]][gy, rx] for q in range(n_inv)], axis=-1)
            clr_bt = np.stack([clear[ci[q], gy, rx] for q in range(n_inv)], axis=-1).astype(float)
            res = pl.invert_columns(obs_bt, clr_bt, lv_[0][p], lv_[1][p], lv_[2][p], f["sat_zenith"][gy, rx],
                                    sigma[gy - done, rx], [chans[q] for q in ci], inv, config)
            oy = gy - core0
            for q in range(n_inv):
                out[L["cloud"][q], oy, rx] = res["emissivity"][:, q]
            for key in ("optical_depth", "optical_depth_sigma", "extinction_optical_depth", "top_pressure",
                        "top_temperature", "status", "uncertain"):
                out[L[key], oy, rx] = res[key]
        done = ready
        kept = [kk for kk in kept if kk[1] > done]
    sums = pl.bias_sums({c: out[L["departure"][i]] for i, c in enumerate(names)}, f["slant"][core0:core1],
                        out[L["mask"]].astype(np.int8), out[L["bits"]].astype(np.uint16), valid[core0:core1])
    out32 = out.astype(np.float32)
    _pack_sums(out32[L["sums"]], np.stack([sums[c] for c in names]))
    return out32


def _pack_sums(layer, sums):
    """Store float64 sums bit for bit in the first cells of a float32 (or float64) layer."""
    flat = np.ascontiguousarray(sums, np.float64).ravel()
    view = layer.reshape(-1)
    if layer.dtype == np.float32:
        view[:2 * flat.size] = flat.view(np.float32)
    else:
        view[:flat.size] = flat


def _unpack_sums(layer, n_ch):
    """The (n_ch, 6) float64 sums stored by :func:`_pack_sums`."""
    flat = np.ascontiguousarray(layer).reshape(-1)
    if flat.dtype == np.float32:
        return flat[:12 * n_ch].copy().view(np.float64).reshape(n_ch, 6)
    return flat[:6 * n_ch].reshape(n_ch, 6)


def _layout(names, inv, edits):
    """Positions of the fields in the input stack and of the layers in the output stack."""
    n_ch, n_t, n_inv = len(names), len(pl.TESTS), len(inv)
    inputs = ["t_air", "tcwv", "p_surf", "t_skin", "sat_zenith", "valid"] + [f"emis_{c}" for c in names] + \
        [f"bt_{c}" for c in names] + [f"user_{c}" for c in names] + ["surface", "sol_zenith", "slant"] + \
        (["edits"] if edits else [])
    L = {"inputs": inputs, "departure": list(range(n_ch)), "margins": list(range(n_ch, n_ch + n_t)),
         "mask": n_ch + n_t, "bits": n_ch + n_t + 1}
    b0 = n_ch + n_t + 2
    L["bt_clear"] = list(range(b0, b0 + n_ch))
    c0 = b0 + n_ch
    L["cloud"] = list(range(c0, c0 + n_inv))
    for j, key in enumerate(("optical_depth", "optical_depth_sigma", "extinction_optical_depth", "top_pressure",
                             "top_temperature", "status", "uncertain")):
        L[key] = c0 + n_inv + j
    L["sums"] = c0 + n_inv + 7
    L["n_out"] = L["sums"] + 1
    return L


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
    stack: object = None  # (layer, y, x) dask array of every output layer (see _layout)
    layout: dict = None
    bias_pending: bool = False  # the bias fit is summed up while writing (one pass)


def _result_from_stack(stack, L, names, inv, method, source, bias, notes, skipped):
    """A ChunkedResult whose fields are layers of ``stack`` (dask for the whole scene, numpy for a block)."""
    n_inv = len(inv)
    cloud = pl.CloudLayer(stack[L["cloud"][0]:L["cloud"][0] + n_inv], stack[L["optical_depth"]],
                          stack[L["optical_depth_sigma"]], stack[L["extinction_optical_depth"]],
                          stack[L["top_pressure"]], stack[L["top_temperature"]], stack[L["status"]].astype(np.int8),
                          stack[L["uncertain"]] > 0.5, tuple(inv), method, [])
    return ChunkedResult(names, stack[L["bt_clear"][0]:L["bt_clear"][0] + len(names)], source,
                         {c: stack[L["departure"][i]] for i, c in enumerate(names)},
                         {t: stack[L["margins"][j]] for j, t in enumerate(pl.TESTS) if t not in skipped},
                         stack[L["mask"]].astype(np.int8), stack[L["bits"]].astype(np.uint16), bias, notes, skipped,
                         cloud)


def screen_chunked(scene, config, edits=None):
    """Build the lazy result of a :class:`LazyScene` (writing is left to :func:`write_chunked`).

    Without bias removal (the default) every row block is done in one task
    (:func:`_fused_block`: each column simulated once) and the bias fit is summed while
    writing. With bias removal the fit must be known before the final screening: the clear
    sky is simulated and kept first, the scene screened for the fit, screened again with it,
    and the non-clear columns simulated again with levels for the cloud layer.

    Returns
    -------
    ChunkedResult
        mask, bits, departures, margins and the cloud layer as layers of one dask array.
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
    mu = np.cos(np.deg2rad(ds["sat_zenith"].data))
    slant = (ds["tcwv"].data / mu).astype(np.float32)
    night = np.isfinite(ds["sol_zenith"].data) & (ds["sol_zenith"].data > config["screening"]["night_sun_zenith"])
    night_any, day_any = dask.compute(night.any(), (~night & ds["valid"].data).any())
    night_any, day_any = bool(night_any), bool(day_any)
    edit_grid = pl.edits_grid(scene.shape, edits) if edits else None
    half = int(config["tests"]["texture"]["window"]) // 2
    inv = pl._inversion_channels(type("S", (), {"channels": names})(), config)
    ci = [names.index(c) for c in inv]
    L = _layout(names, inv, edit_grid is not None)
    source = {ch: "user" if f"bt_clear_{ch}" in ds else "simulated" for ch in names}
    # probe one small block for the notes and skipped tests (scene-wide flags passed in)
    probe = pl.screen_arrays({c: np.full((1, 1), 280.0) for c in names}, {c: np.full((1, 1), 280.0) for c in names},
                             {"surface": np.zeros((1, 1), np.int8), "valid": np.ones((1, 1), bool),
                              "sol_zenith": np.full((1, 1), 120.0 if night_any else 30.0),
                              "slant_path": np.ones((1, 1))}, config, None, None, night_any, day_any)
    notes, skipped = list(probe["notes"]), dict(probe["skipped"])
    method = config["cloud"]["top"]
    if not config["bias"]["remove"]:
        f32 = np.float32
        nan = da.full((ds.sizes["y"], nx), np.nan, dtype=f32, chunks=(rows, nx))

        def exact_or_wide(name):  # float32 only where it holds the file's values exactly
            v = ds[name]
            return v.data.astype(f32) if v.attrs.get("cloudsieve_float32_exact") else v.data

        # fields the kernel uses only in float32 (the simulation, emissivities, user clear sky) go
        # as float32; observations and angles as in the file
        parts = {"t_air": ds["t_air"].data.astype(f32), "tcwv": ds["tcwv"].data.astype(f32),
                 "p_surf": ds["p_surf"].data.astype(f32), "t_skin": ds["t_skin"].data.astype(f32),
                 "sat_zenith": exact_or_wide("sat_zenith"), "valid": ds["valid"].data,
                 "surface": ds["surface"].data, "sol_zenith": exact_or_wide("sol_zenith"), "slant": slant}
        for i, c in enumerate(names):
            parts[f"emis_{c}"] = emis.data[..., i].astype(f32)
            parts[f"bt_{c}"] = exact_or_wide(f"bt_{c}")
            parts[f"user_{c}"] = ds[f"bt_clear_{c}"].data.astype(f32) if f"bt_clear_{c}" in ds else nan
        if edit_grid is not None:
            parts["edits"] = da.from_array(edit_grid, chunks=(rows, nx))
        arrays = [parts[name].rechunk((rows, nx)) for name in L["inputs"]]
        out = da.map_overlap(_fused_block, *arrays, depth={0: half, 1: 0}, boundary="none", trim=False,
                             align_arrays=False, dtype=np.float32, chunks=((L["n_out"],), rows, (nx,)), new_axis=0,
                             meta=np.array((), np.float32), nk=len(rows), half=half, names=names, chans=chans,
                             coeffs=coeffs, sim_cfg=sim_cfg, config=config, inv=inv, ci=ci, night_any=night_any,
                             day_any=day_any, has_edits=edit_grid is not None, layout=L)
        bias = {c: {"a": float("nan"), "b": float("nan"), "n": 0, "rms": float("nan"), "applied": False}
                for c in names}  # summed up while writing
        res = _result_from_stack(out, L, names, inv, method, source, bias, notes, skipped)
        res.stack, res.layout, res.bias_pending = out, L, True
        return res
    # bias removal: clear sky first (persisted: 4 bytes × channels per pixel)
    clear = xr.apply_ufunc(
        _clear_kernel, ds["t_air"], ds["tcwv"], ds["p_surf"], ds["t_skin"], ds["sat_zenith"], ds["valid"], emis,
        input_core_dims=[[]] * 6 + [["channel"]], output_core_dims=[["channel"]], dask="parallelized",
        output_dtypes=[np.float32], dask_gufunc_kwargs={"output_sizes": {"channel": n_ch}},
        kwargs={"chans": chans, "coeffs": coeffs, "sim_cfg": sim_cfg},
    )
    layers = []
    for i, ch in enumerate(names):
        c = clear.isel(channel=i)
        if f"bt_clear_{ch}" in ds:
            user = ds[f"bt_clear_{ch}"].astype(np.float32)
            c = xr.where(np.isfinite(user) & ds["valid"], user, c)
        layers.append(c.data)
    bt_clear = da.stack(layers).persist()  # (n_ch, y, x) float32
    inputs = [ds[f"bt_{c}"].data for c in names] + [bt_clear[i] for i in range(n_ch)] + \
             [ds["surface"].data, ds["valid"].data, ds["sol_zenith"].data, slant]
    if edit_grid is not None:
        inputs.append(da.from_array(edit_grid, chunks=(rows, nx)))
    stack = _stack(inputs).rechunk((len(inputs), rows, nx))
    n_scr = n_ch + len(pl.TESTS) + 3

    def screened(bias):
        g = da.overlap.overlap(stack, depth={0: 0, 1: half, 2: 0}, boundary="none")
        o = g.map_blocks(_screen_block, dtype=np.float64, chunks=(n_scr,) + g.chunks[1:],
                         channels=names, config=config, bias=bias, night_any=night_any, day_any=day_any,
                         n_ch=n_ch, has_edits=edit_grid is not None)
        return da.overlap.trim_internal(o, {0: 0, 1: half, 2: 0}, boundary="none")

    scr = screened(None)
    mask_i, bits_i = n_ch + len(pl.TESTS), n_ch + len(pl.TESTS) + 1
    sums = _bias_sums_dask(scr, slant, ds["valid"].data, names, mask_i, bits_i)
    bias = pl.bias_from_sums(sums, config["bias"]["min_pixels"])
    applied = all(np.isfinite(b["a"]) for b in bias.values())
    if applied:
        scr = screened(bias)
    else:
        notes.append(f"bias not removed: fewer than {config['bias']['min_pixels']} clear pixels to fit it")
    for b in bias.values():
        b["applied"] = applied
    mask = scr[mask_i].astype(np.int8)
    sigma = scr[n_scr - 1]
    obs_da = xr.concat([ds[f"bt_{c}"] for c in names], dim="channel").transpose("y", "x", "channel")
    clr_bt = bt_clear
    if applied:
        slant64 = slant.astype(np.float64)
        clr_bt = da.stack([bt_clear[i].astype(np.float64) + (bias[ch]["a"] + bias[ch]["b"] * slant64)
                           for i, ch in enumerate(names)])
    clr_da = xr.DataArray(da.moveaxis(clr_bt, 0, -1), dims=("y", "x", "channel"))
    cl = xr.apply_ufunc(
        _cloud_kernel, ds["t_air"], ds["tcwv"], ds["p_surf"], ds["t_skin"], ds["sat_zenith"], ds["valid"],
        xr.DataArray(mask, dims=("y", "x")), obs_da.chunk({"channel": -1}), clr_da.chunk({"y": rows, "channel": -1}),
        emis, xr.DataArray(sigma, dims=("y", "x")),
        input_core_dims=[[]] * 7 + [["channel"]] * 3 + [[]], output_core_dims=[["cfield"]], dask="parallelized",
        output_dtypes=[np.float64], dask_gufunc_kwargs={"output_sizes": {"cfield": len(inv) + 7}},
        kwargs={"chans": chans, "coeffs": coeffs, "sim_cfg": sim_cfg, "config": config, "inv": inv, "ci": ci},
    ).data
    out = da.concatenate([scr[:n_ch + len(pl.TESTS) + 2], bt_clear.astype(np.float64), da.moveaxis(cl, -1, 0),
                          da.full((1, ds.sizes["y"], nx), np.nan, chunks=(1, rows, nx))], axis=0)
    out = out.rechunk((L["n_out"], rows, nx))
    res = _result_from_stack(out, L, names, inv, method, source, bias, notes, skipped)
    res.stack, res.layout = out, L
    return res


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


# ---------------------------------------------------------------------------------------
# writing
# ---------------------------------------------------------------------------------------
def _hdf5_chunk(values, chunk_rows, fill, complevel, shuffle):
    """One (chunk_rows, x) chunk as HDF5 stores it: padded, byte-shuffled, zlib-deflated."""
    import zlib

    values = np.ascontiguousarray(values)
    if values.shape[0] < chunk_rows:  # the last block: pad to the full chunk (never read back)
        pad = np.full((chunk_rows - values.shape[0],) + values.shape[1:], fill, values.dtype)
        values = np.concatenate([values, pad])
    raw = values.view(np.uint8)
    size = values.dtype.itemsize
    if shuffle and size > 1:  # HDF5's shuffle filter: byte j of every element together
        raw = raw.reshape(-1, size).T
    return zlib.compress(np.ascontiguousarray(raw).tobytes(), complevel)


def _encode_block(stack, a, b, meta):
    """Worker side of writing: one block's output variables (final dtypes), deflated for NetCDF.

    Returns (block start, {variable: bytes or array}, class counts, bias-fit sums).
    """
    L = meta["layout"]
    names = meta["names"]
    res = _result_from_stack(stack, L, names, meta["inv"], meta["method"], meta["source"], meta["bias"],
                             meta["notes"], meta["skipped"])
    scene = type("BlockScene", (), {"name": meta["scene_name"],
                                     "data": xr.Dataset(coords={"row": ("y", meta["row"][a:b]),
                                                                "col": ("x", meta["col"])})})()
    part = result_dataset_for(scene, res, meta)
    variables = {}
    for name in meta["variables"]:
        v = part[name].values
        if meta["fmt"] == "netcdf":
            enc = meta["encoding"][name]
            variables[name] = _hdf5_chunk(v, meta["chunk_rows"], enc["fill"], enc["complevel"], enc["shuffle"])
        else:
            variables[name] = v
    m = part["mask"].values
    counts = np.array([np.sum(m == k) for k in range(len(pl.CLASS_NAMES))])
    sums = _unpack_sums(stack[L["sums"]], len(names))
    return a, variables, counts, sums


def result_dataset_for(scene, res, meta):
    from .export import result_dataset

    return result_dataset(scene, res, res, meta["config"], meta["edits"])


def _active_client():
    try:
        from distributed import get_client

        return get_client()
    except (ImportError, ValueError):
        return None


def _blocks_done(tasks, parallel):
    """Yield the results of the block tasks as they finish, with at most ``parallel`` in flight
    on the threaded scheduler; on a dask.distributed cluster all go in one graph and the
    workers keep only the small encoded results until the client takes them."""
    client = _active_client()
    if client is not None:
        from distributed import as_completed

        futures = client.compute(tasks)
        for fut in as_completed(futures):
            yield fut.result()
            fut.release()
        return
    for w in range(0, len(tasks), parallel):
        yield from dask.compute(*tasks[w:w + parallel])


def write_chunked(scene, res, config, out_path, fmt=None, edits=None, parallel=2):
    """Write a chunked result block of rows by block of rows, atomically.

    The workers (or the local threads) compute each block, convert it to the exported
    variables and, for NetCDF, deflate each variable's block exactly as HDF5 would store it
    (shuffle + zlib, one chunk per block); the client only places the ready chunks in the file
    (HDF5 direct chunk writes) or appends CSV rows. Memory stays bounded whatever the scene
    size. NetCDF gets the same variables and CF attributes as the in-memory export.

    Returns
    -------
    (Path, dict)
        The file written and the class fractions.
    """
    import netCDF4

    from .export import atomic_write, netcdf_encoding, result_dataset, result_table, write_table_csv

    out_path = Path(out_path)
    fmt = fmt or ("netcdf" if out_path.suffix.lower() in (".nc", ".nc4", ".netcdf") else "csv")
    meta_ds = result_dataset(scene, res, res, config, edits)  # lazy: names, dtypes, attributes
    variables = [n for n in meta_ds.data_vars]
    stack = res.stack
    rows = stack.chunks[1]
    chunk_rows = max(rows)
    ny, nx = meta_ds.sizes["y"], meta_ds.sizes["x"]
    enc_all = netcdf_encoding(meta_ds)
    encoding = {}
    for name in variables:
        e = enc_all.get(name, {})
        is_float = meta_ds[name].dtype.kind == "f"
        encoding[name] = {"complevel": int(e.get("complevel", 1)), "shuffle": bool(e.get("shuffle", True)),
                          "fill": np.nan if is_float else 0}
    meta = {"layout": res.layout, "names": res.channels, "inv": res.cloud.channels, "method": res.cloud.method,
            "source": res.source, "bias": res.bias, "notes": res.notes, "skipped": res.skipped,
            "scene_name": scene.name, "row": meta_ds["row"].values, "col": meta_ds["col"].values,
            "config": config, "edits": edits, "variables": variables, "fmt": fmt, "encoding": encoding,
            "chunk_rows": chunk_rows}
    starts = np.cumsum((0,) + rows)
    blocks = stack.to_delayed().ravel()
    tasks = [dask.delayed(_encode_block)(blk, int(starts[k]), int(starts[k + 1]), meta)
             for k, blk in enumerate(blocks)]
    counts = np.zeros(len(pl.CLASS_NAMES))
    sums = np.zeros((len(res.channels), 6))
    ordered_sums = {}
    with atomic_write(out_path) as tmp:
        if fmt == "netcdf":
            import h5py

            with netCDF4.Dataset(tmp, "w", format="NETCDF4") as nc:
                nc.createDimension("y", ny)
                nc.createDimension("x", nx)
                for name in meta_ds.coords:
                    v = meta_ds[name]
                    var = nc.createVariable(name, v.dtype, v.dims)
                    var.setncatts(v.attrs)
                    var[:] = v.values
                for name in variables:
                    v, e = meta_ds[name], encoding[name]
                    var = nc.createVariable(name, v.dtype, v.dims, zlib=True, complevel=e["complevel"],
                                            shuffle=e["shuffle"],
                                            fill_value=np.array(np.nan, v.dtype) if v.dtype.kind == "f" else False,
                                            chunksizes=(min(chunk_rows, ny), nx))
                    var.setncatts(v.attrs)
            with h5py.File(tmp, "r+") as h5:
                dsets = {name: h5[name] for name in variables}
                for a, enc, cnt, s in _blocks_done(tasks, parallel):
                    for name, data in enc.items():
                        dsets[name].id.write_direct_chunk((a, 0), data)
                    counts += cnt
                    ordered_sums[a] = s
        else:
            lat = meta_ds["lat"].values if "lat" in meta_ds.coords else None
            lon = meta_ds["lon"].values if "lon" in meta_ds.coords else None
            with open(tmp, "wb") as fh:
                pending = {}
                nxt = 0
                for a, enc, cnt, s in _blocks_done(tasks, parallel):
                    pending[a] = enc
                    counts += cnt
                    ordered_sums[a] = s
                    while nxt < len(rows) and int(starts[nxt]) in pending:  # rows in order
                        a0, b0 = int(starts[nxt]), int(starts[nxt + 1])
                        part = xr.Dataset({k: (("y", "x"), v) for k, v in pending.pop(a0).items()},
                                          coords={"row": ("y", meta["row"][a0:b0]), "col": ("x", meta["col"])})
                        if lat is not None:
                            part = part.assign_coords(lat=(("y", "x"), lat[a0:b0]), lon=(("y", "x"), lon[a0:b0]))
                        write_table_csv(result_table(part), fh, header=nxt == 0)
                        nxt += 1
        if res.bias_pending:  # one pass: the fit is known now; add it to the file's attributes
            for a in sorted(ordered_sums):
                sums += ordered_sums[a]
            res.bias.update(pl.bias_from_sums({c: sums[i] for i, c in enumerate(res.channels)},
                                              config["bias"]["min_pixels"]))
            for b in res.bias.values():
                b["applied"] = False
            res.bias_pending = False
        if fmt == "netcdf":
            attrs = result_dataset(scene, res, res, config, edits).attrs
            with netCDF4.Dataset(tmp, "a") as nc:
                nc.setncatts({k: val for k, val in attrs.items()})
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
