"""Time and memory of pmap's ordinary kriging against pykrige on large target grids.

A plain script, not collected by pytest::

    PYTHONPATH=. python tests/benchmarks/bench_kriging.py [--sizes 250000 1000000]

150 random samples on a 1 km square, spherical variogram.  pykrige runs with
``backend='vectorized'``; it builds several (targets x samples) arrays at once, so the
grid is passed to it in blocks of ``--pykrige-block`` targets (default 250 000) to stay
within memory.  Each case runs twice: once timed, once under tracemalloc for the peak of
memory allocated by numpy/Python during the call.
"""

from __future__ import annotations

import argparse
import time
import tracemalloc

import numpy as np

from pmap.geostats.kriging import ordinary_kriging
from pmap.geostats.variogram import VariogramModel


def _pmap(coords, values, targets, model):
    res = ordinary_kriging(coords, values, targets, model)
    return res.estimate, res.variance


def _pykrige(coords, values, targets, model, block):
    from pykrige.ok import OrdinaryKriging

    ok = OrdinaryKriging(
        coords[:, 0], coords[:, 1], values, variogram_model=model.kind,
        variogram_parameters={"psill": model.psill, "range": model.range, "nugget": model.nugget},
    )
    est = np.empty(targets.shape[0])
    var = np.empty(targets.shape[0])
    for s in range(0, targets.shape[0], block):
        e = min(s + block, targets.shape[0])
        z, ss = ok.execute("points", targets[s:e, 0], targets[s:e, 1], backend="vectorized")
        est[s:e], var[s:e] = np.asarray(z), np.asarray(ss)
    return est, var


def _measure(func, *args):
    t0 = time.perf_counter()
    out = func(*args)
    seconds = time.perf_counter() - t0
    tracemalloc.start()
    func(*args)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return out, seconds, peak / 2**20


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[250_000, 1_000_000])
    parser.add_argument("--samples", type=int, default=150)
    parser.add_argument("--pykrige-block", type=int, default=250_000)
    args = parser.parse_args()

    rng = np.random.default_rng(0)
    coords = rng.random((args.samples, 2)) * 1000.0
    values = 20.0 + 5.0 * np.sin(coords[:, 0] / 200.0) + rng.normal(scale=1.0, size=args.samples)
    model = VariogramModel("spherical", nugget=1.0, psill=12.0, range=400.0)

    print(f"{args.samples} samples, spherical variogram; pykrige vectorized in blocks of {args.pykrige_block}")
    print(f"{'targets':>10} {'pmap s':>8} {'pykrige s':>10} {'ratio':>6} {'pmap MiB':>9} {'pykrige MiB':>12} {'max |diff|':>11}")
    for size in args.sizes:
        side = int(np.ceil(np.sqrt(size)))
        g = (np.arange(side) + 0.5) * (1000.0 / side)
        gx, gy = np.meshgrid(g, g)
        targets = np.column_stack([gx.ravel(), gy.ravel()])[:size]
        (pe, pv), p_s, p_mb = _measure(_pmap, coords, values, targets, model)
        (ke, kv), k_s, k_mb = _measure(_pykrige, coords, values, targets, model, args.pykrige_block)
        diff = max(np.abs(pe - ke).max(), np.abs(pv - kv).max())
        print(f"{size:>10} {p_s:>8.2f} {k_s:>10.2f} {k_s / p_s:>6.1f} {p_mb:>9.0f} {k_mb:>12.0f} {diff:>11.1e}")


if __name__ == "__main__":
    main()
