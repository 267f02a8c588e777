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
:class:`ReportHook` is what the service loop holds when ``reports:`` is
configured. After a batch's transaction has committed (the report reads the
store, so it must see the batch) and after publishing, the loop calls::

    hook = ReportHook.from_config(config)        # None when reports are off
    ...
    if hook is not None:
        for outcome in hook.after_batch(store, revision_events=[eid for eid, _rev, _state in stats.events_changed],
                                        result_events=events_whose_results_were_written,
                                        rankings={eid: ev.ranking for eid, ev in matcher.events.items()}):
            if outcome.error:
                log(outcome.error)               # a report that fails never stops the service

A report failure (an unwritable folder, a map that no longer reads) comes back
as an outcome with ``error`` set; nothing in the store depends on reports, so
the batch stays committed and the next revision writes the report again.
"""

from __future__ import annotations

import os
import time
import urllib.parse
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable, Mapping

from matcher.errors import InputError, MatcherError
from matcher.report.settings import ReportSettings

__all__ = [
    "REPORT_FILES",
    "WrittenReport",
    "ReportOutcome",
    "ReportHook",
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


@dataclass(frozen=True)
class ReportOutcome:
    """One event's report after a batch: written, or the error that stopped it."""

    event_id: str
    written: WrittenReport | None = None
    error: str | None = None


@dataclass
class ReportHook:
    """Writes the reports of the events a batch changed (see the module docstring).

    Attributes
    ----------
    settings : ReportSettings
    out_dir : Path
        Parent of the per-event folders (:func:`event_folder_name`).
    config : matcher.config.Config or None
    """

    settings: ReportSettings
    out_dir: Path
    config: object = None
    written: int = field(default=0, init=False)
    failed: int = field(default=0, init=False)

    @classmethod
    def from_config(cls, config) -> "ReportHook | None":
        """The hook for ``config``'s ``reports:`` section; None when reports are off."""
        from matcher.report.from_store import report_settings

        settings = report_settings(config)
        if not settings.enabled:
            return None
        return cls(settings, settings.resolved_out_dir(config.state_dir), config)

    def folder(self, event_id: str) -> Path:
        return self.out_dir / event_folder_name(event_id)

    def events_to_write(self, revision_events: Iterable[str], result_events: Iterable[str] = ()) -> list[str]:
        """Events whose report is due: every event with a new revision (or withdrawal), plus, with
        ``when: results``, every event whose results changed. Sorted, each once."""
        due = set(revision_events)
        if self.settings.when == "results":
            due |= set(result_events)
        return sorted(due)

    def after_batch(self, store, revision_events: Iterable[str], result_events: Iterable[str] = (),
                    rankings: Mapping[str, object] | None = None) -> list[ReportOutcome]:
        """Write the due reports; call after the batch's transaction has committed.

        Parameters
        ----------
        store : matcher.store.Store
        revision_events : iterable of str
            Events that got a new current revision (or were withdrawn) in the batch.
        result_events : iterable of str
            Events whose results were written in the batch (used with ``when: results``).
        rankings : mapping of str to HostRanking, optional
            Host rankings the service holds, by event id.

        Returns
        -------
        list of ReportOutcome
            One per event written or failed, in event-id order. Failures are not raised.
        """
        out = []
        for eid in self.events_to_write(revision_events, result_events):
            ranking = (rankings or {}).get(eid)
            try:
                w = write_event_report(store, eid, self.folder(eid), self.config, settings=self.settings,
                                       ranking=ranking)
            except (MatcherError, OSError) as exc:
                self.failed += 1
                out.append(ReportOutcome(eid, None, f"report of event {eid}: {exc}"))
                continue
            self.written += 1
            out.append(ReportOutcome(eid, w, None))
        return out
