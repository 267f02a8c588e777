"""The service loop: messages in, ranked matches out.

One batch at a time, from one source at a time, in this order::

    items   = source.poll(batch_size, poll_timeout_s)   # 1. poll: raw bytes, origin, position
    decoded = [decode_item(item) for item in items]     # 2. decode: a message, or a reason to quarantine
    with store.transaction() as tx:                     # 3. store, one transaction per batch:
        matcher.apply(tx, store, decoded)               #    messages, quarantine, event state,
                                                        #    results under their keys, outbox rows
        tx.set_positions(source.name, positions)        #    and where the source resumes
    source.commit(decoded)                              # 4. commit the source (move files, commit offsets)
    for publisher in publishers: publisher.publish()    # 5. publish: outbox → sinks, then mark sent
    for writer in report_writers: writer.on_revision()  # 6. reports of events that changed

Nothing reaches a sink before the store has committed it, and nothing is finished at
the source before that either: a crash anywhere re-delivers at most the last batch,
which the store recognises (same bytes, same origin) or which was rolled back.

With one source that allows it (``poll_ahead``: archives, inboxes) :meth:`Service.run`
keeps two batches in flight: the COMMIT of batch N runs on the store's writer thread
while this thread polls and decodes batch N+1; steps 4–6 of N follow once it is durable.
Once batches are large (``DECODE_PROCESS_MIN_ITEMS``), a third is in flight: polled after N
is finished and decoded on a child process (:mod:`matcher.streams.decode_ahead`) while
this thread stores N+1 (``service.decode_process`` turns that off).

The loop knows sources, codecs and sinks only through their protocols and registries
(:mod:`matcher.streams.sources`, :mod:`matcher.streams.codecs`,
:mod:`matcher.streams.sinks`): a Kafka source kind or sink kind registered there is
configured by name and runs here unchanged. :func:`register_report_writer` is the hook
for writers of per-event reports (``reports:`` in the configuration).

Stopping: :meth:`Service.request_stop` (called by the signal handler that
``matcher listen`` installs) lets the current batch finish; the loop then publishes
once more and closes everything. On start the matcher rebuilds its active events
from the store.
"""

from __future__ import annotations

import gc
import threading
import time
from contextlib import contextmanager
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping, Protocol, Sequence

from matcher.errors import ConfigError, MatcherError, MatcherWarning
from matcher.keycheck import check_keys, get_int, get_number, get_path, get_str
from matcher.lifecycle import ApplyStats, Matcher, MatchSettings
from matcher.store import Store
from matcher.streams.intake import decode_item
from matcher.streams.raw import positions_of
from matcher.streams.sinks import Publisher, Sink
from matcher.streams.sources import Source

__all__ = [
    "Service",
    "ServiceStats",
    "ReportWriter",
    "register_report_writer",
    "report_writer_kinds",
    "catalog_settings",
    "open_catalog",
    "loop_gc",
    "loop_gc_tick",
    "DECODE_PROCESS_MIN_ITEMS",
    "LOOP_GC_ALLOCATIONS",
]

#: Items in a polled batch from which the service decodes on a child process (service.decode_process).
DECODE_PROCESS_MIN_ITEMS = 2000

#: Net allocations of tracked objects after which the loop collects, at a batch boundary.
LOOP_GC_ALLOCATIONS = 1_000_000


@contextmanager
def loop_gc():
    """Run a block with the cyclic garbage collector off; it collects only at :func:`loop_gc_tick`.

    Every batch allocates and frees hundreds of thousands of small acyclic objects (decoded
    messages, rows, records); reference counting frees them. With the collector on, its
    young-generation passes ran in the middle of a batch, when that batch's live objects (and
    the next one's, polled ahead) are all young, and each pass walked them all: in a replay of
    200,000 reports (``matcher bench service``, measured here with ``gc.callbacks``) ~1.4 s of a
    14 s run went to collections, even with the young threshold raised to 50,000, for ~3,000
    objects found cyclic. With the collector off the loop calls :func:`loop_gc_tick` between
    batches instead. The previous state is restored after the block.
    """
    was = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was:
            gc.enable()


def loop_gc_tick(limit: int = LOOP_GC_ALLOCATIONS) -> bool:
    """Between batches: a full collection once ``limit`` net allocations built up since the last.

    ``gc.get_count()[0]`` counts tracked objects allocated and not yet freed, so acyclic
    garbage (freed by reference counting) does not advance it; cyclic garbage does, and is
    collected here, bounded by ``limit`` objects. Returns whether it collected.
    """
    if gc.get_count()[0] < limit:
        return False
    gc.collect()
    return True


