"""Invented archive pieces shared by the intake and service benchmarks."""

from __future__ import annotations

import json
import time
from pathlib import Path

import numpy as np

__all__ = ["write_optical_reports", "json_loads_seconds"]


def write_optical_reports(fh, rng: np.random.Generator, reports: int, t0: float) -> None:
    """Append ``reports`` invented optical reports (isotropic, uniform over 3 days from ``t0``) as JSON Lines."""
    from matcher.timeconv import gps_to_iso

    ra = rng.uniform(0, 360, reports)
    dec = np.degrees(np.arcsin(rng.uniform(-1, 1, reports)))
    t = t0 + np.sort(rng.uniform(0, 86400.0 * 3, reports))
    for j in range(reports):
        fh.write(json.dumps({
            "schema": "matcher/1", "type": "transient", "transient_id": f"BT{j:07d}", "class": "optical",
            "ra_deg": round(float(ra[j]), 6), "dec_deg": round(float(dec[j]), 6), "pos_err_deg": 0.0003,
            "time": gps_to_iso(float(t[j])), "last_nondetection": gps_to_iso(float(t[j]) - 172800.0),
            "mag": round(float(rng.uniform(18, 23)), 2)}) + "\n")


def json_loads_seconds(path: Path) -> float:
    """The baseline: seconds to read the file's lines and ``json.loads`` each."""
    t = time.perf_counter()
    with open(path, "rb") as fh:
        for raw in fh:
            json.loads(raw)
    return time.perf_counter() - t
