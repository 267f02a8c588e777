"""A process for the crash tests: replay an archive or an inbox into a store, publish to a
JSON Lines sink, and kill itself with SIGKILL at a chosen point.

    python streams_crash_driver.py KIND SOURCE_PATH STATE_DIR KILL_POINT KILL_AT_BATCH

KILL_POINT is one of ``in_transaction``, ``after_store``, ``after_source``, ``mid_write``,
``after_flush``, or ``none``; the process kills itself at that point of batch
number KILL_AT_BATCH. Results are stand-ins for the engine's: one per stored transient,
against the one GW event of the stream, with a value derived from the transient id.
"""

from __future__ import annotations

import hashlib
import os
import signal
import sys
from pathlib import Path

from matcher.store import Store
from matcher.streams.codecs import NativeCodec
from matcher.streams.intake import Accepted, decode_item, record_batch
from matcher.streams.raw import positions_of
from matcher.streams.sinks import JsonlSink, Publisher
from matcher.streams.sources import ArchiveSource, InboxSource


def die(point: str, here: str, batch: int, at: int) -> None:
    if point == here and batch == at:
        os.kill(os.getpid(), signal.SIGKILL)


class DyingSink(JsonlSink):
    """A JSON Lines sink that can die halfway through writing a batch of lines."""

    def __init__(self, *a, point, at, **kw):
        super().__init__(*a, **kw)
        self.point, self.at, self.batch = point, at, 0

    def write(self, rows):
        self.batch += 1
        if self.point == "mid_write" and self.batch == self.at and len(rows) > 1:
            half = len(rows) // 2
            super().write(rows[:half])
            self._fh.write(b'{"seq":')  # a torn line
            self._fh.flush()
            os.kill(os.getpid(), signal.SIGKILL)
        super().write(rows)

    def flush(self):
        super().flush()
        die(self.point, "after_flush", self.batch, self.at)


def main(kind: str, source_path: str, state_dir: str, point: str, at: int) -> int:
    state = Path(state_dir)
    store = Store(state / "s.sqlite")
    source = ArchiveSource("src", source_path) if kind == "archive" else InboxSource("src", source_path)
    source.resume(store.positions("src"))
    publisher = Publisher(store, DyingSink("m", state / "matches.jsonl", point=point, at=at))
    codec = NativeCodec()
    batch = 0
    while True:
        items = source.poll(7)
        if not items:
            break
        batch += 1
        decoded = [decode_item(it, codec) for it in items]
        with store.transaction() as tx:
            stored = record_batch(tx, decoded)
            for d, s in zip(decoded, stored):
                if isinstance(d, Accepted) and s is not None and s.kind == "transient" and s.changes_state:
                    tid = d.message.transient_id
                    value = int(hashlib.sha256(tid.encode()).hexdigest()[:6], 16) / 16 ** 6
                    tx.put_result("EV-CRASH", 1, tid, {"p_assoc": value})
            tx.set_positions(source.name, positions_of(items))
            die(point, "in_transaction", batch, at)
        die(point, "after_store", batch, at)
        source.commit(decoded)
        die(point, "after_source", batch, at)
        publisher.publish()
    publisher.close()
    source.close()
    store.close()
    return 0


if __name__ == "__main__":
    k, src, st, pt, at = sys.argv[1:]
    sys.exit(main(k, src, st, pt, int(at)))
