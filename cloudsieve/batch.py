"""Screening scene files block by block: the batch path, for scenes of every size.

A scene is cut into blocks of grid rows. :func:`process_block` does one block start to
finish — the clear sky of its columns (:func:`simulate.simulate_columns`), the screening with
the rows the texture test needs on either side (:func:`screen.screen_arrays`), the grey-cloud
layer of its non-clear pixels, whose columns are simulated again with their level data a chunk
at a time (:func:`invert.invert_pixels`), and the sums of the bias fit — and the same task
turns its block into the output variables, deflated as the NetCDF file stores them
(:func:`export.encode_block`). The writer (:func:`export.write_blocks`) only places finished
blocks in the file.

The same function runs every block whatever the scene's size: an in-memory scene's blocks run
on threads; a scene opened lazily (``chunk_rows``: NetCDF through xarray, Parquet by row group,
dask arrays chunked along rows) has each block read and processed as one Dask task, on the
threaded scheduler or on a ``dask.distributed`` cluster. Memory stays bounded by the block
size. With ``[bias] remove = true`` the fit is needed before the final screening: a first
pass keeps each block's clear sky (4 bytes × channels per pixel) and the fit's sums, the
second screens with the fit and inverts.
"""
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, replace
import time
from pathlib import Path

import numpy as np

from . import export
from .codes import CLASS_NAMES, CLEAR, NO_DATA
from .invert import CloudLayer, inversion_channels, inversion_notes, invert_pixels
from .journal import Journal, journal_path
from .scene import load_scene
from .screen import (bias_decision, bias_from_sums, bias_sums, edits_grid, night_mask, plan_tests, screen_arrays,
                     summary_row)
from .simulate import (ChannelSet, clear_sky_source, gather_columns, simulate_columns, slant_path, surface_emissivity,
                       user_clear_sky)

DEFAULT_CHUNK_ROWS = export.CHUNK_ROWS
#: Above this many pixels a NetCDF or Parquet scene is screened lazily (``cloudsieve screen``)
AUTO_CHUNK_PIXELS = 4_000_000


@dataclass(frozen=True)
class BlockSpec:
    """Rows of one block: the core rows start:stop it produces, and lo:hi it reads (with the
    halo rows the texture test needs)."""

    start: int
    stop: int
    lo: int
    hi: int


def block_specs(ny, rows, halo):
    """The :class:`BlockSpec` s of a grid of ``ny`` rows in blocks of ``rows``."""
    return [BlockSpec(a, min(a + rows, ny), max(a - halo, 0), min(a + rows + halo, ny)) for a in range(0, ny, rows)]


@dataclass
class ScenePlan:
    """What every block of one scene needs besides its own rows (small, sent with each task).

    chset : simulate.ChannelSet; config : dict; tests : screen.TestPlan; inv : inversion channels;
    bias : channel -> {"a", "b"} to remove, or None; has_edits : an edit grid comes with each block;
    layout : export.Layout; header : export.ResultHeader; fmt : "netcdf" or "csv"; chunk_rows : int
    """

    chset: ChannelSet
    config: dict
    tests: object
    inv: tuple
    bias: dict
    layout: object
    header: object
    fmt: str
    chunk_rows: int


@dataclass
class BlockOutcome:
    """What :func:`process_block` returns: the encoded output block (or None in the bias pass),
    the bias-fit sums of its core rows, and its core rows' clear sky (bias pass only)."""

    encoded: object
    sums: dict
    clear: np.ndarray = None


