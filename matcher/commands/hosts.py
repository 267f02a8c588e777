"""``matcher hosts ALERT.json|MAP --catalog CATALOG_OR_INDEX``: rank host galaxies of a localization.

JSON keys (``--json``) are a contract:

* ``p_outside_catalog`` (null when no completeness model is known),
  ``galaxies`` (best first; each with ``rank``, ``galaxy_id``, ``prob``,
  ``cum_prob``, ``ra_deg``, ``dec_deg``, ``distance_mpc``,
  ``distance_err_mpc``, ``weight``, ``dp_dv``), ``n_galaxies``,
  ``n_galaxies_90``, ``fraction``, ``sky_prob_searched``, ``n_pixels``,
  ``three_d``, ``map``, ``catalog``, and ``event_id``/``revision`` for an alert;
* with ``--transient FILE`` or ``--at RA DEC``: ``transient`` with
  ``best``, ``best_by_position``, ``candidates`` (see
  :class:`matcher.catalog.TransientHosts`).

``--out`` writes the ranked galaxies with astropy: ECSV (``.ecsv``), CSV
(``.csv``) or VOTable (``.vot``/``.xml``).
"""

from __future__ import annotations

import math
import warnings
from pathlib import Path

from matcher.commands._inputs import load_alert_or_map, read_json
from matcher.commands._output import console, print_json
from matcher.commands.catalog import add_catalog_options, columns_from_args, completeness_from_args
from matcher.errors import InputError, MessageError

__all__ = ["register", "load_localization", "write_ranking"]

_OUT_FORMATS = {".ecsv": "ascii.ecsv", ".csv": "ascii.csv", ".vot": "votable", ".xml": "votable"}


def register(sub) -> None:
    p = sub.add_parser("hosts", help="rank the catalogue's galaxies as hosts of a GW localization")
    p.add_argument("source", metavar="ALERT.json|MAP", help="a GW alert (matcher/1 JSON) or a localization FITS file")
    p.add_argument("--catalog", required=True, metavar="CATALOG_OR_INDEX",
                   help="galaxy catalogue file (its saved index is used if present) or an index directory")
    p.add_argument("--top", type=int, default=20, help="galaxies to show/write (default 20; 0 = all)")
    p.add_argument("--fraction", type=float, default=0.999,
                   help="search the pixels holding this much sky probability (default 0.999)")
    p.add_argument("--json", action="store_true", help="print JSON for programs")
    p.add_argument("--out", metavar="FILE", help="write the ranked galaxies: .ecsv, .csv or .vot")
    p.add_argument("--transient", metavar="FILE", help="also find hosts of this transient (matcher/1 JSON)")
    p.add_argument("--at", type=float, nargs=2, metavar=("RA", "DEC"), help="also find hosts at this position, deg")
    p.add_argument("--err-arcsec", type=float, default=0.0, help="1-sigma position error for --at, arcsec")
    add_catalog_options(p)
    p.set_defaults(func=_run)


def load_localization(path):
    """``(SkyMap, meta)`` from a GW alert JSON file or a FITS map."""
    alert, skymap = load_alert_or_map(path)
    meta = {} if alert is None else {"event_id": alert.event_id, "revision": alert.revision}
    return skymap, meta


def write_ranking(table, path) -> None:
    """Write an astropy table as ECSV, CSV or VOTable (by extension)."""
    p = Path(path)
    suffix = p.suffix.lower()
    if suffix not in _OUT_FORMATS:
        raise InputError(f"--out {p}: use a .ecsv, .csv or .vot file")
    fmt = _OUT_FORMATS[suffix]
    if fmt == "ascii.csv":
        table = table.copy()
        table.meta.clear()  # plain CSV has no place for metadata
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)  # VOTable notes that it drops non-scalar meta
            table.write(str(p), format=fmt, overwrite=True)
    except OSError as exc:
        raise InputError(f"--out {p}: cannot write: {exc.strerror or exc}") from None


def _transient_position(args):
    from matcher.streams.messages import TransientReport, message_from_fields

    if args.transient and args.at:
        raise InputError("give --transient or --at, not both")
    if args.transient:
        p = Path(args.transient)
        try:
            msg = message_from_fields(read_json(p), base_dir=str(p.resolve().parent))
        except MessageError as exc:
            raise InputError(f"{p}: {exc}") from None
        if not isinstance(msg, TransientReport):
            raise InputError(f"{p}: is a {msg.kind} message, not a transient report")
        return msg.transient_id, msg.ra_deg, msg.dec_deg, msg.pos_err_deg or 0.0
    if args.at:
        if not (math.isfinite(args.err_arcsec) and args.err_arcsec >= 0):
            raise InputError(f"--err-arcsec={args.err_arcsec} must be >= 0")
        return None, args.at[0], args.at[1], args.err_arcsec / 3600.0
    return None


