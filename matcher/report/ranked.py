"""The ranked table people read at the end of a replay or demo: events, candidates, hosts.

:func:`ranked_tables` turns a summary (:mod:`matcher.summary`) into rich renderables:
one panel per event with its state, area, distance and revision, its best candidates
(P_assoc, FAP, odds, time after the merger, host galaxy) and its best host galaxies.
"""

from __future__ import annotations

from typing import Any

__all__ = ["ranked_tables", "format_p", "format_dt"]


def format_p(p: float | None) -> str:
    """A probability for people: 3 significant digits, scientific below 1e-3."""
    if p is None:
        return "-"
    if p == 0:
        return "0"
    return f"{p:.3f}" if p >= 1e-3 else f"{p:.1e}"


def format_dt(dt_s: float | None) -> str:
    """A time offset (s) as ±N s, ±N.N h or ±N.N d."""
    if dt_s is None:
        return "-"
    a = abs(dt_s)
    if a < 600:
        return f"{dt_s:+.0f} s"
    if a < 2 * 86400:
        return f"{dt_s / 3600:+.1f} h"
    return f"{dt_s / 86400:+.1f} d"


def _area(v) -> str:
    return "-" if v is None else (f"{v:,.0f}" if v >= 10 else f"{v:.1f}")


def ranked_tables(summary: dict[str, Any], *, top: int = 5, hosts: int = 3):
    """Rich renderables for every event of ``summary`` (best candidates first)."""
    from rich.console import Group
    from rich.panel import Panel
    from rich.table import Table
    from rich.text import Text

    out = []
    for eid, ev in summary.get("events", {}).items():
        state = ev.get("state") or "?"
        style = {"withdrawn": "red", "revised": "green", "issued": "cyan"}.get(state, "white")
        dist = ev.get("distance_mpc")
        head = Text.assemble((eid, "bold"), "  revision ", (str(ev.get("revision")), "bold"), "  ",
                             (state, style),
                             f"  90% area {_area(ev.get('area90_deg2'))} deg²",
                             f"  distance {dist[0]:.0f} ± {dist[1]:.0f} Mpc" if dist else "",
                             f"  candidates {ev.get('n_candidates', 0):,}")
        t = Table(box=None, pad_edge=False, header_style="bold dim")
        for name, kw in (("#", {"justify": "right"}), ("transient", {}), ("class", {}),
                         ("P_assoc", {"justify": "right"}), ("FAP", {"justify": "right"}),
                         ("odds", {"justify": "right"}), ("Δt", {"justify": "right"}), ("host", {}),
                         ("status", {})):
            t.add_column(name, **kw)
        for c in ev.get("candidates", [])[:top]:
            t.add_row(str(c["rank"]), c["transient_id"], c["class"], format_p(c["p_assoc"]), format_p(c["fap"]),
                      f"{c['odds']:.3g}", format_dt(c.get("dt_s")), "-" if c.get("host") is None else str(c["host"]),
                      c.get("status", ""))
        parts = [head, t if ev.get("candidates") else Text("no candidates", style="dim")]
        if ev.get("hosts"):
            ht = Table(box=None, pad_edge=False, header_style="bold dim", title_justify="left")
            for name in ("host rank", "galaxy", "P(host)", "distance"):
                ht.add_column(name)
            for h in ev["hosts"][:hosts]:
                ht.add_row(str(h["rank"]), str(h["galaxy_id"]), format_p(h["prob"]),
                           f"{h['distance_mpc']:.0f} Mpc")
            parts.append(ht)
        out.append(Panel(Group(*parts), expand=True, border_style=style))
    return out
