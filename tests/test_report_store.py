"""The per-event report read from the store the service filled (the small invented demo scenario,
report_helpers.demo_replay): what it shows equals the store, the map files and a hand computation
of the model's formulas; the tables read back with astropy equal the stored values."""

from __future__ import annotations

import json
import math
from collections import defaultdict

import numpy as np
import pytest
from astropy.table import Table

from matcher.coincidence import posterior_odds
from matcher.config import load_config
from matcher.demo import TRUTH
from matcher.errors import ConfigError, InputError
from matcher.lifecycle import MatchSettings
from matcher.report.from_store import event_report_from_store, exact_association
from matcher.report.settings import ReportSettings, parse_report_settings
from matcher.report.writer import REPORT_FILES, HtmlReportWriter, build_html_writer, event_folder_name, \
    render_report_files, write_report_files
from matcher.sky import read_skymap
from matcher.store import Store
from report_helpers import demo_replay

NS, BBH, WD = TRUTH["ns_event"], TRUTH["bbh_event"], TRUTH["withdrawn_event"]
FAST = ReportSettings(dpi=30.0)  # where the figure is not looked at


@pytest.fixture(scope="module")
def replay(tmp_path_factory):
    return demo_replay(tmp_path_factory)


@pytest.fixture(scope="module")
def store(replay):
    s = Store(replay / "state" / "matcher.sqlite")
    yield s
    s.close()


@pytest.fixture(scope="module")
def config(replay):
    return load_config(replay / "demo.yaml")


@pytest.fixture(scope="module")
def report(store, config):
    return event_report_from_store(store, NS, config)


def _hosts_payload(store, event_id, revision):
    found, seq = None, 0
    while rows := store.outbox_after(seq, 5000):
        for r in rows:
            if r.kind == "hosts" and r.key == f"{event_id}/{revision}":
                found = json.loads(r.payload)
        seq = rows[-1].seq
    return found


def test_revisions_and_areas(store, report):
    assert [r.revision for r in report.revisions] == [1, 2]
    assert [r.is_current for r in report.revisions] == [False, True]
    assert [r.state for r in report.revisions] == ["issued", "revised"]
    assert report.revision == 2 and report.current.revision == 2
    assert report.revisions[0].received_at_iso < report.revisions[1].received_at_iso
    sr = store.current_revision(NS)
    assert report.current.far_per_year == sr.alert.far_per_year
    assert dict(report.current.source_probs) == dict(sr.alert.source_probs)
    # The stored map is the scenario's file: the areas equal those of the file read directly.
    m = read_skymap(sr.alert.localization.resolved_path())
    a50, a90 = m.credible_areas([0.5, 0.9])
    assert (report.shown.area50_deg2, report.shown.area90_deg2) == (float(a50), float(a90))
    assert (report.shown.distance_mpc, report.shown.distance_err_mpc) == tuple(float(v) for v in m.distance_marginal())
    n_rev = defaultdict(int)
    for r in store.results(NS):
        n_rev[r.revision] += 1
    assert [r.n_results for r in report.revisions] == [n_rev[1], n_rev[2]]


