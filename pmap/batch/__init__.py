"""Many fields in one command: ``pmap batch``, on local processes or a Dask cluster.

::

    import pmap.batch
    result = pmap.batch.run_batch("fields/", "out/", workers=4)
    result.exit_code      # 0 all done or skipped, 1 a field failed, 130/143 stopped
    result.files["csv"]   # out/batch_summary.csv

The subpackage's modules, one idea each: :mod:`~pmap.batch.plan` (discovery, config
layering, hashes, what to run), :mod:`~pmap.batch.runner` (one field per task, plain in
and out), :mod:`~pmap.batch.execute` (local processes or Dask, failures, signals,
progress; :func:`run_batch`) and :mod:`~pmap.batch.summary` (CSV, GeoPackage, index page).
See docs/batch.md.
"""

from __future__ import annotations

from pmap.batch.execute import (
    EXIT_FAILED,
    EXIT_SIGNAL,
    BatchResult,
    Progress,
    ProgressPrinter,
    execute_tasks,
    run_batch,
)
from pmap.batch.plan import (
    BATCH_TOML,
    FIELD_TOML,
    STATE_DIR,
    BatchPlan,
    FieldEntry,
    PlannedField,
    discover_fields,
    plan_batch,
    safe_name,
)
from pmap.batch.runner import FieldFilter, FieldFormatter, field_logger, run_task
from pmap.batch.summary import field_figures, summary_table, write_batch_summary

__all__ = [
    "run_batch",
    "BatchResult",
    "plan_batch",
    "BatchPlan",
    "PlannedField",
    "FieldEntry",
    "discover_fields",
    "safe_name",
    "execute_tasks",
    "run_task",
    "Progress",
    "ProgressPrinter",
    "FieldFilter",
    "FieldFormatter",
    "field_logger",
    "field_figures",
    "summary_table",
    "write_batch_summary",
    "BATCH_TOML",
    "FIELD_TOML",
    "STATE_DIR",
    "EXIT_FAILED",
    "EXIT_SIGNAL",
]
