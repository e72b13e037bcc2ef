"""One field per task: :func:`run_task` runs a field from plain paths and returns a plain record.

The same function runs in a local worker process (``concurrent.futures``) and on a Dask
worker, so a task is a JSON-able dict (see :meth:`pmap.batch.plan.PlannedField.task`),
files are opened inside the task, and the result is a JSON-able dict.

- **Threads.** A batch runs one field per core, so each field's numerics run on one
  thread: the local pool starts its workers with ``OMP_NUM_THREADS``,
  ``OPENBLAS_NUM_THREADS``, ``MKL_NUM_THREADS`` and ``NUMBA_NUM_THREADS`` set to 1 before
  numpy is imported (:func:`thread_env`), and every task also limits the BLAS pools with
  threadpoolctl (when installed) and numba to one thread, which covers Dask workers
  started without those variables.
- **Logging.** Every line a field's run logs goes to its own log file with the field's
  name (``pmap[<field>]: ...``); its warnings are logged there too.
- **Stopping.** SIGTERM or SIGINT in a worker, or the stop event the local pool passes to
  :func:`init_worker`, interrupt the running field with :class:`FieldInterrupted`; its
  output transaction removes the staging folder and the field is recorded as cancelled.
"""

from __future__ import annotations

import _thread
import json
import logging
import os
import signal
import socket
import threading
import time
import traceback
import warnings
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from pathlib import Path
from typing import Any

__all__ = [
    "THREAD_VARS",
    "FieldInterrupted",
    "FieldFilter",
    "FieldFormatter",
    "field_logger",
    "thread_env",
    "one_thread_numerics",
    "init_worker",
    "run_task",
    "base_record",
]

#: Environment variables that size the numeric thread pools; 1 in batch workers.
THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS",
               "NUMBA_NUM_THREADS")

_LOG_FORMAT = "%(asctime)s %(levelname)s pmap[%(field)s]: %(message)s"


class FieldInterrupted(BaseException):
    """The batch was stopped (SIGTERM/SIGINT) while this field ran.

    A ``BaseException``, like ``KeyboardInterrupt``, so that no ``except Exception`` on the
    way swallows it; the pipeline's output transaction cleans up on it.
    """


# ---------------------------------------------------------------------------------------
# Logging with the field's name


class FieldFilter(logging.Filter):
    """Set ``record.field`` on every record; with ``thread``, pass only that thread's records.

    Parameters
    ----------
    field : str
        The field name to set where a record carries none.
    thread : int, optional
        ``threading.get_ident()`` of the thread whose records pass (a Dask worker may run
        several fields in threads of one process).
    """

    def __init__(self, field: str, thread: int | None = None):
        super().__init__()
        self.field = field
        self.thread = thread

    def filter(self, record: logging.LogRecord) -> bool:
        if not hasattr(record, "field"):
            record.field = self.field
        return self.thread is None or record.thread == self.thread


class FieldFormatter(logging.Formatter):
    """``pmap[<field>]: <message>``; records without a field are shown as ``pmap[batch]``."""

    def __init__(self, fmt: str = "pmap[%(field)s]: %(message)s", default: str = "batch"):
        super().__init__(fmt)
        self.default = default

    def format(self, record: logging.LogRecord) -> str:
        if not hasattr(record, "field"):
            record.field = self.default
        return super().format(record)


def field_logger(name: str, logger: str = "pmap.batch") -> logging.LoggerAdapter:
    """A logger whose every record carries ``field=name``."""
    return logging.LoggerAdapter(logging.getLogger(logger), {"field": name})


_LEVEL_LOCK = threading.Lock()
_LEVEL_USERS = [0, logging.NOTSET]  # tasks logging at INFO, the "pmap" level before them


