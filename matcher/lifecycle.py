"""Event lifecycle and matching: what each stored message does to the results.

The service loop (:mod:`matcher.service`) hands every batch to :meth:`Matcher.apply`
inside the batch's store transaction. The matcher writes the messages into the
store in their input order, one *segment* at a time, and applies each segment's
effects before the next one is written:

* a segment is a run of transient reports (and rejected input) up to the next GW
  alert, or up to a transient id that is already in the segment; a GW alert is a
  segment of its own. So a batch has exactly the effect of its messages processed one
  after another, and the final results do not depend on how the input was batched
  (replay = live; crash and restart = an uninterrupted run).
* a GW alert that is a new event or a newer revision activates the event at that
  revision (its localization, host ranking and expiry), marks the older revision's
  results ``superseded``, and scores every stored transient inside the event's windows;
  an older revision, or a revision already stored, changes nothing; a revision whose
  state is ``withdrawn`` marks every result of the event ``withdrawn`` and deactivates it.
* a new (or changed) transient report is scored against every active event whose
  windows contain it.
* an event expires when the stream's clock (the latest transient time seen, never
  ahead of the report's own arrival by more than :data:`CLOCK_LEAD_S`) passes its
  merger time plus its longest class window (plus that class's default bracket for
  classes with bracketed onsets). A report is matched only against events that had
  not expired before it arrived.

Candidates
----------
A report is a *candidate* of an event when its onset meets its class window and its sky
term reaches the density at the event's ``candidate_level`` credible contour (99 % by
default): for a point-like report (1σ error at most ``point_sigma_deg`` and no map of
its own) the map density at its position, otherwise its overlap integral. Only
candidates get a result and count towards the class's sum of odds; everything
outside that contour holds at most 1 % of the sky probability, so leaving it out
changes ``P_assoc`` by a negligible amount and keeps the results table proportional
to what can matter.

Association probabilities, exactly and with bounded republishing
----------------------------------------------------------------
``P_i = O_i / (1 + Σ_j O_j)`` over the candidates of one class for one event revision,
so a candidate's ``P_assoc`` changes as other candidates arrive. The odds ``O_i`` of a
candidate depend on it and the revision alone and are stored exactly (as JSON floats,
which round-trip). The sum is kept exactly and independently of arrival order: each
``O_j`` is rounded to a multiple of 2⁻⁴⁰ (an integer) and the integers are summed
(Python integers do not overflow); ``P_i`` is then ``O_i`` divided by the correctly
rounded ``1 + Σ``. The same candidates give bit-identical ``P_i`` however they arrived.

The ``p_assoc`` and ``rank`` of a stored record are the published values:

* ``p_assoc`` is ``P_i`` rounded to ``p_assoc_decimals`` decimals (3: steps of 0.001);
* ``rank`` is the candidate's rank among all candidates of the event revision (every
  class; ordered by ``P_i``, then odds, then FAP, then transient id) when it is within
  the first ``top_ranks`` (5), else ``null``.

A record is written (and so published) when it is new, when its status changes, or when
one of these two published values changes. Both are functions of the candidate set
alone, so the final stored records are identical however the input was batched, while
a stream of unremarkable reports (whose ``P_i`` rounds to 0 and who are not near the
top) causes no republishing at all. Exact values are always recomputable from the
stored odds; ``matcher replay``'s ``summary.json`` gives them.
"""

from __future__ import annotations

import heapq
import math
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np

from matcher.coincidence import ReportBatch, score_reports
from matcher.errors import InputError
from matcher.streams.intake import Accepted, Rejected, record, record_batch
from matcher.streams.messages import GWAlert, TransientReport
from matcher.timeconv import unix_to_gps

__all__ = [
    "Matcher",
    "MatchSettings",
    "EventState",
    "ApplyStats",
    "CLOCK_SOURCE",
    "CLOCK_LEAD_S",
    "ODDS_QUANTUM_BITS",
    "exact_odds_sum",
    "association_from_sum",
    "event_expiry",
]

