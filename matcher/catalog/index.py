"""The HEALPix index of a galaxy catalogue.

Galaxies are sorted by their NESTED pixel at order 29 (the deepest HEALPix
order, NSIDE 2**29, ~0.4 milliarcsecond pixels). A multi-order pixel of order
``k`` and index ``i`` covers exactly the order-29 range
``[i·4**(29-k), (i+1)·4**(29-k))``, so the galaxies inside it are one
contiguous slice of the sorted arrays, found with two ``searchsorted`` calls.
A region of many pixels is the union of their slices: nothing is scanned
outside it.

Pure: :func:`build_index` sorts a :class:`~matcher.catalog.catalog.Catalog`
in memory; :mod:`matcher.catalog.indexio` writes it as a directory of
``.npy`` arrays with a JSON header and memory-maps it back.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping

import healpy as hp
import numpy as np

from matcher.catalog.catalog import Catalog, LoadReport
from matcher.sky.coords import radec_to_thetaphi, radec_to_vec
from matcher.sky.moc import nested_ranges

__all__ = ["INDEX_ORDER", "INDEX_FORMAT", "IndexHeader", "GalaxyIndex", "build_index", "fine_pixels"]

#: Order of the pixels galaxies are sorted by.
INDEX_ORDER = 29
#: Format tag written in (and required of) every index header.
INDEX_FORMAT = "matcher-galaxy-index/1"


def fine_pixels(ra_deg, dec_deg, order: int = INDEX_ORDER) -> np.ndarray:
    """NESTED pixel (int64) of each position at ``order`` (healpy ``ang2pix``)."""
    theta, phi = radec_to_thetaphi(ra_deg, dec_deg)
    return np.asarray(hp.ang2pix(1 << order, theta, phi, nest=True), dtype=np.int64)


@dataclass(frozen=True)
class IndexHeader:
    """The facts an index records about itself (its ``index.json``).

    Attributes
    ----------
    n_rows : int
        Galaxies in the index.
    order : int
        HEALPix order of the sort key.
    columns : mapping
        Our column name → the catalogue's, as used to build it.
    report : LoadReport
        What happened to the catalogue's rows.
    catalog : mapping or None
        ``path`` (absolute), ``checksum`` (``sha256:...``), ``size`` (bytes)
        and ``mtime_ns`` of the catalogue file, or None for an index built
        from an in-memory table.
    cosmology : str
        Cosmology used for redshift distances.
    completeness : mapping or None
        The catalogue's completeness model (see
        :func:`matcher.catalog.completeness.completeness_from_dict`).
    created_utc : str
    saved : bool
        Whether this index was read from (or written to) disk.
    """

    n_rows: int
    order: int = INDEX_ORDER
    columns: Mapping[str, str] = field(default_factory=dict)
    report: LoadReport | None = None
    catalog: Mapping[str, object] | None = None
    cosmology: str = "Planck18"
    completeness: Mapping[str, object] | None = None
    created_utc: str = ""
    saved: bool = False

    def to_dict(self) -> dict:
        return {
            "format": INDEX_FORMAT,
            "n_rows": self.n_rows,
            "order": self.order,
            "columns": dict(self.columns),
            "report": self.report.to_dict() if self.report else None,
            "catalog": dict(self.catalog) if self.catalog else None,
            "cosmology": self.cosmology,
            "completeness": dict(self.completeness) if self.completeness else None,
            "created_utc": self.created_utc,
        }

    @classmethod
    def from_dict(cls, d: Mapping, *, saved: bool = True) -> "IndexHeader":
        rep = d.get("report")
        return cls(
            n_rows=int(d["n_rows"]),
            order=int(d["order"]),
            columns=dict(d.get("columns") or {}),
            report=LoadReport.from_dict(rep) if rep else None,
            catalog=dict(d["catalog"]) if d.get("catalog") else None,
            cosmology=str(d.get("cosmology", "Planck18")),
            completeness=dict(d["completeness"]) if d.get("completeness") else None,
            created_utc=str(d.get("created_utc", "")),
            saved=saved,
        )


@dataclass(frozen=True, eq=False)
class GalaxyIndex:
    """A catalogue sorted by fine NESTED pixel, with range look-ups.

    Attributes
    ----------
    catalog : Catalog
        The galaxies, sorted by :attr:`pix` (arrays may be read-only memory maps).
    pix : ndarray of int64
        Sorted NESTED pixel of every galaxy at :attr:`header.order <IndexHeader.order>`.
    header : IndexHeader
    """

    catalog: Catalog
    pix: np.ndarray
    header: IndexHeader

    def __len__(self) -> int:
        return int(self.pix.shape[0])

    @property
    def order(self) -> int:
        return self.header.order

    def slice_bounds(self, start, end) -> tuple[np.ndarray, np.ndarray]:
        """Row bounds ``[lo, hi)`` of the galaxies in fine-pixel ranges ``[start, end)``."""
        return (np.searchsorted(self.pix, start, side="left"), np.searchsorted(self.pix, end, side="left"))

    def rows_in_ranges(self, start, end) -> tuple[np.ndarray, np.ndarray]:
        """Rows of the galaxies in each fine-pixel range, concatenated, and the count per range.

        Ranges must not overlap; rows come out in range order.
        """
        lo, hi = self.slice_bounds(np.asarray(start, np.int64), np.asarray(end, np.int64))
        return _concat_ranges(lo, hi), hi - lo

    def rows_in_uniq(self, uniq) -> tuple[np.ndarray, np.ndarray]:
        """Rows inside NUNIQ pixels (non-overlapping), and the count per pixel."""
        start, end = nested_ranges(np.asarray(uniq, np.int64), self.order)
        return self.rows_in_ranges(start, end)

    def rows_in_cone(self, ra_deg: float, dec_deg: float, radius_deg: float) -> np.ndarray:
        """Rows within ``radius_deg`` of a position (exact great-circle cut)."""
        radius = math.radians(float(radius_deg))
        # Query at an order whose pixels are about a quarter of the radius (at most order 20).
        size = math.sqrt(4 * math.pi / 12)  # order-0 pixel side, rad
        k = int(np.clip(math.floor(math.log2(size / max(radius / 4, 1e-12))), 0, 20))
        vec = radec_to_vec(ra_deg, dec_deg)
        pix = np.sort(hp.query_disc(1 << k, vec, min(radius, math.pi), inclusive=True, nest=True))
        shift = 2 * (self.order - k)
        rows, _ = self.rows_in_ranges(pix.astype(np.int64) << shift, (pix.astype(np.int64) + 1) << shift)
        if rows.size == 0:
            return rows
        v = radec_to_vec(np.asarray(self.catalog.ra_deg)[rows], np.asarray(self.catalog.dec_deg)[rows])
        return rows[v @ vec >= math.cos(min(radius, math.pi))]


def _concat_ranges(lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """``concatenate([arange(l, h) for l, h in zip(lo, hi)])`` without a Python loop."""
    counts = hi - lo
    total = int(counts.sum())
    if total == 0:
        return np.zeros(0, dtype=np.int64)
    offsets = np.cumsum(counts) - counts
    return np.arange(total, dtype=np.int64) - np.repeat(offsets - lo, counts)


def build_index(
    catalog: Catalog,
    *,
    report: LoadReport | None = None,
    columns: Mapping[str, str] | None = None,
    catalog_file: Mapping[str, object] | None = None,
    completeness: Mapping[str, object] | None = None,
    cosmology: str = "Planck18",
    created_utc: str = "",
) -> GalaxyIndex:
    """Sort a catalogue by its order-29 NESTED pixels (stable: ties keep catalogue order)."""
    pix = fine_pixels(catalog.ra_deg, catalog.dec_deg)
    order = np.argsort(pix, kind="stable")
    pix = pix[order]
    pix.flags.writeable = False
    header = IndexHeader(
        n_rows=len(catalog),
        columns=dict(columns or {}),
        report=report,
        catalog=dict(catalog_file) if catalog_file else None,
        cosmology=cosmology,
        completeness=dict(completeness) if completeness else None,
        created_utc=created_utc,
    )
    return GalaxyIndex(catalog.take(order), pix, header)
