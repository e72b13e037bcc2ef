"""The demo run's review pictures: what each map shows, the sheets, the modes and the report."""

from __future__ import annotations

import dataclasses
import json
import re

import matplotlib.image as mpimg
import numpy as np
import pytest
from matplotlib.legend import Legend
from matplotlib.table import Table

from pmap.cautions import CAUTIONS_SHORT
from pmap.layers import LIME_LAYERS, MODEL_LAYERS, PRESCRIPTION_LAYERS, PROBABILITY_LAYERS
from pmap.report.field_pictures import (
    draw_field_pictures,
    map_kwargs,
    picture_layers,
    zone_class_labels,
)
from pmap.report.maps import layer_figure, scale_bar_length


@pytest.fixture(scope="module")
def demo(demo_run):
    result, out = demo_run
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    return result, out, summary


def _draw(demo_run, name):
    """The figure pmap draws for one layer of the demo, and the keywords it drew it with."""
    result, _ = demo_run
    kw = map_kwargs(name, picture_layers(result)[name], result)
    shown = kw.pop("array")
    fig = layer_figure(shown, result.grid, **kw)
    fig.canvas.draw()
    return fig, kw


def _legend_texts(fig):
    legends = [c for c in fig.legends if isinstance(c, Legend)]
    return [t.get_text() for lg in legends for t in lg.get_texts()], legends


def _colour_bars(fig):
    return [ax for ax in fig.axes if ax.get_label() == "colour bar"]


def test_discrete_layers_get_a_legend_and_no_colour_bar(demo_run):
    result, _ = demo_run
    discrete = ["zones", "fixation_mechanism", "fixation_class", "p2o5_zone_rate",
                "product_zone_rate", "low_ph_flag", "lime_zones"]
    for name in discrete:
        if name not in result.layers:
            continue
        fig, kw = _draw(demo_run, name)
        texts, legends = _legend_texts(fig)
        assert _colour_bars(fig) == [], name
        assert len(legends) == 1, name
        for label in kw["classes"].values():
            assert any(t.startswith(label) for t in texts), (name, label)


def test_zone_rate_legend_has_one_entry_per_distinct_rate(demo_run):
    result, _ = demo_run
    fig, _kw = _draw(demo_run, "p2o5_zone_rate")
    texts, _ = _legend_texts(fig)
    rates = sorted({round(p.p2o5_kg_ha, 6) for p in result.patches})
    rate_entries = [t for t in texts if "kg P2O5/ha" in t]
    assert len(rate_entries) == len(rates)
    for rate, text in zip(rates, rate_entries, strict=True):
        assert text.startswith(f"{rate:g} kg P2O5/ha")


def test_prescription_map_outlines_labels_and_tables_every_zone(demo_run):
    result, _ = demo_run
    for name in ("p2o5_zone_rate", "product_zone_rate"):
        fig, _kw = _draw(demo_run, name)
        ax = next(a for a in fig.axes if a.get_label() == "map")
        ids = sorted(t.get_text() for t in ax.texts if t.get_text().isdigit())
        assert ids == sorted(str(p.zone_id) for p in result.patches)
        table_ax = next(a for a in fig.axes if a.get_label() == "table")
        table = next(c for c in table_ax.get_children() if isinstance(c, Table))
        cells = table.get_celld()
        header = [cells[(0, c)].get_text().get_text() for c in range(5)]
        assert header[:4] == ["zone", "class", "area (ha)", "P2O5 (kg/ha)"]
        assert result.prescription["product"] in header[4]
        for row, patch in enumerate(result.patches, start=1):
            got = [cells[(row, c)].get_text().get_text() for c in range(5)]
            assert got[0] == str(patch.zone_id) and got[1] == patch.class_label
            assert float(got[2]) == pytest.approx(patch.area_ha, abs=0.005)
            assert float(got[3]) == pytest.approx(patch.p2o5_kg_ha, rel=1e-3)
            assert float(got[4]) == pytest.approx(patch.product_kg_ha, rel=1e-3)


def test_zone_legend_names_the_method_and_the_class_breaks_in_mg_kg(demo_run):
    result, _ = demo_run
    table = result.interpretation
    fig, _kw = _draw(demo_run, "zones")
    texts, legends = _legend_texts(fig)
    title = legends[0].get_title().get_text()
    assert "Mehlich-3 (ICP)" in title
    # Source: the run's interpretation table (breaks 20 and 50 mg/kg for the demo's table)
    low, high = table.breaks
    assert any(f"< {low:g} mg/kg" in t for t in texts)
    assert any(f"{low:g}-{high:g} mg/kg" in t for t in texts)
    assert any(f">= {high:g} mg/kg" in t for t in texts)
    assert zone_class_labels(result) is not None


