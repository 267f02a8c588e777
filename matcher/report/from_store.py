"""Build an :class:`~matcher.report.model.EventReport` from the SQLite store.

What comes from where:

* **revisions**: :meth:`Store.revisions` (state, merger time, FAR, ``p_astro``,
  source probabilities, when it was received); the 50% and 90% areas and the
  sky-marginal distance are computed from each revision's stored localization
  bytes (read once per distinct map).
* **the revision shown**: the current one, or, for a withdrawn event, the last
  revision that had a localization.
* **candidates**: the stored results of that revision whose record says
  ``candidate`` (a report that stopped being one keeps a record with
  ``candidate: false`` and is left out). The service publishes ``p_assoc``
  rounded and ``rank`` only for the first few; the report recomputes both
  from the stored odds with the service's own exact sum
  (:func:`matcher.lifecycle.association_from_sum`, as ``summary.json`` does):
  ``P_i = O_i / (1 + Σ_j O_j)`` over the candidates of the same class, ranked
  over every class by ``P_i``, then odds, then FAP, then transient id. The
  published values are kept in ``p_assoc_published`` and ``rank_published``.
  Positions, errors and the report's own distance come from the stored
  transients (the service's own window query).
* **hosts**: a :class:`~matcher.catalog.HostRanking` of that revision handed in
  by the caller (the service has it in memory), else the ``hosts`` output the
  service put in the store's outbox for that revision, else none (the page says why).
* **classes**: the configuration's ``classes`` (or the packaged defaults).
* **figures**: :func:`matcher.report.skyplot.plot_localization` of the
  revision shown (and of every other revision with a map when
  ``settings.plots == "all"``), as PNG bytes.

The store is only read.
"""

from __future__ import annotations

import json
import math
import time
from collections import defaultdict
from typing import Any, Mapping

from matcher import __version__
from matcher.errors import InputError
from matcher.report.model import CandidateRow, ClassRow, EventReport, HostRow, ReportFigure, RevisionSummary
from matcher.report.settings import ReportSettings
from matcher.timeconv import gps_to_iso, unix_to_gps

__all__ = ["event_report_from_store", "exact_association", "HOSTS_OUTBOX_KIND"]

#: Outbox kind under which the service publishes each revision's host ranking.
HOSTS_OUTBOX_KIND = "hosts"

_NAN = math.nan
#: Candidates labelled on the report's sky plot: the table beside it lists every rank, and more
#: labels crowd a small region (the demo's 35 deg² map with 100 candidates).
_PLOT_LABELS = 5
#: Candidates drawn on the sky plot at most (the best ones; unlabelled stars beyond the first few).
_PLOT_MAX = 10_000


def _f(v) -> float:
    if v is None or isinstance(v, bool):
        return _NAN
    try:
        return float(v)
    except (TypeError, ValueError):
        return _NAN


def exact_association(rows: list[tuple[str, str, float, float]]) -> dict[str, tuple[float, int]]:
    """``P_i`` and rank of each candidate from its class and odds.

    Parameters
    ----------
    rows : list of (transient_id, class, odds, fap)

    Returns
    -------
    dict
        ``transient_id → (p_assoc, rank)``: ``P_i = O_i / (1 + Σ_j O_j)`` over the
        candidates of the same class, with the service's exact, order-independent sum
        (:func:`matcher.lifecycle.exact_odds_sum`), so the values equal the service's
        own bit for bit; rank 1 = best over all classes by ``P_i``, then odds, then
        FAP, then id (the service's order).
    """
    from matcher.lifecycle import association_from_sum, exact_odds_sum

    by_class: dict[str, list[float]] = defaultdict(list)
    for _tid, klass, odds, _fap in rows:
        by_class[klass].append(odds)
    sums = {k: exact_odds_sum(v) for k, v in by_class.items()}
    keyed = sorted((-association_from_sum(odds, sums[klass]), -odds, fap, tid) for tid, klass, odds, fap in rows)
    return {tid: (-negp, rank) for rank, (negp, _, _, tid) in enumerate(keyed, start=1)}


def _iso_unix(t) -> str:
    if t is None or not math.isfinite(float(t)):
        return ""
    return gps_to_iso(unix_to_gps(float(t)))


class _Maps:
    """Stored localizations, read once each."""

    def __init__(self, store, max_bytes: int):
        self.store = store
        self.max_bytes = max_bytes
        self.cache: dict[str, Any] = {}

    def get(self, sha: str | None, what: str):
        if not sha:
            return None
        if sha not in self.cache:
            from matcher.sky import skymap_from_bytes

            data = self.store.localization_data(sha)
            if data is None:
                raise InputError(f"{what}: its localization {sha[:12]}… is not in the store {self.store.path}")
            self.cache[sha] = skymap_from_bytes(data, max_bytes=self.max_bytes, source=f"{what} (stored)")
        return self.cache[sha]


