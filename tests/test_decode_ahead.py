"""Decoding on a child process one batch ahead (matcher.streams.decode_ahead, service.decode_process).

Our own contract: the decode process is an optimisation only. Every item must come out
exactly as ``decode_item`` in this process makes it (the same message, attribute for
attribute, or the same rejection), and a service run with it must store, score and publish
exactly what a run without it does — also when the child dies part-way, and when the run
is cut short by ``max_batches`` or a stop.
"""

from __future__ import annotations

import dataclasses
import json
import sqlite3
import warnings

import numpy as np
import pytest

import matcher.service as service_module
from matcher.config import config_from_mapping
from matcher.errors import ConfigError, MatcherWarning
from matcher.replay import default_config
from matcher.service import Service
from matcher.store import Store, Transaction
from matcher.streams.codecs import MappedCodec, NativeCodec
from matcher.coincidence.batch import REPORT_NUMBERS, ReportBatch
from matcher.lifecycle import _numbers_of
from matcher.streams.decode_ahead import NUMBERS, DecodeProcess, decode_fields, eligible, entries_of, rebuild
from matcher.streams.intake import Accepted, decode_item
from matcher.streams.raw import RawItem
from matcher.streams.sinks import JsonlSink
from matcher.streams.sources import ArchiveSource
from service_scenarios import results_by_key, small_stream, write_archive
from test_decode_fastpath import varied_lines


def _entries(items):
    return entries_of(items)


@pytest.mark.parametrize("max_bytes", [16 * 1024 * 1024, 300])
def test_rebuilt_items_equal_the_in_process_decode(tmp_path, max_bytes):
    codec = NativeCodec(max_bytes=max_bytes)
    items = [RawItem.from_bytes(line, base_dir=str(tmp_path), name=f"line {i}") for i, line in enumerate(varied_lines())]
    decoded = decode_fields(codec, _entries(items))
    fields, numbers = decoded
    assert len(fields) == len(items) and len(numbers) == len(items) * 9 * 8
    rebuilt = 0
    whole = rebuild(items, codec.name, decoded, lambda it: ("in the parent", it))
    for item, f, got in zip(items, fields, whole):
        want = decode_item(item, codec)
        if f is None:
            assert got == ("in the parent", item)  # decoded in the parent: anything but a plain accepted transient report
            assert not (isinstance(want, Accepted) and type(want.message).__name__ == "TransientReport"
                        and want.message.localization is None)
            continue
        assert got == want
        assert repr(got) == repr(want)
        assert list(vars(got.message).items()) == list(vars(want.message).items())
        assert type(got.message.extra) is type(want.message.extra)
        row, content = Transaction.transient_values(want.message, None)
        assert got.prepared[:3] == (item.dedup_key, row[-1], content)
        assert Transaction.transient_row(got.message, None, got.prepared[1]) == row
        rebuilt += 1
    assert rebuilt > 500  # the usual lines do go through the child's path
    # The numbers array, row for row, against the batch built from the reports themselves.
    kept = [g for g in whole if isinstance(g, Accepted)]
    reports = [g.message for g in kept]
    numbers = _numbers_of([g.prepared for g in kept])
    assert numbers is not None and numbers.shape == (len(reports), 9)
    assert REPORT_NUMBERS == NUMBERS
    a, b = ReportBatch.from_reports(reports), ReportBatch.from_reports(reports, numbers)
    for name in ("transient_id", "klass", *REPORT_NUMBERS):
        assert np.array_equal(getattr(a, name), getattr(b, name), equal_nan=name not in ("transient_id", "klass"))
    # A report decoded in process among them: the numbers are read from the reports instead.
    assert _numbers_of([g.prepared for g in kept] + [None]) is None


def test_large_items_stay_with_the_parent(tmp_path):
    from matcher.streams.decode_ahead import SEND_MAX_BYTES

    small = json.dumps({"schema": "matcher/1", "type": "transient", "transient_id": "S", "class": "optical",
                        "ra_deg": 1.0, "dec_deg": 2.0, "time": "2026-03-14T05:00:00Z"}).encode()
    big = small[:-1] + b', "note": "' + b"x" * SEND_MAX_BYTES + b'"}'
    items = [RawItem.from_bytes(small), RawItem.from_bytes(big)]
    entries = entries_of(items)
    assert entries[0][0] == small and entries[1][0] is None
    decoded = decode_fields(NativeCodec(), entries)
    assert decoded[0][0] is not None and decoded[0][1] is None
    assert rebuild(items, "native", decoded, lambda it: decode_item(it, NativeCodec())) == \
        [decode_item(it, NativeCodec()) for it in items]