def test_candidates_equal_the_stored_records_and_the_formulas(store, report):
    cands = report.candidates
    results = {r.transient_id: r for r in store.results(NS) if r.revision == 2 and r.record.get("candidate")}
    assert [c.rank for c in cands] == list(range(1, len(results) + 1)) and len(cands) > 5
    assert cands[0].transient_id == TRUTH["counterpart"]
    # P_i = O_i / (1 + Σ_j O_j) within the class, summed here with math.fsum (a second computation; the
    # service sums in steps of 2**-40, so the two agree to ~1e-12 in absolute terms).
    sums = defaultdict(list)
    for r in results.values():
        sums[r.record["class"]].append(r.record["odds"])
    classes = {c.name: c for c in report.classes}
    stored = {s.report.transient_id: s.report for s in store.transients_between(-1e12, 1e12)}
    for c in cands:
        rec = results[c.transient_id].record
        assert c.p_assoc == pytest.approx(rec["odds"] / (1.0 + math.fsum(sums[rec["class"]])), rel=1e-12, abs=1e-12)
        # The service publishes P rounded (MatchSettings.p_assoc_decimals); the report's exact P rounds to it.
        assert c.p_assoc_published == rec["p_assoc"] == round(c.p_assoc, MatchSettings().p_assoc_decimals)
        assert c.rank_published == (rec["rank"] or 0)
        if rec["rank"] is not None:
            assert c.rank == rec["rank"]  # the published ranks (the first five) are the report's
        assert (c.odds, c.fap, c.dt_s, c.status) == (rec["odds"], rec["fap"], rec["dt_s"], "current")
        # O = π/(1-π) · I · T · D / r (DESIGN.md; matcher.coincidence.odds), with r from the classes shown.
        want = posterior_odds(c.prior, c.sky_per_sr, c.time_per_s, c.distance_factor,
                              classes[c.klass].rate_per_sr_per_s)
        assert c.odds == pytest.approx(float(want), rel=1e-12, abs=1e-300)
        rep = stored[c.transient_id]
        assert (c.ra_deg, c.dec_deg) == (rep.ra_deg, rep.dec_deg)
        assert c.best_host_id == str((rec.get("host") or {}).get("galaxy_id") or "")
        used = rec["distance"]["mpc"]  # null when the scoring had no distance: then the report's own, if any
        own = math.nan if rep.distance_mpc is None else rep.distance_mpc
        assert c.distance_mpc == used if used is not None else (c.distance_mpc == own or math.isnan(own))


def test_exact_association_by_hand():
    rows = [("a", "x", 3.0, 0.1), ("b", "x", 1.0, 0.2), ("c", "y", 4.0, 0.3), ("d", "x", 1.0, 0.05)]
    got = exact_association(rows)
    assert got == exact_association(rows[::-1])  # order-independent
    assert got["a"][0] == 3.0 / 6.0 and got["c"][0] == 4.0 / 5.0  # O/(1+ΣO) per class, by hand
    assert [t for t, _ in sorted(got.items(), key=lambda kv: kv[1][1])] == ["c", "a", "d", "b"]  # equal P: FAP


def test_hosts_from_the_stored_ranking(store, report):
    payload = _hosts_payload(store, NS, 2)
    assert len(report.hosts) == len(payload["galaxies"]) == 10
    for h, g in zip(report.hosts, payload["galaxies"]):
        assert (h.rank, h.galaxy_id, h.p_host, h.cum_prob, h.ra_deg) == (g["rank"], str(g["galaxy_id"]), g["prob"],
                                                                         g["cum_prob"], g["ra_deg"])
    # Cumulative probability is the running sum (numpy's cumsum as the second computation).
    assert np.allclose([h.cum_prob for h in report.hosts], np.cumsum([h.p_host for h in report.hosts]), rtol=1e-12)
    p_out = payload.get("p_outside_catalog")
    assert (math.isnan(report.p_outside_catalog) and p_out is None) or report.p_outside_catalog == p_out
    assert "published by the service" in report.host_note


def test_figure_and_classes(report, config):
    assert len(report.figures) == 1
    f = report.figures[0]
    assert (f.width_px, f.height_px) == (1100, 850)  # 11 × 8.5 in at 100 dpi (the sky plot's default)
    assert f"{report.n_candidates_total} candidates" in f.alt
    assert [c.name for c in report.classes] == sorted(config.classes())
    assert report.config_source.startswith("the packaged defaults")  # demo.yaml has no classes: section


