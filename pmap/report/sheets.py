"""One-page sheets: a field overview of the prescription, and a diagnostics page per property.

The overview (:func:`overview_figure`) puts on one landscape page the rate map with its
zone outlines and the rate table, up to three small maps (e.g. soil-test P classes, pH,
fixation risk), the field totals, the basis of the rates and the cautions.  A diagnostics
page (:func:`diagnostics_figure`) shows for one kriged property the empirical and fitted
variogram, the leave-one-out cross-validation, a map of the kriging standard error with
each sample's leave-one-out error, the histogram of the samples and the table of every
candidate model's figures.

Pages are laid out in inches with computed rectangles (no layout engine): every text block
is wrapped to its width by measuring it, and what does not fit shrinks in a fixed order
(table rows first, then font sizes), so nothing overlaps and nothing is cut off.  The maps
are drawn by :func:`pmap.report.maps.draw_layer`.  Figures use matplotlib's object API on an
Agg canvas; files are replaced atomically.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from shapely.geometry.base import BaseGeometry

from pmap.grid import GridSpec
from pmap.report import maps
from pmap.report.maps import (
    _DPI,
    PDF_METADATA,
    _atomic,
    _colour_bar,
    _colour_bar_widths,
    _draw_table,
    _draw_variogram,
    _fit_box,
    _hard_wrap,
    _legend,
    _Page,
    _place_legend,
    _save,
    _save_pdf,
    _table_spec,
    draw_layer,
    page_header,
    place_plot_axes,
    plot_bottom_band,
    text_height,
    text_width,
    wrap_text,
)

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

    from pmap.soil.calibration import Calibration

__all__ = [
    "PAPER_SIZES",
    "MapPanel",
    "PropertyDiagnostics",
    "overview_figure",
    "write_overview",
    "diagnostics_figure",
    "write_diagnostics",
]

#: Landscape page sizes (in): A4 is 297 x 210 mm (ISO 216), US letter 11 x 8.5 in (ANSI A).
PAPER_SIZES: dict[str, tuple[float, float]] = {"a4": (11.69, 8.27), "letter": (11.0, 8.5)}
#: Margin round a printed page (in); most office printers cannot print the outer 5 mm.
_PAGE_MARGIN = 0.3
_GAP = 0.12
#: Sequential colour map of the kriging standard error and diverging one of the errors
#: (ColorBrewer PuOr, marked colour-blind safe by ColorBrewer).
_SE_CMAP = "cividis"
_ERROR_CMAP = "PuOr_r"
_BLUE = "#0072B2"  # Okabe-Ito blue
_VERMILION = "#D55E00"  # Okabe-Ito vermilion


def _paper(paper: str) -> tuple[float, float]:
    try:
        return PAPER_SIZES[paper.lower()]
    except KeyError:
        raise ValueError(f"paper must be one of {sorted(PAPER_SIZES)}, got {paper!r}") from None


def _new_page(paper: str) -> tuple[Figure, _Page, float, float]:
    """A blank landscape page on an Agg canvas, its layout helper and its size (in)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    width, height = _paper(paper)
    fig = Figure(figsize=(width, height), dpi=_DPI)
    FigureCanvasAgg(fig)
    return fig, _Page(fig), width, height


# --------------------------------------------------------------------------- map panels


@dataclass(frozen=True, eq=False)
class MapPanel:
    """One map of a sheet: a layer and how to colour it (see :func:`maps.draw_layer`).

    Attributes
    ----------
    array : numpy.ndarray, shape grid.shape
        Values, or class ids when ``classes`` is given.
    title : str
        Panel title (e.g. ``"P2O5 rate by zone"``).
    unit : str
        Unit of the values (colour-bar label, default legend title).
    classes, colours : mapping of int to str, optional
        Class id -> label and class id -> colour of a class layer.
    cmap : str
        Colour map of a continuous layer.
    vmin, vmax : float, optional
        Colour range of a continuous layer (value units).
    class_breaks : sequence of float, optional
        Values marked on the colour bar (value units).
    zone_outlines : sequence of (str, shapely geometry), optional
        (zone id, polygon) pairs outlined and labelled.
    legend_title : str, optional
        Title of a class legend (default ``unit``).
    """

    array: np.ndarray
    title: str
    unit: str
    classes: Mapping[int, str] | None = None
    colours: Mapping[int, str] | None = None
    cmap: str = "viridis"
    vmin: float | None = None
    vmax: float | None = None
    class_breaks: Sequence[float] | None = None
    zone_outlines: Sequence[tuple[str, BaseGeometry]] | None = None
    legend_title: str | None = None


