"""The HEALPix galaxy index: sort key, slices, saving, memory-mapping and staleness."""

from __future__ import annotations

import json
import os

import numpy as np
import pytest

from matcher.catalog import (
    StaleIndexError,
    build_index,
    catalog_from_table,
    default_index_path,
    fine_pixels,
    index_catalog_file,
    load_index,
    open_galaxy_index,
    synthetic_catalog,
    write_index,
)
from matcher.errors import CatalogError, MatcherWarning
from matcher.sky.coords import angular_separation_deg


@pytest.fixture
def catalogue_file(tmp_path):
    table = synthetic_catalog(3000, 4, max_distance_mpc=250.0, mag_limit=20.0)
    path = tmp_path / "galaxies.fits"
    table.write(path)
    return path


def test_order29_pixels_agree_with_astropy_healpix():
    # Second implementation: astropy-healpix's lonlat_to_healpix at NSIDE 2^29 (NESTED). Points within
    # rounding of a pixel edge could legitimately differ; random points essentially never are.
    from astropy import units as u
    from astropy_healpix import HEALPix

    rng = np.random.default_rng(5)
    ra = rng.uniform(0, 360, 20_000)
    dec = np.degrees(np.arcsin(rng.uniform(-1, 1, 20_000)))
    ours = fine_pixels(ra, dec)
    theirs = HEALPix(nside=2**29, order="nested").lonlat_to_healpix(ra * u.deg, dec * u.deg)
    assert np.count_nonzero(ours != theirs) <= 2


def test_build_sorts_stably_and_keeps_every_galaxy():
    table = synthetic_catalog(2000, 6)
    cat, report = catalog_from_table(table)
    index = build_index(cat, report=report)
    assert len(index) == len(cat)
    assert np.all(np.diff(index.pix) >= 0)
    assert sorted(index.catalog.galaxy_id.tolist()) == sorted(cat.galaxy_id.tolist())
    back = np.argsort(index.catalog.row)
    np.testing.assert_array_equal(np.asarray(index.catalog.ra_deg)[back], cat.ra_deg)


def test_cone_rows_match_a_brute_force_cut():
    table = synthetic_catalog(20_000, 9)
    cat, _ = catalog_from_table(table)
    index = build_index(cat)
    for ra, dec, radius in [(10.0, 20.0, 3.0), (359.5, -89.0, 2.0), (180.0, 0.0, 0.2), (45.0, 60.0, 30.0)]:
        got = np.sort(np.asarray(index.catalog.row)[index.rows_in_cone(ra, dec, radius)])
        sep = angular_separation_deg(ra, dec, cat.ra_deg, cat.dec_deg)
        want = np.sort(np.asarray(cat.row)[sep <= radius])
        # Exactly the same set except possibly galaxies within 1e-9 deg of the rim (two formulas).
        near_rim = np.abs(sep - radius) < 1e-9
        assert set(got) ^ set(want) <= set(np.asarray(cat.row)[near_rim])


def test_write_and_memory_map_round_trip(catalogue_file):
    index = index_catalog_file(catalogue_file, completeness={"model": "schechter", "mag_limit": 20.0})
    out = write_index(index, default_index_path(catalogue_file))
    assert out.name == "galaxies.fits.index"
    loaded = load_index(out)
    assert isinstance(loaded.pix, np.memmap) and not loaded.pix.flags.writeable
    assert loaded.header.saved and loaded.header.n_rows == len(index)
    assert loaded.header.completeness["mag_limit"] == 20.0
    assert loaded.header.catalog["checksum"].startswith("sha256:")
    for name, arr in index.catalog.arrays().items():
        np.testing.assert_array_equal(np.asarray(getattr(loaded.catalog, name)), arr)
    header = json.loads((out / "index.json").read_text())
    assert header["format"] == "matcher-galaxy-index/1" and header["order"] == 29
    assert header["columns"]["ra_deg"] == "ra_deg"