def test_tables_read_back_equal_to_the_store(store, report, tmp_path):
    files = write_report_files(render_report_files(report), tmp_path / "out")
    cand = Table.read(files["candidates"], format="ascii.ecsv")
    results = {r.transient_id: r for r in store.results(NS) if r.revision == 2}
    assert list(cand["transient_id"]) == [c.transient_id for c in report.candidates]
    for row in cand:
        res = results[row["transient_id"]]
        rec = res.record
        assert row["key"] == res.key and row["status"] == res.status and row["class"] == rec["class"]
        assert row["odds"] == rec["odds"] and row["fap"] == rec["fap"] and row["dt_s"] == rec["dt_s"]
        assert row["p_assoc_published"] == rec["p_assoc"] and row["rank_published"] == (rec["rank"] or 0)
        for term in ("prior", "sky_per_sr", "time_per_s", "distance_factor"):
            assert row[term] == rec["terms"][term]
        assert row["searched_area_deg2"] == rec["searched_area_deg2"]
        host = rec.get("host")
        if host is None:
            assert np.ma.is_masked(row["best_host_id"]) and np.isnan(row["best_host_prob"])
        else:
            assert str(row["best_host_id"]) == str(host["galaxy_id"]) and row["best_host_prob"] == host["prob"]
    assert str(cand["dt_s"].unit) == "s" and str(cand["sky_per_sr"].unit) == "1 / sr"
    assert cand.meta["event_id"] == NS and cand.meta["revision"] == 2

    payload = _hosts_payload(store, NS, 2)
    ecsv = Table.read(files["hosts"], format="ascii.ecsv")
    vot = Table.read(files["hosts_votable"], format="votable")
    for t in (ecsv, vot):
        assert len(t) == 10
        for row, g in zip(t, payload["galaxies"]):
            assert row["rank"] == g["rank"] and str(row["galaxy_id"]) == str(g["galaxy_id"])
            for col, key in (("p_host", "prob"), ("cum_prob", "cum_prob"), ("ra_deg", "ra_deg"),
                             ("dec_deg", "dec_deg"), ("distance_mpc", "distance_mpc"),
                             ("distance_err_mpc", "distance_err_mpc")):
                assert float(row[col]) == g[key], (col, row[col], g[key])
        assert str(t["distance_mpc"].unit) == "Mpc"
    assert not list((tmp_path / "out").glob(".*.tmp"))  # no temporary file left behind


def test_withdrawn_event(store, config):
    r = event_report_from_store(store, WD, config, settings=FAST)
    assert r.current.state == "withdrawn" and r.current.revision == 2 and r.withdrawn
    assert r.revision == 1  # the last revision with a localization is the one shown
    assert r.candidates and {c.status for c in r.candidates} == {"withdrawn"}
    assert len(r.figures) == 1
    assert any("withdrew the event" in n for n in r.notes)
    page = render_report_files(r)["html"].decode()
    assert "was <strong>withdrawn</strong> in revision 2" in page


def test_settings_limit_rows_and_plots(store, config):
    s = ReportSettings(max_candidates=2, top_hosts=0, plots="all", dpi=30.0)
    r = event_report_from_store(store, NS, config, settings=s)
    assert [c.rank for c in r.candidates] == [1, 2] and r.n_candidates_total > 2
    assert r.hosts == () and "turned off" in r.host_note
    assert [f.title for f in r.figures] == ["Revision 2", "Revision 1"]
    assert f"2 shown of {r.n_candidates_total}" in render_report_files(r)["html"].decode()


def test_unknown_event_is_a_clear_error(store):
    with pytest.raises(InputError, match=r"event 'GW-NOPE' is not in the store .*matcher.sqlite \(active events: "):
        event_report_from_store(store, "GW-NOPE")


def test_writer_replaces_files_and_drops_a_stale_plot(report, tmp_path):
    out = tmp_path / "ev"
    files = render_report_files(report)
    assert set(write_report_files(files, out)) == set(REPORT_FILES)
    del files["skyplot"]
    write_report_files(files, out)
    assert not (out / "skyplot.png").exists() and (out / "index.html").exists()
    assert event_folder_name("a/b c") == "a%2Fb%20c" and event_folder_name(".hidden") == "%2Ehidden"


