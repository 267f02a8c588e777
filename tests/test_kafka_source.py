"""The Kafka source against the real broker: what it hands out, when it commits, rebalances, resume.

Checked against what the broker itself reports (offsets assigned to produced records,
the group's committed offsets read by a separate kafka-python consumer), not against
the source's own bookkeeping.
"""

from __future__ import annotations

import time
from dataclasses import astuple

import pytest
from kafka import KafkaConsumer, TopicPartition

from kafka_broker import unique_topic
from kafka_helpers import drain, produce, settle, source_options
from matcher.streams.kafka_common import KafkaTransportError
from matcher.streams.raw import Origin, RawItem
from matcher.streams.sources.kafka import KafkaSource, external_lag, stream_name

pytestmark = pytest.mark.kafka


def committed(bootstrap, group, topic, partitions):
    """The group's committed offsets as the broker reports them (a consumer that joins nothing)."""
    c = KafkaConsumer(bootstrap_servers=bootstrap, group_id=group, enable_auto_commit=False)
    try:
        return {p: c.committed(TopicPartition(topic, p), metadata=True) for p in partitions}
    finally:
        c.close(autocommit=False)


def committed_soon(bootstrap, group, topic, partition, want, timeout=15.0):
    """The group's committed offset of one partition once it is ``want`` (commits are asynchronous), else the last seen."""
    deadline = time.monotonic() + timeout
    while True:
        om = committed(bootstrap, group, topic, [partition])[partition]
        got = None if om is None else om.offset
        if got == want or time.monotonic() > deadline:
            return got
        time.sleep(0.05)


def values(items):
    return sorted(i.data for i in items)


def test_alerts_then_reports_with_origins_positions_and_explicit_commits(kafka_broker):
    bs = kafka_broker.bootstrap
    alerts, reports, group = unique_topic("alerts"), unique_topic("reports"), unique_topic("group")
    kafka_broker.create_topics({alerts: 2, reports: 3})
    a_meta = produce(bs, alerts, [b'{"alert":%d}' % i for i in range(6)], partition=lambda i: i % 2)
    r_meta = produce(bs, reports, [b'{"report":%d}' % i for i in range(30)], partition=lambda i: i % 3,
                     timestamps=[1_700_000_000_000 + i for i in range(30)])
    src = KafkaSource("k", source_options(bs, [alerts], [reports], group))
    try:
        src.resume({})
        items = drain(src, 36)
    finally:
        src.close()
    assert len(items) == 36
    # Every alert comes before any report: the alert topics are read to their end first.
    kinds = [i.origin.where for i in items]
    assert kinds[:6] == [alerts] * 6 and set(kinds[6:]) == {reports}
    # Origins are exactly where the broker put each record (topic, partition, offset).
    got = {(i.origin.where, i.origin.part, i.origin.offset): i.data for i in items}
    want = {(m.topic, m.partition, m.offset): b'{"alert":%d}' % n for n, m in enumerate(a_meta)}
    want |= {(m.topic, m.partition, m.offset): b'{"report":%d}' % n for n, m in enumerate(r_meta)}
    assert got == want
    assert all(i.origin.kind == "kafka" and i.origin.source == "k" for i in items)
    # Each item is the object the public constructors make (the source builds them a faster way).
    assert items == [RawItem(i.data, Origin("k", "kafka", i.origin.where, i.origin.part, i.origin.offset), i.position,
                             i.received_at, None, truncated=False, size=len(i.data)) for i in items]
    assert [hash(i.origin) for i in items] == [hash(Origin(*astuple(i.origin))) for i in items]
    # Alerts carry their next offset as a store position; reports none (their offsets live in the group).
    for i in items:
        if i.origin.where == alerts:
            assert i.position == (stream_name(alerts, i.origin.part), str(i.origin.offset + 1))
        else:
            assert i.position is None
    # received_at is the record's timestamp (CreateTime, ms -> s).
    ts = sorted(i.received_at for i in items if i.origin.where == reports)
    assert ts == [pytest.approx(1_700_000_000 + i / 1000, abs=1e-6) for i in range(30)]
    # The broker holds explicit commits: next offset, our metadata, and the records' leader epoch.
    c = committed(bs, group, reports, range(3))
    assert {p: om.offset for p, om in c.items()} == {0: 10, 1: 10, 2: 10}
    assert all(om.metadata == "matcher:k" and om.leader_epoch == 0 for om in c.values())
    # Alerts have no group: nothing committed anywhere for them.
    assert all(om is None for om in committed(bs, group, alerts, range(2)).values())


