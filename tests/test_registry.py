"""The registry of screening tests: one entry per test, everything else generated from it.

A toy test added through the public API (``cloudsieve.registry.register``) must reach the
configuration, the screening, the classes and bit field, both export formats, the batch path
and the dashboard's sliders without any other code being touched.
"""
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from cloudsieve import batch
from cloudsieve.codes import CLOUD
from cloudsieve.config import default_config, load_config, merge_config
from cloudsieve.registry import REGISTRY, Margin, ScreeningTest, Tunable, bit_table, register, unregister
from cloudsieve.session import Session

SAMPLES = Path(__file__).resolve().parent.parent / "sample_scenes"
SMALL = SAMPLES / "night_front_small.csv"


def test_bits_are_the_published_file_format():
    """test_bits values written since the first release (README, scene outputs): never renumbered."""
    published = ("cold_departure", "split_window_excess", "texture", "night_fog_contrast", "warm_departure",
                 "daylight_3p9um_unused", "analyst_clear", "analyst_cloud")
    assert {name: bit for name, bit in bit_table().items() if name in published} == {
        "cold_departure": 1, "split_window_excess": 2, "texture": 4, "night_fog_contrast": 8, "warm_departure": 16,
        "daylight_3p9um_unused": 32, "analyst_clear": 64, "analyst_cloud": 128}


def test_every_test_has_a_config_table_and_its_tunable_key():
    cfg = default_config()
    for name, test in REGISTRY.items():
        table = cfg["tests"][name]
        assert "enabled" in table, name
        assert set(table[test.tunable.key]) == {"sea", "land", "ice"}, name
        assert test.label and test.help and test.long_name, name


def test_a_taken_bit_is_refused():
    with pytest.raises(ValueError, match="taken by texture"):
        register(ScreeningTest("clash", bit=2, kind="cloud", channels=(), label="x", help="x", long_name="x",
                               tunable=Tunable("threshold", "K"), margin=lambda inp, t: None))
    assert "clash" not in REGISTRY


def _twelve_cold(inp, t):
    """Toy: 12 µm colder than clear by more than a fixed threshold."""
    from cloudsieve.codes import per_surface

    thr = per_surface(t["threshold"], inp.surface)
    return Margin(-inp.departure["12um"] - thr, -thr)


@pytest.fixture
def toy():
    test = register(ScreeningTest(
        "toy_twelve_cold", bit=15, kind="cloud", channels=("12um",), label="12 µm cold",
        help="Toy test: 12 µm colder than clear sky by more than the threshold [K].",
        long_name="toy: cold departure of the 12 um channel", tunable=Tunable("threshold", "K", (0.0, 30.0), 0.5),
        margin=_twelve_cold, defaults={"enabled": True, "threshold": {"sea": 1.0, "land": 1.0, "ice": 1.0}}))
    yield test
    unregister("toy_twelve_cold")


def test_a_new_test_reaches_config_screening_export_and_batch(toy, tmp_path):
    cfg = load_config()
    assert cfg["tests"]["toy_twelve_cold"]["threshold"]["sea"] == 1.0  # its defaults join the configuration
    session = Session.open(SMALL, cfg, journal=False)
    res = session.result
    margin = res.margins["toy_twelve_cold"]
    fired = margin > 0
    assert fired.any() and (~fired).any()
    np.testing.assert_allclose(margin, -res.departure["12um"] - 1.0)
    bit = bit_table()["toy_twelve_cold"]
    assert bit == 1 << 15
    np.testing.assert_array_equal((res.bits & bit) > 0, fired)
    assert np.all(res.mask[fired] == CLOUD)  # a cloud test: firing makes the pixel cloud
    ds = session.result_dataset()
    assert "toy: cold departure" in ds["margin_toy_twelve_cold"].attrs["long_name"]
    assert "toy_twelve_cold" in ds["test_bits"].attrs["flag_meanings"]
    # the batch path writes the same
    out = tmp_path / "m.nc"
    batch.screen_file(SMALL, out, cfg)
    with xr.open_dataset(out) as got:
        np.testing.assert_allclose(got["margin_toy_twelve_cold"].values, ds["margin_toy_twelve_cold"].values, atol=1e-6,
                                   equal_nan=True)
        np.testing.assert_array_equal(got["test_bits"].values, ds["test_bits"].values)
    batch.screen_file(SMALL, tmp_path / "m.csv", cfg)
    assert "margin_toy_twelve_cold" in pd.read_csv(tmp_path / "m.csv").columns
    # a user's configuration may tune it like any other test; retuning the session too
    tuned = merge_config({"tests": {"toy_twelve_cold": {"threshold": 300.0}}})
    assert not (Session.open(SMALL, tuned, journal=False).result.margins["toy_twelve_cold"] > 0).any()
    session.set_threshold("toy_twelve_cold", 300.0)
    assert not (session.result.margins["toy_twelve_cold"] > 0).any()


def test_a_new_test_is_skipped_when_its_channel_is_absent(toy, tmp_path):
    path = tmp_path / "only11.csv"
    pd.read_csv(SMALL).drop(columns=["bt_12um"]).to_csv(path, index=False)
    res = Session.open(path, load_config(), journal=False).result
    assert res.skipped["toy_twelve_cold"] == "needs 12um"
    assert "toy_twelve_cold" not in res.margins


def test_a_new_test_gets_a_slider_in_the_dashboard(toy):
    from dashboard.model import ScreeningModel
    from dashboard.views.notices import Notices
    from dashboard.views.tuning import TuningPanel

    model = ScreeningModel.open(SMALL, load_config(), journal=False)
    panel = TuningPanel(model, Notices())
    slider = panel.sliders["toy_twelve_cold"]
    assert slider.end == 30.0 and slider.value == 1.0
    model.set_threshold("toy_twelve_cold", 300.0)
    assert not (model.result.margins["toy_twelve_cold"] > 0).any()


def test_the_readme_table_of_tests_is_the_registry():
    """The README's table of screening tests is generated from the registry (kept in step)."""
    from cloudsieve.registry import markdown_table

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    assert markdown_table() in readme, "regenerate the table with `python -m cloudsieve.registry`"
