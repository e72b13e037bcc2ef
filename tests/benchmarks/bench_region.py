"""`pmap region` on 10^8 cells: wall time and peak resident memory of every process.

A plain script, not collected by pytest::

    python tests/benchmarks/bench_region.py                 # 10^8 cells, 2 local workers
    python tests/benchmarks/bench_region.py --cells 1e7     # a quicker run
    python tests/benchmarks/bench_region.py --dask          # tiles on a 2-worker LocalCluster

Writes an invented square farm in UTM zone 16N (10 km x 10 km at 1 m for 10^8 cells) with
20,000 random samples of pH, total P and Mehlich-3 P (smooth invented surfaces plus lab
noise), runs ``pmap region`` on it as a child process and samples, every 0.2 s, the
resident memory of that child and of every process under it (local workers; with
``--dask`` the cluster's worker processes, started by this script).  It prints the wall
time, the fit / tiles / overview split from summary.json, cells per second, the peak
resident memory of the whole tree (the sum over processes at each sample, and each
process's own peak) and the size of the rasters.  Target: peak under 2 GiB.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

X0, Y0 = 400_000.0, 4_300_000.0


def write_region(folder: Path, cells: float, cell_size: float, n: int, seed: int = 0):
    """Samples CSV, boundary GeoJSON and config TOML of the invented farm."""
    side = math.sqrt(cells) * cell_size
    rng = np.random.default_rng(seed)
    x, y = rng.random(n) * side, rng.random(n) * side
    u, v = x / side, y / side  # 0-1 across the farm
    ph = (6.2 + 0.7 * np.sin(7.0 * u) * np.cos(5.0 * v) - 0.4 * v + 0.3 * np.sin(23.0 * u + 11 * v)
          + rng.normal(0.0, 0.1, n))
    total_p = np.exp(6.3 + 0.3 * np.cos(9.0 * u) + 0.25 * np.sin(13.0 * v)
                     + rng.normal(0.0, 0.08, n))
    stp = np.exp(3.2 + 0.45 * np.cos(9.0 * u + 0.5) + 0.3 * np.sin(13.0 * v) - 0.2 * (ph - 6.5) ** 2
                 + rng.normal(0.0, 0.12, n))
    lines = ["sample_id,x,y,ph,total_p,mehlich3_p"]
    lines += [f"R{i:05d},{X0 + a:.2f},{Y0 + b:.2f},{p:.2f},{t:.0f},{s:.1f}"
              for i, (a, b, p, t, s) in enumerate(zip(x, y, ph, total_p, stp, strict=True))]
    samples = folder / "farm_samples.csv"
    samples.write_text("\n".join(lines) + "\n")
    ring = [[X0, Y0], [X0 + side, Y0], [X0 + side, Y0 + side], [X0, Y0 + side], [X0, Y0]]
    boundary = folder / "farm_boundary.geojson"
    boundary.write_text(json.dumps({
        "type": "FeatureCollection",
        "crs": {"type": "name", "properties": {"name": "urn:ogc:def:crs:EPSG::32616"}},
        "features": [{"type": "Feature", "properties": {"name": "Whole Farm"},
                      "geometry": {"type": "Polygon", "coordinates": [ring]}}],
    }))
    config = folder / "farm.toml"
    config.write_text('[field]\nname = "Whole Farm"\nfarm = "Benchmark Farm (invented)"\n'
                      f'[grid]\ncell_size_m = {cell_size}\ncrs = "EPSG:32616"\n'
                      '[samples]\nstp_method = "mehlich3_icp"\n')
    return samples, boundary, config


def tree_rss(root) -> dict[int, int]:
    """Resident bytes of ``root`` and of every process under it."""
    import psutil

    out = {}
    for proc in [root, *root.children(recursive=True)]:
        try:
            out[proc.pid] = proc.memory_info().rss
        except (psutil.NoSuchProcess, psutil.AccessDenied):
            pass
    return out


def main() -> None:
    import psutil

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cells", type=float, default=1e8, help="grid cells (1e8)")
    parser.add_argument("--cell-size", type=float, default=1.0, help="cell size, m (1)")
    parser.add_argument("--samples", type=int, default=20_000, help="samples (20,000)")
    parser.add_argument("--workers", type=int, default=2, help="local workers (2)")
    parser.add_argument("--tile", type=int, default=512, help="tile edge, cells (512)")
    parser.add_argument("--dask", action="store_true", help="tiles on a 2-worker LocalCluster")
    parser.add_argument("--keep", type=Path, help="write everything here and keep it")
    args = parser.parse_args()
    sys.stdout.reconfigure(line_buffering=True)

    root = args.keep or Path(tempfile.mkdtemp(prefix="pmap-bench-region-"))
    root.mkdir(parents=True, exist_ok=True)
    cluster = None
    try:
        samples, boundary, config = write_region(root, args.cells, args.cell_size, args.samples)
        out = root / "out"
        command = [sys.executable, "-m", "pmap", "region", str(samples), "-b", str(boundary),
                   "-o", str(out), "-c", str(config), "--tile", str(args.tile)]
        me = psutil.Process()
        if args.dask:
            from distributed import LocalCluster

            cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                   dashboard_address=None)
            command += ["--scheduler", cluster.scheduler_address]
            watched = me  # the cluster's workers are this script's children
        else:
            command += ["--workers", str(args.workers)]
        base = tree_rss(me)[me.pid]
        t0 = time.perf_counter()
        child = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                                 text=True)
        proc = psutil.Process(child.pid)
        if not args.dask:
            watched = proc
        peak_sum, peak_each = 0, {}
        while child.poll() is None:
            rss = tree_rss(watched)
            if args.dask:
                rss[me.pid] = max(0, rss.get(me.pid, 0) - base)  # this script's own start
            peak_sum = max(peak_sum, sum(rss.values()))
            for pid, r in rss.items():
                peak_each[pid] = max(peak_each.get(pid, 0), r)
            time.sleep(0.2)
        wall = time.perf_counter() - t0
        output = child.stdout.read()
        if child.returncode != 0:
            sys.exit(f"pmap region failed ({child.returncode}):\n{output[-3000:]}")
        summary = json.loads((out / "summary.json").read_text())
        info, run = summary["region"], summary["run"]
        size = sum(p.stat().st_size for p in (out / "rasters").iterdir())
        mib = 2 ** 20
        print(f"{info['width']:,} x {info['height']:,} = {info['cells']:,} cells of "
              f"{info['cell_size_m']:g} m, {summary['samples']['used']:,} samples, "
              f"{info['tiles_planned']} tiles of {args.tile}^2, {len(summary['layers'])} layers; "
              f"{os.cpu_count()} CPUs; {run['backend']}")
        for name, fit in summary["kriging"].items():
            hood = fit["neighbourhood"] or {}
            print(f"  {name:<8} {fit['model']['kind']:<9} {hood.get('kind', '')} "
                  f"k={hood.get('neighbours')} CV RMSE {fit['cv']['rmse']:.3g}")
        print(f"wall time                 {wall:8.1f} s")
        print(f"  fit (variograms, CV)    {run['fit_s']:8.1f} s")
        print(f"  tiles (krige, soil, write) {run['tiles_s']:5.1f} s   "
              f"{info['cells_inside'] / run['tiles_s'] / 1e6:.2f} M cells/s")
        print(f"  overviews               {run['overviews_s']:8.1f} s")
        print(f"peak resident memory, sum over processes  {peak_sum / mib:8.0f} MiB "
              f"({peak_sum / 2**30:.2f} GiB; target < 2 GiB)")
        for pid, r in sorted(peak_each.items(), key=lambda kv: -kv[1])[:6]:
            who = "pmap region" if pid == child.pid else (
                "this script (less its start)" if pid == me.pid else "worker")
            print(f"  pid {pid:<8} {who:<28} peak {r / mib:7.0f} MiB")
        print(f"rasters on disk           {size / 2**30:8.2f} GiB "
              f"({size / (info['cells_inside'] * len(summary['layers'])):.2f} bytes per cell "
              "and layer)")
    finally:
        if cluster is not None:
            cluster.close()
        if args.keep is None:
            shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main()
