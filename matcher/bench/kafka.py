"""``matcher bench kafka``: reports/s through broker → service → broker, beside raw kafka-python.

Figures, one run, on the same topic of invented transient reports (default 100,000
over 6 partitions, after a few GW alerts with compact localizations embedded in the
alerts as base64 FITS):

* baseline: a bare kafka-python consumer (no group, every partition assigned) reads
  the whole reports topic and does nothing with the records: the most a Python client
  of this broker can take from it here. Measured as it is and under the service loop's
  garbage-collector setting, first and again at the end (the machine is shared): the
  ratios use the fastest of these;
* the Kafka source alone: the reports topic through a consumer group, each record
  made into an item, offsets committed after each batch, nothing decoded or stored
  (the source's own ceiling);
* the service without Kafka: an archive replay of the same messages in one process
  (what decoding, storing and matching cost by themselves);
* service, 1 instance: the matcher service with the Kafka source (alerts without a
  group, reports through a consumer group, offsets committed after each store
  transaction) and the Kafka sink (idempotent producer, every send checked), from the
  first record to the last result acknowledged by the broker, into a fresh store,
  with the seconds spent in each step of the loop and, within them, in each step of
  the Kafka path: kafka-python's ``poll`` (consume), making the items and their
  bookkeeping (items), the offset commits (commit), handing results to the producer
  (send) and waiting for the broker's acknowledgements (flush);
* the Kafka sink alone: the results of that run published again to a fresh topic,
  in as many flushes as the service made (the sink's own cost);
* service, N instances (``--instances``, default 2): that many service processes in
  one group, from the first batch of any to the end of the last, with each one's steps;

each as reports/s and as a ratio to the baseline (the target is ≥ 0.5 × baseline).
Rates are sustained: counted from the end of the first batch (or poll) to the end of
the last, so that neither the start (connecting, joining the group, the alerts' maps)
nor the wait for the end (``stop_at_end`` checks the group's offsets once a second)
counts; the seconds per step are those of the same window. All of it shares the
machine's cores with the broker.

With ``--bootstrap HOST:PORT`` it uses that broker (it creates its own uniquely named
topics there; auto topic creation may be off). Without it, it starts the test broker
of ``tests/kafka_broker.py`` (a real single-node Kafka on 127.0.0.1), which needs the
broker's jars from ``bash tests/kafka/fetch.sh`` (Maven Central, into
``.cache/kafka/lib``) and a JDK; the broker is stopped afterwards.

:func:`scenario` is also the input of the Kafka scale-out and fault tests.
"""

from __future__ import annotations

import base64
import json
import sys
import tempfile
import time
import uuid
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from matcher.bench._timing import print_row

__all__ = ["register", "run", "scenario", "Scenario", "compact_map_fits", "kafka_config", "SCENARIO_T0_ISO", "Rate",
           "step_seconds", "seconds_between"]

#: Merger time of the scenario's first event (invented).
SCENARIO_T0_ISO = "2026-03-14T00:00:00Z"


def compact_map_fits(ra_deg: float, dec_deg: float, sigma_deg: float, nside: int = 16) -> bytes:
    """A small flat NESTED HEALPix map: a circular Gaussian blob (FITS bytes, invented)."""
    import healpy as hp

    from matcher.sky import flat_fits_bytes

    x, y, z = hp.pix2vec(nside, np.arange(12 * nside * nside), nest=True)
    c = hp.ang2vec(ra_deg, dec_deg, lonlat=True)
    ang = np.arccos(np.clip(x * c[0] + y * c[1] + z * c[2], -1, 1))
    prob = np.exp(-0.5 * (ang / np.radians(sigma_deg)) ** 2)
    return flat_fits_bytes(prob / prob.sum(), nest=True)


@dataclass(frozen=True)
class Scenario:
    """Invented input: GW alerts (``bytes`` lines, maps embedded), transient reports, and the maps' centres (deg)."""

    alerts: list
    reports: list
    centres: list


