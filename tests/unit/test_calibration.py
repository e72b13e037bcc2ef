"""Calibration of soil-model parameters to paired lab data, and its review plot."""

from __future__ import annotations

import dataclasses
import json
import sys

import matplotlib.image as mpimg
import numpy as np
import pytest
from scipy import stats

from pmap.config import config_from_dict
from pmap.errors import ConfigError, InsufficientDataError
from pmap.report.calibration_plot import calibration_figure, plot_calibration
from pmap.soil.availability import PartitionParams, partition_total_p
from pmap.soil.calibration import calibrate, calibrate_partition

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib

#: The "true" soil of the synthetic pairs; the defaults (0.08, 5.0, 8.0) are wrong for it.
TRUE = PartitionParams(max_labile_fraction=0.12, acid_midpoint_ph=5.4, alkaline_midpoint_ph=7.6)
NOISE_MG_KG = 1.5


def _pairs(n: int, ph_range: tuple[float, float], seed: int, truth: PartitionParams = TRUE):
    """Invented paired samples: pH, total P (mg/kg) and a noisy lab value (mg/kg)."""
    rng = np.random.default_rng(seed)
    ph = rng.uniform(*ph_range, n)
    total = rng.uniform(300.0, 1500.0, n)
    lab = partition_total_p(ph, total, truth).available + rng.normal(0.0, NOISE_MG_KG, n)
    assert (lab >= 0).all()  # a lab reports no negative P; the seed is chosen so
    return ph, total, lab


@pytest.fixture(scope="module")
def wide():
    """A calibration on 120 pairs spanning pH 4.5-8.6, from the (wrong) default parameters."""
    ph, total, lab = _pairs(120, (4.5, 8.6), seed=11)
    return calibrate_partition(ph, total, lab, PartitionParams())


# --- the soil model: recovery, refusals, identifiability ------------------------------------


def test_recovers_known_parameters_with_true_values_inside_the_intervals(wide):
    assert wide.fitted == ("max_labile_fraction", "acid_midpoint_ph", "alkaline_midpoint_ph")
    assert wide.held == {}
    assert wide.n_pairs == 120
    # Tolerances: 5 % of the labile fraction and 0.1 pH unit at 1.5 mg/kg lab noise.
    assert wide.estimates["max_labile_fraction"] == pytest.approx(0.12, abs=0.006)
    assert wide.estimates["acid_midpoint_ph"] == pytest.approx(5.4, abs=0.1)
    assert wide.estimates["alkaline_midpoint_ph"] == pytest.approx(7.6, abs=0.1)
    for name, (lo, hi) in wide.intervals.items():
        assert lo < getattr(TRUE, name) < hi, name
        assert lo < wide.estimates[name] < hi
        assert getattr(wide.params, name) == wide.estimates[name]
    # the residual spread estimates the noise put in
    assert wide.rmse == pytest.approx(NOISE_MG_KG, rel=0.2)
    # held fields keep their values
    assert wide.params.acid_width_ph == PartitionParams().acid_width_ph


def test_fertilizer_history_and_soil_map_are_fitted_through_not_absorbed():
    # Half the samples had 60 mg/kg of fresh P (60 % of it labile) and a third lie on highly
    # weathered ground: given those per sample, calibration recovers the true labile
    # fraction; without them the fraction soaks up the fresh P.
    rng = np.random.default_rng(5)
    n = 120
    ph = rng.uniform(4.5, 8.6, n)
    total = rng.uniform(300.0, 1500.0, n)
    recent = np.where(np.arange(n) % 2 == 0, 60.0, 0.0)
    weathering = np.where(np.arange(n) % 3 == 0, 3.0, 2.0)
    extras = {"recent_p_mg_kg": recent, "fresh_labile_fraction": np.full(n, 0.6),
              "weathering_code": weathering}
    lab = (partition_total_p(ph, total, TRUE, **extras).available
           + rng.normal(0.0, NOISE_MG_KG, n))
    informed = calibrate_partition(ph, total, lab, PartitionParams(), **extras)
    blind = calibrate_partition(ph, total, lab, PartitionParams())
    assert informed.estimates["max_labile_fraction"] == pytest.approx(0.12, abs=0.006)
    assert informed.cv_rmse < 0.6 * blind.cv_rmse
    error = {c: abs(c.estimates["max_labile_fraction"] - 0.12) for c in (informed, blind)}
    assert error[blind] > 2 * error[informed]


