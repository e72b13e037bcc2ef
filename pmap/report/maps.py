"""PNG maps for review: one layer per picture, with the furniture a reviewer expects.

Each map shows the layer (colour bar with its unit, optionally with class breaks marked on
it, or a legend of class labels with their areas), the sample points, the field boundary,
optional zone outlines with their ids, a scale bar, a grid-north arrow, a title with the
field name and a subtitle, a CRS note, optional small print and an optional table beside
the map.  Continuous layers use perceptual, colour-blind-safe colour maps (viridis by
default); class layers use the colours the caller passes (pmap's outputs pass the same
Okabe-Ito colours as the GeoTIFF colour tables), or evenly spaced viridis colours
(:func:`pmap.io.rasters.class_colours`) when none are given.

Layout is computed, not solved: every text block is wrapped to its width by measuring the
rendered text (:func:`wrap_text`) and the axes are placed with ``Figure.add_axes`` at
rectangles worked out in inches, so nothing is cut off and no layout engine runs at save
time.  :func:`draw_layer` draws a layer into any Axes, so other sheets
(:mod:`pmap.report.sheets`) reuse it.

Figures are drawn with matplotlib's object API on an Agg canvas, so importing this module
never changes the caller's pyplot backend.  Files are replaced atomically.
"""

from __future__ import annotations

import functools
import math
import os
import re
import tempfile
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from shapely.geometry.base import BaseGeometry

from pmap.grid import GridSpec

if TYPE_CHECKING:
    from matplotlib.artist import Artist
    from matplotlib.axes import Axes
    from matplotlib.cm import ScalarMappable
    from matplotlib.colorbar import Colorbar
    from matplotlib.figure import Figure
    from matplotlib.legend import Legend
    from matplotlib.patches import Patch
    from matplotlib.table import Table
    from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

__all__ = [
    "DrawnLayer",
    "draw_layer",
    "layer_figure",
    "plot_layer",
    "variogram_figure",
    "plot_variogram",
    "scale_bar_length",
    "wrap_text",
    "text_width",
    "text_height",
]

_DPI = 150
#: zlib level of the PNGs.  Measured on the demo's 34 maps: RGB at level 3 encodes in 31 ms
#: a map against 42 ms for matplotlib's default (RGBA, level 6), for files 4 % larger
#: (101 against 97 kB); the pixels are the same (lossless).
_PNG_COMPRESS_LEVEL = 3
#: Default page of one map (in): width, height.
_MAP_SIZE = (7.0, 6.0)
#: Default page of one variogram plot (in).
_VARIOGRAM_SIZE = (6.5, 4.5)
#: Widest a variogram page grows to fit its table lines (in).
_VARIOGRAM_MAX_WIDTH = 9.0
#: Margin round every page (in).
_MARGIN = 0.12
#: Most rows of a table beside a map (more are summarised in a last "... n more" row).
TABLE_MAX_ROWS = 25
#: Colours of outlines and labels.
_INK = "black"
_MUTED = "0.3"
_OUTLINE = "0.1"


# --------------------------------------------------------------------------- text metrics


@functools.lru_cache(maxsize=64)
def _font(size: float, weight: str = "normal", family: str = "sans-serif") -> Any:
    from matplotlib.font_manager import FontProperties

    return FontProperties(size=size, weight=weight, family=family)


@functools.lru_cache(maxsize=1)
def _measuring_renderer() -> Any:
    from matplotlib.backends.backend_agg import RendererAgg

    return RendererAgg(1, 1, _DPI)


@functools.lru_cache(maxsize=16384)
def text_width(text: str, size: float, weight: str = "normal",
               family: str = "sans-serif") -> float:
    """Width of one line of text as the Agg canvas renders it (in).

    Parameters
    ----------
    text : str
        One line, drawn literally (no mathtext).
    size : float
        Font size (pt).
    weight, family : str
        Font weight and family (matplotlib names).
    """
    if not text:
        return 0.0
    width, _, _ = _measuring_renderer().get_text_width_height_descent(
        text, _font(size, weight, family), ismath=False)
    return float(width) / _DPI


@functools.lru_cache(maxsize=256)
def _line_metrics(size: float, weight: str, family: str) -> tuple[float, float]:
    """Heights of a one-line and of a two-line text (in), measured.

    A text of several lines takes the font's line gap on every line, one line none, so a
    text of n >= 2 lines is n / 2 times as tall as one of two.
    """
    from matplotlib.figure import Figure

    fig = Figure(dpi=_DPI)
    renderer = _measuring_renderer()
    heights = []
    for text in ("Ag", "Ag\nAg"):
        artist = fig.text(0, 0, text, fontproperties=_font(size, weight, family))
        heights.append(artist.get_window_extent(renderer).height / _DPI)
    return heights[0], heights[1]


def text_height(n_lines: int, size: float, weight: str = "normal",
                family: str = "sans-serif") -> float:
    """Height of a text of ``n_lines`` lines at matplotlib's default line spacing (in)."""
    if n_lines <= 0:
        return 0.0
    one, two = _line_metrics(float(size), weight, family)
    return one if n_lines == 1 else n_lines * two / 2


def wrap_text(text: str, width_in: float, size: float, *, weight: str = "normal",
              family: str = "sans-serif") -> list[str]:
    """Break ``text`` into lines no wider than ``width_in`` when rendered (in).

    Words are kept whole unless one alone is wider than the width; newlines in ``text``
    start new lines.  Widths are measured with the font the Agg canvas uses, less 2 % for
    the small differences between renderers.

    Returns
    -------
    list of str
        The lines (none for an empty text).
    """
    return list(_wrap(str(text), round(float(width_in), 4), float(size), weight, family))


@functools.lru_cache(maxsize=1024)
def _wrap(text: str, width_in: float, size: float, weight: str, family: str) -> tuple[str, ...]:
    limit = 0.98 * width_in

    def fits(s: str) -> bool:
        return text_width(s, size, weight, family) <= limit

    lines: list[str] = []
    for paragraph in text.split("\n"):
        current = ""
        for word in paragraph.split(" "):
            candidate = f"{current} {word}" if current else word
            if fits(candidate):
                current = candidate
                continue
            if current:
                lines.append(current)
            current = word
            while not fits(current) and len(current) > 1:  # a word wider than the line
                cut = len(current) - 1
                while cut > 1 and not fits(current[:cut]):
                    cut -= 1
                lines.append(current[:cut])
                current = current[cut:]
        if current or not paragraph:
            lines.append(current)
    while lines and not lines[-1]:
        lines.pop()
    return tuple(lines)


