"""One service instance as its own process, for ``matcher bench kafka --instances N`` and the scale-out tests.

    python -m matcher.bench._kafka_instance CONFIG REPORT.json

Runs the service of ``CONFIG`` until its sources are finished (a Kafka source with
``stop_at_end``) or SIGTERM/SIGINT arrives (the current batch finishes, the outbox is
published once more), then writes ``REPORT.json``: wall-clock times (Unix s) of the
start, the first batch and the end, the loop's seconds per step, the store's counts,
and the Kafka source's counters and lag. A SIGKILL leaves no report (that is the point
of the tests that use it).
"""

from __future__ import annotations

import json
import signal
import sys
import time

__all__ = ["main"]


def main(argv: list[str]) -> int:
    from matcher.config import load_config
    from matcher.service import Service
    from matcher.streams.fsutil import write_durably

    config_path, report_path = argv
    started = time.time()
    first: list[float] = []

    def on_batch(svc, stats):
        if stats.messages and not first:
            first.append(time.time())

    svc = Service(load_config(config_path), on_batch=on_batch)
    signal.signal(signal.SIGTERM, lambda *_: svc.request_stop())
    signal.signal(signal.SIGINT, lambda *_: svc.request_stop())
    with svc:
        svc.run(until_finished=True)
        report = {
            "started": started, "first_batch": first[0] if first else None,
            "counts": svc.store.counts(), "seconds": dict(svc.stats.seconds),
            "sources": {s.name: {"stats": dict(getattr(s, "stats", {})), "lag": s.lag() if hasattr(s, "lag") else None}
                        for s in svc.sources},
        }
    report["finished"] = time.time()
    write_durably(report_path, json.dumps(report, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
