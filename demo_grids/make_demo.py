"""Write the committed demo inputs into this folder (deterministic; re-run after changing pmap.demo).

    python demo_grids/make_demo.py

The field, farm and values are invented: smooth analytic surfaces (pmap.demo.truth)
sampled on a jittered 100 m grid with lab-like noise from a fixed seed.
"""

from __future__ import annotations

from pathlib import Path

from pmap.demo import write_demo_inputs

if __name__ == "__main__":
    paths = write_demo_inputs(Path(__file__).resolve().parent)
    for name, path in paths.items():
        print(f"{name}: {path}")