def _draw_panel(
    page: _Page,
    panel: MapPanel,
    box: tuple[float, float, float, float],
    *,
    grid: GridSpec,
    boundary: BaseGeometry | None,
    samples_xy: np.ndarray | None,
    title_size: float,
    font_size: float,
    marker_size: float,
    with_furniture: bool,
    legend_cols: int,
    label: str,
) -> list[Axes]:
    """Draw ``panel`` with its title and legend or colour bar inside ``box`` (x, y, w, h in).

    Returns the axes placed (the map first), all inside ``box``.
    """
    fig = page.fig
    x, y, w, h = box
    title_lines = wrap_text(panel.title, w, title_size, weight="bold")[:3]
    title_h = text_height(len(title_lines), title_size, "bold")
    page.text(x, y + h, title_lines, size=title_size, fontweight="bold", va="top", ha="left")
    ax = page.axes(x, y, w, h, label=label)
    drawn = draw_layer(
        ax, panel.array, grid, unit=panel.unit, samples_xy=samples_xy, boundary=boundary,
        classes=panel.classes, colours=panel.colours, cmap=panel.cmap, vmin=panel.vmin,
        vmax=panel.vmax, class_breaks=panel.class_breaks, zone_outlines=panel.zone_outlines,
        legend_title=panel.legend_title, font_size=font_size,
        zone_label_size=max(font_size - 0.5, 5.5), marker_size=marker_size,
        marker_edge_width=0.8 if marker_size >= 10 else 0.5)
    handles = list(drawn.class_handles) + (list(drawn.furniture_handles) if with_furniture
                                           else [])
    legend, legend_h = None, 0.0
    if handles:
        legend, _, legend_h = _legend(
            fig, handles, title=drawn.legend_title if drawn.discrete else None,
            font_size=font_size, max_width=w, max_cols=legend_cols)
    top = y + h - title_h - 0.06
    avail_h = top - y - (legend_h + 0.06 if legend is not None else 0.0)
    if avail_h < 0.5 and legend is not None:  # a legend taller than its panel: more columns
        legend.remove()
        legend, _, legend_h = _legend(
            fig, handles, title=drawn.legend_title if drawn.discrete else None,
            font_size=font_size - 1, max_width=w, max_cols=legend_cols + 2)
        avail_h = top - y - legend_h - 0.06
    xlo, xhi = ax.get_xlim()
    ylo, yhi = ax.get_ylim()
    aspect = (xhi - xlo) / (yhi - ylo)
    placed = [ax]
    bar_w, bar_gap = 0.12 if w < 3 else 0.15, 0.08
    side, cax, left_w = 0.0, None, 0.0
    if not drawn.discrete:
        cax = page.axes(x + w - bar_w, y, bar_w, max(0.8 * avail_h, 0.3),
                        label=f"{label} colour bar")
        _colour_bar(fig, cax, drawn, font_size=font_size)
        left_w, right_w = _colour_bar_widths(cax, drawn, font_size)
        side = bar_gap + left_w + bar_w + right_w
        placed.append(cax)
    map_w, map_h = _fit_box(w - side, avail_h, aspect)
    x0 = x + (w - side - map_w) / 2
    y0 = top - map_h
    page.set_axes(ax, x0, y0, map_w, map_h)
    if cax is not None:
        bar_h = min(max(0.8 * map_h, min(1.2, avail_h)), avail_h)
        page.set_axes(cax, x0 + map_w + bar_gap + left_w, y0 + (map_h - bar_h) / 2, bar_w,
                      bar_h)
    if legend is not None:
        _place_legend(page, legend, x + w / 2 if cax is not None else x0 + map_w / 2, y0 - 0.06)
    return placed


