"""Run a batch: plan, run every field that needs it, record failures, write the summary.

The fields run one per task through the same function, :func:`pmap.batch.runner.run_task`,
either in local worker processes (``concurrent.futures.ProcessPoolExecutor``, spawned, one
field per process at a time, ``workers`` processes, default ``os.cpu_count()``) or on a
Dask cluster (``distributed.Client(address)`` or ``Client(scheduler_file=...)``,
``client.submit`` of the same function).  At most as many fields are in flight as there
are workers (local) or twice the cluster's worker threads (Dask); the rest wait here, so
stopping a batch never has to claw back queued work.

A field that fails is recorded with its error and the batch goes on.  A worker process
that dies (killed, out of memory) takes down the local pool: the fields it was running
are retried once in a fresh pool, then recorded as failed.

SIGTERM or SIGINT stop the batch gracefully: nothing more is submitted, the running fields
are interrupted (local workers; their output transactions remove what they staged; Dask
tasks are cancelled, and one already running may still publish its complete output), the
fields not run are recorded as ``cancelled``, and the summary is written.  A second signal
ends the process at once.
"""

from __future__ import annotations

import collections
import concurrent.futures as cf
import contextlib
import logging
import multiprocessing
import os
import signal
import sys
import threading
import time
import uuid
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any

from pmap.batch import runner
from pmap.batch.plan import STATE_DIR, BatchPlan, PlannedField, plan_batch, stage_inputs
from pmap.errors import ConfigError, OutputExistsError

__all__ = [
    "EXIT_FAILED",
    "EXIT_SIGNAL",
    "Progress",
    "ProgressPrinter",
    "BatchResult",
    "execute_tasks",
    "run_batch",
]

log = logging.getLogger("pmap.batch")

#: Exit code of a batch in which at least one field failed.
EXIT_FAILED = 1
#: Exit codes of a batch stopped by a signal (128 + the signal's number, as shells do).
EXIT_SIGNAL = {"SIGINT": 130, "SIGTERM": 143}

_POLL_S = 0.5  # how often the loop wakes to check for a stop and refresh the progress line


# ---------------------------------------------------------------------------------------
# Progress


@dataclass(frozen=True)
class Progress:
    """Where a batch stands; what a progress callback receives.

    ``record`` is the field that just finished (None for a refresh); ``eta_s`` the
    estimated seconds until the last field finishes (None until one has run).
    """

    total: int
    done: int
    failed: int
    skipped: int
    cancelled: int
    running: int
    remaining: int
    elapsed_s: float
    eta_s: float | None
    record: Mapping[str, Any] | None = None


def _duration(seconds: float | None) -> str:
    if seconds is None:
        return "--"
    seconds = max(0, int(round(seconds)))
    if seconds < 60:
        return f"{seconds} s"
    minutes, secs = divmod(seconds, 60)
    if minutes < 60:
        return f"{minutes} min {secs:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"


class ProgressPrinter:
    """Show a batch's progress on a stream (default stderr).

    On a terminal: one line, rewritten in place (done / failed / skipped / running /
    remaining, ETA).  Otherwise: one plain line per finished field.  No dependency.
    """

    def __init__(self, stream: IO[str] | None = None, tty: bool | None = None):
        self.stream = stream if stream is not None else sys.stderr
        self.tty = bool(tty if tty is not None else getattr(self.stream, "isatty", bool)())
        self._shown = False

    def _counts(self, p: Progress) -> str:
        finished = p.done + p.failed + p.skipped + p.cancelled
        return (f"{finished}/{p.total} finished: {p.done} done, {p.failed} failed, "
                f"{p.skipped} skipped" + (f", {p.cancelled} cancelled" if p.cancelled else "")
                + f"; {p.running} running, {p.remaining} remaining; ETA {_duration(p.eta_s)}")

    def __call__(self, p: Progress) -> None:
        if self.tty:
            self.stream.write("\r\x1b[Kpmap batch: " + self._counts(p))
            self._shown = True
        elif p.record is not None:
            rec = p.record
            took = (rec.get("timings") or {}).get("total")
            what = rec.get("status") + (f" in {took:.1f} s" if took else "")
            self.stream.write(f"pmap[{rec.get('name')}]: {what} ({self._counts(p)})\n")
        self.stream.flush()

    def clear(self) -> None:
        """Take the in-place line away (before a log line is written)."""
        if self.tty and self._shown:
            self.stream.write("\r\x1b[K")
            self.stream.flush()

    def close(self) -> None:
        """End the in-place line."""
        if self.tty and self._shown:
            self.stream.write("\n")
            self.stream.flush()
            self._shown = False


