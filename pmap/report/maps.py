"""PNG maps for review: one layer per picture, with the furniture a reviewer expects.

Each map shows the layer (colour bar with its unit, or a legend of class labels with their
areas), the sample points, the field boundary, a scale bar, a grid-north arrow, a title
with the field name and a subtitle, and a CRS note.  Continuous layers use perceptual,
colour-blind-safe colour maps (viridis by default); class layers use the colours the
caller passes (pmap's outputs pass the same Okabe-Ito colours as the GeoTIFF colour tables),
or evenly spaced viridis colours (:func:`pmap.io.rasters.class_colours`) when none are given.

Figures are drawn with matplotlib's object API on an Agg canvas, so importing this module
never changes the caller's pyplot backend.
"""

from __future__ import annotations

import math
import os
import tempfile
import textwrap
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path

import numpy as np
from shapely.geometry.base import BaseGeometry

from pmap.grid import GridSpec

__all__ = ["plot_layer", "plot_variogram", "scale_bar_length"]

_DPI = 150


def scale_bar_length(extent_m: float) -> float:
    """A round scale-bar length (1, 2 or 5 x 10^k m) of at most a fifth of ``extent_m`` (m)."""
    if not extent_m > 0:
        raise ValueError(f"extent must be positive, got {extent_m}")
    target = extent_m / 5.0
    power = 10.0 ** math.floor(math.log10(target))
    for step in (5.0, 2.0, 1.0):
        if step * power <= target:
            return step * power
    return power


def plot_layer(
    path_png: str | Path,
    array: np.ndarray,
    grid: GridSpec,
    *,
    title: str,
    unit: str,
    subtitle: str = "",
    samples_xy: np.ndarray | None = None,
    boundary: BaseGeometry | None = None,
    classes: Mapping[int, str] | None = None,
    colours: Mapping[int, str] | None = None,
    cmap: str = "viridis",
    vmin: float | None = None,
    vmax: float | None = None,
    footnote: str = "",
) -> Path:
    """Draw one raster layer as a PNG map (150 dpi, 7 x 6 in).

    Parameters
    ----------
    path_png : str or Path
        Target file; replaced atomically.
    array : numpy.ndarray, shape grid.shape
        Values (NaN and cells outside ``grid.mask`` are not drawn), or class ids when
        ``classes`` is given (0 = none).
    grid : GridSpec
        Georeferencing of ``array``.
    title, subtitle : str
        Title (e.g. field name and layer) and a second line (e.g. sampling date).
    unit : str
        Unit of the values, shown on the colour bar or as the legend title.
    samples_xy : numpy.ndarray, shape (n, 2), optional
        Sample locations in ``grid.crs`` (m).
    boundary : shapely geometry, optional
        Field boundary in ``grid.crs``.
    classes : mapping of int to str, optional
        Class id -> label; switches to a class map with a legend.
    colours : mapping of int to str, optional
        Class id -> matplotlib colour; default evenly spaced viridis colours.
    cmap : str
        Colour map for continuous layers (viridis, cividis, magma, ...).
    vmin, vmax : float, optional
        Colour range; default the data range.
    footnote : str
        Small print under the map (e.g. the cautions on a rate map).

    Returns
    -------
    Path
    """
    from matplotlib.colors import BoundaryNorm, ListedColormap
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    array = np.asarray(array)
    if array.shape != grid.shape:
        raise ValueError(f"array shape {array.shape} does not match grid {grid.shape}")
    xmin, ymin, xmax, ymax = grid.bounds
    fig = Figure(figsize=(7, 6), dpi=_DPI, layout="constrained")
    ax = fig.add_subplot()
    handles: list = []
    if classes is not None:
        ids = sorted(int(c) for c in classes)
        palette = dict(colours) if colours is not None else _hex_colours(ids)
        index = np.full(array.shape, -1, dtype=np.int64)
        for k, cid in enumerate(ids):
            index[(array == cid) & grid.mask] = k
        shown = np.ma.masked_less(index, 0)
        lut = ListedColormap([palette[c] for c in ids])
        norm = BoundaryNorm(np.arange(len(ids) + 1) - 0.5, len(ids))
        ax.imshow(shown, cmap=lut, norm=norm, extent=(xmin, xmax, ymin, ymax), origin="upper",
                  interpolation="nearest")
        for k, cid in enumerate(ids):
            area = float((index == k).sum()) * grid.cell_area_ha
            handles.append(Patch(facecolor=palette[cid], edgecolor="0.3",
                                 label=f"{classes[cid]} ({area:.1f} ha)"))
    else:
        values = np.asarray(array, dtype=np.float64)
        shown = np.ma.masked_where(~grid.mask | ~np.isfinite(values), values)
        image = ax.imshow(shown, cmap=cmap, vmin=vmin, vmax=vmax, extent=(xmin, xmax, ymin, ymax),
                          origin="upper", interpolation="nearest")
        bar = fig.colorbar(image, ax=ax, shrink=0.8)
        bar.set_label(unit)
    if boundary is not None:
        for ring in _rings(boundary):
            ax.plot(ring[:, 0], ring[:, 1], color="black", linewidth=1.2, zorder=2)
        handles.append(Line2D([], [], color="black", linewidth=1.2, label="field boundary"))
        bxmin, bymin, bxmax, bymax = boundary.bounds
        xmin, ymin, xmax, ymax = min(xmin, bxmin), min(ymin, bymin), max(xmax, bxmax), max(ymax, bymax)
    if samples_xy is not None and len(samples_xy):
        pts = np.asarray(samples_xy, dtype=np.float64)
        ax.scatter(pts[:, 0], pts[:, 1], s=16, c="white", edgecolors="black", linewidths=0.8,
                   zorder=3)
        handles.append(Line2D([], [], marker="o", linestyle="", markerfacecolor="white",
                              markeredgecolor="black", label=f"samples (n = {len(pts)})"))
    pad = 0.04 * max(xmax - xmin, ymax - ymin)
    ax.set_xlim(xmin - pad, xmax + pad)
    ax.set_ylim(ymin - pad, ymax + pad)
    ax.set_aspect("equal")
    ax.set_xticks([])
    ax.set_yticks([])
    _scale_bar(ax, xmax - xmin + 2 * pad)
    _north_arrow(ax)
    ax.text(0.99, 0.01, _crs_note(grid), transform=ax.transAxes, ha="right", va="bottom",
            fontsize=6.5, color="0.2", bbox={"facecolor": "white", "alpha": 0.7, "edgecolor": "none"})
    fig.suptitle(title, x=0.02, ha="left", fontsize=13, fontweight="bold")
    if footnote:
        ax.set_xlabel(textwrap.fill(footnote, 105), fontsize=6.5, color="0.25")
    if subtitle:
        ax.set_title(subtitle, loc="left", fontsize=9, color="0.3")
    if handles:
        legend_title = unit if classes is not None else None
        # Below the map, so that long class labels never squeeze it.
        fig.legend(handles=handles, loc="outside lower center",
                   ncols=len(handles) if classes is None else min(3, len(handles)), fontsize=8,
                   title=legend_title, frameon=False)
    return _save(fig, path_png)


