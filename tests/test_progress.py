"""Progress feedback: plain lines when not on a terminal, a rich bar on one, nothing when off."""

from __future__ import annotations

import io
import re

import pytest

from matcher.errors import InputError
from matcher.report.progress import choose_mode, format_duration, format_rate, progress, track


class FakeClock:
    def __init__(self):
        self.t = 100.0

    def __call__(self):
        return self.t


class TTY(io.StringIO):
    def isatty(self):
        return True


def test_auto_mode_follows_the_stream_and_the_environment():
    assert choose_mode("auto", TTY(), environ={"TERM": "xterm-256color"}) == "bar"
    assert choose_mode("auto", TTY(), environ={"TERM": "dumb"}) == "lines"
    assert choose_mode("auto", io.StringIO(), environ={}) == "lines"
    assert choose_mode("auto", object(), environ={}) == "lines"  # no isatty at all
    assert choose_mode("auto", TTY(), environ={"MATCHER_PROGRESS": "off"}) == "off"
    assert choose_mode("auto", io.StringIO(), environ={"MATCHER_PROGRESS": "bar"}) == "bar"
    assert choose_mode("lines", TTY(), environ={"MATCHER_PROGRESS": "bar"}) == "lines"  # explicit wins
    with pytest.raises(InputError, match="MATCHER_PROGRESS='loud': use bar, lines or off"):
        choose_mode("auto", TTY(), environ={"MATCHER_PROGRESS": "loud"})
    with pytest.raises(InputError, match="progress mode 'fancy' is not one of"):
        choose_mode("fancy", TTY())


def test_lines_at_start_every_interval_and_end():
    clock, out = FakeClock(), io.StringIO()
    with progress("indexing", total=100, unit="rows", mode="lines", stream=out, every_s=10, clock=clock) as p:
        for _ in range(10):
            clock.t += 3.0
            p.advance(10)
        assert p.completed == 100 and p.rate_per_s == pytest.approx(100 / 30)
    assert out.getvalue().splitlines() == [
        "indexing: started (100 rows)",
        "indexing: 40/100 rows (40.0%), 3.33 rows/s, 12.0 s elapsed, about 18.0 s left",
        "indexing: 80/100 rows (80.0%), 3.33 rows/s, 24.0 s elapsed, about 6.0 s left",
        "indexing: done, 100 rows in 30.0 s (3.33 rows/s)",
    ]


def test_lines_without_a_total_and_notes():
    clock, out = FakeClock(), io.StringIO()
    with progress("replaying", unit="msg", mode="lines", stream=out, every_s=5, clock=clock) as p:
        clock.t += 6.0
        p.advance(1200)
        p.note("caught up with the archive")
    assert out.getvalue().splitlines() == [
        "replaying: started",
        "replaying: 1,200 msg, 200 msg/s, 6.0 s elapsed",
        "replaying: caught up with the archive",
        "replaying: done, 1,200 msg in 6.0 s (200 msg/s)",
    ]


def test_an_error_stops_with_a_last_line_and_propagates():
    clock, out = FakeClock(), io.StringIO()
    with pytest.raises(KeyError):
        with progress("tuning", total=10, mode="lines", stream=out, clock=clock) as p:
            clock.t += 2.0
            p.advance(3)
            raise KeyError("x")
    assert out.getvalue().splitlines()[-1] == "tuning: stopped after 3 items in 2.0 s (KeyError)"


def test_track_counts_items_and_a_break_is_a_normal_end():
    clock, out = FakeClock(), io.StringIO()
    seen = []
    for x in track(list(range(20)), "bench", unit="runs", mode="lines", stream=out, clock=clock):
        clock.t += 1.0
        seen.append(x)
        if x == 4:
            break
    assert seen == [0, 1, 2, 3, 4]
    lines = out.getvalue().splitlines()
    assert lines[0] == "bench: started (20 runs)"  # total from len()
    assert lines[-1] == "bench: done, 4 runs in 5.0 s (0.80 runs/s)"


def test_track_of_a_generator_has_no_total():
    out = io.StringIO()
    assert list(track((i for i in range(3)), "gen", mode="lines", stream=out)) == [0, 1, 2]
    assert out.getvalue().splitlines()[0] == "gen: started"


def test_off_writes_nothing_but_counts():
    out = io.StringIO()
    with progress("quiet", total=5, mode="off", stream=out) as p:
        p.advance(5)
        p.note("not shown")
    assert out.getvalue() == "" and p.completed == 5


def test_bar_on_a_terminal_shows_counts_rate_and_percentage(monkeypatch):
    monkeypatch.setenv("TERM", "xterm-256color")  # "auto" must see a capable terminal
    monkeypatch.delenv("MATCHER_PROGRESS", raising=False)
    monkeypatch.setenv("COLUMNS", "120")
    clock, out = FakeClock(), TTY()
    for _ in track(range(50), "replaying", unit="msg", stream=out, clock=clock):
        clock.t += 0.1  # 10 msg/s on the fake clock
    text = re.sub(r"\x1b\[[0-9;?]*[A-Za-z]", "", out.getvalue())  # drop ANSI colour and cursor codes
    final = text.replace("\r", "\n").strip().splitlines()[-1]
    assert final.startswith("replaying")
    assert "50/50 msg" in final and "100%" in final and "10.0 msg/s" in final
    assert "━" in final  # the bar itself


def test_bar_note_and_total_change():
    clock, out = FakeClock(), TTY()
    with progress("indexing", unit="rows", mode="bar", stream=out, clock=clock) as p:
        p.set_total(4)
        clock.t += 1.0
        p.advance(4)
        p.note("saved index")
    text = re.sub(r"\x1b\[[0-9;?]*[A-Za-z]", "", out.getvalue())
    assert "indexing: saved index" in text and "4/4 rows" in text


def test_bad_arguments():
    with pytest.raises(InputError, match="total=-1 must be >= 0"):
        with progress("x", total=-1, mode="off"):
            pass
    with pytest.raises(InputError, match="every_s=0 must be > 0"):
        with progress("x", every_s=0, mode="off"):
            pass
    with pytest.raises(InputError, match=r"advance\(-2\) must not be negative"):
        with progress("x", mode="off") as p:
            p.advance(-2)


@pytest.mark.parametrize("seconds, text", [(0.04, "0.0 s"), (12.34, "12.3 s"), (65, "1 min 05 s"),
                                           (3599.4, "59 min 59 s"), (7620, "2 h 07 min"), (float("nan"), "?")])
def test_format_duration(seconds, text):
    assert format_duration(seconds) == text


@pytest.mark.parametrize("rate, text", [(4211.7, "4,212 msg/s"), (42.11, "42.1 msg/s"), (0.254, "0.25 msg/s")])
def test_format_rate(rate, text):
    assert format_rate(rate, "msg") == text
