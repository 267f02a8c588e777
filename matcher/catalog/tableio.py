"""Reading catalogue files: the I/O edge of :mod:`matcher.catalog`.

Formats, chosen by extension unless given: FITS (``.fits``, ``.fit``,
``.fits.gz``), ECSV (``.ecsv``), CSV (``.csv``, ``.csv.gz``), Parquet
(``.parquet``, ``.pq``; needs the optional ``pyarrow``), VOTable (``.vot``,
``.xml``). Everything goes through ``astropy.table.Table.read``; the
validation is :func:`matcher.catalog.catalog.catalog_from_table`.
"""

from __future__ import annotations

import hashlib
import os
import warnings
from pathlib import Path

import numpy as np

from matcher.catalog.catalog import DEFAULT_PECULIAR_VELOCITY_KMS, Catalog, LoadReport, catalog_from_table
from matcher.catalog.columns import ColumnMap
from matcher.errors import CatalogError

__all__ = ["read_catalog", "read_table", "table_format", "file_checksum", "file_stamp",
           "read_completeness_table", "FORMATS"]

#: Format names accepted by ``format=`` and the astropy reader each uses.
FORMATS = {"fits": "fits", "ecsv": "ascii.ecsv", "csv": "ascii.csv", "parquet": "parquet", "votable": "votable"}
_SUFFIXES = {
    ".fits": "fits", ".fit": "fits", ".fts": "fits", ".fits.gz": "fits",
    ".ecsv": "ecsv", ".csv": "csv", ".csv.gz": "csv",
    ".parquet": "parquet", ".pq": "parquet",
    ".vot": "votable", ".xml": "votable",
}


def table_format(path, fmt: str | None = None) -> str:
    """Our format name for ``path`` (from ``fmt`` or the extension)."""
    if fmt is not None:
        if fmt not in FORMATS:
            raise CatalogError(f"{path}: unknown format {fmt!r}; choose one of {', '.join(FORMATS)}")
        return fmt
    name = str(path).lower()
    for suffix in sorted(_SUFFIXES, key=len, reverse=True):
        if name.endswith(suffix):
            return _SUFFIXES[suffix]
    raise CatalogError(
        f"{path}: cannot tell the catalogue format from the extension; use one of "
        f"{', '.join(sorted(_SUFFIXES))} or give the format ({', '.join(FORMATS)})"
    )


def read_table(path, fmt: str | None = None):
    """Read a table file with astropy, turning every failure into :class:`CatalogError`."""
    from astropy.table import Table
    from astropy.units import UnitsWarning

    path = Path(path)
    kind = table_format(path, fmt)
    if not path.exists():
        raise CatalogError(f"{path}: no such file")
    if path.is_dir():
        raise CatalogError(f"{path}: is a directory, not a catalogue file")
    if path.stat().st_size == 0:
        raise CatalogError(f"{path}: the file is empty")
    if kind == "parquet":
        try:
            import pyarrow  # noqa: F401
        except ImportError:
            raise CatalogError(f"{path}: reading Parquet needs pyarrow (pip install 'matcher[parquet]')") from None
    try:
        with warnings.catch_warnings():
            # Unit strings in catalogue headers are often not FITS-standard; we do not use them.
            warnings.simplefilter("ignore", UnitsWarning)
            table = _read_parquet(path) if kind == "parquet" else Table.read(str(path), format=FORMATS[kind])
    except CatalogError:
        raise
    except Exception as exc:  # astropy readers raise many types; all mean "unreadable"
        msg = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise CatalogError(f"{path}: not a readable {kind} table: {msg[:300]}") from None
    if isinstance(table, list):  # votable with several tables
        table = table[0]
    return table


def _read_parquet(path: Path):
    """Parquet through pyarrow directly (astropy's reader also wants pandas); nulls become masked."""
    import pyarrow.parquet as pq
    from astropy.table import MaskedColumn, Table

    pt = pq.read_table(str(path))
    cols = {}
    for name in pt.column_names:
        col = pt.column(name)
        arr = col.to_numpy(zero_copy_only=False)
        nulls = np.asarray(col.is_null().to_numpy(zero_copy_only=False), dtype=bool)
        cols[name] = MaskedColumn(arr, mask=nulls) if nulls.any() else arr
    return Table(cols)


def read_catalog(
    path,
    columns: ColumnMap | dict | None = None,
    *,
    fmt: str | None = None,
    peculiar_velocity_kms: float = DEFAULT_PECULIAR_VELOCITY_KMS,
) -> tuple[Catalog, LoadReport]:
    """Read and validate a catalogue file.

    Returns
    -------
    (Catalog, LoadReport)

    Raises
    ------
    CatalogError
        Unreadable or empty file, missing mapped column, no usable row.
    """
    table = read_table(path, fmt)
    return catalog_from_table(table, columns, source=str(path), peculiar_velocity_kms=peculiar_velocity_kms)


def file_checksum(path, *, chunk: int = 1 << 22) -> str:
    """SHA-256 of a file's bytes, as ``"sha256:<hex>"``."""
    h = hashlib.sha256()
    try:
        with open(path, "rb") as fh:
            while True:
                block = fh.read(chunk)
                if not block:
                    break
                h.update(block)
    except OSError as exc:
        raise CatalogError(f"{path}: cannot read file: {exc.strerror or exc}") from None
    return "sha256:" + h.hexdigest()


def file_stamp(path) -> dict:
    """Size and modification time of a file (the cheap part of a staleness check)."""
    st = os.stat(path)
    return {"size": int(st.st_size), "mtime_ns": int(st.st_mtime_ns)}


def read_completeness_table(path, fmt: str | None = None):
    """A user completeness table: columns ``distance_mpc`` and ``completeness``.

    Returns ``(distance_mpc, completeness)`` float arrays; the checks on their
    values are :class:`matcher.catalog.completeness.TabulatedCompleteness`'s.
    """
    table = read_table(path, fmt)
    out = []
    for name in ("distance_mpc", "completeness"):
        if name not in table.colnames:
            raise CatalogError(f"{path}: a completeness table needs columns distance_mpc and completeness "
                               f"(found: {', '.join(table.colnames)})")
        try:
            out.append(np.asarray(table[name], dtype=np.float64))
        except (TypeError, ValueError):
            raise CatalogError(f"{path}: column {name} is not numeric") from None
    return out[0], out[1]

