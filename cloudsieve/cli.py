"""The ``cloudsieve`` command line.

Exit codes (documented in the README and in ``cloudsieve --help``):

  0  success
  1  unexpected internal error (please report it; rerun with --debug for details)
  2  bad input: unreadable or invalid scene, bad configuration, bad arguments
  3  an output could not be written (missing folder, no permission, disk full)
  4  batch: some scenes failed (reported), the others were written
  130 interrupted (Ctrl-C); no partial output is left under a final name
"""
import argparse
import glob
import os
import sys
import time
from pathlib import Path

from . import CAUTION, __version__
from .errors import CloudsieveError, SceneError

EXIT_OK, EXIT_INTERNAL, EXIT_INPUT, EXIT_OUTPUT, EXIT_PARTIAL, EXIT_INTERRUPTED = 0, 1, 2, 3, 4, 130

DESCRIPTION = """\
cloudsieve — screen infrared window-channel imagery (3.9, 8.6, 11, 12 µm) for cloud.

For every pixel of a scene table it simulates the clear-sky brightness temperature from
the background state (skin and air temperature, water vapour, view angle, emissivity) by
solving the infrared radiative transfer equation, maps observed − clear departures, runs
physically based screening tests, classes each pixel clear / marginal / cloud / no_data,
and inverts the top and optical depth of a single cloud layer (ice, water or grey optics) where the pixel is not clear.

Typical use:
  cloudsieve check  scene.csv                      validate a scene, list every problem
  cloudsieve screen scene.nc --out mask.nc         mask + cloud layer (CSV or CF-NetCDF)
  cloudsieve simulate scene.csv --out clear.nc     clear-sky brightness temperatures only
  cloudsieve serve                                 serve the dashboard on a sample scene
  cloudsieve config --show > my.toml               start a configuration of your own
"""

EPILOG = """\
exit codes: 0 ok · 1 internal error · 2 bad input (scene, config, arguments) ·
3 output not writable · 4 some scenes of a batch failed · 130 interrupted

""" + CAUTION


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # usage errors: exit 2 with a hint, as argparse does, but friendlier
        self.print_usage(sys.stderr)
        print(f"cloudsieve: error: {message}\nRun 'cloudsieve {self.prog.split()[-1] if ' ' in self.prog else ''} --help'"
              " for the options.".replace("  ", " "), file=sys.stderr)
        sys.exit(EXIT_INPUT)


