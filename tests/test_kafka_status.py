"""``matcher status``: store counts, outbox backlog, Kafka lag per partition; no secret ever shown."""

from __future__ import annotations

import json
import socket

import pytest
import yaml

from kafka_broker import unique_topic
from kafka_helpers import drain, produce, source_options
from matcher.cli import main
from matcher.config import load_config
from matcher.service import Service
from matcher.streams.sources.kafka import KafkaSource

SECRET = "status-secret-never-printed"


def closed_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]  # closed again when the socket closes


def test_unreachable_broker_and_no_store_yet(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("KPW", SECRET)
    ca = tmp_path / "ca.pem"
    ca.write_text("not used: nothing is listening")
    cfg = {"state_dir": "state", "secrets": {"kpw": {"env": "KPW"}},
           "sources": {"k": {"kind": "kafka", "topics": {"alerts": ["gw"]}, "connection": {
               "bootstrap_servers": [f"127.0.0.1:{closed_port()}"],
               "security": {"protocol": "SASL_SSL", "sasl_mechanism": "SCRAM-SHA-256", "username": "u",
                            "password_secret": "kpw", "ca_file": str(ca)}}}},
           "sinks": {"m": {"kind": "jsonl", "path": "out/m.jsonl"}}}
    path = tmp_path / "c.yaml"
    path.write_text(yaml.safe_dump(cfg))
    assert main(["status", "-c", str(path), "--json", "--timeout", "0.5"]) == 1
    out, err = capsys.readouterr()
    info = json.loads(out)
    assert info["store"]["exists"] is False and info["store"]["counts"] is None
    assert not (tmp_path / "state").exists()  # status never creates a store
    assert info["sinks"] == {"m": {"kind": "jsonl", "sent_seq": 0, "last_seq": 0, "backlog": 0}}
    src = info["sources"]["k"]
    assert "no broker accepted a connection" in src["error"] and src["partitions"] == []
    assert src["connection"]["security_protocol"] == "SASL_SSL" and src["connection"]["username"] == "u"
    assert "a broker could not be reached" in err
    assert main(["status", "-c", str(path), "--timeout", "0.5"]) == 1
    text = capsys.readouterr()
    assert "unreachable" in text.out and "not created yet" in text.out
    for t in (out, err, text.out, text.err):
        assert SECRET not in t


@pytest.mark.kafka
def test_lag_per_partition_before_and_after_the_service(kafka_broker, tmp_path, capsys):
    bs = kafka_broker.bootstrap
    alerts, reports, results = unique_topic("st-alerts"), unique_topic("st-reports"), unique_topic("st-res")
    kafka_broker.create_topics({alerts: 1, reports: 2, results: 1})
    produce(bs, reports, [b'{"not": "a report"}'] * 7, partition=lambda i: i % 2)
    conn = {"bootstrap_servers": [bs]}
    cfg = {"state_dir": "state",
           "sources": {"k": {"kind": "kafka", "connection": conn, "topics": {"alerts": [alerts], "reports": [reports]},
                             "group_id": unique_topic("st-g"), "stop_at_end": True, "session_timeout_ms": 6000,
                             "heartbeat_interval_ms": 1000}},
           "sinks": {"out": {"kind": "kafka", "connection": conn, "topic": results}}}
    path = tmp_path / "c.yaml"
    path.write_text(yaml.safe_dump(cfg))
    assert main(["status", "-c", str(path), "--json"]) == 0
    before = json.loads(capsys.readouterr().out)["sources"]["k"]
    assert [(p["topic"], p["partition"], p["role"], p["end"], p["done"], p["lag"]) for p in before["partitions"]] == [
        (alerts, 0, "alerts", 0, None, 0), (reports, 0, "reports", 4, None, 4), (reports, 1, "reports", 3, None, 3)]
    assert before["lag_total"] == 7
    with Service(load_config(path)) as svc:
        svc.run(until_finished=True)
        assert svc.store.counts()["quarantine"] == 7
    assert main(["status", "-c", str(path)]) == 0
    text = capsys.readouterr().out
    assert "lag 0" in text and "7 quarantined" in text and reports in text
    assert main(["status", "-c", str(path), "--json"]) == 0
    after = json.loads(capsys.readouterr().out)
    assert [p["lag"] for p in after["sources"]["k"]["partitions"]] == [0, 0, 0]
    assert [p["done"] for p in after["sources"]["k"]["partitions"]] == [None, 4, 3]
    assert after["sinks"]["out"]["backlog"] == 0 and after["store"]["counts"]["messages"] == 0


@pytest.mark.kafka
def test_source_lag_for_the_dashboard(kafka_broker):
    bs = kafka_broker.bootstrap
    reports, group = unique_topic("dash-reports"), unique_topic("dash-g")
    kafka_broker.create_topics({reports: 1})
    produce(bs, reports, [b"x%d" % i for i in range(30)], partition=0)
    src = KafkaSource("k", source_options(bs, reports=[reports], group=group))
    try:
        got = src.poll(10, 10.0)
        while not got:
            got = src.poll(10, 1.0)
        lag = src.lag()[0]
        # 10 handed out, none settled: all 30 still count as lag, 10 of them in flight.
        assert (lag["end"], lag["done"], lag["lag"], lag["in_flight"]) == (30, 0, 30, len(got))
        src.commit([type("S", (), {"item": i, "reason": None})() for i in got])
        assert src.flush_commits()  # commits are asynchronous; lag counts from the acknowledged offset
        assert src.lag()[0]["lag"] == 30 - len(got) and src.lag()[0]["in_flight"] == 0
        drain(src, 30 - len(got))
        assert src.flush_commits()
        assert src.lag()[0]["lag"] == 0
        info = src.info()
        assert info["group"]["group_id"] == group and info["stats"]["commits"] >= 2
    finally:
        src.close()
