"""run_field obeys the caller's warning filters and still records every warning."""

from __future__ import annotations

import json
import warnings

import pandas as pd
import pytest

from pmap.config import load_config
from pmap.demo import write_demo_inputs
from pmap.errors import PmapWarning
from pmap.pipeline import run_field


@pytest.fixture(scope="module")
def far_sample_inputs(tmp_path_factory):
    """Demo inputs plus one sample 5 km away, which pmap leaves out with a warning."""
    paths = write_demo_inputs(tmp_path_factory.mktemp("inputs"))
    table = pd.read_csv(paths["samples"])
    far = table.iloc[[0]].copy()
    far["sample_id"] = "FAR-1"
    far["latitude"] = far["latitude"] + 0.05
    pd.concat([table, far]).to_csv(paths["samples"], index=False)
    config = load_config(paths["config"]).replace("grid", cell_size_m=20.0).replace("output", maps="none")
    return paths, config


def _pmap_warnings(records):
    return [w for w in records if issubclass(w.category, PmapWarning)]


def test_ignore_filter_hides_warnings_but_summary_keeps_them(far_sample_inputs, tmp_path):
    paths, config = far_sample_inputs
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        warnings.filterwarnings("ignore", category=PmapWarning)
        result = run_field(paths["samples"], paths["boundary"], tmp_path / "out", config)
    assert _pmap_warnings(seen) == []
    assert any("FAR-1" in text for text in result.warnings)
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert any("FAR-1" in text for text in summary["warnings"])


def test_default_filter_shows_each_warning_once(far_sample_inputs, tmp_path):
    paths, config = far_sample_inputs
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("default")
        result = run_field(paths["samples"], paths["boundary"], tmp_path / "out", config)
    shown = [str(w.message) for w in _pmap_warnings(seen)]
    assert sorted(shown) == sorted(result.warnings)
    assert sum("FAR-1" in text for text in shown) == 1


def test_error_filter_stops_the_run_before_any_output(far_sample_inputs, tmp_path):
    paths, config = far_sample_inputs
    out = tmp_path / "out"
    with warnings.catch_warnings():
        warnings.filterwarnings("error", category=PmapWarning)
        with pytest.raises(PmapWarning):
            run_field(paths["samples"], paths["boundary"], out, config)
    assert not out.exists()
    assert list(tmp_path.iterdir()) == [] or all(p.name.endswith(".lock") for p in tmp_path.iterdir())


def test_message_filter_matches_the_replayed_text(far_sample_inputs, tmp_path):
    paths, config = far_sample_inputs
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        warnings.filterwarnings("ignore", message=r".*outside the boundary", category=PmapWarning)
        result = run_field(paths["samples"], paths["boundary"], tmp_path / "out", config)
    shown = [str(w.message) for w in _pmap_warnings(seen)]
    assert not any("FAR-1" in text for text in shown)
    assert len(shown) == len(result.warnings) - 1
