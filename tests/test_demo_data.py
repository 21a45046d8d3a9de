"""The committed demo log is exactly what its seeded generator writes."""

from __future__ import annotations

from oddsmill.demo_data import generate, to_jsonl_gz

from tests.conftest import DEMO


def test_regenerating_the_demo_log_gives_the_committed_bytes() -> None:
    assert to_jsonl_gz(generate()) == DEMO.read_bytes()


def test_the_command_writes_the_log_and_says_when_it_cannot(tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    """`python -m oddsmill.demo_data --help` wrote the log to a file named --help."""
    import pytest
    from oddsmill.demo_data import main

    with pytest.raises(SystemExit) as help_asked:
        main(["--help"])
    assert help_asked.value.code == 0 and "write the demo log" in capsys.readouterr().out
    assert main([str(tmp_path / "parcels.jsonl.gz")]) == 0
    assert (tmp_path / "parcels.jsonl.gz").read_bytes() == DEMO.read_bytes()
    assert main([str(tmp_path / "no-such-dir" / "x.jsonl.gz")]) == 2
    assert "cannot write" in capsys.readouterr().err
