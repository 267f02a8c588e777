"""``matcher tune``: tune the coincidence windows on an archive with time slides and injections.

Reads the configuration's ``classes:`` and ``tuning:`` sections
(:mod:`matcher.tune.settings`), reads the archive through the archive source
and the native codec, measures each class's background, runs time slides and
injections for every alert (scored by the real engine, one process per alert
with ``--jobs``), scans the windows and writes ``tuning.ecsv``,
``efficiency.png`` and ``recommended.yaml`` into ``--out``. Prints a summary
table (or, with ``--json``, the summary as JSON); warnings go to stderr as
``warning: ...`` lines.
"""

from __future__ import annotations

import sys

from matcher.commands._output import console, print_json
from matcher.errors import InputError

__all__ = ["register", "run"]


def register(sub) -> None:
    p = sub.add_parser(
        "tune", help="tune coincidence windows on an archive (time slides, injections)",
        description="Measure each class's background on an archive, count false matches per event in time slides, "
        "inject counterparts from every alert's own 3D posterior through the archive's real cadence, and "
        "recommend the window with the highest efficiency at the target false rate. Tuning keys (delay models, "
        "window grids) go in a 'tuning:' section beside 'classes:' in the config.")
    p.add_argument("-c", "--config", metavar="CONFIG",
                   help="YAML file with classes: and tuning: sections (default: the packaged configuration)")
    p.add_argument("--archive", metavar="ARCHIVE.jsonl", required=True,
                   help="archive of native messages (JSON Lines; localization paths relative to its folder)")
    p.add_argument("--class", dest="classes", metavar="NAME", nargs="+", action="extend",
                   help="classes to tune (default: every configured class with reports in the archive)")
    p.add_argument("--injections", type=int, metavar="N", help="injections per alert and class (default 1000)")
    p.add_argument("--slides", type=int, metavar="N", help="time slides per alert (default 100)")
    p.add_argument("--target-false-per-event", type=float, metavar="X",
                   help="false matches per GW event to hold (default 0.01)")
    p.add_argument("--bootstrap", type=int, metavar="N", help="bootstrap resamples of the alerts (default 200)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0); the same seed gives the same files")
    p.add_argument("--jobs", type=int, default=1, metavar="N", help="worker processes (default 1)")
    p.add_argument("--out", metavar="DIR", required=True, help="folder for tuning.ecsv, efficiency.png, recommended.yaml")
    p.add_argument("--json", action="store_true", help="print the summary as JSON")
    p.set_defaults(func=run)


def _positive(name: str, value, *, integer: bool = True):
    if value is None:
        return None
    if not value > 0:
        raise InputError(f"{name}: must be {'a positive integer' if integer else '> 0'}, got {value!r}")
    return value


def run(args) -> int:
    import dataclasses

    from matcher.tune import load_tuning_config, prepare, read_archive, run_all, summarize, summary, write_outputs

    classes, settings = load_tuning_config(args.config)
    overrides = {
        "injections": _positive("--injections", args.injections),
        "slides": _positive("--slides", args.slides),
        "target_false_per_event": _positive("--target-false-per-event", args.target_false_per_event, integer=False),
        "bootstrap": _positive("--bootstrap", args.bootstrap),
    }
    settings = dataclasses.replace(settings, **{k: v for k, v in overrides.items() if v is not None})
    if args.jobs < 1:
        raise InputError(f"--jobs: must be a positive integer, got {args.jobs}")
    archive = read_archive(args.archive)
    plan, warnings = prepare(archive, classes, settings, args.classes, args.seed)
    if archive.rejected:
        warnings.insert(0, f"{len(archive.rejected)} archive line(s) not used; first: {archive.rejected[0]}")
    warnings.extend(archive.notes)
    counts, seconds = run_all(plan, jobs=args.jobs)
    result = summarize(plan, counts, seconds, warnings)
    paths = write_outputs(result, args.out)
    for w in result.warnings:
        print(f"warning: {w}", file=sys.stderr)
    summ = summary(result)
    summ["outputs"] = {k: str(v) for k, v in paths.items()}
    if args.json:
        print_json(summ)
        return 0
    _print_table(summ, result)
    return 0


def _print_table(summ: dict, result) -> None:
    from rich.table import Table

    from matcher.tune.outputs import format_window

    t = Table(title=f"matcher tune: {summ['archive']}, {summ['alerts']} alerts, {summ['slides_per_alert']} slides and "
                    f"{summ['injections_per_alert']} injections per alert, target "
                    f"{summ['target_false_per_event']:g} false matches per event", title_justify="left")
    for name, just in (("class", "left"), ("measured rate /deg²/d", "right"), ("configured", "right"),
                       ("footprint deg²", "right"), ("recommended window", "left"), ("efficiency", "right"),
                       ("FAP thr.", "right"), ("false/event", "right"), ("configured window eff.", "right"),
                       ("model", "left")):
        t.add_column(name, justify=just)
    for name, c in summ["classes"].items():
        rate = c["measured_rate_per_deg2_per_day"]
        err = c["measured_rate_err_per_deg2_per_day"]
        rec = c["recommended_window_s"]
        t.add_row(
            name,
            "—" if rate is None else f"{rate:.3g} ± {err:.2g}",
            f"{c['configured_rate_per_deg2_per_day']:.3g}",
            f"{c['footprint_deg2']:,.0f}" + (" (all sky)" if c["footprint_all_sky"] else ""),
            "—" if rec is None else format_window(*rec),
            "—" if c["efficiency"] is None else f"{c['efficiency']:.3f} ± {c['efficiency_err'] or 0:.3f}",
            "—" if c["fap_threshold"] is None else f"{c['fap_threshold']:.3g}",
            "—" if c["false_per_event"] is None else f"{c['false_per_event']:.3g}",
            "—" if c["configured_window_efficiency"] is None else f"{c['configured_window_efficiency']:.3f}",
            c["model_check"]["verdict"],
        )
    con = console()
    con.print(t)
    for k, v in summ["outputs"].items():
        con.print(f"{k.replace('_', ' ')}: {v}")
