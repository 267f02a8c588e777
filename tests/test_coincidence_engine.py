"""The coincidence engine's API: classes from configuration, scoring, helpers, errors, the CLI."""

from __future__ import annotations

import base64
import json
import math
from pathlib import Path

import numpy as np
import pytest

from matcher.cli import main
from matcher.coincidence import (
    ReportBatch,
    association_probabilities,
    classes_in_window,
    default_classes,
    default_config_path,
    load_classes_file,
    merger_time_range,
    parse_classes,
    score_reports,
    window_mask,
)
from matcher.coincidence.distance_term import DEFAULT_DISTANCE_FRACTIONAL_ERROR
from matcher.errors import ConfigError, InputError
from matcher.sky import Blob, kappa_for_area, moc_fits_bytes, synthetic_skymap
from matcher.streams.messages import GWAlert, message_from_fields

ROOT = Path(__file__).resolve().parent.parent
T0 = 1_200_000_000.0

GOOD = dict(window_s=[-1, 5], rate_per_deg2_per_day=1e-4, efficiency=0.5, needs_neutron_star=True,
            reach_mpc=500.0, pos_err_deg=0.0, sharp_time=True)


@pytest.fixture(scope="module")
def gw_map():
    return synthetic_skymap([Blob(120.0, 30.0, kappa_for_area(100.0))], distance=(150.0, 40.0),
                            max_order=8, pixel_prob=1e-3)


def _alert(**kw):
    base = dict(event_id="S-TEST", revision=2, state="revised", merger_time=T0, merger_time_iso="x",
                far_per_year=2.0, p_astro=0.9, source_probs={"bns": 0.6, "nsbh": 0.1, "bbh": 0.2, "terrestrial": 0.1})
    base.update(kw)
    return GWAlert(**base)


# ------------------------------------------------------------------ classes
def test_packaged_default_is_identical_to_config_default():
    # The package ships a copy so that `matcher score` works when installed; they must not drift.
    assert (ROOT / "config" / "default.yaml").read_bytes() == default_config_path().read_bytes()


def test_default_classes_cover_the_messengers():
    classes = default_classes()
    assert set(classes) == {"optical", "gamma_ray", "x_ray", "neutrino", "radio"}
    assert classes["gamma_ray"].sharp_time and classes["neutrino"].sharp_time
    assert not classes["optical"].sharp_time and classes["optical"].cadence_s > 0
    # 240 bursts per year over the sky (memory) ↔ the configured density
    assert classes["gamma_ray"].all_sky_rate_per_s * 365.25 * 86400 == pytest.approx(240.0, rel=1e-3)


@pytest.mark.parametrize("change, path, problem", [
    ({"window_s": [5, -1]}, "classes.k.window_s", "lo < hi"),
    ({"window_s": [0]}, "classes.k.window_s", "two numbers"),
    ({"window_s": [0, "x"]}, "classes.k.window_s[1]", "must be a number"),
    ({"rate_per_deg2_per_day": 0}, "classes.k.rate_per_deg2_per_day", "> 0"),
    ({"efficiency": 1.5}, "classes.k.efficiency", "<= 1"),
    ({"needs_neutron_star": "yes"}, "classes.k.needs_neutron_star", "true or false"),
    ({"reach_mpc": -3}, "classes.k.reach_mpc", "> 0"),
    ({"pos_err_deg": 100}, "classes.k.pos_err_deg", "<= 90"),
    ({"sharp_time": False}, "classes.k.cadence_s", "required for a bracketed class"),
    ({"cadence_s": 0}, "classes.k.cadence_s", "> 0"),
    ({"background_distance": "comoving"}, "classes.k.background_distance", "uniform_volume"),
    ({"colour": "red"}, "classes.k", "unknown field"),
    ({"rate_per_deg2_per_day": float("nan")}, "classes.k.rate_per_deg2_per_day", "finite"),
])
def test_class_validation_names_the_key_path(change, path, problem):
    spec = dict(GOOD, **change)
    with pytest.raises(ConfigError, match=problem) as err:
        parse_classes({"k": spec})
    assert err.value.path == path


