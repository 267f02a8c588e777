"""``matcher demo [--out DIR]``: write an invented scenario and replay it, ending with the ranked table.

The scenario (see :mod:`matcher.demo`) is a fictional stretch of an observing run: a
neutron-star merger with two revisions and one real counterpart among thousands of
unrelated reports, a binary black hole with nothing to find, and a withdrawn alert.
Everything in it is invented.
"""

from __future__ import annotations

import shutil
from pathlib import Path

__all__ = ["register", "run"]


def register(sub) -> None:
    p = sub.add_parser("demo", help="write an invented scenario and replay it (start here)",
                       description="Write an invented observing scenario into DIR/scenario (GW alerts with "
                       "localizations, thousands of transient reports, a galaxy catalogue), replay it with "
                       "DIR/demo.yaml, and print the ranked candidates. Outputs: DIR/matches.jsonl, "
                       "DIR/summary.json, the store in DIR/state.")
    p.add_argument("--out", metavar="DIR", default="matcher-demo", help="folder (default: ./matcher-demo)")
    p.add_argument("--top", type=int, default=5, help="candidates shown per event (default 5)")
    p.add_argument("--json", action="store_true", help="print the summary as JSON instead of the table")
    p.set_defaults(func=run)


def run(args) -> int:
    from matcher.commands.replay import show
    from matcher.demo import write_scenario
    from matcher.replay import replay_archive

    out = Path(args.out)
    scenario = out / "scenario"
    if not (scenario / "alerts.jsonl").is_file():
        write_scenario(scenario)
    config = out / "demo.yaml"
    if not config.exists():
        shutil.copyfile(Path(__file__).resolve().parent.parent / "data" / "demo.yaml", config)
    result = replay_archive(scenario / "alerts.jsonl", out_dir=out, config_path=config)
    show(result, args.json, args.top)
    return 0
