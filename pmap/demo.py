"""The bundled demo: an invented field with a known truth.

Harrow Creek Farm and its field "Long Meadow" are invented.  The field sits at plausible
coordinates in UTM zone 16N; its soil is described by smooth analytic surfaces
(:func:`truth`) running from acid soil in the north-west through neutral ground to a
calcareous south-east, so that every fixation mechanism appears.  Grid samples, roughly
one per hectare, are drawn from those surfaces with lab-like noise by a fixed seed, so
the demo is deterministic and a test can compare pmap's maps with the surfaces that
generated the samples.

``demo_grids/make_demo.py`` writes the committed copy of the inputs; :func:`run_demo`
regenerates them on the fly, so an installed pmap needs no data files.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np

__all__ = [
    "DEMO_CRS",
    "DEMO_SEED",
    "DEMO_INPUTS_LABEL",
    "truth",
    "boundary_coords",
    "demo_samples",
    "write_demo_inputs",
    "run_demo",
]

#: Projected CRS the truth surfaces are defined in (WGS 84 / UTM zone 16N).
DEMO_CRS = "EPSG:32616"
#: South-west corner of the field's frame in DEMO_CRS (m).
_ORIGIN = (330_000.0, 4_443_000.0)
#: How the demo's (temporary) input files are named in summary.json and manifest.json.
DEMO_INPUTS_LABEL = "(bundled demo inputs)"
#: Seed of the sample jitter and lab noise.
DEMO_SEED = 20261014
#: Sample spacing of the grid survey (m): one sample per hectare.
_SPACING = 100.0

_FIELD_TOML = """\
# Demo configuration for the invented field "Long Meadow" (Harrow Creek Farm).
# Every key is optional; docs/configuration.md lists them all with units and defaults.

[field]
name = "Long Meadow"
farm = "Harrow Creek Farm (invented demo)"
sampling_date = "2026-10-14"
sampling_depth_cm = "0-15"

[grid]
cell_size_m = 5.0

[samples]
stp_method = "mehlich3_icp"

[rates]
crop = "corn"
yield_goal = 190.0
product = "MAP"

[zones]
min_mapping_unit_ha = 0.25
"""


def boundary_coords() -> np.ndarray:
    """Vertices of the field boundary in DEMO_CRS, closed ring, shape (k, 2) (m)."""
    local = np.array(
        [(0, 0), (1100, 0), (1100, 600), (900, 900), (380, 900), (300, 820), (0, 820), (0, 0)],
        dtype=float,
    )
    return local + np.array(_ORIGIN)


def truth(x: np.ndarray, y: np.ndarray) -> dict[str, np.ndarray]:
    """The demo's true soil at points ``x``, ``y`` in DEMO_CRS (m).

    Returns
    -------
    dict
        ``ph`` (pH units, water), ``total_p`` (mg/kg), ``stp`` (Mehlich-3 ICP P, mg/kg),
        ``caco3`` (%), ``clay`` (%), ``om`` (%), ``buffer_ph`` (Mehlich buffer pH).
    """
    u = (np.asarray(x, float) - _ORIGIN[0]) / 1100.0
    v = (np.asarray(y, float) - _ORIGIN[1]) / 900.0
    diagonal = (u - 0.5) - (v - 0.5)  # -1 in the north-west, +1 in the south-east
    ph = (
        6.55
        + 1.55 * np.tanh(1.6 * diagonal)
        + 0.30 * np.exp(-((u - 0.30) ** 2 + (v - 0.25) ** 2) / (2 * 0.12**2))
        - 0.25 * np.exp(-((u - 0.75) ** 2 + (v - 0.70) ** 2) / (2 * 0.15**2))
    )
    total_p = 640.0 * np.exp(
        0.16 * np.sin(2 * np.pi * u * 1.1) * np.cos(2 * np.pi * v * 0.9)
        + 0.30 * np.exp(-((u - 0.28) ** 2 + (v - 0.22) ** 2) / (2 * 0.14**2))
    )
    bell = np.exp(-(((ph - 6.5) / 1.1) ** 2))
    stp = 4.0 + 0.052 * total_p * bell
    caco3 = np.clip(5.0 * (ph - 7.3), 0.0, None)
    clay = 24.0 + 6.0 * np.sin(np.pi * u) * np.cos(np.pi * v * 0.7)
    om = 3.2 + 0.8 * np.cos(np.pi * (u + v) * 0.8)
    buffer_ph = 6.6 - 0.45 * np.clip(6.6 - ph, 0.0, None)
    return {"ph": ph, "total_p": total_p, "stp": stp, "caco3": caco3, "clay": clay, "om": om,
            "buffer_ph": buffer_ph}


def _inside(points: np.ndarray, ring: np.ndarray) -> np.ndarray:
    """Even-odd point-in-polygon test (pure numpy)."""
    x, y = points[:, 0], points[:, 1]
    inside = np.zeros(len(points), dtype=bool)
    for (x1, y1), (x2, y2) in zip(ring[:-1], ring[1:], strict=True):
        crosses = (y1 > y) != (y2 > y)
        with np.errstate(divide="ignore", invalid="ignore"):
            x_cross = x1 + (y - y1) * (x2 - x1) / (y2 - y1)
        inside ^= crosses & (x < x_cross)
    return inside


def demo_samples(seed: int = DEMO_SEED):
    """The demo's grid samples as a pandas DataFrame in lab-export form (WGS84 lat/lon)."""
    import pandas as pd
    from pyproj import Transformer

    rng = np.random.default_rng(seed)
    ring = boundary_coords()
    xs = np.arange(_ORIGIN[0] + _SPACING / 2, _ORIGIN[0] + 1100, _SPACING)
    ys = np.arange(_ORIGIN[1] + _SPACING / 2, _ORIGIN[1] + 900, _SPACING)
    gx, gy = np.meshgrid(xs, ys)
    points = np.column_stack([gx.ravel(), gy.ravel()])
    points = points + rng.uniform(-15.0, 15.0, size=points.shape)
    points = points[_inside(points, ring)]
    soil = truth(points[:, 0], points[:, 1])
    n = len(points)
    ph = soil["ph"] + rng.normal(0.0, 0.08, n)
    total_p = soil["total_p"] * np.exp(rng.normal(0.0, 0.06, n))
    stp = soil["stp"] * np.exp(rng.normal(0.0, 0.10, n))
    caco3 = np.clip(soil["caco3"] + rng.normal(0.0, 0.15, n), 0.0, None)
    clay = soil["clay"] + rng.normal(0.0, 1.0, n)
    om = soil["om"] + rng.normal(0.0, 0.15, n)
    buffer_ph = np.minimum(soil["buffer_ph"] + rng.normal(0.0, 0.03, n), 6.6)
    to_wgs84 = Transformer.from_crs(DEMO_CRS, "EPSG:4326", always_xy=True)
    lon, lat = to_wgs84.transform(points[:, 0], points[:, 1])
    return pd.DataFrame(
        {
            "sample_id": [f"LM-{i + 1:03d}" for i in range(n)],
            "latitude": np.round(lat, 7),
            "longitude": np.round(lon, 7),
            "depth_cm": "0-15",
            "ph": np.round(ph, 1),
            "total_p": np.round(total_p, 0),
            "mehlich3_p": np.round(stp, 1),
            "caco3": np.round(caco3, 1),
            "clay": np.round(clay, 0),
            "om": np.round(om, 1),
            "buffer_ph": np.round(buffer_ph, 2),
        }
    )