# ---------------------------------------------------------------------------------------
# Backends: local processes and Dask, the same task function


class _Local:
    """A spawn-context process pool; workers start with one-thread numerics."""

    kind = "local processes"

    def __init__(self, workers: int):
        self.workers = workers
        self._ctx = multiprocessing.get_context("spawn")
        self._event = self._ctx.Event()
        self._pool: cf.ProcessPoolExecutor | None = None
        self.generation = 0  # counts the pools: a break is handled once, for its own pool
        self._start()

    def _start(self) -> None:
        self._pool = cf.ProcessPoolExecutor(max_workers=self.workers, mp_context=self._ctx,
                                            initializer=runner.init_worker,
                                            initargs=(self._event,))

    @property
    def slots(self) -> int:
        return self.workers

    def submit(self, task: dict[str, Any]) -> Any:
        assert self._pool is not None
        with runner.thread_env():  # workers spawned now inherit one-thread numerics
            return self._pool.submit(runner.run_task, task)

    def wait(self, futures: Sequence[Any], timeout: float) -> set[Any]:
        done, _ = cf.wait(futures, timeout=timeout, return_when=cf.FIRST_COMPLETED)
        return set(done)

    @staticmethod
    def lost(exc: BaseException) -> bool:
        from concurrent.futures.process import BrokenProcessPool

        return isinstance(exc, BrokenProcessPool)

    def restart(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
        self.generation += 1
        self._start()

    def stop(self, futures: Sequence[Any]) -> None:  # noqa: ARG002
        self._event.set()

    def close(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None


class _Dask:
    """A Dask distributed client: the scheduler's workers run the fields."""

    kind = "Dask"
    generation = 0

    def __init__(self, scheduler: Any = None, scheduler_file: str | Path | None = None):
        try:
            import distributed
        except ImportError as exc:
            raise ConfigError("running on a Dask cluster needs dask.distributed: "
                              "pip install 'pmap[dask]'") from exc
        self._distributed = distributed
        self._own = not isinstance(scheduler, distributed.Client)
        try:
            if not self._own:
                self.client = scheduler
            elif scheduler_file is not None:
                self.client = distributed.Client(scheduler_file=str(scheduler_file))
            else:
                self.client = distributed.Client(scheduler)
        except (OSError, TimeoutError, ValueError) as exc:
            where = scheduler_file or scheduler
            raise ConfigError(f"cannot reach the Dask scheduler at {where}: {exc}") from exc
        self.kind = f"Dask ({self.client.scheduler.address})"

    @property
    def slots(self) -> int:
        return max(1, 2 * sum(self.client.nthreads().values()))

    def submit(self, task: dict[str, Any]) -> Any:
        key = f"pmap-field-{task['slug']}-{uuid.uuid4().hex[:8]}"
        return self.client.submit(runner.run_task, task, key=key, pure=False)

    def wait(self, futures: Sequence[Any], timeout: float) -> set[Any]:
        with contextlib.suppress(TimeoutError):
            self._distributed.wait(list(futures), timeout=timeout, return_when="FIRST_COMPLETED")
        return {f for f in futures if f.done()}

    @staticmethod
    def lost(exc: BaseException) -> bool:  # noqa: ARG004 - Dask retries lost workers itself
        return False

    def restart(self) -> None:  # pragma: no cover - never asked: lost() is False
        pass

    def stop(self, futures: Sequence[Any]) -> None:
        if futures:
            self.client.cancel(list(futures))

    def close(self) -> None:
        if self._own:
            self.client.close()


# ---------------------------------------------------------------------------------------
# The loop


@contextlib.contextmanager
def _stop_signals(stop: list[str]) -> Iterator[None]:
    """SIGTERM/SIGINT append their name to ``stop``; a second one acts as usual."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    saved = {s: signal.getsignal(s) for s in (signal.SIGTERM, signal.SIGINT)}

    def handler(signum: int, frame: Any) -> None:  # noqa: ARG001
        stop.append(signal.Signals(signum).name)
        signal.signal(signal.SIGTERM, signal.SIG_DFL)
        signal.signal(signal.SIGINT, signal.default_int_handler)

    for s in saved:
        signal.signal(s, handler)
    try:
        yield
    finally:
        for s, h in saved.items():
            signal.signal(s, h)


def _cancelled(task: Mapping[str, Any], why: str) -> dict[str, Any]:
    record = runner.base_record(task)
    record.update(status="cancelled", error_type="Cancelled", error=why)
    return record


def execute_tasks(
    tasks: Sequence[dict[str, Any]],
    *,
    workers: int | None = None,
    scheduler: Any = None,
    scheduler_file: str | Path | None = None,
    on_finish: Callable[[dict[str, Any], int, int], None] | None = None,
    on_tick: Callable[[int, int], None] | None = None,
) -> tuple[list[dict[str, Any]], str | None]:
    """Run ``tasks`` (one field each) and return their records and the stopping signal.

    Parameters
    ----------
    tasks : sequence of dict
        :meth:`pmap.batch.plan.PlannedField.task` dicts.
    workers : int, optional
        Local worker processes (default ``os.cpu_count()``, at most one per task).
    scheduler : str or distributed.Client, optional
        A Dask scheduler address (``tcp://host:8786``) or a connected client.
    scheduler_file : path, optional
        A Dask scheduler file (as ``dask scheduler --scheduler-file`` writes it).
    on_finish : callable, optional
        ``on_finish(record, running, waiting)`` after each field.
    on_tick : callable, optional
        ``on_tick(running, waiting)`` every half second.

    Returns
    -------
    records : list of dict
        One per task, in the order they finished.
    stopped : str or None
        "SIGTERM" or "SIGINT" when a signal stopped the batch.
    """
    if not tasks:
        return [], None
    if scheduler is not None or scheduler_file is not None:
        backend: _Local | _Dask = _Dask(scheduler, scheduler_file)
    else:
        n = workers if workers is not None else (os.cpu_count() or 1)
        if n < 1:
            raise ConfigError(f"workers must be at least 1, got {n}")
        backend = _Local(min(n, len(tasks)))
    log.info("running %d field(s) on %s", len(tasks), backend.kind)
    pending = collections.deque(tasks)
    inflight: dict[Any, dict[str, Any]] = {}
    born: dict[Any, int] = {}  # future -> the generation of the pool that runs it
    attempts: collections.Counter[str] = collections.Counter()
    records: list[dict[str, Any]] = []
    stop: list[str] = []

    def finish(record: dict[str, Any]) -> None:
        records.append(record)
        if on_finish is not None:
            on_finish(record, len(inflight), len(pending))

    try:
        with _stop_signals(stop):
            stopping = False
            while pending or inflight:
                if stop and not stopping:
                    stopping = True
                    log.warning("%s: stopping: no more fields are started, the running ones "
                                "are interrupted", stop[0])
                    backend.stop(list(inflight))
                    while pending:
                        finish(_cancelled(pending.popleft(),
                                          f"not started: the batch was stopped by {stop[0]}"))
                while not stopping and pending and len(inflight) < backend.slots:
                    task = pending.popleft()
                    try:
                        fut = backend.submit(task)
                    except BaseException as exc:  # noqa: BLE001 - the pool broke meanwhile
                        if not backend.lost(exc):
                            raise
                        pending.appendleft(task)
                        if inflight:  # they report the break, and the pool restarts then
                            break
                        backend.restart()
                        continue
                    inflight[fut] = task
                    born[fut] = backend.generation
                if not inflight:
                    continue
                done = backend.wait(list(inflight), _POLL_S)
                broken = False
                for fut in done:
                    task = inflight.pop(fut)
                    generation = born.pop(fut)
                    try:
                        record = fut.result()
                    except BaseException as exc:  # noqa: BLE001 - recorded per field
                        record = _lost_or_failed(backend, exc, task, attempts, pending,
                                                 stopping)
                        broken = broken or (backend.lost(exc)
                                            and generation == backend.generation)
                        if record is None:
                            continue
                    finish(record)
                if broken and not stopping and pending:
                    backend.restart()
                if on_tick is not None:
                    on_tick(len(inflight), len(pending))
    finally:
        backend.close()
    return records, (stop[0] if stop else None)


def _lost_or_failed(backend: Any, exc: BaseException, task: dict[str, Any],
                    attempts: collections.Counter[str], pending: collections.deque,
                    stopping: bool) -> dict[str, Any] | None:
    """The record of a task whose future raised; None when it goes back in the queue."""
    name = task["name"]
    if stopping:
        return _cancelled(task, "interrupted: the batch was stopped")
    if backend.lost(exc):
        attempts[task["slug"]] += 1
        if attempts[task["slug"]] < 2:
            runner.field_logger(name).warning(
                "the worker process died while this field ran (killed or out of memory?); "
                "trying the field once more in a fresh worker")
            pending.appendleft(task)
            return None
        message = ("the worker process died twice while this field ran (killed, or out of "
                   "memory: try fewer --workers)")
    else:
        message = " ".join(str(exc).split()) or type(exc).__name__
    record = runner.base_record(task)
    record.update(status="failed", error_type=type(exc).__name__, error=message)
    return record


# ---------------------------------------------------------------------------------------
# The batch


@dataclass
class BatchResult:
    """What :func:`run_batch` did.

    Attributes
    ----------
    plan : BatchPlan
        Every field and what the plan decided for it.
    records : list of dict
        One per field in the plan's order (empty for a dry run): ``name``, ``status``
        (``done``, ``skipped``, ``failed``, ``cancelled``), ``error_type``, ``error``,
        ``out_dir``, ``log``, ``timings``, ``figures``, ...
    stopped : str or None
        The signal that stopped the batch, if one did.
    files : dict
        Paths of ``batch_summary.csv`` (``csv``), ``.gpkg`` (``gpkg``) and ``index.html``
        (``index``); empty for a dry run.
    dry_run : bool
    """

    plan: BatchPlan
    records: list[dict[str, Any]] = field(default_factory=list)
    stopped: str | None = None
    files: dict[str, Path] = field(default_factory=dict)
    dry_run: bool = False

    def counts(self) -> dict[str, int]:
        """Fields per status (dry run: per planned action)."""
        if self.dry_run:
            return self.plan.counts()
        out = {s: 0 for s in ("done", "skipped", "failed", "cancelled")}
        for rec in self.records:
            out[rec["status"]] = out.get(rec["status"], 0) + 1
        return out

    @property
    def exit_code(self) -> int:
        """0 all done or skipped; 1 a field failed (dry run: would fail); 130/143 stopped."""
        if self.stopped:
            return EXIT_SIGNAL.get(self.stopped, EXIT_FAILED)
        if self.dry_run:
            return EXIT_FAILED if self.plan.counts()["invalid"] else 0
        return EXIT_FAILED if any(r["status"] != "done" and r["status"] != "skipped"
                                  for r in self.records) else 0


@contextlib.contextmanager
def _batch_lock(state: Path) -> Iterator[None]:
    """One ``pmap batch`` per output directory at a time (an advisory lock)."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX: the per-field locks still hold
        yield
        return
    state.mkdir(parents=True, exist_ok=True)
    path = state / "batch.lock"
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            holder = os.pread(fd, 64, 0).decode("ascii", "replace").strip() or "?"
            raise OutputExistsError(f"another pmap batch (pid {holder}) is running on "
                                    f"{state.parent}; wait for it or stop it") from None
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"{os.getpid()}\n".encode("ascii"), 0)
        yield
    finally:
        os.close(fd)


def _geometry_source(f: PlannedField) -> dict[str, Any]:
    cfg = f.config
    return {"boundary": str(f.boundary) if f.boundary else None,
            "crs": getattr(getattr(cfg, "grid", None), "crs", None),
            "feature": getattr(getattr(cfg, "field", None), "boundary_feature", None),
            "name_attribute": getattr(getattr(cfg, "field", None), "name_attribute", None)}


def _planned_record(f: PlannedField) -> dict[str, Any]:
    """The record of a field that is not run: skipped (done) or invalid (failed)."""
    rec = runner.base_record({**f.task(), "reasons": list(f.reasons)})
    if f.action == "done":
        rec["status"] = "skipped"
    else:
        rec.update(status="failed", error_type=f.error_type, error=f.error)
    return rec


class _Forward(logging.Handler):
    """Hand records at ``level`` or above to another logger's handlers."""

    def __init__(self, target: logging.Logger, level: int):
        super().__init__(level)
        self.target = target

    def emit(self, record: logging.LogRecord) -> None:
        self.target.handle(record)


def _file_log(path: Path) -> logging.Handler:
    path.parent.mkdir(parents=True, exist_ok=True)
    handler = logging.FileHandler(path, mode="a", encoding="utf-8")
    handler.setFormatter(runner.FieldFormatter(
        "%(asctime)s %(levelname)s pmap[%(field)s]: %(message)s"))
    handler.setLevel(logging.INFO)
    return handler


def run_batch(
    fields: str | Path,
    out_dir: str | Path,
    *,
    workers: int | None = None,
    scheduler: Any = None,
    scheduler_file: str | Path | None = None,
    dry_run: bool = False,
    maps: str | None = None,
    progress: bool | Callable[[Progress], None] | None = None,
) -> BatchResult:
    """Run many fields: every field of ``fields`` into ``out_dir/<safe name>/``.

    Parameters
    ----------
    fields : path
        A folder with one sub-folder per field, or a CSV/TOML table of fields (see
        :mod:`pmap.batch.plan` and docs/batch.md).
    out_dir : path
        The batch's output directory.  It receives one folder per field,
        ``batch_summary.csv``, ``batch_summary.gpkg`` (field polygons in EPSG:4326),
        ``index.html``, and ``.batch/`` (generated configs, split boundaries, logs:
        ``.batch/logs/<field>.log`` per field, ``.batch/batch.log``).
    workers : int, optional
        Local worker processes; default ``os.cpu_count()``.
    scheduler : str or distributed.Client, optional
        Run on a Dask cluster: its scheduler's address, or a connected client.
    scheduler_file : path, optional
        Run on a Dask cluster found through its scheduler file.
    dry_run : bool
        Only plan: the result's ``plan.describe()`` lists each field as new, changed
        (what changed) or done; nothing is written.
    maps : {"all", "overview", "none"}, optional
        Sets ``output.maps`` for every field (above every file).
    progress : bool or callable, optional
        True: a :class:`ProgressPrinter` on stderr; a callable receives :class:`Progress`.

    Returns
    -------
    BatchResult
        ``exit_code`` is 0 when every field is done or skipped, 1 when one failed, 130 or
        143 when SIGINT or SIGTERM stopped the batch.

    Raises
    ------
    ConfigError, InputError
        The batch as a whole is malformed (see :func:`pmap.batch.plan.plan_batch`), or both
        ``scheduler`` and ``scheduler_file`` (or ``workers``) are given.
    OutputExistsError
        Another ``pmap batch`` is running on ``out_dir``.
    """
    if scheduler is not None and scheduler_file is not None:
        raise ConfigError("give either a Dask scheduler address or a scheduler file, not both")
    if workers is not None and (scheduler is not None or scheduler_file is not None):
        raise ConfigError("workers sets the local processes; on a Dask cluster its workers "
                          "run the fields: leave workers out")
    out_dir = Path(out_dir)
    plan = plan_batch(fields, out_dir, maps=maps)
    try:
        if dry_run:
            return BatchResult(plan=plan, dry_run=True)
        state = out_dir / STATE_DIR
        with _batch_lock(state):
            return _run_plan(plan, out_dir, state, workers=workers, scheduler=scheduler,
                             scheduler_file=scheduler_file, progress=progress)
    finally:
        plan.close()


def _run_plan(plan: BatchPlan, out_dir: Path, state: Path, *, workers: int | None,
              scheduler: Any, scheduler_file: str | Path | None,
              progress: bool | Callable[[Progress], None] | None) -> BatchResult:
    printer: ProgressPrinter | None = None
    if progress is True:
        printer = ProgressPrinter()
        show: Callable[[Progress], None] | None = printer
    else:
        show = progress or None
    batch_log = logging.getLogger("pmap.batch")
    saved = (batch_log.level, batch_log.propagate)
    handlers = [_file_log(state / "batch.log"),
                _Forward(logging.getLogger("pmap"), batch_log.getEffectiveLevel())]
    batch_log.setLevel(logging.INFO)  # the batch log file records the decisions ...
    batch_log.propagate = False  # ... the console shows what the caller's level lets through
    for h in handlers:
        batch_log.addHandler(h)
    started = time.monotonic()
    by_slug: dict[str, dict[str, Any]] = {}
    counts = collections.Counter()
    total = len(plan.fields)
    run_times: dict[str, list[float]] = {"done": [], "failed": []}
    last_finish = [started]

    def eta(running: int, waiting: int) -> float | None:
        """Mean time of a finished run (done ones first: failures are mostly quick) times
        the fields left per busy worker, less the time since the last one finished."""
        times = run_times["done"] or run_times["failed"]
        if not times:
            return None
        if running + waiting == 0:
            return 0.0
        per_field = sum(times) / len(times)
        left = (running + waiting) / max(running, 1) * per_field
        return max(0.0, left - (time.monotonic() - last_finish[0]))

    def report(record: dict[str, Any] | None, running: int, waiting: int) -> None:
        if show is None:
            return
        finished = sum(counts.values())
        remaining = total - finished - running
        elapsed = time.monotonic() - started
        show(Progress(total=total, done=counts["done"], failed=counts["failed"],
                      skipped=counts["skipped"], cancelled=counts["cancelled"],
                      running=running, remaining=remaining, elapsed_s=elapsed,
                      eta_s=eta(running, waiting),
                      record=record))

    def finished(record: dict[str, Any], running: int = 0, waiting: int = 0) -> None:
        by_slug[record["slug"]] = record
        counts[record["status"]] += 1
        took = (record.get("timings") or {}).get("total")
        if record["status"] in run_times and took:  # ran in a worker (not skipped/invalid)
            run_times[record["status"]].append(took)
            last_finish[0] = time.monotonic()
        if printer is not None:
            printer.clear()
        flog = runner.field_logger(record["name"])
        if record["status"] == "failed":
            flog.error("failed: %s: %s", record["error_type"], record["error"])
        elif record["status"] == "cancelled":
            flog.warning("cancelled: %s", record["error"])
        else:
            flog.info("%s", record["status"])
        report(record, running, waiting)

    try:
        runs = []
        for f in plan.fields:
            flog = runner.field_logger(f.name)
            if f.action == "invalid":
                finished(_planned_record(f))
            elif f.action == "done":
                flog.info("skipped: %s", "; ".join(f.reasons))
                finished(_planned_record(f))
            else:
                flog.info("%s: %s", f.action, "; ".join(f.reasons))
                try:
                    stage_inputs(f)
                except OSError as exc:
                    rec = runner.base_record(f.task())
                    rec.update(status="failed", error_type="OutputError",
                               error=f"cannot write the field's inputs under {state}: {exc}")
                    finished(rec)
                    continue
                runs.append(f.task())
        plan.close()  # the staged split boundaries are installed: no temporary files left
        crash: BaseException | None = None
        stopped = None
        try:
            _, stopped = execute_tasks(  # every record also went through finished()
                runs, workers=workers, scheduler=scheduler, scheduler_file=scheduler_file,
                on_finish=lambda rec, running, waiting: finished(rec, running, waiting),
                on_tick=(lambda running, waiting: report(None, running, waiting))
                if printer is not None and printer.tty else None)
        except Exception as exc:  # the machinery failed: still say what became of each field
            crash = exc
            log.error("the batch stopped: %s: %s", type(exc).__name__, exc,
                      extra={"field": "batch"})
        if printer is not None:
            printer.close()
        ordered = []
        for f in plan.fields:
            rec = by_slug.get(f.slug)
            if rec is None:
                rec = runner.base_record(f.task())
                rec.update(status="failed", error_type=type(crash).__name__ if crash else None,
                           error=f"not run: the batch stopped ({crash})" if crash else "not run")
            rec["geometry_source"] = _geometry_source(f)
            ordered.append(rec)
        files = _write_summary(out_dir, ordered)
        if crash is not None:
            raise crash
        result = BatchResult(plan=plan, records=ordered, stopped=stopped, files=files)
        c = result.counts()
        log.info("%d field(s): %d done, %d skipped, %d failed, %d cancelled; summary in %s",
                 total, c["done"], c["skipped"], c["failed"], c["cancelled"],
                 files.get("csv"), extra={"field": "batch"})
        return result
    finally:
        if printer is not None:
            printer.close()
        for h in handlers:
            batch_log.removeHandler(h)
            h.close()
        batch_log.setLevel(saved[0])
        batch_log.propagate = saved[1]


def _write_summary(out_dir: Path, records: list[dict[str, Any]]) -> dict[str, Path]:
    from pmap.batch.summary import write_batch_summary

    return write_batch_summary(out_dir, records)
