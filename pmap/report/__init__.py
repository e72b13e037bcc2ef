"""Review pictures and reports; they read results and never recompute them.

:mod:`~pmap.report.maps` draws the PNG maps and the variogram plot.
"""

__all__ = ["maps"]