def _hard_wrap(line: str, width_in: float, size: float, family: str = "monospace") -> list[str]:
    """Cut a (monospace, column-aligned) line into pieces no wider than ``width_in``."""
    if text_width(line, size, family=family) <= 0.98 * width_in:
        return [line]
    per_char = text_width("M" * 20, size, family=family) / 20
    n = max(8, int(0.98 * width_in / per_char))
    indent = "    "
    pieces = [line[:n]]
    rest = line[n:]
    while rest:
        pieces.append(indent + rest[: n - len(indent)])
        rest = rest[n - len(indent):]
    return pieces


# --------------------------------------------------------------------------- page helpers


class _Page:
    """Places axes and texts on a figure in inches from its lower-left corner."""

    def __init__(self, fig: Figure) -> None:
        self.fig = fig
        self.width, self.height = (float(v) for v in fig.get_size_inches())

    def axes(self, x: float, y: float, w: float, h: float, label: str = "") -> Axes:
        ax = self.fig.add_axes((x / self.width, y / self.height, w / self.width,
                                h / self.height), label=label)
        return ax

    def set_axes(self, ax: Axes, x: float, y: float, w: float, h: float) -> None:
        ax.set_position((x / self.width, y / self.height, w / self.width, h / self.height))

    def text(self, x: float, y: float, lines: Sequence[str], *, size: float, **kw: Any) -> Any:
        return self.fig.text(x / self.width, y / self.height, "\n".join(lines), fontsize=size,
                             parse_math=False, **kw)


@dataclass(frozen=True)
class _Header:
    """A page's title and subtitle, wrapped to a width: its height is known before drawing."""

    title_lines: tuple[str, ...]
    sub_lines: tuple[str, ...]
    title_size: float
    sub_size: float

    @property
    def height(self) -> float:
        """Height of the title and subtitle (in)."""
        h = text_height(len(self.title_lines), self.title_size, "bold")
        if self.sub_lines:
            h += 0.05 + text_height(len(self.sub_lines), self.sub_size)
        return h

    def draw(self, page: _Page, x: float, top: float, sub_colour: str = "0.3") -> None:
        """Draw the title from ``top`` (in from the page foot) down, the subtitle under it."""
        page.text(x, top, list(self.title_lines), size=self.title_size, fontweight="bold",
                  va="top", ha="left")
        if self.sub_lines:
            page.text(x, top - text_height(len(self.title_lines), self.title_size, "bold") - 0.05,
                      list(self.sub_lines), size=self.sub_size, color=sub_colour, va="top",
                      ha="left")


def page_header(title: str, subtitle: str | Sequence[str], width: float, title_size: float,
                sub_size: float) -> _Header:
    """Wrap a title (bold) and a subtitle (a string or several) to ``width`` (in)."""
    subs = [subtitle] if isinstance(subtitle, str) else list(subtitle)
    return _Header(tuple(wrap_text(title, width, title_size, weight="bold")),
                   tuple(ln for s in subs if s for ln in wrap_text(s, width, sub_size)),
                   title_size, sub_size)


def _fit_box(avail_w: float, avail_h: float, aspect: float) -> tuple[float, float]:
    """Largest (w, h) with w / h == aspect inside (avail_w, avail_h) (in)."""
    avail_w, avail_h = max(avail_w, 0.1), max(avail_h, 0.1)
    if avail_w / avail_h > aspect:
        return avail_h * aspect, avail_h
    return avail_w, avail_w / aspect


# --------------------------------------------------------------------------- drawing a layer


@dataclass(frozen=True)
class DrawnLayer:
    """What :func:`draw_layer` drew that a legend or a colour bar needs.

    Attributes
    ----------
    mappable : matplotlib.cm.ScalarMappable or None
        Norm and colour map of a continuous layer (None for a class layer).
    class_handles : tuple of matplotlib.patches.Patch
        One patch per class (label with its area, ha); empty for a continuous layer.
    furniture_handles : tuple of Artist
        Legend entries of the boundary, the zone outlines and the samples, as drawn.
    unit : str
        Unit of the values (colour-bar label).
    legend_title : str
        Title of a class legend.
    class_breaks : tuple of float
        Values to mark on the colour bar (value units).
    scale_bar : AnchoredSizeBar or None
        The scale bar drawn.
    scale_bar_m : float
        Its length (m).
    zone_labels : tuple of matplotlib.text.Text
        The zone ids drawn at their zones.
    """

    mappable: ScalarMappable | None
    class_handles: tuple[Patch, ...]
    furniture_handles: tuple[Artist, ...]
    unit: str
    legend_title: str
    class_breaks: tuple[float, ...]
    scale_bar: AnchoredSizeBar | None
    scale_bar_m: float
    zone_labels: tuple[Any, ...] = ()

    @property
    def discrete(self) -> bool:
        """True for a class layer (legend), False for a continuous one (colour bar)."""
        return self.mappable is None


