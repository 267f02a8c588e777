"""A replay that kills itself with SIGKILL at a chosen point (for the crash tests).

    python service_crash_driver.py ARCHIVE OUT_DIR BATCH_SIZE KILL_POINT KILL_AT_BATCH

KILL_POINT: ``in_transaction`` (the batch's results written, not committed),
``after_store`` (committed, source not yet told), ``mid_write`` (half of the batch's
lines written to matches.jsonl, then a torn line), ``after_flush`` (lines durable, the
sink cursor not yet advanced), or ``none`` (run to the end).
"""

from __future__ import annotations

import os
import signal
import sys

from matcher.lifecycle import Matcher
from matcher.replay import replay_archive
from matcher.streams.sinks import JsonlSink
from matcher.streams.sources import ArchiveSource


def main(archive: str, out: str, batch: int, point: str, at: int) -> int:
    count = {"apply": 0, "commit": 0, "write": 0, "flush": 0}

    def die(name):
        count[name] += 1
        return count[name] == at

    apply, commit, write, flush = Matcher.apply, ArchiveSource.commit, JsonlSink.write, JsonlSink.flush

    def apply_(self, tx, store, decoded):
        stats = apply(self, tx, store, decoded)
        if point == "in_transaction" and die("apply"):
            os.kill(os.getpid(), signal.SIGKILL)
        return stats

    def commit_(self, settled):
        if point == "after_store" and die("commit"):
            os.kill(os.getpid(), signal.SIGKILL)
        return commit(self, settled)

    def write_(self, rows):
        if point == "mid_write" and len(rows) > 1 and die("write"):
            write(self, rows[: len(rows) // 2])
            self._fh.write(b'{"seq":')  # a torn line
            self._fh.flush()
            os.kill(os.getpid(), signal.SIGKILL)
        return write(self, rows)

    def flush_(self):
        flush(self)
        if point == "after_flush" and die("flush"):
            os.kill(os.getpid(), signal.SIGKILL)

    Matcher.apply, ArchiveSource.commit, JsonlSink.write, JsonlSink.flush = apply_, commit_, write_, flush_
    replay_archive(archive, out_dir=out, batch_size=batch, progress_mode="off")
    return 0


if __name__ == "__main__":
    a, o, b, p, n = sys.argv[1:]
    sys.exit(main(a, o, int(b), p, int(n)))