class ReportWriter(Protocol):
    """Writes a report of an event after a batch changed it (``reports.NAME`` in the configuration).

    ``on_revision`` runs after the batch is durable and published; ``state`` is the
    revision's state (``issued``, ``revised`` or ``withdrawn``). A writer that fails
    raises :class:`~matcher.errors.MatcherError` or ``OSError``: the service warns and
    goes on (a report never stops the matching).

    Optional: ``attach(service)`` is called once the matcher is built (a writer may read
    ``service.config`` and the matcher's in-memory events), and ``after_batch(store)``
    after every batch's ``on_revision`` calls (to follow result changes between
    revisions). :class:`matcher.report.writer.HtmlReportWriter` (kind ``html``) has both.
    """

    name: str

    def on_revision(self, store: Store, event_id: str, revision: int, state: str) -> None: ...

    def close(self) -> None: ...


#: kind → ``build(name, options: Mapping, base_dir: Path) -> ReportWriter``
_REPORT_KINDS: dict[str, Callable[[str, Mapping[str, Any], Path], ReportWriter]] = {}


def register_report_writer(kind: str, build: Callable[[str, Mapping[str, Any], Path], ReportWriter]) -> None:
    """Make ``reports.NAME: {kind: KIND, ...}`` available; ``build`` validates the options
    (raising ``ConfigError`` with the key path ``reports.NAME....``)."""
    _REPORT_KINDS[kind] = build


def _builtin_report_writers() -> None:
    """Register the writer kinds that come with matcher: ``html`` (:mod:`matcher.report.writer`)."""
    if "html" not in _REPORT_KINDS:
        from matcher.report.writer import build_html_writer

        register_report_writer("html", build_html_writer)


def report_writer_kinds() -> tuple[str, ...]:
    _builtin_report_writers()
    return tuple(sorted(_REPORT_KINDS))


def _report_writers(raw: Mapping[str, Any] | None, base_dir: Path) -> list[ReportWriter]:
    if not raw:
        return []
    _builtin_report_writers()
    if not isinstance(raw, Mapping):
        raise ConfigError("reports", f"must be a mapping of report names, got {type(raw).__name__}")
    out = []
    for name, spec in raw.items():
        kp = f"reports.{name}"
        if not isinstance(spec, Mapping) or not isinstance(spec.get("kind"), str):
            raise ConfigError(f"{kp}.kind", "is required: the kind of report writer")
        build = _REPORT_KINDS.get(spec["kind"])
        if build is None:
            known = ", ".join(report_writer_kinds()) or "none are installed"
            raise ConfigError(f"{kp}.kind", f"unknown report writer {spec['kind']!r} (known: {known})")
        out.append(build(str(name), {k: v for k, v in spec.items() if k != "kind"}, base_dir))
    return out


@dataclass(frozen=True)
class CatalogSettings:
    """``catalog:`` of the configuration, as the service uses it.

    Attributes
    ----------
    path : Path or None
        Catalogue file or index directory (None: no host galaxies).
    columns : mapping or None
        Column map for a catalogue file.
    format : str or None
    hosts : int
        Galaxies published per revision (``hosts`` outputs and ``summary.json``).
    max_p_cc, max_offset_kpc : float
        Host association options (see :func:`matcher.catalog.hosts_for_transient`).
    """

    path: Path | None = None
    columns: Mapping[str, str] | None = None
    format: str | None = None
    hosts: int = 20
    max_p_cc: float = 0.1
    max_offset_kpc: float = 50.0


def catalog_settings(raw: Mapping[str, Any] | None, base_dir: Path) -> CatalogSettings:
    """Validate the ``catalog`` section (key paths in errors); relative paths against ``base_dir``."""
    if raw is None:
        return CatalogSettings()
    kp = "catalog"
    raw = check_keys(raw, ("path", "columns", "format", "hosts", "max_p_cc", "max_offset_kpc"), kp)
    cols = raw.get("columns")
    if cols is not None and (not isinstance(cols, Mapping) or not all(isinstance(v, str) for v in cols.values())):
        raise ConfigError(f"{kp}.columns", "must map our column names to the catalogue's (strings)")
    return CatalogSettings(
        path=get_path(raw, "path", kp, base_dir),
        columns=None if cols is None else {str(k): v for k, v in cols.items()},
        format=get_str(raw, "format", kp),
        hosts=get_int(raw, "hosts", kp, 20, lo=0),
        max_p_cc=get_number(raw, "max_p_cc", kp, 0.1, lo=0.0, hi=1.0),
        max_offset_kpc=get_number(raw, "max_offset_kpc", kp, 50.0, lo=0.0, lo_open=True),
    )