def test_the_mapped_codec_runs_on_the_child_alike(tmp_path):
    codec = MappedCodec({"type": {"const": "transient"}, "transient_id": "cand.name", "class": {"const": "optical"}, "ra_deg": "pos.ra",
                         "dec_deg": "pos.dec", "time": "obs.utc"})
    assert eligible(codec) and eligible(NativeCodec())
    lines = [json.dumps({"cand": {"name": f"X{i}"}, "pos": {"ra": 10.0 + i, "dec": -5.0 + i / 10},
                         "obs": {"utc": "2026-03-14T05:00:00Z"}, "mag": 19.0 + i / 100}).encode() for i in range(50)]
    lines += [b'{"cand": {"name": "Y"}, "pos": {"ra": 400.0, "dec": 0}, "obs": {"utc": "2026-03-14T05:00:00Z"}}',
              b"not json", b'{"pos": {"ra": 1.0, "dec": 0}}']
    items = [RawItem.from_bytes(line) for line in lines]
    with_child = DecodeProcess(codec)
    try:
        with_child.submit(items)
        fields = with_child.result()
    finally:
        with_child.close()
    assert fields[0][-3:] == [None, None, None]
    assert rebuild(items, codec.name, fields, lambda it: decode_item(it, codec)) == \
        [decode_item(it, codec) for it in items]


def test_the_child_gives_what_decode_fields_gives_and_exits_when_closed(tmp_path):
    codec = NativeCodec()
    items = [RawItem.from_bytes(line, base_dir=str(tmp_path)) for line in varied_lines(seed=11, n_random=500)]
    proc = DecodeProcess(codec)
    try:
        for part in (items[:700], items[700:], items[:3]):
            proc.submit(part)
            assert proc.result() == decode_fields(codec, _entries(part))
        proc.submit(items[:3])
        with pytest.raises(RuntimeError, match="already in flight"):
            proc.submit(items[:3])
        proc.result()
        with pytest.raises(RuntimeError, match="no batch is in flight"):
            proc.result()
    finally:
        proc.close()
    assert proc._proc.returncode == 0


# ------------------------------------------------------------------------------ in the service
@pytest.fixture(scope="module")
def stream(tmp_path_factory):
    folder = tmp_path_factory.mktemp("ahead")
    lines = small_stream(folder)
    # the usual lines and odd ones (rejections, alerts with missing maps) mixed in
    odd = varied_lines(seed=3, n_random=150)[::5]
    mixed = []
    for line in lines:
        mixed.append(line)
        mixed += [odd.pop() for _ in range(min(2, len(odd)))]
    return write_archive(folder, mixed)


def _run(tmp_path, name, stream, *, decode_process, batch=37, on_batch=None, **run):
    cfg = default_config()
    cfg = dataclasses.replace(cfg, service=dataclasses.replace(cfg.service, batch_size=batch,
                                                               decode_process=decode_process))
    out = tmp_path / name
    out.mkdir(exist_ok=True)
    used = []

    def spy(svc, stats):
        used.append(svc._decoder is not None)
        if on_batch is not None:
            on_batch(svc, stats)

    with Service(cfg, sources=[ArchiveSource("replay", stream)], sinks=[],
                 extra_sinks=[JsonlSink("out", out / "m.jsonl")], store_path=out / "s.sqlite", on_batch=spy) as svc:
        svc.run(until_finished=True, **run)
        stats = svc.stats
    with Store(out / "s.sqlite") as st:
        outbox = [(r.seq, r.kind, r.key, r.payload) for r in st.outbox_after(0, 10**9)]
        quarantine = st.counts()["quarantine"]
        got = (results_by_key(st), outbox, st.positions("replay"), quarantine, (out / "m.jsonl").read_bytes())
    db = sqlite3.connect(out / "s.sqlite")  # the stored rows themselves, dedup keys and contents included
    try:
        rows = [db.execute(f"SELECT {cols} FROM {table} ORDER BY {order}").fetchall() for table, cols, order in (
            ("messages", "id, dedup, origin_seq, origin, codec, kind, message_key, raw", "id"),
            ("transients", "transient_id, message_id, class, ra_deg, dec_deg, time, extra, content, reports",
             "transient_id"),
            ("quarantine", "dedup, origin, codec, field, reason, raw", "id"))]
    finally:
        db.close()
    return (*got, rows), stats, used


@pytest.fixture
def small_batches_use_the_child(monkeypatch):
    monkeypatch.setattr(service_module, "DECODE_PROCESS_MIN_ITEMS", 10)


def test_a_run_with_the_decode_process_equals_one_without(stream, tmp_path, small_batches_use_the_child):
    without, s0, used0 = _run(tmp_path, "without", stream, decode_process=False)
    with_child, s1, used1 = _run(tmp_path, "with", stream, decode_process=True)
    assert not any(used0) and all(used1[1:])  # the child started with the first batch, and was used
    assert without[0] and without[3] > 50  # results, and rejections among the input
    assert with_child == without  # results, outbox row for row, positions, quarantine, sink bytes
    assert s1.batches == s0.batches
    assert dataclasses.asdict(s1.totals) == dataclasses.asdict(s0.totals)


