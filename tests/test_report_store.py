"""The per-event report read from a store holding one invented event (see report_helpers):
what it shows equals the store, the engine and the formulas; the tables read back equal."""

from __future__ import annotations

import math

import numpy as np
import pytest
from astropy.table import Table

from matcher.coincidence import default_classes, posterior_odds, score_reports
from matcher.errors import ConfigError, InputError
from matcher.report.from_store import event_report_from_store, exact_association
from matcher.report.settings import ReportSettings, parse_report_settings
from matcher.report.writer import (
    REPORT_FILES,
    build_html_writer,
    event_folder_name,
    render_report_files,
    write_event_report,
    write_report_files,
)
from matcher.sky import read_skymap
from report_helpers import EVENT, ROOT, demo_store, withdraw


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    s = demo_store(tmp_path_factory)
    yield s
    s.close()


@pytest.fixture(scope="module")
def report(store):
    return event_report_from_store(store, EVENT)


def test_revisions_and_areas(report):
    assert [r.revision for r in report.revisions] == [1, 2]
    assert [r.is_current for r in report.revisions] == [False, True]
    assert [r.state for r in report.revisions] == ["issued", "revised"]
    assert report.revision == 2 and report.current.revision == 2
    assert report.revisions[0].received_at_iso < report.revisions[1].received_at_iso
    assert report.revisions[1].far_per_year == 1.1e-9
    assert dict(report.revisions[1].source_probs) == {"bns": 0.91, "nsbh": 0.04, "terrestrial": 0.03, "bbh": 0.02}
    # The stored map is the fixture file: the areas equal those of the file read directly.
    m = read_skymap(ROOT / "fixtures" / "skymaps" / "demo_blob.multiorder.fits.gz")
    a50, a90 = m.credible_areas([0.5, 0.9])
    assert (report.shown.area50_deg2, report.shown.area90_deg2) == (float(a50), float(a90))
    assert (report.shown.distance_mpc, report.shown.distance_err_mpc) == tuple(float(v) for v in m.distance_marginal())
    assert report.revisions[1].n_results == 4 and report.revisions[0].n_results == 4


def test_candidates_equal_the_engine_and_the_formula(store, report):
    cands = report.candidates
    assert [c.rank for c in cands] == [1, 2, 3, 4]
    assert "AT-DEMO-7x" not in {c.transient_id for c in cands}  # before the merger: never a candidate
    # A second computation: the engine scores the same stored reports against the stored revision.
    sr = store.current_revision(EVENT)
    from matcher.sky import skymap_from_bytes

    skymap = skymap_from_bytes(store.localization_data(sr.localization_sha))
    stored = {s.report.transient_id: s.report for s in store.transients_between(-1e12, 1e12)}
    table = score_reports(sr.alert, skymap, [stored[c.transient_id] for c in cands], default_classes())
    classes = {c.name: c for c in report.classes}
    results = {r.transient_id: r.record for r in store.results(EVENT) if r.revision == 2}
    for j, c in enumerate(cands):
        # P_assoc recomputed from stored odds equals the engine's O/(1+ΣO) within its class.
        assert c.p_assoc == pytest.approx(float(table.p_assoc[j]), rel=1e-12, abs=1e-300)
        rec = results[c.transient_id]
        assert c.p_assoc_published == rec["p_assoc"] == round(c.p_assoc, 4)
        assert c.rank_published == (rec["rank"] or 0) == c.rank  # every rank here is within the published five
        assert (c.odds, c.fap, c.dt_s) == (rec["odds"], rec["fap"], rec["dt_s"])
        # O = π/(1-π) · I · T · D / r (DESIGN.md; matcher.coincidence.odds), r from the classes shown.
        want = posterior_odds(c.prior, c.sky_per_sr, c.time_per_s, c.distance_factor,
                              classes[c.klass].rate_per_sr_per_s)
        assert c.odds == pytest.approx(float(want), rel=1e-12, abs=1e-300)
        rep = stored[c.transient_id]
        assert (c.ra_deg, c.dec_deg, c.pos_err_deg) == (rep.ra_deg, rep.dec_deg, rep.pos_err_deg)
        assert c.best_host_id == rec["host"]["galaxy_id"] and c.status == "current"
    # The gamma-ray trigger has its class to itself: P = O/(1+O).
    grb = next(c for c in cands if c.klass == "gamma_ray")
    assert grb.p_assoc == pytest.approx(grb.odds / (1 + grb.odds), rel=1e-15)


def test_exact_association_is_order_independent():
    rows = [("a", "x", 3.0, 0.1), ("b", "x", 1.0, 0.2), ("c", "y", 4.0, 0.3), ("d", "x", 1.0, 0.05)]
    got = exact_association(rows)
    assert got == exact_association(rows[::-1])
    assert got["a"][0] == 3.0 / 6.0 and got["c"][0] == 4.0 / 5.0  # by hand: O/(1+ΣO) per class
    assert [t for t, _ in sorted(got.items(), key=lambda kv: kv[1][1])] == ["c", "a", "d", "b"]  # equal P: FAP


