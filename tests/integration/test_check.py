"""`pmap check`: every problem of a run in one list, nothing written, exit 0 when clean."""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pandas as pd
import pytest

from pmap.demo import write_demo_inputs
from pmap.preflight import check_field, exit_code


@pytest.fixture(scope="module")
def demo_inputs(tmp_path_factory):
    return write_demo_inputs(tmp_path_factory.mktemp("demo-inputs"))


def _check(*args, cwd):
    env = dict(os.environ, MPLBACKEND="Agg")
    return subprocess.run([sys.executable, "-m", "pmap", "check", *map(str, args)], cwd=cwd,
                          capture_output=True, text=True, env=env, timeout=300)


def test_clean_demo_passes_and_writes_nothing(demo_inputs, tmp_path):
    before = sorted(os.listdir(demo_inputs["samples"].parent))
    proc = _check(demo_inputs["samples"], "--boundary", demo_inputs["boundary"], "--config",
                  demo_inputs["config"], "--out", tmp_path / "out", "--json", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    problems = json.loads(proc.stdout)
    assert all(p["severity"] == "warning" for p in problems)
    assert sorted(os.listdir(demo_inputs["samples"].parent)) == before
    assert list(tmp_path.iterdir()) == []


def test_every_broken_file_is_listed_at_once(tmp_path):
    (tmp_path / "samples.csv").write_text("sample_id,latitude,longitude,ph\nA,40.1,-89.0,6.1\n")
    problems = check_field(tmp_path / "samples.csv", tmp_path / "missing.geojson",
                           out_dir=tmp_path / "out")
    errors = [p for p in problems if p.severity == "error"]
    stages = {p.stage for p in errors}
    assert {"boundary", "samples"} <= stages, problems
    assert any("missing.geojson" in p.message for p in errors)
    assert any("samples.csv" in p.message for p in errors)
    assert exit_code(problems) == 3


def test_rate_rule_problem_is_found_before_kriging(demo_inputs, tmp_path):
    table = pd.read_csv(demo_inputs["samples"]).rename(columns={"mehlich3_p": "olsen_p"})
    table.to_csv(tmp_path / "olsen.csv", index=False)
    problems = check_field(tmp_path / "olsen.csv", demo_inputs["boundary"])
    rates = [p for p in problems if p.stage == "rates"]
    assert rates and rates[0].severity == "error"
    assert "rates.critical_ppm" in rates[0].message
    assert exit_code(problems) == 2


def test_cli_exit_code_and_one_line_per_problem(tmp_path):
    (tmp_path / "samples.csv").write_text("not,a,table\n")
    proc = _check(tmp_path / "samples.csv", "--boundary", tmp_path / "nope.geojson", cwd=tmp_path)
    assert proc.returncode == 3
    lines = [line for line in proc.stdout.splitlines() if line.startswith("error:")]
    assert len(lines) >= 2
    assert "Traceback" not in proc.stderr


def test_exit_codes_follow_the_error_family_including_subclasses():
    from pmap.errors import (
        ConfigError,
        InputError,
        InsufficientDataError,
        ModelFitError,
        OutputError,
        OutputExistsError,
        exit_code_of,
    )
    from pmap.preflight import Problem

    # common practice, no source: pmap's documented exit codes (README)
    assert [exit_code_of(e("x")) for e in (ConfigError, InputError, InsufficientDataError,
                                           OutputExistsError, OutputError, ModelFitError)] == [
        2, 3, 3, 4, 4, 5]
    assert exit_code_of(RuntimeError("x")) == 1
    too_few = InsufficientDataError("ph: 10 samples")
    problems = [Problem("warning", "kriging om", "w"),
                Problem("error", "kriging ph", str(too_few), type(too_few).__name__,
                        exit_code_of(too_few))]
    assert exit_code(problems) == 3