def test_zone_legend_falls_back_to_plain_labels_for_clusters(demo_run):
    result, _ = demo_run
    other = dataclasses.replace(result, prescription={**result.prescription,
                                                      "zone_labels": ["A", "B", "C"]})
    assert zone_class_labels(other) is None


def _bar_ticks(fig):
    (cax,) = _colour_bars(fig)
    minor = [float(t) for t in cax.yaxis.get_minorticklocs()]
    return cax, minor


def test_soil_test_map_marks_the_class_breaks_and_the_method(demo_run):
    result, _ = demo_run
    fig, kw = _draw(demo_run, "stp")
    cax, minor = _bar_ticks(fig)
    assert "Mehlich-3 (ICP)" in cax.get_ylabel().replace("\n", " ")
    lo, hi = cax.get_ylim()
    expected = [b for b in result.interpretation.breaks if lo <= b <= hi]
    assert expected and minor == pytest.approx(expected)


def test_index_and_probability_maps_use_a_fixed_zero_to_one_scale(demo_run):
    result, _ = demo_run
    fig, _kw = _draw(demo_run, "fixation_risk")
    cax, minor = _bar_ticks(fig)
    assert cax.get_ylim() == pytest.approx((0.0, 1.0))
    # Source: pmap's own fixation.class_breaks (config), marked on the bar
    assert minor == pytest.approx(list(result.config.fixation.class_breaks))
    for name in PROBABILITY_LAYERS:
        if name in result.layers:
            fig, _ = _draw(demo_run, name)
            (cax,) = _colour_bars(fig)
            assert cax.get_ylim() == pytest.approx((0.0, 1.0)), name


def test_uncertainty_maps_show_the_standard_error_in_the_property_unit(demo_run):
    result, out = demo_run
    layers = picture_layers(result)
    assert not any(name.endswith("_variance") for name in layers)
    for prop in result.interpolations:
        se = layers[f"{prop}_std_error"]
        variance = result.layers[f"{prop}_variance"]
        inside = result.grid.mask
        assert np.allclose(se[inside] ** 2, variance[inside], rtol=1e-12, equal_nan=True)
        kw = map_kwargs(f"{prop}_std_error", se, result)
        assert kw["unit"] == map_kwargs(prop, result.layers[prop], result)["unit"].split(",")[0]
        assert "^2" not in kw["unit"] and "standard error" in kw["title"]
        assert (out / "maps" / f"{prop}_std_error.png").is_file()


def test_model_and_advice_maps_carry_their_basis_and_the_caution(demo_run):
    result, _ = demo_run
    for name, array in picture_layers(result).items():
        foot = map_kwargs(name, array, result)["footnote"]
        if name in MODEL_LAYERS:
            assert foot.startswith("Soil model: calibrated (this run, 93 lab pairs"), name
        if name in PRESCRIPTION_LAYERS:
            assert foot.startswith("Rates rest on: MEASURED SOIL TEST"), name
        if name in MODEL_LAYERS or name in PRESCRIPTION_LAYERS or name in LIME_LAYERS:
            assert CAUTIONS_SHORT in foot, name
        if name in ("ph", "total_p", "clay"):
            assert foot == "", name


def test_an_uncalibrated_model_is_said_to_be_default(demo_run):
    result, _ = demo_run
    soil = {**result.soil, "calibration": {"status": "default"}}
    other = dataclasses.replace(result, soil=soil)
    foot = map_kwargs("available_p", result.layers["available_p"], other)["footnote"]
    assert foot.startswith("Soil model: DEFAULT parameters")


def test_scale_bar_is_right_for_the_demo_crs_and_extent(demo_run):
    result, _ = demo_run
    assert result.grid.crs == "EPSG:32616"  # metres: a data unit on the map is a metre
    fig, _ = _draw(demo_run, "ph")
    ax = next(a for a in fig.axes if a.get_label() == "map")
    bars = [c for c in ax.artists if type(c).__name__ == "AnchoredSizeBar"]
    assert len(bars) == 1
    width_m = ax.get_xlim()[1] - ax.get_xlim()[0]
    # Computed check: the bar is the round length (1, 2 or 5 x 10^k m) of at most a fifth
    # of the drawn width, and its label says so.
    length = scale_bar_length(width_m)
    assert length <= width_m / 5 < 2.5 * length
    label = bars[0].txt_label.get_text()
    assert label in (f"{length:g} m", f"{length / 1000:g} km")
    size = bars[0].size_bar.get_children()[0]
    assert size.get_width() == pytest.approx(length)


