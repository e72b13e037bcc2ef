"""The overview and diagnostics sheets: page size, layout without overlaps, content, files."""

from __future__ import annotations

import dataclasses
import itertools
import re

import matplotlib.image as mpimg
import numpy as np
import pytest
from matplotlib.table import Table
from shapely.geometry import Polygon, box

from pmap.cautions import CAUTIONS
from pmap.geostats.variogram import VariogramModel
from pmap.io.boundary import grid_for_boundary
from pmap.report.sheets import (
    PAPER_SIZES,
    MapPanel,
    PropertyDiagnostics,
    diagnostics_figure,
    overview_figure,
    write_diagnostics,
    write_overview,
)
from pmap.soil.calibration import calibrate

UTM = "EPSG:32616"
FIELD = Polygon([(338000, 4440000), (338800, 4440050), (338750, 4440600), (338100, 4440500)])
HEADER = ["zone", "class", "area (ha)", "P2O5 (kg/ha)", "product (kg/ha)"]


def _field():
    grid = grid_for_boundary(FIELD, UTM, 10.0)
    x, y = grid.cell_centres()
    stp = 30 + 12 * np.sin((x - 338000) / 150) + 6 * np.cos((y - 4440000) / 100)
    ph = 5.5 + 2.0 * (x - 338000) / 800
    risk = np.clip((7.5 - ph) / 2.5, 0, 1)
    rate = np.digitize(stp, [25, 38]) + 1
    rng = np.random.default_rng(3)
    pts = np.column_stack([rng.uniform(338150, 338700, 40), rng.uniform(4440080, 4440450, 40)])
    return grid, stp, ph, risk, rate, pts


def _outlines():
    return [("1", FIELD.intersection(box(337000, 4439000, 338300, 4441000))),
            ("2", FIELD.intersection(box(338300, 4439000, 338550, 4441000))),
            ("3", FIELD.intersection(box(338550, 4439000, 339000, 4441000)))]


def _overview(n_rows=3, paper="a4", totals_extra=()):
    grid, stp, ph, risk, rate, pts = _field()
    panels = [
        MapPanel(rate, "P2O5 rate by zone (prescription)", "kg P2O5/ha",
                 classes={1: "110 kg P2O5/ha", 2: "80 kg P2O5/ha", 3: "0 kg P2O5/ha"},
                 colours={1: "#D55E00", 2: "#009E73", 3: "#0072B2"},
                 zone_outlines=_outlines(), legend_title="P2O5 rate"),
        MapPanel(stp, "Soil-test P, Mehlich-3", "mg/kg", class_breaks=[20, 40]),
        MapPanel(ph, "Soil pH", "pH units", cmap="cividis"),
        MapPanel(risk, "Fixation risk of applied P", "index 0-1", cmap="magma", vmin=0.0,
                 vmax=1.0, class_breaks=[0.65, 0.80]),
    ]
    rows = [[str(k), "below critical", f"{1.25 * k:.2f}", "110", "212"]
            for k in range(1, n_rows + 1)]
    totals = ["Area: 24.6 ha", "P2O5: 2,050 kg (mean 83 kg/ha)",
              "Product: 3,940 kg MAP 11-52-0", "Cost: $3,150 at $0.80/kg", *totals_extra]
    kw = dict(grid=grid, boundary=FIELD, samples_xy=pts, title="North 40: P prescription",
              subtitle="Example Farm | sampled 2024-10-12 | MAP 11-52-0", panels=panels,
              table=(HEADER, rows), totals_lines=totals,
              basis="Rates rest on: MEASURED SOIL TEST (Mehlich-3, kriged); classes: "
                    "tri-state, critical 20, limit 50 mg/kg.",
              cautions=CAUTIONS, paper=paper)
    return kw


def _boxes_apart(boxes, what):
    for (name_a, a), (name_b, b) in itertools.combinations(boxes, 2):
        inter = a.intersection(a, b)
        overlap = 0.0 if inter is None else max(inter.width, 0) * max(inter.height, 0)
        assert overlap < 1.0, f"{what}: {name_a!r} overlaps {name_b!r}"


def _inside(bbox, fig, tol=1.0):
    return (bbox.x0 >= -tol and bbox.y0 >= -tol and bbox.x1 <= fig.bbox.width + tol
            and bbox.y1 <= fig.bbox.height + tol)