def test_intervals_are_the_t_intervals_of_the_standard_errors(wide):
    t95 = stats.t.ppf(0.975, wide.n_pairs - len(wide.fitted))
    for name, (lo, hi) in wide.intervals.items():
        se = wide.std_errors[name]
        assert se > 0
        assert hi - lo == pytest.approx(2 * t95 * se, rel=1e-9)


def test_cross_validated_error_exceeds_in_sample_and_beats_the_wrong_defaults(wide):
    assert wide.cv_rmse >= wide.rmse
    assert wide.cv_r2 <= wide.r2
    assert wide.cv_rmse < 0.5 * wide.default_rmse
    assert abs(wide.bias) < 0.5 and abs(wide.cv_bias) < 0.5
    # the default figures are those of the starting parameters on the same pairs
    err = wide.default_predictions - wide.observed
    assert wide.default_rmse == pytest.approx(np.sqrt(np.mean(err**2)))
    assert wide.default_bias == pytest.approx(err.mean())
    assert wide.k_folds == 5
    assert not np.allclose(wide.cv_predictions, wide.predictions)


def test_fold_assignment_is_seeded():
    ph, total, lab = _pairs(40, (4.5, 8.6), seed=3)
    one = calibrate_partition(ph, total, lab, PartitionParams(), seed=7)
    two = calibrate_partition(ph, total, lab, PartitionParams(), seed=7)
    other = calibrate_partition(ph, total, lab, PartitionParams(), seed=8)
    assert one.cv_rmse == two.cv_rmse
    np.testing.assert_array_equal(one.cv_predictions, two.cv_predictions)
    assert one.cv_rmse != other.cv_rmse
    assert one.rmse == other.rmse


def test_refuses_too_few_pairs_and_names_the_count():
    ph, total, lab = _pairs(7, (4.5, 8.6), seed=5)
    with pytest.raises(InsufficientDataError, match=r"at least 10 complete pairs.*got 7 of 7"):
        calibrate_partition(ph, total, lab, PartitionParams())


def test_incomplete_pairs_do_not_count():
    ph, total, lab = _pairs(12, (4.5, 8.6), seed=5)
    lab[[0, 3]] = np.nan
    ph[5] = np.nan
    total[8] = np.nan
    with pytest.raises(InsufficientDataError, match=r"got 8 of 12"):
        calibrate_partition(ph, total, lab, PartitionParams())


def test_narrow_ph_range_holds_both_midpoints_and_still_fits_the_labile_fraction():
    truth = PartitionParams(max_labile_fraction=0.12)  # midpoints as the defaults
    ph, total, lab = _pairs(60, (6.2, 6.9), seed=2, truth=truth)
    cal = calibrate_partition(ph, total, lab, PartitionParams())
    assert cal.fitted == ("max_labile_fraction",)
    assert set(cal.held) == {"acid_midpoint_ph", "alkaline_midpoint_ph"}
    assert "0 pairs with pH < 6" in cal.held["acid_midpoint_ph"]
    assert "0 pairs with pH > 7.2" in cal.held["alkaline_midpoint_ph"]
    assert "pH spread" in cal.held["acid_midpoint_ph"]
    assert cal.params.acid_midpoint_ph == PartitionParams().acid_midpoint_ph
    assert cal.params.alkaline_midpoint_ph == PartitionParams().alkaline_midpoint_ph
    assert cal.estimates["max_labile_fraction"] == pytest.approx(0.12, abs=0.006)
    assert cal.cv_rmse < cal.default_rmse


def test_an_arm_with_enough_pairs_but_little_spread_is_held():
    ph, total, lab = _pairs(30, (5.2, 5.9), seed=4)
    cal = calibrate_partition(ph, total, lab, PartitionParams(),
                              candidates=("max_labile_fraction", "acid_midpoint_ph"))
    assert "acid_midpoint_ph" in cal.held
    reason = cal.held["acid_midpoint_ph"]
    assert "pH spread of 0.6" in reason and "pairs with pH" not in reason


def test_candidate_without_fitting_bounds_is_a_config_error():
    ph, total, lab = _pairs(20, (4.5, 8.6), seed=1)
    with pytest.raises(ConfigError, match="no fitting bounds for soil.default_clay_pct"):
        calibrate_partition(ph, total, lab, PartitionParams(),
                            candidates=("max_labile_fraction", "default_clay_pct"))


# --- the generic calibrator on a model of its own ------------------------------------------


