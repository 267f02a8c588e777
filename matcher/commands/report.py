"""``matcher report --store STORE --event ID --out DIR``: write an event's report folder from the store.

Writes ``DIR/index.html`` (one self-contained page: event summary, revision history,
sky plot, ranked candidates with the odds and its terms, top host galaxies, the classes
used, the caution that it is a decision aid), ``DIR/candidates.ecsv``, ``DIR/hosts.ecsv``,
``DIR/hosts.vot`` and ``DIR/skyplot.png``. The store is only read. Give the service's
configuration with ``-c`` so that the classes shown (and the rates in the candidate
table) are the ones the service scored with; without it they are the packaged defaults.

``--json`` prints what was written (a contract): ``out``, ``files`` (role → path),
``event_id``, ``revision`` (the one shown), ``state`` (the event's current state),
``n_candidates``, ``n_hosts``, ``n_figures`` and ``seconds``.
"""

from __future__ import annotations

from pathlib import Path

from matcher.errors import InputError

__all__ = ["register", "run"]


def register(sub) -> None:
    p = sub.add_parser("report", help="write an event's self-contained HTML report and tables from the store",
                       description=__doc__.split("\n\n")[1] if __doc__ else None)
    p.add_argument("--store", required=True, metavar="STORE", help="the service's SQLite store (read only)")
    p.add_argument("--event", required=True, metavar="ID", help="the GW event id")
    p.add_argument("--out", required=True, metavar="DIR", help="output folder (created; files in it are replaced)")
    p.add_argument("-c", "--config", metavar="CONFIG",
                   help="the service's configuration: its classes and limits (default: the packaged defaults)")
    p.add_argument("--max-candidates", type=int, default=100, metavar="N",
                   help="candidate rows, best first (default 100)")
    p.add_argument("--top-hosts", type=int, default=20, metavar="N", help="host galaxies (default 20; 0 = none)")
    p.add_argument("--plots", choices=["current", "all"], default="current",
                   help="sky plot of the revision shown only (default), or of every revision with a map")
    p.add_argument("--dpi", type=float, default=100.0, help="sky plot resolution (default 100: 1100×850 px)")
    p.add_argument("--json", action="store_true", help="print what was written as JSON")
    p.set_defaults(func=run)


def run(args) -> int:
    from matcher.report.settings import ReportSettings
    from matcher.report.writer import write_event_report
    from matcher.store import Store

    store_path = Path(args.store)
    if not store_path.is_file():
        raise InputError(f"--store {store_path}: no such file (give the service's store, e.g. state/matcher.sqlite)")
    out = Path(args.out)
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out}: exists and is not a folder")
    if not 1 <= args.max_candidates <= 100_000:
        raise InputError(f"--max-candidates={args.max_candidates} must be between 1 and 100000")
    if not 0 <= args.top_hosts <= 10_000:
        raise InputError(f"--top-hosts={args.top_hosts} must be between 0 and 10000")
    if not 20.0 <= args.dpi <= 600.0:
        raise InputError(f"--dpi={args.dpi} must be between 20 and 600")
    settings = ReportSettings(max_candidates=args.max_candidates, top_hosts=args.top_hosts, plots=args.plots,
                              dpi=args.dpi)
    config = None
    if args.config:
        from matcher.config import load_config

        config = load_config(args.config)
    with Store(store_path) as store:
        w = write_event_report(store, args.event, out, config, settings=settings)
    files = {k: str(v) for k, v in w.files.items()}
    if args.json:
        from matcher.commands._output import print_json

        print_json({"out": str(out), "files": files, "event_id": w.event_id, "revision": w.revision,
                    "state": w.state, "n_candidates": w.n_candidates, "n_hosts": w.n_hosts,
                    "n_figures": w.n_figures, "seconds": round(w.seconds, 3)})
        return 0
    tables = ", ".join(Path(files[k]).name for k in ("candidates", "hosts", "hosts_votable", "skyplot") if k in files)
    print(f"wrote {files['html']}: {w.event_id} revision {w.revision} ({w.state}), {w.n_candidates} candidate"
          f"{'s' if w.n_candidates != 1 else ''}, {w.n_hosts} host{'s' if w.n_hosts != 1 else ''}, "
          f"{w.n_figures} sky plot{'s' if w.n_figures != 1 else ''}; beside it: {tables} ({w.seconds:.1f} s)")
    return 0
