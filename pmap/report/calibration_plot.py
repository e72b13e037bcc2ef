"""The review picture of a soil-model calibration: fit and residuals, default vs calibrated.

Left: the model's prediction against the lab soil-test P, for the starting (default)
parameters and the calibrated ones, with the 1:1 line and each one's RMSE and R^2 in the
legend.  Right: residuals (predicted - lab) against pH when the pairs carried pH, else
against the lab value.  Colours are from the Okabe-Ito palette (colour-blind safe) and
the two models differ in marker shape as well as colour.

Figures are drawn with matplotlib's object API on an Agg canvas, so importing this module
never changes the caller's pyplot backend.
"""

from __future__ import annotations

import os
import tempfile
import textwrap
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from matplotlib.figure import Figure

    from pmap.soil.calibration import Calibration

__all__ = ["calibration_figure", "plot_calibration"]

_DPI = 150
#: Okabe-Ito orange and blue.
_DEFAULT_COLOUR = "#E69F00"
_CALIBRATED_COLOUR = "#0072B2"


def calibration_figure(calibration: Calibration, *, method_label: str, title: str) -> Figure:
    """Draw the two panels of a calibration on a new (Agg) figure, 11 x 5 in.

    Parameters
    ----------
    calibration : Calibration
        The result of :func:`pmap.soil.calibration.calibrate`.
    method_label : str
        The lab method of the soil-test P (e.g. ``"Mehlich-3"``), shown on the axes.
    title : str
        Figure title (e.g. the field's name).

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.figure import Figure

    obs = np.asarray(calibration.observed, dtype=float)
    cal = np.asarray(calibration.predictions, dtype=float)
    default = np.asarray(calibration.default_predictions, dtype=float)
    fig = Figure(figsize=(11, 5), dpi=_DPI, layout="constrained")
    ax_fit, ax_res = fig.subplots(1, 2)

    default_label = (f"default parameters: RMSE {calibration.default_rmse:.2f} mg/kg, "
                     f"R² {calibration.default_r2:.3f}")
    cal_label = (f"calibrated: RMSE {calibration.rmse:.2f} mg/kg, R² {calibration.r2:.3f}\n"
                 f"  cross-validated: RMSE {calibration.cv_rmse:.2f} mg/kg, "
                 f"R² {calibration.cv_r2:.3f}")
    ax_fit.scatter(obs, default, s=22, marker="o", facecolors="none",
                   edgecolors=_DEFAULT_COLOUR, linewidths=1.0, label=default_label, zorder=2)
    ax_fit.scatter(obs, cal, s=24, marker="^", color=_CALIBRATED_COLOUR, edgecolors="black",
                   linewidths=0.3, label=cal_label, zorder=3)
    values = np.concatenate([obs, cal, default])
    values = values[np.isfinite(values)]
    top = float(values.max()) * 1.05 if values.size and values.max() > 0 else 1.0
    low = min(0.0, float(values.min()) * 1.05) if values.size else 0.0
    ax_fit.plot([low, top], [low, top], color="black", linestyle=(0, (4, 2)), linewidth=1.0,
                label="1:1", zorder=1)
    ax_fit.set_xlim(low, top)
    ax_fit.set_ylim(low, top)
    ax_fit.set_aspect("equal")
    ax_fit.set_xlabel(f"lab soil-test P, {method_label} (mg/kg)")
    ax_fit.set_ylabel("model prediction (mg/kg)")
    ax_fit.grid(True, color="0.9")
    ax_fit.legend(loc="upper left", fontsize=7)
    ax_fit.set_title(f"{calibration.n_pairs} lab pairs", loc="left", fontsize=9, color="0.3")

    if calibration.ph is not None:
        x = np.asarray(calibration.ph, dtype=float)
        ax_res.set_xlabel("pH (pH units)")
    else:
        x = obs
        ax_res.set_xlabel(f"lab soil-test P, {method_label} (mg/kg)")
    ax_res.axhline(0.0, color="black", linewidth=1.0, zorder=1)
    ax_res.scatter(x, default - obs, s=22, marker="o", facecolors="none",
                   edgecolors=_DEFAULT_COLOUR, linewidths=1.0, label="default parameters",
                   zorder=2)
    ax_res.scatter(x, cal - obs, s=24, marker="^", color=_CALIBRATED_COLOUR, edgecolors="black",
                   linewidths=0.3, label="calibrated", zorder=3)
    ax_res.set_ylabel("residual, predicted - lab (mg/kg)")
    ax_res.grid(True, color="0.9")
    ax_res.legend(loc="best", fontsize=7)
    fitted = ", ".join(f"{k} = {v:.3g} [{lo:.3g}, {hi:.3g}]"
                       for (k, v), (lo, hi) in zip(calibration.estimates.items(),
                                                   calibration.intervals.values(), strict=True))
    subtitle = f"fitted (95 % interval): {fitted}"
    if calibration.held:
        subtitle += "; held: " + ", ".join(calibration.held)
    ax_res.set_title(textwrap.fill(subtitle, 80), loc="left", fontsize=7, color="0.3")
    fig.suptitle(title, x=0.02, ha="left", fontsize=12, fontweight="bold")
    return fig


def plot_calibration(
    calibration: Calibration, path: str | Path, *, method_label: str, title: str
) -> Path:
    """Write :func:`calibration_figure` as a PNG (150 dpi), replacing ``path`` atomically.

    Returns
    -------
    Path
    """
    return _save(calibration_figure(calibration, method_label=method_label, title=title), path)


def _save(fig: Figure, path_png: str | Path) -> Path:
    # The same atomic, metadata-free write as pmap.report.maps.
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    path = Path(path_png)
    path.parent.mkdir(parents=True, exist_ok=True)
    FigureCanvasAgg(fig)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp.png", dir=path.parent)
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        fig.savefig(tmp, format="png", dpi=_DPI, metadata={"Software": None})
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return path
