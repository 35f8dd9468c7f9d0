"""Configuration: defaults from ``cloudsieve/data/default_config.toml``, user overrides, checks.

A user's TOML file may override any entry of the defaults. Unknown keys, wrong types and
impossible values are all collected into one :class:`~cloudsieve.errors.ConfigError` that
lists every problem with what to do. The absorption coefficients (``physics/data/absorption.toml``)
can be overridden in an ``[absorption]`` table of the same layout.
"""
import copy
import difflib
import json
import tomllib
from importlib import resources
from pathlib import Path

from .codes import SURFACES
from .errors import ConfigError
from .registry import REGISTRY

TOP_METHODS = ("fixed", "opaque", "consistent")
#: choices of ``[cloud] phase``
PHASES = ("auto", "ice", "water", "grey")
#: allowed range of ``[cloud] top_pressure`` [hPa] (and of the dashboard's slider)
TOP_PRESSURE_RANGE = (10.0, 1100.0)

#: Tables whose keys are open (new channel names may be added)
_OPEN_TABLES = {("channels",), ("surface", "emissivity", "sea"), ("surface", "emissivity", "land"),
                ("surface", "emissivity", "ice"), ("absorption",), ("instrument", "nedt"), ("background_noise",),
                ("cloud", "optics", "ice", "beta"), ("cloud", "optics", "water", "beta"), ("input", "names")}


#: Keys of earlier versions and what replaced them (a user's old file gets this instead of "unknown key")
_REPLACED = {
    ("clear_sky_uncertainty",): "the clear-sky σ is now computed per pixel from [background_errors], "
                                "[background_noise] and [instrument]; set those instead",
    ("tests", "split_window_excess", "threshold"): "the split-window test's threshold is now k_sigma × the σ of "
                                                   "the 11 − 12 µm difference; set 'tests.split_window_excess.k_sigma'",
    ("tests", "split_window_excess", "per_path"): "the σ of the 11 − 12 µm difference grows with the water-vapour "
                                                  "path by itself; set 'tests.split_window_excess.k_sigma'",
    ("tests", "night_fog_contrast", "threshold"): "the night fog test's threshold is now k_sigma × the σ of the "
                                                  "3.9 − 11 µm difference; set 'tests.night_fog_contrast.k_sigma'",
    ("cloud", "pair"): "the cloud top is now fitted to every inversion channel at once ('cloud.top = \"consistent\"'"
                       ", with 'cloud.channels'); remove 'cloud.pair'",
    ("cloud", "nedt"): "the cloud inversion takes the instrument noise from [instrument] (a constant radiance, "
                       "NEdT at a reference temperature); set 'instrument.nedt' instead",
    ("tests", "night_fog_contrast", "per_path"): "the σ of the 3.9 − 11 µm difference grows with the water-vapour "
                                                 "path by itself; set 'tests.night_fog_contrast.k_sigma'",
}


def _read_toml_resource(package, name):
    return tomllib.loads(resources.files(package).joinpath(name).read_text(encoding="utf-8"))


def default_config():
    """The default configuration as a nested dict (a fresh copy).

    A registered screening test without a ``[tests.<name>]`` table in the packaged file gets
    its registry entry's defaults.
    """
    cfg = _read_toml_resource("cloudsieve", "data/default_config.toml")
    for name, test in REGISTRY.items():
        if name not in cfg["tests"]:
            cfg["tests"][name] = copy.deepcopy(test.defaults)
    return cfg


def default_absorption():
    """The default absorption coefficient table (``physics/data/absorption.toml``) as a dict."""
    return _read_toml_resource("physics", "data/absorption.toml")


def _type_name(v):
    return {bool: "true/false", int: "a number", float: "a number", str: "text", dict: "a table",
            list: "a list"}.get(type(v), type(v).__name__)


