"""cloudsieve: screen infrared window-channel imagery for cloud contamination.

The headless core. It reads and validates scene files, simulates clear-sky brightness
temperatures with :mod:`physics`, runs the registry of screening tests, inverts a single cloud layer
layer, keeps the QA journal and writes CSV and CF-NetCDF, in memory or chunk by chunk on
Dask; the command line (``cloudsieve``) and the Panel dashboard (:mod:`dashboard`) both
drive it. It imports no user-interface library.
"""

__version__ = "0.1.0"

CAUTION = (
    "cloudsieve is not a certified operational product. Its masks support analysis and quality "
    "control; for safety-critical decisions (fog for aviation, hazards) defer to official "
    "services and local practice."
)
