"""What a source hands to the service: raw bytes, where they came from, and a position.

A :class:`RawItem` is the unit that crosses the edge of the service. Its bytes
are kept exactly as read (they are stored, or quarantined, byte-identical); its
:class:`Origin` says where they came from (a file, a line of an archive, later a
Kafka topic, partition and offset); its ``position`` is the token the source
needs to resume after it (stored in the same transaction as the results, then
committed back to the source).
"""

from __future__ import annotations

import hashlib
import time
from dataclasses import dataclass

from matcher.frozen import build_frozen

__all__ = ["Origin", "RawItem", "dedup_key", "positions_of"]


@dataclass(frozen=True)
class Origin:
    """Where a raw item came from.

    Attributes
    ----------
    source : str
        The configured source name (``sources.NAME`` in the config).
    kind : str
        The source kind: ``inbox``, ``archive``, ``bytes`` (handed in directly), later ``kafka``.
    where : str
        The file (absolute path) or the topic.
    part : int or None
        The Kafka partition; ``None`` for files.
    offset : int or None
        The line number (1-based) in an archive, or the Kafka offset; ``None`` for a whole file.
    """

    source: str
    kind: str
    where: str
    part: int | None = None
    offset: int | None = None

    @classmethod
    def _of(cls, source: str, kind: str, where: str, part: int | None, offset: int | None) -> Origin:
        """``Origin(source, kind, where, part, offset)`` for a source that makes one per item.

        The same object (type, fields, equality, hash, repr), built without the generated
        ``__init__`` of a frozen dataclass, which pays an ``object.__setattr__`` call per
        field; the instance keeps its fields in a ``__dict__`` of its own.
        """
        return build_frozen(cls, {"source": source, "kind": kind, "where": where, "part": part, "offset": offset})

    def __str__(self) -> str:
        if self.kind == "archive" and self.offset is not None:
            return f"{self.where} line {self.offset}"
        if self.part is not None:
            return f"{self.where}[{self.part}]@{self.offset}"
        if self.offset is not None:
            return f"{self.where}@{self.offset}"
        return self.where

    def identity(self) -> bytes:
        """A stable byte string naming this origin exactly (part of the dedup key)."""
        return f"{self.kind}\x1f{self.where}\x1f{self.part}\x1f{self.offset}".encode("utf-8", "surrogatepass")


@dataclass(frozen=True)
class RawItem:
    """One raw message as read by a source.

    Attributes
    ----------
    data : bytes
        Exactly the bytes read (for an archive: the line without its line terminator).
    origin : Origin
    position : tuple of (str, str) or None
        ``(stream, token)`` for the source to resume after this item (an archive's byte
        offset, a Kafka partition's next offset); ``None`` when the source keeps no position
        (an inbox moves its files instead).
    received_at : float, Unix s
        When the item was received (an archive's ``received_at``, else the time it was read).
    base_dir : str or None
        Folder that relative localization paths in the message resolve against.
    truncated : bool
        True when the source kept only the first bytes of an oversized item (its codec
        rejects it; the reason says how long it was).
    size : int
        The full size in bytes (equal to ``len(data)`` unless truncated).
    """

    data: bytes
    origin: Origin
    position: tuple[str, str] | None = None
    received_at: float = 0.0
    base_dir: str | None = None
    truncated: bool = False
    size: int = -1

    def __post_init__(self):
        if not isinstance(self.data, bytes):
            object.__setattr__(self, "data", bytes(self.data))
        if self.size < 0:
            object.__setattr__(self, "size", len(self.data))

    @classmethod
    def _read(cls, data: bytes, origin: Origin, position: tuple[str, str] | None, received_at: float,
              base_dir: str | None, truncated: bool, size: int) -> RawItem:
        """``RawItem(...)`` for a source that has ``data`` as bytes and its ``size`` already.

        The same object, built as :meth:`Origin._of` builds its own (``__post_init__``
        would change nothing here).
        """
        return build_frozen(cls, {"data": data, "origin": origin, "position": position, "received_at": received_at,
                                  "base_dir": base_dir, "truncated": truncated, "size": size})

    @classmethod
    def from_bytes(cls, data: bytes, *, base_dir: str | None = None, name: str = "<bytes>",
                   source: str = "direct", received_at: float | None = None) -> RawItem:
        """An item handed in directly (tests, the command line), with no position."""
        return cls(bytes(data), Origin(source, "bytes", name), None,
                   time.time() if received_at is None else float(received_at), base_dir)

    @property
    def dedup_key(self) -> bytes:
        """SHA-256 of the origin and the raw bytes: the same bytes from the same place are stored once."""
        return dedup_key(self.data, self.origin)


def dedup_key(data: bytes, origin: Origin) -> bytes:
    """SHA-256 digest (32 bytes) of ``origin.identity()``, a separator, and ``data``."""
    h = hashlib.sha256(origin.identity())
    h.update(b"\x00")
    h.update(data)
    return h.digest()


def positions_of(items) -> dict[str, str]:
    """The last position per stream among ``items`` (in order): what to store for a batch."""
    out: dict[str, str] = {}
    for item in items:
        if item.position is not None:
            stream, token = item.position
            out[stream] = token
    return out
