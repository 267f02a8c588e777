"""``matcher listen``: a real process on an inbox, stopped by SIGTERM after its batch; the dashboard renders."""

from __future__ import annotations

import io
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

from matcher.config import config_from_mapping
from matcher.report.dashboard import render
from matcher.service import Service
from matcher.store import Store
from service_scenarios import small_stream, write_inbox

ROOT = Path(__file__).resolve().parent.parent


def test_listen_runs_until_sigterm_and_stops_cleanly(tmp_path):
    lines = small_stream(tmp_path / "inbox", n=60)
    (tmp_path / "listen.yaml").write_text(
        "state_dir: state\nsources: {drop: {kind: inbox, path: inbox}}\n"
        "sinks: {m: {kind: jsonl, path: out/matches.jsonl}}\nservice: {batch_size: 20, poll_timeout_s: 0.2}\n")
    env = dict(os.environ, PYTHONPATH=str(ROOT), MATCHER_PROGRESS="off")
    proc = subprocess.Popen([sys.executable, "-m", "matcher", "listen", "-c", str(tmp_path / "listen.yaml")],
                            cwd=tmp_path, env=env, stderr=subprocess.PIPE, text=True)
    try:
        write_inbox(tmp_path / "inbox", lines)
        deadline = time.monotonic() + 120
        while len(list((tmp_path / "inbox" / "done").glob("*.json"))) < len(lines):
            assert time.monotonic() < deadline and proc.poll() is None
            time.sleep(0.2)
        proc.send_signal(signal.SIGTERM)
        err = proc.communicate(timeout=60)[1]
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, err
    assert "stopped after" in err
    with Store(tmp_path / "state" / "matcher.sqlite") as st:
        counts = st.counts()
        assert counts["messages"] == len(lines) and counts["results"] > 0
        keys = {r.key for r in st.results()}
    published = {json.loads(l)["key"] for l in (tmp_path / "out" / "matches.jsonl").read_text().splitlines()}
    assert published == keys  # flushed on the way out


def test_dashboard_shows_events_candidates_and_counts(tmp_path):
    lines = small_stream(tmp_path / "inbox", n=60)
    write_inbox(tmp_path / "inbox", lines)
    cfg = config_from_mapping({"state_dir": "state", "sources": {"drop": {"kind": "inbox", "path": "inbox"}},
                               "service": {"batch_size": 1000, "poll_timeout_s": 0.0}}, base_dir=tmp_path)
    from rich.console import Console

    with Service(cfg) as svc:
        svc.step()
        con = Console(file=io.StringIO(), width=160, record=True)
        con.print(render(svc, quarantined_before=3))
        text = con.export_text()
    assert "EV-A" in text and "active events" in text and "best candidates" in text
    assert "quarantined 3" in text and "P_assoc" in text
    assert "EV-B" not in text.split("best candidates")[0]  # withdrawn: no longer active


def test_log_level_shows_the_matchers_records_on_stderr(capsys):
    import logging

    from matcher.commands.listen import log_to_stderr

    with log_to_stderr("info"):
        logging.getLogger("matcher.kafka").info("partitions assigned: %s", "t-0")
        logging.getLogger("matcher.kafka").debug("not at info")
        logging.getLogger("kafka.client").info("the library's own info")
    logging.getLogger("matcher.kafka").info("after the block")
    err = capsys.readouterr().err
    assert "INFO matcher.kafka: partitions assigned: t-0" in err
    assert "not at info" not in err and "the library's own" not in err and "after the block" not in err
    with log_to_stderr("warning"):
        logging.getLogger("matcher.store").info("quiet")
        logging.getLogger("matcher.store").warning("loud")
    err = capsys.readouterr().err
    assert "quiet" not in err and "WARNING matcher.store: loud" in err
    assert not logging.getLogger("matcher").handlers and logging.getLogger("matcher").propagate
    # Written to sys.stderr as it is at each record (the dashboard's live view swaps it).
    swapped = io.StringIO()
    with log_to_stderr("info"):
        real, sys.stderr = sys.stderr, swapped
        try:
            logging.getLogger("matcher.kafka").info("while the view runs")
        finally:
            sys.stderr = real
    assert "while the view runs" in swapped.getvalue() and "while the view runs" not in capsys.readouterr().err


def test_log_level_is_checked():
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    done = subprocess.run([sys.executable, "-m", "matcher", "listen", "--log-level", "loud"], env=env,
                          capture_output=True, text=True, timeout=60)
    assert done.returncode == 2
    assert "--log-level" in done.stderr and "invalid choice: 'loud'" in done.stderr
