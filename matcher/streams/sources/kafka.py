"""A Kafka source: GW alerts read in full by every instance, transient reports shared by a group.

Two roles, two consumers (kafka-python cannot mix ``assign()`` and ``subscribe()``
in one consumer):

* ``topics.alerts`` (GW alerts: few, and every instance needs all of them) are read
  **without a consumer group**: every partition is assigned to this instance, and
  where to resume is the offset kept in the service's own store (each item's
  ``position`` is ``("kafka:TOPIC:PARTITION", NEXT_OFFSET)``, stored in the batch's
  transaction; :meth:`KafkaSource.resume` seeks there).
* ``topics.reports`` (transient reports: many) are read **through the consumer group**
  ``group_id``: Kafka splits their partitions across the running instances. Offsets
  are committed to Kafka only from :meth:`KafkaSource.commit`, which the service calls
  after the batch's results are durable in SQLite; each commit names its partitions
  with explicit ``OffsetAndMetadata(offset, metadata, leader_epoch)`` and never goes
  past an item that was handed out but not yet settled. These commits are sent
  asynchronously (the loop does not wait ~10 ms for each round trip) and every answer
  is checked: refused after a rebalance, the offsets are dropped (the new owner reads
  those items again); failed otherwise, they are sent again. A clean stop commits
  synchronously.

On start, the alerts are read up to the end they had then before any report is
taken, so reports are scored against every event already announced.

Rebalances: kafka-python calls the listener on its IO thread, so the listener only
records what happened; the next :meth:`poll` or :meth:`commit` (on the service's
thread) acts on it. Items of a revoked or lost partition that were handed out but
not settled are not committed, and records of such a partition fetched in the same
poll are dropped before they reach the service: the partition's new owner reads
them again from the last committed offset. Lost partitions (the member was evicted)
are never committed. Items the store already holds are recognised there by their
origin and bytes, so a re-delivery stores nothing twice.

Every item's :class:`~matcher.streams.raw.Origin` is ``(source, "kafka", topic,
partition, offset)``: a quarantined message names exactly where it was.
``received_at`` is the record's timestamp (``received_at: record``, the default), the
time it was read (``received_at: arrival``), or the message's own top-level
``received_at`` field when it has one (``received_at: message``, as in an archive;
else the record's timestamp). A record larger than
``limits.message_max_bytes`` is handed on truncated, with its true size, for the
codec to reject and the store to quarantine.

Lag, for the dashboard: :meth:`KafkaSource.lag` (no network calls); for
``matcher status``: :func:`external_lag` (asks the brokers, needs no running service).
"""

from __future__ import annotations

import collections
import json
import threading
import time
from dataclasses import dataclass
from typing import Any, Mapping, Sequence

from matcher.errors import ConfigError, InputError
from matcher.keycheck import ParseContext, check_keys, get_bool, get_int, get_str, sub
from matcher.streams.kafka_common import (
    LOG,
    Connection,
    KafkaTransportError,
    client_config,
    describe_connection,
    parse_connection,
    parse_topic,
    transport_errors,
    wait_reachable,
)
from matcher.streams.raw import Origin, RawItem
from matcher.streams.sources.base import Settled, SourceKind, register_source_kind

__all__ = ["KafkaSource", "KafkaSourceOptions", "external_lag", "stream_name", "ROLES"]

#: The two roles of a Kafka source's topics.
ROLES = ("alerts", "reports")

# How often a source re-reads the partition lists of its alert topics (new partitions
# are assigned from their beginning), and how often it retries a failed offset commit.
_PARTITION_CHECK_S = 30.0
_COMMIT_RETRY_S = 1.0
# Asynchronous offset commits at most in flight at once. kafka-python hands a commit's answer
# over only during a later call on the service's thread, so with one allowed every other
# batch would wait for the next; two keep one commit per batch without piling up.
_COMMITS_IN_FLIGHT = 2
_END_CHECK_S = 1.0


_MARKER = b'"received_at"'


def _message_received_at(data: bytes) -> float | None:
    """Unix s from a message's own top-level ``received_at`` (ISO-8601 UTC), or None.

    An unreadable one is no error here: the codec rejects the message for it.
    """
    if _MARKER not in data:
        return None
    from matcher.timeconv import gps_to_unix, iso_to_gps

    try:
        obj = json.loads(data)
        value = obj.get("received_at") if isinstance(obj, dict) else None
        return gps_to_unix(iso_to_gps(value)) if isinstance(value, str) else None
    except (ValueError, RecursionError):
        return None


def stream_name(topic: str, partition: int) -> str:
    """The store's stream name of an alert partition: ``kafka:TOPIC:PARTITION``."""
    return f"kafka:{topic}:{int(partition)}"


