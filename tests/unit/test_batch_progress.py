"""The batch's progress display: one line rewritten in place on a terminal, plain lines else."""

from __future__ import annotations

import io

from pmap.batch.execute import Progress, ProgressPrinter


def _progress(done: int, failed: int = 0, record=None, eta=None) -> Progress:
    return Progress(total=5, done=done, failed=failed, skipped=1, cancelled=0, running=1,
                    remaining=5 - done - failed - 1 - 1, elapsed_s=12.0, eta_s=eta,
                    record=record)


def test_terminal_line_is_rewritten_in_place_and_ended_once():
    # common practice, no source: carriage return + erase-line (ANSI EL, ESC [ K)
    stream = io.StringIO()
    show = ProgressPrinter(stream, tty=True)
    show(_progress(1))
    show(_progress(2, eta=95.0, record={"name": "North", "status": "done"}))
    text = stream.getvalue()
    assert text.count("\r\x1b[Kpmap batch: ") == 2
    assert "\n" not in text  # the line is redrawn, never scrolled
    last = text.rsplit("\r\x1b[K", 1)[1]
    assert last == ("pmap batch: 3/5 finished: 2 done, 0 failed, 1 skipped; "
                    "1 running, 1 remaining; ETA 1 min 35 s")
    assert "ETA --" in text  # before a field has finished, no estimate
    show.clear()
    assert stream.getvalue().endswith("\r\x1b[K")
    show.close()
    assert stream.getvalue().endswith("\n")


def test_plain_stream_gets_one_line_per_finished_field():
    stream = io.StringIO()
    show = ProgressPrinter(stream, tty=False)
    show(_progress(1))  # a refresh without a finished field: nothing to say
    show(_progress(1, failed=1, record={"name": "Creek", "status": "failed",
                                        "timings": {"total": 3.04}}))
    show.clear()
    show.close()
    lines = stream.getvalue().splitlines()
    assert lines == ["pmap[Creek]: failed in 3.0 s (3/5 finished: 1 done, 1 failed, 1 skipped; "
                     "1 running, 1 remaining; ETA --)"]
    assert "\r" not in stream.getvalue()
