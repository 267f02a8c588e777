"""``matcher report``: writes the folder from the store, prints one line or JSON, one-line errors."""

from __future__ import annotations

import json
import re

import pytest

from matcher.cli import main
from matcher.demo import TRUTH
from report_helpers import demo_replay

EVENT = TRUTH["ns_event"]


@pytest.fixture(scope="module")
def store_path(tmp_path_factory):
    return demo_replay(tmp_path_factory) / "state" / "matcher.sqlite"


def test_report_writes_the_folder_and_reads_the_store_only(store_path, tmp_path, capsys):
    from matcher.store import Store

    with Store(store_path) as st:
        before = st.counts()
    out = tmp_path / "rep"
    assert main(["report", "--store", str(store_path), "--event", EVENT, "--out", str(out), "--dpi", "30"]) == 0
    line = capsys.readouterr().out
    assert re.match(rf"wrote {re.escape(str(out / 'index.html'))}: {EVENT} revision 2 \(revised\), \d+ candidates, "
                    r"10 hosts, 1 sky plot; beside it: candidates.ecsv, hosts.ecsv, hosts.vot, skyplot.png "
                    r"\(\d+\.\d s\)$", line.strip()), line
    assert sorted(p.name for p in out.iterdir()) == ["candidates.ecsv", "hosts.ecsv", "hosts.vot", "index.html",
                                                     "skyplot.png"]
    with Store(store_path) as st:
        assert st.counts() == before


def test_report_json(store_path, tmp_path, capsys):
    out = tmp_path / "rep"
    assert main(["report", "--store", str(store_path), "--event", EVENT, "--out", str(out), "--json",
                 "--max-candidates", "2", "--top-hosts", "3", "--dpi", "50"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert {k: d[k] for k in ("event_id", "revision", "state", "n_candidates", "n_hosts", "n_figures")} == {
        "event_id": EVENT, "revision": 2, "state": "revised", "n_candidates": 2, "n_hosts": 3, "n_figures": 1}
    assert set(d["files"]) == {"html", "candidates", "hosts", "hosts_votable", "skyplot"}
    from PIL import Image

    with Image.open(d["files"]["skyplot"]) as im:
        assert im.size == (550, 425)  # 11 × 8.5 in at 50 dpi


@pytest.mark.parametrize("args, message", [
    (["--store", "{tmp}/none.sqlite", "--event", EVENT], "--store {tmp}/none.sqlite: no such file"),
    (["--store", "{store}", "--event", "GW-NOPE"], "event 'GW-NOPE' is not in the store"),
    (["--store", "{store}", "--event", EVENT, "--dpi", "5"], "--dpi=5.0 must be between 20 and 600"),
    (["--store", "{store}", "--event", EVENT, "--max-candidates", "0"], "--max-candidates=0 must be between"),
    (["--store", "{store}", "--event", EVENT, "--top-hosts", "-1"], "--top-hosts=-1 must be between 0 and 10000"),
    (["--store", "{tmp}/file.txt", "--event", EVENT], "not a usable SQLite database"),
])
def test_report_errors_are_one_line(store_path, tmp_path, capsys, args, message):
    (tmp_path / "file.txt").write_text("not a database\n" * 300)
    fill = {"tmp": str(tmp_path), "store": str(store_path)}
    argv = ["report", *[a.format(**fill) for a in args], "--out", str(tmp_path / "out")]
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert err.startswith("matcher: error: ") and message.format(**fill) in err and err.count("\n") == 1


def test_out_must_be_a_folder(store_path, tmp_path, capsys):
    (tmp_path / "f").write_text("x")
    assert main(["report", "--store", str(store_path), "--event", EVENT, "--out", str(tmp_path / "f")]) == 2
    assert "exists and is not a folder" in capsys.readouterr().err
