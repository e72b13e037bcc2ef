"""Shared pytest set-up: library versions in the header, the demo run shared by tests."""

from __future__ import annotations

import importlib
import os
import warnings

import pytest

os.environ.setdefault("MPLBACKEND", "Agg")


def pytest_report_header(config):
    names = ["pmap", "numpy", "scipy", "rasterio", "geopandas", "shapely", "pyproj", "pykrige",
             "skgstat", "matplotlib"]
    parts = []
    for name in names:
        try:
            module = importlib.import_module(name)
            parts.append(f"{name} {getattr(module, '__version__', '?')}")
        except ImportError:
            parts.append(f"{name} missing")
    try:
        import rasterio

        parts.append(f"GDAL {rasterio.__gdal_version__}")
    except ImportError:
        pass
    return "libraries: " + ", ".join(parts)


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory):
    """The demo field run once per test session: (FieldResult, output directory)."""
    from pmap.demo import run_demo

    out = tmp_path_factory.mktemp("demo") / "out"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = run_demo(out)
    return result, out


@pytest.fixture()
def dask_cluster():
    """A 2-worker Dask LocalCluster (processes, one thread each), closed after the test."""
    distributed = pytest.importorskip("distributed")
    saved = dict(os.environ)  # a Nanny writes its pre-spawn-environ into this process's
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                       dashboard_address=None)
    try:
        yield cluster
    finally:
        cluster.close()
        os.environ.clear()
        os.environ.update(saved)
