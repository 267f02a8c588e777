"""Catalogue loading: formats, column maps, Planck18 distances, and bad input."""

from __future__ import annotations

import numpy as np
import pytest
from astropy.table import MaskedColumn, Table

from matcher.catalog import (
    ColumnMap,
    catalog_from_table,
    planck18_table,
    read_catalog,
    synthetic_catalog,
)
from matcher.cli import main
from matcher.errors import CatalogError, ConfigError


# ------------------------------------------------------------------ Planck18 distances
@pytest.mark.parametrize("z, d_l", [(0.01, 44.6471), (0.05, 229.8806), (0.10, 475.8223)])
def test_planck18_luminosity_distance_check_values(z, d_l):
    # REFERENCES.md, cosmology table (astropy 8.0.2 Planck18, computed); tolerance 1e-4 relative as stated
    # there (the values are quoted to 6-7 digits).
    assert float(planck18_table().luminosity_distance(z)) == pytest.approx(d_l, rel=1e-4)


@pytest.mark.parametrize("d_l, z", [(40.0, 0.0089662), (100.0, 0.0221944)])
def test_planck18_inverse_check_values(d_l, z):
    # REFERENCES.md, cosmology, inverse (computed); 1e-4 relative.
    assert float(planck18_table().redshift_at_luminosity_distance(d_l)) == pytest.approx(z, rel=1e-4)


def test_tabulated_distances_match_astropy_over_the_range():
    # The table integrates Planck18.efunc itself; astropy's luminosity_distance integrates by quadrature.
    # Cumulative Simpson on 8193 points plus a cubic spline is good to ~1e-10; require 1e-8.
    from astropy.cosmology import Planck18

    z = np.array([1e-4, 0.003, 0.02, 0.2, 0.7, 1.5, 4.0, 9.5])
    want = Planck18.luminosity_distance(z).to_value("Mpc")
    np.testing.assert_allclose(planck18_table().luminosity_distance(z), want, rtol=1e-8)
    # The error propagation uses dD_L/dz; compare with a central difference of astropy's D_L
    # (step 1e-6: truncation ~1e-12 relative, rounding ~1e-9).
    h = 1e-6
    fd = (Planck18.luminosity_distance(z + h) - Planck18.luminosity_distance(z - h)).to_value("Mpc") / (2 * h)
    np.testing.assert_allclose(planck18_table().luminosity_distance_derivative(z), fd, rtol=1e-6)


def test_redshift_only_galaxies_get_planck18_distances_and_errors():
    from astropy.cosmology import Planck18

    table = Table({"ra_deg": [10.0, 20.0], "dec_deg": [5.0, -5.0], "redshift": [0.01, 0.05],
                   "redshift_err": [0.001, 0.0]})
    cat, report = catalog_from_table(table, peculiar_velocity_kms=0.0)
    np.testing.assert_allclose(cat.distance_mpc, Planck18.luminosity_distance([0.01, 0.05]).value, rtol=1e-8)
    h = 1e-6
    slope = (Planck18.luminosity_distance(0.01 + h) - Planck18.luminosity_distance(0.01 - h)).value / (2 * h)
    assert cat.distance_err_mpc[0] == pytest.approx(slope * 0.001, rel=1e-6)
    assert cat.distance_err_mpc[1] == 0.0
    assert report.notes["from_redshift"] == 2 and cat.from_redshift.all()
    # A peculiar velocity of 300 km/s adds (1+z) v/c in quadrature to the redshift error.
    cat2, _ = catalog_from_table(table, peculiar_velocity_kms=300.0)
    sig_z = np.hypot(0.001, 1.01 * 300.0 / 299792.458)
    assert cat2.distance_err_mpc[0] == pytest.approx(slope * sig_z, rel=1e-6)


# ------------------------------------------------------------------ formats and column maps
@pytest.fixture
def demo_table():
    return synthetic_catalog(400, 8, max_distance_mpc=200.0, redshift_fraction=0.25)


