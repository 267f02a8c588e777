"""Writing per-event reports: the files, and the hook the service calls after each batch.

One folder per report::

    index.html        the self-contained page (matcher.report.html)
    candidates.ecsv   the ranked candidates, every column of the page at full precision
    hosts.ecsv        the top host galaxies with cumulative probability
    hosts.vot         the same as a VOTable
    skyplot.png       the sky plot of the revision shown (when it has a localization)

:func:`render_report_files` is pure (report in, bytes out); :func:`write_report_files`
is the edge. Each file is written to a temporary name in the same folder and
renamed over the old one, and ``index.html`` comes last, so a reader never sees
a half-written file and a page never links to tables older than itself.

The service
-----------
The service runs the writers named under ``reports:`` (:mod:`matcher.service`,
:func:`~matcher.service.register_report_writer`); the ``html`` kind is
:class:`HtmlReportWriter`, built by :func:`build_html_writer`::

    reports:
      html: {kind: html, out: reports}     # one folder per event: reports/EVENT/index.html ...

After a batch has committed and been published, the service calls
``on_revision(store, event_id, revision, state)`` for every event that got a new
revision or was withdrawn, then ``after_batch(store)``; the writer reads the store
(so it sees the batch) and rewrites the event folders that are due: at once for a new
revision, and at most every ``refresh_s`` seconds for an event whose results changed
since (and once more in ``close()``). A failure raises :class:`~matcher.errors.InputError`;
the service warns and goes on, since nothing in the store depends on reports, and the
next change writes the report again.
"""

from __future__ import annotations

import math
import os
import time
import urllib.parse
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping

from matcher.errors import InputError, MatcherError, MatcherWarning
from matcher.report.settings import ReportSettings

__all__ = [
    "REPORT_FILES",
    "WrittenReport",
    "HtmlReportWriter",
    "build_html_writer",
    "event_folder_name",
    "render_report_files",
    "write_report_files",
    "write_event_report",
]

#: Role → file name inside a report folder.
REPORT_FILES = {
    "html": "index.html",
    "candidates": "candidates.ecsv",
    "hosts": "hosts.ecsv",
    "hosts_votable": "hosts.vot",
    "skyplot": "skyplot.png",
}


def event_folder_name(event_id: str) -> str:
    """A folder name for an event id: percent-encoded (as in result keys), never ``.`` or ``..`` or hidden.

    Examples
    --------
    >>> event_folder_name("S260101a/x")
    'S260101a%2Fx'
    >>> event_folder_name("..")
    '%2E.'
    """
    if not isinstance(event_id, str) or not event_id:
        raise InputError(f"event id must be a non-empty string, got {event_id!r}")
    name = urllib.parse.quote(event_id, safe="")
    if name.startswith("."):
        name = "%2E" + name[1:]
    return name


def render_report_files(report) -> dict[str, bytes]:
    """The bytes of every file of a report folder, by role (see :data:`REPORT_FILES`)."""
    from matcher.report.html import render_event_html
    from matcher.report.tables import candidates_table, ecsv_bytes, hosts_table, votable_bytes

    files = {
        "candidates": ecsv_bytes(candidates_table(report)),
        "hosts": ecsv_bytes(hosts_table(report)),
        "hosts_votable": votable_bytes(hosts_table(report)),
    }
    if report.figures:
        files["skyplot"] = report.figures[0].png
    links = [(REPORT_FILES[k], REPORT_FILES[k]) for k in ("candidates", "hosts", "hosts_votable", "skyplot")
             if k in files]
    files["html"] = render_event_html(report, links=links).encode("utf-8")
    return files


