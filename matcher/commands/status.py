"""``matcher status -c CONFIG [--json]``: the store, the outbox backlog, and Kafka lag per partition.

Reads the configuration's store (it never creates one) and asks the brokers of each
Kafka source, without joining any group: for alert topics, how far the store's
offsets are behind each partition's end; for report topics, how far the group's
committed offsets are. It can run beside a live service (SQLite readers do not block
the writer). Exit status 0 when everything could be read, 1 when a broker could not
be reached (what could be read is still shown), 2 for a bad configuration.
"""

from __future__ import annotations

import dataclasses
import sys

__all__ = ["register", "run", "collect"]


def register(sub) -> None:
    p = sub.add_parser("status", help="store counts, outbox backlog and Kafka consumer lag per partition",
                       description="Show the store's counts, how many outbox rows each sink has not yet "
                       "published, and for each Kafka source the lag of every partition (alert topics: "
                       "the store's offsets; report topics: the group's committed offsets). Joins no group.")
    p.add_argument("-c", "--config", metavar="CONFIG", required=True, help="the service's configuration")
    p.add_argument("--json", action="store_true", help="print JSON instead of tables")
    p.add_argument("--timeout", type=float, default=10.0, metavar="S",
                   help="seconds to wait for a broker (default 10)")
    p.set_defaults(func=run)


def _store_part(config) -> tuple[dict, dict]:
    from matcher.store import Store

    path = config.store_path
    info = {"path": str(path), "exists": path.exists(), "counts": None}
    positions: dict = {}
    sinks = {}
    if not info["exists"]:
        for name, sc in config.sinks.items():
            sinks[name] = {"kind": sc.kind, "sent_seq": 0, "last_seq": 0, "backlog": 0}
        return info, {"positions": positions, "sinks": sinks}
    with Store(path) as st:
        info["counts"] = st.counts()
        last = st.last_seq()
        for name, sc in config.sinks.items():
            sent = st.sink_cursor(name)
            # Outbox sequence numbers have no gaps (one AUTOINCREMENT per row, rows never deleted),
            # so the rows after a cursor number last - cursor (every kind, including ones the sink skips).
            sinks[name] = {"kind": sc.kind, "sent_seq": sent, "last_seq": last, "backlog": last - sent}
        for name in config.sources:
            positions[name] = st.positions(name)
    return info, {"positions": positions, "sinks": sinks}


def collect(config, timeout_s: float = 10.0) -> dict:
    """Everything ``matcher status`` shows, as plain data.

    Returns
    -------
    dict
        ``store`` (path, exists, counts), ``sinks`` (per sink: kind, sent_seq, last_seq,
        backlog), ``sources`` (per source: kind; for Kafka sources also connection (no
        secrets), group_id, partitions (topic, partition, role, end, done, lag), lag_total
        and error, a text when the brokers could not be asked).
    """
    from matcher.streams.kafka_common import KafkaTransportError, describe_connection
    from matcher.streams.sources.kafka import external_lag

    store, parts = _store_part(config)
    sources = {}
    for name, sc in config.sources.items():
        entry = {"kind": sc.kind}
        if sc.kind == "kafka":
            o = sc.options
            o = dataclasses.replace(o, connection=dataclasses.replace(
                o.connection, connect_timeout_ms=int(timeout_s * 1000),
                request_timeout_ms=max(1000, min(o.connection.request_timeout_ms, int(timeout_s * 1000)))),
                fetch_max_wait_ms=min(o.fetch_max_wait_ms, 500))
            entry.update(connection=describe_connection(o.connection), group_id=o.group_id, partitions=[],
                         lag_total=None, error=None)
            try:
                entry["partitions"] = external_lag(name, o, parts["positions"].get(name, {}))
                entry["lag_total"] = sum(p["lag"] for p in entry["partitions"])
            except KafkaTransportError as exc:
                entry["error"] = str(exc)
        else:
            entry["positions"] = parts["positions"].get(name, {})
        sources[name] = entry
    return {"store": store, "sinks": parts["sinks"], "sources": sources}


def run(args) -> int:
    from matcher.config import load_config
    from matcher.errors import InputError

    if not args.timeout > 0:
        raise InputError(f"--timeout must be > 0, got {args.timeout}")
    config = load_config(args.config)
    status = collect(config, args.timeout)
    failed = any(s.get("error") for s in status["sources"].values())
    if args.json:
        from matcher.commands._output import print_json

        print_json(status)
    else:
        _show(status)
    if failed:
        print("matcher status: a broker could not be reached (see above)", file=sys.stderr)
    return 1 if failed else 0


def _show(status: dict) -> None:
    from rich.markup import escape
    from rich.table import Table

    from matcher.commands._output import console

    con = console()
    st = status["store"]
    if not st["exists"]:
        con.print(f"store {st['path']}: not created yet (the service has not run)")
    else:
        c = st["counts"]
        con.print(f"store {st['path']}: {c['messages']:,} messages, {c['events']:,} events, "
                  f"{c['transients']:,} transients, {c['results']:,} results ({c['results.current']:,} current, "
                  f"{c['results.superseded']:,} superseded, {c['results.withdrawn']:,} withdrawn), "
                  f"{c['quarantine']:,} quarantined, {c['outbox']:,} outbox rows")
    if status["sinks"]:
        t = Table(title="outbox")
        for col in ("sink", "kind", "published up to", "last row", "backlog"):
            t.add_column(col, justify="right" if col not in ("sink", "kind") else "left")
        for name, s in status["sinks"].items():
            t.add_row(name, s["kind"], f"{s['sent_seq']:,}", f"{s['last_seq']:,}", f"{s['backlog']:,}")
        con.print(t)
    for name, s in status["sources"].items():
        if s["kind"] != "kafka":
            con.print(f"source {name} ({s['kind']}): positions {s['positions'] or 'none stored'}")
            continue
        conn = s["connection"]
        head = (f"source {name} (kafka {', '.join(conn['bootstrap_servers'])}, {conn['security_protocol']}"
                f"{', group ' + s['group_id'] if s['group_id'] else ''})")
        if s["error"]:
            con.print(f"{escape(head)}: [bold]unreachable[/bold]: {escape(s['error'])}", highlight=False)
            continue
        t = Table(title=f"{escape(head)}: lag {s['lag_total']:,}")
        for col in ("topic", "partition", "role", "end", "done", "lag"):
            t.add_column(col, justify="right" if col in ("partition", "end", "done", "lag") else "left")
        for p in s["partitions"]:
            t.add_row(p["topic"], str(p["partition"]), p["role"], f"{p['end']:,}",
                      "-" if p["done"] is None else f"{p['done']:,}", f"{p['lag']:,}")
        con.print(t)