def build_parser():
    p = _Parser(prog="cloudsieve", description=DESCRIPTION, epilog=EPILOG,
                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--version", action="version", version=f"cloudsieve {__version__}")
    p.add_argument("--debug", action="store_true", help="show full tracebacks of internal errors")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    # --debug also after the command (the error messages suggest adding it to the command run)
    debug = argparse.ArgumentParser(add_help=False)
    debug.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
                       help="show full tracebacks of internal errors")
    # scene variables under other names (added to [input.names] for this run)
    rename = argparse.ArgumentParser(add_help=False)
    rename.add_argument("--rename", action="append", metavar="THEIRS=OURS", default=[],
                        help="read the scene's variable THEIRS as OURS, e.g. --rename skt=t_skin (repeatable; "
                             "the same as [input.names] ours = \"theirs\" in --config)")

    c = sub.add_parser("check", parents=[debug, rename], help="validate scene files and print every problem found",
                       description="Read each scene and print one report listing every problem with what to do.")
    c.add_argument("scenes", nargs="+", metavar="SCENE", help="scene file(s): .csv, .parquet or .nc")
    c.add_argument("--config", metavar="FILE", help="TOML configuration (adds channels)")

    s = sub.add_parser("screen", parents=[debug, rename], help="screen scenes: mask, test margins, departures, cloud layer",
                       description="Screen scene(s) and write the mask, test bits and margins, departures, "
                                   "clear-sky brightness temperatures and the cloud layer.",
                       formatter_class=argparse.RawDescriptionHelpFormatter,
                       epilog="With several scenes (or a quoted pattern such as 'DIR/*.nc') --out is a folder; "
                              "each scene gives <name>_mask.<ext> there.\nQA edits recorded in the dashboard "
                              "(<scene>.qa.jsonl beside the scene) are applied unless --no-edits.")
    s.add_argument("scenes", nargs="+", metavar="SCENE", help="scene file(s) or quoted glob pattern(s)")
    s.add_argument("--out", required=True, metavar="PATH", help="output file (one scene) or folder (several)")
    s.add_argument("--config", metavar="FILE", help="TOML configuration overriding the defaults")
    s.add_argument("--format", choices=("csv", "netcdf"), help="output format (default: from the --out extension, "
                                                                "else netcdf for folders)")
    s.add_argument("--no-edits", action="store_true", help="ignore the scene's QA-edit journal")
    s.add_argument("--quiet", action="store_true", help="no progress bar or summary")
    s.add_argument("--timings", action="store_true",
                   help="print where the time went, per scene, as one JSON line on stderr: start-up and imports, "
                        "reading and checking, seconds per stage of the blocks (summed over threads), writing")
    big = s.add_argument_group("large scenes and archives (Dask)")
    big.add_argument("--chunks", type=int, metavar="ROWS",
                     help="read the scene lazily and screen it ROWS grid rows at a time, with bounded memory "
                          "(automatic for NetCDF and Parquet scenes above 4 million pixels)")
    big.add_argument("--workers", type=int, metavar="N", help="start a local Dask cluster of N worker processes")
    big.add_argument("--scheduler", metavar="ADDRESS",
                     help="use an existing dask.distributed scheduler, e.g. tcp://10.0.0.5:8786")

    m = sub.add_parser("simulate", parents=[debug, rename], help="write clear-sky brightness temperatures and departures only",
                       description="Simulate the clear-sky brightness temperature of every pixel and channel.")
    m.add_argument("scene", metavar="SCENE", help="scene file: .csv, .parquet or .nc")
    m.add_argument("--out", required=True, metavar="PATH", help="output file (.nc or .csv)")
    m.add_argument("--config", metavar="FILE", help="TOML configuration overriding the defaults")
    m.add_argument("--format", choices=("csv", "netcdf"), help="output format (default: from the --out extension)")

    v = sub.add_parser("serve", parents=[debug, rename],
                       help="serve the dashboard on 127.0.0.1; open the address it prints in a browser",
                       description="Serve the dashboard and print its address (open it in a browser, or pass "
                                   "--show). With no scene it opens the bundled sample scene.")
    v.add_argument("scenes", nargs="*", metavar="SCENE", help="scene file(s) to open")
    v.add_argument("--data-dir", metavar="DIR", help="folder whose scene files the scene picker lists "
                                                      "(default: the bundled sample scenes)")
    v.add_argument("--port", type=int, default=5006, help="port (default 5006; 0 picks a free one)")
    v.add_argument("--address", default="127.0.0.1", help="address to bind (default 127.0.0.1, this machine only)")
    v.add_argument("--allow-websocket-origin", action="append", default=[], metavar="HOST:PORT",
                   help="origins allowed to connect; required when --address is not 127.0.0.1/localhost")
    v.add_argument("--config", metavar="FILE", help="TOML configuration overriding the defaults")
    v.add_argument("--show", action="store_true", help="also open a browser tab")
    v.add_argument("--max-upload-mb", type=float, default=200.0,
                   help="largest scene upload accepted, in MB (default 200)")
    v.add_argument("--basic-auth", metavar="PASSWORD_OR_FILE",
                   help="require a login (Panel's basic authentication): one password, or a JSON file of "
                        "{user: password}; also read from CLOUDSIEVE_BASIC_AUTH")
    v.add_argument("--no-login", action="store_true",
                   help="serve a non-loopback --address without a login (not advised; warns at every start)")
    v.add_argument("--cookie-secret", metavar="SECRET",
                   help="secret that signs the login cookie (default: a random one per server start; "
                        "also read from CLOUDSIEVE_COOKIE_SECRET)")

    g = sub.add_parser("config", parents=[debug], help="print the default configuration (TOML)")
    g.add_argument("--show", action="store_true", help="print the defaults (the default action)")
    g.add_argument("--check", metavar="FILE", help="validate a configuration file")
    return p


def _expand(patterns):
    """Scene files of the arguments; patterns skip the sample scenes' truth files (say so)."""
    files = []
    for pat in patterns:
        if any(ch in pat for ch in "*?["):
            hits = sorted(glob.glob(pat))
            if not hits:
                raise SceneError(f"no files match '{pat}'; check the folder and the pattern")
            truth = [h for h in hits if Path(h).stem.endswith("_truth")]
            if truth:  # a warning, printed even with --quiet
                print(f"cloudsieve: skipping {len(truth)} truth file(s) of sample scenes matched by '{pat}' "
                      f"(they hold the answers for skill tests, not scenes): "
                      + ", ".join(Path(t).name for t in truth), file=sys.stderr)
            files += [h for h in hits if h not in truth]
        else:
            files.append(pat)
    if not files:
        raise SceneError("no scene files left to screen (the pattern matched only truth files)")
    return files


