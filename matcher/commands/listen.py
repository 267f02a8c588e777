"""``matcher listen [-c CONFIG] [--dashboard] [--log-level LEVEL]``: run the service until stopped.

Reads every configured source (or those named with ``--source``), publishes to every
configured sink, and keeps going until SIGINT or SIGTERM: the current batch finishes,
the outbox is published once more, and everything is closed. A second SIGINT exits at
once (the store is transactional: nothing committed is lost). Without ``-c`` the
embedded default configuration is used (an ``inbox/`` folder here; its ``archive``
source only when ``archive.jsonl`` exists).
"""

from __future__ import annotations

import contextlib
import logging
import signal
import sys
import time

__all__ = ["register", "run"]

LOG_LEVELS = ("warning", "info", "debug")


def register(sub) -> None:
    p = sub.add_parser("listen", help="run the service on the configured sources until stopped",
                       description="Run the service: poll the configured sources, decode, store, match and "
                       "publish, batch after batch. SIGINT/SIGTERM stop after the current batch; a second "
                       "SIGINT exits at once.")
    p.add_argument("-c", "--config", metavar="CONFIG", help="configuration (default: the embedded default)")
    p.add_argument("--source", action="append", metavar="NAME", help="read only this source (repeatable)")
    p.add_argument("--dashboard", action="store_true", help="live terminal view of events, candidates and rates")
    p.add_argument("--until-done", action="store_true", help="stop when every source is finished (archives read)")
    p.add_argument("--log-level", choices=LOG_LEVELS, default="warning",
                   help="what the service's own log (the 'matcher' loggers, on stderr) shows: warning (default), "
                        "info (also Kafka partitions assigned and revoked, catching up at start), or debug")
    p.set_defaults(func=run)


class _CurrentStderr(logging.StreamHandler):
    """A stream handler writing to whatever ``sys.stderr`` is at each record: the dashboard's live
    view replaces it while it runs, and prints such lines above the view instead of through it."""

    @property
    def stream(self):
        return sys.stderr

    @stream.setter
    def stream(self, value) -> None:  # StreamHandler.__init__ sets it; the property decides
        pass


@contextlib.contextmanager
def log_to_stderr(level: str):
    """The ``matcher`` loggers' records at ``level`` and above on stderr, one line each, while inside.

    Only this program's loggers: the Kafka client library's own records keep Python's default
    (warnings and errors).
    """
    if level not in LOG_LEVELS:
        raise ValueError(f"log level must be one of {', '.join(LOG_LEVELS)}, got {level!r}")
    logger = logging.getLogger("matcher")
    handler = _CurrentStderr()
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    before = logger.level, logger.propagate
    logger.addHandler(handler)
    logger.setLevel(getattr(logging, level.upper()))
    logger.propagate = False  # once here, not again through a handler the root logger may have
    try:
        yield
    finally:
        logger.removeHandler(handler)
        logger.setLevel(before[0])
        logger.propagate = before[1]


def _sources(config, names, embedded: bool):
    from matcher.errors import ConfigError

    chosen = names or list(config.sources)
    out = []
    for name in chosen:
        if name not in config.sources:
            raise ConfigError(f"sources.{name}", f"is not defined (defined: {', '.join(config.sources) or 'none'})")
        sc = config.sources[name]
        if embedded and not names and sc.kind == "archive" and not sc.options.path.exists():
            print(f"matcher listen: source {name}: {sc.options.path} does not exist; not read", file=sys.stderr)
            continue
        out.append(config.source(name))
    if not out:
        raise ConfigError("sources", "no source to read (define one, or name one with --source)")
    return out


def run(args) -> int:
    with log_to_stderr(getattr(args, "log_level", "warning")):
        return _run(args)


def _run(args) -> int:
    from matcher.config import load_config
    from matcher.replay import default_config
    from matcher.service import Service

    embedded = args.config is None
    config = default_config() if embedded else load_config(args.config)
    sources = _sources(config, args.source, embedded)
    dash = None

    def on_batch(svc, stats):
        if dash is not None:
            dash.update()
        elif stats.messages:
            t = svc.stats.totals
            print(f"batch {svc.stats.batches}: {stats.messages} messages ({stats.quarantined} quarantined, "
                  f"{stats.written} results written); total {t.messages:,} messages, "
                  f"{len(svc.matcher.events)} active events", file=sys.stderr)

    try:
        svc = Service(config, sources=sources, on_batch=on_batch)
    except BaseException:
        for s in sources:
            s.close()
        raise

    def handler(signum, frame):
        if svc.stopping and signum == signal.SIGINT:
            raise KeyboardInterrupt
        svc.request_stop()
        if dash is not None:
            dash.update()

    old = {s: signal.signal(s, handler) for s in (signal.SIGINT, signal.SIGTERM)}
    started = time.monotonic()
    try:
        with svc:
            print(f"matcher listen: store {svc.store.path}; sources {', '.join(s.name for s in svc.sources)}; "
                  f"sinks {', '.join(p.sink.name for p in svc.publishers) or 'none'}; "
                  f"{len(svc.matcher.events)} active events from the store", file=sys.stderr)
            if args.dashboard:
                from matcher.report.dashboard import Dashboard

                dash = Dashboard(svc, quarantined_before=svc.quarantine_count())
                with dash:
                    svc.run(until_finished=args.until_done)
            else:
                svc.run(until_finished=args.until_done)
    except KeyboardInterrupt:
        print("matcher listen: interrupted (second SIGINT); the store holds every committed batch", file=sys.stderr)
        return 130
    finally:
        for s, h in old.items():
            signal.signal(s, h)
    t = svc.stats.totals
    print(f"matcher listen: stopped after {time.monotonic() - started:.1f} s, {t.messages:,} messages, "
          f"{t.quarantined:,} quarantined, {t.written:,} results written", file=sys.stderr)
    return 0
