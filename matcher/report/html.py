"""The per-event report as one self-contained HTML page.

:func:`render_event_html` is pure: an :class:`~matcher.report.model.EventReport`
in, an HTML string out. The page needs nothing else to display: the style is
inline CSS, the figures are PNG data URIs, there is no script and no external
font, stylesheet or image. The only links point to the table files written
beside it (relative names) and to anchors in the page. Every piece of text
from the data is escaped with :func:`html.escape`.

What a reader meets, top to bottom: the event and its state; the caution that
the page is a decision aid; one headline sentence about the best candidate;
the key facts (areas, distance, FAR, source probabilities); the sky plot; the
ranked candidate table with the odds and its terms; the host galaxies with
their cumulative probability; the revision history; the classes (windows and
rates) the scoring used; the files, tool version and time of writing.

Every numeric table cell carries its full-precision value in ``data-value``
(``repr`` of the float, ``nan`` when missing) and its column in ``data-col``,
so that programs (and the browser test) can compare the page with the tables.

The look follows :mod:`matcher.report.palette` (paper, sand, clay, brick,
plum, ink); meaning never rests on colour alone (badges carry words, bars
carry numbers), and a print style sheet drops backgrounds that printers waste
ink on and keeps table headers on every page.
"""

from __future__ import annotations

import base64
import html
import math
from typing import Sequence

from matcher.report.model import CandidateRow, ClassRow, EventReport, HostRow, ReportFigure, RevisionSummary

__all__ = ["render_event_html", "CAUTION", "format_number", "format_duration"]

#: The caution every report carries.
CAUTION = ("This report is a decision aid computed by matcher from the alerts it received and the model "
           "configured below. It does not replace the vetting of the collaboration that issued the alert, "
           "nor the judgement of the observers who act on it. Probabilities depend on the class windows and "
           "background rates listed under Configuration.")

# Palette (matcher.report.palette): the sky colour map's anchors and the marker colours.
_PAPER, _SAND, _CLAY, _BRICK, _PLUM, _AUBERGINE, _INK = (
    "#f7f4ec", "#efdca6", "#e0a867", "#c66f4a", "#98405a", "#5b2a5e", "#15131f")
_CANDIDATE, _HOST = "#2a9df4", "#0d5c63"

_SUPERSCRIPT = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")
_DASH = "—"


def _e(value) -> str:
    return html.escape(str(value), quote=True)


def _nan(v) -> bool:
    return v is None or (isinstance(v, float) and math.isnan(v))


def format_number(v: float, digits: int = 3) -> str:
    """A number for people: ``digits`` significant digits (every integer digit from 100 up), ``a × 10ⁿ``
    outside [0.001, 10⁵).

    NaN is an em dash, zero is ``0``, infinity is ``∞``.

    Examples
    --------
    >>> format_number(0.87349)
    '0.873'
    >>> format_number(3.1e-5)
    '3.10 × 10⁻⁵'
    >>> format_number(12345.6)
    '12,346'
    """
    if _nan(v):
        return _DASH
    v = float(v)
    if v == 0.0:
        return "0"
    if math.isinf(v):
        return "∞" if v > 0 else "−∞"
    a = abs(v)
    sign = "−" if v < 0 else ""
    if 1e-3 <= a < 1e5:
        exp = math.floor(math.log10(a))
        decimals = max(digits - 1 - exp, 0)
        text = f"{a:,.{decimals}f}"
        return sign + text
    mant, exp = f"{a:.{digits - 1}e}".split("e")
    return f"{sign}{mant} × 10{str(int(exp)).translate(_SUPERSCRIPT)}"