@pytest.mark.parametrize("when", ["between batches", "with a batch in flight"])
def test_a_killed_decode_process_loses_nothing(stream, tmp_path, small_batches_use_the_child, monkeypatch, when):
    reference, _, _ = _run(tmp_path, "ref", stream, decode_process=False)

    def kill(proc):
        proc._proc.kill()
        proc._proc.wait()

    def kill_between(svc, stats):
        if when == "between batches" and svc._decoder is not None and svc.stats.batches == 2:
            kill(svc._decoder)

    if when == "with a batch in flight":
        submit, calls = DecodeProcess.submit, []

        def submit_then_die(self, items):
            submit(self, items)
            calls.append(len(items))
            if len(calls) == 3:
                kill(self)

        monkeypatch.setattr(DecodeProcess, "submit", submit_then_die)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        got, _, used = _run(tmp_path, "killed", stream, decode_process=True, on_batch=kill_between)
    assert got == reference
    assert any(used) and not used[-1]  # it ran, and after its death the loop decoded in process
    said = [str(w.message) for w in caught if issubclass(w.category, MatcherWarning)]
    assert any("decode process ended (exit code -9)" in s and "decoding in this process" in s for s in said), said


def test_max_batches_and_a_stop_store_every_batch_read_with_the_decode_process(stream, tmp_path,
                                                                                small_batches_use_the_child):
    whole, _, _ = _run(tmp_path, "whole", stream, decode_process=False)
    got, stats, _ = _run(tmp_path, "parts", stream, decode_process=True, max_batches=3)
    assert stats.batches == 3 and stats.totals.messages == 3 * 37

    def stop_soon(svc, stats):
        if stats.messages:
            svc.request_stop()

    _, stats, _ = _run(tmp_path, "parts", stream, decode_process=True, on_batch=stop_soon)
    assert stats.batches == 2  # the stop came after the first batch; the one polled ahead was stored too
    got, _, _ = _run(tmp_path, "parts", stream, decode_process=True)
    assert got[0] == whole[0] and got[3] == whole[3]
    lines = got[4].splitlines()
    assert len(lines) == len(set(lines))  # nothing published twice
    assert {json.loads(x)["key"] for x in lines} == {json.loads(x)["key"] for x in whole[4].splitlines()}


def test_the_decode_process_setting_is_read_and_checked():
    assert default_config().service.decode_process is True
    off = config_from_mapping({"service": {"decode_process": False}})
    assert off.service.decode_process is False
    with pytest.raises(ConfigError, match=r"service\.decode_process.*must be true or false"):
        config_from_mapping({"service": {"decode_process": "sometimes"}})


def test_the_child_outlives_no_parent_and_ignores_the_terminals_signals(tmp_path):
    # A parent killed with SIGKILL closes its pipe ends, and the child must end on that; SIGINT and
    # SIGTERM sent to the whole process group must leave the stop to the parent.
    import os
    import signal
    import subprocess
    import sys
    import time

    script = tmp_path / "parent.py"
    script.write_text(
        "import os, signal, sys\n"
        "from matcher.streams.codecs import NativeCodec\n"
        "from matcher.streams.decode_ahead import DecodeProcess\n"
        "from matcher.streams.raw import RawItem\n"
        "p = DecodeProcess(NativeCodec())\n"
        "p.submit([RawItem.from_bytes(b'{}')])\n"
        "assert p.result()[0] == [None]\n"  # serving (its handlers are in place)
        "p._proc.send_signal(signal.SIGINT)\n"
        "p._proc.send_signal(signal.SIGTERM)\n"
        "p.submit([RawItem.from_bytes(b'{}')])\n"
        "assert p.result()[0] == [None]\n"  # still serving after both signals
        "print(p._proc.pid, flush=True)\n"
        "os.kill(os.getpid(), signal.SIGKILL)\n")
    run = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, timeout=60)
    assert run.returncode == -signal.SIGKILL, run.stderr
    child = int(run.stdout.strip())
    deadline = time.monotonic() + 20
    while time.monotonic() < deadline:
        try:
            os.kill(child, 0)
        except ProcessLookupError:
            break
        with open(f"/proc/{child}/stat") as fh:  # gone but not yet reaped by init: a zombie counts as ended
            if fh.read().split(")")[-1].split()[0] == "Z":
                break
        time.sleep(0.05)
    else:
        pytest.fail(f"decode process {child} still runs 20 s after its parent was killed")
