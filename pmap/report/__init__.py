"""Review pictures and reports; they read results and never recompute them.

:mod:`~pmap.report.maps` draws one map or variogram per page and the drawing pieces;
:mod:`~pmap.report.sheets` lays out the one-page overview and the diagnostics pages;
:mod:`~pmap.report.calibration_plot` draws the soil-model calibration;
:mod:`~pmap.report.field_pictures` decides how each layer of a run is drawn and draws them;
:mod:`~pmap.report.html` writes the self-contained field report and the batch index.
"""

__all__ = ["calibration_plot", "field_pictures", "html", "maps", "sheets"]
