"""Shared inputs of the physics reference tests (imported by the test modules; no fixtures
with side effects).

Everything here is built once per test session and cached: the parsed absorption data file,
the default channels and their channel-effective absorption coefficients.
"""
import functools
import tomllib
from importlib import resources

import numpy as np

from physics.absorption import channel_coefficients
from physics.channels import default_channels

#: Wavenumbers [cm⁻¹] and temperatures [K] used by several Planck checks: the four default
#: window channels, the far infrared and the edge of the near infrared (common practice).
WAVENUMBERS = np.array([200.0, 833.0, 926.0, 1163.0, 2564.0, 4000.0])
TEMPERATURES = np.array([180.0, 220.0, 260.0, 300.0, 340.0])


@functools.lru_cache(maxsize=None)
def absorption_table():
    """The parsed ``physics/data/absorption.toml`` (read with tomllib, as callers do)."""
    with resources.files("physics").joinpath("data/absorption.toml").open("rb") as fh:
        return tomllib.load(fh)


@functools.lru_cache(maxsize=None)
def channels():
    """The default channels, as a tuple in their default order (3.9, 8.6, 11, 12 µm)."""
    return tuple(default_channels().values())


@functools.lru_cache(maxsize=None)
def coefficients():
    """Channel-effective absorption coefficients of :func:`channels` from the data file."""
    return channel_coefficients(channels(), absorption_table())


def channel_index(name):
    """Position of the channel called ``name`` in :func:`channels`."""
    return [ch.name for ch in channels()].index(name)
