"""A Kafka sink: results published to a topic, keyed by the result key, at least once.

Driven by the store's outbox through :class:`~matcher.streams.sinks.base.Publisher`:
:meth:`KafkaSink.write` sends each outbox row (message key = the result key
``EVENT/REVISION/TRANSIENT``, value = the row's JSON text exactly as the outbox
holds it, headers ``matcher-kind`` and ``matcher-seq``), and :meth:`KafkaSink.flush`
returns only when the broker has acknowledged every one of them (``acks=all``): it
checks each send's future, not only ``producer.flush()``, which raises on nothing
but a timeout. Only then does the publisher advance the sink's cursor in the store.

The producer is idempotent (``enable_idempotence=True`` set explicitly, with
``acks='all'`` and at most 5 requests in flight, the settings that keep it so):
retries after a broker restart do not duplicate records. A crash between the
acknowledgement and the cursor update re-sends those rows on restart; a consumer
keeps the last record of each key (the same key always lands on the same
partition, in order), so nothing is lost and de-duplication by key is exact.

A sink cannot read a topic back, so :meth:`KafkaSink.open` resumes after the
store's cursor.
"""

from __future__ import annotations

import collections
import time
from dataclasses import dataclass
from typing import Any, Mapping, Sequence

from matcher.errors import ConfigError
from matcher.keycheck import ParseContext, check_keys, get_bool, get_int, get_str, sub
from matcher.store import OutboxRow
from matcher.streams.kafka_common import (
    LOG,
    Connection,
    client_config,
    describe_connection,
    parse_connection,
    parse_topic,
    ClientProblems,
    KafkaTransportError,
    explain,
    wait_reachable,
)
from matcher.streams.sinks.base import SinkError, SinkKind, parse_kinds, register_sink_kind

__all__ = ["KafkaSink", "KafkaSinkOptions", "COMPRESSION_TYPES"]

#: Compression codecs a sink may ask for (``snappy``, ``lz4`` and ``zstd`` need their Python packages).
COMPRESSION_TYPES = ("none", "gzip", "snappy", "lz4", "zstd")


@dataclass(frozen=True)
class KafkaSinkOptions:
    """``sinks.NAME`` with ``kind: kafka``.

    Attributes
    ----------
    connection : Connection
    topic : str
    kinds : tuple of str or None
        Outbox kinds published (default ``("match",)``; None for every kind).
    linger_ms : int, ms
        How long the producer may wait to fill a batch.
    batch_size : int, bytes
    compression : str
        One of :data:`COMPRESSION_TYPES`.
    max_request_size : int, bytes
        The largest record (and request) the producer sends; the topic's
        ``max.message.bytes`` must allow it too.
    delivery_timeout_ms : int, ms
        How long a record may take, retries included, before its send fails (then
        :meth:`KafkaSink.flush` raises and the rows stay in the outbox).
    max_block_ms : int, ms
        How long a send may wait for topic metadata.
    headers : bool
        Add ``matcher-kind`` and ``matcher-seq`` headers.
    """

    connection: Connection
    topic: str
    kinds: tuple[str, ...] | None = ("match",)
    linger_ms: int = 5
    batch_size: int = 262144
    compression: str = "none"
    max_request_size: int = 1048576
    delivery_timeout_ms: int = 120000
    max_block_ms: int = 60000
    headers: bool = True


