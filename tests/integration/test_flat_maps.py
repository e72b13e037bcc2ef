"""Data that makes a kriged map flat or wrong is named; only essential properties stop a run.

Invented fixtures built from the demo field (robustness checks, no outside reference).
"""

from __future__ import annotations

import dataclasses
import json
import warnings

import numpy as np
import pandas as pd
import pytest

import pmap
from pmap.demo import truth, write_demo_inputs
from pmap.errors import InsufficientDataError, PmapWarning
from pmap.geostats.interpolate import interpolate
from pmap.pipeline import krige_properties, prepare_inputs

SLIP_ID = "LM-017"


@pytest.fixture(scope="module")
def demo_inputs(tmp_path_factory):
    return write_demo_inputs(tmp_path_factory.mktemp("flat_inputs"))


@pytest.fixture(scope="module")
def slip_and_no_carbonate(demo_inputs, tmp_path_factory):
    """The demo with one total P typed 100x too large and no carbonate anywhere, run once."""
    tmp = tmp_path_factory.mktemp("flat_run")
    table = pd.read_csv(demo_inputs["samples"])
    slip = table.index[table["sample_id"] == SLIP_ID][0]
    table.loc[slip, "total_p"] *= 100.0
    table["caco3"] = 0.0
    samples = tmp / "samples.csv"
    table.to_csv(samples, index=False)
    config = pmap.load_config(demo_inputs["config"]).replace("grid", cell_size_m=20.0).replace("output", maps="none")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = pmap.run_field(samples, demo_inputs["boundary"], tmp / "out", config)
    summary = json.loads((tmp / "out" / "summary.json").read_text(encoding="utf-8"))
    # CSV rows count the header as row 1: the data row at index i is row i + 2.
    return result, summary, int(slip) + 2


def test_one_total_p_slip_is_named_by_id_and_row(slip_and_no_carbonate):
    result, summary, row = slip_and_no_carbonate
    named = [w for w in result.warnings if "potential outliers" in w and w.startswith("total_p")]
    assert len(named) == 1 and f"{SLIP_ID} (row {row})" in named[0]
    entries = summary["properties"]["total_p"]["outliers"]
    assert {(e["id"], e["row"]) for e in entries} == {(SLIP_ID, row)}
    assert all(abs(e["z"]) > 3.5 and e["dropped"] is False for e in entries)
    assert {e["kind"] for e in entries} <= {"value", "cross-validation"}
    # The slip is kept (kriging.drop_outliers = false): the fit leaves neighbouring samples
    # uncorrelated, and the warnings say that the map is the field mean.  (Chosen by
    # cross-validation, the model's MSDR may sit in its band: every candidate's variance
    # then covers the slip's huge error.)
    assert any(w.startswith("total_p") and "field mean" in w for w in result.warnings)
    diagnostics = summary["properties"]["total_p"]["diagnostics"]
    assert diagnostics["no_structure"] is True


def test_constant_caco3_is_mapped_and_the_run_finishes(slip_and_no_carbonate):
    result, summary, _ = slip_and_no_carbonate
    interp = result.interpolations["caco3"]
    assert interp.kind == "constant"
    inside = result.grid.mask
    np.testing.assert_array_equal(result.layers["caco3"][inside], 0.0)
    np.testing.assert_array_equal(result.layers["caco3_variance"][inside], 0.0)
    entry = summary["properties"]["caco3"]
    assert entry["kind"] == "constant" and entry["map_min"] == entry["map_max"] == 0.0
    assert entry["cv"]["rmse"] == 0.0 and entry["cv"]["mean_error"] == 0.0
    assert entry["cv"]["msdr"] is None  # 0 / 0: undefined
    assert any(w.startswith("caco3: all") and "same value, 0" in w for w in summary["warnings"])


def test_demo_warns_only_where_it_should(demo_run):
    # The demo's smooth fields: trend warnings for pH (it runs across the field by
    # construction, tanh of the diagonal) and the buffer pH that follows it, the CaCO3
    # clipping, nothing about outliers,
    # pure nugget, MSDR or near-coincident samples.
    result, _ = demo_run
    geostat = [w for w in result.warnings if w.split(":")[0] in result.interpolations]
    trend = [w for w in geostat if "linear trend" in w]
    assert sorted(w.split(":")[0] for w in trend) == ["buffer_ph", "ph"]
    for word in ("outlier", "pure nugget", "field mean", "MSDR", "lie within"):
        assert not any(word in w for w in geostat), word


