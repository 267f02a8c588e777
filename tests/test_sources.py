"""Inbox and archive sources: order, origins, positions, commit after the store, resume, pacing."""

from __future__ import annotations

import json
import os

import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from matcher.errors import InputError
from matcher.store import Store
from matcher.streams.codecs import NativeCodec
from matcher.streams.intake import decode_item, record
from matcher.streams.raw import positions_of
from matcher.streams.sources import ArchiveSource, InboxSource, Source, build_source, source_kinds
from matcher.timeconv import gps_to_unix, iso_to_gps
from streams_helpers import line, transient


def run_batch(store, source, items):
    """The loop's order: decode, store (with positions) in one transaction, then commit the source."""
    codec = NativeCodec()
    decoded = [decode_item(it, codec) for it in items]
    with store.transaction() as tx:
        for d in decoded:
            record(tx, d)
        tx.set_positions(source.name, positions_of(items))
    source.commit(decoded)
    return decoded


# ------------------------------------------------------------------------------ inbox
def test_registry():
    assert {"inbox", "archive"} <= set(source_kinds())


def test_inbox_order_origin_and_moves(tmp_path):
    box = tmp_path / "inbox"
    src = InboxSource("box", box)
    assert isinstance(src, Source)
    (box / "b.json").write_bytes(line(transient(tid="B")))
    (box / "a.json").write_bytes(line(transient(tid="A")))
    (box / "c.json").write_bytes(b"{not json")
    (box / ".d.json").write_bytes(b"{}")  # being written: hidden names never match
    (box / "e.txt").write_bytes(b"{}")  # other pattern
    items = src.poll(10)
    assert [os.path.basename(i.origin.where) for i in items] == ["a.json", "b.json", "c.json"]
    assert items[0].origin.kind == "inbox" and items[0].base_dir == str(box.resolve()) and items[0].position is None
    assert src.poll(10) == []  # in flight: not handed out twice
    store = Store(tmp_path / "s.sqlite")
    decoded = run_batch(store, src, items)
    assert sorted(p.name for p in (box / "done").iterdir()) == ["a.json", "b.json"]
    assert sorted(p.name for p in (box / "rejected").iterdir()) == ["c.json", "c.json.reason"]
    reason = (box / "rejected" / "c.json.reason").read_text()
    assert reason == decoded[2].reason + "\n" and "not valid JSON" in reason
    assert sorted(p.name for p in box.iterdir()) == [".d.json", "done", "e.txt", "rejected"]
    assert store.quarantined()[0].raw == b"{not json"
    store.close()


def test_inbox_crash_before_commit_rereads_and_dedups(tmp_path):
    box = tmp_path / "inbox"
    (box).mkdir()
    (box / "a.json").write_bytes(line(transient(tid="A")))
    store = Store(tmp_path / "s.sqlite")
    src = InboxSource("box", box)
    items = src.poll(10)
    codec = NativeCodec()
    with store.transaction() as tx:
        for it in items:
            record(tx, decode_item(it, codec))
    # Crash here: the store has the message, the file was never moved. A new process reads it again.
    src2 = InboxSource("box", box)
    again = src2.poll(10)
    assert [i.data for i in again] == [i.data for i in items]
    with store.transaction() as tx:
        assert record(tx, decode_item(again[0], codec)) is None  # already stored
    src2.commit([decode_item(again[0], codec)])
    assert (box / "done" / "a.json").exists() and store.counts()["messages"] == 1
    store.close()


def test_inbox_never_overwrites_in_done(tmp_path):
    box = tmp_path / "inbox"
    src = InboxSource("box", box)
    store = Store(tmp_path / "s.sqlite")
    for tid in ("A", "B"):
        (box / "x.json").write_bytes(line(transient(tid=tid)))
        run_batch(store, src, src.poll(10))
    assert sorted(p.name for p in (box / "done").iterdir()) == ["x.1.json", "x.json"]
    store.close()


