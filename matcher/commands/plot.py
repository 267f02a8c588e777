"""``matcher plot ALERT.json|MAP --out FILE.png|.pdf|.svg``: draw the sky plot of a GW localization.

The source is a GW alert in the ``matcher/1`` schema (its localization path
resolves against the alert file's folder; base64 maps are decoded) or a
localization FITS file. ``--transients`` adds transient reports (JSON Lines,
``matcher/1``): with an alert they are scored with the packaged default
classes (or ``--config``) and labelled by rank and ``P_assoc``; with a bare
map there is no merger time to score against, so they are ranked by credible
level and the legend says so. ``--catalog`` ranks the catalogue's galaxies as
hosts and marks the top ``--hosts``. The format follows the suffix of
``--out``.

``--json`` prints what was drawn (a contract): ``out``, ``format``,
``width_px``, ``height_px``, ``event_id``, ``revision``, ``area_deg2`` (keyed
by level as a string), ``zoom`` (bool), ``zoom_note``, ``ranking`` (``given``
for scored reports, ``credible_level`` otherwise), ``candidates`` (rank,
transient_id, ra_deg, dec_deg, p_assoc, distance_mpc) and ``hosts`` (rank,
galaxy_id, ra_deg, dec_deg, p_host, distance_mpc).
"""

from __future__ import annotations

from pathlib import Path

from matcher.commands._inputs import load_alert_or_map
from matcher.commands._output import print_json
from matcher.errors import InputError

__all__ = ["register", "run", "load_source"]

_FORMATS = {".png": "png", ".pdf": "pdf", ".svg": "svg"}


def register(sub) -> None:
    p = sub.add_parser("plot", help="draw a GW localization with its candidates and hosts (PNG, PDF, SVG)",
                       description=__doc__.split("\n\n")[1] if __doc__ else None)
    p.add_argument("source", metavar="ALERT.json|MAP", help="a GW alert (matcher/1 JSON) or a localization FITS file")
    p.add_argument("--out", required=True, metavar="FILE", help="output file: .png, .pdf or .svg")
    p.add_argument("--transients", metavar="FILE.jsonl", help="transient reports to mark (matcher/1 JSON Lines)")
    p.add_argument("-c", "--config", metavar="CONFIG",
                   help="YAML file with a classes: section for scoring (default: the packaged config/default.yaml)")
    p.add_argument("--catalog", metavar="CATALOG_OR_INDEX",
                   help="galaxy catalogue file or index directory: mark the top host galaxies")
    p.add_argument("--column", action="append", default=[], metavar="KEY=NAME",
                   help="catalogue column map (repeatable), e.g. ra_deg=RAJ2000")
    p.add_argument("--format", dest="fmt", choices=["fits", "ecsv", "csv", "parquet", "votable"],
                   help="catalogue format (default: from the extension)")
    p.add_argument("--hosts", type=int, default=10, metavar="N", help="host galaxies to mark (default 10)")
    p.add_argument("--levels", default="0.5,0.9", help="credible levels to contour (default 0.5,0.9)")
    p.add_argument("--zoom", choices=["auto", "on", "off"], default="auto",
                   help="zoomed gnomonic view: auto (90%% region < 400 deg²), on, off")
    p.add_argument("--labels", type=int, default=10, metavar="N", help="candidates labelled, by rank (default 10)")
    p.add_argument("--dpi", type=float, default=100.0, help="resolution of PNG output (default 100: 1100×850 px)")
    p.add_argument("--json", action="store_true", help="print what was drawn as JSON")
    p.set_defaults(func=run)


def load_source(path):
    """``(alert or None, SkyMap)`` from a GW alert JSON file or a localization FITS file."""
    return load_alert_or_map(path)


def _out_format(out: Path) -> str:
    fmt = _FORMATS.get(out.suffix.lower())
    if fmt is None:
        raise InputError(f"--out {out}: use a .png, .pdf or .svg file")
    if not out.parent.is_dir():
        raise InputError(f"--out {out}: folder {out.parent} does not exist")
    return fmt


