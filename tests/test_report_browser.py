"""The HTML report in a real browser (Debian's chromium, headless): the report the service wrote for
the invented demo's neutron-star event (see report_helpers.demo_replay).

* the candidate table in the DOM equals ``candidates.ecsv`` row for row (ids, ranks, classes,
  statuses, the full-precision values, and the readable text rounded from them);
* every image loads (the browser decodes it: ``complete`` and ``naturalWidth`` recorded in the
  DOM by a tiny inline script added to a *test copy* of the page; the page itself has none), and
  each data URI is a valid PNG that Pillow (matplotlib's image library) decodes;
* the screenshot has the window's size and is not blank: the masthead shows our paper colour,
  there is dark text, and the page is far from one flat colour;
* printing gives a PDF of more than one page (the tables are long);
* ``candidates.ecsv`` and ``hosts.vot`` read back with astropy equal the store's values.

Chromium is required: without it the test fails with the install hint (it never skips).
"""

from __future__ import annotations

import base64
import io
import json
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from astropy.table import Table

from matcher.demo import TRUTH
from matcher.store import Store
from report_helpers import body_rows, cells, demo_replay, parse_html

pytestmark = pytest.mark.browser

INSTALL_HINT = ("chromium is not on PATH: install it with `bash tests/browser/install_chromium.sh` "
                "(as root; it runs apt-get install chromium; .ci/run does this)")
EVENT = TRUTH["ns_event"]
WINDOW = (1400, 2200)

_RECORD_IMAGES = """<script>
window.addEventListener("load", function () {
  var out = [];
  for (var i = 0; i < document.images.length; i++) {
    var im = document.images[i];
    out.push(im.complete + ":" + im.naturalWidth + "x" + im.naturalHeight);
  }
  document.body.setAttribute("data-test-images", out.join(" "));
});
</script>"""


def _chromium() -> str:
    exe = shutil.which("chromium")
    if exe is None:
        pytest.fail(INSTALL_HINT)
    return exe


def _run(args, profile: Path) -> subprocess.CompletedProcess:
    cmd = [_chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
           "--disable-component-update", "--disable-sync", "--no-first-run", "--hide-scrollbars",
           f"--user-data-dir={profile}", *args]
    p = subprocess.run(cmd, capture_output=True, timeout=120, check=False)
    assert p.returncode == 0, f"chromium failed ({p.returncode}): {p.stderr.decode(errors='replace')[-2000:]}"
    return p


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    return demo_replay(tmp_path_factory) / "reports" / EVENT


@pytest.fixture(scope="module")
def dom(folder, tmp_path_factory):
    # --virtual-time-budget lets the page (and the test copy's load handler) finish before the dump.
    profile = tmp_path_factory.mktemp("chromium-profile")
    page = (folder / "index.html").read_text(encoding="utf-8")
    test_copy = folder.parent / f"{folder.name}-test.html"
    test_copy.write_text(page.replace("</body>", _RECORD_IMAGES + "</body>"), encoding="utf-8")
    p = _run(["--virtual-time-budget=5000", "--dump-dom", test_copy.as_uri()], profile)
    return p.stdout.decode("utf-8")


def test_candidate_table_in_the_dom_equals_candidates_ecsv(folder, dom):
    t = Table.read(folder / "candidates.ecsv", format="ascii.ecsv")
    rows = body_rows(parse_html(dom), "candidates")
    assert len(t) > 3 and len(rows) == len(t)
    for row, rec in zip(rows, t):
        c = cells(row)
        assert c["transient_id"]["attrs"]["data-value"] == rec["transient_id"]
        assert int(c["rank"]["attrs"]["data-value"]) == rec["rank"] and c["rank"]["text"] == str(rec["rank"])
        assert c["class"]["text"] == rec["class"] and c["status"]["text"] == rec["status"]
        for col in ("p_assoc", "fap", "odds", "prior", "sky_per_sr", "time_per_s", "distance_factor",
                    "rate_per_sr_per_s", "dt_s", "searched_area_deg2", "distance_mpc", "best_host_prob"):
            v = float(c[col]["attrs"]["data-value"])
            assert (np.isnan(v) and np.isnan(rec[col])) or v == rec[col], (rec["transient_id"], col, v, rec[col])
        for col in ("p_assoc", "fap", "odds"):
            want = float(f"{rec[col]:.2e}")  # three significant digits (Python's rounding)
            assert _number(c[col]["text"]) == pytest.approx(want, rel=1e-12, abs=0.0) or want >= 100
        host = c["best_host_id"]["attrs"]["data-value"]
        assert host == ("" if np.ma.is_masked(rec["best_host_id"]) else str(rec["best_host_id"]))
    assert rows[0] and cells(rows[0])["transient_id"]["text"] == TRUTH["counterpart"]  # the demo's counterpart


