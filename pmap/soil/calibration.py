"""Calibration of soil-model parameters to paired lab data, with honest statistics.

A calibration fits some parameters of a frozen parameter dataclass (today
:class:`~pmap.soil.availability.PartitionParams`) so that the model's prediction for each
lab sample matches the lab's value (mg/kg) in the least-squares sense.  It refuses rather
than guesses:

* fewer than ``min_pairs`` complete pairs: no calibration at all
  (:class:`~pmap.errors.InsufficientDataError`);
* a parameter the data cannot reach is not tried: by default a name starting with
  ``acid_`` needs at least :data:`MIN_ARM_PAIRS` pairs with pH below :data:`ACID_PH_BELOW`,
  one starting with ``alkaline_`` as many above :data:`ALKALINE_PH_ABOVE`, and both a pH
  spread (max - min over the pairs) of at least :data:`MIN_PH_SPREAD`;
* after the fit, a parameter whose Jacobian column is (near) zero, or whose 95 % confidence
  half-width is wider than its bounds, is held at its starting value and the rest refitted,
  one parameter at a time (the worst first), until every fitted parameter is identified.

Every candidate ends up either fitted (with estimate, standard error and 95 % interval) or
held with the reason.  The statistics compare like with like on the same pairs: in-sample
and k-fold cross-validated RMSE, bias and R^2 of the calibrated model (each fold refitted
with the same list of fitted parameters, from the same starting values), and the error of
the starting parameters, which are not fitted, so their in-sample error is already an
out-of-sample error.

The module is pure numerics: it takes arrays and callables and returns a
:class:`Calibration`, which also renders itself as TOML text (:meth:`Calibration.to_toml`)
for a config file; writing the file is the caller's business.
"""

from __future__ import annotations

import dataclasses
import inspect
import logging
import math
import re
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats
from scipy.optimize import least_squares

from pmap._checks import check_choice, check_number
from pmap.errors import ConfigError, InputError, InsufficientDataError, ModelFitError
from pmap.soil import availability
from pmap.soil.availability import PartitionParams, partition_total_p

__all__ = [
    "CALIBRATION_STATUSES",
    "CalibrationSettings",
    "ACID_PH_BELOW",
    "ALKALINE_PH_ABOVE",
    "MIN_ARM_PAIRS",
    "MIN_PH_SPREAD",
    "PairInfo",
    "Calibration",
    "ph_rule",
    "calibrate",
    "calibrate_partition",
]

log = logging.getLogger(__name__)

# The four data rules below are pmap's own choice (no source): enough pairs on an arm of the
# pH curve, and enough pH contrast, to place a logistic midpoint at all.

#: pH (pH units) below which a pair informs an ``acid_*`` parameter.
ACID_PH_BELOW = 6.0
#: pH (pH units) above which a pair informs an ``alkaline_*`` parameter.
ALKALINE_PH_ABOVE = 7.2
#: Pairs needed on an arm of the pH curve before that arm's parameters are fitted.
MIN_ARM_PAIRS = 5
#: pH spread (max - min over the pairs, pH units) needed before an arm's parameters are fitted.
MIN_PH_SPREAD = 1.0

#: Moving a parameter across its whole bounds changes the predictions by less than this
#: share of the lab values' norm: its Jacobian column counts as zero.
_ZERO_COLUMN = 1e-6
#: Singular values below this share of the largest are a null direction of the Jacobian.
_RCOND = 1e-10
#: Fitted values are written to TOML with this many significant digits.
_TOML_DIGITS = 6
#: What a config's [calibration] section can say about the soil model's parameters.
CALIBRATION_STATUSES: tuple[str, ...] = ("default", "calibrated")
_DEFAULT_FIT = ("max_labile_fraction", "acid_midpoint_ph", "alkaline_midpoint_ph")