def write_report_files(files: Mapping[str, bytes], folder) -> dict[str, Path]:
    """Write a report folder (created if needed): each file atomically, ``index.html`` last.

    A ``skyplot.png`` left from an earlier report is removed when this one has none.

    Raises
    ------
    InputError
        The folder cannot be created or written.
    """
    folder = Path(folder)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"report folder {folder}: cannot create: {exc.strerror or exc}") from None
    out: dict[str, Path] = {}
    order = [k for k in files if k != "html"] + (["html"] if "html" in files else [])
    for role in order:
        if role not in REPORT_FILES:
            raise InputError(f"report file role {role!r} is not one of {', '.join(REPORT_FILES)}")
        path = folder / REPORT_FILES[role]
        tmp = folder / f".{REPORT_FILES[role]}.{os.getpid()}.tmp"
        try:
            with open(tmp, "wb") as fh:
                fh.write(files[role])
            os.replace(tmp, path)
        except OSError as exc:
            try:
                tmp.unlink()
            except OSError:
                pass
            raise InputError(f"report file {path}: cannot write: {exc.strerror or exc}") from None
        out[role] = path
    if "skyplot" not in files:
        stale = folder / REPORT_FILES["skyplot"]
        if stale.exists():
            try:
                stale.unlink()
            except OSError as exc:
                raise InputError(f"report file {stale}: cannot remove the old plot: {exc.strerror or exc}") from None
    return out


@dataclass(frozen=True)
class WrittenReport:
    """What :func:`write_event_report` wrote.

    Attributes
    ----------
    event_id : str
    revision : int
        The revision shown.
    state : str
        The event's current state.
    folder : Path
    files : mapping of str to Path
        By role (see :data:`REPORT_FILES`).
    n_candidates, n_hosts, n_figures : int
    seconds : float, s
        Time taken (reading the store, plotting, rendering, writing).
    """

    event_id: str
    revision: int
    state: str
    folder: Path
    files: Mapping[str, Path]
    n_candidates: int
    n_hosts: int
    n_figures: int
    seconds: float


def write_event_report(store, event_id: str, out_dir, config=None, *, settings: ReportSettings | None = None,
                       ranking=None) -> WrittenReport:
    """Build an event's report from the store and write its folder.

    Parameters
    ----------
    store : matcher.store.Store
    event_id : str
    out_dir : str or Path
        The report's folder (``index.html`` and the tables go directly in it).
    config : matcher.config.Config, optional
        Classes, limits and the ``reports:`` settings.
    settings : ReportSettings, optional
        Overrides ``config``'s ``reports:`` section.
    ranking : matcher.catalog.HostRanking, optional
        The revision's host ranking when the caller has it in memory.

    Returns
    -------
    WrittenReport

    Raises
    ------
    InputError
        Unknown event, unreadable stored data, or a folder that cannot be written.
    """
    from matcher.report.from_store import event_report_from_store

    t0 = time.perf_counter()
    report = event_report_from_store(store, event_id, config, settings=settings, ranking=ranking)
    paths = write_report_files(render_report_files(report), out_dir)
    return WrittenReport(event_id, report.revision, report.current.state, Path(out_dir), paths,
                         len(report.candidates), len(report.hosts), len(report.figures), time.perf_counter() - t0)


