"""Fixtures shared by the unit tests: outside reference data read at test time."""

from __future__ import annotations

import csv
import os

import numpy as np
import pytest


@pytest.fixture(scope="session")
def meuse() -> tuple[np.ndarray, np.ndarray]:
    """The Meuse river samples: coordinates (m), shape (155, 2), and zinc (mg/kg), shape (155,)."""
    skgstat = pytest.importorskip("skgstat")
    # Source: scikit-gstat sample data (skgstat/data/samples/meuse.txt), read from the
    # installed package, never copied into the repository.
    path = os.path.join(os.path.dirname(skgstat.__file__), "data", "samples", "meuse.txt")
    with open(path, newline="") as fh:
        rows = list(csv.DictReader(fh))
    coords = np.array([[float(r["x"]), float(r["y"])] for r in rows])
    zinc = np.array([float(r["zinc"]) for r in rows])
    coords.setflags(write=False)
    zinc.setflags(write=False)
    return coords, zinc