def draw_layer(
    ax: Axes,
    array: np.ndarray,
    grid: GridSpec,
    *,
    unit: str = "",
    samples_xy: np.ndarray | None = None,
    boundary: BaseGeometry | None = None,
    classes: Mapping[int, str] | None = None,
    colours: Mapping[int, str] | None = None,
    cmap: str = "viridis",
    vmin: float | None = None,
    vmax: float | None = None,
    class_breaks: Sequence[float] | None = None,
    zone_outlines: Sequence[tuple[str, BaseGeometry]] | None = None,
    legend_title: str | None = None,
    font_size: float = 8.0,
    zone_label_size: float = 6.5,
    marker_size: float = 16.0,
    marker_edge_width: float = 0.8,
    north_arrow: bool = True,
    scale_bar: bool = True,
) -> DrawnLayer:
    """Draw one raster layer with its boundary, samples, zone outlines, scale bar and arrow.

    The Axes gets equal aspect, no ticks, and limits of the grid and boundary plus 4 %.
    Legends and colour bars are left to the caller (see :class:`DrawnLayer`).

    Parameters
    ----------
    ax : matplotlib.axes.Axes
        Target axes (on an Agg-backed figure).
    array : numpy.ndarray, shape grid.shape
        Values (NaN and cells outside ``grid.mask`` are not drawn), or class ids when
        ``classes`` is given (ids not in ``classes`` are not drawn).
    grid : GridSpec
        Georeferencing of ``array``.
    unit : str
        Unit of the values; the class-legend title unless ``legend_title`` is given.
    samples_xy : numpy.ndarray, shape (n, 2), optional
        Sample locations in ``grid.crs`` (m).
    boundary : shapely geometry, optional
        Field boundary in ``grid.crs``.
    classes : mapping of int to str, optional
        Class id -> label; switches to a class map (legend patches with areas).
    colours : mapping of int to str, optional
        Class id -> matplotlib colour; default evenly spaced viridis colours.
    cmap : str
        Colour map of a continuous layer (viridis, cividis, magma, ...).
    vmin, vmax : float, optional
        Colour range of a continuous layer (value units); default the data range.
    class_breaks : sequence of float, optional
        Values to mark on the colour bar of a continuous layer (value units).
    zone_outlines : sequence of (str, shapely geometry), optional
        (label, polygon) pairs drawn as thin outlines, labelled inside with a white halo.
    legend_title : str, optional
        Title of the class legend (default ``unit``).
    font_size, zone_label_size : float
        Sizes of the scale-bar text and of the zone labels (pt).
    marker_size, marker_edge_width : float
        Area of a sample marker (pt²) and the width of its outline (pt).
    north_arrow, scale_bar : bool
        Whether to draw them.

    Returns
    -------
    DrawnLayer
    """
    from matplotlib import colormaps
    from matplotlib.cm import ScalarMappable
    from matplotlib.colors import Normalize, to_rgba_array
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch, PathPatch
    from matplotlib.patheffects import withStroke

    array = np.asarray(array)
    if array.shape != grid.shape:
        raise ValueError(f"array shape {array.shape} does not match grid {grid.shape}")
    gxmin, gymin, gxmax, gymax = grid.bounds
    xmin, ymin, xmax, ymax = gxmin, gymin, gxmax, gymax
    mappable = None
    class_handles: list = []
    furniture: list = []
    if classes is not None:
        ids = sorted(int(c) for c in classes)
        palette = dict(colours) if colours is not None else _hex_colours(ids)
        lut = np.zeros((len(ids) + 1, 4), dtype=np.uint8)  # last row: transparent
        lut[: len(ids)] = np.round(to_rgba_array([palette[c] for c in ids]) * 255)
        index = np.full(array.shape, len(ids), dtype=np.intp)
        for k, cid in enumerate(ids):
            index[array == cid] = k
        index[~grid.mask] = len(ids)
        counts = np.bincount(index.ravel(), minlength=len(ids) + 1)
        rgba = lut[index]
        for k, cid in enumerate(ids):
            area = float(counts[k]) * grid.cell_area_ha
            class_handles.append(Patch(facecolor=palette[cid], edgecolor="0.3", linewidth=0.6,
                                       label=f"{classes[cid]} ({area:.1f} ha)"))
    else:
        values = np.asarray(array, dtype=np.float64)
        valid = grid.mask & np.isfinite(values)
        shown = values[valid]
        lo = float(vmin) if vmin is not None else (float(shown.min()) if shown.size else 0.0)
        hi = float(vmax) if vmax is not None else (float(shown.max()) if shown.size else 1.0)
        if not hi > lo:  # a constant layer (or limits the wrong way round)
            half = 0.05 * abs(lo) if lo != 0 else 0.05
            lo, hi = min(lo, hi) - half, max(lo, hi) + half
        norm = Normalize(vmin=lo, vmax=hi)
        colour_map = colormaps[cmap]
        scaled = np.zeros(values.shape)
        scaled[valid] = norm(shown)
        rgba = colour_map(scaled, bytes=True)
        rgba[~valid] = 0
        mappable = ScalarMappable(norm=norm, cmap=colour_map)
    # RGBA at the grid's resolution: the colour lookup runs once per cell, not per pixel.
    ax.imshow(rgba, extent=(gxmin, gxmax, gymin, gymax), origin="upper",
              interpolation="nearest", zorder=0)
    if boundary is not None:
        ax.add_patch(PathPatch(_outline_path(boundary), facecolor="none", edgecolor=_INK,
                               linewidth=1.2, zorder=2))
        furniture.append(Line2D([], [], color=_INK, linewidth=1.2, label="field boundary"))
        bxmin, bymin, bxmax, bymax = boundary.bounds
        xmin, ymin = min(xmin, bxmin), min(ymin, bymin)
        xmax, ymax = max(xmax, bxmax), max(ymax, bymax)
    labels: list = []
    if zone_outlines:
        geoms = [geom for _, geom in zone_outlines]
        ax.add_patch(PathPatch(_outline_path_of(geoms), facecolor="none", edgecolor=_OUTLINE,
                               linewidth=0.6, zorder=2.5))
        furniture.append(Line2D([], [], color=_OUTLINE, linewidth=0.6,
                                label="zone outline (id)"))
        halo = [withStroke(linewidth=2.2, foreground="white")]
        for label, geom in zone_outlines:
            if geom.is_empty:
                continue
            point = _label_point(geom)
            labels.append(ax.text(point[0], point[1], str(label), ha="center", va="center",
                                  fontsize=zone_label_size, color=_INK, zorder=4,
                                  path_effects=halo, parse_math=False))
    if samples_xy is not None and len(samples_xy):
        pts = np.asarray(samples_xy, dtype=np.float64).reshape(-1, 2)
        ax.scatter(pts[:, 0], pts[:, 1], s=marker_size, c="white", edgecolors=_INK,
                   linewidths=marker_edge_width, zorder=3)
        furniture.append(Line2D([], [], marker="o", linestyle="", markerfacecolor="white",
                                markeredgecolor=_INK, label=f"samples (n = {len(pts)})"))
    pad = 0.04 * max(xmax - xmin, ymax - ymin)
    ax.set_xlim(xmin - pad, xmax + pad)
    ax.set_ylim(ymin - pad, ymax + pad)
    ax.set_aspect("equal", adjustable="box")
    _no_ticks(ax)
    bar, length = None, 0.0
    if scale_bar:
        bar, length = _scale_bar(ax, xmax - xmin + 2 * pad, font_size)
    if north_arrow:
        _north_arrow(ax, font_size + 2)
    return DrawnLayer(
        mappable=mappable, class_handles=tuple(class_handles), furniture_handles=tuple(furniture),
        unit=unit, legend_title=legend_title if legend_title is not None else unit,
        class_breaks=tuple(float(b) for b in (class_breaks or ())), scale_bar=bar,
        scale_bar_m=length, zone_labels=tuple(labels))


