"""A JSON Lines sink: one output record per line, appended, fsync'ed at every flush.

Each line is the record's JSON object with ``"seq"`` (its outbox sequence number,
increasing) first. On open the sink reads the file's last line: a partial line (a
crash mid-write) is cut off, and its ``seq`` is the high-water mark the publisher
resumes after, so the file never holds a row twice, across any number of crashes
and restarts. Removing the file makes the sink write it again from the outbox.
A record that changes (a result superseded or withdrawn) is a new line with a
higher ``seq``: the last line of a key is its current state.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping, Sequence

from matcher.keycheck import ParseContext, check_keys, get_bool, get_path
from matcher.store import OutboxRow
from matcher.streams.sinks.base import SinkError, SinkKind, parse_kinds, register_sink_kind
from matcher.streams.fsutil import fsync_dir

__all__ = ["JsonlSink", "JsonlOptions", "last_seq_in_file"]

_TAIL = 1 << 16


@dataclass(frozen=True)
class JsonlOptions:
    """``sinks.NAME`` with ``kind: jsonl``: ``path``, ``kinds`` (default ``[match]``), ``fsync`` (default true)."""

    path: Path
    kinds: tuple[str, ...] | None = ("match",)
    fsync: bool = True


def last_seq_in_file(fh, name: str) -> tuple[int, int]:
    """``(seq of the last complete line, byte length up to its end)`` of an open binary file.

    Raises
    ------
    SinkError
        The last complete line is not one of ours (not JSON, or no integer ``seq``).
    """
    size = fh.seek(0, os.SEEK_END)
    end = size
    buf = b""
    pos = size
    # Find the end of the last complete line (the last b"\n").
    while pos > 0:
        step = min(_TAIL, pos)
        pos -= step
        fh.seek(pos)
        buf = fh.read(step) + buf
        nl = buf.rfind(b"\n")
        if nl >= 0:
            end = pos + nl + 1
            break
    else:
        return 0, 0  # no complete line at all
    # Find the start of that line.
    start_search = buf[: end - pos - 1]
    while True:
        nl = start_search.rfind(b"\n")
        if nl >= 0 or pos == 0:
            break
        step = min(_TAIL, pos)
        pos -= step
        fh.seek(pos)
        start_search = fh.read(step) + start_search
    line = start_search[nl + 1:]
    try:
        seq = json.loads(line)["seq"]
        if isinstance(seq, bool) or not isinstance(seq, int):
            raise TypeError
    except (ValueError, KeyError, TypeError):
        raise SinkError(f"sink file {name}: its last line is not a record with an integer seq "
                        "(not written by this sink; move it away)") from None
    return seq, end


class JsonlSink:
    """Append outbox rows to a JSON Lines file (see the module docstring)."""

    kind = "jsonl"

    def __init__(self, name: str, path, *, kinds: tuple[str, ...] | None = ("match",), fsync: bool = True):
        self.name = name
        self.path = Path(path).resolve()
        self.kinds = None if kinds is None else tuple(kinds)
        self.fsync = bool(fsync)
        self._fh = None
        self._hwm = 0

    def open(self, sent_seq: int) -> int:
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            created = not self.path.exists()
            self._fh = open(self.path, "a+b")
            if created:
                fsync_dir(self.path.parent)
            self._hwm, end = last_seq_in_file(self._fh, str(self.path))
            size = self._fh.seek(0, os.SEEK_END)
            if end < size:  # a partial last line, from a crash mid-write: never flushed, never counted
                self._fh.truncate(end)
                os.fsync(self._fh.fileno())
        except OSError as exc:
            self.close()
            raise SinkError(f"sink {self.name}: cannot open {self.path}: {exc.strerror or exc}") from None
        except SinkError:
            self.close()
            raise
        return self._hwm

    def write(self, rows: Sequence[OutboxRow]) -> None:
        parts = []
        for r in rows:
            if r.seq <= self._hwm:
                continue
            body = r.payload[1:] if r.payload.startswith("{") else None
            if body is None:
                raise SinkError(f"sink {self.name}: outbox row {r.seq} is not a JSON object")
            parts.append(f'{{"seq":{r.seq}{"," if body != "}" else ""}{body}\n')
            self._hwm = r.seq
        if parts:
            self._fh.write("".join(parts).encode("utf-8"))

    def flush(self) -> None:
        self._fh.flush()
        if self.fsync:
            os.fsync(self._fh.fileno())

    def close(self) -> None:
        if self._fh is not None:
            self._fh.flush()
            self._fh.close()
            self._fh = None


def _parse(raw: Mapping[str, Any], keypath: str, ctx: ParseContext) -> JsonlOptions:
    check_keys(raw, ("path", "kinds", "fsync"), keypath, required=("path",))
    return JsonlOptions(get_path(raw, "path", keypath, ctx.base_dir), parse_kinds(raw, keypath),
                        get_bool(raw, "fsync", keypath, True))


def _build(name: str, options: JsonlOptions) -> JsonlSink:
    return JsonlSink(name, options.path, kinds=options.kinds, fsync=options.fsync)


register_sink_kind(SinkKind("jsonl", _parse, _build))
