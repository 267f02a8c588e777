"""The service writes per-event reports on every new revision (``reports: {html: {kind: html, ...}}``),
and what they show equals the service's own ``summary.json`` (a second implementation of the ranking,
the exact P_assoc and the host list), on the small invented demo scenario (report_helpers.demo_replay)."""

from __future__ import annotations

import json

import pytest
from astropy.table import Table

from matcher.demo import TRUTH
from matcher.errors import ConfigError
from report_helpers import body_rows, cells, demo_replay, parse_html


@pytest.fixture(scope="module")
def replay(tmp_path_factory):
    return demo_replay(tmp_path_factory)


def test_service_wrote_a_report_per_event(replay):
    summary = json.loads((replay / "summary.json").read_text())["events"]
    written = sorted(p.name for p in (replay / "reports").iterdir() if p.is_dir())
    assert written == sorted(summary) == sorted([TRUTH["ns_event"], TRUTH["bbh_event"], TRUTH["withdrawn_event"]])
    for eid, ev in summary.items():
        t = Table.read(replay / "reports" / eid / "candidates.ecsv", format="ascii.ecsv")
        assert t.meta["current_revision"] == ev["revision"] and t.meta["event_state"] == ev["state"]
        assert len(t) == min(ev["n_candidates"], 100) and t.meta["n_candidates_total"] == ev["n_candidates"]
        for row, c in zip(t, ev["candidates"]):
            assert (row["rank"], row["transient_id"], row["status"]) == (c["rank"], c["transient_id"], c["status"])
            assert row["p_assoc"] == c["p_assoc"] and row["odds"] == c["odds"] and row["fap"] == c["fap"]


def test_reports_show_the_summary_hosts_and_the_withdrawal(replay):
    summary = json.loads((replay / "summary.json").read_text())["events"]
    ns = summary[TRUTH["ns_event"]]
    hosts = Table.read(replay / "reports" / TRUTH["ns_event"] / "hosts.ecsv", format="ascii.ecsv")
    assert len(hosts) == 10  # top_hosts: 10 in the writer's options
    for row, g in zip(hosts, ns["hosts"]):
        assert (row["rank"], str(row["galaxy_id"]), row["p_host"], row["cum_prob"]) == (
            g["rank"], str(g["galaxy_id"]), g["prob"], g["cum_prob"])
    page = (replay / "reports" / TRUTH["withdrawn_event"] / "index.html").read_text(encoding="utf-8")
    assert "was <strong>withdrawn</strong>" in page
    rows = body_rows(parse_html(page), "candidates")
    assert rows and {cells(r)["status"]["text"] for r in rows} == {"withdrawn"}
    bbh = (replay / "reports" / TRUTH["bbh_event"] / "index.html").read_text(encoding="utf-8")
    assert "No transient report has been matched to revision 1 yet" in bbh


def test_service_rejects_bad_writer_options(tmp_path):
    from matcher.config import config_from_mapping
    from matcher.service import Service, report_writer_kinds

    assert "html" in report_writer_kinds()
    cfg = config_from_mapping({"state_dir": str(tmp_path / "state"),
                               "reports": {"web": {"kind": "html", "plots": "every"}}}, base_dir=tmp_path)
    with pytest.raises(ConfigError, match=r"config reports.web.plots: must be one of current, all, got 'every'"):
        Service(cfg, sources=[], sinks=[])