class KafkaSink:
    """Publish outbox rows to a Kafka topic (see the module docstring).

    Parameters
    ----------
    name : str
    options : KafkaSinkOptions
    """

    kind = "kafka"

    def __init__(self, name: str, options: KafkaSinkOptions):
        self.name = name
        self.options = options
        self.kinds = None if options.kinds is None else tuple(options.kinds)
        self._producer = None
        self._futures: list[tuple[OutboxRow, Any]] = []
        #: Counters for the dashboard and tests: ``sent`` (acknowledged), ``failed``, ``producers``,
        #: ``flushes`` (rounds of acknowledgements waited for).
        self.stats = collections.Counter()
        #: Seconds (wall clock, the caller's thread) in :meth:`write` (handing records to the
        #: producer) and in :meth:`flush` (waiting for the broker's acknowledgements).
        self.seconds = dict.fromkeys(("send", "flush"), 0.0)

    def __repr__(self) -> str:
        return (f"KafkaSink({self.name!r}, brokers={self.options.connection.servers_text!r}, "
                f"topic={self.options.topic!r})")

    def _what(self, doing: str) -> str:
        return f"sink {self.name} (kafka topic {self.options.topic} at {self.options.connection.servers_text}): {doing}"

    def _error(self, doing: str, exc: BaseException, problems: ClientProblems | None = None) -> SinkError:
        return SinkError(self._what(f"{doing}: {explain(exc, self.options.connection, problems)}"))

    def _make_producer(self) -> None:
        from kafka import KafkaProducer
        from kafka import errors as kerr

        o = self.options
        kw = client_config(o.connection, f"sinks.{self.name}.connection")
        kw.update(enable_idempotence=True, acks="all", max_in_flight_requests_per_connection=5,
                  linger_ms=o.linger_ms, batch_size=o.batch_size,
                  compression_type=None if o.compression == "none" else o.compression,
                  max_request_size=o.max_request_size, delivery_timeout_ms=o.delivery_timeout_ms,
                  max_block_ms=o.max_block_ms, allow_auto_create_topics=False)
        try:
            wait_reachable(o.connection, self._what("connecting"))
        except KafkaTransportError as exc:
            raise SinkError(str(exc)) from None
        with ClientProblems.watching() as problems:
            try:
                producer = KafkaProducer(**kw)
            except (kerr.KafkaError, OSError) as exc:
                raise self._error("cannot connect", exc, problems) from None
            except AssertionError as exc:  # kafka-python checks a compression library is importable this way
                raise self._error("cannot make the producer", exc) from None
            try:
                parts = producer.partitions_for(o.topic)
            except (kerr.KafkaError, OSError) as exc:
                producer.close(timeout=2)
                raise self._error("the topic does not exist or cannot be described", exc, problems) from None
        if not parts:
            producer.close(timeout=2)
            raise SinkError(self._what("the topic has no partitions (does it exist?)"))
        self._producer = producer
        self.stats["producers"] += 1

    def open(self, sent_seq: int) -> int:
        """Connect and check the topic; resume after the store's cursor (a topic cannot be read back)."""
        if self._producer is None:
            self._make_producer()
        return int(sent_seq)

    def write(self, rows: Sequence[OutboxRow]) -> None:
        """Send rows (asynchronously); :meth:`flush` waits for and checks every one."""
        from kafka import errors as kerr

        if self._producer is None:
            self._make_producer()
        t0 = time.perf_counter()
        topic, headers = self.options.topic, self.options.headers
        send = self._producer.send
        keep = self._futures.append
        try:
            for r in rows:
                h = [("matcher-kind", r.kind.encode("utf-8")), ("matcher-seq", str(r.seq).encode("ascii"))] \
                    if headers else None
                try:
                    fut = send(topic, key=r.key.encode("utf-8"), value=r.payload.encode("utf-8"), headers=h)
                except (kerr.KafkaError, OSError) as exc:
                    self._abandon()
                    raise self._error(f"cannot send outbox row {r.seq} (key {r.key})", exc) from None
                keep((r, fut))
        finally:
            self.seconds["send"] += time.perf_counter() - t0

    def flush(self) -> None:
        """Return once every row written since the last flush is acknowledged.

        Raises
        ------
        SinkError
            A send failed or was not acknowledged within ``delivery_timeout_ms``; the rows
            stay in the outbox (the publisher does not advance its cursor) and are sent
            again by the next publish, with a new producer.
        """
        from kafka import errors as kerr

        if not self._futures:
            return
        futures, self._futures = self._futures, []
        timeout_s = self.options.delivery_timeout_ms / 1000.0 + 5.0
        self.stats["flushes"] += 1
        t0 = time.perf_counter()
        try:
            self._producer.flush(timeout=timeout_s)
        except (kerr.KafkaError, OSError) as exc:
            self._abandon()
            raise self._error(f"{len(futures)} result(s) not acknowledged; they stay in the outbox", exc) from None
        finally:
            self.seconds["flush"] += time.perf_counter() - t0
        failed = []
        for row, fut in futures:
            if not fut.is_done:
                failed.append((row, kerr.KafkaTimeoutError("not completed after flush")))
            elif fut.exception is not None:
                failed.append((row, fut.exception))
        self.stats["sent"] += len(futures) - len(failed)
        if failed:
            self.stats["failed"] += len(failed)
            self._abandon()
            row, exc = failed[0]
            raise self._error(f"{len(failed)} of {len(futures)} result(s) not acknowledged (first: outbox row "
                              f"{row.seq}, key {row.key}); they stay in the outbox", exc) from None

    def _abandon(self) -> None:
        """Drop the producer after a failure: the next write makes a new one (a fresh idempotence epoch)."""
        self._futures = []
        if self._producer is not None:
            try:
                self._producer.close(timeout=2)
            except Exception:  # closing a broken producer must not hide the error being raised
                LOG.warning("sink %s: closing the failed producer raised", self.name)
            self._producer = None

    def info(self) -> dict:
        """What the dashboard may show about this sink (never a secret)."""
        return {"name": self.name, "kind": self.kind, "topic": self.options.topic,
                "connection": describe_connection(self.options.connection), "stats": dict(self.stats)}

    def close(self) -> None:
        if self._producer is not None:
            producer, self._producer = self._producer, None
            producer.close(timeout=10)


def _parse(raw: Mapping[str, Any], keypath: str, ctx: ParseContext) -> KafkaSinkOptions:
    check_keys(raw, ("connection", "topic", "kinds", "linger_ms", "batch_size", "compression", "max_request_size",
                     "delivery_timeout_ms", "max_block_ms", "headers"), keypath, required=("connection", "topic"))
    conn = parse_connection(raw.get("connection"), sub(keypath, "connection"), ctx)
    d = KafkaSinkOptions.__dataclass_fields__
    ints = {k: get_int(raw, k, keypath, d[k].default, lo=lo) for k, lo in (
        ("linger_ms", 0), ("batch_size", 1024), ("max_request_size", 1024), ("delivery_timeout_ms", 1000),
        ("max_block_ms", 100))}
    if ints["delivery_timeout_ms"] < conn.request_timeout_ms:
        raise ConfigError(sub(keypath, "delivery_timeout_ms"), f"must be at least connection.request_timeout_ms "
                                                               f"({conn.request_timeout_ms})")
    compression = get_str(raw, "compression", keypath, "none", choices=COMPRESSION_TYPES)
    return KafkaSinkOptions(conn, parse_topic(raw.get("topic"), sub(keypath, "topic")), parse_kinds(raw, keypath),
                            compression=compression, headers=get_bool(raw, "headers", keypath, True), **ints)


def _build(name: str, options: KafkaSinkOptions) -> KafkaSink:
    return KafkaSink(name, options)


register_sink_kind(SinkKind("kafka", _parse, _build))
