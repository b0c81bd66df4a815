"""Progress output: a plain line at most every few seconds and no carriage return when not on a terminal."""

import io

from formread.cli import common


class _Clock:
    def __init__(self):
        self.t = 0.0

    def __call__(self):
        return self.t


def test_progress_without_a_terminal_is_plain_and_sparse(monkeypatch):
    clock = _Clock()
    monkeypatch.setattr(common.time, "monotonic", clock)
    out = io.StringIO()                               # not a terminal
    bar = common.ProgressBar("reading", unit="pages", stream=out)
    for i in range(1, 101):                           # 100 pages over 20 seconds
        clock.t = 0.2 * i
        bar(i, 100, review=i // 10)
    text = out.getvalue()
    assert "\r" not in text
    lines = text.splitlines()
    assert lines[-1].startswith("reading: 100/100, 5.0 pages/s") and "review 10" in lines[-1]
    assert len(lines) <= 20 / common._PLAIN_EVERY + 2     # at most one line every few seconds, and the last


def test_quiet_prints_nothing():
    out = io.StringIO()
    bar = common.ProgressBar("reading", stream=out, enabled=False)
    for i in range(10):
        bar(i + 1, 10)
    assert out.getvalue() == ""
