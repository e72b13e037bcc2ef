"""pmap: soil samples to phosphorus availability, fixation-risk, zone and rate maps.

The public API::

    import pmap
    result = pmap.run_field("samples.csv", "boundary.geojson", "out/", "field.toml")

Heavy modules (file formats, plotting) load only when a function that needs them is
first used, so ``import pmap.geostats`` stays free of them.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from pmap._version import __version__
from pmap.errors import (
    ConfigError,
    InputError,
    InsufficientDataError,
    ModelFitError,
    OutputError,
    OutputExistsError,
    PmapError,
    PmapWarning,
)
from pmap.grid import GridSpec

if TYPE_CHECKING:
    from pmap.config import FieldConfig, load_config
    from pmap.demo import run_demo
    from pmap.pipeline import FieldResult, run_field
    from pmap.preflight import Problem, check_field

__all__ = [
    "__version__",
    "run_field",
    "check_field",
    "Problem",
    "run_demo",
    "load_config",
    "FieldConfig",
    "FieldResult",
    "GridSpec",
    "PmapError",
    "InputError",
    "ConfigError",
    "InsufficientDataError",
    "ModelFitError",
    "OutputExistsError",
    "OutputError",
    "PmapWarning",
]

_LAZY = {
    "run_field": "pmap.pipeline",
    "FieldResult": "pmap.pipeline",
    "check_field": "pmap.preflight",
    "Problem": "pmap.preflight",
    "run_demo": "pmap.demo",
    "load_config": "pmap.config",
    "FieldConfig": "pmap.config",
}


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'pmap' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(__all__)
