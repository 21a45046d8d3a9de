"""The committed demo log is exactly what its seeded generator writes."""

from __future__ import annotations

from oddsmill.demo_data import generate, to_jsonl_gz

from tests.conftest import DEMO


def test_regenerating_the_demo_log_gives_the_committed_bytes() -> None:
    assert to_jsonl_gz(generate()) == DEMO.read_bytes()
