"""``views.progress``: a rich bar on a terminal, nothing (or one plain line) elsewhere."""

from __future__ import annotations

import io
import re

import pytest

from turnstamp.views.progress import is_terminal, progress

CONTROL = re.compile(r"\x1b\[[0-9;?]*[A-Za-z]")


class FakeTerminal(io.StringIO):
    """A text stream that says it is a terminal, and keeps what was drawn on it."""

    def isatty(self):
        return True


def test_not_a_terminal_gets_nothing_by_default():
    stream = io.StringIO()
    with progress("tagging", total=4, stream=stream) as advance:
        for _ in range(4):
            advance()
    assert stream.getvalue() == ""
    assert not is_terminal(stream) and is_terminal(FakeTerminal())


def test_not_a_terminal_gets_one_plain_line_when_asked():
    stream = io.StringIO()
    with progress("tagging", total=1000, stream=stream, summary=True) as advance:
        advance(400)
        advance(600)
    assert re.fullmatch(r"tagging: 1,000 of 1,000 done in \d+\.\d s\n", stream.getvalue())
    unknown = io.StringIO()
    with progress("reading", stream=unknown, summary=True) as advance:
        advance(2.5)
    assert re.fullmatch(r"reading: 2\.5 done in \d+\.\d s\n", unknown.getvalue())


def test_a_total_found_on_the_way_replaces_the_first():
    stream = io.StringIO()
    with progress("report", stream=stream, summary=True) as advance:
        advance(1, total=5)
        advance(4)
    assert stream.getvalue().startswith("report: 5 of 5 done")


def test_a_terminal_gets_a_rich_bar_that_counts():
    stream = FakeTerminal()
    with progress("tagging", total=4, stream=stream) as advance:
        for _ in range(4):
            advance()
    drawn = CONTROL.sub("", stream.getvalue())
    assert "tagging" in drawn and "4/4" in drawn
    assert "\x1b[?25l" in stream.getvalue()  # a live display (cursor hidden while drawn)


def test_an_error_in_the_block_goes_through_and_writes_no_summary():
    stream = io.StringIO()
    with pytest.raises(RuntimeError, match="broken"), \
            progress("tagging", total=2, stream=stream, summary=True) as advance:
        advance()
        raise RuntimeError("broken")
    assert stream.getvalue() == ""
    terminal = FakeTerminal()
    with pytest.raises(RuntimeError), progress("tagging", stream=terminal):
        raise RuntimeError("broken")
    assert "\x1b[?25h" in terminal.getvalue()  # the cursor is given back
