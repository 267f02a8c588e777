"""Archive lines as the module docstring defines them, read by the unpaced and the paced loop alike.

A line's bytes are the line without ``\\n`` or ``\\r\\n``; lines that are blank (only what
``bytes.strip`` removes) are skipped but counted; the position after each line is its byte
offset, line number and the SHA-256 of the file's first min(offset, 4096) bytes. The
reference below follows that text with plain ``bytes`` operations and ``hashlib``.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import pickle
import random

import pytest

from matcher.streams.raw import Origin, RawItem
from matcher.streams.sources import ArchiveSource
from matcher.streams.sources.archive import HEAD_BYTES
from matcher.timeconv import gps_to_unix, iso_to_gps


def reference(content: bytes) -> list[tuple[bytes, int, dict]]:
    """(bytes, line number, position) of every non-blank line, from the documented rules."""
    out, pos, line = [], 0, 0
    while pos < len(content):
        j = content.find(b"\n", pos)
        end = len(content) if j < 0 else j + 1
        data, pos, line = content[pos:end], end, line + 1
        if data.endswith(b"\n"):
            data = data[:-1]
        if data.endswith(b"\r"):
            data = data[:-1]
        if data.strip():
            head = hashlib.sha256(content[:min(pos, HEAD_BYTES)]).hexdigest()
            out.append((data, line, {"offset": pos, "line": line, "head": head}))
    return out


def archive_bytes(seed: int) -> bytes:
    """Invented lines with every kind of blank line and terminator, long enough to pass HEAD_BYTES."""
    rng = random.Random(seed)
    blanks = [b"", b" ", b"\t", b"\x0b", b"\x0c", b"\r", b" \r", b"\t \x0c"]
    kept = [b" {\"a\": 1}", b"\t{}", b"\x0b{}\x0c", b"{}\r\r", b"\r{}", b"{\"a\": \"\xc2\xa0\"}", b"\xc2\xa0", b"x",
            b'{"received_at": "2026-03-14T05:00:01Z", "a": 1}', b'{"received_at": "soon"}']
    parts = []
    for i in range(400):
        r = rng.random()
        if r < 0.3:
            parts.append(rng.choice(blanks))
        elif r < 0.5:
            parts.append(rng.choice(kept))
        else:
            parts.append(json.dumps({"n": i, "pad": "p" * rng.randint(0, 60)}).encode())
        parts.append(rng.choice([b"\n", b"\n", b"\r\n"]))
    return b"".join(parts) + rng.choice([b"", b"{\"last\": true}", b" "])


def poll_all(src: ArchiveSource, batch: int) -> list:
    items = []
    while True:
        got = src.poll(batch)
        if not got:
            return items
        assert len(got) <= batch
        items += got


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("batch", [1, 7, 500])
def test_unpaced_lines_and_positions_follow_the_documented_rules(tmp_path, seed, batch):
    content = archive_bytes(seed)
    assert len(content) > 2 * HEAD_BYTES
    path = tmp_path / "a.jsonl"
    path.write_bytes(content)
    with ArchiveSource("a", path, wall_clock=lambda: 42.0) as src:
        items = poll_all(src, batch)
        assert src.finished
    want = reference(content)
    assert [(i.data, i.origin.offset, json.loads(i.position[1])) for i in items] == want
    assert all(i.position[0] == src.stream and i.size == len(i.data) and not i.truncated for i in items)
    for item in items:
        if item.data.startswith(b'{"received_at": "2026'):
            assert item.received_at == gps_to_unix(iso_to_gps("2026-03-14T05:00:01Z"))
        else:
            assert item.received_at == 42.0  # no (readable) received_at: the time it was read


@pytest.mark.parametrize("max_bytes", [16 * 1024 * 1024, 60, 40])
def test_paced_and_unpaced_reads_give_the_same_items(tmp_path, max_bytes):
    # The unpaced loop makes the usual line's item itself; the paced loop reads every line the
    # general way. Small limits put lines just under, at and over the size limit.
    content = archive_bytes(9)
    path = tmp_path / "a.jsonl"
    path.write_bytes(content)
    now = [0.0]

    def sleep(s):
        now[0] += s

    with ArchiveSource("a", path, max_bytes=max_bytes, wall_clock=lambda: 42.0) as fast:
        unpaced = poll_all(fast, 13)
    with ArchiveSource("a", path, max_bytes=max_bytes, speed=1e9, clock=lambda: now[0], sleep=sleep,
                       wall_clock=lambda: 42.0) as slow:
        paced = []
        while not slow.finished:
            paced += slow.poll(13, timeout_s=1.0)
    assert unpaced == paced
    sizes = {len(i.data) for i in unpaced}
    if max_bytes < 100:
        assert {max_bytes - 1, max_bytes, max_bytes + 1} <= sizes and any(i.truncated for i in unpaced)


def test_items_are_the_objects_the_constructors_build(tmp_path):
    # The source builds its items without the dataclasses' generated __init__; they must be
    # the very objects RawItem(...) and Origin(...) give: equal, same hash, repr and fields,
    # still frozen, and the same after a pickle round trip.
    path = tmp_path / "a.jsonl"
    path.write_bytes(archive_bytes(4))
    with ArchiveSource("a", path, wall_clock=lambda: 42.0) as src:
        items = poll_all(src, 50)
    assert items
    for item in items:
        o = item.origin
        origin = Origin(o.source, o.kind, o.where, o.part, o.offset)
        built = RawItem(item.data, origin, item.position, item.received_at, item.base_dir,
                        truncated=item.truncated, size=item.size)
        for got, want in ((o, origin), (item, built)):
            assert type(got) is type(want) and got == want and hash(got) == hash(want)
            assert repr(got) == repr(want) and list(vars(got).items()) == list(vars(want).items())
            assert pickle.loads(pickle.dumps(got)) == want
            with pytest.raises(dataclasses.FrozenInstanceError):
                got.size = 0
        assert str(o) == str(origin) and o.identity() == origin.identity() and item.dedup_key == built.dedup_key
