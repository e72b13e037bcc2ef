"""`pmap batch` throughput: N invented fields on 1 and 2 local workers and a 2-worker Dask cluster.

A plain script, not collected by pytest::

    python tests/benchmarks/bench_batch.py [--fields 200] [--cell-size 5] [--keep DIR]
    python tests/benchmarks/bench_batch.py --fields 20      # a quick run
    python tests/benchmarks/bench_batch.py --dask tuned     # one Dask run, tuned settings

Each invented field is a 1 km x 1 km square in UTM zone 16N (40,000 cells at 5 m) with
100 grid samples (100 m apart, jittered) whose values follow the demo's analytic soil
surfaces (``pmap.demo.truth``) plus lab-like noise, seeded per field.  The script prints

- fields per minute with 1 and 2 local workers and with a 2-worker Dask LocalCluster, and
  the 1 -> 2 worker scaling;
- the per-field overhead split: worker start-up (spawning a process, importing pmap's
  pipeline in a fresh worker), compute (``run_field`` with ``--maps none``), pictures
  (``--maps all`` less ``--maps none`` on a few fields) and the batch's own share
  (planning, hashing, summary) from the wall time left over.
"""

from __future__ import annotations

import argparse
import concurrent.futures as cf
import multiprocessing
import os
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

CRS = "EPSG:32616"
X0, Y0 = 300_000.0, 4_400_000.0
SIDE_M = 1000.0
SPACING_M = 100.0


#: The Dask runs: the defaults, then without the two worker settings that cost pmap time:
#: the nanny's MALLOC_TRIM_THRESHOLD_=65536 (setting it turns off glibc's adaptive mmap
#: threshold, so every large numpy array is mapped and zeroed afresh) and the workers'
#: sampling profiler (every 10 ms it walks the task thread's stack under the GIL).
DASK_VARIANTS = {
    "defaults": {},
    "tuned": {
        "distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None,
        "distributed.worker.profile.enabled": False,
    },
}


