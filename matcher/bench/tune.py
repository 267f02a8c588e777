"""``matcher bench tune``: a tuning run at the size of an observing run's archive.

Writes an invented archive (default 50 GW alerts over 60 days; an optical survey
visiting a declination band every two days, a twentieth of its reports with a
host redshift; an all-sky gamma-ray trigger stream at the packaged rate), then
times each phase of ``matcher tune`` with ``--injections`` injections and
``--slides`` time slides per alert and class: reading the archive, preparing the
classes, the per-alert work (printed per alert), the scan and the outputs.

Baseline, in the same run: the same per-alert work on the first
``--baseline-alerts`` alerts with the sky bound off (every slid report in a
window goes through the engine). Both must give the same counts before any ratio
is printed.
"""

from __future__ import annotations

import dataclasses
import statistics
import tempfile
import time
from pathlib import Path

__all__ = ["register", "run", "bench_config"]


def register(sub) -> None:
    p = sub.add_parser("tune", help="time matcher tune per alert (slides and injections) vs no sky bound")
    p.add_argument("--alerts", type=int, default=50, help="GW alerts in the invented archive (default 50)")
    p.add_argument("--injections", type=int, default=1000, help="injections per alert and class (default 1000)")
    p.add_argument("--slides", type=int, default=100, help="time slides per alert (default 100)")
    p.add_argument("--span-days", type=float, default=60.0, help="length of the archive (default 60 days)")
    p.add_argument("--jobs", type=int, default=1, help="worker processes (default 1)")
    p.add_argument("--baseline-alerts", type=int, default=1, help="alerts run without the sky bound (default 1)")
    p.add_argument("--seed", type=int, default=2027)
    p.add_argument("--workdir", help="folder for the archive and outputs, kept afterwards (default: a temporary "
                   "folder, removed afterwards); its archive/ subfolder must not exist or be empty")
    p.set_defaults(func=run)


def bench_config() -> dict:
    """Classes as packaged (optical with the survey's two-day cadence) and a tuning section."""
    from matcher.coincidence import default_classes

    out = {}
    for name in ("optical", "gamma_ray"):
        k = default_classes()[name]
        entry = {"window_s": [k.window_lo_s, k.window_hi_s], "rate_per_deg2_per_day": k.rate_per_deg2_per_day,
                 "efficiency": k.efficiency, "needs_neutron_star": k.needs_neutron_star, "reach_mpc": k.reach_mpc,
                 "pos_err_deg": k.pos_err_deg, "sharp_time": k.sharp_time}
        if k.cadence_s is not None:
            entry["cadence_s"] = 172800.0
        out[name] = entry
    return {"classes": out,
            "tuning": {"classes": {"optical": {"delay_model": {"uniform_s": [0, 172800]}},
                                   "gamma_ray": {"delay_model": {"uniform_s": [0, 2]}}}}}


def run(args) -> int:
    if args.workdir:
        return _run(args, Path(args.workdir))
    with tempfile.TemporaryDirectory(prefix="matcher-bench-tune-") as tmp:  # removed afterwards
        return _run(args, Path(tmp))