def _summary(sr, skymap, n_results: int) -> RevisionSummary:
    a = sr.alert
    area50 = area90 = dist = dist_err = _NAN
    if skymap is not None:
        area50, area90 = (float(v) for v in skymap.credible_areas([0.5, 0.9]))
        if skymap.has_distance:
            dist, dist_err = (float(v) for v in skymap.distance_marginal())
    return RevisionSummary(
        revision=int(a.revision), state=a.state, merger_time_iso=a.merger_time_iso,
        received_at_iso=_iso_unix(getattr(sr, "received_at", None)), far_per_year=a.far_per_year,
        p_astro=a.p_astro, source_probs=dict(a.source_probs or {}), area50_deg2=area50, area90_deg2=area90,
        distance_mpc=dist, distance_err_mpc=dist_err, is_current=bool(sr.is_current), n_results=n_results)


def _transients(store, merger_time: float, classes) -> dict[str, Any]:
    """Stored transients whose onset could meet a class window (the service's own query), by id."""
    if not classes:
        return {}
    lo = min(c.window_lo_s for c in classes.values())
    hi = max(c.window_hi_s + (0.0 if c.sharp_time else float(c.cadence_s or 0.0)) for c in classes.values())
    return {s.report.transient_id: s.report for s in store.transients_between(merger_time + lo, merger_time + hi)}


def _stored_hosts(store, event_id: str, revision: int) -> Mapping[str, Any] | None:
    """The last ``hosts`` output the service put in the outbox for this revision (None if none)."""
    key = f"{event_id}/{revision}"
    seq, found = 0, None
    while True:
        rows = store.outbox_after(seq, 5000)
        if not rows:
            return found
        for row in rows:
            if row.kind == HOSTS_OUTBOX_KIND and row.key == key:
                found = json.loads(row.payload)
        seq = rows[-1].seq


def _host_rows_from_ranking(ranking, top: int) -> tuple[list[HostRow], float]:
    rows = [HostRow(g["rank"], str(g["galaxy_id"]), g["ra_deg"], g["dec_deg"], g["distance_mpc"],
                    g["distance_err_mpc"], g["prob"], g["cum_prob"]) for g in ranking.galaxies(top)]
    return rows, float(ranking.p_outside_catalog)


def _host_rows_from_payload(payload: Mapping[str, Any], top: int) -> tuple[list[HostRow], float]:
    rows = [HostRow(int(g["rank"]), str(g["galaxy_id"]), _f(g.get("ra_deg")), _f(g.get("dec_deg")),
                    _f(g.get("distance_mpc")), _f(g.get("distance_err_mpc")), _f(g.get("prob")),
                    _f(g.get("cum_prob"))) for g in list(payload.get("galaxies") or [])[:top]]
    return rows, _f(payload.get("p_outside_catalog"))


