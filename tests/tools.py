"""Outside programs the integration tests drive: Chromium, Prometheus, promtool, tmux, fincore; and a
reader of the names in a learner's state.

`.ci/run` installs them from Debian's packages. Missing from a developer's machine, their tests
skip; under CI (CI=true) a missing one fails its test, since CI is meant to have installed it.
"""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path
from typing import Any

import pytest

ROOT = Path(__file__).resolve().parents[1]
ARTIFACTS = Path(os.environ.get("ODDSMILL_ARTIFACTS", ROOT / "test-artifacts"))


def require(program: str) -> str:
    path = shutil.which(program)
    if path is None:
        message = f"{program} is not installed (.ci/run installs it from Debian's packages)"
        if os.environ.get("CI") == "true":
            pytest.fail(message)
        pytest.skip(message)
    return path


def chromium(url: str, *args: str, user_data: Path, timeout: float = 60) -> str:
    """Run headless Chromium on `url` (sandbox and background networking off) and return stdout.
    `--virtual-time-budget` lets the page's script fetch and render before the DOM is read."""
    exe = require("chromium")
    cmd = [
        exe,
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        f"--user-data-dir={user_data}",
        "--virtual-time-budget=5000",
        *args,
        url,
    ]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)
    assert done.returncode == 0, f"chromium failed ({done.returncode}): {done.stderr[-2000:]}"
    return done.stdout


def names_in(learner_state: dict[str, Any]) -> list[str]:
    """The feature names a learner's state (`Learner.state_dict()`) holds, in slot order."""
    from oddsmill.vocabulary import Vocabulary

    return Vocabulary.from_state(int(learner_state["settings"]["max_features"]), learner_state).names


def full_rows(learner_state: dict[str, Any]) -> dict[str, Any]:
    """A learner's state as `Learner.state_dict()` gives it (full rows), from any form a checkpoint
    holds (checkpoints take the compact form, `slot_order` 3): the tests compare these."""
    from oddsmill.learner import Learner

    return Learner.from_state_dict(learner_state).state_dict()


def one_call_statuses(mp: pytest.MonkeyPatch) -> list[int]:
    """What each call of the quick path's one compiled call (`Known.journal_and_learn`), and each
    wake-up in one call that something came to (`Engine.take_in`, intake.py), found, appended as
    it returns, while `mp` holds."""
    from oddsmill import intake
    from oddsmill.engine import Engine
    from oddsmill.quick import Known

    found: list[int] = []
    one_call = Known.journal_and_learn
    take_in = Engine.take_in

    def counted(self: Any, *a: Any) -> Any:
        status, bodies = one_call(self, *a)
        found.append(status)
        return status, bodies

    def woke(self: Any, *a: Any) -> int:
        status: int = take_in(self, *a)
        if status != intake.EMPTY:
            found.append(status)
        return status

    mp.setattr(Known, "journal_and_learn", counted)
    mp.setattr(Engine, "take_in", woke)
    return found