def _tune_allocator():
    """Let glibc keep the physics' short-lived, MB-sized temporaries on the heap (once per process).

    Dask's nanny starts workers with ``MALLOC_TRIM_THRESHOLD_=65536``, which also freezes
    glibc's mmap threshold at 128 KiB: every temporary of a simulation block (≈1 MB) is then
    mapped, zero-filled page by page and unmapped again, which halves the kernels' speed
    (measured: 58 000 instead of 133 000 columns/s on one core). Here temporaries below
    16 MiB come from the heap, and at most 64 MiB of free heap top is kept before it is
    returned to the system. A no-op where the C library is not glibc.
    """
    if getattr(_tune_allocator, "done", False):
        return
    _tune_allocator.done = True
    try:
        import ctypes

        libc = ctypes.CDLL("libc.so.6")
        m_trim_threshold, m_mmap_threshold = -1, -3  # <malloc.h>
        libc.mallopt(m_mmap_threshold, 16 << 20)
        libc.mallopt(m_trim_threshold, 64 << 20)
    except (OSError, AttributeError):
        pass


def process_block(fields, spec, plan, edits=None, clear=None, final=True):
    """Screen one block of rows start to finish.

    Parameters
    ----------
    fields : mapping name -> array of rows lo:hi
        The scene's (y, x) variables (``valid``, ``surface``, ``bt_<ch>``, background, …).
    spec : BlockSpec
    plan : ScenePlan
    edits : (hi − lo, x) int8, optional
        QA edit codes of the rows.
    clear : (n_ch, hi − lo, x) float32, optional
        Clear-sky brightness temperatures [K] from the first pass (bias removal); simulated
        here when omitted.
    final : bool
        False for the first pass of the bias removal: no cloud layer, no output; the block's
        clear sky comes back instead.

    Returns
    -------
    BlockOutcome
    """
    _tune_allocator()
    fields = {k: np.asarray(v) for k, v in fields.items()}
    cfg, chset = plan.config, plan.chset
    names = chset.names
    valid = fields["valid"]
    emis = surface_emissivity(fields, names, cfg)
    if clear is None:
        idx = np.flatnonzero(valid.ravel())
        bt = simulate_columns(gather_columns(fields, emis, idx), chset, cfg["simulation"]).brightness_temperature
        clear = np.full((len(names),) + valid.shape, np.nan, np.float32)
        flat = clear.reshape(len(names), -1)
        flat[:, idx] = bt
        for ch, given in user_clear_sky(fields, names, idx).items():
            use = np.isfinite(given)
            flat[names.index(ch), idx[use]] = given[use]
    path = slant_path(fields["tcwv"], fields["sat_zenith"])
    obs = {c: fields[f"bt_{c}"] for c in names}
    screen_fields = {"surface": fields["surface"], "valid": valid, "sol_zenith": fields["sol_zenith"],
                     "slant_path": path}
    facts = plan.tests.facts
    scr = screen_arrays(obs, {c: clear[i] for i, c in enumerate(names)}, screen_fields, cfg, plan.bias, edits,
                        facts.night_any, facts.day_any)
    core = slice(spec.start - spec.lo, spec.stop - spec.lo)
    mask, bits = scr.mask[core], scr.bits[core]
    departure = {c: d[core] for c, d in scr.departure.items()}
    sums = bias_sums(departure, path[core], mask, bits, valid[core])
    if not final:
        return BlockOutcome(None, sums, clear[:, core])
    cloud = CloudLayer.empty(mask.shape, plan.inv, cfg["cloud"]["top"])
    core_fields = {k: v[core] for k, v in fields.items()}
    todo = np.flatnonzero((valid[core] & (mask != CLEAR) & (mask != NO_DATA)).ravel())
    step = max(1024, int(cfg["simulation"]["chunk_pixels"]) * 16)  # level data for this many columns at once
    bias_line = {c: (b["a"], b["b"]) for c, b in plan.bias.items()} if plan.bias else None
    for a in range(0, todo.size, step):
        part = todo[a:a + step]
        r = simulate_columns(gather_columns(core_fields, emis[:, core], part), chset, cfg["simulation"], levels=True)
        invert_pixels(cloud, part, {c: v[core] for c, v in obs.items()}, {c: clear[i, core] for i, c in enumerate(names)},
                      (r.level_pressure, r.level_temperature, r.opaque_radiance), fields["sat_zenith"][core],
                      scr.sigma[core], chset, cfg, path[core], bias_line)
    result = export.ResultBlock(spec.start, clear[:, core], departure, {t: m[core] for t, m in scr.margins.items()},
                                mask, bits, cloud)
    variables = export.block_variables(result, plan.header)
    return BlockOutcome(export.encode_block(spec.start, variables, plan.layout, plan.fmt, plan.chunk_rows), sums)