def write_demo_inputs(directory: str | Path) -> dict[str, Path]:
    """Write ``samples.csv``, ``boundary.geojson`` and ``field.toml`` into ``directory``."""
    import geopandas as gpd
    from shapely.geometry import Polygon

    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    paths = {
        "samples": directory / "samples.csv",
        "boundary": directory / "boundary.geojson",
        "config": directory / "field.toml",
    }
    demo_samples().to_csv(paths["samples"], index=False, lineterminator="\n")
    field = gpd.GeoDataFrame(
        {"name": ["Long Meadow"], "farm": ["Harrow Creek Farm"]},
        geometry=[Polygon(boundary_coords())],
        crs=DEMO_CRS,
    ).to_crs("EPSG:4326")
    if paths["boundary"].exists():
        paths["boundary"].unlink()
    field.to_file(paths["boundary"], driver="GeoJSON", COORDINATE_PRECISION=7)
    paths["config"].write_text(_FIELD_TOML, encoding="utf-8")
    return paths


def run_demo(out_dir: str | Path, *, overwrite: bool = False, maps: str | None = None):
    """Run the whole job on the demo field and write every output into ``out_dir``.

    The inputs are written to a temporary folder that is removed afterwards, so
    summary.json and manifest.json record them as ``(bundled demo inputs) <name>`` beside
    their copies in ``out_dir/inputs/``, never as the vanished temporary paths.

    ``maps`` sets ``output.maps`` ("all", "overview" or "none"; default the demo's config).

    Returns the :class:`pmap.pipeline.FieldResult`.
    """
    from pmap.config import load_config
    from pmap.outputs import inputs_recorded_as
    from pmap.pipeline import run_field

    with tempfile.TemporaryDirectory(prefix="pmap-demo-") as tmp:
        paths = write_demo_inputs(tmp)
        config = load_config(paths["config"])
        if maps is not None:
            config = config.replace("output", maps=maps)
        with inputs_recorded_as(DEMO_INPUTS_LABEL):
            result = run_field(
                paths["samples"], paths["boundary"], out_dir, config, overwrite=overwrite,
                config_path=paths["config"],
            )
    return result