def _candidate_rows(results, reports, classes, max_candidates: int, notes: list[str]) -> tuple[list, int]:
    cands = [r for r in results if r.record.get("candidate", True)]
    dropped = len(results) - len(cands)
    if dropped:
        notes.append(f"{dropped} stored result{'s' if dropped != 1 else ''} of this revision "
                     f"{'are' if dropped != 1 else 'is'} no longer a candidate and not shown.")
    rows = [(r.transient_id, str(r.record.get("class", "")), _f(r.record.get("odds")), _f(r.record.get("fap")))
            for r in cands]
    bad = [tid for tid, _, odds, _ in rows if not (math.isfinite(odds) and odds >= 0)]
    if bad:
        raise InputError(f"stored result {bad[0]}: odds must be a finite number >= 0 to rank candidates")
    exact = exact_association(rows)
    out = []
    missing = []
    for r in sorted(cands, key=lambda r: exact[r.transient_id][1])[:max_candidates]:
        rec = r.record
        p, rank = exact[r.transient_id]
        terms = rec.get("terms") or {}
        dist = rec.get("distance") or {}
        host = rec.get("host") or {}
        rep = reports.get(r.transient_id)
        klass = str(rec.get("class", ""))
        cl = classes.get(klass)
        ra = dec = err = _NAN
        d, de = _f(dist.get("mpc")), _f(dist.get("err_mpc"))
        if rep is not None:
            ra, dec = rep.ra_deg, rep.dec_deg
            err = _f(rep.pos_err_deg)
            if math.isnan(err) and cl is not None:
                err = float(cl.pos_err_deg)
            if math.isnan(d) and rep.distance_mpc is not None:
                d, de = _f(rep.distance_mpc), _f(rep.distance_err_mpc)
        else:
            missing.append(r.transient_id)
        out.append(CandidateRow(
            rank=rank, transient_id=r.transient_id, klass=klass, status=r.status, p_assoc=p,
            fap=_f(rec.get("fap")), odds=_f(rec.get("odds")), prior=_f(terms.get("prior")),
            sky_per_sr=_f(terms.get("sky_per_sr")), time_per_s=_f(terms.get("time_per_s")),
            distance_factor=_f(terms.get("distance_factor")),
            rate_per_sr_per_s=_NAN if cl is None else float(cl.rate_per_sr_per_s), dt_s=_f(rec.get("dt_s")),
            searched_area_deg2=_f(rec.get("searched_area_deg2")), credible_level=_f(rec.get("credible_level")),
            joint_far_per_year=_f(rec.get("joint_far_per_year")), ra_deg=ra, dec_deg=dec, pos_err_deg=err,
            distance_mpc=d, distance_err_mpc=de, best_host_id=str(host.get("galaxy_id") or ""),
            best_host_prob=_f(host.get("prob")), revision=int(r.revision), key=r.key,
            p_assoc_published=_f(rec.get("p_assoc")),
            rank_published=int(rec["rank"]) if isinstance(rec.get("rank"), int) else 0))
    if missing:
        notes.append(f"{len(missing)} candidate{'s' if len(missing) != 1 else ''} not found among the stored "
                     f"transients of the event's windows (not drawn on the sky plot): {', '.join(missing[:5])}"
                     f"{' …' if len(missing) > 5 else ''}.")
    unknown = sorted({c.klass for c in out if c.klass not in classes})
    if unknown:
        notes.append(f"class{'es' if len(unknown) > 1 else ''} {', '.join(unknown)} not in the configuration "
                     "used for this report: r is not shown for them.")
    return out, len(cands)


def _plot(skymap, cands, hosts, event_id, alert, dpi: float, title: str) -> ReportFigure:
    from matcher.report.skyplot import Candidate, EventInfo, Host, figure_bytes, plot_localization

    marks = [Candidate(c.transient_id, c.ra_deg, c.dec_deg, err_deg=c.pos_err_deg, p_assoc=c.p_assoc, rank=c.rank,
                       distance_mpc=c.distance_mpc if c.distance_mpc > 0 else None,
                       distance_err_mpc=c.distance_err_mpc if c.distance_err_mpc > 0 else None, klass=c.klass)
             for c in cands if math.isfinite(c.ra_deg) and math.isfinite(c.dec_deg)]
    gal = [Host(h.galaxy_id, h.ra_deg, h.dec_deg, p_host=h.p_host, rank=h.rank,
                distance_mpc=h.distance_mpc if h.distance_mpc > 0 else None,
                distance_err_mpc=h.distance_err_mpc if h.distance_err_mpc > 0 else None) for h in hosts]
    plot = plot_localization(skymap, candidates=marks, hosts=gal, event=EventInfo(event_id, alert.revision,
                                                                                   alert.merger_time_iso),
                             max_hosts=max(len(gal), 1), max_labels=_PLOT_LABELS, dpi=dpi)
    png = figure_bytes(plot.figure, "png")
    areas = ", ".join(f"{lv:.0%} area {a:,.1f} deg²" for lv, a in plot.area_deg2.items())
    note = plot.zoom_note[:1].upper() + plot.zoom_note[1:]
    note = note if note.endswith(".") else note + "."
    alt = (f"Sky map of {event_id} revision {alert.revision}: {areas}; {len(marks)} candidate"
           f"{'s' if len(marks) != 1 else ''} and {len(plot.hosts)} host galax{'ies' if len(plot.hosts) != 1 else 'y'}"
           f" marked. {note}")
    keys = ["Probability per deg² (darker is more probable), 50% region solid, 90% dashed."]
    if marks:
        keys.append(f"Stars: candidates, the first {min(len(marks), _PLOT_LABELS)} labelled rank · P_assoc.")
        if any(c.err_deg for c in marks):
            keys.append("Dotted circles: 90% position errors.")
    if plot.hosts:
        keys.append("Diamonds: host galaxies, g1 the most probable.")
    caption = " ".join(keys + [note])
    return ReportFigure(title, png, alt, caption)


