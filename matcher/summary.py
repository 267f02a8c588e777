"""``summary.json``: every event the store knows, its state, its ranked candidates and top hosts.

Built from the store alone (so it is the same after a replay, a live run, or a restart)::

    {"events": {EVENT_ID: {
        "revision": 2, "state": "revised", "active": true, "merger_time": "...",
        "far_per_year": ..., "p_astro": ..., "area50_deg2": ..., "area90_deg2": ...,
        "distance_mpc": [mean, std], "revisions": [1, 2],
        "n_candidates": 412,
        "candidates": [{"rank": 1, "transient_id": ..., "class": ..., "p_assoc": ..., "fap": ...,
                        "odds": ..., "status": ..., "dt_s": ..., "host": GALAXY_ID or null}, ...],
        "hosts": [{"rank": 1, "galaxy_id": ..., "prob": ..., "cum_prob": ..., ...}, ...]}}}

``candidates`` are those of the latest revision that has results (for a withdrawn event,
the revision it was withdrawn at still shows what had been found, each with status
``withdrawn``), ranked by exact ``P_assoc`` — recomputed from the stored odds with the
same exact sum as the service (:func:`matcher.lifecycle.association_from_sum`), not the
rounded published value — then odds, FAP and transient id.
"""

from __future__ import annotations

import json
from collections import defaultdict
from typing import Any

from matcher.lifecycle import association_from_sum, exact_odds_sum

__all__ = ["build_summary", "summary_json"]


def _event_rows(store) -> tuple[dict[str, dict], dict[tuple[str, int], dict]]:
    """Latest ``event`` output per event, and ``hosts`` output per (event, revision), from the outbox."""
    events: dict[str, dict] = {}
    hosts: dict[tuple[str, int], dict] = {}
    seq = 0
    while True:
        rows = store.outbox_after(seq, 5000)
        if not rows:
            break
        for r in rows:
            if r.kind == "event":
                e = json.loads(r.payload)
                events[e["event_id"]] = {**events.get(e["event_id"], {}), **e}
            elif r.kind == "hosts":
                h = json.loads(r.payload)
                hosts[(h["event_id"], int(h["revision"]))] = h
        seq = rows[-1].seq
    return events, hosts


def build_summary(store, *, candidates: int = 20, hosts: int = 20) -> dict[str, Any]:
    """The summary of every event in ``store`` (see the module docstring).

    Parameters
    ----------
    store : matcher.store.Store
    candidates : int
        Candidates listed per event (``n_candidates`` counts all).
    hosts : int
        Host galaxies listed per event.
    """
    events, host_rows = _event_rows(store)
    out: dict[str, Any] = {}
    for eid in sorted(events):
        info = events[eid]
        cur = store.current_revision(eid)
        revs = [r.alert.revision for r in store.revisions(eid)]
        results = store.results(event_id=eid)
        scored = [r for r in results if r.record.get("candidate")]
        shown_rev = max((r.revision for r in scored), default=None)
        rows = [r for r in scored if r.revision == shown_rev]
        by_class = defaultdict(list)
        for r in rows:
            by_class[r.record["class"]].append(float(r.record["odds"]))
        sums = {k: exact_odds_sum(v) for k, v in by_class.items()}
        ranked = []
        for r in rows:
            rec = r.record
            p = association_from_sum(float(rec["odds"]), sums[rec["class"]])
            ranked.append((-p, -float(rec["odds"]), float(rec["fap"]), r.transient_id, p, rec, r.status))
        ranked.sort(key=lambda x: x[:4])
        cands = []
        for i, (_, _, _, tid, p, rec, status) in enumerate(ranked[:candidates], start=1):
            host = rec.get("host") or {}
            cands.append({"rank": i, "transient_id": tid, "class": rec["class"], "p_assoc": p, "fap": rec["fap"],
                          "odds": rec["odds"], "status": status, "revision": shown_rev, "dt_s": rec.get("dt_s"),
                          "searched_area_deg2": rec.get("searched_area_deg2"), "host": host.get("galaxy_id"),
                          "distance_source": (rec.get("distance") or {}).get("source")})
        shown_hosts = None
        if cur is not None:
            h = host_rows.get((eid, cur.alert.revision)) or host_rows.get((eid, max(
                (rv for (e, rv) in host_rows if e == eid), default=-1)))
            if h is not None:
                shown_hosts = h.get("galaxies", [])[:hosts]
        entry = {
            "revision": cur.alert.revision if cur is not None else info.get("revision"),
            "state": cur.event_state if cur is not None else info.get("state"),
            "active": bool(info.get("active", False)) and (cur is None or cur.event_state != "withdrawn"),
            "merger_time": cur.alert.merger_time_iso if cur is not None else info.get("merger_time"),
            "far_per_year": cur.alert.far_per_year if cur is not None else None,
            "p_astro": cur.alert.p_astro if cur is not None else None,
            "source_probs": dict(cur.alert.source_probs or {}) if cur is not None else None,
            "area50_deg2": info.get("area50_deg2"),
            "area90_deg2": info.get("area90_deg2"),
            "distance_mpc": info.get("distance_mpc"),
            "revisions": revs,
            "n_candidates": len(rows),
            "candidates": cands,
            "hosts": shown_hosts or [],
        }
        if shown_hosts is not None and (eid, cur.alert.revision) in host_rows:
            entry["p_outside_catalog"] = host_rows[(eid, cur.alert.revision)].get("p_outside_catalog")
        out[eid] = entry
    return {"events": out}


def summary_json(summary: dict) -> str:
    """Canonical text of a summary (sorted keys, two-space indent, final newline)."""
    return json.dumps(summary, indent=2, sort_keys=True, allow_nan=False) + "\n"
