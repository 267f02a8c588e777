"""The per-event HTML page from hand-made report objects (invented data): self-contained,
escaped, every value present at full precision, the readable text faithful to it."""

from __future__ import annotations

import base64
import math
import re

import pytest

from matcher.errors import InputError
from matcher.report.html import CAUTION, format_duration, format_number, render_event_html
from matcher.report.model import (
    PNG_SIGNATURE,
    CandidateRow,
    ClassRow,
    EventReport,
    HostRow,
    ReportFigure,
    RevisionSummary,
)
from report_helpers import body_rows, cells, parse_html, small_png

NASTY = '<script>alert("x")</script>&\'"'


def _report(**over) -> EventReport:
    revs = (
        RevisionSummary(1, "issued", "2031-04-02T10:00:00.000Z", "2031-04-02T10:01:30.000Z", 2e-8, 0.99,
                        {"bns": 0.95, "terrestrial": 0.05}, 850.0, 3100.0, 210.0, 60.0, False, 2),
        RevisionSummary(2, "revised", "2031-04-02T10:00:00.000Z", "2031-04-02T10:31:30.000Z", 1.5e-9, 0.995,
                        {"bns": 0.97, "nsbh": 0.01, "terrestrial": 0.02}, 24.6, 96.25, 180.0, 40.0, True, 3),
    )
    cands = (
        CandidateRow(1, "OT-INV-17", "optical", "current", 0.8731234567, 0.00123456, 7.0512, 0.48, 210.3, 3.2e-6,
                     4.2, 0.0038, 15120.0, 3.5, 0.21, math.nan, 150.1, -30.2, 0.0003, 171.0, 9.0, "G-42", 0.71,
                     0.8731, 1, 2, "EV/2/OT-INV-17"),
        CandidateRow(2, "GRB-INV-3", "gamma_ray", "current", 0.5, 0.02, 1.0, 0.19, 0.01, 0.16, 1.0, 6.05e-7, -0.5,
                     40.0, 0.5, 3.1e-7, 151.0, -31.0, 4.0, revision=2, key="EV/2/GRB-INV-3"),
        CandidateRow(3, NASTY, "optical", "current", 3.1e-5, 0.999, 2.2e-4, revision=2),
    )
    hosts = (HostRow(1, "G-42", 150.11, -30.19, 170.0, 8.0, 0.4, 0.4),
             HostRow(2, NASTY, 150.3, -30.0, 190.0, 9.0, 0.25, 0.65))
    classes = (ClassRow("gamma_ray", -1.0, 5.0, 1.593e-5, 0.2, True, True, 1e4, 5.0),
               ClassRow("optical", 0.0, 259200.0, 0.1, 0.5, True, False, 1000.0, 0.0003, 259200.0, "surveys"))
    figs = (ReportFigure("Revision 2", small_png(), "a sky map", "caption " + NASTY),)
    kw = dict(event_id="EV-INV-1" + NASTY, revision=2, revisions=revs, candidates=cands, hosts=hosts,
              classes=classes, figures=figs, version="9.9.9", generated_at_iso="2031-04-02T11:00:00.000Z",
              config_source="configuration /etc/x.yaml", p_outside_catalog=0.12, host_note="note " + NASTY,
              notes=("a note " + NASTY,))
    kw.update(over)
    return EventReport(**kw)


def test_page_is_self_contained_and_balanced():
    page = render_event_html(_report(), links=[("candidates.ecsv", "candidates.ecsv")])
    p = parse_html(page)
    assert page.startswith("<!DOCTYPE html>")
    tags = {t for t, _ in p.tags}
    assert "script" not in tags and "link" not in tags and "iframe" not in tags and "object" not in tags
    for tag, a in p.tags:
        if "src" in a:
            assert a["src"].startswith("data:image/png;base64,"), (tag, a["src"][:40])
        if "href" in a:
            assert not re.match(r"^[a-z][a-z0-9+.-]*:", a["href"]) and not a["href"].startswith("//"), a["href"]
    style = page[page.index("<style>"):page.index("</style>")]
    assert "url(" not in style and "@import" not in style


