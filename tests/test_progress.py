"""Progress of long work on stderr: a live bar on a terminal, plain lines in a file or a pipe, nothing when
switched off (common practice of command-line tools: no terminal control codes in files or pipes)."""
from __future__ import annotations

import io

from dnmr.io import progress as progress_module
from dnmr.io.progress import ProgressReport, elapsed_text


class Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_plain_lines_when_not_a_terminal():
    stream = io.StringIO()
    with ProgressReport(None, stream) as report:
        task = report.add_task("fitting spectra", 3)
        for t in (250.0, 260.0, 270.0):
            report.advance(task, f"{t:g} K")
    lines = stream.getvalue().splitlines()
    assert lines == [f"fitting spectra: {i} of 3 done ({t} K), 0 s elapsed" for i, t in ((1, 250), (2, 260), (3, 270))]
    assert "\x1b" not in stream.getvalue()  # no terminal control codes in a file


def test_quiet_is_silent_on_a_terminal_and_off_it():
    for stream in (io.StringIO(), Terminal()):
        with ProgressReport(False, stream) as report:
            task = report.add_task("fitting spectra", 2)
            report.advance(task, "250 K")
            report.finish(task)
        assert stream.getvalue() == ""


def test_a_terminal_gets_the_bar_not_lines():
    stream = Terminal()
    with ProgressReport(None, stream) as report:
        assert report.bar is not None and not report.plain
        task = report.add_task("fitting spectra", 2)
        report.advance(task, "250 K")
        report.advance(task, "260 K")
    assert "2/2" in stream.getvalue() and "done (" not in stream.getvalue()


def test_many_small_steps_are_thinned(monkeypatch):
    clock = iter(float(i) for i in range(1000))
    monkeypatch.setattr(progress_module.time, "perf_counter", lambda: next(clock))
    stream = io.StringIO()
    with ProgressReport(None, stream) as report:
        task = report.add_task("global fit", unit="evaluations", interval_s=10.0)
        for _ in range(30):  # one step per clock tick (~2 s each with the reads in between)
            report.advance(task)
        report.finish(task)
    lines = stream.getvalue().splitlines()
    assert 3 <= len(lines) <= 8, lines  # a line every 10 s, not one per step
    assert lines[-1].startswith("global fit: finished after 30 evaluations, ")


def test_elapsed_text():
    assert [elapsed_text(s) for s in (4.4, 65, 3725)] == ["4 s", "1 min 05 s", "1 h 02 min"]


def test_work_in_batches_counts_on_in_one_task():
    # the coldest spectra are fitted a batch at a time: one count over the batches, not "1 of 1" each time
    stream = io.StringIO()
    with ProgressReport(None, stream) as report:
        for t in (230, 240):
            report.advance(report.add_task("slow-exchange spectra", 1), f"{t} K")
    assert [line.split(",")[0] for line in stream.getvalue().splitlines()] == [
        "slow-exchange spectra: 1 of 1 done (230 K)", "slow-exchange spectra: 2 of 2 done (240 K)"]


def test_simulate_reports_blocks_of_large_systems_only(capsys):
    from dnmr.io.progress import LARGE_SYSTEM_COHERENCES, block_progress

    with block_progress(True) as advance:
        advance(10, 20)  # a small system: nothing
    assert capsys.readouterr().err == ""
    n = LARGE_SYSTEM_COHERENCES
    with block_progress(True) as advance:
        advance(n, 2 * n)
        advance(2 * n, 2 * n)
    assert capsys.readouterr().err.splitlines()[-1].startswith(f"simulating: {2 * n} of {2 * n} coherences, ")
    with block_progress(False) as advance:  # --quiet
        advance(2 * n, 2 * n)
    assert capsys.readouterr().err == ""
