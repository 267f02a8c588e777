"""A stop-at-end source keeps polling while its group's rebalance waits for a slow member.

The broker answers a member's requests on one connection in order, and it holds a
JoinGroup until every member has rejoined (or the rebalance timeout passes). A lookup
of the group's committed offsets sent on the member's own coordinator connection while
its JoinGroup is held waits behind it: the service's thread is then stuck outside
``poll()`` until the rebalance completes, and kafka-python 3.0.12 drops a join whose
answer arrives while no ``poll()`` is waiting for it (the next ``poll()`` sends a new
JoinGroup: a new rebalance for the whole group). With three service instances, a
killed and restarted one, this became a rebalance that never ended (the scale test).

Here the slow member is a kafka-python consumer that simply is not polled for a while;
the check is behaviour: the source's ``poll()`` keeps returning during the held
rebalance, and once the slow member rejoins, the source gets its partitions and the
group's work completes.
"""

from __future__ import annotations

import threading
import time

import pytest
from kafka import KafkaConsumer, OffsetAndMetadata, TopicPartition

from kafka_broker import unique_topic
from kafka_helpers import produce, settle, source_options
from matcher.streams.sources.kafka import KafkaSource

pytestmark = pytest.mark.kafka


class Member:
    """A plain kafka-python group member, polled on its own thread only while ``running`` is set.

    With ``commit`` it takes what it reads and commits it; without, it puts every record back.
    """

    def __init__(self, bootstrap, group, topic, *, commit=True):
        self.commit = commit
        self.consumer = KafkaConsumer(bootstrap_servers=bootstrap, group_id=group, enable_auto_commit=False,
                                      auto_offset_reset="earliest", session_timeout_ms=30000,
                                      heartbeat_interval_ms=1000, max_poll_interval_ms=60000,
                                      client_id="liveness-member")
        self.consumer.subscribe([topic])
        self.running = threading.Event()
        self.stop = threading.Event()
        self.records = []
        self.polls = 0
        self.thread = threading.Thread(target=self._loop, daemon=True)
        self.thread.start()

    def _loop(self):
        while not self.stop.is_set():
            if not self.running.wait(0.05):
                continue
            for tp, recs in self.consumer.poll(timeout_ms=100).items():
                if self.commit:
                    self.records.extend(recs)
                    self.consumer.commit({tp: OffsetAndMetadata(recs[-1].offset + 1, "", -1)})
                else:  # not taken: read again at the next poll (or by whoever owns the partition next)
                    self.consumer.seek(tp, recs[0].offset)
            self.polls += 1

    def close(self):
        self.stop.set()
        self.thread.join(30)
        self.consumer.close(autocommit=False)


class Poller:
    """The source's poll loop (as the service runs it) on a thread, counting the polls that returned."""

    def __init__(self, source):
        self.source = source
        self.items = []
        self.returned = 0
        self.stop = threading.Event()
        self.error = None
        self.thread = threading.Thread(target=self._loop, daemon=True)
        self.thread.start()

    def _loop(self):
        try:
            while not self.stop.is_set() and not self.source.finished:
                got = self.source.poll(100, 0.2)
                self.source.commit(settle(got))
                self.items.extend(got)
                self.returned += 1
        except BaseException as exc:  # reported by the test
            self.error = exc

    def close(self):
        self.stop.set()
        self.thread.join(60)


def wait_for(what, condition, timeout=60.0):
    deadline = time.monotonic() + timeout
    while not condition():
        if time.monotonic() > deadline:
            raise AssertionError(f"{what}: not within {timeout} s")
        time.sleep(0.05)


def test_stop_at_end_source_polls_on_while_a_rebalance_waits_for_a_slow_member(kafka_broker):
    bs = kafka_broker.bootstrap
    reports, group = unique_topic("live-reports"), unique_topic("live-group")
    kafka_broker.create_topics({reports: 2})
    n = 40
    produce(bs, reports, [b"r%03d" % i for i in range(n)], partition=lambda i: i % 2)
    src = KafkaSource("live", source_options(bs, reports=[reports], group=group, stop_at_end=True,
                                             max_poll_interval_ms=60000))
    slow = Member(bs, group, reports, commit=False)  # takes nothing until told
    poller = newcomer = None
    try:
        slow.running.set()
        wait_for("the slow member took the partitions", lambda: len(slow.consumer.assignment()) == 2)
        src.resume({})
        poller = Poller(src)
        # The source and the slow member share the two partitions; then the slow member is held
        # (not polled). Its partition stays uncommitted, so the source keeps checking the end.
        wait_for("both members own a partition",
                 lambda: len(slow.consumer.assignment()) == 1 and src.stats["partitions_assigned"] >= 1
                 and not src.stats["partitions_revoked"] > src.stats["partitions_assigned"])
        slow.running.clear()
        mine = {p for p in range(2) if TopicPartition(reports, p) not in slow.consumer.assignment()}
        wait_for("the source read and committed its partition",
                 lambda: {i.origin.part for i in poller.items} == mine and len(poller.items) >= n // 2
                 and not src._pending)
        assert not src.finished

        # A third member joins: a rebalance the slow member does not take part in until it polls.
        revoked = src.stats["partitions_revoked"]
        newcomer = Member(bs, group, reports)
        newcomer.running.set()
        wait_for("the source saw the rebalance", lambda: src.stats["partitions_revoked"] > revoked)
        # The source's poll keeps returning meanwhile (it checks the end every second; a lookup that
        # waited for the held rebalance would stop it here until the slow member rejoined).
        time.sleep(1.5)
        during = poller.returned
        time.sleep(3.0)
        assert poller.error is None, poller.error
        assert poller.returned > during, "the source's poll() blocked while the rebalance was held"
        assert src._group is not None and slow.consumer.assignment()  # the slow member is still held

        # The slow member rejoins: the rebalance completes, and the group's work gets done.
        slow.commit = True  # before it polls: what it reads from now on, it commits
        slow.running.set()
        wait_for("the group finished", lambda: src.finished, timeout=60)
        assert poller.error is None, poller.error
        taken = {(i.origin.part, i.origin.offset) for i in poller.items}
        taken |= {(r.partition, r.offset) for m in (slow, newcomer) for r in m.records}
        assert taken == {(p, o) for p in range(2) for o in range(n // 2)}  # every record taken by someone
    finally:
        if poller is not None:
            poller.close()
        src.close()
        for m in (slow, newcomer):
            if m is not None:
                m.close()
