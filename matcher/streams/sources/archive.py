"""An archive: a JSON Lines file, one message per line in arrival order, replayed.

Each line is one message (native JSON unless the source's codec says otherwise),
optionally with a top-level ``received_at`` (ISO-8601 UTC). Relative localization
paths resolve against the archive's folder. Blank lines are skipped (but counted,
so line numbers match an editor's). A line's raw bytes are the line without its
terminator (``\\n`` or ``\\r\\n``).

Replay runs as fast as it can by default; with ``speed=N`` it is paced at N times
real time from ``received_at`` (the first timed line of a run sets the clock;
lines without ``received_at``, or timed earlier than the line before, go at once).

The position after every line is ``{"offset": BYTES, "line": N, "head": SHA256}``:
the byte offset to seek to, the line number, and the SHA-256 of the file's first
bytes (up to 4096), so a replaced file is noticed instead of being read from the
middle. The service stores it with each batch; a killed replay resumes there.
"""

from __future__ import annotations

import hashlib
import json
import os
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping, Sequence

from matcher.errors import InputError
from matcher.keycheck import ParseContext, check_keys, get_number, get_path
from matcher.streams.raw import Origin, RawItem
from matcher.streams.sources.base import Settled, SourceKind, register_source_kind
from matcher.timeconv import gps_to_unix, iso_to_gps

__all__ = ["ArchiveSource", "ArchiveOptions", "HEAD_BYTES"]

#: How many leading bytes identify an archive file in its position token.
HEAD_BYTES = 4096
_MARKER = b'"received_at"'
_BLANK = b" \t\n\r\x0b\x0c"  # what bytes.strip() removes


@dataclass(frozen=True)
class ArchiveOptions:
    """Options of an archive source (``sources.NAME`` with ``kind: archive``).

    Attributes
    ----------
    path : Path
        The JSON Lines file.
    speed : float or None
        ``None``: as fast as possible; ``N``: N times real time from ``received_at``.
    """

    path: Path
    speed: float | None = None


def _received_at(line: bytes) -> float | None:
    """Unix seconds from a line's top-level ``received_at``, or None (absent or unreadable).

    An unreadable ``received_at`` is not an error here: the codec rejects the line for it.
    """
    if _MARKER not in line:
        return None
    try:
        obj = json.loads(line)
        value = obj.get("received_at") if isinstance(obj, dict) else None
        return gps_to_unix(iso_to_gps(value)) if isinstance(value, str) else None
    except (ValueError, RecursionError):
        return None