def test_class_validation_missing_field_and_bad_shapes():
    spec = dict(GOOD)
    del spec["reach_mpc"]
    with pytest.raises(ConfigError, match="is required") as err:
        parse_classes({"k": spec})
    assert err.value.path == "classes.k.reach_mpc"
    with pytest.raises(ConfigError, match="defines no counterpart class"):
        parse_classes({})
    with pytest.raises(ConfigError, match="must be a mapping"):
        parse_classes(["k"])
    with pytest.raises(ConfigError, match="must be a mapping of class fields"):
        parse_classes({"k": 3})


def test_load_classes_file_errors(tmp_path):
    with pytest.raises(ConfigError, match="cannot read"):
        load_classes_file(tmp_path / "absent.yaml")
    bad = tmp_path / "bad.yaml"
    bad.write_text("classes: [unclosed\n")
    with pytest.raises(ConfigError, match="not valid YAML"):
        load_classes_file(bad)
    other = tmp_path / "other.yaml"
    other.write_text("sources: {}\n")
    with pytest.raises(ConfigError, match="missing"):
        load_classes_file(other)
    ok = tmp_path / "ok.yaml"
    ok.write_text("store: {path: x}\nclasses:\n  k: {window_s: [0, 10], rate_per_deg2_per_day: 1, efficiency: 1,"
                  " needs_neutron_star: false, reach_mpc: 100, pos_err_deg: 0, sharp_time: true}\n")
    assert load_classes_file(ok)["k"].window_length_s == 10.0


# ------------------------------------------------------------------ scoring
def test_score_reports_terms_and_ranking(gw_map):
    classes = parse_classes({"g": GOOD, "o": dict(GOOD, window_s=[0, 86400], sharp_time=False, cadence_s=3600,
                                                   needs_neutron_star=False, efficiency=0.25)})
    batch = ReportBatch.from_arrays(
        ["a", "b", "c", "d"], ["g", "g", "o", "g"], [120.0, 121.0, 120.2, 300.0], [30.0, 31.0, 30.1, -60.0],
        T0 + np.array([2.0, 3.0, 7200.0, 100.0]), last_nondetection=[np.nan, np.nan, T0 - 3600.0, np.nan])
    t = score_reports(_alert(), gw_map, batch, classes)
    assert t.in_window.tolist() == [True, True, True, False]
    # π = efficiency × p_astro × P(NS|astro), P(NS|astro) = (bns+nsbh)/(bns+nsbh+bbh) = 0.7/0.9
    assert t.prior[0] == pytest.approx(0.5 * 0.9 * 0.7 / 0.9, rel=1e-12)
    assert t.prior[2] == pytest.approx(0.25 * 0.9, rel=1e-12)
    assert t.time_per_s[0] == pytest.approx(1 / 6)
    # bracket [-1 h, +2 h] against [0, 1 d]: overlap 2 h / (1 d × 3 h)
    assert t.time_per_s[2] == pytest.approx(7200.0 / (86400.0 * 10800.0), rel=1e-12)
    assert t.sky_per_sr[0] == pytest.approx(float(gw_map.density(120.0, 30.0)), rel=1e-12)
    r = classes["g"].rate_per_sr_per_s
    pi = t.prior[0]
    assert t.odds[0] == pytest.approx(pi / (1 - pi) * t.sky_per_sr[0] / 6 / r, rel=1e-12)
    # P within class g: a and b compete; the optical report c is alone in its class
    og = t.odds[:2]
    assert t.p_assoc[0] == pytest.approx(og[0] / (1 + og.sum()), rel=1e-12)
    assert t.p_assoc[2] == pytest.approx(t.odds[2] / (1 + t.odds[2]), rel=1e-12)
    # sharp, point, no distance: FAP = 1 - exp(-r W A_searched) (DESIGN.md)
    area_sr = t.searched_area_deg2[0] / (180 / math.pi) ** 2
    assert t.fap[0] == pytest.approx(-math.expm1(-r * 6.0 * area_sr), rel=1e-9)
    # out of window: odds 0, FAP 1, not in the default ranking
    assert t.odds[3] == 0 and t.fap[3] == 1 and t.p_assoc[3] == 0
    assert 3 not in t.ranking().tolist()
    assert t.ranking(include_out_of_window=True)[-1] == 3
    # joint FAR only for the sharp class, in window: FAR × R_ext × W / (4π I)
    expected = 2.0 * classes["g"].all_sky_rate_per_s * 6.0 / (4 * math.pi * t.sky_per_sr[0])
    assert t.joint_far_per_year[0] == pytest.approx(expected, rel=1e-12)
    assert np.isnan(t.joint_far_per_year[2]) and np.isnan(t.joint_far_per_year[3])
    rec = t.records()[0]
    assert set(rec) == {"transient_id", "class", "odds", "p_assoc", "fap", "searched_area_deg2", "credible_level",
                        "dt_s", "terms", "joint_far_per_year"}
    assert set(rec["terms"]) == {"sky_per_sr", "time_per_s", "distance_factor", "prior"}
    assert [r["transient_id"] for r in t.records()] == [str(x) for x in t.transient_id[t.ranking()]]