def assert_clean_layout(fig):
    """No text, legend or axes outside the page; axes, page texts and legends apart."""
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    blocks = []
    for text in fig.texts:
        if text.get_text().strip():
            box_ = text.get_window_extent(renderer)
            assert _inside(box_, fig), text.get_text()[:60]
            blocks.append((text.get_text()[:30], box_))
    for k, legend in enumerate(fig.legends):
        box_ = legend.get_window_extent(renderer)
        assert _inside(box_, fig)
        for text in legend.get_texts():
            assert _inside(text.get_window_extent(renderer), fig)
        blocks.append((f"legend {k}", box_))
    for ax in fig.axes:
        box_ = ax.get_tightbbox(renderer)  # with tick labels, axis labels, titles
        assert _inside(box_, fig), ax.get_label()
        blocks.append((ax.get_label(), box_))
        for text in ax.texts:
            assert _inside(text.get_window_extent(renderer), fig)
        for table in [c for c in ax.get_children() if isinstance(c, Table)]:
            for cell in table.get_celld().values():
                assert _inside(cell.get_text().get_window_extent(renderer), fig)
                assert cell.get_text().get_window_extent(renderer).x1 <= \
                    ax.get_window_extent(renderer).x1 + 1.0
    _boxes_apart(blocks, "layout")


# --- overview -------------------------------------------------------------------------------


@pytest.mark.parametrize("paper", ["a4", "letter"])
def test_overview_is_one_landscape_page_of_the_paper(paper):
    fig = overview_figure(**_overview(paper=paper))
    # common practice, no source: A4 is 297 x 210 mm (ISO 216), US letter 11 x 8.5 in.
    expected = {"a4": (297 / 25.4, 210 / 25.4), "letter": (11.0, 8.5)}[paper]
    assert tuple(fig.get_size_inches()) == pytest.approx(expected, abs=0.01)
    assert PAPER_SIZES[paper] == pytest.approx(expected, abs=0.01)
    assert_clean_layout(fig)


def test_overview_holds_the_rate_map_panels_table_totals_basis_and_cautions():
    kw = _overview()
    fig = overview_figure(**kw)
    labels = [ax.get_label() for ax in fig.axes]
    for name in ("panel 1", "panel 2", "panel 3", "panel 4", "table"):
        assert name in labels
    big, small = (next(ax for ax in fig.axes if ax.get_label() == n)
                  for n in ("panel 1", "panel 2"))
    fig.canvas.draw()
    assert big.get_window_extent().width > 1.5 * small.get_window_extent().width
    assert {t.get_text() for t in big.texts} >= {"1", "2", "3"}  # zone ids on the rate map
    (table,) = [c for ax in fig.axes for c in ax.get_children() if isinstance(c, Table)]
    cells = table.get_celld()
    assert [cells[0, j].get_text().get_text() for j in range(5)] == HEADER
    for i, row in enumerate(kw["table"][1], start=1):
        assert [cells[i, j].get_text().get_text() for j in range(5)] == row
    page_text = " ".join(t.get_text().replace("\n", " ") for t in fig.texts)
    for line in kw["totals_lines"]:
        assert line in page_text  # the dollar signs printed as they are
    assert "critical 20, limit 50 mg/kg" in page_text
    assert CAUTIONS[:60] in page_text and CAUTIONS[-40:] in page_text
    rate_legend = [lg for lg in fig.legends if lg.get_title().get_text() == "P2O5 rate"]
    assert len(rate_legend) == 1
    # Class breaks on the soil-test P bar (20 inside the data range) and the risk bar.
    risk_bar = next(ax for ax in fig.axes if ax.get_label() == "panel 4 colour bar")
    assert list(risk_bar.yaxis.get_minorticklocs()) == pytest.approx([0.65, 0.8])
    assert risk_bar.get_ylim() == pytest.approx((0.0, 1.0))


def test_a_long_table_is_cut_to_fit_and_counts_the_rest():
    fig = overview_figure(**_overview(n_rows=60))
    (table,) = [c for ax in fig.axes for c in ax.get_children() if isinstance(c, Table)]
    cells = table.get_celld()
    n_body = max(i for i, _ in cells)
    assert n_body <= 25
    shown = n_body - 1
    assert cells[n_body, 0].get_text().get_text() == f"... {60 - shown} more"
    assert_clean_layout(fig)


def test_long_totals_and_basis_still_fit():
    kw = _overview(n_rows=25, totals_extra=[f"Note {k}: a longer line of the field totals "
                                            "that has to wrap inside the column" for k in range(8)])
    kw["basis"] = " ".join([kw["basis"]] * 6)
    assert_clean_layout(overview_figure(**kw))


