"""Skill figures of a screened scene against its truth, shared by the skill and robustness tests.

Definitions (from the project's issue 13): a *target* pixel is one with truth cloud fraction
≥ 0.5 and 11 µm optical depth ≥ 1; POD is the share of target pixels classed `cloud`; a
*false alarm* is a truth-clear pixel (cloud fraction exactly 0) classed `cloud`. `marginal` is
the analyst's "look here" class and is reported, not counted as a false alarm.
"""
import importlib.util
import sys
from pathlib import Path
from typing import NamedTuple

import numpy as np


SAMPLES = Path(__file__).resolve().parent.parent / "sample_scenes"
#: Targets of issue 13: truth-clear classed cloud at most this share, POD at least this.
MAX_CLEAR_CLASSED_CLOUD = 0.02
MIN_POD = 0.97


class Figures(NamedTuple):
    clear_classed_cloud: float  # share of truth-clear pixels classed cloud [1]
    clear_classed_marginal: float  # share of truth-clear pixels classed marginal [1]
    pod: float  # share of target pixels classed cloud [1]
    n_clear: int
    n_target: int
    fires_on_clear: dict  # test -> share of truth-clear pixels on which it fired (margin > 0) [1]

    def line(self, label):
        fired = ", ".join(f"{k} {100 * v:.2f} %" for k, v in sorted(self.fires_on_clear.items(), key=lambda kv: -kv[1])
                          if v > 0) or "none"
        return (f"{label:22s} clear→cloud {100 * self.clear_classed_cloud:6.2f} %  marginal "
                f"{100 * self.clear_classed_marginal:6.2f} %  POD {self.pod:.4f}  "
                f"(clear n={self.n_clear}, target n={self.n_target}); fired on truth-clear: {fired}")


def skill_figures(result, truth):
    """:class:`Figures` of a screening ``result`` (Session.result) against a truth Dataset."""
    from cloudsieve.truth import Truth, skill

    fraction = truth["cloud_fraction"].values
    clear = fraction == 0
    sk = skill(result.mask, Truth(None, fraction, np.nan_to_num(truth["cloud_optical_depth"].values, nan=0.0)))
    fires = {name: float(np.mean(np.nan_to_num(np.asarray(m), nan=-1.0)[clear] > 0))
             for name, m in result.margins.items()}
    return Figures(sk.clear_classed_cloud, sk.clear_classed_marginal, sk.pod, sk.n_clear, sk.n_target, fires)


def scene_generator():
    """``sample_scenes/make_scenes.py`` as a module (it is a script, not a package)."""
    name = "cloudsieve_sample_scene_generator"
    if name not in sys.modules:
        spec = importlib.util.spec_from_file_location(name, SAMPLES / "make_scenes.py")
        module = importlib.util.module_from_spec(spec)
        sys.modules[name] = module  # dataclasses look their module up while the class is built
        spec.loader.exec_module(module)
    return sys.modules[name]
