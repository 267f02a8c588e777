"""Decoding the next batch on a child process while the loop stores this one.

The service loop runs on one core; decoding a report (parse, field checks, the message
object) is a fifth of its time. :class:`DecodeProcess` runs a codec's ``decode`` on a
child process for the common case — a transient report without a localization — and
hands back each such message's fields, with what the loop would compute of it next (the
dedup key, the transients row, the numbers the scoring reads); the loop rebuilds the same
objects from them (:func:`rebuild`), which costs a quarter of decoding. Everything else (alerts,
localizations, anything the codec refuses or fails on) comes back as ``None`` and is
decoded in this process by :func:`~matcher.streams.intake.decode_item`, as before, so
rejections and their reasons are exactly those of the in-process path.

The child holds no state beyond the codec: if it dies, the batch it had is decoded here
and the loop goes on without it (:class:`DecodeProcessGone`). It ignores SIGINT and
SIGTERM (a terminal's Ctrl-C and a service manager's stop reach the whole process group;
the parent decides when to stop) and exits when its pipe closes, so a parent killed with
SIGKILL leaves nothing behind.
"""

from __future__ import annotations

import dataclasses
import os
import pickle
import signal
import struct
import subprocess
import sys
from array import array
from operator import attrgetter
from pathlib import Path
from typing import Any, Sequence

from matcher.frozen import build_frozen
from matcher.streams.codecs.base import Codec
from matcher.streams.messages import TransientReport
from matcher.streams.raw import Origin, RawItem, dedup_key

__all__ = ["DecodeProcess", "DecodeProcessGone", "NUMBERS", "SEND_MAX_BYTES", "decode_fields", "eligible",
           "entries_of", "rebuild"]


class DecodeProcessGone(RuntimeError):
    """The child process ended or its pipe broke; the caller decodes in process from now on."""


def eligible(codec: Codec) -> bool:
    """Whether ``codec`` may run on the child: it says so (``decode_ahead``) and pickles."""
    if not getattr(codec, "decode_ahead", False):
        return False
    try:
        pickle.dumps(codec)
    except Exception:  # a codec holding something unpicklable stays in this process
        return False
    return True


#: Items larger than this are not sent to the child (the parent decodes them): a batch on the pipe
#: stays a few tens of MB however large the messages a source allows.
SEND_MAX_BYTES = 64 * 1024


def entries_of(items: Sequence[RawItem]) -> list[tuple]:
    """What the child is sent of each item: its bytes (``None`` above :data:`SEND_MAX_BYTES`),
    size, folder and origin (as a tuple)."""
    return [(it.data if it.size <= SEND_MAX_BYTES else None, it.truncated, it.size, it.base_dir, it.origin.kind,
             it.origin.where, it.origin.part, it.origin.offset) for it in items]


#: A report's numbers in the order of ``matcher.coincidence.batch.REPORT_NUMBERS`` (a test holds
#: them equal; not imported, so that the child loads no scoring code).
NUMBERS = ("ra_deg", "dec_deg", "time", "pos_err_deg", "last_nondetection", "redshift", "redshift_err",
           "distance_mpc", "distance_err_mpc")
_NAN = float("nan")
_numbers_of = attrgetter(*NUMBERS)
_FIELDS = tuple(f.name for f in dataclasses.fields(TransientReport))  # sent as a tuple: a third of a dict's cost
_fields_of = attrgetter(*_FIELDS)


def decode_fields(codec: Codec, entries: Sequence[tuple]) -> tuple[list[tuple | None], bytes]:
    """What the child computes, per entry (:func:`entries_of`): for a transient report without a
    localization ``(attributes, key, extra_text, content)`` — the report's attributes in field
    order, the item's dedup key (:func:`~matcher.streams.raw.dedup_key`), and of its transients
    row (:meth:`~matcher.store.Transaction.transient_values`) the last value and the text — or
    ``None`` for anything else; and the reports' :data:`NUMBERS` as float64 bytes, a row per
    entry (NaN for None and other rows)."""
    from matcher.store import Transaction

    values = Transaction.transient_values
    out: list[tuple | None] = []
    numbers = array("d")
    blank = [_NAN] * len(NUMBERS)
    for data, truncated, size, base_dir, kind, where, part, offset in entries:
        if data is None:  # not sent: decoded in the parent
            out.append(None)
            numbers.extend(blank)
            continue
        origin = Origin._of("", kind, where, part, offset)  # the source's name is not part of the key
        item = RawItem._read(data, origin, None, 0.0, base_dir, truncated, size)
        try:
            m = codec.decode(item)
        except Exception:  # refused or failed: decoded again in the parent, which names the reason
            out.append(None)
            numbers.extend(blank)
            continue
        if type(m) is TransientReport and m.localization is None:
            row, content = values(m, None)
            out.append((_fields_of(m), dedup_key(data, origin), row[-1], content))
            numbers.extend([_NAN if v is None else v for v in _numbers_of(m)])
        else:
            out.append(None)
            numbers.extend(blank)
    return out, numbers.tobytes()