@dataclass(frozen=True)
class KafkaSourceOptions:
    """Options of a Kafka source (``sources.NAME`` with ``kind: kafka``).

    Attributes
    ----------
    connection : Connection
    alert_topics : tuple of str
        ``topics.alerts``: read in full by every instance, no consumer group.
    report_topics : tuple of str
        ``topics.reports``: shared by the instances of ``group_id``.
    group_id : str or None
        Required when there are report topics.
    group_instance_id : str or None
        Static group membership: a restarted instance with the same id takes its
        partitions back without a rebalance (within ``session_timeout_ms``).
    fetch_max_bytes, max_partition_fetch_bytes : int, bytes
        Fetch sizes (a record larger than either still arrives, alone: Kafka's fetch
        protocol always returns at least one record batch).
    fetch_max_wait_ms : int, ms
    session_timeout_ms, heartbeat_interval_ms, max_poll_interval_ms : int, ms
        Group membership timing (a dead instance's partitions move after ``session_timeout_ms``).
    commit_timeout_ms : int, ms
        How long a synchronous offset commit (at a clean stop) may wait, and after how long
        an asynchronous one without an answer is sent again; a failed commit is retried,
        never lost.
    commit_interval_ms : int, ms
        0 (default): commit after every batch (asynchronously). Otherwise at most this
        often; what the store holds but Kafka does not yet is read again after a crash or
        rebalance, and recognised by the store.
    stop_at_end : bool
        Finish once everything that was on the topics at start is processed (alerts by
        this instance; reports committed by the group): for replays, tests and benchmarks.
        The group's committed offsets are then read by a third client that joins nothing.
    received_at : str
        ``record`` (the record's timestamp), ``arrival`` (when it was read) or ``message``
        (the message's own ``received_at``, else the record's timestamp).
    """

    connection: Connection
    alert_topics: tuple[str, ...] = ()
    report_topics: tuple[str, ...] = ()
    group_id: str | None = None
    group_instance_id: str | None = None
    fetch_max_bytes: int = 52428800
    max_partition_fetch_bytes: int = 1048576
    fetch_max_wait_ms: int = 500
    session_timeout_ms: int = 45000
    heartbeat_interval_ms: int = 3000
    max_poll_interval_ms: int = 300000
    commit_timeout_ms: int = 10000
    commit_interval_ms: int = 0
    stop_at_end: bool = False
    received_at: str = "record"


_LISTENER_CLASS = None


def _listener(source: KafkaSource):
    """A rebalance listener that records events for the service's thread; never blocks, never commits."""
    global _LISTENER_CLASS
    if _LISTENER_CLASS is None:
        from kafka import ConsumerRebalanceListener

        class _Listener(ConsumerRebalanceListener):
            def __init__(self, src):
                self._source = src

            def on_partitions_revoked(self, revoked):
                self._source._event("revoked", revoked)

            def on_partitions_assigned(self, assigned):
                self._source._event("assigned", assigned)

            def on_partitions_lost(self, lost):
                self._source._event("lost", lost)

        _LISTENER_CLASS = _Listener
    return _LISTENER_CLASS(source)


class _Partition:
    """Bookkeeping of one partition on the service's thread."""

    __slots__ = ("role", "tp", "out", "settled", "done", "end", "position")

    def __init__(self, role: str, tp):
        self.role = role
        self.tp = tp  # its TopicPartition
        self.out: collections.deque = collections.deque()  # (offset, leader_epoch) handed out, in order
        self.settled: set[int] = set()  # offsets settled, not yet at the front of ``out``
        self.done: int | None = None  # next offset durably processed (stored; for reports: committed)
        self.end: int | None = None  # high watermark last seen
        self.position: int | None = None  # next offset to hand out