def event_report_from_store(store, event_id: str, config=None, *, settings: ReportSettings | None = None,
                            ranking=None, now: float | None = None) -> EventReport:
    """The report of one event, read from the store.

    Parameters
    ----------
    store : matcher.store.Store
    event_id : str
    config : matcher.config.Config, optional
        Classes (default: the packaged ones) and the localization size limit.
    settings : ReportSettings, optional
        Row limits, plots and resolution (default: :class:`ReportSettings` defaults).
    ranking : matcher.catalog.HostRanking, optional
        A host ranking the caller has in memory (the service does); used when its
        ``meta`` names the revision shown, else the stored ``hosts`` output is used.
    now : float, optional, Unix s
        Time of writing (default: the clock).

    Raises
    ------
    InputError
        The event is not in the store, or a stored value cannot be shown.
    """
    from matcher.coincidence import default_classes

    settings = settings or ReportSettings()
    revs = store.revisions(event_id)
    if not revs:
        active = [sr.alert.event_id for sr in store.active_events()]
        hint = f" (active events: {', '.join(active[:10])}{' …' if len(active) > 10 else ''})" if active else ""
        raise InputError(f"event {event_id!r} is not in the store {store.path}{hint}")
    if config is not None:
        classes = dict(config.classes())
        source = (f"configuration {config.path}" if config.path is not None and config.classes_raw is not None
                  else "the packaged defaults (config/default.yaml)")
        max_bytes = int(config.limits.localization_max_bytes)
    else:
        classes = dict(default_classes())
        source = "the packaged defaults (config/default.yaml)"
        max_bytes = 64 * 1024 * 1024
    maps = _Maps(store, max_bytes)
    results = store.results(event_id=event_id)
    per_rev: dict[int, list] = defaultdict(list)
    for r in results:
        per_rev[r.revision].append(r)

    with_map = [sr for sr in revs if sr.localization_sha]
    current = next(sr for sr in revs if sr.is_current)
    shown = current if current.localization_sha else (with_map[-1] if with_map else current)
    summaries = [_summary(sr, maps.get(sr.localization_sha, f"event {event_id} revision {sr.alert.revision}"),
                          len(per_rev.get(sr.alert.revision, []))) for sr in revs]

    notes: list[str] = []
    reports = _transients(store, shown.alert.merger_time, classes)
    # Every candidate (up to _PLOT_MAX) is drawn; the table and candidates.ecsv hold the best max_candidates.
    drawn, n_total = _candidate_rows(per_rev.get(shown.alert.revision, []), reports, classes,
                                     max(settings.max_candidates, _PLOT_MAX), notes)
    cands = drawn[:settings.max_candidates]
    if n_total > len(drawn):
        notes.append(f"The sky plot shows the best {len(drawn):,} of {n_total:,} candidates.")

    top = settings.top_hosts
    hosts: list[HostRow] = []
    p_out = _NAN
    if top <= 0:
        host_note = "Host galaxies are turned off (top_hosts: 0)."
    elif ranking is not None and ranking.meta.get("revision") == shown.alert.revision:
        hosts, p_out = _host_rows_from_ranking(ranking, top)
        host_note = f"Host ranking of revision {shown.alert.revision}, as computed by the service."
    else:
        payload = _stored_hosts(store, event_id, shown.alert.revision)
        if payload is not None:
            hosts, p_out = _host_rows_from_payload(payload, top)
            host_note = f"Host ranking of revision {shown.alert.revision}, as published by the service."
        else:
            host_note = ("No host ranking is stored for this revision (the service ranks hosts when a galaxy "
                         "catalogue is configured).")

    figures = []
    if shown.localization_sha:
        skymap = maps.get(shown.localization_sha, f"event {event_id} revision {shown.alert.revision}")
        figures.append(_plot(skymap, drawn, hosts, event_id, shown.alert, settings.dpi,
                             f"Revision {shown.alert.revision}"))
    if settings.plots == "all":
        for sr in reversed(with_map):
            if sr is shown:
                continue
            older, _ = _candidate_rows(per_rev.get(sr.alert.revision, []), reports, classes, _PLOT_MAX, [])
            figures.append(_plot(maps.get(sr.localization_sha, f"event {event_id} revision {sr.alert.revision}"),
                                 older, (), event_id, sr.alert, settings.dpi, f"Revision {sr.alert.revision}"))
    if shown is not current:
        notes.append(f"Revision {current.alert.revision} withdrew the event; the candidates shown are those of "
                     f"revision {shown.alert.revision}, all marked withdrawn.")

    t = time.time() if now is None else float(now)
    return EventReport(
        event_id=event_id, revision=int(shown.alert.revision), revisions=tuple(summaries), candidates=tuple(cands),
        hosts=tuple(hosts), classes=tuple(ClassRow.from_class(c) for _, c in sorted(classes.items())),
        figures=tuple(figures), version=__version__, generated_at_iso=_iso_unix(t), config_source=source,
        p_outside_catalog=p_out, host_note=host_note, notes=tuple(notes), n_candidates_total=n_total)
