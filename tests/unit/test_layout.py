"""The layout's promise: the numerics import no file I/O, plotting or CLI code."""

from __future__ import annotations

import subprocess
import sys

import pytest

NUMERIC_MODULES = [
    "pmap.grid",
    "pmap._checks",
    "pmap.geostats",
    "pmap.geostats.variogram",
    "pmap.geostats.kriging",
    "pmap.geostats.crossval",
    "pmap.geostats.interpolate",
    "pmap.geostats.outliers",
    "pmap.geostats.diagnostics",
    "pmap.geostats.neighbourhood",
    "pmap.geostats._local_numba",
    "pmap.geostats.selection",
    "pmap.geostats.anisotropy",
    "pmap.geostats.drift",
    "pmap.geostats.simulation",
    "pmap._warnings",
    "pmap.soil",
    "pmap.soil.sorption",
    "pmap.soil.availability",
    "pmap.soil.fixation",
    "pmap.soil.conversions",
    "pmap.soil.model",
    "pmap.soil.lime",
    "pmap.soil.environment",
    "pmap.soil.calibration",
    "pmap.prescribe",
    "pmap.prescribe.clustering",
    "pmap.prescribe.interpretation",
    "pmap.prescribe.patches",
    "pmap.prescribe.prescription",
    "pmap.prescribe.rates",
    "pmap.prescribe.zones",
]

FORBIDDEN = [
    "rasterio", "geopandas", "pyogrio", "fiona", "shapely", "pyproj", "pandas", "matplotlib",
    "click", "pmap.io", "pmap.report", "pmap.cli", "pmap.pipeline", "pmap.outputs", "pmap.config",
]


def _leaked(module: str) -> list[str]:
    """Forbidden modules that importing ``module`` in a fresh interpreter pulls in."""
    code = (
        "import sys, importlib\n"
        f"importlib.import_module({module!r})\n"
        f"print(','.join(m for m in {FORBIDDEN!r} if m in sys.modules))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return [m for m in out.stdout.strip().split(",") if m]


@pytest.mark.parametrize("module", NUMERIC_MODULES)
def test_numerics_import_no_io_plotting_or_cli(module):
    # A fresh interpreter, so modules other tests imported do not hide a leak.
    assert _leaked(module) == [], f"{module} pulled in {_leaked(module)}"


def test_checker_sees_a_leak():
    # The check above must be able to fail: the pipeline does import the I/O edges.
    assert "pmap.io" in _leaked("pmap.pipeline")


def _loaded(module: str, names: list[str]) -> list[str]:
    code = (
        "import sys, importlib\n"
        f"importlib.import_module({module!r})\n"
        f"print(','.join(m for m in {names!r} if m in sys.modules))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return [m for m in out.stdout.strip().split(",") if m]


@pytest.mark.parametrize("module", ["pmap.results", "pmap.outputs", "pmap.layers",
                                    "pmap.report.field_pictures", "pmap.report.html"])
def test_the_writers_do_not_import_the_pipeline(module):
    # The pipeline calls the writers; the writers read FieldInputs/FieldResult from
    # pmap.results, so the two never import each other.
    assert _loaded(module, ["pmap.pipeline"]) == []


def test_the_pipeline_imports_the_writers():
    # The check above can fail: the pipeline does import the output writer.
    assert _loaded("pmap.pipeline", ["pmap.outputs"]) == ["pmap.outputs"]
