"""The service loop and the event lifecycle on a small invented stream.

What is checked here is our own contract (DESIGN.md "Messages and lifecycle", the
issue's lifecycle rules), not external reference values: batching must not change
the final results, a restart must continue exactly, a second replay adds nothing,
and the lifecycle rules (supersede, older revision ignored, withdraw) hold.
"""

from __future__ import annotations

import json
import math

import pytest

from matcher.lifecycle import association_from_sum, exact_odds_sum
from matcher.replay import replay_archive
from matcher.store import Store
from service_scenarios import results_by_key, small_stream, write_archive


def _replay(tmp_path, name, archive, **kw):
    return replay_archive(archive, out_dir=tmp_path / name, progress_mode="off", **kw)


@pytest.fixture(scope="module")
def stream(tmp_path_factory):
    folder = tmp_path_factory.mktemp("stream")
    return write_archive(folder, small_stream(folder))


@pytest.fixture(scope="module")
def golden(stream, tmp_path_factory):
    out = tmp_path_factory.mktemp("golden")
    res = replay_archive(stream, out_dir=out, progress_mode="off")
    with Store(res.store_path) as st:
        return res, results_by_key(st)


def test_lifecycle_rules(golden):
    res, results = golden
    ev = res.summary["events"]
    a, b = ev["EV-A"], ev["EV-B"]
    assert (a["revision"], a["state"], a["revisions"]) == (2, "revised", [1, 2])
    assert (b["state"], b["revision"]) == ("withdrawn", 2)
    recs = {k: json.loads(v) for k, v in results.items()}
    a1 = [r for r in recs.values() if r["event_id"] == "EV-A" and r["revision"] == 1]
    a2 = [r for r in recs.values() if r["event_id"] == "EV-A" and r["revision"] == 2]
    assert a1 and all(r["status"] == "superseded" for r in a1)
    assert a2 and all(r["status"] == "current" for r in a2)
    bb = [r for r in recs.values() if r["event_id"] == "EV-B"]
    assert bb and all(r["status"] == "withdrawn" for r in bb)
    # A newer revision re-scores stored transients: reports that arrived before revision 2
    # (OT-0000 ...) have results at revision 2 too.
    early = {r["transient_id"] for r in a1}
    assert early & {r["transient_id"] for r in a2}
    # The gamma-ray trigger 2 s after EV-A (4 deg error, inside the map) is a candidate at
    # both revisions; the one 70 deg away is not; the report 10 days later matches nothing.
    assert "EV-A/1/GRB-1" in recs and "EV-A/2/GRB-1" in recs
    assert not any(r["transient_id"] in ("GRB-2", "OT-LATE") for r in recs.values())
    # The neutrino after the withdrawal is not matched against the withdrawn event.
    assert "EV-B/2/NU-1" not in recs and "EV-B/1/NU-1" not in recs
    for r in recs.values():
        assert r["key"] == f"{r['event_id']}/{r['revision']}/{r['transient_id']}"
        for field in ("class", "p_assoc", "fap", "odds", "rank", "status", "terms", "host"):
            assert field in r


def test_summary_p_assoc_is_exact_and_ranked(golden):
    res, results = golden
    recs = [json.loads(v) for v in results.values()]
    a2 = [r for r in recs if r["event_id"] == "EV-A" and r["revision"] == 2 and r["candidate"]]
    by_class = {}
    for r in a2:
        by_class.setdefault(r["class"], []).append(r["odds"])
    cands = res.summary["events"]["EV-A"]["candidates"]
    for c in cands:
        odds = by_class[c["class"]]
        # Check against plain float arithmetic (math.fsum is correctly rounded): the exact
        # integer sum in units of 2**-40 agrees to its quantization (n * 2**-41 at most).
        p_plain = c["odds"] / (1.0 + math.fsum(odds))
        assert c["p_assoc"] == pytest.approx(p_plain, rel=1e-9)
        assert c["p_assoc"] == association_from_sum(c["odds"], exact_odds_sum(odds))
    ps = [c["p_assoc"] for c in cands]
    assert ps == sorted(ps, reverse=True)
    published = {r["transient_id"]: r for r in a2}
    for c in cands:
        r = published[c["transient_id"]]
        assert r["p_assoc"] == round(c["p_assoc"], 3)  # the published value: 3 decimals
        assert r["rank"] == (c["rank"] if c["rank"] <= 5 else None)


@pytest.mark.parametrize("batch", [1, 17])
def test_batching_does_not_change_the_results(stream, golden, tmp_path, batch):
    res = _replay(tmp_path, f"b{batch}", stream, batch_size=batch)
    with Store(res.store_path) as st:
        assert results_by_key(st) == golden[1]
    assert res.summary == golden[0].summary


def test_second_replay_adds_nothing_and_restart_continues(stream, golden, tmp_path):
    first = _replay(tmp_path, "r", stream, batch_size=40, stop_after_batches=3)
    assert first.counts["messages"] == 120
    again = _replay(tmp_path, "r", stream, batch_size=40)
    with Store(again.store_path) as st:
        assert results_by_key(st) == golden[1]
    text = (tmp_path / "r" / "matches.jsonl").read_bytes()
    third = _replay(tmp_path, "r", stream)
    assert third.counts == again.counts
    assert (tmp_path / "r" / "matches.jsonl").read_bytes() == text
    assert third.summary == golden[0].summary