def scenario(n_reports: int, *, n_events: int = 3, seed: int = 2026, sigma_deg: float = 6.0,
             poison_every: int = 0) -> Scenario:
    """Invented GW alerts and optical transient reports for throughput and reliability runs.

    Every report falls inside the optical window of every event (no event expires
    during the stream), so the results do not depend on the order in which reports
    and alerts meet; a few percent of the reports fall inside the compact maps and
    become candidates. With ``poison_every = N``, every N-th report is replaced by a
    message the native codec rejects (eight kinds, in turn).
    """
    from matcher.timeconv import gps_to_iso, iso_to_gps

    rng = np.random.default_rng(seed)
    t0 = iso_to_gps(SCENARIO_T0_ISO)
    centres = [(float(rng.uniform(0, 360)), float(np.degrees(np.arcsin(rng.uniform(-0.8, 0.8)))))
               for _ in range(n_events)]
    alerts = []
    for i, (ra, dec) in enumerate(centres):
        fits = compact_map_fits(ra, dec, sigma_deg)
        alerts.append(json.dumps({
            "schema": "matcher/1", "type": "gw_alert", "event_id": f"EV-KBENCH-{i:02d}", "revision": 1,
            "state": "issued", "merger_time": gps_to_iso(t0 + 600.0 * i), "far_per_year": 1e-3, "p_astro": 0.95,
            "source_probs": {"bns": 0.9, "terrestrial": 0.05, "nsbh": 0.05},
            "localization": {"fits_base64": base64.b64encode(fits).decode("ascii")}},
            separators=(",", ":")).encode())
    # One report in twenty clusters around the events' centres, the rest are all-sky.
    near = rng.random(n_reports) < 0.05
    which = rng.integers(0, n_events, n_reports)
    ra = rng.uniform(0, 360, n_reports)
    dec = np.degrees(np.arcsin(rng.uniform(-1, 1, n_reports)))
    for j in np.flatnonzero(near):
        cra, cdec = centres[which[j]]
        ra[j] = (cra + rng.normal(0, 2 * sigma_deg) / max(np.cos(np.radians(cdec)), 0.2)) % 360
        dec[j] = np.clip(cdec + rng.normal(0, 2 * sigma_deg), -89.9, 89.9)
    t = t0 + 3600.0 + rng.uniform(0, 86400.0, n_reports)
    poison = _poison()
    reports = []
    for j in range(n_reports):
        if poison_every and j % poison_every == poison_every - 1:
            reports.append(poison[(j // poison_every) % len(poison)](j))
            continue
        reports.append(json.dumps({
            "schema": "matcher/1", "type": "transient", "transient_id": f"KT{j:07d}", "class": "optical",
            "ra_deg": round(float(ra[j]), 6), "dec_deg": round(float(dec[j]), 6), "pos_err_deg": 0.0003,
            "time": gps_to_iso(float(t[j])), "last_nondetection": gps_to_iso(float(t[j]) - 172800.0),
            "mag": round(float(rng.uniform(18, 23)), 2)}, separators=(",", ":")).encode())
    return Scenario(alerts, reports, centres)


def _poison():
    """Eight kinds of messages the native codec must reject (each keeps its index, so all differ)."""
    def rep(j, **kw):
        base = {"schema": "matcher/1", "type": "transient", "transient_id": f"KX{j:07d}", "class": "optical",
                "ra_deg": 10.0, "dec_deg": 10.0, "time": "2026-03-14T05:00:00Z"}
        base.update(kw)
        return json.dumps(base, separators=(",", ":")).encode()

    return [
        lambda j: b'{"schema":"matcher/1","type":"transient",' + str(j).encode(),          # cut off
        lambda j: b"\xff\xfe not utf-8 " + str(j).encode(),                                 # not UTF-8
        lambda j: rep(j, dec_deg=97.25),                                                    # out of range
        lambda j: rep(j, schema="other/9"),                                                 # unknown schema
        lambda j: rep(j, time="yesterday"),                                                 # bad time
        lambda j: b"[" + str(j).encode() + b"]",                                            # not an object
        lambda j: rep(j, ra_deg="east"),                                                    # wrong type
        lambda j: rep(j, type="gw_alert").replace(b'"transient_id"', b'"event"'),           # alert without fields
    ]


def kafka_config(*, bootstrap: str, alerts: str, reports: str, results: str | None, group: str, state_dir,
                 client_id: str = "matcher-bench", stop_at_end: bool = True, batch_size: int = 500,
                 session_timeout_ms: int = 6000, poll_timeout_s: float = 0.5, extra_source: dict | None = None) -> dict:
    """A configuration mapping for a service on these topics (classes: the packaged defaults)."""
    conn = {"bootstrap_servers": [bootstrap], "client_id": client_id}
    cfg = {
        "state_dir": str(state_dir),
        "sources": {"kafka": {"kind": "kafka", "connection": conn, "topics": {"alerts": [alerts], "reports": [reports]},
                              "group_id": group, "stop_at_end": stop_at_end, "session_timeout_ms": session_timeout_ms,
                              "heartbeat_interval_ms": max(100, session_timeout_ms // 6), **(extra_source or {})}},
        "sinks": {},
        "service": {"batch_size": batch_size, "poll_timeout_s": poll_timeout_s},
    }
    if results is not None:
        cfg["sinks"]["results"] = {"kind": "kafka", "connection": conn, "topic": results}
    return cfg


def register(sub) -> None:
    p = sub.add_parser("kafka", help="reports/s broker → service → broker vs a raw kafka-python consumer",
                       description="Throughput of the service between Kafka topics (Kafka source and sink, a "
                       "fresh store) beside a bare kafka-python consumer of the same topic, in one run. Without "
                       "--bootstrap it starts the test broker of tests/kafka_broker.py (needs the jars from "
                       "`bash tests/kafka/fetch.sh` and a JDK).")
    p.add_argument("--bootstrap", metavar="HOST:PORT", help="an existing broker (default: start the test broker)")
    p.add_argument("--reports", type=int, default=100_000, help="transient reports (default 100,000)")
    p.add_argument("--events", type=int, default=3, help="GW alerts (default 3)")
    p.add_argument("--partitions", type=int, default=6, help="partitions of the reports topic (default 6)")
    p.add_argument("--batch", type=int, default=500, help="service batch size (default 500, the service's default)")
    p.add_argument("--instances", type=int, default=2, help="also run this many service processes in one group "
                   "(default 2; 0: skip)")
    p.add_argument("--commit-interval-ms", type=int, default=0, metavar="MS",
                   help="the Kafka source's commit_interval_ms (default 0: commit after every batch)")
    p.add_argument("--seed", type=int, default=2026)
    p.add_argument("--workdir", help="folder for the store (default: a temporary folder)")
    p.set_defaults(func=run)


def _produce(bootstrap: str, topic: str, values, *, max_request_size: int = 1048576) -> float:
    from kafka import KafkaProducer

    t = time.perf_counter()
    producer = KafkaProducer(bootstrap_servers=bootstrap, client_id="matcher-bench-producer", linger_ms=20,
                             batch_size=512 * 1024, max_request_size=max_request_size, enable_idempotence=True)
    try:
        futures = [producer.send(topic, value=v) for v in values]
        producer.flush(timeout=300)
        for f in futures:
            f.get(timeout=60)
    finally:
        producer.close(timeout=10)
    return time.perf_counter() - t


@dataclass(frozen=True)
class Rate:
    """A sustained rate: ``count`` items in ``seconds``, from the end of the first batch to the end of the last."""

    count: int
    seconds: float

    @property
    def per_s(self) -> float:
        return self.count / self.seconds if self.seconds > 0 else float("inf")


def _raw_consume(bootstrap: str, topic: str, n: int, *, service_gc: bool = False) -> Rate:
    """A bare consumer (no group, all partitions) reading ``n`` records of ``topic``, 500 per poll.

    With ``service_gc`` under the service loop's garbage-collector setting, as the service runs.
    """
    from contextlib import nullcontext

    from kafka import KafkaConsumer, TopicPartition

    from matcher.service import loop_gc

    consumer = KafkaConsumer(bootstrap_servers=bootstrap, client_id="matcher-bench-raw", group_id=None,
                             enable_auto_commit=False, auto_offset_reset="earliest")
    try:
        tps = [TopicPartition(topic, p) for p in sorted(consumer.partitions_for_topic(topic))]
        consumer.assign(tps)
        consumer.seek_to_beginning(*tps)
        got, first, t0 = 0, 0, None
        with loop_gc() if service_gc else nullcontext():
            while got < n:
                k = sum(len(recs) for recs in consumer.poll(timeout_ms=1000, max_records=500).values())
                got += k
                if k and t0 is None:
                    t0, first = time.perf_counter(), k
        return Rate(got - first, time.perf_counter() - t0)
    finally:
        consumer.close()


def _count_topic(bootstrap: str, topic: str) -> int:
    from kafka import KafkaConsumer, TopicPartition

    consumer = KafkaConsumer(bootstrap_servers=bootstrap, group_id=None, enable_auto_commit=False)
    try:
        tps = [TopicPartition(topic, p) for p in sorted(consumer.partitions_for_topic(topic))]
        return sum(consumer.end_offsets(tps).values())
    finally:
        consumer.close()


def _create_topics(bootstrap: str, topics: dict, configs: dict) -> None:
    from kafka import KafkaAdminClient

    admin = KafkaAdminClient(bootstrap_servers=bootstrap, client_id="matcher-bench-admin")
    try:
        admin.create_topics({name: {"num_partitions": n, "replication_factor": 1, "configs": configs}
                             for name, n in topics.items()})
        admin.wait_for_topics(list(topics), timeout_ms=30000)
    finally:
        admin.close()


def _start_test_broker():
    root = Path(__file__).resolve().parents[2]
    sys.path.insert(0, str(root / "tests"))
    try:
        from kafka_broker import KafkaBroker
    except ImportError:
        from matcher.errors import InputError

        raise InputError("matcher bench kafka: without --bootstrap it starts the test broker of "
                         f"tests/kafka_broker.py, which is not in {root / 'tests'} (a source checkout is needed); "
                         "give --bootstrap HOST:PORT instead") from None
    return KafkaBroker().start()


def _seconds_text(seconds: dict) -> str:
    return ", ".join(f"{k} {v:.2f}" for k, v in seconds.items() if k != "reports")


def _instances(n: int, folder: Path, bootstrap: str, topics: tuple[str, str, str], group: str, batch: int,
               extra: dict, n_reports: int):
    """Run ``n`` service processes in one group; returns (the group's sustained Rate, the instances' reports).

    The window runs from the end of the first batch of any instance to the end of the
    last batch of any; it counts every report but those of that first batch.
    """
    import subprocess

    import yaml

    alerts, reports, results = topics
    procs = []
    for i in range(n):
        cfg = kafka_config(bootstrap=bootstrap, alerts=alerts, reports=reports, results=results, group=group,
                           state_dir=folder / f"instance-{i}", client_id=f"matcher-bench-{i}", batch_size=batch,
                           extra_source=extra)
        path = folder / f"instance-{i}.yaml"
        path.write_text(yaml.safe_dump(cfg))
        report = folder / f"instance-{i}.json"
        log = open(folder / f"instance-{i}.log", "wb")
        procs.append((subprocess.Popen([sys.executable, "-m", "matcher.bench._kafka_instance", str(path), str(report)],
                                       stdout=log, stderr=subprocess.STDOUT), report, log))
    out = []
    for proc, report, log in procs:
        code = proc.wait()
        log.close()
        if code != 0:
            from matcher.errors import MatcherError

            raise MatcherError(f"bench kafka: instance exited with status {code}; see {log.name}")
        out.append(json.loads(report.read_text()))
    began = min((r for r in out if r["first_batch"] is not None), key=lambda r: r["first_batch"])
    end = max(r["last_batch"] for r in out if r["last_batch"] is not None)
    return Rate(n_reports - began["first_batch_reports"], end - began["first_batch"]), out


@dataclass(frozen=True)
class _Accepted:
    """An item settled as accepted (what the service hands to ``Source.commit``)."""

    item: object
    reason: str | None = None


def _source_alone(bootstrap: str, reports: str, n: int, batch: int, group: str, extra: dict):
    """The Kafka source by itself on the reports topic: poll, items, commit after each batch; nothing stored.

    It runs under the service loop's garbage-collector setting (:func:`matcher.service.loop_gc`).

    Returns (the sustained Rate, up to the commit after the ``n``-th item; the source's seconds
    per step in that window).
    """
    from matcher.streams.kafka_common import Connection
    from matcher.streams.sources.kafka import KafkaSource, KafkaSourceOptions

    opts = KafkaSourceOptions(Connection((bootstrap,), client_id="matcher-bench-source"), (), (reports,), group,
                              session_timeout_ms=6000, heartbeat_interval_ms=1000, stop_at_end=True,
                              commit_interval_ms=int(extra.get("commit_interval_ms", 0)))
    from matcher.service import loop_gc

    src = KafkaSource("bench", opts)
    got, first, t0 = 0, 0, None
    try:
        src.resume({})
        with loop_gc():  # as in the service loop
            while got < n:
                items = src.poll(batch, 0.5)
                got += len(items)
                src.commit([_Accepted(i) for i in items])
                if items and t0 is None:
                    t0, first = time.perf_counter(), len(items)
                    src.seconds.update(dict.fromkeys(src.seconds, 0.0))  # the steps within the window only
        took = time.perf_counter() - t0
        seconds = dict(src.seconds)
    finally:
        src.close()
    return Rate(got - first, took), seconds


def _sink_alone(bootstrap: str, topic: str, rows: list, flushes: int):
    """The Kafka sink by itself: ``rows`` written and flushed in ``flushes`` equal rounds (as the service did).

    Returns (seconds, the sink's seconds per step).
    """
    from matcher.streams.kafka_common import Connection
    from matcher.streams.sinks.kafka import KafkaSink, KafkaSinkOptions

    sink = KafkaSink("bench", KafkaSinkOptions(Connection((bootstrap,), client_id="matcher-bench-sink"), topic))
    per = max(1, -(-len(rows) // max(1, flushes)))
    try:
        sink.open(0)
        t = time.perf_counter()
        for i in range(0, len(rows), per):
            sink.write(rows[i:i + per])
            sink.flush()
        took = time.perf_counter() - t
    finally:
        sink.close()
    return took, dict(sink.seconds)


def _steps_text(seconds: dict, keys=None) -> str:
    return ", ".join(f"{k} {v:.2f}" for k, v in seconds.items() if keys is None or k in keys)


def step_seconds(svc) -> dict:
    """The seconds so far of a service's loop steps and of its Kafka source and sinks (a snapshot)."""
    out = {"loop": dict(svc.stats.seconds), "source": {}, "sink": {}}
    for s in svc.sources:
        for k, v in getattr(s, "seconds", {}).items():
            out["source"][k] = out["source"].get(k, 0.0) + v
    for p in svc.publishers:
        for k, v in getattr(p.sink, "seconds", {}).items():
            out["sink"][k] = out["sink"].get(k, 0.0) + v
    return out


def seconds_between(a: dict, b: dict) -> dict:
    """``b - a`` for two :func:`step_seconds` snapshots."""
    return {part: {k: v - a[part].get(k, 0.0) for k, v in b[part].items()} for part in b}


class _Window:
    """``on_batch`` for a service: the sustained window, from the end of the first batch with messages to
    the end of the last one, with its reports and the seconds of each step within it."""

    def __init__(self):
        self.first_at = self.last_at = None
        self.first_reports = 0
        self.reports = 0
        self.start = self.end = None

    def __call__(self, svc, stats) -> None:
        if not stats.messages:
            return
        now = time.perf_counter()
        if self.first_at is None:
            self.first_at, self.first_reports, self.start = now, stats.reports, step_seconds(svc)
        else:
            self.reports += stats.reports
        self.last_at, self.end = now, step_seconds(svc)

    def rate(self) -> Rate:
        return Rate(self.reports, self.last_at - self.first_at)

    def seconds(self) -> dict:
        return seconds_between(self.start, self.end)


def _rate_text(rate: Rate, base: Rate | None = None, unit: str = "reports/s") -> str:
    text = f"{rate.seconds:8.2f} s  {rate.per_s:12,.0f} {unit}"
    return text if base is None else f"{text}  {rate.per_s / base.per_s:6.3f} × baseline"


def _kafka_path_rows(sec: dict, n_flushes: int, n_commits: int) -> None:
    """Print where a service's time went, the Kafka path's steps within the loop's (s, the service's thread)."""
    loop, source, sink = sec["loop"], sec["source"], sec["sink"]
    print_row("  seconds per loop step", _seconds_text(loop))
    print_row("  Kafka source: consume (kafka-python poll), items, commit",
              f"{source.get('consume', 0):.2f} / {source.get('items', 0):.2f} / {source.get('commit', 0):.2f} s  "
              f"({n_commits:,} commits)")
    print_row("  Kafka sink: send (producer), acknowledgements (flush)",
              f"{sink.get('send', 0):.2f} / {sink.get('flush', 0):.2f} s  ({n_flushes:,} flushes)")
    kafka = sum(source.values()) + sum(sink.values())
    print_row("  the Kafka path / the rest of the loop (decode, store, outbox)",
              f"{kafka:.2f} / {sum(loop.values()) - kafka:.2f} s")


def run(args) -> int:
    from matcher.config import config_from_mapping
    from matcher.errors import InputError
    from matcher.replay import replay_archive
    from matcher.service import Service
    from matcher.store import Store

    if args.reports < 1 or args.partitions < 1 or args.instances < 0 or args.batch < 1 or args.commit_interval_ms < 0:
        raise InputError("bench kafka: --reports, --partitions and --batch must be >= 1, --instances and "
                         "--commit-interval-ms >= 0")
    broker = None
    if args.bootstrap is None:
        print("starting the test broker (tests/kafka_broker.py) ...", flush=True)
        broker = _start_test_broker()
        bootstrap = broker.bootstrap
    else:
        bootstrap = args.bootstrap
    try:
        with tempfile.TemporaryDirectory(prefix="matcher-bench-kafka-") as tmp:
            folder = Path(args.workdir) if args.workdir else Path(tmp)
            folder.mkdir(parents=True, exist_ok=True)
            tag = uuid.uuid4().hex[:8]
            alerts, reports, results = f"bench-alerts-{tag}", f"bench-reports-{tag}", f"bench-results-{tag}"
            again = f"bench-results-again-{tag}"
            n = args.reports
            print(f"kafka benchmark: {n:,} transient reports over {args.partitions} partitions + "
                  f"{args.events} GW alerts, broker {bootstrap}, batch {args.batch}, commit interval "
                  f"{args.commit_interval_ms} ms")
            print("  rates are sustained: from the end of the first batch (or poll) to the end of the last")
            t = time.perf_counter()
            sc = scenario(n, n_events=args.events, seed=args.seed)
            print_row("inventing the input (set-up)", f"{time.perf_counter() - t:8.2f} s")
            _create_topics(bootstrap, {alerts: 1, reports: args.partitions, results: args.partitions,
                                       again: args.partitions}, {"max.message.bytes": str(8 * 1024 * 1024)})
            took = _produce(bootstrap, alerts, sc.alerts, max_request_size=8 * 1024 * 1024)
            took += _produce(bootstrap, reports, sc.reports)
            print_row("producing them with kafka-python (set-up)", f"{took:8.2f} s")

            raw = [_raw_consume(bootstrap, reports, n), _raw_consume(bootstrap, reports, n, service_gc=True)]
            print_row("baseline: bare kafka-python consumer, reports topic", _rate_text(raw[0]))
            print_row("  the same, with the service loop's GC setting", _rate_text(raw[1]))
            base = max(raw, key=lambda r: r.per_s)  # ratios below: to the faster of the two

            extra = {"commit_interval_ms": args.commit_interval_ms}
            alone, sec = _source_alone(bootstrap, reports, n, args.batch, f"bench-source-{tag}", extra)
            print_row("Kafka source alone: poll, items, commit; nothing stored", _rate_text(alone, base))
            print_row("  seconds: consume (kafka-python poll), items, commit", _steps_text(sec))

            archive = folder / "same-messages.jsonl"
            archive.write_bytes(b"".join(v + b"\n" for v in sc.alerts + sc.reports))
            t = time.perf_counter()
            ref = replay_archive(archive, out_dir=folder / "replay", progress_mode="off", config=config_from_mapping(
                {"state_dir": str(folder / "replay-state"), "service": {"batch_size": args.batch}}, base_dir=folder))
            plain = Rate(n, time.perf_counter() - t)
            print_row("service without Kafka: archive replay (whole run)", _rate_text(plain, base))
            print_row("  seconds per loop step", _seconds_text(ref.stats.seconds))

            cfg = config_from_mapping(kafka_config(bootstrap=bootstrap, alerts=alerts, reports=reports,
                                                   results=results, group=f"bench-group-{tag}",
                                                   state_dir=folder / "state", batch_size=args.batch,
                                                   extra_source=extra),
                                      base_dir=folder)
            window = _Window()
            t = time.perf_counter()
            with Service(cfg, on_batch=window) as svc:
                svc.run(until_finished=True)
                counts = svc.store.counts()
                sent, last = svc.store.sink_cursor("results"), svc.store.last_seq()
                sink = svc.publishers[0].sink
                published, flushes = sink.stats["sent"], sink.stats["flushes"]
                commits = svc.sources[0].stats["commits"]
                store_path = svc.store.path
            whole = time.perf_counter() - t
            one = window.rate()
            on_topic = _count_topic(bootstrap, results)
            print_row("service, 1 instance: broker → service → broker", _rate_text(one, base))
            print_row("  whole run (connect, join, alerts, end detection)", f"{whole:8.2f} s  {n / whole:12,.0f} reports/s")
            _kafka_path_rows(window.seconds(), flushes, commits)
            print_row("  compared with the archive replay", f"{one.per_s / plain.per_s:6.3f} × archive replay")
            print_row("  stored messages / transients / events / results / bad",
                      f"{counts['messages']:,} / {counts['transients']:,} / {counts['events']} / "
                      f"{counts['results']:,} / {counts['quarantine']}")
            print_row("  results acknowledged / records on the results topic",
                      f"{published:,} / {on_topic:,}")
            ok = (counts["transients"] == n and counts["events"] == args.events and sent == last
                  and on_topic == published and counts["results"] == ref.counts["results"])

            with Store(store_path) as st:
                rows = [r for r in st.outbox_after(0, last + 1) if r.kind == "match"]
            took, sec = _sink_alone(bootstrap, again, rows, flushes)
            print_row("Kafka sink alone: the same results, as many flushes",
                      _rate_text(Rate(len(rows), took), unit="results/s") +
                      f"  ({took / max(1, flushes) * 1000:.1f} ms per flush)")
            print_row("  seconds: send (producer), acknowledgements (flush)", _steps_text(sec))

            best = one
            if args.instances:
                group_rate, reps = _instances(args.instances, folder, bootstrap, (alerts, reports, results),
                                              f"bench-group-{tag}-x{args.instances}", args.batch, extra, n)
                stored = sum(r["counts"]["transients"] for r in reps)
                procs = "process" if args.instances == 1 else "processes"
                print_row(f"service, {args.instances} {procs} in one group: broker → broker",
                          _rate_text(group_rate, base))
                whole = max(r["finished"] for r in reps) - min(r["started"] for r in reps)
                print_row("  whole run (process start to the last exit)", f"{whole:8.2f} s  {n / whole:12,.0f} reports/s")
                print_row("  reports stored by each instance", " / ".join(f"{r['counts']['transients']:,}"
                                                                        for r in reps))
                for i, r in enumerate(reps):
                    src_stats = next(iter(r["sources"].values()))["stats"]
                    sink_stats = next(iter(r["sinks"].values()))["stats"]
                    if r["window_seconds"] is None:
                        print_row(f"  instance {i}", "processed no batch")
                        continue
                    print(f"  instance {i}:")
                    _kafka_path_rows(r["window_seconds"], sink_stats.get("flushes", 0), src_stats.get("commits", 0))
                ok = ok and stored >= n
                if group_rate.per_s > best.per_s:
                    best = group_rate

            raw += [_raw_consume(bootstrap, reports, n), _raw_consume(bootstrap, reports, n, service_gc=True)]
            print_row("baseline again, at the end (plain / service GC)",
                      f"{raw[2].per_s:,.0f} / {raw[3].per_s:,.0f} reports/s")
            fastest = max(raw, key=lambda r: r.per_s)
            ratio = best.per_s / fastest.per_s
            print_row("best service figure / fastest baseline",
                      f"{best.per_s:,.0f} / {fastest.per_s:,.0f} reports/s = {ratio:.3f} ×")
            print_row("target: service ≥ 0.5 × baseline", "met" if ratio >= 0.5 else f"NOT met ({ratio:.3f} ×)")
            return 0 if ok else 1
    finally:
        if broker is not None:
            broker.close()
