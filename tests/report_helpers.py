"""Helpers for the report tests: the invented demo scenario replayed through the service, a small PNG,
and an HTML collector (stdlib parser) for the pages.

Every id, time, position and galaxy here is invented (demo/test data, not a real event).
"""

from __future__ import annotations

from html.parser import HTMLParser
from pathlib import Path

__all__ = ["ROOT", "demo_replay", "small_png", "HtmlCollector", "parse_html", "body_rows", "cells"]

ROOT = Path(__file__).resolve().parent.parent
_BUILT: dict[str, Path] = {}


def small_png(width: int = 40, height: int = 30) -> bytes:
    """A real PNG image (rendered with matplotlib's Agg canvas) of the given size."""
    import io

    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width / 10, height / 10), dpi=10)
    FigureCanvasAgg(fig)
    ax = fig.add_axes([0, 0, 1, 1])
    ax.plot([0, 1], [0, 1], color="#5b2a5e", linewidth=8)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=10)
    return buf.getvalue()


class HtmlCollector(HTMLParser):
    """Collects tags, attributes and the cells of each table (stdlib parser)."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags = []
        self.stack = []
        self.tables: dict[str, list[list[dict]]] = {}
        self._table = None
        self._cell = None
        self.text = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append((tag, a))
        if tag not in ("meta", "img", "br"):
            self.stack.append(tag)
        if tag == "table" and a.get("id"):
            self._table = a["id"]
            self.tables[self._table] = []
        elif tag == "tr" and self._table:
            self.tables[self._table].append([])
        elif tag == "td" and self._table:
            self._cell = {"attrs": a, "text": ""}
            self.tables[self._table][-1].append(self._cell)

    def handle_endtag(self, tag):
        if tag in ("meta", "img", "br"):
            return
        assert self.stack and self.stack[-1] == tag, f"</{tag}> closes <{self.stack[-1] if self.stack else None}>"
        self.stack.pop()
        if tag == "td":
            self._cell = None
        if tag == "table":
            self._table = None

    def handle_data(self, data):
        self.text.append(data)
        if self._cell is not None:
            self._cell["text"] += data


def parse_html(page: str) -> HtmlCollector:
    p = HtmlCollector()
    p.feed(page)
    p.close()
    assert p.stack == [], f"unclosed tags: {p.stack}"
    return p


def body_rows(p: HtmlCollector, table: str) -> list:
    """The rows of a table that have data cells (header rows have only th)."""
    return [r for r in p.tables[table] if r]


def cells(row) -> dict:
    """A row's data cells by their ``data-col``."""
    return {c["attrs"]["data-col"]: c for c in row if "data-col" in c["attrs"]}


def demo_replay(tmp_path_factory) -> Path:
    """The demo scenario (:mod:`matcher.demo`, invented), small, replayed once per test session through the
    service with the ``html`` report writer configured; returns the folder.

    ``FOLDER/state/matcher.sqlite`` is the store, ``FOLDER/reports/EVENT/`` the reports the service wrote,
    ``FOLDER/summary.json`` the replay's summary, ``FOLDER/demo.yaml`` the configuration.
    """
    if "replay" in _BUILT:
        return _BUILT["replay"]
    import os

    from matcher.demo import write_scenario
    from matcher.replay import replay_archive

    folder = tmp_path_factory.mktemp("report-replay")
    write_scenario(folder / "scenario", n_background=100, n_followup=20, n_galaxies=2000)
    text = (ROOT / "config" / "demo.yaml").read_text(encoding="utf-8")
    (folder / "demo.yaml").write_text(text + "reports:\n  html: {kind: html, out: reports, top_hosts: 10, dpi: 60}\n",
                                      encoding="utf-8")
    old = os.environ.get("MATCHER_PROGRESS")
    os.environ["MATCHER_PROGRESS"] = "off"
    try:
        replay_archive(folder / "scenario" / "alerts.jsonl", out_dir=folder, config_path=folder / "demo.yaml")
    finally:
        if old is None:
            os.environ.pop("MATCHER_PROGRESS", None)
        else:
            os.environ["MATCHER_PROGRESS"] = old
    _BUILT["replay"] = folder
    return folder
