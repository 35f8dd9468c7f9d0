"""Codes that are part of cloudsieve's file formats: classes, surfaces, fixed flag bits.

Class and surface codes are written into every output and read from scenes; changing one
breaks files already written. The bits of the screening tests come from the test registry
(:mod:`cloudsieve.registry`); the three flags here hold bits that no test may take.
"""
import numpy as np

#: Class codes of the ``mask`` variable, in code order
CLASS_NAMES = ("clear", "marginal", "cloud", "no_data")
CLEAR, MARGINAL, CLOUD, NO_DATA = 0, 1, 2, 3

#: Surface types, in code order (NetCDF scenes: 0, 1, 2)
SURFACES = ("sea", "land", "ice")
SURFACE_CODES = {name: code for code, name in enumerate(SURFACES)}

#: Bits of the ``test_bits`` field that are not screening tests (bit number per flag)
FLAG_BITS = {"daylight_3p9um_unused": 5, "analyst_clear": 6, "analyst_cloud": 7}

#: QA edit codes of an override grid (0: no edit)
EDIT_CODES = {"reset": 0, "clear": 1, "cloud": 2}


def per_surface(value, surface_code):
    """Map a {sea, land, ice} table (or a number) onto an array of surface codes.

    Parameters
    ----------
    value : float or mapping
        One number, or a table with keys sea/land/ice (a missing key takes the sea value).
    surface_code : ndarray of int
        0 sea, 1 land, 2 ice.

    Returns
    -------
    ndarray of float
    """
    if not isinstance(value, dict):
        return np.full(np.shape(surface_code), float(value))
    lut = np.array([float(value.get(s, value.get("sea", 0.0))) for s in SURFACES])
    return np.take(lut, np.asarray(surface_code), mode="clip")
