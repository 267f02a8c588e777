"""Saving and loading galaxy indexes: the I/O edge of :mod:`matcher.catalog`.

An index is a directory::

    galaxies.fits.index/
        index.json          header: format, n_rows, order, column map, load report,
                            catalogue path + SHA-256 + size + mtime, cosmology,
                            completeness model, creation time, array dtypes
        pix.npy             int64 order-29 NESTED pixel, sorted
        ra_deg.npy ...      one array per catalogue column, in the same order

Arrays are opened with ``np.load(mmap_mode="r")``: loading is instant and
only the pages a query touches are read. An index is written into a
temporary sibling directory and renamed into place, so a reader never sees a
half-written one.

Staleness: the header records the catalogue's size, modification time and
SHA-256. :func:`load_index` compares size and mtime first (cheap); if either
changed it recomputes the checksum, and a different checksum raises
:class:`StaleIndexError` (rebuild with ``matcher catalog index``).
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import shutil
import tempfile
import warnings
from pathlib import Path
from typing import Mapping

import numpy as np

from matcher.catalog.catalog import DEFAULT_PECULIAR_VELOCITY_KMS, Catalog
from matcher.catalog.columns import ColumnMap
from matcher.catalog.index import INDEX_FORMAT, INDEX_ORDER, GalaxyIndex, IndexHeader, build_index
from matcher.catalog.tableio import file_checksum, file_stamp, read_catalog
from matcher.errors import CatalogError, MatcherWarning

__all__ = [
    "StaleIndexError",
    "HEADER_NAME",
    "default_index_path",
    "is_index",
    "index_catalog_file",
    "write_index",
    "load_index",
    "open_galaxy_index",
]

HEADER_NAME = "index.json"
_PIX = "pix"


class StaleIndexError(CatalogError):
    """The catalogue changed after its index was built."""


def default_index_path(catalog_path) -> Path:
    """Where the index of a catalogue lives by default: ``<catalogue>.index`` beside it."""
    p = Path(catalog_path)
    return p.with_name(p.name + ".index")


def is_index(path) -> bool:
    """Whether ``path`` is an index directory (holds an ``index.json``)."""
    return Path(path, HEADER_NAME).is_file()


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat().replace("+00:00", "Z")


def index_catalog_file(
    catalog_path,
    *,
    columns: ColumnMap | Mapping[str, str] | None = None,
    fmt: str | None = None,
    completeness: Mapping[str, object] | None = None,
    peculiar_velocity_kms: float = DEFAULT_PECULIAR_VELOCITY_KMS,
) -> GalaxyIndex:
    """Read, validate and index a catalogue file (in memory; :func:`write_index` saves it).

    The checksum is taken before reading, and the file's size and mtime are
    compared after: a catalogue that changes while being indexed is an error.
    """
    colmap = columns if isinstance(columns, ColumnMap) else ColumnMap.from_mapping(columns)
    path = Path(catalog_path)
    if not path.is_file():
        raise CatalogError(f"{path}: no such catalogue file")
    stamp = file_stamp(path)
    checksum = file_checksum(path)
    catalog, report = read_catalog(path, colmap, fmt=fmt, peculiar_velocity_kms=peculiar_velocity_kms)
    if file_stamp(path) != stamp:
        raise CatalogError(f"{path}: the file changed while it was being indexed; try again")
    info = {"path": str(path.resolve()), "checksum": checksum, **stamp}
    return build_index(catalog, report=report, columns=colmap.to_dict(), catalog_file=info,
                       completeness=completeness, created_utc=_now())


def write_index(index: GalaxyIndex, directory) -> Path:
    """Write an index directory atomically; replaces an existing *index* there, nothing else.

    Returns the directory path.
    """
    out = Path(directory)
    if out.exists() and not is_index(out):
        if out.is_dir() and not any(out.iterdir()):
            out.rmdir()
        else:
            raise CatalogError(f"{out}: exists and is not a galaxy index; choose another -o path")
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=out.name + ".tmp-", dir=out.parent))
    try:
        arrays = {_PIX: index.pix, **index.catalog.arrays()}
        described = {}
        for name, arr in arrays.items():
            arr = np.asarray(arr)
            np.save(tmp / f"{name}.npy", arr, allow_pickle=False)
            described[name] = {"dtype": arr.dtype.str, "shape": list(arr.shape)}
        header = index.header.to_dict()
        header["arrays"] = described
        (tmp / HEADER_NAME).write_text(json.dumps(header, indent=2) + "\n")
        if out.exists():
            old = out.with_name(out.name + ".old-" + os.urandom(4).hex())
            out.rename(old)
            tmp.rename(out)
            shutil.rmtree(old, ignore_errors=True)
        else:
            tmp.rename(out)
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        raise CatalogError(f"{out}: cannot write the index: {exc.strerror or exc}") from None
    return out


def _check_fresh(header: IndexHeader, catalog_path: Path | None, check: str, where: Path) -> None:
    info = header.catalog
    if check == "none" or info is None:
        return
    path = Path(catalog_path) if catalog_path is not None else Path(str(info["path"]))
    if not path.is_file():
        warnings.warn(f"{where}: its catalogue {path} is not there; the index cannot be checked for staleness",
                      MatcherWarning, stacklevel=3)
        return
    if check == "auto" and file_stamp(path) == {"size": info.get("size"), "mtime_ns": info.get("mtime_ns")}:
        return
    if file_checksum(path) != info.get("checksum"):
        raise StaleIndexError(
            f"{where}: stale index: {path} has changed since the index was built "
            f"(checksum differs); rebuild it with `matcher catalog index {path} -o {where}`"
        )


def load_index(directory, *, catalog_path=None, check: str = "auto", mmap: bool = True) -> GalaxyIndex:
    """Open an index directory (memory-mapped).

    Parameters
    ----------
    directory : path
    catalog_path : path, optional
        The catalogue to check against (defaults to the one the header names).
    check : {"auto", "checksum", "none"}
        ``auto`` recomputes the catalogue checksum only when its size or mtime
        changed; ``checksum`` always does; ``none`` skips the check.
    mmap : bool
        Memory-map the arrays (default) or read them into memory.

    Raises
    ------
    CatalogError
        Not an index, an unknown format, missing or inconsistent arrays.
    StaleIndexError
        The catalogue's checksum no longer matches.
    """
    if check not in ("auto", "checksum", "none"):
        raise CatalogError(f"check={check!r}: expected auto, checksum or none")
    where = Path(directory)
    head_path = where / HEADER_NAME
    if not head_path.is_file():
        raise CatalogError(f"{where}: not a galaxy index (no {HEADER_NAME}); build one with `matcher catalog index`")
    try:
        raw = json.loads(head_path.read_text())
    except (OSError, ValueError) as exc:
        raise CatalogError(f"{head_path}: unreadable index header: {exc}") from None
    if not isinstance(raw, dict) or raw.get("format") != INDEX_FORMAT:
        got = raw.get("format") if isinstance(raw, dict) else type(raw).__name__
        raise CatalogError(f"{head_path}: format {got!r} is not {INDEX_FORMAT!r}; rebuild the index")
    try:
        header = IndexHeader.from_dict(raw)
    except (KeyError, TypeError, ValueError) as exc:
        raise CatalogError(f"{head_path}: malformed index header ({exc})") from None
    if header.order != INDEX_ORDER:
        raise CatalogError(f"{head_path}: order {header.order} is not {INDEX_ORDER}; rebuild the index")
    _check_fresh(header, catalog_path, check, where)
    described = raw.get("arrays") or {}
    arrays = {}
    for name in (_PIX, *Catalog.ARRAYS):
        if name not in described:
            if name in ("mag", "radius_arcsec"):
                continue
            raise CatalogError(f"{where}: the header lists no {name} array; rebuild the index")
        try:
            arr = np.load(where / f"{name}.npy", mmap_mode="r" if mmap else None, allow_pickle=False)
        except (OSError, ValueError) as exc:
            raise CatalogError(f"{where}: cannot read {name}.npy: {exc}") from None
        if arr.shape != (header.n_rows,) or arr.dtype.str != described[name]["dtype"]:
            raise CatalogError(
                f"{where}: {name}.npy has shape {arr.shape} and dtype {arr.dtype.str}; the header says "
                f"({header.n_rows},) and {described[name]['dtype']}; rebuild the index"
            )
        arrays[name] = arr
    pix = arrays.pop(_PIX)
    return GalaxyIndex(Catalog(**arrays), pix, header)


def open_galaxy_index(
    path,
    *,
    columns: ColumnMap | Mapping[str, str] | None = None,
    fmt: str | None = None,
    check: str = "auto",
    completeness: Mapping[str, object] | None = None,
) -> GalaxyIndex:
    """An index for ``path``: an index directory, or a catalogue file.

    For a catalogue file, its default index (``<catalogue>.index``) is used
    when it exists (and must be fresh); otherwise the catalogue is indexed in
    memory (``header.saved`` is False; save it with :func:`write_index` to
    skip this next time).

    Raises
    ------
    StaleIndexError
        The saved index no longer matches the catalogue.
    CatalogError
        The index was built with a different column map than ``columns``.
    """
    p = Path(path)
    colmap = None if columns is None else (columns if isinstance(columns, ColumnMap) else ColumnMap.from_mapping(columns))
    if p.is_dir():
        index = load_index(p, check=check)
    else:
        saved = default_index_path(p)
        if is_index(saved):
            index = load_index(saved, catalog_path=p, check=check)
        else:
            return index_catalog_file(p, columns=colmap, fmt=fmt, completeness=completeness)
    if colmap is not None and colmap.to_dict() != dict(index.header.columns):
        raise CatalogError(
            f"{path}: the index was built with columns {dict(index.header.columns)}, not the ones given; "
            f"rebuild it with the new mapping"
        )
    return index
