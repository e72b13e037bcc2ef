"""`pmap run` end to end on a densely sampled field: 20,000 samples, 100 ha, 5 m cells.

A plain script, not collected by pytest::

    python tests/benchmarks/bench_dense_field.py [--samples 20000] [--keep DIR]

Writes an invented 1 km x 1 km field (UTM zone 16N) with on-the-go style pH and total P
readings (smooth invented surfaces plus noise) to a temporary directory, runs the
``pmap`` command on it as a child process, and prints its wall time and peak resident
memory (``getrusage`` of the child), with the kriging neighbourhood recorded in
summary.json.  Targets: under 60 s and under 2 GiB.
"""

from __future__ import annotations

import argparse
import json
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

X0, Y0 = 330_000.0, 4_440_000.0


def write_field(folder: Path, n: int, seed: int = 0) -> tuple[Path, Path, Path]:
    """Samples CSV, boundary GeoJSON and config TOML of the invented dense field."""
    rng = np.random.default_rng(seed)
    x = rng.random(n) * 1000.0
    y = rng.random(n) * 1000.0
    ph = (6.3 + 0.5 * np.sin(x / 170.0) * np.cos(y / 230.0) - 0.3 * (y / 1000.0)
          + rng.normal(0.0, 0.12, n))
    total_p = np.exp(6.4 + 0.25 * np.cos(x / 260.0) + 0.2 * np.sin(y / 140.0)
                     + rng.normal(0.0, 0.08, n))
    lines = ["sample_id,x,y,ph,total_p"]
    lines += [f"D{i:05d},{X0 + xi:.2f},{Y0 + yi:.2f},{p:.2f},{t:.0f}"
              for i, (xi, yi, p, t) in enumerate(zip(x, y, ph, total_p, strict=True))]
    samples = folder / "dense.csv"
    samples.write_text("\n".join(lines) + "\n")
    ring = [[X0, Y0], [X0 + 1000.0, Y0], [X0 + 1000.0, Y0 + 1000.0], [X0, Y0 + 1000.0],
            [X0, Y0]]
    boundary = folder / "dense_boundary.geojson"
    boundary.write_text(json.dumps({
        "type": "FeatureCollection",
        "crs": {"type": "name", "properties": {"name": "urn:ogc:def:crs:EPSG::32616"}},
        "features": [{"type": "Feature", "properties": {"name": "Dense Square"},
                      "geometry": {"type": "Polygon", "coordinates": [ring]}}],
    }))
    config = folder / "dense.toml"
    config.write_text('[field]\nname = "Dense Square"\nfarm = "Benchmark Farm (invented)"\n'
                      '[grid]\ncell_size_m = 5.0\ncrs = "EPSG:32616"\n')
    return samples, boundary, config


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samples", type=int, default=20_000)
    parser.add_argument("--keep", type=Path, help="keep inputs and outputs in this folder")
    args = parser.parse_args()
    folder = Path(tempfile.mkdtemp()) if args.keep is None else args.keep
    folder.mkdir(parents=True, exist_ok=True)
    try:
        samples, boundary, config = write_field(folder, args.samples)
        out = folder / "out"
        shutil.rmtree(out, ignore_errors=True)
        cmd = [sys.executable, "-m", "pmap", "run", str(samples), "-b", str(boundary),
               "-o", str(out), "-c", str(config)]
        t0 = time.perf_counter()
        proc = subprocess.run(cmd, capture_output=True, text=True)
        seconds = time.perf_counter() - t0
        peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0
        if proc.returncode != 0:
            print(proc.stdout[-2000:], proc.stderr[-4000:])
            raise SystemExit(f"pmap run failed with exit code {proc.returncode}")
        summary = json.loads((out / "summary.json").read_text())
        print(f"{args.samples} samples, 100 ha at 5 m cells: {seconds:.1f} s, "
              f"peak {peak:.0f} MiB (targets: 60 s, 2048 MiB)")
        for name, prop in summary["properties"].items():
            hood = prop.get("neighbourhood") or {}
            print(f"  {name}: {prop['model']['kind']}{' (log)' if prop['log'] else ''}, "
                  f"{hood.get('kind')} kriging, variogram from {prop.get('variogram_samples')} "
                  f"samples, LOO RMSE {prop['cv']['rmse']:.4g}")
    finally:
        if args.keep is None:
            shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
