"""Scale-out: 100,000 transient reports over 6 partitions, three service instances in one group.

Each instance is its own process (``matcher listen --until-done`` on its own
configuration and store), in one consumer group for the reports; every instance reads
the GW alerts in full. Mid-stream one instance is killed with SIGKILL and another
process is started on its configuration and store (a crashed instance restarted on its
own disk). The reference is the single-instance run: an archive replay of the same
messages in one process.

What must hold (the method of Kafka's own system tests, KAFKA.md: input set = output
set, zero duplicates after de-duplication by key):

* every instance's store holds every GW alert (all revisions);
* every report is stored by at least one instance (nothing lost);
* the union of the instances' results has exactly the reference's keys, and each
  result's per-candidate fields (odds, FAP, terms, status...) equal the reference's;
* the results topic, de-duplicated by key, holds exactly the reference's keys with
  those same fields;
* ``p_assoc`` is a property of all candidates of an event together, so an instance
  publishes it over its own share only; recomputed from the union's published odds
  with the service's exact sum, it equals the reference's published ``p_assoc``;
* the group's lag is zero at the end.

The input is invented (matcher.bench.kafka.scenario): compact maps and point-like
optical reports, the cheapest scoring, so that 100,000 reports fit the test budget.
The reports are produced with kcat (fast; a client we did not write), the alerts with
kafka-python.
"""

from __future__ import annotations

import base64
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from collections import defaultdict

import pytest
import yaml

from kafka_broker import unique_topic
from kafka_helpers import produce, read_topic
from matcher.bench.kafka import compact_map_fits, kafka_config, scenario
from matcher.config import config_from_mapping, load_config
from matcher.lifecycle import association_from_sum, exact_odds_sum
from matcher.replay import replay_archive
from matcher.store import Store
from matcher.streams.sources.kafka import external_lag

pytestmark = [pytest.mark.kafka, pytest.mark.slow]

N_REPORTS = 100_000
PARTITIONS = 6
PER_CANDIDATE_ONLY = ("p_assoc", "rank")  # depend on every candidate of the event, not on the one


def static(record: dict) -> dict:
    return {k: v for k, v in record.items() if k not in PER_CANDIDATE_ONLY}


def alerts_with_a_revision(sc):
    """The scenario's alerts plus a second revision of the first event (a moved, narrower map)."""
    first = json.loads(sc.alerts[0])
    ra, dec = sc.centres[0]
    rev2 = dict(first, revision=2, state="revised",
                localization={"fits_base64": base64.b64encode(compact_map_fits(ra, dec, 4.0)).decode()})
    return sc.alerts + [json.dumps(rev2, separators=(",", ":")).encode()]


def kcat_produce(kcat, bootstrap, topic, values, folder):
    """Produce ``values`` round-robin over the topic's partitions, one kcat per partition."""
    for p in range(PARTITIONS):
        path = folder / f"part-{p}.jsonl"
        path.write_bytes(b"".join(v + b"\n" for v in values[p::PARTITIONS]))
        done = subprocess.run([kcat, "-b", bootstrap, "-t", topic, "-P", "-p", str(p), "-l", str(path)],
                              capture_output=True, text=True, timeout=300)
        assert done.returncode == 0, done.stderr


def transient_ids(store) -> set:
    return {t.report.transient_id for t in store.transients_between(-1e12, 1e12)}


def start(cfg_path, log_path):
    env = dict(os.environ, MATCHER_PROGRESS="off")
    log = open(log_path, "ab")
    proc = subprocess.Popen([sys.executable, "-m", "matcher", "listen", "-c", str(cfg_path), "--until-done",
                             "--log-level", "info"],
                            stdout=log, stderr=subprocess.STDOUT, env=env)
    log.close()
    return proc


