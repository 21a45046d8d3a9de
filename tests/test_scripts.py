"""The measuring scripts (scripts/) run to the end at small sizes and print what they promise.

Their figures need their full sizes and are not checked here: this is a guard against a script
that no longer runs. `bench_kernel.py` failed on its defaults for a session (a `max` over one
number) and nothing noticed. fuzz_decoder.py needs atheris, which CI does not install; its
property is tests/test_protocol.py's."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def script(*args: str, timeout: float = 120) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), str(ROOT / "daemon"), str(ROOT / "clients")])}
    return subprocess.run(
        [sys.executable, str(ROOT / "scripts" / args[0]), *args[1:]],
        capture_output=True,
        text=True,
        timeout=timeout,
        env=env,
        cwd=ROOT,
    )


def test_bench_kernel_runs_a_short_sweep() -> None:
    done = script("bench_kernel.py", "--events", "2000", "--largest", "10000", "--json")
    assert done.returncode == 0, done.stderr
    result = json.loads(done.stdout)
    for key in ("kernel_over_river", "defaults_over_river", "varied_names_defaults_over_river"):
        assert result[key] > 0, key
    assert sorted(result["ns_per_event_by_vocabulary"]) == ["1000", "10000"]
    for kind in ("", "no_centring_", "one_hot_"):
        assert result[f"flatness_{kind}1e4_over_1e3"] > 0


def test_bench_kernel_refuses_too_few_events() -> None:
    done = script("bench_kernel.py", "--events", "500")
    assert done.returncode == 2
    assert "--events must be at least 2000, not 500" in done.stderr


@pytest.mark.parametrize(
    ("args", "says"),
    [
        (("long_stream.py", "--events", "100000"), "100,000 events at"),
        (("memory_per_slot.py", "--slots", "20000"), "bytes a slot"),
        (("recovery_time.py", "--events", "5000"), "batch: replayed 5,000 events"),
        (("recovery_time.py", "--events", "5000", "--shape", "cols"), "cols: replayed 5,000 events"),
        (("fuzz_columnar.py", "1"), "no difference from the full path"),
    ],
)
def test_script_runs(args: tuple[str, ...], says: str) -> None:
    done = script(*args)
    assert done.returncode == 0, done.stderr
    assert says in done.stdout


def test_journal_cost_keeps_the_copys_journal_out_of_its_files() -> None:
    """Its figure stands on the copy writing next to nothing: a patch that stopped taking (the
    daemon journaling by another path) would make the two alike and the script would not say."""
    done = script("journal_cost.py", "--events", "20000", "--pairs", "1")
    assert done.returncode == 0, done.stderr
    assert "the paired ratio, memory over file:" in done.stdout
    counts = re.search(r"write and writev\): ([\d,]+), ([\d,]+) by the copy", done.stdout)
    assert counts is not None, done.stdout
    to_file, to_memory = (int(c.replace(",", "")) for c in counts.groups())
    assert to_file > 3_000_000  # 20,000 events of 161 bytes in the journal
    assert to_memory < to_file / 10


def test_profile_engine_reports_each_shape() -> None:
    done = script("profile_engine.py", "--blocks", "4", "--rounds", "1", "--json")
    assert done.returncode == 0, done.stderr
    result = json.loads(done.stdout)
    assert result["race_over_single"] > 0
