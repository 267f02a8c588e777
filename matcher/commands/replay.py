"""``matcher replay ARCHIVE.jsonl [-c CONFIG] [--out DIR] [--speed N]``: replay an archive through the service.

Writes ``DIR/matches.jsonl`` (every new or changed match record, one JSON line each)
and ``DIR/summary.json`` (every event with its ranked candidates and top hosts), and
prints the ranked table (or the summary with ``--json``). Replaying the same archive
into the same store again adds nothing.
"""

from __future__ import annotations

from pathlib import Path

__all__ = ["register", "run"]


def register(sub) -> None:
    p = sub.add_parser("replay", help="replay a JSON Lines archive through the service; write matches and a summary",
                       description="Replay an archive (one matcher/1 message per line, in arrival order) through "
                       "the service: decode, store, match, publish. Writes OUT/matches.jsonl and OUT/summary.json. "
                       "The store is the configuration's (-c) or OUT/matcher.sqlite; replaying again into the same "
                       "store adds nothing, and a killed replay resumes where it stopped.")
    p.add_argument("archive", metavar="ARCHIVE.jsonl", help="the archive to replay")
    p.add_argument("-c", "--config", metavar="CONFIG", help="configuration (default: the embedded default)")
    p.add_argument("--out", metavar="DIR", default="replay-out", help="output folder (default: ./replay-out)")
    p.add_argument("--speed", type=float, metavar="N", help="pace at N × real time from received_at "
                   "(default: as fast as possible)")
    p.add_argument("--store", metavar="PATH", help="store file (default: the configuration's, or OUT/matcher.sqlite)")
    p.add_argument("--top", type=int, default=5, help="candidates shown per event (default 5)")
    p.add_argument("--json", action="store_true", help="print the summary as JSON instead of the table")
    p.set_defaults(func=run)


def run(args) -> int:
    from matcher.errors import InputError
    from matcher.replay import replay_archive

    if args.speed is not None and not args.speed > 0:
        raise InputError(f"--speed must be > 0, got {args.speed}")
    if not Path(args.archive).is_file():
        raise InputError(f"archive {args.archive}: no such file")
    result = replay_archive(args.archive, out_dir=args.out, config_path=args.config, speed=args.speed,
                            store_path=args.store)
    show(result, args.json, args.top)
    return 0


def show(result, as_json: bool, top: int) -> None:
    """Print a replay's summary: JSON, or the ranked table with a line of counts."""
    if as_json:
        from matcher.commands._output import print_json

        print_json(result.summary)
        return
    from matcher.commands._output import console
    from matcher.report.ranked import ranked_tables

    con = console()
    for panel in ranked_tables(result.summary, top=top):
        con.print(panel)
    c = result.counts
    con.print(f"{c['messages']:,} messages stored, {c['quarantine']:,} quarantined, {c['results']:,} results "
              f"({c['results.current']:,} current, {c['results.superseded']:,} superseded, "
              f"{c['results.withdrawn']:,} withdrawn)")
    con.print(f"matches: {result.out_dir / 'matches.jsonl'}   summary: {result.out_dir / 'summary.json'}   "
              f"store: {result.store_path}")