class HtmlReportWriter:
    """The ``html`` report writer of the service (``reports.NAME: {kind: html, ...}``).

    Implements :class:`matcher.service.ReportWriter`:

    * :meth:`on_revision`: after a batch that gave an event a new revision (or withdrew
      it), rewrite the event's folder ``OUT/EVENT`` (:func:`event_folder_name`);
    * :meth:`after_batch`: after every batch, note the events whose results changed
      (the store's outbox since the last look) and rewrite those not written for
      ``refresh_s`` seconds, so that a report does not stay as it was when the revision
      arrived while candidates keep coming;
    * :meth:`close`: rewrite the events still waiting, once, as the service stops.

    :meth:`attach` gives it the service, whose configuration supplies the classes and
    limits and whose in-memory event state supplies the host ranking (without it the
    stored ``hosts`` output is read).

    Attributes
    ----------
    name : str
    settings : ReportSettings
    written, failed : int
        Reports written, and failures raised to the service (which warns and goes on).
    last : WrittenReport or None
    pending : set of str
        Events whose results changed since their report was written.
    """

    def __init__(self, name: str, settings: ReportSettings, *, clock=time.monotonic):
        if settings.out is None:
            raise InputError(f"report writer {name}: no output folder")
        self.name = name
        self.settings = settings
        self.config = None
        self._service = None
        self._store = None
        self._clock = clock
        self._cursor: int | None = None
        self._written_at: dict[str, float] = {}
        self._written_seq: dict[str, int] = {}
        self.pending: set[str] = set()
        self.written = 0
        self.failed = 0
        self.last: WrittenReport | None = None

    def attach(self, service) -> None:
        """Called by the service once it has built its matcher: results stored before now are in
        the reports already written (or will be, with the next revision), so follow from here."""
        self._service = service
        self.config = getattr(service, "config", None)
        store = getattr(service, "store", None)
        if store is not None:
            self._cursor = store.last_seq()

    def folder(self, event_id: str) -> Path:
        return Path(self.settings.out) / event_folder_name(event_id)

    def _ranking(self, event_id: str):
        matcher = getattr(self._service, "matcher", None)
        ev = None if matcher is None else matcher.events.get(event_id)
        return None if ev is None else ev.ranking

    def _write(self, store, event_id: str) -> None:
        seq = store.last_seq()
        try:
            self.last = write_event_report(store, event_id, self.folder(event_id), self.config,
                                           settings=self.settings, ranking=self._ranking(event_id))
        except (MatcherError, OSError):
            self.failed += 1
            raise
        self.written += 1
        self._written_at[event_id] = self._clock()
        self._written_seq[event_id] = seq
        self.pending.discard(event_id)

    def on_revision(self, store, event_id: str, revision: int, state: str) -> None:
        """Rewrite the event's report (raises ``InputError`` when it cannot; the service warns)."""
        self._store = store
        self._write(store, event_id)

    def after_batch(self, store) -> None:
        """Follow result changes since the last call; rewrite the reports that are due.

        Raises
        ------
        InputError
            Naming every event whose report could not be written (the others are written).
        """
        self._store = store
        if self.settings.refresh_s is None:
            return
        if self._cursor is None:  # not attached to a service: follow the whole outbox
            self._cursor = 0
        while rows := store.outbox_after(self._cursor, 5000):
            for row in rows:
                if row.kind == "match":
                    eid = urllib.parse.unquote(row.key.split("/", 1)[0])
                    if row.seq > self._written_seq.get(eid, 0):
                        self.pending.add(eid)
            self._cursor = rows[-1].seq
        now = self._clock()
        due = sorted(e for e in self.pending if now - self._written_at.get(e, -math.inf) >= self.settings.refresh_s)
        self._write_all(store, due)

    def _write_all(self, store, events) -> None:
        errors = []
        for eid in events:
            try:
                self._write(store, eid)
            except (MatcherError, OSError) as exc:
                errors.append(f"event {eid}: {exc}")
        if errors:
            raise InputError("; ".join(errors))

    def close(self) -> None:
        """Rewrite the reports still waiting for their refresh (warns when one cannot be written)."""
        store, self._store = self._store, None
        self._service = None
        if store is None or not self.pending:
            return
        try:
            self._write_all(store, sorted(self.pending))
        except InputError as exc:
            warnings.warn(f"report {self.name}: {exc}", MatcherWarning, stacklevel=2)


def build_html_writer(name: str, options: Mapping, base_dir: Path) -> HtmlReportWriter:
    """``build`` of the ``html`` writer kind for :func:`matcher.service.register_report_writer`.

    Raises
    ------
    ConfigError
        A bad option, naming its key path (``reports.NAME.OPTION``).
    """
    from matcher.report.settings import parse_report_settings

    return HtmlReportWriter(name, parse_report_settings(options, base_dir, f"reports.{name}"))
