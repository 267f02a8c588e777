"""Reading an archive for tuning (the I/O edge): JSON Lines of native messages, and the alerts' maps.

The archive is read through the project's own archive source and native codec,
so it is validated exactly as a replay would validate it. What is kept:

* **GW alerts**: for each event the highest revision; an event whose highest
  revision is ``withdrawn`` is left out (it was not a real event). Each kept
  alert's localization is loaded (paths relative to the archive's folder); an
  alert whose map cannot be loaded is left out, with the reason.
* **Transient reports**: the first line of each transient id (its first
  detection; later lines of the same id are updates, counted but not used).
  A report with its own localization keeps it (loaded once per file).

A line that does not decode is rejected with its line number and reason; the
rest of the archive is used (nothing accepted is lost, nothing is guessed).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path

from matcher.coincidence.batch import ReportBatch
from matcher.errors import InputError, MessageError, SkyMapError
from matcher.sky.skymap import SkyMap
from matcher.streams.codecs.native import NativeCodec
from matcher.streams.localization import LocalizationLimits, load_localization
from matcher.streams.messages import GWAlert, TransientReport
from matcher.streams.sources.archive import ArchiveSource

__all__ = ["ArchiveContents", "read_archive", "file_sha256"]


@dataclass(frozen=True, eq=False)
class ArchiveContents:
    """What tuning uses from an archive.

    Attributes
    ----------
    path : Path
    sha256 : str
        Of the archive file (hex).
    alerts : tuple of GWAlert
        Kept alerts, sorted by merger time then event id.
    skymaps : tuple of SkyMap
        Their localizations, aligned with ``alerts``.
    reports : ReportBatch
        Kept transient reports, in archive order.
    report_maps : tuple of (SkyMap or None), or None
        The reports' own localizations (None when no report has one).
    lines : int
        Non-blank lines read.
    rejected : tuple of str
        ``"LINE: reason"`` for lines that did not decode or could not be used.
    notes : tuple of str
        Other things left out (withdrawn events, repeated transient ids).
    """

    path: Path
    sha256: str
    alerts: tuple[GWAlert, ...]
    skymaps: tuple[SkyMap, ...]
    reports: ReportBatch
    report_maps: tuple[SkyMap | None, ...] | None
    lines: int
    rejected: tuple[str, ...]
    notes: tuple[str, ...]


def file_sha256(path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def read_archive(path, *, limits: LocalizationLimits = LocalizationLimits(),
                 max_bytes: int = 16 * 1024 * 1024) -> ArchiveContents:
    """Read, validate and select an archive's alerts and reports (see the module docstring).

    Raises
    ------
    InputError
        The archive cannot be opened, or holds no usable GW alert or no transient report.
    """
    p = Path(path)
    codec = NativeCodec(max_bytes=max_bytes)
    latest: dict[str, tuple[GWAlert, str]] = {}
    reports: list[TransientReport] = []
    seen: set[str] = set()
    repeats = 0
    rejected: list[str] = []
    lines = 0
    with ArchiveSource("tune", p, max_bytes=max_bytes) as source:
        while True:
            items = source.poll(max_items=5000)
            if not items:
                break
            for item in items:
                lines += 1
                where = str(item.origin)
                try:
                    msg = codec.decode(item)
                except MessageError as exc:
                    rejected.append(f"{where}: {exc}")
                    continue
                if isinstance(msg, GWAlert):
                    old = latest.get(msg.event_id)
                    if old is None or msg.revision > old[0].revision:
                        latest[msg.event_id] = (msg, where)
                elif isinstance(msg, TransientReport):
                    if msg.transient_id in seen:
                        repeats += 1
                        continue
                    seen.add(msg.transient_id)
                    reports.append(msg)
    notes: list[str] = []
    if repeats:
        notes.append(f"{repeats} later line(s) of transient ids already seen were not used (first detections only)")
    withdrawn = sorted(e for e, (a, _) in latest.items() if a.state == "withdrawn")
    if withdrawn:
        notes.append(f"{len(withdrawn)} withdrawn event(s) left out: {', '.join(withdrawn[:5])}"
                     f"{' …' if len(withdrawn) > 5 else ''}")
    alerts, maps = [], []
    for event_id, (alert, where) in sorted(latest.items(), key=lambda kv: (kv[1][0].merger_time, kv[0])):
        if alert.state == "withdrawn":
            continue
        try:
            maps.append(load_localization(alert.localization, limits).skymap)
        except SkyMapError as exc:
            rejected.append(f"{where}: event {event_id} revision {alert.revision}: localization not usable: {exc}")
            continue
        alerts.append(alert)
    if not alerts:
        raise InputError(f"archive {p}: no usable GW alert (need at least one with a localization that loads)"
                         + (f"; first problem: {rejected[0]}" if rejected else ""))
    if not reports:
        raise InputError(f"archive {p}: no transient report to measure a background from")

    kept: list[TransientReport] = []
    report_maps: list[SkyMap | None] = []
    cache: dict[str, SkyMap] = {}
    for r in reports:
        m = None
        if r.localization is not None:
            key = r.localization.resolved_path() or r.localization.url or r.localization.fits_base64[:64]
            try:
                if key not in cache:
                    cache[key] = load_localization(r.localization, limits).skymap
                m = cache[key]
            except SkyMapError as exc:
                rejected.append(f"transient {r.transient_id}: localization not usable, report left out: {exc}")
                continue
        kept.append(r)
        report_maps.append(m)
    batch = ReportBatch.from_reports(kept)
    return ArchiveContents(p, file_sha256(p), tuple(alerts), tuple(maps), batch,
                           tuple(report_maps) if any(m is not None for m in report_maps) else None,
                           lines, tuple(rejected), tuple(notes))