def test_write_overview_gives_a_png_and_a_one_page_pdf(tmp_path):
    png, pdf = write_overview(tmp_path / "out" / "overview.png", tmp_path / "out" / "overview.pdf",
                              **_overview())
    img = mpimg.imread(png)
    assert img.shape[:2] == (pytest.approx(8.27 * 150, abs=2), pytest.approx(11.69 * 150, abs=2))
    assert img[..., :3].std() > 0.05
    assert _pdf_pages(pdf) == 1
    assert not list((tmp_path / "out").glob(".*"))  # no temporary files left


def _pdf_pages(path):
    """Pages of a PDF written by matplotlib: its page objects, checked against /Count."""
    data = path.read_bytes()
    assert data.startswith(b"%PDF-")
    pages = len(re.findall(rb"/Type\s*/Page(?![a-zA-Z])", data))
    counts = [int(c) for c in re.findall(rb"/Type\s*/Pages\b[^>]*?/Count\s+(\d+)", data)]
    counts += [int(c) for c in re.findall(rb"/Count\s+(\d+)[^>]*?/Type\s*/Pages\b", data)]
    assert counts and all(c == pages for c in counts)
    return pages


def test_overview_needs_a_panel_and_a_known_paper():
    kw = _overview()
    with pytest.raises(ValueError, match="paper"):
        overview_figure(**{**kw, "paper": "a3"})
    with pytest.raises(ValueError, match="rate-map panel"):
        overview_figure(**{**kw, "panels": []})


# --- diagnostics ----------------------------------------------------------------------------


def _property(name="stp", log=False, n_candidates=8):
    grid, stp, _, _, _, pts = _field()
    rng = np.random.default_rng(7)
    observed = 30 + 8 * rng.standard_normal(len(pts))
    predicted = observed + 3 * rng.standard_normal(len(pts))
    model = VariogramModel("spherical", nugget=2.0, psill=60.0, range=300.0)
    lags = np.linspace(30, 330, 10)
    x, y = grid.cell_centres()
    se = np.where(grid.mask, 2 + 3 * np.hypot(x - 338400, y - 4440300) / 400, np.nan)
    lines = [f"  {'candidate':<40} {'LOO RMSE':>9} {'MSDR':>6}"]
    lines += [f"{'*' if k == 0 else ' '} {'spherical, nugget fitted ' + str(k):<40} "
              f"{3.0 + k / 10:>9.4g} {1.0:>6.2f}" for k in range(n_candidates)]
    return PropertyDiagnostics(
        name=name, title="Soil-test P", unit="mg/kg", lags=lags, gamma=model(lags),
        counts=np.arange(10) * 12 + 20, model=model, log=log, observed=observed,
        predicted=predicted, samples_xy=pts, standard_error=se, figures_lines=lines,
        summary_lines=["spherical: nugget 2, partial sill 60, range 300 m | n = 40"])


def test_diagnostics_page_shows_the_five_parts():
    grid = _field()[0]
    prop = _property()
    fig = diagnostics_figure(prop, grid=grid, boundary=FIELD, title="North 40")
    # common practice, no source: A4 landscape, 297 x 210 mm (ISO 216).
    assert tuple(fig.get_size_inches()) == pytest.approx((297 / 25.4, 210 / 25.4), abs=0.01)
    axes = {ax.get_label(): ax for ax in fig.axes}
    for name in ("variogram", "cross-validation", "histogram", "error map"):
        assert name in axes
    # Variogram: the empirical points and the fitted model.
    vario = axes["variogram"]
    np.testing.assert_allclose(vario.collections[0].get_offsets()[:, 0], prop.lags)
    h, g = vario.lines[0].get_data()
    np.testing.assert_allclose(g, prop.model(h))
    # Cross-validation: observed vs predicted, the 1:1 line and the RMSE.
    cv = axes["cross-validation"]
    np.testing.assert_allclose(cv.collections[0].get_offsets(),
                               np.column_stack([prop.observed, prop.predicted]))
    one_to_one = [ln for ln in cv.lines if ln.get_label() == "1:1"][0]
    xs, ys = one_to_one.get_data()
    np.testing.assert_allclose(xs, ys)
    rmse = np.sqrt(np.mean((prop.predicted - prop.observed) ** 2))
    assert any(f"RMSE {rmse:.3g} mg/kg" in t.get_text() for t in cv.texts)
    # Error map: samples coloured by their error on a diverging scale centred on 0.
    errors = axes["error map"].collections[-1]
    np.testing.assert_allclose(errors.get_array(), prop.predicted - prop.observed)
    assert errors.norm.vmin == pytest.approx(-errors.norm.vmax)
    assert errors.cmap.name.startswith("PuOr")
    assert errors.norm.vmax == pytest.approx(np.abs(prop.predicted - prop.observed).max())
    # Histogram of the sample values.
    heights = [p.get_height() for p in axes["histogram"].patches]
    assert sum(heights) == len(prop.observed)
    # The candidates' figures, every line.
    shown = "\n".join(t.get_text() for t in fig.texts)
    for line in prop.figures_lines:
        assert line in shown
    assert_clean_layout(fig)


