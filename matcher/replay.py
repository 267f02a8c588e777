"""Replaying an archive through the service: ``matcher replay`` and ``matcher demo``.

The archive is one source (kind ``archive``, named ``replay``), read to its end as
fast as possible or paced (``speed``); outputs go to ``OUT/matches.jsonl`` (plus the
configuration's own sinks when a configuration was given) and the summary of the
store to ``OUT/summary.json``. The store is the configuration's when one was given,
else ``OUT/matcher.sqlite``, so a replay never writes into a live service's state by
accident. The source's position is stored with every batch: replaying the same
archive into the same store again reads nothing new and adds nothing; a replay that
was killed resumes where its last batch was committed.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import yaml

from matcher.config import Config, config_from_mapping, load_config
from matcher.streams.fsutil import write_durably

__all__ = ["replay_archive", "ReplayResult", "default_config", "count_lines", "REPLAY_SOURCE", "REPLAY_SINK"]

REPLAY_SOURCE = "replay"
REPLAY_SINK = "replay"


def default_config() -> Config:
    """The embedded default configuration (``matcher/data/default.yaml``), paths relative to the current folder."""
    from matcher.coincidence import default_config_path

    path = default_config_path()
    return config_from_mapping(yaml.safe_load(path.read_text(encoding="utf-8")), base_dir=Path.cwd(), path=path)


def count_lines(path) -> int:
    """Lines in a file (for the progress bar's total)."""
    n = 0
    with open(path, "rb") as fh:
        while chunk := fh.read(1 << 20):
            n += chunk.count(b"\n")
    return n


@dataclass(frozen=True)
class ReplayResult:
    """What a replay did: the summary, the store's counts, the totals of the loop, and where files are."""

    summary: dict
    counts: dict
    stats: object
    out_dir: Path
    store_path: Path


def replay_archive(archive, *, out_dir, config: Config | None = None, config_path=None, speed: float | None = None,
                   store_path=None, progress_mode: str = "auto", index=None, batch_size: int | None = None,
                   stop_after_batches: int | None = None) -> ReplayResult:
    """Replay ``archive`` through the service and write ``matches.jsonl`` and ``summary.json``.

    Parameters
    ----------
    archive : path
        JSON Lines archive (one native message per line).
    out_dir : path
        Created if needed.
    config : Config, optional
        Default: ``config_path`` loaded, or the embedded default.
    speed : float, optional
        N × real time from ``received_at`` (None: as fast as possible).
    store_path : path, optional
        Default: the configuration's store when a configuration was given, else ``OUT/matcher.sqlite``.
    progress_mode : str
        ``auto``, ``bar``, ``lines`` or ``off`` (see :mod:`matcher.report.progress`).
    index : GalaxyIndex, optional
        Overrides the configured catalogue.
    batch_size : int, optional
        Overrides ``service.batch_size``.
    stop_after_batches : int, optional
        Stop early (tests of resuming).
    """
    import dataclasses

    from matcher.report.progress import progress
    from matcher.service import Service
    from matcher.streams.sinks import JsonlSink
    from matcher.streams.sources import ArchiveSource
    from matcher.summary import build_summary, summary_json

    given = config is not None or config_path is not None
    if config is None:
        config = load_config(config_path) if config_path is not None else default_config()
    if batch_size is not None:
        config = dataclasses.replace(config, service=dataclasses.replace(config.service, batch_size=int(batch_size)))
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    store_path = Path(store_path) if store_path is not None else (config.store_path if given else out / "matcher.sqlite")
    source = ArchiveSource(REPLAY_SOURCE, archive, speed=speed, max_bytes=config.limits.message_max_bytes)
    sinks = [config.sink(n) for n in config.sinks] if given else []
    total = count_lines(archive)
    with progress("replaying", total=total, unit="msg", mode=progress_mode) as bar:
        def advance(svc, stats):
            if stats.messages:
                bar.advance(stats.messages)

        try:
            svc = Service(config, sources=[source], sinks=sinks, extra_sinks=[JsonlSink(REPLAY_SINK, out / "matches.jsonl")],
                          store_path=store_path, index=index, on_batch=advance)
        except BaseException:
            source.close()
            raise
        with svc:
            done_before = _position_line(svc, source)
            if done_before:
                bar.advance(done_before)
                bar.note(f"resuming after line {done_before:,} (already in the store)")
            svc.run(until_finished=True, max_batches=stop_after_batches)
            summary = build_summary(svc.store, hosts=svc.catalog.hosts)
            counts = svc.store.counts()
            stats = svc.stats
    write_durably(out / "summary.json", summary_json(summary))
    return ReplayResult(summary, counts, stats, out, store_path)


def _position_line(svc, source) -> int:
    import json

    token = svc.store.positions(source.name).get(source.stream)
    if token is None:
        return 0
    try:
        return int(json.loads(token)["line"])
    except (ValueError, KeyError, TypeError):
        return 0
