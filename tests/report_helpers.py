"""Helpers for the report tests: a store filled with one invented event, and a hand-made report.

Every id, time, position and galaxy here is invented (demo/test data, not a real event).

:func:`filled_store` writes alerts and transient reports through the native codec and the
store's own transaction API, scores the reports with the coincidence engine
(:func:`matcher.coincidence.score_reports`) and writes results in the service's record
format (the fields of :meth:`ScoreTable.record`, ``candidate``, ``time``, ``distance``,
``host``; ``p_assoc`` rounded to 4 decimals and ``rank`` only for the first five, as
the service publishes them), plus each revision's host ranking in the outbox.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

from matcher.catalog import open_galaxy_index, rank_hosts
from matcher.coincidence import default_classes, score_reports
from matcher.sky import Blob, kappa_for_area, moc_fits_bytes, read_skymap, synthetic_skymap
from matcher.store import Store
from matcher.streams.codecs import NativeCodec
from matcher.streams.intake import decode_item, record
from matcher.streams.localization import LocalizationLimits
from matcher.streams.raw import Origin, RawItem

__all__ = ["EVENT", "MERGER", "filled_store", "withdraw", "demo_store", "small_png", "ROOT"]

ROOT = Path(__file__).resolve().parent.parent
EVENT = "GW-DEMO-0007"
MERGER = "2026-11-28T03:14:15.926Z"
TOP_RANKS = 5

# (id, class, ra, dec, err, time, last non-detection, extra fields)
REPORTS = [
    ("AT-DEMO-7a", "optical", 213.31, -21.42, 0.0003, "2026-11-28T09:40:00Z", "2026-11-27T09:50:00Z",
     {"redshift": 0.027, "redshift_err": 0.001}),
    ("AT-DEMO-7b", "optical", 212.95, -22.10, 0.0003, "2026-11-28T22:05:00Z", "2026-11-26T22:00:00Z", {}),
    ("AT-DEMO-7c", "optical", 213.80, -20.90, 0.0003, "2026-11-29T04:30:00Z", "2026-11-28T04:00:00Z",
     {"redshift": 0.11, "redshift_err": 0.002}),
    ("GRB-DEMO-7", "gamma_ray", 214.6, -23.0, 4.0, "2026-11-28T03:14:17.700Z", None, {}),
    ("AT-DEMO-7x", "optical", 213.2, -21.6, 0.0003, "2026-11-20T01:00:00Z", "2026-11-18T01:00:00Z", {}),  # before
]


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


def _item(obj, folder: Path, n: int, t: float) -> RawItem:
    data = json.dumps(obj, separators=(",", ":")).encode()
    return RawItem(data, Origin("demo", "archive", str(folder / "demo.jsonl"), None, n), ("archive:demo", str(n)),
                   t, str(folder))


def _alert(revision: int, state: str, mapfile: str | None, far=3.2e-9, p_astro=0.97):
    m = {"schema": "matcher/1", "type": "gw_alert", "event_id": EVENT, "revision": revision, "state": state,
         "merger_time": MERGER, "far_per_year": far, "p_astro": p_astro,
         "source_probs": {"bns": 0.91, "nsbh": 0.04, "terrestrial": 0.03, "bbh": 0.02}}
    if mapfile is not None:
        m["localization"] = {"path": mapfile}
    return m


def _transient(tid, klass, ra, dec, err, t, lnd, extra):
    m = {"schema": "matcher/1", "type": "transient", "transient_id": tid, "class": klass, "ra_deg": ra,
         "dec_deg": dec, "pos_err_deg": err, "time": t}
    if lnd is not None:
        m["last_nondetection"] = lnd
    m.update(extra)
    return m


def _records(table, hosts):
    """Records of the scored candidates as the service stores them, with their published p_assoc and rank."""
    rows = [j for j in range(len(table)) if table.in_window[j] and table.odds[j] > 0]
    keyed = sorted((-float(table.p_assoc[j]), -float(table.odds[j]), float(table.fap[j]), str(table.transient_id[j]), j)
                   for j in rows)
    out = {}
    for rank, (negp, _, _, tid, j) in enumerate(keyed, start=1):
        rec = table.record(j)
        rec.update(candidate=True, background_expected=float(table.background_expected[j]),
                   distance={"mpc": float(table.distance_mpc[j]), "err_mpc": float(table.distance_err_mpc[j]),
                             "source": str(table.distance_source[j])},
                   host=hosts.get(tid))
        rec["p_assoc"] = round(-negp, 4)
        rec["rank"] = rank if rank <= TOP_RANKS else None
        out[tid] = rec
    return out


def filled_store(folder: Path, *, with_hosts: bool = True) -> Store:
    """A store with event :data:`EVENT`: revision 1 (wide map), revision 2 (the demo blob); five transient
    reports, four of them candidates; host rankings in the outbox.

    Revision 2's map is ``fixtures/skymaps/demo_blob.multiorder.fits.gz`` (invented); revision 1's is a
    synthetic 300 deg² blob around the same place.
    """
    folder.mkdir(parents=True, exist_ok=True)
    wide = synthetic_skymap([Blob(214.0, -22.0, kappa_for_area(300.0))], distance=(130.0, 40.0), max_order=8)
    (folder / "rev1.multiorder.fits").write_bytes(moc_fits_bytes(wide))
    (folder / "rev2.multiorder.fits.gz").write_bytes(
        (ROOT / "fixtures" / "skymaps" / "demo_blob.multiorder.fits.gz").read_bytes())
    classes = default_classes()
    index = open_galaxy_index(ROOT / "fixtures" / "catalog" / "demo_galaxies.ecsv") if with_hosts else None
    store = Store(folder / "state" / "matcher.sqlite")
    codec = NativeCodec()
    t0 = 1795835700.0  # Unix s, a few minutes after the invented merger
    n = 0

    def put(obj, t):
        nonlocal n
        n += 1
        d = decode_item(_item(obj, folder, n, t), codec, LocalizationLimits())
        with store.transaction() as tx:
            stored = record(tx, d)
        return d, stored

    reports = []
    for k, r in enumerate(REPORTS):
        d, _ = put(_transient(*r), t0 + 60.0 * k)
        reports.append(d.message)
    for rev, mapfile, far in ((1, "rev1.multiorder.fits", 3.2e-9), (2, "rev2.multiorder.fits.gz", 1.1e-9)):
        d, _ = put(_alert(rev, "issued" if rev == 1 else "revised", mapfile, far=far), t0 + 600.0 * rev)
        alert, skymap = d.message, d.localization.skymap
        table = score_reports(alert, skymap, reports, classes)
        ranking = rank_hosts(skymap, index, meta={"event_id": EVENT, "revision": rev}) if index is not None else None
        hosts = {}
        if ranking is not None:
            for j, r in enumerate(reports):
                best = int(np.argmin((ranking.ra_deg - r.ra_deg) ** 2 + (ranking.dec_deg - r.dec_deg) ** 2))
                hosts[r.transient_id] = {"galaxy_id": str(ranking.galaxy_id[best]), "prob": 0.5 + 0.1 * j,
                                         "prob_gw": float(ranking.prob[best]), "p_cc": 0.01,
                                         "separation_arcsec": 3.0, "offset_kpc": 1.5,
                                         "distance_mpc": float(ranking.distance_mpc[best]),
                                         "distance_err_mpc": float(ranking.distance_err_mpc[best])}
        with store.transaction() as tx:
            tx.supersede(EVENT, rev)
            for tid, rec in _records(table, hosts).items():
                tx.put_result(EVENT, rev, tid, rec)
            if ranking is not None:
                payload = ranking.to_dict(20)
                payload.update(event_id=EVENT, revision=rev)
                tx.enqueue("hosts", f"{EVENT}/{rev}", payload)
    return store


def withdraw(store: Store, folder: Path) -> None:
    """Add revision 3 of :data:`EVENT`, a withdrawal, and mark its results withdrawn (as the service does)."""
    d = decode_item(_item(_alert(3, "withdrawn", None), folder, 99, 1795838700.0), NativeCodec(), LocalizationLimits())
    with store.transaction() as tx:
        record(tx, d)
        tx.withdraw(EVENT)


_BUILT: dict[str, Path] = {}


def demo_store(tmp_path_factory, tmp_path: Path | None = None) -> Store:
    """The :func:`filled_store` of this test session (built once, ~5 s of scoring), opened.

    With ``tmp_path`` the store file is copied there first, so the test may change it.
    """
    import shutil

    if "path" not in _BUILT:
        folder = tmp_path_factory.mktemp("report-demo")
        filled_store(folder).close()
        _BUILT["path"] = folder / "state" / "matcher.sqlite"
    src = _BUILT["path"]
    if tmp_path is None:
        return Store(src)
    dst = tmp_path / "state" / "matcher.sqlite"
    dst.parent.mkdir(parents=True, exist_ok=True)
    shutil.copyfile(src, dst)
    return Store(dst)


def finite(x) -> bool:
    return x is not None and math.isfinite(x)