def _output_format(out, fmt):
    """The format of a single output file from --format and the file name; they must agree."""
    from .export import FORMAT_OF_SUFFIX

    by_name = FORMAT_OF_SUFFIX.get(Path(out).suffix.lower())
    if fmt and by_name and fmt != by_name:
        raise SceneError(f"--format {fmt} but --out '{out}' ends in {Path(out).suffix}; make them agree "
                         f"(e.g. --out {Path(out).with_suffix('.nc' if fmt == 'netcdf' else '.csv')})")
    if not fmt and not by_name:
        raise SceneError(f"cannot tell the output format from '{Path(out).name}'; end --out in .nc (CF-NetCDF) "
                         f"or .csv, or give --format netcdf|csv; for a folder, end --out in '/'")
    return fmt or by_name


def _refuse_overwriting_input(scene, out):
    """An output must not replace its own scene or the scene's QA journal."""
    from .journal import journal_path

    target = Path(out).resolve()
    if target in (Path(scene).resolve(), journal_path(Path(scene).resolve())):
        raise SceneError(f"--out '{out}' would overwrite the scene it is made from; choose another output name "
                         f"(e.g. {Path(out).with_name(Path(scene).stem + '_mask' + Path(out).suffix)})")


def _progress(enabled, total, desc):
    if not enabled:
        return None
    from tqdm import tqdm

    return tqdm(total=total, desc=desc, unit="px", unit_scale=True, file=sys.stderr, leave=False,
                disable=not sys.stderr.isatty() and not os.environ.get("CLOUDSIEVE_PROGRESS"))


def _config_of(args):
    """The run's configuration: --config over the defaults, plus any --rename pairs."""
    from .config import add_renames, load_config

    return add_renames(load_config(args.config), getattr(args, "rename", None))


def cmd_check(args):
    from .scene import check_scene

    cfg = _config_of(args)
    worst = EXIT_OK
    for path in args.scenes:
        try:
            scene = check_scene(path, config=cfg)
            print(scene.report.text())
            if not scene.report.ok:
                worst = EXIT_INPUT
        except SceneError as exc:
            print(f"Scene {path}: NOT usable.\n  ERROR: {exc}")
            worst = EXIT_INPUT
    return worst


def cmd_config(args):
    from .config import default_config, load_config, to_toml

    if args.check:
        load_config(args.check)
        print(f"{args.check}: configuration is valid")
        return EXIT_OK
    print("# cloudsieve default configuration (see cloudsieve/data/default_config.toml for the reasoning)")
    print(to_toml(default_config()))
    return EXIT_OK


def _screen_one(path, out_path, cfg, fmt, args, show_progress):
    from . import batch

    bar = None
    last = [0]

    def tick(done, total):
        nonlocal bar
        if bar is None:
            bar = _progress(show_progress, total, Path(path).name)
        if bar is not None:
            bar.update(done - last[0])
            last[0] = done

    try:
        return batch.screen_file(path, out_path, cfg, fmt, _chunk_rows(args, path), not args.no_edits, tick)
    finally:
        if bar is not None:
            bar.close()


def cmd_screen(args):
    t = time.perf_counter()
    from . import batch  # noqa: F401 — the pipeline's imports, timed for --timings

    _IMPORTS_S[0] = time.perf_counter() - t
    cfg = _config_of(args)
    files = _expand(args.scenes)
    out = Path(args.out)
    pattern = any(ch in a for a in args.scenes for ch in "*?[")  # a pattern means an archive: --out is a folder
    as_folder = str(args.out).endswith(("/", os.sep))  # 'results/': a folder, made if missing
    many = len(files) > 1 or out.is_dir() or pattern or as_folder
    if not many:
        args.format = _output_format(out, args.format)
    if many:
        if out.exists() and not out.is_dir():
            raise SceneError(f"several scenes need --out to be a folder; '{out}' is a file")
        if not out.exists():
            from .errors import OutputError

            if not out.parent.is_dir():
                raise OutputError(f"folder '{out.parent}' does not exist; create it or choose another --out")
            try:
                out.mkdir()
            except OSError as exc:  # read-only parent, /proc, a full disk
                raise OutputError(f"cannot make the output folder '{out}' ({exc.strerror or exc}); "
                                  "choose another --out") from None
    fmt = args.format or (None if not many else "netcdf")
    ext = {"netcdf": ".nc", "csv": ".csv", None: ".nc"}[fmt]
    if args.workers is not None and args.workers < 1:
        raise SceneError("--workers must be at least 1")
    if args.chunks is not None and args.chunks < 8:
        raise SceneError("--chunks must be at least 8 rows")
    client = _dask_client(args)
    try:
        return _screen_files(args, cfg, files, out, many, fmt, ext, client)
    finally:
        if client is not None:
            cluster = getattr(client, "cluster", None)
            client.close()
            if cluster is not None and args.workers:
                cluster.close()