def test_three_instances_one_killed_equal_the_single_instance_run(kafka_broker, tmp_path):
    kcat = shutil.which("kcat")
    if kcat is None:
        pytest.fail("kcat is not installed (Debian package kcat): run `bash tests/kafka/install_kcat.sh` as root")
    timings = {}
    t0 = time.monotonic()
    bs = kafka_broker.bootstrap
    sc = scenario(N_REPORTS, n_events=3, seed=7)
    alert_lines = alerts_with_a_revision(sc)
    alerts, reports, results = unique_topic("scale-alerts"), unique_topic("scale-reports"), unique_topic("scale-res")
    group = unique_topic("scale-group")
    kafka_broker.create_topics({alerts: 2}, configs={"max.message.bytes": str(4 * 1024 * 1024)})
    kafka_broker.create_topics({reports: PARTITIONS, results: PARTITIONS})
    produce(bs, alerts, alert_lines, partition=lambda i: i % 2, max_request_size=4 * 1024 * 1024)
    kcat_produce(kcat, bs, reports, sc.reports, tmp_path)
    timings["invent and produce"] = time.monotonic() - t0

    # The reference: one instance, an archive replay of the same messages.
    t = time.monotonic()
    archive = tmp_path / "all.jsonl"
    archive.write_bytes(b"".join(v + b"\n" for v in alert_lines + sc.reports))
    ref_cfg = config_from_mapping({"state_dir": str(tmp_path / "ref"), "service": {"batch_size": 2000}},
                                  base_dir=tmp_path)
    ref = replay_archive(archive, out_dir=tmp_path / "ref-out", config=ref_cfg, progress_mode="off")
    with Store(ref.store_path) as st:
        golden = {r.key: r.record for r in st.results()}
    timings["reference replay"] = time.monotonic() - t
    assert ref.counts["transients"] == N_REPORTS and len(golden) > 1000  # enough candidates to mean something

    # Three instances, each with its own configuration, client id and store.
    paths = {}
    for name in "abc":
        cfg = kafka_config(bootstrap=bs, alerts=alerts, reports=reports, results=results, group=group,
                           state_dir=tmp_path / f"state-{name}", client_id=f"matcher-{name}",
                           extra_source={"max_poll_interval_ms": 60000})
        paths[name] = tmp_path / f"{name}.yaml"
        paths[name].write_text(yaml.safe_dump(cfg))
    t = time.monotonic()
    procs = {name: start(paths[name], tmp_path / f"{name}.log") for name in "abc"}
    options = load_config(paths["a"]).sources["kafka"].options
    try:
        # Kill b once the group has committed about a third of the reports.
        deadline = time.monotonic() + 240
        while time.monotonic() < deadline:
            done = sum(p["done"] or 0 for p in external_lag("kafka", options, {}) if p["role"] == "reports")
            if done >= N_REPORTS // 3:
                break
            assert all(p.poll() is None for p in procs.values()), "an instance exited early"
            time.sleep(0.3)
        else:
            raise AssertionError("the group did not commit a third of the reports within 240 s")
        procs["b"].send_signal(signal.SIGKILL)
        assert procs["b"].wait(30) == -signal.SIGKILL
        timings["killed b after"] = time.monotonic() - t
        procs["b2"] = start(paths["b"], tmp_path / "b.log")  # restarted on b's configuration and store
        for name, proc in procs.items():
            if name != "b":
                assert proc.wait(300) == 0, (tmp_path / f"{name[0]}.log").read_text()[-3000:]
    finally:
        for proc in procs.values():
            if proc.poll() is None:
                proc.kill()
                proc.wait(30)
    timings["three instances, one killed and restarted"] = time.monotonic() - t
    # Each instance's log (--log-level info) says which report partitions it was given.
    for name in "ac":
        assert "INFO matcher.kafka: kafka source kafka: partitions assigned:" in (tmp_path / f"{name}.log").read_text()
    print("timings (s):", {k: round(v, 1) for k, v in timings.items()})

    stores = {name: Store(tmp_path / f"state-{name}" / "matcher.sqlite") for name in "abc"}
    try:
        # Every instance saw every GW alert, revisions included.
        ref_revisions = {(e, r) for e in ("EV-KBENCH-00", "EV-KBENCH-01", "EV-KBENCH-02") for r in
                         [x.alert.revision for x in Store(ref.store_path).revisions(e)]}
        for name, st in stores.items():
            got = {(x.alert.event_id, x.alert.revision) for e in ("EV-KBENCH-00", "EV-KBENCH-01", "EV-KBENCH-02")
                   for x in st.revisions(e)}
            assert got == ref_revisions == {("EV-KBENCH-00", 1), ("EV-KBENCH-00", 2), ("EV-KBENCH-01", 1),
                                            ("EV-KBENCH-02", 1)}, name
        # Every report was stored, by at least one instance; the group really shared the work.
        ids = {name: transient_ids(st) for name, st in stores.items()}
        assert set().union(*ids.values()) == {f"KT{j:07d}" for j in range(N_REPORTS)}
        # The group shared the work: every member (b counting its restart) held partitions for a
        # fair part of the run. With the range assignor each of the three holds 2 of the 6 partitions
        # most of the time, so each stores about a third; a tenth is far below that, and far above
        # what a member stranded without partitions stores (one batch, or nothing). Such a member was
        # seen before the source fetched metadata after subscribing (see DEVELOPERS.md).
        shares = {k: len(v) for k, v in ids.items()}
        assert all(n > N_REPORTS // 10 for n in shares.values()), shares
        # The union of the results: the reference's keys, and per key the same per-candidate fields.
        union = defaultdict(list)
        for st in stores.values():
            for r in st.results():
                union[r.key].append(r.record)
        assert set(union) == set(golden)
        for key, recs in union.items():
            for rec in recs:
                assert static(rec) == static(golden[key]), key
        # p_assoc recomputed over the union (the service's exact sum of the published odds) is the
        # reference's published value.
        groups = defaultdict(dict)
        for key, recs in union.items():
            rec = recs[0]
            if rec["status"] == "current":
                groups[(rec["event_id"], rec["revision"], rec["class"])][key] = rec["odds"]
        for odds in groups.values():
            qsum = exact_odds_sum(list(odds.values()))
            for key, o in odds.items():
                assert round(association_from_sum(o, qsum), 3) == golden[key]["p_assoc"], key
    finally:
        for st in stores.values():
            st.close()

    # The results topic, de-duplicated by key, is the reference (per-candidate fields).
    records = read_topic(bs, results, len(golden))
    last = {}
    for r in sorted(records, key=lambda r: (r.partition, r.offset)):
        last[r.key.decode()] = json.loads(r.value)
    assert set(last) == set(golden)
    assert all(static(last[k]) == static(golden[k]) for k in golden)
    print(f"results topic: {len(records):,} records, {len(last):,} keys, "
          f"{len(records) - len(last):,} republished or re-sent")
    # Lag back to zero for every partition.
    assert all(p["lag"] == 0 for p in external_lag("kafka", options, {}) if p["role"] == "reports")