def test_distance_sources_and_external_distance(gw_map):
    classes = parse_classes({"g": GOOD})
    n = 4
    batch = ReportBatch.from_arrays(
        ["z", "d", "none", "both"], "g", np.full(n, 120.0), np.full(n, 30.0), np.full(n, T0 + 1.0),
        redshift=[0.034, np.nan, np.nan, 0.034], redshift_err=[0.01, np.nan, np.nan, 0.01],
        distance_mpc=[np.nan, 150.0, np.nan, 150.0], distance_err_mpc=[np.nan, np.nan, np.nan, 5.0])
    t = score_reports(_alert(), gw_map, batch, classes, external_distance_mpc=[np.nan, np.nan, 140.0, 200.0])
    assert t.distance_source.tolist() == ["redshift", "distance", "external", "distance"]
    assert t.distance_err_mpc[1] == pytest.approx(DEFAULT_DISTANCE_FRACTIONAL_ERROR * 150.0)
    assert t.distance_mpc[2] == 140.0  # the external distance only fills a gap
    assert t.distance_mpc[3] == 150.0 and t.distance_err_mpc[3] == 5.0  # smaller error than the redshift's
    assert np.all(t.distance_factor > 1)  # all near the GW distance, far below the 500 Mpc reach
    flat = synthetic_skymap([Blob(120.0, 30.0, kappa_for_area(100.0))], distance=None, max_order=8, pixel_prob=1e-3)
    t2 = score_reports(_alert(), flat, batch, classes)
    assert np.all(t2.distance_factor == 1) and np.all(t2.distance_source == "none")


def test_report_map_overlap_and_fap(gw_map):
    classes = parse_classes({"g": dict(GOOD, pos_err_deg=3.0)})
    own = synthetic_skymap([Blob(122.0, 31.0, 1.0 / math.radians(3.0) ** 2)], max_order=7, pixel_prob=1e-3)
    batch = ReportBatch.from_arrays(["m", "g"], "g", [122.0, 122.0], [31.0, 31.0], [T0 + 1, T0 + 1])
    t = score_reports(_alert(), gw_map, batch, classes, report_maps={"m": own})
    # the report's own map is a 3° Fisher blob at the same place as the Gaussian report:
    # the exact map overlap and the Gaussian overlap agree to the pixelization (2 %)
    assert t.sky_per_sr[0] == pytest.approx(t.sky_per_sr[1], rel=2e-2)
    assert t.fap[0] == pytest.approx(t.fap[1], rel=5e-2)
    t_seq = score_reports(_alert(), gw_map, batch, classes, report_maps=[own, None])
    assert t_seq.sky_per_sr[0] == t.sky_per_sr[0]


def test_prior_defaults_when_the_alert_lacks_probabilities(gw_map):
    classes = parse_classes({"g": GOOD})
    batch = ReportBatch.from_arrays(["a"], "g", [120.0], [30.0], [T0 + 1])
    t = score_reports(_alert(p_astro=None, source_probs=None), gw_map, batch, classes)
    assert t.prior[0] == 0.5  # p_astro and P(NS) default to 1 (documented in prior.py)
    t2 = score_reports(_alert(p_astro=None, source_probs={"bbh": 0.7, "terrestrial": 0.3}), gw_map, batch, classes)
    assert t2.prior[0] == 0.0 and t2.odds[0] == 0.0 and t2.p_assoc[0] == 0.0
    # the FAP ranks the data (I·T·D) against the background, whatever the prior
    assert t2.fap[0] == t.fap[0]


