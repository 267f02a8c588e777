"""An inbox directory: each new file is one message, taken in name order.

Writers should create a file under another name (``.name.json`` or ``name.json.tmp``;
names starting with a dot never match) and rename it into place, so a half-written
file is never read; ``settle_s`` also waits until a file has not changed for that long.

A file stays where it is until the store has committed the batch it was in;
:meth:`InboxSource.commit` then moves an accepted (or already stored) file to
``done/`` and a rejected one to ``rejected/`` beside a ``NAME.reason`` file that
says why. A crash before that move leaves the file in the inbox: it is read again,
the store recognises it (same bytes, same origin), and it is moved then. An
existing name in ``done/`` or ``rejected/`` is never overwritten (``name.1.json``...).
"""

from __future__ import annotations

import fnmatch
import os
import time
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping, Sequence

from matcher.errors import MatcherWarning
from matcher.keycheck import ParseContext, check_keys, get_number, get_path, get_str
from matcher.streams.fsutil import fsync_dir, write_durably
from matcher.streams.raw import Origin, RawItem
from matcher.streams.sources.base import Settled, SourceKind, register_source_kind

__all__ = ["InboxSource", "InboxOptions"]


@dataclass(frozen=True)
class InboxOptions:
    """Options of an inbox source (``sources.NAME`` with ``kind: inbox``).

    Attributes
    ----------
    path : Path
        The folder watched.
    pattern : str
        Shell pattern of message files (default ``*.json``; ``*.xml`` for VOEvents).
    done_dir, rejected_dir : Path
        Default ``PATH/done`` and ``PATH/rejected``.
    settle_s : float, s
        Take a file only once its modification time is at least this old.
    """

    path: Path
    pattern: str = "*.json"
    done_dir: Path | None = None
    rejected_dir: Path | None = None
    settle_s: float = 0.0


def _free_name(folder: Path, name: str) -> Path:
    target = folder / name
    if not target.exists():
        return target
    stem, dot, suffix = name.partition(".")
    n = 1
    while True:
        target = folder / f"{stem}.{n}{dot}{suffix}"
        if not target.exists():
            return target
        n += 1


class InboxSource:
    """Watch a folder for message files (see the module docstring).

    Parameters
    ----------
    name : str
        The configured source name.
    path : str or Path
    pattern, done_dir, rejected_dir, settle_s
        See :class:`InboxOptions`.
    max_bytes : int, bytes
        Larger files are read only up to this size plus one byte and rejected by the codec.
    """

    poll_ahead = True  # files in flight stay out of later polls until commit() moves them

    kind = "inbox"

    def __init__(self, name: str, path, *, pattern: str = "*.json", done_dir=None, rejected_dir=None,
                 settle_s: float = 0.0, max_bytes: int = 16 * 1024 * 1024, clock=time.time, sleep=time.sleep):
        self.name = name
        self.path = Path(path).resolve()
        self.pattern = pattern
        self.done_dir = Path(done_dir).resolve() if done_dir else self.path / "done"
        self.rejected_dir = Path(rejected_dir).resolve() if rejected_dir else self.path / "rejected"
        self.settle_s = float(settle_s)
        self.max_bytes = int(max_bytes)
        self._clock = clock
        self._sleep = sleep
        self._inflight: set[str] = set()
        self._unreadable: set[str] = set()
        for d in (self.path, self.done_dir, self.rejected_dir):
            d.mkdir(parents=True, exist_ok=True)

    @property
    def finished(self) -> bool:
        return False  # an inbox can always receive another file

    def resume(self, positions: Mapping[str, str]) -> None:
        """An inbox keeps no positions: the files still in the folder are its position."""

    def _candidates(self) -> list[str]:
        now = self._clock()
        names = []
        with os.scandir(self.path) as it:
            for entry in it:
                n = entry.name
                if n.startswith(".") or n in self._inflight or n in self._unreadable:
                    continue
                if not fnmatch.fnmatchcase(n, self.pattern):
                    continue
                try:
                    if not entry.is_file(follow_symlinks=False):
                        continue
                    if self.settle_s > 0 and now - entry.stat().st_mtime < self.settle_s:
                        continue
                except OSError:
                    continue
                names.append(n)
        names.sort()
        return names

    def _read(self, fname: str) -> RawItem | None:
        full = self.path / fname
        try:
            with open(full, "rb") as fh:
                data = fh.read(self.max_bytes + 1)
                size = len(data)
                if size > self.max_bytes:
                    size = os.fstat(fh.fileno()).st_size
        except FileNotFoundError:
            return None  # taken away between listing and reading: it was never ours
        except OSError as exc:
            self._unreadable.add(fname)
            warnings.warn(f"inbox {self.name}: cannot read {full}: {exc.strerror or exc}; "
                          "left in place and skipped until restart", MatcherWarning, stacklevel=3)
            return None
        return RawItem(data, Origin(self.name, "inbox", str(full)), None, self._clock(), str(self.path),
                       truncated=size > self.max_bytes, size=size)

    def poll(self, max_items: int = 500, timeout_s: float = 0.0) -> list[RawItem]:
        deadline = time.monotonic() + max(0.0, timeout_s)
        while True:
            items = []
            for fname in self._candidates()[:max_items]:
                item = self._read(fname)
                if item is not None:
                    self._inflight.add(fname)
                    items.append(item)
            left = deadline - time.monotonic()
            if items or left <= 0:
                return items
            self._sleep(min(0.2, left))

    def commit(self, settled: Sequence[Settled]) -> None:
        """Move each settled file to ``done/`` or ``rejected/`` (with its ``.reason``), durably."""
        touched = False
        for s in settled:
            src = Path(s.item.origin.where)
            if src.parent != self.path:
                raise ValueError(f"inbox {self.name}: item from {src} is not from this inbox")
            self._inflight.discard(src.name)
            if not src.exists():
                continue  # moved already (a second commit of the same item); the store has it
            if s.reason is None:
                target = _free_name(self.done_dir, src.name)
            else:
                target = _free_name(self.rejected_dir, src.name)
                write_durably(target.with_name(target.name + ".reason"), s.reason.rstrip("\n") + "\n")
            os.replace(src, target)
            touched = True
        if touched:
            for d in (self.path, self.done_dir, self.rejected_dir):
                fsync_dir(d)

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        self._inflight.clear()


def _parse(raw: Mapping[str, Any], keypath: str, ctx: ParseContext) -> InboxOptions:
    check_keys(raw, ("path", "pattern", "done_dir", "rejected_dir", "settle_s"), keypath, required=("path",))
    return InboxOptions(
        path=get_path(raw, "path", keypath, ctx.base_dir),
        pattern=get_str(raw, "pattern", keypath, "*.json"),
        done_dir=get_path(raw, "done_dir", keypath, ctx.base_dir),
        rejected_dir=get_path(raw, "rejected_dir", keypath, ctx.base_dir),
        settle_s=get_number(raw, "settle_s", keypath, 0.0, lo=0.0),
    )


def _build(name: str, options: InboxOptions, *, max_bytes: int) -> InboxSource:
    return InboxSource(name, options.path, pattern=options.pattern, done_dir=options.done_dir,
                       rejected_dir=options.rejected_dir, settle_s=options.settle_s, max_bytes=max_bytes)


register_source_kind(SourceKind("inbox", _parse, _build))
