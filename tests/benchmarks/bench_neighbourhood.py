"""pmap's kriging against pykrige: local (k nearest) and global, time, memory and agreement.

A plain script, not collected by pytest::

    python tests/benchmarks/bench_neighbourhood.py            # every case
    python tests/benchmarks/bench_neighbourhood.py --quick    # smaller grids

Each case runs in its own child process, so the peak resident memory of one library
(read from ``getrusage``, minus the process's resident memory before the call) does not
count against the other.  Timings are the median of ``--repeats`` calls in that process
after one warm-up call (pmap's numba kernel is compiled and cached then; the compile time
of a cold cache is printed separately).  Predictions and variances are compared in the
parent: the largest absolute difference must stay below 1e-6.

Cases (random samples on a 1 km square, spherical variogram, targets a 1 m grid):

* local, k = 16 and 32, 10^4 and 5x10^4 samples -> 10^6 cells, with variance: pykrige
  ``backend="C"``, ``n_closest_points=k``.  At 5x10^4 samples pykrige builds all-pairs
  distances (about 20 GB) and is not run; pmap's figure is printed alone.
* global, 500 samples -> 40,000 cells and 2,000 samples -> 40,000 cells: pykrige
  ``backend="vectorized"`` (its fastest global backend here) and ``"C"``.

The flop count of the local solve is the arithmetic of a fresh factorisation per distinct
neighbour set (Cholesky ``k^3/3`` and two solves ``4 k^2``) and ``k^2 + 6 k`` per target, an
upper bound since most sets are updated from the previous one in O(k^2);
the machine's dense rate is a 2,000 x 2,000 matrix product timed in the same run.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

MODEL = {"nugget": 0.05, "psill": 1.0, "range": 300.0}


def _data(n: int, side: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    xy = rng.random((n, 2)) * 1000.0
    z = np.sin(xy[:, 0] / 200.0) + np.cos(xy[:, 1] / 150.0) + rng.normal(0.0, 0.2, n)
    g = (np.arange(side) + 0.5) * (1000.0 / side)
    gx, gy = np.meshgrid(g, g)
    return xy, z, np.column_stack([gx.ravel(), gy.ravel()])


def _rss_mib() -> float:
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * resource.getpagesize() / 2**20


def _child(lib: str, n: int, side: int, k: int, repeats: int, out: str) -> None:
    xy, z, t = _data(n, side)
    if lib == "pmap":
        from pmap.geostats.kriging import ordinary_kriging
        from pmap.geostats.variogram import VariogramModel

        model = VariogramModel("spherical", MODEL["nugget"], MODEL["psill"], MODEL["range"])

        def call():
            r = ordinary_kriging(xy, z, t, model, neighbours=k or None)
            return r.estimate, r.variance

        t0 = time.perf_counter()
        ordinary_kriging(xy[:50], z[:50], t[:10], model, neighbours=k or None)
        warm = time.perf_counter() - t0
    else:
        from pykrige.ok import OrdinaryKriging

        backend = lib.split("-")[1]
        ok = OrdinaryKriging(xy[:, 0], xy[:, 1], z, variogram_model="spherical",
                             variogram_parameters=MODEL)

        def call():
            kw = {"n_closest_points": k} if k else {}
            e, v = ok.execute("points", t[:, 0], t[:, 1], backend=backend, **kw)
            return np.asarray(e), np.asarray(v)

        warm = 0.0
    base = _rss_mib()
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        est, var = call()
        times.append(time.perf_counter() - t0)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    np.save(out + ".est.npy", est)
    np.save(out + ".var.npy", var)
    Path(out + ".json").write_text(json.dumps({
        "seconds": float(np.median(times)), "peak_mib": peak - base, "first_call": warm}))


def _run(lib: str, n: int, side: int, k: int, repeats: int, tmp: str,
         env: dict | None = None) -> dict | None:
    out = f"{tmp}/{lib}_{n}_{side}_{k}"
    proc = subprocess.run([sys.executable, __file__, "--child", lib, str(n), str(side), str(k),
                           str(repeats), out], capture_output=True, text=True, env=env)
    if proc.returncode != 0:
        print(f"  {lib} failed: {proc.stderr.strip().splitlines()[-1] if proc.stderr else ''}")
        return None
    res = json.loads(Path(out + ".json").read_text())
    res["est"] = np.load(out + ".est.npy")
    res["var"] = np.load(out + ".var.npy")
    return res


def _matmul_gflops() -> float:
    a = np.random.default_rng(1).random((2000, 2000))
    a @ a
    t0 = time.perf_counter()
    for _ in range(3):
        a @ a
    return 3 * 2 * 2000**3 / (time.perf_counter() - t0) / 1e9


def _local_flops(n_sets: int, m: int, k: int) -> float:
    return n_sets * (k**3 / 3 + 4 * k * k) + m * (k * k + 6 * k)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="250,000 cells instead of 10^6")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--child", nargs=6, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        lib, n, side, k, repeats, out = args.child
        _child(lib, int(n), int(side), int(k), int(repeats), out)
        return

    from pmap.geostats.neighbourhood import local_ordinary_kriging
    from pmap.geostats.variogram import VariogramModel

    side = 500 if args.quick else 1000
    rate = _matmul_gflops()
    print(f"machine: numpy 2000x2000 matmul {rate:.1f} GFLOP/s")
    with tempfile.TemporaryDirectory() as tmp:
        env = dict(os.environ, NUMBA_CACHE_DIR=f"{tmp}/numba-cache")
        cold = _run("pmap", 100, 10, 16, 1, tmp, env)
        warm = _run("pmap", 100, 10, 16, 1, tmp, env)
        if cold and warm:
            print(f"numba kernel, first call in a fresh process: {cold['first_call']:.1f} s "
                  f"with an empty cache (compiling), {warm['first_call']:.2f} s from the cache")
        print("\nlocal kriging, 1 km square, targets on a regular grid"
              f" ({side * side:,} cells), with variance")
        print(f"{'samples':>8} {'k':>3} {'pmap s':>7} {'pykrige C s':>12} {'ratio':>6} "
              f"{'pmap MiB':>9} {'pykrige MiB':>12} {'max |diff|':>11} {'GFLOP/s':>8}")
        for n in (10_000, 50_000):
            for k in (16, 32):
                p = _run("pmap", n, side, k, args.repeats, tmp)
                ref = _run("pykrige-C", n, side, k, 1, tmp) if n <= 10_000 else None
                if p is None:
                    continue
                xy, z, t = _data(n, side)
                stats = local_ordinary_kriging(
                    xy, z, t, VariogramModel("spherical", MODEL["nugget"], MODEL["psill"],
                                             MODEL["range"]), k)[3]
                gf = _local_flops(stats.distinct_sets, stats.targets, k) / p["seconds"] / 1e9
                if ref is not None:
                    diff = max(np.abs(p["est"] - ref["est"]).max(),
                               np.abs(p["var"] - ref["var"]).max())
                    print(f"{n:>8} {k:>3} {p['seconds']:>7.2f} {ref['seconds']:>12.2f} "
                          f"{ref['seconds'] / p['seconds']:>6.1f} {p['peak_mib']:>9.0f} "
                          f"{ref['peak_mib']:>12.0f} {diff:>11.1e} {gf:>8.2f}")
                else:
                    print(f"{n:>8} {k:>3} {p['seconds']:>7.2f} {'not run':>12} {'-':>6} "
                          f"{p['peak_mib']:>9.0f} {'(all pairs)':>12} {'-':>11} {gf:>8.2f}")
                print(f"{'':>12} distinct neighbour sets: {stats.distinct_sets:,} "
                      f"({stats.targets / max(stats.distinct_sets, 1):.1f} cells per set)")
        print("\nglobal kriging, 40,000 cells, with variance")
        print(f"{'samples':>8} {'pmap s':>7} {'vect. s':>8} {'C s':>7} {'ratio':>6} "
              f"{'pmap MiB':>9} {'vect. MiB':>10} {'mem ratio':>10} {'max |diff|':>11} "
              f"{'GFLOP/s':>8}")
        for n in (500, 2000):
            p = _run("pmap", n, 200, 0, args.repeats, tmp)
            v = _run("pykrige-vectorized", n, 200, 0, args.repeats, tmp)
            c = _run("pykrige-C", n, 200, 0, 1, tmp)
            if p is None or v is None:
                continue
            best = min(v["seconds"], c["seconds"] if c else np.inf)
            diff = max(np.abs(p["est"] - v["est"]).max(), np.abs(p["var"] - v["var"]).max())
            flops = n**3 / 3 + 40_000 * (n * n + 6 * n)
            print(f"{n:>8} {p['seconds']:>7.2f} {v['seconds']:>8.2f} "
                  f"{c['seconds'] if c else float('nan'):>7.2f} {best / p['seconds']:>6.1f} "
                  f"{p['peak_mib']:>9.0f} {v['peak_mib']:>10.0f} "
                  f"{p['peak_mib'] / max(v['peak_mib'], 1e-9):>10.2f} {diff:>11.1e} "
                  f"{flops / p['seconds'] / 1e9:>8.2f}")


if __name__ == "__main__":
    main()