@dataclass(frozen=True)
class CalibrationSettings:
    """Soil-model calibration: in the run, and the record of a calibration file (``[calibration]``)."""

    file: str | None = field(default=None, metadata={
        "unit": "",
        "doc": "a parameter file written by pmap calibrate (path relative to this config): its "
        "[soil], [soil_test_equivalent] and [calibration] are read under this file's own keys",
        "source": "common practice, no source"})
    auto: bool = field(default=True, metadata={
        "unit": "",
        "doc": "calibrate the soil model in the run when samples hold total P and a lab soil-test "
        "P together (starting from [soil])",
        "source": "common practice, no source"})
    min_pairs: int = field(default=10, metadata={
        "unit": "samples",
        "doc": "fewest complete pairs (pH, total P, lab soil-test P) a calibration needs",
        "source": "common practice, no source"})
    k_folds: int = field(default=5, metadata={
        "unit": "",
        "doc": "folds of the cross-validation of the calibrated model",
        "source": "common practice, no source"})
    seed: int = field(default=0, metadata={
        "unit": "", "doc": "seed of the cross-validation folds",
        "source": "common practice, no source"})
    fit: tuple[str, ...] = field(default=_DEFAULT_FIT, metadata={
        "unit": "",
        "doc": "parameters of [soil] to calibrate (each only where the data identify it)",
        "source": "common practice, no source"})
    status: str = field(default="default", metadata={
        "unit": "",
        "doc": "calibrated when [soil] holds parameters written by pmap calibrate; default "
        "otherwise (rates from a model estimate then need rates.allow_uncalibrated_model)",
        "source": "common practice, no source"})
    method: str | None = field(default=None, metadata={
        "unit": "",
        "doc": "soil-test P method the parameters were calibrated against (written by pmap "
        "calibrate)",
        "source": "common practice, no source"})
    record: dict[str, Any] = field(default_factory=dict, metadata={
        "unit": "",
        "doc": "figures and provenance of the calibration (written by pmap calibrate, kept in "
        "summary.json)",
        "source": "common practice, no source"})

    def __post_init__(self) -> None:
        check_choice("calibration.status", self.status, CALIBRATION_STATUSES)
        check_number("calibration.min_pairs", self.min_pairs, ge=4)
        check_number("calibration.k_folds", self.k_folds, ge=2)
        object.__setattr__(self, "fit", tuple(self.fit))
        unknown = [n for n in self.fit if n not in availability._FIT_BOUNDS]
        if unknown or not self.fit:
            raise ConfigError(f"calibration.fit must name parameters among "
                              f"{sorted(availability._FIT_BOUNDS)}, got {list(self.fit)}")


@dataclass(frozen=True, eq=False)
class PairInfo:
    """What an identifiability rule sees: the complete pairs of a calibration.

    Attributes
    ----------
    n_pairs : int
        Number of complete pairs.
    rows : numpy.ndarray of int
        Their indices in the caller's arrays.
    observed : numpy.ndarray
        Their lab values (mg/kg).
    ph : numpy.ndarray or None
        Their pH (pH units), when the caller gave pH.
    """

    n_pairs: int
    rows: np.ndarray
    observed: np.ndarray
    ph: np.ndarray | None


#: An identifiability rule: the reason a parameter cannot be fitted, or None if it can.
Rule = Callable[[PairInfo], "str | None"]


def ph_rule(name: str, info: PairInfo) -> str | None:
    """The built-in data rule for parameter ``name``; None when the data allow a fit.

    ``acid_*`` names need :data:`MIN_ARM_PAIRS` pairs with pH < :data:`ACID_PH_BELOW`,
    ``alkaline_*`` names as many with pH > :data:`ALKALINE_PH_ABOVE`; both need a pH spread
    of at least :data:`MIN_PH_SPREAD` over all pairs.  Other names need nothing extra.
    """
    if name.startswith("acid_"):
        arm, label = "acid", f"pH < {ACID_PH_BELOW:g}"
    elif name.startswith("alkaline_"):
        arm, label = "alkaline", f"pH > {ALKALINE_PH_ABOVE:g}"
    else:
        return None
    if info.ph is None:
        return f"an {arm}-arm parameter needs the pairs' pH, and none was given"
    on_arm = info.ph < ACID_PH_BELOW if arm == "acid" else info.ph > ALKALINE_PH_ABOVE
    count = int(np.count_nonzero(on_arm))
    spread = float(np.ptp(info.ph)) if info.ph.size else 0.0
    problems = []
    if count < MIN_ARM_PAIRS:
        problems.append(f"{count} pairs with {label} (needs at least {MIN_ARM_PAIRS})")
    if spread < MIN_PH_SPREAD:
        problems.append(f"a pH spread of {spread:.2f} (needs at least {MIN_PH_SPREAD:g})")
    if problems:
        return "too little data on the " + arm + " arm: " + " and ".join(problems)
    return None