def _merge(base, override, path, problems):
    for key, value in override.items():
        here = path + (key,)
        dotted = ".".join(here)
        if key not in base:
            if path in _OPEN_TABLES or (path[:1] == ("absorption",)):
                base[key] = value
                continue
            if here in _REPLACED:
                problems.append(f"'{dotted}' is no longer used: {_REPLACED[here]} "
                                "(`cloudsieve config --show` prints the defaults).")
                continue
            close = [k for k in base if k.lower() == key.lower() or k.replace("_", "") == key.replace("_", "")]
            close = close or difflib.get_close_matches(key, [str(k) for k in base], n=1, cutoff=0.75)
            hint = f" Did you mean '{'.'.join(path + (close[0],))}'?" if close else ""
            problems.append(f"unknown key '{dotted}'.{hint} Remove it or check the spelling against the defaults "
                            "(`cloudsieve config --show` prints them).")
            continue
        default = base[key]
        if isinstance(default, dict):
            if isinstance(value, dict):
                _merge(default, value, here, problems)
            elif set(default) == set(SURFACES) and isinstance(value, (int, float)) and not isinstance(value, bool):
                base[key] = {s: value for s in SURFACES}  # one number for every surface
            else:
                problems.append(f"'{dotted}' must be {_type_name(default)}; got {value!r}.")
            continue
        numeric = isinstance(default, (int, float)) and not isinstance(default, bool)
        if numeric and isinstance(value, (int, float)) and not isinstance(value, bool):
            base[key] = float(value) if isinstance(default, float) else value
            if isinstance(default, int) and not isinstance(value, int):
                problems.append(f"'{dotted}' must be a whole number; got {value!r}.")
        elif type(value) is type(default):
            base[key] = value
        else:
            problems.append(f"'{dotted}' must be {_type_name(default)}; got {value!r} ({_type_name(value)}).")


def _scene_name_known(name):
    """A variable name of our scene format (scene.COLUMNS, with <ch> any channel name)."""
    import re

    from .scene import COLUMNS

    fixed = {k for k in COLUMNS if "<" not in k}
    return name in fixed or re.fullmatch(r"(bt|emis|bt_clear)_\w+|profile_\w+", name) is not None


def add_renames(cfg, pairs):
    """The configuration with ``--rename theirs=ours`` pairs added to ``[input.names]`` (checked)."""
    extra = {}
    for pair in pairs or ():
        theirs, sep, ours = str(pair).partition("=")
        if not sep or not theirs.strip() or not ours.strip():
            raise ConfigError(f"--rename {pair!r}: write it as THEIRS=OURS, e.g. --rename skt=t_skin")
        extra[ours.strip()] = theirs.strip()
    if not extra:
        return cfg
    return merge_config({"input": {"names": extra}}, base=cfg)


