"""``matcher catalog index|info|generate``: galaxy catalogues and their indexes.

* ``index CATALOG [-o INDEX]``: validate and index a catalogue (FITS, ECSV,
  CSV, Parquet, VOTable); writes ``<CATALOG>.index/`` by default. Rejected
  rows are counted by reason (with example row numbers, from 0). ``--json``
  prints ``index``, ``n_rows``, ``n_accepted``, ``n_rejected``, ``rejected``,
  ``examples``, ``notes``, ``seconds``.
* ``info INDEX``: the header of an index and whether it is fresh.
* ``generate -o FILE``: write an invented catalogue (seeded).
"""

from __future__ import annotations

import time
from pathlib import Path

from matcher.commands._output import print_json
from matcher.errors import InputError

__all__ = ["register", "add_catalog_options", "completeness_from_args", "columns_from_args"]


def add_catalog_options(p, *, completeness: bool = True) -> None:
    """Options shared by ``catalog index`` and ``hosts``: column map, format, completeness."""
    p.add_argument("--column", action="append", default=[], metavar="KEY=NAME",
                   help="map one of our column names to the catalogue's (repeatable), e.g. ra_deg=RAJ2000")
    p.add_argument("--format", dest="fmt", choices=["fits", "ecsv", "csv", "parquet", "votable"],
                   help="catalogue format (default: from the extension)")
    if completeness:
        g = p.add_argument_group("completeness (for p_outside_catalog)")
        g.add_argument("--mag-limit", type=float, help="apparent-magnitude limit: Schechter completeness model")
        g.add_argument("--m-star", type=float, help="Schechter M* (default -20.51, 2dFGRS b_J for h=0.6766)")
        g.add_argument("--alpha", type=float, help="Schechter faint-end slope (default -1.21)")
        g.add_argument("--completeness-table", metavar="FILE",
                       help="table with columns distance_mpc, completeness (instead of --mag-limit)")


def columns_from_args(args):
    from matcher.catalog import ColumnMap

    return ColumnMap.from_pairs(args.column) if args.column else None


def completeness_from_args(args):
    """The completeness model the options describe, or None."""
    from matcher.catalog import SchechterCompleteness, TabulatedCompleteness, read_completeness_table

    table = getattr(args, "completeness_table", None)
    mag = getattr(args, "mag_limit", None)
    if table and mag is not None:
        raise InputError("give --mag-limit or --completeness-table, not both")
    if table:
        if args.m_star is not None or args.alpha is not None:
            raise InputError("--m-star and --alpha go with --mag-limit, not --completeness-table")
        return TabulatedCompleteness(*read_completeness_table(table))
    if mag is None:
        if getattr(args, "m_star", None) is not None or getattr(args, "alpha", None) is not None:
            raise InputError("--m-star and --alpha need --mag-limit")
        return None
    kw = {"mag_limit": mag}
    if args.m_star is not None:
        kw["m_star"] = args.m_star
    if args.alpha is not None:
        kw["alpha"] = args.alpha
    return SchechterCompleteness(**kw)


