"""Helpers for the Kafka tests: produce and read records with kafka-python, options, settling.

Every message produced here is invented test data.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

from kafka import KafkaConsumer, KafkaProducer, TopicPartition

from matcher.streams.kafka_common import Connection
from matcher.streams.sources.kafka import KafkaSourceOptions

__all__ = ["Done", "produce", "read_topic", "source_options", "drain", "settle"]


@dataclass(frozen=True)
class Done:
    """An item settled as the service settles it (``reason`` None: accepted or already stored)."""

    item: object
    reason: str | None = None


def settle(items, reason=None) -> list[Done]:
    return [Done(i, reason) for i in items]


def produce(bootstrap: str, topic: str, values, *, keys=None, partition=None, max_request_size=1048576,
            timestamps=None) -> list:
    """Send values (bytes) to ``topic``; return each record's metadata, every send checked."""
    producer = KafkaProducer(bootstrap_servers=bootstrap, client_id="test-producer", linger_ms=5,
                             batch_size=256 * 1024, max_request_size=max_request_size)
    try:
        futures = []
        for i, v in enumerate(values):
            futures.append(producer.send(topic, value=v, key=None if keys is None else keys[i],
                                         partition=partition if not callable(partition) else partition(i),
                                         timestamp_ms=None if timestamps is None else timestamps[i]))
        producer.flush(timeout=60)
        return [f.get(timeout=60) for f in futures]
    finally:
        producer.close(timeout=10)


def read_topic(bootstrap: str, topic: str, expected: int = 0, timeout: float = 60.0) -> list:
    """Every record of ``topic`` (no group): read until each partition's end offset, and at least ``expected``."""
    consumer = KafkaConsumer(bootstrap_servers=bootstrap, client_id="test-reader", group_id=None,
                             enable_auto_commit=False, auto_offset_reset="earliest")
    try:
        tps = [TopicPartition(topic, p) for p in sorted(consumer.partitions_for_topic(topic))]
        consumer.assign(tps)
        consumer.seek_to_beginning(*tps)
        records = []
        deadline = time.monotonic() + timeout
        ends = consumer.end_offsets(tps)
        while time.monotonic() < deadline:
            for batch in consumer.poll(timeout_ms=200).values():
                records.extend(batch)
            if len(records) >= expected and all(consumer.position(tp) >= ends[tp] for tp in tps):
                break
            if len(records) < expected:
                ends = consumer.end_offsets(tps)  # still being written
        return records
    finally:
        consumer.close()


def source_options(bootstrap: str, alerts=(), reports=(), group=None, **kw) -> KafkaSourceOptions:
    """Options for a test source: the broker's minimum session timeout (6 s), so groups settle quickly."""
    kw.setdefault("session_timeout_ms", 6000)
    kw.setdefault("heartbeat_interval_ms", 1000)
    return KafkaSourceOptions(Connection((bootstrap,), client_id="test-source", connect_timeout_ms=10000),
                              tuple(alerts), tuple(reports), group, **kw)


def drain(source, expected: int, *, timeout: float = 60.0, batch: int = 500, commit: bool = True) -> list:
    """Poll (and commit each batch, as the service does after its store transaction) until ``expected`` items."""
    items = []
    deadline = time.monotonic() + timeout
    while len(items) < expected and time.monotonic() < deadline:
        got = source.poll(batch, 0.5)
        items.extend(got)
        if commit and got:
            source.commit(settle(got))
    return items