def _run(args, work: Path) -> int:
    import numpy as np
    import yaml
    from rich.console import Console

    from matcher.bench._timing import print_row
    from matcher.tune import load_tuning_config, prepare, read_archive, run_all, summarize, write_outputs
    from matcher.tune.synthetic import SurveySim, TriggerSim, cells_in_dec_band, write_synthetic_archive

    con = Console()
    for name in ("alerts", "injections", "slides", "jobs", "baseline_alerts"):
        if getattr(args, name) < (0 if name == "baseline_alerts" else 1):
            con.print(f"[red]--{name.replace('_', '-')} must be positive[/red]")
            return 2
    work.mkdir(parents=True, exist_ok=True)
    archive_dir = work / "archive"
    if archive_dir.exists() and any(archive_dir.iterdir()):
        con.print(f"[red]{archive_dir} is not empty[/red]: give a new --workdir (nothing was overwritten)")
        return 2
    t = time.perf_counter()
    truth = write_synthetic_archive(
        archive_dir, seed=args.seed, alerts=args.alerts, span_days=args.span_days,
        streams=[SurveySim("optical", 0.1, 172800.0, order=3, cells=cells_in_dec_band(3, -30.0, 60.0),
                           redshift_fraction=0.05),
                 TriggerSim("gamma_ray", 1.593e-5, pos_err_deg=5.0)],
        area90_deg2=(20.0, 300.0), distance=(150.0, 40.0), max_order=8, pixel_prob=1e-3,
        centres=None, merger_range=(0.05, 0.85))
    t_write = time.perf_counter() - t
    cfg = archive_dir / "config.yaml"
    cfg.write_text(yaml.safe_dump(bench_config()))
    n_lines = sum(truth.reports.values()) + args.alerts
    con.print(f"[bold]tune benchmark[/bold]: {args.alerts} alerts, {truth.reports['optical']:,} optical and "
              f"{truth.reports['gamma_ray']:,} gamma-ray reports over {args.span_days:g} d "
              f"(archive written in {t_write:.1f} s, in {archive_dir})")

    t = time.perf_counter()
    classes, settings = load_tuning_config(cfg)
    settings = dataclasses.replace(settings, injections=args.injections, slides=args.slides)
    archive = read_archive(truth.path)
    t_read = time.perf_counter() - t
    t = time.perf_counter()
    plan, warnings = prepare(archive, classes, settings, None, args.seed)
    t_prep = time.perf_counter() - t
    print_row("read + validate the archive (source, codec, maps)", f"{t_read:.2f} s ({n_lines / t_read:,.0f} lines/s)")
    print_row("prepare classes (footprints, rates, cadence, slide plans)", f"{t_prep:.2f} s")
    for cd in plan.classes:
        print_row(f"  {cd.name}: windows scanned × thresholds",
                  f"{len(cd.windows_s)} × {plan.fap_thresholds.size}, {cd.slides.offsets_s.size} slides")

    t = time.perf_counter()
    counts, seconds = run_all(plan, jobs=args.jobs)
    t_run = time.perf_counter() - t
    for i, (alert, s) in enumerate(zip(archive.alerts, seconds)):
        scored = sum(c.scored for c in counts[i].values())
        cand = sum(c.candidates for c in counts[i].values())
        con.print(f"  alert {i + 1:>3} {alert.event_id}: {s:6.2f} s  ({cand:,} slid report rows, "
                  f"{scored:,} scored across windows)")
    t = time.perf_counter()
    result = summarize(plan, counts, seconds, warnings)
    paths = write_outputs(result, work / "out")
    t_out = time.perf_counter() - t
    per = statistics.median(seconds)
    print_row("per alert (all classes; median / mean / max)",
              f"{per:.2f} / {statistics.fmean(seconds):.2f} / {max(seconds):.2f} s")
    print_row(f"all {args.alerts} alerts with --jobs {args.jobs} (wall)", f"{t_run:.1f} s")
    print_row("scan, bootstrap and outputs", f"{t_out:.2f} s  ({paths['tuning_ecsv']})")
    total = t_read + t_prep + t_run + t_out
    print_row("matcher tune end to end (without writing the archive)", f"{total:.1f} s")

    nb = min(args.baseline_alerts, args.alerts)
    if nb:
        # Both sides on warm per-map tables (built once per map in this process), so the ratio is the work
        # the bound saves, not the engine's set-up: warm up, then the baseline, then the bound again.
        idx = list(range(nb))
        run_all(plan, jobs=1, progress_mode="off", indices=idx)
        base, base_s = run_all(dataclasses.replace(plan, use_bound=False), jobs=1, progress_mode="off", indices=idx)
        again, again_s = run_all(plan, jobs=1, progress_mode="off", indices=idx)
        for i in idx:
            for name, c in counts[i].items():
                b = base[i][name]
                a = again[i][name]
                same = all(np.array_equal(getattr(c, f), getattr(x, f)) for x in (a, b)
                           for f in ("matches", "events", "squares", "found"))
                if not same:
                    con.print(f"[red]the sky bound changed the counts[/red] of alert {i} class {name}")
                    return 1
        mine = statistics.fmean(again_s)
        theirs = statistics.fmean(base_s)
        print_row(f"first {nb} alert(s) again, warm tables, with the sky bound", f"{mine:.2f} s per alert")
        print_row("baseline: same alert(s), warm tables, no sky bound", f"{theirs:.2f} s per alert (same counts)")
        con.print(f"[bold]ratio per alert, no bound / with bound (warm tables): {theirs / mine:.1f}×[/bold]")
    for w in result.warnings:
        con.print(f"  note: {w}")
    return 0
