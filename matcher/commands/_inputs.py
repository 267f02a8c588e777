"""Reading the files commands are given: JSON, GW alerts with their maps, transient reports.

One place for the rules every command shares: a relative localization path
resolves against the message file's folder; ``fits_base64`` is decoded; a URL
is fetched only when a configuration's allow-list admits it (commands run
without one, so they refuse URLs with a message saying to download the map).
Errors are :class:`~matcher.errors.InputError` naming the file (and line).
"""

from __future__ import annotations

import json
from pathlib import Path

from matcher.errors import InputError, MessageError, SkyMapError
from matcher.sky import SkyMap, read_skymap
from matcher.streams.messages import GWAlert, Localization, TransientReport, message_from_fields

__all__ = ["read_json", "parse_json", "read_message_localization", "load_alert_or_map", "load_alert",
           "load_reports"]


def parse_json(text: str, where: str):
    """``json.loads`` with an error naming ``where`` (file, or file:line)."""
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise InputError(f"{where}: not valid JSON ({exc.msg} at line {exc.lineno} column {exc.colno})") from None


def read_json(path) -> object:
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise InputError(f"{p}: cannot read: {exc.strerror or exc}") from None
    except UnicodeDecodeError:
        raise InputError(f"{p}: is not UTF-8 text") from None
    return parse_json(text, str(p))


def read_message_localization(loc: Localization, who: str, limits=None) -> SkyMap:
    """The map a message's ``localization`` points at (path, base64, or an allow-listed URL)."""
    from matcher.streams.localization import LocalizationLimits, load_localization

    if loc.url is not None and not (limits and limits.url_allow_list):
        raise SkyMapError(f"{who} localization.url", f"{loc.url}: no URL allow-list is configured here; "
                          "download the map and give its path")
    if loc.path is not None and limits is None:
        # A command's user chose the alert file, so its map may live anywhere they can read.
        return read_skymap(loc.resolved_path())
    return load_localization(loc, limits or LocalizationLimits()).skymap


def _message(path: Path, text: str | None = None):
    obj = read_json(path) if text is None else parse_json(text, str(path))
    try:
        return message_from_fields(obj, codec="native", base_dir=str(path.resolve().parent))
    except MessageError as exc:
        raise InputError(f"{path}: {exc}") from None


def load_alert(path, limits=None) -> tuple[GWAlert, SkyMap]:
    """Read and validate a GW alert file and its localization (not withdrawn)."""
    p = Path(path)
    msg = _message(p)
    if not isinstance(msg, GWAlert):
        raise InputError(f"{p}: is a {msg.kind} message, not a GW alert")
    if msg.state == "withdrawn" or msg.localization is None:
        raise InputError(f"{p}: event {msg.event_id} revision {msg.revision} is withdrawn; it has no localization")
    return msg, read_message_localization(msg.localization, f"{p} event {msg.event_id}", limits)


def load_alert_or_map(path, limits=None) -> tuple[GWAlert | None, SkyMap]:
    """``(alert, map)`` from a GW alert JSON file, or ``(None, map)`` from a FITS map."""
    p = Path(path)
    try:
        with p.open("rb") as fh:
            head = fh.read(256).lstrip()
    except OSError as exc:
        raise InputError(f"{p}: cannot read: {exc.strerror or exc}") from None
    if not head.startswith(b"{"):
        return None, read_skymap(p)
    return load_alert(p, limits)


def load_reports(path, limits=None) -> tuple[list[TransientReport], dict[str, SkyMap]]:
    """Transient reports from a JSON Lines file (blank lines skipped) and their own maps by id."""
    p = Path(path)
    try:
        lines = p.read_text(encoding="utf-8").splitlines()
    except OSError as exc:
        raise InputError(f"{p}: cannot read: {exc.strerror or exc}") from None
    except UnicodeDecodeError:
        raise InputError(f"{p}: is not UTF-8 text") from None
    base = str(p.resolve().parent)
    reports: list[TransientReport] = []
    maps: dict[str, SkyMap] = {}
    seen: dict[str, int] = {}
    for no, line in enumerate(lines, 1):
        if not line.strip():
            continue
        where = f"{p}:{no}"
        try:
            msg = message_from_fields(parse_json(line, where), codec="native", base_dir=base)
        except MessageError as exc:
            raise InputError(f"{where}: {exc}") from None
        if not isinstance(msg, TransientReport):
            raise InputError(f"{where}: expected a transient message, got type {msg.kind!r}")
        if msg.transient_id in seen:
            raise InputError(f"{where}: transient {msg.transient_id} already given on line {seen[msg.transient_id]}")
        seen[msg.transient_id] = no
        if msg.localization is not None:
            maps[msg.transient_id] = read_message_localization(
                msg.localization, f"{where} transient {msg.transient_id}", limits)
        reports.append(msg)
    return reports, maps