@dataclass(frozen=True, eq=False)
class Calibration:
    """The outcome of :func:`calibrate`: calibrated parameters and how far to trust them.

    Errors are in the unit of the lab values (mg/kg); bias is mean(predicted - observed).
    The arrays hold one value per complete pair, in the order of :attr:`rows`.

    Attributes
    ----------
    params
        The calibrated parameter dataclass (the starting one with the fitted names replaced).
    start
        The starting (default, uncalibrated) parameters.
    fitted : tuple of str
        Names that were fitted, in the order of the candidates.
    held : dict of str to str
        Every other candidate, held at its starting value, and why.
    estimates, std_errors : dict of str to float
        Fitted value and its standard error, per fitted name.
    intervals : dict of str to (float, float)
        95 % confidence interval per fitted name (Student t with ``n_pairs - len(fitted)``
        degrees of freedom, from the Jacobian at the solution; not clipped to the bounds).
    bounds : dict of str to (float, float)
        Bounds of each fitted name.
    n_pairs, k_folds, seed : int
        Complete pairs used; folds of the cross-validation; seed of the fold assignment.
    rmse, bias, r2 : float
        In-sample figures of the calibrated model.
    cv_rmse, cv_bias, cv_r2 : float
        k-fold cross-validated figures (each fold refitted without its pairs).
    default_rmse, default_bias, default_r2 : float
        Figures of the starting parameters on the same pairs; nothing was fitted, so these
        are out-of-sample figures too and compare with the cross-validated ones.
    loss : str
        The ``scipy.optimize.least_squares`` loss used.
    notes : tuple of str
        Other things the reader should know (e.g. an estimate on its bound).
    rows : numpy.ndarray of int
        Indices of the complete pairs in the caller's arrays.
    observed, predictions, cv_predictions, default_predictions : numpy.ndarray
        Lab values, calibrated in-sample predictions, the held-out predictions of the
        cross-validation and the starting parameters' predictions (mg/kg).
    ph : numpy.ndarray or None
        pH of the complete pairs, when given.
    """

    params: Any
    start: Any
    fitted: tuple[str, ...]
    held: dict[str, str]
    estimates: dict[str, float]
    std_errors: dict[str, float]
    intervals: dict[str, tuple[float, float]]
    bounds: dict[str, tuple[float, float]]
    n_pairs: int
    k_folds: int
    seed: int
    rmse: float
    bias: float
    r2: float
    cv_rmse: float
    cv_bias: float
    cv_r2: float
    default_rmse: float
    default_bias: float
    default_r2: float
    loss: str
    notes: tuple[str, ...]
    rows: np.ndarray = field(repr=False)
    observed: np.ndarray = field(repr=False)
    predictions: np.ndarray = field(repr=False)
    cv_predictions: np.ndarray = field(repr=False)
    default_predictions: np.ndarray = field(repr=False)
    ph: np.ndarray | None = field(repr=False)

    def __post_init__(self) -> None:
        for name in ("rows", "observed", "predictions", "cv_predictions",
                     "default_predictions", "ph"):
            arr = getattr(self, name)
            if arr is not None:
                arr.setflags(write=False)

    @property
    def method(self) -> str:
        """How the parameters were estimated, in words."""
        return (f"least squares (scipy.optimize.least_squares, loss={self.loss}), "
                f"{self.k_folds}-fold cross-validation (seed {self.seed})")

    def _figures(self) -> dict[str, Any]:
        return {
            "n_pairs": self.n_pairs,
            "k_folds": self.k_folds,
            "seed": self.seed,
            "rmse_mg_kg": self.rmse,
            "bias_mg_kg": self.bias,
            "r2": self.r2,
            "cv_rmse_mg_kg": self.cv_rmse,
            "cv_bias_mg_kg": self.cv_bias,
            "cv_r2": self.cv_r2,
            "default_rmse_mg_kg": self.default_rmse,
            "default_bias_mg_kg": self.default_bias,
            "default_r2": self.default_r2,
        }

    def as_dict(self) -> dict[str, Any]:
        """The result as plain JSON-able values (no arrays; NaN becomes None)."""
        out: dict[str, Any] = {"status": "calibrated", "method": self.method, "loss": self.loss}
        out.update(self._figures())
        out.update({
            "fitted": list(self.fitted),
            "held": dict(self.held),
            "estimates": dict(self.estimates),
            "std_errors": dict(self.std_errors),
            "ci95": {k: [lo, hi] for k, (lo, hi) in self.intervals.items()},
            "start_values": {k: float(getattr(self.start, k)) for k in self.fitted},
            "bounds": {k: [lo, hi] for k, (lo, hi) in self.bounds.items()},
            "notes": list(self.notes),
        })
        return json_safe(out)

    def to_toml(
        self,
        section: str = "soil",
        extra_sections: Mapping[str, Mapping[str, Any]] | None = None,
        provenance: Mapping[str, Any] | None = None,
    ) -> str:
        """The calibration as TOML text for a config file.

        ``[section]`` holds the fitted parameters (to six significant digits, far finer
        than their confidence intervals) and any other key whose value differs from the
        dataclass default, so the file reproduces :attr:`params`.  Then come
        ``extra_sections`` (e.g. ``{"soil_test_equivalent": {"slope": 1.1}}``) and a
        ``[calibration]`` section with the statistics and ``provenance``.

        Parameters
        ----------
        section : str
            Name of the parameters' section.
        extra_sections : mapping of str to mapping, optional
            More sections to write, each a table of TOML-able values.
        provenance : mapping, optional
            Keys added to ``[calibration]`` (strings, numbers, booleans or lists of them),
            e.g. ``date``, ``samples`` (file name), ``command``; ``status`` and ``method``
            replace the defaults.  ``date`` also appears in the comment header.

        Raises
        ------
        ConfigError
            A provenance value is not a string, number, boolean or list of them; it names a
            statistic of the calibration; or an extra section repeats a section's name.
        """
        provenance = dict(provenance or {})
        calibration = {"status": "calibrated", "method": self.method}
        protected = set(self._figures()) | {"fitted", "estimates", "ci95_low", "ci95_high",
                                            "held", "held_reasons", "start_values"}
        for key, value in provenance.items():
            if key in protected:
                raise ConfigError(f"calibration provenance may not set '{key}': it is a "
                                  "figure of the calibration itself")
            if not _is_plain(value):
                raise ConfigError(f"calibration provenance '{key}' must be a string, number, "
                                  f"boolean or a list of them, got {value!r}")
        calibration.update({k: provenance[k] for k in ("status", "method") if k in provenance})
        calibration.update(self._figures())
        calibration.update({
            "fitted": list(self.fitted),
            "estimates": [_round_sig(self.estimates[k]) for k in self.fitted],
            "ci95_low": [_round_sig(self.intervals[k][0]) for k in self.fitted],
            "ci95_high": [_round_sig(self.intervals[k][1]) for k in self.fitted],
            "start_values": [float(getattr(self.start, k)) for k in self.fitted],
            "held": list(self.held),
            "held_reasons": list(self.held.values()),
        })
        for key in ("rmse_mg_kg", "bias_mg_kg", "r2", "cv_rmse_mg_kg", "cv_bias_mg_kg",
                    "cv_r2", "default_rmse_mg_kg", "default_bias_mg_kg", "default_r2"):
            calibration[key] = _round_sig(calibration[key], 4)
        calibration.update({k: v for k, v in provenance.items() if k not in calibration})

        extra = dict(extra_sections or {})
        for name in extra:
            if name in (section, "calibration"):
                raise ConfigError(f"extra section [{name}] repeats a section the calibration "
                                  "writes itself")
        date = provenance.get("date")
        header = [
            f"Calibrated soil-model parameters, written by pmap calibrate"
            f"{f' on {date}' if date is not None else ''}.",
            f"{self.n_pairs} lab pairs; fitted {', '.join(self.fitted)}.",
            f"Cross-validated RMSE {self.cv_rmse:.3g} mg/kg ({self.k_folds}-fold); "
            f"starting parameters {self.default_rmse:.3g} mg/kg.",
        ]
        header += [f"Held {name}: {reason}" for name, reason in self.held.items()]
        header += [f"Note: {note}" for note in self.notes]
        lines = [_comment(text) for text in header]
        lines += ["", f"[{_toml_key(section)}]"]
        lines += _section_lines(self._changed_keys())
        for name, values in extra.items():
            lines += ["", f"[{_toml_key(name)}]"]
            lines += _section_lines(dict(values))
        lines += ["", "[calibration]"]
        lines += _section_lines({k: calibration.pop(k) for k in ("status", "method")})
        lines += ["", "[calibration.record]"]
        lines += _section_lines(calibration)
        return "\n".join(lines) + "\n"

    def _changed_keys(self) -> dict[str, Any]:
        """Fitted keys (rounded) and every other key whose value differs from its default."""
        out: dict[str, Any] = {}
        for f in dataclasses.fields(self.params):
            value = getattr(self.params, f.name)
            if f.name in self.fitted:
                out[f.name] = _round_sig(float(value))
                continue
            default = _field_default(f)
            if default is not dataclasses.MISSING and _same(value, default):
                continue
            out[f.name] = value
        return out


