"""PNG maps and the variogram plot: the artists drawn, the layout, and the files written."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import matplotlib.image as mpimg
import numpy as np
import pytest
from matplotlib.collections import PathCollection
from matplotlib.patches import Patch
from matplotlib.table import Table
from matplotlib.transforms import Bbox
from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar
from shapely.geometry import Point, Polygon, box

from pmap.io.boundary import grid_for_boundary
from pmap.report.maps import (
    draw_layer,
    layer_figure,
    plot_layer,
    plot_variogram,
    scale_bar_length,
    text_width,
    variogram_figure,
    wrap_text,
)

UTM = "EPSG:32616"
FIELD = Polygon([(338000, 4440000), (338800, 4440050), (338750, 4440600), (338100, 4440500)])


def _layer():
    grid = grid_for_boundary(FIELD, UTM, 10.0)
    x, y = grid.cell_centres()
    return grid, 20 + 10 * np.sin((x - 338000) / 150) + 5 * np.cos((y - 4440000) / 100)


def _check_png(path):
    img = mpimg.imread(path)
    assert img.shape[0] == pytest.approx(6 * 150, abs=2) and img.shape[1] == pytest.approx(7 * 150, abs=2)
    rgb = img[..., :3]
    assert rgb.std() > 0.05  # not a blank page
    return rgb


def test_continuous_map(tmp_path):
    grid, values = _layer()
    pts = np.array([[338200.0, 4440200.0], [338500.0, 4440300.0], [338600.0, 4440100.0]])
    path = plot_layer(tmp_path / "stp.png", values, grid, title="North 40 - soil-test P",
                      unit="mg/kg", subtitle="sampled 2024-10-12", samples_xy=pts, boundary=FIELD)
    _check_png(path)
    assert not list(tmp_path.glob(".*"))


def test_class_map_uses_the_class_colours(tmp_path):
    grid, values = _layer()
    zones = (np.digitize(values, [18, 25]) + 1).astype(np.uint8)
    path = plot_layer(tmp_path / "zones.png", zones, grid, title="zones", unit="class",
                      classes={1: "low", 2: "medium", 3: "high"},
                      colours={1: "#ff0000", 2: "#00ff00", 3: "#0000ff"}, boundary=FIELD)
    rgb = _check_png(path)
    pure_red = (rgb[..., 0] > 0.95) & (rgb[..., 1] < 0.05) & (rgb[..., 2] < 0.05)
    assert pure_red.sum() > 1000  # the class 1 area is drawn in its colour


def test_variogram_plot(tmp_path):
    h = np.linspace(25, 400, 12)

    def model(d):
        return 2 + 18 * (1 - np.exp(-np.asarray(d) / 120))

    path = plot_variogram(tmp_path / "vario.png", h, model(h), np.arange(12) * 10 + 5, model,
                          title="soil-test P variogram", unit="mg/kg")
    img = mpimg.imread(path)
    assert img.shape[:2] == (675, 975) and img[..., :3].std() > 0.05


@pytest.mark.parametrize(("extent", "expected"), [(800, 100), (1200, 200), (3000, 500), (40, 5)])
def test_scale_bar_is_round(extent, expected):
    assert scale_bar_length(extent) == expected


def test_plotting_does_not_touch_pyplot(tmp_path):
    code = (
        "import sys, numpy as np\n"
        "from pmap.grid import GridSpec\n"
        "from pmap.report.maps import plot_layer\n"
        "g = GridSpec.from_bounds('EPSG:32616', (0, 0, 100, 100), 10)\n"
        f"plot_layer({str(tmp_path / 'p.png')!r}, np.ones(g.shape), g, title='t', unit='u')\n"
        "assert 'matplotlib.pyplot' not in sys.modules\n"
    )
    root = Path(__file__).resolve().parents[2]
    subprocess.run([sys.executable, "-c", code], check=True, cwd=root,
                   env={**os.environ, "PYTHONPATH": str(root)})
    assert (tmp_path / "p.png").stat().st_size > 1000


# --- the figure API: artists, not just files ------------------------------------------------

CLASSES = {1: "low (< 20)", 2: "optimum (20-50)", 3: "high (> 50)"}
COLOURS = {1: "#D55E00", 2: "#009E73", 3: "#0072B2"}  # Okabe-Ito


def _axes(fig, label):
    found = [ax for ax in fig.axes if ax.get_label() == label]
    assert len(found) == 1, [ax.get_label() for ax in fig.axes]
    return found[0]


def _inside(box_, fig, tol=1.0):
    return (box_.x0 >= -tol and box_.y0 >= -tol and box_.x1 <= fig.bbox.width + tol
            and box_.y1 <= fig.bbox.height + tol)


def assert_everything_inside(fig):
    """Every text, legend and axes (with its tick labels) lies within the figure."""
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    for text in fig.texts:
        if text.get_text().strip():
            assert _inside(text.get_window_extent(renderer), fig), text.get_text()[:60]
    for legend in fig.legends:
        assert _inside(legend.get_window_extent(renderer), fig)
    for ax in fig.axes:
        assert _inside(ax.get_tightbbox(renderer), fig), ax.get_label()
        for table in [c for c in ax.get_children() if isinstance(c, Table)]:
            for cell in table.get_celld().values():
                assert _inside(cell.get_text().get_window_extent(renderer), fig)


def _zone_outlines():
    west = FIELD.intersection(box(337000, 4439000, 338400, 4441000))
    east = FIELD.intersection(box(338400, 4439000, 339000, 4441000))
    return [("Z1", west), ("Z2", east)]


def test_class_map_has_one_legend_patch_per_class_with_its_area_and_no_colour_bar():
    grid, values = _layer()
    zones = (np.digitize(values, [18, 25]) + 1).astype(np.uint8)
    fig = layer_figure(zones, grid, title="North 40 - soil-test P classes", unit="class",
                       classes=CLASSES, colours=COLOURS, boundary=FIELD,
                       legend_title="Mehlich-3 P classes (mg/kg)")
    assert [ax.get_label() for ax in fig.axes] == ["map"]  # no colour bar
    assert not any(hasattr(ax, "_colorbar") for ax in fig.axes)
    (legend,) = fig.legends
    patches = [h for h in legend.legend_handles if isinstance(h, Patch)]
    assert len(patches) == len(CLASSES)
    assert legend.get_title().get_text() == "Mehlich-3 P classes (mg/kg)"
    labels = [t.get_text() for t in legend.get_texts()]
    for cid, name in CLASSES.items():
        area = float(((zones == cid) & grid.mask).sum()) * grid.cell_area_ha
        assert f"{name} ({area:.1f} ha)" in labels
    assert "field boundary" in labels
    assert_everything_inside(fig)


def test_colour_bar_marks_the_class_breaks_on_a_fixed_zero_to_one_scale():
    grid, values = _layer()
    risk = (values - values.min()) / (values.max() - values.min()) * 0.9
    fig = layer_figure(risk, grid, title="fixation risk", unit="index 0-1", cmap="magma",
                       vmin=0.0, vmax=1.0, class_breaks=[0.65, 0.80], boundary=FIELD)
    fig.canvas.draw()
    cax = _axes(fig, "colour bar")
    assert cax.get_ylim() == pytest.approx((0.0, 1.0))
    assert list(cax.yaxis.get_minorticklocs()) == pytest.approx([0.65, 0.80])
    assert [t.get_text() for t in cax.yaxis.get_minorticklabels()] == ["0.65", "0.8"]
    across = {round(float(line.get_ydata()[0]), 6) for line in cax.lines}
    assert across == {0.65, 0.8}  # a line across the bar at each break
    assert cax.get_ylabel() == "index 0-1"
    assert not fig.legends[0].get_title().get_text()  # no class legend on a continuous map
    assert_everything_inside(fig)


def test_zone_outlines_carry_their_ids_inside_each_zone():
    grid, values = _layer()
    outlines = _zone_outlines()
    fig = layer_figure(values, grid, title="rate", unit="kg P2O5/ha", boundary=FIELD,
                       zone_outlines=outlines)
    ax = _axes(fig, "map")
    labels = {t.get_text(): t for t in ax.texts}
    for zone_id, polygon in outlines:
        assert zone_id in labels
        x, y = labels[zone_id].get_position()
        assert polygon.contains(Point(x, y))
        assert labels[zone_id].get_path_effects()  # the white halo
    assert_everything_inside(fig)


def test_table_beside_the_map_holds_the_rows_and_counts_the_rest():
    grid, values = _layer()
    header = ["zone", "class", "area (ha)", "rate (kg/ha)", "product"]
    rows = [[str(i), "low", f"{1.5 + i:.2f}", f"{100 + i}", "MAP 11-52-0"] for i in range(1, 31)]
    fig = layer_figure(values, grid, title="rate", unit="kg/ha", boundary=FIELD,
                       table=(header, rows), footnote="Model output for review.")
    assert fig.get_size_inches()[0] > 7.0  # widened for the table, the map kept its room
    tax = _axes(fig, "table")
    (table,) = [c for c in tax.get_children() if isinstance(c, Table)]
    cells = table.get_celld()
    assert [cells[0, j].get_text().get_text() for j in range(5)] == header
    for i in range(1, 25):
        assert [cells[i, j].get_text().get_text() for j in range(5)] == rows[i - 1]
    assert cells[25, 0].get_text().get_text() == "... 6 more"
    assert (26, 0) not in cells  # 25 rows at most
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    assert not _axes(fig, "map").get_window_extent(renderer).overlaps(
        tax.get_window_extent(renderer))
    assert_everything_inside(fig)


def test_scale_bar_is_the_round_length_for_the_drawn_extent():
    grid, values = _layer()
    fig = layer_figure(values, grid, title="t", unit="u", boundary=FIELD)
    fig.canvas.draw()
    ax = _axes(fig, "map")
    (bar,) = [a for a in ax.artists if isinstance(a, AnchoredSizeBar)]
    xmin, xmax = ax.get_xlim()
    expected = scale_bar_length(xmax - xmin)
    rect = bar.size_bar.get_children()[0]
    assert rect.get_width() == pytest.approx(expected)  # data units (m)
    # The bar as drawn: its pixel width converted back to metres through the map's scale.
    drawn_px = rect.get_window_extent(fig.canvas.get_renderer()).width
    px_per_m = ax.get_window_extent().width / (xmax - xmin)
    assert drawn_px / px_per_m == pytest.approx(expected, rel=0.02)
    assert bar.txt_label.get_text() == f"{expected:g} m"


def test_png_is_not_blank(tmp_path):
    grid, values = _layer()
    path = plot_layer(tmp_path / "m.png", values, grid, title="t", unit="mg/kg",
                      boundary=FIELD, samples_xy=np.array([[338300.0, 4440200.0]]))
    rgb = _check_png(path)
    colours = np.unique((rgb.reshape(-1, 3) * 255).round().astype(np.uint8), axis=0)
    assert len(colours) > 50  # the colour ramp, not a flat fill
    assert rgb.var() > 0.01


def test_long_footnote_wraps_to_the_figure_and_is_not_cut_off():
    grid, values = _layer()
    footnote = " ".join(["Rates rest on the measured soil test; check them against the "
                         "local rules before any application."] * 6)
    fig = layer_figure(values, grid, title="t", unit="u", footnote=footnote, boundary=FIELD)
    foot = [t for t in fig.texts if "Rates rest on" in t.get_text()]
    assert len(foot) == 1 and foot[0].get_text().count("\n") >= 3
    assert foot[0].get_text().replace("\n", " ").endswith(footnote.split("EPSG")[-1])
    assert_everything_inside(fig)


def test_dollar_signs_are_printed_not_read_as_mathtext():
    grid, values = _layer()
    fig = layer_figure(values, grid, title="cost $4 to $5 per ha", unit="$/ha",
                       footnote="at $0.26/kg and $1.10/kg")
    assert_everything_inside(fig)  # drawing raises on malformed mathtext
    assert all(not t.get_parse_math() for t in fig.texts)


def test_draw_layer_draws_into_a_given_axes():
    from matplotlib.figure import Figure

    grid, values = _layer()
    fig = Figure(figsize=(4, 4))
    ax = fig.add_subplot()
    drawn = draw_layer(ax, values, grid, unit="mg/kg", boundary=FIELD, vmin=0, vmax=40,
                       class_breaks=[20], samples_xy=np.array([[338300.0, 4440200.0]]),
                       zone_outlines=_zone_outlines())
    assert not drawn.discrete and drawn.mappable.norm.vmin == 0 and drawn.mappable.norm.vmax == 40
    assert drawn.class_breaks == (20.0,)
    assert [t.get_text() for t in drawn.zone_labels] == ["Z1", "Z2"]
    assert any(isinstance(c, PathCollection) for c in ax.collections)  # the samples
    classes = draw_layer(fig.add_subplot(), (values > 20).astype(int) + 1, grid,
                         classes={1: "a", 2: "b"}, unit="class")
    assert classes.discrete and len(classes.class_handles) == 2


def test_wrap_text_keeps_every_line_within_the_width():
    text = "Kriged values carry the uncertainty shown in the variance layers " * 5
    lines = wrap_text(text, 3.0, 8)
    assert len(lines) > 3
    assert all(text_width(line, 8) <= 3.0 for line in lines)
    assert " ".join(lines).split() == text.split()


def test_variogram_subtitle_and_table_lie_inside_the_figure():
    h = np.linspace(25, 400, 12)

    def model(d):
        return 2 + 18 * (1 - np.exp(-np.asarray(d) / 120))

    subtitle = ("log matern: nugget 0.0107, partial sill 0.313, range 820 m, shape 5.00, "
                "anisotropy 0.40 at 37 deg, 16 nearest samples | n = 93, LOO RMSE 3.61, "
                "MSDR 1.01")
    table = ["chosen: lowest leave-one-out RMSE of 16 candidates (ties within 1 % go to the "
             "MSDR nearest 1, then to the simpler model, then to the smaller nugget)",
             f"  {'candidate':<58} {'LOO RMSE':>9} {'MSDR':>6}"]
    table += [f"{'*' if k == 3 else ' '} {'log matern, nugget fitted, candidate ' + str(k):<58}"
              f" {3.5 + k / 10:>9.4g} {1.0:>6.2f}" for k in range(12)]
    table.append("  (5 more and 0 skipped: see summary.json)")
    fig = variogram_figure(h, model(h), np.arange(12) * 10 + 5, model, title="variogram",
                           unit="mg/kg", subtitle=subtitle, table=table)
    assert_everything_inside(fig)
    shown = "\n".join(t.get_text() for t in fig.texts)
    assert "MSDR 1.01" in shown and "(5 more and 0 skipped" in shown
    for k in range(12):
        assert f"candidate {k}" in shown
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    boxes = [t.get_window_extent(renderer) for t in fig.texts]
    plot = _axes(fig, "variogram").get_tightbbox(renderer)
    for b in boxes:
        assert not b.overlaps(plot)
    assert not Bbox.intersection(boxes[0], boxes[-1])


@pytest.mark.parametrize("family", ["sans-serif", "monospace"])
@pytest.mark.parametrize("n_lines", [1, 2, 7, 20])
def test_text_height_is_the_rendered_height(family, n_lines):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from pmap.report.maps import text_height

    fig = Figure(dpi=150)
    FigureCanvasAgg(fig)
    text = fig.text(0, 0, "\n".join(["Ag"] * n_lines), fontsize=6.5, family=family)
    height = text.get_window_extent(fig.canvas.get_renderer()).height / 150
    assert text_height(n_lines, 6.5, family=family) == pytest.approx(height, abs=1e-3)


def test_a_layer_without_any_value_still_draws():
    grid, values = _layer()
    fig = layer_figure(np.full(grid.shape, np.nan), grid, title="empty", unit="mg/kg")
    assert_everything_inside(fig)
    flat = layer_figure(np.full(grid.shape, 7.0), grid, title="flat", unit="pH units")
    assert_everything_inside(flat)