def plot_variogram(
    path_png: str | Path,
    lags: np.ndarray,
    gamma: np.ndarray,
    counts: np.ndarray,
    model_callable: Callable[[np.ndarray], np.ndarray],
    *,
    title: str,
    unit: str,
    subtitle: str = "",
    candidates: Sequence[tuple[str, Callable[[np.ndarray], np.ndarray] | None]] = (),
    table: Sequence[str] = (),
) -> Path:
    """Plot an empirical variogram (point area grows with the pair count) and the fitted model.

    Parameters
    ----------
    path_png : str or Path
        Target file; replaced atomically.
    lags : numpy.ndarray
        Mean lag distance of each bin (m).
    gamma : numpy.ndarray
        Empirical semivariance of each bin (unit squared).
    counts : numpy.ndarray
        Number of point pairs in each bin.
    model_callable : callable
        Fitted model: semivariance as a function of lag distance (m).
    title, subtitle : str
        Title (e.g. field and property) and a second line (e.g. model and parameters).
    unit : str
        Unit of the property (e.g. ``"mg/kg"``); the y axis shows its square.
    candidates : sequence of (label, callable or None)
        Other models tried on the same variable, drawn as thin dashed lines (None: not
        drawable on these axes, e.g. fitted to the logarithms).
    table : sequence of str
        Lines printed under the plot (e.g. every candidate's cross-validation figures).
    """
    from matplotlib.figure import Figure

    lags = np.asarray(lags, dtype=np.float64)
    gamma = np.asarray(gamma, dtype=np.float64)
    counts = np.asarray(counts, dtype=np.float64)
    if not (lags.shape == gamma.shape == counts.shape):
        raise ValueError("lags, gamma and counts must have the same shape")
    height = 4.5 + (0.16 * (len(table) + 1) if table else 0.0)
    fig = Figure(figsize=(6.5, height), dpi=_DPI, layout="constrained")
    if table:
        ax, text_ax = fig.subplots(2, 1, height_ratios=[4.5, height - 4.5])
        text_ax.axis("off")
        text_ax.text(0.0, 1.0, "\n".join(table), va="top", ha="left", family="monospace",
                     fontsize=6.5, transform=text_ax.transAxes)
    else:
        ax = fig.add_subplot()
    ok = np.isfinite(lags) & np.isfinite(gamma)
    top = counts[ok].max() if ok.any() and counts[ok].max() > 0 else 1.0
    sizes = 15 + 185 * counts[ok] / top
    ax.scatter(lags[ok], gamma[ok], s=sizes, color="#31688e", edgecolors="black", linewidths=0.5,
               zorder=3, label="empirical (area ~ pairs)")
    for h, g, c in zip(lags[ok], gamma[ok], counts[ok], strict=True):
        ax.annotate(f"{int(c)}", (h, g), xytext=(0, 7), textcoords="offset points", ha="center",
                    fontsize=6.5, color="0.3")
    h_max = float(lags[ok].max()) * 1.1 if ok.any() else 1.0
    h = np.linspace(0.0, h_max, 200)
    fitted = np.asarray(model_callable(h), dtype=np.float64)
    ax.plot(h, fitted, color="#440154", linewidth=1.5, zorder=2, label="chosen model")
    drawn = [f for _, f in candidates if f is not None]
    for k, func in enumerate(drawn):
        ax.plot(h, np.asarray(func(h), dtype=np.float64), color="0.55", linewidth=0.7,
                linestyle=(0, (4, 2)), zorder=1,
                label="other candidates" if k == 0 else None)
    ax.set_xlim(0, h_max)
    peaks = np.concatenate([gamma[ok], fitted[np.isfinite(fitted)]])
    ax.set_ylim(0, 1.12 * float(peaks.max()) if peaks.size and peaks.max() > 0 else 1.0)
    ax.set_xlabel("lag distance (m)")
    ax.set_ylabel(f"semivariance [({unit})²]" if unit else "semivariance")
    ax.grid(True, color="0.9")
    ax.legend(loc="lower right", fontsize=8)
    fig.suptitle(title, x=0.02, ha="left", fontsize=12, fontweight="bold")
    if subtitle:
        ax.set_title(textwrap.fill(subtitle, 105), loc="left", fontsize=8, color="0.3")
    return _save(fig, path_png)


