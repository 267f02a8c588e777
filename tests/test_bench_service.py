"""``matcher bench service``, small: it runs end to end, its own checks hold, and the decode
process does the decoding of the batches after the first (its CPU time is counted)."""

from __future__ import annotations

import re
import subprocess
import sys


def test_bench_service_runs_small_with_the_decode_process(tmp_path):
    run = subprocess.run([sys.executable, "-m", "matcher", "bench", "service", "--reports", "6000", "--events", "2",
                          "--batch", "2000", "--workdir", str(tmp_path)], capture_output=True, text=True, timeout=600)
    assert run.returncode == 0, run.stdout + run.stderr
    out = run.stdout
    assert re.search(r"stored messages / results / quarantined\s+6,002 / [\d,]+ / 0", out), out
    m = re.search(r"CPU: loop thread / this process / decode process\s+([\d.]+) s / ([\d.]+) s / ([\d.]+) s", out)
    assert m, out
    loop, whole, child = map(float, m.groups())
    assert 0 < loop <= whole + 0.05
    assert child > 0.0  # batches 2 and 3 were decoded on the child
