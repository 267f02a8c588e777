"""``matcher bench kafka`` against the session broker, small: it runs end to end and its own checks hold.

The benchmark exits 0 only when the Kafka run stored every report and alert, its results
equal the archive replay's in number, every outbox row was published, and the results
topic holds exactly the acknowledged records; and when the group of processes stored
every report. No speed is asserted here (speed targets live in the benchmark).
"""

from __future__ import annotations

import re

import pytest

from matcher.cli import main

pytestmark = pytest.mark.kafka


def test_bench_kafka_runs_small_and_its_checks_hold(kafka_broker, capsys):
    code = main(["bench", "kafka", "--bootstrap", kafka_broker.bootstrap, "--reports", "2000", "--instances", "1",
                 "--batch", "200"])
    out = capsys.readouterr().out
    assert code == 0, out
    for label in ("baseline: bare kafka-python consumer", "Kafka source alone", "service, 1 instance",
                  "Kafka source: consume (kafka-python poll), items, commit", "Kafka sink alone",
                  "service, 1 process in one group", "baseline again, at the end", "target: service"):
        assert label in out, label
    # The Kafka run stored all 2,000 reports and 3 alerts; every acknowledged result is on the topic.
    assert re.search(r"stored messages / transients / events / results / bad\s+2,003 / 2,000 / 3 / [\d,]+ / 0", out)
    acked, on_topic = re.search(r"results acknowledged / records on the results topic\s+([\d,]+) / ([\d,]+)",
                                out).groups()
    assert acked == on_topic and int(acked.replace(",", "")) > 0