#: Where the stream clock is kept in the store's positions table (a name no configured
#: source can have: configured names are letters, digits, ``_`` and ``-``).
CLOCK_SOURCE = "service:clock"
#: How far a report's own time may run ahead of its arrival (``received_at``) when it
#: advances the stream clock (s): a report dated in the future cannot expire events early.
CLOCK_LEAD_S = 86400.0
#: Odds are summed exactly as integer multiples of 2**-ODDS_QUANTUM_BITS.
ODDS_QUANTUM_BITS = 40
_SCALE = 1 << ODDS_QUANTUM_BITS
_DYNAMIC = ("p_assoc", "rank", "key", "event_id", "revision", "transient_id", "status")


@dataclass(frozen=True)
class MatchSettings:
    """How candidates are chosen and results published (see the module docstring).

    Attributes
    ----------
    candidate_level : float
        Credible level whose contour density a report's sky term must reach.
    point_sigma_deg : float, deg
        Reports with a 1σ error up to this (and no map) are point-like: selected by the
        map density at their position, scored together, and looked up in the catalogue.
    top_ranks : int
        Ranks published in records (others are ``null``).
    p_assoc_decimals : int
        Decimals of the published ``p_assoc``.
    hosts_published : int
        Galaxies in each revision's ``hosts`` output.
    host_options : mapping
        Keyword options for :func:`matcher.catalog.hosts_for_report`.
    """

    candidate_level: float = 0.99
    point_sigma_deg: float = 0.01
    top_ranks: int = 5
    p_assoc_decimals: int = 3
    hosts_published: int = 20
    host_options: Mapping[str, Any] = field(default_factory=dict)


@dataclass
class ApplyStats:
    """What one batch did (counts), for the dashboard and the benchmark."""

    messages: int = 0
    accepted: int = 0
    duplicates: int = 0
    quarantined: int = 0
    reports: int = 0
    alerts: int = 0
    scored: int = 0
    candidates: int = 0
    written: int = 0
    events_changed: list = field(default_factory=list)

    def add(self, other: "ApplyStats") -> None:
        for name in ("messages", "accepted", "duplicates", "quarantined", "reports", "alerts", "scored",
                     "candidates", "written"):
            setattr(self, name, getattr(self, name) + getattr(other, name))
        self.events_changed.extend(other.events_changed)


def _quantum(odds: float) -> int:
    """``odds`` as an integer number of 2**-40 (exact; round half to even)."""
    return round(odds * _SCALE)


def exact_odds_sum(odds: Sequence[float]) -> int:
    """The order-independent sum of odds, in units of 2**-:data:`ODDS_QUANTUM_BITS` (an integer)."""
    return sum(_quantum(float(o)) for o in odds)


def association_from_sum(odds: float, quantized_sum: int) -> float:
    """``O / (1 + Σ O)`` with ``Σ O`` given by :func:`exact_odds_sum` (correctly rounded denominator)."""
    return float(odds) / ((_SCALE + quantized_sum) / _SCALE)


def event_expiry(alert: GWAlert, classes) -> float:
    """When an event stops taking new reports (GPS s): merger time + the longest window
    (+ the class's default bracket for bracketed classes, whose first detection may come later)."""
    reach = 0.0
    for c in classes.values():
        extra = 0.0 if c.sharp_time else float(c.cadence_s or 0.0)
        reach = max(reach, c.window_hi_s + extra)
    return float(alert.merger_time) + reach


