"""Hosts of a transient (chance coincidence × 3D probability) and the ``matcher hosts`` command."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from astropy.table import Table

from matcher.catalog import (
    build_index,
    catalog_from_table,
    chance_coincidence,
    effective_radius_arcsec,
    hosts_for_report,
    hosts_for_transient,
    number_density_berger,
    rank_hosts,
    synthetic_catalog,
)
from matcher.cli import main
from matcher.errors import CatalogError
from matcher.sky import Blob, kappa_for_area, moc_fits_bytes, synthetic_skymap


# ------------------------------------------------------------------ check values
@pytest.mark.parametrize(
    "mag, radius, p_cc",
    [(22.0, 1.0, 3.278742e-3), (24.0, 2.0, 5.827829e-2), (20.0, 5.0, 1.780187e-2)],
)
def test_chance_coincidence_check_values(mag, radius, p_cc):
    # REFERENCES.md: Bloom, Kulkarni & Djorgovski 2002 (AJ 123, 1111) with the Berger 2010 (ApJ 722, 1946)
    # counts, computed values quoted to 7 significant digits: tolerance 1e-6 relative.
    assert float(chance_coincidence(radius, number_density_berger(mag))) == pytest.approx(p_cc, rel=1e-6)


def test_berger_number_density_check_value():
    # REFERENCES.md: sigma(<=22) = 1.045371e-3 arcsec^-2 (computed).
    assert float(number_density_berger(22.0)) == pytest.approx(1.045371e-3, rel=1e-6)


def test_effective_radius_follows_bloom_et_al():
    # r = max(2 R_h, 3 sigma_loc, sqrt(R0² + 4 R_h²)) (Bloom et al. 2002, as in REFERENCES.md).
    assert float(effective_radius_arcsec(3.0, 2.0, 0.1)) == pytest.approx(5.0)  # sqrt(9 + 16)
    assert float(effective_radius_arcsec(0.5, 0.5, 2.0)) == pytest.approx(6.0)  # 3 sigma dominates
    assert float(effective_radius_arcsec(0.0, 1.5, 0.0)) == pytest.approx(3.0)  # 2 R_h
    assert float(effective_radius_arcsec(4.0, np.nan, 0.0)) == pytest.approx(4.0)  # unknown size: offset


# ------------------------------------------------------------------ association
@pytest.fixture(scope="module")
def scene():
    skymap = synthetic_skymap([Blob(200.0, 15.0, kappa_for_area(150.0))], distance=(120.0, 25.0), max_order=8,
                              pixel_prob=3e-4)
    table = synthetic_catalog(8000, 21, max_distance_mpc=300.0, cone=(200.0, 15.0, 15.0), mag_limit=20.0)
    cat, report = catalog_from_table(table)
    index = build_index(cat, report=report)
    return skymap, index, rank_hosts(skymap, index)


def test_transient_next_to_a_galaxy_finds_it(scene):
    skymap, index, ranking = scene
    k = 3  # a well-ranked galaxy: place a transient 0.8 arcsec from it with a 0.2 arcsec error
    ra, dec = float(ranking.ra_deg[k]), float(ranking.dec_deg[k]) + 0.8 / 3600
    hosts = hosts_for_transient(index, ra, dec, pos_err_deg=0.2 / 3600, skymap=skymap, ranking=ranking,
                                transient_id="AT-TEST-1")
    assert hosts.best is not None and hosts.best.galaxy_id == ranking.galaxy_id[k]
    assert hosts.best.separation_arcsec == pytest.approx(0.8, rel=1e-6)
    assert hosts.best.counts == "berger"
    # The best host's P(host) on the GW ranking's scale is the ranking's own value.
    assert hosts.best.prob_gw == pytest.approx(float(ranking.prob[k]), rel=1e-9)
    d, d_err = hosts.host_distance()
    assert (d, d_err) == (float(ranking.distance_mpc[k]), float(ranking.distance_err_mpc[k]))
    assert hosts.best_by_position is not None
    assert sum(c.prob for c in hosts.candidates) == pytest.approx(1.0)


def test_a_coarse_position_has_no_host(scene):
    skymap, index, ranking = scene
    hosts = hosts_for_transient(index, 200.0, 15.0, pos_err_deg=0.2, skymap=skymap, max_p_cc=0.1)
    # A 0.2-degree error makes every effective radius >= 0.6 degree: chance alignment is near certain.
    assert hosts.candidates and all(c.p_cc > 0.99 for c in hosts.candidates)
    assert hosts.best is None and hosts.best_by_position is None and hosts.host_distance() is None
    assert all(c.separation_arcsec <= hosts.search_radius_arcsec + 1e-6 for c in hosts.candidates)


def test_without_magnitudes_the_catalogue_density_is_used():
    t = Table({"id": [1, 2, 3], "ra_deg": [10.0, 10.0 + 2 / 3600, 10.3], "dec_deg": [0.0, 0.0, 0.2],
               "distance_mpc": [40.0, 45.0, 50.0], "distance_err_mpc": [4.0, 4.0, 4.0]})
    cat, _ = catalog_from_table(t)
    index = build_index(cat)
    hosts = hosts_for_transient(index, 10.0, 0.0, pos_err_deg=0.1 / 3600)
    # Three galaxies within 1 degree: sigma = 3 / (cap area in arcsec²); r = max(3 sigma_loc, R0) = 0.3″
    # for the galaxy under the transient.
    cap = 2 * math.pi * (1 - math.cos(math.radians(1.0))) * (180 * 3600 / math.pi) ** 2
    first = hosts.candidates[0]
    assert first.galaxy_id == 1 and first.counts == "catalogue"
    assert first.p_cc == pytest.approx(-math.expm1(-math.pi * 0.3**2 * 3 / cap), rel=1e-9)
    # Without a map the weight is (1 - P_cc) × weight; both near galaxies are candidates.
    assert {c.galaxy_id for c in hosts.candidates} >= {1, 2}


def test_hosts_for_a_transient_report(scene):
    from matcher.streams.messages import message_from_fields

    skymap, index, ranking = scene
    report = message_from_fields({
        "schema": "matcher/1", "type": "transient", "transient_id": "AT-TEST-2", "class": "kilonova",
        "ra_deg": float(ranking.ra_deg[0]), "dec_deg": float(ranking.dec_deg[0]), "pos_err_deg": 0.3 / 3600,
        "time": "2026-11-28T05:00:00Z",
    })
    hosts = hosts_for_report(index, report, skymap=skymap, ranking=ranking)
    assert hosts.transient_id == "AT-TEST-2" and hosts.best.galaxy_id == ranking.galaxy_id[0]
    assert hosts.to_dict()["best"]["galaxy_id"] == ranking.galaxy_id[0]


def test_bad_transient_input_is_refused(scene):
    _, index, _ = scene
    with pytest.raises(CatalogError, match="pos_err_deg"):
        hosts_for_transient(index, 10.0, 0.0, pos_err_deg=-1.0)
    with pytest.raises(Exception, match="dec_deg"):
        hosts_for_transient(index, 10.0, 100.0)
    with pytest.raises(CatalogError, match="by="):
        hosts_for_transient(index, 10.0, 0.0).host_distance(by="nearest")


# ------------------------------------------------------------------ the command
@pytest.fixture
def cli_files(tmp_path, scene):
    skymap, _, _ = scene
    map_path = tmp_path / "event.multiorder.fits"
    map_path.write_bytes(moc_fits_bytes(skymap))
    table = synthetic_catalog(3000, 22, max_distance_mpc=300.0, cone=(200.0, 15.0, 15.0), mag_limit=20.0)
    cat_path = tmp_path / "galaxies.ecsv"
    table.write(cat_path)
    alert = {"schema": "matcher/1", "type": "gw_alert", "event_id": "GW-TEST-7", "revision": 2, "state": "revised",
             "merger_time": "2026-11-28T03:14:15Z", "localization": {"path": map_path.name}}
    alert_path = tmp_path / "alert.json"
    alert_path.write_text(json.dumps(alert))
    return map_path, cat_path, alert_path


def test_cli_hosts_json(cli_files, capsys):
    map_path, cat_path, alert_path = cli_files
    assert main(["hosts", str(alert_path), "--catalog", str(cat_path), "--top", "5", "--json", "--mag-limit", "20"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["event_id"] == "GW-TEST-7" and out["revision"] == 2
    assert 0.0 <= out["p_outside_catalog"] <= 1.0
    assert len(out["galaxies"]) == 5
    for g in out["galaxies"]:
        assert {"galaxy_id", "prob", "cum_prob", "ra_deg", "dec_deg", "distance_mpc"} <= set(g)
    probs = [g["prob"] for g in out["galaxies"]]
    assert probs == sorted(probs, reverse=True)
    assert out["galaxies"][-1]["cum_prob"] == pytest.approx(sum(probs))


@pytest.mark.parametrize("suffix", [".ecsv", ".csv", ".vot"])
def test_cli_hosts_writes_tables_astropy_reads(cli_files, tmp_path, suffix, capsys):
    map_path, cat_path, _ = cli_files
    out = tmp_path / f"hosts{suffix}"
    assert main(["hosts", str(map_path), "--catalog", str(cat_path), "--top", "7", "--out", str(out)]) == 0
    capsys.readouterr()
    fmt = {".ecsv": "ascii.ecsv", ".csv": "ascii.csv", ".vot": "votable"}[suffix]
    t = Table.read(out, format=fmt)
    assert len(t) == 7 and {"galaxy_id", "prob", "cum_prob", "ra_deg", "dec_deg", "distance_mpc"} <= set(t.colnames)
    assert np.all(np.diff(np.asarray(t["prob"])) <= 0)


def test_cli_hosts_with_saved_index_and_transient(cli_files, tmp_path, capsys):
    map_path, cat_path, alert_path = cli_files
    assert main(["catalog", "index", str(cat_path)]) == 0
    capsys.readouterr()
    assert main(["hosts", str(alert_path), "--catalog", str(cat_path), "--json", "--top", "1"]) == 0
    best = json.loads(capsys.readouterr().out)["galaxies"][0]
    assert main(["hosts", str(alert_path), "--catalog", str(cat_path) + ".index", "--json",
                 "--at", str(best["ra_deg"]), str(best["dec_deg"]), "--err-arcsec", "0.5"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["transient"]["best"]["galaxy_id"] == best["galaxy_id"]
    assert out["p_outside_catalog"] is None  # no completeness model given or recorded


def test_cli_hosts_errors_are_one_line(cli_files, tmp_path, capsys):
    map_path, cat_path, alert_path = cli_files
    withdrawn = tmp_path / "withdrawn.json"
    withdrawn.write_text(json.dumps({"schema": "matcher/1", "type": "gw_alert", "event_id": "GW-TEST-8",
                                     "revision": 3, "state": "withdrawn", "merger_time": "2026-11-28T03:14:15Z"}))
    assert main(["hosts", str(withdrawn), "--catalog", str(cat_path)]) == 2
    assert "withdrawn" in capsys.readouterr().err
    url = tmp_path / "url.json"
    url.write_text(json.dumps({"schema": "matcher/1", "type": "gw_alert", "event_id": "GW-TEST-9", "revision": 1,
                               "state": "issued", "merger_time": "2026-11-28T03:14:15Z",
                               "localization": {"url": "https://example.invalid/map.fits"}}))
    assert main(["hosts", str(url), "--catalog", str(cat_path)]) == 2
    assert "download the map" in capsys.readouterr().err
    assert main(["hosts", str(map_path), "--catalog", str(tmp_path / "nope.csv")]) == 2
    err = capsys.readouterr().err
    assert "no such" in err and "Traceback" not in err
    assert main(["hosts", str(map_path), "--catalog", str(cat_path), "--out", str(tmp_path / "x.txt")]) == 2
    assert ".ecsv, .csv or .vot" in capsys.readouterr().err


def test_demo_fixtures_rank_hosts_of_the_demo_map(fixtures_dir, capsys):
    cat_path = fixtures_dir / "catalog" / "demo_galaxies.ecsv"
    table_path = fixtures_dir / "catalog" / "demo_completeness.csv"
    map_path = fixtures_dir / "skymaps" / "demo_blob.multiorder.fits.gz"
    assert main(["hosts", str(map_path), "--catalog", str(cat_path), "--completeness-table", str(table_path),
                 "--json", "--top", "3"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["object"] == "GW-DEMO-0001" and out["n_galaxies"] > 50
    assert 0.0 < out["p_outside_catalog"] < 0.5
    assert not (fixtures_dir / "catalog" / "demo_galaxies.ecsv.index").exists()  # nothing written beside it


def test_cli_hosts_uses_the_index_completeness_and_a_transient_file(cli_files, tmp_path, capsys):
    map_path, cat_path, alert_path = cli_files
    assert main(["catalog", "index", str(cat_path), "--mag-limit", "20"]) == 0
    capsys.readouterr()
    assert main(["hosts", str(alert_path), "--catalog", str(cat_path), "--json", "--top", "1"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["p_outside_catalog"] is not None and 0.0 < out["p_outside_catalog"] < 1.0
    best = out["galaxies"][0]
    transient = tmp_path / "at.json"
    transient.write_text(json.dumps({
        "schema": "matcher/1", "type": "transient", "transient_id": "AT-TEST-3", "class": "kilonova",
        "ra_deg": best["ra_deg"], "dec_deg": best["dec_deg"], "pos_err_deg": 0.0001,
        "time": "2026-11-28T06:00:00Z"}))
    assert main(["hosts", str(alert_path), "--catalog", str(cat_path), "--transient", str(transient)]) == 0
    text = capsys.readouterr().out
    assert "Hosts of transient AT-TEST-3" in text and f"best host: {best['galaxy_id']}" in text
