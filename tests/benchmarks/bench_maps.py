"""Time pmap's review pictures: maps, variogram, overview sheet and diagnostics page.

A plain script, not collected by pytest::

    PYTHONPATH=. python tests/benchmarks/bench_maps.py [--reps 3] [--baseline OLD_MAPS_PY]
    PYTHONPATH=. python tests/benchmarks/bench_maps.py --demo

``--demo`` runs the demo field once without pictures (``output.maps = "none"``), then draws
every picture of a full run (:func:`pmap.report.field_pictures.draw_field_pictures`) and
prints the time of each, the total, and the share of a run they take.

A synthetic field of 200 x 200 cells (5 m cells on a 1 km frame, an irregular boundary,
100 samples, 12 rate zones) is drawn the way pmap's outputs draw it, and the best of
``--reps`` runs of each picture is printed (seconds, file written included).  With
``--baseline`` the continuous and class maps and the variogram are also drawn by another
copy of ``pmap/report/maps.py`` with the same arguments, e.g. the version before the
fixed-geometry layout::

    git show HEAD:pmap/report/maps.py > /tmp/maps_old.py
    PYTHONPATH=. python tests/benchmarks/bench_maps.py --baseline /tmp/maps_old.py

Measured on the development machine (2 cores, shared; matplotlib 3.11), the 41 maps and
variograms of the demo field replayed through both versions, interleaved: constrained
layout (before) 249 ms per layer map and 316 ms per variogram, 10.6 s in all; fixed
geometry (after) 167 ms and 203 ms, 7.3 s in all.
"""

from __future__ import annotations

import argparse
import importlib.util
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
from shapely.geometry import Polygon, box

from pmap.geostats.variogram import VariogramModel
from pmap.grid import GridSpec
from pmap.io.boundary import grid_for_boundary
from pmap.report import maps, sheets

CRS = "EPSG:32616"
X0, Y0 = 330_000.0, 4_443_000.0
CAUTION = ("Model output for review, not an instruction: check rates against local "
           "regulations and nutrient-management rules and have them signed off by a licensed "
           "or certified agronomist.")


def _field() -> dict:
    boundary = Polygon([(X0 + 20, Y0 + 15), (X0 + 985, Y0 + 40), (X0 + 990, Y0 + 700),
                        (X0 + 760, Y0 + 990), (X0 + 300, Y0 + 985), (X0 + 240, Y0 + 850),
                        (X0 + 10, Y0 + 840)])
    grid = grid_for_boundary(boundary, CRS, 5.0)
    x, y = grid.cell_centres()
    u, v = (x - X0) / 1000, (y - Y0) / 1000
    stp = 12 + 40 * u * v + 6 * np.sin(9 * u) * np.cos(7 * v)
    ph = 5.2 + 2.6 * (0.6 * u + 0.4 * v)
    risk = np.clip(1.1 - 0.15 * (ph - 4.5) ** 1.4, 0, 1)
    classes = (np.digitize(stp, [20, 35]) + 1).astype(np.uint8)
    rates = np.choose(classes - 1, [110.0, 80.0, 0.0])
    rng = np.random.default_rng(1)
    pts = np.column_stack([X0 + rng.uniform(60, 940, 140), Y0 + rng.uniform(60, 940, 140)])
    pts = pts[[boundary.contains(_point(p)) for p in pts]][:100]
    zones = []
    for i in range(4):
        for j in range(3):
            part = boundary.intersection(box(X0 + 250 * i, Y0 + 334 * j, X0 + 250 * (i + 1),
                                             Y0 + 334 * (j + 1)))
            if not part.is_empty:
                zones.append((str(len(zones) + 1), part))
    return dict(grid=grid, boundary=boundary, stp=stp, ph=ph, risk=risk, classes=classes,
                rates=rates, samples=pts, zones=zones)


def _point(xy):
    from shapely.geometry import Point

    return Point(float(xy[0]), float(xy[1]))


def _best(func: Callable[[], object], reps: int) -> float:
    times = []
    for _ in range(reps):
        start = time.perf_counter()
        func()
        times.append(time.perf_counter() - start)
    return min(times)


