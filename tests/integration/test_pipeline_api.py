"""run_field from Python: the model path (no lab soil-test P) and other-method rules."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pytest

import pmap
from pmap.demo import write_demo_inputs
from pmap.prescribe.rates import p2o5_rate_kg_ha, product_rates
from pmap.soil.conversions import convert_soil_test


@pytest.fixture(scope="module")
def demo_inputs(tmp_path_factory):
    return write_demo_inputs(tmp_path_factory.mktemp("inputs"))


def _one(out, pattern):
    found = sorted(out.glob(pattern))
    assert len(found) == 1, (pattern, found)
    return found[0]


def _run(samples, boundary, out, config):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return pmap.run_field(samples, boundary, out, config)


def test_without_soil_test_p_rates_come_from_the_flagged_model_estimate(demo_inputs, tmp_path):
    table = pd.read_csv(demo_inputs["samples"]).drop(columns=["mehlich3_p"])
    samples = tmp_path / "no_stp.csv"
    table.to_csv(samples, index=False)
    config = pmap.load_config().replace("grid", cell_size_m=20.0).replace("output", maps="none").replace(
        "rates", allow_uncalibrated_model=True)
    with pytest.warns(pmap.PmapWarning, match="MODEL ESTIMATE"):
        result = pmap.run_field(samples, demo_inputs["boundary"], tmp_path / "out", config)
    assert result.stp_source["source"] == "model estimate"
    assert "stp" not in result.interpolations
    # The soil-test equivalent is the configured conversion of the model's available P.
    inside = result.grid.mask
    expected = config.soil_test_equivalent.to_soil_test(result.layers["available_p"][inside])
    assert np.allclose(result.layers["stp_equivalent"][inside], expected)
    assert np.allclose(result.layers["p2o5_rate"][inside], p2o5_rate_kg_ha(expected, config.rates),
                       equal_nan=True)
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert summary["soil_test_p_driving_rates"]["source"] == "model estimate"
    assert any("MODEL ESTIMATE" in w for w in summary["warnings"])
    assert (tmp_path / "out" / "rasters" / "stp_equivalent.tif").is_file()
    # The model-estimate basis travels with every file that carries a rate.
    import geopandas as gpd
    import rasterio

    out = tmp_path / "out"
    for frame in (gpd.read_file(_one(out, "*_rate_zones.gpkg")),
                  gpd.read_file(_one(out, "*_rate_zones.geojson"))):
        assert set(frame["basis"]) <= {"model estimate", "not sampled"}
        assert "model estimate" in set(frame["basis"])
    assert "model estimate" in set(gpd.read_file(_one(out, "shapefile/*_rate_zones.shp"))["BASIS"])
    assert "model estimate" in set(pd.read_csv(_one(out, "*_zones.csv"))["basis"])
    for layer in ("p2o5_zone_rate", "product_zone_rate", "p2o5_rate", "zones"):
        with rasterio.open(out / "rasters" / f"{layer}.tif") as src:
            assert src.tags()["BASIS"] == "model estimate"
    assert "model estimate" in (out / "TASKDATA" / "TASKDATA.XML").read_text()
    assert summary["prescription"]["basis"] == "model estimate"


def test_zone_rate_raster_matches_the_polygons(demo_inputs, tmp_path):
    import geopandas as gpd

    config = pmap.load_config(demo_inputs["config"]).replace("grid", cell_size_m=20.0).replace("output", maps="none")
    result = _run(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "out", config)
    zones = gpd.read_file(_one(tmp_path / "out", "*_rate_zones.gpkg"), layer="rate_zones")
    painted = result.layers["p2o5_zone_rate"]
    for _, row in zones.iterrows():
        # Every cell whose centre is in the polygon carries that polygon's rate.
        point = row.geometry.representative_point()
        r, c = result.grid.rowcol(np.array([point.x]), np.array([point.y]))
        assert painted[r[0], c[0]] == pytest.approx(row["p2o5_kg_ha"])
    # A polygon's rate is the rule applied to its mean soil-test P, metered as product.
    sampled = zones[zones["basis"] != "not sampled"]
    rule = result.rule
    expected = product_rates(p2o5_rate_kg_ha(sampled["mean_stp_mg_kg"].to_numpy(), rule), rule)
    assert np.allclose(sampled["product_kg_ha"], expected[0], atol=0.05)
    assert np.allclose(sampled["p2o5_kg_ha"], expected[1], atol=0.05)
    # One rate per polygon, and the class table is the sum of its polygons.
    for row in result.class_table:
        mine = zones[zones["class_id"] == row["class_id"]]
        assert row["area_ha"] == pytest.approx(mine["area_ha"].sum(), rel=1e-9)
        assert row["p2o5_total_kg"] == pytest.approx(
            (mine["p2o5_kg_ha"] * mine["area_ha"]).sum(), rel=1e-9)
    shp = gpd.read_file(_one(tmp_path / "out", "shapefile/*_rate_zones.shp"))
    assert len(shp) == len(zones) and "P2O5_KGHA" in shp.columns


def _bray_samples(demo_inputs, tmp_path):
    table = pd.read_csv(demo_inputs["samples"])
    # Source: Ohio State FAQ, Bray-1 = -8.08 + 0.832 x Mehlich-3 ICP (Ohio State University Extension soil-test FAQ)
    bray = convert_soil_test(table["mehlich3_p"].to_numpy(), "mehlich3_icp", "bray1")
    samples = tmp_path / "bray.csv"
    table.drop(columns=["mehlich3_p"]).assign(bray1_p=np.round(bray, 1)).to_csv(samples, index=False)
    return samples


def test_bray_samples_use_the_bray_rule_by_default(demo_inputs, tmp_path):
    samples = _bray_samples(demo_inputs, tmp_path)
    config = pmap.load_config().replace("grid", cell_size_m=20.0).replace("output", maps="none")
    result = _run(samples, demo_inputs["boundary"], tmp_path / "out", config)
    assert result.stp_source["method"] == "bray1"
    # Source: Tri-State 1995 (E-2567), Bray P1 critical level 15 ppm for corn and soybean
    assert result.rule.soil_test_method == "bray1" and result.rule.critical_ppm == 15.0
    inside = result.grid.mask
    expected = p2o5_rate_kg_ha(result.layers["stp"][inside], result.rule)
    assert np.allclose(result.layers["p2o5_rate"][inside], expected)


def test_a_rule_for_another_method_converts_the_soil_test_first(demo_inputs, tmp_path):
    samples = _bray_samples(demo_inputs, tmp_path)
    config = pmap.load_config().replace("grid", cell_size_m=20.0).replace("output", maps="none").replace(
        "rates", soil_test_method="mehlich3_icp")
    with pytest.warns(pmap.PmapWarning, match="converted"):
        result = pmap.run_field(samples, demo_inputs["boundary"], tmp_path / "out", config)
    assert result.rule.critical_ppm == 20.0
    inside = result.grid.mask
    rule_stp = convert_soil_test(result.layers["stp"][inside], "bray1", "mehlich3_icp")
    assert np.allclose(result.layers["p2o5_rate"][inside], p2o5_rate_kg_ha(rule_stp, result.rule))
    # Each polygon's rate comes from its converted mean (the conversion is linear), never from
    # the lab's Bray-1 numbers: those would give about 30 % more P2O5 here.
    sampled = [p for p in result.patches if p.basis != "not sampled"]
    converted = convert_soil_test(np.array([p.mean_stp_mg_kg for p in sampled]), "bray1",
                                  "mehlich3_icp")
    expected = product_rates(p2o5_rate_kg_ha(converted, result.rule), result.rule)[1]
    np.testing.assert_allclose([p.p2o5_kg_ha for p in sampled], expected, atol=0.05)


def test_olsen_samples_need_an_olsen_rule(demo_inputs, tmp_path):
    table = pd.read_csv(demo_inputs["samples"])
    samples = tmp_path / "olsen.csv"
    table.rename(columns={"mehlich3_p": "olsen_p"}).assign(
        olsen_p=lambda t: (t["olsen_p"] / 2).round(1)).to_csv(samples, index=False)
    config = pmap.load_config().replace("grid", cell_size_m=20.0).replace("output", maps="none")
    with pytest.raises(pmap.ConfigError, match="no published tri-state interpretation of olsen"):
        _run(samples, demo_inputs["boundary"], tmp_path / "out", config)
    with pytest.raises(pmap.ConfigError, match="does not convert Olsen"):
        _run(samples, demo_inputs["boundary"], tmp_path / "out",
             config.replace("rates", soil_test_method="mehlich3_icp"))
    olsen_rule = config.replace("rates", critical_ppm=10.0, maintenance_limit_ppm=25.0)
    result = _run(samples, demo_inputs["boundary"], tmp_path / "out", olsen_rule)
    assert result.rule.soil_test_method == "olsen"
    assert not (tmp_path / "out" / "summary.json").read_text().count("rule_conversion")


def test_a_failure_while_writing_leaves_no_output_and_keeps_the_old_one(demo_inputs, tmp_path,
                                                                         monkeypatch):
    from pmap.report import maps

    out = tmp_path / "out"
    config = pmap.load_config().replace("grid", cell_size_m=25.0).replace("output", maps="none")
    _run(demo_inputs["samples"], demo_inputs["boundary"], out, config)
    before = (out / "summary.json").read_bytes()
    config = config.replace("output", maps="all")  # the failure is in drawing a map
    real_plot = maps.plot_layer
    calls = {"n": 0}

    def fail_on_third(*args, **kwargs):
        calls["n"] += 1
        if calls["n"] == 3:
            raise OSError("disk full (simulated)")
        return real_plot(*args, **kwargs)

    monkeypatch.setattr(maps, "plot_layer", fail_on_third)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with pytest.raises(OSError, match="simulated"):
            pmap.run_field(demo_inputs["samples"], demo_inputs["boundary"], out, config,
                           overwrite=True)
        calls["n"] = 0
        with pytest.raises(OSError, match="simulated"):
            pmap.run_field(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "fresh",
                           config)
    assert (out / "summary.json").read_bytes() == before, "the old output was damaged"
    assert not (tmp_path / "fresh").exists(), "a half-written output was left"
    assert not list(tmp_path.glob(".*partial*")), "a staging directory was left"


def test_cluster_zones_carry_the_users_rate_table(demo_inputs, tmp_path):
    # Zones by fuzzy c-means of soil-test P and pH; the config's per-zone table sets the rates.
    config = pmap.load_config(demo_inputs["config"]).replace("grid", cell_size_m=20.0).replace("output", maps="none").replace(
        "clusters", method="fuzzy_cmeans", layers=("stp", "ph"), n_zones=3,
        rates_kg_ha=(120.0, 90.0, 60.0))
    result = _run(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "out", config)
    assert result.prescription["zones_by"] == "fuzzy_cmeans clusters"
    assert result.prescription["clusters"]["n_zones"] == 3
    rule = result.rule
    for row in result.class_table:
        wanted = product_rates(np.array([(120.0, 90.0, 60.0)[row["class_id"] - 1]]), rule)[1][0]
        assert row["min_p2o5_kg_ha"] == row["max_p2o5_kg_ha"] == pytest.approx(wanted)
    means = [row["mean_stp_mg_kg"] for row in result.class_table]
    assert means == sorted(means)  # zone 1 is the poorest
    with pytest.raises(pmap.ConfigError, match="3 zones"):
        _run(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "out2",
             config.replace("clusters", n_zones=0, max_zones=3, rates_kg_ha=(100.0, 50.0)))


def test_risk_aware_rule_is_labelled_and_applies_p_more_readily(demo_inputs, tmp_path):
    # Source: definition of a quantile; at q = 0.5 the normal kriging distribution's median is
    # the estimate, so the risk-aware rule then gives the plain rule's rates (soil-test P
    # kriged on its own scale here: a lognormal median lies below the mean).
    config = (pmap.load_config(demo_inputs["config"]).replace("grid", cell_size_m=20.0).replace("output", maps="none")
              .replace("kriging", log_transform="never"))
    plain = _run(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "a", config)
    median = _run(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "b",
                  config.replace("rates", deficiency_probability_threshold=0.5))
    cautious = _run(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "c",
                    config.replace("rates", deficiency_probability_threshold=0.2))
    inside = plain.grid.mask
    np.testing.assert_allclose(median.layers["p2o5_rate"][inside],
                               plain.layers["p2o5_rate"][inside])
    assert (cautious.layers["p2o5_rate"][inside] >= plain.layers["p2o5_rate"][inside]).all()
    assert cautious.totals["p2o5_total_kg"] > plain.totals["p2o5_total_kg"]
    assert "RISK-AWARE RULE" in cautious.stp_source["risk_aware_rule"]
    assert "risk_aware_rule" not in plain.stp_source
    assert 0 <= np.nanmin(plain.layers["stp_deficiency_probability"]) <= \
        np.nanmax(plain.layers["stp_deficiency_probability"]) <= 1


def test_each_feature_runs_as_its_own_field(demo_inputs, tmp_path):
    # A boundary file with the demo field and a far-away second field: each runs on its own;
    # the second holds no sample, fails with a message naming it, and the first is written.
    import geopandas as gpd
    from shapely.affinity import translate

    field = gpd.read_file(demo_inputs["boundary"])
    far = field.copy()
    far["geometry"] = far.to_crs(32616).geometry.apply(lambda g: translate(g, 5000, 0)).to_crs(
        field.crs)
    both = gpd.GeoDataFrame({"name": ["Long Meadow", "Far Side"]},
                            geometry=list(field.geometry) + list(far.geometry), crs=field.crs)
    path = tmp_path / "farm.geojson"
    both.to_file(path)
    config = pmap.load_config(demo_inputs["config"]).replace("grid", cell_size_m=25.0).replace("output", maps="none")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        results = pmap.pipeline.run_each_feature(demo_inputs["samples"], path, tmp_path / "out",
                                                 config)
    (name1, out1, res1), (name2, _out2, res2) = results
    assert (name1, name2) == ("Long Meadow", "Far Side")
    assert res1.config.field.name == "Long Meadow" and (out1 / "summary.json").is_file()
    assert isinstance(res2, pmap.PmapError) and "none of the" in str(res2)


def test_simulated_probabilities_agree_with_the_kriging_distribution(demo_inputs, tmp_path):
    # common practice, no source: with a Gaussian-like soil test, the share of conditional
    # simulations below the critical level approaches the kriging distribution's probability
    # (up to the normal-score transform and about 0.05 of Monte-Carlo error at 100 runs).
    config = pmap.load_config(demo_inputs["config"]).replace("grid", cell_size_m=40.0).replace("output", maps="none")
    by_kriging = _run(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "k", config)
    simulated = config.replace("kriging", probability="simulation", realisations=100)
    by_sim = _run(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "s", simulated)
    inside = by_kriging.grid.mask
    a = by_kriging.layers["stp_deficiency_probability"][inside]
    b = by_sim.layers["stp_deficiency_probability"][inside]
    assert np.corrcoef(a, b)[0, 1] > 0.95 and np.abs(a - b).mean() < 0.08
    high = by_sim.layers["fixation_high_probability"][inside]
    assert 0.0 <= high.min() and high.max() <= 1.0
    # the same per-cell marginals drive both: draws from the kriging distributions and
    # conditional simulations give like probabilities through the soil model
    for name in ("fixation_high_probability", "available_p_deficiency_probability"):
        k = by_kriging.layers[name][inside]
        s = by_sim.layers[name][inside]
        assert np.abs(k - s).mean() < 0.1, name
    assert "conditional simulations" in by_sim.soil["uncertainty"]["source"]
    assert "kriging distributions" in by_kriging.soil["uncertainty"]["source"]
    assert "sequential Gaussian simulations" in by_sim.stp_source["probability_basis"]
    with pytest.raises(pmap.ConfigError, match="kriging.realisations"):
        _run(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "x",
             simulated.replace("grid", cell_size_m=2.0).replace("output", maps="none").replace("kriging", realisations=5000))


def test_a_covariate_raster_is_used_for_regression_kriging_when_it_pays(demo_inputs, tmp_path):
    # common practice, no source: a covariate that is the true surface itself must win the
    # cross-validation as external drift and cut the leave-one-out error of the map.
    import rasterio
    from rasterio.transform import from_origin

    from pmap.demo import DEMO_CRS, truth

    config = pmap.load_config(demo_inputs["config"]).replace("grid", cell_size_m=40.0).replace("output", maps="none")
    plain = _run(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "a", config)
    x0, y0, x1, y1 = plain.grid.bounds
    cell = 10.0
    xs = x0 - 200 + cell * (np.arange(int((x1 - x0 + 400) / cell)) + 0.5)
    ys = y1 + 200 - cell * (np.arange(int((y1 - y0 + 400) / cell)) + 0.5)
    gx, gy = np.meshgrid(xs, ys)
    tif = tmp_path / "truth_total_p.tif"
    with rasterio.open(tif, "w", driver="GTiff", width=xs.size, height=ys.size, count=1,
                       dtype="float64", crs=DEMO_CRS,
                       transform=from_origin(x0 - 200, y1 + 200, cell, cell)) as dst:
        dst.write(truth(gx, gy)["total_p"], 1)
    with_cov = _run(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "b",
                    config.replace("kriging", covariates={"truth": str(tif)}))
    interp = with_cov.interpolations["total_p"]
    chosen = [c for c in interp.candidates if c.model == interp.model and c.log == interp.log]
    assert chosen[0].drift == "truth" and "kriging with drift (truth) won" in interp.selection
    assert interp.cv.rmse < 0.9 * plain.interpolations["total_p"].cv.rmse  # 38.8 vs 48.4
    assert np.isnan(interp.result.lagrange).all()
    summary = interp.as_dict()
    assert [c["drift"] for c in summary["candidates"] if c["chosen"]] == ["truth"]


def test_write_outputs_reads_the_result_and_returns_what_it_wrote(demo_inputs, tmp_path):
    import dataclasses

    from pmap.outputs import write_outputs
    from pmap.pipeline import prepare_inputs

    config = pmap.load_config().replace("grid", cell_size_m=40.0).replace("output", maps="none")
    result = _run(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "a", config)
    assert result.summary["outputs"] == result.outputs and "summary.json" in result.outputs
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        inputs = prepare_inputs(demo_inputs["samples"], demo_inputs["boundary"], config)
    bare = dataclasses.replace(result, out_dir=tmp_path / "b", summary={}, outputs={})
    summary, outputs = write_outputs(bare, inputs, samples_path=demo_inputs["samples"],
                                     boundary_path=demo_inputs["boundary"], config_path=None)
    assert bare.summary == {} and bare.outputs == {}, "the result it was given is unchanged"
    assert outputs == result.outputs
    assert summary["totals"] == result.summary["totals"]
    written = json.loads((tmp_path / "b" / "summary.json").read_text())
    assert written["outputs"] == outputs
