"""PNG maps and the variogram plot: files written, sized, and not blank."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import matplotlib.image as mpimg
import numpy as np
import pytest
from shapely.geometry import Polygon

from pmap.io.boundary import grid_for_boundary
from pmap.report.maps import plot_layer, plot_variogram, scale_bar_length

UTM = "EPSG:32616"
FIELD = Polygon([(338000, 4440000), (338800, 4440050), (338750, 4440600), (338100, 4440500)])


def _layer():
    grid = grid_for_boundary(FIELD, UTM, 10.0)
    x, y = grid.cell_centres()
    return grid, 20 + 10 * np.sin((x - 338000) / 150) + 5 * np.cos((y - 4440000) / 100)


def _check_png(path):
    img = mpimg.imread(path)
    assert img.shape[0] == pytest.approx(6 * 150, abs=2) and img.shape[1] == pytest.approx(7 * 150, abs=2)
    rgb = img[..., :3]
    assert rgb.std() > 0.05  # not a blank page
    return rgb


def test_continuous_map(tmp_path):
    grid, values = _layer()
    pts = np.array([[338200.0, 4440200.0], [338500.0, 4440300.0], [338600.0, 4440100.0]])
    path = plot_layer(tmp_path / "stp.png", values, grid, title="North 40 - soil-test P",
                      unit="mg/kg", subtitle="sampled 2024-10-12", samples_xy=pts, boundary=FIELD)
    _check_png(path)
    assert not list(tmp_path.glob(".*"))


def test_class_map_uses_the_class_colours(tmp_path):
    grid, values = _layer()
    zones = (np.digitize(values, [18, 25]) + 1).astype(np.uint8)
    path = plot_layer(tmp_path / "zones.png", zones, grid, title="zones", unit="class",
                      classes={1: "low", 2: "medium", 3: "high"},
                      colours={1: "#ff0000", 2: "#00ff00", 3: "#0000ff"}, boundary=FIELD)
    rgb = _check_png(path)
    pure_red = (rgb[..., 0] > 0.95) & (rgb[..., 1] < 0.05) & (rgb[..., 2] < 0.05)
    assert pure_red.sum() > 1000  # the class 1 area is drawn in its colour


def test_variogram_plot(tmp_path):
    h = np.linspace(25, 400, 12)

    def model(d):
        return 2 + 18 * (1 - np.exp(-np.asarray(d) / 120))

    path = plot_variogram(tmp_path / "vario.png", h, model(h), np.arange(12) * 10 + 5, model,
                          title="soil-test P variogram", unit="mg/kg")
    img = mpimg.imread(path)
    assert img.shape[:2] == (675, 975) and img[..., :3].std() > 0.05


@pytest.mark.parametrize(("extent", "expected"), [(800, 100), (1200, 200), (3000, 500), (40, 5)])
def test_scale_bar_is_round(extent, expected):
    assert scale_bar_length(extent) == expected


def test_plotting_does_not_touch_pyplot(tmp_path):
    code = (
        "import sys, numpy as np\n"
        "from pmap.grid import GridSpec\n"
        "from pmap.report.maps import plot_layer\n"
        "g = GridSpec.from_bounds('EPSG:32616', (0, 0, 100, 100), 10)\n"
        f"plot_layer({str(tmp_path / 'p.png')!r}, np.ones(g.shape), g, title='t', unit='u')\n"
        "assert 'matplotlib.pyplot' not in sys.modules\n"
    )
    root = Path(__file__).resolve().parents[2]
    subprocess.run([sys.executable, "-c", code], check=True, cwd=root,
                   env={**os.environ, "PYTHONPATH": str(root)})
    assert (tmp_path / "p.png").stat().st_size > 1000