@dataclasses.dataclass(frozen=True)
class Line:
    """A toy model ``y = intercept + slope * x + 1e-3 * tiny * (x - 5)^2``, and a field it
    ignores."""

    intercept: float = 0.0
    slope: float = 1.0
    tiny: float = 0.0
    unused: float = 3.0
    label: str = "line"

    def __post_init__(self) -> None:
        if self.slope < 0:
            raise ConfigError(f"line.slope must be >= 0, got {self.slope}")


def _line_data(n: int = 50, seed: int = 0, slope: float = 2.5, intercept: float = 4.0):
    rng = np.random.default_rng(seed)
    x = np.linspace(0.0, 10.0, n)
    y = intercept + slope * x + rng.normal(0.0, 1.0, n)
    return x, y


def _line_predict(x):
    return lambda p, rows: p.intercept + p.slope * x[rows] + 1e-3 * p.tiny * (x[rows] - 5) ** 2


BOUNDS = {"intercept": (-50.0, 50.0), "slope": (-10.0, 10.0), "tiny": (-1.0, 1.0),
          "unused": (0.0, 10.0)}


def test_linear_model_matches_ordinary_least_squares():
    x, y = _line_data()
    cal = calibrate(Line(), y, _line_predict(x), candidates=("intercept", "slope"),
                    bounds=BOUNDS)
    ref = stats.linregress(x, y)
    t95 = stats.t.ppf(0.975, len(x) - 2)
    # Source: scipy.stats.linregress (ordinary least squares slope, intercept, standard errors)
    assert cal.estimates["slope"] == pytest.approx(ref.slope, rel=1e-6)
    assert cal.estimates["intercept"] == pytest.approx(ref.intercept, rel=1e-6)
    assert cal.std_errors["slope"] == pytest.approx(ref.stderr, rel=1e-4)
    assert cal.std_errors["intercept"] == pytest.approx(ref.intercept_stderr, rel=1e-4)
    lo, hi = cal.intervals["slope"]
    assert (lo, hi) == pytest.approx((ref.slope - t95 * ref.stderr, ref.slope + t95 * ref.stderr),
                                     rel=1e-4)
    assert cal.r2 == pytest.approx(ref.rvalue**2, rel=1e-6)
    assert cal.ph is None


def test_parameter_without_effect_is_held_and_the_rest_refitted():
    x, y = _line_data()
    cal = calibrate(Line(), y, _line_predict(x), candidates=("intercept", "slope", "unused"),
                    bounds=BOUNDS)
    assert cal.fitted == ("intercept", "slope")
    assert "Jacobian column is (near) zero" in cal.held["unused"]
    assert cal.params.unused == 3.0


def test_parameter_with_too_wide_an_interval_is_held():
    x, y = _line_data()
    cal = calibrate(Line(), y, _line_predict(x), candidates=("intercept", "slope", "tiny"),
                    bounds=BOUNDS)
    assert cal.fitted == ("intercept", "slope")
    assert "95 % confidence half-width" in cal.held["tiny"]
    assert "exceeds the width 2" in cal.held["tiny"]
    assert cal.params.tiny == 0.0


def test_inseparable_parameters_hold_one_and_fit_the_other():
    @dataclasses.dataclass(frozen=True)
    class Sum:
        a: float = 1.0
        b: float = 1.0

    x, y = _line_data(intercept=0.0)
    cal = calibrate(Sum(), y, lambda p, rows: (p.a + p.b) * x[rows], candidates=("a", "b"),
                    bounds={"a": (-10.0, 10.0), "b": (-10.0, 10.0)})
    assert len(cal.fitted) == 1 and len(cal.held) == 1
    (held, reason), = cal.held.items()
    assert "not separable from" in reason
    assert cal.params.a + cal.params.b == pytest.approx(2.5, abs=0.1)


def test_invalid_combinations_are_penalised_not_raised():
    # The data want a negative slope; the model refuses one, so the fit stops at slope 0.
    x, y = _line_data(slope=-1.0, intercept=20.0)
    cal = calibrate(Line(), y, _line_predict(x), candidates=("intercept", "slope"),
                    bounds=BOUNDS)
    assert cal.params.slope >= 0.0
    assert cal.params.slope < 0.05
    assert cal.rmse < np.std(y) * 1.5


def test_custom_rule_replaces_the_built_in_one():
    x, y = _line_data()
    cal = calibrate(Line(), y, _line_predict(x), candidates=("intercept", "slope"),
                    bounds=BOUNDS,
                    requires={"intercept": lambda info: f"only {info.n_pairs} pairs from one site"})
    assert cal.fitted == ("slope",)
    assert cal.held["intercept"] == "only 50 pairs from one site"