def test_report_settings_from_yaml_mapping(tmp_path):
    s = parse_report_settings({"out": "r", "max_candidates": 5, "plots": "all", "dpi": 72}, tmp_path)
    assert s.out == tmp_path / "r" and s.max_candidates == 5 and s.plots == "all" and s.dpi == 72.0
    assert parse_report_settings(None, tmp_path) == ReportSettings(out=tmp_path / "reports")
    with pytest.raises(ConfigError, match=r"config reports.html.plots: must be one of current, all, got 'every'"):
        parse_report_settings({"plots": "every"}, tmp_path)
    with pytest.raises(ConfigError, match=r"config reports.web.max_candidate: unknown key; did you mean "
                                          r"'max_candidates'"):
        parse_report_settings({"max_candidate": 3}, tmp_path, "reports.web")
    with pytest.raises(ConfigError, match=r"config reports.html.dpi: must be <= 600"):
        parse_report_settings({"dpi": 6000}, tmp_path)
    assert parse_report_settings({"refresh_s": None}, tmp_path).refresh_s is None
    assert parse_report_settings({}, tmp_path).refresh_s == 60.0
    with pytest.raises(ConfigError, match=r"config reports.html.refresh_s: must be >= 0"):
        parse_report_settings({"refresh_s": -1}, tmp_path)


def test_html_writer_writes_the_event_folder_and_raises_on_failure(store, tmp_path):
    w = build_html_writer("html", {"out": "reports", "top_hosts": 5, "dpi": 30}, tmp_path)
    assert w.name == "html" and w.settings.top_hosts == 5
    w.on_revision(store, BBH, 1, "issued")
    assert (tmp_path / "reports" / BBH / "index.html").exists() and w.last.n_candidates == 0
    with pytest.raises(InputError, match="GW-NOPE"):
        w.on_revision(store, "GW-NOPE", 1, "issued")
    assert (w.written, w.failed) == (1, 1)
    w.close()


def test_html_writer_follows_result_changes_between_revisions(replay, tmp_path):
    import shutil

    shutil.copyfile(replay / "state" / "matcher.sqlite", tmp_path / "copy.sqlite")
    now = [1000.0]
    w = HtmlReportWriter("html", parse_report_settings({"out": "r", "refresh_s": 60, "dpi": 30}, tmp_path),
                         clock=lambda: now[0])
    with Store(tmp_path / "copy.sqlite") as st:
        w.after_batch(st)  # not attached: the whole outbox is followed; every event with results is due
        assert w.written == 2 and w.pending == set()
        assert sorted(p.name for p in (tmp_path / "r").iterdir()) == sorted([NS, WD])
        w.after_batch(st)
        assert w.written == 2  # nothing changed since
        key = next(r.key for r in st.results(NS) if r.revision == 2)
        with st.transaction() as tx:  # a result of NS changes (as when a later report arrives)
            tx.enqueue("match", key, {"event_id": NS})
        now[0] += 30.0
        w.after_batch(st)
        assert w.pending == {NS} and w.written == 2  # written 30 s ago: waits for refresh_s
        now[0] += 31.0
        w.after_batch(st)
        assert w.pending == set() and w.written == 3
        with st.transaction() as tx:
            tx.enqueue("match", key, {"event_id": NS})
        w.after_batch(st)
        assert w.pending == {NS}
        w.close()  # the service stops: what waits is written once more
        assert w.pending == set() and w.written == 4
    never = HtmlReportWriter("html", parse_report_settings({"out": "r2", "refresh_s": None}, tmp_path))
    with Store(tmp_path / "copy.sqlite") as st:
        never.after_batch(st)
    assert never.written == 0 and not (tmp_path / "r2").exists()