def test_hosts_from_the_stored_ranking(store, report):
    payload = next(
        __import__("json").loads(r.payload) for r in reversed(store.outbox_after(0, 100000))
        if r.kind == "hosts" and r.key == f"{EVENT}/2")
    assert len(report.hosts) == 20
    for h, g in zip(report.hosts, payload["galaxies"]):
        assert (h.rank, h.galaxy_id, h.p_host, h.cum_prob, h.ra_deg) == (g["rank"], str(g["galaxy_id"]), g["prob"],
                                                                         g["cum_prob"], g["ra_deg"])
    # Cumulative probability is the running sum (numpy's cumsum as the second computation).
    assert np.allclose([h.cum_prob for h in report.hosts], np.cumsum([h.p_host for h in report.hosts]), rtol=1e-12)
    assert math.isnan(report.p_outside_catalog)  # no completeness model: not assessed
    assert "published by the service" in report.host_note


def test_figure_and_classes(report):
    assert len(report.figures) == 1
    f = report.figures[0]
    assert (f.width_px, f.height_px) == (1100, 850)  # 11 × 8.5 in at 100 dpi (the sky plot's default)
    assert "4 candidates" in f.alt
    assert [c.name for c in report.classes] == sorted(default_classes())
    assert report.config_source.startswith("the packaged defaults")


def test_tables_read_back_equal_to_the_store(store, report, tmp_path):
    files = write_report_files(render_report_files(report), tmp_path / "out")
    cand = Table.read(files["candidates"], format="ascii.ecsv")
    results = {r.transient_id: r for r in store.results(EVENT) if r.revision == 2}
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
        assert row["best_host_id"] == rec["host"]["galaxy_id"] and row["best_host_prob"] == rec["host"]["prob"]
    assert str(cand["dt_s"].unit) == "s" and str(cand["sky_per_sr"].unit) == "1 / sr"
    assert cand.meta["event_id"] == EVENT and cand.meta["revision"] == 2

    import json

    payload = next(json.loads(r.payload) for r in reversed(store.outbox_after(0, 100000))
                   if r.kind == "hosts" and r.key == f"{EVENT}/2")
    ecsv = Table.read(files["hosts"], format="ascii.ecsv")
    vot = Table.read(files["hosts_votable"], format="votable")
    for t in (ecsv, vot):
        assert len(t) == 20
        for row, g in zip(t, payload["galaxies"]):
            assert row["rank"] == g["rank"] and str(row["galaxy_id"]) == str(g["galaxy_id"])
            for col, key in (("p_host", "prob"), ("cum_prob", "cum_prob"), ("ra_deg", "ra_deg"),
                             ("dec_deg", "dec_deg"), ("distance_mpc", "distance_mpc"),
                             ("distance_err_mpc", "distance_err_mpc")):
                assert float(row[col]) == g[key], (col, row[col], g[key])
        assert str(t["distance_mpc"].unit) == "Mpc"
    assert not list((tmp_path / "out").glob(".*.tmp"))  # no temporary file left behind


def test_withdrawn_event(tmp_path_factory, tmp_path):
    s = demo_store(tmp_path_factory, tmp_path)
    try:
        withdraw(s, tmp_path)
        r = event_report_from_store(s, EVENT)
    finally:
        s.close()
    assert r.current.state == "withdrawn" and r.current.revision == 3 and r.withdrawn
    assert r.revision == 2  # the last revision with a localization is the one shown
    assert {c.status for c in r.candidates} == {"withdrawn"}
    assert len(r.figures) == 1
    assert any("withdrew the event" in n for n in r.notes)
    page = render_report_files(r)["html"].decode()
    assert "was <strong>withdrawn</strong> in revision 3" in page


def test_settings_limit_rows_and_plots(store):
    r = event_report_from_store(store, EVENT, settings=ReportSettings(max_candidates=2, top_hosts=0, plots="all"))
    assert [c.rank for c in r.candidates] == [1, 2] and r.n_candidates_total == 4
    assert r.hosts == () and "turned off" in r.host_note
    assert [f.title for f in r.figures] == ["Revision 2", "Revision 1"]
    assert "2 shown of 4" in render_report_files(r)["html"].decode()


def test_unknown_event_is_a_clear_error(store):
    with pytest.raises(InputError, match=r"event 'GW-NOPE' is not in the store .*matcher.sqlite"):
        event_report_from_store(store, "GW-NOPE")


def test_writer_replaces_files_and_drops_a_stale_plot(store, report, tmp_path):
    out = tmp_path / "ev"
    w = write_event_report(store, EVENT, out)
    assert set(w.files) == set(REPORT_FILES) and w.n_candidates == 4 and w.n_hosts == 20
    files = render_report_files(report)
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


def test_html_writer_writes_the_event_folder_and_raises_on_failure(store, tmp_path):
    w = build_html_writer("html", {"out": "reports", "top_hosts": 5}, tmp_path)
    assert w.name == "html" and w.settings.top_hosts == 5
    w.on_revision(store, EVENT, 2, "revised")
    assert (tmp_path / "reports" / EVENT / "index.html").exists() and w.last.n_hosts == 5
    with pytest.raises(InputError, match="GW-NOPE"):
        w.on_revision(store, "GW-NOPE", 1, "issued")
    assert (w.written, w.failed) == (1, 1)
    w.close()
