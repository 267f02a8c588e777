"""Small invented streams for the service tests (every id, time and position is made up).

:func:`small_stream` gives the lines of an archive that exercises the lifecycle: an
event with a broad first map and a compact second one (and its first revision sent
again afterwards), an event withdrawn later, transients before and after each
revision (a few reported twice with changed content), sharp gamma-ray triggers with
broad errors, and reports outside every window. Maps have no distance layers, so
scoring needs no distance tables and the tests stay fast.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from matcher.sky import Blob, kappa_for_area, moc_fits_bytes, synthetic_skymap
from matcher.timeconv import gps_to_iso, iso_to_gps

__all__ = ["small_stream", "write_archive", "write_inbox", "results_by_key", "T0"]

T0 = iso_to_gps("2026-02-10T08:00:00Z")  # the first event's merger (invented)


def _map(folder: Path, name: str, ra: float, dec: float, area: float) -> str:
    sm = synthetic_skymap([Blob(ra, dec, kappa_for_area(area))], max_order=7)
    (folder / name).write_bytes(moc_fits_bytes(sm))
    return name


def _gw(eid, rev, state, t, loc=None, probs=None):
    m = {"schema": "matcher/1", "type": "gw_alert", "event_id": eid, "revision": rev, "state": state,
         "merger_time": gps_to_iso(t), "far_per_year": 0.01, "p_astro": 0.95,
         "source_probs": probs or {"bns": 0.9, "terrestrial": 0.05}}
    if loc:
        m["localization"] = loc
    return m


def _tr(tid, klass, ra, dec, t, **extra):
    m = {"schema": "matcher/1", "type": "transient", "transient_id": tid, "class": klass,
         "ra_deg": round(float(ra) % 360, 6), "dec_deg": round(float(dec), 6), "time": gps_to_iso(float(t))}
    m.update(extra)
    return m


def small_stream(folder: Path, *, n: int = 240, seed: int = 7) -> list[bytes]:
    """The lines (bytes, no newline) of an invented stream; maps are written into ``folder``."""
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    a1 = _map(folder, "a1.fits", 120.0, 10.0, 600.0)
    a2 = _map(folder, "a2.fits", 121.0, 11.0, 60.0)
    b1 = _map(folder, "b1.fits", 250.0, -40.0, 300.0)
    msgs = []

    def optical(i, centre, spread, t_lo, t_hi):
        t = rng.uniform(t_lo, t_hi)
        return _tr(f"OT-{i:04d}", "optical", centre[0] + rng.normal(0, spread), centre[1] + rng.normal(0, spread), t,
                   pos_err_deg=0.0003, last_nondetection=gps_to_iso(t - 86400.0))

    msgs.append(_gw("EV-A", 1, "issued", T0, a1))
    for i in range(n // 3):
        msgs.append(optical(i, (120.0, 10.0), 6.0, T0 + 600, T0 + 20000))
    msgs.append(_tr("GRB-1", "gamma_ray", 123.0, 12.0, T0 + 2.0, pos_err_deg=4.0))
    msgs.append(_tr("GRB-2", "gamma_ray", 40.0, 70.0, T0 + 3.0, pos_err_deg=8.0))
    msgs.append(_gw("EV-B", 1, "issued", T0 + 5000.0, b1))
    msgs.append(_gw("EV-A", 2, "revised", T0, a2))
    for i in range(n // 3, 2 * n // 3):
        msgs.append(optical(i, (121.0, 11.0), 3.0, T0 + 20000, T0 + 90000))
        if i % 9 == 0:  # a report of an earlier transient again, with a changed position
            j = i - n // 3
            msgs.append(_tr(f"OT-{j:04d}", "optical", 121.0 + rng.normal(0, 1), 11.0 + rng.normal(0, 1),
                            T0 + 700.0, pos_err_deg=0.0003, last_nondetection=gps_to_iso(T0 - 3600.0)))
    msgs.append(_gw("EV-A", 1, "issued", T0, a1))  # the first revision again, late: changes nothing
    for i in range(2 * n // 3, n):
        msgs.append(optical(i, (250.0, -40.0), 5.0, T0 + 6000, T0 + 80000))
    msgs.append(_tr("OT-LATE", "optical", 121.0, 11.0, T0 + 10 * 86400.0, pos_err_deg=0.0003))  # outside windows
    msgs.append(_gw("EV-B", 2, "withdrawn", T0 + 5000.0))
    msgs.append(_tr("NU-1", "neutrino", 250.5, -40.2, T0 + 5100.0, pos_err_deg=1.0))
    return [json.dumps(m, separators=(",", ":")).encode() for m in msgs]


def write_archive(folder: Path, lines: list[bytes]) -> Path:
    path = folder / "stream.jsonl"
    path.write_bytes(b"\n".join(lines) + b"\n")
    return path


def write_inbox(folder: Path, lines: list[bytes]) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    for i, line in enumerate(lines):
        tmp = folder / f".{i:06d}.json"
        tmp.write_bytes(line)
        tmp.rename(folder / f"{i:06d}.json")
    return folder


def results_by_key(store) -> dict[str, str]:
    """Every stored result as canonical JSON text, by key."""
    return {r.key: json.dumps(r.record, sort_keys=True) for r in store.results()}