# --------------------------------------------------------------------------- overview


def overview_figure(
    *,
    grid: GridSpec,
    boundary: BaseGeometry | None,
    samples_xy: np.ndarray | None,
    title: str,
    subtitle: str,
    panels: Sequence[MapPanel],
    table: tuple[Sequence[str], Sequence[Sequence[str]]] | None,
    totals_lines: Sequence[str],
    basis: str,
    cautions: str,
    paper: str = "a4",
) -> Figure:
    """The field overview: one landscape page of the prescription and what it rests on.

    Left: the first panel (the rate map, with its zone outlines) large, and under it up to
    three small panels.  Right: the rate table (rows that do not fit are counted in a last
    "... n more" row), the field totals and the basis of the rates.  Foot: the CRS and the
    cautions in small print.

    Parameters
    ----------
    grid : GridSpec
        Georeferencing of every panel's array.
    boundary : shapely geometry or None
        Field boundary in ``grid.crs``.
    samples_xy : numpy.ndarray, shape (n, 2), or None
        Sample locations in ``grid.crs`` (m).
    title, subtitle : str
        Page title (e.g. field name) and second line (farm, date, product).
    panels : sequence of MapPanel
        The rate map first, then at most three more.
    table : (header, rows) or None
        The rate table (strings; e.g. zone, class, area ha, rate, product).
    totals_lines : sequence of str
        Field totals, one per line (area, P2O5, product, cost).
    basis : str
        What the rates rest on (a paragraph).
    cautions : str
        The cautions (small print).
    paper : str
        ``"a4"`` (11.69 x 8.27 in) or ``"letter"`` (11 x 8.5 in), landscape.

    Returns
    -------
    matplotlib.figure.Figure
    """

    if not panels:
        raise ValueError("an overview needs at least the rate-map panel")
    if len(panels) > 4:
        raise ValueError(f"an overview holds at most four panels, got {len(panels)}")
    fig, page, width, height = _new_page(paper)
    m, gap = _PAGE_MARGIN, _GAP
    full = width - 2 * m
    # Header and foot.
    header = page_header(title, subtitle, full, 15, 9.5)
    header_h = header.height
    header.draw(page, m, height - m)
    foot_lines = (wrap_text(f"Cautions: {cautions}", full, 6.5) if cautions else [])
    foot_lines += wrap_text(maps.crs_note_for(grid.crs, grid.cell_size), full, 6.5)
    foot_h = text_height(len(foot_lines), 6.5)
    page.text(m, m, foot_lines, size=6.5, color="0.2", va="bottom", ha="left")
    top = height - m - header_h - gap
    bottom = m + foot_h + gap
    content_h = top - bottom
    # Right column: the rate table, the totals and the basis.
    spec = None
    column_w = 3.3
    if table is not None:
        for size in (7.0, 6.5, 6.0, 5.5):
            spec = _table_spec(*table, size=size)
            if spec.width <= 4.4:
                break
        if spec.width > 4.4:
            spec = _table_spec(*table, size=5.5, max_cell_width=4.4 / max(len(table[0]), 1))
        column_w = max(column_w, spec.width)
    right_x = width - m - column_w
    heading_h = text_height(1, 8.5, "bold")
    table_h = heading_h + 0.06 + spec.height + gap if spec is not None else 0.0
    blocks = _text_blocks(totals_lines, basis, column_w, 8.0, 7.0)
    # The small panels go across the page when the right column leaves room under it, else
    # under the rate map only.
    small = list(panels[1:])
    left_w = right_x - 0.3 - m
    slot = (full - 2 * 0.2) / 3
    small_h = _small_row_height(small, grid, boundary, slot, content_h)
    across = bool(small) and table_h + _blocks_height(blocks) <= content_h - small_h - gap
    if not across:
        slot = (left_w - 2 * 0.2) / 3
        small_h = _small_row_height(small, grid, boundary, slot, content_h)
    column_h = content_h - small_h - gap if across else content_h
    min_table_h = heading_h + 0.06 + 3 * spec.row_height + gap if spec is not None else 0.0
    if _blocks_height(blocks) > column_h - min_table_h:
        # Very long text: smaller print, then cut with a pointer to the full record.
        blocks = _text_blocks(totals_lines, basis, column_w, 6.0, 6.0)
        while (_blocks_height(blocks) > column_h - min_table_h
               and any(len(lines) > 2 for _, lines, _ in blocks)):
            k = max(range(len(blocks)), key=lambda i: len(blocks[i][1]))
            heading, lines, size = blocks[k]
            blocks[k] = (heading, lines[:-2] + ["... (in full in summary.json)"], size)
    y_cursor = top
    if spec is not None:
        room = column_h - _blocks_height(blocks) - heading_h - 0.06 - gap
        fit_rows = max(int(room / spec.row_height) - 1, 1)
        if fit_rows < len(spec.rows):
            spec = _table_spec(*table, size=spec.size,
                               max_rows=min(fit_rows, maps.TABLE_MAX_ROWS))
        page.text(right_x, y_cursor, ["Rates by zone"], size=8.5, fontweight="bold", va="top",
                  ha="left")
        y_cursor -= heading_h + 0.06
        tax = page.axes(right_x, y_cursor - spec.height, spec.width, spec.height, label="table")
        _draw_table(tax, spec)
        y_cursor -= spec.height + gap
    for heading, lines, size in blocks:
        page.text(right_x, y_cursor, [heading], size=8.5, fontweight="bold", va="top",
                  ha="left")
        y_cursor -= heading_h + 0.04
        page.text(right_x, y_cursor, lines, size=size, va="top", ha="left", color="0.1")
        y_cursor -= text_height(len(lines), size) + gap
    # The rate map large, the others small beneath it.
    big_box = ((m, bottom + small_h + gap, left_w, content_h - small_h - gap) if small
               else (m, bottom, left_w, content_h))
    _draw_panel(page, panels[0], big_box, grid=grid, boundary=boundary, samples_xy=samples_xy,
                title_size=10, font_size=7.5, marker_size=12, with_furniture=True,
                legend_cols=4, label="panel 1")
    for k, panel in enumerate(small):
        _draw_panel(page, panel, (m + k * (slot + 0.2), bottom, slot, small_h), grid=grid,
                    boundary=boundary, samples_xy=samples_xy, title_size=7.5,
                    font_size=6.5 if across else 6.0, marker_size=6 if across else 4,
                    with_furniture=False, legend_cols=2, label=f"panel {k + 2}")
    return fig