def test_stale_index_is_detected_by_checksum(catalogue_file):
    write_index(index_catalog_file(catalogue_file), default_index_path(catalogue_file))
    assert len(open_galaxy_index(catalogue_file)) == 3000
    # Same size, different bytes: a changed value. The mtime changes too; the checksum decides.
    data = bytearray(catalogue_file.read_bytes())
    data[-200] ^= 0xFF
    catalogue_file.write_bytes(bytes(data))
    with pytest.raises(StaleIndexError, match="stale index.*rebuild it with `matcher catalog index"):
        open_galaxy_index(catalogue_file)
    with pytest.raises(StaleIndexError):
        load_index(default_index_path(catalogue_file), check="checksum")
    assert len(load_index(default_index_path(catalogue_file), check="none")) == 3000


def test_touched_but_unchanged_catalogue_is_still_fresh(catalogue_file):
    write_index(index_catalog_file(catalogue_file), default_index_path(catalogue_file))
    st = os.stat(catalogue_file)
    os.utime(catalogue_file, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))
    assert len(open_galaxy_index(catalogue_file)) == 3000


def test_missing_catalogue_warns_that_freshness_is_unknown(catalogue_file):
    out = write_index(index_catalog_file(catalogue_file), default_index_path(catalogue_file))
    catalogue_file.unlink()
    with pytest.warns(MatcherWarning, match="cannot be checked for staleness"):
        assert len(load_index(out)) == 3000


def test_catalogue_without_saved_index_is_indexed_in_memory(catalogue_file):
    index = open_galaxy_index(catalogue_file)
    assert not index.header.saved and len(index) == 3000
    assert not default_index_path(catalogue_file).exists()


def test_index_built_with_other_columns_is_refused(catalogue_file):
    write_index(index_catalog_file(catalogue_file), default_index_path(catalogue_file))
    with pytest.raises(CatalogError, match="built with columns"):
        open_galaxy_index(catalogue_file, columns={"weight": "mag"})


def test_write_refuses_to_replace_something_that_is_not_an_index(tmp_path, catalogue_file):
    target = tmp_path / "precious"
    target.mkdir()
    (target / "notes.txt").write_text("keep me")
    with pytest.raises(CatalogError, match="is not a galaxy index"):
        write_index(index_catalog_file(catalogue_file), target)
    assert (target / "notes.txt").read_text() == "keep me"
    # An existing index is replaced atomically.
    out = tmp_path / "idx"
    write_index(index_catalog_file(catalogue_file), out)
    write_index(index_catalog_file(catalogue_file), out)
    assert sorted(p.name for p in tmp_path.iterdir() if p.name.startswith("idx")) == ["idx"]


def test_damaged_indexes_give_clear_errors(tmp_path, catalogue_file):
    out = write_index(index_catalog_file(catalogue_file), tmp_path / "idx")
    with pytest.raises(CatalogError, match="not a galaxy index"):
        load_index(tmp_path)
    (out / "weight.npy").write_bytes(b"garbage")
    with pytest.raises(CatalogError, match="cannot read weight.npy"):
        load_index(out)
    np.save(out / "weight.npy", np.zeros(7))
    with pytest.raises(CatalogError, match="weight.npy has shape"):
        load_index(out)
    header = json.loads((out / "index.json").read_text())
    header["format"] = "something-else/9"
    (out / "index.json").write_text(json.dumps(header))
    with pytest.raises(CatalogError, match="rebuild the index"):
        load_index(out)


def test_cli_index_and_info(tmp_path, catalogue_file, capsys):
    from matcher.cli import main

    assert main(["catalog", "index", str(catalogue_file), "-o", str(tmp_path / "ix"), "--mag-limit", "20"]) == 0
    assert "3000 accepted" in capsys.readouterr().out
    assert main(["catalog", "info", str(tmp_path / "ix"), "--json"]) == 0
    info = json.loads(capsys.readouterr().out)
    assert info["status"] == "fresh" and info["n_rows"] == 3000
    assert info["completeness"]["model"] == "schechter"