def test_nothing_is_committed_before_commit_and_never_past_an_unsettled_item(kafka_broker):
    bs = kafka_broker.bootstrap
    reports, group = unique_topic("reports"), unique_topic("group")
    kafka_broker.create_topics({reports: 1})
    produce(bs, reports, [b"r%d" % i for i in range(10)], partition=0)
    src = KafkaSource("k", source_options(bs, reports=[reports], group=group))
    try:
        items = drain(src, 10, commit=False)
        assert [i.origin.offset for i in items] == list(range(10))
        assert committed(bs, group, reports, [0])[0] is None  # polled is not done
        # The store committed items 5..9 but not yet 0..4 (as a partial settle would say):
        # nothing may be committed past offset 0.
        src.commit(settle(items[5:]))
        assert committed(bs, group, reports, [0])[0] is None
        src.commit(settle(items[:3]))  # sent asynchronously: the loop does not wait for the broker
        assert committed_soon(bs, group, reports, 0, 3) == 3
        src.commit(settle(items[3:5]))
        assert committed_soon(bs, group, reports, 0, 10) == 10
        assert src.flush_commits()  # the broker's answers booked: lag counts from the committed offset
        assert src.lag() == [{"topic": reports, "partition": 0, "role": "reports", "end": 10, "done": 10, "lag": 0,
                              "in_flight": 0}]
    finally:
        src.close()


def test_a_restarted_member_gets_exactly_the_uncommitted_reports_again(kafka_broker):
    bs = kafka_broker.bootstrap
    reports, group = unique_topic("reports"), unique_topic("group")
    kafka_broker.create_topics({reports: 2})
    produce(bs, reports, [b"r%d" % i for i in range(40)], partition=lambda i: i % 2)
    first = KafkaSource("k", source_options(bs, reports=[reports], group=group))
    try:
        seen = drain(first, 40, commit=False)
        # Only the first 15 of each partition reached the store before the "crash".
        done = [i for i in seen if i.origin.offset < 15]
        first.commit(settle(done))
    finally:
        first.close()
    again = KafkaSource("k", source_options(bs, reports=[reports], group=group))
    try:
        rest = drain(again, 10)
        time.sleep(1.0)
        rest += again.poll(500, 0.5)
    finally:
        again.close()
    assert sorted((i.origin.part, i.origin.offset) for i in rest) == [(p, o) for p in (0, 1) for o in range(15, 20)]


def test_alert_offsets_resume_from_the_store_not_the_broker(kafka_broker):
    bs = kafka_broker.bootstrap
    alerts = unique_topic("alerts")
    kafka_broker.create_topics({alerts: 2})
    produce(bs, alerts, [b"a%d" % i for i in range(8)], partition=lambda i: i % 2)
    one = KafkaSource("k", source_options(bs, [alerts]))
    try:
        one.resume({})
        items = drain(one, 8)
        assert values(items) == sorted(b"a%d" % i for i in range(8))
    finally:
        one.close()
    # Positions as a store holds them after storing offsets 0-2 of partition 0 and 0-1 of partition 1.
    stored = {stream_name(alerts, 0): "3", stream_name(alerts, 1): "2"}
    two = KafkaSource("k", source_options(bs, [alerts]))
    try:
        two.resume(stored)
        rest = drain(two, 3)
        time.sleep(0.5)
        rest += two.poll(500, 0.5)
        assert sorted((i.origin.part, i.origin.offset) for i in rest) == [(0, 3), (1, 2), (1, 3)]
        assert not two.finished  # a live topic never finishes
    finally:
        two.close()
    # Every instance reads every alert: a third instance with an empty store sees all eight.
    three = KafkaSource("other", source_options(bs, [alerts]))
    try:
        three.resume({})
        assert len(drain(three, 8)) == 8
    finally:
        three.close()


