"""The test broker is a working Apache Kafka: checked with two clients we did not write.

kafka-python (the client the project uses) and Debian's kcat (librdkafka, a separate
implementation of the protocol) both produce to and consume from the broker started
by the ``kafka_broker`` fixture; a consumer group splits partitions the way Kafka's
group protocol says it does; data survives a clean restart and a SIGKILL.
"""

from __future__ import annotations

import shutil
import subprocess
import time

import pytest
from kafka import KafkaConsumer, KafkaProducer, TopicPartition

from kafka_broker import BrokerError, KafkaBroker, unique_topic

pytestmark = pytest.mark.kafka

INSTALL_KCAT = "bash tests/kafka/install_kcat.sh"


def _produce(bootstrap: str, topic: str, records: list[tuple[int, bytes, bytes]]) -> list:
    """Send (partition, key, value) records; return each send's metadata (checked)."""
    producer = KafkaProducer(bootstrap_servers=bootstrap, client_id="test-producer")
    try:
        futures = [producer.send(topic, key=k, value=v, partition=p) for p, k, v in records]
        producer.flush(timeout=30)
        return [f.get(timeout=30) for f in futures]
    finally:
        producer.close(timeout=10)


def _read_partitions(bootstrap: str, topic: str, partitions: list[int], expected: int,
                     timeout: float = 30.0) -> list:
    """Read ``expected`` records from the start of the partitions, no consumer group."""
    consumer = KafkaConsumer(
        bootstrap_servers=bootstrap,
        client_id="test-reader",
        group_id=None,
        enable_auto_commit=False,
        auto_offset_reset="earliest",
    )
    try:
        consumer.assign([TopicPartition(topic, p) for p in partitions])
        records = []
        deadline = time.monotonic() + timeout
        while len(records) < expected and time.monotonic() < deadline:
            for batch in consumer.poll(timeout_ms=200).values():
                records.extend(batch)
        return records
    finally:
        consumer.close()


def test_produce_then_consume_round_trip(kafka_broker):
    topic = unique_topic("round-trip")
    kafka_broker.create_topics({topic: 1})
    sent = [(0, f"key-{i}".encode(), f"value-{i}".encode()) for i in range(5)]

    metadata = _produce(kafka_broker.bootstrap, topic, sent)
    # Offsets in a new partition start at 0 and grow by one per record (Kafka's log model).
    assert [m.offset for m in metadata] == [0, 1, 2, 3, 4]

    records = _read_partitions(kafka_broker.bootstrap, topic, [0], expected=5)
    assert [(r.offset, r.key, r.value) for r in records] == [
        (i, k, v) for i, (_, k, v) in enumerate(sent)
    ]


def test_consumer_group_splits_two_partitions_across_two_consumers(kafka_broker):
    topic = unique_topic("group-split")
    group = unique_topic("group")
    kafka_broker.create_topics({topic: 2})

    def member(name):
        c = KafkaConsumer(
            topic,
            bootstrap_servers=kafka_broker.bootstrap,
            client_id=name,
            group_id=group,
            enable_auto_commit=False,
            auto_offset_reset="earliest",
        )
        # A metadata fetch after subscribing, before the first join: kafka-python 3.0.12 can
        # otherwise strand a member that led an assignment on an empty snapshot (seen here in
        # CI: one member with both partitions, the other with none, for 60 s). The service's
        # source does the same; DEVELOPERS.md, "A group member that never got a partition".
        c.topics()
        return c

    consumers = [member("member-a"), member("member-b")]
    try:
        # Both members must keep polling for the group to settle: a member only
        # joins the new generation from inside poll().
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            for c in consumers:
                c.poll(timeout_ms=100)
            owned = [c.assignment() for c in consumers]
            if all(len(a) == 1 for a in owned) and owned[0] != owned[1]:
                break
        owned = [c.assignment() for c in consumers]
        assert [len(a) for a in owned] == [1, 1], f"assignments after 60 s: {owned}"
        assert owned[0] | owned[1] == {TopicPartition(topic, 0), TopicPartition(topic, 1)}

        # Each member now receives the records of its own partition only.
        sent = [(p, f"k{p}-{i}".encode(), f"v{p}-{i}".encode()) for p in (0, 1) for i in range(3)]
        _produce(kafka_broker.bootstrap, topic, sent)
        received = [[], []]
        deadline = time.monotonic() + 30
        while sum(map(len, received)) < len(sent) and time.monotonic() < deadline:
            for i, c in enumerate(consumers):
                for batch in c.poll(timeout_ms=100).values():
                    received[i].extend(batch)
        for i, c in enumerate(consumers):
            assert {TopicPartition(r.topic, r.partition) for r in received[i]} == c.assignment()
        got = sorted((r.partition, r.key, r.value) for batch in received for r in batch)
        assert got == sorted(sent)
    finally:
        for c in consumers:
            c.close()