def write_fields(root: Path, n: int, cell_size: float) -> Path:
    """``root/fields/F###/{samples.csv,boundary.geojson}`` and ``batch.toml``."""
    import geopandas as gpd
    from shapely.geometry import box

    from pmap.demo import truth

    fields = root / "fields"
    for i in range(n):
        rng = np.random.default_rng(1000 + i)
        fx, fy = X0 + (i % 20) * 1500.0, Y0 + (i // 20) * 1500.0
        folder = fields / f"F{i:03d}"
        folder.mkdir(parents=True)
        gpd.GeoDataFrame({"name": [folder.name]}, geometry=[box(fx, fy, fx + SIDE_M, fy + SIDE_M)],
                         crs=CRS).to_file(folder / "boundary.geojson", driver="GeoJSON")
        centres = np.arange(SPACING_M / 2, SIDE_M, SPACING_M)
        gx, gy = np.meshgrid(centres, centres)
        u = gx.ravel() + rng.uniform(-15, 15, gx.size)
        v = gy.ravel() + rng.uniform(-15, 15, gy.size)
        shift = rng.uniform(0, 100, 2)  # each field sees a different part of the surfaces
        soil = truth(330_000.0 + (u + shift[0]) * 1.0, 4_443_000.0 + (v + shift[1]) * 0.9)
        k = u.size
        columns = {
            "sample_id": [f"{folder.name}-{j + 1:03d}" for j in range(k)],
            "x": np.round(fx + u, 2), "y": np.round(fy + v, 2),
            "ph": np.round(soil["ph"] + rng.normal(0, 0.08, k), 1),
            "total_p": np.round(soil["total_p"] * np.exp(rng.normal(0, 0.06, k)), 0),
            "mehlich3_p": np.round(soil["stp"] * np.exp(rng.normal(0, 0.10, k)), 1),
            "caco3": np.round(np.clip(soil["caco3"] + rng.normal(0, 0.15, k), 0, None), 1),
            "clay": np.round(soil["clay"] + rng.normal(0, 1.0, k), 0),
            "om": np.round(soil["om"] + rng.normal(0, 0.15, k), 1),
        }
        lines = [",".join(columns)]
        lines += [",".join(str(columns[c][j]) for c in columns) for j in range(k)]
        (folder / "samples.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    (fields / "batch.toml").write_text(
        f'[grid]\ncrs = "{CRS}"\ncell_size_m = {cell_size}\n\n[samples]\n'
        f'stp_method = "mehlich3_icp"\n\n[output]\nmaps = "none"\n', encoding="utf-8")
    return fields


def _noop() -> int:
    return os.getpid()


def spawn_seconds() -> float:
    """Wall time to start one spawned worker process and run a trivial task in it."""
    t0 = time.perf_counter()
    with cf.ProcessPoolExecutor(1, mp_context=multiprocessing.get_context("spawn")) as pool:
        pool.submit(_noop).result()
    return time.perf_counter() - t0


def timed_batch(fields: Path, out: Path, **kwargs):
    from pmap.batch import run_batch

    t0 = time.perf_counter()
    result = run_batch(fields, out, **kwargs)
    wall = time.perf_counter() - t0
    failed = [r for r in result.records if r["status"] != "done"]
    if failed:
        sys.exit(f"bench: {len(failed)} field(s) did not complete, e.g. {failed[0]['name']}: "
                 f"{failed[0]['error']}")
    return result, wall


def per_field(result, key: str) -> list[float]:
    return [r["timings"][key] for r in result.records if key in r["timings"]]


def first_imports(result) -> list[float]:
    """Import time of each worker's first field (a fresh process pays it)."""
    seen, out = set(), []
    for rec in result.records:
        if rec["worker"] not in seen:
            seen.add(rec["worker"])
            out.append(rec["timings"]["import"])
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--fields", type=int, default=200, help="number of fields (200)")
    parser.add_argument("--cell-size", type=float, default=5.0, help="cell size, m (5)")
    parser.add_argument("--picture-fields", type=int, default=3,
                        help="fields run with --maps all to time the pictures (3)")
    parser.add_argument("--repeats", type=int, default=2,
                        help="repeats of each maps setting for the picture times (2)")
    parser.add_argument("--no-dask", action="store_true", help="skip the Dask cluster runs")
    parser.add_argument("--dask", choices=("both", "defaults", "tuned"), default="both",
                        help="which Dask cluster settings to run (both)")
    parser.add_argument("--keep", type=Path, help="write everything here and keep it")
    args = parser.parse_args()
    sys.stdout.reconfigure(line_buffering=True)

    root = args.keep or Path(tempfile.mkdtemp(prefix="pmap-bench-batch-"))
    root.mkdir(parents=True, exist_ok=True)
    try:
        t0 = time.perf_counter()
        fields = write_fields(root, args.fields, args.cell_size)
        cells = int(round(SIDE_M / args.cell_size)) ** 2
        print(f"{args.fields} invented fields, {int(SIDE_M / SPACING_M) ** 2} samples and "
              f"{cells:,} cells each ({args.cell_size:g} m), written in "
              f"{time.perf_counter() - t0:.1f} s; {os.cpu_count()} CPUs")

        rates = {}
        one, wall1 = timed_batch(fields, root / "out-1", workers=1)
        rates["local, 1 worker"] = args.fields / wall1 * 60
        two, wall2 = timed_batch(fields, root / "out-2", workers=2)
        rates["local, 2 workers"] = args.fields / wall2 * 60
        dask_runs = {}
        if not args.no_dask:
            import dask
            from distributed import LocalCluster

            for name, options in DASK_VARIANTS.items():
                if args.dask not in ("both", name):
                    continue
                label = f"Dask LocalCluster, 2 workers ({name})"
                saved = dict(os.environ)  # a Nanny writes its pre-spawn-environ into ours
                with dask.config.set(options):
                    t = time.perf_counter()
                    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                      dashboard_address=None) as cluster:
                        cluster_s = time.perf_counter() - t
                        dask_runs[label], wall_d = timed_batch(
                            fields, root / f"out-dask-{len(dask_runs)}",
                            scheduler=cluster.scheduler_address)
                rates[label] = args.fields / wall_d * 60
                os.environ.clear()
                os.environ.update(saved)

        print("\nthroughput (wall time of run_batch: planning, runs, summary)")
        for label, rate in rates.items():
            print(f"  {label:<44} {rate:7.1f} fields/min")
        scaling = rates["local, 2 workers"] / rates["local, 1 worker"]
        print(f"  {'scaling 1 -> 2 local workers':<44} {scaling:7.2f}x")
        if not args.no_dask:
            print(f"  (Dask cluster start-up {cluster_s:.1f} s, not counted)")

        k = min(args.picture_fields, args.fields)
        subset = root / "pictures"
        for folder in sorted(p for p in fields.iterdir() if p.is_dir())[:k]:
            shutil.copytree(folder, subset / folder.name)
        shutil.copyfile(fields / "batch.toml", subset / "batch.toml")
        # Pictures: the same fields with maps none / overview / all, interleaved and
        # repeated, so that drift of the machine's speed falls on every setting alike.
        runs: dict[str, list[list[float]]] = {"none": [], "overview": [], "all": []}
        for rep in range(args.repeats):
            for maps in runs:
                result, _ = timed_batch(subset, root / f"out-maps-{maps}-{rep}", workers=1,
                                        maps=maps)
                runs[maps].append(per_field(result, "run"))

        def picture_s(maps: str) -> float:
            """Mean over fields of the median (over repeats) of run(maps) - run(none)."""
            per = [statistics.median(runs[maps][r][i] - runs["none"][r][i]
                                     for r in range(args.repeats)) for i in range(k)]
            return statistics.mean(per)

        run1 = per_field(one, "run")
        compute = statistics.mean(run1)
        spent = sum(per_field(one, "total"))
        print("\nper-field time (1 worker)")
        print(f"  spawn a worker process         {spawn_seconds():7.2f} s   (once per worker)")
        print(f"  import pmap in a fresh worker  {statistics.mean(first_imports(one)):7.2f} s"
              "   (once per worker)")
        print(f"  compute (run_field, maps none) {compute:7.2f} s   "
              f"(median {statistics.median(run1):.2f}, min {min(run1):.2f}, max {max(run1):.2f})")
        print(f"  pictures, maps = overview      {picture_s('overview'):7.2f} s   "
              f"(on {k} fields, {args.repeats} repeats)")
        print(f"  pictures, maps = all           {picture_s('all'):7.2f} s   "
              f"(on {k} fields, {args.repeats} repeats)")
        print(f"  batch share (plan, summary)    {(wall1 - spent) / args.fields:7.2f} s   "
              "(wall time less the fields' own time, per field)")
        two_run = statistics.mean(per_field(two, "run"))
        print(f"  compute with 2 workers         {two_run:7.2f} s   (per field, each worker)")
        for label, run in dask_runs.items():
            print(f"  compute on {label}: {statistics.mean(per_field(run, 'run')):.2f} s per "
                  "field, each worker")
    finally:
        if args.keep is None:
            shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main()