def format_duration(seconds: float) -> str:
    """A signed time offset for people: seconds under 2 min, minutes under 2 h, hours under 2 days, days beyond.

    Examples
    --------
    >>> format_duration(15120.0)
    '+4.20 h'
    >>> format_duration(-500.0)
    '−8.33 min'
    >>> format_duration(-0.5)
    '−0.500 s'
    """
    if _nan(seconds):
        return _DASH
    s = float(seconds)
    sign = "−" if s < 0 else "+"
    a = abs(s)
    if a < 120.0:
        return f"{sign}{format_number(a)} s" if a else "0 s"
    if a < 7200.0:
        return f"{sign}{format_number(a / 60.0)} min"
    if a < 2 * 86400.0:
        return f"{sign}{format_number(a / 3600.0)} h"
    return f"{sign}{format_number(a / 86400.0)} d"


def _area(v: float) -> str:
    if _nan(v):
        return _DASH
    if 0 < v < 0.1:
        return f"{format_number(v, 2)} deg²"
    return f"{v:,.1f} deg²" if v < 10 else f"{v:,.0f} deg²"


def _mpc(d: float, e: float) -> str:
    if _nan(d):
        return _DASH
    return f"{d:,.0f} ± {e:,.0f} Mpc" if not _nan(e) else f"{d:,.0f} Mpc"


def _once_in(far: float) -> str:
    """``1 in N years`` (or days, for a FAR above one per year)."""
    if far > 1.0:
        return f"1 in {format_number(365.25 / far)} days"
    return f"1 in {format_number(1.0 / far)} years"


def _far_html(far: float) -> str:
    if _nan(far):
        return _DASH
    if far == 0:
        return "0 per year"
    return f'{_e(format_number(far))} per year<span class="hint block">{_e(_once_in(far))}</span>'


