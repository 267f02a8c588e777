"""``matcher score ALERT.json REPORTS.jsonl``: rank reports as counterparts of one GW event.

Reads one GW alert and transient reports (JSON Lines) in the native
``matcher/1`` schema, loads the localizations (relative paths resolve against
the folder of the message file; ``fits_base64`` is decoded), scores every
report with :func:`matcher.coincidence.score_reports` and prints the ranked
list: a rich table, or with ``--json`` a JSON array, best first. Reports
outside every window are listed (with odds 0) only with ``--all``.
"""

from __future__ import annotations

from matcher.coincidence import default_classes, load_classes_file, score_reports
from matcher.commands._inputs import load_alert, load_reports
from matcher.commands._output import console, print_json

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