@pytest.mark.parametrize("how", ["stop", "kill"])
def test_broker_restart_keeps_data(kafka_broker, how):
    topic = unique_topic(f"restart-{how}")
    kafka_broker.create_topics({topic: 2})
    sent = [(p, f"key-{p}-{i}".encode(), f"value-{p}-{i}".encode()) for p in (0, 1) for i in range(4)]
    # Every send acknowledged (acks=all, the kafka-python 3.0 default) before the restart.
    _produce(kafka_broker.bootstrap, topic, sent)
    bootstrap = kafka_broker.bootstrap
    old_pid = kafka_broker.pid

    try:
        if how == "stop":
            kafka_broker.stop()
        else:
            # SIGKILL: nothing flushed by the broker on the way down; the records
            # survive in the segment files (page cache) and log recovery.
            kafka_broker.kill()
        assert not kafka_broker.running
    finally:
        kafka_broker.start()

    assert kafka_broker.pid != old_pid
    assert kafka_broker.bootstrap == bootstrap, "a restart must keep the client address"
    records = _read_partitions(kafka_broker.bootstrap, topic, [0, 1], expected=len(sent))
    assert sorted((r.partition, r.key, r.value) for r in records) == sorted(sent)


def test_kcat_produces_and_reads_back(kafka_broker):
    kcat = shutil.which("kcat")
    if kcat is None:
        pytest.fail(f"kcat is not installed (Debian package kcat): run `{INSTALL_KCAT}` as root")
    topic = unique_topic("kcat")
    kafka_broker.create_topics({topic: 1})
    lines = [f"alert-{i}:payload {i} with spaces" for i in range(6)]

    produced = subprocess.run(
        [kcat, "-b", kafka_broker.bootstrap, "-t", topic, "-P", "-K", ":", "-p", "0"],
        input="\n".join(lines) + "\n", text=True, capture_output=True, timeout=60,
    )
    assert produced.returncode == 0, f"kcat -P failed: {produced.stderr}"

    consumed = subprocess.run(
        [kcat, "-b", kafka_broker.bootstrap, "-t", topic, "-C", "-e", "-o", "beginning",
         "-f", "%p %o %k:%s\n"],
        text=True, capture_output=True, timeout=60,
    )
    assert consumed.returncode == 0, f"kcat -C failed: {consumed.stderr}"
    assert consumed.stdout.splitlines() == [f"0 {i} {line}" for i, line in enumerate(lines)]

    # The same records through the other client: kcat and kafka-python agree.
    records = _read_partitions(kafka_broker.bootstrap, topic, [0], expected=len(lines))
    assert [f"{r.key.decode()}:{r.value.decode()}" for r in records] == lines


def test_missing_jars_fail_with_the_fetch_command(tmp_path):
    broker = KafkaBroker(lib_dir=tmp_path / "no-jars")
    try:
        with pytest.raises(BrokerError, match="tests/kafka/fetch.sh"):
            broker.start()
    finally:
        broker.close()


def test_bad_configuration_raises_with_the_broker_log():
    # An unparsable value: Kafka's config parser rejects it (at the storage format).
    broker = KafkaBroker(properties={"log.retention.hours": "forever"}, start_timeout=60)
    try:
        with pytest.raises(BrokerError) as info:
            broker.start()
        message = str(info.value)
        assert "broker log, last lines" in message
        assert "Invalid value forever for configuration log.retention.hours" in message
        assert not broker.running
    finally:
        broker.close()


def test_broker_process_exiting_at_start_raises_with_its_log():
    broker = KafkaBroker(start_timeout=60)
    try:
        broker.start()
        broker.stop()
        # Storage without its identity file: kafka.Kafka refuses to start and exits.
        (broker.work_dir / "data" / "meta.properties").unlink()
        with pytest.raises(BrokerError) as info:
            broker.start()
        message = str(info.value)
        assert "exited with status 1 while starting" in message
        assert "No readable meta.properties files found" in message
        assert not broker.running
    finally:
        broker.close()


def test_cluster_ids_never_look_like_an_option():
    # StorageTool's parser reads an id starting with "-" as an option (a CI run failed so, once).
    # The id is 16 bytes in URL-safe base64 without padding (the form KRaft expects, common practice).
    import base64

    from kafka_broker import new_cluster_id

    for _ in range(5000):
        cid = new_cluster_id()
        assert not cid.startswith("-") and len(cid) == 22
        assert len(base64.urlsafe_b64decode(cid + "==")) == 16