class KafkaSource:
    """Read GW alerts and transient reports from Kafka (see the module docstring).

    Parameters
    ----------
    name : str
        The configured source name.
    options : KafkaSourceOptions
    max_bytes : int, bytes
        Records longer than this are handed on truncated (and quarantined).

    Notes
    -----
    Nothing connects until :meth:`resume` or the first :meth:`poll`; kafka-python is
    imported then.
    """

    kind = "kafka"

    def __init__(self, name: str, options: KafkaSourceOptions, *, max_bytes: int = 16 * 1024 * 1024):
        self.name = name
        self.options = options
        self.max_bytes = int(max_bytes)
        self._alerts = None  # KafkaConsumer, group_id=None, assign()
        self._group = None  # KafkaConsumer, group_id set, subscribe()
        # KafkaConsumer, group_id set, never subscribes: reads the group's committed offsets for
        # stop_at_end on a connection of its own (see _check_finished).
        self._offsets = None
        self._started = False
        self._closed = False
        self._parts: dict[Any, _Partition] = {}
        self._positions: dict[str, str] = {}
        self._catchup: dict | None = None  # alert partition -> end offset at start, until reached
        self._lock = threading.Lock()
        self._events: list[tuple[str, tuple]] = []
        # (topic, partition, offset) -> the _Partition it was handed out under: an item settles
        # only if its partition is still that same assignment (not revoked or lost since).
        self._inflight: dict[tuple, _Partition] = {}
        self._pending: dict[Any, Any] = {}  # TopicPartition -> OffsetAndMetadata, durable but not committed
        self._last_commit_try = 0.0
        self._commit_failed = False
        self._commits_in_flight = 0  # asynchronous commits sent, answer not yet handed to _commit_answer
        self._sent: dict[Any, Any] = {}  # TopicPartition -> the pending OffsetAndMetadata last sent
        self._last_partition_check = 0.0
        self._end_at_start: dict | None = None
        self._last_end_check = 0.0
        self._finished = False
        #: Counters for the dashboard and tests.
        self.stats = collections.Counter()
        #: Seconds spent (service thread, wall clock) in kafka-python's ``poll`` (``consume``), in making
        #: the items and their bookkeeping (``items``), and in :meth:`commit` (``commit``).
        self.seconds = dict.fromkeys(("consume", "items", "commit"), 0.0)

    def __repr__(self) -> str:
        o = self.options
        return (f"KafkaSource({self.name!r}, brokers={o.connection.servers_text!r}, alerts={list(o.alert_topics)}, "
                f"reports={list(o.report_topics)}, group_id={o.group_id!r})")

    # ----------------------------------------------------------------- clients
    def _what(self, doing: str) -> str:
        return f"kafka source {self.name} ({self.options.connection.servers_text}): {doing}"

    def _consumer(self, group_id: str | None, *, member: bool = True):
        """A client; with ``group_id`` and ``member`` it is made to join the group (its timing options set)."""
        from kafka import KafkaConsumer

        o = self.options
        kw = client_config(o.connection, f"sources.{self.name}.connection")
        kw.update(group_id=group_id, enable_auto_commit=False, auto_offset_reset="earliest",
                  allow_auto_create_topics=False, fetch_max_bytes=o.fetch_max_bytes,
                  max_partition_fetch_bytes=o.max_partition_fetch_bytes, fetch_max_wait_ms=o.fetch_max_wait_ms)
        if group_id is not None and member:
            kw.update(session_timeout_ms=o.session_timeout_ms, heartbeat_interval_ms=o.heartbeat_interval_ms,
                      max_poll_interval_ms=o.max_poll_interval_ms, group_instance_id=o.group_instance_id)
        wait_reachable(o.connection, self._what("connecting"))
        with transport_errors(self._what("connecting"), o.connection):
            consumer = KafkaConsumer(**kw)
            try:
                consumer.bootstrap(timeout_ms=o.connection.connect_timeout_ms)
            except BaseException:
                consumer.close(autocommit=False, timeout_ms=1000)
                raise
        return consumer

    def _partitions_of(self, consumer, topics) -> list:
        from kafka import TopicPartition

        out = []
        for topic in topics:
            with transport_errors(self._what(f"reading the partitions of topic {topic}"), self.options.connection):
                parts = consumer.partitions_for_topic(topic)
            if not parts:
                raise KafkaTransportError(self._what(f"topic {topic} does not exist (or this client may not "
                                                     "describe it); create it first"))
            out.extend(TopicPartition(topic, p) for p in sorted(parts))
        return out

    def _start(self) -> None:
        if self._started:
            return
        if self._closed:
            raise InputError(f"kafka source {self.name}: it is closed")
        o = self.options
        if o.alert_topics or o.stop_at_end:
            self._alerts = self._consumer(None)
        if o.alert_topics:
            tps = self._partitions_of(self._alerts, o.alert_topics)
            self._assign_alerts(tps)
            with transport_errors(self._what("reading the alert topics' end offsets"), o.connection):
                ends = self._alerts.end_offsets(tps)
            self._catchup = {tp: end for tp, end in ends.items()}
        if o.stop_at_end:
            report_tps = self._partitions_of(self._alerts, o.report_topics) if o.report_topics else []
            with transport_errors(self._what("reading end offsets"), o.connection):
                self._end_at_start = dict(self._alerts.end_offsets(list(self._parts) + report_tps)) \
                    if (self._parts or report_tps) else {}
            if report_tps:
                self._offsets = self._consumer(o.group_id, member=False)
        self._started = True
        self._last_partition_check = time.monotonic()
        if not self._catchup_pending():
            self._start_group()

    def _assign_alerts(self, tps) -> None:
        """Assign alert partitions; new ones start at the stored offset, or at their beginning."""
        new = [tp for tp in tps if tp not in self._parts]
        keep = {tp: self._alerts.position(tp) for tp in self._parts if self._parts[tp].role == "alerts"}
        self._alerts.assign(list(keep) + new)
        for tp, pos in keep.items():
            if pos is not None:
                self._alerts.seek(tp, pos)
        fresh = []
        for tp in new:
            st = self._parts[tp] = _Partition("alerts", tp)
            token = self._positions.get(stream_name(tp.topic, tp.partition))
            if token is None:
                fresh.append(tp)
                continue
            try:
                offset = int(token)
                if offset < 0:
                    raise ValueError
            except ValueError:
                raise InputError(f"kafka source {self.name}: stored position {token[:40]!r} of "
                                 f"{tp.topic}[{tp.partition}] is not an offset") from None
            self._alerts.seek(tp, offset)
            st.done = st.position = offset
        if fresh:
            self._alerts.seek_to_beginning(*fresh)
            with transport_errors(self._what("reading the alert topics' first offsets"), self.options.connection):
                first = self._alerts.beginning_offsets(fresh)
            for tp in fresh:
                self._parts[tp].done = self._parts[tp].position = first.get(tp, 0)
        if new:
            LOG.info("kafka source %s: reading %d alert partition(s) without a group: %s", self.name, len(new),
                     ", ".join(f"{tp.topic}[{tp.partition}]" for tp in new))

    def _catchup_pending(self) -> bool:
        if self._catchup is None:
            return False
        for tp, end in self._catchup.items():
            st = self._parts.get(tp)
            if st is not None and (st.position is None or st.position < end):
                return True
        self._catchup = None
        LOG.info("kafka source %s: alert topics read up to their end at start", self.name)
        return False

    def _start_group(self) -> None:
        o = self.options
        if not o.report_topics or self._group is not None:
            return
        self._group = self._consumer(o.group_id)
        for topic in o.report_topics:  # fail early and clearly on a missing topic
            self._partitions_of(self._group, [topic])
        with transport_errors(self._what(f"joining group {o.group_id}"), o.connection):
            self._group.subscribe(list(o.report_topics), listener=_listener(self))
            # One metadata fetch after subscribing and before the first join, so that kafka-python's
            # coordinator records the topics' partitions before it may lead an assignment. Without it,
            # a leader assigns against an empty snapshot and rejoins at the next metadata update, and
            # kafka-python 3.0.12 can lose that second join's result: the member then never gets a
            # partition again (see DEVELOPERS.md, "A group member that never got a partition").
            self._group.topics()

    # ------------------------------------------------------------- rebalances
    def _event(self, kind: str, tps) -> None:
        """Called on kafka-python's IO thread: record, nothing else."""
        with self._lock:
            self._events.append((kind, tuple(tps)))

    def _drain_events(self) -> None:
        with self._lock:
            events, self._events = self._events, []
        for kind, tps in events:
            self.stats[f"partitions_{kind}"] += len(tps)
            if kind in ("revoked", "lost"):
                self.stats["rebalances"] += bool(tps)
                for tp in tps:
                    self._pending.pop(tp, None)
                    self._sent.pop(tp, None)
                    st = self._parts.pop(tp, None)
                    if st is not None and st.out:
                        self.stats["dropped_in_flight"] += len(st.out)
                if tps:
                    LOG.info("kafka source %s: partitions %s: %s", self.name, kind,
                             ", ".join(f"{tp.topic}[{tp.partition}]" for tp in tps))
            else:
                for tp in tps:
                    if tp not in self._parts:
                        self._parts[tp] = _Partition("reports", tp)
                if tps:
                    LOG.info("kafka source %s: partitions assigned: %s", self.name,
                             ", ".join(f"{tp.topic}[{tp.partition}]" for tp in tps))

    # -------------------------------------------------------------- protocol
    def resume(self, positions: Mapping[str, str]) -> None:
        """Take the store's offsets of the alert partitions (``kafka:TOPIC:PARTITION`` → next offset) and connect.

        Raises
        ------
        KafkaTransportError
            No broker reachable, or a topic missing.
        InputError
            A stored offset that is not an integer.
        """
        if self._started:
            raise InputError(f"kafka source {self.name}: resume() must come before the first poll()")
        self._positions = {k: v for k, v in positions.items() if k.startswith("kafka:")}
        self._start()

    @property
    def finished(self) -> bool:
        """True only with ``stop_at_end``, once everything on the topics at start is processed."""
        return self._finished

    def poll(self, max_items: int = 500, timeout_s: float = 0.0) -> list[RawItem]:
        """Up to ``max_items`` items: alerts first, then reports, waiting at most ``timeout_s``.

        Raises
        ------
        KafkaTransportError
            Only at the start (no broker, missing topic); later outages are waited out.
        """
        self._start()
        self._drain_events()
        self._retry_commit()
        self._check_alert_partitions()
        deadline = time.monotonic() + max(0.0, timeout_s)
        items: list[RawItem] = []
        if self._alerts is not None and self._parts_of("alerts"):
            wait = 0.0 if self._group is not None else timeout_s
            items.extend(self._fetch(self._alerts, "alerts", max_items, wait))
            if self._catchup is not None and not self._catchup_pending():
                self._start_group()
        if self._group is not None and len(items) < max_items and self._catchup is None:
            wait = 0.0 if items else max(0.0, deadline - time.monotonic())
            items.extend(self._fetch(self._group, "reports", max_items - len(items), wait))
        if not items and self.options.stop_at_end:
            self._check_finished()
        return items

    def _parts_of(self, role: str) -> list:
        return [tp for tp, st in self._parts.items() if st.role == role]

    def _fetch(self, consumer, role: str, max_items: int, wait_s: float) -> list[RawItem]:
        t0 = time.perf_counter()
        try:
            records = consumer.poll(timeout_ms=int(wait_s * 1000), max_records=max_items)
        except Exception as exc:  # kafka-python raises its own errors and OSErrors; outages are waited out
            from kafka import errors as kerr

            if not isinstance(exc, (kerr.KafkaError, OSError)):
                raise
            self.stats["poll_errors"] += 1
            LOG.warning("kafka source %s: poll failed (%s); retrying", self.name, type(exc).__name__)
            time.sleep(min(1.0, wait_s))
            return []
        finally:
            t1 = time.perf_counter()
            self.seconds["consume"] += t1 - t0
        if role == "reports":
            self._drain_events()
            owned = consumer.assignment() if records else set()
        now = time.time()
        items: list[RawItem] = []
        mode = self.options.received_at
        by_message, by_arrival = mode == "message", mode == "arrival"
        name, max_bytes, inflight = self.name, self.max_bytes, self._inflight
        make_item, make_origin = RawItem._read, Origin._of
        for tp, recs in records.items():
            if role == "reports" and tp not in owned:
                # Revoked or lost during this poll: not handed out, not committed; the
                # partition's new owner reads these records again from the committed offset.
                self.stats["dropped_revoked"] += len(recs)
                continue
            st = self._parts.get(tp)
            if st is None:
                st = self._parts[tp] = _Partition(role, tp)
            stream = stream_name(tp.topic, tp.partition)
            if st.done is None and recs:
                st.done = recs[0].offset  # where this instance started on the partition
            topic, part, alerts = tp.topic, tp.partition, role == "alerts"
            hand_out, keep = st.out.append, items.append
            for r in recs:
                data = r.value if r.value is not None else b""
                size = len(data)
                truncated = size > max_bytes
                if truncated:
                    data = data[: max_bytes + 1]
                t = None
                if by_message and not truncated:
                    t = _message_received_at(data)
                if t is None:
                    t = now if (by_arrival or r.timestamp is None or r.timestamp <= 0) else r.timestamp / 1000.0
                off = r.offset
                # RawItem._read / Origin._of: the same objects as the constructors make, without the
                # frozen dataclasses' per-field setattr calls (kafka-python's values are bytes).
                keep(make_item(data, make_origin(name, "kafka", topic, part, off),
                               (stream, str(off + 1)) if alerts else None, t, None, truncated, size))
                hand_out((off, r.leader_epoch if r.leader_epoch is not None else -1))
                inflight[(topic, part, off)] = st
            if recs:
                st.position = recs[-1].offset + 1
        self._note_positions(consumer, role)
        self.stats[f"{role}_polled"] += len(items)
        self.seconds["items"] += time.perf_counter() - t1
        return items

    def _note_positions(self, consumer, role: str) -> None:
        """Cache high watermarks and positions (for lag and catch-up) on the service's thread."""
        assigned = consumer.assignment()
        for tp in assigned:
            st = self._parts.get(tp)
            if st is None:
                st = self._parts[tp] = _Partition(role, tp)
            hw = consumer.highwater(tp)
            if hw is not None:
                st.end = hw
            if not st.out:
                try:
                    pos = consumer.position(tp, timeout_ms=0)
                except Exception:  # unassigned meanwhile, or not yet known: keep what we had
                    pos = None
                if pos is not None:
                    st.position = pos
                    if st.done is None or (role == "reports" and tp not in self._pending):
                        st.done = pos

    def commit(self, settled: Sequence[Settled]) -> None:
        """Called after the store committed these items: advance offsets past them.

        Alert partitions: the offsets are already in the store (the items' positions);
        only the lag bookkeeping moves. Report partitions still owned: explicit
        ``OffsetAndMetadata`` per partition, up to the first item not yet settled, sent
        to the group coordinator **asynchronously** (at most two commits in flight; each
        carries every offset not yet acknowledged, so a later one also retries an earlier
        one that failed). The service does not wait for the round trip: a commit can
        only name items the store already holds, so an answer that never comes costs a
        re-read after a crash or rebalance, which the store recognises. Partitions revoked
        or lost since their items were handed out are skipped (their new owner reads those
        items again). A commit that fails (broker away, rebalance in progress) is retried
        or, after a rebalance, dropped; it never raises. :meth:`flush_commits` and
        :meth:`close` commit synchronously.
        """
        from kafka import OffsetAndMetadata

        t0 = time.perf_counter()
        self._drain_events()
        touched = set()
        name, inflight, parts = self.name, self._inflight, self._parts
        for s in settled:
            o = s.item.origin
            if o.kind != "kafka" or o.source != name or o.part is None:
                continue
            st = inflight.pop((o.where, o.part, o.offset), None)
            if st is None or parts.get(st.tp) is not st:
                self.stats["commit_skipped_revoked"] += 1  # revoked or lost since it was handed out
                continue
            st.settled.add(o.offset)
            touched.add(st)
        for st in touched:
            tp = st.tp
            last = None
            while st.out and st.out[0][0] in st.settled:
                off, epoch = st.out.popleft()
                st.settled.discard(off)
                last = (off, epoch)
            if last is None:
                continue
            if st.role == "alerts":
                st.done = last[0] + 1
            else:
                self._pending[tp] = OffsetAndMetadata(last[0] + 1, f"matcher:{self.name}", last[1])
        if touched:
            self._retry_commit()
        self.seconds["commit"] += time.perf_counter() - t0

    def flush_commits(self) -> bool:
        """Commit every settled offset of an owned partition now, and wait for the broker's answer.

        What :meth:`close` does before leaving the group; tests use it to look at the
        group's offsets at a known point. Returns True when nothing is left pending.
        """
        if self._group is None:
            return not self._pending
        t0 = time.perf_counter()
        self._drain_events()
        self._commit_pending(wait=True)
        self.seconds["commit"] += time.perf_counter() - t0
        return not self._pending

    def _commit_pending(self, *, wait: bool = False) -> None:
        """Send the pending offsets of owned partitions (asynchronously, or with ``wait`` synchronously)."""
        if not self._pending or self._group is None:
            return
        from kafka import errors as kerr

        owned = self._group.assignment()
        offsets = {tp: om for tp, om in self._pending.items() if tp in owned}
        for tp in set(self._pending) - set(offsets):
            self._pending.pop(tp)
            self.stats["commit_skipped_revoked"] += 1
        if not offsets:
            return
        self._last_commit_try = time.monotonic()
        self._sent.update(offsets)
        if not wait:
            # kafka-python hands the answer to the callback during a later call on this thread
            # (poll, commit): _commit_answer runs on the service's thread, like everything here.
            self._commits_in_flight += 1
            try:
                self._group.commit_async(offsets, callback=self._async_answer)
            except (kerr.KafkaError, OSError) as exc:
                self._commits_in_flight -= 1
                self._commit_answer(offsets, exc)
            return
        try:
            self._group.commit(offsets, timeout_ms=self.options.commit_timeout_ms)
        except (kerr.KafkaError, OSError) as exc:
            self._commit_answer(offsets, exc)
            return
        self._commit_answer(offsets, None)

    def _async_answer(self, offsets, response) -> None:
        self._commits_in_flight = max(0, self._commits_in_flight - 1)
        self._commit_answer(offsets, response if isinstance(response, BaseException) else None)

    def _commit_answer(self, offsets: Mapping, exc: BaseException | None) -> None:
        """Book the broker's answer to a commit of ``offsets`` (``exc`` None: accepted)."""
        from kafka import errors as kerr

        if exc is None:
            self._commit_failed = False
            self.stats["commits"] += 1
            for tp, om in offsets.items():
                if self._pending.get(tp) is om:  # not superseded by a later batch meanwhile
                    del self._pending[tp]
                st = self._parts.get(tp)
                if st is not None:
                    st.done = om.offset if st.done is None else max(st.done, om.offset)
            return
        if isinstance(exc, (kerr.CommitFailedError, kerr.IllegalGenerationError, kerr.UnknownMemberIdError,
                            kerr.RebalanceInProgressError, kerr.FencedInstanceIdError)):
            # The group moved on: these partitions will be read again by their new owner.
            self.stats["commit_failed_rebalance"] += 1
            LOG.warning("kafka source %s: offset commit refused after a rebalance (%s); the new owner "
                        "re-reads %d partition(s)", self.name, type(exc).__name__, len(offsets))
            for tp, om in offsets.items():
                if self._pending.get(tp) is om:
                    del self._pending[tp]
            return
        self.stats["commit_retries"] += 1
        self._commit_failed = True
        for tp, om in offsets.items():
            if self._sent.get(tp) is om:
                del self._sent[tp]  # to be sent again
        LOG.warning("kafka source %s: offset commit failed (%s); will retry", self.name, type(exc).__name__)

    def _retry_commit(self) -> None:
        """Send pending offsets not yet sent: at once (or once ``commit_interval_ms`` passed), a second after a failure."""
        if not self._pending:
            return
        now = time.monotonic()
        if self._commits_in_flight:
            if now - self._last_commit_try >= self.options.commit_timeout_ms / 1000.0:
                # An answer overdue by more than a commit's timeout is taken as lost: send again
                # (a commit names absolute offsets; sending one twice changes nothing).
                self._commits_in_flight = 0
                self._sent.clear()
            elif self._commits_in_flight >= _COMMITS_IN_FLIGHT:
                return
        if all(self._sent.get(tp) is om for tp, om in self._pending.items()):
            return  # all of it is in flight already
        wait = max(self.options.commit_interval_ms / 1000.0, _COMMIT_RETRY_S if self._commit_failed else 0.0)
        if now - self._last_commit_try >= wait:
            self._commit_pending()

    def _check_alert_partitions(self) -> None:
        if self._alerts is None or not self.options.alert_topics:
            return
        if time.monotonic() - self._last_partition_check < _PARTITION_CHECK_S:
            return
        self._last_partition_check = time.monotonic()
        try:
            tps = self._partitions_of(self._alerts, self.options.alert_topics)
        except KafkaTransportError:
            return  # broker away: checked again later
        if any(tp not in self._parts for tp in tps):
            self._assign_alerts(tps)

    def _check_finished(self) -> None:
        if self._finished or self._end_at_start is None or self._catchup is not None:
            return
        if time.monotonic() - self._last_end_check < _END_CHECK_S:
            return
        self._last_end_check = time.monotonic()
        for tp, end in self._end_at_start.items():
            st = self._parts.get(tp)
            if tp.topic in self.options.alert_topics:
                if st is None or st.out or st.done is None or st.done < end:
                    return
        if self._pending or any(st.out for st in self._parts.values()):
            return
        report_ends = {tp: end for tp, end in self._end_at_start.items() if tp.topic in self.options.report_topics}
        if report_ends:
            if self._group is None or self._offsets is None:
                return
            try:
                for tp, end in report_ends.items():
                    if end == 0:
                        continue
                    # Not through self._group: the broker answers a connection's requests in order and
                    # holds a JoinGroup until every member has rejoined, so a lookup on the member's own
                    # coordinator connection waits behind its JoinGroup, outside poll(); kafka-python
                    # 3.0.12 then drops the join's answer and rejoins (DEVELOPERS.md, "A rebalance that
                    # never ended").
                    committed = self._offsets.committed(tp, timeout_ms=self.options.commit_timeout_ms)
                    if committed is None or committed < end:
                        return
            except Exception as exc:
                from kafka import errors as kerr

                if not isinstance(exc, (kerr.KafkaError, OSError)):
                    raise
                return
        self._finished = True
        LOG.info("kafka source %s: everything on the topics at start is processed", self.name)

    # ------------------------------------------------------------ operations
    def lag(self) -> list[dict]:
        """Consumer lag per partition, from what this instance already knows (no network call).

        Returns
        -------
        list of dict
            One per partition this instance reads, sorted by topic and partition:
            ``topic``, ``partition``, ``role`` (``alerts`` or ``reports``), ``end`` (the
            high watermark last seen: the next offset the topic will get), ``done`` (the
            next offset durably processed: stored, for alerts; committed to the group,
            for reports), ``lag`` (``end - done``, messages not yet durably processed;
            ``None`` until both are known) and ``in_flight`` (handed to the service, not
            yet settled).
        """
        out = []
        for tp, st in sorted(self._parts.items(), key=lambda kv: (kv[0].topic, kv[0].partition)):
            lag = None if (st.end is None or st.done is None) else max(0, st.end - st.done)
            out.append({"topic": tp.topic, "partition": tp.partition, "role": st.role, "end": st.end,
                        "done": st.done, "lag": lag, "in_flight": len(st.out)})
        return out

    def info(self) -> dict:
        """What the dashboard may show about this source (never a secret)."""
        o = self.options
        group = None
        if self._group is not None:
            meta = self._group.group_metadata()
            group = {"group_id": o.group_id, "generation": meta.generation_id, "state": meta.state}
        return {"name": self.name, "kind": self.kind, "connection": describe_connection(o.connection),
                "alert_topics": list(o.alert_topics), "report_topics": list(o.report_topics), "group": group,
                "catching_up": self._catchup is not None, "pending_commits": len(self._pending),
                "stats": dict(self.stats)}

    def close(self) -> None:
        """Commit what is settled (briefly), then leave the group and close the consumers."""
        if self._closed:
            return
        self._closed = True
        try:
            if self._group is not None:
                self._drain_events()
                try:
                    self._commit_pending(wait=True)
                finally:
                    self._group.close(autocommit=False, timeout_ms=5000)
        finally:
            try:
                if self._alerts is not None:
                    self._alerts.close(autocommit=False, timeout_ms=5000)
            finally:
                if self._offsets is not None:
                    self._offsets.close(autocommit=False, timeout_ms=5000)
            self._group = self._alerts = self._offsets = None

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def external_lag(name: str, options: KafkaSourceOptions, store_positions: Mapping[str, str]) -> list[dict]:
    """Lag per partition as the brokers and the store see it (for ``matcher status``).

    Alert partitions: the store's offsets against the end offsets. Report partitions:
    the group's committed offsets against the end offsets. Joins no group.

    Returns
    -------
    list of dict
        ``topic``, ``partition``, ``role``, ``end``, ``done`` (``None``: nothing stored or
        committed yet; the lag then counts from the partition's first offset), ``lag``.

    Raises
    ------
    KafkaTransportError
    """
    src = KafkaSource(name, options)
    consumer = src._consumer(options.group_id if options.report_topics else None)
    try:
        alert_tps = src._partitions_of(consumer, options.alert_topics)
        report_tps = src._partitions_of(consumer, options.report_topics)
        tps = alert_tps + report_tps
        with transport_errors(src._what("reading offsets"), options.connection):
            ends = consumer.end_offsets(tps) if tps else {}
            firsts = consumer.beginning_offsets(tps) if tps else {}
            committed = {tp: consumer.committed(tp) for tp in report_tps}
        out = []
        for tp in tps:
            if tp in committed:
                role, done = "reports", committed[tp]
            else:
                role, token = "alerts", store_positions.get(stream_name(tp.topic, tp.partition))
                done = int(token) if token is not None and token.isdigit() else None
            base = done if done is not None else firsts.get(tp, 0)
            out.append({"topic": tp.topic, "partition": tp.partition, "role": role, "end": ends.get(tp),
                        "done": done, "lag": max(0, ends.get(tp, 0) - base)})
        return out
    finally:
        consumer.close(autocommit=False, timeout_ms=2000)


