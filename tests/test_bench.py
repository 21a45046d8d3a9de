"""`oddsmill bench` runs end to end on a small load: a smoke test of the benchmark, not a timed test
(its figures are ratios measured side by side; they are reported, not asserted)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
from oddsmill.bench import LATENCY_ROUNDS, ROUNDS


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
    sent = {"one": 2000, "cols": 2000 * 50 // 500}  # messages: --events 2000; columnar runs take 50x, 500 rows each
    for shape in ("one", "cols"):
        row = result["throughput"][shape]
        for kind in ("floor", "journaled_floor", "peer", "oddsmill"):
            assert row[kind]["events_per_s"] > 0 and row[kind]["peak_memory_mib"] > 10
        # the ratios to the floor and the peer: the median of the rounds' own, the first round's runs
        # reported in full
        rounds = row["rounds"]
        assert len(rounds) == ROUNDS and all(rounds[0][k] == row[k]["events_per_s"] for k in rounds[0])
        for top, bottom in (("oddsmill", "floor"), ("oddsmill", "peer")):
            ratios = sorted(r[top] / r[bottom] for r in rounds)
            assert row[f"{top}_to_{bottom}"] == ratios[1] > 0
        assert row["oddsmill_to_journaled_floor"] == (
            row["oddsmill"]["events_per_s"] / row["journaled_floor"]["events_per_s"]
        )
        # the journaled floor wrote every message it answered: a record of 18 bytes around each body
        # (a one-event body is over 200 bytes, a columnar one over 80,000), and the bench's probes
        body = 200 if shape == "one" else 80_000
        assert row["journaled_floor"]["journal_bytes"] >= sent[shape] * (18 + body)
    cols = result["throughput"]["cols"]  # the race: the median of its ratio to the single learner, round by round
    ratios = sorted(r["race"] / r["oddsmill"] for r in cols["rounds"])
    assert cols["race_to_oddsmill"] == ratios[1] > 0 and cols["rounds"][0]["race"] == cols["race"]["events_per_s"]
    lat = result["latency"]

    # every score came back, in every round
    assert lat["floor"]["received"] == lat["journaled_floor"]["received"] == LATENCY_ROUNDS * 1000
    assert lat["oddsmill"]["received"] == LATENCY_ROUNDS * 1000
    assert len(lat["oddsmill"]["rounds_median_ms"]) == LATENCY_ROUNDS
    assert lat["median_ratio_rounds"] == [
        o / f for o, f in zip(lat["oddsmill"]["rounds_median_ms"], lat["floor"]["rounds_median_ms"], strict=True)
    ]
    assert 0 < lat["floor"]["median_ms"] <= lat["floor"]["p99_ms"]
    # the servers' CPU over the load, from /proc (clock ticks of 10 ms: about 7 of them for the floor)
    assert lat["floor"]["cpu_us_per_message"] > 0 and lat["oddsmill"]["cpu_us_per_message"] > 0
    assert lat["cpu_ratio"] == lat["oddsmill"]["cpu_us_per_message"] / lat["floor"]["cpu_us_per_message"]
    print(json.dumps(result["throughput"], indent=1))


@pytest.mark.parametrize(
    ("args", "says"),
    [
        (["--shapes", "one,rows"], "--shapes takes one, batch and cols, comma-separated; got 'one,rows'"),
        (["--shapes", ","], "--shapes takes one, batch and cols, comma-separated; got ','"),
        (["--events", "-5"], "--events must be at least 1000, got -5"),
        (["--rate", "0"], "--rate must be > 0, got 0.0"),
        (["--seconds", "nan"], "--seconds must be > 0, got nan"),
    ],
)
def test_bench_refuses_bad_arguments(args: list[str], says: str) -> None:
    cmd = [sys.executable, "-m", "oddsmill.cli", "bench", *args]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=60)
    assert done.returncode == 2 and done.stderr.strip() == f"oddsmill bench: {says}"


def test_a_failed_run_leaves_no_process_or_directory_behind(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A server that stops answering mid-run (here the journaled floor, asleep after 100 messages):
    the run fails with what happened, and its server, its producer and the server's state directory
    are gone. (A failed run once left its servers running, journaling, after the bench had exited.)"""
    import subprocess as sp
    import tempfile

    from oddsmill import bench

    asleep = bench.JOURNALED_FLOOR.replace(
        "    topic, raw = sub.recv_multipart()\n",
        "    topic, raw = sub.recv_multipart()\n    answered = globals().get('answered', 0) + 1\n"
        "    if answered > 100:\n        time.sleep(3600)\n",
    )
    assert asleep != bench.JOURNALED_FLOOR
    monkeypatch.setitem(bench.SCRIPTS, "journaled_floor", asleep)
    monkeypatch.setattr(bench, "SILENCE_MS", 2000)
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    started: list[sp.Popen[str]] = []
    real = sp.Popen

    class Recorded(real):  # type: ignore[misc, valid-type]
        def __init__(self, *args: Any, **kwargs: Any) -> None:
            super().__init__(*args, **kwargs)
            started.append(self)

    monkeypatch.setattr(sp, "Popen", Recorded)
    with pytest.raises(RuntimeError, match="journaled_floor, one: [0-9]{2,3} of 2000 answers, then silence"):
        bench.throughput("journaled_floor", "one", 2000)
    assert len(started) == 2  # the server and the producer
    assert all(p.poll() is not None for p in started)
    assert not list(tmp_path.iterdir())