def test_text_is_escaped_everywhere():
    page = render_event_html(_report())
    assert "<script" not in page  # the id, galaxy, caption, notes, host note all carried a script tag
    assert page.count(NASTY) == 0
    p = parse_html(page)
    text = "".join(p.text)
    assert text.count('<script>alert("x")</script>') >= 6  # shown as text, after the parser unescapes it
    ids = [cells(r)["transient_id"]["attrs"]["data-value"] for r in body_rows(p, "candidates")]
    assert ids[2] == NASTY  # attribute values round-trip through escaping


def test_candidate_cells_carry_exact_values_and_faithful_text():
    r = _report()
    p = parse_html(render_event_html(r))
    rows = body_rows(p, "candidates")
    assert len(rows) == len(r.candidates)
    for row, c in zip(rows, r.candidates):
        cs = cells(row)
        assert int(cs["rank"]["attrs"]["data-value"]) == c.rank
        for col, attr in (("p_assoc", "p_assoc"), ("fap", "fap"), ("odds", "odds"), ("prior", "prior"),
                          ("sky_per_sr", "sky_per_sr"), ("time_per_s", "time_per_s"), ("dt_s", "dt_s"),
                          ("distance_factor", "distance_factor"), ("rate_per_sr_per_s", "rate_per_sr_per_s")):
            v = float(cs[col]["attrs"]["data-value"])
            want = getattr(c, attr)
            assert (math.isnan(v) and math.isnan(want)) or v == want, (col, v, want)  # repr round-trips exactly
        for col in ("p_assoc", "fap", "odds"):
            value = getattr(c, col)
            want = float(round(value)) if 100 <= value < 1e5 else float(f"{value:.2e}")
            assert _number(cs[col]["text"]) == pytest.approx(want, rel=1e-12), col


def _number(text: str) -> float:
    """Parse our readable numbers back: '1,234', '0.873', '3.10 × 10⁻⁵', '−1.0'."""
    sup = str.maketrans("⁻⁰¹²³⁴⁵⁶⁷⁸⁹", "-0123456789")
    t = text.replace(",", "").replace("−", "-").strip()
    if "×" in t:
        mant, exp = t.split("× 10")
        return float(mant) * 10.0 ** int(exp.translate(sup))
    return float(t)


@pytest.mark.parametrize("value", [0.8731234567, 3.1e-5, 0.00123456, 7.0512, 12345.6, 1.6e6, 0.999, 1e-3, 0.25])
def test_format_number_is_three_significant_digits(value):
    # The reference is Python's own rounding to 3 significant digits ("%.2e"); numbers of 100
    # and more keep every integer digit (rounded to the unit, Python's round()).
    want = float(round(value)) if 100 <= value < 1e5 else float(f"{value:.2e}")
    assert _number(format_number(value)) == pytest.approx(want, rel=1e-12)


def test_format_edge_cases():
    assert format_number(math.nan) == "—" and format_number(0.0) == "0" and format_number(math.inf) == "∞"
    assert format_number(-2.5e-7) == "−2.50 × 10⁻⁷"
    assert format_duration(15120.0) == "+4.20 h" and format_duration(-500.0) == "−8.33 min"
    assert format_duration(259200.0) == "+3.00 d" and format_duration(0.0) == "0 s"
    assert format_duration(math.nan) == "—"