def calibrate(
    params: Any,
    observed: ArrayLike,
    predict: Callable[[Any, np.ndarray], np.ndarray],
    *,
    candidates: Sequence[str],
    bounds: Mapping[str, tuple[float, float]],
    k_folds: int = 5,
    seed: int = 0,
    min_pairs: int = 10,
    ph: ArrayLike | None = None,
    loss: str = "linear",
    requires: Mapping[str, Rule] | None = None,
) -> Calibration:
    """Fit some fields of a frozen parameter dataclass to lab values by least squares.

    Parameters
    ----------
    params : frozen dataclass
        Starting values; fields not fitted keep their values.
    observed : array_like, shape (n,)
        Lab values (mg/kg); NaN marks a missing value.
    predict : callable ``predict(params, rows) -> numpy.ndarray``
        The model's prediction (mg/kg) for the pairs ``rows`` (an int index array) under
        trial parameters.  A :class:`~pmap.errors.ConfigError` (an invalid combination) or a
        non-finite prediction counts as a large residual.
    candidates : sequence of str
        Names of the fields to try to fit, in order; each needs ``bounds``.
    bounds : mapping of str to (float, float)
        Lower and upper bound of each candidate.
    k_folds : int
        Folds of the cross-validation (at least 2; at most the number of pairs).
    seed : int
        Seed of the fold assignment.
    min_pairs : int
        Fewest complete pairs to calibrate at all.
    ph : array_like, shape (n,), optional
        pH of each pair (pH units), for the built-in rules (:func:`ph_rule`); when given, a
        pair needs a finite pH to be complete.
    loss : str
        ``scipy.optimize.least_squares`` loss (``"linear"``, ``"soft_l1"``, ``"huber"``...).
        The confidence intervals assume the linear (ordinary least-squares) loss.
    requires : mapping of str to callable, optional
        Rules replacing :func:`ph_rule` for some names: ``rule(PairInfo) -> reason or None``.

    Returns
    -------
    Calibration

    Raises
    ------
    InsufficientDataError
        Fewer than ``min_pairs`` complete pairs (a lab value, a finite prediction under the
        starting parameters and, if ``ph`` is given, a pH), or no candidate identifiable.
    ConfigError
        A candidate is not a numeric field, has no or bad bounds, the starting parameters
        are invalid for the model, or ``k_folds`` is below 2.
    ModelFitError
        The optimiser fails.
    """
    obs_all = np.ravel(np.asarray(observed, dtype=float))
    n_all = obs_all.size
    names = tuple(candidates)
    _check_candidates(params, names, bounds)
    if isinstance(k_folds, bool) or not isinstance(k_folds, int) or k_folds < 2:
        raise ConfigError(f"k_folds must be a whole number >= 2, got {k_folds!r}")
    ph_all = None
    if ph is not None:
        ph_all = np.ravel(np.asarray(ph, dtype=float))
        if ph_all.size != n_all:
            raise InputError(f"ph has {ph_all.size} values but observed has {n_all}")

    everything = np.arange(n_all)
    try:
        start_pred = np.asarray(predict(params, everything), dtype=float)
    except ConfigError as exc:
        raise ConfigError(f"the starting parameters are invalid for the model: {exc}") from exc
    if start_pred.shape != (n_all,):
        raise ValueError(f"predict returned shape {start_pred.shape} for {n_all} rows")
    complete = np.isfinite(obs_all) & np.isfinite(start_pred)
    if ph_all is not None:
        complete &= np.isfinite(ph_all)
    rows = np.flatnonzero(complete)
    n = rows.size
    what = "a lab value, the model's inputs" + (" and pH" if ph_all is not None else "")
    if n < min_pairs:
        raise InsufficientDataError(
            f"calibration needs at least {min_pairs} complete pairs ({what}); got {n} of "
            f"{n_all} samples. Add paired lab analyses or keep the default parameters"
        )
    obs = obs_all[rows]
    info = PairInfo(n_pairs=n, rows=rows, observed=obs,
                    ph=None if ph_all is None else ph_all[rows])

    held: dict[str, str] = {}
    rules = dict(requires or {})
    for name in names:
        rule = rules.get(name)
        reason = rule(info) if rule is not None else ph_rule(name, info)
        if reason:
            held[name] = reason
    fit_names = [name for name in names if name not in held]

    problem = _Problem(params, predict, obs, rows, loss)
    lo_all = {k: float(bounds[k][0]) for k in names}
    hi_all = {k: float(bounds[k][1]) for k in names}
    while True:
        if not fit_names:
            raise InsufficientDataError(
                f"no parameter can be calibrated from these {n} pairs: "
                + "; ".join(f"{k}: {v}" for k, v in held.items())
            )
        if n <= len(fit_names) + 1:
            raise InsufficientDataError(
                f"calibrating {len(fit_names)} parameters needs at least "
                f"{len(fit_names) + 2} complete pairs; got {n}"
            )
        lo = np.array([lo_all[k] for k in fit_names])
        hi = np.array([hi_all[k] for k in fit_names])
        x, resid = problem.fit(fit_names, lo, hi, rows)
        verdict = _identify(problem, fit_names, x, resid, lo, hi, obs, rows)
        if isinstance(verdict, dict):
            for name, reason in verdict.items():
                held[name] = f"unidentified after fitting: {reason}"
                log.info("calibrate: holding %s: %s", name, reason)
            fit_names = [k for k in fit_names if k not in verdict]
            continue
        std_err, half = verdict
        break

    fitted = tuple(fit_names)  # still in the order of the candidates
    calibrated = dataclasses.replace(params, **dict(zip(fitted, map(float, x), strict=True)))
    pred = obs + resid
    notes = []
    for k, v, a, b in zip(fitted, x, lo, hi, strict=True):
        if min(v - a, b - v) <= 1e-6 * (b - a):
            notes.append(f"{k} = {v:.6g} lies on its bound [{a:g}, {b:g}]: the data push it "
                         "further, and its interval is only indicative")

    k_used = min(k_folds, n)
    cv_pred = _cross_validate(problem, fitted, lo, hi, rows, k_used, seed)
    default_pred = start_pred[rows]
    held = {k: held[k] for k in names if k in held}
    result = Calibration(
        params=calibrated,
        start=params,
        fitted=fitted,
        held=held,
        estimates={k: float(v) for k, v in zip(fitted, x, strict=True)},
        std_errors={k: float(v) for k, v in zip(fitted, std_err, strict=True)},
        intervals={k: (float(v - h), float(v + h)) for k, v, h in zip(fitted, x, half, strict=True)},
        bounds={k: (lo_all[k], hi_all[k]) for k in fitted},
        n_pairs=n,
        k_folds=k_used,
        seed=seed,
        **_stats("", pred, obs),
        **_stats("cv_", cv_pred, obs),
        **_stats("default_", default_pred, obs),
        loss=loss,
        notes=tuple(notes),
        rows=rows,
        observed=obs,
        predictions=pred,
        cv_predictions=cv_pred,
        default_predictions=default_pred,
        ph=info.ph,
    )
    log.info("calibrate: n=%d, fitted %s, RMSE %.3g, CV RMSE %.3g, default RMSE %.3g mg/kg",
             n, result.estimates, result.rmse, result.cv_rmse, result.default_rmse)
    return result


