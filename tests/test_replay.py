"""Replay equals live, crash and restart equal an uninterrupted run (KAFKA.md "Effectively-once output").

The method follows the fault tests of trusted systems described in KAFKA.md (a golden
uninterrupted run, then runs killed with SIGKILL at seeded points, compared by sorted
result keys and values, with zero duplicates in the output).
"""

from __future__ import annotations

import json
import os
import random
import subprocess
import sys
from pathlib import Path

import pytest

from matcher.config import config_from_mapping
from matcher.replay import replay_archive
from matcher.service import Service
from matcher.store import Store
from service_scenarios import results_by_key, small_stream, write_archive, write_inbox

HERE = Path(__file__).resolve().parent


def test_inbox_gives_the_same_results_as_the_archive(tmp_path):
    lines = small_stream(tmp_path / "a")
    archive = write_archive(tmp_path / "a", lines)
    replayed = replay_archive(archive, out_dir=tmp_path / "ra", progress_mode="off")
    inbox = write_inbox(tmp_path / "inbox", lines)
    small_stream(inbox)  # the same maps beside the messages (relative paths resolve there)
    cfg = config_from_mapping({"state_dir": "state", "sources": {"drop": {"kind": "inbox", "path": "inbox"}},
                               "sinks": {"m": {"kind": "jsonl", "path": "live/matches.jsonl"}},
                               "service": {"batch_size": 50, "poll_timeout_s": 0.0}}, base_dir=tmp_path)
    with Service(cfg) as svc:
        for _ in range(100):
            if svc.step() is None and not any(inbox.glob("*.json")):
                break
        live_counts = svc.store.counts()
        live = results_by_key(svc.store)
    with Store(replayed.store_path) as st:
        assert live == results_by_key(st)
    assert live_counts["quarantine"] == 0 and len(list((inbox / "done").glob("*.json"))) == len(lines)
    # The published records are the same too (sequence numbers aside).
    def last_by_key(path):
        out = {}
        for line in path.read_text().splitlines():
            rec = json.loads(line)
            rec.pop("seq")
            out[rec["key"]] = rec
        return out

    assert last_by_key(tmp_path / "live" / "matches.jsonl") == last_by_key(tmp_path / "ra" / "matches.jsonl")


@pytest.mark.slow
def test_kill_9_at_seeded_points_then_restart_equals_an_uninterrupted_run(tmp_path):
    lines = small_stream(tmp_path / "s", n=300)
    archive = write_archive(tmp_path / "s", lines)
    golden = replay_archive(archive, out_dir=tmp_path / "golden", progress_mode="off", batch_size=25)
    with Store(golden.store_path) as st:
        want = results_by_key(st)
    rng = random.Random(20261202)  # seeded kill points
    out = tmp_path / "crashy"
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(HERE.parent), str(HERE)]))
    points = ["in_transaction", "after_store", "mid_write", "after_flush"]
    kills = 0
    for point in points + [rng.choice(points) for _ in range(2)]:
        at = rng.randint(1, 4)
        proc = subprocess.run([sys.executable, str(HERE / "service_crash_driver.py"), str(archive), str(out), "25",
                               point, str(at)], env=env, capture_output=True, text=True, timeout=300)
        assert proc.returncode in (0, -9), proc.stderr
        kills += proc.returncode == -9
    assert kills >= 4
    proc = subprocess.run([sys.executable, str(HERE / "service_crash_driver.py"), str(archive), str(out), "25",
                           "none", "0"], env=env, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    with Store(out / "matcher.sqlite") as st:
        assert results_by_key(st) == want
        outbox_last = st.last_seq()
    assert json.loads((out / "summary.json").read_text()) == golden.summary
    raw = (out / "matches.jsonl").read_text().splitlines()
    assert len(raw) == len(set(raw))  # no duplicate lines
    seqs = [json.loads(l)["seq"] for l in raw]
    assert seqs == sorted(set(seqs)) and seqs[-1] <= outbox_last
    last = {}
    for l in raw:
        rec = json.loads(l)
        rec.pop("seq")
        last[rec["key"]] = json.dumps(rec, sort_keys=True)
    assert last == want