def test_page_shows_summary_tables_and_caution():
    r = _report()
    page = render_event_html(r, links=[("hosts.vot", "hosts.vot")])
    p = parse_html(page)
    text = " ".join("".join(p.text).split())
    assert " ".join(CAUTION.split()) in text
    assert "matcher 9.9.9" in text and "2031-04-02T11:00:00.000Z" in text
    assert "Best candidate: OT-INV-17 (optical)" in text and "+4.20 h after merger" in text
    assert "25 deg²" in text and "96 deg²" in text  # 50% and 90% areas of the shown revision
    assert "180 ± 40 Mpc" in text
    assert "1.50 × 10⁻⁹ per year" in text and "1 in 6.67 × 10⁸ years" in text  # FAR and 1/FAR
    assert "configuration /etc/x.yaml" in text
    # Revision history, oldest first, with states and receive times.
    revs = body_rows(p, "revisions")
    assert [cells(x)["revision"]["attrs"]["data-value"] for x in revs] == ["1", "2"]
    assert cells(revs[0])["received_at_iso"]["text"] == "2031-04-02T10:01:30.000Z"
    # Hosts with cumulative probability, and the classes with their windows and rates.
    hosts = body_rows(p, "hosts")
    assert [float(cells(h)["cum_prob"]["attrs"]["data-value"]) for h in hosts] == [0.4, 0.65]
    classes = {cells(c)["name"]["attrs"]["data-value"]: cells(c) for c in body_rows(p, "classes")}
    assert float(classes["optical"]["window_hi_s"]["attrs"]["data-value"]) == 259200.0
    assert classes["optical"]["window_hi_s"]["text"] == "+3.00 d"
    # r = 0.1 per deg² per day = 0.1 × (180/π)² / 86400 per sr per s (unit conversion, by hand).
    assert float(classes["optical"]["rate_per_sr_per_s"]["attrs"]["data-value"]) == pytest.approx(
        0.1 * (180 / math.pi) ** 2 / 86400, rel=1e-15)
    assert "Probability that the host is not in the catalogue: 0.120" in text
    assert '<a href="hosts.vot">hosts.vot</a>' in page


def test_image_is_the_figure_png():
    r = _report()
    p = parse_html(render_event_html(r))
    imgs = [a for t, a in p.tags if t == "img"]
    assert len(imgs) == 1
    data = base64.b64decode(imgs[0]["src"].split(",", 1)[1], validate=True)
    assert data == r.figures[0].png and data.startswith(PNG_SIGNATURE)
    assert (int(imgs[0]["width"]), int(imgs[0]["height"])) == (40, 30)
    assert imgs[0]["alt"] == "a sky map"


def test_withdrawn_and_empty_pages():
    base = _report()
    revs = base.revisions[:1] + (RevisionSummary(2, "withdrawn", "2031-04-02T10:00:00.000Z", is_current=True),)
    w = render_event_html(_report(revisions=revs, revision=1))
    assert "was <strong>withdrawn</strong> in revision 2" in w
    assert "Candidates, hosts and the sky plot are those of revision 1" in w
    e = parse_html(render_event_html(_report(candidates=(), hosts=(), figures=())))
    text = "".join(e.text)
    assert "No transient report has been matched to revision 2 yet" in text
    assert "no candidates matched" in text and "No host ranking." in text and "No sky plot" in text


def test_model_rejects_bad_values_with_clear_errors():
    with pytest.raises(InputError, match="candidate OT-1: p_assoc=1.5 is outside"):
        CandidateRow(1, "OT-1", "optical", p_assoc=1.5)
    with pytest.raises(InputError, match="candidate OT-1: rank=0 must be a positive integer"):
        CandidateRow(0, "OT-1", "optical")
    with pytest.raises(InputError, match="host G1: ra_deg=400.0 is outside"):
        HostRow(1, "G1", 400.0, 0.0)
    with pytest.raises(InputError, match="png must be the bytes of a PNG file"):
        ReportFigure("x", b"GIF89a....", "alt")
    with pytest.raises(InputError, match="class optical: window .* must have lo < hi"):
        ClassRow("optical", 5.0, 1.0, 0.1, 0.5, True, False)
    base = _report()
    with pytest.raises(InputError, match="exactly one revision must be current"):
        _report(revisions=tuple(RevisionSummary(v.revision, v.state, v.merger_time_iso) for v in base.revisions))
    with pytest.raises(InputError, match="candidate ranks must be distinct and in order"):
        _report(candidates=base.candidates[::-1])
    with pytest.raises(InputError, match="revision 7 is not among the revisions"):
        _report(revision=7)


def test_table_columns_cover_every_model_field():
    from matcher.report.model import CANDIDATE_FIELDS, HOST_FIELDS
    from matcher.report.tables import CANDIDATE_COLUMNS, HOST_COLUMNS

    assert tuple(CANDIDATE_COLUMNS) == CANDIDATE_FIELDS and tuple(HOST_COLUMNS) == HOST_FIELDS
    assert set(CANDIDATE_FIELDS) == set(CandidateRow.__dataclass_fields__)
    assert set(HOST_FIELDS) == set(HostRow.__dataclass_fields__)