@contextmanager
def _field_log(path: Path, name: str) -> Iterator[logging.LoggerAdapter]:
    """Send the ``pmap`` loggers' records of this thread to ``path`` (appended)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    handler = logging.FileHandler(path, mode="a", encoding="utf-8")
    handler.setFormatter(logging.Formatter(_LOG_FORMAT))
    handler.addFilter(FieldFilter(name, threading.get_ident()))
    root = logging.getLogger("pmap")
    with _LEVEL_LOCK:
        if _LEVEL_USERS[0] == 0:
            _LEVEL_USERS[1] = root.level
        _LEVEL_USERS[0] += 1
        if root.getEffectiveLevel() > logging.INFO:
            root.setLevel(logging.INFO)
    root.addHandler(handler)
    try:
        yield field_logger(name, "pmap.field")
    finally:
        root.removeHandler(handler)
        handler.close()
        with _LEVEL_LOCK:
            _LEVEL_USERS[0] -= 1
            if _LEVEL_USERS[0] == 0:
                root.setLevel(_LEVEL_USERS[1])


# ---------------------------------------------------------------------------------------
# Threads and worker start-up


@contextmanager
def thread_env() -> Iterator[None]:
    """Within the block, :data:`THREAD_VARS` are 1 in ``os.environ`` (restored afterwards).

    Processes started inside the block (the local pool's workers) inherit them, so their
    BLAS and numba pools are sized before numpy is first imported there.
    """
    saved = {k: os.environ.get(k) for k in THREAD_VARS}
    os.environ.update({k: "1" for k in THREAD_VARS})
    try:
        yield
    finally:
        for key, value in saved.items():
            if value is None:
                os.environ.pop(key, None)
            else:
                os.environ[key] = value


@contextmanager
def one_thread_numerics() -> Iterator[None]:
    """Numeric thread pools limited to one thread for the block (threadpoolctl, numba)."""
    import sys

    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # optional: the environment variables then do the job
        threadpool_limits = None
    numba = sys.modules.get("numba")
    before = None
    if numba is not None:
        try:
            before = numba.get_num_threads()
            numba.set_num_threads(1)
        except Exception:  # noqa: BLE001 - numba without a threading layer: nothing to limit
            before = None
    try:
        if threadpool_limits is not None:
            with threadpool_limits(limits=1):
                yield
        else:
            yield
    finally:
        if before is not None:
            numba.set_num_threads(before)


_STATE: dict[str, Any] = {"running": False, "stop": None, "event": None}


def _on_signal(signum: int, frame: Any) -> None:  # noqa: ARG001
    name = signal.Signals(signum).name
    _STATE["stop"] = name
    if _STATE["running"]:
        raise FieldInterrupted(f"stopped by {name}")


def _watch(event: Any) -> None:
    event.wait()
    _STATE["stop"] = _STATE["stop"] or "SIGTERM"
    if _STATE["running"]:
        _thread.interrupt_main(signal.SIGTERM)


def init_worker(stop_event: Any = None) -> None:
    """Initializer of the local pool's worker processes.

    Sets :data:`THREAD_VARS` to 1 (for anything imported later), turns SIGTERM and SIGINT
    into :class:`FieldInterrupted` in a running field (ignored between fields), and, with
    ``stop_event`` (a multiprocessing Event), interrupts the running field when it is set.
    """
    for key in THREAD_VARS:
        os.environ[key] = "1"
    signal.signal(signal.SIGTERM, _on_signal)
    signal.signal(signal.SIGINT, _on_signal)
    if stop_event is not None:
        _STATE["event"] = stop_event
        threading.Thread(target=_watch, args=(stop_event,), name="pmap-batch-stop",
                         daemon=True).start()


# ---------------------------------------------------------------------------------------
# The task


def base_record(task: Mapping[str, Any]) -> dict[str, Any]:
    """The record of a field before it runs: name, where it is, what the plan said."""
    return {
        "name": task["name"], "slug": task["slug"], "origin": task.get("origin", ""),
        "action": task.get("action", ""), "reasons": list(task.get("reasons", [])),
        "status": None, "error_type": None, "error": None,
        "out_dir": task.get("out_dir"), "log": task.get("log"),
        "samples": task.get("samples"), "boundary": task.get("boundary"),
        "config": task.get("config"),
        "worker": None, "timings": {}, "warnings": 0, "figures": {},
    }


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split()) or type(exc).__name__


def run_task(task: Mapping[str, Any]) -> dict[str, Any]:
    """Run one field of a batch; never raises for the field's own failure.

    Parameters
    ----------
    task : dict
        ``name``, ``slug``, ``samples``, ``boundary``, ``config`` (paths as strings),
        ``out_dir``, ``log``, ``overwrite`` (True when the plan found a previous output to
        replace), and ``action``/``reasons``/``origin`` for the record.

    Returns
    -------
    dict
        :func:`base_record` with ``status`` ("done", "failed" or "cancelled"),
        ``error_type`` and ``error`` (one line) on failure, ``worker`` (host:pid),
        ``timings`` (s: ``import``, ``run``, ``total``), the number of ``warnings`` and the
        key ``figures`` of the written summary.json.
    """
    started = time.perf_counter()
    record = base_record(task)
    record["worker"] = f"{socket.gethostname()}:{os.getpid()}"
    event = _STATE.get("event")
    if _STATE["stop"] or (event is not None and event.is_set()):
        record.update(status="cancelled", error_type="Cancelled",
                      error="not started: the batch was stopped")
        return record
    name = str(task["name"])
    with _field_log(Path(task["log"]), name) as flog:
        flog.info("run started in %s (%s: %s) -> %s", record["worker"],
                  task.get("action", "run"), "; ".join(task.get("reasons", [])),
                  task["out_dir"])
        try:
            _STATE["running"] = True
            if _STATE["stop"]:  # a signal that came just before the flag was set
                raise FieldInterrupted(f"stopped by {_STATE['stop']}")
            t0 = time.perf_counter()
            import pmap
            import pmap.pipeline  # noqa: F401 - timed: the start-up a fresh worker pays

            record["timings"]["import"] = time.perf_counter() - t0
            with one_thread_numerics():  # after the import: threadpoolctl limits loaded libraries
                t1 = time.perf_counter()
                with warnings.catch_warnings(record=True) as caught:
                    warnings.simplefilter("always")
                    try:
                        pmap.run_field(task["samples"], task["boundary"], task["out_dir"],
                                       task["config"], overwrite=bool(task.get("overwrite")))
                    finally:
                        for w in caught:
                            flog.warning("%s", " ".join(str(w.message).split()))
                        record["warnings"] = len(caught)
                record["timings"]["run"] = time.perf_counter() - t1
            _STATE["running"] = False
            record["status"] = "done"
        except (FieldInterrupted, KeyboardInterrupt) as exc:
            _STATE["running"] = False
            record.update(status="cancelled", error_type="Cancelled",
                          error=f"interrupted while running ({_one_line(exc)}); nothing was "
                          "published for this field")
            flog.warning("%s", record["error"])
        except BaseException as exc:  # noqa: BLE001 - a field's failure is recorded, not raised
            _STATE["running"] = False
            if _STATE["stop"]:  # the interrupt surfaced as another error (e.g. OutputError)
                record.update(status="cancelled", error_type="Cancelled",
                              error=f"interrupted while running ({_one_line(exc)})")
            else:
                record.update(status="failed", error_type=type(exc).__name__,
                              error=_one_line(exc))
            from pmap.errors import PmapError

            if isinstance(exc, PmapError):
                flog.error("failed: %s: %s", record["error_type"], record["error"])
            else:  # a crash: the traceback helps whoever reports it
                flog.error("failed: %s: %s\n%s", record["error_type"], record["error"],
                           "".join(traceback.format_exception(exc)).rstrip())
        finally:
            _STATE["running"] = False
        record["timings"]["total"] = time.perf_counter() - started
        if record["status"] == "done":
            record["figures"] = _figures(Path(task["out_dir"]))
            flog.info("done in %.1f s", record["timings"]["total"])
    return record


def _figures(out_dir: Path) -> dict[str, Any]:
    from pmap.batch.summary import field_figures

    try:
        summary = json.loads((out_dir / "summary.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return field_figures(summary)
