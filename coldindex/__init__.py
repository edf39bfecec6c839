"""coldindex: cold-pool and bottom-temperature indicators from survey casts.

The package turns a survey's bottom-temperature casts into yearly indicators
(area below thresholds, area-weighted mean bottom temperature) on a fixed
equal-area grid, with cross-validation and simulation-based uncertainty.
Computation modules take arrays and frames; only :mod:`coldindex.io` touches
files and only :mod:`coldindex.cli` prints.
"""

from coldindex._version import __version__

__all__ = ["__version__"]
