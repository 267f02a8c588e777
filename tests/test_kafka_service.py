"""End to end through Kafka: the demo scenario over topics gives the same summary as the archive replay.

The scenario (matcher.demo, invented) is replayed once from its archive (the
reference). Then the same messages are produced to an alerts topic and a reports
topic — once with kafka-python, once with Debian's kcat (librdkafka, a client we did
not write) — and the service reads them with the Kafka source and publishes with the
Kafka sink. Its ``summary.json`` must equal the replay's exactly, and what the results
topic holds (read back by kafka-python, or by kcat) must be what the store published.

The two topics are produced in the archive's order the way a live stream arrives: a
run of reports, and the next GW alert only once the service has taken everything
before it. (Kafka orders records within a partition only; an alert that overtook the
reports sent before it would see a different stream than the archive describes.) The
localizations travel inside the alerts as base64 FITS, as they do on a network stream,
so the topics must accept messages of a few MB.
"""

from __future__ import annotations

import base64
import json
import shutil
import subprocess
import time
from pathlib import Path

import pytest

from kafka_broker import unique_topic
from kafka_helpers import produce, read_topic
from service_scenarios import results_by_key
from matcher.config import config_from_mapping
from matcher.demo import TRUTH, write_scenario
from matcher.replay import replay_archive
from matcher.service import Service
from matcher.store import Store
from matcher.summary import build_summary, summary_json
from matcher.timeconv import gps_to_unix, iso_to_gps