class _Group:
    """The candidates of one class for one event revision: exact odds sum and the best few."""

    __slots__ = ("klass", "odds", "fap", "qsum", "top", "k")

    def __init__(self, klass: str, k: int):
        self.klass = klass
        self.odds: dict[str, float] = {}
        self.fap: dict[str, float] = {}
        self.qsum = 0
        self.k = k
        self.top: list[tuple[float, float, str]] = []  # (-odds, fap, tid), best first

    def _key(self, tid: str) -> tuple[float, float, str]:
        return (-self.odds[tid], self.fap[tid], tid)

    def put(self, tid: str, odds: float, fap: float) -> bool:
        """Add a candidate; returns False when the top had to be recomputed (never here)."""
        self.odds[tid] = odds
        self.fap[tid] = fap
        self.qsum += _quantum(odds)
        key = (-odds, fap, tid)
        if len(self.top) < self.k or key < self.top[-1]:
            self.top.append(key)
            self.top.sort()
            del self.top[self.k:]
        return True

    def remove(self, tid: str) -> None:
        odds = self.odds.pop(tid)
        self.fap.pop(tid)
        self.qsum -= _quantum(odds)
        if any(t[2] == tid for t in self.top):
            self.top = heapq.nsmallest(self.k, (self._key(t) for t in self.odds))

    @property
    def denominator(self) -> float:
        return (_SCALE + self.qsum) / _SCALE

    def __contains__(self, tid: str) -> bool:
        return tid in self.odds

    def __len__(self) -> int:
        return len(self.odds)


class EventState:
    """An active event at its current revision.

    Attributes
    ----------
    alert : GWAlert
    skymap : SkyMap
    expires_at : float, GPS s
    density_cut : float, sr**-1
        Map density at the candidate contour.
    ranking : HostRanking or None
    area50_deg2, area90_deg2 : float, deg²
    distance_mpc : tuple (mean, std) or None, Mpc
    """

    def __init__(self, alert: GWAlert, skymap, *, expires_at: float, settings: MatchSettings, index=None):
        self.alert = alert
        self.skymap = skymap
        self.expires_at = float(expires_at)
        top = skymap.top_pixels(settings.candidate_level)
        self.density_cut = float(np.min(skymap.probdensity[top])) if top.size else 0.0
        self.area50_deg2, self.area90_deg2 = (float(a) for a in skymap.credible_areas([0.5, 0.9]))
        self.distance_mpc = tuple(float(v) for v in skymap.distance_marginal()) if skymap.has_distance else None
        self.ranking = None
        if index is not None:
            from matcher.catalog import rank_hosts

            self.ranking = rank_hosts(skymap, index, meta={"event_id": alert.event_id, "revision": alert.revision})
        self.groups: dict[str, _Group] = {}
        self.published: dict[str, tuple[float, int | None]] = {}
        self.static: dict[str, dict] = {}
        self.k = settings.top_ranks

    @property
    def event_id(self) -> str:
        return self.alert.event_id

    @property
    def revision(self) -> int:
        return self.alert.revision

    def group(self, klass: str) -> _Group:
        g = self.groups.get(klass)
        if g is None:
            g = self.groups[klass] = _Group(klass, self.k)
        return g

    def find(self, tid: str) -> _Group | None:
        for g in self.groups.values():
            if tid in g:
                return g
        return None

    @property
    def n_candidates(self) -> int:
        return sum(len(g) for g in self.groups.values())

    def best(self, n: int) -> list[dict]:
        """The best ``n`` candidates with exact ``p_assoc`` (for the dashboard)."""
        keys = []
        for g in self.groups.values():
            den = g.denominator
            for neg, fap, tid in g.top:
                keys.append((-(-neg / den), neg, fap, tid, g.klass))
        keys.sort()
        out = []
        for negp, neg, fap, tid, klass in keys[:n]:
            rec = self.static.get(tid, {})
            host = rec.get("host") or {}
            out.append({"transient_id": tid, "class": klass, "p_assoc": -negp, "odds": -neg, "fap": fap,
                        "host": host.get("galaxy_id")})
        return out

    def summary(self) -> dict:
        a = self.alert
        return {"event_id": a.event_id, "revision": a.revision, "state": a.state, "merger_time": a.merger_time_iso,
                "far_per_year": a.far_per_year, "p_astro": a.p_astro, "source_probs": dict(a.source_probs or {}),
                "area50_deg2": self.area50_deg2, "area90_deg2": self.area90_deg2,
                "distance_mpc": None if self.distance_mpc is None else list(self.distance_mpc),
                "expires_at_gps": self.expires_at, "active": True}


