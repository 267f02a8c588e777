"""End to end on the invented demo scenario (matcher.demo): what the issue says it must show.

Thresholds (choices of ours, documented here): the real counterpart must rank first at
the neutron-star event's final revision with P_assoc > 0.5 and FAP < 0.05; no candidate
of the black-hole event may have P_assoc above 0.01.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from matcher.cli import main
from matcher.demo import TRUTH, write_scenario
from matcher.store import Store

ROOT = Path(__file__).resolve().parent.parent


def test_demo_config_is_packaged_identically():
    assert (ROOT / "config" / "demo.yaml").read_bytes() == (ROOT / "matcher" / "data" / "demo.yaml").read_bytes()


@pytest.mark.slow
def test_demo_end_to_end(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("MATCHER_PROGRESS", "off")
    out = tmp_path / "demo"
    # A smaller scenario than `matcher demo` writes, same construction (the command reuses it).
    sc = write_scenario(out / "scenario", n_background=2000, n_followup=300, n_galaxies=15000)
    assert main(["demo", "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert TRUTH["counterpart"] in text and TRUTH["ns_event"] in text
    summary = json.loads((out / "summary.json").read_text())["events"]
    assert set(summary) == {TRUTH["ns_event"], TRUTH["bbh_event"], TRUTH["withdrawn_event"]}

    ns = summary[TRUTH["ns_event"]]
    assert (ns["revision"], ns["state"], ns["revisions"]) == (2, "revised", [1, 2])
    best = ns["candidates"][0]
    assert best["transient_id"] == TRUTH["counterpart"]
    assert best["p_assoc"] > 0.5 and best["fap"] < 0.05
    assert best["host"] == sc.host_galaxy_id
    assert best["distance_source"] == "redshift"  # its second report carried the host's redshift
    assert ns["hosts"][0]["galaxy_id"] == sc.host_galaxy_id

    bbh = summary[TRUTH["bbh_event"]]
    assert all(c["p_assoc"] <= 0.01 for c in bbh["candidates"])

    wd = summary[TRUTH["withdrawn_event"]]
    assert wd["state"] == "withdrawn" and wd["n_candidates"] > 0
    assert all(c["status"] == "withdrawn" for c in wd["candidates"])
    with Store(out / "state" / "matcher.sqlite") as st:
        rows = st.results(event_id=TRUTH["withdrawn_event"])
        assert rows and all(r.status == "withdrawn" for r in rows)
        first = [r for r in st.results(event_id=TRUTH["ns_event"]) if r.revision == 1]
        assert all(r.status == "superseded" for r in first)
        assert st.counts()["quarantine"] == 0
    # Running the demo again replays nothing new.
    before = (out / "matches.jsonl").read_bytes()
    assert main(["demo", "--out", str(out), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["events"] == summary
    assert (out / "matches.jsonl").read_bytes() == before