def test_inbox_oversized_file_is_truncated_and_rejected(tmp_path):
    box = tmp_path / "inbox"
    src = InboxSource("box", box, max_bytes=2048)
    (box / "big.json").write_bytes(line(transient(note="x" * 10000)))
    (it,) = src.poll(1)
    assert it.truncated and it.size > 10000 and len(it.data) == 2049
    d = decode_item(it, NativeCodec(max_bytes=2048))
    assert "over the 2048-byte message limit" in d.reason


def test_inbox_settle_time(tmp_path):
    box = tmp_path / "inbox"
    now = [1e9]
    src = InboxSource("box", box, settle_s=5.0, clock=lambda: now[0])
    (box / "a.json").write_bytes(b"{}")
    os.utime(box / "a.json", (now[0] - 1, now[0] - 1))
    assert src.poll(10) == []
    now[0] += 10
    assert len(src.poll(10)) == 1


# ---------------------------------------------------------------------------- archive
def write_archive(path, lines, newline=b"\n"):
    path.write_bytes(b"".join((x if isinstance(x, bytes) else line(x)) + newline for x in lines))


def test_archive_lines_origins_and_positions(tmp_path):
    arc = tmp_path / "alerts.jsonl"
    write_archive(arc, [transient(tid="A"), b"", b"   ", transient(tid="B")], newline=b"\r\n")
    with ArchiveSource("arc", arc) as src:
        items = src.poll(10)
        assert src.finished
    assert [json.loads(i.data)["transient_id"] for i in items] == ["A", "B"]
    assert [i.origin.offset for i in items] == [1, 4]  # blank lines count, as in an editor
    assert str(items[1].origin) == f"{arc.resolve()} line 4"
    assert items[0].data == line(transient(tid="A"))  # without the CRLF
    assert items[0].base_dir == str(tmp_path.resolve())
    stream, token = items[-1].position
    assert stream == f"archive:{arc.resolve()}" and json.loads(token)["offset"] == arc.stat().st_size


def test_archive_received_at(tmp_path):
    arc = tmp_path / "a.jsonl"
    write_archive(arc, [transient(tid="A", received_at="2026-03-14T05:00:01Z"), transient(tid="B")])
    with ArchiveSource("arc", arc, wall_clock=lambda: 42.0) as src:
        a, b = src.poll(10)
    assert a.received_at == pytest.approx(gps_to_unix(iso_to_gps("2026-03-14T05:00:01Z")))
    assert b.received_at == 42.0  # no received_at: the time it was read


def test_archive_resume_after_a_kill(tmp_path):
    arc = tmp_path / "a.jsonl"
    write_archive(arc, [transient(tid=f"T{i}") for i in range(10)])
    store = Store(tmp_path / "s.sqlite")
    src = ArchiveSource("arc", arc)
    src.resume(store.positions("arc"))
    run_batch(store, src, src.poll(4))
    src.poll(3)  # read but never stored: the process is killed here
    src.close()
    src = ArchiveSource("arc", arc)
    src.resume(store.positions("arc"))
    rest = src.poll(100)
    src.close()
    assert [json.loads(i.data)["transient_id"] for i in rest] == [f"T{i}" for i in range(4, 10)]
    assert rest[0].origin.offset == 5
    run_batch(store, src, rest)
    assert store.counts()["messages"] == 10
    store.close()


def test_archive_resume_refuses_another_file(tmp_path):
    arc = tmp_path / "a.jsonl"
    write_archive(arc, [transient(tid=f"T{i}") for i in range(3)])
    with ArchiveSource("arc", arc) as src:
        positions = positions_of(src.poll(2))
    write_archive(arc, [transient(tid=f"X{i}") for i in range(3)])  # replaced, same length
    with ArchiveSource("arc", arc) as src, pytest.raises(InputError, match="first bytes differ"):
        src.resume(positions)
    arc.write_bytes(b"")
    with ArchiveSource("arc", arc) as src, pytest.raises(InputError, match="truncated"):
        src.resume(positions)
    with pytest.raises(InputError, match="cannot open"):
        ArchiveSource("arc", tmp_path / "missing.jsonl")