@pytest.mark.parametrize("suffix", [".fits", ".ecsv", ".csv", ".parquet", ".vot"])
def test_every_format_reads_the_same_catalogue(tmp_path, demo_table, suffix):
    pytest.importorskip("pyarrow") if suffix == ".parquet" else None
    fmt = {".fits": "fits", ".ecsv": "ascii.ecsv", ".csv": "ascii.csv", ".parquet": "parquet", ".vot": "votable"}
    path = tmp_path / f"galaxies{suffix}"
    t = demo_table.copy()
    t.meta.clear()
    t.write(path, format=fmt[suffix])
    cat, report = read_catalog(path)
    ref, _ = catalog_from_table(demo_table)
    assert report.n_accepted == len(demo_table) == len(cat)
    np.testing.assert_array_equal(cat.galaxy_id, ref.galaxy_id)
    # Text formats print floats with 16-17 significant digits: equal to 1e-15.
    np.testing.assert_allclose(cat.ra_deg, ref.ra_deg, rtol=1e-15)
    np.testing.assert_allclose(cat.distance_mpc, ref.distance_mpc, rtol=1e-12)


def test_column_map_renames(demo_table):
    t = demo_table.copy()
    t.rename_columns(["ra_deg", "dec_deg", "distance_mpc"], ["RAJ2000", "DEJ2000", "Dist"])
    with pytest.raises(CatalogError, match="no ra_deg column"):
        catalog_from_table(t)
    cat, _ = catalog_from_table(t, {"ra_deg": "RAJ2000", "dec_deg": "DEJ2000", "distance_mpc": "Dist"})
    assert len(cat) == len(t)


def test_column_map_validation():
    with pytest.raises(ConfigError, match="unknown column key"):
        ColumnMap.from_mapping({"right_ascension": "RA"})
    with pytest.raises(ConfigError, match="both|all mapped"):
        ColumnMap.from_mapping({"ra_deg": "X", "dec_deg": "X"})
    with pytest.raises(ConfigError, match="KEY=NAME"):
        ColumnMap.from_pairs(["ra_deg"])
    assert ColumnMap.from_pairs(["ra_deg=RA"]).name("ra_deg") == "RA"


# ------------------------------------------------------------------ bad input
def test_missing_mapped_column_is_an_error_naming_it(demo_table):
    with pytest.raises(CatalogError, match=r"mapped column 'Bmag' \(for weight\) is not in the catalogue"):
        catalog_from_table(demo_table, {"weight": "Bmag"})


def test_non_numeric_values_are_counted_not_crashing(tmp_path):
    path = tmp_path / "bad.csv"
    path.write_text("id,ra_deg,dec_deg,distance_mpc\n1,10.0,5.0,100\n2,abc,5.0,100\n3,11.0,6.0,far\n4,12,7,80\n")
    cat, report = read_catalog(path)
    assert report.n_rows == 4 and report.n_accepted == 2
    assert report.rejected == {"not_numeric": 2}
    assert report.examples["not_numeric"] == [1, 2]
    assert cat.galaxy_id.tolist() == [1, 4]


def test_nan_and_out_of_range_positions_are_counted():
    t = Table({"ra_deg": [10.0, np.nan, 400.0, 20.0, 360.0], "dec_deg": [0.0, 1.0, 2.0, -95.0, 3.0],
               "distance_mpc": [50.0] * 5})
    cat, report = catalog_from_table(t)
    assert report.rejected == {"bad_position": 3}
    assert report.examples["bad_position"] == [1, 2, 3]
    assert cat.ra_deg.tolist() == [10.0, 0.0]  # RA 360 folds to 0