def register(sub) -> None:
    parser = sub.add_parser("catalog", help="index a galaxy catalogue for host ranking; inspect or generate one")
    csub = parser.add_subparsers(dest="catalog_command", metavar="ACTION")
    csub.required = True

    p = csub.add_parser("index", help="validate a catalogue and write its HEALPix index")
    p.add_argument("catalog", help="catalogue file (FITS, ECSV, CSV, Parquet, VOTable)")
    p.add_argument("-o", "--output", help="index directory (default: CATALOG.index beside the catalogue)")
    add_catalog_options(p)
    p.add_argument("--peculiar-velocity", type=float, default=None, metavar="KM_S",
                   help="velocity dispersion added to redshift errors (default 300 km/s; 0 disables)")
    p.add_argument("--json", action="store_true", help="print JSON for programs")
    p.set_defaults(func=_index)

    p = csub.add_parser("info", help="show an index's header and check it against its catalogue")
    p.add_argument("index", help="index directory (or a catalogue with an index beside it)")
    p.add_argument("--json", action="store_true", help="print JSON for programs")
    p.set_defaults(func=_info)

    p = csub.add_parser("generate", help="write an invented, seeded galaxy catalogue")
    p.add_argument("-o", "--output", required=True, help="output file (.fits, .ecsv, .csv, .parquet, .vot)")
    p.add_argument("--galaxies", type=int, default=10_000, help="number of galaxies (default 10,000)")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--max-distance", type=float, default=400.0, help="reach, Mpc (luminosity distance)")
    p.add_argument("--mag-limit", type=float, default=None, help="apparent-magnitude limit")
    p.add_argument("--redshift-fraction", type=float, default=0.0, help="fraction reporting only a redshift")
    p.add_argument("--clustering", type=float, default=0.0, help="fraction of galaxies in groups")
    p.add_argument("--cone", type=float, nargs=3, metavar=("RA", "DEC", "RADIUS"), help="restrict to a sky cone, deg")
    p.set_defaults(func=_generate)


def _index(args) -> int:
    from matcher.catalog import default_index_path, index_catalog_file, write_index
    from matcher.catalog.catalog import DEFAULT_PECULIAR_VELOCITY_KMS

    model = completeness_from_args(args)
    pec = DEFAULT_PECULIAR_VELOCITY_KMS if args.peculiar_velocity is None else args.peculiar_velocity
    t0 = time.perf_counter()
    index = index_catalog_file(args.catalog, columns=columns_from_args(args), fmt=args.fmt,
                               completeness=model.to_dict() if model else None, peculiar_velocity_kms=pec)
    out = write_index(index, args.output or default_index_path(args.catalog))
    seconds = time.perf_counter() - t0
    report = index.header.report
    if args.json:
        print_json({"index": str(out), **report.to_dict(), "seconds": seconds})
        return 0
    for line in report.lines():
        print(line)
    print(f"index: {out} ({len(index):,} galaxies, {seconds:.2f} s)")
    return 0


def _info(args) -> int:
    import json

    from matcher.catalog import StaleIndexError, default_index_path, is_index
    from matcher.catalog.indexio import HEADER_NAME, load_index

    path = Path(args.index)
    if not is_index(path) and is_index(default_index_path(path)):
        path = default_index_path(path)
    try:
        load_index(path, check="auto")
        fresh = "fresh"
    except StaleIndexError as exc:
        fresh = f"stale: {exc}"
    header = json.loads((path / HEADER_NAME).read_text())
    header.pop("arrays", None)
    header["status"] = fresh
    if args.json:
        print_json(header)
        return 0
    print(f"index {path}: {header['n_rows']:,} galaxies, order {header['order']}, {fresh}")
    cat = header.get("catalog") or {}
    if cat:
        print(f"  catalogue {cat.get('path')} ({cat.get('size', 0):,} bytes, {cat.get('checksum')})")
    if header.get("completeness"):
        print(f"  completeness {header['completeness']}")
    print(f"  columns {header.get('columns')}")
    print(f"  created {header.get('created_utc')}")
    return 0


def _generate(args) -> int:
    from matcher.catalog import synthetic_catalog
    from matcher.catalog.tableio import FORMATS, table_format

    if args.galaxies < 1:
        raise InputError(f"--galaxies={args.galaxies} must be at least 1")
    kind = table_format(args.output)
    try:
        table = synthetic_catalog(args.galaxies, args.seed, max_distance_mpc=args.max_distance,
                                  mag_limit=args.mag_limit, redshift_fraction=args.redshift_fraction,
                                  clustering=args.clustering, cone=tuple(args.cone) if args.cone else None)
    except ValueError as exc:
        raise InputError(f"catalog generate: {exc}") from None
    try:
        table.write(args.output, format=FORMATS[kind], overwrite=True)
    except OSError as exc:
        raise InputError(f"{args.output}: cannot write: {exc.strerror or exc}") from None
    print(f"wrote {len(table):,} invented galaxies to {args.output}")
    return 0