def test_toml_comments_stay_comments():
    x, y = _line_data()
    reason = 'two lines\nslope = 99 "quoted"'
    cal = calibrate(Line(), y, _line_predict(x), candidates=("intercept", "slope"),
                    bounds=BOUNDS, requires={"intercept": lambda info: reason})
    data = tomllib.loads(cal.to_toml(section="line", provenance={"date": "2025\n[x]"}))
    assert set(data) == {"line", "calibration"}
    assert data["line"]["slope"] == pytest.approx(cal.params.slope, rel=1e-5)
    assert data["calibration"]["record"]["held_reasons"] == [reason]
    assert data["calibration"]["record"]["date"] == "2025\n[x]"


@dataclasses.dataclass(frozen=True)
class _Acid:
    acid_x: float = 0.0


def test_nothing_identifiable_is_refused_with_the_reasons():
    x, y = _line_data()
    with pytest.raises(InsufficientDataError, match=r"no parameter can be calibrated.*unused"):
        calibrate(Line(), y, _line_predict(x), candidates=("unused",), bounds=BOUNDS)
    # an acid-arm name without pH is held by the built-in rule, leaving nothing to fit
    with pytest.raises(InsufficientDataError, match=r"acid_x: an acid-arm parameter needs"):
        calibrate(_Acid(), y, lambda p, rows: p.acid_x + x[rows], candidates=("acid_x",),
                  bounds={"acid_x": (-5.0, 5.0)})


@pytest.mark.parametrize(
    ("candidates", "bounds", "k_folds", "message"),
    [
        (("nope",), BOUNDS, 5, "'nope' is not a parameter of Line"),
        (("label",), {"label": (0, 1)}, 5, "'label' is not a numeric parameter"),
        (("slope",), {}, 5, "no bounds given for candidate 'slope'"),
        (("slope",), {"slope": (1.0, 1.0)}, 5, "lower < upper"),
        (("slope", "slope"), BOUNDS, 5, "twice"),
        (("slope",), BOUNDS, 1, "k_folds must be a whole number >= 2"),
    ],
)
def test_bad_requests_are_config_errors(candidates, bounds, k_folds, message):
    x, y = _line_data()
    with pytest.raises(ConfigError, match=message):
        calibrate(Line(), y, _line_predict(x), candidates=candidates, bounds=bounds,
                  k_folds=k_folds)


# --- the result as JSON and TOML --------------------------------------------------------


def test_as_dict_is_plain_json(wide):
    data = wide.as_dict()
    text = json.dumps(data, allow_nan=False)
    assert json.loads(text)["fitted"] == list(wide.fitted)
    assert data["n_pairs"] == 120
    assert data["ci95"]["acid_midpoint_ph"] == list(wide.intervals["acid_midpoint_ph"])
    assert "predictions" not in data and "observed" not in data


def test_toml_round_trips_through_tomllib_and_the_config(wide):
    text = wide.to_toml(
        extra_sections={"soil_test_equivalent": {"method": "mehlich3_icp", "intercept": 0.5,
                                                 "slope": 1.1}},
        provenance={"date": "2025-03-01", "samples": 'pairs "spring" C:\\lab\\p.csv',
                    "command": "pmap calibrate pairs.csv", "tags": ["a", "b"]},
    )
    assert text.startswith("# Calibrated soil-model parameters, written by pmap calibrate on "
                           "2025-03-01.")
    assert "120 lab pairs" in text
    data = tomllib.loads(text)
    # only the fitted keys, since every other field is at its default
    assert set(data["soil"]) == set(wide.fitted)
    cfg = config_from_dict({"soil": data["soil"],
                            "soil_test_equivalent": data["soil_test_equivalent"]})
    for f in dataclasses.fields(PartitionParams):
        value = getattr(wide.params, f.name)
        expected = pytest.approx(value, rel=1e-5) if isinstance(value, float) else value
        assert getattr(cfg.soil, f.name) == expected, f.name
    assert cfg.soil_test_equivalent.slope == 1.1
    assert data["calibration"]["status"] == "calibrated"
    block = data["calibration"]["record"]
    assert block["n_pairs"] == 120
    assert block["fitted"] == list(wide.fitted)
    assert block["cv_rmse_mg_kg"] == pytest.approx(wide.cv_rmse, rel=1e-3)
    assert block["r2"] == pytest.approx(wide.r2, rel=1e-3)
    assert block["samples"] == 'pairs "spring" C:\\lab\\p.csv'
    assert block["date"] == "2025-03-01"
    assert block["tags"] == ["a", "b"]
    for name, lo, hi in zip(block["fitted"], block["ci95_low"], block["ci95_high"], strict=True):
        assert (lo, hi) == pytest.approx(wide.intervals[name], rel=1e-5)


