"""``matcher sky summary|at`` and ``matcher bench sky``: the JSON contract and errors.

Expected values are computed independently: areas and densities from healpy on the
flattened fixture map (an outside implementation of the same pixel geometry).
"""

from __future__ import annotations

import json
import subprocess
import sys

import healpy as hp
import numpy as np
import pytest

from matcher.cli import main
from matcher.sky import read_skymap

BLOB = "fixtures/skymaps/demo_blob.multiorder.fits.gz"
FLAT = "fixtures/skymaps/demo_flat_ring.fits"


@pytest.fixture
def fx(fixtures_dir):
    return lambda rel: str(fixtures_dir.parent / rel)


def _run_json(capsys, argv):
    assert main(argv) == 0
    return json.loads(capsys.readouterr().out)


def test_summary_contract(capsys, fx):
    out = _run_json(capsys, ["sky", "summary", fx(BLOB), "--levels", "0.5,0.9", "--json"])
    assert set(out) >= {"area_deg2", "pixels", "max_order", "distance_mpc"}
    assert set(out["area_deg2"]) == {"0.5", "0.9"}
    assert set(out["distance_mpc"]) == {"mean", "std"}
    # Independent check of the 90% area: healpy pixel areas on the flat map, sorted and summed
    # (inclusive of the crossing pixel, so within one finest pixel of our interpolated value).
    m = read_skymap(fx(BLOB))
    prob, *_ = m.to_flat()
    nside = 1 << m.max_order
    p = np.sort(prob)[::-1]
    n90 = int(np.searchsorted(np.cumsum(p), 0.9)) + 1
    ref = n90 * hp.nside2pixarea(nside, degrees=True)
    assert out["area_deg2"]["0.9"] == pytest.approx(ref, abs=hp.nside2pixarea(nside, degrees=True))
    assert out["pixels"] == m.npix and out["max_order"] == m.max_order


def test_summary_flat_map_without_distance_key_when_absent(capsys, tmp_path):
    from matcher.sky import flat_fits_bytes

    path = tmp_path / "flat.fits"
    path.write_bytes(flat_fits_bytes(np.full(12 * 16 * 16, 1 / (12 * 16 * 16)), nest=False))
    out = _run_json(capsys, ["sky", "summary", str(path), "--json"])
    assert "distance_mpc" not in out
    assert out["area_deg2"]["0.9"] == pytest.approx(0.9 * 4 * np.pi * (180 / np.pi) ** 2, rel=1e-9)


def test_at_contract(capsys, fx):
    out = _run_json(capsys, ["sky", "at", fx(FLAT), "--ra", "213.0", "--dec", "-21.0", "--err-deg", "0.5", "--json"])
    assert set(out) >= {"density_per_sr", "credible_level", "searched_area_deg2", "overlap_per_sr", "distance_mpc"}
    # Density: healpy's RING pixel lookup on the flat file, read by healpy itself.
    prob = hp.read_map(fx(FLAT), field=0, nest=False, dtype=np.float64)
    ipix = hp.ang2pix(64, 213.0, -21.0, lonlat=True)
    assert out["density_per_sr"] == pytest.approx(prob[ipix] / hp.nside2pixarea(64), rel=1e-12)


def test_at_many_positions(capsys, fx, tmp_path):
    pos = tmp_path / "pos.csv"
    pos.write_text("ra_deg,dec_deg,err_deg\n213,-21,0\n10,10,2\n")
    out = _run_json(capsys, ["sky", "at", fx(BLOB), "--positions", str(pos), "--json"])
    assert isinstance(out, list) and len(out) == 2
    assert out[0]["credible_level"] < out[1]["credible_level"]
    jl = tmp_path / "pos.jsonl"
    jl.write_text('{"ra_deg": 213, "dec_deg": -21}\n{"ra_deg": 10, "dec_deg": 10}\n')
    out2 = _run_json(capsys, ["sky", "at", fx(BLOB), "--positions", str(jl), "--json"])
    assert [r["density_per_sr"] for r in out2] == [r["density_per_sr"] for r in out]


def test_tables_for_people(capsys, fx):
    assert main(["sky", "summary", fx(BLOB)]) == 0
    text = capsys.readouterr().out
    assert "90% credible area" in text and "deg²" in text
    assert main(["sky", "at", fx(BLOB), "--ra", "213", "--dec", "-21"]) == 0
    assert "searched area" in capsys.readouterr().out


@pytest.mark.parametrize(
    "argv,message",
    [
        (["sky", "at", BLOB, "--ra", "400", "--dec", "0"], "ra_deg=400.0 is outside [0, 360]"),
        (["sky", "at", BLOB, "--ra", "10", "--dec", "-95"], "dec_deg=-95.0 is outside [-90, 90]"),
        (["sky", "summary", BLOB, "--levels", "0.5,1.5"], "1.5 is outside (0, 1]"),
        (["sky", "summary", "no/such/map.fits"], "no/such/map.fits: cannot read file"),
        (["sky", "summary", "pyproject.toml"], "pyproject.toml: not a FITS file"),
        (["sky", "at", BLOB, "--ra", "10"], "give --ra and --dec"),
    ],
)
def test_errors_are_one_line_with_exit_2(capsys, argv, message):
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert message in err
    assert "Traceback" not in err


def test_python_dash_m_and_console_script(fx):
    r = subprocess.run([sys.executable, "-m", "matcher", "sky", "summary", fx(BLOB), "--json"],
                       capture_output=True, text=True, check=True)
    assert json.loads(r.stdout)["pixels"] > 0
    r = subprocess.run(["matcher", "--version"], capture_output=True, text=True, check=True)
    assert r.stdout.startswith("matcher ")


def test_bench_sky_runs_small(capsys):
    assert main(["bench", "sky", "--positions", "20000", "--repeat", "1"]) == 0
    out = capsys.readouterr().out
    assert "ratio baseline (flatten + ang2pix) / ours" in out
    assert "results identical to the baseline                          yes" in out
