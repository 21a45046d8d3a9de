"""`oddsmill bench` runs end to end on a small load: a smoke test of the benchmark, not a timed test
(its figures are ratios measured side by side; they are reported, not asserted)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path


def test_bench_measures_every_server_and_reports_ratios(tmp_path: Path) -> None:
    cmd = [sys.executable, "-m", "oddsmill.cli", "bench", "--events", "2000", "--shapes", "one,cols"]
    done = subprocess.run(
        [*cmd, "--rate", "2000", "--seconds", "0.5", "--json"],
        capture_output=True,
        text=True,
        timeout=300,
        env={**os.environ, "TMPDIR": str(tmp_path)},  # where the servers' state directories go
    )
    assert done.returncode == 0, done.stderr[-3000:]
    assert not list(tmp_path.iterdir())  # each removed when its server stopped
    result = json.loads(done.stdout)
    for shape in ("one", "cols"):
        row = result["throughput"][shape]
        for kind in ("floor", "peer", "oddsmill"):
            assert row[kind]["events_per_s"] > 0 and row[kind]["peak_memory_mib"] > 10
        assert row["oddsmill_to_floor"] == row["oddsmill"]["events_per_s"] / row["floor"]["events_per_s"]
    cols = result["throughput"]["cols"]  # the race: the median of its pairs of runs, each reported
    ratios = sorted(p["race"] / p["single"] for p in cols["race_pairs"])
    assert len(ratios) == 3 and cols["race_to_oddsmill"] == ratios[1] > 0
    assert cols["race_pairs"][0]["single"] == cols["oddsmill"]["events_per_s"]
    lat = result["latency"]
    from oddsmill.bench import LATENCY_ROUNDS

    # every score came back, in every round
    assert lat["floor"]["received"] == lat["oddsmill"]["received"] == LATENCY_ROUNDS * 1000
    assert len(lat["oddsmill"]["rounds_median_ms"]) == LATENCY_ROUNDS
    assert 0 < lat["floor"]["median_ms"] <= lat["floor"]["p99_ms"]
    # the servers' CPU over the load, from /proc (clock ticks of 10 ms: about 7 of them for the floor)
    assert lat["floor"]["cpu_us_per_message"] > 0 and lat["oddsmill"]["cpu_us_per_message"] > 0
    assert lat["cpu_ratio"] == lat["oddsmill"]["cpu_us_per_message"] / lat["floor"]["cpu_us_per_message"]
    print(json.dumps(result["throughput"], indent=1))


def test_bench_refuses_bad_arguments() -> None:
    cmd = [sys.executable, "-m", "oddsmill.cli", "bench", "--shapes", "one,rows"]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=60)
    assert done.returncode == 2 and "bad arguments" in done.stderr
