"""Faults: the broker stopped and restarted mid-stream (twice), and poison messages on a topic.

Broker restarts: a service process (``matcher listen --until-done``) runs while the test
stops the broker and starts it again, twice, each time with reports still unread.
Compared with an uninterrupted single-instance run of the same messages (an archive
replay): no result lost, none published twice (the idempotent producer's retries after
the restart do not duplicate), and ``matcher status`` shows lag zero at the end.

Poison: 1% of the reports on a topic cannot be decoded (eight kinds of bad input,
plus one record over the size limit). Each is quarantined exactly once — also when the
whole topic is read again into the same store — with its exact bytes and the topic,
partition and offset the broker gave it.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time

import pytest
import yaml

from kafka_broker import unique_topic
from kafka_helpers import produce, read_topic
from matcher.bench.kafka import kafka_config, scenario
from matcher.config import config_from_mapping, load_config
from matcher.replay import replay_archive
from matcher.service import Service
from matcher.store import Store
from matcher.streams.sources.kafka import external_lag

pytestmark = pytest.mark.kafka


def committed_reports(options) -> int:
    return sum(p["done"] or 0 for p in external_lag("kafka", options, {}) if p["role"] == "reports")


@pytest.mark.slow
def test_broker_restarted_twice_mid_stream_loses_and_duplicates_nothing(kafka_broker, tmp_path):
    n = 60_000
    bs = kafka_broker.bootstrap
    sc = scenario(n, n_events=3, seed=11)
    alerts, reports, results = unique_topic("fault-alerts"), unique_topic("fault-reports"), unique_topic("fault-res")
    kafka_broker.create_topics({alerts: 1}, configs={"max.message.bytes": str(4 * 1024 * 1024)})
    kafka_broker.create_topics({reports: 3, results: 3})
    produce(bs, alerts, sc.alerts, partition=0, max_request_size=4 * 1024 * 1024)
    produce(bs, reports, sc.reports, partition=lambda i: i % 3)

    archive = tmp_path / "all.jsonl"
    archive.write_bytes(b"".join(v + b"\n" for v in sc.alerts + sc.reports))
    ref = replay_archive(archive, out_dir=tmp_path / "ref-out", progress_mode="off",
                         config=config_from_mapping({"state_dir": str(tmp_path / "ref")}, base_dir=tmp_path))
    with Store(ref.store_path) as st:
        golden = {r.key: r.record for r in st.results()}

    cfg = kafka_config(bootstrap=bs, alerts=alerts, reports=reports, results=results, group=unique_topic("fault-g"),
                       state_dir=tmp_path / "state", client_id="matcher-fault", batch_size=200)
    cfg_path = tmp_path / "service.yaml"
    cfg_path.write_text(yaml.safe_dump(cfg))
    options = load_config(cfg_path).sources["kafka"].options
    log = open(tmp_path / "service.log", "ab")
    proc = subprocess.Popen([sys.executable, "-m", "matcher", "listen", "-c", str(cfg_path), "--until-done"],
                            stdout=log, stderr=subprocess.STDOUT, env=dict(os.environ, MATCHER_PROGRESS="off"))
    log.close()
    outages = []
    try:
        for fraction in (0.15, 0.55):
            deadline = time.monotonic() + 240
            while (done := committed_reports(options)) < fraction * n:
                assert proc.poll() is None, (tmp_path / "service.log").read_text()[-3000:]
                assert time.monotonic() < deadline, f"only {done} reports committed after 240 s"
                time.sleep(0.2)
            assert done < n, "the service finished before the broker could be stopped mid-stream"
            t = time.monotonic()
            try:
                kafka_broker.stop()
                time.sleep(2.0)  # the service keeps polling, committing and publishing against no broker
            finally:
                kafka_broker.start()
            outages.append((done, round(time.monotonic() - t, 1)))
        assert proc.wait(300) == 0, (tmp_path / "service.log").read_text()[-3000:]
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(30)
    print("broker outages (reports committed before, seconds down):", outages)

    with Store(tmp_path / "state" / "matcher.sqlite") as st:
        assert {r.key: r.record for r in st.results()} == golden  # the same results, p_assoc included
        assert st.counts()["transients"] == n
        outbox = [r for r in st.outbox_after(0, 10 ** 7) if r.kind == "match"]
    records = read_topic(bs, results, len(outbox))
    # Every match row of the outbox is on the topic exactly once: nothing lost, nothing re-sent.
    assert sorted(int(dict(r.headers)["matcher-seq"]) for r in records) == [r.seq for r in outbox]
    last = {}
    for r in sorted(records, key=lambda r: (r.partition, r.offset)):
        last[r.key.decode()] = json.loads(r.value)
    assert last == golden
    # matcher status: every partition's lag is back to zero.
    status = subprocess.run([sys.executable, "-m", "matcher", "status", "-c", str(cfg_path), "--json"],
                            capture_output=True, text=True, timeout=120)
    assert status.returncode == 0, status.stderr
    info = json.loads(status.stdout)
    parts = info["sources"]["kafka"]["partitions"]
    assert {(p["topic"], p["role"]) for p in parts} == {(alerts, "alerts"), (reports, "reports")}
    assert len(parts) == 4 and all(p["lag"] == 0 for p in parts)
    assert info["sinks"]["results"]["backlog"] == 0


def test_poison_messages_are_quarantined_once_byte_identical_with_their_offsets(kafka_broker, tmp_path):
    bs = kafka_broker.bootstrap
    sc = scenario(5_000, n_events=2, seed=5, poison_every=100)
    oversize = b'{"schema":"matcher/1","type":"transient","pad":"' + b"x" * 100_000 + b'"}'
    values = sc.reports + [oversize]
    alerts, reports = unique_topic("poison-alerts"), unique_topic("poison-reports")
    kafka_broker.create_topics({alerts: 1}, configs={"max.message.bytes": str(4 * 1024 * 1024)})
    kafka_broker.create_topics({reports: 3})
    produce(bs, alerts, sc.alerts, partition=0, max_request_size=4 * 1024 * 1024)
    meta = produce(bs, reports, values, partition=lambda i: i % 3)
    poison = {(m.topic, m.partition, m.offset): v for m, v in zip(meta, values)
              if v is oversize or not v.startswith(b'{"schema":"matcher/1","type":"transient","transient_id":"KT')}
    assert len(poison) == 51  # 1% of the reports, and the oversized one

    def run(group):
        cfg = kafka_config(bootstrap=bs, alerts=alerts, reports=reports, results=None, group=group,
                           state_dir=tmp_path / "state")
        cfg["limits"] = {"message_max_bytes": 65536}  # the padded record is over it (the alerts are ~42 kB)
        with Service(config_from_mapping(cfg, base_dir=tmp_path)) as svc:
            svc.run(until_finished=True)
            return svc.store.counts(), svc.store.quarantined()

    counts, rows = run(unique_topic("poison-g1"))
    assert counts["quarantine"] == len(poison) and counts["transients"] == len(values) - len(poison)
    assert counts["events"] == 2
    got = {(r.origin_where, r.origin_part, r.origin_offset): r for r in rows}
    assert set(got) == set(poison)  # each once, where the broker put it
    for where, row in got.items():
        raw = poison[where]
        assert row.origin_kind == "kafka" and row.source == "kafka" and row.reason
        assert row.origin == f"{where[0]}[{where[1]}]@{where[2]}"
        if raw is oversize:
            # Over the limit: the first bytes are kept, with the true size, and the reason says so.
            assert row.truncated and row.size == len(raw) and row.raw == raw[: 65536 + 1]
        else:
            assert not row.truncated and row.raw == raw  # byte-identical
    # Read the whole topic again into the same store (a new group starts at the beginning):
    # nothing is quarantined or stored a second time.
    again, rows2 = run(unique_topic("poison-g2"))
    assert again == counts and [r.id for r in rows2] == [r.id for r in rows]