def _no_ticks(ax: Axes) -> None:
    ax.set_xticks([])
    ax.set_yticks([])
    # Hidden axes are not laid out or drawn at all (the spines stay as the map frame).
    ax.xaxis.set_visible(False)
    ax.yaxis.set_visible(False)
    for spine in ax.spines.values():
        spine.set_edgecolor("0.6")
        spine.set_linewidth(0.6)


def _label_point(geom: BaseGeometry) -> tuple[float, float]:
    """A point inside ``geom`` (its largest part for a multi-polygon) for a label."""
    from shapely.ops import polylabel

    if hasattr(geom, "geoms") and len(geom.geoms) > 1:
        geom = max(geom.geoms, key=lambda g: g.area)
    if geom.geom_type == "Polygon" and geom.area > 0:
        # The pole of inaccessibility: the inner point farthest from the edges.
        point = polylabel(geom, tolerance=max(math.sqrt(geom.area) / 50, 1e-9))
    else:
        point = geom.representative_point()
    return float(point.x), float(point.y)


# --------------------------------------------------------------------------- legends, bars


def _plain_formatter() -> Any:
    """Tick labels without an offset or a power of ten above the axis."""
    from matplotlib.ticker import ScalarFormatter

    formatter = ScalarFormatter(useOffset=False)
    formatter.set_powerlimits((-6, 7))
    return formatter


def _colour_bar(fig: Figure, cax: Axes, drawn: DrawnLayer, *, font_size: float) -> Colorbar:
    """A vertical colour bar of ``drawn`` in ``cax``, with its class breaks marked."""
    bar = fig.colorbar(drawn.mappable, cax=cax)
    bar.formatter = _plain_formatter()
    bar.update_ticks()
    # A unit longer than the bar is wrapped (the lines of a vertical label stack sideways).
    bar_h = cax.get_position().height * fig.get_size_inches()[1]
    bar.set_label("\n".join(wrap_text(drawn.unit, max(min(bar_h, 1.6), 0.5), font_size)),
                  fontsize=font_size)
    bar.ax.yaxis.label.set_parse_math(False)
    cax.tick_params(axis="y", which="major", labelsize=font_size - 0.5, length=3)
    bar.outline.set_linewidth(0.6)
    if drawn.class_breaks:
        low, high = drawn.mappable.norm.vmin, drawn.mappable.norm.vmax
        inside = [b for b in drawn.class_breaks if low <= b <= high]
        for b in inside:
            cax.axhline(b, color="white", linewidth=2.0, zorder=3)
            cax.axhline(b, color=_INK, linewidth=0.9, zorder=4)
        bar.set_ticks(inside, labels=[f"{b:g}" for b in inside], minor=True)
        cax.yaxis.remove_overlapping_locs = False  # a break on a major tick keeps its label
        cax.tick_params(axis="y", which="minor", left=True, right=False, labelleft=True,
                        labelright=False, length=4, width=0.9, labelsize=font_size - 0.5)
    return bar


def _colour_bar_widths(cax: Axes, drawn: DrawnLayer, font_size: float) -> tuple[float, float]:
    """Room the colour bar's labels take left and right of the bar (in)."""
    locs = [v for v in cax.yaxis.get_majorticklocs()
            if drawn.mappable.norm.vmin - 1e-12 <= v <= drawn.mappable.norm.vmax + 1e-12]
    labels = cax.yaxis.get_major_formatter().format_ticks(locs) if locs else []
    tick = (3 + 3.5) / 72  # tick length and pad (pt)
    right = tick + max((text_width(s, font_size - 0.5) for s in labels), default=0.0)
    n_label = cax.yaxis.label.get_text().count("\n") + 1 if cax.yaxis.label.get_text() else 0
    right += 0.06 + text_height(n_label, font_size)  # the unit, rotated
    left = 0.0
    if drawn.class_breaks:
        left = (4 + 3.5) / 72 + max(text_width(f"{b:g}", font_size - 0.5)
                                    for b in drawn.class_breaks)
    return left, right


def _legend(fig: Figure, handles: Sequence[Artist], *, title: str | None, font_size: float,
            max_width: float, max_cols: int) -> tuple[Legend, float, float]:
    """A frameless figure legend with as many columns (<= max_cols) as fit ``max_width``.

    Returns the legend and its width and height (in).
    """
    renderer = fig.canvas.get_renderer()
    ncols = max(1, min(max_cols, len(handles)))
    while True:
        legend = fig.legend(handles=list(handles), loc="upper center", ncols=ncols,
                            fontsize=font_size, title=title, title_fontsize=font_size,
                            frameon=False, borderaxespad=0.0, borderpad=0.2,
                            handlelength=1.6, columnspacing=1.2)
        for text in legend.get_texts():
            text.set_parse_math(False)
        legend.get_title().set_parse_math(False)
        box = legend.get_window_extent(renderer)
        width, height = box.width / fig.dpi, box.height / fig.dpi
        if width <= max_width or ncols == 1:
            return legend, width, height
        legend.remove()
        ncols -= 1


def _place_legend(page: _Page, legend: Legend, x_centre: float, y_top: float) -> None:
    legend.set_bbox_to_anchor((x_centre / page.width, y_top / page.height),
                              transform=page.fig.transFigure)


# --------------------------------------------------------------------------- tables