def _variogram_args() -> tuple:
    model = VariogramModel("spherical", nugget=4.0, psill=90.0, range=420.0)
    lags = np.linspace(30, 400, 14)
    table = ["chosen: lowest leave-one-out RMSE of 16 candidates (ties within 1 % to the "
             "MSDR nearest 1)", f"  {'candidate':<58} {'LOO RMSE':>9} {'MSDR':>6}"]
    table += [f"{'*' if k == 0 else ' '} {f'candidate {k}, nugget fitted':<58} "
              f"{3.5 + k / 20:>9.4g} {1.0:>6.2f}" for k in range(12)]
    kw = dict(title="Bench field: variogram of soil-test P", unit="mg/kg",
              subtitle="spherical: nugget 4, partial sill 90, range 420 m | n = 100, "
                       "LOO RMSE 3.5, MSDR 1.00",
              candidates=[("exponential", VariogramModel("exponential", 3.0, 95.0, 500.0))],
              table=table)
    return (lags, model(lags), np.arange(14) * 20 + 30, model), kw


def _load(path: str):
    spec = importlib.util.spec_from_file_location("pmap_maps_baseline", path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)
    return module


def demo_pictures() -> None:
    """Time every picture of the demo field's full run, one by one."""
    import dataclasses
    import warnings

    from pmap.config import load_config
    from pmap.demo import run_demo, write_demo_inputs
    from pmap.pipeline import prepare_inputs
    from pmap.report.field_pictures import draw_field_pictures

    with tempfile.TemporaryDirectory(prefix="pmap-bench-demo-") as tmp:
        root = Path(tmp)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            start = time.perf_counter()
            result = run_demo(root / "run", maps="none")
            compute = time.perf_counter() - start
            paths = write_demo_inputs(root / "inputs")
            inputs = prepare_inputs(paths["samples"], paths["boundary"],
                                    load_config(paths["config"]))
        full = dataclasses.replace(result, config=result.config.replace("output", maps="all"))
        start = time.perf_counter()
        _, timings = draw_field_pictures(full, inputs, root / "pictures")
        drawing = time.perf_counter() - start
    width = max(len(k) for k in timings) + 2
    print(f"demo field: run without pictures {compute:.2f} s; pictures {drawing:.2f} s "
          f"({100 * drawing / (compute + drawing):.0f} % of a full run)")
    print(f"{'picture':<{width}} {'seconds':>8}")
    for key, seconds in sorted(timings.items(), key=lambda kv: -kv[1]):
        print(f"{key:<{width}} {seconds:>8.3f}")
    maps_only = [v for k, v in timings.items() if k.startswith("maps/")]
    print(f"{len(maps_only)} maps, mean {np.mean(maps_only):.3f} s, "
          f"median {np.median(maps_only):.3f} s")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--reps", type=int, default=3, help="runs per picture (best is shown)")
    parser.add_argument("--baseline", help="another maps.py to time the same maps with")
    parser.add_argument("--demo", action="store_true",
                        help="time every picture of the demo field's full run instead")
    args = parser.parse_args()
    if args.demo:
        demo_pictures()
        return
    f = _field()
    grid: GridSpec = f["grid"]
    print(f"grid {grid.height} x {grid.width} cells ({grid.cell_size:g} m), "
          f"{len(f['samples'])} samples, {len(f['zones'])} zones; best of {args.reps}")
    common = dict(samples_xy=f["samples"], boundary=f["boundary"],
                  subtitle="Bench Farm | sampled 2026-10-14")
    labels = {1: "below critical", 2: "maintenance range", 3: "at or above limit"}
    colours = {1: "#D55E00", 2: "#009E73", 3: "#0072B2"}
    header = ["zone", "class", "area (ha)", "P2O5 (kg/ha)", "product (kg/ha)"]
    rows = [[z, "below critical", f"{poly.area / 1e4:.2f}", "110", "212"]
            for z, poly in f["zones"]]
    cases: dict[str, tuple[Callable, Callable]] = {}
    with tempfile.TemporaryDirectory(prefix="pmap-bench-maps-") as tmp:
        out = Path(tmp)

        def continuous(module):
            return lambda: module.plot_layer(
                out / "stp.png", f["stp"], grid, title="Bench field: Soil-test P (kriged)",
                unit="mg/kg", **common)

        def classes(module):
            return lambda: module.plot_layer(
                out / "classes.png", f["classes"], grid, title="Bench field: soil-test P zones",
                unit="class", classes=labels, colours=colours, **common)

        def variogram(module):
            vargs, vkw = _variogram_args()
            return lambda: module.plot_variogram(out / "variogram.png", *vargs, **vkw)

        cases = {"continuous layer": (continuous, None), "class layer": (classes, None),
                 "variogram": (variogram, None)}
        results = {}
        for name, (make, _) in cases.items():
            results[name] = _best(make(maps), args.reps)
        results["rate map + outlines + table"] = _best(lambda: maps.plot_layer(
            out / "rate.png", f["rates"], grid, title="Bench field: P2O5 rate by zone",
            unit="kg P2O5/ha", classes={1: "110 kg P2O5/ha", 2: "80 kg P2O5/ha",
                                        3: "0 kg P2O5/ha"},
            zone_outlines=f["zones"], table=(header, rows), footnote=CAUTION, **common),
            args.reps)
        panels = [
            sheets.MapPanel(f["classes"], "P2O5 rate by zone", "kg P2O5/ha",
                            classes={1: "110 kg P2O5/ha", 2: "80 kg P2O5/ha", 3: "0 kg P2O5/ha"},
                            colours=colours, zone_outlines=f["zones"]),
            sheets.MapPanel(f["stp"], "Soil-test P, Mehlich-3", "mg/kg", class_breaks=[20, 35]),
            sheets.MapPanel(f["ph"], "Soil pH", "pH units", cmap="cividis"),
            sheets.MapPanel(f["risk"], "Fixation risk", "index 0-1", cmap="magma", vmin=0,
                            vmax=1, class_breaks=[0.65, 0.8]),
        ]
        results["overview sheet (PNG + PDF)"] = _best(lambda: sheets.write_overview(
            out / "overview.png", out / "overview.pdf", grid=grid, boundary=f["boundary"],
            samples_xy=f["samples"], title="Bench field: P prescription",
            subtitle="Bench Farm | MAP 11-52-0", panels=panels, table=(header, rows),
            totals_lines=["Area: 80.1 ha", "P2O5: 6,900 kg", "Product: 13,270 kg MAP",
                          "Cost: $10,600"], basis="Rates rest on the measured soil test.",
            cautions=CAUTION), args.reps)
        rng = np.random.default_rng(2)
        observed = 25 + 9 * rng.standard_normal(len(f["samples"]))
        vargs, vkw = _variogram_args()
        prop = sheets.PropertyDiagnostics(
            name="stp", title="Soil-test P", unit="mg/kg", lags=vargs[0], gamma=vargs[1],
            counts=vargs[2], model=vargs[3], log=False, observed=observed,
            predicted=observed + 3 * rng.standard_normal(len(observed)),
            samples_xy=f["samples"], standard_error=np.where(grid.mask, 2 + f["ph"], np.nan),
            figures_lines=vkw["table"][1:], summary_lines=[vkw["subtitle"]])
        results["diagnostics page (PNG + PDF page)"] = _best(lambda: sheets.write_diagnostics(
            out / "diagnostics.pdf", out, properties=[prop], grid=grid,
            boundary=f["boundary"], title="Bench field"), args.reps)
        baseline = {}
        if args.baseline:
            old = _load(args.baseline)
            for name, (make, _) in cases.items():
                baseline[name] = _best(make(old), args.reps)
    width = max(len(n) for n in results) + 2
    print(f"{'picture':<{width}} {'seconds':>8}" + (f" {'baseline':>9} {'ratio':>6}"
                                                   if baseline else ""))
    for name, seconds in results.items():
        line = f"{name:<{width}} {seconds:>8.3f}"
        if name in baseline:
            line += f" {baseline[name]:>9.3f} {baseline[name] / seconds:>5.2f}x"
        print(line)


if __name__ == "__main__":
    main()
