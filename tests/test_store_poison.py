"""Poison input mixed into a good stream: every bad kind is quarantined exactly once,
byte-identical, with its origin and reason; every good message is stored; nothing stops.
Run through the archive (twice: a replay adds nothing) and through the inbox."""

from __future__ import annotations

import base64
import json

import numpy as np

from matcher.sky import flat_fits_bytes
from matcher.store import Store
from matcher.streams.codecs import NativeCodec
from matcher.streams.intake import decode_item, record
from matcher.streams.localization import LocalizationLimits
from matcher.streams.raw import positions_of
from matcher.streams.sources import ArchiveSource, InboxSource
from streams_helpers import gw, line, tiny_map_bytes, transient

LIMITS = LocalizationLimits(max_bytes=10_000)  # the tiny map (8640 bytes) fits; the big one does not


def poison_and_good(folder):
    """(name, raw bytes, expected words in the reason or None for good), in stream order."""
    (folder / "map.fits").write_bytes(tiny_map_bytes())
    (folder / "big.fits").write_bytes(flat_fits_bytes(np.full(12 * 16 ** 2, 1 / (12 * 16 ** 2)), nest=True))
    (folder / "junk.fits").write_bytes(b"not a FITS file" * 10)
    b64 = base64.b64encode(tiny_map_bytes()).decode()
    cases = [
        ("good-gw", line(gw(event_id="EV-P1")), None),
        ("good-tr", line(transient(tid="TR-OK-1")), None),
        ("malformed", b'{"schema": "matcher/1", "type": "transient", "transient_id": "TR-BAD-1",', "not valid JSON"),
        ("wrong-type", line(transient(tid="TR-BAD-2", ra="ten")), "ra_deg must be a number"),
        ("schema", line({**transient(tid="TR-BAD-3"), "schema": "matcher/0"}), "schema must be 'matcher/1'"),
        ("dec-range", line(transient(tid="TR-BAD-4", dec=-91.0)), "dec_deg must be >= -90.0"),
        ("nan", line(transient(tid="TR-BAD-5")).replace(b'"ra_deg":150.25', b'"ra_deg":NaN'), "must be finite"),
        ("good-tr2", line(transient(tid="TR-OK-2", ra=151.0)), None),
        ("no-map", line(gw(event_id="EV-P2", localization="missing.fits")), "cannot read"),
        ("big-map", line(gw(event_id="EV-P3", localization="big.fits")), "over the 10000-byte limit"),
        ("junk-map", line(gw(event_id="EV-P4", localization="junk.fits")), "localization"),
        ("url", line(gw(event_id="EV-P5", localization={"url": "https://maps.example.org/x.fits"})),
         "not in limits.url_allow_list"),
        ("bad-b64", line(gw(event_id="EV-P6", localization={"fits_base64": "@@@@"})), "not valid base64"),
        ("good-b64", line(gw(event_id="EV-P7", localization={"fits_base64": b64})), None),
        ("withdrawn", line(gw(event_id="EV-P1", revision=2, state="withdrawn", localization=None)), None),
    ]
    return cases


def drain(store, source, codec, batch=4):
    """The loop's order for each batch: decode, one store transaction with positions, then commit."""
    n = 0
    while True:
        items = source.poll(batch)
        if not items:
            return n
        decoded = [decode_item(it, codec, LIMITS) for it in items]
        with store.transaction() as tx:
            for d in decoded:
                record(tx, d)
            tx.set_positions(source.name, positions_of(items))
        source.commit(decoded)
        n += len(items)


def check_store(store, cases, origin_of):
    bad = [c for c in cases if c[2] is not None]
    good = [c for c in cases if c[2] is None]
    q = store.quarantined()
    assert len(q) == len(bad)
    by_raw = {row.raw: row for row in q}
    for name, raw, words in bad:
        row = by_raw[raw]  # byte-identical
        assert words in row.reason, (name, row.reason)
        assert row.origin == origin_of(name) and row.codec == "native"
    assert store.counts()["messages"] == len(good)
    assert store.current_revision("EV-P1").alert.state == "withdrawn"
    assert [r.alert.event_id for r in store.active_events()] == ["EV-P7"]
    assert {t.report.transient_id for t in store.transients_between(-1e12, 1e12)} == {"TR-OK-1", "TR-OK-2"}


def test_poison_through_the_archive_and_a_replay_adds_nothing(tmp_path):
    cases = poison_and_good(tmp_path)
    arc = tmp_path / "stream.jsonl"
    arc.write_bytes(b"".join(raw + b"\n" for _, raw, _ in cases))
    lines_of = {name: i + 1 for i, (name, _, _) in enumerate(cases)}
    store = Store(tmp_path / "state" / "s.sqlite")
    codec = NativeCodec()
    with ArchiveSource("arc", arc) as src:
        src.resume(store.positions("arc"))
        assert drain(store, src, codec) == len(cases)
    check_store(store, cases, lambda name: f"{arc.resolve()} line {lines_of[name]}")
    before = store.counts()
    # Replay again: from the stored position (nothing left), and from the start (all duplicates).
    with ArchiveSource("arc", arc) as src:
        src.resume(store.positions("arc"))
        assert drain(store, src, codec) == 0
    with ArchiveSource("arc", arc) as src:
        assert drain(store, src, codec) == len(cases)
    assert store.counts() == before
    store.close()


def test_poison_through_the_inbox(tmp_path):
    box = tmp_path / "inbox"
    box.mkdir()
    cases = poison_and_good(box)
    for i, (name, raw, _) in enumerate(cases):
        (box / f"{i:02d}-{name}.json").write_bytes(raw)
    store = Store(tmp_path / "state" / "s.sqlite")
    with InboxSource("box", box) as src:
        assert drain(store, src, NativeCodec()) == len(cases)
    names = {name: f"{i:02d}-{name}.json" for i, (name, _, _) in enumerate(cases)}
    check_store(store, cases, lambda name: str(box.resolve() / names[name]))
    for name, raw, words in cases:
        if words is None:
            assert (box / "done" / names[name]).read_bytes() == raw
        else:
            assert (box / "rejected" / names[name]).read_bytes() == raw
            assert words in (box / "rejected" / (names[name] + ".reason")).read_text()
    assert not list(box.glob("*.json"))
    store.close()


def test_oversized_line_is_quarantined_with_its_length(tmp_path):
    # Lines over the message limit are not kept whole: the first limit + 1 bytes, the flag and the true size.
    arc = tmp_path / "a.jsonl"
    big = line(transient(tid="TR-BIG", note="z" * 20000))
    arc.write_bytes(big + b"\n" + line(transient(tid="TR-OK")) + b"\n")
    store = Store(tmp_path / "s.sqlite")
    with ArchiveSource("arc", arc, max_bytes=4096) as src:
        drain(store, src, NativeCodec(max_bytes=4096))
    (q,) = store.quarantined()
    assert q.truncated and q.size == len(big) and q.raw == big[:4097]
    assert f"is {len(big)} bytes, over the 4096-byte message limit" in q.reason
    assert json.loads(store.message_raw(1))["transient_id"] == "TR-OK"
    store.close()
