"""Real SIGKILLs at the dangerous points of a batch, then a restart: the store and the
JSON Lines output end identical to an uninterrupted run, with no line written twice.

The points: inside the store transaction (rolled back), after the store commit but before
the source is told (inbox files not yet moved), after the source commit, halfway through
writing sink lines (a torn last line), and after the sink's fsync but before the store
marks the rows sent. The idea follows SQLite's own crash testing (compare a content
signature of every table after the crash with an uninterrupted run)."""

from __future__ import annotations

import json
import shutil
import signal
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest

from streams_helpers import gw, line, transient

DRIVER = Path(__file__).resolve().parent / "streams_crash_driver.py"
ROOT = Path(__file__).resolve().parent.parent


def stream_lines() -> list[bytes]:
    out = [line(gw(event_id="EV-CRASH", localization=None, state="withdrawn", revision=1))]
    for i in range(40):
        out.append(line(transient(tid=f"TC-{i:03d}", ra=float(i), dec=-10.0 + i / 4)))
        if i % 9 == 4:
            out.append(b'{"schema": "matcher/1", "broken": ' + str(i).encode())
        if i % 13 == 6:
            out.append(line(transient(tid=f"TC-{i - 3:03d}", ra=float(i) + 0.5)))  # an update of an earlier report
    return out


def run(kind, src, state, point="none", at=0):
    return subprocess.run([sys.executable, str(DRIVER), kind, str(src), str(state), point, str(at)],
                          cwd=ROOT, capture_output=True, text=True, timeout=120)


def signature(state: Path, src_root: Path) -> dict:
    """Every table that matters, without wall-clock columns."""
    db = sqlite3.connect(state / "s.sqlite")
    q = {
        "messages": "SELECT id, dedup, origin, codec, kind, message_key, raw FROM messages ORDER BY id",
        "transients": "SELECT transient_id, message_id, ra_deg, dec_deg, content, reports FROM transients ORDER BY 1",
        "events": "SELECT event_id, revision, state FROM events",
        "results": "SELECT key, status, record, seq FROM results ORDER BY key",
        "quarantine": "SELECT origin, reason, raw FROM quarantine ORDER BY id",
        "outbox": "SELECT seq, key, payload FROM outbox ORDER BY seq",
        "positions": "SELECT source, stream, token FROM positions ORDER BY 1, 2",
    }
    sig = {name: db.execute(sql).fetchall() for name, sql in q.items()}
    db.close()
    sig["matches.jsonl"] = (state / "matches.jsonl").read_text()
    if (src_root / "done").exists():
        sig["done"] = sorted(p.name for p in (src_root / "done").iterdir())
        sig["rejected"] = sorted(p.name for p in (src_root / "rejected").iterdir())
        sig["left"] = sorted(p.name for p in src_root.glob("*.json"))
    return sig


def make_source(kind, folder: Path) -> Path:
    lines = stream_lines()
    if kind == "archive":
        path = folder / "stream.jsonl"
        path.write_bytes(b"".join(x + b"\n" for x in lines))
        return path
    box = folder / "inbox"
    box.mkdir()
    for i, x in enumerate(lines):
        (box / f"{i:03d}.json").write_bytes(x)
    return box


CASES = [("archive", "in_transaction", 2), ("archive", "after_store", 3), ("archive", "after_source", 1),
         ("archive", "mid_write", 2), ("archive", "after_flush", 3),
         ("inbox", "after_store", 2), ("inbox", "in_transaction", 4), ("inbox", "mid_write", 1)]


@pytest.mark.slow
@pytest.mark.parametrize("kind, point, at", CASES)
def test_kill_and_restart_equals_an_uninterrupted_run(tmp_path, kind, point, at):
    work = tmp_path / "w"  # the same folder for both runs, so origins (absolute paths) match
    sigs = []
    for plan in ([("none", 0)], [(point, at), ("none", 0)]):
        if work.exists():
            shutil.rmtree(work)
        work.mkdir()
        src = make_source(kind, work)
        state = work / "state"
        results = [run(kind, src, state, p, a) for p, a in plan]
        if len(plan) == 2:
            assert results[0].returncode == -signal.SIGKILL, results[0].stderr  # it really died there
        assert results[-1].returncode == 0, results[-1].stderr
        sigs.append(signature(state, work / "inbox"))
    golden, crashed = sigs
    assert crashed == golden
    keys = [json.loads(x)["key"] for x in golden["matches.jsonl"].splitlines()]
    assert len(keys) == len(set(keys)) == 40 and len(golden["quarantine"]) == 4