def _text_blocks(totals_lines: Sequence[str], basis: str, width: float, totals_size: float,
                 basis_size: float) -> list[tuple[str, list[str], float]]:
    """(heading, wrapped lines, font size) of the totals and the basis."""
    blocks = []
    if totals_lines:
        blocks.append(("Field totals", [ln for t in totals_lines
                                        for ln in wrap_text(t, width, totals_size)],
                       totals_size))
    if basis:
        blocks.append(("Basis of the rates", wrap_text(basis, width, basis_size), basis_size))
    return blocks


def _blocks_height(blocks: Sequence[tuple[str, list[str], float]]) -> float:
    return sum(text_height(1, 8.5, "bold") + 0.04 + text_height(len(lines), size) + _GAP
               for _, lines, size in blocks)


def _small_row_height(small: Sequence[MapPanel], grid: GridSpec,
                      boundary: BaseGeometry | None, slot_w: float, content_h: float) -> float:
    """Height of the row of small panels (in): what their width allows, at most 38 %."""
    if not small:
        return 0.0
    xmin, ymin, xmax, ymax = grid.bounds
    if boundary is not None:
        bxmin, bymin, bxmax, bymax = boundary.bounds
        xmin, ymin, xmax, ymax = min(xmin, bxmin), min(ymin, bymin), max(xmax, bxmax), \
            max(ymax, bymax)
    aspect = (xmax - xmin) / (ymax - ymin) if ymax > ymin else 1.0
    title_h = max(text_height(len(wrap_text(p.title, slot_w, 7.5, weight="bold")[:3]), 7.5,
                              "bold") for p in small)
    # A class legend takes about three rows of 6 pt under the map, a colour bar ~0.9 in.
    needs = []
    for panel in small:
        if panel.classes is not None:
            rows = -(-(len(panel.classes)) // 2) + 1
            needs.append(title_h + 0.06 + slot_w / aspect + 0.06 + text_height(rows, 6.5))
        else:
            needs.append(title_h + 0.06 + (slot_w - 0.95) / aspect)
    return float(min(max(needs), 0.38 * content_h))


def write_overview(path_png: str | Path, path_pdf: str | Path, **kw: Any) -> tuple[Path, Path]:
    """Write :func:`overview_figure` as a PNG (150 dpi) and a one-page PDF, atomically.

    Parameters
    ----------
    path_png, path_pdf : str or Path
        Targets; each replaced atomically.
    **kw
        The keywords of :func:`overview_figure`.

    Returns
    -------
    (Path, Path)
        The PNG and the PDF.
    """
    fig = overview_figure(**kw)
    png = _save(fig, path_png)
    pdf = _save_pdf(fig, path_pdf)
    return png, pdf


# --------------------------------------------------------------------------- diagnostics


@dataclass(frozen=True, eq=False)
class PropertyDiagnostics:
    """What the diagnostics page of one kriged property shows.

    Attributes
    ----------
    name : str
        Property name (e.g. ``"stp"``); names the PNG ``diagnostics_<name>.png``.
    title : str
        Property in words (e.g. ``"Soil-test P"``).
    unit : str
        Unit of the property (e.g. ``"mg/kg"``).
    lags, gamma, counts : numpy.ndarray, shape (k,)
        Empirical variogram: mean lag of each bin (m), semivariance (squared units of the
        kriged variable: of the logarithms when ``log``), pairs per bin.
    model : callable
        Fitted variogram: semivariance of the lag (m), in the same units as ``gamma``.
    log : bool
        Whether the variogram (and the kriging) is of the logarithms.
    observed, predicted : numpy.ndarray, shape (n,)
        Sample values and their leave-one-out predictions (property unit).
    samples_xy : numpy.ndarray, shape (n, 2)
        Sample locations (m, grid CRS).
    standard_error : numpy.ndarray, shape grid.shape
        Kriging standard error (property unit), NaN outside the field.
    figures_lines : sequence of str
        Cross-validation figures of every candidate model, one line each, the chosen one
        marked (monospace, column-aligned).
    summary_lines : sequence of str
        Optional lines under the title (e.g. the chosen model and its parameters).
    """

    name: str
    title: str
    unit: str
    lags: np.ndarray
    gamma: np.ndarray
    counts: np.ndarray
    model: Callable[[np.ndarray], np.ndarray]
    log: bool
    observed: np.ndarray
    predicted: np.ndarray
    samples_xy: np.ndarray
    standard_error: np.ndarray
    figures_lines: Sequence[str]
    summary_lines: Sequence[str] = ()


def diagnostics_figure(
    prop: PropertyDiagnostics,
    *,
    grid: GridSpec,
    boundary: BaseGeometry | None,
    title: str,
    paper: str = "a4",
) -> Figure:
    """One landscape page of the diagnostics of one kriged property.

    Top row: the empirical and fitted variogram; observed against leave-one-out predicted
    values with the 1:1 line and the RMSE; the histogram of the sample values.  Bottom row:
    the kriging standard error with each sample coloured by its leave-one-out error
    (predicted - observed, diverging colours centred on 0); the candidates' figures.

    Parameters
    ----------
    prop : PropertyDiagnostics
        The property.
    grid : GridSpec
        Georeferencing of ``prop.standard_error``.
    boundary : shapely geometry or None
        Field boundary in ``grid.crs``.
    title : str
        Page title (e.g. the field's name); the property is added to it.
    paper : str
        ``"a4"`` or ``"letter"``, landscape.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.cm import ScalarMappable
    from matplotlib.colors import Normalize
    from matplotlib.ticker import MaxNLocator

    observed = np.asarray(prop.observed, dtype=np.float64).ravel()
    predicted = np.asarray(prop.predicted, dtype=np.float64).ravel()
    pts = np.asarray(prop.samples_xy, dtype=np.float64).reshape(-1, 2)
    if not (observed.shape == predicted.shape == (len(pts),)):
        raise ValueError("observed, predicted and samples_xy must have one entry per sample")
    fig, page, width, height = _new_page(paper)
    m, gap = _PAGE_MARGIN, _GAP
    full = width - 2 * m
    head = f"{title}: diagnostics of {prop.title}" + (f" ({prop.unit})" if prop.unit else "")
    header = page_header(head, prop.summary_lines, full, 14, 8)
    header_h = header.height
    header.draw(page, m, height - m)
    top = height - m - header_h - gap
    bottom = m
    row_h = (top - bottom - gap) / 2
    font = 7.0
    band = plot_bottom_band(font)
    title_band = text_height(1, 8.5, "bold") + 0.08
    # Top row: variogram, cross-validation, histogram.
    col_w = (full - 2 * 0.25) / 3
    frame_y = top - row_h + band
    frame_h = row_h - band - title_band
    errors = predicted - observed
    ok = np.isfinite(errors)
    rmse = float(np.sqrt(np.mean(errors[ok] ** 2))) if ok.any() else float("nan")
    mean_error = float(np.mean(errors[ok])) if ok.any() else float("nan")
    vario_unit = "log units" if prop.log else prop.unit
    ax_v = page.axes(m, frame_y, col_w, frame_h, label="variogram")
    _draw_variogram(ax_v, np.asarray(prop.lags, float), np.asarray(prop.gamma, float),
                    np.asarray(prop.counts, float), prop.model, unit=vario_unit,
                    font_size=font, marker_scale=0.6)
    ax_v.set_title(("Variogram of the logarithms" if prop.log else "Variogram"), loc="left",
                   fontsize=8.5, fontweight="bold")
    place_plot_axes(page, ax_v, m, frame_y, col_w, frame_h, font_size=font)

    ax_c = page.axes(m + col_w + 0.25, frame_y, col_w, frame_h, label="cross-validation")
    values = np.concatenate([observed[ok], predicted[ok]])
    low = float(values.min()) if values.size else 0.0
    high = float(values.max()) if values.size else 1.0
    pad = 0.05 * (high - low) if high > low else 1.0
    low, high = low - pad, high + pad
    ax_c.plot([low, high], [low, high], color="black", linewidth=0.9,
              linestyle=(0, (4, 2)), label="1:1", zorder=1)
    ax_c.scatter(observed, predicted, s=12, color=_BLUE, edgecolors="black", linewidths=0.3,
                 zorder=2, label="samples")
    ax_c.set_xlim(low, high)
    ax_c.set_ylim(low, high)
    ax_c.set_aspect("equal", adjustable="box")
    ax_c.set_xlabel(f"observed ({prop.unit})" if prop.unit else "observed", fontsize=font + 1)
    ax_c.set_ylabel(f"leave-one-out predicted ({prop.unit})" if prop.unit
                    else "leave-one-out predicted", fontsize=font + 1)
    ax_c.grid(True, color="0.9")
    ax_c.text(0.03, 0.97, f"RMSE {rmse:.3g} {prop.unit}\nmean error {mean_error:+.3g}\n"
              f"n = {int(ok.sum())}", transform=ax_c.transAxes, va="top", ha="left",
              fontsize=font, parse_math=False,
              bbox={"facecolor": "white", "edgecolor": "0.7", "linewidth": 0.5, "pad": 2})
    ax_c.legend(loc="lower right", fontsize=font)
    ax_c.set_title("Leave-one-out cross-validation", loc="left", fontsize=8.5,
                   fontweight="bold")
    place_plot_axes(page, ax_c, m + col_w + 0.25, frame_y, col_w, frame_h, font_size=font)

    ax_h = page.axes(m + 2 * (col_w + 0.25), frame_y, col_w, frame_h, label="histogram")
    finite = observed[np.isfinite(observed)]
    if finite.size:
        edges = np.histogram_bin_edges(finite, bins="auto")
        if len(edges) > 31:
            edges = np.histogram_bin_edges(finite, bins=30)
        ax_h.hist(finite, bins=edges, color=_BLUE, edgecolor="white", linewidth=0.5)
        ax_h.axvline(float(finite.mean()), color=_VERMILION, linewidth=1.2,
                     label=f"mean {finite.mean():.3g}")
        ax_h.axvline(float(np.median(finite)), color="black", linewidth=1.0,
                     linestyle=(0, (4, 2)), label=f"median {np.median(finite):.3g}")
        ax_h.legend(loc="best", fontsize=font)
    ax_h.set_xlabel(f"{prop.title} ({prop.unit})" if prop.unit else prop.title,
                    fontsize=font + 1)
    ax_h.set_ylabel("samples", fontsize=font + 1)
    ax_h.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax_h.set_title("Sample values", loc="left", fontsize=8.5, fontweight="bold")
    place_plot_axes(page, ax_h, m + 2 * (col_w + 0.25), frame_y, col_w, frame_h,
                    font_size=font)

    # Bottom row: error map, figures table.
    map_box_w = 0.58 * full
    y_row = bottom
    page.text(m, y_row + row_h, ["Kriging standard error and leave-one-out errors"],
              size=8.5, fontweight="bold", va="top", ha="left")
    ax_e = page.axes(m, y_row, map_box_w, row_h, label="error map")
    drawn = draw_layer(ax_e, np.asarray(prop.standard_error, dtype=np.float64), grid,
                       unit=f"kriging standard error ({prop.unit})", boundary=boundary,
                       cmap=_SE_CMAP, font_size=font)
    limit = float(np.nanmax(np.abs(errors))) if ok.any() else 1.0
    limit = limit if limit > 0 else 1.0
    error_norm = Normalize(-limit, limit)
    ax_e.scatter(pts[ok, 0], pts[ok, 1], c=errors[ok], cmap=_ERROR_CMAP, norm=error_norm,
                 s=22, edgecolors="black", linewidths=0.5, zorder=3)
    error_drawn = maps.DrawnLayer(
        mappable=ScalarMappable(norm=error_norm, cmap=_ERROR_CMAP), class_handles=(),
        furniture_handles=(), unit=f"leave-one-out error, predicted - observed ({prop.unit})",
        legend_title="", class_breaks=(), scale_bar=None, scale_bar_m=0.0)
    avail_h = row_h - title_band
    bar_w, bar_gap = 0.13, 0.1
    bars = []
    widths = []
    for k, item in enumerate((drawn, error_drawn)):
        cax = page.axes(m, y_row, bar_w, 0.85 * avail_h, label=f"colour bar {k + 1}")
        _colour_bar(fig, cax, item, font_size=font)
        bars.append(cax)
        widths.append(_colour_bar_widths(cax, item, font))
    side = sum(bar_gap + lw + bar_w + rw for lw, rw in widths)
    xlo, xhi = ax_e.get_xlim()
    ylo, yhi = ax_e.get_ylim()
    map_w, map_h = _fit_box(map_box_w - side, avail_h, (xhi - xlo) / (yhi - ylo))
    y0 = y_row + avail_h - map_h
    page.set_axes(ax_e, m, y0, map_w, map_h)
    x_cursor = m + map_w
    for cax, (lw, rw) in zip(bars, widths, strict=True):
        bar_h = min(0.85 * avail_h, max(0.85 * map_h, 1.2))
        page.set_axes(cax, x_cursor + bar_gap + lw, y_row + avail_h - (map_h + bar_h) / 2
                      if bar_h <= map_h else y_row + avail_h - bar_h, bar_w, bar_h)
        x_cursor += bar_gap + lw + bar_w + rw

    table_x = m + map_box_w + 0.3
    table_w = width - m - table_x
    page.text(table_x, y_row + row_h, ["Candidate models (cross-validation)"], size=8.5,
              fontweight="bold", va="top", ha="left")
    room_h = avail_h
    lines = list(prop.figures_lines)
    for size in (7.0, 6.5, 6.0, 5.5, 5.0):
        longest = max((text_width(ln, size, family="monospace") for ln in lines), default=0.0)
        if longest <= 0.98 * table_w and text_height(len(lines), size, family="monospace") \
                <= room_h:
            break
    shown = [piece for ln in lines for piece in _hard_wrap(ln, table_w, size)]
    max_lines = 1
    while text_height(max_lines + 1, size, family="monospace") <= room_h:
        max_lines += 1
    if len(shown) > max_lines:
        shown = shown[: max_lines - 1] + [f"... {len(shown) - max_lines + 1} more lines"]
    if shown:
        page.text(table_x, y_row + avail_h, shown, size=size, family="monospace", va="top",
                  ha="left")
    return fig


def write_diagnostics(
    path_pdf: str | Path,
    pages_png_dir: str | Path,
    *,
    properties: Sequence[PropertyDiagnostics],
    grid: GridSpec,
    boundary: BaseGeometry | None,
    title: str,
    calibration: Calibration | None = None,
    paper: str = "a4",
    calibration_method_label: str = "method not stated",
) -> list[Path]:
    """Write one diagnostics PNG per property and one PDF of all the pages, atomically.

    Parameters
    ----------
    path_pdf : str or Path
        The PDF: one page per property, then the calibration page when ``calibration`` is
        given (:func:`pmap.report.calibration_plot.calibration_figure`, resized to the page).
    pages_png_dir : str or Path
        Folder of the PNGs ``diagnostics_<name>.png`` (150 dpi).
    properties : sequence of PropertyDiagnostics
        The properties, in page order.
    grid, boundary, title, paper
        As for :func:`diagnostics_figure`.
    calibration : Calibration, optional
        The soil-model calibration of the run.
    calibration_method_label : str
        The lab method of the soil-test P, for the calibration page's axes.

    Returns
    -------
    list of Path
        The PNGs in page order, then the PDF.
    """
    from matplotlib.backends.backend_pdf import PdfPages

    png_dir = Path(pages_png_dir)
    size = _paper(paper)
    written: list[Path] = []

    def write(tmp: Path) -> None:
        with PdfPages(tmp, metadata=PDF_METADATA) as pdf:
            for prop in properties:
                fig = diagnostics_figure(prop, grid=grid, boundary=boundary, title=title,
                                         paper=paper)
                written.append(_save(fig, png_dir / f"diagnostics_{prop.name}.png"))
                pdf.savefig(fig, dpi=_DPI)
            if calibration is not None:
                from pmap.report.calibration_plot import calibration_figure

                fig = calibration_figure(
                    calibration, method_label=calibration_method_label,
                    title=f"{title}: soil model calibrated to the lab's soil-test P")
                fig.set_size_inches(*size)
                pdf.savefig(fig, dpi=_DPI)

    pdf_path = _atomic(path_pdf, ".pdf", write)
    return written + [pdf_path]