@dataclass(frozen=True)
class _TableSpec:
    header: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    col_widths: tuple[float, ...]
    right_aligned: tuple[bool, ...]
    row_height: float
    size: float
    pad: float
    truncated: bool = False

    @property
    def width(self) -> float:
        return float(sum(self.col_widths))

    @property
    def height(self) -> float:
        return self.row_height * (len(self.rows) + 1)


_NUMBER = re.compile(r"[-+]?[$€£]?[\d,]*\.?\d+(?:[eE][-+]?\d+)?\s*%?")


def _table_spec(header: Sequence[str], rows: Sequence[Sequence[str]], *, size: float = 7.0,
                max_rows: int = TABLE_MAX_ROWS, max_cell_width: float = 2.4) -> _TableSpec:
    """Column widths, alignment and truncation of a table (in, pt)."""
    header = tuple(str(h) for h in header)
    n_cols = len(header)
    if n_cols == 0:
        raise ValueError("a table needs at least one column")
    body = [tuple(str(c) for c in row) for row in rows]
    for row in body:
        if len(row) != n_cols:
            raise ValueError(f"table row {row} has {len(row)} cells, the header {n_cols}")
    if len(body) > max_rows:
        keep = max(max_rows - 1, 0)
        more = len(body) - keep
        body = body[:keep] + [(f"... {more} more",) + ("",) * (n_cols - 1)]
        truncated = True
    else:
        truncated = False
    body = [tuple(_clip_text(c, max_cell_width, size) for c in row) for row in body]
    pad = 0.05
    widths = []
    right = []
    for j in range(n_cols):
        cells = [row[j] for row in (body[:-1] if truncated else body)]
        widths.append(2 * pad + max([text_width(header[j], size, "bold")]
                                    + [text_width(c, size) for c in cells]))
        right.append(bool(cells) and all(_NUMBER.fullmatch(c.strip()) for c in cells
                                         if c.strip()) and any(c.strip() for c in cells))
    if truncated:  # the "... n more" row may span the table
        need = 2 * pad + text_width(body[-1][0], size) - sum(widths)
        if need > 0:
            widths[-1] += need
    row_height = 1.5 * text_height(1, size)
    return _TableSpec(header, tuple(body), tuple(widths), tuple(right), row_height, size, pad,
                      truncated)


def _clip_text(text: str, width: float, size: float) -> str:
    if text_width(text, size) <= width:
        return text
    while len(text) > 1 and text_width(text + "...", size) > width:
        text = text[:-1]
    return text + "..."


def _draw_table(tax: Axes, spec: _TableSpec) -> Table:
    """Draw ``spec`` filling ``tax`` (sized to ``spec.width`` x ``spec.height``)."""
    from matplotlib.table import Table

    tax.set_axis_off()
    table = Table(tax, bbox=(0.0, 0.0, 1.0, 1.0))
    table.edges = "B"  # a rule under each row
    n_rows = len(spec.rows) + 1
    h = 1.0 / n_rows
    for j, (label, width) in enumerate(zip(spec.header, spec.col_widths, strict=True)):
        w = width / spec.width
        align = "right" if spec.right_aligned[j] else "left"
        cell = table.add_cell(0, j, w, h, text=label, loc=align, facecolor="0.9",
                              edgecolor="0.55")
        cell.get_text().set_fontweight("bold")
        cell.PAD = spec.pad / width
        for i, row in enumerate(spec.rows, start=1):
            last = spec.truncated and i == len(spec.rows)  # "... n more" reads from the left
            cell = table.add_cell(i, j, w, h, text=row[j], loc="left" if last else align,
                                  facecolor="white" if i % 2 else "0.965",
                                  edgecolor="0.8")
            cell.PAD = spec.pad / width
    table.auto_set_font_size(False)
    table.set_fontsize(spec.size)
    for cell in table.get_celld().values():
        cell.get_text().set_parse_math(False)
        cell.set_linewidth(0.5)
    tax.add_table(table)
    return table


# --------------------------------------------------------------------------- layer figure


