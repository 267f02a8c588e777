"""One service instance as its own process, for ``matcher bench kafka --instances N`` and the scale-out tests.

    python -m matcher.bench._kafka_instance CONFIG REPORT.json

Runs the service of ``CONFIG`` until its sources are finished (a Kafka source with
``stop_at_end``) or SIGTERM/SIGINT arrives (the current batch finishes, the outbox is
published once more), then writes ``REPORT.json``: wall-clock times (Unix s) of the
start, the end of the first and of the last batch with messages, and the end; the reports
of the first batch; the loop's seconds per step (in all, and between those two batches:
``window_seconds``, with the Kafka source's and sinks' steps), the store's counts,
the sources' counters, lag and seconds per step, and the sinks' counters and seconds. A
SIGKILL leaves no report (that is the point of the tests that use it).
"""

from __future__ import annotations

import json
import signal
import sys
import time

__all__ = ["main"]


def main(argv: list[str]) -> int:
    from matcher.bench.kafka import seconds_between, step_seconds
    from matcher.config import load_config
    from matcher.service import Service
    from matcher.streams.fsutil import write_durably

    config_path, report_path = argv
    started = time.time()
    first: list = []  # (end time, reports) of the first batch with messages
    last: list[float] = []  # end time of the latest batch with messages
    steps: dict = {}  # step seconds at the end of the first and of the latest batch with messages

    def on_batch(svc, stats):
        if stats.messages:
            now = time.time()
            if not first:
                first.append((now, stats.reports))
                steps["first"] = step_seconds(svc)
            last[:] = [now]
            steps["last"] = step_seconds(svc)

    svc = Service(load_config(config_path), on_batch=on_batch)
    signal.signal(signal.SIGTERM, lambda *_: svc.request_stop())
    signal.signal(signal.SIGINT, lambda *_: svc.request_stop())
    with svc:
        svc.run(until_finished=True)
        report = {
            "started": started, "first_batch": first[0][0] if first else None,
            "first_batch_reports": first[0][1] if first else 0, "last_batch": last[0] if last else None,
            "counts": svc.store.counts(), "seconds": dict(svc.stats.seconds),
            "window_seconds": seconds_between(steps["first"], steps["last"]) if steps else None,
            "sources": {s.name: {"stats": dict(getattr(s, "stats", {})), "lag": s.lag() if hasattr(s, "lag") else None,
                                 "seconds": dict(getattr(s, "seconds", {}))}
                        for s in svc.sources},
            "sinks": {p.sink.name: {"stats": dict(getattr(p.sink, "stats", {})),
                                    "seconds": dict(getattr(p.sink, "seconds", {}))} for p in svc.publishers},
        }
    report["finished"] = time.time()
    write_durably(report_path, json.dumps(report, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
