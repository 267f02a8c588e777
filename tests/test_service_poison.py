"""Poison input mixed into a good stream: each bad line is quarantined exactly once,
byte-identical, with a reason naming the problem; every good message still yields its
results (the same results as the good stream alone)."""

from __future__ import annotations

import json

from matcher.config import config_from_mapping
from matcher.replay import replay_archive
from matcher.store import Store
from service_scenarios import T0, results_by_key, small_stream, write_archive
from matcher.timeconv import gps_to_iso


def _tr(**over):
    m = {"schema": "matcher/1", "type": "transient", "transient_id": "BAD", "class": "optical", "ra_deg": 121.0,
         "dec_deg": 11.0, "pos_err_deg": 0.0003, "time": gps_to_iso(T0 + 30000.0)}
    m.update(over)
    return json.dumps(m, separators=(",", ":")).encode()


def _gw(**over):
    m = {"schema": "matcher/1", "type": "gw_alert", "event_id": "EV-BAD", "revision": 1, "state": "issued",
         "merger_time": gps_to_iso(T0 + 100.0), "localization": "a1.fits"}
    m.update(over)
    return json.dumps(m, separators=(",", ":")).encode()


def test_every_bad_kind_is_quarantined_once_and_good_messages_are_unaffected(tmp_path):
    good = small_stream(tmp_path)
    limit = max(p.stat().st_size for p in tmp_path.glob("*.fits")) + 1024
    (tmp_path / "big.fits").write_bytes(b"SIMPLE  =" + b" " * (limit + 10))
    (tmp_path / "text.fits").write_bytes(b"this is not a FITS file\n")
    bad = {
        "malformed JSON": b'{"schema":"matcher/1","type":"transient",',
        "wrong type": _tr(transient_id="BAD-1", ra_deg="121.0h"),
        "unknown schema": _tr(transient_id="BAD-2", schema="other/9"),
        "unknown type": _tr(transient_id="BAD-3", type="weather"),
        "coordinates out of range": _tr(transient_id="BAD-4", dec_deg=97.2),
        "non-finite number": b'{"schema":"matcher/1","type":"transient","transient_id":"BAD-5","class":"optical",'
                             b'"ra_deg":NaN,"dec_deg":1.0,"time":"2026-02-10T09:00:00Z"}',
        "unreadable localization": _gw(event_id="EV-BAD-1", localization="missing.fits"),
        "oversized localization": _gw(event_id="EV-BAD-2", localization="big.fits"),
        "not a HEALPix map": _gw(event_id="EV-BAD-3", localization="text.fits"),
        "localization outside the folder": _gw(event_id="EV-BAD-4", localization="../elsewhere.fits"),
        "invalid base64": _gw(event_id="EV-BAD-5", localization={"fits_base64": "***not base64***"}),
        "URL outside the allow-list": _gw(event_id="EV-BAD-6", localization={"url": "https://maps.invalid/x.fits"}),
        "oversized message": _tr(transient_id="BAD-6", note="x" * 5000),
        "unconfigured class": _tr(transient_id="BAD-7", **{"class": "weather_balloon"}),
        "not UTF-8": b'{"schema":"matcher/1","type":"transient","transient_id":"\xff\xfe"}',
        # Numbers Python reads but a float or an SQLite integer cannot hold (these once stopped the loop).
        "integer beyond the float range": _tr(transient_id="BAD-8", ra_deg=10**400),
        "revision beyond an SQLite integer": _gw(event_id="EV-BAD-7", revision=2**64),
    }
    mixed = []
    step = max(1, len(good) // (len(bad) + 1))
    poison = list(bad.values())
    for i, line in enumerate(good):
        mixed.append(line)
        if i % step == step - 1 and poison:
            mixed.append(poison.pop(0))
    mixed.extend(poison)
    cfg = {"state_dir": "state", "limits": {"message_max_bytes": 4096, "localization_max_bytes": limit}}
    clean = replay_archive(write_archive(tmp_path, good), out_dir=tmp_path / "clean", progress_mode="off",
                           config=config_from_mapping(dict(cfg, state_dir="clean-state"), base_dir=tmp_path))
    archive = tmp_path / "mixed.jsonl"
    archive.write_bytes(b"\n".join(mixed) + b"\n")
    config = config_from_mapping(cfg, base_dir=tmp_path)
    res = replay_archive(archive, out_dir=tmp_path / "out", progress_mode="off", config=config)
    res2 = replay_archive(archive, out_dir=tmp_path / "out", progress_mode="off", config=config)  # again
    assert res2.counts == res.counts
    with Store(res.store_path) as st:
        rows = st.quarantined()
        # Each exactly once, byte-identical; an over-long line is kept as its first
        # message_max_bytes + 1 bytes with its true size (the archive source never holds more).
        big = bad["oversized message"]
        kept = {r.raw: r for r in rows}
        cut = big[:4097]
        assert kept[cut].truncated and kept[cut].size == len(big)
        expected = {**bad, "oversized message": cut}
        assert sorted(r.raw for r in rows) == sorted(expected.values())
        reasons = {r.raw: r.reason for r in rows}
        bad = expected
        for what, line in bad.items():
            assert reasons[line], what
        assert "dec_deg" in reasons[bad["coordinates out of range"]]
        assert "weather_balloon" in reasons[bad["unconfigured class"]]
        assert "allow" in reasons[bad["URL outside the allow-list"]]
        assert "ra_deg" in reasons[bad["integer beyond the float range"]]
        assert "revision" in reasons[bad["revision beyond an SQLite integer"]]
        assert all(r.origin_where == str(archive.resolve()) and r.origin_offset for r in rows)
        with Store(clean.store_path) as cs:
            assert results_by_key(st) == results_by_key(cs)
    assert res.counts["messages"] == len(good)
