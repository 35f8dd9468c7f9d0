"""Screening scene files block by block: the batch path, for scenes of every size.

A scene is cut into blocks of grid rows. :func:`process_block` does one block start to
finish — the clear sky of its columns (:func:`simulate.simulate_columns`), the screening with
the rows the texture test needs on either side (:func:`screen.screen_arrays`), the cloud
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
from .invert import CloudLayer, inversion_bias, inversion_channels, invert_pixels, layer_beta
from .journal import Journal, journal_path
from .scene import load_scene
from .screen import (bias_decision, bias_from_sums, bias_sums, edits_grid, halo_rows, result_notes, scene_plan,
                     screen_arrays, summary_row)
from .simulate import (ChannelSet, clear_sky_source, gather_columns, level_chunk, simulate_columns, slant_path,
                       surface_emissivity, use_scene_clear_sky)
from .uncertainty import clear_part, sigma_grids

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


@dataclass(frozen=True)
class BlockPlan:
    """What every block of one scene needs besides its own rows (small: it travels with each task).

    chset : simulate.ChannelSet; config : dict; tests : screen.ScreeningPlan of the whole scene;
    inv : inversion channels; fmt : "netcdf" or "csv"; chunk_rows : rows per NetCDF chunk;
    bias : channel -> {"a", "b"} to remove, or None; header : export.ResultHeader without
    per-pixel coordinates, and layout : export.Layout without coordinates (the final pass only:
    the first pass of the bias removal writes nothing)
    """

    chset: ChannelSet
    config: dict
    tests: object
    inv: tuple
    fmt: str
    chunk_rows: int
    bias: dict = None
    header: object = None
    layout: object = None


@dataclass
class BlockOutcome:
    """What :func:`process_block` returns for core rows start:stop: the bias-fit sums of the rows,
    the encoded output block (final pass), and the rows' clear sky (first pass of the bias
    removal only)."""

    start: int
    stop: int
    sums: dict
    encoded: object = None
    clear: np.ndarray = None
    seconds: dict = None  # stage -> seconds this block spent in it (see STAGES)


#: the stages of a block, in order, as timed by :func:`process_block` [s of one thread]
STAGES = ("simulate", "sigma", "screen", "invert", "encode")


class _StageClock:
    """Seconds per stage: ``lap(stage)`` adds the time since the previous lap to that stage."""

    def __init__(self):
        self.seconds = dict.fromkeys(STAGES, 0.0)
        self._t = time.perf_counter()

    def lap(self, stage):
        t = time.perf_counter()
        self.seconds[stage] += t - self._t
        self._t = t


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


def process_block(fields, spec, plan, edits=None, clear=None, final=True):
    """Screen one block of rows start to finish.

    Parameters
    ----------
    fields : mapping name -> array of rows lo:hi
        The scene's (y, x) variables (``valid``, ``surface``, ``bt_<ch>``, background, …).
    spec : BlockSpec
    plan : BlockPlan
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
    clock = _StageClock()
    fields = {k: np.asarray(v) for k, v in fields.items()}
    cfg, chset = plan.config, plan.chset
    names = chset.names
    valid = fields["valid"]
    emis = surface_emissivity(fields, chset, cfg)
    idx = np.flatnonzero(valid.ravel())
    cols = gather_columns(fields, emis, idx)
    if clear is None:
        res = simulate_columns(cols, chset, cfg["simulation"])
        use_scene_clear_sky(res, fields, chset, idx)
        clear = np.full((len(names),) + valid.shape, np.nan, np.float32)
        clear.reshape(len(names), -1)[:, idx] = res.brightness_temperature
    clock.lap("simulate")
    sigma = sigma_grids(cols, fields["surface"].ravel()[idx], chset, cfg, idx, valid.shape)
    clock.lap("sigma")
    path = slant_path(fields["tcwv"], fields["sat_zenith"])
    obs = {c: fields[f"bt_{c}"] for c in names}
    screen_fields = {"surface": fields["surface"], "valid": valid, "sol_zenith": fields["sol_zenith"],
                     "slant_path": path}
    scr = screen_arrays(obs, {c: clear[i] for i, c in enumerate(names)}, screen_fields, cfg, sigma, plan.bias, edits,
                        plan.tests)
    core = slice(spec.start - spec.lo, spec.stop - spec.lo)
    mask, bits = scr.mask[core], scr.bits[core]
    departure = {c: d[core] for c, d in scr.departure.items()}
    sums = bias_sums(departure, path[core], mask, bits, valid[core], fields["surface"][core])
    clock.lap("screen")
    if not final:
        return BlockOutcome(spec.start, spec.stop, sums, clear=clear[:, core], seconds=clock.seconds)
    cloud = CloudLayer.empty(mask.shape, plan.inv, cfg["cloud"]["top"], layer_beta(plan.inv, cfg))
    core_fields = {k: v[core] for k, v in fields.items()}
    todo = np.flatnonzero((valid[core] & (mask != CLEAR) & (mask != NO_DATA)).ravel())
    for a in range(0, todo.size, level_chunk(cfg)):
        part = todo[a:a + level_chunk(cfg)]
        r = simulate_columns(gather_columns(core_fields, emis[:, core], part), chset, cfg["simulation"], levels=True)
        invert_pixels(cloud, part, {c: v[core] for c, v in obs.items()}, {c: clear[i, core] for i, c in enumerate(names)},
                      (r.level_pressure, r.level_temperature, r.opaque_radiance), fields["sat_zenith"][core],
                      {c: v[core] for c, v in sigma.items()}, chset, cfg, sol_zenith=fields["sol_zenith"][core],
                      bias=inversion_bias(plan.bias), surface=fields["surface"][core], slant_path=path[core])
    clock.lap("invert")
    result = export.ResultBlock(spec.start, clear[:, core], departure, {t: m[core] for t, m in scr.margins.items()},
                                mask, bits, cloud, {c: clear_part(sigma, c)[core] for c in names})
    variables = export.block_variables(result, plan.header)
    encoded = export.encode_block(spec.start, variables, plan.layout, plan.fmt, plan.chunk_rows, extra=sums)
    clock.lap("encode")
    return BlockOutcome(spec.start, spec.stop, sums, encoded, seconds=clock.seconds)


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
    tests = scene_plan({"sol_zenith": ds["sol_zenith"].data, "valid": ds["valid"].data}, config, names)
    inv = inversion_channels(names, config)
    rows = int(chunk_rows)
    specs = block_specs(ny, rows, halo_rows(config))
    threads = max(1, int(config["simulation"].get("threads", 1)))
    grid = edits_grid((ny, nx), edits) if edits else None
    plan = BlockPlan(ChannelSet.for_scene(names, config), config, tests, inv, fmt, rows)
    bias, bias_note, clear = {}, None, None
    stages = dict.fromkeys(STAGES, 0.0)

    def add_seconds(out):
        for k, v in (out.seconds or {}).items():
            stages[k] += v
        return out

    t_pass = time.perf_counter()
    if config["bias"]["remove"]:  # first pass: the clear sky and the fit's sums, then the fit
        clear = np.full((len(names), ny, nx), np.nan, np.float32)
        sums = {}
        for out in _run_blocks(ds, specs, plan, grid, final=False, threads=threads):
            add_seconds(out)
            clear[:, out.start:out.stop] = out.clear
            sums[out.start] = out.sums
        bias = _fit(sums, config)
        applied, bias_note = bias_decision(bias, config)
        plan = replace(plan, bias=bias if applied else None)
    has_latlon = "lat" in ds.coords and "lon" in ds.coords
    header = export.ResultHeader(
        scene.name, names, clear_sky_source({k: v.data for k, v in ds.data_vars.items()}, names), tests.run, inv,
        config["cloud"]["top"], bias, result_notes(tests, bias_note, inv, config), dict(tests.skipped), config,
        len(edits or []), "screen", ds["row"].values, ds["col"].values,
        np.asarray(ds["lat"].values) if has_latlon else None, np.asarray(ds["lon"].values) if has_latlon else None)
    layout = export.result_layout(header)
    # the plan travels with every task: no per-pixel coordinates in it
    plan = replace(plan, header=replace(header, row=None, col=None, lat=None, lon=None),
                   layout=replace(layout, coords={}))
    sums, done = {}, 0

    def on_block(blk):
        nonlocal done
        sums[blk.start] = blk.extra
        done += (blk.stop - blk.start) * nx
        if progress:
            progress(done, ny * nx)

    def fitted_header():
        if not config["bias"]["remove"] and not header.bias:  # one pass: the fit once every block is in
            header.bias = _fit(sums, config)
            bias_decision(header.bias, config)
        return header

    waited = [0.0]

    def blocks():  # the time the writer waits for blocks is not writing
        it = _run_blocks(ds, specs, plan, grid, clear, threads=threads)
        while True:
            t = time.perf_counter()
            out = next(it, None)
            waited[0] += time.perf_counter() - t
            if out is None:
                return
            yield add_seconds(out).encoded

    t_write = time.perf_counter()
    _, counts = export.write_blocks(layout, blocks(), out_path, fmt, rows, on_block,
                                    lambda: export.result_attrs(fitted_header()))
    stages["write"] = time.perf_counter() - t_write - waited[0]
    stages["blocks_wall"] = time.perf_counter() - t_pass
    stages["threads"] = threads
    fitted_header()
    fractions = {name: counts[k] / max(counts.sum(), 1) for k, name in enumerate(CLASS_NAMES)}
    row = summary_row(scene.name, ny * nx, fractions, header.bias, header.skipped, header.notes)
    row["stages"] = {k: round(v, 3) for k, v in stages.items()}
    return row