def layer_figure(
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
    class_breaks: Sequence[float] | None = None,
    zone_outlines: Sequence[tuple[str, BaseGeometry]] | None = None,
    table: tuple[Sequence[str], Sequence[Sequence[str]]] | None = None,
    legend_title: str | None = None,
    crs_note: str | None = None,
    figsize: tuple[float, float] = _MAP_SIZE,
) -> Figure:
    """Draw one raster layer as a map page (150 dpi, 7 x 6 in unless a table widens it).

    Parameters
    ----------
    array : numpy.ndarray, shape grid.shape
        Values (NaN and cells outside ``grid.mask`` are not drawn), or class ids when
        ``classes`` is given.
    grid : GridSpec
        Georeferencing of ``array``.
    title, subtitle : str
        Title (e.g. field name and layer) and a second line (e.g. sampling date); both
        wrapped to the page width.
    unit : str
        Unit of the values, shown on the colour bar or as the legend title.
    samples_xy : numpy.ndarray, shape (n, 2), optional
        Sample locations in ``grid.crs`` (m).
    boundary : shapely geometry, optional
        Field boundary in ``grid.crs``.
    classes : mapping of int to str, optional
        Class id -> label; switches to a class map with a legend (areas in ha).
    colours : mapping of int to str, optional
        Class id -> matplotlib colour; default evenly spaced viridis colours.
    cmap : str
        Colour map for continuous layers (viridis, cividis, magma, ...).
    vmin, vmax : float, optional
        Colour range; default the data range.
    footnote : str
        Small print under the map (e.g. the cautions on a rate map), wrapped to the page.
    class_breaks : sequence of float, optional
        Values marked across the colour bar of a continuous layer, each with its label
        (value units; e.g. fixation-risk breaks 0.65 and 0.80).
    zone_outlines : sequence of (str, shapely geometry), optional
        (zone id, polygon) pairs outlined and labelled on the map.
    table : (header, rows), optional
        A table beside the map (strings; at most :data:`TABLE_MAX_ROWS` rows are shown,
        the rest counted in a last "... n more" row).
    legend_title : str, optional
        Title of a class legend (default ``unit``).
    crs_note : str, optional
        The CRS line under the map; default worked out from ``grid`` (cached), ``""`` for
        none.
    figsize : (float, float)
        Page size without a table (in); the page grows when its text needs more room.

    Returns
    -------
    matplotlib.figure.Figure
        On an Agg canvas.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    m = _MARGIN
    gap = 0.08
    map_w0, h0 = (float(v) for v in figsize)
    spec = _table_spec(*table) if table is not None else None
    table_x = map_w0 - m + 0.2
    width = table_x + spec.width + m if spec is not None else map_w0
    fig = Figure(figsize=(width, h0), dpi=_DPI)
    FigureCanvasAgg(fig)
    text_w = width - 2 * m
    header = page_header(title, subtitle, text_w, 13, 9)
    header_h = header.height
    note = _crs_note(grid) if crs_note is None else crs_note
    note_lines = wrap_text(note, text_w, 6.5) if note else []
    foot_lines = wrap_text(footnote, text_w, 6.5) if footnote else []
    footer_h = text_height(len(note_lines) + len(foot_lines), 6.5)
    # The map, drawn first so that the legend knows its entries.
    ax = fig.add_axes((0, 0, 1, 1), label="map")
    drawn = draw_layer(ax, array, grid, unit=unit, samples_xy=samples_xy, boundary=boundary,
                       classes=classes, colours=colours, cmap=cmap, vmin=vmin, vmax=vmax,
                       class_breaks=class_breaks, zone_outlines=zone_outlines,
                       legend_title=legend_title)
    handles = list(drawn.class_handles) + list(drawn.furniture_handles)
    legend = None
    legend_h = 0.0
    if handles:
        legend, _, legend_h = _legend(
            fig, handles, title=drawn.legend_title if drawn.discrete else None, font_size=8,
            max_width=map_w0 - 2 * m, max_cols=3 if drawn.discrete else len(handles))
    min_map_h = 2.5
    fixed_h = m + header_h + 2 * gap + footer_h + m + (legend_h + gap if legend else 0.0)
    height = max(h0, fixed_h + min_map_h)
    if spec is not None:
        height = max(height, m + header_h + 2 * gap + spec.height + footer_h + m)
    if height != h0:
        fig.set_size_inches(width, height)
    page = _Page(fig)
    top = height - m - header_h - gap
    bottom = m + footer_h + gap + (legend_h + gap if legend else 0.0)
    avail_h = top - bottom
    xlo, xhi = ax.get_xlim()
    ylo, yhi = ax.get_ylim()
    aspect = (xhi - xlo) / (yhi - ylo)
    left_w = right_w = 0.0
    bar_w, bar_gap = 0.16, 0.12
    cax = None
    if not drawn.discrete:
        bar_h = 0.8 * avail_h
        cax = page.axes(m, bottom, bar_w, bar_h, label="colour bar")
        _colour_bar(fig, cax, drawn, font_size=8)
        left_w, right_w = _colour_bar_widths(cax, drawn, 8)
    side = bar_gap + left_w + bar_w + right_w if cax is not None else 0.0
    map_w, map_h = _fit_box(map_w0 - 2 * m - side, avail_h, aspect)
    x0 = m + (map_w0 - 2 * m - side - map_w) / 2
    y0 = top - map_h
    page.set_axes(ax, x0, y0, map_w, map_h)
    if cax is not None:
        bar_h = max(min(0.8 * map_h, avail_h), min(1.5, avail_h))
        page.set_axes(cax, x0 + map_w + bar_gap + left_w, y0 + (map_h - bar_h) / 2, bar_w,
                      bar_h)
        new_left, new_right = _colour_bar_widths(cax, drawn, 8)
        if new_right > right_w or new_left > left_w:  # fewer, other ticks on a shorter bar
            grow = max(new_right - right_w, 0.0) + max(new_left - left_w, 0.0)
            map_w, map_h = _fit_box(map_w - grow, map_h, aspect)
            y0 = top - map_h
            page.set_axes(ax, x0, y0, map_w, map_h)
            bar_h = max(min(0.8 * map_h, avail_h), min(1.5, avail_h))
            page.set_axes(cax, x0 + map_w + bar_gap + new_left, y0 + (map_h - bar_h) / 2,
                          bar_w, bar_h)
    if legend is not None:
        _place_legend(page, legend, x0 + map_w / 2 if drawn.discrete else map_w0 / 2,
                      y0 - gap)
    header.draw(page, m, height - m, _MUTED)
    if note_lines or foot_lines:
        page.text(m, m, note_lines + foot_lines, size=6.5, color="0.25", va="bottom",
                  ha="left")
    if spec is not None:
        table_top = height - m - header_h - gap
        tax = page.axes(table_x, table_top - spec.height, spec.width, spec.height,
                        label="table")
        _draw_table(tax, spec)
    return fig


def plot_layer(path_png: str | Path, array: np.ndarray, grid: GridSpec, **kw: Any) -> Path:
    """Draw one raster layer as a PNG map (150 dpi); see :func:`layer_figure`.

    Parameters
    ----------
    path_png : str or Path
        Target file; replaced atomically.
    array, grid, **kw
        As for :func:`layer_figure` (``title`` and ``unit`` are required).

    Returns
    -------
    Path
    """
    return _save(layer_figure(array, grid, **kw), path_png)


# --------------------------------------------------------------------------- variogram


def variogram_figure(
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
) -> Figure:
    """An empirical variogram (point area grows with the pair count) and the fitted model.

    6.5 x 4.5 in at 150 dpi; the page grows (wider up to 9 in for long table lines, taller
    for a wrapped subtitle and the table) so that every line fits inside it.

    Parameters
    ----------
    lags : numpy.ndarray
        Mean lag distance of each bin (m).
    gamma : numpy.ndarray
        Empirical semivariance of each bin (unit squared).
    counts : numpy.ndarray
        Number of point pairs in each bin.
    model_callable : callable
        Fitted model: semivariance as a function of lag distance (m).
    title, subtitle : str
        Title (e.g. field and property) and a second line (e.g. model and parameters),
        wrapped to the page width.
    unit : str
        Unit of the property (e.g. ``"mg/kg"``); the y axis shows its square.
    candidates : sequence of (label, callable or None)
        Other models tried on the same variable, drawn as thin dashed lines (None: not
        drawable on these axes, e.g. fitted to the logarithms).
    table : sequence of str
        Monospace lines printed under the plot (e.g. every candidate's cross-validation
        figures); a line too long even for the widest page is continued on the next.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    lags = np.asarray(lags, dtype=np.float64)
    gamma = np.asarray(gamma, dtype=np.float64)
    counts = np.asarray(counts, dtype=np.float64)
    if not (lags.shape == gamma.shape == counts.shape):
        raise ValueError("lags, gamma and counts must have the same shape")
    m, gap = _MARGIN, 0.08
    table_size = 6.5
    width0, height0 = _VARIOGRAM_SIZE
    longest = max((text_width(line, table_size, family="monospace") for line in table),
                  default=0.0)
    width = min(max(width0, longest / 0.98 + 2 * m + 0.02), _VARIOGRAM_MAX_WIDTH)
    table_lines = [piece for line in table
                   for piece in _hard_wrap(line, width - 2 * m, table_size)]
    header = page_header(title, subtitle, width - 2 * m, 12, 8)
    header_h = header.height
    table_h = text_height(len(table_lines), table_size, family="monospace")
    tick_size = 8.0
    bottom_band = plot_bottom_band(tick_size) + 0.04
    fixed = m + header_h + gap + 0.1 + bottom_band + (gap + table_h if table_lines else 0.0) + m
    plot_h = max(height0 - fixed, 3.1)
    height = fixed + plot_h
    fig = Figure(figsize=(width, height), dpi=_DPI)
    FigureCanvasAgg(fig)
    page = _Page(fig)
    plot_y = m + (table_h + gap if table_lines else 0.0) + bottom_band
    ax = page.axes(0.9, plot_y, width - 0.9 - 0.25, plot_h, label="variogram")
    _draw_variogram(ax, lags, gamma, counts, model_callable, unit=unit, candidates=candidates,
                    font_size=tick_size)
    place_plot_axes(page, ax, 0.0, plot_y, width - m, plot_h, font_size=tick_size, left_pad=m)
    header.draw(page, m, height - m, _MUTED)
    if table_lines:
        page.text(m, m, table_lines, size=table_size, family="monospace", va="bottom",
                  ha="left")
    return fig