def test_clipped_estimate_is_what_the_raster_and_summary_show(demo_run):
    # The demo's CaCO3 steps from 0 % to a calcareous corner: kriging overshoots below 0
    # there, and every output must show the clipped value.
    result, out = demo_run
    interp = result.interpolations["caco3"]
    assert interp.diagnostics["clipped_cells"] > 0
    inside = result.grid.mask
    layer = result.layers["caco3"][inside]
    assert layer.min() == 0.0
    np.testing.assert_array_equal(np.sort(layer), np.sort(interp.result.estimate))
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert summary["properties"]["caco3"]["map_min"] == 0.0


def _demo_like_total_p(seed: int = 5):
    rng = np.random.default_rng(seed)
    gx, gy = np.meshgrid(np.arange(50.0, 1100.0, 100.0), np.arange(50.0, 900.0, 100.0))
    coords = np.column_stack([gx.ravel(), gy.ravel()]) + rng.uniform(-15, 15, (gx.size, 2))
    values = truth(coords[:, 0] + 330_000.0, coords[:, 1] + 4_443_000.0)["total_p"]
    return coords, values * np.exp(rng.normal(0.0, 0.06, len(coords))), rng


def test_ten_resamples_one_cm_apart_are_named():
    # Ten places sampled twice, 1 cm apart, whose lab values disagree by ~30 %: with the
    # fit's weights N_h / h^2 the 1-cm pairs outweigh every other lag, set the nugget and
    # flatten the map. The warning names every pair. (The sample reader may merge such
    # pairs before kriging; this is the geostatistics' own guard.)
    coords, values, rng = _demo_like_total_p()
    targets = coords[::2] + 37.0
    twins = rng.choice(len(coords), 10, replace=False)
    coords2 = np.vstack([coords, coords[twins] + [0.01, 0.0]])
    values2 = np.concatenate([values, values[twins] * np.exp(rng.normal(0.0, 0.3, 10))])
    ids = np.array([f"P{i}" for i in range(len(coords))] + [f"P{i}b" for i in twins])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        plain = interpolate("total_p", coords, values, targets)
    with pytest.warns(PmapWarning, match="10 pair.s. of samples lie within") as seen:
        doubled = interpolate("total_p", coords2, values2, targets, ids=ids)
    text = next(str(w.message) for w in seen if "lie within" in str(w.message))
    for i in twins:
        assert f"P{i}/P{i}b (0.01 m" in text
    assert doubled.diagnostics["close_pairs"] == 10
    assert doubled.model.nugget > 0.5 * doubled.model.sill
    assert np.std(doubled.result.estimate) < 0.5 * np.std(plain.result.estimate)  # flatter


def test_only_essential_properties_stop_the_run(demo_inputs):
    config = pmap.load_config(demo_inputs["config"]).replace("grid", cell_size_m=50.0).replace("output", maps="none")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        inputs = prepare_inputs(demo_inputs["samples"], demo_inputs["boundary"], config)
    values = dict(inputs.samples.values)
    few = np.full(len(inputs.samples), np.nan)
    few[:10] = values["clay"][:10]
    values["clay"] = few
    optional = dataclasses.replace(inputs, samples=dataclasses.replace(inputs.samples, values=values))
    with pytest.warns(PmapWarning, match="clay not mapped: clay: 10 samples"):
        kriged = krige_properties(optional.samples, optional.grid.inside_coords(), config)
    assert "clay" not in kriged and {"ph", "total_p", "stp", "om"} <= set(kriged)

    values = dict(values, ph=few.copy())
    essential = dataclasses.replace(inputs, samples=dataclasses.replace(inputs.samples, values=values))
    with pytest.raises(InsufficientDataError) as info, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        krige_properties(essential.samples, essential.grid.inside_coords(), config)
    message = str(info.value)
    assert message.startswith(str(inputs.samples.source))
    assert "ph: 10 samples with values" in message and "the run stops" in message