def open_catalog(settings: CatalogSettings):
    """The galaxy index for ``settings`` (None without a catalogue path)."""
    if settings.path is None:
        return None
    from matcher.catalog import open_galaxy_index

    return open_galaxy_index(settings.path, columns=settings.columns, fmt=settings.format)


@dataclass
class _Batch:
    """A polled, decoded batch on its way through the loop."""

    source: Source
    items: list
    decoded: list
    stats: ApplyStats | None = None


@dataclass
class ServiceStats:
    """Running totals of a service, and seconds spent in each step of the loop."""

    started: float = field(default_factory=time.monotonic)
    batches: int = 0
    totals: ApplyStats = field(default_factory=ApplyStats)
    seconds: dict = field(default_factory=lambda: dict.fromkeys(("poll", "decode", "store", "commit", "publish",
                                                                 "reports"), 0.0))
    last_batch_at: float | None = None
    recent: list = field(default_factory=list)  # (monotonic time, messages) of recent batches

    def rate(self, window_s: float = 10.0) -> float:
        """Messages per second over the last ``window_s`` seconds."""
        now = time.monotonic()
        total = sum(n for t, n in self.recent if now - t <= window_s)
        return total / max(min(window_s, now - self.started), 1e-3)


class Service:
    """Run the loop for a configuration (see the module docstring).

    Parameters
    ----------
    config : matcher.config.Config
    sources : sequence of Source, optional
        Sources to read (default: every configured source).
    sinks : sequence of Sink, optional
        Sinks to publish to (default: every configured sink); ``extra_sinks`` are added.
    extra_sinks : sequence of Sink
    store_path : path, optional
        Overrides the configured store.
    index : GalaxyIndex, optional
        Overrides the configured catalogue.
    settings : MatchSettings, optional
    base_dir : Path, optional
        Folder relative paths of ``catalog`` and ``reports`` resolve against (default: the
        configuration file's folder, or the current one).
    on_batch : callable, optional
        ``on_batch(service, stats_of_batch)`` after each batch (dashboards, progress).
    """

    def __init__(self, config, *, sources: Sequence[Source] | None = None, sinks: Sequence[Sink] | None = None,
                 extra_sinks: Sequence[Sink] = (), store_path=None, index=None, settings: MatchSettings | None = None,
                 base_dir=None, on_batch: Callable[["Service", ApplyStats], None] | None = None):
        self.config = config
        base = Path(base_dir) if base_dir is not None else (
            config.path.parent if config.path is not None else Path.cwd())
        self.catalog = catalog_settings(config.catalog_raw, base)
        self._stop = threading.Event()
        self.on_batch = on_batch
        self.stats = ServiceStats()
        self.store = Store(store_path or config.store_path)
        self.sources: list[Source] = []
        self._decoder = None  # the decode process (matcher.streams.decode_ahead), started for large batches
        self._decoder_off = not getattr(config.service, "decode_process", True)
        self.publishers: list[Publisher] = []
        self.writers: list[ReportWriter] = []
        try:
            self.writers = _report_writers(getattr(config, "reports_raw", None), base)
            if index is None:
                index = open_catalog(self.catalog)
            self.index = index
            if settings is None:
                settings = MatchSettings(hosts_published=self.catalog.hosts,
                                         host_options={"max_p_cc": self.catalog.max_p_cc,
                                                       "max_offset_kpc": self.catalog.max_offset_kpc})
            self.matcher = Matcher(config.classes(), index=index, settings=settings,
                                   localization_max_bytes=config.limits.localization_max_bytes)
            self.matcher.rebuild(self.store)
            for w in self.writers:  # writers that read the configuration or the matcher's event state
                attach = getattr(w, "attach", None)
                if attach is not None:
                    attach(self)
            chosen = list(sources) if sources is not None else [config.source(n) for n in config.sources]
            self._codecs = {}
            for src in chosen:
                self._codecs[src.name] = (config.codec(src.name) if src.name in config.sources
                                          else _native(config.limits.message_max_bytes))
                src.resume(self.store.positions(src.name))
                self.sources.append(src)
            chosen_sinks = list(sinks) if sinks is not None else [config.sink(n) for n in config.sinks]
            for sink in [*chosen_sinks, *extra_sinks]:
                self.publishers.append(Publisher(self.store, sink))
        except BaseException:
            self._close_parts()
            raise
        self._limits = config.limits.localization()
        self._next = 0
        self.publish()  # whatever a crash left in the outbox goes out first

    # ---------------------------------------------------------------- control
    def request_stop(self) -> None:
        """Stop after the current batch (safe to call from a signal handler)."""
        self._stop.set()

    @property
    def stopping(self) -> bool:
        return self._stop.is_set()

    @property
    def finished(self) -> bool:
        """Every source is finished (all archives read to the end)."""
        return all(s.finished for s in self.sources)

    # ------------------------------------------------------------------- loop
    def step(self, source: Source | None = None, *, timeout_s: float | None = None) -> ApplyStats | None:
        """Run one batch from ``source`` (default: the next source in turn); None when it had nothing."""
        if source is None:
            live = [s for s in self.sources if not s.finished] or self.sources
            source = live[self._next % len(live)]
            self._next += 1
        batch = self._take(source, timeout_s)
        if batch is None:
            return None
        self._store_batch(batch, later=False)
        return self._finish(batch)

    def _take(self, source: Source, timeout_s: float | None, *, ahead_ok: bool = False) -> _Batch | None:
        """Steps 1 and 2: poll and decode (no store access); with ``ahead_ok`` a large batch
        starts the decode process for the batches after it (:meth:`_run_overlapped`)."""
        svc = self.config.service
        sec = self.stats.seconds
        t0 = time.perf_counter()
        items = source.poll(svc.batch_size, svc.poll_timeout_s if timeout_s is None else timeout_s)  # 1. poll
        t1 = time.perf_counter()
        sec["poll"] += t1 - t0
        if not items:
            return None
        codec = self._codecs[source.name]
        if ahead_ok:
            self._maybe_start_decoder(codec, len(items))
        decoded = self.matcher.check([decode_item(it, codec, self._limits) for it in items])  # 2. decode
        sec["decode"] += time.perf_counter() - t1
        return _Batch(source, items, decoded)

    # ----------------------------------------------------- decoding ahead
    def _maybe_start_decoder(self, codec, n_items: int) -> None:
        """Start the decode process once a batch is large enough for it to pay (its start takes ~0.2 s)."""
        if self._decoder is not None or self._decoder_off or n_items < DECODE_PROCESS_MIN_ITEMS:
            return
        from matcher.streams.decode_ahead import DecodeProcess, eligible

        self._decoder_off = True  # tried once per service
        if eligible(codec):
            try:
                self._decoder = DecodeProcess(codec)
            except OSError as exc:
                warnings.warn(f"decode process not started ({exc}); decoding in this process",
                              MatcherWarning, stacklevel=2)

    def _send_ahead(self, source: Source):
        """Poll what is there now (no wait) and give it to the decode process: ``(items, sent)``, or None."""
        from matcher.streams.decode_ahead import DecodeProcessGone

        t0 = time.perf_counter()
        items = source.poll(self.config.service.batch_size, 0.0)
        self.stats.seconds["poll"] += time.perf_counter() - t0
        if not items:
            return None
        try:
            self._decoder.submit(items)
        except DecodeProcessGone as exc:
            self._decoder_gone(exc)
            return items, False
        return items, True

    def _collect(self, source: Source, items: list, sent: bool) -> _Batch:
        """Step 2 for a batch given to the decode process: its reports rebuilt, anything else decoded here."""
        from matcher.streams.decode_ahead import DecodeProcessGone, rebuild

        t0 = time.perf_counter()
        codec = self._codecs[source.name]
        fields = None
        if sent:
            try:
                fields = self._decoder.result()
            except DecodeProcessGone as exc:
                self._decoder_gone(exc)
        limits = self._limits
        if fields is None or len(fields[0]) != len(items):
            decoded = [decode_item(it, codec, limits) for it in items]
        else:
            decoded = rebuild(items, codec.name, fields, lambda it: decode_item(it, codec, limits))
        decoded = self.matcher.check(decoded)
        self.stats.seconds["decode"] += time.perf_counter() - t0
        return _Batch(source, items, decoded)

    def _drop_ahead(self, ahead) -> None:
        """After an error: the decode process's answer for a batch that will not be stored is read and
        dropped (the source gives those items again on restart), so the process can take the next."""
        if ahead is None or not ahead[1] or self._decoder is None:
            return
        from matcher.streams.decode_ahead import DecodeProcessGone

        try:
            self._decoder.result()
        except DecodeProcessGone as exc:
            self._decoder_gone(exc)

    def _decoder_gone(self, exc: Exception) -> None:
        warnings.warn(f"{exc}; decoding in this process from now on (nothing is lost)", MatcherWarning, stacklevel=3)
        dec, self._decoder = self._decoder, None
        try:
            dec.close(timeout_s=1.0)
        except OSError:
            pass

    def _store_batch(self, batch: _Batch, *, later: bool) -> None:
        """Step 3: one transaction for the whole batch (with ``later``, its COMMIT on the writer thread)."""
        t2 = time.perf_counter()
        opened = self.store.transaction_committed_later() if later else self.store.transaction()
        try:
            with opened as tx:
                batch.stats = self.matcher.apply(tx, self.store, batch.decoded)
                tx.set_positions(batch.source.name, positions_of(batch.items))
        except BaseException:
            # The transaction rolled back: the in-memory state may hold part of the batch.
            self.matcher.rebuild(self.store)
            raise
        self.stats.seconds["store"] += time.perf_counter() - t2

    def _finish(self, batch: _Batch) -> ApplyStats:
        """Steps 4 to 6, once the batch's transaction is durable."""
        sec = self.stats.seconds
        t3 = time.perf_counter()
        try:
            self.store.wait_commit()
        except BaseException:
            self.matcher.rebuild(self.store)  # the commit failed and was rolled back
            raise
        t4 = time.perf_counter()
        sec["store"] += t4 - t3
        stats = batch.stats
        batch.source.commit(batch.decoded)  # 4. commit the source, only now
        t5 = time.perf_counter()
        sec["commit"] += t5 - t4
        self.publish(tolerant=True)  # 5. publish the outbox (a sink that is away retries next batch)
        t6 = time.perf_counter()
        sec["publish"] += t6 - t5
        self._write_reports(stats)  # 6. reports of events that changed
        sec["reports"] += time.perf_counter() - t6
        self.stats.batches += 1
        self.stats.totals.add(stats)
        now = time.monotonic()
        self.stats.last_batch_at = now
        self.stats.recent.append((now, stats.messages))
        if len(self.stats.recent) > 256:
            del self.stats.recent[:128]
        if self.on_batch is not None:
            self.on_batch(self, stats)
        return stats

    def run(self, *, until_finished: bool = False, max_batches: int | None = None) -> ServiceStats:
        """Loop until stopped (or, with ``until_finished``, until every source is finished).

        The garbage collector runs only between batches meanwhile (:func:`loop_gc`). With a single
        source that allows it (``poll_ahead``), a batch's commit overlaps the next batch's
        poll and decode (:meth:`_run_overlapped`), and large batches are decoded on a child
        process one batch ahead (``service.decode_process``).
        """
        with loop_gc():
            if len(self.sources) == 1 and getattr(self.sources[0], "poll_ahead", False):
                return self._run_overlapped(self.sources[0], until_finished, max_batches)
            return self._run(until_finished, max_batches)

    def _run_overlapped(self, source: Source, until_finished: bool, max_batches: int | None) -> ServiceStats:
        """The loop for one source, two batches in flight.

        While the store commits batch N on its writer thread (writing pages and waiting for the
        disk, without Python's lock), this thread polls and decodes batch N+1; then it finishes
        N (source commit, publish, reports) and stores N+1. The order of what becomes durable,
        what the source is told and what is published is the same as in :meth:`step`; only the
        poll of N+1 comes before the source hears of N, which a ``poll_ahead`` source allows
        (its position lives in the store, or it tracks items in flight). A batch polled when a
        stop is requested is still stored and finished: nothing read is dropped.

        Once the decode process runs, a third batch is in flight: after N is finished, what
        the source has at once (no wait) is polled as N+2 and decoded on the child while this
        thread stores N+1. It is always stored next, whatever stops the loop meanwhile
        (short of an error, after which the source gives it again on restart).
        """
        done = 0
        pending: _Batch | None = None
        ahead = None  # (items, sent): polled, on the decode process
        try:
            while True:
                loop_gc_tick()
                in_flight = (pending is not None) + (ahead is not None)
                more = (not self._stop.is_set() and not (until_finished and source.finished)
                        and (max_batches is None or done + in_flight < max_batches))
                if ahead is not None:
                    nxt, ahead = self._collect(source, *ahead), None
                else:
                    nxt = self._take(source, None, ahead_ok=True) if more else None
                if pending is not None:
                    batch, pending = pending, None
                    self._finish(batch)
                    done += 1
                if nxt is None:
                    if not more:
                        break
                    if self.on_batch is not None:
                        self.on_batch(self, ApplyStats())
                    continue
                if (self._decoder is not None and not self._stop.is_set()
                        and not (until_finished and source.finished)
                        and (max_batches is None or done + 2 <= max_batches)):
                    ahead = self._send_ahead(source)
                self._store_batch(nxt, later=True)
                pending = nxt
        except Exception:
            self._drop_ahead(ahead)
            if pending is not None:  # its commit is under way: finish it (it is the source's and sinks' due)
                self._finish(pending)
            raise
        except BaseException:  # an interrupt: only let the commit under way end (nothing is acknowledged)
            self._drop_ahead(ahead)
            if pending is not None:
                self.store.wait_commit()
            raise
        return self.stats

    def _run(self, until_finished: bool, max_batches: int | None) -> ServiceStats:
        done = 0
        while not self._stop.is_set():
            loop_gc_tick()
            if until_finished and self.finished:
                break
            if max_batches is not None and done >= max_batches:
                break
            idle_all = True
            for _ in range(len(self.sources)):
                if self._stop.is_set():
                    break
                # With several sources, do not wait on one while another may have input.
                wait = None if len(self.sources) == 1 else 0.0
                if self.step(timeout_s=wait) is not None:
                    idle_all = False
                    done += 1
            if idle_all and len(self.sources) > 1 and not (until_finished and self.finished):
                self._stop.wait(self.config.service.poll_timeout_s)
            elif idle_all and self.on_batch is not None:
                self.on_batch(self, ApplyStats())
        return self.stats

    def publish(self, *, tolerant: bool = False) -> int:
        """Copy pending outbox rows to every sink (each row durable before its cursor moves).

        With ``tolerant`` a sink that fails (a broker away longer than its delivery timeout,
        a full disk) gets a warning and is tried again at the next call; its rows stay in the
        outbox, so nothing is lost. At start-up the service is strict: a sink that cannot take
        its output then is a configuration problem.
        """
        from matcher.streams.sinks import SinkError

        sent = 0
        for p in self.publishers:
            try:
                sent += p.publish()
            except (SinkError, OSError) as exc:
                if not tolerant:
                    raise
                warnings.warn(f"{exc}; its outbox rows stay queued and are sent again after the next batch",
                              MatcherWarning, stacklevel=2)
        return sent

    def _write_reports(self, stats: ApplyStats) -> None:
        if not self.writers:
            return
        for event_id, revision, state in stats.events_changed:
            for w in self.writers:
                try:
                    w.on_revision(self.store, event_id, revision, state)
                except (MatcherError, OSError) as exc:
                    warnings.warn(f"report {w.name}: event {event_id} revision {revision}: {exc}",
                                  MatcherWarning, stacklevel=2)
        for w in self.writers:  # writers that also follow result changes between revisions
            follow = getattr(w, "after_batch", None)
            if follow is not None:
                try:
                    follow(self.store)
                except (MatcherError, OSError) as exc:
                    warnings.warn(f"report {w.name}: {exc}", MatcherWarning, stacklevel=2)

    # -------------------------------------------------------------- shutdown
    def _close_parts(self) -> None:
        if self._decoder is not None:
            self._decoder.close()
            self._decoder = None
        for p in self.publishers:
            p.close()
        for s in self.sources:
            s.close()
        for w in self.writers:
            w.close()
        self.store.close()

    def close(self) -> None:
        """Publish once more, then close sinks, sources, report writers and the store."""
        try:
            self.publish(tolerant=True)
        finally:
            self._close_parts()

    def __enter__(self) -> "Service":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # ------------------------------------------------------------- reading
    def quarantine_count(self) -> int:
        return self.store.counts()["quarantine"]


def _native(max_bytes: int):
    from matcher.streams.codecs import make_codec

    return make_codec("native", max_bytes=max_bytes)