def rebuild(items: Sequence[RawItem], codec_name: str, decoded: tuple[list, bytes], fallback) -> list:
    """Per item, ``decode_item(item, codec)``: rebuilt from what :func:`decode_fields` gave for it
    (the same :class:`~matcher.streams.intake.Accepted`, with ``prepared`` = (dedup key,
    extra_text, content, the batch's numbers array, the item's row in it)), else ``fallback(item)``."""
    import numpy as np

    from matcher.streams.intake import Accepted  # here: the child never loads the sky-map code intake needs

    results, raw_numbers = decoded
    numbers = np.frombuffer(raw_numbers, dtype=np.float64).reshape(-1, len(NUMBERS))
    out = []
    for row, (item, got) in enumerate(zip(items, results)):
        if got is None:
            out.append(fallback(item))
        else:
            out.append(build_frozen(Accepted, {"item": item, "codec": codec_name,
                                               "message": build_frozen(TransientReport, dict(zip(_FIELDS, got[0]))),
                                               "localization": None, "reason": None,
                                               "prepared": (got[1], got[2], got[3], numbers, row)}))
    return out


_HEADER = struct.Struct("<Q")  # each frame on the pipes: its length, then a pickle


def _write_frame(fh, payload: bytes) -> None:
    fh.write(_HEADER.pack(len(payload)))
    fh.write(payload)
    fh.flush()


def _read_frame(fh) -> bytes:
    head = fh.read(_HEADER.size)
    if len(head) < _HEADER.size:
        raise EOFError("the pipe closed")
    (n,) = _HEADER.unpack(head)
    payload = fh.read(n)
    if len(payload) < n:
        raise EOFError("the pipe closed inside a frame")
    return payload


def _serve(inp, out) -> None:
    """The child's loop: the codec's pickle first, then ``(seq, entries)`` requests until the pipe closes."""
    # A terminal's Ctrl-C, or a service manager's SIGTERM, reaches the whole process group: the
    # parent decides when to stop, and the child ends when the parent closes the pipe.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    try:
        codec = pickle.loads(_read_frame(inp))
        while True:
            seq, entries = pickle.loads(_read_frame(inp))
            _write_frame(out, pickle.dumps((seq, decode_fields(codec, entries)), protocol=pickle.HIGHEST_PROTOCOL))
    except (EOFError, BrokenPipeError):  # the parent closed the pipe: it stopped, or gave up on us
        return


class DecodeProcess:
    """One child process decoding with ``codec``; one batch in flight at a time.

    The child is ``python -m matcher.streams.decode_ahead`` with pipes for stdin and stdout, in
    a process group of its own (a plain subprocess: nothing of the parent's main module is
    imported again, and a terminal's Ctrl-C reaches only the parent).
    :meth:`submit` sends a batch's bytes; :meth:`result` waits for its fields (a list as
    :func:`decode_fields` gives). Both raise :class:`DecodeProcessGone` when the child is
    gone; :meth:`close` ends it.
    """

    def __init__(self, codec: Codec):
        here = str(Path(__file__).resolve().parents[2])  # the folder holding the matcher package
        env = dict(os.environ)
        env["PYTHONPATH"] = os.pathsep.join([here, *filter(None, [env.get("PYTHONPATH")])])
        self._proc = subprocess.Popen([sys.executable, "-m", "matcher.streams.decode_ahead"],
                                      stdin=subprocess.PIPE, stdout=subprocess.PIPE, env=env, close_fds=True,
                                      process_group=0)  # a terminal's Ctrl-C goes to the parent's group only
        self._seq = 0
        self._waiting: int | None = None
        self._send(pickle.dumps(codec, protocol=pickle.HIGHEST_PROTOCOL))

    def _send(self, payload: bytes) -> None:
        try:
            _write_frame(self._proc.stdin, payload)
        except (OSError, ValueError) as exc:
            raise DecodeProcessGone(f"decode process ended (exit code {self._proc.poll()}): {exc}") from None

    def submit(self, items: Sequence[RawItem]) -> None:
        if self._waiting is not None:
            raise RuntimeError("a batch is already in flight on the decode process")
        self._seq += 1
        self._send(pickle.dumps((self._seq, entries_of(items)), protocol=pickle.HIGHEST_PROTOCOL))
        self._waiting = self._seq

    def result(self) -> list[Any]:
        if self._waiting is None:
            raise RuntimeError("no batch is in flight on the decode process")
        want, self._waiting = self._waiting, None
        try:
            seq, fields = pickle.loads(_read_frame(self._proc.stdout))
        except (EOFError, OSError, ValueError, pickle.UnpicklingError) as exc:
            raise DecodeProcessGone(f"decode process ended (exit code {self._proc.poll()}): {exc}") from None
        if seq != want:  # cannot happen with one batch in flight; never use another batch's fields
            raise DecodeProcessGone(f"decode process answered batch {seq}, expected {want}")
        return fields

    def close(self, timeout_s: float = 5.0) -> None:
        """Close its pipes (it exits on that) and wait for it; killed if it does not end in time."""
        for fh in (self._proc.stdin, self._proc.stdout):
            try:
                fh.close()
            except OSError:
                pass
        try:
            self._proc.wait(timeout_s)
        except subprocess.TimeoutExpired:
            self._proc.kill()
            self._proc.wait(timeout_s)


if __name__ == "__main__":
    # Frames go to the pipe that was stdout; anything printed meanwhile goes to stderr instead.
    _frames = os.fdopen(os.dup(1), "wb")
    os.dup2(2, 1)
    sys.stdout = sys.stderr
    _serve(sys.stdin.buffer, _frames)