def test_many_candidates_shrink_and_then_cut_the_figures_table():
    grid = _field()[0]
    fig = diagnostics_figure(_property(n_candidates=80), grid=grid, boundary=FIELD,
                             title="North 40", paper="letter")
    shown = "\n".join(t.get_text() for t in fig.texts)
    assert re.search(r"\.\.\. \d+ more lines", shown)
    assert_clean_layout(fig)


def test_log_variogram_is_labelled_in_log_units():
    grid = _field()[0]
    fig = diagnostics_figure(_property(log=True), grid=grid, boundary=FIELD, title="North 40")
    vario = next(ax for ax in fig.axes if ax.get_label() == "variogram")
    assert "log units" in vario.get_ylabel()
    assert "logarithms" in vario.get_title(loc="left")


@dataclasses.dataclass(frozen=True)
class _Line:
    """A toy model ``y = intercept + slope * x`` for a calibration page."""

    intercept: float = 0.0
    slope: float = 1.0


def _calibration():
    rng = np.random.default_rng(0)
    x = np.linspace(0.0, 10.0, 40)
    y = 4.0 + 2.5 * x + rng.normal(0.0, 1.0, 40)
    return calibrate(_Line(), y, lambda p, rows: p.intercept + p.slope * x[rows],
                     candidates=("intercept", "slope"),
                     bounds={"intercept": (-50.0, 50.0), "slope": (-10.0, 10.0)})


@pytest.mark.parametrize("with_calibration", [False, True])
def test_write_diagnostics_one_png_per_property_and_one_pdf(tmp_path, with_calibration):
    grid = _field()[0]
    props = [_property("stp"), _property("ph")]
    out = write_diagnostics(tmp_path / "diagnostics.pdf", tmp_path / "pages", properties=props,
                            grid=grid, boundary=FIELD, title="North 40",
                            calibration=_calibration() if with_calibration else None,
                            calibration_method_label="Mehlich-3")
    assert out[:2] == [tmp_path / "pages" / "diagnostics_stp.png",
                       tmp_path / "pages" / "diagnostics_ph.png"]
    assert out[-1] == tmp_path / "diagnostics.pdf"
    for png in out[:2]:
        img = mpimg.imread(png)
        assert img.shape[:2] == (pytest.approx(8.27 * 150, abs=2),
                                 pytest.approx(11.69 * 150, abs=2))
        assert img[..., :3].std() > 0.05
    assert _pdf_pages(out[-1]) == len(props) + (1 if with_calibration else 0)
    assert not list(tmp_path.glob(".*")) and not list((tmp_path / "pages").glob(".*"))


def test_overview_of_the_rate_map_alone_without_table_or_boundary():
    kw = _overview()
    kw.update(panels=kw["panels"][:1], table=None, totals_lines=(), basis="", boundary=None,
              samples_xy=None)
    fig = overview_figure(**kw)
    assert [ax.get_label() for ax in fig.axes] == ["panel 1"]
    assert_clean_layout(fig)


def test_sheets_do_not_touch_pyplot(tmp_path):
    import os
    import subprocess
    import sys
    from pathlib import Path

    code = (
        "import sys, numpy as np\n"
        "from pmap.grid import GridSpec\n"
        "from pmap.report.sheets import MapPanel, write_overview\n"
        "g = GridSpec.from_bounds('EPSG:32616', (0, 0, 100, 100), 10)\n"
        f"write_overview({str(tmp_path / 'o.png')!r}, {str(tmp_path / 'o.pdf')!r}, grid=g,\n"
        "    boundary=None, samples_xy=None, title='t', subtitle='', table=None,\n"
        "    panels=[MapPanel(np.ones(g.shape), 'rate', 'kg/ha')], totals_lines=(),\n"
        "    basis='', cautions='c')\n"
        "assert 'matplotlib.pyplot' not in sys.modules\n"
    )
    root = Path(__file__).resolve().parents[2]
    subprocess.run([sys.executable, "-c", code], check=True, cwd=root,
                   env={**os.environ, "PYTHONPATH": str(root)})
    assert _pdf_pages(tmp_path / "o.pdf") == 1