def _dask_client(args):
    if not (args.workers or args.scheduler):
        return None
    from dask.distributed import Client, LocalCluster

    if args.scheduler:
        try:
            return Client(args.scheduler, timeout="20s")
        except (OSError, TimeoutError) as exc:
            raise SceneError(f"cannot reach the Dask scheduler at {args.scheduler} ({exc}); check the address "
                             "and that the scheduler is running (dask scheduler / dask worker)") from None
    cluster = LocalCluster(n_workers=args.workers, threads_per_worker=1, processes=True, dashboard_address=None)
    return Client(cluster)


def _chunk_rows(args, path):
    """Rows per block when the scene is to be read lazily (None: read whole)."""
    from .batch import AUTO_CHUNK_PIXELS, DEFAULT_CHUNK_ROWS
    from .scene import grid_size

    if args.chunks or args.workers or args.scheduler:
        return args.chunks or DEFAULT_CHUNK_ROWS
    n = grid_size(path)  # None where the file cannot tell cheaply; the reader then reports
    return DEFAULT_CHUNK_ROWS if n is not None and n > AUTO_CHUNK_PIXELS else None


def _screen_files(args, cfg, files, out, many, fmt, ext, client):
    rows, failed = [], []
    bar = None
    if many and not args.quiet:
        from tqdm import tqdm

        bar = tqdm(total=len(files), desc="scenes", unit="scene", file=sys.stderr,
                   disable=not sys.stderr.isatty() and not os.environ.get("CLOUDSIEVE_PROGRESS"))
    stems = [Path(f).stem for f in files]
    for path in files:
        stem = Path(path).stem
        if stems.count(stem) > 1:  # same name, different formats or folders: keep them apart
            stem = f"{stem}_{Path(path).suffix.lstrip('.')}"
            if [f"{Path(f).stem}_{Path(f).suffix.lstrip('.')}" for f in files].count(stem) > 1:
                stem = f"{Path(path).parent.name}_{stem}"
        target = out / f"{stem}_mask{ext}" if many else out
        try:
            _refuse_overwriting_input(path, target)
            rows.append(_screen_one(path, target, cfg, fmt, args, not args.quiet and not many))
            if getattr(args, "timings", False):
                _print_timings(rows[-1])
            if bar is not None:
                bar.update(1)
        except CloudsieveError as exc:
            if not many:
                raise
            failed.append((path, str(exc)))
            print(f"cloudsieve: skipped {path}:\n{exc}", file=sys.stderr)
            if bar is not None:
                bar.update(1)
    if bar is not None:
        bar.close()
    if not args.quiet:
        _print_summary(rows, failed)
    if failed:
        return EXIT_PARTIAL if rows else EXIT_INPUT
    return EXIT_OK


def _process_age():
    """Seconds since this process started (Linux /proc), or None where that cannot be read."""
    try:
        with open("/proc/self/stat") as fh:
            start_ticks = float(fh.read().rsplit(")", 1)[1].split()[19])
        with open("/proc/uptime") as fh:
            uptime = float(fh.read().split()[0])
        return uptime - start_ticks / os.sysconf("SC_CLK_TCK")
    except (OSError, ValueError, IndexError):
        return None


def _print_timings(row):
    """One JSON line on stderr: start-up (interpreter and imports until the command began), then
    the scene's stages (batch.screen_file's ``stages``)."""
    import json

    startup = None if _STARTED_AT[0] is None else round(_STARTED_AT[0], 3)
    age = _process_age()
    print("timings: " + json.dumps({"scene": row["scene"], "startup": startup, "imports": round(_IMPORTS_S[0], 3),
                                    **row.get("stages", {}),
                                    "process_age": None if age is None else round(age, 3)}),
          file=sys.stderr, flush=True)