def _topics(raw: Mapping, keypath: str) -> tuple[tuple[str, ...], tuple[str, ...]]:
    kp = sub(keypath, "topics")
    t = check_keys(raw.get("topics"), ROLES, kp)
    out = []
    for role in ROLES:
        v = t.get(role, [])
        if isinstance(v, str):
            v = [v]
        if not isinstance(v, (list, tuple)):
            raise ConfigError(sub(kp, role), f"must be a list of topic names, got {type(v).__name__}")
        out.append(tuple(parse_topic(x, f"{sub(kp, role)}[{i}]") for i, x in enumerate(v)))
    alerts, reports = out
    if not alerts and not reports:
        raise ConfigError(kp, "needs at least one topic under alerts (read by every instance) or reports "
                              "(shared by the group)")
    both = sorted(set(alerts) & set(reports))
    if both:
        raise ConfigError(kp, f"topic {both[0]} is under both alerts and reports; a topic has one role")
    for role, topics in zip(ROLES, out):
        if len(set(topics)) != len(topics):
            raise ConfigError(sub(kp, role), "lists a topic twice")
    return alerts, reports


def _parse(raw: Mapping[str, Any], keypath: str, ctx: ParseContext) -> KafkaSourceOptions:
    check_keys(raw, ("connection", "topics", "group_id", "group_instance_id", "fetch_max_bytes",
                     "max_partition_fetch_bytes", "fetch_max_wait_ms", "session_timeout_ms", "heartbeat_interval_ms",
                     "max_poll_interval_ms", "commit_timeout_ms", "commit_interval_ms", "stop_at_end", "received_at"),
               keypath,
               required=("connection", "topics"))
    conn = parse_connection(raw.get("connection"), sub(keypath, "connection"), ctx)
    alerts, reports = _topics(raw, keypath)
    group_id = get_str(raw, "group_id", keypath)
    if reports and group_id is None:
        raise ConfigError(sub(keypath, "group_id"), "is required with report topics: the consumer group the "
                                                    "instances share them through")
    if not reports and group_id is not None:
        raise ConfigError(sub(keypath, "group_id"), "has no use without report topics (alert topics are read "
                                                    "without a group)")
    d = KafkaSourceOptions.__dataclass_fields__
    opts = {k: get_int(raw, k, keypath, d[k].default, lo=lo) for k, lo in (
        ("fetch_max_bytes", 1024), ("max_partition_fetch_bytes", 1024), ("fetch_max_wait_ms", 0),
        ("session_timeout_ms", 1000), ("heartbeat_interval_ms", 100), ("max_poll_interval_ms", 1000),
        ("commit_timeout_ms", 100), ("commit_interval_ms", 0))}
    if opts["heartbeat_interval_ms"] >= opts["session_timeout_ms"]:
        raise ConfigError(sub(keypath, "heartbeat_interval_ms"), f"must be below session_timeout_ms "
                                                                 f"({opts['session_timeout_ms']}); a third of it is usual")
    if opts["fetch_max_wait_ms"] >= conn.request_timeout_ms:
        raise ConfigError(sub(keypath, "fetch_max_wait_ms"), f"must be below connection.request_timeout_ms "
                                                             f"({conn.request_timeout_ms})")
    instance = get_str(raw, "group_instance_id", keypath)
    if instance is not None and group_id is None:
        raise ConfigError(sub(keypath, "group_instance_id"), "needs group_id")
    return KafkaSourceOptions(conn, alerts, reports, group_id, instance, **opts,
                              stop_at_end=get_bool(raw, "stop_at_end", keypath, False),
                              received_at=get_str(raw, "received_at", keypath, "record",
                                                  choices=("record", "arrival", "message")))


def _build(name: str, options: KafkaSourceOptions, *, max_bytes: int) -> KafkaSource:
    return KafkaSource(name, options, max_bytes=max_bytes)


register_source_kind(SourceKind("kafka", _parse, _build))
