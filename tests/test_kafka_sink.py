"""The Kafka sink against the real broker: keyed results from the store's outbox, at least once.

What reached the topic is read back by a separate kafka-python consumer and compared
with the store's outbox and results.
"""

from __future__ import annotations

import base64
import json

import pytest

from kafka_broker import unique_topic
from kafka_helpers import read_topic
from matcher.store import Store
from matcher.streams.codecs import NativeCodec
from matcher.streams.intake import decode_item, record
from matcher.streams.kafka_common import Connection
from matcher.streams.raw import RawItem
from matcher.streams.sinks import KafkaSink, KafkaSinkOptions, Publisher, SinkError
from streams_helpers import gw, line, tiny_map_bytes

pytestmark = pytest.mark.kafka


@pytest.fixture
def store(tmp_path):
    s = Store(tmp_path / "s.sqlite")
    alert = gw(localization={"fits_base64": base64.b64encode(tiny_map_bytes()).decode()})
    with s.transaction() as tx:
        assert record(tx, decode_item(RawItem.from_bytes(line(alert)), NativeCodec())) is not None
    yield s
    s.close()


def add_results(store, n, start=0, **fields):
    with store.transaction() as tx:
        for i in range(start, start + n):
            tx.put_result("EV-TEST-1", 1, f"T{i:03d}", {"p_assoc": round(0.001 * i, 6), **fields})


def sink(bootstrap, topic, **kw):
    conn_kw = {k: kw.pop(k) for k in ("request_timeout_ms",) if k in kw}
    return KafkaSink("results", KafkaSinkOptions(Connection((bootstrap,), client_id="test-sink",
                                                            connect_timeout_ms=10000, **conn_kw), topic, **kw))


def last_per_key(records) -> dict:
    """What a consumer that de-duplicates by key keeps: the last record of each key (partition order)."""
    out = {}
    for r in sorted(records, key=lambda r: (r.partition, r.offset)):
        out[r.key.decode()] = r.value.decode()
    return out


def test_outbox_rows_are_published_keyed_and_acknowledged(kafka_broker, store):
    bs = kafka_broker.bootstrap
    topic = unique_topic("results")
    kafka_broker.create_topics({topic: 3})
    add_results(store, 50)
    pub = Publisher(store, sink(bs, topic))
    try:
        assert pub.publish() == 50
        # A newer revision supersedes: the same keys again, with a new status.
        with store.transaction() as tx:
            tx.supersede("EV-TEST-1", 2)
        add_results(store, 5, start=50)
        pub.publish()
        producer_config = pub.sink._producer.config
    finally:
        pub.close()
    rows = store.outbox_after(0, 10_000)
    assert store.sink_cursor("results") == rows[-1].seq  # advanced only after the acknowledgements
    records = read_topic(bs, topic, len(rows))
    assert len(records) == len(rows)  # nothing twice, nothing missing
    by_seq = {int(dict(r.headers)["matcher-seq"]): r for r in records}
    assert sorted(by_seq) == [r.seq for r in rows]
    for row in rows:
        rec = by_seq[row.seq]
        # Key = the result key, value = the outbox's JSON text byte for byte.
        assert rec.key == row.key.encode() and rec.value == row.payload.encode()
        assert dict(rec.headers)["matcher-kind"] == b"match"
    # One key, one partition (the default partitioner hashes the key): its records stay in order.
    partitions = {}
    for r in records:
        partitions.setdefault(r.key, set()).add(r.partition)
    assert all(len(p) == 1 for p in partitions.values())
    kept = last_per_key(records)
    assert {k: json.loads(v)["status"] for k, v in kept.items()} == {r.key: r.status for r in store.results()}
    assert producer_config["enable_idempotence"] is True and producer_config["acks"] == -1  # acks=all


def test_a_crash_before_the_cursor_moves_resends_and_dedup_by_key_is_exact(kafka_broker, store):
    bs = kafka_broker.bootstrap
    topic = unique_topic("results")
    kafka_broker.create_topics({topic: 2})
    add_results(store, 20)
    # The sink wrote and the broker acknowledged, but the process died before mark_sent.
    first = sink(bs, topic)
    first.open(store.sink_cursor("results"))
    first.write(store.outbox_after(0, 100)[:12])
    first.flush()
    first.close()
    assert store.sink_cursor("results") == 0
    pub = Publisher(store, sink(bs, topic))
    try:
        assert pub.publish() == 20
    finally:
        pub.close()
    records = read_topic(bs, topic, 32)
    assert len(records) == 32  # at least once: the twelve were sent twice
    assert last_per_key(records) == {r.key: r.payload for r in store.outbox_after(0, 100)}


def test_broker_outage_fails_the_flush_keeps_the_rows_and_the_next_publish_delivers(kafka_broker, store):
    bs = kafka_broker.bootstrap
    topic = unique_topic("results")
    kafka_broker.create_topics({topic: 1})
    add_results(store, 5)
    pub = Publisher(store, sink(bs, topic, request_timeout_ms=1500, delivery_timeout_ms=3000, max_block_ms=3000))
    try:
        assert pub.publish() == 5
        add_results(store, 5, start=5)
        try:
            kafka_broker.stop()
            with pytest.raises(SinkError, match=r"sink results \(kafka topic .*\): .*not acknowledged.*stay in "
                                                r"the outbox"):
                pub.publish()
            assert store.sink_cursor("results") == 5  # not advanced past what was acknowledged
        finally:
            kafka_broker.start()
        assert pub.publish() == 5  # a new producer, after the restart
        assert store.sink_cursor("results") == 10
    finally:
        pub.close()
    records = read_topic(bs, topic, 10)
    assert last_per_key(records) == {r.key: r.payload for r in store.outbox_after(0, 100)}


def test_missing_topic_is_a_clear_error(kafka_broker):
    s = sink(kafka_broker.bootstrap, "no-such-results-topic", max_block_ms=2000)
    with pytest.raises(SinkError, match=r"sink results \(kafka topic no-such-results-topic at 127\.0\.0\.1:\d+\): "
                                        r"the topic does not exist"):
        s.open(0)
    s.close()