#: seconds spent importing the screening pipeline (cmd_screen; later imports land in the stage needing them)
_IMPORTS_S = [0.0]


#: seconds from the process start to main() (filled by main; /proc resolution is 10 ms)
_STARTED_AT = [None]


def _print_summary(rows, failed):
    if rows:
        print(f"{'scene':<28} {'pixels':>9} {'clear':>7} {'marg.':>7} {'cloud':>7} {'no_data':>7} "
              f"{'bias a/b (channel)':>22} {'time s':>7}")
        for r in rows:
            ch = "11um" if "11um" in r["bias"] else next(iter(r["bias"]), None)
            b = r["bias"].get(ch, {})
            bias = f"{b.get('a', float('nan')):+.2f}/{b.get('b', float('nan')):+.3f} ({ch})" if b else "-"
            print(f"{r['scene'][:28]:<28} {r['pixels']:>9} {r['clear']:>7.3f} {r['marginal']:>7.3f} "
                  f"{r['cloud']:>7.3f} {r['no_data']:>7.3f} {bias:>22} {r['seconds']:>7.1f}")
            if b.get("surfaces"):
                lines = ", ".join(f"{name} {line['a']:+.2f}/{line['b']:+.3f}" for name, line in b["surfaces"].items())
                print(f"    bias per surface ({ch}; {'removed' if b.get('applied') else 'not removed'}): {lines}")
            for note in r["notes"]:
                print(f"    note: {note}")
            print(f"    written: {r['output']}" + (f" (with {r['qa_edits']} QA edit(s))" if r["qa_edits"] else ""))
    for path, _ in failed:
        print(f"{Path(path).name[:28]:<28} FAILED (see message above)")


def cmd_simulate(args):
    from .export import write_simulation
    from .scene import load_scene
    from .simulate import simulate

    cfg = _config_of(args)
    fmt = _output_format(args.out, args.format)
    _refuse_overwriting_input(args.scene, args.out)
    scene = load_scene(args.scene, config=cfg)
    sim = simulate(scene, cfg, levels=False)
    write_simulation(scene, sim, args.out, fmt)
    print(f"clear-sky simulation of {scene.name} ({len(sim.channels)} channel(s), "
          f"{sim.valid_index.size:,} pixels, {sim.seconds:.2f} s) written to {args.out}")
    return EXIT_OK


def cmd_serve(args):
    from dashboard.app import serve  # the Panel app, imported only to serve

    return serve(args)


def main(argv=None):
    _STARTED_AT[0] = _process_age()
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return EXIT_OK
    handler = {"check": cmd_check, "screen": cmd_screen, "simulate": cmd_simulate, "serve": cmd_serve,
               "config": cmd_config}[args.command]
    try:
        return handler(args)
    except CloudsieveError as exc:
        print(f"cloudsieve: {exc}", file=sys.stderr)
        return exc.exit_code
    except BrokenPipeError:
        # the reader of our output stopped early (e.g. `cloudsieve config --show | head`): not an
        # error; keep Python from complaining again when it flushes stdout at exit
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return EXIT_OK
    except KeyboardInterrupt:
        print("cloudsieve: interrupted; no partial output was left under a final name", file=sys.stderr)
        return EXIT_INTERRUPTED
    except MemoryError:
        print("cloudsieve: out of memory; screen a smaller scene or lower [simulation] chunk_pixels", file=sys.stderr)
        return EXIT_INTERNAL
    except Exception as exc:  # noqa: BLE001 — last line of defence: no tracebacks for users
        if args.debug:
            raise
        print(f"cloudsieve: internal error ({type(exc).__name__}: {exc}). This is a bug; please report it with "
              "the command you ran. Rerun with --debug for the full traceback.", file=sys.stderr)
        return EXIT_INTERNAL


def run():
    """The ``cloudsieve`` command: :func:`main`, then leave at once.

    Every file is closed and renamed into place before main() returns, and any Dask cluster it
    started is closed; the interpreter's own teardown (finalizers of the compiled kernels, the
    HDF5 library and some hundred modules) then takes about 0.3 s, a quarter of a small scene's
    whole run, for nothing. ``serve`` and ``--debug`` end the usual way."""
    code = main()
    if sys.argv[1:2] == ["serve"] or "--debug" in sys.argv:
        sys.exit(code)
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):  # a closed pipe: nothing more can reach the reader
            pass
    os._exit(code if isinstance(code, int) else EXIT_INTERNAL)


if __name__ == "__main__":
    run()