def calibrate_partition(
    ph: ArrayLike,
    total_p: ArrayLike,
    lab_stp: ArrayLike,
    params: PartitionParams,
    *,
    caco3_pct: ArrayLike | None = None,
    clay_pct: ArrayLike | None = None,
    base_saturation_pct: ArrayLike | None = None,
    om_pct: ArrayLike | None = None,
    ca_mg_kg: ArrayLike | None = None,
    weathering_code: ArrayLike | None = None,
    recent_p_mg_kg: ArrayLike | None = None,
    fresh_labile_fraction: ArrayLike | None = None,
    k_folds: int = 5,
    seed: int = 0,
    min_pairs: int = 10,
    candidates: Sequence[str] = ("max_labile_fraction", "acid_midpoint_ph",
                                 "alkaline_midpoint_ph"),
    loss: str = "linear",
) -> Calibration:
    """Calibrate the pH partition's available pool to a lab soil-test P.

    The prediction is ``partition_total_p(...).available`` for each sample; the bounds
    are the partition's fitting bounds.  Compare against a lab value on the same footing
    as the available pool (convert a soil-test P to that scale first, or calibrate the
    soil-test equivalent beside it).

    Parameters
    ----------
    ph, total_p, lab_stp : array_like, shape (n,)
        Per sample: pH (pH units), total P (mg/kg) and the lab soil-test P (mg/kg).
    params : PartitionParams
        Starting values; the other fields are held.
    caco3_pct, clay_pct, om_pct, ca_mg_kg : array_like, optional
        Per-sample (or one field-wide) optional inputs as in
        :func:`~pmap.soil.availability.partition_total_p`.
    weathering_code, recent_p_mg_kg, fresh_labile_fraction : array_like, optional
        Per-sample weathering class (1-3, from a soil map), P added recently (mg/kg of
        the layer) and the labile share of that fresh P, as the run's model takes them; so
        the fitted labile fraction does not absorb a soil map or a fertilizer history.
    base_saturation_pct : array_like, optional
        Base saturation (%), passed on only if ``partition_total_p`` takes it (the
        available pool does not depend on it otherwise).
    k_folds, seed, min_pairs, loss
        As in :func:`calibrate`.
    candidates : sequence of str
        Fields to try to fit; each must have fitting bounds in the partition model.

    Returns
    -------
    Calibration

    Raises
    ------
    ConfigError
        A candidate has no fitting bounds.
    InputError
        Arrays of different lengths, or a negative lab value.
    InsufficientDataError, ModelFitError
        As in :func:`calibrate`.
    """
    fit_bounds = availability._FIT_BOUNDS
    names = tuple(candidates)
    missing = [k for k in names if k not in fit_bounds]
    if missing:
        raise ConfigError(f"no fitting bounds for soil.{', soil.'.join(missing)}; calibrate "
                          f"among {', '.join(sorted(fit_bounds))}")
    ph_a = np.ravel(np.asarray(ph, dtype=float))
    total = np.ravel(np.asarray(total_p, dtype=float))
    lab = np.ravel(np.asarray(lab_stp, dtype=float))
    if not ph_a.size == total.size == lab.size:
        raise InputError(f"ph, total_p and lab_stp must have as many values; got {ph_a.size}, "
                         f"{total.size} and {lab.size}")
    if np.any(lab < 0):
        raise InputError("lab soil-test P must be >= 0 mg/kg; found negative values")
    accepted = inspect.signature(partition_total_p).parameters
    extras: dict[str, np.ndarray] = {}
    for key, value in (("caco3_pct", caco3_pct), ("clay_pct", clay_pct),
                       ("base_saturation_pct", base_saturation_pct), ("om_pct", om_pct),
                       ("ca_mg_kg", ca_mg_kg), ("weathering_code", weathering_code),
                       ("recent_p_mg_kg", recent_p_mg_kg),
                       ("fresh_labile_fraction", fresh_labile_fraction)):
        if value is None or key not in accepted:
            continue
        arr = np.asarray(value, dtype=float)
        if arr.ndim == 0:
            arr = np.full(ph_a.size, float(arr))
        arr = np.ravel(arr)
        if arr.size != ph_a.size:
            raise InputError(f"{key} has {arr.size} values but ph has {ph_a.size}")
        extras[key] = arr

    def predict(trial: PartitionParams, rows: np.ndarray) -> np.ndarray:
        pools = partition_total_p(ph_a[rows], total[rows], trial,
                                  **{k: v[rows] for k, v in extras.items()})
        return pools.available

    return calibrate(params, lab, predict, candidates=names,
                     bounds={k: fit_bounds[k] for k in names}, k_folds=k_folds, seed=seed,
                     min_pairs=min_pairs, ph=ph_a, loss=loss)