def _hex_colours(ids: list[int]) -> dict[int, str]:
    from pmap.io.rasters import class_colours

    return {cid: "#{:02x}{:02x}{:02x}".format(*rgba[:3]) for cid, rgba in class_colours(ids).items()}


def _rings(geom: BaseGeometry) -> list[np.ndarray]:
    if geom.geom_type == "Polygon":
        return [np.asarray(geom.exterior.coords)] + [np.asarray(r.coords) for r in geom.interiors]
    if hasattr(geom, "geoms"):
        return [ring for part in geom.geoms for ring in _rings(part)]
    if geom.geom_type in ("LineString", "LinearRing"):
        return [np.asarray(geom.coords)]
    return []


def _scale_bar(ax, extent_m: float) -> None:
    from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

    length = scale_bar_length(extent_m)
    label = f"{length / 1000:g} km" if length >= 1000 else f"{length:g} m"
    bar = AnchoredSizeBar(ax.transData, length, label, loc="lower left", pad=0.4, sep=3,
                          frameon=True, size_vertical=extent_m / 150, fontproperties={"size": 8})
    bar.patch.set_alpha(0.7)
    ax.add_artist(bar)


def _north_arrow(ax) -> None:
    ax.annotate("N", xy=(0.95, 0.96), xytext=(0.95, 0.84), xycoords="axes fraction",
                textcoords="axes fraction", ha="center", va="center", fontsize=10,
                fontweight="bold",
                arrowprops={"facecolor": "black", "edgecolor": "black", "width": 3, "headwidth": 9,
                            "headlength": 9})


def _crs_note(grid: GridSpec) -> str:
    from pyproj import CRS

    crs = CRS.from_user_input(grid.crs)
    code = grid.crs if grid.crs.startswith("EPSG:") else "custom CRS"
    return f"{code} ({crs.name}); cell {grid.cell_size:g} m; north arrow = grid north"


def _save(fig, path_png: str | Path) -> Path:
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    path = Path(path_png)
    path.parent.mkdir(parents=True, exist_ok=True)
    FigureCanvasAgg(fig)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp.png", dir=path.parent)
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        # Deterministic metadata: no "Software" text chunk naming matplotlib's version, and
        # matplotlib writes no PNG date unless asked for one.
        fig.savefig(tmp, format="png", dpi=_DPI, metadata={"Software": None})
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return path
