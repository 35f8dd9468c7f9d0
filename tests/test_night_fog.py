"""The night fog test on the pixel and on the mean of its window.

Truth from statistics outside the project: normal deviates of known σ (numpy's generator) and
the normal tail probability (scipy.stats). A fog deck of contrast −1.5 K under a 3.9 µm noise of
0.75 K (what 0.1 K at 300 K becomes at a 250 K scene, a constant radiance noise) is within 3 σ
of a single pixel, but not of the mean of nine, whose independent noise averages down by 3.
"""
import numpy as np
import pytest
from scipy import stats

from cloudsieve.config import load_config
from cloudsieve.registry import REGISTRY, ScreeningInputs

NOISE_39, NOISE_11, SMOOTH = 0.75, 0.17, 0.25  # K: pixel-to-pixel noise of each channel, smooth part of σ


def _margin(window, seed=4, shape=(240, 240), deck=slice(60, 180), contrast=-1.5):
    rng = np.random.default_rng(seed)
    dep11 = rng.normal(0.0, NOISE_11, shape)
    dep39 = rng.normal(0.0, NOISE_39, shape)
    dep39[deck, deck] += contrast
    pix = np.full(shape, np.hypot(NOISE_39, NOISE_11))
    sig = np.sqrt(pix**2 + SMOOTH**2)
    dep = {"3p9um": dep39, "11um": dep11}
    inp = ScreeningInputs(departure=dep, sigma_clear=sig, sigma={"3p9um-11um": sig, "pixel:3p9um-11um": pix},
                          surface=np.full(shape, 2, np.int8), slant_path=np.zeros(shape), valid=np.ones(shape, bool),
                          night=np.ones(shape, bool), window_channel="11um", raw_departure=dep)
    table = dict(load_config()["tests"]["night_fog_contrast"], window=window)
    fired = REGISTRY["night_fog_contrast"].margin(inp, table).margin > 0
    inside = np.zeros(shape, bool)
    inside[deck.start + 1:deck.stop - 1, deck.start + 1:deck.stop - 1] = True  # windows wholly in the deck
    outside = np.ones(shape, bool)
    outside[deck.start - 1:deck.stop + 1, deck.start - 1:deck.stop + 1] = False  # windows wholly outside
    return fired[inside].mean(), fired[outside].mean(), sig[0, 0], pix[0, 0]


def test_the_window_mean_sees_a_deck_no_single_pixel_shows():
    single_hit, single_false, sig, _ = _margin(window=1)
    # one pixel: the deck is 1.5/σ ≈ 1.9 σ deep, so it fires where noise adds ≥ 1.1 σ (scipy.stats tail)
    assert single_hit == pytest.approx(stats.norm.sf(3.0 - 1.5 / sig), abs=0.03)
    assert single_hit < 0.25
    hit, false, sig, pix = _margin(window=3)
    s_mean = np.sqrt(sig**2 - pix**2 + pix**2 / 9)
    # at least what the mean alone gives (the pixel's own chance adds a little)
    assert hit >= 0.9 and hit >= stats.norm.sf(3.0 - 1.5 / s_mean) - 0.03
    # clear pixels: two one-sided 3σ chances (pixel, mean), so at most twice the normal tail, plus sampling
    assert single_false == pytest.approx(stats.norm.sf(3.0), abs=0.001)
    assert false <= 2 * stats.norm.sf(3.0) + 0.002


def test_the_mean_uses_only_night_pixels_not_much_colder_than_clear():
    """Cold high cloud around a pixel (11 µm far below clear) does not enter its window mean."""
    shape = (9, 9)
    dep11 = np.zeros(shape)
    dep11[:, :4] = -40.0  # high cloud on the left
    dep39 = np.zeros(shape)
    dep39[:, :4] = -20.0  # ice cloud can be colder at 3.9 µm too
    sig = np.full(shape, 0.8)
    inp = ScreeningInputs(departure={"3p9um": dep39, "11um": dep11}, sigma_clear=sig,
                          sigma={"3p9um-11um": sig, "pixel:3p9um-11um": sig * 0.9}, surface=np.zeros(shape, np.int8),
                          slant_path=np.zeros(shape), valid=np.ones(shape, bool), night=np.ones(shape, bool),
                          window_channel="11um", raw_departure={"3p9um": dep39, "11um": dep11})
    m = REGISTRY["night_fog_contrast"].margin(inp, load_config()["tests"]["night_fog_contrast"]).margin
    assert np.all(np.isnan(m[:, :4]))  # not applicable on the high cloud itself
    assert np.all(m[:, 4:] < 0)  # its clear neighbours stay clear
