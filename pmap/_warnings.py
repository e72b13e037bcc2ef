"""Collect a run's warnings for its record, then issue them under the caller's filters.

A run keeps every :class:`~pmap.errors.PmapWarning` for ``summary.json`` whatever the
caller's filters say, but what the caller sees obeys their filters: ``"ignore"`` hides a
warning, ``"error"`` turns it into an exception (raised when the collected warnings are
issued, before any output is written), ``"default"``/``"always"`` show it through
:func:`warnings.showwarning` as usual.
"""

from __future__ import annotations

import contextlib
import os
import sys
import warnings
from collections.abc import Iterator

from pmap.errors import PmapWarning

__all__ = ["collect_warnings", "issue_warnings"]


@contextlib.contextmanager
def collect_warnings() -> Iterator[list[warnings.WarningMessage]]:
    """Record every warning raised inside the block (all PmapWarnings, others per filters).

    Yields the list the records are appended to; nothing is shown inside the block.
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", PmapWarning)
        yield caught


def issue_warnings(caught: list[warnings.WarningMessage]) -> None:
    """Issue recorded warnings again, this time through the caller's warning filters."""
    modules = _modules_by_file()
    for w in caught:
        filename = w.filename or "<unknown>"
        warnings.warn_explicit(
            w.message, w.category, filename, w.lineno or 0,
            module=modules.get(os.path.abspath(filename)), registry={},
        )


def _modules_by_file() -> dict[str, str]:
    """Absolute source path -> module name, so module-based filters match the replay."""
    found = {}
    for name, module in list(sys.modules.items()):
        path = getattr(module, "__file__", None)
        if path:
            found[os.path.abspath(path)] = name
    return found
