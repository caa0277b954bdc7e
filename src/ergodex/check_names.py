"""The statistics a check can compute and the default tolerance, without importing numpy.

The command line builds its ``--help`` from these names; keeping them apart from
:mod:`ergodex.validation` (which imports numpy, scipy and the regime code) keeps ``--help`` and
argument errors fast. :mod:`ergodex.validation` re-exports them.
"""

from __future__ import annotations

__all__ = ["ALL_STATISTICS", "DEFAULT_STATISTICS", "DEFAULT_TOLERANCE"]

#: Largest allowed ratio of a row's model distance to its noise floor with the fixed tolerance,
#: and the floor of the threshold derived from the data (``CheckSpec.threshold_floor``).
#: Calibrated in ``benchmarks/calibration.py`` (rates in ``benchmarks/README.md``).
DEFAULT_TOLERANCE = 2.75

ALL_STATISTICS = (
    "histogram",
    "autocorrelation",
    "spectrum",
    "quantiles",
    "occupancy",
    "residence",
    "transitions",
)
DEFAULT_STATISTICS = ("histogram", "autocorrelation", "spectrum", "quantiles", "occupancy")