class _Problem:
    """Residuals of trial parameters on some pairs, with the penalty for invalid ones."""

    def __init__(self, params: Any, predict: Callable, observed: np.ndarray,
                 rows: np.ndarray, loss: str) -> None:
        self.params = params
        self.predict = predict
        self.observed = np.full(int(rows.max()) + 1 if rows.size else 0, np.nan)
        self.observed[rows] = observed
        self.loss = loss
        self.penalty = 1e3 * (1.0 + float(np.max(np.abs(observed))))

    def residuals(self, names: Sequence[str], x: np.ndarray,
                  rows: np.ndarray) -> tuple[np.ndarray, bool]:
        """Residuals (mg/kg) and whether the trial was valid everywhere."""
        obs = self.observed[rows]
        try:
            trial = dataclasses.replace(self.params, **dict(zip(names, map(float, x), strict=True)))
            pred = np.asarray(self.predict(trial, rows), dtype=float)
        except ConfigError:
            return np.full(rows.size, self.penalty), False
        if pred.shape != rows.shape:
            raise ValueError(f"predict returned shape {pred.shape} for {rows.size} rows")
        resid = pred - obs
        ok = np.isfinite(resid)
        return np.where(ok, resid, self.penalty), bool(ok.all())

    def fit(self, names: Sequence[str], lo: np.ndarray, hi: np.ndarray,
            rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Least-squares estimates of ``names`` on ``rows`` and the residuals there."""
        start = np.array([float(getattr(self.params, k)) for k in names])
        margin = 1e-9 * (hi - lo)
        start = np.clip(start, lo + margin, hi - margin)
        try:
            result = least_squares(lambda x: self.residuals(names, x, rows)[0], start,
                                   bounds=(lo, hi), loss=self.loss, x_scale="jac")
        except (ValueError, RuntimeError, np.linalg.LinAlgError) as exc:
            raise ModelFitError(f"calibration of {', '.join(names)} failed: {exc}") from exc
        resid, ok = self.residuals(names, result.x, rows)
        if result.status <= 0 or not ok:
            raise ModelFitError(f"calibration of {', '.join(names)} did not converge: "
                                f"{result.message}")
        return result.x, resid


def _jacobian(problem: _Problem, names: Sequence[str], x: np.ndarray, f0: np.ndarray,
              lo: np.ndarray, hi: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Finite-difference Jacobian of the raw residuals (central where the bounds allow).

    A column whose steps both leave the model's valid region is NaN.
    """
    step0 = np.cbrt(np.finfo(float).eps)
    jac = np.empty((f0.size, x.size))
    for j in range(x.size):
        h = step0 * max(abs(x[j]), 0.01 * (hi[j] - lo[j]))
        sides = {}
        for sign in (1.0, -1.0):
            xj = x[j] + sign * h
            if lo[j] <= xj <= hi[j]:
                trial = x.copy()
                trial[j] = xj
                f, ok = problem.residuals(names, trial, rows)
                if ok:
                    sides[sign] = f
        if len(sides) == 2:
            jac[:, j] = (sides[1.0] - sides[-1.0]) / (2 * h)
        elif 1.0 in sides:
            jac[:, j] = (sides[1.0] - f0) / h
        elif -1.0 in sides:
            jac[:, j] = (f0 - sides[-1.0]) / h
        else:
            jac[:, j] = np.nan
    return jac


def _identify(problem: _Problem, names: list[str], x: np.ndarray, resid: np.ndarray,
              lo: np.ndarray, hi: np.ndarray, obs: np.ndarray,
              rows: np.ndarray) -> dict[str, str] | tuple[np.ndarray, np.ndarray]:
    """Names to hold (with reasons), or the standard errors and 95 % half-widths."""
    width = hi - lo
    jac = _jacobian(problem, names, x, resid, lo, hi, rows)
    scaled = jac * width  # change of the predictions across each parameter's whole bounds
    norms = np.linalg.norm(scaled, axis=0)
    tol = _ZERO_COLUMN * max(float(np.linalg.norm(obs)), 1.0)
    drop = {}
    for k, norm in zip(names, norms, strict=True):
        if not np.isfinite(norm):
            drop[k] = "the model is invalid on both sides of its estimate"
        elif norm <= tol:
            drop[k] = ("its Jacobian column is (near) zero: changing it does not change the "
                       "predictions for these pairs")
    if drop:
        return drop
    n, p = resid.size, len(names)
    dof = n - p
    s2 = float(resid @ resid) / dof
    _, sing, vt = np.linalg.svd(scaled, full_matrices=False)
    keep = sing > _RCOND * sing[0]
    v = vt.T
    var = s2 * np.sum(v[:, keep] ** 2 / sing[keep] ** 2, axis=1)
    null_load = np.max(np.abs(v[:, ~keep]), axis=1) if (~keep).any() else np.zeros(p)
    var = np.where(null_load > 1e-6, np.inf, var)
    t95 = float(stats.t.ppf(0.975, dof))
    half_scaled = t95 * np.sqrt(var)  # in units of the bounds' width
    if np.all(half_scaled <= 1.0):
        return np.sqrt(var) * width, half_scaled * width
    worst = int(np.argmax(np.where(np.isinf(half_scaled), np.inf, half_scaled)))
    if np.isinf(half_scaled[worst]):
        worst = int(np.argmax(null_load))
        others = [k for k, load in zip(names, null_load, strict=True)
                  if load > 1e-6 and k != names[worst]]
        reason = ("not separable from " + ", ".join(others) if others else "not determined")
        return {names[worst]: f"{reason} with these pairs (the Jacobian is singular)"}
    return {names[worst]: (f"its 95 % confidence half-width {half_scaled[worst] * width[worst]:.3g} "
                           f"exceeds the width {width[worst]:.3g} of its bounds "
                           f"[{lo[worst]:g}, {hi[worst]:g}]")}


def _cross_validate(problem: _Problem, names: tuple[str, ...], lo: np.ndarray, hi: np.ndarray,
                    rows: np.ndarray, k: int, seed: int) -> np.ndarray:
    """Held-out predictions (mg/kg) of a seeded k-fold cross-validation."""
    n = rows.size
    folds = np.empty(n, dtype=np.int64)
    folds[np.random.default_rng(seed).permutation(n)] = np.arange(n) % k
    out = np.empty(n)
    for fold in range(k):
        test = folds == fold
        x, _ = problem.fit(names, lo, hi, rows[~test])
        resid, ok = problem.residuals(names, x, rows[test])
        if not ok:
            raise ModelFitError(f"cross-validation fold {fold + 1} of {k}: the refitted "
                                "parameters give no prediction for its held-out pairs")
        out[test] = problem.observed[rows[test]] + resid
    return out


def _stats(prefix: str, pred: np.ndarray, obs: np.ndarray) -> dict[str, float]:
    err = pred - obs
    sst = float(np.sum((obs - obs.mean()) ** 2))
    r2 = 1.0 - float(err @ err) / sst if sst > 0 else math.nan
    return {f"{prefix}rmse": float(np.sqrt(np.mean(err**2))),
            f"{prefix}bias": float(np.mean(err)), f"{prefix}r2": r2}


def _check_candidates(params: Any, names: tuple[str, ...],
                      bounds: Mapping[str, tuple[float, float]]) -> None:
    if not dataclasses.is_dataclass(params) or isinstance(params, type):
        raise ConfigError(f"params must be a dataclass instance, got {params!r}")
    known = {f.name for f in dataclasses.fields(params)}
    if not names:
        raise ConfigError("calibration needs at least one candidate parameter")
    if len(set(names)) != len(names):
        raise ConfigError(f"candidates name a parameter twice: {names}")
    for name in names:
        if name not in known:
            raise ConfigError(f"'{name}' is not a parameter of {type(params).__name__}")
        value = getattr(params, name)
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"'{name}' is not a numeric parameter (value {value!r})")
        if name not in bounds:
            raise ConfigError(f"no bounds given for candidate '{name}'")
        lo, hi = (float(b) for b in bounds[name])
        if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
            raise ConfigError(f"bounds of '{name}' must be finite with lower < upper, "
                              f"got {bounds[name]!r}")


