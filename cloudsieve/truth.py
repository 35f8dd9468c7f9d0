"""A scene's truth file, where one exists, and the screening's skill against it.

The invented sample scenes come with ``<scene>_truth.nc`` (``sample_scenes/make_scenes.py``):
the cloud each pixel really holds. Real scenes have none; where an analyst has one (a
synthetic case, a collocated lidar or radar mask regridded to the scene) under that name and
on the same grid, the dashboard shows the skill of the current mask against it, live.

Definitions (the project's skill figures, ``tests/skill_figures.py``): a *target* pixel has a
truth cloud fraction ≥ 0.5 and an 11 µm optical depth ≥ 1; POD is the share of target pixels
classed ``cloud``; a *false alarm* is a truth-clear pixel (fraction exactly 0) classed ``cloud``;
``marginal`` is reported, not counted as a false alarm.
"""
from pathlib import Path
from typing import NamedTuple

import numpy as np

from .codes import CLOUD, MARGINAL, NO_DATA

#: a target pixel: truth cloud fraction and optical depth at least these [1]
TARGET_FRACTION = 0.5
TARGET_OPTICAL_DEPTH = 1.0


class Truth(NamedTuple):
    """The truth of a scene on its (y, x) grid."""

    path: Path
    fraction: np.ndarray  # cloud cover fraction [1]
    optical_depth: np.ndarray  # 11 µm cloud optical depth [1]


class Skill(NamedTuple):
    pod: float  # share of target pixels classed cloud [1] (NaN without targets)
    clear_classed_cloud: float  # share of truth-clear pixels classed cloud [1]
    clear_classed_marginal: float  # share of truth-clear pixels classed marginal [1]
    n_target: int
    n_clear: int


def truth_path(scene_path):
    """``<scene>_truth.nc`` beside a scene file, or None where there is none."""
    if scene_path is None:
        return None
    p = Path(scene_path)
    cand = p.with_name(f"{p.stem}_truth.nc")
    return cand if cand.is_file() and cand != p else None


def read_truth(scene_path, shape):
    """The :class:`Truth` beside a scene of grid ``shape`` (y, x), or None: no file, or one that
    does not hold ``cloud_fraction`` and ``cloud_optical_depth`` on that grid (it is then ignored,
    not guessed at)."""
    import xarray as xr

    path = truth_path(scene_path)
    if path is None:
        return None
    try:
        with xr.open_dataset(path) as ds:
            frac = ds["cloud_fraction"].values.astype(np.float32)
            tau = ds["cloud_optical_depth"].values.astype(np.float32)
    except (OSError, KeyError, ValueError):
        return None
    if frac.shape != tuple(shape) or tau.shape != tuple(shape):
        return None
    return Truth(path, frac, np.nan_to_num(tau, nan=0.0))


def skill(mask, truth):
    """:class:`Skill` of a class mask (y, x) against a :class:`Truth`."""
    clear = truth.fraction == 0
    target = (truth.fraction >= TARGET_FRACTION) & (truth.optical_depth >= TARGET_OPTICAL_DEPTH)
    n_t, n_c = int(target.sum()), int(clear.sum())
    return Skill(float(np.mean(mask[target] == CLOUD)) if n_t else float("nan"),
                 float(np.mean(mask[clear] == CLOUD)) if n_c else float("nan"),
                 float(np.mean(mask[clear] == MARGINAL)) if n_c else float("nan"), n_t, n_c)


#: categories of :func:`comparison` (code -> words), in code order
COMPARISON_NAMES = ("truth cloud, classed cloud", "truth cloud, missed", "truth clear, classed cloud",
                    "truth clear, classed marginal", "thin or partial truth cloud")


def comparison(mask, truth):
    """Per pixel, how the mask (y, x) meets the truth, as float32 codes for a map: the index in
    :data:`COMPARISON_NAMES` (with the definitions of :func:`skill`), NaN where both say clear or
    the pixel has no data. A target pixel classed marginal counts as missed, as in POD."""
    clear = truth.fraction == 0
    target = (truth.fraction >= TARGET_FRACTION) & (truth.optical_depth >= TARGET_OPTICAL_DEPTH)
    out = np.full(mask.shape, np.nan, np.float32)
    out[~clear & ~target] = 4
    out[clear & (mask == MARGINAL)] = 3
    out[clear & (mask == CLOUD)] = 2
    out[target & (mask != CLOUD)] = 1
    out[target & (mask == CLOUD)] = 0
    out[mask == NO_DATA] = np.nan
    return out
