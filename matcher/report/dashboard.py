"""The live terminal view of ``matcher listen --dashboard`` (rich).

Three parts, top to bottom: a status line (uptime, messages per second over the last
10 s, totals of messages, reports, alerts, results written, quarantined input); the
active events (id, revision, state, merger time, 50 %/90 % area, distance, candidates);
and the best candidates of each active event (exact P_assoc, FAP, odds, host galaxy);
and, for sources that know it (Kafka), the consumer lag per partition.
It reads the service's in-memory state only (no store queries while drawing), so it
can redraw often without slowing the loop.
"""

from __future__ import annotations

import time

from matcher.report.ranked import format_p

__all__ = ["Dashboard", "render"]


def _uptime(seconds: float) -> str:
    s = int(seconds)
    return f"{s // 3600:d}:{s % 3600 // 60:02d}:{s % 60:02d}"


def render(service, *, best: int = 3, quarantined_before: int = 0):
    """A rich renderable of the service's state now."""
    from rich.console import Group
    from rich.panel import Panel
    from rich.table import Table
    from rich.text import Text

    st = service.stats
    tot = st.totals
    head = Text.assemble(
        ("matcher listen", "bold"), f"  up {_uptime(time.monotonic() - st.started)}",
        "  ", (f"{st.rate():,.0f} msg/s", "bold green"),
        f"  messages {tot.messages:,}  reports {tot.reports:,}  alerts {tot.alerts:,}  results written {tot.written:,}  ",
        ("quarantined ", "yellow"), (f"{quarantined_before + tot.quarantined:,}", "bold yellow"),
        "  sources: " + ", ".join(f"{s.name} ({s.kind}{', done' if s.finished else ''})" for s in service.sources),
    )
    if service.stopping:
        head.append("  stopping after this batch…", style="bold red")
    events = Table(title="active events", title_justify="left", expand=True, header_style="bold")
    for name, kw in (("event", {}), ("rev", {"justify": "right"}), ("state", {}), ("merger (UTC)", {}),
                     ("50% deg²", {"justify": "right"}), ("90% deg²", {"justify": "right"}),
                     ("distance Mpc", {"justify": "right"}), ("candidates", {"justify": "right"})):
        events.add_column(name, **kw)
    cands = Table(title="best candidates", title_justify="left", expand=True, header_style="bold")
    for name, kw in (("event", {}), ("#", {"justify": "right"}), ("transient", {}), ("class", {}),
                     ("P_assoc", {"justify": "right"}), ("FAP", {"justify": "right"}), ("odds", {"justify": "right"}),
                     ("host", {})):
        cands.add_column(name, **kw)
    for eid in sorted(service.matcher.events):
        ev = service.matcher.events[eid]
        d = ev.distance_mpc
        events.add_row(eid, str(ev.revision), ev.alert.state, ev.alert.merger_time_iso[:19].replace("T", " "),
                       f"{ev.area50_deg2:,.0f}", f"{ev.area90_deg2:,.0f}", f"{d[0]:.0f} ± {d[1]:.0f}" if d else "-",
                       f"{ev.n_candidates:,}")
        for i, c in enumerate(ev.best(best), start=1):
            cands.add_row(eid if i == 1 else "", str(i), c["transient_id"], c["class"], format_p(c["p_assoc"]),
                          format_p(c["fap"]), f"{c['odds']:.3g}", "-" if c["host"] is None else str(c["host"]))
    if not service.matcher.events:
        events.add_row("(none)", "", "", "", "", "", "", "")
    parts = [head, events, cands]
    lag_rows = [(s.name, row) for s in service.sources if callable(getattr(s, "lag", None)) for row in s.lag()]
    if lag_rows:
        # Sources that know their consumer lag (Kafka) report it per partition, without a network call.
        lag = Table(title="consumer lag", title_justify="left", expand=True, header_style="bold")
        for name, kw in (("source", {}), ("topic", {}), ("partition", {"justify": "right"}), ("role", {}),
                         ("end", {"justify": "right"}), ("done", {"justify": "right"}),
                         ("lag", {"justify": "right"}), ("in flight", {"justify": "right"})):
            lag.add_column(name, **kw)
        for src, r in lag_rows:
            lag.add_row(src, r["topic"], str(r["partition"]), r["role"],
                        *("-" if r[k] is None else f"{r[k]:,}" for k in ("end", "done", "lag", "in_flight")))
        parts.append(lag)
    return Panel(Group(*parts), title="matcher", border_style="blue")


class Dashboard:
    """Keeps a rich ``Live`` display up to date from ``on_batch`` calls (at most ``fps`` redraws/s)."""

    def __init__(self, service, *, console=None, fps: float = 4.0, quarantined_before: int = 0):
        from rich.live import Live

        self.service = service
        self.quarantined_before = quarantined_before
        self._min_dt = 1.0 / fps
        self._last = 0.0
        self.live = Live(render(service, quarantined_before=quarantined_before), console=console,
                         refresh_per_second=fps, transient=False)

    def update(self, *_args) -> None:
        now = time.monotonic()
        if now - self._last >= self._min_dt:
            self._last = now
            self.live.update(render(self.service, quarantined_before=self.quarantined_before))

    def __enter__(self) -> "Dashboard":
        self.live.__enter__()
        return self

    def __exit__(self, *exc) -> None:
        self.live.update(render(self.service, quarantined_before=self.quarantined_before))
        self.live.__exit__(*exc)
