"""An invented observing scenario for ``matcher demo`` and the end-to-end tests.

Everything here is made up — event ids, times, sky positions, galaxies: a fictional
eight-day stretch of an observing run (from 2027-05-03 UTC) with

* a binary-neutron-star merger, ``EVT-270504-A``, with two revisions: a broad first
  map (~900 deg²) issued within a minute, then a compact one (~35 deg²) five hours
  later; its first revision is re-sent afterwards (kept, changes nothing);
* one real counterpart, ``AT-DEMO-27kn``: an optical transient 1.5 arcsec from a
  catalogue galaxy at the merger's distance, first detected 11 h after the merger
  (last non-detection 22 h before it), reported again a day later with the host's
  spectroscopic redshift;
* thousands of unrelated optical transients (all-sky, plus a follow-up survey's
  finds inside the neutron-star map, some on catalogue galaxies at other distances),
  unrelated gamma-ray and neutrino triggers (a gamma-ray burst 400 s after the
  neutron-star merger — outside its window — and a neutrino 120 s after the black-hole
  merger, far from its map);
* a binary black hole, ``EVT-270506-B``, with nothing to find;
* an alert, ``EVT-270507-C``, withdrawn two hours after it was issued;
* a generated galaxy catalogue around the neutron-star map.

:func:`write_scenario` writes ``alerts.jsonl`` (one native message per line, in
arrival order, each with ``received_at``), the localizations (multi-order FITS) and
``galaxies.ecsv``; :data:`TRUTH` names what a correct matcher must find.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from matcher.timeconv import gps_to_iso, iso_to_gps

__all__ = ["write_scenario", "Scenario", "TRUTH", "DEMO_SEED"]

DEMO_SEED = 20270503
_RUN_START = iso_to_gps("2027-05-03T00:00:00Z")
_DAY = 86400.0

#: What the scenario was built to contain.
TRUTH = {
    "ns_event": "EVT-270504-A",
    "bbh_event": "EVT-270506-B",
    "withdrawn_event": "EVT-270507-C",
    "counterpart": "AT-DEMO-27kn",
}


@dataclass(frozen=True)
class Scenario:
    """Where the scenario was written, and its facts.

    Attributes
    ----------
    folder, archive, catalog : Path
    host_galaxy_id : int
        The counterpart's host in the catalogue.
    n_messages, n_reports : int
    """

    folder: Path
    archive: Path
    catalog: Path
    host_galaxy_id: int
    n_messages: int
    n_reports: int


def _vec(ra, dec):
    ra, dec = np.radians(ra), np.radians(dec)
    return np.stack([np.cos(dec) * np.cos(ra), np.cos(dec) * np.sin(ra), np.sin(dec)], axis=-1)


def _offset(ra, dec, sep_deg, pa_deg):
    """The point ``sep_deg`` from (ra, dec) at position angle ``pa_deg`` (east of north)."""
    ra1, dec1, s, pa = (math.radians(v) for v in (ra, dec, sep_deg, pa_deg))
    dec2 = math.asin(math.sin(dec1) * math.cos(s) + math.cos(dec1) * math.sin(s) * math.cos(pa))
    ra2 = ra1 + math.atan2(math.sin(pa) * math.sin(s) * math.cos(dec1), math.cos(s) - math.sin(dec1) * math.sin(dec2))
    return math.degrees(ra2) % 360.0, math.degrees(dec2)


def _cone(rng, ra, dec, radius_deg, n):
    cos_t = rng.uniform(math.cos(math.radians(radius_deg)), 1.0, n)
    pa = rng.uniform(0, 360, n)
    out = [_offset(ra, dec, math.degrees(math.acos(c)), p) for c, p in zip(cos_t, pa)]
    return np.array([o[0] for o in out]), np.array([o[1] for o in out])


def _alert(event_id, revision, state, merger, *, far, p_astro, probs, localization=None):
    m = {"schema": "matcher/1", "type": "gw_alert", "event_id": event_id, "revision": revision, "state": state,
         "merger_time": gps_to_iso(merger), "far_per_year": far, "p_astro": p_astro, "source_probs": probs}
    if localization is not None:
        m["localization"] = localization
    return m


def _report(tid, klass, ra, dec, t, *, err=None, lnd=None, **extra):
    m = {"schema": "matcher/1", "type": "transient", "transient_id": tid, "class": klass,
         "ra_deg": round(float(ra) % 360.0, 6), "dec_deg": round(float(dec), 6), "time": gps_to_iso(float(t))}
    if err is not None:
        m["pos_err_deg"] = float(err)
    if lnd is not None:
        m["last_nondetection"] = gps_to_iso(float(lnd))
    m.update({k: v for k, v in extra.items() if v is not None})
    return m


def write_scenario(folder, *, seed: int = DEMO_SEED, n_background: int = 6000, n_followup: int = 600,
                   n_galaxies: int = 30000) -> Scenario:
    """Write the invented scenario into ``folder`` (created); identical bytes for the same arguments.

    Parameters
    ----------
    folder : path
    seed : int
    n_background : int
        Unrelated optical transients over the whole sky and the eight days.
    n_followup : int
        Unrelated optical transients found inside the neutron-star map after the merger.
    n_galaxies : int
        Galaxies in the generated catalogue (a 30° cone around the neutron-star map).
    """
    from matcher.catalog import synthetic_catalog
    from matcher.coincidence import redshift_at_distance
    from matcher.sky import Blob, kappa_for_area, moc_fits_bytes, synthetic_skymap

    folder = Path(folder)
    (folder / "maps").mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)

    # --- the catalogue and the counterpart's host
    centre = (197.45, -23.38)  # an invented patch of sky
    cat = synthetic_catalog(n_galaxies, rng, max_distance_mpc=400.0, cone=(*centre, 30.0), redshift_fraction=0.2,
                            clustering=0.3)
    for name, digits in (("ra_deg", 6), ("dec_deg", 6), ("distance_mpc", 3), ("distance_err_mpc", 3),
                         ("weight", 5), ("mag", 3), ("radius_arcsec", 3), ("redshift", 6), ("redshift_err", 6),
                         ("true_distance_mpc", 3)):
        if name in cat.colnames:
            cat[name] = np.round(np.asarray(cat[name], dtype=float), digits)
    cat.meta = {"comment": "invented galaxies for the matcher demo"}
    g_ra, g_dec = np.asarray(cat["ra_deg"]), np.asarray(cat["dec_deg"])
    d_true = np.asarray(cat["true_distance_mpc"])
    d_rep = np.asarray(cat["distance_mpc"])
    sep = np.degrees(np.arccos(np.clip(_vec(g_ra, g_dec) @ _vec(*centre), -1, 1)))
    ok = (sep < 10.0) & (d_true > 85) & (d_true < 105) & np.isfinite(d_rep)
    host = int(np.flatnonzero(ok)[np.argmax(np.asarray(cat["weight"])[ok])])
    host_id = int(cat["id"][host])
    h_ra, h_dec, h_d = float(g_ra[host]), float(g_dec[host]), float(d_true[host])
    cat_path = folder / "galaxies.ecsv"
    cat.write(cat_path, overwrite=True)

    # --- localizations
    def write_map(name, comps, distance, max_order=9):
        sm = synthetic_skymap(comps, distance=distance, max_order=max_order, meta={"OBJECT": name})
        path = folder / "maps" / f"{name}.multiorder.fits"
        path.write_bytes(moc_fits_bytes(sm))
        return f"maps/{path.name}"

    ns = TRUTH["ns_event"]
    t_ns = _RUN_START + 1.2 * _DAY + 12345.6
    c1 = _offset(h_ra, h_dec, 8.0, 230.0)
    c2 = _offset(h_ra, h_dec, 1.2, 40.0)
    ns1 = write_map(f"{ns}-1", [Blob(*c1, kappa_for_area(900.0))], (1.15 * h_d, 0.35 * h_d), max_order=8)
    ns2 = write_map(f"{ns}-2", [Blob(*c2, kappa_for_area(35.0))], (1.02 * h_d, 0.18 * h_d))
    bbh = TRUTH["bbh_event"]
    t_bbh = _RUN_START + 3.4 * _DAY + 777.7
    bbh_c = (48.3, 31.7)
    bbh1 = write_map(f"{bbh}-1", [Blob(*bbh_c, kappa_for_area(400.0))], (900.0, 250.0), max_order=8)
    wd = TRUTH["withdrawn_event"]
    t_wd = _RUN_START + 5.1 * _DAY + 4321.0
    wd_c = (301.2, 12.9)
    wd1 = write_map(f"{wd}-1", [Blob(*wd_c, kappa_for_area(200.0))], (300.0, 90.0), max_order=8)

    rows: list[tuple[float, dict]] = []  # (received_at GPS, message)
    bns_probs = {"bns": 0.93, "nsbh": 0.04, "terrestrial": 0.03}
    rows.append((t_ns + 45.0, _alert(ns, 1, "issued", t_ns, far=2.1e-6, p_astro=0.97, probs=bns_probs,
                                     localization=ns1)))
    rows.append((t_ns + 5 * 3600.0, _alert(ns, 2, "revised", t_ns, far=8.0e-7, p_astro=0.98, probs=bns_probs,
                                           localization=ns2)))
    rows.append((t_ns + 5.5 * 3600.0, _alert(ns, 1, "issued", t_ns, far=2.1e-6, p_astro=0.97, probs=bns_probs,
                                             localization=ns1)))
    rows.append((t_bbh + 30.0, _alert(bbh, 1, "issued", t_bbh, far=1.0e-3, p_astro=0.99,
                                      probs={"bbh": 0.97, "terrestrial": 0.03}, localization=bbh1)))
    rows.append((t_wd + 60.0, _alert(wd, 1, "issued", t_wd, far=3.0, p_astro=0.6,
                                     probs={"bns": 0.5, "terrestrial": 0.5}, localization=wd1)))
    rows.append((t_wd + 7200.0, _alert(wd, 2, "withdrawn", t_wd, far=3.0, p_astro=0.0,
                                       probs={"terrestrial": 1.0})))

    # --- the counterpart (1.5 arcsec from its host), and its later report with the host's redshift
    kn_ra, kn_dec = _offset(h_ra, h_dec, 1.5 / 3600.0, 110.0)
    kn = TRUTH["counterpart"]
    t_kn = t_ns + 11 * 3600.0
    rows.append((t_kn + 1800.0, _report(kn, "optical", kn_ra, kn_dec, t_kn, err=0.0002, lnd=t_ns - 22 * 3600.0,
                                        mag=19.6)))
    z = float(redshift_at_distance(h_d))
    rows.append((t_kn + 23 * 3600.0, _report(kn, "optical", kn_ra, kn_dec, t_kn, err=0.0002, lnd=t_ns - 22 * 3600.0,
                                             mag=19.9, redshift=round(z, 5), redshift_err=0.0005)))

    # --- unrelated optical transients
    n = 0
    t_end = _RUN_START + 8 * _DAY
    ra = rng.uniform(0, 360, n_background)
    dec = np.degrees(np.arcsin(rng.uniform(-1, 1, n_background)))
    t = rng.uniform(_RUN_START, t_end, n_background)
    for i in range(n_background):
        n += 1
        lnd = t[i] - rng.uniform(1, 3) * _DAY
        rows.append((t[i] + rng.uniform(0.5, 3) * 3600.0,
                     _report(f"AT-DEMO-{n:05d}", "optical", ra[i], dec[i], t[i], err=0.0003, lnd=lnd,
                             mag=round(float(rng.uniform(18, 22.5)), 2))))
    # follow-up finds inside the compact map; some sit on catalogue galaxies at other distances
    f_ra, f_dec = _cone(rng, *c2, 7.0, n_followup)
    on_gal = rng.uniform(size=n_followup) < 0.25
    near = np.flatnonzero((sep < 12.0) & (np.abs(d_true - h_d) > 40.0))
    for i in range(n_followup):
        n += 1
        if on_gal[i]:
            g = int(rng.choice(near))
            f_ra[i], f_dec[i] = _offset(float(g_ra[g]), float(g_dec[g]), rng.uniform(0.5, 3) / 3600.0,
                                        rng.uniform(0, 360))
        ti = t_ns + rng.uniform(0.1, 3.0) * _DAY
        rows.append((ti + rng.uniform(0.5, 3) * 3600.0,
                     _report(f"AT-DEMO-{n:05d}", "optical", f_ra[i], f_dec[i], ti, err=0.0003,
                             lnd=ti - rng.uniform(1, 3) * _DAY, mag=round(float(rng.uniform(19, 22.5)), 2))))
    # a few inside the withdrawn event's map, before it was withdrawn
    w_ra, w_dec = _cone(rng, *wd_c, 5.0, 40)
    for i in range(40):
        n += 1
        ti = t_wd + rng.uniform(0.05, 0.08) * _DAY
        rows.append((ti + 600.0, _report(f"AT-DEMO-{n:05d}", "optical", w_ra[i], w_dec[i], ti, err=0.0003,
                                         lnd=ti - _DAY, mag=round(float(rng.uniform(19, 22)), 2))))

    # --- gamma-ray and neutrino triggers, all unrelated
    n_reports = 2 + n_background + n_followup + 40
    for i in range(25):
        ti = rng.uniform(_RUN_START, t_end)
        rows.append((ti + 60.0, _report(f"GRB-DEMO-{i + 1:03d}", "gamma_ray", rng.uniform(0, 360),
                                        math.degrees(math.asin(rng.uniform(-1, 1))), ti,
                                        err=round(float(rng.uniform(2, 12)), 2))))
    g_ra, g_dec = _offset(*c2, 15.0, 300.0)
    rows.append((t_ns + 460.0, _report("GRB-DEMO-LATE", "gamma_ray", g_ra, g_dec, t_ns + 400.0, err=6.0)))
    for i in range(15):
        ti = rng.uniform(_RUN_START, t_end)
        rows.append((ti + 30.0, _report(f"NU-DEMO-{i + 1:03d}", "neutrino", rng.uniform(0, 360),
                                        math.degrees(math.asin(rng.uniform(-1, 1))), ti,
                                        err=round(float(rng.uniform(0.3, 1.5)), 2))))
    nu_ra, nu_dec = _offset(*bbh_c, 70.0, 135.0)
    rows.append((t_bbh + 150.0, _report("NU-DEMO-BBH", "neutrino", nu_ra, nu_dec, t_bbh + 120.0, err=0.8)))
    n_reports += 25 + 1 + 15 + 1

    rows.sort(key=lambda r: (r[0], json.dumps(r[1], sort_keys=True)))
    archive = folder / "alerts.jsonl"
    with open(archive, "w", encoding="utf-8") as fh:
        for t_recv, msg in rows:
            msg = dict(msg)
            msg["received_at"] = gps_to_iso(t_recv)
            fh.write(json.dumps(msg, separators=(",", ":")) + "\n")
    return Scenario(folder, archive, cat_path, host_id, len(rows), n_reports)