def _number(text: str) -> float:
    sup = str.maketrans("⁻⁰¹²³⁴⁵⁶⁷⁸⁹", "-0123456789")
    t = text.replace(",", "").replace("−", "-").strip()
    if "×" in t:
        mant, exp = t.split("× 10")
        return float(mant) * 10.0 ** int(exp.translate(sup))
    return float(t)


def test_every_image_loads(dom):
    from PIL import Image

    m = re.search(r'data-test-images="([^"]*)"', dom)
    assert m, "the test copy's load handler did not run"
    states = m.group(1).split()
    imgs = [a for tag, a in parse_html(dom).tags if tag == "img"]
    assert imgs and len(states) == len(imgs)
    for state, a in zip(states, imgs):
        assert a["src"].startswith("data:image/png;base64,")
        data = base64.b64decode(a["src"].split(",", 1)[1], validate=True)
        with Image.open(io.BytesIO(data)) as im:
            im.verify()  # Pillow checks the PNG chunks and their CRCs
        with Image.open(io.BytesIO(data)) as im:
            size = im.size
        assert state == f"true:{size[0]}x{size[1]}", (state, size)  # the browser decoded it, full size
        assert (int(a["width"]), int(a["height"])) == size


def test_screenshot_is_not_blank(folder, tmp_path):
    from PIL import Image

    shot = tmp_path / "shot.png"
    _run([f"--window-size={WINDOW[0]},{WINDOW[1]}", f"--screenshot={shot}", (folder / "index.html").as_uri()],
         tmp_path / "profile")
    with Image.open(shot) as im:
        assert im.size == WINDOW
        px = np.asarray(im.convert("RGB"), dtype=np.int16)
    # The masthead's background is the palette's paper colour #f7f4ec = (247, 244, 236).
    assert np.abs(px[8, 8] - np.array([247, 244, 236])).max() <= 2, px[8, 8]
    grey = px.mean(axis=2)
    assert (grey < 80).mean() > 0.005  # dark text and lines
    code = (px[..., 0].astype(np.int64) << 16) | (px[..., 1].astype(np.int64) << 8) | px[..., 2].astype(np.int64)
    mode = np.bincount(code.ravel()).max() / grey.size
    assert mode < 0.9 and grey.std() > 20  # far from one flat colour


def test_printed_page_is_a_multipage_pdf(folder, tmp_path):
    pdf = tmp_path / "report.pdf"
    _run(["--no-pdf-header-footer", f"--print-to-pdf={pdf}", (folder / "index.html").as_uri()], tmp_path / "profile")
    data = pdf.read_bytes()
    assert data.startswith(b"%PDF-")
    pages = len(re.findall(rb"/Type\s*/Page(?!s)", data))
    assert pages >= 2, pages


def test_tables_beside_the_page_equal_the_store(folder):
    store_path = folder.parent.parent / "state" / "matcher.sqlite"
    cand = Table.read(folder / "candidates.ecsv", format="ascii.ecsv")
    vot = Table.read(folder / "hosts.vot", format="votable")
    with Store(store_path) as st:
        results = {r.key: r for r in st.results(event_id=EVENT)}
        payload = None
        seq = 0
        while rows := st.outbox_after(seq, 5000):
            for r in rows:
                if r.kind == "hosts" and r.key == f"{EVENT}/{cand.meta['revision']}":
                    payload = json.loads(r.payload)
            seq = rows[-1].seq
    for row in cand:
        rec = results[row["key"]].record
        assert row["transient_id"] == rec["transient_id"] and row["status"] == rec["status"]
        assert (row["odds"], row["fap"], row["dt_s"]) == (rec["odds"], rec["fap"], rec["dt_s"])
        assert row["p_assoc_published"] == rec["p_assoc"]
        for term, value in rec["terms"].items():
            assert row[term] == value, term
    assert payload is not None and len(vot) == len(payload["galaxies"][:10])
    for row, g in zip(vot, payload["galaxies"]):
        assert str(row["galaxy_id"]) == str(g["galaxy_id"]) and row["rank"] == g["rank"]
        assert float(row["p_host"]) == g["prob"] and float(row["cum_prob"]) == g["cum_prob"]
        assert float(row["ra_deg"]) == g["ra_deg"] and float(row["distance_mpc"]) == g["distance_mpc"]
