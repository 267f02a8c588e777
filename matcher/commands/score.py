"""``matcher score ALERT.json REPORTS.jsonl``: rank reports as counterparts of one GW event.

Reads one GW alert and transient reports (JSON Lines) in the native
``matcher/1`` schema, loads the localizations (relative paths resolve against
the folder of the message file; ``fits_base64`` is decoded), scores every
report with :func:`matcher.coincidence.score_reports` and prints the ranked
list: a rich table, or with ``--json`` a JSON array, best first. Reports
outside every window are listed (with odds 0) only with ``--all``.
"""

from __future__ import annotations

import base64
import binascii
import json
from pathlib import Path

from matcher.coincidence import default_classes, load_classes_file, score_reports
from matcher.commands._output import console, print_json
from matcher.errors import InputError, MessageError, SkyMapError
from matcher.sky import SkyMap, read_skymap
from matcher.streams.messages import GWAlert, TransientReport, message_from_fields

__all__ = ["register", "run", "load_alert", "load_reports"]


def register(sub) -> None:
    p = sub.add_parser("score", help="rank transient reports as counterparts of one GW alert",
                       description="Score transient reports (JSON Lines, matcher/1 schema) against one GW "
                       "alert and list them best first. Relative localization paths resolve against the "
                       "folder of the message file. Reports outside every window are listed (with odds 0) "
                       "only with --all.")
    p.add_argument("alert", metavar="ALERT.json", help="GW alert in the matcher/1 schema")
    p.add_argument("reports", metavar="REPORTS.jsonl", help="transient reports, one JSON object per line")
    p.add_argument("-c", "--config", metavar="CONFIG", help="YAML file with a classes: section "
                   "(default: the packaged config/default.yaml)")
    p.add_argument("--json", action="store_true", help="print a JSON array (best first)")
    p.add_argument("--all", action="store_true", help="also list reports outside every window (odds 0)")
    p.set_defaults(func=run)


def _read_localization(loc, who: str) -> SkyMap:
    if loc.path is not None:
        return read_skymap(loc.resolved_path())
    if loc.fits_base64 is not None:
        try:
            data = base64.b64decode(loc.fits_base64, validate=True)
        except (binascii.Error, ValueError) as exc:
            raise SkyMapError(f"{who} localization.fits_base64", f"is not valid base64: {exc}") from None
        return read_skymap(data, source=f"{who} localization.fits_base64")
    raise SkyMapError(f"{who} localization.url", f"{loc.url}: `matcher score` reads local files and base64 "
                      "only; download the map and give its path")


def _json_object(text: str, where: str):
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise InputError(f"{where}: not valid JSON ({exc.msg} at column {exc.colno})") from None


def load_alert(path) -> tuple[GWAlert, SkyMap]:
    """Read and validate the alert file and its localization."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise InputError(f"{p}: cannot read: {exc.strerror or exc}") from None
    try:
        msg = message_from_fields(_json_object(text, str(p)), codec="native", base_dir=str(p.resolve().parent))
    except MessageError as exc:
        raise InputError(f"{p}: {exc}") from None
    if not isinstance(msg, GWAlert):
        raise InputError(f"{p}: expected a gw_alert message, got type {msg.kind!r}")
    if msg.state == "withdrawn" or msg.localization is None:
        raise InputError(f"{p}: event {msg.event_id} revision {msg.revision} is withdrawn; nothing to score")
    return msg, _read_localization(msg.localization, f"event {msg.event_id}")


def load_reports(path) -> tuple[list[TransientReport], dict[str, SkyMap]]:
    """Read and validate a JSON Lines file of transient reports (blank lines are skipped)."""
    p = Path(path)
    try:
        lines = p.read_text(encoding="utf-8").splitlines()
    except OSError as exc:
        raise InputError(f"{p}: cannot read: {exc.strerror or exc}") from None
    base = str(p.resolve().parent)
    reports: list[TransientReport] = []
    maps: dict[str, SkyMap] = {}
    seen: dict[str, int] = {}
    for no, line in enumerate(lines, 1):
        if not line.strip():
            continue
        where = f"{p}:{no}"
        try:
            msg = message_from_fields(_json_object(line, where), codec="native", base_dir=base)
        except MessageError as exc:
            raise InputError(f"{where}: {exc}") from None
        if not isinstance(msg, TransientReport):
            raise InputError(f"{where}: expected a transient message, got type {msg.kind!r}")
        if msg.transient_id in seen:
            raise InputError(f"{where}: transient {msg.transient_id} already given on line {seen[msg.transient_id]}")
        seen[msg.transient_id] = no
        if msg.localization is not None:
            maps[msg.transient_id] = _read_localization(msg.localization, f"{where} transient {msg.transient_id}")
        reports.append(msg)
    return reports, maps


def _fmt(x: float, spec: str = ".3g") -> str:
    if x is None:
        return "—"
    return format(x, spec)


def run(args) -> int:
    classes = load_classes_file(args.config) if args.config else default_classes()
    alert, skymap = load_alert(args.alert)
    reports, maps = load_reports(args.reports)
    table = score_reports(alert, skymap, reports, classes, report_maps=maps or None)
    records = table.records(include_out_of_window=args.all)
    if args.json:
        print_json(records)
        return 0
    from rich.table import Table

    out = Table(title=f"{alert.event_id} revision {alert.revision}: {int(table.in_window.sum())} of "
                      f"{len(table)} reports in a window", title_justify="left")
    for name, just in (("#", "right"), ("transient", "left"), ("class", "left"), ("odds", "right"),
                       ("P_assoc", "right"), ("FAP", "right"), ("area deg²", "right"), ("CL", "right"),
                       ("dt", "right"), ("D", "right"), ("joint FAR /yr", "right")):
        out.add_column(name, justify=just, no_wrap=name in ("transient", "class"))
    for rank, r in enumerate(records, 1):
        out.add_row(str(rank), r["transient_id"], r["class"], _fmt(r["odds"]), _fmt(r["p_assoc"], ".3f"),
                    _fmt(r["fap"]), _fmt(r["searched_area_deg2"], ".4g"), _fmt(r["credible_level"], ".3f"),
                    _dt(r["dt_s"]), _fmt(r["terms"]["distance_factor"]), _fmt(r["joint_far_per_year"]))
    console().print(out)
    if not records:
        console().print("no report falls inside its class window" + ("" if args.all else " (use --all to list them)"))
    return 0


def _dt(seconds: float) -> str:
    a = abs(seconds)
    if a < 600:
        return f"{seconds:+.1f} s"
    if a < 2 * 86400:
        return f"{seconds / 3600:+.2f} h"
    return f"{seconds / 86400:+.2f} d"