def test_rebalance_between_two_members_loses_nothing_and_commits_only_owned_partitions(kafka_broker):
    bs = kafka_broker.bootstrap
    reports, group = unique_topic("reports"), unique_topic("group")
    kafka_broker.create_topics({reports: 4})
    n = 400
    produce(bs, reports, [b"r%03d" % i for i in range(n)], partition=lambda i: i % 4)
    a = KafkaSource("a", source_options(bs, reports=[reports], group=group))
    b = KafkaSource("b", source_options(bs, reports=[reports], group=group))
    try:
        held = a.poll(40, 10.0)  # a owns all four partitions; these 40 are "in the store transaction"
        while not held:
            held = a.poll(40, 1.0)
        assert {i.origin.part for i in held} <= {0, 1, 2, 3}
        done_a, done_b = [], []
        # b joins; both keep polling (a member joins a generation only from inside poll).
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            got = b.poll(50, 0.2)
            b.commit(settle(got))
            done_b += got
            if b.stats["partitions_assigned"] and a.stats["partitions_revoked"]:
                break
            more = a.poll(0 + 1, 0.2) if not a.stats["partitions_revoked"] else []
            held += more
        assert a.stats["partitions_revoked"] >= 1
        # The store commits a's held batch only now, after the rebalance: partitions a lost are
        # not committed by a (their new owner reads those items again), the others are.
        a.commit(settle(held))
        owned_a = {tp.partition for tp in a._group.assignment()}
        deadline = time.monotonic() + 60
        while len({(i.origin.part, i.origin.offset) for i in done_a + done_b + held}) < n \
                and time.monotonic() < deadline:
            for src, acc in ((a, done_a), (b, done_b)):
                got = src.poll(100, 0.2)
                src.commit(settle(got))
                acc += got
        # Drain the last commits and let both see the end.
        for src, acc in ((a, done_a), (b, done_b)):
            got = src.poll(100, 0.5)
            src.commit(settle(got))
            acc += got
        owned_b = {tp.partition for tp in b._group.assignment()}
        assert owned_a and owned_b and not owned_a & owned_b and owned_a | owned_b == {0, 1, 2, 3}
    finally:
        a.close()
        b.close()
    everything = {(i.origin.part, i.origin.offset) for i in done_a + done_b + held}
    assert everything == {(p, o) for p in range(4) for o in range(n // 4)}  # nothing lost
    # Items a held for partitions now owned by b were read again by b (at least once).
    lost_to_b = {(i.origin.part, i.origin.offset) for i in held if i.origin.part in owned_b}
    assert lost_to_b <= {(i.origin.part, i.origin.offset) for i in done_b}
    # The group's committed offsets reach the end of every partition: lag back to zero.
    c = committed(bs, group, reports, range(4))
    assert {p: om.offset for p, om in c.items()} == {p: n // 4 for p in range(4)}


def test_a_member_that_overran_max_poll_interval_is_not_committed_and_reads_again(kafka_broker):
    bs = kafka_broker.bootstrap
    reports, group = unique_topic("reports"), unique_topic("group")
    kafka_broker.create_topics({reports: 1})
    produce(bs, reports, [b"r%d" % i for i in range(20)], partition=0)
    src = KafkaSource("k", source_options(bs, reports=[reports], group=group, max_poll_interval_ms=2000))
    try:
        first = drain(src, 20, commit=False)
        src.commit(settle(first[:5]))
        assert committed_soon(bs, group, reports, 0, 5) == 5
        # A batch that takes longer than max_poll_interval_ms: the client leaves the group,
        # so the rest of the batch must not be committed with a stale membership.
        time.sleep(4.0)
        src.commit(settle(first[5:]))
        assert src.flush_commits()  # answered: the stale offsets are dropped, not kept for later
        assert src.stats["commit_failed_rebalance"] + src.stats["commit_skipped_revoked"] >= 1
        assert committed(bs, group, reports, [0])[0].offset == 5
        again = drain(src, 15, timeout=60)
        assert [i.origin.offset for i in again] == list(range(5, 20))  # read again, from the committed offset
        assert committed_soon(bs, group, reports, 0, 20) == 20
    finally:
        src.close()


def test_large_localization_payloads_and_the_size_limit(kafka_broker):
    bs = kafka_broker.bootstrap
    alerts = unique_topic("big-alerts")
    # Kafka's default limit is about 1 MB per message: raise it on this topic (as a deployment must).
    kafka_broker.create_topics({alerts: 1}, configs={"max.message.bytes": str(8 * 1024 * 1024)})
    big = b'{"fits_base64":"' + b"A" * (3 * 1024 * 1024) + b'"}'
    produce(bs, alerts, [big, b"small"], partition=0, max_request_size=8 * 1024 * 1024)
    whole = KafkaSource("k", source_options(bs, [alerts]), max_bytes=16 * 1024 * 1024)
    try:
        whole.resume({})
        items = drain(whole, 2)
        assert [i.data for i in items] == [big, b"small"] and not items[0].truncated
    finally:
        whole.close()
    capped = KafkaSource("k", source_options(bs, [alerts]), max_bytes=1024 * 1024)
    try:
        capped.resume({})
        items = drain(capped, 2)
        # Over the limit: handed on truncated, with its true size, for the codec to reject.
        assert items[0].truncated and items[0].size == len(big) and items[0].data == big[: 1024 * 1024 + 1]
        assert items[1].data == b"small" and not items[1].truncated
    finally:
        capped.close()


def test_stop_at_end_and_lag(kafka_broker):
    bs = kafka_broker.bootstrap
    alerts, reports, group = unique_topic("alerts"), unique_topic("reports"), unique_topic("group")
    kafka_broker.create_topics({alerts: 1, reports: 2})
    produce(bs, alerts, [b"a0", b"a1"], partition=0)
    produce(bs, reports, [b"r%d" % i for i in range(10)], partition=lambda i: i % 2)
    src = KafkaSource("k", source_options(bs, [alerts], [reports], group, stop_at_end=True))
    try:
        src.resume({})
        first = src.poll(1, 5.0)
        assert len(first) == 1 and not src.finished
        lag = {(x["topic"], x["partition"]): x for x in src.lag()}
        assert lag[(alerts, 0)]["end"] == 2 and lag[(alerts, 0)]["in_flight"] == 1
        src.commit(settle(first))
        items = first + drain(src, 11)
        deadline = time.monotonic() + 30
        while not src.finished and time.monotonic() < deadline:
            assert src.poll(100, 0.3) == []
        assert src.finished and len(items) == 12
        assert all(x["lag"] == 0 and x["in_flight"] == 0 for x in src.lag())
        # What matcher status sees from outside, with the store's alert positions.
        stored = {stream_name(alerts, 0): "2"}
        out = {(x["topic"], x["partition"]): x for x in external_lag("k", src.options, stored)}
        assert out == {(alerts, 0): {"topic": alerts, "partition": 0, "role": "alerts", "end": 2, "done": 2, "lag": 0},
                       (reports, 0): {"topic": reports, "partition": 0, "role": "reports", "end": 5, "done": 5,
                                      "lag": 0},
                       (reports, 1): {"topic": reports, "partition": 1, "role": "reports", "end": 5, "done": 5,
                                      "lag": 0}}
        produce(bs, reports, [b"late"], partition=1)
        out = {(x["topic"], x["partition"]): x["lag"] for x in external_lag("k", src.options, {})}
        assert out == {(alerts, 0): 2, (reports, 0): 0, (reports, 1): 1}
    finally:
        src.close()


def test_missing_topic_and_missing_broker_are_clear_errors(kafka_broker):
    src = KafkaSource("k", source_options(kafka_broker.bootstrap, ["no-such-topic-here"]))
    with pytest.raises(KafkaTransportError, match=r"kafka source k \(127\.0\.0\.1:\d+\): topic no-such-topic-here "
                                                  r"does not exist"):
        src.resume({})
    src.close()
    opts = source_options("127.0.0.1:9", ["alerts"])
    opts = type(opts)(**{**opts.__dict__, "connection": type(opts.connection)(("127.0.0.1:9",),
                                                                              connect_timeout_ms=1000)})
    src = KafkaSource("k", opts)
    with pytest.raises(KafkaTransportError, match=r"kafka source k \(127\.0\.0\.1:9\): connecting: no broker accepted a connection within 1000 ms .*is a broker "
                                                  r"running at 127\.0\.0\.1:9\?"):
        src.poll(10, 0.1)
    src.close()


def test_commit_interval_batches_commits_and_close_commits_the_rest(kafka_broker):
    bs = kafka_broker.bootstrap
    reports, group = unique_topic("reports"), unique_topic("group")
    kafka_broker.create_topics({reports: 1})
    produce(bs, reports, [b"r%d" % i for i in range(10)], partition=0)
    src = KafkaSource("k", source_options(bs, reports=[reports], group=group, commit_interval_ms=60000))
    try:
        items = drain(src, 10, commit=False)
        src.commit(settle(items[:5]))  # the first commit goes at once
        assert committed_soon(bs, group, reports, 0, 5) == 5
        src.commit(settle(items[5:]))  # within the interval: held back
        assert committed(bs, group, reports, [0])[0].offset == 5
        assert src.info()["pending_commits"] == 1
    finally:
        src.close()  # a clean stop commits what the store already holds
    assert committed(bs, group, reports, [0])[0].offset == 10