def test_pictures_are_not_blank(demo_run):
    _, out = demo_run
    for png in [out / "overview.png", out / "maps" / "p2o5_zone_rate.png",
                out / "diagnostics" / "diagnostics_stp.png"]:
        image = mpimg.imread(png)[..., :3]
        assert image.std() > 0.05, png
        assert (image.reshape(-1, 3).std(axis=1) > 0.05).mean() > 0.05, png  # colour drawn


def test_overview_and_diagnostics_pdfs(demo_run):
    pypdf = pytest.importorskip("pypdf")
    result, out = demo_run
    overview = pypdf.PdfReader(out / "overview.pdf")
    assert len(overview.pages) == 1
    box = overview.pages[0].mediabox
    # Source: ISO 216, A4 is 297 x 210 mm = 841.9 x 595.3 pt (landscape)
    assert float(box.width) == pytest.approx(841.9, abs=1.5)
    assert float(box.height) == pytest.approx(595.3, abs=1.5)
    diagnostics = pypdf.PdfReader(out / "diagnostics.pdf")
    kriged = [n for n, i in result.interpolations.items() if i.kind == "kriged"]
    assert len(diagnostics.pages) == len(kriged) + 1  # + the calibration page


def test_overview_mode_draws_only_the_overview_and_none_draws_nothing(demo_run, tmp_path):
    result, _ = demo_run
    inputs = _inputs(demo_run)
    overview = dataclasses.replace(result, config=result.config.replace("output",
                                                                        maps="overview"))
    outputs, timings = draw_field_pictures(overview, inputs, tmp_path / "o")
    assert sorted(outputs) == ["overview.pdf", "overview.png"]
    assert sorted(p.name for p in (tmp_path / "o").iterdir()) == ["overview.pdf",
                                                                  "overview.png"]
    assert set(timings) == {"overview.png"} and timings["overview.png"] > 0
    none = dataclasses.replace(result, config=result.config.replace("output", maps="none"))
    (tmp_path / "n").mkdir()
    assert draw_field_pictures(none, inputs, tmp_path / "n") == ({}, {})
    assert list((tmp_path / "n").iterdir()) == []


def _inputs(demo_run):
    from pmap.config import load_config
    from pmap.demo import write_demo_inputs
    from pmap.pipeline import prepare_inputs

    result, _ = demo_run
    paths = write_demo_inputs(demo_run[1].parent / "inputs_for_pictures")
    return prepare_inputs(paths["samples"], paths["boundary"], load_config(paths["config"]))


def test_the_run_writes_its_report_with_every_picture_embedded(demo):
    result, out, summary = demo
    report = out / "report.html"
    assert "report.html" in summary["outputs"]
    text = report.read_text(encoding="utf-8")
    sources = re.findall(r'<img[^>]*\ssrc="([^"]+)"', text)
    assert sources and all(s.startswith("data:image/png;base64,") for s in sources)
    pictures = (list((out / "maps").glob("*.png")) + list((out / "diagnostics").glob("*.png"))
                + [out / "overview.png"])
    assert len(sources) >= len(pictures)
    rows = re.findall(r'<tr data-zone-id="(\d+)"', text)
    assert [int(r) for r in rows] == [p["zone_id"] for p in summary["rate_polygons"]]
    assert "http://" not in text.replace("http://www.w3.org", "")


def test_lime_class_legend_names_each_class_as_the_lime_table_does(demo_run):
    result, _ = demo_run
    classes = map_kwargs("lime_zones", result.layers["lime_zones"], result)["classes"]
    table = result.soil["lime"]["classes"]
    assert table, "the demo maps lime"
    for row in table:  # the raster code of each class carries that class's label
        assert classes[row["class"]] == row["label"]


def test_diagnostics_pages_show_the_standard_error_and_the_loo_predictions(demo_run):
    from pmap.report.field_pictures import _diagnostics

    result, _ = demo_run
    pages = _diagnostics(result, picture_layers(result))
    assert [p.name for p in pages] == [n for n, i in result.interpolations.items()
                                       if i.kind == "kriged"]
    inside = result.grid.mask
    for page in pages:
        interp = result.interpolations[page.name]
        variance = result.layers[f"{page.name}_variance"]
        assert np.allclose(page.standard_error[inside] ** 2, variance[inside], equal_nan=True)
        assert np.allclose(page.predicted - page.observed, interp.cv.errors)
