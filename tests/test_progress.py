"""Progress on stderr: a bar on a terminal (with or without a known width), plain lines otherwise."""

from __future__ import annotations

import io
from types import SimpleNamespace

import pytest

from foretell import progress
from foretell.progress import FALLBACK_WIDTH, PREFIX, shown, stage


class _Terminal(io.StringIO):
    """A terminal that reports no width (no file descriptor)."""

    def isatty(self) -> bool:
        return True


def test_how_progress_is_shown():
    pipe, terminal = io.StringIO(), _Terminal()
    assert [shown(p, pipe) for p in (True, None, False)] == ["lines", None, None]
    assert [shown(p, terminal) for p in (True, None, False)] == ["bar", "bar", None]


def test_plain_lines_name_the_step_and_what_is_done():
    pipe = io.StringIO()
    with stage("rt", "models sampled", 3, True, eta=False, every=0, stream=pipe) as bar:
        for model in ("count-0", "count-1", "none"):
            bar.detail(model)
            bar.advance()
    assert pipe.getvalue().splitlines() == [f"{PREFIX} rt: 1/3 models sampled (count-0)",
                                            f"{PREFIX} rt: 2/3 models sampled (count-1)",
                                            f"{PREFIX} rt: 3/3 models sampled (none)"]
    assert "\r" not in pipe.getvalue()  # no bar redraws in a log file


def test_plain_lines_come_at_most_every_few_seconds_and_always_at_the_end(monkeypatch):
    clock = iter([0.0, 1.0, 2.0, 30.0, 31.0])
    monkeypatch.setattr(progress, "time", SimpleNamespace(monotonic=lambda: next(clock)))
    pipe = io.StringIO()
    with stage("fit", "participants fitted", 4, True, stream=pipe) as bar:
        for _ in range(4):
            bar.advance()
    # started at 0; 1 s and 2 s are too soon, 30 s is not; the last always comes
    assert pipe.getvalue().splitlines() == [f"{PREFIX} fit: 3/4 participants fitted",
                                            f"{PREFIX} fit: 4/4 participants fitted"]


@pytest.mark.parametrize("eta", [True, False])
def test_a_terminal_without_a_width_still_gets_a_bar_and_an_eta_only_when_asked(eta):
    terminal = _Terminal()
    with stage("analysis", "steps done", 4, None, eta=eta, stream=terminal) as bar:
        bar.advance(2)
        bar.detail("rt")  # redraws at once
        text = terminal.getvalue()
    line = text.split("\r")[-1]
    assert "analysis: 2/4 steps done |" in line and "#" in line and line.endswith("rt]")
    assert len(line) == FALLBACK_WIDTH
    assert ("<" in line) is eta  # tqdm writes the time left after "<"


def test_nothing_is_shown_when_not_wanted():
    pipe = io.StringIO()
    with stage("fit", "participants fitted", 2, None, stream=pipe) as bar:
        bar.advance(2)
    assert pipe.getvalue() == ""