def test_archive_overlong_line(tmp_path):
    arc = tmp_path / "a.jsonl"
    write_archive(arc, [transient(tid="A", note="y" * 50000), transient(tid="B")])
    with ArchiveSource("arc", arc, max_bytes=4096) as src:
        big, small = src.poll(10)
    assert big.truncated and big.size == len(line(transient(tid="A", note="y" * 50000))) and len(big.data) == 4097
    assert small.origin.offset == 2 and json.loads(small.data)["transient_id"] == "B"


def test_archive_pacing_follows_received_at(tmp_path):
    arc = tmp_path / "a.jsonl"
    times = ["2026-03-14T05:00:00Z", "2026-03-14T05:00:10Z", "2026-03-14T05:00:10Z", "2026-03-14T05:00:40Z"]
    write_archive(arc, [transient(tid=f"T{i}", received_at=t) for i, t in enumerate(times)] + [transient(tid="U")])
    clock = [100.0]
    slept = []

    def sleep(dt):
        slept.append(dt)
        clock[0] += dt

    src = ArchiveSource("arc", arc, speed=10.0, clock=lambda: clock[0], sleep=sleep)
    assert [json.loads(i.data)["transient_id"] for i in src.poll(10, timeout_s=0)] == ["T0"]
    # At 10x, the next lines are due 1 s later (10 s of received_at); with no timeout, poll returns nothing.
    assert src.poll(10, timeout_s=0) == []
    got = src.poll(10, timeout_s=5)
    assert [json.loads(i.data)["transient_id"] for i in got] == ["T1", "T2"]
    assert clock[0] == pytest.approx(101.0)
    got = src.poll(10, timeout_s=5)  # T3 due at 104 s; U has no received_at and follows at once
    assert [json.loads(i.data)["transient_id"] for i in got] == ["T3", "U"]
    assert clock[0] == pytest.approx(104.0) and src.finished
    assert sum(slept) == pytest.approx(4.0)
    src.close()


def test_build_from_options(tmp_path):
    from matcher.streams.sources.archive import ArchiveOptions

    arc = tmp_path / "a.jsonl"
    write_archive(arc, [transient()])
    with build_source("archive", "arc", ArchiveOptions(arc), max_bytes=1000) as src:
        assert src.kind == "archive" and src.max_bytes == 1000 and len(src.poll()) == 1


_LINE = st.one_of(st.just(b""), st.just(b"  "), st.binary(max_size=40).map(lambda b: b.replace(b"\n", b"").replace(b"\r", b"")),
                  st.text(max_size=20).map(lambda t: line({"v": t})))


@settings(max_examples=60, deadline=None)
@given(lines=st.lists(_LINE, max_size=25), split=st.integers(0, 30), crlf=st.booleans(), last_newline=st.booleans())
@example(lines=[b"a", b"", b"b"], split=1, crlf=True, last_newline=False)
def test_archive_resume_at_any_point_reads_the_rest_exactly(tmp_path_factory, lines, split, crlf, last_newline):
    """Reading k items, then resuming from the last item's position, gives exactly the full read."""
    arc = tmp_path_factory.mktemp("arc") / "a.jsonl"
    nl = b"\r\n" if crlf else b"\n"
    arc.write_bytes(nl.join(lines) + (nl if last_newline and lines else b""))
    with ArchiveSource("arc", arc, max_bytes=1024) as src:
        full = [(i.data, i.origin.offset) for i in src.poll(1000)]
    assert [d for d, _ in full] == [x for x in lines if x.strip()]
    with ArchiveSource("arc", arc, max_bytes=1024) as src:
        head = src.poll(split)
    with ArchiveSource("arc", arc, max_bytes=1024) as src:
        src.resume(positions_of(head))
        tail = src.poll(1000)
    assert [(i.data, i.origin.offset) for i in head + tail] == full