def run(args) -> int:
    from matcher.commands.sky import parse_levels
    from matcher.report.plot_inputs import candidates_from_reports, hosts_from_ranking
    from matcher.report.skyplot import EventInfo, figure_bytes, plot_localization

    out = Path(args.out)
    fmt = _out_format(out)
    levels = parse_levels(args.levels)
    if any(not 0.0 < v < 1.0 for v in levels):
        raise InputError(f"--levels: {args.levels!r}: contour levels must lie strictly between 0 and 1")
    if args.hosts < 0:
        raise InputError(f"--hosts={args.hosts} must be >= 0")
    if not 1 <= args.labels <= 100:
        raise InputError(f"--labels={args.labels} must be between 1 and 100")
    if not 20.0 <= args.dpi <= 600.0:
        raise InputError(f"--dpi={args.dpi} must be between 20 and 600")
    if args.config and not args.transients:
        raise InputError("--config sets the classes used to score --transients; give --transients too")
    if (args.column or args.fmt) and not args.catalog:
        raise InputError("--column and --format describe the --catalog; give --catalog too")

    alert, skymap = load_source(args.source)
    candidates = []
    if args.transients:
        from matcher.commands._inputs import load_reports

        reports, report_maps = load_reports(args.transients)
        scores = None
        if alert is not None and reports:
            from matcher.coincidence import default_classes, load_classes_file, score_reports

            classes = load_classes_file(args.config) if args.config else default_classes()
            scores = score_reports(alert, skymap, reports, classes, report_maps=report_maps or None)
        elif args.config:
            raise InputError("--config: a bare map has no merger time to score against; give the GW alert instead")
        candidates = candidates_from_reports(reports, scores)
    hosts = []
    if args.catalog and args.hosts > 0:
        from matcher.catalog import ColumnMap, open_galaxy_index, rank_hosts

        columns = ColumnMap.from_pairs(args.column) if args.column else None
        index = open_galaxy_index(args.catalog, columns=columns, fmt=args.fmt)
        hosts = hosts_from_ranking(rank_hosts(skymap, index), args.hosts)

    event = EventInfo.from_alert(alert) if alert is not None else None
    zoom = {"auto": None, "on": True, "off": False}[args.zoom]
    result = plot_localization(skymap, candidates=candidates, hosts=hosts, event=event, levels=levels, zoom=zoom,
                               max_labels=args.labels, max_hosts=max(args.hosts, 1), dpi=args.dpi)
    data = figure_bytes(result.figure, fmt)
    try:
        out.write_bytes(data)
    except OSError as exc:
        raise InputError(f"--out {out}: cannot write: {exc.strerror or exc}") from None
    width, height = (int(round(v * args.dpi)) for v in result.figure.get_size_inches())
    summary = {
        "out": str(out),
        "format": fmt,
        "width_px": width,
        "height_px": height,
        "event_id": alert.event_id if alert is not None else result.meta.get("OBJECT"),
        "revision": alert.revision if alert is not None else None,
        "area_deg2": {repr(float(k)): v for k, v in result.area_deg2.items()},
        "zoom": "zoom" in result.panels,
        "zoom_note": result.zoom_note,
        "ranking": result.ranking,
        "candidates": [{"rank": c.rank, "transient_id": c.transient_id, "ra_deg": c.ra_deg, "dec_deg": c.dec_deg,
                        "p_assoc": c.p_assoc, "distance_mpc": c.distance_mpc} for c in result.candidates],
        "hosts": [{"rank": h.rank, "galaxy_id": h.galaxy_id, "ra_deg": h.ra_deg, "dec_deg": h.dec_deg,
                   "p_host": h.p_host, "distance_mpc": h.distance_mpc} for h in result.hosts],
    }
    if args.json:
        print_json(summary)
        return 0
    how = {"given": "ranked by P_assoc", "p_assoc": "ranked by P_assoc",
           "credible_level": "ranked by credible level (no alert to score against)"}[result.ranking]
    size = f"{width}×{height} px" if fmt == "png" else "{:g}×{:g} in".format(*result.figure.get_size_inches())
    parts = [f"wrote {out} ({fmt}, {size})"]
    if result.candidates:
        parts.append(f"{len(result.candidates)} candidates {how}")
    if result.hosts:
        parts.append(f"top {len(result.hosts)} hosts")
    parts.append(result.zoom_note)
    print("; ".join(parts))
    return 0