def _field_default(f: dataclasses.Field) -> Any:
    if f.default is not dataclasses.MISSING:
        return f.default
    if f.default_factory is not dataclasses.MISSING:
        return f.default_factory()
    return dataclasses.MISSING


def _same(a: Any, b: Any) -> bool:
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return True
    return bool(a == b)


def _round_sig(value: float, digits: int = _TOML_DIGITS) -> float:
    value = float(value)
    if not math.isfinite(value) or value == 0.0:
        return value
    return float(f"{value:.{digits}g}")


def json_safe(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v) for v in obj]
    if isinstance(obj, (np.floating, float)):
        return float(obj) if math.isfinite(obj) else None
    if isinstance(obj, np.integer):
        return int(obj)
    return obj


def _is_plain(value: Any) -> bool:
    if isinstance(value, (list, tuple)):
        return all(_is_plain(v) and not isinstance(v, (list, tuple)) for v in value)
    return isinstance(value, (str, bool, int, float, np.integer, np.floating))


_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")


def _toml_key(key: str) -> str:
    return key if _BARE_KEY.fullmatch(key) else _toml_string(key)


def _toml_string(text: str) -> str:
    out = []
    for ch in text:
        if ch == "\\":
            out.append("\\\\")
        elif ch == '"':
            out.append('\\"')
        elif ch in "\b\t\n\f\r":
            out.append({"\b": "\\b", "\t": "\\t", "\n": "\\n", "\f": "\\f", "\r": "\\r"}[ch])
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04X}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _toml_value(value: Any) -> str:
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        value = float(value)
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        return _toml_string(value)
    if isinstance(value, np.ndarray):
        value = value.tolist()
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, Mapping):
        return "{" + ", ".join(f"{_toml_key(str(k))} = {_toml_value(v)}"
                               for k, v in value.items() if v is not None) + "}"
    raise ConfigError(f"cannot write {value!r} ({type(value).__name__}) as a TOML value")


def _comment(text: str) -> str:
    """A one-line TOML comment (line breaks and control characters become spaces)."""
    return "# " + re.sub(r"[\x00-\x1f\x7f]+", " ", str(text))


def _section_lines(values: Mapping[str, Any]) -> list[str]:
    lines = []
    for key, value in values.items():
        if value is None:
            lines.append(_comment(f"{key}: unset (TOML has no empty value; the reader's default "
                                  "applies)"))
        else:
            lines.append(f"{_toml_key(str(key))} = {_toml_value(value)}")
    return lines