def _value_attr(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return "nan" if math.isnan(v) else repr(v)
    return str(v)


def _td(col: str, value, text: str, cls: str = "num") -> str:
    return (f'<td class="{cls}" data-col="{_e(col)}" data-value="{_e(_value_attr(value))}">{_e(text)}</td>')


def _td_text(col: str, value: str, cls: str = "") -> str:
    c = f' class="{cls}"' if cls else ""
    return f'<td{c} data-col="{_e(col)}" data-value="{_e(value)}">{_e(value) if value else _DASH}</td>'


# ---------------------------------------------------------------------- sections
def _masthead(r: EventReport) -> str:
    cur, shown = r.current, r.shown
    state = cur.state
    sub = [f"revision {cur.revision}", f"merger {cur.merger_time_iso}"]
    if cur.received_at_iso:
        sub.append(f"received {cur.received_at_iso}")
    shown_note = ""
    if shown.revision != cur.revision:
        shown_note = (f'<p class="shown">Candidates, hosts and the sky plot are those of revision '
                      f'{shown.revision}, the last one with a localization.</p>')
    return (
        '<header class="masthead">'
        f'<p class="kicker">matcher · per-event report{_e(" · written " + r.generated_at_iso) if r.generated_at_iso else ""}'
        '</p>'
        f'<h1><span class="event-id">{_e(r.event_id)}</span> '
        f'<span class="badge state-{_e(state)}">{_e(state)}</span></h1>'
        f'<p class="sub">{" · ".join(_e(s) for s in sub)}</p>'
        f'{shown_note}'
        '</header>'
    )


def _caution() -> str:
    return f'<aside class="caution" role="note"><strong>Decision aid.</strong> {_e(CAUTION)}</aside>'


def _headline(r: EventReport) -> str:
    if r.withdrawn:
        return (f'<p class="headline withdrawn">This event was <strong>withdrawn</strong> in revision '
                f'{r.current.revision}. Its results are kept, marked withdrawn; do not act on them.</p>')
    if not r.candidates:
        return (f'<p class="headline">No transient report has been matched to revision {r.revision} yet. '
                'The sky plot and host galaxies below show where to look.</p>')
    c = r.candidates[0]
    parts = [f'Best candidate: <strong>{_e(c.transient_id)}</strong> ({_e(c.klass)})',
             f'P<sub>assoc</sub> {_e(format_number(c.p_assoc))}', f'FAP {_e(format_number(c.fap))}',
             f'{_e(format_duration(c.dt_s))} after merger']
    if c.best_host_id:
        parts.append(f'best host galaxy {_e(c.best_host_id)}')
    more = r.n_candidates_total - 1
    if more > 0 and r.n_candidates_total > len(r.candidates):
        tail = f" {more} more candidates; the best {len(r.candidates)} are listed below."
    elif more > 0:
        tail = f' {more} more candidate{"s" if more != 1 else ""} below.'
    else:
        tail = ""
    return f'<p class="headline">{", ".join(parts)}.{_e(tail)}</p>'


_PROB_ORDER = ("bns", "nsbh", "bbh", "terrestrial")


def _ordered_probs(probs) -> list[tuple[str, float]]:
    """Source probabilities in the usual order (BNS, NSBH, BBH, terrestrial), any others after."""
    rows = [(k, probs[k]) for k in _PROB_ORDER if k in probs]
    return rows + [(k, v) for k, v in probs.items() if k not in _PROB_ORDER]


def _prob_bars(probs) -> str:
    if not probs:
        return _DASH
    rows = _ordered_probs(probs)
    out = ['<table class="bars">']
    for k, v in rows:
        width = 0.0 if _nan(v) else max(0.0, min(1.0, v)) * 100.0
        out.append(f'<tr><th scope="row">{_e(k.upper() if k != "terrestrial" else k)}</th>'
                   f'<td class="bar"><span class="bar-fill" style="width:{width:.1f}%"></span></td>'
                   f'<td class="num" data-col="source_probs.{_e(k)}" data-value="{_e(_value_attr(v))}">'
                   f'{_e(format_number(v, 2) if not _nan(v) and v >= 0.01 else format_number(v))}</td></tr>')
    out.append("</table>")
    return "".join(out)


def _facts(r: EventReport) -> str:
    s = r.shown
    items = [
        ("50% area", _e(_area(s.area50_deg2))),
        ("90% area", _e(_area(s.area90_deg2))),
        ("distance", _e(_mpc(s.distance_mpc, s.distance_err_mpc)) + ('<span class="hint block">sky-marginal mean ± '
                                                                     'std</span>' if not _nan(s.distance_mpc) else "")),
        ("FAR", _far_html(s.far_per_year)),
        ("p<sub>astro</sub>", _e(format_number(s.p_astro))),
        ("candidates", _e(_candidate_count(r))),
        ("host galaxies", _e(_host_count(r))),
    ]
    dl = "".join(f'<div class="fact"><dt>{k}</dt><dd>{v}</dd></div>' for k, v in items)
    probs = s.source_probs
    return (f'<section class="facts" id="summary"><h2>Summary of revision {s.revision}</h2>'
            f'<div class="facts-grid"><dl>{dl}</dl>'
            f'<div class="probs"><h3>source probabilities</h3>{_prob_bars(probs)}</div></div></section>')


def _candidate_count(r: EventReport) -> str:
    n = len(r.candidates)
    if r.n_candidates_total > n:
        return f"{n} shown of {r.n_candidates_total}"
    return str(n)


def _host_count(r: EventReport) -> str:
    if not r.hosts:
        return "none ranked"
    text = f"top {len(r.hosts)}, holding {format_number(r.hosts[-1].cum_prob)}"
    if not _nan(r.p_outside_catalog):
        text += f"; not in catalogue {format_number(r.p_outside_catalog)}"
    return text


def _figure(f: ReportFigure) -> str:
    data = base64.b64encode(f.png).decode("ascii")
    cap = f"<figcaption>{_e(f.caption)}</figcaption>" if f.caption else ""
    return (f'<figure class="plot"><h3>{_e(f.title)}</h3>'
            f'<img src="data:image/png;base64,{data}" alt="{_e(f.alt)}" width="{f.width_px}" '
            f'height="{f.height_px}">{cap}</figure>')


def _figures(r: EventReport) -> str:
    if not r.figures:
        return ('<section id="sky"><h2>Sky</h2><p class="empty">No sky plot: this revision has no '
                'localization the report could read.</p></section>')
    return '<section id="sky"><h2>Sky</h2>' + "".join(_figure(f) for f in r.figures) + "</section>"


def _candidate_row(c: CandidateRow) -> str:
    cells = [
        _td("rank", c.rank, str(c.rank)),
        _td_text("transient_id", c.transient_id, "id"),
        _td_text("class", c.klass),
        _td("p_assoc", c.p_assoc, format_number(c.p_assoc), "num key"),
        _td("fap", c.fap, format_number(c.fap), "num key"),
        _td("odds", c.odds, format_number(c.odds), "num key"),
        _td("prior", c.prior, format_number(c.prior)),
        _td("sky_per_sr", c.sky_per_sr, format_number(c.sky_per_sr)),
        _td("time_per_s", c.time_per_s, format_number(c.time_per_s)),
        _td("distance_factor", c.distance_factor, format_number(c.distance_factor)),
        _td("rate_per_sr_per_s", c.rate_per_sr_per_s, format_number(c.rate_per_sr_per_s)),
        _td("dt_s", c.dt_s, format_duration(c.dt_s)),
        _td("searched_area_deg2", c.searched_area_deg2, _area(c.searched_area_deg2)),
        _td("distance_mpc", c.distance_mpc, _mpc(c.distance_mpc, c.distance_err_mpc)),
        _td_text("best_host_id", c.best_host_id, "id"),
        _td("best_host_prob", c.best_host_prob, format_number(c.best_host_prob)),
        _td_text("status", c.status, f"status status-{c.status}"),
    ]
    return f'<tr data-transient-id="{_e(c.transient_id)}" data-rank="{c.rank}">{"".join(cells)}</tr>'


def _candidates(r: EventReport) -> str:
    head = (
        '<thead><tr class="group"><th colspan="3"></th><th colspan="3">result</th>'
        '<th colspan="5" class="terms">odds = π/(1−π) · I · T · D / r</th><th colspan="3"></th>'
        '<th colspan="2">best host</th><th></th></tr>'
        '<tr><th scope="col">rank</th><th scope="col">transient</th><th scope="col">class</th>'
        '<th scope="col" title="association probability within its class">P<sub>assoc</sub></th>'
        '<th scope="col" title="false-association probability">FAP</th>'
        '<th scope="col" title="posterior odds against unrelated">odds</th>'
        '<th scope="col" title="prior probability of a reported counterpart of the class">π</th>'
        '<th scope="col" title="sky overlap, per steradian">I (sr⁻¹)</th>'
        '<th scope="col" title="time term, per second">T (s⁻¹)</th>'
        '<th scope="col" title="distance Bayes factor">D</th>'
        '<th scope="col" title="background rate of the class">r (sr⁻¹ s⁻¹)</th>'
        '<th scope="col" title="report time minus merger time">Δt</th>'
        '<th scope="col" title="area of the map denser than at the report">searched area</th>'
        '<th scope="col">distance</th>'
        '<th scope="col">galaxy</th><th scope="col" title="probability of that host">P</th>'
        '<th scope="col">status</th></tr></thead>'
    )
    if r.candidates:
        body = "<tbody>" + "".join(_candidate_row(c) for c in r.candidates) + "</tbody>"
    else:
        body = '<tbody><tr class="empty"><td colspan="17">no candidates matched</td></tr></tbody>'
    more = ""
    if r.n_candidates_total > len(r.candidates):
        more = (f'<p class="hint">The best {len(r.candidates)} of {r.n_candidates_total} candidates are shown '
                f'(the display limit of the reports configuration).</p>')
    return (
        f'<section id="candidates-section"><h2>Candidates of revision {r.revision}</h2>'
        f'<div class="scroll"><table id="candidates" class="data">{head}{body}</table></div>{more}'
        '<p class="legend">Ranked by odds, then FAP, then id. P<sub>assoc</sub> is normalized among the '
        'candidates of the same class (at most one is the counterpart), so candidates of different classes can '
        'both be near 1. FAP is the chance that unrelated reports of the class alone give one scoring at least '
        'as high. Terms: π the class prior, I the sky overlap, T the time term, D the distance factor, r the '
        'background rate.</p></section>'
    )


def _host_row(h: HostRow) -> str:
    return (f'<tr data-galaxy-id="{_e(h.galaxy_id)}" data-rank="{h.rank}">'
            + _td("rank", h.rank, str(h.rank)) + _td_text("galaxy_id", h.galaxy_id, "id")
            + _td("p_host", h.p_host, format_number(h.p_host), "num key")
            + _td("cum_prob", h.cum_prob, format_number(h.cum_prob))
            + f'<td class="bar" aria-hidden="true"><span class="bar-fill host" style="width:'
              f'{0.0 if _nan(h.cum_prob) else min(h.cum_prob, 1.0) * 100:.1f}%"></span></td>'
            + _td("ra_deg", h.ra_deg, f"{h.ra_deg:.4f}") + _td("dec_deg", h.dec_deg, f"{h.dec_deg:+.4f}")
            + _td("distance_mpc", h.distance_mpc, _mpc(h.distance_mpc, h.distance_err_mpc))
            + "</tr>")


def _hosts(r: EventReport) -> str:
    note = f'<p class="hint">{_e(r.host_note)}</p>' if r.host_note else ""
    if not r.hosts:
        return f'<section id="hosts-section"><h2>Host galaxies</h2>{note}<p class="empty">No host ranking.</p></section>'
    outside = ""
    if not _nan(r.p_outside_catalog):
        outside = (f'<p class="hint">Probability that the host is not in the catalogue: '
                   f'{_e(format_number(r.p_outside_catalog))}; the galaxy probabilities add up to the rest.</p>')
    head = ('<thead><tr><th scope="col">rank</th><th scope="col">galaxy</th><th scope="col">P<sub>host</sub></th>'
            '<th scope="col">cumulative</th><th scope="col"><span class="sr">cumulative bar</span></th>'
            '<th scope="col">RA (deg)</th><th scope="col">Dec (deg)</th><th scope="col">distance</th></tr></thead>')
    body = "<tbody>" + "".join(_host_row(h) for h in r.hosts) + "</tbody>"
    return (f'<section id="hosts-section"><h2>Host galaxies of revision {r.revision}</h2>{note}{outside}'
            f'<div class="scroll"><table id="hosts" class="data">{head}{body}</table></div></section>')


def _revision_row(v: RevisionSummary, shown: int) -> str:
    probs = ", ".join(f"{k.upper() if k != 'terrestrial' else k} {format_number(p, 2)}"
                      for k, p in _ordered_probs(v.source_probs)) or _DASH
    mark = []
    if v.is_current:
        mark.append("current")
    if v.revision == shown:
        mark.append("shown")
    cls = " ".join(f"is-{m}" for m in mark)
    return (f'<tr class="{cls}">' + _td("revision", v.revision, str(v.revision))
            + f'<td><span class="badge state-{_e(v.state)}">{_e(v.state)}</span>'
              f'{"".join(f" <em>{m}</em>" for m in mark)}</td>'
            + _td_text("merger_time_iso", v.merger_time_iso, "time")
            + _td_text("received_at_iso", v.received_at_iso, "time")
            + _td("far_per_year", v.far_per_year, format_number(v.far_per_year))
            + _td("p_astro", v.p_astro, format_number(v.p_astro))
            + f'<td class="wrap">{_e(probs)}</td>'
            + _td("area50_deg2", v.area50_deg2, _area(v.area50_deg2))
            + _td("area90_deg2", v.area90_deg2, _area(v.area90_deg2))
            + _td("distance_mpc", v.distance_mpc, _mpc(v.distance_mpc, v.distance_err_mpc))
            + _td("n_results", v.n_results, str(v.n_results)) + "</tr>")


def _revisions(r: EventReport) -> str:
    head = ('<thead><tr><th scope="col">rev.</th><th scope="col">state</th><th scope="col">merger time (UTC)</th>'
            '<th scope="col">received (UTC)</th><th scope="col">FAR (yr⁻¹)</th><th scope="col">p<sub>astro</sub></th>'
            '<th scope="col">source probabilities</th><th scope="col">50% area</th><th scope="col">90% area</th>'
            '<th scope="col">distance</th><th scope="col">results</th></tr></thead>')
    body = "<tbody>" + "".join(_revision_row(v, r.revision) for v in r.revisions) + "</tbody>"
    return (f'<section id="revisions-section"><h2>Revision history</h2><div class="scroll">'
            f'<table id="revisions" class="data">{head}{body}</table></div></section>')


def _class_row(c: ClassRow) -> str:
    return (f'<tr data-class="{_e(c.name)}">' + _td_text("name", c.name, "id")
            + _td("window_lo_s", c.window_lo_s, format_duration(c.window_lo_s))
            + _td("window_hi_s", c.window_hi_s, format_duration(c.window_hi_s))
            + _td("rate_per_deg2_per_day", c.rate_per_deg2_per_day, format_number(c.rate_per_deg2_per_day))
            + _td("rate_per_sr_per_s", c.rate_per_sr_per_s, format_number(c.rate_per_sr_per_s))
            + _td("efficiency", c.efficiency, format_number(c.efficiency))
            + _td("needs_neutron_star", c.needs_neutron_star, "yes" if c.needs_neutron_star else "no", "")
            + _td("sharp_time", c.sharp_time, "trigger" if c.sharp_time else "bracketed", "")
            + _td("reach_mpc", c.reach_mpc, format_number(c.reach_mpc))
            + _td("pos_err_deg", c.pos_err_deg, format_number(c.pos_err_deg))
            + _td("cadence_s", c.cadence_s, format_duration(c.cadence_s) if not _nan(c.cadence_s) else _DASH)
            + f'<td class="desc">{_e(c.description) or _DASH}</td></tr>')


def _classes(r: EventReport) -> str:
    src = f'<p class="hint">Classes from {_e(r.config_source)}.</p>' if r.config_source else ""
    if not r.classes:
        return f'<section id="config"><h2>Configuration</h2>{src}<p class="empty">No classes recorded.</p></section>'
    head = ('<thead><tr><th scope="col">class</th><th scope="col">window from</th><th scope="col">window to'
            '</th><th scope="col">rate (deg⁻² day⁻¹)</th><th scope="col">r (sr⁻¹ s⁻¹)</th>'
            '<th scope="col">efficiency</th><th scope="col">needs NS</th><th scope="col">onset</th>'
            '<th scope="col">reach (Mpc)</th><th scope="col">default error (deg)</th><th scope="col">cadence</th>'
            '<th scope="col">description</th></tr></thead>')
    body = "<tbody>" + "".join(_class_row(c) for c in r.classes) + "</tbody>"
    return (f'<section id="config"><h2>Configuration: classes used</h2>{src}<div class="scroll">'
            f'<table id="classes" class="data">{head}{body}</table></div>'
            '<p class="legend">Window: onset minus merger time allowed for a counterpart (from, to). Rate: density of '
            'unrelated reports of the class. Efficiency: chance that a real counterpart of the class is produced '
            'and reported.</p></section>')


def _notes(r: EventReport) -> str:
    if not r.notes:
        return ""
    return ('<section id="notes"><h2>Notes</h2><ul>' + "".join(f"<li>{_e(n)}</li>" for n in r.notes)
            + "</ul></section>")


def _footer(r: EventReport, links: Sequence[tuple[str, str]]) -> str:
    files = ""
    if links:
        files = ('<p class="files">Tables beside this page: '
                 + ", ".join(f'<a href="{_e(href)}">{_e(label)}</a>' for label, href in links) + ".</p>")
    made = f"matcher {_e(r.version)}" if r.version else "matcher"
    when = f", written {_e(r.generated_at_iso)}" if r.generated_at_iso else ""
    return (f'<footer>{files}<p>Made by {made}{when}. A decision aid: it does not replace the vetting of the '
            'collaboration that issued the alert (see the caution at the top).</p></footer>')


_CSS = f"""
:root {{ --paper:{_PAPER}; --sand:{_SAND}; --clay:{_CLAY}; --brick:{_BRICK}; --plum:{_PLUM};
  --aubergine:{_AUBERGINE}; --ink:{_INK}; --cand:{_CANDIDATE}; --host:{_HOST}; --rule:#d9d3c4; --muted:#5e5a6e; }}
* {{ box-sizing: border-box; }}
html {{ background: #fff; color: var(--ink); }}
body {{ margin: 0 auto; max-width: 1440px; padding: 0 24px 32px;
  font: 15px/1.45 "DejaVu Sans", "Helvetica Neue", Arial, sans-serif; }}
h1, h2, h3 {{ font-weight: 700; line-height: 1.2; }}
h2 {{ font-size: 18px; margin: 28px 0 8px; padding-bottom: 4px; border-bottom: 2px solid var(--plum); }}
h3 {{ font-size: 14px; margin: 0 0 6px; color: var(--aubergine); }}
.masthead {{ background: var(--paper); border-bottom: 4px solid var(--ink); margin: 0 -24px; padding: 14px 24px 12px; }}
.kicker {{ margin: 0; font-size: 12px; letter-spacing: .08em; text-transform: uppercase; color: var(--muted); }}
h1 {{ margin: 4px 0 2px; font-size: 30px; }}
.event-id {{ font-family: "DejaVu Sans Mono", monospace; letter-spacing: -.01em; }}
.sub {{ margin: 0; color: #3b3848; }}
.shown {{ margin: 6px 0 0; font-size: 13px; color: var(--brick); }}
.badge {{ display: inline-block; vertical-align: middle; font-size: 12px; font-weight: 700; letter-spacing: .06em;
  text-transform: uppercase; padding: 2px 8px; border-radius: 3px; border: 1.5px solid var(--ink); background: #fff; }}
.state-issued {{ background: var(--sand); }}
.state-revised {{ background: var(--clay); }}
.state-withdrawn {{ background: var(--ink); color: #fff; }}
.caution {{ margin: 12px 0; padding: 8px 12px; border-left: 5px solid var(--brick); background: #fbf3ee;
  font-size: 13px; }}
.headline {{ font-size: 19px; margin: 14px 0 4px; }}
.headline.withdrawn {{ border: 2px solid var(--ink); padding: 8px 12px; }}
.facts-grid {{ display: flex; flex-wrap: wrap; gap: 12px 40px; align-items: flex-start; }}
.facts dl {{ display: grid; grid-template-columns: repeat(auto-fill, minmax(200px, 1fr)); gap: 10px 24px; margin: 0;
  flex: 1 1 560px; }}
.fact dt {{ font-size: 12px; text-transform: uppercase; letter-spacing: .05em; color: var(--muted); }}
.fact dd {{ margin: 0; font-size: 17px; font-variant-numeric: tabular-nums; }}
.hint {{ color: var(--muted); font-size: 13px; }}
.hint.block {{ display: block; }}
.probs {{ flex: 0 1 320px; }}
table.bars {{ border-collapse: collapse; width: 100%; }}
table.bars th {{ text-align: left; font-weight: 400; padding: 1px 8px 1px 0; font-size: 13px; width: 6.5em; }}
table.bars td.num {{ text-align: right; padding-left: 8px; width: 4em; }}
td.bar {{ width: 60%; padding: 2px 0; }}
.bar-fill {{ display: block; height: 10px; min-width: 1px; background: var(--plum); border: 1px solid var(--ink); }}
.bar-fill.host {{ background: var(--host); }}
figure.plot {{ margin: 8px 0 0; }}
figure.plot img {{ display: block; max-width: 100%; height: auto; border: 1px solid var(--rule); }}
figcaption {{ font-size: 13px; color: var(--muted); margin-top: 4px; }}
.scroll {{ overflow-x: auto; }}
table.data {{ border-collapse: collapse; font-size: 12.5px; font-variant-numeric: tabular-nums; }}
table.data th, table.data td {{ padding: 3px 6px; border-bottom: 1px solid var(--rule); text-align: left;
  vertical-align: top; white-space: nowrap; }}
table.data td.wrap {{ white-space: normal; min-width: 12em; }}
table.data td.bar {{ width: 140px; min-width: 140px; }}
table.data thead th {{ background: var(--paper); border-bottom: 2px solid var(--ink); font-size: 12px; }}
table.data tr.group th {{ border-bottom: 1px solid var(--rule); font-weight: 400; color: var(--muted);
  text-align: center; }}
table.data tr.group th.terms {{ background: var(--sand); color: var(--ink); }}
table.data td.num {{ text-align: right; }}
table.data td.key {{ font-weight: 700; }}
table.data td.id {{ font-family: "DejaVu Sans Mono", monospace; }}
table.data td.desc {{ white-space: normal; min-width: 18em; color: #3b3848; }}
#candidates tbody tr:first-child td, #hosts tbody tr:first-child td {{ background: #fdf8ea; }}
tr.is-current td {{ font-weight: 700; }}
td.status-withdrawn, td.status-superseded {{ color: var(--brick); font-weight: 700; }}
.legend {{ font-size: 13px; color: #3b3848; max-width: 70em; }}
.empty {{ color: var(--muted); font-style: italic; }}
.sr {{ position: absolute; width: 1px; height: 1px; overflow: hidden; clip: rect(0 0 0 0); }}
footer {{ margin-top: 32px; padding-top: 8px; border-top: 1px solid var(--rule); font-size: 12px; color: var(--muted); }}
footer a {{ color: var(--aubergine); }}
@media print {{
  @page {{ size: A4 landscape; margin: 11mm; }}
  body {{ max-width: none; padding: 0; font-size: 10pt; }}
  .masthead {{ margin: 0; padding: 0 0 6pt; background: none; }}
  .caution {{ background: none; border: 1pt solid var(--ink); border-left-width: 4pt; }}
  table.data thead th, #candidates tbody tr:first-child td, #hosts tbody tr:first-child td {{ background: none; }}
  table.data {{ font-size: 7.5pt; }}
  table.data th, table.data td {{ padding: 2pt 4pt; }}
  thead {{ display: table-header-group; }}
  tr, figure {{ break-inside: avoid; page-break-inside: avoid; }}
  h2 {{ break-after: avoid; page-break-after: avoid; }}
  .scroll {{ overflow: visible; }}
  .bar-fill {{ -webkit-print-color-adjust: exact; print-color-adjust: exact; }}
  figure.plot img {{ max-height: 170mm; width: auto; }}
  footer a::after {{ content: " (" attr(href) ")"; }}
}}
"""


def render_event_html(report: EventReport, *, links: Sequence[tuple[str, str]] = ()) -> str:
    """The report as one HTML page (a string).

    Parameters
    ----------
    report : EventReport
    links : sequence of (label, href)
        Files written beside the page (relative names), listed in the footer.

    Returns
    -------
    str
        A complete HTML5 document with inline CSS and PNG data URIs; no script.
    """
    r = report
    title = f"{r.event_id} revision {r.current.revision} ({r.current.state}) · matcher report"
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f'<meta name="generator" content="matcher {_e(r.version)}">',
        f"<title>{_e(title)}</title>",
        f"<style>{_CSS}</style></head><body>",
        _masthead(r),
        _caution(),
        _headline(r),
        _facts(r),
        _figures(r),
        _candidates(r),
        _hosts(r),
        _revisions(r),
        _classes(r),
        _notes(r),
        _footer(r, links),
        "</body></html>",
    ]
    return "\n".join(parts) + "\n"