# ---------------------------------------------------------------------------------------
# running the blocks of a scene
# ---------------------------------------------------------------------------------------
def _is_lazy(ds):
    return any(hasattr(v.data, "dask") for v in ds.data_vars.values())


def _active_client():
    try:
        from distributed import get_client

        return get_client()
    except (ImportError, ValueError):
        return None


def _run_blocks(ds, specs, plan, edits, clear=None, final=True, threads=1):
    """Yield the :class:`BlockOutcome` of every block as it finishes (in any order).

    An in-memory scene's blocks run on ``threads`` threads; a lazy one's as Dask tasks (at most
    ``threads`` in flight on the threaded scheduler; all at once on a distributed cluster,
    whose workers keep only the small encoded results until the client takes them).
    """
    def args(s):
        f = {k: v.data[s.lo:s.hi] for k, v in ds.data_vars.items()}
        e = None if edits is None else edits[s.lo:s.hi]
        c = None if clear is None else clear[:, s.lo:s.hi]
        return f, s, plan, e, c, final

    if not _is_lazy(ds):
        with ThreadPoolExecutor(max(1, threads)) as pool:
            yield from pool.map(lambda s: process_block(*args(s)), specs)
        return
    import dask

    tasks = [dask.delayed(process_block, pure=False)(*args(s)) for s in specs]
    client = _active_client()
    if client is not None:
        from distributed import as_completed

        for fut in as_completed(client.compute(tasks)):
            yield fut.result()
            fut.release()
        return
    for w in range(0, len(tasks), max(1, threads)):
        yield from dask.compute(*tasks[w:w + max(1, threads)], scheduler="threads")


def _scene_flags(ds, config):
    """(night_any, day_any) over the whole scene's valid pixels (one pass, lazy or not)."""
    import dask

    night = night_mask(ds["sol_zenith"].data, config)
    valid = ds["valid"].data
    n, d = dask.compute((night & valid).any(), (~night & valid).any(), scheduler="threads")
    return bool(n), bool(d)