def test_toml_keeps_non_default_keys_and_the_held_reasons():
    start = PartitionParams(weathering="high", recent_p2o5_raster="as applied.tif",
                            default_clay_pct=30.0)
    truth = dataclasses.replace(start, max_labile_fraction=0.12)
    ph, total, lab = _pairs(40, (6.2, 6.9), seed=9, truth=truth)
    cal = calibrate_partition(ph, total, lab, start, k_folds=3)
    text = cal.to_toml()
    data = tomllib.loads(text)
    assert data["soil"] == {"max_labile_fraction": pytest.approx(cal.params.max_labile_fraction),
                            "weathering": "high", "recent_p2o5_raster": "as applied.tif",
                            "default_clay_pct": 30.0}
    assert "written by pmap calibrate." in text.splitlines()[0]  # no date given
    assert data["calibration"]["record"]["held"] == ["acid_midpoint_ph", "alkaline_midpoint_ph"]
    assert "pairs with pH < 6" in data["calibration"]["record"]["held_reasons"][0]
    assert "# Held acid_midpoint_ph:" in text
    soil = config_from_dict({"soil": data["soil"]}).soil
    assert soil.weathering == "high" and soil.default_clay_pct == 30.0


@pytest.mark.parametrize(
    ("provenance", "extra", "message"),
    [
        ({"n_pairs": 3}, None, "may not set 'n_pairs'"),
        ({"where": {"x": 1}}, None, "must be a string, number"),
        ({}, {"calibration": {"x": 1}}, "repeats a section"),
    ],
)
def test_bad_provenance_is_refused(wide, provenance, extra, message):
    with pytest.raises(ConfigError, match=message):
        wide.to_toml(provenance=provenance, extra_sections=extra)


# --- the review plot --------------------------------------------------------------------


def test_plot_has_two_panels_of_both_models_and_writes_a_png(wide, tmp_path):
    fig = calibration_figure(wide, method_label="Mehlich-3", title="North 40 - calibration")
    fit_ax, res_ax = fig.axes
    for ax in (fit_ax, res_ax):
        points = [c for c in ax.collections if len(c.get_offsets())]
        assert len(points) == 2  # default and calibrated
        assert all(len(c.get_offsets()) == wide.n_pairs for c in points)
    labels = [t.get_text() for t in fit_ax.get_legend().get_texts()]
    assert any("default" in t and "RMSE" in t and "R²" in t for t in labels)
    assert any("calibrated" in t and "cross-validated" in t for t in labels)
    assert "1:1" in labels
    one_to_one = [line for line in fit_ax.get_lines() if line.get_label() == "1:1"][0]
    xs, ys = one_to_one.get_data()
    np.testing.assert_allclose(xs, ys)
    assert "mg/kg" in fit_ax.get_xlabel() and "Mehlich-3" in fit_ax.get_xlabel()
    assert "mg/kg" in fit_ax.get_ylabel() and "mg/kg" in res_ax.get_ylabel()
    assert res_ax.get_xlabel().startswith("pH")
    residuals = [c for c in res_ax.collections if len(c.get_offsets())][1].get_offsets()
    np.testing.assert_allclose(residuals[:, 0], wide.ph)
    np.testing.assert_allclose(residuals[:, 1], wide.predictions - wide.observed)

    path = plot_calibration(wide, tmp_path / "cal" / "calibration.png", method_label="Mehlich-3",
                            title="North 40 - calibration")
    img = mpimg.imread(path)
    assert img.shape[:2] == (pytest.approx(5 * 150, abs=2), pytest.approx(11 * 150, abs=2))
    assert img[..., :3].std() > 0.05  # not a blank page
    assert not list(path.parent.glob(".*tmp*"))


def test_plot_without_ph_shows_residuals_against_the_lab_value():
    x, y = _line_data()
    cal = calibrate(Line(), y, _line_predict(x), candidates=("intercept", "slope"),
                    bounds=BOUNDS)
    fig = calibration_figure(cal, method_label="Olsen", title="toy")
    assert len(fig.axes) == 2
    assert fig.axes[1].get_xlabel() == "lab soil-test P, Olsen (mg/kg)"
