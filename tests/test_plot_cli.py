"""``matcher plot`` as a user runs it: an invented alert, invented transients and an invented catalogue."""

from __future__ import annotations

import json
import shutil

import matplotlib.image as mpimg
import numpy as np
import pytest

from matcher.cli import main

ALERT = {
    "schema": "matcher/1", "type": "gw_alert", "event_id": "GW-T-0042", "revision": 2, "state": "revised",
    "merger_time": "2026-11-28T03:14:15.926Z", "far_per_year": 0.01, "p_astro": 0.97,
    "source_probs": {"bns": 0.9, "nsbh": 0.05, "bbh": 0.02, "terrestrial": 0.03},
    "localization": {"path": "maps/blob.multiorder.fits.gz"},
}
TRANSIENTS = [
    {"transient_id": "AT-T1", "class": "optical", "ra_deg": 213.62, "dec_deg": -21.05, "pos_err_deg": 0.0003,
     "time": "2026-11-28T09:40:00Z", "last_nondetection": "2026-11-26T08:00:00Z", "redshift": 0.027,
     "redshift_err": 0.001},
    {"transient_id": "AT-T2", "class": "optical", "ra_deg": 211.80, "dec_deg": -23.30,
     "time": "2026-11-28T10:05:00Z", "last_nondetection": "2026-11-25T10:00:00Z"},
    {"transient_id": "AT-T3", "class": "optical", "ra_deg": 98.4, "dec_deg": 35.2, "time": "2026-11-28T12:00:00Z"},
]


@pytest.fixture
def event_dir(tmp_path, fixtures_dir):
    (tmp_path / "maps").mkdir()
    shutil.copy(fixtures_dir / "skymaps" / "demo_blob.multiorder.fits.gz", tmp_path / "maps" / "blob.multiorder.fits.gz")
    (tmp_path / "alert.json").write_text(json.dumps(ALERT))
    lines = [json.dumps({"schema": "matcher/1", "type": "transient", **t}) for t in TRANSIENTS]
    (tmp_path / "transients.jsonl").write_text("\n".join(lines) + "\n")
    return tmp_path


def _run(capsys, *argv):
    code = main(["plot", *map(str, argv)])
    out, err = capsys.readouterr()
    return code, out, err


def test_alert_with_transients_and_catalogue(event_dir, capsys):
    from matcher.catalog import synthetic_catalog

    synthetic_catalog(400, 5, max_distance_mpc=250.0, cone=(213.25, -21.5, 6.0)).write(
        str(event_dir / "galaxies.ecsv"), format="ascii.ecsv")
    png = event_dir / "plot.png"
    code, out, err = _run(capsys, event_dir / "alert.json", "--transients", event_dir / "transients.jsonl",
                          "--catalog", event_dir / "galaxies.ecsv", "--hosts", 5, "--out", png, "--json")
    assert code == 0, err
    summary = json.loads(out)
    assert summary["event_id"] == "GW-T-0042" and summary["revision"] == 2
    assert summary["zoom"] is True and summary["ranking"] == "given"
    assert [c["rank"] for c in summary["candidates"]] == [1, 2, 3]
    # Scored with the packaged classes: every candidate carries P_assoc, best first.
    p = [c["p_assoc"] for c in summary["candidates"]]
    assert all(v is not None for v in p) and p == sorted(p, reverse=True)
    assert summary["candidates"][0]["transient_id"] == "AT-T1"
    assert summary["candidates"][0]["distance_mpc"] == pytest.approx(122, abs=3)  # z = 0.027, Planck18
    assert len(summary["hosts"]) == 5 and [h["rank"] for h in summary["hosts"]] == [1, 2, 3, 4, 5]
    assert summary["area_deg2"]["0.9"] == pytest.approx(44.9, abs=0.1)
    img = mpimg.imread(str(png))
    assert img.shape[:2] == (summary["height_px"], summary["width_px"]) == (850, 1100)
    assert np.any(img[..., :3] < 0.9)


def test_bare_map_ranks_by_credible_level(event_dir, capsys):
    svg = event_dir / "plot.svg"
    code, out, err = _run(capsys, event_dir / "maps" / "blob.multiorder.fits.gz", "--transients",
                          event_dir / "transients.jsonl", "--out", svg, "--zoom", "off")
    assert code == 0, err
    assert "3 candidates ranked by credible level (no alert to score against)" in out
    assert "zoomed view turned off" in out
    text = svg.read_text()
    assert text.lstrip().startswith("<?xml") and "<svg" in text


def test_map_alone_as_pdf(event_dir, capsys):
    pdf = event_dir / "plot.pdf"
    code, out, err = _run(capsys, event_dir / "alert.json", "--out", pdf, "--dpi", 50)
    assert code == 0, err
    assert pdf.read_bytes()[:5] == b"%PDF-"


@pytest.mark.parametrize(
    "extra, message",
    [
        (["--out", "{d}/plot.gif"], "use a .png, .pdf or .svg file"),
        (["--out", "{d}/missing/plot.png"], "does not exist"),
        (["--out", "{d}/p.png", "--levels", "0.5,1"], "strictly between 0 and 1"),
        (["--out", "{d}/p.png", "--config", "{d}/c.yaml"], "give --transients too"),
        (["--out", "{d}/p.png", "--column", "ra_deg=RA"], "give --catalog too"),
        (["--out", "{d}/p.png", "--labels", "0"], "--labels=0"),
    ],
)
def test_bad_options_are_one_line_errors(event_dir, capsys, extra, message):
    code, out, err = _run(capsys, event_dir / "alert.json", *[e.format(d=event_dir) for e in extra])
    assert code == 2
    assert err.startswith("matcher: error:") and message in err and err.count("\n") == 1


def test_bad_transient_line_names_file_and_line(event_dir, capsys):
    bad = event_dir / "bad.jsonl"
    bad.write_text(json.dumps({"schema": "matcher/1", "type": "transient", **TRANSIENTS[0]}) + "\n"
                   + json.dumps({"schema": "matcher/1", "type": "transient", **{**TRANSIENTS[1], "dec_deg": 97.2}})
                   + "\n")
    code, out, err = _run(capsys, event_dir / "alert.json", "--transients", bad, "--out", event_dir / "p.png")
    assert code == 2
    assert f"{bad}:2" in err and "dec_deg" in err
    assert not (event_dir / "p.png").exists()


def test_withdrawn_alert(event_dir, capsys):
    path = event_dir / "withdrawn.json"
    path.write_text(json.dumps({**ALERT, "state": "withdrawn", "localization": None}))
    code, out, err = _run(capsys, path, "--out", event_dir / "p.png")
    assert code == 2 and "withdrawn" in err


def test_transient_file_is_not_an_alert(event_dir, capsys):
    path = event_dir / "one.json"
    path.write_text(json.dumps({"schema": "matcher/1", "type": "transient", **TRANSIENTS[0]}))
    code, out, err = _run(capsys, path, "--out", event_dir / "p.png")
    assert code == 2 and "not a GW alert" in err