def test_window_helpers():
    classes = default_classes()
    assert classes_in_window(classes, T0, T0 + 2.0) == ["gamma_ray", "neutrino", "optical", "radio", "x_ray"]
    assert classes_in_window(classes, T0, T0 + 100.0) == ["neutrino", "optical", "radio", "x_ray"]
    assert classes_in_window(classes, T0, T0 - 100.0) == ["neutrino"]
    # a bracketed report whose last non-detection is after the window end is out
    assert "optical" not in classes_in_window(classes, T0, T0 + 5 * 86400, last_nondetection=T0 + 4 * 86400)
    mask = window_mask(classes, ["gamma_ray", "gamma_ray", "optical"], T0, [T0 + 4, T0 + 6, T0 + 86400])
    assert mask.tolist() == [True, False, True]
    lo, hi = merger_time_range(classes["gamma_ray"], T0 + 2.0)
    assert (lo, hi) == (T0 - 3.0, T0 + 3.0)
    lo, hi = merger_time_range(classes["optical"], T0, last_nondetection=T0 - 1000.0)
    assert (lo, hi) == (T0 - 1000.0 - 259200.0, T0)
    assert window_mask(classes, "optical", lo + 1.0, T0, T0 - 1000.0)[0]
    assert not window_mask(classes, "optical", lo - 1.0, T0, T0 - 1000.0)[0]


def test_association_recompute_matches_engine(gw_map):
    classes = parse_classes({"g": GOOD})
    batch = ReportBatch.from_arrays(["a", "b", "c"], "g", [120.0, 120.5, 119.0], [30.0, 30.5, 29.0], T0 + np.ones(3))
    t = score_reports(_alert(), gw_map, batch, classes)
    assert np.array_equal(association_probabilities(t.odds, t.klass), t.p_assoc)


def test_bad_input_errors(gw_map):
    classes = parse_classes({"g": GOOD})
    batch = ReportBatch.from_arrays(["a"], "x", [120.0], [30.0], [T0])
    with pytest.raises(InputError, match="transient a: class 'x' is not configured"):
        score_reports(_alert(), gw_map, batch, classes)
    with pytest.raises(InputError, match="withdrawn"):
        score_reports(_alert(state="withdrawn"), gw_map, [], classes)
    with pytest.raises(InputError, match="must be a SkyMap"):
        score_reports(_alert(), "map.fits", [], classes)
    ok = ReportBatch.from_arrays(["a"], "g", [120.0], [30.0], [T0])
    with pytest.raises(InputError, match="external_distance_mpc: 2 values for 1 reports"):
        score_reports(_alert(), gw_map, ok, classes, external_distance_mpc=[1.0, 2.0])
    with pytest.raises(InputError, match="external_distance_mpc #0"):
        score_reports(_alert(), gw_map, ok, classes, external_distance_mpc=[-5.0])
    with pytest.raises(InputError, match="no report has transient id 'zz'"):
        score_reports(_alert(), gw_map, ok, classes, report_maps={"zz": gw_map})
    with pytest.raises(InputError, match="transient T9: dec_deg=97.2 is outside"):
        ReportBatch.from_arrays(["T9"], "g", [10.0], [97.2], [T0])
    with pytest.raises(InputError, match="transient T9: last_nondetection"):
        ReportBatch.from_arrays(["T9"], "g", [10.0], [10.0], [T0], last_nondetection=[T0 + 1])
    with pytest.raises(InputError, match="distance_err_mpc=.* is given without distance_mpc"):
        ReportBatch.from_arrays(["T9"], "g", [10.0], [10.0], [T0], distance_err_mpc=[3.0])
    with pytest.raises(InputError, match="column time has 2 values for 1"):
        ReportBatch.from_arrays(["T9"], "g", [10.0], [10.0], [T0, T0])
    empty = score_reports(_alert(), gw_map, [], classes)
    assert len(empty) == 0 and empty.records() == []


