"""``pmap calibrate``: fit the soil model to a region's paired lab samples, once, for reuse.

A consultant calibrates the soil model on samples that carry pH, total P and a lab
soil-test P together, and passes the written parameter file to later runs (``pmap run
--config PARAMS.toml``), including fields whose samples hold total P only.  The file is a
pmap config: ``[soil]`` with the calibrated parameters, ``[soil_test_equivalent]`` saying
the model's available P is now in the lab method's units, and ``[calibration]`` with the
status and the record (pairs, cross-validated error, intervals, source file, date).
"""

from __future__ import annotations

import datetime as dt
import os
import tempfile
import warnings
from pathlib import Path

from pmap.config import FieldConfig
from pmap.errors import ConfigError, InputError, OutputError, OutputExistsError, PmapWarning
from pmap.io.samples import read_samples
from pmap.soil.calibration import Calibration, calibrate_partition

__all__ = ["calibrate_samples", "write_calibration"]


def calibrate_samples(samples_path: str | Path, config: FieldConfig = FieldConfig(), *,  # noqa: B008 - frozen
                      crs: str | None = None) -> tuple[Calibration, str | None]:
    """Calibrate ``config.soil`` to the paired lab values of a samples file.

    Returns the calibration and the lab's soil-test P method.

    Raises
    ------
    InputError
        The file cannot be read, or holds no total P or no lab soil-test P column.
    InsufficientDataError
        Too few complete pairs, or no parameter the data identify (the message says why).
    """
    path = Path(samples_path)
    table = read_samples(path, config.samples, crs=crs or config.grid.crs)
    values = table.values
    missing = [label for key, label in (("total_p", "total P"), ("stp", "lab soil-test P"))
               if key not in values]
    if missing:
        raise InputError(f"{path.name}: calibration needs total P and a lab soil-test P in the "
                         f"same samples; no {' and no '.join(missing)} column found")
    settings = config.calibration
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return calibrate_partition(
            values["ph"], values["total_p"], values["stp"], config.soil,
            caco3_pct=values.get("caco3"), clay_pct=values.get("clay"), om_pct=values.get("om"),
            ca_mg_kg=values.get("ca"), k_folds=settings.k_folds, seed=settings.seed,
            min_pairs=settings.min_pairs, candidates=settings.fit), table.stp_method


def write_calibration(calibration: Calibration, method: str | None, out: str | Path, *,
                      samples_path: str | Path, overwrite: bool = False) -> Path:
    """Write the calibration as a config file, atomically (a temporary file, then renamed).

    Raises
    ------
    OutputExistsError
        ``out`` exists and ``overwrite`` is false.
    OutputError
        The file cannot be written.
    """
    out = Path(out)
    if out.exists() and not overwrite:
        raise OutputExistsError(f"{out} exists: choose another --out or pass --overwrite")
    if not method:
        raise ConfigError("the lab's soil-test P method is unknown: set samples.stp_method")
    text = calibration.to_toml(
        extra_sections={"soil_test_equivalent": {"method": method, "intercept": 0.0,
                                                 "slope": 1.0}},
        provenance={"method": method, "samples": Path(samples_path).name,
                    "date": dt.date.today().isoformat()})
    try:
        fd, tmp = tempfile.mkstemp(dir=out.parent if str(out.parent) else ".",
                                   prefix=f".{out.name}.", suffix=".tmp")
        with os.fdopen(fd, "w", encoding="utf-8") as handle:
            handle.write(text)
        os.replace(tmp, out)
    except OSError as exc:
        raise OutputError(f"cannot write {out}: {exc}") from exc
    if calibration.held:
        warnings.warn("held at their [soil] values: " + "; ".join(
            f"{k} ({v})" for k, v in calibration.held.items()), PmapWarning, stacklevel=2)
    return out
