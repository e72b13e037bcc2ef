"""Every problem a run would meet, in one list, without running the job (``pmap check``).

:func:`check_field` reads the configuration, the boundary and the samples each on its
own (so a broken boundary does not hide a broken samples file), then the checks that
need both (samples inside the boundary, working CRS and area, grid size), the rate rule
for the samples' soil-test method, each property's variogram fit and cross-validation
(no grid is kriged), and the output directory when one is named.  Errors and warnings
come back as :class:`Problem` records in the order they were met.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

import numpy as np

from pmap._warnings import collect_warnings
from pmap.config import FieldConfig, load_config
from pmap.errors import PmapError, PmapWarning, exit_code_of

__all__ = ["Problem", "check_field", "exit_code"]

T = TypeVar("T")


@dataclass(frozen=True)
class Problem:
    """One thing a run would stop at (``error``) or warn about (``warning``)."""

    severity: str
    stage: str
    message: str
    error_type: str = ""
    exit_code: int = 0

    def as_dict(self) -> dict[str, str | int]:
        return {"severity": self.severity, "stage": self.stage, "message": self.message,
                "error_type": self.error_type, "exit_code": self.exit_code}


def exit_code(problems: list[Problem]) -> int:
    """The CLI's exit code for a check: 0 without errors, else the first error's code."""
    for problem in problems:
        if problem.severity == "error":
            return problem.exit_code
    return 0


def check_field(
    samples: str | Path,
    boundary: str | Path,
    config: FieldConfig | str | Path | None = None,
    *,
    out_dir: str | Path | None = None,
    overwrite: bool = False,
) -> list[Problem]:
    """Check one field's inputs as :func:`pmap.run_field` would, without writing anything.

    Parameters
    ----------
    samples, boundary : path
        The files :func:`pmap.run_field` would read.
    config : FieldConfig, path to a TOML file, or None for the defaults.
    out_dir : path, optional
        Also check that this output directory could be written (``overwrite`` as for a run).

    Returns
    -------
    list of Problem
        Empty when the run would meet no error and no warning.
    """
    from pmap.io import boundary as boundary_io
    from pmap.io.crs import normalise_crs
    from pmap.io.samples import read_samples
    from pmap.pipeline import (
        KRIGED_PROPERTIES,
        driver_method,
        krige_properties,
        prepare_inputs,
        rate_rule_for,
        require_phosphorus,
    )

    problems: list[Problem] = []

    def attempt(stage: str, func: Callable[..., T], *args: Any, **kwargs: Any) -> T | None:
        with collect_warnings() as caught:
            try:
                value = func(*args, **kwargs)
            except PmapError as exc:
                value = None
                problems.append(Problem("error", stage, " ".join(str(exc).split()),
                                        type(exc).__name__, exit_code_of(exc)))
        for w in caught:
            if issubclass(w.category, PmapWarning):
                problems.append(Problem("warning", stage, " ".join(str(w.message).split())))
        return value

    config_path = None
    if not isinstance(config, FieldConfig):
        config_path = config
        config = attempt("config", load_config, config)
        if config is None:
            return problems
    user_crs = attempt("config", normalise_crs, config.grid.crs) if config.grid.crs else None
    outline = attempt("boundary", boundary_io.read_boundary, boundary, crs=user_crs,
                      feature=config.field.boundary_feature or None,
                      name_attribute=config.field.name_attribute or None)
    source = attempt("samples", read_samples, samples, config.samples, crs=user_crs)
    if out_dir is not None:
        from pmap.outputs import check_output_dir

        transaction = attempt(
            "output", check_output_dir, Path(out_dir), overwrite,
            [Path(samples), Path(boundary)] + ([Path(config_path)] if config_path else []))
        if transaction is not None:
            transaction.close()  # a check holds no lock
    if outline is None or source is None:
        return problems
    inputs = attempt("field", prepare_inputs, samples, boundary, config)
    if inputs is None:
        return problems
    attempt("samples", require_phosphorus, inputs.samples)
    attempt("rates", rate_rule_for, driver_method(inputs.samples, config), config)
    no_targets = np.empty((0, 2))
    for name in KRIGED_PROPERTIES:
        if name in inputs.samples.values:
            attempt(f"kriging {name}", krige_properties, inputs.samples, no_targets, config, (name,))
    return problems

