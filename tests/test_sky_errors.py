"""Bad localization input: a clear error that names the source and the problem."""

from __future__ import annotations

import io

import numpy as np
import pytest
from astropy.io import fits

from matcher.errors import InputError, MatcherWarning, SkyMapError
from matcher.sky import SkyMap, flat_fits_bytes, moc_fits_bytes, read_skymap, synthetic_skymap, Blob


def _table_bytes(cols, **header):
    hdu = fits.BinTableHDU.from_columns(cols)
    for k, v in header.items():
        hdu.header[k] = v
    buf = io.BytesIO()
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(buf)
    return buf.getvalue()


def test_not_fits(tmp_path):
    p = tmp_path / "alert.fits"
    p.write_bytes(b"<html>not a map</html>")
    with pytest.raises(SkyMapError, match=r"alert\.fits: not a FITS file"):
        read_skymap(p)


def test_missing_file(tmp_path):
    with pytest.raises(SkyMapError, match="cannot read file"):
        read_skymap(tmp_path / "nope.fits")


def test_corrupt_gzip():
    with pytest.raises(SkyMapError, match="corrupt gzip"):
        read_skymap(b"\x1f\x8b\x08\x00garbage-garbage")


def test_no_table():
    buf = io.BytesIO()
    fits.PrimaryHDU(np.zeros((4, 4))).writeto(buf)
    with pytest.raises(SkyMapError, match="no binary table HDU"):
        read_skymap(buf.getvalue(), source="image.fits")


def test_not_healpix():
    data = _table_bytes([fits.Column("PROB", "D", array=np.ones(12) / 12)], ORDERING="RING", PIXTYPE="CAR")
    with pytest.raises(SkyMapError, match="not a HEALPix map"):
        read_skymap(data)


def test_missing_columns():
    data = _table_bytes([fits.Column("UNIQ", "K", array=np.arange(4, 16))], ORDERING="NUNIQ")
    with pytest.raises(SkyMapError, match="missing column PROBDENSITY"):
        read_skymap(data)
    data = _table_bytes([fits.Column("T", "D", array=np.ones(12) / 12)], ORDERING="RING", NSIDE=1)
    with pytest.raises(SkyMapError, match=r"missing column PROB \(found: T\)"):
        read_skymap(data)


def test_bad_ordering():
    data = _table_bytes([fits.Column("PROB", "D", array=np.ones(12) / 12)], ORDERING="SPIRAL")
    with pytest.raises(SkyMapError, match="ORDERING='SPIRAL'"):
        read_skymap(data)


def test_negative_and_nonfinite():
    p = np.ones(12) / 12
    p[3] = -0.01
    with pytest.raises(SkyMapError, match="negative probability"):
        read_skymap(flat_fits_bytes(p, nest=True))
    p = np.ones(12) / 12
    p[5] = np.nan
    with pytest.raises(SkyMapError, match="non-finite"):
        read_skymap(flat_fits_bytes(p, nest=True))


def test_normalization_policy():
    # Off by more than 1%: rejected, saying by how much.
    with pytest.raises(SkyMapError, match=r"sum to 0\.8.*off by -20%"):
        read_skymap(flat_fits_bytes(np.full(12, 0.8 / 12), nest=True))
    # Within 1%: renormalized with a warning.
    with pytest.warns(MatcherWarning, match="renormalized"):
        m = read_skymap(flat_fits_bytes(np.full(12, 1.005 / 12), nest=True))
    assert m.prob.sum() == pytest.approx(1.0, abs=1e-15)
    # Float rounding: silent.
    m = read_skymap(flat_fits_bytes(np.full(12, (1 + 1e-9) / 12), nest=True))
    assert m.prob.sum() == pytest.approx(1.0, abs=1e-15)


def test_nside_out_of_range():
    data = _table_bytes([fits.Column("PROB", "D", array=np.ones(12 * 9) / 108)], ORDERING="RING", NSIDE=3)
    with pytest.raises(SkyMapError, match="NSIDE=3 must be a power of two"):
        read_skymap(data)
    data = _table_bytes([fits.Column("PROB", "D", array=np.ones(48) / 48)], ORDERING="RING", NSIDE=4)
    with pytest.raises(SkyMapError, match="NSIDE=4 needs 192 pixels, PROB has 48"):
        read_skymap(data)
    with pytest.raises(SkyMapError, match="not 12·NSIDE²"):
        SkyMap.from_flat(np.ones(13) / 13, nest=True)


def test_moc_coverage_and_ids():
    with pytest.raises(SkyMapError, match="cover 91.6667% of the sky"):
        SkyMap.from_moc(np.arange(4, 15), np.full(11, 1 / (np.pi * 4 * 11 / 12)))
    with pytest.raises(SkyMapError, match="overlap"):
        SkyMap.from_moc(np.r_[np.arange(4, 16), 16], np.ones(13))
    with pytest.raises(SkyMapError, match="below 4"):
        SkyMap.from_moc(np.arange(0, 12), np.ones(12))
    with pytest.raises(SkyMapError, match="order 30"):
        SkyMap.from_moc(np.array([4 * 4**30]), np.ones(1))


def test_incomplete_distance_layers():
    with pytest.raises(SkyMapError, match="missing DISTNORM"):
        SkyMap.from_flat(np.ones(12) / 12, nest=True, distmu=np.ones(12), distsigma=np.ones(12))
    with pytest.raises(SkyMapError, match="DISTSIGMA must be finite and positive"):
        SkyMap.from_flat(np.ones(12) / 12, nest=True, distmu=np.ones(12), distsigma=np.zeros(12),
                         distnorm=np.ones(12))


def test_size_limit(tmp_path):
    m = synthetic_skymap([Blob(10, 10, 100.0)], max_order=6, pixel_prob=1e-3)
    data = moc_fits_bytes(m)
    with pytest.raises(SkyMapError, match="over the 1000-byte limit"):
        read_skymap(data, max_bytes=1000)
    p = tmp_path / "big.fits"
    p.write_bytes(data)
    with pytest.raises(SkyMapError, match="big.fits: file is .* bytes, over the 1000-byte limit"):
        read_skymap(p, max_bytes=1000)


@pytest.mark.parametrize("ra,dec,what", [(361.0, 0.0, "ra_deg=361.0"), (10.0, -91.0, "dec_deg=-91.0"),
                                         (np.nan, 0.0, "ra_deg=nan")])
def test_positions_out_of_range(ra, dec, what):
    m = SkyMap.from_flat(np.ones(12) / 12, nest=True)
    with pytest.raises(InputError, match=what):
        m.density([10.0, ra], [0.0, dec])


def test_no_distance_layers():
    m = SkyMap.from_flat(np.ones(12) / 12, nest=True)
    with pytest.raises(SkyMapError, match="no distance layers"):
        m.distance_along(10.0, 10.0)


def test_scalar_positions_give_scalars():
    # A past bug: a single scalar position crashed the lookup.
    m = SkyMap.from_flat(np.ones(12) / 12, nest=True, distmu=np.full(12, 100.0), distsigma=np.full(12, 20.0),
                         distnorm=np.full(12, 1e-4))
    assert np.ndim(m.pixel_index(10.0, 10.0)) == 0
    assert np.isfinite(m.distance_along(10.0, 10.0)[0])
    assert np.ndim(m.overlap_gaussian(10.0, 10.0, 1.0)) == 0