pytestmark = pytest.mark.kafka
BIG = 8 * 1024 * 1024  # topic max.message.bytes and producer max_request_size: the maps are ~3 MB in base64


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The (smaller) demo scenario, its archive replay and its messages ready for Kafka."""
    folder = tmp_path_factory.mktemp("kafka-demo")
    sc = write_scenario(folder / "scenario", n_background=2000, n_followup=300, n_galaxies=15000)
    base = {"catalog": {"path": str(sc.catalog), "hosts": 10}, "service": {"batch_size": 2000, "poll_timeout_s": 0.2}}
    ref_cfg = config_from_mapping({**base, "state_dir": str(folder / "replay-state")}, base_dir=folder)
    ref = replay_archive(sc.archive, out_dir=folder / "replay", config=ref_cfg, progress_mode="off")
    messages = []  # (kind, bytes, received_at Unix s) in archive order
    for line in sc.archive.read_bytes().splitlines():
        obj = json.loads(line)
        if obj["type"] == "gw_alert" and isinstance(obj.get("localization"), str):
            data = (sc.archive.parent / obj["localization"]).read_bytes()
            obj["localization"] = {"fits_base64": base64.b64encode(data).decode("ascii")}
            line = json.dumps(obj, separators=(",", ":")).encode()
        messages.append((obj["type"], line, gps_to_unix(iso_to_gps(obj["received_at"]))))
    return {"folder": folder, "scenario": sc, "base": base, "reference": ref, "messages": messages}


def segments(messages):
    """Runs of consecutive messages of one kind: (kind, [(bytes, received_at), ...])."""
    out = []
    for kind, data, t in messages:
        if not out or out[-1][0] != kind:
            out.append((kind, []))
        out[-1][1].append((data, t))
    return out


def service_config(demo, bootstrap, alerts, reports, results, group, state, **source):
    conn = {"bootstrap_servers": [bootstrap], "client_id": "test-demo"}
    return config_from_mapping({
        **demo["base"], "state_dir": str(state),
        "sources": {"kafka": {"kind": "kafka", "connection": conn, "topics": {"alerts": [alerts], "reports": [reports]},
                              "group_id": group, "session_timeout_ms": 6000, "heartbeat_interval_ms": 1000,
                              **source}},
        "sinks": {"results": {"kind": "kafka", "connection": conn, "topic": results, "kinds": None}},
    }, base_dir=demo["folder"])


def run_paced(svc, segs, send):
    """Send each run of messages, then step the service until it has stored all of them (live order)."""
    src = svc.sources[0]
    sent = {"gw_alert": 0, "transient": 0}
    for kind, msgs in segs:
        send(kind, msgs)
        sent[kind] += len(msgs)
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline:
            svc.step(timeout_s=0.2)
            done = {"gw_alert": 0, "transient": 0}
            for p in src.lag():
                done["gw_alert" if p["role"] == "alerts" else "transient"] += p["done"] or 0
            if done == sent and all(p["in_flight"] == 0 for p in src.lag()):
                break
        else:
            raise AssertionError(f"the service did not take {sent} within 120 s (it has {done})")
    svc.publish()


def check_against_reference(demo, svc):
    ref = demo["reference"]
    summary = build_summary(svc.store, hosts=svc.catalog.hosts)
    assert summary_json(summary) == summary_json(ref.summary)  # the same summary.json, byte for byte
    # Every stored result is the same record too. (Only the number of outbox rows may differ: how
    # often an intermediate p_assoc or rank was republished depends on where batches began.)
    with Store(ref.store_path) as st:
        assert results_by_key(svc.store) == results_by_key(st)
    counts = {k: v for k, v in svc.store.counts().items() if k != "outbox"}
    assert counts == {k: v for k, v in ref.counts.items() if k != "outbox"}
    # The scenario's point still stands through Kafka (not only "equal to the reference").
    ns = summary["events"][TRUTH["ns_event"]]
    assert ns["candidates"][0]["transient_id"] == TRUTH["counterpart"]
    assert summary["events"][TRUTH["withdrawn_event"]]["state"] == "withdrawn"
    return summary


def test_demo_through_kafka_python_equals_the_archive_replay(kafka_broker, demo, tmp_path):
    bs = kafka_broker.bootstrap
    alerts, reports, results = unique_topic("demo-alerts"), unique_topic("demo-reports"), unique_topic("demo-results")
    # The scenario is dated in 2027: Kafka 4 refuses records stamped more than an hour ahead of
    # its clock (message.timestamp.after.max.ms) unless the topic allows it.
    kafka_broker.create_topics({alerts: 1, reports: 1}, configs={"max.message.bytes": str(BIG),
                                                                 "message.timestamp.after.max.ms": str(2 ** 62)})
    kafka_broker.create_topics({results: 3})

    def send(kind, msgs):
        # The record timestamp carries the archive's received_at (ms), the Kafka source's default.
        produce(bs, alerts if kind == "gw_alert" else reports, [m for m, _ in msgs], partition=0,
                timestamps=[round(t * 1000) for _, t in msgs], max_request_size=BIG)

    cfg = service_config(demo, bs, alerts, reports, results, unique_topic("demo-group"), tmp_path / "state")
    with Service(cfg) as svc:
        run_paced(svc, segments(demo["messages"]), send)
        check_against_reference(demo, svc)
        outbox = {r.seq: r for r in svc.store.outbox_after(0, 10 ** 6)}
    # The results topic holds exactly the outbox: every row once, keyed, byte for byte.
    records = read_topic(bs, results, len(outbox))
    assert sorted(int(dict(r.headers)["matcher-seq"]) for r in records) == sorted(outbox)
    for r in records:
        row = outbox[int(dict(r.headers)["matcher-seq"])]
        assert (r.key, r.value) == (row.key.encode(), row.payload.encode())


def test_demo_produced_and_read_back_with_kcat(kafka_broker, demo, tmp_path):
    kcat = shutil.which("kcat")
    if kcat is None:
        pytest.fail("kcat is not installed (Debian package kcat): run `bash tests/kafka/install_kcat.sh` as root")
    bs = kafka_broker.bootstrap
    alerts, reports, results = unique_topic("kcat-alerts"), unique_topic("kcat-reports"), unique_topic("kcat-results")
    kafka_broker.create_topics({alerts: 1, reports: 1}, configs={"max.message.bytes": str(BIG)})
    kafka_broker.create_topics({results: 3})
    spool = tmp_path / "spool.jsonl"

    def send(kind, msgs):
        spool.write_bytes(b"".join(m + b"\n" for m, _ in msgs))
        # -l: one message per line of the file; -X message.max.bytes: librdkafka's own cap (1 MB by default).
        done = subprocess.run([kcat, "-b", bs, "-t", alerts if kind == "gw_alert" else reports, "-P", "-p", "0",
                               "-X", f"message.max.bytes={BIG}", "-l", str(spool)],
                              capture_output=True, text=True, timeout=120)
        assert done.returncode == 0, done.stderr

    # kcat stamps records with the time it sends them: the messages' own received_at is the arrival time.
    cfg = service_config(demo, bs, alerts, reports, results, unique_topic("kcat-group"), tmp_path / "state",
                         received_at="message")
    with Service(cfg) as svc:
        run_paced(svc, segments(demo["messages"]), send)
        check_against_reference(demo, svc)
        outbox = svc.store.outbox_after(0, 10 ** 6)
        current = {r.key: r.record for r in svc.store.results()}
    # kcat reads the results topic back: key, then value, one record per line.
    read = subprocess.run([kcat, "-b", bs, "-t", results, "-C", "-e", "-o", "beginning", "-q",
                           "-f", "%k\t%s\n"], capture_output=True, text=True, timeout=120)
    assert read.returncode == 0, read.stderr
    got = [tuple(line.split("\t", 1)) for line in read.stdout.splitlines()]
    assert sorted(got) == sorted((r.key, r.payload) for r in outbox)  # every output once, byte for byte
    # De-duplicated by key (the last record of each; one key, one partition, in order), the match
    # records are the store's current results.
    kinds = {r.key: r.kind for r in outbox}
    last = {}
    for key, value in got:
        if kinds[key] == "match":
            last[key] = json.loads(value)
    assert last == current