def _fit(sums_by_start, config):
    """The bias fit from per-block sums, added in block order (the same line however the blocks finished)."""
    total = None
    for start in sorted(sums_by_start):
        s = sums_by_start[start]
        total = dict(s) if total is None else {c: total[c] + s[c] for c in total}
    return bias_from_sums(total, config["bias"]["min_pixels"])


def screen_file(path, out_path, config, fmt=None, chunk_rows=None, use_edits=True, progress=None):
    """Read, check and screen one scene file and write the result; returns the summary row.

    ``chunk_rows`` opens the scene lazily in blocks of that many rows (bounded memory);
    without it the scene is read whole and screened in blocks of ``DEFAULT_CHUNK_ROWS``.
    """
    t0 = time.perf_counter()
    scene = load_scene(path, config=config, chunk_rows=chunk_rows)
    t_read = time.perf_counter() - t0
    edits, problems = [], []
    jp = journal_path(path)
    if use_edits and jp.exists():
        journal = Journal(jp, scene.data.sizes["y"] * scene.data.sizes["x"])
        edits, problems = journal.active(), journal.problems
    row = screen_scene_file(scene, out_path, config, fmt, edits, chunk_rows or DEFAULT_CHUNK_ROWS, progress)
    row.update(seconds=round(time.perf_counter() - t0, 2), output=str(Path(out_path)), qa_edits=len(edits),
               notes=row["notes"] + problems)
    row["stages"] = dict(read_check=round(t_read, 3), **row.get("stages", {}))
    return row
