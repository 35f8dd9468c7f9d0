"""Everything a cloudsieve user touches: scene I/O and validation, the screening pipeline that
calls :mod:`physics`, export, the command line (``cloudsieve``) and the Panel dashboard."""

__version__ = "0.1.0"

CAUTION = (
    "cloudsieve is not a certified operational product. Its masks support analysis and quality "
    "control; for safety-critical decisions (fog for aviation, hazards) defer to official "
    "services and local practice."
)