def _draw_variogram(
    ax: Axes,
    lags: np.ndarray,
    gamma: np.ndarray,
    counts: np.ndarray,
    model_callable: Callable[[np.ndarray], np.ndarray],
    *,
    unit: str,
    candidates: Sequence[tuple[str, Callable[[np.ndarray], np.ndarray] | None]] = (),
    font_size: float = 8.0,
    marker_scale: float = 1.0,
) -> None:
    """Empirical semivariances (area ~ pairs, with the counts) and the models, into ``ax``."""
    ok = np.isfinite(lags) & np.isfinite(gamma)
    top = counts[ok].max() if ok.any() and counts[ok].max() > 0 else 1.0
    sizes = marker_scale * (15 + 185 * counts[ok] / top)
    ax.scatter(lags[ok], gamma[ok], s=sizes, color="#31688e", edgecolors="black",
               linewidths=0.5, zorder=3, label="empirical (area ~ pairs)")
    for h, g, c in zip(lags[ok], gamma[ok], counts[ok], strict=True):
        ax.annotate(f"{int(c)}", (h, g), xytext=(0, 7 * math.sqrt(marker_scale)),
                    textcoords="offset points", ha="center", fontsize=font_size - 1.5,
                    color="0.3")
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
    ax.set_xlabel("lag distance (m)", fontsize=font_size + 1)
    ax.set_ylabel(f"semivariance [({unit})²]" if unit else "semivariance",
                  fontsize=font_size + 1)
    ax.grid(True, color="0.9")
    ax.legend(loc="lower right", fontsize=font_size)


def place_plot_axes(page: _Page, ax: Axes, x: float, y: float, w: float, h: float, *,
                    font_size: float, left_pad: float = 0.0) -> None:
    """Put a plot's axes in the box (x, y, w, h) (in) with its tick labels and axis labels.

    ``y`` and ``h`` are of the axes frame itself: room for the x tick labels and x label
    must be left below ``y`` by the caller (see :func:`plot_bottom_band`).  The left margin
    is worked out from the widest y tick label (formatted without offset or power of ten),
    the right one from half the last x tick label.  Limits must be set before.
    """
    for axis in (ax.xaxis, ax.yaxis):
        axis.set_major_formatter(_plain_formatter())
        axis.label.set_parse_math(False)
    ax.tick_params(labelsize=font_size)
    ylo, yhi = sorted(ax.get_ylim())
    xlo, xhi = sorted(ax.get_xlim())
    page.set_axes(ax, x + left_pad + 0.8, y, max(w - left_pad - 1.0, 0.5), h)
    ylocs = [v for v in ax.yaxis.get_majorticklocs() if ylo - 1e-12 <= v <= yhi + 1e-12]
    ylabels = ax.yaxis.get_major_formatter().format_ticks(ylocs) if ylocs else []
    left = (text_height(1, ax.yaxis.label.get_fontsize()) + 0.06 + (3.5 + 3.5) / 72
            + max((text_width(s, font_size) for s in ylabels), default=0.0))
    xlocs = [v for v in ax.xaxis.get_majorticklocs() if xlo - 1e-12 <= v <= xhi + 1e-12]
    xlabels = ax.xaxis.get_major_formatter().format_ticks(xlocs) if xlocs else []
    right = max(0.1, text_width(xlabels[-1], font_size) / 2 + 0.03 if xlabels else 0.0)
    page.set_axes(ax, x + left_pad + left, y, max(w - left_pad - left - right, 0.5), h)


def plot_bottom_band(font_size: float, label_size: float | None = None) -> float:
    """Room below a plot's frame for its x tick labels and x label (in)."""
    label_size = font_size + 1 if label_size is None else label_size
    return (3.5 + 3.5) / 72 + text_height(1, font_size) + 0.05 + text_height(1, label_size)