def _check_values(cfg, problems):
    def need(cond, msg):
        if not cond:
            problems.append(msg)

    names = cfg.get("input", {}).get("names", {})
    for ours, theirs in names.items():
        need(isinstance(theirs, str) and theirs.strip() != "",
             f"'input.names.{ours}' must be the name the scene uses, as text; got {theirs!r}.")
        need(_scene_name_known(ours), f"'input.names.{ours}': '{ours}' is not a scene variable of cloudsieve "
                                      "(see the README's scene format: t_skin, bt_11um, sat_zenith, …).")
    taken = [t for t in names.values() if isinstance(t, str)]
    for t in sorted({t for t in taken if taken.count(t) > 1}):
        problems.append(f"'input.names' gives '{t}' for more than one variable; each of theirs maps to one of ours.")
    sim = cfg["simulation"]
    need(3 <= sim["levels"] <= 201, "'simulation.levels' must lie within 3–201.")
    need(0.1 <= sim["top_pressure"] <= 300, "'simulation.top_pressure' must lie within 0.1–300 hPa.")
    need(64 <= sim["chunk_pixels"] <= 1_000_000, "'simulation.chunk_pixels' must lie within 64–1000000.")
    need(1 <= sim["threads"] <= 64, "'simulation.threads' must lie within 1–64.")
    for surf, table in cfg["surface"]["emissivity"].items():
        for ch, e in table.items():
            need(isinstance(e, (int, float)) and 0.5 <= e <= 1.0,
                 f"'surface.emissivity.{surf}.{ch}' must be a number within 0.5–1.0; got {e!r}.")
    for name, spec in cfg["channels"].items():
        ok = isinstance(spec, dict) and set(spec) == {"centre", "width"} and all(
            isinstance(v, (int, float)) and not isinstance(v, bool) for v in spec.values())
        need(ok, f"'channels.{name}' must be a table {{ centre = <cm-1>, width = <cm-1> }}; got {spec!r}.")
    for key, table in cfg["background_errors"].items():
        for surf, v in table.items():
            need(isinstance(v, (int, float)) and v >= 0,
                 f"'background_errors.{key}.{surf}' must be a number ≥ 0; got {v!r}.")
    for key, table in cfg["background_noise"].items():
        if not isinstance(table, dict):
            table = cfg["background_noise"][key] = {s: table for s in SURFACES}
        need(key in cfg["background_errors"], f"'background_noise.{key}': not an input of [background_errors] "
             f"(one of {', '.join(cfg['background_errors'])}).")
        for surf, v in table.items():
            total = cfg["background_errors"].get(key, {}).get(surf, 0.0)
            need(isinstance(v, (int, float)) and 0 <= v <= total,
                 f"'background_noise.{key}.{surf}' must be a number within 0 and its total "
                 f"'background_errors.{key}.{surf}' = {total}; got {v!r}.")
    inst = cfg["instrument"]
    need(150 <= inst["reference_temperature"] <= 350, "'instrument.reference_temperature' must lie within 150–350 K.")
    for ch, v in dict(inst["nedt"], default=inst["nedt_default"]).items():
        need(isinstance(v, (int, float)) and 0 < v <= 5, f"'instrument.nedt.{ch}' must lie within 0–5 K; got {v!r}.")
    angle = cfg["surface"]["sea_view_angle"]
    need(angle["model"] in ("fixed", "fresnel"),
         f"'surface.sea_view_angle.model' must be \"fixed\" or \"fresnel\"; got {angle['model']!r}.")
    nodes = [angle[key] for key in ("wavelength", "n", "k")]
    need(len({len(v) for v in nodes}) == 1 and len(nodes[0]) >= 2
         and all(isinstance(x, (int, float)) for v in nodes for x in v)
         and all(b > a for a, b in zip(nodes[0], nodes[0][1:])) and min(nodes[1]) >= 1.0 and min(nodes[2]) >= 0.0,
         "'surface.sea_view_angle' needs lists wavelength [um, increasing], n [≥ 1] and k [≥ 0] of equal length ≥ 2.")
    need(0 <= cfg["screening"]["marginal_fraction"] <= 1, "'screening.marginal_fraction' must lie within 0–1.")
    need(0 <= cfg["screening"]["night_sun_zenith"] <= 120, "'screening.night_sun_zenith' must lie within 0–120°.")
    for test, table in cfg["tests"].items():
        for key, val in table.items():
            if isinstance(val, dict):
                for surf, v in val.items():
                    need(surf in SURFACES, f"'tests.{test}.{key}.{surf}': surface must be one of sea, land, ice.")
                    need(isinstance(v, (int, float)) and v >= 0,
                         f"'tests.{test}.{key}.{surf}' must be a number ≥ 0; got {v!r}.")
    need(cfg["tests"]["texture"]["window"] in (3, 5, 7, 9), "'tests.texture.window' must be 3, 5, 7 or 9 pixels.")
    need(cfg["tests"]["night_fog_contrast"]["window"] in (1, 3, 5, 7, 9),
         "'tests.night_fog_contrast.window' must be 1 (the pixel alone), 3, 5, 7 or 9 pixels.")
    cl = cfg["cloud"]
    if cl["top"] == "grey":
        need(False, "'cloud.top = \"grey\"' was replaced: use 'cloud.top = \"consistent\"' (every channel fits one "
                    "cloud) with 'cloud.phase = \"grey\"' for the grey (β = 1) cloud.")
    else:
        need(cl["top"] in TOP_METHODS, f"'cloud.top' must be one of {', '.join(TOP_METHODS)}; got {cl['top']!r}.")
    need(cl["phase"] in PHASES, f"'cloud.phase' must be one of {', '.join(PHASES)}; got {cl['phase']!r}.")
    need(isinstance(cl["night_water_contrast"], (int, float)) and cl["night_water_contrast"] >= 0,
         "'cloud.night_water_contrast' must be a number ≥ 0 K.")
    lo, hi = TOP_PRESSURE_RANGE
    need(isinstance(cl["assumed_top_pressure"], (int, float)) and lo <= cl["assumed_top_pressure"] <= hi,
         f"'cloud.assumed_top_pressure' must lie within {lo:g}–{hi:g} hPa.")
    need(lo <= cl["top_pressure"] <= hi, f"'cloud.top_pressure' must lie within {lo:g}–{hi:g} hPa.")
    if "top_height" in cl:
        need(isinstance(cl["top_height"], (int, float)) and 0 <= cl["top_height"] <= 20,
             "'cloud.top_height' must be a number within 0–20 km.")
    need(0.5 < cl["eps_max"] < 1, "'cloud.eps_max' must lie strictly between 0.5 and 1.")
    need(cl["ice_below"] <= cl["water_above"], "'cloud.ice_below' must not exceed 'cloud.water_above'.")
    for phase in ("ice", "water"):
        o = cl["optics"][phase]
        need(0 <= o["single_scattering_albedo"] < 1, f"'cloud.optics.{phase}.single_scattering_albedo' must lie in [0, 1).")
        need(-1 < o["asymmetry"] < 1, f"'cloud.optics.{phase}.asymmetry' must lie in (-1, 1).")
        for ch, b in o.get("beta", {}).items():
            need(isinstance(b, (int, float)) and 0.1 <= b <= 5,
                 f"'cloud.optics.{phase}.beta.{ch}' must be a number within 0.1–5 (τ_ch/τ_11um); got {b!r}.")
    need(cfg["bias"]["min_pixels"] >= 3, "'bias.min_pixels' must be ≥ 3.")


