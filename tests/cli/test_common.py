"""Shared command-line pieces: the count progress line the demo and export commands write."""

import io

from modescope.app.cli.common import CountProgress


class _Tty(io.StringIO):
    def isatty(self):
        return True


def test_log_stream_gets_one_line_per_tenth():
    out = io.StringIO()
    p = CountProgress(out, "export", "files")
    for done in range(0, 101):
        p(done, 100)
    lines = out.getvalue().splitlines()
    assert lines[0] == "export: 0/100 files" and lines[-1] == "export: 100/100 files"
    assert len(lines) == 11                      # 0, 10, ..., 100


def test_terminal_rewrites_one_line_and_ends_it():
    out = _Tty()
    p = CountProgress(out, "demo", "frames")
    for done in range(1, 6):
        p(done, 5)
    text = out.getvalue()
    assert text.startswith("\rdemo: 1/5 frames") and text.endswith("\rdemo: 5/5 frames\n")
    assert text.count("\n") == 1


def test_zero_total_does_not_divide_by_zero():
    out = io.StringIO()
    CountProgress(out, "export", "files")(0, 0)
    assert out.getvalue() == "export: 0/0 files\n"