def plot_variogram(path_png: str | Path, *args: Any, **kw: Any) -> Path:
    """Write :func:`variogram_figure` as a PNG (150 dpi), replacing ``path_png`` atomically.

    ``args`` and ``kw`` are those of :func:`variogram_figure`.

    Returns
    -------
    Path
    """
    return _save(variogram_figure(*args, **kw), path_png)


# --------------------------------------------------------------------------- furniture


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


def _hex_colours(ids: list[int]) -> dict[int, str]:
    from pmap.io.rasters import class_colours

    return {cid: "#{:02x}{:02x}{:02x}".format(*rgba[:3]) for cid, rgba in class_colours(ids).items()}


#: Outline paths of recently drawn geometries, by identity (a run draws the same boundary on
#: every map).  Each entry keeps its geometry alive, so an id is never reused while cached.
_PATHS: dict[int, tuple[BaseGeometry, Any]] = {}
_PATHS_MAX = 8


def _outline_path(geom: BaseGeometry) -> Any:
    """The rings (or lines) of ``geom`` as one matplotlib Path, cached by identity."""
    hit = _PATHS.get(id(geom))
    if hit is not None and hit[0] is geom:
        return hit[1]
    path = _outline_path_of([geom])
    if len(_PATHS) >= _PATHS_MAX:
        _PATHS.pop(next(iter(_PATHS)))
    _PATHS[id(geom)] = (geom, path)
    return path


def _outline_path_of(geoms: Sequence[BaseGeometry]) -> Any:
    """The rings of polygons (and the lines of lines) in ``geoms`` as one Path."""
    import shapely
    from matplotlib.path import Path as MplPath

    parts = shapely.get_parts(np.asarray(list(geoms), dtype=object))
    polygonal = np.isin(shapely.get_type_id(parts), (3,))  # Polygon
    rings = shapely.get_rings(parts[polygonal]) if polygonal.any() else np.empty(0, object)
    lines = parts[np.isin(shapely.get_type_id(parts), (1, 2))]  # LineString, LinearRing
    pieces = np.concatenate([rings, lines])
    if pieces.size == 0:
        return MplPath(np.zeros((0, 2)))
    coords, index = shapely.get_coordinates(pieces, return_index=True)
    codes = np.full(len(coords), MplPath.LINETO, dtype=MplPath.code_type)
    starts = np.flatnonzero(np.r_[True, index[1:] != index[:-1]])
    codes[starts] = MplPath.MOVETO
    return MplPath(coords, codes)


def _scale_bar(ax: Axes, extent_m: float, font_size: float) -> tuple[Any, float]:
    from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

    length = scale_bar_length(extent_m)
    label = f"{length / 1000:g} km" if length >= 1000 else f"{length:g} m"
    bar = AnchoredSizeBar(ax.transData, length, label, loc="lower left", pad=0.4, sep=3,
                          frameon=True, size_vertical=extent_m / 150,
                          fontproperties={"size": font_size})
    bar.patch.set_alpha(0.7)
    bar.patch.set_linewidth(0)
    ax.add_artist(bar)
    return bar, length


def _north_arrow(ax: Axes, font_size: float) -> None:
    # Arrow sizes scale with the letter: 3, 9 and 9 pt at 10 pt.
    ax.annotate("N", xy=(0.95, 0.96), xytext=(0.95, 0.84), xycoords="axes fraction",
                textcoords="axes fraction", ha="center", va="center", fontsize=font_size,
                fontweight="bold",
                arrowprops={"facecolor": "black", "edgecolor": "black",
                            "width": 0.3 * font_size, "headwidth": 0.9 * font_size,
                            "headlength": 0.9 * font_size})


def _crs_note(grid: GridSpec) -> str:
    return crs_note_for(grid.crs, grid.cell_size)


@functools.lru_cache(maxsize=32)
def crs_note_for(crs: str, cell_size: float) -> str:
    """The CRS line of a map: code, name, cell size (m) and what north means (cached)."""
    from pyproj import CRS

    name = CRS.from_user_input(crs).name
    code = crs if crs.startswith("EPSG:") else "custom CRS"
    return f"{code} ({name}); cell {cell_size:g} m; north arrow = grid north"


# --------------------------------------------------------------------------- saving


def _atomic(path: str | Path, suffix: str, write: Callable[[Path], None]) -> Path:
    """Write through ``write(tmp)`` to a hidden file beside ``path``, then rename it."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=f".tmp{suffix}",
                                    dir=path.parent)
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        write(tmp)
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return path


def _write_png(fig: Figure, target: Path) -> None:
    """Render ``fig`` on Agg at 150 dpi and write it as a PNG without metadata text."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from PIL import Image

    if not isinstance(fig.canvas, FigureCanvasAgg):
        FigureCanvasAgg(fig)
    if fig.dpi != _DPI:
        # Deterministic metadata: no "Software" text chunk naming matplotlib's version.
        fig.savefig(target, format="png", dpi=_DPI, metadata={"Software": None},
                    pil_kwargs={"compress_level": _PNG_COMPRESS_LEVEL})
        return
    fig.canvas.draw()
    rgba = np.asarray(fig.canvas.buffer_rgba())
    # An opaque page loses nothing as RGB, and a quarter less data is compressed.
    pixels = rgba[..., :3] if bool((rgba[..., 3] == 255).all()) else rgba
    Image.fromarray(np.ascontiguousarray(pixels)).save(
        target, format="png", compress_level=_PNG_COMPRESS_LEVEL, dpi=(_DPI, _DPI))


def _save(fig: Figure, path_png: str | Path) -> Path:
    """Write ``fig`` as a PNG (150 dpi), replacing ``path_png`` atomically."""
    return _atomic(path_png, ".png", lambda tmp: _write_png(fig, tmp))


#: PDF metadata left out so that the same figure gives the same bytes.
PDF_METADATA = {"Creator": None, "Producer": None, "CreationDate": None}


def _save_pdf(fig: Figure, path_pdf: str | Path) -> Path:
    """Write ``fig`` as a one-page PDF (images at 150 dpi), replacing ``path_pdf`` atomically."""
    def write(tmp: Path) -> None:
        fig.savefig(tmp, format="pdf", dpi=_DPI, metadata=PDF_METADATA)

    return _atomic(path_pdf, ".pdf", write)