def _allow_top_height(cfg, override):
    height = override.get("cloud", {}).get("top_height") if isinstance(override.get("cloud"), dict) else None
    if height is not None:
        cfg["cloud"]["top_height"] = 0.0  # typed slot so the merge accepts it
    return cfg


def merge_config(override, base=None):
    """Merge a parsed override into the defaults (or ``base``) and check the result.

    Parameters
    ----------
    override : mapping
        Parsed TOML (or an equivalent dict).
    base : mapping, optional
        Configuration to start from (defaults when omitted).

    Returns
    -------
    dict

    Raises
    ------
    ConfigError
        Listing every unknown key, wrong type and out-of-range value.
    """
    cfg = copy.deepcopy(base) if base is not None else default_config()
    cfg.setdefault("absorption", {})
    if not isinstance(override, dict):
        raise ConfigError("the configuration must be a TOML table of settings")
    _allow_top_height(cfg, override)
    problems = []
    _merge(cfg, override, (), problems)
    if not problems:
        _check_values(cfg, problems)
    if problems:
        raise ConfigError("the configuration has problems; fix each and run again:", problems)
    return cfg


def load_config(path=None):
    """Read a user TOML file over the defaults; ``None`` gives the defaults.

    Raises
    ------
    ConfigError
        For a missing or unreadable file, TOML syntax errors, unknown keys, wrong types and
        impossible values (all listed).
    """
    if path is None:
        cfg = default_config()
        cfg.setdefault("absorption", {})
        return cfg
    p = Path(path)
    if not p.is_file():
        raise ConfigError(f"configuration file '{p}' does not exist; give the path of a TOML file "
                          "(`cloudsieve config --show > my.toml` writes a starting point)")
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"cannot read configuration file '{p}': {exc}. It must be a UTF-8 text file.") from None
    try:
        override = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"configuration file '{p}' is not valid TOML: {exc}. "
                          "Check quotes around text values and '=' between key and value.") from None
    return merge_config(override)


def absorption_table(cfg):
    """Absorption coefficients: the packaged defaults with the config's ``[absorption]`` overrides."""
    table = default_absorption()

    def deep(dst, src):
        for k, v in src.items():
            if isinstance(v, dict) and isinstance(dst.get(k), dict) and "value" not in v:
                deep(dst[k], v)
            else:
                dst[k] = v

    deep(table, cfg.get("absorption", {}))
    return table


def config_json(cfg):
    """The configuration as compact JSON (stored in output global attributes)."""
    return json.dumps(cfg, sort_keys=True, separators=(",", ":"))


def to_toml(cfg, _prefix=()):
    """Write a configuration dict as TOML text (for `cloudsieve config --show` and downloads)."""

    def fmt(v):
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, str):
            return json.dumps(v)
        if isinstance(v, list):
            return "[" + ", ".join(fmt(x) for x in v) + "]"
        if isinstance(v, dict):
            return "{ " + ", ".join(f"{_key(k)} = {fmt(x)}" for k, x in v.items()) + " }"
        return repr(v)

    def _key(k):
        return k if k.replace("_", "").isalnum() and not k[0].isdigit() else json.dumps(k)

    lines = []
    inline = {k: v for k, v in cfg.items()
              if _prefix and not (isinstance(v, dict) and (not v or any(isinstance(x, dict) for x in v.values())))}
    sections = {k: v for k, v in cfg.items() if k not in inline}
    if _prefix and (inline or not sections):
        lines.append(f"[{'.'.join(_key(p) for p in _prefix)}]")
    for k, v in inline.items():
        lines.append(f"{_key(k)} = {fmt(v)}")
    if inline or (_prefix and not sections):
        lines.append("")
    for k, v in sections.items():
        lines.append(to_toml(v, _prefix + (k,)))
    return "\n".join(lines)
