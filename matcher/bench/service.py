"""``matcher bench service``: the whole service loop on an invented archive.

One run, one archive (default 200,000 optical transient reports after 20 GW alerts,
all invented; the alerts' maps are random blobs of 100–2,000 deg² at 90 %, with
distance layers; merger times every 3 hours, reports spread over the same 3 days, so
each report falls inside the optical window of about half of the events):

* baseline: read the lines and ``json.loads`` each one;
* intake only: archive → native codec → one SQLite transaction per batch (no matching);
* the service end to end: archive → decode → store (messages, event state, results,
  positions, outbox; WAL, ``synchronous=FULL``) → commit → publish to a JSON Lines
  sink (fsync'ed) — with every report matched against every active event;

each as reports/s with its ratio to the baseline, plus where the service's time went.
Reports carry no distance and no catalogue is used, so the distance background tables
are not built (that per-map set-up is the engine's and is measured by ``bench coincidence``).
"""

from __future__ import annotations

import json
import resource
import tempfile
import time
from pathlib import Path

import numpy as np

from matcher.bench._archive import json_loads_seconds, write_optical_reports
from matcher.bench._timing import print_row

__all__ = ["register", "run", "write_archive"]


def register(sub) -> None:
    p = sub.add_parser("service", help="replay through the whole service loop vs json.loads of the same archive")
    p.add_argument("--reports", type=int, default=200_000, help="transient reports (default 200,000)")
    p.add_argument("--events", type=int, default=20, help="active GW events (default 20)")
    p.add_argument("--batch", type=int, default=None,
                   help="items per store transaction (default: the embedded default configuration's)")
    p.add_argument("--seed", type=int, default=2027)
    p.add_argument("--workdir", help="folder for the archive, store and output (default: a temporary folder)")
    p.add_argument("--profile", metavar="FILE", help="write a cProfile of the service run to FILE")
    p.set_defaults(func=run)


def write_archive(folder: Path, reports: int, events: int, seed: int) -> Path:
    """An invented archive: ``events`` GW alerts (random maps), then ``reports`` optical reports."""
    from matcher.sky import moc_fits_bytes, random_skymap
    from matcher.timeconv import gps_to_iso

    rng = np.random.default_rng(seed)
    t0 = 1_457_000_000.0
    path = folder / "bench.jsonl"
    with open(path, "w", encoding="utf-8") as fh:
        for i in range(events):
            area = float(np.exp(rng.uniform(np.log(100.0), np.log(2000.0))))
            sm = random_skymap(rng, area90_deg2=area, distance=(float(rng.uniform(100, 400)), 60.0), max_order=8,
                               pixel_prob=1e-4)
            (folder / f"map{i:02d}.fits").write_bytes(moc_fits_bytes(sm))
            fh.write(json.dumps({"schema": "matcher/1", "type": "gw_alert", "event_id": f"EV-BENCH-{i:03d}",
                                 "revision": 1, "state": "issued", "merger_time": gps_to_iso(t0 + 10800.0 * i * 20 / events),
                                 "far_per_year": 0.1, "p_astro": 0.95, "source_probs": {"bns": 0.9, "terrestrial": 0.05},
                                 "localization": f"map{i:02d}.fits"}) + "\n")
        write_optical_reports(fh, rng, reports, t0)
    return path


def _baseline(path: Path) -> float:
    return json_loads_seconds(path)


def _fresh(path: Path) -> None:
    for suffix in ("", "-wal", "-shm"):
        Path(str(path) + suffix).unlink(missing_ok=True)


def _service(path: Path, folder: Path, batch: int, profile: str | None):
    import dataclasses

    from matcher.replay import default_config
    from matcher.service import Service
    from matcher.streams.sinks import JsonlSink
    from matcher.streams.sources import ArchiveSource

    cfg = default_config()
    cfg = dataclasses.replace(cfg, service=dataclasses.replace(cfg.service, batch_size=batch))
    store = folder / "service.sqlite"
    _fresh(store)
    (folder / "matches.jsonl").unlink(missing_ok=True)
    cpu = (time.thread_time(), time.process_time(), resource.getrusage(resource.RUSAGE_CHILDREN))
    t = time.perf_counter()
    svc = Service(cfg, sources=[ArchiveSource("bench", path)], sinks=[JsonlSink("bench", folder / "matches.jsonl")],
                  store_path=store)
    if profile:
        import cProfile

        prof = cProfile.Profile()
        prof.enable()
    svc.run(until_finished=True)
    svc.close()
    elapsed = time.perf_counter() - t
    ru = resource.getrusage(resource.RUSAGE_CHILDREN)  # the decode process, reaped by close()
    cpu = {"loop thread": time.thread_time() - cpu[0], "this process": time.process_time() - cpu[1],
           "decode process": ru.ru_utime + ru.ru_stime - cpu[2].ru_utime - cpu[2].ru_stime}
    if profile:
        prof.disable()
        prof.dump_stats(profile)
    from matcher.store import Store

    with Store(store) as st:
        counts = st.counts()
    return elapsed, svc.stats, counts, cpu


def run(args) -> int:
    from matcher.bench.intake import _intake

    with tempfile.TemporaryDirectory(prefix="matcher-bench-") as tmp:
        folder = Path(args.workdir) if args.workdir else Path(tmp)
        folder.mkdir(parents=True, exist_ok=True)
        n = args.reports
        if args.batch is None:
            from matcher.replay import default_config

            args.batch = default_config().service.batch_size
        print(f"service benchmark: {n:,} transient reports against {args.events} active GW events, batch {args.batch}")
        t = time.perf_counter()
        path = write_archive(folder, n, args.events, args.seed)
        print_row("writing the archive and maps (set-up)", f"{time.perf_counter() - t:8.2f} s  "
                                                           f"{path.stat().st_size / 1e6:.1f} MB")
        base = _baseline(path)
        print_row("baseline: read lines + json.loads", f"{base:8.2f} s  {n / base:12,.0f} reports/s")
        store = folder / "intake.sqlite"
        _fresh(store)
        took, _ = _intake(path, store, args.batch)
        print_row("intake only: archive → codec → SQLite (no matching)",
                  f"{took:8.2f} s  {n / took:12,.0f} reports/s  {base / took:6.3f} × baseline")
        elapsed, stats, counts, cpu = _service(path, folder, args.batch, args.profile)
        print_row("service end to end: decode, store, match, publish",
                  f"{elapsed:8.2f} s  {n / elapsed:12,.0f} reports/s  {base / elapsed:6.3f} × baseline")
        sec = stats.seconds
        parts = ", ".join(f"{k} {v:.2f} s" for k, v in sec.items() if v >= 0.005)
        print_row("  time per step", parts)
        print_row("  outside the steps (set-up, freeing batches, close)", f"{elapsed - sum(sec.values()):8.2f} s")
        print_row("  CPU: " + " / ".join(cpu), " / ".join(f"{v:.2f} s" for v in cpu.values()))
        tot = stats.totals
        print_row("  report-event pairs scored / candidates / records written",
                  f"{tot.scored:,} / {tot.candidates:,} / {tot.written:,}")
        print_row("stored messages / results / quarantined",
                  f"{counts['messages']:,} / {counts['results']:,} / {counts['quarantine']}")
        target = 20_000
        print_row(f"target ≥ {target:,} reports/s end to end", "met" if n / elapsed >= target else "NOT met")
        return 0 if counts["messages"] == n + args.events else 1