class _Columns:
    """Columns of the reports of one segment, computed once for every event."""

    def __init__(self, reports: Sequence[TransientReport], maps: Sequence, classes, settings: MatchSettings,
                 numbers: np.ndarray | None = None):
        n = len(reports)
        self.reports = list(reports)
        self.maps = list(maps)
        self.batch = ReportBatch.from_reports(self.reports, numbers)
        b = self.batch
        names = sorted({r.klass for r in self.reports})
        inv = np.searchsorted(np.asarray(names), b.klass) if n else np.zeros(0, int)
        cl = [classes[k] for k in names]

        def col(f):
            return np.array([f(c) for c in cl], dtype=np.float64)[inv] if n else np.zeros(0)

        self.lo = col(lambda c: c.window_lo_s)
        self.hi = col(lambda c: c.window_hi_s)
        sharp = col(lambda c: 1.0 if c.sharp_time else 0.0) > 0
        cadence = col(lambda c: float(c.cadence_s or 0.0))
        self.sigma = np.where(np.isnan(b.pos_err_deg), col(lambda c: c.pos_err_deg), b.pos_err_deg)
        has_map = np.array([m is not None for m in self.maps], dtype=bool)
        self.point = (self.sigma <= settings.point_sigma_deg) & ~has_map
        lnd = b.last_nondetection
        self.onset_lo = np.where(sharp, b.time, np.where(np.isnan(lnd), b.time - cadence, lnd))
        self.time = b.time
        self.t_min = float(np.min(self.onset_lo)) if n else math.inf
        self.t_max = float(np.max(self.time)) if n else -math.inf

    def __len__(self) -> int:
        return len(self.reports)


def _host_dict(h) -> dict | None:
    if h is None:
        return None
    gid = h.galaxy_id.item() if hasattr(h.galaxy_id, "item") else h.galaxy_id
    return {"galaxy_id": gid, "prob": _finite(h.prob), "prob_gw": _finite(h.prob_gw), "p_cc": _finite(h.p_cc),
            "separation_arcsec": _finite(h.separation_arcsec), "offset_kpc": _finite(h.offset_kpc),
            "distance_mpc": _finite(h.distance_mpc), "distance_err_mpc": _finite(h.distance_err_mpc)}