def screen_scene_file(scene, out_path, config, fmt=None, edits=None, chunk_rows=DEFAULT_CHUNK_ROWS, progress=None):
    """Screen a loaded scene (in memory or lazy) block by block and write the result.

    Parameters
    ----------
    scene : cloudsieve.scene.Scene
    out_path : str or Path
    config : dict
    fmt : {"netcdf", "csv"}, optional
    edits : list of QA edits, optional
    chunk_rows : int
        Rows per block (and per NetCDF chunk).
    progress : callable(n_pixels_done, n_pixels), optional

    Returns
    -------
    dict
        The summary row (scene, pixels, class fractions, bias, notes, …).
    """
    ds = scene.data
    ny, nx = ds.sizes["y"], ds.sizes["x"]
    fmt = export.format_of(out_path, fmt)
    names = tuple(scene.channels)
    chset = ChannelSet.for_scene(names, config)
    night_any, day_any = _scene_flags(ds, config)
    tests = plan_tests(names, config, night_any, day_any)
    inv = inversion_channels(names, config)
    rows = int(chunk_rows)
    specs = block_specs(ny, rows, int(config["tests"]["texture"]["window"]) // 2)
    threads = max(1, int(config["simulation"].get("threads", 1)))
    grid = edits_grid((ny, nx), edits) if edits else None
    has_latlon = "lat" in ds.coords and "lon" in ds.coords
    header = export.ResultHeader(
        scene.name, names, _source(ds, names), tests.run, inv, config["cloud"]["top"],
        {c: {"a": float("nan"), "b": float("nan"), "n": 0, "rms": float("nan"), "applied": False} for c in names},
        list(tests.notes) + inversion_notes(inv, config), dict(tests.skipped), config, len(edits or []), "screen", ds["row"].values, ds["col"].values,
        np.asarray(ds["lat"].values) if has_latlon else None, np.asarray(ds["lon"].values) if has_latlon else None)
    # the plan travels with every task: no per-pixel coordinates in it
    plan = ScenePlan(chset, config, tests, inv, None, None, replace(header, row=None, col=None, lat=None, lon=None),
                     fmt, rows)
    clear = None
    if config["bias"]["remove"]:  # first pass: the clear sky and the fit's sums
        clear = np.full((len(names), ny, nx), np.nan, np.float32)
        total = None
        for spec, out in zip(specs, _run_blocks(ds, specs, plan, grid, final=False, threads=threads)):
            clear[:, spec.start:spec.stop] = out.clear
            total = _add_sums(total, out.sums)
        header.bias = bias_from_sums(total, config["bias"]["min_pixels"])
        applied, note = bias_decision(header.bias, config)
        header.notes += [note] if note else []
        plan.bias = header.bias if applied else None
        plan.header = replace(plan.header, bias=header.bias, notes=header.notes)
    layout = export.result_layout(header)
    plan.layout = replace(layout, coords={})
    sums = {}
    done = [0]

    def on_block(blk):
        sums[blk.start] = blk.extra
        done[0] += (blk.stop - blk.start) * nx
        if progress:
            progress(done[0], ny * nx)

    def encoded():
        for out in _run_blocks(ds, specs, plan, grid, clear, threads=threads):
            out.encoded.extra = out.sums
            yield out.encoded

    def final_attrs():
        if not config["bias"]["remove"]:  # one pass: the fit is known once every block is in
            total = None
            for a in sorted(sums):
                total = _add_sums(total, sums[a])
            header.bias = bias_from_sums(total, config["bias"]["min_pixels"])
            for b in header.bias.values():
                b["applied"] = False
        return export.result_attrs(header)

    _, counts = export.write_blocks(layout, encoded(), out_path, fmt, rows, on_block, final_attrs)
    fractions = {name: counts[k] / max(counts.sum(), 1) for k, name in enumerate(CLASS_NAMES)}
    return summary_row(scene.name, ny * nx, fractions, header.bias, header.skipped, header.notes)


def _add_sums(total, sums):
    return dict(sums) if total is None else {c: total[c] + sums[c] for c in total}


def _source(ds, names):
    """Per channel where its clear sky comes from (counts the scene's bt_clear_<ch> once)."""
    import dask

    valid = ds["valid"].data
    given = {c: ((np.isfinite(ds[f"bt_clear_{c}"].data) & valid).sum(), valid.sum())
             for c in names if f"bt_clear_{c}" in ds}
    (given,) = dask.compute(given, scheduler="threads")
    return clear_sky_source(given, names)


def screen_file(path, out_path, config, fmt=None, chunk_rows=None, use_edits=True, progress=None):
    """Read, check and screen one scene file and write the result; returns the summary row.

    ``chunk_rows`` opens the scene lazily in blocks of that many rows (bounded memory);
    without it the scene is read whole and screened in blocks of ``DEFAULT_CHUNK_ROWS``.
    """
    t0 = time.perf_counter()
    scene = load_scene(path, config=config, chunk_rows=chunk_rows)
    edits = []
    jp = journal_path(path)
    if use_edits and jp.exists():
        edits = Journal(jp, scene.data.sizes["y"] * scene.data.sizes["x"]).active()
    row = screen_scene_file(scene, out_path, config, fmt, edits, chunk_rows or DEFAULT_CHUNK_ROWS, progress)
    row.update(seconds=round(time.perf_counter() - t0, 2), output=str(Path(out_path)), qa_edits=len(edits))
    return row