class ArchiveSource:
    """Replay a JSON Lines archive (see the module docstring).

    Parameters
    ----------
    name : str
    path : str or Path
    speed : float or None
        Pacing factor (see :class:`ArchiveOptions`).
    max_bytes : int, bytes
        A longer line is kept only up to this size plus one byte, marked truncated, and
        rejected by the codec (the reason gives its length).
    clock, sleep : callables
        ``time.monotonic`` and ``time.sleep`` by default (replaceable for tests of pacing).

    Raises
    ------
    InputError
        The archive cannot be opened.
    """

    poll_ahead = True  # its position lives in the store: the next batch may be read before this one is committed

    kind = "archive"

    def __init__(self, name: str, path, *, speed: float | None = None, max_bytes: int = 16 * 1024 * 1024,
                 clock=time.monotonic, sleep=time.sleep, wall_clock=time.time):
        self.name = name
        self.path = os.path.realpath(os.fspath(path))
        if speed is not None and not speed > 0:
            raise ValueError(f"archive {self.name}: speed must be > 0, got {speed!r}")
        self.speed = speed
        self.max_bytes = int(max_bytes)
        self._clock, self._sleep, self._wall = clock, sleep, wall_clock
        self.base_dir = os.path.dirname(self.path)
        self.stream = f"archive:{self.path}"
        try:
            self._fh = open(self.path, "rb")
        except OSError as exc:
            raise InputError(f"archive {self.path}: cannot open: {exc.strerror or exc}") from None
        self._head = os.pread(self._fh.fileno(), HEAD_BYTES, 0)
        self._head_hex: dict[int, str] = {}
        self._head_len = len(self._head)
        self._head_full = self._head_digest(self._head_len)  # the head of every position past it
        self._offset = 0
        self._line = 0
        self._eof = False
        self._pending: tuple[RawItem, float | None] | None = None
        self._t0: tuple[float, float] | None = None  # (received_at, clock) of the first timed line

    def _head_digest(self, offset: int) -> str:
        n = min(offset, len(self._head))
        digest = self._head_hex.get(n)
        if digest is None:
            digest = self._head_hex[n] = hashlib.sha256(self._head[:n]).hexdigest()
        return digest

    @property
    def position(self) -> dict[str, Any]:
        """The current position (what the next poll continues after)."""
        return {"offset": self._offset, "line": self._line, "head": self._head_digest(self._offset)}

    @property
    def finished(self) -> bool:
        return self._eof and self._pending is None

    def resume(self, positions: Mapping[str, str]) -> None:
        """Seek to the stored position of this archive (if any).

        Raises
        ------
        InputError
            The stored position does not fit this file (shorter, or different first bytes).
        """
        token = positions.get(self.stream)
        if token is None:
            return
        try:
            pos = json.loads(token)
            offset, line, head = int(pos["offset"]), int(pos["line"]), str(pos["head"])
        except (ValueError, KeyError, TypeError):
            raise InputError(f"archive {self.path}: stored position {token[:80]!r} is not readable") from None
        size = os.fstat(self._fh.fileno()).st_size
        if offset > size:
            raise InputError(f"archive {self.path}: the store's position is byte {offset} but the file has "
                             f"{size} bytes; it was replaced or truncated (replay it into a fresh store)")
        if self._head_digest(offset) != head:
            raise InputError(f"archive {self.path}: its first bytes differ from when the store's position was "
                             "saved; it was replaced (replay it into a fresh store)")
        self._fh.seek(offset)
        self._offset, self._line, self._eof, self._pending = offset, line, False, None

    def _read_line(self) -> tuple[RawItem, float | None] | None:
        """The next non-blank line as an item with its ``received_at``, or None at the end of the file."""
        while True:
            raw = self._fh.readline(self.max_bytes + 3)
            if not raw:
                self._eof = True
                return None
            got = self._item(raw)
            if got is not None:
                return got

    def _item(self, raw: bytes) -> tuple[RawItem, float | None] | None:
        """The item of a line just read (``raw``, with its terminator) and its ``received_at``; None if blank."""
        consumed = len(raw)
        size = None
        if raw[-1] == 10:  # b"\n": a whole line (readline returns at most one)
            data = raw[:-1]
        else:
            data = raw
            if consumed >= self.max_bytes + 3:
                # Overlong line: keep its head, skip the rest, remember its true length.
                size = consumed
                while True:
                    more = self._fh.readline(1 << 20)
                    consumed += len(more)
                    if not more or more.endswith(b"\n"):
                        size += len(more.rstrip(b"\r\n"))
                        break
                    size += len(more)
        self._offset += consumed
        self._line += 1
        if data[-1:] == b"\r":
            data = data[:-1]
        if size is None and not data.strip():
            return None
        truncated = size is not None or len(data) > self.max_bytes
        if truncated:
            size = size if size is not None else len(data)
            data = data[: self.max_bytes + 1]
        t_recv = None if truncated else _received_at(data)
        offset, line = self._offset, self._line
        head = self._head_full if offset >= self._head_len else self._head_digest(offset)
        item = RawItem._read(data, Origin._of(self.name, "archive", self.path, None, line),
                             (self.stream, f'{{"offset":{offset},"line":{line},"head":"{head}"}}'),
                             t_recv if t_recv is not None else self._wall(), self.base_dir,
                             truncated, len(data) if size is None else size)
        return item, t_recv

    def _read_unpaced(self, items: list[RawItem], max_items: int) -> None:
        """Append the next lines' items to ``items``, up to ``max_items`` (what :meth:`_read_line` gives).

        The usual line (ends in ``\\n`` and no ``\\r``, starts with no blank, within the size
        limit, no ``received_at``) is made into its item here; any other goes to :meth:`_item`.
        """
        readline, limit, usual_max = self._fh.readline, self.max_bytes + 3, self.max_bytes + 1
        name, path, stream, base_dir, wall = self.name, self.path, self.stream, self.base_dir, self._wall
        head_len, head_full = self._head_len, self._head_full
        while len(items) < max_items:
            raw = readline(limit)
            if not raw:
                self._eof = True
                return
            n = len(raw)
            if raw[-1] == 10 and raw[0] not in _BLANK and raw[-2] != 13 and n <= usual_max and _MARKER not in raw:
                offset = self._offset = self._offset + n
                line = self._line = self._line + 1
                head = head_full if offset >= head_len else self._head_digest(offset)
                items.append(RawItem._read(raw[:-1], Origin._of(name, "archive", path, None, line),
                                           (stream, f'{{"offset":{offset},"line":{line},"head":"{head}"}}'),
                                           wall(), base_dir, False, n - 1))
            else:
                got = self._item(raw)
                if got is not None:
                    items.append(got[0])

    def _due(self, t_recv: float | None) -> float:
        """Clock time at which a line received at ``t_recv`` is released (paced mode)."""
        if self.speed is None or t_recv is None:
            return float("-inf")
        if self._t0 is None:
            self._t0 = (t_recv, self._clock())
        return self._t0[1] + (t_recv - self._t0[0]) / self.speed

    def poll(self, max_items: int = 500, timeout_s: float = 0.0) -> list[RawItem]:
        """The next lines: up to ``max_items`` at once when fast; when paced, those that are due.

        When paced, waits up to ``timeout_s`` for the next line to fall due.
        """
        items: list[RawItem] = []
        if self.speed is None:  # as fast as possible: every line is due at once, none is ever pending
            if not self._eof:
                self._read_unpaced(items, max_items)
            return items
        deadline = self._clock() + max(0.0, timeout_s)
        while len(items) < max_items:
            if self._pending is None:
                if self._eof:
                    break
                got = self._read_line()
                if got is None:
                    break
                self._pending = (got[0], self._due(got[1]))
            item, due = self._pending
            now = self._clock()
            if due > now:
                if items or now >= deadline:
                    break
                self._sleep(min(due, deadline) - now)
                continue
            items.append(item)
            self._pending = None
        return items

    def commit(self, settled: Sequence[Settled]) -> None:
        """Nothing to do at the file: an archive's position lives in the store."""

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        self._fh.close()


def _parse(raw: Mapping[str, Any], keypath: str, ctx: ParseContext) -> ArchiveOptions:
    check_keys(raw, ("path", "speed"), keypath, required=("path",))
    return ArchiveOptions(path=get_path(raw, "path", keypath, ctx.base_dir),
                          speed=get_number(raw, "speed", keypath, None, lo=0.0, lo_open=True))


def _build(name: str, options: ArchiveOptions, *, max_bytes: int) -> ArchiveSource:
    return ArchiveSource(name, options.path, speed=options.speed, max_bytes=max_bytes)


register_source_kind(SourceKind("archive", _parse, _build))
