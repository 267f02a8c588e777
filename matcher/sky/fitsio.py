"""Reading and writing the trade's HEALPix FITS localization files.

Two layouts are read (both as a FITS binary table in the first table HDU):

* flat: ``ORDERING = 'RING'`` or ``'NESTED'``, ``NSIDE``, a ``PROB`` column of
  probability per pixel (rows may hold several pixels each);
* multi-order: ``ORDERING = 'NUNIQ'``, a ``UNIQ`` column (IVOA MOC NUNIQ ids)
  and ``PROBDENSITY`` per steradian;

each optionally with ``DISTMU``, ``DISTSIGMA`` (Mpc) and ``DISTNORM``
(Mpc**-2). Input may be gzip-compressed. The flow is bytes → parsed table →
:class:`~matcher.sky.skymap.SkyMap`; only :func:`read_skymap` opens files.
"""

from __future__ import annotations

import gzip
import io
import os
import warnings
import zlib
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.utils.exceptions import AstropyUserWarning

from matcher.errors import SkyMapError
from matcher.sky.skymap import DEG2_PER_SR, SkyMap

__all__ = ["read_skymap", "skymap_from_bytes", "moc_fits_bytes", "flat_fits_bytes", "DEFAULT_MAX_BYTES"]

#: Refuse localization files larger than this (after decompression) unless told otherwise.
DEFAULT_MAX_BYTES = 512 * 1024 * 1024

_GZIP_MAGIC = b"\x1f\x8b"
_META_KEYS = ("OBJECT", "DATE-OBS", "MJD-OBS", "DISTMEAN", "DISTSTD", "INSTRUME", "CREATOR", "ORIGIN")


def read_skymap(src, *, max_bytes: int = DEFAULT_MAX_BYTES, source: str | None = None) -> SkyMap:
    """Read a localization from a path, bytes, or a binary file object.

    Parameters
    ----------
    src : str, os.PathLike, bytes, or binary file object
    max_bytes : int
        Size limit (bytes), applied before and after decompression.
    source : str, optional
        Name used in error messages (defaults to the path, or ``<bytes>``).
    """
    if isinstance(src, (bytes, bytearray, memoryview)):
        return skymap_from_bytes(bytes(src), max_bytes=max_bytes, source=source or "<bytes>")
    if isinstance(src, (str, os.PathLike)):
        path = Path(src)
        name = source or str(path)
        try:
            size = path.stat().st_size
            if size > max_bytes:
                raise SkyMapError(name, f"file is {size} bytes, over the {max_bytes}-byte limit")
            data = path.read_bytes()
        except OSError as exc:
            raise SkyMapError(name, f"cannot read file: {exc.strerror or exc}") from None
        return skymap_from_bytes(data, max_bytes=max_bytes, source=name)
    if hasattr(src, "read"):
        name = source or getattr(src, "name", None) or "<file object>"
        data = src.read(max_bytes + 1)
        if not isinstance(data, (bytes, bytearray)):
            raise SkyMapError(str(name), "file object must be opened in binary mode")
        if len(data) > max_bytes:
            raise SkyMapError(str(name), f"stream exceeds the {max_bytes}-byte limit")
        return skymap_from_bytes(bytes(data), max_bytes=max_bytes, source=str(name))
    raise SkyMapError(str(source or type(src).__name__), "expected a path, bytes, or a binary file object")


def skymap_from_bytes(data: bytes, *, max_bytes: int = DEFAULT_MAX_BYTES, source: str = "<bytes>") -> SkyMap:
    """Parse FITS bytes (optionally gzip-compressed) into a :class:`SkyMap`."""
    if data[:2] == _GZIP_MAGIC:
        data = _gunzip(data, max_bytes, source)
    if len(data) > max_bytes:
        raise SkyMapError(source, f"{len(data)} bytes, over the {max_bytes}-byte limit")
    if not data.startswith(b"SIMPLE  ="):
        raise SkyMapError(source, "not a FITS file (no SIMPLE card at the start)")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", AstropyUserWarning)
            with fits.open(io.BytesIO(data), memmap=False, lazy_load_hdus=False) as hdul:
                hdu = next((h for h in hdul if isinstance(h, fits.BinTableHDU)), None)
                if hdu is None:
                    raise SkyMapError(source, "no binary table HDU: not a HEALPix map")
                header = hdu.header
                columns = {c.upper(): c for c in hdu.columns.names}
                units = {c.name.upper(): (c.unit or "").strip() for c in hdu.columns}
                table = {k.upper(): np.asarray(hdu.data[v]) for k, v in columns.items()}
    except SkyMapError:
        raise
    except (OSError, ValueError, TypeError, KeyError, IndexError, AstropyUserWarning) as exc:
        raise SkyMapError(source, f"unreadable FITS: {exc}") from None
    return _skymap_from_table(header, table, units, source)


def _gunzip(data: bytes, max_bytes: int, source: str) -> bytes:
    d = zlib.decompressobj(16 + zlib.MAX_WBITS)
    try:
        out = d.decompress(data, max_bytes + 1)
    except zlib.error as exc:
        raise SkyMapError(source, f"corrupt gzip data: {exc}") from None
    if len(out) > max_bytes:
        raise SkyMapError(source, f"decompresses to more than the {max_bytes}-byte limit")
    return out


