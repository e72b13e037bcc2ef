"""The soil model in a run: calibration, consent for uncalibrated rates, lime, P saturation."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

import pmap
from pmap.cli import cli
from pmap.demo import write_demo_inputs
from pmap.soil import environment, lime


@pytest.fixture(scope="module")
def demo_inputs(tmp_path_factory):
    return write_demo_inputs(tmp_path_factory.mktemp("inputs"))


@pytest.fixture(scope="module")
def coarse():
    return pmap.load_config().replace("grid", cell_size_m=20.0).replace("output", maps="none")


def _run(samples, boundary, out, config):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return pmap.run_field(samples, boundary, out, config)


@pytest.fixture(scope="module")
def lab_run(demo_inputs, coarse, tmp_path_factory):
    return _run(demo_inputs["samples"], demo_inputs["boundary"],
                tmp_path_factory.mktemp("lab") / "out", coarse.replace("output", maps="all"))


@pytest.fixture(scope="module")
def no_lab_samples(demo_inputs, tmp_path_factory):
    path = tmp_path_factory.mktemp("nolab") / "no_stp.csv"
    pd.read_csv(demo_inputs["samples"]).drop(columns=["mehlich3_p"]).to_csv(path, index=False)
    return path


def test_the_run_calibrates_to_its_own_lab_pairs(lab_run):
    record = lab_run.soil["calibration"]
    assert record["status"] == "calibrated" and record["n_pairs"] == 93
    # Invented demo data; the reference is the lab's own soil test on held-out folds:
    # the calibrated model predicts it better than the default parameters do.
    assert record["cv_rmse_mg_kg"] < record["default_rmse_mg_kg"]
    below = record["samples_below_critical"]
    assert abs(below["calibrated_model"] - below["lab"]) < abs(below["default_model"] - below["lab"])
    summary = json.loads((lab_run.out_dir / "summary.json").read_text())
    assert summary["soil_model"]["calibration"]["fitted"] == record["fitted"]
    assert (lab_run.out_dir / "maps" / "calibration.png").is_file()


def test_rates_from_an_uncalibrated_model_need_consent(demo_inputs, coarse, no_lab_samples,
                                                       tmp_path):
    with pytest.raises(pmap.ConfigError, match="rates.allow_uncalibrated_model"):
        _run(no_lab_samples, demo_inputs["boundary"], tmp_path / "refused", coarse)
    assert not (tmp_path / "refused").exists()
    result = _run(no_lab_samples, demo_inputs["boundary"], tmp_path / "ok",
                  coarse.replace("rates", allow_uncalibrated_model=True))
    assert result.stp_source["model_parameters"] == "default"
    assert "DEFAULT (uncalibrated)" in result.stp_source["description"]


def test_a_calibration_file_serves_fields_without_a_lab_soil_test(
        demo_inputs, coarse, no_lab_samples, lab_run, tmp_path):
    params = tmp_path / "region.toml"
    runner = CliRunner()
    done = runner.invoke(cli, ["calibrate", str(demo_inputs["samples"]), "--out", str(params)])
    assert done.exit_code == 0, done.output
    assert "cross-validated RMSE" in done.output and "95 % interval" in done.output
    again = runner.invoke(cli, ["calibrate", str(demo_inputs["samples"]), "--out", str(params)])
    assert again.exit_code == 4  # never overwrites without --overwrite
    field = tmp_path / "field.toml"
    field.write_text('[grid]\ncell_size_m = 20.0\n[calibration]\nfile = "region.toml"\n')
    config = pmap.load_config(field)
    assert config.calibration.status == "calibrated"
    calibrated = _run(no_lab_samples, demo_inputs["boundary"], tmp_path / "cal", config)
    assert calibrated.stp_source["model_parameters"] == "calibrated"
    default = _run(no_lab_samples, demo_inputs["boundary"], tmp_path / "default",
                   coarse.replace("rates", allow_uncalibrated_model=True))
    inside = lab_run.grid.mask
    lab_zones = lab_run.layers["zones"][inside]

    def agreement(result):
        return float((result.layers["zones"][inside] == lab_zones).mean())

    def p2o5_error(result):
        return abs(result.totals["p2o5_total_kg"] / lab_run.totals["p2o5_total_kg"] - 1.0)

    # The lab-driven run is the reference: the calibrated model agrees with it on most of
    # the field and closer than the default parameters, in zones and in total P2O5.
    assert agreement(calibrated) > 0.9 and agreement(calibrated) > agreement(default)
    assert p2o5_error(calibrated) < 0.05 and p2o5_error(calibrated) < p2o5_error(default)


def test_too_few_pairs_are_refused_with_the_reason(demo_inputs, coarse, tmp_path):
    config = coarse.replace("calibration", min_pairs=120)
    with pytest.warns(pmap.PmapWarning, match="not calibrated"):
        result = pmap.run_field(demo_inputs["samples"], demo_inputs["boundary"],
                                tmp_path / "out", config)
    record = result.soil["calibration"]
    assert record["status"] == "refused"
    assert "120" in record["reason"] and "93" in record["reason"]
    assert result.config.soil == coarse.soil  # the [soil] parameters, unchanged


def test_lime_rates_follow_the_mehlich_buffer_formula(lab_run):
    # Source: NCDA&CS Agronomic Division, Mehlich buffer lime requirement (the formula the
    # unit tests check on the worked example), applied to the run's kriged pH and buffer pH
    inside = lab_run.grid.mask
    ph = lab_run.layers["ph"][inside]
    buffer_ph = lab_run.layers["buffer_ph"][inside]
    params = lab_run.config.lime
    expected = lime.lime_rate_t_ha(lime.lime_requirement_t_ha(ph, buffer_ph, params), params)
    np.testing.assert_allclose(lab_run.layers["lime_rate"][inside], expected, rtol=1e-6)
    assert (expected[ph < 5.8] > 0).all() and (expected[ph >= params.target_ph] == 0).all()
    record = lab_run.soil["lime"]
    assert record["area_without_buffer_ph_ha"] == 0.0
    assert sum(c["area_ha"] for c in record["classes"]) == pytest.approx(
        inside.sum() * lab_run.grid.cell_area_ha, rel=1e-6)
    gain = lab_run.layers["liming_available_p_gain"][inside]
    assert (gain[ph >= params.target_ph] == 0).all() and np.nanmax(gain) > 0
    assert lab_run.soil["low_ph"]["area_below_ha"] > 0
    assert (lab_run.layers["low_ph_flag"][inside] == (ph < 5.5)).all()


def test_lime_zones_are_written_as_polygons_beside_the_rate_zones(lab_run):
    import geopandas as gpd

    (path,) = lab_run.out_dir.glob("*_lime_zones.gpkg")
    frame = gpd.read_file(path, layer="lime_zones")
    record = {c["class"]: c for c in lab_run.soil["lime"]["classes"]}
    # the polygons tile the field and carry each class's rate and area
    inside_ha = lab_run.grid.mask.sum() * lab_run.grid.cell_area_ha
    assert frame.area.sum() / 10_000.0 == pytest.approx(inside_ha, rel=1e-9)
    for code, group in frame.groupby("lime_class"):
        assert group["area_ha"].sum() == pytest.approx(record[code]["area_ha"], rel=1e-6)
        assert (group["lime_t_ha"] == record[code]["rate_t_ha"]).all()
    # Source: NIST SP 811 (1 short ton = 907.18474 kg, 1 acre = 0.40468564224 ha)
    np.testing.assert_allclose(frame["lime_t_ac"],
                               frame["lime_t_ha"] * 0.40468564224 / 0.90718474, rtol=1e-12)
    assert (frame["target_ph"] == lab_run.config.lime.target_ph).all()
    assert frame.crs == lab_run.grid.crs


def test_p_saturation_ratio_is_mapped_and_can_cap_rates(demo_inputs, coarse, tmp_path):
    table = pd.read_csv(demo_inputs["samples"])
    rng = np.random.default_rng(3)
    table["fe"] = np.round(rng.uniform(80, 160, len(table)), 0)
    table["al"] = np.round(np.where(table["mehlich3_p"] > 35, 300.0, 900.0)
                           + rng.normal(0, 20, len(table)), 0)
    path = tmp_path / "fe_al.csv"
    table.to_csv(path, index=False)
    config = coarse.replace("environment", cap_rates=True, high_psr=0.05, watch_psr=0.03)
    result = _run(path, demo_inputs["boundary"], tmp_path / "out", config)
    inside = result.grid.mask
    # Source: UF/IFAS EDIS SS541: PSR = (P/31) / (Fe/56 + Al/27), Mehlich-3, molar
    expected = environment.phosphorus_saturation_ratio(
        result.layers["stp"][inside], result.layers["fe"][inside], result.layers["al"][inside])
    np.testing.assert_allclose(result.layers["p_saturation_ratio"][inside], expected, rtol=1e-6)
    capped = result.soil["p_saturation"]["capped_zone_ids"]
    assert capped
    for p in result.patches:
        if p.zone_id in capped:
            assert p.p2o5_kg_ha == config.environment.capped_rate_kg_ha


def test_available_p_uncertainty_matches_first_order_propagation(lab_run):
    # common practice, no source: first-order (delta-method) propagation of the kriging
    # standard deviations of pH and total P through the soil model, an independent way to
    # get the per-cell standard deviation the run estimates by drawing
    from pmap.pipeline import soil_inputs_on_grid
    from pmap.soil.model import soil_model

    inside = lab_run.grid.mask
    ph = lab_run.layers["ph"][inside].astype(float)
    tp = lab_run.layers["total_p"][inside].astype(float)
    sd_ph = np.sqrt(lab_run.layers["ph_variance"][inside].astype(float))
    sd_tp = np.sqrt(lab_run.layers["total_p_variance"][inside].astype(float))
    estimates = {name: lab_run.layers[name][inside].astype(float)
                 for name in lab_run.interpolations}
    inputs = soil_inputs_on_grid(estimates, lab_run.grid, lab_run.config)
    partition = lab_run.calibration.params

    def available(p, t):
        return soil_model(p, t, inputs, partition, lab_run.config.fixation).pools.available

    d_ph = (available(ph + 1e-3, tp) - available(ph - 1e-3, tp)) / 2e-3
    d_tp = (available(ph, tp + 1e-2) - available(ph, tp - 1e-2)) / 2e-2
    first_order = np.hypot(d_ph * sd_ph, d_tp * sd_tp)
    drawn = lab_run.layers["available_p_sd"][inside]
    ratio = np.median(drawn / first_order)
    assert 0.85 < ratio < 1.15
    probability = lab_run.layers["available_p_deficiency_probability"][inside]
    assert ((probability >= 0) & (probability <= 1)).all()
    # cells far below the critical level are deficient in almost every draw
    critical = lab_run.soil["uncertainty"]["critical_ppm"]
    mean = available(ph, tp)
    assert (probability[mean < critical - 4 * first_order] > 0.9).all()
    assert (probability[mean > critical + 4 * first_order] < 0.1).all()