def test_republishing_follows_the_rule(golden):
    res, results = golden
    lines = [json.loads(l) for l in (res.out_dir / "matches.jsonl").read_text().splitlines()]
    seqs = [l["seq"] for l in lines]
    assert seqs == sorted(set(seqs))  # each outbox row once, in order
    by_key = {}
    for l in lines:
        by_key.setdefault(l["key"], []).append(l)
    for key, ls in by_key.items():
        # The last line of a key is its stored state.
        last = dict(ls[-1])
        last.pop("seq")
        assert json.dumps(last, sort_keys=True) == results[key]
        # A record is written again only when its status, published p_assoc or rank changed.
        for prev, cur in zip(ls, ls[1:]):
            assert (prev["status"], prev["p_assoc"], prev["rank"], prev["odds"]) != \
                   (cur["status"], cur["p_assoc"], cur["rank"], cur["odds"])
    # Unremarkable candidates (never ranked, P_assoc always below the publishing step) are written once.
    quiet = [ls for ls in by_key.values() if all(l["rank"] is None and l["p_assoc"] == 0 for l in ls)
             and len({l["status"] for l in ls}) == 1]
    assert quiet and all(len(ls) == 1 for ls in quiet)


def test_report_writers_run_after_each_changed_revision(stream, tmp_path):
    from matcher.config import config_from_mapping
    from matcher.errors import ConfigError
    from matcher.service import register_report_writer

    calls = []

    class Writer:
        def __init__(self, name, options, base_dir):
            self.name, self.options = name, options

        def on_revision(self, store, event_id, revision, state):
            # Runs after the batch is durable (a later revision of the same batch may be current already).
            assert revision in [r.alert.revision for r in store.revisions(event_id)]
            calls.append((event_id, revision, state))

        def close(self):
            calls.append("closed")

    register_report_writer("test-recorder", Writer)
    cfg = config_from_mapping({"state_dir": "st", "reports": {"rec": {"kind": "test-recorder", "out": "x"}}},
                              base_dir=tmp_path)
    replay_archive(stream, out_dir=tmp_path / "o", config=cfg, progress_mode="off")
    assert calls == [("EV-A", 1, "issued"), ("EV-B", 1, "issued"), ("EV-A", 2, "revised"),
                     ("EV-B", 2, "withdrawn"), "closed"]
    bad = config_from_mapping({"state_dir": "st2", "reports": {"h": {"kind": "no-such-writer"}}}, base_dir=tmp_path)
    with pytest.raises(ConfigError, match="reports.h.kind: unknown report writer 'no-such-writer'"):
        replay_archive(stream, out_dir=tmp_path / "o2", config=bad, progress_mode="off")


class _AwaySink:
    """A sink whose target is away for its first ``fail`` flushes (a broker past its delivery timeout)."""

    kind = "test-away"
    kinds = ("match",)

    def __init__(self, name, fail):
        self.name, self.fail, self.rows, self._pending = name, fail, [], []

    def open(self, sent_seq):
        return sent_seq

    def write(self, rows):
        self._pending = list(rows)

    def flush(self):
        from matcher.streams.sinks import SinkError

        if self.fail > 0:
            self.fail -= 1
            self._pending = []
            raise SinkError(f"sink {self.name}: target away")
        self.rows += self._pending
        self._pending = []

    def close(self):
        pass


def test_a_sink_that_is_away_is_retried_not_fatal(stream, golden, tmp_path):
    # The loop warns and goes on; the rows wait in the outbox and every one arrives later.
    from matcher.errors import MatcherWarning
    from matcher.replay import default_config
    from matcher.service import Service
    from matcher.streams.sources import ArchiveSource

    import dataclasses

    sink = _AwaySink("away", fail=2)
    source = ArchiveSource("replay", stream)
    cfg = default_config()
    cfg = dataclasses.replace(cfg, service=dataclasses.replace(cfg.service, batch_size=40))
    with pytest.warns(MatcherWarning, match="target away; its outbox rows stay queued"):
        with Service(cfg, sources=[source], sinks=[], extra_sinks=[sink],
                     store_path=tmp_path / "s.sqlite") as svc:
            svc.run(until_finished=True)
    _, reference = golden
    got = {json.loads(r.payload)["key"] for r in sink.rows}
    assert got == set(reference)
    assert len(sink.rows) == len({r.seq for r in sink.rows})  # each outbox row once


def test_loop_gc_turns_the_collector_off_and_restores_it():
    # The loop runs with automatic collection off and must leave the process as it found it.
    import gc

    from matcher.service import loop_gc

    assert gc.isenabled()
    with loop_gc():
        assert not gc.isenabled()
        with loop_gc():
            assert not gc.isenabled()
        assert not gc.isenabled()
    assert gc.isenabled()
    try:
        with loop_gc():
            raise KeyError("x")
    except KeyError:
        pass
    assert gc.isenabled()
    gc.disable()
    try:
        with loop_gc():
            pass
        assert not gc.isenabled()  # off before, off after
    finally:
        gc.enable()


def test_loop_gc_tick_collects_cyclic_garbage_once_the_limit_built_up():
    # Python's gc module (standard library documentation): gc.get_count()[0] counts tracked
    # allocations not yet freed since the last young collection, so cycles advance it and
    # objects freed by reference counting do not.
    import gc
    import weakref

    from matcher.service import loop_gc, loop_gc_tick

    class Node:
        pass

    with loop_gc():
        gc.collect()
        for _ in range(5000):  # acyclic churn: freed at once, the count stays low
            [Node()]
        assert not loop_gc_tick(limit=1000)
        probes = []
        for _ in range(600):  # cyclic garbage: two tracked objects (instance, its __dict__) each
            n = Node()
            n.me = n
            probes.append(weakref.ref(n))
            del n
        assert all(p() is not None for p in probes)  # nothing collects while the collector is off
        assert loop_gc_tick(limit=1000)
        assert all(p() is None for p in probes)
        assert not loop_gc_tick(limit=1000)  # the count starts again from zero