def _skymap_from_table(header, table: dict, units: dict, source: str) -> SkyMap:
    if str(header.get("PIXTYPE", "HEALPIX")).upper() != "HEALPIX":
        raise SkyMapError(source, f"PIXTYPE={header.get('PIXTYPE')!r}: not a HEALPix map")
    ordering = str(header.get("ORDERING", "")).strip().upper()
    meta = {k: header[k] for k in _META_KEYS if k in header}
    layers = [table.get(k) for k in ("DISTMU", "DISTSIGMA", "DISTNORM")]
    layers = [None if a is None else _native(a).ravel() for a in layers]
    if ordering == "NUNIQ" or "UNIQ" in table:
        for col in ("UNIQ", "PROBDENSITY"):
            if col not in table:
                raise SkyMapError(source, f"multi-order map is missing column {col} (found: {', '.join(table)})")
        dens = _native(table["PROBDENSITY"]).ravel().astype(np.float64)
        unit = units.get("PROBDENSITY", "").replace(" ", "").lower()
        if unit in ("deg-2", "deg**-2", "1/deg2", "1/deg**2", "deg^-2"):
            dens = dens * DEG2_PER_SR
        elif unit not in ("", "sr-1", "sr**-1", "1/sr", "sr^-1"):
            raise SkyMapError(source, f"PROBDENSITY unit {unit!r} is not per steradian or per deg²")
        return SkyMap.from_moc(_native(table["UNIQ"]).ravel(), dens, *layers, meta=meta, source=source)
    if ordering not in ("RING", "NESTED"):
        raise SkyMapError(source, f"ORDERING={header.get('ORDERING')!r}: expected RING, NESTED or NUNIQ")
    if str(header.get("INDXSCHM", "IMPLICIT")).upper() != "IMPLICIT":
        raise SkyMapError(source, "partial-sky (INDXSCHM=EXPLICIT) flat maps are not supported; send a whole-sky map")
    if "PROB" not in table:
        raise SkyMapError(source, f"flat map is missing column PROB (found: {', '.join(table)})")
    prob = _native(table["PROB"]).ravel()
    nside = header.get("NSIDE")
    if nside is not None:
        try:
            nside = int(nside)
        except (TypeError, ValueError):
            raise SkyMapError(source, f"NSIDE={nside!r} is not an integer") from None
        if nside < 1 or nside & (nside - 1) or nside > 2**29:
            raise SkyMapError(source, f"NSIDE={nside} must be a power of two between 1 and 2^29")
        if prob.size != 12 * nside * nside:
            raise SkyMapError(source, f"NSIDE={nside} needs {12 * nside * nside} pixels, PROB has {prob.size}")
    return SkyMap.from_flat(prob, nest=ordering == "NESTED", distmu=layers[0], distsigma=layers[1],
                            distnorm=layers[2], meta=meta, source=source)


def _native(a: np.ndarray) -> np.ndarray:
    a = np.asarray(a)
    if a.dtype.byteorder not in ("=", "|"):
        a = a.astype(a.dtype.newbyteorder("="))
    return a


# ----------------------------------------------------------------- writing
def _header_cards(meta) -> list[tuple[str, object]]:
    return [(k, v) for k, v in (meta or {}).items() if k in _META_KEYS]


def moc_fits_bytes(skymap: SkyMap, *, compress: bool = False) -> bytes:
    """Serialize a :class:`SkyMap` as a multi-order (NUNIQ) FITS file."""
    cols = [
        fits.Column("UNIQ", "K", array=np.asarray(skymap.uniq)),
        fits.Column("PROBDENSITY", "D", unit="sr-1", array=np.asarray(skymap.probdensity)),
    ]
    if skymap.has_distance:
        cols += [
            fits.Column("DISTMU", "D", unit="Mpc", array=np.asarray(skymap.distmu)),
            fits.Column("DISTSIGMA", "D", unit="Mpc", array=np.asarray(skymap.distsigma)),
            fits.Column("DISTNORM", "D", unit="Mpc-2", array=np.asarray(skymap.distnorm)),
        ]
    hdu = fits.BinTableHDU.from_columns(cols)
    hdu.header["PIXTYPE"] = "HEALPIX"
    hdu.header["ORDERING"] = "NUNIQ"
    hdu.header["COORDSYS"] = "C"
    hdu.header["MOCORDER"] = skymap.max_order
    for k, v in _header_cards(skymap.meta):
        hdu.header[k] = v
    return _to_bytes(hdu, compress)


def flat_fits_bytes(prob, *, nest: bool, distmu=None, distsigma=None, distnorm=None,
                    meta=None, compress: bool = False) -> bytes:
    """Serialize a flat map (probability per pixel) in RING or NESTED order."""
    prob = np.asarray(prob, dtype=np.float64)
    nside = int(round(np.sqrt(prob.size / 12)))
    cols = [fits.Column("PROB", "D", unit="pix-1", array=prob)]
    for name, arr, unit in (("DISTMU", distmu, "Mpc"), ("DISTSIGMA", distsigma, "Mpc"), ("DISTNORM", distnorm, "Mpc-2")):
        if arr is not None:
            cols.append(fits.Column(name, "D", unit=unit, array=np.asarray(arr, dtype=np.float64)))
    hdu = fits.BinTableHDU.from_columns(cols)
    hdu.header["PIXTYPE"] = "HEALPIX"
    hdu.header["ORDERING"] = "NESTED" if nest else "RING"
    hdu.header["COORDSYS"] = "C"
    hdu.header["NSIDE"] = nside
    hdu.header["INDXSCHM"] = "IMPLICIT"
    hdu.header["FIRSTPIX"] = 0
    hdu.header["LASTPIX"] = prob.size - 1
    for k, v in _header_cards(meta):
        hdu.header[k] = v
    return _to_bytes(hdu, compress)


def _to_bytes(hdu: fits.BinTableHDU, compress: bool) -> bytes:
    buf = io.BytesIO()
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(buf)
    data = buf.getvalue()
    return gzip.compress(data, mtime=0) if compress else data

