"""``matcher bench intake``: the I/O edge of the service on an invented archive.

Figures, one run, on the same archive file (default 200,000 transient reports and
20 GW alerts with a small localization each, invented):

* baseline: read the lines and ``json.loads`` each one (the cheapest a Python
  reader of this archive can be);
* poll + decode alone: archive source → native codec (full validation, localization
  loading), in batches, without a store, under the service loop's garbage-collector
  setting (:func:`matcher.service.loop_gc`): the service's per-report edge, with its
  split into poll and decode in µs per line;
* intake: archive source → native codec (full validation, localization loading)
  → one SQLite transaction per batch (WAL, ``synchronous=FULL``: messages with raw
  bytes, events, transients, positions) → commit; into a fresh store;
* replay of the same archive into the same store from the start (every line a
  duplicate: what a restart without a stored position costs);

and each as reports/s with its ratio to the baseline. Scoring is not part of this
benchmark (the service loop adds it); the issue's end-to-end target is ≥ 20,000
reports/s with scoring, so this edge must leave most of that budget free.
"""

from __future__ import annotations

import json
import tempfile
import time
from pathlib import Path

import numpy as np

from matcher.bench._archive import json_loads_seconds, write_optical_reports
from matcher.bench._timing import print_row

__all__ = ["register", "run", "write_archive"]


def register(sub) -> None:
    p = sub.add_parser("intake", help="archive → codec → SQLite store throughput vs json.loads of the same file")
    p.add_argument("--reports", type=int, default=200_000, help="transient reports in the archive (default 200,000)")
    p.add_argument("--events", type=int, default=20, help="GW alerts in the archive (default 20)")
    p.add_argument("--batch", type=int, default=500, help="items per store transaction (default 500)")
    p.add_argument("--seed", type=int, default=2026)
    p.add_argument("--workdir", help="folder for the archive and store (default: a temporary folder)")
    p.set_defaults(func=run)


def write_archive(folder: Path, reports: int, events: int, seed: int) -> Path:
    """An invented archive: ``events`` GW alerts, then ``reports`` optical transient reports."""
    from matcher.sky import flat_fits_bytes
    from matcher.timeconv import gps_to_iso

    rng = np.random.default_rng(seed)
    (folder / "map.fits").write_bytes(flat_fits_bytes(np.full(12 * 4 ** 2, 1 / (12 * 4 ** 2)), nest=True))
    t0 = 1_457_000_000.0
    path = folder / "bench.jsonl"
    with open(path, "w", encoding="utf-8") as fh:
        for i in range(events):
            fh.write(json.dumps({"schema": "matcher/1", "type": "gw_alert", "event_id": f"EV-BENCH-{i:03d}",
                                 "revision": 1, "state": "issued", "merger_time": gps_to_iso(t0 + 3600.0 * i),
                                 "far_per_year": 0.1, "p_astro": 0.95, "localization": "map.fits"}) + "\n")
        write_optical_reports(fh, rng, reports, t0)
    return path


def _baseline(path: Path) -> float:
    return json_loads_seconds(path)


def _poll_decode(path: Path, batch: int) -> tuple[float, float, int]:
    """Seconds spent in ``poll`` and in decoding (as the service loop does both), and the lines read."""
    from matcher.service import loop_gc
    from matcher.streams.codecs import NativeCodec
    from matcher.streams.intake import decode_item
    from matcher.streams.sources import ArchiveSource

    codec = NativeCodec()
    poll_s = decode_s = 0.0
    n = 0
    with loop_gc(), ArchiveSource("bench", path) as src:
        while True:
            t0 = time.perf_counter()
            items = src.poll(batch)
            t1 = time.perf_counter()
            if not items:
                break
            decoded = [decode_item(it, codec) for it in items]
            t2 = time.perf_counter()
            poll_s += t1 - t0
            decode_s += t2 - t1
            n += len(decoded)
    return poll_s, decode_s, n


def _intake(path: Path, store_path: Path, batch: int) -> tuple[float, dict]:
    from matcher.store import Store
    from matcher.streams.codecs import NativeCodec
    from matcher.streams.intake import decode_item, record_batch
    from matcher.streams.raw import positions_of
    from matcher.streams.sources import ArchiveSource

    store = Store(store_path)
    codec = NativeCodec()
    t = time.perf_counter()
    with ArchiveSource("bench", path) as src:
        while True:
            items = src.poll(batch)
            if not items:
                break
            decoded = [decode_item(it, codec) for it in items]
            with store.transaction() as tx:
                record_batch(tx, decoded)
                tx.set_positions(src.name, positions_of(items))
            src.commit(decoded)
    elapsed = time.perf_counter() - t
    counts = store.counts()
    store.close()
    return elapsed, counts


def run(args) -> int:
    with tempfile.TemporaryDirectory(prefix="matcher-bench-") as tmp:
        folder = Path(args.workdir) if args.workdir else Path(tmp)
        folder.mkdir(parents=True, exist_ok=True)
        n = args.reports + args.events
        print(f"intake benchmark: {args.reports:,} transient reports + {args.events} GW alerts, batch {args.batch}")
        t = time.perf_counter()
        path = write_archive(folder, args.reports, args.events, args.seed)
        print_row("writing the archive (set-up)", f"{time.perf_counter() - t:8.2f} s  {path.stat().st_size / 1e6:.1f} MB")
        base = _baseline(path)
        print_row("baseline: read lines + json.loads", f"{base:8.2f} s  {n / base:12,.0f} lines/s")
        poll_s, decode_s, read = _poll_decode(path, args.batch)
        edge = poll_s + decode_s
        print_row("poll + decode alone: archive → native codec (no store)",
                  f"{edge:8.2f} s  {n / edge:12,.0f} lines/s  {base / edge:6.3f} × baseline")
        print_row("  per line: poll / decode", f"{poll_s / read * 1e6:8.2f} µs / {decode_s / read * 1e6:.2f} µs")
        store_path = folder / "bench.sqlite"
        for suffix in ("", "-wal", "-shm"):
            Path(str(store_path) + suffix).unlink(missing_ok=True)
        took, counts = _intake(path, store_path, args.batch)
        print_row("intake: archive → native codec → SQLite (fresh store)",
                  f"{took:8.2f} s  {n / took:12,.0f} lines/s  {base / took:6.3f} × baseline")
        again, counts2 = _intake(path, store_path, args.batch)
        print_row("replay into the same store (all duplicates)",
                  f"{again:8.2f} s  {n / again:12,.0f} lines/s  {base / again:6.3f} × baseline")
        ok = read == n and counts["messages"] == n and counts2 == counts and counts["quarantine"] == 0
        print_row("stored messages / transients / events / quarantined",
                  f"{counts['messages']:,} / {counts['transients']:,} / {counts['events']} / {counts['quarantine']}")
        print_row("second replay added nothing", "yes" if counts2 == counts else "NO")
        return 0 if ok else 1