def _run(args) -> int:
    from matcher.catalog import hosts_for_transient, open_galaxy_index, rank_hosts

    if args.top < 0:
        raise InputError(f"--top={args.top} must be >= 0 (0 = all)")
    if not 0.0 < args.fraction <= 1.0:
        raise InputError(f"--fraction={args.fraction} must lie in (0, 1]")
    model = completeness_from_args(args)
    where = _transient_position(args)
    skymap, meta = load_localization(args.source)
    index = open_galaxy_index(args.catalog, columns=columns_from_args(args), fmt=args.fmt)
    meta["catalog"] = str(args.catalog)
    ranking = rank_hosts(skymap, index, fraction=args.fraction, completeness=model, meta=meta)
    out = ranking.to_dict(args.top)
    hosts = None
    if where is not None:
        tid, ra, dec, err = where
        hosts = hosts_for_transient(index, ra, dec, pos_err_deg=err, skymap=skymap, ranking=ranking, transient_id=tid)
        out["transient"] = hosts.to_dict(args.top)
    if args.out:
        write_ranking(ranking.to_table(args.top), args.out)
    if args.json:
        print_json(out)
        return 0
    _print_human(args, index, ranking, out, hosts)
    return 0


def _fmt_p(p) -> str:
    return "not assessed (no completeness model)" if p is None else f"{p:.3f}"


def _print_human(args, index, ranking, out, hosts) -> None:
    from rich.table import Table

    con = console()
    if not index.header.saved:
        con.print(f"[dim]note: {args.catalog} has no saved index; indexed in memory "
                  f"(save one with `matcher catalog index {args.catalog}`)[/dim]")
    title = f"Host galaxies for {out.get('event_id') or out.get('object') or args.source}"
    t = Table(title=title, header_style="bold")
    for col, just in (("#", "right"), ("galaxy", "left"), ("prob", "right"), ("cum", "right"), ("RA", "right"),
                      ("Dec", "right"), ("distance (Mpc)", "right")):
        t.add_column(col, justify=just)
    for g in out["galaxies"]:
        t.add_row(str(g["rank"]), str(g["galaxy_id"]), f"{g['prob']:.4f}", f"{g['cum_prob']:.4f}",
                  f"{g['ra_deg']:.5f}", f"{g['dec_deg']:+.5f}",
                  f"{g['distance_mpc']:.1f} ± {g['distance_err_mpc']:.1f}")
    con.print(t)
    con.print(f"p_outside_catalog: {_fmt_p(out['p_outside_catalog'])}; {out['n_galaxies']:,} galaxies in the "
              f"{out['fraction']:.1%} region ({out['n_pixels']:,} pixels); 90% of the in-catalogue probability in "
              f"{out['n_galaxies_90']:,} galaxies" + ("" if ranking.three_d else "; map has no distance: sky-only"))
    if hosts is not None:
        h = out["transient"]
        who = h["transient_id"] or f"({h['ra_deg']:.5f}, {h['dec_deg']:+.5f})"
        if not h["candidates"]:
            con.print(f"transient {who}: no catalogued galaxy within {h['search_radius_arcsec']:.0f}″")
            return
        t = Table(title=f"Hosts of transient {who}", header_style="bold")
        for col in ("galaxy", "sep (″)", "offset (kpc)", "P_cc", "prob", "distance (Mpc)"):
            t.add_column(col, justify="left" if col == "galaxy" else "right")
        for c in h["candidates"]:
            t.add_row(str(c["galaxy_id"]), f"{c['separation_arcsec']:.2f}", f"{c['offset_kpc']:.1f}",
                      f"{c['p_cc']:.3g}", f"{c['prob']:.3f}",
                      f"{c['distance_mpc']:.1f} ± {c['distance_err_mpc']:.1f}")
        con.print(t)
        best = h["best"]
        con.print(f"best host: {best['galaxy_id']} at {best['distance_mpc']:.1f} ± {best['distance_err_mpc']:.1f} Mpc"
                  if best else f"no candidate with P_cc ≤ {h['max_p_cc']}")
