"""Helpers for the streams, store and config tests: invented messages and a tiny sky map.

Every id, time and position here is invented (demo/test data, not a real event).
"""

from __future__ import annotations

import json

import numpy as np

from matcher.sky import flat_fits_bytes

__all__ = ["gw", "transient", "line", "tiny_map_bytes"]


def gw(event_id="EV-TEST-1", revision=1, state="issued", localization="map.fits", **extra):
    """A native GW alert as a dict (withdrawn alerts need no localization)."""
    m = {"schema": "matcher/1", "type": "gw_alert", "event_id": event_id, "revision": revision, "state": state,
         "merger_time": "2026-03-14T01:02:03.250Z", "far_per_year": 0.5, "p_astro": 0.9,
         "source_probs": {"bns": 0.8, "terrestrial": 0.1}}
    if localization is not None:
        m["localization"] = localization
    m.update(extra)
    return m


def transient(tid="TR-1", klass="optical", ra=150.25, dec=-20.5, time="2026-03-14T05:00:00Z", **extra):
    m = {"schema": "matcher/1", "type": "transient", "transient_id": tid, "class": klass, "ra_deg": ra,
         "dec_deg": dec, "pos_err_deg": 0.0003, "time": time, "last_nondetection": "2026-03-13T05:00:00Z"}
    m.update(extra)
    return m


def line(obj) -> bytes:
    return json.dumps(obj, separators=(",", ":")).encode()


def tiny_map_bytes() -> bytes:
    """A valid nside=1 NESTED map (12 equal pixels): the smallest real HEALPix FITS file."""
    return flat_fits_bytes(np.full(12, 1 / 12), nest=True)