class Matcher:
    """The matching state of a service: active events, their candidates, the stream clock.

    Parameters
    ----------
    classes : mapping of str to CounterpartClass
    index : GalaxyIndex, optional
        For host ranking and the hosts of point-like candidates.
    settings : MatchSettings
    localization_max_bytes : int, bytes
        Cap when re-reading stored localizations.
    """

    def __init__(self, classes, *, index=None, settings: MatchSettings = MatchSettings(),
                 localization_max_bytes: int = 64 * 1024 * 1024):
        self.classes = dict(classes)
        self.index = index
        self.settings = settings
        self.max_bytes = int(localization_max_bytes)
        self.events: dict[str, EventState] = {}
        self.clock = -math.inf
        self._report_maps: dict[str, Any] = {}
        self._class_names = ", ".join(sorted(self.classes))

    # ------------------------------------------------------------------ restart
    def rebuild(self, store) -> None:
        """Rebuild the active events and their candidates from the store (on start, or after a failed batch)."""
        self.events.clear()
        token = store.positions(CLOCK_SOURCE).get("clock")
        self.clock = float(token) if token is not None else -math.inf
        for sr in store.active_events():
            if sr.expires_at is not None and sr.expires_at <= self.clock:
                continue
            skymap = self._stored_map(store, sr.localization_sha, f"event {sr.alert.event_id}")
            ev = self._new_state(sr.alert, skymap)
            rows = [r for r in store.results(event_id=sr.alert.event_id)
                    if r.revision == sr.alert.revision and r.record.get("candidate")]
            for r in rows:
                rec = r.record
                ev.group(rec["class"]).put(r.transient_id, float(rec["odds"]), float(rec["fap"]))
                if rec.get("p_assoc") or rec.get("rank") is not None:
                    ev.published[r.transient_id] = (float(rec.get("p_assoc") or 0.0), rec.get("rank"))
            keep = set(ev.published) | {t[2] for g in ev.groups.values() for t in g.top}
            for r in rows:
                if r.transient_id in keep:
                    ev.static[r.transient_id] = _static_of(r.record)
            self.events[ev.event_id] = ev

    def _stored_map(self, store, sha: str | None, what: str):
        from matcher.sky import skymap_from_bytes

        data = store.localization_data(sha) if sha else None
        if data is None:
            raise InputError(f"{what}: its localization is not in the store")
        return skymap_from_bytes(data, max_bytes=self.max_bytes, source=f"{what} (stored)")

    def _new_state(self, alert: GWAlert, skymap) -> EventState:
        return EventState(alert, skymap, expires_at=event_expiry(alert, self.classes), settings=self.settings,
                          index=self.index)

    # ------------------------------------------------------------------ a batch
    def check(self, decoded):
        """Turn accepted reports of an unconfigured class into rejections (they cannot be scored)."""
        out = []
        for d in decoded:
            if isinstance(d, Accepted) and isinstance(d.message, TransientReport) and d.message.klass not in self.classes:
                m = d.message
                d = Rejected(d.item, d.codec, f"{d.codec} message {m.transient_id}: class {m.klass!r} is not "
                                              f"configured (classes: {self._class_names})", "class")
            out.append(d)
        return out

    def apply(self, tx, store, decoded: Sequence) -> ApplyStats:
        """Store a batch's decoded items and apply them, segment by segment, in input order.

        Parameters
        ----------
        tx : matcher.store.Transaction
            The batch's open transaction (the caller commits it).
        store : matcher.store.Store
            For reads inside the transaction.
        decoded : sequence of Accepted or Rejected
            Already passed through :meth:`check`.
        """
        stats = ApplyStats(messages=len(decoded))
        segment: list = []
        seen: set[str] = set()

        def flush_segment():
            if segment:
                self._apply_segment(tx, store, list(segment), stats)
                segment.clear()
                seen.clear()

        for d in decoded:
            msg = d.message if isinstance(d, Accepted) else None
            if isinstance(msg, GWAlert):
                flush_segment()
                self._apply_alert(tx, store, d, record(tx, d), stats)
                continue
            if isinstance(msg, TransientReport):
                if msg.transient_id in seen:
                    flush_segment()
                seen.add(msg.transient_id)
            segment.append(d)
        flush_segment()
        tx.set_positions(CLOCK_SOURCE, {"clock": repr(self.clock)})
        return stats

    # ------------------------------------------------------------------ alerts
    def _apply_alert(self, tx, store, d: Accepted, stored, stats: ApplyStats) -> None:
        stats.alerts += 1
        if stored is None:
            stats.duplicates += 1
            return
        stats.accepted += 1
        if stored.effect not in ("new_event", "newer"):
            return  # an older revision, or one already stored: kept, changes nothing
        alert: GWAlert = d.message
        self.events.pop(alert.event_id, None)
        stats.events_changed.append((alert.event_id, alert.revision, alert.state))
        if alert.state == "withdrawn":
            stats.written += len(tx.withdraw(alert.event_id))
            tx.enqueue("event", f"{alert.event_id}/{alert.revision}",
                       {"event_id": alert.event_id, "revision": alert.revision, "state": "withdrawn",
                        "merger_time": alert.merger_time_iso, "active": False})
            return
        stats.written += len(tx.supersede(alert.event_id, alert.revision))
        ev = self._new_state(alert, d.localization.skymap)
        tx.set_expiry(alert.event_id, ev.expires_at)
        tx.enqueue("event", f"{alert.event_id}/{alert.revision}", ev.summary())
        if ev.ranking is not None:
            hosts = ev.ranking.to_dict(self.settings.hosts_published)
            hosts.update(event_id=alert.event_id, revision=alert.revision)
            tx.enqueue("hosts", f"{alert.event_id}/{alert.revision}", hosts)
        # Every stored transient whose onset could meet one of the windows.
        lo = min(c.window_lo_s for c in self.classes.values())
        hi = max(c.window_hi_s + (0.0 if c.sharp_time else float(c.cadence_s or 0.0)) for c in self.classes.values())
        stored_tr = [s for s in store.transients_between(alert.merger_time + lo, alert.merger_time + hi)
                     if s.report.klass in self.classes]
        if stored_tr:
            reports = [s.report for s in stored_tr]
            maps = [self._map_of_stored(store, s) for s in stored_tr]
            cols = _Columns(reports, maps, self.classes, self.settings)
            out: list = []
            self._score_event(store, ev, cols, np.full(len(cols), -math.inf), set(), stats, out)
            stats.written += len(tx.put_results(out))
        if ev.expires_at <= self.clock:
            self._expire(tx, ev)
        else:
            self.events[alert.event_id] = ev

    def _map_of_stored(self, store, s):
        if s.localization_sha is None:
            return None
        m = self._report_maps.get(s.localization_sha)
        if m is None:
            m = self._stored_map(store, s.localization_sha, f"transient {s.report.transient_id}")
            if len(self._report_maps) > 64:
                self._report_maps.clear()
            self._report_maps[s.localization_sha] = m
        return m

    def _expire(self, tx, ev: EventState) -> None:
        info = ev.summary()
        info["active"] = False
        tx.enqueue("event", f"{ev.event_id}/{ev.revision}", info)

    # ------------------------------------------------------------------ reports
    def _apply_segment(self, tx, store, segment: list, stats: ApplyStats) -> None:
        results = record_batch(tx, segment)
        reports, maps, received, updated, rows = [], [], [], set(), []
        for d, r in zip(segment, results):
            if isinstance(d, Rejected):
                stats.quarantined += 1 if r else 0
                stats.duplicates += 0 if r else 1
                continue
            stats.reports += 1
            if r is None:
                stats.duplicates += 1
                continue
            stats.accepted += 1
            if r.effect not in ("new", "updated"):
                continue
            reports.append(d.message)
            rows.append(d.prepared)
            maps.append(None if d.localization is None else d.localization.skymap)
            received.append(d.item.received_at)
            if r.effect == "updated":
                updated.add(d.message.transient_id)
        if not reports:
            return
        cols = _Columns(reports, maps, self.classes, self.settings, _numbers_of(rows))
        # The stream clock before each report (it advances with the reports themselves).
        ahead = np.array([unix_to_gps(t) + CLOCK_LEAD_S for t in received])
        tick = np.minimum(cols.time, ahead)
        before = np.concatenate([[self.clock], np.maximum.accumulate(np.maximum(tick, self.clock))[:-1]])
        out: list = []  # every event's changed records, written in one go (in this order)
        for eid in sorted(self.events):
            self._score_event(store, self.events[eid], cols, before, updated, stats, out)
        stats.written += len(tx.put_results(out))
        self.clock = max(self.clock, float(np.max(tick)))
        for eid in sorted(self.events):
            ev = self.events[eid]
            if ev.expires_at <= self.clock:
                self._expire(tx, ev)
                del self.events[eid]

    def _score_event(self, store, ev: EventState, cols: _Columns, clock_before: np.ndarray,
                     updated: set, stats: ApplyStats, out: list) -> None:
        """Score a segment's reports against one event; update its candidates; append the records to
        write to ``out`` as ``(event_id, revision, transient_id, record)`` (the caller writes them)."""
        full = False
        for tid in updated:  # a changed report first leaves wherever it was
            g = ev.find(tid)
            if g is not None:
                g.remove(tid)
                full = True
        tm = float(ev.alert.merger_time)
        if cols.t_min - tm > max(c.window_hi_s for c in self.classes.values()) + 1.0 and not full:
            return
        # Superset of the exact window test (the engine decides): closed bounds, 1 s margin.
        pre = ((cols.time - tm >= cols.lo - 1.0) & (cols.onset_lo - tm <= cols.hi + 1.0)
               & (clock_before < ev.expires_at))
        new: dict[str, tuple[dict, float, float, str]] = {}
        idx = np.flatnonzero(pre & cols.point)
        if idx.size:
            dens = ev.skymap.density(cols.batch.ra_deg[idx], cols.batch.dec_deg[idx])
            idx = idx[dens >= ev.density_cut]
        if idx.size:
            self._score_rows(ev, cols, idx, new, stats, point=True)
        for i in np.flatnonzero(pre & ~cols.point):
            self._score_rows(ev, cols, np.array([i]), new, stats, point=False)
        wrote = set()
        for tid in sorted(new):
            rec, odds, fap, klass = new[tid]
            ev.group(klass).put(tid, odds, fap)
            ev.static[tid] = rec
            wrote.add(tid)
        stats.candidates += len(new)
        # A changed report that is no longer a candidate: its result says so.
        for tid in sorted(updated - set(new)):
            row = self._stored_static(store, ev, [tid]).get(tid)
            if row is not None:
                row.update(candidate=False, odds=0.0, fap=1.0, p_assoc=0.0, rank=None)
                out.append((ev.event_id, ev.revision, tid, row))
                ev.published.pop(tid, None)
                ev.static.pop(tid, None)
        if wrote or full:
            self._publish(store, ev, wrote, full, out)

    def _score_rows(self, ev: EventState, cols: _Columns, idx: np.ndarray, new: dict, stats: ApplyStats,
                    *, point: bool) -> None:
        reports = [cols.reports[i] for i in idx]
        batch = cols.batch.take(idx)
        ext_d = np.full(idx.size, np.nan)
        ext_s = np.full(idx.size, np.nan)
        hosts = [None] * idx.size
        if point and self.index is not None:
            from matcher.catalog import hosts_for_report

            for j, r in enumerate(reports):
                h = hosts_for_report(self.index, r, skymap=ev.skymap, ranking=ev.ranking,
                                     **dict(self.settings.host_options))
                hosts[j] = h
                if r.redshift is None and r.distance_mpc is None:
                    # The distance term takes the host chosen by chance coincidence alone
                    # (by="position"): choosing it by the GW volume density and then testing its
                    # distance against the GW distance would use the GW data twice.
                    hd = h.host_distance(by="position")
                    if hd is not None:
                        ext_d[j], ext_s[j] = hd
        maps = None if point else [cols.maps[i] for i in idx]
        table = score_reports(ev.alert, ev.skymap, batch, self.classes, report_maps=maps,
                              external_distance_mpc=ext_d, external_distance_err_mpc=ext_s)
        stats.scored += idx.size
        ok = table.in_window & (table.odds > 0)
        if not point:
            ok &= table.sky_per_sr >= ev.density_cut
        keep = np.flatnonzero(ok)
        if not keep.size:
            return
        # Plain Python columns of the kept rows (one tolist per column instead of a numpy scalar per value).
        c = {name: getattr(table, name)[keep].tolist() for name in (
            "odds", "fap", "searched_area_deg2", "credible_level", "dt_s", "sky_per_sr", "time_per_s",
            "distance_factor", "prior", "joint_far_per_year", "background_expected", "distance_mpc",
            "distance_err_mpc", "distance_source")}
        for n, j in enumerate(keep.tolist()):
            r = reports[j]
            far = c["joint_far_per_year"][n]
            source = str(c["distance_source"][n])
            rec = {
                "transient_id": r.transient_id,
                "class": r.klass,
                "odds": c["odds"][n],
                "fap": c["fap"][n],
                "searched_area_deg2": c["searched_area_deg2"][n],
                "credible_level": c["credible_level"][n],
                "dt_s": c["dt_s"][n],
                "terms": {"sky_per_sr": c["sky_per_sr"][n], "time_per_s": c["time_per_s"][n],
                          "distance_factor": c["distance_factor"][n], "prior": c["prior"][n]},
                "joint_far_per_year": None if far != far else far,
                "candidate": True,
                "time": r.time_iso,
                "background_expected": _finite(c["background_expected"][n]),
                "distance": {"mpc": _finite(c["distance_mpc"][n]), "err_mpc": _finite(c["distance_err_mpc"][n]),
                             "source": source},
            }
            h = hosts[j]
            rec["host"] = None if h is None else _host_dict(h.best)
            if source == "external" and h is not None and h.best_by_position is not None:
                gid = h.best_by_position.galaxy_id
                rec["distance"]["host_galaxy_id"] = gid.item() if hasattr(gid, "item") else gid
            new[r.transient_id] = (rec, rec["odds"], rec["fap"], r.klass)

    def _stored_static(self, store, ev: EventState, tids) -> dict[str, dict]:
        want = set(tids)
        out = {}
        for r in store.results(event_id=ev.event_id):
            if r.revision == ev.revision and r.transient_id in want:
                out[r.transient_id] = _static_of(r.record)
        return out

    def _publish(self, store, ev: EventState, new: set, full: bool, out: list) -> None:
        """Append to ``out`` the records whose published ``p_assoc``/``rank`` changed (and every new one)."""
        tops = {t[2] for g in ev.groups.values() for t in g.top}
        if full:
            relevant = {tid for g in ev.groups.values() for tid in g.odds}
        else:
            relevant = set(ev.published) | new | tops
        missing = [t for t in relevant if t not in ev.static]
        if missing:
            ev.static.update(self._stored_static(store, ev, missing))
        k = self.settings.top_ranks
        dec = self.settings.p_assoc_decimals
        # Ranks: the first k of every candidate ordered by (-P, -odds, FAP, id) are among the groups'
        # own top k (within a group P follows the odds), so only those are sorted.
        top_keys = [(neg / g.denominator, neg, fap, tid) for g in ev.groups.values() for neg, fap, tid in g.top]
        top_keys.sort()
        rank_of = {key[3]: r for r, key in enumerate(top_keys[:k], start=1)}
        changed = []
        for g in ev.groups.values():
            den = g.denominator
            odds_of = g.odds
            for tid in relevant:
                odds = odds_of.get(tid)
                if odds is None:
                    continue
                p = odds / den
                value = (round(p, dec), rank_of.get(tid))
                if tid not in new and value == ev.published.get(tid, (0.0, None)):
                    continue
                changed.append((-p, -odds, g.fap[tid], tid, value))
        changed.sort()  # the order of the full ranking, as the records were always written
        for _, _, _, tid, value in changed:
            rec = dict(ev.static[tid])
            rec["p_assoc"], rec["rank"] = value
            out.append((ev.event_id, ev.revision, tid, rec))
            if value == (0.0, None):
                ev.published.pop(tid, None)
            else:
                ev.published[tid] = value
        for tid in list(ev.static):
            if tid not in ev.published and tid not in tops:
                del ev.static[tid]


def _numbers_of(prepared: list) -> np.ndarray | None:
    """The reports' numbers from the decode process's array (``Accepted.prepared``), when every
    report has them in the same batch's array; else None (read from the reports)."""
    if not prepared or prepared[0] is None:
        return None
    table = prepared[0][3]
    if any(p is None or p[3] is not table for p in prepared):
        return None
    return table[[p[4] for p in prepared]]


def _finite(x) -> float | None:
    """A plain float, or None for NaN/inf: records stay plain JSON (the store encodes those in C)."""
    x = float(x)
    return x if math.isfinite(x) else None


def _static_of(record: Mapping[str, Any]) -> dict:
    """A stored record without the fields the store or the publication rule sets."""
    return {k: v for k, v in record.items() if k not in _DYNAMIC}
