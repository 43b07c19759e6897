"""The progress reporter: a bar on a terminal, plain lines in logs, nothing when quiet."""

from __future__ import annotations

import io

from workbench.progress import PLAIN_STEPS, Progress, format_duration


class Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_quiet_progress_prints_nothing():
    stream = io.StringIO()
    with Progress(10, "work", quiet=True, stream=stream) as bar:
        bar.advance(10, failed=2)
    assert stream.getvalue() == ""
    assert (bar.done, bar.failed) == (10, 2)


def test_log_output_is_plain_lines_with_counts_and_failures():
    stream = io.StringIO()
    with Progress(20, "calibration", stream=stream) as bar:
        for i in range(20):
            bar.advance(failed=int(i == 3))
    lines = stream.getvalue().splitlines()
    assert "\r" not in stream.getvalue()
    assert lines[0] == "calibration: 0/20 done"
    assert lines[-1].startswith("calibration: 20/20 done, 1 failed")
    # About one line per tenth of the work, not one per item.
    assert len(lines) <= PLAIN_STEPS + 2


def test_terminal_output_redraws_one_line_with_a_bar():
    stream = Terminal()
    with Progress(4, "fits", stream=stream) as bar:
        bar.advance(4)
    text = stream.getvalue()
    assert text.startswith("\rfits [")
    assert text.endswith("\n") and text.count("\n") == 1
    assert "4/4 done" in text


def test_resumed_items_count_towards_the_total_but_not_the_rate():
    bar = Progress(10, "calibration", quiet=True, done=6, failed=1)
    assert bar.eta() is None  # nothing new finished yet: no rate to extrapolate
    bar.advance()
    assert bar.eta() is not None
    assert bar.status().startswith("7/10 done, 1 failed")


def test_close_twice_prints_once():
    stream = io.StringIO()
    bar = Progress(2, "x", stream=stream)
    bar.advance(2)
    bar.close()
    bar.close()
    assert stream.getvalue().count("2/2 done") == 1


def test_durations_read_as_clock_time():
    assert format_duration(75) == "1:15"
    assert format_duration(3725) == "1:02:05"