# ------------------------------------------------------------------ CLI
def _write_case(folder: Path, gw_map, *, loc=None):
    (folder / "maps").mkdir()
    (folder / "maps" / "gw.fits").write_bytes(moc_fits_bytes(gw_map))
    alert = {"schema": "matcher/1", "type": "gw_alert", "event_id": "S-CLI", "revision": 1, "state": "issued",
             "merger_time": "2031-05-01T12:00:00Z", "far_per_year": 0.5, "p_astro": 0.95,
             "source_probs": {"bns": 0.9, "bbh": 0.05, "terrestrial": 0.05},
             "localization": loc or {"path": "maps/gw.fits"}}
    (folder / "alert.json").write_text(json.dumps(alert))
    base = {"schema": "matcher/1", "type": "transient"}
    rows = [
        dict(base, transient_id="OT-1", **{"class": "optical"}, ra_deg=120.5, dec_deg=30.2,
             time="2031-05-02T03:00:00Z", last_nondetection="2031-04-30T03:00:00Z", redshift=0.034, redshift_err=0.001),
        dict(base, transient_id="GRB-1", **{"class": "gamma_ray"}, ra_deg=118.0, dec_deg=28.0, pos_err_deg=4.0,
             time="2031-05-01T12:00:02Z"),
        dict(base, transient_id="OT-2", **{"class": "optical"}, ra_deg=10.0, dec_deg=-30.0, time="2031-04-20T03:00:00Z"),
    ]
    (folder / "reports.jsonl").write_text("\n".join(json.dumps(r) for r in rows) + "\n\n")
    return folder / "alert.json", folder / "reports.jsonl"


def test_cli_score_json(tmp_path, gw_map, capsys, monkeypatch):
    alert, reports = _write_case(tmp_path, gw_map)
    monkeypatch.chdir("/")  # relative localization paths resolve against the message file's folder
    assert main(["score", str(alert), str(reports), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert [r["transient_id"] for r in out] == ["GRB-1", "OT-1"]
    assert out[0]["joint_far_per_year"] > 0 and out[1]["joint_far_per_year"] is None
    assert out[0]["odds"] >= out[1]["odds"]
    assert main(["score", str(alert), str(reports), "--json", "--all"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out[-1]["transient_id"] == "OT-2" and out[-1]["odds"] == 0


def test_cli_score_table_and_config(tmp_path, gw_map, capsys):
    b64 = base64.b64encode(moc_fits_bytes(gw_map)).decode()
    alert, reports = _write_case(tmp_path, gw_map, loc={"fits_base64": b64})
    cfg = tmp_path / "c.yaml"
    cfg.write_text((ROOT / "config" / "default.yaml").read_text().replace("efficiency: 0.2\n", "efficiency: 0.02\n", 1))
    assert main(["score", str(alert), str(reports), "-c", str(cfg)]) == 0
    text = capsys.readouterr().out
    assert "S-CLI revision 1" in text and "GRB-1" in text and "OT-2" not in text


def test_cli_score_bad_input(tmp_path, gw_map, capsys):
    alert, reports = _write_case(tmp_path, gw_map)
    lines = reports.read_text().splitlines()
    lines[1] = lines[1].replace('"dec_deg": 28.0', '"dec_deg": 97.2')
    reports.write_text("\n".join(lines))
    assert main(["score", str(alert), str(reports)]) == 2
    err = capsys.readouterr().err
    assert "reports.jsonl:2" in err and "GRB-1" in err and "dec_deg" in err
    reports.write_text("{not json\n")
    assert main(["score", str(alert), str(reports)]) == 2
    assert "reports.jsonl:1: not valid JSON" in capsys.readouterr().err
    reports.write_text(alert.read_text() + "\n")
    assert main(["score", str(alert), str(reports)]) == 2
    assert "expected a transient message" in capsys.readouterr().err
    assert main(["score", str(alert), str(tmp_path / "nope.jsonl")]) == 2
    assert "cannot read" in capsys.readouterr().err
    (tmp_path / "maps" / "gw.fits").unlink()
    assert main(["score", str(alert), str(tmp_path / "reports.jsonl")]) == 2
    assert "gw.fits" in capsys.readouterr().err


def test_cli_messages_validate_through_the_schema(tmp_path):
    # The CLI reads messages with the shared matcher/1 validator; a sanity check of the path.
    msg = message_from_fields({"schema": "matcher/1", "type": "transient", "transient_id": "T", "class": "optical",
                               "ra_deg": 1.0, "dec_deg": 2.0, "time": "2031-01-01T00:00:00Z",
                               "localization": {"path": "x.fits"}}, base_dir=str(tmp_path))
    assert msg.localization.resolved_path() == str(tmp_path / "x.fits")
