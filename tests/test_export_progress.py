"""The terminal progress bar: drawn for a person at a terminal, silent otherwise."""

import io

from swarmaudit.app.progress import Progress


class FakeTTY(io.StringIO):
    def isatty(self):
        return True


def test_bar_is_drawn_on_a_terminal_and_cleared_at_the_end():
    s = FakeTTY()
    with Progress(4, "export", stream=s) as bar:
        bar.step("census")
        bar.step("views", 2)
        mid = s.getvalue()
        assert "\r" in mid and "3/4" in mid and "views" in mid
    # the last write blanks the line so the summary starts clean
    assert s.getvalue().endswith("\r")


def test_no_bar_when_stderr_is_not_a_terminal():
    s = io.StringIO()
    with Progress(3, "export", stream=s) as bar:
        bar.step("a")
        bar.step("b")
    assert s.getvalue() == ""


def test_quiet_means_no_bar_even_on_a_terminal():
    s = FakeTTY()
    with Progress(3, "export", stream=s, enabled=False) as bar:
        bar.step("a")
    assert s.getvalue() == ""


def test_steps_never_run_past_the_total():
    s = FakeTTY()
    bar = Progress(2, "x", stream=s)
    bar.step(n=5)
    assert bar.done == 2
    bar.add(3)
    bar.step()
    assert (bar.done, bar.total) == (3, 5)
    bar.close()
