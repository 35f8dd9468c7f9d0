"""Property-based tests (hypothesis) of the scene loaders and the configuration parser: no
input makes them fail with anything but our own error type carrying a message."""
from pathlib import Path

import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cloudsieve.config import merge_config
from cloudsieve.errors import CloudsieveError
from cloudsieve.scene import check_scene

SAMPLES = Path(__file__).resolve().parent.parent / "sample_scenes"
SMALL_TEXT = (SAMPLES / "night_front_small.csv").read_text().splitlines()
FUZZ = settings(max_examples=int(__import__("os").environ.get("CLOUDSIEVE_FUZZ_EXAMPLES", "60")), deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


def _load(path):
    try:
        scene = check_scene(path)
    except CloudsieveError as exc:
        assert str(exc).strip()
        return None
    assert scene.report is not None
    return scene


@FUZZ
@given(st.binary(max_size=2000), st.sampled_from([".csv", ".nc", ".parquet"]))
def test_random_bytes_any_format(tmp_path_factory, data, ext):
    path = tmp_path_factory.mktemp("fz") / f"scene{ext}"
    path.write_bytes(data)
    _load(path)


@FUZZ
@given(st.lists(st.integers(0, len(SMALL_TEXT) - 1), min_size=1, max_size=40),
       st.lists(st.tuples(st.integers(0, 400), st.text(max_size=6)), max_size=8))
def test_mangled_csv_lines(tmp_path_factory, rows, edits):
    """Real header, a random selection of real rows, then random character edits."""
    lines = [SMALL_TEXT[0]] + [SMALL_TEXT[1 + (r % (len(SMALL_TEXT) - 1))] for r in rows]
    text = "\n".join(lines)
    for pos, repl in edits:
        pos = min(pos, len(text))
        text = text[:pos] + repl + text[pos + 1:]
    path = tmp_path_factory.mktemp("fz") / "scene.csv"
    path.write_bytes(text.encode("utf-8", "replace"))
    _load(path)


_cell = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.integers(-10**6, 10**6), st.text(max_size=4),
                  st.none())


@FUZZ
@given(st.dictionaries(st.sampled_from(["row", "col", "bt_11um", "bt_12um", "bt_3p9um", "t_skin", "t_air", "tcwv",
                                        "sat_zenith", "sol_zenith", "p_surf", "surface", "emis_11um", "lat", "zzz"]),
                       st.lists(_cell, min_size=1, max_size=6), min_size=1, max_size=10))
def test_random_tables_parquet(tmp_path_factory, columns):
    n = min(len(v) for v in columns.values())
    df = pd.DataFrame({k: pd.Series(v[:n], dtype=object).astype(str) for k, v in columns.items()})
    path = tmp_path_factory.mktemp("fz") / "scene.parquet"
    df.to_parquet(path)
    _load(path)


_toml_value = st.recursive(
    st.one_of(st.booleans(), st.integers(-10**9, 10**9), st.floats(allow_nan=False, allow_infinity=False),
              st.text(max_size=8)),
    lambda inner: st.one_of(st.lists(inner, max_size=3), st.dictionaries(st.text(min_size=1, max_size=8), inner,
                                                                          max_size=3)),
    max_leaves=8,
)
_known = ["simulation", "channels", "surface", "screening", "tests", "bias", "cloud", "absorption", "levels",
          "texture", "window", "threshold", "sea", "top", "nedt", "emissivity", "enabled"]


@FUZZ
@given(st.dictionaries(st.sampled_from(_known) | st.text(min_size=1, max_size=8),
                       st.dictionaries(st.sampled_from(_known) | st.text(min_size=1, max_size=8), _toml_value,
                                       max_size=4) | _toml_value, max_size=4))
def test_config_parser(override):
    try:
        cfg = merge_config(override)
    except CloudsieveError as exc:
        assert str(exc).strip()
        return
    assert isinstance(cfg, dict) and "tests" in cfg


@FUZZ
@given(st.text(max_size=300))
def test_config_text(tmp_path_factory, text):
    from cloudsieve.config import load_config

    path = tmp_path_factory.mktemp("cf") / "c.toml"
    path.write_bytes(text.encode("utf-8", "replace"))
    try:
        load_config(path)
    except CloudsieveError as exc:
        assert str(exc).strip()
