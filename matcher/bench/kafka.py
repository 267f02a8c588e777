"""``matcher bench kafka``: reports/s through broker → service → broker, beside raw kafka-python.

Figures, one run, on the same topic of invented transient reports (default 100,000
over 6 partitions, after a few GW alerts with compact localizations embedded in the
alerts as base64 FITS):

* baseline: a bare kafka-python consumer (no group, every partition assigned) reads
  the whole reports topic and does nothing with the records: the most a Python client
  of this broker can take from it here;
* the service without Kafka: an archive replay of the same messages in one process
  (what decoding, storing and matching cost by themselves);
* service, 1 instance: the matcher service with the Kafka source (alerts without a
  group, reports through a consumer group, offsets committed after each store
  transaction) and the Kafka sink (idempotent producer, every send checked), from the
  first record to the last result acknowledged by the broker, into a fresh store,
  with the seconds spent in each step of the loop;
* service, N instances (``--instances``, default 2): that many service processes in
  one group, from the first batch of any to the end of the last;

each as reports/s and as a ratio to the baseline (the target is ≥ 0.5 × baseline).
All of it shares the machine's cores with the broker.

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

__all__ = ["register", "run", "scenario", "Scenario", "compact_map_fits", "kafka_config", "SCENARIO_T0_ISO"]

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


def _raw_consume(bootstrap: str, topic: str, n: int) -> float:
    """Seconds for a bare consumer (no group, all partitions) to read ``n`` records of ``topic``."""
    from kafka import KafkaConsumer, TopicPartition

    consumer = KafkaConsumer(bootstrap_servers=bootstrap, client_id="matcher-bench-raw", group_id=None,
                             enable_auto_commit=False, auto_offset_reset="earliest")
    try:
        tps = [TopicPartition(topic, p) for p in sorted(consumer.partitions_for_topic(topic))]
        consumer.assign(tps)
        consumer.seek_to_beginning(*tps)
        got = 0
        t = time.perf_counter()
        while got < n:
            for recs in consumer.poll(timeout_ms=1000, max_records=500).values():
                got += len(recs)
        return time.perf_counter() - t
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
    return ", ".join(f"{k} {v:.1f}" for k, v in seconds.items() if k != "reports")


def _instances(n: int, folder: Path, bootstrap: str, topics: tuple[str, str, str], group: str, batch: int,
               extra: dict):
    """Run ``n`` service processes in one group; returns (wall seconds first batch → last finish, reports)."""
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
    first = min(r["first_batch"] for r in out if r["first_batch"] is not None)
    return max(r["finished"] for r in out) - first, out


def run(args) -> int:
    from matcher.config import config_from_mapping
    from matcher.errors import InputError
    from matcher.replay import replay_archive
    from matcher.service import Service

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
            n = args.reports
            print(f"kafka benchmark: {n:,} transient reports over {args.partitions} partitions + "
                  f"{args.events} GW alerts, broker {bootstrap}, batch {args.batch}")
            t = time.perf_counter()
            sc = scenario(n, n_events=args.events, seed=args.seed)
            print_row("inventing the input (set-up)", f"{time.perf_counter() - t:8.2f} s")
            _create_topics(bootstrap, {alerts: 1, reports: args.partitions, results: args.partitions},
                           {"max.message.bytes": str(8 * 1024 * 1024)})
            took = _produce(bootstrap, alerts, sc.alerts, max_request_size=8 * 1024 * 1024)
            took += _produce(bootstrap, reports, sc.reports)
            print_row("producing them with kafka-python (set-up)", f"{took:8.2f} s")

            raw = _raw_consume(bootstrap, reports, n)
            print_row("baseline: bare kafka-python consumer, reports topic",
                      f"{raw:8.2f} s  {n / raw:12,.0f} reports/s")

            archive = folder / "same-messages.jsonl"
            archive.write_bytes(b"".join(v + b"\n" for v in sc.alerts + sc.reports))
            t = time.perf_counter()
            ref = replay_archive(archive, out_dir=folder / "replay", progress_mode="off", config=config_from_mapping(
                {"state_dir": str(folder / "replay-state"), "service": {"batch_size": args.batch}}, base_dir=folder))
            plain = time.perf_counter() - t
            print_row("service without Kafka: archive replay, same messages",
                      f"{plain:8.2f} s  {n / plain:12,.0f} reports/s  {raw / plain:6.3f} × baseline")
            print_row("  seconds per loop step", _seconds_text(ref.stats.seconds))

            extra = {"commit_interval_ms": args.commit_interval_ms}
            cfg = config_from_mapping(kafka_config(bootstrap=bootstrap, alerts=alerts, reports=reports,
                                                   results=results, group=f"bench-group-{tag}",
                                                   state_dir=folder / "state", batch_size=args.batch,
                                                   extra_source=extra),
                                      base_dir=folder)
            t = time.perf_counter()
            with Service(cfg) as svc:
                svc.run(until_finished=True)
                counts = svc.store.counts()
                sent, last = svc.store.sink_cursor("results"), svc.store.last_seq()
                published = svc.publishers[0].sink.stats["sent"]
                seconds = dict(svc.stats.seconds)
            took = time.perf_counter() - t
            on_topic = _count_topic(bootstrap, results)
            print_row("service, 1 instance: broker → service → broker",
                      f"{took:8.2f} s  {n / took:12,.0f} reports/s  {raw / took:6.3f} × baseline")
            print_row("  seconds per loop step", _seconds_text(seconds))
            print_row("  compared with the archive replay", f"{plain / took:6.3f} × archive replay")
            print_row("  stored messages / transients / events / results / bad",
                      f"{counts['messages']:,} / {counts['transients']:,} / {counts['events']} / "
                      f"{counts['results']:,} / {counts['quarantine']}")
            print_row("  results acknowledged / records on the results topic",
                      f"{published:,} / {on_topic:,}")
            ok = (counts["transients"] == n and counts["events"] == args.events and sent == last
                  and on_topic == published and counts["results"] == ref.counts["results"])
            best = took
            if args.instances:
                wall, reps = _instances(args.instances, folder, bootstrap, (alerts, reports, results),
                                        f"bench-group-{tag}-x{args.instances}", args.batch, extra)
                stored = sum(r["counts"]["transients"] for r in reps)
                print_row(f"service, {args.instances} processes in one group: broker → broker",
                          f"{wall:8.2f} s  {n / wall:12,.0f} reports/s  {raw / wall:6.3f} × baseline")
                print_row("  reports stored by each instance", " / ".join(f"{r['counts']['transients']:,}"
                                                                        for r in reps))
                ok = ok and stored >= n
                best = min(best, wall)
            print_row("target: service ≥ 0.5 × baseline", "met" if raw / best >= 0.5 else
                      f"NOT met (best {raw / best:.3f} ×)")
            return 0 if ok else 1
    finally:
        if broker is not None:
            broker.close()