def test_impossible_distances_weights_and_duplicates_are_counted():
    t = Table({
        "id": [1, 2, 3, 4, 5, 6, 7, 1],
        "ra_deg": [1.0] * 8, "dec_deg": [1.0] * 8,
        "distance_mpc": [10.0, -5.0, np.nan, np.nan, 20.0, 30.0, 40.0, 50.0],
        "distance_err_mpc": [1.0, 1.0, np.nan, np.nan, -1.0, np.nan, 1.0, 1.0],
        "redshift": [np.nan, np.nan, 0.01, np.nan, np.nan, np.nan, np.nan, np.nan],
        "weight": [1.0, 1.0, 1.0, 1.0, 1.0, 1.0, -3.0, 1.0],
    })
    cat, report = catalog_from_table(t)
    assert report.rejected == {"bad_distance": 2, "no_distance": 1, "bad_weight": 1, "duplicate_id": 1}
    assert report.examples["duplicate_id"] == [7]
    assert cat.galaxy_id.tolist() == [1, 3, 6]
    assert report.notes["distance_without_error"] == 1  # galaxy 6: taken as exact
    assert sum(report.rejected.values()) + report.n_accepted == report.n_rows


def test_masked_cells_are_missing_values():
    t = Table({"ra_deg": [1.0, 2.0], "dec_deg": [1.0, 2.0],
               "distance_mpc": MaskedColumn([10.0, 0.0], mask=[False, True]),
               "redshift": [np.nan, 0.02]})
    cat, report = catalog_from_table(t)
    assert report.n_accepted == 2 and cat.from_redshift.tolist() == [False, True]


def test_empty_and_unreadable_files(tmp_path):
    empty = tmp_path / "empty.csv"
    empty.write_text("")
    with pytest.raises(CatalogError, match="empty"):
        read_catalog(empty)
    header_only = tmp_path / "header.csv"
    header_only.write_text("ra_deg,dec_deg,distance_mpc\n")
    with pytest.raises(CatalogError, match="no rows"):
        read_catalog(header_only)
    junk = tmp_path / "junk.fits"
    junk.write_bytes(b"this is not FITS at all" * 100)
    with pytest.raises(CatalogError, match="not a readable fits table"):
        read_catalog(junk)
    with pytest.raises(CatalogError, match="cannot tell the catalogue format"):
        read_catalog(tmp_path / "galaxies.txt")
    with pytest.raises(CatalogError, match="no such file"):
        read_catalog(tmp_path / "missing.csv")


def test_all_rows_rejected_is_an_error_with_reasons():
    t = Table({"ra_deg": [np.nan, np.nan], "dec_deg": [0.0, 0.0], "distance_mpc": [1.0, 1.0]})
    with pytest.raises(CatalogError, match="no usable galaxies among 2 rows .*2 ra_deg/dec_deg"):
        catalog_from_table(t)


def test_cli_reports_bad_catalogue_without_traceback(tmp_path, capsys):
    path = tmp_path / "bad.csv"
    path.write_text("RA,DEC\n1,2\n")
    code = main(["catalog", "index", str(path), "--column", "ra_deg=RA", "--column", "dec_deg=DEC"])
    err = capsys.readouterr().err
    assert code == 2
    assert "neither a distance column" in err and "Traceback" not in err
    code = main(["catalog", "index", str(path), "--column", "ra_deg=RAJ2000"])
    err = capsys.readouterr().err
    assert code == 2 and "mapped column 'RAJ2000'" in err


def test_cli_index_counts_rejections(tmp_path, capsys):
    path = tmp_path / "some_bad.csv"
    path.write_text("id,ra_deg,dec_deg,distance_mpc\n1,10,5,100\n2,nan,5,100\n3,11,6,-4\n")
    assert main(["catalog", "index", str(path), "--json"]) == 0
    import json

    out = json.loads(capsys.readouterr().out)
    assert out["n_accepted"] == 1 and out["rejected"] == {"bad_position": 1, "bad_distance": 1}
    assert (tmp_path / "some_bad.csv.index" / "index.json").is_file()


def test_parquet_nulls_are_missing_values(tmp_path):
    pa = pytest.importorskip("pyarrow")
    import pyarrow.parquet as pq

    path = tmp_path / "nulls.parquet"
    pq.write_table(pa.table({"ra_deg": [1.0, 2.0, None], "dec_deg": [1.0, 2.0, 3.0],
                             "distance_mpc": [None, 20.0, 30.0], "redshift": [0.01, None, None]}), path)
    cat, report = read_catalog(path)
    assert report.rejected == {"bad_position": 1}
    assert cat.from_redshift.tolist() == [True, False]
